"""Training throughput of every architecture, and a long run that measures what training buys.

Run from the repository root::

    python benchmarks/bench_training.py                     # throughput, about 2 minutes
    python benchmarks/bench_training.py --seconds 20        # longer timing per case
    python benchmarks/bench_training.py --long              # 30 + 30 minutes of training, then PSNR
    python benchmarks/bench_training.py --long --stages 30,60,120 --images skimage

**Throughput** times full training steps (normalise, forward, loss, backward, Adam) of
each size-``s``/``m`` network on batches of 16 patches of 64 x 64, in float32 and, when
the CPU has native bfloat16, with bf16 autocast, channels-last as the trainer runs them.
It reports patches per second of wall time and per CPU-second (on a shared machine the
wall figure depends on what else runs).

**Long mode** trains the default architecture (``configs/overnight.yaml``: logcnn-s,
64 x 64 patches, 1-look speckle, log-MSE) on procedural scenes (:mod:`despeck.synthetic`;
``--images skimage`` adds scikit-image's bundled grey images as clean references). It
trains until the first stage's budget (default 30 min), evaluates, then resumes the same
run until the next stage's total budget (default 60 min) and evaluates again -- resuming
gives the same result as an uninterrupted run, so the stages are checkpoints of one run.
Each stage's model is kept as ``bench_output/train_long/model-<N>min.safetensors``.
Evaluation: three held-out procedural 512 x 512 scenes (seeds never used for training)
with 1-look speckle, PSNR in the dB domain as every despeck report gives it (both clipped to
the clean scene's 1st-99.9th dB percentiles, peak = that span; :func:`despeck.metrics.fidelity_db`), for the
model (tiled inference, :func:`despeck.inference.despeckle_array`) and for every
classical filter in :mod:`despeck.filters` at its default window; the best filter is the
baseline. Target (issue 4): the model >= 1.5 dB above the best classical filter at 60 min.

Figures are printed and written to ``bench_output/bench_training.json`` (throughput)
and ``bench_output/bench_training_long.json`` (long mode).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import pathlib
import platform
import shutil
import time

import numpy as np
import torch

from despeck.cpu import bf16_supported, usable_cores
from despeck.models import Despeckler, create_model
from despeck.training.losses import DespeckleLoss
from despeck.training.trainer import configure_cpu

ROOT = pathlib.Path(__file__).resolve().parents[1]
ARCHITECTURES = ["logcnn-s", "logcnn-m", "unet-s", "unet-m"]


def _batch(rng, n=16, side=64, looks=1.0):
    from despeck.synthetic import make_scene

    scene = make_scene((256, 256), rng=rng)
    rows = rng.integers(0, 256 - side, n)
    cols = rng.integers(0, 256 - side, n)
    clean = np.stack([scene[r:r + side, c:c + side] for r, c in zip(rows, cols)])[:, None].astype(np.float32)
    noisy = clean * rng.gamma(looks, 1 / looks, clean.shape).astype(np.float32)
    return {
        "noisy": torch.from_numpy(noisy), "target": torch.from_numpy(clean),
        "valid": torch.ones(clean.shape, dtype=torch.bool), "looks": torch.full((n,), looks),
        "log_offset": torch.full((n,), float(np.log(clean).mean() + (-0.5772156649))),
    }


def throughput(name, precision, seconds, batch):
    torch.manual_seed(0)
    model = Despeckler(create_model(name), looks=1)
    model.network.to(memory_format=torch.channels_last)
    loss_fn = DespeckleLoss("mse_log", "clean")
    opt = torch.optim.Adam(model.parameters(), lr=1e-4)

    def step():
        opt.zero_grad(set_to_none=True)
        with torch.autocast("cpu", dtype=torch.bfloat16, enabled=precision == "bf16"):
            z, off, _ = model.normalise(batch["noisy"], batch["valid"], batch["log_offset"])
            y = model.network(z.contiguous(memory_format=torch.channels_last))
        loss = loss_fn(model.denormalise(y.float(), off), batch)
        loss.backward()
        opt.step()

    for _ in range(2):
        step()
    n, t0, c0 = 0, time.perf_counter(), time.process_time()
    while time.perf_counter() - t0 < seconds or n < 3:
        step()
        n += 1
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    patches = n * batch["noisy"].shape[0]
    return {"architecture": name, "precision": precision, "steps": n,
            "parameters": sum(p.numel() for p in model.parameters()),
            "receptive_field": model.receptive_field,
            "patches_per_s": patches / wall, "patches_per_cpu_s": patches / cpu}


# --------------------------------------------------------------------------- long mode

def _skimage_references(folder: pathlib.Path) -> list:
    """Write scikit-image's bundled grey images as clean intensity GeoTIFFs (grey^2, floored)."""
    import rasterio
    from affine import Affine
    from skimage import data, img_as_float

    paths = []
    for name in ("camera", "moon", "coins", "grass", "gravel", "brick", "text"):
        img = img_as_float(getattr(data, name)())
        if img.ndim != 2:
            continue
        intensity = (np.maximum(img, 0.02) ** 2 * 0.1).astype(np.float32)  # 0.1 ~ -10 dB peak
        path = folder / f"{name}.tif"
        with rasterio.open(path, "w", driver="GTiff", height=img.shape[0], width=img.shape[1], count=1,
                           dtype="float32", transform=Affine(10.0, 0.0, 0.0, 0.0, -10.0, 0.0)) as dst:
            dst.write(intensity, 1)
        paths.append(str(path))
    return paths


