"""Speed as the benchmarks report it."""

from __future__ import annotations

import math

__all__ = ["throughput_mps"]


def throughput_mps(pixels, seconds):
    """Throughput in megapixels per second."""
    seconds = float(seconds)
    return math.inf if seconds <= 0 else float(pixels) / seconds / 1e6
