"""The report folder: results.json, results.csv, report.md, the marker file and the safe replacement.

The report is written to a hidden temporary folder beside the destination and
renamed into place only when complete (:func:`staged_report`). An existing destination
is replaced only when asked (``overwrite``) and only when it is a report despeck wrote:
it must hold the marker :data:`REPORT_MARKER` and nothing but the unchanged files the
marker names, no input of the run, and must not be (or contain) the current directory.
"""

from __future__ import annotations

import contextlib
import csv
import json
import math
import os
import pathlib
import shutil
import tempfile
import warnings

import numpy as np

from .. import metrics
from ..atomic import publish
from ..cpu import PRECISION_NAMES
from ..errors import DespeckError, InputError
from ..provenance import file_sha256

__all__ = ["REPORT_MARKER", "CAUTIONS", "conventions", "check_out_dir", "staged_report", "write_results"]

#: File written in every report folder: JSON naming the files despeck wrote there, so
#: that ``overwrite`` replaces only a report despeck made and never anything else.
REPORT_MARKER = ".despeck-report.json"
_MARKER_FORMAT = "despeck bench report"

CAUTIONS = (
    "Speckle filters and learned despecklers can suppress small or weak targets (ships, "
    "vehicles, isolated buildings, thin linear features) and can invent texture or structure "
    "that is not on the ground, in particular on scenes unlike those a model was trained on. "
    "Figures here summarise test scenes only. Check any filtered product against the original "
    "image before operational use such as flood mapping or ship detection, and keep the "
    "original for measurements."
)

# Columns of results.csv / the report table, in order: (key, header, format).
_COLUMNS = (
    ("scene", "scene", "{}"),
    ("method", "method", "{}"),
    ("enl", "ENL", "{:.1f}"),
    ("bias_db", "bias dB", "{:+.3f}"),
    ("ratio_mean", "ratio mean", "{:.3f}"),
    ("ratio_enl_over_looks", "ratio ENL/L", "{:.2f}"),
    ("m", "M", "{:.2f}"),
    ("epd_h", "EPD-ROA H", "{:.3f}"),
    ("epd_v", "EPD-ROA V", "{:.3f}"),
    ("edge_corr", "edge corr", "{:.3f}"),
    ("psnr_db", "PSNR dB-domain", "{:.2f}"),
    ("psnr_db_flat", "PSNR flat", "{:.2f}"),
    ("psnr_db_edges", "PSNR edges", "{:.2f}"),
    ("psnr_db_texture", "PSNR texture", "{:.2f}"),
    ("ssim_db", "SSIM dB-domain", "{:.3f}"),
    ("psnr_amplitude", "PSNR amplitude", "{:.2f}"),
    ("ssim_amplitude", "SSIM amplitude", "{:.3f}"),
    ("mae_db", "MAE dB", "{:.2f}"),
    ("point_retention_db", "points median dB", "{:+.1f}"),
    ("point_worst_db", "worst point dB", "{:+.1f}"),
    ("seconds", "seconds", "{:.2f}"),
    ("mp_per_s", "MP/s", "{:.2f}"),
)
_EXTRA = ("r_enl_mu", "delta_h", "edge_reference", "looks", "kind")


