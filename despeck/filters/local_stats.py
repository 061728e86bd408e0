"""Local-statistics filters: boxcar, Lee, enhanced Lee, Kuan, Frost and Gamma-MAP.

Each filter estimates the local mean ``m`` and variance ``v`` of intensity over its
window (:mod:`despeck.filters.moments`) and returns ``m + W (I - m)`` with a gain
``W`` in [0, 1], or a weighted mean, or a MAP estimate. Notation (Argenti et al.
2013): ``Ci^2 = v / m^2`` is the local squared coefficient of variation, ``Cu^2 = 1 / L``
that of L-look intensity speckle, ``I`` the centre pixel.

References
----------
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE Geoscience and Remote Sensing
Magazine 1(3), 6-35. doi:10.1109/MGRS.2013.2277512
"""

from __future__ import annotations

import functools
import math

import numpy as np

from ..errors import InputError
from ..speckle import check_looks
from .engine import Plan, apply_plan, calibrated, check_positive, check_window
from .moments import crop, local_moments, squared_cv, window_offsets
from .registry import filter_entry, register_filter

__all__ = ["boxcar", "lee", "enhanced_lee", "kuan", "frost", "gamma_map", "gamma_map_estimate", "lee_gain", "kuan_gain"]


# --------------------------------------------------------------------------- boxcar

def _plan_boxcar(looks, window):
    check_looks(looks)
    w = check_window(window)
    half = w // 2

    def kernel(p, ok):
        _, mean, _ = local_moments(p, ok, w)
        return crop(mean, half)

    return Plan(kernel, half)


@register_filter("boxcar", default_window=7, plan=_plan_boxcar)
def boxcar(intensity, *, looks, window=None, mask=None, workers=None):
    """Boxcar (moving average) filter: the mean of the valid pixels in the window.

    Parameters
    ----------
    intensity : array_like, shape (h, w)
        Linear intensity.
    looks : float
        Number of looks (checked for consistency; the boxcar does not use it).
    window : int, optional
        Odd window size >= 3 (default ``DEFAULT_WINDOWS['boxcar']``).
    mask : array_like of bool, optional
        True where valid. Non-finite and non-positive pixels are always invalid.
    workers : int, optional
        Threads (default: the CPUs this process may use).

    Returns
    -------
    ndarray of float32
        Filtered intensity; invalid pixels keep their input value.

    Notes
    -----
    Unbiased on homogeneous areas (a plain average). On uncorrelated L-look speckle
    the N x N boxcar has ENL ``N^2 L`` (Oliver & Quegan 1998).

    References
    ----------
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech House.
    """
    return apply_plan(_plan_boxcar(looks, filter_entry("boxcar").window(window)), intensity, mask, workers)


# --------------------------------------------------------------------------- Lee (and the gains of Lee and Kuan)

def _plan_linear(looks, window, gain):
    cu2 = 1.0 / check_looks(looks)
    w = check_window(window)
    half = w // 2

    def kernel(p, ok):
        _, mean, var = local_moments(p, ok, w)
        weight = np.clip(gain(squared_cv(mean, var), cu2), 0.0, 1.0)
        core = mean + weight * (p - mean)
        return crop(core, half)

    return Plan(kernel, half)


def lee_gain(ci2, cu2):
    """Lee's gain ``1 - Cu^2 / Ci^2`` (0 where ``Ci^2`` is 0), before clipping to [0, 1]."""
    return np.where(ci2 > 0, 1.0 - cu2 / ci2, 0.0)


def kuan_gain(ci2, cu2):
    """Kuan's LMMSE gain ``(1 - Cu^2 / Ci^2) / (1 + Cu^2)`` (0 where ``Ci^2`` is 0), before clipping to [0, 1]."""
    return np.where(ci2 > 0, (1.0 - cu2 / ci2) / (1.0 + cu2), 0.0)


