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
"""

from __future__ import annotations

import functools
import glob
import math
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
from torch.utils.data import DataLoader, Dataset, Sampler

from ..errors import ConfigError, DespeckError, RasterError
from ..metrics import reference_db_range
from ..speckle import gamma_speckle, intensity_correlation_theory, log_intensity_mean, simulate_correlated_intensity
from .config import TrainConfig
from .losses import validation_fidelity

__all__ = ["Reference", "PatchDataset", "EpochSampler", "ValidationSet", "TrainingData", "resolve_raster_paths",
           "allowed_positions", "PositionTable", "augment"]

RASTER_SUFFIXES = {".tif", ".tiff", ".vrt", ".img", ".jp2", ".png", ".jpg", ".jpeg", ".bmp", ".nc", ".hdf", ".h5"}


def resolve_raster_paths(entries, key: str) -> list[Path]:
    """Expand files, folders (their rasters, not recursive) and glob patterns; one-line ConfigError if empty."""
    paths: list[Path] = []
    for entry in entries:
        text = str(entry)
        p = Path(text).expanduser()
        if any(ch in text for ch in "*?["):
            found = sorted(Path(m) for m in glob.glob(str(p)) if Path(m).is_file())
            if not found:
                raise ConfigError(f"config key {key}: no files match {text!r}")
            paths += found
        elif p.is_dir():
            found = sorted(f for f in p.iterdir() if f.is_file() and f.suffix.lower() in RASTER_SUFFIXES
                           and not f.name.startswith("."))
            if not found:
                raise ConfigError(
                    f"config key {key}: folder {p} holds no raster files ({', '.join(sorted(RASTER_SUFFIXES))})"
                )
            paths += found
        elif p.is_file():
            paths.append(p)
        else:
            raise ConfigError(f"config key {key}: {p} does not exist")
    unique = list(dict.fromkeys(q.resolve() for q in paths))
    return unique


def allowed_positions(valid: np.ndarray, patch: int, min_fraction: float, row_lo: int, row_hi: int) -> np.ndarray:
    """Boolean map of top-left corners whose ``patch`` square lies in rows [row_lo, row_hi) and is valid enough.

    A corner is allowed when at least ``min_fraction`` of its square is ``valid``; shape
    ``(H - patch + 1, W - patch + 1)`` (empty when the image is smaller than a patch).
    """
    h, w = valid.shape
    out = np.zeros((max(h - patch + 1, 0), max(w - patch + 1, 0)), dtype=bool)
    if row_hi - row_lo < patch or w < patch:
        return out
    # Box sums from a summed-area table (int32 is enough for < 2**31 pixels per patch).
    sat = np.zeros((h + 1, w + 1), dtype=np.int32)
    np.cumsum(np.cumsum(valid, axis=0, dtype=np.int32), axis=1, out=sat[1:, 1:])
    counts = sat[patch:, patch:] - sat[:-patch, patch:] - sat[patch:, :-patch] + sat[:-patch, :-patch]
    need = math.ceil(min_fraction * patch * patch - 1e-9)
    ok = counts >= need
    rows = np.arange(ok.shape[0])
    ok &= ((rows >= row_lo) & (rows + patch <= row_hi))[:, None]
    return ok


class PositionTable:
    """Uniform sampling of allowed top-left positions without listing them all.

    ``total`` is the number of allowed positions; ``position(k)`` gives the ``k``-th
    (row, column) in row-major order, ``0 <= k < total``.
    """

    def __init__(self, allowed: np.ndarray):
        self.allowed = allowed
        self.row_cum = np.cumsum(allowed.sum(axis=1, dtype=np.int64))
        self.total = int(self.row_cum[-1]) if self.row_cum.size else 0

    def position(self, k: int):
        r = int(np.searchsorted(self.row_cum, k, side="right"))
        before = int(self.row_cum[r - 1]) if r else 0
        c = int(np.flatnonzero(self.allowed[r])[k - before])
        return r, c


@dataclass
class Reference:
    """One clean reference in memory with its training and validation positions."""

    name: str
    intensity: np.ndarray
    valid: np.ndarray
    log_mean: float
    train: PositionTable
    val: PositionTable


def _make_reference(name, intensity, valid, patch, min_fraction, val_rows, role):
    h, w = intensity.shape
    if h < patch or w < patch:
        raise ConfigError(f"config key data.patch_size: {patch} is larger than raster {name} ({w}x{h} pixels)")
    if not valid.any():
        raise RasterError(f"{name}: every pixel is nodata or invalid; nothing to train on")
    log_mean = float(np.mean(np.log(intensity[valid].astype(np.float64))))
    if role == "train":
        train_hi = h - val_rows if val_rows else h
        train = PositionTable(allowed_positions(valid, patch, min_fraction, 0, train_hi))
        val = PositionTable(allowed_positions(valid, patch, min_fraction, train_hi, h) if val_rows
                             else np.zeros((0, 0), bool))
    else:
        train = PositionTable(np.zeros((0, 0), bool))
        val = PositionTable(allowed_positions(valid, patch, min_fraction, 0, h))
    return Reference(name, intensity, valid, log_mean, train, val)


def augment(a: np.ndarray, k: int) -> np.ndarray:
    """The ``k``-th of the eight symmetries of the square (``0 <= k < 8``) applied to ``a``.

    A rotation by ``k % 4`` quarter turns, then a left-right flip for ``k >= 4``; a
    contiguous copy, so patches and masks transformed alike stay aligned.
    """
    a = np.rot90(a, k % 4)
    return np.ascontiguousarray(a[:, ::-1] if k >= 4 else a)


@dataclass(frozen=True)
class SpeckleDraw:
    """The speckle of one sample: looks, and the system response if correlated."""

    looks: float
    correlated: bool = False
    oversampling: tuple = (1.0, 1.0)
    taper: str = "none"

    def correlation(self) -> tuple:
        """Theoretical lag-1 intensity correlation (rows, cols) of this speckle (0 for white)."""
        if not self.correlated:
            return (0.0, 0.0)
        return (_lag1(self.oversampling[0], self.taper), _lag1(self.oversampling[1], self.taper))

    def expected(self, clean, target="system"):
        """The mean of the speckled image: ``clean`` seen through the system for correlated speckle.

        Correlated speckle's expected intensity is the reflectivity convolved with the
        intensity point-spread function ``|PSF|^2`` (:func:`despeck.speckle.psf_intensity_kernel`);
        a despeckler estimates that, not the unblurred reflectivity (which would ask it to
        deconvolve the sensor). ``target="reference"`` keeps the unblurred clean image.
        """
        if not self.correlated or target == "reference":
            return clean
        from scipy import signal

        from ..speckle import psf_intensity_kernel

        k = psf_intensity_kernel(oversampling=self.oversampling, taper=self.taper).astype(np.float32)
        h = k.shape[0] // 2
        padded = np.pad(clean, h, mode="symmetric")
        return np.maximum(signal.fftconvolve(padded, k, mode="valid"), 0).astype(np.float32)

    def apply(self, clean, rng):
        """Speckled version of ``clean`` (float32)."""
        if self.correlated:
            return simulate_correlated_intensity(clean, self.looks, rng=rng, oversampling=self.oversampling,
                                                 taper=self.taper).astype(np.float32)
        return (clean * gamma_speckle(clean.shape, self.looks, rng=rng)).astype(np.float32)


@functools.lru_cache(maxsize=4096)
def _lag1_cached(oversampling: float, taper: str) -> float:
    return float(intensity_correlation_theory(oversampling=oversampling, taper=taper, lags=(1,))[0])


def _lag1(oversampling, taper) -> float:
    return _lag1_cached(round(float(oversampling), 3), str(taper))


def draw_speckle(s, rng) -> SpeckleDraw:
    """Draw one sample's speckle from the ``speckle`` config section ``s``.

    Looks: fixed, or from the ``[min, max]`` range (uniform or log-uniform); a fraction
    ``correlated_fraction`` of the samples get correlated speckle, with oversampling
    drawn independently for rows and columns from the ``oversampling`` range and a
    taper drawn from the ``taper`` list.
    """
    looks = s.looks
    if isinstance(looks, list) and len(looks) == 2:
        lo, hi = float(looks[0]), float(looks[1])
        if s.looks_distribution == "log-uniform" and hi > lo:
            L = float(math.exp(rng.uniform(math.log(lo), math.log(hi))))
        else:
            L = float(rng.uniform(lo, hi))
    else:
        L = float(looks[0] if isinstance(looks, list) else looks)
    if not (s.correlated_fraction > 0 and rng.random() < s.correlated_fraction):
        return SpeckleDraw(L)
    overs = s.oversampling if isinstance(s.oversampling, list) else [s.oversampling, s.oversampling]
    os_r, os_c = (float(rng.uniform(overs[0], overs[-1])) for _ in range(2))
    tapers = s.taper if isinstance(s.taper, list) else [s.taper]
    taper = str(tapers[int(rng.integers(len(tapers)))])
    return SpeckleDraw(max(L, 1.0), True, (os_r, os_c), taper)


def told_condition(draw: SpeckleDraw, jitter: float, rng, dropout: float = 0.0):
    """The (looks, (rho_rows, rho_cols)) a conditioned network is told for ``draw``.

    With estimation-like noise ``jitter``; with probability ``dropout`` the correlation
    is withheld (``UNKNOWN_CORRELATION``), so the network learns to run blind too.
    """
    from ..models.wrapper import UNKNOWN_CORRELATION

    L = draw.looks * math.exp(jitter * float(rng.standard_normal())) if jitter else draw.looks
    rho = draw.correlation()
    if jitter:
        rho = tuple(min(max(r + jitter * float(rng.standard_normal()), 0.0), 1.0) for r in rho)
    if dropout and rng.random() < dropout:
        rho = (UNKNOWN_CORRELATION, UNKNOWN_CORRELATION)
    return float(L), tuple(float(r) for r in rho)


class EpochSampler(Sampler):
    """Yields ``(epoch, index)`` keys; Lightning calls :meth:`set_epoch` before each epoch.

    Alone (``world == 1``) it yields the indices ``0 .. length - 1``. One of ``world``
    processes training together (distributed data parallel) yields only its share of
    every global batch of ``batch_size`` keys: process ``rank`` takes indices
    ``s * batch_size + rank * b ... + b - 1`` of step ``s`` (``b = batch_size / world``),
    so the processes' batches together are exactly the batch a single process would
    draw at that step, and the samples -- pure functions of ``(seed, epoch, index)`` --
    do not depend on the number of processes. Incomplete last batches are left out.
    """

    def __init__(self, length: int, *, rank: int = 0, world: int = 1, batch_size: int | None = None):
        self.length = int(length)
        self.rank, self.world = int(rank), int(world)
        if not 0 <= self.rank < self.world:
            raise ValueError(f"rank {rank} is outside 0..{world - 1}")
        if self.world > 1 and (batch_size is None or int(batch_size) % self.world):
            raise ValueError(f"the global batch {batch_size} does not divide among {world} processes")
        self.batch_size = int(batch_size) if batch_size else None
        self.epoch = 0

    def set_epoch(self, epoch: int) -> None:
        self.epoch = int(epoch)

    def indices(self) -> list[int]:
        """This process's indices of one epoch, in order."""
        if self.world == 1:
            return list(range(self.length))
        b = self.batch_size // self.world
        return [s * self.batch_size + self.rank * b + j
                for s in range(self.length // self.batch_size) for j in range(b)]

    def __iter__(self):
        e = self.epoch
        return iter([(e, i) for i in self.indices()])

    def __len__(self):
        return self.length if self.world == 1 else (self.length // self.batch_size) * (self.batch_size // self.world)


class EpochPatches(Dataset):
    """Patch positions drawn so every epoch has the same size, whatever the number of sources.

    Each source has a ``train`` position table (``total`` positions, ``position(k)``).
    Sample ``(epoch, index)`` picks one position uniformly over all sources' positions
    from a generator seeded by ``(seed, 1, epoch, index)``, so a sample depends only on
    those numbers and a resumed run draws exactly what an uninterrupted one would.
    """

    def __init__(self, sources, config: TrainConfig):
        self.sources = [s for s in sources if s.train.total > 0]
        self.cum = np.cumsum([s.train.total for s in self.sources])
        self.config = config
        self.length = config.data.patches_per_epoch

    def __len__(self):
        return self.length

    def draw(self, key):
        """``(rng, source, row, col)`` for sample ``key`` (an ``(epoch, index)`` pair or an index)."""
        epoch, index = key if isinstance(key, tuple) else (0, int(key))
        rng = np.random.default_rng([self.config.trainer.seed, 1, int(epoch), int(index)])
        k = int(rng.integers(int(self.cum[-1])))
        f = int(np.searchsorted(self.cum, k, side="right"))
        source = self.sources[f]
        r0, c0 = source.train.position(k - (int(self.cum[f - 1]) if f else 0))
        return rng, source, r0, c0


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
        told = told_condition(draw, c.speckle.condition_jitter, rng, c.speckle.condition_dropout)
        return _as_item(noisy, clean, target, valid, looks, offset, told)


def _as_item(noisy, clean, target, valid, looks, offset, told=None):
    told_looks, told_corr = told if told is not None else (looks, (0.0, 0.0))
    return {
        "cond_looks": torch.tensor(told_looks, dtype=torch.float32),
        "cond_corr": torch.tensor(told_corr, dtype=torch.float32),
        "noisy": torch.from_numpy(np.ascontiguousarray(noisy, dtype=np.float32))[None],
        "clean": torch.from_numpy(np.ascontiguousarray(clean, dtype=np.float32))[None],
        "target": torch.from_numpy(np.ascontiguousarray(target, dtype=np.float32))[None],
        "valid": torch.from_numpy(np.ascontiguousarray(valid, dtype=bool))[None],
        "looks": torch.tensor(looks, dtype=torch.float32),
        "log_offset": torch.tensor(offset, dtype=torch.float32),
    }


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
        rng = np.random.default_rng([c.trainer.seed, 2])
        cum = np.cumsum([r.val.total for r in refs])
        looks = self.looks = float(validation_looks(c))
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
            items.append(_as_item(noisy, clean, target, valid, draw.looks, offset, told))
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


def validation_looks(config: TrainConfig) -> float:
    s = config.speckle
    if s.val_looks is not None:
        return float(s.val_looks)
    return float(min(s.looks) if isinstance(s.looks, list) else s.looks)


def _worker_init(_):
    # Workers generate patches; one thread each so they do not compete with the
    # training process's intra-op threads for the same cores.
    torch.set_num_threads(1)
    # A scheduler's SIGTERM or a terminal's Ctrl-C reaches every process of the group;
    # the training process turns it into a clean stop and shuts its workers down, so
    # workers must not die of it first (that makes the loader raise a traceback).
    import signal

    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    signal.signal(signal.SIGINT, signal.SIG_IGN)


class PatchLoaders:
    """Data loaders shared by every kind of training data: one epoch-sized sampler, fixed validation.

    Subclasses set ``config``, ``train_set`` and ``val_set``.
    """

    def train_dataloader(self, rank: int = 0, world: int = 1) -> DataLoader:
        """Training batches of process ``rank`` of ``world``: its ``batch_size / world`` share of each global batch."""
        d = self.config.data
        return DataLoader(
            self.train_set, batch_size=d.batch_size // world,
            sampler=EpochSampler(len(self.train_set), rank=rank, world=world, batch_size=d.batch_size),
            num_workers=d.num_workers, worker_init_fn=_worker_init if d.num_workers else None,
            persistent_workers=d.num_workers > 0, drop_last=True,
        )

    def val_dataloader(self, rank: int = 0, world: int = 1) -> DataLoader:
        """Validation batches of process ``rank`` of ``world``: every ``world``-th patch from ``rank`` on.

        The processes' means are combined weighted by their numbers of patches
        (Lightning's ``sync_dist``), so the epoch's measure is that of the whole set.
        """
        sampler = None if world == 1 else list(range(rank, len(self.val_set), world))
        return DataLoader(self.val_set, batch_size=self.config.data.batch_size, shuffle=False, sampler=sampler)


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
            references.append(_make_reference(name, intensity, valid, p, d.min_valid_fraction, val_rows, role))

        train_paths = resolve_raster_paths(d.train, "data.train") if d.train else []
        val_paths = resolve_raster_paths(d.validation, "data.validation") if d.validation else []
        for role, paths in (("train", train_paths), ("val", val_paths)):
            for path in paths:
                intensity, valid = _read_reference(path, d.units, d.band)
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
                valid = np.isfinite(scene) & (scene > 0)
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


def _read_reference(path, units, band):
    from ..raster import read_scene

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            scene = read_scene(path, units=units, band=band)
    except DespeckError:
        raise
    except (OSError, ValueError) as exc:
        raise RasterError(f"{path}: cannot read ({exc})") from None
    intensity = np.asarray(scene.intensity, dtype=np.float32)
    valid = np.asarray(scene.valid, dtype=bool) & np.isfinite(intensity) & (intensity > 0)
    return intensity, valid
