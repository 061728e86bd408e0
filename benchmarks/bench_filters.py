"""Throughput of every classical filter on a large scene, and against a naive per-pixel loop.

Run from the repository root::

    python benchmarks/bench_filters.py                 # 4096 x 4096, 2 threads
    python benchmarks/bench_filters.py --size 1024 --workers 1

The scene is the project's synthetic landscape (1024 x 1024, tiled to the requested
size) with 1-look speckle. Each filter runs once on a small crop first (which also
computes the cached radiometric calibration of Gamma-MAP, refined Lee and the sigma
filter) and is then timed on the whole scene with ``--workers`` threads. The naive
reference computes the same filter pixel by pixel -- one call of the filter's kernel
per pixel on that pixel's own neighbourhood -- on a small crop; it must give the same
bits, which also shows that every output pixel depends only on its neighbourhood.

Targets (issue 3): boxcar, Lee, Kuan, enhanced Lee, Gamma-MAP >= 10 MP/s; refined Lee,
Frost, improved sigma >= 2 MP/s; the non-local filter has none. Figures are printed
and written to ``bench_output/bench_filters.json``, with the CPU time (MP per CPU-second)
and the load average before each run: on a shared machine the wall-clock figure
depends on what else runs, the CPU-time figure much less.
"""

from __future__ import annotations

import argparse
import json
import os
import pathlib
import platform
import time

import numpy as np

from despeck import filters, synthetic
from despeck.speckle import simulate_intensity

TARGETS = {"boxcar": 10, "lee": 10, "kuan": 10, "enhanced-lee": 10, "gamma-map": 10,
           "refined-lee": 2, "frost": 2, "improved-sigma": 2, "nonlocal": None}


def make_scene(size: int) -> np.ndarray:
    tile = synthetic.make_scene((1024, 1024), rng=0)
    reps = -(-size // 1024)
    clean = np.tile(tile, (reps, reps))[:size, :size]
    return simulate_intensity(clean, 1, rng=np.random.default_rng(1))


def naive_per_pixel(name, image, looks, options):
    """The filter computed one pixel at a time from that pixel's own padded neighbourhood."""
    window = filters.DEFAULT_WINDOWS[name]
    plan = filters.filter_entry(name).plan(looks, window, **options)
    img, valid = filters.as_image(image)
    out = np.empty(image.shape, dtype=np.float32)
    h = plan.halo
    padded, ok = filters.engine.pad_block(img, valid, 0, img.shape[0], h)
    for r in range(img.shape[0]):
        for c in range(img.shape[1]):
            block = padded[r : r + 2 * h + 1, c : c + 2 * h + 1]
            mask = ok[r : r + 2 * h + 1, c : c + 2 * h + 1]
            out[r, c] = filters.engine.call_kernel(plan, block, mask)[0, 0]
    return out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=4096)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--crop", type=int, default=24, help="side of the naive-loop crop")
    parser.add_argument("--only", nargs="*", default=None, help="filters to run (default all)")
    args = parser.parse_args(argv)

    t0 = time.perf_counter()
    image = make_scene(args.size)
    print(f"scene {args.size} x {args.size} ({image.size / 1e6:.1f} MP) made in {time.perf_counter() - t0:.1f} s; "
          f"{args.workers} worker thread(s), {os.cpu_count()} CPUs visible")
    crop = image[1000 : 1000 + args.crop, 1000 : 1000 + args.crop]
    rows = []
    for name in args.only or list(filters.FILTERS):
        f = filters.FILTERS[name]
        options = {}
        if name == "improved-sigma":
            options["point_threshold"] = float(np.percentile(image[::4, ::4], 98))
        f(image[:256, :256], looks=1, **options)  # warm-up and calibration
        load = os.getloadavg()[0]
        start, cpu = time.perf_counter(), time.process_time()
        out = f(image, looks=1, workers=args.workers, **options)
        seconds = time.perf_counter() - start
        cpu_seconds = time.process_time() - cpu
        mps = image.size / seconds / 1e6
        start = time.perf_counter()
        naive = naive_per_pixel(name, crop, 1.0, options)
        naive_s = time.perf_counter() - start
        naive_mps = crop.size / naive_s / 1e6
        vector_crop = f(crop, looks=1, **options)
        same = bool(np.array_equal(naive, vector_crop))
        target = TARGETS[name]
        verdict = "-" if target is None else ("meets" if mps >= target else "misses")
        rows.append({"filter": name, "seconds": seconds, "cpu_seconds": cpu_seconds, "load_before": load,
                     "mp_per_cpu_s": image.size / cpu_seconds / 1e6, "mp_per_s": mps, "target_mp_per_s": target,
                     "verdict": verdict, "naive_mp_per_s": naive_mps, "speedup_vs_naive": mps / naive_mps,
                     "naive_equal": same, "finite": bool(np.isfinite(out).all())})
        print(f"{name:15s} {seconds:7.2f} s {mps:8.2f} MP/s ({image.size / cpu_seconds / 1e6:6.2f} MP per CPU-s, "
              f"load {load:.1f})  target {target if target else '-':>3}  {verdict:6s} "
              f"naive {naive_mps * 1e6:7.0f} px/s  x{mps / naive_mps:6.0f}  naive equal: {same}")
    out_dir = pathlib.Path("bench_output")
    out_dir.mkdir(exist_ok=True)
    record = {"size": args.size, "workers": args.workers, "cpus": os.cpu_count(), "machine": platform.machine(),
              "python": platform.python_version(), "numpy": np.__version__, "results": rows}
    (out_dir / "bench_filters.json").write_text(json.dumps(record, indent=2) + "\n")
    print(f"written {out_dir / 'bench_filters.json'}")


if __name__ == "__main__":
    main()
