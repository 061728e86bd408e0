"""The report's figures (matplotlib, Agg): dB crops, ratio images, the smoothing/edge trade-off
and, with a clean reference, each method's PSNR gain by region of the reference."""

from __future__ import annotations

import math

import numpy as np

from .. import metrics
from ..errors import InputError
from .scenes import LoadedScene

__all__ = ["CROP_SIZE", "crop_box", "write_figures"]

#: Side of the crops shown in the figures (pixels).
CROP_SIZE = 256


def crop_box(shape, crop, name):
    """The figures' crop ``(row, col, size)`` of a scene of ``shape``: ``crop`` checked, or a centred :data:`CROP_SIZE`."""
    h, w = shape
    if crop is None:
        size = min(CROP_SIZE, h, w)
        return ((h - size) // 2, (w - size) // 2, size)
    try:
        r, c, size = (int(v) for v in crop)
    except (TypeError, ValueError):
        raise InputError(f"{name}: crop must be (row, col, size), got {crop!r}") from None
    if size < 8 or r < 0 or c < 0 or r + size > h or c + size > w:
        raise InputError(f"{name}: crop {(r, c, size)} does not fit the {h} x {w} scene (size >= 8)")
    return (r, c, size)


def write_figures(folder, index, scene: LoadedScene, outputs, box, rows):
    """Write scene ``index``'s crops, ratio images and trade-off plot into ``folder``; returns their names and the dB stretch."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    stem = f"scene{index + 1}"
    r0, c0, size = box
    sl = (slice(r0, r0 + size), slice(c0, c0 + size))
    panels = [("input", scene.intensity[sl])]
    if scene.reference is not None:
        panels.insert(0, ("clean reference", scene.reference[sl]))
    panels += [(label, out[sl]) for label, out in outputs.items()]
    if scene.reference is not None:
        stretch_src = metrics.to_db(scene.reference[sl])
    else:
        stretch_src = np.nanmedian(np.stack([metrics.to_db(o[sl]) for o in outputs.values()]), axis=0) if outputs else metrics.to_db(scene.intensity[sl])
    lo, hi = (float(v) for v in np.nanpercentile(stretch_src, [2, 98]))
    if not hi > lo:
        hi = lo + 1.0

    def grid(items, cmap, vmin, vmax, title, fname, label):
        n = len(items)
        cols = min(4, n)
        nrows = math.ceil(n / cols)
        fig, axes = plt.subplots(nrows, cols, figsize=(2.6 * cols + 1.0, 2.8 * nrows + 0.4), squeeze=False,
                                 layout="constrained")
        im = None
        for ax, (name, img) in zip(axes.flat, items):
            im = ax.imshow(img, cmap=cmap, vmin=vmin, vmax=vmax, interpolation="nearest")
            ax.set_title(name, fontsize=9)
            ax.set_xticks([])
            ax.set_yticks([])
        for ax in list(axes.flat)[n:]:
            ax.axis("off")
        fig.suptitle(title, fontsize=10)
        if im is not None:
            fig.colorbar(im, ax=axes.ravel().tolist(), shrink=0.8, label=label)
        fig.savefig(folder / fname, dpi=90)
        plt.close(fig)

    crops_name, ratio_name, trade_name = f"{stem}_crops.png", f"{stem}_ratio.png", f"{stem}_tradeoff.png"
    grid([(n, metrics.to_db(p)) for n, p in panels], "gray", lo, hi, f"{scene.name}: crops in dB (common stretch)",
         crops_name, "dB")
    ratios = []
    for label, out in outputs.items():
        r, ok = metrics.ratio_image(scene.intensity[sl], out[sl], scene.valid[sl])
        ratios.append((label, np.where(ok, metrics.to_db(r), np.nan)))
    if ratios:
        grid(ratios, "gray", -6.0, 6.0, f"{scene.name}: ratio images input / filtered (dB)", ratio_name, "dB")
    fig, ax = plt.subplots(figsize=(6.4, 4.6))
    pts = [r for r in rows if r.get("kind") != "input" and r.get("enl") is not None and math.isfinite(r.get("enl", math.nan))]
    x = [0.5 * (r["epd_h"] + r["epd_v"]) for r in pts]
    y = [r["enl"] for r in pts]
    c = [r.get("psnr_db") for r in pts]
    if pts:
        if scene.reference is not None:
            sc = ax.scatter(x, y, c=c, cmap="viridis", s=50, edgecolors="k")
            fig.colorbar(sc, ax=ax, label="PSNR, dB domain")
        else:
            ax.scatter(x, y, s=50, color="tab:blue", edgecolors="k")
        for xi, yi, r in zip(x, y, pts):
            ax.annotate(r["method"], (xi, yi), fontsize=7, xytext=(4, 3), textcoords="offset points")
        ax.set_yscale("log")
    else:
        ax.text(0.5, 0.5, "no homogeneous areas: no ENL", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("edge preservation: mean EPD-ROA (H, V)")
    ax.set_ylabel("ENL (homogeneous areas)")
    ax.set_title(f"{scene.name}: smoothing vs edge preservation", fontsize=10)
    ax.grid(True, alpha=0.3)
    fig.tight_layout()
    fig.savefig(folder / trade_name, dpi=90)
    plt.close(fig)
    names = {"crops": crops_name, "ratios": ratio_name, "tradeoff": trade_name, "stretch": [lo, hi]}
    if scene.reference is not None and _region_gains_figure(plt, folder / f"{stem}_regions.png", scene.name, rows):
        names["regions"] = f"{stem}_regions.png"
    return names


def _region_gains_figure(plt, path, name, rows):
    """Grouped bars: each method's dB-domain PSNR gain over the input in each region; False when there is nothing to draw."""
    base = next((r for r in rows if r.get("kind") == "input"), None)
    methods = [r for r in rows if r.get("kind") != "input"]
    keys = [k for k in metrics.REGION_NAMES
            if base is not None and math.isfinite(base.get(f"psnr_db_{k}", math.nan))]
    if not methods or not keys:
        return False
    fig, ax = plt.subplots(figsize=(6.8, 0.45 * len(methods) * len(keys) / 2 + 1.6))
    height = 0.8 / len(keys)
    ypos = np.arange(len(methods))
    for i, k in enumerate(keys):
        gains = [r.get(f"psnr_db_{k}", math.nan) - base[f"psnr_db_{k}"] for r in methods]
        ax.barh(ypos + (i - (len(keys) - 1) / 2) * height, gains, height=height, label=k)
    ax.set_yticks(ypos, [r["method"] for r in methods], fontsize=8)
    ax.invert_yaxis()
    ax.axvline(0.0, color="k", linewidth=0.8)
    ax.set_xlabel("PSNR gain over the input, dB domain")
    ax.set_title(f"{name}: gain by region of the clean reference", fontsize=10)
    ax.legend(fontsize=8, loc="lower right")
    ax.grid(True, axis="x", alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return True
