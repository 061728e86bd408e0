"""The training configuration: a YAML file whose sections map onto typed dataclasses.

One file describes a whole run -- data, model, speckle, loss, optimisation, budget,
trainer settings and output -- so a run can be repeated from the ``config.yaml`` saved
beside its results. Every section is a dataclass with defaults; a key the dataclass
does not have, or a value of the wrong type, raises :class:`~despeck.errors.ConfigError`
naming the key and what is allowed. ``--set section.key=value`` overrides on the command
line are parsed as YAML values, so ``--set speckle.looks=[1,4]`` gives a list.

Example
-------
.. code-block:: yaml

    data:
      train: [references/]          # files, folders or glob patterns of clean rasters
      patch_size: 64
    model: {name: logcnn-s}
    speckle: {looks: 1}
    loss: {name: mse_log, target: clean}
    budget: {max_time: 8h}
    output: {dir: runs/first}

Without clean references, train on pairs of real independent looks instead: two dates
of the same area (``data.pairs``) or sub-looks of single-look complex scenes
(``data.slc``); see :mod:`despeck.training.pairs` and ``configs/pairs.yaml``.
"""

from __future__ import annotations

import dataclasses
import math
import re
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional, Union

import yaml

from ..errors import ConfigError

__all__ = [
    "DataConfig",
    "ModelConfig",
    "SpeckleConfig",
    "LossConfig",
    "OptimConfig",
    "BudgetConfig",
    "TrainerConfig",
    "OutputConfig",
    "TrainConfig",
    "load_config",
    "config_from_dict",
    "apply_overrides",
    "config_to_dict",
    "dump_config",
    "parse_duration",
    "read_yaml",
]

LOSSES = ("gamma_nll", "mse_log")
TARGETS = ("clean", "noisy")
SCHEDULES = ("plateau", "cosine", "constant")
PRECISIONS = ("32", "bf16")
TAPERS = ("hamming", "hann", "kaiser", "none")
SPLIT_AXES = ("azimuth", "range")


@dataclass
class DataConfig:
    """Where clean references come from and how patches are drawn.

    ``train`` lists files, folders (every raster inside, not recursive) or glob patterns
    of clean reference rasters (multitemporal averages, strongly multi-looked scenes or
    any clean image) in any units :mod:`despeck.raster` reads. ``synthetic_scenes`` adds
    that many procedural scenes (:mod:`despeck.synthetic`) of ``synthetic_size`` pixels,
    so a run needs no files at all. Validation uses ``validation`` files if given, else
    the bottom ``val_fraction`` of the rows of every training raster (training patches
    never overlap that strip).

    **Pairs of real looks** (no clean reference; :mod:`despeck.training.pairs`):
    ``pairs`` lists ``[date1, date2]`` file pairs, co-registered on the same grid; one
    date is the input and the other the target (swapped at random per patch). Pixels
    whose two dates' ``change_window`` x ``change_window`` local means differ more than
    speckle explains (a two-sided F test at false-alarm rate ``change_false_alarm``) are
    left out of the loss. ``slc`` lists single-look complex files (files, folders, globs);
    each is split once at load time into ``sublooks`` sub-looks along ``split_axis``
    (``azimuth``: rows, ``range``: columns), after dividing out the processor's spectral
    ``slc_taper`` (``hamming``, ``hann``, ``none`` or null) over the occupied band
    (``1 / slc_oversampling`` of the sampling rate around ``slc_centre`` cycles per
    pixel). Two different sub-looks make each input/target pair. Pairs and sub-looks
    can be combined, not mixed with clean references. Validation uses the bottom
    ``val_fraction`` of every pair's rows.

    ``num_workers`` is 0 by default: patches are made in the training process. On a
    2-core machine the convolutions already occupy both cores through torch's threads,
    and making a batch costs about 1 % of a training step (0.8 ms per 64 x 64 patch
    against ~1.5 s per step of 16 for logcnn-s), so a worker process would only compete
    for the same cores. With more cores, workers run with one torch thread each.
    """

    train: list[str] = field(default_factory=list)
    validation: list[str] = field(default_factory=list)
    units: Optional[str] = None
    band: int = 1
    synthetic_scenes: int = 0
    synthetic_size: int = 512
    #: radar-like scene families (despeck.scene_families) the procedural scenes cycle
    #: through; empty: the lowland scenes of despeck.synthetic
    synthetic_families: list[str] = field(default_factory=list)
    patch_size: int = 64
    batch_size: int = 16
    patches_per_epoch: int = 2048
    val_patches: int = 64
    val_fraction: float = 0.15
    min_valid_fraction: float = 1.0
    augment: bool = True
    offset_jitter: float = 0.3
    num_workers: int = 0
    max_pixels: int = 200_000_000
    pairs: list[list[str]] = field(default_factory=list)
    change_window: int = 7
    change_false_alarm: float = 0.01
    slc: list[str] = field(default_factory=list)
    sublooks: int = 2
    split_axis: str = "azimuth"
    slc_oversampling: float = 1.0
    slc_taper: Optional[str] = None
    slc_centre: float = 0.0

    @property
    def self_supervised(self) -> bool:
        """True when training on pairs of real looks (``pairs`` or ``slc``) instead of clean references."""
        return bool(self.pairs or self.slc)


