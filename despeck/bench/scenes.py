"""Reading and checking the scenes of a benchmark: image, reference, looks, homogeneous areas, point targets.

Every bad input is reported before anything is computed or written, in one line that
names the scene's file (or ``scene 'NAME'`` for an array).
"""

from __future__ import annotations

import json
import os
import pathlib
from dataclasses import dataclass

import numpy as np

from .. import filters, metrics
from ..errors import DespeckError, InputError, RasterError
from ..looks import resolve_looks
from .spec import BenchScene

__all__ = ["LoadedScene", "load_scene", "named_error", "areas_from_vector"]

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
        masks = areas_from_vector(scene.areas, transform, intensity.shape, crs=crs)
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


def areas_from_vector(path, transform, shape, *, crs=None):
    """Boolean masks from the polygons of a GeoJSON file in the scene's map coordinates.

    Reading the file is the benchmark's job; the masks are what :mod:`despeck.metrics`
    takes (:func:`despeck.metrics.check_areas`), which reads no files itself.

    Each feature (Polygon or MultiPolygon) is one area, rasterised with
    ``rasterio.features.rasterize`` (pixels whose centre falls inside). The
    coordinates must be in the scene's CRS; a ``crs`` member naming another CRS is
    refused rather than silently reprojected.

    Raises
    ------
    InputError
        Unreadable file, no polygon, a polygon covering no pixel of the scene.
    """
    from rasterio import features

    path = pathlib.Path(path)
    try:
        data = json.loads(path.read_text())
    except FileNotFoundError:
        raise InputError(f"{path}: area file not found") from None
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: not a readable GeoJSON file ({exc})") from None
    if transform is None:
        raise InputError(f"{path}: the scene has no georeferencing, so polygons in map coordinates cannot be placed; give pixel boxes")
    declared = (data.get("crs") or {}).get("properties", {}).get("name") if isinstance(data, dict) else None
    if declared and crs is not None:
        from rasterio.crs import CRS

        try:
            same = CRS.from_user_input(declared) == CRS.from_user_input(crs)
        except Exception:  # noqa: BLE001 - an unparsable CRS name is a bad file, reported below
            same = False
        if not same:
            raise InputError(f"{path}: polygons are in {declared}, the scene is in {crs}; reproject the polygons first")
    if isinstance(data, dict) and data.get("type") == "FeatureCollection":
        geoms = [f.get("geometry") for f in data.get("features", [])]
    elif isinstance(data, dict) and data.get("type") == "Feature":
        geoms = [data.get("geometry")]
    elif isinstance(data, dict) and data.get("type") in ("Polygon", "MultiPolygon"):
        geoms = [data]
    else:
        raise InputError(f"{path}: expected a GeoJSON FeatureCollection, Feature or Polygon")
    geoms = [g for g in geoms if g and g.get("type") in ("Polygon", "MultiPolygon")]
    if not geoms:
        raise InputError(f"{path}: no Polygon or MultiPolygon features")
    masks = []
    for i, g in enumerate(geoms):
        try:
            m = features.rasterize([(g, 1)], out_shape=tuple(shape), transform=transform, fill=0, dtype="uint8")
        except Exception as exc:  # noqa: BLE001 - rasterio raises several types for bad geometry
            raise InputError(f"{path}: polygon {i + 1} cannot be rasterised ({exc})") from None
        if not m.any():
            raise InputError(f"{path}: polygon {i + 1} lies outside the scene")
        masks.append(m.astype(bool))
    return masks
