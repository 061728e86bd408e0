"""The training configuration's schema: one pydantic (v2) model per YAML section.

Every section has defaults; unknown keys are forbidden, value ranges are field
constraints (their ``description`` completes "must be ..." in errors) and keys that
depend on each other are checked by a validator of the whole :class:`TrainConfig`
once its sections are valid. A problem found by a validator raises
:class:`~despeck.errors.ConfigError` on one line naming the key
(``config key section.key: ...``); :mod:`despeck.training.config` reads the files,
applies ``--set`` overrides and words pydantic's own findings the same way.

Model names are checked against :func:`despeck.models.list_models`, which needs no
torch, so checking a config stays light.
"""

from __future__ import annotations

import math
import re
from pathlib import Path
from typing import Annotated, Any, Literal, Optional, Union

from pydantic import (BaseModel, BeforeValidator, ConfigDict, Field, FiniteFloat, StrictBool, field_validator,
                      model_validator)

from ..cpu import PRECISIONS
from ..errors import ConfigError, InputError
from ..speckle import check_looks

__all__ = ["DataConfig", "ModelConfig", "SpeckleConfig", "LossConfig", "OptimConfig", "BudgetConfig", "TrainerConfig",
           "OutputConfig", "TrainConfig", "parse_duration", "LOSSES", "TARGETS", "SCHEDULES", "PRECISIONS", "TAPERS",
           "SPLIT_AXES", "UNITS"]

LOSSES = ("gamma_nll", "mse_log")
TARGETS = ("clean", "noisy")
SCHEDULES = ("plateau", "cosine", "constant")
TAPERS = ("hamming", "hann", "kaiser", "none")
SPLIT_AXES = ("azimuth", "range")
UNITS = ("intensity", "amplitude", "db", "complex")


# --------------------------------------------------------------------------- value types
# What YAML hands over is checked by pydantic; these types only say how strict each kind
# of value is: integers accept whole floats (``max_steps: 1e4``) but no text or true/false,
# numbers accept numbers written as text (``"1e-3"``) but no true/false and nothing
# infinite, text accepts numbers (``precision: 32``), a list of text accepts one item.

def _fail(key, message):
    raise ConfigError(f"config key {key}: {message}")


def _not_flag_or_text(value):
    if isinstance(value, (bool, str)):
        raise ValueError("expected an integer")
    return value


def _not_flag(value):
    if isinstance(value, bool):
        raise ValueError("expected a number")
    return value


def _number_as_text(value):
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return str(value)
    return value


def _one_as_list(value):
    if isinstance(value, (str, int, float)) and not isinstance(value, bool):
        return [value]  # a single path is a one-element list
    return value


Integer = Annotated[int, BeforeValidator(_not_flag_or_text)]
Number = Annotated[FiniteFloat, BeforeValidator(_not_flag)]
Text = Annotated[str, BeforeValidator(_number_as_text)]
TextList = Annotated[list[Text], BeforeValidator(_one_as_list)]
Flag = StrictBool


def _choice(values):
    """A text field that takes one of ``values`` (numbers are read as text, e.g. ``precision: 32``)."""
    return Annotated[Literal[values], BeforeValidator(_number_as_text)]


def _limit(default, says, **constraints):
    """A field with range ``constraints`` (pydantic's ge/gt/le/lt); ``says`` completes "must be ..." in errors."""
    return Field(default, description=says, **constraints)


class _Section(BaseModel):
    """A config section: unknown keys are refused, assignments are not re-validated."""

    model_config = ConfigDict(extra="forbid", validate_assignment=False, protected_namespaces=())


