"""The one streaming engine (:mod:`despeck.raster.streaming`): strips, halo, border rule, output, and its users.

Outside references: ``numpy.pad`` modes ``'symmetric'`` and ``'edge'`` for the border
rule; rasterio reads the written files back; Python's ``tracemalloc`` measures the
engine's own buffers. That ``simulate``, ``filter`` and ``apply`` share one engine is
the package's design (DEVELOPERS.md, "Layout and layers"), checked by spying on its
entry point.
"""

import tracemalloc

import numpy as np
import pytest
import rasterio
import torch
from affine import Affine

from despeck import filters, raster
from despeck.cli import main
from despeck.models import Despeckler, create_model, save_model_file
from despeck.raster import streaming
from despeck.raster.streaming import RasterStream, open_stream, strip_rows

torch.set_num_threads(1)


def _tif(path, data, *, nodata=None, block=None, tags=None):
    data = np.asarray(data, dtype=np.float32)
    data = data[None] if data.ndim == 2 else data
    profile = dict(driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0], dtype="float32",
                   crs="EPSG:32631", transform=Affine(10, 0, 512000, 0, -10, 6120000), nodata=nodata)
    if block:
        profile.update(tiled=True, blockxsize=block, blockysize=block)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data)
        ds.update_tags(**(tags or {"CAMPAIGN": "Lake Varden streaming test"}))
    return path


def _clean(shape):
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    return (1.0 + 0.5 * np.sin(xx / 7.0) * np.cos(yy / 11.0)).astype(np.float32)


def _speckled(rng, shape):
    return (_clean(shape) * rng.gamma(1.0, 1.0, shape)).astype(np.float32)


def test_strips_end_where_the_blocks_end():
    # Block alignment (the engine's own rule): whole block rows, or an exact fraction of one.
    assert strip_rows(5000, 4096, 512) == 512  # 2 MP budget / 4096 columns
    assert strip_rows(5000, 16384, 512) == 128  # a quarter of a block row
    assert strip_rows(5000, 3000, 512) == 512  # 699 rows wanted: rounded down to a block row
    assert strip_rows(5000, 100, 512, rows=1300) == 1024
    assert strip_rows(70, 64, 512, rows=14) == 16  # up to the next divisor of 512
    assert strip_rows(700, 64, 512, rows=900) == 700  # the whole scene in one strip
    for rows in range(1, 600):
        n = strip_rows(10**6, 64, 512, rows=rows)
        assert (n % 512 == 0) if n >= 512 else (512 % n == 0)


@pytest.mark.parametrize("shape, halo, mode", [((70, 50), (5, 5), "symmetric"), ((70, 50), (5, 0), "symmetric"),
                                               ((3, 40), (5, 5), "edge"), ((40, 4), (2, 6), "edge")])
def test_halo_follows_the_border_rule(tmp_path, shape, halo, mode):
    # Reference: numpy.pad with mode 'symmetric' (mirror, border pixel first), or 'edge'
    # when the scene is smaller than the halo along either axis.
    data = np.arange(1, shape[0] * shape[1] + 1, dtype=np.float32).reshape(shape)
    src = _tif(tmp_path / "in.tif", data)
    padded = np.pad(data, ((halo[0],) * 2, (halo[1],) * 2), mode=mode)
    seen = []

    def check(strip):
        rows = slice(strip.row0, strip.row1 + 2 * halo[0])
        np.testing.assert_array_equal(strip.intensity, padded[rows])
        inside, valid, own = strip.scene_part()
        np.testing.assert_array_equal(inside[own], data[strip.row0:strip.row1])
        seen.append((strip.row0, strip.row1))
        return strip.intensity[strip.core]

    with open_stream(src, tmp_path / "out.tif", units="intensity", progress=False) as stream:
        stream.create_output()
        stream.map_strips(check, halo=halo, rows=16)
    assert seen[0][0] == 0 and seen[-1][1] == shape[0]
    assert all(a[1] == b[0] for a, b in zip(seen, seen[1:]))
    with rasterio.open(tmp_path / "out.tif") as ds:
        np.testing.assert_array_equal(ds.read(1), data)


def test_strips_shorter_than_a_block_row_are_staged_into_whole_blocks(rng, tmp_path):
    # 16-row strips into 512-row output blocks: the rows are held until a block row is
    # complete, so no compressed block is written twice. A block written twice would
    # leave its first copy in the file (GDAL appends the new one), so the file could not
    # be byte for byte the size of the same output written in one strip.
    data = _speckled(rng, (1100, 96))
    data[300:340, 10:30] = 0.0
    src = _tif(tmp_path / "in.tif", data, nodata=0.0, block=32)
    sizes = {}
    for rows in (16, 1100):
        out = tmp_path / f"out_{rows}.tif"
        with open_stream(src, out, progress=False) as stream:
            stream.create_output()
            stream.map_strips(lambda s: s.intensity, rows=rows)
        with rasterio.open(out) as ds:
            np.testing.assert_array_equal(ds.read(1), data)
            assert ds.nodata == 0.0
        sizes[rows] = out.stat().st_size
    assert sizes[16] == sizes[1100]


