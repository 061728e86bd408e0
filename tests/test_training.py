"""Tests for despeck.training: config, patch data, losses, the trainer, resume, and `despeck train`."""

import csv
import math
import pickle
import shutil
from pathlib import Path

import lightning.pytorch as pl
import numpy as np
import pytest
import rasterio
import torch
import yaml
from affine import Affine
from scipy import ndimage, optimize, special, stats
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from despeck import metrics
from despeck.cli import main as cli_main
from despeck.errors import ConfigError, ModelFileError, RasterError
from despeck.models import create_model, load_model_file
from despeck.synthetic import make_scene
from despeck.training import apply_overrides, config_from_dict, dump_config, load_config, parse_duration, train
from despeck.training.config import config_to_dict
from despeck.training.data import TrainingData
from despeck.training.losses import DespeckleLoss, gamma_nll, log_mse, validation_fidelity
from despeck.training.module import DespeckleModule
from despeck.training.trainer import EpochTimeBudget, TrainingWarning

torch.set_num_threads(2)
TINY = Path(__file__).resolve().parents[1] / "configs" / "tiny.yaml"


def _write_tif(path, array, nodata=None):
    with rasterio.open(path, "w", driver="GTiff", height=array.shape[0], width=array.shape[1], count=1,
                       dtype="float32", nodata=nodata, transform=Affine(10.0, 0.0, 0.0, 0.0, -10.0, 0.0)) as dst:
        dst.write(array.astype(np.float32), 1)
    return path


@pytest.fixture(scope="module")
def references(tmp_path_factory):
    """Two small clean references: one with a nodata border (0), one shorter."""
    folder = tmp_path_factory.mktemp("refs")
    a = make_scene((96, 96), rng=11)
    a[:, :10] = 0.0
    _write_tif(folder / "a.tif", a, nodata=0.0)
    _write_tif(folder / "b.tif", make_scene((80, 96), rng=12)[:80])
    return folder


def _overrides(references, out):
    # The tiny config, on the two rasters, 4 epochs of 12 steps: the run the tests share.
    return [f"data.train=[{references}]", "data.synthetic_scenes=0", "data.patches_per_epoch=96",
            "budget.max_epochs=4", "budget.max_time=null", f"output.dir={out}"]


@pytest.fixture(scope="module")
def tiny_run(references, tmp_path_factory):
    """One uninterrupted tiny training run through the command line."""
    out = tmp_path_factory.mktemp("runs") / "full"
    args = ["train", "--config", str(TINY), "--quiet"]
    for o in _overrides(references, out):
        args += ["--set", o]
    assert cli_main(args) == 0
    return out


# ----------------------------------------------------------------------------- config

def test_config_rejects_unknown_keys_and_wrong_types():
    with pytest.raises(ConfigError, match=r"data\.patchsize is unknown; allowed keys in data: .*patch_size"):
        config_from_dict({"data": {"synthetic_scenes": 1, "patchsize": 3}})
    with pytest.raises(ConfigError, match="section 'trainning' is unknown; allowed sections: data"):
        config_from_dict({"trainning": {}})
    with pytest.raises(ConfigError, match=r"data\.batch_size: expected an integer, got 'big'"):
        config_from_dict({"data": {"synthetic_scenes": 1, "batch_size": "big"}})
    with pytest.raises(ConfigError, match=r"speckle\.looks: must be positive"):
        config_from_dict({"data": {"synthetic_scenes": 1}, "speckle": {"looks": 0}})
    with pytest.raises(ConfigError, match=r"speckle\.looks: range must be \[min, max\]"):
        config_from_dict({"data": {"synthetic_scenes": 1}, "speckle": {"looks": [4, 1]}})
    with pytest.raises(ConfigError, match=r"loss\.name: must be one of gamma_nll, mse_log"):
        config_from_dict({"data": {"synthetic_scenes": 1}, "loss": {"name": "l1"}})
    with pytest.raises(ConfigError, match=r"model\.name: unknown model 'bignet'"):
        config_from_dict({"data": {"synthetic_scenes": 1}, "model": {"name": "bignet"}})
    with pytest.raises(ConfigError, match="no training data"):
        config_from_dict({})


