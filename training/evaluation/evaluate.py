"""Run a model over labelled tiles and score it against consensus (and the truth ceiling)."""

from pathlib import Path

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from detector.objects.assemble import OBJECT_COLUMNS
from detector.contract import DETECTION_COLUMNS, TRUTH_FILE
from detector.inference.detect import detect_block
from detector.errors import DetectorError, TileSetError
from detector.tile.features import patch_targets
from detector.tile.scale import frame_factors, to_read_frame
from detector.io import atomic_dir, atomic_path
from detector.labels import rasterise_features
from detector.inference.model import CLASS_NAMES, cached_model, load_model
from detector.tileset import load_tileset
from detector.inference.unfamiliar import unfamiliarity_score
from detector._allocator import reuse_freed_memory

from .bootstrap import resample_counts
from .diagnose import error_breakdown, write_error_analysis
from .matching import match_objects
from .directions import matched_fans
from .scoring import patch_metrics, score_catalogs

__all__ = ["run_on_tiles", "tile_blocks", "unfamiliar_flags", "evaluate_tiles", "tune_assembly",
           "paired_standard_error_choice", "summarise_for_card", "evaluate_model", "write_detections_csv",
           "confidence_validation"]


def _run_block(model, tileset, tile_ids, tau, min_score=None, at_model_scale=False):
    """Detections and patch targets of the labelled tiles of one context block (``model`` is a Model
    or a model folder), one tuple per tile."""
    reuse_freed_memory()
    if not hasattr(model, "feature_spec"):
        model = cached_model(model)
    spec = model.feature_spec
    tiles = [tileset.read_tile(tid) for tid in tile_ids]
    nodata = [tile == spec.nodata_value for tile in tiles]
    # detect_block prepares each tile once (smoothing it when it is noisier than the fitting tiles);
    # the patch targets need only its grid.
    results = detect_block(model, tiles, tile_ids=tile_ids, nodata_masks=nodata, min_score=min_score,
                           metres_per_px=[tileset.metres_per_px(tid) if at_model_scale else None
                                          for tid in tile_ids])
    out = []
    for tile_id, tile, result in zip(tile_ids, tiles, results):
        grid = result.grid
        # The patch grid is in the frame the tile was read in (resampled when its scale is not the model's).
        features = tileset.features_of(tile_id)
        if result.resampled:
            features = to_read_frame(features, *frame_factors(tile.shape, result.read_shape))
        masks = rasterise_features(features, result.read_shape)
        targets = patch_targets(grid, masks.fan_cover, masks.spot_cover, masks.fan_direction, tau=tau)
        valid = np.asarray(grid.valid, dtype=bool)
        info = {"tile_id": tile_id, "p_deposit": result.p_deposit, "summary": result.summary,
                "consensus_px": int((masks.fan_cover | masks.spot_cover).sum()),
                "shape": tile.shape, "valid_fraction": result.valid_fraction,
                "noise": result.noise, "smoothed": result.smoothed, "resampled": result.resampled}
        out.append((result.detections, np.asarray(targets.label)[valid], result.proba[valid], info))
    return out


def tile_blocks(tileset, tile_ids):
    """The tile ids gathered by context block (:func:`detector.objects.context.context_blocks`), each
    block in the order of ``tile_ids``, blocks in the order of their first tile."""
    from detector.objects.context import context_blocks

    tile_ids = list(tile_ids)
    tiles = tileset.tiles.set_index("tile_id").loc[tile_ids]
    blocks = context_blocks(tiles["image_id"], tiles["row0"], tiles["col0"], tiles["width"], tiles["height"])
    return [[tile_ids[i] for i in block] for block in blocks]


