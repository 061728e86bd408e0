"""Radiometric calibration of an exported model: the log bias that keeps mean backscatter.

A network trained with the squared log error estimates ``E[ln R | input]``: on a
homogeneous area its output is unbiased for the *geometric* mean, and its arithmetic
mean is higher by about ``exp(s^2 / 2)``, ``s^2`` being the variance of the log output
over the area (log-normal approximation; see :mod:`despeck.models.wrapper`). ``s^2``
depends on how much speckle is left, hence on the looks and the speckle correlation of
the scene. A looks-aware model therefore carries a *table* of log biases over a grid of
looks and lag-1 correlations, measured here on simulated constant areas:
``log_bias(L, rho) = -ln(mean output / R)`` with the network told the true condition,
which :meth:`despeck.models.Despeckler.bias_for` interpolates at apply time.

Correlated speckle for a target lag-1 correlation ``rho`` uses an untapered band
whose oversampling gives that correlation (:func:`despeck.speckle.intensity_correlation_theory`,
solved with :func:`scipy.optimize.brentq`), or a Hamming taper beyond what an
untapered band reaches below oversampling 2.
"""

from __future__ import annotations

import math

import numpy as np
import torch
from scipy import optimize

from ..models.wrapper import UNKNOWN_CORRELATION
from ..speckle import gamma_speckle, intensity_correlation_theory, log_intensity_mean, simulate_correlated_intensity

__all__ = ["system_for_correlation", "calibrate_log_bias_table", "DEFAULT_CORR_GRID"]

DEFAULT_CORR_GRID = (0.0, 0.25, 0.5, 0.7)


def system_for_correlation(rho: float):
    """``(oversampling, taper)`` of a system whose speckle has lag-1 intensity correlation ``rho``."""
    rho = float(rho)
    if rho <= 0:
        return 1.0, "none"
    for taper in ("none", "hamming"):
        f = lambda o: float(intensity_correlation_theory(oversampling=o, taper=taper, lags=(1,))[0]) - rho  # noqa: E731
        if f(1.0) <= 0 <= f(2.5):
            return float(optimize.brentq(f, 1.0, 2.5, xtol=1e-4)), taper
    raise ValueError(f"no simulated system reaches a lag-1 correlation of {rho}")


def _looks_grid(lo: float, hi: float):
    if hi <= lo * 1.01:
        return [float(lo)]
    n = max(2, int(math.ceil(math.log(hi / lo) / math.log(1.5))) + 1)
    return [float(v) for v in np.exp(np.linspace(math.log(lo), math.log(hi), n))]


def calibrate_log_bias_table(despeckler, *, looks_range, corr_grid=DEFAULT_CORR_GRID, side=192, patches=6,
                             seed=0) -> dict:
    """Measure the log bias over a grid of looks and correlations (see the module notes).

    Parameters
    ----------
    despeckler : despeck.models.Despeckler
        A conditioned model; its own ``log_bias``/table are ignored during the measurement.
    looks_range : (float, float)
        Looks the model was trained for; the grid is geometric with ratio <= 1.5.
    corr_grid : sequence of float
        Lag-1 correlations (both axes) to calibrate.
    side, patches : int
        Size and number of constant patches per grid cell.
    seed : int

    Returns
    -------
    dict
        ``{"looks": [...], "corr": [...], "values": [[...]]}`` (nepers).
    """
    lo, hi = float(looks_range[0]), float(looks_range[1])
    looks_grid = _looks_grid(lo, hi)
    corr_grid = [float(c) for c in corr_grid]
    if getattr(despeckler, "correlation_unknown", False) and corr_grid[0] >= 0:
        # The blind mode (correlation not told) is calibrated on a mix of white and
        # correlated (lag-1 0.5) speckle, half the patches each.
        corr_grid = [UNKNOWN_CORRELATION] + corr_grid
    rng = np.random.default_rng([int(seed), 77])
    margin = max(despeckler.receptive_field // 2, 8)
    saved_bias, saved_table = despeckler.log_bias, despeckler.log_bias_table
    despeckler.log_bias, despeckler.log_bias_table = 0.0, None
    was_training = despeckler.training
    despeckler.eval()
    values = []
    try:
        with torch.inference_mode():
            for L in looks_grid:
                row = []
                for rho in corr_grid:
                    clean = np.ones((side, side), dtype=np.float32)
                    if rho < 0:
                        os_, taper = system_for_correlation(0.5)
                        half = patches // 2
                        noisy = np.concatenate([
                            gamma_speckle((patches - half, side, side), L, rng=rng),
                            np.stack([simulate_correlated_intensity(clean, L, rng=rng, oversampling=os_, taper=taper)
                                      for _ in range(half)]) if half else np.zeros((0, side, side), np.float32)])
                    elif rho > 0:
                        os_, taper = system_for_correlation(rho)
                        noisy = np.stack([simulate_correlated_intensity(clean, L, rng=rng, oversampling=os_, taper=taper)
                                          for _ in range(patches)])
                    else:
                        noisy = gamma_speckle((patches, side, side), L, rng=rng)
                    x = torch.from_numpy(np.ascontiguousarray(noisy, dtype=np.float32))[:, None]
                    out = despeckler(x, log_offset=float(log_intensity_mean(L)), looks=L, correlation=(rho, rho))
                    core = out[:, 0, margin:side - margin, margin:side - margin].double()
                    row.append(float(-math.log(float(core.mean()))))
                values.append(row)
    finally:
        despeckler.log_bias, despeckler.log_bias_table = saved_bias, saved_table
        despeckler.train(was_training)
    return {"looks": looks_grid, "corr": corr_grid, "values": values}
