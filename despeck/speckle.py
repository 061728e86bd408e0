"""Fully developed speckle: statistics, simulation and the number of looks.

Everything here follows the multiplicative model of fully developed speckle:
an observed L-look intensity is ``I = R * n`` with ``R`` the reflectivity
(mean backscatter) and ``n ~ Gamma(shape=L, scale=1/L)`` (mean 1, variance 1/L).
Functions are pure and take an explicit random generator (numpy
``Generator`` or ``torch.Generator``): the same seed gives the same sample.
Besides white speckle the module simulates spatially correlated speckle (a complex
field filtered by a band-limited, tapered system response), splits complex images
into sub-looks, and estimates a scene's number of looks on homogeneous blocks it
finds by itself.

References
----------
Goodman, J. W. (1976). Some fundamental properties of speckle. JOSA 66(11), 1145-1150.
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech House.
Harris, F. J. (1978). On the use of windows for harmonic analysis with the discrete
Fourier transform. Proc. IEEE 66(1), 51-83.
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE GRSM 1(3), 6-35.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, special

from .errors import InputError
from .validity import valid_mask

__all__ = [
    "check_looks",
    "check_looks_range",
    "intensity_mean",
    "intensity_variance",
    "amplitude_mean",
    "amplitude_cv",
    "amplitude_looks_from_cv",
    "log_intensity_mean",
    "log_intensity_variance",
    "log_bias_correction",
    "gamma_speckle",
    "gamma_speckle_torch",
    "simulate_intensity",
    "simulate_amplitude",
    "simulate_slc",
    "multilook",
    "enl_intensity",
    "enl_amplitude",
    "TAPERS",
    "spectral_taper",
    "system_transfer",
    "system_psf",
    "psf_intensity_kernel",
    "simulate_correlated_slc",
    "simulate_correlated_intensity",
    "look_weights",
    "intensity_correlation_theory",
    "KAISER_BETA",
    "measure_speckle_correlation",
    "log_intensity_iqr",
    "looks_from_log_iqr",
    "estimate_looks_log_iqr",
    "SpeckleField",
    "split_sublooks",
    "homogeneous_blocks",
    "estimate_looks",
]


def check_looks(looks, name: str = "looks") -> float:
    """Return ``looks`` as a float, or raise :class:`InputError` if it is not a positive number."""
    try:
        value = float(looks)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a positive number, got {looks!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be a positive number of looks (> 0), got {looks!r}")
    return value


def check_looks_range(looks, name: str = "looks"):
    """A number of looks (a float) or a ``[min, max]`` range of them (a list of two floats, min <= max).

    Each value is checked by :func:`check_looks`; raises :class:`InputError` otherwise.
    """
    if isinstance(looks, (list, tuple)):
        if len(looks) != 2:
            raise InputError(f"{name} must be a number or a [min, max] range, got {looks!r}")
        lo, hi = check_looks(looks[0], name), check_looks(looks[1], name)
        if lo > hi:
            raise InputError(f"{name} range must be [min, max] with min <= max, got {looks!r}")
        return [lo, hi]
    return check_looks(looks, name)


# --------------------------------------------------------------------------- moments

def intensity_mean(looks) -> float:
    """Mean of unit-mean L-look intensity speckle: always 1 (Gamma(L, 1/L))."""
    check_looks(looks)
    return 1.0


def intensity_variance(looks) -> float:
    """Variance of unit-mean L-look intensity speckle, ``1/L`` (Oliver & Quegan 1998)."""
    return 1.0 / check_looks(looks)


def amplitude_mean(looks) -> float:
    """Mean of amplitude speckle ``sqrt(n)`` with ``n ~ Gamma(L, 1/L)``.

    ``E[sqrt(n)] = Gamma(L + 1/2) / (Gamma(L) * sqrt(L))`` (Nakagami with m = L,
    Omega = 1); valid for any positive, also non-integer, L.
    """
    L = check_looks(looks)
    return float(math.exp(special.gammaln(L + 0.5) - special.gammaln(L)) / math.sqrt(L))


def amplitude_cv(looks) -> float:
    """Coefficient of variation of L-look amplitude speckle.

    ``CV_A = sqrt(L * Gamma(L)^2 / Gamma(L + 1/2)^2 - 1)``; ``sqrt(4/pi - 1)`` ~ 0.5227
    at L = 1 (Rayleigh), tends to ``1 / (2 sqrt(L))`` for large L.
    """
    L = check_looks(looks)
    ratio = math.exp(2.0 * (special.gammaln(L) - special.gammaln(L + 0.5)))
    return float(math.sqrt(max(L * ratio - 1.0, 0.0)))


def amplitude_looks_from_cv(cv: float) -> float:
    """Number of looks whose amplitude speckle has coefficient of variation ``cv``.

    Inverts :func:`amplitude_cv`, which decreases monotonically in L. A ``cv`` above
    the value for L = 0.05 returns 0.05; ``cv <= 0`` returns ``inf``.
    """
    cv = float(cv)
    if not math.isfinite(cv):
        raise InputError(f"coefficient of variation must be finite, got {cv!r}")
    if cv <= 0:
        return math.inf
    low, high = 0.05, 1e6
    if cv >= amplitude_cv(low):
        return low
    if cv <= amplitude_cv(high):
        return high
    return float(optimize.brentq(lambda L: amplitude_cv(L) - cv, low, high, xtol=1e-10, rtol=1e-12))


def log_intensity_mean(looks) -> float:
    """Mean of ``ln n`` for unit-mean L-look intensity speckle: ``psi(L) - ln L``.

    -0.5772 at L = 1 (-2.51 dB). The log of a speckled image is biased low by this
    amount; see :func:`log_bias_correction`.
    """
    L = check_looks(looks)
    return float(special.digamma(L) - math.log(L))


def log_intensity_variance(looks) -> float:
    """Variance of ``ln n`` for L-look intensity speckle: ``psi_1(L)`` (trigamma); pi^2/6 at L = 1."""
    L = check_looks(looks)
    return float(special.polygamma(1, L))


def log_bias_correction(looks) -> float:
    """Amount to add to a mean of log-intensities to undo the speckle's log bias: ``ln L - psi(L)``.

    An average of ``ln I`` over a homogeneous area converges to ``ln R + psi(L) - ln L``;
    adding this constant gives ``ln R`` back (Chierchia et al. 2017 apply the same
    correction to their log-domain network's output).
    """
    return -log_intensity_mean(looks)


# --------------------------------------------------------------------------- simulation

def _as_generator(rng) -> np.random.Generator:
    if isinstance(rng, np.random.Generator):
        return rng
    if rng is None or isinstance(rng, (int, np.integer)):
        return np.random.default_rng(rng)
    raise InputError(f"rng must be a numpy Generator, an integer seed or None, got {type(rng).__name__}")


def gamma_speckle(shape, looks, *, rng, dtype=np.float32) -> np.ndarray:
    """Unit-mean L-look intensity speckle, ``Gamma(shape=L, scale=1/L)`` samples.

    Parameters
    ----------
    shape : tuple of int
        Output shape.
    looks : float
        Number of looks L > 0; non-integer values are allowed.
    rng : numpy.random.Generator or int
        Random generator (or seed).
    """
    L = check_looks(looks)
    return _as_generator(rng).gamma(L, 1.0 / L, size=shape).astype(dtype, copy=False)


def gamma_speckle_torch(shape, looks, *, generator=None, dtype=None, device=None):
    """Unit-mean Gamma(L, 1/L) speckle drawn with an explicit ``torch.Generator``.

    ``torch.distributions.Gamma`` cannot take a generator, so this uses the
    Marsaglia-Tsang squeeze method (Marsaglia & Tsang 2000, ACM TOMS 26(3)) with
    vectorised rejection, and the boost ``G(L) = G(L + 1) * U^(1/L)`` for L < 1.
    ``looks`` may be a float or a tensor broadcastable to ``shape`` (one L per sample).
    """
    import torch

    dtype = dtype or torch.float32
    if isinstance(looks, torch.Tensor):
        L = looks.to(dtype=torch.float64, device=device).expand(shape).clone()
        if not bool(torch.all(L > 0)):
            raise InputError("looks must be positive (> 0) for every sample")
    else:
        L = torch.full(shape, check_looks(looks), dtype=torch.float64, device=device)
    boost = L < 1
    alpha = torch.where(boost, L + 1, L)
    d = alpha - 1.0 / 3.0
    c = 1.0 / torch.sqrt(9.0 * d)
    out = torch.empty(shape, dtype=torch.float64, device=device)
    todo = torch.ones(shape, dtype=torch.bool, device=device)
    while bool(todo.any()):
        idx = todo.nonzero(as_tuple=True)
        dd, cc = d[idx], c[idx]
        x = torch.randn(dd.shape, generator=generator, dtype=torch.float64, device=device)
        u = torch.rand(dd.shape, generator=generator, dtype=torch.float64, device=device)
        v = (1 + cc * x) ** 3
        ok = v > 0
        logv = torch.log(torch.where(ok, v, torch.ones_like(v)))
        ok &= torch.log(u) < 0.5 * x * x + dd - dd * v + dd * logv
        sel = tuple(i[ok] for i in idx)
        out[sel] = (dd * v)[ok]
        todo[sel] = False
    if bool(boost.any()):
        u = torch.rand(shape, generator=generator, dtype=torch.float64, device=device)
        out = torch.where(boost, out * u ** (1.0 / L), out)
    return (out / L).to(dtype)


def simulate_intensity(reference, looks, *, rng) -> np.ndarray:
    """Speckle a clean intensity (reflectivity) image with L-look multiplicative Gamma speckle."""
    reference = np.asarray(reference)
    if np.any(reference < 0):
        raise InputError("reference intensity must be non-negative")
    return (reference * gamma_speckle(reference.shape, looks, rng=rng)).astype(np.float32, copy=False)


def simulate_amplitude(reference_amplitude, looks, *, rng) -> np.ndarray:
    """Speckle a clean amplitude image: ``A = a * sqrt(n)``, Nakagami(m = L) amplitude speckle."""
    reference_amplitude = np.asarray(reference_amplitude)
    if np.any(reference_amplitude < 0):
        raise InputError("reference amplitude must be non-negative")
    n = gamma_speckle(reference_amplitude.shape, looks, rng=rng)
    return (reference_amplitude * np.sqrt(n)).astype(np.float32, copy=False)


def simulate_slc(reference, *, rng) -> np.ndarray:
    """Single-look complex image: circular Gaussian with ``E|z|^2 = reference`` (Goodman 1976).

    Real and imaginary parts are independent ``N(0, R/2)``; ``|z|^2`` is exponential
    with mean R and the phase is uniform.
    """
    reference = np.asarray(reference, dtype=np.float32)
    if np.any(reference < 0):
        raise InputError("reference intensity must be non-negative")
    g = _as_generator(rng)
    # single precision throughout: the draws are 4x cheaper and complex64 is the output anyway
    z = g.standard_normal(reference.shape + (2,), dtype=np.float32).view(np.complex64)[..., 0]
    z *= np.sqrt(reference * np.float32(0.5))
    return z


def multilook(intensity, factor) -> np.ndarray:
    """Average non-overlapping blocks of ``factor`` (int or (rows, cols)) pixels.

    Trailing rows/columns that do not fill a block are dropped. On uncorrelated
    speckle the result has ``L * rows * cols`` looks.
    """
    a = np.asarray(intensity)
    fr, fc = (factor, factor) if np.isscalar(factor) else tuple(factor)
    fr, fc = int(fr), int(fc)
    if fr < 1 or fc < 1:
        raise InputError(f"multilook factor must be >= 1, got {factor!r}")
    h, w = (a.shape[-2] // fr) * fr, (a.shape[-1] // fc) * fc
    if h == 0 or w == 0:
        raise InputError(f"image of shape {a.shape} is smaller than the multilook factor {factor!r}")
    a = a[..., :h, :w]
    blocks = a.reshape(a.shape[:-2] + (h // fr, fr, w // fc, fc))
    return blocks.mean(axis=(-3, -1)).astype(np.result_type(a.dtype, np.float32), copy=False)


# --------------------------------------------------------------------------- looks

def _valid_values(values, mask=None) -> np.ndarray:
    v = np.asarray(values, dtype=np.float64)
    if mask is not None:
        v = v[np.asarray(mask, dtype=bool)]
    v = v[np.isfinite(v)].ravel()
    if v.size < 2:
        raise InputError("at least two valid pixels are needed to estimate the number of looks")
    return v


def enl_intensity(values, mask=None) -> float:
    """Equivalent number of looks of intensity over a homogeneous area: ``mean^2 / variance``.

    Texture biases it low and small areas make it noisy (Oliver & Quegan 1998).
    """
    v = _valid_values(values, mask)
    var = v.var()
    return math.inf if var == 0 else float(v.mean() ** 2 / var)


def enl_amplitude(values, mask=None) -> float:
    """Equivalent number of looks of amplitude over a homogeneous area.

    Solves ``amplitude_cv(ENL) = std / mean``; ``(4/pi - 1) mean^2 / var`` is exact only at L = 1.
    """
    v = _valid_values(values, mask)
    mean = v.mean()
    if mean <= 0:
        raise InputError("amplitude values must have a positive mean to estimate the number of looks")
    return amplitude_looks_from_cv(v.std() / mean)


# --------------------------------------------------------------------------- correlated speckle

#: Named spectral tapers. Numbers are the coefficient ``alpha`` of the generalised
#: Hamming window ``alpha + (1 - alpha) cos(pi f / b)`` over the band ``|f| <= b``
#: (Harris 1978); ``"kaiser"`` is the Kaiser window ``I0(beta sqrt(1 - (f/b)^2)) / I0(beta)``
#: with ``beta`` = :data:`KAISER_BETA` (Harris 1978; Kaiser windows with beta about 2-3
#: are a usual range-compression weighting, common practice).
TAPERS = {"none": 1.0, "hamming": 0.54, "hann": 0.5, "kaiser": "kaiser"}
KAISER_BETA = 2.5


def _taper_window(taper):
    """``w(u)`` on the normalised band offset ``u = (f - centre) / b`` in [-1, 1]."""
    if isinstance(taper, str) and taper.strip().lower() == "kaiser":
        return lambda u: special.i0(KAISER_BETA * np.sqrt(np.clip(1.0 - u * u, 0.0, 1.0))) / special.i0(KAISER_BETA)
    alpha = _taper_alpha(taper)
    return lambda u: alpha + (1.0 - alpha) * np.cos(np.pi * u)


def _taper_alpha(taper) -> float:
    if taper is None:
        return 1.0
    if isinstance(taper, str):
        key = taper.strip().lower()
        if key not in TAPERS or key == "kaiser":
            raise InputError(f"taper must be one of {', '.join(TAPERS)} or a number in [0.5, 1], got {taper!r}")
        return TAPERS[key]
    try:
        alpha = float(taper)
    except (TypeError, ValueError):
        raise InputError(f"taper must be a name ({', '.join(TAPERS)}) or a number in [0.5, 1], got {taper!r}") from None
    if not 0.5 <= alpha <= 1.0:
        raise InputError(f"taper coefficient must lie in [0.5, 1] (0.54 is Hamming), got {taper!r}")
    return alpha


def _pair(value, name) -> tuple:
    pair = (value, value) if np.isscalar(value) else tuple(value)
    if len(pair) != 2:
        raise InputError(f"{name} must be a number or a (rows, cols) pair, got {value!r}")
    out = []
    for v in pair:
        try:
            v = float(v)
        except (TypeError, ValueError):
            raise InputError(f"{name} must be a number >= 1, got {value!r}") from None
        if not math.isfinite(v) or v < 1.0:
            raise InputError(f"{name} must be >= 1 (the band may not exceed the sampling rate), got {value!r}")
        out.append(v)
    return tuple(out)


def spectral_taper(n: int, *, oversampling=1.0, taper="hamming", centre=0.0) -> np.ndarray:
    """One-dimensional band-limited, tapered spectrum on the FFT frequency grid of length ``n``.

    The band occupies ``1 / oversampling`` of the sampling rate, centred on ``centre``
    (cycles per pixel, e.g. a Doppler centroid); inside it the weight is the
    generalised Hamming window ``alpha + (1 - alpha) cos(pi (f - centre) / b)`` with
    ``b = 0.5 / oversampling`` (``alpha`` 0.54 Hamming, 0.5 Hann, 1 untapered) or the
    Kaiser window (``taper="kaiser"``, see :data:`TAPERS`), outside 0.

    Returns
    -------
    ndarray of float64, shape (n,)
        Weights in :func:`numpy.fft.fftfreq` order (not normalised).
    """
    (os_, _) = _pair(oversampling, "oversampling")
    window = _taper_window(taper)
    f = np.fft.fftfreq(int(n))
    d = (f - float(centre) + 0.5) % 1.0 - 0.5  # wrap offsets from the centre into [-0.5, 0.5)
    b = 0.5 / os_
    inside = np.abs(d) <= b
    return np.where(inside, window(np.clip(d / b, -1.0, 1.0)), 0.0)


def system_transfer(shape, *, oversampling=1.25, taper="hamming") -> np.ndarray:
    """Separable 2-D transfer function of a sensor-like system on the FFT grid of ``shape``.

    ``H(fr, fc) = w_r(fr) w_c(fc)`` with :func:`spectral_taper` along rows and columns,
    scaled so that ``mean(H**2) = 1``: filtering unit-power white complex noise with it
    keeps unit power. ``oversampling`` may be a (rows, cols) pair.

    References
    ----------
    Argenti et al. (2013), IEEE GRSM 1(3), 6-35 (correlated speckle from the system response).
    """
    osr, osc = _pair(oversampling, "oversampling")
    rows, cols = (int(v) for v in shape)
    h = np.outer(spectral_taper(rows, oversampling=osr, taper=taper), spectral_taper(cols, oversampling=osc, taper=taper))
    return h / math.sqrt(float(np.mean(h * h)))


def system_psf(*, oversampling=1.25, taper="hamming", size=33) -> np.ndarray:
    """Complex point-spread function of :func:`system_transfer`, cropped to ``size`` x ``size``.

    Computed on a 256 x 256 grid, cropped around its peak (odd ``size``) and scaled
    so that ``sum(|PSF|^2) = 1``: convolving white complex noise with it keeps the
    mean intensity. A 33 x 33 crop holds 99.97 % of the energy of the untruncated
    response for the default Hamming taper and oversampling 1.25.
    """
    size = int(size)
    if size < 1 or size % 2 == 0 or size > 255:
        raise InputError(f"PSF size must be an odd number between 1 and 255, got {size}")
    n = 256
    h = system_transfer((n, n), oversampling=oversampling, taper=taper)
    psf = np.fft.fftshift(np.fft.ifft2(h))
    c, r = n // 2, size // 2
    psf = psf[c - r:c + r + 1, c - r:c + r + 1]
    return psf / math.sqrt(float(np.sum(np.abs(psf) ** 2)))


def psf_intensity_kernel(*, oversampling=1.25, taper="hamming", size=33) -> np.ndarray:
    """The intensity point-spread function ``|PSF|^2`` of :func:`system_psf` (sums to 1).

    Speckle simulated by :func:`simulate_correlated_slc` has expected intensity
    ``scipy.ndimage.convolve(reference, kernel, mode="reflect")``, which preserves
    mean backscatter.
    """
    return np.abs(system_psf(oversampling=oversampling, taper=taper, size=size)) ** 2


def _convolve_valid(field, psf) -> np.ndarray:
    from scipy import signal

    return signal.fftconvolve(field, psf.astype(np.complex64), mode="valid").astype(np.complex64, copy=False)


def _check_reference(reference) -> np.ndarray:
    reference = np.asarray(reference, dtype=np.float32)
    if reference.ndim != 2:
        raise InputError(f"reference must be a 2-D image, got shape {reference.shape}")
    if not np.all(np.isfinite(reference)) or np.any(reference < 0):
        raise InputError("reference intensity must be finite and non-negative")
    return reference


def simulate_correlated_slc(reference, *, rng, oversampling=1.25, taper="hamming", psf_size=33) -> np.ndarray:
    """Single-look complex image with spatially correlated speckle.

    A circular Gaussian field with ``E|w|^2 = reference`` (white, as in
    :func:`simulate_slc`) is convolved with the complex point-spread function of a
    band-limited, tapered, oversampled system (:func:`system_psf`): ``z = PSF * w``.
    Hence ``E|z|^2`` is the reference convolved with ``|PSF|^2``
    (:func:`psf_intensity_kernel`), ``|z|^2`` stays exponential and neighbouring
    pixels are correlated as in a sensor image with spectral weighting. The
    reference is mirrored by ``psf_size // 2`` pixels at the borders.

    Parameters
    ----------
    reference : array_like, shape (h, w)
        Clean intensity (reflectivity), non-negative.
    rng : numpy.random.Generator or int
    oversampling : float or (float, float)
        Sampling rate over bandwidth, >= 1 (rows, cols).
    taper : str or float
        Spectral weighting: 'hamming' (default), 'hann', 'none' or a generalised
        Hamming coefficient.
    psf_size : int
        Odd size of the truncated PSF.

    Returns
    -------
    ndarray of complex64, shape (h, w)

    References
    ----------
    Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
    reduction in synthetic aperture radar images. IEEE GRSM 1(3), 6-35.
    """
    reference = _check_reference(reference)
    psf = system_psf(oversampling=oversampling, taper=taper, size=psf_size)
    halo = psf.shape[0] // 2
    padded = np.pad(reference, halo, mode="symmetric")
    return _convolve_valid(simulate_slc(padded, rng=rng), psf)


def look_weights(looks) -> np.ndarray:
    """Weights of the independent single looks whose weighted mean has ``looks`` looks.

    A whole ``L`` gives ``L`` equal weights. A fractional ``L > 1`` uses ``n = ceil(L)``
    looks, ``n - 1`` of weight 1 and one of weight ``w`` in (0, 1) chosen so that the
    equivalent number of looks of the weighted sum of independent exponential
    intensities, ``(sum w)^2 / sum w^2``, equals ``L`` -- the way unequally weighted
    looks give the non-integer ENL of real multi-looked products (Oliver & Quegan
    1998, Understanding Synthetic Aperture Radar Images, ch. 4: ENL of a weighted
    look sum). Weights are normalised to sum to 1, so the mean is kept. The marginal
    law is then close to, not exactly, Gamma(L, 1/L).

    Raises
    ------
    InputError
        ``looks`` below 1 (a sum of looks has at least one).
    """
    L = check_looks(looks)
    if L < 1.0 - 1e-9:
        raise InputError(f"correlated speckle needs at least one look, got {looks!r}")
    n = max(1, int(math.ceil(L - 1e-9)))
    if abs(L - round(L)) <= 1e-9:
        w = np.ones(int(round(L)))
    else:
        m = n - 1  # looks of weight 1; solve (L - 1) w^2 - 2 m w + (L m - m^2) = 0 for w in (0, 1)
        w_last = (m - math.sqrt(max(m * m - (L - 1.0) * (L * m - m * m), 0.0))) / (L - 1.0)
        w = np.ones(n)
        w[-1] = w_last
    return w / w.sum()


def simulate_correlated_intensity(reference, looks, *, rng, oversampling=1.25, taper="hamming",
                                  psf_size=33) -> np.ndarray:
    """L-look intensity with spatially correlated speckle: a weighted mean of correlated single looks.

    Each look is ``|z|^2`` of an independent :func:`simulate_correlated_slc`; a whole
    ``L`` averages ``L`` looks, so the marginal is Gamma(L, R'/L) with ``R'`` the
    reference convolved with ``|PSF|^2``, while the pixel-to-pixel correlation lowers
    the ENL of any spatial average below ``N * L``. A fractional ``L`` (e.g. 4.4)
    weights the looks unequally (:func:`look_weights`) so the per-pixel ENL is ``L``.
    The intensity correlation between pixels does not depend on ``L``
    (:func:`intensity_correlation_theory`).
    """
    from scipy import signal

    weights = look_weights(looks)
    g = _as_generator(rng)
    reference = _check_reference(reference)
    psf = system_psf(oversampling=oversampling, taper=taper, size=psf_size)
    halo = psf.shape[0] // 2
    padded = np.pad(reference, halo, mode="symmetric")
    # The same draws as len(weights) calls of simulate_correlated_slc, convolved in one batch.
    fields = np.stack([simulate_slc(padded, rng=g) for _ in weights])
    z = signal.fftconvolve(fields, psf.astype(np.complex64)[None], mode="valid", axes=(1, 2))
    looks_i = (z.real * z.real + z.imag * z.imag).astype(np.float32, copy=False)
    return np.tensordot(weights.astype(np.float32), looks_i, axes=1).astype(np.float32, copy=False)


def intensity_correlation_theory(*, oversampling=1.25, taper="hamming", lags=(1, 2), n=1024) -> np.ndarray:
    """Correlation coefficient of speckle intensity at pixel ``lags`` along one axis, from the system response.

    For a circular Gaussian field the intensity correlation coefficient at lag ``k``
    is ``|rho_z(k)|^2`` (the Siegert relation), ``rho_z`` being the normalised
    autocorrelation of the complex field, i.e. of the system's point-spread function:
    ``rho_z(k) = sum_f |W(f)|^2 e^(2 pi i f k) / sum_f |W(f)|^2`` with ``W`` the
    one-dimensional band-limited taper (:func:`spectral_taper`). Averaging independent
    looks does not change it. White speckle (no oversampling, no taper) gives 0.

    Returns
    -------
    ndarray of float64, one value per lag.

    References
    ----------
    Goodman, J. W. (1985). Statistical Optics. Wiley (Siegert relation, ch. 3).
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images.
    Artech House (correlated speckle, ch. 4).
    """
    w2 = spectral_taper(int(n), oversampling=oversampling, taper=taper) ** 2
    ac = np.fft.ifft(w2)
    rho = ac / ac[0]
    return np.array([abs(rho[int(k)]) ** 2 for k in lags], dtype=np.float64)


class SpeckleField:
    """Reproducible speckle over a scene of any size, generated window by window.

    The random numbers for each pixel depend only on ``seed`` and the pixel's
    position in the scene (they are drawn per 64 x 64 cell from a generator keyed
    by the cell), so a scene speckled window by window is identical whatever the
    windows are, and never needs to be in memory whole.

    Parameters
    ----------
    looks : float
        Number of looks (a fractional number weights the looks, :func:`look_weights`).
    seed : int
        Non-negative seed.
    correlated : bool
        White Gamma speckle (False) or the correlated speckle of
        :func:`simulate_correlated_slc`, L looks averaged.
    oversampling, taper, psf_size
        System response of correlated speckle (see :func:`system_psf`).

    Attributes
    ----------
    halo : int
        Pixels of reference needed around a window on every side (0 for white speckle).
    """

    cell = 64

    def __init__(self, looks, *, seed, correlated=False, oversampling=1.25, taper="hamming", psf_size=33):
        self.looks = check_looks(looks)
        try:
            self.seed = int(seed)
        except (TypeError, ValueError):
            raise InputError(f"seed must be a non-negative integer, got {seed!r}") from None
        if self.seed < 0 or self.seed != seed:
            raise InputError(f"seed must be a non-negative integer, got {seed!r}")
        self.correlated = bool(correlated)
        if self.correlated:
            self._weights = look_weights(looks)
            self._psf = system_psf(oversampling=oversampling, taper=taper, size=psf_size)
            self.halo = self._psf.shape[0] // 2
        else:
            self.halo = 0

    def _noise(self, kind, look, row, col, height, width):
        """Unit noise for scene pixels [row, row+height) x [col, col+width); rows/cols may start at -halo."""
        c = self.cell
        shift = -(-self.halo // c)  # cell indices made non-negative for the generator key
        out = np.empty((height, width), dtype=np.complex64 if kind == 1 else np.float32)
        for i in range((row // c), (row + height - 1) // c + 1):
            for j in range((col // c), (col + width - 1) // c + 1):
                key = np.random.SeedSequence(self.seed, spawn_key=(kind, look, i + shift, j + shift))
                g = np.random.Generator(np.random.PCG64(key))
                if kind == 1:
                    cell = g.standard_normal((c, c, 2), dtype=np.float32).view(np.complex64)[..., 0]
                    cell *= np.float32(math.sqrt(0.5))
                else:
                    cell = g.standard_gamma(self.looks, (c, c), dtype=np.float32)
                    cell /= np.float32(self.looks)
                r0, r1 = max(row, i * c), min(row + height, (i + 1) * c)
                c0, c1 = max(col, j * c), min(col + width, (j + 1) * c)
                out[r0 - row:r1 - row, c0 - col:c1 - col] = cell[r0 - i * c:r1 - i * c, c0 - j * c:c1 - j * c]
        return out

    def speckle(self, reference, row, col) -> np.ndarray:
        """Speckled intensity of the window whose top-left scene pixel is (row, col).

        ``reference`` is the clean intensity of the window grown by :attr:`halo` on
        every side (mirror it where the window touches the scene's border), shape
        ``(h + 2 halo, w + 2 halo)``; the result has shape ``(h, w)``.
        """
        reference = _check_reference(reference)
        hh = self.halo
        h, w = reference.shape[0] - 2 * hh, reference.shape[1] - 2 * hh
        if h < 1 or w < 1:
            raise InputError(f"reference of shape {reference.shape} is smaller than the halo of {hh} pixels")
        if not self.correlated:
            return (reference * self._noise(0, 0, row, col, h, w)).astype(np.float32, copy=False)
        amplitude = np.sqrt(reference)
        total = np.zeros((h, w), dtype=np.float32)
        for look, wk in enumerate(self._weights):
            field = self._noise(1, look, row - hh, col - hh, h + 2 * hh, w + 2 * hh)
            field *= amplitude
            z = _convolve_valid(field, self._psf)
            total += (z.real * z.real + z.imag * z.imag) * np.float32(wk)
        return total


# --------------------------------------------------------------------------- sub-looks

def split_sublooks(slc, count, *, axis="azimuth", oversampling=1.0, taper=None, centre=0.0, max_gain=3.0) -> np.ndarray:
    """Split a complex image into ``count`` sub-looks with nearly independent speckle.

    The spectrum along ``axis`` is divided by the known spectral ``taper`` inside the
    occupied band (if given; flattening it makes the sub-looks equally strong), then
    the band (``1 / oversampling`` of the sampling rate around ``centre``) is cut into
    ``count`` equal, non-overlapping sub-bands; each is transformed back alone.
    Sub-bands that do not overlap carry independent speckle on a homogeneous area,
    so the sub-looks' intensities are nearly uncorrelated and each is a single look.
    Each sub-look is scaled so that its expected intensity equals the input's
    (mean backscatter is preserved): by ``sum_band(H^2) / sum_sub(H^2 / D^2)`` with
    ``H`` the taper and ``D`` the taper divided out (1 when ``taper`` is None).
    Resolution along ``axis`` drops by ``count``.

    The taper is divided out only down to ``1 / max_gain`` of its peak: near the band
    edges a Hamming taper falls to 0.08, and dividing by it would amplify the spectral
    leakage of a finite, non-periodic image twelve-fold and correlate the outer
    sub-looks (measured: up to 0.04 intensity correlation with full removal, below
    0.01 with ``max_gain=3``).

    Parameters
    ----------
    slc : array_like of complex, shape (h, w)
    count : int
        Number of sub-looks K >= 2.
    axis : {'azimuth', 'range'} or int
        'azimuth' is along rows (axis 0), 'range' along columns (axis 1).
    oversampling : float
        Sampling rate over the occupied bandwidth along ``axis`` (>= 1).
    taper : str or float, optional
        The spectral weighting applied by the processor, to be removed first.
    centre : float
        Band centre along ``axis`` in cycles per pixel (e.g. Doppler centroid / PRF).
    max_gain : float
        Largest amplification used when dividing out the taper (>= 1).

    Returns
    -------
    ndarray of complex64, shape (count, h, w)
        Sub-look images; their intensities are ``abs(x) ** 2``.

    References
    ----------
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech House
    (multi-look processing by splitting the azimuth spectrum).
    """
    z = np.asarray(slc)
    if not np.iscomplexobj(z) or z.ndim != 2:
        raise InputError(f"sub-looks need a 2-D complex image, got shape {z.shape} of {z.dtype}")
    try:
        k = int(count)
    except (TypeError, ValueError):
        k = 0
    if k < 2 or k != count:
        raise InputError(f"sub-look count must be a whole number >= 2, got {count!r}")
    names = {"azimuth": 0, "range": 1, 0: 0, 1: 1}
    if axis not in names:
        raise InputError(f"axis must be 'azimuth' (rows), 'range' (columns), 0 or 1, got {axis!r}")
    ax = names[axis]
    n = z.shape[ax]
    (os_, _) = _pair(oversampling, "oversampling")
    b = 0.5 / os_
    if n * 2 * b < 2 * k:
        raise InputError(f"an image {n} pixels long along {axis} is too short for {k} sub-looks")
    from scipy import fft

    spectrum = fft.fft(z.astype(np.complex64, copy=False), axis=ax, workers=-1)
    f = np.fft.fftfreq(n)
    d = (f - float(centre) + 0.5) % 1.0 - 0.5
    weight = spectral_taper(n, oversampling=os_, taper=taper if taper is not None else "none", centre=centre)
    band = np.abs(d) <= b
    try:
        max_gain = float(max_gain)
    except (TypeError, ValueError):
        max_gain = float("nan")
    if not max_gain >= 1.0:
        raise InputError(f"max_gain must be a number >= 1, got {max_gain!r}")
    floor = 1.0 / max_gain
    divide = np.where(band, np.maximum(weight, floor), 1.0) if taper is not None else np.ones(n)
    # index of the sub-band of each frequency bin; -1 outside the band
    which = np.where(band, np.minimum(((d + b) / (2 * b) * k).astype(int), k - 1), -1)
    total_power = float(np.sum(np.where(band, weight, 0.0) ** 2))
    shape = [1, 1]
    out = np.empty((k,) + z.shape, dtype=np.complex64)
    for i in range(k):
        sel = which == i
        sub_power = float(np.sum((weight[sel] / divide[sel]) ** 2))
        gain = np.where(sel, 1.0 / divide, 0.0) * math.sqrt(total_power / sub_power)
        shape[ax] = n
        out[i] = fft.ifft(spectrum * gain.reshape(shape).astype(np.complex64), axis=ax, workers=-1)
    return out


# --------------------------------------------------------------------------- looks from a scene

def homogeneous_blocks(intensity, valid=None, *, window=16, fraction=0.2, min_blocks=8, split="checker"):
    """Find the most homogeneous ``window`` x ``window`` blocks of an intensity image.

    The image is cut into non-overlapping blocks; blocks with any invalid pixel, a
    non-positive mean or fewer than ``window**2`` pixels are dropped. Each block is
    split like a checkerboard into two interleaved halves. The blocks are ranked by
    the coefficient of variation (std / mean) of their *first* half and the lowest
    ``fraction`` of them (at least ``min_blocks``) are kept. Texture, edges and
    targets only raise the CV, so these are the blocks most likely to be pure
    speckle; ranking on one half and measuring on the other keeps the ranking's luck
    out of the measurement (exactly so for spatially uncorrelated speckle).

    Returns
    -------
    origins : ndarray of int, shape (m, 2)
        (row, col) of each kept block's top-left pixel, most homogeneous first.
    cv2 : ndarray of float64, shape (m,)
        Squared CV of the second (measurement) half of each kept block.

    Raises
    ------
    InputError
        If fewer than ``min_blocks`` blocks are free of nodata.
    """
    x = np.asarray(intensity, dtype=np.float64)
    if x.ndim != 2:
        raise InputError(f"intensity must be a 2-D image, got shape {x.shape}")
    window = int(window)
    if window < 4:
        raise InputError(f"window must be at least 4 pixels, got {window}")
    if not 0 < float(fraction) <= 1:
        raise InputError(f"fraction must lie in (0, 1], got {fraction!r}")
    ok = valid_mask(x, valid, what="intensity")
    rows, cols = x.shape[0] // window, x.shape[1] // window
    if rows == 0 or cols == 0:
        raise InputError(f"image of shape {x.shape} is smaller than one {window}x{window} block")
    h, w = rows * window, cols * window

    def blocks(a):
        return a[:h, :w].reshape(rows, window, cols, window).transpose(0, 2, 1, 3).reshape(rows * cols, window, window)

    xb, okb = blocks(np.where(ok, x, 0.0)), blocks(ok)
    keep = okb.all(axis=(1, 2))
    if split == "checker":
        checker = (np.add.outer(np.arange(window), np.arange(window)) % 2).astype(bool)
    elif split == "halves":
        checker = np.zeros((window, window), dtype=bool)
        checker[:, window // 2:] = True
    else:
        raise InputError(f"split must be 'checker' or 'halves', got {split!r}")
    first, second = xb[:, ~checker], xb[:, checker]
    m1, m2 = first.mean(axis=1), second.mean(axis=1)
    keep &= (m1 > 0) & (m2 > 0)
    n_ok = int(keep.sum())
    if n_ok < int(min_blocks):
        raise InputError(
            f"only {n_ok} {window}x{window} blocks are free of nodata; at least {int(min_blocks)} are needed to estimate the looks"
        )
    index = np.flatnonzero(keep)
    rank_cv = first[index].std(axis=1, ddof=1) / m1[index]
    n_keep = max(int(min_blocks), int(math.ceil(float(fraction) * index.size)))
    order = index[np.argsort(rank_cv, kind="stable")[:n_keep]]
    cv2 = second[order].var(axis=1, ddof=1) / m2[order] ** 2
    origins = np.stack([order // cols * window, order % cols * window], axis=1)
    return origins, cv2


def estimate_looks(intensity, valid=None, *, window=16, fraction=0.2, min_blocks=8) -> float:
    """Estimate a scene's equivalent number of looks from automatically found homogeneous areas.

    Rule: :func:`homogeneous_blocks` keeps the ``fraction`` of ``window`` x ``window``
    blocks (free of nodata) with the lowest coefficient of variation on one
    checkerboard half; the ENL is ``1 / median(CV^2)`` of the other half over those
    blocks. The median resists the few textured blocks that slip in; on pure
    L-look speckle the estimate is within a few per cent of L for blocks of 16 x 16
    (``scipy.stats.gamma`` check in the tests). Spatially correlated speckle gives
    the per-pixel ENL, and on scenes with no homogeneous area at all the result is
    a lower bound.

    Returns
    -------
    float
        Estimated ENL (``inf`` if the kept blocks are constant).
    """
    _, cv2 = homogeneous_blocks(intensity, valid, window=window, fraction=fraction, min_blocks=min_blocks)
    median = float(np.median(cv2))
    return math.inf if median == 0 else 1.0 / median


def measure_speckle_correlation(intensity, valid=None, *, window=32, fraction=0.2, min_blocks=8, lags=(1, 2),
                                split="halves", background_lags=(4, 5)):
    """Measure the speckle's intensity correlation coefficients along rows and columns.

    On the most homogeneous ``window`` x ``window`` blocks (:func:`homogeneous_blocks`)
    each block is normalised to ``d = I / mean - 1`` and the correlation coefficient at
    lag ``k`` is ``sum d(p) d(p + k) / sum d(p)^2``, pooled over the blocks (sums of
    numerators over sums of denominators). On pure speckle it estimates the system
    value ``|rho_z(k)|^2`` (:func:`intensity_correlation_theory`; 0 for white speckle).

    Texture left in the blocks (on multi-look scenes the speckle is weak enough that
    smooth structure passes the homogeneity ranking) adds a slowly decaying term.
    Sensor speckle decorrelates within a few pixels (``|rho_z(4)|^2 < 0.02`` for
    oversampling up to 1.6 with the usual tapers), so the mean coefficient at
    ``background_lags`` is taken as that texture term ``b`` and removed:
    ``rho(k) = (r(k) - b) / (1 - b)``. ``background_lags=None`` reports the raw ``r(k)``.

    Parameters
    ----------
    intensity : array_like, 2-D
    valid : array_like of bool, optional
    window, fraction, min_blocks
        Block search (see :func:`homogeneous_blocks`).
    lags : sequence of int
        Pixel lags to measure (each smaller than ``window``).

    Returns
    -------
    dict
        ``{"rows": [rho(k) for k in lags], "cols": [...], "lags": [...], "blocks": m}``;
        ``rows`` is the correlation between vertically adjacent pixels (along the
        columns of the array, i.e. down the rows axis), ``cols`` between horizontally
        adjacent ones.

    References
    ----------
    Goodman, J. W. (1985). Statistical Optics. Wiley (Siegert relation).
    """
    lags = [int(k) for k in lags]
    if not lags or min(lags) < 1 or max(lags) >= int(window):
        raise InputError(f"lags must be positive and smaller than the window ({window}), got {lags}")
    x = np.asarray(intensity, dtype=np.float64)
    origins, _ = homogeneous_blocks(x, valid, window=window, fraction=fraction, min_blocks=min_blocks, split=split)
    w = int(window)
    blocks = np.stack([x[r:r + w, c:c + w] for r, c in origins])
    d = blocks / blocks.mean(axis=(1, 2), keepdims=True) - 1.0

    def coefficient(k, axis):
        a, b = (d[:, :-k, :], d[:, k:, :]) if axis == 0 else (d[:, :, :-k], d[:, :, k:])
        den = np.sum(a * a + b * b) / 2.0
        return float(np.sum(a * b) / den) if den > 0 else 0.0

    if background_lags is not None and max(background_lags) >= w:
        raise InputError(f"background lags must be smaller than the window ({window}), got {background_lags}")
    out = {"rows": [], "cols": [], "lags": lags, "blocks": int(len(origins)), "background": []}
    for axis, key in ((0, "rows"), (1, "cols")):
        bg = float(np.mean([coefficient(k, axis) for k in background_lags])) if background_lags else 0.0
        bg = min(max(bg, 0.0), 0.95)
        out["background"].append(bg)
        out[key] = [(coefficient(k, axis) - bg) / (1.0 - bg) for k in lags]
    return out


def log_intensity_iqr(looks) -> float:
    """Interquartile range of ``ln n`` for unit-mean L-look Gamma speckle (nepers).

    ``ln(q75 / q25)`` of Gamma(L, 1/L) (``scipy.stats.gamma.ppf``); 1.60 at L = 1,
    falling as ``1.349 sqrt(psi_1(L))`` for large L (the Gaussian limit).
    """
    from scipy import stats

    L = check_looks(looks)
    q25, q75 = stats.gamma.ppf([0.25, 0.75], L, scale=1.0 / L)
    return float(math.log(q75 / q25))


def looks_from_log_iqr(iqr: float) -> float:
    """Invert :func:`log_intensity_iqr` (monotone in L) for L in [0.05, 1e4]."""
    iqr = float(iqr)
    lo, hi = 0.05, 1e4
    f = lambda L: log_intensity_iqr(L) - iqr  # noqa: E731
    if f(hi) >= 0:
        return hi
    if f(lo) <= 0:
        return lo
    return float(optimize.brentq(f, lo, hi, xtol=1e-6, rtol=1e-6))


def estimate_looks_log_iqr(intensity, valid=None, *, window=32, fraction=0.2, min_blocks=8):
    """Estimate the looks from the interquartile range of ``ln I`` on homogeneous blocks.

    Blocks free of nodata are split into left and right halves; blocks are ranked by
    the log-IQR of their left half, the lowest ``fraction`` (at least ``min_blocks``)
    are kept and the median log-IQR of their right halves is inverted through
    :func:`log_intensity_iqr`. Quartiles ignore the few bright point scatterers and
    edges that inflate a block's coefficient of variation, so built-up scenes with
    little homogeneous ground are estimated far better than by ``1 / CV^2``
    (:func:`estimate_looks`); on pure Gamma speckle both agree within a few per cent.
    Halves (not a checkerboard) keep the ranking out of the measurement also for
    spatially correlated speckle.

    Returns
    -------
    (float, int)
        The estimate and the number of blocks it rests on.

    References
    ----------
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images.
    Artech House (distribution of log intensity, ch. 4).
    """
    x = np.asarray(intensity, dtype=np.float64)
    if x.ndim != 2:
        raise InputError(f"intensity must be a 2-D image, got shape {x.shape}")
    w = int(window)
    if w < 8 or w % 2:
        raise InputError(f"window must be an even number of at least 8 pixels, got {window}")
    ok = valid_mask(x, valid, what="intensity")
    rows, cols = x.shape[0] // w, x.shape[1] // w
    if rows == 0 or cols == 0:
        raise InputError(f"image of shape {x.shape} is smaller than one {w}x{w} block")
    logs = np.log(np.where(ok, x, 1.0))[:rows * w, :cols * w].reshape(rows, w, cols, w).transpose(0, 2, 1, 3)
    okb = ok[:rows * w, :cols * w].reshape(rows, w, cols, w).transpose(0, 2, 1, 3).reshape(rows * cols, w, w)
    logs = logs.reshape(rows * cols, w, w)
    keep = np.flatnonzero(okb.all(axis=(1, 2)))
    if keep.size < int(min_blocks):
        raise InputError(f"only {keep.size} {w}x{w} blocks are free of nodata; at least {int(min_blocks)} are needed")
    first = logs[keep, :, :w // 2].reshape(keep.size, -1)
    second = logs[keep, :, w // 2:].reshape(keep.size, -1)
    q1 = np.subtract(*np.percentile(first, [75, 25], axis=1))
    q2 = np.subtract(*np.percentile(second, [75, 25], axis=1))
    n_keep = max(int(min_blocks), int(math.ceil(float(fraction) * keep.size)))
    chosen = np.argsort(q1, kind="stable")[:n_keep]
    median = float(np.median(q2[chosen]))
    if median <= 0:
        raise InputError("the most homogeneous blocks are constant; the scene holds no speckle to measure")
    return looks_from_log_iqr(median), int(chosen.size)
