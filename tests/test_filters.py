"""Tests of the classical filters against outside references.

Each check names its source: theory through scipy (Gamma moments, numerical
maximisation), the papers' own values, a deliberately naive per-pixel loop, or
"common practice".
"""

import math

import numpy as np
import pytest
import rasterio
from affine import Affine
from scipy import integrate, optimize, stats

from despeck import filters
from despeck.cli import main
from despeck.errors import InputError
from despeck.speckle import enl_intensity, gamma_speckle

# bm3d-log (optional package, whole images, slower): its own contract checks in test_bm3d_log.py
NAMES = [name for name in filters.FILTERS if name != "bm3d-log"]


def small_scene(rng, shape=(64, 72)):
    """Two-level scene with a diagonal edge, a bright point and a nodata hole, 1-look speckle."""
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    clean = np.where(cols > rows + 5, 4.0, 1.0)
    clean[shape[0] * 2 // 3, shape[1] // 4] = 300.0
    noisy = (clean * gamma_speckle(shape, 1, rng=rng)).astype(np.float32)
    valid = np.ones(shape, dtype=bool)
    valid[10:16, 30:41] = False
    return noisy, valid


# --------------------------------------------------------------------------- every filter

@pytest.mark.parametrize("name", NAMES)
def test_constant_scene_returns_the_constant(name):
    # common practice: any speckle filter must leave a constant (noise-free) scene unchanged
    image = np.full((33, 41), 0.37, dtype=np.float32)
    mask = np.ones(image.shape, dtype=bool)
    mask[5:9, 7:12] = False
    out = filters.FILTERS[name](image, looks=2, mask=mask)
    assert out.dtype == np.float32 and out.shape == image.shape
    np.testing.assert_allclose(out, 0.37, rtol=1e-6)


@pytest.mark.parametrize("looks", [1, 4])
@pytest.mark.parametrize("name", NAMES)
def test_mean_backscatter_preserved_on_pure_speckle(name, looks):
    # Theory: L-look speckle is Gamma(L, 1/L) with mean 1 (scipy.stats.gamma(a=L, scale=1/L).mean());
    # radiometric preservation criterion (bias ideally 0 dB; Argenti et al. 2013, A tutorial on
    # speckle reduction in SAR images). 0.03 dB is a project tolerance: the input mean's own
    # sampling error over 296^2 pixels is 1/sqrt(87616 L) = 0.015 dB (1 sigma) at L = 1, and the
    # filtered mean shares most of it; uncorrected Gamma-MAP / sigma filters are 0.09-0.16 dB
    # low (our simulations, see their docstrings), so the check can fail.
    assert stats.gamma(a=looks, scale=1 / looks).mean() == pytest.approx(1.0)
    rng = np.random.default_rng(100 + looks)
    image = 5.0 * gamma_speckle((320, 320), looks, rng=rng)
    out = filters.FILTERS[name](image, looks=looks)
    core = (slice(12, -12), slice(12, -12))
    bias_db = 10 * math.log10(out[core].mean() / image[core].mean())
    assert abs(bias_db) < 0.03, f"{name}: bias {bias_db:+.4f} dB"


@pytest.mark.parametrize("name", NAMES)
def test_nodata_never_leaks_and_is_kept(name, rng):
    # common practice: invalid pixels neither contribute to nor receive filtered values
    noisy, valid = small_scene(rng)
    a = noisy.copy()
    b = noisy.copy()
    a[~valid] = 1e6
    b[~valid] = -7.0
    out_a = filters.FILTERS[name](a, looks=1, mask=valid, point_threshold=50.0) if name == "improved-sigma" \
        else filters.FILTERS[name](a, looks=1, mask=valid)
    out_b = filters.FILTERS[name](b, looks=1, mask=valid, point_threshold=50.0) if name == "improved-sigma" \
        else filters.FILTERS[name](b, looks=1, mask=valid)
    np.testing.assert_array_equal(out_a[valid], out_b[valid])
    np.testing.assert_array_equal(out_a[~valid], a[~valid])
    np.testing.assert_array_equal(out_b[~valid], b[~valid])
    assert np.all(np.isfinite(out_a[valid])) and np.all(out_a[valid] > 0)


@pytest.mark.parametrize("name", NAMES)
def test_tiles_in_threads_equal_whole_image_exactly(name, rng, monkeypatch):
    noisy, valid = small_scene(rng)
    whole = filters.FILTERS[name](noisy, looks=1, mask=valid, workers=1)  # one 128-pixel tile
    monkeypatch.setattr(filters.engine, "TILE", 5)  # tiles smaller than most halos
    strips = filters.FILTERS[name](noisy, looks=1, mask=valid, workers=2)
    np.testing.assert_array_equal(strips, whole)


def _write_tif(path, data, nodata=0.0):
    profile = dict(driver="GTiff", width=data.shape[1], height=data.shape[0], count=1, dtype="float32",
                   crs="EPSG:32631", transform=Affine(10, 0, 500000, 0, -10, 5800000), nodata=nodata,
                   tiled=True, blockxsize=32, blockysize=32)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data.astype(np.float32), 1)


