"""Reading and writing SAR rasters: units, validity masks, block windows, safe outputs.

Every scene enters the package as float32 linear **intensity** plus a boolean
**valid** mask, whatever the file holds: linear intensity (power), amplitude,
decibels, or complex samples (a complex data type such as CInt16/CFloat32, or a
two-band file of in-phase and quadrature parts). Files are read through rasterio,
so anything GDAL opens can be read, window by window along the file's own blocks
for scenes larger than memory; multi-band files (e.g. two polarisations) are read
band by band. Outputs are tiled, DEFLATE-compressed GeoTIFFs written into a
temporary file beside the destination and renamed only when complete, carrying the
input's CRS, transform, nodata, band descriptions and tags.

Invalid pixels are nodata, non-finite and non-positive intensities; their
intensity is set to 0.0 so arrays stay NaN-free, and the writer turns them back
into the output's nodata value.
"""

from __future__ import annotations

import contextlib
import math
import os
import pathlib
import warnings
from dataclasses import dataclass, field

import numpy as np
import rasterio
from rasterio.enums import MaskFlags
from rasterio.errors import RasterioError, RasterioIOError
from rasterio.windows import Window

from .atomic import OutputBusyError, claim_output, folder_is_full, publish, sibling_temp, write_problem
from .errors import InputError, RasterError
from .provenance import without_provenance

__all__ = [
    "UNITS",
    "OUTPUT_UNITS",
    "UnitsWarning",
    "UnitsDecision",
    "UnitsEvidence",
    "unit_hints",
    "units_evidence",
    "check_units",
    "to_intensity",
    "from_intensity",
    "detect_units",
    "SceneReader",
    "SceneWriter",
    "Scene",
    "open_scene",
    "open_output",
    "read_scene",
    "write_scene",
    "check_output_path",
    "OutputFolderError",
    "OutputBusyError",
    "read_with_halo",
    "process_file",
    "limit_gdal_cache",
]

UNITS = ("intensity", "amplitude", "db", "complex")
OUTPUT_UNITS = ("intensity", "amplitude", "db")

#: Tile size of written GeoTIFFs (pixels); a multiple of 16 as GDAL requires.
OUTPUT_TILE = 512

#: Band unit strings written to outputs (GDAL band metadata) and recognised on input.
_UNIT_LABELS = {"intensity": "linear power", "amplitude": "linear amplitude", "db": "dB"}

# Fraction of negative samples above which real data are taken to be decibels.
_DB_NEGATIVE_FRACTION = 0.05

# Pixels read when a scene is opened, to detect units and check it is not empty.
_PROBE_PIXELS = 1 << 18

# Band descriptions that mark a two-band file as in-phase / quadrature parts.
_IQ_NAMES = {("i", "q"), ("real", "imag"), ("real", "imaginary"), ("re", "im"), ("in-phase", "quadrature")}


#: Size of GDAL's block cache (MiB) while despeck reads and writes, unless the
#: environment sets GDAL_CACHEMAX. GDAL's default (5 % of RAM) lets a streamed pass
#: over a large scene grow to that size; a pass reads and writes each block about
#: once, so a modest cache costs nothing and keeps memory flat.
GDAL_CACHE_MB = 64

def limit_gdal_cache(megabytes=None) -> None:
    """Cap GDAL's block cache at ``megabytes`` (default :data:`GDAL_CACHE_MB`).

    Called by :func:`open_scene` and :func:`open_output`. Without ``megabytes`` it
    leaves alone a cache size chosen by the user, in the environment
    (``GDAL_CACHEMAX``) or in an active ``rasterio.Env``, and a cache already smaller
    than the cap.
    """
    from rasterio.env import get_gdal_config, getenv, hasenv, set_gdal_config

    cap = int(float(GDAL_CACHE_MB if megabytes is None else megabytes) * 2**20)
    if megabytes is None:
        if os.environ.get("GDAL_CACHEMAX") or (hasenv() and "GDAL_CACHEMAX" in getenv()):
            return
        current = get_gdal_config("GDAL_CACHEMAX")
        if isinstance(current, int) and current <= cap:
            return
    set_gdal_config("GDAL_CACHEMAX", cap)


_NATIVE_PRINTERS_QUIET = False


def quiet_native_error_printers() -> bool:
    """Stop GDAL's and libtiff's C-level default error printers writing raw lines to stderr.

    rasterio routes GDAL errors of the calling thread through Python (they become
    exceptions and despeck's one-line messages), but GDAL's compression worker threads
    (``GDAL_NUM_THREADS``) and libtiff's own default handler print straight to the
    terminal, e.g. ``_tiffWriteProc: File too large.`` before despeck's message on a full
    disk. Those failures are still caught (every written file is read back before it is
    published), so the process-wide fallbacks are made quiet: GDAL's global handler
    becomes ``CPLQuietErrorHandler`` (rasterio's per-thread handlers are untouched) and
    libtiff's default error and warning handlers are removed. Works with the libraries
    bundled in rasterio's wheels; elsewhere it does nothing and returns False.
    """
    global _NATIVE_PRINTERS_QUIET
    if _NATIVE_PRINTERS_QUIET:
        return True
    import ctypes
    import glob

    import rasterio

    libdir = os.path.join(os.path.dirname(rasterio.__file__), os.pardir, "rasterio.libs")
    done = False
    try:
        for path in glob.glob(os.path.join(libdir, "libgdal-*.so*")):
            gdal = ctypes.CDLL(path)
            gdal.CPLSetErrorHandler.restype = ctypes.c_void_p
            gdal.CPLSetErrorHandler.argtypes = [ctypes.c_void_p]
            gdal.CPLSetErrorHandler(ctypes.cast(gdal.CPLQuietErrorHandler, ctypes.c_void_p).value)
            done = True
        for path in glob.glob(os.path.join(libdir, "libtiff-*.so*")):
            tiff = ctypes.CDLL(path)
            for name in ("TIFFSetErrorHandler", "TIFFSetWarningHandler"):
                fn = getattr(tiff, name)
                fn.restype = ctypes.c_void_p
                fn.argtypes = [ctypes.c_void_p]
                fn(None)
            done = True
    except (OSError, AttributeError):  # pragma: no cover - other GDAL builds
        return False
    _NATIVE_PRINTERS_QUIET = done
    return done