class DataConfig(_Section):
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

    train: TextList = Field(default_factory=list)
    validation: TextList = Field(default_factory=list)
    units: Optional[_choice(UNITS)] = Field(None, description=f"one of {', '.join(UNITS)} (or null to detect)")
    band: Integer = _limit(1, "a positive integer", ge=1)
    synthetic_scenes: Integer = _limit(0, ">= 0", ge=0)
    synthetic_size: Integer = _limit(512, "a positive integer", ge=1)
    #: radar-like scene families (despeck.scene_families) the procedural scenes cycle
    #: through; empty: the lowland scenes of despeck.synthetic
    synthetic_families: TextList = Field(default_factory=list)
    patch_size: Integer = _limit(64, "at least 8 pixels", ge=8)
    batch_size: Integer = _limit(16, "a positive integer", ge=1)
    patches_per_epoch: Integer = _limit(2048, "a positive integer", ge=1)
    val_patches: Integer = _limit(64, "a positive integer", ge=1)
    val_fraction: Number = _limit(0.15, "between 0 and 1 (exclusive)", gt=0, lt=1)
    #: seed of the validation patches (positions, speckle, sub-look pairs); null:
    #: trainer.seed. Fixed, runs of different trainer.seed on the same files validate on
    #: the same patches, so their validation measures compare (procedural scenes still
    #: follow trainer.seed)
    val_seed: Optional[Integer] = _limit(None, ">= 0 or null", ge=0)
    min_valid_fraction: Number = _limit(1.0, "in (0, 1]", gt=0, le=1)
    augment: Flag = True
    offset_jitter: Number = _limit(0.3, ">= 0 (nepers)", ge=0)
    num_workers: Integer = _limit(0, ">= 0", ge=0)
    max_pixels: Integer = _limit(200_000_000, "a positive integer", ge=1)
    pairs: list[TextList] = Field(default_factory=list)
    change_window: Integer = _limit(7, "an odd number of pixels >= 3", ge=3)
    change_false_alarm: Number = _limit(0.01, "between 0 and 0.5", gt=0, lt=0.5)
    slc: TextList = Field(default_factory=list)
    sublooks: Integer = _limit(2, "at least 2 (one sub-look as input, another as target)", ge=2)
    split_axis: _choice(SPLIT_AXES) = "azimuth"
    slc_oversampling: Number = _limit(1.0, ">= 1 (sampling rate over bandwidth)", ge=1)
    slc_taper: Optional[_choice(TAPERS)] = Field(None, description=f"one of {', '.join(TAPERS)} or null")
    slc_centre: Number = _limit(0.0, "in [-0.5, 0.5] cycles per pixel", ge=-0.5, le=0.5)

    @field_validator("synthetic_families")
    @classmethod
    def _known_families(cls, families):
        if families:
            from ..scene_families import SCENE_FAMILIES

            unknown = [f for f in families if f not in SCENE_FAMILIES]
            if unknown:
                _fail("data.synthetic_families", f"unknown family {unknown[0]!r}; choose from {', '.join(SCENE_FAMILIES)}")
        return families

    @field_validator("pairs")
    @classmethod
    def _two_dates(cls, pairs):
        for i, pair in enumerate(pairs, 1):
            if len(pair) != 2:
                _fail("data.pairs", f"pair {i} must be two files [date1, date2], got {pair!r}; "
                                    "write pairs: [[date1.tif, date2.tif], ...]")
            if Path(pair[0]).expanduser() == Path(pair[1]).expanduser():
                _fail("data.pairs", f"pair {i} lists {pair[0]} twice; the two dates must be different acquisitions")
        return pairs

    @field_validator("change_window")
    @classmethod
    def _odd_window(cls, window):
        if window % 2 == 0:
            _fail("data.change_window", f"must be an odd number of pixels >= 3, got {window}")
        return window

    @property
    def self_supervised(self) -> bool:
        """True when training on pairs of real looks (``pairs`` or ``slc``) instead of clean references."""
        return bool(self.pairs or self.slc)


