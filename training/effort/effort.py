"""Route screened tiles (skip / machine / crowd) and estimate the volunteer effort left.

Every threshold is set on the held-out tiles of the model card
(``card["heldout_tiles"]``: images the model never saw in fitting or
calibration), and every route states a promise that is measured there:

* **unfamiliar** - tiles whose unfamiliarity exceeds the value that
  ``pass_share`` (default 95 %) of the held-out tiles do not exceed go to the
  crowd, whatever their scores;
* **skip** - tiles whose deposit probability is below the largest threshold
  that keeps ``recall`` (default 98 %) of the held-out consensus deposit *area*
  in tiles that are not skipped. Promise: deposit area lost <= 1 - recall;
* **machine** - familiar tiles with detections whose confidence (the mean
  detection score) reaches the smallest threshold at which the held-out tiles
  above it have an object F1, pooled over those tiles (``2 * matched /
  (detections + consensus features)``), of at least ``min_f1`` (default 0.8)
  and a median per-tile fan direction error of at most ``max_direction_error``
  (default 20 degrees), over at least ``min_tiles`` tiles;
* **crowd** - everything else.

The measured values come with a percentile bootstrap over held-out *images*
(tiles of one image are not independent): each resample re-derives the
thresholds and measures the promises on the images it left out, as on new
images. The same resamples re-route the screened tiles, which gives the
interval of the classifications left.

The effort left is what the routed tiles still need: ``max(needed - have, 0)``
classifications per crowd tile (:mod:`training.effort.campaign`).
"""

import json
from pathlib import Path

import numpy as np
import pandas as pd

from detector.errors import DetectorError
from detector.io import atomic_path, write_json
from detector.inference.unfamiliar import DEFAULT_PASS_SHARE, FEATURE_GROUPS, SHARE_COLUMNS, pass_threshold

from .._json import jsonable as _jsonable
from .campaign import DEFAULT_CLASSIFICATIONS_NEEDED, Campaign, date_range, days_for, read_classifications, remaining_classifications
from .presence import presence_coefficients, presence_probability

__all__ = [
    "ROUTES",
    "DEFAULT_RECALL",
    "DEFAULT_MIN_F1",
    "DEFAULT_MAX_DIRECTION_ERROR",
    "DEFAULT_MIN_TILES",
    "ScreenModelMismatch",
    "skip_threshold",
    "machine_threshold",
    "pooled_f1",
    "tile_confidence",
    "route_tiles",
    "tile_detection_summary",
    "unfamiliar_groups_text",
    "deposit_probability",
    "estimate_effort",
    "effort_summary",
    "check_screen_model",
    "run_effort",
    "write_next_tiles",
    "write_effort_outputs",
]

ROUTES = ("skip", "machine", "crowd", "nodata")

DEFAULT_RECALL = 0.98
DEFAULT_MIN_F1 = 0.8
DEFAULT_MAX_DIRECTION_ERROR = 20.0
DEFAULT_MIN_TILES = 5

#: Machine promises reported side by side, so a campaign sees what each would hand to the machine.
PROMISE_GRID = (0.6, 0.7, 0.8, 0.9)

_SCREEN_REQUIRED = ("tile_id", "image", "p_deposit", "unfamiliarity", "route")
_HELDOUT_REQUIRED = ("tile_id", "p_deposit", "consensus_px", "n_consensus", "n_detections", "f1",
                     "fan_error_median_deg", "mean_score", "unfamiliarity")
_MAX_CANDIDATES = 100
_CODE = {name: code for code, name in enumerate(ROUTES)}


class ScreenModelMismatch(DetectorError, ValueError):
    """A screening folder was made by another model than the one given to ``effort``."""


# --------------------------------------------------------------------------- thresholds


def skip_threshold(p_deposit, area_px, *, recall=DEFAULT_RECALL):
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


def tile_confidence(mean_score):
    """Confidence of a tile's detections: their mean score (0 without detections).

    On the shipped model's held-out tiles the mean score ranks the per-tile
    object F1 best of the per-tile figures we have (Spearman 0.70; the number
    of detections 0.48, the deposit probability 0.50, the mean direction
    confidence 0.21, a leave-one-image-out linear fit of them all 0.68), so it
    is used alone; the direction promise is checked separately on the routed tiles.

    Parameters
    ----------
    mean_score : ndarray of shape (n,)

    Returns
    -------
    confidence : ndarray of shape (n,), in [0, 1]
    """
    return np.nan_to_num(np.asarray(mean_score, dtype=np.float64), nan=0.0)


def pooled_f1(n_matched, n_detections, n_consensus):
    """Object F1 of a set of tiles: ``2 * sum(matched) / sum(detections + consensus features)``.

    Returns NaN for a set with neither detections nor consensus features.
    """
    den = float(np.sum(n_detections) + np.sum(n_consensus))
    return 2.0 * float(np.sum(n_matched)) / den if den > 0 else float("nan")


def _candidate_grid(conf):
    values = np.unique(conf[np.isfinite(conf)])
    if len(values) > _MAX_CANDIDATES:
        values = np.unique(np.quantile(values, np.linspace(0.0, 1.0, _MAX_CANDIDATES)))
    return values


