"""Tiled, streamed inference: arrays, files and the ``despeck apply`` command.

Outside references: whole-scene inference on the reflection-padded scene
(``numpy.pad(mode="reflect")``) is the ground truth tiling must reproduce; the
Mann-Whitney U test (Mann, H. B., Whitney, D. R. (1947), Ann. Math. Statist. 18(1),
50-60, via ``scipy.stats.mannwhitneyu``) checks for a pattern at tile boundaries;
rasterio reads the written GeoTIFFs back. Keeping georeferencing, nodata and an
input untouched is common practice for raster tools.
"""

import os
import signal
import subprocess
import sys
import time
import warnings

import numpy as np
import pytest
import rasterio
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from affine import Affine
from scipy import stats
from torch import nn

from despeck.cli import main
from despeck.errors import InputError, RasterError
from despeck.inference import InferenceWarning, bf16_supported, despeckle_array, despeckle_file, resolve_tiling
from despeck.inference.blend import read_plan, stream_tiles
from despeck.models import Despeckler, create_model, save_model_file
from despeck.tiling import TileGrid

torch.set_num_threads(1)  # one thread: no OpenMP barriers to wait at on a busy machine


class IdentityNet(nn.Module):
    """Returns its input; claims a receptive field so the tiler keeps margins."""

    def __init__(self, receptive_field=1):
        super().__init__()
        self.receptive_field = receptive_field

    def forward(self, z):
        return z


def _conv_model(seed=0):
    torch.manual_seed(seed)
    net = create_model("logcnn-xs")
    with torch.no_grad():  # a clearly non-identity network
        net.body[-1].weight.mul_(10)
    return Despeckler(net, looks=1).eval()


def _unet_model(seed=0):
    torch.manual_seed(seed)
    net = create_model("unet-xs")
    with torch.no_grad():
        net.head.weight.mul_(10)
    return Despeckler(net, looks=1).eval()


def _whole_scene(model, x, valid=None):
    """Reference: the model applied once to the scene padded by reflection."""
    m = model.receptive_field // 2 + 8
    xp = np.pad(x, m, mode="reflect")
    vp = None if valid is None else torch.from_numpy(np.pad(valid, m, mode="reflect"))[None, None]
    ok = np.isfinite(x) & (x > 0) if valid is None else valid
    off = model.scene_log_offset(x[ok])
    with torch.inference_mode():
        out = model(torch.from_numpy(xp)[None, None], valid=vp, log_offset=off)[0, 0].numpy()
    return out[m:-m, m:-m]