@pytest.mark.parametrize("name", NAMES)
def test_halo_blocked_file_filtering_equals_whole_image(name, rng, tmp_path, monkeypatch):
    noisy, valid = small_scene(rng, (70, 64))
    data = np.where(valid, noisy, 0.0)
    src, dst = tmp_path / "in.tif", tmp_path / "out.tif"
    _write_tif(src, data)
    monkeypatch.setattr(filters.engine, "STRIP_PIXELS", 64 * 7)  # many strips with halos
    monkeypatch.setattr(filters.engine, "TILE", 16)
    info = filters.filter_raster(name, src, dst, looks=1, progress=False, workers=2)
    extra = {"point_threshold": info["options"]["point_threshold"]} if name == "improved-sigma" else {}
    whole = filters.FILTERS[name](data.astype(np.float32), looks=1, mask=valid, **extra)
    with rasterio.open(dst) as ds:
        out = ds.read(1)
        assert ds.crs == rasterio.crs.CRS.from_epsg(32631)
        assert ds.transform == Affine(10, 0, 500000, 0, -10, 5800000)
        written_mask = ds.read_masks(1) > 0
    np.testing.assert_array_equal(written_mask, valid)
    np.testing.assert_array_equal(out[valid], whole[valid])


# --------------------------------------------------------------------------- ENL on speckle

def test_boxcar_enl_is_n_squared_times_looks():
    # Oliver & Quegan (1998), Understanding SAR Images: N x N boxcar on uncorrelated L-look
    # speckle -> ENL = N^2 L. Tolerance: the ENL estimate's relative standard error is
    # sqrt((2 + 2/N^2L) / m) for m independent values (docs/methods.md, section Equivalent number
    # of looks); here m ~ pixels / N^2, i.e. 1.1 % and 1.8 %, so 5 % is 3-4 standard errors.
    rng = np.random.default_rng(3)
    for looks, window in ((1, 3), (2, 5)):
        out = filters.boxcar(gamma_speckle((400, 400), looks, rng=rng), looks=looks, window=window)
        enl = enl_intensity(out[window:-window, window:-window])
        assert enl == pytest.approx(window * window * looks, rel=0.05)


def test_lee_and_kuan_enl_in_expected_range():
    # A gain in [0, 1] mixes the pixel (ENL L) with the window mean (ENL N^2 L): the ENL must lie
    # between them (Argenti et al. 2013); Kuan's gain is Lee's divided by 1 + Cu^2, so it smooths more.
    rng = np.random.default_rng(4)
    image = gamma_speckle((400, 400), 1, rng=rng)
    core = (slice(7, -7), slice(7, -7))
    e_lee = enl_intensity(filters.lee(image, looks=1, window=7)[core])
    e_kuan = enl_intensity(filters.kuan(image, looks=1, window=7)[core])
    e_box = enl_intensity(filters.boxcar(image, looks=1, window=7)[core])
    # 49 = N^2 L for 7 x 7 at L = 1 (1.05: the ENL estimate's tolerance, see above); 5 is a
    # project floor, well above the input's ENL of L = 1.
    assert 5 < e_lee < e_kuan < e_box <= 49 * 1.05


