"""The model registry: named network variants and the ``create_model`` factory.

Each architecture family lives in its own module and registers its size variants
with the :func:`register_model` decorator under names that encode the size
(``logcnn-s``, ``unet-m``)::

    @register_model("unet-m", widths=[16, 32, 64, 128], description="...")
    @register_model("unet-s", widths=[16, 32, 64], description="...")
    class UNet(nn.Module):
        ...

Every registration records one :class:`ModelEntry`, the variant's default
configuration: its name, constructor, the full default keyword arguments (the
constructor's own defaults with the variant's on top) and a one-line description.
:func:`create_model` merges the caller's overrides into those defaults, builds the
network and records the name and the fully resolved arguments on it
(``network.architecture``, ``network.architecture_kwargs``) so the model file can
rebuild it exactly without executing anything stored in the file.

Arguments can come from a model file or a config anyone may have written, so
:func:`create_model` checks them against the ceilings below *before* building: first
each argument on its own (:data:`ARGUMENT_LIMITS`, :data:`MAX_ARGUMENT`,
:data:`MAX_LIST_LENGTH`), then the whole network, laid out on torch's ``meta`` device
(shapes only, no memory for weights): parameter count, receptive field and pooling
multiple. :func:`weight_shapes` gives those shapes so a model file's tensors can be
compared with them before anything is allocated.

This module needs no torch to list or check names: the variants that come with despeck
are known from :data:`BUILTIN_MODELS` (name -> the module that registers it), and a
family's module -- with torch -- is imported the first time one of its entries is
needed (building, defaults, shapes). Checking a training config therefore never loads
torch.
"""

from __future__ import annotations

import copy
import functools
import importlib
import inspect
import sys
from dataclasses import dataclass
from types import MappingProxyType
from typing import Callable, Mapping

from ..errors import InputError

__all__ = ["ModelEntry", "register_model", "model_entry", "create_model", "list_models", "model_defaults", "model_description",
           "weight_shapes", "BUILTIN_MODELS", "ARGUMENT_LIMITS", "MAX_ARGUMENT", "MAX_LIST_LENGTH", "MAX_PARAMETERS",
           "MAX_RECEPTIVE_FIELD", "MAX_SIZE_MULTIPLE"]

#: The network variants that come with despeck, each with the module of this package
#: whose ``@register_model`` records it. Names are listed and checked from this table
#: without importing torch; the module is imported the first time an entry is needed.
BUILTIN_MODELS = MappingProxyType({
    "logcnn-xs": "logcnn", "logcnn-s": "logcnn", "logcnn-m": "logcnn",
    "unet-xs": "unet", "unet-s": "unet", "unet-m": "unet",
    "unet-cond-xs": "unet", "unet-cond-s": "unet", "unet-cond-m": "unet", "unet-cond-l": "unet", "unet-cond-h": "unet",
})

# Ceilings on what a network description may ask for. The registered variants stay far
# below them (the largest, unet-m and logcnn-m, have under 0.6 M parameters, receptive
# fields under 120 pixels and a pooling multiple of 8); they exist so that a corrupt or
# hostile model header or config (``depth: 300000``) is refused in milliseconds instead
# of exhausting memory.
#: Largest value of a named integer argument (a list argument: of each entry).
ARGUMENT_LIMITS = {"depth": 128, "width": 512, "widths": 512, "dilations": 64}
#: Largest value of any other integer argument.
MAX_ARGUMENT = 4096
#: Most entries of a list argument.
MAX_LIST_LENGTH = 64
#: Most trainable values in one network (40 MB of float32).
MAX_PARAMETERS = 10_000_000
#: Largest receptive field, pixels (the tiler overlaps tiles by about this much).
MAX_RECEPTIVE_FIELD = 2049
#: Largest pooling-grid multiple (``2 ** levels`` of a U-Net).
MAX_SIZE_MULTIPLE = 256


@dataclass(frozen=True)
class ModelEntry:
    """What the registry knows of one network variant: its default configuration.

    Attributes
    ----------
    name : str
        Registered name; encodes the family and the size, e.g. ``'logcnn-s'``.
    constructor : callable
        ``constructor(**kwargs) -> nn.Module``: an ``nn.Module`` subclass (or a factory)
        taking keyword arguments only; the network exposes an odd integer
        ``receptive_field``.
    defaults : Mapping
        Every keyword argument the variant is built with when none is overridden (the
        constructor's own defaults, then the variant's); read-only.
    description : str
        One line shown by :func:`model_description`.
    """

    name: str
    constructor: Callable
    defaults: Mapping
    description: str = ""


