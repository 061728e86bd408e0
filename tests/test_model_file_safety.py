"""Model files and architecture arguments that must be refused cleanly (issue 9, defects 3, 8, 1).

A model file comes from anywhere: loading must refuse non-finite weights, absurd
calibration values, architectures that would exhaust memory and oversized or deeply
nested headers with one line naming the file, before allocating anything large.
Files are rebuilt by hand following the safetensors format (an 8-byte little-endian
header length, a JSON header, then the raw tensor bytes; huggingface/safetensors README,
"Format").
"""

import json
import math
import resource
import time

import pytest
import torch
from safetensors.torch import load_file, save_file

from despeck.errors import InputError, ModelFileError
from despeck.models import Despeckler, create_model, load_model_file, modelfile, save_model_file
from despeck.models import registry


@pytest.fixture()
def good(tmp_path):
    return save_model_file(tmp_path / "good.safetensors", Despeckler(create_model("logcnn-xs"), looks=1))


def _parts(path):
    raw = path.read_bytes()
    n = int.from_bytes(raw[:8], "little")
    return json.loads(raw[8:8 + n]), raw[8 + n:]


def _write(out, header, data):
    blob = json.dumps(header).encode()
    out.write_bytes(len(blob).to_bytes(8, "little") + blob + data)
    return out


def _with_description(good, out, change):
    header, data = _parts(good)
    desc = json.loads(header["__metadata__"]["despeck"])
    change(desc)
    header["__metadata__"]["despeck"] = json.dumps(desc)  # NaN / Infinity written as JSON extensions
    return _write(out, header, data)


def _one_line(path, match):
    with pytest.raises(ModelFileError) as info:
        load_model_file(path)
    text = str(info.value)
    assert path.name in text and match in text and "\n" not in text, text
    return text


# ----------------------------------------------------------------------------- defect 3: values

@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_non_finite_weights_are_refused(good, tmp_path, bad):
    tensors = load_file(str(good))
    tensors["body.2.weight"][3, 1, 0, 2] = bad
    header, _ = _parts(good)
    out = tmp_path / "nonfinite.safetensors"
    save_file(tensors, str(out), metadata=header["__metadata__"])
    _one_line(out, "body.2.weight holds NaN or infinite values")


@pytest.mark.parametrize("key, value, match", [
    ("log_bias", 1e308, "normalisation.log_bias 1e+308 is out of range"),
    ("log_bias", -50.0, "normalisation.log_bias -50.0 is out of range"),
    ("log_bias", math.nan, "normalisation.log_bias must be a finite number"),
    ("log_bias", "0.1", "normalisation.log_bias must be a finite number"),
    ("log_scale", 0.0, "normalisation.log_scale 0.0 is out of range"),
    ("log_scale", -2.0, "normalisation.log_scale -2.0 is out of range"),
    ("log_scale", 1e300, "normalisation.log_scale 1e+300 is out of range"),
    ("log_scale", math.inf, "normalisation.log_scale must be a finite number"),
    ("point_false_alarm", 1.5, "point_false_alarm 1.5 must lie in (0, 1)"),
    ("point_false_alarm", 0.0, "point_false_alarm 0.0 must lie in (0, 1)"),
    ("point_false_alarm", True, "point_false_alarm must be a finite number"),
])
def test_absurd_calibration_is_refused(good, tmp_path, key, value, match):
    out = _with_description(good, tmp_path / f"bad_{key}.safetensors",
                            lambda d: d["normalisation"].update({key: value}))
    _one_line(out, match)


@pytest.mark.parametrize("looks, match", [
    (1e9, "looks 1000000000.0 is out of range"), (0.0, "looks 0.0 is out of range"),
    (-1.0, "looks -1.0 is out of range"), (math.nan, "looks must be a finite number"),
    ([1.0, 1e12], "out of range"), (None, "looks must be a finite number"),
])
def test_absurd_looks_are_refused(good, tmp_path, looks, match):
    out = _with_description(good, tmp_path / "bad_looks.safetensors", lambda d: d.update(looks=looks))
    _one_line(out, match)


def test_sane_values_still_load(good, tmp_path):
    # The ranges are wide enough for every real model: 0.5 to 500 looks, a bias of a few
    # nepers, scales of 0.5 to 10 (the default 2) still load.
    for looks, bias, scale in [(0.5, 1.27, 0.5), (500.0, -3.0, 10.0), ([1.0, 16.0], 0.0, 2.0)]:
        def change(d, looks=looks, bias=bias, scale=scale):
            d.update(looks=looks)
            d["normalisation"].update(log_bias=bias, log_scale=scale)
        model = load_model_file(_with_description(good, tmp_path / "ok.safetensors", change))
        assert model.looks == looks and model.log_bias == bias and model.log_scale == scale


def test_non_finite_weights_are_not_saved(tmp_path):
    model = Despeckler(create_model("logcnn-xs"), looks=1)
    with torch.no_grad():
        model.network.body[0].bias[0] = math.nan
    with pytest.raises(InputError, match="body.0.bias holds NaN"):
        save_model_file(tmp_path / "m.safetensors", model)
    assert list(tmp_path.iterdir()) == []


# ----------------------------------------------------------------------------- defect 8: sizes

