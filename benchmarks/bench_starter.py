"""Evaluate a model file (default: the bundled starter model) against every classical filter, as a matrix.

The matrix is held-out scene families x speckle conditions. Families: ``terrain``,
``fields``, ``urban`` and ``wetland`` drawn by :func:`despeck.scene_families.make_family_scene`
with the test split (parameter ranges never used in training; ``wetland`` is never trained
on at all; seeds 9100 and up), and ``natural``: scikit-image's ``camera`` and ``cat``
(``cat`` is the picture ``chelsea`` too; both names are held out of the training references,
``scripts/make_training_references.py``), mapped to backscatter by that script's
``to_backscatter``. Conditions:

- ``L1 white``: 1-look Gamma speckle (:func:`despeck.speckle.simulate_intensity`);
- ``L1 corr``: 1-look speckle through an oversampled (1.25), Hamming-tapered system on
  both axes (:func:`despeck.speckle.simulate_correlated_intensity`);
- ``L4 white``: 4-look Gamma speckle;
- ``L4.4 corr``: 4.4-look correlated speckle (unequally weighted looks), same system.

Methods: every classical filter of the registry with the true looks and its default
window; ``bm3d-log`` (log-domain BM3D, optional ``bm3d`` package) given the system for
the correlated conditions (it then uses the log-speckle spectrum); and the model through
``despeck.inference.despeckle_array(intensity, model, valid=valid)`` with nothing else
(the default user path: the model works out looks and correlation itself and runs in
the precision ``despeck apply`` would choose on this machine, recorded in the output).
With ``--orientations 4`` or ``8`` the model is also run averaged over that many
orientations of each tile (``model-o4`` / ``model-o8``, ``despeck apply --orientations``),
reported in its own margin table; the targets are judged on the default single pass.

Per cell (family x condition) and method:

- PSNR and SSIM in the dB domain (:func:`despeck.metrics.fidelity`: clipped to the
  reference's 1st-99.9th percentile dB range, ``data_range`` = that range), mean over the
  cell's scenes;
- edge correlation (:func:`despeck.metrics.edge_correlation`) against the reference;
- radiometric bias ``10 log10(sum estimate / sum reference)`` pooled over the homogeneous
  boxes of the cell's scenes (procedural: the layout's boxes of exactly constant
  reflectivity; natural: 16 x 16 blocks whose clean coefficient of variation is below 3 %),
  with the speckled input's own value beside it (what the speckle sample alone gives: with
  few boxes and correlated speckle it can reach a few tenths of a dB), and the bias against
  the speckled input on the same boxes, ``10 log10(sum estimate / sum input)``, which follows
  the filter rather than the sample;
- point targets (procedural scenes): ``10 log10(peak after / peak before)`` in 3 x 3 against
  the speckled input, median and worst over the cell's points;
- wall-clock seconds.

The reference is the clean scene for white speckle, and for correlated speckle the clean
scene seen through the system, ``clean * |PSF|^2`` (the mean of the simulated speckle,
:func:`despeck.speckle.psf_intensity_kernel`): no despeckler can undo the system's blur.

Per cell: the best classical method (including bm3d-log) by PSNR, the model's margin over
it, and pass/fail against the targets: margin >= +1.0 dB, |bias| <= 0.1 dB, median point
change within 3 dB. Then the model's inference speed (MP/s) on a 2048 x 2048 1-look scene
with 2 threads (second of two runs), and the CPU model and flags (avx2, avx512f,
avx512_bf16, amx) and the load average (timings mean little on a busy machine).

Usage::

    python benchmarks/bench_starter.py [--model FILE] [--quick] [--size N] [--per-family K] [--orientations 8]

Writes ``bench_output/bench_starter_<model stem>.json`` (``_quick`` with ``--quick``) and
prints Markdown. The full run (384 x 384, two scenes per family) takes about 5 minutes on
two idle cores; ``--quick`` (192 x 192, one scene per family, four classical methods,
speed on 1024 x 1024) about one minute.
"""

from __future__ import annotations

import argparse
import importlib
import json
import math
import os
import pathlib
import sys
import time

import numpy as np
from scipy import ndimage

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "scripts"))

