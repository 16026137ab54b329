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
  ``expected_needed`` of :func:`training.effort.estimate_effort`);
* **hours** - the same in volunteer hours;
* **deposit area lost** - the share of the consensus deposit area in skipped
  tiles (estimate: the share measured on the model's held-out tiles);
* **machine F1** - object F1 pooled over the tiles routed to the machine
  (estimate: the F1 measured on held-out tiles), when any tile goes there.

Each row says whether the estimate's 90 % interval covered the actual value.
"""

import time
from pathlib import Path

import numpy as np
import pandas as pd

from detector.contract import TILES_FILE
from detector.errors import DetectorError
from detector.io import atomic_path, write_json

from ._json import jsonable
from ._subsets import write_subset
from .campaign import Campaign, remaining_classifications

__all__ = ["CAMPAIGN_STATES", "campaign_state", "backtest", "backtest_table"]

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


def _row(state, quantity, estimate, interval, actual):
    covered = None if interval is None or actual is None or not np.isfinite(actual) \
        else bool(interval[0] <= actual <= interval[1])
    error = None if estimate is None or actual is None or not np.isfinite(actual) else float(estimate - actual)
    return {"state": state, "quantity": quantity, "estimate": estimate, "interval_90": interval, "actual": actual,
            "error": error, "covered": covered}


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
        covered), ``routes`` (tiles per route), ``seconds``.
    """
    from detector.model import load_model
    from detector.screen import screen
    from detector.tileset import load_tileset

    from .effort import _read_screen, estimate_effort, route_tiles
    from .scoring import match_objects

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
    hidden = _hidden_copy(tileset, out / "hidden")
    screen_dir = out / "screen"
    log(f"backtest: screening {len(tileset.tiles)} tiles of {str(tileset_root)!r} without their consensus")
    screen(model_dir, [hidden], screen_dir, workers=workers, progress=False)
    tiles, detections = _read_screen(screen_dir)
    routed = route_tiles(tiles, card, detections=detections)
    ids = routed["tile_id"].astype(str)
    area = _consensus_area(tileset).reindex(ids).fillna(0.0).to_numpy()
    consensus = tileset.consensus
    n_cons = consensus.groupby("tile_id").size().reindex(ids).fillna(0).to_numpy()
    route = routed["route"].to_numpy()
    needs_people = (n_cons > 0) & (route != "machine") & (route != "nodata")
    actual_missed = float(area[route == "skip"].sum() / area.sum()) if area.sum() > 0 else float("nan")
    machine_ids = set(ids[route == "machine"])
    actual_machine_f1 = None
    if machine_ids:
        det = detections[detections["tile_id"].astype(str).isin(machine_ids)].reset_index(drop=True)
        cons = consensus[consensus["tile_id"].isin(machine_ids)].reset_index(drop=True)
        pairs = match_objects(det, cons)
        actual_machine_f1 = 2.0 * len(pairs) / (len(det) + len(cons)) if len(det) + len(cons) else None
    rows = []
    for k, state in enumerate(states):
        have = campaign_state(ids, state, campaign.classifications_needed, seed=seed + k)
        effort = estimate_effort(routed, card, campaign=campaign, have=have, seed=seed, n_boot=n_boot)
        rem = remaining_classifications(have.to_numpy(), campaign.classifications_needed)
        actual_needed = float(rem[needs_people].sum())
        per_hour = campaign.seconds / 3600.0
        est = effort["expected_needed"]
        rows.append(_row(state, "classifications truly needed", est["classifications"], est["interval_90"],
                         actual_needed))
        rows.append(_row(state, "hours truly needed", est["hours"],
                         None if est["interval_90"] is None else [v * per_hour for v in est["interval_90"]],
                         actual_needed * per_hour))
        rows.append(_row(state, "classifications sent to the crowd", float(effort["classifications"]),
                         effort["interval_90"]["classifications"], actual_needed))
        rows.append(_row(state, "deposit area lost by skipping", effort["missed_deposit_share"],
                         effort["interval_90"]["missed_deposit_share"], actual_missed))
        if actual_machine_f1 is not None:
            rows.append(_row(state, "machine F1", effort["machine"]["machine_f1"],
                             effort["interval_90"]["machine_f1"], actual_machine_f1))
    result = jsonable({
        "model_dir": str(model_dir), "tileset": str(tileset_root), "tiles": int(len(ids)),
        "deposit_tiles": int((n_cons > 0).sum()),
        "routes": {r: int((route == r).sum()) for r in ("skip", "machine", "crowd", "nodata")},
        "campaign": campaign.describe(), "seed": seed, "rows": rows,
        "seconds": round(time.perf_counter() - started, 1),
    })
    write_json(out / "backtest.json", result, indent=1)
    with atomic_path(out / "backtest.md") as tmp:
        tmp.write_text(backtest_table(result) + "\n", encoding="utf-8")
    log(backtest_table(result))
    return result


def _fmt(value, quantity):
    if value is None:
        return "n/a"
    if "share" in quantity or "lost" in quantity:
        return f"{value:.2%}"
    if "F1" in quantity:
        return f"{value:.2f}"
    if "hours" in quantity:
        return f"{value:,.1f}"
    return f"{value:,.0f}"


def backtest_table(result):
    """Markdown table of a backtest: estimate, interval, actual, error, covered."""
    lines = [f"Backtest on {result['tileset']} ({result['tiles']} tiles, {result['deposit_tiles']} with consensus "
             f"deposits; routes {', '.join(f'{k} {v}' for k, v in result['routes'].items())}; "
             f"{result['campaign']['classifications_needed']} classifications per tile)", "",
             "| campaign state | quantity | estimate | 90% interval | actual | error | covered |",
             "| --- | --- | --- | --- | --- | --- | --- |"]
    for r in result["rows"]:
        q = r["quantity"]
        iv = "n/a" if not r["interval_90"] else f"{_fmt(r['interval_90'][0], q)} - {_fmt(r['interval_90'][1], q)}"
        err = "n/a" if r["error"] is None else (f"{r['error']:+.2%}" if "lost" in q else
                                                f"{r['error']:+.2f}" if "F1" in q else
                                                f"{r['error']:+,.1f}" if "hours" in q else f"{r['error']:+,.0f}")
        cov = "n/a" if r["covered"] is None else ("yes" if r["covered"] else "no")
        lines.append(f"| {r['state']} | {q} | {_fmt(r['estimate'], q)} | {iv} | {_fmt(r['actual'], q)} | {err} | {cov} |")
    return "\n".join(lines)
