"""Error analysis: where consensus fans and spots are lost, and where false detections come from.

:func:`error_breakdown` gives every consensus feature and every detection
exactly one outcome, from the object matching of
:func:`training.evaluation.matching.match_objects` and the pixel overlap of the features'
footprints (fan sectors and spot ellipses, rasterised with the geometry of
:mod:`detector.labels`). It then tallies the outcomes by consensus fan length,
by votes and by image, and gives the headline shares. :func:`plot_error_tiles`
draws the tiles with the most errors, consensus beside detections.

Pure functions over DataFrames; nothing here reads a model.
"""

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from detector.contract import KINDS
from detector.errors import DetectorError
from detector.labels import _ellipse_mask, _sector_mask, _window

from .matching import match_objects

__all__ = [
    "CONSENSUS_OUTCOMES",
    "DETECTION_OUTCOMES",
    "DIRECTION_QUALITIES",
    "ErrorBreakdown",
    "error_breakdown",
    "footprint_overlaps",
    "worst_tiles",
    "plot_error_tiles",
    "write_error_tables",
    "write_error_analysis",
    "diagnose_catalogs",
]

#: Outcomes of a consensus feature, in order of precedence.
CONSENSUS_OUTCOMES = ("matched", "as_other_kind", "source_misplaced", "merged", "missed")
#: Outcomes of a detection, in order of precedence.
DETECTION_OUTCOMES = ("true", "duplicate", "on_other_kind", "misplaced", "background")
#: Direction quality of a matched consensus fan.
DIRECTION_QUALITIES = ("ok", "direction_off", "flipped", "unknown")

_GEOMETRY = ("x_px", "y_px", "direction_deg", "length_px", "opening_deg", "semi_major_px", "semi_minor_px")
_EDGE_COLUMNS = ["tile_id", "det_index", "cons_index", "overlap_px", "distance_px", "within_radius"]


def _require(df, columns, name):
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise DetectorError(f"{name} lacks column(s) {', '.join(missing)}.")


def _footprint_pixels(frame, rows, cols):
    """Flat pixel indices (row * cols + col) of each feature's footprint, and the feature position of each.

    The footprint is the fan sector or spot ellipse sampled at pixel centres
    (the geometry of :func:`detector.labels.rasterise_features`), clipped to
    the tile, plus the pixel holding the apex or centre, so that a feature
    smaller than a pixel still has one. A feature whose size or direction is
    not finite keeps only that pixel.
    """
    kinds = frame["kind"].to_numpy()
    g = {c: frame[c].to_numpy(dtype=float) for c in _GEOMETRY}
    pix, owner = [], []
    for i, kind in enumerate(kinds):
        x, y = g["x_px"][i], g["y_px"][i]
        r, c = int(np.floor(y + 0.5)), int(np.floor(x + 0.5))
        anchor = 0 <= r < rows and 0 <= c < cols
        d = g["direction_deg"][i]
        if kind == "fan":
            length, spread = g["length_px"][i], g["opening_deg"][i]
            ok = np.isfinite([d, length, spread]).all() and length > 0
            win = _window(x, y, length, rows, cols) if ok else None
            mask_of = (lambda dx, dy: _sector_mask(dx, dy, d, length, spread)) if ok else None
        else:
            a, b = g["semi_major_px"][i], g["semi_minor_px"][i]
            ok = np.isfinite([d, a, b]).all() and a > 0 and b > 0
            win = _window(x, y, max(a, b), rows, cols) if ok else None
            mask_of = (lambda dx, dy: _ellipse_mask(dx, dy, d, a, b)) if ok else None
        if win is not None:
            (rs, cs), dx, dy = win
            mask = mask_of(dx, dy)
            ar, ac = r - rs.start, c - cs.start
            if anchor and 0 <= ar < mask.shape[0] and 0 <= ac < mask.shape[1]:
                mask[ar, ac] = True
            rr, cc = np.nonzero(mask)
            p = (rr + rs.start).astype(np.int64) * cols + (cc + cs.start)
        elif anchor:
            p = np.array([r * cols + c], dtype=np.int64)
        else:
            continue
        pix.append(p)
        owner.append(np.full(p.size, i, dtype=np.int64))
    if not pix:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    return np.concatenate(pix), np.concatenate(owner)


def _match_radius(cons, *, fan_min_px, fan_length_frac, spot_min_px):
    """Match radius of each consensus feature, px (the radii of :func:`training.evaluation.matching.match_objects`)."""
    fan = cons["kind"].to_numpy() == "fan"
    return np.where(
        fan,
        np.maximum(fan_min_px, fan_length_frac * cons["length_px"].to_numpy(float)),
        np.maximum(spot_min_px, cons["semi_major_px"].to_numpy(float)),
    )


