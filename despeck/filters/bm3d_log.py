"""Log-domain (homomorphic) BM3D: the strongest classical reference in the benchmarks.

BM3D removes additive Gaussian noise, white or coloured. Speckle is multiplicative, but
its logarithm is additive: ``ln I = ln R + ln n`` with ``E[ln n] = psi(L) - ln L`` and
``Var[ln n] = psi_1(L)`` for L-look intensity speckle (Xie, Pierce, Ulaby 2002). The
filter here

1. takes ``y = ln I - (psi(L) - ln L)``, an unbiased estimate of ``ln R``
   (:func:`homomorphic_log`);
2. scales ``y`` so that the noise standard deviation is :data:`NOISE_SIGMA` (about the
   middle of the range the package's parameters are tuned for: images in [0, 1] with
   sigma up to about 40/255) and centres its median on 0.5;
3. runs the ``bm3d`` package with ``sigma = sqrt(psi_1(L))`` -- or, for spatially
   correlated speckle, with the power spectral density of the log-speckle -- scaled the
   same way;
4. exponentiates, and
5. multiplies by a factor that makes the arithmetic mean of the output equal that of the
   input on simulated pure speckle (``CALIBRATION_SIZE``-square, fixed seed), so
   homogeneous areas keep their mean backscatter. Exponentiating an unbiased log
   estimate returns about the geometric mean (plus a log-normal excess
   ``exp(var / 2)`` from what noise remains), which BM3D's shrinkage of a skewed noise
   moves further; the factor removes both without a model of either. It depends only
   on the looks, the noise spectrum, the search window and the profile, and is cached.

Correlated speckle is described by the system that made it (``oversampling`` and
``taper``, as in :func:`despeck.speckle.simulate_correlated_intensity`: pure speckle is
simulated, its log-domain spectrum measured with :func:`log_speckle_psd` and used both
for BM3D and for the calibration) or by an explicit log-domain ``psd``.

The ``bm3d`` package is an optional extra (``pip install despeck[bm3d]``): its licence
allows only non-commercial use, so despeck does not depend on it.

References
----------
Dabov, K., Foi, A., Katkovnik, V., Egiazarian, K. (2007). Image denoising by sparse
3-D transform-domain collaborative filtering. IEEE Transactions on Image Processing
16(8), 2080-2095. doi:10.1109/TIP.2007.901238
Mäkinen, Y., Azzari, L., Foi, A. (2020). Collaborative filtering of correlated noise:
exact transform-domain variance for improved shrinkage and patch matching. IEEE
Transactions on Image Processing 29, 8339-8354. doi:10.1109/TIP.2020.3014721
Xie, H., Pierce, L. E., Ulaby, F. T. (2002). Statistical properties of logarithmically
transformed speckle. IEEE Transactions on Geoscience and Remote Sensing 40(3), 721-727.
doi:10.1109/TGRS.2002.1000333
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE Geoscience and Remote Sensing
Magazine 1(3), 6-35 (homomorphic filtering and its bias).
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import math
import threading

import numpy as np
from scipy import ndimage

from ..errors import InputError, MissingDependencyError
from ..speckle import check_looks, gamma_speckle, log_intensity_mean, log_intensity_variance
from .engine import as_image, check_window, check_workers
from .registry import register_filter

__all__ = [
    "INSTALL_HINT",
    "DEFAULT_SEARCH_WINDOW",
    "NOISE_SIGMA",
    "available",
    "require",
    "bm3d_log",
    "bm3d_gaussian",
    "homomorphic_log",
    "log_speckle_psd",
    "calibration_factor",
]

#: What to install when the ``bm3d`` package is missing.
INSTALL_HINT = "pip install despeck[bm3d]  (or: pip install bm3d)"

#: The ``window`` of this filter is BM3D's block-matching search window (pixels, odd);
#: 39 is the package's default for both stages.
DEFAULT_SEARCH_WINDOW = 39

#: Standard deviation of the noise after scaling the log image (see the module notes).
NOISE_SIGMA = 0.1

#: Side and seed of the simulated pure-speckle image the mean correction is measured on.
CALIBRATION_SIZE = 256
CALIBRATION_SEED = 20070801

#: Lags (pixels, each axis) kept by :func:`log_speckle_psd`.
PSD_MAX_LAG = 8

_PROFILES = ("np", "refilter", "vn", "high", "vn_old")
_CALIBRATION: dict = {}
_CALIBRATION_LOCK = threading.Lock()
_SYSTEM_PSD: dict = {}


# --------------------------------------------------------------------------- the package

def available() -> bool:
    """True if the optional ``bm3d`` package is installed (found without importing it)."""
    return importlib.util.find_spec("bm3d") is not None


def require() -> None:
    """Raise :class:`MissingDependencyError` (saying what to install) unless the ``bm3d`` package imports."""
    _bm3d()


def _bm3d():
    try:
        module = importlib.import_module("bm3d")
    except ImportError:
        raise MissingDependencyError(
            f"filter 'bm3d-log' needs the optional bm3d package (non-commercial licence): {INSTALL_HINT}"
        ) from None
    # bm4d 4.2.5 (bm3d's engine) estimates its parameters for a noise PSD with np.trapz,
    # which NumPy 2.4 removed after renaming it np.trapezoid in 2.0; the two are the
    # same function. Provide the old name when it is missing.
    if not hasattr(np, "trapz") and hasattr(np, "trapezoid"):
        np.trapz = np.trapezoid
    return module


def _profile(bm3d, profile, window, workers):
    key = str(profile).strip().lower()
    if key not in _PROFILES:
        raise InputError(f"bm3d-log: profile must be one of {', '.join(_PROFILES)}, got {profile!r}")
    pro = {
        "np": bm3d.BM3DProfile, "refilter": bm3d.BM3DProfileRefilter, "vn": bm3d.BM3DProfileVN,
        "high": bm3d.BM3DProfileHigh, "vn_old": bm3d.BM3DProfileVNOld,
    }[key]()
    pro.search_window_ht = window
    pro.search_window_wiener = window
    pro.num_threads = workers
    return pro


def _check_window(window) -> int:
    return check_window(DEFAULT_SEARCH_WINDOW if window is None else window, "window (bm3d-log search window)")


# --------------------------------------------------------------------------- spectra

def _check_psd(psd) -> np.ndarray:
    p = np.asarray(psd, dtype=np.float64)
    if p.ndim != 2 or min(p.shape) < 1:
        raise InputError(f"psd must be a 2-D array (a log-domain noise spectrum), got shape {p.shape}")
    if not np.all(np.isfinite(p)) or np.any(p < 0) or not p.mean() > 0:
        raise InputError("psd must hold finite, non-negative values with a positive mean")
    return p


def _fit_psd(psd, shape) -> np.ndarray:
    """A spectrum given on any grid, moved onto ``shape`` through its autocorrelation.

    Lags beyond half of either grid are dropped; the result keeps the variance
    (its mean) and is clipped at 1e-6 of it (a truncated autocorrelation can dip
    slightly below zero).
    """
    p = _check_psd(psd)
    if p.shape == tuple(shape):
        return p
    acf = np.fft.ifft2(p).real
    h, w = p.shape
    H, W = shape
    ry, rx = min((h - 1) // 2, (H - 1) // 2), min((w - 1) // 2, (W - 1) // 2)
    dy, dx = np.arange(-ry, ry + 1), np.arange(-rx, rx + 1)
    out = np.zeros(shape)
    out[np.ix_(dy % H, dx % W)] = acf[np.ix_(dy % h, dx % w)]
    spectrum = np.fft.fft2(out).real
    return np.maximum(spectrum, 1e-6 * acf[0, 0])


def log_speckle_psd(speckle, *, max_lag=PSD_MAX_LAG) -> np.ndarray:
    """Power spectral density of the log of a pure-speckle sample.

    The autocovariance of ``ln speckle`` is measured at lags up to ``max_lag`` pixels
    on each axis (sums over all pixel pairs divided by the number of pairs) and
    Fourier-transformed on a ``(2 max_lag + 1)``-square grid, so the spectrum holds
    exactly those lags.

    Parameters
    ----------
    speckle : array_like, (H, W)
        Positive intensity of pure speckle (a simulated field or a homogeneous area).
    max_lag : int
        Largest lag kept; log-speckle correlation of ordinary SAR systems is negligible
        beyond a few pixels.

    Returns
    -------
    ndarray of float64, (2 max_lag + 1, 2 max_lag + 1)
        Numpy FFT layout (zero frequency at ``[0, 0]``), normalised so that its mean is
        the variance of the log-speckle -- the convention of :func:`bm3d_log`'s ``psd``.
    """
    s = np.asarray(speckle, dtype=np.float64)
    k = int(max_lag)
    if s.ndim != 2 or min(s.shape) < 2 * k + 2:
        raise InputError(f"speckle sample must be a 2-D image of at least {2 * k + 2} pixels a side, got {s.shape}")
    if not np.all(np.isfinite(s)) or np.any(s <= 0):
        raise InputError("speckle sample must be finite and positive")
    y = np.log(s)
    y -= y.mean()
    H, W = y.shape
    size = (2 * H, 2 * W)
    sums = np.fft.irfft2(np.abs(np.fft.rfft2(y, size)) ** 2, size)
    lags_y, lags_x = np.arange(-k, k + 1), np.arange(-k, k + 1)
    pairs = np.outer(H - np.abs(lags_y), W - np.abs(lags_x))
    acf = sums[np.ix_(lags_y % size[0], lags_x % size[1])] / pairs
    grid = np.zeros((2 * k + 1, 2 * k + 1))
    grid[np.ix_(lags_y % (2 * k + 1), lags_x % (2 * k + 1))] = acf
    return np.maximum(np.fft.fft2(grid).real, 1e-6 * acf[k, k])


def _system_psd_and_sample(looks, oversampling, taper):
    """Log-speckle spectrum of a system, measured on simulated pure speckle, and that speckle."""
    from ..speckle import simulate_correlated_intensity

    key = (round(float(looks), 9), repr(oversampling), repr(taper))
    if key not in _SYSTEM_PSD:
        n = CALIBRATION_SIZE
        sample = simulate_correlated_intensity(
            np.ones((n, n), dtype=np.float32), looks, rng=CALIBRATION_SEED,
            oversampling=1.0 if oversampling is None else oversampling,
            taper="none" if taper is None else taper,
        ).astype(np.float64)
        _SYSTEM_PSD[key] = (log_speckle_psd(sample), sample)
    return _SYSTEM_PSD[key]


# --------------------------------------------------------------------------- core

def homomorphic_log(intensity, looks) -> np.ndarray:
    """``ln I - (psi(L) - ln L)``: an unbiased estimate of ``ln R`` from L-look intensity.

    References
    ----------
    Xie, H., Pierce, L. E., Ulaby, F. T. (2002). Statistical properties of
    logarithmically transformed speckle. IEEE TGRS 40(3), 721-727.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(np.asarray(intensity, dtype=np.float64)) - log_intensity_mean(looks)


