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
name in the destination folder, synced and checked for size, and renamed, so a crash or
a full disk never leaves half a file.

Loading trusts nothing in the file: the header's size and nesting are capped, the
architecture's arguments are checked against the registry's ceilings, the tensor names,
shapes and types stored in the file are compared with the architecture's before any
weight is read or any network built, every weight must be finite, and the calibration
values must lie in physically sensible ranges (:data:`MAX_LOOKS`,
:data:`MAX_ABS_LOG_BIAS`, :data:`LOG_SCALE_RANGE`; ``point_false_alarm`` in (0, 1)).
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

import torch

from ..atomic import publish, sibling_temp, write_problem
from ..errors import DespeckError, InputError, ModelFileError
from ..provenance import file_sha256
from .registry import create_model, list_models, weight_shapes
from .wrapper import Despeckler

__all__ = ["save_model_file", "load_model_file", "read_model_metadata", "describe_model_file", "FORMAT_NAME",
           "FORMAT_VERSION"]

FORMAT_NAME = "despeck-model"
FORMAT_VERSION = 1
_HEADER_KEY = "despeck"

#: Largest safetensors header read (the JSON table of tensors plus the description), bytes;
#: a despeck model's is a few kilobytes.
MAX_HEADER_BYTES = 8 * 1024 * 1024
#: Deepest nesting of lists and mappings in the description.
MAX_HEADER_DEPTH = 32
#: Largest number of looks a model may be described for (speckle of more looks is below
#: 0.15 dB standard deviation: nothing left to filter).
MAX_LOOKS = 1000.0
#: Largest magnitude of the log-domain bias correction, nepers (a factor of 22 000;
#: real corrections are below one neper: ``ln L - psi(L)`` is 0.58 at one look).
MAX_ABS_LOG_BIAS = 10.0
#: Allowed normalisation scales, nepers per unit (the default is 2).
LOG_SCALE_RANGE = (0.01, 100.0)
_FLOAT_DTYPES = {"F16", "BF16", "F32", "F64"}


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
    for key in ("log_bias_table", "log_bias_table_bf16"):
        table = getattr(despeckler, key)
        if table is not None:
            normalisation[key] = table
        else:
            normalisation.pop(key, None)
    normalisation["correlation_unknown"] = bool(despeckler.correlation_unknown)
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
    for key, tensor in tensors.items():
        if tensor.is_floating_point() and not bool(torch.isfinite(tensor).all()):
            raise InputError(f"cannot save model file {path}: weight {key} holds NaN or infinite values")

    from safetensors.torch import save

    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ModelFileError(f"cannot write model file {path}: folder {folder} does not exist")
    def failed(exc, partial=None):
        problem = write_problem(folder, exc, partial)
        return ModelFileError(f"cannot write model file {path}: {problem.text if problem else exc.strerror or exc}")

    try:
        tmp = sibling_temp(path)
    except OSError as exc:
        raise failed(exc) from None
    try:
        data = save(tensors, metadata={_HEADER_KEY: json.dumps(header, sort_keys=True)})
        with open(tmp, "wb") as f:
            f.write(data)
        if os.path.getsize(tmp) != len(data):
            raise OSError(f"only {os.path.getsize(tmp)} of {len(data)} bytes were written")
        _verify_written(tmp, tensors, header, path)
        publish(tmp, path)  # fsync, then rename
    except OSError as exc:
        raise failed(exc, tmp) from None
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path


def _verify_written(tmp, tensors, header, path) -> None:
    """Read the temporary file back as a model before it takes ``path``'s name.

    The same checks as any later load (:func:`load_model_file`), then every tensor and
    the header compared with what was meant to be written: a file that would not load,
    or load as something else, never replaces a good one.
    """
    try:
        back = load_model_file(tmp)
    except ModelFileError as exc:
        raise ModelFileError(f"cannot write model file {path}: the written file does not read back ({exc})") from None
    state = back.network.state_dict()
    same = set(state) == set(tensors) and all(torch.equal(state[k], tensors[k]) for k in tensors)
    if not same or read_model_metadata(tmp) != json.loads(json.dumps(header, sort_keys=True)):
        raise ModelFileError(f"cannot write model file {path}: the written file reads back different weights "
                             "or description")


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
        with open(path, "rb") as f:
            prefix = f.read(8)
    except OSError as exc:
        raise ModelFileError(f"cannot read model file {path} ({exc.strerror or exc})") from None
    size = int.from_bytes(prefix, "little") if len(prefix) == 8 else 0
    if size > MAX_HEADER_BYTES:
        raise ModelFileError(f"{path} declares a {size}-byte header, more than the {MAX_HEADER_BYTES} "
                             "a despeck model file may have; it is corrupt or not a despeck model")
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
    except RecursionError:
        header = None
    if header is None or _depth(header) > MAX_HEADER_DEPTH:
        raise ModelFileError(f"{path} has a description header nested more than {MAX_HEADER_DEPTH} levels deep; "
                             "it is corrupt or not a despeck model")
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


