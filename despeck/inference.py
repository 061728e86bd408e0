"""Tiled, streamed application of a trained despeckler to arrays and raster files.

:func:`despeckle_array` runs a :class:`despeck.models.Despeckler` over an in-memory
intensity array; :func:`despeckle_file` runs it over a raster file of any size and
writes a GeoTIFF with the input's georeferencing, nodata, band descriptions and tags.
Both cut the scene into constant-shape overlapping tiles (:mod:`despeck.tiling`),
feed them to the network in batches and blend the results, and both go through the
same streaming loop: full-width strips of input rows are read as the tiles need them,
and each finished strip of output rows is written and forgotten, so memory depends on
the scene's width and the tile size, never on its height.

Every tile of a scene is normalised with one scene-level log offset (the mean log
intensity of a decimated sample of valid pixels), so tiles are processed identically
and blending has nothing to hide for a purely convolutional network. Invalid pixels
(nodata, non-finite, non-positive) are excluded from the network's input by the
Despeckler's documented fill -- the scene's log offset, i.e. a normalised value of 0
-- and are restored as the input value (arrays) or nodata (files) in the output.

Speed settings: torch threads (default all cores available to the process),
``torch.inference_mode``, denormals flushed to zero, channels-last memory format only
when a timing on a crop of the first tile shows it is faster, optional bfloat16
autocast on CPUs with native bf16 instructions, and GDAL worker threads that
compress output blocks while the network runs. Files are tiled in short, wide tiles
whose rows advance by exactly one row of output blocks, so each row of tiles
completes whole blocks and the buffers hold about one tile height of the scene's
width.
"""

from __future__ import annotations

import contextlib
import math
import os
import pathlib
import time
import warnings

import numpy as np
import torch
from tqdm.auto import tqdm

from .cpu import bf16_supported, usable_cores  # bf16_supported re-exported: callers know it here
from .errors import InputError
from .tiling import TileGrid, default_tiling

__all__ = [
    "despeckle_array",
    "despeckle_file",
    "bf16_supported",
    "resolve_tiling",
    "max_overlap",
    "MAX_TILE",
    "model_mismatch_notes",
    "InferenceWarning",
    "array_sample",
    "condition_for_model",
]

# Pixels per batch the default batch size aims for: enough work per call to keep both
# cores busy, small enough that a 64-channel network's activations stay a few hundred MB
# (a 40-channel network in channels-last needs about 330 MB per megapixel).
_BATCH_PIXELS = 1 << 19

# Below this many pixels a timing of the two memory formats costs more than it can save.
_TRIAL_MIN_PIXELS = 4_000_000
# Side of the crop timed in each format: big enough for the convolution kernels to
# behave as on whole tiles, small enough to cost well under 1 % of a large scene.
_TRIAL_SIDE = 160

# Upper bound of the scene sample used for the log offset (same as the file reader's).
_SAMPLE_PIXELS = 1_000_000


class InferenceWarning(UserWarning):
    """The model may not suit the input (units, looks), or a speed option was unavailable."""


# --------------------------------------------------------------------------- checks

def _check_model(model):
    rf = getattr(model, "receptive_field", None)
    if not isinstance(model, torch.nn.Module) or isinstance(rf, bool) or not isinstance(rf, (int, np.integer)):
        raise InputError(
            f"model must be a despeck.models.Despeckler (an nn.Module with an integer receptive_field), "
            f"got {type(model).__name__}"
        )
    if rf < 1 or rf % 2 == 0:
        raise InputError(f"model receptive_field must be a positive odd integer, got {rf}")
    return int(rf)


def _size_multiple(model) -> int:
    """Side multiple at which every tile sees the same pooling grid (1 for plain CNNs)."""
    for obj in (model, getattr(model, "network", None)):
        if obj is None:
            continue
        m = getattr(obj, "size_multiple", None)
        if isinstance(m, (int, np.integer)) and m >= 1:
            return int(m)
        levels = getattr(obj, "levels", None)
        if isinstance(levels, (int, np.integer)) and levels >= 0:
            return 2 ** int(levels)
    return 1


