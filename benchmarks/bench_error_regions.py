"""Where a model wins and loses against a classical filter: its error split by region and by scale.

For every cell of ``bench_starter.py``'s matrix (the same held-out scenes, speckle and
seeds), the squared dB-domain error of the model (default path, as ``bench_starter.py``
runs it) and of one classical method (``--against``, default log-domain BM3D when the
optional ``bm3d`` package is installed, else the refined Lee filter) is split two ways:

- **by region** of the clean reference (:func:`despeck.metrics.reference_regions`, as
  ``despeck bench`` reports them): ``flat`` (the homogeneous boxes ``bench_starter.py``
  measures the bias on), ``edges`` (pixels within 2 pixels of a step of more than 2 dB
  between neighbours of the reference after a 5 x 5 median, which keeps boundaries and
  point targets and removes pixel-scale texture) and ``texture`` (the rest: parcels with
  rows or clutter, slopes, natural-image detail);
- **by scale**: the error image cut into bands by differences of Gaussian low-passes
  (sigma 1, 2, 4 and 8 pixels: finer than 1 pixel, 1-2, 2-4, 4-8, coarser than 8), whose
  mean squares add up to the total but for small cross terms (common practice in
  multi-scale image analysis; Burt & Adelson 1983, "The Laplacian pyramid as a compact
  image code", IEEE Trans. Communications 31(4), 532-540).

Per region and band the table gives the gain ``10 log10(mse_against / mse_model)`` in dB
(positive: the model is better there) and, per region, its share of the pixels and its
part of the difference in mean squared error over the scene (dB², positive where the
model loses; the parts add up to the whole scene's). Beside them, the scene's total
intensity after each method against the reference's, ``10 log10(sum estimate / sum
reference)`` over all valid pixels: the radiometry of the whole scene, bright scatterers
included, which a dB-domain PSNR does not weigh (the input's own value beside it), and
each region's intensity after each method against the input's on the same pixels. The error is taken
over valid pixels with both estimates clipped to the reference's 1st-99.9th percentile dB
range, as :func:`despeck.metrics.fidelity` does for PSNR.

A figure shows the cell where the model does worst against the method: reference, input,
both estimates and the map of where each is better (difference of squared errors,
smoothed over 3 pixels).

Usage::

    python benchmarks/bench_error_regions.py [--model FILE] [--against METHOD] [--split train] [--size N] [--per-family K]

``--split train`` draws the same seeds from the training split's parameter ranges (new
scenes, not training images; terrain, fields and urban): where the model also loses
there, the loss is a limit of the network rather than a failure to generalise.

Writes ``bench_output/error_regions_<model stem>.json``, ``.md`` and ``.png``; about 3
minutes on two idle cores with BM3D.
"""

from __future__ import annotations

import argparse
import json
import pathlib
import sys
import time

import numpy as np
from scipy import ndimage

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

import bench_starter as matrix  # noqa: E402  (the held-out scenes, speckle and methods)

from despeck import metrics  # noqa: E402
from despeck.models import load_model_file  # noqa: E402
from despeck.scene_families import TRAINING_FAMILIES as TRAIN_SPLIT_FAMILIES  # noqa: E402

REGIONS = metrics.REGION_NAMES
BAND_SIGMAS = (1, 2, 4, 8)
BAND_NAMES = ("<1 px", "1-2 px", "2-4 px", "4-8 px", ">8 px")


def region_masks(reference, boxes):
    """``{region: bool mask}`` of the clean reference (:func:`despeck.metrics.reference_regions`, flat = the boxes)."""
    flat = metrics.areas_from_boxes(boxes, reference.shape) if boxes else None
    return metrics.reference_regions(reference, flat)


def db_error(reference, estimate, ok):
    """dB error of ``estimate``, both clipped to the reference's 1st-99.9th percentile dB range."""
    lo, hi = metrics.reference_db_range(reference, ok)
    ref, est = (np.clip(metrics.to_db(np.where(ok, a, 1.0)), lo, hi) for a in (reference, estimate))
    return np.where(ok, est - ref, 0.0)


