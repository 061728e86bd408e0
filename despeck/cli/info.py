"""``despeck info``: describe a SAR raster before processing it, or a model file.

Prints size, bands, data type, CRS, pixel size, nodata value and the fraction of
invalid pixels, the units the scene will be read in (and why), and per band the
number of looks and the speckle correlation at lags 1 and 2 down rows and along
columns, with how each was obtained (recorded tag, or measured on automatically found
homogeneous blocks of full-resolution windows; :mod:`despeck.looks`). The invalid
fraction of large scenes comes from a decimated sample of about a million pixels,
which the output says.

Given a model file (``.safetensors``) or a bundled model's name (``starter``), it
describes the model instead: network, parameters, receptive field, looks range and
conditioning, bias calibration, point guard and how it was trained
(:func:`despeck.models.describe_model_file`).
"""

from __future__ import annotations

import json
import logging
import math
import warnings

from .. import looks as looks_mod
from .. import raster
from ..cpu import PRECISION_NAMES
from ..errors import InputError
from .exit_codes import OK

SAMPLE_PIXELS = 1_000_000

log = logging.getLogger(__name__)


def add_arguments(parser):
    parser.add_argument("scene", metavar="SCENE", help="raster to describe, or a model file (.safetensors) or "
                                                       "bundled model name")
    parser.add_argument("--units", choices=raster.UNITS, default=None,
                        help="units of the values (default: detected, else linear intensity)")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def describe(path, *, units=None, max_pixels=SAMPLE_PIXELS) -> dict:
    """Facts about a scene as a dict (what ``despeck info`` prints)."""
    with raster.open_scene(path, units=units) as scene:
        step = scene.sample_step(max_pixels)
        crs = scene.crs
        info = {
            "path": str(scene.path),
            "width": scene.width,
            "height": scene.height,
            "bands": scene.band_count,
            "dtype": scene.dtype,
            "crs": None if crs is None else (crs.to_string() if crs.to_epsg() is None else f"EPSG:{crs.to_epsg()}"),
            "pixel_size": [abs(scene.transform.a), abs(scene.transform.e)],
            "nodata": scene.nodata,
            "block_shape": list(scene.block_shape),
            "units": scene.units,
            "units_detected": scene.units_decision.detected,
            "units_reason": scene.units_decision.reason,
            "sample_step": step,
            "band_info": [],
            "notes": [],
        }
        for band in range(1, scene.band_count + 1):
            intensity, valid = scene.sample_image(max_pixels, band=band)
            entry = {"band": band, "description": scene.descriptions[band - 1] if band <= len(scene.descriptions) else None,
                     "invalid_fraction": float(1.0 - valid.mean())}
            # The looks and the speckle correlation come from their one owner.
            looks_info, corr, notes = looks_mod.describe_speckle(scene, band)
            enl = None if looks_info.source == "assumed" else looks_info.value
            entry["enl"] = enl
            entry["looks_source"] = looks_info.source
            entry["looks_detail"] = looks_info.detail
            entry["speckle_correlation"] = {"rows_lag1_lag2": list(corr.rows), "cols_lag1_lag2": list(corr.cols),
                                            "source": corr.source, "detail": corr.detail}
            info["notes"].extend(f"band {band}: {n}" for n in notes)
            if enl is not None and enl < 0.7:
                if scene.units == "amplitude":
                    info["notes"].append(f"band {band}: ENL {enl:.2f} < 1 after squaring: the file may hold intensity, not amplitude")
                else:
                    info["notes"].append(f"band {band}: ENL {enl:.2f} < 1: no homogeneous area found, or the values are not linear intensity")
            info["band_info"].append(entry)
    return info


def _is_model(name) -> bool:
    import pathlib

    from ..models import BUNDLED_MODELS

    path = pathlib.Path(name)
    return path.suffix.lower() == ".safetensors" or (name in BUNDLED_MODELS and not path.exists())