def _positive_int(name, value, minimum=1):
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        else:
            raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def resolve_tiling(shape, model, *, tile=None, overlap=None, row_stride=None) -> TileGrid:
    """The tile grid used for a scene of ``shape`` with ``model``.

    Parameters
    ----------
    shape : tuple of int
        Scene ``(rows, cols)``.
    model : Despeckler
        Supplies ``receptive_field`` (and the size multiple of multi-scale networks).
    tile : int, optional
        Largest tile side in pixels; default from :func:`despeck.tiling.default_tiling`.
        Along each axis the tiler then takes the smallest side, not above this, that
        needs no more tiles, so little work is spent on padding past the scene border.
    overlap : int, optional
        Pixels shared by neighbouring tiles. With at least the receptive field minus one,
        half the receptive field is discarded at each tile edge and the rest blended, and
        a plain CNN's tiled output equals its whole-scene output. A smaller overlap is
        allowed (with a warning): a quarter of it is discarded at each edge and the middle
        half blended. For networks that downsample (U-Nets) it is rounded up to their
        size multiple so every tile sees the same pooling grid as the whole scene.
    row_stride : int, optional
        Fix the rows advanced per row of tiles (see :meth:`TileGrid.fitted`); used when
        it fits in ``tile``, which then bounds the tile's area.

    Raises
    ------
    InputError
        Tile smaller than the receptive field or above :data:`MAX_TILE`; overlap not
        below the tile, or above what any tiling of this model needs
        (:func:`max_overlap`).
    """
    rf = _check_model(model)
    multiple = _size_multiple(model)
    d_tile, d_overlap = default_tiling(rf, multiple)
    tile = _positive_int("tile", tile)
    overlap = _positive_int("overlap", overlap, 0)
    margin = rf // 2
    if tile is not None and tile < rf:
        raise InputError(f"tile ({tile}) is smaller than the model's receptive field ({rf} pixels); use at least {rf}")
    if tile is not None and tile > MAX_TILE:
        raise InputError(f"tile ({tile}) is larger than the {MAX_TILE}-pixel maximum (a tile's activations must fit "
                         f"in memory; the default is about {d_tile})")
    if overlap is not None and overlap > max_overlap(model):
        raise InputError(f"overlap ({overlap}) is larger than this model can use ({max_overlap(model)} pixels at most; "
                         f"the default is {d_overlap})")
    if overlap is None:
        overlap = d_overlap
        if tile is not None and overlap >= tile:
            overlap = _round_up(rf - 1, multiple)
    elif multiple > 1:
        # Keeps every tile on the same pooling grid as the whole scene.
        overlap = _round_up(overlap, multiple)
    if overlap < rf - 1:
        # Networks with a large nominal receptive field (U-Nets) are usually applied with
        # less: discard a quarter of the overlap at each edge and blend the middle half.
        margin = overlap // 4
        warnings.warn(
            f"overlap ({overlap}) is smaller than the model's receptive field minus one ({rf - 1}): "
            "tiles will differ slightly from whole-scene inference near their edges; blending hides the seams",
            InferenceWarning, stacklevel=3,
        )
    if tile is None:
        tile = max(d_tile, overlap + 8 * multiple)
    if overlap >= tile:
        raise InputError(f"overlap ({overlap}) must be smaller than the tile size ({tile})")
    if row_stride is not None and (row_stride % multiple or row_stride + overlap > tile):
        row_stride = None
    return TileGrid.fitted(shape, tile, overlap, margin, multiple=multiple, row_stride=row_stride)


