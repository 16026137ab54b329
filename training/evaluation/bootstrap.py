"""Percentile bootstrap intervals over images (tiles of one image are not independent)."""

import numpy as np

from detector.errors import DetectorError

__all__ = [
    "resample_counts",
    "bootstrap_interval",
    "interval_kind",
    "MIN_IMAGES_FOR_CI",
]


def _weighted_quantile(values, weights, q):
    """Quantile of ``values`` per row of ``weights`` (B, n): the smallest value whose cumulative weight reaches q."""
    order = np.argsort(values, kind="mergesort")
    v = values[order]
    w = weights[:, order]
    cum = np.cumsum(w, axis=1)
    total = cum[:, -1:]
    idx = np.argmax(cum >= q * total - 1e-12, axis=1)
    out = v[idx]
    out[total[:, 0] <= 0] = np.nan
    return out


def resample_counts(rng, n_groups, n_boot):
    """How often each of ``n_groups`` groups (images, clusters) is drawn in each of ``n_boot`` resamples
    with replacement of as many groups as there are: float ndarray of shape (n_boot, n_groups)."""
    if n_groups == 0:
        return np.zeros((n_boot, 0))
    return rng.multinomial(n_groups, np.full(n_groups, 1.0 / n_groups), size=n_boot).astype(float)


#: Fewest images for a bootstrap percentile interval to be called a confidence interval; with fewer,
#: the resampled statistics take a handful of values and only their full range is reported.
MIN_IMAGES_FOR_CI = 5


def bootstrap_interval(values, image_ids, statistic="median", *, n_boot=1000, seed=0, level=0.95):
    """Bootstrap interval of a statistic by resampling images with replacement.

    Each replicate draws as many images as there are, with replacement, and
    recomputes the statistic over the units (fans, tiles) of the drawn images,
    an image drawn k times counting k times.

    Parameters
    ----------
    values : array_like of shape (n,) or (n, m)
        Per-unit values. For ``"ratio"`` a (n, 2) array of numerator and
        denominator (e.g. 2 * matches and detections + consensus for F1).
    image_ids : array_like of shape (n,)
        Image of each unit.
    statistic : {"median", "p90", "mean", "ratio"} or callable, optional
        A callable receives (values, weights) with weights of shape (B, n) and
        returns B statistics.
    n_boot : int, optional
        Number of replicates.
    seed : int, optional
        Seed of the resampling (np.random.default_rng).
    level : float, optional
        Coverage of the percentile interval.

    Returns
    -------
    (low, high) : tuple of float or None
        The percentile interval; with fewer than :data:`MIN_IMAGES_FOR_CI`
        images, the full range (min, max) of the resampled statistics, which
        is no confidence interval and must not be called one.
    """
    values = np.asarray(values, dtype=float)
    image_ids = np.asarray(image_ids)
    if values.shape[0] != image_ids.size:
        raise DetectorError(f"values have {values.shape[0]} rows but image_ids have {image_ids.size}.")
    if values.shape[0] == 0:
        return None, None
    finite = np.isfinite(values) if values.ndim == 1 else np.isfinite(values).all(axis=1)
    values, image_ids = values[finite], image_ids[finite]
    if values.shape[0] == 0:
        return None, None
    labels, inverse = np.unique(image_ids, return_inverse=True)
    rng = np.random.default_rng(seed)
    k = labels.size
    weights = resample_counts(rng, k, n_boot)[:, inverse]
    if callable(statistic):
        stats = np.asarray(statistic(values, weights), dtype=float)
    elif statistic == "median":
        stats = _weighted_quantile(values, weights, 0.5)
    elif statistic == "p90":
        stats = _weighted_quantile(values, weights, 0.9)
    elif statistic == "mean":
        with np.errstate(invalid="ignore", divide="ignore"):
            stats = weights @ values / weights.sum(axis=1)
    elif statistic == "ratio":
        with np.errstate(invalid="ignore", divide="ignore"):
            stats = (weights @ values[:, 0]) / (weights @ values[:, 1])
    else:
        raise DetectorError(f"statistic {statistic!r} is not one of median, p90, mean, ratio or a callable.")
    stats = stats[np.isfinite(stats)]
    if stats.size == 0:
        return None, None
    if k < MIN_IMAGES_FOR_CI:
        return float(stats.min()), float(stats.max())
    alpha = (1.0 - level) / 2.0
    low, high = np.quantile(stats, [alpha, 1.0 - alpha])
    return float(low), float(high)


def interval_kind(n_images):
    """What the by-image bootstrap intervals of ``n_images`` images are: a 95 % CI or only a range."""
    if n_images < MIN_IMAGES_FOR_CI:
        return f"range of bootstrap resamples ({n_images} image{'s' if n_images != 1 else ''}: too few for a 95 % CI)"
    return "95 % CI (bootstrap by image)"
