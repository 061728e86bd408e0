"""``despeck train``: train a despeckling network from a YAML configuration.

Thin: parses options, loads and checks the config (with ``--set`` overrides), runs
:func:`despeck.training.train` and prints where the results went.
"""

from __future__ import annotations

import json


def add_arguments(parser) -> None:
    parser.add_argument("--config", required=True, metavar="FILE", help="YAML training configuration")
    parser.add_argument(
        "--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
        help="override a config value, e.g. --set budget.max_time=2h --set speckle.looks=[1,4] (repeatable)",
    )
    parser.add_argument("--resume", action="store_true",
                        help="continue the run in output.dir from its last checkpoint")
    parser.add_argument("--quiet", action="store_true", help="no progress bars or model summary")


def run(args) -> int:
    from ..training import load_config, train

    config = load_config(args.config, args.overrides)
    result = train(config, resume=args.resume, progress=False if args.quiet else None)
    shown = {k: round(v, 4) if isinstance(v, float) else v for k, v in result.best_metrics.items()}
    print(f"model: {result.model_path}")
    print(f"metrics: {result.metrics_path}  config: {result.config_path}")
    print(f"stopped by {result.stopped_by} after {result.epochs} epochs, {result.steps} steps; "
          f"best validation: {json.dumps(shown)}")
    return 0
