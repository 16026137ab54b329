"""A reading's context: do the other deposits of its tile, and of its image block, point its way?

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

The same wind blows over more than one tile, and an image's lighting, contrast
and blur lower every first score of the image alike: the block features
(:func:`block_features`) weigh a reading against every other component of the
tiles of its *context block*, the tiles of one image whose top-left corners fall
in one cell of :data:`CONTEXT_BLOCK_TILES` tiles (4 rows of 2; with 800 x 600
px tiles 1600 px wide and 2400 px high, a whole image of the benchmark): their agreement with its direction, and its
first score against the best of the block's. Detection reads every tile of a
block before it scores any (:func:`detector.inference.detect.detect_block`).
"""

import numpy as np

__all__ = ["CONTEXT_FEATURE_NAMES", "CONTEXT_WIDTH_DEG", "CONTEXT_BLOCK_TILES", "BLOCK_TOP_READINGS", "block_features", "context_blocks",
           "block_keys", "context_features", "context_matrix", "reading_layout", "score_logit"]

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
    "blk_agree",  # as ctx_agree, over the other components of the reading's context block
    "blk_oppose",  # as ctx_oppose, over the same
    "blk_log_fan_mass",  # log(1 + their fan score)
    "blk_relative_score",  # the reading's first score against the mean of the block's best fan first scores
    "blk_top_score",  # that mean itself
)

#: Rows and columns of tiles in the cells that gather an image's tiles into context blocks.
CONTEXT_BLOCK_TILES = (4, 2)

#: The block's best fan first scores that ``blk_relative_score`` and ``blk_top_score`` average.
BLOCK_TOP_READINGS = 5

