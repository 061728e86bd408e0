"""The intensity-in, intensity-out wrapper around a log-domain network.

A :class:`Despeckler` owns everything between linear SAR intensity and the plain
network: the log transform, the handling of invalid (nodata) pixels, the
calibration-independent normalisation and the bias correction. Networks only ever
see ``z = (ln I - log_offset) / log_scale``, where ``log_offset`` is the mean
log-intensity of the scene's valid pixels; multiplying a scene by any gain ``c``
shifts ``ln I`` and ``log_offset`` by the same ``ln c``, so ``z`` and hence the
estimate's shape are unchanged and the output scales by ``c``. That is what lets one
model work on calibrated backscatter anywhere between 1e-4 and 10.

Bias correction (what the wrapper's ``log_bias`` must be, per training loss, for the
output to keep the mean backscatter of homogeneous areas):

* Gamma negative log-likelihood-type loss ``y + I exp(-y)``: its minimiser is
  ``y = ln E[I | context]``, so ``exp(y)`` already estimates the mean intensity;
  ``log_bias = 0``.
* Squared error on the log against a **noisy** log target (an independent L-look
  view): the minimiser is ``E[ln I] = ln R + psi(L) - ln L``; the correction
  ``ln L - psi(L)`` (:func:`despeck.speckle.log_bias_correction`) must be added. The
  trainer adds it to the target per sample (exact also when the looks vary between
  samples); a network trained against uncorrected noisy log targets with fixed L needs
  ``log_bias = ln L - psi(L)`` here.
* Squared error on the log against the **clean** log target: the minimiser is
  ``E[ln R | context]``; the network learns the ``psi(L) - ln L`` offset itself.

For both squared-error variants the log estimate is unbiased on a homogeneous area, so
the *geometric* mean of the output equals R; the arithmetic mean is higher by about
``exp(s^2 / 2)``, where ``s^2`` is the variance of the log output over the area
(log-normal approximation; 1-3 % for a well-smoothed 1-look area). The trainer measures
that excess on simulated constant validation patches and exports
``log_bias = -ln(mean output / R)`` so the mean backscatter is kept.

References
----------
Chierchia, G., Cozzolino, D., Poggi, G., Verdoliva, L. (2017). SAR image despeckling
through convolutional neural networks. IGARSS 2017, arXiv:1704.00275.
"""

from __future__ import annotations

import math

import numpy as np
import torch
import torch.nn.functional as F
from scipy import special
from torch import nn

from ..errors import InputError
from ..speckle import check_looks, check_looks_range
from .orientations import average_over_orientations

__all__ = ["Despeckler", "DEFAULT_LOG_SCALE", "CONDITION_CHANNELS", "UNKNOWN_CORRELATION"]

# Two nepers (~8.7 dB) per unit: 1-look speckle has a log standard deviation of
# pi / sqrt(6) ~ 1.28 and scene contrast is a few nepers, so normalised values stay
# within a few units -- a comfortable range for ReLU networks (common practice).
DEFAULT_LOG_SCALE = 2.0

# Smallest intensity used before the log; valid pixels are positive anyway, this only
# keeps masked-out zeros finite before they are replaced by the fill value.
_TINY = float(np.finfo(np.float32).tiny)
# Windows of the point-target guard: the target's own 5 x 5 neighbourhood and the
# 15 x 15 window whose ring (outside the 5 x 5) gives the local clutter level.
POINT_INNER, POINT_OUTER = 5, 15


#: Conditioning planes of looks-aware networks: the normalised log-speckle standard
#: deviation ``sqrt(psi_1(L)) / log_scale`` and the lag-1 intensity correlation of the
#: speckle down rows and along columns.
CONDITION_CHANNELS = 3
#: Value of the correlation planes when the scene's correlation is not known reliably.
UNKNOWN_CORRELATION = -1.0