class ModelConfig(_Section):
    """Which registered network to train (:func:`despeck.models.list_models`), with overrides."""

    name: Text = "logcnn-s"
    kwargs: dict[str, Any] = Field(default_factory=dict)
    log_scale: Number = _limit(2.0, "positive", gt=0)
    #: keep strong isolated scatterers unfiltered in the exported model (false-alarm rate
    #: of the point test, e.g. 1e-4; null: off); see despeck.models.Despeckler
    point_false_alarm: Optional[Number] = _limit(1e-4, "in (0, 1) or null", gt=0, lt=1)
    #: start from the weights of a model file (a path, or "starter" for the bundled model)
    #: instead of a random initialisation; its architecture must match ``name``/``kwargs``
    init: Optional[Text] = None

    @field_validator("name")
    @classmethod
    def _registered(cls, name):
        from ..models import list_models  # names only: no torch (despeck.models.registry.BUILTIN_MODELS)

        if name not in list_models():
            _fail("model.name", f"unknown model {name!r}; choose one of: {', '.join(list_models())}")
        return name


class SpeckleConfig(_Section):
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

    looks: Union[Number, list[Number], Text] = Field(1.0, union_mode="left_to_right")
    val_looks: Optional[Number] = Field(None, description="positive (> 0)")
    correlated_fraction: Number = _limit(0.0, "in [0, 1]", ge=0, le=1)
    oversampling: Union[Number, list[Number]] = Field(1.25, union_mode="left_to_right")
    taper: Union[Text, list[Text]] = Field("hamming", union_mode="left_to_right")
    #: how looks are drawn from a [min, max] range: uniform or log-uniform (more low looks)
    looks_distribution: _choice(("uniform", "log-uniform")) = "uniform"
    #: conditioned networks: noise added to the looks (relative, log scale) and to the
    #: correlation they are told, so they tolerate the estimation error of real scenes
    condition_jitter: Number = _limit(0.03, "in [0, 0.5]", ge=0, le=0.5)
    #: conditioned networks: noise on the told looks alone (relative, log scale), in
    #: place of condition_jitter's; null: condition_jitter's. Larger values teach the
    #: network to read the speckle level from the pixels where the looks estimate errs
    #: (textured built-up ground reads 15-25 % low)
    looks_jitter: Optional[Number] = _limit(None, "in [0, 1] or null", ge=0, le=1)
    #: conditioned networks: share of patches whose correlation is withheld (told
    #: "unknown"), so the model can run blind where a scene's correlation cannot be
    #: measured reliably
    condition_dropout: Number = _limit(0.0, "in [0, 1]", ge=0, le=1)
    #: what correlated patches are compared with: "system", the speckle's mean (the
    #: clean reference convolved with the system's |PSF|^2, what a despeckler can
    #: recover), or "reference", the unblurred clean reference (asks for deconvolution)
    correlated_target: _choice(("system", "reference")) = "system"
    #: validation patches drawn with the training mixture of looks and correlation
    #: (default: white speckle at val_looks)
    val_mixture: Flag = False

    @field_validator("looks")
    @classmethod
    def _looks_form(cls, looks):
        if isinstance(looks, str):
            if looks != "auto":
                _fail("speckle.looks", f"must be a number, a [min, max] range or auto, got {looks!r}")
            return looks
        values = looks if isinstance(looks, list) else [looks]
        if len(values) not in (1, 2):
            _fail("speckle.looks", f"must be a number or a [min, max] range, got {looks!r}")
        try:
            for value in values:
                check_looks(value, "speckle.looks")  # the one rule for a number of looks
        except InputError:
            _fail("speckle.looks", f"must be positive (> 0), got {looks!r}")
        if len(values) == 2 and values[0] > values[1]:
            _fail("speckle.looks", f"range must be [min, max] with min <= max, got {looks!r}")
        return looks

    @field_validator("val_looks", mode="wrap")
    @classmethod
    def _val_looks(cls, given, read):
        looks = read(given)  # a finite number or null, as for every number
        if looks is not None:
            try:
                check_looks(looks, "speckle.val_looks")
            except InputError:
                _fail("speckle.val_looks", f"must be positive (> 0), got {given!r}")
        return looks


