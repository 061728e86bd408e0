"""Tests for training on pairs of real looks: the change mask, date pairs, SLC sub-looks, bad input.

Everything runs on one torch thread with tiny scenes and a tiny network (the machine is
shared); the two training runs take a few seconds each.
"""

import csv
import math
from pathlib import Path

import numpy as np
import pytest
import rasterio
import torch
from affine import Affine
from scipy import special, stats

from despeck.errors import ConfigError, DespeckError, RasterError
from despeck.models import load_model_file
from despeck.speckle import enl_intensity, simulate_correlated_slc
from despeck.synthetic import make_scene
from despeck.training import config_from_dict, load_config, train
from despeck.training.losses import DespeckleLoss, gamma_nll, log_mse
from despeck.change import change_mask, change_thresholds
from despeck.training.pairs import PairTrainingData
from training_helpers import tiny_pair_config as _config
from training_helpers import write_tif as _write_tif

torch.set_num_threads(1)
PAIRS_CONFIG = Path(__file__).resolve().parents[1] / "configs" / "pairs.yaml"


@pytest.fixture(scope="module")
def date_pair(tmp_path_factory):
    """One procedural scene speckled twice independently (1 look), as two GeoTIFFs on one grid."""
    folder = tmp_path_factory.mktemp("dates")
    clean = make_scene((192, 192), rng=31)
    rng = np.random.default_rng(32)
    first = _write_tif(folder / "date1.tif", clean * rng.gamma(1.0, 1.0, clean.shape))
    second = _write_tif(folder / "date2.tif", clean * rng.gamma(1.0, 1.0, clean.shape))
    return first, second


@pytest.fixture(scope="module")
def pair_run(date_pair, tmp_path_factory):
    out = tmp_path_factory.mktemp("runs") / "pairs"
    config = _config(out, pairs=[[str(p) for p in date_pair]])
    return config, train(config, progress=False)


# ----------------------------------------------------------------------------- change mask

def test_ratio_of_means_follows_f_distribution():
    # The law behind the test: the ratio of two independent L-look means over N pixels
    # of one reflectivity is F(2NL, 2NL) (Gamma sums; Touzi, Lopes, Bousquet 1988, from
    # memory). Checked here by simulation against scipy.stats.f, independently of the code.
    rng = np.random.default_rng(1)
    N, L = 49, 2.0
    ratio = rng.gamma(L, 1 / L, (20000, N)).mean(1) / rng.gamma(L, 1 / L, (20000, N)).mean(1)
    assert stats.kstest(ratio, stats.f(2 * N * L, 2 * N * L).cdf).pvalue > 0.01
    low, high = change_thresholds(N, L, L, 0.01)
    assert low == pytest.approx(stats.f.ppf(0.005, 2 * N * L, 2 * N * L))
    assert high == pytest.approx(stats.f.isf(0.005, 2 * N * L, 2 * N * L))


def test_change_mask_false_alarms_on_an_unchanged_pair():
    # Pure 1-look speckle on both dates. Tests at pixels 7 apart use disjoint windows,
    # hence are independent: their flag count is Binomial(n, false_alarm).
    pfa, flagged_exact, flagged_effective, n = 0.05, 0, 0, 0
    for seed in range(4):
        rng = np.random.default_rng(100 + seed)
        a, b = rng.gamma(1.0, 1.0, (2, 384, 384))
        grid = (slice(3, -3, 7), slice(3, -3, 7))
        flagged_exact += int(change_mask(a, b, false_alarm=pfa, effective_pixels=False, grow=0)[grid].sum())
        flagged_effective += int(change_mask(a, b, false_alarm=pfa)[grid].sum())
        n += a[grid].size
    # The pixel-count law is exact (scipy.stats.f thresholds): the stated rate.
    assert stats.binomtest(flagged_exact, n, pfa).pvalue > 1e-3
    # The effective-pixel version is conservative on homogeneous ground (measured 4.6 %
    # at 5 %; documented in change_mask): at most the stated rate (plus 3 binomial standard
    # errors), not far below it (0.8: project margin).
    assert 0.8 * pfa < flagged_effective / n <= pfa + 3 * math.sqrt(pfa * (1 - pfa) / n)