def machine_threshold(confidence, n_matched, n_detections, n_consensus, fan_error_deg, *, min_f1=DEFAULT_MIN_F1,
                      max_direction_error=DEFAULT_MAX_DIRECTION_ERROR, min_tiles=DEFAULT_MIN_TILES, candidates=None):
    """Smallest confidence above which held-out tiles keep the machine route's promise.

    For each candidate threshold ``c`` the held-out tiles with confidence >= ``c``
    must number at least ``min_tiles``, have a pooled object F1
    (:func:`pooled_f1`) >= ``min_f1`` and a median (over the tiles with matched
    fans) of the per-tile median fan direction error <= ``max_direction_error``;
    a set without any matched fan cannot show its directions are right and does
    not qualify. The smallest qualifying ``c`` hands the most tiles to the machine.

    Parameters
    ----------
    confidence : ndarray of shape (n,)
        Tile confidence (:func:`tile_confidence`) of held-out tiles with detections.
    n_matched, n_detections, n_consensus : ndarray of shape (n,)
        Matched objects, detections and consensus features per tile.
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
    tp = np.asarray(n_matched, dtype=np.float64)
    den = np.asarray(n_detections, dtype=np.float64) + np.asarray(n_consensus, dtype=np.float64)
    err = np.asarray(fan_error_deg, dtype=np.float64)
    cand = _candidate_grid(conf) if candidates is None else np.sort(np.asarray(candidates, dtype=np.float64))
    if len(conf) == 0 or len(cand) == 0:
        return None
    inside = conf[None, :] >= cand[:, None]  # (n_candidates, n_tiles)
    count = inside.sum(axis=1)
    with np.errstate(all="ignore"), _quiet_nanmedian():
        f1 = 2.0 * (inside @ tp) / (inside @ den)
        med_err = np.nanmedian(np.where(inside, err[None, :], np.nan), axis=1)
    ok = (count >= min_tiles) & (f1 >= min_f1) & np.isfinite(med_err) & (med_err <= max_direction_error)
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
    out["image_id"] = frame["image_id"].astype(str) if "image_id" in frame.columns else out["tile_id"]
    for column in _HELDOUT_REQUIRED[1:]:
        out[column] = pd.to_numeric(frame[column], errors="coerce").astype(np.float64)
    for column in ("consensus_px", "n_consensus", "n_detections"):
        out[column] = out[column].fillna(0.0)
    # The card keeps each tile's F1 = 2 tp / (detections + consensus); tp is a whole count.
    den = out["n_detections"] + out["n_consensus"]
    out["n_matched"] = np.where(den > 0, np.round(out["f1"].fillna(0.0) * den / 2.0), 0.0)
    out["confidence"] = tile_confidence(out["mean_score"])
    return out


def _columns(held):
    return {c: np.asarray(held[c]) for c in ("image_id", "p_deposit", "consensus_px", "n_consensus", "n_detections",
                                             "n_matched", "confidence", "fan_error_median_deg", "unfamiliarity")}


def _unfamiliar_cut(unfamiliarity, pass_share):
    cut = pass_threshold(unfamiliarity, pass_share)
    # Without stored statistics every score is NaN: nothing can be called unfamiliar.
    return np.inf if not np.isfinite(cut) else cut


def _thresholds(col, *, recall, min_f1, max_direction_error, min_tiles, pass_share, candidates=None):
    """Skip, machine and unfamiliarity thresholds from held-out columns (or a resample of them)."""
    cut = _unfamiliar_cut(col["unfamiliarity"], pass_share)
    skip = skip_threshold(col["p_deposit"], col["consensus_px"], recall=recall)
    eligible = _machine_eligible(col, cut) & ~(col["p_deposit"] < skip)
    machine = machine_threshold(col["confidence"][eligible], col["n_matched"][eligible],
                                col["n_detections"][eligible], col["n_consensus"][eligible],
                                col["fan_error_median_deg"][eligible], min_f1=min_f1,
                                max_direction_error=max_direction_error, min_tiles=min_tiles, candidates=candidates)
    return skip, machine, cut


def _machine_eligible(col, cut):
    # The machine route only ever sees familiar tiles with detections, so it is judged on those.
    return (col["n_detections"] > 0) & ~(col["unfamiliarity"] > cut) & np.isfinite(col["p_deposit"])


def _held_routes(col, skip, machine, cut):
    """Route codes of held-out tiles under some thresholds (as :func:`_route_codes` routes screened tiles)."""
    nodata = np.zeros(len(col["p_deposit"]), dtype=bool)
    code, _ = _route_codes(nodata, col["p_deposit"], col["unfamiliarity"], col["confidence"],
                           col["n_detections"] > 0, skip, machine, cut)
    return code


def _measure(col, code, subset=None):
    """Promises measured on held-out tiles: area lost by skipping, machine F1, direction error, share."""
    keep = np.ones(len(code), dtype=bool) if subset is None else subset
    area = col["consensus_px"].astype(np.float64)
    deposit = area > 0
    total = area[keep].sum()
    machine = keep & (code == _CODE["machine"])
    with _quiet_nanmedian():
        err = float(np.nanmedian(col["fan_error_median_deg"][machine])) if machine.any() else np.nan
    n_dep = int((keep & deposit).sum())
    return {
        "missed_deposit_share": float(area[keep & (code == _CODE["skip"])].sum() / total) if total > 0 else np.nan,
        "machine_tiles": int(machine.sum()),
        "machine_f1": pooled_f1(col["n_matched"][machine], col["n_detections"][machine], col["n_consensus"][machine])
        if machine.any() else np.nan,
        "machine_direction_median_deg": err,
        "machine_deposit_share": float((machine & deposit).sum() / n_dep) if n_dep else np.nan,
        "crowd_deposit_share": float((keep & deposit & (code == _CODE["crowd"])).sum() / n_dep) if n_dep else np.nan,
    }


# --------------------------------------------------------------------------- routing


def tile_detection_summary(detections):
    """Per-tile mean and best score, mean direction confidence and detection count of a detections table.

    Parameters
    ----------
    detections : DataFrame
        ``tile_id``, ``kind``, ``score``, ``direction_confidence`` (the screen's detections.csv).

    Returns
    -------
    summary : DataFrame indexed by tile_id
        ``mean_score``, ``max_score``, ``mean_direction_confidence`` (NaN for
        tiles without fans), ``n_detections``.
    """
    det = detections.copy()
    det["score"] = pd.to_numeric(det["score"], errors="coerce")
    det["direction_confidence"] = pd.to_numeric(det["direction_confidence"], errors="coerce")
    det["is_fan"] = det["kind"].astype(str).eq("fan")
    grouped = det.groupby(det["tile_id"].astype(str))
    summary = pd.DataFrame({
        "mean_score": grouped["score"].mean(),
        "max_score": grouped["score"].max(),
        "mean_direction_confidence": grouped["direction_confidence"].mean(),
        "n_detections": grouped.size(),
    })
    any_fan = grouped["is_fan"].any()
    summary.loc[~any_fan, "mean_direction_confidence"] = np.nan
    return summary


def _screen_arrays(screen):
    """Per-tile arrays of a screen table: no data, p_deposit, unfamiliarity, confidence, detections."""
    nodata = screen["route"].fillna("").astype(str).str.strip().eq("nodata").to_numpy()
    p = pd.to_numeric(screen["p_deposit"], errors="coerce").to_numpy(np.float64)
    unf = pd.to_numeric(screen["unfamiliarity"], errors="coerce").to_numpy(np.float64)
    if "mean_score" in screen.columns:
        conf = tile_confidence(pd.to_numeric(screen["mean_score"], errors="coerce"))
        n_det = pd.to_numeric(screen.get("n_detections", pd.Series(np.ones(len(screen)))), errors="coerce")
        n_det = n_det.fillna(0).to_numpy(np.int64)
    else:
        conf = np.zeros(len(screen))
        n_det = np.zeros(len(screen), dtype=np.int64)
    return nodata, p, unf, conf, n_det


def _route_codes(nodata, p, unf, conf, has_det, skip, machine, cut):
    """Route codes (indices into :data:`ROUTES`) and the unfamiliar mask.

    A tile without a p_deposit is neither skipped nor trusted to the machine.
    """
    unfamiliar = (unf > cut) & ~nodata
    skip_mask = (p < skip) & ~unfamiliar & ~nodata
    threshold = np.inf if machine is None else machine
    machine_mask = ~skip_mask & ~unfamiliar & ~nodata & np.isfinite(p) & has_det & (conf >= threshold)
    code = np.full(len(p), _CODE["crowd"], dtype=np.int8)
    code[skip_mask] = _CODE["skip"]
    code[machine_mask] = _CODE["machine"]
    code[nodata] = _CODE["nodata"]
    return code, unfamiliar


#: A feature group is named in an unfamiliar tile's reason from this share of its squared distance up.
REASON_MIN_SHARE = 0.10


def unfamiliar_groups_text(score, shares, cut):
    """Which feature groups put a tile over the unfamiliarity cut, in words.

    Groups with at least :data:`REASON_MIN_SHARE` of the squared distance are
    named, largest first, each with the score the tile would have without its
    part (``score * sqrt(1 - share)``, :func:`detector.inference.unfamiliar.unfamiliarity_parts`);
    the text ends by naming the groups whose removal alone brings the tile
    within the cut, or saying that none does.

    Parameters
    ----------
    score : float
        The tile's unfamiliarity score.
    shares : ndarray of shape (len(UNFAMILIARITY_GROUPS),)
        Each group's share of the squared distance; NaN when not recorded.
    cut : float

    Returns
    -------
    text : str
    """
    shares = np.asarray(shares, dtype=np.float64)
    if not np.isfinite(shares).all():
        return "its feature groups were not recorded (screen again with this version to see them)"
    labels = [label for _, label, _ in FEATURE_GROUPS]
    order = [g for g in np.argsort(-shares, kind="stable") if shares[g] >= REASON_MIN_SHARE]
    without = score * np.sqrt(np.clip(1.0 - shares, 0.0, None))
    parts = ", ".join(f"{labels[g]} {shares[g]:.0%} ({without[g]:.2f} without it)" for g in order)
    alone = [labels[g] for g in order if without[g] <= cut]
    tail = (f"without {' or '.join(alone)} alone it would pass" if alone
            else "no single group's removal brings it within the cut")
    return f"share of its squared distance from the training tiles: {parts}; {tail}"


def _reasons(code, p, unf, conf, n_det, max_score, *, skip, machine, cut, recall, pass_share, shares=None):
    """One sentence per tile saying why it took its route."""
    machine_text = ("no confidence threshold keeps the machine's promise on the held-out tiles" if machine is None
                    else f"below the machine's {machine:.3f}")
    if shares is None:
        shares = np.full((len(code), len(FEATURE_GROUPS)), np.nan)
    out = []
    for c, pi, ui, ci, ni, mi, si in zip(code, p, unf, conf, n_det, max_score, shares):
        if c == _CODE["nodata"]:
            out.append("nodata: under half of the tile's core holds valid pixels")
        elif np.isfinite(ui) and ui > cut:
            out.append(f"crowd, unfamiliar: unfamiliarity {ui:.2f} above {cut:.2f}, the value "
                       f"{pass_share:.0%} of held-out tiles stay within; {unfamiliar_groups_text(ui, si, cut)}")
        elif c == _CODE["skip"]:
            text = f"skip: p_deposit {pi:.3f} below {skip:.3f}, set to keep {recall:.0%} of held-out deposit area"
            if ni > 0:
                text += (f"; its {ni} detection(s) (best score {mi:.2f}) are not checked: held-out tiles this "
                         f"unlikely hold too little deposit area to change the promise")
            out.append(text)
        elif c == _CODE["machine"]:
            out.append(f"machine: {ni} detection(s), mean score {ci:.3f} >= {machine:.3f}")
        elif not np.isfinite(pi):
            out.append("crowd: no deposit probability")
        elif ni > 0:
            out.append(f"crowd: {ni} detection(s), mean score {ci:.3f} {machine_text}")
        else:
            out.append(f"crowd: p_deposit {pi:.3f} at or above {skip:.3f} but no detection")
    return out


def route_tiles(screen_tiles_df, card, *, recall=DEFAULT_RECALL, max_direction_error=DEFAULT_MAX_DIRECTION_ERROR,
                min_f1=DEFAULT_MIN_F1, min_tiles=DEFAULT_MIN_TILES, pass_share=DEFAULT_PASS_SHARE, detections=None):
    """Route screened tiles to skip, machine, crowd or nodata, each with its reason.

    Parameters
    ----------
    screen_tiles_df : DataFrame
        The screen's tiles.csv: ``tile_id``, ``image``, ``p_deposit``,
        ``unfamiliarity``, ``route`` ("nodata" or empty), and per-tile
        ``mean_score``, ``n_detections`` (or pass ``detections``). Without
        detection scores no tile goes to machine.
    card : dict
        Model card with ``heldout_tiles``.
    recall : float, default=0.98
        Share of held-out deposit area that must lie in tiles not skipped, in (0, 1].
    max_direction_error : float, default=20.0
        Largest median fan direction error of machine tiles, degrees.
    min_f1 : float, default=0.8
        Smallest pooled object F1 of machine tiles.
    min_tiles : int, default=5
        Held-out tiles needed above a confidence threshold to trust it.
    pass_share : float, default=0.95
        Share of held-out tiles that pass the unfamiliarity check.
    detections : DataFrame, optional
        The screen's detections.csv; gives the per-tile confidence.

    Returns
    -------
    routed : DataFrame
        A copy of the input with ``route`` in {skip, machine, crowd, nodata},
        ``reason`` (one sentence), ``unfamiliar`` (bool), ``confidence`` and
        ``n_detections``. ``routed.attrs["thresholds"]`` holds the thresholds,
        the promises and their values measured on the held-out tiles.

    Raises
    ------
    DetectorError
        Bad settings, missing columns or a card without held-out tiles.
    """
    _check_settings(recall=recall, min_f1=min_f1, pass_share=pass_share, min_tiles=min_tiles)
    missing = [c for c in _SCREEN_REQUIRED if c not in screen_tiles_df.columns]
    if missing:
        raise DetectorError(f"screen tiles table lacks the column(s) {missing!r} (has {list(screen_tiles_df.columns)!r}).")
    held = _heldout_frame(card)
    col = _columns(held)
    screen = screen_tiles_df.copy()
    if detections is not None:
        summary = tile_detection_summary(detections)
        keyed = summary.reindex(screen["tile_id"].astype(str))
        screen["mean_score"] = keyed["mean_score"].fillna(0.0).to_numpy()
        screen["max_score"] = keyed["max_score"].to_numpy()
        screen["n_detections"] = keyed["n_detections"].fillna(0).astype(int).to_numpy()
    skip, machine, cut = _thresholds(col, recall=recall, min_f1=min_f1, max_direction_error=max_direction_error,
                                     min_tiles=min_tiles, pass_share=pass_share)
    nodata, p, unf, conf, n_det = _screen_arrays(screen)
    code, unfamiliar = _route_codes(nodata, p, unf, conf, n_det > 0, skip, machine, cut)
    max_score = pd.to_numeric(screen["max_score"], errors="coerce").to_numpy(np.float64) \
        if "max_score" in screen.columns else conf
    screen["route"] = np.asarray(ROUTES, dtype=object)[code]
    shares = screen.reindex(columns=list(SHARE_COLUMNS)).apply(pd.to_numeric, errors="coerce").to_numpy(np.float64)
    screen["reason"] = _reasons(code, p, unf, conf, n_det, max_score, skip=skip, machine=machine, cut=cut,
                                recall=recall, pass_share=pass_share, shares=shares)
    screen["unfamiliar"] = unfamiliar
    screen["confidence"] = conf
    screen["n_detections"] = n_det
    measured = _measure(col, _held_routes(col, skip, machine, cut))
    screen.attrs["thresholds"] = _threshold_notes(
        held, col, skip, machine, cut, measured, recall=recall, min_f1=min_f1,
        max_direction_error=max_direction_error, min_tiles=min_tiles, pass_share=pass_share,
        has_scores="mean_score" in screen.columns)
    return screen


def _promise_grid(col, *, recall, max_direction_error, min_tiles, pass_share):
    """What the machine would take, and keep, under other F1 promises (held-out, in sample)."""
    rows = []
    for min_f1 in PROMISE_GRID:
        skip, machine, cut = _thresholds(col, recall=recall, min_f1=min_f1, max_direction_error=max_direction_error,
                                         min_tiles=min_tiles, pass_share=pass_share)
        m = _measure(col, _held_routes(col, skip, machine, cut))
        rows.append({"min_f1": min_f1, "machine_confidence": machine, "machine_tiles": m["machine_tiles"],
                     "machine_deposit_share": m["machine_deposit_share"], "machine_f1": m["machine_f1"],
                     "machine_direction_median_deg": m["machine_direction_median_deg"]})
    return rows


def _threshold_notes(held, col, skip, machine, cut, measured, *, recall, min_f1, max_direction_error, min_tiles,
                     pass_share, has_scores):
    deposit_tiles = int((held["consensus_px"] > 0).sum())
    if deposit_tiles == 0:
        skip_note = "the held-out tiles hold no consensus deposits, so no recall can be measured: nothing is skipped"
    else:
        skip_note = (f"tiles with p_deposit below {skip:.4f} are skipped (ties kept); promise: at most "
                     f"{1 - recall:.0%} of the deposit area is lost (held-out: {measured['missed_deposit_share']:.2%} "
                     f"of the area of {deposit_tiles} deposit tiles)")
    promise = (f"pooled object F1 >= {min_f1:g} and median fan direction error <= {max_direction_error:g} deg "
               f"over >= {min_tiles} held-out tiles")
    if machine is None:
        machine_note = f"no confidence threshold keeps the promise ({promise}): no tile is routed to machine"
    elif not has_scores:
        machine_note = "the screen gave no detection scores: no tile is routed to machine"
    else:
        machine_note = (f"tiles with detections and mean score >= {machine:.4f} go to the machine; promise: {promise} "
                        f"(held-out: F1 {measured['machine_f1']:.3f}, direction {measured['machine_direction_median_deg']:.1f} "
                        f"deg on {measured['machine_tiles']} tiles, {measured['machine_deposit_share']:.0%} of the "
                        f"deposit tiles)")
    return {
        "skip_p_deposit": skip,
        "skip_note": skip_note,
        "machine_confidence": machine,
        "machine_note": machine_note,
        "machine_promise": promise,
        "unfamiliar_cut": None if not np.isfinite(cut) else float(cut),
        "unfamiliar_note": (f"tiles with unfamiliarity above {cut:.3f} go to the crowd; {pass_share:.0%} of the "
                            f"held-out tiles stay within it" if np.isfinite(cut)
                            else "the model stores no unfamiliarity statistics: no tile is flagged unfamiliar"),
        "pass_share": pass_share,
        "recall": recall,
        "min_f1": min_f1,
        "max_direction_error_deg": max_direction_error,
        "min_tiles": min_tiles,
        "confidence": "mean detection score of the tile",
        "measured_heldout": measured,
        "promise_grid": _promise_grid(col, recall=recall, max_direction_error=max_direction_error,
                                      min_tiles=min_tiles, pass_share=pass_share),
    }


def _check_settings(*, recall, min_f1=DEFAULT_MIN_F1, pass_share=DEFAULT_PASS_SHARE, min_tiles=DEFAULT_MIN_TILES,
                    max_direction_error=DEFAULT_MAX_DIRECTION_ERROR):
    _check_recall(recall)
    if not (isinstance(max_direction_error, (int, float)) and 0.0 < max_direction_error <= 180.0):
        raise DetectorError(f"max direction error must be in (0, 180] degrees; got {max_direction_error!r}.")
    if not (isinstance(min_f1, (int, float)) and 0.0 < min_f1 <= 1.0):
        raise DetectorError(f"min_f1 must be in (0, 1]; got {min_f1!r}.")
    if not (isinstance(pass_share, (int, float)) and 0.0 < pass_share <= 1.0):
        raise DetectorError(f"pass share must be in (0, 1]; got {pass_share!r}.")
    if not (isinstance(min_tiles, (int, np.integer)) and min_tiles >= 1):
        raise DetectorError(f"min_tiles must be a whole number >= 1; got {min_tiles!r}.")


def _check_recall(recall):
    if not (isinstance(recall, (int, float)) and 0.0 < recall <= 1.0):
        raise DetectorError(f"recall must be in (0, 1]; got {recall!r}.")


# --------------------------------------------------------------------------- effort


def deposit_probability(heldout_p, heldout_has_deposit, p):
    """Probability that a tile holds consensus deposits, given its p_deposit, learned on held-out tiles.

    A logistic regression of the held-out tiles' 0/1 deposit indicator on
    ``logit(p_deposit)`` with Firth's penalty, held non-decreasing
    (:mod:`training.effort.presence`, where the choice over the isotonic fit used
    before is measured).

    Parameters
    ----------
    heldout_p : ndarray of shape (m,)
    heldout_has_deposit : ndarray of shape (m,), bool
    p : ndarray of shape (n,)
        Deposit probabilities to read the fit at; NaN gives 1 (unknown tiles are
        counted as needing people).

    Returns
    -------
    q : ndarray of shape (n,), in (0, 1]
    """
    return presence_probability(presence_coefficients(heldout_p, heldout_has_deposit), p)


def _aligned_have(routed_df, have):
    if have is None:
        return np.zeros(len(routed_df), dtype=np.int64)
    keyed = pd.Series(have).reindex(routed_df["tile_id"].astype(str).to_numpy())
    return keyed.fillna(0).to_numpy(np.int64)


def _needed_weights(q, code, unfamiliar):
    """Per-tile probability that the tile truly needs people: deposits there, and not the machine's."""
    w = q.copy()
    w[unfamiliar] = 1.0  # the p_deposit of an unfamiliar tile is not to be trusted
    w[code == _CODE["machine"]] = 0.0
    w[code == _CODE["nodata"]] = 0.0
    return w


def estimate_effort(routed_df, card, *, campaign=None, have=None, seed=0, n_boot=1000):
    """Volunteer effort left after routing, with bootstrap intervals over held-out images.

    Parameters
    ----------
    routed_df : DataFrame
        Output of :func:`route_tiles` (its ``attrs["thresholds"]`` give the
        settings re-used by the bootstrap).
    card : dict
        Model card with ``heldout_tiles``.
    campaign : Campaign, optional
        Classifications needed per tile, seconds per classification, throughput.
    have : Series of int indexed by tile_id, optional
        Classifications each tile already has; tiles it does not list have none.
    seed : int, default=0
    n_boot : int, default=1000
        Bootstrap replicates: the held-out images are resampled with
        replacement, the thresholds re-derived, the screened tiles re-routed and
        the promises measured on the images each resample left out.

    Returns
    -------
    effort : dict
        JSON-ready. ``classifications`` (what the crowd tiles still need),
        ``hours``, ``by_route`` (what each route's tiles would still need, so the
        classifications the skip and machine routes save), ``expected_needed``
        (classifications on tiles that truly need people, estimated through the
        probability that each tile holds deposits, with a 90 % prediction
        interval that also draws each tile's presence; see
        :func:`_bootstrap`), ``days`` and ``dates`` with throughput,
        ``interval_90``, ``machine`` (measured on held-out tiles, with
        ``spread``: the out-of-bag interval, or the range over the images
        when fewer than five held-out images carry machine tiles) and
        ``missed_deposit_share``, ``thresholds``, ``campaign``, ``assumptions``.
    """
    campaign = Campaign() if campaign is None else campaign
    if isinstance(n_boot, bool) or not isinstance(n_boot, (int, np.integer)) or n_boot < 1:
        raise DetectorError(f"bootstrap replicates must be a whole number >= 1; got {n_boot!r}.")
    notes = dict(routed_df.attrs.get("thresholds", {}))
    settings = {"recall": notes.get("recall", DEFAULT_RECALL), "min_f1": notes.get("min_f1", DEFAULT_MIN_F1),
                "max_direction_error": notes.get("max_direction_error_deg", DEFAULT_MAX_DIRECTION_ERROR),
                "min_tiles": notes.get("min_tiles", DEFAULT_MIN_TILES),
                "pass_share": notes.get("pass_share", DEFAULT_PASS_SHARE)}
    _check_settings(**settings)
    held = _heldout_frame(card)
    col = _columns(held)
    skip, machine, cut = _thresholds(col, **settings)

    route = routed_df["route"].astype(str).to_numpy()
    code = np.array([_CODE.get(r, _CODE["crowd"]) for r in route], dtype=np.int8)
    nodata, p, unf, conf, n_det = _screen_arrays(routed_df)
    if "confidence" in routed_df.columns:
        conf = routed_df["confidence"].to_numpy(np.float64)
    unfamiliar = (unf > cut) & ~nodata
    need = int(campaign.classifications_needed)
    have_arr = _aligned_have(routed_df, have)
    rem = remaining_classifications(have_arr, need)
    rem[nodata] = 0
    by_route = {r: int(rem[code == _CODE[r]].sum()) for r in ("skip", "machine", "crowd")}
    workload = by_route["crowd"]
    deposit = col["consensus_px"] > 0
    q = deposit_probability(col["p_deposit"], deposit, p)
    needed = float(np.sum(rem * _needed_weights(q, code, unfamiliar)))
    skipped = code == _CODE["skip"]
    boot = _bootstrap(col, (nodata, p, unf, conf, n_det > 0), rem, settings, skipped=skipped, seed=seed,
                      n_boot=n_boot)
    per_hour = campaign.seconds / 3600.0
    held_code = _held_routes(col, skip, machine, cut)
    measured = _measure(col, held_code)

    def iv(values):
        v = np.asarray(values, dtype=np.float64)
        v = v[np.isfinite(v)]
        return [float(x) for x in np.percentile(v, [5.0, 95.0])] if len(v) else None

    work_iv = iv(boot["workload"])
    needed_iv = iv(boot["needed"])
    spread = _machine_spread(col, held_code, iv(boot["machine_f1"]), iv(boot["machine_direction_median_deg"]))
    per_day = campaign.classifications_per_day
    days = days_for(workload, per_day)
    days_iv = None if per_day is None else [days_for(v, per_day) for v in work_iv]
    dates = None if per_day is None else list(date_range(days_iv[0], days_iv[1], campaign.start_date))
    active = ~nodata
    with_det = active & (n_det > 0)
    effort = {
        "campaign": campaign.describe(),
        "tiles": {"total": int(len(routed_df)), **{r: int(np.sum(code == _CODE[r])) for r in ROUTES},
                  "unfamiliar": int(np.sum(unfamiliar)), "finished": int(np.sum(active & (rem == 0))),
                  "with_detections": int(with_det.sum()),
                  "skipped_with_detections": int(np.sum(with_det & (code == _CODE["skip"])))},
        "machine_share_of_tiles_with_detections": float(np.sum(with_det & (code == _CODE["machine"])) / with_det.sum())
        if with_det.any() else None,
        "classifications": workload,
        "hours": workload * per_hour,
        "by_route": {r: {"classifications": v, "hours": v * per_hour} for r, v in by_route.items()},
        "classifications_without_routing": int(rem[active].sum()),
        "hours_without_routing": float(rem[active].sum() * per_hour),
        "expected_needed": {
            "classifications": needed, "hours": needed * per_hour,
            "interval_90": needed_iv,
            "interval_90_calibration_only": iv(boot["needed_expected"]),
            "on_skipped_tiles": {"classifications": float(np.sum((rem * q)[skipped])),
                                 "interval_90": iv(boot["needed_skipped"])},
            "on_unfamiliar_tiles": int(rem[unfamiliar & (code == _CODE["crowd"])].sum()),
            "method": "sum over tiles of the classifications left times the probability that the tile holds "
                      "consensus deposits (logistic fit of held-out presence on logit(p_deposit), Firth's "
                      "penalty); unfamiliar tiles count in full, machine tiles not at all. 90% prediction "
                      "interval: parametric bootstrap, each resample of held-out images refits that probability "
                      "and re-routes the tiles, then draws every tile's presence from it",
        },
        "days": days,
        "dates": dates,
        "interval_90": {
            "classifications": work_iv,
            "hours": None if work_iv is None else [v * per_hour for v in work_iv],
            "days": days_iv,
            "missed_deposit_share": iv(boot["missed_deposit_share"]),
            "machine_f1": iv(boot["machine_f1"]),
            "machine_direction_median_deg": iv(boot["machine_direction_median_deg"]),
            "machine_deposit_share": iv(boot["machine_deposit_share"]),
            "resamples_with_machine_route": float(np.mean(np.isfinite(boot["machine"]))),
            "n_boot": int(n_boot),
            "seed": int(seed),
            "method": "percentile bootstrap over held-out images: thresholds re-derived and screened tiles "
                      "re-routed for each resample; promises measured on the images the resample left out",
        },
        "missed_deposit_share": measured["missed_deposit_share"],
        "machine": {**measured, "heldout_images": spread["images"], "spread": spread},
        "thresholds": {**notes, "skip_p_deposit": skip, "machine_confidence": machine,
                       "unfamiliar_cut": None if not np.isfinite(cut) else float(cut)},
        "heldout": {"tiles": int(len(held)), "images": int(len(np.unique(col["image_id"]))),
                    "deposit_tiles": int(deposit.sum()), "deposit_px": float(held["consensus_px"].sum())},
        "assumptions": [
            f"{need} classifications make a tile's consensus final"
            + (" (default: common practice retires a tile after about 20-30)" if need == DEFAULT_CLASSIFICATIONS_NEEDED
               else ""),
            f"{campaign.seconds:g} s per classification" + (" (assumed; use your campaign's figure)"
                                                           if campaign.seconds_assumed else ""),
            "tiles the campaign's classifications do not list have none yet" if have is not None
            else "no tile has any classification yet (no classifications given)",
            "machine and skip tiles need no volunteer classifications",
        ],
    }
    return _jsonable(effort)


def _machine_spread(col, held_code, f1_iv, direction_iv):
    """How far the machine's held-out promise can be trusted: an interval, or only a range of few images.

    The out-of-bag bootstrap interval needs at least
    :data:`training.evaluation.scoring.MIN_IMAGES_FOR_CI` held-out images carrying
    machine tiles; with fewer, the pooled F1 and median direction error of
    each such image are given as their range (min, max), which is no interval
    and says so.
    """
    from ..evaluation.scoring import MIN_IMAGES_FOR_CI

    machine = held_code == _CODE["machine"]
    images = np.unique(col["image_id"][machine])
    if len(images) == 0:
        return {"kind": "none", "images": 0, "f1": None, "direction_median_deg": None,
                "label": "no held-out tile reaches the machine route"}
    if len(images) >= MIN_IMAGES_FOR_CI:
        return {"kind": "interval", "images": int(len(images)), "f1": f1_iv, "direction_median_deg": direction_iv,
                "label": f"90% out-of-bag bootstrap interval over held-out images ({len(images)} images carry "
                         f"machine tiles)"}
    f1, err = [], []
    for image in images:
        tiles = machine & (col["image_id"] == image)
        f1.append(pooled_f1(col["n_matched"][tiles], col["n_detections"][tiles], col["n_consensus"][tiles]))
        with _quiet_nanmedian():
            err.append(float(np.nanmedian(col["fan_error_median_deg"][tiles])))

    def span(values):
        v = np.asarray(values, dtype=np.float64)
        v = v[np.isfinite(v)]
        return [float(v.min()), float(v.max())] if len(v) else None

    return {"kind": "range", "images": int(len(images)), "f1": span(f1), "direction_median_deg": span(err),
            "label": f"range over the {len(images)} held-out image(s) carrying machine tiles (fewer than "
                     f"{MIN_IMAGES_FOR_CI}: too few for an interval)"}


def _bootstrap(col, screen_arrays, rem, settings, *, skipped, seed, n_boot):
    """Workload, needed classifications and out-of-bag promises over resamples of held-out images.

    The classifications truly needed get a prediction interval by a parametric
    bootstrap (Davison and Hinkley, Bootstrap Methods and their Application,
    1997, chapter 6: resample the fit, then simulate the new outcome from the
    resampled fit; the chapter from memory). Each resample of held-out images
    (images, not tiles: the tiles of one image are not independent) refits the
    presence calibration and re-routes the screened tiles; then each screened
    tile holds deposits with its resampled probability, independently of the
    others. The second step is the variance a resample of the calibration alone
    leaves out: given the probabilities, which tiles truly hold deposits is
    still a sum of Bernoulli draws. Independence of tiles given their
    p_deposit was checked on the shipped model's held-out tiles: the
    presence residuals of tiles of one image are uncorrelated (one-way
    intraclass correlation -0.005 over 48 images of 4 tiles).

    Returns
    -------
    out : dict of ndarray of shape (n_boot,)
        ``workload``, ``needed`` (drawn presence), ``needed_expected``
        (expected value under the resampled calibration alone),
        ``needed_skipped`` (drawn presence on the tiles ``skipped`` marks),
        ``machine`` and the out-of-bag promises.
    """
    rng = np.random.default_rng(seed)
    # A separate stream for the presence draws: the resampled images stay those of ``seed``.
    presence_rng = np.random.default_rng([seed, 1])
    nodata, p, unf, conf, has_det = screen_arrays
    images, inverse = np.unique(col["image_id"], return_inverse=True)
    members = [np.flatnonzero(inverse == k) for k in range(len(images))]
    cut_all = _unfamiliar_cut(col["unfamiliarity"], settings["pass_share"])
    candidates = _candidate_grid(col["confidence"][_machine_eligible(col, cut_all)])
    keys = ("workload", "needed", "needed_expected", "needed_skipped", "machine", "missed_deposit_share",
            "machine_f1", "machine_direction_median_deg", "machine_deposit_share")
    out = {k: np.full(n_boot, np.nan) for k in keys}
    picks = rng.integers(0, len(images), size=(n_boot, len(images)))
    # Each resample's calibration at once: a tile counts as often as its image was drawn.
    drawn = np.stack([np.bincount(pick, minlength=len(images)) for pick in picks])[:, inverse]
    coefs = presence_coefficients(col["p_deposit"], col["consensus_px"] > 0, drawn)
    for b, pick in enumerate(picks):
        idx = np.concatenate([members[k] for k in pick])
        sample = {c: v[idx] for c, v in col.items()}
        skip, machine, cut = _thresholds(sample, candidates=candidates, **settings)
        code, unfamiliar = _route_codes(nodata, p, unf, conf, has_det, skip, machine, cut)
        out["workload"][b] = rem[code == _CODE["crowd"]].sum()
        q = presence_probability(None if coefs is None else coefs[b], p)
        w = _needed_weights(q, code, unfamiliar)
        u = presence_rng.random(len(p))
        out["needed_expected"][b] = np.sum(rem * w)
        out["needed"][b] = np.sum(rem[u < w])
        out["needed_skipped"][b] = np.sum(rem[skipped & (u < q)])
        out["machine"][b] = np.nan if machine is None else machine
        left_out = ~np.isin(np.arange(len(images)), pick)
        if left_out.any():
            m = _measure(col, _held_routes(col, skip, machine, cut), subset=left_out[inverse])
            for k in ("missed_deposit_share", "machine_f1", "machine_direction_median_deg", "machine_deposit_share"):
                out[k][b] = m[k]
    return out


def _fmt_iv(values, fmt="{:,.0f}"):
    return "n/a" if not values else f"{fmt.format(values[0])}-{fmt.format(values[1])}"


def effort_summary(effort):
    """One-screen text summary of :func:`estimate_effort`."""
    t = effort["tiles"]
    iv = effort["interval_90"]
    th = effort["thresholds"]
    c = effort["campaign"]
    m = effort["machine"]
    needed = effort["expected_needed"]
    lines = [
        f"tiles: {t['total']} screened - skip {t['skip']}, machine {t['machine']}, crowd {t['crowd']} "
        f"({t['unfamiliar']} unfamiliar), no data {t['nodata']}; {t['finished']} already have "
        f"{c['classifications_needed']} classifications",
        f"unfamiliar: {th.get('unfamiliar_note', '')}",
        f"skip: {th.get('skip_note', '')}" + (f"; {t['skipped_with_detections']} skipped tile(s) hold detections "
                                               f"(see routes.csv, reason)" if t["skipped_with_detections"] else ""),
        f"machine: {th.get('machine_note', '')}",
    ]
    spread = m.get("spread") or {}
    if m["machine_tiles"] and spread.get("kind") == "range":
        lines.append(f"  {spread['label']}: F1 {_fmt_iv(spread['f1'], '{:.2f}')}, direction "
                     f"{_fmt_iv(spread['direction_median_deg'], '{:.1f}')} deg; "
                     f"{iv['resamples_with_machine_route']:.0%} of resamples find a machine route")
    elif m["machine_tiles"]:
        lines.append(f"  measured on held-out images left out by each resample (90%): F1 "
                     f"{_fmt_iv(iv['machine_f1'], '{:.2f}')}, direction {_fmt_iv(iv['machine_direction_median_deg'], '{:.1f}')} "
                     f"deg, deposit tiles taken {_fmt_iv(iv['machine_deposit_share'], '{:.0%}')}; "
                     f"{iv['resamples_with_machine_route']:.0%} of resamples find a machine route")
    if effort.get("machine_share_of_tiles_with_detections") is not None:
        lines.append(f"  here the machine takes {effort['machine_share_of_tiles_with_detections']:.0%} of the "
                     f"{t['with_detections']} screened tiles with detections")
    lines += [
        f"volunteer effort left: {effort['classifications']:,} classifications on the crowd tiles "
        f"(90%: {_fmt_iv(iv['classifications'])}), {effort['hours']:,.1f} h (90%: {_fmt_iv(iv['hours'], '{:,.1f}')}) "
        f"at {c['seconds_per_classification']:g} s each" + (" (assumed)" if c["seconds_assumed"] else ""),
        f"  of which on tiles that truly hold deposits (expected): {needed['classifications']:,.0f} "
        f"(90% prediction interval: {_fmt_iv(needed['interval_90'])}; resampling the calibration alone: "
        f"{_fmt_iv(needed.get('interval_90_calibration_only'))})"
        + (f"; unfamiliar tiles count in full ({needed['on_unfamiliar_tiles']:,})"
           if needed.get("on_unfamiliar_tiles") else ""),
        f"  saved by routing: skip {effort['by_route']['skip']['classifications']:,}, machine "
        f"{effort['by_route']['machine']['classifications']:,} of {effort['classifications_without_routing']:,} "
        f"classifications without routing",
    ]
    on_skipped = needed.get("on_skipped_tiles")
    if on_skipped and t["skip"]:
        lines.append(f"  skipping withholds an expected {on_skipped['classifications']:,.0f} classifications from "
                     f"skipped tiles that hold deposits (90%: {_fmt_iv(on_skipped['interval_90'])})")
    if effort.get("days") is not None:
        lines.append(f"at {c['classifications_per_day']:g} classifications a day: {effort['days']:.1f} days "
                     f"(90%: {_fmt_iv(iv['days'], '{:.1f}')}), done between {effort['dates'][0]} and {effort['dates'][1]}")
    missed = effort["missed_deposit_share"]
    if missed is None:
        lines.append("deposits lost by skipping: unknown (no held-out deposits)")
    else:
        lines.append(f"deposits lost by skipping: {missed:.2%} of the held-out deposit area (90% on left-out "
                     f"images {_fmt_iv(iv['missed_deposit_share'], '{:.2%}')})")
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
    """The card of a model whose ONNX files and card schema pass :func:`detector.inference.model.load_model`."""
    from detector.inference.model import load_model

    return load_model(model_dir).card


def check_screen_model(model_dir, screen_dir):
    """Refuse a screening made by another model: compare run.json's model hash with the model's card.

    Raises
    ------
    ScreenModelMismatch
        The screening folder has no readable run.json or a model hash other
        than the sha256 of ``model_dir/model.json``.
    """
    from detector.inference.model import MODEL_CARD, sha256_file

    run_path = Path(screen_dir) / "run.json"
    try:
        recorded = json.loads(run_path.read_text(encoding="utf-8"))["parameters"]["model_hash"]
    except (OSError, json.JSONDecodeError, UnicodeDecodeError, KeyError, TypeError) as err:
        raise ScreenModelMismatch(f"{str(run_path)!r} is missing or names no model_hash, so the model that made "
                                  f"the screening is unknown; screen again with `frostvane screen`.") from err
    card_path = Path(model_dir) / MODEL_CARD
    if not card_path.is_file():
        raise DetectorError(f"model folder {str(model_dir)!r} has no {MODEL_CARD}.")
    actual = sha256_file(card_path)
    if recorded != actual:
        raise ScreenModelMismatch(f"screening {str(screen_dir)!r} was made by another model (run.json model_hash "
                                  f"{str(recorded)[:12]!r}, {str(card_path)!r} hashes to {actual[:12]!r}); "
                                  f"pass the model that made it or screen again with this one.")


def run_effort(model_dir, screen_dir, *, out=None, campaign=None, recall=DEFAULT_RECALL,
               max_direction_error=DEFAULT_MAX_DIRECTION_ERROR, min_f1=DEFAULT_MIN_F1, pass_share=DEFAULT_PASS_SHARE,
               seed=0, n_boot=1000, plots=True, log=print):
    """Route a screen folder's tiles, estimate the effort and write effort.json, routes.csv and plots.

    Parameters
    ----------
    model_dir : path-like
        Model folder whose ``model.json`` holds ``heldout_tiles``; it must be
        the model that made the screening (run.json's model hash).
    screen_dir : path-like
        Output of ``frostvane screen``; its tiles.csv route column is updated in place (atomically).
    out : path-like, optional
        Folder for effort.json, routes.csv, effort.png and hours.png; default ``screen_dir``.
    campaign : Campaign, optional
        Default :class:`training.effort.campaign.Campaign` (30 classifications a tile, none given yet).

    Returns
    -------
    effort : dict
    """
    campaign = Campaign() if campaign is None else campaign
    _check_settings(recall=recall, min_f1=min_f1, pass_share=pass_share)
    tiles, detections = _read_screen(screen_dir)
    card = _read_card(model_dir)
    check_screen_model(model_dir, screen_dir)
    have = None if campaign.classifications is None else read_classifications(campaign.classifications)
    routed = route_tiles(tiles, card, recall=recall, max_direction_error=max_direction_error, min_f1=min_f1,
                         pass_share=pass_share, detections=detections)
    effort = estimate_effort(routed, card, campaign=campaign, have=have, seed=seed, n_boot=n_boot)
    effort["model_dir"] = str(model_dir)
    effort["screen_dir"] = str(screen_dir)
    if have is not None:
        effort["tiles"]["listed_in_classifications"] = int(routed["tile_id"].astype(str).isin(have.index).sum())
    out = Path(screen_dir if out is None else out)
    routes = routed[["tile_id", "image", "route", "reason", "unfamiliar", "p_deposit", "unfamiliarity",
                     "n_detections", "confidence"]].copy()
    have_arr = _aligned_have(routed, have)
    routes["classifications_have"] = have_arr
    routes["classifications_left"] = np.where(routes["route"].eq("crowd"),
                                              remaining_classifications(have_arr, campaign.classifications_needed), 0)
    write_json(out / "effort.json", _jsonable(effort), indent=1)
    with atomic_path(out / "routes.csv") as tmp:
        routes.to_csv(tmp, index=False)
    updated = tiles.copy()
    updated["route"] = routed["route"].to_numpy()
    with atomic_path(Path(screen_dir) / "tiles.csv") as tmp:
        updated.to_csv(tmp, index=False)
    written = [out / "effort.json", out / "routes.csv"]
    gpkg = Path(screen_dir) / "detections.gpkg"
    if gpkg.is_file():
        from detector.gis.gpkg import update_tile_routes

        update_tile_routes(gpkg, dict(zip(routed["tile_id"].astype(str), routed["route"].astype(str), strict=True)))
    if plots:
        from .effort_plots import plot_effort, plot_hours

        written += [plot_effort(effort, out / "effort.png"), plot_hours(effort, out / "hours.png")]
    log(effort_summary(effort))
    log(f"wrote {', '.join(str(w) for w in written)}; updated the route column of {Path(screen_dir) / 'tiles.csv'}"
        + (f" and the tiles layer of {gpkg}" if gpkg.is_file() else ""))
    return effort


def write_next_tiles(model_dir, effort_dir, tileset_root, *, log=print):
    """Rank the crowd tiles of an effort run that a tile set holds; write next_tiles.csv beside routes.csv.

    Parameters
    ----------
    model_dir : path-like
    effort_dir : path-like
        Folder holding the effort run's routes.csv.
    tileset_root : path-like
        Tile set holding (some of) the crowd tiles' images.

    Returns
    -------
    ranked : DataFrame
        See :func:`training.effort.active.rank_tiles`.
    """
    from detector.tileset import load_tileset

    from .active import rank_tiles

    routes = pd.read_csv(Path(effort_dir) / "routes.csv", dtype={"tile_id": str})
    crowd = routes.loc[routes["route"].eq("crowd"), "tile_id"]
    known = set(load_tileset(tileset_root).tiles["tile_id"])
    ids = [t for t in crowd if t in known]
    if not ids:
        raise DetectorError(f"none of the {len(crowd)} crowd tiles of {str(effort_dir)!r} is in the tile set "
                            f"{str(tileset_root)!r}.")
    ranked = rank_tiles(model_dir, tileset_root, ids, log=log)
    with atomic_path(Path(effort_dir) / "next_tiles.csv") as tmp:
        ranked.to_csv(tmp, index=False)
    top = ", ".join(ranked["tile_id"].head(5))
    log(f"next tiles for volunteers (patch uncertainty x diversity): {top}{' ...' if len(ranked) > 5 else ''}; "
        f"wrote {Path(effort_dir) / 'next_tiles.csv'} ({len(ranked)} of {len(crowd)} crowd tiles found in the tile set)")
    return ranked


def write_effort_outputs(model_dir, screen_dir=None, *, campaign_file=None, campaign_overrides=None, out=None,
                         recall=DEFAULT_RECALL,
                         min_f1=DEFAULT_MIN_F1, max_direction_error=DEFAULT_MAX_DIRECTION_ERROR,
                         pass_share=DEFAULT_PASS_SHARE, next_tiles=None, learning_curve_root=None, seed=0):
    """Everything ``frostvane effort`` writes: routes and the effort left, next tiles, a learning curve.

    Parameters
    ----------
    model_dir : path-like
        Model folder (its held-out table sets the routes).
    screen_dir : path-like, optional
        Output of ``frostvane screen`` made by this model; needed unless ``learning_curve_root`` is given.
    campaign_file : path-like, optional
        Campaign file (see :func:`training.effort.campaign.read_campaign`; default: the campaign defaults).
    campaign_overrides : dict, optional
        Campaign fields that override the file's (None values are ignored); the campaign is read only
        when there is a screening to estimate.
    out : path-like, optional
        Folder for the outputs (default: the screening folder; for a learning curve alone,
        ``out/learning_curve``).
    recall, min_f1, max_direction_error, pass_share : float
        Route settings, as in :func:`run_effort`.
    next_tiles : path-like, optional
        Tile set whose crowd tiles are ranked by what they would teach the model (needs ``screen_dir``).
    learning_curve_root : path-like, optional
        Labelled tile set on which the learning curve is also fitted.
    seed : int, default=0
        Seed of the bootstrap and the learning curve.
    """
    from .campaign import campaign_with_overrides
    from .curve import learning_curve, learning_curve_summary

    _check_settings(recall=recall, min_f1=min_f1, pass_share=pass_share)
    if screen_dir is None and learning_curve_root is None:
        raise DetectorError("frostvane effort needs a SCREEN_DIR (output of `frostvane screen`) or --learning-curve TILESET.")
    if screen_dir is not None:
        campaign = campaign_with_overrides(campaign_file, **(campaign_overrides or {}))
        run_effort(model_dir, screen_dir, out=out, campaign=campaign, recall=recall,
                   max_direction_error=max_direction_error, min_f1=min_f1, pass_share=pass_share, seed=seed)
    if next_tiles is not None:
        if screen_dir is None:
            raise DetectorError("--next-tiles ranks the crowd tiles of a screening: give SCREEN_DIR too.")
        write_next_tiles(model_dir, Path(out if out is not None else screen_dir), next_tiles)
    if learning_curve_root is not None:
        curve_out = Path(out) if out is not None else (Path(screen_dir) if screen_dir is not None
                                                       else Path("out") / "learning_curve")
        curve = learning_curve(learning_curve_root, seed=seed, out=curve_out)
        print(learning_curve_summary(curve))
        print(f"wrote {curve_out / 'learning_curve.json'} and {curve_out / 'learning_curve.png'}")
