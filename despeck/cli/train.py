"""``despeck train``: train a despeckling network from a YAML configuration.

Thin: parses options, loads and checks the config (with ``--set`` overrides), runs
:func:`despeck.training.train` and prints where the results went. Warnings are shown as
one line each (``despeck: warning: ...``), once. SIGINT and SIGTERM end the command with
status 130 and 143 and one line naming the last checkpoint.
"""

from __future__ import annotations

import json
import os
import sys
import warnings

EPILOG = ("exit status: 0 when the model file is written; 2 on an error (one line: bad config, "
          "unwritable output, diverged training); 130 on SIGINT (Ctrl-C) and 143 on SIGTERM, after "
          "naming the last checkpoint: the same command with --resume continues from it")


def add_arguments(parser) -> None:
    parser.epilog = EPILOG
    parser.add_argument("--config", required=True, metavar="FILE", help="YAML training configuration")
    parser.add_argument(
        "--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
        help="override a config value, e.g. --set budget.max_time=2h --set speckle.looks=[1,4] (repeatable)",
    )
    parser.add_argument("--resume", action="store_true",
                        help="continue the run in output.dir from its last checkpoint")
    parser.add_argument("--quiet", action="store_true", help="no progress bars or model summary")


def _one_line_warnings():
    shown = set()

    def show(message, category, filename, lineno, file=None, line=None):  # noqa: ARG001
        # Library warnings come with source lines and advice for developers: first line only, once.
        text = (str(message).strip().splitlines() or [category.__name__])[0]
        if text not in shown:
            shown.add(text)
            print(f"despeck: warning: {text}", file=sys.stderr)

    return show


def run(args) -> int:
    from ..training import load_config, train
    from ..training.trainer import TrainingInterrupted

    config = load_config(args.config, args.overrides)
    with warnings.catch_warnings():
        warnings.showwarning = _one_line_warnings()
        try:
            result = train(config, resume=args.resume, progress=False if args.quiet else None)
        except TrainingInterrupted as exc:
            if os.environ.get("LOCAL_RANK", "0") == "0":  # one report per machine, from its first process
                print(f"despeck: {exc}", file=sys.stderr)
            return exc.exit_code
    if result.rank != 0:  # another process of a distributed run: process 0 reports
        return 0
    shown = {k: round(v, 4) if isinstance(v, float) else v for k, v in result.best_metrics.items()}
    print(f"model: {result.model_path}")
    print(f"metrics: {result.metrics_path}  config: {result.config_path}")
    print(f"stopped by {result.stopped_by} after {result.epochs} epochs, {result.steps} steps; "
          f"best validation: {json.dumps(shown)}")
    return 0