def conventions() -> dict:
    """How each column of the report is computed, by key (written into results.json and report.md)."""
    return {
        "enl": "median over the homogeneous areas of mean^2 / variance of the filtered intensity",
        "bias_db": "10 log10(mean filtered / mean input) over all homogeneous areas together; ideal 0",
        "ratio": "ratio image = input / filtered; mean over valid pixels (ideal 1); ENL median over the areas divided by the scene's looks (ideal 1)",
        "m": "unassisted M of Gomez et al. (2017), formula from memory: 1/2 sum over areas of relative ENL and mean deviations of the ratio image, plus 100 |h0 - h_shuffled| / h0 of its co-occurrence homogeneity (16 equally populated levels, 10 seeded shuffles); 0 ideal",
        "epd_roa": (f"robust variant of EPD-ROA (Feng, Hou, Gong 2011, IEEE TGRS 49(7) 2724-2737): ratios of the means of "
                    f"adjacent non-overlapping {metrics.EPD_WINDOW} x {metrics.EPD_WINDOW} windows instead of single "
                    "pixels (the pixel ratio of 1-look speckle has no finite mean, so a few pixels dominated the "
                    "original form), horizontal and vertical, against the clean reference when there is one, else "
                    "against the noisy input; ideal 1; pure 1-look speckle against its constant reflectivity scores "
                    "9/8; not comparable with values published for the pixel form"),
        "edge_corr": "correlation of 4-neighbour Laplacians of reference and estimate (Sattar et al. 1997); ideal 1",
        "psnr_db": "PSNR of 10 log10 intensity, both clipped to the reference's 1st-99.9th percentile range, peak = that range (dB)",
        "psnr_db_regions": (f"the same PSNR within three disjoint regions of the clean reference "
                            f"(despeck.metrics.reference_regions): edges, within 2 pixels of a step of more than "
                            f"{metrics.EDGE_STEP_DB:g} dB between neighbours of its 5 x 5 median; flat, the "
                            "homogeneous areas less edges; texture, the rest. A method can win overall and lose "
                            "in one of them"),
        "ssim_db": "SSIM (7 x 7 uniform window, K1 0.01, K2 0.03) on the same clipped dB images and range",
        "psnr_amplitude": "PSNR of amplitude, clipped to [0, 99.9th percentile of the reference amplitude], peak = that value",
        "ssim_amplitude": "SSIM on the same clipped amplitudes",
        "mae_db": "mean |dB(filtered) - dB(reference)|, unclipped",
        "point_retention_db": "median over point targets of 10 log10(peak after / peak before) in a 3 x 3 neighbourhood; 0 dB = kept",
        "point_worst_db": "the same for the worst point target (the minimum): one target lost shows here even when the median is 0 dB",
        "timing": "wall-clock seconds of the method call on this machine; MP/s = pixels / seconds / 1e6; the only columns that change between runs",
    }


# --------------------------------------------------------------------------- the report folder

def _write_marker(folder: pathlib.Path):
    """Flush every file of the finished report to disk and list it, with size and SHA-256, in the marker."""
    files = {}
    for path in sorted(folder.iterdir()):
        with open(path, "rb") as fh:
            os.fsync(fh.fileno())
        files[path.name] = {"bytes": path.stat().st_size, "sha256": file_sha256(path)}
    json.loads((folder / "results.json").read_text())  # the numbers read back
    marker = folder / REPORT_MARKER
    with open(marker, "w") as fh:
        json.dump({"format": _MARKER_FORMAT, "version": 1, "files": files}, fh, indent=1)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())


def check_out_dir(out_dir: pathlib.Path, inputs, overwrite: bool):
    """Refuse a report folder whose replacement could lose anything; see the module docstring.

    Returns the names of the entries of an existing report folder (all written by
    despeck and unchanged), or None when the folder does not exist yet.
    """
    target = out_dir.resolve()
    for p in inputs:
        q = pathlib.Path(p).resolve()
        if q == target or target in q.parents:
            what = "is" if q == target else "holds"
            raise InputError(f"{out_dir}: the report folder {what} an input of the run ({p}); choose another folder")
    if not (out_dir.exists() or out_dir.is_symlink()):
        return None
    if not out_dir.is_dir():
        raise InputError(f"{out_dir}: exists and is not a folder")
    if not overwrite:
        raise InputError(f"{out_dir}: report folder already exists; choose another or allow overwriting "
                         "(which replaces only a report despeck wrote)")
    if out_dir.is_symlink():
        raise InputError(f"{out_dir}: is a symbolic link; give the folder itself")
    cwd = pathlib.Path.cwd().resolve()
    if target == cwd or target in cwd.parents:
        what = "the current directory" if target == cwd else "a parent of the current directory"
        raise InputError(f"{out_dir}: is {what}, which despeck never replaces; choose another folder")
    return _own_entries(out_dir)


