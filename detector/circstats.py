"""Circular statistics of directions and axes, in degrees.

Directions (fans) live on [0, 360); axes (spot long axes, structure-tensor
orientations) live on [0, 180) and are handled by angle doubling. Every
function ignores NaN angles (and the weights that go with them) and accepts
optional non-negative weights.

Von Mises fits: :func:`vonmises_fit` (one distribution, maximum likelihood),
:func:`fit_vonmises_mixture` (K components by EM, with its BIC) and
:func:`refit_vonmises_mixture` (the same mixture under many weightings at
once, for bootstrap intervals). Densities are per radian.
"""

import numpy as np

from .errors import DetectorError
from .geometry import angular_difference, axial_difference

__all__ = [
    "circular_mean",
    "resultant_length",
    "circular_std",
    "rayleigh_test",
    "angular_difference",
    "axial_difference",
    "axial_mean",
    "axial_resultant_length",
    "axial_std",
    "robust_circular_mean",
    "robust_axial_mean",
    "grouped_circular_mean",
    "MAX_KAPPA",
    "a1_inverse",
    "vonmises_fit",
    "vonmises_logpdf",
    "fit_vonmises_mixture",
    "refit_vonmises_mixture",
    "loglik_uniform",
]


def _prepare(angles, weights):
    """Flatten angles and weights, drop NaN entries, check the weights."""
    angles = np.asarray(angles, dtype=float).ravel()
    if weights is None:
        weights = np.ones_like(angles)
    else:
        weights = np.asarray(weights, dtype=float).ravel()
        if weights.shape != angles.shape:
            raise DetectorError(f"weights have {weights.size} values but angles have {angles.size}.")
        if np.any(weights < 0):
            raise DetectorError(f"weights must be non-negative; got minimum {np.nanmin(weights)!r}.")
    keep = np.isfinite(angles) & np.isfinite(weights)
    return angles[keep], weights[keep]


def _resultant(angles, weights):
    """Weighted mean resultant vector (C, S) of angles in degrees; NaN when empty."""
    total = weights.sum()
    if angles.size == 0 or total <= 0:
        return np.nan, np.nan
    rad = np.radians(angles)
    return np.dot(weights, np.cos(rad)) / total, np.dot(weights, np.sin(rad)) / total


def circular_mean(angles, weights=None):
    """Mean direction of angles.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; any range (taken mod 360). NaN entries are ignored.
    weights : array_like of shape (n,), optional
        Non-negative weights (e.g. fan length in px); integer weights act as repeats.

    Returns
    -------
    mean : float
        Degrees in [0, 360); NaN when there are no angles or the resultant is zero.
    """
    c, s = _resultant(*_prepare(angles, weights))
    if not np.isfinite(c) or np.hypot(c, s) < 1e-12:
        return np.nan
    return float(np.degrees(np.arctan2(s, c)) % 360.0)


def resultant_length(angles, weights=None):
    """Mean resultant length R in [0, 1] (1: all angles equal); NaN when empty."""
    c, s = _resultant(*_prepare(angles, weights))
    return float(np.hypot(c, s)) if np.isfinite(c) else np.nan


def circular_std(angles, weights=None):
    """Circular standard deviation sqrt(-2 ln R), in degrees (the definition of scipy.stats.circstd)."""
    r = resultant_length(angles, weights)
    if not np.isfinite(r):
        return np.nan
    # Rounding can put R a hair above 1 for identical angles: that spread is 0.
    return float(np.degrees(np.sqrt(-2.0 * np.log(min(max(r, 1e-300), 1.0)))))


