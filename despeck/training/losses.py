"""Training losses in the log domain and the validation measures in decibels.

The network's estimate enters every loss as a natural-log intensity ``y_hat``
(nepers). Losses and what their minimiser is (which fixes the bias correction the
exported model needs; see :mod:`despeck.models.wrapper`):

* ``gamma_nll`` -- ``exp(t - y_hat) - (t - y_hat) - 1`` with ``t`` the log target: the
  Gamma negative log-likelihood ``y_hat + I exp(-y_hat)`` shifted by its minimum so it
  is zero for a perfect estimate (a Gamma deviance). Minimised at
  ``y_hat = ln E[I_target | input]``: the linear output estimates the mean intensity,
  no correction needed, whether the target is clean or noisy.
* ``mse_log`` -- ``(y_hat - t)^2``. Against the clean log it is minimised at
  ``E[ln R | input]`` (no correction; geometric-mean unbiased on homogeneous areas).
  Against a noisy L-look log target it would converge to ``ln R + psi(L) - ln L``, so the
  target gets ``ln L - psi(L)`` added per sample (exact also when L varies per sample).
* optional ``tv_weight`` times the mean absolute log difference between neighbours.
* optional ``looks_balance`` (gamma in [0, 1]): each sample's pixels weigh
  ``psi_1(L) ** -gamma``, with ``psi_1(L)`` the variance of the log of L-look Gamma
  speckle (the trigamma function; Xie, Pierce, Ulaby 2002, "Statistical properties of
  logarithmically transformed speckle", IEEE TGRS 40(3)). With a looks range, a plain
  mean is dominated by the low-look samples, whose errors are many times larger
  (psi_1(1) = 1.64, psi_1(16) = 0.064); gamma = 1 divides each sample's error by its
  speckle's log variance, so every looks level counts by its relative improvement.
  The weights change which samples matter, not what an unbiased estimate is: the
  minimiser for each sample, and so the bias correction, are unchanged.

Every loss averages over a per-pixel ``mask``: booleans (nodata left out) or float
weights (0 leaves a pixel out, e.g. a pixel that changed between the two dates of a
pair; see :mod:`despeck.training.pairs`). A batch with a ``weight`` entry uses it,
otherwise its ``valid`` mask.

Validation PSNR and SSIM are the benchmarks' own dB-domain measures
(:func:`despeck.metrics.fidelity_db`: ``10 log10`` intensities clipped to one fixed dB
range, the validation references' 1st to 99.9th percentiles, with the same masking), so
training logs and benchmark reports compare.

References
----------
Chierchia, G., Cozzolino, D., Poggi, G., Verdoliva, L. (2017). SAR image despeckling
through convolutional neural networks. IGARSS 2017, arXiv:1704.00275.
Wang, P., Zhang, H., Patel, V. M. (2017). SAR image despeckling using a convolutional
neural network. IEEE SPL 24(12), 1763-1767 (L2 + total-variation loss).
Lehtinen, J. et al. (2018). Noise2Noise: learning image restoration without clean data.
ICML 2018, arXiv:1803.04189.
"""

from __future__ import annotations

import math

import numpy as np
import torch
from torch import nn

from ..errors import InputError
from ..metrics import fidelity_db

__all__ = [
    "gamma_nll",
    "log_mse",
    "total_variation",
    "log_target",
    "DespeckleLoss",
    "validation_fidelity",
]

# exp(d) with d above this would overflow float32 gradients; targets that bright relative
# to the estimate (e^30 ~ 130 dB) only occur with corrupt data.
_MAX_LOG_GAP = 30.0


def _masked_mean(values, mask):
    """Mean of ``values`` weighted by ``mask`` (bool or non-negative float weights)."""
    if mask is None:
        return values.mean()
    m = mask.to(values.dtype)
    # where() rather than a product: a left-out pixel may hold a huge value (a zero target).
    return torch.where(m > 0, values * m, torch.zeros_like(values)).sum() / m.sum().clamp(min=1.0)


def gamma_nll(pred_log, target_log, mask=None):
    """Gamma deviance ``exp(d) - d - 1``, ``d = target_log - pred_log``, averaged over ``mask`` (bool or weights)."""
    d = (target_log - pred_log).clamp(max=_MAX_LOG_GAP)
    return _masked_mean(torch.expm1(d) - d, mask)


def log_mse(pred_log, target_log, mask=None):
    """Mean squared log difference (nepers squared) over ``mask`` (bool or weights)."""
    return _masked_mean((pred_log - target_log) ** 2, mask)


