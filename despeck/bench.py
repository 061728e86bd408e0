"""The benchmark harness: run classical filters and trained models on scenes and write a report.

A benchmark is a list of scenes and a list of methods. Each scene is a raster (or an
array), optionally with a clean reference of the same grid, homogeneous areas (pixel
boxes or a GeoJSON file of polygons in map coordinates; found automatically
otherwise) and point targets (``(row, col)``; found automatically otherwise). Each
method is a classical filter with its options or a trained model file. The report
folder holds ``report.md`` (tables, figures, conventions and cautions),
``results.csv`` and ``results.json`` with the same numbers, PNG figures, and the
marker file :data:`REPORT_MARKER` naming every file despeck wrote there (with its
size and SHA-256). Runs are deterministic except for the timing columns.

The report is written to a hidden temporary folder beside the destination and
renamed into place only when complete. An existing destination is replaced only
when asked (``overwrite``) and only when it is a report despeck wrote: it must hold
the marker and nothing but the unchanged files the marker names, no input of the run,
and must not be (or contain) the current directory.

Scene list files (YAML or JSON, paths relative to the file)::

    scenes:
      - name: north-polder            # optional, default the image's file name
        image: polder_1look.tif
        reference: polder_clean.tif   # optional clean reflectivity, same grid
        reference_units: intensity    # optional, default detected (independent of units)
        looks: 1                      # optional, default estimated from the scene
        units: intensity              # optional, default detected
        areas: [[10, 10, 60, 60]]     # optional: boxes (row0, col0, row1, col1) or a .geojson file
        points: [[120, 44]]           # optional
    methods: [lee, "lee:window=9", "model:weights/small.safetensors"]
    crop: [0, 0, 256]                 # optional (row, col, size) of the figure crops

Method specifications: ``NAME`` or ``NAME:key=value,key=value`` for a filter of
:data:`despeck.filters.FILTERS` (``window``, ``looks`` and the filter's own
options), ``model:PATH`` or a path ending in ``.safetensors`` for a model file.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import os
import pathlib
import shutil
import tempfile
import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from . import bm3d_log, filters, metrics
from .atomic import publish
from .errors import ConfigError, DespeckError, InputError, RasterError
from .looks import estimate_scene_looks
from .speckle import check_looks

__all__ = ["BenchScene", "Method", "parse_method", "parse_option_value", "load_scene_list", "run_benchmark",
           "DEFAULT_METHODS", "CAUTIONS", "REPORT_MARKER"]

#: Methods run when none are given: every classical filter with its default window
#: (bm3d-log only when its optional package is installed).
DEFAULT_METHODS = tuple(n for n in filters.FILTERS if n != "bm3d-log" or bm3d_log.available())

#: Side of the crops shown in the figures (pixels).
CROP_SIZE = 256

#: File written in every report folder: JSON naming the files despeck wrote there, so
#: that ``overwrite`` replaces only a report despeck made and never anything else.
REPORT_MARKER = ".despeck-report.json"
_MARKER_FORMAT = "despeck bench report"

CAUTIONS = (
    "Speckle filters and learned despecklers can suppress small or weak targets (ships, "
    "vehicles, isolated buildings, thin linear features) and can invent texture or structure "
    "that is not on the ground, in particular on scenes unlike those a model was trained on. "
    "Figures here summarise test scenes only. Check any filtered product against the original "
    "image before operational use such as flood mapping or ship detection, and keep the "
    "original for measurements."
)

# Columns of results.csv / the report table, in order: (key, header, format).
_COLUMNS = (
    ("scene", "scene", "{}"),
    ("method", "method", "{}"),
    ("enl", "ENL", "{:.1f}"),
    ("bias_db", "bias dB", "{:+.3f}"),
    ("ratio_mean", "ratio mean", "{:.3f}"),
    ("ratio_enl_over_looks", "ratio ENL/L", "{:.2f}"),
    ("m", "M", "{:.2f}"),
    ("epd_h", "EPD-ROA H", "{:.3f}"),
    ("epd_v", "EPD-ROA V", "{:.3f}"),
    ("edge_corr", "edge corr", "{:.3f}"),
    ("psnr_db", "PSNR dB-domain", "{:.2f}"),
    ("ssim_db", "SSIM dB-domain", "{:.3f}"),
    ("psnr_amplitude", "PSNR amplitude", "{:.2f}"),
    ("ssim_amplitude", "SSIM amplitude", "{:.3f}"),
    ("mae_db", "MAE dB", "{:.2f}"),
    ("point_retention_db", "points median dB", "{:+.1f}"),
    ("point_worst_db", "worst point dB", "{:+.1f}"),
    ("seconds", "seconds", "{:.2f}"),
    ("mp_per_s", "MP/s", "{:.2f}"),
)
_EXTRA = ("r_enl_mu", "delta_h", "edge_reference", "looks", "kind")

_INPUT_LABEL = "input (unfiltered)"


# --------------------------------------------------------------------------- methods

@dataclass(frozen=True)
class Method:
    """One method to benchmark: a classical filter with options, or a model file."""

    label: str
    kind: str  # "filter" or "model"
    name: str = ""
    window: int | None = None
    looks: float | None = None
    options: dict = field(default_factory=dict)
    path: pathlib.Path | None = None


def parse_option_value(text):
    """A filter option's value written as text (a method specification, ``--option KEY=VALUE``).

    ``true``/``yes`` and ``false``/``no`` give booleans, ``none``/``null`` None
    (case-insensitive), an integer or decimal number gives an int or a float, and
    anything else stays the (stripped) string; :func:`despeck.filters.filter_options`
    then decides whether it is allowed.
    """
    t = str(text).strip()
    low = t.lower()
    if low in ("true", "yes"):
        return True
    if low in ("false", "no"):
        return False
    if low in ("none", "null"):
        return None
    for cast in (int, float):
        try:
            return cast(t)
        except ValueError:
            pass
    return t


def parse_method(spec, base=None) -> Method:
    """Parse a method specification (string or mapping); see the module docstring.

    Raises :class:`InputError` for an unknown filter (listing the valid names), an
    unknown option, a bad window or looks, or a missing model file.
    """
    base = pathlib.Path(base) if base is not None else None
    if isinstance(spec, dict):
        spec = dict(spec)
        if "model" in spec:
            text = f"model:{spec.pop('model')}"
        elif "filter" in spec:
            name = spec.pop("filter")
            label = spec.pop("label", None)
            opts = ",".join(f"{k}={v}" for k, v in spec.items())
            m = parse_method(f"{name}:{opts}" if opts else str(name), base)
            return m if label is None else Method(str(label), m.kind, m.name, m.window, m.looks, m.options, m.path)
        else:
            raise InputError(f"method {spec!r}: a mapping needs a 'filter' or a 'model' key")
    else:
        text = str(spec).strip()
    if not text:
        raise InputError("empty method specification")
    if text.lower().startswith("model:") or text.lower().endswith(".safetensors"):
        raw = text[6:] if text.lower().startswith("model:") else text
        path = pathlib.Path(raw).expanduser()
        if base is not None and not path.is_absolute():
            path = base / path
        if not path.is_file():
            raise InputError(f"method {text!r}: model file {path} not found")
        return Method(label=f"model {path.stem}", kind="model", path=path)
    name, _, rest = text.partition(":")
    name = name.strip().lower()
    filters.get_filter(name)
    options = {}
    if rest.strip():
        for item in rest.split(","):
            key, eq, value = item.partition("=")
            if not eq or not key.strip():
                raise InputError(f"method {text!r}: options are key=value separated by commas, got {item!r}")
            options[key.strip().replace("-", "_")] = parse_option_value(value)
    window = options.pop("window", None)
    looks = options.pop("looks", None)
    window = filters.check_window(window if window is not None else filters.DEFAULT_WINDOWS[name], f"method {text!r}: window")
    if looks is not None:
        looks = check_looks(looks, f"method {text!r}: looks")
    allowed = filters.filter_options(name)
    for key in options:
        if key not in allowed:
            raise InputError(f"method {text!r}: filter {name!r} has no option {key!r}; its options are: {', '.join(allowed) or 'none'}")
    return Method(label=text, kind="filter", name=name, window=window, looks=looks, options=options)


# --------------------------------------------------------------------------- scenes

@dataclass
class BenchScene:
    """A scene to benchmark: an image file or an intensity array, and what is known about it.

    Attributes
    ----------
    image : path or ndarray
        Raster file or linear intensity array.
    name : str, optional
    reference : path or ndarray, optional
        Clean reflectivity on the same grid (simulated data).
    looks : float, optional
        Number of looks; estimated from the scene if not given.
    areas : list of boxes, path to a GeoJSON file, or None
        Homogeneous areas; found automatically if None, none if an empty list.
    points : list of (row, col), or None
        Point targets; found automatically if None.
    units : str, optional
        Units of the image file (detected if not given).
    reference_units : str, optional
        Units of the reference file (detected if not given): a clean reference is often
        kept in linear intensity while the image is in dB or amplitude.
    valid : ndarray of bool, optional
        Validity of an array image.
    """

    image: object
    name: str | None = None
    reference: object = None
    looks: float | None = None
    areas: object = None
    points: object = None
    units: str | None = None
    valid: object = None
    reference_units: str | None = None


def load_scene_list(path):
    """Read a scene list file (YAML or JSON): returns ``(scenes, methods, crop)``.

    Raises :class:`ConfigError` for an unreadable file or an unknown key.
    """
    import yaml

    path = pathlib.Path(path)
    try:
        text = path.read_text()
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the scene list ({exc.strerror or exc})") from None
    try:
        data = yaml.safe_load(text)  # JSON is valid YAML
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: not valid YAML or JSON ({str(exc).splitlines()[0]})") from None
    if isinstance(data, list):
        data = {"scenes": data}
    if not isinstance(data, dict) or not isinstance(data.get("scenes"), list) or not data["scenes"]:
        raise ConfigError(f"{path}: expected a mapping with a non-empty 'scenes' list")
    unknown = set(data) - {"scenes", "methods", "crop"}
    if unknown:
        raise ConfigError(f"{path}: unknown key {sorted(unknown)[0]!r}; allowed: scenes, methods, crop")
    base = path.parent
    scenes = []
    keys = {"name", "image", "reference", "looks", "areas", "points", "units", "reference_units"}
    for i, item in enumerate(data["scenes"]):
        if isinstance(item, str):
            item = {"image": item}
        if not isinstance(item, dict) or "image" not in item:
            raise ConfigError(f"{path}: scene {i + 1} needs an 'image'")
        bad = set(item) - keys
        if bad:
            raise ConfigError(f"{path}: scene {i + 1} has unknown key {sorted(bad)[0]!r}; allowed: {', '.join(sorted(keys))}")
        resolve = lambda p: None if p is None else (base / pathlib.Path(p).expanduser() if not pathlib.Path(p).expanduser().is_absolute() else pathlib.Path(p).expanduser())  # noqa: E731
        areas = item.get("areas")
        if isinstance(areas, str):
            areas = resolve(areas)
        scenes.append(BenchScene(
            image=resolve(item["image"]), name=item.get("name"), reference=resolve(item.get("reference")),
            looks=item.get("looks"), areas=areas, points=item.get("points"), units=item.get("units"),
            reference_units=item.get("reference_units"),
        ))
    methods = []
    for i, m in enumerate(data.get("methods") or []):
        try:
            methods.append(parse_method(m, base))
        except InputError as exc:
            raise ConfigError(f"{path}: method {i + 1}: {exc}") from None
    crop = data.get("crop")
    if crop is not None:
        try:
            crop = [int(v) for v in crop]
            if len(crop) != 3:
                raise TypeError
        except (TypeError, ValueError):
            raise ConfigError(f"{path}: crop must be [row, col, size], got {data.get('crop')!r}") from None
    return scenes, methods, crop


@dataclass
class _Loaded:
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
    from . import raster

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


def _named(exc: DespeckError, where: str, *also) -> DespeckError:
    """``exc`` itself if its message names ``where`` (or one of ``also``), else the same error prefixed with it."""
    msg = str(exc)
    if any(str(w) in msg for w in (where, *also) if w):
        return exc
    return type(exc)(f"{where}: {msg}")


def _load_scene(scene: BenchScene, index: int) -> _Loaded:
    """Read and check one scene; every bad input is reported here, naming its file, before any output."""
    where = _scene_where(scene, index)
    files = [p for p in (scene.reference, scene.areas) if isinstance(p, (str, os.PathLike))]
    try:
        return _load_scene_checked(scene, index, where)
    except DespeckError as exc:
        raise _named(exc, where, *files) from None


def _load_scene_checked(scene: BenchScene, index: int, where: str) -> _Loaded:
    transform = crs = None
    if isinstance(scene.image, (str, os.PathLike)):
        s = _read(scene.image, scene.units, "image")
        intensity, valid, transform, crs = s.intensity, s.valid, s.transform, s.crs
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
    if scene.looks is not None:
        looks, looks_source = check_looks(scene.looks, f"{where}: looks"), "given"
    else:
        # One owner for the looks of a scene (despeck.looks): estimated on full-resolution windows.
        try:
            looks = estimate_scene_looks(intensity, valid).value
        except InputError as exc:
            raise InputError(f"{where}: cannot estimate the number of looks ({exc}); give looks") from None
        looks_source = "estimated"
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
    return _Loaded(name, intensity, valid, reference, looks, looks_source, areas, masks, areas_source, points,
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


# --------------------------------------------------------------------------- running

def _run_method(method: Method, scene: _Loaded, models, workers):
    if method.kind == "filter":
        f = filters.get_filter(method.name)
        looks = method.looks if method.looks is not None else scene.looks
        start = time.perf_counter()
        out = f(scene.intensity, looks=looks, window=method.window, mask=scene.valid, workers=workers, **method.options)
        return out, time.perf_counter() - start
    from .inference import despeckle_array

    model = models[method.path]
    start = time.perf_counter()
    out = despeckle_array(scene.intensity, model, valid=scene.valid, progress=False)
    return np.asarray(out, dtype=np.float32), time.perf_counter() - start


def _nan_if_error(fn):
    try:
        return fn()
    except InputError:
        return math.nan


def _measure(scene: _Loaded, out, seconds, label, kind):
    """Every metric of one method's output on one scene (a dict of plain floats)."""
    I, ok = scene.intensity, scene.valid & np.isfinite(out) & (out > 0)
    row = {"scene": scene.name, "method": label, "kind": kind, "looks": scene.looks}
    if scene.area_masks:
        row["enl"] = float(np.median(metrics.enl(out, scene.area_masks, ok)))
        per, overall = metrics.radiometric_bias_db(I, out, scene.area_masks, ok)
        row["bias_db"] = overall
        row["bias_db_per_area"] = [float(v) for v in per]
        if kind != "input":
            rs = metrics.ratio_statistics(I, out, scene.area_masks, scene.looks, ok)
            row["ratio_mean"] = rs["mean"]
            row["ratio_enl_over_looks"] = rs["enl_over_looks"]
            m = metrics.unassisted_m(I, out, scene.area_masks, ok)
            row["m"], row["r_enl_mu"], row["delta_h"] = m["M"], m["r_enl_mu"], m["delta_h"]
    ref = scene.reference if scene.reference is not None else I
    row["edge_reference"] = "clean reference" if scene.reference is not None else "noisy input"
    row["epd_h"], row["epd_v"] = metrics.epd_roa(ref, out, ok)
    row["edge_corr"] = metrics.edge_correlation(ref, out, ok)
    if scene.reference is not None:
        fd = metrics.fidelity(scene.reference, out, ok)
        row.update({k: fd[k] for k in ("psnr_db", "ssim_db", "psnr_amplitude", "ssim_amplitude", "mae_db")})
        row["db_range"] = list(fd["db_range"])
        row["amplitude_peak"] = fd["amplitude_peak"]
    if scene.points:
        ret = metrics.point_retention_db(I, out, scene.points)
        row["point_retention_db"] = float(np.median(ret))
        row["point_worst_db"] = float(np.min(ret))
    if seconds is not None:
        row["seconds"] = float(seconds)
        row["mp_per_s"] = metrics.throughput_mps(I.size, seconds)
    return row


