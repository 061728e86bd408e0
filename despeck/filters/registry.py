"""The filter registry: one entry per filter, recorded by the :func:`register_filter` decorator.

Each entry holds the filter function, its method options (the keyword-only
parameters beyond ``intensity, looks, window, mask, workers``, with their defaults,
read from the function's signature), its default window, the first line of its
docstring, its strip plan (for the halo-blocked engine; None for filters that take
whole images in memory) and a check that it can run (an optional package).
:data:`FILTERS` and :data:`DEFAULT_WINDOWS` are read-only views of the entries by
name, in the order the filters were registered.

Default windows are common practice for single- to few-look data; refined Lee's 7
and the sigma filter's 9 follow the papers (from memory).
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Callable, Optional

from ..errors import InputError

__all__ = [
    "COMMON_PARAMETERS",
    "FilterEntry",
    "register_filter",
    "filter_entry",
    "get_filter",
    "filter_options",
    "check_options",
    "FILTERS",
    "DEFAULT_WINDOWS",
]

#: Parameters every filter takes; its other keyword-only parameters are its options.
COMMON_PARAMETERS = ("intensity", "looks", "window", "mask", "workers")


@dataclass(frozen=True)
class FilterEntry:
    """What the registry knows of one filter.

    Attributes
    ----------
    name : str
        Registered name (lower case, e.g. ``'enhanced-lee'``).
    function : callable
        ``f(intensity, *, looks, window=None, mask=None, workers=None, **options)``.
    default_window : int
        Window used when none is given (pixels).
    options : dict
        Method options and their defaults.
    description : str
        First line of the function's docstring.
    plan : callable or None
        ``plan(looks, window, **options) -> despeck.filters.engine.Plan``, for filtering
        strip by strip; None when the filter needs the whole image in memory.
    require : callable or None
        Raises :class:`despeck.errors.MissingDependencyError` when the filter cannot
        run here (an optional package is missing).
    """

    name: str
    function: Callable
    default_window: int
    options: dict
    description: str = ""
    plan: Optional[Callable] = None
    require: Optional[Callable] = None

    def window(self, window=None):
        """``window``, or this filter's default window when it is None."""
        return self.default_window if window is None else window


_ENTRIES: dict = {}


def register_filter(name, *, default_window, plan=None, require=None):
    """Decorator recording a filter function in the registry under ``name``.

    Parameters
    ----------
    name : str
        Registered name.
    default_window : int
        Window used when none is given.
    plan : callable, optional
        Strip plan of the filter (see :class:`FilterEntry`).
    require : callable, optional
        Check that the filter can run here (see :class:`FilterEntry`).

    Returns
    -------
    callable
        The decorator; it returns the function unchanged.
    """
    key = str(name).strip().lower()

    def register(function):
        if key in _ENTRIES:
            raise ValueError(f"filter {key!r} is registered twice")
        options = {
            p.name: p.default
            for p in inspect.signature(function).parameters.values()
            if p.kind is inspect.Parameter.KEYWORD_ONLY and p.name not in COMMON_PARAMETERS
        }
        doc = inspect.getdoc(function) or ""
        _ENTRIES[key] = FilterEntry(key, function, int(default_window), options,
                                    doc.splitlines()[0] if doc else "", plan, require)
        return function

    return register


def filter_entry(name) -> FilterEntry:
    """The entry registered as ``name``; :class:`InputError` listing the valid names otherwise."""
    key = str(name).strip().lower()
    if key not in _ENTRIES:
        raise InputError(f"unknown filter {name!r}; choose one of {', '.join(_ENTRIES)}")
    return _ENTRIES[key]


def get_filter(name):
    """The filter function registered as ``name``; :class:`InputError` listing the valid names otherwise."""
    return filter_entry(name).function


def filter_options(name) -> dict:
    """Method-specific options of filter ``name`` and their defaults (beyond looks, window, mask, workers)."""
    return dict(filter_entry(name).options)


def check_options(name, options) -> None:
    """Raise :class:`InputError` naming the first of ``options`` that filter ``name`` does not have."""
    allowed = filter_options(name)
    unknown = sorted(set(options) - set(allowed))
    if unknown:
        hint = ", ".join(allowed) if allowed else "none"
        raise InputError(f"filter {name!r} has no option {unknown[0]!r}; its options are: {hint}")


class _EntryView(Mapping):
    """A read-only view of one attribute of every entry, by name, in registration order."""

    def __init__(self, attribute):
        self._attribute = attribute

    def __getitem__(self, name):
        return getattr(_ENTRIES[name], self._attribute)

    def __iter__(self):
        return iter(_ENTRIES)

    def __len__(self):
        return len(_ENTRIES)

    def __repr__(self):
        return repr(dict(self))


#: Filter functions by name (a view of the registry).
FILTERS = _EntryView("function")

#: Default windows by name (a view of the registry).
DEFAULT_WINDOWS = _EntryView("default_window")
