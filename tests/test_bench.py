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
    # filtering raises the ENL above the input's and improves PSNR against the clean reference.
    # Bounds: on homogeneous areas a 7 x 7 Lee filter tends to the 7 x 7 mean, whose ENL is 49 L
    # (Lee 1980; Oliver & Quegan 1998); 3 x is a loose floor chosen here. A bias within 0.2 dB
    # is common practice for a mean-preserving filter (its expected bias is 0 dB).
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
    # 1-look data; loose bounds chosen here: on pure speckle the estimator is within 8 % of L
    # (scipy.stats.gamma check in test_speckle.py), this 128 x 128 scene has edges and few flat blocks
    assert s["looks_source"] == "estimated" and 0.7 < s["looks"] < 1.4
    assert s["areas_source"].startswith("found automatically") and s["crop"] == [10, 10, 64]
    assert [r["method"] for r in result["results"]] == ["input (unfiltered)", "boxcar", "kuan:window=5"]


def test_bench_takes_the_looks_recorded_by_simulate(scene, tmp_path):
    # One owner for a scene's looks (despeck.looks: option, else tag, else estimate): a file
    # written by `despeck simulate --looks 4` records its looks, and bench reports that value
    # (the simulated truth) instead of an estimate; a given value still comes first.
    clean, _, _ = scene
    _tif(tmp_path / "clean.tif", clean)
    assert main(["simulate", str(tmp_path / "clean.tif"), str(tmp_path / "l4.tif"), "--looks", "4", "--seed", "2",
                 "--quiet"]) == 0
    s = bench.BenchScene(image=tmp_path / "l4.tif", areas=[], points=[])
    recorded = bench.run_benchmark([s], ["boxcar"], tmp_path / "rep", progress=False)["scenes"][0]
    assert recorded["looks_source"] == "recorded" and recorded["looks"] == 4.0
    s.looks = 2
    given = bench.run_benchmark([s], ["boxcar"], tmp_path / "rep2", progress=False)["scenes"][0]
    assert given["looks_source"] == "given" and given["looks"] == 2.0


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
    result = bench.run_benchmark([s], ["lee", f"model:{path}", f"model:{path},orientations=8"], tmp_path / "rep",
                                 progress=False)
    rows = {r["method"]: r for r in result["results"]}
    row = rows["model tiny"]
    assert row["kind"] == "model" and np.isfinite(row["psnr_db"])
    averaged = rows["model tiny x8 orientations"]
    assert averaged["kind"] == "model" and averaged["psnr_db"] != row["psnr_db"]
    # the precision the network ran in is recorded: float32, as this model has no bfloat16 table
    info = [m for m in result["methods"] if m["kind"] == "model"]
    assert info == [{"label": "model tiny", "kind": "model", "path": str(path), "precision": "32", "orientations": 1},
                    {"label": "model tiny x8 orientations", "kind": "model", "path": str(path), "precision": "32",
                     "orientations": 8}]
    report = (tmp_path / "rep" / "report.md").read_text()
    assert "network run in float32" in report and "averaged over 8 orientations" in report
    with pytest.raises(InputError, match="not found"):
        bench.parse_method("model:nowhere.safetensors")
    with pytest.raises(InputError, match="orientations must be"):
        bench.parse_method(f"model:{path},orientations=3")
    m = bench.parse_method({"model": str(path), "orientations": 4, "label": "mine x4"})
    assert m.label == "mine x4" and m.options == {"orientations": 4}
    with pytest.raises(InputError, match="only 'orientations' and 'label'"):
        bench.parse_method({"model": str(path), "window": 5})


@pytest.mark.parametrize("text, value", [
    (" true", True), ("Yes", True), ("false", False), ("NO", False), ("null", None), ("None", None),
    ("3", 3), ("-2", -2), ("2.5", 2.5), ("1e-3", 1e-3), (" hamming ", "hamming"),
])
def test_option_values_from_text(text, value):
    # YAML 1.1's boolean and null words and Python's int/float literals (common practice);
    # the same parser serves method specifications and `despeck filter --option`.
    parsed = bench.parse_option_value(text)
    assert parsed == value and type(parsed) is type(value)
    if type(value) in (int, float) and value > 0:
        assert bench.parse_method(f"frost:damping={text}").options["damping"] == value


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
    assert main(args) == 1  # exists: an output problem (despeck.cli.exit_codes.FAILED)
    # bad option values are usage errors (exit_codes.USAGE), refused before any file is read
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