def test_config_values_are_read_as_before_and_ranges_name_the_key():
    # Integers take whole floats but no text or true/false; text takes numbers; one path is a list.
    cfg = config_from_dict({"data": {"synthetic_scenes": 1, "train": "a.tif", "batch_size": 8.0},
                            "trainer": {"precision": 32}, "model": None})
    assert cfg.data.train == ["a.tif"] and cfg.data.batch_size == 8 and isinstance(cfg.data.batch_size, int)
    assert cfg.trainer.precision == "32" and cfg.model.name == "logcnn-s"
    for values, match in [
        ({"batch_size": True}, r"data\.batch_size: expected an integer, got True"),
        ({"batch_size": "16"}, r"data\.batch_size: expected an integer, got '16'"),
        ({"augment": "yes"}, r"data\.augment: expected true/false, got 'yes'"),
        ({"val_fraction": "nan"}, r"data\.val_fraction: expected a number, got 'nan'"),
        ({"val_fraction": 1}, r"data\.val_fraction: must be between 0 and 1 \(exclusive\), got 1$"),
        ({"patch_size": 4}, r"data\.patch_size: must be at least 8 pixels, got 4$"),
        ({"change_window": 4}, r"data\.change_window: must be an odd number of pixels >= 3, got 4$"),
        ({"units": "dn"}, r"data\.units: must be one of intensity, amplitude, db, complex \(or null to detect\), got 'dn'"),
    ]:
        with pytest.raises(ConfigError, match=match) as info:
            config_from_dict({"data": {"synthetic_scenes": 1, **values}})
        assert "\n" not in str(info.value)
    with pytest.raises(ConfigError, match=r"trainer\.threads: must be a positive integer or null \(all usable cores\)"):
        config_from_dict({"data": {"synthetic_scenes": 1}, "trainer": {"threads": 0}})
    with pytest.raises(ConfigError, match=r"config section data: expected a mapping of keys, got 5"):
        config_from_dict({"data": 5})
    # Sections stay mutable (no re-validation on assignment) and dump to plain mappings.
    cfg.optim.lr = 0.5
    dumped = config_to_dict(cfg)
    assert dumped["optim"]["lr"] == 0.5 and dumped["data"]["train"] == ["a.tif"]
    assert config_from_dict(dumped) == cfg

def test_durations_and_overrides():
    assert parse_duration("8h") == 8 * 3600 and parse_duration("90s") == 90
    assert parse_duration("1h30m") == 5400 and parse_duration(45) == 45
    with pytest.raises(ConfigError, match="budget.max_time: cannot read duration '8 hours'"):
        config_from_dict({"data": {"synthetic_scenes": 1}, "budget": {"max_time": "8 hours"}})
    values = apply_overrides({"speckle": {"looks": 1}}, ["speckle.looks=[1, 4]", "budget.max_time=2h"])
    assert values == {"speckle": {"looks": [1, 4]}, "budget": {"max_time": "2h"}}
    with pytest.raises(ConfigError, match="section.key"):
        apply_overrides({}, ["looks=3"])


def test_resolved_config_round_trips(tmp_path):
    config = load_config(TINY, ["speckle.looks=[1,4]"])
    saved = tmp_path / "config.yaml"
    saved.write_text(dump_config(config))
    assert load_config(saved) == config


# ----------------------------------------------------------------------------- data

