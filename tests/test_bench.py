"""Tests of the benchmark harness and ``despeck bench``: report contents, determinism, bad input."""

import csv
import json

import numpy as np
import pytest
import rasterio
from affine import Affine

from despeck import bench, synthetic
from despeck.cli import main
from despeck.errors import ConfigError, InputError, RasterError
from despeck.speckle import simulate_intensity

TRANSFORM = Affine(10, 0, 500000, 0, -10, 5800000)


@pytest.fixture(scope="module")
def scene():
    clean, layout = synthetic.make_scene((128, 128), rng=5, return_layout=True, n_points=3)
    noisy = simulate_intensity(clean, 1, rng=np.random.default_rng(6))
    return clean, noisy, layout


def _tif(path, data, transform=TRANSFORM, crs="EPSG:32631"):
    profile = dict(driver="GTiff", width=data.shape[1], height=data.shape[0], count=1, dtype="float32",
                   crs=crs, transform=transform, nodata=0.0)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(np.asarray(data, np.float32), 1)
    return path


def _without_timing(result):
    rows = [{k: v for k, v in r.items() if k not in ("seconds", "mp_per_s")} for r in result["results"]]
    return rows, result["scenes"]


def test_report_folder_contents_and_determinism(scene, tmp_path):
    clean, noisy, layout = scene
    s = bench.BenchScene(image=noisy, reference=clean, looks=1, areas=layout.homogeneous_boxes,
                         points=layout.points, name="lowland")
    methods = ["boxcar:window=5", "lee", "refined-lee"]
    first = bench.run_benchmark([s], methods, tmp_path / "r1", progress=False)
    second = bench.run_benchmark([s], methods, tmp_path / "r2", progress=False)
    assert _without_timing(first) == _without_timing(second)
    out = tmp_path / "r1"
    names = {p.name for p in out.iterdir()}
    assert {"report.md", "results.csv", "results.json", "scene1_crops.png", "scene1_ratio.png",
            "scene1_tradeoff.png"} <= names
    for png in ("scene1_crops.png", "scene1_ratio.png", "scene1_tradeoff.png"):
        assert (out / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    rows = list(csv.DictReader(open(out / "results.csv")))
    assert [r["method"] for r in rows] == ["input (unfiltered)"] + methods
    data = json.loads((out / "results.json").read_text())
    assert len(data["results"]) == 4 and data["scenes"][0]["looks_source"] == "given"
    report = (out / "report.md").read_text()
    assert "flood mapping or ship detection" in report and "PSNR" in report and "refined-lee" in report
    by = {r["method"]: r for r in data["results"]}
    # filtering raises the ENL above the input's and improves PSNR against the clean reference
    assert by["lee"]["enl"] > 3 * by["input (unfiltered)"]["enl"]
    assert by["lee"]["psnr_db"] > by["input (unfiltered)"]["psnr_db"]
    assert abs(by["lee"]["bias_db"]) < 0.2


def test_scene_list_with_files_estimated_looks_and_automatic_areas(scene, tmp_path):
    clean, noisy, _ = scene
    _tif(tmp_path / "noisy.tif", noisy)
    _tif(tmp_path / "clean.tif", clean)
    (tmp_path / "scenes.yaml").write_text(
        "scenes:\n  - name: lowland\n    image: noisy.tif\n    reference: clean.tif\n"
        "methods: [boxcar, 'kuan:window=5']\ncrop: [10, 10, 64]\n"
    )
    result = bench.run_benchmark(tmp_path / "scenes.yaml", None, tmp_path / "rep", progress=False)
    s = result["scenes"][0]
    assert s["looks_source"] == "estimated" and 0.7 < s["looks"] < 1.4
    assert s["areas_source"].startswith("found automatically") and s["crop"] == [10, 10, 64]
    assert [r["method"] for r in result["results"]] == ["input (unfiltered)", "boxcar", "kuan:window=5"]


def test_bad_reference_and_areas_write_nothing(scene, tmp_path):
    clean, noisy, _ = scene
    img = _tif(tmp_path / "noisy.tif", noisy)
    small = _tif(tmp_path / "small.tif", clean[:100])
    shifted = _tif(tmp_path / "shifted.tif", clean, transform=Affine(10, 0, 500010, 0, -10, 5800000))
    out = tmp_path / "rep"
    with pytest.raises(InputError, match="reference is 128 x 100"):
        bench.run_benchmark([bench.BenchScene(image=img, reference=small, looks=1)], ["lee"], out, progress=False)
    with pytest.raises(InputError, match="georeferencing"):
        bench.run_benchmark([bench.BenchScene(image=img, reference=shifted, looks=1)], ["lee"], out, progress=False)
    with pytest.raises(InputError, match="outside"):
        bench.run_benchmark([bench.BenchScene(image=img, looks=1, areas=[(100, 100, 140, 120)])], ["lee"], out,
                            progress=False)
    with pytest.raises(InputError, match="at least 100"):
        bench.run_benchmark([bench.BenchScene(image=img, looks=1, areas=[(0, 0, 8, 8)])], ["lee"], out,
                            progress=False)
    with pytest.raises(InputError, match="boxcar.*lee"):
        bench.run_benchmark([bench.BenchScene(image=img, looks=1)], ["median"], out, progress=False)
    with pytest.raises(InputError, match="odd"):
        bench.run_benchmark([bench.BenchScene(image=img, looks=1)], ["lee:window=4"], out, progress=False)
    with pytest.raises(InputError, match="looks"):
        bench.run_benchmark([bench.BenchScene(image=img, looks=0)], ["lee"], out, progress=False)
    with pytest.raises(RasterError, match="not found"):
        bench.run_benchmark([bench.BenchScene(image=tmp_path / "missing.tif", looks=1)], ["lee"], out, progress=False)
    assert not out.exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".rep")] == []


