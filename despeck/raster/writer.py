"""Writing rasters: a GeoTIFF written beside its destination, read back, then renamed.

Outputs follow one named profile (:data:`OUTPUT_PROFILE`: tiled, DEFLATE-compressed
float GeoTIFF) or, on request, GDAL's Cloud-Optimised GeoTIFF layout
(:data:`COG_OPTIONS`). They are written into a temporary file beside the destination
and renamed only when complete and verified, carrying the source's CRS, transform,
nodata, band descriptions and tags (not its speckle tags nor its provenance).
Invalid pixels are written as the output's nodata value.
"""

from __future__ import annotations

import math
import os
import warnings

import numpy as np
import rasterio
from rasterio.errors import RasterioError
from rasterio.windows import Window

from ..atomic import OutputBusyError, claim_output, publish, sibling_temp
from ..errors import InputError, RasterError
from ..provenance import without_provenance
from ..validity import valid_mask
from .gdal_env import decode_threads, limit_gdal_cache, quiet_native_error_printers
from .paths import check_output_path, write_error
from .units import UNIT_LABELS, check_units, from_intensity
from .windows import as_window

__all__ = ["OUTPUT_TILE", "OUTPUT_PROFILE", "COG_OPTIONS", "SPECKLE_TAGS", "SceneWriter", "open_output"]

#: Tile size of written GeoTIFFs (pixels); a multiple of 16 as GDAL requires.
OUTPUT_TILE = 512

#: The profile of every tiled output (rasterio creation options; size, band count, data
#: type, nodata and georeferencing are the source's): 512 x 512 tiles, DEFLATE with the
#: floating-point predictor, one band after another, BigTIFF when it could exceed 4 GB.
OUTPUT_PROFILE = dict(
    driver="GTiff", tiled=True, blockxsize=OUTPUT_TILE, blockysize=OUTPUT_TILE, compress="deflate", predictor=3,
    interleave="band", bigtiff="IF_SAFER",
)

#: Creation options of a Cloud-Optimised GeoTIFF (GDAL's COG driver), made from the
#: finished tiled output: the same tiles and compression, overviews averaged over valid pixels.
COG_OPTIONS = dict(
    COMPRESS="DEFLATE", PREDICTOR="FLOATING_POINT", OVERVIEW_COMPRESS="DEFLATE",
    OVERVIEW_PREDICTOR="FLOATING_POINT", BLOCKSIZE=str(OUTPUT_TILE), BIGTIFF="IF_SAFER",
    OVERVIEWS="IGNORE_EXISTING", OVERVIEW_RESAMPLING="AVERAGE",
)

#: them from the input (despeck.looks writes the ones that hold for the output).
SPECKLE_TAGS = frozenset({
    "looks", "looks_source", "enl", "number_of_looks", "speckle",
    "speckle_correlation_rows", "speckle_correlation_cols", "speckle_correlation_source",
})


def _nodata_is_safe(nodata, units) -> bool:
    """Whether ``nodata`` can never be confused with a valid value in ``units``."""
    if nodata is None:
        return False
    nodata = float(nodata)
    if math.isnan(nodata):
        return True
    if units in ("intensity", "amplitude"):
        return nodata <= 0
    # float32 intensities lie within about 1e-45 .. 3.4e38, i.e. -454 .. +386 dB
    return nodata < -460 or nodata > 390


