"""Direction recovery: errors of matched fans, per-tile mean directions, and the baselines a model must beat
(one prevailing direction for every fan, random directions). Degrees clockwise from image up.
"""

import numpy as np
import pandas as pd

from detector.circstats import grouped_circular_mean
from detector.inference.detect import fan_direction_weights, tile_direction_stats
from detector.geometry import angular_difference

__all__ = [
    "direction_errors",
    "direction_metrics",
    "matched_fans",
    "TILE_POOLINGS",
    "tile_mean_errors",
    "baseline_directions",
    "baseline_errors",
    "baseline_metrics",
]


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


#: How a tile's fans are pooled into one direction, the same way on both sides of the comparison.
TILE_POOLINGS = ("mean", "prevailing")


def _pooled(df, weights, pooling):
    """One direction per tile: the weighted circular mean, or the robust prevailing direction."""
    if pooling == "mean":
        labels, mean, _ = grouped_circular_mean(df["direction_deg"].to_numpy(float), df["tile_id"].to_numpy(), weights)
        return pd.Series(mean, index=labels, dtype=float)
    frame = pd.DataFrame({"tile_id": df["tile_id"].to_numpy(), "d": df["direction_deg"].to_numpy(float), "w": weights})
    return pd.Series({tid: tile_direction_stats(g["d"].to_numpy(), g["w"].to_numpy())[0]
                      for tid, g in frame.groupby("tile_id")}, dtype=float)


def tile_mean_errors(detections, consensus, tiles, *, min_fans=3, pooling="mean"):
    """Error of the per-tile fan direction, for tiles with at least ``min_fans`` consensus fans.

    Both sides pool their fans the same way, so that a tile whose fans follow two
    winds is not scored on the gap between two estimators (the noise-free truth,
    scored so, is off by a few degrees, not by the distance between a mean and a
    mode):

    - ``"mean"``: the weighted circular mean;
    - ``"prevailing"``: the robust prevailing direction
      (:func:`detector.inference.detect.tile_direction_stats`, the direction
      ``screen`` reports per tile), which a minority of stray or second-wind fans
      does not move.

    Consensus fans weigh their length; detected fans weigh score x direction
    confidence x length (:func:`detector.inference.detect.fan_direction_weights`;
    length alone without those columns), the weight ``screen`` gives them. A tile
    without any detected fan gets a NaN error.

    Returns
    -------
    DataFrame
        tile_id, image_id, n_consensus_fans, consensus_mean_deg,
        predicted_mean_deg, error_deg.
    """
    if pooling not in TILE_POOLINGS:
        raise ValueError(f"pooling {pooling!r} is not one of {TILE_POOLINGS}.")
    cf = consensus[consensus["kind"] == "fan"]
    counts = cf.groupby("tile_id").size()
    keep = counts.index[counts >= min_fans]
    cf = cf[cf["tile_id"].isin(keep)]
    cons_mean = _pooled(cf, cf["length_px"].to_numpy(float), pooling).reindex(keep)
    df_ = detections[(detections["kind"] == "fan") & detections["tile_id"].isin(keep)]
    pred_mean = _pooled(df_, fan_direction_weights(df_), pooling).reindex(cons_mean.index)
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
