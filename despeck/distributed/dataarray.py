"""One huge scene held in an ``xarray.DataArray``, despeckled chunk by chunk with Dask, and written.

**One huge scene** (:func:`despeckle_dataarray`): an ``xarray.DataArray`` (e.g. from
``rioxarray.open_rasterio(path, chunks=...)``) is despeckled lazily, chunk by chunk,
with :func:`dask.array.map_overlap`. Each chunk is extended by a halo of the tiler's
overlap for the model (its receptive field minus one plus the blend zone, on the
network's pooling grid), run through :func:`despeck.inference.despeckle_array` and
trimmed, so every output pixel sees the same neighbourhood as in the streamed path. The
scene-level inputs of the model are computed once for the whole scene before any chunk
runs, from the same samples :mod:`despeck.inference` takes: for a DataArray that is a
file as read (rioxarray's ``encoding["source"]``, same size and bands), from that file
exactly as :func:`despeck.inference.despeckle_file` takes them (its decimated read for the
log offset, its tags or full-resolution windows for the looks and correlation), so the
pixels equal the streamed file's; for any other DataArray, as
:func:`despeck.inference.despeckle_array` takes them (:func:`despeck.inference.array_sample`,
the DataArray's attributes as tags, the windows of :mod:`despeck.looks`). The result keeps the input's coordinates, CRS, transform, nodata
and attributes (speckle descriptions of the input become ``input_*`` attributes, and
the provenance attributes of :mod:`despeck.provenance` are added);
:func:`write_dataarray` writes it as a tiled GeoTIFF or a Cloud-Optimised GeoTIFF
through despeck's own writer (claimed, written to a temporary file, read back, renamed).
"""

from __future__ import annotations

import copy
import dataclasses
import math
import os
import pathlib
import warnings

import dask
import dask.array as dsa
import numpy as np
import rioxarray  # noqa: F401 - registers the .rio accessor (CRS, transform, nodata)
import xarray as xr

from ..errors import DespeckError, InputError

__all__ = ["despeckle_dataarray", "write_dataarray", "DEFAULT_CHUNK"]


#: Default chunk side of :func:`despeckle_dataarray` (pixels): a multiple of the output
#: tile (512) and of every registered network's pooling grid; one chunk with its halo and
#: the tiles in flight takes a few hundred MB per worker.
DEFAULT_CHUNK = 2048


@dataclasses.dataclass
class _DataArrayScene:
    """What :func:`despeck.looks.describe_speckle` reads of a scene, served from a DataArray band.

    Its full-resolution windows are computed together on first use (one dask
    computation, so chunks shared by several windows are read once).
    """

    path: str
    tags: dict
    intensity: object  # dask array, 0 at invalid pixels
    height: int = 0
    width: int = 0
    _windows: dict = dataclasses.field(default_factory=dict)

    def read(self, window, band=1):  # noqa: ARG002 - one band per object
        from ..looks import scene_windows

        if not self._windows:
            spots = scene_windows(self.height, self.width)
            crops = dask.compute(*[self.intensity[r:r + h, c:c + w] for r, c, h, w in spots])
            self._windows = {(r, c, h, w): np.asarray(x) for (r, c, h, w), x in zip(spots, crops)}
        key = (int(window.row_off), int(window.col_off), int(window.height), int(window.width))
        x = self._windows.get(key)
        if x is None:
            r, c, h, w = key
            x = np.asarray(self.intensity[r:r + h, c:c + w].compute())
        return x.copy(), x > 0


def _to_intensity_block(raw, units, nodata):
    """Linear intensity of raw samples, 0 where invalid (by units, non-finite or nodata)."""
    from ..raster import to_intensity

    intensity, ok = to_intensity(np.asarray(raw), units)
    if nodata is not None and not (isinstance(nodata, float) and math.isnan(nodata)):
        ok &= np.asarray(raw) != nodata
    return np.where(ok, intensity, np.float32(0)).astype(np.float32, copy=False)


