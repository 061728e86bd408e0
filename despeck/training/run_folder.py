"""The run folder: safe writes, the output-folder check, checkpoints, the metrics log.

A run writes ``config.yaml``, ``metrics.csv``, ``checkpoints/last.ckpt`` and
``checkpoints/best.ckpt`` and the model file into ``output.dir``. Every file goes
through a temporary file beside it that is synced and size-checked before it is renamed
into place (:func:`write_bytes_atomically`), so a full disk or a kill never leaves a
half-written file; a write error is one line naming the file. Resuming reads the last
checkpoint (:func:`read_checkpoint`, plain data only), refuses settings that would make
the result differ from an uninterrupted run (:func:`check_same_run`) and keeps the
metrics rows logged up to that checkpoint (:func:`metrics_rows_until`).
"""

from __future__ import annotations

import csv
import io
import os
import tempfile
import warnings
from pathlib import Path

import lightning.pytorch as pl
import torch
import yaml

from ..atomic import publish, sibling_temp, write_problem
from ..errors import ConfigError, DespeckError, ModelFileError
from .config import TrainConfig, config_from_dict, config_to_dict, read_yaml
from .outcome import TrainingWarning

__all__ = ["write_bytes_atomically", "write_text_atomically", "prepare_output", "read_checkpoint",
           "RESUMABLE_CHANGES", "check_same_run", "metrics_rows_until", "MetricsLogger", "AtomicCheckpointIO"]


def write_bytes_atomically(path: Path, data, error=ConfigError, what="file") -> None:
    """Write ``data`` to ``path`` through a synced, size-checked temporary file; one-line ``error`` on failure."""
    path = Path(path)
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = sibling_temp(path)
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
        size = os.path.getsize(tmp)
        if size != len(data):
            raise OSError(f"only {size} of {len(data)} bytes were written")
        publish(tmp, path)  # fsync, then rename
    except OSError as exc:
        problem = write_problem(path.parent, exc, tmp)
        reason = problem.text if problem else (exc.strerror or str(exc))
        raise error(f"cannot write {what} {path}: {reason}") from None
    finally:
        if tmp is not None:
            tmp.unlink(missing_ok=True)


def write_text_atomically(path: Path, text: str) -> None:
    write_bytes_atomically(path, text.encode("utf-8"), ConfigError, "training output")


def prepare_output(config: TrainConfig, resume: bool, rank: int = 0):
    """The output folder, checked writable, and whether there is a checkpoint to resume from.

    The processes other than 0 of a distributed run write nothing and only follow
    process 0's decision (which they reach from the same files).
    """
    out = Path(config.output.dir).expanduser()
    if rank != 0:
        return out, resume and (out / "checkpoints" / "last.ckpt").is_file()
    try:
        out.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(prefix=".write-test.", dir=out)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise ConfigError(f"config key output.dir: cannot write to {out} ({exc.strerror or exc})") from None
    last = out / "checkpoints" / "last.ckpt"
    if resume and not last.is_file():
        # Killed before its first checkpoint (or never started): there is nothing to
        # continue, and nothing of value to keep -- start the run afresh.
        started = (out / "metrics.csv").exists() or (out / "config.yaml").exists()
        warnings.warn(
            f"nothing to resume in {out}: "
            + ("the run stopped before its first checkpoint" if started else "no run was started there")
            + "; starting afresh", TrainingWarning, stacklevel=3)
        return out, False
    if not resume and last.exists():
        raise ConfigError(
            f"config key output.dir: {out} already holds a training run; pass --resume to continue it "
            "or choose another output.dir"
        )
    if not resume and (out / "metrics.csv").exists():
        raise ConfigError(
            f"config key output.dir: {out} holds a training run stopped before its first checkpoint; "
            "pass --resume to start it afresh or choose another output.dir"
        )
    return out, resume


def read_checkpoint(path) -> dict:
    """Load a despeck training checkpoint as plain data (``weights_only``: no code runs).

    Raises
    ------
    ModelFileError
        Missing, corrupt, foreign or newer-format checkpoint.
    """
    from .module import CHECKPOINT_FORMAT, CHECKPOINT_VERSION

    path = Path(path)
    if not path.is_file():
        raise ModelFileError(f"checkpoint {path} does not exist")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # notes about pickle protocols of foreign files
            ckpt = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # torch raises many types for corrupt or pickle-bearing files
        first = (str(exc).splitlines() or [type(exc).__name__])[0][:160]
        raise ModelFileError(f"checkpoint {path} is corrupt or not a plain despeck checkpoint ({first})") from None
    info = ckpt.get("despeck") if isinstance(ckpt, dict) else None
    if not isinstance(info, dict) or info.get("format") != CHECKPOINT_FORMAT:
        raise ModelFileError(f"checkpoint {path} was not written by despeck train")
    if int(info.get("format_version", 0)) > CHECKPOINT_VERSION:
        raise ModelFileError(
            f"checkpoint {path} uses format version {info.get('format_version')}, newer than this despeck reads "
            f"(up to {CHECKPOINT_VERSION}); upgrade despeck"
        )
    if "state_dict" not in ckpt:
        raise ModelFileError(f"checkpoint {path} holds no weights")
    return ckpt


