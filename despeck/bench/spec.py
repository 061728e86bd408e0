"""What a benchmark runs: method specifications and scene list files (format: :mod:`despeck.bench`)."""

from __future__ import annotations

import pathlib
from dataclasses import dataclass, field

from .. import filters
from ..errors import ConfigError, InputError
from ..filters.bm3d_log import available as bm3d_available
from ..models.orientations import check_orientations
from ..speckle import check_looks

__all__ = ["Method", "BenchScene", "parse_option_value", "parse_method", "load_scene_list", "DEFAULT_METHODS"]

#: Methods run when none are given: every classical filter with its default window
#: (bm3d-log only when its optional package is installed).
DEFAULT_METHODS = tuple(n for n in filters.FILTERS if n != "bm3d-log" or bm3d_available())


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
            extra = {k: spec.pop(k) for k in list(spec) if k in ("orientations", "label")}
            if spec:
                raise InputError(f"method {text!r}: a model takes only 'orientations' and 'label', got {sorted(spec)}")
            if "orientations" in extra:
                text += f",orientations={extra['orientations']}"
            m = parse_method(text, base)
            return m if "label" not in extra else Method(str(extra["label"]), m.kind, m.name, m.window, m.looks,
                                                         m.options, m.path)
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
        options, label = {}, ""
        head, sep, value = raw.rpartition(",orientations=")
        if sep:  # model:PATH,orientations=N (despeck apply --orientations)
            try:
                options["orientations"] = check_orientations(int(value) if value.strip().isdigit() else value)
            except InputError as exc:
                raise InputError(f"method {text!r}: {exc}") from None
            raw, label = head, f" x{options['orientations']} orientations"
        path = pathlib.Path(raw).expanduser()
        if base is not None and not path.is_absolute():
            path = base / path
        if not path.is_file():
            raise InputError(f"method {text!r}: model file {path} not found")
        return Method(label=f"model {path.stem}{label}", kind="model", path=path, options=options)
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


# --------------------------------------------------------------------------- scene lists

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
        Number of looks; if not given, the image file's ``looks`` tag, else estimated from the scene
        (:func:`despeck.looks.resolve_looks`).
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
