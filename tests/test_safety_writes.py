"""Honest writes: a failed or clashing write never publishes a file or reports success.

Faults are made real, not mocked: the file size limit of a child process
(``setrlimit(RLIMIT_FSIZE)``, POSIX; the process ignores SIGXFSZ so the write fails with
EFBIG instead of killing it), a folder without write permission (for root, the child
drops CAP_DAC_OVERRIDE from its capability bounding set, Linux ``prctl(PR_CAPBSET_DROP)``),
a full file system (a 256 KiB tmpfs in a private mount namespace, where allowed),
GeoTIFFs cut off part-way, SIGKILLed writers and a second writer holding the output's
lock. Every output is read back with rasterio (GDAL), an outside reader. Common
practice for command-line tools: one line on standard error, a non-zero exit status,
nothing at the destination.
"""

import ctypes
import os
import resource
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import rasterio
import torch
from affine import Affine

from despeck import raster
from despeck.atomic import claim_output, clean_stale_temps, sibling_temp
from despeck.cli import main
from despeck.errors import InputError
from despeck.inference import despeckle_array, despeckle_file
from despeck.models import Despeckler, create_model, save_model_file

torch.set_num_threads(1)

TRANSFORM = Affine(10.0, 0.0, 512000.0, 0.0, -10.0, 6400000.0)


def _tif(path, data, *, block=256, nodata=None):
    data = np.asarray(data, dtype=np.float32)
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[1], height=data.shape[0], count=1,
                       dtype="float32", crs="EPSG:32633", transform=TRANSFORM, tiled=True, blockxsize=block,
                       blockysize=block, nodata=nodata) as ds:
        ds.write(data[None])
        ds.update_tags(LOOKS="1")
    return path


def _speckle(shape, seed=0):
    """1-look speckle on a gentle ramp: does not compress much, like real data."""
    rng = np.random.default_rng(seed)
    ramp = np.linspace(0.5, 2.0, shape[1], dtype=np.float32)[None, :]
    return (ramp * rng.exponential(1.0, shape)).astype(np.float32)


def _model(seed=0):
    torch.manual_seed(seed)
    return Despeckler(create_model("logcnn-xs"), looks=1).eval()


def _model_file(path):
    save_model_file(path, _model(), units="intensity")
    return path


