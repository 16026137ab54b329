"""The presence calibration: Firth's penalised logistic regression on logit(p_deposit), held non-decreasing."""

import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.special import expit, logit

from training.effort.presence import P_CLIP, firth_logistic, presence_coefficients, presence_probability


def _naive_firth(x, y):
    """Oracle: maximise loglik + 0.5 log det(X^T W X) directly (Firth 1993, eq. for canonical links)."""
    X = np.column_stack([np.ones_like(x), x])

    def negative(beta):
        eta = X @ beta
        pi = expit(eta)
        info = X.T @ (X * (pi * (1 - pi))[:, None])
        loglik = np.sum(y * eta - np.logaddexp(0.0, eta))
        return -(loglik + 0.5 * np.linalg.slogdet(info)[1])

    return minimize(negative, np.zeros(2), method="Nelder-Mead",
                    options={"xatol": 1e-10, "fatol": 1e-13, "maxiter": 20000}).x


@pytest.mark.parametrize("k,n", [(0, 5), (1, 4), (3, 10), (10, 10)])
def test_intercept_alone_is_firths_proportion(k, n):
    # Firth (1993): for a binomial proportion the bias-reduced estimate is (k + 1/2) / (n + 1),
    # finite also for k = 0 and k = n, where the maximum likelihood logit is infinite.
    y = np.r_[np.ones(k), np.zeros(n - k)]
    coef = presence_coefficients(np.full(n, 0.7), y)
    assert coef[1] == 0.0
    assert expit(coef[0]) == pytest.approx((k + 0.5) / (n + 1), rel=1e-12)


def test_firth_matches_direct_maximisation():
    rng = np.random.default_rng(4)
    for n in (6, 15, 40):
        x = rng.normal(0.0, 1.5, n)
        y = (rng.random(n) < expit(0.3 + 1.2 * x)).astype(float)
        y[:2] = [0.0, 1.0]
        assert firth_logistic(x, y) == pytest.approx(_naive_firth(x, y), abs=1e-5)


def test_firth_is_finite_under_complete_separation():
    # Every outcome is 1 above x = 0 and 0 below: the maximum likelihood slope runs to infinity.
    x = np.array([-2.0, -1.0, -0.5, 0.5, 1.0, 2.0])
    y = np.array([0.0, 0.0, 0.0, 1.0, 1.0, 1.0])
    beta = firth_logistic(x, y)
    assert np.isfinite(beta).all() and beta[1] > 0
    assert beta == pytest.approx(_naive_firth(x, y), abs=1e-5)


def test_firth_approaches_maximum_likelihood_on_large_samples():
    # Firth's penalty is O(1): with 20,000 observations the estimate is scikit-learn's unpenalised one
    # up to the O(1/n) bias it removes.
    from sklearn.linear_model import LogisticRegression

    rng = np.random.default_rng(8)
    x = rng.normal(0.0, 1.0, 20_000)
    y = (rng.random(len(x)) < expit(-0.5 + 1.3 * x)).astype(int)
    mle = LogisticRegression(C=np.inf, tol=1e-10, max_iter=1000).fit(x[:, None], y)
    assert firth_logistic(x, y) == pytest.approx([mle.intercept_[0], mle.coef_[0, 0]], abs=2e-3)


def test_repeat_counts_equal_repeated_rows():
    # A bootstrap resample given as counts fits exactly as the resample's repeated rows.
    rng = np.random.default_rng(9)
    p = rng.uniform(0.2, 0.999, 30)
    y = rng.random(30) < p
    counts = rng.multinomial(30, np.full(30, 1 / 30), size=4)
    many = presence_coefficients(p, y, counts)
    for c, coef in zip(counts, many):
        rows = np.repeat(np.arange(30), c)
        assert coef == pytest.approx(presence_coefficients(p[rows], y[rows]), abs=1e-8)


def test_calibration_never_falls_and_reads_nan_as_needing_people():
    # Deposits more often at low p_deposit: a falling fit is replaced by the rate, (2 + 1/2) / (4 + 1).
    coef = presence_coefficients([0.2, 0.3, 0.8, 0.9], [1, 1, 0, 0])
    assert coef[1] == 0.0 and expit(coef[0]) == pytest.approx(0.5)
    q = presence_probability(presence_coefficients([0.2, 0.5, 0.7, 0.9, 0.95], [0, 0, 1, 0, 1]),
                             [0.0, 0.3, 0.9, 1.0, np.nan])
    assert np.all(np.diff(q[:4]) >= 0) and q[4] == 1.0 and np.isfinite(q).all()
    # p_deposit of exactly 0 or 1 is read at its clipped logit.
    assert logit(1 - P_CLIP) == pytest.approx(-logit(P_CLIP))
    assert presence_coefficients([np.nan, np.nan], [1, 0]) is None
    assert presence_probability(None, [0.1, 0.2]).tolist() == [1.0, 1.0]


def test_recovers_a_known_presence_law():
    # 5,000 tiles whose presence follows expit(-1 + 1.5 logit p): the fit recovers both coefficients
    # within four standard errors (from the inverse information at the truth, about 0.05 and 0.04).
    rng = np.random.default_rng(12)
    p = rng.beta(5.0, 1.0, 5000)
    y = rng.random(len(p)) < expit(-1.0 + 1.5 * logit(p))
    X = np.column_stack([np.ones(len(p)), logit(p)])
    pi = expit(X @ [-1.0, 1.5])
    se = np.sqrt(np.diag(np.linalg.inv(X.T @ (X * (pi * (1 - pi))[:, None]))))
    coef = presence_coefficients(p, y)
    assert np.all(np.abs(coef - [-1.0, 1.5]) < 4 * se)
