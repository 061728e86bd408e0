"""The speckle of one training sample: its looks, and the system response if correlated.

:func:`draw_speckle` draws a sample's :class:`SpeckleDraw` from the ``speckle`` config
section (looks fixed or from a range, a share of the samples correlated with a drawn
oversampling and taper); the draw speckles a clean patch (:meth:`SpeckleDraw.apply`),
says what a despeckler should give back (:meth:`SpeckleDraw.expected`) and its lag-1
correlation. :func:`told_condition` is what a looks-aware network is told about it, with
estimation-like noise; :func:`validation_looks` the looks of the validation speckle.
The looks come from the checked config (:mod:`despeck.training.schema`) and are used as
they are.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

from ..speckle import gamma_speckle, intensity_correlation_theory, simulate_correlated_intensity
from .config import TrainConfig

__all__ = ["SpeckleDraw", "draw_speckle", "told_condition", "validation_looks"]


@dataclass(frozen=True)
class SpeckleDraw:
    """The speckle of one sample: looks, and the system response if correlated."""

    looks: float
    correlated: bool = False
    oversampling: tuple = (1.0, 1.0)
    taper: str = "none"

    def correlation(self) -> tuple:
        """Theoretical lag-1 intensity correlation (rows, cols) of this speckle (0 for white)."""
        if not self.correlated:
            return (0.0, 0.0)
        return (_lag1(self.oversampling[0], self.taper), _lag1(self.oversampling[1], self.taper))

    def expected(self, clean, target="system"):
        """The mean of the speckled image: ``clean`` seen through the system for correlated speckle.

        Correlated speckle's expected intensity is the reflectivity convolved with the
        intensity point-spread function ``|PSF|^2`` (:func:`despeck.speckle.psf_intensity_kernel`);
        a despeckler estimates that, not the unblurred reflectivity (which would ask it to
        deconvolve the sensor). ``target="reference"`` keeps the unblurred clean image.
        """
        if not self.correlated or target == "reference":
            return clean
        from scipy import signal

        from ..speckle import psf_intensity_kernel

        k = psf_intensity_kernel(oversampling=self.oversampling, taper=self.taper).astype(np.float32)
        h = k.shape[0] // 2
        padded = np.pad(clean, h, mode="symmetric")
        return np.maximum(signal.fftconvolve(padded, k, mode="valid"), 0).astype(np.float32)

    def apply(self, clean, rng):
        """Speckled version of ``clean`` (float32)."""
        if self.correlated:
            return simulate_correlated_intensity(clean, self.looks, rng=rng, oversampling=self.oversampling,
                                                 taper=self.taper).astype(np.float32)
        return (clean * gamma_speckle(clean.shape, self.looks, rng=rng)).astype(np.float32)


@functools.lru_cache(maxsize=4096)
def _lag1_cached(oversampling: float, taper: str) -> float:
    return float(intensity_correlation_theory(oversampling=oversampling, taper=taper, lags=(1,))[0])


def _lag1(oversampling, taper) -> float:
    return _lag1_cached(round(float(oversampling), 3), str(taper))


def draw_speckle(s, rng) -> SpeckleDraw:
    """Draw one sample's speckle from the ``speckle`` config section ``s``.

    Looks: fixed, or from the ``[min, max]`` range (uniform or log-uniform); a fraction
    ``correlated_fraction`` of the samples get correlated speckle, with oversampling
    drawn independently for rows and columns from the ``oversampling`` range and a
    taper drawn from the ``taper`` list.
    """
    looks = s.looks  # checked by the config: a positive number, or [min, max] of them
    if isinstance(looks, list) and len(looks) == 2:
        lo, hi = looks
        if s.looks_distribution == "log-uniform" and hi > lo:
            L = float(math.exp(rng.uniform(math.log(lo), math.log(hi))))
        else:
            L = float(rng.uniform(lo, hi))
    else:
        L = looks[0] if isinstance(looks, list) else looks
    if not (s.correlated_fraction > 0 and rng.random() < s.correlated_fraction):
        return SpeckleDraw(L)
    overs = s.oversampling if isinstance(s.oversampling, list) else [s.oversampling, s.oversampling]
    os_r, os_c = (float(rng.uniform(overs[0], overs[-1])) for _ in range(2))
    tapers = s.taper if isinstance(s.taper, list) else [s.taper]
    taper = str(tapers[int(rng.integers(len(tapers)))])
    return SpeckleDraw(max(L, 1.0), True, (os_r, os_c), taper)


def told_condition(draw: SpeckleDraw, jitter: float, rng, dropout: float = 0.0, looks_jitter=None):
    """The (looks, (rho_rows, rho_cols)) a conditioned network is told for ``draw``.

    With estimation-like noise ``jitter`` (on the looks: ``looks_jitter`` if given, the
    relative error of the looks on a log scale); with probability ``dropout`` the
    correlation is withheld (``UNKNOWN_CORRELATION``), so the network learns to run blind too.
    """
    from ..models.wrapper import UNKNOWN_CORRELATION

    looks_jitter = jitter if looks_jitter is None else looks_jitter
    L = draw.looks * math.exp(looks_jitter * float(rng.standard_normal())) if looks_jitter else draw.looks
    rho = draw.correlation()
    if jitter:
        rho = tuple(min(max(r + jitter * float(rng.standard_normal()), 0.0), 1.0) for r in rho)
    if dropout and rng.random() < dropout:
        rho = (UNKNOWN_CORRELATION, UNKNOWN_CORRELATION)
    return float(L), tuple(float(r) for r in rho)


def validation_looks(config: TrainConfig) -> float:
    """Looks of the validation speckle: ``speckle.val_looks``, else the smallest training value (both checked)."""
    s = config.speckle
    if s.val_looks is not None:
        return s.val_looks
    return min(s.looks) if isinstance(s.looks, list) else s.looks
