"""Batches shared between processes and machines, Cloud-Optimised outputs, provenance tags.

* ``apply --shard K/N``: every input belongs to exactly one part, whatever the order of
  the arguments (round-robin by position in the sorted list, the usual way of splitting
  a list over the tasks of a job array -- common practice).
* Two ``apply`` runs over the same folder never write the same output: outputs are
  claimed (:func:`despeck.atomic.claim_output`) and an output finished by another run
  while this one was busy is skipped when it is claimed.
* ``--cog``: the file is checked by GDAL itself -- its COG validator
  (``validate_cloud_optimized_geotiff.py`` of Debian's python3-gdal, Rouault, GDAL
  project), else ``gdalinfo``'s ``LAYOUT=COG`` (Debian's gdal-bin), else the
  ``IMAGE_STRUCTURE`` metadata GDAL reports through rasterio -- and its overviews are
  compared with 2 x 2 block means computed by numpy.
* Provenance tags read back; the model file's SHA-256 is compared with coreutils'
  ``sha256sum`` and the version with the installed package's metadata.
"""

import datetime
import hashlib
import importlib.metadata
import os
import random
import shutil
import subprocess
import sys

import numpy as np
import pytest
import rasterio
import torch
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

import despeck
from despeck import raster
from despeck.cli import main
from despeck.cli.apply import shard
from despeck.errors import RasterError
from despeck.models import Despeckler, create_model, save_model_file

torch.set_num_threads(1)

TRANSFORM = Affine(10.0, 0.0, 512000.0, 0.0, -10.0, 6400000.0)
CRS = "EPSG:32633"
SYSTEM_PYTHON = "/usr/bin/python3"
COG_VALIDATOR = "osgeo_utils.samples.validate_cloud_optimized_geotiff"


def _tif(path, data, *, nodata=0.0, tags=None):
    data = np.asarray(data, dtype=np.float32)
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[1], height=data.shape[0], count=1,
                       dtype="float32", crs=CRS, transform=TRANSFORM, nodata=nodata) as ds:
        ds.write(data[None])
        ds.update_tags(**(tags or {"looks": "1"}))
    return path


def _speckle(shape, seed=0):
    rng = np.random.default_rng(seed)
    ramp = np.linspace(0.5, 2.0, shape[1], dtype=np.float32)[None, :]
    return (ramp * rng.exponential(1.0, shape)).astype(np.float32)


def _model_file(path):
    torch.manual_seed(0)
    save_model_file(path, Despeckler(create_model("logcnn-xs"), looks=1).eval(), units="intensity")
    return path


def _scenes(folder, count, shape=(48, 48)):
    folder.mkdir(exist_ok=True)
    return [_tif(folder / f"scene_{i:02d}.tif", _speckle(shape, seed=i)) for i in range(count)]


def _written(stdout):
    """Outputs a run reports as written (lines ``IN -> OUT (x s)``)."""
    return sorted(line.split(" -> ")[1].rsplit(" (", 1)[0] for line in stdout.splitlines()
                  if " -> " in line and line.endswith(" s)"))


# ---------------------------------------------------------------- sharding

@settings(max_examples=60, deadline=None)
@given(names=st.lists(st.text("abcxyz_/", min_size=1, max_size=6), min_size=0, max_size=30, unique=True),
       n=st.integers(1, 5), seed=st.integers(0, 2**16))
def test_shards_hold_every_input_exactly_once_in_any_argument_order(names, n, seed):
    parts = [shard(names, k, n) for k in range(1, n + 1)]
    assert sorted(x for part in parts for x in part) == sorted(names)  # each input exactly once
    shuffled = list(names)
    random.Random(seed).shuffle(shuffled)
    assert [shard(shuffled, k, n) for k in range(1, n + 1)] == parts  # same parts on every machine
    sizes = [len(p) for p in parts]
    assert max(sizes) - min(sizes) <= (1 if names else 0)  # round-robin: balanced
    ordered = sorted(names)
    assert parts[0] == ordered[::n]  # documented rule: position i goes to part i % N + 1


