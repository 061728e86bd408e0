"""The ``water`` family (sea, lakes and rivers with wind, shores and ships) and the evaluation-only ``wetland``."""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from .primitives import (
    edge_effects,
    fractal_surface,
    gamma_texture,
    grid_parcels,
    lin,
    line_mask,
    parcel_cover,
    smooth,
    smooth_coarse,
    voronoi,
)


def _water_mask(shape, frac, rng):
    h, w = shape
    kind = rng.choice(["sea", "lake", "river"])
    # large-scale shape plus a fractal coastline (bays, headlands, small islands)
    f = smooth_coarse(shape, rng.uniform(50, 90) * max(h, w) / 512, rng) + 0.35 * fractal_surface(shape, 3.2, rng=rng)
    if kind == "sea":
        ang = rng.uniform(0, 2 * np.pi)
        r, c = np.mgrid[0:h, 0:w]
        ramp = (np.cos(ang) * (r - h / 2) + np.sin(ang) * (c - w / 2)) / (0.25 * max(h, w))
        f = f + 2.5 * ramp
    if kind == "river":
        f = 0.5 * f
        river = line_mask(shape, rng, rng.uniform(0.04, 0.1) * min(h, w), curvy=rng.uniform(20, 60))
        f = f + 3.0 * river
    water = f > np.quantile(f, 1.0 - frac)
    water = ndimage.binary_opening(water, iterations=2)
    return water


def _simple_land(shape, rng, row_period=4.0):
    labels, n, _, _ = grid_parcels(shape, rng.uniform(30, 90), rng.uniform(-20, 20), rng)
    land = parcel_cover(shape, labels, n, rng, row_period)
    woods = smooth(shape, 20.0, rng) > 1.0
    return np.where(woods, lin(-7.0) * gamma_texture(shape, 4.0, 1.0, rng=rng), land)


def water_scene(shape, p, rng):
    h, w = shape
    water = _water_mask(shape, p["water_frac"], rng)
    scene = _simple_land(shape, rng)
    base = p["water_db"]
    # wind-roughened patches: streaky (elongated along the wind) brightening, exactly
    # zero outside the patches so calm water stays constant
    wind_dir = rng.random() < 0.5
    gusts = smooth_coarse(shape, 45.0, rng)
    streak = smooth(shape, 16.0, rng, sigma_cols=3.0) if wind_dir else smooth(shape, 3.0, rng, sigma_cols=16.0)
    rough = np.clip((gusts + 0.35 * streak - rng.uniform(0.0, 0.9)) / 1.2, 0.0, 1.0)
    water_db = base + p["wind_db"] * rough
    scene = np.where(water, lin(water_db), scene)
    # shoreline: a bright rim on part of the coast (rocks, surf, embankments)
    shore = water & ~ndimage.binary_erosion(water, iterations=1)
    shore &= smooth(shape, 20.0, rng) > 0.0
    scene = np.where(ndimage.binary_dilation(shore) & ~water, scene * lin(4.0), scene)
    # ships: small bright elongated targets on open water
    inner = ndimage.binary_erosion(water, iterations=8)
    idx = np.flatnonzero(inner)
    for k in idx[rng.integers(0, idx.size, int(rng.integers(2, 9)))] if idx.size else []:
        r0, c0 = divmod(int(k), w)
        ln, wd = int(rng.integers(3, 9)), int(rng.integers(1, 3))
        if rng.random() < 0.5:
            ln, wd = wd, ln
        sl = (slice(r0, min(r0 + ln, h)), slice(c0, min(c0 + wd, w)))
        scene[sl] = lin(base + rng.uniform(25, 35)) * rng.uniform(0.3, 1.0, scene[sl].shape)
    return scene


def wetland_scene(shape, p, rng):
    h, w = shape
    zones, n = voronoi(shape, rng.uniform(50, 110), rng, warp=0.2)
    # 0 open water, 1 flooded forest, 2 reed marsh, 3 mudflat, 4 wet meadow
    kind = rng.choice(5, size=n, p=[0.2, 0.25, 0.25, 0.15, 0.15])
    k = kind[zones]
    scene = np.zeros(shape)
    scene = np.where(k == 0, lin(p["water_db"]), scene)
    forest = lin(rng.uniform(-8, -6) + p["flood_gain_db"]) * gamma_texture(shape, p["texture_looks"], 1.3, rng=rng)
    scene = np.where(k == 1, forest, scene)
    reed = lin(rng.uniform(-12, -9, n))[zones] * gamma_texture(shape, 2 * p["texture_looks"], 1.0, rng=rng)
    scene = np.where(k == 2, reed, scene)
    scene = np.where(k == 3, lin(rng.uniform(-18, -15, n))[zones], scene)
    scene = np.where(k == 4, lin(rng.uniform(-14, -11, n))[zones], scene)
    # meandering channels
    for _ in range(int(rng.integers(1, 4))):
        ch = line_mask(shape, rng, rng.uniform(3, 10), curvy=rng.uniform(20, 60))
        scene = np.where(ch, lin(p["water_db"]), scene)
    tall = k == 1
    scene, _ = edge_effects(scene, tall, np.full(shape, 2.0), p["incidence_deg"],
                             near_gain_db=2.0, shadow_value=lin(-22.0))
    return scene
