"""Training data for the object classifier: labelled readings of dark candidates.

Candidates (dark components, see :mod:`detector.objects.assemble`) are read as fans and
as a spot; each reading is labelled by matching it to consensus with the
evaluation's own matching rules, so the object classifier learns exactly what
is scored.
"""

import dataclasses
from dataclasses import dataclass

import numpy as np
import pandas as pd
from joblib import delayed
from tqdm.auto import tqdm

from detector.objects.assemble import OBJECT_FEATURE_NAMES, candidate_rows, reading_matrix
from detector.objects.context import block_keys, context_matrix, reading_layout
from detector.objects.refine import (REFINE_FEATURE_NAMES, REFINE_OUTPUTS, predict_refined, reading_shapes,
                                     refine_design, turn_directions)
from detector.inference.detect import tile_candidates, tile_maps
from detector.tile import _dense
from detector.tile.features import _features_of_prepared
from detector._allocator import reuse_freed_memory

from .dataset import augmented_tile
from ..parallel import tile_parallel
from ..evaluation.matching import candidate_pairs

__all__ = ["CandidateSet", "LABEL_MAX_DIRECTION_DEG", "label_readings", "candidate_set", "rotate_features", "fit_direction_confidence",
           "context_rows",
           "CONFIDENCE_FEATURES", "fit_refine_model", "refine_model_check", "without_turn",
           "fit_refine_checked", "fit_turn_model", "TURN_MODEL_PARAMS"]


@dataclass
class CandidateSet:
    """Feature rows and labels of candidate readings from many tiles.

    Attributes
    ----------
    F : ndarray of shape (n, len(OBJECT_FEATURE_NAMES)), float32
        One row per reading (fan readings and the spot reading of every candidate).
    label : ndarray of shape (n,), int
        1 when the reading matches a consensus feature of its kind, else 0.
    image_id : ndarray of shape (n,), object
    error_deg : ndarray of shape (n,)
        Direction error of a matched fan reading against its consensus fan (NaN otherwise).
    tile_key : ndarray of shape (n,), object
        The tile and quarter turn each reading was read on (``"tile_id/k"``): the readings
        of one key are one tile's, for their tile context (:mod:`detector.objects.context`).
    owner : ndarray of shape (n,), int
        The component of each reading within its tile.
    is_fan : ndarray of shape (n,), bool
    direction_deg : ndarray of shape (n,)
        Fan readings' directions (NaN for spot readings).
    own_size : ndarray of shape (n, 2)
        Each reading's own two sizes (:data:`detector.objects.refine.SIZE_NAMES`).
    true_size : ndarray of shape (n, 2)
        The same sizes of a right reading's consensus feature (NaN for the others).
    turn_deg : ndarray of shape (n,)
        Signed angle from a right fan reading's direction to its consensus fan's (NaN for the others).
    block_key : ndarray of shape (n,), object
        The context block each reading was read in (:func:`detector.objects.context.block_keys`, and
        the quarter turn): the tiles of one image read with one turn, as detection reads a block.
    """

    F: np.ndarray
    label: np.ndarray
    image_id: np.ndarray
    error_deg: np.ndarray
    tile_key: np.ndarray
    owner: np.ndarray
    is_fan: np.ndarray
    direction_deg: np.ndarray
    own_size: np.ndarray
    true_size: np.ndarray
    turn_deg: np.ndarray
    block_key: np.ndarray

    def __len__(self):
        return len(self.label)

    @classmethod
    def concat(cls, parts):
        parts = list(parts)
        if not parts:
            return cls(np.zeros((0, len(OBJECT_FEATURE_NAMES)), np.float32), np.zeros(0, int), np.zeros(0, object),
                       np.zeros(0), np.zeros(0, object), np.zeros(0, int), np.zeros(0, bool), np.zeros(0),
                       np.zeros((0, 2)), np.zeros((0, 2)), np.zeros(0), np.zeros(0, object))
        return cls(*(np.concatenate([getattr(p, f.name) for p in parts]) for f in dataclasses.fields(cls)))


