"""Exceptions raised by despeck.

One root, :class:`DespeckError`, so scripts can catch everything the package
raises on purpose. Each specific error also subclasses the matching built-in
(``ValueError`` for bad values, ``OSError`` for files) so ordinary ``except``
clauses keep working. Messages are one line: what was expected, what was
received, and, where possible, how to fix it. The command line prints them as
``despeck: error: <message>`` and exits with status 1, or 2 for an
:class:`OptionError` (the exit statuses are in :mod:`despeck.cli.exit_codes`).
"""

from __future__ import annotations

__all__ = [
    "DespeckError",
    "InputError",
    "OptionError",
    "RasterError",
    "ConfigError",
    "ModelFileError",
    "MissingDependencyError",
]


class DespeckError(Exception):
    """Root of every error despeck raises on purpose."""


class InputError(DespeckError, ValueError):
    """A value given to a function or an option is out of range or inconsistent."""


class OptionError(InputError):
    """A command-line option's value is refused before any input file is read (a usage error)."""


class RasterError(DespeckError, OSError):
    """A raster file is missing, unreadable, empty, or cannot be written."""


class ConfigError(DespeckError, ValueError):
    """A training or benchmark configuration has an unknown key or a bad value."""


class ModelFileError(DespeckError, OSError):
    """A model file or checkpoint is missing, corrupt, foreign or from a newer format."""


class MissingDependencyError(DespeckError, ImportError):
    """An optional package that a chosen method needs is not installed (the message says what to install)."""