@pytest.mark.parametrize("bad", ["0/3", "4/3", "3", "a/b", "1/0", "1/2/3", "-1/2", ""])
def test_bad_shard_is_one_line_naming_the_option(tmp_path, capsys, bad):
    src = _tif(tmp_path / "s.tif", _speckle((32, 32)))
    assert main(["apply", str(src), f"--shard={bad}", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("despeck: error: --shard") and repr(bad) in err[0]


def test_shards_of_a_batch_write_each_output_once(tmp_path, capsys):
    inputs = _scenes(tmp_path / "in", 5)
    model = _model_file(tmp_path / "m.safetensors")
    out = tmp_path / "out"
    written = []
    for k in (1, 2, 3):
        # the arguments in another order on each "machine": the parts do not change
        args = [str(p) for p in inputs]
        random.Random(k).shuffle(args)
        assert main(["apply", *args, "--model", str(model), "--out-dir", str(out), "--shard", f"{k}/3",
                     "--threads", "1"]) == 0
        mine = _written(capsys.readouterr().out)
        expected = [str(out / f"{p.stem}_despeckled.tif") for p in sorted(inputs)[k - 1::3]]
        assert mine == sorted(expected)
        written += mine
    assert sorted(written) == sorted(str(p) for p in out.glob("*.tif")) and len(written) == 5
    assert main(["apply", str(inputs[0]), "--model", str(model), "--out-dir", str(tmp_path / "o2"),
                 "--shard", "2/2", "--quiet"]) == 0  # an empty part is no error
    assert not (tmp_path / "o2").exists() or not list((tmp_path / "o2").iterdir())


# ---------------------------------------------------------------- claims

def test_output_finished_by_another_run_meanwhile_is_skipped_when_claimed(tmp_path, capsys, monkeypatch):
    inputs = _scenes(tmp_path / "in", 3)
    model = _model_file(tmp_path / "m.safetensors")
    out = tmp_path / "out"
    late = out / "scene_01_despeckled.tif"
    real_claim = raster.writer.claim_output
    finished_elsewhere = b"written by another machine"

    def claim(path):
        # Another machine finishes scene_01 after this run's start-of-file check but before
        # its claim, as when this run was busy with scene_00.
        if os.path.basename(path) == late.name and not late.exists():
            late.write_bytes(finished_elsewhere)
        return real_claim(path)

    monkeypatch.setattr(raster.writer, "claim_output", claim)  # the writer claims its output
    assert main(["apply", *map(str, inputs), "--model", str(model), "--out-dir", str(out), "--threads", "1"]) == 0
    stdout = capsys.readouterr().out
    assert "written meanwhile by another process, skipped" in stdout
    assert str(late) not in _written(stdout) and len(_written(stdout)) == 2
    assert late.read_bytes() == finished_elsewhere  # never replaced
    assert sorted(p.name for p in out.iterdir() if p.name.startswith(".")) == []  # no temporaries or locks


# A child that loads everything, then waits until its sibling has too, so both runs
# start on the batch at the same moment (a real race for the same outputs).
_RACER = """
import os, sys, time
import despeck.inference, despeck.models
from despeck.cli import main
ready, other = sys.argv[1:3]
open(ready, "w").close()
deadline = time.monotonic() + 60
while not os.path.exists(other) and time.monotonic() < deadline:
    time.sleep(0.005)
sys.exit(main(sys.argv[3:]))
"""


def test_two_concurrent_apply_runs_never_write_the_same_output(tmp_path):
    inputs = _scenes(tmp_path / "in", 6, shape=(128, 128))
    model = _model_file(tmp_path / "m.safetensors")
    out = tmp_path / "out"
    argv = ["apply", str(tmp_path / "in"), "--model", str(model), "--out-dir", str(out), "--threads", "1"]
    env = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    flags = [str(tmp_path / "a.ready"), str(tmp_path / "b.ready")]
    procs = [subprocess.Popen([sys.executable, "-c", _RACER, flags[i], flags[1 - i], *argv], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=env) for i in (0, 1)]
    results = [p.communicate(timeout=120) for p in procs]
    for p, (_, err) in zip(procs, results):
        assert p.returncode == 0, err
        assert "despeck: error" not in err and "Traceback" not in err, err
    a, b = (_written(stdout) for stdout, _ in results)
    assert not set(a) & set(b), (a, b)  # no output written twice
    assert sorted(a + b) == sorted(str(out / f"{p.stem}_despeckled.tif") for p in inputs)
    for path in a + b:
        with rasterio.open(path) as ds:
            assert ds.read(1).shape == (128, 128)
    assert sorted(p.name for p in out.iterdir() if p.name.startswith(".")) == []


# ---------------------------------------------------------------- Cloud-Optimised GeoTIFF

def _gdal_cog_check(path):
    """GDAL's own verdict on ``path`` as a COG: ``(ok, text, tool)``, or None if no GDAL tool can say."""
    if os.path.exists(SYSTEM_PYTHON):
        probe = subprocess.run([SYSTEM_PYTHON, "-c", f"import {COG_VALIDATOR}"], capture_output=True)
        if probe.returncode == 0:
            r = subprocess.run([SYSTEM_PYTHON, "-m", COG_VALIDATOR, "--full-check=yes", str(path)],
                               capture_output=True, text=True)
            return r.returncode == 0 and "is a valid cloud optimized GeoTIFF" in r.stdout, r.stdout + r.stderr, \
                "validate_cloud_optimized_geotiff"
    if shutil.which("gdalinfo"):
        r = subprocess.run(["gdalinfo", str(path)], capture_output=True, text=True)
        return "LAYOUT=COG" in r.stdout and "Overviews:" in r.stdout, r.stdout, "gdalinfo"
    return None


def _check_cog(path, like):
    verdict = _gdal_cog_check(path)
    with rasterio.open(path) as ds, rasterio.open(like) as src:
        layout = ds.tags(ns="IMAGE_STRUCTURE").get("LAYOUT")
        if verdict is None:
            # neither GDAL's validator nor gdalinfo here: GDAL's metadata through rasterio
            verdict = (layout == "COG", str(ds.tags(ns="IMAGE_STRUCTURE")), "rasterio IMAGE_STRUCTURE")
        assert verdict[0], f"{verdict[2]}: {verdict[1]}"
        assert layout == "COG" and ds.block_shapes[0] == (512, 512)
        assert ds.overviews(1) and ds.overviews(1)[0] == 2
        assert ds.crs == src.crs and ds.transform == src.transform and ds.nodata == src.nodata
        assert (ds.width, ds.height) == (src.width, src.height)
        return ds.read(1), ds.read(1, out_shape=(ds.height // 2, ds.width // 2)), ds.tags()


def test_filter_cog_validates_and_keeps_pixels_and_georeferencing(tmp_path):
    data = _speckle((700, 1100), seed=3)
    data[:40, :60] = 0.0  # nodata corner
    src = _tif(tmp_path / "in.tif", data)
    plain, cog = tmp_path / "plain.tif", tmp_path / "cog.tif"
    assert main(["filter", "lee", str(src), str(plain), "--quiet"]) == 0
    assert main(["filter", "lee", str(src), str(cog), "--quiet", "--cog"]) == 0
    full, half, tags = _check_cog(cog, src)
    with rasterio.open(plain) as ds:
        np.testing.assert_array_equal(full, ds.read(1))  # lossless: the same pixels as the tiled file
    # first overview: GDAL's AVERAGE of each 2 x 2 block of valid pixels (numpy reference)
    blocks = full.reshape(350, 2, 550, 2).astype(np.float64)
    all_valid = (blocks > 0).all(axis=(1, 3))
    np.testing.assert_allclose(half[all_valid], blocks.mean(axis=(1, 3))[all_valid], rtol=1e-6)
    assert (half[:20, :30] == 0).all()  # nodata stays nodata in the overview
    assert tags["despeck_method"] == "lee" and tags["despeck_options"] == "window=7"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cog.tif", "in.tif", "plain.tif"]  # no temporaries


def test_apply_cog_and_provenance(tmp_path, capsys):
    src = _tif(tmp_path / "in.tif", _speckle((600, 560), seed=5),
               tags={"looks": "1", "speckle": "white, looks=1", "despeck_tiling": "from an earlier run", "site": "b7"})
    model = _model_file(tmp_path / "m.safetensors")
    out = tmp_path / "out.tif"
    before = datetime.datetime.now(datetime.timezone.utc).replace(microsecond=0)
    assert main(["apply", str(src), "--model", str(model), "--out", str(out), "--cog", "--tile", "256",
                 "--overlap", "40", "--threads", "1", "--quiet"]) == 0
    after = datetime.datetime.now(datetime.timezone.utc)
    _, _, tags = _check_cog(out, src)
    sha = subprocess.run(["sha256sum", str(model)], capture_output=True, text=True, check=True).stdout.split()[0]
    assert tags["despeck_method"] == "m.safetensors" and tags["despeck_model_sha256"] == sha
    assert tags["despeck_version"] == despeck.__version__ == importlib.metadata.version("despeck")
    created = datetime.datetime.strptime(tags["despeck_created"], "%Y-%m-%dT%H:%M:%SZ").replace(
        tzinfo=datetime.timezone.utc)
    assert before <= created <= after
    assert "overlap 40" in tags["despeck_tiling"] and tags["despeck_tiling"].startswith("tile ")
    rows, cols = (int(v) for v in tags["despeck_tiling"].split(",")[0].split()[1].split("x"))
    assert max(rows, cols) <= 256 and rows * cols <= 256 * 256
    # the input's speckle description does not hold for the output; its other tags do
    assert "looks" not in tags and "speckle" not in tags and tags["site"] == "b7"
    assert tags["input_looks"] == "1" and tags["input_looks_source"] == "tag"


def test_cog_that_gdal_does_not_lay_out_as_cog_is_not_published(tmp_path, monkeypatch):
    import rasterio.shutil

    like = raster.read_scene(_tif(tmp_path / "in.tif", _speckle((64, 64))))
    real_copy = rasterio.shutil.copy

    def plain_copy(src, dst, driver=None, **options):  # a translation that loses the COG layout
        return real_copy(src, dst, driver="GTiff")

    monkeypatch.setattr(rasterio.shutil, "copy", plain_copy)
    with pytest.raises(RasterError, match="without the COG layout") as info:
        with raster.open_output(tmp_path / "out.tif", like, cog=True) as out:
            out.write(like.intensity, valid=like.valid)
    assert "\n" not in str(info.value)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.tif"]  # no output, temporary or lock


# ---------------------------------------------------------------- provenance of filter and simulate

def test_simulate_and_filter_record_provenance_not_their_inputs(tmp_path):
    clean = _tif(tmp_path / "clean.tif", np.full((64, 64), 0.5, np.float32), tags={"site": "b7"})
    speckled, filtered = tmp_path / "sp.tif", tmp_path / "f.tif"
    assert main(["simulate", str(clean), str(speckled), "--looks", "2", "--seed", "11", "--quiet"]) == 0
    with rasterio.open(speckled) as ds:
        tags = ds.tags()
    assert tags["despeck_method"] == "simulate"
    assert tags["despeck_options"] == "speckle=white, looks=2, seed=11"
    assert tags["looks"] == "2" and tags["site"] == "b7" and "despeck_model_sha256" not in tags
    assert main(["filter", "frost", str(speckled), str(filtered), "--window", "5", "--option", "damping=2",
                 "--quiet"]) == 0
    with rasterio.open(filtered) as ds:
        ftags = ds.tags()
    assert ftags["despeck_method"] == "frost" and ftags["despeck_options"] == "window=5, damping=2"
    assert "looks" not in ftags and "speckle" not in ftags and ftags["input_looks"] == "2"
    assert ftags["input_looks_source"] == "tag" and ftags["site"] == "b7"
    with rasterio.open(filtered) as ds:
        assert ds.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") != "COG"  # a plain tiled GeoTIFF without --cog


def test_model_file_hash_matches_hashlib_of_its_bytes(tmp_path):
    from despeck.models import load_model_file

    path = _model_file(tmp_path / "m.safetensors")
    model = load_model_file(path)
    assert model.source_file == "m.safetensors"
    assert model.source_sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