@dataclass
class ModelConfig:
    """Which registered network to train (:func:`despeck.models.list_models`), with overrides."""

    name: str = "logcnn-s"
    kwargs: dict = field(default_factory=dict)
    log_scale: float = 2.0
    #: keep strong isolated scatterers unfiltered in the exported model (false-alarm rate
    #: of the point test, e.g. 1e-4; null: off); see despeck.models.Despeckler
    point_false_alarm: Optional[float] = 1e-4
    #: start from the weights of a model file (a path, or "starter" for the bundled model)
    #: instead of a random initialisation; its architecture must match ``name``/``kwargs``
    init: Optional[str] = None


@dataclass
class SpeckleConfig:
    """Simulated speckle: ``looks`` is a number or a ``[min, max]`` range (uniform per patch).

    With ``data.pairs`` or ``data.slc`` nothing is simulated: ``looks`` is then the
    number of looks of each real date or sub-look (the target's looks set the
    ``ln L - psi(L)`` correction of ``mse_log``), or ``auto`` to estimate it per file
    with :func:`despeck.speckle.estimate_looks`; the estimates are recorded either way.

    ``correlated_fraction`` of the patches get spatially correlated speckle
    (:func:`despeck.speckle.simulate_correlated_intensity`) with the given
    ``oversampling`` (a number, or a ``[min, max]`` range drawn independently for rows
    and columns per patch) and spectral ``taper`` (a name, or a list to draw from).
    ``val_looks`` is the number of looks of the validation speckle (default: the
    smallest training value).
    """

    looks: Union[float, list[float], str] = 1.0
    val_looks: Optional[float] = None
    correlated_fraction: float = 0.0
    oversampling: Union[float, list[float]] = 1.25
    taper: Union[str, list[str]] = "hamming"
    #: how looks are drawn from a [min, max] range: uniform or log-uniform (more low looks)
    looks_distribution: str = "uniform"
    #: conditioned networks: noise added to the looks (relative, log scale) and to the
    #: correlation they are told, so they tolerate the estimation error of real scenes
    condition_jitter: float = 0.03
    #: conditioned networks: share of patches whose correlation is withheld (told
    #: "unknown"), so the model can run blind where a scene's correlation cannot be
    #: measured reliably
    condition_dropout: float = 0.0
    #: what correlated patches are compared with: "system", the speckle's mean (the
    #: clean reference convolved with the system's |PSF|^2, what a despeckler can
    #: recover), or "reference", the unblurred clean reference (asks for deconvolution)
    correlated_target: str = "system"
    #: validation patches drawn with the training mixture of looks and correlation
    #: (default: white speckle at val_looks)
    val_mixture: bool = False