# --------------------------------------------------------------------------- the report folder and --overwrite

def _tree(folder):
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_overwrite_replaces_only_a_report_despeck_wrote(scene, tmp_path):
    # Regression: --overwrite used to delete the whole folder, inputs and unrelated files included.
    clean, noisy, layout = scene
    s = bench.BenchScene(image=noisy, looks=1, areas=layout.homogeneous_boxes, name="lowland")
    rep = tmp_path / "rep"
    bench.run_benchmark([s], ["boxcar:window=3"], rep, progress=False)
    marker = json.loads((rep / bench.REPORT_MARKER).read_text())
    assert set(marker["files"]) == {p.name for p in rep.iterdir()} - {bench.REPORT_MARKER}
    # a report despeck wrote is replaced, old files it no longer writes are gone
    bench.run_benchmark([s], ["lee"], rep, progress=False, overwrite=True)
    assert "lee" in (rep / "results.csv").read_text()
    # an unrelated file in it: refused, nothing touched
    (rep / "notes.txt").write_text("field notes")
    before = _tree(rep)
    with pytest.raises(InputError, match="notes.txt, which despeck did not write"):
        bench.run_benchmark([s], ["boxcar"], rep, progress=False, overwrite=True)
    assert _tree(rep) == before
    (rep / "notes.txt").unlink()
    # a report file edited by the user: refused
    (rep / "report.md").write_text("my edits")
    with pytest.raises(InputError, match="report.md: changed since despeck wrote it"):
        bench.run_benchmark([s], ["boxcar"], rep, progress=False, overwrite=True)
    assert (rep / "report.md").read_text() == "my edits"
    # a folder without the marker: refused
    other = tmp_path / "photos"
    other.mkdir()
    (other / "a.jpg").write_bytes(b"\xff\xd8")
    with pytest.raises(InputError, match="not a report despeck wrote"):
        bench.run_benchmark([s], ["boxcar"], other, progress=False, overwrite=True)
    assert (other / "a.jpg").read_bytes() == b"\xff\xd8"
    # an empty folder holds nothing to lose
    empty = tmp_path / "empty"
    empty.mkdir()
    bench.run_benchmark([s], ["boxcar"], empty, progress=False, overwrite=True)
    assert (empty / "report.md").exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_overwrite_refuses_a_folder_holding_an_input(scene, tmp_path, capsys):
    # Regression (issue: `despeck bench DIR --image DIR/scene.tif --overwrite` deleted the scene)
    clean, noisy, layout = scene
    data = tmp_path / "data"
    data.mkdir()
    img = _tif(data / "noisy.tif", noisy)
    before = _tree(data)
    args = ["bench", str(data), "--image", str(img), "--looks", "1", "--method", "lee", "--overwrite", "--quiet"]
    assert main(args) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("despeck: error:") and "holds an input" in err[0]
    assert _tree(data) == before
    # even inside a report despeck wrote, an input is never replaced
    rep = tmp_path / "rep"
    bench.run_benchmark([bench.BenchScene(image=noisy, looks=1)], ["lee"], rep, progress=False)
    inside = _tif(rep / "scene.tif", noisy)
    with pytest.raises(InputError, match="holds an input"):
        bench.run_benchmark([bench.BenchScene(image=inside, looks=1)], ["lee"], rep, progress=False, overwrite=True)
    assert inside.exists()


def test_overwrite_never_replaces_the_current_directory(scene, tmp_path, monkeypatch):
    clean, noisy, _ = scene
    s = bench.BenchScene(image=noisy, looks=1)
    rep = tmp_path / "rep"
    bench.run_benchmark([s], ["lee"], rep, progress=False)
    monkeypatch.chdir(rep)  # a report folder despeck wrote, but the user is working in it
    with pytest.raises(InputError, match="current directory"):
        bench.run_benchmark([s], ["lee"], ".", progress=False, overwrite=True)
    sub = rep.parent / "work"
    sub.mkdir()
    monkeypatch.chdir(sub)
    with pytest.raises(InputError, match="parent of the current directory|not a report"):
        bench.run_benchmark([s], ["lee"], tmp_path, progress=False, overwrite=True)
    assert (rep / "report.md").exists() and sub.exists()


