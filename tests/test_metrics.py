"""Tests of the quality metrics against scikit-image, theory and hand-computed values."""

import json
import math

import numpy as np
import pytest
from affine import Affine
from scipy import stats
from skimage.feature import graycomatrix, graycoprops
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from despeck import filters, metrics, synthetic
from despeck.errors import InputError
from despeck.speckle import gamma_speckle, simulate_intensity


def speckled_parcels(rng, looks=1, shape=(192, 192)):
    """Four constant parcels (boxes inside them are homogeneous) with L-look speckle."""
    clean = np.ones(shape)
    clean[: shape[0] // 2, shape[1] // 2 :] = 4.0
    clean[shape[0] // 2 :, : shape[1] // 2] = 0.5
    clean[shape[0] // 2 :, shape[1] // 2 :] = 2.0
    noisy = clean * gamma_speckle(shape, looks, rng=rng, dtype=np.float64)
    h, w = shape[0] // 2, shape[1] // 2
    boxes = [(r + 8, c + 8, r + h - 8, c + w - 8) for r in (0, h) for c in (0, w)]
    return clean, noisy, boxes


# --------------------------------------------------------------------------- fidelity

def test_psnr_and_ssim_equal_scikit_image(rng):
    # scikit-image (van der Walt et al. 2014) structural_similarity / peak_signal_noise_ratio, defaults
    a = rng.random((61, 53)) * 30 - 25
    b = a + rng.normal(0, 2, a.shape)
    assert metrics.psnr(a, b, data_range=30) == pytest.approx(peak_signal_noise_ratio(a, b, data_range=30), abs=1e-10)
    assert metrics.ssim(a, b, data_range=30) == pytest.approx(structural_similarity(a, b, data_range=30), abs=1e-10)


def test_fidelity_in_db_and_amplitude_matches_scikit_image_with_stated_ranges(rng):
    clean, noisy, _ = speckled_parcels(rng, looks=4, shape=(64, 64))
    out = filters.boxcar(noisy, looks=4, window=5)
    fd = metrics.fidelity(clean, out)
    low, high = fd["db_range"]
    rd = np.clip(10 * np.log10(clean), low, high)
    ed = np.clip(10 * np.log10(out.astype(np.float64)), low, high)
    assert fd["psnr_db"] == pytest.approx(peak_signal_noise_ratio(rd, ed, data_range=high - low), abs=1e-9)
    assert fd["ssim_db"] == pytest.approx(structural_similarity(rd, ed, data_range=high - low), abs=1e-9)
    peak = fd["amplitude_peak"]
    ra, ea = np.clip(np.sqrt(clean), 0, peak), np.clip(np.sqrt(out.astype(np.float64)), 0, peak)
    assert fd["psnr_amplitude"] == pytest.approx(peak_signal_noise_ratio(ra, ea, data_range=peak), abs=1e-9)
    assert fd["ssim_amplitude"] == pytest.approx(structural_similarity(ra, ea, data_range=peak), abs=1e-9)
    assert fd["mae_db"] == pytest.approx(np.mean(np.abs(10 * np.log10(out / clean))), rel=1e-6)
    same = metrics.fidelity(clean, clean)
    assert same["psnr_db"] == math.inf and same["ssim_db"] == pytest.approx(1.0) and same["mae_db"] == 0


def test_glcm_homogeneity_equals_scikit_image(rng):
    # scikit-image graycomatrix/graycoprops('homogeneity'), distance 1, four angles, averaged
    q = rng.integers(0, 16, (40, 37))
    P = graycomatrix(q.astype(np.uint8), [1], [0, np.pi / 4, np.pi / 2, 3 * np.pi / 4], levels=16,
                     symmetric=True, normed=True)
    assert metrics.glcm_homogeneity(q) == pytest.approx(graycoprops(P, "homogeneity").mean(), abs=1e-12)


# --------------------------------------------------------------------------- edges

def test_edge_measures_of_the_identity_are_one(rng):
    # Feng et al. (2011) and Sattar et al. (1997): ideal value 1 when the estimate equals the reference
    clean, noisy, _ = speckled_parcels(rng)
    assert metrics.epd_roa(noisy, noisy) == (pytest.approx(1.0), pytest.approx(1.0))
    assert metrics.edge_correlation(clean, clean) == pytest.approx(1.0)


def test_epd_roa_hand_computed():
    # direct evaluation of sum |D(i,j)/D(i,j+1)| / sum |O(i,j)/O(i,j+1)| (and vertically) on 2 x 3 images
    o = np.array([[1.0, 2.0, 4.0], [1.0, 1.0, 2.0]])
    d = np.array([[1.0, 1.0, 2.0], [2.0, 1.0, 1.0]])
    h, v = metrics.epd_roa(o, d)
    assert h == pytest.approx((1 + 0.5 + 2 + 1) / (0.5 + 0.5 + 1 + 0.5))
    assert v == pytest.approx((0.5 + 1 + 2) / (1 + 2 + 2))


def test_smoothing_lowers_edge_preservation(rng):
    clean, noisy, _ = speckled_parcels(rng, looks=4)
    box = filters.boxcar(noisy, looks=4, window=9)
    assert metrics.edge_correlation(clean, box) < 0.9
    assert metrics.epd_roa(clean, box)[0] < metrics.epd_roa(clean, clean)[0]


# --------------------------------------------------------------------------- ENL, bias, ratio, M

def test_enl_of_l_look_speckle_is_l(rng):
    # scipy.stats.gamma(a=L, scale=1/L): mean^2 / variance = L
    for looks in (1, 3):
        assert stats.gamma(a=looks, scale=1 / looks).mean() ** 2 / stats.gamma(a=looks, scale=1 / looks).var() \
            == pytest.approx(looks)
        _, noisy, boxes = speckled_parcels(rng, looks, shape=(256, 256))
        assert np.median(metrics.enl(noisy, boxes)) == pytest.approx(looks, rel=0.1)


def test_radiometric_bias_of_a_doubled_image_is_3_db(rng):
    # 10 log10(2) = 3.0103 dB (definition, METHODS.md section 4)
    _, noisy, boxes = speckled_parcels(rng)
    per, overall = metrics.radiometric_bias_db(noisy, 2 * noisy, boxes)
    np.testing.assert_allclose(per, 10 * math.log10(2))
    assert overall == pytest.approx(3.0103, abs=1e-4)


def test_m_of_an_oracle_is_near_zero_and_far_below_a_boxcar():
    # Gomez et al. (2017): M = 0 for an ideal filter; the ratio of an oracle (output = clean
    # reflectivity) is pure speckle with the input's ENL and no structure, while a boxcar leaves
    # edges, targets and texture in its ratio image. Scene: the project's synthetic landscape.
    clean, layout = synthetic.make_scene((256, 256), rng=3, return_layout=True)
    noisy = simulate_intensity(clean, 1, rng=np.random.default_rng(21))
    boxes = layout.homogeneous_boxes
    oracle = metrics.unassisted_m(noisy, clean, boxes)
    box = metrics.unassisted_m(noisy, filters.boxcar(noisy, looks=1, window=7), boxes)
    assert oracle["M"] < 1.5
    assert box["M"] > 3 * oracle["M"]
    rs = metrics.ratio_statistics(noisy, clean, boxes, looks=1)
    assert rs["mean"] == pytest.approx(1.0, abs=0.02)
    assert rs["enl_over_looks"] == pytest.approx(1.0, rel=0.15)


def test_m_is_deterministic(rng):
    _, noisy, boxes = speckled_parcels(rng, shape=(96, 96))
    out = filters.lee(noisy, looks=1)
    assert metrics.unassisted_m(noisy, out, boxes) == metrics.unassisted_m(noisy, out, boxes)


# --------------------------------------------------------------------------- areas

def test_automatic_areas_keep_pure_speckle_and_drop_edges():
    # on pure speckle the fraction of boxes kept is 1 - false_alarm (binomial, scipy.stats.binom)
    rng = np.random.default_rng(22)
    image = gamma_speckle((450, 450), 2, rng=rng)
    boxes = metrics.find_homogeneous_areas(image, 2, false_alarm=0.1, max_areas=10_000)
    lo, hi = stats.binom(900, 0.9).interval(0.999)
    assert lo <= len(boxes) <= hi
    # a strong edge through the middle of the boxes of one column is never kept
    rows, cols = np.mgrid[0:450, 0:450]
    edged = image * np.where(cols >= 37, 10.0, 1.0)
    kept = metrics.find_homogeneous_areas(edged, 2, false_alarm=0.1, max_areas=10_000)
    assert all(c0 != 30 for _, c0, _, _ in kept)


def test_area_errors_are_one_line():
    with pytest.raises(InputError, match="outside"):
        metrics.areas_from_boxes([(0, 0, 20, 200)], (100, 100))
    with pytest.raises(InputError, match="at least 100"):
        metrics.check_areas([(0, 0, 5, 5)], (100, 100))
    with pytest.raises(InputError, match="no area"):
        metrics.check_areas([], (100, 100))


def test_areas_from_geojson_polygons(tmp_path):
    # rasterio.features.rasterize of a polygon in map coordinates: 10 m pixels, a 200 m x 150 m
    # rectangle covers 20 x 15 pixel centres
    transform = Affine(10, 0, 500000, 0, -10, 5800000)
    poly = {"type": "Polygon", "coordinates": [[[500100, 5799800], [500300, 5799800], [500300, 5799650],
                                                 [500100, 5799650], [500100, 5799800]]]}
    path = tmp_path / "areas.geojson"
    path.write_text(json.dumps({"type": "FeatureCollection",
                                "features": [{"type": "Feature", "properties": {}, "geometry": poly}]}))
    (mask,) = metrics.areas_from_vector(path, transform, (100, 100))
    assert mask.sum() == 300
    rows, cols = np.nonzero(mask)
    assert (rows.min(), rows.max(), cols.min(), cols.max()) == (20, 34, 10, 29)
    far = {"type": "Polygon", "coordinates": [[[0, 0], [10, 0], [10, 10], [0, 0]]]}
    path.write_text(json.dumps(far))
    with pytest.raises(InputError, match="outside the scene"):
        metrics.areas_from_vector(path, transform, (100, 100))
    path.write_text("{not json")
    with pytest.raises(InputError, match="GeoJSON"):
        metrics.areas_from_vector(path, transform, (100, 100))


# --------------------------------------------------------------------------- points

def test_point_targets_found_and_retention_measured():
    rng = np.random.default_rng(23)
    image = gamma_speckle((128, 128), 1, rng=rng, dtype=np.float64)
    planted = [(20, 30), (70, 90), (100, 15)]
    for r, c in planted:
        image[r, c] = 1000.0
    found = metrics.find_point_targets(image, 1)
    assert set(planted) <= set(found) and len(found) <= len(planted) + 1
    assert np.all(metrics.point_retention_db(image, image, planted) == 0)


def test_point_retention_of_a_boxcar_hand_computed():
    # a single 1000 on a background of ones: the 7 x 7 boxcar peak is (1000 + 48) / 49
    image = np.ones((21, 21))
    image[10, 10] = 1000.0
    out = filters.boxcar(image, looks=1, window=7)
    (ret,) = metrics.point_retention_db(image, out, [(10, 10)])
    assert ret == pytest.approx(10 * math.log10(1048 / 49 / 1000), abs=1e-5)
    with pytest.raises(InputError, match="outside"):
        metrics.point_retention_db(image, out, [(30, 2)])


def test_throughput():
    assert metrics.throughput_mps(4_000_000, 2.0) == 2.0