#: A fan reading teaches "right" only when it also points the consensus fan's way within this angle,
#: so that of a fan's two readings along one axis the one running from the source is learnt.
LABEL_MAX_DIRECTION_DEG = 90.0


def label_readings(candidates, consensus, tile_id, *, with_truth=False):
    """Label one tile's readings against its consensus features with the evaluation's matching.

    The readings of a component come in interpretations (its vents' direction
    modes, one fan per vent, one fan along its axis either way; one spot, one
    spot around each vent), of which detection keeps one of fans and one of
    spots. A reading is right when it is matched in the
    evaluation's greedy one-to-one matching of its own interpretation's readings
    to the tile's consensus: so two readings that split one consensus fan are
    not both right, while each interpretation that would score if chosen is.
    A fan reading must also point within :data:`LABEL_MAX_DIRECTION_DEG` of its
    consensus fan, so that of the two readings along one axis the one running
    from the source is learnt.

    Returns
    -------
    label : ndarray of int, one per reading in the order of :func:`detector.objects.assemble.reading_matrix`
    error_deg : ndarray of float
        Direction error of each right fan reading against its consensus fan (NaN for the others).
    truth : ndarray of shape (n_readings, 3), only ``with_truth``
        What each right reading's consensus match says of it: its two sizes (length, px, and
        opening, degrees, of a fan; semi-major and semi-minor axes, px, of a spot) and, for a fan,
        the signed angle from the reading's direction to the consensus one (degrees, clockwise
        positive, in [-180, 180)); NaN for the other readings and a spot's angle.
    """
    readings = candidate_rows(candidates, tile_id)
    label = np.zeros(len(readings), dtype=np.int64)
    error = np.full(len(readings), np.nan)
    truth = np.full((len(readings), 3), np.nan)
    done = (label, error, truth) if with_truth else (label, error)
    if len(readings) == 0 or consensus.empty:
        return done
    # each reading's component and interpretation, in the order of reading_matrix (the spot readings last:
    # -1 the whole component as one spot, -2 the spots around its vents)
    owner = np.array([i for i, c in enumerate(candidates) for _ in range(len(c.fans) + len(c.spots))], dtype=np.int64)
    hyp = np.array([h for c in candidates for h in [f.get("_hyp", 0) for f in c.fans] + [-1] + [-2] * len(c.vent_spots)],
                   dtype=np.int64)
    group = owner * 16 + hyp + 2
    consensus = consensus.reset_index(drop=True)
    parts = []
    for kind in ("fan", "spot"):
        det = readings[readings["kind"] == kind]
        cons = consensus[consensus["kind"] == kind]
        if det.empty or cons.empty:
            continue
        pairs = candidate_pairs(det, cons, kind)
        if kind == "fan":
            pairs = pairs[pairs["direction_error_deg"] <= LABEL_MAX_DIRECTION_DEG]
        parts.append(pairs.assign(is_fan=kind == "fan"))
    if not parts:
        return done
    pairs = pd.concat(parts, ignore_index=True)
    pairs["group"] = group[pairs["det_index"].to_numpy(int)]
    pairs["rank"] = np.round(pairs["distance_px"] / 4.0)
    pairs = pairs.sort_values(["group", "rank", "direction_error_deg", "distance_px"], kind="stable")
    taken = set()
    for g, d, c, e, is_fan in zip(pairs["group"].to_numpy(), pairs["det_index"].to_numpy(int),
                                  pairs["cons_index"].to_numpy(int), pairs["direction_error_deg"].to_numpy(float),
                                  pairs["is_fan"].to_numpy(bool)):
        if label[d] or (g, c) in taken:
            continue
        label[d] = 1
        taken.add((g, c))
        size_columns = ("length_px", "opening_deg") if is_fan else ("semi_major_px", "semi_minor_px")
        truth[d, :2] = consensus.loc[c, list(size_columns)].to_numpy(float)
        if is_fan:
            error[d] = e
            turn = float(consensus.at[c, "direction_deg"]) - float(readings.at[d, "direction_deg"])
            truth[d, 2] = (turn + 180.0) % 360.0 - 180.0
    return done


