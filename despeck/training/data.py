"""Training data: random patches of clean references, speckled on the fly.

Clean references (rasters in any units :mod:`despeck.raster` reads, or procedural
scenes from :mod:`despeck.synthetic`) are held in memory as float32 intensity plus a
validity mask. A training sample is a random ``patch_size`` square whose valid fraction
is at least ``min_valid_fraction`` (nodata is skipped by construction: only such
positions are ever drawn), a random flip/rotation, and fresh Gamma speckle with a fixed
number of looks or one drawn uniformly from a range, optionally spatially correlated.
Positions are drawn uniformly over all allowed positions of all references, so an epoch
has ``patches_per_epoch`` samples whatever the number of files.

Every sample is a pure function of ``(seed, epoch, index)``: the sampler yields
``(epoch, index)`` keys and the dataset seeds a fresh numpy generator from them. The
same run therefore sees the same data whether or not it was interrupted, which is what
makes resuming from a checkpoint reproduce an uninterrupted run. Validation patches
and their speckle are drawn once from a separate seed and never change.

This module assembles the supervised data (:class:`TrainingData`, :class:`PatchDataset`,
:class:`ValidationSet`) from three parts, whose names it re-exports: reading the
references (:mod:`despeck.training.references`), drawing patch positions and batches
(:mod:`despeck.training.sampling`) and drawing each sample's speckle
(:mod:`despeck.training.speckle_draws`).
"""

from __future__ import annotations

import math

import numpy as np
import torch
from torch.utils.data import Dataset

from ..errors import ConfigError, RasterError
from ..metrics import reference_db_range
from ..speckle import gamma_speckle, log_intensity_mean
from ..validity import valid_mask
from .config import TrainConfig
from .losses import validation_fidelity
from .references import RASTER_SUFFIXES, Reference, make_reference, read_reference, resolve_raster_paths
from .sampling import EpochPatches, EpochSampler, PatchLoaders, PositionTable, allowed_positions, augment, patch_item
from .speckle_draws import SpeckleDraw, draw_speckle, told_condition, validation_looks

__all__ = ["Reference", "PatchDataset", "EpochSampler", "ValidationSet", "TrainingData", "resolve_raster_paths",
           "allowed_positions", "PositionTable", "augment", "EpochPatches", "PatchLoaders", "SpeckleDraw",
           "draw_speckle", "told_condition", "validation_looks", "RASTER_SUFFIXES"]


class PatchDataset(EpochPatches):
    """Random speckled training patches; item ``(epoch, index)`` is deterministic.

    Each item is a dict of tensors: ``noisy``, ``clean``, ``target`` (clean, or an
    independent speckled view for noisy-target losses), ``valid`` (each ``(1, p, p)``),
    ``looks`` and ``log_offset`` (scalars). ``log_offset`` imitates the scene-level
    normalisation of inference: the reference's mean clean log plus ``psi(L) - ln L``
    (the expected mean log of the speckled scene) plus a random jitter of
    ``offset_jitter`` nepers so the network does not rely on the offset being exact.
    """

    def __init__(self, references, config: TrainConfig):
        super().__init__(references, config)
        self.refs = self.sources

    def __getitem__(self, key):
        c = self.config
        rng, ref, r0, c0 = self.draw(key)
        p = c.data.patch_size
        clean = ref.intensity[r0:r0 + p, c0:c0 + p]
        valid = ref.valid[r0:r0 + p, c0:c0 + p]
        if c.data.augment:
            t = int(rng.integers(8))
            clean, valid = augment(clean, t), augment(valid, t)
        clean = np.where(valid, clean, 0).astype(np.float32)
        draw = draw_speckle(c.speckle, rng)
        looks = draw.looks
        noisy = draw.apply(clean, rng)
        # What a despeckler should give back: the speckle's mean (blurred by the system
        # for correlated speckle, unless speckle.correlated_target is "reference").
        expected = np.where(valid, draw.expected(clean, c.speckle.correlated_target), 0).astype(np.float32)
        target = draw.apply(clean, rng) if c.loss.target == "noisy" else expected
        clean = expected
        offset = ref.log_mean + log_intensity_mean(looks) + c.data.offset_jitter * float(rng.standard_normal())
        told = told_condition(draw, c.speckle.condition_jitter, rng, c.speckle.condition_dropout,
                              looks_jitter=c.speckle.looks_jitter)
        return patch_item(noisy, target, valid, looks, offset, told, clean=clean)


