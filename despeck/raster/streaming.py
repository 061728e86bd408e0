"""The streaming engine: a scene through a function strip by strip, band by band, into a verified output.

``despeck simulate`` (:func:`process_file`), ``despeck filter``
(:func:`despeck.filters.filter_raster`) and ``despeck apply``
(:func:`despeck.inference.despeckle_file`) stream a raster through this module, which
owns everything they share; each supplies only a function on a strip
(:meth:`RasterStream.map_strips`):

- **strips**: full-width runs of rows read in order, each cut where the output's
  blocks are: a strip is a whole number of block rows or, when the scene is too wide
  for one block row within the caller's budget of pixels, an exact fraction of one
  (:func:`strip_rows`);
- the **halo**: context pixels read around a strip for a function that looks at
  neighbours, and the one border rule for the part of it beyond the scene (below);
- **bands**: one SAR band after another (the caller sets each band up);
- **progress**: one tqdm bar per scene in megapixels written, silenced by ``progress=False``;
- **output**: :class:`~despeck.raster.writer.SceneWriter` -- a temporary file beside
  the destination, read back, then renamed; nothing appears at the destination if
  anything fails. Rows are written once the output's block rows they fill are
  complete (shorter strips are staged until then), so GDAL never rewrites a
  compressed block, in pieces a few blocks wide.

Memory depends on the strip's rows, the halo and the scene's width (at most one
block row is staged), never on the scene's height.

Border rule. Halo pixels beyond the scene's border mirror the scene about that
border, the border pixel repeated first (``numpy.pad`` mode ``'symmetric'``); when the
scene is smaller than the halo along either axis, a mirror cannot reach that far and
every halo pixel beyond the border repeats the nearest edge pixel instead (mode
``'edge'``). :attr:`Strip.inside` says which part of a strip lies in the scene, so a
function defined on the scene alone can leave the rest out: the classical filters
treat pixels outside the scene as missing (their neighbourhoods skip them), and the
networks' tile grid reflects about the border pixel inside its own row buffer
(:mod:`despeck.tiling`); both ask for the part inside.

Words, as used across the package: a **block** is a file's storage unit (512 x 512
in despeck's outputs); a **strip** is what this engine reads and writes; a **tile** is
the unit a filter kernel or a network sees, cut from a strip (or from the row buffer
of :mod:`despeck.inference`) by its user (:data:`despeck.filters.engine.TILE`,
:class:`despeck.tiling.TileGrid`).
"""

from __future__ import annotations

import contextlib
import os
import pathlib
from dataclasses import dataclass, field

import numpy as np
from rasterio.windows import Window

from ..errors import InputError
from .paths import check_output_path
from .reader import SceneReader, open_scene
from .windows import as_window, row_window
from .writer import OUTPUT_TILE, open_output

__all__ = [
    "STRIP_PIXELS",
    "Strip",
    "RasterStream",
    "open_stream",
    "strip_rows",
    "progress_bar",
    "shift_rows_up",
    "read_with_halo",
    "process_file",
]

#: Default budget of a strip (pixels of output rows), when its caller gives none.
STRIP_PIXELS = 1 << 21

# Columns written per call: whole blocks, about 2048 pixels wide, so the writer's own
# conversion temporaries stay small whatever the scene's width.
_WRITE_COLUMNS = 2048


def strip_rows(height: int, width: int, block_rows: int, rows=None, max_pixels=None) -> int:
    """Rows per strip: ``rows`` (default ``max_pixels // width``, :data:`STRIP_PIXELS`), cut where the blocks are.

    At least the scene's height gives one strip of the whole scene. Otherwise a
    request of a block row or more is rounded down to whole block rows, and a smaller
    one up to the nearest exact fraction of a block row (a divisor of ``block_rows``),
    so every strip edge lies on a block edge or splits a block row into equal parts.
    """
    height, width, block_rows = int(height), int(width), max(1, int(block_rows))
    if rows is None:
        rows = int(STRIP_PIXELS if max_pixels is None else max_pixels) // max(width, 1)
    want = max(1, int(rows))
    if want >= height:
        return height
    if want >= block_rows:
        return want - want % block_rows
    return next(d for d in range(want, block_rows + 1) if block_rows % d == 0)


