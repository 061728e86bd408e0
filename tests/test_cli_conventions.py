"""Conventions of the ``despeck`` command: exit statuses, help, ``--verbose``, warnings, ``filter --threads``.

The exit statuses are those of :mod:`despeck.cli.exit_codes`. 2 for a usage error is
what Python's argparse uses for its own (Python documentation, ``ArgumentParser.error``);
130 and 143 are the shell's 128 + signal number for SIGINT (2) and SIGTERM (15) (bash
manual, "Exit Status"; from memory); 0 for success and a non-zero status for failure
are common practice. Each status is checked through the real console entry
(``python -m despeck``) in a child process.
"""

import ast
import logging
import os
import pathlib
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

from despeck.cli import exit_codes, main
from despeck.errors import ConfigError, InputError, OptionError, RasterError

TRANSFORM = from_origin(410000.0, 7020000.0, 10.0, 10.0)
ENV = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")


def _tif(path, data, *, block=None):
    data = np.asarray(data, dtype=np.float32)
    profile = dict(driver="GTiff", width=data.shape[1], height=data.shape[0], count=1, dtype="float32",
                   crs="EPSG:32633", transform=TRANSFORM)
    if block:
        profile.update(tiled=True, blockxsize=block, blockysize=block)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data, 1)
    return path


def _speckle(shape, seed=0, looks=1.0):
    """Gamma(L, 1/L) speckle (Oliver & Quegan 1998) on a gentle ramp of reflectivity."""
    rng = np.random.default_rng(seed)
    ramp = np.linspace(0.05, 0.2, shape[1], dtype=np.float32)
    return (ramp * rng.gamma(looks, 1.0 / looks, shape)).astype(np.float32)