class UnitsWarning(UserWarning):
    """The data do not look like the units they were declared (or assumed) to be in."""


# --------------------------------------------------------------------------- units

def check_units(units, *, name: str = "units", output: bool = False) -> str:
    """Return ``units`` normalised to lower case, or raise :class:`InputError`.

    ``output=True`` excludes ``'complex'``: results are always written as real values.
    """
    allowed = OUTPUT_UNITS if output else UNITS
    value = str(units).strip().lower() if units is not None else ""
    if value == "complex" and output:
        raise InputError(
            f"{name}: 'complex' cannot be an output unit (phase is not kept); choose one of {', '.join(OUTPUT_UNITS)}"
        )
    if value not in allowed:
        raise InputError(f"{name} must be one of {', '.join(allowed)}, got {units!r}")
    return value


def to_intensity(data, units) -> tuple[np.ndarray, np.ndarray]:
    """Convert raw samples in ``units`` to float32 linear intensity and a validity mask.

    Parameters
    ----------
    data : array_like
        Raw samples. For ``'complex'`` either a complex array or a real array whose
        first axis has length 2 (in-phase, quadrature).
    units : {'intensity', 'amplitude', 'db', 'complex'}
        ``db``: ``10 ** (x / 10)``; ``amplitude``: ``x ** 2``; ``complex``: ``|z| ** 2``.

    Returns
    -------
    intensity : ndarray of float32
        Linear intensity; 0.0 where invalid.
    valid : ndarray of bool
        True where the sample is finite and the intensity is positive. Negative
        amplitudes are invalid (an amplitude is a modulus). Nodata values are the
        reader's business, not this function's.
    """
    units = check_units(units)
    a = np.asarray(data)
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        if units == "complex":
            if np.iscomplexobj(a):
                z = a.astype(np.complex64, copy=False)
                intensity = (z.real * z.real + z.imag * z.imag).astype(np.float32, copy=False)
            elif a.ndim >= 1 and a.shape[0] == 2:
                i = a[0].astype(np.float32, copy=False)
                q = a[1].astype(np.float32, copy=False)
                intensity = i * i + q * q
            else:
                raise InputError(
                    f"complex data must be a complex array or have in-phase and quadrature parts on a first axis of length 2, got shape {a.shape} of {a.dtype}"
                )
        else:
            if np.iscomplexobj(a):
                raise InputError(f"data are complex but units were given as {units!r}; use units 'complex'")
            x = a.astype(np.float32, copy=False)
            if units == "intensity":
                intensity = x.copy() if x is a else x
            elif units == "amplitude":
                intensity = np.where(x > 0, x * x, np.float32(0)).astype(np.float32, copy=False)
            else:  # db
                intensity = np.power(np.float32(10.0), x / np.float32(10.0), dtype=np.float32)
        valid = np.isfinite(intensity) & (intensity > 0)
        intensity = np.where(valid, intensity, np.float32(0)).astype(np.float32, copy=False)
    return intensity, valid


def from_intensity(intensity, units) -> np.ndarray:
    """Convert linear intensity to ``units`` (float32); the inverse of :func:`to_intensity`.

    Non-positive intensities give 0 amplitude and ``-inf`` dB; callers that write
    files mark them as nodata. ``'complex'`` is refused: the phase is gone.
    """
    units = check_units(units, output=True)
    x = np.asarray(intensity, dtype=np.float32)
    with np.errstate(divide="ignore", invalid="ignore"):
        if units == "intensity":
            return x.copy()
        if units == "amplitude":
            return np.sqrt(np.maximum(x, np.float32(0)))
        return (np.float32(10.0) * np.log10(x)).astype(np.float32, copy=False)


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


def _is_complex_dtype(dtype) -> bool:
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
    if _is_complex_dtype(dtype):
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
    for units, label in _UNIT_LABELS.items():
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
    import re

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
_EVIDENCE_WINDOW = 256
_EVIDENCE_WINDOWS = 4
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

    from .speckle import homogeneous_blocks

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
        ok = np.isfinite(x) & (x > 0)
        if mask is not None:
            ok &= np.asarray(mask, dtype=bool)
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


# --------------------------------------------------------------------------- paths

class OutputFolderError(RasterError):
    """The output folder cannot take any file: read-only, no permission, or its disk is full.

    Unlike other write errors, the next output into the same folder would fail too, so
    a batch stops at the first one.
    """


# An output folder with less free space than this cannot take any raster (a few blocks).
_MIN_FREE_BYTES = 1 << 16

# Kinds of write_problem() that no other output into the same folder can escape.
_FOLDER_KINDS = ("read-only", "permission", "full")


def _error_detail(exc) -> str:
    """The most specific message in an error's chain of causes, on one line.

    rasterio reports a failed read or write as "Read failed. See previous exception
    for details."; the causes hold GDAL's own message (e.g. the bytes missing).
    """
    messages, seen = [], exc
    while seen is not None and len(messages) < 10:
        text = " ".join(str(getattr(seen, "strerror", None) or seen).split())
        if text:
            messages.append(text)
        seen = seen.__cause__ or seen.__context__
    useful = [m for m in messages if "see previous exception" not in m.lower()]
    return (useful or messages or [type(exc).__name__])[-1]


def _write_error(path, exc=None, partial=None, what="cannot write the output") -> RasterError:
    """A one-line error for a failed write, naming the folder when it is the cause."""
    path = pathlib.Path(path)
    folder = path.parent
    problem = write_problem(folder, exc, partial=partial)
    if problem is not None and problem.kind in _FOLDER_KINDS:
        return OutputFolderError(f"{path}: cannot write in the output folder {folder}: {problem.text}; "
                                 "nothing was written")
    reason = problem.text if problem is not None else _error_detail(exc) if exc is not None else "unknown error"
    return RasterError(f"{path}: {what}: {reason}; nothing was written at the destination")


def _same_file(a: pathlib.Path, b: pathlib.Path) -> bool:
    try:
        if a.exists() and b.exists():
            return os.path.samefile(a, b)
    except OSError:
        pass
    return a.resolve() == b.resolve()