def rayleigh_test(angles):
    """Rayleigh test of circular uniformity against a unimodal alternative.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; NaN entries are ignored.

    Returns
    -------
    z : float
        Rayleigh's z = R**2 / n with R = n * r the resultant length.
    p : float
        Approximate p-value ``exp(sqrt(1 + 4n + 4(n**2 - R**2)) - (1 + 2n))``
        (Zar, Biostatistical Analysis, Rayleigh test), clipped to [0, 1].
    """
    angles, weights = _prepare(angles, None)
    n = angles.size
    if n == 0:
        return np.nan, np.nan
    big_r = n * resultant_length(angles)
    z = big_r**2 / n
    p = np.exp(np.sqrt(1.0 + 4.0 * n + 4.0 * (n**2 - big_r**2)) - (1.0 + 2.0 * n))
    return float(z), float(np.clip(p, 0.0, 1.0))


def axial_mean(angles, weights=None):
    """Mean axis of axial data (angles mod 180), by angle doubling; degrees in [0, 180)."""
    mean = circular_mean(2.0 * np.asarray(angles, dtype=float), weights)
    return float((mean / 2.0) % 180.0) if np.isfinite(mean) else np.nan


def axial_resultant_length(angles, weights=None):
    """Mean resultant length of the doubled angles, in [0, 1]."""
    return resultant_length(2.0 * np.asarray(angles, dtype=float), weights)


def axial_std(angles, weights=None):
    """Circular standard deviation of axial data: that of the doubled angles, halved; degrees."""
    return circular_std(2.0 * np.asarray(angles, dtype=float), weights) / 2.0


def robust_circular_mean(angles, weights=None, *, cutoff_deg=45.0, max_iter=50, tol_deg=1e-6):
    """Mean direction that ignores outliers far from the main mode.

    Starts at the weighted mode (the peak of a von Mises kernel density, so a
    minority of flipped or stray fans cannot drag the start; evaluated on a
    0.5 degree grid by circular convolution of a weighted histogram, so time
    and memory grow linearly with the data) and iterates a Tukey-biweight reweighted circular mean:
    an angle ``d`` degrees from the current mean gets weight
    ``w * (1 - (d / cutoff_deg)**2)**2`` and none beyond ``cutoff_deg``.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; NaN entries are ignored.
    weights : array_like of shape (n,), optional
        Non-negative prior weights (e.g. fan length in px).
    cutoff_deg : float, optional
        Angles farther than this from the mean are ignored, degrees in (0, 180].
    max_iter : int, optional
        Iteration limit.
    tol_deg : float, optional
        Stop when the mean moves less than this, degrees.

    Returns
    -------
    mean : float
        Degrees in [0, 360); NaN when there are no angles.
    """
    if not 0.0 < cutoff_deg <= 180.0:
        raise DetectorError(f"cutoff_deg {cutoff_deg!r} is outside (0, 180].")
    angles, weights = _prepare(angles, weights)
    if angles.size == 0 or weights.sum() <= 0:
        return np.nan
    # Kernel concentration tied to the cutoff: a kernel half-width of about cutoff / 2.
    kappa = 1.0 / np.radians(cutoff_deg / 2.0) ** 2
    n_bins = 720
    hist, _ = np.histogram(angles % 360.0, bins=n_bins, range=(0.0, 360.0), weights=weights)
    offsets = np.radians(np.arange(n_bins) * (360.0 / n_bins))
    kernel = np.exp(kappa * (np.cos(offsets) - 1.0))
    density = np.real(np.fft.ifft(np.fft.fft(hist) * np.fft.fft(kernel)))
    mean = (np.argmax(density) + 0.5) * (360.0 / n_bins)
    for _ in range(max_iter):
        d = angular_difference(angles, mean)
        w = weights * np.clip(1.0 - (d / cutoff_deg) ** 2, 0.0, None) ** 2
        new = circular_mean(angles, w)
        if not np.isfinite(new):
            break
        moved = angular_difference(new, mean)
        mean = new
        if moved < tol_deg:
            break
    return float(mean)


def robust_axial_mean(angles, weights=None, *, cutoff_deg=22.5, **kwargs):
    """Robust mean axis (angles mod 180) by angle doubling; ``cutoff_deg`` is in axial degrees."""
    mean = robust_circular_mean(2.0 * np.asarray(angles, dtype=float), weights, cutoff_deg=2.0 * cutoff_deg, **kwargs)
    return float((mean / 2.0) % 180.0) if np.isfinite(mean) else np.nan