def test_patches_skip_nodata_fixed_epoch_and_deterministic(references):
    config = load_config(TINY, [f"data.train=[{references}]", "data.synthetic_scenes=0",
                                "data.patches_per_epoch=40", "speckle.looks=4"])
    data = TrainingData(config)
    assert len(data.train_set) == 40  # fixed, whatever the number of files
    items = [data.train_set[(1, i)] for i in range(40)]
    assert all(bool(it["valid"].all()) for it in items)  # min_valid_fraction 1: no nodata drawn
    again = data.train_set[(1, 7)]
    assert torch.equal(again["noisy"], items[7]["noisy"])  # same (epoch, index), same sample
    assert not torch.equal(data.train_set[(2, 7)]["noisy"], items[7]["noisy"])
    # Speckle is Gamma(L, 1/L): mean 1, variance 1/L (scipy.stats.gamma; Oliver & Quegan 1998,
    # Understanding Synthetic Aperture Radar Images).
    ratio = torch.cat([(it["noisy"] / it["clean"]).flatten() for it in items]).double().numpy()
    theory = stats.gamma(a=4, scale=1 / 4)
    se = math.sqrt(theory.var() / ratio.size)
    assert abs(ratio.mean() - theory.mean()) < 5 * se
    assert ratio.var() == pytest.approx(theory.var(), rel=0.05)
    # Validation comes from the bottom strip of each raster, never from training rows.
    for ref in data.references:
        train_rows = np.flatnonzero(ref.train.allowed.any(axis=1))
        val_rows = np.flatnonzero(ref.val.allowed.any(axis=1))
        assert train_rows.max() + config.data.patch_size <= val_rows.min()


def test_looks_range_is_drawn_per_patch(references):
    config = load_config(TINY, [f"data.train=[{references}]", "data.synthetic_scenes=0", "speckle.looks=[1, 4]"])
    looks = np.array([TrainingData(config).train_set[(0, i)]["looks"].item() for i in range(30)])
    assert looks.min() >= 1 and looks.max() <= 4 and looks.std() > 0.3


def test_validation_psnr_and_ssim_are_the_benchmarks_measures(references, monkeypatch):
    # Training logs and benchmark reports use one measure: despeck.metrics.fidelity_db on
    # dB images clipped to the validation references' 1st-99.9th percentiles (numpy's
    # percentile below), equal to scikit-image's peak_signal_noise_ratio/structural_similarity
    # (van der Walt et al. 2014) on those clipped images where every pixel is valid.
    config = load_config(TINY, [f"data.train=[{references}]", "data.synthetic_scenes=0", "data.val_patches=6"])
    val = TrainingData(config).val_set
    low, high = val.db_range
    pooled = np.concatenate([it["clean"][it["valid"]].numpy() for it in val.items]).astype(np.float64)
    assert (low, high) == pytest.approx(tuple(np.percentile(10 * np.log10(pooled), [1.0, 99.9])), abs=1e-9)
    clean = torch.stack([it["clean"] for it in val.items])
    valid = torch.stack([it["valid"] for it in val.items])
    estimate = torch.from_numpy(ndimage.uniform_filter(torch.stack([it["noisy"] for it in val.items]).numpy(),
                                                       size=(1, 1, 5, 5)))
    expected = []
    for c, e, v in zip(clean[:, 0].numpy(), estimate[:, 0].numpy(), valid[:, 0].numpy()):
        psnr, ssim = validation_fidelity(c, e, v, val.db_range)
        fd = metrics.fidelity(c, e, v, db_range=val.db_range)
        assert (psnr, ssim) == (fd["psnr_db"], fd["ssim_db"])
        assert v.all()  # tiny config: min_valid_fraction 1
        rd, ed = _db_clipped(c, val.db_range), _db_clipped(e, val.db_range)
        assert psnr == pytest.approx(peak_signal_noise_ratio(rd, ed, data_range=high - low), abs=1e-9)
        assert ssim == pytest.approx(structural_similarity(rd, ed, data_range=high - low), abs=1e-9)
        expected.append(psnr)
    # With nodata in a patch, only the valid pixels count (scikit-image on those pixels).
    v = valid[0, 0].numpy().copy()
    v[:, :5] = False
    masked = validation_fidelity(clean[0, 0].numpy(), estimate[0, 0].numpy(), v, val.db_range)[0]
    assert masked == pytest.approx(peak_signal_noise_ratio(_db_clipped(clean[0, 0], val.db_range)[v],
                                                           _db_clipped(estimate[0, 0], val.db_range)[v],
                                                           data_range=high - low), abs=1e-9)
    # The logged columns: val_psnr_db averages the patches' measures; the noisy input's own
    # PSNR is measured the same way.
    module = DespeckleModule(create_model(config.model.name), looks=1.0, log_scale=config.model.log_scale,
                             loss=config.loss, optim=config.optim, validation=val)
    monkeypatch.setattr(module, "log", lambda *args, **kwargs: None)  # no trainer to log to
    module.on_validation_epoch_start()
    module._val_batches.append((clean, estimate, valid))
    module.on_validation_epoch_end()
    assert module.val_metrics["val_psnr_db"] == pytest.approx(np.mean(expected), rel=1e-12)
    noisy = [metrics.fidelity(it["clean"][0].numpy(), it["noisy"][0].numpy(), it["valid"][0].numpy(),
                              db_range=val.db_range)["psnr_db"] for it in val.items]
    assert module.val_metrics["val_psnr_noisy_db"] == pytest.approx(np.mean(noisy), rel=1e-12)


