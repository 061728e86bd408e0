"""Reading SAR rasters as float32 linear intensity plus a validity mask, window by window.

Files are read through rasterio, so anything GDAL opens can be read, window by
window along the file's own blocks for scenes larger than memory; multi-band files
(e.g. two polarisations) are read band by band. Invalid pixels are nodata, masked,
non-finite and non-positive intensities; their intensity is set to 0.0 so arrays stay
NaN-free. :meth:`SceneReader.read_complex` gives the complex samples themselves
(phase kept) of a complex scene.
"""

from __future__ import annotations

import math
import pathlib
import warnings

import numpy as np
import rasterio
from rasterio.enums import MaskFlags
from rasterio.errors import RasterioError, RasterioIOError
from rasterio.windows import Window

from ..errors import InputError, RasterError
from ..validity import valid_mask
from .detection import EVIDENCE_WINDOW, EVIDENCE_WINDOWS, detect_units, is_complex_dtype
from .gdal_env import error_detail, limit_gdal_cache
from .units import UnitsWarning, to_intensity
from .windows import as_window

__all__ = ["SceneReader", "open_scene"]

# Pixels read when a scene is opened, to detect units and check it is not empty.
_PROBE_PIXELS = 1 << 18


def _nodata_mask(raw, nodata):
    """True where ``raw`` equals the nodata value (NaN nodata compares as NaN)."""
    if nodata is None:
        return np.zeros(raw.shape, dtype=bool)
    if isinstance(nodata, float) and math.isnan(nodata):
        return np.isnan(raw.real if np.iscomplexobj(raw) else raw)
    if np.iscomplexobj(raw):
        return (raw.real == nodata) & (raw.imag == nodata)
    if raw.dtype.kind == "f":
        # the file stores nodata in its own precision; compare in that precision
        return raw == raw.dtype.type(nodata)
    return raw == nodata


