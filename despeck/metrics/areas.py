"""Homogeneous areas for the metrics: pixel boxes or masks given by the caller, checked, or found on the image.

An area is a box ``(row0, col0, row1, col1)`` (end-exclusive) or a boolean mask of the
scene's shape; :func:`check_areas` turns either into masks with enough valid pixels for
an ENL. Polygons in map coordinates are read by :mod:`despeck.bench.scenes`, which
passes their masks here.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from ..speckle import check_looks, gamma_speckle
from ..validity import valid_mask
from .images import check_image

__all__ = ["MIN_AREA_PIXELS", "areas_from_boxes", "check_areas", "find_homogeneous_areas"]


#: Fewest valid pixels an area needs for an ENL: at L = 1 the ENL estimate's relative
#: standard error is then about sqrt((2 + 2/L) / 100) = 20 % (delta method with the Gamma
#: moments, checked by simulation; docs/methods.md, section Equivalent number of looks).
MIN_AREA_PIXELS = 100


def areas_from_boxes(boxes, shape, *, name="area"):
    """Boolean masks from pixel boxes ``(row0, col0, row1, col1)`` (end-exclusive).

    Raises :class:`InputError` for a box that is malformed or not wholly inside the
    image of ``shape``.
    """
    h, w = int(shape[0]), int(shape[1])
    masks = []
    for i, box in enumerate(boxes):
        try:
            r0, c0, r1, c1 = (int(v) for v in box)
        except (TypeError, ValueError):
            raise InputError(f"{name} {i + 1}: a box is (row0, col0, row1, col1), got {box!r}") from None
        if not (0 <= r0 < r1 <= h and 0 <= c0 < c1 <= w):
            raise InputError(
                f"{name} {i + 1}: box {(r0, c0, r1, c1)} is empty or lies outside the {h} x {w} (rows x cols) scene"
            )
        m = np.zeros((h, w), dtype=bool)
        m[r0:r1, c0:c1] = True
        masks.append(m)
    return masks


def check_areas(areas, shape, valid=None, *, min_pixels=MIN_AREA_PIXELS, source="area"):
    """Validate areas (boxes or masks) and return them as boolean masks.

    Raises :class:`InputError` if an area lies outside the scene or has fewer than
    ``min_pixels`` valid pixels.
    """
    if areas is None:
        raise InputError(f"no {source}s given")
    masks = []
    boxes = [a for a in areas if not (isinstance(a, np.ndarray) and a.ndim == 2)]
    box_masks = iter(areas_from_boxes(boxes, shape, name=source)) if boxes else iter(())
    for a in areas:
        if isinstance(a, np.ndarray) and a.ndim == 2:
            if a.shape != tuple(shape):
                raise InputError(f"{source} mask of shape {a.shape} does not match the scene {tuple(shape)}")
            masks.append(a.astype(bool))
        else:
            masks.append(next(box_masks))
    if not masks:
        raise InputError(f"no {source}s given")
    v = None if valid is None else np.asarray(valid, dtype=bool)
    for i, m in enumerate(masks):
        n = int((m & v).sum()) if v is not None else int(m.sum())
        if n < min_pixels:
            raise InputError(
                f"{source} {i + 1} has {n} valid pixels; at least {min_pixels} are needed to estimate an ENL"
            )
    return masks


_CV_THRESHOLDS: dict = {}


def cv2_interval(looks, n, false_alarm, seed=20170412, trials=20000):
    """Central interval of the sample CV^2 of ``n`` L-look speckle pixels with probability ``1 - false_alarm``."""
    key = (float(looks), int(n), float(false_alarm))
    if key not in _CV_THRESHOLDS:
        x = gamma_speckle((trials, n), looks, rng=np.random.default_rng(seed), dtype=np.float64)
        cv2 = x.var(axis=1, ddof=1) / x.mean(axis=1) ** 2
        _CV_THRESHOLDS[key] = tuple(np.quantile(cv2, [false_alarm / 2, 1 - false_alarm / 2]))
    return _CV_THRESHOLDS[key]


def find_homogeneous_areas(intensity, looks, *, valid=None, window=15, false_alarm=0.05, max_areas=50):
    """Non-overlapping ``window`` x ``window`` boxes whose speckle statistics look pure.

    A box (free of nodata) is kept when its sample squared coefficient of variation
    lies in the central ``1 - false_alarm`` interval of that statistic for ``window^2``
    pixels of pure L-look speckle, taken from 20 000 simulated boxes with a fixed
    seed (so ``false_alarm`` is the fraction of truly homogeneous boxes wrongly
    dropped). Texture, edges and targets raise the CV and are dropped. At most
    ``max_areas`` boxes are returned, evenly spread over the kept ones in raster
    order (not the most homogeneous, which would bias the ENL upward).

    Returns
    -------
    list of (row0, col0, row1, col1)
    """
    x = check_image(intensity, "intensity")
    L = check_looks(looks)
    window = int(window)
    if window * window < MIN_AREA_PIXELS:
        raise InputError(f"window must hold at least {MIN_AREA_PIXELS} pixels (>= {math.isqrt(MIN_AREA_PIXELS - 1) + 1}), got {window}")
    if not 0 < float(false_alarm) < 1:
        raise InputError(f"false_alarm must lie in (0, 1), got {false_alarm!r}")
    ok = valid_mask(x, valid, what="intensity")
    rows, cols = x.shape[0] // window, x.shape[1] // window
    if rows == 0 or cols == 0:
        raise InputError(f"image of shape {x.shape} is smaller than one {window} x {window} box")
    h, w = rows * window, cols * window
    xb = np.where(ok, x, 0.0)[:h, :w].reshape(rows, window, cols, window).transpose(0, 2, 1, 3).reshape(rows * cols, -1)
    okb = ok[:h, :w].reshape(rows, window, cols, window).transpose(0, 2, 1, 3).reshape(rows * cols, -1).all(axis=1)
    mean = xb.mean(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        cv2 = xb.var(axis=1, ddof=1) / mean**2
    lo, hi = cv2_interval(L, window * window, float(false_alarm))
    keep = np.flatnonzero(okb & (mean > 0) & (cv2 >= lo) & (cv2 <= hi))
    if keep.size > max_areas:
        keep = keep[np.linspace(0, keep.size - 1, int(max_areas)).round().astype(int)]
    return [(int(i // cols * window), int(i % cols * window), int(i // cols * window + window), int(i % cols * window + window))
            for i in keep]
