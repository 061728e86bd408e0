"""The bundled starter model: loads safely, keeps mean backscatter, is calibration-independent.

These check the shipped file itself (``despeck/weights/starter.safetensors``), so a
retrained model that breaks radiometry cannot be shipped unnoticed.
"""

import math
import pathlib

import numpy as np
import pytest
import rasterio
import torch
from rasterio.transform import from_origin
from scipy import special

from despeck.cli import main
from despeck.inference import despeckle_array
from despeck.models import load_model_file
from despeck.models.modelfile import read_model_metadata
from despeck.speckle import simulate_intensity

STARTER = pathlib.Path(__file__).resolve().parents[1] / "despeck" / "weights" / "starter.safetensors"


@pytest.fixture(scope="module")
def starter():
    torch.set_num_threads(2)
    return load_model_file(STARTER)


def test_starter_is_small_and_describes_itself():
    assert STARTER.stat().st_size < 5 * 1024 * 1024  # project target: a small bundled file
    meta = read_model_metadata(STARTER)
    assert meta["architecture"]["name"] == "unet-cond-m" and meta["units"] == "intensity"
    model = load_model_file(STARTER)
    assert model.looks == [1.0, 16.0] and model.conditioned and model.correlation_unknown
    assert model.log_bias_table is not None


@pytest.mark.parametrize("looks, correlated", [(4.0, False), (4.4, True)])
def test_starter_keeps_mean_backscatter_on_multi_look_and_correlated_speckle(starter, looks, correlated):
    # The same 0.1 dB target (project target) on 4-look white and 4.4-look correlated
    # speckle (oversampling 1.25, Hamming); the mean of correlated speckle is the
    # reflectivity through |PSF|^2, which keeps a constant area's mean (Argenti et al. 2013,
    # IEEE GRSM 1(3)). Sampling error of the mean: well under 0.02 dB here (262,144 pixels,
    # correlation length about 2 pixels).
    from despeck.speckle import simulate_correlated_intensity

    truth = 10 ** (-1.3)
    clean = np.full((512, 512), truth, np.float32)
    rng = np.random.default_rng(7)
    noisy = (simulate_correlated_intensity(clean, looks, rng=rng, oversampling=1.25, taper="hamming") if correlated
             else simulate_intensity(clean, looks, rng=rng))
    out = despeckle_array(noisy, starter, progress=False)
    bias_db = 10 * math.log10(out.astype(np.float64).mean() / truth)
    assert abs(bias_db) < 0.1


def test_starter_mean_hardly_follows_an_underestimated_looks_value(starter):
    # On built-up ground the looks estimate reads 3.0-3.7 for 4.4-look speckle (model
    # card). A network that trusted the told looks for its log-domain bias correction
    # would move its mean by the change of ln L - psi(L) (Xie, Pierce & Ulaby 2002; scipy's
    # digamma) between 4.4 and 3.0 looks, 0.25 dB; the starter's second training stage
    # (speckle.looks_jitter) taught it to read the level from the pixels, and its mean
    # must move by under a quarter of that. Same speckle both times (a paired check); the
    # previous starter moved by 0.09 dB here.
    from despeck.speckle import simulate_correlated_intensity

    clean = np.full((256, 256), 0.05, np.float32)
    noisy = simulate_correlated_intensity(clean, 4.4, rng=np.random.default_rng(3), oversampling=1.25,
                                          taper="hamming")
    trusting = 10 / math.log(10) * ((math.log(4.4) - special.digamma(4.4)) - (math.log(3.0) - special.digamma(3.0)))
    assert trusting == pytest.approx(-0.25, abs=0.01)
    means = [despeckle_array(noisy, starter, looks=told, progress=False)[32:-32, 32:-32].astype(np.float64).mean()
             for told in (4.4, 3.0)]
    moved_db = 10 * math.log10(means[1] / means[0])
    assert abs(moved_db) < 0.25 * abs(trusting)


