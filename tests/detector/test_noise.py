"""A tile's noise level against known noise, and smoothing only tiles noisier than the training range.

The estimator is Immerkaer's (J. Immerkaer, "Fast noise variance estimation", Computer Vision and
Image Understanding 64(2), 1996): for white Gaussian noise of standard deviation sigma it returns
sigma, and its mask is blind to planes and quadratic shading. The smoothing is
:func:`scipy.ndimage.gaussian_filter`, checked against that library call.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi

from detector.tile import _dense
from detector.tile.features import _features_of_prepared, extract_features
from detector.tile.noise import NoiseRange, noise_sigma, smooth_excess_noise
from detector.tile.spec import FeatureSpec

SPEC = FeatureSpec()


def _shaded(shape=(300, 400)):
    """A smooth terrain: a plane and a quadratic bowl, in [0.2, 0.8]."""
    y, x = np.mgrid[0:shape[0], 0:shape[1]].astype(np.float64)
    z = 0.3 * x / shape[1] + 0.2 * y / shape[0] + 0.3 * ((x - 200) ** 2 + (y - 150) ** 2) / 250.0**2
    return 0.2 + 0.6 * (z - z.min()) / (z.max() - z.min())


@pytest.mark.parametrize("sigma", [0.002, 0.01, 0.04])
def test_noise_sigma_returns_the_standard_deviation_of_white_gaussian_noise(sigma):
    rng = np.random.default_rng(3)
    image = rng.normal(0.5, sigma, (400, 500))
    # The estimate averages ~2e5 responses: within 1 % of sigma (its relative standard error is ~0.2 %).
    assert noise_sigma(image) == pytest.approx(sigma, rel=0.01)


def test_noise_sigma_is_blind_to_planes_and_quadratic_shading():
    # Computed in float32: rounding leaves ~1e-7 of a [0, 1] image.
    assert noise_sigma(_shaded()) == pytest.approx(0.0, abs=1e-6)
    rng = np.random.default_rng(4)
    noise = rng.normal(0.0, 0.01, (300, 400))
    assert noise_sigma(_shaded() + noise) == pytest.approx(noise_sigma(noise), rel=1e-4)


def test_noise_sigma_is_the_mean_response_to_the_published_mask():
    # The two 1-D passes against the 3 x 3 mask applied by scipy in one 2-D pass, in float64.
    from detector.tile.noise import _MASK

    rng = np.random.default_rng(9)
    image = rng.random((120, 160))
    direct = np.abs(ndi.correlate(image, _MASK, mode="reflect"))[1:-1, 1:-1].mean() * np.sqrt(np.pi / 2) / 6
    assert noise_sigma(image) == pytest.approx(direct, rel=1e-5)


def test_noise_sigma_leaves_out_pixels_next_to_no_data():
    rng = np.random.default_rng(5)
    image = rng.normal(0.5, 0.01, (300, 400))
    image[:, :100] = 0.0  # a no-data margin, with a sharp step at its edge
    valid = np.ones(image.shape, dtype=bool)
    valid[:, :100] = False
    assert noise_sigma(image, valid) == pytest.approx(0.01, rel=0.02)
    assert noise_sigma(image) < 0.8 * 0.01  # the flat margin dilutes the mean response without the mask
    assert np.isnan(noise_sigma(image, np.zeros(image.shape, dtype=bool)))


def test_the_range_of_the_fitting_tiles_is_their_largest_noise_and_their_10th_percentile():
    r = NoiseRange.of_tiles([np.nan, *np.arange(1.0, 11.0)])
    assert r == NoiseRange(limit=10.0, target=float(np.quantile(np.arange(1.0, 11.0), 0.1)))
    assert r.target == pytest.approx(1.9)  # numpy's linear interpolation: 1 + 0.1 * 9
    assert NoiseRange.of_tiles([np.nan]) is None
    assert NoiseRange.from_card(None) is None
    assert NoiseRange.from_card({"limit": 0.01, "target": 0.004}) == NoiseRange(0.01, 0.004)


def test_tiles_within_the_limit_are_returned_untouched():
    image = _shaded().astype(np.float32)
    out, smoothed = smooth_excess_noise(image, 0.004, NoiseRange(0.005, 0.002))
    assert out is image and not smoothed
    out, smoothed = smooth_excess_noise(image, 0.02, None)
    assert out is image and not smoothed


def test_a_noisier_tile_gets_the_narrowest_gaussian_that_reaches_the_target():
    rng = np.random.default_rng(6)
    image = np.clip(_shaded() + rng.normal(0.0, 0.02, (300, 400)), 0, 1).astype(np.float32)
    sigma = noise_sigma(image)
    out, smoothed = smooth_excess_noise(image, sigma, NoiseRange(limit=0.012, target=0.006))
    assert smoothed
    # the width is found on the central 256 px window and applied to the whole tile: the whole
    # tile's noise lands at the target to within the window's sampling error
    assert noise_sigma(out) == pytest.approx(0.006, rel=0.1)
    # the library's Gaussian at some width gives the same image, and 0.03 px narrower would miss the target
    widths = np.arange(0.25, 4.0, 0.001)
    errors = [np.abs(ndi.gaussian_filter(image, w) - out).max() for w in widths[::50]]
    w = widths[::50][int(np.argmin(errors))]
    assert min(errors) < 2e-3
    assert noise_sigma(ndi.gaussian_filter(image, w - 0.03)) > 0.006
    assert abs(float(out.mean()) - float(image.mean())) < 1e-3


def test_prepare_tile_smooths_only_above_the_limit_and_says_so():
    rng = np.random.default_rng(7)
    tile = np.clip(np.rint(255 * _shaded() + rng.normal(0.0, 3.0, (300, 400))), 0, 255).astype(np.uint8)
    plain = _dense.prepare_tile(tile, SPEC)
    assert not plain.smoothed
    assert plain.noise == pytest.approx(3.0 / 255, rel=0.1)  # rounding to grey levels adds a little
    above = _dense.prepare_tile(tile, SPEC, noise_range=NoiseRange(plain.noise + 1e-3, 1.0 / 255))
    X0, _ = _features_of_prepared(plain, SPEC)
    X1, _ = _features_of_prepared(above, SPEC)
    assert not above.smoothed and np.array_equal(X0, X1)
    quiet = NoiseRange(2.0 / 255, 1.0 / 255)
    below = _dense.prepare_tile(tile, SPEC, noise_range=quiet)
    assert below.smoothed and below.noise == plain.noise
    assert noise_sigma(below.image) <= 1.0 / 255 + 1e-4  # the 16-bit grid adds a little
    X2, _ = extract_features(tile, SPEC, noise_range=quiet)
    assert np.array_equal(X2, _features_of_prepared(below, SPEC)[0])
    assert not np.array_equal(X0, X2)


def test_no_data_stays_no_data_when_a_tile_is_smoothed():
    rng = np.random.default_rng(8)
    tile = np.clip(np.rint(255 * _shaded() + rng.normal(0.0, 3.0, (300, 400))), 1, 255).astype(np.uint8)
    tile[:50, :] = 0
    nodata = tile == 0
    prep = _dense.prepare_tile(tile, SPEC, nodata_mask=nodata, noise_range=NoiseRange(2.0 / 255, 1.0 / 255))
    assert prep.smoothed
    assert np.array_equal(prep.valid, ~nodata)
    assert prep.noise == pytest.approx(noise_sigma(tile / 255.0, ~nodata))
