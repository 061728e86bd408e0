"""Speckle statistics, simulation, correlated speckle, sub-looks and the looks estimate.

Every expected value comes from outside the module: scipy.stats distributions,
scipy.special functions, handbook values (Oliver & Quegan 1998, Understanding
Synthetic Aperture Radar Images, Artech House; Goodman 1976, JOSA 66(11)), or
scipy.signal's window functions (Harris 1978, Proc. IEEE 66(1)). Kolmogorov-Smirnov tests
use the 1 % level (common practice); every tolerance is given beside its check in standard
errors of the quantity, or marked as a project tolerance.
"""

import math

import numpy as np
import pytest
from scipy import integrate, ndimage, signal, special, stats

from despeck import speckle
from despeck.errors import InputError

LOOKS = [1.0, 2.5, 4.0]


def lag1_correlation(image, axis=1):
    a = np.moveaxis(np.asarray(image, dtype=np.float64), axis, -1)
    return float(np.corrcoef(a[..., :-1].ravel(), a[..., 1:].ravel())[0, 1])


def siegert_intensity_correlation(k, oversampling=1.25, alpha=0.54):
    """Theory for the intensity correlation at lag k of speckle seen through a tapered band.

    Siegert relation (Goodman 1985, Statistical Optics): rho_I(k) = |rho_z(k)|^2, with rho_z
    the normalised autocorrelation of the complex field, here the Fourier transform of the
    squared generalised-Hamming taper (alpha 0.54: Hamming; Harris 1978) over the band
    |f| <= 0.5 / oversampling, integrated with scipy.integrate.quad (independent of the FFT
    route in despeck.speckle; docs/methods.md, section Correlated speckle and the Siegert relation).
    """
    b = 0.5 / oversampling
    w2 = lambda f: (alpha + (1 - alpha) * math.cos(math.pi * f / b)) ** 2  # noqa: E731
    rho_z = integrate.quad(lambda f: w2(f) * math.cos(2 * math.pi * f * k), -b, b)[0] / integrate.quad(w2, -b, b)[0]
    return rho_z**2


def boxcar_enl_theory(n, looks, oversampling=1.25, alpha=0.54):
    """ENL of an n x n mean of separably correlated speckle: L n^4 / sum over pixel pairs of rho_I."""
    line = sum(siegert_intensity_correlation(abs(a - c), oversampling, alpha) for a in range(n) for c in range(n))
    return looks * n**4 / line**2


# --------------------------------------------------------------------------- distributions

@pytest.mark.parametrize("looks", LOOKS)
def test_intensity_speckle_is_gamma_ks(looks):
    # Source: scipy.stats.gamma(a=L, scale=1/L) is the L-look intensity law (Oliver & Quegan 1998, ch. 4).
    sample = speckle.gamma_speckle((20000,), looks, rng=np.random.default_rng(1))
    assert stats.kstest(sample, stats.gamma(a=looks, scale=1 / looks).cdf).pvalue > 0.01
    # The same test must be able to fail: 30 % more looks is rejected.
    assert stats.kstest(sample, stats.gamma(a=1.3 * looks, scale=1 / (1.3 * looks)).cdf).pvalue < 1e-3


@pytest.mark.parametrize("looks", LOOKS)
def test_torch_intensity_speckle_is_gamma_ks(looks):
    import torch

    torch.set_num_threads(1)
    g = torch.Generator().manual_seed(3)
    sample = speckle.gamma_speckle_torch((20000,), looks, generator=g).numpy()
    # Source: scipy.stats.gamma(a=L, scale=1/L) (Oliver & Quegan 1998).
    assert stats.kstest(sample, stats.gamma(a=looks, scale=1 / looks).cdf).pvalue > 0.01
    again = speckle.gamma_speckle_torch((20000,), looks, generator=torch.Generator().manual_seed(3)).numpy()
    np.testing.assert_array_equal(sample, again)  # same seed, same sample


def test_simulate_intensity_scales_reference(rng):
    reference = np.full((200, 200), 7.0)
    out = speckle.simulate_intensity(reference, 4, rng=rng)
    # Gamma(L, R/L): mean R, variance R^2/L (scipy.stats.gamma moments).
    law = stats.gamma(a=4, scale=7.0 / 4)
    # Tolerances ~4 standard errors for 40 000 pixels: mean 1/sqrt(4 * 40000) = 0.25 %, variance
    # sqrt((kurtosis - 1) / 40000) = 0.94 % (Gamma kurtosis 3 + 6/L).
    assert out.mean() == pytest.approx(law.mean(), rel=0.01)
    assert out.var() == pytest.approx(law.var(), rel=0.04)


