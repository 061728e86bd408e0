"""Benchmark of the foundation: speckle simulation speed and memory of streamed raster passes.

Run from the repository root::

    .venv/bin/python benchmarks/bench_foundation.py            # full run (needs ~1.5 GB of disk)
    .venv/bin/python benchmarks/bench_foundation.py --quick    # 2048 / 4096 scenes, for a smoke test

It measures

* simulation throughput (megapixels per second) on a 4096 x 4096 scene for white
  L-look speckle (:func:`despeck.speckle.simulate_intensity`), correlated speckle
  (:func:`despeck.speckle.simulate_correlated_intensity`) and the tile-by-tile
  :class:`despeck.speckle.SpeckleField` used by ``despeck simulate``;
* the peak resident memory (``VmHWM`` of /proc/self/status, with ``ru_maxrss`` beside
  it) of a windowed read / convert / write pass
  (linear intensity in, dB out, block by block) over a 16384 x 16384 float32 GeoTIFF
  and over a 4096 x 4096 one, each pass in its own fresh process, plus the same for
  the streaming helper :func:`despeck.raster.process_file`. Memory must stay flat: the
  large file is 16 times the small one. (``ru_maxrss`` is reported too, but on Linux
  it can carry over the peak of the parent process across fork and exec, so the
  ``VmHWM`` figure is the one to read.)

Figures are printed and written to ``bench_output/bench_foundation.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import pathlib
import platform
import subprocess
import sys
import tempfile
import time

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parents[1]

# Runs in a fresh interpreter: one pass over a file, then report this process's peak RSS.
PASS_SCRIPT = r"""
import resource, sys, time
import numpy as np
from despeck import raster

mode, src, dst = sys.argv[1:4]
start = time.perf_counter()
if mode == "blocks":
    with raster.open_scene(src, units="intensity") as reader:
        with raster.open_output(dst, reader, units="db", overwrite=True) as writer:
            for w in reader.block_windows():
                intensity, valid = reader.read(w)
                writer.write(intensity, w, valid=valid)
elif mode == "process_file":
    raster.process_file(src, dst, lambda i, v, r, c: i[16:-16, 16:-16], halo=16, units="intensity",
                        out_units="db", overwrite=True, progress=False)
elif mode == "baseline":
    with raster.open_scene(src, units="intensity") as reader:
        reader.read(reader.block_windows()[0])