def bands(error):
    """The error cut into :data:`BAND_NAMES` bands (differences of Gaussian low-passes)."""
    out, finer = [], error
    for s in BAND_SIGMAS:
        low = ndimage.gaussian_filter(error, s, mode="reflect")
        out.append(finer - low)
        finer = low
    out.append(finer)
    return out


def gain_db(mse_against, mse_model):
    return float(10 * np.log10(mse_against / mse_model)) if mse_model > 0 and mse_against > 0 else None


def scenes(family, size, count, split):
    """``bench_starter.py``'s held-out scenes, or with ``split="train"`` the same seeds drawn
    from the training split's parameter ranges (new scenes, not training images; no wetland,
    which has no training split, and no natural pictures)."""
    if split == "test":
        yield from matrix.scenes(family, size, count)
        return
    from despeck.scene_families import make_family_scene

    for i in range(count):
        seed = matrix.SCENE_SEED + 10 * matrix.FAMILIES.index(family) + i
        clean, layout = make_family_scene(family, (size, size), rng=seed, split="train", return_layout=True)
        yield f"{family}-{seed}-train", clean, list(layout.homogeneous_boxes), list(layout.points), "train split"


def cell_analysis(model, family, ci, against, size, count, split="test"):
    cond = matrix.CONDITIONS[ci]
    sums = {k: {"model": 0.0, "against": 0.0, "n": 0} for k in REGIONS + ("all",)}
    band_sums = {"model": np.zeros(len(BAND_NAMES)), "against": np.zeros(len(BAND_NAMES)), "n": 0}
    totals = {"model": 0.0, "against": 0.0, "input": 0.0, "reference": 0.0}
    region_totals = {k: {"model": 0.0, "against": 0.0, "input": 0.0} for k in REGIONS}
    first = None
    for si, (name, clean, boxes, points, _) in enumerate(scenes(family, size, count, split)):
        seed = matrix.NOISE_SEED + 1000 * ci + 10 * matrix.FAMILIES.index(family) + si
        noisy, ref = matrix.speckle(clean, cond, seed)
        valid = np.isfinite(noisy) & (noisy > 0)
        est_m, _ = matrix.run_method("model", noisy, valid, cond, model)
        est_a, _ = matrix.run_method(against, noisy, valid, cond, model)
        ok = valid & np.isfinite(est_m) & (est_m > 0) & np.isfinite(est_a) & (est_a > 0)
        e_m, e_a = db_error(ref, est_m, ok), db_error(ref, est_a, ok)
        masks = region_masks(ref, boxes)
        masks["all"] = np.ones(ref.shape, bool)
        for k, m in masks.items():
            m = m & ok
            sums[k]["model"] += float(np.sum(e_m[m] ** 2))
            sums[k]["against"] += float(np.sum(e_a[m] ** 2))
            sums[k]["n"] += int(m.sum())
        for key, e in (("model", e_m), ("against", e_a)):
            band_sums[key] += [float(np.sum(b[ok] ** 2)) for b in bands(e)]
        band_sums["n"] += int(ok.sum())
        for key, a in (("model", est_m), ("against", est_a), ("input", noisy), ("reference", ref)):
            totals[key] += float(np.sum(a[ok], dtype=np.float64))
            if key != "reference":
                for k in REGIONS:
                    region_totals[k][key] += float(np.sum(a[ok & masks[k]], dtype=np.float64))
        if first is None:
            first = {"name": name, "reference": ref, "noisy": noisy, "model": est_m, "against": est_a,
                     "gap": ndimage.gaussian_filter(e_m ** 2 - e_a ** 2, 3.0)}
    regions = {}
    for k in REGIONS + ("all",):
        s = sums[k]
        n = max(s["n"], 1)
        regions[k] = {
            "pixel_share": s["n"] / max(sums["all"]["n"], 1),
            "mse_model_db2": s["model"] / n, "mse_against_db2": s["against"] / n,
            "gain_db": gain_db(s["against"], s["model"]) if s["n"] else None,
            # the region's part of the scene's mean squared-error difference (dB^2 per
            # scene pixel); positive where the model loses; the regions add up to "all"
            "gap_db2": (s["model"] - s["against"]) / max(sums["all"]["n"], 1),
        }
    n = max(band_sums["n"], 1)
    scale = {bn: {"mse_model_db2": band_sums["model"][i] / n, "mse_against_db2": band_sums["against"][i] / n,
                  "gain_db": gain_db(band_sums["against"][i], band_sums["model"][i])}
             for i, bn in enumerate(BAND_NAMES)}
    total_db = {k: float(10 * np.log10(totals[k] / totals["reference"])) for k in ("model", "against", "input")}
    # each region's intensity after a method against the speckled input's on the same pixels
    versus_input = {k: {m: float(10 * np.log10(t[m] / t["input"])) if t["input"] > 0 else None
                        for m in ("model", "against")} for k, t in region_totals.items()}
    return {"family": family, "condition": cond["name"], "regions": regions, "bands": scale,
            "scene_total_db": total_db, "region_total_vs_input_db": versus_input}, first


