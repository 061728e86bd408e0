"""Tests for despeck.models: every registered network, the intensity wrapper and the model file."""

import json
import math
import pathlib
import pickle

import numpy as np
import pytest
import torch
from scipy import special

from despeck.errors import InputError, ModelFileError
from despeck.models import (
    Despeckler,
    create_model,
    list_models,
    load_model_file,
    read_model_metadata,
    save_model_file,
)
from despeck.models import modelfile

torch.set_num_threads(2)


@pytest.fixture(autouse=True)
def _seed():
    torch.manual_seed(0)


# ----------------------------------------------------------------------------- networks

@pytest.mark.parametrize("name", list_models())
@pytest.mark.parametrize("shape", [(2, 1, 9, 13), (1, 1, 17, 6), (1, 1, 1, 3)])
def test_every_model_forward_backward(name, shape):
    # Generic model test (common practice, as in timm's tests/test_models.py):
    # same shape out, no NaN, every parameter receives a non-zero gradient.
    net = create_model(name)
    # Looks-aware networks take conditioning planes after the log-intensity plane.
    cin = 1 + getattr(net, "condition_channels", 0)
    z = torch.randn((shape[0], cin) + shape[2:], requires_grad=True)
    y = net(z)
    assert y.shape == shape
    assert torch.isfinite(y).all()
    ((y - 0.3) ** 2).mean().backward()
    assert torch.isfinite(z.grad).all()
    for pname, p in net.named_parameters():
        assert p.grad is not None, pname
        assert torch.isfinite(p.grad).all(), pname
        if shape[-2] > 1:  # a 1-pixel-high input cannot reach every kernel tap
            assert p.grad.abs().sum() > 0, pname


@pytest.mark.parametrize("name", list_models())
def test_receptive_field_bounds_influence(name):
    # The gradient of one output pixel w.r.t. the input is zero outside the receptive field.
    net = create_model(name)
    rf = net.receptive_field
    assert isinstance(rf, int) and rf % 2 == 1
    side = rf + 24
    z = torch.randn(1, 1 + getattr(net, "condition_channels", 0), side, side, requires_grad=True)
    c = side // 2
    net(z)[0, 0, c, c].backward()
    rows, cols = torch.nonzero(z.grad[0, 0] != 0, as_tuple=True)
    assert rows.max() - rows.min() + 1 <= rf
    assert cols.max() - cols.min() + 1 <= rf
    if name.startswith("logcnn"):  # a plain conv stack reaches exactly its receptive field
        assert rows.max() - rows.min() + 1 == rf
        assert net.size_multiple == 1
    else:
        assert net.size_multiple == getattr(net, "unshuffle", 1) * 2 ** net.levels


def test_default_logcnn_is_small():
    # Issue 4: the default residual log CNN has at most 150k parameters.
    assert sum(p.numel() for p in create_model("logcnn-s").parameters()) <= 150_000


def test_create_model_rejects_bad_arguments():
    with pytest.raises(InputError, match="unknown model 'nope'.*logcnn-s"):
        create_model("nope")
    with pytest.raises(InputError, match="no argument 'widht'.*allowed: .*width"):
        create_model("logcnn-s", widht=3)
    with pytest.raises(InputError, match="depth must be an integer >= 2"):
        create_model("logcnn-s", depth=1)
    net = create_model("unet-s", widths=[4, 8])
    assert net.architecture == "unet-s" and net.architecture_kwargs == {"widths": [4, 8], "condition_channels": 0, "unshuffle": 1}