def check_output_path(output, inputs, *, overwrite=False, create_dir=True) -> pathlib.Path:
    """Check that ``output`` may be written and return it as a :class:`pathlib.Path`.

    Refuses an output that is one of ``inputs`` (never overwrite an input, even with
    ``overwrite``), an existing file unless ``overwrite``, and an existing directory.
    A missing parent directory is created when ``create_dir`` (else refused). The
    folder must take a new file (a short-lived probe file is created and removed) and
    have free space, else :class:`OutputFolderError` names the folder.
    """
    if output is None or str(output) == "":
        raise InputError("output path is empty")
    out = pathlib.Path(output).expanduser()
    if isinstance(inputs, (str, os.PathLike)):
        inputs = [inputs]
    for item in inputs or ():
        if item is None:
            continue
        if _same_file(out, pathlib.Path(item).expanduser()):
            raise InputError(f"{out}: output path is the same as the input {item}; choose another output")
    if out.is_dir():
        raise InputError(f"{out}: output path is a directory; give a file name")
    if out.exists() and not overwrite:
        raise InputError(f"{out}: output already exists; choose another path or allow overwriting")
    parent = out.parent
    if not parent.exists():
        if not create_dir:
            raise RasterError(f"{out}: output directory {parent} does not exist")
        try:
            parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputFolderError(f"{out}: cannot create output directory {parent}: {exc.strerror or exc}") from None
    elif not parent.is_dir():
        raise RasterError(f"{out}: {parent} is not a directory")
    try:
        sibling_temp(out).unlink()
    except OSError as exc:
        raise _write_error(out, exc) from None
    if folder_is_full(parent, _MIN_FREE_BYTES):
        raise _write_error(out)
    return out


# --------------------------------------------------------------------------- reading

def _as_window(window, width: int, height: int, name) -> Window:
    if window is None:
        return Window(0, 0, width, height)
    if not isinstance(window, Window):
        try:
            window = Window.from_slices(*window) if len(window) == 2 and not np.isscalar(window[0]) else Window(*window)
        except Exception:
            raise InputError(f"{name}: window must be a rasterio Window, got {window!r}") from None
    c0, r0 = int(window.col_off), int(window.row_off)
    w, h = int(window.width), int(window.height)
    if c0 < 0 or r0 < 0 or w <= 0 or h <= 0 or c0 + w > width or r0 + h > height:
        raise InputError(f"{name}: window {window} lies outside the {width}x{height} scene")
    return Window(c0, r0, w, h)


def _nodata_mask(raw, nodata):
    """True where ``raw`` equals the nodata value (NaN nodata compares as NaN)."""
    if nodata is None:
        return np.zeros(raw.shape, dtype=bool)
    if isinstance(nodata, float) and math.isnan(nodata):
        return np.isnan(raw.real if np.iscomplexobj(raw) else raw)
    if np.iscomplexobj(raw):
        return (raw.real == nodata) & (raw.imag == nodata)
    if raw.dtype.kind == "f":
        # the file stores nodata in its own precision; compare in that precision
        return raw == raw.dtype.type(nodata)
    return raw == nodata


