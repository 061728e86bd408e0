"""Reproduce despeck's known faults and bad inputs with the real command line, and tabulate the answers.

Every case runs the installed ``despeck`` command (the one beside this Python, else
``python -m despeck``) in a child process inside a fresh temporary folder, with a
real fault where the fault is the point: a file size limit on the child
(``setrlimit(RLIMIT_FSIZE)`` with SIGXFSZ ignored, so writes fail with EFBIG as they
fail with ENOSPC on a full disk), a 256 KiB tmpfs in a private mount namespace, a
folder without write permission (for root, the child drops CAP_DAC_OVERRIDE from its
capability bounding set, as ``tests/test_safety_writes.py`` does), SIGTERM, SIGINT and
SIGKILL, GeoTIFFs cut off part-way and model files edited by hand following the
safetensors layout. Outputs are read back with rasterio (GDAL), an outside reader.

What each case expects is the contract in ``docs/faults.md``: bad input and faults end
with one line ``despeck: error: ...`` and a non-zero exit status (1 for an input or
processing error, 2 for a refused option value, 3 for a partial batch), nothing is left at the
destination (no output, temporary or lock file), inputs and files despeck did not
write are untouched, and exit status 0 means every output is complete and readable.

Prints one Markdown table: case, exit status(es), first line on standard error, what
the destination holds, PASS / FAIL (SKIP with the reason when a fault cannot be made
here). Exit status 1 when a case fails. About two minutes on two busy cores (tiny
scenes, the ``configs/tiny.yaml`` training run cut to a few seconds, one thread).

Usage::

    python scripts/fault_sweep.py [--only WORD ...] [--keep DIR] [--list]
"""

from __future__ import annotations

import argparse
import ctypes
import hashlib
import json
import os
import re
import resource
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import traceback
import warnings
from pathlib import Path

import numpy as np
import rasterio
from rasterio.transform import from_origin

ROOT = Path(__file__).resolve().parents[1]
TINY = ROOT / "configs" / "tiny.yaml"
TRANSFORM = from_origin(500000.0, 5800000.0, 10.0, 10.0)
# The tiny configuration cut to an epoch of four steps on one thread (as in tests/test_training_faults.py).
SHORT = ["trainer.threads=1", "data.patches_per_epoch=32", "data.val_patches=8", "budget.max_time=null"]
ENV = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1", PYTHONUNBUFFERED="1")


def despeck_command() -> list:
    exe = Path(sys.executable).with_name("despeck")
    return [str(exe)] if exe.is_file() else [sys.executable, "-m", "despeck"]


DESPECK = despeck_command()


class Skip(Exception):
    """The fault cannot be made on this machine; the message says why."""


# --------------------------------------------------------------------------- running despeck

def _preexec(limit=None, drop_dac=False):
    def setup():
        if limit is not None:
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
            resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
        if drop_dac:
            libc = ctypes.CDLL(None, use_errno=True)
            for cap in (1, 2):  # CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH (linux/capability.h)
                if libc.prctl(24, cap, 0, 0, 0) != 0:  # PR_CAPBSET_DROP
                    os._exit(99)
    return setup


def _arg(a, cwd) -> str:
    """Paths inside the case folder are given relative to it, as a user in that folder would type them."""
    if isinstance(a, Path) and a.is_absolute():
        try:
            return str(a.relative_to(cwd)) or "."
        except ValueError:
            return str(a)
    return str(a)


STDERR = []  # every stderr text of the current case, checked for raw library output


def run(args, *, cwd, limit=None, drop_dac=False, timeout=180, env=None):
    """Run ``despeck ARGS`` in ``cwd`` to completion; returns the CompletedProcess."""
    p = subprocess.run(DESPECK + [_arg(a, cwd) for a in args], cwd=cwd, capture_output=True, text=True,
                       timeout=timeout, env=dict(ENV, **(env or {})), preexec_fn=_preexec(limit, drop_dac))
    STDERR.append(p.stderr)
    return p


def start(args, *, cwd):
    return subprocess.Popen(DESPECK + [_arg(a, cwd) for a in args], cwd=cwd, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=ENV)


def finish(proc, timeout=300):
    """Wait for a started ``despeck``; returns its stderr."""
    _, err = proc.communicate(timeout=timeout)
    STDERR.append(err)
    return err


def wait_for(predicate, proc, seconds=90.0):
    deadline = time.monotonic() + seconds
    while not predicate():
        if proc.poll() is not None or time.monotonic() > deadline:
            return False
        time.sleep(0.02)
    return True


PROGRESS = re.compile(r"\d+%\||\[\d\d:\d\d<")  # tqdm progress bars (shown without --quiet)


def stderr_lines(stderr: str) -> list:
    """Lines on stderr, progress bars left out."""
    return [ln.strip() for ln in stderr.replace("\r", "\n").splitlines() if ln.strip() and not PROGRESS.search(ln)]


def first_line(stderr: str) -> str:
    lines = stderr_lines(stderr)
    return lines[0] if lines else ""


