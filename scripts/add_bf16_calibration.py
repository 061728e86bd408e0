"""Give a model file calibrated in float32 only a bias table measured in bfloat16.

Models exported by this despeck carry both tables (``despeck.training.calibration``);
files made before bfloat16 tables run in float32 by default. This script measures the
bfloat16 table of such a file (:func:`despeck.training.calibration.bf16_table_for`:
its float32 table plus the shift of the arithmetic, measured in both on the same
simulated patches) and writes the model with it to a new file; the weights and the
float32 table are unchanged. It takes about 30 s for the bundled starter on two cores.

Usage::

    python scripts/add_bf16_calibration.py IN.safetensors OUT.safetensors [--seed N] [--overwrite]
"""

from __future__ import annotations

import argparse
import pathlib
import sys

import numpy as np

from despeck.errors import DespeckError
from despeck.models import load_model_file, save_model_file
from despeck.training.calibration import bf16_table_for


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("model", type=pathlib.Path)
    p.add_argument("out", type=pathlib.Path)
    p.add_argument("--seed", type=int, default=0, help="seed of the simulated patches (default 0)")
    p.add_argument("--overwrite", action="store_true", help="replace OUT if it exists")
    args = p.parse_args(argv)
    try:
        if args.out.resolve() == args.model.resolve():
            raise DespeckError(f"{args.out}: the output must be a new file, not the model itself")
        if args.out.exists() and not args.overwrite:
            raise DespeckError(f"{args.out} exists; use --overwrite to replace it")
        model = load_model_file(args.model)
        model.log_bias_table_bf16 = bf16_table_for(model, seed=args.seed)
        save_model_file(args.out, model)  # a temporary file, read back and compared, then renamed
    except DespeckError as exc:
        print(f"add_bf16_calibration: error: {exc}", file=sys.stderr)
        return 2
    shift = 10 / np.log(10) * (np.array(model.log_bias_table_bf16["values"]) - np.array(model.log_bias_table["values"]))
    print(f"{args.out}: bfloat16 table added; it differs from the float32 one by {shift.min():+.4f} to "
          f"{shift.max():+.4f} dB (looks {model.log_bias_table['looks'][0]:g}-{model.log_bias_table['looks'][-1]:g})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
