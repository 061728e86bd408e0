"""Adapting a model file to one's own site: N minutes of fine-tuning on a pair of dates vs the model as is and vs N minutes from scratch.

The question: a user has two co-registered single-look acquisitions of
their site and no clean reference. What do N minutes of self-supervised training on that
pair (``data.pairs``, Noise2Noise-style: one date the input, the other the target) buy
when the training starts from the bundled starter model (``model.init: starter``),
compared with the starter as it is, with N minutes of the same training from a random
initialisation (same architecture, same data, same budget, same threads), and with the
classical filters?

The site is invented: the *Ormsund Mire*, an imaginary bog-and-farmland basin imaged by
an imaginary C-band radar ("Skua-C") whose single-look products are oversampled by 1.3
with a Hamming spectral taper on both axes, so their speckle is spatially correlated.
The site holds two areas, drawn by :func:`despeck.scene_families.make_family_scene`
with the test split (parameter ranges never trained on): a ``wetland`` scene (a family
the starter never saw) and a ``fields`` scene, each ``size + holdout`` rows by ``size``
columns, on an invented local survey grid.

* **The user's data.** Two dates of the top ``size`` x ``size`` of each area, each with
  independent correlated 1-look speckle
  (:func:`despeck.speckle.simulate_correlated_intensity`, oversampling 1.3, Hamming),
  written as float32 GeoTIFFs in the work folder; the training runs see only these
  files (no clean reference). ``--slc`` adds one single-look complex acquisition of each
  area (:func:`despeck.speckle.simulate_correlated_slc`, the same system, complex64
  GeoTIFF) and two more runs on its two azimuth sub-looks (``data.slc``; fine-tuned and
  from scratch).
* **Training.** Through the public API as ``despeck train`` does it: a YAML config
  written to the work folder, :func:`despeck.training.load_config`, then
  :func:`despeck.training.train`. The network is the model file's architecture
  (:func:`despeck.models.read_model_metadata`; ``unet-s`` or ``unet-cond-s`` for the
  starters so far) with its ``log_scale`` and point-keeping setting; loss ``mse_log``
  with target ``noisy`` and ``speckle.looks: 1`` as in ``configs/pairs.yaml``;
  ``budget.max_time: N m``; patches 64 x 64 in batches of 16; validation on the bottom
  15 % of rows of every pair; the best checkpoint by validation loss is exported. The
  change test between the dates runs at the false-alarm rate of ``configs/pairs.yaml``
  (0.01); it counts the independent samples of the measured speckle correlation
  (:func:`despeck.change.correlated_window_factor`), so the unchanged pair keeps about
  99 % of its pixels (the fractions flagged are in the report; ``--change-false-alarm``).
  Learning rate 1e-3 from scratch (``configs/pairs.yaml``) and 3e-4 for fine-tuning
  (a lower rate keeps the first Adam steps from undoing the pretrained weights; common
  practice); both can be changed (``--lr-scratch``, ``--lr-finetune``).
* **Evaluation.** A third date of the whole site with fresh speckle of the same system,
  in two parts: the *held-out area* (the bottom ``holdout`` rows of each area, never in
  the training files) and the *trained area, new date* (the top ``size`` rows: the same
  ground as the pair, new speckle -- what a user processes after adapting a model to
  the site). Per part, pooled over the two areas: PSNR and SSIM in the dB domain
  (:func:`despeck.metrics.fidelity`), radiometric bias ``10 log10(sum estimate / sum
  reference)`` over the layout's homogeneous boxes, and the peak change of isolated
  point targets (3 x 3, median and worst). The reference is the clean scene seen
  through the system, ``clean * |PSF|^2`` (:func:`despeck.speckle.psf_intensity_kernel`):
  no despeckler can undo the system's blur. These measures are those of
  ``benchmarks/bench_starter.py`` (its functions are reused).
* **Radiometry over several draws.** On one draw the bias on the boxes is mostly the
  speckle sample: the input's own reads -0.13 dB on the two boxes of the quick
  held-out area, and a model's follows its scene's measured speckle correlation, which
  scatters by a few hundredths between scenes. The bias is therefore also pooled over
  ``--bias-draws`` (default 4) independent draws of the evaluation date (the first is
  the one above), with its standard error over the draws and the draw furthest from 0;
  bm3d-log joins the further draws only with ``--bias-draws-bm3d``.
* **Methods.** The classical filters ``lee``, ``refined-lee`` and ``improved-sigma`` with
  the true looks (1) and default windows, ``bm3d-log`` given the system (when the
  optional ``bm3d`` package is installed), and every model through
  ``despeck.inference.despeckle_array(noisy, model, valid=valid)`` with nothing else
  (the default user path: the model works out looks and correlation itself).

Usage::

    python benchmarks/bench_finetune.py [--minutes 30] [--model FILE] [--slc] [--threads 2] [--bias-draws 4] [--out bench_output]
    python benchmarks/bench_finetune.py --quick --threads 1    # 256 x 256 areas, 0.5-minute budgets
    python benchmarks/bench_finetune.py --parallel 2 --threads 1   # two runs at once, one core each
    python benchmarks/bench_finetune.py --slc --no-pairs --parallel 2 --threads 1   # only the sub-look runs

The full run trains twice for ``--minutes`` (four times with ``--slc``) and then
evaluates every method on 2 x 1024 x 768 pixels (bm3d-log takes most of that);
``--quick`` took 90 s with one thread on a busy two-core machine. Writes ``bench_output/bench_finetune.json``
(``bench_finetune_quick.json`` with ``--quick``) and prints Markdown; the site files,
configs, runs and models stay in ``bench_output/bench_finetune[_quick]_work/`` (remade
on every run).

References
----------
Lehtinen, J. et al. (2018). Noise2Noise: learning image restoration without clean
data. ICML 2018, arXiv:1803.04189 (training on pairs of independent noisy views).
"""