def bm3d_gaussian(image, *, sigma=None, psd=None, window=None, workers=None, profile="np", centre=None):
    """BM3D of an image with additive Gaussian noise, at any scale.

    The image is mapped to ``(image - centre) * NOISE_SIGMA / s + 0.5`` where ``s`` is the
    noise standard deviation (``sigma``, or ``sqrt(mean(psd))``), denoised by
    ``bm3d.bm3d`` with the noise scaled the same way, and mapped back. An image with
    noise ``sigma = NOISE_SIGMA`` and ``centre = 0.5`` reaches the package unchanged.

    Parameters
    ----------
    image : array_like, (H, W)
        Finite values.
    sigma : float, optional
        Noise standard deviation (white noise).
    psd : array_like, optional
        Noise power spectral density in numpy FFT layout on any grid, normalised so that
        its mean is the noise variance (:func:`log_speckle_psd`); moved onto the image's
        grid through its autocorrelation. Give ``sigma`` or ``psd``.
    window : int, optional
        Block-matching search window, odd (default 39, the package's).
    workers : int, optional
        Threads of the package (default 1: more threads may change the last digits
        between runs, as the package notes).
    profile : str
        The package's parameter profile: np, refilter, vn, high, vn_old.
    centre : float, optional
        Value mapped to 0.5 (default the median of the image).

    Returns
    -------
    ndarray of float64, (H, W)
    """
    z = np.asarray(image, dtype=np.float64)
    if z.ndim != 2 or z.size == 0:
        raise InputError(f"image must be a non-empty 2-D array, got shape {z.shape}")
    if not np.all(np.isfinite(z)):
        raise InputError("image must be finite")
    if (sigma is None) == (psd is None):
        raise InputError("give the noise as exactly one of sigma or psd")
    bm3d = _bm3d()
    pro = _profile(bm3d, profile, _check_window(window), check_workers(workers, default=1))
    if psd is not None:
        spectrum = _fit_psd(psd, z.shape)
        s = math.sqrt(float(spectrum.mean()))
    else:
        s = float(sigma)
        if not math.isfinite(s) or s <= 0:
            raise InputError(f"sigma must be a positive number, got {sigma!r}")
    gain = NOISE_SIGMA / s
    c = float(np.median(z)) if centre is None else float(centre)
    scaled = (z - c) * gain + 0.5
    noise = NOISE_SIGMA if psd is None else spectrum * (gain * gain) * z.size
    est = bm3d.bm3d(scaled, noise, pro)
    return (np.asarray(est, dtype=np.float64) - 0.5) / gain + c