def figure(path, sample, cell, against):
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    db = {k: 10 * np.log10(np.maximum(sample[k].astype(np.float64), 1e-12))
          for k in ("reference", "noisy", "model", "against")}
    lo, hi = np.percentile(db["reference"], [1, 99.5])
    fig, axes = plt.subplots(1, 5, figsize=(20, 4.6))
    titles = {"reference": "reference", "noisy": "speckled input", "model": "model", "against": against}
    for ax, key in zip(axes, ("reference", "noisy", "model", "against")):
        ax.imshow(db[key], cmap="gray", vmin=lo, vmax=hi)
        ax.set_title(titles[key])
    lim = float(np.percentile(np.abs(sample["gap"]), 99)) or 1.0
    im = axes[4].imshow(sample["gap"], cmap="RdBu_r", vmin=-lim, vmax=lim)
    axes[4].set_title(f"red: {against} better, blue: model better")
    fig.colorbar(im, ax=axes[4], fraction=0.046, label="difference of squared errors (dB$^2$)")
    for ax in axes:
        ax.set_xticks([])
        ax.set_yticks([])
    fig.suptitle(f"{cell['family']} / {cell['condition']}, scene {sample['name']}: "
                 f"model {cell['regions']['all']['gain_db']:+.2f} dB against {against}")
    fig.tight_layout()
    fig.savefig(path, dpi=72)
    plt.close(fig)