from despeck import filters, metrics  # noqa: E402
bm3d_log = importlib.import_module("despeck.filters.bm3d_log")  # the module, not the filter function of that name
from despeck.cpu import cpu_description  # noqa: E402
from despeck.cpu import PRECISION_NAMES, precision_of  # noqa: E402
from despeck.inference import despeckle_array, resolve_bf16  # noqa: E402
from despeck.models import ORIENTATIONS, load_model_file  # noqa: E402
from despeck.speckle import psf_intensity_kernel, simulate_correlated_intensity, simulate_intensity  # noqa: E402

FAMILIES = ("terrain", "fields", "urban", "wetland", "natural")
NATURAL_IMAGES = ("camera", "cat")
SYSTEM = {"oversampling": 1.25, "taper": "hamming"}
CONDITIONS = (
    {"name": "L1 white", "looks": 1.0, "correlated": False},
    {"name": "L1 corr", "looks": 1.0, "correlated": True},
    {"name": "L4 white", "looks": 4.0, "correlated": False},
    {"name": "L4.4 corr", "looks": 4.4, "correlated": True},
)
TARGETS = {"margin_db": 1.0, "abs_bias_db": 0.1, "abs_point_median_db": 3.0}
QUICK_CLASSICAL = ("lee", "refined-lee", "nonlocal")
SCENE_SEED = 9100
NOISE_SEED = 9500
FLAT_BLOCK, FLAT_CV = 16, 0.03
SPEED_SIZE, SPEED_THREADS = 2048, 2


# --------------------------------------------------------------------------- scenes

def flat_boxes(clean, block=FLAT_BLOCK, max_cv=FLAT_CV):
    """Non-overlapping ``block``-square boxes where the clean scene varies by less than ``max_cv``."""
    boxes = []
    for r in range(0, clean.shape[0] - block + 1, block):
        for c in range(0, clean.shape[1] - block + 1, block):
            b = clean[r : r + block, c : c + block].astype(np.float64)
            if b.std() < max_cv * b.mean():
                boxes.append((r, c, r + block, c + block))
    return boxes


