"""The training configuration: a YAML file whose sections map onto pydantic models.

One file describes a whole run -- data, model, speckle, loss, optimisation, budget,
trainer settings and output -- so a run can be repeated from the ``config.yaml`` saved
beside its results. Every section is a pydantic (v2) model with defaults: unknown keys are
forbidden, value ranges are field constraints and combinations of keys are checked by a
validator of the whole config; any problem raises :class:`~despeck.errors.ConfigError`
on one line naming the key and what is allowed (``config key section.key: ...``).
``--set section.key=value`` overrides on the command line are parsed as YAML values, so
``--set speckle.looks=[1,4]`` gives a list.

This module reads the files, applies the overrides and turns pydantic's findings into
those lines; the sections themselves are defined in :mod:`despeck.training.schema` and
re-exported here.

Example
-------
.. code-block:: yaml

    data:
      train: [references/]          # files, folders or glob patterns of clean rasters
      patch_size: 64
    model: {name: logcnn-s}
    speckle: {looks: 1}
    loss: {name: mse_log, target: clean}
    budget: {max_time: 8h}
    output: {dir: runs/first}

Without clean references, train on pairs of real independent looks instead: two dates
of the same area (``data.pairs``) or sub-looks of single-look complex scenes
(``data.slc``); see :mod:`despeck.training.pairs` and ``configs/pairs.yaml``.
"""

from __future__ import annotations

import re
import types
import typing
from pathlib import Path
from typing import Annotated, Literal, Union

import yaml
from pydantic import ValidationError

from ..errors import ConfigError
from .schema import (LOSSES, PRECISIONS, SCHEDULES, SPLIT_AXES, TAPERS, TARGETS, UNITS,  # noqa: F401  re-exported
                     BudgetConfig, DataConfig, LossConfig, ModelConfig, OptimConfig, OutputConfig, SpeckleConfig,
                     TrainConfig, TrainerConfig, parse_duration)

__all__ = [
    "DataConfig",
    "ModelConfig",
    "SpeckleConfig",
    "LossConfig",
    "OptimConfig",
    "BudgetConfig",
    "TrainerConfig",
    "OutputConfig",
    "TrainConfig",
    "load_config",
    "config_from_dict",
    "apply_overrides",
    "config_to_dict",
    "dump_config",
    "parse_duration",
    "read_yaml",
]


# --------------------------------------------------------------------------- errors

def _describe(tp) -> str:
    """What a field of type ``tp`` accepts, in words (``an integer or null``)."""
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if origin is Annotated:
        return _describe(args[0])
    if origin in (Union, types.UnionType):
        parts = [_describe(a) for a in args if a is not type(None)]
        text = " or ".join(parts)
        return text + " or null" if type(None) in args else text
    if origin is Literal:
        return "one of " + ", ".join(map(str, args))
    if origin is list:
        inner = args[0] if args else None
        while typing.get_origin(inner) is Annotated:
            inner = typing.get_args(inner)[0]
        plural = {int: "integers", float: "numbers", str: "strings", bool: "true/false values"}
        if typing.get_origin(inner) is list:
            return "a list of lists of strings"
        return f"a list of {plural.get(inner, 'values')}" if args else "a list"
    if origin is dict:
        return "a mapping"
    return {int: "an integer", float: "a number", str: "a string", bool: "true/false", dict: "a mapping"}.get(tp, str(tp))


_RANGE_ERRORS = {"greater_than", "greater_than_equal", "less_than", "less_than_equal"}


def _config_error(exc: ValidationError, values: dict) -> ConfigError:
    """One line for the first problem pydantic found, naming the section and key."""
    error = exc.errors(include_url=False)[0]
    cause = (error.get("ctx") or {}).get("error")
    if isinstance(cause, ConfigError):
        return cause  # raised by a validator with its own message
    loc = [str(part) for part in error["loc"]]
    sections = TrainConfig.model_fields
    if len(loc) == 1:
        if error["type"] == "extra_forbidden":
            return ConfigError(f"config section {loc[0]!r} is unknown; allowed sections: {', '.join(sections)}")
        return ConfigError(f"config section {loc[0]}: expected a mapping of keys, got {error['input']!r}")
    section, key = loc[0], loc[1]
    fields = sections[section].annotation.model_fields
    if error["type"] == "extra_forbidden":
        return ConfigError(f"config key {section}.{key} is unknown; allowed keys in {section}: {', '.join(fields)}")
    info = fields[key]
    given = values[section][key]
    if error["type"] in _RANGE_ERRORS and info.description:
        return ConfigError(f"config key {section}.{key}: must be {info.description}, got {given!r}")
    if error["type"] == "literal_error":
        choices = info.description or _describe(info.annotation)
        return ConfigError(f"config key {section}.{key}: must be {choices}, got {given!r}")
    return ConfigError(f"config key {section}.{key}: expected {_describe(info.annotation)}, got {given!r}")