class SceneReader:
    """An open SAR raster, read as float32 linear intensity plus a validity mask.

    Use :func:`open_scene` to create one; it is a context manager and must be
    closed. ``band`` arguments count SAR bands from 1: a two-band in-phase /
    quadrature file has one SAR band.

    Attributes
    ----------
    path : pathlib.Path
    width, height : int
    band_count : int
        SAR bands (a two-band I/Q file counts as 1).
    units : str
        Units the file holds (see :class:`UnitsDecision`); :attr:`units_decision` says why.
    dtype : str
        The file's data type (rasterio name).
    crs, transform, nodata
        Georeferencing and the nodata value of the first band (None if unset).
    block_shape : tuple of int
        ``(rows, cols)`` of the file's blocks.
    descriptions : tuple of str or None
        Descriptions of the SAR bands.
    tags : dict
        Dataset-level metadata tags.
    """

    def __init__(self, path, units=None):
        self.path = pathlib.Path(path).expanduser()
        name = str(self.path)
        if not self.path.exists():
            raise RasterError(f"{name}: no such file")
        if self.path.is_dir():
            raise RasterError(f"{name}: is a directory, not a raster file")
        limit_gdal_cache()
        try:
            self._ds = rasterio.open(self.path)
        except RasterioIOError as exc:
            first = str(exc).splitlines()[0] if str(exc) else "unrecognised format"
            raise RasterError(f"{name}: not a raster GDAL can read ({first})") from None
        except (RasterioError, OSError) as exc:
            raise RasterError(f"{name}: cannot open: {exc}") from None
        try:
            self._setup(units)
        except BaseException:
            self._ds.close()
            raise

    def _setup(self, units):
        ds, name = self._ds, str(self.path)
        if ds.width == 0 or ds.height == 0 or ds.count == 0:
            raise RasterError(f"{name}: the raster is empty ({ds.width}x{ds.height}, {ds.count} bands)")
        self.width, self.height = int(ds.width), int(ds.height)
        self.dtype = ds.dtypes[0]
        self.nodata = ds.nodata
        self.crs = ds.crs
        self.transform = ds.transform
        self.block_shape = tuple(int(v) for v in ds.block_shapes[0])
        self.tags = dict(ds.tags())
        self._file_descriptions = tuple(ds.descriptions)
        self._masked_bands = {
            b for b in range(1, ds.count + 1)
            if not ({MaskFlags.all_valid, MaskFlags.nodata} & set(ds.mask_flag_enums[b - 1]))
        }
        sample_raw, has_valid = self._probe(declared=units)
        self.units_decision = detect_units(
            sample_raw, dtype=self.dtype, band_count=ds.count, descriptions=ds.descriptions,
            band_units=ds.units, declared=units, name=name, tags={**ds.tags(1), **self.tags},
            image=self._evidence_images,
        )
        self.units = self.units_decision.units
        self._iq = self.units == "complex" and not is_complex_dtype(self.dtype)
        self.band_count = 1 if self._iq else int(ds.count)
        if not has_valid and not self._any_valid():
            raise RasterError(f"{name}: every pixel is nodata or invalid; nothing to process")
        for note in self.units_decision.warnings:
            warnings.warn(f"{name}: {note}", UnitsWarning, stacklevel=3)

    # ----------------------------------------------------------- metadata
    @property
    def profile(self) -> dict:
        """A copy of the file's rasterio profile."""
        return dict(self._ds.profile)

    @property
    def descriptions(self) -> tuple:
        if self._iq:
            return (None,)
        return self._file_descriptions

    @property
    def closed(self) -> bool:
        return self._ds.closed

    def close(self):
        self._ds.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        return (f"SceneReader({str(self.path)!r}, {self.width}x{self.height}, bands={self.band_count}, "
                f"units={self.units!r})")

    # ----------------------------------------------------------- raw access
    def check_band(self, band) -> int:
        """``band`` as the number of a SAR band of this scene (from 1), or :class:`InputError`."""
        try:
            b = int(band)
        except (TypeError, ValueError):
            b = 0
        if b < 1 or b > self.band_count:
            raise InputError(f"{self.path}: band {band!r} does not exist (the scene has {self.band_count} SAR band(s))")
        return b

    def _raw(self, window: Window, band: int, out_shape=None):
        """Raw samples and the nodata/mask-band invalidity for one SAR band."""
        ds = self._ds
        bands = [1, 2] if self._iq else [band]
        kwargs = {"window": window}
        if out_shape is not None:
            kwargs["out_shape"] = (len(bands),) + tuple(out_shape)
        try:
            raw = ds.read(bands, **kwargs)
        except (RasterioError, OSError) as exc:
            raise self._read_error(exc, window) from None
        bad = np.zeros(raw.shape[1:], dtype=bool)
        nodata_all = np.ones(raw.shape[1:], dtype=bool)
        for k, b in enumerate(bands):
            nd = ds.nodatavals[b - 1]
            if nd is not None:
                nodata_all &= _nodata_mask(raw[k], nd)
            else:
                nodata_all[:] = False
            if b in self._masked_bands:
                try:
                    m = ds.read_masks(b, **({"window": window} | ({"out_shape": tuple(out_shape)} if out_shape else {})))
                except (RasterioError, OSError) as exc:
                    raise self._read_error(exc, window) from None
                bad |= m == 0
        bad |= nodata_all
        data = raw if self._iq else raw[0]
        return data, bad

    def _read_error(self, exc, window) -> RasterError:
        """One line for a failed read: the file, where, and GDAL's own reason."""
        w = window
        where = (f"rows {int(w.row_off)}-{int(w.row_off + w.height) - 1}, "
                 f"columns {int(w.col_off)}-{int(w.col_off + w.width) - 1}")
        return RasterError(f"{self.path}: cannot read the data at {where} (the file may be cut off or damaged): "
                           f"{error_detail(exc)}")

    def _probe(self, declared):
        """Read up to ``_PROBE_PIXELS`` from blocks spread over band 1 (all of a small file)."""
        ds = self._ds
        bands = [1, 2] if ds.count == 2 and not is_complex_dtype(self.dtype) else [1]
        windows = [w for _, w in ds.block_windows(1)]
        per_block = max(1, self.block_shape[0] * self.block_shape[1])
        n_take = max(1, min(len(windows), _PROBE_PIXELS // per_block))
        picks = np.unique(np.linspace(0, len(windows) - 1, n_take).round().astype(int))
        values, has_valid = [], False
        for i in picks:
            w = windows[i]
            try:
                raw = ds.read(bands, window=w)
                masks = {b: ds.read_masks(b, window=w) for b in bands if b in self._masked_bands}
            except (RasterioError, OSError) as exc:
                raise self._read_error(exc, w) from None
            bad = np.zeros(raw.shape[1:], dtype=bool)
            for k, b in enumerate(bands):
                nd = ds.nodatavals[b - 1]
                if nd is not None:
                    bad |= _nodata_mask(raw[k], nd)
                if b in masks:
                    bad |= masks[b] == 0
            if np.iscomplexobj(raw):
                good = ~bad & np.isfinite(raw[0].real) & np.isfinite(raw[0].imag)
                has_valid |= bool(np.any(good & (np.abs(raw[0]) > 0)))
                continue
            good = ~bad & np.all(np.isfinite(raw), axis=0)
            values.append(raw[:, good].astype(np.float64))
            has_valid |= bool(np.any(good & (raw[0] != 0)))
        sample = np.concatenate(values, axis=1) if values else None
        return sample, has_valid

    def _evidence_images(self) -> list:
        """Full-resolution windows of band 1's raw values for :func:`units_evidence`.

        Up to four windows of 256 x 256 pixels, at a third and two thirds of the scene's
        height and width; nodata, masked and non-finite samples are NaN.
        """
        ds = self._ds
        side_r, side_c = min(EVIDENCE_WINDOW, self.height), min(EVIDENCE_WINDOW, self.width)
        rows = sorted({int(v) for v in np.linspace(0, self.height - side_r, 4)[1:3].round()})
        cols = sorted({int(v) for v in np.linspace(0, self.width - side_c, 4)[1:3].round()})
        images = []
        for r in rows:
            for c in cols:
                w = Window(c, r, side_c, side_r)
                try:
                    raw = ds.read(1, window=w)
                    bad = _nodata_mask(raw, ds.nodatavals[0])
                    if 1 in self._masked_bands:
                        bad |= ds.read_masks(1, window=w) == 0
                except (RasterioError, OSError) as exc:
                    raise self._read_error(exc, w) from None
                values = raw.astype(np.float64)
                values[bad | ~np.isfinite(values)] = np.nan
                images.append(values)
        return images[:EVIDENCE_WINDOWS]

    def _any_valid(self) -> bool:
        for b in range(1, self.band_count + 1):
            for w in self.block_windows(b):
                _, valid = self.read(w, band=b)
                if valid.any():
                    return True
        return False

    # ----------------------------------------------------------- reading
    def read(self, window=None, band=1):
        """Read one SAR band as float32 intensity and a bool validity mask, shape ``(h, w)``.

        Parameters
        ----------
        window : rasterio.windows.Window, optional
            Part of the scene to read (whole scene if None).
        band : int
            SAR band, from 1.

        Raises
        ------
        InputError
            If a linear band holds negative values.
        """
        b = self.check_band(band)
        w = as_window(window, self.width, self.height, self.path)
        raw, bad = self._raw(w, b)
        return self._convert(raw, bad, w)

    def read_complex(self, window=None, band=1):
        """Read one SAR band of a complex scene as complex64 samples and a bool validity mask.

        The phase is kept (:meth:`read` gives the intensity ``|z|^2``); a two-band
        in-phase / quadrature file gives ``i + 1j q``. Invalid samples (nodata, masked,
        non-finite or zero) are 0 and False in the mask. ``window`` and ``band`` are
        those of :meth:`read`.

        Raises
        ------
        InputError
            If the scene holds real samples (its units are not ``'complex'``).
        """
        if self.units != "complex":
            raise InputError(f"{self.path}: holds real samples ({self.units}), not complex ones")
        b = self.check_band(band)
        w = as_window(window, self.width, self.height, self.path)
        raw, bad = self._raw(w, b)
        z = raw.astype(np.complex64) if np.iscomplexobj(raw) else (raw[0] + 1j * raw[1]).astype(np.complex64)
        valid = ~bad & valid_mask(np.abs(z))
        return np.where(valid, z, np.complex64(0)), valid

    def _convert(self, raw, bad, where):
        if self.units in ("intensity", "amplitude"):
            negative = (raw < 0) & ~bad
            if negative.any():
                raise InputError(
                    f"{self.path}: negative values in {where} cannot be linear {self.units}; "
                    "if the file is in decibels declare units 'db'"
                )
        intensity, valid = to_intensity(raw, self.units)
        if bad.any():
            valid &= ~bad
            intensity[bad] = 0.0
        return intensity, valid

    def block_windows(self, band=1) -> list:
        """Windows of the file's own blocks for ``band`` (reading them never splits a block)."""
        b = self.check_band(band)
        file_band = 1 if self._iq else b
        return [w for _, w in self._ds.block_windows(file_band)]

    def row_windows(self, min_rows=256) -> list:
        """Full-width strips of at least ``min_rows`` rows, aligned to block rows (the last may be shorter)."""
        try:
            min_rows = int(min_rows)
        except (TypeError, ValueError):
            min_rows = 0
        if min_rows < 1:
            raise InputError(f"min_rows must be a positive integer, got {min_rows!r}")
        bh = max(1, self.block_shape[0])
        rows = -(-min_rows // bh) * bh
        return [Window(0, r, self.width, min(rows, self.height - r)) for r in range(0, self.height, rows)]

    def sample_step(self, max_pixels=1_000_000) -> int:
        """Decimation step (keep every ``step``-th row and column) of :meth:`sample_image`."""
        max_pixels = int(max_pixels)
        if max_pixels < 1:
            raise InputError(f"max_pixels must be positive, got {max_pixels}")
        return max(1, math.ceil(math.sqrt(self.width * self.height / max_pixels)))

    def sample_image(self, max_pixels=1_000_000, band=1):
        """A decimated view of a band: ``(intensity, valid)`` of at most ``max_pixels`` pixels.

        Reads every k-th row and column (nearest-neighbour decimation by GDAL), so
        memory stays bounded whatever the scene's size; decimation also breaks the
        spatial correlation of speckle between neighbouring kept pixels.
        """
        b = self.check_band(band)
        step = self.sample_step(max_pixels)
        out_shape = (max(1, self.height // step), max(1, self.width // step))
        w = Window(0, 0, self.width, self.height)
        raw, bad = self._raw(w, b, out_shape=None if step == 1 else out_shape)
        return self._convert(raw, bad, "the decimated sample")

    def sample_intensity(self, max_pixels=1_000_000, band=1) -> np.ndarray:
        """Valid intensities of a decimated read (1-D float64), for scene-level statistics."""
        intensity, valid = self.sample_image(max_pixels, band)
        return intensity[valid].astype(np.float64)


def open_scene(path, units=None) -> SceneReader:
    """Open a SAR raster for reading as intensity; see :class:`SceneReader`.

    Parameters
    ----------
    path : str or path-like
    units : {'intensity', 'amplitude', 'db', 'complex'}, optional
        Units of the file's values; detected when unambiguous (see :func:`detect_units`),
        otherwise linear intensity is assumed.

    Raises
    ------
    RasterError
        Missing file, not a raster, empty raster, every pixel nodata.
    InputError
        Negative values declared linear, complex declared on real data, unknown units.
    """
    return SceneReader(path, units=units)
