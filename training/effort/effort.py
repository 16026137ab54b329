"""``frostvane effort``: read a screening and the model that made it, route its tiles, estimate the effort left.

Routing (:mod:`training.effort.routing`) sets every threshold on the model card's held-out tiles; the
estimate (:mod:`training.effort.estimate`) counts what the crowd tiles still need and bootstraps it
over held-out images. This module checks that the screening belongs to the model, writes
``effort.json``, ``routes.csv`` and the plots, ranks the next tiles and fits the learning curve.
"""

import json
from pathlib import Path

import numpy as np
import pandas as pd

from detector.errors import DetectorError
from detector.io import atomic_path, write_json
from detector.inference.unfamiliar import DEFAULT_PASS_SHARE

from .._json import jsonable as _jsonable
from .campaign import Campaign, read_classifications, remaining_classifications
from .estimate import _aligned_have, effort_summary, estimate_effort
from .routing import (
    _check_settings,
    _SCREEN_REQUIRED,
    DEFAULT_MAX_DIRECTION_ERROR,
    DEFAULT_MIN_F1,
    DEFAULT_RECALL,
    route_tiles,
)

__all__ = [
    "ScreenModelMismatch",
    "check_screen_model",
    "run_effort",
    "write_next_tiles",
    "write_effort_outputs",
]


class ScreenModelMismatch(DetectorError, ValueError):
    """A screening folder was made by another model than the one given to ``effort``."""


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
    unf = pd.to_numeric(tiles["unfamiliarity"], errors="coerce")
    wrong = tiles.index[(unf.isna() & tiles["unfamiliarity"].notna()) | (unf < 0)]
    if len(wrong):
        row = int(wrong[0])
        raise DetectorError(f"{str(path)!r} row {row + 1}: unfamiliarity {tiles['unfamiliarity'].iloc[row]} is not "
                            f"a distance (a number >= 0).")
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
    log(f"next tiles for volunteers (uncertain objects x diversity): {top}{' ...' if len(ranked) > 5 else ''}; "
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
