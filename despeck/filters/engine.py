"""The halo-blocked engine every strip filter runs on: plans, tiles, threads, calibration (numpy only).

A filter is planned once per call (:class:`Plan`: a kernel and the reach of its
neighbourhood, its ``halo``) and the engine runs the kernel over tiles of
:data:`TILE` pixels, each padded with ``halo`` pixels of context (zero and invalid
outside the image), in threads. Every output pixel is computed from its own
neighbourhood by the same fixed sequence of floating-point operations, so processing
an image tile by tile, or a file strip by strip (:func:`despeck.filters.files.filter_raster`),
gives bit-identical results to processing it whole. Statistics are accumulated in
float64 and returned as float32; invalid pixels keep their input value.
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..cpu import usable_cores
from ..errors import InputError
from ..validity import valid_mask

__all__ = [
    "STRIP_PIXELS",
    "TILE",
    "CALIBRATION_SIZE",
    "CALIBRATION_SEED",
    "SAMPLE_PIXELS",
    "MAX_WINDOW",
    "check_window",
    "check_positive",
    "check_workers",
    "as_image",
    "Plan",
    "pad_block",
    "strip_rows",
    "run_tiles",
    "run_plan",
    "apply_plan",
    "call_kernel",
    "calibrated",
    "calibration_factor",
    "scene_percentile",
]

#: Pixels per strip read from a file by :func:`~despeck.filters.files.filter_raster` (bounded memory for
#: scenes larger than memory).
STRIP_PIXELS = 1 << 21

#: Side of the tiles a strip or an in-memory image is cut into for the kernels
#: (working arrays small enough for the CPU caches, and one tile per thread).
TILE = 128

#: Size and seed of the simulated pure-speckle image that calibrates the radiometric
#: correction of the Gamma-MAP, refined Lee and improved sigma filters (see :func:`calibrated`).
CALIBRATION_SIZE = 512
CALIBRATION_SEED = 8675309

#: Pixels of the decimated sample read to estimate scene-level values (looks, percentiles).
SAMPLE_PIXELS = 1_000_000

#: Largest window (and patch) any filter accepts, in pixels. The published filters use
#: windows of 3 to about 15 pixels (common practice); far larger ones only average the
#: neighbourhood away, and their working arrays and running time grow with the window's
#: area, so a mistyped size would exhaust memory instead of failing at once.
MAX_WINDOW = 201


# --------------------------------------------------------------------------- validation

def check_window(window, name: str = "window", maximum: int = MAX_WINDOW) -> int:
    """Return ``window`` as an int, or raise :class:`InputError` unless it is odd, >= 3 and <= ``maximum``."""
    try:
        value = int(window)
        if value != float(window):
            raise ValueError
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"{name} must be an odd integer from 3 to {maximum}, got {window!r}") from None
    if value < 3 or value % 2 == 0:
        raise InputError(f"{name} must be an odd integer >= 3 (3, 5, 7, ...), got {window!r}")
    if value > maximum:
        raise InputError(f"{name} must be at most {maximum} pixels (filters use 3 to about 15), got {window!r}")
    return value


def check_positive(value, name: str) -> float:
    """``value`` as a finite positive float, or :class:`InputError` naming the option ``name``."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a positive number, got {value!r}") from None
    if not math.isfinite(v) or v <= 0:
        raise InputError(f"{name} must be a positive number, got {value!r}")
    return v


def check_workers(workers, default=None) -> int:
    """A number of threads: ``workers`` as a positive int, ``default`` when None (else the usable cores)."""
    if workers is None:
        return usable_cores() if default is None else default
    try:
        w = int(workers)
        whole = w == float(workers)
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"workers must be a positive integer, got {workers!r}") from None
    if w < 1 or not whole:
        raise InputError(f"workers must be a positive integer, got {workers!r}")
    return w


def as_image(intensity, mask=None):
    """Check an intensity image and return it as the filters see it.

    Parameters
    ----------
    intensity : array_like
        2-D, non-empty, real linear intensity.
    mask : array_like of bool, optional
        Same shape; False leaves a pixel out.

    Returns
    -------
    image : ndarray of float64
        The intensity with zeros where invalid.
    valid : ndarray of bool
        Finite, positive and inside ``mask``.

    Raises
    ------
    InputError
        For a non-2-D, empty or complex image, or a mask of another shape.
    """
    a = np.asarray(intensity)
    if a.ndim != 2:
        raise InputError(f"intensity must be a 2-D image, got shape {a.shape}")
    if a.size == 0:
        raise InputError("intensity image is empty")
    if np.iscomplexobj(a) or not np.issubdtype(a.dtype, np.number):
        raise InputError(f"intensity must be real numbers, got {a.dtype}")
    img = a.astype(np.float64)
    valid = valid_mask(img, mask, what="intensity")
    img[~valid] = 0.0
    return img, valid


# --------------------------------------------------------------------------- strips

@dataclass(frozen=True)
class Plan:
    """What a filter does to one padded block: ``kernel(padded, valid) -> core`` and its reach.

    ``padded`` is float64 with zeros where invalid, ``valid`` bool, both with ``halo``
    extra pixels on every side (outside the image: zero and invalid). The kernel
    returns the filtered core, shape ``padded.shape - 2 * halo``.
    """

    kernel: Callable[[np.ndarray, np.ndarray], np.ndarray]
    halo: int


