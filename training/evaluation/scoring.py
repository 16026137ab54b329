"""Scoring of detections against a consensus catalog.

Pure functions over DataFrames and arrays: object matching, object and patch
metrics, coverage Dice, direction recovery, direction baselines, breakdowns
and bootstrap intervals over images. :func:`score_catalogs` gathers them into
one JSON-ready dict; it scores a model's detections, and equally a synthetic
scene's noise-free truth against its consensus (the ceiling).

Angles are degrees clockwise from image up; fan directions in [0, 360),
spot and structure axes in [0, 180).
"""

import numpy as np
import pandas as pd

from detector.circstats import grouped_circular_mean
from detector.inference.detect import fan_direction_weights, tile_direction_stats
from detector.errors import DetectorError
from detector.geometry import angular_difference, axial_difference

__all__ = [
    "match_objects",
    "candidate_pairs",
    "object_metrics",
    "patch_metrics",
    "dice",
    "coverage_metrics",
    "direction_errors",
    "direction_metrics",
    "tile_mean_errors",
    "matched_fans",
    "baseline_directions",
    "baseline_errors",
    "baseline_metrics",
    "breakdowns",
    "bootstrap_interval",
    "score_catalogs",
    "CROWD_VS_EXPERT_DEG",
]

#: Common practice: the crowd's per-tile mean fan direction and an expert's agree within about 10 degrees.
CROWD_VS_EXPERT_DEG = 10.0

_PAIR_COLUMNS = ["tile_id", "kind", "det_index", "cons_index", "distance_px", "direction_error_deg"]


def _require(df, columns, name):
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise DetectorError(f"{name} lacks column(s) {', '.join(missing)}.")


def candidate_pairs(det, cons, kind, *, fan_min_px=12.0, fan_length_frac=0.3, spot_min_px=10.0):
    """All detection-consensus pairs of one tile and kind within the match radius of :func:`match_objects`.

    Returns
    -------
    pairs : DataFrame
        det_index, cons_index (index labels), distance_px, direction_error_deg
        (angular for fans, axial for spots).
    """
    dx = det["x_px"].to_numpy(float)[:, None] - cons["x_px"].to_numpy(float)[None, :]
    dy = det["y_px"].to_numpy(float)[:, None] - cons["y_px"].to_numpy(float)[None, :]
    dist = np.hypot(dx, dy)
    if kind == "fan":
        radius = np.maximum(fan_min_px, fan_length_frac * cons["length_px"].to_numpy(float))
        ddir = angular_difference(det["direction_deg"].to_numpy(float)[:, None], cons["direction_deg"].to_numpy(float)[None, :])
    else:
        radius = np.maximum(spot_min_px, cons["semi_major_px"].to_numpy(float))
        ddir = axial_difference(det["direction_deg"].to_numpy(float)[:, None], cons["direction_deg"].to_numpy(float)[None, :])
    i, j = np.nonzero(dist <= radius[None, :] + 1e-9)
    return pd.DataFrame(
        {
            "det_index": det.index.to_numpy()[i],
            "cons_index": cons.index.to_numpy()[j],
            "distance_px": dist[i, j],
            # A missing direction (NaN) ranks after every known one.
            "direction_error_deg": ddir[i, j],
        }
    )