def _scene(rng, shape, looks=1):
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    clean = 1.0 + 0.8 * np.sin(xx / 9.0) * np.cos(yy / 13.0) + (xx > shape[1] // 2)
    return (clean * rng.gamma(looks, 1 / looks, shape)).astype(np.float32)


# ----------------------------------------------------------------------------- arrays

@pytest.mark.parametrize("tile, overlap, batch_size", [(None, None, None), (40, 12, 1), (41, 20, 3), (64, 30, 16)])
def test_conv_model_tiled_equals_whole_scene(rng, tile, overlap, batch_size):
    model = _conv_model()
    x = _scene(rng, (150, 133))
    ref = _whole_scene(model, x)
    got = despeckle_array(x, model, tile=tile, overlap=overlap, batch_size=batch_size, threads=1, progress=False)
    assert got.dtype == np.float32 and got.shape == x.shape
    np.testing.assert_allclose(got, ref, rtol=2e-5, atol=0)
    # The network does something: the check above is not identity against identity.
    assert np.mean(np.abs(np.log(ref) - np.log(x))) > 0.1


def test_conv_model_with_nodata_holes(rng):
    model = _conv_model(1)
    x = _scene(rng, (120, 90))
    valid = np.ones(x.shape, bool)
    valid[30:50, 10:70] = False
    x[30:40, 10:70] = np.nan
    ref = _whole_scene(model, np.where(valid, x, 0).astype(np.float32), valid)
    got = despeckle_array(x, model, valid=valid, tile=48, overlap=16, threads=1, progress=False)
    np.testing.assert_allclose(got[valid], ref[valid], rtol=2e-5)
    # Invalid pixels keep their input value (NaN stays NaN, masked values unchanged).
    np.testing.assert_array_equal(got[~valid], x[~valid])
    assert np.all(np.isfinite(got[valid]))


def _boundary_positions(axis):
    mask = np.zeros(axis.length, bool)
    for k in range(1, axis.count):
        lo = k * axis.stride
        mask[max(0, lo - 2) : min(axis.length, lo + axis.blend + 2)] = True
    return mask


# Differences of log intensity below this are float32 rounding (about 4e-5 dB).
_FLOAT_NOISE = 1e-5


def _boundary_pattern(diff, grid):
    """True if |diff| (log intensity) is larger at tile-boundary rows/columns than elsewhere.

    A pattern is declared when, for the row or the column profile of mean |diff|, the
    boundary positions' mean exceeds the others' by more than 25 % and by more than
    float32 rounding, and a one-sided Mann-Whitney U test (scipy) gives p < 0.001.
    """
    for profile, axis in ((diff.mean(axis=0), grid.cols), (diff.mean(axis=1), grid.rows)):
        b = _boundary_positions(axis)
        p = stats.mannwhitneyu(profile[b], profile[~b], alternative="greater").pvalue
        excess = profile[b].mean() - profile[~b].mean()
        if excess > 0.25 * profile[~b].mean() and excess > _FLOAT_NOISE and p < 1e-3:
            return True
    return False


def test_unet_tiled_close_to_whole_scene_without_seams(rng):
    model = _unet_model()
    x = _scene(rng, (256, 256))
    ref = _whole_scene(model, x)
    effect = np.mean(np.abs(np.log(ref) - np.log(x)))
    # An odd tile and overlap are rounded so every tile keeps the U-Net's pooling grid.
    grid = resolve_tiling(x.shape, model, tile=49, overlap=27)
    assert grid.tile_shape == (48, 48) and grid.overlap == 28 and len(grid) > 25
    got = despeckle_array(x, model, tile=49, overlap=27, threads=1, progress=False)
    diff = np.abs(np.log(got.astype(np.float64)) - np.log(ref))
    assert diff.max() < 10 * _FLOAT_NOISE < 1e-3 * effect  # float rounding only
    assert not _boundary_pattern(diff, grid)

    # Negative control: an overlap below the receptive field leaves seams that the same
    # check detects, so the check above can fail.
    with pytest.warns(InferenceWarning, match="smaller than the model's receptive field"):
        short = resolve_tiling(x.shape, model, tile=64, overlap=16)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InferenceWarning)
        seamy = despeckle_array(x, model, tile=64, overlap=16, threads=1, progress=False)
    seam_diff = np.abs(np.log(seamy.astype(np.float64)) - np.log(ref))
    assert seam_diff.mean() < 0.1 * effect  # still close overall
    assert _boundary_pattern(seam_diff, short)


def test_half_resolution_unet_tiled_matches_whole_scene(rng):
    # The folded (pixel-unshuffle) U-Net pools on a grid of 2 * 2 ** levels pixels: tile
    # origins must follow it, or tiles see the scene's 2 x 2 blocks shifted and the
    # result differs from whole-scene inference by far more than rounding.
    torch.manual_seed(0)
    net = create_model("unet-cond-h", widths=[8, 16])
    with torch.no_grad():
        net.head.weight.mul_(10)
    model = Despeckler(net, looks=[1, 16]).eval()
    assert model.size_multiple == 4 and net.receptive_field % 2 == 1
    x = _scene(rng, (203, 190))  # sides not multiples of the grid
    cond = (1.0, (0.0, 0.0))
    m = model.receptive_field // 2 + 8
    xp = np.pad(x, m, mode="reflect")
    with torch.inference_mode():
        ref = model(torch.from_numpy(xp)[None, None], log_offset=model.scene_log_offset(x), looks=cond[0],
                    correlation=cond[1])[0, 0].numpy()[m:-m, m:-m]
    effect = np.mean(np.abs(np.log(ref) - np.log(x)))
    got = despeckle_array(x, model, tile=61, overlap=41, threads=1, progress=False, condition=cond)
    grid = resolve_tiling(x.shape, model, tile=61, overlap=41)
    assert grid.tile_shape[0] % 4 == 0 and len(grid) > 9
    diff = np.abs(np.log(got.astype(np.float64)) - np.log(ref))
    assert diff.max() < 10 * _FLOAT_NOISE < 1e-3 * effect  # float rounding only
    assert not _boundary_pattern(diff, grid)
    # Negative control: the whole scene seen on a grid shifted by one pixel differs by
    # far more than rounding, so the check above can fail.
    xs = np.pad(x, m + 1, mode="reflect")
    with torch.inference_mode():
        shifted = model(torch.from_numpy(xs)[None, None], log_offset=model.scene_log_offset(x), looks=cond[0],
                        correlation=cond[1])[0, 0].numpy()[m + 1:-m - 1, m + 1:-m - 1]
    assert np.abs(np.log(shifted.astype(np.float64)) - np.log(ref)).max() > 1000 * _FLOAT_NOISE