def raw_lines(stderr: str) -> list:
    """Lines that are not despeck's own one-line messages (a library talking to the user directly)."""
    return [ln for ln in stderr_lines(stderr) if not ln.startswith("despeck:")]


def error_lines(stderr: str) -> list:
    return [ln for ln in stderr.splitlines() if ln.startswith("despeck: error:")]


def clean_error(proc, *words, code) -> list:
    """Problems with a refusal: the exit status ``code``, exactly one error line holding ``words``, no traceback.

    The statuses are the contract of ``docs/faults.md``: 1 an input or processing error,
    2 a usage error (an option value refused before any input is read), 3 a partial batch.
    """
    problems = []
    if proc.returncode != code:
        problems.append(f"exit {proc.returncode}, expected {code}")
    if "Traceback" in proc.stderr:
        problems.append("traceback on stderr")
    errors = error_lines(proc.stderr)
    if len(errors) != 1:
        problems.append(f"{len(errors)} error lines")
    for word in words:
        if not any(word in e for e in errors):
            problems.append(f"error line lacks {word!r}")
    return problems


# --------------------------------------------------------------------------- inspecting the disk

def hidden(folder: Path) -> list:
    """Temporary and lock files despeck may have left (its own are hidden files)."""
    return sorted(p.name for p in Path(folder).rglob(".*")) if Path(folder).exists() else []


def tree(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(Path(folder).rglob("*")) if p.is_file()}