def _own_entries(out_dir: pathlib.Path):
    """Names in ``out_dir`` if every one is a file despeck wrote and nobody changed; else an error naming one."""
    names = sorted(os.listdir(out_dir))
    if not names:
        return []
    marker = out_dir / REPORT_MARKER
    if marker.is_symlink() or not marker.is_file():
        raise InputError(f"{out_dir}: not a report despeck wrote (no {REPORT_MARKER}), so it is not replaced; "
                         "choose another folder")
    try:
        data = json.loads(marker.read_text())
        files = data["files"]
        if data.get("format") != _MARKER_FORMAT or not isinstance(files, dict):
            raise ValueError
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        raise InputError(f"{marker}: not a valid despeck report marker, so {out_dir} is not replaced; "
                         "choose another folder") from None
    for name in names:
        if name == REPORT_MARKER:
            continue
        path = out_dir / name
        info = files.get(name)
        if not isinstance(info, dict):
            raise InputError(f"{out_dir}: holds {name}, which despeck did not write, so the folder is not replaced; "
                             "move it away or choose another folder")
        if path.is_symlink() or not path.is_file():
            raise InputError(f"{path}: is no longer the file despeck wrote (a link or a folder), so {out_dir} is "
                             "not replaced; move it away or choose another folder")
        if path.stat().st_size != info.get("bytes") or file_sha256(path) != info.get("sha256"):
            raise InputError(f"{path}: changed since despeck wrote it, so {out_dir} is not replaced; "
                             "move it away or choose another folder")
    return names


def _swap_in(tmp: pathlib.Path, out_dir: pathlib.Path, inputs, overwrite: bool):
    """Rename the finished report ``tmp`` to ``out_dir``, replacing only what despeck wrote there before."""
    previous = check_out_dir(out_dir, inputs, overwrite)  # again: the folder may have changed during the run
    if previous is None:
        publish(tmp, out_dir)
        return
    old = pathlib.Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.old.", dir=out_dir.parent))
    os.replace(out_dir, old / "previous")
    try:
        publish(tmp, out_dir)
    except BaseException:
        os.replace(old / "previous", out_dir)
        old.rmdir()
        raise
    for name in previous:
        (old / "previous" / name).unlink(missing_ok=True)
    try:
        (old / "previous").rmdir()
        old.rmdir()
    except OSError:
        warnings.warn(f"{out_dir}: files added to the old report while it was replaced are kept in {old / 'previous'}",
                      stacklevel=5)  # the caller of run_benchmark (through staged_report and contextlib)


@contextlib.contextmanager
def staged_report(out_dir: pathlib.Path, inputs, overwrite: bool):
    """Give a hidden temporary folder beside ``out_dir`` to write the report into.

    When the block ends normally the files are flushed and listed in the marker and the
    folder is renamed to ``out_dir`` (replacing only a report despeck wrote, checked again
    now); when it fails the temporary folder is removed and ``out_dir`` is unchanged. An
    ``OSError`` becomes one :class:`InputError` line naming ``out_dir``.
    """
    try:
        out_dir.parent.mkdir(parents=True, exist_ok=True)
        tmp = pathlib.Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", dir=out_dir.parent))
    except OSError as exc:
        raise InputError(f"{out_dir}: cannot create the report folder there ({exc.strerror or exc})") from None
    try:
        yield tmp
        _write_marker(tmp)
        _swap_in(tmp, out_dir, inputs, overwrite)
    except BaseException as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(exc, OSError) and not isinstance(exc, DespeckError):
            raise InputError(f"{out_dir}: cannot write the report ({exc.strerror or exc}); nothing was changed there") from None
        raise


def write_results(folder: pathlib.Path, result: dict):
    """Write ``results.json``, ``results.csv`` and ``report.md`` of ``result`` (see :func:`despeck.bench.run_benchmark`) into ``folder``."""
    _write_json(folder / "results.json", result)
    _write_csv(folder / "results.csv", result["results"])
    _write_report(folder / "report.md", result)


# --------------------------------------------------------------------------- writing