def test_change_mask_flags_a_changed_field():
    clean, layout = make_scene((256, 256), rng=41, return_layout=True)
    box = max(layout.homogeneous_boxes, key=lambda b: (b[2] - b[0]) * (b[3] - b[1]))
    changed = clean.copy()
    changed[box[0]:box[2], box[1]:box[3]] *= 10 ** (-6 / 10)  # a field 6 dB darker on date 2
    rng = np.random.default_rng(42)
    a = clean * rng.gamma(1.0, 1.0, clean.shape)
    b = changed * rng.gamma(1.0, 1.0, clean.shape)
    mask = change_mask(a, b, false_alarm=0.01)
    field = np.zeros(mask.shape, bool)
    field[box[0]:box[2], box[1]:box[3]] = True
    # 0.99 and 0.05 are project targets (a 6 dB change over a large field is far beyond the
    # F-test's threshold for a 7 x 7 window, 2.3 dB at 1 % for 1-look: scipy.stats.f).
    assert mask[field].mean() > 0.99  # the whole field, its border included (large flags grown)
    assert mask[~field].mean() < 0.05  # little else: edges and points are not taken for change
    # Without the effective number of pixels, heterogeneous unchanged ground is flagged
    # more (the pixel-count law assumes one reflectivity per window).
    plain = change_mask(a, b, false_alarm=0.01, effective_pixels=False)
    assert plain[~field].mean() > mask[~field].mean()


# ----------------------------------------------------------------------------- loss weights

def test_loss_weights_leave_pixels_out():
    rng = np.random.default_rng(3)
    pred = torch.from_numpy(rng.normal(size=(2, 1, 8, 8))).requires_grad_(True)
    target = torch.from_numpy(rng.normal(size=(2, 1, 8, 8)))
    weight = torch.ones(2, 1, 8, 8, dtype=torch.float64)
    weight[:, :, :, :3] = 0
    target[:, :, :, :3] = -80.0  # a zero target (log of tiny) where the weight is 0
    for fn in (log_mse, gamma_nll):
        value = fn(pred, target, weight)
        expected = fn(pred[..., 3:], target[..., 3:])  # hand-computed: the kept pixels alone
        assert value.item() == pytest.approx(expected.item(), rel=1e-12)
        pred.grad = None
        value.backward()
        assert torch.all(pred.grad[..., :3] == 0) and torch.all(torch.isfinite(pred.grad))
    batch = {"target": torch.exp(target), "valid": torch.ones_like(weight, dtype=torch.bool),
             "weight": weight, "looks": torch.ones(2)}
    with torch.no_grad():
        assert DespeckleLoss("gamma_nll", "noisy")(pred, batch).item() == pytest.approx(
            gamma_nll(pred[..., 3:], target[..., 3:]).item(), rel=1e-6)


# ----------------------------------------------------------------------------- date pairs

def _rows(path):
    with open(path, newline="") as f:
        return [r for r in csv.DictReader(f) if r.get("val_loss")]


def test_log_target_correction_uses_the_pairs_looks(tmp_path):
    # The mse_log target is the other date's log plus ln L - psi(L) for the target's looks
    # (docs/methods.md, section Log-domain bias): its mean is then ln R, which the uncorrected log misses by
    # psi(L) - ln L (scipy.special). A constant 2-look pair, R = 0.05.
    from despeck.training.losses import log_target

    R, L = 0.05, 2.0
    rng = np.random.default_rng(71)
    paths = [str(_write_tif(tmp_path / f"flat{k}.tif", R * rng.gamma(L, 1 / L, (128, 128)))) for k in (1, 2)]
    expected_bias = special.digamma(L) - math.log(L)
    for looks in (L, "auto"):
        config = _config(tmp_path / "out", pairs=[paths])
        config.speckle.looks = looks
        data = PairTrainingData(config)
        raw, corrected = [], []
        for i in range(32):  # patches overlap, so take few and a wide tolerance
            batch = {k: v[None] for k, v in data.train_set[(0, i)].items()}
            raw.append(torch.log(batch["target"]).mean().item() - math.log(R))
            corrected.append(log_target(batch, "mse_log", "noisy").mean().item() - math.log(R))
        assert np.mean(raw) == pytest.approx(expected_bias, abs=0.03)  # project tolerance (overlapping patches)
        if looks == L:
            assert abs(np.mean(corrected)) < 0.03
        else:  # estimated looks (estimate_looks): the correction follows the estimate
            estimates = data.sources[0].looks
            assert estimates == pytest.approx([L, L], rel=0.15)  # project tolerance of the looks estimate
            assert float(batch["looks"]) in [pytest.approx(v, rel=1e-6) for v in estimates]
            shift = np.mean(corrected) - np.mean(raw)
            assert shift == pytest.approx(math.log(estimates.mean()) - special.digamma(estimates.mean()), abs=0.02)


