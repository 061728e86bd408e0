"""Filtering raster files: the SAR bands of a scene strip by strip through the engine, into a GeoTIFF.

Strips of full rows are read with a halo of the method's reach and run through the
filter's plan (:mod:`despeck.filters.engine`), so the file's result is bit-identical
to filtering the whole scene in memory; filters without a strip plan (``bm3d-log``)
read each band whole. Scene-level values (looks, the sigma filter's point
threshold) are taken once per band.
"""

from __future__ import annotations

import pathlib
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ..errors import InputError
from ..speckle import check_looks
from .engine import SAMPLE_PIXELS, check_window, check_workers, run_tiles, scene_percentile, strip_rows
from .registry import check_options, filter_entry

__all__ = ["filter_raster"]


def filter_raster(method, in_path, out_path, *, looks=None, window=None, units=None, out_units=None,
                  overwrite=False, progress=True, workers=None, band=None, cog=False, **options):
    """Filter the SAR bands of a raster file strip by strip and write a GeoTIFF like the input.

    Strips of full rows are read with a halo of the method's reach, filtered and
    written; the result is bit-identical to filtering the whole scene in memory
    (with the same scene-level values). Invalid input pixels are nodata in the output.
    Every SAR band is filtered (each with its own looks estimate and scene-level
    values) into an output with as many bands, unless ``band`` picks one. The output
    records what made it (:mod:`despeck.provenance`: method, window and options, despeck
    version, date) and the input's looks (``input_looks``).

    Parameters
    ----------
    method : str
        A name in :data:`despeck.filters.FILTERS`.
    in_path, out_path : str or path-like
        Input raster and destination (never the input; written to a temporary file
        in the destination folder and renamed when complete).
    looks : float, optional
        Number of looks; default estimated from the scene, band by band
        (:func:`despeck.speckle.estimate_looks` on a decimated sample), reported in the result.
    window : int, optional
        Window size; default the filter's (``DEFAULT_WINDOWS[method]``). Odd, at most
        :data:`~despeck.filters.engine.MAX_WINDOW` and no larger than the scene's longer side.
    units : str, optional
        Units of the input file (detected if not given).
    out_units : str, optional
        Units of the output (default the input's; intensity for complex input).
    overwrite : bool
        Replace an existing output.
    progress : bool
        Show a progress bar.
    workers : int, optional
        Threads used on each strip batch.
    band : int, optional
        Filter only this SAR band (from 1) into a one-band output; default every band.
    cog : bool
        Write a Cloud-Optimised GeoTIFF with overviews (:func:`despeck.raster.open_output`).
    **options
        Method-specific options (see :func:`~despeck.filters.registry.filter_options`).

    Returns
    -------
    dict
        What was done: ``method``, ``window``, ``output``, ``pixels`` (per band),
        ``bands`` (one dict per band filtered: ``band``, ``looks``,
        ``looks_estimated``, ``options`` including scene-level values such as
        ``point_threshold``), and the first of those as ``looks``,
        ``looks_estimated`` and ``options``.
    """
    from tqdm.auto import tqdm

    from .. import raster
    from ..provenance import provenance_tags

    registered = filter_entry(method)
    name = registered.name
    check_options(name, options)
    window = check_window(registered.window(window))
    if looks is not None:
        looks = check_looks(looks)
    in_path = pathlib.Path(in_path)
    raster.check_output_path(out_path, [in_path], overwrite=overwrite)
    with raster.open_scene(in_path, units=units) as reader:
        h, w = reader.height, reader.width
        if window > max(h, w):
            raise InputError(f"{in_path}: window {window} is larger than the scene ({w} x {h} pixels); "
                             "choose a smaller window")
        bands = _bands_to_filter(reader, band, in_path)
        done = [_band_settings(name, reader, b, looks, options, in_path) for b in bands]
        # plans first: a bad option or looks value fails before any file exists
        plans = [registered.plan(e["looks"], window, **e["options"]) if registered.plan else None for e in done]
        if registered.require is not None:
            registered.require()  # e.g. an optional package, before any progress bar or file
        bar = tqdm(total=h * len(bands), unit="row", desc=f"{name} {in_path.name}", disable=not progress, leave=False)
        with raster.open_output(out_path, like=reader, units=out_units, band_count=len(bands),
                                overwrite=overwrite, cog=cog) as writer:
            writer.update_tags(**provenance_tags(name, options={"window": window, **options}))
            for k, (entry, plan) in enumerate(zip(done, plans), start=1):
                description = reader.descriptions[entry["band"] - 1] if entry["band"] <= len(reader.descriptions) else None
                if description or entry["band"] != k:  # output band k is input band entry["band"]
                    writer.set_description(k, description or "")
                if registered.plan is None:
                    _filter_whole_band(name, reader, writer, entry["band"], k, looks=entry["looks"], window=window,
                                       options=entry["options"], workers=workers)
                    bar.update(h)
                    continue
                _filter_strips(plan, reader, writer, entry["band"], k, workers, bar)
            # The output is no longer L-look speckle: record the input's looks under input_*.
            writer.update_tags(input_looks=f"{float(done[0]['looks']):.4g}", input_looks_source=done[0]["looks_source"])
        bar.close()
    first = done[0]
    return {
        "method": name,
        "looks": first["looks"],
        "looks_estimated": first["looks_estimated"],
        "window": window,
        "options": first["options"],
        "bands": done,
        "output": str(out_path),
        "pixels": int(h) * int(w),
    }