def grouped_circular_mean(angles, groups, weights=None):
    """Circular mean per group, all groups at once.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; NaN entries are ignored.
    groups : array_like of shape (n,)
        Group label of each angle (e.g. tile_id).
    weights : array_like of shape (n,), optional
        Non-negative weights.

    Returns
    -------
    labels : ndarray of shape (k,)
        Sorted unique group labels.
    mean : ndarray of shape (k,)
        Mean direction per group, degrees in [0, 360) (NaN for a group without angles).
    resultant : ndarray of shape (k,)
        Mean resultant length per group.
    """
    angles = np.asarray(angles, dtype=float).ravel()
    groups = np.asarray(groups).ravel()
    weights = np.ones_like(angles) if weights is None else np.asarray(weights, dtype=float).ravel()
    if groups.shape != angles.shape or weights.shape != angles.shape:
        raise DetectorError(
            f"angles ({angles.size}), groups ({groups.size}) and weights ({weights.size}) differ in length."
        )
    if np.any(weights < 0):
        raise DetectorError(f"weights must be non-negative; got minimum {np.nanmin(weights)!r}.")
    labels, inverse = np.unique(groups, return_inverse=True)
    valid = np.isfinite(angles) & np.isfinite(weights)
    w = np.where(valid, weights, 0.0)
    rad = np.radians(np.where(valid, angles, 0.0))
    k = labels.size
    total = np.bincount(inverse, weights=w, minlength=k)
    c = np.bincount(inverse, weights=w * np.cos(rad), minlength=k)
    s = np.bincount(inverse, weights=w * np.sin(rad), minlength=k)
    with np.errstate(invalid="ignore", divide="ignore"):
        resultant = np.hypot(c, s) / total
    mean = np.degrees(np.arctan2(s, c)) % 360.0
    empty = ~(total > 0) | ~(resultant > 1e-12)
    mean[empty] = np.nan
    resultant[~(total > 0)] = np.nan
    return labels, mean, resultant


# --------------------------------------------------------------------------- von Mises fits

#: Largest concentration a fit reports: beyond it (a circular spread under 2.6 deg) the
#: likelihood is flat for data rounded to whole degrees, and EM would chase single points.
MAX_KAPPA = 500.0


def _a1(kappa):
    """A1(kappa) = I1(kappa) / I0(kappa), elementwise (exponentially scaled Bessel ratio)."""
    from scipy.special import i0e, i1e

    kappa = np.asarray(kappa, dtype=float)
    return i1e(kappa) / i0e(kappa)


def _best_fisher(r):
    """Best and Fisher's (1981) approximation of the inverse of A1, piecewise in r."""
    return np.where(
        r < 0.53,
        2.0 * r + r**3 + 5.0 * r**5 / 6.0,
        np.where(r < 0.85, -0.4 + 1.39 * r + 0.43 / (1.0 - r), 1.0 / (r**3 - 4.0 * r**2 + 3.0 * r)),
    )


