"""Raster I/O: units, detection, GeoTIFF round trips, windows, streaming, and refusals.

Expected values come from the definition of the decibel and of intensity as the
squared modulus (common practice; Oliver & Quegan 1998, Understanding Synthetic
Aperture Radar Images), from rasterio/GDAL reading the files back independently,
and, where Debian's gdal-bin is installed, from the ``gdalinfo`` program.
"""

import json
import os
import shutil
import subprocess

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from rasterio.windows import Window

from despeck import raster
from despeck.errors import InputError, RasterError

CRS = "EPSG:32631"
TRANSFORM = from_origin(421000.0, 5012000.0, 10.0, 10.0)


def make_tif(path, data, *, dtype="float32", nodata=None, descriptions=None, tags=None, **extra):
    data = np.asarray(data)
    if data.ndim == 2:
        data = data[None]
    profile = dict(driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0], dtype=dtype,
                   crs=CRS, transform=TRANSFORM, nodata=nodata, **extra)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data.astype(dtype) if "complex" not in dtype else data)
        for i, d in enumerate(descriptions or (), start=1):
            ds.set_band_description(i, d)
        if tags:
            ds.update_tags(**tags)
    return path


# --------------------------------------------------------------------------- pure conversions

def test_to_intensity_definitions():
    # Definitions (common practice): dB = 10 log10(I); A = sqrt(I); I = |z|^2 = I^2 + Q^2.
    i, v = raster.to_intensity(np.array([10.0, -3.0103, 0.0]), "db")
    np.testing.assert_allclose(i, [10.0, 0.5, 1.0], rtol=1e-4)
    assert v.all()
    i, v = raster.to_intensity(np.array([2.0, 0.0, -1.0, np.nan]), "amplitude")
    np.testing.assert_allclose(i, [4.0, 0.0, 0.0, 0.0])
    np.testing.assert_array_equal(v, [True, False, False, False])
    i, v = raster.to_intensity(np.array([3 + 4j, 0j]), "complex")
    np.testing.assert_allclose(i, [25.0, 0.0])
    np.testing.assert_array_equal(v, [True, False])
    i, _ = raster.to_intensity(np.array([[3.0], [4.0]]), "complex")  # in-phase, quadrature on axis 0
    np.testing.assert_allclose(i, [25.0])
    i, v = raster.to_intensity(np.array([2.0, np.inf, -1.0]), "intensity")
    np.testing.assert_array_equal(v, [True, False, False])
    assert i.dtype == np.float32 and np.all(np.isfinite(i))


@pytest.mark.parametrize("units", ["intensity", "amplitude", "db"])
def test_from_intensity_inverts_to_intensity(units, rng):
    intensity = rng.gamma(2.0, 0.5, 1000).astype(np.float32) + 1e-3
    back, valid = raster.to_intensity(raster.from_intensity(intensity, units), units)
    assert valid.all()
    np.testing.assert_allclose(back, intensity, rtol=1e-5)


def test_complex_is_not_an_output_unit():
    with pytest.raises(InputError, match="complex"):
        raster.from_intensity(np.ones(3), "complex")
    with pytest.raises(InputError, match="units"):
        raster.to_intensity(np.ones(3), "power")


def test_detect_units_rules(rng):
    db = 10 * np.log10(rng.gamma(1, 0.05, 5000))
    assert raster.detect_units(np.ones(3), dtype="complex_int16").units == "complex"
    assert raster.detect_units(db).units == "db"
    decision = raster.detect_units(rng.gamma(1, 1, 5000))
    assert decision.units == "intensity" and not decision.detected
    iq = rng.standard_normal((2, 5000))
    assert raster.detect_units(iq, band_count=2).units == "complex"
    assert raster.detect_units(np.abs(iq), band_count=2, descriptions=("I", "Q")).units == "complex"
    assert raster.detect_units(np.abs(iq), band_count=2, descriptions=("VV", "VH")).units == "intensity"
    assert raster.detect_units(np.ones(200), band_units=("dB",)).units == "db"
    few_negative = np.concatenate([np.ones(990), -np.ones(10)])
    with pytest.raises(InputError, match="negative"):
        raster.detect_units(few_negative, name="x.tif")
    with pytest.raises(InputError, match="negative"):
        raster.detect_units(db, declared="intensity", name="x.tif")
    with pytest.raises(InputError, match="complex"):
        raster.detect_units(np.ones(100), declared="complex", band_count=1, name="x.tif")
    with pytest.raises(InputError, match="complex"):
        raster.detect_units(np.ones(3), dtype="complex64", declared="db")
    assert raster.detect_units(rng.uniform(1, 30, 500), declared="db").warnings  # dB never negative: doubtful
    assert raster.detect_units(rng.uniform(-25, -5, 500) + 40, declared="intensity").warnings  # narrow range