def test_slc_is_circular_gaussian(rng):
    z = speckle.simulate_slc(np.full((200, 200), 3.0), rng=rng)
    assert z.dtype == np.complex64
    # Goodman (1976): real and imaginary parts independent N(0, R/2); |z|^2 exponential of mean R.
    assert stats.kstest(z.real.ravel(), stats.norm(scale=math.sqrt(1.5)).cdf).pvalue > 0.01
    assert abs(np.corrcoef(z.real.ravel(), z.imag.ravel())[0, 1]) < 0.02  # 4 x 1/sqrt(40000)
    assert stats.kstest((np.abs(z) ** 2).ravel(), stats.expon(scale=3.0).cdf).pvalue > 0.01


# --------------------------------------------------------------------------- moments

@pytest.mark.parametrize("looks", [1.0, 2.5, 4.0, 10.0])
def test_log_moments_match_scipy(looks):
    law = stats.gamma(a=looks, scale=1 / looks)
    # Source: E[ln n] = digamma(L) - ln L, Var[ln n] = polygamma(1, L) (scipy.special), and
    # independently numerical integration over scipy.stats.gamma.
    assert speckle.log_intensity_mean(looks) == pytest.approx(special.digamma(looks) - math.log(looks), rel=1e-12)
    assert speckle.log_intensity_variance(looks) == pytest.approx(special.polygamma(1, looks), rel=1e-12)
    mean = law.expect(np.log)
    var = law.expect(lambda x: (np.log(x) - mean) ** 2)
    assert speckle.log_intensity_mean(looks) == pytest.approx(mean, rel=1e-6)
    assert speckle.log_intensity_variance(looks) == pytest.approx(var, rel=1e-6)


def test_log_bias_correction_recovers_log_reflectivity(rng):
    # Source: E[ln I] = ln R + digamma(L) - ln L (scipy.special.digamma); the correction undoes it.
    reference, looks = 5.0, 2.0
    sample = speckle.simulate_intensity(np.full(200000, reference), looks, rng=rng)
    corrected = np.log(sample).mean() + speckle.log_bias_correction(looks)
    assert corrected == pytest.approx(math.log(reference), abs=0.01)  # 5 x sqrt(psi_1(2) / 200000)
    assert speckle.log_bias_correction(1) == pytest.approx(np.euler_gamma, rel=1e-12)  # -psi(1) = Euler's gamma


def test_amplitude_cv_handbook_values():
    # Rayleigh (L = 1): CV = sqrt(4/pi - 1) = 0.5227 (Oliver & Quegan 1998; handbook value).
    assert speckle.amplitude_cv(1) == pytest.approx(math.sqrt(4 / math.pi - 1), rel=1e-12)
    assert speckle.amplitude_cv(1) == pytest.approx(0.5227, abs=1e-4)
    # Large L: CV -> 1/(2 sqrt(L)) (delta method; Oliver & Quegan 1998); the next term is O(1/L),
    # 6e-5 relative at L = 1000 (computed), hence rel=1e-3.
    assert speckle.amplitude_cv(1000) == pytest.approx(1 / (2 * math.sqrt(1000)), rel=1e-3)


@pytest.mark.parametrize("looks", [1.0, 2.0, 2.5, 4.0])
def test_amplitude_moments_match_nakagami(looks):
    # Source: amplitude speckle is scipy.stats.nakagami(nu=L, scale=1) (Omega = 1).
    law = stats.nakagami(nu=looks)
    assert speckle.amplitude_mean(looks) == pytest.approx(law.mean(), rel=1e-9)
    assert speckle.amplitude_cv(looks) == pytest.approx(law.std() / law.mean(), rel=1e-9)
    assert speckle.amplitude_looks_from_cv(law.std() / law.mean()) == pytest.approx(looks, rel=1e-6)


def test_simulated_amplitude_is_nakagami_and_enl(rng):
    amplitude = speckle.simulate_amplitude(np.ones(20000), 2.5, rng=rng)
    # Source: scipy.stats.nakagami(nu=L) (Nakagami m = L).
    assert stats.kstest(amplitude, stats.nakagami(nu=2.5).cdf).pvalue > 0.01
    # 6 %: about 6 standard errors (1 % measured over 300 draws of 20 000 values).
    assert speckle.enl_amplitude(amplitude) == pytest.approx(2.5, rel=0.06)


# --------------------------------------------------------------------------- ENL of averages

