"""The thin LightningModule: a plain network inside the intensity wrapper, a loss, an optimiser.

All the despeckling logic lives elsewhere -- the network in :mod:`despeck.models`, the
normalisation and bias correction in :class:`despeck.models.Despeckler`, the loss in
:mod:`despeck.training.losses`, the data in :mod:`despeck.training.data`. This module
only wires them into Lightning's steps and logs the validation measures: loss, PSNR and
SSIM in the dB domain, and the ENL and radiometric bias of the output on a homogeneous
validation patch. Training on pairs of real looks has no clean reference: then only the
loss, the ENL of the output on homogeneous blocks of the held-out strips and the mean
ratio input / output are logged (no PSNR or SSIM), as the validation set measures them
(:class:`despeck.training.pairs.PairValidationSet`).
"""

from __future__ import annotations

import math

import lightning.pytorch as pl
import numpy as np
import torch

from ..models import Despeckler
from ..speckle import enl_intensity
from .config import LossConfig, OptimConfig
from .losses import DespeckleLoss, validation_fidelity

__all__ = ["DespeckleModule", "CHECKPOINT_FORMAT", "CHECKPOINT_VERSION"]

CHECKPOINT_FORMAT = "despeck-checkpoint"
CHECKPOINT_VERSION = 1


class DespeckleModule(pl.LightningModule):
    """Train ``network`` (normalised log in, normalised log out) on speckled patches.

    Parameters
    ----------
    network : nn.Module
        From :func:`despeck.models.create_model`.
    looks : float or [float, float]
        Looks the network is trained for (recorded in the model).
    log_scale : float
        Normalisation scale of the wrapper, nepers per unit.
    loss, optim : LossConfig, OptimConfig
    max_epochs : int, optional
        Length of a cosine schedule.
    validation : ValidationSet or PairValidationSet, optional
        Supplies the dB data range, the homogeneous patch and the noisy input's PSNR;
        a set whose ``has_reference`` is False measures the output itself (``measure``).
    """

    def __init__(self, network, *, looks, log_scale, loss: LossConfig, optim: OptimConfig,
                 max_epochs=None, validation=None):
        super().__init__()
        self.despeckler = Despeckler(network, looks=looks, log_scale=log_scale)
        self.loss_fn = DespeckleLoss(loss.name, loss.target, loss.tv_weight, loss.looks_balance)
        self.optim = optim
        self.max_epochs = max_epochs
        self.validation = validation
        self._val_batches = []
        self.val_metrics = {}

    @property
    def network(self):
        return self.despeckler.network

    def setup(self, stage=None):
        # Channels-last convolutions run about 1.5x faster on CPU (oneDNN) for these
        # small networks (measured in benchmarks/bench_training.py); values are unchanged.
        # Here, before a distributed run wraps the network, so its gradient buckets
        # take the same memory layout.
        self.network.to(memory_format=torch.channels_last)

    def predict_log(self, batch):
        """Natural-log intensity estimate for a batch (float32, no bias added: ``log_bias`` is 0)."""
        d = self.despeckler
        z, off, _ = d.normalise(batch["noisy"], batch["valid"], batch["log_offset"])
        cond = None
        if d.conditioned:
            n = z.shape[0]
            looks = batch.get("cond_looks", batch.get("looks"))
            cond = d.condition(n, None if looks is None else looks.detach().cpu(),
                               None if batch.get("cond_corr") is None else batch["cond_corr"].detach().cpu(),
                               device=z.device)
        y = d.run_network(z, cond, channels_last=True)
        return d.denormalise(y.float(), off, 0.0)

    def training_step(self, batch, batch_idx):
        loss = self.loss_fn(self.predict_log(batch), batch)
        n = batch["noisy"].shape[0]
        self.log("train_loss", loss, on_step=True, on_epoch=True, prog_bar=True, batch_size=n, sync_dist=True)
        return loss

    def validation_step(self, batch, batch_idx):
        pred = self.predict_log(batch)
        loss = self.loss_fn(pred, batch)
        self.log("val_loss", loss, on_epoch=True, prog_bar=True, batch_size=batch["noisy"].shape[0], sync_dist=True)
        if "clean" in batch:
            self._val_batches.append((batch["clean"].cpu(), torch.exp(pred).cpu(), batch["valid"].cpu()))

    def on_validation_epoch_start(self):
        self._val_batches = []

    def on_validation_epoch_end(self):
        if self.validation is not None and not getattr(self.validation, "has_reference", True):
            metrics = self.validation.measure(self.despeckler, self.loss_fn.name)
            for k, v in metrics.items():
                self.log(k, v, prog_bar=k == "val_enl", sync_dist=True)
            self.val_metrics = {**metrics, "epoch": int(self.current_epoch), "step": int(self.global_step)}
            return
        if self.validation is None or not self._val_batches and self._world_size() == 1:
            return
        psnr, ssim = [], []
        for clean, est, valid in self._val_batches:
            for c, e, v in zip(clean[:, 0].numpy(), est[:, 0].numpy(), valid[:, 0].numpy()):
                p, s = validation_fidelity(c, e, v, self.validation.db_range)
                psnr.append(p)
                ssim.append(s)
        self._val_batches = []
        h = self.validation.homogeneous
        with torch.no_grad():
            out = self.despeckler(h["noisy"].to(self.device), h["valid"].to(self.device),
                                  h["log_offset"].to(self.device))[:, 0].double().cpu().numpy()
        # Ignore a margin of half the receptive field: border pixels see zero padding.
        m = min(self.despeckler.receptive_field // 2, out.shape[-1] // 4)
        core = out[:, m:out.shape[1] - m, m:out.shape[2] - m]
        R = h["reflectivity"]
        # A log-MSE estimate is unbiased for the geometric mean of a homogeneous area; its
        # arithmetic mean is higher (by about exp(s^2/2) for log variance s^2). The exported
        # model removes that excess, measured on three constant patches; the fourth reports
        # the remaining bias. The Gamma NLL estimates the mean directly: no correction.
        log_bias = -math.log(core[:3].mean() / R) if self.loss_fn.name == "mse_log" else 0.0
        core = core * math.exp(log_bias)
        metrics = {
            "val_psnr_db": self._global_nanmean(psnr),
            "val_ssim_db": self._global_nanmean(ssim),
            "val_psnr_noisy_db": float(self.validation.noisy_psnr_db),
            "val_enl": float(min(np.mean([enl_intensity(c) for c in core]), 1e6)),
            "val_bias_db": float(10 * math.log10(core[3].mean() / R)),
            "val_log_bias": float(log_bias),
        }
        for k, v in metrics.items():
            self.log(k, v, prog_bar=k == "val_psnr_db", sync_dist=True)
        self.val_metrics = {**metrics, "epoch": int(self.current_epoch), "step": int(self.global_step)}

    def _world_size(self) -> int:
        try:
            return int(self.trainer.world_size)
        except RuntimeError:  # not attached to a trainer
            return 1

    def _global_nanmean(self, values) -> float:
        """Mean of the finite ``values`` of every process (each validates a share of the patches)."""
        a = np.asarray(values, dtype=np.float64)
        ok = np.isfinite(a)
        totals = torch.tensor([a[ok].sum(), float(ok.sum())], dtype=torch.float64)
        if self._world_size() > 1:
            totals = self.trainer.strategy.reduce(totals, reduce_op="sum")
        return float(totals[0] / totals[1]) if totals[1] > 0 else float("nan")

    def configure_optimizers(self):
        o = self.optim
        opt = torch.optim.Adam(self.parameters(), lr=o.lr, weight_decay=o.weight_decay)
        if o.schedule == "constant":
            return opt
        if o.schedule == "cosine":
            sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=int(self.max_epochs), eta_min=o.min_lr)
            return {"optimizer": opt, "lr_scheduler": {"scheduler": sched, "interval": "epoch"}}
        sched = torch.optim.lr_scheduler.ReduceLROnPlateau(
            opt, mode="min", factor=o.plateau_factor, patience=o.plateau_patience, min_lr=o.min_lr)
        return {"optimizer": opt, "lr_scheduler": {"scheduler": sched, "monitor": "val_loss", "interval": "epoch"}}

    def on_save_checkpoint(self, checkpoint):
        # Marks our checkpoints so resuming can refuse foreign ones, and keeps the
        # validation measures of the epoch with the weights they describe.
        net = self.network
        checkpoint["despeck"] = {
            "format": CHECKPOINT_FORMAT,
            "format_version": CHECKPOINT_VERSION,
            "architecture": getattr(net, "architecture", None),
            "kwargs": getattr(net, "architecture_kwargs", None),
            "metrics": dict(self.val_metrics),
        }
