"""Looks- and correlation-aware models: conditioning, bias table, files, inference and fine-tuning.

Outside references: psi_1 from scipy.special.polygamma; the mean of L-look Gamma speckle is 1
(Oliver & Quegan 1998, Understanding Synthetic Aperture Radar Images, ch. 4); the Siegert
relation for the intensity correlation of correlated speckle (Goodman 1985, Statistical Optics).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import rasterio
import torch
from scipy import special

from despeck import speckle
from despeck.errors import ConfigError, InputError
from despeck.inference import InferenceWarning, despeckle_array, despeckle_file
from despeck.models import Despeckler, create_model, load_model_file, save_model_file
from despeck.training.calibration import calibrate_log_bias_table, system_for_correlation

torch.set_num_threads(1)


@pytest.fixture
def model():
    torch.manual_seed(0)
    return Despeckler(create_model("unet-cond-xs"), looks=[1, 16], point_false_alarm=None).eval()


def test_condition_values_follow_scipy(model):
    c = model.condition(3, torch.tensor([1.0, 4.4, 16.0]), [(0.5, 0.1), (0.0, 0.0), (0.7, 0.7)])
    expected = np.sqrt(special.polygamma(1, [1.0, 4.4, 16.0])) / model.log_scale
    np.testing.assert_allclose(c[:, 0].numpy(), expected, rtol=1e-6)
    np.testing.assert_allclose(c[:, 1:].numpy(), [[0.5, 0.1], [0, 0], [0.7, 0.7]], atol=1e-7)
    with pytest.raises(InputError):
        model.condition(2, torch.tensor([1.0, -1.0]))


def test_bias_table_interpolates_in_log_looks(model):
    model.log_bias_table = {"looks": [1.0, 4.0], "corr": [0.0, 0.5], "values": [[0.1, 0.3], [0.0, 0.2]]}
    assert model.bias_for(1.0, (0.0, 0.0)) == pytest.approx(0.1)
    assert model.bias_for(4.0, (0.5, 0.5)) == pytest.approx(0.2)
    assert model.bias_for(2.0, (0.0, 0.0)) == pytest.approx(0.05)  # halfway in ln L
    assert model.bias_for(100.0, (0.9, 0.9)) == pytest.approx(0.2)  # clamped to the grid


def test_model_file_round_trip_keeps_conditioning(tmp_path, model):
    model.log_bias_table = {"looks": [1.0, 16.0], "corr": [0.0], "values": [[0.02], [0.001]]}
    path = save_model_file(tmp_path / "m.safetensors", model)
    back = load_model_file(path)
    assert back.conditioned and back.looks == [1.0, 16.0] and back.log_bias_table == model.log_bias_table
    x = torch.rand(1, 1, 24, 24) + 0.1
    with torch.no_grad():
        torch.testing.assert_close(back(x, looks=3.0, correlation=(0.2, 0.4)), model(x, looks=3.0, correlation=(0.2, 0.4)))


def test_bias_table_keeps_mean_backscatter(model):
    # After calibration the model's output mean on fresh constant speckle is the reflectivity
    # (mean of unit-mean Gamma speckle is 1); 0.1 dB is the radiometry target.
    table = calibrate_log_bias_table(model, looks_range=(1, 16), corr_grid=(0.0, 0.5), side=96, patches=4, seed=1)
    model.log_bias_table = table
    rng = np.random.default_rng(9)
    for L, rho in ((1.0, 0.0), (4.0, 0.5)):
        R = np.full((128, 128), 0.03, np.float32)
        if rho:
            os_, taper = system_for_correlation(rho)
            x = np.stack([speckle.simulate_correlated_intensity(R, L, rng=rng, oversampling=os_, taper=taper)
                          for _ in range(6)])
        else:
            x = R * speckle.gamma_speckle((6, 128, 128), L, rng=rng)
        with torch.no_grad():
            out = model(torch.from_numpy(x)[:, None], log_offset=math.log(0.03) + speckle.log_intensity_mean(L),
                        looks=L, correlation=(rho, rho))
        core = out[:, 0, 16:-16, 16:-16].double().mean().item()
        assert abs(10 * math.log10(core / 0.03)) < 0.1


def test_system_for_correlation_reaches_the_target():
    for rho in (0.1, 0.3, 0.6):
        os_, taper = system_for_correlation(rho)
        assert speckle.intensity_correlation_theory(oversampling=os_, taper=taper, lags=(1,))[0] == pytest.approx(rho, abs=1e-3)


def test_array_inference_estimates_the_condition(model):
    R = np.full((256, 256), 0.1, np.float32)
    image = speckle.simulate_correlated_intensity(R, 4.0, rng=2, oversampling=1.25, taper="hamming")
    from despeck.looks import describe_array

    info, corr, _ = describe_array(image)
    default = despeckle_array(image, model, progress=False, threads=1)
    given = despeckle_array(image, model, progress=False, threads=1, looks=info.value, correlation=corr.lag1)
    np.testing.assert_allclose(default, given, rtol=1e-6)
    other = despeckle_array(image, model, progress=False, threads=1, looks=1.0, correlation=(0.0, 0.0))
    assert np.abs(other - default).max() > 0  # the condition reaches the network


def test_looks_outside_the_models_range_warn(model):
    narrow = Despeckler(model.network, looks=[1, 2])
    image = 0.1 * speckle.gamma_speckle((128, 128), 10.0, rng=3)
    with pytest.warns(InferenceWarning, match="outside the 1-2 looks"):
        despeckle_array(image, narrow, progress=False, threads=1)


def test_file_output_records_the_input_condition(tmp_path, model):
    src = tmp_path / "in.tif"
    data = (0.05 * speckle.gamma_speckle((128, 160), 3.0, rng=4)).astype(np.float32)
    with rasterio.open(src, "w", driver="GTiff", width=160, height=128, count=1, dtype="float32") as dst:
        dst.write(data, 1)
        dst.update_tags(looks="3")
    out = tmp_path / "out.tif"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        despeckle_file(src, out, model, progress=False, threads=1)
    with rasterio.open(out) as ds:
        tags = ds.tags()
    assert tags["input_looks"] == "3" and tags["input_looks_source"] == "tag"
    assert tags["input_speckle_correlation_source"] == "measured"
    rows = [float(v) for v in tags["input_speckle_correlation_rows"].split(",")]
    assert rows[0] < 0.15  # white speckle: Siegert relation gives 0 for an unfiltered field


def test_fine_tune_starts_from_a_model_file(tmp_path, model):
    from despeck.training import load_config
    from despeck.training.trainer import train

    donor = save_model_file(tmp_path / "donor.safetensors", model)
    cfg_text = f"""
