"""Quality metrics for despeckled SAR images: smoothing, radiometry, edges, fidelity, targets.

Pure numpy/scipy/scikit-image functions on linear intensity arrays (float, same shape) with an
optional boolean ``valid`` mask. Most need *homogeneous areas*: pixel boxes
``(row0, col0, row1, col1)`` (end-exclusive) or boolean masks, given by the user
(:func:`areas_from_boxes`, :func:`areas_from_vector` for polygons in map
coordinates) or found automatically (:func:`find_homogeneous_areas`). Metrics that
compare with a reference say which reference they use: the clean reflectivity when
the data are simulated, the noisy input otherwise.

References
----------
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE GRSM 1(3), 6-35.
doi:10.1109/MGRS.2013.2277512
"""

from __future__ import annotations

import json
import math
import pathlib

import numpy as np
from scipy import ndimage, special

from .errors import InputError
from .speckle import check_looks, gamma_speckle
from .validity import valid_mask

__all__ = [
    "MIN_AREA_PIXELS",
    "areas_from_boxes",
    "areas_from_vector",
    "find_homogeneous_areas",
    "check_areas",
    "enl",
    "radiometric_bias_db",
    "ratio_image",
    "ratio_statistics",
    "glcm_homogeneity",
    "unassisted_m",
    "EPD_WINDOW",
    "epd_roa",
    "edge_correlation",
    "psnr",
    "ssim",
    "to_db",
    "DB_RANGE_PERCENTILES",
    "reference_db_range",
    "fidelity_db",
    "fidelity",
    "find_point_targets",
    "point_retention_db",
    "throughput_mps",
]

#: Fewest valid pixels an area needs for an ENL: at L = 1 the ENL estimate's relative
#: standard error is then about sqrt((2 + 2/L) / 100) = 20 % (delta method with the Gamma
#: moments, checked by simulation; docs/methods.md, section Equivalent number of looks).
MIN_AREA_PIXELS = 100


# --------------------------------------------------------------------------- helpers

def _image(a, name="image"):
    x = np.asarray(a, dtype=np.float64)
    if x.ndim != 2:
        raise InputError(f"{name} must be a 2-D image, got shape {x.shape}")
    return x


def _pair(reference, estimate, valid):
    ref = _image(reference, "reference")
    est = _image(estimate, "estimate")
    if ref.shape != est.shape:
        raise InputError(f"reference of shape {ref.shape} and estimate of shape {est.shape} differ")
    ok = np.isfinite(ref) & np.isfinite(est)
    if valid is not None:
        v = np.asarray(valid, dtype=bool)
        if v.shape != ref.shape:
            raise InputError(f"valid mask of shape {v.shape} does not match the images {ref.shape}")
        ok &= v
    return ref, est, ok


def _positive_pair(reference, estimate, valid):
    ref, est, ok = _pair(reference, estimate, valid)
    with np.errstate(invalid="ignore"):
        ok &= (ref > 0) & (est > 0)
    return ref, est, ok


def _enl_values(v):
    var = v.var()
    return math.inf if var == 0 else float(v.mean() ** 2 / var)


# --------------------------------------------------------------------------- areas

def areas_from_boxes(boxes, shape, *, name="area"):
    """Boolean masks from pixel boxes ``(row0, col0, row1, col1)`` (end-exclusive).

    Raises :class:`InputError` for a box that is malformed or not wholly inside the
    image of ``shape``.
    """
    h, w = int(shape[0]), int(shape[1])
    masks = []
    for i, box in enumerate(boxes):
        try:
            r0, c0, r1, c1 = (int(v) for v in box)
        except (TypeError, ValueError):
            raise InputError(f"{name} {i + 1}: a box is (row0, col0, row1, col1), got {box!r}") from None
        if not (0 <= r0 < r1 <= h and 0 <= c0 < c1 <= w):
            raise InputError(
                f"{name} {i + 1}: box {(r0, c0, r1, c1)} is empty or lies outside the {h} x {w} (rows x cols) scene"
            )
        m = np.zeros((h, w), dtype=bool)
        m[r0:r1, c0:c1] = True
        masks.append(m)
    return masks


