"""The validity mask: finite, positive, inside the caller's mask (the Units contract of DEVELOPERS.md; common practice)."""

import numpy as np
import pytest

from despeck.errors import InputError
from despeck.validity import valid_mask


def test_valid_means_finite_positive_and_inside_the_mask():
    values = np.array([2.0, 0.0, -1.0, np.nan, np.inf, -np.inf, 1e-30, 5.0], dtype=np.float32)
    np.testing.assert_array_equal(valid_mask(values), [True, False, False, False, False, False, True, True])
    mask = np.array([1, 1, 1, 1, 1, 1, 1, 0], dtype=bool)
    np.testing.assert_array_equal(valid_mask(values, mask), [True, False, False, False, False, False, True, False])
    assert valid_mask(np.arange(6.0).reshape(2, 3)).shape == (2, 3)


def test_mask_of_another_shape_is_refused_naming_the_values():
    with pytest.raises(InputError, match=r"^scene.tif: mask of shape \(2,\) does not match the values' shape \(3,\)$"):
        valid_mask(np.ones(3), np.ones(2, dtype=bool), what="scene.tif")