def _noise(looks, psd, oversampling, taper):
    """(sigma, psd, calibration sample or None, key) of the log-speckle."""
    L = check_looks(looks)
    if oversampling is not None or taper is not None:
        if psd is not None:
            raise InputError("bm3d-log: give the speckle correlation either as psd or as oversampling/taper, not both")
        spectrum, sample = _system_psd_and_sample(L, oversampling, taper)
        return None, spectrum, sample, ("system", round(L, 9), repr(oversampling), repr(taper))
    if psd is not None:
        p = _check_psd(psd)
        digest = hashlib.sha256(np.ascontiguousarray(p).tobytes() + repr(p.shape).encode()).hexdigest()
        return None, p, None, ("psd", round(L, 9), digest)
    return math.sqrt(log_intensity_variance(L)), None, None, ("white", round(L, 9))


def _calibration_sample(looks, psd, sample):
    """Pure speckle with the noise description's spectrum, unit reflectivity."""
    n = CALIBRATION_SIZE
    if sample is not None:
        return sample
    white = gamma_speckle((n, n), looks, rng=CALIBRATION_SEED, dtype=np.float64)
    if psd is None:
        return white
    # An explicit spectrum without its system: colour white log-speckle to that
    # spectrum (its marginal is then closer to Gaussian than real correlated speckle's).
    y = np.log(white)
    mean = y.mean()
    gain = np.sqrt(_fit_psd(psd, y.shape) / log_intensity_variance(looks))
    return np.exp(np.fft.ifft2(np.fft.fft2(y - mean) * gain).real + mean)