def areas_from_vector(path, transform, shape, *, crs=None):
    """Boolean masks from the polygons of a GeoJSON file in the scene's map coordinates.

    Each feature (Polygon or MultiPolygon) is one area, rasterised with
    ``rasterio.features.rasterize`` (pixels whose centre falls inside). The
    coordinates must be in the scene's CRS; a ``crs`` member naming another CRS is
    refused rather than silently reprojected.

    Raises
    ------
    InputError
        Unreadable file, no polygon, a polygon covering no pixel of the scene.
    """
    from rasterio import features

    path = pathlib.Path(path)
    try:
        data = json.loads(path.read_text())
    except FileNotFoundError:
        raise InputError(f"{path}: area file not found") from None
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: not a readable GeoJSON file ({exc})") from None
    if transform is None:
        raise InputError(f"{path}: the scene has no georeferencing, so polygons in map coordinates cannot be placed; give pixel boxes")
    declared = (data.get("crs") or {}).get("properties", {}).get("name") if isinstance(data, dict) else None
    if declared and crs is not None:
        from rasterio.crs import CRS

        try:
            same = CRS.from_user_input(declared) == CRS.from_user_input(crs)
        except Exception:  # noqa: BLE001 - an unparsable CRS name is a bad file, reported below
            same = False
        if not same:
            raise InputError(f"{path}: polygons are in {declared}, the scene is in {crs}; reproject the polygons first")
    if isinstance(data, dict) and data.get("type") == "FeatureCollection":
        geoms = [f.get("geometry") for f in data.get("features", [])]
    elif isinstance(data, dict) and data.get("type") == "Feature":
        geoms = [data.get("geometry")]
    elif isinstance(data, dict) and data.get("type") in ("Polygon", "MultiPolygon"):
        geoms = [data]
    else:
        raise InputError(f"{path}: expected a GeoJSON FeatureCollection, Feature or Polygon")
    geoms = [g for g in geoms if g and g.get("type") in ("Polygon", "MultiPolygon")]
    if not geoms:
        raise InputError(f"{path}: no Polygon or MultiPolygon features")
    masks = []
    for i, g in enumerate(geoms):
        try:
            m = features.rasterize([(g, 1)], out_shape=tuple(shape), transform=transform, fill=0, dtype="uint8")
        except Exception as exc:  # noqa: BLE001 - rasterio raises several types for bad geometry
            raise InputError(f"{path}: polygon {i + 1} cannot be rasterised ({exc})") from None
        if not m.any():
            raise InputError(f"{path}: polygon {i + 1} lies outside the scene")
        masks.append(m.astype(bool))
    return masks


def check_areas(areas, shape, valid=None, *, min_pixels=MIN_AREA_PIXELS, source="area"):
    """Validate areas (boxes or masks) and return them as boolean masks.

    Raises :class:`InputError` if an area lies outside the scene or has fewer than
    ``min_pixels`` valid pixels.
    """
    if areas is None:
        raise InputError(f"no {source}s given")
    masks = []
    boxes = [a for a in areas if not (isinstance(a, np.ndarray) and a.ndim == 2)]
    box_masks = iter(areas_from_boxes(boxes, shape, name=source)) if boxes else iter(())
    for a in areas:
        if isinstance(a, np.ndarray) and a.ndim == 2:
            if a.shape != tuple(shape):
                raise InputError(f"{source} mask of shape {a.shape} does not match the scene {tuple(shape)}")
            masks.append(a.astype(bool))
        else:
            masks.append(next(box_masks))
    if not masks:
        raise InputError(f"no {source}s given")
    v = None if valid is None else np.asarray(valid, dtype=bool)
    for i, m in enumerate(masks):
        n = int((m & v).sum()) if v is not None else int(m.sum())
        if n < min_pixels:
            raise InputError(
                f"{source} {i + 1} has {n} valid pixels; at least {min_pixels} are needed to estimate an ENL"
            )
    return masks


_CV_THRESHOLDS: dict = {}


def _cv2_interval(looks, n, false_alarm, seed=20170412, trials=20000):
    """Central interval of the sample CV^2 of ``n`` L-look speckle pixels with probability ``1 - false_alarm``."""
    key = (float(looks), int(n), float(false_alarm))
    if key not in _CV_THRESHOLDS:
        x = gamma_speckle((trials, n), looks, rng=np.random.default_rng(seed), dtype=np.float64)
        cv2 = x.var(axis=1, ddof=1) / x.mean(axis=1) ** 2
        _CV_THRESHOLDS[key] = tuple(np.quantile(cv2, [false_alarm / 2, 1 - false_alarm / 2]))
    return _CV_THRESHOLDS[key]