data: {{synthetic_scenes: 1, synthetic_size: 96, patch_size: 32, batch_size: 4, patches_per_epoch: 8, val_patches: 4}}
model: {{name: unet-cond-xs, init: {donor}}}
speckle: {{looks: [1, 4]}}
budget: {{max_steps: 1}}
trainer: {{threads: 1, progress: false}}
output: {{dir: {tmp_path / 'run'}}}
"""
    (tmp_path / "c.yaml").write_text(cfg_text)
    cfg = load_config(tmp_path / "c.yaml")
    cfg.optim.lr = 1e-12  # one step that cannot move the weights: they must be the donor's
    result = train(cfg)
    tuned = load_model_file(result.model_path)
    for (k, a), b in zip(model.network.state_dict().items(), tuned.network.state_dict().values()):
        torch.testing.assert_close(a, b, atol=1e-6, rtol=0, msg=k)
    bad = cfg_text.replace("unet-cond-xs", "unet-xs")
    (tmp_path / "bad.yaml").write_text(bad.replace(str(tmp_path / "run"), str(tmp_path / "run2")))
    with pytest.raises(ConfigError, match="model.init"):
        train(load_config(tmp_path / "bad.yaml"))


def test_fine_tune_starts_from_a_deepened_model_file(tmp_path, model):
    # scripts/deepen_model.py's network (one more level, no registered name for these
    # widths) is named in a config by its family name and widths; training starts from
    # exactly its weights.
    from despeck.models.unet import deepened
    from despeck.training import load_config
    from despeck.training.trainer import train

    deep = Despeckler(deepened(model.network, 24), looks=model.looks)
    assert deep.network.architecture == "unet-cond-xs" and deep.network.widths == [8, 16, 24]
    donor = save_model_file(tmp_path / "deep.safetensors", deep)
    (tmp_path / "c.yaml").write_text(f"""
