"""Smoothing and radiometry: ENL, radiometric bias, the ratio image and the unassisted measure M.

References
----------
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE GRSM 1(3), 6-35.
doi:10.1109/MGRS.2013.2277512
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from ..speckle import check_looks
from .areas import check_areas
from .images import check_image, enl_of_values, image_pair, positive_pair

__all__ = [
    "enl", "radiometric_bias_db", "ratio_image", "ratio_statistics", "glcm_homogeneity", "unassisted_m"
]


def enl(intensity, areas, valid=None):
    """Equivalent number of looks ``mean^2 / variance`` of intensity over each area.

    Returns
    -------
    ndarray of float64, one value per area.

    References
    ----------
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech House.
    """
    x = check_image(intensity, "intensity")
    masks = check_areas(areas, x.shape, valid)
    ok = np.isfinite(x) if valid is None else np.isfinite(x) & np.asarray(valid, dtype=bool)
    return np.array([enl_of_values(x[m & ok]) for m in masks])


def radiometric_bias_db(original, filtered, areas, valid=None):
    """Radiometric bias ``10 log10(mean(filtered) / mean(original))`` per area and overall (dB).

    Overall uses the pixels of all areas together. Ideal 0 dB: a filter should keep the mean
    reflectivity of homogeneous areas (Argenti et al. 2013, module references).

    Returns
    -------
    (per_area, overall) : (ndarray, float)
    """
    o, f, ok = image_pair(original, filtered, valid)
    masks = check_areas(areas, o.shape, ok)
    per = np.array([10.0 * math.log10(f[m & ok].mean() / o[m & ok].mean()) for m in masks])
    union = np.zeros(o.shape, dtype=bool)
    for m in masks:
        union |= m
    union &= ok
    return per, float(10.0 * math.log10(f[union].mean() / o[union].mean()))


def ratio_image(original, filtered, valid=None):
    """Ratio image ``original / filtered`` and its validity (both positive and finite).

    For an ideal filter it is pure speckle: mean 1, ENL equal to the input's looks,
    no structure. Invalid pixels are set to 1.
    """
    o, f, ok = positive_pair(original, filtered, valid)
    r = np.ones(o.shape)
    r[ok] = o[ok] / f[ok]
    return r, ok


def ratio_statistics(original, filtered, areas, looks, valid=None):
    """Mean of the ratio image, and its ENL over the areas against the input's looks.

    Returns
    -------
    dict
        ``mean`` (all valid pixels), ``enl`` (per area), ``enl_median``,
        ``enl_over_looks`` (median ENL / looks, ideal 1).
    """
    L = check_looks(looks)
    r, ok = ratio_image(original, filtered, valid)
    e = enl(r, areas, ok)
    med = float(np.median(e))
    return {"mean": float(r[ok].mean()), "enl": e, "enl_median": med, "enl_over_looks": med / L}


def glcm_homogeneity(levels_image, valid=None, *, levels=None):
    """Grey-level co-occurrence homogeneity at distance 1, averaged over 0, 45, 90 and 135 degrees.

    ``sum_ij P(i, j) / (1 + (i - j)^2)`` with ``P`` the normalised symmetric
    co-occurrence matrix is the mean of ``1 / (1 + (a - b)^2)`` over the pixel pairs,
    so no matrix is built. Only pairs of valid pixels count. Equals
    ``skimage.feature.graycoprops(..., 'homogeneity')`` averaged over the four angles.
    """
    q = np.asarray(levels_image)
    if q.ndim != 2:
        raise InputError(f"levels image must be 2-D, got shape {q.shape}")
    q = q.astype(np.float64)
    ok = np.ones(q.shape, dtype=bool) if valid is None else np.asarray(valid, dtype=bool)
    values = []
    H, W = q.shape
    for dr, dc in ((0, 1), (1, 1), (1, 0), (1, -1)):
        c0, c1 = max(0, -dc), W - max(0, dc)
        a, b = q[: H - dr, c0:c1], q[dr:, c0 + dc : c1 + dc]
        va, vb = ok[: H - dr, c0:c1], ok[dr:, c0 + dc : c1 + dc]
        both = va & vb
        if not both.any():
            raise InputError("no pair of valid neighbouring pixels for the co-occurrence homogeneity")
        values.append(float(np.mean(1.0 / (1.0 + (a[both] - b[both]) ** 2))))
    return float(np.mean(values))


def _quantise(values, levels):
    """Equally populated levels 0..levels-1 (rank based, so independent of scale)."""
    ranks = np.argsort(np.argsort(values, kind="stable"), kind="stable")
    return (ranks * levels // values.size).astype(np.int64)


def unassisted_m(original, filtered, areas, valid=None, *, shuffles=10, levels=16, seed=0):
    """Unassisted quality measure M of a despeckling filter (Gomez et al. 2017); 0 is ideal.

    ``M = r_ENL,mu + delta_h`` with

    * ``r_ENL,mu = 1/2 sum_i (|ENL_I(i) - ENL_r(i)| / ENL_I(i) + |1 - mu_r(i)|)`` over
      the homogeneous areas ``i``, ``ENL_I`` of the input, ``ENL_r`` and ``mu_r`` of
      the ratio image;
    * ``delta_h = 100 |h0 - mean_g(h_g)| / h0`` with ``h0`` the co-occurrence
      homogeneity (:func:`glcm_homogeneity`) of the ratio image and ``h_g`` that of
      ``shuffles`` random permutations of its valid pixels (seeded: deterministic).

    The ratio image is quantised into ``levels`` equally populated levels before the
    co-occurrence. The formula is from memory (Gomez et al. 2017, below) and so are the
    quantisation and number of shuffles; the sum over areas grows with their number,
    so compare M only between filters measured on the same areas.

    Returns
    -------
    dict with ``M``, ``r_enl_mu`` and ``delta_h``.

    References
    ----------
    Gomez, L., Ospina, R., Frery, A. C. (2017). Unassisted quantitative evaluation of
    despeckling filters. Remote Sensing 9(4), 389. doi:10.3390/rs9040389
    """
    o, f, ok = positive_pair(original, filtered, valid)
    masks = check_areas(areas, o.shape, ok)
    r, ok = ratio_image(o, f, ok)
    terms = []
    for m in masks:
        sel = m & ok
        e_i = enl_of_values(o[sel])
        e_r = enl_of_values(r[sel])
        terms.append(abs(e_i - e_r) / e_i + abs(1.0 - r[sel].mean()))
    r_enl_mu = 0.5 * float(np.sum(terms))
    q = np.zeros(o.shape, dtype=np.int64)
    q[ok] = _quantise(r[ok], int(levels))
    h0 = glcm_homogeneity(q, ok)
    rng = np.random.default_rng(seed)
    hs = []
    for _ in range(int(shuffles)):
        s = q.copy()
        s[ok] = rng.permutation(q[ok])
        hs.append(glcm_homogeneity(s, ok))
    delta_h = 100.0 * abs(h0 - float(np.mean(hs))) / h0
    return {"M": r_enl_mu + delta_h, "r_enl_mu": r_enl_mu, "delta_h": delta_h}
