"""The time-budgeted CPU trainer: config in, checkpoints, metrics and a model file out.

:func:`train` checks everything that can be checked (config, output folder, training
rasters, checkpoint to resume from) before any training starts, sets up the CPU
(threads, flushed denormals, optional bf16), and runs Lightning with:

* a checkpoint after every epoch (``checkpoints/last.ckpt`` and ``checkpoints/best.ckpt``,
  the best by validation loss; Lightning's ``ModelCheckpoint``);
* a wall-time budget that stops at an epoch boundary when the next epoch would not fit
  (:class:`EpochTimeBudget`), so every checkpoint is an end-of-epoch one and resuming
  reproduces the uninterrupted run (the data of an epoch depend only on the seed and the
  epoch number; see :mod:`despeck.training.data`); the elapsed time is stored in the
  checkpoint, so a resumed run honours the original budget;
* optional early stopping, a tqdm progress bar, and a CSV log ``metrics.csv``;
* with ``trainer.processes_per_node`` x ``trainer.nodes`` > 1, Lightning's distributed
  data parallel over gloo (:func:`process_layout`): each process trains on its share of
  every global batch, validation measures are combined over the processes, and only
  process 0 writes files (config, metrics, checkpoints, the model).

Every file the trainer writes (checkpoints, ``metrics.csv``, ``config.yaml``, the model)
goes through a temporary file that is synced and size-checked before it is renamed into
place, so a full disk or a kill never leaves a half-written file; a write error stops
training with one line naming the file. SIGINT and SIGTERM stop training with
:class:`TrainingInterrupted` (its ``exit_code`` is 130 or 143), whose message names the
last checkpoint; ``resume=True`` continues from it, or starts afresh when the run was
stopped before its first checkpoint. A loss or weights that become NaN or infinite stop
training with :class:`TrainingDiverged` at the step where it happened.

At the end the best weights are exported with :func:`despeck.models.save_model_file`;
its ``training`` metadata says how the model was trained (``mode``: simulated speckle on
clean references, or ``pairs`` / ``sublooks`` of real data with their files and looks).
"""

from __future__ import annotations

import csv
import functools
import io
import logging
import math
import os
import signal
import tempfile
import threading
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import lightning.pytorch as pl
import torch

from ..atomic import publish, sibling_temp, write_problem
from ..cpu import bf16_supported, usable_cores  # re-exported: callers and tests know them here
from ..errors import ConfigError, DespeckError, InputError, ModelFileError
from .config import TrainConfig, config_to_dict, dump_config, parse_duration

__all__ = ["train", "TrainResult", "EpochTimeBudget", "bf16_supported", "usable_cores", "configure_cpu",
           "TrainingInterrupted", "TrainingDiverged", "TrainingWarning", "ProcessLayout", "process_layout"]


class TrainingInterrupted(DespeckError):
    """Training was stopped by a signal (SIGINT: Ctrl-C, or SIGTERM: a scheduler or ``kill``).

    Attributes
    ----------
    signum : int
        The signal.
    exit_code : int
        ``128 + signum`` (130 for SIGINT, 143 for SIGTERM), the shell convention.
    checkpoint : Path or None
        The last checkpoint, from which ``resume=True`` continues (None if there is none).
    """

    def __init__(self, message, *, signum, checkpoint=None):
        super().__init__(message)
        self.signum = int(signum)
        self.exit_code = 128 + self.signum
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


@dataclass(frozen=True)
class ProcessLayout:
    """Where this process stands in a distributed run, and its share of the CPU."""

    processes_per_node: int
    nodes: int
    rank: int
    threads: int

    @property
    def world(self) -> int:
        return self.processes_per_node * self.nodes