def run_benchmark(scenes, methods=None, out_dir="bench_report", *, crop=None, overwrite=False, progress=True,
                  workers=None, title="Speckle filter benchmark"):
    """Run every method on every scene and write the report folder.

    Parameters
    ----------
    scenes : path, BenchScene, or list of BenchScene / paths
        A scene list file (YAML/JSON; its ``methods`` and ``crop`` are used when the
        arguments are not given), or scenes.
    methods : list of str, dict or Method, optional
        Method specifications (default: the list file's, else every classical filter).
    out_dir : path
        Report folder; written to a temporary folder beside it and renamed when
        complete. An existing folder is refused unless ``overwrite``.
    crop : (row, col, size), optional
        Crop of the figures (default a centred crop of ``CROP_SIZE``).
    progress : bool
        Show a progress bar.
    workers : int, optional
        Threads for the classical filters.

    Returns
    -------
    dict
        What ``results.json`` holds: ``scenes``, ``results`` (one row per scene and
        method, the first of each scene being the unfiltered input), ``conventions``
        and ``report`` (the path of report.md).
    """
    from tqdm.auto import tqdm

    list_methods, list_crop, inputs = [], None, []
    if isinstance(scenes, (str, os.PathLike)) and pathlib.Path(scenes).suffix.lower() in (".yaml", ".yml", ".json"):
        inputs.append(pathlib.Path(scenes))
        scenes, list_methods, list_crop = load_scene_list(scenes)
    elif isinstance(scenes, (BenchScene, str, os.PathLike)):
        scenes = [scenes]
    scenes = [s if isinstance(s, BenchScene) else BenchScene(image=pathlib.Path(s)) for s in scenes]
    if not scenes:
        raise InputError("no scenes to benchmark")
    if methods is None or len(methods) == 0:
        methods = list_methods or list(DEFAULT_METHODS)
    methods = [m if isinstance(m, Method) else parse_method(m) for m in methods]
    labels = [m.label for m in methods]
    if len(set(labels)) != len(labels):
        dup = next(l for l in labels if labels.count(l) > 1)
        raise InputError(f"method {dup!r} is listed twice")
    crop = crop if crop is not None else list_crop
    out_dir = pathlib.Path(out_dir)
    inputs += [pathlib.Path(p) for s in scenes for p in (s.image, s.reference, s.areas) if isinstance(p, (str, os.PathLike))]
    inputs += [m.path for m in methods if m.kind == "model"]
    _check_out_dir(out_dir, inputs, overwrite)

    # Check everything that can be wrong before computing or writing anything.
    models = {}
    for m in methods:
        if m.kind == "model" and m.path not in models:
            from .models import load_model_file

            models[m.path] = load_model_file(m.path)
    loaded = [_load_scene(s, i) for i, s in enumerate(scenes)]
    names = [s.name for s in loaded]
    if len(set(names)) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        both = " and ".join(s.where for s in loaded if s.name == dup)
        raise InputError(f"{both} are both called {dup!r}; give the scenes distinct names")
    crops = [_crop_box(s.intensity.shape, crop, s.where) for s in loaded]

    try:
        out_dir.parent.mkdir(parents=True, exist_ok=True)
        tmp = pathlib.Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", dir=out_dir.parent))
    except OSError as exc:
        raise InputError(f"{out_dir}: cannot create the report folder there ({exc.strerror or exc})") from None
    try:
        rows, scene_info = [], []
        bar = tqdm(total=len(loaded) * len(methods), desc="bench", unit="run", disable=not progress)
        for si, (scene, box) in enumerate(zip(loaded, crops)):
            outputs = {}
            rows.append(_measure(scene, scene.intensity, None, _INPUT_LABEL, "input"))
            for m in methods:
                bar.set_postfix_str(f"{scene.name}: {m.label}")
                try:
                    out, seconds = _run_method(m, scene, models, workers)
                    outputs[m.label] = out
                    rows.append(_measure(scene, out, seconds, m.label, m.kind))
                except DespeckError as exc:
                    raise _named(exc, f"{scene.where}: method {m.label!r}") from None
                bar.update(1)
            figures = _figures(tmp, si, scene, outputs, box, [r for r in rows if r["scene"] == scene.name])
            scene_info.append({
                "name": scene.name, "source": scene.source, "shape": list(scene.intensity.shape),
                "looks": scene.looks, "looks_source": scene.looks_source,
                "areas": len(scene.area_masks), "areas_source": scene.areas_source,
                "area_boxes": [list(a) for a in scene.areas],
                "points": len(scene.points), "points_source": scene.points_source,
                "reference": scene.reference is not None, "crop": list(box), "figures": figures,
            })
        bar.close()
        conventions = _conventions()
        result = {"title": title, "scenes": scene_info, "results": rows, "conventions": conventions,
                  "methods": [_method_info(m) for m in methods], "cautions": CAUTIONS}
        _write_json(tmp / "results.json", result)
        _write_csv(tmp / "results.csv", rows)
        _write_report(tmp / "report.md", result)
        _write_marker(tmp)
        _swap_in(tmp, out_dir, inputs, overwrite)
    except BaseException as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(exc, OSError) and not isinstance(exc, DespeckError):
            raise InputError(f"{out_dir}: cannot write the report ({exc.strerror or exc}); nothing was changed there") from None
        raise
    result["report"] = str(out_dir / "report.md")
    return result


