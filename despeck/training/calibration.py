"""Radiometric calibration of an exported model: the log bias that keeps mean backscatter.

A network trained with the squared log error estimates ``E[ln R | input]``: on a
homogeneous area its output is unbiased for the *geometric* mean, and its arithmetic
mean is higher by about ``exp(s^2 / 2)``, ``s^2`` being the variance of the log output
over the area (log-normal approximation; see :mod:`despeck.models.wrapper`). ``s^2``
depends on how much speckle is left, hence on the looks and the speckle correlation of
the scene. Such a model therefore carries a *table* of log biases over a grid of looks
and lag-1 correlations, measured here on simulated constant areas:
``log_bias = -ln(mean output / mean input)`` over the patches' cores, which
:meth:`despeck.models.Despeckler.bias_for` interpolates at apply time at the condition
apply measured (:mod:`despeck.looks`). Speckle has unit mean, so the input's mean is
unbiased for the reflectivity (Oliver & Quegan 1998, ch. 4); dividing by it rather than
by the known reflectivity takes most of the patches' sampling noise out of the table
(the output follows the input's sample: a control variate).

**Which models.** Every ``mse_log`` model that is looks-aware, and every ``mse_log``
model trained self-supervised (``data.pairs``, ``data.slc``), looks-aware or not
(:func:`calibrate_for_export`). A self-supervised model meets other conditions than it
was trained on: a model trained on sub-looks (coarser along the split axis) is applied
to the full-resolution image, and any model may meet white speckle. A single log bias,
measured on the validation strips of the training views, holds for the training
condition only: a small network that is not told the condition, trained for seconds on
the sub-looks of a simulated SLC scene (oversampling 1.3, Hamming taper), left +0.14 dB
on the full-resolution image and +0.73 dB on white speckle; trained on a pair of dates,
+0.43 dB on white speckle (``tests/test_self_supervised_radiometry.py``'s site).

**Grid cells** simulate speckle of the cell's correlation on both axes and tell the
model that correlation: an untapered band whose oversampling gives it
(:func:`despeck.speckle.intensity_correlation_theory`, solved with
:func:`scipy.optimize.brentq`), or a Hamming taper beyond what an untapered band
reaches below oversampling 2.5.

**The user's own condition** (self-supervised models;
:mod:`despeck.training.site_conditions`). The output of these networks follows the
speckle they *see*, hardly what they are told: on the fine-tuning benchmark's site,
speckle of lag-1 correlation 0.576 needs the same bias within 0.006 dB whether the
model is told 0.576 or 0.62, while speckle that truly has 0.62 needs 0.14 dB more (a
model fine-tuned for 5 minutes on a pair). Apply tells the correlation that
:mod:`despeck.looks` measures on the scene's most homogeneous blocks; texture left in
them reads as extra correlation (0.58-0.60 there) and the reading scatters between
scenes (0.576-0.645 over 256 x 768-pixel scenes). A table indexed by that reading and
measured on speckle *of* that correlation therefore misses by the table's slope times
the reading's error (2 dB per unit of correlation for that model: +0.05 dB on average
over 12 scenes of 256 x 768 and 768 x 768 pixels, +0.18 dB on the worst). So around the condition of the user's images
the table holds the bias of *their* speckle:

* the speckle's own correlation is measured where the reflectivity cancels -- on the
  log-ratio of the two dates of each pair, or on the complex samples of each SLC scene
  (the full-resolution image, not its sub-looks);
* what apply will tell is measured on each image (each date; the full-resolution
  intensity ``|z|^2`` of each SLC scene) as apply measures it, and how far that reading
  spreads over the images' 256 x 256-pixel pieces (at least 0.03, at most 0.1);
* over that band of told correlations (overlapping sites merged), the table's cells
  simulate speckle of the measured speckle correlation and tell the model the band's
  values; grid values inside the band are left out. Outside the band the grid cells
  stand: a scene whose reading is far from the user's images (white speckle, another
  sensor) is calibrated as what it reads.

What one number per condition cannot hold: a network whose output depends on an area's
level relative to the scene's mean log (networks trained for minutes from scratch: up to
+1 dB on areas 3 nepers above it after 30 s of training) keeps the mean of constant
areas but not of every homogeneous area of a varied scene; the fine-tuning benchmark
reports the pooled result on its site's homogeneous boxes.

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

import numpy as np
import torch
from scipy import optimize

from ..cpu import PRECISIONS, precision_of
from ..errors import InputError
from ..models.wrapper import UNKNOWN_CORRELATION
from ..speckle import gamma_speckle, intensity_correlation_theory, log_intensity_mean, simulate_correlated_intensity

__all__ = ["system_for_correlation", "calibrate_log_bias_table", "calibrate_log_bias_tables", "DEFAULT_CORR_GRID",
           "correlation_grid", "calibrate_for_export", "bf16_table_for", "PATCHES"]

DEFAULT_CORR_GRID = (0.0, 0.25, 0.5, 0.7)
#: Constant patches simulated per cell of the table (192 x 192 pixels each). Two
#: measurements of the bundled starter's table with other seeds differed by 0.012 dB rms
#: (0.032 at most) with 6 patches and by 0.008 dB rms (0.026) with 12, as a sampling
#: error falling with the square root of the count does (common practice for Monte Carlo
#: estimates); 12 cost the starter's export about 30 s for both tables on two cores.
PATCHES = 12
# A grid value closer than this to a site band is left out (the band's ends stand for it).
_SAME_CORRELATION = 0.01
# Half-width of a site band: the spread of the apply-time measurement on the user's
# 256-pixel pieces, kept within these bounds.
_MIN_HALF_BAND, _MAX_HALF_BAND = 0.03, 0.10
# Highest lag-1 correlation the simulated systems reach (Hamming taper, oversampling 2.5: 0.86).
_MAX_CORRELATION = 0.85


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


def _bands(sites):
    """Site bands ``[(lo, hi, centre, told, speckle)]`` of told mean correlation (see the module notes).

    A site covers its told mean +- its spread on 256-pixel pieces (at least 0.03, at most
    0.1); overlapping sites make one band, told and speckle correlations averaged.
    """
    bands = []
    for s in sorted(sites, key=lambda s: s.told_mean):
        half = float(np.clip(s.told_spread, _MIN_HALF_BAND, _MAX_HALF_BAND))
        lo, hi = max(s.told_mean - half, 0.0), min(s.told_mean + half, _MAX_CORRELATION)
        if bands and lo <= bands[-1]["hi"]:
            band = bands[-1]
            band["hi"] = max(band["hi"], hi)
            band["members"].append(s)
        else:
            bands.append({"lo": lo, "hi": hi, "members": [s]})
    out = []
    for band in bands:
        m = band["members"]
        told = tuple(float(np.clip(np.mean([s.told[k] for s in m]), 0.0, _MAX_CORRELATION)) for k in (0, 1))
        speckle = tuple(float(np.clip(np.mean([s.speckle[k] for s in m]), 0.0, _MAX_CORRELATION)) for k in (0, 1))
        out.append((band["lo"], band["hi"], float(np.mean(told)), told, speckle))
    return out


def _cells(base, sites):
    """Table columns ``[(axis value, told (rows, cols), simulated speckle (rows, cols))]``, increasing."""
    bands = _bands(sites)
    cells = [(float(c), (float(c), float(c)), (float(c), float(c))) for c in base
             if all(not lo - _SAME_CORRELATION < float(c) < hi + _SAME_CORRELATION for lo, hi, *_ in bands)]
    for lo, hi, centre, told, speckle in bands:
        for t in sorted({lo, centre, hi}):
            shifted = tuple(float(np.clip(v + t - centre, 0.0, _MAX_CORRELATION)) for v in told)
            cells.append((t, shifted, speckle))
    cells.sort(key=lambda c: c[0])
    merged = [c for i, c in enumerate(cells) if i == 0 or c[0] - cells[i - 1][0] >= 1e-6]
    return merged


def correlation_grid(sites=(), base=DEFAULT_CORR_GRID) -> list:
    """The table's correlation axis: ``base`` outside the sites' bands, and each band's ends and centre."""
    return [c[0] for c in _cells(base, sites)]