def _despeck(args, cwd, **kwargs):
    return subprocess.run([sys.executable, "-m", "despeck", *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, timeout=300, env=ENV, **kwargs)


def _model_file(path):
    import torch

    from despeck.models import Despeckler, create_model, save_model_file

    torch.manual_seed(0)
    save_model_file(path, Despeckler(create_model("logcnn-xs"), looks=1).eval(), units="intensity")
    return path


def _errors(stderr):
    return [ln for ln in stderr.splitlines() if ln.startswith("despeck: error:")]


# --------------------------------------------------------------------------- the table

def test_exit_status_values_and_mapping():
    assert (exit_codes.OK, exit_codes.FAILED, exit_codes.USAGE, exit_codes.PARTIAL) == (0, 1, 2, 3)
    # 128 + signal number (bash manual, "Exit Status"; from memory)
    assert exit_codes.INTERRUPTED == 128 + signal.SIGINT and exit_codes.TERMINATED == 128 + signal.SIGTERM
    assert exit_codes.status_of(OptionError("--tile ...")) == exit_codes.USAGE
    for exc in (InputError("x"), RasterError("x"), ConfigError("x")):
        assert exit_codes.status_of(exc) == exit_codes.FAILED
    assert exit_codes.status_of(KeyboardInterrupt()) == exit_codes.INTERRUPTED
    assert exit_codes.status_of(exit_codes.Terminated()) == exit_codes.TERMINATED
    assert exit_codes.for_signal(signal.SIGINT) == 130 and exit_codes.for_signal(signal.SIGTERM) == 143
    with pytest.raises(ValueError, match="signal"):
        exit_codes.for_signal(signal.SIGHUP)
    with pytest.raises(OptionError, match="--window must"):
        with exit_codes.option_values():
            raise InputError("--window must be odd")
    assert exit_codes.batch_status(complete=3, incomplete=0) == exit_codes.OK
    assert exit_codes.batch_status(complete=2, incomplete=1) == exit_codes.PARTIAL
    assert exit_codes.batch_status(complete=0, incomplete=3) == exit_codes.FAILED


def test_help_of_every_command_lists_the_exit_statuses(tmp_path):
    for args in (["--help"], ["apply", "--help"], ["filter", "--help"], ["train", "--help"]):
        p = _despeck(args, tmp_path)
        assert p.returncode == exit_codes.OK, p.stderr
        assert "exit status:" in p.stdout, args
        for code in (0, 1, 2, 3, 130, 143):
            assert f"\n  {code:<4} " in p.stdout, (args, code)


# --------------------------------------------------------------------------- each status, real command

def test_status_0_when_every_output_is_complete(tmp_path):
    _tif(tmp_path / "clean.tif", np.broadcast_to(np.geomspace(0.01, 1.0, 64, dtype=np.float32), (64, 64)))
    p = _despeck(["simulate", "clean.tif", "s.tif", "--looks", 2, "--seed", 1, "--quiet"], tmp_path)
    assert p.returncode == 0 and p.stderr == "", p.stderr
    with rasterio.open(tmp_path / "s.tif") as ds:
        assert np.isfinite(ds.read(1)).all()


def test_status_1_for_an_input_error(tmp_path):
    p = _despeck(["info", "absent.tif"], tmp_path)
    assert p.returncode == exit_codes.FAILED
    assert len(_errors(p.stderr)) == 1 and "absent.tif" in p.stderr and "Traceback" not in p.stderr


@pytest.mark.parametrize("command", [["simulate"], ["filter", "lee"], ["apply"]])
def test_a_bad_input_leaves_no_output_folder_behind(tmp_path, command, capsys):
    # The input is opened before the output's folder is made (despeck.raster.streaming).
    (tmp_path / "broken.tif").write_bytes(b"not a GeoTIFF")
    for name in ("absent.tif", "broken.tif"):
        out = tmp_path / f"new_{name}" / "out.tif"
        args = [*command, str(tmp_path / name), str(out), "--quiet"]
        if command[0] == "simulate":
            args += ["--looks", "2"]
        assert main(args) == exit_codes.FAILED
        assert name in capsys.readouterr().err
        assert not out.parent.exists()


def test_status_2_for_usage_errors(tmp_path):
    _tif(tmp_path / "in.tif", _speckle((64, 64)))
    # no command: the help, on standard error, and status 2 (it was 0)
    p = _despeck([], tmp_path)
    assert p.returncode == exit_codes.USAGE and p.stdout == ""
    assert p.stderr.startswith("usage: despeck") and "exit status:" in p.stderr
    assert "no command given" in _errors(p.stderr)[0]
    assert _despeck(["-v"], tmp_path).returncode == exit_codes.USAGE
    # argparse's own usage errors
    for args in (["nonsense"], ["filter", "lee"], ["filter", "lee", "in.tif", "o.tif", "--window", "x"],
                 ["apply", "in.tif", "--no-such-option"]):
        p = _despeck(args, tmp_path)
        assert p.returncode == exit_codes.USAGE, (args, p.stderr)
    # option values refused before any file is read
    for args, word in ((["filter", "lee", "in.tif", "o.tif", "--threads", 0], "--threads"),
                       (["filter", "lee", "in.tif", "o.tif", "--window", 6], "--window"),
                       (["filter", "lee", "in.tif", "o.tif", "--looks", -1], "--looks"),
                       (["filter", "wavelet", "in.tif", "o.tif"], "wavelet"),
                       (["filter", "frost", "in.tif", "o.tif", "--option", "dampening=2"], "dampening"),
                       (["filter", "frost", "in.tif", "o.tif", "--option", "damping"], "--option"),
                       (["apply", "in.tif", "--shard", "3/2"], "--shard"),
                       (["apply", "in.tif", "--threads", 0], "--threads"),
                       (["apply", "in.tif", "--looks", 0], "--looks"),
                       (["simulate", "in.tif", "s.tif", "--looks", 0], "--looks"),
                       (["bench", "rep", "--image", "in.tif", "--method", "lee:window=4"], "window"),
                       (["bench", "rep", "--image", "in.tif", "--crop", "1,2"], "--crop")):
        p = _despeck(args, tmp_path)
        errors = _errors(p.stderr)
        assert p.returncode == exit_codes.USAGE, (args, p.stderr)
        assert len(errors) == 1 and word in errors[0], (args, p.stderr)
    assert sorted(x.name for x in tmp_path.iterdir()) == ["in.tif"]  # nothing written


def test_status_3_for_a_partial_batch(tmp_path):
    _tif(tmp_path / "a.tif", _speckle((64, 64), seed=1))
    (tmp_path / "b.tif").write_text("not an image")
    _model_file(tmp_path / "m.safetensors")
    p = _despeck(["apply", "a.tif", "b.tif", "--model", "m.safetensors", "--out-dir", "out", "--threads", 1],
                 tmp_path)
    assert p.returncode == exit_codes.PARTIAL, p.stderr
    errors = _errors(p.stderr)
    assert len(errors) == 1 and "b.tif" in errors[0]
    assert "1 written, 0 skipped, 1 failed" in p.stdout
    assert sorted(x.name for x in (tmp_path / "out").iterdir()) == ["a_despeckled.tif"]
    # run again: a's output is there (skipped), b still fails: still partial
    again = _despeck(["apply", "a.tif", "b.tif", "--model", "m.safetensors", "--out-dir", "out", "--quiet"],
                     tmp_path)
    assert again.returncode == exit_codes.PARTIAL
    # b alone: nothing complete, an input error
    alone = _despeck(["apply", "b.tif", "--model", "m.safetensors", "--out-dir", "out", "--quiet"], tmp_path)
    assert alone.returncode == exit_codes.FAILED


def _default_sigint():
    # A test run started in the background by a script (``cmd &``, nohup) hands its
    # children SIGINT ignored, and Python then keeps it ignored instead of raising
    # KeyboardInterrupt (Python docs, signal module: the SIGINT handler is installed
    # only if SIGINT is not ignored at start-up; from memory). Give the child the
    # terminal's default, as a user pressing Ctrl-C has.
    signal.signal(signal.SIGINT, signal.SIG_DFL)


@pytest.mark.parametrize("signum, status", [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_status_130_and_143_when_simulate_is_stopped(tmp_path, signum, status):
    _tif(tmp_path / "clean.tif", 0.1 + 0.05 * np.random.default_rng(0).random((3072, 3072)), block=256)
    proc = subprocess.Popen([sys.executable, "-m", "despeck", "simulate", "clean.tif", "s.tif", "--looks", "1",
                             "--correlated", "--seed", "1", "--quiet"], cwd=tmp_path, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=ENV, preexec_fn=_default_sigint)
    deadline = time.monotonic() + 120
    while not list(tmp_path.glob(".s.tif.*.tmp")) and time.monotonic() < deadline:
        assert proc.poll() is None, proc.communicate()[1]
        time.sleep(0.02)
    assert proc.poll() is None, "simulate finished before it could be stopped; make the scene larger"
    proc.send_signal(signum)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == status, err
    assert err.strip().splitlines()[-1] == "despeck: interrupted; nothing was written at the destination"
    assert sorted(x.name for x in tmp_path.iterdir()) == ["clean.tif"], err  # no output, temporary or lock


# --------------------------------------------------------------------------- --verbose

def test_verbose_shows_info_lines_and_vv_debug(tmp_path, capsys):
    _tif(tmp_path / "clean.tif", 0.1 + 0.05 * np.random.default_rng(1).random((64, 64)))
    _tif(tmp_path / "in.tif", _speckle((96, 96), seed=2, looks=2.0))
    assert main(["simulate", str(tmp_path / "clean.tif"), str(tmp_path / "a.tif"), "--looks", "2", "-q"]) == 0
    assert "despeck: wrote" not in capsys.readouterr().err  # quiet by default
    assert main(["-v", "simulate", str(tmp_path / "clean.tif"), str(tmp_path / "b.tif"), "--looks", "2", "-q"]) == 0
    err = capsys.readouterr().err.splitlines()
    assert f"despeck: wrote {tmp_path / 'b.tif'}" in err
    assert any(ln.startswith("despeck: white speckle, looks 2 (given by --looks), seed ") for ln in err), err
    assert not any(ln.startswith("despeck: options:") for ln in err)  # a DEBUG line
    # after the command, and -vv
    assert main(["filter", "lee", str(tmp_path / "in.tif"), str(tmp_path / "f.tif"), "--quiet", "--threads", "1",
                 "-vv"]) == 0
    err = capsys.readouterr().err.splitlines()
    assert "despeck: lee: 1 thread(s)" in err
    assert any(ln.startswith("despeck: band 1: looks ") and "(estimate), window 7" in ln for ln in err), err
    assert any(ln.startswith("despeck: options:") for ln in err)
    # the handler goes with the command: the library is silent again
    assert all(isinstance(h, logging.NullHandler) for h in logging.getLogger("despeck").handlers)


def test_verbose_apply_logs_threads_looks_and_tiling_in_a_child(tmp_path):
    _tif(tmp_path / "in.tif", _speckle((96, 96), seed=3))
    _model_file(tmp_path / "m.safetensors")
    p = _despeck(["-v", "apply", "in.tif", "--model", "m.safetensors", "--out", "o.tif", "--threads", 1,
                  "--looks", 1, "--quiet"], tmp_path)
    assert p.returncode == 0, p.stderr
    lines = p.stderr.splitlines()
    assert "despeck: 1 thread(s)" in lines
    written = [ln for ln in lines if ln.startswith("despeck: o.tif: input looks 1 (option), tile ")]
    assert len(written) == 1, p.stderr
    with rasterio.open(tmp_path / "o.tif") as ds:
        assert ds.tags()["despeck_tiling"] in written[0]  # what the output records


def test_library_says_nothing_unless_logging_is_configured(tmp_path):
    # A NullHandler on the package logger (common practice for libraries): no "last resort" printing.
    code = "import logging, despeck; logging.getLogger('despeck.inference').warning('should not be printed')"
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, env=ENV)
    assert p.returncode == 0 and p.stderr == "", p.stderr


# --------------------------------------------------------------------------- warnings one way

def _printed_texts(path):
    """The literal text of every ``print(...)`` call's arguments in a module."""
    texts = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "print":
            texts += [c.value for arg in node.args for c in ast.walk(arg)
                      if isinstance(c, ast.Constant) and isinstance(c.value, str)]
    return texts


def test_commands_print_no_warning_lines_themselves():
    # Every warning goes through warnings.warn and despeck.cli.one_line_warnings (the one
    # printer, which formats with despeck.cli.format_warning).
    cli = pathlib.Path(__file__).resolve().parents[1] / "despeck" / "cli"
    for path in sorted(cli.glob("*.py")):
        printed = [t for t in _printed_texts(path) if "warning" in t.lower()]
        assert printed == [], (path.name, printed)


def test_busy_outputs_are_one_warning_line_each(tmp_path, capsys):
    from despeck.atomic import claim_output

    a, b = _tif(tmp_path / "a.tif", _speckle((48, 48), seed=4)), _tif(tmp_path / "b.tif", _speckle((48, 48), seed=5))
    model = _model_file(tmp_path / "m.safetensors")
    out = tmp_path / "out"
    out.mkdir()
    with claim_output(out / "a_despeckled.tif"), claim_output(out / "b_despeckled.tif"):
        assert main(["apply", str(a), str(b), "--model", str(model), "--out-dir", str(out), "--quiet",
                     "--threads", "1", "--looks", "1"]) == 0
    warned = [ln for ln in capsys.readouterr().err.splitlines() if "being written by another despeck process" in ln]
    assert len(warned) == 2 and all(ln.startswith("despeck: warning: ") for ln in warned), warned
    assert "a_despeckled.tif" in warned[0] and "b_despeckled.tif" in warned[1]


# --------------------------------------------------------------------------- filter --threads

def test_filter_threads_are_passed_on_and_give_the_same_pixels(tmp_path, capsys, monkeypatch):
    src = _tif(tmp_path / "in.tif", _speckle((160, 120), seed=6, looks=2.0))
    one, two = tmp_path / "one.tif", tmp_path / "two.tif"
    assert main(["filter", "refined-lee", str(src), str(one), "--looks", "2", "--threads", "1", "--quiet"]) == 0
    assert main(["filter", "refined-lee", str(src), str(two), "--looks", "2", "--threads", "2", "--quiet"]) == 0
    with rasterio.open(one) as x, rasterio.open(two) as y:
        np.testing.assert_array_equal(x.read(1), y.read(1))  # threads share strips; no pixel depends on them
    import despeck.filters

    seen = {}
    real = despeck.filters.filter_raster

    def spy(*args, **kwargs):
        seen["workers"] = kwargs.get("workers")
        return real(*args, **kwargs)

    monkeypatch.setattr(despeck.filters, "filter_raster", spy)
    assert main(["filter", "lee", str(src), str(tmp_path / "three.tif"), "--looks", "2", "--threads", "3",
                 "--quiet"]) == 0
    assert seen["workers"] == 3
    capsys.readouterr()
    for bad in ("0", "-2"):
        assert main(["filter", "lee", str(src), str(tmp_path / "bad.tif"), "--threads", bad]) == exit_codes.USAGE
        (line,) = capsys.readouterr().err.strip().splitlines()
        assert line == f"despeck: error: --threads must be at least 1, got {bad}"  # as apply says it
        assert main(["apply", str(src), "--threads", bad]) == exit_codes.USAGE
        assert capsys.readouterr().err.strip() == line
    assert not (tmp_path / "bad.tif").exists()
