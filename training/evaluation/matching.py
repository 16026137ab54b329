"""Matching detections to consensus features: candidate pairs within each feature's radius, then one-to-one."""

import numpy as np
import pandas as pd

from detector.errors import DetectorError
from detector.geometry import angular_difference, axial_difference

__all__ = [
    "match_objects",
    "candidate_pairs",
]


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
