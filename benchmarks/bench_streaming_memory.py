"""Peak memory of ``despeck simulate``, ``despeck filter`` and ``despeck apply`` on a small and a large scene.

Run from the repository root::

    .venv/bin/python benchmarks/bench_streaming_memory.py --out bench_output/streaming_memory
    .venv/bin/python benchmarks/bench_streaming_memory.py --quick --out bench_output/streaming_memory_quick

The three commands stream a raster through the same engine
(:mod:`despeck.raster.streaming`), so their memory should not depend on the scene's
size. For each size (default 4096 x 4096 and 16384 x 16384 float32 intensity
GeoTIFFs; ``--quick``: 1024 and 4096) the script writes the input block by block
(never whole in memory), then runs each command in a fresh interpreter that calls
``despeck.cli.main`` and, when it returns, reads its own peak resident memory
(``VmHWM`` of ``/proc/self/status``; ``ru_maxrss`` is not used because on Linux it
can carry the parent's peak over fork and exec). A child that only imports the
command's modules gives the fixed part. The commands are::

    despeck simulate IN OUT --looks 4 --seed 7 --quiet
    despeck filter lee IN OUT --quiet
    despeck apply IN --out OUT --threads N --quiet        (bundled starter model)

Target: for each command the large scene's peak is at most 1.2 times the small
scene's. ``apply`` with one thread on 16384 x 16384 takes several minutes; the machine
may be shared (``--threads`` defaults to 1, ``OMP_NUM_THREADS`` is set to it).
Figures are printed with the CPU (:func:`despeck.cpu.cpu_description`) and written as
``streaming_memory.json`` and ``streaming_memory.md`` into ``--out``.
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

# One command in a fresh interpreter, then this process's own peak resident memory.
CHILD = r"""
import json, sys, time
argv = json.loads(sys.argv[1])
start = time.perf_counter()
if argv[0] == "imports":
    import despeck.cli, despeck.cli.simulate, despeck.cli.filter, despeck.cli.apply, despeck.filters
    if argv[1:] == ["torch"]:
        import despeck.inference
    status = 0
else:
    from despeck.cli import main
    status = main(argv)
