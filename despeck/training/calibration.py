"""Radiometric calibration of an exported model: the log bias that keeps mean backscatter.

A network trained with the squared log error estimates ``E[ln R | input]``: on a
homogeneous area its output is unbiased for the *geometric* mean, and its arithmetic
mean is higher by about ``exp(s^2 / 2)``, ``s^2`` being the variance of the log output
over the area (log-normal approximation; see :mod:`despeck.models.wrapper`). ``s^2``
depends on how much speckle is left, hence on the looks and the speckle correlation of
the scene. Such a model therefore carries a *table* of log biases over a grid of looks
and lag-1 correlations, measured here on simulated constant areas:
``log_bias(L, rho) = -ln(mean output / mean input)`` over the patches' cores, with the
network told the condition, which :meth:`despeck.models.Despeckler.bias_for`
interpolates at apply time. The speckle has unit mean, so the input's mean is unbiased
for the reflectivity (Oliver & Quegan 1998, ch. 4); dividing by it rather than by the
known reflectivity removes most of the sampling noise of the patches from the table
(the output follows the input's sample), a control variate.

Which models get a table (:func:`calibrate_for_export`): every ``mse_log`` model that
is looks-aware, and every ``mse_log`` model trained self-supervised (``data.pairs``,
``data.slc``), looks-aware or not. A self-supervised model meets scenes of a condition
it was not trained on: a model trained on sub-looks (coarser along the split axis, more
correlated) is applied to the full-resolution image, and any model may be applied to a
white-speckle scene. The single log bias measured on the validation strips of its own
training views holds for that training condition only: a small network that is not told
the condition, trained for seconds on the sub-looks of a simulated SLC scene (oversampling
1.3, Hamming taper), left +0.14 dB on the full-resolution image and +0.73 dB on white
speckle; on a pair of dates, +0.43 dB on white speckle. The table holds the bias at every
condition of the grid, and at the conditions the model will meet on the user's data:
each date of ``data.pairs`` and the full-resolution intensity ``|z|^2`` of each
``data.slc`` scene, their looks and correlation measured as apply measures them
(:func:`despeck.looks.describe_array`; :func:`measure_site_conditions`). Apply then looks the bias up at the scene's measured
condition, for networks that take the condition as input and for those that do not.

Correlated speckle for a target lag-1 correlation ``rho`` uses an untapered band
whose oversampling gives that correlation (:func:`despeck.speckle.intensity_correlation_theory`,
solved with :func:`scipy.optimize.brentq`), or a Hamming taper beyond what an
untapered band reaches below oversampling 2.5.

References
----------
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech
House, ch. 4 (speckle of unit mean; the mean of an area's intensities is unbiased for its
reflectivity).
Lehtinen, J. et al. (2018). Noise2Noise: learning image restoration without clean
data. ICML 2018, arXiv:1803.04189 (training on independent noisy views).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import torch
from scipy import optimize

from ..errors import DespeckError, RasterError
from ..models.wrapper import UNKNOWN_CORRELATION
from ..speckle import gamma_speckle, intensity_correlation_theory, log_intensity_mean, simulate_correlated_intensity

__all__ = ["system_for_correlation", "calibrate_log_bias_table", "DEFAULT_CORR_GRID", "SiteCondition",
           "measure_site_conditions", "correlation_grid", "calibrate_for_export"]

DEFAULT_CORR_GRID = (0.0, 0.25, 0.5, 0.7)
# A site correlation closer than this to a grid value replaces nothing and adds no column.
_SAME_CORRELATION = 0.01


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


@dataclass(frozen=True)
class SiteCondition:
    """Looks and lag-1 speckle correlation of one of the user's images, as apply measures them."""

    name: str
    looks: float
    correlation: tuple  # lag-1 (rows, cols)
    detail: str = ""

    @property
    def mean_correlation(self) -> float:
        """The table's correlation axis: the mean of the two lag-1 values."""
        return float(np.mean(self.correlation))

    def describe(self) -> dict:
        return {"image": self.name, "looks": round(self.looks, 4),
                "speckle_correlation_lag1": [round(float(v), 4) for v in self.correlation], "measured": self.detail}


