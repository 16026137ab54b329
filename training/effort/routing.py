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


import numpy as np
import pandas as pd

from detector.errors import DetectorError
from detector.inference.unfamiliar import DEFAULT_PASS_SHARE, FEATURE_GROUPS, SHARE_COLUMNS, pass_threshold
from detector.screening.folder import smoothed_flags


__all__ = [
    "ROUTES",
    "DEFAULT_RECALL",
    "DEFAULT_MIN_F1",
    "DEFAULT_MAX_DIRECTION_ERROR",
    "DEFAULT_MIN_TILES",
    "skip_threshold",
    "machine_threshold",
    "pooled_f1",
    "tile_confidence",
    "route_tiles",
    "tile_detection_summary",
    "unfamiliar_groups_text",
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
        text = out[column].isna() & frame[column].notna()
        if column == "p_deposit":
            text |= (out[column] < 0) | (out[column] > 1)
        elif column in ("consensus_px", "n_consensus", "n_detections", "unfamiliarity"):
            text |= out[column] < 0
        if text.any():
            i = int(np.flatnonzero(text.to_numpy())[0])
            raise DetectorError(f"the model card's heldout_tiles entry {i + 1} (tile {out['tile_id'].iloc[i]!r}) has "
                                f"{column} {frame[column].iloc[i]!r}, which is not a valid value; the card was "
                                f"edited or damaged: retrain or restore the model folder.")
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
    # A tile noisier than every fitting tile was smoothed before detection: the model never met
    # such a tile, so it is unfamiliar whatever its features say.
    unf = np.where(smoothed_flags(screen), np.inf, unf)
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


def _reasons(code, p, unf, conf, n_det, max_score, *, skip, machine, cut, recall, pass_share, shares=None,
             noise=None, noise_limit=None):
    """One sentence per tile saying why it took its route.

    ``noise`` (8-bit grey levels per tile) and ``noise_limit`` (the card's, same units) word the
    reason of smoothed tiles, whose unfamiliarity :func:`_screen_arrays` set to infinity.
    """
    if noise is None:
        noise = np.full(len(code), np.nan)
    machine_text = ("no confidence threshold keeps the machine's promise on the held-out tiles" if machine is None
                    else f"below the machine's {machine:.3f}")
    if shares is None:
        shares = np.full((len(code), len(FEATURE_GROUPS)), np.nan)
    out = []
    for c, pi, ui, ci, ni, mi, si, zi in zip(code, p, unf, conf, n_det, max_score, shares, noise):
        if c == _CODE["nodata"]:
            out.append("nodata: under half of the tile's core holds valid pixels")
        elif ui == np.inf:
            limit = "" if noise_limit is None else f", above the noisiest fitting tile's {noise_limit:.1f}"
            out.append(f"crowd, unfamiliar: noise {zi:.1f} grey levels{limit}; the model never met such a tile, "
                       f"so it was smoothed before detection and its detections are not trusted")
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
    noise = (pd.to_numeric(screen["noise_8bit"], errors="coerce").to_numpy(np.float64)
             if "noise_8bit" in screen.columns else None)
    noise_limit = (card.get("noise") or {}).get("limit")
    screen["reason"] = _reasons(code, p, unf, conf, n_det, max_score, skip=skip, machine=machine, cut=cut,
                                recall=recall, pass_share=pass_share, shares=shares, noise=noise,
                                noise_limit=None if noise_limit is None else 255.0 * noise_limit)
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
