"""The speckle of the user's own images, for the calibration of self-supervised models.

A model trained on pairs of dates or on SLC sub-looks is applied to the user's
full-resolution images. Two things about them matter for its radiometric calibration
(:mod:`despeck.training.calibration`):

* **what the model will be told** at apply time: the looks and lag-1 speckle
  correlation that :func:`despeck.looks.describe_array` measures on each image (each
  date; the full-resolution intensity ``|z|^2`` of each SLC scene, not its sub-looks),
  and how far that measurement scatters over 256 x 256-pixel pieces of the images;
* **what the speckle is**: its lag-1 intensity correlation measured where the
  reflectivity cancels. The measurement of :mod:`despeck.looks` works on the most
  homogeneous blocks of one intensity image, and texture left in them reads as extra
  correlation (0.59-0.60 on the fine-tuning benchmark's site, whose speckle has 0.576).
  Two measurements see the speckle alone:

  - *two dates*: the log-ratio ``ln I1 - ln I2 = ln n1 - ln n2`` of the unchanged pixels
    holds no reflectivity. Its lag-1 correlation is a fixed increasing function of the
    speckle's intensity correlation (for one look ``6 Li2(rho) / pi^2``, the covariance
    of the logs of two correlated exponential intensities, Li2 the dilogarithm; Xie,
    Pierce & Ulaby 2002, from memory), tabulated here by simulation at the data's looks
    and inverted;
  - *complex samples*: the intensity correlation of circular Gaussian speckle is the
    squared magnitude of the complex correlation coefficient (the Siegert relation;
    Goodman 1985), ``|sum z_i conj(z_i+1)|^2 / (sum |z_i|^2 sum |z_i+1|^2)``, in which a
    slowly varying reflectivity cancels and a point target brings the system's own
    response.

References
----------
Goodman, J. W. (1985). Statistical Optics. Wiley (the Siegert relation).
Xie, H., Pierce, L. E., Ulaby, F. T. (2002). Statistical properties of logarithmically
transformed speckle. IEEE TGRS 40(3), 721-727 (from memory).
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech
House (ratio images of two dates; from memory).
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import DespeckError, InputError, RasterError
from ..speckle import simulate_correlated_intensity

__all__ = ["SiteCondition", "measure_site_conditions", "log_ratio_lag1", "speckle_correlation_from_log_ratio",
           "slc_speckle_correlation", "TILE"]

#: Side of the pieces of the user's images on which the scatter of the apply-time
#: measurement is read (the side of despeck.looks' measurement windows).
TILE = 256
# At most this many pieces of one image are measured for the spread.
_MAX_TILES = 64
# Pixel pairs below which a lag-1 measurement is not attempted.
_MIN_PAIRS = 1000


@dataclass(frozen=True)
class SiteCondition:
    """One of the user's images: what a model will be told about it, and its speckle.

    ``looks`` and ``told`` (lag-1 correlation down rows, along columns) as
    :func:`despeck.looks.describe_array` measures them; ``told_spread`` the largest
    departure of that measurement's mean on 256 x 256 pieces of the image from the whole
    image's; ``speckle`` the lag-1 intensity correlation of the speckle itself, measured
    where the reflectivity cancels (``speckle_source``), or the ``told`` values when
    that was not possible.
    """

    name: str
    looks: float
    told: tuple
    told_spread: float
    speckle: tuple
    speckle_source: str
    detail: str = ""

    @property
    def told_mean(self) -> float:
        """The table's correlation axis: the mean of the two lag-1 values apply will tell."""
        return float(np.mean(self.told))

    def describe(self) -> dict:
        return {"image": self.name, "looks": round(self.looks, 4),
                "told_correlation_lag1": [round(float(v), 4) for v in self.told],
                "told_spread_on_256_pieces": round(self.told_spread, 4),
                "speckle_correlation_lag1": [round(float(v), 4) for v in self.speckle],
                "speckle_measured_on": self.speckle_source, "told_measured": self.detail}


# --------------------------------------------------------------------------- the speckle itself

def log_ratio_lag1(first, second, keep) -> tuple:
    """Lag-1 correlation (rows, cols) of ``ln first - ln second`` over pixel pairs both in ``keep``."""
    keep = np.asarray(keep, dtype=bool) & (first > 0) & (second > 0)
    d = np.zeros(keep.shape, dtype=np.float64)
    d[keep] = np.log(first[keep].astype(np.float64)) - np.log(second[keep].astype(np.float64))
    out = []
    for a, b, k in ((d[:-1], d[1:], keep[:-1] & keep[1:]), (d[:, :-1], d[:, 1:], keep[:, :-1] & keep[:, 1:])):
        if int(k.sum()) < _MIN_PAIRS:
            raise InputError(f"fewer than {_MIN_PAIRS} neighbouring pixel pairs to measure the log-ratio correlation")
        u, v = a[k], b[k]
        u, v = u - u.mean(), v - v.mean()
        out.append(float(np.sum(u * v) / np.sqrt(np.sum(u * u) * np.sum(v * v))))
    return tuple(out)


def _lag1_intensity_correlation(x) -> float:
    """Mean over rows and columns of the lag-1 correlation coefficient of an intensity field."""
    x = np.asarray(x, dtype=np.float64)
    return float(np.mean([np.corrcoef(x[:-1].ravel(), x[1:].ravel())[0, 1],
                          np.corrcoef(x[:, :-1].ravel(), x[:, 1:].ravel())[0, 1]]))


