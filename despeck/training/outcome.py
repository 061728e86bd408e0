"""What a training run ends with: its result, or the error or warning that says why not.

:func:`despeck.training.trainer.train` returns a :class:`TrainResult`; a signal stops it
with :class:`TrainingInterrupted`, a loss or weights gone non-finite with
:class:`TrainingDiverged`; :class:`TrainingWarning` tells the user something that does
not stop the run. :mod:`despeck.training.trainer` re-exports every name.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from ..errors import ConfigError, DespeckError

__all__ = ["TrainResult", "TrainingInterrupted", "TrainingDiverged", "TrainingWarning"]


class TrainingInterrupted(DespeckError):
    """Training was stopped by a signal (SIGINT: Ctrl-C, or SIGTERM: a scheduler or ``kill``).

    Attributes
    ----------
    signum : int
        The signal.
    checkpoint : Path or None
        The last checkpoint, from which ``resume=True`` continues (None if there is none).
    """

    def __init__(self, message, *, signum, checkpoint=None):
        super().__init__(message)
        self.signum = int(signum)
        self.checkpoint = checkpoint


class TrainingDiverged(ConfigError):
    """The training loss or the weights became NaN or infinite (usually: the learning rate is too high)."""


class TrainingWarning(UserWarning):
    """Something the user should know about a training run that does not stop it."""


@dataclass
class TrainResult:
    """What a finished run produced."""

    output_dir: Path
    model_path: Path
    config_path: Path
    metrics_path: Path
    best_checkpoint: Path
    best_metrics: dict = field(default_factory=dict)
    epochs: int = 0
    steps: int = 0
    stopped_by: str = ""
    #: global rank of this process (0 unless trained by several processes; only 0 writes files)
    rank: int = 0