class SceneWriter:
    """A GeoTIFF being written, in ``units``, georeferenced like a source scene.

    Use :func:`open_output`. Data go to a temporary file in the destination folder,
    renamed to the destination when the context manager exits cleanly and deleted
    if it exits with an exception, so a crash never leaves a half-written output.
    Before the rename the file is read back block by block (:meth:`close`). While it
    is being written the output is claimed (:func:`despeck.atomic.claim_output`): a
    second writer of the same path, in this or another process, gets
    :class:`OutputBusyError`.

    Attributes
    ----------
    path : pathlib.Path
        Final destination.
    units : str
    nodata : float
        Value written for invalid pixels.
    width, height, band_count : int
    """

    def __init__(self, path, like, *, units=None, band_count=None, overwrite=False, dtype="float32", cog=False):
        limit_gdal_cache()
        quiet_native_error_printers()  # write errors surface as one despeck line, not raw C output
        self.cog = bool(cog)
        like_path = getattr(like, "path", None)
        self.path = check_output_path(path, [like_path] if like_path else [], overwrite=overwrite)
        if units is None:
            like_units = getattr(like, "units", "intensity")
            units = "intensity" if like_units == "complex" else like_units
        self.units = check_units(units, name="output units", output=True)
        dtype = str(np.dtype(dtype))
        if dtype not in ("float32", "float64"):
            raise InputError(f"output dtype must be float32 or float64, got {dtype!r}")
        self.dtype = dtype
        like_bands = int(getattr(like, "band_count", 1) or 1)
        self.band_count = like_bands if band_count is None else int(band_count)
        if self.band_count < 1:
            raise InputError(f"output band_count must be at least 1, got {band_count!r}")
        profile = dict(getattr(like, "profile", {}) or {})
        self.width = int(getattr(like, "width", profile.get("width", 0)))
        self.height = int(getattr(like, "height", profile.get("height", 0)))
        if self.width <= 0 or self.height <= 0:
            raise InputError(f"{self.path}: the source scene has no size to copy")
        nodata = getattr(like, "nodata", profile.get("nodata"))
        self.nodata = float(nodata) if _nodata_is_safe(nodata, self.units) else float("nan")
        # A fresh GeoTIFF profile: the source's driver-specific creation options do not apply.
        profile = dict(OUTPUT_PROFILE, width=self.width, height=self.height, count=self.band_count, dtype=dtype,
                       nodata=self.nodata)
        crs = getattr(like, "crs", None)
        transform = getattr(like, "transform", None)
        if crs is not None:
            profile["crs"] = crs
        if transform is not None:
            profile["transform"] = transform
        self._profile = profile
        self._tmp = None
        self._ds = None
        # Claim the output so a second process cannot write it at the same time.
        try:
            self._claim = claim_output(self.path)
        except OutputBusyError:
            raise
        except OSError as exc:
            raise write_error(self.path, exc) from None
        try:
            if self.path.exists() and not overwrite:
                raise InputError(f"{self.path}: output already exists (written by another process meanwhile)")
            try:
                self._tmp = sibling_temp(self.path)
            except OSError as exc:
                raise write_error(self.path, exc) from None
            with warnings.catch_warnings():
                # an ungeoreferenced source gives an ungeoreferenced output; that is not news
                warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
                self._ds = rasterio.open(self._tmp, "w", **profile)
            descriptions = tuple(getattr(like, "descriptions", ()) or ())
            for b in range(1, self.band_count + 1):
                if b <= len(descriptions) and descriptions[b - 1]:
                    self._ds.set_band_description(b, descriptions[b - 1])
                self._ds.set_band_unit(b, UNIT_LABELS[self.units])
            # Tags that describe the speckle of the source pixels no longer hold for new
            # pixels (a filtered scene is not L-look speckle), nor does the source's record
            # of what made it (despeck.provenance); writers record their own.
            tags = {k: v for k, v in without_provenance(getattr(like, "tags", {})).items()
                    if str(k).strip().lower() not in SPECKLE_TAGS}
            if tags:
                self._ds.update_tags(**tags)
        except BaseException as exc:
            error = None
            if isinstance(exc, (RasterioError, OSError)) and not isinstance(exc, RasterError):
                error = write_error(self.path, exc, partial=self._tmp, what="cannot create the output")
            if self._ds is not None:
                try:
                    self._ds.close()
                except (RasterioError, OSError):
                    pass
            if self._tmp is not None:
                self._tmp.unlink(missing_ok=True)
            self._claim.release()
            if error is not None:
                raise error from None
            raise
        self._done = False

    def set_description(self, band, text):
        """Set one band's description (e.g. the filter that made it)."""
        self._ds.set_band_description(int(band), str(text))

    def update_tags(self, **tags):
        """Add dataset-level metadata tags."""
        self._ds.update_tags(**{k: str(v) for k, v in tags.items()})

    def write(self, intensity, window=None, band=1, valid=None):
        """Write linear intensity into ``window`` of ``band``, converted to the output units.

        Pixels that are invalid (``valid`` False, non-finite or non-positive
        intensity) are written as the output's nodata value.
        """
        if self._done:
            raise RasterError(f"{self.path}: writer is closed")
        b = int(band)
        if b < 1 or b > self.band_count:
            raise InputError(f"{self.path}: band {band!r} does not exist (output has {self.band_count} band(s))")
        w = as_window(window, self.width, self.height, self.path)
        x = np.asarray(intensity, dtype=np.float32)
        if x.shape != (int(w.height), int(w.width)):
            raise InputError(f"{self.path}: data of shape {x.shape} do not fit window {w}")
        ok = valid_mask(x, valid, what=str(self.path))
        out = from_intensity(x, self.units)
        ok &= np.isfinite(out)
        out = np.where(ok, out, np.float32(self.nodata)).astype(self.dtype, copy=False)
        try:
            self._ds.write(out, b, window=w)
        except (RasterioError, OSError) as exc:
            raise write_error(self.path, exc, partial=self._tmp) from None

    def block_windows(self) -> list:
        """Windows of the output's tiles (write in these for the least work)."""
        return [w for _, w in self._ds.block_windows(1)]

    def close(self, *, commit=True):
        """Finish the file: verify it and rename it into place (``commit``), or delete it.

        Before the rename the finished file is flushed to disk and opened again, and
        every block of every band must be present inside the file and decode (see
        :meth:`_verify`): GDAL compresses blocks on worker threads whose write errors
        (a full disk, a file size limit) it does not report to the caller. A file that
        fails is deleted and :class:`RasterError` (:class:`OutputFolderError` when the
        folder is the cause) is raised; the destination is left untouched.
        """
        if self._done:
            return
        self._done = True
        published = False
        try:
            try:
                self._ds.close()
            except (RasterioError, OSError) as exc:
                if commit:
                    raise write_error(self.path, exc, partial=self._tmp) from None
            if commit:
                try:
                    self._verify()
                    if self.cog:
                        self._publish_cog()
                    else:
                        publish(self._tmp, self.path)
                except (RasterioError, OSError) as exc:
                    if isinstance(exc, RasterError):
                        raise
                    raise write_error(self.path, exc, partial=self._tmp) from None
                published = True
        finally:
            if not published or self.cog:
                self._tmp.unlink(missing_ok=True)
            self._claim.release()

    def _publish_cog(self):
        """Translate the verified tiled file into a Cloud-Optimised GeoTIFF, verify it, rename it.

        GDAL's COG driver (``rasterio.shutil.copy(..., driver="COG")``) builds the
        overviews itself (``OVERVIEWS=IGNORE_EXISTING``: halving until the image fits in
        one 512-pixel tile) by averaging the valid pixels (``OVERVIEW_RESAMPLING=AVERAGE``,
        nodata excluded; in linear units this is a multilook) and lays the file out with
        every directory before the pixel data. The copy is made into a second temporary
        file beside the destination; it must report ``LAYOUT=COG`` and pass the same
        block-by-block check as the tiled file before it is renamed into place.
        """
        import rasterio.shutil

        cog_tmp = None
        try:
            cog_tmp = sibling_temp(self.path)
            with decode_threads():
                rasterio.shutil.copy(str(self._tmp), str(cog_tmp), driver="COG", **COG_OPTIONS)
            with rasterio.open(cog_tmp) as ds:
                layout = (ds.tags(ns="IMAGE_STRUCTURE") or {}).get("LAYOUT", "")
            if layout.upper() != "COG":
                raise write_error(self.path, partial=cog_tmp,
                                   what=f"GDAL's COG driver wrote a file without the COG layout ({layout or 'none'})")
            self._verify(cog_tmp)
            publish(cog_tmp, self.path)
            cog_tmp = None
        except (RasterioError, OSError) as exc:
            if isinstance(exc, RasterError):
                raise
            raise write_error(self.path, exc, partial=cog_tmp, what="cannot write the Cloud-Optimised GeoTIFF") from None
        finally:
            if cog_tmp is not None:
                cog_tmp.unlink(missing_ok=True)

    def _verify(self, tmp=None):
        """Check a closed temporary file: size, data type, every block present and decodable.

        Each block's byte range (from the TIFF tile offsets and sizes) must lie inside
        the file, and every block row is read and decoded by GDAL (in full-width strips,
        so memory stays at one row of blocks). ``tmp`` defaults to the tiled temporary file.
        """
        tmp = self._tmp if tmp is None else tmp
        size = os.path.getsize(tmp)
        with decode_threads(), rasterio.open(tmp) as ds:
            if (ds.width, ds.height, ds.count) != (self.width, self.height, self.band_count) or \
                    ds.dtypes[0] != self.dtype:
                raise write_error(self.path, partial=tmp, what="the written file has the wrong size or type")
            bh, bw = (int(v) for v in ds.block_shapes[0])
            buf = np.empty((bh, self.width), dtype=self.dtype)
            for b in range(1, self.band_count + 1):
                for i in range(-(-self.height // bh)):
                    for j in range(-(-self.width // bw)):
                        offset = ds.get_tag_item(f"BLOCK_OFFSET_{j}_{i}", "TIFF", bidx=b)
                        nbytes = ds.get_tag_item(f"BLOCK_SIZE_{j}_{i}", "TIFF", bidx=b)
                        if not offset or not nbytes or int(offset) + int(nbytes) > size:
                            raise write_error(
                                self.path, partial=tmp,
                                what=f"the written file is incomplete (block {i},{j} of band {b} is missing or cut off)",
                            )
                    r0 = i * bh
                    n = min(bh, self.height - r0)
                    try:
                        ds.read(b, window=Window(0, r0, self.width, n), out=buf[:n])
                    except (RasterioError, OSError) as exc:
                        raise write_error(
                            self.path, exc, partial=tmp,
                            what=f"the written file does not read back (rows {r0}-{r0 + n - 1} of band {b})",
                        ) from None

    def abort(self):
        """Delete the temporary file; the destination is left untouched."""
        self.close(commit=False)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        self.close(commit=exc_type is None)
        return False

    def __del__(self):  # a writer dropped without closing must not leave its temporary file or claim
        try:
            if not self._done:
                self.abort()
        except Exception:  # noqa: BLE001 - never raise from a finaliser
            pass


def open_output(path, like, *, units=None, band_count=None, overwrite=False, dtype="float32",
                cog=False) -> SceneWriter:
    """Create an output GeoTIFF georeferenced like ``like``; see :class:`SceneWriter`.

    Parameters
    ----------
    path : str or path-like
        Destination; a missing directory is created. Never one of the inputs.
    like : SceneReader or Scene
        Source of CRS, transform, nodata, band descriptions and tags.
    units : {'intensity', 'amplitude', 'db'}, optional
        Output units; default the source's (intensity for a complex source).
    band_count : int, optional
        Default the source's number of SAR bands.
    overwrite : bool
        Replace an existing output (never an input).
    dtype : {'float32', 'float64'}
    cog : bool
        Publish a Cloud-Optimised GeoTIFF with overviews, made from the finished tiled
        file by GDAL's COG driver (see :meth:`SceneWriter._publish_cog`).

    Notes
    -----
    Tiles of 512 x 512, DEFLATE with the floating-point predictor (PREDICTOR=3),
    BigTIFF when the file could exceed 4 GB. The source's nodata value is kept if no
    valid output value can equal it (e.g. 0 for linear units), else NaN is used.
    """
    return SceneWriter(path, like, units=units, band_count=band_count, overwrite=overwrite, dtype=dtype, cog=cog)
