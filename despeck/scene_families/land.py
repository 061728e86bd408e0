"""The ``forest`` and ``fields`` families: K-distributed stands with clearings, and agricultural parcels with hedges and roads.

References
----------
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech
House. (K-distributed clutter: Gamma texture times speckle.)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from .primitives import (
    edge_effects,
    gamma_texture,
    grid_parcels,
    lin,
    line_mask,
    parcel_cover,
    smooth,
    smooth_coarse,
    voronoi,
    zone_partition,
)


def forest_scene(shape, p, rng):
    h, w = shape
    stands, n = voronoi(shape, rng.uniform(90, 180), rng, warp=0.15)
    stand_db = rng.uniform(-8.5, -5.5, n)
    tex = gamma_texture(shape, p["texture_looks"], p["corr_px"], rng=rng)
    # crown clumps and gaps at a few tens of metres: about +-1 dB around the stand mean
    clumps = lin(rng.uniform(0.6, 1.3) * smooth_coarse(shape, rng.uniform(5.0, 10.0), rng, factor=2))
    scene = lin(stand_db)[stands] * clumps * tex
    # clearings: blobs plus straight tracks / firebreaks
    blob = smooth(shape, rng.uniform(12, 25), rng)
    clear = blob > np.quantile(blob, 1.0 - p["clearing_frac"])
    for _ in range(int(rng.integers(0, 3))):
        clear |= line_mask(shape, rng, rng.uniform(3, 7), curvy=rng.uniform(0, 30))
    clear = ndimage.binary_opening(clear, iterations=1)
    lab, nc = ndimage.label(clear)
    clear_db = rng.uniform(-16.0, -10.0, nc + 1)
    scene = np.where(clear, lin(clear_db)[lab], scene)
    tall = ~clear
    height = 1.0 + 2.0 * (0.5 + 0.5 * np.tanh(smooth(shape, 30.0, rng)))  # 1-3 px tree height
    scene, _ = edge_effects(scene, tall, height, p["incidence_deg"],
                             near_gain_db=rng.uniform(1.5, 3.5), shadow_value=lin(rng.uniform(-21, -18)))
    return scene


def fields_scene(shape, p, rng, params_rng=None):
    h, w = shape
    zones, boxes = zone_partition(shape, int(rng.integers(2, 5)), rng, wobble=4.0)
    scene = np.zeros(shape)
    pid = np.zeros(shape, dtype=np.int64)  # parcel id over the whole scene
    ang_sign = rng.choice([-1.0, 1.0])
    for z, sl in boxes:
        sub = (sl[0].stop - sl[0].start, sl[1].stop - sl[1].start)
        # each zone its own parcel scale drawn from the split's parcel ranges
        scale = p["parcel_px"] if z == 0 else p["_parcel_draw"]()
        if rng.random() < 0.6:
            ang = ang_sign * p["grid_angle_deg"] + rng.uniform(-3, 3)
            labels, n, _, _ = grid_parcels(sub, scale, ang, rng)
            row_dir = np.deg2rad(ang) + np.pi / 2
        else:
            labels, n = voronoi(sub, scale, rng, warp=0.06)
            row_dir = None
        part = parcel_cover(sub, labels, n, rng, p["row_period_px"], row_dir=row_dir)
        m = zones[sl] == z
        scene[sl][m] = part[m]
        pid[sl][m] = labels[m] + z * 1_000_000
    # hedges along a share of the parcel boundaries, casting short shadows
    bound = np.zeros(shape, dtype=bool)
    bound[:, 1:] |= pid[:, 1:] != pid[:, :-1]
    bound[1:, :] |= pid[1:, :] != pid[:-1, :]
    keep = smooth_coarse(shape, 40.0, rng) > rng.uniform(-0.3, 0.8)
    hedge = ndimage.binary_dilation(bound & keep, iterations=1)
    hedge_val = lin(rng.uniform(-7, -4.5)) * gamma_texture(shape, 3.0, 0.8, rng=rng)
    scene = np.where(hedge, hedge_val, scene)
    scene, _ = edge_effects(scene, hedge, np.full(shape, 1.5), p["incidence_deg"],
                             near_gain_db=1.0, shadow_value=lin(-20.0), near_px=1)
    # roads: dark asphalt or bright (fences, barriers, lined with poles)
    for _ in range(int(rng.integers(1, 4))):
        width = rng.uniform(1.2, 3.0)
        road = line_mask(shape, rng, width, curvy=rng.choice([0.0, rng.uniform(10, 40)]))
        val = lin(rng.uniform(-22, -19)) if rng.random() < 0.7 else lin(rng.uniform(-5, -1))
        scene = np.where(road, val, scene)
    return scene
