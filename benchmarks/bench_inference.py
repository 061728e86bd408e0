"""Benchmark of tiled, streamed inference (``despeck apply``): speed, memory, bfloat16.

Run from the repository root::

    .venv/bin/python benchmarks/bench_inference.py             # full run (~1.5 GB disk, long on 2 cores)
    .venv/bin/python benchmarks/bench_inference.py --quick     # small scenes, a smoke test
    .venv/bin/python benchmarks/bench_inference.py --only speed --repeats 3

It measures, with ``--threads`` torch threads (default 2):

(i) **speed**: end-to-end megapixels per second of
    :func:`despeck.inference.despeckle_file` on a simulated 8192 x 8192 float32
    GeoTIFF (read, normalise, tile, infer, blend, write a DEFLATE GeoTIFF) against the
    bare model forward over the same pixels held in memory as 1024 x 1024 tensors (no
    overlap, no I/O, no blending, same memory format). Both are measured in one run:
    one bare chunk is run (and timed apart) after each tile of the end-to-end pass, so
    a shared machine's changing load hits both alike; the end-to-end time excludes the
    bare chunks. The ratio of the two rates is reported per run (target >= 0.85);
(ii) **memory**: peak resident memory (``VmHWM``; ``ru_maxrss`` beside it) of a fresh
    process running ``despeckle_file`` on a 4096^2 and a 16384^2 scene (targets: ratio
    <= 1.2, absolute <= 1.5 GB), and of a process that only imports torch and loads
    the model, for reference;
(iii) **bf16**: time and PSNR of :func:`despeck.inference.despeckle_array` on a
    simulated 1-look scene (:func:`despeck.synthetic.make_scene`) in float32 and with
    bfloat16 autocast (target >= 2x faster at <= 0.05 dB PSNR loss where the CPU has
    native bf16). PSNR is computed by scikit-image in the dB domain with the clean
    reference's dB range as data range.

The OpenMP wait policy is set to PASSIVE unless the environment says otherwise (see
the comment at the imports; ``despeck apply`` does the same). The model is ``--model FILE``, else the bundled starter model, else the registry's
default network (``logcnn-s``) with seeded random weights for (i) and (ii) -- speed and
memory do not depend on the weight values -- and, for (iii), a ``logcnn-s`` trained
here for ``--train-seconds`` on procedural scenes (PSNR needs a model that does
something). The machine may be shared: every timing is repeated and the best kept,
and the load average is recorded. Figures are printed and written to
``bench_output/bench_inference.json``.
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

# Threads that spin while waiting at OpenMP barriers lose their time slice to other
# processes on a shared machine and every parallel region then waits for them; sleeping
# waiters cost little on an idle machine and a great deal less on a busy one. Set before
# torch loads its OpenMP runtime; an explicit setting in the environment wins.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
import torch  # noqa: E402

ROOT = pathlib.Path(__file__).resolve().parents[1]
OUT_DIR = ROOT / "bench_output"

# One end-to-end pass in a fresh interpreter, then this process's peak memory.
MEMORY_SCRIPT = r"""
import json, resource, sys, time
import torch
from despeck.inference import despeckle_file
sys.path.insert(0, sys.argv[4])
from bench_inference import load_default_model

src, dst, threads, _, model_arg, mode = sys.argv[1:7]
model = load_default_model(model_arg or None)
start = time.perf_counter()
if mode == "apply":
    despeckle_file(src, dst, model, threads=int(threads), overwrite=True, progress=False)
seconds = time.perf_counter() - start
hwm = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM:"))
print(json.dumps({"peak_rss_mib": round(hwm / 1024, 1),
                  "ru_maxrss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
                  "seconds": round(seconds, 1)}))
"""


def load_default_model(path=None, seed=0):
    """The benchmark's model: a file, a registry name (seeded weights), the starter model, or ``logcnn-s``."""
    from despeck.models import Despeckler, create_model, list_models, load_model_file

    if path in list_models():
        torch.manual_seed(seed)
        return Despeckler(create_model(path), looks=1).eval()
    if path:
        return load_model_file(path)
    starter = ROOT / "despeck" / "weights" / "starter.safetensors"
    if starter.exists():
        return load_model_file(starter)
    torch.manual_seed(seed)
    return Despeckler(create_model("logcnn-s"), looks=1).eval()


