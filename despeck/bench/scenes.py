"""Reading and checking the scenes of a benchmark: image, reference, looks, homogeneous areas, point targets.

Every bad input is reported before anything is computed or written, in one line that
names the scene's file (or ``scene 'NAME'`` for an array).
"""

from __future__ import annotations

import os
import pathlib
from dataclasses import dataclass

import numpy as np

from .. import filters, metrics
from ..errors import DespeckError, InputError, RasterError
from ..looks import resolve_looks
from .spec import BenchScene

__all__ = ["LoadedScene", "load_scene", "named_error"]

# How the report names where a scene's looks came from (despeck.looks.LooksInfo.source).
_LOOKS_SOURCES = {"option": "given", "tag": "recorded", "estimate": "estimated"}


@dataclass
class LoadedScene:
    """A scene read and checked: intensity, validity, reference, looks, areas and points, each with its source."""

    name: str
    intensity: np.ndarray
    valid: np.ndarray
    reference: np.ndarray | None
    looks: float
    looks_source: str
    areas: list
    area_masks: list
    areas_source: str
    points: list
    points_source: str
    source: str
    where: str = ""  # how errors name the scene: its image file, else "scene NAME"


def _read(path, units, what):
    from .. import raster

    path = pathlib.Path(path)
    if not path.exists():
        raise RasterError(f"{path}: {what} not found")
    return raster.read_scene(path, units=units)


def _same_grid(a, b) -> bool:
    if a.transform is None or b.transform is None:
        return a.transform is None and b.transform is None
    return bool(np.allclose(tuple(a.transform)[:6], tuple(b.transform)[:6], rtol=0, atol=1e-9 * max(1.0, abs(a.transform.a))))


def _scene_where(scene: BenchScene, index: int) -> str:
    if isinstance(scene.image, (str, os.PathLike)):
        return str(scene.image)
    return f"scene {scene.name!r}" if scene.name else f"scene {index + 1}"


def named_error(exc: DespeckError, where: str, *also) -> DespeckError:
    """``exc`` itself if its message names ``where`` (or one of ``also``), else the same error prefixed with it."""
    msg = str(exc)
    if any(str(w) in msg for w in (where, *also) if w):
        return exc
    return type(exc)(f"{where}: {msg}")


def load_scene(scene: BenchScene, index: int) -> LoadedScene:
    """Read and check one scene; every bad input is reported here, naming its file, before any output."""
    where = _scene_where(scene, index)
    files = [p for p in (scene.reference, scene.areas) if isinstance(p, (str, os.PathLike))]
    try:
        return _load_scene_checked(scene, index, where)
    except DespeckError as exc:
        raise named_error(exc, where, *files) from None


def _load_scene_checked(scene: BenchScene, index: int, where: str) -> LoadedScene:
    transform = crs = tags = None
    if isinstance(scene.image, (str, os.PathLike)):
        s = _read(scene.image, scene.units, "image")
        intensity, valid, transform, crs, tags = s.intensity, s.valid, s.transform, s.crs, s.tags
        name = scene.name or pathlib.Path(scene.image).stem
        source = str(scene.image)
    else:
        intensity, valid = filters.as_image(scene.image, scene.valid)
        intensity = intensity.astype(np.float32)
        name = scene.name or f"scene {index + 1}"
        source = "array"
    reference = None
    if scene.reference is not None:
        if isinstance(scene.reference, (str, os.PathLike)):
            r = _read(scene.reference, scene.reference_units, "reference")
            if r.intensity.shape != intensity.shape:
                raise InputError(
                    f"{scene.reference}: reference is {r.width} x {r.height} pixels, the image {source} is "
                    f"{intensity.shape[1]} x {intensity.shape[0]}"
                )
            if transform is not None and (not _same_grid(r, s) or (r.crs != crs and r.crs is not None and crs is not None)):
                raise InputError(f"{scene.reference}: reference georeferencing (CRS or transform) differs from the image {source}")
            reference = np.where(r.valid, r.intensity, 0.0).astype(np.float32)
            valid = valid & r.valid
        else:
            reference = np.asarray(scene.reference, dtype=np.float32)
            if reference.shape != intensity.shape:
                raise InputError(f"{where}: reference of shape {reference.shape} does not match the image {intensity.shape}")
            valid = valid & np.isfinite(reference) & (reference > 0)
    # One owner for the looks of a scene (despeck.looks): given, else the file's tag, else
    # estimated on the whole image; its errors are named after the scene by load_scene.
    info = resolve_looks(scene.looks, tags=tags, intensity=intensity, valid=valid, name="looks")
    looks, looks_source = info.value, _LOOKS_SOURCES[info.source]
    if scene.areas is None:
        try:
            areas = metrics.find_homogeneous_areas(intensity, looks, valid=valid)
        except InputError as exc:
            raise InputError(f"{where}: cannot look for homogeneous areas ({exc})") from None
        areas_source = "found automatically (15 x 15 boxes, 5 % false-alarm rate)"
        masks = metrics.check_areas(areas, intensity.shape, valid) if areas else []
    elif isinstance(scene.areas, (str, os.PathLike)):
        masks = metrics.areas_from_vector(scene.areas, transform, intensity.shape, crs=crs)
        masks = metrics.check_areas(masks, intensity.shape, valid, source=f"{scene.areas}: polygon")
        areas, areas_source = [], f"polygons from {pathlib.Path(scene.areas).name}"
    elif _all_boxes(scene.areas, where) and len(scene.areas) == 0:
        areas, masks, areas_source = [], [], "none given"
    else:
        areas = [tuple(int(v) for v in a) for a in scene.areas]
        masks = metrics.check_areas(areas, intensity.shape, valid, source=f"{where}: area")
        areas_source = "given boxes"
    if scene.points is None:
        points = metrics.find_point_targets(intensity, looks, valid=valid)
        points_source = "found automatically (false-alarm rate 1e-6)"
    else:
        points = _check_points(scene.points, intensity.shape, where)
        points_source = "given"
    return LoadedScene(name, intensity, valid, reference, looks, looks_source, areas, masks, areas_source, points,
                   points_source, source, where)


def _all_boxes(areas, name) -> bool:
    try:
        for a in areas:
            if len(a) != 4:
                raise TypeError
            [int(v) for v in a]
    except (TypeError, ValueError):
        raise InputError(f"{name}: areas must be boxes (row0, col0, row1, col1) or a GeoJSON file path") from None
    return True


def _check_points(points, shape, name):
    out = []
    for i, p in enumerate(points):
        try:
            r, c = int(p[0]), int(p[1])
            if len(p) != 2:
                raise TypeError
        except (TypeError, ValueError, IndexError):
            raise InputError(f"{name}: point {i + 1} must be (row, col), got {p!r}") from None
        if not (0 <= r < shape[0] and 0 <= c < shape[1]):
            raise InputError(f"{name}: point {i + 1} ({r}, {c}) lies outside the {shape[0]} x {shape[1]} scene")
        out.append((r, c))
    return out