def a1_inverse(r):
    """Concentration kappa whose von Mises mean resultant length is ``r``: A1(kappa) = r.

    The maximum-likelihood estimate of kappa for a mean resultant length r.
    Starts from the approximation of Best and Fisher (1981) and refines it by
    Newton steps on A1(kappa) - r (A1' = 1 - A1/kappa - A1**2), so the result
    is the exact root, like ``scipy.stats.vonmises.fit``.

    Parameters
    ----------
    r : float or ndarray
        Mean resultant lengths in [0, 1].

    Returns
    -------
    kappa : float or ndarray
        Concentrations in [0, MAX_KAPPA]; 0 for r = 0.

    References
    ----------
    Best, D. J. and Fisher, N. I. (1981). The bias of the maximum likelihood
    estimators of the von Mises-Fisher concentration parameters. Communications
    in Statistics, Simulation and Computation 10, 493-502.
    Fisher, N. I. (1993). Statistical Analysis of Circular Data, section 4.5.5.
    """
    r_in = np.asarray(r, dtype=float)
    r = np.clip(r_in, 0.0, 1.0 - 1e-12)
    with np.errstate(divide="ignore", invalid="ignore"):
        kappa = _best_fisher(r)
    kappa = np.clip(np.nan_to_num(kappa, nan=0.0, posinf=MAX_KAPPA), 0.0, MAX_KAPPA)
    for _ in range(30):
        a = _a1(kappa)
        safe = np.maximum(kappa, 1e-12)
        slope = np.where(kappa > 1e-8, 1.0 - a / safe - a * a, 0.5)
        step = (a - r) / np.maximum(slope, 1e-12)
        new = np.clip(kappa - step, 0.0, MAX_KAPPA)
        done = np.all(np.abs(new - kappa) <= 1e-12 * np.maximum(1.0, kappa))
        kappa = new
        if done:
            break
    kappa = np.where(np.isfinite(r_in), kappa, np.nan)
    return float(kappa) if kappa.ndim == 0 else kappa


def vonmises_fit(angles, weights=None):
    """Maximum-likelihood von Mises fit of directions.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; NaN entries are ignored.
    weights : array_like of shape (n,), optional
        Non-negative weights; integer weights act as repeats.

    Returns
    -------
    mean_deg : float
        Mean direction, degrees in [0, 360) (the circular mean).
    kappa : float
        Concentration, the root of A1(kappa) = R (see :func:`a1_inverse`); NaN when empty.
    """
    angles, weights = _prepare(angles, weights)
    if angles.size == 0 or weights.sum() <= 0:
        return np.nan, np.nan
    return circular_mean(angles, weights), a1_inverse(resultant_length(angles, weights))


def vonmises_logpdf(angles, mean_deg, kappa):
    """Log density of the von Mises distribution per radian, at angles in degrees.

    ``log f = kappa cos(x - mu) - log(2 pi I0(kappa))``; broadcasts over its arguments.
    """
    from scipy.special import i0e

    x = np.radians(np.asarray(angles, dtype=float))
    mu = np.radians(np.asarray(mean_deg, dtype=float))
    kappa = np.asarray(kappa, dtype=float)
    return kappa * (np.cos(x - mu) - 1.0) - np.log(2.0 * np.pi * i0e(kappa))


def _em(x, w, mu, kappa, pi, *, max_iter, tol):
    """Weighted EM of K-component von Mises mixtures, R fits at once.

    Parameters
    ----------
    x : ndarray of shape (n,)
        Angles, radians.
    w : ndarray of shape (R, n)
        Non-negative weights of every fit (bootstrap multiplicities, fan weights).
    mu, kappa, pi : ndarray of shape (R, K)
        Starting means (radians), concentrations and mixing weights.

    Returns
    -------
    mu, kappa, pi : ndarray of shape (R, K)
    loglik : ndarray of shape (R,)
        Weighted log-likelihood (per radian) at the returned parameters.
    """
    from scipy.special import i0e, logsumexp

    cos_x, sin_x = np.cos(x), np.sin(x)
    total = w.sum(axis=1)
    previous = np.full(w.shape[0], -np.inf)
    for _ in range(max_iter):
        # (R, n, K) log of pi_k f_k(x_i)
        log_norm = np.log(2.0 * np.pi * i0e(kappa)) + kappa
        cos_d = cos_x[None, :, None] * np.cos(mu)[:, None, :] + sin_x[None, :, None] * np.sin(mu)[:, None, :]
        log_p = np.log(np.maximum(pi, 1e-300))[:, None, :] + kappa[:, None, :] * cos_d - log_norm[:, None, :]
        log_mix = logsumexp(log_p, axis=2)
        loglik = (w * log_mix).sum(axis=1)
        resp = np.exp(log_p - log_mix[:, :, None]) * w[:, :, None]
        n_k = resp.sum(axis=1)
        c = np.einsum("rnk,n->rk", resp, cos_x)
        s = np.einsum("rnk,n->rk", resp, sin_x)
        with np.errstate(invalid="ignore", divide="ignore"):
            r_bar = np.where(n_k > 0, np.hypot(c, s) / n_k, 0.0)
        mu = np.where(n_k > 0, np.arctan2(s, c), mu)
        kappa = np.asarray(a1_inverse(r_bar), dtype=float).reshape(r_bar.shape)
        pi = n_k / np.maximum(total, 1e-300)[:, None]
        if np.all(np.abs(loglik - previous) <= tol * np.maximum(total, 1.0)):
            break
        previous = loglik
    log_norm = np.log(2.0 * np.pi * i0e(kappa)) + kappa
    cos_d = cos_x[None, :, None] * np.cos(mu)[:, None, :] + sin_x[None, :, None] * np.sin(mu)[:, None, :]
    log_p = np.log(np.maximum(pi, 1e-300))[:, None, :] + kappa[:, None, :] * cos_d - log_norm[:, None, :]
    loglik = (w * logsumexp(log_p, axis=2)).sum(axis=1)
    return mu, kappa, pi, loglik