@register_filter("lee", default_window=7, plan=functools.partial(_plan_linear, gain=lee_gain))
def lee(intensity, *, looks, window=None, mask=None, workers=None):
    """Lee filter: ``m + W (I - m)`` with ``W = 1 - Cu^2 / Ci^2`` clipped to [0, 1].

    Parameters are those of :func:`boxcar`; ``looks`` sets ``Cu^2 = 1 / L``.

    Notes
    -----
    Radiometry: the output is the local mean plus a correction whose expectation
    vanishes when the gain is uncorrelated with ``I - m``; on homogeneous areas the
    gain is small and the mean is preserved to within a few hundredths of a dB (tested).
    No further bias correction is applied. Gain formula restated from memory
    (docs/methods.md, section Classical filters).

    References
    ----------
    Lee, J.-S. (1980). Digital image enhancement and noise filtering by use of local
    statistics. IEEE TPAMI 2(2), 165-168. doi:10.1109/TPAMI.1980.4766994
    """
    return apply_plan(_plan_linear(looks, filter_entry("lee").window(window), lee_gain), intensity, mask, workers)


# --------------------------------------------------------------------------- enhanced Lee

def _default_cmax_enhanced(looks):
    return math.sqrt(1.0 + 2.0 / looks)


def _plan_enhanced_lee(looks, window, damping=1.0, cmax=None):
    L = check_looks(looks)
    w = check_window(window)
    k = check_positive(damping, "damping")
    cu = 1.0 / math.sqrt(L)
    cmax = _default_cmax_enhanced(L) if cmax is None else check_positive(cmax, "cmax")
    if cmax <= cu:
        raise InputError(f"cmax must exceed the speckle coefficient of variation 1/sqrt(looks) = {cu:.4g}, got {cmax!r}")
    half = w // 2

    def kernel(p, ok):
        _, mean, var = local_moments(p, ok, w)
        ci = np.sqrt(squared_cv(mean, var))
        middle = (ci > cu) & (ci < cmax)
        # weight of the local mean: 1 at Ci = Cu, falling to 0 as Ci approaches Cmax
        w_mean = np.exp(-k * (ci - cu) / np.where(middle, cmax - ci, 1.0))
        core = np.where(ci <= cu, mean, np.where(middle, w_mean * mean + (1.0 - w_mean) * p, p))
        return crop(core, half)

    return Plan(kernel, half)


@register_filter("enhanced-lee", default_window=7, plan=_plan_enhanced_lee)
def enhanced_lee(intensity, *, looks, window=None, mask=None, workers=None, damping=1.0, cmax=None):
    """Enhanced Lee filter: three classes by the local coefficient of variation ``Ci``.

    ``Ci <= Cu``: the local mean (homogeneous); ``Cu < Ci < Cmax``:
    ``w m + (1 - w) I`` with ``w = exp(-damping (Ci - Cu) / (Cmax - Ci))``;
    ``Ci >= Cmax``: the centre pixel is kept (point target).

    Parameters
    ----------
    damping : float
        Damping factor of the exponential weight (default 1).
    cmax : float, optional
        Upper class limit, default ``sqrt(1 + 2 / L)``.

    Other parameters are those of :func:`boxcar`.

    Notes
    -----
    The class limits and weight are from memory (docs/methods.md, section Classical filters). On homogeneous
    areas most windows fall in the first class (plain mean, unbiased); no further bias
    correction is applied (mean preservation is tested).

    References
    ----------
    Lopes, A., Touzi, R., Nezry, E. (1990). Adaptive speckle filters and scene
    heterogeneity. IEEE TGRS 28(6), 992-1000. doi:10.1109/36.62623
    """
    plan = _plan_enhanced_lee(looks, filter_entry("enhanced-lee").window(window), damping=damping, cmax=cmax)
    return apply_plan(plan, intensity, mask, workers)


# --------------------------------------------------------------------------- Kuan