def match_objects(
    detections,
    consensus,
    *,
    fan_min_px=12.0,
    fan_length_frac=0.3,
    spot_min_px=10.0,
    distance_step_px=4.0,
):
    """Greedy one-to-one matching of detections to consensus objects.

    Within each tile and kind, a detected fan may match a consensus fan whose
    apex lies within ``max(fan_min_px, fan_length_frac * length_px)`` of its
    apex; a detected spot a consensus spot whose centre lies within
    ``max(spot_min_px, semi_major_px)`` (boundary included). Candidate pairs
    are ranked by distance rounded to ``distance_step_px``, then by direction
    difference (angular for fans, axial for spots), then by exact distance, and
    accepted greedily best first; so fans sharing one vent pair by direction
    rather than by sub-pixel apex jitter.

    Parameters
    ----------
    detections, consensus : DataFrame
        Contract tables with tile_id, kind, x_px, y_px, direction_deg and, for
        consensus, length_px (fans) and semi_major_px (spots). Their indexes
        must be unique; they identify the rows in the result.
    fan_min_px, fan_length_frac, spot_min_px : float, optional
        Match radii, px and fraction of the consensus fan length.
    distance_step_px : float, optional
        Distances are rounded to this step before ranking, px.

    Returns
    -------
    pairs : DataFrame
        One row per matched pair: tile_id, kind, det_index, cons_index (index
        labels of the two tables), distance_px, direction_error_deg.
    """
    _require(detections, ["tile_id", "kind", "x_px", "y_px", "direction_deg"], "detections")
    _require(consensus, ["tile_id", "kind", "x_px", "y_px", "direction_deg", "length_px", "semi_major_px"], "consensus")
    for name, df in (("detections", detections), ("consensus", consensus)):
        if not df.index.is_unique:
            raise DetectorError(f"{name} index is not unique; reset it before matching.")
    det_groups = dict(tuple(detections.groupby(["tile_id", "kind"], sort=False)))
    parts = []
    for (tile_id, kind), cons in consensus.groupby(["tile_id", "kind"], sort=False):
        det = det_groups.get((tile_id, kind))
        if det is None or kind not in ("fan", "spot"):
            continue
        cand = candidate_pairs(
            det, cons, kind, fan_min_px=fan_min_px, fan_length_frac=fan_length_frac, spot_min_px=spot_min_px
        )
        if len(cand):
            cand.insert(0, "kind", kind)
            cand.insert(0, "tile_id", tile_id)
            parts.append(cand)
    if not parts:
        return pd.DataFrame({c: pd.Series(dtype=float if "_px" in c or "_deg" in c else object) for c in _PAIR_COLUMNS})
    cand = pd.concat(parts, ignore_index=True)
    step = max(float(distance_step_px), 1e-12)
    cand["_rank_dist"] = np.round(cand["distance_px"] / step)
    cand["_rank_dir"] = cand["direction_error_deg"].fillna(1e9)
    cand = cand.sort_values(["_rank_dist", "_rank_dir", "distance_px"], kind="stable").reset_index(drop=True)
    # Sequential greedy over the ranked list equals repeated rounds of accepting
    # every pair that is the best remaining one for both its detection and its
    # consensus object; each round is whole-array and few rounds are needed.
    # Index labels are unique per table, so they identify objects across tiles too.
    accepted = []
    while len(cand):
        best = ~cand["det_index"].duplicated() & ~cand["cons_index"].duplicated()
        take = cand[best]
        accepted.append(take)
        cand = cand[~cand["det_index"].isin(take["det_index"]) & ~cand["cons_index"].isin(take["cons_index"])]
    pairs = pd.concat(accepted, ignore_index=True)
    return pairs[_PAIR_COLUMNS].sort_values(["tile_id", "kind", "distance_px"], kind="stable").reset_index(drop=True)


def _prf(tp, n_det, n_cons):
    """Precision, recall, F1 from counts (NaN where undefined), as arrays."""
    tp, n_det, n_cons = (np.asarray(v, dtype=float) for v in (tp, n_det, n_cons))
    with np.errstate(invalid="ignore", divide="ignore"):
        precision = np.where(n_det > 0, tp / n_det, np.nan)
        recall = np.where(n_cons > 0, tp / n_cons, np.nan)
        f1 = np.where(n_det + n_cons > 0, 2 * tp / (n_det + n_cons), np.nan)
    return precision, recall, f1


def object_metrics(detections, consensus, pairs, tiles):
    """Object precision, recall and F1 per kind, and false detections per megapixel.

    Parameters
    ----------
    detections, consensus : DataFrame
        Contract tables (tile_id, kind).
    pairs : DataFrame
        Output of :func:`match_objects`.
    tiles : DataFrame
        tile_id, width, height (px) of every scored tile.

    Returns
    -------
    metrics : dict
        ``{kind: {precision, recall, f1, n_detected, n_consensus, n_matched}}``
        and ``false_per_mpx``: detections per 10**6 px on tiles without any
        consensus deposit (every such detection is false), with the number
        and area of those tiles.
    """
    _require(tiles, ["tile_id", "width", "height"], "tiles")
    out = {}
    for kind in ("fan", "spot"):
        n_det = int((detections["kind"] == kind).sum())
        n_cons = int((consensus["kind"] == kind).sum())
        tp = int((pairs["kind"] == kind).sum())
        p, r, f = _prf(tp, n_det, n_cons)
        out[kind] = {
            "precision": _num(p),
            "recall": _num(r),
            "f1": _num(f),
            "n_detected": n_det,
            "n_consensus": n_cons,
            "n_matched": tp,
        }
    empty = tiles[~tiles["tile_id"].isin(consensus["tile_id"])]
    area_mpx = float((empty["width"].astype(float) * empty["height"].astype(float)).sum()) / 1e6
    n_false = int(detections["tile_id"].isin(empty["tile_id"]).sum())
    out["false_per_mpx"] = {
        "value": n_false / area_mpx if area_mpx > 0 else None,
        "n_false": n_false,
        "n_tiles": int(len(empty)),
        "area_mpx": area_mpx,
    }
    return out