def test_kuan_gain_is_the_lmmse_gain():
    # Kuan et al. (1985), Adaptive noise smoothing filter for images with signal-dependent noise:
    # under I = R n the LMMSE gain cov(R, I) / var(I)
    # equals (1 - Cu^2/Ci^2) / (1 + Cu^2). Monte Carlo with a Gamma prior on R (scipy-free moments).
    rng = np.random.default_rng(5)
    for looks, prior_shape in ((1, 3.0), (3, 1.5)):
        R = 2.0 * rng.gamma(prior_shape, 1 / prior_shape, 2_000_000)
        I = R * rng.gamma(looks, 1 / looks, R.size)
        lmmse = np.cov(R, I)[0, 1] / I.var(ddof=1)
        ci2 = I.var() / I.mean() ** 2
        # 2 %: project tolerance; the Monte Carlo error of 2e6 draws is a few tenths of a percent.
        assert filters.local_stats.kuan_gain(np.array(ci2), 1 / looks) == pytest.approx(lmmse, rel=0.02)


# --------------------------------------------------------------------------- naive references

def _naive_local(image, valid, r, c, window):
    h = window // 2
    r0, r1, c0, c1 = max(r - h, 0), min(r + h + 1, image.shape[0]), max(c - h, 0), min(c + h + 1, image.shape[1])
    v = image[r0:r1, c0:c1][valid[r0:r1, c0:c1]].astype(np.float64)
    return v.mean(), v.var()


@pytest.mark.parametrize("kind", ["lee", "kuan"])
@pytest.mark.parametrize("window", [3, 7])
def test_lee_and_kuan_match_a_naive_per_pixel_loop(kind, window, rng):
    # Independent reference: a deliberately naive loop over pixels with numpy mean/var of the
    # valid pixels of each (edge-clipped) window; Lee (1980) and Kuan et al. (1985) gains.
    noisy, valid = small_scene(rng, (23, 29))
    looks = 2.0
    cu2 = 1 / looks
    out = filters.FILTERS[kind](noisy, looks=looks, window=window, mask=valid)
    expected = noisy.astype(np.float64).copy()
    for r in range(noisy.shape[0]):
        for c in range(noisy.shape[1]):
            if not valid[r, c]:
                continue
            m, v = _naive_local(noisy, valid, r, c, window)
            ci2 = v / m**2
            w = 0.0 if ci2 == 0 else 1 - cu2 / ci2
            if kind == "kuan":
                w /= 1 + cu2
            w = min(max(w, 0.0), 1.0)
            expected[r, c] = m + w * (noisy[r, c] - m)
    np.testing.assert_allclose(out, expected, rtol=1e-6, atol=0)


def test_frost_matches_a_naive_per_pixel_loop(rng):
    # Frost et al. (1982) weights exp(-K Ci^2 d), naive double loop over pixels and window
    noisy, valid = small_scene(rng, (17, 19))
    out = filters.frost(noisy, looks=1, window=5, mask=valid, damping=1.5)
    for r in range(noisy.shape[0]):
        for c in range(noisy.shape[1]):
            if not valid[r, c]:
                continue
            m, v = _naive_local(noisy, valid, r, c, 5)
            a = 1.5 * v / m**2
            num = den = 0.0
            for dy in range(-2, 3):
                for dx in range(-2, 3):
                    y, x = r + dy, c + dx
                    if 0 <= y < noisy.shape[0] and 0 <= x < noisy.shape[1] and valid[y, x]:
                        wgt = math.exp(-a * math.hypot(dy, dx))
                        num += wgt * noisy[y, x]
                        den += wgt
            assert out[r, c] == pytest.approx(num / den, rel=1e-6)


def test_gamma_map_closed_form_is_the_posterior_maximum():
    # Lopes et al. (1990) closed form vs numerical maximisation (scipy.optimize) of
    # log p(R | I) = log Gamma-likelihood(I; L, R) + log Gamma-prior(R; alpha, mean)
    rng = np.random.default_rng(6)
    for _ in range(40):
        looks = float(rng.choice([1.0, 2.0, 4.7]))
        cu2 = 1 / looks
        ci2 = cu2 * rng.uniform(1.05, 3.0)
        mean, centre = rng.uniform(0.5, 5.0), rng.uniform(0.05, 12.0)
        alpha = (1 + cu2) / (ci2 - cu2)

        def neg_log_post(R):
            like = stats.gamma(a=looks, scale=R / looks).logpdf(centre)
            prior = stats.gamma(a=alpha, scale=mean / alpha).logpdf(R)
            return -(like + prior)

        best = optimize.minimize_scalar(neg_log_post, bounds=(1e-6, 200.0), method="bounded",
                                        options={"xatol": 1e-10})
        closed = filters.gamma_map_estimate(mean, ci2, centre, looks)
        assert closed == pytest.approx(best.x, rel=1e-5)


