"""Spatially correlated speckle: simulation through the system response, and its measurement on a scene.

A white circular Gaussian field convolved with the system's point-spread function
(:mod:`despeck.speckle.system`) gives single looks with the pixel-to-pixel
correlation of a sensor image; weighted means of such looks give any number of looks
>= 1 (:func:`look_weights`). :class:`SpeckleField` draws the same speckle window by
window for scenes larger than memory, and :func:`measure_speckle_correlation`
measures the correlation on a scene's homogeneous blocks.

References
----------
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE GRSM 1(3), 6-35.
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech House.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from .checks import check_looks
from .estimation import homogeneous_blocks
from .simulation import as_generator, simulate_slc
from .system import system_psf

__all__ = [
    "simulate_correlated_slc", "simulate_correlated_intensity", "look_weights", "SpeckleField",
    "measure_speckle_correlation"
]


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
    g = as_generator(rng)
    reference = _check_reference(reference)
    psf = system_psf(oversampling=oversampling, taper=taper, size=psf_size)
    halo = psf.shape[0] // 2
    padded = np.pad(reference, halo, mode="symmetric")
    # The same draws as len(weights) calls of simulate_correlated_slc, convolved in one batch.
    fields = np.stack([simulate_slc(padded, rng=g) for _ in weights])
    z = signal.fftconvolve(fields, psf.astype(np.complex64)[None], mode="valid", axes=(1, 2))
    looks_i = (z.real * z.real + z.imag * z.imag).astype(np.float32, copy=False)
    return np.tensordot(weights.astype(np.float32), looks_i, axes=1).astype(np.float32, copy=False)


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
