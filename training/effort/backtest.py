"""Backtest of the effort estimate: hide a labelled tile set's consensus, screen it, estimate, then compare.

For a tile set whose consensus is known (invented scenes from ``frostvane
synth`` with fixed seeds, or a finished part of a real campaign), the
consensus is withheld from the screening (the screened copy has no
``consensus.csv``), the screened tiles are routed and the effort estimated as
for new images, and the estimate is compared with what the hidden catalog
says, for several campaign states (how many classifications the tiles
already have):

* **classifications truly needed** - the classifications left on the tiles that
  hold consensus deposits and are not trusted to the machine (estimate:
  ``expected_needed`` of :func:`training.effort.estimate.estimate_effort`, with its 90 %
  prediction interval);
* **hours** - the same in volunteer hours (not counted as a second check);
* **classifications truly needed on skipped tiles** - what the skip route
  withholds from tiles that hold deposits;
* **deposit area lost** - the share of the consensus deposit area in skipped
  tiles (estimate: the share measured on the model's held-out tiles); one
  check for all campaign states;
* **machine F1** and **machine direction error** - pooled object F1 and median
  fan direction error on the tiles routed to the machine (estimate: the
  held-out figures with their interval, or their range when fewer than five
  held-out images carry machine tiles), when any tile goes there.

Each row says whether the estimate's interval covered the actual value. Beside
the rows, every route states its promise, what the held-out tiles measured and
what the hidden catalog shows; a route no tile reached says so.
"""

import time
from pathlib import Path

import numpy as np
import pandas as pd

from detector.contract import TILES_FILE
from detector.errors import DetectorError
from detector.io import atomic_path, write_json

from .._json import jsonable
from .._subsets import write_subset
from .campaign import Campaign, remaining_classifications

__all__ = ["CAMPAIGN_STATES", "campaign_state", "jeffreys_interval", "machine_measured", "route_promises", "backtest",
           "backtest_table"]

#: Campaign states a backtest replays: how many classifications tiles already have.
CAMPAIGN_STATES = ("fresh", "half-classified", "nearly done")


def campaign_state(tile_ids, state, needed, *, seed=0):
    """Classifications each tile already has in an invented campaign state.

    Parameters
    ----------
    tile_ids : sequence of str
    state : {"fresh", "half-classified", "nearly done"}
        ``fresh``: none; ``half-classified``: each tile a uniform whole number in
        [0, needed] (half the work done on average); ``nearly done``: 90 % of
        the tiles finished, the others uniform in [0, needed).
    needed : int
        Classifications a tile needs.
    seed : int, default=0

    Returns
    -------
    have : Series of int64 indexed by tile_id
    """
    ids = pd.Index([str(t) for t in tile_ids], name="tile_id")
    rng = np.random.default_rng(seed)
    if state == "fresh":
        have = np.zeros(len(ids), dtype=np.int64)
    elif state == "half-classified":
        have = rng.integers(0, needed + 1, size=len(ids))
    elif state == "nearly done":
        done = rng.random(len(ids)) < 0.9
        have = np.where(done, needed, rng.integers(0, needed, size=len(ids)))
    else:
        raise DetectorError(f"unknown campaign state {state!r} (valid: {', '.join(CAMPAIGN_STATES)}).")
    return pd.Series(have.astype(np.int64), index=ids, name="classifications")


def _hidden_copy(tileset, folder):
    """The tile table and images alone (no consensus.csv): the screening cannot see the catalog."""
    tiles_raw = pd.read_csv(Path(tileset.root) / TILES_FILE, dtype=str, keep_default_na=False)
    tiles_raw = tiles_raw[[c for c in tiles_raw.columns if c != "classifications"]]
    write_subset(tileset.root, tiles_raw, None, set(tiles_raw["tile_id"]), folder)
    return folder


def _consensus_area(tileset):
    from detector.labels import rasterise_features

    area = {}
    for tile_id, shape in zip(tileset.tiles["tile_id"], _shapes(tileset)):
        masks = rasterise_features(tileset.features_of(tile_id), shape)
        area[tile_id] = int((masks.fan_cover | masks.spot_cover).sum())
    return pd.Series(area, dtype=np.float64)


