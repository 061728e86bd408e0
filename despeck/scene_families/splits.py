"""The scene families and their train/test splits: names, parameter ranges, and the draw of a scene's parameters.

Train and test intervals never overlap, so a test scene's parameters never occur in
training; ``wetland`` has a test split only.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .primitives import as_rng

__all__ = [
    "SCENE_FAMILIES", "TRAINING_FAMILIES", "EVALUATION_FAMILIES", "SPLITS", "split_ranges", "draw_parameters"
]


SCENE_FAMILIES: tuple[str, ...] = ("terrain", "forest", "fields", "urban", "water", "mixed", "wetland")
TRAINING_FAMILIES: tuple[str, ...] = ("terrain", "forest", "fields", "urban", "water", "mixed")
EVALUATION_FAMILIES: tuple[str, ...] = tuple(f for f in SCENE_FAMILIES if f not in TRAINING_FAMILIES)
SPLITS = ("train", "test")

# Parameter ranges per family and split: each a list of (low, high) intervals. Train and
# test intervals never overlap, so a test scene's parameters never occur in training.
# Street grids and parcel layouts are trained at every orientation on both sides of the
# held-out band (fields: parcel strips at 0-90 degrees either way, rows across them;
# urban: square blocks, whose grid repeats every 90 degrees, at 0-45 either way), as
# parcel sizes already bracket theirs: real scenes have grids at all angles, and a network
# that never saw a steep grid angle loses most of its margin there (model card).
_INCIDENCE = {"train": [(30.0, 45.0)], "test": [(22.0, 29.0)]}
_RANGES: dict[str, dict[str, dict[str, list]]] = {
    "terrain": {
        "train": {"incidence_deg": _INCIDENCE["train"], "rms_slope_deg": [(8.0, 20.0)], "beta": [(3.7, 4.3)]},
        "test": {"incidence_deg": _INCIDENCE["test"], "rms_slope_deg": [(21.0, 28.0)], "beta": [(4.4, 4.8)]},
    },
    "forest": {
        "train": {"incidence_deg": _INCIDENCE["train"], "texture_looks": [(2.0, 6.0)],
                  "corr_px": [(0.7, 1.6)], "clearing_frac": [(0.08, 0.25)]},
        "test": {"incidence_deg": _INCIDENCE["test"], "texture_looks": [(6.5, 10.0)],
                 "corr_px": [(1.8, 2.6)], "clearing_frac": [(0.28, 0.4)]},
    },
    "fields": {
        "train": {"incidence_deg": _INCIDENCE["train"], "parcel_px": [(16.0, 36.0), (64.0, 150.0)],
                  "grid_angle_deg": [(0.0, 15.0), (43.0, 90.0)], "row_period_px": [(3.0, 5.0)]},
        "test": {"incidence_deg": _INCIDENCE["test"], "parcel_px": [(38.0, 62.0)],
                 "grid_angle_deg": [(18.0, 40.0)], "row_period_px": [(5.5, 8.0)]},
    },
    "urban": {
        "train": {"incidence_deg": _INCIDENCE["train"], "block_px": [(28.0, 52.0)],
                  "built_frac": [(0.55, 0.8)], "grid_angle_deg": [(0.0, 12.0), (30.0, 45.0)], "height_px": [(2.0, 7.0)]},
        "test": {"incidence_deg": _INCIDENCE["test"], "block_px": [(56.0, 72.0)],
                 "built_frac": [(0.82, 0.95)], "grid_angle_deg": [(14.0, 28.0)], "height_px": [(7.5, 11.0)]},
    },
    "water": {
        "train": {"incidence_deg": _INCIDENCE["train"], "water_db": [(-25.0, -21.0)],
                  "wind_db": [(1.0, 4.0)], "water_frac": [(0.3, 0.55)]},
        "test": {"incidence_deg": _INCIDENCE["test"], "water_db": [(-20.5, -18.0)],
                 "wind_db": [(4.5, 6.5)], "water_frac": [(0.6, 0.75)]},
    },
    "mixed": {
        "train": {"n_zones": [(3.0, 5.0)]},
        "test": {"n_zones": [(6.0, 8.0)]},
    },
    "wetland": {
        "test": {"incidence_deg": _INCIDENCE["test"] + _INCIDENCE["train"], "water_db": [(-24.0, -19.0)],
                 "flood_gain_db": [(3.0, 7.0)], "texture_looks": [(3.0, 9.0)]},
    },
}
_INTEGER_PARAMS = {"n_zones"}


def check_request(family, shape, split):
    if family not in SCENE_FAMILIES:
        raise InputError(f"unknown scene family {family!r}; choose one of {', '.join(SCENE_FAMILIES)}")
    if split not in SPLITS:
        raise InputError(f"split must be 'train' or 'test', got {split!r}")
    if split not in _RANGES[family]:
        raise InputError(f"scene family {family!r} is for evaluation only; use split='test'")
    try:
        h, w = (int(shape[0]), int(shape[1]))
        if len(shape) != 2:
            raise TypeError
    except (TypeError, ValueError, IndexError):
        raise InputError(f"shape must be (rows, cols), got {shape!r}") from None
    if h < 64 or w < 64:
        raise InputError(f"family scenes need at least 64x64 pixels, got {h}x{w}")
    return h, w


def split_ranges(family: str, split: str = "train") -> dict:
    """The parameter ranges a family draws from in a split.

    Returns
    -------
    dict
        Parameter name -> list of (low, high) intervals (a copy).
    """
    check_request(family, (64, 64), split)
    return {k: list(v) for k, v in _RANGES[family][split].items()}


def draw_parameters(family: str, *, rng, split: str = "train") -> dict:
    """Draw the split-controlled parameters of one scene of a family.

    Each parameter is drawn uniformly from the union of its intervals for the split
    (intervals weighted by length). :func:`make_family_scene` draws exactly these first.
    """
    check_request(family, (64, 64), split)
    rng = as_rng(rng)
    out = {}
    for name, intervals in _RANGES[family][split].items():
        lengths = np.array([hi - lo for lo, hi in intervals], dtype=float)
        i = int(rng.choice(len(intervals), p=lengths / lengths.sum())) if len(intervals) > 1 else 0
        lo, hi = intervals[i]
        if name in _INTEGER_PARAMS:
            out[name] = int(rng.integers(int(lo), int(hi) + 1))
        else:
            out[name] = float(rng.uniform(lo, hi))
    return out