@given(
    rf=st.sampled_from([1, 3, 5, 9]),
    rows=st.integers(1, 60),
    cols=st.integers(1, 60),
    tile=st.integers(9, 48),
    overlap_frac=st.floats(0, 0.95),
    holes=st.booleans(),
    seed=st.integers(0, 2**31 - 1),
)
@settings(max_examples=40, deadline=None)
def test_identity_model_reproduces_scene(rf, rows, cols, tile, overlap_frac, holes, seed):
    model = Despeckler(IdentityNet(rf), looks=1)
    r = np.random.default_rng(seed)
    x = r.gamma(1.0, 1.0, (rows, cols)).astype(np.float32) + np.float32(1e-3)
    valid = (r.random(x.shape) > 0.2) if holes else None
    if valid is not None:
        valid.flat[0] = True
    overlap = int(overlap_frac * (tile - 1))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InferenceWarning)
        got = despeckle_array(x, model, valid=valid, tile=tile, overlap=overlap, threads=1, progress=False)
    # exp(log(x)) round trip in float32: a few ulps.
    np.testing.assert_allclose(got, x, rtol=1e-5, atol=0)


def test_speed_options_give_the_same_result(rng, monkeypatch):
    model = _conv_model(2)
    x = _scene(rng, (160, 160))
    base = despeckle_array(x, model, tile=48, overlap=16, threads=1, channels_last=False, progress=False)
    monkeypatch.setattr("despeck.inference.runner.TRIAL_MIN_PIXELS", 0)
    for cl in (True, None):  # None: both formats timed on a crop of the first tile, the faster kept
        got = despeckle_array(x, model, tile=48, overlap=16, batch_size=2, threads=1, channels_last=cl,
                              progress=False)
        np.testing.assert_allclose(got, base, rtol=1e-5)
    assert next(model.parameters()).is_contiguous()  # memory format restored
    monkeypatch.setattr("despeck.inference.runner.bf16_supported", lambda: False)
    with pytest.warns(InferenceWarning, match="no native bfloat16"):
        fallback = despeckle_array(x, model, tile=48, overlap=16, bf16=True, progress=False)
    np.testing.assert_allclose(fallback, base, rtol=1e-5)


@pytest.mark.skipif(not bf16_supported(), reason="this CPU has no native bfloat16 (AVX512-BF16/AMX-BF16); "
                    "the bf16 path was not run")
def test_bf16_stays_close_to_float32(rng):
    model = _conv_model(2)
    x = _scene(rng, (160, 160))
    base = despeckle_array(x, model, tile=48, overlap=16, threads=1, progress=False)
    with pytest.warns(InferenceWarning, match="without a bias calibration in bfloat16"):
        half = despeckle_array(x, model, tile=48, overlap=16, bf16=True, threads=1, progress=False)
    rel = np.abs(np.log(half) - np.log(base))
    # bfloat16 keeps 8 significant bits: relative rounding steps of 2^-8 ~ 0.4 % (common practice)
    assert 0 < rel.mean() < 0.02


