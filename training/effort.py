"""Route screened tiles (skip / machine / crowd) and estimate the volunteer effort left.

The routing thresholds are set on the held-out tiles of the model card
(``card["heldout_tiles"]``), so that the promises they make are measured on
images the model never saw:

* **skip** - the largest tile deposit probability threshold such that at least
  ``recall`` of the held-out consensus deposit *area* lies in tiles that are not
  skipped;
* **machine** - the smallest detection confidence above which held-out tiles
  reach the object F1 and fan direction targets;
* **crowd** - everything else, and always every unfamiliar tile.

:func:`learning_curve` trains on nested subsets of a tile set's images and fits
power laws to the held-out errors to say how many more consensus tiles would
reach the targets.
"""

import json
import math
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from detector.errors import DetectorError
from detector.io import atomic_path, write_json

__all__ = [
    "ROUTES",
    "DEFAULT_SECONDS_PER_CLASSIFICATION",
    "LEARNING_CURVE_TARGETS",
    "skip_threshold",
    "machine_threshold",
    "tile_confidence",
    "route_tiles",
    "tile_detection_summary",
    "run_effort",
    "learning_curve_summary",
    "estimate_effort",
    "effort_summary",
    "effort_command",
    "power_law",
    "fit_power_law",
    "tiles_needed",
    "learning_curve",
]

ROUTES = ("skip", "machine", "crowd", "nodata")

#: Assumed volunteer time per classification, s, when the campaign gives none.
DEFAULT_SECONDS_PER_CLASSIFICATION = 60.0

#: Targets of the learning curve: (metric, error definition, largest acceptable error).
LEARNING_CURVE_TARGETS = {
    "fan_f1": {"error": "1 - fan F1", "target_error": 0.2, "target": "fan F1 >= 0.8"},
    "spot_f1": {"error": "1 - spot F1", "target_error": 0.2, "target": "spot F1 >= 0.8"},
    "fan_direction_median_deg": {"error": "median fan direction error, degrees", "target_error": 10.0,
                                 "target": "median fan direction error <= 10 deg"},
}

_SCREEN_REQUIRED = ("tile_id", "image", "p_deposit", "unfamiliarity", "route")
_HELDOUT_REQUIRED = ("tile_id", "p_deposit", "consensus_px", "n_detections", "f1", "fan_error_median_deg",
                     "mean_score", "mean_direction_confidence", "unfamiliarity")
_MAX_CANDIDATES = 100
# A power law fitted on a handful of points says little beyond this factor of the data.
_MAX_EXTRAPOLATION = 100
# Bound of the exponent b. Learning-curve exponents of classifiers mostly lie below 1 (value
# from memory); 2 leaves room while keeping a fit through noisy points from becoming a cliff.
_B_MAX = 2.0
# Below this exponent a curve is flat: a 10x larger training set lowers the error by < 2.3 %.
_B_FLAT = 0.01


# --------------------------------------------------------------------------- thresholds


def skip_threshold(p_deposit, area_px, *, recall=0.98):
    """Largest deposit probability threshold that keeps ``recall`` of the deposit area.

    A tile is skipped when its ``p_deposit`` is strictly below the threshold, so
    tiles tied at the threshold are all kept; the threshold is always the
    ``p_deposit`` of a tile carrying deposit area, which makes it the largest
    value meeting the recall (any larger value would drop that tile and its ties).

    Parameters
    ----------
    p_deposit : ndarray of shape (n,)
        Tile deposit probabilities of held-out tiles.
    area_px : ndarray of shape (n,)
        Consensus deposit area of each tile, px.
    recall : float, default=0.98
        Share of the total deposit area that must lie in tiles not skipped, in (0, 1].

    Returns
    -------
    threshold : float
        0.0 (nothing is skipped) when the tiles hold no deposit area, since then
        no recall can be measured.
    """
    p = np.asarray(p_deposit, dtype=np.float64)
    area = np.asarray(area_px, dtype=np.float64)
    # Tiles without a p_deposit are never skipped, so only the others need the recall.
    has = (area > 0) & np.isfinite(p)
    total = area[has].sum()
    if total <= 0 or not has.any():
        return 0.0
    order = np.argsort(-p[has], kind="stable")
    p_sorted = p[has][order]
    cum = np.cumsum(area[has][order])
    # Relative slack only absorbs rounding of recall * total; areas are whole pixels.
    k = int(np.searchsorted(cum, recall * total * (1.0 - 1e-12), side="left"))
    k = min(k, len(p_sorted) - 1)
    return float(p_sorted[k])


def tile_confidence(mean_score, mean_direction_confidence):
    """Confidence of a tile's detections: the mean score, capped by the mean direction confidence.

    Parameters
    ----------
    mean_score : ndarray of shape (n,)
        Mean detection score of the tile (0 without detections).
    mean_direction_confidence : ndarray of shape (n,)
        Mean direction confidence of the tile's detections; NaN when it has no fans.

    Returns
    -------
    confidence : ndarray of shape (n,), in [0, 1]
    """
    score = np.nan_to_num(np.asarray(mean_score, dtype=np.float64), nan=0.0)
    direction = np.asarray(mean_direction_confidence, dtype=np.float64)
    return np.where(np.isfinite(direction), np.minimum(score, direction), score)


def _candidate_grid(conf):
    values = np.unique(conf[np.isfinite(conf)])
    if len(values) > _MAX_CANDIDATES:
        values = np.unique(np.quantile(values, np.linspace(0.0, 1.0, _MAX_CANDIDATES)))
    return values