def _ring_counts(shape, dtype, device):
    """Pixels of the point test's ring around each pixel of an all-valid ``shape`` tile, zero padding outside it.

    Separable: a k x k box holds ``rows(k) * cols(k)`` pixels, the numbers of rows and
    columns of the box inside the tile.
    """
    def inside(n, k):
        i = torch.arange(n, device=device, dtype=dtype)
        return (i + k // 2).clamp(max=n - 1) - (i - k // 2).clamp(min=0) + 1

    h, w = shape
    outer = inside(h, POINT_OUTER)[:, None] * inside(w, POINT_OUTER)[None, :]
    inner = inside(h, POINT_INNER)[:, None] * inside(w, POINT_INNER)[None, :]
    return outer - inner


def _under_bf16_autocast() -> bool:
    """True inside ``torch.autocast("cpu", dtype=torch.bfloat16)``."""
    return torch.is_autocast_enabled("cpu") and torch.get_autocast_dtype("cpu") == torch.bfloat16


def _check_bias_table(table, name="log_bias_table"):
    if table is None:
        return None
    try:
        looks = [float(v) for v in table["looks"]]
        corr = [float(v) for v in table["corr"]]
        values = [[float(v) for v in row] for row in table["values"]]
    except (KeyError, TypeError, ValueError):
        raise InputError(f"{name} must hold 'looks', 'corr' and 'values' lists of numbers") from None
    if (not looks or not corr or len(values) != len(looks) or any(len(r) != len(corr) for r in values)
            or any(b <= a for a, b in zip(looks, looks[1:])) or any(b <= a for a, b in zip(corr, corr[1:]))
            or looks[0] <= 0):
        raise InputError(f"{name} must have increasing positive looks, increasing corr "
                         "and a looks x corr grid of values")
    if not all(math.isfinite(v) and abs(v) < 2.0 for row in values for v in row):
        raise InputError(f"{name} values must be finite and below 2 nepers in size")
    return {"looks": looks, "corr": corr, "values": values}


class Despeckler(nn.Module):
    """Linear intensity in, linear intensity out, around a normalised log-domain network.

    Parameters
    ----------
    network : nn.Module
        Maps normalised log-intensity ``(N, 1, H, W)`` to an estimate of the same shape
        (see :func:`despeck.models.create_model`); must expose ``receptive_field``.
    looks : float or [float, float]
        Number of looks the network was trained for (a range if trained on several).
    log_bias : float
        Added to the log estimate before exponentiating; see the module notes for the
        value each training loss needs.
    log_scale : float
        Nepers per normalised unit (default :data:`DEFAULT_LOG_SCALE`).
    metadata : dict, optional
        Free-form, JSON-serialisable description kept with the model (training data,
        metrics, ...); written into model files.
    point_false_alarm : float, optional
        Keep strong isolated scatterers unfiltered (``None``: off). A valid pixel whose
        intensity exceeds ``t`` times the mean of the valid pixels in the ring between
        its 5 x 5 and 15 x 15 neighbourhoods is passed through as it is, ``t`` being the
        level that pure L-look speckle exceeds with probability ``point_false_alarm``
        (``gammaincinv(L, 1 - p) / L``; 9.2, i.e. 9.6 dB, at L = 1 and p = 1e-4). Small
        networks trained with a mean-square loss smooth rare bright points away; this is
        the point-target preservation step of the improved Lee sigma filter (Lee et al.
        2009, IEEE TGRS 47(1), 202-213) applied after the network. It changes the mean of
        pure speckle by about ``p (t + 1) e^(-t)`` (+0.004 dB at L = 1, p = 1e-4).
    log_bias_table : dict, optional
        Log bias over a grid of looks and lag-1 correlation (:meth:`bias_for`).
    log_bias_table_bf16 : dict, optional
        The same grid measured with the network under bfloat16 autocast. Rounding the
        activations to bfloat16 shifts a network's mean output by a small, steady amount
        of either sign (the bundled starter: +0.02 dB at one look, +0.005 dB at 16;
        ``starter-fast``: -0.01 to 0 dB), so a model
        that runs in bfloat16 carries its own table; :meth:`forward` uses it whenever it
        runs under CPU bfloat16 autocast.
    correlation_unknown : bool
        True when the network was also trained without being told the correlation.

    Attributes
    ----------
    receptive_field : int
        Odd side, in pixels, of the input square that can influence one output pixel.
    size_multiple : int
        Pooling-grid multiple of the network (1 for plain CNNs, ``2 ** levels`` for U-Nets).
    """

    def __init__(self, network: nn.Module, *, looks, log_bias: float = 0.0,
                 log_scale: float = DEFAULT_LOG_SCALE, metadata=None, point_false_alarm=None,
                 log_bias_table=None, log_bias_table_bf16=None, correlation_unknown: bool = False):
        super().__init__()
        rf = getattr(network, "receptive_field", None)
        if isinstance(rf, bool) or not isinstance(rf, int) or rf < 1 or rf % 2 == 0:
            raise InputError(
                f"network must expose an odd integer receptive_field, got {rf!r} on {type(network).__name__}"
            )
        self.network = network
        self.looks = check_looks_range(looks)
        self.log_bias = float(log_bias)
        self.log_scale = float(log_scale)
        if not math.isfinite(self.log_bias):
            raise InputError(f"log_bias must be finite, got {log_bias!r}")
        if not (math.isfinite(self.log_scale) and self.log_scale > 0):
            raise InputError(f"log_scale must be a positive number, got {log_scale!r}")
        self.metadata = dict(metadata or {})
        self.condition_channels = int(getattr(network, "condition_channels", 0) or 0)
        if self.condition_channels not in (0, CONDITION_CHANNELS):
            raise InputError(f"network takes {self.condition_channels} conditioning planes; "
                             f"this despeck supplies 0 or {CONDITION_CHANNELS}")
        self.log_bias_table = _check_bias_table(log_bias_table)
        self.log_bias_table_bf16 = _check_bias_table(log_bias_table_bf16, "log_bias_table_bf16")
        if self.log_bias_table_bf16 is not None and self.log_bias_table is None:
            raise InputError("log_bias_table_bf16 needs a log_bias_table (the float32 calibration) beside it")
        #: True when the network was also trained without being told the correlation
        #: (planes at UNKNOWN_CORRELATION); it then runs blind when the scene's
        #: correlation is not known reliably.
        self.correlation_unknown = bool(correlation_unknown)
        self.point_false_alarm = None
        if point_false_alarm is not None:
            p = float(point_false_alarm)
            if not 0 < p < 1:
                raise InputError(f"point_false_alarm must lie in (0, 1) or be None, got {point_false_alarm!r}")
            self.point_false_alarm = p

    @property
    def looks_range(self) -> tuple:
        """``(min, max)`` looks the model was trained for."""
        return tuple(self.looks) if isinstance(self.looks, list) else (self.looks, self.looks)

    @property
    def conditioned(self) -> bool:
        """True when the network takes the scene's looks and speckle correlation as input."""
        return self.condition_channels > 0

    def point_threshold_for(self, looks=None):
        """Speckle level exceeded with probability ``point_false_alarm`` at ``looks`` (None when off)."""
        if self.point_false_alarm is None:
            return None
        L = float(looks) if looks is not None else self.looks_range[0]
        return float(special.gammaincinv(L, 1.0 - self.point_false_alarm) / L)

    @property
    def point_threshold(self):
        """Speckle level exceeded with probability ``point_false_alarm`` (None when the guard is off)."""
        return self.point_threshold_for(None)

    @property
    def bf16_calibrated(self) -> bool:
        """True when the model carries a bias table measured in bfloat16 (``log_bias_table_bf16``)."""
        return self.log_bias_table_bf16 is not None

    def bias_for(self, looks=None, correlation=None, *, bf16: bool = False) -> float:
        """Log bias (nepers) for a scene of ``looks`` and lag-1 ``correlation`` (rows, cols).

        Models with a calibration table (``log_bias_table``: values on a grid of looks and
        mean lag-1 correlation) interpolate it bilinearly in ``ln L`` and correlation,
        clamped to the grid; others return their single ``log_bias``. ``bf16`` takes the
        table measured in bfloat16 where the model has one.
        """
        t = self.log_bias_table_bf16 if bf16 and self.log_bias_table_bf16 is not None else self.log_bias_table
        if t is None:
            return self.log_bias
        L = float(looks) if looks is not None else self.looks_range[0]
        if correlation is None:
            rho = UNKNOWN_CORRELATION if self.correlation_unknown else 0.0
        else:
            rho = float(np.mean(np.asarray(correlation, dtype=np.float64)[:2]))
        gl = np.log(np.asarray(t["looks"], dtype=np.float64))
        gc = np.asarray(t["corr"], dtype=np.float64)
        v = np.asarray(t["values"], dtype=np.float64)
        x = float(np.clip(math.log(max(L, 1e-6)), gl[0], gl[-1]))
        along_looks = np.array([np.interp(x, gl, v[:, j]) for j in range(v.shape[1])])
        known = gc >= 0
        if rho < 0 and not known[0]:
            return float(along_looks[0])  # the calibration of the blind (unknown correlation) mode
        gk, ak = gc[known], along_looks[known]
        y = float(np.clip(rho, gk[0], gk[-1]))
        return float(np.interp(y, gk, ak)) if gk.size > 1 else float(ak[0])

    def condition(self, n: int, looks=None, correlation=None, *, device=None) -> torch.Tensor:
        """Conditioning values ``(n, 3)``: log-speckle std of ``looks`` (normalised) and lag-1 correlation.

        ``looks`` is a number or one per sample (default: the model's lowest looks);
        ``correlation`` a ``(rows, cols)`` pair of lag-1 intensity correlation
        coefficients or one pair per sample (default: not known, ``UNKNOWN_CORRELATION``,
        for models trained to run blind, else white speckle, 0).
        """
        L = torch.as_tensor(self.looks_range[0] if looks is None else looks, dtype=torch.float64)
        L = L.reshape(-1).expand(n) if L.numel() == 1 else L.reshape(-1)
        if L.shape[0] != n:
            raise InputError(f"looks must be one value or one per sample ({n}), got {L.shape[0]}")
        check_looks(float(L.min()))
        check_looks(float(L.max()))
        if correlation is None:
            fill = UNKNOWN_CORRELATION if self.correlation_unknown else 0.0
            rho = torch.full((n, 2), fill, dtype=torch.float64)
        else:
            rho = torch.as_tensor(correlation, dtype=torch.float64).reshape(-1, 2)
        if rho.shape[0] == 1:
            rho = rho.expand(n, 2)
        if rho.shape[0] != n:
            raise InputError(f"correlation must be a (rows, cols) pair or one pair per sample ({n})")
        std = torch.sqrt(torch.special.polygamma(1, L)) / self.log_scale
        # Negative values mean "not known" (UNKNOWN_CORRELATION); known ones lie in [0, 1].
        rho = torch.where(rho < 0, torch.full_like(rho, UNKNOWN_CORRELATION), rho.clamp(0.0, 1.0))
        return torch.cat([std[:, None], rho], dim=1).to(torch.float32).to(device)

    @property
    def receptive_field(self) -> int:
        rf = int(self.network.receptive_field)
        return max(rf, POINT_OUTER) if self.point_false_alarm is not None else rf

    def keep_points(self, intensity: torch.Tensor, valid: torch.Tensor, estimate: torch.Tensor,
                    looks=None) -> torch.Tensor:
        """``estimate`` with strong isolated scatterers of ``intensity`` put back (see ``point_false_alarm``)."""
        t = self.point_threshold_for(looks)
        if t is None:
            return estimate
        x = torch.where(valid, intensity, torch.zeros_like(intensity)).to(torch.float64)

        def box_sum(a, k):
            # Zero-padded k x k sums from running sums along each axis (a summed-area
            # table: Crow 1984, SIGGRAPH '84, 207-212): two subtractions a pixel whatever
            # k, in float64 so the differences of large running sums lose nothing that
            # matters here. Five times faster than two 1-D average poolings.
            r = k // 2
            a = F.pad(a, (r + 1, r, r + 1, r))
            a = a.cumsum(-1)
            a = a[..., k:] - a[..., :-k]
            a = a.cumsum(-2)
            return a[..., k:, :] - a[..., :-k, :]

        ring_sum = box_sum(x, POINT_OUTER) - box_sum(x, POINT_INNER)
        if bool(valid.all()):
            # no nodata in the tile: the ring count is its full size except near the tile's
            # edges, where the zero padding drops part of the ring (counted exactly there)
            ring_count = _ring_counts(x.shape[-2:], x.dtype, x.device)
        else:
            w = valid.to(torch.float64)
            ring_count = box_sum(w, POINT_OUTER) - box_sum(w, POINT_INNER)
        enough = ring_count >= 0.5 * (POINT_OUTER**2 - POINT_INNER**2) - 0.5
        background = ring_sum / ring_count.clamp(min=1.0)
        point = valid & enough & (background > 0) & (x > t * background)
        return torch.where(point, intensity.to(estimate.dtype), estimate)

    @property
    def size_multiple(self) -> int:
        """Side multiple of the network's pooling grid (1 for plain CNNs)."""
        return int(getattr(self.network, "size_multiple", 1))

    # ------------------------------------------------------------------ normalisation

    @staticmethod
    def scene_log_offset(intensity_sample) -> float:
        """Normalisation constant for a whole scene: the mean of ``ln I`` over valid values.

        Parameters
        ----------
        intensity_sample : array_like
            Intensity values from the scene (any shape, e.g. a random sample of pixels);
            non-finite and non-positive values are ignored as invalid.

        Raises
        ------
        InputError
            If no value is valid.
        """
        v = np.asarray(intensity_sample, dtype=np.float64).ravel()
        v = v[np.isfinite(v) & (v > 0)]
        if v.size == 0:
            raise InputError("cannot normalise a scene without any valid (finite, positive) intensity")
        return float(np.mean(np.log(v)))

    @staticmethod
    def effective_valid(intensity: torch.Tensor, valid=None) -> torch.Tensor:
        """Pixels used as data: the given mask, and only finite positive intensities."""
        ok = torch.isfinite(intensity) & (intensity > 0)
        if valid is not None:
            valid = torch.as_tensor(valid, device=intensity.device)
            if valid.shape != intensity.shape:
                raise InputError(
                    f"valid mask shape {tuple(valid.shape)} differs from intensity shape {tuple(intensity.shape)}"
                )
            ok = ok & valid.to(torch.bool)
        return ok

    def log_offsets(self, log_intensity: torch.Tensor, valid: torch.Tensor, log_offset=None) -> torch.Tensor:
        """Per-sample offsets ``(N, 1, 1, 1)``: given, or the mean log over each sample's valid pixels."""
        n = log_intensity.shape[0]
        if log_offset is None:
            w = valid.to(log_intensity.dtype)
            count = w.sum(dim=(1, 2, 3))
            total = (torch.where(valid, log_intensity, torch.zeros_like(log_intensity))).sum(dim=(1, 2, 3))
            # A sample without valid pixels gets offset 0; its output is all fill anyway.
            off = torch.where(count > 0, total / count.clamp(min=1), torch.zeros_like(total))
        else:
            off = torch.as_tensor(log_offset, dtype=log_intensity.dtype, device=log_intensity.device)
            if off.ndim == 0:
                off = off.expand(n)
            off = off.reshape(-1)
            if off.shape[0] != n:
                raise InputError(f"log_offset must be a float or have one value per sample ({n}), got {off.shape[0]}")
            if not bool(torch.isfinite(off).all()):
                raise InputError("log_offset must be finite")
        return off.reshape(n, 1, 1, 1)

    def normalise(self, intensity: torch.Tensor, valid=None, log_offset=None):
        """Return ``(z, offset, valid)``: the network input, per-sample offsets and the valid mask.

        Invalid pixels are filled with the offset, i.e. ``z = 0`` there (the scene's mean
        log-intensity), so they add no spurious edges; their outputs are meaningless and
        the caller masks them.
        """
        if intensity.ndim != 4 or intensity.shape[1] != 1:
            raise InputError(f"intensity must have shape (N, 1, H, W), got {tuple(intensity.shape)}")
        intensity = intensity.to(torch.float32)
        valid = self.effective_valid(intensity, valid)
        x = torch.log(intensity.clamp(min=_TINY).nan_to_num(nan=1.0, posinf=1.0))
        off = self.log_offsets(x, valid, log_offset)
        x = torch.where(valid, x, off.expand_as(x))
        z = (x - off) / self.log_scale
        return z, off, valid

    def denormalise(self, y: torch.Tensor, offset: torch.Tensor, log_bias=None) -> torch.Tensor:
        """Natural-log intensity estimate ``y * log_scale + offset + log_bias``."""
        return y * self.log_scale + offset + (self.log_bias if log_bias is None else log_bias)

    def run_network(self, z: torch.Tensor, cond=None, *, channels_last: bool = False) -> torch.Tensor:
        """The network on normalised input ``z`` (N, 1, H, W), with conditioning planes when it takes them."""
        x = z
        if self.conditioned:
            if cond is None:
                cond = self.condition(z.shape[0], device=z.device)
            planes = cond.to(z.dtype)[:, :, None, None].expand(-1, -1, z.shape[2], z.shape[3])
            x = torch.cat([z, planes], dim=1)
        if channels_last:
            x = x.contiguous(memory_format=torch.channels_last)
        return self.network(x)

    def run_oriented(self, z: torch.Tensor, cond=None, *, orientations: int = 1,
                     channels_last: bool = False) -> torch.Tensor:
        """:meth:`run_network` averaged over ``orientations`` flips (4) and transposes (8) of ``z``.

        Each oriented copy goes through the network and is turned back before the
        average, taken in the normalised log domain
        (:func:`despeck.models.orientations.average_over_orientations`; a transpose
        swaps the row and column correlations of the conditioning). ``orientations``
        times the arithmetic.
        """
        def run(x, c):
            return self.run_network(x, c, channels_last=channels_last)

        return average_over_orientations(run, z, cond, orientations)

    def forward(self, intensity: torch.Tensor, valid=None, log_offset=None, looks=None,
                correlation=None, orientations: int = 1) -> torch.Tensor:
        """Despeckle linear intensity.

        Parameters
        ----------
        intensity : Tensor, (N, 1, H, W)
            Linear intensity (power), float32.
        valid : Tensor of bool, (N, 1, H, W), optional
            False for nodata pixels; non-finite and non-positive pixels are always invalid.
        log_offset : float or Tensor (N,), optional
            Scene normalisation constant (:meth:`scene_log_offset`); tiled inference passes
            the scene's value so every tile is normalised identically. ``None`` uses the
            mean log over each sample's valid pixels.
        looks : float, optional
            The scene's looks (default: the model's lowest). Conditioned networks take it
            as input; it also sets the point-target threshold and the bias calibration.
        correlation : (float, float), optional
            Lag-1 intensity correlation of the scene's speckle down rows and along columns
            (default 0, white); used by conditioned networks and the bias calibration.
        orientations : {1, 4, 8}
            Average the network over this many orientations of the input
            (:meth:`run_oriented`; default 1, the network once).

        Returns
        -------
        Tensor, (N, 1, H, W)
            Linear intensity estimate, float32.
        """
        z, off, ok = self.normalise(intensity, valid, log_offset)
        cond = self.condition(z.shape[0], looks, correlation, device=z.device) if self.conditioned else None
        y = self.run_oriented(z, cond, orientations=orientations,
                              channels_last=intensity.is_contiguous(memory_format=torch.channels_last)
                              and not intensity.is_contiguous())
        bias = self.bias_for(looks, correlation, bf16=_under_bf16_autocast())
        out = torch.exp(self.denormalise(y.to(torch.float32), off, bias))
        return self.keep_points(intensity.to(torch.float32), ok, out, looks)

    def extra_repr(self) -> str:
        return (f"looks={self.looks}, log_bias={self.log_bias:.6g}, log_scale={self.log_scale:g}, "
                f"point_false_alarm={self.point_false_alarm}, conditioned={self.conditioned}")
