"""The exit statuses of the ``despeck`` command, in one place.

Every subcommand and :func:`despeck.cli.main` return these names, never bare numbers;
``despeck --help`` and every subcommand's ``--help`` print :data:`EPILOG`.

=====  =====================================================================
0      success: every output is complete and readable
1      an input, model file, configuration or the data was refused, or
       processing or writing failed (one ``despeck: error:`` line)
2      usage error: unknown command or option, missing argument, no command,
       or an option value refused before any input file is read
       (:class:`despeck.errors.OptionError`)
3      partial batch: ``apply`` with several inputs wrote (or found) some
       outputs while others failed or were not attempted
130    interrupted by SIGINT (Ctrl-C)
143    terminated by SIGTERM (``train``, ``apply``, ``simulate``)
=====  =====================================================================

130 and 143 are the shell's 128 + signal number (common practice); 2 is what
:mod:`argparse` uses for its own usage errors.
"""

from __future__ import annotations

import contextlib

from ..errors import DespeckError, InputError, OptionError

__all__ = [
    "OK", "FAILED", "USAGE", "PARTIAL", "INTERRUPTED", "TERMINATED",
    "EPILOG", "Terminated", "raise_terminated", "for_signal", "status_of", "option_values", "batch_status",
]

OK = 0
FAILED = 1
USAGE = 2
PARTIAL = 3
INTERRUPTED = 130  # 128 + SIGINT (2)
TERMINATED = 143   # 128 + SIGTERM (15)

EPILOG = f"""exit status:
  {OK:<4} success: every output is complete and readable
  {FAILED:<4} error in an input, model file, configuration or the data, or a
       failed write (one line 'despeck: error: ...')
  {USAGE:<4} usage error: unknown command or option, missing argument, no
       command, or an option value refused before any input is read
  {PARTIAL:<4} partial batch (apply with several inputs): some outputs are
       complete, others failed or were not attempted
  {INTERRUPTED:<4} interrupted by SIGINT (Ctrl-C)
  {TERMINATED:<4} terminated by SIGTERM (train, apply, simulate)"""


def for_signal(signum: int) -> int:
    """The exit status of a command stopped by ``signum``: SIGINT -> 130, SIGTERM -> 143."""
    import signal

    statuses = {signal.SIGINT: INTERRUPTED, signal.SIGTERM: TERMINATED}
    if signum not in statuses:
        raise ValueError(f"no exit status for signal {signum}")
    return statuses[signum]


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised where the command runs so writers remove their temporary files."""


def raise_terminated(signum, frame):  # noqa: ARG001 - a signal handler's signature
    """``signal.signal(signal.SIGTERM, raise_terminated)``: SIGTERM becomes :class:`Terminated`."""
    raise Terminated


def status_of(exc: BaseException) -> int:
    """The exit status for an exception that ends a command (see the module docstring)."""
    if isinstance(exc, Terminated):
        return TERMINATED
    if isinstance(exc, KeyboardInterrupt):
        return INTERRUPTED
    if isinstance(exc, OptionError):
        return USAGE
    if isinstance(exc, DespeckError):
        return FAILED
    raise TypeError(f"no exit status for {type(exc).__name__}")


@contextlib.contextmanager
def option_values():
    """Inside, an :class:`InputError` is a refused option value: it leaves as an :class:`OptionError`.

    For checks of option values made before any input file is read (the message,
    which names the option, is kept).
    """
    try:
        yield
    except OptionError:
        raise
    except InputError as exc:
        raise OptionError(str(exc)) from None


def batch_status(*, complete: int, incomplete: int) -> int:
    """Exit status of a batch: :data:`OK` when nothing is missing, :data:`PARTIAL` when some outputs
    are complete (written or already there) and some failed or were not attempted, else :data:`FAILED`."""
    if incomplete == 0:
        return OK
    return PARTIAL if complete > 0 else FAILED
