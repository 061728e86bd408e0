"""Regions of a clean reference -- flat, edges, texture -- and dB-domain PSNR within each.

A despeckler's overall PSNR mixes what it does on uniform ground, at boundaries and on
texture, which often go opposite ways (a learned model may win on uniform ground and
lose on crop rows). :func:`reference_regions` splits the pixels of a clean reference
into three disjoint regions and :func:`psnr_by_region` scores an estimate in each, with
the clipping and peak of :func:`despeck.metrics.fidelity_db` (so the regions' figures sit
beside the whole scene's).

- **edges**: within ``reach`` pixels of a step of more than ``step_db`` dB between
  4-neighbours of the reference after a ``median`` x ``median`` median filter, which
  keeps boundaries, lines and point targets and removes pixel-scale texture (a median
  before differencing is common practice in edge detection on noisy or textured
  images);
- **flat**: the given homogeneous areas (the bias measure's ground), less edges;
- **texture**: every other valid pixel (slopes, crop rows, clutter, picture detail).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from ..errors import InputError
from ..validity import valid_mask
from .fidelity import psnr, reference_db_range, to_db
from .images import positive_pair

__all__ = ["REGION_NAMES", "EDGE_STEP_DB", "reference_regions", "psnr_by_region"]

#: The regions, in the order reports list them.
REGION_NAMES = ("flat", "edges", "texture")
#: Default step (dB between neighbours of the median-filtered reference) that makes an edge.
EDGE_STEP_DB = 2.0


def reference_regions(reference, flat=None, valid=None, *, step_db=EDGE_STEP_DB, reach=2, median=5):
    """``{"flat", "edges", "texture"}`` boolean masks of a clean reference (disjoint; together the valid pixels).

    Parameters
    ----------
    reference : array_like, (H, W)
        Clean linear intensity.
    flat : array_like of bool, (H, W), or list of such masks, optional
        Homogeneous areas; none given: the flat region is empty.
    valid : array_like of bool, optional
        Pixels to use; non-positive and non-finite reference pixels are never used.
    step_db, reach, median : float, int, int
        Edge rule (module notes).
    """
    ref = np.asarray(reference, dtype=np.float64)
    if ref.ndim != 2:
        raise InputError(f"reference must be a 2-D array, got shape {ref.shape}")
    if not (step_db > 0 and int(reach) >= 0 and int(median) >= 1):
        raise InputError(f"step_db must be positive, reach non-negative and median at least 1, "
                         f"got {step_db!r}, {reach!r}, {median!r}")
    ok = valid_mask(ref, valid, what="reference")
    if not ok.any():
        raise InputError("no pixel of the reference is valid and positive")
    db = to_db(np.where(ok, ref, np.median(ref[ok])))
    if median > 1:
        db = ndimage.median_filter(db, size=int(median), mode="nearest")
    down = np.abs(np.diff(db, axis=0))
    across = np.abs(np.diff(db, axis=1))
    step = np.zeros(db.shape, bool)
    # a step between two neighbours marks both of them
    step[:-1] |= down > step_db
    step[1:] |= down > step_db
    step[:, :-1] |= across > step_db
    step[:, 1:] |= across > step_db
    edges = ndimage.binary_dilation(step, iterations=int(reach)) if reach > 0 and step.any() else step
    edges &= ok
    flat_mask = np.zeros(ref.shape, bool)
    if flat is not None:
        for m in (flat if isinstance(flat, (list, tuple)) else [flat]):
            m = np.asarray(m, dtype=bool)
            if m.shape != ref.shape:
                raise InputError(f"flat area mask shape {m.shape} differs from reference shape {ref.shape}")
            flat_mask |= m
    flat_mask &= ok & ~edges
    return {"flat": flat_mask, "edges": edges, "texture": ok & ~edges & ~flat_mask}


def psnr_by_region(reference, estimate, regions, valid=None, *, db_range=None):
    """dB-domain PSNR of ``estimate`` within each region (NaN for an empty one).

    Both images in ``10 log10`` intensity, clipped to ``db_range`` (default: the
    reference's 1st-99.9th percentiles over all valid pixels, as
    :func:`despeck.metrics.fidelity_db`), peak = that range; each region scores the
    pixels it shares with the pixels valid and positive in both images.
    """
    ref, est, ok = positive_pair(reference, estimate, valid)
    if not ok.any():
        raise InputError("no pixel is valid and positive in both reference and estimate")
    low, high = reference_db_range(ref, ok) if db_range is None else (float(v) for v in db_range)
    if not high > low:
        raise InputError(f"db_range must be (low, high) with high > low, got {(low, high)}")
    rd = np.clip(to_db(np.where(ok, ref, 1.0)), low, high)
    ed = np.clip(to_db(np.where(ok, est, 1.0)), low, high)
    out = {}
    for name, mask in regions.items():
        m = np.asarray(mask, dtype=bool)
        if m.shape != ok.shape:
            raise InputError(f"region {name!r} shape {m.shape} differs from the images' {ok.shape}")
        m = m & ok
        out[name] = psnr(rd, ed, data_range=high - low, valid=m) if m.any() else math.nan
    return out
