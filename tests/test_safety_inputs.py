"""Bad sizes, units and multi-band files at the command line: one-line answers, nothing lost.

Each test feeds ``despeck`` an input that used to give a traceback, a silent wrong
result or output that is not what it claims (issue: data safety and honest failure),
and checks the answer against an outside fact where there is one: the coefficient of
variation of 1-look intensity (1) and amplitude (sqrt(4/pi - 1) = 0.5227) speckle
(Oliver & Quegan 1998, Understanding Synthetic Aperture Radar Images), the JSON
grammar as Python's ``json`` module enforces it, and rasterio reading outputs back.
"""

import json
import os
import subprocess
import sys
import warnings

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from scipy import stats

from despeck.cli import main, one_line_warnings

TRANSFORM = from_origin(500000.0, 5800000.0, 10.0, 10.0)


def write_tif(path, data, *, descriptions=(), georeferenced=True):
    data = np.asarray(data, dtype=np.float32)
    data = data[None] if data.ndim == 2 else data
    geo = dict(crs="EPSG:32631", transform=TRANSFORM) if georeferenced else {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # rasterio's note about a file without georeferencing
        with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1],
                           count=data.shape[0], dtype="float32", **geo) as ds:
            ds.write(data)
            for i, d in enumerate(descriptions, start=1):
                ds.set_band_description(i, d)
    return path


def one_look_intensity(seed, shape=(256, 256)):
    """Two homogeneous fields under exponential (1-look) speckle drawn by scipy."""
    reflectivity = np.full(shape, 0.2)
    reflectivity[:, shape[1] // 2:] = 0.05
    return reflectivity * stats.expon.rvs(size=shape, random_state=seed)


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def assert_one_line_error(code, err, *words, status):
    """One ``despeck: error:`` line holding ``words`` and exit status ``status`` (despeck.cli.exit_codes)."""
    lines = [ln for ln in err.strip().splitlines() if not ln.startswith("despeck: warning:")]
    assert code == status and len(lines) == 1 and lines[0].startswith("despeck: error:"), err
    for word in words:
        assert word in lines[0], (word, lines[0])


# --------------------------------------------------------------------------- absurd sizes

def test_filter_absurd_window_is_one_line_and_writes_nothing(tmp_path, capsys):
    src = write_tif(tmp_path / "s.tif", one_look_intensity(1, (64, 64)))
    code, _, err = run(["filter", "boxcar", src, tmp_path / "o.tif", "--window", 100001, "--looks", 1], capsys)
    assert_one_line_error(code, err, "--window", "201", status=2)  # a bad option value: usage error
    code, _, err = run(["filter", "boxcar", src, tmp_path / "o.tif", "--window", 101, "--looks", 1], capsys)
    assert_one_line_error(code, err, "window 101", "64 x 64", status=1)  # too large for this scene
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.tif"]


def test_filter_improved_sigma_looks_outside_its_domain(tmp_path, capsys):
    src = write_tif(tmp_path / "s.tif", one_look_intensity(2, (64, 64)))
    code, _, err = run(["filter", "improved-sigma", src, tmp_path / "o.tif", "--looks", "1e-3", "--quiet"], capsys)
    # judged by the filter when it is set up for the scene: exit status 1
    assert_one_line_error(code, err, "looks", "domain", status=1)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.tif"]


def test_apply_absurd_overlap_and_tile_are_one_line(tmp_path, capsys):
    # A 100000-pixel overlap made 100008-pixel tiles: a 37 GiB allocation and a traceback.
    from despeck.models import Despeckler, create_model, save_model_file

    model = tmp_path / "m.safetensors"
    save_model_file(model, Despeckler(create_model("logcnn-xs"), looks=1), units="intensity")
    src = write_tif(tmp_path / "s.tif", one_look_intensity(3, (64, 64)))
    for option, value in (("--overlap", 100000), ("--tile", 100000)):
        code, _, err = run(["apply", src, "--model", model, "--out", tmp_path / "o.tif", option, value, "--quiet"],
                           capsys)
        assert_one_line_error(code, err, f"{option[2:]} ({value})", status=2)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.safetensors", "s.tif"]


# --------------------------------------------------------------------------- multi-band, JSON, warnings

def test_filter_writes_every_band_of_a_multiband_file(tmp_path, capsys):
    bands = np.stack([one_look_intensity(5, (64, 48)), 4.0 * one_look_intensity(6, (64, 48))])
    src = write_tif(tmp_path / "vv_vh.tif", bands, descriptions=("VV", "VH"))
    code, out, _ = run(["filter", "boxcar", src, tmp_path / "all.tif", "--looks", 1], capsys)
    assert code == 0 and "band 1" in out and "band 2" in out
    with rasterio.open(tmp_path / "all.tif") as ds:
        assert ds.count == 2 and ds.descriptions == ("VV", "VH")
        means = ds.read().mean(axis=(1, 2))
    # a boxcar keeps the mean of each band (common practice); the second band is 4 times brighter
    np.testing.assert_allclose(means, bands.mean(axis=(1, 2)), rtol=0.02)
    code, _, _ = run(["filter", "boxcar", src, tmp_path / "vh.tif", "--looks", 1, "--band", 2, "--quiet"], capsys)
    with rasterio.open(tmp_path / "vh.tif") as ds:
        assert code == 0 and ds.count == 1 and ds.descriptions == ("VH",)


def test_info_json_on_a_constant_scene_is_strict_json(tmp_path, capsys):
    src = write_tif(tmp_path / "flat.tif", np.full((64, 64), 0.3))
    code, out, _ = run(["info", src, "--json"], capsys)

    def refuse(name):
        raise AssertionError(f"not JSON: {name}")

    info = json.loads(out, parse_constant=refuse)  # Infinity / NaN are not JSON
    assert code == 0 and info["band_info"][0]["enl"] is None
    # null, and a field says why
    assert any("constant" in note for note in info["notes"]) and info["band_info"][0]["looks_detail"]


def _despeck(*argv, cwd):
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONWARNINGS="")
    return subprocess.run([sys.executable, "-m", "despeck", *map(str, argv)], capture_output=True, text=True,
                          cwd=cwd, env=env, timeout=300)


