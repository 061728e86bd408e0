"""Clean references for supervised training: finding the rasters, reading them, their patch positions.

``data.train`` and ``data.validation`` list files, folders (their rasters, not
recursive) and glob patterns (:func:`resolve_raster_paths`, also used for the pairs of
:mod:`despeck.training.pairs`). Each raster is read as float32 intensity and a validity
mask (:func:`read_reference`), and becomes a :class:`Reference` whose training positions
stay above its validation strip (:func:`make_reference`).
"""

from __future__ import annotations

import glob
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import ConfigError, DespeckError, RasterError
from ..validity import valid_mask
from .sampling import PositionTable, allowed_positions

__all__ = ["RASTER_SUFFIXES", "resolve_raster_paths", "Reference", "make_reference", "read_reference"]

RASTER_SUFFIXES = {".tif", ".tiff", ".vrt", ".img", ".jp2", ".png", ".jpg", ".jpeg", ".bmp", ".nc", ".hdf", ".h5"}


def resolve_raster_paths(entries, key: str) -> list[Path]:
    """Expand files, folders (their rasters, not recursive) and glob patterns; one-line ConfigError if empty."""
    paths: list[Path] = []
    for entry in entries:
        text = str(entry)
        p = Path(text).expanduser()
        if any(ch in text for ch in "*?["):
            found = sorted(Path(m) for m in glob.glob(str(p)) if Path(m).is_file())
            if not found:
                raise ConfigError(f"config key {key}: no files match {text!r}")
            paths += found
        elif p.is_dir():
            found = sorted(f for f in p.iterdir() if f.is_file() and f.suffix.lower() in RASTER_SUFFIXES
                           and not f.name.startswith("."))
            if not found:
                raise ConfigError(
                    f"config key {key}: folder {p} holds no raster files ({', '.join(sorted(RASTER_SUFFIXES))})"
                )
            paths += found
        elif p.is_file():
            paths.append(p)
        else:
            raise ConfigError(f"config key {key}: {p} does not exist")
    unique = list(dict.fromkeys(q.resolve() for q in paths))
    return unique


@dataclass
class Reference:
    """One clean reference in memory with its training and validation positions."""

    name: str
    intensity: np.ndarray
    valid: np.ndarray
    log_mean: float
    train: PositionTable
    val: PositionTable


def make_reference(name, intensity, valid, patch, min_fraction, val_rows, role) -> Reference:
    """A :class:`Reference` with its position tables; one-line errors for a raster too small or all invalid.

    ``role`` ``"train"``: training positions above the bottom ``val_rows`` rows, validation
    positions in them (none if ``val_rows`` is 0); ``"val"``: validation positions only.
    """
    h, w = intensity.shape
    if h < patch or w < patch:
        raise ConfigError(f"config key data.patch_size: {patch} is larger than raster {name} ({w}x{h} pixels)")
    if not valid.any():
        raise RasterError(f"{name}: every pixel is nodata or invalid; nothing to train on")
    log_mean = float(np.mean(np.log(intensity[valid].astype(np.float64))))
    if role == "train":
        train_hi = h - val_rows if val_rows else h
        train = PositionTable(allowed_positions(valid, patch, min_fraction, 0, train_hi))
        val = PositionTable(allowed_positions(valid, patch, min_fraction, train_hi, h) if val_rows
                             else np.zeros((0, 0), bool))
    else:
        train = PositionTable(np.zeros((0, 0), bool))
        val = PositionTable(allowed_positions(valid, patch, min_fraction, 0, h))
    return Reference(name, intensity, valid, log_mean, train, val)


def read_reference(path, units, band):
    """Float32 intensity and validity mask of band ``band`` of raster ``path`` (one-line RasterError)."""
    from ..raster import read_scene

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            scene = read_scene(path, units=units, band=band)
    except DespeckError:
        raise
    except (OSError, ValueError) as exc:
        raise RasterError(f"{path}: cannot read ({exc})") from None
    intensity = np.asarray(scene.intensity, dtype=np.float32)
    return intensity, valid_mask(intensity, np.asarray(scene.valid, dtype=bool), what=str(path))