def test_gamma_map_filter_uses_the_map_in_the_middle_class(rng):
    # pixels whose window has Cu < Ci < Cmax take the posterior maximum (scipy.optimize),
    # the others the window mean (Ci <= Cu) or the centre (Ci >= Cmax) -- Lopes et al. (1990)
    noisy, valid = small_scene(rng, (21, 25))
    looks, window = 1.0, 5
    out = filters.gamma_map(noisy, looks=looks, window=window, mask=valid, correct_bias=False)
    seen = set()
    for r in range(noisy.shape[0]):
        for c in range(noisy.shape[1]):
            if not valid[r, c]:
                continue
            m, v = _naive_local(noisy, valid, r, c, window)
            ci2 = v / m**2
            if ci2 <= 1 / looks:
                expected, cls = m, "mean"
            elif ci2 >= 2 / looks:  # Cmax = sqrt(2) Cu, the filter's default (from memory)
                expected, cls = noisy[r, c], "centre"
            else:
                alpha = (1 + 1 / looks) / (ci2 - 1 / looks)
                post = lambda R: -(stats.gamma(a=looks, scale=R / looks).logpdf(noisy[r, c])  # noqa: E731
                                   + stats.gamma(a=alpha, scale=m / alpha).logpdf(R))
                expected = optimize.minimize_scalar(post, bounds=(1e-6, 1e4), method="bounded",
                                                    options={"xatol": 1e-9}).x
                cls = "map"
            seen.add(cls)
            assert out[r, c] == pytest.approx(expected, rel=1e-4)
    assert seen == {"mean", "centre", "map"}


# --------------------------------------------------------------------------- sigma, refined Lee, non-local

def test_sigma_interval_matches_the_published_table():
    # Lee et al. (2009), Improved sigma filter for speckle filtering of SAR imagery, Table I:
    # L = 1, xi = 0.9 -> A1 = 0.084, A2 = 3.932, eta_v = 0.819 (table values from memory; the
    # next test checks the defining properties of the interval with scipy independently).
    a1, a2, eta = filters.sigma_interval(1, 0.9)
    assert (round(a1, 3), round(a2, 3), round(eta, 3)) == (0.084, 3.932, 0.819)


@pytest.mark.parametrize("looks,xi", [(2, 0.9), (4, 0.8), (1.5, 0.95)])
def test_sigma_interval_has_probability_xi_and_unit_mean(looks, xi):
    # scipy.stats.gamma numerical integration (independent of the incomplete-Gamma route used in code)
    a1, a2, eta = filters.sigma_interval(looks, xi)
    g = stats.gamma(a=looks, scale=1 / looks)
    assert g.cdf(a2) - g.cdf(a1) == pytest.approx(xi, abs=1e-9)
    mean = integrate.quad(lambda x: x * g.pdf(x), a1, a2)[0] / xi
    var = integrate.quad(lambda x: (x - 1) ** 2 * g.pdf(x), a1, a2)[0] / xi
    assert mean == pytest.approx(1.0, abs=1e-8)
    assert eta == pytest.approx(math.sqrt(var), rel=1e-7)


def test_improved_sigma_keeps_point_targets():
    # Lee et al. (2009): a 3 x 3 cluster of >= K pixels above Z98 is kept unfiltered (K = 5 and
    # the 98th percentile as recalled, from memory)
    rng = np.random.default_rng(8)
    image = gamma_speckle((60, 60), 1, rng=rng).astype(np.float32)
    image[29:32, 29:32] = 500.0 * gamma_speckle((3, 3), 4, rng=rng)
    assert image[29:32, 29:32].min() > np.percentile(image, 98)
    out = filters.improved_sigma(image, looks=1)
    np.testing.assert_array_equal(out[29:32, 29:32], image[29:32, 29:32])
    # the same cluster below the point threshold is filtered like any other pixels
    out = filters.improved_sigma(image, looks=1, point_threshold=1e5)
    assert not np.array_equal(out[29:32, 29:32], image[29:32, 29:32])


