"""Scoring of detections against a consensus catalog.

Pure functions over DataFrames and arrays: object and patch metrics, coverage
Dice and breakdowns here; object matching (:mod:`.matching`), direction recovery
and its baselines (:mod:`.directions`) and bootstrap intervals over images
(:mod:`.bootstrap`) beside it. :func:`score_catalogs` gathers them into one
JSON-ready dict; it scores a model's detections, and equally a synthetic
scene's noise-free truth against its consensus (the ceiling).

Angles are degrees clockwise from image up; fan directions in [0, 360),
spot and structure axes in [0, 180).
"""

import numpy as np
import pandas as pd

from detector.circstats import grouped_circular_mean
from detector.errors import DetectorError
from .bootstrap import bootstrap_interval, interval_kind
from .directions import (
    baseline_directions,
    baseline_errors,
    baseline_metrics,
    direction_errors,
    direction_metrics,
    matched_fans,
    tile_mean_errors,
)
from .matching import _require, match_objects

__all__ = [
    "object_metrics",
    "patch_metrics",
    "dice",
    "coverage_metrics",
    "breakdowns",
    "score_catalogs",
    "CROWD_VS_EXPERT_DEG",
]


#: Common practice: the crowd's per-tile mean fan direction and an expert's agree within about 10 degrees.
CROWD_VS_EXPERT_DEG = 10.0


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
        JSON-ready: objects, direction (per_fan, per_tile_mean, per_tile_prevailing), baselines,
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
    per_tile_prevailing = tile_mean_errors(detections, consensus, tiles, min_fans=min_tile_fans, pooling="prevailing")
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
    prevailing_summary = direction_metrics(per_tile_prevailing["error_deg"])
    return {
        "objects": objects,
        "direction": {"per_fan": direction_metrics(fans["error_deg"]), "per_tile_mean": tile_summary,
                      "per_tile_prevailing": prevailing_summary},
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
