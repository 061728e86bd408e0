"""Render one clean scene of each procedural family in dB.

Usage: python scripts/show_scene_families.py OUT.png [--split train|test] [--seed N] [--size N]

Layout boxes are outlined in cyan and point targets circled in red on a second row of
small markers, so the figure also shows what benchmarks measure.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from despeck.scene_families import SCENE_FAMILIES, TRAINING_FAMILIES, make_family_scene  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", help="output PNG")
    ap.add_argument("--split", choices=("train", "test"), default="train")
    ap.add_argument("--seed", type=int, default=2031)
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--layout", action="store_true", help="draw layout boxes and points")
    args = ap.parse_args(argv)

    # every family, plus the first one again from the other split
    other = "test" if args.split == "train" else "train"
    panels = [(f, args.split if f in TRAINING_FAMILIES else "test") for f in SCENE_FAMILIES]
    panels.append((SCENE_FAMILIES[0], other))
    fams = panels
    ncol = 4
    nrow = int(np.ceil(len(fams) / ncol))
    fig, axes = plt.subplots(nrow, ncol, figsize=(4 * ncol, 4.2 * nrow))
    for ax in axes.ravel():
        ax.axis("off")
    for i, (fam, split) in enumerate(fams):
        scene, layout = make_family_scene(fam, (args.size, args.size), rng=args.seed + i, split=split,
                                          return_layout=True)
        ax = axes.ravel()[i]
        ax.imshow(10 * np.log10(scene), cmap="gray", vmin=-25, vmax=5, interpolation="nearest")
        ax.set_title(f"{fam} ({split})", fontsize=11)
        if args.layout:
            for r0, c0, r1, c1 in layout.homogeneous_boxes:
                ax.add_patch(plt.Rectangle((c0 - 0.5, r0 - 0.5), c1 - c0, r1 - r0, fill=False, ec="c", lw=0.8))
            if layout.points:
                pts = np.array(layout.points)
                ax.scatter(pts[:, 1], pts[:, 0], s=40, facecolors="none", edgecolors="r", lw=0.8)
    fig.suptitle("Clean reflectivity (dB, -25 to +5), radar looking from the left (range = columns)", fontsize=12)
    fig.tight_layout()
    out_dir = os.path.dirname(os.path.abspath(args.out))
    fd, tmp = tempfile.mkstemp(suffix=".png", dir=out_dir)
    os.close(fd)
    try:
        fig.savefig(tmp, dpi=90)
        plt.close(fig)
        os.replace(tmp, args.out)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return 0


if __name__ == "__main__":
    sys.exit(main())
