"""Filtering raster files: the SAR bands of a scene strip by strip, into a GeoTIFF.

The package's streaming engine (:mod:`despeck.raster.streaming`) reads strips of full
rows with a halo of the method's reach above and below, and writes the results; each
strip's part inside the scene runs through the filter's plan
(:mod:`despeck.filters.engine`, which cuts it into tiles), so the file's result is
bit-identical to filtering the whole scene in memory. Filters without a strip plan
(``bm3d-log``) get each band whole as one strip. Scene-level values (looks, the sigma
filter's point threshold) are taken once per band.
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
    from ..provenance import provenance_tags
    from ..raster.streaming import open_stream

    registered = filter_entry(method)
    name = registered.name
    check_options(name, options)
    window = check_window(registered.window(window))
    if looks is not None:
        looks = check_looks(looks)
    in_path = pathlib.Path(in_path)
    with open_stream(in_path, out_path, units=units, out_units=out_units, overwrite=overwrite, cog=cog,
                     progress=progress, description=f"{name} {in_path.name}") as stream:
        reader = stream.reader
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
        nworkers = check_workers(workers)
        stream.create_output(band_count=len(bands))
        stream.update_tags(**provenance_tags(name, options={"window": window, **options}))
        with ThreadPoolExecutor(nworkers) as pool:
            for k, (entry, plan) in enumerate(zip(done, plans), start=1):
                description = reader.descriptions[entry["band"] - 1] if entry["band"] <= len(reader.descriptions) else None
                if description or entry["band"] != k:  # output band k is input band entry["band"]
                    stream.set_description(k, description or "")
                if plan is None:
                    # no strip plan (bm3d-log): the whole band is one strip
                    whole = _whole_band(registered.function, looks=entry["looks"], window=window,
                                        options=entry["options"], workers=workers)
                    stream.map_strips(whole, band=entry["band"], out_band=k, rows=h)
                else:
                    stream.map_strips(_strip_filter(plan, pool if nworkers > 1 else None), band=entry["band"],
                                      out_band=k, halo=(plan.halo, 0), rows=strip_rows(w, plan.halo))
            # The output is no longer L-look speckle: record the input's looks under input_*.
            stream.update_tags(input_looks=f"{float(done[0]['looks']):.4g}", input_looks_source=done[0]["looks_source"])
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


def _strip_filter(plan, pool):
    """The strip function of a filter with a plan: the strip's scene part through the plan's tiles, its own rows kept.

    The strip's halo rows beyond the scene are left out: a filter's neighbourhoods
    treat the outside of the scene as missing data (zero and invalid, as in
    :func:`~despeck.filters.engine.pad_block`), so each output pixel sees what it sees
    when the whole scene is filtered at once.
    """

    def run(strip):
        data, ok, own = strip.scene_part()
        result = np.empty(data.shape, dtype=np.float32)
        run_tiles(plan, data, ok, result, pool)
        return result[own]

    return run


def _whole_band(function, *, looks, window, options, workers):
    """The strip function of a filter without a strip plan (bm3d-log): one strip holds the whole band."""

    def run(strip):
        data, ok, _ = strip.scene_part()
        return function(data, looks=looks, window=window, mask=ok, workers=workers, **options)

    return run