def _method_info(m: Method):
    if m.kind == "model":
        return {"label": m.label, "kind": "model", "path": str(m.path)}
    return {"label": m.label, "kind": "filter", "name": m.name, "window": m.window, "looks": m.looks,
            "options": m.options}


def _crop_box(shape, crop, name):
    h, w = shape
    if crop is None:
        size = min(CROP_SIZE, h, w)
        return ((h - size) // 2, (w - size) // 2, size)
    try:
        r, c, size = (int(v) for v in crop)
    except (TypeError, ValueError):
        raise InputError(f"{name}: crop must be (row, col, size), got {crop!r}") from None
    if size < 8 or r < 0 or c < 0 or r + size > h or c + size > w:
        raise InputError(f"{name}: crop {(r, c, size)} does not fit the {h} x {w} scene (size >= 8)")
    return (r, c, size)


def _conventions():
    return {
        "enl": "median over the homogeneous areas of mean^2 / variance of the filtered intensity",
        "bias_db": "10 log10(mean filtered / mean input) over all homogeneous areas together; ideal 0",
        "ratio": "ratio image = input / filtered; mean over valid pixels (ideal 1); ENL median over the areas divided by the scene's looks (ideal 1)",
        "m": "unassisted M of Gomez et al. (2017), formula from memory: 1/2 sum over areas of relative ENL and mean deviations of the ratio image, plus 100 |h0 - h_shuffled| / h0 of its co-occurrence homogeneity (16 equally populated levels, 10 seeded shuffles); 0 ideal",
        "epd_roa": (f"robust variant of EPD-ROA (Feng, Hou, Gong 2011, IEEE TGRS 49(7) 2724-2737): ratios of the means of "
                    f"adjacent non-overlapping {metrics.EPD_WINDOW} x {metrics.EPD_WINDOW} windows instead of single "
                    "pixels (the pixel ratio of 1-look speckle has no finite mean, so a few pixels dominated the "
                    "original form), horizontal and vertical, against the clean reference when there is one, else "
                    "against the noisy input; ideal 1; pure 1-look speckle against its constant reflectivity scores "
                    "9/8; not comparable with values published for the pixel form"),
        "edge_corr": "correlation of 4-neighbour Laplacians of reference and estimate (Sattar et al. 1997); ideal 1",
        "psnr_db": "PSNR of 10 log10 intensity, both clipped to the reference's 1st-99.9th percentile range, peak = that range (dB)",
        "ssim_db": "SSIM (7 x 7 uniform window, K1 0.01, K2 0.03) on the same clipped dB images and range",
        "psnr_amplitude": "PSNR of amplitude, clipped to [0, 99.9th percentile of the reference amplitude], peak = that value",
        "ssim_amplitude": "SSIM on the same clipped amplitudes",
        "mae_db": "mean |dB(filtered) - dB(reference)|, unclipped",
        "point_retention_db": "median over point targets of 10 log10(peak after / peak before) in a 3 x 3 neighbourhood; 0 dB = kept",
        "point_worst_db": "the same for the worst point target (the minimum): one target lost shows here even when the median is 0 dB",
        "timing": "wall-clock seconds of the method call on this machine; MP/s = pixels / seconds / 1e6; the only columns that change between runs",
    }


# --------------------------------------------------------------------------- the report folder

def _sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _write_marker(folder: pathlib.Path):
    """Flush every file of the finished report to disk and list it, with size and SHA-256, in the marker."""
    files = {}
    for path in sorted(folder.iterdir()):
        with open(path, "rb") as fh:
            os.fsync(fh.fileno())
        files[path.name] = {"bytes": path.stat().st_size, "sha256": _sha256(path)}
    json.loads((folder / "results.json").read_text())  # the numbers read back
    marker = folder / REPORT_MARKER
    with open(marker, "w") as fh:
        json.dump({"format": _MARKER_FORMAT, "version": 1, "files": files}, fh, indent=1)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())