def measure_site_conditions(data, config) -> list:
    """The conditions a self-supervised model will meet: one :class:`SiteCondition` per image.

    Each date of every pair as it is, and the full-resolution intensity of every SLC scene
    (not its sub-looks: the model is applied to the full image), measured by
    :func:`despeck.looks.describe_array` -- the measurement apply makes. Images whose
    speckle cannot be measured (too few homogeneous blocks) are left out with a warning.
    """
    from ..looks import describe_array
    from ..raster import open_scene

    sites = []
    for src in getattr(data, "sources", []):
        if src.kind == "pair":
            images = [(str(f), view, src.valid) for f, view in zip(src.files, src.views)]
        else:
            path = src.files[0]
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    with open_scene(path, units=config.data.units) as reader:
                        full, valid = reader.read(band=config.data.band)
            except DespeckError:
                raise
            except (OSError, ValueError) as exc:
                raise RasterError(f"{path}: cannot read ({exc})") from None
            valid = np.asarray(valid, dtype=bool) & np.isfinite(full) & (full > 0)
            images = [(f"{path} (full resolution)", np.where(valid, full, 0).astype(np.float32), valid)]
        for name, image, valid in images:
            info, corr, notes = describe_array(image, valid)
            if info.source != "estimate" or corr.source != "measured":
                warnings.warn(f"{name}: its speckle could not be measured ({'; '.join(notes)}); the bias table "
                              "has no column for it", UserWarning, stacklevel=2)
                continue
            sites.append(SiteCondition(name, float(info.value), tuple(float(v) for v in corr.lag1),
                                       f"{info.detail}; {corr.detail}"))
    return sites


def _site_columns(sites):
    """``{rho: (rows, cols)}``: one column per distinct site correlation (closer than 0.01: the first kept)."""
    columns = {}
    for s in sites:
        rho = float(np.clip(s.mean_correlation, 0.0, 0.95))
        if all(abs(rho - c) >= _SAME_CORRELATION for c in columns):
            columns[rho] = tuple(float(np.clip(v, 0.0, 0.95)) for v in s.correlation)
    return columns


def correlation_grid(sites=(), base=DEFAULT_CORR_GRID) -> list:
    """The table's correlation axis: ``base`` with each site's mean lag-1 correlation (replacing base
    values closer than 0.01 to it)."""
    columns = _site_columns(sites)
    grid = [float(c) for c in base if all(abs(float(c) - r) >= _SAME_CORRELATION for r in columns)]
    return sorted(grid + list(columns))


def _system(rows: float, cols: float):
    """``(oversampling, taper)`` whose speckle has lag-1 correlations ``rows`` and ``cols`` (one taper for both)."""
    (osr, tr), (osc, tc) = system_for_correlation(rows), system_for_correlation(cols)
    if tr != tc:  # one axis needs a taper the other does not: the mean of the two on both
        return system_for_correlation(0.5 * (rows + cols))
    return (osr, osc), tr


def _noisy_patches(L, told, *, side, patches, rng):
    """Constant unit-reflectivity patches of L-look speckle with lag-1 correlation ``told`` (rows, cols)."""
    clean = np.ones((side, side), dtype=np.float32)
    rows, cols = told
    if rows < 0:
        # The blind mode (correlation not told) is calibrated on a mix of white and
        # correlated (lag-1 0.5) speckle, half the patches each.
        os_, taper = system_for_correlation(0.5)
        half = patches // 2
        return np.concatenate([
            gamma_speckle((patches - half, side, side), L, rng=rng),
            np.stack([simulate_correlated_intensity(clean, L, rng=rng, oversampling=os_, taper=taper)
                      for _ in range(half)]) if half else np.zeros((0, side, side), np.float32)])
    if max(rows, cols) <= 0:
        return gamma_speckle((patches, side, side), L, rng=rng)
    os_, taper = _system(rows, cols)
    return np.stack([simulate_correlated_intensity(clean, L, rng=rng, oversampling=os_, taper=taper)
                     for _ in range(patches)])


