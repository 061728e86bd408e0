"""The ``despeck`` command: a thin layer that parses options and calls the package.

Each subcommand lives in its own module of this package and defines
``add_arguments(parser)`` and ``run(args) -> int``. Errors the package raises on
purpose (:class:`despeck.errors.DespeckError`) are printed as one line,
``despeck: error: ...``; nothing else is caught. The exit statuses (0 success, 1
input or processing error, 2 usage error, 3 partial batch, 130 SIGINT, 143 SIGTERM)
live in :mod:`despeck.cli.exit_codes` and are printed by every ``--help``. Warnings
are shown as one line each, ``despeck: warning: ...``, once per message, by
:func:`one_line_warnings` (commands raise them with :func:`warnings.warn` and never
print them themselves); library noise a user cannot act on (GDAL's note that a file
is not georeferenced, numpy's "All-NaN slice") is not shown. ``-v``/``--verbose``
(before or after the command) shows the package's :mod:`logging` messages at INFO,
``-vv`` at DEBUG, as ``despeck: <message>`` lines on standard error.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import logging
import sys
import warnings

from ..errors import DespeckError, OptionError
from .exit_codes import EPILOG, USAGE, status_of

log = logging.getLogger(__name__)

#: How ``-v`` shows the package's log messages (one line each, like errors and warnings).
LOG_FORMAT = "despeck: %(message)s"

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
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"despeck {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="say what is being done (looks, threads, tiles, outputs) on standard error; "
                             "-vv for more detail")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    parser.command_parsers = {}  # name -> its sub-parser, for main() to add the chosen command's options
    for name, (module_name, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text, epilog=EPILOG,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        # also accepted after the command; added to the top-level count
        parser.command_parsers[name] = p
        p.add_argument("-v", "--verbose", dest="verbose_after", action="count", default=0,
                       help="as despeck -v: say what is being done; -vv for more detail")
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
def one_line_warnings(stream=None, *, key=None):
    """Show warnings raised inside as ``despeck: warning: ...`` lines, each text once.

    Installed by :func:`main` around every command; the one way despeck shows a
    warning (commands call :func:`warnings.warn`). Library warnings a user cannot
    act on (see ``_SILENCED``) and rasterio's ``NotGeoreferencedWarning`` are dropped;
    every other warning, despeck's own and third-party ones, is shown without a
    source line or traceback. ``key(text, category)``, if given, says which warnings
    count as the same (e.g. one note about many files, compared without its path);
    by default two warnings are the same when their lines are.
    """
    shown = set()

    def show(message, category, filename, lineno, file=None, line=None):  # noqa: ARG001
        text = format_warning(message)
        seen = text if key is None else key(str(message), category)
        if seen not in shown:
            shown.add(seen)
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


def check_threads(threads, option: str = "--threads") -> None:
    """Refuse (:class:`OptionError`) a number of threads below 1; None (every core) passes."""
    if threads is not None and threads < 1:
        raise OptionError(f"{option} must be at least 1, got {threads}")


@contextlib.contextmanager
def verbose_logging(verbosity: int, stream=None):
    """Inside, the package's log messages go to ``stream`` (standard error) as ``despeck: <message>``.

    ``verbosity`` 0 shows none (the library's default: a ``NullHandler``), 1 INFO, 2 and
    more DEBUG. Only the ``despeck`` loggers are affected; the handler is removed on exit.
    """
    if verbosity <= 0:
        yield
        return
    logger = logging.getLogger("despeck")
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(logging.Formatter(LOG_FORMAT))
    old_level = logger.level
    logger.addHandler(handler)
    logger.setLevel(logging.INFO if verbosity == 1 else logging.DEBUG)
    try:
        yield
    finally:
        logger.removeHandler(handler)
        logger.setLevel(old_level)


def main(argv=None) -> int:
    """Run ``despeck ARGV``; returns the exit status (:mod:`despeck.cli.exit_codes`).

    Usage errors found by :mod:`argparse` end with its own message and ``SystemExit(2)``.
    """
    argv = list(sys.argv[1:] if argv is None else argv)
    # Build only the chosen subcommand's options (cheap imports), but all of them for --help.
    chosen = next((a for a in argv if a in COMMANDS), None)
    if chosen is None:
        parser = build_parser(load_all=False)
        parser.parse_args(argv)  # --help and --version end here; a bad option is a usage error
        parser.print_help(sys.stderr)
        print("despeck: error: no command given; choose one of " + ", ".join(COMMANDS), file=sys.stderr)
        return USAGE
    parser = build_parser(load_all=False)
    module = importlib.import_module(f"{__name__}.{COMMANDS[chosen][0]}")
    sub_parser = parser.command_parsers[chosen]
    module.add_arguments(sub_parser)
    args = parser.parse_args(argv)
    verbosity = args.verbose + getattr(args, "verbose_after", 0)
    try:
        with verbose_logging(verbosity), one_line_warnings():
            log.debug("options: %s", {k: v for k, v in vars(args).items() if not k.startswith("_")})
            return int(module.run(args) or 0)
    except DespeckError as exc:
        print(f"despeck: error: {exc}", file=sys.stderr)
        return status_of(exc)
    except KeyboardInterrupt as exc:
        print("despeck: interrupted; nothing was written at the destination", file=sys.stderr)
        return status_of(exc)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
