"""The one rule for a number of looks: positive and finite (:func:`check_looks`), also for a ``[min, max]`` range.
"""

from __future__ import annotations

import math

from ..errors import InputError

__all__ = ["check_looks", "check_looks_range"]


def check_looks(looks, name: str = "looks") -> float:
    """Return ``looks`` as a float, or raise :class:`InputError` if it is not a positive number."""
    try:
        value = float(looks)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a positive number, got {looks!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be a positive number of looks (> 0), got {looks!r}")
    return value


def check_looks_range(looks, name: str = "looks"):
    """A number of looks (a float) or a ``[min, max]`` range of them (a list of two floats, min <= max).

    Each value is checked by :func:`check_looks`; raises :class:`InputError` otherwise.
    """
    if isinstance(looks, (list, tuple)):
        if len(looks) != 2:
            raise InputError(f"{name} must be a number or a [min, max] range, got {looks!r}")
        lo, hi = check_looks(looks[0], name), check_looks(looks[1], name)
        if lo > hi:
            raise InputError(f"{name} range must be [min, max] with min <= max, got {looks!r}")
        return [lo, hi]
    return check_looks(looks, name)