def _num(value):
    """Plain float for JSON, None for NaN."""
    value = float(value)
    return None if not np.isfinite(value) else value


def _pr_curve(y, score):
    """Precision-recall curve and average precision of one binary problem (sklearn's definitions)."""
    order = np.argsort(-score, kind="mergesort")
    y, score = y[order], score[order]
    distinct = np.r_[np.nonzero(np.diff(score))[0], y.size - 1]
    tps = np.cumsum(y)[distinct]
    fps = (distinct + 1) - tps
    positives = tps[-1] if tps.size else 0
    precision = tps / np.maximum(tps + fps, 1)
    recall = tps / positives if positives > 0 else np.full(tps.shape, np.nan)
    thresholds = score[distinct]
    # Average precision: sum over thresholds of (R_n - R_{n-1}) * P_n.
    ap = float(np.sum(np.diff(np.r_[0.0, recall]) * precision)) if positives > 0 else np.nan
    return precision[::-1], recall[::-1], thresholds[::-1], ap


def patch_metrics(y_true, proba, classes):
    """Per-class precision, recall, F1, precision-recall curves and average precision.

    Parameters
    ----------
    y_true : array_like of shape (n,)
        True class label of each patch.
    proba : array_like of shape (n, k)
        Class probabilities; column ``c`` belongs to ``classes[c]``. The
        predicted class is the arg-max.
    classes : sequence of length k
        Class labels.

    Returns
    -------
    metrics : dict
        ``{class: {precision, recall, f1, support, average_precision}}``, plus
        ``accuracy`` and ``curves``: ``{class: {precision, recall, thresholds}}``
        (one-vs-rest lists, recall decreasing as the threshold rises).
    """
    y_true = np.asarray(y_true)
    proba = np.asarray(proba, dtype=float)
    classes = list(classes)
    if proba.ndim != 2 or proba.shape != (y_true.size, len(classes)):
        raise DetectorError(
            f"proba has shape {proba.shape}; expected ({y_true.size}, {len(classes)}) for {len(classes)} classes."
        )
    unknown = set(np.unique(y_true).tolist()) - set(classes)
    if unknown:
        raise DetectorError(f"y_true holds labels {sorted(map(str, unknown))} that are not among classes {classes}.")
    pred = np.asarray(classes, dtype=object)[np.argmax(proba, axis=1)] if y_true.size else y_true
    out = {"accuracy": _num(np.mean(pred == y_true)) if y_true.size else None, "curves": {}}
    for c, label in enumerate(classes):
        t = y_true == label
        pr = pred == label
        tp = np.sum(t & pr)
        # sklearn convention: an undefined precision or recall counts as 0.
        precision = tp / pr.sum() if pr.sum() else 0.0
        recall = tp / t.sum() if t.sum() else 0.0
        f1 = 2 * precision * recall / (precision + recall) if precision + recall > 0 else 0.0
        curve_p, curve_r, thr, ap = _pr_curve(t.astype(float), proba[:, c])
        out[str(label)] = {
            "precision": float(precision),
            "recall": float(recall),
            "f1": float(f1),
            "support": int(t.sum()),
            "average_precision": _num(ap),
        }
        out["curves"][str(label)] = {
            "precision": curve_p.tolist(),
            "recall": [None if not np.isfinite(v) else float(v) for v in curve_r],
            "thresholds": thr.tolist(),
        }
    return out


def dice(a, b):
    """Dice coefficient 2|A & B| / (|A| + |B|) of two boolean masks.

    Two empty masks agree perfectly: the result is 1.0 then (a tile where
    neither side marks a deposit is scored as right, not as undefined).

    Parameters
    ----------
    a, b : array_like of bool, same shape

    Returns
    -------
    float in [0, 1]
    """
    a = np.asarray(a, dtype=bool)
    b = np.asarray(b, dtype=bool)
    if a.shape != b.shape:
        raise DetectorError(f"masks have shapes {a.shape} and {b.shape}; they must match.")
    total = a.sum() + b.sum()
    return 1.0 if total == 0 else float(2.0 * np.logical_and(a, b).sum() / total)


def _default_rasterise():
    from detector.labels import rasterise_features

    return rasterise_features