class ValidationSet(Dataset):
    """Fixed validation patches with fixed speckle, drawn once from the validation regions.

    Also holds four homogeneous patches (constant reflectivity at the references' typical
    level, speckled with ``val_looks``) for the mean calibration, ENL and radiometric-bias
    columns, the
    fixed dB range of PSNR/SSIM (``db_range``, :func:`despeck.metrics.reference_db_range`
    of the validation patches' clean pixels) and the noisy input's own PSNR for comparison.
    """

    def __init__(self, references, config: TrainConfig):
        c = config
        refs = [r for r in references if r.val.total > 0]
        if not refs:
            raise ConfigError(
                "config key data.val_fraction: no raster has room for a validation strip of "
                f"{c.data.patch_size} rows below its training area (rasters need at least "
                f"{2 * c.data.patch_size} valid rows); list data.validation files or use taller rasters"
            )
        rng = np.random.default_rng([c.validation_seed, 2])
        cum = np.cumsum([r.val.total for r in refs])
        looks = self.looks = validation_looks(c)
        p = c.data.patch_size
        items = []
        for _ in range(c.data.val_patches):
            k = int(rng.integers(int(cum[-1])))
            f = int(np.searchsorted(cum, k, side="right"))
            ref = refs[f]
            r0, c0 = ref.val.position(k - (int(cum[f - 1]) if f else 0))
            valid = ref.valid[r0:r0 + p, c0:c0 + p].copy()
            clean = np.where(valid, ref.intensity[r0:r0 + p, c0:c0 + p], 0).astype(np.float32)
            draw = draw_speckle(c.speckle, rng) if c.speckle.val_mixture else SpeckleDraw(looks)
            noisy = draw.apply(clean, rng)
            expected = np.where(valid, draw.expected(clean, c.speckle.correlated_target), 0).astype(np.float32)
            target = draw.apply(clean, rng) if c.loss.target == "noisy" else expected
            clean = expected
            offset = ref.log_mean + log_intensity_mean(draw.looks)
            # Validation tells the network the exact condition (no jitter); with dropout,
            # every other patch withholds the correlation as inference may have to.
            told = (draw.looks, draw.correlation())
            if c.speckle.condition_dropout and len(items) % 2:
                from ..models.wrapper import UNKNOWN_CORRELATION

                told = (draw.looks, (UNKNOWN_CORRELATION, UNKNOWN_CORRELATION))
            items.append(patch_item(noisy, target, valid, draw.looks, offset, told, clean=clean))
        self.items = items
        # One fixed dB range for every epoch, taken from the validation references as the
        # benchmarks take it from a scene's reference (at least 1 dB wide).
        low, high = reference_db_range(np.concatenate([it["clean"][it["valid"]].numpy() for it in items]))
        self.db_range = (low, max(high, low + 1.0))
        level = float(np.mean([r.log_mean for r in refs]))
        side = max(2 * p, 128)
        reflectivity = math.exp(level)
        # Four constant patches: three calibrate the mean of log-MSE models, the fourth
        # measures the exported model's bias independently.
        noisy = (reflectivity * gamma_speckle((4, 1, side, side), looks, rng=rng)).astype(np.float32)
        self.homogeneous = {
            "noisy": torch.from_numpy(noisy),
            "valid": torch.ones(4, 1, side, side, dtype=torch.bool),
            "log_offset": torch.full((4,), level + log_intensity_mean(looks), dtype=torch.float32),
            "reflectivity": reflectivity,
        }
        self.noisy_psnr_db = float(np.nanmean([
            validation_fidelity(it["clean"][0].numpy(), it["noisy"][0].numpy(), it["valid"][0].numpy(),
                                self.db_range)[0]
            for it in items
        ]))

    def __len__(self):
        return len(self.items)

    def __getitem__(self, i):
        return self.items[i]