from __future__ import annotations

import argparse
import importlib
import json
import math
import pathlib
import shutil
import sys
import time

import numpy as np
import rasterio
import yaml
from rasterio.crs import CRS
from rasterio.transform import from_origin
from scipy import ndimage

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

import bench_starter  # noqa: E402  (the measures and the CPU description of the starter benchmark)

from despeck import filters  # noqa: E402
bm3d_log = importlib.import_module("despeck.filters.bm3d_log")  # the module, not the filter function of that name
from despeck.inference import despeckle_array  # noqa: E402
from despeck.models import bundled_model_path, load_model_file, read_model_metadata  # noqa: E402
from despeck.scene_families import make_family_scene  # noqa: E402
from despeck.speckle import psf_intensity_kernel, simulate_correlated_intensity, simulate_correlated_slc  # noqa: E402
from despeck.training import load_config, train  # noqa: E402

SITE = "Ormsund Mire (fictional), imaginary C-band radar 'Skua-C', single-look"
SITE_AREAS = ("wetland", "fields")
SYSTEM = {"oversampling": 1.3, "taper": "hamming"}
LOOKS = 1.0
CLASSICAL = ("lee", "refined-lee", "improved-sigma")
SCENE_SEED = 9800   # test split; bench_starter uses 9100 and up, training scenes [0, 3, i]
NOISE_SEED = 9900
BIAS_SEED = 9950    # the further draws of the evaluation date for the bias (--bias-draws)
PIXEL = 10.0
ORIGIN = (731000.0, 5204000.0)  # invented local grid, not a real projection
GRID = CRS.from_wkt('LOCAL_CS["Ormsund Mire survey grid (fictional)",UNIT["metre",1],'
                    'AXIS["Easting",EAST],AXIS["Northing",NORTH]]')
MARKER = ".bench_finetune"
# The pairs' change test (despeck.change.change_mask) assumes uncorrelated speckle:
# on this site's correlated speckle its default rate 0.01 flags about 45 % of the unchanged
# pair (40 % on a constant scene); at 1e-6 about 2.5 % (see the module notes).
CHANGE_FALSE_ALARM = 0.01
PARTS = ("held-out area", "trained area, new date")


# --------------------------------------------------------------------------- the site

