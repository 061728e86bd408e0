"""``despeck simulate`` and ``despeck info``: results, georeferencing and bad input.

Expected looks and means come from the speckle model (Gamma(L, 1/L), Oliver &
Quegan 1998, Understanding Synthetic Aperture Radar Images); decibels from their
definition (common practice). Bad input must give one line on standard error
starting ``despeck: error:`` that names the file or option, a non-zero exit status,
and no output file.
"""

import json
import subprocess
import sys

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

from despeck.cli import main

TRANSFORM = from_origin(302000.0, 6120000.0, 5.0, 5.0)


def make_tif(path, data, *, dtype="float32", nodata=None):
    data = np.asarray(data)
    data = data[None] if data.ndim == 2 else data
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0],
                       dtype=dtype, crs="EPSG:32632", transform=TRANSFORM, nodata=nodata) as ds:
        ds.write(data.astype(dtype))
    return path


@pytest.fixture
def clean(tmp_path):
    """A clean reference: two homogeneous fields (0.05 and 0.4) and a nodata strip."""
    ref = np.full((300, 400), 0.05, dtype=np.float32)
    ref[:, 200:] = 0.4
    ref[:10] = -1.0
    return make_tif(tmp_path / "clean.tif", ref, nodata=-1.0)


def run_cli(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_help_lists_subcommands():
    result = subprocess.run([sys.executable, "-m", "despeck", "--help"], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0
    assert "simulate" in result.stdout and "info" in result.stdout


def test_simulate_keeps_georeferencing_and_mean(tmp_path, clean, capsys):
    out = tmp_path / "speckled.tif"
    code, stdout, _ = run_cli(["simulate", clean, out, "--looks", 4, "--seed", 3, "--quiet"], capsys)
    assert code == 0 and stdout == ""
    with rasterio.open(clean) as a, rasterio.open(out) as b:
        assert b.crs == a.crs and b.transform == a.transform and b.nodata == a.nodata
        speckled = b.read(1)
    assert np.all(speckled[:10] == -1.0)  # nodata stays nodata
    # Gamma(L, R/L) speckle: mean R and ENL L on each homogeneous field (Oliver & Quegan 1998).
    left, right = speckled[10:, :200], speckled[10:, 200:]
    assert left.mean() == pytest.approx(0.05, rel=0.02)
    assert right.mean() == pytest.approx(0.4, rel=0.02)
    assert right.mean() ** 2 / right.var() == pytest.approx(4.0, rel=0.08)


def test_simulate_seed_reproducible_and_info_reports_looks(tmp_path, clean, capsys):
    a, b, c = tmp_path / "a.tif", tmp_path / "b.tif", tmp_path / "c.tif"
    for path, seed in ((a, 9), (b, 9), (c, 10)):
        assert run_cli(["simulate", clean, path, "--looks", 2, "--seed", seed, "-q"], capsys)[0] == 0
    with rasterio.open(a) as x, rasterio.open(b) as y, rasterio.open(c) as z:
        first = x.read(1)
        np.testing.assert_array_equal(first, y.read(1))
        assert not np.array_equal(first, z.read(1))
    code, stdout, _ = run_cli(["info", a, "--json"], capsys)
    assert code == 0
    info = json.loads(stdout)
    assert info["width"] == 400 and info["height"] == 300 and info["crs"] == "EPSG:32632"
    assert info["units"] == "intensity"
    assert info["band_info"][0]["invalid_fraction"] == pytest.approx(10 / 300)
    assert info["band_info"][0]["enl"] == pytest.approx(2.0, rel=0.1)  # simulated with L = 2
    code, stdout, _ = run_cli(["info", a], capsys)
    assert code == 0 and "400 x 300" in stdout and "EPSG:32632" in stdout and "3.33%" in stdout


def test_simulate_correlated_in_db(tmp_path, clean, capsys):
    out = tmp_path / "corr_db.tif"
    code, stdout, _ = run_cli(["simulate", clean, out, "-L", 1, "--correlated", "--seed", 1, "--out-units", "db"],
                              capsys)
    assert code == 0 and "corr_db.tif" in stdout
    with rasterio.open(out) as ds:
        db = ds.read(1)[20:-10, 220:-10]
    intensity = 10 ** (db / 10)  # definition of the decibel
    assert intensity.mean() == pytest.approx(0.4, rel=0.05)  # mean backscatter kept
    lag1 = np.corrcoef(intensity[:, :-1].ravel(), intensity[:, 1:].ravel())[0, 1]
    assert lag1 > 0.3  # correlated speckle (white speckle gives ~0)
    info = json.loads(run_cli(["info", out, "--json"], capsys)[1])
    assert info["units"] == "db"


def test_simulate_creates_output_directory(tmp_path, clean, capsys):
    out = tmp_path / "new" / "folder" / "s.tif"
    assert run_cli(["simulate", clean, out, "--looks", 1, "-q"], capsys)[0] == 0
    assert out.exists()


def bad_cases(tmp_path, clean):
    text = tmp_path / "readme.tif"
    text.write_text("not an image")
    blank = make_tif(tmp_path / "blank.tif", np.full((20, 20), -9999.0), nodata=-9999.0)
    db = make_tif(tmp_path / "db.tif", np.random.default_rng(0).uniform(-25, -5, (20, 20)))
    existing = tmp_path / "taken.tif"
    existing.write_bytes(b"keep me")
    out = tmp_path / "out.tif"
    # (argv, word the error line names, exit status): 1 for a refused file or its data,
    # 2 for an option value refused before any file is read (despeck.cli.exit_codes)
    return [
        (["simulate", tmp_path / "absent.tif", out, "--looks", 1], "absent.tif", 1),
        (["simulate", text, out, "--looks", 1], "readme.tif", 1),
        (["simulate", blank, out, "--looks", 1], "blank.tif", 1),
        (["simulate", db, out, "--looks", 1, "--units", "intensity"], "db.tif", 1),
        (["simulate", clean, out, "--looks", 1, "--units", "complex"], "clean.tif", 1),
        (["simulate", clean, out, "--looks", 0], "--looks", 2),
        (["simulate", clean, out, "--looks", -2], "--looks", 2),
        (["simulate", clean, out, "--looks", "inf"], "--looks", 2),
        (["simulate", clean, out, "--looks", 1, "--correlated", "--oversampling", 0.5], "oversampling", 2),
        (["simulate", clean, out, "--looks", 0.5, "--correlated"], "--looks", 2),
        (["simulate", clean, out, "--looks", 1, "--seed", -1], "--seed", 2),
        (["simulate", clean, clean, "--looks", 1, "--overwrite"], "clean.tif", 1),
        (["simulate", clean, existing, "--looks", 1], "taken.tif", 1),
        (["info", tmp_path / "absent.tif"], "absent.tif", 1),
        (["info", blank], "blank.tif", 1),
        (["info", clean, "--units", "complex"], "clean.tif", 1),
    ]


def test_bad_input_one_line_error_and_nothing_written(tmp_path, clean, capsys):
    for argv, named, status in bad_cases(tmp_path, clean):
        before = sorted(p.name for p in tmp_path.rglob("*"))
        clean_bytes = clean.read_bytes()
        code, stdout, stderr = run_cli(argv, capsys)
        assert code == status, argv
        lines = stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("despeck: error:"), (argv, stderr)
        assert named in lines[0], (argv, stderr)
        assert sorted(p.name for p in tmp_path.rglob("*")) == before, argv  # nothing written
        assert clean.read_bytes() == clean_bytes  # the input is never touched
    assert (tmp_path / "taken.tif").read_bytes() == b"keep me"
