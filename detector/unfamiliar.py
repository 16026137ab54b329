"""How unlike the training tiles a tile is: the out-of-distribution score stored with a model."""

import numpy as np

__all__ = ["DEFAULT_PASS_SHARE", "pass_threshold", "unfamiliarity_distance", "unfamiliarity_score"]


def unfamiliarity_distance(stats, summaries):
    """Distance of per-tile mean feature vectors from the training distribution.

    The root of the mean squared Mahalanobis distance within the leading
    principal components plus the squared residual off them, relative to its
    median on the training tiles.

    Parameters
    ----------
    stats : dict
        ``mean``, ``scale``, ``components``, ``variances``, ``resid_scale`` as
        stored in the model card by training.
    summaries : ndarray of shape (n_tiles, n_features)

    Returns
    -------
    distance : ndarray of shape (n_tiles,)
    """
    Z = (np.atleast_2d(np.asarray(summaries, dtype=np.float64)) - np.asarray(stats["mean"])) / np.asarray(stats["scale"])
    comps = np.asarray(stats["components"])
    proj = Z @ comps.T
    resid = Z - proj @ comps
    maha = np.sum(proj**2 / np.asarray(stats["variances"]), axis=1) / comps.shape[0]
    return np.sqrt(maha + np.sum(resid**2, axis=1) / float(stats["resid_scale"]))


def unfamiliarity_score(stats, summaries):
    """Distance divided by the model's threshold: above 1 means unlike the training tiles.

    Returns NaN for every tile when the model has no stored statistics.
    """
    if not stats:
        return np.full(len(np.atleast_2d(summaries)), np.nan)
    return unfamiliarity_distance(stats, summaries) / float(stats["threshold"])


#: Share of in-distribution held-out tiles that pass the unfamiliarity check by default.
DEFAULT_PASS_SHARE = 0.95


def pass_threshold(values, pass_share=DEFAULT_PASS_SHARE):
    """Smallest value that at least ``pass_share`` of ``values`` do not exceed.

    It is the ``ceil(pass_share * n)``-th smallest finite value (the inverse of
    the empirical distribution function, ``numpy.quantile(...,
    method="inverted_cdf")``), so exactly that many tiles, or more when tied,
    pass a rule ``value <= threshold``.

    Parameters
    ----------
    values : ndarray of shape (n,)
        Unfamiliarity scores (or distances) of in-distribution held-out tiles;
        NaN values are ignored.
    pass_share : float, default=0.95
        Share of the tiles that must pass, in (0, 1].

    Returns
    -------
    threshold : float
        NaN when no value is finite.

    Raises
    ------
    ValueError
        ``pass_share`` outside (0, 1].
    """
    if not (isinstance(pass_share, (int, float)) and 0.0 < pass_share <= 1.0):
        raise ValueError(f"pass_share must be in (0, 1]; got {pass_share!r}.")
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return float("nan")
    return float(np.quantile(v, pass_share, method="inverted_cdf"))
