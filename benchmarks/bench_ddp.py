"""Distributed data parallel training on one machine: 2 processes x 1 thread vs 1 process x 2 threads.

Run from the repository root::

    python benchmarks/bench_ddp.py              # logcnn-s, 64 x 64 patches, batch 16, 20 steps each (~2 min on 2 cores)
    python benchmarks/bench_ddp.py --quick      # logcnn-xs, 48 x 48 patches, 12 steps each (~40 s)

Both runs train the same configuration with the same seed and global batch
(``data.batch_size``; each of the two processes takes half of every batch) for the same
number of steps, through :func:`despeck.training.train` -- the two-process run with
``trainer.processes_per_node: 2`` (Lightning's DDP over gloo on localhost; Lightning
starts the second process by running this script again with ``LOCAL_RANK`` set). It
reports training throughput in patches per second of wall time, timed over the training
steps only (forward, backward, gradient exchange, optimiser; the first two steps are
left out as warm-up, validation and start-up are not counted), and the validation loss
of both runs after the last step with their relative difference (target of issue 12:
within 2 %).

Figures are printed and written to ``bench_output/bench_ddp.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import pathlib
import shutil
import subprocess
import sys
import time

ROOT = pathlib.Path(__file__).resolve().parents[1]
TINY = ROOT / "configs" / "tiny.yaml"
WARMUP = 2


def _overrides(args, out, processes, threads):
    return [
        f"output.dir={out}", f"model.name={args.model}", f"data.patch_size={args.patch}",
        f"data.batch_size={args.batch}", f"data.patches_per_epoch={args.batch * args.steps}",
        f"data.val_patches={args.batch}", f"data.synthetic_size={max(256, 4 * args.patch)}",
        "budget.max_epochs=1", "budget.max_time=null", f"trainer.processes_per_node={processes}",
        f"trainer.threads={threads}", "trainer.progress=false",
    ]


def run_one(args) -> None:
    """One training run (both processes of the DDP run come here); process 0 writes the timing."""
    import lightning.pytorch as pl

    from despeck.training import load_config, train

    class StepTimer(pl.Callback):
        def __init__(self):
            self.seconds, self.steps, self._t = 0.0, 0, None

        def on_train_batch_start(self, trainer, pl_module, batch, batch_idx):
            self._t = time.perf_counter()

        def on_train_batch_end(self, trainer, pl_module, outputs, batch, batch_idx):
            if batch_idx >= WARMUP:
                self.seconds += time.perf_counter() - self._t
                self.steps += 1

    timer = StepTimer()
    config = load_config(TINY, _overrides(args, args.out, args.processes, args.threads))
    result = train(config, progress=False, callbacks=[timer])
    if result.rank != 0:
        return
    import csv

    rows = [r for r in csv.DictReader(open(result.metrics_path, newline="")) if r.get("val_loss")]
    record = {
        "processes": args.processes, "threads_per_process": args.threads, "global_batch": args.batch,
        "steps": result.steps, "timed_steps": timer.steps, "train_seconds": timer.seconds,
        "patches_per_s": timer.steps * args.batch / timer.seconds if timer.seconds else None,
        "val_loss": float(rows[-1]["val_loss"]),
    }
    (pathlib.Path(args.out) / "timing.json").write_text(json.dumps(record) + "\n")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a smaller model and fewer steps")
    parser.add_argument("--model", default=None)
    parser.add_argument("--patch", type=int, default=None)
    parser.add_argument("--batch", type=int, default=16)
    parser.add_argument("--steps", type=int, default=None)
    # internal: one run (re-run by Lightning for the second process)
    parser.add_argument("--run", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--out", help=argparse.SUPPRESS)
    parser.add_argument("--processes", type=int, default=1, help=argparse.SUPPRESS)
    parser.add_argument("--threads", type=int, default=1, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    args.model = args.model or ("logcnn-xs" if args.quick else "logcnn-s")
    args.patch = args.patch or (48 if args.quick else 64)
    args.steps = args.steps or (12 if args.quick else 20)
    if args.run:
        run_one(args)
        return

    from despeck.cpu import cpu_description, usable_cores

    out_dir = ROOT / "bench_output"
    work = out_dir / "bench_ddp_work"
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    cores = usable_cores()
    print(f"CPU: {cpu_description()}; {cores} usable cores")
    if cores < 2:
        print("fewer than 2 usable cores: the comparison needs 2")
        return
    results = {}
    for name, processes, threads in (("1 process x 2 threads", 1, 2), ("2 processes x 1 thread", 2, 1)):
        run_dir = work / f"p{processes}t{threads}"
        cmd = [sys.executable, str(pathlib.Path(__file__).resolve()), "--run", "--out", str(run_dir),
               "--processes", str(processes), "--threads", str(threads), "--model", args.model,
               "--patch", str(args.patch), "--batch", str(args.batch), "--steps", str(args.steps)]
        env = {k: v for k, v in os.environ.items() if k not in ("LOCAL_RANK", "NODE_RANK", "WORLD_SIZE")}
        env.update(MASTER_ADDR="127.0.0.1", OMP_NUM_THREADS=str(threads), MKL_NUM_THREADS=str(threads))
        t0 = time.perf_counter()
        proc = subprocess.run(cmd, env=env, capture_output=True, text=True)
        wall = time.perf_counter() - t0
        if proc.returncode != 0:
            raise SystemExit(f"{name} failed:\n{proc.stderr[-3000:]}")
        rec = json.loads((run_dir / "timing.json").read_text())
        rec["command_wall_s"] = wall
        results[name] = rec
        print(f"{name}: {rec['patches_per_s']:.1f} patches/s over {rec['timed_steps']} steps "
              f"(command {wall:.1f} s with start-up and validation); validation loss {rec['val_loss']:.6f}")
    one, two = results["1 process x 2 threads"], results["2 processes x 1 thread"]
    rel = abs(two["val_loss"] - one["val_loss"]) / abs(one["val_loss"])
    speed = two["patches_per_s"] / one["patches_per_s"]
    print(f"validation loss difference: {100 * rel:.4f} % (target: within 2 %: {'pass' if rel <= 0.02 else 'FAIL'})")
    print(f"throughput 2x1 / 1x2: {speed:.2f}")
    record = {"cpu": cpu_description(), "usable_cores": cores, "model": args.model, "patch": args.patch,
              "global_batch": args.batch, "steps": args.steps, "runs": results,
              "val_loss_relative_difference": rel, "throughput_ratio_2x1_over_1x2": speed}
    (out_dir / "bench_ddp.json").write_text(json.dumps(record, indent=2) + "\n")
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