def machine_threshold(confidence, f1, fan_error_deg, *, min_f1=0.8, max_direction_error=20.0, min_tiles=5,
                      candidates=None):
    """Smallest confidence above which held-out tiles meet the F1 and direction targets.

    For each candidate threshold ``c`` the held-out tiles with confidence >= ``c``
    must number at least ``min_tiles``, have a median per-tile object F1 >= ``min_f1``
    and a median (over the tiles with matched fans) of the per-tile median fan
    direction error <= ``max_direction_error``; a set without any matched fan
    cannot show its directions are right and does not qualify.

    Parameters
    ----------
    confidence : ndarray of shape (n,)
        Tile confidence (:func:`tile_confidence`) of held-out tiles with detections.
    f1 : ndarray of shape (n,)
        Per-tile object F1.
    fan_error_deg : ndarray of shape (n,)
        Per-tile median fan direction error, degrees; NaN without matched fans.
    candidates : ndarray, optional
        Thresholds to try; default the distinct confidences (or 100 quantiles of them).

    Returns
    -------
    threshold : float or None
        None when no candidate qualifies.
    """
    conf = np.asarray(confidence, dtype=np.float64)
    f1 = np.asarray(f1, dtype=np.float64)
    err = np.asarray(fan_error_deg, dtype=np.float64)
    cand = _candidate_grid(conf) if candidates is None else np.sort(np.asarray(candidates, dtype=np.float64))
    if len(conf) == 0 or len(cand) == 0:
        return None
    inside = conf[None, :] >= cand[:, None]  # (n_candidates, n_tiles)
    count = inside.sum(axis=1)
    with np.errstate(all="ignore"), _quiet_nanmedian():
        med_f1 = np.nanmedian(np.where(inside, f1[None, :], np.nan), axis=1)
        med_err = np.nanmedian(np.where(inside, err[None, :], np.nan), axis=1)
    ok = (count >= min_tiles) & (med_f1 >= min_f1) & np.isfinite(med_err) & (med_err <= max_direction_error)
    if not ok.any():
        return None
    return float(cand[np.argmax(ok)])


class _quiet_nanmedian:
    """Silence the all-NaN-slice warning: empty candidate sets are expected and handled."""

    def __enter__(self):
        import warnings

        self._ctx = warnings.catch_warnings()
        self._ctx.__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)

    def __exit__(self, *exc):
        return self._ctx.__exit__(*exc)


# --------------------------------------------------------------------------- held-out table


def _heldout_frame(card):
    tiles = card.get("heldout_tiles") if isinstance(card, dict) else None
    if not tiles:
        raise DetectorError(
            "the model card has no heldout_tiles (per-tile held-out figures); retrain the model with "
            "`frostvane train` so that routing thresholds can be set on held-out images."
        )
    frame = pd.DataFrame(list(tiles))
    missing = [c for c in _HELDOUT_REQUIRED if c not in frame.columns]
    if missing:
        raise DetectorError(f"the model card's heldout_tiles lack the column(s) {missing!r}.")
    out = pd.DataFrame({"tile_id": frame["tile_id"].astype(str)})
    for column in _HELDOUT_REQUIRED[1:]:
        out[column] = pd.to_numeric(frame[column], errors="coerce").astype(np.float64)
    out["consensus_px"] = out["consensus_px"].fillna(0.0)
    out["n_detections"] = out["n_detections"].fillna(0.0)
    out["confidence"] = tile_confidence(out["mean_score"], out["mean_direction_confidence"])
    out["familiar"] = ~(out["unfamiliarity"] > 1.0)
    return out


def _thresholds(held, *, recall, min_f1, max_direction_error, min_tiles, candidates=None):
    """Skip and machine thresholds from a held-out table or a dict of its columns (a resample)."""
    col = {c: np.asarray(held[c]) for c in ("p_deposit", "consensus_px", "n_detections", "familiar",
                                            "confidence", "f1", "fan_error_median_deg")}
    skip = skip_threshold(col["p_deposit"], col["consensus_px"], recall=recall)
    # The machine route only ever sees familiar tiles with detections, so judge it on those.
    eligible = (col["n_detections"] > 0) & col["familiar"].astype(bool)
    machine = machine_threshold(col["confidence"][eligible], col["f1"][eligible],
                                col["fan_error_median_deg"][eligible], min_f1=min_f1,
                                max_direction_error=max_direction_error, min_tiles=min_tiles,
                                candidates=candidates)
    return skip, machine


def _missed_share(held, skip):
    area = held["consensus_px"].to_numpy(np.float64)
    total = area.sum()
    if total <= 0:
        return None
    skipped = (held["p_deposit"].to_numpy(np.float64) < skip) & held["familiar"].to_numpy(bool)
    return float(area[skipped].sum() / total)


# --------------------------------------------------------------------------- routing


def _screen_arrays(screen):
    """Per-tile arrays of a screen table: validity, p_deposit, familiarity, confidence, detections."""
    nodata = screen["route"].fillna("").astype(str).str.strip().eq("nodata").to_numpy()
    p = pd.to_numeric(screen["p_deposit"], errors="coerce").to_numpy(np.float64)
    unf = pd.to_numeric(screen["unfamiliarity"], errors="coerce").to_numpy(np.float64)
    unfamiliar = (unf > 1.0) & ~nodata
    if "mean_score" in screen.columns:
        conf = tile_confidence(pd.to_numeric(screen["mean_score"], errors="coerce"),
                               pd.to_numeric(screen.get("mean_direction_confidence"), errors="coerce")
                               if "mean_direction_confidence" in screen.columns else np.full(len(screen), np.nan))
        n_det = pd.to_numeric(screen.get("n_detections", pd.Series(np.ones(len(screen)))), errors="coerce")
        has_det = n_det.fillna(0).to_numpy() > 0
    else:
        conf = np.zeros(len(screen))
        has_det = np.zeros(len(screen), dtype=bool)
    return nodata, p, unfamiliar, conf, has_det


def _route_codes(nodata, p, unfamiliar, conf, has_det, skip, machine):
    # 0 skip, 1 machine, 2 crowd, 3 nodata; a tile without a p_deposit is neither skipped nor
    # trusted to the machine.
    skip_mask = (p < skip) & ~unfamiliar & ~nodata
    threshold = np.inf if machine is None else machine
    machine_mask = ~skip_mask & ~unfamiliar & ~nodata & np.isfinite(p) & has_det & (conf >= threshold)
    code = np.full(len(p), 2, dtype=np.int8)
    code[skip_mask] = 0
    code[machine_mask] = 1
    code[nodata] = 3
    return code


def tile_detection_summary(detections):
    """Per-tile mean score, mean direction confidence and detection count of a detections table.

    Parameters
    ----------
    detections : DataFrame
        ``tile_id``, ``kind``, ``score``, ``direction_confidence`` (the screen's detections.csv).

    Returns
    -------
    summary : DataFrame indexed by tile_id
        ``mean_score``, ``mean_direction_confidence`` (NaN for tiles without fans), ``n_detections``.
    """
    det = detections.copy()
    det["score"] = pd.to_numeric(det["score"], errors="coerce")
    det["direction_confidence"] = pd.to_numeric(det["direction_confidence"], errors="coerce")
    det["is_fan"] = det["kind"].astype(str).eq("fan")
    grouped = det.groupby(det["tile_id"].astype(str))
    summary = pd.DataFrame({
        "mean_score": grouped["score"].mean(),
        "mean_direction_confidence": grouped["direction_confidence"].mean(),
        "n_detections": grouped.size(),
    })
    any_fan = grouped["is_fan"].any()
    summary.loc[~any_fan, "mean_direction_confidence"] = np.nan
    return summary