def config_from_dict(values) -> TrainConfig:
    """Build and check a :class:`TrainConfig` from a nested mapping (e.g. parsed YAML).

    Raises
    ------
    ConfigError
        The first problem, on one line naming the key: an unknown section or key, a
        value of the wrong type or outside its range, or keys that contradict each other.
    """
    if values is None:
        values = {}
    if not isinstance(values, dict):
        raise ConfigError(f"a training config must be a mapping of sections, got {type(values).__name__}")
    try:
        return TrainConfig.model_validate(values)
    except ValidationError as exc:
        raise _config_error(exc, values) from None




# --------------------------------------------------------------------------- files and overrides

class _YamlLoader(yaml.SafeLoader):
    """PyYAML's safe loader that also reads YAML 1.2 numbers such as ``1e-3`` as numbers.

    PyYAML follows YAML 1.1, whose float pattern needs a decimal point, so ``1e-3``,
    ``1E5`` and ``+2e3`` stay strings there; YAML 1.2's core schema (and every other
    reader users meet) takes them as floats.
    """


# Own copy of the resolver table, so yaml.SafeLoader itself is left unchanged.
_YamlLoader.yaml_implicit_resolvers = {
    k: list(v) for k, v in yaml.SafeLoader.yaml_implicit_resolvers.items()
}
# YAML 1.2 core schema float (YAML Language Specification 1.2.2, section 10.3.2), the
# forms without a decimal point that YAML 1.1 leaves out.
_YamlLoader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^[-+]?(?:[0-9][0-9_]*(?:\.[0-9_]*)?|\.[0-9_]+)[eE][-+]?[0-9]+$"),
    list("-+0123456789."),
)


def read_yaml(text):
    """Parse YAML ``text`` safely (no tags that build objects), reading ``1e-3`` as a number.

    Raises
    ------
    yaml.YAMLError
        Invalid YAML; nesting deeper than Python's recursion limit is reported as one
        as well.
    """
    try:
        return yaml.load(text, Loader=_YamlLoader)  # noqa: S506 - a SafeLoader subclass
    except RecursionError:
        raise yaml.YAMLError("nesting too deep") from None


def apply_overrides(values: dict, overrides) -> dict:
    """Apply ``section.key=value`` strings to a nested mapping; values are parsed as YAML."""
    values = {k: (dict(v) if isinstance(v, dict) else v) for k, v in (values or {}).items()}
    for item in overrides or ():
        if "=" not in item:
            raise ConfigError(f"--set {item!r}: expected section.key=value")
        key, raw = item.split("=", 1)
        parts = key.strip().split(".")
        if len(parts) < 2 or not all(parts):
            raise ConfigError(f"--set {item!r}: the key must be section.key, e.g. budget.max_time=2h")
        try:
            value = read_yaml(raw) if raw.strip() else None
        except yaml.YAMLError:
            value = raw
        node = values
        for p in parts[:-1]:
            child = node.get(p)
            if child is None:
                child = node[p] = {}
            elif not isinstance(child, dict):
                raise ConfigError(f"--set {item!r}: {p} is not a section")
            else:
                child = node[p] = dict(child)
            node = child
        node[parts[-1]] = value
    return values


def load_config(path, overrides=()) -> TrainConfig:
    """Read a YAML training config, apply ``--set`` overrides and check everything.

    Relative paths in ``data.train``, ``data.validation``, ``data.pairs``,
    ``data.slc`` and ``model.init`` are taken relative to the config file's folder; ``output.dir`` relative to the current directory.
    """
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"config file {path} does not exist")
    try:
        values = read_yaml(path.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError) as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ConfigError(f"config file {path} is not valid YAML ({first})") from None
    if values is not None and not isinstance(values, dict):
        raise ConfigError(f"config file {path} must hold a mapping of sections, got {type(values).__name__}")
    base = path.resolve().parent
    data = dict((values or {}).get("data") or {}) if isinstance((values or {}).get("data"), dict) else None
    if data is not None:
        def resolve(p):
            return str(base / p) if isinstance(p, str) and not Path(p).expanduser().is_absolute() else p

        for key in ("train", "validation", "slc"):
            if isinstance(data.get(key), str):
                data[key] = [data[key]]
            if isinstance(data.get(key), list):
                data[key] = [resolve(p) for p in data[key]]
        if isinstance(data.get("pairs"), list):
            data["pairs"] = [[resolve(p) for p in pair] if isinstance(pair, list) else resolve(pair)
                             for pair in data["pairs"]]
        values = {**values, "data": data}
    model = (values or {}).get("model")
    if isinstance(model, dict) and isinstance(model.get("init"), str):
        init = model["init"]
        from ..models.bundled import BUNDLED_MODELS

        if init not in BUNDLED_MODELS and not Path(init).expanduser().is_absolute():
            values = {**values, "model": {**model, "init": str(base / init)}}
    values = apply_overrides(values, overrides)
    return config_from_dict(values)


def config_to_dict(config: TrainConfig) -> dict:
    """The fully resolved config as a plain nested dict (defaults included)."""
    return config.model_dump()


def dump_config(config: TrainConfig) -> str:
    """YAML text of the fully resolved config, loadable by :func:`load_config`."""
    return yaml.safe_dump(config_to_dict(config), sort_keys=False, default_flow_style=None)
