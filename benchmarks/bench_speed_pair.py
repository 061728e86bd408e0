"""Inference speed of two model files measured side by side in one run (e.g. a new starter vs the old).

Machines differ between sessions (AVX-512, bf16 or only AVX2) and may be shared, so
absolute MP/s mean little; this script times ``despeck.inference.despeckle_array`` (the
default user path, looks and correlation estimated for looks-aware models) for both
models on the same simulated 2048 x 2048 1-look scene, alternating A, B, A, B, ... and
keeping each model's best run, and reports the ratio B / A with the CPU model and flags.
``--precision`` is apply's: ``auto`` (default) runs each model as ``despeck apply`` would
on this machine (bfloat16 for models calibrated in it on CPUs with native bf16), ``32``
or ``bf16`` force one arithmetic for both; the precision each model ran in is printed.

Usage::

    python benchmarks/bench_speed_pair.py A.safetensors B.safetensors [--rounds 3] [--threads 2] [--size 2048]
        [--precision auto|32|bf16]

Writes ``bench_output/bench_speed_pair.json``.
"""

from __future__ import annotations

import argparse
import json
import pathlib
import sys
import time
import warnings

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

from bench_starter import cpu_info  # noqa: E402

from despeck.cpu import PRECISIONS, bf16_argument, precision_of  # noqa: E402
from despeck.inference import despeckle_array, resolve_bf16  # noqa: E402
from despeck.models import load_model_file  # noqa: E402
from despeck.scene_families import make_family_scene  # noqa: E402
from despeck.speckle import simulate_intensity  # noqa: E402


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("a")
    p.add_argument("b")
    p.add_argument("--rounds", type=int, default=3)
    p.add_argument("--threads", type=int, default=2)
    p.add_argument("--size", type=int, default=2048)
    p.add_argument("--precision", choices=("auto", *PRECISIONS), default="auto")
    args = p.parse_args(argv)
    bf16 = bf16_argument(args.precision)
    models = {"A": load_model_file(args.a), "B": load_model_file(args.b)}
    clean = make_family_scene("fields", (args.size, args.size), rng=4242, split="test")
    noisy = simulate_intensity(clean, 1.0, rng=np.random.default_rng(4243))
    best = {"A": float("inf"), "B": float("inf")}
    runs = {"A": [], "B": []}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(args.rounds):
            for key in ("A", "B"):
                start = time.perf_counter()
                despeckle_array(noisy, models[key], threads=args.threads, progress=False, bf16=bf16)
                t = time.perf_counter() - start
                runs[key].append(t)
                best[key] = min(best[key], t)
    mp = noisy.size / 1e6
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ran = {k: precision_of(resolve_bf16(m, bf16)) for k, m in models.items()}
    result = {
        "cpu": cpu_info(), "size": args.size, "threads": args.threads, "rounds": args.rounds,
        "A": {"file": args.a, "seconds": runs["A"], "mp_per_s": mp / best["A"], "precision": ran["A"]},
        "B": {"file": args.b, "seconds": runs["B"], "mp_per_s": mp / best["B"], "precision": ran["B"]},
        "ratio_b_over_a": best["A"] / best["B"],
    }
    out = ROOT / "bench_output" / "bench_speed_pair.json"
    out.parent.mkdir(exist_ok=True)
    out.write_text(json.dumps(result, indent=2))
    c = result["cpu"]
    print(f"CPU {c.get('model')} flags {', '.join(k for k, v in c.get('flags', {}).items() if v)}; load {c.get('load_average')}")
    for key, path in (("A", args.a), ("B", args.b)):
        print(f"{key} {path}: {result[key]['mp_per_s']:.2f} MP/s (best of {args.rounds}; precision {ran[key]})")
    print(f"speed B / A: {result['ratio_b_over_a']:.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