def route_tiles(screen_tiles_df, card, *, recall=0.98, max_direction_error=20.0, min_f1=0.8, min_tiles=5,
                detections=None):
    """Route screened tiles to skip, machine, crowd or nodata.

    Parameters
    ----------
    screen_tiles_df : DataFrame
        The screen's tiles.csv: ``tile_id``, ``image``, ``p_deposit``,
        ``unfamiliarity``, ``route`` ("nodata" or empty), and per-tile
        ``mean_score``, ``mean_direction_confidence``, ``n_detections`` (or pass
        ``detections``). Without detection scores no tile goes to machine.
    card : dict
        Model card with ``heldout_tiles``.
    recall : float, default=0.98
        Share of held-out deposit area that must lie in tiles not skipped, in (0, 1].
    max_direction_error : float, default=20.0
        Largest median fan direction error of machine tiles, degrees.
    min_f1 : float, default=0.8
        Smallest median per-tile object F1 of machine tiles.
    min_tiles : int, default=5
        Held-out tiles needed above a confidence threshold to trust it.
    detections : DataFrame, optional
        The screen's detections.csv; gives the per-tile confidence.

    Returns
    -------
    routed : DataFrame
        A copy of the input with ``route`` in {skip, machine, crowd, nodata},
        ``unfamiliar`` (bool: unfamiliarity > 1, always routed to crowd) and
        ``confidence``. ``routed.attrs["thresholds"]`` holds the thresholds and notes.

    Raises
    ------
    DetectorError
        Bad recall, missing columns or a card without held-out tiles.
    """
    _check_recall(recall)
    missing = [c for c in _SCREEN_REQUIRED if c not in screen_tiles_df.columns]
    if missing:
        raise DetectorError(f"screen tiles table lacks the column(s) {missing!r} (has {list(screen_tiles_df.columns)!r}).")
    held = _heldout_frame(card)
    screen = screen_tiles_df.copy()
    if detections is not None:
        summary = tile_detection_summary(detections)
        keyed = summary.reindex(screen["tile_id"].astype(str))
        screen["mean_score"] = keyed["mean_score"].fillna(0.0).to_numpy()
        screen["mean_direction_confidence"] = keyed["mean_direction_confidence"].to_numpy()
        screen["n_detections"] = keyed["n_detections"].fillna(0).astype(int).to_numpy()
    skip, machine = _thresholds(held, recall=recall, min_f1=min_f1, max_direction_error=max_direction_error,
                                min_tiles=min_tiles)
    nodata, p, unfamiliar, conf, has_det = _screen_arrays(screen)
    code = _route_codes(nodata, p, unfamiliar, conf, has_det, skip, machine)
    screen["route"] = np.asarray(ROUTES, dtype=object)[code]
    screen["unfamiliar"] = unfamiliar
    screen["confidence"] = conf
    screen.attrs["thresholds"] = _threshold_notes(held, skip, machine, recall=recall, min_f1=min_f1,
                                                  max_direction_error=max_direction_error, min_tiles=min_tiles,
                                                  has_scores="mean_score" in screen.columns)
    return screen


def _threshold_notes(held, skip, machine, *, recall, min_f1, max_direction_error, min_tiles, has_scores):
    deposit_tiles = int((held["consensus_px"] > 0).sum())
    if deposit_tiles == 0:
        skip_note = "the held-out tiles hold no consensus deposits, so no recall can be measured: nothing is skipped"
    else:
        skip_note = (f"tiles with p_deposit below {skip:.4f} are skipped; tiles tied at the threshold are kept; "
                     f"set so that >= {recall:.2%} of the held-out deposit area ({deposit_tiles} tiles) is kept")
    if machine is None:
        machine_note = (f"no confidence threshold gives >= {min_tiles} held-out tiles with median F1 >= {min_f1} "
                        f"and median fan direction error <= {max_direction_error} deg: no tile is routed to machine")
    elif not has_scores:
        machine_note = "the screen gave no detection scores: no tile is routed to machine"
    else:
        machine_note = (f"tiles with detections and confidence >= {machine:.4f} are routed to machine "
                        f"(held-out median F1 >= {min_f1}, median fan direction error <= {max_direction_error} deg)")
    return {
        "skip_p_deposit": skip,
        "skip_note": skip_note,
        "machine_confidence": machine,
        "machine_note": machine_note,
        "recall": recall,
        "min_f1": min_f1,
        "max_direction_error_deg": max_direction_error,
        "min_tiles": min_tiles,
        "confidence": "mean detection score of the tile, capped by the mean direction confidence when it has fans",
        "unfamiliar_rule": "tiles with unfamiliarity > 1 always go to crowd",
    }


def _check_recall(recall):
    if not (isinstance(recall, (int, float)) and 0.0 < recall <= 1.0):
        raise DetectorError(f"recall must be in (0, 1]; got {recall!r}.")


# --------------------------------------------------------------------------- effort


