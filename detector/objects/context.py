"""A reading's tile context: do the other deposits of its tile point its way?

Fans of one place and season record the same surface wind, so most fans of a
tile point one way (or two, when the wind turned while they vented) (common
practice: fans are read as wind vanes for that reason). A fan reading that
agrees with the confident fans of the *other* dark components of its tile is
more likely right than one that stands alone, and one that points exactly
against them more likely runs the wrong way; and a fan reading in a tile of
spots is less likely right than one in a tile of fans.

The context model (``context.onnx``) rescores every fan reading from its object
features, its first score (``objects.onnx``) and the context features below,
computed from the first scores of the tile's other components (spot readings
keep their first score: :meth:`detector.inference.model.Model.score_readings`).
A reading's own component never counts, so a component cannot vouch for itself.
"""

import numpy as np

__all__ = ["CONTEXT_FEATURE_NAMES", "CONTEXT_WIDTH_DEG", "context_features", "context_matrix", "reading_layout",
           "score_logit"]

#: A reading agrees with another component's fan reading when their directions are within this angle.
CONTEXT_WIDTH_DEG = 30.0

#: Context features, in order (appended to the object features and the first score's logit).
CONTEXT_FEATURE_NAMES = (
    "ctx_agree",  # share of the other components' fan score within CONTEXT_WIDTH_DEG of the reading's direction
    "ctx_oppose",  # share within CONTEXT_WIDTH_DEG of the opposite direction
    "ctx_log_agree",  # log(1 + the agreeing score itself)
    "ctx_log_fan_mass",  # log(1 + the other components' fan score)
    "ctx_fan_share",  # their fan score against their fan and spot score
    "ctx_relative_score",  # the reading's first score against the tile's highest
)

# Pseudo-score added to every denominator: a tile with one faint neighbour says little.
_PRIOR = 0.5


def score_logit(score):
    """Log-odds of probabilities clipped to [1e-4, 1 - 1e-4], float32."""
    p = np.clip(np.asarray(score, dtype=np.float64), 1e-4, 1.0 - 1e-4)
    return np.log(p / (1.0 - p)).astype(np.float32)


def context_features(owner, is_fan, direction_deg, score, *, width_deg=CONTEXT_WIDTH_DEG):
    """Context features of the readings of one tile.

    Parameters
    ----------
    owner : array_like of int, shape (n,)
        The component (candidate) each reading belongs to.
    is_fan : array_like of bool, shape (n,)
        Fan reading (True) or a component's spot reading (False).
    direction_deg : array_like of float, shape (n,)
        Fan direction, degrees clockwise from image up (ignored for spot readings).
    score : array_like of float, shape (n,)
        First score of each reading, in [0, 1].
    width_deg : float, default=:data:`CONTEXT_WIDTH_DEG`

    Returns
    -------
    ndarray of shape (n, len(CONTEXT_FEATURE_NAMES)), float32
        Agreement features are 0 for spot readings.
    """
    owner = np.asarray(owner)
    is_fan = np.asarray(is_fan, dtype=bool)
    direction = np.asarray(direction_deg, dtype=np.float64)
    score = np.clip(np.asarray(score, dtype=np.float64), 0.0, 1.0)
    n = len(owner)
    out = np.zeros((n, len(CONTEXT_FEATURE_NAMES)), dtype=np.float32)
    if n == 0:
        return out
    other = owner[:, None] != owner[None, :]
    fan_w = np.where(is_fan, score, 0.0)[None, :] * other
    spot_w = np.where(is_fan, 0.0, score)[None, :] * other
    d = np.where(is_fan, direction, 0.0)
    diff = np.abs((d[:, None] - d[None, :] + 180.0) % 360.0 - 180.0)
    mass = fan_w.sum(axis=1)
    agree = (fan_w * (diff <= width_deg)).sum(axis=1)
    oppose = (fan_w * (diff >= 180.0 - width_deg)).sum(axis=1)
    out[:, 0] = np.where(is_fan, agree / (mass + _PRIOR), 0.0)
    out[:, 1] = np.where(is_fan, oppose / (mass + _PRIOR), 0.0)
    out[:, 2] = np.where(is_fan, np.log1p(agree), 0.0)
    out[:, 3] = np.log1p(mass)
    out[:, 4] = mass / (mass + spot_w.sum(axis=1) + _PRIOR)
    out[:, 5] = score / max(score.max(), 1e-6)
    return out


def context_matrix(F, score, owner, is_fan, direction_deg, group=None):
    """The context model's input rows: object features, the first score's logit, context features.

    Parameters
    ----------
    F : ndarray of shape (n, n_object_features)
    score : ndarray of shape (n,)
        First scores (``objects.onnx``).
    owner, is_fan, direction_deg : ndarray of shape (n,)
        As in :func:`context_features`.
    group : ndarray of shape (n,), optional
        The tile of each reading (readings of different tiles never see each
        other); default: all readings are of one tile.

    Returns
    -------
    ndarray of shape (n, n_object_features + 1 + len(CONTEXT_FEATURE_NAMES)), float32
        Rounded to 4 decimals like the object features (see
        :func:`detector.objects.assemble.reading_matrix`).
    """
    F = np.asarray(F, dtype=np.float32)
    score = np.asarray(score, dtype=np.float64)
    owner, is_fan, direction = np.asarray(owner), np.asarray(is_fan, bool), np.asarray(direction_deg, float)
    ctx = np.zeros((len(F), len(CONTEXT_FEATURE_NAMES)), dtype=np.float32)
    if group is None:
        ctx = context_features(owner, is_fan, direction, score)
    else:
        _, code = np.unique(np.asarray(group), return_inverse=True)
        order = np.argsort(code, kind="stable")
        bounds = np.flatnonzero(np.diff(code[order])) + 1
        for idx in np.split(order, bounds):
            if len(idx):
                ctx[idx] = context_features(owner[idx], is_fan[idx], direction[idx], score[idx])
    Z = np.column_stack([F, score_logit(score)[:, None], ctx]).astype(np.float32)
    return np.round(Z, 4)


def reading_layout(candidates):
    """Owner, kind and direction of every reading of some candidates, in the order of
    :func:`detector.objects.assemble.reading_matrix` (each fan reading, then the spot readings).

    Returns
    -------
    owner : ndarray of int
    is_fan : ndarray of bool
    direction_deg : ndarray of float
        The fan's direction; NaN for spot readings.
    """
    owner, is_fan, direction = [], [], []
    for i, c in enumerate(candidates):
        for f in c.fans:
            owner.append(i)
            is_fan.append(True)
            direction.append(float(f["direction_deg"]))
        for _ in c.spots:
            owner.append(i)
            is_fan.append(False)
            direction.append(np.nan)
    return np.array(owner, dtype=int), np.array(is_fan, dtype=bool), np.array(direction, dtype=float)
