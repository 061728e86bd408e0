"""Despeckling networks, the intensity wrapper and the model file format.

Plain networks map normalised log-intensity ``(N, 1, H, W)`` to an estimate of the
same shape and are built by name from the registry (one architecture family per
module: :mod:`~despeck.models.logcnn`, :mod:`~despeck.models.unet`). A
:class:`Despeckler` wraps a network and maps linear intensity to linear intensity;
:func:`save_model_file` / :func:`load_model_file` store and restore it as a
safetensors file whose loading never executes code.

Examples
--------
>>> from despeck.models import create_model, Despeckler, list_models
>>> net = create_model("logcnn-s")
>>> model = Despeckler(net, looks=1)
>>> model.receptive_field
21
"""

from __future__ import annotations

import importlib

# The registry and the bundled-model paths need no torch: listing and checking model
# names (a training config) stays light. The names below that need torch are imported
# from their modules on first use; the family modules register their variants when the
# registry first needs them (despeck.models.registry.BUILTIN_MODELS).
from .registry import (ModelEntry, create_model, list_models, model_defaults, model_description, model_entry,
                       register_model)
from .bundled import BUNDLED_MODELS, bundled_model_path, resolve_model_path
from .orientations import ORIENTATIONS

#: Public name -> the module of this package that defines it (imported on first use).
_LAZY_NAMES = {
    "Despeckler": "wrapper", "DEFAULT_LOG_SCALE": "wrapper", "CONDITION_CHANNELS": "wrapper",
    "LogCNN": "logcnn", "UNet": "unet",
    "FORMAT_VERSION": "modelfile", "load_model_file": "modelfile", "read_model_metadata": "modelfile",
    "save_model_file": "modelfile", "describe_model_file": "modelfile",
}


def __getattr__(name):
    module = _LAZY_NAMES.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{module}"), name)
    globals()[name] = value  # later look-ups find it directly
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY_NAMES))


__all__ = [
    "register_model",
    "ModelEntry",
    "model_entry",
    "create_model",
    "list_models",
    "model_defaults",
    "model_description",
    "Despeckler",
    "DEFAULT_LOG_SCALE",
    "CONDITION_CHANNELS",
    "ORIENTATIONS",
    "BUNDLED_MODELS",
    "bundled_model_path",
    "resolve_model_path",
    "LogCNN",
    "UNet",
    "save_model_file",
    "load_model_file",
    "read_model_metadata",
    "describe_model_file",
    "FORMAT_VERSION",
]
