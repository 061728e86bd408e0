"""The one owner of the validity mask: which pixels of an intensity image carry a value.

A pixel is valid when its value is finite and positive (an intensity of zero or less
is nodata, a cut-off or no signal) and the caller's mask, if any, lets it in. Every
module that needs the mask of an array asks :func:`valid_mask`; readers add their
file's nodata and mask bands to it.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError

__all__ = ["valid_mask"]


def valid_mask(values, mask=None, *, what="image") -> np.ndarray:
    """True where ``values`` are finite and positive and ``mask`` (if given) is True.

    Parameters
    ----------
    values : array_like
        Real values of any shape (linear intensity or amplitude).
    mask : array_like of bool, optional
        Same shape as ``values``; False leaves a pixel out.
    what : str
        How to call ``values`` in the error message (e.g. the file or the argument).

    Returns
    -------
    ndarray of bool
        Same shape as ``values``.

    Raises
    ------
    InputError
        If ``mask`` has another shape than ``values``.
    """
    x = np.asarray(values)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(x) & (x > 0)
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != x.shape:
            raise InputError(f"{what}: mask of shape {m.shape} does not match the values' shape {x.shape}")
        ok &= m
    return ok