def coverage_metrics(detections, consensus, shapes, *, rasterise=None):
    """Per-tile Dice of deposit masks and error of the covered fraction.

    Parameters
    ----------
    detections, consensus : DataFrame
        Contract tables; rasterised per tile.
    shapes : mapping
        tile_id -> (rows, cols) px of every scored tile.
    rasterise : callable, optional
        ``rasterise(features_df, shape)`` returning an object with boolean
        ``fan_cover`` and ``spot_cover``; default ``detector.labels.rasterise_features``.

    Returns
    -------
    per_tile : DataFrame
        tile_id, dice, dice_fan, dice_spot, covered_pred, covered_cons
        (fractions of the tile), covered_error_pp (|pred - cons| in
        percentage points), any_deposit (either side covers something).
    """
    rasterise = rasterise or _default_rasterise()
    det_groups = dict(tuple(detections.groupby("tile_id", sort=False)))
    cons_groups = dict(tuple(consensus.groupby("tile_id", sort=False)))
    empty_det = detections.iloc[:0]
    empty_cons = consensus.iloc[:0]
    rows = []
    for tile_id, shape in shapes.items():
        pred = rasterise(det_groups.get(tile_id, empty_det), tuple(shape))
        true = rasterise(cons_groups.get(tile_id, empty_cons), tuple(shape))
        p = pred.fan_cover | pred.spot_cover
        t = true.fan_cover | true.spot_cover
        rows.append(
            {
                "tile_id": tile_id,
                "dice": dice(p, t),
                "dice_fan": dice(pred.fan_cover, true.fan_cover),
                "dice_spot": dice(pred.spot_cover, true.spot_cover),
                "covered_pred": float(p.mean()),
                "covered_cons": float(t.mean()),
                "any_deposit": bool(p.any() or t.any()),
            }
        )
    per_tile = pd.DataFrame(
        rows, columns=["tile_id", "dice", "dice_fan", "dice_spot", "covered_pred", "covered_cons", "any_deposit"]
    )
    per_tile["covered_error_pp"] = 100.0 * (per_tile["covered_pred"] - per_tile["covered_cons"]).abs()
    return per_tile


def _coverage_summary(per_tile):
    """Headline coverage numbers; Dice averages over tiles where either side has a deposit."""
    sel = per_tile[per_tile["any_deposit"]]
    return {
        "dice_mean": _num(sel["dice"].mean()) if len(sel) else None,
        "dice_median": _num(sel["dice"].median()) if len(sel) else None,
        "dice_fan_mean": _num(sel["dice_fan"].mean()) if len(sel) else None,
        "dice_spot_mean": _num(sel["dice_spot"].mean()) if len(sel) else None,
        "covered_error_pp_mean": _num(per_tile["covered_error_pp"].mean()) if len(per_tile) else None,
        "covered_error_pp_median": _num(per_tile["covered_error_pp"].median()) if len(per_tile) else None,
        "n_tiles": int(len(per_tile)),
        "n_tiles_with_deposit": int(len(sel)),
    }


def direction_errors(predicted_deg, consensus_deg):
    """Angular error between predicted and consensus fan directions, degrees in [0, 180]."""
    return angular_difference(np.asarray(predicted_deg, dtype=float), np.asarray(consensus_deg, dtype=float))


def direction_metrics(errors, *, flip_deg=135.0):
    """Summary of angular errors.

    Parameters
    ----------
    errors : array_like of shape (n,)
        Degrees in [0, 180]; NaN entries are ignored.
    flip_deg : float, optional
        An error above this counts as a polarity flip, degrees.

    Returns
    -------
    dict
        n, median, mean, p90 (degrees), within_10, within_20, within_45 and
        flip_rate (fractions).
    """
    e = np.asarray(errors, dtype=float)
    e = e[np.isfinite(e)]
    if e.size == 0:
        keys = ("median", "mean", "p90", "within_10", "within_20", "within_45", "flip_rate")
        return {"n": 0, **{k: None for k in keys}}
    return {
        "n": int(e.size),
        "median": float(np.median(e)),
        "mean": float(e.mean()),
        "p90": float(np.quantile(e, 0.9)),
        "within_10": float(np.mean(e <= 10.0)),
        "within_20": float(np.mean(e <= 20.0)),
        "within_45": float(np.mean(e <= 45.0)),
        "flip_rate": float(np.mean(e > flip_deg)),
    }


def matched_fans(detections, consensus, pairs, tiles):
    """One row per matched fan pair with the values direction scoring needs.

    Returns
    -------
    DataFrame
        tile_id, image_id, det_index, cons_index, predicted_deg, consensus_deg,
        axis_deg (NaN without that column), length_px (consensus), votes,
        error_deg.
    """
    fp = pairs[pairs["kind"] == "fan"]
    det = detections.loc[fp["det_index"].to_numpy()]
    cons = consensus.loc[fp["cons_index"].to_numpy()]
    image = tiles.set_index("tile_id")["image_id"]
    out = pd.DataFrame(
        {
            "tile_id": fp["tile_id"].to_numpy(),
            "det_index": fp["det_index"].to_numpy(),
            "cons_index": fp["cons_index"].to_numpy(),
            "predicted_deg": det["direction_deg"].to_numpy(float),
            "consensus_deg": cons["direction_deg"].to_numpy(float),
            "axis_deg": det["axis_deg"].to_numpy(float) if "axis_deg" in det else np.full(len(fp), np.nan),
            "length_px": cons["length_px"].to_numpy(float),
            "votes": cons["votes"].to_numpy(float) if "votes" in cons else np.full(len(fp), np.nan),
        }
    )
    out.insert(1, "image_id", out["tile_id"].map(image).to_numpy())
    out["error_deg"] = direction_errors(out["predicted_deg"], out["consensus_deg"])
    return out


