"""Fully developed speckle: statistics, simulation and the number of looks.

Everything here follows the multiplicative model of fully developed speckle:
an observed L-look intensity is ``I = R * n`` with ``R`` the reflectivity
(mean backscatter) and ``n ~ Gamma(shape=L, scale=1/L)`` (mean 1, variance 1/L).
Functions are pure and take an explicit random generator (numpy
``Generator`` or ``torch.Generator``): the same seed gives the same sample.
Besides white speckle the package simulates spatially correlated speckle (a complex
field filtered by a band-limited, tapered system response), splits complex images
into sub-looks, and estimates a scene's number of looks on homogeneous blocks it
finds by itself.

The package's modules, lowest first:

- :mod:`~despeck.speckle.checks` -- :func:`check_looks`, the one rule for a number of
  looks (and :func:`check_looks_range` for a ``[min, max]`` range);
- :mod:`~despeck.speckle.moments` -- moments of intensity, amplitude and log-intensity
  speckle (digamma/trigamma log bias and variance, log-IQR);
- :mod:`~despeck.speckle.simulation` -- white speckle with numpy or torch generators,
  single-look complex images, multi-looking;
- :mod:`~despeck.speckle.estimation` -- ENL of an area, looks of a scene on the
  homogeneous blocks it finds (``1 / CV^2``, log-IQR, and the log-ratio of pixels a few
  apart, which cancels texture);
- :mod:`~despeck.speckle.system` -- the system response: tapers (Kaiser included),
  transfer function, PSF, theoretical intensity correlation;
- :mod:`~despeck.speckle.correlated` -- correlated speckle (look weights for any
  looks >= 1, :class:`SpeckleField` window by window) and its measured correlation;
- :mod:`~despeck.speckle.sublooks` -- :func:`split_sublooks`.

The package re-exports every public name, so ``from despeck.speckle import check_looks``
and ``speckle.gamma_speckle`` keep working.

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

from .checks import check_looks, check_looks_range
from .moments import (
    amplitude_cv,
    amplitude_looks_from_cv,
    amplitude_mean,
    intensity_mean,
    intensity_variance,
    log_bias_correction,
    log_intensity_iqr,
    log_intensity_mean,
    log_intensity_variance,
    looks_from_log_iqr,
    solve_looks,
)
from .simulation import (
    gamma_speckle,
    gamma_speckle_torch,
    multilook,
    simulate_amplitude,
    simulate_intensity,
    simulate_slc,
)
from .estimation import (
    enl_amplitude,
    enl_intensity,
    estimate_looks,
    estimate_looks_log_iqr,
    estimate_looks_log_ratio,
    homogeneous_blocks,
    log_ratio_iqr,
    looks_from_log_ratio_iqr,
    short_lag_correlation,
)
from .system import (
    KAISER_BETA,
    TAPERS,
    intensity_correlation_theory,
    psf_intensity_kernel,
    spectral_taper,
    system_psf,
    system_transfer,
)
from .correlated import (
    SpeckleField,
    look_weights,
    measure_speckle_correlation,
    simulate_correlated_intensity,
    simulate_correlated_slc,
)
from .sublooks import split_sublooks

__all__ = [
    "check_looks", "check_looks_range", "intensity_mean", "intensity_variance", "amplitude_mean",
    "amplitude_cv", "amplitude_looks_from_cv", "log_intensity_mean", "log_intensity_variance",
    "log_bias_correction", "gamma_speckle", "gamma_speckle_torch", "simulate_intensity", "simulate_amplitude",
    "simulate_slc", "multilook", "enl_intensity", "enl_amplitude", "TAPERS", "spectral_taper",
    "system_transfer", "system_psf", "psf_intensity_kernel", "simulate_correlated_slc",
    "simulate_correlated_intensity", "look_weights", "intensity_correlation_theory", "KAISER_BETA",
    "measure_speckle_correlation", "log_intensity_iqr", "looks_from_log_iqr", "estimate_looks_log_iqr",
    "SpeckleField", "split_sublooks", "homogeneous_blocks", "estimate_looks", "log_ratio_iqr",
    "looks_from_log_ratio_iqr", "estimate_looks_log_ratio", "short_lag_correlation", "solve_looks"
]