def footprint_overlaps(detections, consensus, shapes, *, fan_min_px=12.0, fan_length_frac=0.3, spot_min_px=10.0):
    """Every detection-consensus pair of a tile that overlaps or lies within the match radius.

    Per tile, each feature's footprint becomes a list of pixel indices; the
    overlapping pairs are the distinct (consensus, detection) codes of the
    pixels both lists hold (one ``np.unique``), so features that overlap
    their own kind (fans of one vent) keep all their pixels. Both kinds are
    paired with both kinds.

    Parameters
    ----------
    detections, consensus : DataFrame
        Contract tables with tile_id, kind and the geometry columns (x_px,
        y_px, direction_deg, length_px, opening_deg, semi_major_px,
        semi_minor_px); unique indexes.
    shapes : mapping
        tile_id -> (rows, cols) px.
    fan_min_px, fan_length_frac, spot_min_px : float, optional
        Match radii, as in :func:`training.evaluation.matching.match_objects`.

    Returns
    -------
    edges : DataFrame
        tile_id, det_index, cons_index (index labels), overlap_px (pixels
        shared), distance_px (detection apex or centre to consensus apex or
        centre), within_radius (that distance is within the consensus
        feature's match radius); one row per pair with overlap_px > 0 or
        within_radius.
    """
    parts = []
    det_groups = dict(tuple(detections.groupby("tile_id", sort=False)))
    for tile_id, cons in consensus.groupby("tile_id", sort=False):
        det = det_groups.get(tile_id)
        if det is None or not len(det):
            continue
        if tile_id not in shapes:
            raise DetectorError(f"tile_id {tile_id!r} has no shape; give its width and height.")
        rows, cols = (int(s) for s in shapes[tile_id])
        pc, oc = _footprint_pixels(cons, rows, cols)
        pd_, od = _footprint_pixels(det, rows, cols)
        nd = len(det)
        # Pixels held by both sides: sort-join the two pixel lists.
        order = np.argsort(pd_, kind="stable")
        pd_s, od_s = pd_[order], od[order]
        lo = np.searchsorted(pd_s, pc, side="left")
        hi = np.searchsorted(pd_s, pc, side="right")
        counts = hi - lo
        rep_c = np.repeat(oc, counts)
        starts = np.repeat(lo - np.r_[0, np.cumsum(counts)[:-1]], counts)
        rep_d = od_s[np.arange(counts.sum()) + starts] if counts.sum() else np.zeros(0, np.int64)
        codes, n_px = np.unique(rep_c * nd + rep_d, return_counts=True)
        overlap = np.zeros((len(cons), nd), dtype=np.int64)
        overlap[codes // nd, codes % nd] = n_px
        dist = np.hypot(
            det["x_px"].to_numpy(float)[None, :] - cons["x_px"].to_numpy(float)[:, None],
            det["y_px"].to_numpy(float)[None, :] - cons["y_px"].to_numpy(float)[:, None],
        )
        radius = _match_radius(cons, fan_min_px=fan_min_px, fan_length_frac=fan_length_frac, spot_min_px=spot_min_px)
        within = dist <= radius[:, None] + 1e-9
        ci, di = np.nonzero((overlap > 0) | within)
        parts.append(pd.DataFrame({
            "tile_id": tile_id,
            "det_index": det.index.to_numpy()[di],
            "cons_index": cons.index.to_numpy()[ci],
            "overlap_px": overlap[ci, di],
            "distance_px": dist[ci, di],
            "within_radius": within[ci, di],
        }))
    parts = [p for p in parts if len(p)]
    if not parts:
        return pd.DataFrame({"tile_id": pd.Series(dtype=object), "det_index": pd.Series(dtype=np.int64),
                             "cons_index": pd.Series(dtype=np.int64), "overlap_px": pd.Series(dtype=np.int64),
                             "distance_px": pd.Series(dtype=float), "within_radius": pd.Series(dtype=bool)})
    return pd.concat(parts, ignore_index=True)[_EDGE_COLUMNS]


def _bin_labels(edges):
    """'<20', '20-35', '>=56' style labels of consecutive [lo, hi) bins."""
    labels = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        if lo <= 0 and np.isfinite(hi):
            labels.append(f"<{hi:g}")
        elif not np.isfinite(hi):
            labels.append(f">={lo:g}")
        else:
            labels.append(f"{lo:g}-{hi:g}")
    return labels


def _check_bins(bins, name):
    edges = np.asarray(bins, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or np.isnan(edges).any() or np.any(np.diff(edges) <= 0):
        raise DetectorError(f"{name} {tuple(bins)!r} must be at least two increasing bin edges.")
    return edges


def _json_edges(edges):
    """Bin edges for strict JSON: an infinite edge becomes None."""
    return [float(v) if np.isfinite(v) else None for v in edges]


def _binned(values, edges):
    labels = _bin_labels(edges)
    return pd.cut(pd.Series(values, dtype=float), edges, right=False, labels=labels), labels


def _tally(group, kinds, outcomes, *, group_name, group_order, side, categories):
    """Tidy counts and shares of outcomes per group and kind (groups or kinds without features are left out)."""
    df = pd.DataFrame({
        group_name: pd.Categorical(np.asarray(group, dtype=object), categories=list(group_order)),
        "kind": pd.Categorical(np.asarray(kinds, dtype=object), categories=list(KINDS)),
        "outcome": pd.Categorical(np.asarray(outcomes, dtype=object), categories=list(categories)),
    })
    n = df.groupby([group_name, "kind", "outcome"], observed=False).size().rename("n").reset_index()
    total = n.groupby([group_name, "kind"], observed=False)["n"].transform("sum")
    n = n[total > 0].copy()
    n["share"] = n["n"] / total[total > 0]
    n.insert(1, "side", side)
    for col in (group_name, "kind", "outcome"):
        n[col] = n[col].astype(str)
    return n.reset_index(drop=True)[[group_name, "side", "kind", "outcome", "n", "share"]]


@dataclass(frozen=True)
class ErrorBreakdown:
    """Outcome of every consensus feature and detection, and their tallies.

    Attributes
    ----------
    consensus : DataFrame
        The consensus rows (same index) with image_id, outcome (one of
        :data:`CONSENSUS_OUTCOMES`), direction_quality (one of
        :data:`DIRECTION_QUALITIES` for matched fans, missing otherwise),
        direction_error_deg (matched features), det_index (the matched
        detection, or the one that decided the outcome), overlap_px and
        distance_px (to that detection).
    detections : DataFrame
        The detection rows (same index) with image_id, outcome (one of
        :data:`DETECTION_OUTCOMES`), cons_index (the matched consensus
        feature, or the one that decided the outcome), overlap_px, distance_px.
    by_length, by_votes, by_image : DataFrame
        Tidy tallies: the group column (length_bin, votes_bin, image_id), side
        ("consensus", "detections" or "matched_fans" for direction quality),
        kind, outcome, n and share (of the group's features of that side and kind).
        by_length holds consensus fans by ``length_px``; by_votes consensus
        features of both kinds; by_image all three sides.
    headline : dict
        ``{"consensus": {kind: {"n", outcome shares}}, "detections": {...},
        "matched_fans": {"n", quality shares}, "settings": {...}}``; shares
        are fractions, None where there is nothing to share.
    pairs : DataFrame
        The matched pairs used (see :func:`training.evaluation.matching.match_objects`).
    """

    consensus: pd.DataFrame
    detections: pd.DataFrame
    by_length: pd.DataFrame
    by_votes: pd.DataFrame
    by_image: pd.DataFrame
    headline: dict
    pairs: pd.DataFrame = field(repr=False)

    def to_dict(self):
        """JSON-ready dict: the headline and the three tallies as lists of records."""
        def records(df):
            return [{k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in r.items()}
                    for r in df.to_dict(orient="records")]

        return {
            "headline": self.headline,
            "by_length": records(self.by_length),
            "by_votes": records(self.by_votes),
            "by_image": records(self.by_image),
        }


def _first_by(edges, key, rank_col):
    """For each ``key``, the edge of smallest rank, then largest overlap, then smallest distance."""
    e = edges.sort_values([key, rank_col, "overlap_px", "distance_px"], ascending=[True, True, False, True],
                          kind="stable")
    return e.drop_duplicates(key, keep="first").set_index(key)


def _labels(values, index):
    """Related-feature labels: nullable integers for an integer index, objects (None when absent) otherwise."""
    if pd.api.types.is_integer_dtype(index.dtype):
        return pd.array(pd.to_numeric(pd.Series(values, dtype=object)), dtype="Int64")
    return pd.Series(values, dtype=object).where(pd.notna(pd.Series(values, dtype=object)), None).to_numpy()


def _shares(frame, kinds, categories):
    out = {}
    for kind in kinds:
        sel = frame.loc[frame["kind"] == kind, "outcome"]
        counts = sel.value_counts()
        out[kind] = {"n": int(len(sel)),
                     **{c: (float(counts.get(c, 0)) / len(sel) if len(sel) else None) for c in categories}}
    return out


def error_breakdown(
    detections,
    consensus,
    tiles,
    pairs=None,
    *,
    min_overlap_px=1,
    direction_off_deg=45.0,
    flip_deg=135.0,
    length_bins=(0, 20, 35, 56, np.inf),
    votes_bins=(0, 5, 10, 20, np.inf),
    fan_min_px=12.0,
    fan_length_frac=0.3,
    spot_min_px=10.0,
):
    """Give every consensus feature and every detection exactly one outcome, and tally them.

    Two features *touch* when they are on the same tile and their footprints
    share at least ``min_overlap_px`` pixels, or the detection's apex (or
    centre) lies within the consensus feature's match radius (the radius of
    :func:`training.evaluation.matching.match_objects`: ``max(fan_min_px, fan_length_frac *
    length_px)`` for a fan, ``max(spot_min_px, semi_major_px)`` for a spot).
    A footprint is the fan's circular sector (apex, direction, length,
    spread) or the spot's ellipse, sampled at pixel centres and clipped to
    the tile, plus the apex or centre pixel. A detection is *free* when the
    matching left it unmatched, and so is a consensus feature.

    Consensus outcomes, first that applies wins:

    1. ``matched``: paired by the matching. A matched fan also gets a
       direction_quality: ``ok`` (angular error <= ``direction_off_deg``),
       ``direction_off`` (up to ``flip_deg``), ``flipped`` (above ``flip_deg``)
       or ``unknown`` (no detected direction); spots and unmatched features
       have none.
    2. ``as_other_kind``: a free detection of the other kind touches it
       (a fan reported as a spot, or a spot as a fan).
    3. ``source_misplaced``: a free detection of its kind touches it. Being
       free, that detection's apex lies outside the match radius (the
       greedy matching would otherwise have paired them).
    4. ``merged``: a detection of its kind touches it but is matched to
       another consensus feature: one detection covers two or more.
    5. ``missed``: no detection touches it (a detection of the other kind
       matched elsewhere does not count).

    Detection outcomes, first that applies wins:

    1. ``true``: paired by the matching.
    2. ``duplicate``: touches a consensus feature of its kind that another
       detection matched.
    3. ``on_other_kind``: touches a consensus feature of the other kind
       (a false fan on a consensus spot, or a false spot on a fan).
    4. ``misplaced``: touches a free consensus feature of its kind, too far
       from its apex or centre to match.
    5. ``background``: touches no consensus feature.

    The two sides are assigned independently, each by its own precedence.
    Among the touching features that decide an outcome, the one with the
    largest overlap (then the nearest) is recorded as the related feature.

    Parameters
    ----------
    detections : DataFrame
        Detection contract rows: tile_id, kind and the geometry columns of
        the consensus contract (x_px, y_px, direction_deg, length_px,
        opening_deg, semi_major_px, semi_minor_px). Unique index.
    consensus : DataFrame
        Consensus contract rows (the same columns, and votes for the votes
        breakdown). Unique index.
    tiles : DataFrame
        tile_id, image_id, width and height (px) of every tile the catalogs refer to.
    pairs : DataFrame, optional
        Output of :func:`training.evaluation.matching.match_objects` on these two tables
        (index labels); matched here with the radii below when not given.
    min_overlap_px : int, optional
        Smallest number of shared pixels that counts as overlap.
    direction_off_deg, flip_deg : float, optional
        Direction-quality thresholds of matched fans, degrees.
    length_bins, votes_bins : sequence of float, optional
        Increasing [lo, hi) bin edges of consensus fan ``length_px`` and of ``votes``.
    fan_min_px, fan_length_frac, spot_min_px : float, optional
        Match radii, as in :func:`training.evaluation.matching.match_objects`.

    Returns
    -------
    ErrorBreakdown

    Raises
    ------
    DetectorError
        A missing column, a tile_id not in ``tiles``, an unknown kind, a
        non-unique index, a non-finite apex or centre, or a bad setting.
    """
    _require(tiles, ["tile_id", "image_id", "width", "height"], "tiles")
    for name, df in (("detections", detections), ("consensus", consensus)):
        _require(df, ["tile_id", "kind", *_GEOMETRY], name)
        if not df.index.is_unique:
            raise DetectorError(f"{name} index is not unique; reset it first.")
        bad = ~df["kind"].isin(KINDS)
        if bad.any():
            raise DetectorError(f"{name} row {df.index[bad][0]!r}: kind {df['kind'][bad].iloc[0]!r} "
                                "is not fan or spot.")
        unknown = ~df["tile_id"].isin(tiles["tile_id"])
        if unknown.any():
            raise DetectorError(f"{name} row {df.index[unknown][0]!r}: tile_id {df['tile_id'][unknown].iloc[0]!r} "
                                "is not in tiles.")
        xy = df[["x_px", "y_px"]].to_numpy(float)
        nonfinite = ~np.isfinite(xy).all(axis=1)
        if nonfinite.any():
            raise DetectorError(f"{name} row {df.index[nonfinite][0]!r}: apex or centre "
                                f"{tuple(xy[nonfinite][0])!r} is not finite.")
    if tiles["tile_id"].duplicated().any():
        raise DetectorError(f"tiles has tile_id {tiles.loc[tiles['tile_id'].duplicated(), 'tile_id'].iloc[0]!r} "
                            "more than once.")
    if not (isinstance(min_overlap_px, (int, np.integer)) and min_overlap_px >= 1):
        raise DetectorError(f"min_overlap_px {min_overlap_px!r} must be a whole number of at least 1.")
    if not 0 <= direction_off_deg <= flip_deg <= 180:
        raise DetectorError(f"direction_off_deg {direction_off_deg!r} and flip_deg {flip_deg!r} must satisfy "
                            "0 <= direction_off_deg <= flip_deg <= 180.")
    length_edges = _check_bins(length_bins, "length_bins")
    votes_edges = _check_bins(votes_bins, "votes_bins")
    radii = dict(fan_min_px=fan_min_px, fan_length_frac=fan_length_frac, spot_min_px=spot_min_px)
    if pairs is None:
        pairs = match_objects(detections, consensus, **radii)

    shapes = dict(zip(tiles["tile_id"], zip(tiles["height"].astype(int), tiles["width"].astype(int))))
    edges = footprint_overlaps(detections, consensus, shapes, **radii)
    edges = edges[(edges["overlap_px"] >= min_overlap_px) | edges["within_radius"]].copy()
    edges["same_kind"] = (edges["det_index"].map(detections["kind"]).to_numpy()
                          == edges["cons_index"].map(consensus["kind"]).to_numpy())
    det_matched = edges["det_index"].isin(pairs["det_index"]).to_numpy()
    cons_matched = edges["cons_index"].isin(pairs["cons_index"]).to_numpy()
    same = edges["same_kind"].to_numpy()
    image = tiles.set_index("tile_id")["image_id"]

    # Consensus side: rank each edge of a free consensus feature by the outcome it would give.
    edges["cons_rank"] = np.select([cons_matched, ~same & ~det_matched, same & ~det_matched, same & det_matched],
                                   [np.nan, 1, 2, 3], default=np.nan)
    cons_first = _first_by(edges.dropna(subset=["cons_rank"]), "cons_index", "cons_rank")
    cons = consensus.copy()
    cons["image_id"] = cons["tile_id"].map(image).to_numpy()
    by_cons = pairs.set_index("cons_index")
    is_matched = cons.index.isin(by_cons.index)
    rank = cons_first["cons_rank"].reindex(cons.index).to_numpy()
    rank = np.where(is_matched, 0, np.where(np.isnan(rank), 4, rank)).astype(int)
    cons["outcome"] = np.asarray(CONSENSUS_OUTCOMES, dtype=object)[rank]
    err = by_cons["direction_error_deg"].reindex(cons.index).to_numpy(float)
    cons["direction_error_deg"] = np.where(is_matched, err, np.nan)
    fan_match = is_matched & (cons["kind"] == "fan").to_numpy()
    quality = np.select([np.isnan(err), err > flip_deg, err > direction_off_deg],
                        ["unknown", "flipped", "direction_off"], default="ok")
    cons["direction_quality"] = pd.Series(np.where(fan_match, quality, None), index=cons.index, dtype=object)
    cons["det_index"] = _labels(np.where(is_matched, by_cons["det_index"].reindex(cons.index),
                                         cons_first["det_index"].reindex(cons.index)), detections.index)
    link = edges.set_index(["cons_index", "det_index"])[["overlap_px", "distance_px"]]
    cons_link = cons_first[["overlap_px", "distance_px"]].reindex(cons.index)
    if is_matched.any():
        m = by_cons.reindex(cons.index[is_matched])
        key = pd.MultiIndex.from_arrays([cons.index[is_matched], m["det_index"]])
        cons_link.loc[is_matched, "overlap_px"] = link["overlap_px"].reindex(key).to_numpy()
        cons_link.loc[is_matched, "distance_px"] = m["distance_px"].to_numpy(float)
    cons["overlap_px"] = pd.array(cons_link["overlap_px"].to_numpy(float), dtype="Int64")
    cons["distance_px"] = cons_link["distance_px"].to_numpy(float)

    # Detection side.
    edges["det_rank"] = np.select([det_matched, same & cons_matched, ~same, same & ~cons_matched],
                                  [np.nan, 1, 2, 3], default=np.nan)
    det_first = _first_by(edges.dropna(subset=["det_rank"]), "det_index", "det_rank")
    det = detections.copy()
    det["image_id"] = det["tile_id"].map(image).to_numpy()
    by_det = pairs.set_index("det_index")
    is_true = det.index.isin(by_det.index)
    rank = det_first["det_rank"].reindex(det.index).to_numpy()
    rank = np.where(is_true, 0, np.where(np.isnan(rank), 4, rank)).astype(int)
    det["outcome"] = np.asarray(DETECTION_OUTCOMES, dtype=object)[rank]
    det["cons_index"] = _labels(np.where(is_true, by_det["cons_index"].reindex(det.index),
                                         det_first["cons_index"].reindex(det.index)), consensus.index)
    det_link = det_first[["overlap_px", "distance_px"]].reindex(det.index)
    if is_true.any():
        m = by_det.reindex(det.index[is_true])
        key = pd.MultiIndex.from_arrays([m["cons_index"], det.index[is_true]])
        det_link.loc[is_true, "overlap_px"] = link["overlap_px"].reindex(key).to_numpy()
        det_link.loc[is_true, "distance_px"] = m["distance_px"].to_numpy(float)
    det["overlap_px"] = pd.array(det_link["overlap_px"].to_numpy(float), dtype="Int64")
    det["distance_px"] = det_link["distance_px"].to_numpy(float)

    # Tallies.
    fans = cons[cons["kind"] == "fan"]
    matched_fans = fans[fans["outcome"] == "matched"]
    len_key, len_labels = _binned(fans["length_px"].to_numpy(float), length_edges)
    by_length = _tally(len_key, fans["kind"], fans["outcome"], group_name="length_bin", group_order=len_labels,
                       side="consensus", categories=CONSENSUS_OUTCOMES)
    votes = cons["votes"].to_numpy(float) if "votes" in cons else np.full(len(cons), np.nan)
    votes_key, votes_labels = _binned(votes, votes_edges)
    by_votes = _tally(votes_key, cons["kind"], cons["outcome"], group_name="votes_bin", group_order=votes_labels,
                      side="consensus", categories=CONSENSUS_OUTCOMES)
    images = sorted(set(tiles["image_id"].astype(str)))
    by_image = pd.concat([
        _tally(cons["image_id"].astype(str), cons["kind"], cons["outcome"], group_name="image_id",
               group_order=images, side="consensus", categories=CONSENSUS_OUTCOMES),
        _tally(det["image_id"].astype(str), det["kind"], det["outcome"], group_name="image_id",
               group_order=images, side="detections", categories=DETECTION_OUTCOMES),
        _tally(matched_fans["image_id"].astype(str), matched_fans["kind"], matched_fans["direction_quality"],
               group_name="image_id", group_order=images, side="matched_fans", categories=DIRECTION_QUALITIES),
    ], ignore_index=True)

    mq = matched_fans["direction_quality"].value_counts()
    headline = {
        "consensus": _shares(cons, KINDS, CONSENSUS_OUTCOMES),
        "detections": _shares(det, KINDS, DETECTION_OUTCOMES),
        "matched_fans": {"n": int(len(matched_fans)),
                         **{q: (float(mq.get(q, 0)) / len(matched_fans) if len(matched_fans) else None)
                            for q in DIRECTION_QUALITIES}},
        "settings": {"min_overlap_px": int(min_overlap_px), "direction_off_deg": float(direction_off_deg),
                     "flip_deg": float(flip_deg), "length_bins": _json_edges(length_edges),
                     "votes_bins": _json_edges(votes_edges), **{k: float(v) for k, v in radii.items()}},
    }
    return ErrorBreakdown(consensus=cons, detections=det, by_length=by_length, by_votes=by_votes,
                          by_image=by_image, headline=headline, pairs=pairs)


def worst_tiles(breakdown, *, n_tiles=6):
    """Tiles with the most errors: unmatched consensus features plus false detections.

    Parameters
    ----------
    breakdown : ErrorBreakdown
    n_tiles : int, optional
        How many tiles to return at most.

    Returns
    -------
    worst : DataFrame
        tile_id, n_lost (consensus not matched), n_false (detections not
        true), n_errors; the ``n_tiles`` largest n_errors (ties by tile_id),
        tiles without errors left out.
    """
    if int(n_tiles) < 0:
        raise DetectorError(f"n_tiles {n_tiles!r} must not be negative.")
    lost = breakdown.consensus.loc[breakdown.consensus["outcome"] != "matched", "tile_id"].value_counts()
    false = breakdown.detections.loc[breakdown.detections["outcome"] != "true", "tile_id"].value_counts()
    t = pd.concat([lost.rename("n_lost"), false.rename("n_false")], axis=1).fillna(0).astype(int)
    t["n_errors"] = t["n_lost"] + t["n_false"]
    t = t.rename_axis("tile_id").reset_index()
    t = t[t["n_errors"] > 0].sort_values(["n_errors", "tile_id"], ascending=[False, True], kind="stable")
    return t.head(int(n_tiles)).reset_index(drop=True)


#: Colours of the overlay figures: consensus per kind, detections per outcome.
CONSENSUS_COLORS = {"fan": "tab:orange", "spot": "tab:cyan"}
OUTCOME_COLORS = {"true": "tab:green", "duplicate": "tab:purple", "on_other_kind": "tab:pink",
                  "misplaced": "gold", "background": "tab:red"}


def _safe_name(tile_id):
    """A tile_id usable in a file name: characters other than letters, digits, '.', '_' and '-' become '_'."""
    return re.sub(r"[^A-Za-z0-9._-]", "_", str(tile_id))


def _recolour(patches, colors, alpha):
    from matplotlib.colors import to_rgba

    for patch, color in zip(patches, colors):
        rgba = to_rgba(color)
        patch.set_edgecolor(rgba)
        patch.set_facecolor((*rgba[:3], alpha))


def plot_error_tiles(breakdown, read_tile, out_dir, *, tile_ids=None, n_tiles=6, dpi=100, alpha=0.3):
    """Write one PNG per tile: consensus and detections side by side, detections coloured by outcome.

    Parameters
    ----------
    breakdown : ErrorBreakdown
    read_tile : callable
        ``read_tile(tile_id)`` returning the tile image (2-D array), e.g. ``TileSet.read_tile``.
    out_dir : path-like
        Folder of the figures, named ``worst_<tile_id>.png`` (characters other
        than letters, digits, '.', '_' and '-' replaced by '_'); written atomically.
    tile_ids : sequence of str, optional
        Tiles to draw; default the :func:`worst_tiles`.
    n_tiles : int, optional
        Number of worst tiles when ``tile_ids`` is not given.
    dpi : int, optional
    alpha : float, optional
        Fill opacity of the outlines.

    Returns
    -------
    list of Path
    """
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    from detector.io import atomic_path
    from detector.plots import draw_features

    if tile_ids is None:
        tile_ids = worst_tiles(breakdown, n_tiles=n_tiles)["tile_id"].tolist()
    out_dir = Path(out_dir)
    written = []
    cons_all, det_all = breakdown.consensus, breakdown.detections
    for tile_id in tile_ids:
        image = np.asarray(read_tile(tile_id), dtype=float)
        finite = image[np.isfinite(image)]
        lo, hi = np.percentile(finite, [2, 98]) if finite.size else (0.0, 1.0)
        cons = cons_all[cons_all["tile_id"] == tile_id]
        det = det_all[det_all["tile_id"] == tile_id]
        aspect = image.shape[0] / image.shape[1]
        fig = Figure(figsize=(10, 4.6 * aspect + 1.2), layout="constrained")
        axes = fig.subplots(1, 2)
        for ax, frame, title in ((axes[0], cons, "consensus"), (axes[1], det, "detections")):
            ax.imshow(image, cmap="gray", vmin=lo, vmax=max(hi, lo + 1e-9), interpolation="nearest")
            patches = draw_features(ax, frame, color_by_direction=False, alpha=alpha)
            if frame is cons:
                colours = [CONSENSUS_COLORS[k] for k in frame["kind"]]
                lost = int((frame["outcome"] != "matched").sum())
                ax.set_title(f"{tile_id}: {title} ({len(frame)}, {lost} not matched)", fontsize=9)
            else:
                colours = [OUTCOME_COLORS[o] for o in frame["outcome"]]
                false = int((frame["outcome"] != "true").sum())
                ax.set_title(f"{tile_id}: {title} ({len(frame)}, {false} false)", fontsize=9)
            _recolour(patches, colours, alpha)
            ax.set_xlim(-0.5, image.shape[1] - 0.5)
            ax.set_ylim(image.shape[0] - 0.5, -0.5)
            ax.tick_params(labelsize=7)
        axes[0].legend(handles=[Patch(facecolor=c, edgecolor=c, alpha=0.7, label=f"consensus {k}")
                                for k, c in CONSENSUS_COLORS.items()], loc="upper right", fontsize=7)
        axes[1].legend(handles=[Patch(facecolor=c, edgecolor=c, alpha=0.7, label=o) for o, c in OUTCOME_COLORS.items()],
                       loc="upper right", fontsize=7)
        path = out_dir / f"worst_{_safe_name(tile_id)}.png"
        with atomic_path(path) as tmp:
            fig.savefig(tmp, format="png", dpi=dpi)
        written.append(path)
    return written


def write_error_tables(breakdown, out_dir, *, float_format="%.3f"):
    """Write ``errors_consensus.csv`` and ``errors_detections.csv`` atomically.

    Each row is one consensus feature (first column ``cons_index``, the row of
    the scored consensus table) or one detection (``det_index``), with its
    contract columns and its outcome columns (see :class:`ErrorBreakdown`).

    Returns
    -------
    dict of str -> Path
        ``consensus`` and ``detections``.
    """
    from detector.io import atomic_path

    out_dir = Path(out_dir)
    written = {}
    for name, frame, index_name in (("consensus", breakdown.consensus, "cons_index"),
                                    ("detections", breakdown.detections, "det_index")):
        table = frame.rename_axis(index_name).reset_index()
        path = out_dir / f"errors_{name}.csv"
        with atomic_path(path) as tmp:
            table.to_csv(tmp, index=False, float_format=float_format)
        written[name] = path
    return written


def write_error_analysis(breakdown, read_tile, out_dir, *, n_worst=6):
    """Write the outcome tables and the worst-tile figures of a breakdown; return its JSON-ready summary.

    Parameters
    ----------
    breakdown : ErrorBreakdown
    read_tile : callable
        ``read_tile(tile_id)`` returning the tile image.
    out_dir : path-like
        Folder that gets ``errors_consensus.csv``, ``errors_detections.csv``
        and ``worst_tiles/worst_<tile_id>.png``.
    n_worst : int, optional
        Number of worst tiles drawn (see :func:`worst_tiles`).

    Returns
    -------
    summary : dict
        :meth:`ErrorBreakdown.to_dict` plus ``worst_tiles``: records of
        tile_id, n_lost, n_false and figure (path relative to ``out_dir``).
    """
    out_dir = Path(out_dir)
    write_error_tables(breakdown, out_dir)
    worst = worst_tiles(breakdown, n_tiles=n_worst)
    figures = plot_error_tiles(breakdown, read_tile, out_dir / "worst_tiles", tile_ids=worst["tile_id"].tolist())
    summary = breakdown.to_dict()
    summary["worst_tiles"] = [
        {"tile_id": str(t), "n_lost": int(lost), "n_false": int(false), "figure": f"worst_tiles/{fig.name}"}
        for t, lost, false, fig in zip(worst["tile_id"], worst["n_lost"], worst["n_false"], figures)
    ]
    return summary


def diagnose_catalogs(detections_csv, tileset_dir, out_dir, *, min_votes=None, n_worst=6, force=False, **settings):
    """Error analysis of a detection catalog against a tile set's consensus, without a model.

    Writes into ``out_dir`` (atomically, as one folder): ``errors_consensus.csv``,
    ``errors_detections.csv``, ``error_breakdown.json`` (the summary of
    :meth:`ErrorBreakdown.to_dict` with the worst tiles) and
    ``worst_tiles/worst_<tile_id>.png``.

    Parameters
    ----------
    detections_csv : path-like
        Detections with the contract columns (e.g. a ``detections.csv`` of
        ``frostvane evaluate``); rows of tiles outside the tile set are an error.
    tileset_dir : path-like
        Labelled tile set (tiles.csv, consensus.csv, images).
    out_dir : path-like
        Output folder; must be new or empty unless ``force``.
    min_votes : int, optional
        Consensus features with fewer votes are dropped; default the contract's.
    n_worst : int, optional
        Number of worst tiles drawn.
    force : bool, optional
        Replace a non-empty ``out_dir``.
    **settings
        Keyword settings of :func:`error_breakdown`.

    Returns
    -------
    ErrorBreakdown
    """
    from detector.contract import DEFAULT_MIN_VOTES
    from detector.io import atomic_dir, write_json
    from detector.tileset import load_tileset

    from .report import _clean

    out_dir = Path(out_dir)
    if out_dir.exists() and any(out_dir.iterdir()) and not force:
        raise DetectorError(f"output folder {str(out_dir)!r} is not empty; choose another or pass force.")
    tileset = load_tileset(tileset_dir, min_votes=DEFAULT_MIN_VOTES if min_votes is None else min_votes)
    detections = pd.read_csv(detections_csv, dtype={"tile_id": str, "kind": str}).reset_index(drop=True)
    consensus = tileset.consensus.reset_index(drop=True)
    breakdown = error_breakdown(detections, consensus, tileset.tiles, **settings)
    with atomic_dir(out_dir, replace=True) as tmp:
        summary = write_error_analysis(breakdown, tileset.read_tile, tmp, n_worst=n_worst)
        write_json(tmp / "error_breakdown.json", _clean(summary))
    return breakdown