def _depth(value) -> int:
    """Nesting depth of lists and mappings in parsed JSON (iterative: no recursion limit)."""
    deepest, stack = 0, [(value, 1)]
    while stack:
        item, level = stack.pop()
        if isinstance(item, (list, dict)):
            deepest = max(deepest, level)
            if level > MAX_HEADER_DEPTH:
                break
            stack.extend((v, level + 1) for v in (item.values() if isinstance(item, dict) else item))
    return deepest


def _check_calibration(path, header: dict, norm: dict) -> None:
    """Refuse non-numeric, non-finite or absurd calibration values (one line naming the value)."""

    def number(key, value):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise ModelFileError(f"{path}: {key} must be a finite number, got {value!r}")
        return float(value)

    looks = header.get("looks")
    for value in looks if isinstance(looks, list) else [looks]:
        if not 0 < number("looks", value) <= MAX_LOOKS:
            raise ModelFileError(f"{path}: looks {value!r} is out of range (0, {MAX_LOOKS:g}]")
    if not isinstance(norm, dict):
        raise ModelFileError(f"{path}: normalisation must be a mapping, got {norm!r}")
    if "log_scale" not in norm:
        raise ModelFileError(f"{path} has an incomplete despeck description header (no normalisation.log_scale)")
    lo, hi = LOG_SCALE_RANGE
    if not lo <= number("normalisation.log_scale", norm["log_scale"]) <= hi:
        raise ModelFileError(f"{path}: normalisation.log_scale {norm['log_scale']!r} is out of range "
                             f"[{lo:g}, {hi:g}] nepers per unit")
    if abs(number("normalisation.log_bias", norm.get("log_bias", 0.0))) > MAX_ABS_LOG_BIAS:
        raise ModelFileError(f"{path}: normalisation.log_bias {norm['log_bias']!r} is out of range "
                             f"[-{MAX_ABS_LOG_BIAS:g}, {MAX_ABS_LOG_BIAS:g}] nepers")
    pfa = norm.get("point_false_alarm")
    if pfa is not None and not 0 < number("normalisation.point_false_alarm", pfa) < 1:
        raise ModelFileError(f"{path}: normalisation.point_false_alarm {pfa!r} must lie in (0, 1) or be null")


def _check_stored_weights(path, name, expected: dict) -> None:
    """Compare the tensors listed in the file's header with the architecture's, reading no weight."""
    from safetensors import safe_open

    try:
        with safe_open(str(path), framework="pt") as f:
            stored = {k: (tuple(f.get_slice(k).get_shape()), f.get_slice(k).get_dtype()) for k in f.keys()}
    except Exception as exc:  # the safetensors reader raises its own error types
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ModelFileError(f"{path} has an unreadable tensor table ({first})") from None
    if set(stored) != set(expected):
        missing, unexpected = sorted(set(expected) - set(stored)), sorted(set(stored) - set(expected))
        raise ModelFileError(f"{path}: weights do not fit architecture {name!r} "
                             f"(missing {missing[:1]}, unexpected {unexpected[:1]})")
    for key in sorted(expected):
        shape, dtype = stored[key]
        if shape != tuple(expected[key]):
            raise ModelFileError(f"{path}: weights do not fit architecture {name!r} "
                                 f"({key} has shape {list(shape)}, expected {list(expected[key])})")
        if dtype not in _FLOAT_DTYPES:
            raise ModelFileError(f"{path}: weight {key} is stored as {dtype}, not as floating point")