def _shapes(tileset):
    from detector.io import read_image

    return [read_image(Path(tileset.root) / p).shape for p in tileset.tiles["path"]]


def _row(state, quantity, estimate, interval, actual, *, interval_kind="90% interval"):
    covered = None if interval is None or actual is None or not np.isfinite(actual) \
        else bool(interval[0] <= actual <= interval[1])
    error = None if estimate is None or actual is None or not np.isfinite(actual) else float(estimate - actual)
    row = {"state": state, "quantity": quantity, "estimate": estimate, "interval_90": interval, "actual": actual,
           "error": error, "covered": covered}
    if interval_kind != "90% interval":
        row["interval_kind"] = interval_kind
    return row


def jeffreys_interval(k, n, level=0.90):
    """Jeffreys interval of a binomial proportion: quantiles of Beta(k + 1/2, n - k + 1/2).

    The lower end is 0 when ``k == 0`` and the upper end 1 when ``k == n``
    (Brown, Cai and DasGupta, "Interval estimation for a binomial proportion",
    Statistical Science 16(2), 101-133, 2001, section 4.1.2).

    Returns
    -------
    (low, high) : tuple of float, or None when ``n == 0``
    """
    from scipy.stats import beta

    if n <= 0:
        return None
    a = (1.0 - level) / 2.0
    low = 0.0 if k == 0 else float(beta.ppf(a, k + 0.5, n - k + 0.5))
    high = 1.0 if k == n else float(beta.ppf(1.0 - a, k + 0.5, n - k + 0.5))
    return low, high


def machine_measured(detections, consensus, tile_ids):
    """What the machine's catalog holds on some tiles, scored against the hidden consensus.

    The evaluation's own matching (:func:`training.evaluation.matching.match_objects`),
    summed as on the held-out tiles: pooled object F1 ``2 * matched /
    (detections + consensus features)`` and the median over tiles of each
    tile's median fan direction error (tiles without a matched fan left out).

    Parameters
    ----------
    detections, consensus : DataFrame
        Detections (the screen's detections.csv) and the consensus catalog.
    tile_ids : iterable of str

    Returns
    -------
    measured : dict
        ``tiles``, ``detections``, ``consensus``, ``matched``, ``f1`` (None
        without detections and consensus), ``direction_median_deg`` (None
        without matched fans), ``tiles_with_matched_fans``.
    """
    from ..evaluation.matching import match_objects

    ids = {str(t) for t in tile_ids}
    det = detections[detections["tile_id"].astype(str).isin(ids)].reset_index(drop=True)
    cons = consensus[consensus["tile_id"].astype(str).isin(ids)].reset_index(drop=True)
    pairs = match_objects(det, cons) if len(det) and len(cons) else pd.DataFrame(
        columns=["tile_id", "kind", "direction_error_deg"])
    den = len(det) + len(cons)
    fans = pairs[pairs["kind"] == "fan"]
    per_tile = fans.groupby("tile_id")["direction_error_deg"].median() if len(fans) else pd.Series(dtype=float)
    return {"tiles": len(ids), "detections": int(len(det)), "consensus": int(len(cons)), "matched": int(len(pairs)),
            "f1": 2.0 * len(pairs) / den if den else None,
            "direction_median_deg": float(per_tile.median()) if len(per_tile) else None,
            "tiles_with_matched_fans": int(len(per_tile))}