def readable(path: Path):
    """``(True, description)`` when the raster opens and every band reads back in full, finite where valid."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with rasterio.open(path) as ds:
                data = ds.read(masked=True)
                count, shape = ds.count, (ds.height, ds.width)
    except Exception as exc:  # noqa: BLE001 - any failure to read is the answer
        return False, f"unreadable ({type(exc).__name__})"
    values = np.ma.compressed(data)
    if values.size == 0 or not np.isfinite(values).all():
        return False, "non-finite or no valid pixels"
    return True, f"{path.name}: {count} band(s) {shape[0]}x{shape[1]} read back"


# --------------------------------------------------------------------------- fixtures

def write_tif(path, data, *, block=None, descriptions=(), tags=None, georeferenced=True):
    data = np.asarray(data, dtype=np.float32)
    data = data[None] if data.ndim == 2 else data
    profile = dict(driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0], dtype="float32")
    if georeferenced:
        profile.update(crs="EPSG:32631", transform=TRANSFORM)
    if block:
        profile.update(tiled=True, blockxsize=block, blockysize=block)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data)
        for i, d in enumerate(descriptions, start=1):
            ds.set_band_description(i, d)
        if tags:
            ds.update_tags(**tags)
    return Path(path)


def speckle(shape, seed=0, looks=1.0):
    """Gamma speckle of ``looks`` looks on a gentle ramp (compresses little, like real data)."""
    rng = np.random.default_rng(seed)
    ramp = np.linspace(0.05, 0.2, shape[-1], dtype=np.float32)
    return (ramp * rng.gamma(looks, 1.0 / looks, shape)).astype(np.float32)


def cut_off(folder: Path, name="cut.tif") -> Path:
    """A tiled GeoTIFF whose header is whole but whose data stop half-way (an interrupted copy)."""
    from rasterio.shutil import copy as gdal_copy

    whole = write_tif(folder / f".whole_{name}", speckle((512, 512), seed=3), block=128)
    path = folder / name
    gdal_copy(whole, path, driver="GTiff", tiled=True, blockxsize=128, blockysize=128)
    whole.unlink()
    with open(path, "r+b") as fh:
        fh.truncate(path.stat().st_size // 2)
    return path


def model_file(path: Path) -> Path:
    """A small untrained 1-look network saved as a despeck model file."""
    import torch

    from despeck.models import Despeckler, create_model, save_model_file

    torch.manual_seed(0)
    save_model_file(path, Despeckler(create_model("logcnn-xs"), looks=1).eval(), units="intensity")
    return path


def _parts(path: Path):
    raw = path.read_bytes()
    n = int.from_bytes(raw[:8], "little")
    return json.loads(raw[8:8 + n]), raw[8 + n:]


def edited_model(good: Path, out: Path, *, weights=None, description=None) -> Path:
    """A copy of ``good`` with a weight set by hand or its despeck description changed (safetensors layout)."""
    header, data = _parts(good)
    if weights is not None:
        from safetensors.torch import load_file, save_file

        tensors = load_file(str(good))
        weights(tensors)
        save_file(tensors, str(out), metadata=header["__metadata__"])
        return out
    desc = json.loads(header["__metadata__"]["despeck"])
    description(desc)
    header["__metadata__"]["despeck"] = json.dumps(desc)
    blob = json.dumps(header).encode()
    out.write_bytes(len(blob).to_bytes(8, "little") + blob + data)
    return out


def train_args(out: Path, *extra) -> list:
    args = ["train", "--config", TINY, "--quiet"]
    for o in SHORT + [f"output.dir={out.name}", *extra]:  # relative: the case folder is the cwd
        args += ["--set", o]
    return args


# --------------------------------------------------------------------------- the cases
#
# Each case takes a fresh folder and returns (exit statuses, first stderr line, what the
# destination holds, list of problems); no problems is a PASS.

CASES = []


def case(title):
    def register(fn):
        CASES.append((title, fn))
        return fn
    return register


@case("writing: full disk during `apply` (file size limit 128 KiB, GDAL worker threads)")
def full_disk_apply(d):
    src = write_tif(d / "scene.tif", speckle((256, 1024)))
    model = model_file(d / "m.safetensors")
    out = d / "clean.tif"
    args = ["apply", src, "--model", model, "--out", out, "--threads", 2, "--quiet"]
    p = run(args, cwd=d, limit=1 << 17)
    problems = clean_error(p, out.name, "file size limit", code=1)
    if out.exists() or hidden(d):
        problems.append(f"left on disk: {[out.name] if out.exists() else []} {hidden(d)}")
    rerun = run(args, cwd=d)
    ok, what = readable(out)
    if rerun.returncode != 0 or not ok:
        problems.append(f"rerun without the limit: exit {rerun.returncode}, {what}")
    return f"{p.returncode}, rerun {rerun.returncode}", first_line(p.stderr), \
        f"nothing after the failure; rerun: {what}", problems


@case("writing: full disk during `simulate` (file size limit 1 MiB, GDAL_NUM_THREADS=2)")
def full_disk_simulate(d):
    clean = write_tif(d / "clean.tif", np.full((1024, 1024), 0.3, np.float32), block=256)
    out = d / "speckled.tif"
    p = run(["simulate", clean, out, "--looks", 1, "--seed", 1, "--quiet"], cwd=d, limit=1 << 20,
            env={"GDAL_NUM_THREADS": "2"})
    problems = clean_error(p, out.name, "file size limit", code=1)
    if out.exists() or hidden(d):
        problems.append(f"left on disk: {hidden(d)}")
    return p.returncode, first_line(p.stderr), "nothing (no output, temporary or lock)", problems


@case("writing: full file system (256 KiB tmpfs) during `simulate`")
def full_tmpfs(d):
    if shutil.which("unshare") is None:
        raise Skip("no unshare(1) to mount a small tmpfs in a private mount namespace")
    write_tif(d / "in.tif", speckle((1024, 1024)))
    (d / "small").mkdir()
    cmd = " ".join(map(str, DESPECK))
    script = (f"mount -t tmpfs -o size=256k tmpfs small || exit 97; "
              f"{cmd} simulate in.tif small/s.tif --looks 1 --quiet; code=$?; ls -A small; exit $code")
    p = subprocess.run(["unshare", "-m", "--propagation", "private", "sh", "-c", script], capture_output=True,
                       text=True, timeout=180, env=ENV, cwd=d)
    STDERR.append(p.stderr)
    if p.returncode == 97 or "unshare failed" in p.stderr or "Operation not permitted" in p.stderr:
        raise Skip(f"cannot mount a tmpfs here: {first_line(p.stderr)[:120]}")
    problems = clean_error(p, "small", "no space left", code=1)
    left = p.stdout.split()
    if left:
        problems.append(f"left in the full folder: {left}")
    return p.returncode, first_line(p.stderr), "nothing in the full folder" if not left else f"{left}", problems


@case("writing: read-only output folder (`filter`, `simulate`)")
def read_only_folder(d):
    src = write_tif(d / "in.tif", speckle((128, 128)))
    ro = d / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    drop = os.geteuid() == 0
    try:
        if drop and run(["--version"], cwd=d, drop_dac=True).returncode == 99:
            raise Skip("running as root without CAP_SETPCAP: cannot take root's right to write anywhere")
        codes, problems, first = [], [], ""
        for args in (["filter", "boxcar", src, ro / "f.tif", "--looks", 1, "--quiet"],
                     ["simulate", src, ro / "s.tif", "--looks", 1, "--quiet"]):
            p = run(args, cwd=d, drop_dac=drop)
            codes.append(p.returncode)
            first = first or first_line(p.stderr)
            problems += clean_error(p, "ro", "output folder", code=1)
        left = [x.name for x in ro.iterdir()]
    finally:
        ro.chmod(0o755)
    if left:
        problems.append(f"left: {left}")
    return ", ".join(map(str, codes)), first, "folder still empty" if not left else str(left), problems


@case("writing: read-only `apply --out-dir` with three inputs")
def read_only_out_dir(d):
    inputs = [write_tif(d / f"{k}.tif", speckle((64, 64), seed=k)) for k in range(3)]
    model = model_file(d / "m.safetensors")
    ro = d / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    drop = os.geteuid() == 0
    try:
        p = run(["apply", *inputs, "--model", model, "--out-dir", ro, "--threads", 1], cwd=d, drop_dac=drop)
        if p.returncode == 99:
            raise Skip("running as root without CAP_SETPCAP: cannot take root's right to write anywhere")
        left = [x.name for x in ro.iterdir()]
    finally:
        ro.chmod(0o755)
    problems = clean_error(p, "ro", code=1)
    if "1 failed, 2 not attempted" not in p.stdout:
        problems.append("no summary '... 1 failed, 2 not attempted'")
    if left:
        problems.append(f"left: {left}")
    return p.returncode, first_line(p.stderr), "folder still empty; summary 0 written, 1 failed, 2 not attempted", \
        problems


@case("writing: SIGKILLed `simulate`, then a rerun in the same folder")
def killed_writer(d):
    src = write_tif(d / "clean.tif", speckle((2048, 2048), looks=50.0), block=256)  # a smooth reflectivity
    out = d / "s.tif"
    foreign = d / ".notes.tmp"
    foreign.write_text("not despeck's")
    proc = start(["simulate", src, out, "--looks", 1, "--seed", 2, "--quiet"], cwd=d)
    if not wait_for(lambda: any(n.endswith(".tmp") and "despeck" in n for n in hidden(d)), proc, 120):
        proc.kill()
        proc.wait()
        raise Skip("simulate finished before its temporary file could be seen; no write to interrupt")
    proc.kill()
    proc.wait()
    stale = [n for n in hidden(d) if n != foreign.name]
    p = run(["simulate", src, out, "--looks", 1, "--seed", 2, "--quiet"], cwd=d)
    ok, what = readable(out)
    problems = []
    if p.returncode != 0 or not ok:
        problems.append(f"rerun exit {p.returncode}, {what}")
    if hidden(d) != [foreign.name]:
        problems.append(f"hidden files after the rerun: {hidden(d)}")
    if not stale:
        problems.append("the kill left no temporary file to clean (case did not reproduce)")
    return f"-9, rerun {p.returncode}", first_line(p.stderr), \
        f"killed run left {len(stale)} temporary/lock file(s); rerun removed them, kept .notes.tmp; {what}", problems


@case("writing: two `apply --overwrite` on the same output at once")
def two_applies(d):
    src = write_tif(d / "scene.tif", speckle((1536, 1536)), block=256)
    model = model_file(d / "m.safetensors")
    out = d / "clean.tif"
    args = ["apply", src, "--model", model, "--out", out, "--threads", 1, "--overwrite", "--quiet"]
    a, b = start(args, cwd=d), start(args, cwd=d)
    err_a, err_b = finish(a), finish(b)
    errs = err_a + err_b
    busy = "being written by another despeck process" in errs
    ok, what = readable(out)
    problems = []
    if a.returncode != 0 or b.returncode != 0:
        problems.append(f"exits {a.returncode}, {b.returncode}")
    if not ok:
        problems.append(what)
    if hidden(d):
        problems.append(f"left: {hidden(d)}")
    if not busy:
        problems.append("the two runs did not overlap (no 'being written by another despeck process'); rerun")
    first = first_line(err_b) if "being written" in err_b else first_line(err_a)
    return f"{a.returncode}, {b.returncode}", first, f"one writer, the other skipped; {what}", problems


@case("reading: cut-off GeoTIFF in an `apply` batch of three")
def cut_off_batch(d):
    inp = d / "in"
    inp.mkdir()
    write_tif(inp / "a.tif", speckle((96, 96), seed=1))
    cut_off(inp, "b.tif")
    write_tif(inp / "c.tif", speckle((96, 96), seed=2))
    model = model_file(d / "m.safetensors")
    out = d / "out"
    p = run(["apply", inp / "*.tif", "--model", model, "--out-dir", out, "--threads", 1], cwd=d)
    problems = clean_error(p, "b.tif", "cut off or damaged", code=3)
    if "2 written, 0 skipped, 1 failed" not in p.stdout:
        problems.append("no summary '2 written, 0 skipped, 1 failed'")
    names = sorted(x.name for x in out.iterdir()) if out.exists() else []
    if names != ["a_despeckled.tif", "c_despeckled.tif"]:
        problems.append(f"outputs {names}")
    good = [readable(out / n)[0] for n in names]
    if not all(good):
        problems.append("an output does not read back")
    return p.returncode, first_line(p.stderr), f"{len(names)} complete outputs (a, c), nothing for b", problems


@case("reading: cut-off GeoTIFF given to `info`")
def cut_off_info(d):
    cut = cut_off(d)
    p = run(["info", cut], cwd=d)
    return p.returncode, first_line(p.stderr), "nothing written (info)", clean_error(p, "cut.tif", "cut off", code=1)


@case("model file: NaN weight, given to `apply`")
def nan_weights(d):
    good = model_file(d / ".good.safetensors")

    def poison(t):
        t["body.2.weight"][3, 1, 0, 2] = float("nan")

    bad = edited_model(good, d / "nan.safetensors", weights=poison)
    good.unlink()
    src = write_tif(d / "scene.tif", speckle((64, 64)))
    out = d / "out.tif"
    p = run(["apply", src, "--model", bad, "--out", out, "--threads", 1, "--quiet"], cwd=d)
    problems = clean_error(p, "nan.safetensors", "NaN", code=1)
    if out.exists() or hidden(d):
        problems.append("output or temporary left")
    return p.returncode, first_line(p.stderr), "nothing", problems


@case("model file: calibration `log_bias` 1e308, given to `apply`")
def absurd_bias(d):
    good = model_file(d / ".good.safetensors")
    bad = edited_model(good, d / "bias.safetensors", description=lambda x: x["normalisation"].update(log_bias=1e308))
    good.unlink()
    src = write_tif(d / "scene.tif", speckle((64, 64)))
    out = d / "out.tif"
    p = run(["apply", src, "--model", bad, "--out", out, "--threads", 1, "--quiet"], cwd=d)
    problems = clean_error(p, "bias.safetensors", "log_bias", code=1)
    if out.exists() or hidden(d):
        problems.append("output or temporary left")
    return p.returncode, first_line(p.stderr), "nothing", problems


@case("model file: header architecture `depth: 300000`, given to `apply`")
def giant_architecture(d):
    good = model_file(d / ".good.safetensors")
    bad = edited_model(good, d / "giant.safetensors",
                       description=lambda x: x["architecture"]["kwargs"].update(depth=300000))
    good.unlink()
    src = write_tif(d / "scene.tif", speckle((64, 64)))
    out = d / "out.tif"
    t0 = time.monotonic()
    p = run(["apply", src, "--model", bad, "--out", out, "--threads", 1, "--quiet"], cwd=d, timeout=120)
    seconds = time.monotonic() - t0
    problems = clean_error(p, "giant.safetensors", "300000", code=1)
    if seconds > 30:
        problems.append(f"took {seconds:.0f} s (a network was built?)")
    if out.exists():
        problems.append("output left")
    return p.returncode, first_line(p.stderr), f"nothing; refused in {seconds:.1f} s", problems


@case("model file: header nested 100000 deep, given to `apply`")
def nested_header(d):
    good = model_file(d / ".good.safetensors")
    header, data = _parts(good)
    desc = header["__metadata__"]["despeck"]
    header["__metadata__"]["despeck"] = desc[:-1] + ', "training": ' + "[" * 100000 + "]" * 100000 + "}"
    blob = json.dumps(header).encode()
    bad = d / "deep.safetensors"
    bad.write_bytes(len(blob).to_bytes(8, "little") + blob + data)
    good.unlink()
    src = write_tif(d / "scene.tif", speckle((64, 64)))
    p = run(["apply", src, "--model", bad, "--out", d / "out.tif", "--threads", 1, "--quiet"], cwd=d)
    return p.returncode, first_line(p.stderr), "nothing", clean_error(p, "deep.safetensors", "nested", code=1)


@case("training: `--set optim.lr=1e-3` (exponent notation)")
def exponent(d):
    out = d / "run"
    p = run(train_args(out, "optim.lr=1e-3", "budget.max_epochs=1"), cwd=d)
    problems = [] if p.returncode == 0 else [f"exit {p.returncode}"]
    saved = (out / "config.yaml").read_text() if (out / "config.yaml").exists() else ""
    if "lr: 0.001" not in saved:
        problems.append("config.yaml does not record lr 0.001")
    what = _model_readable(out / "model.safetensors")
    if not what.startswith("model"):
        problems.append(what)
    return p.returncode, first_line(p.stderr), f"{what}; config.yaml lr: 0.001", problems


def _model_readable(path: Path) -> str:
    from despeck.errors import DespeckError
    from despeck.models import load_model_file

    if not path.exists():
        return "no model file"
    try:
        load_model_file(path)
    except DespeckError as exc:
        return f"model file refused: {exc}"
    return f"model file {path.name} loads"


def _signal_case(d, signum, code):
    out = d / "run"
    proc = start(train_args(out, "budget.max_epochs=null", "budget.max_time=120s"), cwd=d)
    last = out / "checkpoints" / "last.ckpt"
    if not wait_for(last.is_file, proc, 120):
        proc.kill()
        err = finish(proc)
        return proc.returncode, first_line(err), "no checkpoint appeared", ["training made no checkpoint"]
    time.sleep(0.3)  # inside the next epoch
    proc.send_signal(signum)
    err = finish(proc, 120)
    name = signal.Signals(signum).name
    problems = []
    if proc.returncode != code:
        problems.append(f"exit {proc.returncode}, expected {code}")
    line = first_line(err)
    if not (line.startswith(f"despeck: training interrupted by {name}") and "run/checkpoints/last.ckpt" in line
            and "--resume" in line):
        problems.append("message does not name the checkpoint and --resume")
    if len(err.strip().splitlines()) != 1 or "Traceback" in err:
        problems.append("more than one line on stderr")
    if (out / "model.safetensors").exists() or hidden(out):
        problems.append("model file or temporary left")
    if not last.is_file():
        problems.append("checkpoint gone")
    return proc.returncode, line, "last.ckpt kept, no model file, no temporary", problems


@case("training: SIGTERM during `train`")
def sigterm(d):
    return _signal_case(d, signal.SIGTERM, 143)


@case("training: SIGINT during `train --quiet`")
def sigint(d):
    return _signal_case(d, signal.SIGINT, 130)


@case("training: SIGKILL before the first checkpoint, rerun, then `--resume`")
def killed_then_resume(d):
    out = d / "run"
    proc = start(train_args(out, "budget.max_epochs=null", "budget.max_time=120s", "data.patches_per_epoch=100000"),
                 cwd=d)
    if not wait_for((out / "metrics.csv").exists, proc, 120):
        proc.kill()
        proc.wait()
        return proc.returncode, "", "no metrics.csv appeared", ["the run did not start"]
    proc.kill()
    proc.wait()
    again = run(train_args(out, "budget.max_epochs=1"), cwd=d)
    resumed = run(train_args(out, "budget.max_epochs=1") + ["--resume"], cwd=d)
    problems = clean_error(again, "--resume", code=1)
    if resumed.returncode != 0 or "starting afresh" not in resumed.stderr:
        problems.append(f"--resume: exit {resumed.returncode}, {first_line(resumed.stderr)!r}")
    what = _model_readable(out / "model.safetensors")
    if not what.startswith("model"):
        problems.append(what)
    return f"-9, {again.returncode}, {resumed.returncode}", \
        f"{first_line(again.stderr)} / --resume: {first_line(resumed.stderr)}", what, problems


@case("training: full disk (file size limit 60 kB) during `train`")
def full_disk_train(d):
    out = d / "run"
    p = run(train_args(out, "budget.max_epochs=2"), cwd=d, limit=60_000)
    problems = clean_error(p, "cannot write", "file size limit", code=1)
    left = sorted(x.name for x in out.rglob("*.ckpt")) + hidden(out)
    if left or (out / "model.safetensors").exists():
        problems.append(f"left: {left}")
    return p.returncode, first_line(p.stderr), "no checkpoint, model or temporary", problems


@case("training: diverging run (`--set optim.lr=1e3`)")
def diverged(d):
    out = d / "run"
    p = run(train_args(out, "optim.lr=1e3", "budget.max_epochs=2"), cwd=d)
    problems = clean_error(p, "training diverged", "optim.lr", code=1)
    if "looks" in first_line(p.stderr):
        problems.append("talks about looks")
    if (out / "model.safetensors").exists():
        problems.append("model file written")
    return p.returncode, first_line(p.stderr), "no model file", problems


@case("sizes: `apply --overlap 100000`")
def overlap(d):
    src = write_tif(d / "s.tif", speckle((64, 64)))
    model = model_file(d / "m.safetensors")
    p = run(["apply", src, "--model", model, "--out", d / "o.tif", "--overlap", 100000, "--quiet"], cwd=d)
    problems = clean_error(p, "overlap (100000)", code=2)
    if (d / "o.tif").exists() or hidden(d):
        problems.append("output left")
    return p.returncode, first_line(p.stderr), "nothing", problems


@case("sizes: `apply --tile 100000`")
def tile(d):
    src = write_tif(d / "s.tif", speckle((64, 64)))
    model = model_file(d / "m.safetensors")
    p = run(["apply", src, "--model", model, "--out", d / "o.tif", "--tile", 100000, "--quiet"], cwd=d)
    problems = clean_error(p, "tile (100000)", code=2)
    if (d / "o.tif").exists() or hidden(d):
        problems.append("output left")
    return p.returncode, first_line(p.stderr), "nothing", problems


@case("sizes: `filter boxcar --window 100001`")
def window(d):
    src = write_tif(d / "s.tif", speckle((64, 64)))
    t0 = time.monotonic()
    p = run(["filter", "boxcar", src, d / "o.tif", "--window", 100001, "--looks", 1], cwd=d)
    problems = clean_error(p, "--window", code=2)
    if (d / "o.tif").exists() or hidden(d):
        problems.append("output left")
    return p.returncode, first_line(p.stderr), f"nothing; refused in {time.monotonic() - t0:.1f} s", problems


@case("sizes: `filter improved-sigma --looks 1e-3`")
def sigma_looks(d):
    src = write_tif(d / "s.tif", speckle((64, 64)))
    p = run(["filter", "improved-sigma", src, d / "o.tif", "--looks", "1e-3", "--quiet"], cwd=d)
    problems = clean_error(p, "looks", "domain", code=1)
    if (d / "o.tif").exists() or hidden(d):
        problems.append("output left")
    return p.returncode, first_line(p.stderr), "nothing", problems


@case("sizes: multi-band (VV, VH) file to `filter boxcar`")
def multiband(d):
    bands = np.stack([speckle((64, 48), seed=5), 4.0 * speckle((64, 48), seed=6)])
    src = write_tif(d / "vv_vh.tif", bands, descriptions=("VV", "VH"))
    out = d / "all.tif"
    p = run(["filter", "boxcar", src, out, "--looks", 1, "--quiet"], cwd=d)
    problems = [] if p.returncode == 0 else [f"exit {p.returncode}"]
    ok, what = readable(out)
    if ok:
        with rasterio.open(out) as ds:
            if ds.count != 2 or ds.descriptions != ("VV", "VH"):
                problems.append(f"bands {ds.count} {ds.descriptions}")
            means = ds.read().mean(axis=(1, 2))
        # a boxcar keeps each band's mean (common practice); edges weigh a little, hence 2 %
        if not np.allclose(means, bands.mean(axis=(1, 2)), rtol=0.02):
            problems.append(f"band means {means} vs {bands.mean(axis=(1, 2))}")
    else:
        problems.append(what)
    return p.returncode, first_line(p.stderr), f"{what}, descriptions VV, VH", problems


@case("units: 1-look amplitude described only as 'amplitude', to `info --json`")
def amplitude(d):
    rng = np.random.default_rng(4)
    reflectivity = np.full((256, 256), 0.2)
    reflectivity[:, 128:] = 0.05
    src = write_tif(d / "amp.tif", np.sqrt(reflectivity * rng.exponential(1.0, (256, 256))),
                    descriptions=("amplitude",))
    p = run(["info", src, "--json"], cwd=d)
    problems = [] if p.returncode == 0 else [f"exit {p.returncode}"]
    try:
        info = json.loads(p.stdout)
        enl = info["band_info"][0]["enl"]
        units = info["units"]
    except (ValueError, KeyError, IndexError, TypeError) as exc:
        return p.returncode, first_line(p.stderr), "", [f"no JSON answer ({exc})"]
    # 1-look intensity has ENL 1; amplitude read as intensity would show 1/(4/pi - 1) = 3.66 (Oliver & Quegan 1998)
    if units != "amplitude" or not 0.85 < enl < 1.15:
        problems.append(f"units {units}, ENL {enl}")
    return p.returncode, first_line(p.stderr), f"read as {units}, ENL {enl:.2f} (1 expected)", problems


@case("units: constant scene to `info --json`")
def constant_json(d):
    src = write_tif(d / "flat.tif", np.full((64, 64), 0.3))
    p = run(["info", src, "--json"], cwd=d)

    def refuse(name):
        raise ValueError(f"not JSON: {name}")

    problems = [] if p.returncode == 0 else [f"exit {p.returncode}"]
    try:
        info = json.loads(p.stdout, parse_constant=refuse)
        enl = info["band_info"][0]["enl"]
    except (ValueError, KeyError, IndexError) as exc:
        return p.returncode, first_line(p.stderr), "", [f"stdout is not strict JSON ({exc})"]
    if enl is not None:
        problems.append(f"enl {enl}")
    return p.returncode, first_line(p.stderr), "strict JSON, enl null with a note", problems


@case("looks: 10-look scene to a 1-look model (`apply`)")
def looks_outside(d):
    src = write_tif(d / "ten.tif", speckle((128, 128), seed=9, looks=10.0))
    model = model_file(d / "m.safetensors")
    out = d / "o.tif"
    p = run(["apply", src, "--model", model, "--out", out, "--threads", 1, "--quiet"], cwd=d)
    problems = [] if p.returncode == 0 else [f"exit {p.returncode}"]
    warn = [ln for ln in p.stderr.splitlines() if "outside the 1 looks" in ln]
    if not warn or "applied it as for 1 looks" not in warn[0]:
        problems.append("no warning saying what was assumed")
    ok, what = readable(out)
    if not ok:
        problems.append(what)
    return p.returncode, warn[0] if warn else first_line(p.stderr), what, problems


@case("looks: 20x20 scene, looks not given (`filter lee`, `info`)")
def too_small(d):
    src = write_tif(d / "small.tif", speckle((20, 20), seed=2))
    p = run(["filter", "lee", src, d / "o.tif", "--quiet"], cwd=d)
    problems = clean_error(p, "--looks", code=1)
    i = run(["info", src], cwd=d)
    if i.returncode != 0 or "assumed 1 look" not in i.stderr:
        problems.append(f"info: exit {i.returncode}, no 'assumed 1 look' warning")
    if (d / "o.tif").exists():
        problems.append("output left")
    return f"{p.returncode}, info {i.returncode}", first_line(p.stderr), "nothing; info warns 'assumed 1 look'", \
        problems


@case("looks: all-textured scene (K-distributed, no homogeneous area) to `info`")
def textured(d):
    rng = np.random.default_rng(8)
    image = rng.gamma(0.5, 2.0, (256, 256)) * rng.gamma(4.0, 0.25, (256, 256))
    src = write_tif(d / "tex.tif", image, tags={"UNITS": "intensity"})
    p = run(["info", src], cwd=d)
    warn = [ln for ln in p.stderr.splitlines() if "below one" in ln]
    problems = [] if p.returncode == 0 else [f"exit {p.returncode}"]
    if not warn or "--looks" not in warn[0]:
        problems.append("no warning naming --looks")
    return p.returncode, warn[0] if warn else first_line(p.stderr), "nothing written (info)", problems


@case("bench: `--overwrite` on a folder holding the input scene")
def bench_input(d):
    data = d / "data"
    data.mkdir()
    img = write_tif(data / "noisy.tif", speckle((128, 128), seed=7))
    (data / "notes.txt").write_text("field notes")
    before = tree(data)
    p = run(["bench", data, "--image", img, "--looks", 1, "--method", "lee", "--overwrite", "--quiet"], cwd=d)
    problems = clean_error(p, "holds an input", code=1)
    if tree(data) != before:
        problems.append("the folder changed")
    return p.returncode, first_line(p.stderr), "folder unchanged (scene and notes.txt kept)", problems


@case("bench: `--overwrite` on a report folder with an unrelated file, then `.` as OUT_DIR")
def bench_unrelated(d):
    img = write_tif(d / "noisy.tif", speckle((128, 128), seed=7))
    rep = d / "rep"
    first = run(["bench", rep, "--image", img, "--looks", 1, "--method", "boxcar", "--quiet"], cwd=d)
    if first.returncode != 0:
        return first.returncode, first_line(first.stderr), "", ["the first report was not written"]
    (rep / "notes.txt").write_text("field notes")
    before = tree(rep)
    p = run(["bench", rep, "--image", img, "--looks", 1, "--method", "lee", "--overwrite", "--quiet"], cwd=d)
    problems = clean_error(p, "notes.txt", code=1)
    (rep / "notes.txt").unlink()
    here = run(["bench", ".", "--image", img, "--looks", 1, "--method", "lee", "--overwrite", "--quiet"], cwd=rep)
    problems += clean_error(here, "current directory", code=1)
    (rep / "notes.txt").write_text("field notes")
    if tree(rep) != before:
        problems.append("the report folder changed")
    return f"{first.returncode}, {p.returncode}, {here.returncode}", \
        f"{first_line(p.stderr)} / `.`: {first_line(here.stderr)}", "report and notes.txt unchanged", problems


# --------------------------------------------------------------------------- the table

def md(text) -> str:
    text = str(text).replace("|", "\\|").replace("\n", " ")
    return text if len(text) <= 220 else text[:217] + "..."


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--only", nargs="+", default=[], help="run only cases whose title holds one of these words")
    parser.add_argument("--keep", type=Path, help="work in this folder and keep it (default: a removed temporary)")
    parser.add_argument("--list", action="store_true", help="list the cases and stop")
    args = parser.parse_args(argv)
    cases = [(t, f) for t, f in CASES if not args.only or any(w.lower() in t.lower() for w in args.only)]
    if args.list:
        print("\n".join(t for t, _ in cases))
        return 0
    base = Path(tempfile.mkdtemp(prefix="despeck-faults-", dir=args.keep))
    rows, failed, t_all = [], 0, time.monotonic()
    try:
        for k, (title, fn) in enumerate(cases, start=1):
            folder = base / f"{k:02d}_{fn.__name__}"
            folder.mkdir()
            t0 = time.monotonic()
            STDERR.clear()
            try:
                code, line, disk, problems = fn(folder)
                raw = [ln for err in STDERR for ln in raw_lines(err)]
                if raw:
                    problems = problems + [f"{len(raw)} raw library line(s) on stderr, e.g. {raw[0]!r}"]
                verdict = "PASS" if not problems else "FAIL: " + "; ".join(problems)
            except Skip as exc:
                code, line, disk, verdict = "-", "", "", f"SKIP: {exc}"
            except Exception as exc:  # noqa: BLE001 - a broken case is a failed case, with its reason
                code, line, disk = "-", "", ""
                verdict = f"FAIL: the sweep itself raised {type(exc).__name__}: {exc}"
                traceback.print_exc()
            failed += verdict.startswith("FAIL")
            print(f"[{k}/{len(cases)}] {time.monotonic() - t0:5.1f} s  {verdict[:60]}  {title}", file=sys.stderr,
                  flush=True)
            rows.append((k, title, code, line, disk, verdict))
    finally:
        if args.keep is None:
            shutil.rmtree(base, ignore_errors=True)
    print(f"despeck fault sweep: {len(rows)} cases, {failed} failed, {time.monotonic() - t_all:.0f} s "
          f"({' '.join(DESPECK)}; {os.cpu_count()} CPUs; uid {os.geteuid()})\n")
    print("| # | case | exit | first line on stderr | destination | result |")
    print("|---|---|---|---|---|---|")
    for k, title, code, line, disk, verdict in rows:
        print(f"| {k} | {md(title)} | {md(code)} | {md(line)} | {md(disk)} | {md(verdict)} |")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
