import numpy as np
import pytest
from scipy import stats

from detector import circstats
from detector.errors import DetectorError


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4])
def test_mean_and_std_match_scipy(seed):
    rng = np.random.default_rng(seed)
    angles = (rng.vonmises(rng.uniform(-np.pi, np.pi), rng.uniform(0.5, 8.0), size=40) * 180 / np.pi) % 360
    # Reference: scipy.stats.circmean / circstd in degrees via high=360.
    assert np.isclose(
        circstats.angular_difference(circstats.circular_mean(angles), stats.circmean(angles, high=360, low=0)), 0.0, atol=1e-9
    )
    assert np.isclose(circstats.circular_std(angles), stats.circstd(angles, high=360, low=0), rtol=1e-9)


@pytest.mark.parametrize("seed", [5, 6])
def test_nan_ignored_like_scipy_omit(seed):
    rng = np.random.default_rng(seed)
    angles = rng.uniform(0, 360, 30)
    angles[[3, 7]] = np.nan
    ref = stats.circmean(angles, high=360, low=0, nan_policy="omit")
    assert np.isclose(circstats.angular_difference(circstats.circular_mean(angles), ref), 0.0, atol=1e-9)


def test_rayleigh_zar_worked_example():
    # Zar, Biostatistical Analysis, Rayleigh test worked example on eight
    # directions (values from memory): r = 0.82522, z = 5.448, 0.001 < P < 0.002,
    # mean angle 99 degrees.
    angles = [45, 55, 81, 96, 110, 117, 132, 154]
    z, p = circstats.rayleigh_test(angles)
    assert np.isclose(circstats.resultant_length(angles), 0.82522, atol=5e-5)
    assert np.isclose(z, 5.448, atol=5e-3)
    assert 0.001 < p < 0.002
    assert round(circstats.circular_mean(angles)) == 99
    # Independent cross-check of the same numbers straight from the sums of sines and cosines.
    rad = np.radians(angles)
    big_r = np.hypot(np.cos(rad).sum(), np.sin(rad).sum())
    assert np.isclose(z, big_r**2 / 8)
    assert np.isclose(stats.circmean(angles, high=360, low=0), circstats.circular_mean(angles))


def test_rayleigh_pingouin_documented_example():
    # pingouin.circ_rayleigh documentation example: radians [0.785, 1.570, 3.141,
    # 0.839, 5.934] give z = 1.236 and p = 0.304844 (same Zar approximation).
    z, p = circstats.rayleigh_test(np.degrees([0.785, 1.570, 3.141, 0.839, 5.934]))
    assert round(z, 3) == 1.236
    assert round(p, 6) == 0.304844


def test_rayleigh_uniform_not_significant():
    z, p = circstats.rayleigh_test(np.arange(0, 360, 10.0))
    assert z < 1e-20 and p == pytest.approx(1.0, abs=1e-6)


def test_hand_cases():
    assert circstats.angular_difference(circstats.circular_mean([350, 10]), 0.0) < 1e-9
    assert circstats.axial_mean([10, 190]) == pytest.approx(10.0)
    assert circstats.axial_mean([175, 5]) % 180 == pytest.approx(0.0, abs=1e-9) or circstats.axial_mean(
        [175, 5]
    ) == pytest.approx(180.0)
    assert circstats.resultant_length([0, 180]) == pytest.approx(0.0, abs=1e-12)
    assert np.isnan(circstats.circular_mean([0, 180]))
    assert circstats.axial_resultant_length([0, 180]) == pytest.approx(1.0)
    assert circstats.axial_std([30, 210]) == pytest.approx(0.0, abs=1e-5)
    assert np.isnan(circstats.circular_mean([]))
    assert circstats.angular_difference is circstats.angular_difference  # re-export exists
    assert circstats.angular_difference(350, 10) == pytest.approx(20.0)


def test_weighted_mean_equals_repeated():
    rng = np.random.default_rng(11)
    angles = rng.uniform(0, 360, 7)
    counts = rng.integers(1, 5, 7)
    repeated = np.repeat(angles, counts)
    assert circstats.circular_mean(angles, counts) == pytest.approx(circstats.circular_mean(repeated))
    assert circstats.circular_std(angles, counts) == pytest.approx(circstats.circular_std(repeated))
    assert circstats.axial_mean(angles, counts) == pytest.approx(circstats.axial_mean(repeated))


def test_bad_weights_raise():
    with pytest.raises(DetectorError, match="non-negative"):
        circstats.circular_mean([1, 2], [1, -1])
    with pytest.raises(DetectorError, match="weights have 1"):
        circstats.circular_mean([1, 2], [1])


def test_robust_mean_ignores_outliers():
    rng = np.random.default_rng(3)
    good = 40 + rng.normal(0, 5, 20)
    bad = np.array([100.0, 105.0, 110.0, 115.0, 225.0])  # stray and flipped fans on one side
    angles = np.concatenate([good, bad])
    plain = circstats.circular_mean(angles)
    robust = circstats.robust_circular_mean(angles)
    assert circstats.angular_difference(robust, circstats.circular_mean(good)) < 2.0
    assert circstats.angular_difference(plain, 40) > 5 + circstats.angular_difference(robust, 40)
    # Clean von Mises data: the robust mean agrees with the plain one.
    clean = np.degrees(rng.vonmises(1.0, 20.0, 50))
    assert circstats.angular_difference(circstats.robust_circular_mean(clean), circstats.circular_mean(clean)) < 1.5
    assert circstats.axial_difference(circstats.robust_axial_mean(np.concatenate([good % 180, [120.0]])), 40) < 3


def test_grouped_mean_matches_per_group():
    rng = np.random.default_rng(8)
    angles = rng.uniform(0, 360, 60)
    weights = rng.uniform(1, 10, 60)
    groups = rng.integers(0, 5, 60)
    labels, mean, resultant = circstats.grouped_circular_mean(angles, groups, weights)
    for label, m, r in zip(labels, mean, resultant):
        sel = groups == label
        assert circstats.angular_difference(m, circstats.circular_mean(angles[sel], weights[sel])) < 1e-9
        assert r == pytest.approx(circstats.resultant_length(angles[sel], weights[sel]))