def _tile_means(df, angle_col, weight_col):
    labels, mean, _ = grouped_circular_mean(df[angle_col].to_numpy(float), df["tile_id"].to_numpy(), df[weight_col].to_numpy(float))
    return pd.Series(mean, index=labels)


def tile_mean_errors(detections, consensus, tiles, *, min_fans=3):
    """Error of the per-tile mean fan direction, for tiles with at least ``min_fans`` consensus fans.

    The consensus side is the circular mean of the tile's fans weighted by
    length. The detections' side pools robustly
    (:func:`detector.inference.detect.tile_direction_stats`), weighting each fan by
    score x direction confidence x length
    (:func:`detector.inference.detect.fan_direction_weights`), because a few wrong fans
    would otherwise drag the mean; without those columns it is the length-weighted
    robust mean. A tile without any detected fan gets a NaN error.

    Returns
    -------
    DataFrame
        tile_id, image_id, n_consensus_fans, consensus_mean_deg,
        predicted_mean_deg, error_deg.
    """
    cf = consensus[consensus["kind"] == "fan"]
    counts = cf.groupby("tile_id").size()
    keep = counts.index[counts >= min_fans]
    cons_mean = _tile_means(cf[cf["tile_id"].isin(keep)], "direction_deg", "length_px")
    df_ = detections[(detections["kind"] == "fan") & detections["tile_id"].isin(keep)]
    pred = {tid: tile_direction_stats(g["direction_deg"].to_numpy(float), fan_direction_weights(g))[0]
            for tid, g in df_.groupby("tile_id")}
    pred_mean = pd.Series(pred, dtype=float).reindex(cons_mean.index)
    image = tiles.set_index("tile_id")["image_id"]
    out = pd.DataFrame(
        {
            "tile_id": cons_mean.index,
            "image_id": image.reindex(cons_mean.index).to_numpy(),
            "n_consensus_fans": counts.reindex(cons_mean.index).to_numpy(),
            "consensus_mean_deg": cons_mean.to_numpy(),
            "predicted_mean_deg": pred_mean.to_numpy(),
        }
    )
    out["error_deg"] = direction_errors(out["predicted_mean_deg"], out["consensus_mean_deg"])
    return out


def baseline_directions(fans, consensus, tiles, *, prevailing_deg=None, seed=0):
    """Per-fan directions of the model and of the direction baselines on the matched fans.

    Parameters
    ----------
    fans : DataFrame
        Output of :func:`matched_fans`.
    consensus, tiles : DataFrame
        For the per-image oracle: the circular mean (length-weighted) of all
        consensus fans of each image.
    prevailing_deg : float, optional
        One prevailing direction for every fan (e.g. the circular mean of the
        training fans), degrees.
    seed : int, optional
        Seed of the random polarity.

    Returns
    -------
    dict of str -> ndarray of shape (n_fans,)
        Degrees clockwise from up: ``model``; ``axis_random_polarity`` and
        ``axis_oracle_polarity`` (the detection's axis_deg with a seeded random
        polarity, or the polarity nearer the consensus) when the detections
        carry axis_deg; ``prevailing`` when given; ``image_oracle`` (the
        consensus mean direction of the fan's image).
    """
    out = {"model": fans["predicted_deg"].to_numpy(float)}
    cons_deg = fans["consensus_deg"].to_numpy(float)
    axis = fans["axis_deg"].to_numpy(float)
    if np.isfinite(axis).any():
        rng = np.random.default_rng(seed)
        out["axis_random_polarity"] = (axis + 180.0 * rng.integers(0, 2, size=axis.size)) % 360.0
        out["axis_oracle_polarity"] = np.where(angular_difference(axis, cons_deg) <= 90.0, axis, axis + 180.0) % 360.0
    if prevailing_deg is not None:
        out["prevailing"] = np.full(cons_deg.shape, float(prevailing_deg) % 360.0)
    cf = consensus[consensus["kind"] == "fan"]
    image = tiles.set_index("tile_id")["image_id"]
    labels, mean, _ = grouped_circular_mean(
        cf["direction_deg"].to_numpy(float), cf["tile_id"].map(image).to_numpy(), cf["length_px"].to_numpy(float)
    )
    out["image_oracle"] = fans["image_id"].map(pd.Series(mean, index=labels)).to_numpy(float)
    return out