def test_starter_keeps_mean_backscatter_on_a_homogeneous_area(starter):
    # A constant area of -13 dB under 1-look speckle. Without correction, averaging in the
    # log domain would be low by psi(1) - ln 1 = -0.5772 nepers = -2.51 dB (scipy's digamma;
    # Oliver & Quegan 1998); the model must stay within 0.1 dB of the truth (project target). The
    # sampling error of the mean of 65,536 unit-mean exponential values is 1/256, i.e.
    # 0.017 dB (1 sigma), so the tolerance is dominated by the model.
    assert 10 * math.log10(math.exp(special.digamma(1.0))) == pytest.approx(-2.507, abs=1e-3)
    truth = 10 ** (-1.3)
    noisy = simulate_intensity(np.full((256, 256), truth, np.float32), 1, rng=np.random.default_rng(3))
    out = despeckle_array(noisy, starter, progress=False)
    bias_db = 10 * math.log10(out.astype(np.float64).mean() / truth)
    assert abs(bias_db) < 0.1
    # and it does smooth: ENL well above the input's single look (20: project floor; for scale,
    # a 5 x 5 boxcar reaches N^2 L = 25 on white speckle, Oliver & Quegan 1998)
    inner = out[32:-32, 32:-32].astype(np.float64)
    assert inner.mean() ** 2 / inner.var() > 20


def test_starter_is_calibration_independent(starter):
    # Scaling the input by 1000 (30 dB) must scale the output by exactly that factor:
    # the log-domain normalisation subtracts the scene's mean log-intensity.
    from despeck.synthetic import make_scene

    clean = make_scene((96, 96), rng=4)
    noisy = simulate_intensity(clean, 1, rng=np.random.default_rng(5))
    a = despeckle_array(noisy, starter, progress=False)
    b = despeckle_array(noisy * np.float32(1000), starter, progress=False)
    np.testing.assert_allclose(b / a, 1000, rtol=2e-4)  # float32 rounding through log/exp (project tolerance)


def test_apply_uses_the_starter_by_default(tmp_path):
    src = tmp_path / "scene.tif"
    data = simulate_intensity(np.full((64, 64), 0.05, np.float32), 1, rng=np.random.default_rng(1))
    with rasterio.open(src, "w", driver="GTiff", width=64, height=64, count=1, dtype="float32",
                       crs="EPSG:32631", transform=from_origin(500000, 5800000, 10, 10), nodata=0.0) as d:
        d.write(data, 1)
    assert main(["apply", str(src), "--out", str(tmp_path / "out.tif"), "--quiet", "--threads", "1"]) == 0
    with rasterio.open(tmp_path / "out.tif") as d:
        out = d.read(1)
        assert d.crs.to_epsg() == 32631
    assert out.std() < 0.5 * data.std()  # project floor: clearly smoothed


def test_starter_keeps_an_isolated_point_target(starter):
    # A point 20 dB above a -15 dB field. The guard passes through pixels above the level
    # 1-look speckle exceeds with probability 1e-4: gammaincinv(1, 1 - 1e-4) = ln(1e4) = 9.21
    # (scipy.special; exponential quantile, Goodman 1976). The peak must stay within 3 dB
    # (half power; project target) of the input peak, while without the guard it is smoothed away.
    assert starter.point_threshold == pytest.approx(math.log(1e4), rel=1e-9)
    clean = np.full((128, 128), 10 ** (-1.5), np.float32)
    clean[64, 64] *= 100.0
    noisy = simulate_intensity(clean, 1, rng=np.random.default_rng(11))
    noisy[64, 64] = clean[64, 64]  # the point's own speckle draw set to its mean, for a stable check
    out = despeckle_array(noisy, starter, progress=False)
    assert 10 * math.log10(out[64, 64] / noisy[64, 64]) > -3.0
    guard = starter.point_false_alarm
    try:
        starter.point_false_alarm = None
        smoothed = despeckle_array(noisy, starter, progress=False)
    finally:
        starter.point_false_alarm = guard
    assert 10 * math.log10(smoothed[63:66, 63:66].max() / noisy[64, 64]) < -3.0