def route_promises(routed, effort, *, area, n_consensus, machine=None):
    """Per route: the promise, what the held-out tiles measured and what the hidden catalog shows.

    Parameters
    ----------
    routed : DataFrame
        :func:`training.effort.routing.route_tiles` output (``route``, ``unfamiliar``,
        ``confidence``, ``n_detections``, ``p_deposit``; ``attrs["thresholds"]``).
    effort : dict
        :func:`training.effort.estimate.estimate_effort` of the same routing.
    area, n_consensus : ndarray of shape (n,)
        Consensus deposit area (px) and consensus features of each routed tile.
    machine : dict, optional
        :func:`machine_measured` on the machine tiles; needed when any tile went there.

    Returns
    -------
    promises : list of dict
        One per route (unfamiliar, skip, machine, crowd): ``route``, ``tiles``,
        ``promise``, ``heldout`` (text), ``measured`` (numbers), ``backtest``
        (text), ``kept`` (True, False, or None when not tested), ``tested``.
    """
    th = routed.attrs.get("thresholds", effort.get("thresholds", {}))
    route = routed["route"].astype(str).to_numpy()
    area = np.asarray(area, dtype=np.float64)
    deposit = np.asarray(n_consensus) > 0
    active = route != "nodata"
    iv = effort["interval_90"]
    out = []

    unfamiliar = routed["unfamiliar"].to_numpy(bool) & active
    n_active = int(active.sum())
    passed = n_active - int(unfamiliar.sum())
    share = passed / n_active if n_active else None
    jeff = jeffreys_interval(passed, n_active)
    pass_share = th.get("pass_share")
    out.append({
        "route": "unfamiliar", "tiles": int(unfamiliar.sum()), "tested": bool(n_active),
        "promise": f"{pass_share:.0%} of tiles like the held-out ones pass the unfamiliarity check",
        "heldout": th.get("unfamiliar_note", ""),
        "measured": {"passed": passed, "tiles": n_active, "pass_share": share, "jeffreys_90": jeff},
        "backtest": "no tile with data" if not n_active else
        f"{passed} of {n_active} tiles pass ({share:.0%}; Jeffreys 90% interval {jeff[0]:.0%}-{jeff[1]:.0%})",
        "kept": None if not n_active else bool(jeff[1] >= pass_share),
    })

    skip = route == "skip"
    recall = th.get("recall")
    lost = float(area[skip].sum() / area.sum()) if area.sum() > 0 else None
    missed = effort.get("missed_deposit_share")
    out.append({
        "route": "skip", "tiles": int(skip.sum()), "tested": lost is not None,
        "promise": f"at most {1 - recall:.0%} of the deposit area is lost",
        "heldout": "no held-out deposits" if missed is None else
        f"{missed:.2%} lost (90% on left-out images {_fmt_pair(iv.get('missed_deposit_share'), '{:.2%}')})",
        "measured": {"deposit_area_lost": lost, "skipped_deposit_tiles": int((skip & deposit).sum())},
        "backtest": "the hidden catalog holds no deposit area" if lost is None else
        f"{lost:.2%} of the deposit area lost; {int((skip & deposit).sum())} of the {int(skip.sum())} skipped tiles "
        f"hold consensus deposits",
        "kept": None if lost is None else bool(lost <= 1 - recall + 1e-12),
    })

    out.append(_machine_promise(routed, effort, th, route, machine))

    crowd = route == "crowd"
    n_dep = int((deposit & active).sum())
    out.append({
        "route": "crowd", "tiles": int(crowd.sum()), "tested": False,
        "promise": "none: volunteers classify these tiles",
        "heldout": "",
        "measured": {"deposit_tiles": int((crowd & deposit).sum()), "tiles_without_deposits": int((crowd & ~deposit).sum())},
        "backtest": f"{int((crowd & deposit).sum())} of the {n_dep} tiles holding consensus deposits; "
                    f"{int((crowd & ~deposit).sum())} crowd tile(s) hold none",
        "kept": None,
    })
    return out


