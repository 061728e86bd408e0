"""Outputs appear whole or not at all, with ordinary file permissions."""

import os
import stat

import numpy as np

from despeck import raster
from despeck.atomic import publish, sibling_temp


def test_publish_gives_umask_permissions_and_renames(tmp_path):
    dest = tmp_path / "out.bin"
    tmp = sibling_temp(dest)
    assert tmp.parent == tmp_path and tmp.name.startswith(".out.bin.")
    tmp.write_bytes(b"x")
    old = os.umask(0o022)
    try:
        publish(tmp, dest)
    finally:
        os.umask(old)
    assert not tmp.exists() and dest.read_bytes() == b"x"
    # common practice: a new file gets 0o666 less the umask (0o644 with umask 022)
    assert stat.S_IMODE(dest.stat().st_mode) == 0o644


def test_written_raster_is_readable_by_others(tmp_path):
    import rasterio
    from rasterio.transform import from_origin

    src = tmp_path / "in.tif"
    with rasterio.open(src, "w", driver="GTiff", width=8, height=8, count=1, dtype="float32",
                       transform=from_origin(0, 80, 10, 10)) as d:
        d.write(np.ones((1, 8, 8), np.float32))
    old = os.umask(0o022)
    try:
        out = raster.write_scene(tmp_path / "out.tif", np.full((8, 8), 2.0, np.float32),
                                 raster.read_scene(src, units="intensity"), units="intensity")
    finally:
        os.umask(old)
    assert stat.S_IMODE(out.stat().st_mode) & 0o044 == 0o044
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]
