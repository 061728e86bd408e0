"""Classical speckle filters with one call signature, a registry by name, and file filtering.

Every filter maps linear intensity to linear intensity with the same signature,
``f(intensity, *, looks, window=None, mask=None, **options) -> float32 ndarray``,
so the benchmark can sweep any of them. Local statistics are masked normalised
convolutions (sums of valid values divided by counts of valid pixels), so nodata and
the outside of the image never leak into valid pixels; invalid pixels keep their
input value. Every filter works on full-width strips with a halo of
``window // 2`` (or the method's own reach) and every output pixel is computed from
its own neighbourhood by the same fixed sequence of floating-point operations, so
processing a scene strip by strip -- in memory over threads, or from a file larger
than memory with :func:`filter_raster` -- gives bit-identical results to processing
it whole. Statistics are accumulated in float64 and returned as float32.

The package's modules, lowest first:

- :mod:`~despeck.filters.registry` -- one entry per filter (:func:`register_filter`);
  :data:`FILTERS` and :data:`DEFAULT_WINDOWS` are views of it;
- :mod:`~despeck.filters.engine` -- plans, halo-padded tiles, threads, calibration;
- :mod:`~despeck.filters.moments` -- masked local sums and moments;
- :mod:`~despeck.filters.local_stats` -- boxcar, Lee, enhanced Lee, Kuan, Frost, Gamma-MAP;
- :mod:`~despeck.filters.directional` -- refined Lee and the improved Lee sigma filter;
- :mod:`~despeck.filters.nonlocal_means` -- the non-local filter;
- :mod:`~despeck.filters.bm3d_log` -- log-domain BM3D (optional ``bm3d`` package);
- :mod:`~despeck.filters.files` -- :func:`filter_raster`, files strip by strip.

Filters are registered as their modules are imported below, in the order of this
list; that is the order of :data:`FILTERS` (keep the imports in it).

References
----------
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE Geoscience and Remote Sensing
Magazine 1(3), 6-35. doi:10.1109/MGRS.2013.2277512
"""

from __future__ import annotations

from .registry import (
    DEFAULT_WINDOWS,
    FILTERS,
    FilterEntry,
    check_options,
    filter_entry,
    filter_options,
    get_filter,
    register_filter,
)
from .engine import (
    CALIBRATION_SEED,
    CALIBRATION_SIZE,
    MAX_WINDOW,
    SAMPLE_PIXELS,
    STRIP_PIXELS,
    TILE,
    as_image,
    check_window,
)
# registering modules, in the order of FILTERS (not alphabetical on purpose)
from .local_stats import boxcar, enhanced_lee, frost, gamma_map, gamma_map_estimate, kuan, lee
from .directional import improved_sigma, refined_lee, sigma_domain, sigma_interval
from .nonlocal_means import nonlocal_glr
from .bm3d_log import bm3d_log
from .files import filter_raster

__all__ = [
    "FILTERS",
    "DEFAULT_WINDOWS",
    "FilterEntry",
    "register_filter",
    "filter_entry",
    "get_filter",
    "filter_options",
    "check_options",
    "check_window",
    "as_image",
    "MAX_WINDOW",
    "boxcar",
    "lee",
    "kuan",
    "enhanced_lee",
    "frost",
    "gamma_map",
    "gamma_map_estimate",
    "refined_lee",
    "improved_sigma",
    "sigma_interval",
    "sigma_domain",
    "nonlocal_glr",
    "bm3d_log",
    "filter_raster",
]