def test_pair_run_lowers_validation_loss(pair_run):
    config, result = pair_run
    rows = _rows(result.metrics_path)
    assert len(rows) == 4
    val = [float(r["val_loss"]) for r in rows]
    assert min(val[1:]) < val[0]
    # Against theory (scipy.special): with the noisy log target corrected by ln L - psi(L),
    # the input itself as estimate scores 2 psi1(L) + (psi(L) - ln L)^2 (two independent
    # log-speckles) and a perfect estimate psi1(L) (the target's own log variance).
    L = 1.0
    identity = 2 * special.polygamma(1, L) + (special.digamma(L) - math.log(L)) ** 2
    floor = special.polygamma(1, L)
    data = PairTrainingData(config)
    loss = DespeckleLoss("mse_log", "noisy")
    measured_identity = np.mean([float(loss(torch.log(it["noisy"][None]), {k: v[None] for k, v in it.items()}))
                                 for it in data.val_set.items])
    # 16 patches of 1024 pixels: about 1.3 % standard error; without the correction the
    # identity would score 2 psi1(L) = 3.29, 9 % lower.
    assert measured_identity == pytest.approx(identity, rel=0.05)
    assert 0.9 * floor < min(val) < measured_identity - 0.3  # 0.9 and 0.3: project margins
    # No clean reference: no PSNR/SSIM columns; ENL and mean ratio instead.
    assert not any(k.startswith(("val_psnr", "val_ssim")) for k in rows[0])
    best = rows[int(np.argmin(val))]
    assert float(best["val_enl"]) > 2.0  # 1-look input has ENL 1 (Oliver & Quegan 1998); 2: project floor
    assert abs(float(best["val_ratio_mean"]) - 1) < 0.15  # ratio mean ideally 1 (Gomez et al. 2017); 0.15: project tolerance


def test_pair_model_records_training_and_keeps_mean(pair_run, date_pair):
    _, result = pair_run
    model = load_model_file(result.model_path)
    training = model.metadata["training"]
    assert training["mode"] == "pairs" and model.looks == 1.0
    pair = training["data"]["pairs"][0]
    assert pair["files"] == [str(p) for p in date_pair] and pair["looks"] == [1.0, 1.0]
    # The looks were also estimated (despeck.speckle.estimate_looks): near 1 on 1-look data.
    assert all(abs(e - 1) < 0.15 for e in pair["looks_estimated"])  # project tolerance
    assert "target's looks" in model.metadata["normalisation"]["bias_correction"]
    # A constant 1-look area at an unseen calibration (R = 3e-3). Theory (scipy digamma):
    # the log-average of the input is psi(L) - ln L = -0.577 below ln R; the output's
    # arithmetic mean must be R.
    R, L = 3e-3, 1.0
    noisy = (R * np.random.default_rng(21).gamma(L, 1 / L, (1, 1, 320, 320))).astype(np.float32)
    log_bias = special.digamma(L) - math.log(L)
    assert np.log(noisy).mean() - math.log(R) == pytest.approx(log_bias, abs=0.02)
    with torch.no_grad():
        out = model(torch.from_numpy(noisy))[0, 0].double().numpy()
    h = model.receptive_field // 2
    core = out[h:-h, h:-h]
    # One independent sample per receptive-field square; 4 standard errors of the mean.
    tol = 4 * core.std() / core.mean() / math.sqrt(core.size / model.receptive_field ** 2)
    assert tol < abs(log_bias) / 4  # the check can tell a corrected from an uncorrected mean
    assert abs(math.log(core.mean() / R)) < tol
    assert enl_intensity(core) > 2.0  # project floor, above the input's ENL of 1


