"""``despeck train``: train a despeckling network from a YAML configuration.

Thin: parses options, loads and checks the config (with ``--set`` overrides), runs
:func:`despeck.training.train` and prints where the results went. Warnings are shown as
one line each (``despeck: warning: ...``), once, by the command's printer. SIGINT and
SIGTERM end the command with status 130 and 143 and one line naming the last checkpoint.
"""

from __future__ import annotations

import json
import logging
import os
import sys
import textwrap

from .exit_codes import EPILOG as EXIT_STATUSES
from .exit_codes import OK, for_signal

log = logging.getLogger(__name__)

EPILOG = textwrap.fill(
    "The model file is written when the run ends (exit status 0). An error (bad config, unwritable output, "
    "diverged training) is one line and exit status 1. SIGINT (130) and SIGTERM (143) end the run after naming "
    "the last checkpoint: the same command with --resume continues from it.", 78) + "\n\n" + EXIT_STATUSES


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


def run(args) -> int:
    from ..training import load_config, train
    from ..training.trainer import TrainingInterrupted

    config = load_config(args.config, args.overrides)
    log.info("config %s%s", args.config, f" with {len(args.overrides)} --set override(s)" if args.overrides else "")
    try:
        result = train(config, resume=args.resume, progress=False if args.quiet else None)
    except TrainingInterrupted as exc:
        if os.environ.get("LOCAL_RANK", "0") == "0":  # one report per machine, from its first process
            print(f"despeck: {exc}", file=sys.stderr)
        return for_signal(exc.signum)  # exit_codes.INTERRUPTED or TERMINATED
    if result.rank != 0:  # another process of a distributed run: process 0 reports
        return OK
    shown = {k: round(v, 4) if isinstance(v, float) else v for k, v in result.best_metrics.items()}
    print(f"model: {result.model_path}")
    print(f"metrics: {result.metrics_path}  config: {result.config_path}")
    print(f"stopped by {result.stopped_by} after {result.epochs} epochs, {result.steps} steps; "
          f"best validation: {json.dumps(shown)}")
    log.info("wrote %s", result.model_path)
    return OK