def progress_bar(total_pixels, description, enabled=True):
    """The package's progress bar: megapixels done, rate and time left (tqdm); None when not ``enabled``."""
    if not enabled:
        return None
    from tqdm.auto import tqdm

    return tqdm(
        total=round(total_pixels / 1e6, 6), desc=description, unit="MP", unit_scale=False, leave=False,
        bar_format="{desc}: {percentage:3.0f}%|{bar}| {n:.1f}/{total:.1f} MP [{elapsed}<{remaining}, {rate_noinv_fmt}]",
    )


# --------------------------------------------------------------------------- halo

def _halo_pair(halo) -> tuple:
    """``halo`` (an int, or ``(rows, cols)``) as two non-negative ints."""
    pair = tuple(halo) if isinstance(halo, (tuple, list)) else (halo, halo)
    try:
        rows, cols = (int(v) for v in pair)
    except (TypeError, ValueError):
        raise InputError(f"halo must be a whole number of pixels or (rows, cols), got {halo!r}") from None
    if rows < 0 or cols < 0:
        raise InputError(f"halo must be >= 0, got {halo!r}")
    return rows, cols


def _read_grown(reader: SceneReader, window: Window, halo, band):
    """``window`` grown by ``halo`` ``(rows, cols)`` (border rule of the module), and the part inside the scene."""
    hr, hc = halo
    r0, c0 = int(window.row_off) - hr, int(window.col_off) - hc
    r1, c1 = int(window.row_off + window.height) + hr, int(window.col_off + window.width) + hc
    rr0, cc0 = max(0, r0), max(0, c0)
    rr1, cc1 = min(reader.height, r1), min(reader.width, c1)
    intensity, valid = reader.read(Window(cc0, rr0, cc1 - cc0, rr1 - rr0), band=band)
    pads = ((rr0 - r0, r1 - rr1), (cc0 - c0, c1 - cc1))
    inside = (slice(pads[0][0], pads[0][0] + rr1 - rr0), slice(pads[1][0], pads[1][0] + cc1 - cc0))
    if any(p for pair in pads for p in pair):
        if max(pads[0]) > intensity.shape[0] or max(pads[1]) > intensity.shape[1]:
            # a mirror cannot reach that far on a tiny scene; repeat the edge instead
            mode = "edge"
        else:
            mode = "symmetric"
        intensity = np.pad(intensity, pads, mode=mode)
        valid = np.pad(valid, pads, mode=mode)
    return intensity, valid, inside


def read_with_halo(reader: SceneReader, window, halo: int, band=1):
    """Read ``window`` grown by ``halo`` pixels on every side, beyond the scene by the module's border rule.

    Returns ``(intensity, valid)`` of shape ``(h + 2 halo, w + 2 halo)``. Pixels
    outside the scene mirror it about its border (``numpy.pad`` mode 'symmetric'), or
    repeat its edge when the scene is smaller than the halo, so a neighbourhood
    operation sees plausible context there.
    """
    w = as_window(window, reader.width, reader.height, reader.path)
    halo = int(halo)
    intensity, valid, _ = _read_grown(reader, w, _halo_pair(halo), band)
    return intensity, valid


@dataclass(frozen=True, eq=False)
class Strip:
    """One strip of one band, with its halo, as a strip function receives it.

    Attributes
    ----------
    band : int
        SAR band of the input (from 1).
    row0, row1 : int
        Scene rows of the strip (``row1`` excluded); the strip spans the scene's width.
    halo : tuple of int
        Context ``(rows, cols)`` above and below, left and right.
    intensity : numpy.ndarray of float32
        Shape ``(row1 - row0 + 2 rows, width + 2 cols)``; array row ``i`` is scene row
        ``row0 - rows + i`` and column ``j`` scene column ``j - cols``, beyond the scene
        by the border rule. Zero wherever ``valid`` is False.
    valid : numpy.ndarray of bool
        Same shape: the input's validity (:mod:`despeck.validity`, nodata and masks).
    inside : tuple of slice
        ``(rows, cols)`` of the arrays that lie inside the scene.
    """

    band: int
    row0: int
    row1: int
    halo: tuple
    intensity: np.ndarray
    valid: np.ndarray
    inside: tuple
    _sink: object = field(default=None, repr=False)

    @property
    def core(self) -> tuple:
        """``(rows, cols)`` of the arrays that are the strip's own pixels (the halo left out)."""
        hr, hc = self.halo
        return slice(hr, hr + self.row1 - self.row0), slice(hc, self.intensity.shape[1] - hc)

    def scene_part(self):
        """``(intensity, valid, rows)``: the arrays cut to the scene, and the slice of their rows that is the strip's."""
        rows, cols = self.inside
        first = self.row0 - self.halo[0] + rows.start  # scene row of the part's first row
        return (self.intensity[rows, cols], self.valid[rows, cols],
                slice(self.row0 - first, self.row1 - first))

    def emit(self, row0, values, valid=None):
        """Write finished output rows ``row0 .. row0 + len(values)`` of this band now.

        For functions whose output lags their input (the overlap-blend of
        :mod:`despeck.inference`): rows must arrive in order, each exactly once; the
        function then returns None. ``values`` may be a view of a buffer reused later.
        """
        self._sink.write(int(row0), values, valid)