def baseline_errors(fans, consensus, tiles, *, prevailing_deg=None, seed=0):
    """Per-fan angular errors (degrees in [0, 180]) of :func:`baseline_directions`."""
    cons_deg = fans["consensus_deg"].to_numpy(float)
    dirs = baseline_directions(fans, consensus, tiles, prevailing_deg=prevailing_deg, seed=seed)
    return {name: direction_errors(d, cons_deg) for name, d in dirs.items()}


def baseline_metrics(errors):
    """Direction metrics of every baseline and the model's skill relative to each.

    Parameters
    ----------
    errors : dict
        Output of :func:`baseline_errors`.

    Returns
    -------
    dict
        ``{name: {**direction_metrics, skill_median, delta_within_20}}`` with
        skill_median = 1 - median_model / median_baseline and delta_within_20
        = model share within 20 degrees minus the baseline's; ``model_better_than_all``.
    """
    model = direction_metrics(errors["model"])
    out = {}
    better = []
    for name, e in errors.items():
        if name == "model":
            continue
        m = direction_metrics(e)
        skill = None
        if model["median"] is not None and m["median"]:
            skill = 1.0 - model["median"] / m["median"]
        delta = None
        if model["within_20"] is not None and m["within_20"] is not None:
            delta = model["within_20"] - m["within_20"]
        m.update(skill_median=skill, delta_within_20=delta)
        out[name] = m
        better.append(skill is not None and skill > 0)
    out["model_better_than_all"] = bool(better) and all(better)
    return out


def _label_order(label):
    """Sort key that puts interval labels such as '[150, 180)' in numeric order, others by name."""
    text = str(label)
    if text.startswith("["):
        try:
            return (0, float(text[1:].split(",")[0]), text)
        except ValueError:
            pass
    return (1, 0.0, text)


def _tile_attrs(tiles, *, ls_bins):
    t = tiles.set_index("tile_id")
    attrs = pd.DataFrame(index=t.index)
    attrs["image"] = t["image_id"].astype(str)
    if "region" in t:
        attrs["region"] = t["region"].astype("string").fillna("(none)").astype(str)
    if "solar_longitude_deg" in t:
        attrs["ls"] = pd.cut(t["solar_longitude_deg"].astype(float), ls_bins, right=False).astype(str)
    return attrs


def breakdowns(
    detections,
    consensus,
    pairs,
    tiles,
    fans,
    *,
    ls_bins=(0, 150, 180, 210, 240, 270, 360),
    length_bins=(0, 25, 50, 100, 200, np.inf),
    votes_bins=(0, 3, 5, 10, 20, np.inf),
):
    """Object and direction metrics per image, region, solar-longitude bin, fan length bin and votes bin.

    Tile groupings (image, region, ls) give precision, recall and F1 per kind
    and the per-fan direction summary; consensus groupings (fan length bins of
    ``length_px``, votes bins) give recall per kind and the direction summary,
    since a detection has no consensus length or votes of its own.

    Returns
    -------
    dict
        ``{grouping: {group_label: {...}}}``.
    """
    attrs = _tile_attrs(tiles, ls_bins=list(ls_bins))
    out = {}
    tp = pairs
    for col in attrs.columns:
        det_key = detections["tile_id"].map(attrs[col])
        cons_key = consensus["tile_id"].map(attrs[col])
        pair_key = tp["tile_id"].map(attrs[col])
        fan_key = fans["tile_id"].map(attrs[col])
        group = {}
        for label in sorted(set(attrs[col].unique()), key=_label_order):
            entry = {}
            for kind in ("fan", "spot"):
                n_det = int(((det_key == label) & (detections["kind"] == kind)).sum())
                n_cons = int(((cons_key == label) & (consensus["kind"] == kind)).sum())
                n_tp = int(((pair_key == label) & (tp["kind"] == kind)).sum())
                p, r, f = _prf(n_tp, n_det, n_cons)
                entry[kind] = {"precision": _num(p), "recall": _num(r), "f1": _num(f), "n_consensus": n_cons}
            entry["direction"] = direction_metrics(fans.loc[(fan_key == label).to_numpy(), "error_deg"])
            group[str(label)] = entry
        out[col] = group
    matched_cons = set(pairs["cons_index"])
    for col, bins, source in (("fan_length", length_bins, "length_px"), ("votes", votes_bins, "votes")):
        if source not in consensus:
            continue
        cf = consensus[consensus["kind"] == "fan"]
        cats = pd.cut(cf[source].astype(float), list(bins), right=False)
        key = cats.astype(str)
        fan_key = pd.cut(fans[source].astype(float), list(bins), right=False).astype(str)
        group = {}
        # Bin order, not string order; bins without consensus fans are left out.
        for label in [str(c) for c in cats.cat.categories if str(c) in set(key)]:
            sel = cf.index[(key == label).to_numpy()]
            recall = np.mean(sel.isin(matched_cons)) if len(sel) else np.nan
            group[str(label)] = {
                "fan": {"recall": _num(recall), "n_consensus": int(len(sel))},
                "direction": direction_metrics(fans.loc[(fan_key == label).to_numpy(), "error_deg"]),
            }
        out[col] = group
    return out


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
    counts = rng.multinomial(k, np.full(k, 1.0 / k), size=n_boot).astype(float)
    weights = counts[:, inverse]
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


