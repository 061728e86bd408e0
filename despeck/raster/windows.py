"""Windows of a scene: checking a caller's window against the scene, full-width row strips."""

from __future__ import annotations

import numpy as np
from rasterio.windows import Window

from ..errors import InputError

__all__ = ["as_window", "row_window"]


def as_window(window, width: int, height: int, name) -> Window:
    if window is None:
        return Window(0, 0, width, height)
    if not isinstance(window, Window):
        try:
            window = Window.from_slices(*window) if len(window) == 2 and not np.isscalar(window[0]) else Window(*window)
        except Exception:
            raise InputError(f"{name}: window must be a rasterio Window, got {window!r}") from None
    c0, r0 = int(window.col_off), int(window.row_off)
    w, h = int(window.width), int(window.height)
    if c0 < 0 or r0 < 0 or w <= 0 or h <= 0 or c0 + w > width or r0 + h > height:
        raise InputError(f"{name}: window {window} lies outside the {width}x{height} scene")
    return Window(c0, r0, w, h)


def row_window(r0: int, r1: int, width: int) -> Window:
    """Rows ``r0`` to ``r1 - 1`` across the whole ``width`` of a scene."""
    return Window(0, r0, width, r1 - r0)