def test_registry_keeps_one_default_configuration_per_entry():
    # The decorator records name, constructor, full defaults and description once per
    # variant; the defaults are what create_model builds when nothing is overridden.
    from despeck.models import UNet, model_defaults, model_description, model_entry, register_model

    entry = model_entry("unet-cond-s")
    assert entry.name == "unet-cond-s" and entry.constructor is UNet
    assert dict(entry.defaults) == {"widths": [16, 32, 64], "condition_channels": 3, "unshuffle": 1}
    assert model_description("unet-cond-s") == entry.description and "conditioned" in entry.description
    with pytest.raises(TypeError):
        entry.defaults["widths"] = [1, 2]  # the record is read-only
    defaults = model_defaults("unet-cond-s")
    defaults["widths"].append(128)  # a caller's copy never changes the record
    assert model_defaults("unet-cond-s")["widths"] == [16, 32, 64]
    net = create_model("unet-cond-s")
    assert net.architecture_kwargs == {"widths": [16, 32, 64], "condition_channels": 3, "unshuffle": 1}
    assert model_defaults("logcnn-xs") == {"depth": 6, "width": 16, "dilations": None}
    with pytest.raises(InputError, match="unknown model 'nope'"):
        model_entry("nope")
    # A name is registered once; a default must be an argument of the constructor.
    with pytest.raises(InputError, match="'unet-s' is already registered"):
        register_model("unet-s", widths=[4, 8])
    with pytest.raises(InputError, match="has no argument 'widht'"):
        register_model("unet-test-only", widht=[4, 8])(UNet)
    assert "unet-test-only" not in list_models()

def test_logcnn_crop_of_output_equals_output_of_crop():
    # No per-tile statistics: with a fixed log offset, a tile with a margin of half the
    # receptive field reproduces the whole-scene output exactly (tiling contract).
    model = Despeckler(create_model("logcnn-xs"), looks=1).eval()
    intensity = torch.from_numpy(np.random.default_rng(1).gamma(1.0, 1.0, (1, 1, 40, 44)).astype(np.float32))
    off = Despeckler.scene_log_offset(intensity.numpy())
    h = model.receptive_field // 2
    with torch.no_grad():
        full = model(intensity, log_offset=off)
        tile = model(intensity[..., 5:35, 8:30], log_offset=off)
    torch.testing.assert_close(tile[..., h:-h, h:-h], full[..., 5 + h:35 - h, 8 + h:30 - h], rtol=1e-5, atol=0)


@pytest.mark.parametrize("name", ["unet-cond-m", "unet-cond-h"])
def test_unet_equals_its_textbook_form_with_concatenated_skips(name):
    # The decoders apply their first convolution to the upsampled map and the skip
    # separately and add the results instead of concatenating them (faster on the CPU).
    # Convolution is linear in its input channels (common practice), so the output must
    # equal the textbook U-Net (Ronneberger et al. 2015): conv of the concatenation.
    net = create_model(name).eval()
    x = torch.randn(2, 1 + net.condition_channels, 48, 40)
    s = net.unshuffle

    def textbook(z):
        h = torch.cat([torch.nn.functional.pixel_unshuffle(z[:, :1], s), z[:, 1:, ::s, ::s]], 1) if s > 1 else z
        skips = []
        for enc in net.encoders:
            h = enc(h)
            skips.append(h)
            h = torch.nn.functional.avg_pool2d(h, 2)
        h = net.bottleneck(h)
        for up, dec in zip(net.ups, net.decoders):
            h = dec(torch.cat([up(h), skips.pop()], dim=1))
        noise = net.head(h)
        return z[:, :1] - (torch.nn.functional.pixel_shuffle(noise, s) if s > 1 else noise)

    with torch.no_grad():
        torch.testing.assert_close(net(x), textbook(x), rtol=1e-5, atol=1e-5)
        x_cl = x.contiguous(memory_format=torch.channels_last)
        torch.testing.assert_close(net.to(memory_format=torch.channels_last)(x_cl), textbook(x), rtol=1e-5,
                                   atol=1e-5)



