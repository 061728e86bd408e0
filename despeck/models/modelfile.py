"""The model file: a trained despeckler's weights and description in one safetensors file.

Weights are stored as raw tensors in the safetensors container, whose reader parses a
JSON header and copies bytes -- nothing in the file is ever executed, unlike pickle-based
checkpoints. The description lives in the same header under the key ``"despeck"`` as
one JSON document::

    {"format": "despeck-model", "format_version": 1,
     "architecture": {"name": "logcnn-s", "kwargs": {...}},
     "looks": 1.0, "units": "intensity",
     "normalisation": {"log_scale": 2.0, "log_bias": 0.0, "loss": "gamma_nll",
                       "log_offset": "mean ln I over valid pixels of the scene",
                       "fill": "invalid pixels take the log offset"},
     "training": {...}, "metrics": {...}, "package_version": "0.1.0", ...}

The network is rebuilt from the registry by name and arguments, so a file can only
describe architectures this version of despeck knows. Files are written to a temporary
name in the destination folder and renamed, so a crash never leaves half a file.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import torch

from ..atomic import publish, sibling_temp
from ..errors import DespeckError, InputError, ModelFileError
from .registry import create_model, list_models
from .wrapper import Despeckler

__all__ = ["save_model_file", "load_model_file", "read_model_metadata", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "despeck-model"
FORMAT_VERSION = 1
_HEADER_KEY = "despeck"


def _json_ready(value, where):
    try:
        return json.loads(json.dumps(value, allow_nan=False))
    except (TypeError, ValueError) as exc:
        raise InputError(f"model metadata {where} is not JSON-serialisable: {exc}") from None


def save_model_file(path, despeckler: Despeckler, **metadata) -> Path:
    """Write ``despeckler`` to ``path`` (a ``.safetensors`` file) with its description.

    Parameters
    ----------
    path : str or Path
        Destination; written through a temporary file in the same folder, then renamed.
    despeckler : Despeckler
        Its network must come from :func:`despeck.models.create_model` (it carries the
        registry name and arguments needed to rebuild it).
    **metadata
        Extra JSON-serialisable entries (e.g. ``training=...``, ``metrics=...``,
        ``units=...``); they update ``despeckler.metadata``. The reserved keys
        ``format``, ``format_version``, ``architecture`` and ``normalisation`` are set
        here and cannot be overridden.

    Returns
    -------
    Path
        The written path.
    """
    from .. import __version__

    if not isinstance(despeckler, Despeckler):
        raise InputError(f"save_model_file needs a Despeckler, got {type(despeckler).__name__}")
    net = despeckler.network
    name = getattr(net, "architecture", None)
    if name not in list_models():
        raise InputError(
            f"cannot save a {type(net).__name__} network: it was not built by despeck.models.create_model"
        )
    path = Path(path)
    extra = {**despeckler.metadata, **metadata}
    reserved = {"format", "format_version", "architecture"} & set(extra)
    if reserved:
        raise InputError(f"model metadata key {sorted(reserved)[0]!r} is reserved")
    normalisation = {
        "log_scale": despeckler.log_scale,
        "log_bias": despeckler.log_bias,
        "log_offset": "mean ln I over the valid pixels of the scene",
        "fill": "invalid pixels take the log offset",
    }
    normalisation.update(extra.pop("normalisation", {}) or {})
    normalisation["log_scale"], normalisation["log_bias"] = despeckler.log_scale, despeckler.log_bias
    normalisation["point_false_alarm"] = despeckler.point_false_alarm
    header = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "architecture": {"name": name, "kwargs": net.architecture_kwargs},
        "looks": despeckler.looks,
        "units": "intensity",
        "normalisation": normalisation,
        "package_version": __version__,
    }
    header.update({k: v for k, v in extra.items()})
    header = _json_ready(header, "")
    tensors = {k: v.detach().to("cpu").contiguous().clone() for k, v in net.state_dict().items()}

    from safetensors.torch import save_file

    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ModelFileError(f"cannot write model file {path}: folder {folder} does not exist")
    try:
        tmp = sibling_temp(path)
    except OSError as exc:
        raise ModelFileError(f"cannot write model file {path}: {exc.strerror or exc}") from None
    try:
        save_file(tensors, str(tmp), metadata={_HEADER_KEY: json.dumps(header, sort_keys=True)})
        publish(tmp, path)
    except OSError as exc:
        raise ModelFileError(f"cannot write model file {path}: {exc.strerror or exc}") from None
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path


def read_model_metadata(path) -> dict:
    """The description stored in the model file at ``path`` (no weights are read).

    Raises
    ------
    ModelFileError
        Missing, corrupt, foreign (not a despeck model) or newer-format file.
    """
    from safetensors import safe_open

    path = Path(path)
    if not path.is_file():
        raise ModelFileError(f"model file {path} does not exist")
    try:
        with safe_open(str(path), framework="pt") as f:
            raw = (f.metadata() or {}).get(_HEADER_KEY)
    except Exception as exc:  # the safetensors reader raises its own error types
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ModelFileError(f"{path} is not a readable safetensors model file ({first})") from None
    if raw is None:
        raise ModelFileError(f"{path} is a safetensors file but not a despeck model (no description header)")
    try:
        header = json.loads(raw)
    except ValueError:
        raise ModelFileError(f"{path} has a corrupt despeck description header") from None
    if not isinstance(header, dict) or header.get("format") != FORMAT_NAME:
        raise ModelFileError(f"{path} is not a despeck model file (format {header.get('format')!r})"
                             if isinstance(header, dict) else f"{path} has a corrupt despeck description header")
    version = header.get("format_version")
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise ModelFileError(f"{path} has an invalid model format version {version!r}")
    if version > FORMAT_VERSION:
        raise ModelFileError(
            f"{path} uses model format version {version}, newer than this despeck reads "
            f"(up to {FORMAT_VERSION}); upgrade despeck"
        )
    return header


def load_model_file(path) -> Despeckler:
    """Load a model file written by :func:`save_model_file`; the result is in eval mode.

    Only tensors and a JSON header are read; the network is rebuilt from the registry
    by name, so loading never executes code from the file.

    Raises
    ------
    ModelFileError
        Missing, corrupt, foreign or newer-format file, unknown architecture, or weights
        that do not fit the described architecture. One line, naming the file.
    """
    from safetensors.torch import load_file

    path = Path(path)
    header = read_model_metadata(path)
    try:
        arch = header["architecture"]
        name, kwargs = arch["name"], dict(arch.get("kwargs") or {})
        norm = header.get("normalisation") or {}
        network = create_model(name, **kwargs)
        despeckler = Despeckler(
            network,
            looks=header["looks"],
            log_bias=norm.get("log_bias", 0.0),
            log_scale=norm.get("log_scale"),
            point_false_alarm=norm.get("point_false_alarm"),
        )
    except DespeckError as exc:
        raise ModelFileError(f"{path} describes a model this despeck cannot build: {exc}") from None
    except (KeyError, TypeError, AttributeError) as exc:
        raise ModelFileError(f"{path} has an incomplete despeck description header (missing {exc})") from None
    try:
        tensors = load_file(str(path))
    except Exception as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ModelFileError(f"{path} has unreadable weights ({first})") from None
    try:
        network.load_state_dict(tensors, strict=True)
    except RuntimeError:
        expected, got = set(network.state_dict()), set(tensors)
        detail = (f"missing {sorted(expected - got)[:1]}, unexpected {sorted(got - expected)[:1]}"
                  if expected != got else "tensor shapes differ")
        raise ModelFileError(f"{path}: weights do not fit architecture {name!r} ({detail})") from None
    reserved = {"format", "format_version", "architecture", "looks", "normalisation"}
    despeckler.metadata = {k: v for k, v in header.items() if k not in reserved}
    despeckler.metadata["normalisation"] = norm
    despeckler.eval()
    return despeckler