def test_pair_patches_swap_dates_and_skip_changed_pixels(tmp_path):
    clean, layout = make_scene((160, 160), rng=51, return_layout=True)
    box = max(layout.homogeneous_boxes, key=lambda b: (b[2] - b[0]) * (b[3] - b[1]))
    changed = clean.copy()
    changed[box[0]:box[2], box[1]:box[3]] *= 10.0  # +10 dB on date 2
    rng = np.random.default_rng(52)
    a = _write_tif(tmp_path / "a.tif", clean * rng.gamma(1.0, 1.0, clean.shape))
    b = _write_tif(tmp_path / "b.tif", changed * rng.gamma(1.0, 1.0, clean.shape))
    data = PairTrainingData(_config(tmp_path / "out", pairs=[[str(a), str(b)]]))
    src = data.sources[0]
    field = np.zeros(src.keep.shape, bool)
    field[box[0]:box[2], box[1]:box[3]] = True
    assert not src.keep[field].any()  # changed pixels never enter the loss
    dates = rasterio.open(a).read(1), rasterio.open(b).read(1)
    orders = set()
    for i in range(40):
        item = data.train_set[(0, i)]
        noisy = item["noisy"][0].numpy()
        # The input is one of the dates (up to the patch's flip/rotation), the target the other.
        orders.add(bool(np.isin(noisy.ravel()[:5], dates[0]).all()))
        assert not torch.equal(item["noisy"], item["target"])
        assert item["weight"].dtype == torch.float32 and float(item["weight"].mean()) >= 0.5
    assert orders == {True, False}  # swapped at random per patch
    again = data.train_set[(0, 7)]
    assert torch.equal(again["noisy"], data.train_set[(0, 7)]["noisy"])  # deterministic


# ----------------------------------------------------------------------------- sub-looks

def test_sublook_pairs_train_end_to_end(tmp_path):
    clean = make_scene((160, 128), rng=61)
    slc = simulate_correlated_slc(clean, rng=62, oversampling=1.25, taper="hamming")
    path = _write_tif(tmp_path / "scene_slc.tif", slc)
    config = _config(tmp_path / "out", slc=[str(path)], sublooks=2, split_axis="range",
                     slc_oversampling=1.25, slc_taper="hamming")
    config.budget.max_epochs = 2
    data = PairTrainingData(config)
    views = data.sources[0].views
    assert views.shape == (2, 160, 128)
    # Each sub-look keeps the scene's mean intensity (split_sublooks scales them so).
    full = (slc.real ** 2 + slc.imag ** 2).mean()
    assert views.reshape(2, -1).mean(1) == pytest.approx([full, full], rel=0.05)  # project tolerance
    result = train(config, progress=False)
    model = load_model_file(result.model_path)
    training = model.metadata["training"]
    assert training["mode"] == "sublooks"
    assert training["data"]["sublooks"]["split_axis"] == "range"
    assert training["data"]["slc"][0]["files"] == [str(path)]
    assert math.isfinite(result.best_metrics["val_ratio_mean"])
    # Three sub-looks: any two different ones make a pair.
    three = PairTrainingData(_config(tmp_path / "out3", slc=[str(path)], sublooks=3, split_axis="azimuth"))
    assert three.sources[0].views.shape[0] == 3
    assert all(not torch.equal(three.train_set[(0, i)]["noisy"], three.train_set[(0, i)]["target"])
               for i in range(5))


# ----------------------------------------------------------------------------- bad input