def _machine_promise(routed, effort, th, route, machine):
    held = effort["machine"]
    spread = held.get("spread") or {}
    threshold = th.get("machine_confidence")
    promise = th.get("machine_promise", "")
    if held.get("machine_tiles"):
        heldout = (f"F1 {held['machine_f1']:.2f}, direction {held['machine_direction_median_deg']:.1f} deg on "
                   f"{held['machine_tiles']} held-out tiles; {spread.get('label', '')}: F1 "
                   f"{_fmt_pair(spread.get('f1'), '{:.2f}')}, direction "
                   f"{_fmt_pair(spread.get('direction_median_deg'), '{:.1f}')} deg")
    else:
        heldout = "no held-out tile keeps the promise at any confidence: the route is closed"
    entry = {"route": "machine", "tiles": int((route == "machine").sum()), "promise": promise, "heldout": heldout,
             "heldout_spread": spread}
    if not entry["tiles"]:
        eligible = (route != "nodata") & ~routed["unfamiliar"].to_numpy(bool) & (route != "skip") \
            & (routed["n_detections"].to_numpy() > 0)
        best = float(routed["confidence"].to_numpy(np.float64)[eligible].max()) if eligible.any() else None
        if threshold is None:
            why = "the route is closed (no confidence threshold keeps the promise on the held-out tiles)"
        else:
            why = (f"its confidence threshold (mean detection score {threshold:.3f}) is met by "
                   f"{held.get('machine_tiles', 0)} held-out tile(s) and by none of these tiles"
                   + (f" (highest {best:.3f})" if best is not None else " (none has detections and passes the "
                                                                        "other routes)"))
        entry.update(tested=False, kept=None, measured=None,
                     backtest=f"no tile reached the machine route: {why}; its promise was not tested")
        return entry
    if machine is None:
        raise DetectorError("tiles went to the machine route but no machine measurement was given.")
    f1, err = machine["f1"], machine["direction_median_deg"]
    kept = f1 is not None and f1 >= th.get("min_f1", 0.0) and (err is None or err <= th.get("max_direction_error_deg", 180.0))
    inside = {k: (None if v is None or not spread.get(key) else bool(spread[key][0] <= v <= spread[key][1]))
              for k, v, key in (("f1", f1, "f1"), ("direction", err, "direction_median_deg"))}
    entry.update(tested=True, kept=bool(kept), measured={**machine, "within_heldout_spread": inside},
                 backtest=f"{entry['tiles']} tile(s): F1 {_fmt_num(f1, '{:.2f}')} ({machine['matched']} matched of "
                          f"{machine['detections']} detections and {machine['consensus']} consensus features), "
                          f"direction {_fmt_num(err, '{:.1f}')} deg over {machine['tiles_with_matched_fans']} tile(s) "
                          f"with matched fans")
    return entry


def _fmt_pair(values, fmt):
    return "n/a" if not values else f"{fmt.format(values[0])}-{fmt.format(values[1])}"


def _fmt_num(value, fmt):
    return "n/a" if value is None else fmt.format(value)