@pytest.mark.parametrize("kind", ["vertical", "horizontal", "diagonal", "anti-diagonal"])
def test_refined_lee_does_not_average_across_edges(kind):
    # Lee (1981), Lee et al. (1999): edge-aligned half windows keep a noise-free step edge exact,
    # where the square-window Lee filter blurs it.
    rows, cols = np.mgrid[0:31, 0:31]
    side = {"vertical": cols > 15, "horizontal": rows > 15, "diagonal": cols > rows,
            "anti-diagonal": cols + rows > 30}[kind]
    image = np.where(side, 8.0, 1.0).astype(np.float32)
    refined = filters.refined_lee(image, looks=1)
    np.testing.assert_allclose(refined, image, rtol=1e-6)
    assert np.abs(filters.lee(image, looks=1) - image).max() > 0.1


def test_nonlocal_smooths_more_than_boxcar_keeps_edges_better():
    # common practice for non-local means: at similar or higher ENL than a 7 x 7 boxcar,
    # a patch-weighted mean blurs a strong step edge less
    rng = np.random.default_rng(9)
    rows, cols = np.mgrid[0:96, 0:96]
    clean = np.where(cols >= 48, 10.0, 1.0)
    noisy = clean * gamma_speckle(clean.shape, 4, rng=rng)
    nl = filters.nonlocal_glr(noisy, looks=4)
    box = filters.boxcar(noisy, looks=4, window=7)
    flat = (slice(10, 86), slice(8, 40))
    assert enl_intensity(nl[flat]) > enl_intensity(box[flat])
    edge = (slice(10, 86), slice(45, 51))
    err = lambda x: np.mean(np.abs(np.log(x[edge] / clean[edge])))  # noqa: E731
    assert err(nl) < 0.6 * err(box)  # 0.6: project margin, not a published value


# --------------------------------------------------------------------------- bad input

@pytest.mark.parametrize("window", [4, 1, 2, 0, -3, 2.5, "seven", None])
def test_bad_window_is_refused(window):
    image = np.ones((10, 10), np.float32)
    if window is None:  # None means "the default" and is fine
        filters.lee(image, looks=1, window=None)
        return
    with pytest.raises(InputError, match="window"):
        filters.lee(image, looks=1, window=window)


@pytest.mark.parametrize("looks", [0, -1, float("nan"), "x"])
def test_bad_looks_is_refused(looks):
    with pytest.raises(InputError, match="looks"):
        filters.kuan(np.ones((10, 10)), looks=looks)


def test_unknown_filter_lists_the_valid_names():
    with pytest.raises(InputError) as err:
        filters.get_filter("median-ish")
    for name in NAMES:
        assert name in str(err.value)


def test_other_bad_input_is_one_line():
    with pytest.raises(InputError, match="7, 11, 15"):
        filters.refined_lee(np.ones((20, 20)), looks=1, window=9)
    with pytest.raises(InputError, match="mask of shape"):
        filters.lee(np.ones((20, 20)), looks=1, mask=np.ones((20, 21), bool))
    with pytest.raises(InputError, match="2-D"):
        filters.lee(np.ones(20), looks=1)
    with pytest.raises(InputError, match="no option 'dampening'"):
        filters.filter_raster("frost", "x.tif", "y.tif", dampening=2)


# --------------------------------------------------------------------------- command line

def test_cli_filter_writes_a_georeferenced_output_and_reports_estimated_looks(tmp_path, capsys):
    rng = np.random.default_rng(10)
    src, dst = tmp_path / "scene.tif", tmp_path / "lee.tif"
    _write_tif(src, 3.0 * gamma_speckle((96, 96), 2, rng=rng))
    assert main(["filter", "lee", str(src), str(dst), "--window", "5", "--quiet"]) == 0
    with rasterio.open(dst) as ds:
        assert ds.transform == Affine(10, 0, 500000, 0, -10, 5800000) and ds.count == 1
    assert main(["filter", "frost", str(src), str(tmp_path / "frost.tif"), "--option", "damping=2"]) == 0
    out = capsys.readouterr().out
    assert "estimated from the scene" in out and "damping=2" in out


