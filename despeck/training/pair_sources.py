"""Pairs of real, independent looks of one scene: reading them and making a training source.

Two kinds of pairs are read here (:mod:`despeck.training.pairs` trains on them):

* **Dates** (``data.pairs``): two co-registered acquisitions on the same grid
  (:func:`read_date_pair`; another grid is refused). Where the ground changed between
  them the other date is not another look of the input, so those pixels are left out
  of the loss: a two-sided test on the ratio of the dates' local means
  (:func:`despeck.change.change_mask`).
* **Sub-looks** (``data.slc``): a single-look complex scene split once at load time
  into ``K`` sub-looks along azimuth or range (:func:`read_slc_sublooks`,
  :func:`despeck.speckle.split_sublooks`).

:func:`make_pair_source` turns the views of one scene into a :class:`PairSource`: their
looks (configured, or estimated with ``speckle.looks: auto``), the speckle correlation,
the change mask, and the patch positions of the training rows and the validation strip.

References
----------
Touzi, R., Lopes, A., Bousquet, P. (1988). A statistical and geometrical edge detector
for SAR images. IEEE TGRS 26(6), 764-773 (the ratio of local means; from memory).
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech
House (ratio change detection between multilook images; sub-look processing; from memory).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..change import change_mask
from ..errors import ConfigError, DespeckError, InputError, RasterError
from ..speckle import estimate_looks, split_sublooks
from ..validity import valid_mask
from .config import TrainConfig
from .sampling import PositionTable, allowed_positions

__all__ = ["MIN_KEPT_FRACTION", "read_date_pair", "read_slc_sublooks", "PairSource", "make_pair_source"]

#: A training or validation patch must have at least this fraction of its pixels in the
#: loss (valid on every view and unchanged), so steps are not wasted on changed areas.
MIN_KEPT_FRACTION = 0.5


def _read(path, units, band):
    """Intensity, validity and grid of one date (one-line errors)."""
    from ..raster import open_scene

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with open_scene(path, units=units) as reader:
                intensity, valid = reader.read(band=band)
                grid = (reader.width, reader.height, reader.crs, reader.transform)
    except DespeckError:
        raise
    except (OSError, ValueError) as exc:
        raise RasterError(f"{path}: cannot read ({exc})") from None
    valid = valid_mask(intensity, np.asarray(valid, dtype=bool), what=str(path))
    return np.where(valid, intensity, 0).astype(np.float32), valid, grid


def read_date_pair(first, second, *, units=None, band=1):
    """Read two co-registered dates as intensities on one grid.

    Returns
    -------
    views : ndarray of float32, shape (2, h, w)
        The two dates' intensities (0 where invalid).
    valid : ndarray of bool, shape (h, w)
        Valid on both dates.

    Raises
    ------
    RasterError
        Unreadable files, or the second date on another grid (size, pixel geometry or CRS).
    """
    a, va, (wa, ha, crs_a, tf_a) = _read(first, units, band)
    b, vb, (wb, hb, crs_b, tf_b) = _read(second, units, band)
    what = None
    if (wa, ha) != (wb, hb):
        what = f"{wb}x{hb} pixels against {wa}x{ha}"
    elif not tf_a.almost_equals(tf_b):
        what = f"transform {tuple(round(v, 6) for v in tf_b[:6])} against {tuple(round(v, 6) for v in tf_a[:6])}"
    elif crs_a != crs_b:
        what = f"CRS {crs_b} against {crs_a}"
    if what:
        raise RasterError(f"data.pairs: {second} is not on the grid of {first} ({what}); co-register the two dates first")
    return np.stack([a, b]), va & vb


def read_slc_sublooks(path, count, *, axis="azimuth", oversampling=1.0, taper=None, centre=0.0, units=None, band=1):
    """Read a single-look complex file and split it into ``count`` sub-look intensities.

    Returns
    -------
    views : ndarray of float32, shape (count, h, w)
        Sub-look intensities ``|z_k|^2`` (0 where invalid), each scaled by
        :func:`despeck.speckle.split_sublooks` to the full scene's mean.
    valid : ndarray of bool, shape (h, w)

    Raises
    ------
    ConfigError
        The file holds real (not complex) samples, or is too short along ``axis``.
    RasterError
        Unreadable file.
    """
    from ..raster import open_scene

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with open_scene(path, units=units) as reader:
                if reader.units != "complex":
                    raise ConfigError(
                        f"config key data.slc: {path} holds real data ({reader.units}), not complex samples; "
                        "sub-looks need a single-look complex file (complex data type or I/Q bands)"
                    )
                z, valid = reader.read_complex(band=band)  # the samples, phase kept
    except DespeckError:
        raise
    except (OSError, ValueError) as exc:
        raise RasterError(f"{path}: cannot read ({exc})") from None
    try:
        looks = split_sublooks(z, count, axis=axis, oversampling=oversampling, taper=taper, centre=centre)
    except InputError as exc:
        raise ConfigError(f"config key data.sublooks: {path}: {exc}") from None
    views = (looks.real ** 2 + looks.imag ** 2).astype(np.float32)
    valid = valid & np.all(views > 0, axis=0)
    return np.where(valid, views, np.float32(0)), valid


@dataclass
class PairSource:
    """Co-registered views of one scene with independent speckle, in memory.

    ``views[k]`` is a linear intensity; ``looks[k]`` its looks as used by the loss
    (configured or estimated) and ``looks_estimated[k]`` the estimate (None if the
    scene had too few homogeneous blocks). ``keep`` marks the pixels that enter the
    loss: valid on every view and not flagged as changed.
    """

    name: str
    kind: str
    files: list
    views: np.ndarray
    valid: np.ndarray
    keep: np.ndarray
    looks: np.ndarray
    looks_estimated: list
    log_means: np.ndarray
    val_start: int
    train: PositionTable
    val: PositionTable
    changed_fraction: float = 0.0
    #: lag-1 speckle correlation (rows, cols) measured on the first view, for conditioned networks
    correlation: tuple = (0.0, 0.0)

    def describe(self) -> dict:
        d = {
            "files": [str(f) for f in self.files],
            "looks": [round(float(v), 4) for v in self.looks],
            "looks_estimated": [None if v is None else round(float(v), 4) for v in self.looks_estimated],
            "speckle_correlation_lag1": [round(float(v), 4) for v in self.correlation],
        }
        if self.kind == "pair":
            d["changed_fraction"] = round(self.changed_fraction, 5)
        else:
            d["sublooks"] = int(self.views.shape[0])
        return d


def _estimate(views, valid):
    out = []
    for v in views:
        try:
            out.append(float(estimate_looks(v, valid)))
        except InputError:
            out.append(None)
    return out


def make_pair_source(name, kind, files, views, valid, config: TrainConfig) -> PairSource:
    """The :class:`PairSource` of the ``views`` of one scene (``kind``: ``"pair"`` or ``"sublooks"``).

    Looks are ``speckle.looks`` (a warning if the data's estimates differ by more than a
    factor 1.5) or, with ``auto``, the estimates; the change mask is computed for date
    pairs only. One-line errors for a scene too small for a patch and a validation strip,
    without a valid pixel, or whose looks ``auto`` cannot estimate.
    """
    d = config.data
    p = d.patch_size
    h, w = valid.shape
    if h < p or w < p:
        raise ConfigError(f"config key data.patch_size: {p} is larger than {name} ({w}x{h} pixels)")
    if not valid.any():
        raise RasterError(f"{name}: no pixel is valid on every view; nothing to train on")
    if h < 2 * p:
        raise ConfigError(
            f"config key data.val_fraction: {name} has {h} rows; pair training needs at least {2 * p} "
            f"(twice data.patch_size) to hold a validation strip below the training rows"
        )
    estimated = _estimate(views, valid)
    configured = config.speckle.looks
    if configured == "auto":
        missing = [f for f, e in zip(files if kind == "pair" else [f"sub-look {k + 1}" for k in range(len(views))],
                                     estimated) if e is None or not math.isfinite(e)]
        if missing:
            raise ConfigError(f"config key speckle.looks: auto cannot estimate the looks of {name} ({missing[0]}: "
                              "too few homogeneous 16x16 blocks); set speckle.looks to a number")
        looks = np.array(estimated, dtype=np.float64)
    else:
        looks = np.full(len(views), configured)  # checked by the config
        for e in estimated:
            if e is not None and math.isfinite(e) and not 1 / 1.5 <= e / configured <= 1.5:
                warnings.warn(f"{name}: speckle.looks is {configured:g} but the looks estimated on the data "
                              f"are {e:.2f}; set speckle.looks: auto to use the estimates", UserWarning, stacklevel=3)
                break
    try:
        # The speckle correlation of the views: conditioned networks are told it (sub-looks
        # are coarser, more correlated, than the full-resolution scene they will be applied
        # to) and the change test counts independent samples with it.
        from ..looks import measure_scene_correlation

        measured = measure_scene_correlation(views[0], valid)
    except InputError:
        measured = None
    correlation = measured.lag1 if measured is not None else (0.0, 0.0)
    changed = np.zeros_like(valid)
    if kind == "pair":
        changed = change_mask(views[0], views[1], valid, looks_first=looks[0], looks_second=looks[1],
                              window=d.change_window, false_alarm=d.change_false_alarm,
                              correlation=None if measured is None else (measured.rows, measured.cols))
    keep = valid & ~changed
    log_means = np.array([float(np.mean(np.log(v[valid].astype(np.float64)))) for v in views])
    val_rows = min(max(p, math.ceil(d.val_fraction * h)), h - p)
    val_start = h - val_rows

    def table(lo, hi):
        return PositionTable(allowed_positions(valid, p, d.min_valid_fraction, lo, hi)
                             & allowed_positions(keep, p, MIN_KEPT_FRACTION, lo, hi))

    changed_fraction = float(changed.sum() / max(valid.sum(), 1))
    return PairSource(name, kind, list(files), views, valid, keep, looks, estimated, log_means, val_start,
                      table(0, val_start), table(val_start, h), changed_fraction, correlation)