def write_geotiff(path, array, description, dtype):
    """One-band GeoTIFF on the site grid, written to a temporary name and renamed."""
    path = pathlib.Path(path)
    tmp = path.with_name(path.name + ".tmp")
    h, w = array.shape
    with rasterio.open(tmp, "w", driver="GTiff", width=w, height=h, count=1, dtype=dtype, crs=GRID,
                       transform=from_origin(*ORIGIN, PIXEL, PIXEL), tiled=True, blockxsize=256,
                       blockysize=256, compress="deflate") as dst:
        dst.write(array.astype(dtype), 1)
        dst.set_band_description(1, description)
    tmp.replace(path)
    return path


def crop_layout(boxes, points, r0, r1):
    """Boxes lying wholly in rows [r0, r1) and points at least 1 pixel inside them, shifted to the crop."""
    b = [(a - r0, c, e - r0, d) for a, c, e, d in boxes if a >= r0 and e <= r1]
    p = [(r - r0, c) for r, c in points if r0 + 1 <= r < r1 - 1]
    return b, p


def make_site(work, size, holdout, slc):
    """Write the user's files; return the evaluation scenes and the file lists."""
    kernel = psf_intensity_kernel(**SYSTEM)
    pairs, slcs, evaluation = [], [], {part: [] for part in PARTS}
    for i, fam in enumerate(SITE_AREAS):
        clean, layout = make_family_scene(fam, (size + holdout, size), rng=SCENE_SEED + i, split="test",
                                          return_layout=True)
        reference = ndimage.convolve(clean.astype(np.float64), kernel, mode="reflect").astype(np.float32)
        dates = [simulate_correlated_intensity(clean, LOOKS, rng=np.random.default_rng(NOISE_SEED + 10 * i + d),
                                               **SYSTEM) for d in range(3)]
        files = []
        for d in range(2):
            files.append(str(write_geotiff(work / f"ormsund_{fam}_date{d + 1}.tif", dates[d][:size],
                                           f"VV intensity, date {d + 1} (simulated)", "float32")))
        pairs.append(files)
        if slc:
            z = simulate_correlated_slc(clean, rng=np.random.default_rng(NOISE_SEED + 10 * i + 5), **SYSTEM)
            slcs.append(str(write_geotiff(work / f"ormsund_{fam}_slc.tif", z[:size],
                                          "VV single-look complex (simulated)", "complex64")))
        third = dates[2]
        for part, (r0, r1) in zip(PARTS, ((size, size + holdout), (0, size))):
            boxes, points = crop_layout(layout.homogeneous_boxes, layout.points, r0, r1)
            evaluation[part].append({"name": f"{fam}-{SCENE_SEED + i}", "noisy": third[r0:r1],
                                     "reference": reference[r0:r1], "boxes": boxes, "points": points,
                                     "area": i, "clean": clean, "rows": (r0, r1)})
    return pairs, slcs, evaluation


def extra_date(scene, draw):
    """Draw ``draw`` (>= 1) of the evaluation date of ``scene``'s area: fresh speckle of the same system."""
    key = (scene["area"], draw)
    if key not in _EXTRA_DATES:
        rng = np.random.default_rng([BIAS_SEED, scene["area"], draw])
        _EXTRA_DATES[key] = simulate_correlated_intensity(scene["clean"], LOOKS, rng=rng, **SYSTEM)
    r0, r1 = scene["rows"]
    return _EXTRA_DATES[key][r0:r1]


_EXTRA_DATES = {}


# --------------------------------------------------------------------------- training

def training_config(*, run_dir, arch, norm, init, lr, minutes, threads, quick, change_false_alarm, pairs=(), slc=()):
    return {
        "data": {
            "pairs": [list(p) for p in pairs],
            "slc": list(slc),
            "units": "intensity" if pairs else None,
            "change_window": 7, "change_false_alarm": change_false_alarm,
            "sublooks": 2, "split_axis": "azimuth",
            "slc_oversampling": SYSTEM["oversampling"], "slc_taper": SYSTEM["taper"],
            "patch_size": 32 if quick else 64,
            "batch_size": 8 if quick else 16,
            "patches_per_epoch": 64 if quick else 512,
            "val_patches": 16 if quick else 64,
            "val_fraction": 0.3 if quick else 0.15,
        },
        "model": {
            "name": arch["name"], "kwargs": dict(arch.get("kwargs") or {}),
            "log_scale": float(norm.get("log_scale", 2.0)),
            "point_false_alarm": norm.get("point_false_alarm", 1e-4),
            "init": init,
        },
        "speckle": {"looks": LOOKS},
        "loss": {"name": "mse_log", "target": "noisy"},
        "optim": {"lr": lr, "schedule": "plateau", "plateau_patience": 6},
        "budget": {"max_time": f"{minutes:g}m", "early_stopping": 0},
        "trainer": {"seed": 0, "threads": threads, "progress": False},
        "output": {"dir": str(run_dir)},
    }