def _f1_units(detections, consensus, pairs, tiles, kind):
    """Per-image (2 * matches, detections + consensus) for a bootstrap of F1."""
    image = tiles.set_index("tile_id")["image_id"]
    imgs = pd.Index(tiles["image_id"].unique())
    tp = pairs[pairs["kind"] == kind]["tile_id"].map(image).value_counts().reindex(imgs, fill_value=0)
    nd = detections[detections["kind"] == kind]["tile_id"].map(image).value_counts().reindex(imgs, fill_value=0)
    nc = consensus[consensus["kind"] == kind]["tile_id"].map(image).value_counts().reindex(imgs, fill_value=0)
    return np.c_[2.0 * tp.to_numpy(), (nd + nc).to_numpy()], imgs.to_numpy()


def _check_tables(detections, consensus, tiles):
    _require(tiles, ["tile_id", "image_id"], "tiles")
    if tiles["tile_id"].duplicated().any():
        dup = tiles.loc[tiles["tile_id"].duplicated(), "tile_id"].iloc[0]
        raise DetectorError(f"tiles has tile_id {dup!r} more than once.")
    for name, df in (("detections", detections), ("consensus", consensus)):
        _require(df, ["tile_id", "kind"], name)
        unknown = ~df["tile_id"].isin(tiles["tile_id"])
        if unknown.any():
            row = int(np.argmax(unknown.to_numpy()))
            raise DetectorError(f"{name} row {row}: tile_id {df['tile_id'].iloc[row]!r} is not in tiles.")
        bad = ~df["kind"].isin(["fan", "spot"])
        if bad.any():
            row = int(np.argmax(bad.to_numpy()))
            raise DetectorError(f"{name} row {row}: kind {df['kind'].iloc[row]!r} is not fan or spot.")