@register_filter("kuan", default_window=7, plan=functools.partial(_plan_linear, gain=kuan_gain))
def kuan(intensity, *, looks, window=None, mask=None, workers=None):
    """Kuan filter: ``W = (1 - Cu^2 / Ci^2) / (1 + Cu^2)`` clipped to [0, 1], the LMMSE gain.

    Parameters are those of :func:`boxcar`.

    Notes
    -----
    Under the product model ``I = R n`` with ``E n = 1``, ``var n = Cu^2`` and local
    prior mean and variance of ``R`` estimated from the window, this is the exact
    linear minimum-mean-square-error gain ``cov(R, I) / var(I)``. Like Lee, no further
    bias correction is applied; the mean is preserved on homogeneous areas (tested).

    References
    ----------
    Kuan, D. T., Sawchuk, A. A., Strand, T. C., Chavel, P. (1985). Adaptive noise
    smoothing filter for images with signal-dependent noise. IEEE TPAMI 7(2),
    165-177. doi:10.1109/TPAMI.1985.4767641
    """
    return apply_plan(_plan_linear(looks, filter_entry("kuan").window(window), kuan_gain), intensity, mask, workers)


# --------------------------------------------------------------------------- Frost


def _plan_frost(looks, window, damping=1.0):
    check_looks(looks)
    w = check_window(window)
    k = check_positive(damping, "damping")
    half = w // 2
    dy, dx = window_offsets(w)
    dist = np.hypot(dy, dx)
    # group offsets by distance: one exponential per distinct distance, not per offset
    groups = {}
    for y, x, d in zip(dy, dx, dist):
        if d > 0:
            groups.setdefault(round(float(d), 9), []).append((int(y), int(x)))

    def kernel(p, ok):
        _, mean, var = local_moments(p, ok, w)
        a = crop(-k * squared_cv(mean, var), half)
        hc, wc = a.shape
        okf = ok.astype(np.float64)
        num = crop(p, half).copy()
        den = crop(okf, half).copy()
        for d in sorted(groups):
            ring_i = np.zeros_like(a)
            ring_n = np.zeros_like(a)
            for y, x in groups[d]:
                ring_i += p[half + y : half + y + hc, half + x : half + x + wc]
                ring_n += okf[half + y : half + y + hc, half + x : half + x + wc]
            q = np.exp(a * d)
            num += q * ring_i
            den += q * ring_n
        return num / den

    return Plan(kernel, half)


@register_filter("frost", default_window=5, plan=_plan_frost)
def frost(intensity, *, looks, window=None, mask=None, workers=None, damping=1.0):
    """Frost filter: ``sum_j w_j I_j / sum_j w_j`` with ``w_j = exp(-damping Ci^2 d_j)``.

    ``d_j`` is the Euclidean distance (pixels) from pixel ``j`` to the centre and
    ``Ci^2`` the local squared coefficient of variation; only valid pixels count.

    Parameters
    ----------
    damping : float
        Damping factor K (default 1; typical values 1-2, from memory).

    Other parameters are those of :func:`boxcar`.

    Notes
    -----
    A normalised weighted mean whose weights depend on the window only through
    ``Ci^2``, so it preserves the mean on homogeneous areas without correction
    (tested). Weight form from memory (docs/methods.md, section Classical filters).

    References
    ----------
    Frost, V. S., Stiles, J. A., Shanmugan, K. S., Holtzman, J. C. (1982). A model for
    radar images and its application to adaptive digital filtering of multiplicative
    noise. IEEE TPAMI 4(2), 157-166. doi:10.1109/TPAMI.1982.4767223
    """
    plan = _plan_frost(looks, filter_entry("frost").window(window), damping=damping)
    return apply_plan(plan, intensity, mask, workers)


# --------------------------------------------------------------------------- Gamma-MAP
# (its radiometric correction is calibrated on simulated speckle; see engine.calibrated)

