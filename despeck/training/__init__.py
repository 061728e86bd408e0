"""Training despeckling networks on a CPU: YAML config, patch data, losses, Lightning trainer.

Typical use is the command ``despeck train --config FILE``; from Python::

    from despeck.training import load_config, train
    result = train(load_config("configs/tiny.yaml", ["budget.max_time=90s"]))
    print(result.model_path, result.best_metrics)

Only the config module is imported eagerly; torch and Lightning load with :func:`train`.
"""

from __future__ import annotations

from .config import TrainConfig, apply_overrides, config_from_dict, dump_config, load_config, parse_duration

__all__ = [
    "TrainConfig",
    "load_config",
    "config_from_dict",
    "apply_overrides",
    "dump_config",
    "parse_duration",
    "train",
]


def train(config, **kwargs):
    """Run :func:`despeck.training.trainer.train` (imports torch and Lightning on first use)."""
    from .trainer import train as _train

    return _train(config, **kwargs)
