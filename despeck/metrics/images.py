"""What every metric checks first: a 2-D image, a pair of images of one shape and the pixels valid in both."""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError


def check_image(a, name="image"):
    x = np.asarray(a, dtype=np.float64)
    if x.ndim != 2:
        raise InputError(f"{name} must be a 2-D image, got shape {x.shape}")
    return x


def image_pair(reference, estimate, valid):
    ref = check_image(reference, "reference")
    est = check_image(estimate, "estimate")
    if ref.shape != est.shape:
        raise InputError(f"reference of shape {ref.shape} and estimate of shape {est.shape} differ")
    ok = np.isfinite(ref) & np.isfinite(est)
    if valid is not None:
        v = np.asarray(valid, dtype=bool)
        if v.shape != ref.shape:
            raise InputError(f"valid mask of shape {v.shape} does not match the images {ref.shape}")
        ok &= v
    return ref, est, ok


def positive_pair(reference, estimate, valid):
    ref, est, ok = image_pair(reference, estimate, valid)
    with np.errstate(invalid="ignore"):
        ok &= (ref > 0) & (est > 0)
    return ref, est, ok


def enl_of_values(v):
    var = v.var()
    return math.inf if var == 0 else float(v.mean() ** 2 / var)