def model_name(path):
    from despeck.models import list_models

    from despeck.models import read_model_metadata

    if path in list_models():
        return f"{path} (registry, seeded random weights)"
    starter = ROOT / "despeck" / "weights" / "starter.safetensors"
    if not path and not starter.exists():
        return "logcnn-s (registry default, seeded random weights)"
    path = pathlib.Path(path) if path else starter
    arch = read_model_metadata(path).get("architecture", {})
    return f"{path} ({arch.get('name')} {arch.get('kwargs')}, {path.stat().st_size} bytes)"


def load_average():
    try:
        return [round(v, 2) for v in os.getloadavg()]
    except OSError:
        return None


def write_scene_file(path, size, seed=1):
    """A tiled, DEFLATE-compressed float32 GeoTIFF of 1-look speckle over a smooth scene.

    Written one row of 512-pixel blocks at a time, so it is never whole in memory.
    """
    import rasterio
    from affine import Affine
    from rasterio.windows import Window

    rng = np.random.default_rng(seed)
    profile = dict(driver="GTiff", width=size, height=size, count=1, dtype="float32", crs="EPSG:32631",
                   transform=Affine(10.0, 0.0, 500000.0, 0.0, -10.0, 5000000.0), tiled=True, blockxsize=512,
                   blockysize=512, nodata=0.0, compress="deflate", predictor=3, bigtiff="IF_SAFER")
    cols = np.arange(size, dtype=np.float32)
    with rasterio.open(path, "w", **profile) as ds:
        for row in range(0, size, 512):
            rows = np.arange(row, min(size, row + 512), dtype=np.float32)[:, None]
            parcels = ((rows // 300 + cols[None, :] // 420) % 4).astype(np.float32)
            clean = 0.05 * np.exp(0.8 * np.sin(cols / 97.0) * np.cos(rows / 131.0) + 0.6 * parcels)
            block = (clean * rng.standard_exponential(clean.shape, dtype=np.float32)).astype(np.float32)
            ds.write(block, 1, window=Window(0, row, size, block.shape[0]))


# ----------------------------------------------------------------------------- (i) speed

class InterleavedBare(torch.nn.Module):
    """Wraps the model given to ``despeckle_file``: after each tile it runs bare chunks.

    A bare forward is the same model on non-overlapping tensors cut from the scene held
    in memory, nothing else (invalid pixels are 0 there as in the stream). One chunk of
    each series in ``chunks`` (name -> (rows, cols)) runs after each tile, timed on its
    own, so on a shared machine the end-to-end pass and the references see the same
    load. The memory-format trial's small crops are left alone.
    """

    def __init__(self, model, intensity, offset, chunks):
        super().__init__()
        self.model = model
        self.network = model.network
        self.receptive_field = model.receptive_field
        self.scene_log_offset = model.scene_log_offset
        self.metadata = getattr(model, "metadata", {})
        self.looks = getattr(model, "looks", None)
        h, w = intensity.shape
        self.pending = {
            name: [(r, c, kr, kc) for r in range(0, h, kr) for c in range(0, w, kc)]
            for name, (kr, kc) in chunks.items()
        }
        self.seconds = {name: 0.0 for name in chunks}
        self.pixels = {name: 0 for name in chunks}
        self.intensity, self.offset = intensity, offset
        self.tile_seconds = 0.0  # the end-to-end pass's own forward calls
        self.tile_pixels = 0

    def bare_step(self, name):
        r, c, kr, kc = self.pending[name].pop(0)
        x = torch.from_numpy(np.ascontiguousarray(self.intensity[r : r + kr, c : c + kc]))[None, None]
        if next(self.model.parameters()).is_contiguous(memory_format=torch.channels_last):
            x = x.contiguous(memory_format=torch.channels_last)
        t0 = time.perf_counter()
        with torch.inference_mode():
            self.model(x, log_offset=self.offset)
        self.seconds[name] += time.perf_counter() - t0
        self.pixels[name] += x.shape[-1] * x.shape[-2]

    def finish(self):
        for name, todo in self.pending.items():
            while todo:
                self.bare_step(name)

    def forward(self, intensity, valid=None, log_offset=None):
        t0 = time.perf_counter()
        out = self.model(intensity, valid=valid, log_offset=log_offset)
        self.tile_seconds += time.perf_counter() - t0
        self.tile_pixels += intensity.numel()
        if intensity.shape[-1] * intensity.shape[-2] > 256 * 256:
            for name, todo in self.pending.items():
                if todo:
                    self.bare_step(name)
        return out


def bench_speed(size, repeats, threads, model_path, workdir):
    from despeck import inference
    from despeck.raster import open_scene

    model = load_default_model(model_path)
    src = workdir / f"speed_{size}.tif"
    t0 = time.perf_counter()
    write_scene_file(src, size)
    print(f"wrote {size}x{size} scene in {time.perf_counter() - t0:.0f} s", flush=True)
    with open_scene(src) as reader:
        intensity, _ = reader.read()  # invalid pixels read as 0, as in the stream
        offset = model.scene_log_offset(reader.sample_intensity())
    megapixels = size * size / 1e6
    grid = inference.resolve_tiling(intensity.shape, model, row_stride=512)
    computed = grid.rows.count * grid.cols.count * grid.tile_shape[0] * grid.tile_shape[1] / 1e6
    chunks = {"large": (1024, 1024), "tile_shaped": tuple(grid.tile_shape)}
    runs = []
    for k in range(repeats):
        dst = workdir / f"speed_{size}_out.tif"
        wrapped = InterleavedBare(model, intensity, offset, chunks)
        t0 = time.perf_counter()
        inference.despeckle_file(src, dst, wrapped, threads=threads, overwrite=True, progress=False)
        wall = time.perf_counter() - t0
        bare_inside = sum(wrapped.seconds.values())
        torch.set_num_threads(threads)
        torch.set_flush_denormal(True)
        wrapped.finish()  # fewer tiles than chunks: finish the bare passes
        torch.set_flush_denormal(False)
        e2e = wall - bare_inside
        assert all(p == size * size for p in wrapped.pixels.values())
        run = {"end_to_end_seconds": round(e2e, 2), "end_to_end_mp_per_s": round(megapixels / e2e, 4)}
        for name, seconds in wrapped.seconds.items():
            run[f"bare_{name}_seconds"] = round(seconds, 2)
            run[f"bare_{name}_mp_per_s"] = round(megapixels / seconds, 4)
            run[f"ratio_vs_bare_{name}"] = round(seconds / e2e, 3)
        run.update({
            "tile_forward_seconds": round(wrapped.tile_seconds, 2),
            "tile_forward_mp_per_s_of_computed_pixels": round(wrapped.tile_pixels / 1e6 / wrapped.tile_seconds, 4),
            "outside_forward_seconds": round(e2e - wrapped.tile_seconds, 2),
            "load_average_after": load_average(),
        })
        runs.append(run)
        print(f"  run {k + 1}: end-to-end {e2e:6.1f} s ({run['end_to_end_mp_per_s']} MP/s); bare 1024^2 "
              f"{run['bare_large_mp_per_s']} MP/s (ratio {run['ratio_vs_bare_large']}); bare tile-shaped "
              f"{run['bare_tile_shaped_mp_per_s']} MP/s (ratio {run['ratio_vs_bare_tile_shaped']}); "
              f"outside the network {run['outside_forward_seconds']} s", flush=True)
    dst.unlink(missing_ok=True)
    src.unlink()
    result = {
        "scene": f"{size}x{size}",
        "megapixels": round(megapixels, 2),
        "tile_shape": list(grid.tile_shape),
        "overlap": grid.overlap,
        "tiles": len(grid),
        "computed_megapixels_incl_overlap": round(computed, 2),
        "bare_chunks": {name: list(shape) for name, shape in chunks.items()},
        "method": "bare chunks interleaved one per tile with the end-to-end run; end-to-end time excludes them",
        "runs": runs,
        "end_to_end_mp_per_s_best": max(r["end_to_end_mp_per_s"] for r in runs),
    }
    for name in chunks:
        result[f"bare_{name}_mp_per_s_best"] = max(r[f"bare_{name}_mp_per_s"] for r in runs)
        result[f"ratio_vs_bare_{name}_best_run"] = max(r[f"ratio_vs_bare_{name}"] for r in runs)
        result[f"ratio_vs_bare_{name}_median"] = round(float(np.median([r[f"ratio_vs_bare_{name}"] for r in runs])), 3)
    print(f"(i) end-to-end {result['end_to_end_mp_per_s_best']} MP/s; ratio vs bare 1024^2 tensors: best run "
          f"{result['ratio_vs_bare_large_best_run']}, median {result['ratio_vs_bare_large_median']}; vs bare "
          f"tile-shaped tensors: best run {result['ratio_vs_bare_tile_shaped_best_run']}, median "
          f"{result['ratio_vs_bare_tile_shaped_median']} (target >= 0.85)", flush=True)
    return result


# ----------------------------------------------------------------------------- (ii) memory

def run_memory_pass(src, dst, threads, model_path, mode):
    env = dict(os.environ, OMP_NUM_THREADS=str(threads))
    cmd = [sys.executable, "-c", MEMORY_SCRIPT, str(src), str(dst), str(threads), str(ROOT / "benchmarks"),
           model_path or "", mode]
    out = subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=ROOT)
    if out.returncode != 0:
        raise RuntimeError(f"memory pass failed: {out.stderr.strip().splitlines()[-1:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def bench_memory(sizes, threads, model_path, workdir):
    results = {}
    src0 = workdir / "mem_tiny.tif"
    write_scene_file(src0, 512)
    results["import_and_load_only"] = run_memory_pass(src0, workdir / "none.tif", threads, model_path, "load")
    print(f"(ii) import torch + load model only: peak RSS {results['import_and_load_only']['peak_rss_mib']} MiB",
          flush=True)
    for size in sizes:
        src = workdir / f"mem_{size}.tif"
        t0 = time.perf_counter()
        write_scene_file(src, size)
        print(f"wrote {size}x{size} scene ({src.stat().st_size / 2**20:.0f} MiB) in {time.perf_counter() - t0:.0f} s",
              flush=True)
        dst = workdir / f"mem_{size}_out.tif"
        entry = run_memory_pass(src, dst, threads, model_path, "apply")
        entry["megapixels_per_second"] = round(size * size / 1e6 / entry["seconds"], 4)
        results[str(size)] = entry
        print(f"(ii) {size}x{size}: peak RSS {entry['peak_rss_mib']} MiB (ru_maxrss {entry['ru_maxrss_mib']} MiB), "
              f"{entry['seconds']} s", flush=True)
        src.unlink()
        dst.unlink(missing_ok=True)
    small, large = (results[str(s)] for s in sizes)
    results["ratio_large_over_small"] = round(large["peak_rss_mib"] / small["peak_rss_mib"], 3)
    print(f"(ii) peak RSS ratio {sizes[1]}^2 / {sizes[0]}^2 = {results['ratio_large_over_small']} "
          f"(target <= 1.2; largest {large['peak_rss_mib']} MiB, target <= 1536)", flush=True)
    return results


# ----------------------------------------------------------------------------- (iii) bf16

def trained_model(model_path, seconds, threads):
    """A model that despeckles, for PSNR: the given/starter file, or a quick logcnn-s."""
    from despeck.models import load_model_file

    if model_path or (ROOT / "despeck" / "weights" / "starter.safetensors").exists():
        return load_default_model(model_path), model_name(model_path)
    cached = OUT_DIR / f"bench_inference_logcnn-s_{int(seconds)}s.safetensors"
    if cached.exists():
        return load_model_file(cached), f"{cached} (trained by this benchmark earlier)"
    from despeck.training import config_from_dict, train

    run_dir = OUT_DIR / "bench_inference_train"
    config = config_from_dict({
        "data": {"synthetic_scenes": 6, "synthetic_size": 384, "patch_size": 48, "batch_size": 16,
                 "patches_per_epoch": 512, "val_patches": 32},
        "model": {"name": "logcnn-s"},
        "speckle": {"looks": 1},
        "loss": {"name": "mse_log", "target": "clean"},
        "optim": {"lr": 0.002, "schedule": "constant"},
        "budget": {"max_time": f"{int(seconds)}s"},
        "trainer": {"seed": 0, "threads": threads, "progress": False},
        "output": {"dir": str(run_dir)},
    })
    print(f"training logcnn-s for {int(seconds)} s for the bf16 PSNR check ...", flush=True)
    result = train(config)
    model = load_model_file(result.model_path)
    cached.write_bytes(pathlib.Path(result.model_path).read_bytes())
    return model, f"logcnn-s trained here for {int(seconds)} s ({result.epochs} epochs)"


def bench_bf16(size, repeats, threads, model_path, train_seconds):
    from skimage.metrics import peak_signal_noise_ratio

    from despeck import cpu, inference, speckle, synthetic

    model, described = trained_model(model_path, train_seconds, threads)
    rng = np.random.default_rng(7)
    clean = synthetic.make_scene((size, size), rng=rng)
    noisy = speckle.simulate_intensity(clean, 1, rng=rng)
    supported = cpu.bf16_supported()
    ref_db = 10 * np.log10(clean)
    data_range = float(ref_db.max() - ref_db.min())
    result = {"scene": f"{size}x{size}", "model": described, "bf16_supported": supported,
              "psnr_domain": "dB, data_range = clean reference's dB range (scikit-image)"}
    times = {False: [], True: []}
    estimates = {}
    for _ in range(repeats):
        for bf16 in (False, True):
            t0 = time.perf_counter()
            estimates[bf16] = inference.despeckle_array(noisy, model, threads=threads, bf16=bf16, progress=False)
            times[bf16].append(time.perf_counter() - t0)
    psnr = {bf16: float(peak_signal_noise_ratio(ref_db, 10 * np.log10(est), data_range=data_range))
            for bf16, est in estimates.items()}
    result.update({
        "psnr_noisy_db": round(float(peak_signal_noise_ratio(ref_db, 10 * np.log10(noisy), data_range=data_range)), 3),
        "fp32_seconds": [round(t, 2) for t in times[False]],
        "bf16_seconds": [round(t, 2) for t in times[True]],
        "psnr_fp32_db": round(psnr[False], 3),
        "psnr_bf16_db": round(psnr[True], 3),
        "psnr_loss_db": round(psnr[False] - psnr[True], 4),
        "speedup_best": round(min(times[False]) / min(times[True]), 3),
        "max_abs_log_difference": round(float(np.max(np.abs(np.log(estimates[True]) - np.log(estimates[False])))), 4),
    })
    if not supported:
        result["note"] = "no native bf16 on this CPU: the bf16 run fell back to float32"
    print(f"(iii) bf16 {'supported' if supported else 'NOT supported'}: fp32 {min(times[False]):.1f} s, "
          f"bf16 {min(times[True]):.1f} s (x{result['speedup_best']}), PSNR {result['psnr_fp32_db']} -> "
          f"{result['psnr_bf16_db']} dB (loss {result['psnr_loss_db']} dB; noisy {result['psnr_noisy_db']} dB)",
          flush=True)
    return result


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small scenes (smoke test)")
    parser.add_argument("--only", choices=("speed", "memory", "bf16"), action="append",
                        help="run only these parts (repeatable)")
    parser.add_argument("--repeats", type=int, default=2, help="timing repeats; the best is kept")
    parser.add_argument("--threads", type=int, default=2, help="torch threads (default 2)")
    parser.add_argument("--model", help="model file or registry name (default: starter model, else logcnn-s)")
    parser.add_argument("--train-seconds", type=float, default=240, help="training time for the bf16 model")
    args = parser.parse_args(argv)
    parts = args.only or ["speed", "memory", "bf16"]
    speed_size = 2048 if args.quick else 8192
    mem_sizes = (1024, 4096) if args.quick else (4096, 16384)
    bf16_size = 512 if args.quick else 2048

    from despeck.cpu import bf16_supported

    OUT_DIR.mkdir(exist_ok=True)
    report = {
        "machine": {"python": platform.python_version(), "torch": torch.__version__,
                    "omp_wait_policy": os.environ.get("OMP_WAIT_POLICY"),
                    "cpu_count": os.cpu_count(), "platform": platform.platform(), "threads": args.threads,
                    "bf16_native": bf16_supported(), "load_average_start": load_average()},
        "model": model_name(args.model),
    }
    with tempfile.TemporaryDirectory(dir=OUT_DIR) as tmp:
        workdir = pathlib.Path(tmp)
        if "speed" in parts:
            report["speed"] = bench_speed(speed_size, args.repeats, args.threads, args.model, workdir)
        if "memory" in parts:
            report["memory"] = bench_memory(mem_sizes, args.threads, args.model, workdir)
    if "bf16" in parts:
        report["bf16"] = bench_bf16(bf16_size, args.repeats, args.threads, args.model, args.train_seconds)
    report["machine"]["load_average_end"] = load_average()
    name = "bench_inference_quick.json" if args.quick else "bench_inference.json"
    if args.only:
        name = name.replace(".json", "_" + "_".join(parts) + ".json")
    if args.model:
        name = name.replace("bench_inference", "bench_inference_" + pathlib.Path(args.model).stem)
    path = OUT_DIR / name
    path.write_text(json.dumps(report, indent=2))
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