def _db_clipped(intensity, db_range):
    """``10 log10`` image clipped to ``db_range``, as the benchmarks compare images."""
    return np.clip(10 * np.log10(np.asarray(intensity, dtype=np.float64)), *db_range)


def test_bad_inputs_fail_before_training(tmp_path, references):
    def run(*overrides, resume=False):
        cfg = load_config(TINY, [f"output.dir={tmp_path / 'out'}", "data.synthetic_scenes=0", *overrides])
        train(cfg, resume=resume, progress=False)

    (tmp_path / "empty").mkdir()
    with pytest.raises(ConfigError, match="holds no raster files") as info:
        run(f"data.train=[{tmp_path / 'empty'}]")
    assert "\n" not in str(info.value)
    with pytest.raises(ConfigError, match="does not exist"):
        run(f"data.train=[{tmp_path / 'nothing.tif'}]")
    with pytest.raises(ConfigError, match="no files match"):
        run(f"data.train=[{tmp_path / '*.tif'}]")
    with pytest.raises(ConfigError, match=r"data\.patch_size: 128 is larger than raster .*b\.tif"):
        run(f"data.train=[{references / 'b.tif'}]", "data.patch_size=128")
    holes = make_scene((96, 96), rng=3)
    holes[::20, :] = np.nan  # a nodata row every 20 rows: no fully valid 32x32 patch
    _write_tif(tmp_path / "holes.tif", holes)
    with pytest.raises(RasterError, match="no 32x32 training patch with at least 100% valid pixels"):
        run(f"data.train=[{tmp_path / 'holes.tif'}]")
    _write_tif(tmp_path / "blank.tif", np.zeros((64, 64)), nodata=0.0)
    with pytest.raises(RasterError, match="blank.tif"):
        run(f"data.train=[{tmp_path / 'blank.tif'}]")
    (tmp_path / "plain_file").write_text("x")
    with pytest.raises(ConfigError, match="output.dir: cannot write"):
        train(load_config(TINY, [f"output.dir={tmp_path / 'plain_file' / 'sub'}"]), progress=False)
    # Resuming where nothing was started starts afresh (saying so); the bad input is still refused.
    with pytest.warns(TrainingWarning, match="nothing to resume"), \
            pytest.raises(ConfigError, match="holds no raster files"):
        run(f"data.train=[{tmp_path / 'empty'}]", resume=True)
    assert not (tmp_path / "out" / "metrics.csv").exists()  # nothing ever started


def test_bad_checkpoints_are_refused_without_running_code(tmp_path):
    out = tmp_path / "out"
    (out / "checkpoints").mkdir(parents=True)
    last = out / "checkpoints" / "last.ckpt"
    cfg = load_config(TINY, [f"output.dir={out}"])
    last.write_bytes(b"not a checkpoint at all")
    with pytest.raises(ModelFileError, match="last.ckpt is corrupt"):
        train(cfg, resume=True, progress=False)
    torch.save({"state_dict": {}, "epoch": 3}, last)  # a plain but foreign checkpoint
    with pytest.raises(ModelFileError, match="not written by despeck train"):
        train(cfg, resume=True, progress=False)
    marker = tmp_path / "executed"

    class Boom:
        def __reduce__(self):
            return (open, (str(marker), "w"))

    last.write_bytes(pickle.dumps({"despeck": Boom()}))
    with pytest.raises(ModelFileError, match="last.ckpt"):
        train(cfg, resume=True, progress=False)
    assert not marker.exists()