class LossConfig(_Section):
    """Training loss: ``mse_log`` (default; optimises the dB-domain error directly) or ``gamma_nll``.

    ``gamma_nll`` needs no bias correction but its gradients are heavy-tailed while the
    network is still close to the identity, so it converges more slowly on short budgets.

    ``target`` is ``clean`` (the reference) or ``noisy`` (an independent speckled view of
    it, Noise2Noise-style; the only choice with ``data.pairs`` / ``data.slc``). ``tv_weight`` adds a total-variation penalty on the log estimate.
    ``looks_balance`` (0 to 1) weighs each sample by ``psi_1(L) ** -looks_balance`` so
    multi-look samples are not drowned by the larger errors of single-look ones
    (:class:`despeck.training.losses.DespeckleLoss`).
    """

    name: _choice(LOSSES) = "mse_log"
    target: _choice(TARGETS) = "clean"
    tv_weight: Number = _limit(0.0, ">= 0", ge=0)
    looks_balance: Number = _limit(0.0, "between 0 and 1", ge=0, le=1)


class OptimConfig(_Section):
    """Adam with an optional learning-rate schedule (``plateau`` on validation loss, ``cosine`` over max_epochs, ``constant``)."""

    lr: Number = _limit(1e-3, "positive", gt=0)
    weight_decay: Number = _limit(0.0, ">= 0", ge=0)
    schedule: _choice(SCHEDULES) = "plateau"
    plateau_patience: Integer = _limit(4, ">= 0", ge=0)
    plateau_factor: Number = _limit(0.5, "between 0 and 1", gt=0, lt=1)
    min_lr: Number = _limit(1e-5, ">= 0", ge=0)
    grad_clip: Number = _limit(0.0, ">= 0", ge=0)


class BudgetConfig(_Section):
    """When training stops: wall time (``"8h"``, ``"90s"``, ``"1h30m"``), epochs, steps, early stopping.

    Epochs are unlimited unless ``max_epochs`` is set. Training stops at an epoch boundary
    before ``max_time`` would be exceeded (so every checkpoint is resumable exactly).
    ``early_stopping`` is the number of epochs without validation improvement to wait (0: off).
    """

    max_time: Optional[Text] = None
    max_epochs: Optional[Integer] = _limit(None, "a positive integer or null", ge=1)
    max_steps: Optional[Integer] = _limit(None, "a positive integer or null", ge=1)
    early_stopping: Integer = _limit(0, ">= 0 epochs (0 turns it off)", ge=0)

    @field_validator("max_time")
    @classmethod
    def _duration(cls, max_time):
        if max_time is not None:
            parse_duration(max_time, "budget.max_time")
        return max_time


class TrainerConfig(_Section):
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

    seed: Integer = _limit(0, ">= 0", ge=0)
    precision: _choice(PRECISIONS) = "32"
    threads: Optional[Integer] = _limit(None, "a positive integer or null (all usable cores)", ge=1)
    processes_per_node: Integer = _limit(1, "a positive integer", ge=1)
    nodes: Integer = _limit(1, "a positive integer", ge=1)
    progress: Flag = True
    log_every_n_steps: Integer = _limit(20, "a positive integer", ge=1)


class OutputConfig(_Section):
    """Where results go: ``dir`` holds config.yaml, metrics.csv, checkpoints/ and the model file."""

    dir: Text = "runs/despeck"
    model_file: Text = "model.safetensors"

    @field_validator("dir")
    @classmethod
    def _folder(cls, folder):
        if not folder:
            _fail("output.dir", "must name a folder")
        return folder

    @field_validator("model_file")
    @classmethod
    def _plain_name(cls, name):
        if not name or Path(name).name != name:
            _fail("output.model_file", f"must be a plain file name inside output.dir, got {name!r}")
        return name


