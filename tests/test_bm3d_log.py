"""Tests of the log-domain BM3D reference filter (``bm3d-log``) against outside references.

References named beside each check: the ``bm3d`` package itself (its documented
behaviour: ``bm3d.bm3d(z, sigma)`` denoises additive Gaussian noise of standard deviation
``sigma``; a PSD argument is ``image size * sigma^2`` for white noise), scipy's digamma and
trigamma for the log-speckle moments (Xie, Pierce, Ulaby 2002, IEEE TGRS 40(3)), scipy's
dilogarithm for the log-covariance of correlated single-look speckle, and common practice
for radiometric preservation. Tests that need the optional package skip, saying so, when it
is not installed.
"""

import importlib
import math
import sys

import numpy as np
import pytest
import rasterio
from affine import Affine
from scipy import special

from despeck import filters
from despeck.bench import parse_method
from despeck.cli import main
from despeck.errors import MissingDependencyError
from despeck.speckle import gamma_speckle, simulate_correlated_intensity

bm3d_log = importlib.import_module("despeck.filters.bm3d_log")  # the module, not the filter function of that name

needs_bm3d = pytest.mark.skipif(
    not bm3d_log.available(), reason="optional bm3d package not installed (pip install despeck[bm3d])"
)


# --------------------------------------------------------------------------- no package needed

@pytest.mark.parametrize("looks", [1.0, 2.5, 4.4, 10.0])
def test_homomorphic_bias_is_digamma_minus_log_looks(looks):
    # E[ln n] = psi(L) - ln L for Gamma(L, 1/L) speckle (Xie, Pierce, Ulaby 2002), via scipy.special.digamma
    intensity = np.array([0.25, 1.0, 7.5])
    expected = np.log(intensity) - (special.digamma(looks) - math.log(looks))
    np.testing.assert_allclose(bm3d_log.homomorphic_log(intensity, looks), expected, rtol=0, atol=1e-12)
    # ... and the transform is unbiased for ln R = 0 on simulated unit-mean speckle: the
    # sample mean lies within 4 standard errors sqrt(psi_1(L) / N) (scipy.special.polygamma)
    n = 400_000
    sample = gamma_speckle((n,), looks, rng=np.random.default_rng(int(10 * looks)), dtype=np.float64)
    se = math.sqrt(special.polygamma(1, looks) / n)
    assert abs(bm3d_log.homomorphic_log(sample, looks).mean()) < 4 * se


def test_log_psd_of_white_and_correlated_speckle():
    # White L-look speckle: flat log spectrum whose mean is the variance psi_1(L) (scipy polygamma).
    white = bm3d_log.log_speckle_psd(gamma_speckle((384, 384), 1, rng=np.random.default_rng(4)))
    assert white.shape == (17, 17)
    acf = np.fft.ifft2(white).real
    assert acf[0, 0] == pytest.approx(special.polygamma(1, 1), rel=0.03)
    assert abs(acf[1, 0]) < 0.02 and abs(acf[0, 1]) < 0.02
    # Correlated single-look speckle: for two exponential intensities whose correlation
    # coefficient is rho, cov(ln I1, ln I2) = Li2(rho) (Laguerre expansion of the bivariate
    # exponential law, from memory; checked here by Monte Carlo on circular Gaussian pairs
    # to 0.001). scipy.special.spence(1 - rho) is Li2(rho); rho is measured on the intensities
    # (numpy corrcoef). Tolerance 0.03: several standard errors of a lag covariance over
    # 384^2 correlated pixels (about 0.005).
    sim = simulate_correlated_intensity(np.ones((384, 384), np.float32), 1, rng=np.random.default_rng(5),
                                        oversampling=1.25, taper="hamming").astype(np.float64)
    acf = np.fft.ifft2(bm3d_log.log_speckle_psd(sim)).real
    for lag in (1, 2):
        rho_rows = np.corrcoef(sim[:-lag].ravel(), sim[lag:].ravel())[0, 1]
        rho_cols = np.corrcoef(sim[:, :-lag].ravel(), sim[:, lag:].ravel())[0, 1]
        assert acf[lag, 0] == pytest.approx(special.spence(1.0 - rho_rows), abs=0.03)
        assert acf[0, lag] == pytest.approx(special.spence(1.0 - rho_cols), abs=0.03)
    assert acf[1, 0] > 0.3  # the oversampled system does correlate neighbours (Li2(0.55) = 0.65)