_N_TILE = 6  # tile features come first in CONTEXT_FEATURE_NAMES

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
    ndarray of shape (n, 6), float32
        The tile features (the first six of :data:`CONTEXT_FEATURE_NAMES`); agreement
        features are 0 for spot readings.
    """
    owner = np.asarray(owner)
    is_fan = np.asarray(is_fan, dtype=bool)
    direction = np.asarray(direction_deg, dtype=np.float64)
    score = np.clip(np.asarray(score, dtype=np.float64), 0.0, 1.0)
    n = len(owner)
    out = np.zeros((n, _N_TILE), dtype=np.float32)
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


def block_features(component, is_fan, direction_deg, score, *, width_deg=CONTEXT_WIDTH_DEG,
                   top=BLOCK_TOP_READINGS):
    """Block features of the readings of one context block.

    Parameters
    ----------
    component : array_like, shape (n,)
        A key of each reading's component unique within the block (its tile and its
        index there).
    is_fan, direction_deg, score : array_like of shape (n,)
        As in :func:`context_features`.
    width_deg : float, default=:data:`CONTEXT_WIDTH_DEG`
    top : int, default=:data:`BLOCK_TOP_READINGS`

    Returns
    -------
    ndarray of shape (n, 5), float32
        The block features (the last five of :data:`CONTEXT_FEATURE_NAMES`); agreement
        features are 0 for spot readings.
    """
    _, component = np.unique(np.asarray(component), return_inverse=True)
    is_fan = np.asarray(is_fan, dtype=bool)
    direction = np.where(is_fan, np.asarray(direction_deg, dtype=np.float64) % 360.0, 0.0)
    score = np.clip(np.asarray(score, dtype=np.float64), 0.0, 1.0)
    out = np.zeros((len(component), len(CONTEXT_FEATURE_NAMES) - _N_TILE), dtype=np.float32)
    if len(component) == 0:
        return out
    # A block holds thousands of readings: the sums over the other components are the sums over the
    # whole block (windows over the sorted directions) less those over the reading's own component
    # (its pairs), never an n x n matrix.
    fan_score = np.where(is_fan, score, 0.0)
    opposite = (direction + 180.0) % 360.0
    own_i, own_j = _component_pairs(component)
    own_fan = fan_score[own_j]
    own_diff = np.abs((direction[own_i] - direction[own_j] + 180.0) % 360.0 - 180.0)
    n = len(component)
    own_mass = np.bincount(own_i, weights=own_fan, minlength=n)
    own_agree = np.bincount(own_i, weights=own_fan * (own_diff <= width_deg), minlength=n)
    own_oppose = np.bincount(own_i, weights=own_fan * (own_diff >= 180.0 - width_deg), minlength=n)
    mass = np.maximum(fan_score.sum() - own_mass, 0.0)
    agree = np.maximum(_window_sums(direction[is_fan], fan_score[is_fan], direction, width_deg) - own_agree, 0.0)
    oppose = np.maximum(_window_sums(direction[is_fan], fan_score[is_fan], opposite, width_deg) - own_oppose, 0.0)
    out[:, 0] = np.where(is_fan, agree / (mass + _PRIOR), 0.0)
    out[:, 1] = np.where(is_fan, oppose / (mass + _PRIOR), 0.0)
    out[:, 2] = np.log1p(mass)
    best = np.sort(score[is_fan])[::-1][:top]
    level = float(best.mean()) if len(best) else 0.0
    out[:, 3] = score / max(level, 1e-3)
    out[:, 4] = level
    return out


def _window_sums(direction, weight, centre, width_deg):
    """For each centre, the sum of ``weight`` over the directions within ``width_deg`` of it (circular,
    degrees in [0, 360); ``width_deg`` < 180)."""
    if len(direction) == 0:
        return np.zeros(len(centre))
    order = np.argsort(direction, kind="stable")
    d = direction[order]
    ring = np.concatenate([d - 360.0, d, d + 360.0])
    total = np.concatenate([[0.0], np.cumsum(np.tile(weight[order], 3))])
    lo = np.searchsorted(ring, centre - width_deg, side="left")
    hi = np.searchsorted(ring, centre + width_deg, side="right")
    return total[hi] - total[lo]


def _component_pairs(component):
    """Every ordered pair (i, j) of readings of one component, i == j included."""
    order = np.argsort(component, kind="stable")
    code = component[order]
    starts = np.flatnonzero(np.r_[True, code[1:] != code[:-1]])
    sizes = np.diff(np.r_[starts, len(code)])
    size_of = np.repeat(sizes, sizes)
    start_of = np.repeat(starts, sizes)
    i = np.repeat(np.arange(len(code)), size_of)
    offset = np.arange(len(i)) - np.repeat(np.cumsum(size_of) - size_of, size_of)
    j = np.repeat(start_of, size_of) + offset
    return order[i], order[j]


def block_keys(image, row0, col0, width, height, *, tiles=CONTEXT_BLOCK_TILES):
    """The context block of each tile: its image and the cell of :data:`CONTEXT_BLOCK_TILES` tiles its
    top-left corner falls in.

    Parameters
    ----------
    image : array_like of str, shape (n,)
    row0, col0 : array_like of float, shape (n,)
        Each tile's top-left pixel in its image (NaN when unknown).
    width, height : array_like of float, shape (n,)
        Each tile's size, px; an image's cells are measured in its largest tile (edge tiles of a
        cut image are smaller).

    Returns
    -------
    list of str
        Tiles whose place is unknown form blocks of as many tiles as a cell holds, in their
        given order.
    """
    image = [str(i) for i in image]
    row0, col0 = np.asarray(row0, dtype=float), np.asarray(col0, dtype=float)
    width, height = np.asarray(width, dtype=float), np.asarray(height, dtype=float)
    placed = np.isfinite(row0) & np.isfinite(col0)
    size = {}
    for img, w, h in zip(np.asarray(image, dtype=object)[placed], width[placed], height[placed]):
        W, H = size.get(img, (1.0, 1.0))
        size[img] = (max(W, w), max(H, h))
    per_cell = tiles[0] * tiles[1]
    keys, unplaced = [], {}
    for img, r, c, here in zip(image, row0, col0, placed):
        if here:
            W, H = size[img]
            keys.append(f"{img}|{int(r // (tiles[0] * H))}|{int(c // (tiles[1] * W))}")
        else:
            k = unplaced[img] = unplaced.get(img, -1) + 1
            keys.append(f"{img}|unplaced|{k // per_cell}")
    return keys


def context_blocks(image, row0, col0, width, height):
    """The positions of the tiles of each context block (:func:`block_keys`), each block in the
    tiles' order, blocks in the order of their first tile.

    Returns
    -------
    list of list of int
    """
    blocks = {}
    for i, key in enumerate(block_keys(image, row0, col0, width, height)):
        blocks.setdefault(key, []).append(i)
    return list(blocks.values())


def context_matrix(F, score, owner, is_fan, direction_deg, group=None, block=None):
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
        other in the tile features); default: all readings are of one tile.
    block : ndarray of shape (n,), optional
        The context block of each reading (:func:`block_keys`); default: the readings'
        tiles are one block.

    Returns
    -------
    ndarray of shape (n, n_object_features + 1 + len(CONTEXT_FEATURE_NAMES)), float32
        Rounded to 4 decimals like the object features (see
        :func:`detector.objects.assemble.reading_matrix`).
    """
    F = np.asarray(F, dtype=np.float32)
    score = np.asarray(score, dtype=np.float64)
    owner, is_fan, direction = np.asarray(owner), np.asarray(is_fan, bool), np.asarray(direction_deg, float)
    group = np.zeros(len(F), dtype=int) if group is None else np.asarray(group)
    block = np.zeros(len(F), dtype=int) if block is None else np.asarray(block)
    ctx = np.zeros((len(F), len(CONTEXT_FEATURE_NAMES)), dtype=np.float32)
    for idx in _groups(group):
        ctx[idx, :_N_TILE] = context_features(owner[idx], is_fan[idx], direction[idx], score[idx])
    component = np.char.add(np.char.add(group.astype(str), "#"), owner.astype(str)) if len(F) else owner
    for idx in _groups(block):
        ctx[idx, _N_TILE:] = block_features(component[idx], is_fan[idx], direction[idx], score[idx])
    Z = np.column_stack([F, score_logit(score)[:, None], ctx]).astype(np.float32)
    return np.round(Z, 4)


def _groups(key):
    """Index arrays of the rows sharing each value of ``key``."""
    if len(key) == 0:
        return []
    _, code = np.unique(key, return_inverse=True)
    order = np.argsort(code, kind="stable")
    return np.split(order, np.flatnonzero(np.diff(code[order])) + 1)


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