def gamma_map_estimate(mean, ci2, centre, looks):
    """Closed-form Gamma-MAP estimate of reflectivity, elementwise.

    The prior is ``R ~ Gamma`` with mean ``mean`` and order ``alpha = (1 + Cu^2) / (Ci^2 - Cu^2)``;
    the likelihood L-look Gamma. The MAP is the positive root of
    ``(alpha / mean) R^2 + (L - alpha + 1) R - L I = 0``. Valid where ``Ci^2 > Cu^2``.
    """
    L = check_looks(looks)
    cu2 = 1.0 / L
    mean = np.asarray(mean, dtype=np.float64)
    centre = np.asarray(centre, dtype=np.float64)
    ci2 = np.asarray(ci2, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        alpha = (1.0 + cu2) / (ci2 - cu2)
        b = alpha - L - 1.0
        return (b * mean + np.sqrt(mean * mean * b * b + 4.0 * alpha * L * centre * mean)) / (2.0 * alpha)


def _plan_gamma_map(looks, window, cmax=None, correct_bias=True):
    L = check_looks(looks)
    w = check_window(window)
    cu = 1.0 / math.sqrt(L)
    cmax = math.sqrt(2.0) * cu if cmax is None else check_positive(cmax, "cmax")
    if cmax <= cu:
        raise InputError(f"cmax must exceed the speckle coefficient of variation 1/sqrt(looks) = {cu:.4g}, got {cmax!r}")
    half = w // 2

    def core_and_mask(p, ok):
        _, mean, var = local_moments(p, ok, w)
        ci2 = squared_cv(mean, var)
        middle = (ci2 > cu * cu) & (ci2 < cmax * cmax)
        est = gamma_map_estimate(mean, np.where(middle, ci2, 2.0 * cu * cu), p, L)
        core = np.where(ci2 <= cu * cu, mean, np.where(middle, est, p))
        return crop(core, half), crop(middle, half)

    if not correct_bias:
        return Plan(lambda p, ok: core_and_mask(p, ok)[0], half)
    kernel, _ = calibrated(core_and_mask, half, L, ("gamma-map", L, w, cmax))
    return Plan(kernel, half)


@register_filter("gamma-map", default_window=7, plan=_plan_gamma_map)
def gamma_map(intensity, *, looks, window=None, mask=None, workers=None, cmax=None, correct_bias=True):
    """Gamma-MAP filter: maximum a posteriori reflectivity under a Gamma prior (closed form).

    ``Ci <= Cu``: the local mean; ``Cu < Ci < Cmax``: :func:`gamma_map_estimate`;
    ``Ci >= Cmax``: the centre pixel.

    Parameters
    ----------
    cmax : float, optional
        Upper class limit, default ``sqrt(2) Cu`` (from memory).
    correct_bias : bool
        Apply the radiometric correction described below (default True).

    Other parameters are those of :func:`boxcar`.

    Notes
    -----
    The closed form is checked in the tests against numerical maximisation of the
    posterior (``scipy.optimize``). Bias correction: the MAP is the posterior mode,
    a concave function of the centre pixel, so on pure speckle the MAP class comes
    out low (about -0.16 dB overall at L = 1, -0.06 dB at L = 4). The MAP-class
    estimates are multiplied by a factor measured once per (looks, window, cmax) on
    simulated unit-mean speckle (see :func:`despeck.filters.engine.calibrated`), which restores the mean on
    homogeneous areas at the given looks (tested); the local-mean and kept-pixel
    classes are not changed.

    References
    ----------
    Lopes, A., Nezry, E., Touzi, R., Laur, H. (1990). Maximum a posteriori speckle
    filtering and first order texture models in SAR images. Proc. IGARSS 1990,
    2409-2412. doi:10.1109/IGARSS.1990.689026
    """
    plan = _plan_gamma_map(looks, filter_entry("gamma-map").window(window), cmax=cmax, correct_bias=correct_bias)
    return apply_plan(plan, intensity, mask, workers)