def score_catalogs(
    detections,
    consensus,
    tiles,
    *,
    prevailing_deg=None,
    shapes=None,
    seed=0,
    n_boot=500,
    min_score=None,
    rasterise=None,
    min_tile_fans=3,
):
    """Score a detection catalog against a consensus catalog.

    Parameters
    ----------
    detections, consensus : DataFrame
        Contract tables (detections may add score, direction_confidence and axis_deg).
    tiles : DataFrame
        tile_id, image_id, optional region, solar_longitude_deg, width, height.
    prevailing_deg : float, optional
        Prevailing direction of the training fans for the prevailing baseline, degrees.
    shapes : mapping, optional
        tile_id -> (rows, cols); without it, from tiles' height and width
        when present; without either, coverage is skipped.
    seed : int, optional
        Seed for the random-polarity baseline and the bootstrap.
    n_boot : int, optional
        Bootstrap replicates over images.
    min_score : float, optional
        Drop detections with a lower score first.
    rasterise : callable, optional
        See :func:`coverage_metrics`.
    min_tile_fans : int, optional
        Tiles with at least this many consensus fans enter the per-tile mean direction.

    Returns
    -------
    dict
        JSON-ready: objects, direction (per_fan, per_tile_mean), baselines,
        coverage, breakdowns, intervals (95 % bootstrap over images), reference.
    """
    detections = detections.reset_index(drop=True)
    consensus = consensus.reset_index(drop=True)
    _check_tables(detections, consensus, tiles)
    if min_score is not None:
        detections = detections[detections["score"] >= min_score]
    pairs = match_objects(detections, consensus)
    tiles_wh = tiles
    if not {"width", "height"} <= set(tiles.columns):
        if shapes is None:
            raise DetectorError("tiles lacks width and height and no shapes were given.")
        sh = pd.DataFrame([(k, v[0], v[1]) for k, v in shapes.items()], columns=["tile_id", "height", "width"])
        tiles_wh = tiles.merge(sh, on="tile_id", how="left")
    objects = object_metrics(detections, consensus, pairs, tiles_wh)
    fans = matched_fans(detections, consensus, pairs, tiles)
    per_tile = tile_mean_errors(detections, consensus, tiles, min_fans=min_tile_fans)
    errors = baseline_errors(fans, consensus, tiles, prevailing_deg=prevailing_deg, seed=seed)
    baselines = baseline_metrics(errors)

    # Per-tile mean of every method on the matched fans, weighted by consensus
    # length on both sides so that only the directions differ.
    tile_baselines = {}
    keep = fans["tile_id"].isin(per_tile["tile_id"]).to_numpy()
    if keep.any():
        sub = fans[keep]
        w = sub["length_px"].to_numpy(float)
        groups = sub["tile_id"].to_numpy()
        _, cons_mean, _ = grouped_circular_mean(sub["consensus_deg"].to_numpy(float), groups, w)
        dirs = baseline_directions(fans, consensus, tiles, prevailing_deg=prevailing_deg, seed=seed)
        for name, d in dirs.items():
            _, m, _ = grouped_circular_mean(d[keep], groups, w)
            tile_baselines[name] = direction_metrics(direction_errors(m, cons_mean))

    if shapes is None and {"width", "height"} <= set(tiles.columns):
        shapes = dict(zip(tiles["tile_id"], zip(tiles["height"].astype(int), tiles["width"].astype(int))))
    coverage = None
    cov_tiles = None
    if shapes:
        cov_tiles = coverage_metrics(detections, consensus, shapes, rasterise=rasterise)
        coverage = _coverage_summary(cov_tiles)

    image = tiles.set_index("tile_id")["image_id"]
    intervals = {}
    for kind in ("fan", "spot"):
        units, imgs = _f1_units(detections, consensus, pairs, tiles, kind)
        intervals[f"{kind}_f1"] = bootstrap_interval(units, imgs, "ratio", n_boot=n_boot, seed=seed)
    fe, fi = fans["error_deg"].to_numpy(float), fans["image_id"].to_numpy()
    intervals["fan_direction_median"] = bootstrap_interval(fe, fi, "median", n_boot=n_boot, seed=seed)
    intervals["fan_direction_p90"] = bootstrap_interval(fe, fi, "p90", n_boot=n_boot, seed=seed)
    intervals["flip_rate"] = bootstrap_interval((fe > 135.0).astype(float), fi, "mean", n_boot=n_boot, seed=seed)
    intervals["tile_mean_median"] = bootstrap_interval(
        per_tile["error_deg"].to_numpy(float), per_tile["image_id"].to_numpy(), "median", n_boot=n_boot, seed=seed
    )
    if cov_tiles is not None:
        sel = cov_tiles[cov_tiles["any_deposit"]]
        intervals["dice_mean"] = bootstrap_interval(
            sel["dice"].to_numpy(float), sel["tile_id"].map(image).to_numpy(), "mean", n_boot=n_boot, seed=seed
        )
        intervals["covered_error_pp_mean"] = bootstrap_interval(
            cov_tiles["covered_error_pp"].to_numpy(float), cov_tiles["tile_id"].map(image).to_numpy(), "mean",
            n_boot=n_boot, seed=seed,
        )
    intervals = {k: None if v == (None, None) else list(v) for k, v in intervals.items()}

    tile_summary = direction_metrics(per_tile["error_deg"])
    tile_summary["n_tiles_without_detected_fans"] = int(per_tile["predicted_mean_deg"].isna().sum())
    return {
        "objects": objects,
        "direction": {"per_fan": direction_metrics(fans["error_deg"]), "per_tile_mean": tile_summary},
        "baselines": {"per_fan": baselines, "per_tile_mean_on_matched": tile_baselines,
                      "prevailing_deg": None if prevailing_deg is None else float(prevailing_deg)},
        "coverage": coverage,
        "breakdowns": breakdowns(detections, consensus, pairs, tiles, fans),
        "intervals": {"level": 0.95, "n_boot": int(n_boot), "seed": int(seed), "by": "image_id",
                      "kind": interval_kind(int(tiles["image_id"].nunique())), **intervals},
        "reference": {
            "crowd_vs_expert_tile_mean_deg": CROWD_VS_EXPERT_DEG,
            "note": "common practice: the crowd's per-tile mean fan direction agrees with an expert's within about 10 degrees",
        },
        "counts": {
            "n_tiles": int(len(tiles)),
            "n_images": int(tiles["image_id"].nunique()),
            "n_detections": int(len(detections)),
            "n_consensus": int(len(consensus)),
        },
    }