def estimate_effort(routed_df, card, *, classifications_per_tile=30, seconds_per_classification=None, seed=0,
                    n_boot=2000, recall=None, max_direction_error=None, min_f1=None, min_tiles=None):
    """Volunteer effort left after routing, with a bootstrap interval over the held-out tiles.

    Parameters
    ----------
    routed_df : DataFrame
        Output of :func:`route_tiles` (its ``attrs["thresholds"]`` give the targets
        re-used by the bootstrap unless passed here).
    card : dict
        Model card with ``heldout_tiles``.
    classifications_per_tile : int, default=30
        Volunteer classifications each crowd tile still needs (30 is common practice).
    seconds_per_classification : float, optional
        Volunteer time per classification, s; default 60 s, reported as an assumption.
    seed : int, default=0
    n_boot : int, default=2000
        Bootstrap replicates: the held-out tiles are resampled with replacement,
        the thresholds re-derived and the screened tiles re-routed.

    Returns
    -------
    effort : dict
        JSON-ready: ``tiles`` (count per route, unfamiliar), ``classifications``,
        ``hours``, ``interval_90`` (crowd tiles, classifications, hours, and the
        missed share measured on the held-out tiles each resample left out),
        ``missed_deposit_share`` (held-out deposit area in skipped tiles / total),
        ``thresholds`` and ``assumptions``.
    """
    if classifications_per_tile < 1:
        raise DetectorError(f"classifications per tile must be at least 1; got {classifications_per_tile!r}.")
    if n_boot < 1:
        raise DetectorError(f"bootstrap replicates must be at least 1; got {n_boot!r}.")
    assumed = seconds_per_classification is None
    seconds = DEFAULT_SECONDS_PER_CLASSIFICATION if assumed else float(seconds_per_classification)
    if not seconds > 0:
        raise DetectorError(f"seconds per classification must be positive; got {seconds_per_classification!r}.")
    notes = dict(routed_df.attrs.get("thresholds", {}))
    recall = notes.get("recall", 0.98) if recall is None else recall
    _check_recall(recall)
    min_f1 = notes.get("min_f1", 0.8) if min_f1 is None else min_f1
    max_err = notes.get("max_direction_error_deg", 20.0) if max_direction_error is None else max_direction_error
    min_tiles = notes.get("min_tiles", 5) if min_tiles is None else min_tiles
    held = _heldout_frame(card)
    skip, machine = _thresholds(held, recall=recall, min_f1=min_f1, max_direction_error=max_err, min_tiles=min_tiles)

    route = routed_df["route"].astype(str)
    counts = {r: int((route == r).sum()) for r in ROUTES}
    n_crowd = counts["crowd"]
    per_hour = seconds / 3600.0
    classifications = n_crowd * classifications_per_tile

    nodata = route.eq("nodata").to_numpy()
    p = pd.to_numeric(routed_df["p_deposit"], errors="coerce").to_numpy(np.float64)
    unfamiliar = routed_df["unfamiliar"].to_numpy(bool) if "unfamiliar" in routed_df.columns \
        else _screen_arrays(routed_df)[2]
    conf = routed_df["confidence"].to_numpy(np.float64) if "confidence" in routed_df.columns \
        else _screen_arrays(routed_df)[3]
    if "n_detections" in routed_df.columns:
        has_det = pd.to_numeric(routed_df["n_detections"], errors="coerce").fillna(0).to_numpy() > 0
    else:
        has_det = route.eq("machine").to_numpy()
    crowd_boot, missed_boot = _bootstrap(held, (nodata, p, unfamiliar, conf, has_det), recall=recall, min_f1=min_f1,
                                         max_direction_error=max_err, min_tiles=min_tiles, seed=seed, n_boot=n_boot)
    lo, hi = np.percentile(crowd_boot, [5.0, 95.0])
    missed = _missed_share(held, skip)
    finite_missed = missed_boot[np.isfinite(missed_boot)]
    missed_iv = [float(v) for v in np.percentile(finite_missed, [5.0, 95.0])] if len(finite_missed) else None
    n_active = len(routed_df) - counts["nodata"]
    return {
        "tiles": {"total": int(len(routed_df)), **counts, "unfamiliar": int(np.sum(unfamiliar))},
        "classifications_per_tile": int(classifications_per_tile),
        "seconds_per_classification": seconds,
        "seconds_assumed": assumed,
        "classifications": int(classifications),
        "hours": float(classifications * per_hour),
        "classifications_without_routing": int(n_active * classifications_per_tile),
        "hours_without_routing": float(n_active * classifications_per_tile * per_hour),
        "interval_90": {
            "crowd_tiles": [float(lo), float(hi)],
            "classifications": [float(lo * classifications_per_tile), float(hi * classifications_per_tile)],
            "hours": [float(lo * classifications_per_tile * per_hour), float(hi * classifications_per_tile * per_hour)],
            "missed_deposit_share": missed_iv,
            "n_boot": int(n_boot),
            "seed": int(seed),
            "method": "percentile bootstrap over held-out tiles; thresholds re-derived and tiles re-routed; "
                      "the missed share is measured on the tiles each resample left out",
        },
        "missed_deposit_share": missed,
        "thresholds": {**notes, "skip_p_deposit": skip, "machine_confidence": machine},
        "heldout": {"tiles": int(len(held)), "deposit_tiles": int((held["consensus_px"] > 0).sum()),
                    "deposit_px": float(held["consensus_px"].sum()),
                    "images": sorted({str(t.get("image_id")) for t in card["heldout_tiles"]})},
        "assumptions": [
            f"{classifications_per_tile} volunteer classifications per crowd tile (common practice: 30)",
            f"{seconds:g} s per classification" + (" (assumed; use your campaign's figure)" if assumed else ""),
            "machine and skip tiles need no volunteer classifications",
        ],
    }


def _bootstrap(held, screen_arrays, *, recall, min_f1, max_direction_error, min_tiles, seed, n_boot):
    """Crowd tile counts and out-of-bag missed deposit shares over resamples of the held-out tiles."""
    rng = np.random.default_rng(seed)
    n = len(held)
    nodata, p, unfamiliar, conf, has_det = screen_arrays
    eligible = ((held["n_detections"] > 0) & held["familiar"]).to_numpy()
    candidates = _candidate_grid(held["confidence"].to_numpy(np.float64)[eligible])
    cols = {c: held[c].to_numpy() for c in held.columns}
    area = cols["consensus_px"].astype(np.float64)
    held_p = cols["p_deposit"].astype(np.float64)
    familiar = cols["familiar"].astype(bool)
    pairs = np.empty((n_boot, 2))
    missed = np.full(n_boot, np.nan)
    for b in range(n_boot):
        idx = rng.integers(0, n, size=n)
        sample = {c: v[idx] for c, v in cols.items()}
        skip, machine = _thresholds(sample, recall=recall, min_f1=min_f1, max_direction_error=max_direction_error,
                                    min_tiles=min_tiles, candidates=candidates)
        pairs[b] = (skip, np.nan if machine is None else machine)
        # Judge the re-derived threshold on the tiles the resample left out, as on new tiles.
        oob = np.ones(n, dtype=bool)
        oob[idx] = False
        total = area[oob].sum()
        if total > 0:
            missed[b] = area[oob & (held_p < skip) & familiar].sum() / total
    # Many resamples give the same thresholds: route the screen once per distinct pair.
    unique, inverse = np.unique(pairs, axis=0, return_inverse=True)
    crowd = np.empty(len(unique))
    for u, (skip, machine) in enumerate(unique):
        code = _route_codes(nodata, p, unfamiliar, conf, has_det, skip, None if np.isnan(machine) else machine)
        crowd[u] = np.sum(code == 2)
    return crowd[inverse.ravel()], missed


