"""Self-supervised training data: pairs of real, independent looks of the same scene.

Without clean references a network can still learn to despeckle from two looks of
the same reflectivity whose speckle is independent (Noise2Noise): one look is the
input, the other the target, and a loss whose minimiser is the target's conditional
mean (``gamma_nll``, or ``mse_log`` with the ``ln L - psi(L)`` correction for the
target's looks) learns the reflectivity. Two sources of such pairs are used:

* **Dates** (``data.pairs``): two co-registered acquisitions on the same grid. Where
  the ground changed between them the target is not another look of the input, so
  those pixels are left out of the loss: a two-sided test on the ratio of the dates'
  local means (:func:`despeck.change.change_mask`).
* **Sub-looks** (``data.slc``): a single-look complex scene split once at load time
  into ``K`` sub-looks along azimuth or range (:func:`despeck.speckle.split_sublooks`);
  two different sub-looks make a pair. The sub-looks have ``K`` times coarser
  resolution along the split axis than the full scene, so a model trained on them
  sees a slightly different image than it will be applied to.

Reading the dates and sub-looks and making a source of each scene (looks, change
mask, positions) is :mod:`despeck.training.pair_sources`, whose names this module
re-exports; here are the datasets and the validation. Samples are pure functions of
``(seed, epoch, index)`` as in :mod:`despeck.training.data`, so resuming reproduces an
uninterrupted run. Validation uses the bottom ``val_fraction`` of every pair's rows,
never drawn for training, and reports what can be measured without a reference: the
loss on fixed held-out patches, the ENL of the output on homogeneous areas found
automatically in the strip, and the mean of the ratio input / output there (1 for a
filter that keeps the mean).

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

import numpy as np
import torch
from torch.utils.data import Dataset

from ..change import change_mask, change_thresholds, correlated_window_factor  # the change test, re-exported
from ..errors import ConfigError, InputError, RasterError
from ..speckle import enl_intensity, homogeneous_blocks
from .config import TrainConfig
from .pair_sources import MIN_KEPT_FRACTION, PairSource, make_pair_source, read_date_pair, read_slc_sublooks
from .references import resolve_raster_paths
from .sampling import EpochPatches, PatchLoaders, augment, patch_item

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

# Homogeneous blocks used per pair for the validation ENL and mean-ratio measures (the
# most homogeneous first; half calibrate the exported mean, half are measured).
_MAX_BLOCKS_PER_PAIR = 64
_MIN_BLOCK_UNCHANGED = 0.9


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
        return patch_item(noisy, target, valid, src.looks[j], offset, (src.looks[i], corr), weight=keep)


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
                f"{p}x{p} patch that is valid and at least {MIN_KEPT_FRACTION:.0%} unchanged; "
                "raise data.val_fraction or lower data.patch_size"
            )
        rng = np.random.default_rng([c.validation_seed, 2])
        cum = np.cumsum([s.val.total for s in refs])
        items = []
        for _ in range(c.data.val_patches):
            k = int(rng.integers(int(cum[-1])))
            f = int(np.searchsorted(cum, k, side="right"))
            src = refs[f]
            r0, c0 = src.val.position(k - (int(cum[f - 1]) if f else 0))
            i, j = (int(v) for v in rng.choice(src.views.shape[0], size=2, replace=False))
            noisy, target, valid, keep = _crop(src, r0, c0, p, i, j)
            items.append(patch_item(noisy, target, valid, src.looks[j], src.log_means[i],
                                    (src.looks[i], tuple(src.correlation)), weight=keep))
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
                y = despeckler(x, v, off, looks=src.looks[0],
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
            sources.append(make_pair_source(name, "pair", [a[0], b[0]], views, valid, config))
        for path in resolve_raster_paths(d.slc, "data.slc") if d.slc else []:
            views, valid = read_slc_sublooks(path, d.sublooks, axis=d.split_axis, oversampling=d.slc_oversampling,
                                             taper=d.slc_taper, centre=d.slc_centre, units=d.units, band=d.band)
            name = f"{path.name} ({d.sublooks} sub-looks along {d.split_axis})"
            count(name, views.size)
            sources.append(make_pair_source(name, "sublooks", [path], views, valid, config))
        if not any(s.train.total for s in sources):
            p = d.patch_size
            raise RasterError(
                f"no {p}x{p} training patch with at least {d.min_valid_fraction:.0%} valid and "
                f"{MIN_KEPT_FRACTION:.0%} unchanged pixels in {sources[0].name}"
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
