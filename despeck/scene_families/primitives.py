"""Shared building blocks of the scene families: random fields, textures, backscatter law, partitions, land cover.

Gaussian random fields by spectral filtering, fractal surfaces, correlated Gamma
texture (a Gaussian copula), Muhleman's backscatter law, Voronoi cells, zones and strip
parcels, radar-geometry edge effects (bright near edge, shadow behind), lines (roads,
channels) and the untextured or row-crop land cover of parcels.

References
----------
Muhleman, D. O. (1964). Radar scattering from Venus and the Moon. The Astronomical
Journal, 69, 34-41 (constants from memory).
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech
House. (K distribution, texture; side-looking geometry.)
Voss, R. F. (1988). Fractals in nature: from characterization to simulation. In The
Science of Fractal Images, Springer.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage, spatial, special

from ..errors import InputError

__all__ = ["fractal_surface", "gamma_texture", "muhleman_backscatter"]


NOISE_FLOOR_DB = -28.0  # noise-equivalent sigma nought, C-band common practice


def lin(db):
    return 10.0 ** (np.asarray(db, dtype=np.float64) / 10.0)


def as_rng(rng):
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def _spectral_noise(shape, rng, transfer):
    """White Gaussian noise filtered in the Fourier domain by transfer(ky, kx)."""
    h, w = shape
    ky = np.fft.fftfreq(h)[:, None]
    kx = np.fft.rfftfreq(w)[None, :]
    spec = np.fft.rfft2(rng.standard_normal((h, w))) * transfer(ky, kx)
    out = np.fft.irfft2(spec, s=(h, w))
    out -= out.mean()
    return out / (out.std() + 1e-12)


def smooth(shape, sigma, rng, sigma_cols=None):
    """Zero-mean, unit-std Gaussian random field of correlation length sigma (pixels)."""
    sc = sigma if sigma_cols is None else sigma_cols
    return _spectral_noise(
        shape, rng, lambda ky, kx: np.exp(-2 * np.pi**2 * ((sigma * ky) ** 2 + (sc * kx) ** 2))
    )


def smooth_coarse(shape, sigma, rng, factor=4):
    """Like smooth for large sigma, drawn on a grid `factor` times coarser and upsampled."""
    h, w = shape
    hc, wc = -(-h // factor) + 1, -(-w // factor) + 1
    g = smooth((hc, wc), sigma / factor, rng)
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
    rng = as_rng(rng)

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
    rng = as_rng(rng)
    if not looks > 0:
        raise InputError(f"texture looks must be > 0, got {looks}")
    shape = (int(shape[0]), int(shape[1]))
    g = smooth(shape, corr_px, rng) if corr_px > 0 else rng.standard_normal(shape)
    if corr_px <= 0:
        g = (g - g.mean()) / (g.std() + 1e-12)
    return gamma_map(g, looks)


def gamma_map(g, looks):
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


def voronoi(shape, scale, rng, warp=0.08, mask=None):
    """Voronoi cells of typical size `scale` with gently warped boundaries (int labels).

    With ``mask`` only the pixels inside it are labelled (the rest get label 0).
    """
    h, w = shape
    n = max(4, int(h * w / scale**2))
    seeds = rng.uniform(0, 1, size=(n, 2)) * (h, w)
    rows, cols = np.mgrid[0:h, 0:w].astype(np.float64)
    if warp > 0:
        rows += warp * scale * smooth(shape, scale / 4, rng)
        cols += warp * scale * smooth(shape, scale / 4, rng)
    tree = spatial.cKDTree(seeds)
    if mask is None:
        _, labels = tree.query(np.stack([rows.ravel(), cols.ravel()], axis=1), workers=1)
        return labels.reshape(shape).astype(np.int64), n
    out = np.zeros(shape, dtype=np.int64)
    if mask.any():
        _, out[mask] = tree.query(np.stack([rows[mask], cols[mask]], axis=1), workers=1)
    return out, n


def zone_partition(shape, n_zones, rng, wobble=12.0):
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
    dr = wobble * smooth((1, w), 30.0, rng)[0]  # row offset as a function of column
    dc = wobble * smooth((h, 1), 30.0, rng)[:, 0]
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


def grid_parcels(shape, scale, angle_deg, rng):
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


def shift_cols(mask, k):
    """mask shifted by k columns towards far range (k > 0) or near range (k < 0)."""
    out = np.zeros_like(mask)
    if k > 0:
        out[:, k:] = mask[:, :-k]
    elif k < 0:
        out[:, :k] = mask[:, -k:]
    else:
        out[:] = mask
    return out


def edge_effects(scene, tall, height_px, incidence_deg, *, near_gain_db, shadow_value, near_px=2):
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
        shadow |= shift_cols(tall & (shadow_len >= k), k)
    shadow &= ~tall
    near = np.zeros_like(tall)
    for k in range(1, near_px + 1):
        near |= shift_cols(~tall, k)
    near &= tall
    scene = np.where(near, scene * lin(near_gain_db), scene)
    return np.where(shadow, shadow_value, scene), shadow


def line_mask(shape, rng, width, curvy=0.0):
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


def parcel_cover(shape, labels, n, rng, row_period, weights=None, row_dir=None):
    """Fill parcels with land cover; returns the scene (linear)."""
    h, w = shape
    names = list(_COVER)
    p = np.array([0.22, 0.3, 0.22, 0.14, 0.12] if weights is None else weights, dtype=float)
    cls = rng.choice(len(names), size=n, p=p / p.sum())
    level_db = np.array([rng.uniform(*_COVER[names[k]][0]) for k in cls])
    scene = lin(level_db)[labels]
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