def find_homogeneous_areas(intensity, looks, *, valid=None, window=15, false_alarm=0.05, max_areas=50):
    """Non-overlapping ``window`` x ``window`` boxes whose speckle statistics look pure.

    A box (free of nodata) is kept when its sample squared coefficient of variation
    lies in the central ``1 - false_alarm`` interval of that statistic for ``window^2``
    pixels of pure L-look speckle, taken from 20 000 simulated boxes with a fixed
    seed (so ``false_alarm`` is the fraction of truly homogeneous boxes wrongly
    dropped). Texture, edges and targets raise the CV and are dropped. At most
    ``max_areas`` boxes are returned, evenly spread over the kept ones in raster
    order (not the most homogeneous, which would bias the ENL upward).

    Returns
    -------
    list of (row0, col0, row1, col1)
    """
    x = _image(intensity, "intensity")
    L = check_looks(looks)
    window = int(window)
    if window * window < MIN_AREA_PIXELS:
        raise InputError(f"window must hold at least {MIN_AREA_PIXELS} pixels (>= {math.isqrt(MIN_AREA_PIXELS - 1) + 1}), got {window}")
    if not 0 < float(false_alarm) < 1:
        raise InputError(f"false_alarm must lie in (0, 1), got {false_alarm!r}")
    ok = valid_mask(x, valid, what="intensity")
    rows, cols = x.shape[0] // window, x.shape[1] // window
    if rows == 0 or cols == 0:
        raise InputError(f"image of shape {x.shape} is smaller than one {window} x {window} box")
    h, w = rows * window, cols * window
    xb = np.where(ok, x, 0.0)[:h, :w].reshape(rows, window, cols, window).transpose(0, 2, 1, 3).reshape(rows * cols, -1)
    okb = ok[:h, :w].reshape(rows, window, cols, window).transpose(0, 2, 1, 3).reshape(rows * cols, -1).all(axis=1)
    mean = xb.mean(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        cv2 = xb.var(axis=1, ddof=1) / mean**2
    lo, hi = _cv2_interval(L, window * window, float(false_alarm))
    keep = np.flatnonzero(okb & (mean > 0) & (cv2 >= lo) & (cv2 <= hi))
    if keep.size > max_areas:
        keep = keep[np.linspace(0, keep.size - 1, int(max_areas)).round().astype(int)]
    return [(int(i // cols * window), int(i % cols * window), int(i // cols * window + window), int(i % cols * window + window))
            for i in keep]


# --------------------------------------------------------------------------- smoothing and radiometry

def enl(intensity, areas, valid=None):
    """Equivalent number of looks ``mean^2 / variance`` of intensity over each area.

    Returns
    -------
    ndarray of float64, one value per area.

    References
    ----------
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech House.
    """
    x = _image(intensity, "intensity")
    masks = check_areas(areas, x.shape, valid)
    ok = np.isfinite(x) if valid is None else np.isfinite(x) & np.asarray(valid, dtype=bool)
    return np.array([_enl_values(x[m & ok]) for m in masks])


def radiometric_bias_db(original, filtered, areas, valid=None):
    """Radiometric bias ``10 log10(mean(filtered) / mean(original))`` per area and overall (dB).

    Overall uses the pixels of all areas together. Ideal 0 dB: a filter should keep the mean
    reflectivity of homogeneous areas (Argenti et al. 2013, module references).

    Returns
    -------
    (per_area, overall) : (ndarray, float)
    """
    o, f, ok = _pair(original, filtered, valid)
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
    o, f, ok = _positive_pair(original, filtered, valid)
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
    o, f, ok = _positive_pair(original, filtered, valid)
    masks = check_areas(areas, o.shape, ok)
    r, ok = ratio_image(o, f, ok)
    terms = []
    for m in masks:
        sel = m & ok
        e_i = _enl_values(o[sel])
        e_r = _enl_values(r[sel])
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


# --------------------------------------------------------------------------- edges

#: Side of the windows whose means EPD-ROA compares (see :func:`epd_roa`).
EPD_WINDOW = 3


def epd_roa(reference, estimate, valid=None, *, window=EPD_WINDOW):
    """Edge-preservation degree based on the ratio of averages (robust variant), horizontal and vertical.

    ``H = sum |mD(i, j) / mD(i, j + w)| / sum |mO(i, j) / mO(i, j + w)|`` over the
    pixels ``(i, j)`` of the image, where ``mD`` and ``mO`` are the means of the
    estimate ``D`` and the reference ``O`` over the ``w x w`` window (``w =
    window``) centred on a pixel: each term compares two adjacent, non-overlapping
    windows of the same rows. ``V`` likewise compares windows stacked vertically,
    ``(i, j)`` and ``(i + w, j)``. The reference is the clean image if the data are
    simulated, else the noisy input -- say which. A pair counts only when every
    pixel of both windows is valid and positive in both images. Ideal 1 (the
    estimate equals the reference); smoothing across edges lowers it.

    This is a robust variant of the measure of Feng et al. (2011), which uses
    single pixels (``window=1``, available for comparison). The ratio of two
    independent L-look intensity pixels of the same reflectivity follows a beta
    prime distribution ``B'(L, L)``, whose mean ``L / (L - 1)`` is infinite for
    ``L <= 1``: on 1-look residual speckle, or against a noisy reference, the sums
    of pixel ratios are dominated by a few pairs and do not settle as the image
    grows (on five 256 x 256 draws of 1-look speckle against a constant reference the
    pixel form ranged from 9 to 22; this form stays within 0.5 % of 9/8). The
    ratio of two means of ``w^2`` independent pixels follows ``B'(w^2 L, w^2 L)``,
    with mean ``w^2 L / (w^2 L - 1)`` (9/8 for 3 x 3 windows at L = 1) and a finite
    variance once ``w^2 L > 2``; ratios of local means are also what the
    ratio-of-averages (ROA) edge detector of Touzi et al. (1988) compares.

    Parameters
    ----------
    reference, estimate : ndarray
        Linear intensities of the same shape.
    valid : ndarray of bool, optional
    window : int
        Odd side of the averaging windows (default 3; 1 gives the pixel form).

    Returns
    -------
    (h, v) : tuple of float

    References
    ----------
    Feng, H., Hou, B., Gong, M. (2011). SAR image despeckling based on local
    homogeneous-region segmentation by using pixel-relativity measurement. IEEE TGRS
    49(7), 2724-2737. doi:10.1109/TGRS.2011.2107915 (pixel formula from memory)

    Touzi, R., Lopes, A., Bousquet, P. (1988). A statistical and geometrical edge
    detector for SAR images. IEEE TGRS 26(6), 764-773.
    """
    o, d, ok = _positive_pair(reference, estimate, valid)
    try:
        w = int(window)
    except (TypeError, ValueError):
        w = 0
    if w < 1 or w % 2 == 0 or w != window:
        raise InputError(f"EPD-ROA window must be an odd positive integer, got {window!r}")
    if w > 1:
        full = ndimage.minimum_filter(ok, size=w, mode="constant", cval=False)
        mo = ndimage.uniform_filter(np.where(ok, o, 0.0), w, mode="constant")
        md = ndimage.uniform_filter(np.where(ok, d, 0.0), w, mode="constant")
    else:
        full, mo, md = ok, o, d
    out = []
    for axis in (1, 0):
        if axis == 1:
            a_o, b_o, a_d, b_d = mo[:, :-w], mo[:, w:], md[:, :-w], md[:, w:]
            both = full[:, :-w] & full[:, w:]
        else:
            a_o, b_o, a_d, b_d = mo[:-w], mo[w:], md[:-w], md[w:]
            both = full[:-w] & full[w:]
        if not both.any():
            raise InputError(f"no pair of adjacent {w} x {w} windows of valid pixels for EPD-ROA")
        out.append(float(np.sum(np.abs(a_d[both] / b_d[both])) / np.sum(np.abs(a_o[both] / b_o[both]))))
    return out[0], out[1]


def edge_correlation(reference, estimate, valid=None):
    """Correlation of the Laplacian high-passes of reference and estimate (edge correlation, beta).

    ``beta = sum (dO - mean dO)(dD - mean dD) / sqrt(sum (dO - mean dO)^2 sum (dD - mean dD)^2)``
    with ``d`` the 3 x 3 (4-neighbour) Laplacian, over pixels whose neighbourhood
    is entirely valid. Ideal 1.

    References
    ----------
    Sattar, F., Floreby, L., Salomonsson, G., Lovstrom, B. (1997). Image enhancement
    based on a nonlinear multiscale method. IEEE TIP 6(6), 888-895.
    doi:10.1109/83.585239 (formula from memory)
    """
    o, d, ok = _pair(reference, estimate, valid)
    inner = ndimage.binary_erosion(ok, structure=np.ones((3, 3), bool), border_value=0)
    if inner.sum() < 2:
        raise InputError("too few valid pixels with valid neighbours for the edge correlation")
    lo = ndimage.laplace(np.where(ok, o, 0.0))[inner]
    ld = ndimage.laplace(np.where(ok, d, 0.0))[inner]
    lo = lo - lo.mean()
    ld = ld - ld.mean()
    den = math.sqrt(float(np.sum(lo * lo)) * float(np.sum(ld * ld)))
    return float(np.sum(lo * ld) / den) if den > 0 else 0.0


# --------------------------------------------------------------------------- fidelity

def psnr(reference, estimate, *, data_range, valid=None):
    """Peak signal-to-noise ratio ``10 log10(data_range^2 / MSE)`` (dB) over the valid pixels.

    :func:`skimage.metrics.peak_signal_noise_ratio` on the valid pixels; the peak is
    ``data_range``, which the caller states. Identical images give ``inf``, no valid
    pixel NaN.
    """
    from skimage.metrics import peak_signal_noise_ratio

    ref, est, ok = _pair(reference, estimate, valid)
    data_range = float(data_range)
    if not data_range > 0:
        raise InputError(f"data_range must be positive, got {data_range!r}")
    if not ok.any():
        return math.nan
    a, b = ref[ok], est[ok]
    if np.array_equal(a, b):
        return math.inf
    return float(peak_signal_noise_ratio(a, b, data_range=data_range))


def ssim(reference, estimate, *, data_range, valid=None, window=7, k1=0.01, k2=0.03):
    """Mean structural similarity index with a uniform ``window`` (Wang et al. 2004).

    The SSIM map of :func:`skimage.metrics.structural_similarity` (its defaults: 7 x 7
    uniform window, sample covariance, ``K1 = 0.01``, ``K2 = 0.03``), averaged like
    scikit-image without the edges of ``window // 2`` pixels. With a ``valid`` mask,
    windows touching an invalid pixel are left out as well (invalid pixels enter the
    map as 0 in both images, and no kept window sees them).

    References
    ----------
    Wang, Z., Bovik, A. C., Sheikh, H. R., Simoncelli, E. P. (2004). Image quality
    assessment: from error visibility to structural similarity. IEEE TIP 13(4),
    600-612. doi:10.1109/TIP.2003.819861
    """
    ref, est, ok = _pair(reference, estimate, valid)
    data_range = float(data_range)
    if not data_range > 0:
        raise InputError(f"data_range must be positive, got {data_range!r}")
    window = int(window)
    if window < 3 or window % 2 == 0:
        raise InputError(f"SSIM window must be odd and >= 3, got {window}")
    if min(ok.shape) < window:
        raise InputError(f"image of shape {ok.shape} is too small for a {window} x {window} SSIM window")
    from skimage.metrics import structural_similarity

    x = np.where(ok, ref, 0.0)
    y = np.where(ok, est, 0.0)
    _, s = structural_similarity(x, y, win_size=window, data_range=data_range, K1=k1, K2=k2,
                                 use_sample_covariance=True, full=True)
    pad = (window - 1) // 2
    use = np.zeros(ok.shape, dtype=bool)
    use[pad : ok.shape[0] - pad, pad : ok.shape[1] - pad] = True
    if not ok.all():
        use &= ndimage.minimum_filter(ok, size=window, mode="constant", cval=False)
    if not use.any():
        raise InputError(f"image too small or too invalid for a {window} x {window} SSIM window")
    return float(s[use].mean())


def to_db(intensity):
    """``10 log10(intensity)``; non-positive values give NaN."""
    x = np.asarray(intensity, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(x > 0, 10.0 * np.log10(np.where(x > 0, x, 1.0)), np.nan)


#: Percentiles of the reference's dB values that bound the dB-domain PSNR and SSIM:
#: both images are clipped to them and their difference is the peak, so a few bright
#: targets do not set the peak (project choice; docs/methods.md, PSNR and SSIM).
DB_RANGE_PERCENTILES = (1.0, 99.9)


def reference_db_range(reference, valid=None) -> tuple[float, float]:
    """The dB range of the dB-domain fidelity: percentiles :data:`DB_RANGE_PERCENTILES` of ``10 log10 reference``.

    ``reference`` is linear intensity of any shape (a scene, or the pooled pixels of
    several patches); only valid, finite, positive values count.
    """
    x = np.asarray(reference, dtype=np.float64)
    ok = valid_mask(x, valid, what="reference")
    if not ok.any():
        raise InputError("no pixel of the reference is valid and positive")
    low, high = (float(v) for v in np.percentile(to_db(x[ok]), DB_RANGE_PERCENTILES))
    return low, high


def fidelity_db(reference, estimate, valid=None, *, db_range=None):
    """PSNR and SSIM of ``10 log10`` intensities against a clean reference, and the mean absolute dB error.

    Both images in dB are clipped to ``db_range = (low, high)`` -- by default
    :func:`reference_db_range`, the reference's 1st and 99.9th percentiles -- and
    compared with :func:`psnr` and :func:`ssim` with ``data_range = high - low`` over
    the pixels valid and positive in both; the mean absolute dB error is unclipped.
    The benchmarks measure every scene this way and training every validation patch
    (with one range for the whole validation set), so their figures compare.

    Returns
    -------
    dict with ``psnr_db``, ``ssim_db``, ``mae_db`` and ``db_range``.
    """
    ref, est, ok = _positive_pair(reference, estimate, valid)
    if not ok.any():
        raise InputError("no pixel is valid and positive in both reference and estimate")
    ref_db, est_db = to_db(np.where(ok, ref, 1.0)), to_db(np.where(ok, est, 1.0))
    if db_range is None:
        low, high = reference_db_range(ref, ok)
    else:
        low, high = (float(v) for v in db_range)
    if not high > low:
        raise InputError(f"db_range must be (low, high) with high > low, got {(low, high)}")
    rd, ed = np.clip(ref_db, low, high), np.clip(est_db, low, high)
    return {
        "psnr_db": psnr(rd, ed, data_range=high - low, valid=ok),
        "ssim_db": ssim(rd, ed, data_range=high - low, valid=ok),
        "mae_db": float(np.mean(np.abs(est_db[ok] - ref_db[ok]))),
        "db_range": (low, high),
    }


def fidelity(reference, estimate, valid=None, *, db_range=None, amplitude_peak=None):
    """PSNR and SSIM against a clean reference in dB and in amplitude, and the mean absolute dB error.

    Conventions (state them with the numbers):

    * dB: :func:`fidelity_db` -- both images in ``10 log10`` intensity, clipped to
      ``db_range = (low, high)`` -- by default the reference's 1st and 99.9th
      percentiles -- and ``data_range = high - low``;
    * amplitude: ``sqrt(intensity)`` clipped to ``[0, amplitude_peak]`` -- by default the
      reference amplitude's 99.9th percentile -- and ``data_range = amplitude_peak``;
    * mean absolute dB error: ``mean |dB(estimate) - dB(reference)|``, unclipped.

    Returns
    -------
    dict with ``psnr_db``, ``ssim_db``, ``psnr_amplitude``, ``ssim_amplitude``,
    ``mae_db``, ``db_range`` and ``amplitude_peak``.
    """
    in_db = fidelity_db(reference, estimate, valid, db_range=db_range)
    ref, est, ok = _positive_pair(reference, estimate, valid)
    a_ref, a_est = np.sqrt(np.where(ok, ref, 0.0)), np.sqrt(np.where(ok, est, 0.0))
    peak = float(np.percentile(a_ref[ok], 99.9)) if amplitude_peak is None else float(amplitude_peak)
    if not peak > 0:
        raise InputError(f"amplitude_peak must be positive, got {peak!r}")
    ra, ea = np.clip(a_ref, 0, peak), np.clip(a_est, 0, peak)
    return {
        "psnr_db": in_db["psnr_db"],
        "ssim_db": in_db["ssim_db"],
        "psnr_amplitude": psnr(ra, ea, data_range=peak, valid=ok),
        "ssim_amplitude": ssim(ra, ea, data_range=peak, valid=ok),
        "mae_db": in_db["mae_db"],
        "db_range": in_db["db_range"],
        "amplitude_peak": peak,
    }


# --------------------------------------------------------------------------- point targets

def find_point_targets(intensity, looks, *, valid=None, false_alarm=1e-6, inner=2, outer=7, max_points=200):
    """Isolated bright scatterers: local maxima far above their surrounding clutter.

    A pixel is a point target when it is the maximum of its ``(2 inner + 1)``-square
    neighbourhood and exceeds ``t`` times the mean of the valid pixels in the ring
    between that neighbourhood and the ``(2 outer + 1)``-square window, where ``t``
    is the L-look speckle level exceeded with probability ``false_alarm``
    (``gammaincinv(L, 1 - false_alarm) / L``: 13.8, i.e. 11.4 dB, at L = 1 and 1e-6).
    The ring must be at least half valid, hold no pixel above ``t`` times its mean
    (so facades and bright lines are not isolated targets) and have a coefficient of
    variation below the 99.5th percentile of pure speckle's (textured clutter such
    as woodland has heavier tails than speckle alone and would give false targets). At most
    ``max_points``, brightest first.

    Returns
    -------
    list of (row, col)
    """
    x = _image(intensity, "intensity")
    L = check_looks(looks)
    if not 0 < float(false_alarm) < 1:
        raise InputError(f"false_alarm must lie in (0, 1), got {false_alarm!r}")
    ok = valid_mask(x, valid, what="intensity")
    xv = np.where(ok, x, 0.0)
    t = float(special.gammaincinv(L, 1.0 - float(false_alarm)) / L)
    a, b = 2 * inner + 1, 2 * outer + 1
    s_big = ndimage.uniform_filter(xv, b, mode="constant") * b * b
    s_small = ndimage.uniform_filter(xv, a, mode="constant") * a * a
    q_big = ndimage.uniform_filter(xv * xv, b, mode="constant") * b * b
    q_small = ndimage.uniform_filter(xv * xv, a, mode="constant") * a * a
    n_big = ndimage.uniform_filter(ok.astype(np.float64), b, mode="constant") * b * b
    n_small = ndimage.uniform_filter(ok.astype(np.float64), a, mode="constant") * a * a
    n_ring = np.rint(n_big - n_small)
    with np.errstate(divide="ignore", invalid="ignore"):
        background = (s_big - s_small) / n_ring
    local_max = (xv == ndimage.maximum_filter(xv, size=a, mode="constant")) & ok
    ring = np.ones((b, b), dtype=bool)
    ring[outer - inner : outer + inner + 1, outer - inner : outer + inner + 1] = False
    ring_max = ndimage.maximum_filter(xv, footprint=ring, mode="constant")
    cand = local_max & (n_ring >= 0.5 * (b * b - a * a)) & (xv > t * background) & (background > 0)
    # isolated: nothing in the ring is itself a detection-level outlier (facades, bright
    # edges), and the ring is homogeneous clutter (not texture) at the 1 % level
    cand &= ring_max <= t * background
    with np.errstate(divide="ignore", invalid="ignore"):
        ring_cv2 = ((q_big - q_small) / n_ring - background**2) / background**2 * n_ring / (n_ring - 1)
    cand &= ring_cv2 <= _cv2_interval(L, b * b - a * a, 0.01)[1]
    rows, cols = np.nonzero(cand)
    order = np.argsort(-xv[rows, cols], kind="stable")[: int(max_points)]
    return [(int(rows[i]), int(cols[i])) for i in order]


def point_retention_db(original, filtered, points, *, radius=1):
    """Peak of each point target after filtering relative to before, in dB.

    ``10 log10(max filtered / max original)`` over the ``(2 radius + 1)``-square
    neighbourhood of each point (a filter may move a peak by a pixel). 0 dB: the
    target is kept; strongly negative: it is smoothed away.

    Returns
    -------
    ndarray of float64, one value per point.
    """
    o, f, _ = _pair(original, filtered, None)
    out = []
    h, w = o.shape
    for i, p in enumerate(points):
        try:
            r, c = int(p[0]), int(p[1])
        except (TypeError, ValueError, IndexError):
            raise InputError(f"point {i + 1}: expected (row, col), got {p!r}") from None
        if not (0 <= r < h and 0 <= c < w):
            raise InputError(f"point {i + 1}: ({r}, {c}) lies outside the {h} x {w} scene")
        sl = (slice(max(r - radius, 0), r + radius + 1), slice(max(c - radius, 0), c + radius + 1))
        before, after = np.nanmax(o[sl]), np.nanmax(f[sl])
        if not (before > 0 and after > 0):
            raise InputError(f"point {i + 1}: ({r}, {c}) has no positive intensity around it")
        out.append(10.0 * math.log10(after / before))
    return np.array(out)


def throughput_mps(pixels, seconds):
    """Throughput in megapixels per second."""
    seconds = float(seconds)
    return math.inf if seconds <= 0 else float(pixels) / seconds / 1e6
