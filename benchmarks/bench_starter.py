"""Evaluate a model file (default: the bundled starter model) against every classical filter.

Held-out test scenes, never used in training: four procedural 512 x 512 scenes made with
seeds 9001-9004 (training draws its scenes from a different seed sequence) and two
scikit-image images kept out of the training references (``camera``, ``cat``; see
``scripts/make_training_references.py``), each speckled with 1-look Gamma speckle
(seed fixed per scene). For each method it reports:

- PSNR and SSIM in the dB domain (clipped to the clean scene's 1st-99.9th percentile
  dB range, ``data_range`` = that range; :func:`despeck.metrics.fidelity`);
- radiometric bias on the homogeneous boxes of the procedural scenes, in dB, both
  against the clean truth ``10 log10(mean estimate / mean clean)`` and, as in
  :func:`despeck.metrics.radiometric_bias_db`, against the speckled input;
- point-target retention on the procedural scenes' isolated bright scatterers:
  ``10 log10(peak after / peak before)`` in a 3 x 3 neighbourhood, against the input
  (speckled) peak and against the clean peak.

These are the numbers in the model card (``despeck/weights/starter.md``).

Usage::

    python benchmarks/bench_starter.py [--model FILE] [--threads N]

Writes ``bench_output/bench_starter.json`` and prints a Markdown table.
"""

from __future__ import annotations

import argparse
import json
import pathlib
import sys
import time

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "scripts"))

from despeck import filters, metrics  # noqa: E402
from despeck.inference import despeckle_array  # noqa: E402
from despeck.models import load_model_file  # noqa: E402
from despeck.speckle import simulate_intensity  # noqa: E402
from despeck.synthetic import make_scene  # noqa: E402

PROCEDURAL_SEEDS = (9001, 9002, 9003, 9004)
HELD_OUT_IMAGES = ("camera", "cat")


def scenes():
    for seed in PROCEDURAL_SEEDS:
        clean, layout = make_scene((512, 512), rng=seed, return_layout=True)
        yield f"procedural-{seed}", clean, layout, seed
    from make_training_references import grey_image, to_backscatter

    for i, name in enumerate(HELD_OUT_IMAGES):
        yield f"skimage-{name}", to_backscatter(grey_image(name)), None, 9100 + i


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--model", default=str(ROOT / "despeck" / "weights" / "starter.safetensors"))
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--out", default=str(ROOT / "bench_output" / "bench_starter.json"))
    args = parser.parse_args(argv)

    model = load_model_file(args.model)
    methods = ["model"] + list(filters.FILTERS)
    per_scene = []
    pooled = {m: {"clean": [], "est": [], "noisy": [], "ret_in": [], "ret_clean": []} for m in methods}
    for name, clean, layout, seed in scenes():
        noisy = simulate_intensity(clean, 1, rng=np.random.default_rng(seed))
        row = {"scene": name}
        for m in methods:
            t0 = time.perf_counter()
            if m == "model":
                est = despeckle_array(noisy, model, threads=args.threads, progress=False)
            else:
                est = filters.get_filter(m)(noisy, looks=1)
            seconds = time.perf_counter() - t0
            fid = metrics.fidelity(clean, est)
            row[m] = {"psnr_db": fid["psnr_db"], "ssim_db": fid["ssim_db"], "seconds": seconds}
            if layout is not None:
                for r0, c0, r1, c1 in layout.homogeneous_boxes:
                    sl = (slice(r0, r1), slice(c0, c1))
                    pooled[m]["clean"].append(float(clean[sl].sum()))
                    pooled[m]["est"].append(float(est[sl].astype(np.float64).sum()))
                    pooled[m]["noisy"].append(float(noisy[sl].astype(np.float64).sum()))
                pts = layout.points
                pooled[m]["ret_in"] += list(metrics.point_retention_db(noisy, est, pts))
                pooled[m]["ret_clean"] += list(metrics.point_retention_db(clean, est, pts))
        per_scene.append(row)
        best = max(filters.FILTERS, key=lambda f: row[f]["psnr_db"])
        print(f"{name}: model {row['model']['psnr_db']:.2f} dB, best filter {best} {row[best]['psnr_db']:.2f} dB",
              flush=True)

    summary = {}
    for m in methods:
        p = pooled[m]
        ret_in, ret_clean = np.array(p["ret_in"]), np.array(p["ret_clean"])
        summary[m] = {
            "psnr_db_mean": float(np.mean([r[m]["psnr_db"] for r in per_scene])),
            "ssim_db_mean": float(np.mean([r[m]["ssim_db"] for r in per_scene])),
            "bias_vs_clean_db": float(10 * np.log10(sum(p["est"]) / sum(p["clean"]))),
            "bias_vs_input_db": float(10 * np.log10(sum(p["est"]) / sum(p["noisy"]))),
            "points_median_vs_input_db": float(np.median(ret_in)),
            "points_within_3db_of_input": float(np.mean(ret_in >= -3.0)),
            "points_median_vs_clean_db": float(np.median(ret_clean)),
            "points_within_3db_of_clean": float(np.mean(ret_clean >= -3.0)),
            "seconds_total": float(sum(r[m]["seconds"] for r in per_scene)),
        }
    best = max(filters.FILTERS, key=lambda f: summary[f]["psnr_db_mean"])
    result = {
        "model": str(args.model), "scenes": per_scene, "summary": summary, "best_filter": best,
        "gain_over_best_filter_db": summary["model"]["psnr_db_mean"] - summary[best]["psnr_db_mean"],
        "conventions": "1-look speckle; PSNR/SSIM in dB domain, range = clean 1st-99.9th percentile; "
                       "bias pooled over homogeneous boxes of the procedural scenes; point retention in 3x3",
    }
    out = pathlib.Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(result, indent=1))

    print("\n| method | PSNR dB-domain | SSIM dB-domain | bias vs clean dB | bias vs input dB | "
          "points: median vs input dB | within 3 dB of input | median vs clean dB | time s |")
    print("|---|---|---|---|---|---|---|---|---|")
    for m in sorted(methods, key=lambda k: -summary[k]["psnr_db_mean"]):
        s = summary[m]
        print(f"| {m} | {s['psnr_db_mean']:.2f} | {s['ssim_db_mean']:.3f} | {s['bias_vs_clean_db']:+.3f} | "
              f"{s['bias_vs_input_db']:+.3f} | {s['points_median_vs_input_db']:+.1f} | "
              f"{100 * s['points_within_3db_of_input']:.0f} % | {s['points_median_vs_clean_db']:+.1f} | "
              f"{s['seconds_total']:.1f} |")
    print(f"\nmodel - best filter ({best}): {result['gain_over_best_filter_db']:+.2f} dB; written {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