def _check_out_dir(out_dir: pathlib.Path, inputs, overwrite: bool):
    """Refuse a report folder whose replacement could lose anything; see the module docstring.

    Returns the names of the entries of an existing report folder (all written by
    despeck and unchanged), or None when the folder does not exist yet.
    """
    target = out_dir.resolve()
    for p in inputs:
        q = pathlib.Path(p).resolve()
        if q == target or target in q.parents:
            what = "is" if q == target else "holds"
            raise InputError(f"{out_dir}: the report folder {what} an input of the run ({p}); choose another folder")
    if not (out_dir.exists() or out_dir.is_symlink()):
        return None
    if not out_dir.is_dir():
        raise InputError(f"{out_dir}: exists and is not a folder")
    if not overwrite:
        raise InputError(f"{out_dir}: report folder already exists; choose another or allow overwriting "
                         "(which replaces only a report despeck wrote)")
    if out_dir.is_symlink():
        raise InputError(f"{out_dir}: is a symbolic link; give the folder itself")
    cwd = pathlib.Path.cwd().resolve()
    if target == cwd or target in cwd.parents:
        what = "the current directory" if target == cwd else "a parent of the current directory"
        raise InputError(f"{out_dir}: is {what}, which despeck never replaces; choose another folder")
    return _own_entries(out_dir)