def test_deepened_unet_starts_as_the_same_function_and_learns_its_new_level():
    # A U-Net given one more level (zero-initialised path into an identity decoder block:
    # the zero-init residual branch of Goyal et al. 2017, "Accurate, large minibatch SGD")
    # computes the same output as the original on inputs that need no extra padding, and
    # one gradient step reaches the new level's weights.
    from despeck.models.unet import deepened

    net = create_model("unet-cond-m").eval()
    for p in net.parameters():  # trained-looking weights, not the He defaults only
        p.data.add_(0.05 * torch.randn_like(p))
    deep = deepened(net, 128)
    assert deep.architecture == "unet-cond-l" and deep.widths == [16, 32, 64, 96, 128]
    assert deep.receptive_field > 2 * net.receptive_field
    x = torch.randn(2, 4, 64, 48)  # multiples of 16: both pad nothing
    with torch.no_grad():
        torch.testing.assert_close(deep(x), net(x), rtol=1e-5, atol=1e-5)
    deep.train()
    ((deep(x) - 0.3) ** 2).mean().backward()
    c = deep.widths[-2]
    assert deep.decoders[0][0].weight.grad[:, :c].abs().sum() > 0  # the new path's entry into the old output
    with pytest.raises(InputError, match="pixel unshuffle"):
        deepened(create_model("unet-cond-h"), 128)
    odd = deepened(create_model("unet-cond-s"), 80)  # no registered name: the old one with widths overridden
    assert odd.architecture == "unet-cond-s" and odd.architecture_kwargs["widths"] == [16, 32, 64, 80]


def test_deepen_script_writes_a_model_file_with_the_same_output(tmp_path):
    import runpy
    import sys

    net = create_model("unet-cond-xs").eval()
    table = {"looks": [1.0, 16.0], "corr": [0.0], "values": [[0.01], [0.002]]}
    src = save_model_file(tmp_path / "a.safetensors", Despeckler(net, looks=[1, 16], log_bias_table=table))
    out = tmp_path / "b.safetensors"
    script = str(pathlib.Path(__file__).resolve().parents[1] / "scripts" / "deepen_model.py")
    argv = sys.argv
    try:
        sys.argv = [script, str(src), str(out), "--width", "24"]
        with pytest.raises(SystemExit) as done:
            runpy.run_path(script, run_name="__main__")
        assert done.value.code == 0
        made = out.read_bytes()
        for args in ([str(src), str(src)], [str(src), str(out)]):  # itself; an existing file without --overwrite
            sys.argv = [script, *args]
            with pytest.raises(SystemExit) as refused:
                runpy.run_path(script, run_name="__main__")
            assert refused.value.code == 2
        assert out.read_bytes() == made
    finally:
        sys.argv = argv
    a, b = load_model_file(src), load_model_file(out)
    assert b.network.widths == [8, 16, 24] and b.log_bias_table == a.log_bias_table and b.looks == a.looks
    intensity = torch.rand(1, 1, 32, 32) + 0.1
    with torch.no_grad():
        torch.testing.assert_close(b(intensity, looks=3.0), a(intensity, looks=3.0), rtol=1e-5, atol=1e-6)

def test_point_guard_counts_the_ring_inside_an_all_valid_tile_like_a_nodata_border():
    # Inside a tile without nodata the guard's ring counts come from the tile's shape; they
    # must equal the counts of the general path, where the pixels outside are nodata.
    model = Despeckler(create_model("logcnn-xs"), looks=1, point_false_alarm=1e-3).eval()
    rng = np.random.default_rng(5)
    x = rng.gamma(1.0, 1.0, (1, 1, 36, 30)).astype(np.float32)
    for r, c in ((0, 0), (3, 29), (35, 14), (18, 6), (20, 20)):
        x[0, 0, r, c] = 40.0  # points at corners, edges and inside
    big = np.zeros((1, 1, 36 + 16, 30 + 16), np.float32)
    big[..., 8:-8, 8:-8] = x
    est = torch.full((1, 1, 36, 30), 1.0)
    est_big = torch.full(big.shape, 1.0)
    with torch.no_grad():
        fast = model.keep_points(torch.from_numpy(x), torch.ones(x.shape, dtype=torch.bool), est, 1.0)
        general = model.keep_points(torch.from_numpy(big), torch.from_numpy(big > 0), est_big, 1.0)
    torch.testing.assert_close(fast, general[..., 8:-8, 8:-8], rtol=0, atol=0)
    # kept: the three whose ring holds at least half its 200 pixels inside the tile (the one on
    # the bottom edge has 105); the two in corners (55 and 73) have too little background
    assert int((fast == 40.0).sum()) == 3



