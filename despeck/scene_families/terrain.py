"""The ``terrain`` family: fractal relief seen side-looking (incidence law, foreshortening, layover, shadow).

References
----------
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech
House. (imaging geometry: foreshortening, layover, shadow.)
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .primitives import (
    NOISE_FLOOR_DB,
    fractal_surface,
    gamma_map,
    lin,
    muhleman_backscatter,
    parcel_cover,
    smooth,
    smooth_coarse,
    voronoi,
)

__all__ = ["ground_to_slant"]


_TERRAIN_PAD = 0.4  # margin per unit of max(h, w) * tan(rms slope) * cot(incidence)


def ground_to_slant(ground, elevation, incidence_deg: float, *, margin: int):
    """Image a ground-range reflectivity map side-looking, in slant range.

    The radar looks along the columns from the left (near range at column 0) with
    incidence angle ``incidence_deg`` on flat ground. In the plane-wave approximation a
    ground point at column x and height z lies at slant position
    ``rho = x - z cot(theta)`` (in flat-ground pixel units), so slopes facing the radar
    (dz/dx > 0) are foreshortened by the factor ``1 - dz/dx cot(theta)`` and appear
    brighter, slopes facing away are stretched and darker. Each output pixel collects the
    ground signal whose ``rho`` falls into it (energy is conserved along a row). Layover
    (``dz/dx > tan(theta)``) is collapsed onto the nearest range. Ground hidden from the
    radar by terrain nearer in range (radar shadow, where ``z + x cot(theta)`` is below
    its running maximum) returns nothing (0; add the noise floor afterwards).

    Parameters
    ----------
    ground : ndarray (rows, cols_ground)
        Reflectivity per unit ground area (already including the local-incidence law).
    elevation : ndarray (rows, cols_ground)
        Height in ground-pixel units.
    incidence_deg : float
        Incidence angle on flat ground, degrees (0 < theta < 90).
    margin : int
        Ground columns on each side not imaged (room for the range shifts
        ``z cot(theta)``); the output has ``cols_ground - 2 margin`` columns, output
        column j centred on ``rho = margin + j``.

    Returns
    -------
    ndarray of float64, (rows, cols_ground - 2 margin). Runs of exactly equal ground
    values on level ground that cover a whole output pixel give exactly that value.

    References
    ----------
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images.
    Artech House (imaging geometry: foreshortening, layover, shadow).
    """
    ground = np.asarray(ground, dtype=np.float64)
    z = np.asarray(elevation, dtype=np.float64)
    if ground.ndim != 2 or ground.shape != z.shape:
        raise InputError(f"ground and elevation must be 2-D arrays of one shape, got {ground.shape} and {z.shape}")
    if not 0.0 < incidence_deg < 90.0:
        raise InputError(f"incidence angle must be between 0 and 90 degrees, got {incidence_deg}")
    h, wg = ground.shape
    pad = int(margin)
    w = wg - 2 * pad
    if pad < 0 or w < 1:
        raise InputError(f"margin {margin} leaves no output columns for {wg} ground columns")
    theta = np.deg2rad(incidence_deg)
    cot = 1.0 / np.tan(theta)
    x = np.arange(wg, dtype=np.float64)
    # radar shadow: hidden from the radar by terrain nearer in range
    q = z + x[None, :] * cot
    shadow = np.maximum.accumulate(q, axis=1) > q + 1e-9
    ground = np.where(shadow, 0.0, ground)
    # ground range -> slant range; the running maximum keeps the mapping monotonic
    rho = x[None, :] - z * cot
    rho_e = np.empty((h, wg + 1))
    rho_e[:, 1:-1] = 0.5 * (rho[:, 1:] + rho[:, :-1])
    rho_e[:, 0] = rho[:, 0] - 0.5
    rho_e[:, -1] = rho[:, -1] + 0.5
    rho_e = np.maximum.accumulate(rho_e, axis=1) + 1e-7 * np.arange(wg + 1)[None, :]
    cum = np.zeros((h, wg + 1))
    np.cumsum(ground, axis=1, out=cum[:, 1:])
    # one interpolation for all rows: rows are stacked on disjoint stretches of the axis
    span = float(rho_e.max() - rho_e.min()) + wg + 4.0
    off = (np.arange(h) * span)[:, None]
    # queries outside a row's imaged range clamp to its ends (no ground there: zero)
    q_edges = np.clip(pad - 0.5 + np.arange(w + 1)[None, :], rho_e[:, :1], rho_e[:, -1:]) + off
    xp = (rho_e + off).ravel()
    e_at = np.interp(q_edges.ravel(), xp, np.tile(np.arange(wg + 1, dtype=np.float64), h)).reshape(h, w + 1)
    # the cumulated ground signal is linear in the edge index between knots
    rr = np.arange(h)[:, None]
    e0 = np.clip(np.floor(e_at).astype(np.int64), 0, wg - 1)
    c_at = cum[rr, e0] + (e_at - e0) * (cum[rr, e0 + 1] - cum[rr, e0])
    img = np.diff(c_at, axis=1)
    # where an output pixel lies inside one run of equal ground values at one height
    # (level ground: no foreshortening), use that value exactly, so flat untextured
    # ground stays exactly constant in the image
    run = np.zeros((h, wg), dtype=np.int64)
    run[:, 1:] = np.cumsum((ground[:, 1:] != ground[:, :-1]) | (z[:, 1:] != z[:, :-1]), axis=1)
    lo = e0[:, :-1]
    hi = np.clip(np.ceil(e_at[:, 1:]).astype(np.int64) - 1, 0, wg - 1)
    hi = np.maximum(hi, lo)
    level = np.zeros((h, wg), dtype=bool)  # both pixel edges at the pixel's own height
    level[:, 1:-1] = (z[:, 1:-1] == z[:, :-2]) & (z[:, 1:-1] == z[:, 2:])
    same = (run[rr, lo] == run[rr, hi]) & level[rr, lo] & level[rr, hi] & ~shadow[rr, lo]
    return np.where(same, ground[rr, lo], img)


def terrain_scene(shape, p, rng):
    h, w = shape
    theta = np.deg2rad(p["incidence_deg"])
    cot = 1.0 / np.tan(theta)
    # elevation: a fractal surface made peaky (exp) so valleys are broad and summits
    # steep, scaled to the requested rms slope (pixel units: 1 = one ground pixel)
    # extra columns on both sides for the range shifts z cot(theta); the elevation range
    # grows with the rms slope (and the domain), so the margin follows them
    tan_s = np.tan(np.deg2rad(p["rms_slope_deg"]))
    coef = _TERRAIN_PAD + 0.5 * max(p["beta"] - 4.0, 0.0)
    pad = int(np.ceil(coef * max(h, w) * tan_s * cot)) + 8
    wg0 = w + 2 * pad
    f = fractal_surface((h, wg0), p["beta"], rng=rng)
    z0 = np.exp(rng.uniform(0.4, 1.1) * f)
    gy, gx = np.gradient(z0)
    z0 *= tan_s / np.sqrt(np.mean(gx**2 + gy**2) / 2)
    # flat valley floors (fields) with lakes in the deepest parts
    q_floor, q_lake = rng.uniform(0.08, 0.25), rng.uniform(0.0, 0.07)
    floor, lake_level = np.quantile(z0, [q_floor, q_lake])
    z = np.maximum(z0, floor)
    on_floor = z0 <= floor
    lake = z0 < lake_level
    z = z - 0.5 * (z.max() + z.min())
    # keep the range shifts +-z cot(theta) inside the extra columns: rare high summits
    # are compressed smoothly above 80 % of the margin (no flat plateaus)
    zlim = (pad - 2) / cot
    knee = 0.8 * zlim
    over = np.abs(z) > knee
    if over.any():
        z = np.where(over, np.sign(z) * (knee + (zlim - knee) * np.tanh((np.abs(z) - knee) / (zlim - knee))), z)
    wg = wg0

    zy, zx = np.gradient(z)
    cos_loc = (zx * np.sin(theta) + np.cos(theta)) / np.sqrt(1.0 + zx**2 + zy**2)
    ratio = muhleman_backscatter(np.arccos(np.clip(cos_loc, -1, 1))) / muhleman_backscatter(theta)
    # land cover on the slopes: forest and grass patches, both textured
    forest = smooth_coarse((h, wg), 25.0, rng) > rng.uniform(-0.5, 0.5)
    cover_db = np.where(forest, rng.uniform(-8.0, -6.0), rng.uniform(-12.0, -9.5))
    cover_db = cover_db + 1.0 * smooth_coarse((h, wg), 8.0, rng, factor=2)
    # one correlated Gaussian field, two Gamma marginals (woods: few looks, grass: many)
    g = smooth((h, wg), 1.1, rng)
    veg = np.where(forest, gamma_map(g, rng.uniform(3, 6)), gamma_map(g, rng.uniform(8, 15)))
    ground = lin(cover_db) * veg * ratio
    # valley floor: untextured parcels, flat so the incidence is nominal everywhere
    labels, n = voronoi((h, wg), rng.uniform(35, 80), rng, warp=0.0, mask=on_floor)
    floor_scene = parcel_cover((h, wg), labels, n, rng, 4.0, weights=[0.3, 0.35, 0.1, 0.0, 0.25])
    ground = np.where(on_floor, floor_scene, ground)
    ground = np.where(lake, lin(rng.uniform(-24, -20)), ground)
    img = ground_to_slant(ground, z, p["incidence_deg"], margin=pad)
    return img + lin(NOISE_FLOOR_DB)