_REGISTRY: dict[str, ModelEntry] = {}


def _load_builtin(name) -> None:
    """Import the module that registers the built-in variant ``name`` (nothing for other names).

    A module being imported -- one registering its own variants -- is already in
    ``sys.modules`` and is left alone.
    """
    module = BUILTIN_MODELS.get(name) if isinstance(name, str) else None
    if module is not None and name not in _REGISTRY:
        full = f"{__package__}.{module}"
        if full not in sys.modules:
            importlib.import_module(full)


def register_model(name: str, constructor: Callable = None, *, description: str = "", **defaults):
    """Register the network variant ``name``, built as ``constructor(**defaults, **overrides)``.

    Used as a decorator on the network class (or a factory function), once per size
    variant; the decorated object is returned unchanged. Called with ``constructor``
    it registers at once and returns ``constructor``.

    Parameters
    ----------
    name : str
        Registry name; encodes the family and the size, e.g. ``"logcnn-s"``.
    constructor : callable, optional
        An ``nn.Module`` subclass (or factory) whose arguments are keyword arguments
        and whose networks expose an odd integer ``receptive_field``; omitted when used
        as a decorator.
    description : str
        One line shown by :func:`model_description`.
    **defaults
        Constructor arguments of this variant (they must be arguments of the constructor).

    Returns
    -------
    callable
        The decorator, or ``constructor`` when it is given.

    Raises
    ------
    InputError
        ``name`` is already registered, or a default is not an argument of the constructor.
    """
    _load_builtin(name)
    if name in _REGISTRY:
        raise InputError(f"model name {name!r} is already registered")

    def register(constructor):
        if name in _REGISTRY:
            raise InputError(f"model name {name!r} is already registered")
        params = inspect.signature(constructor).parameters
        takes_any = any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values())
        unknown = sorted(set(defaults) - set(params))
        if unknown and not takes_any:
            raise InputError(f"model {name!r}: {constructor.__name__} has no argument {unknown[0]!r}")
        resolved = {
            k: p.default for k, p in params.items()
            if p.default is not inspect.Parameter.empty
            and p.kind in (inspect.Parameter.KEYWORD_ONLY, inspect.Parameter.POSITIONAL_OR_KEYWORD)
        }
        resolved.update(defaults)
        _REGISTRY[name] = ModelEntry(name, constructor, MappingProxyType(resolved), description)
        return constructor

    return register if constructor is None else register(constructor)


def list_models() -> list[str]:
    """Sorted names of every network variant: the built-in ones and any registered since (no torch needed)."""
    return sorted(set(_REGISTRY) | set(BUILTIN_MODELS))


def model_entry(name) -> ModelEntry:
    """The :class:`ModelEntry` registered as ``name``; :class:`InputError` listing the names otherwise."""
    _load_builtin(name)
    try:
        return _REGISTRY[name]
    except (KeyError, TypeError):
        raise InputError(
            f"unknown model {name!r}; choose one of: {', '.join(list_models())}"
        ) from None


def model_defaults(name: str) -> dict:
    """The constructor arguments variant ``name`` uses when none are overridden (a new dict)."""
    return copy.deepcopy(dict(model_entry(name).defaults))


def model_description(name: str) -> str:
    """One-line description of variant ``name``."""
    return model_entry(name).description


def create_model(name: str, **kwargs):
    """Build the registered network ``name``, overriding its defaults with ``kwargs``.

    The network maps normalised log-intensity ``(N, 1, H, W)`` to a normalised
    log-intensity estimate of the same shape (see :class:`despeck.models.Despeckler`
    for the normalisation). It is fully convolutional and has no normalisation layers,
    so the output at a pixel depends only on the input within ``receptive_field``.

    Raises
    ------
    InputError
        Unknown name, unknown argument (the message lists the allowed ones) or a bad value.
    """
    entry = model_entry(name)
    resolved, _ = _checked_arguments(name, kwargs)
    network = entry.constructor(**resolved)
    network.architecture = name
    network.architecture_kwargs = {k: _plain(val) for k, val in resolved.items()}
    return network


def weight_shapes(name: str, **kwargs) -> dict:
    """Name and shape of every tensor in the state dict of ``create_model(name, **kwargs)``.

    Nothing is allocated: the network is laid out on torch's ``meta`` device, after the
    same checks as :func:`create_model`.

    Returns
    -------
    dict
        ``{tensor name: tuple of ints}``.

    Raises
    ------
    InputError
        As :func:`create_model`.
    """
    return dict(_checked_arguments(name, kwargs)[1])


