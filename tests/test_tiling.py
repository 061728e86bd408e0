"""Tile geometry and blending weights (pure numpy, no model).

Outside references: ``numpy.pad(mode="reflect")`` for border reflection; the Hann
(raised-cosine) window ``w(x) = sin^2(pi x)`` = ``(1 - cos(2 pi x)) / 2`` from Harris,
F. J. (1978), On the use of windows for harmonic analysis with the discrete Fourier
transform, Proc. IEEE 66(1), 51-83, doi:10.1109/PROC.1978.10837; the partition-of-unity
requirement for overlap-add blending is common practice.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from despeck.errors import InputError
from despeck.tiling import AxisTiling, TileGrid, default_tiling, raised_cosine_ramp, reflect_index


@st.composite
def axis_params(draw, max_length=90):
    margin = draw(st.integers(0, 6))
    blend = draw(st.integers(0, 10))
    overlap = 2 * margin + blend
    tile = draw(st.integers(overlap + 1, overlap + 40))
    length = draw(st.integers(1, max_length))
    return length, tile, overlap, margin


# ----------------------------------------------------------------------------- reflection

@given(length=st.integers(1, 30), before=st.integers(0, 100), after=st.integers(0, 100))
@settings(max_examples=60, deadline=None)
def test_reflect_index_matches_numpy_pad_reflect(length, before, after):
    # numpy.pad(mode="reflect") is the reference, including pads longer than the axis.
    x = np.arange(length) * 10 + 3
    expected = np.pad(x, (before, after), mode="reflect")
    got = x[reflect_index(np.arange(-before, length + after), length)]
    np.testing.assert_array_equal(got, expected)


# ----------------------------------------------------------------------------- weights

@pytest.mark.parametrize("width", [1, 2, 7, 32])
def test_ramp_is_hann_half_and_complementary(width):
    x = (np.arange(width) + 0.5) / (2 * width)
    hann = (1 - np.cos(2 * np.pi * x)) / 2  # Harris (1978), Hann window
    ramp = raised_cosine_ramp(width)
    np.testing.assert_allclose(ramp, hann, rtol=0, atol=1e-15)
    np.testing.assert_allclose(ramp + ramp[::-1], 1.0, rtol=0, atol=1e-15)
    assert np.all((ramp > 0) & (ramp < 1))
    assert np.all(np.diff(ramp) > 0)


@given(axis_params())
@settings(max_examples=150, deadline=None)
def test_weights_partition_unity_and_cover_minimally(params):
    length, tile, overlap, margin = params
    axis = AxisTiling(length, tile, overlap, margin)
    total = axis.accumulated_weight
    if axis.blend <= axis.stride:
        # Overlap-add blending sums to one everywhere, borders included: weights are
        # never tapered at a true scene border (common practice).
        np.testing.assert_allclose(total, 1.0, rtol=0, atol=1e-12)
    else:
        # Blend zones of three tiles overlap: no partition of unity, hence the
        # normalisation by the accumulated weight, which must cover every pixel.
        assert np.all(total >= 1.0 - 1e-12)
    # Minimal: one tile fewer would leave the end of the axis uncovered.
    if axis.count > 1:
        assert (axis.count - 2) * axis.stride + tile - 2 * margin < length
    # The first tile is at full weight on the first pixel, the last on the last pixel
    # unless a neighbour shares that pixel.
    assert axis.weights(0)[margin] == 1.0
    for k in range(axis.count):
        w = axis.weights(k)
        assert w.shape == (tile,)
        assert np.all(w[:margin] == 0) and np.all(w[tile - margin:] == 0)
        lo, hi = axis.used_range(k)
        assert lo == min(k * axis.stride, length)
    assert axis.finished(axis.count - 1) == length


@given(axis_params())
@settings(max_examples=100, deadline=None)
def test_source_index_is_reflected_window(params):
    length, tile, overlap, margin = params
    axis = AxisTiling(length, tile, overlap, margin)
    x = np.arange(length)
    pad_after = (axis.count - 1) * axis.stride + tile - margin - length
    padded = np.pad(x, (margin, max(0, pad_after)), mode="reflect")
    for k in range(axis.count):
        np.testing.assert_array_equal(x[axis.source_index(k)], padded[k * axis.stride : k * axis.stride + tile])
        lo, hi = axis.source_range(k)
        assert 0 <= lo < hi <= length


# ----------------------------------------------------------------------------- 2-D grids

@given(rows=axis_params(70), cols=st.integers(1, 70), seed=st.integers(0, 2**31 - 1))
@settings(max_examples=80, deadline=None)
def test_identity_through_tiles_and_blending(rows, cols, seed):
    length, tile, overlap, margin = rows
    grid = TileGrid((length, cols), tile, overlap, margin)
    x = np.random.default_rng(seed).gamma(1.0, 1.0, size=grid.shape).astype(np.float32)
    acc = np.zeros_like(x)
    for i, j in grid.tiles():
        t = grid.extract(x, i, j)
        assert t.shape == grid.tile_shape  # constant tile shape, edges padded
        grid.blend_into(acc, t, i, j)
    np.testing.assert_allclose(acc / grid.accumulated_weight(), x, rtol=2e-6, atol=0)


def test_weight_is_outer_product_and_strip_offsets_agree():
    grid = TileGrid((50, 61), (24, 20), 8, 2)
    np.testing.assert_allclose(grid.weight(1, 2), np.outer(grid.rows.weights(1), grid.cols.weights(2)), rtol=1e-7)
    x = np.random.default_rng(3).random(grid.shape).astype(np.float32)
    lo, hi = grid.rows.source_range(1)
    np.testing.assert_array_equal(grid.extract(x[lo:hi], 1, 2, row_offset=lo), grid.extract(x, 1, 2))
    with pytest.raises(InputError, match="do not contain tile row"):
        grid.extract(x[lo + 1 : hi], 1, 2, row_offset=lo + 1)


def test_fitted_shrinks_tiles_without_adding_any():
    grid = TileGrid.fitted((8192, 300), 1024, 32, 10)
    # The example in the docstring: 9 tiles of 944 instead of 9 of 1024 along 8192.
    assert grid.rows.count == AxisTiling(8192, 1024, 32, 10).count == 9
    assert grid.tile_shape[0] == 944
    assert grid.tile_shape[1] == 320 and grid.cols.count == 1
    for n in (1, 7, 100, 1000, 5000):
        fitted = TileGrid.fitted((n, n), 512, 40, 12, multiple=4)
        assert fitted.rows.count == AxisTiling(n, 512, 40, 12).count
        assert fitted.tile_shape[0] <= 512 and fitted.tile_shape[0] % 8 == 0
        assert fitted.rows.stride % 4 == 0


@pytest.mark.parametrize(
    "shape, tile, overlap, margin, match",
    [
        ((10, 10), 16, 16, 0, "smaller than the tile size"),
        ((10, 10), 16, 5, 3, "receptive field minus one"),
        ((10, 10), 6, 0, 3, "larger than the model's receptive field"),
        ((0, 10), 16, 4, 1, "at least 1 pixel"),
        ((10,), 16, 4, 1, "rows, cols"),
        ((10, 10), 2.5, 0, 0, "positive integer"),
    ],
)
def test_bad_geometry_raises_one_line(shape, tile, overlap, margin, match):
    with pytest.raises(InputError, match=match) as info:
        TileGrid(shape, tile, overlap, margin)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("rf, multiple", [(1, 1), (13, 1), (21, 1), (35, 1), (21, 2), (111, 8)])
def test_default_tiling_respects_receptive_field(rf, multiple):
    tile, overlap = default_tiling(rf, multiple)
    assert overlap >= rf - 1 + 8
    assert overlap % multiple == 0 and tile % multiple == 0
    assert 256 <= tile <= 1024 and tile > overlap
    # Recomputed overlap costs at most a third of the work (the largest U-Net's case).
    assert ((tile - overlap) / tile) ** 2 >= 0.66