def _clean(v):
    if isinstance(v, float) and not math.isfinite(v):
        return None if math.isnan(v) else ("inf" if v > 0 else "-inf")
    if isinstance(v, (np.floating,)):
        return _clean(float(v))
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, dict):
        return {k: _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    return v


def _write_json(path, data):
    path.write_text(json.dumps(_clean(data), indent=2) + "\n")


def _write_csv(path, rows):
    keys = [k for k, _, _ in _COLUMNS] + list(_EXTRA)
    with open(path, "w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(keys)
        for row in rows:
            writer.writerow(["" if row.get(k) is None else (f"{row[k]:.6g}" if isinstance(row.get(k), float) else row[k])
                             for k in keys])


def _fmt(row, key, fmt):
    v = row.get(key)
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "–"
    if isinstance(v, float) and math.isinf(v):
        return "∞"
    return fmt.format(v)


def _write_report(path, result):
    lines = [f"# {result['title']}", ""]
    lines += ["Generated by `despeck bench`. Numbers are also in `results.csv` and `results.json`; "
              "conventions are listed at the end.", ""]
    lines += ["## Scenes", "", "| scene | size | looks | homogeneous areas | point targets | clean reference |",
              "|---|---|---|---|---|---|"]
    for s in result["scenes"]:
        lines.append(f"| {s['name']} | {s['shape'][1]} x {s['shape'][0]} | {s['looks']:.2f} ({s['looks_source']}) | "
                     f"{s['areas']} ({s['areas_source']}) | {s['points']} ({s['points_source']}) | "
                     f"{'yes' if s['reference'] else 'no'} |")
    lines.append("")
    for s in result["scenes"]:
        rows = [r for r in result["results"] if r["scene"] == s["name"]]
        present = [c for c in _COLUMNS[1:] if any(r.get(c[0]) is not None for r in rows)]
        lines += [f"## Results: {s['name']}", ""]
        lines.append("| " + " | ".join(h for _, h, _ in present) + " |")
        lines.append("|" + "---|" * len(present))
        for r in rows:
            lines.append("| " + " | ".join(_fmt(r, k, f) for k, _, f in present) + " |")
        lines.append("")
        if not s["areas"]:
            lines += ["No homogeneous area was found, so ENL, bias, ratio and M are not given; "
                      "give areas (boxes or a GeoJSON file) to get them.", ""]
        edge_ref = rows[0].get("edge_reference", "noisy input")
        lines += [f"Edge measures are against the {edge_ref}. Ideal values: bias 0 dB, ratio mean 1, "
                  "ratio ENL/L 1, M 0, EPD-ROA 1, edge corr 1, points 0 dB.", ""]
        fig = s["figures"]
        r0, c0, size = s["crop"]
        lines += [f"![crops]({fig['crops']})", "",
                  f"Crops of {size} x {size} pixels at row {r0}, column {c0}, in dB with one common stretch "
                  f"({fig['stretch'][0]:.1f} to {fig['stretch'][1]:.1f} dB, the 2nd-98th percentile of "
                  f"{'the clean reference' if s['reference'] else 'the median of the filtered crops'}).", "",
                  f"![ratio images]({fig['ratios']})", "",
                  "Ratio images (input / filtered) of the same crop, in dB from -6 to +6: an ideal filter leaves "
                  "structureless speckle; visible edges or targets are signal the filter removed.", "",
                  f"![trade-off]({fig['tradeoff']})", "",
                  "Trade-off between smoothing (ENL, log scale) and edge preservation (mean of EPD-ROA H and V)"
                  + (", colour = PSNR in the dB domain." if s["reference"] else "."), ""]
        if fig.get("regions"):
            lines += [f"![gain by region]({fig['regions']})", "",
                      "PSNR gain over the unfiltered input in each region of the clean reference (flat areas, "
                      "near edges, texture; see the conventions): methods often rank differently in each.", ""]
    models = [m for m in result.get("methods", []) if m.get("kind") == "model"]
    if models:
        lines += ["## Models", ""]
        for m in models:
            arithmetic = PRECISION_NAMES.get(m.get("precision"), "an unrecorded precision")
            n = int(m.get("orientations", 1))
            averaged = f", averaged over {n} orientations of every tile" if n > 1 else ""
            lines.append(f"- **{m['label']}**: `{m['path']}`, network run in {arithmetic} (the automatic choice "
                         f"of `despeck apply` on this machine){averaged}")
        lines.append("")
    lines += ["## Conventions", ""]
    for k, v in result["conventions"].items():
        lines.append(f"- **{k}**: {v}")
    lines += ["", "## Cautions", "", result["cautions"], ""]
    path.write_text("\n".join(lines))