def run_on_tiles(model, tileset, tile_ids, *, tau=None, desc="detect", workers=1, min_score=None,
                 at_model_scale=False):
    """Detections and patch-level targets of the model on labelled tiles.

    The tiles are read by context block (:func:`tile_blocks`), as screening reads them; the
    results come back in the order of ``tile_ids``.

    Parameters
    ----------
    model : Model
    tileset : TileSet
    tile_ids : sequence of str
    tau : float, optional
        Coverage threshold for the patch targets; default the model's training tau.
    workers : int, default=1
        Local worker processes (joblib), one block at a time; each loads the model from its folder
        once. Inside :func:`training.parallel.on_cluster` the blocks go to the Dask cluster
        instead, whose workers must see the model folder and the tile set by the
        same absolute paths.
    min_score : float, optional
        Smallest object score kept; default the model card's.
    at_model_scale : bool, default=False
        Pass each tile's ``metres_per_px`` to :func:`detector.inference.detect.detect_block`, so that a
        tile outside the model's ground scale is read resampled to it.

    Returns
    -------
    run : dict
        ``detections`` (DataFrame, OBJECT_COLUMNS), ``patch_true`` (int array),
        ``patch_proba`` (n, 3), ``per_tile`` (list of dict: tile_id, p_deposit,
        summary...).
    """
    from joblib import delayed

    from ..parallel import current_cluster, tile_parallel

    tau = float(model.card["training"]["config"]["tau"]) if tau is None else tau
    tile_ids = list(tile_ids)
    blocks = tile_blocks(tileset, tile_ids)
    iterator = tqdm(blocks, desc=desc, unit="block", leave=False, disable=None)  # None: quiet off a terminal
    if workers > 1 or current_cluster() is not None:
        folder = str(Path(model.folder).absolute())  # workers may run in another folder
        done = tile_parallel(workers)(delayed(_run_block)(folder, tileset, block, tau, min_score, at_model_scale)
                                      for block in iterator)
    else:
        done = [_run_block(model, tileset, block, tau, min_score, at_model_scale) for block in iterator]
    by_tile = {r[3]["tile_id"]: r for part in done for r in part}
    results = [by_tile[tid] for tid in tile_ids]
    frames = [r[0] for r in results if len(r[0])]
    detections = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=OBJECT_COLUMNS)
    return {
        "detections": detections,
        "patch_true": np.concatenate([r[1] for r in results]) if results else np.zeros(0, int),
        "patch_proba": np.concatenate([r[2] for r in results]) if results else np.zeros((0, 3)),
        "per_tile": [r[3] for r in results],
    }


def _tiles_frame(tileset, tile_ids):
    tiles = tileset.tiles
    return tiles[tiles["tile_id"].isin(list(tile_ids))].reset_index(drop=True)


def _consensus_of(tileset, tile_ids):
    cons = tileset.consensus
    return cons[cons["tile_id"].isin(list(tile_ids))].reset_index(drop=True)


def _prevailing(model):
    return model.card.get("training", {}).get("prevailing_deg")


#: Bootstrap resamples of the calibration images behind the standard error of :func:`tune_assembly`.
TUNING_BOOTSTRAP = 500


#: A shortfall of mean F1 this small is within reach of the best whatever its standard error: the
#: benchmark reports F1 to two decimals, and with many calibration images the paired standard error
#: alone shrinks towards 0 and would keep the plain maximum.
TUNING_TOLERANCE = 0.01


