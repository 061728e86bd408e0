"""The looks and the speckle correlation of a scene: one owner for both.

Every command that needs to know how speckled a scene is (``apply``, ``filter``,
``bench``, ``info``, training on pairs) asks this module, which answers with the value
*and how it was obtained*, in this order:

1. the user's option (``--looks``), if given;
2. a ``looks`` tag that despeck's own writers record (``simulate`` writes the looks it
   simulated; ``filter`` and ``apply`` record the input's looks as ``input_looks``,
   since their outputs are no longer L-look speckle);
3. an estimate on automatically found homogeneous blocks of full-resolution windows
   read across the scene (:func:`despeck.speckle.estimate_looks_log_ratio`: quartiles of
   the log-ratio of pixels one to three apart, ``ln I(p) - ln I(p + k)``, whose law for
   L-look speckle is known exactly, also for correlated pixels; bright points and edges
   barely move quartiles, and reflectivity that varies smoothly over ``k`` pixels cancels
   in the ratio, so built-up and textured scenes read close to their looks).

The speckle correlation (intensity correlation coefficients at lags 1 and 2 along rows
and columns, :func:`despeck.speckle.measure_speckle_correlation`) follows the same
order (option, ``speckle_correlation_rows``/``_cols`` tags, measurement). On pure
speckle both estimators are checked against theory in the tests; texture left in the
"homogeneous" blocks lowers the looks estimate (far less for the log-ratio than for the
log intensity) and raises the correlation, which is why the result says how many blocks
it rests on. The looks estimate chooses its lag from the speckle's short-lag correlation and
corrects for it (:func:`log_ratio_settings`): correlated speckle narrows the ratio.

Blocks are ranked on one half and measured on the other half (halves side by side, not a
checkerboard): neighbouring pixels of correlated speckle are correlated, so a
checkerboard ranking would pick blocks whose measured half is also unusually smooth and
over-estimate the looks by 15-30 % on oversampled data (measured on simulated
Hamming-tapered speckle, oversampling 1.25).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import speckle
from .errors import InputError
from .validity import valid_mask

__all__ = [
    "LooksInfo",
    "SpeckleCorrelation",
    "WHITE",
    "scene_windows",
    "estimate_scene_looks",
    "log_ratio_settings",
    "measure_scene_correlation",
    "looks_from_tags",
    "correlation_from_tags",
    "resolve_looks",
    "resolve_correlation",
    "describe_speckle",
    "describe_array",
    "read_sample",
    "mosaic",
    "speckle_tags",
]

#: Side of the full-resolution windows read across a scene for the estimates.
WINDOW_SIDE = 256
#: At most this many windows are read (about 2.6 million pixels).
MAX_WINDOWS = 40
#: Block side and kept fraction of the looks estimate; block side of the correlation measurement.
LOOKS_BLOCK = 16
LOOKS_FRACTION = 0.05
CORRELATION_BLOCK = 32
MIN_BLOCKS = 8
#: Lags of the log-ratio looks estimate (:func:`log_ratio_settings`): 1 where the speckle is
#: white (short-lag correlation at most WHITE_LAG1 at lag 1 and WHITE_LAG2 at lag 2), else 2,
#: else 3 where the speckle still correlates above RATIO_LAG_LIMIT two pixels apart.
RATIO_LAGS = (1, 2, 3)
WHITE_LAG1, WHITE_LAG2 = 0.05, 0.03
#: Up to 0.15 the second difference of short_lag_correlation misses at most 0.03 of rho(2)
#: (it drops 2 rho(3) - rho(4), and rho(3) <= 0.02 for such systems; intensity_correlation_theory).
RATIO_LAG_LIMIT = 0.15
#: An axis whose speckle correlation, texture's share taken out, reads below this at lag 1
#: is white (:func:`measure_scene_correlation`, :attr:`SpeckleCorrelation.reliable`). On
#: the held-out scene families (384 pixels, 1 and 4 looks, two draws) white speckle read
#: at most 0.06 and speckle of an oversampled (1.25) Hamming system at least 0.22.
WHITE_CORRELATION = 0.08


@dataclass(frozen=True)
class LooksInfo:
    """The number of looks of a scene and where it came from.

    Attributes
    ----------
    value : float
    source : str
        ``"option"``, ``"tag"``, ``"estimate"`` or ``"assumed"``.
    detail : str
        One line for users (e.g. "estimated on 52 homogeneous 32x32 blocks").
    """

    value: float
    source: str
    detail: str = ""

    def describe(self) -> str:
        return f"{self.value:.3g} looks ({self.detail or self.source})"


@dataclass(frozen=True)
class SpeckleCorrelation:
    """Intensity correlation coefficients of the speckle at lags 1 and 2.

    ``rows`` between vertically neighbouring pixels (down the rows axis, usually
    azimuth), ``cols`` between horizontally neighbouring ones (usually range).
    """

    rows: tuple = (0.0, 0.0)
    cols: tuple = (0.0, 0.0)
    source: str = "assumed"
    detail: str = ""

    @property
    def lag1(self) -> tuple:
        return float(self.rows[0]), float(self.cols[0])

    @property
    def reliable(self) -> bool:
        """Whether the values can be told to a network as the speckle's correlation.

        Recorded or given values are. A measurement is when, on both axes, it reads
        either white (lag 1 below :data:`WHITE_CORRELATION`) or like a sensor's speckle: lag 1 of at least
        0.15 and lag 2 at most half of lag 1 plus 0.03 (system responses decorrelate
        within two pixels: lag 2 / lag 1 <= 0.33 for oversampling up to 1.6 with the
        usual tapers, :func:`despeck.speckle.intensity_correlation_theory`). Texture left
        in the homogeneous blocks decays slowly (lag 2 close to lag 1) or reads as weak
        correlation; such a measurement is not trusted, and looks-aware models then
        run without being told the correlation.
        """
        if self.source != "measured":
            return self.source != "assumed"
        for r1, r2 in (self.rows, self.cols):
            white = r1 < WHITE_CORRELATION
            sensor = r1 >= 0.15 and r2 <= 0.5 * r1 + 0.03
            if not (white or sensor):
                return False
        return True

    def describe(self) -> str:
        trust = "" if self.reliable else "; not trusted: texture-like"
        return (f"lag-1 correlation {self.rows[0]:.2f} down rows, {self.cols[0]:.2f} along columns "
                f"(lag 2: {self.rows[1]:.2f}, {self.cols[1]:.2f}; {self.detail or self.source}{trust})")


WHITE = SpeckleCorrelation((0.0, 0.0), (0.0, 0.0), "assumed", "white speckle assumed")


def scene_windows(height: int, width: int, *, side: int = WINDOW_SIDE, max_windows: int = MAX_WINDOWS):
    """Top-left corners ``(row, col)`` and size of full-resolution windows spread over a scene.

    A scene of at most ``max_windows`` windows' worth of pixels is one window, the whole
    scene. A larger one is covered by a regular grid of at most ``max_windows`` windows
    of ``side`` x ``side`` pixels, evenly spaced.
    """
    h, w = int(height), int(width)
    if h * w <= max_windows * side * side:
        return [(0, 0, h, w)]
    s_r, s_c = min(side, h), min(side, w)
    n_r = max(1, min(h // max(s_r, 1), int(math.sqrt(max_windows * h / max(w, 1))) or 1))
    n_c = max(1, min(w // max(s_c, 1), max_windows // n_r))
    rows = np.linspace(0, h - s_r, n_r).round().astype(int)
    cols = np.linspace(0, w - s_c, n_c).round().astype(int)
    return [(int(r), int(c), s_r, s_c) for r in rows for c in cols]


def mosaic(crops):
    """Stack ``(intensity, valid)`` crops of equal width vertically into one image."""
    width = max(c[0].shape[1] for c in crops)
    parts, masks = [], []
    for intensity, valid in crops:
        pad = width - intensity.shape[1]
        parts.append(np.pad(intensity, ((0, 0), (0, pad))))
        masks.append(np.pad(valid, ((0, 0), (0, pad))))
    return np.concatenate(parts), np.concatenate(masks)


def read_sample(reader, band: int = 1):
    """Full-resolution windows of ``reader`` (a :class:`despeck.raster.SceneReader`) as one mosaic.

    Returns ``(intensity, valid)``; windows are stacked vertically so block searches
    never straddle two windows (the window side is a multiple of the block side).
    """
    from rasterio.windows import Window

    crops = []
    for r, c, hh, ww in scene_windows(reader.height, reader.width):
        crops.append(reader.read(Window(c, r, ww, hh), band=band))
    return mosaic(crops)


def _block_side(intensity, valid) -> int:
    # Prefer 32-pixel blocks for the correlation (lags up to 5, less ranking bias); fall back to 16.
    for side in (CORRELATION_BLOCK, 16):
        rows, cols = intensity.shape[0] // side, intensity.shape[1] // side
        if rows * cols >= MIN_BLOCKS:
            return side
    return 16


def log_ratio_settings(intensity, valid=None, *, correlation: SpeckleCorrelation | None = None,
                       limit: float = RATIO_LAG_LIMIT) -> tuple:
    """Lags and speckle correlations ``((lag down rows, along columns), (rho, rho))`` of the looks estimate.

    The shorter the lag, the more texture cancels in the log-ratio, but speckle that
    correlates at the lag narrows it (:func:`despeck.speckle.log_ratio_iqr`: uncorrected,
    an intensity correlation ``rho`` reads the looks high by about ``1 / (1 - rho)``).
    Per axis, from the speckle's short-lag correlation measured with texture's share
    taken out (:func:`despeck.speckle.short_lag_correlation`; the correlation
    :func:`measure_scene_correlation` reports keeps some texture, which would read the
    looks low on textured scenes):

    - lag 1 where the speckle is white (at most :data:`WHITE_LAG1` at lag 1 and
      :data:`WHITE_LAG2` at lag 2);
    - else lag 2, corrected with its correlation (a recorded one from the file's tags,
      ``correlation`` from :func:`correlation_from_tags`, if given), while that is at
      most ``limit``;
    - else (strongly oversampled data, where the measured lag-2 value misses more of
      the system's lag-3 term and a large correction would rest on it) lag 3 with its
      measured correlation.

    White speckle at lag 1 is assumed when nothing can be measured.
    """
    clip = lambda v: min(max(float(v), 0.0), 0.9)  # noqa: E731 -- negative values are estimation noise
    try:
        m = speckle.short_lag_correlation(intensity, valid, lags=RATIO_LAGS, min_blocks=MIN_BLOCKS,
                                          window=_block_side(np.asarray(intensity), valid))
    except InputError:  # too small to measure: the estimate itself says whether it can go on
        m = {"rows": [0.0, 0.0, 0.0], "cols": [0.0, 0.0, 0.0]}
    recorded = correlation is not None and correlation.source == "tag"
    lags, rhos = [], []
    for key in ("rows", "cols"):
        r1, r2, r3 = (clip(v) for v in m[key])
        if recorded:
            r1, r2 = (clip(v) for v in getattr(correlation, key))
        if r1 <= WHITE_LAG1 and r2 <= WHITE_LAG2:
            lags.append(1)
            rhos.append(r1)
        elif r2 <= limit:
            lags.append(2)
            rhos.append(r2)
        else:
            lags.append(3)
            rhos.append(r3)
    return tuple(lags), tuple(rhos)


def estimate_scene_looks(intensity, valid=None, *, correlation: SpeckleCorrelation | None = None) -> LooksInfo:
    """Estimate the looks of an intensity image (or a mosaic from :func:`read_sample`).

    The log-ratio of pixels one to three apart on the most homogeneous blocks
    (:func:`despeck.speckle.estimate_looks_log_ratio`), at the lags and with the speckle
    correlations of :func:`log_ratio_settings` (``correlation``: the file's recorded
    speckle correlation, if any; other sources are not used, the estimate measures the
    short-lag correlation it needs itself).

    Raises
    ------
    InputError
        Too few nodata-free blocks (the message says so).
    """
    x = np.asarray(intensity)
    lags, rhos = log_ratio_settings(x, valid, correlation=correlation)
    # 16 x 16 blocks of log-ratios, the most homogeneous 5 % (at least MIN_BLOCKS). On the
    # held-out scene families (7 families, 384 and 1024 pixels, 1 to 10 looks, white and
    # three correlated systems; benchmarks/bench_looks_estimate.py) the log error was
    # rms 0.11, worst -0.46 (textured urban ground, 10 looks), against rms 0.16, worst -0.80
    # for the log-IQR of intensity (speckle.estimate_looks_log_iqr), which texture drives
    # low. The uncorrected lag-2 ratio scored rms 0.10 there only because correlated speckle
    # reading high offset texture reading low: on homogeneous ground it reads 8 % high at
    # oversampling 1.25 (Hamming) and 28 % high at 1.6, this estimate 1-2 % high.
    value, blocks = speckle.estimate_looks_log_ratio(x, valid, lag=lags, correlation=rhos, window=LOOKS_BLOCK,
                                                     fraction=LOOKS_FRACTION, min_blocks=MIN_BLOCKS)
    lag_text = f"lag {lags[0]}" if lags[0] == lags[1] else f"lag {lags[0]} down rows, {lags[1]} along columns"
    return LooksInfo(value, "estimate", f"estimated on the {blocks} most homogeneous {LOOKS_BLOCK}x{LOOKS_BLOCK} "
                                        f"blocks of log-ratios ({lag_text})")


def measure_scene_correlation(intensity, valid=None) -> SpeckleCorrelation:
    """Measure lag-1 and lag-2 speckle correlation of an intensity image on homogeneous blocks.

    Per axis: where the speckle's correlation with texture's share taken out
    (:func:`despeck.speckle.short_lag_correlation`, second differences over the lag)
    reads white, below :data:`WHITE_CORRELATION` at lag 1, those values are reported;
    texture left in the most homogeneous blocks would otherwise read as a weak
    correlation that does not decay like a sensor's, and a looks-aware model would run
    blind on white speckle. Elsewhere the plain correlation coefficients of the blocks
    are reported (:func:`despeck.speckle.measure_speckle_correlation`): the second
    difference drops ``2 rho(2)`` from lag 1, which a system's correlation needs.
    """
    x = np.asarray(intensity)
    side = _block_side(x, valid)
    m = speckle.measure_speckle_correlation(x, valid, window=side, fraction=0.2, min_blocks=MIN_BLOCKS,
                                            lags=(1, 2), split="halves")
    robust = speckle.short_lag_correlation(x, valid, lags=(1, 2), window=side, min_blocks=MIN_BLOCKS)
    clip = lambda v: float(min(max(v, 0.0), 1.0))  # noqa: E731 -- negative values are estimation noise
    axes, white = {}, []
    for key, name in (("rows", "down rows"), ("cols", "along columns")):
        if robust[key][0] < WHITE_CORRELATION:
            axes[key] = tuple(clip(v) for v in robust[key])
            white.append(name)
        else:
            axes[key] = tuple(clip(v) for v in m[key])
    detail = f"measured on {m['blocks']} homogeneous {side}x{side} blocks"
    if white:
        detail += f"; white {' and '.join(white)} once texture is taken out"
    return SpeckleCorrelation(axes["rows"], axes["cols"], "measured", detail)


def _tag(tags, *names):
    for key, value in (tags or {}).items():
        if str(key).strip().lower() in names:
            return value
    return None


def looks_from_tags(tags):
    """Looks recorded in a file's tags (``looks``, as despeck's ``simulate`` writes), or None."""
    value = _tag(tags, "looks")
    if value is None:
        return None
    try:
        return speckle.check_looks(value)
    except InputError:
        return None  # not a number of looks: as if not recorded


def correlation_from_tags(tags):
    """Correlation recorded as ``speckle_correlation_rows`` / ``_cols`` tags ("lag1,lag2"), or None."""
    rows, cols = _tag(tags, "speckle_correlation_rows"), _tag(tags, "speckle_correlation_cols")
    if rows is None or cols is None:
        return None
    try:
        r = tuple(float(v) for v in str(rows).split(","))
        c = tuple(float(v) for v in str(cols).split(","))
    except ValueError:
        return None
    if len(r) != 2 or len(c) != 2 or not all(math.isfinite(v) and -1 <= v <= 1 for v in r + c):
        return None
    return SpeckleCorrelation(r, c, "tag", "recorded in the file's tags")


def resolve_looks(option=None, *, tags=None, intensity=None, valid=None, name="--looks",
                  correlation: SpeckleCorrelation | None = None) -> LooksInfo:
    """The looks of a scene: the user's option, else a ``looks`` tag, else an estimate.

    Parameters
    ----------
    option : float or str, optional
        The user's value (``"auto"`` or None means: do not impose one).
    tags : dict, optional
        The file's metadata tags.
    intensity, valid : array_like, optional
        Full-resolution intensity (e.g. :func:`read_sample`) for the estimate.
    name : str
        Option name used in messages.
    correlation : SpeckleCorrelation, optional
        The speckle correlation recorded in the file's tags, for the estimate
        (:func:`estimate_scene_looks`; measured there otherwise).

    Raises
    ------
    InputError
        Bad option value, or nothing to go on (no tag and no estimate possible); the
        message says what is missing and names the option that settles it.
    """
    if option is not None and not (isinstance(option, str) and option.strip().lower() == "auto"):
        value = speckle.check_looks(option, name)
        return LooksInfo(value, "option", f"given by {name}")
    tagged = looks_from_tags(tags)
    if tagged is not None:
        return LooksInfo(tagged, "tag", "recorded in the file's 'looks' tag")
    if intensity is None:
        raise InputError(f"the number of looks is neither given nor recorded; set {name}")
    try:
        return estimate_scene_looks(intensity, valid, correlation=correlation)
    except InputError as exc:
        raise InputError(f"cannot estimate the number of looks ({exc}); set {name}") from None


def resolve_correlation(*, tags=None, intensity=None, valid=None) -> SpeckleCorrelation:
    """The speckle correlation of a scene: recorded tags, else measured (InputError if neither works)."""
    tagged = correlation_from_tags(tags)
    if tagged is not None:
        return tagged
    if intensity is None:
        raise InputError("the speckle correlation is not recorded and no pixels were given to measure it")
    return measure_scene_correlation(intensity, valid)


def _plausibility(info: LooksInfo, where: str) -> list:
    if info.source == "estimate" and info.value < 0.8:
        return [f"{where}estimated {info.value:.2f} looks, below one: the scene may have no homogeneous area "
                "(texture or built-up ground everywhere) or not hold linear intensity; set --looks "
                "(and --units) if you know them"]
    return []


def describe_speckle(reader, band: int = 1, *, looks=None, correlation_notes: bool = True):
    """``(LooksInfo, SpeckleCorrelation, notes)`` for one band of an open scene.

    Never raises for an unmeasurable scene: falls back to 1 look / white speckle and
    says so in ``notes`` (one line each), so callers can decide to stop or go on.
    """
    notes = []
    intensity = valid = None
    need_pixels = looks is None and looks_from_tags(reader.tags) is None or correlation_from_tags(reader.tags) is None
    if need_pixels:
        intensity, valid = read_sample(reader, band)
    try:
        info = resolve_looks(looks, tags=reader.tags, intensity=intensity, valid=valid,
                             correlation=correlation_from_tags(reader.tags))
    except InputError as exc:
        info = LooksInfo(1.0, "assumed", "assumed: could not be estimated")
        notes.append(f"{reader.path}: {exc}; assumed 1 look")
    notes += _plausibility(info, f"{reader.path}: ")
    try:
        corr = resolve_correlation(tags=reader.tags, intensity=intensity, valid=valid)
    except InputError as exc:
        corr = WHITE
        if correlation_notes:
            notes.append(f"{reader.path}: speckle correlation not measurable ({exc}); assumed white speckle")
    return info, corr, notes


def describe_array(intensity, valid=None, *, looks=None, correlation=None, correlation_notes: bool = True):
    """``(LooksInfo, SpeckleCorrelation, notes)`` of a 2-D intensity array.

    Full-resolution windows spread over the array are measured (as for files);
    ``looks`` and a ``(rows, cols)`` lag-1 ``correlation`` given by the caller are used
    as they are. Never raises for an unmeasurable array: falls back to 1 look / white
    speckle and says so in ``notes``.
    """
    x = np.asarray(intensity)
    ok = valid_mask(x) if valid is None else np.asarray(valid, dtype=bool)
    crops = [(x[r:r + h, c:c + w], ok[r:r + h, c:c + w]) for r, c, h, w in scene_windows(*x.shape)]
    sample, sample_ok = mosaic(crops)
    notes = []
    try:
        info = resolve_looks(looks, intensity=sample, valid=sample_ok, name="looks")
    except InputError as exc:
        info = LooksInfo(1.0, "assumed", "assumed: could not be estimated")
        notes.append(f"{exc}; assumed 1 look")
    notes += _plausibility(info, "")
    if correlation is not None:
        rho = tuple(float(v) for v in correlation)
        if len(rho) != 2 or not all(0.0 <= v <= 1.0 for v in rho):
            raise InputError(f"correlation must be a (rows, cols) pair in [0, 1], got {correlation!r}")
        corr = SpeckleCorrelation((rho[0], 0.0), (rho[1], 0.0), "option", "given by the caller")
    else:
        try:
            corr = measure_scene_correlation(sample, sample_ok)
        except InputError as exc:
            corr = WHITE
            if correlation_notes:
                notes.append(f"speckle correlation not measurable ({exc}); assumed white speckle")
    return info, corr, notes


def speckle_tags(info: LooksInfo | None = None, corr: SpeckleCorrelation | None = None, *, prefix: str = "") -> dict:
    """Metadata tags recording looks and correlation (``prefix="input_"`` for filtered outputs)."""
    tags = {}
    if info is not None:
        tags[f"{prefix}looks"] = f"{info.value:.4g}"
        tags[f"{prefix}looks_source"] = info.source
    if corr is not None:
        tags[f"{prefix}speckle_correlation_rows"] = f"{corr.rows[0]:.4f},{corr.rows[1]:.4f}"
        tags[f"{prefix}speckle_correlation_cols"] = f"{corr.cols[0]:.4f},{corr.cols[1]:.4f}"
        tags[f"{prefix}speckle_correlation_source"] = corr.source if corr.reliable else f"{corr.source}, not trusted"
    return tags