@functools.lru_cache(maxsize=16)
def _log_ratio_curve(looks: float):
    """``(rho, r)``: lag-1 intensity correlation of simulated speckle and of the log-ratio of two such fields.

    Both are measured on the same simulated fields (the truncated point-spread function
    of the simulation moves the intensity correlation slightly off its theory), sorted
    by ``r`` and made monotone.
    """
    from .calibration import system_for_correlation

    rng = np.random.default_rng([2024, int(round(looks * 1000))])
    ones = np.ones((192, 192), dtype=np.float32)
    rho, r = [0.0], [0.0]
    for target in np.linspace(0.1, 0.85, 9):
        os_, taper = system_for_correlation(target)
        a, b = (simulate_correlated_intensity(ones, looks, rng=rng, oversampling=os_, taper=taper) for _ in range(2))
        rho.append(0.5 * (_lag1_intensity_correlation(a) + _lag1_intensity_correlation(b)))
        r.append(float(np.mean(log_ratio_lag1(a, b, np.ones(a.shape, bool)))))
    order = np.argsort(r)
    return np.maximum.accumulate(np.asarray(rho)[order]), np.asarray(r)[order]


def speckle_correlation_from_log_ratio(r, looks: float) -> float:
    """The speckle's lag-1 intensity correlation whose two-date log-ratio has lag-1 correlation ``r``."""
    rho, curve = _log_ratio_curve(round(float(looks), 3))
    return float(np.interp(float(r), curve, rho))


def slc_speckle_correlation(z, valid) -> tuple:
    """Lag-1 intensity correlation (rows, cols) of complex samples: ``|complex correlation|^2`` (Siegert)."""
    z = np.asarray(z)
    valid = np.asarray(valid, dtype=bool)
    out = []
    for a, b, k in ((z[:-1], z[1:], valid[:-1] & valid[1:]), (z[:, :-1], z[:, 1:], valid[:, :-1] & valid[:, 1:])):
        if int(k.sum()) < _MIN_PAIRS:
            raise InputError(f"fewer than {_MIN_PAIRS} neighbouring valid samples to measure the correlation")
        u, v = a[k].astype(np.complex128), b[k].astype(np.complex128)
        out.append(float(abs(np.sum(u * np.conj(v))) ** 2 / (np.sum(abs(u) ** 2) * np.sum(abs(v) ** 2))))
    return tuple(out)


# --------------------------------------------------------------------------- what apply will tell

def _told_spread(image, valid, whole: float) -> float:
    """Largest departure of the measured mean lag-1 correlation on TILE x TILE pieces from ``whole``."""
    from ..looks import describe_array

    h, w = image.shape
    corners = [(r, c) for r in range(0, max(h - TILE, 0) + 1, TILE) for c in range(0, max(w - TILE, 0) + 1, TILE)]
    if len(corners) > _MAX_TILES:  # an even subset of a large image's pieces
        corners = [corners[i] for i in np.linspace(0, len(corners) - 1, _MAX_TILES).round().astype(int)]
    spread = 0.0
    for r, c in corners:
        _, corr, _ = describe_array(image[r:r + TILE, c:c + TILE], valid[r:r + TILE, c:c + TILE],
                                    correlation_notes=False)
        if corr.source == "measured":
            spread = max(spread, abs(float(np.mean(corr.lag1)) - whole))
    return spread


def _read_slc(path, config):
    from ..raster import open_scene

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with open_scene(path, units=config.data.units) as reader:
                z, valid = reader.read_complex(band=config.data.band)
    except DespeckError:
        raise
    except (OSError, ValueError) as exc:
        raise RasterError(f"{path}: cannot read ({exc})") from None
    valid = np.asarray(valid, dtype=bool) & np.isfinite(z.real) & np.isfinite(z.imag) & (np.abs(z) > 0)
    return np.where(valid, z, np.complex64(0)), valid


def measure_site_conditions(data, config) -> list:
    """One :class:`SiteCondition` per image of a self-supervised run (``data.sources``).

    Each date of every pair, and the full-resolution intensity of every SLC scene.
    Images whose speckle cannot be measured (too few homogeneous blocks) are left out
    with a warning.
    """
    from ..looks import describe_array

    sites = []
    for src in getattr(data, "sources", []):
        if src.kind == "pair":
            try:
                r = log_ratio_lag1(src.views[0], src.views[1], src.keep)
                looks = float(np.mean(src.looks))
                speckle = tuple(speckle_correlation_from_log_ratio(v, looks) for v in r)
                source = "log-ratio of the two dates (unchanged pixels)"
            except InputError:
                speckle, source = None, None
            images = [(str(f), view, src.valid) for f, view in zip(src.files, src.views)]
        else:
            z, valid = _read_slc(src.files[0], config)
            try:
                speckle, source = slc_speckle_correlation(z, valid), "complex samples of the full image"
            except InputError:
                speckle, source = None, None
            full = (z.real.astype(np.float32) ** 2 + z.imag.astype(np.float32) ** 2)
            images = [(f"{src.files[0]} (full resolution)", full, valid)]
        for name, image, valid in images:
            info, corr, notes = describe_array(image, valid)
            if info.source != "estimate" or corr.source != "measured":
                warnings.warn(f"{name}: its speckle could not be measured ({'; '.join(notes)}); the bias table "
                              "has no column for it", UserWarning, stacklevel=2)
                continue
            told = tuple(float(v) for v in corr.lag1)
            sites.append(SiteCondition(
                name, float(info.value), told, _told_spread(image, valid, float(np.mean(told))),
                told if speckle is None else tuple(float(np.clip(v, 0.0, 0.95)) for v in speckle),
                source or "as apply measures it (no texture-free measurement)", f"{info.detail}; {corr.detail}"))
    return sites