@dataclass
class LossConfig:
    """Training loss: ``mse_log`` (default; optimises the dB-domain error directly) or ``gamma_nll``.

    ``gamma_nll`` needs no bias correction but its gradients are heavy-tailed while the
    network is still close to the identity, so it converges more slowly on short budgets.

    ``target`` is ``clean`` (the reference) or ``noisy`` (an independent speckled view of
    it, Noise2Noise-style; the only choice with ``data.pairs`` / ``data.slc``). ``tv_weight`` adds a total-variation penalty on the log estimate.
    """

    name: str = "mse_log"
    target: str = "clean"
    tv_weight: float = 0.0


@dataclass
class OptimConfig:
    """Adam with an optional learning-rate schedule (``plateau`` on validation loss, ``cosine`` over max_epochs, ``constant``)."""

    lr: float = 1e-3
    weight_decay: float = 0.0
    schedule: str = "plateau"
    plateau_patience: int = 4
    plateau_factor: float = 0.5
    min_lr: float = 1e-5
    grad_clip: float = 0.0


@dataclass
class BudgetConfig:
    """When training stops: wall time (``"8h"``, ``"90s"``, ``"1h30m"``), epochs, steps, early stopping.

    Epochs are unlimited unless ``max_epochs`` is set. Training stops at an epoch boundary
    before ``max_time`` would be exceeded (so every checkpoint is resumable exactly).
    ``early_stopping`` is the number of epochs without validation improvement to wait (0: off).
    """

    max_time: Optional[str] = None
    max_epochs: Optional[int] = None
    max_steps: Optional[int] = None
    early_stopping: int = 0


@dataclass
class TrainerConfig:
    """Run-time settings: seed, numeric precision, CPU threads, processes, progress display.

    ``precision: bf16`` trains under bfloat16 autocast (weights stay float32); it needs a
    CPU with native bfloat16 (AVX512-BF16 or AMX) and is refused otherwise.

    ``processes_per_node`` x ``nodes`` processes train together with Lightning's
    distributed data parallel over gloo (each process computes the gradient of its share
    of every batch; they are averaged before each step). ``data.batch_size`` is the
    global batch: each process takes ``batch_size / (processes_per_node * nodes)``
    patches of it (it must divide evenly), so a run draws the same patches and takes the
    same steps whatever the number of processes. ``threads`` (per process) defaults to
    the cores this process may use divided by ``processes_per_node``; with several
    processes per node, a setting that would put more threads than usable cores on a
    machine is refused.
    """

    seed: int = 0
    precision: str = "32"
    threads: Optional[int] = None
    processes_per_node: int = 1
    nodes: int = 1
    progress: bool = True
    log_every_n_steps: int = 20


@dataclass
class OutputConfig:
    """Where results go: ``dir`` holds config.yaml, metrics.csv, checkpoints/ and the model file."""

    dir: str = "runs/despeck"
    model_file: str = "model.safetensors"


@dataclass
class TrainConfig:
    """A whole training run; one attribute per YAML section."""

    data: DataConfig = field(default_factory=DataConfig)
    model: ModelConfig = field(default_factory=ModelConfig)
    speckle: SpeckleConfig = field(default_factory=SpeckleConfig)
    loss: LossConfig = field(default_factory=LossConfig)
    optim: OptimConfig = field(default_factory=OptimConfig)
    budget: BudgetConfig = field(default_factory=BudgetConfig)
    trainer: TrainerConfig = field(default_factory=TrainerConfig)
    output: OutputConfig = field(default_factory=OutputConfig)


# --------------------------------------------------------------------------- type checking

def _describe(tp) -> str:
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if origin in (Union, types.UnionType):
        parts = [_describe(a) for a in args if a is not type(None)]
        text = " or ".join(parts)
        return text + " or null" if type(None) in args else text
    if origin is list:
        plural = {int: "integers", float: "numbers", str: "strings", bool: "true/false values"}
        return f"a list of {plural.get(args[0], 'values')}" if args else "a list"
    return {int: "an integer", float: "a number", str: "a string", bool: "true/false", dict: "a mapping"}.get(tp, str(tp))