def test_point_guard_matches_scipy_box_sums_with_nodata_holes():
    # The guard's rule (the point-target step of the improved Lee sigma filter, Lee et al.
    # 2009, IEEE TGRS 47(1)) with its ring mean computed independently from
    # scipy.ndimage.uniform_filter box means (zero outside the image, as the guard's
    # padding): a valid pixel is kept when its ring (15 x 15 less 5 x 5) holds at least
    # half of its 200 pixels valid and it exceeds the threshold times their mean.
    from scipy import ndimage

    model = Despeckler(create_model("logcnn-xs"), looks=1, point_false_alarm=1e-2).eval()
    rng = np.random.default_rng(11)
    x = rng.gamma(1.0, 1.0, (60, 52))
    x[rng.random(x.shape) < 0.003] = 60.0  # bright points
    valid = np.ones(x.shape, bool)
    valid[10:25, 30:45] = False  # a nodata hole
    valid[:, :3] = False  # and a border
    xs = np.where(valid, x, 0.0)

    def box(a, k):
        return ndimage.uniform_filter(a, k, mode="constant", cval=0.0) * k * k

    ring_sum = box(xs, 15) - box(xs, 5)
    ring_n = box(valid.astype(float), 15) - box(valid.astype(float), 5)
    t = model.point_threshold_for(1.0)
    expected = valid & (ring_n >= 99.5) & (ring_sum > 0) & (xs > t * ring_sum / np.maximum(ring_n, 1))
    est = torch.zeros((1, 1) + x.shape)
    with torch.no_grad():
        got = model.keep_points(torch.from_numpy(x.astype(np.float32))[None, None],
                                torch.from_numpy(valid)[None, None], est, 1.0)
    kept = (got[0, 0] > 0).numpy()
    assert expected.sum() >= 5
    np.testing.assert_array_equal(kept, expected)

# ----------------------------------------------------------------------------- wrapper