def test_bf16_refused_where_unsupported(tmp_path, monkeypatch):
    import despeck.training.trainer as trainer_module

    monkeypatch.setattr(trainer_module, "bf16_supported", lambda: False)
    with pytest.raises(ConfigError, match="trainer.precision: bf16 needs"):
        train(load_config(TINY, [f"output.dir={tmp_path}", "trainer.precision=bf16"]), progress=False)


# ----------------------------------------------------------------------------- losses

def test_loss_minimisers_and_bias_correction():
    # Homogeneous area, R = 0.02, L = 2. Each loss is minimised over a constant estimate y.
    rng = np.random.default_rng(5)
    R, L, n = 0.02, 2.0, 200_000
    noisy = R * rng.gamma(L, 1 / L, n)
    t_noisy = torch.from_numpy(np.log(noisy))
    batch = {"target": torch.from_numpy(noisy).reshape(1, 1, 1, n), "looks": torch.tensor([L]),
             "valid": torch.ones(1, 1, 1, n, dtype=torch.bool)}

    def argmin(f):
        return optimize.minimize_scalar(lambda y: float(f(torch.tensor(y, dtype=torch.float64))),
                                        bounds=(-10, 0), method="bounded", options={"xatol": 1e-8}).x

    # Gamma NLL y + I exp(-y) is minimised at y = ln E[I] (derivative 1 - E[I] e^-y = 0;
    # docs/methods.md, section Log-domain bias): no correction.
    y_nll = argmin(lambda y: gamma_nll(y, t_noisy))
    assert y_nll == pytest.approx(math.log(noisy.mean()), abs=1e-6)
    # Log-MSE on noisy targets: minimiser mean(ln I) = ln R + psi(L) - ln L (scipy digamma) ...
    y_mse = argmin(lambda y: log_mse(y, t_noisy))
    se = math.sqrt(special.polygamma(1, L) / n)
    assert abs(y_mse - (math.log(R) + special.digamma(L) - math.log(L))) < 5 * se
    # ... so DespeckleLoss adds ln L - psi(L) to the noisy target, putting the minimiser at ln R.
    loss = DespeckleLoss("mse_log", "noisy")
    y_fixed = argmin(lambda y: loss(y.expand(1, 1, 1, n), batch))
    assert abs(y_fixed - math.log(R)) < 5 * se


def test_looks_balance_weighs_each_sample_by_its_log_speckle_variance():
    # Variance of ln of L-look Gamma speckle is the trigamma psi_1(L) (Xie, Pierce, Ulaby
    # 2002, Statistical properties of logarithmically transformed speckle, IEEE TGRS
    # 40(3)); scipy.special.polygamma(1, L) is the outside value. With looks_balance g each
    # sample's pixels weigh psi_1(L) ** -g; the weighted mean is taken over valid pixels.
    rng = np.random.default_rng(7)
    looks = np.array([1.0, 2.5, 4.4, 16.0])
    pred = torch.from_numpy(rng.normal(size=(4, 1, 8, 8)).astype(np.float32))
    target = torch.from_numpy(np.exp(rng.normal(size=(4, 1, 8, 8))).astype(np.float32))
    valid = torch.from_numpy(rng.random((4, 1, 8, 8)) > 0.2)
    batch = {"target": target, "valid": valid, "looks": torch.tensor(looks, dtype=torch.float32)}
    err = ((pred.numpy() - np.log(target.numpy())) ** 2) * valid.numpy()
    for g in (0.0, 0.7, 1.0):
        w = special.polygamma(1, looks) ** -g
        counts = valid.numpy().reshape(4, -1).sum(1)
        expected = (w * err.reshape(4, -1).sum(1)).sum() / (w * counts).sum()
        got = DespeckleLoss("mse_log", "clean", looks_balance=g)(pred, batch).item()
        assert got == pytest.approx(expected, rel=1e-5)
    with pytest.raises(Exception, match="looks_balance"):
        DespeckleLoss("mse_log", "clean", looks_balance=1.5)
    with pytest.raises(ConfigError, match="loss.looks_balance"):
        config_from_dict({"loss": {"looks_balance": -0.1}})