def _system(rows: float, cols: float):
    """``(oversampling, taper)`` whose speckle has lag-1 correlations ``rows`` and ``cols`` (one taper for both)."""
    (osr, tr), (osc, tc) = system_for_correlation(rows), system_for_correlation(cols)
    if tr != tc:  # one axis needs a taper the other does not: the mean of the two on both
        return system_for_correlation(0.5 * (rows + cols))
    return (osr, osc), tr


def _noisy_patches(L, speckle, *, side, patches, rng):
    """Constant unit-reflectivity patches of L-look speckle with lag-1 correlation ``speckle`` (rows, cols)."""
    clean = np.ones((side, side), dtype=np.float32)
    rows, cols = speckle
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


def calibrate_log_bias_table(despeckler, *, looks_range, corr_grid=DEFAULT_CORR_GRID, side=192, patches=PATCHES,
                             seed=0, sites=(), bf16=False) -> dict:
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
    sites : sequence of despeck.training.site_conditions.SiteCondition
        The user's images (:func:`~despeck.training.site_conditions.measure_site_conditions`):
        their bands replace the grid values they cover (:func:`correlation_grid`); each
        band's cells simulate the site's speckle and tell the model what apply will tell.
    bf16 : bool
        Run the network under CPU bfloat16 autocast: the table for bfloat16 inference
        (``log_bias_table_bf16``). The patches depend on ``seed`` only, so two tables of
        one seed differ by the arithmetic alone (:func:`calibrate_log_bias_tables`
        measures both in one pass).

    Returns
    -------
    dict
        ``{"looks": [...], "corr": [...], "values": [[...]]}`` (nepers).
    """
    precision = precision_of(bf16)
    return calibrate_log_bias_tables(despeckler, looks_range=looks_range, corr_grid=corr_grid, side=side,
                                     patches=patches, seed=seed, sites=sites, precisions=(precision,))[precision]


def calibrate_log_bias_tables(despeckler, *, looks_range, corr_grid=DEFAULT_CORR_GRID, side=192, patches=PATCHES,
                              seed=0, sites=(), precisions=PRECISIONS) -> dict:
    """The tables of :func:`calibrate_log_bias_table` in several precisions, on the same patches.

    Each grid cell's patches are simulated once and run through the network in every
    precision of ``precisions`` (``"32"``: float32, ``"bf16"``: CPU bfloat16 autocast),
    so the tables differ by the arithmetic alone and the simulation, most of the time
    for a small network, is paid once. Returns ``{precision: table}``.
    """
    unknown = set(precisions) - set(PRECISIONS)
    if unknown or not precisions:
        raise InputError(f"precisions must be some of {PRECISIONS}, got {list(precisions)!r}")
    lo, hi = float(looks_range[0]), float(looks_range[1])
    looks_grid = _looks_grid(lo, hi)
    cells = _cells(corr_grid, sites)
    if getattr(despeckler, "correlation_unknown", False) and cells[0][0] >= 0:
        blind = (UNKNOWN_CORRELATION, UNKNOWN_CORRELATION)
        cells = [(UNKNOWN_CORRELATION, blind, blind)] + cells
    rng = np.random.default_rng([int(seed), 77])
    margin = max(despeckler.receptive_field // 2, 8)
    saved = despeckler.log_bias, despeckler.log_bias_table, despeckler.log_bias_table_bf16
    despeckler.log_bias, despeckler.log_bias_table, despeckler.log_bias_table_bf16 = 0.0, None, None
    was_training = despeckler.training
    despeckler.eval()
    values = {p: [] for p in precisions}
    core = (slice(None), slice(margin, side - margin), slice(margin, side - margin))
    try:
        with torch.inference_mode():
            for L in looks_grid:
                rows = {p: [] for p in precisions}
                for _, told, speckle in cells:
                    noisy = _noisy_patches(L, speckle, side=side, patches=patches, rng=rng)
                    x = torch.from_numpy(np.ascontiguousarray(noisy, dtype=np.float32))[:, None]
                    mean_in = float(noisy[core].astype(np.float64).mean())
                    for p in precisions:
                        with torch.autocast("cpu", dtype=torch.bfloat16, enabled=p == "bf16"):
                            out = despeckler(x, log_offset=float(log_intensity_mean(L)), looks=L, correlation=told)
                        mean_out = float(out[:, 0].double().numpy()[core].mean())
                        rows[p].append(float(-math.log(mean_out / mean_in)))
                for p in precisions:
                    values[p].append(rows[p])
    finally:
        despeckler.log_bias, despeckler.log_bias_table, despeckler.log_bias_table_bf16 = saved
        despeckler.train(was_training)
    corr = [c[0] for c in cells]
    return {p: {"looks": list(looks_grid), "corr": corr, "values": values[p]} for p in precisions}


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
    from .site_conditions import measure_site_conditions

    sites = measure_site_conditions(data, config) if self_supervised else []
    model.log_bias = 0.0
    model.correlation_unknown = bool(model.conditioned and config.speckle.condition_dropout > 0)
    tables = calibrate_log_bias_tables(model, looks_range=model.looks_range, sites=sites, seed=config.trainer.seed)
    model.log_bias_table, model.log_bias_table_bf16 = tables["32"], tables["bf16"]
    return {"method": "log bias per looks and lag-1 correlation on simulated constant areas "
                      "(despeck.training.calibration), in float32 and in bfloat16",
            "site_conditions": [s.describe() for s in sites],
            "site_bands": [[round(lo, 4), round(hi, 4)] for lo, hi, *_ in _bands(sites)]}


def bf16_table_for(despeckler, *, seed=0, side=192, patches=PATCHES) -> dict:
    """A bfloat16 bias table for a model calibrated in float32 only (files made before bfloat16 tables).

    Measures the table in float32 and in bfloat16 on the same simulated patches (one
    ``seed``), over the grid of the model's own ``log_bias_table``, and returns that
    table plus the difference: the model's float32 calibration is kept as it is and
    the bfloat16 one differs from it by the arithmetic alone. Cells the original
    export measured on a site's own speckle (self-supervised models) are measured
    here on speckle of the correlation they are told; the arithmetic's shift hardly
    depends on the correlation (within 0.003 dB over 0-0.7 for the bundled starter).

    Raises
    ------
    InputError
        The model has no ``log_bias_table``, or its looks grid is not the one this
        module builds for its looks range.
    """
    table = despeckler.log_bias_table
    if table is None:
        raise InputError("the model has no log_bias_table to add a bfloat16 table to")
    if not np.allclose(_looks_grid(*despeckler.looks_range), table["looks"], rtol=1e-9):
        raise InputError("the model's log_bias_table has another looks grid than its looks range gives")
    known = [c for c in table["corr"] if c >= 0]
    tables = calibrate_log_bias_tables(despeckler, looks_range=despeckler.looks_range, corr_grid=known, side=side,
                                       patches=patches, seed=seed)
    f32, b16 = tables["32"], tables["bf16"]
    if list(f32["corr"]) != list(table["corr"]):
        raise InputError(f"the model's log_bias_table has correlations {table['corr']}; measured {f32['corr']}")
    values = [[v + (b - a) for v, a, b in zip(rv, ra, rb)]
              for rv, ra, rb in zip(table["values"], f32["values"], b16["values"])]
    return {"looks": list(table["looks"]), "corr": list(table["corr"]), "values": values}