def _model_lines(d) -> list:
    arch = d["architecture"]
    widths = arch["kwargs"].get("widths")
    shape = f", widths {'-'.join(map(str, widths))}" if widths else ""
    lo, hi = d["looks"]
    if d["looks_aware"]:
        told = ("told the looks and the speckle correlation"
                + ("; runs without the correlation where it is not known" if d["runs_blind"] else ""))
    else:
        told = "not told the looks (trained for this range)"
    lines = [
        f"model        {d['path']} ({d['bytes'] / 1e6:.1f} MB, SHA-256 {d['sha256'][:16]}...)",
        f"network      {arch['name']}{shape}: {d['parameters']:,} parameters, receptive field {d['receptive_field']} px",
        f"input        {d['units']}, looks {lo:g} to {hi:g}; {told}",
    ]
    if d["bias_tables"]:
        parts = [f"{PRECISION_NAMES.get(k, k)} {t['looks']} looks x {t['corr']} correlations "
                 f"({t['min_db']:+.3f} to {t['max_db']:+.3f} dB)" for k, t in d["bias_tables"].items()]
        lines.append(f"bias         tables: {'; '.join(parts)}")
    else:
        lines.append(f"bias         one correction, {d['log_bias_db']:+.3f} dB")
    pfa = d["point_false_alarm"]
    lines.append(f"points       {'guard at false-alarm rate %g' % pfa if pfa is not None else 'no point guard'}")
    t = d["training"]
    if t:
        init = f", started from {t['init']}" if t.get("init") else ""
        lines.append(f"training     {t.get('mode')}, {t.get('epochs')} epochs ({t.get('steps')} steps) in "
                     f"{PRECISION_NAMES.get(t.get('precision'), t.get('precision'))}, stopped by {t.get('stopped_by')}"
                     f"{init}")
    v = d["validation"]
    if v and v.get("val_psnr_db") is not None:
        lines.append(f"validation   PSNR {v['val_psnr_db']:.2f} dB (speckled {v.get('val_psnr_noisy_db', float('nan')):.2f}), "
                     f"SSIM {v.get('val_ssim_db', float('nan')):.3f}, at epoch {v.get('epoch')}")
    return lines


def run(args) -> int:
    if _is_model(args.scene):
        from ..models import describe_model_file, resolve_model_path

        d = describe_model_file(resolve_model_path(args.scene))
        print(json.dumps(d, indent=2) if args.json else "\n".join(_model_lines(d)))
        return OK
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", raster.UnitsWarning)
        info = describe(args.scene, units=args.units)
    notes = [str(w.message) for w in caught] + info["notes"]
    for b in info["band_info"]:
        log.info("band %d: looks %s, source %s (%s)", b["band"], "n/a" if b["enl"] is None else f"{b['enl']:.3g}",
                 b["looks_source"], b["looks_detail"])
    if args.json:
        info["notes"] = notes
        if isinstance(info["nodata"], float) and not math.isfinite(info["nodata"]):
            info["nodata"] = str(info["nodata"])  # "nan", "inf": JSON numbers cannot hold them
        print(json.dumps(info, indent=2, allow_nan=False))
        return OK
    sample = "" if info["sample_step"] == 1 else f" (from every {info['sample_step']}th row and column)"
    lines = [
        f"scene        {info['path']}",
        f"size         {info['width']} x {info['height']} pixels, {info['bands']} band(s), {info['dtype']}",
        f"blocks       {info['block_shape'][0]} x {info['block_shape'][1]} (rows x cols)",
        f"CRS          {info['crs'] or 'none'}",
        f"pixel size   {info['pixel_size'][0]:g} x {info['pixel_size'][1]:g}",
        f"nodata       {'none' if info['nodata'] is None else info['nodata']}",
        f"units        {info['units']} ({info['units_reason']})",
    ]
    for b in info["band_info"]:
        label = f"band {b['band']}" + (f" ({b['description']})" if b["description"] else "")
        enl = "n/a" if b["enl"] is None else f"{b['enl']:.2f}"
        lines.append(f"{label:<12} invalid {100 * b['invalid_fraction']:.2f}%{sample}, looks {enl} "
                     f"({b['looks_detail']})")
        c = b["speckle_correlation"]
        white = max(c["rows_lag1_lag2"][0], c["cols_lag1_lag2"][0]) < 0.1
        lines.append(f"{'':<12} speckle correlation at lag 1: {c['rows_lag1_lag2'][0]:.2f} down rows, "
                     f"{c['cols_lag1_lag2'][0]:.2f} along columns ({'white' if white else 'correlated'}; {c['detail']})")
    print("\n".join(lines))
    for note in notes:  # shown by the command's one-line printer
        warnings.warn(note, stacklevel=1)
    return OK
