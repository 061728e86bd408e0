"""Drawing patches: allowed positions, the epoch sampler and the loaders shared by every kind of data.

A patch's top-left corner may only be drawn where its square is valid enough
(:func:`allowed_positions`); :class:`PositionTable` draws uniformly among those
corners without listing them. Every sample is a pure function of ``(seed, epoch,
index)``: :class:`EpochSampler` yields ``(epoch, index)`` keys (a distributed run's
process only its share of every global batch), and :class:`EpochPatches` seeds a fresh
numpy generator from them and picks a position over all sources, so an epoch has the
same size whatever the number of files and a resumed run draws what an uninterrupted
one would. :func:`patch_item` packs one sample as the tensors a training step takes;
:class:`PatchLoaders` makes the training and validation loaders.
"""

from __future__ import annotations

import math

import numpy as np
import torch
from torch.utils.data import DataLoader, Dataset, Sampler

from .config import TrainConfig

__all__ = ["allowed_positions", "PositionTable", "augment", "EpochSampler", "EpochPatches", "patch_item",
           "quiet_when_the_trainer_left",
           "PatchLoaders"]


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


def augment(a: np.ndarray, k: int) -> np.ndarray:
    """The ``k``-th of the eight symmetries of the square (``0 <= k < 8``) applied to ``a``.

    A rotation by ``k % 4`` quarter turns, then a left-right flip for ``k >= 4``; a
    contiguous copy, so patches and masks transformed alike stay aligned.
    """
    a = np.rot90(a, k % 4)
    return np.ascontiguousarray(a[:, ::-1] if k >= 4 else a)


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


def patch_item(noisy, target, valid, looks, offset, told=None, *, clean=None, weight=None) -> dict:
    """One sample as the tensors a training step takes (each image ``(1, p, p)``, the rest scalars).

    ``noisy`` is the network's input and ``target`` what the loss compares with;
    ``valid`` marks the pixels of the input. ``looks`` are the target's looks (for the
    log-target correction) and ``offset`` the input's log normalisation. ``told`` is the
    ``(looks, (rho_rows, rho_cols))`` a conditioned network is told (default: ``looks``
    and white speckle). ``clean`` (the reference, for PSNR and SSIM) and ``weight`` (1
    where a pixel enters the loss) are included when given.
    """
    told_looks, told_corr = told if told is not None else (looks, (0.0, 0.0))
    item = {
        "cond_looks": torch.tensor(told_looks, dtype=torch.float32),
        "cond_corr": torch.tensor(tuple(told_corr), dtype=torch.float32),
        "noisy": torch.from_numpy(np.ascontiguousarray(noisy, dtype=np.float32))[None],
    }
    if clean is not None:
        item["clean"] = torch.from_numpy(np.ascontiguousarray(clean, dtype=np.float32))[None]
    item["target"] = torch.from_numpy(np.ascontiguousarray(target, dtype=np.float32))[None]
    item["valid"] = torch.from_numpy(np.ascontiguousarray(valid, dtype=bool))[None]
    if weight is not None:
        item["weight"] = torch.from_numpy(np.ascontiguousarray(weight, dtype=np.float32))[None]
    item["looks"] = torch.tensor(looks, dtype=torch.float32)
    item["log_offset"] = torch.tensor(offset, dtype=torch.float32)
    return item


def _worker_init(_):
    # Workers generate patches; one thread each so they do not compete with the
    # training process's intra-op threads for the same cores.
    torch.set_num_threads(1)
    # A scheduler's SIGTERM or a terminal's Ctrl-C reaches every process of the group;
    # the training process turns it into a clean stop and shuts its workers down, so
    # workers must not die of it first (that makes the loader raise a traceback).
    import signal
    import threading

    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # A worker hands its batches' shared memory to the training process through
    # multiprocessing's resource sharer, a thread that serves file descriptors. When the
    # training process stops (a signal, the end of training) in the middle of such a hand-
    # over, that thread finds the connection closed and would print a traceback that is
    # not an error of anyone's: the other side is simply gone.
    threading.excepthook = quiet_when_the_trainer_left(threading.excepthook)


def quiet_when_the_trainer_left(previous):
    """A :data:`threading.excepthook` that drops the connection errors of multiprocessing's
    resource sharer (the training process went away mid-handover) and passes every other
    exception to ``previous``."""

    def hook(args):
        if issubclass(args.exc_type, (ConnectionError, EOFError)) and _raised_in_resource_sharer(args.exc_traceback):
            return
        previous(args)

    return hook


def _raised_in_resource_sharer(tb) -> bool:
    while tb is not None:
        if tb.tb_frame.f_code.co_filename.endswith("resource_sharer.py"):
            return True
        tb = tb.tb_next
    return False


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
