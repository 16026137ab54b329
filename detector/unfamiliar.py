"""How unlike the training tiles a tile is: the out-of-distribution score stored with a model."""

import numpy as np

__all__ = ["unfamiliarity_distance", "unfamiliarity_score"]


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