def test_registered_as_a_filter_with_its_options():
    assert filters.get_filter("bm3d-log") is bm3d_log.bm3d_log
    assert filters.DEFAULT_WINDOWS["bm3d-log"] == 39  # the package's default search window
    assert set(filters.filter_options("bm3d-log")) >= {"psd", "oversampling", "taper", "profile", "mean_correction"}
    m = parse_method("bm3d-log:oversampling=1.25,taper=hamming")
    assert m.name == "bm3d-log" and m.window == 39 and m.options == {"oversampling": 1.25, "taper": "hamming"}


@needs_bm3d
def test_constant_scene_returns_the_constant():
    # common practice: a noise-free constant scene is left unchanged (mask as in test_filters)
    image = np.full((33, 41), 0.37, dtype=np.float32)
    mask = np.ones(image.shape, dtype=bool)
    mask[5:9, 7:12] = False
    out = bm3d_log.bm3d_log(image, looks=2, mask=mask)
    assert out.dtype == np.float32 and out.shape == image.shape
    np.testing.assert_allclose(out, 0.37, rtol=1e-6)


def test_missing_package_is_a_one_line_error_naming_the_extra(monkeypatch, tmp_path, capsys):
    monkeypatch.setitem(sys.modules, "bm3d", None)  # makes "import bm3d" raise ImportError
    image = gamma_speckle((48, 48), 1, rng=np.random.default_rng(1))  # larger than the 39-pixel search window
    with pytest.raises(MissingDependencyError, match=r"pip install despeck\[bm3d\]") as info:
        bm3d_log.bm3d_log(image, looks=1)
    assert "\n" not in str(info.value)
    src = tmp_path / "in.tif"
    _write_tif(src, image)
    assert main(["filter", "bm3d-log", str(src), str(tmp_path / "out.tif"), "--looks", "1"]) == 1  # not usage
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("despeck: error:") and "pip install despeck[bm3d]" in err[0]
    assert not (tmp_path / "out.tif").exists()


# --------------------------------------------------------------------------- with the package

@needs_bm3d
def test_gaussian_path_reproduces_the_package():
    # The package's documented behaviour: bm3d.bm3d(z, sigma) for an image in [0, 1] with
    # additive Gaussian noise of standard deviation sigma. With sigma = NOISE_SIGMA and centre
    # 0.5 the wrapper hands the image over unchanged, so the results must agree.
    import bm3d
    from skimage import data

    rng = np.random.default_rng(2)
    clean = data.camera()[200:296, 200:296] / 255.0
    noisy = clean + rng.normal(0.0, 0.1, clean.shape)
    profile = bm3d.BM3DProfile()
    profile.num_threads = 1
    reference = bm3d.bm3d(noisy, 0.1, profile)
    ours = bm3d_log.bm3d_gaussian(noisy, sigma=0.1, centre=0.5)
    np.testing.assert_allclose(ours, reference, rtol=0, atol=1e-9)
    # any scale: 8 z - 3 with sigma 0.8 gives 8 bm3d(z) - 3
    scaled = bm3d_log.bm3d_gaussian(8.0 * noisy - 3.0, sigma=0.8, centre=1.0)
    np.testing.assert_allclose(scaled, 8.0 * reference - 3.0, rtol=0, atol=1e-6)
    # a flat PSD is white noise: the package's convention for a PSD is size * sigma^2,
    # ours is sigma^2 on any grid
    flat = bm3d_log.bm3d_gaussian(noisy, psd=np.full((17, 17), 0.01), centre=0.5)
    np.testing.assert_allclose(flat, reference, rtol=0, atol=1e-9)