def test_library_warnings_reach_users_as_one_line_or_not_at_all(tmp_path):
    # An ungeoreferenced file with a narrow dynamic range: rasterio warns that it is not
    # georeferenced (not news: the output is not either) and despeck doubts its units.
    flat = write_tif(tmp_path / "flat.tif", 1.0 + 0.1 * np.random.default_rng(7).random((64, 64)),
                     georeferenced=False)
    for argv in (("info", flat), ("filter", "boxcar", flat, tmp_path / "o.tif", "--looks", 1, "--quiet")):
        proc = _despeck(*argv, cwd=tmp_path)
        assert proc.returncode == 0, proc.stderr
        lines = proc.stderr.strip().splitlines()
        assert lines and all(ln.startswith("despeck: warning: ") for ln in lines), proc.stderr
        assert "geotransform" not in proc.stderr and "narrow dynamic range" in proc.stderr


def test_one_line_warnings_formats_and_filters(capsys):
    with one_line_warnings():
        warnings.warn("first line\n  second line", UserWarning)
        warnings.warn("first line\n  second line", UserWarning)  # shown once
        assert np.isnan(np.nanmax(np.full(3, np.nan)))  # numpy's "All-NaN slice" is not shown
        from rasterio.errors import NotGeoreferencedWarning

        warnings.warn("Dataset has no geotransform, gcps, or rpcs.", NotGeoreferencedWarning)
    assert capsys.readouterr().err == "despeck: warning: first line second line\n"


def test_apply_does_not_pass_on_rasterio_notes(tmp_path, capsys):
    # apply shows every file's warnings; rasterio's "no geotransform" note is not one of them.
    from despeck.models import Despeckler, create_model, save_model_file

    model = tmp_path / "m.safetensors"
    save_model_file(model, Despeckler(create_model("logcnn-xs"), looks=1), units="intensity")
    src = write_tif(tmp_path / "plain.tif", one_look_intensity(8, (64, 64)), georeferenced=False)
    code, _, err = run(["apply", src, "--model", model, "--quiet"], capsys)
    assert code == 0, err
    assert "geotransform" not in err and all(ln.startswith("despeck: warning: ") for ln in err.splitlines())


# --------------------------------------------------------------------------- units

def test_info_reads_a_band_described_as_amplitude_as_amplitude(tmp_path, capsys):
    # 1-look amplitude with the description "amplitude" and no unit metadata: read as
    # intensity it looks like 1 / (4/pi - 1) = 3.66 looks; read right it is 1 look
    # (Oliver & Quegan 1998).
    intensity = one_look_intensity(4)
    src = write_tif(tmp_path / "amp.tif", np.sqrt(intensity), descriptions=("amplitude",))
    code, out, _ = run(["info", src, "--json"], capsys)
    assert code == 0
    info = json.loads(out)
    assert info["units"] == "amplitude" and info["units_detected"]
    assert 0.85 < info["band_info"][0]["enl"] < 1.15