def backtest(model_dir, tileset_root, out, *, campaign=None, states=CAMPAIGN_STATES, seed=0, workers=1,
             n_boot=1000, log=print):
    """Replay the effort estimate on a labelled tile set whose consensus is hidden, for several campaign states.

    Parameters
    ----------
    model_dir : path-like
        The model; none of the tile set's images should have been used to train it.
    tileset_root : path-like
        A labelled tile set (the hidden catalog).
    out : path-like
        Folder for the screening (``screen/``), ``backtest.json`` and ``backtest.md``.
    campaign : Campaign, optional
        Classifications needed and seconds per classification; its own
        ``classifications`` source is not used (the states stand in for it).
    states : sequence of str, default=CAMPAIGN_STATES
    seed : int, default=0
        Seed of the campaign states and the bootstrap.
    workers : int, default=1
        Screening processes.

    Returns
    -------
    result : dict
        ``rows`` (state, quantity, estimate, interval_90, actual, error,
        covered; state ``all states`` for checks no campaign state changes),
        ``promises`` (per route: promise, held-out, backtest, kept; see
        :func:`route_promises`), ``machine_tested`` and ``machine_statement``,
        ``crowd_workload`` per state, ``routes`` (tiles per route),
        ``checks`` (covered of counted), ``seconds``.
    """
    from detector.inference.model import load_model
    from detector.screening.run import screen
    from detector.tileset import load_tileset

    from .effort import _read_screen
    from .estimate import estimate_effort
    from .routing import route_tiles

    started = time.perf_counter()
    campaign = Campaign() if campaign is None else campaign
    out = Path(out)
    tileset = load_tileset(tileset_root)
    card = load_model(model_dir).card
    seen = set(card["training"]["images"]["fit"]) | set(card["training"]["images"]["calibration"])
    overlap = sorted(seen & set(tileset.image_ids))
    if overlap:
        raise DetectorError(f"the model was fitted or calibrated on image(s) {overlap[:3]!r} of {str(tileset_root)!r}; "
                            f"a backtest needs images the model never saw.")
    screen_dir = out / "screen"
    ours = [p for p in (out / "hidden", screen_dir, out) if not p.exists()]
    try:
        hidden = _hidden_copy(tileset, out / "hidden")
        log(f"backtest: screening {len(tileset.tiles)} tiles of {str(tileset_root)!r} without their consensus")
        screen(model_dir, [hidden], screen_dir, workers=workers, progress=False)
    except Exception:
        # A refused screening (bad --workers, an image it cannot read) leaves no hidden copy behind.
        import shutil

        for path in ours:
            shutil.rmtree(path, ignore_errors=True)
        raise
    tiles, detections = _read_screen(screen_dir)
    routed = route_tiles(tiles, card, detections=detections)
    ids = routed["tile_id"].astype(str)
    area = _consensus_area(tileset).reindex(ids).fillna(0.0).to_numpy()
    consensus = tileset.consensus
    n_cons = consensus.groupby("tile_id").size().reindex(ids).fillna(0).to_numpy()
    route = routed["route"].to_numpy()
    needs_people = (n_cons > 0) & (route != "machine") & (route != "nodata")
    skip = route == "skip"
    machine_ids = set(ids[route == "machine"])
    machine = machine_measured(detections, consensus, machine_ids) if machine_ids else None
    per_hour = campaign.seconds / 3600.0
    rows, workload, promises = [], {}, None
    for k, state in enumerate(states):
        have = campaign_state(ids, state, campaign.classifications_needed, seed=seed + k)
        effort = estimate_effort(routed, card, campaign=campaign, have=have, seed=seed, n_boot=n_boot)
        rem = remaining_classifications(have.to_numpy(), campaign.classifications_needed)
        actual_needed = float(rem[needs_people].sum())
        est = effort["expected_needed"]
        kind = "90% prediction interval"
        rows.append(_row(state, "classifications truly needed", est["classifications"], est["interval_90"],
                         actual_needed, interval_kind=kind))
        rows.append(_row(state, "hours truly needed", est["hours"],
                         None if est["interval_90"] is None else [v * per_hour for v in est["interval_90"]],
                         actual_needed * per_hour, interval_kind=kind))
        rows.append(_row(state, "classifications truly needed on skipped tiles",
                         est["on_skipped_tiles"]["classifications"], est["on_skipped_tiles"]["interval_90"],
                         float(rem[needs_people & skip].sum()), interval_kind=kind))
        workload[state] = {"classifications": effort["classifications"],
                           "routing_interval_90": effort["interval_90"]["classifications"],
                           "calibration_only_interval_90": est["interval_90_calibration_only"]}
        if promises is None:
            promises = route_promises(routed, effort, area=area, n_consensus=n_cons, machine=machine)
            rows += _state_free_rows(effort, area, skip, machine)
    result = jsonable(_result(model_dir, tileset_root, ids, n_cons, route, campaign, seed, rows, promises, workload,
                              started))
    write_json(out / "backtest.json", result, indent=1)
    with atomic_path(out / "backtest.md") as tmp:
        tmp.write_text(backtest_table(result) + "\n", encoding="utf-8")
    log(backtest_table(result))
    return result


def _state_free_rows(effort, area, skip, machine):
    """Checks no campaign state changes: counted once."""
    state = "all states"
    actual_missed = float(area[skip].sum() / area.sum()) if area.sum() > 0 else float("nan")
    rows = [_row(state, "deposit area lost by skipping", effort["missed_deposit_share"],
                 effort["interval_90"]["missed_deposit_share"], actual_missed,
                 interval_kind="90% out-of-bag interval over held-out images")]
    if machine is not None:
        spread = effort["machine"].get("spread") or {}
        kind = spread.get("label", "")
        rows.append(_row(state, "machine F1", effort["machine"]["machine_f1"], spread.get("f1"),
                         machine["f1"] if machine["f1"] is not None else float("nan"), interval_kind=kind))
        rows.append(_row(state, "machine direction error (deg)", effort["machine"]["machine_direction_median_deg"],
                         spread.get("direction_median_deg"),
                         machine["direction_median_deg"] if machine["direction_median_deg"] is not None
                         else float("nan"), interval_kind=kind))
    return rows