# --------------------------------------------------------------------------- round trips

def test_geotiff_round_trip_keeps_georeferencing(tmp_path, rng):
    data = rng.gamma(1.0, 0.1, (2, 300, 520)).astype(np.float32)
    data[:, :5, :] = -9999.0
    src = make_tif(tmp_path / "scene.tif", data, nodata=-9999.0, descriptions=("VV", "VH"),
                   tags={"CAMPAIGN": "Lake Orrin survey"})
    out = tmp_path / "sub" / "result.tif"
    with raster.open_scene(src) as reader:
        assert reader.band_count == 2 and reader.units == "intensity"
        with raster.open_output(out, reader) as writer:
            for band in (1, 2):
                for w in reader.block_windows(band):
                    intensity, valid = reader.read(w, band)
                    writer.write(intensity, w, band=band, valid=valid)
    # Read back independently with rasterio (GDAL).
    with rasterio.open(src) as a, rasterio.open(out) as b:
        assert b.crs == a.crs
        assert b.transform == a.transform
        assert b.nodata == a.nodata == -9999.0
        assert b.dtypes == ("float32", "float32")
        assert b.descriptions == ("VV", "VH")
        assert b.tags()["CAMPAIGN"] == "Lake Orrin survey"
        np.testing.assert_array_equal(b.read(), a.read())
        structure = b.tags(ns="IMAGE_STRUCTURE")
        assert structure["COMPRESSION"] == "DEFLATE" and structure["PREDICTOR"] == "3"
        assert b.block_shapes[0] == (512, 512)
    assert not [p for p in out.parent.iterdir() if p.name != "result.tif"]  # no temporary file left


@pytest.mark.skipif(shutil.which("gdalinfo") is None,
                    reason="gdalinfo (Debian gdal-bin) not installed; scripts/test.sh installs it when run as root")
def test_gdalinfo_reads_our_georeferencing(tmp_path, rng):
    # Debian gdal-bin's gdalinfo, a program outside the project, reads the output on its own.
    data = rng.gamma(1.0, 0.1, (40, 60)).astype(np.float32)
    data[:3] = -9999.0
    src = make_tif(tmp_path / "scene.tif", data, nodata=-9999.0, descriptions=("VV",))
    scene = raster.read_scene(src)
    out = raster.write_scene(tmp_path / "result.tif", scene.intensity, scene, valid=scene.valid)
    report = json.loads(subprocess.run(["gdalinfo", "-json", str(out)], capture_output=True, text=True,
                                       check=True).stdout)
    assert report["bands"][0]["description"] == "VV"
    assert report["bands"][0]["noDataValue"] == -9999.0
    assert report["bands"][0]["type"] == "Float32"
    assert report["geoTransform"] == list(TRANSFORM.to_gdal())
    assert "32631" in report["coordinateSystem"]["wkt"]


def test_write_db_output_and_detect_it_back(tmp_path, rng):
    intensity = rng.gamma(1.0, 0.05, (64, 80)).astype(np.float32)
    src = make_tif(tmp_path / "lin.tif", intensity, nodata=0.0)
    scene = raster.read_scene(src)
    out = raster.write_scene(tmp_path / "db.tif", scene.intensity, scene, units="db", valid=scene.valid)
    with rasterio.open(out) as ds:
        values = ds.read(1)
        assert np.isnan(ds.nodata)  # 0 is a valid dB value, so NaN marks nodata instead
    np.testing.assert_allclose(values, 10 * np.log10(intensity), rtol=1e-5)  # definition of the decibel
    back = raster.read_scene(out)
    assert back.units == "db"  # from the band unit the writer recorded
    np.testing.assert_allclose(back.intensity, intensity, rtol=1e-5)


def test_amplitude_input_is_squared_and_written_back_in_amplitude(tmp_path, rng):
    amplitude = np.sqrt(rng.gamma(2.0, 0.5, (40, 50))).astype(np.float32)
    src = make_tif(tmp_path / "amp.tif", amplitude)
    with raster.open_scene(src, units="amplitude") as reader:
        intensity, _ = reader.read()
        np.testing.assert_allclose(intensity, amplitude**2, rtol=1e-6)
        raster.write_scene(tmp_path / "amp_out.tif", intensity, reader)
    with rasterio.open(tmp_path / "amp_out.tif") as ds:
        np.testing.assert_allclose(ds.read(1), amplitude, rtol=1e-6)


