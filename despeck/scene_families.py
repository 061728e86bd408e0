"""Procedural radar-like scene families: clean reflectivity for training and evaluation.

:mod:`despeck.synthetic` draws one kind of lowland landscape. This module draws several
*families* of scenes that look like side-looking radar images, each with its own physics
approximation:

``terrain``
    A fractal elevation model (spectral synthesis, power-law spectrum) seen side-looking:
    backscatter follows the local incidence angle (Muhleman's law), slopes facing the
    radar are foreshortened (compressed into fewer range pixels, hence brighter), slopes
    facing away steeper than the grazing angle and the ground they hide are in radar
    shadow at the noise floor; vegetation adds Gamma texture; valley floors are flat
    fields and lakes.
``forest``
    K-distributed clutter (correlated Gamma texture, texture looks about 2-10) in stands,
    clearings and tracks, with the forest edge facing the radar slightly brighter and a
    shadow behind the edge facing away.
``fields``
    Agricultural parcels at several scales (rectangular strips and Voronoi cells), row-crop
    texture in some, roads (dark asphalt, or bright where lined with fences and barriers)
    and hedges with shadows.
``urban``
    Street grids with buildings: L-shaped double-bounce lines at the walls facing the
    radar (+10 to +30 dB), layover of the walls onto the street in front, shadows behind,
    bright point scatterers on roofs and streets, parks.
``water``
    Sea, lakes and rivers at very low backscatter (-25 to -18 dB) with wind-roughened
    patches, shorelines and ships.
``mixed``
    A landscape of zones drawn from the other families.
``wetland`` (evaluation only)
    Open channels, flooded forest brightened by trunk-water double bounce, reed marsh and
    mudflats. It is never in :data:`TRAINING_FAMILIES`.

Geometry convention: rows are azimuth, columns are range, the radar looks from the left
(near range at column 0) towards increasing column.

Values are linear sigma nought (power), float32. The backscatter levels (water -25 to
-18 dB, bare soil -17 to -12 dB, crops -14 to -8 dB, forest -8 to -5 dB, double bounce
and man-made points far above 0 dB, noise floor -28 dB) are common practice for C-band
imagery, chosen for plausibility, not fitted to a measured data set.

Every scene has a :class:`despeck.synthetic.SceneLayout`: boxes (>= 16 px) found on the
finished scene where the reflectivity is exactly constant (untextured surfaces by
construction) and isolated point targets 15-25 dB above a constant background, for
bias, ENL and point-retention measurements.

Train and test splits draw the family parameters (incidence angle, relief, parcel
scales, building density, texture looks, ...) from disjoint ranges
(:func:`split_ranges`, :func:`draw_parameters`), so evaluation scenes are never
training-like copies; the ``wetland`` family is evaluation-only.

References
----------
Muhleman, D. O. (1964). Radar scattering from Venus and the Moon. The Astronomical
Journal, 69, 34-41. (Law sigma0 ~ cos(t) / (sin(t) + 0.111 cos(t))^3; constants from
memory.)
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech
House. (K-distributed clutter: Gamma texture times speckle; radar geometry: layover,
foreshortening, shadow.)
Voss, R. F. (1988). Fractals in nature: from characterization to simulation. In The
Science of Fractal Images, Springer. (Spectral synthesis of fractional Brownian
surfaces, power spectrum ~ k^-beta.)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage, spatial, special

from .errors import InputError
from .synthetic import SceneLayout

__all__ = [
    "SCENE_FAMILIES",
    "TRAINING_FAMILIES",
    "EVALUATION_FAMILIES",
    "make_family_scene",
    "draw_parameters",
    "split_ranges",
    "fractal_surface",
    "gamma_texture",
    "muhleman_backscatter",
    "ground_to_slant",
]

SCENE_FAMILIES: tuple[str, ...] = ("terrain", "forest", "fields", "urban", "water", "mixed", "wetland")
TRAINING_FAMILIES: tuple[str, ...] = ("terrain", "forest", "fields", "urban", "water", "mixed")
EVALUATION_FAMILIES: tuple[str, ...] = tuple(f for f in SCENE_FAMILIES if f not in TRAINING_FAMILIES)
SPLITS = ("train", "test")

NOISE_FLOOR_DB = -28.0  # noise-equivalent sigma nought, C-band common practice
_MIN_BOX = 16
_MIN_POINTS = 3
_TERRAIN_PAD = 0.4  # margin per unit of max(h, w) * tan(rms slope) * cot(incidence)
_POINT_GAIN_DB = (15.0, 25.0)

# Parameter ranges per family and split: each a list of (low, high) intervals. Train and
# test intervals never overlap, so a test scene's parameters never occur in training.
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
                  "grid_angle_deg": [(0.0, 15.0)], "row_period_px": [(3.0, 5.0)]},
        "test": {"incidence_deg": _INCIDENCE["test"], "parcel_px": [(38.0, 62.0)],
                 "grid_angle_deg": [(18.0, 40.0)], "row_period_px": [(5.5, 8.0)]},
    },
    "urban": {
        "train": {"incidence_deg": _INCIDENCE["train"], "block_px": [(28.0, 52.0)],
                  "built_frac": [(0.55, 0.8)], "grid_angle_deg": [(3.0, 12.0)], "height_px": [(2.0, 7.0)]},
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


# --------------------------------------------------------------------------- helpers


def _lin(db):
    return 10.0 ** (np.asarray(db, dtype=np.float64) / 10.0)


def _check(family, shape, split):
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


def _as_rng(rng):
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def split_ranges(family: str, split: str = "train") -> dict:
    """The parameter ranges a family draws from in a split.

    Returns
    -------
    dict
        Parameter name -> list of (low, high) intervals (a copy).
    """
    _check(family, (64, 64), split)
    return {k: list(v) for k, v in _RANGES[family][split].items()}


def draw_parameters(family: str, *, rng, split: str = "train") -> dict:
    """Draw the split-controlled parameters of one scene of a family.

    Each parameter is drawn uniformly from the union of its intervals for the split
    (intervals weighted by length). :func:`make_family_scene` draws exactly these first.
    """
    _check(family, (64, 64), split)
    rng = _as_rng(rng)
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


def _spectral_noise(shape, rng, transfer):
    """White Gaussian noise filtered in the Fourier domain by transfer(ky, kx)."""
    h, w = shape
    ky = np.fft.fftfreq(h)[:, None]
    kx = np.fft.rfftfreq(w)[None, :]
    spec = np.fft.rfft2(rng.standard_normal((h, w))) * transfer(ky, kx)
    out = np.fft.irfft2(spec, s=(h, w))
    out -= out.mean()
    return out / (out.std() + 1e-12)


def _smooth(shape, sigma, rng, sigma_cols=None):
    """Zero-mean, unit-std Gaussian random field of correlation length sigma (pixels)."""
    sc = sigma if sigma_cols is None else sigma_cols
    return _spectral_noise(
        shape, rng, lambda ky, kx: np.exp(-2 * np.pi**2 * ((sigma * ky) ** 2 + (sc * kx) ** 2))
    )


def _smooth_coarse(shape, sigma, rng, factor=4):
    """Like _smooth for large sigma, drawn on a grid `factor` times coarser and upsampled."""
    h, w = shape
    hc, wc = -(-h // factor) + 1, -(-w // factor) + 1
    g = _smooth((hc, wc), sigma / factor, rng)
    out = ndimage.zoom(g, factor, order=1, prefilter=False)[:h, :w]
    return (out - out.mean()) / (out.std() + 1e-12)


def fractal_surface(shape, beta: float, *, rng):
    """Fractal (fractional Brownian) surface by spectral synthesis.

    White Gaussian noise is shaped in the Fourier domain so that the expected power
    spectrum is ``P(k) ~ |k|^-beta`` (``beta = 2H + 2`` for a surface of Hurst exponent H).

    Parameters
    ----------
    shape : (int, int)
    beta : float
        Spectral exponent, typically 3 to 4 for natural relief.
    rng : numpy.random.Generator or int

    Returns
    -------
    ndarray of float64, zero mean, unit standard deviation (periodic).

    References
    ----------
    Voss, R. F. (1988). Fractals in nature: from characterization to simulation. In
    The Science of Fractal Images, Springer.
    """
    rng = _as_rng(rng)

    def transfer(ky, kx):
        k2 = ky**2 + kx**2
        k2[0, 0] = np.inf  # no mean component
        return k2 ** (-beta / 4.0)

    return _spectral_noise((int(shape[0]), int(shape[1])), rng, transfer)


_GAMMA_GRID = np.linspace(-7.0, 7.0, 4097)


def gamma_texture(shape, looks: float, corr_px: float = 1.0, *, rng):
    """Spatially correlated Gamma texture with unit mean and variance 1/looks.

    A Gaussian random field of correlation length ``corr_px`` is mapped through the
    Gaussian CDF and the Gamma quantile function (a Gaussian copula), so every pixel is
    exactly Gamma(looks, 1/looks) distributed while neighbours are correlated. Multiplied
    by speckle it gives K-distributed clutter, whose normalised intensity moments are
    <I^2>/<I>^2 = 2 (1 + 1/looks) for single-look speckle and 1 + 1/looks for the
    texture alone.

    References
    ----------
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images.
    Artech House (K distribution, texture).
    """
    rng = _as_rng(rng)
    if not looks > 0:
        raise InputError(f"texture looks must be > 0, got {looks}")
    shape = (int(shape[0]), int(shape[1]))
    g = _smooth(shape, corr_px, rng) if corr_px > 0 else rng.standard_normal(shape)
    if corr_px <= 0:
        g = (g - g.mean()) / (g.std() + 1e-12)
    return _gamma_map(g, looks)


def _gamma_map(g, looks):
    """Map a standard normal field to unit-mean Gamma(looks) values (quantile transform)."""
    table = special.gammaincinv(looks, special.ndtr(_GAMMA_GRID)) / looks
    return _uniform_interp(g, _GAMMA_GRID[0], _GAMMA_GRID[1] - _GAMMA_GRID[0], table)


def _uniform_interp(x, x0, dx, table):
    """np.interp for a uniform grid x0 + dx * i (clamped at both ends), without searching."""
    t = np.clip((x - x0) / dx, 0.0, table.size - 1.000001)
    i = t.astype(np.int64)
    f = t - i
    return table[i] + f * (table[i + 1] - table[i])


def muhleman_backscatter(theta):
    """Muhleman's law, sigma0(theta) = 0.0118 cos(theta) / (sin(theta) + 0.111 cos(theta))^3.

    Used here only for its shape (the scenes rescale it to the land-cover level at the
    nominal incidence angle). theta in radians; angles beyond 90 degrees give 0.

    References
    ----------
    Muhleman, D. O. (1964). Radar scattering from Venus and the Moon. The Astronomical
    Journal, 69, 34-41 (constants from memory).
    """
    theta = np.asarray(theta, dtype=np.float64)
    c = np.clip(np.cos(theta), 0.0, None)
    s = np.sin(np.clip(theta, 0.0, np.pi / 2))
    return 0.0118 * c / (s + 0.111 * c) ** 3


def _voronoi(shape, scale, rng, warp=0.08, mask=None):
    """Voronoi cells of typical size `scale` with gently warped boundaries (int labels).

    With ``mask`` only the pixels inside it are labelled (the rest get label 0).
    """
    h, w = shape
    n = max(4, int(h * w / scale**2))
    seeds = rng.uniform(0, 1, size=(n, 2)) * (h, w)
    rows, cols = np.mgrid[0:h, 0:w].astype(np.float64)
    if warp > 0:
        rows += warp * scale * _smooth(shape, scale / 4, rng)
        cols += warp * scale * _smooth(shape, scale / 4, rng)
    tree = spatial.cKDTree(seeds)
    if mask is None:
        _, labels = tree.query(np.stack([rows.ravel(), cols.ravel()], axis=1), workers=1)
        return labels.reshape(shape).astype(np.int64), n
    out = np.zeros(shape, dtype=np.int64)
    if mask.any():
        _, out[mask] = tree.query(np.stack([rows[mask], cols[mask]], axis=1), workers=1)
    return out, n


def _zones(shape, n_zones, rng, wobble=12.0):
    """Partition into about n_zones rectangles (recursive splits) with wavy borders.

    Returns (labels, list of (row_slice, col_slice) bounding boxes). Zones are close to
    rectangles, so rendering each zone on its bounding box costs little more than the
    scene itself.
    """
    h, w = shape
    rects = [(0.0, 0.0, float(h), float(w))]
    while len(rects) < n_zones:
        rects.sort(key=lambda t: (t[2] - t[0]) * (t[3] - t[1]))
        r0, c0, r1, c1 = rects.pop()
        f = rng.uniform(0.35, 0.65)
        if (r1 - r0) > (c1 - c0):
            m = r0 + f * (r1 - r0)
            rects += [(r0, c0, m, c1), (m, c0, r1, c1)]
        else:
            m = c0 + f * (c1 - c0)
            rects += [(r0, c0, r1, m), (r0, m, r1, c1)]
    dr = wobble * _smooth((1, w), 30.0, rng)[0]  # row offset as a function of column
    dc = wobble * _smooth((h, 1), 30.0, rng)[:, 0]
    rr = np.clip(np.arange(h)[:, None] + dr[None, :], 0.0, h - 1e-6)
    cc = np.clip(np.arange(w)[None, :] + dc[:, None], 0.0, w - 1e-6)
    labels = np.zeros(shape, dtype=np.int64)
    boxes = []
    for k, (r0, c0, r1, c1) in enumerate(rects):
        labels[(rr >= r0) & (rr < r1) & (cc >= c0) & (cc < c1)] = k
    for k, sl in enumerate(ndimage.find_objects(labels + 1)):
        if sl is not None:
            boxes.append((k, sl))
    return labels, boxes


def _grid_parcels(shape, scale, angle_deg, rng):
    """Rectangular strip parcels rotated by angle; returns (labels, n_labels, u, v)."""
    h, w = shape
    a = np.deg2rad(angle_deg)
    r, c = np.mgrid[0:h, 0:w].astype(np.float64)
    u = c * np.cos(a) + r * np.sin(a)
    v = -c * np.sin(a) + r * np.cos(a)
    u0, u1, v0, v1 = u.min(), u.max(), v.min(), v.max()
    n_u = int((u1 - u0) / (0.5 * scale)) + 3
    widths = scale * rng.uniform(0.5, 1.5, n_u)
    edges = u0 - rng.uniform(0, 1) * widths[0] + np.cumsum(widths)
    iu = np.searchsorted(edges, u)
    lengths = scale * rng.uniform(0.8, 2.2, n_u + 1)
    offs = rng.uniform(0, 1, n_u + 1) * lengths
    iv = np.floor((v - v0 + offs[iu]) / lengths[iu]).astype(np.int64)
    n_v = int(iv.max()) + 1
    return iu * n_v + iv, (n_u + 1) * n_v, u, v


def _shift_cols(mask, k):
    """mask shifted by k columns towards far range (k > 0) or near range (k < 0)."""
    out = np.zeros_like(mask)
    if k > 0:
        out[:, k:] = mask[:, :-k]
    elif k < 0:
        out[:, :k] = mask[:, -k:]
    else:
        out[:] = mask
    return out


def _edge_effects(scene, tall, height_px, incidence_deg, *, near_gain_db, shadow_value, near_px=2):
    """Brighten the near-range edge of tall objects and cast shadows behind them.

    tall : bool mask of the objects (forest, hedges); height_px : their height map in
    pixels. Shadow length on the ground is height * tan(incidence) (side-looking
    geometry, Oliver & Quegan 1998).
    """
    theta = np.deg2rad(incidence_deg)
    shadow_len = height_px * np.tan(theta)
    kmax = int(np.ceil(shadow_len[tall].max())) if tall.any() else 0
    shadow = np.zeros_like(tall)
    for k in range(1, kmax + 1):
        shadow |= _shift_cols(tall & (shadow_len >= k), k)
    shadow &= ~tall
    near = np.zeros_like(tall)
    for k in range(1, near_px + 1):
        near |= _shift_cols(~tall, k)
    near &= tall
    scene = np.where(near, scene * _lin(near_gain_db), scene)
    return np.where(shadow, shadow_value, scene), shadow


def _find_boxes(scene, *, min_box=_MIN_BOX, max_half=48, max_boxes=24, per_region=3):
    """Boxes inside regions of exactly constant reflectivity (checked on the scene itself)."""
    const = ndimage.maximum_filter(scene, 3) == ndimage.minimum_filter(scene, 3)
    lab, n = ndimage.label(const)
    if n == 0:
        return []
    sizes = np.bincount(lab.ravel())
    boxes = []
    need = (min_box + 4) ** 2
    for i, sl in enumerate(ndimage.find_objects(lab), start=1):
        if sl is None or sizes[i] < need:
            continue
        m = lab[sl] == i
        for _ in range(per_region):
            dist = ndimage.distance_transform_cdt(np.pad(m, 1), metric="chessboard")[1:-1, 1:-1]
            half = min(int(dist.max()) - 2, max_half)
            if 2 * half < min_box:
                break
            r, c = np.unravel_index(np.argmax(dist), dist.shape)
            r0, c0 = r + sl[0].start - half, c + sl[1].start - half
            boxes.append((int(r0), int(c0), int(r0 + 2 * half), int(c0 + 2 * half)))
            m[max(r - half - 4, 0) : r + half + 4, max(c - half - 4, 0) : c + half + 4] = False
    boxes.sort(key=lambda b: -(b[2] - b[0]))
    return boxes[:max_boxes]


def _place_points(scene, boxes, n, rng, *, gain_db=_POINT_GAIN_DB, min_sep=12):
    """Isolated single-pixel targets on exactly constant 13x13 backgrounds, outside boxes."""
    h, w = scene.shape
    flat = ndimage.maximum_filter(scene, 13, mode="nearest") == ndimage.minimum_filter(scene, 13, mode="nearest")
    flat[:6, :] = flat[-6:, :] = False
    flat[:, :6] = flat[:, -6:] = False
    for r0, c0, r1, c1 in boxes:
        flat[max(r0 - 7, 0) : r1 + 7, max(c0 - 7, 0) : c1 + 7] = False
    idx = np.flatnonzero(flat)
    points = []
    if idx.size:
        order = idx[rng.permutation(idx.size)[: 50 * n + 200]]
        for k in order:
            r, c = divmod(int(k), w)
            if any(abs(r - pr) < min_sep and abs(c - pc) < min_sep for pr, pc in points):
                continue
            points.append((r, c))
            if len(points) >= n:
                break
    # too few constant backgrounds (rare: steep terrain, dense town): lay small flat pads
    # (a car park, a clearing) of the local median and put the target in the middle
    tries = 0
    while len(points) < min(n, _MIN_POINTS) and tries < 200:
        tries += 1
        r, c = int(rng.integers(8, h - 8)), int(rng.integers(8, w - 8))
        if any(abs(r - pr) < min_sep + 8 and abs(c - pc) < min_sep + 8 for pr, pc in points):
            continue
        near = [b for b in boxes if b[0] - 15 < r < b[2] + 15 and b[1] - 15 < c < b[3] + 15]
        if near and tries <= 100:
            continue
        for b in near:  # small scenes: give up a box rather than the targets
            boxes.remove(b)
        pad = scene[r - 7 : r + 8, c - 7 : c + 8]
        pad[:] = np.median(pad)
        points.append((r, c))
    for r, c in points:
        scene[r, c] *= _lin(rng.uniform(*gain_db))
    return points


def _finish(scene, rng, n_points=None, points_ok=True):
    """Cast to float32 and build the layout: constant boxes first, then points."""
    h, w = scene.shape
    scene = np.maximum(scene, _lin(NOISE_FLOOR_DB)).astype(np.float32)
    boxes = _find_boxes(scene)
    n = max(3, (h * w) // (160 * 160)) if n_points is None else n_points
    points = _place_points(scene, boxes, n, rng) if points_ok else []
    return scene, SceneLayout(homogeneous_boxes=boxes, points=points)


def _line_mask(shape, rng, width, curvy=0.0):
    """A straight (or gently curving) line across the scene of the given width (px)."""
    h, w = shape
    r, c = np.mgrid[0:h, 0:w].astype(np.float64)
    ang = rng.uniform(0, np.pi)
    r0, c0 = rng.uniform(0.15, 0.85) * h, rng.uniform(0.15, 0.85) * w
    along = (r - r0) * np.cos(ang) + (c - c0) * np.sin(ang)
    across = -(r - r0) * np.sin(ang) + (c - c0) * np.cos(ang)
    if curvy:
        across = across + curvy * np.sin(2 * np.pi * along / rng.uniform(200, 600) + rng.uniform(0, 6.3))
    return np.abs(across) < width / 2


# --------------------------------------------------------------------------- land cover

# name -> (dB range, texture looks or None for untextured)
_COVER = {
    "bare": ((-17.0, -12.0), None),
    "crop": ((-13.0, -8.0), None),
    "rowcrop": ((-14.0, -8.0), "rows"),
    "meadow": ((-15.0, -10.0), 14.0),
    "grass": ((-14.0, -10.0), None),
}


def _parcel_cover(shape, labels, n, rng, row_period, weights=None, row_dir=None):
    """Fill parcels with land cover; returns the scene (linear)."""
    h, w = shape
    names = list(_COVER)
    p = np.array([0.22, 0.3, 0.22, 0.14, 0.12] if weights is None else weights, dtype=float)
    cls = rng.choice(len(names), size=n, p=p / p.sum())
    level_db = np.array([rng.uniform(*_COVER[names[k]][0]) for k in cls])
    scene = _lin(level_db)[labels]
    rows_k = names.index("rowcrop")
    is_rows = (cls == rows_k)[labels]
    if is_rows.any():
        r, c = np.nonzero(is_rows)
        lab = labels[r, c]
        if row_dir is None:
            phi = rng.uniform(0, np.pi, n)
        else:
            phi = np.where(rng.random(n) < 0.7, row_dir, row_dir + np.pi / 2)
        period = row_period * rng.uniform(0.85, 1.15, n)
        amp = rng.uniform(0.25, 0.5, n)
        # rows perpendicular to the look direction (columns) return more (Bragg-like)
        amp = amp * (0.6 + 0.4 * np.abs(np.sin(phi)))
        ph = 2 * np.pi * (r * np.cos(phi[lab]) + c * np.sin(phi[lab])) / period[lab]
        scene[r, c] *= 1.0 + amp[lab] * np.sin(ph)
    mead_k = names.index("meadow")
    is_mead = (cls == mead_k)[labels]
    if is_mead.any():
        scene = np.where(is_mead, scene * gamma_texture(shape, 14.0, 1.0, rng=rng), scene)
    return scene


# --------------------------------------------------------------------------- families


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


def _terrain(shape, p, rng):
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
    forest = _smooth_coarse((h, wg), 25.0, rng) > rng.uniform(-0.5, 0.5)
    cover_db = np.where(forest, rng.uniform(-8.0, -6.0), rng.uniform(-12.0, -9.5))
    cover_db = cover_db + 1.0 * _smooth_coarse((h, wg), 8.0, rng, factor=2)
    # one correlated Gaussian field, two Gamma marginals (woods: few looks, grass: many)
    g = _smooth((h, wg), 1.1, rng)
    veg = np.where(forest, _gamma_map(g, rng.uniform(3, 6)), _gamma_map(g, rng.uniform(8, 15)))
    ground = _lin(cover_db) * veg * ratio
    # valley floor: untextured parcels, flat so the incidence is nominal everywhere
    labels, n = _voronoi((h, wg), rng.uniform(35, 80), rng, warp=0.0, mask=on_floor)
    floor_scene = _parcel_cover((h, wg), labels, n, rng, 4.0, weights=[0.3, 0.35, 0.1, 0.0, 0.25])
    ground = np.where(on_floor, floor_scene, ground)
    ground = np.where(lake, _lin(rng.uniform(-24, -20)), ground)
    img = ground_to_slant(ground, z, p["incidence_deg"], margin=pad)
    return img + _lin(NOISE_FLOOR_DB)


def _forest(shape, p, rng):
    h, w = shape
    stands, n = _voronoi(shape, rng.uniform(90, 180), rng, warp=0.15)
    stand_db = rng.uniform(-8.5, -5.5, n)
    tex = gamma_texture(shape, p["texture_looks"], p["corr_px"], rng=rng)
    # crown clumps and gaps at a few tens of metres: about +-1 dB around the stand mean
    clumps = _lin(rng.uniform(0.6, 1.3) * _smooth_coarse(shape, rng.uniform(5.0, 10.0), rng, factor=2))
    scene = _lin(stand_db)[stands] * clumps * tex
    # clearings: blobs plus straight tracks / firebreaks
    blob = _smooth(shape, rng.uniform(12, 25), rng)
    clear = blob > np.quantile(blob, 1.0 - p["clearing_frac"])
    for _ in range(int(rng.integers(0, 3))):
        clear |= _line_mask(shape, rng, rng.uniform(3, 7), curvy=rng.uniform(0, 30))
    clear = ndimage.binary_opening(clear, iterations=1)
    lab, nc = ndimage.label(clear)
    clear_db = rng.uniform(-16.0, -10.0, nc + 1)
    scene = np.where(clear, _lin(clear_db)[lab], scene)
    tall = ~clear
    height = 1.0 + 2.0 * (0.5 + 0.5 * np.tanh(_smooth(shape, 30.0, rng)))  # 1-3 px tree height
    scene, _ = _edge_effects(scene, tall, height, p["incidence_deg"],
                             near_gain_db=rng.uniform(1.5, 3.5), shadow_value=_lin(rng.uniform(-21, -18)))
    return scene


def _fields(shape, p, rng, params_rng=None):
    h, w = shape
    zones, boxes = _zones(shape, int(rng.integers(2, 5)), rng, wobble=4.0)
    scene = np.zeros(shape)
    pid = np.zeros(shape, dtype=np.int64)  # parcel id over the whole scene
    ang_sign = rng.choice([-1.0, 1.0])
    for z, sl in boxes:
        sub = (sl[0].stop - sl[0].start, sl[1].stop - sl[1].start)
        # each zone its own parcel scale drawn from the split's parcel ranges
        scale = p["parcel_px"] if z == 0 else p["_parcel_draw"]()
        if rng.random() < 0.6:
            ang = ang_sign * p["grid_angle_deg"] + rng.uniform(-3, 3)
            labels, n, _, _ = _grid_parcels(sub, scale, ang, rng)
            row_dir = np.deg2rad(ang) + np.pi / 2
        else:
            labels, n = _voronoi(sub, scale, rng, warp=0.06)
            row_dir = None
        part = _parcel_cover(sub, labels, n, rng, p["row_period_px"], row_dir=row_dir)
        m = zones[sl] == z
        scene[sl][m] = part[m]
        pid[sl][m] = labels[m] + z * 1_000_000
    # hedges along a share of the parcel boundaries, casting short shadows
    bound = np.zeros(shape, dtype=bool)
    bound[:, 1:] |= pid[:, 1:] != pid[:, :-1]
    bound[1:, :] |= pid[1:, :] != pid[:-1, :]
    keep = _smooth_coarse(shape, 40.0, rng) > rng.uniform(-0.3, 0.8)
    hedge = ndimage.binary_dilation(bound & keep, iterations=1)
    hedge_val = _lin(rng.uniform(-7, -4.5)) * gamma_texture(shape, 3.0, 0.8, rng=rng)
    scene = np.where(hedge, hedge_val, scene)
    scene, _ = _edge_effects(scene, hedge, np.full(shape, 1.5), p["incidence_deg"],
                             near_gain_db=1.0, shadow_value=_lin(-20.0), near_px=1)
    # roads: dark asphalt or bright (fences, barriers, lined with poles)
    for _ in range(int(rng.integers(1, 4))):
        width = rng.uniform(1.2, 3.0)
        road = _line_mask(shape, rng, width, curvy=rng.choice([0.0, rng.uniform(10, 40)]))
        val = _lin(rng.uniform(-22, -19)) if rng.random() < 0.7 else _lin(rng.uniform(-5, -1))
        scene = np.where(road, val, scene)
    return scene


def _urban(shape, p, rng):
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
    scene = np.full(shape, _lin(street_db))
    # plazas (paved, untextured) and parks (lawn, untextured, with a few tree clumps)
    plaza = ~built & ~park
    scene = np.where(plaza[block] & ~is_street, _lin(rng.uniform(-17, -13, nb))[block], scene)
    lawn = park[block] & ~is_street
    scene = np.where(lawn, _lin(rng.uniform(-13, -9, nb))[block], scene)
    trees = lawn & (_smooth(shape, 3.0, rng) > 1.6)
    scene = np.where(trees, _lin(-7.0) * gamma_texture(shape, 3.0, 1.0, rng=rng), scene)
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
    roof = _lin(roof_db)[np.maximum(bid, 0)] * gamma_texture(shape, 8.0, 0.8, rng=rng)
    scene = np.where(bld, roof, scene)
    hmap = np.where(bld, height[np.maximum(bid, 0)], 0.0)
    # layover: the wall facing the radar is imaged in front of the building (near range)
    lay_len = hmap / np.tan(theta)
    wall = _lin(rng.uniform(-6, 0))
    kmax = int(np.ceil(lay_len.max()))
    layover = np.zeros(shape, dtype=bool)
    for k in range(1, kmax + 1):
        layover |= _shift_cols(bld & (lay_len >= k), -k)
    # shadow behind the building (far range)
    sh_len = hmap * np.tan(theta)
    shadow = np.zeros(shape, dtype=bool)
    for k in range(1, int(np.ceil(sh_len.max())) + 1):
        shadow |= _shift_cols(bld & (sh_len >= k), k)
    shadow &= ~bld
    scene = np.where(shadow & ~layover, _lin(NOISE_FLOOR_DB), scene)
    scene = np.where(layover & ~bld, scene + wall, scene)
    # double bounce: L-shaped bright lines at the base of the walls facing the radar
    near_wall = bld & ~_shift_cols(bld, 1)  # first building pixel seen from near range
    db_line = _shift_cols(near_wall, -1) & ~bld
    # the second arm: the side wall turned towards the radar (depends on the grid rotation)
    side = bld & ~(np.roll(bld, 1 if a > 0 else -1, axis=0))
    side_line = np.roll(side, -1 if a > 0 else 1, axis=0) & ~bld
    g1 = rng.uniform(18, 30, nbid) - 0.5 * np.rad2deg(abs(a))
    g2 = rng.uniform(10, 16, nbid)
    bid_left = np.full(shape, -1)
    bid_left[:, :-1] = bid[:, 1:]
    scene = np.where(db_line, _lin(-8.0) * _lin(g1)[np.maximum(bid_left, 0)], scene)
    bid_side = np.roll(bid, -1 if a > 0 else 1, axis=0)
    scene = np.where(side_line & ~db_line, _lin(-8.0) * _lin(g2)[np.maximum(bid_side, 0)], scene)
    # very bright points: roof furniture and street furniture
    for mask, count, gain in ((bld, int(0.004 * bld.sum()) + 3, (18, 30)), (is_street, 8, (15, 25))):
        idx = np.flatnonzero(mask)
        if idx.size:
            pick = idx[rng.integers(0, idx.size, count)]
            scene.flat[pick] = scene.flat[pick] * _lin(rng.uniform(*gain, count))
    return scene


def _water_mask(shape, frac, rng):
    h, w = shape
    kind = rng.choice(["sea", "lake", "river"])
    # large-scale shape plus a fractal coastline (bays, headlands, small islands)
    f = _smooth_coarse(shape, rng.uniform(50, 90) * max(h, w) / 512, rng) + 0.35 * fractal_surface(shape, 3.2, rng=rng)
    if kind == "sea":
        ang = rng.uniform(0, 2 * np.pi)
        r, c = np.mgrid[0:h, 0:w]
        ramp = (np.cos(ang) * (r - h / 2) + np.sin(ang) * (c - w / 2)) / (0.25 * max(h, w))
        f = f + 2.5 * ramp
    if kind == "river":
        f = 0.5 * f
        river = _line_mask(shape, rng, rng.uniform(0.04, 0.1) * min(h, w), curvy=rng.uniform(20, 60))
        f = f + 3.0 * river
    water = f > np.quantile(f, 1.0 - frac)
    water = ndimage.binary_opening(water, iterations=2)
    return water


def _simple_land(shape, rng, row_period=4.0):
    labels, n, _, _ = _grid_parcels(shape, rng.uniform(30, 90), rng.uniform(-20, 20), rng)
    land = _parcel_cover(shape, labels, n, rng, row_period)
    woods = _smooth(shape, 20.0, rng) > 1.0
    return np.where(woods, _lin(-7.0) * gamma_texture(shape, 4.0, 1.0, rng=rng), land)


def _water(shape, p, rng):
    h, w = shape
    water = _water_mask(shape, p["water_frac"], rng)
    scene = _simple_land(shape, rng)
    base = p["water_db"]
    # wind-roughened patches: streaky (elongated along the wind) brightening, exactly
    # zero outside the patches so calm water stays constant
    wind_dir = rng.random() < 0.5
    gusts = _smooth_coarse(shape, 45.0, rng)
    streak = _smooth(shape, 16.0, rng, sigma_cols=3.0) if wind_dir else _smooth(shape, 3.0, rng, sigma_cols=16.0)
    rough = np.clip((gusts + 0.35 * streak - rng.uniform(0.0, 0.9)) / 1.2, 0.0, 1.0)
    water_db = base + p["wind_db"] * rough
    scene = np.where(water, _lin(water_db), scene)
    # shoreline: a bright rim on part of the coast (rocks, surf, embankments)
    shore = water & ~ndimage.binary_erosion(water, iterations=1)
    shore &= _smooth(shape, 20.0, rng) > 0.0
    scene = np.where(ndimage.binary_dilation(shore) & ~water, scene * _lin(4.0), scene)
    # ships: small bright elongated targets on open water
    inner = ndimage.binary_erosion(water, iterations=8)
    idx = np.flatnonzero(inner)
    for k in idx[rng.integers(0, idx.size, int(rng.integers(2, 9)))] if idx.size else []:
        r0, c0 = divmod(int(k), w)
        ln, wd = int(rng.integers(3, 9)), int(rng.integers(1, 3))
        if rng.random() < 0.5:
            ln, wd = wd, ln
        sl = (slice(r0, min(r0 + ln, h)), slice(c0, min(c0 + wd, w)))
        scene[sl] = _lin(base + rng.uniform(25, 35)) * rng.uniform(0.3, 1.0, scene[sl].shape)
    return scene


def _wetland(shape, p, rng):
    h, w = shape
    zones, n = _voronoi(shape, rng.uniform(50, 110), rng, warp=0.2)
    # 0 open water, 1 flooded forest, 2 reed marsh, 3 mudflat, 4 wet meadow
    kind = rng.choice(5, size=n, p=[0.2, 0.25, 0.25, 0.15, 0.15])
    k = kind[zones]
    scene = np.zeros(shape)
    scene = np.where(k == 0, _lin(p["water_db"]), scene)
    forest = _lin(rng.uniform(-8, -6) + p["flood_gain_db"]) * gamma_texture(shape, p["texture_looks"], 1.3, rng=rng)
    scene = np.where(k == 1, forest, scene)
    reed = _lin(rng.uniform(-12, -9, n))[zones] * gamma_texture(shape, 2 * p["texture_looks"], 1.0, rng=rng)
    scene = np.where(k == 2, reed, scene)
    scene = np.where(k == 3, _lin(rng.uniform(-18, -15, n))[zones], scene)
    scene = np.where(k == 4, _lin(rng.uniform(-14, -11, n))[zones], scene)
    # meandering channels
    for _ in range(int(rng.integers(1, 4))):
        ch = _line_mask(shape, rng, rng.uniform(3, 10), curvy=rng.uniform(20, 60))
        scene = np.where(ch, _lin(p["water_db"]), scene)
    tall = k == 1
    scene, _ = _edge_effects(scene, tall, np.full(shape, 2.0), p["incidence_deg"],
                             near_gain_db=2.0, shadow_value=_lin(-22.0))
    return scene


def _mixed(shape, p, rng, split):
    h, w = shape
    zones, boxes = _zones(shape, p["n_zones"], rng, wobble=25.0)
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
        return _terrain(shape, p, rng)
    if family == "forest":
        return _forest(shape, p, rng)
    if family == "fields":
        p["_parcel_draw"] = lambda: draw_parameters("fields", rng=rng, split=split)["parcel_px"]
        return _fields(shape, p, rng)
    if family == "urban":
        return _urban(shape, p, rng)
    if family == "water":
        return _water(shape, p, rng)
    if family == "wetland":
        return _wetland(shape, p, rng)
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
    h, w = _check(family, shape, split)
    rng = _as_rng(rng)
    scene = _render(family, (h, w), rng, split)
    scene, layout = _finish(scene, rng)
    return (scene, layout) if return_layout else scene