def test_bad_input_fails_before_training(tmp_path, date_pair):
    first, second = (str(p) for p in date_pair)
    out = tmp_path / "out"

    def run(**data):
        train(_config(out, **data), progress=False)

    def one_line(kind, match, **data):
        with pytest.raises(kind, match=match) as info:
            run(**data)
        assert "\n" not in str(info.value)

    small = _write_tif(tmp_path / "small.tif", np.ones((160, 192)))
    one_line(RasterError, r"small\.tif is not on the grid of .*date1\.tif \(192x160 pixels against 192x192\)",
             pairs=[[first, str(small)]])
    moved = _write_tif(tmp_path / "moved.tif", np.ones((192, 192)), transform=Affine(10.0, 0.0, 5030.0, 0.0, -10.0, 9000.0))
    one_line(RasterError, r"moved\.tif is not on the grid .*transform", pairs=[[first, str(moved)]])
    with pytest.raises(ConfigError, match=r"data\.pairs: pair 1 must be two files \[date1, date2\]"):
        _config(out, pairs=[[first]])
    with pytest.raises(ConfigError, match=r"data\.pairs: pair 2 must be two files"):
        _config(out, pairs=[[first, second], [first, second, first]])
    with pytest.raises(ConfigError, match=r"data\.pairs: pair 1 lists .* twice"):
        _config(out, pairs=[[first, first]])
    one_line(ConfigError, r"must name two files, not folders", pairs=[[str(tmp_path), second]])
    one_line(ConfigError, r"data\.pairs: .*nothing\.tif does not exist", pairs=[[first, str(tmp_path / "nothing.tif")]])
    with pytest.raises(ConfigError, match=r"data\.sublooks: must be at least 2"):
        _config(out, slc=[first], sublooks=1)
    # Complex requested on real data: as an SLC, or by declaring the units.
    one_line(ConfigError, r"data\.slc: .*date1\.tif holds real data", slc=[first])
    one_line(DespeckError, r"date1\.tif: units 'complex' requested but the file holds real data",
             pairs=[[first, second]], units="complex")
    with pytest.raises(ConfigError, match=r"loss\.target: data\.pairs give no clean reference"):
        config_from_dict({"data": {"pairs": [[first, second]]}})
    with pytest.raises(ConfigError, match=r"data\.synthetic_scenes: clean references cannot be mixed"):
        _config(out, pairs=[[first, second]], synthetic_scenes=2)
    with pytest.raises(ConfigError, match=r"speckle\.looks: auto .* needs data\.pairs or data\.slc"):
        config_from_dict({"data": {"synthetic_scenes": 1}, "speckle": {"looks": "auto"}})
    assert not (out / "metrics.csv").exists()  # nothing ever started


def test_shipped_pairs_config_points_at_the_sample_dates():
    config = load_config(PAIRS_CONFIG, ["budget.max_time=60s"])
    assert config.data.self_supervised and config.loss.target == "noisy"
    for path in config.data.pairs[0]:
        assert Path(path).is_file() and Path(path).name.startswith("oskarvel_date")


@pytest.mark.parametrize("oversampling,taper", [(1.3, "hamming"), (1.6, "kaiser")])
def test_change_test_holds_its_false_alarm_on_correlated_speckle(oversampling, taper):
    # An unchanged pair of correlated 1-look speckle: with the measured correlation the
    # window sums count independent samples (Siegert relation, Goodman 1985) and the
    # flagged share stays near the stated 1 % (a 3x margin: the F law is approximate for
    # a correlated sum; project tolerance). Without it, far more is flagged.
    from despeck.looks import measure_scene_correlation
    from despeck.speckle import simulate_correlated_intensity
    from despeck.change import change_mask

    R = np.full((384, 384), 0.05, np.float32)
    a = simulate_correlated_intensity(R, 1, rng=1, oversampling=oversampling, taper=taper)
    b = simulate_correlated_intensity(R, 1, rng=2, oversampling=oversampling, taper=taper)
    corr = measure_scene_correlation(a)
    naive = change_mask(a, b, false_alarm=0.01, grow=0).mean()
    fixed = change_mask(a, b, false_alarm=0.01, grow=0, correlation=(corr.rows, corr.cols)).mean()
    assert fixed < 0.03
    assert naive > 3 * fixed