def tune_assembly(model_dir, tileset, tile_ids, *, log=print, workers=1, seed=0):
    """Choose the smallest object score kept on some tiles: the least strict threshold whose mean object
    F1 cannot be told from the best.

    Mean object F1 is the mean of fan and spot F1 over the tiles (pooled counts). Every threshold is
    scored on the same :data:`TUNING_BOOTSTRAP` resamples of the tiles' images, and a threshold is
    within reach of the best when its shortfall is at most the standard error of that shortfall over
    the resamples (paired: both thresholds see the same images), or at most
    :data:`TUNING_TOLERANCE` (see :func:`paired_standard_error_choice`). This is the
    one-standard-error rule (Hastie, Tibshirani and Friedman, *The Elements of Statistical Learning*,
    2nd ed., section 7.10) with the paired difference in place of the best's own spread: with a few
    calibration images the spread of F1 itself is large (what images happen to be drawn moves every
    threshold alike) and would reach far below the best. Of the thresholds within reach the least
    strict is kept, because images unlike the training ones score their deposits lower (measured in
    the README's benchmark section).

    Returns
    -------
    tuning : dict
        ``min_score``, ``best_min_score`` (the plain maximum), ``standard_error`` (of the kept
        threshold's shortfall), ``tolerance`` and ``table`` (every threshold tried with its F1s and
        the standard error of its shortfall, ``se_shortfall``).
    """
    model = load_model(model_dir)
    run = run_on_tiles(model, tileset, tile_ids, desc="tune", workers=workers, min_score=0.0)
    consensus = _consensus_of(tileset, tile_ids)
    image = tileset.tiles.set_index("tile_id")["image_id"]
    images = np.array(sorted({str(image[t]) for t in tile_ids}), dtype=object)
    index = {name: i for i, name in enumerate(images)}

    def per_image(frame):
        return np.bincount([index[str(image[t])] for t in frame["tile_id"]], minlength=len(images))

    cons = {k: per_image(consensus[consensus["kind"] == k]) for k in ("fan", "spot")}
    rng = np.random.default_rng(seed)
    weights = resample_counts(rng, len(images), TUNING_BOOTSTRAP)
    table, boot = [], []
    det_all = run["detections"]
    for min_score in np.round(np.arange(0.05, 0.9, 0.05), 2):
        det = det_all[det_all["score"] >= min_score].reset_index(drop=True)
        pairs = match_objects(det, consensus.reset_index(drop=True))
        row, resampled = {"min_score": float(min_score)}, []
        for kind in ("fan", "spot"):
            tp = per_image(pairs[pairs["kind"] == kind])
            n = per_image(det[det["kind"] == kind]) + cons[kind]
            row[f"{kind}_f1"] = 2 * tp.sum() / n.sum() if n.sum() else 1.0
            w_n = weights @ n
            resampled.append(np.divide(2.0 * (weights @ tp), w_n, out=np.ones(len(weights)), where=w_n > 0))
        row["mean_f1"] = (row["fan_f1"] + row["spot_f1"]) / 2
        table.append(row)
        boot.append((resampled[0] + resampled[1]) / 2)
    chosen, best, ses = paired_standard_error_choice([row["mean_f1"] for row in table], boot)
    for row, se in zip(table, ses):
        row["se_shortfall"] = se
    pick = table[chosen]
    log(f"assembly: min_score {pick['min_score']:.2f} (mean object F1 {pick['mean_f1']:.3f}: fan {pick['fan_f1']:.3f}, "
        f"spot {pick['spot_f1']:.3f}), the least strict within reach of the best ({table[best]['mean_f1']:.3f} at "
        f"{table[best]['min_score']:.2f}; shortfall standard error {ses[chosen]:.3f}, tolerance {TUNING_TOLERANCE}) "
        f"on the calibration images")
    return {"min_score": pick["min_score"], "best_min_score": table[best]["min_score"],
            "standard_error": ses[chosen], "tolerance": TUNING_TOLERANCE, "table": table}


def paired_standard_error_choice(scores, resampled, tolerance=TUNING_TOLERANCE):
    """The first candidate (in the order given, least strict first) whose shortfall from the best is
    within one standard error of that shortfall, or within ``tolerance``.

    The one-standard-error rule (Hastie, Tibshirani and Friedman, *The Elements of Statistical
    Learning*, 2nd ed., section 7.10), with the standard error of the paired difference: candidate
    ``i`` and the best are scored on the same resamples, and the spread (``ddof=1``) of
    ``resampled[best] - resampled[i]`` is the standard error of the shortfall
    ``scores[best] - scores[i]``.

    Parameters
    ----------
    scores : sequence of float
        One score per candidate, higher is better.
    resampled : sequence of 1-D arrays
        Each candidate's score over the same bootstrap resamples. Fewer than two resamples give
        standard errors of 0.
    tolerance : float, optional
        A shortfall at most this large is always within reach.

    Returns
    -------
    chosen, best : int
        Indices of the chosen and of the best candidate.
    standard_errors : list of float
        Standard error of each candidate's shortfall (0 for the best).
    """
    scores = np.asarray(scores, dtype=float)
    best = int(np.argmax(scores))
    boot = [np.asarray(r, dtype=float) for r in resampled]
    ses = [float(np.std(boot[best] - r, ddof=1)) if r.size > 1 else 0.0 for r in boot]
    reach = np.maximum(np.asarray(ses), tolerance)
    chosen = int(np.flatnonzero(scores >= scores[best] - reach)[0])
    return chosen, best, ses


