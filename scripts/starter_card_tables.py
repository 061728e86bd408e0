"""Markdown tables for the starter model card from ``benchmarks/bench_starter.py`` JSON files.

Usage::

    python scripts/starter_card_tables.py bench_output/bench_starter_starter.json [--old bench_output/bench_starter_old.json]

Prints: the model's dB-domain PSNR margin over the best classical method (log-domain
BM3D included) and over the best of the nine despeck filters per cell; bias, point
targets, SSIM and edge correlation of the model beside the best classical method; and,
with ``--old``, the same margins of another model file (e.g. the previous starter) and
the PSNR difference between the two models per cell.
"""

from __future__ import annotations

import argparse
import json

FILTERS_ONLY = ("boxcar", "lee", "enhanced-lee", "kuan", "frost", "gamma-map", "refined-lee", "improved-sigma",
                "nonlocal")


def margins(d, exclude=()):
    out = {}
    for name, cell in d["cells"].items():
        m = cell["methods"]
        pool = {k: v for k, v in m.items() if k not in ("model", "input") and k not in exclude}
        best = max(pool, key=lambda k: pool[k]["psnr_db"])
        out[name] = (m["model"]["psnr_db"] - pool[best]["psnr_db"], best)
    return out


def grid(d, values, fmt):
    fams, conds = d["families"], [c["name"] if isinstance(c, dict) else c for c in d["conditions"]]
    lines = ["| family | " + " | ".join(conds) + " |", "|---|" + "---|" * len(conds)]
    for f in fams:
        lines.append(f"| {f} | " + " | ".join(fmt(values[f"{f} / {c}"]) for c in conds) + " |")
    return "\n".join(lines)


def main(argv=None):
    p = argparse.ArgumentParser()
    p.add_argument("new")
    p.add_argument("--old")
    a = p.parse_args(argv)
    d = json.load(open(a.new))
    print("Margin over the best classical method, log-domain BM3D included (dB-domain PSNR):\n")
    print(grid(d, margins(d), lambda v: f"{v[0]:+.2f}"))
    print("\nMargin over the best of despeck's nine filters (BM3D left out):\n")
    print(grid(d, margins(d, exclude=("bm3d-log",)), lambda v: f"{v[0]:+.2f} ({v[1]})"))
    bias = {k: c["methods"]["model"]["bias_db"] for k, c in d["cells"].items()}
    own = {k: c["methods"]["input"]["bias_db"] for k, c in d["cells"].items()}
    print("\nRadiometric bias of the model on homogeneous boxes, dB vs the reference (the speckled input's own value):\n")
    print(grid(d, {k: (bias[k], own[k]) for k in bias}, lambda v: f"{v[0]:+.3f} ({v[1]:+.3f})"))
    pts = {k: c["methods"]["model"] for k, c in d["cells"].items()}
    print("\nPoint targets, model: median / worst peak change vs the input, dB:\n")
    print(grid(d, pts, lambda m: "n/a" if m.get("points_median_db") is None
               else f"{m['points_median_db']:+.1f} / {m['points_worst_db']:+.1f}"))
    print("\nSSIM (dB domain) and edge correlation, model vs log-domain BM3D:\n")
    both = {k: (c["methods"]["model"], c["methods"].get("bm3d-log")) for k, c in d["cells"].items()}
    print(grid(d, both, lambda v: f"{v[0]['ssim_db']:.3f} / {v[0]['edge_corr']:.2f} vs "
               + ("n/a" if v[1] is None else f"{v[1]['ssim_db']:.3f} / {v[1]['edge_corr']:.2f}")))
    if a.old:
        o = json.load(open(a.old))
        print("\nThe other model file's margin over the best classical method (same scenes and speckle):\n")
        print(grid(o, margins(o), lambda v: f"{v[0]:+.2f}"))
        new_psnr = {k: c["methods"]["model"]["psnr_db"] for k, c in d["cells"].items()}
        old_psnr = {k: c["methods"]["model"]["psnr_db"] for k, c in o["cells"].items()}
        print("\nThis model's dB-domain PSNR minus the other model file's:\n")
        print(grid(d, {k: new_psnr[k] - old_psnr[k] for k in new_psnr}, lambda v: f"{v:+.2f}"))


if __name__ == "__main__":
    main()