@pytest.mark.parametrize("n, looks", [(3, 1.0), (5, 2.0)])
def test_boxcar_enl_is_n_squared_l_on_white_speckle(rng, n, looks):
    image = speckle.gamma_speckle((400, 400), looks, rng=rng)
    box = ndimage.uniform_filter(image.astype(np.float64), n)[n:-n, n:-n]
    # Oliver & Quegan (1998): averaging N^2 independent L-look pixels gives N^2 L looks (3x3, L=1 -> 9).
    # Sub-sample by n so the boxcar outputs used are independent. Tolerance: the ENL estimate's
    # relative standard error is sqrt((2 + 2/(n^2 L)) / m) for m independent Gamma(n^2 L) values
    # (delta method; docs/methods.md, section Equivalent number of looks): 1.1 % and 1.8 % here,
    # so 8 % is 4-7 standard errors.
    assert speckle.enl_intensity(box[::n, ::n]) == pytest.approx(n * n * looks, rel=0.08)


def test_multilook_enl(rng):
    image = speckle.gamma_speckle((600, 600), 1.5, rng=rng)
    # Oliver & Quegan (1998): block averaging of independent looks multiplies L by the block size.
    # 60 000 blocks: relative standard error sqrt((2 + 2/9) / 60000) = 0.6 %, so 5 % is generous.
    assert speckle.enl_intensity(speckle.multilook(image, (2, 3))) == pytest.approx(1.5 * 6, rel=0.05)


def test_correlated_speckle_lowers_boxcar_enl_and_correlates_neighbours(rng):
    n, looks = 3, 1
    white = speckle.gamma_speckle((256, 256), looks, rng=rng)
    corr = speckle.simulate_correlated_intensity(np.ones((256, 256)), looks, rng=rng)
    enl_white = speckle.enl_intensity(ndimage.uniform_filter(white, n)[n:-n:n, n:-n:n])
    enl_corr = speckle.enl_intensity(ndimage.uniform_filter(corr, n)[n:-n:n, n:-n:n])
    # Oliver & Quegan (1998) / Argenti et al. (2013): correlated pixels are not independent
    # looks, so the boxcar ENL falls below N^2 L (9) while white speckle reaches it. The
    # expected values come from the Siegert relation (Goodman 1985) for the default system
    # (Hamming taper, oversampling 1.25): lag-1 intensity correlation 0.550 and a 3 x 3 boxcar
    # ENL of 2.81 (see siegert_intensity_correlation and boxcar_enl_theory above).
    # Tolerances: ~5 standard errors (lag correlation ~0.005 over 65 000 pixels; ENL ~2-3 %
    # over ~7000 boxes).
    assert enl_white == pytest.approx(9, rel=0.1)
    assert enl_corr == pytest.approx(boxcar_enl_theory(n, looks), rel=0.1)
    assert abs(lag1_correlation(white)) < 0.02
    assert lag1_correlation(corr, axis=1) == pytest.approx(siegert_intensity_correlation(1), abs=0.03)
    assert lag1_correlation(corr, axis=0) == pytest.approx(siegert_intensity_correlation(1), abs=0.03)


def test_correlated_marginal_is_still_gamma(rng):
    image = speckle.simulate_correlated_intensity(np.ones((512, 512)), 2, rng=rng)
    # Each look is |z|^2 of a circular Gaussian (Goodman 1976), so the marginal stays
    # scipy.stats.gamma(a=L, scale=1/L); every 8th pixel keeps the KS sample nearly independent.
    sample = image[::8, ::8].ravel()
    assert stats.kstest(sample, stats.gamma(a=2, scale=0.5).cdf).pvalue > 0.01


def test_correlated_expected_intensity_is_reference_convolved_with_psf(rng):
    reference = np.ones((48, 64))
    reference[:, 32:] = 10.0
    mean = np.mean([speckle.simulate_correlated_intensity(reference, 1, rng=rng) for _ in range(300)], axis=0)
    kernel = speckle.psf_intensity_kernel()
    expected = ndimage.convolve(reference, kernel, mode="reflect")
    # Argenti et al. (2013): E|PSF * w|^2 = R convolved with |PSF|^2 (scipy.ndimage.convolve).
    # 300 x 48 single-look samples per column (fewer independent ones: neighbours correlate),
    # so a few percent of sampling error; 5 %: project tolerance.
    profile = mean.mean(axis=0)
    np.testing.assert_allclose(profile, expected[0], rtol=0.05)
    assert kernel.sum() == pytest.approx(1.0)  # mean backscatter preserved