def unfamiliar_flags(model, per_tile):
    """Which tiles are flagged unfamiliar, and so left to people, shape (n,), bool.

    A tile is unfamiliar when its feature summary lies beyond the card's unfamiliarity threshold
    (:func:`detector.inference.unfamiliar.unfamiliarity_score` above 1) or it was noisier than every
    fitting tile and smoothed before detection. A card without unfamiliarity statistics flags only
    the smoothed tiles.

    Parameters
    ----------
    model : detector.inference.model.Model
    per_tile : list of dict
        :func:`run_on_tiles`'s ``per_tile`` (``summary``, ``smoothed``).
    """
    if not per_tile:
        return np.zeros(0, dtype=bool)
    summaries = np.array([t["summary"] for t in per_tile])
    smoothed = np.array([bool(t.get("smoothed", False)) for t in per_tile], dtype=bool)
    return (unfamiliarity_score(model.card.get("unfamiliarity"), summaries) > 1.0) | smoothed


def _per_tile_table(run, detections, consensus, tiles, model):
    """Per-tile figures used by the effort estimate (held-out images)."""
    pairs = match_objects(detections.reset_index(drop=True), consensus.reset_index(drop=True))
    image = tiles.set_index("tile_id")["image_id"]
    stats = model.card.get("unfamiliarity")
    rows = []
    summaries = np.array([t["summary"] for t in run["per_tile"]])
    unfamiliar = unfamiliarity_score(stats, summaries) if len(summaries) else np.zeros(0)
    for t, u in zip(run["per_tile"], unfamiliar):
        tid = t["tile_id"]
        n_det = int((detections["tile_id"] == tid).sum())
        n_cons = int((consensus["tile_id"] == tid).sum())
        tp_pairs = pairs[pairs["tile_id"] == tid]
        tp = len(tp_pairs)
        fan_err = tp_pairs.loc[tp_pairs["kind"] == "fan", "direction_error_deg"].to_numpy(float)
        det_t = detections[detections["tile_id"] == tid]
        rows.append({
            "tile_id": tid,
            "image_id": str(image[tid]),
            "p_deposit": float(t["p_deposit"]),
            "consensus_px": int(t["consensus_px"]),
            "n_consensus": n_cons,
            "n_detections": n_det,
            "f1": float(2 * tp / (n_det + n_cons)) if n_det + n_cons else 1.0,
            "fan_error_median_deg": float(np.median(fan_err)) if len(fan_err) else None,
            "mean_score": float(det_t["score"].mean()) if n_det else 0.0,
            "mean_direction_confidence": float(det_t["direction_confidence"].mean())
            if (det_t["kind"] == "fan").any() else None,
            "unfamiliarity": None if not np.isfinite(u) else float(u),
        })
    return rows


def evaluate_tiles(model_dir, tileset, tile_ids, *, log=print, seed=0, workers=1):
    """Score a model on some tiles of a labelled tile set (the training run's held-out images).

    Returns
    -------
    heldout : dict
        ``scores`` (from :func:`training.evaluation.scoring.score_catalogs`), ``patch`` (patch
        metrics), ``per_tile`` (per-tile figures for the effort estimate).
    """
    model = load_model(model_dir)
    run = run_on_tiles(model, tileset, tile_ids, desc="held-out", workers=workers)
    consensus = _consensus_of(tileset, tile_ids)
    tiles = _tiles_frame(tileset, tile_ids)
    detections = run["detections"]
    scores = score_catalogs(detections, consensus, tiles, prevailing_deg=_prevailing(model), seed=seed, n_boot=200)
    patch = _patch_metrics(run)
    per_tile = _per_tile_table(run, detections, consensus, tiles, model)
    scores["direction_confidence"] = confidence_validation(detections, consensus, tiles)
    objects = scores["objects"]
    log(f"held-out: fan F1 {_fmt(objects['fan']['f1'])}, spot F1 {_fmt(objects['spot']['f1'])}, "
        f"fan direction median {_fmt(scores['direction']['per_fan'].get('median'))} deg")
    return {"scores": scores, "patch": patch, "per_tile": per_tile, "detections": detections, "run": run}