seconds = time.perf_counter() - start
# VmHWM is this process's own peak; ru_maxrss can carry the parent's peak over fork+exec on Linux.
hwm_kib = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM:"))
maxrss_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
print(f"{hwm_kib} {maxrss_kib} {seconds}")
"""


def best_time(func, repeats):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        times.append(time.perf_counter() - t0)
    return min(times)


def bench_simulation(size, repeats):
    from despeck import speckle

    reference = np.ones((size, size), dtype=np.float32)
    megapixels = size * size / 1e6
    rng = np.random.default_rng(0)
    results = {}
    cases = {
        "white_L4": lambda: speckle.simulate_intensity(reference, 4, rng=rng),
        "correlated_L1": lambda: speckle.simulate_correlated_intensity(reference, 1, rng=rng),
        "correlated_L4": lambda: speckle.simulate_correlated_intensity(reference, 4, rng=rng),
    }
    white_field = speckle.SpeckleField(4, seed=1)
    corr_field = speckle.SpeckleField(1, seed=1, correlated=True)

    def field_pass(field):
        tile, halo = 512, field.halo
        padded = np.pad(np.ones((tile, tile), dtype=np.float32), halo)
        for row in range(0, size, tile):
            for col in range(0, size, tile):
                field.speckle(padded, row, col)

    cases["field_white_L4"] = lambda: field_pass(white_field)
    cases["field_correlated_L1"] = lambda: field_pass(corr_field)
    for name, func in cases.items():
        seconds = best_time(func, repeats)
        results[name] = {"seconds": round(seconds, 3), "megapixels_per_second": round(megapixels / seconds, 2)}
        print(f"simulate {name:<22} {size}x{size}: {seconds:7.3f} s  {megapixels / seconds:8.2f} MP/s", flush=True)
    return results


def write_test_file(path, size):
    """A tiled float32 GeoTIFF of L=1 speckle, written block by block (never whole in memory)."""
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    rng = np.random.default_rng(1)
    profile = dict(driver="GTiff", width=size, height=size, count=1, dtype="float32", crs="EPSG:32631",
                   transform=from_origin(500000, 5000000, 10, 10), tiled=True, blockxsize=512, blockysize=512,
                   nodata=0.0, bigtiff="IF_SAFER")
    with rasterio.open(path, "w", **profile) as ds:
        for row in range(0, size, 512):
            for col in range(0, size, 512):
                block = rng.standard_exponential((512, 512), dtype=np.float32)
                ds.write(block, 1, window=Window(col, row, 512, 512))


def run_pass(mode, src, dst):
    env = dict(os.environ, OMP_NUM_THREADS="1")
    out = subprocess.run([sys.executable, "-c", PASS_SCRIPT, mode, str(src), str(dst)], capture_output=True,
                         text=True, env=env, check=True).stdout.split()
    return {"peak_rss_mib": round(int(out[0]) / 1024, 1), "ru_maxrss_mib": round(int(out[1]) / 1024, 1),
            "seconds": round(float(out[2]), 2)}


def bench_memory(sizes, workdir):
    results = {}
    for size in sizes:
        src = workdir / f"scene_{size}.tif"
        t0 = time.perf_counter()
        write_test_file(src, size)
        print(f"wrote {size}x{size} test file ({src.stat().st_size / 2**20:.0f} MiB) in {time.perf_counter() - t0:.1f} s",
              flush=True)
        entry = {"file_mib": round(src.stat().st_size / 2**20, 1)}
        for mode in ("baseline", "blocks", "process_file"):
            dst = workdir / f"out_{size}_{mode}.tif"
            entry[mode] = run_pass(mode, src, dst)
            print(f"pass {mode:<13} {size:>5}x{size:<5}: peak RSS {entry[mode]['peak_rss_mib']:7.1f} MiB, "
                  f"{entry[mode]['seconds']:6.1f} s", flush=True)
            if dst.exists():
                dst.unlink()
        src.unlink()
        results[str(size)] = entry
    return results


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller scenes (smoke test)")
    parser.add_argument("--repeats", type=int, default=3, help="timing repeats (best is kept)")
    args = parser.parse_args(argv)
    sim_size = 2048 if args.quick else 4096
    mem_sizes = (2048, 4096) if args.quick else (4096, 16384)
    report = {
        "machine": {"python": platform.python_version(), "cpu_count": os.cpu_count(), "platform": platform.platform()},
        "simulation": bench_simulation(sim_size, args.repeats),
    }
    with tempfile.TemporaryDirectory(dir=ROOT / "bench_output" if (ROOT / "bench_output").exists() else None) as tmp:
        report["windowed_pass"] = bench_memory(mem_sizes, pathlib.Path(tmp))
    small, large = (report["windowed_pass"][str(s)] for s in mem_sizes)
    for mode in ("blocks", "process_file"):
        growth = large[mode]["peak_rss_mib"] / small[mode]["peak_rss_mib"]
        report["windowed_pass"][f"{mode}_rss_ratio_large_over_small"] = round(growth, 3)
        print(f"{mode}: peak RSS {large[mode]['peak_rss_mib']} MiB vs {small[mode]['peak_rss_mib']} MiB "
              f"(x{growth:.2f} for x{(mem_sizes[1] / mem_sizes[0]) ** 2:.0f} pixels)")
    out_dir = ROOT / "bench_output"
    out_dir.mkdir(exist_ok=True)
    path = out_dir / ("bench_foundation_quick.json" if args.quick else "bench_foundation.json")
    path.write_text(json.dumps(report, indent=2))
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