def run_training(work, name, cfg):
    path = work / f"config_{name}.yaml"
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    config = load_config(path)
    start = time.perf_counter()
    result = train(config, progress=False)
    seconds = time.perf_counter() - start
    info = {"config": str(path), "model": str(result.model_path), "seconds": seconds, "epochs": result.epochs,
            "steps": result.steps, "stopped_by": result.stopped_by, "lr": cfg["optim"]["lr"],
            "init": cfg["model"]["init"],
            "best_validation": {k: v for k, v in result.best_metrics.items()
                                if isinstance(v, (int, float)) and math.isfinite(v)},
            # what the trainer read: looks, measured speckle correlation, pixels flagged as changed
            "data": read_model_metadata(result.model_path).get("training", {}).get("data", {}),
            # the conditions the bias table was calibrated at (despeck.training.calibration)
            "calibration": read_model_metadata(result.model_path).get("training", {}).get("calibration")}
    print(f"trained {name}: {result.epochs} epochs, {result.steps} steps in {seconds:.0f} s "
          f"(stopped by {result.stopped_by}); model {result.model_path}", flush=True)
    return info


# --------------------------------------------------------------------------- evaluation

def apply_method(method, noisy, valid, models, threads):
    start = time.perf_counter()
    if method in models:
        out = despeckle_array(noisy, models[method], valid=valid, threads=threads, progress=False)
    elif method == "bm3d-log":
        out = bm3d_log.bm3d_log(noisy, looks=LOOKS, mask=valid, **SYSTEM)
    else:
        out = filters.get_filter(method)(noisy, looks=LOOKS, mask=valid)
    return np.asarray(out, dtype=np.float32), time.perf_counter() - start


def box_sums(est, noisy, reference, boxes):
    """``[sum estimate, sum reference, sum input]`` over the homogeneous boxes."""
    out = np.zeros(3)
    for r0, c0, r1, c1 in boxes:
        out += [float(a[r0:r1, c0:c1].astype(np.float64).sum()) for a in (est, reference, noisy)]
    return out


def draws_bias(per_draw):
    """Bias pooled over draws (dB, vs reference and vs input) and its standard error over the draws."""
    a = np.asarray(per_draw)  # (draws, 3): estimate, reference, input sums
    if a.size == 0 or a[:, 1].sum() <= 0:
        return {}
    per = 10 * np.log10(a[:, 0] / a[:, 1])
    per_input = 10 * np.log10(a[:, 0] / a[:, 2])

    def se(v):
        return float(v.std(ddof=1) / math.sqrt(len(v))) if len(v) > 1 else None

    return {"bias_draws_db": float(10 * math.log10(a[:, 0].sum() / a[:, 1].sum())),
            "bias_draws_vs_input_db": float(10 * math.log10(a[:, 0].sum() / a[:, 2].sum())),
            "bias_draws_se_db": se(per), "bias_draws_vs_input_se_db": se(per_input),
            "bias_draws_worst_db": float(per[np.argmax(np.abs(per))]),
            "bias_draws_per_draw_db": [round(float(v), 4) for v in per],
            "bias_draws_vs_input_per_draw_db": [round(float(v), 4) for v in per_input],
            "bias_draws": int(len(per))}