def confidence_validation(detections, consensus, tiles, *, n_bins=3):
    """Direction error of matched fans by direction-confidence bin (equal-count bins).

    A useful confidence has errors that fall as it rises; the Spearman rank
    correlation between confidence and error (scipy.stats.spearmanr) says how
    strongly.

    Returns
    -------
    validation : dict
        ``bins`` (confidence range, n, median and 90th percentile error),
        ``spearman_rho`` and ``p_value``.
    """
    from scipy.stats import spearmanr

    detections = detections.reset_index(drop=True)
    consensus = consensus.reset_index(drop=True)
    pairs = match_objects(detections, consensus)
    fans = matched_fans(detections, consensus, pairs, tiles)
    if len(fans) < 2 * n_bins:
        return {"bins": [], "spearman_rho": None, "p_value": None, "n": int(len(fans))}
    conf = detections.loc[fans["det_index"].to_numpy(), "direction_confidence"].to_numpy(float)
    err = fans["error_deg"].to_numpy(float)
    edges = np.quantile(conf, np.linspace(0, 1, n_bins + 1))
    which = np.clip(np.searchsorted(edges, conf, side="right") - 1, 0, n_bins - 1)
    bins = [{"confidence_from": float(edges[b]), "confidence_to": float(edges[b + 1]), "n": int((which == b).sum()),
             "median_error_deg": float(np.median(err[which == b])) if (which == b).any() else None,
             "p90_error_deg": float(np.quantile(err[which == b], 0.9)) if (which == b).any() else None}
            for b in range(n_bins)]
    rho, p = spearmanr(conf, err)
    return {"bins": bins, "spearman_rho": float(rho), "p_value": float(p), "n": int(len(fans))}


def _patch_metrics(run):
    names = np.asarray(CLASS_NAMES, dtype=object)[run["patch_true"].astype(int)]
    return patch_metrics(names, run["patch_proba"], CLASS_NAMES)


def _fmt(value, digits=2):
    return "n/a" if value is None or (isinstance(value, float) and not np.isfinite(value)) else f"{value:.{digits}f}"


def summarise_for_card(heldout):
    """The headline held-out numbers stored in ``model.json``."""
    s = heldout["scores"]
    per_fan = s["direction"]["per_fan"]
    return {
        "fan_f1": s["objects"]["fan"]["f1"],
        "spot_f1": s["objects"]["spot"]["f1"],
        "fan_precision": s["objects"]["fan"]["precision"],
        "fan_recall": s["objects"]["fan"]["recall"],
        "spot_precision": s["objects"]["spot"]["precision"],
        "spot_recall": s["objects"]["spot"]["recall"],
        "fan_direction_median_deg": per_fan.get("median"),
        "fan_direction_p90_deg": per_fan.get("p90"),
        "flip_rate": per_fan.get("flip_rate"),
        "n_matched_fans": per_fan.get("n"),
        "tile_mean_direction_median_deg": s["direction"]["per_tile_mean"].get("median"),
        "tile_prevailing_direction_median_deg": s["direction"]["per_tile_prevailing"].get("median"),
        "false_per_mpx": s["objects"]["false_per_mpx"]["value"],
        "dice_mean": (s.get("coverage") or {}).get("dice_mean"),
        "covered_error_pp_mean": (s.get("coverage") or {}).get("covered_error_pp_mean"),
        "patch_f1": {name: heldout["patch"][name]["f1"] for name in CLASS_NAMES},
        "direction_confidence": s.get("direction_confidence"),
    }


