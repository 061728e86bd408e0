"""Fully developed speckle: statistics, simulation and the number of looks.

Everything here follows the multiplicative model of fully developed speckle:
an observed L-look intensity is ``I = R * n`` with ``R`` the reflectivity
(mean backscatter) and ``n ~ Gamma(shape=L, scale=1/L)`` (mean 1, variance 1/L).
Functions are pure and take an explicit random generator (numpy
``Generator`` or ``torch.Generator``): the same seed gives the same sample.

References
----------
Goodman, J. W. (1976). Some fundamental properties of speckle. JOSA 66(11), 1145-1150.
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech House.
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE GRSM 1(3), 6-35.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, special

from .errors import InputError

__all__ = [
    "check_looks",
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
    reference = np.asarray(reference, dtype=np.float64)
    if np.any(reference < 0):
        raise InputError("reference intensity must be non-negative")
    g = _as_generator(rng)
    scale = np.sqrt(reference / 2.0)
    z = scale * g.standard_normal(reference.shape) + 1j * scale * g.standard_normal(reference.shape)
    return z.astype(np.complex64)


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