data: {{synthetic_scenes: 1, synthetic_size: 96, patch_size: 32, batch_size: 4, patches_per_epoch: 8, val_patches: 4}}
model: {{name: unet-cond-xs, kwargs: {{widths: [8, 16, 24]}}, init: {donor}}}
speckle: {{looks: [1, 4]}}
budget: {{max_steps: 1}}
trainer: {{threads: 1, progress: false}}
output: {{dir: {tmp_path / 'run'}}}
""")
    cfg = load_config(tmp_path / "c.yaml")
    cfg.optim.lr = 1e-12
    tuned = load_model_file(train(cfg).model_path)
    assert tuned.network.widths == [8, 16, 24]
    for (k, a), b in zip(deep.network.state_dict().items(), tuned.network.state_dict().values()):
        torch.testing.assert_close(a, b, atol=1e-6, rtol=0, msg=k)

def test_blind_mode_when_the_correlation_is_not_trusted(model):
    from despeck.looks import SpeckleCorrelation
    from despeck.inference import condition_for_model
    from despeck.looks import LooksInfo

    model.correlation_unknown = True
    sensor = SpeckleCorrelation((0.55, 0.08), (0.52, 0.06), "measured")      # Hamming, oversampling 1.25 (theory 0.55, 0.08)
    texture = SpeckleCorrelation((0.30, 0.27), (0.10, 0.05), "measured")     # slowly decaying: texture, not a system response
    white = SpeckleCorrelation((0.01, 0.0), (0.02, 0.01), "measured")
    assert sensor.reliable and white.reliable and not texture.reliable
    info = LooksInfo(4.0, "estimate")
    assert condition_for_model(model, info, sensor)[1] == sensor.lag1
    assert condition_for_model(model, info, texture)[1] is None
    c = model.condition(1, 4.0, None)
    assert c[0, 1].item() == -1.0 and c[0, 2].item() == -1.0  # the planes say "not known"
    model.log_bias_table = {"looks": [1.0, 16.0], "corr": [-1.0, 0.0, 0.5], "values": [[0.3, 0.1, 0.2], [0.3, 0.1, 0.2]]}
    assert model.bias_for(4.0, None) == pytest.approx(0.3)
    assert model.bias_for(4.0, (0.25, 0.25)) == pytest.approx(0.15)


def test_correlated_training_target_is_the_speckles_mean():
    # The mean of correlated speckle is the reflectivity convolved with |PSF|^2
    # (psf_intensity_kernel; Argenti et al. 2013, A tutorial on speckle reduction in SAR
    # images, IEEE GRSM 1(3)): averaging many independent speckled views of a scene must
    # give the training target, not the unblurred reference.
    from despeck.training.data import SpeckleDraw

    rng = np.random.default_rng(3)
    clean = np.full((64, 64), 0.01, np.float32)
    clean[32, 32] = 1.0  # a bright point the system blurs
    draw = SpeckleDraw(1.0, True, (1.3, 1.1), "hamming")
    views = np.mean([draw.apply(clean, rng) for _ in range(400)], axis=0)
    target = draw.expected(clean)
    inner = (slice(20, 44), slice(20, 44))
    # 400 independent 1-look views: relative standard error 1/sqrt(400) = 5 % per pixel
    np.testing.assert_allclose(views[inner], target[inner], rtol=0.2, atol=0.004)
    assert target.max() < 0.9 * clean.max()  # blurred, not the reference
    assert np.array_equal(draw.expected(clean, "reference"), clean)
    white = SpeckleDraw(2.0)
    assert np.array_equal(white.expected(clean), clean)


def test_model_init_is_relative_to_the_config_file(tmp_path, model):
    from despeck.training import load_config

    (tmp_path / "cfg").mkdir()
    save_model_file(tmp_path / "donor.safetensors", model)
    (tmp_path / "cfg" / "c.yaml").write_text("model: {name: unet-cond-xs, init: ../donor.safetensors}\n"
                                             "data: {synthetic_scenes: 1}\n")
    cfg = load_config(tmp_path / "cfg" / "c.yaml")
    assert cfg.model.init == str(tmp_path / "cfg" / ".." / "donor.safetensors")
    (tmp_path / "cfg" / "s.yaml").write_text("model: {name: unet-cond-xs, init: starter}\ndata: {synthetic_scenes: 1}\n")
    assert load_config(tmp_path / "cfg" / "s.yaml").model.init == "starter"


def test_looks_jitter_spreads_the_told_looks_only():
    # speckle.looks_jitter: the told looks are L * exp(s * N(0, 1)) with s = looks_jitter,
    # the correlation keeps condition_jitter's noise. Checked with a Kolmogorov-Smirnov
    # test of ln(told / L) against N(0, s) (scipy.stats.kstest; Massey 1951, "The
    # Kolmogorov-Smirnov test for goodness of fit", JASA 46(253), 68-78).
    from scipy import stats

    from despeck.training.speckle_draws import SpeckleDraw, told_condition

    draw = SpeckleDraw(looks=4.4, correlated=True, oversampling=(1.25, 1.25), taper="hamming")
    rng = np.random.default_rng(3)
    told = [told_condition(draw, 0.0, rng, looks_jitter=0.2) for _ in range(2000)]
    logs = np.log([t[0] / 4.4 for t in told])
    assert stats.kstest(logs, "norm", args=(0.0, 0.2)).pvalue > 1e-3
    assert stats.kstest(logs, "norm", args=(0.0, 0.04)).pvalue < 1e-6  # the check can fail
    assert {t[1] for t in told} == {draw.correlation()}  # no jitter on the correlation
    # Left unset, the looks take condition_jitter's noise: the same draws as before.
    a = [told_condition(draw, 0.04, np.random.default_rng(9)) for _ in range(3)]
    b = [told_condition(draw, 0.04, np.random.default_rng(9), looks_jitter=None) for _ in range(3)]
    assert a == b and len({t[0] for t in a}) == 1 and a[0][0] != 4.4


def test_bf16_bias_table_is_used_under_bf16_autocast_and_kept_in_files(tmp_path, model):
    # The wrapper takes its bias from the bfloat16 table exactly when it runs under CPU
    # bfloat16 autocast: with tables 0 and 0.1 nepers the outputs of one arithmetic
    # differ by exp(0.1) (the bias is added to the log estimate).
    flat = {"looks": [1.0, 16.0], "corr": [0.0], "values": [[0.0], [0.0]]}
    model.log_bias_table = flat
    x = torch.rand(1, 1, 24, 24) + 0.1
    with torch.no_grad(), torch.autocast("cpu", dtype=torch.bfloat16):
        plain = model(x, looks=2.0, correlation=(0.0, 0.0))
        model.log_bias_table_bf16 = {**flat, "values": [[0.1], [0.1]]}
        shifted = model(x, looks=2.0, correlation=(0.0, 0.0))
    torch.testing.assert_close(shifted / plain, torch.full_like(plain, math.exp(0.1)), rtol=1e-5, atol=0)
    with torch.no_grad():
        assert torch.equal(model(x, looks=2.0), model(x, looks=2.0))  # float32 ignores it
    assert model.bias_for(2.0, (0, 0)) == 0.0 and model.bias_for(2.0, (0, 0), bf16=True) == pytest.approx(0.1)
    back = load_model_file(save_model_file(tmp_path / "m.safetensors", model))
    assert back.bf16_calibrated and back.log_bias_table_bf16 == model.log_bias_table_bf16
    with pytest.raises(InputError, match="log_bias_table_bf16 needs a log_bias_table"):
        Despeckler(create_model("unet-cond-xs"), looks=[1, 16], log_bias_table_bf16=flat)
    with pytest.raises(InputError, match="log_bias_table_bf16 values must be finite"):
        Despeckler(create_model("unet-cond-xs"), looks=[1, 16], log_bias_table=flat,
                   log_bias_table_bf16={**flat, "values": [[float("nan")], [0.0]]})


def test_bf16_table_for_keeps_the_float32_table_and_adds_the_arithmetic_shift(model):
    # Same patches in both arithmetics (one seed): the added table is the stored one plus
    # the measured bfloat16-minus-float32 difference, cell by cell, whether both are
    # measured in one pass (bf16_table_for) or one call each; the float32 table is left as
    # it is.
    from despeck.training.calibration import bf16_table_for

    kw = dict(looks_range=(1, 16), corr_grid=(0.0, 0.5), side=64, patches=2, seed=3)
    stored = calibrate_log_bias_table(model, **{**kw, "seed": 11})
    model.log_bias_table = stored
    table = bf16_table_for(model, seed=3, side=64, patches=2)
    f32 = calibrate_log_bias_table(model, **kw)
    b16 = calibrate_log_bias_table(model, **kw, bf16=True)
    assert model.log_bias_table is stored and table["corr"] == stored["corr"] == [0.0, 0.5]
    expected = np.array(stored["values"]) + np.array(b16["values"]) - np.array(f32["values"])
    np.testing.assert_allclose(table["values"], expected, rtol=0, atol=1e-12)
    assert not np.allclose(b16["values"], f32["values"], rtol=0, atol=1e-6)  # the arithmetic does move it
    model.log_bias_table = None
    with pytest.raises(InputError, match="no log_bias_table"):
        bf16_table_for(model)
    from despeck.training.calibration import calibrate_log_bias_tables

    with pytest.raises(InputError, match="precisions must be some of"):
        calibrate_log_bias_tables(model, looks_range=(1, 16), precisions=("16",))