def fit_vonmises_mixture(angles, n_components, weights=None, *, starts=None, max_iter=300, tol=1e-9):
    """Fit a mixture of von Mises distributions to directions by EM (maximum likelihood).

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; NaN entries are ignored.
    n_components : int
        1 or more. One component is the closed-form fit of :func:`vonmises_fit`.
    weights : array_like of shape (n,), optional
        Non-negative weights; they are rescaled to mean 1, so the log-likelihood
        counts ``n`` observations whatever the weights' unit.
    starts : array_like of shape (S, n_components), optional
        Starting means in degrees; each start is run and the best likelihood
        kept. Default: the two highest peaks of a kernel density for two
        components, plus starts spread around the circle.
    max_iter : int, default=300
    tol : float, default=1e-9
        Stop when the log-likelihood per observation changes less than this.

    Returns
    -------
    fit : dict
        ``mean_deg``, ``kappa``, ``weight`` (ndarrays of shape (K,), sorted by
        decreasing weight), ``loglik`` (per radian), ``n`` and ``bic``
        (``-2 loglik + (3K - 1) ln n``).

    References
    ----------
    Banerjee, A., Dhillon, I. S., Ghosh, J. and Sra, S. (2005). Clustering on
    the unit hypersphere using von Mises-Fisher distributions. Journal of
    Machine Learning Research 6, 1345-1382 (the EM updates).
    Schwarz, G. (1978). Estimating the dimension of a model. Annals of
    Statistics 6, 461-464 (BIC).
    """
    k = int(n_components)
    if k < 1:
        raise DetectorError(f"n_components must be at least 1; got {n_components!r}.")
    angles, weights = _prepare(angles, weights)
    n = angles.size
    if n == 0 or weights.sum() <= 0:
        raise DetectorError("a von Mises mixture needs at least one direction with positive weight.")
    w = weights * (n / weights.sum())
    x = np.radians(angles)
    if starts is None:
        starts = _default_starts(angles, w, k)
    starts = np.atleast_2d(np.asarray(starts, dtype=float))
    if starts.shape[1] != k:
        raise DetectorError(f"starts have {starts.shape[1]} means per row; expected {k}.")
    r = starts.shape[0]
    mu0 = np.radians(starts)
    kappa0 = np.full((r, k), max(1.0, float(a1_inverse(resultant_length(angles, w)))))
    pi0 = np.full((r, k), 1.0 / k)
    mu, kappa, pi, loglik = _em(x, np.broadcast_to(w, (r, n)).copy(), mu0, kappa0, pi0, max_iter=max_iter, tol=tol)
    best = int(np.nanargmax(loglik))
    order = np.argsort(-pi[best], kind="stable")
    mean = np.degrees(mu[best][order]) % 360.0
    return {
        "mean_deg": mean,
        "kappa": kappa[best][order],
        "weight": pi[best][order],
        "loglik": float(loglik[best]),
        "n": int(n),
        "bic": float(-2.0 * loglik[best] + (3 * k - 1) * np.log(n)),
    }


