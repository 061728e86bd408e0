"""Helpers shared by the self-supervised training tests (imported by them; holds no test)."""

from __future__ import annotations

import numpy as np
import rasterio
from affine import Affine

from despeck.training import config_from_dict

#: The invented local grid of the tests' little scenes (10 m pixels).
TRANSFORM = Affine(10.0, 0.0, 5000.0, 0.0, -10.0, 9000.0)


def write_tif(path, array, *, transform=TRANSFORM, nodata=None):
    """One band as a float32 (or complex64) GeoTIFF; returns the path as a string."""
    array = np.asarray(array)
    dtype = "complex64" if np.iscomplexobj(array) else "float32"
    with rasterio.open(path, "w", driver="GTiff", height=array.shape[0], width=array.shape[1], count=1,
                       dtype=dtype, nodata=nodata, transform=transform) as dst:
        dst.write(array.astype(dtype), 1)
    return str(path)


def tiny_pair_config(out, **data):
    """A tiny pair-training config: logcnn-xs, 32-pixel patches, 4 epochs of 8 steps, one thread."""
    return config_from_dict({
        "data": {"patch_size": 32, "batch_size": 8, "patches_per_epoch": 64, "val_patches": 16,
                 "val_fraction": 0.34, **data},
        "model": {"name": "logcnn-xs"},
        "speckle": {"looks": 1},
        "loss": {"name": "mse_log", "target": "noisy"},
        "optim": {"lr": 0.002, "schedule": "constant"},
        "budget": {"max_epochs": 4},
        "trainer": {"seed": 0, "threads": 1, "progress": False, "log_every_n_steps": 4},
        "output": {"dir": str(out)},
    })
