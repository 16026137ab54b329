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


# --------------------------------------------------------------------------- von Mises fits


@pytest.mark.parametrize("seed, kappa", [(0, 0.8), (1, 3.0), (2, 12.0), (3, 60.0)])
def test_vonmises_fit_matches_scipy(seed, kappa):
    # Reference: scipy.stats.vonmises.fit (maximum likelihood, scale fixed at 1) and circmean.
    rng = np.random.default_rng(seed)
    x = rng.vonmises(rng.uniform(-np.pi, np.pi), kappa, size=150)
    mean, k_hat = circstats.vonmises_fit(np.degrees(x))
    k_ref, loc_ref, _ = stats.vonmises.fit(x, fscale=1)
    assert k_hat == pytest.approx(k_ref, rel=1e-6)
    assert circstats.angular_difference(mean, np.degrees(loc_ref)) < 1e-6
    assert circstats.angular_difference(mean, stats.circmean(np.degrees(x), high=360, low=0)) < 1e-9


def test_zar_example_concentration_and_spread():
    # Zar, Biostatistical Analysis, circular mean example (the eight directions of the
    # Rayleigh example above; r = 0.82522 from memory, self-consistent with the sums).
    angles = [45, 55, 81, 96, 110, 117, 132, 154]
    r = circstats.resultant_length(angles)
    # Circular standard deviation s0 = sqrt(-2 ln r) (Zar, eq. 26.21; Mardia and Jupp 2000, 2.3.12),
    # the definition of scipy.stats.circstd.
    assert circstats.circular_std(angles) == pytest.approx(np.degrees(np.sqrt(-2 * np.log(0.82522))), abs=0.01)
    assert circstats.circular_std(angles) == pytest.approx(stats.circstd(angles, high=360, low=0), rel=1e-12)
    # Maximum-likelihood kappa against scipy, and against the Best and Fisher (1981)
    # approximation for 0.53 <= r < 0.85 (Fisher 1993, eq. 4.41): -0.4 + 1.39 r + 0.43 / (1 - r).
    kappa = circstats.a1_inverse(r)
    assert kappa == pytest.approx(stats.vonmises.fit(np.radians(angles), fscale=1)[0], rel=1e-6)
    assert kappa == pytest.approx(-0.4 + 1.39 * r + 0.43 / (1 - r), rel=0.02)


@pytest.mark.parametrize("kappa", [0.0, 0.3, 1.0, 2.5, 7.0, 40.0, 300.0])
def test_a1_inverse_inverts_bessel_ratio(kappa):
    # A1(kappa) = I1(kappa) / I0(kappa) from scipy.special (the mean resultant length of a von Mises).
    from scipy.special import i0, i1

    r = i1(kappa) / i0(kappa) if kappa < 700 else 1.0
    assert circstats.a1_inverse(r) == pytest.approx(kappa, abs=1e-6 * max(1.0, kappa))


def test_vonmises_logpdf_matches_scipy():
    x = np.array([0.0, 45.0, 180.0, 300.0])
    ref = stats.vonmises.logpdf(np.radians(x), 2.5, loc=np.radians(30.0))
    assert np.allclose(circstats.vonmises_logpdf(x, 30.0, 2.5), ref, atol=1e-12)


def test_rayleigh_large_sample_tends_to_exp_minus_z():
    # Rayleigh (1880); Mardia and Jupp (2000), section 6.3.1: for large n, P(Z > z) -> exp(-z).
    n = 200_000
    grid = np.linspace(0, 2 * np.pi, n, endpoint=False)
    angles = np.degrees(grid + 0.008 * np.sin(grid))  # a slight pull toward 90 deg: z about 3
    z, p = circstats.rayleigh_test(angles)
    assert 1.0 < z < 10.0
    assert p == pytest.approx(np.exp(-z), rel=2e-3)


def test_mixture_one_component_is_the_closed_form_fit():
    rng = np.random.default_rng(9)
    angles = np.degrees(rng.vonmises(1.0, 5.0, 120))
    fit = circstats.fit_vonmises_mixture(angles, 1)
    mean, kappa = circstats.vonmises_fit(angles)
    assert circstats.angular_difference(fit["mean_deg"][0], mean) < 1e-6
    assert fit["kappa"][0] == pytest.approx(kappa, rel=1e-6)
    # Its log-likelihood is scipy's at the same parameters.
    ref = stats.vonmises.logpdf(np.radians(angles), kappa, loc=np.radians(mean)).sum()
    assert fit["loglik"] == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("seed, modes, kappas, weights", [
    (0, (40.0, 160.0), (8.0, 5.0), (0.6, 0.4)),
    (1, (350.0, 250.0), (12.0, 12.0), (0.5, 0.5)),
    (2, (100.0, 200.0), (20.0, 6.0), (0.7, 0.3)),
])
def test_mixture_recovers_simulated_modes(seed, modes, kappas, weights):
    # Simulated von Mises mixtures (fixed seed, n = 600): modes within 5 deg, weights within
    # 0.07, concentrations within 35 %; and BIC prefers two components over one.
    rng = np.random.default_rng(seed)
    n = 600
    which = rng.random(n) < weights[1]
    x = np.where(which, rng.vonmises(np.radians(modes[1]), kappas[1], n), rng.vonmises(np.radians(modes[0]), kappas[0], n))
    angles = np.degrees(x) % 360
    two = circstats.fit_vonmises_mixture(angles, 2)
    one = circstats.fit_vonmises_mixture(angles, 1)
    assert two["bic"] < one["bic"]
    order = np.argsort([circstats.angular_difference(two["mean_deg"], m).min() for m in modes])
    for m, k, w in zip(modes, kappas, weights):
        i = int(np.argmin(circstats.angular_difference(two["mean_deg"], m)))
        assert circstats.angular_difference(two["mean_deg"][i], m) < 5.0
        assert two["weight"][i] == pytest.approx(w, abs=0.07)
        assert two["kappa"][i] == pytest.approx(k, rel=0.35)
    assert order.size == 2


def test_bic_prefers_one_component_for_one_wind():
    rng = np.random.default_rng(12)
    angles = np.degrees(rng.vonmises(2.0, 6.0, 400))
    assert circstats.fit_vonmises_mixture(angles, 1)["bic"] < circstats.fit_vonmises_mixture(angles, 2)["bic"]


def test_refit_with_unit_weights_reproduces_the_fit():
    rng = np.random.default_rng(13)
    angles = np.degrees(np.concatenate([rng.vonmises(0.5, 10, 150), rng.vonmises(2.5, 10, 100)]))
    fit = circstats.fit_vonmises_mixture(angles, 2)
    mean, kappa, weight = circstats.refit_vonmises_mixture(angles, np.ones((3, angles.size)), fit)
    assert np.all(circstats.angular_difference(mean, fit["mean_deg"][None, :]) < 1e-3)
    assert np.allclose(weight, fit["weight"][None, :], atol=1e-4)


def test_mixture_bad_input():
    with pytest.raises(DetectorError, match="at least one direction"):
        circstats.fit_vonmises_mixture([], 2)
    with pytest.raises(DetectorError, match="n_components"):
        circstats.fit_vonmises_mixture([1.0, 2.0], 0)
