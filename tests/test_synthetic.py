"""The procedural scenes keep the promises their layout makes."""

import numpy as np
import pytest

from despeck.errors import InputError
from despeck.synthetic import make_scene


def test_same_seed_same_scene():
    a = make_scene((96, 128), rng=7)
    b = make_scene((96, 128), rng=7)
    c = make_scene((96, 128), rng=8)
    assert a.dtype == np.float32 and a.shape == (96, 128)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_layout_boxes_are_constant_and_points_are_isolated():
    scene, layout = make_scene((256, 256), rng=1, return_layout=True)
    assert layout.homogeneous_boxes and layout.points
    for r0, c0, r1, c1 in layout.homogeneous_boxes:
        box = scene[r0:r1, c0:c1]
        assert r1 - r0 >= 16 and c1 - c0 >= 16
        # homogeneous by construction: one value in the whole box
        assert np.ptp(box) <= 1e-6 * box.max()
    for r, c in layout.points:
        neighbourhood = scene[max(r - 5, 0) : r + 6, max(c - 5, 0) : c + 6].copy()
        peak = scene[r, c]
        neighbourhood[neighbourhood == peak] = 0
        # at least 15 dB above everything within five pixels: the lower end of make_scene's
        # point_gain_db (15-25 dB), a design choice of the generator (project choice)
        assert 10 * np.log10(peak / neighbourhood.max()) >= 15 - 1e-4


def test_backscatter_in_plausible_range():
    scene = make_scene((128, 128), rng=2)
    db = 10 * np.log10(scene)
    # common practice for C-band land scenes (values from memory): calm open water near -25 dB,
    # vegetation around -15 to -5 dB, point targets above +10 dB; the bounds below are loose
    assert db.min() > -30 and np.median(db) < 0 and db.max() < 40


def test_too_small_is_refused():
    with pytest.raises(InputError, match="64x64"):
        make_scene((32, 200), rng=0)