def test_precision_is_automatic_only_for_models_calibrated_in_bf16(monkeypatch):
    # bfloat16 by default needs both native instructions (emulated bf16 is slower than
    # float32) and a bias table measured in bfloat16 (else the mean could move).
    from despeck.inference import resolve_bf16

    plain = _conv_model()
    calibrated = Despeckler(create_model("unet-cond-xs"), looks=[1, 16],
                            log_bias_table={"looks": [1.0], "corr": [0.0], "values": [[0.0]]},
                            log_bias_table_bf16={"looks": [1.0], "corr": [0.0], "values": [[0.01]]})
    monkeypatch.setattr("despeck.inference.runner.bf16_supported", lambda: True)
    assert resolve_bf16(calibrated, None) and not resolve_bf16(plain, None) and not resolve_bf16(calibrated, False)
    with pytest.warns(InferenceWarning, match="without a bias calibration in bfloat16"):
        assert resolve_bf16(plain, True)
    monkeypatch.setattr("despeck.inference.runner.bf16_supported", lambda: False)
    assert not resolve_bf16(calibrated, None)
    with pytest.warns(InferenceWarning, match="no native bfloat16"):
        assert not resolve_bf16(calibrated, True)


def test_cli_precision_is_recorded_in_the_output(rng, tmp_path, monkeypatch, capsys):
    src = _write_tif(tmp_path / "s.tif", _scene(rng, (40, 40)), tags={"LOOKS": "1"})
    model = _model_file(tmp_path / "m.safetensors")
    monkeypatch.setattr("despeck.inference.runner.bf16_supported", lambda: False)
    for option, recorded in ((["--precision", "32"], "precision=32"), ([], "precision=32")):
        out = tmp_path / f"out{len(option)}.tif"
        assert main(["apply", str(src), "--model", str(model), "--out", str(out), "--quiet", *option]) == 0
        with rasterio.open(out) as ds:
            assert recorded in ds.tags()["despeck_options"]
    monkeypatch.setattr("despeck.inference.runner.bf16_supported", lambda: True)
    out = tmp_path / "out_bf16.tif"
    capsys.readouterr()
    assert main(["apply", str(src), "--model", str(model), "--out", str(out), "--quiet", "--bf16"]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "without a bias calibration in bfloat16" in err[0]
    with rasterio.open(out) as ds:
        assert "precision=bf16" in ds.tags()["despeck_options"]


def test_progress_bar_shows_rate_and_can_be_silenced(rng, capsys):
    model = _conv_model()
    x = _scene(rng, (64, 64))
    despeckle_array(x, model, progress=False)
    assert capsys.readouterr().err == ""
    despeckle_array(x, model, progress=True)
    assert "MP/s" in capsys.readouterr().err


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"intensity": np.ones((2, 3, 4))}, "2-D"),
        ({"valid": np.ones((5, 5), bool)}, "valid mask shape"),
        ({"intensity": np.zeros((8, 8))}, "no valid"),
        ({"tile": 5}, "smaller than the model's receptive field"),
        ({"tile": 32, "overlap": 40}, "smaller than the tile size"),
        ({"threads": 0}, "threads"),
        ({"model": nn.Conv2d(1, 1, 3)}, "Despeckler"),
    ],
)
def test_bad_array_input_one_line(kwargs, match):
    args = {"intensity": np.ones((8, 8), np.float32), "model": _conv_model()}
    args.update(kwargs)
    with pytest.raises(InputError, match=match) as info:
        despeckle_array(args.pop("intensity"), args.pop("model"), progress=False, **args)
    assert "\n" not in str(info.value)


def test_stream_memory_does_not_grow_with_height():
    # Peak buffers depend on tile size and width only; every row is read and emitted once, in order.
    grid_short = TileGrid.fitted((300, 50), 64, 16, 4)
    grid_tall = TileGrid.fitted((30000, 50), 64, 16, 4)
    cap_short = max(u - k for k, u in zip(*read_plan(grid_short.rows, 16)))
    cap_tall = max(u - k for k, u in zip(*read_plan(grid_tall.rows, 16)))
    assert cap_tall == cap_short <= 64 + 16

    reads, emits = [], []
    rows = 3000

    def read_rows(r0, r1):
        reads.append((r0, r1))
        return np.ones((r1 - r0, 50), np.float32)

    def emit_rows(r0, r1, est, source):
        emits.append((r0, r1))
        np.testing.assert_allclose(est, 1.0, rtol=1e-6)
        assert source.shape == est.shape

    grid = TileGrid.fitted((rows, 50), 64, 16, 4)
    stream_tiles(grid, read_rows, emit_rows, lambda t: t.copy(), 2, chunk_rows=16)
    assert [r for r, _ in reads] == [0] + [r for _, r in reads[:-1]] and reads[-1][1] == rows
    assert [r for r, _ in emits] == [0] + [r for _, r in emits[:-1]] and emits[-1][1] == rows