def evaluate(evaluation, methods, models, threads, bias_draws=1, bm3d_draws=False):
    """PSNR, SSIM, points and bias on the evaluation date; the bias also over ``bias_draws`` draws of it.

    bm3d-log (minutes per draw) takes part in the further draws only with ``bm3d_draws``;
    otherwise its pooled bias is that of the first draw alone.
    """
    def skip(m, d):
        return d > 0 and m == "bm3d-log" and not bm3d_draws

    results = {}
    for part, scenes in evaluation.items():
        pools = {m: bench_starter.new_pool() for m in ["input"] + methods}
        draws = {m: [] for m in ["input"] + methods}
        for d in range(bias_draws):
            sums = {m: np.zeros(3) for m in draws}
            for s in scenes:
                reference = s["reference"]
                noisy = s["noisy"] if d == 0 else extra_date(s, d)
                valid = np.isfinite(noisy) & (noisy > 0)
                sums["input"] += box_sums(noisy, noisy, reference, s["boxes"])
                if d == 0:
                    bench_starter.measure(pools["input"], reference, noisy, noisy, valid, s["boxes"], s["points"], 0.0)
                for m in methods:
                    if skip(m, d):
                        continue
                    est, seconds = apply_method(m, noisy, valid, models, threads)
                    sums[m] += box_sums(est, noisy, reference, s["boxes"])
                    if d == 0:
                        bench_starter.measure(pools[m], reference, noisy, est, valid, s["boxes"], s["points"], seconds)
            for m in draws:
                if sums[m][1] > 0 and not skip(m, d):
                    draws[m].append(sums[m])
        results[part] = {m: {**bench_starter.summarise(p), **draws_bias(draws[m])} for m, p in pools.items()}
        results[part]["_boxes"] = sum(len(s["boxes"]) for s in scenes)
        print(f"evaluated {part}: " + ", ".join(f"{m} {results[part][m]['psnr_db']:.2f} dB" for m in methods),
              flush=True)
    return results


# --------------------------------------------------------------------------- report

def gains(results, classical, tuned_name, starter_name, scratch_name):
    out = {}
    for part in PARTS:
        r = results[part]
        best = max(classical, key=lambda m: r[m]["psnr_db"])
        out[part] = {
            "over_starter_db": r[tuned_name]["psnr_db"] - r[starter_name]["psnr_db"],
            "over_scratch_db": r[tuned_name]["psnr_db"] - r[scratch_name]["psnr_db"],
            "best_classical": best,
            "over_best_classical_db": r[tuned_name]["psnr_db"] - r[best]["psnr_db"],
            "starter_over_best_classical_db": r[starter_name]["psnr_db"] - r[best]["psnr_db"],
            "scratch_over_best_classical_db": r[scratch_name]["psnr_db"] - r[best]["psnr_db"],
        }
    return out


def calibration_cell(calibration):
    """The site conditions of a model's bias table, one short cell."""
    if not calibration or not calibration.get("site_conditions"):
        return "n/a"
    sites = calibration["site_conditions"]
    told = np.mean([s["told_correlation_lag1"] for s in sites])
    speckle = np.mean([s["speckle_correlation_lag1"] for s in sites])
    bands = ", ".join(f"{lo:.2f}-{hi:.2f}" for lo, hi in calibration.get("site_bands", []))
    return f"{told:.3f} / {speckle:.3f}, {bands}"