class TrainConfig(_Section):
    """A whole training run; one attribute per YAML section."""

    data: DataConfig = Field(default_factory=DataConfig)
    model: ModelConfig = Field(default_factory=ModelConfig)
    speckle: SpeckleConfig = Field(default_factory=SpeckleConfig)
    loss: LossConfig = Field(default_factory=LossConfig)
    optim: OptimConfig = Field(default_factory=OptimConfig)
    budget: BudgetConfig = Field(default_factory=BudgetConfig)
    trainer: TrainerConfig = Field(default_factory=TrainerConfig)
    output: OutputConfig = Field(default_factory=OutputConfig)

    @model_validator(mode="before")
    @classmethod
    def _empty_sections(cls, values):
        # ``data:`` with nothing under it is an empty section.
        if isinstance(values, dict):
            return {k: ({} if v is None else v) for k, v in values.items()}
        return values

    @model_validator(mode="after")
    def _combinations(self):
        _check_combinations(self)
        return self

    @property
    def validation_seed(self) -> int:
        """Seed of the validation patches: ``data.val_seed``, else ``trainer.seed``."""
        return self.trainer.seed if self.data.val_seed is None else self.data.val_seed


# --------------------------------------------------------------------------- checks and errors

def _check_combinations(config: TrainConfig) -> None:
    """Checks of keys that depend on each other (the fields are valid on their own); raise ConfigError."""
    d = config.data
    if d.patches_per_epoch < d.batch_size:
        _fail("data.patches_per_epoch", f"must be at least data.batch_size ({d.batch_size}), got {d.patches_per_epoch}")
    if d.synthetic_scenes and d.synthetic_size < max(64, d.patch_size):
        _fail("data.synthetic_size", f"must be at least max(64, data.patch_size) = {max(64, d.patch_size)}")
    if not d.train and not d.synthetic_scenes and not d.self_supervised:
        _fail("data.train", "no training data: list clean rasters (files, folders, globs), set data.synthetic_scenes, "
                            "or list data.pairs / data.slc")
    s = config.speckle
    if d.self_supervised:
        which = "data.pairs" if d.pairs else "data.slc"
        if d.train or d.synthetic_scenes:
            key = "data.train" if d.train else "data.synthetic_scenes"
            _fail(key, f"clean references cannot be mixed with {which} in one run; train on one or the other")
        if d.validation:
            _fail("data.validation", f"with {which} validation uses the bottom data.val_fraction of every pair; "
                                     "remove data.validation")
        if d.units is not None and d.slc and d.units != "complex":
            _fail("data.units", f"data.slc needs complex samples; units {d.units!r} would apply to every file")
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
    elif s.looks == "auto":
        _fail("speckle.looks", "auto (estimate from the data) needs data.pairs or data.slc; "
                               "simulated speckle needs a number or a [min, max] range")
    if s.correlated_fraction > 0:
        overs = s.oversampling if isinstance(s.oversampling, list) else [s.oversampling]
        if len(overs) not in (1, 2) or any(v < 1 for v in overs) or overs[0] > overs[-1]:
            _fail("speckle.oversampling", f"must be a number >= 1 or a [min, max] range of such, got {s.oversampling}")
        tapers = s.taper if isinstance(s.taper, list) else [s.taper]
        bad = [t for t in tapers if t not in TAPERS]
        if bad or not tapers:
            _fail("speckle.taper", f"must be one of {', '.join(TAPERS)} (or a list of them), got {s.taper!r}")
        looks = s.looks if isinstance(s.looks, list) else [s.looks]
        if any(v < 1 for v in looks):
            _fail("speckle.looks", "correlated speckle needs at least one look")
    if config.optim.schedule == "cosine" and config.budget.max_epochs is None:
        _fail("optim.schedule", "cosine needs budget.max_epochs (the schedule's length)")
    t = config.trainer
    world = t.processes_per_node * t.nodes
    if world > 1:
        if d.batch_size % world:
            _fail("data.batch_size", f"{d.batch_size} does not divide evenly among the {world} processes "
                  f"(trainer.processes_per_node x trainer.nodes); it is the global batch")
        if d.val_patches < world:
            _fail("data.val_patches", f"{d.val_patches} is fewer than the {world} processes "
                  "(trainer.processes_per_node x trainer.nodes); every process validates a share")



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