# ----------------------------------------------------------------------------- files

def _write_tif(path, data, *, nodata=-9999.0, tags=None, descriptions=None, block=16, dtype="float32"):
    data = np.asarray(data)
    data = data[None] if data.ndim == 2 else data
    profile = dict(
        driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0], dtype=dtype,
        crs="EPSG:32631", transform=Affine(10.0, 0.0, 440000.0, 0.0, -10.0, 5100000.0), nodata=nodata,
        tiled=True, blockxsize=block, blockysize=block,
    )
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data.astype(dtype))
        ds.update_tags(**(tags or {"CAMPAIGN": "Lake Varden test flight"}))
        for b, text in enumerate(descriptions or [], start=1):
            ds.set_band_description(b, text)
    return path


def _model_file(path, model=None, **metadata):
    model = model or _conv_model()
    save_model_file(path, model, **({"units": "intensity"} | metadata))
    return path


def test_file_keeps_georeferencing_nodata_and_matches_array(rng, tmp_path):
    model = _conv_model()
    bands = np.stack([_scene(rng, (100, 75)), 2.0 * _scene(rng, (100, 75))])
    bands[:, 5:20, 30:60] = -9999.0
    src = _write_tif(tmp_path / "scene.tif", bands, tags={"CAMPAIGN": "North Fen", "LOOKS": "1"},
                     descriptions=["HH", "HV"])
    dst = tmp_path / "out" / "scene_clean.tif"
    with warnings.catch_warnings():
        warnings.simplefilter("error", InferenceWarning)  # looks recorded and matching: no warning
        out = despeckle_file(src, dst, model, tile=40, overlap=16, threads=1, progress=False)
    assert out == dst and dst.exists()
    with rasterio.open(src) as a, rasterio.open(dst) as b:
        assert (b.crs, b.transform, b.width, b.height, b.count) == (a.crs, a.transform, a.width, a.height, a.count)
        assert b.nodata == a.nodata and b.descriptions == a.descriptions
        assert b.tags()["CAMPAIGN"] == "North Fen"
        result = b.read()
    hole = bands[0] == -9999.0
    assert np.all(result[:, hole] == -9999.0)  # nodata stays nodata
    for k in range(2):
        ref = despeckle_array(np.where(hole, 0, bands[k]), model, valid=~hole, tile=40, overlap=16, progress=False)
        np.testing.assert_allclose(result[k][~hole], ref[~hole], rtol=2e-5)
    assert not list(dst.parent.glob(".*tmp"))  # no temporary file left


def test_file_streams_in_whole_rows_of_output_blocks(rng, tmp_path):
    # A tall scene with default tiling: every row of tiles finishes one 512-row block row.
    model = _conv_model()
    x = _scene(rng, (1100, 40))
    src = _write_tif(tmp_path / "tall.tif", x, block=256, tags={"LOOKS": "1"})
    dst = despeckle_file(src, tmp_path / "tall_out.tif", model, progress=False)
    with rasterio.open(dst) as ds:
        got = ds.read(1)
    grid = resolve_tiling(x.shape, model, row_stride=512)
    assert grid.rows.stride == 512 and grid.rows.count == 3
    np.testing.assert_allclose(got, _whole_scene(model, x), rtol=2e-5)


def test_file_units_amplitude_in_db_out(rng, tmp_path):
    model = _conv_model()
    model.metadata = {"units": "intensity"}
    intensity = _scene(rng, (60, 70))
    src = _write_tif(tmp_path / "amp.tif", np.sqrt(intensity), nodata=0.0)
    with pytest.warns(InferenceWarning) as record:
        despeckle_file(src, tmp_path / "amp_out.tif", model, units="amplitude", progress=False)
        despeckle_file(src, tmp_path / "db_out.tif", model, units="amplitude", out_units="db", progress=False)
    notes = " ".join(str(w.message) for w in record)
    assert "trained on intensity data but the file holds amplitude" in notes
    ref = despeckle_array(intensity, model, progress=False)
    with rasterio.open(tmp_path / "amp_out.tif") as ds:
        np.testing.assert_allclose(ds.read(1) ** 2, ref, rtol=1e-4)
    with rasterio.open(tmp_path / "db_out.tif") as ds:
        np.testing.assert_allclose(ds.read(1), 10 * np.log10(ref), atol=1e-3)