def effort_summary(effort):
    """One-screen text summary of :func:`estimate_effort`."""
    t = effort["tiles"]
    iv = effort["interval_90"]
    th = effort["thresholds"]
    lines = [
        f"tiles: {t['total']} screened - skip {t['skip']}, machine {t['machine']}, crowd {t['crowd']} "
        f"({t['unfamiliar']} unfamiliar), no data {t['nodata']}",
        f"skip: {th.get('skip_note', '')}",
        f"machine: {th.get('machine_note', '')}",
        f"volunteer effort left: {effort['classifications']:,} classifications "
        f"({effort['classifications_per_tile']} per crowd tile), {effort['hours']:,.1f} h "
        f"at {effort['seconds_per_classification']:g} s per classification"
        + (" (assumed; use your campaign's figure)" if effort["seconds_assumed"] else ""),
        f"90% interval: crowd tiles {iv['crowd_tiles'][0]:.0f}-{iv['crowd_tiles'][1]:.0f}, "
        f"classifications {iv['classifications'][0]:,.0f}-{iv['classifications'][1]:,.0f}, "
        f"hours {iv['hours'][0]:,.1f}-{iv['hours'][1]:,.1f} (bootstrap over {effort['heldout']['tiles']} "
        f"held-out tiles, {iv['n_boot']} resamples)",
        f"without routing: {effort['classifications_without_routing']:,} classifications, "
        f"{effort['hours_without_routing']:,.1f} h",
    ]
    missed = effort["missed_deposit_share"]
    if missed is None:
        lines.append("deposits missed by skipping: unknown (no held-out deposits)")
    else:
        miv = iv.get("missed_deposit_share")
        extra = f" (90% interval on left-out tiles {miv[0]:.2%}-{miv[1]:.2%})" if miv else ""
        lines.append(f"deposits missed by skipping: {missed:.2%} of the held-out deposit area{extra}")
    return "\n".join(lines)


# --------------------------------------------------------------------------- command