def centre_crop(a, size):
    r0, c0 = max(0, (a.shape[0] - size) // 2), max(0, (a.shape[1] - size) // 2)
    return a[r0 : r0 + size, c0 : c0 + size]


def make_procedural(family, size, seed):
    try:
        from despeck.scene_families import make_family_scene
    except ImportError:  # before the scene families existed: one lowland generator for all
        from despeck.synthetic import make_scene

        clean, layout = make_scene((size, size), rng=seed, return_layout=True)
        return clean, layout.homogeneous_boxes, layout.points, "despeck.synthetic.make_scene (placeholder)"
    clean, layout = make_family_scene(family, (size, size), rng=seed, split="test", return_layout=True)
    return clean, layout.homogeneous_boxes, layout.points, "despeck.scene_families (test split)"


def scenes(family, size, count):
    """``(name, clean, boxes, points, source)`` for the family's held-out scenes."""
    if family == "natural":
        from make_training_references import grey_image, to_backscatter

        for name in NATURAL_IMAGES[:count]:
            clean = np.ascontiguousarray(centre_crop(to_backscatter(grey_image(name)), size))
            yield f"skimage-{name}", clean, flat_boxes(clean), [], "scikit-image (held out of training)"
        return
    for i in range(count):
        seed = SCENE_SEED + 10 * FAMILIES.index(family) + i
        clean, boxes, points, source = make_procedural(family, size, seed)
        yield f"{family}-{seed}", clean, list(boxes), list(points), source


def speckle(clean, condition, seed):
    """The speckled scene and the reference it should be compared with."""
    rng = np.random.default_rng(seed)
    if not condition["correlated"]:
        return simulate_intensity(clean, condition["looks"], rng=rng), clean
    noisy = simulate_correlated_intensity(clean, condition["looks"], rng=rng, **SYSTEM)
    seen = ndimage.convolve(clean.astype(np.float64), psf_intensity_kernel(**SYSTEM), mode="reflect")
    return noisy, seen.astype(np.float32)


# --------------------------------------------------------------------------- methods

def run_method(method, noisy, valid, condition, model):
    looks = condition["looks"]
    start = time.perf_counter()
    if method == "model" or method.startswith("model-o"):
        n = int(method[len("model-o"):]) if method != "model" else 1
        out = despeckle_array(noisy, model, valid=valid, progress=False, orientations=n)
    elif method == "bm3d-log":
        extra = SYSTEM if condition["correlated"] else {}
        out = bm3d_log.bm3d_log(noisy, looks=looks, mask=valid, **extra)
    else:
        out = filters.get_filter(method)(noisy, looks=looks, mask=valid)
    return np.asarray(out, dtype=np.float32), time.perf_counter() - start


def new_pool():
    return {"psnr": [], "ssim": [], "edge": [], "est_box": 0.0, "ref_box": 0.0, "in_box": 0.0, "points": [],
            "seconds": 0.0}


def measure(pool, reference, noisy, est, valid, boxes, points, seconds):
    ok = valid & np.isfinite(est) & (est > 0)
    fid = metrics.fidelity(reference, est, ok)
    pool["psnr"].append(fid["psnr_db"])
    pool["ssim"].append(fid["ssim_db"])
    pool["edge"].append(metrics.edge_correlation(reference, est, ok))
    for r0, c0, r1, c1 in boxes:
        pool["est_box"] += float(est[r0:r1, c0:c1].astype(np.float64).sum())
        pool["ref_box"] += float(reference[r0:r1, c0:c1].astype(np.float64).sum())
        pool["in_box"] += float(noisy[r0:r1, c0:c1].astype(np.float64).sum())
    if points:
        pool["points"] += [float(v) for v in metrics.point_retention_db(noisy, est, points)]
    pool["seconds"] += seconds


def summarise(pool):
    pts = np.array(pool["points"])
    return {
        "psnr_db": float(np.mean(pool["psnr"])),
        "ssim_db": float(np.mean(pool["ssim"])),
        "edge_corr": float(np.mean(pool["edge"])),
        "bias_db": float(10 * math.log10(pool["est_box"] / pool["ref_box"])) if pool["ref_box"] > 0 else None,
        "bias_vs_input_db": float(10 * math.log10(pool["est_box"] / pool["in_box"])) if pool["in_box"] > 0 else None,
        "points_median_db": float(np.median(pts)) if pts.size else None,
        "points_worst_db": float(np.min(pts)) if pts.size else None,
        "points": int(pts.size),
        "seconds": float(pool["seconds"]),
        "psnr_per_scene": [float(v) for v in pool["psnr"]],
    }


def verdict(model, best):
    margin = model["psnr_db"] - best["psnr_db"]
    checks = {"margin": margin >= TARGETS["margin_db"]}
    if model["bias_db"] is not None:
        checks["bias"] = abs(model["bias_db"]) <= TARGETS["abs_bias_db"]
    if model["points_median_db"] is not None:
        checks["points"] = abs(model["points_median_db"]) <= TARGETS["abs_point_median_db"]
    return margin, checks


# --------------------------------------------------------------------------- machine

def cpu_info():
    """The CPU (:func:`despeck.cpu.cpu_description`) and the load average at this moment."""
    info = cpu_description()
    try:  # other work on the machine slows every timing here
        info["load_average"] = [round(v, 2) for v in os.getloadavg()]
    except OSError:
        info["load_average"] = None
    return info


def inference_speed(model, size):
    clean = make_procedural("fields", size, SCENE_SEED + 99)[0]
    noisy = simulate_intensity(clean, 1.0, rng=np.random.default_rng(NOISE_SEED + 99))
    valid = np.ones(noisy.shape, dtype=bool)
    runs = []
    for _ in range(2):  # the first run also chooses the memory format on scenes >= 4 MP
        start = time.perf_counter()
        despeckle_array(noisy, model, valid=valid, threads=SPEED_THREADS, progress=False)
        runs.append(time.perf_counter() - start)
    return {"size": size, "threads": SPEED_THREADS, "seconds": runs,
            "mp_per_s": metrics.throughput_mps(noisy.size, runs[-1])}


# --------------------------------------------------------------------------- report

def fmt(v, spec):
    return "n/a" if v is None else format(v, spec)


def markdown(result):
    lines = []
    conds = [c["name"] for c in CONDITIONS]
    fams = result["families"]
    cells = result["cells"]
    lines.append(f"\nModel: `{result['model']}`; scenes {result['size']} x {result['size']}, "
                 f"{result['per_family']} per family; targets: model >= best classical + {TARGETS['margin_db']} dB, "
                 f"|bias| <= {TARGETS['abs_bias_db']} dB, |median point change| <= {TARGETS['abs_point_median_db']} dB.")

    def matrix(title, text):
        """A family x condition table under ``title``; ``text(cell)`` fills each entry."""
        lines.append(f"\n### {title}\n")
        lines.append("| family | " + " | ".join(conds) + " |")
        lines.append("|---|" + "---|" * len(conds))
        for fam in fams:
            lines.append(f"| {fam} | " + " | ".join(text(cells[f"{fam} / {c}"]) for c in conds) + " |")

    def margin(cell):
        failed = [k for k, ok in cell["pass"].items() if not ok]
        mark = "pass" if not failed else "FAIL " + ",".join(failed)
        return f"{cell['margin_db']:+.2f} vs {cell['best_classical']} ({mark})"

    def averaged_margin(m):
        def text(cell):
            s = cell["methods"][m]
            return (f"{cell[f'margin_{m}_db']:+.2f} (bias {fmt(s['bias_db'], '+.3f')}, points "
                    f"{fmt(s['points_median_db'], '+.1f')} / {fmt(s['points_worst_db'], '+.1f')})")
        return text

    matrix("Model margin over the best classical method (dB-domain PSNR)", margin)
    for m in result.get("averaged", []):
        matrix(f"{m} (the model averaged over {m[len('model-o'):]} orientations): margin over the best "
               "classical method", averaged_margin(m))
    lines.append("\n### Model and best classical per cell\n")
    lines.append("| cell | method | PSNR dB | SSIM | edge corr | bias dB vs reference (input's own) | bias dB vs input "
                 "| points median / worst dB | time s |")
    lines.append("|---|---|---|---|---|---|---|---|---|")
    for key, cell in cells.items():
        inp = cell["methods"]["input"]
        for m in ("model", *result.get("averaged", []), cell["best_classical"]):
            s = cell["methods"][m]
            lines.append(
                f"| {key} | {m} | {s['psnr_db']:.2f} | {s['ssim_db']:.3f} | {s['edge_corr']:.3f} | "
                f"{fmt(s['bias_db'], '+.3f')} ({fmt(inp['bias_db'], '+.3f')}) | {fmt(s['bias_vs_input_db'], '+.3f')} | "
                f"{fmt(s['points_median_db'], '+.1f')} / {fmt(s['points_worst_db'], '+.1f')} | {s['seconds']:.1f} |")
    for c in conds:
        lines.append(f"\n### PSNR dB-domain, {c}\n")
        lines.append("| method | " + " | ".join(fams) + " |")
        lines.append("|---|" + "---|" * len(fams))
        for m in result["methods"] + ["input"]:
            vals = [fmt(cells[f"{f} / {c}"]["methods"].get(m, {}).get("psnr_db"), ".2f") for f in fams]
            lines.append(f"| {m} | " + " | ".join(vals) + " |")
    sp, cpu = result.get("speed"), result["cpu"]
    if sp:
        lines.append(f"\nInference speed: {sp['mp_per_s']:.2f} MP/s on {sp['size']} x {sp['size']} with "
                     f"{sp['threads']} threads (runs: " + ", ".join(f"{s:.1f} s" for s in sp["seconds"]) + ")")
    flags = ", ".join(f"{k} {'yes' if v else 'no'}" for k, v in cpu["flags"].items())
    lines.append(f"CPU: {cpu['model']} ({cpu['machine']}, {cpu.get('cores_available')} cores available); {flags}; "
                 f"load average at the end {cpu.get('load_average')}; the model ran in "
                 f"{PRECISION_NAMES.get(result.get('model_precision'), 'an unrecorded precision')} "
                 "(apply's automatic choice on this machine)")
    failed = [k for k, cell in cells.items() if not all(cell["pass"].values())]
    lines.append(f"\nCells passing every target: {len(cells) - len(failed)} of {len(cells)}"
                 + (f"; failing: {', '.join(failed)}" if failed else ""))
    for note in result["notes"]:
        lines.append(f"Note: {note}")
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--model", default=str(ROOT / "despeck" / "weights" / "starter.safetensors"))
    parser.add_argument("--quick", action="store_true",
                        help="192 x 192, one scene per family, four classical methods, speed on 1024 x 1024")
    parser.add_argument("--size", type=int, default=None, help="scene side (default 384; quick 192)")
    parser.add_argument("--per-family", type=int, default=None, help="scenes per family (default 2; quick 1)")
    parser.add_argument("--no-speed", action="store_true", help="skip the inference-speed measurement")
    parser.add_argument("--orientations", type=int, choices=[n for n in ORIENTATIONS if n > 1], default=None,
                        help="also run the model averaged over this many orientations (method model-o4 / model-o8)")
    parser.add_argument("--out", default=None, help="JSON path (default bench_output/bench_starter_<model>.json)")
    args = parser.parse_args(argv)

    size = args.size or (192 if args.quick else 384)
    per_family = args.per_family or (1 if args.quick else 2)
    model = load_model_file(args.model)
    notes = []
    classical = [m for m in (QUICK_CLASSICAL if args.quick else filters.FILTERS) if m != "bm3d-log"]
    if bm3d_log.available():
        classical.append("bm3d-log")
    else:
        notes.append(f"bm3d-log left out: the optional bm3d package is not installed ({bm3d_log.INSTALL_HINT})")
    methods = classical + ["model"]
    averaged = [f"model-o{args.orientations}"] if args.orientations else []

    cells, sources = {}, {}
    t_all = time.perf_counter()
    # untimed warm-up: bm3d-log measures its mean correction once per condition, and the
    # first forward pass of the model pays for allocations
    if "bm3d-log" in classical:
        for cond in CONDITIONS:
            bm3d_log.calibration_factor(cond["looks"], **(SYSTEM if cond["correlated"] else {}))
    warm = simulate_intensity(np.ones((64, 64), np.float32), 1.0, rng=np.random.default_rng(0))
    despeckle_array(warm, model, valid=np.ones(warm.shape, dtype=bool), progress=False)
    print(f"warm-up {time.perf_counter() - t_all:.0f} s", flush=True)
    for fam in FAMILIES:
        family_scenes = list(scenes(fam, size, per_family))
        sources[fam] = sorted({s[4] for s in family_scenes}) + [s[0] for s in family_scenes]
        for ci, cond in enumerate(CONDITIONS):
            pools = {m: new_pool() for m in methods + averaged + ["input"]}
            for si, (name, clean, boxes, points, _) in enumerate(family_scenes):
                seed = NOISE_SEED + 1000 * ci + 10 * FAMILIES.index(fam) + si
                noisy, reference = speckle(clean, cond, seed)
                valid = np.isfinite(noisy) & (noisy > 0)
                measure(pools["input"], reference, noisy, noisy, valid, boxes, points, 0.0)
                for m in methods + averaged:
                    est, seconds = run_method(m, noisy, valid, cond, model)
                    measure(pools[m], reference, noisy, est, valid, boxes, points, seconds)
            summary = {m: summarise(p) for m, p in pools.items()}
            best = max(classical, key=lambda m: summary[m]["psnr_db"])
            margin, checks = verdict(summary["model"], summary[best])
            key = f"{fam} / {cond['name']}"
            cells[key] = {"family": fam, "condition": cond, "best_classical": best, "margin_db": margin,
                          "pass": checks, "methods": summary}
            for m in averaged:
                cells[key][f"margin_{m}_db"], cells[key][f"pass_{m}"] = verdict(summary[m], summary[best])
            print(f"{key}: model {summary['model']['psnr_db']:.2f} dB, best classical {best} "
                  f"{summary[best]['psnr_db']:.2f} dB, margin {margin:+.2f} dB, "
                  f"bias {fmt(summary['model']['bias_db'], '+.3f')} dB "
                  f"[{time.perf_counter() - t_all:.0f} s]", flush=True)

    speed = None if args.no_speed else inference_speed(model, 1024 if args.quick else SPEED_SIZE)
    result = {
        "model": str(args.model), "quick": bool(args.quick), "size": size, "per_family": per_family,
        "families": list(FAMILIES), "conditions": list(CONDITIONS), "system": SYSTEM, "methods": methods + averaged,
        "averaged": averaged,
        "targets": TARGETS, "scene_sources": sources, "cells": cells, "speed": speed, "cpu": cpu_info(),
        "model_precision": precision_of(resolve_bf16(model, None)),
        "seconds_total": time.perf_counter() - t_all, "notes": notes,
        "conventions": (
            "PSNR/SSIM in the dB domain against the reference (clean; clean * |PSF|^2 for correlated speckle), "
            "clipped to its 1st-99.9th percentile dB range; bias pooled over homogeneous boxes vs the reference; "
            "points: 3 x 3 peak after / before (speckled input); best classical by mean PSNR over the cell's scenes"
        ),
    }
    stem = pathlib.Path(args.model).stem
    out = pathlib.Path(args.out) if args.out else ROOT / "bench_output" / (
        f"bench_starter_{stem}" + ("_quick" if args.quick else "") + ".json")
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(json.dumps(result, indent=1))
    tmp.replace(out)
    print(markdown(result))
    print(f"\nwritten {out} ({result['seconds_total']:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