def _log_filter(y, sigma, psd, window, workers, profile):
    return bm3d_gaussian(y, sigma=sigma, psd=psd, window=window, workers=workers, profile=profile)


def calibration_factor(looks, *, window=None, profile="np", psd=None, oversampling=None, taper=None) -> float:
    """Factor that makes the mean of the homomorphic BM3D output equal the input's on pure speckle.

    Measured once per noise description (looks, spectrum, search window, profile) on a
    ``CALIBRATION_SIZE``-square image of unit-mean simulated speckle drawn with a fixed
    seed: ``c = mean(speckle) / mean(exp(BM3D(ln speckle - (psi(L) - ln L))))``. Its
    sampling error is about 0.02 dB at L = 1 (the spread of ``10 log10 c`` over seeds,
    measured: -0.23 +- 0.02 dB at L = 1, -0.05 dB at L = 4.4, white speckle).
    """
    L = check_looks(looks)
    window = _check_window(window)
    sigma, spectrum, sample, key = _noise(L, psd, oversampling, taper)
    key = key + (window, str(profile).strip().lower())
    with _CALIBRATION_LOCK:
        if key not in _CALIBRATION:
            speckle = _calibration_sample(L, spectrum, sample)
            est = np.exp(_log_filter(homomorphic_log(speckle, L), sigma, spectrum, window, 1, profile))
            _CALIBRATION[key] = float(speckle.mean() / est.mean())
        return _CALIBRATION[key]


