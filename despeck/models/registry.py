"""The model registry: named network variants and the ``create_model`` factory.

Each architecture family lives in its own module and registers its size variants
here under names that encode the size (``logcnn-s``, ``unet-m``). A variant is a
class plus default keyword arguments; :func:`create_model` merges the caller's
overrides into those defaults, builds the network and records the name and the
fully resolved arguments on it (``network.architecture``,
``network.architecture_kwargs``) so the model file can rebuild it exactly without
executing anything stored in the file.
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass, field

from ..errors import InputError

__all__ = ["register_model", "create_model", "list_models", "model_defaults", "model_description"]


@dataclass(frozen=True)
class _Variant:
    cls: type
    defaults: dict = field(default_factory=dict)
    description: str = ""


_REGISTRY: dict[str, _Variant] = {}


def register_model(name: str, cls: type, *, description: str = "", **defaults) -> None:
    """Register a network variant ``name`` built as ``cls(**defaults, **overrides)``.

    Parameters
    ----------
    name : str
        Registry name; encodes the family and the size, e.g. ``"logcnn-s"``.
    cls : type
        An ``nn.Module`` subclass whose constructor takes keyword arguments only and
        that exposes an odd integer ``receptive_field``.
    description : str
        One line shown by :func:`model_description`.
    **defaults
        Constructor arguments of this variant.
    """
    if name in _REGISTRY:
        raise InputError(f"model name {name!r} is already registered")
    _REGISTRY[name] = _Variant(cls, dict(defaults), description)


def list_models() -> list[str]:
    """Sorted names of every registered network variant."""
    return sorted(_REGISTRY)


def _variant(name) -> _Variant:
    try:
        return _REGISTRY[name]
    except (KeyError, TypeError):
        raise InputError(
            f"unknown model {name!r}; choose one of: {', '.join(list_models())}"
        ) from None


def model_defaults(name: str) -> dict:
    """The constructor arguments variant ``name`` uses when none are overridden."""
    v = _variant(name)
    params = inspect.signature(v.cls.__init__).parameters
    resolved = {
        k: p.default for k, p in params.items()
        if k != "self" and p.default is not inspect.Parameter.empty
    }
    resolved.update(v.defaults)
    return resolved


def model_description(name: str) -> str:
    """One-line description of variant ``name``."""
    return _variant(name).description


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
    v = _variant(name)
    allowed = model_defaults(name)
    unknown = sorted(set(kwargs) - set(allowed))
    if unknown:
        raise InputError(
            f"model {name!r} has no argument {unknown[0]!r}; allowed: {', '.join(sorted(allowed))}"
        )
    resolved = {**allowed, **kwargs}
    network = v.cls(**resolved)
    network.architecture = name
    network.architecture_kwargs = {k: _plain(val) for k, val in resolved.items()}
    return network


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