def _training_references_script():
    import importlib.util

    path = pathlib.Path(__file__).resolve().parents[1] / "scripts" / "make_training_references.py"
    spec = importlib.util.spec_from_file_location("make_training_references", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_held_out_pictures_are_never_trained_on_under_any_name(monkeypatch):
    # scikit-image (outside the project) ships one photograph as both data.cat() and
    # data.chelsea(): the held-out evaluation image must not be trained on under its other name.
    from skimage import data

    np.testing.assert_array_equal(data.cat(), data.chelsea())
    script = _training_references_script()
    assert {"camera", "cat", "chelsea"} <= script.held_out_names()
    assert not script.held_out_names() & set(script.TRAIN_IMAGES)
    script.check_split()  # the shipped lists pass, including the picture-content comparison
    with pytest.raises(SystemExit, match="chelsea"):
        script.check_split(script.TRAIN_IMAGES + ("chelsea",))
    # the content comparison alone also catches it (no alias listed)
    monkeypatch.setattr(script, "SAME_PICTURE", {})
    with pytest.raises(SystemExit, match="same picture"):
        script.check_split(("astronaut", "chelsea"))


def test_the_faster_bundled_model_is_the_previous_starter_and_keeps_mean_backscatter(tmp_path):
    # "starter-fast": the previous, smaller starter, for users who need throughput. Same 0.1 dB
    # radiometry target (project target) on 4-look Gamma speckle of a constant area.
    from despeck.models import bundled_model_path, resolve_model_path

    path = resolve_model_path("starter-fast")
    assert path == bundled_model_path("starter-fast") and path.stat().st_size < 5 * 1024 * 1024
    assert read_model_metadata(path)["architecture"]["name"] == "unet-cond-s"
    fast = load_model_file(path)
    assert fast.conditioned and fast.looks == [1.0, 16.0]
    truth = 0.03
    noisy = simulate_intensity(np.full((384, 384), truth, np.float32), 4.0, rng=np.random.default_rng(3))
    out = despeckle_array(noisy, fast, progress=False, threads=1)
    assert abs(10 * math.log10(out.astype(np.float64).mean() / truth)) < 0.1
    # despeck apply takes the bundled name for --model
    src = tmp_path / "in.tif"
    with rasterio.open(src, "w", driver="GTiff", height=128, width=128, count=1, dtype="float32",
                       transform=from_origin(1000.0, 2000.0, 10.0, 10.0)) as dst:
        dst.write(noisy[:128, :128], 1)
    assert main(["apply", str(src), "--model", "starter-fast", "--out", str(tmp_path / "out.tif"), "--quiet"]) == 0
    with rasterio.open(tmp_path / "out.tif") as ds:
        assert ds.tags()["despeck_method"] == "starter_fast.safetensors" and np.isfinite(ds.read(1)).all()


@pytest.mark.parametrize("looks, correlated", [(1.0, False), (4.4, True)])
def test_starter_in_bf16_keeps_mean_backscatter(starter, looks, correlated):
    # bfloat16 keeps 8 significant bits (common practice), and rounding every activation
    # moves the network's mean output by a steady amount: the starter carries a bias
    # table measured in bfloat16 for it. Under bfloat16 autocast (emulated where the CPU
    # has no native instructions: same rounding, slower) the mean of a constant area must
    # stay within the project's 0.1 dB of the truth (speckle has unit mean; Oliver & Quegan
    # 1998, ch. 4) and within 0.006 dB of the float32 result on the same speckle (a paired
    # check); with the float32 table instead it moves by more than 0.003 dB, so the
    # bfloat16 table is what keeps it.
    from despeck.speckle import simulate_correlated_intensity

    assert starter.bf16_calibrated
    truth = 10 ** (-1.3)
    clean = np.full((320, 320), truth, np.float32)
    rng = np.random.default_rng(17)
    noisy = (simulate_correlated_intensity(clean, looks, rng=rng, oversampling=1.25, taper="hamming") if correlated
             else simulate_intensity(clean, looks, rng=rng))
    x = torch.from_numpy(noisy)[None, None]
    offset = float(starter.scene_log_offset(x))
    corr = (0.0, 0.0) if not correlated else (0.3, 0.3)
    core = (0, 0, slice(48, -48), slice(48, -48))

    def mean_db(bf16, table=True):
        saved = starter.log_bias_table_bf16
        starter.log_bias_table_bf16 = saved if table else None
        try:
            with torch.inference_mode(), torch.autocast("cpu", dtype=torch.bfloat16, enabled=bf16):
                out = starter(x, log_offset=offset, looks=looks, correlation=corr)
        finally:
            starter.log_bias_table_bf16 = saved
        return 10 * math.log10(out[core].double().mean().item() / truth)

    f32, b16, b16_f32_table = mean_db(False), mean_db(True), mean_db(True, table=False)
    assert abs(b16) < 0.1
    assert abs(b16 - f32) < 0.006
    assert abs(b16_f32_table - f32) > 0.003