def calibrate_log_bias_table(despeckler, *, looks_range, corr_grid=DEFAULT_CORR_GRID, side=192, patches=6,
                             seed=0, sites=()) -> dict:
    """Measure the log bias over a grid of looks and correlations (see the module notes).

    Parameters
    ----------
    despeckler : despeck.models.Despeckler
        The model (looks-aware or not); its own ``log_bias``/table are ignored during
        the measurement.
    looks_range : (float, float)
        Looks the model was trained for; the grid is geometric with ratio <= 1.5.
    corr_grid : sequence of float
        Lag-1 correlations (both axes) to calibrate.
    side, patches : int
        Size and number of constant patches per grid cell.
    seed : int
    sites : sequence of SiteCondition
        Conditions measured on the user's images (:func:`measure_site_conditions`): each
        adds a column at its mean lag-1 correlation (:func:`correlation_grid`), simulated
        and told with its own rows and columns correlation.

    Returns
    -------
    dict
        ``{"looks": [...], "corr": [...], "values": [[...]]}`` (nepers).
    """
    lo, hi = float(looks_range[0]), float(looks_range[1])
    looks_grid = _looks_grid(lo, hi)
    columns = _site_columns(sites)
    grid = correlation_grid(sites, corr_grid)
    told = [columns.get(c, (c, c)) for c in grid]
    if getattr(despeckler, "correlation_unknown", False) and grid[0] >= 0:
        grid, told = [UNKNOWN_CORRELATION] + grid, [(UNKNOWN_CORRELATION, UNKNOWN_CORRELATION)] + told
    rng = np.random.default_rng([int(seed), 77])
    margin = max(despeckler.receptive_field // 2, 8)
    saved_bias, saved_table = despeckler.log_bias, despeckler.log_bias_table
    despeckler.log_bias, despeckler.log_bias_table = 0.0, None
    was_training = despeckler.training
    despeckler.eval()
    values = []
    core = (slice(None), slice(margin, side - margin), slice(margin, side - margin))
    try:
        with torch.inference_mode():
            for L in looks_grid:
                row = []
                for condition in told:
                    noisy = _noisy_patches(L, condition, side=side, patches=patches, rng=rng)
                    x = torch.from_numpy(np.ascontiguousarray(noisy, dtype=np.float32))[:, None]
                    out = despeckler(x, log_offset=float(log_intensity_mean(L)), looks=L, correlation=condition)
                    mean_out = float(out[:, 0].double().numpy()[core].mean())
                    mean_in = float(noisy[core].astype(np.float64).mean())
                    row.append(float(-math.log(mean_out / mean_in)))
                values.append(row)
    finally:
        despeckler.log_bias, despeckler.log_bias_table = saved_bias, saved_table
        despeckler.train(was_training)
    return {"looks": looks_grid, "corr": grid, "values": values}


def calibrate_for_export(model, *, loss_name: str, data, config):
    """Give ``model`` its bias table when it needs one (see the module notes); its description, or None.

    Models trained with a loss other than ``mse_log`` keep their validation bias, and so
    do supervised models that are not looks-aware (they meet the condition they were
    trained on).
    """
    if loss_name != "mse_log":
        return None
    self_supervised = bool(config.data.self_supervised)
    if not (model.conditioned or self_supervised):
        return None
    sites = measure_site_conditions(data, config) if self_supervised else []
    model.log_bias = 0.0
    model.correlation_unknown = bool(model.conditioned and config.speckle.condition_dropout > 0)
    model.log_bias_table = calibrate_log_bias_table(model, looks_range=model.looks_range, sites=sites,
                                                    seed=config.trainer.seed)
    return {"method": "log bias per looks and lag-1 correlation on simulated constant areas "
                      "(despeck.training.calibration)",
            "site_conditions": [s.describe() for s in sites]}
