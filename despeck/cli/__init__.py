"""The ``despeck`` command: a thin layer that parses options and calls the package.

Each subcommand lives in its own module of this package and defines
``add_arguments(parser)`` and ``run(args) -> int``. Errors the package raises on
purpose (:class:`despeck.errors.DespeckError`) are printed as one line,
``despeck: error: ...``, with exit status 2; nothing else is caught. Warnings
are shown as one line each, ``despeck: warning: ...``, once per message; library
noise a user cannot act on (GDAL's note that a file is not georeferenced, numpy's
"All-NaN slice") is not shown.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import sys
import warnings

from ..errors import DespeckError

# name -> (module, one-line help). Modules are imported only when their command runs,
# so ``despeck info`` never pays for importing torch.
COMMANDS = {
    "simulate": ("simulate", "add simulated speckle to a clean reference raster"),
    "info": ("info", "describe a SAR raster: size, units, nodata, estimated looks"),
    "filter": ("filter", "run a classical speckle filter on a raster"),
    "train": ("train", "train a despeckling network from a YAML configuration"),
    "apply": ("apply", "despeckle scenes with a trained model, tile by tile"),
    "bench": ("bench", "compare filters and models and write a report"),
}


def build_parser(load_all: bool = True) -> argparse.ArgumentParser:
    from .. import __version__

    parser = argparse.ArgumentParser(
        prog="despeck",
        description="Speckle reduction for SAR imagery with small networks trained and run on a CPU.",
    )
    parser.add_argument("--version", action="version", version=f"despeck {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module_name, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        if load_all:
            module = importlib.import_module(f"{__name__}.{module_name}")
            module.add_arguments(p)
            p.set_defaults(_module=module)
    return parser


# Warnings that say nothing a user can act on: an ungeoreferenced input gives an
# ungeoreferenced output (``info`` prints "CRS none"); all-nodata slices are handled
# by the code that meets them.
_SILENCED = (
    ("ignore", r"Dataset has no geotransform, gcps, or rpcs"),
    ("ignore", r"All-NaN (slice|axis) encountered"),
    ("ignore", r"Mean of empty slice"),
)


def format_warning(message) -> str:
    """A warning as one line in the package's style: ``despeck: warning: <text>``."""
    text = " ".join(str(message).split())
    return f"despeck: warning: {text}"


@contextlib.contextmanager
def one_line_warnings(stream=None):
    """Show warnings raised inside as ``despeck: warning: ...`` lines, each text once.

    Installed by :func:`main` around every command. Library warnings a user cannot
    act on (see ``_SILENCED``) and rasterio's ``NotGeoreferencedWarning`` are dropped;
    every other warning, despeck's own and third-party ones, is shown without a
    source line or traceback.
    """
    shown = set()

    def show(message, category, filename, lineno, file=None, line=None):  # noqa: ARG001
        text = format_warning(message)
        if text not in shown:
            shown.add(text)
            print(text, file=stream or sys.stderr)

    with warnings.catch_warnings():
        warnings.simplefilter("default")
        silence_library_noise()
        warnings.showwarning = show
        yield


def silence_library_noise() -> None:
    """Add the filters that hide library warnings a user cannot act on (see ``_SILENCED``).

    For commands that reset the warning filters inside :func:`one_line_warnings`
    (e.g. ``warnings.simplefilter("always")`` to see every file's note): call it
    after the reset.
    """
    for action, pattern in _SILENCED:
        warnings.filterwarnings(action, message=pattern)
    try:
        from rasterio.errors import NotGeoreferencedWarning
    except ImportError:  # pragma: no cover - rasterio is a dependency
        pass
    else:
        warnings.filterwarnings("ignore", category=NotGeoreferencedWarning)
    warnings.filterwarnings("ignore", category=DeprecationWarning)
    warnings.filterwarnings("ignore", category=PendingDeprecationWarning)
    # Python hides these by default; "default" above would show them. A file object
    # dropped while a signal unwinds a write (closed by the garbage collector) is not
    # something a user can act on.
    warnings.filterwarnings("ignore", category=ResourceWarning)


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    # Build only the chosen subcommand's options (cheap imports), but all of them for --help.
    chosen = next((a for a in argv if a in COMMANDS), None)
    if chosen is None:
        parser = build_parser(load_all=False)
        args = parser.parse_args(argv)
        parser.print_help()
        return 0 if not argv else 2
    parser = build_parser(load_all=False)
    module = importlib.import_module(f"{__name__}.{COMMANDS[chosen][0]}")
    sub_parser = parser._subparsers._group_actions[0].choices[chosen]  # noqa: SLF001
    module.add_arguments(sub_parser)
    args = parser.parse_args(argv)
    try:
        with one_line_warnings():
            return int(module.run(args) or 0)
    except DespeckError as exc:
        print(f"despeck: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("despeck: interrupted; nothing was written at the destination", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