def _psnr_db(clean, estimate):
    """dB-domain PSNR as the benchmark reports and the training log measure it (despeck.metrics.fidelity_db)."""
    from despeck.metrics import fidelity_db

    return float(fidelity_db(clean, estimate)["psnr_db"])


def _held_out_scenes(n=3, side=512):
    from despeck.synthetic import make_scene

    scenes = []
    for i in range(n):
        clean = np.asarray(make_scene((side, side), rng=np.random.default_rng([987654, i])), dtype=np.float32)
        noisy = (clean * np.random.default_rng([987655, i]).gamma(1.0, 1.0, clean.shape)).astype(np.float32)
        scenes.append((clean, noisy))
    return scenes


def _filter_scores(scenes, looks=1.0):
    from despeck import filters

    scores = {"noisy": float(np.mean([_psnr_db(c, n) for c, n in scenes]))}
    for name, fn in filters.FILTERS.items():
        t = time.perf_counter()
        try:
            scores[name] = float(np.mean([_psnr_db(c, fn(n, looks=looks, window=filters.DEFAULT_WINDOWS[name]))
                                          for c, n in scenes]))
        except Exception as exc:  # a filter failing must not hide the others' figures
            scores[name] = f"failed: {exc}"
        print(f"  {name:15s} {scores[name] if isinstance(scores[name], str) else round(scores[name], 2)} dB"
              f"  ({time.perf_counter() - t:.1f} s)")
    return scores


def _model_score(model_path, scenes):
    from despeck.inference import despeckle_array
    from despeck.models import load_model_file

    model = load_model_file(model_path)
    return float(np.mean([_psnr_db(c, despeckle_array(n, model, progress=False)) for c, n in scenes]))