def _leftovers(folder):
    """Hidden files despeck may have left: temporaries and lock files."""
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def _cli(args, *, limit=None, drop_dac=False, env=None, timeout=120):
    """Run ``python -m despeck`` in a child, optionally under a file size limit or without root's DAC override."""
    def setup():
        if limit is not None:
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
            resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
        if drop_dac:
            libc = ctypes.CDLL(None, use_errno=True)
            for cap in (1, 2):  # CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH (linux/capability.h)
                if libc.prctl(24, cap, 0, 0, 0) != 0:  # PR_CAPBSET_DROP
                    os._exit(99)
    full_env = dict(os.environ, OMP_NUM_THREADS="1", **(env or {}))
    return subprocess.run([sys.executable, "-m", "despeck", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, preexec_fn=setup, env=full_env)


def _errors(stderr):
    return [line for line in stderr.splitlines() if line.startswith("despeck: error:")]


def _assert_one_line(result, *names):
    assert result.returncode != 0, result.stderr
    assert "Traceback" not in result.stderr, result.stderr
    errors = _errors(result.stderr)
    assert len(errors) == 1, result.stderr
    for name in names:
        assert str(name) in errors[0], errors[0]
    return errors[0]


# ---------------------------------------------------------------- defect 1: write errors are never lost

def test_simulate_over_file_size_limit_fails_and_publishes_nothing(tmp_path):
    clean = _tif(tmp_path / "clean.tif", np.full((1024, 1024), 0.3, np.float32))
    out = tmp_path / "speckled.tif"
    # GDAL compresses on worker threads here, as `despeck apply` makes it do: their
    # write errors never reach the caller, so only reading the file back catches them.
    result = _cli(["simulate", clean, out, "--looks", 1, "--seed", 1, "--quiet"], limit=1 << 20,
                  env={"GDAL_NUM_THREADS": "2"})
    line = _assert_one_line(result, out)
    assert "file size limit" in line
    # ...and nothing else: no raw lines from GDAL's worker threads or libtiff's own printer
    # (the constant scene's one-line units warning is despeck's, shown as the file is opened)
    said = [ln for ln in result.stderr.splitlines() if ln.strip() and not ln.startswith("despeck: warning: ")]
    assert said == [line], result.stderr
    assert not out.exists() and _leftovers(tmp_path) == []
    # Without the limit the same command works, and a rerun is not fooled by anything left behind.
    assert _cli(["simulate", clean, out, "--looks", 1, "--seed", 1, "--quiet"]).returncode == 0
    with rasterio.open(out) as ds:
        assert ds.read(1).mean() == pytest.approx(0.3, rel=0.02)  # Gamma speckle keeps the mean


def test_apply_over_file_size_limit_fails_and_publishes_nothing(tmp_path):
    src = _tif(tmp_path / "scene.tif", _speckle((256, 1024)))  # two output blocks of about 0.4 MB
    model = _model_file(tmp_path / "m.safetensors")
    out = tmp_path / "clean.tif"
    result = _cli(["apply", src, "--model", model, "--out", out, "--threads", 2, "--quiet"], limit=1 << 17)
    line = _assert_one_line(result, out)
    assert "file size limit" in line
    assert [ln for ln in result.stderr.splitlines() if ln.strip()] == [line], result.stderr
    assert not out.exists() and _leftovers(tmp_path) == []  # so a rerun does not skip the scene as done


def test_writer_refuses_a_file_cut_off_after_closing(tmp_path):
    """A block whose bytes are missing in the closed file stops the rename (the read-back check)."""
    like = raster.read_scene(_tif(tmp_path / "in.tif", _speckle((512, 512))))
    out = tmp_path / "out.tif"
    writer = raster.open_output(out, like)
    writer.write(like.intensity)
    writer._ds.close()  # noqa: SLF001 - as GDAL would have left it after losing a write
    with open(writer._tmp, "r+b") as fh:  # noqa: SLF001
        fh.truncate(os.path.getsize(writer._tmp) * 2 // 3)  # noqa: SLF001
    writer._ds = rasterio.open(writer._tmp)  # noqa: SLF001 - a handle close() can close again
    with pytest.raises(raster.RasterError, match="incomplete|does not read back"):
        writer.close()
    assert not out.exists() and _leftovers(tmp_path) == []


# ---------------------------------------------------------------- defect 3: non-finite model output

def _broken_model():
    model = _model()
    with torch.no_grad():
        model.network.body[-1].bias.fill_(float("nan"))
    return model


def test_non_finite_model_output_is_an_error_naming_the_file(tmp_path):
    src = _tif(tmp_path / "scene.tif", _speckle((96, 80)))
    out = tmp_path / "out.tif"
    with pytest.raises(InputError, match=r"scene\.tif: the model gave non-finite values"):
        despeckle_file(src, out, _broken_model(), progress=False, threads=1)
    assert not out.exists() and _leftovers(tmp_path) == []
    with pytest.raises(InputError, match="non-finite"):
        despeckle_array(_speckle((64, 64)), _broken_model(), progress=False, threads=1)
    # invalid pixels may come out as anything: only valid ones count
    x = _speckle((64, 64))
    assert np.isfinite(despeckle_array(x, _model(), valid=x > 0, progress=False, threads=1)).all()


# ---------------------------------------------------------------- defect 4: cut-off input files

def _cut_off(tmp_path, name="cut.tif"):
    """A tiled GeoTIFF whose header is whole but whose data stop half-way (an interrupted copy)."""
    from rasterio.shutil import copy as gdal_copy

    whole = _tif(tmp_path / f"whole_{name}", _speckle((512, 512), seed=3), block=128)
    path = tmp_path / name
    gdal_copy(whole, path, driver="GTiff", tiled=True, blockxsize=128, blockysize=128)  # header first
    whole.unlink()
    with open(path, "r+b") as fh:
        fh.truncate(path.stat().st_size // 2)
    return path


def test_cut_off_geotiff_gives_one_line_in_every_command(tmp_path, capsys):
    cut = _cut_off(tmp_path)
    model = _model_file(tmp_path / "m.safetensors")
    commands = [
        ["info", cut],
        ["filter", "boxcar", cut, tmp_path / "f.tif", "--looks", 1, "--quiet"],
        ["simulate", cut, tmp_path / "s.tif", "--looks", 1, "--quiet"],
        ["apply", cut, "--model", model, "--out", tmp_path / "a.tif", "--threads", 1, "--quiet"],
    ]
    for argv in commands:
        code = main([str(a) for a in argv])
        err = capsys.readouterr().err
        assert code == 1, (argv, err)  # an input error (despeck.cli.exit_codes.FAILED)
        errors = _errors(err)
        assert len(errors) == 1 and "cut.tif" in errors[0] and "cut off or damaged" in errors[0], (argv, err)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cut.tif", "m.safetensors"]


def test_batch_goes_on_after_a_cut_off_file_and_ends_with_a_summary(tmp_path, capsys):
    _tif(tmp_path / "a.tif", _speckle((96, 96), seed=1))
    _cut_off(tmp_path, "b.tif")
    _tif(tmp_path / "c.tif", _speckle((96, 96), seed=2))
    model = _model_file(tmp_path / "m.safetensors")
    out_dir = tmp_path / "out"
    code = main(["apply", str(tmp_path / "*.tif"), "--model", str(model), "--out-dir", str(out_dir),
                 "--threads", "1"])
    captured = capsys.readouterr()
    assert code == 3  # partial batch: a and c written, b failed (despeck.cli.exit_codes.PARTIAL)
    errors = _errors(captured.err)
    assert len(errors) == 1 and "b.tif" in errors[0]
    assert "2 written, 0 skipped, 1 failed" in captured.out
    assert sorted(p.name for p in out_dir.iterdir()) == ["a_despeckled.tif", "c_despeckled.tif"]


# ---------------------------------------------------------------- defect 5: read-only and full output folders

def _read_only_folder(tmp_path):
    folder = tmp_path / "ro"
    folder.mkdir()
    folder.chmod(0o555)
    return folder


def _dac_dropped_or_skip():
    if os.geteuid() != 0:
        return False
    probe = _cli(["--version"], drop_dac=True)
    if probe.returncode == 99:
        pytest.skip("running as root without CAP_SETPCAP: cannot make a folder read-only for the child")
    return True


def test_read_only_output_folder_gives_one_line_naming_it(tmp_path):
    src = _tif(tmp_path / "in.tif", _speckle((128, 128)))
    folder = _read_only_folder(tmp_path)
    drop = _dac_dropped_or_skip()
    try:
        for args in (["filter", "boxcar", src, folder / "f.tif", "--looks", 1, "--quiet"],
                     ["simulate", src, folder / "s.tif", "--looks", 1, "--quiet"]):
            result = _cli(args, drop_dac=drop)
            line = _assert_one_line(result, folder)
            assert result.returncode == 1 and "output folder" in line
        assert list(folder.iterdir()) == []
    finally:
        folder.chmod(0o755)


def test_apply_batch_stops_at_once_on_a_read_only_out_dir(tmp_path):
    inputs = [_tif(tmp_path / f"{k}.tif", _speckle((64, 64), seed=k)) for k in range(3)]
    model = _model_file(tmp_path / "m.safetensors")
    folder = _read_only_folder(tmp_path)
    drop = _dac_dropped_or_skip()
    try:
        result = _cli(["apply", *inputs, "--model", model, "--out-dir", folder, "--threads", 1], drop_dac=drop)
        line = _assert_one_line(result, folder)
        assert "2 remaining output(s) for this folder were not attempted" in line
        assert "0 written, 0 skipped, 1 failed, 2 not attempted" in result.stdout
        assert result.returncode == 1  # no output complete: not a partial batch (exit status 3)
        assert list(folder.iterdir()) == []
    finally:
        folder.chmod(0o755)


def test_full_file_system_gives_one_line_naming_the_folder(tmp_path):
    if shutil.which("unshare") is None:
        pytest.skip("no unshare(1) to mount a small tmpfs in a private namespace")
    src = _tif(tmp_path / "in.tif", _speckle((1024, 1024)))
    small = tmp_path / "small"
    small.mkdir()
    out = small / "s.tif"
    script = (f"mount -t tmpfs -o size=256k tmpfs {small} || exit 97; "
              f"OMP_NUM_THREADS=1 {sys.executable} -m despeck simulate {src} {out} --looks 1 --quiet; "
              f"code=$?; ls -A {small}; exit $code")
    result = subprocess.run(["unshare", "-m", "--propagation", "private", "sh", "-c", script],
                            capture_output=True, text=True, timeout=120)
    if result.returncode == 97 or "unshare failed" in result.stderr or "Operation not permitted" in result.stderr:
        pytest.skip(f"cannot mount a small tmpfs here: {result.stderr.strip()[:200]}")
    line = _assert_one_line(result, small)
    assert "no space left" in line and result.returncode == 1
    assert result.stdout.strip() == ""  # nothing left in the full folder: no output, temporary or lock


# ---------------------------------------------------------------- defect 12: stale temporaries, exclusive claims

def _killed_writer(dest, claim=False):
    """A child that makes despeck's temporary file (and claim) for ``dest``, then is SIGKILLed."""
    code = ("import sys, time; from despeck.atomic import sibling_temp, claim_output; "
            f"c = claim_output({str(dest)!r}) if {claim} else None; "
            f"print(sibling_temp({str(dest)!r}), flush=True); time.sleep(120)")
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    tmp = proc.stdout.readline().strip()
    proc.kill()
    proc.wait(timeout=30)
    assert os.path.exists(tmp)
    return tmp


def test_stale_temporary_of_a_killed_writer_is_removed_by_the_next_run(tmp_path):
    src = _tif(tmp_path / "in.tif", np.full((64, 64), 0.3, np.float32))
    out = tmp_path / "s.tif"
    stale = _killed_writer(out)
    foreign = tmp_path / ".s.tif.a1b2c3d4.tmp"  # not despeck's name pattern: never touched
    foreign.write_bytes(b"keep")
    result = _cli(["simulate", src, out, "--looks", 1, "--quiet"])
    assert result.returncode == 0, result.stderr
    assert not os.path.exists(stale) and foreign.exists() and out.exists()
    assert _leftovers(tmp_path) == [foreign.name]


def test_only_temporaries_of_dead_processes_are_cleaned(tmp_path):
    dest = tmp_path / "x.tif"
    mine = sibling_temp(dest)  # this process is alive
    old = time.time() - 3600
    os.utime(mine, (old, old))
    other_host = tmp_path / ".x.tif.despeck-00000000-1-abcdefgh.tmp"  # a process id of another machine
    other_host.write_bytes(b"")
    os.utime(other_host, (old, old))
    assert clean_stale_temps(tmp_path) == []
    assert mine.exists() and other_host.exists()


def test_second_writer_of_the_same_output_is_refused(tmp_path):
    like = raster.read_scene(_tif(tmp_path / "in.tif", _speckle((64, 64))))
    out = tmp_path / "out.tif"
    first = raster.open_output(out, like)
    with pytest.raises(raster.OutputBusyError, match="being written by another despeck process"):
        raster.open_output(out, like)
    first.write(like.intensity)
    first.close()
    assert out.exists() and _leftovers(tmp_path) == []
    # the claim is gone with the first writer: a later writer may replace the file on request
    raster.write_scene(out, like.intensity * 2, like, overwrite=True)


def test_apply_skips_an_output_another_process_is_writing(tmp_path, capsys):
    src = _tif(tmp_path / "scene.tif", _speckle((64, 64)))
    model = _model_file(tmp_path / "m.safetensors")
    out = tmp_path / "clean.tif"
    argv = ["apply", str(src), "--model", str(model), "--out", str(out), "--threads", "1", "--quiet"]
    with claim_output(out):  # as another despeck process writing the same output would hold it
        assert main(argv) == 0
        err = capsys.readouterr().err
        assert "being written by another despeck process" in err and "skipped" in err and not out.exists()
        assert main(argv + ["--busy", "fail"]) == 1  # the one output failed
        assert len(_errors(capsys.readouterr().err)) == 1
    assert main(argv) == 0 and out.exists()


def test_lock_of_a_killed_writer_is_taken_over(tmp_path):
    src = _tif(tmp_path / "in.tif", np.full((64, 64), 0.3, np.float32))
    out = tmp_path / "s.tif"
    _killed_writer(out, claim=True)
    assert any(name.endswith(".despeck-lock") for name in _leftovers(tmp_path))
    result = _cli(["simulate", src, out, "--looks", 1, "--quiet"])
    assert result.returncode == 0, result.stderr
    assert out.exists() and _leftovers(tmp_path) == []

