"""Masked local sums and moments over square windows, the building blocks of the local filters.

Sums of valid values divided by counts of valid pixels (masked normalised
convolutions), so nodata and the outside of the image never leak into valid pixels.
Each window is summed directly (no running sums), so a pixel's value does not depend
on where the array starts: strips give the same bits as the whole image.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__ = ["crop", "box_sum", "box_count", "local_moments", "squared_cv", "window_offsets"]


def crop(a, halo):
    """``a`` without ``halo`` pixels on every side."""
    return a[halo : a.shape[0] - halo, halo : a.shape[1] - halo] if halo else a


def box_sum(a, size):
    """Sum over a ``size`` x ``size`` window centred on each pixel (zeros outside).

    ``correlate1d`` sums each window directly (no running sum), so a pixel's value
    does not depend on where the array starts: strips give the same bits as the whole.
    """
    ones = np.ones(size)
    s = ndimage.correlate1d(a, ones, axis=1, mode="constant", output=np.float64)
    return ndimage.correlate1d(s, ones, axis=0, mode="constant", output=np.float64)


def box_count(valid, size):
    """Number of valid pixels in each window; separable (cheap) when only a border is invalid."""
    if valid.all():
        return np.full(valid.shape, float(size * size))
    rows, cols = valid.any(axis=1), valid.any(axis=0)
    ones = np.ones(size)
    if np.array_equal(valid, np.outer(rows, cols)):
        rc = ndimage.correlate1d(rows.astype(np.float64), ones, mode="constant")
        cc = ndimage.correlate1d(cols.astype(np.float64), ones, mode="constant")
        return np.outer(rc, cc)
    return box_sum(valid.astype(np.float64), size)


def local_moments(img, valid, size):
    """Masked local count, mean and variance over a ``size`` window (NaN mean where no valid pixel)."""
    n = box_count(valid, size)
    mean = box_sum(img, size) / n
    var = box_sum(img * img, size) / n - mean * mean
    np.maximum(var, 0.0, out=var)
    return n, mean, var


def squared_cv(mean, var):
    """Local squared coefficient of variation; 0 where the window is constant."""
    return np.where(var > 0, var / (mean * mean), 0.0)


def window_offsets(size):
    """Row and column offsets of every pixel of a ``size`` x ``size`` window from its centre."""
    half = size // 2
    dy, dx = np.mgrid[-half : half + 1, -half : half + 1]
    return dy.ravel(), dx.ravel()