def rotate_features(features, shape, quarter_turns):
    """Consensus rows of a tile turned by quarter turns clockwise, as ``np.rot90(tile, -k)`` turns the tile.

    Parameters
    ----------
    features : DataFrame
        Contract rows (x_px, y_px, direction_deg ...).
    shape : tuple of int
        (rows, cols) of the unturned tile.
    quarter_turns : int

    Returns
    -------
    turned : DataFrame
        A clockwise quarter turn maps (x, y) to (rows - 1 - y, x) and adds 90 degrees
        to every direction (spot axes stay mod 180 by the same rule).
    """
    out = features.copy()
    rows, cols = shape
    for _ in range(int(quarter_turns) % 4):
        x, y = out["x_px"].to_numpy(float), out["y_px"].to_numpy(float)
        out["x_px"], out["y_px"] = rows - 1 - y, x
        out["direction_deg"] = (out["direction_deg"].to_numpy(float) + 90.0) % 360.0
        spot = (out["kind"] == "spot").to_numpy()
        out.loc[spot, "direction_deg"] = out.loc[spot, "direction_deg"] % 180.0
        rows, cols = cols, rows
    return out


def _tile_readings(tileset, tile_id, spec, predict_patches, predict_polarity, params, rotation=0, degrade=False,
                   noise_range=None):
    reuse_freed_memory()
    tile = tileset.read_tile(tile_id)
    consensus = tileset.features_of(tile_id)
    if rotation % 4:
        consensus = rotate_features(consensus, tile.shape, rotation)
        tile = augmented_tile(tile, tile_id, rotation, degrade=degrade, nodata_value=spec.nodata_value)
    nodata = tile == spec.nodata_value
    # A turned copy was degraded on purpose: only the tile as it came is smoothed, as detection would.
    prep = _dense.prepare_tile(tile, spec, nodata, None if rotation % 4 else noise_range)
    X, grid = _features_of_prepared(prep, spec)
    maps = tile_maps(X, grid, tile.shape, spec, predict_patches, predict_polarity)
    candidates = tile_candidates(tile, nodata, maps, spec, params, prep=prep)
    F, _, _ = reading_matrix(candidates)
    label, error, truth = label_readings(candidates, consensus, tile_id, with_truth=True)
    return (F, label, error, *reading_layout(candidates), reading_shapes(candidates)[0], truth[:, :2], truth[:, 2])


def candidate_set(tileset, tile_ids, spec, predict_patches, predict_polarity, params, *, workers=1,
                  rotations=(0,), jobs=None, desc="candidates", degrade=False, noise_range=None):
    """Labelled candidate readings of some tiles under given patch and polarity predictors.

    ``rotations`` (quarter turns clockwise) augments the readings: each tile is
    also read turned, with its consensus turned alike. ``jobs`` (pairs of tile id
    and quarter turns) replaces ``tile_ids`` x ``rotations``. ``noise_range``
    (:class:`detector.tile.noise.NoiseRange`) smooths unturned tiles noisier than
    it, as detection does.

    Returns
    -------
    readings : CandidateSet
    """
    tiles = tileset.tiles.set_index("tile_id")
    image = tiles["image_id"]
    block = dict(zip(tiles.index, block_keys(image, tiles["row0"], tiles["col0"], tiles["width"], tiles["height"])))
    jobs = list(jobs) if jobs is not None else [(tid, r) for tid in tile_ids for r in rotations]
    results = tile_parallel(workers)(
        delayed(_tile_readings)(tileset, tid, spec, predict_patches, predict_polarity, params, r, degrade,
                                noise_range)
        for tid, r in tqdm(jobs, desc=desc, unit="tile", leave=False)
    )
    return CandidateSet.concat(
        CandidateSet(F, label, np.full(len(label), str(image[t]), dtype=object), error,
                     np.full(len(label), f"{t}/{r % 4}", dtype=object), owner, is_fan, direction, own, true,
                     turn, np.full(len(label), f"{block[t]}/{r % 4}", dtype=object))
        for (t, r), (F, label, error, owner, is_fan, direction, own, true, turn) in zip(jobs, results)
    )