def test_a_failing_strip_function_leaves_nothing_at_the_destination(rng, tmp_path):
    src = _tif(tmp_path / "in.tif", _speckled(rng, (200, 64)))

    def fail(strip):
        if strip.row0 > 0:
            raise RuntimeError("strip function failed")
        return strip.intensity

    with pytest.raises(RuntimeError, match="strip function failed"):
        with open_stream(src, tmp_path / "out.tif", progress=False) as stream:
            stream.create_output()
            stream.map_strips(fail, rows=64)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.tif"]


def test_simulate_filter_and_apply_share_the_engine(rng, tmp_path, monkeypatch):
    calls = []
    original = RasterStream.map_strips

    def spy(self, func, **kwargs):
        calls.append((self.in_path.name, self.writer.path.name, kwargs.get("band", 1), kwargs.get("halo", 0)))
        return original(self, func, **kwargs)

    monkeypatch.setattr(RasterStream, "map_strips", spy)
    clean = _tif(tmp_path / "clean.tif", _clean((90, 70)))
    noisy = _tif(tmp_path / "noisy.tif", np.stack([_speckled(rng, (90, 70)), 2 * _speckled(rng, (90, 70))]),
                 tags={"LOOKS": "1"})
    torch.manual_seed(0)
    model = tmp_path / "m.safetensors"
    save_model_file(model, Despeckler(create_model("logcnn-xs"), looks=1), units="intensity")
    commands = {
        "sim.tif": ["simulate", clean, tmp_path / "sim.tif", "--looks", "2", "--correlated", "--seed", "1", "--quiet"],
        "lee.tif": ["filter", "lee", noisy, tmp_path / "lee.tif", "--quiet"],
        "clean_noisy.tif": ["apply", noisy, "--model", model, "--out", tmp_path / "clean_noisy.tif", "--threads", "1",
                            "--quiet"],
    }
    for name, argv in commands.items():
        assert main([str(a) for a in argv]) == 0, name
        with rasterio.open(tmp_path / name) as ds:
            assert np.isfinite(ds.read()).all()
    by_output = {name: [c for c in calls if c[1] == name] for name in commands}
    # simulate: one band, a halo of the system response; filter: each band, a halo of
    # the window's reach (rows only); apply: each band, no halo (its tiles reflect inside the blend)
    assert [c[2] for c in by_output["sim.tif"]] == [1] and by_output["sim.tif"][0][3] > 0
    assert [c[2] for c in by_output["lee.tif"]] == [1, 2] and by_output["lee.tif"][0][3] == (3, 0)
    assert [c[2] for c in by_output["clean_noisy.tif"]] == [1, 2] and by_output["clean_noisy.tif"][0][3] == 0
    assert len(calls) == 5


def test_engine_buffers_do_not_grow_with_the_scene_height(rng, tmp_path, monkeypatch):
    # tracemalloc counts numpy's buffers (not GDAL's cache): from the output's creation to
    # its publication, the strips, the staged block row, the writer's temporaries and its
    # read-back. Eight times the rows, the same peak (to 15 %, a project tolerance for
    # Python's own small allocations). Budgets of 64 rows make many strips of these
    # small scenes; opening the input (its units probe, bounded on its own) is left out.
    monkeypatch.setattr(streaming, "STRIP_PIXELS", 64 * 128)
    monkeypatch.setattr(filters.engine, "STRIP_PIXELS", 64 * 128)
    create_output = RasterStream.create_output

    def measured(self, *args, **kwargs):
        writer = create_output(self, *args, **kwargs)
        tracemalloc.reset_peak()
        return writer

    monkeypatch.setattr(RasterStream, "create_output", measured)
    row = _speckled(rng, (64, 128))
    peaks = {}
    for height in (512, 4096):
        src = _tif(tmp_path / f"in_{height}.tif", np.tile(row, (height // 64, 1)), block=64)
        runs = {
            "process_file": lambda: raster.process_file(src, tmp_path / f"sim_{height}.tif",
                                                        lambda i, v, r, c: i[3:-3, 3:-3], halo=3, progress=False),
            "lee": lambda: filters.filter_raster("lee", src, tmp_path / f"lee_{height}.tif", looks=1, progress=False,
                                                 workers=1),
        }
        for name, run in runs.items():
            tracemalloc.start()
            try:
                run()
                peaks[name, height] = tracemalloc.get_traced_memory()[1]
            finally:
                tracemalloc.stop()
    for name in ("process_file", "lee"):
        assert peaks[name, 4096] <= 1.15 * peaks[name, 512], (name, peaks)