def test_looks_mismatch_warns_and_says_what_was_assumed(rng, tmp_path):
    model = Despeckler(_conv_model().network, looks=4)
    src = _write_tif(tmp_path / "s.tif", _scene(rng, (40, 40)), tags={"LOOKS": "1"})
    with pytest.warns(InferenceWarning, match=r"1 looks \(recorded in the file's 'looks' tag\), outside the 4 looks.*residual speckle"):
        despeckle_file(src, tmp_path / "o.tif", model, progress=False)


class _FailingModel(nn.Module):
    def __init__(self, model, after):
        super().__init__()
        self.model, self.after, self.calls = model, after, 0
        self.receptive_field = model.receptive_field
        self.scene_log_offset = model.scene_log_offset

    def forward(self, *args, **kwargs):
        self.calls += 1
        if self.calls > self.after:
            raise RuntimeError("simulated crash in the middle of a scene")
        return self.model(*args, **kwargs)


def test_crash_mid_scene_leaves_nothing_at_destination(rng, tmp_path):
    src = _write_tif(tmp_path / "s.tif", _scene(rng, (120, 120)))
    dst = tmp_path / "o.tif"
    with pytest.raises(RuntimeError, match="simulated crash"):
        despeckle_file(src, dst, _FailingModel(_conv_model(), after=3), tile=32, overlap=16, progress=False)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.tif"]


def test_killed_command_leaves_nothing_at_destination(rng, tmp_path):
    src = _write_tif(tmp_path / "big.tif", _scene(rng, (1536, 1536)), block=256)
    torch.manual_seed(0)
    model_path = _model_file(tmp_path / "m.safetensors", Despeckler(create_model("logcnn-s"), looks=1))
    procs = {}
    for sig in (signal.SIGTERM, signal.SIGKILL):
        out = tmp_path / f"out_{sig.name}.tif"
        cmd = [sys.executable, "-m", "despeck", "apply", str(src), "--model", str(model_path), "--out", str(out),
               "--threads", "1", "--quiet"]
        procs[sig] = (subprocess.Popen(cmd, stderr=subprocess.PIPE, text=True), out)
    for sig, (proc, out) in procs.items():
        deadline = time.monotonic() + 60
        while not list(tmp_path.glob(f".{out.name}.*.tmp")) and time.monotonic() < deadline:
            assert proc.poll() is None, proc.stderr.read()
            time.sleep(0.02)
        time.sleep(0.3)
        assert proc.poll() is None, "run finished before it could be killed; make the scene larger"
        proc.send_signal(sig)
        proc.wait(timeout=30)
        assert not out.exists()
    # SIGTERM is turned into a clean abort that also removes the temporary file, exit status
    # 128 + 15 (the shell's convention for a signal, common practice).
    assert not list(tmp_path.glob(".out_SIGTERM.tif.*.tmp"))
    assert procs[signal.SIGTERM][0].returncode == 143


def test_cli_batch_skips_finished_outputs(rng, tmp_path, capsys):
    for name in ("a", "b"):
        _write_tif(tmp_path / f"{name}.tif", _scene(rng, (48, 40)), tags={"LOOKS": "1"})
    model = _model_file(tmp_path / "m.safetensors")
    out_dir = tmp_path / "clean"
    argv = ["apply", str(tmp_path / "*.tif"), "--model", str(model), "--out-dir", str(out_dir), "--threads", "1"]
    assert main(argv) == 0
    first = capsys.readouterr().out
    assert "2 written, 0 skipped" in first
    stamp = {p.name: p.stat().st_mtime_ns for p in out_dir.iterdir()}
    assert sorted(stamp) == ["a_despeckled.tif", "b_despeckled.tif"]
    (out_dir / "b_despeckled.tif").unlink()  # as if the batch had stopped after a
    assert main(argv) == 0
    second = capsys.readouterr().out
    assert "exists, skipped" in second and "1 written, 1 skipped" in second
    assert (out_dir / "a_despeckled.tif").stat().st_mtime_ns == stamp["a_despeckled.tif"]
    assert main(argv + ["--overwrite", "--quiet"]) == 0
    assert (out_dir / "a_despeckled.tif").stat().st_mtime_ns != stamp["a_despeckled.tif"]
    assert capsys.readouterr().out == ""