def _own_entries(out_dir: pathlib.Path):
    """Names in ``out_dir`` if every one is a file despeck wrote and nobody changed; else an error naming one."""
    names = sorted(os.listdir(out_dir))
    if not names:
        return []
    marker = out_dir / REPORT_MARKER
    if marker.is_symlink() or not marker.is_file():
        raise InputError(f"{out_dir}: not a report despeck wrote (no {REPORT_MARKER}), so it is not replaced; "
                         "choose another folder")
    try:
        data = json.loads(marker.read_text())
        files = data["files"]
        if data.get("format") != _MARKER_FORMAT or not isinstance(files, dict):
            raise ValueError
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        raise InputError(f"{marker}: not a valid despeck report marker, so {out_dir} is not replaced; "
                         "choose another folder") from None
    for name in names:
        if name == REPORT_MARKER:
            continue
        path = out_dir / name
        info = files.get(name)
        if not isinstance(info, dict):
            raise InputError(f"{out_dir}: holds {name}, which despeck did not write, so the folder is not replaced; "
                             "move it away or choose another folder")
        if path.is_symlink() or not path.is_file():
            raise InputError(f"{path}: is no longer the file despeck wrote (a link or a folder), so {out_dir} is "
                             "not replaced; move it away or choose another folder")
        if path.stat().st_size != info.get("bytes") or _sha256(path) != info.get("sha256"):
            raise InputError(f"{path}: changed since despeck wrote it, so {out_dir} is not replaced; "
                             "move it away or choose another folder")
    return names


