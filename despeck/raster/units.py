"""Units of SAR samples and their conversion to and from linear intensity (no rasterio).

Every scene enters the package as float32 linear **intensity** plus a boolean
**valid** mask, whatever the file holds: linear intensity (power), amplitude,
decibels, or complex samples. :func:`to_intensity` and :func:`from_intensity` convert
between the file's units and intensity; :mod:`despeck.raster.detection` decides which
units a file holds.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from ..validity import valid_mask

__all__ = ["UNITS", "OUTPUT_UNITS", "UNIT_LABELS", "UnitsWarning", "check_units", "to_intensity", "from_intensity"]

UNITS = ("intensity", "amplitude", "db", "complex")
OUTPUT_UNITS = ("intensity", "amplitude", "db")

#: Band unit strings written to outputs (GDAL band metadata) and recognised on input.
UNIT_LABELS = {"intensity": "linear power", "amplitude": "linear amplitude", "db": "dB"}


class UnitsWarning(UserWarning):
    """The data do not look like the units they were declared (or assumed) to be in."""


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
        valid = valid_mask(intensity)
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
