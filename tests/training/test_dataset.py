"""Training augmentation: the photometric degradation of turned tile copies, against scipy and numpy."""

import numpy as np
import pytest
from scipy import ndimage

from training.fitting.dataset import augmented_tile, degrade_tile


def _fixed(blur=0.0, noise=0.0, gain=1.0):
    return {"blur_px": (blur, blur), "noise_dn": (noise, noise), "gain": (gain, gain)}


def test_blur_alone_is_scipy_gaussian_filter():
    # Reference: scipy.ndimage.gaussian_filter (mode 'reflect'); on a tile without no-data the
    # normalised blur divides by a weight of exactly 1.
    rng = np.random.default_rng(0)
    tile = rng.integers(40, 220, (60, 80)).astype(np.uint8)
    out = degrade_tile(tile, np.random.default_rng(1), ranges=_fixed(blur=1.3))
    expected = np.clip(np.round(ndimage.gaussian_filter(tile.astype(np.float32), 1.3)), 1, 255)
    np.testing.assert_allclose(out.astype(float), expected, atol=1.0)


def test_noise_has_the_requested_standard_deviation():
    tile = np.full((400, 400), 128, np.uint8)
    out = degrade_tile(tile, np.random.default_rng(2), ranges=_fixed(noise=3.0))
    # Rounding to integers adds 1/12 DN^2 of variance (uniform quantisation error, a textbook fact).
    assert np.std(out.astype(float)) == pytest.approx(np.sqrt(9.0 + 1.0 / 12.0), rel=0.03)
    assert abs(np.mean(out.astype(float)) - 128.0) < 0.05


def test_gain_flattens_about_the_median_and_keeps_no_data():
    tile = np.tile(np.array([0, 100, 120, 140], np.uint8), (10, 5))
    out = degrade_tile(tile, np.random.default_rng(3), ranges=_fixed(gain=0.5))
    valid = tile > 0
    median = np.median(tile[valid])
    np.testing.assert_allclose(out[valid].astype(float), np.round(median + 0.5 * (tile[valid] - median)), atol=0.51)
    assert (out[~valid] == 0).all() and (out[valid] >= 1).all()


def test_sixteen_bit_noise_is_scaled_to_grey_levels():
    tile = np.full((300, 300), 30000, np.uint16)
    out = degrade_tile(tile, np.random.default_rng(4), ranges=_fixed(noise=2.0))
    assert out.dtype == np.uint16
    assert np.std(out.astype(float)) == pytest.approx(2.0 * 65535 / 255, rel=0.03)


def test_augmented_tile_turns_then_degrades_deterministically():
    rng = np.random.default_rng(5)
    tile = rng.integers(1, 255, (40, 50)).astype(np.uint8)
    assert augmented_tile(tile, "T1", 0) is tile  # the unturned tile is never degraded
    plain = augmented_tile(tile, "T1", 1, degrade=False)
    np.testing.assert_array_equal(plain, np.rot90(tile, -1))  # one clockwise quarter turn
    a = augmented_tile(tile, "T1", 1)
    b = augmented_tile(tile, "T1", 1)
    np.testing.assert_array_equal(a, b)
    assert a.shape == (50, 40) and not np.array_equal(a, plain)