def total_variation(pred_log, mask=None):
    """Mean absolute difference between horizontal and vertical neighbours (both in ``mask``)."""
    dx = (pred_log[..., :, 1:] - pred_log[..., :, :-1]).abs()
    dy = (pred_log[..., 1:, :] - pred_log[..., :-1, :]).abs()
    if mask is None:
        return dx.mean() + dy.mean()
    mask = mask > 0
    mx = mask[..., :, 1:] & mask[..., :, :-1]
    my = mask[..., 1:, :] & mask[..., :-1, :]
    return _masked_mean(dx, mx) + _masked_mean(dy, my)


def log_target(batch, loss_name: str, target: str):
    """The log target for ``loss_name`` and ``target`` ('clean' or 'noisy'), bias-corrected where needed."""
    tiny = float(np.finfo(np.float32).tiny)
    t = torch.log(batch["target"].clamp(min=tiny))
    if target == "noisy" and loss_name == "mse_log":
        looks = batch["looks"].to(t.dtype).reshape(-1, 1, 1, 1)
        # ln L - psi(L): Chierchia et al. (2017), SAR image despeckling through CNNs; per sample.
        t = t + torch.log(looks) - torch.special.digamma(looks)
    return t


class DespeckleLoss(nn.Module):
    """The configured training loss on a batch; ``forward(pred_log, batch) -> scalar``.

    Parameters
    ----------
    name : {'gamma_nll', 'mse_log'}
    target : {'clean', 'noisy'}
    tv_weight : float
    looks_balance : float in [0, 1]
        Exponent gamma of the per-sample weight ``psi_1(L) ** -gamma`` (0: plain mean).
    """

    def __init__(self, name="gamma_nll", target="clean", tv_weight=0.0, looks_balance=0.0):
        super().__init__()
        if name not in ("gamma_nll", "mse_log"):
            raise InputError(f"loss must be 'gamma_nll' or 'mse_log', got {name!r}")
        if target not in ("clean", "noisy"):
            raise InputError(f"loss target must be 'clean' or 'noisy', got {target!r}")
        if not 0.0 <= float(looks_balance) <= 1.0:
            raise InputError(f"loss looks_balance must be between 0 and 1, got {looks_balance!r}")
        self.name, self.target, self.tv_weight = name, target, float(tv_weight)
        self.looks_balance = float(looks_balance)
        self._fn = gamma_nll if name == "gamma_nll" else log_mse

    def forward(self, pred_log, batch):
        # Per-pixel weights where the data give them (pairs: 0 on changed pixels).
        mask = batch["weight"] if "weight" in batch else batch["valid"]
        t = log_target(batch, self.name, self.target)
        loss = self._fn(pred_log, t, self._balanced(mask, batch, pred_log.dtype))
        if self.tv_weight:
            loss = loss + self.tv_weight * total_variation(pred_log, mask)
        return loss

    def _balanced(self, mask, batch, dtype):
        """``mask`` times each sample's ``psi_1(L) ** -looks_balance`` (the mask itself when 0)."""
        if not self.looks_balance:
            return mask
        looks = batch["looks"].to(dtype).reshape(-1, 1, 1, 1)
        weight = torch.special.polygamma(1, looks) ** -self.looks_balance
        return mask.to(dtype) * weight

    def describe(self) -> dict:
        return {
            "loss": self.name,
            "target": self.target,
            "tv_weight": self.tv_weight,
            "looks_balance": self.looks_balance,
            "bias_correction": (
                "none needed (the estimate is the conditional mean intensity)" if self.name == "gamma_nll"
                else "ln L - psi(L) added to the noisy log target per sample (L: the target's looks)"
                if self.target == "noisy"
                else "learned by the network (geometric mean unbiased)"
            ) + ("; exported log_bias = -ln(mean output / R) on constant validation patches, so the "
                 "arithmetic mean is kept too" if self.name == "mse_log" else ""),
        }


def validation_fidelity(clean, estimate, valid, db_range) -> tuple[float, float]:
    """dB-domain PSNR and SSIM of one validation patch, measured as the benchmarks measure a scene.

    :func:`despeck.metrics.fidelity_db` with the validation set's fixed ``db_range``
    (``(low, high)`` in dB): pixels valid and positive in both images, dB values clipped
    to the range, peak ``high - low``, SSIM over the 7 x 7 windows of valid pixels. A
    patch that cannot be measured (no valid pixel, no whole valid SSIM window) gives
    NaN for both, which the epoch's mean leaves out.

    Returns
    -------
    (psnr_db, ssim_db)
    """
    try:
        measured = fidelity_db(clean, estimate, valid, db_range=db_range)
    except InputError:
        return math.nan, math.nan
    return float(measured["psnr_db"]), float(measured["ssim_db"])