def _checked_arguments(name, kwargs) -> dict:
    """Resolved arguments of variant ``name`` (checked against the ceilings) and its tensor shapes."""
    allowed = model_defaults(name)
    unknown = sorted(set(kwargs) - set(allowed))
    if unknown:
        raise InputError(
            f"model {name!r} has no argument {unknown[0]!r}; allowed: {', '.join(sorted(allowed))}"
        )
    for key, value in kwargs.items():
        _check_limit(key, value, ARGUMENT_LIMITS.get(key, MAX_ARGUMENT))
    resolved = {**allowed, **kwargs}
    return resolved, _meta_shapes(name, resolved)


def _check_limit(key, value, ceiling, nested=0):
    if isinstance(value, (list, tuple)):
        if nested or len(value) > MAX_LIST_LENGTH:
            what = "nested lists" if nested else f"{len(value)} entries"
            raise InputError(f"model argument {key} has {what}; at most {MAX_LIST_LENGTH} numbers are allowed")
        for item in value:
            _check_limit(key, item, ceiling, nested + 1)
    elif isinstance(value, (int, float)) and not isinstance(value, bool):
        if not value <= ceiling:  # NaN fails too
            raise InputError(f"model argument {key} = {value!r} exceeds the limit of {ceiling}")
    elif isinstance(value, str) and len(value) > 100:
        raise InputError(f"model argument {key} is a {len(value)}-character text; at most 100 are allowed")
    elif isinstance(value, dict):
        raise InputError(f"model argument {key} must not be a mapping")


@functools.lru_cache(maxsize=1)
def _shapes_only_mode():
    """The torch function mode of :func:`_meta_shapes` (defined on first use: it needs torch)."""
    import torch
    from torch.overrides import TorchFunctionMode

    class ShapesOnly(TorchFunctionMode):
        """Skip in-place operations on meta tensors (weight initialisation): there is nothing to
        compute, and torch's first meta random-number call costs about a second of set-up."""

        def __torch_function__(self, func, types, args=(), kwargs=None):
            name = getattr(func, "__name__", "")
            if (name.endswith("_") and not name.endswith("__") and args
                    and isinstance(args[0], torch.Tensor) and args[0].is_meta):
                return args[0]
            return func(*args, **(kwargs or {}))

    return ShapesOnly


def _meta_shapes(name, resolved):
    """Build variant ``name`` on the meta device, check its size; list of (tensor name, shape)."""
    import torch

    with torch.device("meta"), _shapes_only_mode()():
        network = model_entry(name).constructor(**resolved)
    count = sum(p.numel() for p in network.parameters())
    if count > MAX_PARAMETERS:
        raise InputError(
            f"model {name!r} with these arguments has {count:,} parameters; at most {MAX_PARAMETERS:,} are allowed"
        )
    rf = getattr(network, "receptive_field", None)
    if isinstance(rf, int) and rf > MAX_RECEPTIVE_FIELD:
        raise InputError(
            f"model {name!r} with these arguments has a receptive field of {rf} pixels; "
            f"at most {MAX_RECEPTIVE_FIELD} are allowed"
        )
    multiple = getattr(network, "size_multiple", 1)
    if isinstance(multiple, int) and multiple > MAX_SIZE_MULTIPLE:
        raise InputError(
            f"model {name!r} with these arguments pools to a grid of {multiple} pixels; "
            f"at most {MAX_SIZE_MULTIPLE} are allowed"
        )
    return [(k, tuple(t.shape)) for k, t in network.state_dict().items()]


def _plain(value):
    # Tuples become lists so the arguments survive a JSON round trip unchanged in meaning.
    if isinstance(value, tuple):
        return [_plain(v) for v in value]
    return value


def check_int(name: str, value, minimum: int = 1) -> int:
    """Return ``value`` as an int, or raise :class:`InputError` naming the argument."""
    if isinstance(value, bool) or not isinstance(value, (int,)) and not (
        isinstance(value, float) and value.is_integer()
    ):
        raise InputError(f"model argument {name} must be an integer >= {minimum}, got {value!r}")
    value = int(value)
    if value < minimum:
        raise InputError(f"model argument {name} must be an integer >= {minimum}, got {value!r}")
    return value