def _bands_to_filter(reader, band, in_path) -> list:
    """Every SAR band of ``reader``, or the one ``band`` names (checked)."""
    if band is None:
        return list(range(1, reader.band_count + 1))
    try:
        b = int(band)
        if b != float(band):
            raise ValueError
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"band must be a whole number from 1, got {band!r}") from None
    if not 1 <= b <= reader.band_count:
        raise InputError(f"{in_path}: band {band} does not exist (the scene has {reader.band_count} SAR band(s))")
    return [b]


def _band_settings(name, reader, band, looks, options, in_path) -> dict:
    """Looks (given or estimated) and scene-level options of one band."""
    from .. import looks as looks_mod

    looks_estimated = looks is None
    options = dict(options)
    where = f"{in_path}" if reader.band_count == 1 else f"{in_path} band {band}"
    looks_source = "option"
    if looks_estimated:
        # The looks of a scene have one owner: the file's 'looks' tag, else an estimate
        # on full-resolution windows (despeck.looks).
        sample = (None, None) if looks_mod.looks_from_tags(reader.tags) else looks_mod.read_sample(reader, band)
        try:
            info = looks_mod.resolve_looks(None, tags=reader.tags, intensity=sample[0], valid=sample[1],
                                           name="--looks")
        except InputError as exc:
            raise InputError(f"{where}: {exc}") from None
        looks, looks_source = info.value, info.source
    if name == "improved-sigma" and options.get("point_threshold") is None:
        sample, sample_valid = reader.sample_image(SAMPLE_PIXELS, band=band)
        options["point_threshold"] = scene_percentile(sample.astype(np.float64), sample_valid)
    return {"band": band, "looks": float(looks), "looks_estimated": bool(looks_estimated),
            "looks_source": looks_source, "options": options}


def _filter_strips(plan, reader, writer, band, out_band, workers, bar):
    """Filter one band of ``reader`` strip by strip into ``out_band`` of ``writer``."""
    from ..raster.windows import row_window

    nworkers = check_workers(workers)
    h, w = reader.height, reader.width
    rows = strip_rows(w, plan.halo)
    with ThreadPoolExecutor(nworkers) as pool:
        for r0 in range(0, h, rows):
            r1 = min(r0 + rows, h)
            s0, s1 = max(r0 - plan.halo, 0), min(r1 + plan.halo, h)
            data, ok = reader.read(window=row_window(s0, s1, w), band=band)
            data = np.where(ok, data, 0.0)
            # the strip with its halo rows, as an image of its own whose top and
            # bottom context is real data (or the scene's edge)
            result = np.empty((s1 - s0, w), dtype=np.float32)
            run_tiles(plan, data, ok, result, pool if nworkers > 1 else None)
            core = slice(r0 - s0, r0 - s0 + (r1 - r0))
            core_valid = ok[core]
            result = result[core]
            result[~core_valid] = 0.0
            writer.write(result, row_window(r0, r1, w), band=out_band, valid=core_valid)
            bar.update(r1 - r0)


def _filter_whole_band(name, reader, writer, band, out_band, *, looks, window, options, workers):
    """Methods without a strip plan (bm3d-log): read the whole band, filter it in memory, write it."""
    from ..raster.windows import row_window

    h, w = reader.height, reader.width
    data, ok = reader.read(band=band)
    filter_function = filter_entry(name).function
    result = filter_function(np.where(ok, data, 0.0), looks=looks, window=window, mask=ok, workers=workers, **options)
    result[~ok] = 0.0
    writer.write(result, row_window(0, h, w), band=out_band, valid=ok)