def test_a_failed_swap_keeps_the_old_report(scene, tmp_path, monkeypatch):
    clean, noisy, _ = scene
    s = bench.BenchScene(image=noisy, looks=1)
    rep = tmp_path / "rep"
    bench.run_benchmark([s], ["lee"], rep, progress=False)
    before = _tree(rep)

    def disk_full(tmp, path):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(bench.report, "publish", disk_full)  # the report folder is published by despeck.bench.report
    with pytest.raises(InputError, match="rep: cannot write the report .No space left on device"):
        bench.run_benchmark([s], ["boxcar"], rep, progress=False, overwrite=True)
    assert _tree(rep) == before
    assert [p.name for p in tmp_path.iterdir()] == ["rep"]


# --------------------------------------------------------------------------- errors name the file

def test_bench_errors_name_the_file(scene, tmp_path, capsys):
    clean, noisy, _ = scene
    _tif(tmp_path / "noisy.tif", noisy)
    _tif(tmp_path / "tiny.tif", noisy[:10, :10])
    cases = {
        "tiny.tif": "scenes: [{image: tiny.tif, looks: 1}]\nmethods: [lee]\n",
        "noisy.tif": "scenes: [{image: noisy.tif, units: furlongs}]\nmethods: [lee]\n",
        "scenes.yaml": "scenes: [{image: noisy.tif, looks: 1}]\nmethods: [lee]\ncrop: [1, 2]\n",
    }
    for expected, text in cases.items():
        (tmp_path / "scenes.yaml").write_text(text)
        assert main(["bench", str(tmp_path / "out"), "--scenes", str(tmp_path / "scenes.yaml"), "--quiet"]) == 1
        (line,) = capsys.readouterr().err.strip().splitlines()
        assert line.startswith("despeck: error: ") and expected in line, line
    (tmp_path / "scenes.yaml").write_text("scenes: [noisy.tif]\nmethods: [lee, median]\n")
    with pytest.raises(ConfigError, match=r"scenes.yaml: method 2: unknown filter 'median'"):
        bench.run_benchmark(tmp_path / "scenes.yaml", None, tmp_path / "out", progress=False)
    img = str(tmp_path / "noisy.tif")
    for option, value in (("--point", "0,500"), ("--area", "0,0,200,20"), ("--crop", "0,0,300")):
        assert main(["bench", str(tmp_path / "out"), "--image", img, "--looks", "1", option, value,
                     "--method", "lee", "--quiet"]) == 1  # outside this scene: an input error
        (line,) = capsys.readouterr().err.strip().splitlines()
        assert line.startswith("despeck: error: ") and "noisy.tif" in line, line
    # a named array scene is named too
    with pytest.raises(InputError, match="scene 'lowland': point 1"):
        bench.run_benchmark([bench.BenchScene(image=noisy, looks=1, name="lowland", points=[(999, 1)])], ["lee"],
                            tmp_path / "out", progress=False)
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------------- point targets: the worst one

def test_worst_point_target_is_reported(tmp_path):
    # Three isolated targets (1000, 2 and 100) on a background of ones; a 7 x 7 boxcar spreads
    # each over 49 pixels, so its peak is (v + 48) / 49 (hand-computed, as in test_metrics):
    # retention 10 log10((v + 48) / 49 / v) = -13.3, -2.9 and -15.2 dB; median -13.3, worst -15.2.
    image = np.ones((64, 64), np.float32)
    points = [(12, 12), (12, 50), (50, 30)]
    for (r, c), v in zip(points, (1000.0, 2.0, 100.0)):
        image[r, c] = v
    expected = [10 * np.log10((v + 48) / 49 / v) for v in (1000.0, 2.0, 100.0)]
    s = bench.BenchScene(image=image, looks=1, points=points, areas=[], name="targets")
    result = bench.run_benchmark([s], ["boxcar:window=7"], tmp_path / "rep", progress=False)
    row = result["results"][-1]
    assert row["point_retention_db"] == pytest.approx(np.median(expected), abs=1e-4)
    assert row["point_worst_db"] == pytest.approx(min(expected), abs=1e-4)
    (csv_row,) = [r for r in csv.DictReader(open(tmp_path / "rep" / "results.csv")) if r["method"] == "boxcar:window=7"]
    assert float(csv_row["point_worst_db"]) == pytest.approx(min(expected), abs=1e-3)
    report = (tmp_path / "rep" / "report.md").read_text()
    assert "worst point dB" in report and "-15.2" in report
    assert "point_worst_db" in json.loads((tmp_path / "rep" / "results.json").read_text())["conventions"]


