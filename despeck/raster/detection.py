"""Which units a scene's samples are in: data type, metadata words and speckle statistics (no rasterio).

:func:`detect_units` decides from the file's data type, band descriptions, unit
strings and tags (:func:`unit_hints`) and a sample of its values, with the
distribution of the values on homogeneous areas (:func:`units_evidence`) as a second
opinion between intensity and amplitude. :class:`despeck.raster.reader.SceneReader`
asks it once per file.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..validity import valid_mask
from .units import UNIT_LABELS, check_units

__all__ = ["UnitsDecision", "UnitsEvidence", "detect_units", "unit_hints", "units_evidence", "is_complex_dtype",
           "EVIDENCE_WINDOW", "EVIDENCE_WINDOWS"]

# Fraction of negative samples above which real data are taken to be decibels.
_DB_NEGATIVE_FRACTION = 0.05

# Band descriptions that mark a two-band file as in-phase / quadrature parts.
_IQ_NAMES = {("i", "q"), ("real", "imag"), ("real", "imaginary"), ("re", "im"), ("in-phase", "quadrature")}


@dataclass(frozen=True)
class UnitsDecision:
    """Which units a scene is read in, and why.

    Attributes
    ----------
    units : str
        One of :data:`UNITS`.
    detected : bool
        True when the data (or their metadata) decide the units, False when the user
        declared them or the default (linear intensity) was assumed.
    reason : str
        One line a person can read, e.g. for ``despeck info``.
    warnings : tuple of str
        Doubts about the units; the reader emits them as :class:`UnitsWarning`.
    """

    units: str
    detected: bool
    reason: str
    warnings: tuple = ()


def is_complex_dtype(dtype) -> bool:
    return "complex" in str(dtype)


def _iq_by_name(descriptions) -> bool:
    names = tuple((d or "").strip().lower() for d in descriptions)
    return len(names) == 2 and names in _IQ_NAMES


def _looks_zero_centred(sample) -> bool:
    """Both bands symmetric about zero, as in-phase/quadrature parts of speckle are."""
    for band in sample:
        band = np.asarray(band, dtype=np.float64)
        if band.size < 100:
            return False
        negative = float(np.mean(band < 0))
        q25, q50, q75 = np.percentile(band, [25, 50, 75])
        spread = q75 - q25
        if not (0.4 <= negative <= 0.6) or spread <= 0 or abs(q50) > 0.1 * spread:
            return False
    return True


def detect_units(sample=None, *, dtype="float32", band_count=1, descriptions=(), band_units=(),
                 declared=None, name="scene", tags=None, image=None) -> UnitsDecision:
    """Decide the units of a scene from its data type, metadata and a sample of its values.

    Rules, in order:

    1. a complex data type means ``complex`` (declaring anything else is an error);
    2. ``declared`` units are checked against the data (``complex`` on a real file
       needs exactly two bands; negative values cannot be linear) and used;
    3. a two-band real file whose bands are described as I/Q (or real/imag), or
       whose bands are both symmetric about zero, is ``complex``;
    4. a band unit of "dB" ("linear power", "linear amplitude") in the metadata means
       ``db`` (``intensity``, ``amplitude``);
    5. at least 5 % negative values mean ``db`` (a warning if the texts said
       otherwise); words in band descriptions, unit strings and tags
       (:func:`unit_hints`) saying dB mean ``db``; a few negative values are
       ambiguous and need the user's word;
    6. between intensity and amplitude, the texts' word is checked against the
       distribution of the values on homogeneous areas (:func:`units_evidence`, a
       second opinion): texts and statistics agreeing, or one of them deciding alone,
       decide; when they disagree the texts win and a warning says so; when neither
       decides on speckled data, linear ``intensity`` is assumed with a warning; on
       scenes without measurable speckle (clean, tiny) intensity is assumed and the
       reason says so.

    Warnings (not errors) flag declared dB without a single negative value,
    linear data with an implausibly narrow dynamic range (p99/p1 < 3 in intensity,
    which speckled linear data do not have but dB values often do), and every doubt
    of rule 6; each names the option that settles it (``--units``).

    Parameters
    ----------
    sample : array_like, optional
        Finite, non-nodata raw values, shape ``(n,)`` or ``(bands, n)``.
    dtype : str
        The file's data type (rasterio name, e.g. ``'complex_int16'``).
    band_count : int
        Number of bands in the file.
    descriptions, band_units : sequence of str or None
        Band descriptions and band unit strings from the file's metadata.
    declared : str, optional
        Units the user declared.
    name : str
        How to call the scene in messages (usually its path).
    tags : dict, optional
        Dataset (and band) metadata tags, read for unit words.
    image : array_like, sequence of array_like or callable, optional
        Full-resolution 2-D windows of raw values of the first band for
        :func:`units_evidence`, or a function returning them (called only when the
        statistics are needed).
    """
    if declared is not None:
        declared = check_units(declared)
    sample = None if sample is None else np.atleast_2d(np.asarray(sample))
    if is_complex_dtype(dtype):
        if declared not in (None, "complex"):
            raise InputError(f"{name}: the file holds complex samples ({dtype}); its units can only be 'complex', not {declared!r}")
        return UnitsDecision("complex", declared is None, f"complex data type {dtype}")
    if sample is not None and sample.size:
        negative_fraction = float(np.mean(sample[0] < 0))
    else:
        negative_fraction = 0.0
    if declared == "complex":
        if band_count != 2:
            raise InputError(
                f"{name}: units 'complex' requested but the file holds real data ({dtype}, {band_count} band(s)); "
                "complex needs a complex data type or two bands (in-phase, quadrature)"
            )
        return UnitsDecision("complex", False, "declared complex: two bands read as in-phase and quadrature")
    if declared is not None:
        notes = []
        if declared in ("intensity", "amplitude") and negative_fraction > 0:
            raise InputError(
                f"{name}: {negative_fraction:.2%} of the values are negative, which linear {declared} cannot be; "
                "if the file is in decibels declare units 'db'"
            )
        if sample is not None and sample.size:
            notes.extend(_doubts(sample[0], declared))
        return UnitsDecision(declared, False, f"declared {declared}", tuple(notes))
    if band_count == 2 and sample is not None and sample.shape[0] == 2:
        if _iq_by_name(descriptions) or _looks_zero_centred(sample):
            how = "bands described as in-phase/quadrature" if _iq_by_name(descriptions) else "two zero-centred bands"
            return UnitsDecision("complex", True, f"{how} read as complex samples")
    elif band_count == 2 and _iq_by_name(descriptions):
        return UnitsDecision("complex", True, "bands described as in-phase/quadrature read as complex samples")
    labels = {(u or "").strip().lower() for u in band_units}
    if "db" in labels:
        return UnitsDecision("db", True, "band unit metadata says dB", tuple(_doubts(sample[0], "db")) if sample is not None and sample.size else ())
    for units, label in UNIT_LABELS.items():
        if label.lower() in labels and units != "db":
            return UnitsDecision(units, True, f"band unit metadata says {label}")
    hint, source = unit_hints(descriptions, band_units, tags)
    if negative_fraction >= _DB_NEGATIVE_FRACTION:
        notes = ()
        if hint in ("amplitude", "intensity", "conflict"):
            notes = (f"{source} suggests linear values but {negative_fraction:.0%} of them are negative: read as dB; "
                     f"{_SETTLE}",)
        return UnitsDecision("db", True, f"{negative_fraction:.0%} of the values are negative: decibels", notes)
    if hint == "db":
        notes = tuple(_doubts(sample[0], "db")) if sample is not None and sample.size else ()
        return UnitsDecision("db", True, f"{source} says dB", notes)
    if negative_fraction > 0:
        raise InputError(
            f"{name}: a few values ({negative_fraction:.2%}) are negative, so the units cannot be told apart; "
            "declare them (units 'db' for decibels)"
        )
    if callable(image):
        image = image()
    evidence = units_evidence(image) if image is not None else UnitsEvidence()
    units, detected, reason, notes = _linear_units(hint, source, evidence)
    if sample is not None and sample.size:
        notes = notes + tuple(_doubts(sample[0], units))
    return UnitsDecision(units, detected, reason, notes)


_SETTLE = "declare the units (--units) to settle it"


def _linear_units(hint, source, evidence):
    """``(units, detected, reason, notes)`` between intensity and amplitude (rule 6 of :func:`detect_units`)."""
    vote = evidence.vote
    if hint in ("intensity", "amplitude"):
        other = "amplitude" if hint == "intensity" else "intensity"
        if vote == other:
            return hint, True, f"{source} says {hint}", (
                f"{source} says {hint} but the values are distributed like {other} speckle "
                f"({evidence.describe()}); read as {hint}; {_SETTLE}",)
        agree = "; the statistics of the values agree" if vote == hint else ""
        return hint, True, f"{source} says {hint}{agree}", ()
    if hint == "conflict":
        units = vote or "intensity"
        then = (f"the values are distributed like {vote} speckle: read as {vote}" if vote
                else "the statistics cannot tell either: read as linear intensity")
        return units, vote is not None, f"the metadata disagree ({source}); {then}", (
            f"the metadata disagree about the units ({source}); {then}; {_SETTLE}",)
    if vote is not None:
        notes = ()
        if vote == "amplitude":
            notes = (f"no unit metadata: read as amplitude, the only reading that fits the statistics "
                     f"({evidence.describe()}); {_SETTLE} if it is wrong",)
        return vote, True, f"no unit metadata; the values are distributed like {vote} speckle on homogeneous areas", notes
    if evidence.speckled and evidence.blocks:
        return "intensity", False, "no unit metadata and the statistics cannot tell: assumed linear intensity", (
            f"no unit metadata, and the statistics cannot tell intensity from amplitude ({evidence.describe()}); "
            f"read as linear intensity; {_SETTLE}",)
    measured = not math.isnan(evidence.looks_as_intensity)
    why = "no speckle to measure" if measured and not evidence.speckled else "too few homogeneous blocks to measure"
    return "intensity", False, (
        f"no unit metadata and {why}: assumed linear intensity; declare 'amplitude' or 'db' if it is not"), ()


def _doubts(values, units) -> list:
    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size < 100:
        return []
    notes = []
    if units == "db":
        if not np.any(values < 0):
            notes.append(
                f"values declared as dB are never negative (range {values.min():.3g} to {values.max():.3g}); "
                "is the file linear intensity or amplitude?"
            )
    else:
        positive = values[values > 0]
        if positive.size >= 100:
            if units == "amplitude":
                positive = positive * positive
            p1, p99 = np.percentile(positive, [1, 99])
            if p99 < 3.0 * p1:
                notes.append(
                    f"values declared or assumed as linear {units} have a very narrow dynamic range "
                    f"(1st-99th percentile {p1:.3g} to {p99:.3g}); is the file in dB?"
                )
    return notes


# --------------------------------------------------------------------------- unit hints and evidence

# Words in band descriptions, band unit strings and metadata tags that say what the
# values are. A backscatter coefficient (sigma0, beta0, gamma0) is a power ratio, so it
# hints at intensity unless the text also says amplitude or dB (common practice).
_HINT_WORDS = {
    "db": ("db", "decibel", "decibels"),
    "amplitude": ("amplitude", "amplitudes", "amp", "magnitude"),
    "intensity": ("intensity", "intensities", "power"),
}
_WEAK_INTENSITY_WORDS = ("sigma0", "beta0", "gamma0", "sigmanought", "betanought", "gammanought")

# Metadata tags whose key contains one of these is read for unit words (other tags,
# e.g. an "AMPLITUDE_SCALE" factor or free-form history, are not).
_HINT_TAG_KEYS = ("unit", "quantity", "measure", "descr", "content", "type")


def _words(text) -> set:
    return set(re.findall(r"[a-z0-9]+", str(text or "").lower()))


def _hint_of(text):
    """Units one text names: 'db', 'amplitude', 'intensity', 'conflict' or None."""
    words = _words(text)
    if words & set(_HINT_WORDS["db"]):
        return "db"  # dB of an amplitude (20 log10 A) and of an intensity (10 log10 I) are the same numbers
    amplitude = bool(words & set(_HINT_WORDS["amplitude"]))
    intensity = bool(words & set(_HINT_WORDS["intensity"]))
    if amplitude and intensity:
        return "conflict"
    if amplitude:
        return "amplitude"
    if intensity or words & set(_WEAK_INTENSITY_WORDS):
        return "intensity"
    return None


def unit_hints(descriptions=(), band_units=(), tags=None) -> tuple:
    """Units suggested by a file's band descriptions, band unit strings and tags.

    Texts are split into words; "dB"/"decibel" means ``db``; "amplitude", "amp",
    "magnitude" mean ``amplitude``; "intensity", "power" and the backscatter
    coefficients "sigma0", "beta0", "gamma0" mean ``intensity``. Tags are read only
    when their key names a unit, quantity, measurement, description, content or type.

    Returns
    -------
    (units, source) : tuple
        ``units`` is one of ``'db'``, ``'amplitude'``, ``'intensity'``, ``'conflict'``
        (texts disagree) or None (nothing said); ``source`` says where, for messages
        (e.g. ``"band description 'amplitude VV'"``).
    """
    found = []
    for kind, texts in (("band description", descriptions), ("band unit", band_units)):
        for text in texts or ():
            hint = _hint_of(text)
            if hint is not None:
                found.append((hint, f"{kind} {str(text).strip()!r}"))
    for key, value in dict(tags or {}).items():
        if any(k in str(key).lower() for k in _HINT_TAG_KEYS):
            hint = _hint_of(value)
            if hint is not None:
                found.append((hint, f"tag {key}={str(value).strip()!r}"))
    if not found:
        return None, ""
    kinds = {h for h, _ in found}
    if len(kinds) == 1:
        return found[0]
    return "conflict", " and ".join(dict.fromkeys(s for _, s in found))


@dataclass(frozen=True)
class UnitsEvidence:
    """What the distribution of the values on homogeneous areas says about their units.

    On fully developed speckle the intensity is Gamma distributed, so over a
    homogeneous area its squared coefficient of variation ``c2`` and the variance of its
    logarithm ``v`` obey ``v = psi_1(1 / c2)`` (trigamma; Oliver & Quegan 1998). The
    ratio ``v / psi_1(1 / c2)`` is computed per block and its median taken, once for the
    values read as intensity (``ratio_intensity``) and once squared, i.e. read as
    amplitude (``ratio_amplitude``). The right reading gives about 1; texture and
    mixed blocks only lower the ratio (they add log-variance), while amplitudes read
    as intensity give about 1.28 at 1 look, 1.12 at 2 and tend to 1 with more looks.

    Attributes
    ----------
    vote : str or None
        ``'intensity'``, ``'amplitude'`` or None (undecided).
    speckled : bool
        The homogeneous blocks hold speckle (fewer than :data:`_SPECKLED_LOOKS` looks
        as intensity); False for clean or nearly constant scenes, where the question
        cannot be asked of the statistics.
    blocks : int
        Blocks the medians rest on (0 if too few could be found).
    ratio_intensity, ratio_amplitude, looks_as_intensity : float
        NaN when not measured.
    """

    vote: object = None
    speckled: bool = False
    blocks: int = 0
    ratio_intensity: float = float("nan")
    ratio_amplitude: float = float("nan")
    looks_as_intensity: float = float("nan")

    def describe(self) -> str:
        if not self.blocks:
            return "too few homogeneous blocks to measure"
        return (f"log-variance ratio {self.ratio_intensity:.2f} as intensity, {self.ratio_amplitude:.2f} as amplitude "
                f"on {self.blocks} homogeneous blocks; about 1 fits")


# Block side and the least number of blocks a vote rests on.
_EVIDENCE_BLOCK = 16
_EVIDENCE_MIN_BLOCKS = 24
# Side of the full-resolution windows the reader hands to units_evidence, and how many.
EVIDENCE_WINDOW = 256
EVIDENCE_WINDOWS = 4
# More looks than this (as intensity) on the most homogeneous blocks: not speckle.
_SPECKLED_LOOKS = 50.0
# Vote thresholds on the median ratios (measured on simulated 1- to 8-look speckle, white
# and correlated, on synthetic scenes with parcels, texture and edges: intensity gives
# 0.94-1.06 read as intensity and 0.3-0.84 read as amplitude; 1-look amplitude gives
# 1.26-1.28 read as intensity and 0.95-1.04 read as amplitude).
_AMPLITUDE_MIN_RATIO = 1.15
_FIT_BAND = (0.85, 1.12)


def units_evidence(images, valid=None) -> UnitsEvidence:
    """Measure whether positive real values behave like intensity or amplitude speckle.

    Parameters
    ----------
    images : array_like or sequence of array_like
        One or more 2-D images of raw values (full resolution: decimation does not
        change the distribution but homogeneous blocks need neighbouring pixels).
        Non-finite and non-positive values are ignored.
    valid : array_like of bool, optional
        Validity mask of a single image.

    Returns
    -------
    UnitsEvidence

    Notes
    -----
    Blocks of 16 x 16 are ranked on their left half and measured on their right half
    (:func:`despeck.speckle.homogeneous_blocks`, 20 % most homogeneous kept). The vote
    is ``'amplitude'`` when the ratio read as intensity is at least 1.15 and the ratio
    read as amplitude lies in [0.85, 1.12]; ``'intensity'`` when the ratio read as
    intensity lies in [0.85, 1.12] and the one read as amplitude is below 0.85; else
    undecided (e.g. amplitude of 4 or more looks, which hardly differs from intensity
    in shape, or strong texture).

    References
    ----------
    Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images.
    Artech House (Gamma intensity and Rayleigh/Nakagami amplitude speckle; the
    variance of log-intensity is the trigamma function of the looks).
    """
    from scipy import special

    from ..speckle import homogeneous_blocks

    if isinstance(images, np.ndarray) or (images is not None and np.ndim(images) == 2):
        images = [np.asarray(images)]
        masks = [valid]
    else:
        images = [np.asarray(a) for a in images or ()]
        masks = [None] * len(images)
    w = _EVIDENCE_BLOCK
    measured = np.zeros((w, w), dtype=bool)
    measured[:, w // 2:] = True  # the half homogeneous_blocks(split="halves") measures
    c2_i, c2_a, lv = [], [], []
    for image, mask in zip(images, masks):
        x = np.asarray(image, dtype=np.float64)
        if x.ndim != 2:
            continue
        ok = valid_mask(x, mask)
        try:
            origins, _ = homogeneous_blocks(np.where(ok, x, 0.0), ok, window=w, fraction=0.2, min_blocks=1,
                                            split="halves")
        except InputError:
            continue
        if len(origins) == 0:
            continue
        vals = np.stack([x[r:r + w, c:c + w][measured] for r, c in origins])
        with np.errstate(divide="ignore", invalid="ignore"):
            for y, out in ((vals, c2_i), (vals * vals, c2_a)):
                m = y.mean(axis=1)
                out.append(y.var(axis=1, ddof=1) / (m * m))
            lv.append(np.log(vals).var(axis=1, ddof=1))
    if not lv:
        return UnitsEvidence()
    c2_i, c2_a, lv = np.concatenate(c2_i), np.concatenate(c2_a), np.concatenate(lv)
    keep = (c2_i > 0) & (c2_a > 0) & (lv > 0) & np.isfinite(c2_a)
    looks = 1.0 / float(np.median(c2_i)) if c2_i.size and np.median(c2_i) > 0 else math.inf
    speckled = bool(looks < _SPECKLED_LOOKS)
    n = int(keep.sum())
    if n < _EVIDENCE_MIN_BLOCKS or not speckled:
        return UnitsEvidence(None, speckled, 0 if n < _EVIDENCE_MIN_BLOCKS else n, looks_as_intensity=looks)
    r_i = float(np.median(lv[keep] / special.polygamma(1, 1.0 / c2_i[keep])))
    r_a = float(np.median(4.0 * lv[keep] / special.polygamma(1, 1.0 / c2_a[keep])))
    lo, hi = _FIT_BAND
    if r_i >= _AMPLITUDE_MIN_RATIO and lo <= r_a <= hi:
        vote = "amplitude"
    elif lo <= r_i <= hi and r_a < lo:
        vote = "intensity"
    else:
        vote = None
    return UnitsEvidence(vote, True, n, r_i, r_a, looks)
