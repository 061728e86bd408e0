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

This module holds the fit loop; the run folder (safe writes, checkpoints, the metrics
log, resuming) is :mod:`despeck.training.run_folder`, the clean stop on SIGINT and
SIGTERM (:class:`TrainingInterrupted`, exit code 130 or 143, naming the last checkpoint)
:mod:`despeck.training.interrupts`, and the export of the best weights as a model file
:mod:`despeck.training.export`. A loss or weights that become NaN or infinite stop
training with :class:`TrainingDiverged` at the step where it happened.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import signal
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import lightning.pytorch as pl
import torch

from ..cpu import bf16_supported, usable_cores  # re-exported: callers and tests know them here
from ..errors import ConfigError, InputError, ModelFileError
from .config import TrainConfig, dump_config, parse_duration
from .export import export_best, init_from_model_file
from .interrupts import stop_on_signals
from .outcome import TrainingDiverged, TrainingInterrupted, TrainingWarning, TrainResult  # re-exported
from .run_folder import (AtomicCheckpointIO, MetricsLogger, check_same_run, metrics_rows_until, prepare_output,
                         read_checkpoint, write_text_atomically)

__all__ = ["train", "TrainResult", "EpochTimeBudget", "bf16_supported", "usable_cores", "configure_cpu",
           "TrainingInterrupted", "TrainingDiverged", "TrainingWarning", "ProcessLayout", "process_layout",
           "read_checkpoint"]


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


@stop_on_signals
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
    from ..models import create_model
    from .data import TrainingData
    from .module import DespeckleModule

    progress = config.trainer.progress if progress is None else bool(progress)
    layout = process_layout(config)
    out, resume = prepare_output(config, resume, layout.rank)
    ckpt_dir = out / "checkpoints"
    last = ckpt_dir / "last.ckpt"
    resume_ckpt = read_checkpoint(last) if resume else None
    if resume:
        check_same_run(config, out / "config.yaml")

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
        init_from_model_file(network, config.model.init)
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
        write_text_atomically(config_path, dump_config(config))
    metrics_path = out / "metrics.csv"
    previous = metrics_rows_until(metrics_path, int(resume_ckpt["global_step"])) if resume_ckpt else None

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
            # once, in our words, by export_best.
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
                callbacks=cbs, logger=MetricsLogger(metrics_path, previous, config.trainer.log_every_n_steps,
                                                    write=layout.rank == 0),
                plugins=[AtomicCheckpointIO()],
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
    result = TrainResult(
        output_dir=out, model_path=out / config.output.model_file, config_path=config_path,
        metrics_path=metrics_path, best_checkpoint=Path(checkpoint.best_model_path or last),
        epochs=int(trainer.current_epoch), steps=int(trainer.global_step), rank=layout.rank)
    if layout.rank != 0:  # process 0 exports the model
        return result
    stopped_by = ("time budget" if budget is not None and budget.stopped
                  else "early stopping" if early is not None and early.stopped_epoch
                  else "max_steps" if config.budget.max_steps and trainer.global_step >= config.budget.max_steps
                  else "max_epochs")
    return export_best(config, dataclasses.replace(result, stopped_by=stopped_by),
                       validated=bool(checkpoint.best_model_path), network=network, module=module, data=data,
                       looks=looks, mode=mode, threads=threads)