def context_rows(readings, first_score):
    """The context model's input rows of some readings, given their first scores.

    Parameters
    ----------
    readings : CandidateSet
    first_score : ndarray of shape (len(readings),)

    Returns
    -------
    ndarray, see :func:`detector.objects.context.context_matrix`
    """
    return context_matrix(readings.F, first_score, readings.owner, readings.is_fan, readings.direction_deg,
                          group=readings.tile_key, block=readings.block_key)


#: Reading features the direction confidence is fitted on.
CONFIDENCE_FEATURES = ("read_length_px", "read_opening_deg", "read_share", "read_vent_dark", "read_dark_mean",
                       "read_polarity_vote", "read_p_fan", "read_concentration", "obj_n_fans")


def fit_direction_confidence(readings, *, bound_deg=20.0, C=1.0):
    """Logistic model of "this fan reading's direction is within ``bound_deg`` of consensus".

    Fitted on matched fan readings (out of fold); stored in the model card as
    plain numbers and evaluated by :meth:`detector.model.Model.direction_confidence`.

    Returns
    -------
    fit : dict or None
        None when there are too few matched fans (or only one outcome).
    """
    from sklearn.linear_model import LogisticRegression

    ok = np.isfinite(readings.error_deg)
    y = (readings.error_deg[ok] <= bound_deg).astype(int)
    if ok.sum() < 20 or len(np.unique(y)) < 2:
        return None
    idx = [OBJECT_FEATURE_NAMES.index(n) for n in CONFIDENCE_FEATURES]
    Z = readings.F[ok][:, idx].astype(np.float64)
    mean, scale = Z.mean(axis=0), Z.std(axis=0)
    scale[scale < 1e-9] = 1.0
    model = LogisticRegression(C=C, max_iter=1000).fit((Z - mean) / scale, y)
    return {"features": list(CONFIDENCE_FEATURES), "mean": mean.tolist(), "scale": scale.tolist(),
            "coef": model.coef_[0].tolist(), "intercept": float(model.intercept_[0]), "bound_deg": float(bound_deg),
            "n": int(ok.sum()), "share_within_bound": float(y.mean())}


#: Ridge penalty of the refinement model (on standardised inputs; small against the thousands of right
#: readings of a catalog of a few hundred tiles, so it only tames nearly collinear view samples).
REFINE_RIDGE_ALPHA = 10.0

#: Turns beyond this (degrees) teach the refinement model as this much: a reading that far off is a
#: neighbour's or a merged fan's, which no turn mends, and a square loss would follow it.
REFINE_TURN_CLIP_DEG = 45.0


def _right_rows(readings, kind):
    rows = (readings.label == 1) & (readings.is_fan == (kind == "fan"))
    rows &= np.isfinite(readings.true_size).all(axis=1) & (readings.true_size > 0).all(axis=1)
    return rows & np.isfinite(readings.turn_deg) if kind == "fan" else rows