def write_detections_csv(detections, path):
    """Write the contract's consensus columns plus score and direction_confidence, atomically."""
    frame = detections.reindex(columns=DETECTION_COLUMNS)
    with atomic_path(path) as tmp:
        frame.to_csv(tmp, index=False, float_format="%.3f")


def _provenance(model, model_dir, tileset_root):
    """What a report was made from and when: model card and file hashes, tile-set table hashes, UTC date."""
    import datetime

    from detector.contract import CONSENSUS_FILE, TILES_FILE
    from detector.inference.model import MODEL_CARD, sha256_file

    model_dir, root = Path(model_dir), Path(tileset_root)
    return {
        "model_card_sha256": sha256_file(model_dir / MODEL_CARD),
        "model_files_sha256": dict(model.card["files"]),
        "tileset_sha256": {name: sha256_file(root / name) for name in (TILES_FILE, CONSENSUS_FILE)},
        "date_utc": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
    }


def evaluate_model(model_dir, tileset_root, out, *, min_score=None, images=None, force=False, seed=0, log=print,
                   workers=1, n_worst=6, at_model_scale=False):
    """``frostvane evaluate``: score a model on every tile of a labelled tile set; write the report.

    Parameters
    ----------
    model_dir : path-like
    tileset_root : path-like
    out : path-like
        Report folder (must be new or empty unless ``force``).
    min_score : float, optional
        Smallest detection score kept; default the model's own threshold (tuned on
        its calibration images and stored in the card), so that the report and the
        card's held-out metrics use the same operating point.
    images : sequence of str, optional
        Score only these images of the tile set (e.g. the model's held-out images).
    n_worst : int, optional
        Number of tiles with the most errors drawn into ``worst_tiles/``.
    at_model_scale : bool, default=False
        Read each tile whose ``metres_per_px`` lies outside the model's fitting tiles' ground scale
        resampled to it (:mod:`detector.tile.scale`); by default every tile is read as it is.

    Besides ``report.json``, ``report.md``, ``detections.csv`` and the plots,
    the folder gets the error analysis of :func:`training.evaluation.diagnose.error_breakdown`:
    ``errors_consensus.csv`` and ``errors_detections.csv`` (one outcome per
    feature), the "Where features are lost" section of report.md (its numbers
    under ``error_breakdown`` in report.json) and ``worst_tiles/worst_<tile_id>.png``
    (consensus beside detections coloured by outcome).

    Returns
    -------
    report : dict
        ``scores`` and ``ceiling`` as written to ``report.json``, and
        ``error_breakdown`` (its JSON-ready summary).
    """
    from .report import headline_table, write_report

    out = Path(out)
    if out.exists() and any(out.iterdir()) and not force:
        raise DetectorError(f"report folder {str(out)!r} is not empty; choose another or pass --force.")
    if min_score is not None and not 0.0 <= min_score <= 1.0:
        raise DetectorError(f"--min-score must be in [0, 1]; got {min_score!r}.")
    model = load_model(model_dir)
    if min_score is None:
        min_score = float(model.assembly.get("min_score", 0.5))
    tileset = load_tileset(tileset_root, min_votes=int(model.card["training"]["config"]["min_votes"]))
    if images is not None:
        unknown = sorted(set(images) - set(tileset.image_ids))
        if unknown:
            raise TileSetError(f"image(s) {unknown!r} are not in tile set {str(tileset_root)!r}.")
        tileset = tileset.subset(images)
    if len(tileset.tiles) == 0:
        raise TileSetError(f"tile set {str(tileset_root)!r} has no tiles.")
    tile_ids = tileset.tiles["tile_id"].tolist()
    run = run_on_tiles(model, tileset, tile_ids, desc="evaluate", workers=workers, min_score=min_score,
                       at_model_scale=at_model_scale)
    detections = run["detections"].reset_index(drop=True)
    tiles = tileset.tiles
    scores = score_catalogs(detections, tileset.consensus, tiles, prevailing_deg=_prevailing(model), seed=seed)
    patch = _patch_metrics(run)
    scores["direction_confidence"] = confidence_validation(detections, tileset.consensus, tiles)
    ceiling = None
    truth_path = Path(tileset_root) / TRUTH_FILE
    if truth_path.is_file():
        truth = pd.read_csv(truth_path)
        truth = truth[truth["tile_id"].isin(tile_ids)].reset_index(drop=True)
        truth["score"] = 1.0
        truth["axis_deg"] = truth["direction_deg"] % 180.0
        ceiling = score_catalogs(truth, tileset.consensus, tiles, prevailing_deg=_prevailing(model), seed=seed)
    seen = set(model.card["training"]["images"]["fit"]) | set(model.card["training"]["images"]["calibration"])
    overlap = sorted(set(tiles["image_id"]) & seen)
    if overlap:
        shown = ", ".join(overlap[:5]) + (f" and {len(overlap) - 5} more" if len(overlap) > 5 else "")
        log(f"warning: {len(overlap)} of the {tiles['image_id'].nunique()} images scored here were used to fit or "
            f"calibrate this model ({shown}); its scores on them are optimistic. Evaluate on images it never saw.")
    smoothed = sorted(t["tile_id"] for t in run["per_tile"] if t.get("smoothed"))
    if smoothed:
        log(f"note: {len(smoothed)} of the {len(tile_ids)} tiles are noisier than every tile this model was fitted "
            f"on and were smoothed before detection (report.json: meta.tiles_smoothed); in screening they are "
            f"flagged unfamiliar and left to people.")
    unfamiliar = sorted(t["tile_id"] for t, u in zip(run["per_tile"], unfamiliar_flags(model, run["per_tile"])) if u)
    resampled = sorted(t["tile_id"] for t in run["per_tile"] if t.get("resampled"))
    if len(unfamiliar) > len(smoothed):
        log(f"note: {len(unfamiliar)} of the {len(tile_ids)} tiles (the smoothed ones among them) are unlike this "
            f"model's fitting tiles (report.json: meta.tiles_unfamiliar); screening leaves them to people.")
    if resampled:
        log(f"note: {len(resampled)} of the {len(tile_ids)} tiles lie outside the ground scale of this model's "
            f"fitting tiles and were read resampled to it (report.json: meta.tiles_read_at_model_scale).")
    with atomic_dir(out, replace=True) as tmp:
        write_detections_csv(detections, tmp / "detections.csv")
        scores["patch"] = {k: v for k, v in patch.items() if k != "curves"}
        scores["meta"] = {"model": str(Path(model_dir).resolve()), "tileset": str(Path(tileset_root).resolve()),
                          "min_score": min_score, "images_seen_in_training": overlap, "tiles": int(len(tiles)),
                          "tiles_smoothed": smoothed, "tiles_unfamiliar": unfamiliar,
                          "at_model_scale": bool(at_model_scale),
                          "tiles_read_at_model_scale": resampled,
                          **_provenance(model, model_dir, tileset_root)}
        pr_curves = {name: {**patch["curves"][name], "average_precision": patch[name]["average_precision"]}
                     for name in CLASS_NAMES[1:]}
        y = run["patch_true"]
        p = run["patch_proba"]
        reliability = {"deposit (fan or spot)": ((y > 0).astype(int), 1.0 - p[:, 0]),
                       "fan": ((y == 1).astype(int), p[:, 1]), "spot": ((y == 2).astype(int), p[:, 2])}
        consensus = tileset.consensus.reset_index(drop=True)
        pairs = match_objects(detections, consensus)
        fans = matched_fans(detections, consensus, pairs, tiles)
        breakdown = error_breakdown(detections, consensus, tiles, pairs=pairs)
        errors = write_error_analysis(breakdown, tileset.read_tile, tmp, n_worst=n_worst)
        write_report(scores, tmp, ceiling=ceiling, pr_curves=pr_curves, reliability=reliability,
                     fan_directions=fans, error_breakdown=errors, title="frostvane evaluation")
    log(headline_table(scores, ceiling))
    return {"scores": scores, "ceiling": ceiling, "error_breakdown": errors}