def test_time_budget_stops_at_epoch_boundary(monkeypatch):
    clock = {"t": 0.0}
    monkeypatch.setattr("despeck.training.trainer.time.monotonic", lambda: clock["t"])

    class Trainer:
        should_stop = False

    budget, trainer = EpochTimeBudget(100.0), Trainer()
    budget.on_train_start(trainer, None)
    for epoch in range(3):  # epochs of 30 s: after the third (90 s) a fourth would not fit
        budget.on_train_epoch_start(trainer, None)
        clock["t"] += 30.0
        budget.on_train_batch_end(trainer, None, None, None, 0)
        budget.on_train_epoch_end(trainer, None)
        assert trainer.should_stop == (epoch == 2)
    # The time used travels in the checkpoint: a resumed run continues the same budget.
    resumed = EpochTimeBudget(100.0)
    resumed.load_state_dict(budget.state_dict())
    assert resumed.elapsed() == pytest.approx(90.0) and resumed.longest_epoch == pytest.approx(30.0)


# ----------------------------------------------------------------------------- training runs

def _epoch_rows(path):
    with open(path, newline="") as f:
        return [r for r in csv.DictReader(f) if r.get("val_loss")]


def test_tiny_run_learns_and_writes_everything(tiny_run):
    rows = _epoch_rows(tiny_run / "metrics.csv")
    assert len(rows) == 4
    val = [float(r["val_loss"]) for r in rows]
    assert min(val[1:]) < val[0]  # validation loss goes down
    best = rows[int(np.argmin(val))]
    # Beats the noisy input's PSNR (dB domain, same fixed data range; skimage.metrics).
    assert float(best["val_psnr_db"]) > float(best["val_psnr_noisy_db"]) + 1.0
    assert {"val_ssim_db", "val_enl", "val_bias_db", "train_loss_epoch"} <= set(rows[0])
    saved = yaml.safe_load((tiny_run / "config.yaml").read_text())
    assert saved["budget"]["max_epochs"] == 4 and saved["model"]["name"] == "logcnn-xs"
    model = load_model_file(tiny_run / "model.safetensors")
    assert model.looks == 1.0 and model.metadata["training"]["steps"] == 48
    assert model.metadata["normalisation"]["loss"] == "mse_log"
    assert model.metadata["metrics"]["val_psnr_db"] == pytest.approx(float(best["val_psnr_db"]), rel=1e-5)
    assert (tiny_run / "checkpoints" / "last.ckpt").is_file() and (tiny_run / "checkpoints" / "best.ckpt").is_file()


def test_trained_model_keeps_mean_on_constant_scene(tiny_run):
    # A constant 1-look scene at a calibration the model never saw (R = 3e-3).
    # Theory (docs/methods.md, section Speckle statistics; scipy digamma): the mean log of L-look speckle is
    # psi(L) - ln L = -0.577 at L = 1, i.e. the log-average of the input is 2.5 dB low.
    model = load_model_file(tiny_run / "model.safetensors")
    # The network's own bias correction is checked here; the point-target guard (which
    # passes a few speckle peaks through, +0.004 dB) is checked with the starter model.
    model.point_false_alarm = None
    R, L = 3e-3, 1.0
    rng = np.random.default_rng(21)
    noisy = (R * rng.gamma(L, 1 / L, (1, 1, 200, 200))).astype(np.float32)
    log_bias = special.digamma(L) - math.log(L)
    assert np.log(noisy).mean() - math.log(R) == pytest.approx(log_bias, abs=0.02)
    with torch.no_grad():
        out = model(torch.from_numpy(noisy))[0, 0].double().numpy()
    h = model.receptive_field // 2
    core = out[h:-h, h:-h]
    # Tolerance: outputs closer than a receptive field are correlated, so count one
    # independent sample per receptive-field square; 4 standard errors of the mean.
    m_eff = core.size / model.receptive_field ** 2
    tol = 4 * core.std() / core.mean() / math.sqrt(m_eff)
    assert tol < abs(log_bias) / 4  # the check can tell a corrected from an uncorrected mean
    assert abs(math.log(core.mean() / R)) < tol


