"""Averaging the network over orientations of each tile (``orientations`` 1, 4, 8)."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
import torch
import torch.nn.functional as F

from despeck.cli import main
from despeck.errors import InputError
from despeck.inference import despeckle_array
from despeck.models import (ORIENTATIONS, Despeckler, bundled_model_path, create_model, load_model_file,
                            save_model_file)
from despeck.models.orientations import average_over_orientations

torch.set_num_threads(2)


def _asymmetric_conv(seed=0):
    g = torch.Generator().manual_seed(seed)
    kernel = torch.randn(1, 4, 5, 3, generator=g)  # no symmetry: every orientation sees another filter

    def run(x, cond):
        y = F.conv2d(x, kernel, padding=(2, 1))
        return y if cond is None else y + cond[:, 1, None, None, None] - 2 * cond[:, 2, None, None, None]
    return run


def _dihedral_mean_numpy(run, z, cond, transposes):
    # The dihedral group of the square (common practice) written with numpy's rot90 and
    # transpose, independently of the flips the package uses: the rotations by k * 90
    # degrees (4), and with ``transposes`` the rotations of the transpose too (8). A
    # transposed view swaps rows and columns, so its row and column correlations swap.
    out = []
    for transposed in (False, True)[: 1 + transposes]:
        a = np.swapaxes(z, 2, 3) if transposed else z
        c = cond[:, [0, 2, 1]] if transposed else cond
        for k in range(4) if transposes else (0, 2):
            y = run(torch.from_numpy(np.ascontiguousarray(np.rot90(a, k, axes=(2, 3)))), c).numpy()
            y = np.rot90(y, -k, axes=(2, 3))
            out.append(np.swapaxes(y, 2, 3) if transposed else y)
    return np.mean(out, axis=0)


def test_eight_orientations_are_the_dihedral_group_and_swap_the_correlations():
    rng = np.random.default_rng(0)
    z = rng.standard_normal((2, 4, 24, 17)).astype(np.float32)  # not square: transposes change the shape
    cond = torch.tensor([[0.5, 0.3, 0.1], [0.2, 0.0, 0.6]])
    run = _asymmetric_conv()
    got = average_over_orientations(run, torch.from_numpy(z), cond, 8).numpy()
    np.testing.assert_allclose(got, _dihedral_mean_numpy(run, z, cond, True), rtol=1e-5, atol=1e-5)
    assert not np.allclose(got, run(torch.from_numpy(z), cond).numpy(), atol=1e-3)  # it did average something
    # The conditioning part: half the orientations see the rows' correlation where the
    # columns' was, so the constant term averages to (rows + cols) / 2 * (1 - 2).
    const = average_over_orientations(lambda x, c: run(torch.zeros_like(x), c), torch.from_numpy(z), cond, 8)
    np.testing.assert_allclose(const[:, 0, 0, 0].numpy(), (-(0.3 + 0.1) / 2, -(0.0 + 0.6) / 2), atol=1e-6)


def test_four_orientations_are_the_flips_and_one_is_the_network_itself():
    z = torch.randn(1, 4, 20, 20)
    cond = torch.tensor([[0.5, 0.3, 0.1]])
    run = _asymmetric_conv(1)
    flips = [run(z, cond), run(z.flip(2), cond).flip(2), run(z.flip(3), cond).flip(3), run(z.flip(2, 3), cond).flip(2, 3)]
    torch.testing.assert_close(average_over_orientations(run, z, cond, 4), sum(flips) / 4)
    # rows and columns reversed together is the rotation by 180 degrees (common practice)
    torch.testing.assert_close(flips[3], torch.from_numpy(
        np.ascontiguousarray(np.rot90(run(torch.from_numpy(np.ascontiguousarray(np.rot90(z.numpy(), 2, (2, 3)))),
                                          cond).numpy(), -2, (2, 3)))))
    torch.testing.assert_close(average_over_orientations(run, z, cond, 1), run(z, cond))
    for bad in (0, 2, 3, True, "8"):
        with pytest.raises(InputError, match="orientations must be one of 1, 4, 8"):
            average_over_orientations(run, z, cond, bad)
    assert ORIENTATIONS == (1, 4, 8)


def test_starter_with_eight_orientations_keeps_the_mean_of_a_homogeneous_area():
    # Radiometry: on a constant area under unit-mean Gamma speckle (Oliver & Quegan 1998,
    # "Understanding Synthetic Aperture Radar Images", ch. 4) the averaged estimate keeps
    # the mean within 0.1 dB, as the single pass does, and tiled runs agree with the
    # whole array (the average is taken per tile before blending).
    model = load_model_file(bundled_model_path("starter"))
    rng = np.random.default_rng(3)
    noisy = (2.5 * rng.gamma(4.0, 1 / 4.0, (256, 256))).astype(np.float32)
    one = despeckle_array(noisy, model, looks=4.0, correlation=(0.0, 0.0), progress=False, bf16=False)
    eight = despeckle_array(noisy, model, looks=4.0, correlation=(0.0, 0.0), progress=False, bf16=False,
                            orientations=8)
    for est in (one, eight):
        assert abs(10 * np.log10(est.mean() / 2.5)) < 0.1
    assert abs(10 * np.log10(eight.mean() / one.mean())) < 0.02
    assert np.var(np.log(eight)) < np.var(np.log(one))  # less residual fluctuation
    tiled = despeckle_array(noisy, model, looks=4.0, correlation=(0.0, 0.0), progress=False, bf16=False,
                            orientations=8, tile=200, overlap=150)
    assert np.abs(np.log(tiled / eight)).max() < 0.05


def test_cli_orientations_are_recorded_and_bad_values_refused(tmp_path, capsys):
    rng = np.random.default_rng(1)
    data = (rng.gamma(1.0, 1.0, (48, 48)) + 0.01).astype(np.float32)
    src = tmp_path / "s.tif"
    with rasterio.open(src, "w", driver="GTiff", width=48, height=48, count=1, dtype="float32") as ds:
        ds.write(data, 1)
        ds.update_tags(LOOKS="1")
    model = tmp_path / "m.safetensors"
    save_model_file(model, Despeckler(create_model("logcnn-xs"), looks=1), units="intensity")
    for option, recorded in (([], None), (["--orientations", "4"], "orientations=4")):
        out = tmp_path / f"o{len(option)}.tif"
        assert main(["apply", str(src), "--model", str(model), "--out", str(out), "--quiet", *option]) == 0
        with rasterio.open(out) as ds:
            tag = ds.tags()["despeck_options"]
        assert (recorded in tag) if recorded else ("orientations" not in tag)
    capsys.readouterr()
    with pytest.raises(SystemExit) as exc:
        main(["apply", str(src), "--model", str(model), "--out", str(tmp_path / "bad.tif"), "--orientations", "3"])
    assert exc.value.code == 2 and "--orientations" in capsys.readouterr().err
    assert not (tmp_path / "bad.tif").exists()
    with pytest.raises(InputError, match="orientations must be one of"):
        despeckle_array(data, load_model_file(model), orientations=2, progress=False)