class _LogBoxMean(torch.nn.Module):
    """Hand-built 'network': the k x k mean of the normalised log (a linear smoother)."""

    def __init__(self, k):
        super().__init__()
        self.k = k
        self.receptive_field = k

    def forward(self, z):
        return torch.nn.functional.avg_pool2d(z, self.k, stride=1, padding=self.k // 2, count_include_pad=False)


@pytest.mark.parametrize("looks", [1.0, 4.0])
def test_log_bias_correction_on_constant_scene(looks):
    # Constant reflectivity R with L-look Gamma speckle, a k x k mean in the log domain.
    # Theory (docs/methods.md, section Speckle statistics; scipy): E[ln n] = psi(L) - ln L, so the
    # geometric mean of the uncorrected output is R exp(psi(L) - ln L) and adding
    # log_bias = ln L - psi(L) makes it exactly R. The arithmetic mean of the corrected
    # output is R e^b (E[n^(1/N)])^N with N = k^2 independent pixels and
    # E[n^a] = Gamma(L + a) / (Gamma(L) L^a) (Gamma moments; Johnson, Kotz, Balakrishnan 1994).
    k, R = 5, 0.0123
    N = k * k
    rng = np.random.default_rng(7)
    intensity = (R * rng.gamma(looks, 1.0 / looks, (1, 1, 384, 384))).astype(np.float32)
    bias = math.log(looks) - special.digamma(looks)
    model = Despeckler(_LogBoxMean(k), looks=looks, log_bias=bias)
    plain = Despeckler(_LogBoxMean(k), looks=looks, log_bias=0.0)
    with torch.no_grad():
        out = model(torch.from_numpy(intensity))[0, 0].double().numpy()[k:-k, k:-k]
        raw = plain(torch.from_numpy(intensity))[0, 0].double().numpy()[k:-k, k:-k]
    logs = np.log(out)
    # Overlapping windows correlate outputs; N pixels per independent sample is conservative.
    se_log = math.sqrt(special.polygamma(1, looks) / N / (logs.size / N))
    assert abs(logs.mean() - math.log(R)) < 4 * se_log
    assert abs(np.log(raw).mean() - (math.log(R) + special.digamma(looks) - math.log(looks))) < 4 * se_log
    a = 1.0 / N
    ratio = math.exp(bias) * math.exp(N * (special.gammaln(looks + a) - special.gammaln(looks) - a * math.log(looks)))
    se_mean = out.std() / math.sqrt(out.size / N)
    assert abs(out.mean() - R * ratio) < 4 * se_mean
    assert ratio > 1.0  # the arithmetic mean sits slightly above R (Jensen), as the docs say


def test_wrapper_is_calibration_independent():
    # Scaling a scene by c scales the estimate by c (the normalisation cancels the gain),
    # over the 1e-4..10 backscatter range of issue 4.
    model = Despeckler(create_model("logcnn-xs"), looks=1).eval()
    base = torch.from_numpy(np.random.default_rng(3).gamma(1.0, 1.0, (2, 1, 23, 19)).astype(np.float32))
    with torch.no_grad():
        ref = model(base)
        for c in (1e-4, 1e-2, 10.0):
            torch.testing.assert_close(model(base * c) / c, ref, rtol=2e-4, atol=0)


def test_wrapper_invalid_pixels_are_filled_and_ignored():
    model = Despeckler(create_model("logcnn-xs"), looks=1).eval()
    rng = np.random.default_rng(4)
    intensity = torch.from_numpy(rng.gamma(1.0, 0.05, (1, 1, 30, 30)).astype(np.float32))
    valid = torch.ones_like(intensity, dtype=torch.bool)
    valid[..., :6, :] = False
    a, b = intensity.clone(), intensity.clone()
    a[~valid] = 0.0
    b[~valid] = float("nan")
    with torch.no_grad():
        ya, yb = model(a, valid), model(b, valid)
        z, off, v = model.normalise(a, valid)
    assert torch.equal(ya, yb) and torch.isfinite(ya).all()
    # Offset: mean log over valid pixels; invalid pixels are set to it (z = 0).
    assert off.item() == pytest.approx(Despeckler.scene_log_offset(intensity[valid].numpy()), abs=1e-5)
    assert torch.all(z[~valid] == 0)
    # Non-positive pixels are invalid even when the mask says otherwise.
    _, _, v2 = model.normalise(a, None)
    assert torch.equal(v2, valid)
    with pytest.raises(InputError, match="without any valid"):
        Despeckler.scene_log_offset(np.array([0.0, -1.0, np.nan]))


def test_wrapper_rejects_bad_input():
    net = create_model("logcnn-xs")
    with pytest.raises(InputError, match="looks"):
        Despeckler(net, looks=0)
    with pytest.raises(InputError, match="receptive_field"):
        Despeckler(torch.nn.Identity(), looks=1)
    with pytest.raises(InputError, match=r"\(N, 1, H, W\)"):
        Despeckler(net, looks=1)(torch.ones(3, 3))


# ----------------------------------------------------------------------------- model file

@pytest.mark.parametrize("name", ["logcnn-xs", "unet-xs"])
def test_save_load_bit_identical(tmp_path, name):
    model = Despeckler(create_model(name), looks=[1.0, 4.0], log_bias=0.25, log_scale=1.5,
                       metadata={"training": {"scenes": 3}})
    path = save_model_file(tmp_path / "m.safetensors", model, metrics={"val_psnr_db": 12.5})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.safetensors"]  # no temp file left
    loaded = load_model_file(path)
    assert not loaded.training
    x = torch.from_numpy(np.random.default_rng(5).gamma(1.0, 1.0, (2, 1, 21, 27)).astype(np.float32))
    with torch.no_grad():
        assert torch.equal(loaded(x), model.eval()(x))
    assert loaded.looks == [1.0, 4.0] and loaded.log_bias == 0.25 and loaded.log_scale == 1.5
    assert loaded.metadata["metrics"] == {"val_psnr_db": 12.5}
    assert loaded.metadata["training"] == {"scenes": 3}
    meta = read_model_metadata(path)
    assert meta["architecture"]["name"] == name and meta["format_version"] == 1
    assert meta["units"] == "intensity" and meta["package_version"]


class _Boom:
    """Unpickling this touches a marker file: proof that code would have run."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (open, (str(self.marker), "w"))


def test_loading_never_executes_code(tmp_path):
    marker = tmp_path / "executed"
    evil = tmp_path / "evil.safetensors"
    evil.write_bytes(pickle.dumps({"weights": _Boom(marker)}))
    with pytest.raises(ModelFileError, match="evil.safetensors") as info:
        load_model_file(evil)
    assert "\n" not in str(info.value)
    assert not marker.exists()
    # A torch.save checkpoint (zip + pickle) is rejected the same way.
    ckpt = tmp_path / "ckpt.safetensors"
    torch.save({"x": _Boom(marker)}, ckpt)
    with pytest.raises(ModelFileError, match="ckpt.safetensors"):
        load_model_file(ckpt)
    assert not marker.exists()


def _rewrite_header(path, out, change):
    # Rebuild a safetensors file with an edited description header (format per the
    # safetensors spec: 8-byte little-endian header length, JSON header, raw data).
    raw = path.read_bytes()
    n = int.from_bytes(raw[:8], "little")
    header = json.loads(raw[8:8 + n])
    desc = json.loads(header["__metadata__"]["despeck"])
    change(desc, header)
    header["__metadata__"]["despeck"] = json.dumps(desc)
    blob = json.dumps(header).encode()
    out.write_bytes(len(blob).to_bytes(8, "little") + blob + raw[8 + n:])


def test_bad_model_files_give_one_line_errors(tmp_path):
    good = save_model_file(tmp_path / "good.safetensors", Despeckler(create_model("logcnn-xs"), looks=1))
    cases = {}
    newer = tmp_path / "newer.safetensors"
    _rewrite_header(good, newer, lambda d, h: d.update(format_version=modelfile.FORMAT_VERSION + 1))
    cases[newer] = "newer than this despeck reads"
    foreign = tmp_path / "foreign.safetensors"
    _rewrite_header(good, foreign, lambda d, h: d.update(format="other-tool"))
    cases[foreign] = "not a despeck model"
    unknown_arch = tmp_path / "arch.safetensors"
    _rewrite_header(good, unknown_arch, lambda d, h: d["architecture"].update(name="bignet"))
    cases[unknown_arch] = "cannot build"
    wrong_shape = tmp_path / "shape.safetensors"
    _rewrite_header(good, wrong_shape, lambda d, h: d["architecture"]["kwargs"].update(width=8))
    cases[wrong_shape] = "do not fit"
    truncated = tmp_path / "truncated.safetensors"
    truncated.write_bytes(good.read_bytes()[:100])
    cases[truncated] = "not a readable safetensors"
    from safetensors.torch import save_file
    plain = tmp_path / "plain.safetensors"
    save_file({"w": torch.zeros(2)}, str(plain))
    cases[plain] = "not a despeck model"
    cases[tmp_path / "missing.safetensors"] = "does not exist"
    for path, message in cases.items():
        with pytest.raises(ModelFileError) as info:
            load_model_file(path)
        text = str(info.value)
        assert path.name in text and message in text and "\n" not in text, text


def test_save_errors(tmp_path):
    model = Despeckler(create_model("logcnn-xs"), looks=1)
    with pytest.raises(ModelFileError, match="does not exist"):
        save_model_file(tmp_path / "no" / "m.safetensors", model)
    with pytest.raises(InputError, match="not built by"):
        save_model_file(tmp_path / "m.safetensors", Despeckler(_LogBoxMean(3), looks=1))
    with pytest.raises(InputError, match="reserved"):
        save_model_file(tmp_path / "m.safetensors", model, architecture="x")
    with pytest.raises(InputError, match="JSON"):
        save_model_file(tmp_path / "m.safetensors", model, metrics={"x": object()})


@pytest.mark.parametrize("damage", ["weights", "header"])
def test_a_written_file_that_reads_back_wrong_never_replaces_the_old_one(tmp_path, monkeypatch, damage):
    # Write to a temporary file, read it back as a model, and only then rename
    # (the project's rule for every output): a file whose bytes were damaged on the way
    # (here: one weight byte, or the description) leaves the previous model untouched.
    import safetensors.torch

    path = tmp_path / "m.safetensors"
    save_model_file(path, Despeckler(create_model("logcnn-xs"), looks=1))
    before = path.read_bytes()
    real = safetensors.torch.save

    def damaged(tensors, metadata=None):
        data = bytearray(real(tensors, metadata=metadata))
        if damage == "weights":
            data[-2] ^= 0x01  # a low mantissa bit of the last weight: still finite, still loads
        else:
            metadata = {k: v.replace('"looks": 1', '"looks": 2') for k, v in metadata.items()}
            data = bytearray(real(tensors, metadata=metadata))
        return bytes(data)

    monkeypatch.setattr(safetensors.torch, "save", damaged)
    torch.manual_seed(1)
    with pytest.raises(ModelFileError, match="reads back different") as exc:
        save_model_file(path, Despeckler(create_model("logcnn-xs"), looks=1))
    assert str(path) in str(exc.value) and "\n" not in str(exc.value)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.safetensors"]  # no temporary file left


def test_info_describes_a_model_file_as_outside_readers_see_it(tmp_path, capsys):
    # `despeck info MODEL`: size and SHA-256 agree with the file system and Python's
    # hashlib (FIPS 180-4), the parameter count with the tensors the safetensors reader
    # lists, the architecture and looks with the stored header; text and JSON.
    import hashlib
    import os

    from safetensors import safe_open

    from despeck.cli import main
    from despeck.models import bundled_model_path

    path = bundled_model_path("starter")
    assert main(["info", "starter", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    with safe_open(str(path), framework="pt") as f:
        count = sum(math.prod(f.get_slice(k).get_shape()) for k in f.keys())
    assert d["bytes"] == os.path.getsize(path)
    assert d["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert d["parameters"] == count
    header = read_model_metadata(path)
    assert d["architecture"]["name"] == header["architecture"]["name"] and d["looks"] == header["looks"]
    assert set(d["bias_tables"]) == {"32", "bf16"} and d["looks_aware"] and d["training"]["epochs"] > 0
    small = save_model_file(tmp_path / "plain.safetensors", Despeckler(create_model("logcnn-xs"), looks=4, log_bias=0.1))
    assert main(["info", str(small)]) == 0
    text = capsys.readouterr().out
    assert "logcnn-xs" in text and "looks 4 to 4" in text and f"one correction, {10 * 0.1 / math.log(10):+.3f} dB" in text
    assert main(["info", str(tmp_path / "missing.safetensors")]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "missing.safetensors does not exist" in err[0]
