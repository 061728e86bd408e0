"""The system response behind correlated speckle: spectral tapers, transfer function, PSF and the correlation it implies.

A sensor's complex image is band-limited (oversampled by the ratio of sampling rate to
bandwidth) and spectrally weighted (a generalised Hamming or a Kaiser taper). This
module builds that response on an FFT grid, its point-spread function and intensity
kernel, and the theoretical intensity correlation between pixels it gives.

References
----------
Harris, F. J. (1978). On the use of windows for harmonic analysis with the discrete
Fourier transform. Proc. IEEE 66(1), 51-83.
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE GRSM 1(3), 6-35.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from ..errors import InputError

__all__ = [
    "TAPERS", "KAISER_BETA", "spectral_taper", "system_transfer", "system_psf", "psf_intensity_kernel",
    "intensity_correlation_theory"
]


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


def oversampling_pair(value, name) -> tuple:
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
    (os_, _) = oversampling_pair(oversampling, "oversampling")
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
    osr, osc = oversampling_pair(oversampling, "oversampling")
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