def test_cli_filter_bad_input_exits_non_zero_with_one_line(tmp_path, capsys):
    rng = np.random.default_rng(11)
    src = tmp_path / "scene.tif"
    _write_tif(src, gamma_speckle((40, 40), 1, rng=rng))
    # the output is the input: an input/output error (1); bad option values: usage errors (2)
    assert main(["filter", "lee", str(src), str(src), "--looks", "1"]) == 1
    assert main(["filter", "wavelet", str(src), str(tmp_path / "o.tif")]) == 2
    assert main(["filter", "lee", str(src), str(tmp_path / "o.tif"), "--window", "6"]) == 2
    assert main(["filter", "lee", str(src), str(tmp_path / "o.tif"), "--looks", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 4 and all(line.startswith("despeck: error:") for line in err)
    assert "boxcar" in err[1] and "odd" in err[2] and "looks" in err[3]
    assert not (tmp_path / "o.tif").exists()


def test_refined_lee_matches_a_naive_per_pixel_loop(rng):
    # Independent reference for the mask algebra: per pixel, the 3 x 3 sub-means, the four
    # side sums, the strongest direction, the side closer to the centre, and the half window
    # written as an explicit inequality (Lee et al. 1999 as restated in the refined_lee docstring)
    noisy, valid = small_scene(rng, (19, 23))
    looks, w, h, sub, step = 1.0, 7, 3, 3, 2
    out = filters.refined_lee(noisy, looks=looks, mask=valid, correct_bias=False)
    H, W = noisy.shape
    halves = [lambda dy, dx: dx <= 0, lambda dy, dx: dx >= 0, lambda dy, dx: dy <= 0, lambda dy, dx: dy >= 0,
              lambda dy, dx: dx >= dy, lambda dy, dx: dx <= dy, lambda dy, dx: dx <= -dy, lambda dy, dx: dx >= -dy]

    def mean_of(r, c, size):
        v = [noisy[y, x] for y in range(r - size // 2, r + size // 2 + 1) for x in range(c - size // 2, c + size // 2 + 1)
             if 0 <= y < H and 0 <= x < W and valid[y, x]]
        return float(np.mean(np.array(v, dtype=np.float64))) if v else None

    for r in range(H):
        for c in range(W):
            if not valid[r, c]:
                continue
            centre = mean_of(r, c, sub)
            M = [[mean_of(r + oy, c + ox, sub) for ox in (-step, 0, step)] for oy in (-step, 0, step)]
            M = [[centre if m is None else m for m in row] for row in M]
            sides = [(M[0][0] + M[1][0] + M[2][0], M[0][2] + M[1][2] + M[2][2]),
                     (M[0][0] + M[0][1] + M[0][2], M[2][0] + M[2][1] + M[2][2]),
                     (M[0][1] + M[0][2] + M[1][2], M[1][0] + M[2][0] + M[2][1]),
                     (M[0][0] + M[0][1] + M[1][0], M[1][2] + M[2][1] + M[2][2])]
            d = int(np.argmax([abs(b - a) for a, b in sides]))
            a, b = sides[d]
            k = 2 * d + int(abs(b - 3 * centre) < abs(a - 3 * centre))
            v = np.array([noisy[r + dy, c + dx] for dy in range(-h, h + 1) for dx in range(-h, h + 1)
                          if halves[k](dy, dx) and 0 <= r + dy < H and 0 <= c + dx < W and valid[r + dy, c + dx]],
                         dtype=np.float64)
            m, var = v.mean(), v.var()
            gain = 0.0 if var == 0 else min(max((1 - (1 / looks) * m * m / var) / (1 + 1 / looks), 0.0), 1.0)
            assert out[r, c] == pytest.approx(m + gain * (noisy[r, c] - m), rel=1e-5), (r, c)


# --------------------------------------------------------------------------- domains and sizes

@pytest.mark.parametrize("xi", [0.5, 0.9, 0.99])
def test_sigma_interval_domain_is_solved_inside_and_refused_outside(xi):
    # Inside the domain the interval has probability xi and truncated mean 1 by
    # scipy.stats.gamma integration (independent of the incomplete-Gamma route in code);
    # just outside it the filter refuses with a one-line error naming the looks.
    low, high = filters.sigma_domain(xi)
    assert 0.0 < low < 0.5 and high > 1e6  # the looks real data have (1 to hundreds) are inside
    for looks in np.geomspace(low * 1.05, 1e4, 6):
        a1, a2, _ = filters.sigma_interval(looks, xi)
        g = stats.gamma(a=looks, scale=1 / looks)
        assert g.cdf(a2) - g.cdf(a1) == pytest.approx(xi, abs=1e-7)
        mean = integrate.quad(lambda x: x * g.pdf(x), a1, a2, points=[1.0], limit=200)[0] / xi
        assert mean == pytest.approx(1.0, abs=1e-6)
    for looks in (low / 1.1, high * 1.1, 1e-3):
        with pytest.raises(InputError, match=r"^looks .* outside the improved sigma filter's domain"):
            filters.sigma_interval(looks, xi)
    with pytest.raises(InputError, match="looks"):
        filters.improved_sigma(np.ones((20, 20)), looks=1e-3)


def test_absurd_windows_are_refused_before_any_allocation():
    assert filters.check_window(filters.MAX_WINDOW) == filters.MAX_WINDOW
    for window in (filters.MAX_WINDOW + 2, 100001, 10**12 + 1):
        with pytest.raises(InputError, match=r"window must be at most"):
            filters.lee(np.ones((10, 10), np.float32), looks=1, window=window)
    with pytest.raises(InputError, match="patch must be at most"):
        filters.nonlocal_glr(np.ones((10, 10), np.float32), looks=1, patch=100001)


def test_filter_raster_filters_every_band_or_the_one_asked(rng, tmp_path):
    # A two-band file (e.g. two polarisations) used to come back with band 1 only.
    bands = np.stack([gamma_speckle((48, 40), 1, rng=rng), 5.0 * gamma_speckle((48, 40), 1, rng=rng)]).astype(np.float32)
    src = tmp_path / "two.tif"
    with rasterio.open(src, "w", driver="GTiff", width=40, height=48, count=2, dtype="float32", crs="EPSG:32631",
                       transform=Affine(10, 0, 500000, 0, -10, 5800000)) as ds:
        ds.write(bands)
    info = filters.filter_raster("lee", src, tmp_path / "all.tif", looks=1, progress=False)
    assert [b["band"] for b in info["bands"]] == [1, 2]
    with rasterio.open(tmp_path / "all.tif") as ds:
        assert ds.count == 2
        for k in range(2):
            np.testing.assert_array_equal(ds.read(k + 1), filters.lee(bands[k], looks=1))
    info = filters.filter_raster("lee", src, tmp_path / "second.tif", looks=1, band=2, progress=False)
    with rasterio.open(tmp_path / "second.tif") as ds:
        assert ds.count == 1
        np.testing.assert_array_equal(ds.read(1), filters.lee(bands[1], looks=1))
    with pytest.raises(InputError, match="band 3 does not exist"):
        filters.filter_raster("lee", src, tmp_path / "third.tif", looks=1, band=3, progress=False)
    with pytest.raises(InputError, match=r"window 49 is larger than the scene \(40 x 48 pixels\)"):
        filters.filter_raster("boxcar", src, tmp_path / "wide.tif", looks=1, window=49, progress=False)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["all.tif", "second.tif", "two.tif"]


def test_registry_holds_one_entry_per_filter_and_refuses_a_second():
    # The registry's views agree with its entries; names are looked up as the CLI writes them.
    assert list(filters.FILTERS) == list(filters.DEFAULT_WINDOWS) and "bm3d-log" in filters.FILTERS
    for name in filters.FILTERS:
        entry = filters.filter_entry(name)
        assert entry.function is filters.FILTERS[name] is filters.get_filter(f" {name.upper()} ")
        assert entry.default_window == filters.DEFAULT_WINDOWS[name] and entry.description
        assert (entry.plan is None) == (name == "bm3d-log")  # only bm3d-log needs whole images
    assert filters.filter_options("frost") == {"damping": 1.0}
    with pytest.raises(ValueError, match="registered twice"):
        filters.register_filter("Lee", default_window=7)(filters.lee)
    with pytest.raises(InputError, match="unknown filter 'median'; choose one of boxcar, lee"):
        filters.filter_entry("median")
    with pytest.raises(TypeError):
        filters.FILTERS["lee"] = filters.lee  # a read-only view


@pytest.mark.parametrize("workers", [0, 2.5, "two"])
def test_thread_counts_must_be_whole_positive_numbers(workers):
    image = np.ones((8, 8))
    for name in ("lee", "bm3d-log"):  # one rule for the strip engine and for bm3d-log
        with pytest.raises(InputError, match="workers must be a positive integer"):
            filters.FILTERS[name](image, looks=1, workers=workers)