def load_model_file(path) -> Despeckler:
    """Load a model file written by :func:`save_model_file`; the result is in eval mode.

    Only tensors and a JSON header are read; the network is rebuilt from the registry
    by name, so loading never executes code from the file. The result carries the
    file's name and SHA-256 as ``source_file`` and ``source_sha256`` (recorded in the
    outputs it makes, :mod:`despeck.provenance`).

    Raises
    ------
    ModelFileError
        Missing, corrupt, foreign or newer-format file, unknown architecture or one
        beyond the registry's size ceilings, weights that do not fit the described
        architecture or are not finite, calibration values out of range. One line,
        naming the file.
    """
    from safetensors.torch import load_file

    path = Path(path)
    header = read_model_metadata(path)
    try:
        arch = header["architecture"]
        name, kwargs = arch["name"], dict(arch.get("kwargs") or {})
        norm = header.get("normalisation") or {}
        expected = weight_shapes(name, **kwargs)  # checks the arguments, allocates nothing
    except DespeckError as exc:
        raise ModelFileError(f"{path} describes a model this despeck cannot build: {exc}") from None
    except (KeyError, TypeError, AttributeError, ValueError) as exc:
        raise ModelFileError(f"{path} has an incomplete or malformed architecture description ({exc})") from None
    _check_calibration(path, header, norm)
    _check_stored_weights(path, name, expected)
    try:
        network = create_model(name, **kwargs)
        despeckler = Despeckler(
            network,
            looks=header["looks"],
            log_bias=norm.get("log_bias", 0.0),
            log_scale=norm.get("log_scale"),
            point_false_alarm=norm.get("point_false_alarm"),
            log_bias_table=norm.get("log_bias_table"),
            log_bias_table_bf16=norm.get("log_bias_table_bf16"),
            correlation_unknown=bool(norm.get("correlation_unknown", False)),
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
    for key in sorted(tensors):
        if not bool(torch.isfinite(tensors[key]).all()):
            raise ModelFileError(f"{path}: weight {key} holds NaN or infinite values; the file is corrupt "
                                 "or was saved from a diverged training run")
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
    # What outputs record as their maker (despeck.provenance); not model metadata, so a
    # model saved again does not carry the old file's name and hash.
    despeckler.source_file = path.name
    try:
        despeckler.source_sha256 = file_sha256(path)
    except OSError as exc:
        raise ModelFileError(f"{path} cannot be read again to compute its SHA-256 ({exc.strerror or exc})") from None
    despeckler.eval()
    return despeckler


def describe_model_file(path) -> dict:
    """What a model file holds, as plain data (what ``despeck info MODEL`` prints).

    The file is loaded as :func:`load_model_file` loads it (every check, no code run),
    so a file this describes is a file ``apply`` can use. Keys: ``path``, ``bytes``,
    ``sha256``, ``architecture`` (name and arguments), ``parameters``,
    ``receptive_field``, ``looks`` (range), ``looks_aware`` (told the looks and the
    speckle correlation), ``runs_blind`` (also trained without the correlation),
    ``units``, ``bias_tables`` (``{"32" | "bf16": {"looks": n, "corr": n, "min_db",
    "max_db"}}``, empty for a single ``log_bias``), ``log_bias_db``,
    ``point_false_alarm``, ``training`` (mode, epochs, steps, stopped_by, precision,
    init; None when not recorded), ``validation`` (the exported checkpoint's metrics)
    and ``package_version``.
    """
    path = Path(path)
    model = load_model_file(path)
    meta = model.metadata
    net = model.network
    db = 10 / math.log(10)
    tables = {}
    for key, table in (("32", model.log_bias_table), ("bf16", model.log_bias_table_bf16)):
        if table is not None:
            values = [v for row in table["values"] for v in row]
            tables[key] = {"looks": len(table["looks"]), "corr": len(table["corr"]),
                           "min_db": db * min(values), "max_db": db * max(values)}
    training = meta.get("training")
    if isinstance(training, dict):
        config = training.get("config") if isinstance(training.get("config"), dict) else {}
        model_cfg = config.get("model") if isinstance(config.get("model"), dict) else {}
        training = {k: training.get(k) for k in ("mode", "epochs", "steps", "stopped_by", "precision")}
        training["init"] = model_cfg.get("init")
    else:
        training = None
    return {
        "path": str(path),
        "bytes": path.stat().st_size,
        "sha256": model.source_sha256,
        "architecture": {"name": net.architecture, "kwargs": dict(net.architecture_kwargs)},
        "parameters": int(sum(p.numel() for p in net.parameters())),
        "receptive_field": int(net.receptive_field),
        "looks": list(model.looks_range),
        "looks_aware": bool(model.conditioned),
        "runs_blind": bool(model.correlation_unknown),
        "units": meta.get("units", "intensity"),
        "bias_tables": tables,
        "log_bias_db": db * model.log_bias,
        "point_false_alarm": model.point_false_alarm,
        "training": training,
        "validation": meta.get("metrics") if isinstance(meta.get("metrics"), dict) else None,
        "package_version": meta.get("package_version"),
    }