def test_bad_scene_list_and_existing_folder(scene, tmp_path):
    (tmp_path / "bad.yaml").write_text("scenes:\n  - image: a.tif\n    colour: red\n")
    with pytest.raises(ConfigError, match="colour"):
        bench.load_scene_list(tmp_path / "bad.yaml")
    clean, noisy, _ = scene
    (tmp_path / "rep").mkdir()
    with pytest.raises(InputError, match="already exists"):
        bench.run_benchmark([bench.BenchScene(image=noisy, looks=1)], ["lee"], tmp_path / "rep", progress=False)


def test_model_file_method(scene, tmp_path):
    import torch

    from despeck.models import Despeckler, create_model, save_model_file

    torch.manual_seed(0)
    torch.set_num_threads(1)
    path = save_model_file(tmp_path / "tiny.safetensors", Despeckler(create_model("logcnn-xs"), looks=1).eval())
    clean, noisy, layout = scene
    s = bench.BenchScene(image=noisy, reference=clean, looks=1, areas=layout.homogeneous_boxes, points=layout.points)
    result = bench.run_benchmark([s], ["lee", f"model:{path}"], tmp_path / "rep", progress=False)
    row = result["results"][-1]
    assert row["kind"] == "model" and row["method"] == "model tiny" and np.isfinite(row["psnr_db"])
    with pytest.raises(InputError, match="not found"):
        bench.parse_method("model:nowhere.safetensors")


def test_cli_bench_single_scene(scene, tmp_path, capsys):
    clean, noisy, layout = scene
    img = _tif(tmp_path / "noisy.tif", noisy)
    ref = _tif(tmp_path / "clean.tif", clean)
    r0, c0, r1, c1 = layout.homogeneous_boxes[0]
    args = ["bench", str(tmp_path / "rep"), "--image", str(img), "--reference", str(ref), "--looks", "1",
            "--area", f"{r0},{c0},{r1},{c1}", "--method", "lee", "--method", "frost:damping=2", "--crop", "0,0,64"]
    assert main(args) == 0
    assert "report:" in capsys.readouterr().out
    assert (tmp_path / "rep" / "report.md").exists()
    assert main(args) == 2  # exists
    assert main(["bench", str(tmp_path / "rep2"), "--image", str(img), "--method", "lee:window=2"]) == 2
    assert main(["bench", str(tmp_path / "rep2")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 3 and all(line.startswith("despeck: error:") for line in err)
    assert not (tmp_path / "rep2").exists()


def test_reference_units_are_independent_of_the_image_units(scene, tmp_path):
    # A scene stored in dB against a clean reference kept in linear intensity (common
    # practice for simulated data) must score exactly as the same scene stored linearly.
    clean, noisy, layout = scene
    _tif(tmp_path / "noisy.tif", noisy)
    _tif(tmp_path / "noisy_db.tif", 10 * np.log10(noisy))
    _tif(tmp_path / "clean.tif", clean)
    (tmp_path / "scenes.yaml").write_text(
        "scenes:\n"
        "  - {name: linear, image: noisy.tif, reference: clean.tif, looks: 1, units: intensity}\n"
        "  - {name: db, image: noisy_db.tif, reference: clean.tif, looks: 1, units: db}\n"
        "methods: [lee]\n"
    )
    areas = [list(b) for b in layout.homogeneous_boxes]
    scenes, methods, _ = bench.load_scene_list(tmp_path / "scenes.yaml")
    for s in scenes:
        s.areas = areas
    result = bench.run_benchmark(scenes, methods, tmp_path / "rep", progress=False)
    by = {(r["scene"], r["method"]): r for r in result["results"]}
    assert by[("db", "lee")]["psnr_db"] == pytest.approx(by[("linear", "lee")]["psnr_db"], abs=1e-3)
    assert by[("db", "lee")]["psnr_db"] > by[("db", "input (unfiltered)")]["psnr_db"]