@register_filter("bm3d-log", default_window=DEFAULT_SEARCH_WINDOW, require=require)
def bm3d_log(intensity, *, looks, window=None, mask=None, workers=None, psd=None, oversampling=None,
             taper=None, profile="np", mean_correction=True):
    """Homomorphic BM3D speckle filter: BM3D on the bias-corrected log intensity, then a mean correction.

    Parameters
    ----------
    intensity : array_like, (H, W)
        Linear intensity.
    looks : float
        Number of looks L (any positive value); sets the log-domain bias
        ``psi(L) - ln L`` and noise level ``sqrt(psi_1(L))``.
    window : int, optional
        Block-matching search window (odd, default 39).
    mask : array_like of bool, optional
        False for invalid pixels (non-finite and non-positive pixels are always
        invalid). Invalid pixels take the log value of their nearest valid pixel while
        filtering (their own values never enter) and keep their input value in the output.
    workers : int, optional
        Threads of the ``bm3d`` package (default 1: reproducible to the last digit).
    psd : array_like, optional
        Log-domain speckle spectrum for correlated speckle (:func:`log_speckle_psd`
        convention: numpy FFT layout, mean = variance of ``ln n``).
    oversampling, taper : optional
        Describe correlated speckle by the system that made it, as in
        :func:`despeck.speckle.simulate_correlated_intensity` (e.g. 1.25 and
        ``"hamming"``); the spectrum is measured on simulated speckle. Not with ``psd``.
    profile : str
        The ``bm3d`` package's parameter profile (np, refilter, vn, high, vn_old).
    mean_correction : bool
        Apply :func:`calibration_factor` (default). Without it the output is about the
        local geometric mean, low by up to 2.5 dB at L = 1.

    Returns
    -------
    ndarray of float32, (H, W)

    Raises
    ------
    MissingDependencyError
        The ``bm3d`` package is not installed.

    References
    ----------
    Dabov et al. (2007); Mäkinen, Azzari, Foi (2020); Xie, Pierce, Ulaby (2002): see the
    module notes.
    """
    img, valid = as_image(intensity, mask)
    a = np.asarray(intensity)
    L = check_looks(looks)
    window = _check_window(window)
    workers = check_workers(workers, default=1)
    _bm3d()
    out = a.astype(np.float32, copy=True)
    if not valid.any():
        return out
    y = np.zeros(img.shape)
    y[valid] = homomorphic_log(img[valid], L)
    if not valid.all():
        nearest = ndimage.distance_transform_edt(~valid, return_distances=False, return_indices=True)
        y = y[tuple(nearest)]
    if float(y.max() - y.min()) <= 1e-12 * max(1.0, abs(float(y.max()))):
        # a constant (noise-free) scene: nothing to filter, and the mean must be kept exactly
        out[valid] = a[valid]
        return out
    sigma, spectrum, _, _ = _noise(L, psd, oversampling, taper)
    est = np.exp(_log_filter(y, sigma, spectrum, window, workers, profile))
    if mean_correction:
        est *= calibration_factor(L, window=window, profile=profile, psd=psd, oversampling=oversampling,
                                  taper=taper)
    out[valid] = est[valid].astype(np.float32)
    return out
