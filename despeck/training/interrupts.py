"""SIGINT and SIGTERM during training: a clean stop with a message that says how to go on.

:func:`stop_on_signals` wraps :func:`despeck.training.trainer.train`: either signal
interrupts whatever runs (checkpoints are written atomically, so none is left
half-written) and becomes :class:`~despeck.training.outcome.TrainingInterrupted`, whose
``signum`` is the signal (the command's exit status is
:func:`despeck.cli.exit_codes.for_signal`) and whose message names the last checkpoint
(:func:`interruption`) and how to continue from it with ``--resume``.
"""

from __future__ import annotations

import functools
import signal
import threading
from pathlib import Path

from ..errors import ModelFileError
from .outcome import TrainingInterrupted
from .run_folder import read_checkpoint

__all__ = ["stop_on_signals", "interruption"]


def stop_on_signals(fn):
    """Run ``train`` with SIGINT and SIGTERM turned into :class:`TrainingInterrupted`.

    The signal interrupts whatever runs (checkpoints are written atomically, so none is
    left half-written); the message names the last checkpoint and how to continue.
    """

    class _Signalled(BaseException):  # not an Exception: nothing on the way catches it
        pass

    @functools.wraps(fn)
    def wrapper(config, *args, **kwargs):
        if threading.current_thread() is not threading.main_thread():
            return fn(config, *args, **kwargs)  # handlers can only be installed in the main thread
        fired = []

        def handler(signum, frame):  # noqa: ARG001
            if fired:
                return  # already stopping: let the clean-up finish
            fired.append(signum)
            raise _Signalled(signum)

        previous = {s: signal.signal(s, handler) for s in (signal.SIGINT, signal.SIGTERM)}
        try:
            return fn(config, *args, **kwargs)
        except _Signalled as exc:
            signum = exc.args[0]
        except Exception:
            if not fired:
                raise
            # A clean-up on the way out failed because the signal cut its set-up short
            # (Lightning's data fetcher, torn down before it was started): still the signal.
            signum = fired[0]
        finally:
            for s, h in previous.items():
                signal.signal(s, h)
        raise interruption(signum, Path(config.output.dir).expanduser()) from None

    return wrapper


def interruption(signum, out: Path) -> TrainingInterrupted:
    """The error for signal ``signum`` stopping the run in ``out``, naming its last checkpoint if any."""
    name = signal.Signals(signum).name
    last = out / "checkpoints" / "last.ckpt"
    if not last.is_file():
        return TrainingInterrupted(
            f"training interrupted by {name} before the first checkpoint; nothing was kept in {out}; "
            "run the same command with --resume to start it afresh", signum=signum)
    try:
        ckpt = read_checkpoint(last)
        when = f" (epoch {int(ckpt['epoch']) + 1}, step {int(ckpt['global_step'])})"
    except (ModelFileError, KeyError, TypeError, ValueError):
        when = ""
    return TrainingInterrupted(
        f"training interrupted by {name}; the last checkpoint is {last}{when}; "
        "run the same command with --resume to continue from it", signum=signum, checkpoint=last)