@needs_bm3d
def test_mean_backscatter_preserved_on_a_constant_speckled_area():
    # common practice (radiometric preservation): the mean of a homogeneous area is kept.
    # Tolerance 0.08 dB: the calibration's own spread (about 0.02 dB at L = 1) plus this
    # sample's arithmetic-vs-geometric mean spread (sqrt(0.645 / N) = 0.018 dB), about 3 sigma.
    image = 5.0 * gamma_speckle((192, 192), 1, rng=np.random.default_rng(7))
    out = bm3d_log.bm3d_log(image, looks=1)
    bias_db = 10 * math.log10(out.mean() / image.mean())
    assert abs(bias_db) < 0.08, f"bias {bias_db:+.3f} dB"
    # without the correction (the output divided by the factor) the homomorphic estimate is
    # measurably biased (log-normal excess and BM3D's shrinkage of the skewed log-speckle),
    # so the check above is not vacuous
    assert abs(10 * math.log10(bm3d_log.calibration_factor(1))) > 0.15
    # and the filter reduces speckle: the ENL of the output far exceeds the input's L = 1
    core = out[16:-16, 16:-16]
    assert core.mean() ** 2 / core.var() > 20


@needs_bm3d
def test_nodata_never_leaks_and_file_filtering_matches(tmp_path):
    # common practice: invalid pixels neither contribute to nor receive filtered values
    rng = np.random.default_rng(8)
    rows, cols = np.mgrid[0:64, 0:72]
    clean = np.where(cols > rows + 5, 4.0, 1.0)
    noisy = (clean * gamma_speckle(clean.shape, 1, rng=rng)).astype(np.float32)
    valid = np.ones(clean.shape, dtype=bool)
    valid[10:16, 30:41] = False
    a, b = noisy.copy(), noisy.copy()
    a[~valid], b[~valid] = 1e6, -7.0
    out_a = bm3d_log.bm3d_log(a, looks=1, mask=valid)
    out_b = bm3d_log.bm3d_log(b, looks=1, mask=valid)
    np.testing.assert_array_equal(out_a[valid], out_b[valid])
    np.testing.assert_array_equal(out_a[~valid], a[~valid])
    assert np.all(np.isfinite(out_a[valid])) and np.all(out_a[valid] > 0)
    # despeck filter reads the whole band and gives the in-memory result
    src, dst = tmp_path / "in.tif", tmp_path / "out.tif"
    _write_tif(src, np.where(valid, noisy, 0.0))
    info = filters.filter_raster("bm3d-log", src, dst, looks=1, progress=False)
    assert info["method"] == "bm3d-log" and info["window"] == 39
    with rasterio.open(dst) as ds:
        written = ds.read(1)
        assert (ds.read_masks(1) > 0).tolist() == valid.tolist()
    np.testing.assert_array_equal(written[valid], out_a[valid])


@needs_bm3d
def test_correlated_speckle_description_helps_and_keeps_the_mean():
    # Mäkinen, Azzari, Foi (2020): giving BM3D the noise spectrum of correlated noise beats
    # treating it as white. Oversampled (1.25, Hamming) 1-look speckle over a two-level scene:
    # the filter told the system is closer to the clean scene (dB domain) than the one assuming
    # white speckle, and keeps the mean of a homogeneous half within 0.15 dB (common practice;
    # correlated speckle has fewer independent samples, so its sample mean spreads more).
    rows, cols = np.mgrid[0:128, 0:128]
    clean = np.where(cols < 64, 1.0, 8.0).astype(np.float32)
    noisy = simulate_correlated_intensity(clean, 1, rng=np.random.default_rng(9), oversampling=1.25,
                                          taper="hamming")
    told = bm3d_log.bm3d_log(noisy, looks=1, oversampling=1.25, taper="hamming")
    white = bm3d_log.bm3d_log(noisy, looks=1)
    err = lambda est: float(np.mean((10 * np.log10(est[:, 8:-8]) - 10 * np.log10(clean[:, 8:-8])) ** 2))
    assert err(told) < 0.8 * err(white)
    left = (slice(8, -8), slice(8, 56))
    assert abs(10 * math.log10(told[left].mean() / noisy[left].mean())) < 0.15


def _write_tif(path, data, nodata=0.0):
    profile = dict(driver="GTiff", width=data.shape[1], height=data.shape[0], count=1, dtype="float32",
                   crs="EPSG:32631", transform=Affine(10, 0, 500000, 0, -10, 5800000), nodata=nodata)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(np.asarray(data, dtype=np.float32), 1)