@pytest.mark.parametrize("kwargs, match", [
    ({"depth": 300000}, "depth = 300000 exceeds the limit"),
    ({"width": 100000000}, "width = 100000000 exceeds the limit"),
    ({"dilations": [1] * 100000, "depth": 100}, "dilations has 100000 entries"),
    ({"depth": 128, "width": 512}, "parameters; at most"),
    ({"depth": 34, "dilations": [64] * 32}, "receptive field of"),
    ({"width": math.nan}, "width = nan exceeds"),
])
def test_huge_architectures_are_refused_before_building(kwargs, match):
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    start = time.perf_counter()
    with pytest.raises(InputError, match=match):
        create_model("logcnn-s", **kwargs)
    # Refused in well under a second and without touching memory: building the 300000-layer
    # network would take minutes and tens of GB (measured before the fix: killed at 8 GB).
    assert time.perf_counter() - start < 1.0
    assert resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before < 50_000  # KiB


def test_huge_unet_widths_are_refused():
    with pytest.raises(InputError, match="widths has 100000 entries"):
        create_model("unet-s", widths=[16] * 100000)
    with pytest.raises(InputError, match="pools to a grid|receptive field"):
        create_model("unet-s", widths=[4] * 20)
    with pytest.raises(InputError, match="nested lists"):
        create_model("unet-s", widths=[[16], [32]])


def test_registered_variants_fit_the_ceilings():
    for name in registry.list_models():
        shapes = registry.weight_shapes(name)
        assert sum(math.prod(s) for s in shapes.values()) <= registry.MAX_PARAMETERS
        net = create_model(name)
        assert {k: tuple(v.shape) for k, v in net.state_dict().items()} == shapes


@pytest.mark.parametrize("change, match", [
    (lambda d: d["architecture"]["kwargs"].update(depth=300000), "depth = 300000 exceeds the limit"),
    (lambda d: d["architecture"]["kwargs"].update(width=100000000), "width = 100000000 exceeds the limit"),
    (lambda d: d["architecture"]["kwargs"].update(depth=40), "do not fit architecture 'logcnn-xs' (missing ['body."),
    (lambda d: d["architecture"]["kwargs"].update(width=17), "body.0.bias has shape [16], expected [17]"),
])
def test_model_header_is_checked_before_building(good, tmp_path, monkeypatch, change, match):
    def no_build(*args, **kwargs):
        raise AssertionError("a network was built before the header was checked")

    monkeypatch.setattr(modelfile, "create_model", no_build)
    start = time.perf_counter()
    _one_line(_with_description(good, tmp_path / "arch.safetensors", change), match)
    assert time.perf_counter() - start < 1.0


def test_stored_tensor_shapes_are_checked_before_reading(good, tmp_path, monkeypatch):
    # A tensor of another shape or type than the header's architecture: refused from the
    # tensor table alone, the weights are never read.
    header, _ = _parts(good)
    for name, tensor, match in [
        ("shape", torch.zeros(16, 16, 5, 5), "body.2.weight has shape [16, 16, 5, 5], expected [16, 16, 3, 3]"),
        ("dtype", torch.zeros(16, 16, 3, 3, dtype=torch.int64), "body.2.weight is stored as I64"),
    ]:
        tensors = load_file(str(good))
        tensors["body.2.weight"] = tensor
        out = tmp_path / f"{name}.safetensors"
        save_file(tensors, str(out), metadata=header["__metadata__"])
        with monkeypatch.context() as m:
            m.setattr("safetensors.torch.load_file", lambda *a, **k: pytest.fail("weights were read"))
            _one_line(out, match)
    # A table whose offsets do not match the data is refused by the safetensors reader.
    header["body.2.weight"]["shape"] = [4096, 4096, 3, 3]
    _one_line(_write(tmp_path / "table.safetensors", header, _parts(good)[1]), "not a readable safetensors")


def test_deeply_nested_header_is_refused(good, tmp_path):
    header, data = _parts(good)
    desc = header["__metadata__"]["despeck"]
    # json.dumps cannot even write this (RecursionError), so splice it into the text.
    deep = desc[:-1] + ', "training": ' + "[" * 100000 + "]" * 100000 + "}"
    header["__metadata__"]["despeck"] = deep
    _one_line(_write(tmp_path / "deep.safetensors", header, data), "nested more than")
    # Nesting below Python's recursion limit but beyond any real description: refused too.
    header["__metadata__"]["despeck"] = desc[:-1] + ', "training": ' + "[" * 200 + "]" * 200 + "}"
    _one_line(_write(tmp_path / "deep2.safetensors", header, data), "nested more than")


def test_oversized_header_is_refused(good, tmp_path):
    raw = good.read_bytes()
    claims = tmp_path / "claims.safetensors"
    claims.write_bytes((2 ** 40).to_bytes(8, "little") + raw[8:])
    _one_line(claims, "declares a 1099511627776-byte header")
    header, data = _parts(good)
    header["__metadata__"]["padding"] = "x" * (modelfile.MAX_HEADER_BYTES + 1)
    _one_line(_write(tmp_path / "big.safetensors", header, data), "byte header")


# ----------------------------------------------------------------------------- defect 1: full disk

def test_full_disk_while_saving_leaves_nothing(tmp_path):
    # A file-size limit makes write() fail with EFBIG like a full disk fails with ENOSPC
    # (Python ignores SIGXFSZ, so the error reaches the writer: common practice).
    model = Despeckler(create_model("logcnn-xs"), looks=1)
    soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
    resource.setrlimit(resource.RLIMIT_FSIZE, (16_000, hard))
    try:
        with pytest.raises(ModelFileError) as info:
            save_model_file(tmp_path / "m.safetensors", model)
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
    text = str(info.value)
    assert "m.safetensors" in text and "the file size limit (ulimit -f) was reached" in text and "\n" not in text
    assert list(tmp_path.iterdir()) == []  # nothing published, no temporary file left