def markdown(result):
    fmt = bench_starter.fmt
    parallel = result.get("parallel", 1)
    at_once = "" if parallel == 1 else f", {parallel} runs at once"
    lines = [f"\nSite: {SITE}; speckle oversampling {SYSTEM['oversampling']}, {SYSTEM['taper']} taper, "
             f"{LOOKS:g} look. Model file `{result['model']}` ({result['architecture']['name']}); "
             f"training budget {result['minutes']:g} min each, {result['threads']} threads{at_once}; "
             f"areas {', '.join(SITE_AREAS)}, {result['size']} x {result['size']} trained "
             f"+ {result['holdout']} x {result['size']} held out each."]
    head = "| method | " + " | ".join(f"{p}: PSNR dB | SSIM | bias dB | points median / worst dB" for p in PARTS) + " |"
    boxes = result["homogeneous_boxes"]
    lines += ["\n### Own-site evaluation (dB-domain PSNR/SSIM vs clean * |PSF|^2; bias on homogeneous boxes: "
              + ", ".join(f"{boxes[p]} in the {p}" for p in PARTS) + ")\n",
              head, "|---|" + "---|---|---|---|" * len(PARTS)]
    for m in ["input"] + result["methods"]:
        cells = []
        for p in PARTS:
            s = result["evaluation"][p][m]
            cells.append(f"{s['psnr_db']:.2f} | {s['ssim_db']:.3f} | {fmt(s['bias_db'], '+.3f')} | "
                         f"{fmt(s['points_median_db'], '+.1f')} / {fmt(s['points_worst_db'], '+.1f')}")
        lines.append(f"| {m} | " + " | ".join(cells) + " |")
    draws = result.get("bias_draws", 1)
    if draws > 1:
        bm3d_note = "" if result.get("bias_draws_bm3d") else "; bm3d-log: the first draw only"
        lines += [f"\n### Radiometric bias pooled over {draws} draws of the evaluation date (dB on the homogeneous "
                  f"boxes vs clean * |PSF|^2, +- standard error over the draws; vs the input's own mean; the draw "
                  f"furthest from 0{bm3d_note})\n",
                  "| method | " + " | ".join(f"{p}: bias dB | vs input | furthest draw" for p in PARTS) + " |",
                  "|---|" + "---|---|---|" * len(PARTS)]
        for m in ["input"] + result["methods"]:
            cells = []
            for p in PARTS:
                s = result["evaluation"][p][m]
                se, se_in = s.get("bias_draws_se_db"), s.get("bias_draws_vs_input_se_db")
                cells.append(f"{fmt(s.get('bias_draws_db'), '+.3f')}" + (f" +- {se:.3f}" if se is not None else "")
                             + f" | {fmt(s.get('bias_draws_vs_input_db'), '+.3f')}"
                             + (f" +- {se_in:.3f}" if se_in is not None and m != "input" else "")
                             + f" | {fmt(s.get('bias_draws_worst_db'), '+.3f')}")
            lines.append(f"| {m} | " + " | ".join(cells) + " |")
    lines.append("\n### Gains of fine-tuning (dB-domain PSNR)\n")
    lines.append("| runs | part | fine-tuned - model as is | fine-tuned - scratch | fine-tuned - best classical "
                 "| model as is - best classical | scratch - best classical |")
    lines.append("|---|---|---|---|---|---|---|")
    for source, g in result["gains"].items():
        for p in PARTS:
            x = g[p]
            lines.append(f"| {source} | {p} | {x['over_starter_db']:+.2f} | {x['over_scratch_db']:+.2f} | "
                         f"{x['over_best_classical_db']:+.2f} ({x['best_classical']}) | "
                         f"{x['starter_over_best_classical_db']:+.2f} | {x['scratch_over_best_classical_db']:+.2f} |")
    lines.append("\n### Training runs\n")
    lines.append("| run | init | lr | epochs | steps | stopped by | wall s | best epoch: validation ENL, bias dB "
                 "| pixels flagged as changed | bias table: lag-1 correlation told / of the speckle, band |")
    lines.append("|---|---|---|---|---|---|---|---|---|---|")
    for name, t in result["training"].items():
        v = t["best_validation"]
        flagged = [s["changed_fraction"] for s in t["data"].get("pairs", []) if "changed_fraction" in s]
        lines.append(f"| {name} | {t['init'] or 'random'} | {t['lr']:g} | {t['epochs']} | {t['steps']} | "
                     f"{t['stopped_by']} | {t['seconds']:.0f} | {fmt(v.get('epoch'), '.0f')}: "
                     f"{fmt(v.get('val_enl'), '.1f')}, {fmt(v.get('val_bias_db'), '+.3f')} | "
                     + (", ".join(f"{100 * f:.1f} %" for f in flagged) or "n/a") + " | "
                     + calibration_cell(t.get("calibration")) + " |")
    cpu = result["cpu"]
    flags = ", ".join(f"{k} {'yes' if v else 'no'}" for k, v in cpu["flags"].items())
    lines.append(f"\nCPU: {cpu['model']} ({cpu['machine']}, {cpu.get('cores_available')} cores available); {flags}; "
                 f"load average at the end {cpu.get('load_average')}")
    for note in result["notes"]:
        lines.append(f"Note: {note}")
    return "\n".join(lines)