def _coerce(tp, value, key):
    """Return ``value`` checked against type ``tp`` (ints accepted for floats), or raise ConfigError."""
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if origin in (Union, types.UnionType):
        if value is None and type(None) in args:
            return None
        for a in args:
            if a is type(None):
                continue
            try:
                return _coerce(a, value, key)
            except ConfigError:
                continue
        raise ConfigError(f"config key {key}: expected {_describe(tp)}, got {value!r}")
    if origin is list:
        if isinstance(value, (str, int, float)) and args and args[0] is str:
            value = [value]  # a single path is a one-element list
        if not isinstance(value, list):
            raise ConfigError(f"config key {key}: expected {_describe(tp)}, got {value!r}")
        return [_coerce(args[0], v, key) for v in value] if args else list(value)
    if tp is bool:
        if isinstance(value, bool):
            return value
    elif tp is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
        if isinstance(value, float) and value.is_integer():
            return int(value)  # e.g. max_steps: 1e4
    elif tp is float:
        if isinstance(value, str):
            try:
                value = float(value)  # a number written as text, e.g. "1e-3"
            except ValueError:
                pass
        if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
            return float(value)
    elif tp is str:
        if isinstance(value, str):
            return value
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return str(value)  # e.g. precision: 32
    elif tp is dict:
        if isinstance(value, dict):
            return dict(value)
    raise ConfigError(f"config key {key}: expected {_describe(tp)}, got {value!r}")


def _section_from_dict(cls, values, section):
    if values is None:
        values = {}
    if not isinstance(values, dict):
        raise ConfigError(f"config section {section}: expected a mapping of keys, got {values!r}")
    hints = typing.get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls)]
    kwargs = {}
    for key, value in values.items():
        if key not in hints:
            raise ConfigError(
                f"config key {section}.{key} is unknown; allowed keys in {section}: {', '.join(names)}"
            )
        kwargs[key] = _coerce(hints[key], value, f"{section}.{key}")
    return cls(**kwargs)


def config_from_dict(values) -> TrainConfig:
    """Build and check a :class:`TrainConfig` from a nested mapping (e.g. parsed YAML)."""
    if values is None:
        values = {}
    if not isinstance(values, dict):
        raise ConfigError(f"a training config must be a mapping of sections, got {type(values).__name__}")
    hints = typing.get_type_hints(TrainConfig)
    sections = {}
    for name, body in values.items():
        if name not in hints:
            raise ConfigError(
                f"config section {name!r} is unknown; allowed sections: {', '.join(hints)}"
            )
        sections[name] = _section_from_dict(hints[name], body, name)
    config = TrainConfig(**sections)
    check_config(config)
    return config


def _fail(key, message):
    raise ConfigError(f"config key {key}: {message}")


def _check_pairs(config: TrainConfig) -> None:
    """Checks of the self-supervised keys (data.pairs, data.slc) and what they exclude."""
    d = config.data
    for i, pair in enumerate(d.pairs, 1):
        if len(pair) != 2:
            _fail("data.pairs", f"pair {i} must be two files [date1, date2], got {pair!r}; "
                                "write pairs: [[date1.tif, date2.tif], ...]")
        if Path(pair[0]).expanduser() == Path(pair[1]).expanduser():
            _fail("data.pairs", f"pair {i} lists {pair[0]} twice; the two dates must be different acquisitions")
    if d.change_window < 3 or d.change_window % 2 == 0:
        _fail("data.change_window", f"must be an odd number of pixels >= 3, got {d.change_window}")
    if not 0 < d.change_false_alarm < 0.5:
        _fail("data.change_false_alarm", f"must be between 0 and 0.5, got {d.change_false_alarm}")
    if d.sublooks < 2:
        _fail("data.sublooks", f"must be at least 2 (one sub-look as input, another as target), got {d.sublooks}")
    if d.split_axis not in SPLIT_AXES:
        _fail("data.split_axis", f"must be one of {', '.join(SPLIT_AXES)}, got {d.split_axis!r}")
    if d.slc_oversampling < 1:
        _fail("data.slc_oversampling", f"must be >= 1 (sampling rate over bandwidth), got {d.slc_oversampling}")
    if d.slc_taper is not None and d.slc_taper not in TAPERS:
        _fail("data.slc_taper", f"must be one of {', '.join(TAPERS)} or null, got {d.slc_taper!r}")
    if not -0.5 <= d.slc_centre <= 0.5:
        _fail("data.slc_centre", f"must be in [-0.5, 0.5] cycles per pixel, got {d.slc_centre}")
    if not d.self_supervised:
        return
    which = "data.pairs" if d.pairs else "data.slc"
    if d.train or d.synthetic_scenes:
        key = "data.train" if d.train else "data.synthetic_scenes"
        _fail(key, f"clean references cannot be mixed with {which} in one run; train on one or the other")
    if d.validation:
        _fail("data.validation", f"with {which} validation uses the bottom data.val_fraction of every pair; "
                                 "remove data.validation")
    if d.units is not None and d.slc and d.units != "complex":
        _fail("data.units", f"data.slc needs complex samples; units {d.units!r} would apply to every file")
    s = config.speckle
    if isinstance(s.looks, list):
        _fail("speckle.looks", f"with {which} the looks are those of the real data: a number or auto, "
                               f"not a range {s.looks!r}")
    if s.val_looks is not None:
        _fail("speckle.val_looks", f"is not used with {which} (validation uses held-out real data); remove it")
    if s.correlated_fraction:
        _fail("speckle.correlated_fraction", f"nothing is simulated with {which}; remove it")
    if config.loss.target != "noisy":
        _fail("loss.target", f"{which} give no clean reference; set loss.target: noisy "
                             "(the other date or sub-look is the target)")