def _result(model_dir, tileset_root, ids, n_cons, route, campaign, seed, rows, promises, workload, started):
    machine = next(p for p in promises if p["route"] == "machine")
    counted = [r for r in rows if r["covered"] is not None and not r["quantity"].startswith("hours")]
    return {
        "model_dir": str(model_dir), "tileset": str(tileset_root), "tiles": int(len(ids)),
        "deposit_tiles": int((n_cons > 0).sum()),
        "routes": {r: int((route == r).sum()) for r in ("skip", "machine", "crowd", "nodata")},
        "campaign": campaign.describe(), "seed": seed, "rows": rows,
        "checks": {"covered": sum(bool(r["covered"]) for r in counted), "counted": len(counted),
                   "note": "hours rows repeat the classification rows in hours and are not counted again; "
                           "rows of 'all states' are counted once"},
        "promises": promises,
        "machine_tested": machine["tested"],
        "machine_statement": machine["backtest"],
        "crowd_workload": workload,
        "seconds": round(time.perf_counter() - started, 1),
    }


def _fmt(value, quantity):
    if value is None:
        return "n/a"
    if "share" in quantity or "lost" in quantity:
        return f"{value:.2%}"
    if "F1" in quantity:
        return f"{value:.2f}"
    if "hours" in quantity or "deg" in quantity:
        return f"{value:,.1f}"
    return f"{value:,.0f}"


def _fmt_error(value, quantity):
    if value is None:
        return "n/a"
    if "lost" in quantity:
        return f"{value:+.2%}"
    if "F1" in quantity:
        return f"{value:+.2f}"
    if "hours" in quantity or "deg" in quantity:
        return f"{value:+,.1f}"
    return f"{value:+,.0f}"


def backtest_table(result):
    """Markdown summary of a backtest: the checks (estimate, interval, actual, error, covered), then each route's promise."""
    lines = [f"Backtest on {result['tileset']} ({result['tiles']} tiles, {result['deposit_tiles']} with consensus "
             f"deposits; routes {', '.join(f'{k} {v}' for k, v in result['routes'].items())}; "
             f"{result['campaign']['classifications_needed']} classifications per tile)", "",
             "| campaign state | quantity | estimate | 90% interval | actual | error | covered |",
             "| --- | --- | --- | --- | --- | --- | --- |"]
    for r in result["rows"]:
        q = r["quantity"]
        iv = "n/a" if not r["interval_90"] else f"{_fmt(r['interval_90'][0], q)} - {_fmt(r['interval_90'][1], q)}"
        if r.get("interval_kind", "").startswith("range"):
            iv += " (range)"
        cov = "n/a" if r["covered"] is None else ("yes" if r["covered"] else "no")
        lines.append(f"| {r['state']} | {q} | {_fmt(r['estimate'], q)} | {iv} | {_fmt(r['actual'], q)} | "
                     f"{_fmt_error(r['error'], q)} | {cov} |")
    checks = result.get("checks")
    if checks:
        lines += ["", f"The intervals covered {checks['covered']} of {checks['counted']} checks ({checks['note']})."]
    kinds = sorted({r["interval_kind"] for r in result["rows"] if r.get("interval_kind")})
    if kinds:
        lines.append("Intervals: " + "; ".join(kinds) + ".")
    promises = result.get("promises")
    if promises:
        lines += ["", "| route | tiles | promise | held-out | this tile set | kept |", "| --- | --- | --- | --- | --- | --- |"]
        for p in promises:
            kept = "not tested" if p["kept"] is None else ("yes" if p["kept"] else "no")
            lines.append(f"| {p['route']} | {p['tiles']} | {p['promise']} | {p['heldout'] or '-'} | {p['backtest']} | "
                         f"{kept} |")
    if result.get("machine_tested") is False:
        statement = result["machine_statement"]
        lines += ["", f"{statement[:1].upper()}{statement[1:]}."]
    workload = result.get("crowd_workload")
    if workload:
        lines += ["", "Sent to the crowd (a routing figure, not an estimate of the need): " + "; ".join(
            f"{state} {w['classifications']:,} classifications (re-routed by resample, 90%: "
            f"{_fmt_pair(w['routing_interval_90'], '{:,.0f}')})" for state, w in workload.items()) + "."]
    return "\n".join(lines)