class SceneReader:
    """An open SAR raster, read as float32 linear intensity plus a validity mask.

    Use :func:`open_scene` to create one; it is a context manager and must be
    closed. ``band`` arguments count SAR bands from 1: a two-band in-phase /
    quadrature file has one SAR band.

    Attributes
    ----------
    path : pathlib.Path
    width, height : int
    band_count : int
        SAR bands (a two-band I/Q file counts as 1).
    units : str
        Units the file holds (see :class:`UnitsDecision`); :attr:`units_decision` says why.
    dtype : str
        The file's data type (rasterio name).
    crs, transform, nodata
        Georeferencing and the nodata value of the first band (None if unset).
    block_shape : tuple of int
        ``(rows, cols)`` of the file's blocks.
    descriptions : tuple of str or None
        Descriptions of the SAR bands.
    tags : dict
        Dataset-level metadata tags.
    """

    def __init__(self, path, units=None):
        self.path = pathlib.Path(path).expanduser()
        name = str(self.path)
        if not self.path.exists():
            raise RasterError(f"{name}: no such file")
        if self.path.is_dir():
            raise RasterError(f"{name}: is a directory, not a raster file")
        limit_gdal_cache()
        try:
            self._ds = rasterio.open(self.path)
        except RasterioIOError as exc:
            first = str(exc).splitlines()[0] if str(exc) else "unrecognised format"
            raise RasterError(f"{name}: not a raster GDAL can read ({first})") from None
        except (RasterioError, OSError) as exc:
            raise RasterError(f"{name}: cannot open: {exc}") from None
        try:
            self._setup(units)
        except BaseException:
            self._ds.close()
            raise

    def _setup(self, units):
        ds, name = self._ds, str(self.path)
        if ds.width == 0 or ds.height == 0 or ds.count == 0:
            raise RasterError(f"{name}: the raster is empty ({ds.width}x{ds.height}, {ds.count} bands)")
        self.width, self.height = int(ds.width), int(ds.height)
        self.dtype = ds.dtypes[0]
        self.nodata = ds.nodata
        self.crs = ds.crs
        self.transform = ds.transform
        self.block_shape = tuple(int(v) for v in ds.block_shapes[0])
        self.tags = dict(ds.tags())
        self._file_descriptions = tuple(ds.descriptions)
        self._masked_bands = {
            b for b in range(1, ds.count + 1)
            if not ({MaskFlags.all_valid, MaskFlags.nodata} & set(ds.mask_flag_enums[b - 1]))
        }
        sample_raw, has_valid = self._probe(declared=units)
        self.units_decision = detect_units(
            sample_raw, dtype=self.dtype, band_count=ds.count, descriptions=ds.descriptions,
            band_units=ds.units, declared=units, name=name, tags={**ds.tags(1), **self.tags},
            image=self._evidence_images,
        )
        self.units = self.units_decision.units
        self._iq = self.units == "complex" and not _is_complex_dtype(self.dtype)
        self.band_count = 1 if self._iq else int(ds.count)
        if not has_valid and not self._any_valid():
            raise RasterError(f"{name}: every pixel is nodata or invalid; nothing to process")
        for note in self.units_decision.warnings:
            warnings.warn(f"{name}: {note}", UnitsWarning, stacklevel=3)

    # ----------------------------------------------------------- metadata
    @property
    def profile(self) -> dict:
        """A copy of the file's rasterio profile."""
        return dict(self._ds.profile)

    @property
    def descriptions(self) -> tuple:
        if self._iq:
            return (None,)
        return self._file_descriptions

    @property
    def closed(self) -> bool:
        return self._ds.closed

    def close(self):
        self._ds.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        return (f"SceneReader({str(self.path)!r}, {self.width}x{self.height}, bands={self.band_count}, "
                f"units={self.units!r})")

    # ----------------------------------------------------------- raw access
    def _check_band(self, band) -> int:
        try:
            b = int(band)
        except (TypeError, ValueError):
            b = 0
        if b < 1 or b > self.band_count:
            raise InputError(f"{self.path}: band {band!r} does not exist (the scene has {self.band_count} SAR band(s))")
        return b

    def _raw(self, window: Window, band: int, out_shape=None):
        """Raw samples and the nodata/mask-band invalidity for one SAR band."""
        ds = self._ds
        bands = [1, 2] if self._iq else [band]
        kwargs = {"window": window}
        if out_shape is not None:
            kwargs["out_shape"] = (len(bands),) + tuple(out_shape)
        try:
            raw = ds.read(bands, **kwargs)
        except (RasterioError, OSError) as exc:
            raise self._read_error(exc, window) from None
        bad = np.zeros(raw.shape[1:], dtype=bool)
        nodata_all = np.ones(raw.shape[1:], dtype=bool)
        for k, b in enumerate(bands):
            nd = ds.nodatavals[b - 1]
            if nd is not None:
                nodata_all &= _nodata_mask(raw[k], nd)
            else:
                nodata_all[:] = False
            if b in self._masked_bands:
                try:
                    m = ds.read_masks(b, **({"window": window} | ({"out_shape": tuple(out_shape)} if out_shape else {})))
                except (RasterioError, OSError) as exc:
                    raise self._read_error(exc, window) from None
                bad |= m == 0
        bad |= nodata_all
        data = raw if self._iq else raw[0]
        return data, bad

    def _read_error(self, exc, window) -> RasterError:
        """One line for a failed read: the file, where, and GDAL's own reason."""
        w = window
        where = (f"rows {int(w.row_off)}-{int(w.row_off + w.height) - 1}, "
                 f"columns {int(w.col_off)}-{int(w.col_off + w.width) - 1}")
        return RasterError(f"{self.path}: cannot read the data at {where} (the file may be cut off or damaged): "
                           f"{_error_detail(exc)}")

    def _probe(self, declared):
        """Read up to ``_PROBE_PIXELS`` from blocks spread over band 1 (all of a small file)."""
        ds = self._ds
        bands = [1, 2] if ds.count == 2 and not _is_complex_dtype(self.dtype) else [1]
        windows = [w for _, w in ds.block_windows(1)]
        per_block = max(1, self.block_shape[0] * self.block_shape[1])
        n_take = max(1, min(len(windows), _PROBE_PIXELS // per_block))
        picks = np.unique(np.linspace(0, len(windows) - 1, n_take).round().astype(int))
        values, has_valid = [], False
        for i in picks:
            w = windows[i]
            try:
                raw = ds.read(bands, window=w)
                masks = {b: ds.read_masks(b, window=w) for b in bands if b in self._masked_bands}
            except (RasterioError, OSError) as exc:
                raise self._read_error(exc, w) from None
            bad = np.zeros(raw.shape[1:], dtype=bool)
            for k, b in enumerate(bands):
                nd = ds.nodatavals[b - 1]
                if nd is not None:
                    bad |= _nodata_mask(raw[k], nd)
                if b in masks:
                    bad |= masks[b] == 0
            if np.iscomplexobj(raw):
                good = ~bad & np.isfinite(raw[0].real) & np.isfinite(raw[0].imag)
                has_valid |= bool(np.any(good & (np.abs(raw[0]) > 0)))
                continue
            good = ~bad & np.all(np.isfinite(raw), axis=0)
            values.append(raw[:, good].astype(np.float64))
            has_valid |= bool(np.any(good & (raw[0] != 0)))
        sample = np.concatenate(values, axis=1) if values else None
        return sample, has_valid

    def _evidence_images(self) -> list:
        """Full-resolution windows of band 1's raw values for :func:`units_evidence`.

        Up to four windows of 256 x 256 pixels, at a third and two thirds of the scene's
        height and width; nodata, masked and non-finite samples are NaN.
        """
        ds = self._ds
        side_r, side_c = min(_EVIDENCE_WINDOW, self.height), min(_EVIDENCE_WINDOW, self.width)
        rows = sorted({int(v) for v in np.linspace(0, self.height - side_r, 4)[1:3].round()})
        cols = sorted({int(v) for v in np.linspace(0, self.width - side_c, 4)[1:3].round()})
        images = []
        for r in rows:
            for c in cols:
                w = Window(c, r, side_c, side_r)
                try:
                    raw = ds.read(1, window=w)
                    bad = _nodata_mask(raw, ds.nodatavals[0])
                    if 1 in self._masked_bands:
                        bad |= ds.read_masks(1, window=w) == 0
                except (RasterioError, OSError) as exc:
                    raise self._read_error(exc, w) from None
                values = raw.astype(np.float64)
                values[bad | ~np.isfinite(values)] = np.nan
                images.append(values)
        return images[:_EVIDENCE_WINDOWS]

    def _any_valid(self) -> bool:
        for b in range(1, self.band_count + 1):
            for w in self.block_windows(b):
                _, valid = self.read(w, band=b)
                if valid.any():
                    return True
        return False

    # ----------------------------------------------------------- reading
    def read(self, window=None, band=1):
        """Read one SAR band as float32 intensity and a bool validity mask, shape ``(h, w)``.

        Parameters
        ----------
        window : rasterio.windows.Window, optional
            Part of the scene to read (whole scene if None).
        band : int
            SAR band, from 1.

        Raises
        ------
        InputError
            If a linear band holds negative values.
        """
        b = self._check_band(band)
        w = _as_window(window, self.width, self.height, self.path)
        raw, bad = self._raw(w, b)
        return self._convert(raw, bad, w)

    def _convert(self, raw, bad, where):
        if self.units in ("intensity", "amplitude"):
            negative = (raw < 0) & ~bad
            if negative.any():
                raise InputError(
                    f"{self.path}: negative values in {where} cannot be linear {self.units}; "
                    "if the file is in decibels declare units 'db'"
                )
        intensity, valid = to_intensity(raw, self.units)
        if bad.any():
            valid &= ~bad
            intensity[bad] = 0.0
        return intensity, valid

    def block_windows(self, band=1) -> list:
        """Windows of the file's own blocks for ``band`` (reading them never splits a block)."""
        b = self._check_band(band)
        file_band = 1 if self._iq else b
        return [w for _, w in self._ds.block_windows(file_band)]

    def row_windows(self, min_rows=256) -> list:
        """Full-width strips of at least ``min_rows`` rows, aligned to block rows (the last may be shorter)."""
        try:
            min_rows = int(min_rows)
        except (TypeError, ValueError):
            min_rows = 0
        if min_rows < 1:
            raise InputError(f"min_rows must be a positive integer, got {min_rows!r}")
        bh = max(1, self.block_shape[0])
        rows = -(-min_rows // bh) * bh
        return [Window(0, r, self.width, min(rows, self.height - r)) for r in range(0, self.height, rows)]

    def sample_step(self, max_pixels=1_000_000) -> int:
        """Decimation step (keep every ``step``-th row and column) of :meth:`sample_image`."""
        max_pixels = int(max_pixels)
        if max_pixels < 1:
            raise InputError(f"max_pixels must be positive, got {max_pixels}")
        return max(1, math.ceil(math.sqrt(self.width * self.height / max_pixels)))

    def sample_image(self, max_pixels=1_000_000, band=1):
        """A decimated view of a band: ``(intensity, valid)`` of at most ``max_pixels`` pixels.

        Reads every k-th row and column (nearest-neighbour decimation by GDAL), so
        memory stays bounded whatever the scene's size; decimation also breaks the
        spatial correlation of speckle between neighbouring kept pixels.
        """
        b = self._check_band(band)
        step = self.sample_step(max_pixels)
        out_shape = (max(1, self.height // step), max(1, self.width // step))
        w = Window(0, 0, self.width, self.height)
        raw, bad = self._raw(w, b, out_shape=None if step == 1 else out_shape)
        return self._convert(raw, bad, "the decimated sample")

    def sample_intensity(self, max_pixels=1_000_000, band=1) -> np.ndarray:
        """Valid intensities of a decimated read (1-D float64), for scene-level statistics."""
        intensity, valid = self.sample_image(max_pixels, band)
        return intensity[valid].astype(np.float64)


def open_scene(path, units=None) -> SceneReader:
    """Open a SAR raster for reading as intensity; see :class:`SceneReader`.

    Parameters
    ----------
    path : str or path-like
    units : {'intensity', 'amplitude', 'db', 'complex'}, optional
        Units of the file's values; detected when unambiguous (see :func:`detect_units`),
        otherwise linear intensity is assumed.

    Raises
    ------
    RasterError
        Missing file, not a raster, empty raster, every pixel nodata.
    InputError
        Negative values declared linear, complex declared on real data, unknown units.
    """
    return SceneReader(path, units=units)


# --------------------------------------------------------------------------- writing

def _nodata_is_safe(nodata, units) -> bool:
    """Whether ``nodata`` can never be confused with a valid value in ``units``."""
    if nodata is None:
        return False
    nodata = float(nodata)
    if math.isnan(nodata):
        return True
    if units in ("intensity", "amplitude"):
        return nodata <= 0
    # float32 intensities lie within about 1e-45 .. 3.4e38, i.e. -454 .. +386 dB
    return nodata < -460 or nodata > 390


def _decode_threads():
    """Let GDAL decode the blocks of one read on all cores, unless the user chose a number."""
    from rasterio.env import getenv, hasenv

    if os.environ.get("GDAL_NUM_THREADS") or (hasenv() and "GDAL_NUM_THREADS" in getenv()):
        return contextlib.nullcontext()
    return rasterio.Env(GDAL_NUM_THREADS="ALL_CPUS")


#: Metadata tags describing the speckle of a file's pixels; output writers do not copy
#: them from the input (despeck.looks writes the ones that hold for the output).
SPECKLE_TAGS = frozenset({
    "looks", "looks_source", "enl", "number_of_looks", "speckle",
    "speckle_correlation_rows", "speckle_correlation_cols", "speckle_correlation_source",
})


class SceneWriter:
    """A GeoTIFF being written, in ``units``, georeferenced like a source scene.

    Use :func:`open_output`. Data go to a temporary file in the destination folder,
    renamed to the destination when the context manager exits cleanly and deleted
    if it exits with an exception, so a crash never leaves a half-written output.
    Before the rename the file is read back block by block (:meth:`close`). While it
    is being written the output is claimed (:func:`despeck.atomic.claim_output`): a
    second writer of the same path, in this or another process, gets
    :class:`OutputBusyError`.

    Attributes
    ----------
    path : pathlib.Path
        Final destination.
    units : str
    nodata : float
        Value written for invalid pixels.
    width, height, band_count : int
    """

    def __init__(self, path, like, *, units=None, band_count=None, overwrite=False, dtype="float32", cog=False):
        limit_gdal_cache()
        quiet_native_error_printers()  # write errors surface as one despeck line, not raw C output
        self.cog = bool(cog)
        like_path = getattr(like, "path", None)
        self.path = check_output_path(path, [like_path] if like_path else [], overwrite=overwrite)
        if units is None:
            like_units = getattr(like, "units", "intensity")
            units = "intensity" if like_units == "complex" else like_units
        self.units = check_units(units, name="output units", output=True)
        dtype = str(np.dtype(dtype))
        if dtype not in ("float32", "float64"):
            raise InputError(f"output dtype must be float32 or float64, got {dtype!r}")
        self.dtype = dtype
        like_bands = int(getattr(like, "band_count", 1) or 1)
        self.band_count = like_bands if band_count is None else int(band_count)
        if self.band_count < 1:
            raise InputError(f"output band_count must be at least 1, got {band_count!r}")
        profile = dict(getattr(like, "profile", {}) or {})
        self.width = int(getattr(like, "width", profile.get("width", 0)))
        self.height = int(getattr(like, "height", profile.get("height", 0)))
        if self.width <= 0 or self.height <= 0:
            raise InputError(f"{self.path}: the source scene has no size to copy")
        nodata = getattr(like, "nodata", profile.get("nodata"))
        self.nodata = float(nodata) if _nodata_is_safe(nodata, self.units) else float("nan")
        # A fresh GeoTIFF profile: the source's driver-specific creation options do not apply.
        profile = dict(
            driver="GTiff", width=self.width, height=self.height, count=self.band_count, dtype=dtype,
            nodata=self.nodata, tiled=True, blockxsize=OUTPUT_TILE, blockysize=OUTPUT_TILE, compress="deflate",
            predictor=3, interleave="band", bigtiff="IF_SAFER",
        )
        crs = getattr(like, "crs", None)
        transform = getattr(like, "transform", None)
        if crs is not None:
            profile["crs"] = crs
        if transform is not None:
            profile["transform"] = transform
        self._profile = profile
        self._tmp = None
        self._ds = None
        # Claim the output so a second process cannot write it at the same time.
        try:
            self._claim = claim_output(self.path)
        except OutputBusyError:
            raise
        except OSError as exc:
            raise _write_error(self.path, exc) from None
        try:
            if self.path.exists() and not overwrite:
                raise InputError(f"{self.path}: output already exists (written by another process meanwhile)")
            try:
                self._tmp = sibling_temp(self.path)
            except OSError as exc:
                raise _write_error(self.path, exc) from None
            with warnings.catch_warnings():
                # an ungeoreferenced source gives an ungeoreferenced output; that is not news
                warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
                self._ds = rasterio.open(self._tmp, "w", **profile)
            descriptions = tuple(getattr(like, "descriptions", ()) or ())
            for b in range(1, self.band_count + 1):
                if b <= len(descriptions) and descriptions[b - 1]:
                    self._ds.set_band_description(b, descriptions[b - 1])
                self._ds.set_band_unit(b, _UNIT_LABELS[self.units])
            # Tags that describe the speckle of the source pixels no longer hold for new
            # pixels (a filtered scene is not L-look speckle), nor does the source's record
            # of what made it (despeck.provenance); writers record their own.
            tags = {k: v for k, v in without_provenance(getattr(like, "tags", {})).items()
                    if str(k).strip().lower() not in SPECKLE_TAGS}
            if tags:
                self._ds.update_tags(**tags)
        except BaseException as exc:
            error = None
            if isinstance(exc, (RasterioError, OSError)) and not isinstance(exc, RasterError):
                error = _write_error(self.path, exc, partial=self._tmp, what="cannot create the output")
            if self._ds is not None:
                try:
                    self._ds.close()
                except (RasterioError, OSError):
                    pass
            if self._tmp is not None:
                self._tmp.unlink(missing_ok=True)
            self._claim.release()
            if error is not None:
                raise error from None
            raise
        self._done = False

    def set_description(self, band, text):
        """Set one band's description (e.g. the filter that made it)."""
        self._ds.set_band_description(int(band), str(text))

    def update_tags(self, **tags):
        """Add dataset-level metadata tags."""
        self._ds.update_tags(**{k: str(v) for k, v in tags.items()})

    def write(self, intensity, window=None, band=1, valid=None):
        """Write linear intensity into ``window`` of ``band``, converted to the output units.

        Pixels that are invalid (``valid`` False, non-finite or non-positive
        intensity) are written as the output's nodata value.
        """
        if self._done:
            raise RasterError(f"{self.path}: writer is closed")
        b = int(band)
        if b < 1 or b > self.band_count:
            raise InputError(f"{self.path}: band {band!r} does not exist (output has {self.band_count} band(s))")
        w = _as_window(window, self.width, self.height, self.path)
        x = np.asarray(intensity, dtype=np.float32)
        if x.shape != (int(w.height), int(w.width)):
            raise InputError(f"{self.path}: data of shape {x.shape} do not fit window {w}")
        ok = np.isfinite(x) & (x > 0)
        if valid is not None:
            valid = np.asarray(valid, dtype=bool)
            if valid.shape != x.shape:
                raise InputError(f"{self.path}: valid mask of shape {valid.shape} does not match data {x.shape}")
            ok &= valid
        out = from_intensity(x, self.units)
        ok &= np.isfinite(out)
        out = np.where(ok, out, np.float32(self.nodata)).astype(self.dtype, copy=False)
        try:
            self._ds.write(out, b, window=w)
        except (RasterioError, OSError) as exc:
            raise _write_error(self.path, exc, partial=self._tmp) from None

    def block_windows(self) -> list:
        """Windows of the output's tiles (write in these for the least work)."""
        return [w for _, w in self._ds.block_windows(1)]

    def close(self, *, commit=True):
        """Finish the file: verify it and rename it into place (``commit``), or delete it.

        Before the rename the finished file is flushed to disk and opened again, and
        every block of every band must be present inside the file and decode (see
        :meth:`_verify`): GDAL compresses blocks on worker threads whose write errors
        (a full disk, a file size limit) it does not report to the caller. A file that
        fails is deleted and :class:`RasterError` (:class:`OutputFolderError` when the
        folder is the cause) is raised; the destination is left untouched.
        """
        if self._done:
            return
        self._done = True
        published = False
        try:
            try:
                self._ds.close()
            except (RasterioError, OSError) as exc:
                if commit:
                    raise _write_error(self.path, exc, partial=self._tmp) from None
            if commit:
                try:
                    self._verify()
                    if self.cog:
                        self._publish_cog()
                    else:
                        publish(self._tmp, self.path)
                except (RasterioError, OSError) as exc:
                    if isinstance(exc, RasterError):
                        raise
                    raise _write_error(self.path, exc, partial=self._tmp) from None
                published = True
        finally:
            if not published or self.cog:
                self._tmp.unlink(missing_ok=True)
            self._claim.release()

    def _publish_cog(self):
        """Translate the verified tiled file into a Cloud-Optimised GeoTIFF, verify it, rename it.

        GDAL's COG driver (``rasterio.shutil.copy(..., driver="COG")``) builds the
        overviews itself (``OVERVIEWS=IGNORE_EXISTING``: halving until the image fits in
        one 512-pixel tile) by averaging the valid pixels (``OVERVIEW_RESAMPLING=AVERAGE``,
        nodata excluded; in linear units this is a multilook) and lays the file out with
        every directory before the pixel data. The copy is made into a second temporary
        file beside the destination; it must report ``LAYOUT=COG`` and pass the same
        block-by-block check as the tiled file before it is renamed into place.
        """
        import rasterio.shutil

        cog_tmp = None
        try:
            cog_tmp = sibling_temp(self.path)
            options = dict(
                COMPRESS="DEFLATE", PREDICTOR="FLOATING_POINT", OVERVIEW_COMPRESS="DEFLATE",
                OVERVIEW_PREDICTOR="FLOATING_POINT", BLOCKSIZE=str(OUTPUT_TILE), BIGTIFF="IF_SAFER",
                OVERVIEWS="IGNORE_EXISTING", OVERVIEW_RESAMPLING="AVERAGE",
            )
            with _decode_threads():
                rasterio.shutil.copy(str(self._tmp), str(cog_tmp), driver="COG", **options)
            with rasterio.open(cog_tmp) as ds:
                layout = (ds.tags(ns="IMAGE_STRUCTURE") or {}).get("LAYOUT", "")
            if layout.upper() != "COG":
                raise _write_error(self.path, partial=cog_tmp,
                                   what=f"GDAL's COG driver wrote a file without the COG layout ({layout or 'none'})")
            self._verify(cog_tmp)
            publish(cog_tmp, self.path)
            cog_tmp = None
        except (RasterioError, OSError) as exc:
            if isinstance(exc, RasterError):
                raise
            raise _write_error(self.path, exc, partial=cog_tmp, what="cannot write the Cloud-Optimised GeoTIFF") from None
        finally:
            if cog_tmp is not None:
                cog_tmp.unlink(missing_ok=True)

    def _verify(self, tmp=None):
        """Check a closed temporary file: size, data type, every block present and decodable.

        Each block's byte range (from the TIFF tile offsets and sizes) must lie inside
        the file, and every block row is read and decoded by GDAL (in full-width strips,
        so memory stays at one row of blocks). ``tmp`` defaults to the tiled temporary file.
        """
        tmp = self._tmp if tmp is None else tmp
        size = os.path.getsize(tmp)
        with _decode_threads(), rasterio.open(tmp) as ds:
            if (ds.width, ds.height, ds.count) != (self.width, self.height, self.band_count) or \
                    ds.dtypes[0] != self.dtype:
                raise _write_error(self.path, partial=tmp, what="the written file has the wrong size or type")
            bh, bw = (int(v) for v in ds.block_shapes[0])
            buf = np.empty((bh, self.width), dtype=self.dtype)
            for b in range(1, self.band_count + 1):
                for i in range(-(-self.height // bh)):
                    for j in range(-(-self.width // bw)):
                        offset = ds.get_tag_item(f"BLOCK_OFFSET_{j}_{i}", "TIFF", bidx=b)
                        nbytes = ds.get_tag_item(f"BLOCK_SIZE_{j}_{i}", "TIFF", bidx=b)
                        if not offset or not nbytes or int(offset) + int(nbytes) > size:
                            raise _write_error(
                                self.path, partial=tmp,
                                what=f"the written file is incomplete (block {i},{j} of band {b} is missing or cut off)",
                            )
                    r0 = i * bh
                    n = min(bh, self.height - r0)
                    try:
                        ds.read(b, window=Window(0, r0, self.width, n), out=buf[:n])
                    except (RasterioError, OSError) as exc:
                        raise _write_error(
                            self.path, exc, partial=tmp,
                            what=f"the written file does not read back (rows {r0}-{r0 + n - 1} of band {b})",
                        ) from None

    def abort(self):
        """Delete the temporary file; the destination is left untouched."""
        self.close(commit=False)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        self.close(commit=exc_type is None)
        return False

    def __del__(self):  # a writer dropped without closing must not leave its temporary file or claim
        try:
            if not self._done:
                self.abort()
        except Exception:  # noqa: BLE001 - never raise from a finaliser
            pass


def open_output(path, like, *, units=None, band_count=None, overwrite=False, dtype="float32",
                cog=False) -> SceneWriter:
    """Create an output GeoTIFF georeferenced like ``like``; see :class:`SceneWriter`.

    Parameters
    ----------
    path : str or path-like
        Destination; a missing directory is created. Never one of the inputs.
    like : SceneReader or Scene
        Source of CRS, transform, nodata, band descriptions and tags.
    units : {'intensity', 'amplitude', 'db'}, optional
        Output units; default the source's (intensity for a complex source).
    band_count : int, optional
        Default the source's number of SAR bands.
    overwrite : bool
        Replace an existing output (never an input).
    dtype : {'float32', 'float64'}
    cog : bool
        Publish a Cloud-Optimised GeoTIFF with overviews, made from the finished tiled
        file by GDAL's COG driver (see :meth:`SceneWriter._publish_cog`).

    Notes
    -----
    Tiles of 512 x 512, DEFLATE with the floating-point predictor (PREDICTOR=3),
    BigTIFF when the file could exceed 4 GB. The source's nodata value is kept if no
    valid output value can equal it (e.g. 0 for linear units), else NaN is used.
    """
    return SceneWriter(path, like, units=units, band_count=band_count, overwrite=overwrite, dtype=dtype, cog=cog)


# --------------------------------------------------------------------------- whole arrays

@dataclass
class Scene:
    """A whole band in memory: intensity, validity, and what is needed to write it back."""

    intensity: np.ndarray
    valid: np.ndarray
    units: str
    profile: dict
    crs: object
    transform: object
    nodata: object
    path: pathlib.Path
    descriptions: tuple = ()
    tags: dict = field(default_factory=dict)

    @property
    def height(self) -> int:
        return int(self.intensity.shape[-2])

    @property
    def width(self) -> int:
        return int(self.intensity.shape[-1])

    @property
    def band_count(self) -> int:
        return 1 if self.intensity.ndim == 2 else int(self.intensity.shape[0])


def read_scene(path, units=None, band=1) -> Scene:
    """Read one SAR band of a raster whole; see :func:`open_scene` for ``units`` and errors."""
    with open_scene(path, units=units) as reader:
        intensity, valid = reader.read(band=band)
        b = reader._check_band(band)
        desc = reader.descriptions
        return Scene(
            intensity=intensity, valid=valid, units=reader.units, profile=reader.profile, crs=reader.crs,
            transform=reader.transform, nodata=reader.nodata, path=reader.path,
            descriptions=(desc[b - 1],) if b <= len(desc) else (), tags=dict(reader.tags),
        )


def write_scene(path, intensity, like, *, units=None, valid=None, overwrite=False) -> pathlib.Path:
    """Write a whole intensity array (``(h, w)`` or ``(bands, h, w)``) like ``like``.

    ``valid`` has the same shape as ``intensity`` (or ``(h, w)``, shared by all bands).
    Returns the destination path.
    """
    x = np.asarray(intensity)
    if x.ndim not in (2, 3):
        raise InputError(f"intensity must be 2-D (h, w) or 3-D (bands, h, w), got shape {x.shape}")
    stack = x[None] if x.ndim == 2 else x
    h, w = stack.shape[-2:]
    if (getattr(like, "height", h), getattr(like, "width", w)) != (h, w):
        raise InputError(f"{path}: array of {w}x{h} does not match the source scene ({like.width}x{like.height})")
    if valid is not None:
        valid = np.asarray(valid, dtype=bool)
        valid = np.broadcast_to(valid if valid.ndim == 3 else valid[None], stack.shape)
    with open_output(path, like, units=units, band_count=stack.shape[0], overwrite=overwrite) as out:
        for b in range(stack.shape[0]):
            out.write(stack[b], None, band=b + 1, valid=None if valid is None else valid[b])
    return out.path


# --------------------------------------------------------------------------- streaming

def read_with_halo(reader: SceneReader, window, halo: int, band=1):
    """Read ``window`` grown by ``halo`` pixels on every side, mirrored at the scene's border.

    Returns ``(intensity, valid)`` of shape ``(h + 2 halo, w + 2 halo)``. Pixels
    outside the scene repeat the scene's edge mirror-wise (``numpy.pad`` mode
    'symmetric'), so a neighbourhood operation sees plausible context there.
    """
    halo = int(halo)
    w = _as_window(window, reader.width, reader.height, reader.path)
    r0, c0 = int(w.row_off) - halo, int(w.col_off) - halo
    r1, c1 = int(w.row_off + w.height) + halo, int(w.col_off + w.width) + halo
    rr0, cc0 = max(0, r0), max(0, c0)
    rr1, cc1 = min(reader.height, r1), min(reader.width, c1)
    intensity, valid = reader.read(Window(cc0, rr0, cc1 - cc0, rr1 - rr0), band=band)
    pads = ((rr0 - r0, r1 - rr1), (cc0 - c0, c1 - cc1))
    if any(p for pair in pads for p in pair):
        if max(pads[0]) > intensity.shape[0] or max(pads[1]) > intensity.shape[1]:
            # mirroring cannot reach that far on a tiny scene; repeat the edge instead
            mode = "edge"
        else:
            mode = "symmetric"
        intensity = np.pad(intensity, pads, mode=mode)
        valid = np.pad(valid, pads, mode=mode)
    return intensity, valid


def process_file(in_path, out_path, func, *, halo=0, units=None, out_units=None, overwrite=False,
                 progress=True, description="processing", tags=None, cog=False) -> pathlib.Path:
    """Stream a scene through ``func`` tile by tile and write the result like the input.

    For each SAR band and each 512 x 512 tile of the output,
    ``func(intensity, valid, row, col)`` receives the tile's input grown by ``halo``
    pixels on every side (see :func:`read_with_halo`) and the scene position of the
    tile's top-left pixel, and returns the tile's output intensity (shape of the tile)
    or ``(intensity, valid)``. Pixels invalid in the input stay nodata in the output.
    Memory use depends on the tile and halo sizes, not on the scene's size. The
    output appears at ``out_path`` only when every tile is written.

    Parameters
    ----------
    in_path, out_path : path-like
    func : callable
    halo : int
        Context pixels ``func`` needs around each tile.
    units, out_units : str, optional
        Input units (detected if None) and output units (default: the input's,
        intensity for complex input).
    overwrite : bool
    progress : bool
        Show a progress bar (tqdm) on standard error.
    description : str
        Label of the progress bar.
    tags : dict, optional
        Metadata tags to add to the output.
    cog : bool
        Write a Cloud-Optimised GeoTIFF with overviews (see :func:`open_output`).
    """
    from tqdm import tqdm

    halo = int(halo)
    if halo < 0:
        raise InputError(f"halo must be >= 0, got {halo}")
    with open_scene(in_path, units=units) as reader:
        with open_output(out_path, reader, units=out_units, overwrite=overwrite, cog=cog) as writer:
            if tags:
                writer.update_tags(**tags)
            windows = writer.block_windows()
            total = len(windows) * reader.band_count
            with tqdm(total=total, desc=description, unit="tile", disable=not progress, leave=False) as bar:
                for band in range(1, reader.band_count + 1):
                    for w in windows:
                        intensity, valid = read_with_halo(reader, w, halo, band=band)
                        result = func(intensity, valid, int(w.row_off), int(w.col_off))
                        out, out_valid = result if isinstance(result, tuple) else (result, None)
                        inner = valid[halo:halo + int(w.height), halo:halo + int(w.width)]
                        keep = inner if out_valid is None else (inner & np.asarray(out_valid, dtype=bool))
                        writer.write(out, w, band=band, valid=keep)
                        bar.update(1)
            return writer.path
