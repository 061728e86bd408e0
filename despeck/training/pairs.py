"""Self-supervised training data: pairs of real, independent looks of the same scene.

Without clean references a network can still learn to despeckle from two looks of
the same reflectivity whose speckle is independent (Noise2Noise): one look is the
input, the other the target, and a loss whose minimiser is the target's conditional
mean (``gamma_nll``, or ``mse_log`` with the ``ln L - psi(L)`` correction for the
target's looks) learns the reflectivity. Two sources of such pairs are read here:

* **Dates** (``data.pairs``): two co-registered acquisitions on the same grid. Where
  the ground changed between them the target is not another look of the input, so
  those pixels are left out of the loss: a two-sided test on the ratio of the dates'
  local means (:func:`despeck.change.change_mask`).
* **Sub-looks** (``data.slc``): a single-look complex scene split once at load time
  into ``K`` sub-looks along azimuth or range (:func:`despeck.speckle.split_sublooks`);
  two different sub-looks make a pair. The sub-looks have ``K`` times coarser
  resolution along the split axis than the full scene, so a model trained on them
  sees a slightly different image than it will be applied to.

Samples are pure functions of ``(seed, epoch, index)`` as in
:mod:`despeck.training.data`, so resuming reproduces an uninterrupted run. Validation
uses the bottom ``val_fraction`` of every pair's rows, never drawn for training, and
reports what can be measured without a reference: the loss on fixed held-out patches,
the ENL of the output on homogeneous areas found automatically in the strip, and the
mean of the ratio input / output there (1 for a filter that keeps the mean).

References
----------
Lehtinen, J. et al. (2018). Noise2Noise: learning image restoration without clean
data. ICML 2018, arXiv:1803.04189.
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
import torch
from torch.utils.data import Dataset

from ..change import change_mask, change_thresholds, correlated_window_factor  # the change test, re-exported
from ..errors import ConfigError, DespeckError, InputError, RasterError
from ..speckle import enl_intensity, estimate_looks, homogeneous_blocks, split_sublooks
from .config import TrainConfig
from .data import EpochPatches, PatchLoaders, PositionTable, allowed_positions, augment, resolve_raster_paths

__all__ = [
    "change_mask",
    "change_thresholds",
    "correlated_window_factor",
    "PairSource",
    "PairPatchDataset",
    "PairValidationSet",
    "PairTrainingData",
    "read_date_pair",
    "read_slc_sublooks",
]

# A training or validation patch must have at least this fraction of its pixels in the
# loss (valid on every view and unchanged), so steps are not wasted on changed areas.
_MIN_KEPT_FRACTION = 0.5

# Homogeneous blocks used per pair for the validation ENL and mean-ratio measures (the
# most homogeneous first; half calibrate the exported mean, half are measured).
_MAX_BLOCKS_PER_PAIR = 64
_MIN_BLOCK_UNCHANGED = 0.9


# --------------------------------------------------------------------------- reading

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
    valid = np.asarray(valid, dtype=bool) & np.isfinite(intensity) & (intensity > 0)
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


# --------------------------------------------------------------------------- sources

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


def _make_source(name, kind, files, views, valid, config: TrainConfig) -> PairSource:
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
        looks = np.full(len(views), float(configured))
        for e in estimated:
            if e is not None and math.isfinite(e) and not 1 / 1.5 <= e / float(configured) <= 1.5:
                warnings.warn(f"{name}: speckle.looks is {float(configured):g} but the looks estimated on the data "
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
                             & allowed_positions(keep, p, _MIN_KEPT_FRACTION, lo, hi))

    changed_fraction = float(changed.sum() / max(valid.sum(), 1))
    return PairSource(name, kind, list(files), views, valid, keep, looks, estimated, log_means, val_start,
                      table(0, val_start), table(val_start, h), changed_fraction, correlation)


def _item(noisy, target, valid, keep, looks, offset, cond=None):
    cond_looks, cond_corr = cond if cond is not None else (looks, (0.0, 0.0))
    return {
        "cond_looks": torch.tensor(float(cond_looks), dtype=torch.float32),
        "cond_corr": torch.tensor(tuple(float(v) for v in cond_corr), dtype=torch.float32),
        "noisy": torch.from_numpy(np.ascontiguousarray(noisy, dtype=np.float32))[None],
        "target": torch.from_numpy(np.ascontiguousarray(target, dtype=np.float32))[None],
        "valid": torch.from_numpy(np.ascontiguousarray(valid, dtype=bool))[None],
        "weight": torch.from_numpy(np.ascontiguousarray(keep, dtype=np.float32))[None],
        "looks": torch.tensor(looks, dtype=torch.float32),
        "log_offset": torch.tensor(offset, dtype=torch.float32),
    }


def _crop(src: PairSource, r0, c0, p, i, j):
    sl = (slice(r0, r0 + p), slice(c0, c0 + p))
    return src.views[i][sl], src.views[j][sl], src.valid[sl], src.keep[sl]


class PairPatchDataset(EpochPatches):
    """Random training patches of pairs; item ``(epoch, index)`` is deterministic.

    Each item is a dict of tensors: ``noisy`` (one view), ``target`` (another view of
    the same pair, the order drawn at random), ``valid`` (valid on every view, for the
    network's nodata handling), ``weight`` (1 where the pixel enters the loss: valid and
    unchanged), ``looks`` (the target's looks, for the log-target correction) and
    ``log_offset`` (the input view's mean log-intensity, as inference computes per scene,
    plus a random jitter of ``offset_jitter`` nepers).
    """

    def __getitem__(self, key):
        c = self.config
        rng, src, r0, c0 = self.draw(key)
        i, j = (int(v) for v in rng.choice(src.views.shape[0], size=2, replace=False))
        noisy, target, valid, keep = _crop(src, r0, c0, c.data.patch_size, i, j)
        corr = tuple(src.correlation)
        if c.data.augment:
            t = int(rng.integers(8))
            noisy, target, valid, keep = (augment(a, t) for a in (noisy, target, valid, keep))
            if t % 2:  # a quarter turn swaps rows and columns
                corr = corr[::-1]
        offset = src.log_means[i] + c.data.offset_jitter * float(rng.standard_normal())
        return _item(noisy, target, valid, keep, src.looks[j], offset, (src.looks[i], corr))


class PairValidationSet(Dataset):
    """Validation without a clean reference: held-out patches and homogeneous blocks of the strips.

    ``items`` are ``val_patches`` fixed patches from the bottom strips (input and target
    views drawn once) for the validation loss. For the output measures, homogeneous
    blocks are found in each strip with :func:`despeck.speckle.homogeneous_blocks` on the
    *second* view, while the network despeckles the *first*: the two views' speckle is
    independent, so choosing the blocks does not favour blocks where the input happens
    to look smooth. Blocks alternate, most homogeneous first, between a calibration set
    (for ``mse_log``, the exported ``log_bias`` makes the output's mean equal the
    input's there, as the simulated constant patches do in supervised training) and a
    measurement set on which :meth:`measure` reports the output's ENL and the mean
    ratio input / output.
    """

    has_reference = False

    def __init__(self, sources, config: TrainConfig):
        c = config
        p = c.data.patch_size
        refs = [s for s in sources if s.val.total > 0]
        if not refs:
            raise ConfigError(
                "config key data.val_fraction: no pair has a validation strip with a "
                f"{p}x{p} patch that is valid and at least {_MIN_KEPT_FRACTION:.0%} unchanged; "
                "raise data.val_fraction or lower data.patch_size"
            )
        rng = np.random.default_rng([c.trainer.seed, 2])
        cum = np.cumsum([s.val.total for s in refs])
        items = []
        for _ in range(c.data.val_patches):
            k = int(rng.integers(int(cum[-1])))
            f = int(np.searchsorted(cum, k, side="right"))
            src = refs[f]
            r0, c0 = src.val.position(k - (int(cum[f - 1]) if f else 0))
            i, j = (int(v) for v in rng.choice(src.views.shape[0], size=2, replace=False))
            noisy, target, valid, keep = _crop(src, r0, c0, p, i, j)
            items.append(_item(noisy, target, valid, keep, src.looks[j], src.log_means[i],
                                (src.looks[i], tuple(src.correlation))))
        self.items = items
        self.blocks = []  # (source, row, col, window)
        for src in sources:
            strip = slice(src.val_start, None)
            rows = src.views.shape[1] - src.val_start
            window = 16 if rows >= 16 else 8
            found = None
            for minimum in (8, 2):
                try:
                    found, _ = homogeneous_blocks(src.views[1][strip], src.valid[strip], window=window,
                                                  fraction=0.2, min_blocks=minimum)
                    break
                except InputError:
                    continue
            if found is not None:
                # Blocks on changed ground are not homogeneous on the input date. Scattered
                # false alarms of the change test are left in: dropping every block with
                # one flagged pixel would drop most blocks.
                keep = src.keep[strip]
                found = [(r, col) for r, col in found
                         if keep[r:r + window, col:col + window].mean() >= _MIN_BLOCK_UNCHANGED]
                self.blocks += [(src, int(r) + src.val_start, int(col), window)
                                for r, col in found[:_MAX_BLOCKS_PER_PAIR]]
        if len(self.blocks) < 2:
            raise ConfigError(
                "config key data.val_fraction: the validation strips hold fewer than two blocks free of nodata "
                "and change for the ENL and mean-ratio measures; raise data.val_fraction"
            )

    def __len__(self):
        return len(self.items)

    def __getitem__(self, i):
        return self.items[i]

    @torch.no_grad()
    def measure(self, despeckler, loss_name: str) -> dict:
        """Despeckle the blocks (with their context) and measure the output.

        Returns
        -------
        dict
            ``val_enl`` (median ENL of the output over the measurement blocks),
            ``val_ratio_mean`` (mean of input / output there; 1 keeps the mean),
            ``val_bias_db`` (10 log10 of mean output over mean input there) and
            ``val_log_bias`` (the correction exported with the model).
        """
        m = despeckler.receptive_field // 2
        padded = {}
        inputs, crops, valids, offsets, sources = [], [], [], [], []
        for src, r, col, window in self.blocks:
            sources.append(src)
            if id(src) not in padded:
                padded[id(src)] = (np.pad(src.views[0], m, mode="reflect"), np.pad(src.valid, m, mode="reflect"))
            view, valid = padded[id(src)]
            # In padded coordinates the block starts at (r + m, col + m), its context m before.
            crops.append(view[r:r + window + 2 * m, col:col + window + 2 * m])
            valids.append(valid[r:r + window + 2 * m, col:col + window + 2 * m])
            offsets.append(src.log_means[0])
            inputs.append(src.views[0][r:r + window, col:col + window].astype(np.float64))
        outputs = [None] * len(crops)
        by_shape = {}
        for k, crop in enumerate(crops):
            by_shape.setdefault((crop.shape, id(sources[k])), []).append(k)
        for ks in by_shape.values():
            src = sources[ks[0]]
            for start in range(0, len(ks), 64):
                chunk = ks[start:start + 64]
                x = torch.from_numpy(np.stack([crops[k] for k in chunk])[:, None])
                v = torch.from_numpy(np.stack([valids[k] for k in chunk])[:, None])
                off = torch.tensor([offsets[k] for k in chunk], dtype=torch.float32)
                y = despeckler(x, v, off, looks=float(src.looks[0]),
                               correlation=tuple(src.correlation))[:, 0].double().cpu().numpy()
                for k, out in zip(chunk, y):
                    outputs[k] = out[m:out.shape[0] - m, m:out.shape[1] - m]
        calibrate, measure = list(range(0, len(outputs), 2)), list(range(1, len(outputs), 2))
        if loss_name == "mse_log":
            log_bias = math.log(sum(inputs[k].sum() for k in calibrate) / sum(outputs[k].sum() for k in calibrate))
        else:
            log_bias = 0.0
        gain = math.exp(log_bias)
        out = [outputs[k] * gain for k in measure]
        inp = [inputs[k] for k in measure]
        enl = float(np.median([min(enl_intensity(o), 1e6) for o in out]))
        ratio = float(np.mean(np.concatenate([(i / o).ravel() for i, o in zip(inp, out)])))
        bias = 10 * math.log10(sum(o.sum() for o in out) / sum(i.sum() for i in inp))
        return {"val_enl": enl, "val_ratio_mean": ratio, "val_bias_db": float(bias), "val_log_bias": float(log_bias)}


class PairTrainingData(PatchLoaders):
    """Sources, training dataset and validation set for a pair-training config.

    Reading and checking happen here, before any training starts: missing or unreadable
    files, dates on different grids, real files listed as SLC, rasters too small for a
    patch and a validation strip all raise one-line errors.
    """

    def __init__(self, config: TrainConfig, progress: bool = False):
        self.config = config
        d = config.data
        sources = []
        total_pixels = 0

        def count(name, pixels):
            nonlocal total_pixels
            total_pixels += pixels
            if total_pixels > d.max_pixels:
                raise ConfigError(
                    f"config key data.max_pixels: the pairs exceed {d.max_pixels} pixels at {name}; "
                    "crop them, list fewer files or raise data.max_pixels"
                )

        for first, second in d.pairs:
            a = resolve_raster_paths([first], "data.pairs")
            b = resolve_raster_paths([second], "data.pairs")
            if len(a) != 1 or len(b) != 1:
                raise ConfigError(f"config key data.pairs: [{first}, {second}] must name two files, not folders or globs")
            if a[0] == b[0]:
                raise ConfigError(f"config key data.pairs: {a[0]} is paired with itself; the dates must differ")
            views, valid = read_date_pair(a[0], b[0], units=d.units, band=d.band)
            name = f"{a[0].name} + {b[0].name}"
            count(name, views.size)
            sources.append(_make_source(name, "pair", [a[0], b[0]], views, valid, config))
        for path in resolve_raster_paths(d.slc, "data.slc") if d.slc else []:
            views, valid = read_slc_sublooks(path, d.sublooks, axis=d.split_axis, oversampling=d.slc_oversampling,
                                             taper=d.slc_taper, centre=d.slc_centre, units=d.units, band=d.band)
            name = f"{path.name} ({d.sublooks} sub-looks along {d.split_axis})"
            count(name, views.size)
            sources.append(_make_source(name, "sublooks", [path], views, valid, config))
        if not any(s.train.total for s in sources):
            p = d.patch_size
            raise RasterError(
                f"no {p}x{p} training patch with at least {d.min_valid_fraction:.0%} valid and "
                f"{_MIN_KEPT_FRACTION:.0%} unchanged pixels in {sources[0].name}"
                f"{' ...' if len(sources) > 1 else ''}; lower data.min_valid_fraction or data.patch_size"
            )
        self.sources = sources
        self.references = sources
        self.train_set = PairPatchDataset(sources, config)
        self.val_set = PairValidationSet(sources, config)

    @property
    def mode(self) -> str:
        kinds = {s.kind for s in self.sources}
        return "pairs+sublooks" if len(kinds) == 2 else "pairs" if "pair" in kinds else "sublooks"

    @property
    def model_looks(self):
        """Looks of the training inputs, recorded in the model: one number, or [min, max] if they vary."""
        looks = np.concatenate([s.looks for s in self.sources])
        lo, hi = float(looks.min()), float(looks.max())
        return round(lo, 4) if hi <= lo * 1.1 else [round(lo, 4), round(hi, 4)]

    def describe(self) -> dict:
        """JSON-ready description of the training data, for the model file."""
        c = self.config
        d = c.data
        out = {
            "mode": self.mode,
            "units": d.units or "detected",
            "patch_size": d.patch_size,
            "looks_source": "estimated (despeck.speckle.estimate_looks)" if c.speckle.looks == "auto" else "configured",
            "validation": f"bottom {d.val_fraction:g} of every pair's rows; {len(self.val_set.blocks)} homogeneous blocks",
        }
        pairs = [s.describe() for s in self.sources if s.kind == "pair"]
        slcs = [s.describe() for s in self.sources if s.kind == "sublooks"]
        if pairs:
            out["pairs"] = pairs
            out["change_test"] = {
                "test": "two-sided F test on the ratio of the dates' local means",
                "window": d.change_window, "false_alarm": d.change_false_alarm,
            }
        if slcs:
            out["slc"] = slcs
            out["sublooks"] = {"count": d.sublooks, "split_axis": d.split_axis, "oversampling": d.slc_oversampling,
                               "taper": d.slc_taper, "centre": d.slc_centre}
        return out