def check_config(config: TrainConfig) -> None:
    """Check values and combinations the types alone do not; raise ConfigError naming the key."""
    d = config.data
    for key in ("band", "patch_size", "batch_size", "patches_per_epoch", "val_patches", "synthetic_size", "max_pixels"):
        if getattr(d, key) < 1:
            _fail(f"data.{key}", f"must be a positive integer, got {getattr(d, key)}")
    if d.patches_per_epoch < d.batch_size:
        _fail("data.patches_per_epoch", f"must be at least data.batch_size ({d.batch_size}), got {d.patches_per_epoch}")
    if d.patch_size < 8:
        _fail("data.patch_size", f"must be at least 8 pixels, got {d.patch_size}")
    if d.synthetic_scenes < 0:
        _fail("data.synthetic_scenes", f"must be >= 0, got {d.synthetic_scenes}")
    if d.synthetic_families:
        from ..scene_families import SCENE_FAMILIES

        unknown = [f for f in d.synthetic_families if f not in SCENE_FAMILIES]
        if unknown:
            _fail("data.synthetic_families", f"unknown family {unknown[0]!r}; choose from {', '.join(SCENE_FAMILIES)}")
    if d.synthetic_scenes and d.synthetic_size < max(64, d.patch_size):
        _fail("data.synthetic_size", f"must be at least max(64, data.patch_size) = {max(64, d.patch_size)}")
    if not d.train and not d.synthetic_scenes and not d.self_supervised:
        _fail("data.train", "no training data: list clean rasters (files, folders, globs), set data.synthetic_scenes, "
                            "or list data.pairs / data.slc")
    _check_pairs(config)
    if not 0 < d.val_fraction < 1:
        _fail("data.val_fraction", f"must be between 0 and 1 (exclusive), got {d.val_fraction}")
    if not 0 < d.min_valid_fraction <= 1:
        _fail("data.min_valid_fraction", f"must be in (0, 1], got {d.min_valid_fraction}")
    if d.offset_jitter < 0:
        _fail("data.offset_jitter", f"must be >= 0 (nepers), got {d.offset_jitter}")
    if d.num_workers < 0:
        _fail("data.num_workers", f"must be >= 0, got {d.num_workers}")
    if d.units is not None and d.units not in ("intensity", "amplitude", "db", "complex"):
        _fail("data.units", f"must be one of intensity, amplitude, db, complex (or null to detect), got {d.units!r}")

    if config.model.log_scale <= 0:
        _fail("model.log_scale", f"must be positive, got {config.model.log_scale}")
    pfa = config.model.point_false_alarm
    if pfa is not None and not 0 < pfa < 1:
        _fail("model.point_false_alarm", f"must lie in (0, 1) or be null, got {pfa}")
    from ..models import list_models  # torch import deferred until a config is checked

    if config.model.name not in list_models():
        _fail("model.name", f"unknown model {config.model.name!r}; choose one of: {', '.join(list_models())}")

    s = config.speckle
    if isinstance(s.looks, str):
        if s.looks != "auto":
            _fail("speckle.looks", f"must be a number, a [min, max] range or auto, got {s.looks!r}")
        if not d.self_supervised:
            _fail("speckle.looks", "auto (estimate from the data) needs data.pairs or data.slc; "
                                   "simulated speckle needs a number or a [min, max] range")
    looks = [] if isinstance(s.looks, str) else s.looks if isinstance(s.looks, list) else [s.looks]
    if len(looks) not in (1, 2) and not isinstance(s.looks, str):
        _fail("speckle.looks", f"must be a number or a [min, max] range, got {s.looks!r}")
    if any(v <= 0 for v in looks):
        _fail("speckle.looks", f"must be positive (> 0), got {s.looks!r}")
    if len(looks) == 2 and looks[0] > looks[1]:
        _fail("speckle.looks", f"range must be [min, max] with min <= max, got {s.looks!r}")
    if s.val_looks is not None and s.val_looks <= 0:
        _fail("speckle.val_looks", f"must be positive (> 0), got {s.val_looks}")
    if not 0 <= s.correlated_fraction <= 1:
        _fail("speckle.correlated_fraction", f"must be in [0, 1], got {s.correlated_fraction}")
    if s.looks_distribution not in ("uniform", "log-uniform"):
        _fail("speckle.looks_distribution", f"must be uniform or log-uniform, got {s.looks_distribution!r}")
    if s.correlated_target not in ("system", "reference"):
        _fail("speckle.correlated_target", f"must be system or reference, got {s.correlated_target!r}")
    if not 0 <= s.condition_dropout <= 1:
        _fail("speckle.condition_dropout", f"must be in [0, 1], got {s.condition_dropout}")
    if not 0 <= s.condition_jitter <= 0.5:
        _fail("speckle.condition_jitter", f"must be in [0, 0.5], got {s.condition_jitter}")
    if s.correlated_fraction > 0:
        overs = s.oversampling if isinstance(s.oversampling, list) else [s.oversampling]
        if len(overs) not in (1, 2) or any(v < 1 for v in overs) or overs[0] > overs[-1]:
            _fail("speckle.oversampling", f"must be a number >= 1 or a [min, max] range of such, got {s.oversampling}")
        tapers = s.taper if isinstance(s.taper, list) else [s.taper]
        bad = [t for t in tapers if t not in TAPERS]
        if bad or not tapers:
            _fail("speckle.taper", f"must be one of {', '.join(TAPERS)} (or a list of them), got {s.taper!r}")
        if any(v < 1 for v in looks):
            _fail("speckle.looks", "correlated speckle needs at least one look")

    lo = config.loss
    if lo.name not in LOSSES:
        _fail("loss.name", f"must be one of {', '.join(LOSSES)}, got {lo.name!r}")
    if lo.target not in TARGETS:
        _fail("loss.target", f"must be one of {', '.join(TARGETS)}, got {lo.target!r}")
    if lo.tv_weight < 0:
        _fail("loss.tv_weight", f"must be >= 0, got {lo.tv_weight}")

    o = config.optim
    if o.lr <= 0:
        _fail("optim.lr", f"must be positive, got {o.lr}")
    if o.weight_decay < 0:
        _fail("optim.weight_decay", f"must be >= 0, got {o.weight_decay}")
    if o.schedule not in SCHEDULES:
        _fail("optim.schedule", f"must be one of {', '.join(SCHEDULES)}, got {o.schedule!r}")
    if o.schedule == "cosine" and config.budget.max_epochs is None:
        _fail("optim.schedule", "cosine needs budget.max_epochs (the schedule's length)")
    if not 0 < o.plateau_factor < 1:
        _fail("optim.plateau_factor", f"must be between 0 and 1, got {o.plateau_factor}")
    if o.plateau_patience < 0:
        _fail("optim.plateau_patience", f"must be >= 0, got {o.plateau_patience}")
    if o.min_lr < 0 or o.grad_clip < 0:
        _fail("optim.min_lr" if o.min_lr < 0 else "optim.grad_clip", "must be >= 0")

    b = config.budget
    if b.max_time is not None:
        parse_duration(b.max_time, "budget.max_time")
    for key in ("max_epochs", "max_steps"):
        v = getattr(b, key)
        if v is not None and v < 1:
            _fail(f"budget.{key}", f"must be a positive integer or null, got {v}")
    if b.early_stopping < 0:
        _fail("budget.early_stopping", f"must be >= 0 epochs (0 turns it off), got {b.early_stopping}")

    t = config.trainer
    if t.precision not in PRECISIONS:
        _fail("trainer.precision", f"must be one of {', '.join(PRECISIONS)}, got {t.precision!r}")
    if t.threads is not None and t.threads < 1:
        _fail("trainer.threads", f"must be a positive integer or null (all usable cores), got {t.threads}")
    if t.log_every_n_steps < 1:
        _fail("trainer.log_every_n_steps", f"must be a positive integer, got {t.log_every_n_steps}")
    for key in ("processes_per_node", "nodes"):
        if getattr(t, key) < 1:
            _fail(f"trainer.{key}", f"must be a positive integer, got {getattr(t, key)}")
    world = t.processes_per_node * t.nodes
    if world > 1:
        if config.data.batch_size % world:
            _fail("data.batch_size", f"{config.data.batch_size} does not divide evenly among the {world} processes "
                  f"(trainer.processes_per_node x trainer.nodes); it is the global batch")
        if config.data.val_patches < world:
            _fail("data.val_patches", f"{config.data.val_patches} is fewer than the {world} processes "
                  "(trainer.processes_per_node x trainer.nodes); every process validates a share")
    if t.seed < 0:
        _fail("trainer.seed", f"must be >= 0, got {t.seed}")

    if not config.output.dir:
        _fail("output.dir", "must name a folder")
    if not config.output.model_file or Path(config.output.model_file).name != config.output.model_file:
        _fail("output.model_file", f"must be a plain file name inside output.dir, got {config.output.model_file!r}")