def test_complex_and_iq_files(tmp_path, rng):
    z = (rng.standard_normal((40, 60)) + 1j * rng.standard_normal((40, 60))) * 100
    cint = make_tif(tmp_path / "slc.tif", z.astype(np.complex64)[None], dtype="complex_int16")
    with raster.open_scene(cint) as reader:
        assert reader.units == "complex" and reader.band_count == 1
        intensity, valid = reader.read()
    zi = np.round(z.real) + 1j * np.round(z.imag)  # CInt16 keeps whole numbers
    np.testing.assert_allclose(intensity, np.abs(zi) ** 2, rtol=1e-5)
    iq = make_tif(tmp_path / "iq.tif", np.stack([z.real, z.imag]).round(), dtype="int16", descriptions=("I", "Q"))
    with raster.open_scene(iq) as reader:
        assert reader.units == "complex" and reader.band_count == 1
        np.testing.assert_allclose(reader.read()[0], np.abs(zi) ** 2, rtol=1e-5)
        out = raster.write_scene(tmp_path / "iq_int.tif", reader.read()[0], reader)
    with rasterio.open(out) as ds:
        assert ds.count == 1 and ds.descriptions == (None,)  # "I" does not describe an intensity


def test_read_complex_keeps_the_phase(tmp_path, rng):
    # Reference: rasterio/GDAL reading the same file back (the samples as written).
    z = (rng.standard_normal((30, 50)) + 1j * rng.standard_normal((30, 50))) * 100
    zi = (np.round(z.real) + 1j * np.round(z.imag)).astype(np.complex64)
    zi[0, :5] = 0  # zero samples carry no intensity: invalid
    cint = make_tif(tmp_path / "slc.tif", zi[None], dtype="complex_int16")
    iq = make_tif(tmp_path / "iq.tif", np.stack([zi.real, zi.imag]), dtype="int16", descriptions=("I", "Q"))
    with rasterio.open(cint) as ds:
        expected = ds.read(1).astype(np.complex64)
    for path in (cint, iq):
        with raster.open_scene(path) as reader:
            samples, valid = reader.read_complex()
            part, part_valid = reader.read_complex(Window(10, 5, 20, 10))
        assert samples.dtype == np.complex64
        np.testing.assert_array_equal(samples, expected)
        np.testing.assert_array_equal(valid, expected != 0)
        np.testing.assert_array_equal(part, expected[5:15, 10:30])
        np.testing.assert_array_equal(part_valid, valid[5:15, 10:30])
    real = make_tif(tmp_path / "real.tif", np.abs(zi) ** 2 + 1)
    with raster.open_scene(real) as reader, pytest.raises(InputError, match="real samples"):
        reader.read_complex()


# --------------------------------------------------------------------------- windows

def test_block_and_row_windows_cover_scene(tmp_path, rng):
    data = rng.gamma(1.0, 1.0, (700, 600)).astype(np.float32)
    src = make_tif(tmp_path / "tiled.tif", data, tiled=True, blockxsize=256, blockysize=256)
    with raster.open_scene(src) as reader:
        assert reader.block_shape == (256, 256)
        rebuilt = np.zeros_like(data)
        for w in reader.block_windows():
            assert w.row_off % 256 == 0 and w.col_off % 256 == 0
            rebuilt[w.toslices()] = reader.read(w)[0]
        np.testing.assert_array_equal(rebuilt, data)
        strips = reader.row_windows(min_rows=300)
        assert [int(w.height) for w in strips] == [512, 188]
        assert all(w.row_off % 256 == 0 and w.width == 600 for w in strips)
        sample = reader.sample_intensity(max_pixels=10000)
        assert sample.size <= 10000
        assert sample.mean() == pytest.approx(data.mean(), rel=0.1)
        with pytest.raises(InputError, match="window"):
            reader.read(Window(500, 0, 200, 10))
        with pytest.raises(InputError, match="band"):
            reader.read(band=2)


def test_process_file_identity_with_halo(tmp_path, rng):
    data = rng.gamma(1.0, 1.0, (2, 600, 700)).astype(np.float32)
    data[1, 100:120, 200:260] = 0.0
    src = make_tif(tmp_path / "two_pol.tif", data, nodata=0.0)
    halo = 7

    def crop(intensity, valid, row, col):
        return intensity[halo:-halo, halo:-halo]

    out = raster.process_file(src, tmp_path / "copy.tif", crop, halo=halo, progress=False)
    with rasterio.open(out) as ds:
        np.testing.assert_array_equal(ds.read(), data)
        assert ds.nodata == 0.0