def test_cli_folder_input_and_default_output_name(rng, tmp_path, capsys):
    folder = tmp_path / "scenes"
    folder.mkdir()
    _write_tif(folder / "c.tif", _scene(rng, (30, 30)))
    model = _model_file(tmp_path / "m.safetensors")
    assert main(["apply", str(folder), "--model", str(model), "--quiet"]) == 0
    assert (folder / "c_despeckled.tif").exists()
    err = capsys.readouterr().err
    assert err.count("despeck: warning:") == 1 and "assumed 1 look" in err


def test_cli_default_model_is_the_starter_model(rng, tmp_path, capsys, monkeypatch):
    src = _write_tif(tmp_path / "s.tif", _scene(rng, (30, 30)), tags={"LOOKS": "1"})
    missing = tmp_path / "weights" / "starter.safetensors"
    monkeypatch.setattr("despeck.cli.apply.starter_model_path", lambda: missing)
    assert main(["apply", str(src), "--quiet"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bundled starter model is not installed" in err[0] and "--model" in err[0]
    missing.parent.mkdir()
    _model_file(missing)
    assert main(["apply", str(src), "--quiet"]) == 0
    assert (tmp_path / "s_despeckled.tif").exists()


def _bad_cases(tmp_path, rng):
    src = _write_tif(tmp_path / "s.tif", _scene(rng, (30, 30)))
    model = _model_file(tmp_path / "m.safetensors")
    corrupt = tmp_path / "corrupt.safetensors"
    corrupt.write_bytes(b"\x08\x00\x00\x00\x00\x00\x00\x00{nonsense")
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    base = ["apply", str(src), "--model", str(model)]
    # exit status 1: a file is missing or refused; 2: an option's value is refused (usage error)
    return [
        (["apply", str(tmp_path / "nothing*.tif"), "--model", str(model)], "no input file matched", 1),
        (["apply", str(tmp_path / "missing.tif"), "--model", str(model)], "no such file or folder", 1),
        (base + ["--out", str(src)], "would overwrite the input", 2),
        (["apply", str(src), "--model", str(corrupt)], "corrupt.safetensors", 1),
        (["apply", str(src), "--model", str(tmp_path / "none.safetensors")], "does not exist", 1),
        (base + ["--tile", "7"], "smaller than the model's receptive field", 2),
        (base + ["--tile", "32", "--overlap", "40"], "smaller than the tile size", 2),
        (base + ["--out-dir", str(blocker / "sub")], "cannot create output directory", 1),
        (base + ["--suffix", ""], "replace the inputs", 2),
    ]


def test_cli_bad_input_one_line_errors(rng, tmp_path, capsys):
    for argv, match, code in _bad_cases(tmp_path, rng):
        assert main(argv) == code, argv
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith("despeck: error:") and match in err[0], (argv, err)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a_file", "corrupt.safetensors", "m.safetensors", "s.tif"]


def test_file_errors_name_the_problem(rng, tmp_path):
    src = _write_tif(tmp_path / "s.tif", _scene(rng, (30, 30)))
    model = _conv_model()
    with pytest.raises(InputError, match="same as the input"):
        despeckle_file(src, src, model, overwrite=True, progress=False)
    (tmp_path / "exists.tif").write_bytes(b"")
    with pytest.raises(InputError, match="already exists"):
        despeckle_file(src, tmp_path / "exists.tif", model, progress=False)
    with pytest.raises(RasterError, match="no such file"):
        despeckle_file(tmp_path / "nope.tif", tmp_path / "o.tif", model, progress=False)
    assert not (tmp_path / "o.tif").exists()
    assert os.path.getsize(tmp_path / "exists.tif") == 0
