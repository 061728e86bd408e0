"""Point targets: isolated bright scatterers found against their clutter, and how much of their peak a filter keeps."""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage, special

from ..errors import InputError
from ..speckle import check_looks
from ..validity import valid_mask
from .areas import cv2_interval
from .images import check_image, image_pair

__all__ = ["find_point_targets", "point_retention_db"]


def find_point_targets(intensity, looks, *, valid=None, false_alarm=1e-6, inner=2, outer=7, max_points=200):
    """Isolated bright scatterers: local maxima far above their surrounding clutter.

    A pixel is a point target when it is the maximum of its ``(2 inner + 1)``-square
    neighbourhood and exceeds ``t`` times the mean of the valid pixels in the ring
    between that neighbourhood and the ``(2 outer + 1)``-square window, where ``t``
    is the L-look speckle level exceeded with probability ``false_alarm``
    (``gammaincinv(L, 1 - false_alarm) / L``: 13.8, i.e. 11.4 dB, at L = 1 and 1e-6).
    The ring must be at least half valid, hold no pixel above ``t`` times its mean
    (so facades and bright lines are not isolated targets) and have a coefficient of
    variation below the 99.5th percentile of pure speckle's (textured clutter such
    as woodland has heavier tails than speckle alone and would give false targets). At most
    ``max_points``, brightest first.

    Returns
    -------
    list of (row, col)
    """
    x = check_image(intensity, "intensity")
    L = check_looks(looks)
    if not 0 < float(false_alarm) < 1:
        raise InputError(f"false_alarm must lie in (0, 1), got {false_alarm!r}")
    ok = valid_mask(x, valid, what="intensity")
    xv = np.where(ok, x, 0.0)
    t = float(special.gammaincinv(L, 1.0 - float(false_alarm)) / L)
    a, b = 2 * inner + 1, 2 * outer + 1
    s_big = ndimage.uniform_filter(xv, b, mode="constant") * b * b
    s_small = ndimage.uniform_filter(xv, a, mode="constant") * a * a
    q_big = ndimage.uniform_filter(xv * xv, b, mode="constant") * b * b
    q_small = ndimage.uniform_filter(xv * xv, a, mode="constant") * a * a
    n_big = ndimage.uniform_filter(ok.astype(np.float64), b, mode="constant") * b * b
    n_small = ndimage.uniform_filter(ok.astype(np.float64), a, mode="constant") * a * a
    n_ring = np.rint(n_big - n_small)
    with np.errstate(divide="ignore", invalid="ignore"):
        background = (s_big - s_small) / n_ring
    local_max = (xv == ndimage.maximum_filter(xv, size=a, mode="constant")) & ok
    ring = np.ones((b, b), dtype=bool)
    ring[outer - inner : outer + inner + 1, outer - inner : outer + inner + 1] = False
    ring_max = ndimage.maximum_filter(xv, footprint=ring, mode="constant")
    cand = local_max & (n_ring >= 0.5 * (b * b - a * a)) & (xv > t * background) & (background > 0)
    # isolated: nothing in the ring is itself a detection-level outlier (facades, bright
    # edges), and the ring is homogeneous clutter (not texture) at the 1 % level
    cand &= ring_max <= t * background
    with np.errstate(divide="ignore", invalid="ignore"):
        ring_cv2 = ((q_big - q_small) / n_ring - background**2) / background**2 * n_ring / (n_ring - 1)
    cand &= ring_cv2 <= cv2_interval(L, b * b - a * a, 0.01)[1]
    rows, cols = np.nonzero(cand)
    order = np.argsort(-xv[rows, cols], kind="stable")[: int(max_points)]
    return [(int(rows[i]), int(cols[i])) for i in order]


def point_retention_db(original, filtered, points, *, radius=1):
    """Peak of each point target after filtering relative to before, in dB.

    ``10 log10(max filtered / max original)`` over the ``(2 radius + 1)``-square
    neighbourhood of each point (a filter may move a peak by a pixel). 0 dB: the
    target is kept; strongly negative: it is smoothed away.

    Returns
    -------
    ndarray of float64, one value per point.
    """
    o, f, _ = image_pair(original, filtered, None)
    out = []
    h, w = o.shape
    for i, p in enumerate(points):
        try:
            r, c = int(p[0]), int(p[1])
        except (TypeError, ValueError, IndexError):
            raise InputError(f"point {i + 1}: expected (row, col), got {p!r}") from None
        if not (0 <= r < h and 0 <= c < w):
            raise InputError(f"point {i + 1}: ({r}, {c}) lies outside the {h} x {w} scene")
        sl = (slice(max(r - radius, 0), r + radius + 1), slice(max(c - radius, 0), c + radius + 1))
        before, after = np.nanmax(o[sl]), np.nanmax(f[sl])
        if not (before > 0 and after > 0):
            raise InputError(f"point {i + 1}: ({r}, {c}) has no positive intensity around it")
        out.append(10.0 * math.log10(after / before))
    return np.array(out)