def prepare_work(work: pathlib.Path):
    """An empty work folder: remade if it holds this benchmark's marker, refused if it holds anything else."""
    if work.exists():
        if not (work / MARKER).is_file():
            sys.exit(f"bench_finetune: error: {work} exists and was not made by this benchmark; "
                     "remove it or choose another --out")
        shutil.rmtree(work)
    work.mkdir(parents=True)
    (work / MARKER).write_text("made by benchmarks/bench_finetune.py; removed on its next run\n")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--minutes", type=float, default=None, help="training budget of each run (default 30; quick 0.5)")
    parser.add_argument("--quick", action="store_true", help="256 x 256 areas, small patches, 0.5-minute budgets")
    parser.add_argument("--model", default=None, help="model file to fine-tune (default: the bundled starter)")
    parser.add_argument("--slc", action="store_true", help="also fine-tune and train from scratch on SLC sub-looks")
    parser.add_argument("--no-pairs", action="store_true",
                        help="with --slc: train only the two sub-look runs, not the two pair runs")
    parser.add_argument("--size", type=int, default=None, help="side of each trained area (default 768; quick 256)")
    parser.add_argument("--threads", type=int, default=2, help="torch threads for training and inference (default 2)")
    parser.add_argument("--lr-finetune", type=float, default=3e-4)
    parser.add_argument("--lr-scratch", type=float, default=1e-3)
    parser.add_argument("--change-false-alarm", type=float, default=CHANGE_FALSE_ALARM,
                        help=f"data.change_false_alarm of the pair runs (default {CHANGE_FALSE_ALARM:g}; "
                             "configs/pairs.yaml has 0.01, see the module notes)")
    parser.add_argument("--bias-draws", type=int, default=4,
                        help="draws of the evaluation date the radiometric bias is pooled over (default 4)")
    parser.add_argument("--bias-draws-bm3d", action="store_true",
                        help="run bm3d-log on every draw too (default: on the first; it takes minutes per draw)")
    parser.add_argument("--parallel", type=int, default=1,
                        help="training runs at once, each in its own process with --threads threads (default 1: "
                             "one after the other); on two cores, --parallel 2 --threads 1 trains both pair runs "
                             "in one budget of wall time, each on its own core")
    parser.add_argument("--out", default=str(ROOT / "bench_output"), help="output folder (default bench_output/)")
    args = parser.parse_args(argv)
    if args.parallel < 1:
        parser.error(f"--parallel must be at least 1, got {args.parallel}")
    if args.no_pairs and not args.slc:
        parser.error("--no-pairs leaves no training run without --slc")
    if args.bias_draws < 1:
        parser.error(f"--bias-draws must be at least 1, got {args.bias_draws}")

    minutes = args.minutes if args.minutes is not None else (0.5 if args.quick else 30.0)
    size = args.size or (256 if args.quick else 768)
    holdout = max(64, size // 3 // 32 * 32)
    bundled = bundled_model_path()
    model_path = pathlib.Path(args.model) if args.model else bundled
    init = "starter" if model_path.resolve() == bundled.resolve() else str(model_path.resolve())
    meta = read_model_metadata(model_path)
    arch, norm = meta["architecture"], meta.get("normalisation", {})
    cpu = bench_starter.cpu_info()
    print(f"CPU: {cpu['model']} ({cpu['machine']}); flags: "
          + ", ".join(k for k, v in cpu["flags"].items() if v) + f"; load average {cpu.get('load_average')}")
    print(f"model {model_path} ({arch['name']} {arch.get('kwargs')}); budget {minutes:g} min per run, "
          f"{args.threads} threads", flush=True)

    out = pathlib.Path(args.out).resolve()  # the configs written below name files relative to themselves
    work = out / ("bench_finetune" + ("_quick" if args.quick else "") + "_work")
    prepare_work(work)
    t_all = time.perf_counter()
    pairs, slcs, evaluation = make_site(work, size, holdout, args.slc)
    print(f"site written to {work} [{time.perf_counter() - t_all:.0f} s]", flush=True)

    common = dict(arch=arch, norm=norm, minutes=minutes, threads=args.threads, quick=args.quick,
                  change_false_alarm=args.change_false_alarm)
    runs = {}
    if not args.no_pairs:
        runs["fine-tuned (pairs)"] = dict(init=init, lr=args.lr_finetune, pairs=pairs)
        runs["scratch (pairs)"] = dict(init=None, lr=args.lr_scratch, pairs=pairs)
    if args.slc:
        runs["fine-tuned (sub-looks)"] = dict(init=init, lr=args.lr_finetune, slc=slcs)
        runs["scratch (sub-looks)"] = dict(init=None, lr=args.lr_scratch, slc=slcs)
    jobs = [(work, f"run{i}", training_config(run_dir=work / f"run{i}", **common, **kw))
            for i, kw in enumerate(runs.values())]
    if args.parallel == 1:
        infos = [run_training(*job) for job in jobs]
    else:  # spawned processes: each sets its own torch threads; data workers may start below them
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(args.parallel, mp_context=multiprocessing.get_context("spawn")) as pool:
            infos = list(pool.map(run_training, *zip(*jobs)))
    training = dict(zip(runs, infos))

    as_is = "starter as is" if init == "starter" else "model as is"
    models = {as_is: load_model_file(model_path)}
    models.update({name: load_model_file(t["model"]) for name, t in training.items()})
    notes = []
    classical = list(CLASSICAL)
    if bm3d_log.available():
        classical.append("bm3d-log")
        bm3d_log.calibration_factor(LOOKS, **SYSTEM)  # untimed: measured once per condition
    else:
        notes.append(f"bm3d-log left out: the optional bm3d package is not installed ({bm3d_log.INSTALL_HINT})")
    methods = classical + list(models)
    results = evaluate(evaluation, methods, models, args.threads, bias_draws=args.bias_draws,
                       bm3d_draws=args.bias_draws_bm3d)
    boxes = {p: results[p].pop("_boxes") for p in PARTS}
    for p in PARTS:
        if not boxes[p]:
            notes.append(f"{p}: no homogeneous box of the layout lies wholly inside it; no bias figure")
    sources = {} if args.no_pairs else {"pairs": ("fine-tuned (pairs)", "scratch (pairs)")}
    if args.slc:
        sources["sub-looks"] = ("fine-tuned (sub-looks)", "scratch (sub-looks)")
    result = {
        "site": SITE, "system": SYSTEM, "looks": LOOKS, "areas": list(SITE_AREAS), "split": "test",
        "scene_seeds": [SCENE_SEED + i for i in range(len(SITE_AREAS))], "noise_seed": NOISE_SEED,
        "model": str(model_path), "init": init, "architecture": arch, "quick": bool(args.quick),
        "minutes": minutes, "threads": args.threads, "parallel": args.parallel, "size": size, "holdout": holdout,
        "homogeneous_boxes": boxes, "methods": methods, "training": training, "evaluation": results,
        "bias_draws": args.bias_draws, "bias_draws_bm3d": bool(args.bias_draws_bm3d),
        "gains": {src: gains(results, classical, tuned, as_is, scratch)
                  for src, (tuned, scratch) in sources.items()},
        "cpu": bench_starter.cpu_info(), "seconds_total": time.perf_counter() - t_all, "notes": notes,
        "conventions": ("PSNR/SSIM in the dB domain against clean * |PSF|^2, clipped to its 1st-99.9th percentile "
                        "dB range, mean over the areas; bias pooled over the layout's homogeneous boxes; points: "
                        "3 x 3 peak after / before (speckled input); models applied with "
                        "despeckle_array(noisy, model, valid=valid)"),
        "work": str(work),
    }
    json_path = out / ("bench_finetune" + ("_quick" if args.quick else "") + ".json")
    tmp = json_path.with_name(json_path.name + ".tmp")
    tmp.write_text(json.dumps(result, indent=1))
    tmp.replace(json_path)
    print(markdown(result))
    print(f"\nwritten {json_path} ({result['seconds_total']:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
