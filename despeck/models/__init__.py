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

from .registry import (ModelEntry, create_model, list_models, model_defaults, model_description, model_entry,
                       register_model)
from .wrapper import CONDITION_CHANNELS, DEFAULT_LOG_SCALE, Despeckler
from .bundled import BUNDLED_MODELS, bundled_model_path, resolve_model_path

# Importing the family modules registers their variants.
from . import logcnn, unet  # noqa: E402,F401  isort: skip
from .logcnn import LogCNN  # noqa: E402
from .modelfile import FORMAT_VERSION, load_model_file, read_model_metadata, save_model_file  # noqa: E402
from .unet import UNet  # noqa: E402

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
    "BUNDLED_MODELS",
    "bundled_model_path",
    "resolve_model_path",
    "LogCNN",
    "UNet",
    "save_model_file",
    "load_model_file",
    "read_model_metadata",
    "FORMAT_VERSION",
]