def test_spectral_taper_is_scipy_hamming():
    # Harris (1978); scipy.signal.windows.hamming: 81 in-band bins of a 100-point grid at oversampling 1.25.
    taper = np.fft.fftshift(speckle.spectral_taper(100, oversampling=1.25, taper="hamming"))
    inside = taper[taper > 0]
    np.testing.assert_allclose(inside, signal.windows.hamming(81), atol=1e-12)
    hann = np.fft.fftshift(speckle.spectral_taper(100, oversampling=1.25, taper="hann"))
    np.testing.assert_allclose(hann[10:91], signal.windows.hann(81), atol=1e-12)


def test_system_psf_keeps_power_and_is_band_limited():
    psf = speckle.system_psf()
    assert np.sum(np.abs(psf) ** 2) == pytest.approx(1.0)
    # The spectrum of the untruncated response is zero outside the band (1/1.25 of the rate).
    h = speckle.system_transfer((100, 100), oversampling=1.25)
    f = np.abs(np.fft.fftfreq(100))
    assert np.all(h[f > 0.4][:, f > 0.4] == 0)
    assert np.mean(h**2) == pytest.approx(1.0)


# --------------------------------------------------------------------------- sub-looks

@pytest.mark.parametrize("count, axis", [(2, "azimuth"), (3, "azimuth"), (2, "range")])
def test_sublooks_are_uncorrelated_single_looks(rng, count, axis):
    slc = speckle.simulate_correlated_slc(np.full((384, 384), 2.0), rng=rng)
    sub = speckle.split_sublooks(slc, count, axis=axis, oversampling=1.25, taper="hamming")
    assert sub.shape == (count, 384, 384)
    intensities = np.abs(sub.astype(np.complex128)) ** 2
    corr = np.corrcoef(intensities.reshape(count, -1))
    # Oliver & Quegan (1998): non-overlapping spectral bands carry independent speckle.
    # 0.03: ~10 standard errors of a correlation over 147 000 pixels (0.003) plus the < 0.01
    # leakage documented in split_sublooks; project tolerance.
    assert np.max(np.abs(corr[np.triu_indices(count, 1)])) < 0.03
    for look in intensities:
        # Each sub-look is a single look: ENL ~ 1 (Goodman 1976: |z|^2 exponential) ...
        assert speckle.enl_intensity(look) == pytest.approx(1.0, rel=0.1)
        # ... with the input's mean backscatter. (10 % and 5 %: project tolerances; a sub-look's
        # pixels are correlated along the split axis, so there are fewer independent samples.)
        assert look.mean() == pytest.approx(float(np.mean(np.abs(slc) ** 2)), rel=0.05)


def test_sublooks_of_an_edge_differ_from_full_correlation(rng):
    # Negative control for the test above: a sub-look and the full band share half the band, so
    # they are correlated and the check on non-overlapping sub-looks can fail. Theory: for a
    # white spectrum the complex correlation of the full image with a half-band sub-look is
    # 1/sqrt(2), so by the Siegert relation (Goodman 1985) their intensities correlate at 1/2.
    slc = speckle.simulate_slc(np.ones((256, 256)), rng=rng)
    full = np.abs(slc) ** 2
    half = np.abs(speckle.split_sublooks(slc, 2)[0]) ** 2
    assert np.corrcoef(full.ravel(), half.ravel())[0, 1] == pytest.approx(0.5, abs=0.03)


def test_sublook_bad_input():
    z = np.ones((16, 16), dtype=np.complex64)
    with pytest.raises(InputError, match="count"):
        speckle.split_sublooks(z, 1)
    with pytest.raises(InputError, match="complex"):
        speckle.split_sublooks(np.ones((16, 16)), 2)
    with pytest.raises(InputError, match="axis"):
        speckle.split_sublooks(z, 2, axis="diagonal")


# --------------------------------------------------------------------------- looks from a scene

@pytest.mark.parametrize("looks", [1.0, 3.0])
def test_estimate_looks_on_pure_speckle(looks):
    image = speckle.gamma_speckle((384, 384), looks, rng=np.random.default_rng(5))
    # Source: the speckle was drawn with L looks (scipy/numpy Gamma(L, 1/L)); ENL = L (Oliver & Quegan 1998).
    # 8 %: project tolerance (measured over 30 seeds: +3 % +- 2 % at L = 1, +1.6 % +- 2.3 % at L = 3).
    assert speckle.estimate_looks(image) == pytest.approx(looks, rel=0.08)