def markdown(result):
    a = result["against"]
    out = [f"# Where the model wins and loses against {a}", "",
           f"Model `{result['model']}`; {result['scenes']}. Gain = 10 log10(mse {a} / mse model), dB; "
           "gap: the region's part of the difference in mean squared error over the scene, dB² "
           f"(positive where the model loses); total: the scene's total intensity after the model / {a} / "
           "in the input against the reference's, dB.", "",
           "| family | condition | all | flat | edges | texture | flat px | edges px | texture px "
           f"| gap flat | gap edges | gap texture | total model | total {a} | total input |",
           "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]

    def g(v):
        return "" if v is None else f"{v:+.2f}"

    for c in result["cells"]:
        r = c["regions"]
        out.append(f"| {c['family']} | {c['condition']} | {g(r['all']['gain_db'])} | "
                   + " | ".join(g(r[k]["gain_db"]) for k in REGIONS) + " | "
                   + " | ".join(f"{r[k]['pixel_share']:.0%}" for k in REGIONS) + " | "
                   + " | ".join(f"{r[k]['gap_db2']:+.3f}" for k in REGIONS) + " | "
                   + " | ".join(f"{c['scene_total_db'][k]:+.2f}" for k in ("model", "against", "input")) + " |")
    out += ["", f"Intensity per region after the model / {a}, against the speckled input's on the same pixels "
            "(dB; the flat column is the bias measure's ground):", "",
            "| family | condition | " + " | ".join(REGIONS) + " |", "|---|---|" + "---|" * len(REGIONS)]
    for c in result["cells"]:
        v = c["region_total_vs_input_db"]
        out.append(f"| {c['family']} | {c['condition']} | "
                   + " | ".join(f"{g(v[k]['model'])} / {g(v[k]['against'])}" if v[k]["model"] is not None else ""
                                for k in REGIONS) + " |")
    out += ["", "Gain by scale of the error (dB):", "",
            "| family | condition | " + " | ".join(BAND_NAMES) + " |",
            "|---|---|" + "---|" * len(BAND_NAMES)]
    for c in result["cells"]:
        out.append(f"| {c['family']} | {c['condition']} | "
                   + " | ".join(g(c["bands"][b]["gain_db"]) for b in BAND_NAMES) + " |")
    out += ["", f"CPU: {result['cpu'].get('model', 'unknown')}; {result['seconds']:.0f} s."]
    return "\n".join(out) + "\n"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--model", default=str(ROOT / "despeck" / "weights" / "starter.safetensors"))
    parser.add_argument("--against", default=None,
                        help="classical method (default bm3d-log when installed, else refined-lee)")
    parser.add_argument("--size", type=int, default=384, help="scene side (default 384, as bench_starter.py)")
    parser.add_argument("--per-family", type=int, default=2, help="scenes per family (default 2)")
    parser.add_argument("--split", choices=("test", "train"), default="test",
                        help="test: bench_starter.py's held-out scenes (default); train: the same seeds drawn from "
                             "the training split's parameters (terrain, fields, urban), to tell a limit of the "
                             "network from a failure to generalise")
    parser.add_argument("--out", default=None, help="output stem (default bench_output/error_regions_<model>)")
    args = parser.parse_args(argv)
    against = args.against or ("bm3d-log" if matrix.bm3d_log.available() else "refined-lee")
    if against != "bm3d-log" and against not in matrix.filters.FILTERS:
        parser.error(f"--against: unknown method {against!r}; choose bm3d-log or one of "
                     f"{', '.join(matrix.filters.FILTERS)}")
    if against == "bm3d-log" and not matrix.bm3d_log.available():
        parser.error(f"--against bm3d-log needs the optional bm3d package ({matrix.bm3d_log.INSTALL_HINT})")
    model = load_model_file(args.model)
    start = time.perf_counter()
    cells, worst = [], None
    families = matrix.FAMILIES if args.split == "test" else [f for f in TRAIN_SPLIT_FAMILIES if f in matrix.FAMILIES]
    for family in families:
        for ci in range(len(matrix.CONDITIONS)):
            cell, sample = cell_analysis(model, family, ci, against, args.size, args.per_family, args.split)
            cells.append(cell)
            gain = cell["regions"]["all"]["gain_db"]
            print(f"{family:8s} {cell['condition']:9s} all {gain:+.2f} dB  "
                  + "  ".join(f"{k} {cell['regions'][k]['gain_db']:+.2f}" for k in REGIONS
                              if cell["regions"][k]["gain_db"] is not None), flush=True)
            if worst is None or gain < worst[0]["regions"]["all"]["gain_db"]:
                worst = (cell, sample)
    suffix = "_train" if args.split == "train" else ""
    stem = pathlib.Path(args.out) if args.out else ROOT / "bench_output" / f"error_regions_{pathlib.Path(args.model).stem}{suffix}"
    stem.parent.mkdir(parents=True, exist_ok=True)
    result = {"model": pathlib.Path(args.model).name, "against": against,
              "scenes": f"{args.per_family} scene(s) of {args.size} x {args.size} per family, bench_starter.py's seeds"
                        + (", training-split parameters" if args.split == "train" else ", held out"),
              "split": args.split,
              "cpu": matrix.cpu_info(),
              "seconds": time.perf_counter() - start, "cells": cells}
    stem.with_suffix(".json").write_text(json.dumps(result, indent=1))
    stem.with_suffix(".md").write_text(markdown(result))
    figure(stem.with_suffix(".png"), worst[1], worst[0], against)
    print(markdown(result))
    print(f"wrote {stem}.json, .md and .png")
    return 0


if __name__ == "__main__":
    sys.exit(main())