def test_read_with_halo_mirrors_border(tmp_path):
    data = np.arange(1, 101, dtype=np.float32).reshape(10, 10)
    src = make_tif(tmp_path / "small.tif", data)
    with raster.open_scene(src) as reader:
        grown, valid = raster.read_with_halo(reader, Window(0, 0, 4, 4), 2)
    np.testing.assert_array_equal(grown, np.pad(data, 2, mode="symmetric")[:8, :8])
    assert valid.all()


# --------------------------------------------------------------------------- refusals

def test_missing_not_raster_empty_and_all_nodata(tmp_path):
    with pytest.raises(RasterError, match="no such file"):
        raster.open_scene(tmp_path / "absent.tif")
    text = tmp_path / "notes.tif"
    text.write_text("field notes, not an image\n")
    with pytest.raises(RasterError, match="notes.tif"):
        raster.open_scene(text)
    blank = make_tif(tmp_path / "blank.tif", np.full((50, 50), -1.0), nodata=-1.0)
    with pytest.raises(RasterError, match="nodata"):
        raster.open_scene(blank)
    zeros = make_tif(tmp_path / "zeros.tif", np.zeros((50, 50)))
    with pytest.raises(RasterError, match="invalid"):
        raster.open_scene(zeros)


def test_declared_units_checked_against_data(tmp_path, rng):
    db = make_tif(tmp_path / "db.tif", 10 * np.log10(rng.gamma(1, 0.05, (40, 40))))
    with pytest.raises(InputError, match="negative"):
        raster.open_scene(db, units="intensity")
    with pytest.raises(InputError, match="complex"):
        raster.open_scene(db, units="complex")
    with raster.open_scene(db) as reader:
        assert reader.units == "db"
    with pytest.warns(raster.UnitsWarning, match="never negative"):
        raster.open_scene(make_tif(tmp_path / "pos.tif", rng.uniform(1, 9, (40, 40))), units="db").close()


def test_output_refusals(tmp_path, rng):
    src = make_tif(tmp_path / "in.tif", rng.gamma(1, 1, (20, 30)))
    with raster.open_scene(src) as reader:
        with pytest.raises(InputError, match="same as the input"):
            raster.open_output(src, reader, overwrite=True)
        with pytest.raises(InputError, match="complex"):
            raster.open_output(tmp_path / "c.tif", reader, units="complex")
        existing = tmp_path / "exists.tif"
        existing.write_bytes(b"old")
        with pytest.raises(InputError, match="already exists"):
            raster.open_output(existing, reader)
        # A failure inside the writer leaves neither a half file nor a temporary one,
        # and an existing output being replaced stays as it was.
        with pytest.raises(RuntimeError):
            with raster.open_output(existing, reader, overwrite=True) as writer:
                writer.write(np.ones((20, 30)), None)
                raise RuntimeError("crash while writing")
        assert existing.read_bytes() == b"old"
        assert sorted(p.name for p in tmp_path.iterdir()) == ["exists.tif", "in.tif"]
        with raster.open_output(existing, reader, overwrite=True) as writer:
            writer.write(reader.read()[0], None)
        with rasterio.open(existing) as ds:
            assert ds.width == 30
        deep = raster.check_output_path(tmp_path / "a" / "b" / "out.tif", [src])
        assert deep.parent.is_dir()
    assert not any(name.endswith(".tmp") for name in os.listdir(tmp_path))


def test_gdal_block_cache_is_capped(tmp_path, rng, monkeypatch):
    # GDAL's default cache (5 % of RAM) would let a streamed pass grow with the scene;
    # despeck caps it (common practice: GDAL_CACHEMAX) unless the user chose a size.
    from rasterio.env import get_gdal_config

    monkeypatch.delenv("GDAL_CACHEMAX", raising=False)
    src = make_tif(tmp_path / "c.tif", rng.gamma(1, 1, (20, 20)))
    raster.open_scene(src).close()
    assert int(get_gdal_config("GDAL_CACHEMAX")) <= raster.GDAL_CACHE_MB * 2**20
    with rasterio.Env(GDAL_CACHEMAX=200 * 2**20):  # a size the caller chose is respected
        raster.open_scene(src).close()
        assert int(get_gdal_config("GDAL_CACHEMAX")) == 200 * 2**20


# --------------------------------------------------------------------------- units: hints and statistics

