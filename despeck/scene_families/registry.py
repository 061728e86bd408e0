"""Drawing a scene of a family by name: the renderer of each family, ``mixed`` landscapes of zones, the finished scene."""

from __future__ import annotations

import numpy as np

from .land import fields_scene, forest_scene
from .layout import finish_scene
from .primitives import as_rng, zone_partition
from .splits import EVALUATION_FAMILIES, TRAINING_FAMILIES, check_request, draw_parameters
from .terrain import terrain_scene
from .urban import urban_scene
from .water import water_scene, wetland_scene

__all__ = ["make_family_scene"]


def _mixed(shape, p, rng, split):
    h, w = shape
    zones, boxes = zone_partition(shape, p["n_zones"], rng, wobble=25.0)
    pool = [f for f in TRAINING_FAMILIES if f != "mixed"]
    if split == "test":
        pool = pool + list(EVALUATION_FAMILIES)
    scene = np.zeros(shape)
    for z, sl in boxes:
        m = zones == z
        r0, r1, c0, c1 = sl[0].start, sl[0].stop, sl[1].start, sl[1].stop
        sub_shape = (max(r1 - r0, 64), max(c1 - c0, 64))
        fam = pool[int(rng.integers(len(pool)))]
        sub = _render(fam, sub_shape, rng, split)
        r0, c0 = min(r0, h - sub_shape[0]), min(c0, w - sub_shape[1])
        window = scene[r0 : r0 + sub_shape[0], c0 : c0 + sub_shape[1]]
        mw = m[r0 : r0 + sub_shape[0], c0 : c0 + sub_shape[1]]
        window[mw] = sub[mw]
    return scene


def _render(family, shape, rng, split):
    p = draw_parameters(family, rng=rng, split=split)
    if family == "terrain":
        return terrain_scene(shape, p, rng)
    if family == "forest":
        return forest_scene(shape, p, rng)
    if family == "fields":
        p["_parcel_draw"] = lambda: draw_parameters("fields", rng=rng, split=split)["parcel_px"]
        return fields_scene(shape, p, rng)
    if family == "urban":
        return urban_scene(shape, p, rng)
    if family == "water":
        return water_scene(shape, p, rng)
    if family == "wetland":
        return wetland_scene(shape, p, rng)
    return _mixed(shape, p, rng, split)


def make_family_scene(family: str, shape=(512, 512), *, rng, split: str = "train", return_layout: bool = False):
    """Clean reflectivity float32 (rows, cols); with return_layout also a SceneLayout (homogeneous_boxes, points).

    Parameters
    ----------
    family : str
        One of :data:`SCENE_FAMILIES` (``wetland`` only with ``split="test"``).
    shape : (int, int)
        Rows (azimuth) and columns (range), each at least 64.
    rng : numpy.random.Generator or int
        Random generator or seed; the same seed gives the same scene.
    split : {"train", "test"}
        Which parameter ranges to draw from; the two never overlap.
    return_layout : bool
        Also return a :class:`despeck.synthetic.SceneLayout`: boxes of exactly constant
        reflectivity (>= 16 px) and isolated point targets 15-25 dB above a constant
        13x13 background.

    Returns
    -------
    scene : ndarray of float32, linear sigma nought, strictly positive
    layout : SceneLayout, only with ``return_layout``
    """
    h, w = check_request(family, shape, split)
    rng = as_rng(rng)
    scene = _render(family, (h, w), rng, split)
    scene, layout = finish_scene(scene, rng)
    return (scene, layout) if return_layout else scene