def process_layout(config: TrainConfig) -> ProcessLayout:
    """The global rank of this process and its torch threads, for ``trainer.processes_per_node`` x ``trainer.nodes``.

    The rank follows Lightning's DDP numbering, ``NODE_RANK * processes_per_node +
    LOCAL_RANK``, from the environment variables Lightning's launcher (or a cluster's)
    sets; the first process of a node has no ``LOCAL_RANK`` until it starts the others.
    Threads: ``trainer.threads``, else the usable cores divided by the processes of a
    node (at least 1); with several processes per node, a setting that puts more
    threads on a machine than it has usable cores is refused (processes competing for
    cores lose their time slices at every synchronisation).
    """
    t = config.trainer
    per_node, nodes = int(t.processes_per_node), int(t.nodes)
    cores = usable_cores()
    if per_node > 1 and per_node > cores:
        raise ConfigError(f"config key trainer.processes_per_node: {per_node} processes exceed the {cores} usable "
                          "cores of this machine")
    threads = int(t.threads) if t.threads else max(1, cores // per_node)
    if per_node > 1 and threads * per_node > cores:
        raise ConfigError(f"config key trainer.threads: {threads} threads x {per_node} processes "
                          f"(trainer.processes_per_node) exceed the {cores} usable cores; set trainer.threads "
                          f"to {max(1, cores // per_node)} or null")
    rank = 0
    if nodes > 1:
        missing = [k for k in ("MASTER_ADDR", "MASTER_PORT", "NODE_RANK") if not os.environ.get(k)]
        if missing:
            raise ConfigError(f"config key trainer.nodes: training on {nodes} machines needs the environment "
                              f"variables MASTER_ADDR, MASTER_PORT and NODE_RANK on each; {', '.join(missing)} "
                              "not set (see the README, 'Several processes or machines')")
    if per_node * nodes > 1:
        try:
            node = int(os.environ.get("NODE_RANK", os.environ.get("GROUP_RANK", 0)))
            local = int(os.environ.get("LOCAL_RANK", 0))
        except ValueError:
            raise ConfigError("environment variables NODE_RANK and LOCAL_RANK must be integers") from None
        if not 0 <= node < nodes:
            raise ConfigError(f"environment variable NODE_RANK={node} is outside 0..{nodes - 1} "
                              f"(trainer.nodes is {nodes})")
        rank = node * per_node + local
    return ProcessLayout(per_node, nodes, rank, threads)


def configure_cpu(threads=None) -> int:
    """Set torch's intra-op threads (default: all usable cores), one inter-op thread, flush denormals.

    Small convolutions run fastest with one intra-op thread per physical core and no
    competing pools; denormal numbers (tiny activations late in training) would otherwise
    slow x86 arithmetic by orders of magnitude. Returns the thread count used.
    """
    n = int(threads or usable_cores())
    torch.set_num_threads(n)
    try:
        torch.set_num_interop_threads(1)
    except RuntimeError:
        pass  # already fixed by earlier parallel work in this process; harmless
    torch.set_flush_denormal(True)
    return n


def _decided_by_first_process(trainer, decision: bool) -> bool:
    """Process 0's ``decision`` in every process of a distributed run (its own alone), so all stop at one step."""
    if getattr(trainer, "world_size", 1) > 1:
        return bool(trainer.strategy.broadcast(bool(decision)))
    return bool(decision)


class EpochTimeBudget(pl.Callback):
    """Lightning callback: stop at the epoch boundary before ``seconds`` of training would be exceeded.

    After every epoch it predicts the next epoch's duration as the longest one so far and
    stops if it would not fit. If a single epoch alone outlasts the budget, it stops
    mid-epoch at the budget (then the last checkpoint is a mid-epoch one). Its state --
    training time used so far -- is saved in checkpoints, so resuming continues the
    same budget.
    """

    def __init__(self, seconds: float):
        self.seconds = float(seconds)
        self.used_before = 0.0
        self.longest_epoch = 0.0
        self._start = None
        self._epoch_start = None
        self.stopped = False

    def elapsed(self) -> float:
        return self.used_before + (time.monotonic() - self._start if self._start is not None else 0.0)

    def on_train_start(self, trainer, pl_module):
        self._start = time.monotonic()

    def on_train_epoch_start(self, trainer, pl_module):
        self._epoch_start = time.monotonic()

    def on_train_batch_end(self, trainer, pl_module, outputs, batch, batch_idx):
        if _decided_by_first_process(trainer, self.elapsed() >= self.seconds):
            self.stopped = True
            trainer.should_stop = True

    def on_train_epoch_end(self, trainer, pl_module):
        if self._epoch_start is not None:
            self.longest_epoch = max(self.longest_epoch, time.monotonic() - self._epoch_start)
        if _decided_by_first_process(trainer, self.elapsed() + self.longest_epoch > self.seconds):
            self.stopped = True
            trainer.should_stop = True

    def state_dict(self):
        return {"used": self.elapsed(), "longest_epoch": self.longest_epoch}

    def load_state_dict(self, state):
        self.used_before = float(state.get("used", 0.0))
        self.longest_epoch = float(state.get("longest_epoch", 0.0))


def _atomic_write_bytes(path: Path, data, error=ConfigError, what="file") -> None:
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


def _atomic_write_text(path: Path, text: str) -> None:
    _atomic_write_bytes(path, text.encode("utf-8"), ConfigError, "training output")


def _prepare_output(config: TrainConfig, resume: bool, rank: int = 0):
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
_RESUMABLE_CHANGES = {"budget", "trainer.progress", "trainer.threads", "trainer.log_every_n_steps",
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


def _check_same_run(config: TrainConfig, saved_path: Path) -> None:
    """Refuse to resume with settings that would make the result differ from an uninterrupted run."""
    import yaml

    from .config import config_from_dict, read_yaml

    if not saved_path.is_file():
        return
    try:
        saved = config_to_dict(config_from_dict(read_yaml(saved_path.read_text(encoding="utf-8"))))
    except (ConfigError, yaml.YAMLError, OSError):
        raise ConfigError(f"cannot resume: the saved run configuration {saved_path} is unreadable") from None
    old, new = _flatten(saved), _flatten(config_to_dict(config))
    for key in sorted(set(old) | set(new)):
        if key in _RESUMABLE_CHANGES or key.split(".")[0] in _RESUMABLE_CHANGES:
            continue
        if old.get(key) != new.get(key):
            raise ConfigError(
                f"config key {key}: {new.get(key)!r} differs from {old.get(key)!r} in the run being resumed "
                f"({saved_path}); resume with the same settings or start a new output.dir"
            )


def _metrics_rows_until(path: Path, step: int):
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


class _MetricsLogger(pl.loggers.Logger):
    """``metrics.csv``: one row per logging call, columns sorted by name (the layout of
    Lightning's CSVLogger). Every flush rewrites the whole file through a temporary file,
    so the file on disk is always complete; a resumed run starts from the rows of the run
    it continues (``previous_rows``: header and rows, as from :func:`_metrics_rows_until`).
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
        _atomic_write_bytes(self.path, buf.getvalue().encode("utf-8"), ConfigError, "training metrics")
        self._written = len(self.rows)

    def finalize(self, status):
        if status == "failed":
            try:  # keep what can be kept; the error that stopped training is the one to report
                self.save()
            except (DespeckError, OSError):
                pass
        else:
            self.save()


class _AtomicCheckpointIO(pl.plugins.TorchCheckpointIO):
    """Lightning checkpoint writer that never leaves a half-written checkpoint.

    Lightning's own writer stages the file in the system temporary folder and moves it,
    which is neither atomic across file systems nor safe on a full disk; here the
    checkpoint is written beside its destination, synced, size-checked and renamed.
    """

    def save_checkpoint(self, checkpoint, path, storage_options=None):
        buf = io.BytesIO()
        torch.save(checkpoint, buf)
        _atomic_write_bytes(Path(path), buf.getbuffer(), ModelFileError, "checkpoint")


class _NoAdverts(logging.Filter):
    """Drop Lightning's "Tip: try installing ..." notes for other products from its log."""

    def filter(self, record):
        return not record.getMessage().lstrip().startswith("\N{ELECTRIC LIGHT BULB}")


class _DivergenceGuard(pl.Callback):
    """Stop at the first training step whose loss or updated weights are NaN or infinite."""

    def __init__(self, lr: float):
        self.lr = lr

    def on_train_batch_end(self, trainer, pl_module, outputs, batch, batch_idx):
        loss = outputs.get("loss") if isinstance(outputs, dict) else outputs
        what = None
        if isinstance(loss, torch.Tensor) and not bool(torch.isfinite(loss).all()):
            what = f"the loss became {float(loss.detach().float().reshape(-1)[0])}"
        elif any(not bool(torch.isfinite(p).all()) for p in pl_module.parameters()):
            what = "the weights became NaN or infinite"
        if trainer.world_size > 1 and trainer.strategy.reduce_boolean_decision(bool(what), all=False):
            what = what or "the loss became NaN or infinite in another process"  # every process stops together
        if what:
            raise TrainingDiverged(
                f"training diverged at epoch {trainer.current_epoch + 1}, step {trainer.global_step}: {what}; "
                f"lower optim.lr (now {self.lr:g}) or set optim.grad_clip (e.g. 1.0) and train into a new output.dir"
            )


def _stop_on_signals(fn):
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
        finally:
            for s, h in previous.items():
                signal.signal(s, h)
        raise _interrupted(signum, Path(config.output.dir).expanduser()) from None

    return wrapper


def _interrupted(signum, out: Path) -> TrainingInterrupted:
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


def _stop_started_processes(trainer) -> None:
    """Kill the processes Lightning started for this node's share of a distributed run (none alone)."""
    launcher = trainer.strategy.launcher
    if launcher is not None and getattr(launcher, "procs", None):
        launcher.kill(signal.SIGKILL)  # they write nothing: process 0 writes every file


def _wait_started_processes(trainer) -> None:
    """Wait until the processes Lightning started have finished their part of the run."""
    launcher = trainer.strategy.launcher
    for proc in getattr(launcher, "procs", None) or ():
        proc.wait()


def _init_from_model_file(network, source) -> None:
    """Copy the weights of model file ``source`` (a path or a bundled name) into ``network``.

    Fine-tuning starts from them; the file's network must be the same architecture with
    the same arguments (one-line ConfigError naming the key otherwise).
    """
    from ..models import load_model_file, resolve_model_path

    path = resolve_model_path(source)
    try:
        donor = load_model_file(path)
    except DespeckError as exc:
        raise ConfigError(f"config key model.init: {exc}") from None
    d_net = donor.network
    if (getattr(d_net, "architecture", None) != network.architecture
            or getattr(d_net, "architecture_kwargs", None) != network.architecture_kwargs):
        raise ConfigError(
            f"config key model.init: {path} holds a {getattr(d_net, 'architecture', '?')} network with "
            f"{getattr(d_net, 'architecture_kwargs', {})}, but model.name/model.kwargs ask for "
            f"{network.architecture} with {network.architecture_kwargs}; set model.name to match"
        )
    network.load_state_dict(d_net.state_dict())


@_stop_on_signals
def train(config: TrainConfig, *, resume: bool = False, progress=None, callbacks=()) -> TrainResult:
    """Train a despeckling network as ``config`` says and export the best model.

    Parameters
    ----------
    config : TrainConfig
        From :func:`despeck.training.load_config` (already checked).
    resume : bool
        Continue the run in ``output.dir`` from ``checkpoints/last.ckpt``; the result
        equals that of an uninterrupted run (within float tolerance), and the time budget
        counts the time already spent. Without a checkpoint (the run was stopped before
        its first one) the run starts afresh, with a :class:`TrainingWarning`.
    progress : bool, optional
        Show tqdm progress bars (default: ``trainer.progress`` of the config).
    callbacks : sequence of lightning.pytorch.Callback
        Extra callbacks (e.g. for monitoring).

    Returns
    -------
    TrainResult

    Raises
    ------
    ConfigError, RasterError, ModelFileError
        One-line errors about the inputs, all raised before training starts; during
        training, a file that cannot be written (ConfigError or ModelFileError naming it).
    TrainingDiverged
        The loss or the weights became NaN or infinite.
    TrainingInterrupted
        SIGINT or SIGTERM arrived.
    """
    from lightning.pytorch.callbacks import EarlyStopping, LearningRateMonitor, ModelCheckpoint, TQDMProgressBar
    from ..models import Despeckler, create_model, save_model_file
    from .data import TrainingData
    from .module import DespeckleModule

    progress = config.trainer.progress if progress is None else bool(progress)
    layout = process_layout(config)
    out, resume = _prepare_output(config, resume, layout.rank)
    ckpt_dir = out / "checkpoints"
    last = ckpt_dir / "last.ckpt"
    resume_ckpt = read_checkpoint(last) if resume else None
    if resume:
        _check_same_run(config, out / "config.yaml")

    if config.trainer.precision == "bf16" and not bf16_supported():
        raise ConfigError("config key trainer.precision: bf16 needs a CPU with native bfloat16 "
                          "(avx512_bf16 or amx_bf16); use precision: '32'")
    max_time = parse_duration(config.budget.max_time, "budget.max_time") if config.budget.max_time else None
    threads = configure_cpu(layout.threads)

    pl.seed_everything(config.trainer.seed, workers=True, verbose=False)
    try:
        network = create_model(config.model.name, **config.model.kwargs)
    except InputError as exc:
        raise ConfigError(f"config key model.kwargs: {exc}") from None
    if config.model.init and resume_ckpt is None:
        _init_from_model_file(network, config.model.init)
    if resume_ckpt is not None:
        info = resume_ckpt["despeck"]
        if info.get("architecture") != network.architecture or info.get("kwargs") != network.architecture_kwargs:
            raise ModelFileError(
                f"checkpoint {last} holds a {info.get('architecture')} network with {info.get('kwargs')}, "
                f"but the config asks for {network.architecture} with {network.architecture_kwargs}"
            )

    if config.data.self_supervised:
        from .pairs import PairTrainingData

        data = PairTrainingData(config)
        looks, mode = data.model_looks, data.mode
    else:
        data = TrainingData(config)
        looks, mode = config.speckle.looks, "simulated speckle on clean references"

    module = DespeckleModule(
        network, looks=looks, log_scale=config.model.log_scale, loss=config.loss,
        optim=config.optim, max_epochs=config.budget.max_epochs, validation=data.val_set,
    )
    checkpoint = ModelCheckpoint(
        dirpath=ckpt_dir, filename="best", monitor="val_loss", mode="min", save_top_k=1,
        save_last=True, enable_version_counter=False,
    )
    cbs = [checkpoint, LearningRateMonitor(logging_interval="epoch"), _DivergenceGuard(config.optim.lr)]
    budget = EpochTimeBudget(max_time) if max_time else None
    if budget is not None:
        cbs.append(budget)
    early = None
    if config.budget.early_stopping:
        early = EarlyStopping(monitor="val_loss", mode="min", patience=config.budget.early_stopping)
        cbs.append(early)
    if progress:
        cbs.append(TQDMProgressBar(refresh_rate=max(1, min(20, config.data.patches_per_epoch
                                                            // config.data.batch_size // 10 or 1))))
    cbs.extend(callbacks)

    config_path = out / "config.yaml"
    if layout.rank == 0:
        _atomic_write_text(config_path, dump_config(config))
    metrics_path = out / "metrics.csv"
    previous = _metrics_rows_until(metrics_path, int(resume_ckpt["global_step"])) if resume_ckpt else None

    lightning_log = logging.getLogger("lightning.pytorch")
    previous_level = lightning_log.level
    previous_deterministic = torch.are_deterministic_algorithms_enabled()
    if not progress:
        lightning_log.setLevel(logging.WARNING)  # quiet: no device notes or "fit stopped"
    no_adverts = _NoAdverts()
    notes_log = logging.getLogger("lightning.pytorch.utilities.rank_zero")  # where Lightning's notes are logged
    notes_log.addFilter(no_adverts)
    try:
        with warnings.catch_warnings():
            # Lightning's notes about deliberate choices (no workers on a small CPU, an
            # existing log folder on resume) are not user errors.
            # A run stopped before its first validation has no monitored value yet: said
            # once, in our words, below.
            for message in (".*does not have many workers.*", ".*Experiment logs directory.*",
                            ".*exists and is not empty.*", ".*Checkpoint directory.*", ".*treespec.*",
                            ".*could not find the monitored key.*"):
                warnings.filterwarnings("ignore", message=message)
            warnings.filterwarnings("ignore", category=DeprecationWarning, module="lightning")
            if layout.world > 1:
                from lightning.pytorch.strategies import DDPStrategy

                # Lightning starts the other processes of this node by running the same
                # command again (LOCAL_RANK, NODE_RANK, MASTER_ADDR/PORT, WORLD_SIZE set);
                # each draws its own share of the batches, so no sampler is replaced.
                parallel = {"strategy": DDPStrategy(process_group_backend="gloo"),
                            "devices": layout.processes_per_node, "num_nodes": layout.nodes,
                            "use_distributed_sampler": False}
            else:
                parallel = {"devices": 1}
            trainer = pl.Trainer(
                accelerator="cpu", **parallel,
                precision="bf16-mixed" if config.trainer.precision == "bf16" else "32-true",
                max_epochs=config.budget.max_epochs if config.budget.max_epochs else -1,
                max_steps=config.budget.max_steps if config.budget.max_steps else -1,
                callbacks=cbs, logger=_MetricsLogger(metrics_path, previous, config.trainer.log_every_n_steps,
                                                     write=layout.rank == 0),
                plugins=[_AtomicCheckpointIO()],
                default_root_dir=str(out),
                enable_progress_bar=progress, enable_model_summary=progress,
                num_sanity_val_steps=0, deterministic=True, benchmark=False,
                log_every_n_steps=min(config.trainer.log_every_n_steps,
                                      config.data.patches_per_epoch // config.data.batch_size),
                gradient_clip_val=config.optim.grad_clip or None,
            )
            try:
                trainer.fit(module, train_dataloaders=data.train_dataloader(layout.rank, layout.world),
                            val_dataloaders=data.val_dataloader(layout.rank, layout.world),
                            ckpt_path=str(last) if resume else None)
            except BaseException:
                _stop_started_processes(trainer)  # they would wait for this one at the next exchange
                raise
            _wait_started_processes(trainer)
    finally:
        lightning_log.setLevel(previous_level)
        notes_log.removeFilter(no_adverts)
        # Lightning switched on deterministic algorithms for the whole process; give the
        # caller back its own setting.
        torch.use_deterministic_algorithms(previous_deterministic)

    if trainer.interrupted:  # pragma: no cover - Lightning turns Ctrl-C into an exit
        raise KeyboardInterrupt
    if layout.rank != 0:  # process 0 exports the model
        return TrainResult(
            output_dir=out, model_path=out / config.output.model_file, config_path=config_path,
            metrics_path=metrics_path, best_checkpoint=Path(checkpoint.best_model_path or last),
            epochs=int(trainer.current_epoch), steps=int(trainer.global_step), rank=layout.rank)
    best_path = Path(checkpoint.best_model_path) if checkpoint.best_model_path else last
    if not best_path.is_file():
        raise ModelFileError(f"training ended before the first checkpoint; nothing to export in {ckpt_dir}")
    if not checkpoint.best_model_path:
        per_epoch = config.data.patches_per_epoch // config.data.batch_size
        warnings.warn(
            f"training stopped at step {trainer.global_step}, before the first validation (an epoch is "
            f"{per_epoch} steps): the model has no validation measures and no bias correction; "
            "allow at least one whole epoch", TrainingWarning, stacklevel=2)
    best = read_checkpoint(best_path)
    prefix = "despeckler.network."
    network.load_state_dict({k[len(prefix):]: v for k, v in best["state_dict"].items() if k.startswith(prefix)})
    best_metrics = dict(best["despeck"].get("metrics") or {})
    model = Despeckler(network, looks=looks, log_bias=float(best_metrics.get("val_log_bias", 0.0)),
                       log_scale=config.model.log_scale, point_false_alarm=config.model.point_false_alarm)
    if model.conditioned and module.loss_fn.name == "mse_log":
        # A looks-aware model keeps mean backscatter over its whole range of looks and
        # correlations only with a bias per condition (despeck.training.calibration).
        from .calibration import calibrate_log_bias_table

        model.log_bias = 0.0
        model.correlation_unknown = config.speckle.condition_dropout > 0
        model.log_bias_table = calibrate_log_bias_table(model, looks_range=model.looks_range,
                                                        seed=config.trainer.seed)
    stopped_by = ("time budget" if budget is not None and budget.stopped
                  else "early stopping" if early is not None and early.stopped_epoch
                  else "max_steps" if config.budget.max_steps and trainer.global_step >= config.budget.max_steps
                  else "max_epochs")
    cfg = config_to_dict(config)
    model_path = save_model_file(
        out / config.output.model_file, model,
        normalisation={**module.loss_fn.describe()},
        training={
            "mode": mode,
            "data": data.describe(),
            "config": {k: cfg[k] for k in ("model", "speckle", "loss", "optim", "budget")},
            "epochs": int(trainer.current_epoch), "steps": int(trainer.global_step),
            "threads": threads, "precision": config.trainer.precision, "stopped_by": stopped_by,
        },
        metrics={k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in best_metrics.items()},
    )
    return TrainResult(
        output_dir=out, model_path=model_path, config_path=config_path, metrics_path=metrics_path,
        best_checkpoint=best_path, best_metrics=best_metrics, epochs=int(trainer.current_epoch),
        steps=int(trainer.global_step), stopped_by=stopped_by,
    )