def _one_look_intensity(rng, shape=(256, 256)):
    """Unit-mean 1-look intensity speckle on a two-level scene (two homogeneous fields)."""
    reflectivity = np.full(shape, 0.2)
    reflectivity[:, shape[1] // 2:] = 0.05
    # Exponential (1-look) intensity drawn by scipy, not by despeck (Oliver & Quegan 1998).
    from scipy import stats

    return reflectivity * stats.expon.rvs(size=shape, random_state=rng)


def test_unit_hints_read_words_not_substrings():
    assert raster.unit_hints(("Sigma0_VV_db",))[0] == "db"
    assert raster.unit_hints(("Amplitude_VV",))[0] == "amplitude"
    assert raster.unit_hints(("HH magnitude",))[0] == "amplitude"
    assert raster.unit_hints(("sigma0 VV",))[0] == "intensity"
    assert raster.unit_hints((), (), {"UNITS": "power"}) == ("intensity", "tag UNITS='power'")
    # "amp" inside "sample" or "timestamp" is no hint; neither is a scale factor's key
    assert raster.unit_hints(("sample timestamp",), (), {"AMPLITUDE_SCALE": "2"}) == (None, "")
    assert raster.unit_hints(("amplitude",), (), {"UNITS": "intensity"})[0] == "conflict"


def test_units_evidence_tells_intensity_from_amplitude_on_speckle(rng):
    # On homogeneous areas 1-look intensity is exponential (CV 1) and 1-look amplitude
    # Rayleigh (CV sqrt(4/pi - 1) = 0.5227); Oliver & Quegan 1998. The evidence is
    # the log-variance against trigamma(1/CV^2), so it must call each one right, and
    # leave 4-look amplitude (close to Gamma in shape) undecided rather than guess.
    from scipy import stats

    intensity = _one_look_intensity(rng)
    e_int = raster.units_evidence(intensity)
    e_amp = raster.units_evidence(np.sqrt(intensity))
    assert e_int.vote == "intensity" and abs(e_int.ratio_intensity - 1) < 0.1
    assert e_amp.vote == "amplitude" and abs(e_amp.ratio_amplitude - 1) < 0.1
    # amplitudes read as intensity: 1 / CV^2 = 1 / (4/pi - 1) = 3.66 "looks" (Oliver & Quegan 1998)
    assert abs(e_amp.looks_as_intensity - 1 / (4 / np.pi - 1)) < 0.4
    four_look_amplitude = np.sqrt(stats.gamma.rvs(4, scale=0.25, size=(256, 256), random_state=rng))
    assert raster.units_evidence(four_look_amplitude).vote is None
    # a clean (unspeckled) scene holds no evidence either way
    assert not raster.units_evidence(np.full((256, 256), 0.3)).speckled


def test_amplitude_described_band_is_read_as_amplitude(tmp_path, rng):
    # A float GeoTIFF of 1-look amplitude whose band description says "amplitude" and
    # that has no unit metadata used to be read as intensity (ENL 3.66 instead of 1).
    intensity = _one_look_intensity(rng)
    src = make_tif(tmp_path / "amp.tif", np.sqrt(intensity), descriptions=("amplitude VV",))
    with raster.open_scene(src) as reader:
        assert reader.units == "amplitude" and reader.units_decision.detected
        assert "agree" in reader.units_decision.reason
        read, _ = reader.read()
    np.testing.assert_allclose(read, intensity, rtol=1e-5)
    # Without any metadata the statistics alone decide, and say so in one line.
    bare = make_tif(tmp_path / "bare.tif", np.sqrt(intensity))
    with pytest.warns(raster.UnitsWarning, match=r"read as amplitude.*--units") as record:
        with raster.open_scene(bare) as reader:
            assert reader.units == "amplitude"
    assert all("\n" not in str(w.message) for w in record)


def test_units_hint_and_statistics_disagreeing_is_said(tmp_path, rng):
    intensity = _one_look_intensity(rng)
    src = make_tif(tmp_path / "odd.tif", intensity, descriptions=("Amplitude_HH",))
    with pytest.warns(raster.UnitsWarning, match=r"says amplitude but the values are distributed like intensity.*--units"):
        with raster.open_scene(src) as reader:
            assert reader.units == "amplitude"  # the file's own word wins, with the warning
    with raster.open_scene(src, units="intensity") as reader:  # the option settles it, silently
        assert reader.units == "intensity" and not reader.units_decision.warnings
    from scipy import stats

    four_look_amplitude = np.sqrt(stats.gamma.rvs(4, scale=0.25, size=(256, 256), random_state=rng))
    unsure = make_tif(tmp_path / "unsure.tif", four_look_amplitude)
    with pytest.warns(raster.UnitsWarning, match=r"cannot tell intensity from amplitude.*--units"):
        with raster.open_scene(unsure) as reader:
            assert reader.units == "intensity"