def _read_screen(screen_dir):
    screen_dir = Path(screen_dir)
    if not screen_dir.is_dir():
        raise DetectorError(f"screen folder {str(screen_dir)!r} does not exist; run `frostvane screen` first.")
    path = screen_dir / "tiles.csv"
    if not path.is_file():
        raise DetectorError(f"screen folder {str(screen_dir)!r} has no tiles.csv; run `frostvane screen` first.")
    try:
        tiles = pd.read_csv(path, dtype={"tile_id": str, "image": str, "route": str}, keep_default_na=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
        raise DetectorError(f"{str(path)!r} cannot be read as CSV: {err}.") from err
    missing = [c for c in _SCREEN_REQUIRED if c not in tiles.columns]
    if missing:
        raise DetectorError(f"{str(path)!r} lacks the column(s) {missing!r}.")
    dup = tiles["tile_id"].duplicated(keep="first")
    if dup.any():
        row = int(np.flatnonzero(dup.to_numpy())[0])
        first = int(np.flatnonzero((tiles["tile_id"] == tiles["tile_id"].iloc[row]).to_numpy())[0])
        raise DetectorError(f"{str(path)!r} row {row + 1}: tile_id {tiles['tile_id'].iloc[row]!r} repeats row "
                            f"{first + 1}; each tile must be counted once.")
    bad = pd.to_numeric(tiles["p_deposit"], errors="coerce")
    text = bad.isna() & tiles["p_deposit"].notna()
    if text.any():
        row = int(np.flatnonzero(text.to_numpy())[0])
        raise DetectorError(f"{str(path)!r} row {row + 1}: p_deposit {tiles['p_deposit'].iloc[row]!r} is not a number.")
    _check_against_run(screen_dir, path, tiles)
    wrong = tiles.index[(bad < 0) | (bad > 1)]
    if len(wrong):
        row = int(wrong[0])
        raise DetectorError(f"{str(path)!r} row {row + 1}: p_deposit {tiles['p_deposit'].iloc[row]!r} is outside [0, 1].")
    detections = None
    det_path = screen_dir / "detections.csv"
    if det_path.is_file():
        try:
            detections = pd.read_csv(det_path, dtype={"tile_id": str, "kind": str})
        except pd.errors.EmptyDataError:
            detections = pd.DataFrame(columns=["tile_id", "kind", "score", "direction_confidence"])
        need = [c for c in ("tile_id", "kind", "score", "direction_confidence") if c not in detections.columns]
        if need:
            raise DetectorError(f"{str(det_path)!r} lacks the column(s) {need!r}.")
    return tiles, detections


def _check_against_run(screen_dir, path, tiles):
    """tiles.csv must hold every tile its screening's run.json counted (rows deleted by hand are refused)."""
    run_file = Path(screen_dir) / "run.json"
    if not run_file.is_file():
        return  # a table made by other means: nothing to check it against
    try:
        record = json.loads(run_file.read_text(encoding="utf-8"))
    except (OSError, ValueError) as err:
        raise DetectorError(f"{str(run_file)!r} is not a readable run record: {err}.") from err
    if not isinstance(record, dict):
        raise DetectorError(f"{str(run_file)!r} is not a run record (a JSON object).")
    if record.get("status") != "complete":
        raise DetectorError(f"{str(run_file)!r} has status {record.get('status')!r}: the screening did not finish; "
                            f"run `frostvane screen` again to complete it.")
    expected = (record.get("counts") or {}).get("n_tiles")
    if isinstance(expected, int) and expected != len(tiles):
        raise DetectorError(f"{str(path)!r} has {len(tiles)} tile rows; its screening ({str(run_file)!r}) produced "
                            f"{expected}: rows were added or deleted; screen again rather than edit it.")


def _read_card(model_dir):
    """The card of a model whose ONNX files and card schema pass :func:`detector.model.load_model`."""
    from detector.model import load_model

    return load_model(model_dir).card


def _jsonable(value):
    if isinstance(value, dict):
        return {k: _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (np.floating, float)):
        return None if not np.isfinite(value) else float(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def run_effort(model_dir, screen_dir, *, out=None, classifications_per_tile=30, seconds_per_classification=None,
               recall=0.98, max_direction_error=20.0, min_f1=0.8, seed=0, n_boot=2000, log=print):
    """Route a screen folder's tiles, estimate the effort and write effort.json and routes.csv.

    Parameters
    ----------
    model_dir : path-like
        Model folder whose ``model.json`` holds ``heldout_tiles``.
    screen_dir : path-like
        Output of ``frostvane screen``; its tiles.csv route column is updated in place (atomically).
    out : path-like, optional
        Folder for effort.json and routes.csv; default ``screen_dir``.

    Returns
    -------
    effort : dict
    """
    _check_recall(recall)
    tiles, detections = _read_screen(screen_dir)
    card = _read_card(model_dir)
    routed = route_tiles(tiles, card, recall=recall, max_direction_error=max_direction_error, min_f1=min_f1,
                         detections=detections)
    effort = estimate_effort(routed, card, classifications_per_tile=classifications_per_tile,
                             seconds_per_classification=seconds_per_classification, seed=seed, n_boot=n_boot)
    effort["model_dir"] = str(model_dir)
    effort["screen_dir"] = str(screen_dir)
    out = Path(screen_dir if out is None else out)
    routes = routed[["tile_id", "image", "route", "unfamiliar", "p_deposit", "unfamiliarity"]]
    write_json(out / "effort.json", _jsonable(effort), indent=1)
    with atomic_path(out / "routes.csv") as tmp:
        routes.to_csv(tmp, index=False)
    updated = tiles.copy()
    updated["route"] = routed["route"].to_numpy()
    with atomic_path(Path(screen_dir) / "tiles.csv") as tmp:
        updated.to_csv(tmp, index=False)
    gpkg = Path(screen_dir) / "detections.gpkg"
    if gpkg.is_file():
        from detector.gpkg import update_tile_routes

        update_tile_routes(gpkg, dict(zip(routed["tile_id"].astype(str), routed["route"].astype(str), strict=True)))
    log(effort_summary(effort))
    log(f"wrote {out / 'effort.json'} and {out / 'routes.csv'}; updated the route column of "
        f"{Path(screen_dir) / 'tiles.csv'}" + (f" and the tiles layer of {gpkg}" if gpkg.is_file() else ""))
    return effort


def effort_command(args):
    """``frostvane effort``: route screened tiles and estimate effort, and/or draw a learning curve.

    Parameters
    ----------
    args : argparse.Namespace
        ``model_dir``, ``screen_dir`` (optional with ``learning_curve``),
        ``classifications_per_tile``, ``seconds_per_classification``, ``recall``,
        ``max_direction_error``, ``learning_curve`` (tile set path or None),
        ``out`` (default the screen folder) and ``seed``.
    """
    screen_dir = getattr(args, "screen_dir", None)
    curve_root = getattr(args, "learning_curve", None)
    out = getattr(args, "out", None)
    _check_recall(args.recall)
    if screen_dir is None and curve_root is None:
        raise DetectorError("frostvane effort needs a SCREEN_DIR (output of `frostvane screen`) or --learning-curve TILESET.")
    if screen_dir is not None:
        run_effort(args.model_dir, screen_dir, out=out, classifications_per_tile=args.classifications_per_tile,
                   seconds_per_classification=args.seconds_per_classification, recall=args.recall,
                   max_direction_error=args.max_direction_error, seed=args.seed)
    if curve_root is not None:
        curve_out = Path(out) if out is not None else (Path(screen_dir) if screen_dir is not None
                                                       else Path("out") / "learning_curve")
        curve = learning_curve(curve_root, seed=args.seed, out=curve_out)
        print(learning_curve_summary(curve))
        print(f"wrote {curve_out / 'learning_curve.json'} and {curve_out / 'learning_curve.png'}")


# --------------------------------------------------------------------------- learning curve


def power_law(n, a, b, c=0.0):
    """Error after training on ``n`` consensus tiles: ``a * n**-b + c``."""
    return a * np.power(np.asarray(n, dtype=np.float64), -b) + c


def fit_power_law(n, error, *, with_c=None, c_max=None):
    """Fit ``error(n) = a * n**-b + c`` by least squares (scipy.optimize.curve_fit).

    Parameters
    ----------
    n : ndarray of shape (k,)
        Training set sizes (consensus tiles), > 0.
    error : ndarray of shape (k,)
        Held-out error at each size (NaN points are dropped).
    with_c : bool, optional
        Fit the asymptote ``c``; default when at least 4 points remain (with 2-3
        points c = 0, which is optimistic: the error can fall forever).
    c_max : float, optional
        Upper bound of ``c``; default the largest measured error.

    Notes
    -----
    Bounds: ``a >= 0``, ``0 <= b <= 2``, ``0 <= c <= c_max``; the start is the
    log-log line through the points. Parameters that end on an upper bound are
    listed in ``at_upper_bound`` (the data then barely constrain the law).

    Returns
    -------
    fit : dict or None
        ``a``, ``b``, ``c``, ``with_c``, ``n_points``, ``rmse``; None with fewer than 2 points.
    """
    import warnings

    from scipy.optimize import OptimizeWarning, curve_fit

    n = np.asarray(n, dtype=np.float64)
    e = np.asarray(error, dtype=np.float64)
    keep = np.isfinite(n) & np.isfinite(e) & (n > 0)
    n, e = n[keep], e[keep]
    if len(n) < 2 or len(np.unique(n)) < 2:
        return None
    with_c = len(n) >= 4 if with_c is None else bool(with_c)
    e_max = float(max(e.max(), 1e-9))
    c_hi = e_max if c_max is None else float(c_max)
    # Start from the log-log line through the points (exact when c = 0).
    pos = e > 0
    if pos.sum() >= 2:
        slope, icpt = np.polyfit(np.log(n[pos]), np.log(e[pos]), 1)
        b0, a0 = float(np.clip(-slope, 0.0, _B_MAX)), float(np.exp(icpt))
    else:
        b0, a0 = 0.5, e_max * np.sqrt(n.min())
    a_hi = max(a0 * 100.0, e_max * n.max() ** _B_MAX * 10.0, 1.0)
    try:
        with warnings.catch_warnings():
            # An exact fit (as many points as parameters) has no covariance; only the values are used.
            warnings.simplefilter("ignore", OptimizeWarning)
            if with_c:
                params, _ = curve_fit(power_law, n, e, p0=[a0, b0, min(0.5 * e.min(), c_hi)],
                                      bounds=([0.0, 0.0, 0.0], [a_hi, _B_MAX, c_hi]), maxfev=20000)
            else:
                params, _ = curve_fit(lambda x, a, b: power_law(x, a, b), n, e, p0=[a0, b0],
                                      bounds=([0.0, 0.0], [a_hi, _B_MAX]), maxfev=20000)
                params = np.append(params, 0.0)
    except (RuntimeError, ValueError):
        return None
    a, b, c = map(float, params)
    rmse = float(np.sqrt(np.mean((power_law(n, a, b, c) - e) ** 2)))
    upper = {"a": a_hi, "b": _B_MAX, "c": c_hi if with_c else np.inf}
    at_bound = [k for k, v in (("a", a), ("b", b), ("c", c)) if np.isclose(v, upper[k], rtol=1e-6)]
    return {"a": a, "b": b, "c": c, "with_c": with_c, "n_points": int(len(n)), "rmse": rmse,
            "at_upper_bound": at_bound}


def tiles_needed(fit, target_error):
    """Training set size at which the fitted law reaches ``target_error``.

    Solves ``a * n**-b + c = target_error`` for ``n``.

    Returns
    -------
    n : float
        ``inf`` when the asymptote ``c`` is at or above the target (or the law is flat).
    """
    a, b, c = fit["a"], fit["b"], fit["c"]
    if c >= target_error:
        return math.inf
    if a <= 0:
        return 0.0
    if b <= 0:
        return 0.0 if a + c <= target_error else math.inf
    # In logs: a tiny exponent sends n past the float range.
    log_n = (math.log(a) - math.log(target_error - c)) / b
    return math.inf if log_n > 700.0 else float(math.exp(log_n))


def _curve_verdicts(points, fits):
    """How many more consensus tiles each target needs, from the fitted curves."""
    n_max = max(p["n_tiles"] for p in points)
    out = {}
    for metric, target in LEARNING_CURVE_TARGETS.items():
        errors = [p["errors"][metric] for p in points if p["n_tiles"] == n_max]
        last = errors[-1] if errors else None
        fit = fits.get(metric)
        entry = {**target, "measured_error_at_largest": last, "n_tiles_largest": n_max, "fit": fit}
        if last is not None and last <= target["target_error"]:
            entry.update(reached=True, n_tiles_needed=n_max, more_tiles=0,
                         verdict=f"{target['target']}: already met with {n_max} consensus tiles")
        elif fit is None:
            entry.update(reached=False, n_tiles_needed=None, more_tiles=None,
                         verdict=f"{target['target']}: too few measured points to fit a curve")
        else:
            need = tiles_needed(fit, target["target_error"])
            if fit["b"] < _B_FLAT:
                entry.update(reached=False, n_tiles_needed=None, more_tiles=None,
                             verdict=f"{target['target']}: not reachable by this curve (the error does not "
                                     f"fall with more tiles: b = {fit['b']:.2g})")
            elif not math.isfinite(need):
                entry.update(reached=False, n_tiles_needed=None, more_tiles=None,
                             verdict=f"{target['target']}: not reachable by this curve "
                                     f"(asymptote {fit['c']:.3g} is worse than the target)")
            elif need > _MAX_EXTRAPOLATION * n_max:
                entry.update(reached=False, n_tiles_needed=None, more_tiles=None, n_tiles_needed_fit=need,
                             verdict=f"{target['target']}: not reachable by this curve within "
                                     f"{_MAX_EXTRAPOLATION}x the measured data (the fit says ~{need:.3g} tiles, "
                                     f"too far to extrapolate)")
            else:
                more = max(0, math.ceil(need - n_max))
                entry.update(reached=False, n_tiles_needed=math.ceil(need), more_tiles=more,
                             verdict=f"{target['target']}: about {more} more consensus tiles "
                                     f"(~{math.ceil(need)} in all)")
        out[metric] = entry
    return out


def _subset_sizes(n_remaining, fractions):
    if n_remaining < 2:
        raise DetectorError(
            f"the learning curve needs at least 2 non-held-out images (fit and calibration); found {n_remaining}."
        )
    if fractions is None:
        sizes = np.arange(2, n_remaining + 1)
        if len(sizes) > 6:
            sizes = np.unique(np.round(np.geomspace(2, n_remaining, 6)).astype(int))
    else:
        fr = np.asarray(fractions, dtype=np.float64)
        if fr.size == 0 or np.any(~(fr > 0) | (fr > 1)):
            raise DetectorError(f"learning-curve fractions must lie in (0, 1]; got {list(fractions)!r}.")
        sizes = np.unique(np.clip(np.round(fr * n_remaining).astype(int), 2, n_remaining))
    return [int(s) for s in sizes]


def _write_subset(tileset_root, tiles_raw, consensus_raw, image_ids, folder):
    """A tile-set folder restricted to some images; its images are hard links to the original files
    (copies where the file system has none), since tile paths must stay inside their folder."""
    import os
    import shutil

    folder.mkdir(parents=True, exist_ok=True)
    tiles = tiles_raw[tiles_raw["image_id"].isin(image_ids)].copy()
    for rel in tiles["path"]:
        target = folder / rel
        if target.exists():
            continue
        target.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.link(Path(tileset_root) / rel, target)
        except OSError:
            shutil.copyfile(Path(tileset_root) / rel, target)
    consensus = consensus_raw[consensus_raw["tile_id"].isin(set(tiles["tile_id"]))]
    tiles.to_csv(folder / "tiles.csv", index=False)
    consensus.to_csv(folder / "consensus.csv", index=False)
    return len(tiles)


def learning_curve(tileset_root, *, seed=0, fractions=None, out=None, max_patches=20000, max_iter=100,
                   log=print):
    """Train on nested image subsets, fit power laws to the held-out errors, estimate tiles needed.

    The held-out images are chosen once (:func:`training.train.split_images`) and
    every run is scored on them; the other images are shuffled once and the k-th
    run trains on the first ``sizes[k]`` of them, so the subsets are nested.

    Parameters
    ----------
    tileset_root : path-like
        A tile set with consensus.
    seed : int, default=0
    fractions : sequence of float, optional
        Shares of the non-held-out images to train on, each in (0, 1]; default
        every count from 2 images up (at most 6 counts, spaced geometrically).
    out : path-like, optional
        Folder for learning_curve.json and learning_curve.png.
    max_patches, max_iter : int
        Fast training settings (one rotation).

    Returns
    -------
    curve : dict
        ``points`` (images, n_tiles, metrics, errors per run), ``fits`` and
        ``targets`` (tiles needed per target).
    """
    from detector.contract import CONSENSUS_FILE, TILES_FILE
    from detector.tileset import load_tileset

    from .train import TrainConfig, split_images, train_model

    root = Path(tileset_root)
    tileset = load_tileset(root)
    images = tileset.image_ids
    _, _, holdout = split_images(images, seed=seed)
    rest = [i for i in images if i not in holdout]
    order = list(np.random.default_rng(seed).permutation(rest))
    sizes = _subset_sizes(len(order), fractions)
    tiles_raw = pd.read_csv(root / TILES_FILE, dtype=str, keep_default_na=False)
    consensus_raw = pd.read_csv(root / CONSENSUS_FILE, dtype=str, keep_default_na=False)
    log(f"learning curve: held-out images {', '.join(holdout)}; training on {sizes} of {len(order)} images")
    points = []
    with tempfile.TemporaryDirectory(prefix="frostvane-curve-") as tmp:
        for k in sizes:
            chosen = sorted(order[:k])
            subset = Path(tmp) / f"subset_{k}"
            _write_subset(root, tiles_raw, consensus_raw, chosen + list(holdout), subset)
            config = TrainConfig(seed=seed, holdout_images=tuple(holdout), rotations=(0,), max_patches=max_patches,
                                 max_iter=max_iter)
            card = train_model(subset, Path(tmp) / f"model_{k}", config, force=True, log=lambda *_: None)
            metrics = card["heldout_metrics"]
            n_tiles = int(sum(card["training"]["tiles"][g] for g in ("fit", "calibration")))
            errors = {
                "fan_f1": None if metrics.get("fan_f1") is None else 1.0 - float(metrics["fan_f1"]),
                "spot_f1": None if metrics.get("spot_f1") is None else 1.0 - float(metrics["spot_f1"]),
                "fan_direction_median_deg": metrics.get("fan_direction_median_deg"),
            }
            points.append({"images": chosen, "n_images": k, "n_tiles": n_tiles,
                           "fan_f1": metrics.get("fan_f1"), "spot_f1": metrics.get("spot_f1"),
                           "fan_direction_median_deg": metrics.get("fan_direction_median_deg"),
                           "errors": errors, "seconds": card["training"].get("seconds")})
            log(f"  {k} images ({n_tiles} tiles): fan F1 {_fmt(metrics.get('fan_f1'))}, "
                f"spot F1 {_fmt(metrics.get('spot_f1'))}, fan direction median "
                f"{_fmt(metrics.get('fan_direction_median_deg'), 1)} deg")
    n = np.array([p["n_tiles"] for p in points], dtype=np.float64)
    fits = {}
    for metric in LEARNING_CURVE_TARGETS:
        e = np.array([np.nan if p["errors"][metric] is None else p["errors"][metric] for p in points])
        c_max = 1.0 if metric != "fan_direction_median_deg" else None
        fits[metric] = fit_power_law(n, e, c_max=c_max)
    curve = _jsonable({
        "tileset": str(root),
        "seed": seed,
        "holdout_images": list(holdout),
        "x": "consensus tiles in the training images (fit + calibration)",
        "law": "error(n) = a * n^-b + c (c = 0 with fewer than 4 points)",
        "train_config": {"rotations": [0], "max_patches": max_patches, "max_iter": max_iter},
        "points": points,
        "fits": fits,
    })
    curve["targets"] = _jsonable(_curve_verdicts(points, fits))
    if out is not None:
        out = Path(out)
        write_json(out / "learning_curve.json", curve, indent=1)
        _plot_learning_curve(curve, out / "learning_curve.png")
    return curve


def _fmt(value, digits=2):
    return "n/a" if value is None or not np.isfinite(value) else f"{value:.{digits}f}"


def learning_curve_summary(curve):
    """Text summary of :func:`learning_curve`."""
    lines = [f"learning curve on {curve['tileset']} (held out: {', '.join(curve['holdout_images'])})"]
    for p in curve["points"]:
        lines.append(f"  {p['n_tiles']:>5} tiles ({p['n_images']} images): fan F1 {_fmt(p['fan_f1'])}, "
                     f"spot F1 {_fmt(p['spot_f1'])}, direction median {_fmt(p['fan_direction_median_deg'], 1)} deg")
    for entry in curve["targets"].values():
        fit = entry.get("fit")
        law = f" [fit a={fit['a']:.3g}, b={fit['b']:.3g}, c={fit['c']:.3g}]" if fit else ""
        lines.append(f"  {entry['verdict']}{law}")
    return "\n".join(lines)


def _plot_learning_curve(curve, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    points = curve["points"]
    n = np.array([p["n_tiles"] for p in points], dtype=np.float64)
    reach = [e["n_tiles_needed"] for e in curve["targets"].values() if e.get("n_tiles_needed")]
    n_hi = max([n.max() * 10.0] + [min(r * 1.5, n.max() * 1000.0) for r in reach])
    grid = np.geomspace(max(n.min() * 0.8, 1.0), n_hi, 200)
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.2))
    panels = ((axes[0], ("fan_f1", "spot_f1"), "held-out error (1 - F1)"),
              (axes[1], ("fan_direction_median_deg",), "median fan direction error (deg)"))
    colours = {"fan_f1": "tab:orange", "spot_f1": "tab:blue", "fan_direction_median_deg": "tab:green"}
    for ax, metrics, ylabel in panels:
        for metric in metrics:
            target = curve["targets"][metric]
            e = np.array([np.nan if p["errors"][metric] is None else p["errors"][metric] for p in points])
            ax.plot(n, e, "o", color=colours[metric], label=f"{target['error']} (measured)")
            fit = curve["fits"].get(metric)
            if fit:
                ax.plot(grid, power_law(grid, fit["a"], fit["b"], fit["c"]), "-", color=colours[metric],
                        label=f"fit a={fit['a']:.2g} b={fit['b']:.2g} c={fit['c']:.2g}")
        targets = sorted({curve["targets"][m]["target_error"] for m in metrics})
        for value in targets:
            names = " and ".join(curve["targets"][m]["target"] for m in metrics
                                 if curve["targets"][m]["target_error"] == value)
            ax.axhline(value, color="black", ls="--", lw=1, label=f"target: {names}")
        # a panel with no finite measurement (no matched fan in a tiny run) still needs x limits to log-scale
        ax.set_xlim(grid[0], grid[-1])
        ax.set_xscale("log")
        ax.set_xlabel("consensus tiles used for training")
        ax.set_ylabel(ylabel)
        ax.set_ylim(bottom=0)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=7)
    held = curve["holdout_images"]
    named = ", ".join(held) if len(held) <= 4 else f"{len(held)} images, {', '.join(held[:3])}, ..."
    fig.suptitle(f"Learning curve (held out: {named})", fontsize=10)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