class TrainingData(PatchLoaders):
    """All references, the training dataset and the validation set for one config.

    Reading and checking happen here, before any training starts: missing files,
    unreadable rasters, patches larger than a raster, rasters without a single
    sufficiently valid patch, and too many pixels for memory all raise one-line errors.
    """

    def __init__(self, config: TrainConfig, progress: bool = False):
        self.config = config
        d = config.data
        p = d.patch_size
        references = []
        total_pixels = 0

        def add(name, intensity, valid, role):
            nonlocal total_pixels
            total_pixels += intensity.size
            if total_pixels > d.max_pixels:
                raise ConfigError(
                    f"config key data.max_pixels: the references exceed {d.max_pixels} pixels at {name}; "
                    "crop them, list fewer files or raise data.max_pixels"
                )
            h = intensity.shape[0]
            val_rows = 0
            if role == "train" and not d.validation and h >= 2 * p:
                val_rows = max(p, math.ceil(d.val_fraction * h))
                val_rows = min(val_rows, h - p)
            references.append(make_reference(name, intensity, valid, p, d.min_valid_fraction, val_rows, role))

        train_paths = resolve_raster_paths(d.train, "data.train") if d.train else []
        val_paths = resolve_raster_paths(d.validation, "data.validation") if d.validation else []
        for role, paths in (("train", train_paths), ("val", val_paths)):
            for path in paths:
                intensity, valid = read_reference(path, d.units, d.band)
                add(str(path), intensity, valid, role)
        if d.synthetic_scenes:
            from ..synthetic import make_scene

            n = d.synthetic_scenes + (0 if (train_paths or val_paths) else 1)
            families = list(d.synthetic_families)
            for i in range(n):
                rng = np.random.default_rng([config.trainer.seed, 3, i])
                if families:
                    from ..scene_families import make_family_scene

                    scene = make_family_scene(families[i % len(families)], (d.synthetic_size, d.synthetic_size),
                                              rng=rng, split="train")
                else:
                    scene = make_scene((d.synthetic_size, d.synthetic_size), rng=rng)
                scene = np.asarray(scene, dtype=np.float32)
                valid = valid_mask(scene)
                # Without files, the extra procedural scene is the validation scene.
                role = "val" if i == d.synthetic_scenes else "train"
                add(f"synthetic scene {i}", scene, valid, role)
        self.references = references
        if not any(r.train.total for r in references):
            names = ", ".join(r.name for r in references[:3])
            raise RasterError(
                f"no {p}x{p} training patch with at least {d.min_valid_fraction:.0%} valid pixels in {names}"
                f"{' ...' if len(references) > 3 else ''}; lower data.min_valid_fraction or data.patch_size"
            )
        self.train_set = PatchDataset(references, config)
        self.val_set = ValidationSet(references, config)

    def describe(self) -> dict:
        """JSON-ready description of the training data, for the model file."""
        c = self.config
        return {
            "references": [r.name for r in self.references],
            "synthetic_scenes": c.data.synthetic_scenes,
            "synthetic_families": list(c.data.synthetic_families),
            "units": c.data.units or "detected",
            "patch_size": c.data.patch_size,
            "looks": c.speckle.looks,
            "correlated_fraction": c.speckle.correlated_fraction,
            "oversampling": c.speckle.oversampling,
            "taper": c.speckle.taper,
            "looks_distribution": c.speckle.looks_distribution,
            "validation_looks": self.val_set.looks,
        }