seconds = time.perf_counter() - start
hwm_kib = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM:"))
print(json.dumps({"status": status, "peak_mib": round(hwm_kib / 1024, 1), "seconds": round(seconds, 2)}))
"""

COMMANDS = ("simulate", "filter", "apply")


def write_input(path, size, block=512):
    """A tiled float32 intensity GeoTIFF of 1-look speckle on a smooth pattern, written block by block."""
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    rng = np.random.default_rng(2031)
    profile = dict(driver="GTiff", width=size, height=size, count=1, dtype="float32", crs="EPSG:32631",
                   transform=from_origin(512000, 6120000, 10, 10), tiled=True, blockxsize=block,
                   blockysize=block, nodata=0.0, bigtiff="IF_SAFER")
    with rasterio.open(path, "w", **profile) as ds:
        ds.update_tags(CAMPAIGN="Lake Varden memory benchmark")
        for row in range(0, size, block):
            yy = np.arange(row, row + block, dtype=np.float32)[:, None]
            for col in range(0, size, block):
                xx = np.arange(col, col + block, dtype=np.float32)[None, :]
                clean = 1.0 + 0.6 * np.sin(xx / 37.0) * np.cos(yy / 53.0) + 0.5 * ((xx // 700 + yy // 900) % 2)
                speckled = clean * rng.standard_exponential((block, block), dtype=np.float32)
                ds.write(speckled.astype(np.float32), 1, window=Window(col, row, block, block))


def command_argv(name, src, dst, threads):
    if name == "simulate":
        return ["simulate", str(src), str(dst), "--looks", "4", "--seed", "7", "--quiet", "--overwrite"]
    if name == "filter":
        return ["filter", "lee", str(src), str(dst), "--quiet", "--overwrite"]
    if name == "apply":
        return ["apply", str(src), "--out", str(dst), "--threads", str(threads), "--quiet", "--overwrite"]
    raise ValueError(name)


def run_child(argv, threads):
    env = dict(os.environ, OMP_NUM_THREADS=str(threads), MKL_NUM_THREADS=str(threads))
    proc = subprocess.run([sys.executable, "-c", CHILD, json.dumps(argv)], capture_output=True, text=True,
                          env=env, cwd=ROOT)
    if proc.returncode != 0:
        raise SystemExit(f"child {argv[:2]} failed ({proc.returncode}): {proc.stderr.strip()[-2000:]}")
    result = json.loads(proc.stdout.strip().splitlines()[-1])
    if result["status"] != 0:
        raise SystemExit(f"despeck {' '.join(argv)} exited with {result['status']}: {proc.stderr.strip()[-2000:]}")
    return result


def check_output(path, size):
    import rasterio

    with rasterio.open(path) as ds:
        if (ds.width, ds.height) != (size, size):
            raise SystemExit(f"{path}: wrote {ds.width}x{ds.height}, expected {size}x{size}")
        corner = ds.read(1, window=((size - 64, size), (size - 64, size)))
    if not np.isfinite(corner).all() or corner.mean() <= 0:
        raise SystemExit(f"{path}: the last block holds no plausible intensities")


def markdown(report) -> str:
    sizes = report["sizes"]
    small, large = (f"{s}x{s}" for s in sizes)
    lines = [
        "# Peak memory of the streamed commands",
        "",
        f"CPU: {report['cpu']}; threads {report['threads']}; load average at start {report['load_average']}.",
        "",
        f"| command | {small} peak MiB | {large} peak MiB | ratio | {small} s | {large} s |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for name, row in report["results"].items():
        a, b = row[str(sizes[0])], row[str(sizes[1])]
        lines.append(f"| {name} | {a['peak_mib']:.1f} | {b['peak_mib']:.1f} | {row['ratio']:.3f} | "
                     f"{a['seconds']:.1f} | {b['seconds']:.1f} |")
    lines += ["", f"Target: ratio <= {report['target_ratio']} for every command. "
              f"Imports alone: {report['imports_mib']['numpy_rasterio']} MiB without torch, "
              f"{report['imports_mib']['torch']} MiB with torch (the fixed part).", ""]
    return "\n".join(lines)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", required=True, help="folder for streaming_memory.json and .md")
    parser.add_argument("--quick", action="store_true", help="1024 and 4096 pixel scenes (a smoke test)")
    parser.add_argument("--sizes", type=int, nargs=2, metavar=("SMALL", "LARGE"), help="scene sides")
    parser.add_argument("--commands", nargs="+", choices=COMMANDS, default=list(COMMANDS))
    parser.add_argument("--threads", type=int, default=1, help="threads of every command (default 1)")
    parser.add_argument("--workdir", help="folder for the inputs and outputs (default: a temporary folder in --out)")
    args = parser.parse_args(argv)
    from despeck.cpu import cpu_description

    cpu = cpu_description()
    print(f"CPU: {cpu}", flush=True)
    sizes = tuple(args.sizes) if args.sizes else ((1024, 4096) if args.quick else (4096, 16384))
    out = pathlib.Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    report = {
        "cpu": cpu, "python": platform.python_version(), "threads": args.threads,
        "load_average": [round(v, 2) for v in os.getloadavg()], "sizes": list(sizes), "target_ratio": 1.2,
        "imports_mib": {
            "numpy_rasterio": run_child(["imports"], args.threads)["peak_mib"],
            "torch": run_child(["imports", "torch"], args.threads)["peak_mib"],
        },
        "results": {name: {} for name in args.commands},
    }
    print(f"imports only: {report['imports_mib']}", flush=True)
    with tempfile.TemporaryDirectory(dir=args.workdir or out) as tmp:
        work = pathlib.Path(tmp)
        for size in sizes:
            src = work / f"scene_{size}.tif"
            t0 = time.perf_counter()
            write_input(src, size)
            print(f"wrote {size}x{size} input ({src.stat().st_size / 2**20:.0f} MiB) in "
                  f"{time.perf_counter() - t0:.0f} s", flush=True)
            for name in args.commands:
                dst = work / f"{name}_{size}.tif"
                result = run_child(command_argv(name, src, dst, args.threads), args.threads)
                check_output(dst, size)
                dst.unlink()
                report["results"][name][str(size)] = result
                print(f"{name:<8} {size:>5}x{size:<5}: peak {result['peak_mib']:8.1f} MiB  {result['seconds']:7.1f} s",
                      flush=True)
            src.unlink()
    for name, row in report["results"].items():
        row["ratio"] = round(row[str(sizes[1])]["peak_mib"] / row[str(sizes[0])]["peak_mib"], 3)
        print(f"{name}: {row[str(sizes[1])]['peak_mib']} MiB / {row[str(sizes[0])]['peak_mib']} MiB = "
              f"x{row['ratio']:.3f} (target <= {report['target_ratio']})")
    (out / "streaming_memory.json").write_text(json.dumps(report, indent=2))
    (out / "streaming_memory.md").write_text(markdown(report))
    print(f"wrote {out / 'streaming_memory.json'} and {out / 'streaming_memory.md'}")


if __name__ == "__main__":
    main()