class _Kill(Exception):
    pass


class _KillAtStep(pl.Callback):
    """Stands in for a kill: the process dies mid-epoch, after the last checkpoint."""

    def __init__(self, step):
        self.step = step

    def on_train_batch_end(self, trainer, *args):
        if trainer.global_step == self.step:
            raise _Kill()


def test_killed_run_resumes_to_the_same_result(tiny_run, references, tmp_path):
    out = tmp_path / "killed"
    config = load_config(TINY, _overrides(references, out))
    with pytest.raises(_Kill):
        train(config, progress=False, callbacks=[_KillAtStep(30)])  # mid third epoch (12 steps each)
    assert not (out / "model.safetensors").exists()
    killed_at = torch.load(out / "checkpoints" / "last.ckpt", weights_only=True)["global_step"]
    assert killed_at == 24  # the last end-of-epoch checkpoint before the kill
    result = train(config, resume=True, progress=False)
    assert result.steps == 48
    full = load_model_file(tiny_run / "model.safetensors").network.state_dict()
    resumed = load_model_file(result.model_path).network.state_dict()
    for key in full:
        torch.testing.assert_close(resumed[key], full[key], rtol=1e-5, atol=1e-6)
    a, b = _epoch_rows(tiny_run / "metrics.csv"), _epoch_rows(out / "metrics.csv")
    assert [r["step"] for r in a] == [r["step"] for r in b]  # rows after the kill were not kept twice
    assert [float(r["val_loss"]) for r in b] == pytest.approx([float(r["val_loss"]) for r in a], rel=1e-5)
    # Starting again without --resume would mix two runs, resuming with other settings
    # would not reproduce one: both refused.
    with pytest.raises(ConfigError, match="already holds a training run"):
        train(config, progress=False)
    changed = load_config(TINY, _overrides(references, out) + ["loss.name=gamma_nll"])
    with pytest.raises(ConfigError, match="loss.name: 'gamma_nll' differs from 'mse_log'"):
        train(changed, resume=True, progress=False)
    shutil.rmtree(out)


def test_validation_seed_fixes_the_validation_patches_across_training_seeds():
    # data.val_seed: runs with different trainer.seed on the same reference files
    # validate on the same patches and speckle (comparable measures); null keeps
    # following trainer.seed.
    from despeck.training.data import ValidationSet
    from despeck.training.references import make_reference

    rng = np.random.default_rng(0)
    clean = rng.uniform(0.2, 2.0, (160, 96)).astype(np.float32)
    ref = make_reference("ref", clean, np.ones(clean.shape, bool), 32, 1.0, 48, "train")

    def patches(*overrides):
        cfg = load_config(TINY, list(overrides))  # the references are given: its procedural scenes are not made
        return [it["noisy"].numpy() for it in ValidationSet([ref], cfg).items]

    a = patches("trainer.seed=1", "data.val_seed=7")
    b = patches("trainer.seed=2", "data.val_seed=7")
    assert all(np.array_equal(x, y) for x, y in zip(a, b))
    c, d = patches("trainer.seed=1"), patches("trainer.seed=2")
    assert not all(np.array_equal(x, y) for x, y in zip(c, d))
    assert all(np.array_equal(x, y) for x, y in zip(c, patches("trainer.seed=1", "data.val_seed=1")))
    with pytest.raises(ConfigError, match="data.val_seed"):
        load_config(TINY, ["data.val_seed=-1"])