def _despeckle_block(raw, *, model, units, nodata, log_offset, condition, tile, overlap, threads, bf16,
                     channels_last, orientations=1):
    """One chunk with its halo: despeckled samples in ``units``; invalid pixels keep their value."""
    from ..inference import despeckle_array
    from ..raster import from_intensity

    intensity = _to_intensity_block(raw, units, nodata)
    ok = intensity > 0
    out = np.asarray(raw).astype(np.float32)
    if not ok.any():
        return out
    # A private copy: a worker's threads may run chunks at once, and the runner may
    # switch the model's memory format while it works.
    m = copy.deepcopy(model)
    estimate = despeckle_array(intensity, m, valid=ok, tile=tile, overlap=overlap, threads=threads, bf16=bf16,
                               log_offset=log_offset, condition=condition, channels_last=channels_last,
                               progress=False, orientations=orientations)
    return np.where(ok, from_intensity(estimate, units), out).astype(np.float32, copy=False)


def _aligned_chunks(length, chunk, halo):
    """Chunk sizes along an axis: ``chunk`` each, a last one shorter than the halo merged into its neighbour."""
    sizes = [chunk] * (length // chunk)
    rest = length - chunk * len(sizes)
    if rest:
        if sizes and rest < halo:
            sizes[-1] += rest
        else:
            sizes.append(rest)
    return tuple(sizes)


def _source_scene(da, units):
    """The file ``da`` was read from (rioxarray's ``encoding["source"]``), open, if ``da`` is all of it; else None.

    Arithmetic drops xarray's encoding, so a DataArray that still names its source holds
    the file's values; a 2-D selection of one band of a multi-band file is ambiguous and
    is not matched.
    """
    from ..raster import open_scene

    source = (da.encoding or {}).get("source")
    if not source or not os.path.isfile(str(source)):
        return None
    try:
        reader = open_scene(source, units=units)
    except (DespeckError, OSError):
        return None
    bands = 1 if da.ndim == 2 else int(da.shape[0])
    if (reader.height, reader.width) != tuple(da.shape[-2:]) or reader.band_count != bands:
        reader.close()
        return None
    return reader


def _nodata_of(da):
    rio = getattr(da, "rio", None)
    nodata = None
    if rio is not None:
        nodata = rio.nodata if rio.nodata is not None else rio.encoded_nodata
    if nodata is None:
        nodata = da.attrs.get("_FillValue", da.attrs.get("nodata"))
    return None if nodata is None else float(nodata)


def despeckle_dataarray(da, model, *, units="intensity", looks=None, chunk=DEFAULT_CHUNK, tile=None, overlap=None,
                        threads=1, bf16=None, channels_last=None, orientations=1):
    """Despeckle a (lazily read) scene held in an ``xarray.DataArray``, chunk by chunk with Dask.

    Parameters
    ----------
    da : xarray.DataArray
        Two-dimensional ``(y, x)`` or ``(band, y, x)`` samples in ``units``, e.g. from
        ``rioxarray.open_rasterio(path, chunks=True)``; numpy-backed arrays are chunked
        here. Nodata (``da.rio.nodata``, or NaN) is left as it is.
    model : despeck.models.Despeckler or path-like
        The model, or its file.
    units : {'intensity', 'amplitude', 'db'}
        What the samples are; the result is in the same units.
    looks : float, optional
        The scene's looks; default the ``looks`` tag of the source file or attribute,
        else estimated once for the whole scene. The log offset, looks and correlation
        are taken once before any chunk runs: from the file the DataArray was read from
        when it is all of that file unchanged (rioxarray's ``encoding["source"]``; then
        the pixels equal :func:`despeck.inference.despeckle_file`'s), else from the array
        as :func:`despeck.inference.despeckle_array` takes them (then they equal its).
    chunk : int
        Chunk side in pixels (rounded up to the network's pooling grid); the halo
        around each chunk is the tiler's overlap for ``model``.
    tile, overlap, threads, bf16, channels_last, orientations
        As for :func:`despeck.inference.despeckle_array`, within each chunk;
        ``threads`` is the torch threads of one chunk task (default 1). ``bf16`` None
        is resolved once, here, on this machine, and every chunk runs alike (a worker
        without native bf16 warns and runs in float32). With
        ``channels_last`` None, chunks of 4 MP and more (the default 2048 plus halo)
        time both memory formats as the streamed path does; smaller chunks stay
        contiguous, which is slower for most networks: pass True then.

    Returns
    -------
    xarray.DataArray
        Lazy (dask-backed), float32, same dims, coordinates (CRS and transform
        included) and nodata; attributes kept except the input's speckle descriptions,
        which become ``input_looks`` / ``input_speckle_correlation_*``, plus the
        ``despeck_*`` provenance attributes.

    Raises
    ------
    InputError
        Not a DataArray of 2 or 3 dimensions, unknown units, bad tile options, no
        valid pixel.
    """
    from ..inference import (InferenceWarning, array_sample, check_orientations, condition_for_model, resolve_bf16,
                             resolve_tiling)
    from ..inference.runner import run_options
    from ..looks import describe_speckle, speckle_tags
    from ..models import Despeckler, load_model_file
    from ..provenance import model_provenance, provenance_tags, tiling_text, without_provenance
    from ..raster import SPECKLE_TAGS, check_units

    if not isinstance(da, xr.DataArray) or da.ndim not in (2, 3) or 0 in da.shape:
        raise InputError("despeckle_dataarray expects an xarray.DataArray of shape (y, x) or (band, y, x), got "
                         f"{type(da).__name__} of shape {getattr(da, 'shape', None)}")
    units = check_units(units, output=True)
    if not isinstance(model, Despeckler):
        model = load_model_file(model)
    if isinstance(chunk, bool) or not isinstance(chunk, int) or chunk < 1:
        raise InputError(f"chunk must be a whole number of pixels >= 1, got {chunk!r}")
    height, width = int(da.shape[-2]), int(da.shape[-1])
    grid = resolve_tiling((height, width), model, tile=tile, overlap=overlap)
    bf16 = resolve_bf16(model, bf16)
    orientations = check_orientations(orientations)
    multiple = int(getattr(model, "size_multiple", 1) or 1)
    halo = -(-int(grid.overlap) // multiple) * multiple
    chunk = max(-(-int(chunk) // multiple) * multiple, halo)
    chunks = (_aligned_chunks(height, chunk, halo), _aligned_chunks(width, chunk, halo))
    nodata = _nodata_of(da)
    name = str(da.name) if da.name is not None else "DataArray"
    data = da.data if isinstance(da.data, dsa.Array) else dsa.from_array(np.asarray(da.data), chunks=-1)
    bands = [data] if da.ndim == 2 else [data[b] for b in range(da.shape[0])]
    results, input_tags = [], {}
    source = _source_scene(da, units)
    if source is not None:
        name = str(source.path)
    try:
        for b, raw in enumerate(bands):
            raw = raw.rechunk(chunks)
            intensity = raw.map_blocks(_to_intensity_block, units, nodata, dtype=np.float32)
            if source is not None:  # the streamed file path's own statistics
                sample = source.sample_intensity(band=b + 1)
                scene, band = source, b + 1
            else:
                sample = np.asarray(array_sample(intensity, intensity > 0).compute())
                scene, band = _DataArrayScene(name, dict(da.attrs), intensity, height, width), 1
            if sample.size == 0:
                raise InputError(f"{name}: band {b + 1} has no valid (finite, positive, not nodata) pixel")
            log_offset = float(model.scene_log_offset(sample))
            info, corr, notes = describe_speckle(scene, band, looks=looks,
                                                 correlation_notes=getattr(model, "conditioned", False))
            cond_looks, cond_corr, more = condition_for_model(model, info, corr, name)
            for note in notes + more:
                warnings.warn(note, InferenceWarning, stacklevel=2)
            if b == 0:
                input_tags = speckle_tags(info, corr, prefix="input_")
            # No halo along an axis held in one chunk (nothing to overlap there).
            depth = {axis: halo if len(chunks[axis]) > 1 else 0 for axis in (0, 1)}
            results.append(dsa.map_overlap(
                _despeckle_block, raw, depth=depth, boundary="none", trim=True, dtype=np.float32,
                meta=np.empty((0, 0), np.float32), model=model, units=units, nodata=nodata, log_offset=log_offset,
                condition=(cond_looks, cond_corr), tile=tile, overlap=overlap, threads=threads, bf16=bf16,
                channels_last=channels_last, orientations=orientations,
            ))
    finally:
        if source is not None:
            source.close()
    out = results[0] if da.ndim == 2 else dsa.stack(results)
    method, sha = model_provenance(model)
    attrs = {k: v for k, v in without_provenance(da.attrs).items() if str(k).strip().lower() not in SPECKLE_TAGS}
    attrs.update(input_tags)
    attrs.update(provenance_tags(method, model_sha256=sha, tiling=f"dask chunks {chunk}x{chunk}, halo {halo}; "
                                                                  + tiling_text(grid),
                                 options=run_options(bf16, orientations)))
    result = xr.DataArray(out, coords=da.coords, dims=da.dims, name=da.name, attrs=attrs)
    for key in ("_FillValue", "grid_mapping"):
        if key in da.encoding:
            result.encoding[key] = da.encoding[key]
    return result


@dataclasses.dataclass
class _Like:
    """The source description :func:`despeck.raster.open_output` copies, taken from a DataArray."""

    width: int
    height: int
    band_count: int
    crs: object
    transform: object
    nodata: object
    tags: dict
    descriptions: tuple
    units: str
    path: object = None


def write_dataarray(da, path, *, units="intensity", overwrite=False, cog=False, client=None) -> pathlib.Path:
    """Write a (lazy) DataArray from :func:`despeckle_dataarray` as a tiled GeoTIFF or a COG.

    The chunks are computed a row of chunks at a time (on ``client`` if given, else
    Dask's current scheduler) and written through :func:`despeck.raster.open_output`:
    the output is claimed, written to a temporary file beside ``path``, read back and
    renamed (with ``cog``, converted by GDAL's COG driver with overviews first). CRS,
    transform, nodata, band descriptions and attributes (as tags) are the DataArray's.

    Parameters
    ----------
    da : xarray.DataArray
        ``(y, x)`` or ``(band, y, x)`` samples in ``units``, georeferenced by rioxarray.
    path : path-like
        Destination GeoTIFF.
    units : {'intensity', 'amplitude', 'db'}
        Units of the samples and of the file.
    overwrite, cog : bool
        As for :func:`despeck.inference.despeckle_file`.
    client : distributed.Client, optional

    Returns
    -------
    pathlib.Path
    """
    from rasterio.windows import Window

    from ..provenance import PREFIX
    from ..raster import check_units, open_output, to_intensity

    if not isinstance(da, xr.DataArray) or da.ndim not in (2, 3):
        raise InputError(f"write_dataarray expects a DataArray of shape (y, x) or (band, y, x), got {da!r:.80}")
    units = check_units(units, output=True)
    rio = da.rio
    nodata = _nodata_of(da)
    long_name = da.attrs.get("long_name")
    n_bands = 1 if da.ndim == 2 else int(da.shape[0])
    descriptions = (tuple(long_name) if isinstance(long_name, (tuple, list))
                    else (long_name,) * n_bands if isinstance(long_name, str) else ())
    tags = {k: str(v) for k, v in da.attrs.items()
            if not str(k).startswith("_") and k not in ("scale_factor", "add_offset", "long_name", "units")}
    like = _Like(int(da.shape[-1]), int(da.shape[-2]), n_bands, rio.crs, rio.transform(recalc=True), nodata,
                 tags, descriptions, units)
    data = da.data if isinstance(da.data, dsa.Array) else dsa.from_array(np.asarray(da.data), chunks=-1)
    if data.ndim == 2:
        data = data[None]
    row_chunks, col_chunks = data.chunks[1], data.chunks[2]
    compute = client.compute if client is not None else None
    with open_output(path, like, units=units, band_count=n_bands, overwrite=overwrite, cog=cog) as writer:
        # The record despeckle_dataarray made (provenance, the input's looks) is the output's.
        writer.update_tags(**{k: v for k, v in tags.items() if k.startswith((PREFIX, "input_"))})
        for b in range(n_bands):
            r0 = 0
            for i, h in enumerate(row_chunks):
                blocks = [data.blocks[b, i, j] for j in range(len(col_chunks))]
                values = ([f.result() for f in compute(blocks)] if compute is not None else dask.compute(*blocks))
                c0 = 0
                for block, w in zip(values, col_chunks):
                    block = np.asarray(block)[0]
                    intensity, ok = to_intensity(block, units)
                    if nodata is not None and not math.isnan(nodata):
                        ok &= block != nodata
                    writer.write(intensity, Window(c0, r0, w, h), band=b + 1, valid=ok)
                    c0 += w
                r0 += h
    return pathlib.Path(path)