# Settings a resumed run may change: they do not alter what is computed.
RESUMABLE_CHANGES = {"budget", "trainer.progress", "trainer.threads", "trainer.log_every_n_steps",
                     "trainer.processes_per_node", "trainer.nodes", "data.num_workers", "output"}


def _flatten(d, prefix=""):
    flat = {}
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict) and k not in ("kwargs",):
            flat.update(_flatten(v, key + "."))
        else:
            flat[key] = v
    return flat


def check_same_run(config: TrainConfig, saved_path: Path) -> None:
    """Refuse to resume with settings that would make the result differ from an uninterrupted run."""
    if not saved_path.is_file():
        return
    try:
        saved = config_to_dict(config_from_dict(read_yaml(saved_path.read_text(encoding="utf-8"))))
    except (ConfigError, yaml.YAMLError, OSError):
        raise ConfigError(f"cannot resume: the saved run configuration {saved_path} is unreadable") from None
    old, new = _flatten(saved), _flatten(config_to_dict(config))
    for key in sorted(set(old) | set(new)):
        if key in RESUMABLE_CHANGES or key.split(".")[0] in RESUMABLE_CHANGES:
            continue
        if old.get(key) != new.get(key):
            raise ConfigError(
                f"config key {key}: {new.get(key)!r} differs from {old.get(key)!r} in the run being resumed "
                f"({saved_path}); resume with the same settings or start a new output.dir"
            )


def metrics_rows_until(path: Path, step: int):
    """Header and rows of a metrics CSV logged at or before ``step`` (None if there is no file).

    Rows after the last checkpoint belong to work that a kill threw away; the resumed
    run logs those steps again.
    """
    if not path.is_file():
        return None
    with path.open(newline="") as f:
        rows = list(csv.reader(f))
    if not rows or "step" not in rows[0]:
        return None
    i = rows[0].index("step")
    return [rows[0]] + [r for r in rows[1:] if len(r) > i and (not r[i] or float(r[i]) <= step)]


class MetricsLogger(pl.loggers.Logger):
    """``metrics.csv``: one row per logging call, columns sorted by name (the layout of
    Lightning's CSVLogger). Every flush rewrites the whole file through a temporary file,
    so the file on disk is always complete; a resumed run starts from the rows of the run
    it continues (``previous_rows``: header and rows, as from :func:`metrics_rows_until`).
    """

    def __init__(self, path: Path, previous_rows=None, flush_every: int = 20, write: bool = True):
        super().__init__()
        self.path = Path(path)
        self.write = bool(write)  # False in the processes other than 0 of a distributed run
        self.flush_every = max(1, int(flush_every))
        self.rows = []
        if previous_rows:
            header = previous_rows[0]
            self.rows = [dict(zip(header, row)) for row in previous_rows[1:]]
        self._written = len(self.rows)

    @property
    def name(self):
        return ""

    @property
    def version(self):
        return ""

    @property
    def save_dir(self):
        return str(self.path.parent)

    @property
    def log_dir(self):
        return str(self.path.parent)

    def log_hyperparams(self, params, *args, **kwargs):
        pass  # the resolved config is saved as config.yaml

    def log_metrics(self, metrics, step=None):
        row = {k: (v.item() if isinstance(v, torch.Tensor) else v) for k, v in metrics.items()}
        row["step"] = len(self.rows) if step is None else step
        self.rows.append(row)
        if (row["step"] + 1) % self.flush_every == 0:
            self.save()

    def save(self):
        if not self.write or not self.rows or self._written == len(self.rows) and self.path.is_file():
            return
        keys = sorted(set().union(*self.rows))
        buf = io.StringIO()
        writer = csv.DictWriter(buf, fieldnames=keys, lineterminator="\n")
        writer.writeheader()
        writer.writerows(self.rows)
        write_bytes_atomically(self.path, buf.getvalue().encode("utf-8"), ConfigError, "training metrics")
        self._written = len(self.rows)

    def finalize(self, status):
        if status == "failed":
            try:  # keep what can be kept; the error that stopped training is the one to report
                self.save()
            except (DespeckError, OSError):
                pass
        else:
            self.save()


class AtomicCheckpointIO(pl.plugins.TorchCheckpointIO):
    """Lightning checkpoint writer that never leaves a half-written checkpoint.

    Lightning's own writer stages the file in the system temporary folder and moves it,
    which is neither atomic across file systems nor safe on a full disk; here the
    checkpoint is written beside its destination, synced, size-checked and renamed.
    """

    def save_checkpoint(self, checkpoint, path, storage_options=None):
        buf = io.BytesIO()
        torch.save(checkpoint, buf)
        write_bytes_atomically(Path(path), buf.getbuffer(), ModelFileError, "checkpoint")
