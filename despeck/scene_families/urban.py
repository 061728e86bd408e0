"""The ``urban`` family: street grids and buildings with double bounce, layover, shadows and bright points."""

from __future__ import annotations

import numpy as np

from .primitives import NOISE_FLOOR_DB, gamma_texture, lin, shift_cols, smooth


def urban_scene(shape, p, rng):
    h, w = shape
    theta = np.deg2rad(p["incidence_deg"])
    a = np.deg2rad(p["grid_angle_deg"]) * rng.choice([-1.0, 1.0])
    r, c = np.mgrid[0:h, 0:w].astype(np.float64)
    u = c * np.cos(a) + r * np.sin(a)
    v = -c * np.sin(a) + r * np.cos(a)
    pitch = p["block_px"]
    street = rng.uniform(3.0, 6.0)

    def cells(coord):
        lo, hi = coord.min() - pitch, coord.max() + pitch
        n = int((hi - lo) / (0.6 * pitch)) + 2
        edges = lo + np.cumsum(pitch * rng.uniform(0.7, 1.3, n))
        idx = np.searchsorted(edges, coord)
        start = np.concatenate([[lo], edges])[idx]
        return idx, coord - start, np.concatenate([edges[:1] - lo, np.diff(edges), [pitch]])[idx], n + 1

    iu, lu, su, nu_ = cells(u)
    iv, lv, sv, nv_ = cells(v)
    block = iu * nv_ + iv
    nb = nu_ * nv_
    is_street = (lu < street) | (lv < street)
    kind = rng.random(nb)
    built = kind < p["built_frac"]
    park = (kind >= p["built_frac"]) & (kind < p["built_frac"] + 0.7 * (1 - p["built_frac"]))
    street_db = rng.uniform(-19, -15)
    scene = np.full(shape, lin(street_db))
    # plazas (paved, untextured) and parks (lawn, untextured, with a few tree clumps)
    plaza = ~built & ~park
    scene = np.where(plaza[block] & ~is_street, lin(rng.uniform(-17, -13, nb))[block], scene)
    lawn = park[block] & ~is_street
    scene = np.where(lawn, lin(rng.uniform(-13, -9, nb))[block], scene)
    trees = lawn & (smooth(shape, 3.0, rng) > 1.6)
    scene = np.where(trees, lin(-7.0) * gamma_texture(shape, 3.0, 1.0, rng=rng), scene)
    # buildings: each built block split into 1-4 x 1-3 buildings, inset from the street,
    # separated by alleys and courtyards
    inset = rng.uniform(1.0, 3.0, nb)
    gap = rng.uniform(1.5, 4.0, nb)[block]

    def split(local, size, nmax):
        ns = rng.integers(1, nmax + 1, nb)[block]
        b = local - street - inset[block]
        extent = size - street - 2 * inset[block]
        part = np.clip(np.floor(b / np.maximum(extent, 1) * ns), 0, 3).astype(np.int64)
        seg = extent / ns
        within = b - part * seg
        return part, (b >= 0) & (b < extent) & (within < seg - gap)

    part_u, ok_u = split(lu, su, 4)
    part_v, ok_v = split(lv, sv, 3)
    bld = built[block] & ok_u & ok_v
    bid = np.where(bld, block * 16 + part_u * 4 + part_v, -1)
    nbid = nb * 16
    height = p["height_px"] * rng.uniform(0.5, 1.5, nbid)
    roof_db = rng.uniform(-11, -4, nbid)
    roof = lin(roof_db)[np.maximum(bid, 0)] * gamma_texture(shape, 8.0, 0.8, rng=rng)
    scene = np.where(bld, roof, scene)
    hmap = np.where(bld, height[np.maximum(bid, 0)], 0.0)
    # layover: the wall facing the radar is imaged in front of the building (near range)
    lay_len = hmap / np.tan(theta)
    wall = lin(rng.uniform(-6, 0))
    kmax = int(np.ceil(lay_len.max()))
    layover = np.zeros(shape, dtype=bool)
    for k in range(1, kmax + 1):
        layover |= shift_cols(bld & (lay_len >= k), -k)
    # shadow behind the building (far range)
    sh_len = hmap * np.tan(theta)
    shadow = np.zeros(shape, dtype=bool)
    for k in range(1, int(np.ceil(sh_len.max())) + 1):
        shadow |= shift_cols(bld & (sh_len >= k), k)
    shadow &= ~bld
    scene = np.where(shadow & ~layover, lin(NOISE_FLOOR_DB), scene)
    scene = np.where(layover & ~bld, scene + wall, scene)
    # double bounce: L-shaped bright lines at the base of the walls facing the radar
    near_wall = bld & ~shift_cols(bld, 1)  # first building pixel seen from near range
    db_line = shift_cols(near_wall, -1) & ~bld
    # the second arm: the side wall turned towards the radar (depends on the grid rotation)
    side = bld & ~(np.roll(bld, 1 if a > 0 else -1, axis=0))
    side_line = np.roll(side, -1 if a > 0 else 1, axis=0) & ~bld
    g1 = rng.uniform(18, 30, nbid) - 0.5 * np.rad2deg(abs(a))
    g2 = rng.uniform(10, 16, nbid)
    bid_left = np.full(shape, -1)
    bid_left[:, :-1] = bid[:, 1:]
    scene = np.where(db_line, lin(-8.0) * lin(g1)[np.maximum(bid_left, 0)], scene)
    bid_side = np.roll(bid, -1 if a > 0 else 1, axis=0)
    scene = np.where(side_line & ~db_line, lin(-8.0) * lin(g2)[np.maximum(bid_side, 0)], scene)
    # very bright points: roof furniture and street furniture
    for mask, count, gain in ((bld, int(0.004 * bld.sum()) + 3, (18, 30)), (is_street, 8, (15, 25))):
        idx = np.flatnonzero(mask)
        if idx.size:
            pick = idx[rng.integers(0, idx.size, count)]
            scene.flat[pick] = scene.flat[pick] * lin(rng.uniform(*gain, count))
    return scene