# --------------------------------------------------------------------------- outside references

@pytest.mark.parametrize("window,looks", [(3, 1), (5, 2)])
def test_enl_of_a_boxcar_on_white_speckle_is_n2_l(tmp_path, window, looks):
    # Oliver & Quegan (1998), Understanding Synthetic Aperture Radar Images: averaging N x N
    # independent L-look intensities gives N^2 L looks (the mean of N^2 L unit exponentials is
    # Gamma(N^2 L) distributed; scipy.stats.gamma gives its mean^2 / variance).
    from scipy import stats

    expected = stats.gamma(a=window**2 * looks).mean() ** 2 / stats.gamma(a=window**2 * looks).var()
    assert expected == pytest.approx(window**2 * looks)
    noisy = simulate_intensity(np.ones((160, 160)), looks, rng=np.random.default_rng(40 + window))
    boxes = [(r, c, r + 60, c + 60) for r in (10, 90) for c in (10, 90)]
    s = bench.BenchScene(image=noisy, looks=looks, areas=boxes, points=[], name="flat")
    result = bench.run_benchmark([s], [f"boxcar:window={window}"], tmp_path / "rep", progress=False)
    by = {r["method"]: r for r in result["results"]}
    # tolerance: overlapping boxcar windows make neighbouring outputs correlated, so the 3600
    # pixels of an area act like about 3600 / N^2 independent ones; over 20 seeds the median ENL
    # over the four areas had a relative standard deviation of 2.5 % (3 x 3, L = 1) and 5 %
    # (5 x 5, L = 2): 0.15 is three of the larger
    assert by[f"boxcar:window={window}"]["enl"] == pytest.approx(expected, rel=0.15)
    assert by["input (unfiltered)"]["enl"] == pytest.approx(looks, rel=0.1)


def test_bench_psnr_and_ssim_equal_scikit_image(scene, tmp_path):
    # scikit-image (van der Walt et al. 2014) peak_signal_noise_ratio and structural_similarity
    # (defaults: 7 x 7 uniform window, K1 0.01, K2 0.03) on the clipped dB and amplitude images
    # the report conventions describe, with the ranges the report records
    from skimage.metrics import peak_signal_noise_ratio, structural_similarity

    from despeck import filters

    clean, noisy, layout = scene
    s = bench.BenchScene(image=noisy, reference=clean, looks=1, areas=layout.homogeneous_boxes, points=[])
    result = bench.run_benchmark([s], ["boxcar:window=5"], tmp_path / "rep", progress=False)
    row = result["results"][-1]
    out = filters.boxcar(noisy.astype(np.float32), looks=1, window=5).astype(np.float64)
    ref = clean.astype(np.float32).astype(np.float64)
    low, high = row["db_range"]
    rd, ed = np.clip(10 * np.log10(ref), low, high), np.clip(10 * np.log10(out), low, high)
    assert row["psnr_db"] == pytest.approx(peak_signal_noise_ratio(rd, ed, data_range=high - low), abs=1e-6)
    assert row["ssim_db"] == pytest.approx(structural_similarity(rd, ed, data_range=high - low), abs=1e-6)
    # the same PSNR within the reference's regions, the homogeneous boxes being the flat one
    from despeck import metrics

    regions = metrics.reference_regions(ref, metrics.areas_from_boxes(layout.homogeneous_boxes, ref.shape))
    for name in metrics.REGION_NAMES:
        m = regions[name]
        assert m.any() and row[f"psnr_db_{name}"] == pytest.approx(
            peak_signal_noise_ratio(rd[m], ed[m], data_range=high - low), abs=1e-6)
    report = (tmp_path / "rep" / "report.md").read_text()
    assert "PSNR texture" in report and "](scene1_regions.png)" in report
    assert (tmp_path / "rep" / "scene1_regions.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    peak = row["amplitude_peak"]
    ra, ea = np.clip(np.sqrt(ref), 0, peak), np.clip(np.sqrt(out), 0, peak)
    assert row["psnr_amplitude"] == pytest.approx(peak_signal_noise_ratio(ra, ea, data_range=peak), abs=1e-6)
    assert row["ssim_amplitude"] == pytest.approx(structural_similarity(ra, ea, data_range=peak), abs=1e-6)
