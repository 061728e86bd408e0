"""Whole scenes in memory: one band read whole, an array written whole like a source scene."""

from __future__ import annotations

import pathlib
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from .reader import open_scene
from .writer import open_output

__all__ = ["Scene", "read_scene", "write_scene"]


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
        b = reader.check_band(band)
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