def long_mode(args, out_dir):
    from despeck.training import load_config, train

    work = out_dir / "train_long"
    if work.exists() and not args.resume:
        shutil.rmtree(work)
    work.mkdir(parents=True, exist_ok=True)
    overrides = [f"output.dir={work / 'run'}", "trainer.progress=false"]
    if args.images == "skimage":
        refs = work / "skimage_refs"
        refs.mkdir(exist_ok=True)
        overrides.append(f"data.train={json.dumps(_skimage_references(refs))}")
    overrides += args.set or []
    scenes = _held_out_scenes()
    print("held-out scenes: 3 x 512 x 512 procedural, 1-look; PSNR in dB domain")
    record = {"mode": "long", "stages": [], "machine": platform.processor() or platform.machine(),
              "threads": usable_cores(), "overrides": overrides}
    print("classical filters at default windows:")
    record["filters"] = _filter_scores(scenes)
    numeric = {k: v for k, v in record["filters"].items() if k != "noisy" and isinstance(v, float)}
    best_filter = max(numeric, key=numeric.get)
    record["best_filter"] = {"name": best_filter, "psnr_db": numeric[best_filter]}
    resume = args.resume and (work / "run" / "checkpoints" / "last.ckpt").is_file()
    for minutes in args.stages:
        config = load_config(ROOT / "configs" / "overnight.yaml",
                             overrides + [f"budget.max_time={minutes}m", "budget.early_stopping=0"])
        t = time.perf_counter()
        result = train(config, resume=resume, progress=not args.quiet)
        resume = True
        kept = work / f"model-{minutes}min.safetensors"
        shutil.copyfile(result.model_path, kept)
        psnr = _model_score(kept, scenes)
        stage = {"minutes": minutes, "epochs": result.epochs, "steps": result.steps,
                 "patches": result.steps * config.data.batch_size, "psnr_db": psnr,
                 "gain_over_best_filter_db": psnr - numeric[best_filter],
                 "validation": result.best_metrics, "model": str(kept),
                 "wall_s_this_stage": time.perf_counter() - t}
        record["stages"].append(stage)
        print(f"after {minutes} min: {result.steps} steps, model {psnr:.2f} dB, best filter "
              f"{best_filter} {numeric[best_filter]:.2f} dB, gain {stage['gain_over_best_filter_db']:+.2f} dB")
        (out_dir / "bench_training_long.json").write_text(json.dumps(record, indent=2, default=str) + "\n")
    print(f"written {out_dir / 'bench_training_long.json'}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=8.0, help="timing per case (throughput mode)")
    parser.add_argument("--architectures", default=",".join(ARCHITECTURES))
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: usable cores)")
    parser.add_argument("--long", action="store_true", help="train the default model in stages and evaluate")
    parser.add_argument("--stages", default="30,60", help="cumulative training minutes at which to evaluate")
    parser.add_argument("--images", choices=["none", "skimage"], default="none",
                        help="also train on scikit-image's bundled grey images")
    parser.add_argument("--set", action="append", help="extra config override for the long run (repeatable)")
    parser.add_argument("--resume", action="store_true", help="long mode: continue an earlier run")
    parser.add_argument("--quiet", action="store_true")
    args = parser.parse_args(argv)
    args.stages = [int(s) for s in str(args.stages).split(",") if s.strip()]
    out_dir = ROOT / "bench_output"
    out_dir.mkdir(exist_ok=True)
    threads = configure_cpu(args.threads)
    if args.long:
        return long_mode(args, out_dir)

    precisions = ["32"] + (["bf16"] if bf16_supported() else [])
    batch = _batch(np.random.default_rng(0))
    record = {"mode": "throughput", "threads": threads, "batch": "16 x 1 x 64 x 64",
              "machine": platform.processor() or platform.machine(), "bf16_supported": bf16_supported(),
              "torch": torch.__version__, "results": []}
    print(f"training throughput, batch 16 of 64x64 patches, {threads} threads, channels-last")
    for name in args.architectures.split(","):
        for precision in precisions:
            load = os.getloadavg()[0]
            r = throughput(name, precision, args.seconds, batch)
            r["load_before"] = load
            record["results"].append(r)
            print(f"  {name:9s} {precision:>4s}  {r['parameters'] / 1e3:6.0f}k params  rf {r['receptive_field']:3d}"
                  f"  {r['patches_per_s']:7.1f} patches/s  {r['patches_per_cpu_s']:7.1f} patches/CPU-s"
                  f"  (load {load:.1f})")
    (out_dir / "bench_training.json").write_text(json.dumps(record, indent=2) + "\n")
    print(f"written {out_dir / 'bench_training.json'}")


if __name__ == "__main__":
    main()