def test_estimate_looks_finds_homogeneous_part_of_textured_scene(rng):
    # Left half: strongly textured reflectivity (Gamma texture of order 1, K-distributed
    # intensity, Oliver & Quegan 1998 ch. 11); right half: homogeneous.
    reference = np.ones((384, 384))
    reference[:, :192] = rng.gamma(1.0, 1.0, (384, 192))
    image = speckle.simulate_intensity(reference, 2, rng=rng)
    naive = speckle.enl_intensity(image)
    # Theory (K-distribution moments, Oliver & Quegan 1998): E[I^2] = (1 + 1/nu)(1 + 1/L) = 3 on
    # the textured half (nu = 1), 1 + 1/L = 1.5 on the other, mean 1 on both: the whole scene has
    # variance 1.25 and ENL 0.8 (measured 0.80 +- 0.012 over 20 seeds).
    assert naive == pytest.approx(1 / ((3 + 1.5) / 2 - 1), rel=0.06)  # texture ruins a whole-scene estimate ...
    assert speckle.estimate_looks(image) == pytest.approx(2.0, rel=0.1)  # ... the detector avoids it (project tolerance)


def test_estimate_looks_ignores_nodata(rng):
    image = speckle.gamma_speckle((256, 256), 2, rng=rng)
    valid = np.ones(image.shape, dtype=bool)
    valid[:, :100] = False
    image[:, :100] = 1e6  # would wreck the estimate if used
    assert speckle.estimate_looks(image, valid) == pytest.approx(2.0, rel=0.1)  # project tolerance
    with pytest.raises(InputError, match="nodata"):
        speckle.estimate_looks(image, np.zeros(image.shape, dtype=bool))


# --------------------------------------------------------------------------- window-by-window field

@pytest.mark.parametrize("correlated", [False, True])
def test_speckle_field_independent_of_windows(correlated):
    field = speckle.SpeckleField(2, seed=11, correlated=correlated)
    reference = np.random.default_rng(0).uniform(1, 5, (150, 130)).astype(np.float32)
    hh = field.halo
    padded = np.pad(reference, hh, mode="symmetric")
    whole = field.speckle(padded, 0, 0)
    parts = np.zeros_like(whole)
    for r0, r1 in ((0, 70), (70, 150)):
        for c0, c1 in ((0, 33), (33, 130)):
            parts[r0:r1, c0:c1] = field.speckle(padded[r0:r1 + 2 * hh, c0:c1 + 2 * hh], r0, c0)
    np.testing.assert_allclose(parts, whole, rtol=1e-4)  # float32 FFT convolution of different extents
    other = speckle.SpeckleField(2, seed=12, correlated=correlated).speckle(padded, 0, 0)
    assert not np.allclose(other, whole)


def test_speckle_field_statistics():
    field = speckle.SpeckleField(2.5, seed=4)
    sample = field.speckle(np.ones((200, 100), dtype=np.float32), 0, 0).ravel()
    # scipy.stats.gamma(a=L, scale=1/L) (Oliver & Quegan 1998).
    assert stats.kstest(sample, stats.gamma(a=2.5, scale=0.4).cdf).pvalue > 0.01
    corr = speckle.SpeckleField(1, seed=4, correlated=True)
    image = corr.speckle(np.full((256 + 2 * corr.halo, 256 + 2 * corr.halo), 3.0, dtype=np.float32), 0, 0)
    assert image.mean() == pytest.approx(3.0, rel=0.05)  # mean backscatter kept (project tolerance)
    assert lag1_correlation(image) == pytest.approx(siegert_intensity_correlation(1), abs=0.03)  # Siegert


# --------------------------------------------------------------------------- bad input

@pytest.mark.parametrize("looks", [0, -1, float("nan"), "many"])
def test_bad_looks(looks):
    with pytest.raises(InputError, match="looks"):
        speckle.gamma_speckle((4,), looks, rng=0)


def test_correlated_needs_one_look_and_valid_reference(rng):
    with pytest.raises(InputError, match="at least one look"):
        speckle.simulate_correlated_intensity(np.ones((8, 8)), 0.5, rng=rng)
    with pytest.raises(InputError, match="non-negative"):
        speckle.simulate_correlated_slc(-np.ones((8, 8)), rng=rng)
    with pytest.raises(InputError, match="oversampling"):
        speckle.simulate_correlated_slc(np.ones((8, 8)), rng=rng, oversampling=0.5)
    with pytest.raises(InputError, match="taper"):
        speckle.simulate_correlated_slc(np.ones((8, 8)), rng=rng, taper="triangle")
