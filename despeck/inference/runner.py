"""Running batches of tiles through a model on the CPU: torch threads, memory format, bfloat16.

Speed settings: torch threads (default all cores available to the process),
``torch.inference_mode``, denormals flushed to zero, channels-last memory format only
when a timing on a crop of the first tile shows it is faster, and bfloat16 autocast on
CPUs with native bf16 instructions (:func:`despeck.cpu.bf16_supported`) for models
calibrated in bfloat16 (:func:`resolve_bf16`).
"""

from __future__ import annotations

import contextlib
import time
import warnings

import numpy as np
import torch

from ..cpu import bf16_supported, precision_of, usable_cores
from .tiles import InferenceWarning, positive_int

__all__ = ["BATCH_PIXELS", "TRIAL_MIN_PIXELS", "TRIAL_SIDE", "torch_settings", "TileRunner", "resolve_bf16",
           "run_options", "run_settings"]

# Pixels per batch the default batch size aims for: enough work per call to keep both
# cores busy, small enough that a 64-channel network's activations stay a few hundred MB
# (a 40-channel network in channels-last needs about 330 MB per megapixel).
BATCH_PIXELS = 1 << 19

# Below this many pixels a timing of the two memory formats costs more than it can save
# (the trial runs about 0.1 megapixel). Channels-last was 1.4-1.9x faster than contiguous
# for the three starters of the project's history on 160-816 pixel tiles (torch 2.13, two
# AVX-512 cores), so scenes of one megapixel and more take the trial.
TRIAL_MIN_PIXELS = 1_000_000
# Side of the crop timed in each format: big enough for the convolution kernels to
# behave as on whole tiles, small enough to cost well under 1 % of a large scene.
TRIAL_SIDE = 160


@contextlib.contextmanager
def torch_settings(threads):
    """Inside: ``threads`` torch threads, denormals flushed to zero, ``torch.inference_mode``; restored after."""
    old_threads = torch.get_num_threads()
    torch.set_num_threads(threads)
    # Denormal activations (from tiny weights times tiny values) can slow x86 float
    # arithmetic by orders of magnitude; they carry no information here.
    torch.set_flush_denormal(True)
    try:
        with torch.inference_mode():
            yield
    finally:
        torch.set_flush_denormal(False)
        torch.set_num_threads(old_threads)


class TileRunner:
    """Runs batches of tiles through the model with the chosen speed settings.

    When ``channels_last`` is None and the scene is large enough for it to matter, the
    first call times both memory formats on a crop of at most 160 x 160 pixels of its
    first tile (a warm-up and a timed run each) and keeps the faster one; small scenes
    keep the default (contiguous) format.
    """

    def __init__(self, model, *, log_offset, bf16, channels_last, total_pixels=None, looks=None, correlation=None,
                 orientations=1):
        self.model = model
        self.orientations = orientations
        self.log_offset = log_offset
        self.condition = {} if looks is None else {"looks": looks, "correlation": correlation}
        self.bf16 = bf16
        if channels_last is None and total_pixels is not None and total_pixels < TRIAL_MIN_PIXELS:
            channels_last = False
        self.channels_last = channels_last
        self._converted = False

    def _set_format(self, cl):
        fmt = torch.channels_last if cl else torch.contiguous_format
        self.model.to(memory_format=fmt)
        self._converted = self._converted or cl

    def restore(self):
        if self._converted:
            self.model.to(memory_format=torch.contiguous_format)

    def _choose_format(self, tiles):
        h, w = min(TRIAL_SIDE, tiles.shape[1]), min(TRIAL_SIDE, tiles.shape[2])
        crop = np.ascontiguousarray(tiles[:1, :h, :w])
        seconds = {}
        for cl in (False, True, False, True):  # the second round, warm, is the one kept
            self._set_format(cl)
            start = time.perf_counter()
            self._forward(crop, cl)
            seconds[cl] = time.perf_counter() - start
        self.channels_last = seconds[True] < seconds[False]
        self._set_format(self.channels_last)

    def __call__(self, tiles: np.ndarray) -> np.ndarray:
        if self.channels_last is None:
            self._choose_format(tiles)
        elif self.channels_last and not self._converted:
            self._set_format(True)
        return self._forward(tiles, self.channels_last)

    def _forward(self, tiles, cl):
        # Invalid pixels arrive as 0 intensity, which the Despeckler always treats as
        # invalid (non-positive), so no separate mask is needed.
        x = torch.from_numpy(tiles).unsqueeze(1)
        if cl:
            x = x.contiguous(memory_format=torch.channels_last)
        with torch.autocast("cpu", dtype=torch.bfloat16, enabled=self.bf16):
            y = self.model(x, log_offset=self.log_offset, orientations=self.orientations, **self.condition)
        return y.to(torch.float32).squeeze(1).contiguous().numpy()


def resolve_bf16(model, bf16=None, *, stacklevel=3) -> bool:
    """Whether the network runs under bfloat16 autocast: ``bf16`` True, False or None (automatic).

    Automatic (None) means bfloat16 exactly when both hold: this CPU has native bf16
    instructions (:func:`despeck.cpu.bf16_supported`; emulated bf16 is slower than
    float32) and the model carries a bias table measured in bfloat16
    (``Despeckler.bf16_calibrated``), so the arithmetic cannot move the mean
    backscatter. True asks for bfloat16: on a CPU without native instructions it warns
    and runs in float32; on a model without a bfloat16 table it warns that the mean may
    shift by a few hundredths of a dB and runs in bfloat16. False is float32.
    """
    if bf16 is None:
        return bool(bf16_supported() and getattr(model, "bf16_calibrated", False))
    if not bf16:
        return False
    if not bf16_supported():
        warnings.warn("bf16 requested but this CPU has no native bfloat16 instructions; running in float32",
                      InferenceWarning, stacklevel=stacklevel)
        return False
    if not getattr(model, "bf16_calibrated", False):
        warnings.warn("bf16 requested for a model without a bias calibration in bfloat16 (log_bias_table_bf16): "
                      "its mean backscatter may be off by a few hundredths of a dB",
                      InferenceWarning, stacklevel=stacklevel)
    return True


def run_options(bf16: bool, orientations: int = 1) -> dict:
    """How the network ran, for the output's ``despeck_options`` tag: precision, and orientations when more than one."""
    options = {"precision": precision_of(bf16)}
    if orientations != 1:
        options["orientations"] = int(orientations)
    return options


def run_settings(model, threads, bf16, batch_size, grid):
    """``(threads, bf16, batch_size)`` checked, with their defaults (all usable cores, about half a megapixel a batch).

    ``bf16`` is resolved by :func:`resolve_bf16` (None: automatic).
    """
    threads = positive_int("threads", threads) or usable_cores()
    use_bf16 = resolve_bf16(model, bf16, stacklevel=4)
    if batch_size is None:
        tr, tc = grid.tile_shape
        batch_size = max(1, min(grid.cols.count, BATCH_PIXELS // (tr * tc)))
    batch_size = positive_int("batch_size", batch_size)
    return threads, use_bf16, batch_size