def pad_block(img, valid, r0, r1, halo, c0=0, c1=None):
    """Pixels ``[r0:r1, c0:c1]`` of an image with ``halo`` pixels of context on every side.

    Context outside the image is zero and invalid.
    """
    h, w = img.shape
    c1 = w if c1 is None else c1
    out = np.zeros((r1 - r0 + 2 * halo, c1 - c0 + 2 * halo))
    ok = np.zeros(out.shape, dtype=bool)
    s0, s1 = max(r0 - halo, 0), min(r1 + halo, h)
    t0, t1 = max(c0 - halo, 0), min(c1 + halo, w)
    rows = slice(s0 - (r0 - halo), s1 - (r0 - halo))
    cols = slice(t0 - (c0 - halo), t1 - (c0 - halo))
    out[rows, cols] = img[s0:s1, t0:t1]
    ok[rows, cols] = valid[s0:s1, t0:t1]
    return out, ok


def strip_rows(width: int, halo: int) -> int:
    """Rows of a strip read from a file: :data:`STRIP_PIXELS` worth, and more than twice the halo."""
    return max(2 * halo + 8, STRIP_PIXELS // max(width, 1))


def _tiles(height, width, size):
    return [(r, min(r + size, height), c, min(c + size, width))
            for r in range(0, height, size) for c in range(0, width, size)]


def run_tiles(plan: Plan, img, valid, out, pool=None):
    """Filter ``img`` (zeros where invalid) tile by tile into ``out``, in threads if ``pool``.

    Tiles of ``TILE`` pixels keep a kernel's working arrays in the CPU caches; as each
    output pixel is computed from its own neighbourhood only, the tiling does not
    change a single bit of the result.
    """

    def one(tile):
        r0, r1, c0, c1 = tile
        padded, ok = pad_block(img, valid, r0, r1, plan.halo, c0, c1)
        out[r0:r1, c0:c1] = call_kernel(plan, padded, ok)

    tiles = _tiles(img.shape[0], img.shape[1], TILE)
    if pool is None or len(tiles) == 1:
        for t in tiles:
            one(t)
    else:
        list(pool.map(one, tiles))


def run_plan(plan: Plan, img, valid, original, workers=None):
    """Apply a plan tile by tile (in threads) and put invalid pixels back to their input value."""
    out = np.empty(img.shape, dtype=np.float32)
    workers = check_workers(workers)
    if workers == 1 or img.size <= TILE * TILE:
        run_tiles(plan, img, valid, out)
    else:
        with ThreadPoolExecutor(workers) as pool:
            run_tiles(plan, img, valid, out, pool)
    original = np.asarray(original)
    if not valid.all():
        out[~valid] = original[~valid].astype(np.float32)
    return out


def call_kernel(plan: Plan, padded, ok):
    """Run ``plan``'s kernel on one padded block (see :class:`Plan`), returning the block's core."""
    # np.errstate is per thread: set it where the kernel runs. Divisions by zero only
    # happen at pixels without valid neighbours, which are discarded.
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return plan.kernel(padded, ok)


def calibrated(core_and_mask, halo, looks, key, measure_with=None):
    """Wrap a kernel with a radiometric correction measured on simulated pure speckle.

    ``core_and_mask(padded, ok)`` returns the uncorrected estimate and a mask of the
    pixels the correction applies to (the filtered class; kept centre pixels and
    point targets are left alone). The factor ``c`` makes the mean of the output
    equal to the mean of the input on a ``CALIBRATION_SIZE``-square image of
    unit-mean L-look Gamma speckle drawn with a fixed seed: ``c = (sum I - sum of
    uncorrected outputs) / sum of corrected-class outputs``. Its sampling error is
    about 0.1 % at L = 1. ``measure_with`` is the ``core_and_mask`` measured on the
    simulated speckle when it differs from the one applied (e.g. a threshold taken
    from the speckle rather than the scene); ``key`` caches the factor.

    Returns ``(kernel, c)``.
    """
    scale = calibration_factor(core_and_mask if measure_with is None else measure_with, halo, float(looks), key)

    def kernel(p, ok):
        core, corrected = core_and_mask(p, ok)
        return np.where(corrected, core * scale, core)

    return kernel, scale


_CALIBRATION_CACHE: dict = {}


def calibration_factor(core_and_mask, halo, looks, key):
    """The correction factor of :func:`calibrated`, measured once per ``key``."""
    if key in _CALIBRATION_CACHE:
        return _CALIBRATION_CACHE[key]
    from ..speckle import gamma_speckle

    sim = gamma_speckle((CALIBRATION_SIZE, CALIBRATION_SIZE), looks, rng=CALIBRATION_SEED, dtype=np.float64)
    valid = np.ones(sim.shape, dtype=bool)
    padded, ok = pad_block(sim, valid, 0, sim.shape[0], halo)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        core, corrected = core_and_mask(padded, ok)
    inside = float(core[corrected].sum())
    scale = (float(sim.sum()) - float(core[~corrected].sum())) / inside if inside > 0 else 1.0
    _CALIBRATION_CACHE[key] = scale
    return scale


def apply_plan(plan: Plan, intensity, mask, workers):
    """Check ``intensity`` and ``mask`` (:func:`as_image`) and run ``plan`` over them (:func:`run_plan`)."""
    img, valid = as_image(intensity, mask)
    return run_plan(plan, img, valid, intensity, workers)


def scene_percentile(img, valid, q=98.0):
    """The ``q``-th percentile of the valid pixels of ``img``; :class:`InputError` if there is none."""
    values = img[valid]
    if values.size == 0:
        raise InputError("the image has no valid pixel")
    return float(np.percentile(values, q))