_DURATION = re.compile(r"(\d+(?:\.\d+)?)\s*([dhms])", re.IGNORECASE)
_UNIT_SECONDS = {"d": 86400, "h": 3600, "m": 60, "s": 1}


def parse_duration(text, key: str = "duration") -> float:
    """Seconds in a duration such as ``"8h"``, ``"90s"``, ``"1h30m"``, ``"45m"`` or a bare number of seconds."""
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        seconds = float(text)
    else:
        s = str(text).strip().replace(" ", "")
        try:
            seconds = float(s)
        except ValueError:
            parts = _DURATION.findall(s)
            if not parts or "".join(a + u for a, u in parts).lower() != s.lower():
                raise ConfigError(
                    f"config key {key}: cannot read duration {text!r}; write e.g. 8h, 45m, 90s or 1h30m"
                ) from None
            seconds = sum(float(a) * _UNIT_SECONDS[u.lower()] for a, u in parts)
    if not math.isfinite(seconds) or seconds <= 0:
        raise ConfigError(f"config key {key}: duration must be positive, got {text!r}")
    return seconds


# --------------------------------------------------------------------------- files and overrides

class _YamlLoader(yaml.SafeLoader):
    """PyYAML's safe loader that also reads YAML 1.2 numbers such as ``1e-3`` as numbers.

    PyYAML follows YAML 1.1, whose float pattern needs a decimal point, so ``1e-3``,
    ``1E5`` and ``+2e3`` stay strings there; YAML 1.2's core schema (and every other
    reader users meet) takes them as floats.
    """


