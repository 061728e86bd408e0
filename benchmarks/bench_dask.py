"""Despeckling on a local Dask cluster vs the serial streamed path.

Run from the repository root (needs ``pip install 'despeck[dask]'``)::

    python benchmarks/bench_dask.py            # 8 scenes of 1024 x 1024, and one 4096 x 4096 scene (~3-5 min on 2 cores)
    python benchmarks/bench_dask.py --quick    # 8 scenes of 384 x 384, and one 2048 x 2048 scene (~1 min)

**Many scenes**: 8 small speckled scenes (procedural, :mod:`despeck.synthetic`, 1-look
speckle) despeckled by serial ``despeck apply --threads 2`` (one process) and by
:func:`despeck.distributed.apply_many` on a local cluster of 2 single-threaded worker
processes bound to 127.0.0.1. Reported: whether the outputs are identical to serial
``apply --threads 1`` (same arithmetic: oneDNN's float rounding depends on the thread
count) and their largest relative difference to the 2-thread serial outputs, the wall
times and their ratio (cluster start-up reported apart), and the peak resident memory of
the serial process and of each worker (``getrusage``; it includes the ~0.3-0.5 GB of the
imported libraries).

**One scene**: a 4096 x 4096 scene read lazily with ``rioxarray.open_rasterio`` in
chunks and despeckled with :func:`despeck.distributed.despeckle_dataarray`
(``map_overlap``, channels-last tiles as the streamed path picks them for scenes of
4 MP and more) on the same cluster, written with
:func:`despeck.distributed.write_dataarray`, compared with ``despeckle_file`` (the
streamed path): maximum relative difference over valid pixels (target of issue 12:
<= 1e-5) and each worker's resident memory before and at peak, beside the chunk size.

The model is the bundled starter model unless ``--model`` names another file. Figures
are printed and written to ``bench_output/bench_dask.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import pathlib
import resource
import shutil
import subprocess
import sys
import time

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parents[1]


def _peak_rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def _rss_mb():
    import psutil

    return psutil.Process().memory_info().rss / 2**20


def _scene(path, side, seed, looks=1.0):
    import rasterio
    from affine import Affine

    from despeck.synthetic import make_scene

    rng = np.random.default_rng([9300, seed])
    clean = np.asarray(make_scene((side, side), rng=rng), dtype=np.float32)
    noisy = (clean * rng.gamma(looks, 1.0 / looks, clean.shape)).astype(np.float32)
    with rasterio.open(path, "w", driver="GTiff", width=side, height=side, count=1, dtype="float32",
                       crs="EPSG:32633", transform=Affine(10.0, 0, 500000.0, 0, -10.0, 6500000.0), nodata=0.0,
                       tiled=True, blockxsize=512, blockysize=512) as ds:
        ds.write(noisy[None])
        ds.update_tags(looks=f"{looks:g}")
    return path


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller scenes")
    parser.add_argument("--model", help="model file (default: the bundled starter model)")
    parser.add_argument("--scenes", type=int, default=8)
    parser.add_argument("--side", type=int, help="side of the small scenes (default 1024, --quick 384)")
    parser.add_argument("--big", type=int, help="side of the big scene (default 4096, --quick 2048)")
    parser.add_argument("--chunk", type=int, default=1024, help="chunk side of the big scene (default 1024)")
    args = parser.parse_args(argv)
    import distributed
    import rasterio
    import rioxarray

    from despeck.cli.apply import starter_model_path
    from despeck.cpu import cpu_description
    from despeck.distributed import apply_many, despeckle_dataarray, write_dataarray
    from despeck.inference import despeckle_file
    from despeck.models import load_model_file

    model_path = pathlib.Path(args.model) if args.model else starter_model_path()
    small, big = (384, 2048) if args.quick else (1024, 4096)
    small, big, chunk = args.side or small, args.big or big, args.chunk
    out_dir = ROOT / "bench_output"
    work = out_dir / "bench_dask_work"
    shutil.rmtree(work, ignore_errors=True)
    (work / "in").mkdir(parents=True)
    print(f"CPU: {cpu_description()}")
    inputs = [_scene(work / "in" / f"scene_{i}.tif", small, i) for i in range(args.scenes)]
    record = {"cpu": cpu_description(), "model": str(model_path), "scene_side": small, "scenes": args.scenes}

    # ---- serial apply, 2 threads, its own process
    env = dict(os.environ, OMP_NUM_THREADS="2", MKL_NUM_THREADS="2")
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "despeck", "apply", *map(str, inputs), "--model", str(model_path),
                           "--out-dir", str(work / "serial"), "--threads", "2", "--quiet"],
                          env=env, capture_output=True, text=True)
    serial_s = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"serial apply failed: {proc.stderr[-2000:]}")
    serial_peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    print(f"serial apply, 2 threads: {serial_s:.1f} s (process start included); peak memory {serial_peak:.0f} MB")
    env1 = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    proc = subprocess.run([sys.executable, "-m", "despeck", "apply", *map(str, inputs), "--model", str(model_path),
                           "--out-dir", str(work / "serial1"), "--threads", "1", "--quiet"],
                          env=env1, capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"serial apply (1 thread) failed: {proc.stderr[-2000:]}")

    # ---- local cluster of 2 single-threaded worker processes
    t0 = time.perf_counter()
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, protocol="tcp",
                                       host="127.0.0.1", dashboard_address=None, silence_logs=40,
                                       env={"OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"})
    client = distributed.Client(cluster)
    client.run(lambda: __import__("despeck.inference"))  # libraries imported, as in a warm cluster
    start_s = time.perf_counter() - t0
    try:
        outputs = [work / "dask" / p.name.replace(".tif", "_despeckled.tif") for p in inputs]
        t0 = time.perf_counter()
        results = apply_many(inputs, outputs, model_path, client)
        dask_s = time.perf_counter() - t0
        statuses = sorted({r.status for r in results})
        identical, rel2 = True, 0.0
        for o in outputs:
            with rasterio.open(o) as d, rasterio.open(work / "serial1" / o.name) as s1, \
                    rasterio.open(work / "serial" / o.name) as s2:
                a, b1, b2 = d.read(1), s1.read(1), s2.read(1)
            identical &= bool(np.array_equal(a, b1, equal_nan=True))
            ok = np.isfinite(b2) & (b2 > 0)
            rel2 = max(rel2, float(np.max(np.abs(a[ok] - b2[ok]) / b2[ok])))
        peaks = client.run(_peak_rss_mb)
        print(f"dask, 2 workers x 1 thread: {dask_s:.1f} s (+ {start_s:.1f} s cluster start); statuses {statuses}; "
              f"identical to serial apply with 1 thread: {identical}; max relative difference to 2 threads "
              f"{rel2:.1e}; worker peak memory " + ", ".join(f"{v:.0f} MB" for v in peaks.values()))
        print(f"wall-time ratio dask / serial: {dask_s / serial_s:.2f} "
              f"({(dask_s + start_s) / serial_s:.2f} with the cluster start)")
        record["many_scenes"] = {
            "serial_seconds": serial_s, "serial_peak_mb": serial_peak, "dask_seconds": dask_s,
            "cluster_start_seconds": start_s, "ratio_dask_over_serial": dask_s / serial_s,
            "ratio_with_start": (dask_s + start_s) / serial_s, "identical_to_serial_1_thread": identical,
            "max_relative_difference_to_serial_2_threads": rel2,
            "statuses": statuses, "worker_peak_mb": list(peaks.values()),
        }

        # ---- one big scene, chunked (fresh workers: peak memory is this part's alone)
        client.restart()
        client.run(lambda: __import__("despeck.inference"))
        scene = _scene(work / "big.tif", big, 99)
        model = load_model_file(model_path)
        t0 = time.perf_counter()
        despeckle_file(scene, work / "big_streamed.tif", model, threads=2, progress=False)
        streamed_s = time.perf_counter() - t0
        before = client.run(_rss_mb)
        t0 = time.perf_counter()
        da = rioxarray.open_rasterio(scene, chunks={"band": 1, "y": chunk, "x": chunk})
        result = despeckle_dataarray(da, model_path, chunk=chunk, channels_last=True)
        write_dataarray(result, work / "big_dask.tif", client=client)
        chunked_s = time.perf_counter() - t0
        peaks = client.run(_peak_rss_mb)
        with rasterio.open(work / "big_streamed.tif") as a, rasterio.open(work / "big_dask.tif") as b:
            x, y = a.read(1), b.read(1)
        ok = np.isfinite(x) & (x > 0)
        rel = float(np.max(np.abs(y[ok] - x[ok]) / x[ok]))
        print(f"{big}x{big} scene: streamed {streamed_s:.1f} s (2 threads); map_overlap on 2 workers "
              f"{chunked_s:.1f} s ({result.attrs['despeck_tiling']}); max relative "
              f"difference {rel:.2e} (target <= 1e-5: {'pass' if rel <= 1e-5 else 'FAIL'}); worker memory "
              + ", ".join(f"{before[k]:.0f} -> peak {peaks[k]:.0f} MB" for k in peaks))
        record["one_scene"] = {
            "side": big, "chunk": chunk, "tiling": result.attrs["despeck_tiling"], "streamed_seconds": streamed_s,
            "map_overlap_seconds": chunked_s, "max_relative_difference": rel,
            "worker_rss_before_mb": list(before.values()), "worker_peak_mb": list(peaks.values()),
        }
    finally:
        client.close()
        cluster.close()
    (out_dir / "bench_dask.json").write_text(json.dumps(record, indent=2) + "\n")
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
