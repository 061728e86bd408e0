"""Model files in and out of a run: fine-tuning's starting weights, and the exported model.

``model.init`` starts a run from the weights of a model file of the same architecture
(:func:`init_from_model_file`). At the end, :func:`export_best` loads the best
checkpoint's weights into the network, wraps it in a :class:`~despeck.models.Despeckler`
with the validation's log bias (for looks-aware and self-supervised ``mse_log`` models, a
table of biases calibrated on simulated constant areas, :mod:`despeck.training.calibration`)
and saves it with :func:`despeck.models.save_model_file`; its ``training`` metadata says how the
model was trained (``mode``: simulated speckle on clean references, or ``pairs`` /
``sublooks`` of real data with their files and looks).
"""

from __future__ import annotations

import dataclasses
import math
import warnings

from ..errors import ConfigError, DespeckError, ModelFileError
from .config import TrainConfig, config_to_dict
from .outcome import TrainingWarning, TrainResult
from .run_folder import read_checkpoint

__all__ = ["init_from_model_file", "export_best"]


def init_from_model_file(network, source) -> None:
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


def export_best(config: TrainConfig, result: TrainResult, *, validated: bool, network, module, data, looks, mode: str,
                threads: int) -> TrainResult:
    """Save the best checkpoint's weights as the run's model file; ``result`` completed with it.

    Parameters
    ----------
    config : TrainConfig
    result : TrainResult
        The run as the fit left it: ``best_checkpoint`` (the last one when no
        validation ran), ``epochs``, ``steps`` and ``stopped_by``.
    validated : bool
        Whether a validation ran (a best checkpoint by validation loss exists); without
        one a :class:`TrainingWarning` says the model has no validation measures.
    network, module, data
        The trained network, its :class:`~despeck.training.module.DespeckleModule` (for
        the loss) and the training data (described in the metadata).
    looks : float or [float, float]
        Looks the model is for; ``mode`` how it was trained; ``threads`` torch's threads.

    Raises
    ------
    ModelFileError
        No checkpoint to export, or the model file cannot be written.
    """
    from ..models import Despeckler, save_model_file

    best_path = result.best_checkpoint
    if not best_path.is_file():
        raise ModelFileError("training ended before the first checkpoint; nothing to export in "
                             f"{result.output_dir / 'checkpoints'}")
    if not validated:
        per_epoch = config.data.patches_per_epoch // config.data.batch_size
        warnings.warn(
            f"training stopped at step {result.steps}, before the first validation (an epoch is "
            f"{per_epoch} steps): the model has no validation measures and no bias correction; "
            "allow at least one whole epoch", TrainingWarning, stacklevel=3)
    best = read_checkpoint(best_path)
    prefix = "despeckler.network."
    network.load_state_dict({k[len(prefix):]: v for k, v in best["state_dict"].items() if k.startswith(prefix)})
    best_metrics = dict(best["despeck"].get("metrics") or {})
    model = Despeckler(network, looks=looks, log_bias=float(best_metrics.get("val_log_bias", 0.0)),
                       log_scale=config.model.log_scale, point_false_alarm=config.model.point_false_alarm)
    # Looks-aware and self-supervised mse_log models keep mean backscatter over the
    # conditions they meet only with a bias per condition (despeck.training.calibration).
    from .calibration import calibrate_for_export

    calibration = calibrate_for_export(model, loss_name=module.loss_fn.name, data=data, config=config)
    cfg = config_to_dict(config)
    model_path = save_model_file(
        result.output_dir / config.output.model_file, model,
        normalisation={**module.loss_fn.describe()},
        training={
            "mode": mode,
            "data": data.describe(),
            "config": {k: cfg[k] for k in ("model", "speckle", "loss", "optim", "budget")},
            "epochs": result.epochs, "steps": result.steps,
            "threads": threads, "precision": config.trainer.precision, "stopped_by": result.stopped_by,
            **({"calibration": calibration} if calibration else {}),
        },
        metrics={k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in best_metrics.items()},
    )
    return dataclasses.replace(result, model_path=model_path, best_metrics=best_metrics)