# --------------------------------------------------------------------------- output rows

class _RowSink:
    """Output rows of one band, taken in order and written in whole rows of the output's blocks."""

    def __init__(self, writer, band, block_shape, bar):
        self.writer, self.band, self.bar = writer, band, bar
        self.block_rows, block_cols = block_shape
        self.width, self.height = writer.width, writer.height
        self.cols_per_write = block_cols * max(1, _WRITE_COLUMNS // block_cols)
        self.next = 0  # first scene row not yet received
        self.start = 0  # first scene row not yet written
        self.held = 0  # rows staged in self.values
        self.values = None  # staging, allocated only if rows arrive in parts of a block row

    def _write(self, r0, values, valid=None):
        n = values.shape[0]
        for c0 in range(0, self.width, self.cols_per_write):
            c1 = min(self.width, c0 + self.cols_per_write)
            ok = None if valid is None else valid[:, c0:c1]
            self.writer.write(values[:, c0:c1], Window(c0, r0, c1 - c0, n), band=self.band, valid=ok)

    def write(self, r0, values, valid=None):
        values = np.asarray(values)
        n = values.shape[0]
        if r0 != self.next or values.shape != (n, self.width) or r0 + n > self.height:
            raise RuntimeError(f"{self.writer.path}: rows {r0}-{r0 + n - 1} of shape {values.shape} do not follow "
                               f"row {self.next - 1} of a {self.width}-pixel-wide band")  # a caller's bug
        r1 = r0 + n
        self.next = r1
        if self.held == 0 and r0 % self.block_rows == 0 and (r1 % self.block_rows == 0 or r1 == self.height):
            self._write(r0, values, valid)
            self.start = r1
        else:
            if self.values is None or self.held + n > self.values.shape[0]:
                grown = np.empty((self.held + n + self.block_rows, self.width), dtype=np.float32)
                if self.held:
                    grown[: self.held] = self.values[: self.held]
                self.values = grown
            # Staged rows carry invalid pixels as NaN, which the writer turns into nodata.
            staged = self.values[self.held : self.held + n]
            if valid is None:
                np.copyto(staged, values, casting="unsafe")
            else:
                np.copyto(staged, np.where(valid, values, np.float32(np.nan)), casting="unsafe")
            self.held += n
            ready = r1 if r1 == self.height else (r1 // self.block_rows) * self.block_rows
            if ready > self.start:
                k = ready - self.start
                self._write(self.start, self.values[:k])
                shift_rows_up(self.values, k, self.held - k)
                self.start, self.held = ready, self.held - k
        if self.bar is not None:
            self.bar.update(n * self.width / 1e6)

    def finish(self):
        if self.next != self.height or self.held:
            raise RuntimeError(f"{self.writer.path}: band {self.band} ended at row {self.next} of {self.height}")


def shift_rows_up(array, by, count):
    """Move rows ``by:by + count`` to ``0:count`` in place, without a full-size temporary.

    Copies go in blocks of at most ``by`` rows, so source and destination of each copy
    never overlap (numpy would otherwise make a temporary copy of the whole range).
    Row buffers slide this way (the output staging here, the blend of :mod:`despeck.inference`).
    """
    for start in range(0, count, by):
        n = min(by, count - start)
        array[start : start + n] = array[start + by : start + by + n]


# --------------------------------------------------------------------------- the stream

class RasterStream:
    """One input scene streamed into one output GeoTIFF; use :func:`open_stream`.

    On entry the input is opened (:attr:`reader`) and then the output path checked
    (:func:`~despeck.raster.check_output_path`, which may create the output's folder:
    after the input, so a bad input leaves nothing behind); settings can then be checked before
    :meth:`create_output` creates the output's temporary file. On a clean exit the
    output is verified and renamed into place; on an exception it is deleted.
    """

    def __init__(self, in_path, out_path, *, units=None, out_units=None, overwrite=False, cog=False, progress=True,
                 description=None, gdal_threads=None):
        self.in_path = pathlib.Path(in_path)
        self.out_path = out_path
        self._out_units, self._overwrite, self._cog = out_units, overwrite, cog
        self._progress = progress
        self.description = self.in_path.name if description is None else description
        self._stack = contextlib.ExitStack()
        self.writer = None
        self.bar = None
        self._block_shape = (OUTPUT_TILE, OUTPUT_TILE)  # the output profile's, until the output exists
        try:
            if gdal_threads is not None:
                self._stack.enter_context(_gdal_threads(gdal_threads))
            self.reader = self._stack.enter_context(open_scene(self.in_path, units=units))
            check_output_path(out_path, [self.in_path], overwrite=overwrite)
        except BaseException:
            self._stack.close()
            raise

    @property
    def bands(self) -> list:
        """The SAR bands of the input, from 1."""
        return list(range(1, self.reader.band_count + 1))

    @property
    def block_rows(self) -> int:
        """Rows of the output's blocks (strips are cut where they end)."""
        return self._block_shape[0]

    def strip_rows(self, rows=None, max_pixels=None) -> int:
        """Rows of the strips :meth:`map_strips` reads for a request of ``rows`` (see :func:`strip_rows`)."""
        return strip_rows(self.reader.height, self.reader.width, self.block_rows, rows, max_pixels)

    def create_output(self, band_count=None):
        """Create the output (temporary file) with ``band_count`` bands (default the input's) and the progress bar."""
        self.writer = self._stack.enter_context(open_output(
            self.out_path, self.reader, units=self._out_units, band_count=band_count, overwrite=self._overwrite,
            cog=self._cog,
        ))
        block = self.writer.block_windows()[0]
        self._block_shape = (int(block.height), int(block.width))
        total = self.reader.width * self.reader.height * self.writer.band_count
        self.bar = progress_bar(total, self.description, self._progress)
        if self.bar is not None:
            self._stack.callback(self.bar.close)
        return self.writer

    @property
    def path(self) -> pathlib.Path:
        """The output's destination."""
        return self.writer.path

    def update_tags(self, **tags):
        self.writer.update_tags(**tags)

    def set_description(self, band, text):
        self.writer.set_description(band, text)

    def map_strips(self, func, *, band=1, out_band=None, halo=0, rows=None, max_pixels=None):
        """Run ``func`` over band ``band`` strip by strip and write its output into ``out_band``.

        Parameters
        ----------
        func : callable
            ``func(strip)`` with a :class:`Strip`; returns the strip's output intensity,
            shape ``(row1 - row0, width)``, or ``(intensity, valid)``, or None after
            writing lagging rows itself with :meth:`Strip.emit`. Pixels invalid in the
            input, or not ``valid`` in a returned pair, are nodata in the output.
        band : int
            SAR band of the input, from 1.
        out_band : int, optional
            Band of the output, default ``band``.
        halo : int or (int, int)
            Context pixels ``func`` needs on every side of a strip, or ``(rows, cols)``
            (a function that cuts the scene part out may ask for no columns).
        rows : int, optional
            Rows per strip wanted (made block-aligned, :func:`strip_rows`); default
            from ``max_pixels`` (default :data:`STRIP_PIXELS`).
        """
        halo = _halo_pair(halo)
        reader = self.reader
        band = reader.check_band(band)
        out_band = band if out_band is None else int(out_band)
        sink = _RowSink(self.writer, out_band, self._block_shape, self.bar)
        step = self.strip_rows(rows, max_pixels)
        for r0 in range(0, reader.height, step):
            r1 = min(reader.height, r0 + step)
            intensity, valid, inside = _read_grown(reader, row_window(r0, r1, reader.width), halo, band)
            strip = Strip(band, r0, r1, halo, intensity, valid, inside, sink)
            result = func(strip)
            if result is None:
                continue
            out, out_valid = result if isinstance(result, tuple) else (result, None)
            keep = valid[strip.core]
            if out_valid is not None:
                keep = keep & np.asarray(out_valid, dtype=bool)
            sink.write(r0, out, keep)
        sink.finish()

    def close(self):
        self._stack.close()

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        # the writer (entered last) commits or aborts first, then the reader closes
        return self._stack.__exit__(exc_type, exc, tb)


def open_stream(in_path, out_path, *, units=None, out_units=None, overwrite=False, cog=False, progress=True,
                description=None, gdal_threads=None) -> RasterStream:
    """Open ``in_path`` for streaming into ``out_path``; see :class:`RasterStream`.

    Parameters
    ----------
    in_path, out_path : path-like
        Input raster and output GeoTIFF (never the input).
    units, out_units : str, optional
        Input units (detected if None); output units (default the input's, intensity
        for complex input).
    overwrite : bool
        Replace an existing output.
    cog : bool
        Publish a Cloud-Optimised GeoTIFF (:func:`~despeck.raster.open_output`).
    progress : bool
        Show the progress bar on standard error.
    description : str, optional
        Label of the progress bar (default the input's file name).
    gdal_threads : int, optional
        GDAL worker threads (``GDAL_NUM_THREADS``) for the whole stream, unless the user
        set that: output blocks are then compressed while the caller computes. Default GDAL's.
    """
    return RasterStream(in_path, out_path, units=units, out_units=out_units, overwrite=overwrite, cog=cog,
                        progress=progress, description=description, gdal_threads=gdal_threads)


def _gdal_threads(threads):
    import rasterio
    from rasterio.env import getenv, hasenv

    if os.environ.get("GDAL_NUM_THREADS") or (hasenv() and "GDAL_NUM_THREADS" in getenv()):
        return contextlib.nullcontext()
    return rasterio.Env(GDAL_NUM_THREADS=str(int(threads)))


# --------------------------------------------------------------------------- a function per strip

def process_file(in_path, out_path, func, *, halo=0, units=None, out_units=None, overwrite=False,
                 progress=True, description="processing", tags=None, cog=False) -> pathlib.Path:
    """Stream a scene through ``func`` strip by strip and write the result like the input.

    For each SAR band and each strip of the output (:class:`RasterStream`),
    ``func(intensity, valid, row, col)`` receives the strip's input grown by ``halo``
    pixels on every side (beyond the scene by the module's border rule) and the scene
    position of the strip's top-left pixel (``col`` is 0: strips span the scene's
    width), and returns the strip's output intensity (shape of the strip) or
    ``(intensity, valid)``. Pixels invalid in the input stay nodata in the output.
    Memory depends on the strip and halo sizes and the scene's width, not on its
    height. The output appears at ``out_path`` only when every strip is written.

    Parameters
    ----------
    in_path, out_path : path-like
    func : callable
    halo : int
        Context pixels ``func`` needs around each strip.
    units, out_units : str, optional
        Input units (detected if None) and output units (default: the input's,
        intensity for complex input).
    overwrite : bool
    progress : bool
        Show a progress bar (tqdm) on standard error.
    description : str
        Label of the progress bar.
    tags : dict, optional
        Metadata tags to add to the output.
    cog : bool
        Write a Cloud-Optimised GeoTIFF with overviews (see :func:`open_output`).
    """
    halo = int(halo)
    if halo < 0:
        raise InputError(f"halo must be >= 0, got {halo}")

    def per_strip(strip):
        return func(strip.intensity, strip.valid, strip.row0, 0)

    with open_stream(in_path, out_path, units=units, out_units=out_units, overwrite=overwrite, cog=cog,
                     progress=progress, description=description) as stream:
        stream.create_output()
        if tags:
            stream.update_tags(**tags)
        for band in stream.bands:
            stream.map_strips(per_strip, band=band, halo=halo)
        return stream.path