def _swap_in(tmp: pathlib.Path, out_dir: pathlib.Path, inputs, overwrite: bool):
    """Rename the finished report ``tmp`` to ``out_dir``, replacing only what despeck wrote there before."""
    previous = _check_out_dir(out_dir, inputs, overwrite)  # again: the folder may have changed during the run
    if previous is None:
        publish(tmp, out_dir)
        return
    old = pathlib.Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.old.", dir=out_dir.parent))
    os.replace(out_dir, old / "previous")
    try:
        publish(tmp, out_dir)
    except BaseException:
        os.replace(old / "previous", out_dir)
        old.rmdir()
        raise
    for name in previous:
        (old / "previous" / name).unlink(missing_ok=True)
    try:
        (old / "previous").rmdir()
        old.rmdir()
    except OSError:
        warnings.warn(f"{out_dir}: files added to the old report while it was replaced are kept in {old / 'previous'}",
                      stacklevel=3)


# --------------------------------------------------------------------------- writing

def _clean(v):
    if isinstance(v, float) and not math.isfinite(v):
        return None if math.isnan(v) else ("inf" if v > 0 else "-inf")
    if isinstance(v, (np.floating,)):
        return _clean(float(v))
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, dict):
        return {k: _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    return v


def _write_json(path, data):
    path.write_text(json.dumps(_clean(data), indent=2) + "\n")


def _write_csv(path, rows):
    keys = [k for k, _, _ in _COLUMNS] + list(_EXTRA)
    with open(path, "w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(keys)
        for row in rows:
            writer.writerow(["" if row.get(k) is None else (f"{row[k]:.6g}" if isinstance(row.get(k), float) else row[k])
                             for k in keys])


def _fmt(row, key, fmt):
    v = row.get(key)
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "–"
    if isinstance(v, float) and math.isinf(v):
        return "∞"
    return fmt.format(v)


def _write_report(path, result):
    lines = [f"# {result['title']}", ""]
    lines += ["Generated by `despeck bench`. Numbers are also in `results.csv` and `results.json`; "
              "conventions are listed at the end.", ""]
    lines += ["## Scenes", "", "| scene | size | looks | homogeneous areas | point targets | clean reference |",
              "|---|---|---|---|---|---|"]
    for s in result["scenes"]:
        lines.append(f"| {s['name']} | {s['shape'][1]} x {s['shape'][0]} | {s['looks']:.2f} ({s['looks_source']}) | "
                     f"{s['areas']} ({s['areas_source']}) | {s['points']} ({s['points_source']}) | "
                     f"{'yes' if s['reference'] else 'no'} |")
    lines.append("")
    for s in result["scenes"]:
        rows = [r for r in result["results"] if r["scene"] == s["name"]]
        present = [c for c in _COLUMNS[1:] if any(r.get(c[0]) is not None for r in rows)]
        lines += [f"## Results: {s['name']}", ""]
        lines.append("| " + " | ".join(h for _, h, _ in present) + " |")
        lines.append("|" + "---|" * len(present))
        for r in rows:
            lines.append("| " + " | ".join(_fmt(r, k, f) for k, _, f in present) + " |")
        lines.append("")
        if not s["areas"]:
            lines += ["No homogeneous area was found, so ENL, bias, ratio and M are not given; "
                      "give areas (boxes or a GeoJSON file) to get them.", ""]
        edge_ref = rows[0].get("edge_reference", "noisy input")
        lines += [f"Edge measures are against the {edge_ref}. Ideal values: bias 0 dB, ratio mean 1, "
                  "ratio ENL/L 1, M 0, EPD-ROA 1, edge corr 1, points 0 dB.", ""]
        fig = s["figures"]
        r0, c0, size = s["crop"]
        lines += [f"![crops]({fig['crops']})", "",
                  f"Crops of {size} x {size} pixels at row {r0}, column {c0}, in dB with one common stretch "
                  f"({fig['stretch'][0]:.1f} to {fig['stretch'][1]:.1f} dB, the 2nd-98th percentile of "
                  f"{'the clean reference' if s['reference'] else 'the median of the filtered crops'}).", "",
                  f"![ratio images]({fig['ratios']})", "",
                  "Ratio images (input / filtered) of the same crop, in dB from -6 to +6: an ideal filter leaves "
                  "structureless speckle; visible edges or targets are signal the filter removed.", "",
                  f"![trade-off]({fig['tradeoff']})", "",
                  "Trade-off between smoothing (ENL, log scale) and edge preservation (mean of EPD-ROA H and V)"
                  + (", colour = PSNR in the dB domain." if s["reference"] else "."), ""]
    lines += ["## Conventions", ""]
    for k, v in result["conventions"].items():
        lines.append(f"- **{k}**: {v}")
    lines += ["", "## Cautions", "", result["cautions"], ""]
    path.write_text("\n".join(lines))


def _figures(folder, index, scene: _Loaded, outputs, box, rows):
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    stem = f"scene{index + 1}"
    r0, c0, size = box
    sl = (slice(r0, r0 + size), slice(c0, c0 + size))
    panels = [("input", scene.intensity[sl])]
    if scene.reference is not None:
        panels.insert(0, ("clean reference", scene.reference[sl]))
    panels += [(label, out[sl]) for label, out in outputs.items()]
    if scene.reference is not None:
        stretch_src = metrics.to_db(scene.reference[sl])
    else:
        stretch_src = np.nanmedian(np.stack([metrics.to_db(o[sl]) for o in outputs.values()]), axis=0) if outputs else metrics.to_db(scene.intensity[sl])
    lo, hi = (float(v) for v in np.nanpercentile(stretch_src, [2, 98]))
    if not hi > lo:
        hi = lo + 1.0

    def grid(items, cmap, vmin, vmax, title, fname, label):
        n = len(items)
        cols = min(4, n)
        nrows = math.ceil(n / cols)
        fig, axes = plt.subplots(nrows, cols, figsize=(2.6 * cols + 1.0, 2.8 * nrows + 0.4), squeeze=False,
                                 layout="constrained")
        im = None
        for ax, (name, img) in zip(axes.flat, items):
            im = ax.imshow(img, cmap=cmap, vmin=vmin, vmax=vmax, interpolation="nearest")
            ax.set_title(name, fontsize=9)
            ax.set_xticks([])
            ax.set_yticks([])
        for ax in list(axes.flat)[n:]:
            ax.axis("off")
        fig.suptitle(title, fontsize=10)
        if im is not None:
            fig.colorbar(im, ax=axes.ravel().tolist(), shrink=0.8, label=label)
        fig.savefig(folder / fname, dpi=90)
        plt.close(fig)

    crops_name, ratio_name, trade_name = f"{stem}_crops.png", f"{stem}_ratio.png", f"{stem}_tradeoff.png"
    grid([(n, metrics.to_db(p)) for n, p in panels], "gray", lo, hi, f"{scene.name}: crops in dB (common stretch)",
         crops_name, "dB")
    ratios = []
    for label, out in outputs.items():
        r, ok = metrics.ratio_image(scene.intensity[sl], out[sl], scene.valid[sl])
        ratios.append((label, np.where(ok, metrics.to_db(r), np.nan)))
    if ratios:
        grid(ratios, "gray", -6.0, 6.0, f"{scene.name}: ratio images input / filtered (dB)", ratio_name, "dB")
    fig, ax = plt.subplots(figsize=(6.4, 4.6))
    pts = [r for r in rows if r.get("kind") != "input" and r.get("enl") is not None and math.isfinite(r.get("enl", math.nan))]
    x = [0.5 * (r["epd_h"] + r["epd_v"]) for r in pts]
    y = [r["enl"] for r in pts]
    c = [r.get("psnr_db") for r in pts]
    if pts:
        if scene.reference is not None:
            sc = ax.scatter(x, y, c=c, cmap="viridis", s=50, edgecolors="k")
            fig.colorbar(sc, ax=ax, label="PSNR, dB domain")
        else:
            ax.scatter(x, y, s=50, color="tab:blue", edgecolors="k")
        for xi, yi, r in zip(x, y, pts):
            ax.annotate(r["method"], (xi, yi), fontsize=7, xytext=(4, 3), textcoords="offset points")
        ax.set_yscale("log")
    else:
        ax.text(0.5, 0.5, "no homogeneous areas: no ENL", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("edge preservation: mean EPD-ROA (H, V)")
    ax.set_ylabel("ENL (homogeneous areas)")
    ax.set_title(f"{scene.name}: smoothing vs edge preservation", fontsize=10)
    ax.grid(True, alpha=0.3)
    fig.tight_layout()
    fig.savefig(folder / trade_name, dpi=90)
    plt.close(fig)
    return {"crops": crops_name, "ratios": ratio_name, "tradeoff": trade_name, "stretch": [lo, hi]}