def fit_refine_model(readings, *, alpha=REFINE_RIDGE_ALPHA, min_rows=20):
    """Ridge regressions refining right readings (:mod:`detector.objects.refine`).

    One fit per kind over :data:`detector.objects.refine.REFINE_FEATURE_NAMES`
    (standardised): the log consensus length and opening of a fan and the signed
    turn to its consensus direction (clipped to :data:`REFINE_TURN_CLIP_DEG`), the
    log consensus semi-major and semi-minor axes of a spot. The log sizes'
    intercepts carry a smearing retransformation (``smearing_log``), so that the
    refined sizes are right on average, not only in the median. Stored in the model
    card as plain numbers and evaluated by
    :meth:`detector.inference.model.Model.refine_readings`.

    Returns
    -------
    fit : dict or None
        None when either kind has fewer than ``min_rows`` right readings.
    """
    from sklearn.linear_model import Ridge

    fit = {"features": list(REFINE_FEATURE_NAMES), "alpha": float(alpha)}
    for kind in ("fan", "spot"):
        rows = _right_rows(readings, kind)
        if rows.sum() < min_rows:
            return None
        X = refine_design(readings.F[rows], readings.own_size[rows])
        Y = np.log(readings.true_size[rows])
        if kind == "fan":
            turn = np.clip(readings.turn_deg[rows], -REFINE_TURN_CLIP_DEG, REFINE_TURN_CLIP_DEG)
            Y = np.column_stack([Y, turn])
        mean, scale = X.mean(axis=0), X.std(axis=0)
        scale[scale < 1e-9] = 1.0
        Z = (X - mean) / scale
        model = Ridge(alpha=alpha).fit(Z, Y)
        # The fit is of log sizes, so exp(prediction) is a median-like size and areas (length squared
        # times opening) come out short on average. Duan's smearing estimate (Duan 1983, JASA 78:605,
        # "Smearing estimate: a nonparametric retransformation method") retransforms to the mean:
        # the log of the mean of exp(residual) joins each log size's intercept.
        resid = Y[:, :2] - model.predict(Z)[:, :2]
        smearing = np.log(np.mean(np.exp(resid), axis=0))
        intercept = np.array(model.intercept_, dtype=float)
        intercept[:2] += smearing
        fit[kind] = {"mean": mean.tolist(), "scale": scale.tolist(), "coef": model.coef_.tolist(),
                     "intercept": intercept.tolist(), "smearing_log": smearing.tolist(), "n": int(rows.sum())}
    return fit


#: The boosted turn of fan directions (:func:`fit_turn_model`): an absolute loss, since a right
#: reading's turn has heavy tails (a neighbour's pixels), and leaves of at least 40 readings.
TURN_MODEL_PARAMS = {"loss": "absolute_error", "max_iter": 300, "learning_rate": 0.05, "max_leaf_nodes": 31,
                     "min_samples_leaf": 40}


def fit_turn_model(readings, *, seed=0, min_rows=20):
    """A gradient-boosted regressor of the turn from a right fan reading's direction to its consensus fan's.

    Over the inputs of the refinement model (:func:`detector.objects.refine.refine_design`), with the
    targets clipped to :data:`REFINE_TURN_CLIP_DEG` as the ridge's are, and :data:`TURN_MODEL_PARAMS`.

    Returns
    -------
    model : HistGradientBoostingRegressor or None
        None with fewer than ``min_rows`` right fan readings.
    """
    from sklearn.ensemble import HistGradientBoostingRegressor

    rows = _right_rows(readings, "fan")
    if rows.sum() < min_rows:
        return None
    X = refine_design(readings.F[rows], readings.own_size[rows]).astype(np.float32)
    turn = np.clip(readings.turn_deg[rows], -REFINE_TURN_CLIP_DEG, REFINE_TURN_CLIP_DEG)
    return HistGradientBoostingRegressor(random_state=seed, **TURN_MODEL_PARAMS).fit(X, turn)


def _boosted_turn_check(turn_model, readings):
    """Median angle (degrees) of the right check fans to their consensus after the boosted turn."""
    rows = _right_rows(readings, "fan")
    if turn_model is None or not rows.any():
        return None
    X = refine_design(readings.F[rows], readings.own_size[rows]).astype(np.float32)
    direction = readings.direction_deg[rows]
    turned = turn_directions(direction, np.ones(len(direction), bool), turn_model.predict(X))
    target = direction + readings.turn_deg[rows]
    return float(np.median(np.abs((turned - target + 180.0) % 360.0 - 180.0)))