# Own copy of the resolver table, so yaml.SafeLoader itself is left unchanged.
_YamlLoader.yaml_implicit_resolvers = {
    k: list(v) for k, v in yaml.SafeLoader.yaml_implicit_resolvers.items()
}
# YAML 1.2 core schema float (YAML Language Specification 1.2.2, section 10.3.2), the
# forms without a decimal point that YAML 1.1 leaves out.
_YamlLoader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^[-+]?(?:[0-9][0-9_]*(?:\.[0-9_]*)?|\.[0-9_]+)[eE][-+]?[0-9]+$"),
    list("-+0123456789."),
)


def read_yaml(text):
    """Parse YAML ``text`` safely (no tags that build objects), reading ``1e-3`` as a number.

    Raises
    ------
    yaml.YAMLError
        Invalid YAML; nesting deeper than Python's recursion limit is reported as one
        as well.
    """
    try:
        return yaml.load(text, Loader=_YamlLoader)  # noqa: S506 - a SafeLoader subclass
    except RecursionError:
        raise yaml.YAMLError("nesting too deep") from None


def apply_overrides(values: dict, overrides) -> dict:
    """Apply ``section.key=value`` strings to a nested mapping; values are parsed as YAML."""
    values = {k: (dict(v) if isinstance(v, dict) else v) for k, v in (values or {}).items()}
    for item in overrides or ():
        if "=" not in item:
            raise ConfigError(f"--set {item!r}: expected section.key=value")
        key, raw = item.split("=", 1)
        parts = key.strip().split(".")
        if len(parts) < 2 or not all(parts):
            raise ConfigError(f"--set {item!r}: the key must be section.key, e.g. budget.max_time=2h")
        try:
            value = read_yaml(raw) if raw.strip() else None
        except yaml.YAMLError:
            value = raw
        node = values
        for p in parts[:-1]:
            child = node.get(p)
            if child is None:
                child = node[p] = {}
            elif not isinstance(child, dict):
                raise ConfigError(f"--set {item!r}: {p} is not a section")
            else:
                child = node[p] = dict(child)
            node = child
        node[parts[-1]] = value
    return values