def _default_starts(angles, weights, k):
    """Starting means: the k highest peaks of a von Mises kernel density, then spread-out rows."""
    grid = np.arange(0.0, 360.0, 2.0)
    density = np.exp(vonmises_logpdf(grid[:, None], angles[None, :], 8.0)) @ weights
    is_peak = (density >= np.roll(density, 1)) & (density > np.roll(density, -1))
    peaks = grid[is_peak][np.argsort(-density[is_peak], kind="stable")]
    mean = circular_mean(angles, weights)
    mean = 0.0 if not np.isfinite(mean) else mean
    rows = []
    if peaks.size >= k:
        rows.append(peaks[:k])
    offsets = np.arange(k) * (360.0 / k)
    for turn in (0.0, 45.0, 90.0, 135.0):
        rows.append((mean + turn + offsets) % 360.0)
    return np.array(rows)


def loglik_uniform(n):
    """Log-likelihood (per radian) of ``n`` directions under the circular uniform distribution."""
    return -float(n) * np.log(2.0 * np.pi)


def refit_vonmises_mixture(angles, weight_rows, fit, *, max_iter=100, tol=1e-7):
    """Refit a mixture under many weightings at once (e.g. bootstrap replicates).

    Each row starts from ``fit`` and its components are relabelled to the
    nearest of ``fit``'s means (the assignment with the least total angular
    distance), so column ``j`` of every output is component ``j`` of ``fit``.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; must be finite.
    weight_rows : array_like of shape (R, n)
        Non-negative weights of each refit (e.g. bootstrap multiplicity times fan weight).
    fit : dict
        A result of :func:`fit_vonmises_mixture` on the same angles.

    Returns
    -------
    mean_deg, kappa, weight : ndarray of shape (R, K)
        Rows whose weights are all zero are NaN.
    """
    from itertools import permutations

    x = np.radians(np.asarray(angles, dtype=float).ravel())
    w = np.asarray(weight_rows, dtype=float)
    if w.ndim != 2 or w.shape[1] != x.size:
        raise DetectorError(f"weight_rows has shape {w.shape}; expected (R, {x.size}).")
    if not np.all(np.isfinite(x)):
        raise DetectorError("refit_vonmises_mixture needs finite angles.")
    r, k = w.shape[0], len(fit["mean_deg"])
    sums = w.sum(axis=1, keepdims=True)
    w = np.where(sums > 0, w * (x.size / np.where(sums > 0, sums, 1.0)), 0.0)
    mu0 = np.tile(np.radians(fit["mean_deg"]), (r, 1))
    kappa0 = np.tile(np.asarray(fit["kappa"], dtype=float), (r, 1))
    pi0 = np.tile(np.asarray(fit["weight"], dtype=float), (r, 1))
    mu, kappa, pi, _ = _em(x, w, mu0, kappa0, pi0, max_iter=max_iter, tol=tol)
    mean = np.degrees(mu) % 360.0
    if k > 1:
        perms = np.array(list(permutations(range(k))))
        cost = np.stack([angular_difference(mean[:, p], np.asarray(fit["mean_deg"])[None, :]).sum(axis=1)
                         for p in perms], axis=1)
        choice = perms[np.argmin(cost, axis=1)]
        rows = np.arange(r)[:, None]
        mean, kappa, pi = mean[rows, choice], kappa[rows, choice], pi[rows, choice]
    empty = (sums[:, 0] <= 0)
    for a in (mean, kappa, pi):
        a[empty] = np.nan
    return mean, kappa, pi
