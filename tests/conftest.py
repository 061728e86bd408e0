"""Shared test settings: small thread counts so the suite behaves on a 2-core machine."""

import os

os.environ.setdefault("OMP_NUM_THREADS", "2")

import numpy as np
import pytest


@pytest.fixture
def rng():
    """A fresh, seeded numpy generator per test (same seed, same sample)."""
    return np.random.default_rng(12345)