def load_config(path, overrides=()) -> TrainConfig:
    """Read a YAML training config, apply ``--set`` overrides and check everything.

    Relative paths in ``data.train``, ``data.validation``, ``data.pairs``,
    ``data.slc`` and ``model.init`` are taken relative to the config file's folder; ``output.dir`` relative to the current directory.
    """
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"config file {path} does not exist")
    try:
        values = read_yaml(path.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError) as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ConfigError(f"config file {path} is not valid YAML ({first})") from None
    if values is not None and not isinstance(values, dict):
        raise ConfigError(f"config file {path} must hold a mapping of sections, got {type(values).__name__}")
    base = path.resolve().parent
    data = dict((values or {}).get("data") or {}) if isinstance((values or {}).get("data"), dict) else None
    if data is not None:
        def resolve(p):
            return str(base / p) if isinstance(p, str) and not Path(p).expanduser().is_absolute() else p

        for key in ("train", "validation", "slc"):
            if isinstance(data.get(key), str):
                data[key] = [data[key]]
            if isinstance(data.get(key), list):
                data[key] = [resolve(p) for p in data[key]]
        if isinstance(data.get("pairs"), list):
            data["pairs"] = [[resolve(p) for p in pair] if isinstance(pair, list) else resolve(pair)
                             for pair in data["pairs"]]
        values = {**values, "data": data}
    model = (values or {}).get("model")
    if isinstance(model, dict) and isinstance(model.get("init"), str):
        init = model["init"]
        from ..models.bundled import BUNDLED_MODELS

        if init not in BUNDLED_MODELS and not Path(init).expanduser().is_absolute():
            values = {**values, "model": {**model, "init": str(base / init)}}
    values = apply_overrides(values, overrides)
    return config_from_dict(values)


def config_to_dict(config: TrainConfig) -> dict:
    """The fully resolved config as a plain nested dict (defaults included)."""
    return dataclasses.asdict(config)


def dump_config(config: TrainConfig) -> str:
    """YAML text of the fully resolved config, loadable by :func:`load_config`."""
    return yaml.safe_dump(config_to_dict(config), sort_keys=False, default_flow_style=None)
