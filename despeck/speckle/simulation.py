"""Simulation of white (spatially uncorrelated) speckle with explicit random generators.

Gamma intensity speckle drawn with numpy or with a ``torch.Generator``, speckled
intensity and amplitude images, single-look complex images, and multi-looking by block
averages. The same seed gives the same sample.

References
----------
Goodman, J. W. (1976). Some fundamental properties of speckle. JOSA 66(11), 1145-1150.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .checks import check_looks

__all__ = [
    "gamma_speckle", "gamma_speckle_torch", "simulate_intensity", "simulate_amplitude", "simulate_slc",
    "multilook"
]


def as_generator(rng) -> np.random.Generator:
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
    return as_generator(rng).gamma(L, 1.0 / L, size=shape).astype(dtype, copy=False)


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
        check_looks(float(L.min()))  # the one looks rule, on the extremes of the samples' looks
        check_looks(float(L.max()))
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
    g = as_generator(rng)
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