def _round_up(value, multiple):
    return -(-int(value) // multiple) * multiple


#: Largest tile side accepted (pixels). The default tiles are 720-1024 pixels; a
#: 4096-pixel tile already needs about 2.7 GB of activations for a 40-channel network
#: (330 MB per megapixel, see :func:`despeck.tiling.default_tiling`).
MAX_TILE = 4096


def max_overlap(model) -> int:
    """Largest overlap accepted for ``model``: four times its default overlap, at least 256 pixels.

    The default overlap already holds the receptive field and a blend zone; a larger
    one only recomputes more of every tile, and since tiles are at least the overlap
    plus a few pixels, an absurd value would make absurdly large tiles.
    """
    rf = _check_model(model)
    _, d_overlap = default_tiling(rf, _size_multiple(model))
    return int(max(4 * d_overlap, 256))


def _scene_offset(model, sample):
    fn = getattr(model, "scene_log_offset", None)
    if fn is None:
        return None
    return float(fn(sample))


def array_sample(intensity, valid):
    """The scene sample of the log offset: the valid pixels of every ``step``-th row and column.

    ``step`` keeps the decimated grid at about one million pixels at most. Works on any
    array that slices like numpy (a dask array gives a lazy sample), so a scene split
    into chunks is normalised with exactly the offset :func:`despeckle_array` takes.
    """
    step = max(1, math.ceil(math.sqrt(intensity.size / _SAMPLE_PIXELS)))
    sub, ok = intensity[::step, ::step], valid[::step, ::step]
    return sub[ok].astype(np.float64)


# --------------------------------------------------------------------------- the runner

@contextlib.contextmanager
def _torch_settings(threads):
    old_threads = torch.get_num_threads()
    torch.set_num_threads(threads)
    # Denormal activations (from tiny weights times tiny values) can slow x86 float
    # arithmetic by orders of magnitude; they carry no information here.
    torch.set_flush_denormal(True)
    try:
        with torch.inference_mode():
            yield
    finally:
        torch.set_flush_denormal(False)
        torch.set_num_threads(old_threads)


class _TileRunner:
    """Runs batches of tiles through the model with the chosen speed settings.

    When ``channels_last`` is None and the scene is large enough for it to matter, the
    first call times both memory formats on a crop of at most 160 x 160 pixels of its
    first tile (a warm-up and a timed run each) and keeps the faster one; small scenes
    keep the default (contiguous) format.
    """

    def __init__(self, model, *, log_offset, bf16, channels_last, total_pixels=None, looks=None, correlation=None):
        self.model = model
        self.log_offset = log_offset
        self.condition = {} if looks is None else {"looks": looks, "correlation": correlation}
        self.bf16 = bf16
        if channels_last is None and total_pixels is not None and total_pixels < _TRIAL_MIN_PIXELS:
            channels_last = False
        self.channels_last = channels_last
        self._converted = False

    def _set_format(self, cl):
        fmt = torch.channels_last if cl else torch.contiguous_format
        self.model.to(memory_format=fmt)
        self._converted = self._converted or cl

    def restore(self):
        if self._converted:
            self.model.to(memory_format=torch.contiguous_format)

    def _choose_format(self, tiles):
        h, w = min(_TRIAL_SIDE, tiles.shape[1]), min(_TRIAL_SIDE, tiles.shape[2])
        crop = np.ascontiguousarray(tiles[:1, :h, :w])
        seconds = {}
        for cl in (False, True, False, True):  # the second round, warm, is the one kept
            self._set_format(cl)
            start = time.perf_counter()
            self._forward(crop, cl)
            seconds[cl] = time.perf_counter() - start
        self.channels_last = seconds[True] < seconds[False]
        self._set_format(self.channels_last)

    def __call__(self, tiles: np.ndarray) -> np.ndarray:
        if self.channels_last is None:
            self._choose_format(tiles)
        elif self.channels_last and not self._converted:
            self._set_format(True)
        return self._forward(tiles, self.channels_last)

    def _forward(self, tiles, cl):
        # Invalid pixels arrive as 0 intensity, which the Despeckler always treats as
        # invalid (non-positive), so no separate mask is needed.
        x = torch.from_numpy(tiles).unsqueeze(1)
        if cl:
            x = x.contiguous(memory_format=torch.channels_last)
        with torch.autocast("cpu", dtype=torch.bfloat16, enabled=self.bf16):
            y = self.model(x, log_offset=self.log_offset, **self.condition)
        return y.to(torch.float32).squeeze(1).contiguous().numpy()


# --------------------------------------------------------------------------- streaming

def _read_plan(rows_axis, chunk_rows):
    """For each row of tiles: the first scene row still needed and the row to read up to."""
    count = rows_axis.count
    ranges = [rows_axis.source_range(i) for i in range(count)]
    keep = [0] * count
    low = rows_axis.length
    for i in reversed(range(count)):
        low = min(low, ranges[i][0])
        keep[i] = low
    upto = [min(rows_axis.length, -(-hi // chunk_rows) * chunk_rows) for _, hi in ranges]
    for i in range(1, count):
        upto[i] = max(upto[i], upto[i - 1])
    return keep, upto


def _shift_rows_up(array, by, count):
    """Move rows ``by:by + count`` to ``0:count`` in place, without a full-size temporary.

    Copies go in blocks of at most ``by`` rows, so source and destination of each copy
    never overlap (numpy would otherwise make a temporary copy of the whole range).
    """
    for start in range(0, count, by):
        n = min(by, count - start)
        array[start : start + n] = array[start + by : start + by + n]


def _stream(grid: TileGrid, read_rows, emit_rows, runner, batch_size, progress_bar, chunk_rows=1):
    """Run every tile of ``grid`` through ``runner`` and emit finished rows in order.

    ``read_rows(r0, r1)`` returns the intensity of scene rows ``[r0, r1)``, full width,
    with 0 at invalid pixels; ``emit_rows(r0, r1, estimate, source)`` receives finished
    rows and their input (``estimate`` is only meaningful where ``source > 0``; both are
    views into buffers reused afterwards). Input rows are kept in a buffer that never
    holds more than one tile height plus one read chunk; the blend accumulator holds
    one tile height. Neither depends on the number of scene rows.
    """
    rows, cols = grid.rows, grid.cols
    width = grid.shape[1]
    keep, upto = _read_plan(rows, chunk_rows)
    capacity = max(u - k for k, u in zip(keep, upto))
    buf = np.empty((capacity, width), dtype=np.float32)
    b0 = b1 = 0  # scene rows held in buf[: b1 - b0]
    acc = np.zeros((rows.tile, width), dtype=np.float32)
    a0 = 0  # scene row of acc[0]
    done = 0
    tr, tc = grid.tile_shape
    batch_in = np.empty((batch_size, tr, tc), dtype=np.float32)
    col_index = [cols.source_index(j) for j in range(cols.count)]
    col_weight = cols.accumulated_weight.astype(np.float32)[None, :]
    for i in range(rows.count):
        # Slide the input buffer: forget rows no later tile needs, then read on.
        drop = keep[i] - b0
        if drop > 0:
            held = b1 - keep[i]
            _shift_rows_up(buf, drop, held)
            b0 = keep[i]
        while b1 < upto[i]:
            r1 = min(upto[i], b1 + chunk_rows)
            buf[b1 - b0 : r1 - b0] = read_rows(b1, r1)
            b1 = r1
        row_index = rows.source_index(i) - b0
        for j0 in range(0, cols.count, batch_size):
            js = range(j0, min(cols.count, j0 + batch_size))
            for n, j in enumerate(js):
                batch_in[n] = buf[np.ix_(row_index, col_index[j])]
            out = runner(batch_in[: len(js)])
            for n, j in enumerate(js):
                grid.blend_into(acc, out[n], i, j, row_offset=a0)
        finished = rows.finished(i)
        if finished > done:
            # Normalise in place, one axis at a time: no full-width temporaries.
            estimate = acc[done - a0 : finished - a0]
            estimate /= rows.accumulated_weight[done:finished, None].astype(np.float32)
            estimate /= col_weight
            emit_rows(done, finished, estimate, buf[done - b0 : finished - b0])
            if progress_bar is not None:
                progress_bar.update((finished - done) * width / 1e6)
            shift = finished - a0
            _shift_rows_up(acc, shift, rows.tile - shift)
            acc[rows.tile - shift :] = 0
            a0, done = finished, finished


def _make_bar(total_pixels, desc, progress):
    if not progress:
        return None
    return tqdm(
        total=round(total_pixels / 1e6, 6), desc=desc, unit="MP", unit_scale=False, leave=False,
        bar_format="{desc}: {percentage:3.0f}%|{bar}| {n:.1f}/{total:.1f} MP [{elapsed}<{remaining}, {rate_noinv_fmt}]",
    )


def _settings(model, threads, bf16, batch_size, grid):
    threads = _positive_int("threads", threads) or usable_cores()
    use_bf16 = bool(bf16)
    if use_bf16 and not bf16_supported():
        warnings.warn(
            "bf16 requested but this CPU has no native bfloat16 instructions; running in float32",
            InferenceWarning, stacklevel=3,
        )
        use_bf16 = False
    if batch_size is None:
        tr, tc = grid.tile_shape
        batch_size = max(1, min(grid.cols.count, _BATCH_PIXELS // (tr * tc)))
    batch_size = _positive_int("batch_size", batch_size)
    return threads, use_bf16, batch_size


# --------------------------------------------------------------------------- scene condition

def _model_range(model):
    rng = getattr(model, "looks_range", None)
    return tuple(rng) if rng is not None else None


def condition_for_model(model, info, corr, name="scene"):
    """``(looks, correlation, notes)`` to pass to ``model`` for a scene of ``info`` looks and ``corr`` correlation.

    Looks outside the model's trained range are clamped to it (a conditioned network
    does not extrapolate) and the note says so. The correlation is passed when it is
    reliable (:attr:`despeck.looks.SpeckleCorrelation.reliable`); otherwise a model that
    can run blind (``correlation_unknown``) is not told it.
    Models that are not looks-aware get the looks only (for the point-target test).
    """
    notes = []
    rng = _model_range(model)
    L = float(info.value)
    if rng is not None and not (rng[0] * 0.9 <= L <= rng[1] * 1.1):
        clamped = min(max(L, rng[0]), rng[1])
        what = "residual speckle" if L < rng[0] else "some oversmoothing"
        trained = f"{rng[0]:g}" if rng[0] == rng[1] else f"{rng[0]:g}-{rng[1]:g}"
        notes.append(f"{name}: {info.describe()}, outside the {trained} looks the model was trained "
                     f"for; applied it as for {clamped:g} looks, expect {what} (train or fine-tune for these looks)")
        L = clamped
    if not getattr(model, "conditioned", False):
        return L, None, notes
    if not corr.reliable:
        if getattr(model, "correlation_unknown", False):
            return L, None, notes  # the model runs without being told the correlation
        notes.append(f"{name}: the measured speckle correlation looks like texture ({corr.describe()}); "
                     "this model needs it, so it was used as measured")
    return L, corr.lag1, notes


# --------------------------------------------------------------------------- arrays

def despeckle_array(intensity, model, *, valid=None, tile=None, overlap=None, batch_size=None, threads=None,
                    bf16=False, log_offset=None, channels_last=None, progress=True, looks=None,
                    correlation=None, condition=None) -> np.ndarray:
    """Despeckle a 2-D linear intensity array with a model, tile by tile.

    Parameters
    ----------
    intensity : array_like, (H, W)
        Linear intensity (power).
    model : despeck.models.Despeckler
        Linear intensity in, linear intensity out; its ``receptive_field`` sets the
        discarded tile margins.
    valid : array_like of bool, (H, W), optional
        False for nodata pixels. Non-finite and non-positive pixels are always invalid.
    tile : int, optional
        Largest tile side (pixels); default derived from the receptive field
        (:func:`resolve_tiling`). Must be at least the receptive field.
    overlap : int, optional
        Pixels shared by neighbouring tiles, at least the receptive field minus one;
        the part beyond that is blended with raised-cosine weights.
    batch_size : int, optional
        Tiles per forward call; default about one megapixel per call.
    threads : int, optional
        Torch threads; default all cores available to this process.
    bf16 : bool
        Run the network under bfloat16 autocast (only on CPUs with native bf16; warns
        and uses float32 otherwise).
    log_offset : float, optional
        Scene normalisation constant; default ``model.scene_log_offset`` of a decimated
        sample (at most one million) of the valid pixels.
    channels_last : bool, optional
        Force the memory format; default: on scenes of 4 megapixels or more, time both
        on a 160 x 160 crop of the first tile and keep the faster, else contiguous.
    progress : bool
        Show a progress bar (MP/s, time left).
    looks : float, optional
        The scene's number of looks. Looks-aware models need it: default, estimated on
        homogeneous blocks of the array (:mod:`despeck.looks`); a warning says when it
        cannot be and what was assumed.
    correlation : (float, float), optional
        Lag-1 intensity correlation of the speckle down rows and along columns; default,
        measured like the looks (looks-aware models only).
    condition : (float, (float, float) or None), optional
        The ``(looks, correlation)`` the model is given, already resolved for a whole
        scene (:func:`condition_for_model`) of which ``intensity`` is a part; nothing is
        measured on the array (``looks`` and ``correlation`` are then ignored). A
        correlation of None runs a looks-aware model without it.

    Returns
    -------
    numpy.ndarray of float32, (H, W)
        The estimate; invalid pixels keep their input value.

    Raises
    ------
    InputError
        Not a 2-D array, mask of another shape, no valid pixel, bad tile options.
    """
    x = np.asarray(intensity)
    if x.ndim != 2 or x.size == 0 or not np.issubdtype(x.dtype, np.number) or np.iscomplexobj(x):
        raise InputError(
            f"intensity must be a non-empty 2-D real array (H, W), got shape {x.shape} of {x.dtype}; "
            "convert complex samples to intensity first"
        )
    x = x.astype(np.float32, copy=False)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(x) & (x > 0)
    if valid is not None:
        v = np.asarray(valid)
        if v.shape != x.shape:
            raise InputError(f"valid mask shape {v.shape} differs from intensity shape {x.shape}")
        ok &= v.astype(bool)
    if not ok.any():
        raise InputError("intensity has no valid (finite, positive, not masked) pixel to despeckle")
    grid = resolve_tiling(x.shape, model, tile=tile, overlap=overlap)
    threads, use_bf16, batch_size = _settings(model, threads, bf16, batch_size, grid)
    if log_offset is None:
        log_offset = _scene_offset(model, array_sample(x, ok))
    cond_looks = cond_corr = None
    if condition is not None:
        cond_looks, cond_corr = condition
    elif getattr(model, "conditioned", False) or looks is not None:
        from .looks import describe_array

        # only looks-aware networks use the correlation: others are not warned about it
        info, corr, notes = describe_array(x, ok, looks=looks, correlation=correlation,
                                           correlation_notes=getattr(model, "conditioned", False))
        cond_looks, cond_corr, more = condition_for_model(model, info, corr, "array")
        for note in notes + more:
            warnings.warn(note, InferenceWarning, stacklevel=2)
    result = np.empty_like(x)
    # Invalid pixels enter the tiles as 0 intensity: NaN-free, and the model's fill
    # replaces them before the network sees them.
    clean = np.where(ok, x, np.float32(0))

    def read_rows(r0, r1):
        return clean[r0:r1]

    def emit_rows(r0, r1, estimate, source):
        _check_finite(estimate, source, r0, "intensity array")
        result[r0:r1] = np.where(source > 0, estimate, x[r0:r1])

    bar = _make_bar(x.size, "despeckle", progress)
    runner = _TileRunner(model, log_offset=log_offset, bf16=use_bf16, channels_last=channels_last,
                         total_pixels=x.size, looks=cond_looks, correlation=cond_corr)
    was_training = model.training
    model.eval()
    try:
        with _torch_settings(threads):
            _stream(grid, read_rows, emit_rows, runner, batch_size, bar, chunk_rows=max(1, x.shape[0]))
    finally:
        runner.restore()
        model.train(was_training)
        if bar is not None:
            bar.close()
    return result


# --------------------------------------------------------------------------- files

def model_mismatch_notes(model, reader) -> list[str]:
    """Warnings (one line each) when ``model`` was made for other units or looks than the scene.

    The scene's looks are taken from a ``looks`` (or ``enl``) metadata tag when present;
    otherwise the notes say that the model's looks were assumed.
    """
    notes = []
    meta = getattr(model, "metadata", {}) or {}
    name = reader.path
    m_units = meta.get("units")
    if m_units and reader.units != m_units:
        notes.append(
            f"{name}: the model was trained on {m_units} data but the file holds {reader.units}; "
            f"the values were converted to linear intensity, which the model takes, so results should be comparable"
        )
    # Looks and speckle correlation: see despeck.looks and condition_for_model.
    return notes


def _gdal_threads(threads):
    """Let GDAL (de)compress blocks on ``threads`` worker threads, unless the user chose.

    DEFLATE compression of the output otherwise runs on the main thread while the
    network waits; with worker threads it overlaps the next tiles' computation.
    """
    import rasterio
    from rasterio.env import getenv, hasenv

    if os.environ.get("GDAL_NUM_THREADS") or (hasenv() and "GDAL_NUM_THREADS" in getenv()):
        return contextlib.nullcontext()
    return rasterio.Env(GDAL_NUM_THREADS=str(threads))


def _check_finite(estimate, source, r0, name, band=None):
    """Raise :class:`InputError` if the model gave NaN or infinity for a valid input pixel.

    Such a pixel would otherwise be written as nodata, and a broken model (damaged
    weights, absurd calibration) would turn a whole scene into nodata while the run
    reported success.
    """
    if np.isfinite(estimate).all():
        return
    bad = ~np.isfinite(estimate) & (source > 0)
    if not bad.any():
        return
    rows = np.flatnonzero(bad.any(axis=1))
    where = f"rows {r0 + rows[0]}-{r0 + rows[-1]}" + (f" of band {band}" if band is not None else "")
    raise InputError(
        f"{name}: the model gave non-finite values (NaN or infinity) for {int(bad.sum())} valid pixel(s) in {where}; "
        "the model file may be damaged or unsuited to these data"
    )


class _BlockWriter:
    """Writes finished rows in whole rows of the output's blocks, a few blocks wide at a time.

    When the tile grid's row stride equals the block height (the default), every
    emission is exactly one row of blocks and goes straight to the file; otherwise rows
    are staged until a row of blocks is complete, so GDAL never has to rewrite a
    compressed block. Writing a few blocks' width per call keeps the writer's own
    conversion temporaries small whatever the scene's width.
    """

    def __init__(self, writer, band, block_shape, name=None):
        self.writer = writer
        self.band = band
        self.name = writer.path if name is None else name  # named in errors
        self.block_rows, block_cols = block_shape
        self.width = writer.width
        self.height = writer.height
        self.cols_per_write = block_cols * max(1, 2048 // block_cols)
        self.values = None  # staging, allocated only if rows arrive unaligned
        self.start = 0  # first scene row not yet written
        self.held = 0

    def _write(self, r0, values, source=None):
        from rasterio.windows import Window

        n = values.shape[0]
        for c0 in range(0, self.width, self.cols_per_write):
            c1 = min(self.width, c0 + self.cols_per_write)
            valid = None if source is None else source[:, c0:c1] > 0
            self.writer.write(values[:, c0:c1], Window(c0, r0, c1 - c0, n), band=self.band, valid=valid)

    def __call__(self, r0, r1, estimate, source):
        _check_finite(estimate, source, r0, self.name, self.band if self.writer.band_count > 1 else None)
        n = r1 - r0
        aligned = self.held == 0 and r0 % self.block_rows == 0
        if aligned and (r1 % self.block_rows == 0 or r1 == self.height):
            self._write(r0, estimate, source)
            self.start = r1
            return
        if self.values is None or self.held + n > self.values.shape[0]:
            grown = np.empty((self.held + n + self.block_rows, self.width), dtype=np.float32)
            if self.held:
                grown[: self.held] = self.values[: self.held]
            self.values = grown
        # Staged rows carry invalid pixels as NaN, which the writer turns into nodata.
        np.copyto(self.values[self.held : self.held + n], np.where(source > 0, estimate, np.float32(np.nan)))
        self.held += n
        end = self.start + self.held
        ready = end if end == self.height else (end // self.block_rows) * self.block_rows
        if ready > self.start:
            k = ready - self.start
            self._write(self.start, self.values[:k])
            _shift_rows_up(self.values, k, self.held - k)
            self.start, self.held = ready, self.held - k


def despeckle_file(in_path, out_path, model, *, units=None, out_units=None, overwrite=False, tile=None,
                   overlap=None, batch_size=None, threads=None, bf16=False, channels_last=None,
                   progress=True, looks=None, cog=False) -> pathlib.Path:
    """Despeckle a raster file band by band and write a GeoTIFF.

    The output keeps the input's size, CRS, transform, nodata, band descriptions and
    tags and is written to a temporary file in the destination folder, renamed only
    when complete: an interrupted run leaves nothing at ``out_path``. It also records
    what made it (:mod:`despeck.provenance`): the despeck version, the model file's
    name and SHA-256, the tiling used and the date.

    Parameters
    ----------
    in_path, out_path : str or path-like
        Input raster (anything GDAL reads) and output GeoTIFF; never the same file.
    model : despeck.models.Despeckler
    units : {'intensity', 'amplitude', 'db', 'complex'}, optional
        Units of the input; detected when unambiguous (see :func:`despeck.raster.open_scene`).
    out_units : {'intensity', 'amplitude', 'db'}, optional
        Units of the output; default the input's (intensity for complex input).
    overwrite : bool
        Replace an existing output (an input is never overwritten).
    tile : int, optional
        Tiles hold at most ``tile * tile`` pixels. When ``tile`` allows, a row of tiles
        advances by exactly one row of the output's blocks (512 rows), so each row of
        tiles completes whole blocks and the buffers stay short and wide; the tiles are
        then wider than tall.
    overlap, batch_size, threads, bf16, channels_last, progress
        As for :func:`despeckle_array`.
    looks : float, optional
        The input's number of looks; default from the file's ``looks`` tag, else
        estimated (:func:`despeck.looks.describe_speckle`). The speckle correlation is
        taken from the file's tags or measured. Both are recorded in the output's tags
        (``input_looks``, ``input_speckle_correlation_rows``/``_cols`` and their sources).
    cog : bool
        Write a Cloud-Optimised GeoTIFF with overviews (:func:`despeck.raster.open_output`).

    Returns
    -------
    pathlib.Path
        The output path.

    Raises
    ------
    RasterError, InputError
        Unreadable input, output equal to the input, output exists (without
        ``overwrite``), destination not writable, bad options. Nothing is left at
        ``out_path``.

    Warns
    -----
    InferenceWarning
        The model was trained for other units or looks than the file's.
    """
    from rasterio.windows import Window

    from .looks import describe_speckle, speckle_tags
    from .provenance import model_provenance, provenance_tags, tiling_text
    from .raster import check_output_path, open_output, open_scene

    _check_model(model)
    check_output_path(out_path, [in_path], overwrite=overwrite)
    # despeck.raster caps GDAL's block cache, so written blocks do not pile up in memory.
    with _gdal_threads(_positive_int("threads", threads) or usable_cores()), \
            open_scene(in_path, units=units) as reader:
        for note in model_mismatch_notes(model, reader):
            warnings.warn(note, InferenceWarning, stacklevel=2)
        shape = (reader.height, reader.width)
        resolve_tiling(shape, model, tile=tile, overlap=overlap)  # bad options fail before any file exists
        bar = _make_bar(reader.width * reader.height * reader.band_count, pathlib.Path(in_path).name, progress)
        was_training = model.training
        model.eval()
        try:
            with open_output(out_path, reader, units=out_units, overwrite=overwrite, cog=cog) as writer:
                block = writer.block_windows()[0]
                block_shape = (int(block.height), int(block.width))
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", InferenceWarning)  # already shown above
                    grid = resolve_tiling(shape, model, tile=tile, overlap=overlap, row_stride=block_shape[0])
                method, model_sha = model_provenance(model)
                writer.update_tags(**provenance_tags(method, model_sha256=model_sha, tiling=tiling_text(grid)))
                threads, use_bf16, batch_size = _settings(model, threads, bf16, batch_size, grid)
                # Read in chunks of about 64 rows: GDAL's cache keeps the rest of a taller
                # block row, and the input buffer stays one tile plus one chunk high.
                in_rows = max(1, reader.block_shape[0])
                chunk = 64 if in_rows >= 64 else in_rows * -(-64 // in_rows)
                with _torch_settings(threads):
                    for band in range(1, reader.band_count + 1):
                        offset = _scene_offset(model, reader.sample_intensity(_SAMPLE_PIXELS, band=band))
                        # only looks-aware networks use the correlation; it is still recorded
                        info, corr, notes = describe_speckle(reader, band, looks=looks,
                                                             correlation_notes=getattr(model, "conditioned", False))
                        cond_looks, cond_corr, more = condition_for_model(model, info, corr, reader.path)
                        for note in notes + more:
                            warnings.warn(note, InferenceWarning, stacklevel=2)
                        if band == 1 or reader.band_count == 1:
                            writer.update_tags(**speckle_tags(info, corr, prefix="input_"))
                        runner = _TileRunner(model, log_offset=offset, bf16=use_bf16, channels_last=channels_last,
                                             total_pixels=reader.width * reader.height, looks=cond_looks,
                                             correlation=cond_corr)

                        def read_rows(r0, r1, band=band):
                            intensity, valid = reader.read(Window(0, r0, reader.width, r1 - r0), band=band)
                            intensity[~valid] = 0.0  # the stream marks invalid pixels by 0 intensity
                            return intensity

                        try:
                            _stream(grid, read_rows, _BlockWriter(writer, band, block_shape, reader.path), runner,
                                    batch_size, bar, chunk_rows=chunk)
                        finally:
                            runner.restore()
                        channels_last = runner.channels_last
        finally:
            model.train(was_training)
            if bar is not None:
                bar.close()
    return pathlib.Path(out_path)