def fit_refine_checked(fit_readings, check_readings, log, *, seed=0):
    """The refinement model (:mod:`detector.objects.refine`), fitted on some readings and checked on others.

    The sizes come from the ridge fit. The turn of fan directions is the one of three, none, the
    ridge's or the boosted one (:func:`fit_turn_model`), that brings the right check readings
    closest to their consensus directions (median angle): fitted on a few images a turn can turn
    right fans away from their consensus, and it must earn its place on readings it was not fitted on.

    Returns
    -------
    fit : dict or None
        Without the ridge's turn (:func:`without_turn`) unless that turn is kept.
    check : dict
        :func:`refine_model_check` on the check readings, with ``fan_direction_deg.boosted``
        when a boosted turn was fitted.
    turn_model : HistGradientBoostingRegressor or None
        The boosted turn when it is kept.
    """
    refine = fit_refine_model(fit_readings)
    check = refine_model_check(refine, check_readings)
    turn = check.get("fan_direction_deg")
    turn_model = None
    if turn:
        boosted_model = fit_turn_model(fit_readings, seed=seed)
        boosted = _boosted_turn_check(boosted_model, check_readings)
        options = {"none": turn["measured"], "ridge": turn["model"]}
        if boosted is not None:
            options["boosted"] = boosted
        kept = min(options, key=lambda k: (options[k], k != "none"))
        log("refinement: median angle of the right check fans to consensus, " + ", ".join(
            f"{k} {v:.2f} deg" for k, v in options.items()) + f"; the turn kept: {kept}")
        if kept != "ridge":
            refine = without_turn(refine)
            check = refine_model_check(refine, check_readings)
        if boosted is not None:
            check["fan_direction_deg"]["boosted"] = boosted
        if kept == "boosted":
            check["fan_direction_deg"]["model"] = boosted
            turn_model = boosted_model
    if check:
        log("right check readings against consensus, measured -> refined (median |log size ratio|, "
            "direction deg): " + ", ".join(f"{k} {v['measured']:.2f} -> {v['model']:.2f}" for k, v in check.items()))
    return refine, check, turn_model


def without_turn(fit):
    """A refinement model (:func:`fit_refine_model`) whose fans keep their measured direction.

    The turn's coefficients and intercept become 0 (so :func:`detector.objects.refine.predict_refined`
    turns no fan) and ``fit["fan"]["turn_kept"]`` is False; the sizes are untouched. ``fit`` itself is
    not changed.
    """
    if fit is None:
        return None
    fan = dict(fit["fan"])
    j = REFINE_OUTPUTS["fan"].index("turn_deg")
    coef = [list(row) for row in fan["coef"]]
    coef[j] = [0.0] * len(coef[j])
    intercept = list(fan["intercept"])
    intercept[j] = 0.0
    fan.update(coef=coef, intercept=intercept, turn_kept=False)
    return {**fit, "fan": fan}


def refine_model_check(fit, readings):
    """How far measured and refined readings lie from consensus, on right readings.

    Returns
    -------
    dict
        Per kind and size the medians of |log(size / consensus size)|, and for fans the
        median angle to the consensus direction (degrees), ``measured`` and ``model``,
        with the readings counted.
    """
    out = {}
    if fit is None:
        return out
    direction = np.where(readings.is_fan, readings.direction_deg, 0.0)
    sizes, turned = predict_refined(fit, readings.F, readings.own_size, direction, readings.is_fan)
    for kind, names in (("fan", ("length", "opening")), ("spot", ("semi_major", "semi_minor"))):
        rows = _right_rows(readings, kind)
        if not rows.any():
            continue
        true = np.log(readings.true_size[rows])
        for j, name in enumerate(names):
            out[f"{kind}_{name}"] = {
                "measured": float(np.median(np.abs(np.log(np.maximum(readings.own_size[rows, j], 1e-3)) - true[:, j]))),
                "model": float(np.median(np.abs(np.log(sizes[rows, j]) - true[:, j]))),
                "n": int(rows.sum())}
        if kind == "fan":
            target = direction[rows] + readings.turn_deg[rows]
            after = np.abs((turned[rows] - target + 180.0) % 360.0 - 180.0)
            out["fan_direction_deg"] = {"measured": float(np.median(np.abs(readings.turn_deg[rows]))),
                                        "model": float(np.median(after)), "n": int(rows.sum())}
    return out
