"""Fidelity to a clean reference: masked PSNR and SSIM on scikit-image's implementations, in dB and amplitude.

:func:`fidelity_db` is also training's validation measure (``val_psnr_db``,
``val_ssim_db``), so training logs and benchmark reports compare.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from ..errors import InputError
from ..validity import valid_mask
from .images import image_pair, positive_pair

__all__ = ["psnr", "ssim", "to_db", "DB_RANGE_PERCENTILES", "reference_db_range", "fidelity_db", "fidelity"]


def psnr(reference, estimate, *, data_range, valid=None):
    """Peak signal-to-noise ratio ``10 log10(data_range^2 / MSE)`` (dB) over the valid pixels.

    :func:`skimage.metrics.peak_signal_noise_ratio` on the valid pixels; the peak is
    ``data_range``, which the caller states. Identical images give ``inf``, no valid
    pixel NaN.
    """
    from skimage.metrics import peak_signal_noise_ratio

    ref, est, ok = image_pair(reference, estimate, valid)
    data_range = float(data_range)
    if not data_range > 0:
        raise InputError(f"data_range must be positive, got {data_range!r}")
    if not ok.any():
        return math.nan
    a, b = ref[ok], est[ok]
    if np.array_equal(a, b):
        return math.inf
    return float(peak_signal_noise_ratio(a, b, data_range=data_range))


def ssim(reference, estimate, *, data_range, valid=None, window=7, k1=0.01, k2=0.03):
    """Mean structural similarity index with a uniform ``window`` (Wang et al. 2004).

    The SSIM map of :func:`skimage.metrics.structural_similarity` (its defaults: 7 x 7
    uniform window, sample covariance, ``K1 = 0.01``, ``K2 = 0.03``), averaged like
    scikit-image without the edges of ``window // 2`` pixels. With a ``valid`` mask,
    windows touching an invalid pixel are left out as well (invalid pixels enter the
    map as 0 in both images, and no kept window sees them).

    References
    ----------
    Wang, Z., Bovik, A. C., Sheikh, H. R., Simoncelli, E. P. (2004). Image quality
    assessment: from error visibility to structural similarity. IEEE TIP 13(4),
    600-612. doi:10.1109/TIP.2003.819861
    """
    ref, est, ok = image_pair(reference, estimate, valid)
    data_range = float(data_range)
    if not data_range > 0:
        raise InputError(f"data_range must be positive, got {data_range!r}")
    window = int(window)
    if window < 3 or window % 2 == 0:
        raise InputError(f"SSIM window must be odd and >= 3, got {window}")
    if min(ok.shape) < window:
        raise InputError(f"image of shape {ok.shape} is too small for a {window} x {window} SSIM window")
    from skimage.metrics import structural_similarity

    x = np.where(ok, ref, 0.0)
    y = np.where(ok, est, 0.0)
    _, s = structural_similarity(x, y, win_size=window, data_range=data_range, K1=k1, K2=k2,
                                 use_sample_covariance=True, full=True)
    pad = (window - 1) // 2
    use = np.zeros(ok.shape, dtype=bool)
    use[pad : ok.shape[0] - pad, pad : ok.shape[1] - pad] = True
    if not ok.all():
        use &= ndimage.minimum_filter(ok, size=window, mode="constant", cval=False)
    if not use.any():
        raise InputError(f"image too small or too invalid for a {window} x {window} SSIM window")
    return float(s[use].mean())


def to_db(intensity):
    """``10 log10(intensity)``; non-positive values give NaN."""
    x = np.asarray(intensity, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(x > 0, 10.0 * np.log10(np.where(x > 0, x, 1.0)), np.nan)


#: Percentiles of the reference's dB values that bound the dB-domain PSNR and SSIM:
#: both images are clipped to them and their difference is the peak, so a few bright
#: targets do not set the peak (project choice; docs/methods.md, PSNR and SSIM).
DB_RANGE_PERCENTILES = (1.0, 99.9)


def reference_db_range(reference, valid=None) -> tuple[float, float]:
    """The dB range of the dB-domain fidelity: percentiles :data:`DB_RANGE_PERCENTILES` of ``10 log10 reference``.

    ``reference`` is linear intensity of any shape (a scene, or the pooled pixels of
    several patches); only valid, finite, positive values count.
    """
    x = np.asarray(reference, dtype=np.float64)
    ok = valid_mask(x, valid, what="reference")
    if not ok.any():
        raise InputError("no pixel of the reference is valid and positive")
    low, high = (float(v) for v in np.percentile(to_db(x[ok]), DB_RANGE_PERCENTILES))
    return low, high


def fidelity_db(reference, estimate, valid=None, *, db_range=None):
    """PSNR and SSIM of ``10 log10`` intensities against a clean reference, and the mean absolute dB error.

    Both images in dB are clipped to ``db_range = (low, high)`` -- by default
    :func:`reference_db_range`, the reference's 1st and 99.9th percentiles -- and
    compared with :func:`psnr` and :func:`ssim` with ``data_range = high - low`` over
    the pixels valid and positive in both; the mean absolute dB error is unclipped.
    The benchmarks measure every scene this way and training every validation patch
    (with one range for the whole validation set), so their figures compare.

    Returns
    -------
    dict with ``psnr_db``, ``ssim_db``, ``mae_db`` and ``db_range``.
    """
    ref, est, ok = positive_pair(reference, estimate, valid)
    if not ok.any():
        raise InputError("no pixel is valid and positive in both reference and estimate")
    ref_db, est_db = to_db(np.where(ok, ref, 1.0)), to_db(np.where(ok, est, 1.0))
    if db_range is None:
        low, high = reference_db_range(ref, ok)
    else:
        low, high = (float(v) for v in db_range)
    if not high > low:
        raise InputError(f"db_range must be (low, high) with high > low, got {(low, high)}")
    rd, ed = np.clip(ref_db, low, high), np.clip(est_db, low, high)
    return {
        "psnr_db": psnr(rd, ed, data_range=high - low, valid=ok),
        "ssim_db": ssim(rd, ed, data_range=high - low, valid=ok),
        "mae_db": float(np.mean(np.abs(est_db[ok] - ref_db[ok]))),
        "db_range": (low, high),
    }


def fidelity(reference, estimate, valid=None, *, db_range=None, amplitude_peak=None):
    """PSNR and SSIM against a clean reference in dB and in amplitude, and the mean absolute dB error.

    Conventions (state them with the numbers):

    * dB: :func:`fidelity_db` -- both images in ``10 log10`` intensity, clipped to
      ``db_range = (low, high)`` -- by default the reference's 1st and 99.9th
      percentiles -- and ``data_range = high - low``;
    * amplitude: ``sqrt(intensity)`` clipped to ``[0, amplitude_peak]`` -- by default the
      reference amplitude's 99.9th percentile -- and ``data_range = amplitude_peak``;
    * mean absolute dB error: ``mean |dB(estimate) - dB(reference)|``, unclipped.

    Returns
    -------
    dict with ``psnr_db``, ``ssim_db``, ``psnr_amplitude``, ``ssim_amplitude``,
    ``mae_db``, ``db_range`` and ``amplitude_peak``.
    """
    in_db = fidelity_db(reference, estimate, valid, db_range=db_range)
    ref, est, ok = positive_pair(reference, estimate, valid)
    a_ref, a_est = np.sqrt(np.where(ok, ref, 0.0)), np.sqrt(np.where(ok, est, 0.0))
    peak = float(np.percentile(a_ref[ok], 99.9)) if amplitude_peak is None else float(amplitude_peak)
    if not peak > 0:
        raise InputError(f"amplitude_peak must be positive, got {peak!r}")
    ra, ea = np.clip(a_ref, 0, peak), np.clip(a_est, 0, peak)
    return {
        "psnr_db": in_db["psnr_db"],
        "ssim_db": in_db["ssim_db"],
        "psnr_amplitude": psnr(ra, ea, data_range=peak, valid=ok),
        "ssim_amplitude": ssim(ra, ea, data_range=peak, valid=ok),
        "mae_db": in_db["mae_db"],
        "db_range": in_db["db_range"],
        "amplitude_peak": peak,
    }
