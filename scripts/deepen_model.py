"""Give a U-Net model file one more level, starting from the same function.

The new file's network (:func:`despeck.models.unet.deepened`) has a receptive field
about twice as wide and computes exactly what the old one did at the start (inputs
padded to its larger size multiple aside), so fine-tuning it (``model.init`` in a
training config, with ``model.name`` set to the new architecture) begins at the old
model's quality instead of from scratch. Looks range, bias tables and point guard are
copied: they stay valid until the new level has been trained, and export measures
them again.

Usage::

    python scripts/deepen_model.py IN.safetensors OUT.safetensors [--width 128] [--seed 0] [--overwrite]
"""

from __future__ import annotations

import argparse
import pathlib
import sys

from despeck.errors import DespeckError
from despeck.models import Despeckler, load_model_file, resolve_model_path, save_model_file
from despeck.models.unet import deepened


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("model", help="model file or bundled model name")
    p.add_argument("out", type=pathlib.Path)
    p.add_argument("--width", type=int, default=128, help="channels of the new bottleneck (default 128)")
    p.add_argument("--seed", type=int, default=0, help="seed of the new level's random weights (default 0)")
    p.add_argument("--overwrite", action="store_true", help="replace OUT if it exists")
    args = p.parse_args(argv)
    try:
        source = resolve_model_path(args.model)
        if args.out.resolve() == pathlib.Path(source).resolve():
            raise DespeckError(f"{args.out}: the output must be a new file, not the model itself")
        if args.out.exists() and not args.overwrite:
            raise DespeckError(f"{args.out} exists; use --overwrite to replace it")
        model = load_model_file(source)
        network = deepened(model.network, args.width, seed=args.seed)
        deep = Despeckler(network, looks=model.looks, log_bias=model.log_bias, log_scale=model.log_scale,
                          metadata={**model.metadata, "deepened_from": str(args.model)},
                          point_false_alarm=model.point_false_alarm, log_bias_table=model.log_bias_table,
                          log_bias_table_bf16=model.log_bias_table_bf16,
                          correlation_unknown=model.correlation_unknown)
        save_model_file(args.out, deep)
    except DespeckError as exc:
        print(f"deepen_model: error: {exc}", file=sys.stderr)
        return 2
    print(f"{args.out}: {network.architecture} {network.widths}, receptive field {network.receptive_field} px, "
          f"{sum(t.numel() for t in network.parameters())} parameters")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
