"""How unlike the training tiles a tile is: the out-of-distribution score stored with a model."""

import numpy as np

__all__ = [
    "DEFAULT_PASS_SHARE",
    "FEATURE_GROUPS",
    "SHARE_COLUMNS",
    "UNFAMILIARITY_GROUPS",
    "feature_group_index",
    "pass_threshold",
    "unfamiliarity_contributions",
    "unfamiliarity_distance",
    "unfamiliarity_parts",
    "unfamiliarity_score",
]

#: Feature groups of the unfamiliarity breakdown: (name, what it measures, feature-name prefixes).
#: A feature of no listed prefix falls in the last group, "other".
FEATURE_GROUPS = (
    ("intensity", "intensity and darkness", ("int_",)),
    ("gradients", "gradient histograms", ("hog_",)),
    ("cooccurrence", "co-occurrence texture", ("glcm_",)),
    ("local_patterns", "local binary patterns", ("lbp",)),
    ("structure", "structure tensor", ("st_",)),
    ("polarity", "polarity along the axis", ("pol_",)),
    ("other", "other features", ()),
)

#: Group names, in the order of :func:`unfamiliarity_parts`' columns.
UNFAMILIARITY_GROUPS = tuple(name for name, _, _ in FEATURE_GROUPS)

#: Columns of the screen's tiles.csv holding each group's share of the squared distance.
SHARE_COLUMNS = tuple(f"unfamiliarity_share_{name}" for name in UNFAMILIARITY_GROUPS)


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


def feature_group_index(feature_names):
    """Index into :data:`FEATURE_GROUPS` of each feature, by its name's prefix.

    Parameters
    ----------
    feature_names : sequence of str

    Returns
    -------
    index : ndarray of shape (n_features,), int
    """
    other = len(FEATURE_GROUPS) - 1
    index = np.full(len(feature_names), other, dtype=np.int64)
    for i, name in enumerate(feature_names):
        for g, (_, _, prefixes) in enumerate(FEATURE_GROUPS):
            if any(str(name).startswith(prefix) for prefix in prefixes):
                index[i] = g
                break
    return index


def unfamiliarity_parts(stats, summaries, feature_names):
    """Share of each feature group in the squared unfamiliarity distance of each tile.

    The squared distance of :func:`unfamiliarity_distance` is a quadratic form
    ``z^T M z`` of the standardised summary ``z``, with
    ``M = C^T diag(1 / (k var)) C + (I - C^T C) / resid_scale`` (``C`` the
    ``k`` orthonormal principal components). Writing it as ``|M^1/2 z|^2``
    splits it into one non-negative term per feature, ``(M^1/2 z)_j^2``, the
    complete decomposition contribution; a group's share is the sum over its
    features divided by the total. Since the two parts of ``M`` act on
    orthogonal subspaces, ``M^1/2 = C^T diag(1 / sqrt(k var)) C + (I - C^T C) /
    sqrt(resid_scale)``.

    Because the score is proportional to the distance, removing group ``g``'s
    part alone would leave a score of ``score * sqrt(1 - share_g)``.

    Parameters
    ----------
    stats : dict
        The model card's ``unfamiliarity`` statistics.
    summaries : ndarray of shape (n_tiles, n_features)
        Mean feature vector of each tile.
    feature_names : sequence of str
        The model's feature names, in column order (grouped by
        :func:`feature_group_index`).

    Returns
    -------
    shares : ndarray of shape (n_tiles, len(FEATURE_GROUPS))
        Rows sum to 1; NaN rows for tiles at distance 0 and for every tile
        when the model has no stored statistics.

    References
    ----------
    .. [1] C. F. Alcala and S. J. Qin, "Reconstruction-based contribution for
       process monitoring", Automatica 45(7), 1593-1600, 2009 (complete
       decomposition contributions; cited from memory).
    .. [2] H. H. Yue and S. J. Qin, "Reconstruction-based fault identification
       using a combined index", Industrial & Engineering Chemistry Research
       40(20), 4403-4414, 2001 (the combined index of a principal-component
       distance and the residual; cited from memory).
    """
    summaries = np.atleast_2d(np.asarray(summaries, dtype=np.float64))
    if not stats:
        return np.full((len(summaries), len(FEATURE_GROUPS)), np.nan)
    if summaries.shape[1] != len(feature_names):
        raise ValueError(f"summaries have {summaries.shape[1]} features but {len(feature_names)} feature names "
                         f"were given.")
    per_feature = unfamiliarity_contributions(stats, summaries)
    sums = per_feature @ np.eye(len(FEATURE_GROUPS))[feature_group_index(feature_names)]
    total = per_feature.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total[:, None] > 0, sums / total[:, None], np.nan)


def unfamiliarity_contributions(stats, summaries):
    """Per-feature terms ``(M^1/2 z)_j^2`` of the squared unfamiliarity distance (see :func:`unfamiliarity_parts`).

    Parameters
    ----------
    stats : dict
    summaries : ndarray of shape (n_tiles, n_features)

    Returns
    -------
    contributions : ndarray of shape (n_tiles, n_features)
        Non-negative; each row sums to the tile's ``unfamiliarity_distance ** 2``.
    """
    Z = (np.atleast_2d(np.asarray(summaries, dtype=np.float64)) - np.asarray(stats["mean"])) / np.asarray(stats["scale"])
    comps = np.asarray(stats["components"], dtype=np.float64)
    proj = Z @ comps.T
    root = (proj / np.sqrt(comps.shape[0] * np.asarray(stats["variances"]))) @ comps \
        + (Z - proj @ comps) / np.sqrt(float(stats["resid_scale"]))
    return root**2


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
