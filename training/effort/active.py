"""Where the next volunteer hour goes: rank tiles by how much their consensus would teach the model.

A tile teaches the model most when the model is unsure about the deposits on it
(**uncertainty**: the tile's uncertain objects, the sum of ``4 s (1 - s)`` over
the scores ``s`` of the model's readings of it, nearly all kept; a reading the
model gives even odds counts 1, a sure one or a sure nothing 0) and when it is
unlike the tiles already chosen (**diversity**: the distance between tiles'
mean feature vectors, standardised by the model's own unfamiliarity
statistics). :func:`rank_tiles` picks greedily: each next tile maximises
``uncertainty * min(1, distance to the nearest tile already picked / median
distance between tiles)``, the first tile the most uncertain one (the
uncertainty-times-diversity rule of batch active learning). The mean entropy of
the patch class probabilities (:func:`tile_uncertainty`) is reported beside it;
it ranked worse on a development pool (README, "Where the next volunteer hour goes").

:func:`labelling_order_study` checks that this order pays off: starting from a
few labelled images it adds the pool's tiles in batches, in ranked and in
random order (same seed), retrains a small model after every batch, and scores
each on fixed held-out images. It is repeated over seeded splits of the images
(start, held-out, pool), and reports the mean curves with 90 % bootstrap
intervals over the splits, their paired difference, and the tiles saved: how
many fewer tiles the ranked order needs to reach the lower of the two orders'
final scores.
"""

import math
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from detector.errors import DetectorError
from detector.io import atomic_path, write_json

from .._json import jsonable
from .._subsets import write_subset

__all__ = ["tile_uncertainty", "uncertain_objects", "greedy_order", "describe_tiles", "rank_described", "rank_tiles",
           "labelling_order_study", "study_summary", "tiles_to_reach", "tiles_needed_interval",
           "bootstrap_mean_interval", "tiles_saved", "compare_orders", "saving_words"]

#: The target the study reports tiles for (the learning curve's fan target).
FAN_F1_TARGET = 0.8


def tile_uncertainty(proba, valid):
    """Mean normalised entropy of a tile's patch class probabilities.

    Parameters
    ----------
    proba : ndarray of shape (n_patches, k)
        Calibrated class probabilities per patch.
    valid : ndarray of shape (n_patches,), bool
        Patches that are scored.

    Returns
    -------
    uncertainty : float
        ``mean(-sum p log p) / log k`` over valid patches, in [0, 1]; 0 for a
        tile without valid patches.
    """
    p = np.asarray(proba, dtype=np.float64)[np.asarray(valid, dtype=bool)]
    if len(p) == 0:
        return 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        h = -np.sum(np.where(p > 0, p * np.log(p), 0.0), axis=1)
    return float(np.mean(h) / math.log(p.shape[1]))


#: Readings scored at least this enter a tile's uncertain objects: nearly every reading, so the ones the
#: model leans against count as well as the ones it keeps.
READING_FLOOR = 0.02


def uncertain_objects(scores):
    """A tile's uncertain objects: ``sum(4 s (1 - s))`` over its readings' scores.

    Parameters
    ----------
    scores : array-like of shape (n,)
        Probabilities, in [0, 1], that each reading is a right deposit.

    Returns
    -------
    uncertain : float
        0 for no readings or only sure ones (s = 0 or 1); each reading at
        s = 0.5 adds 1 (``4 s (1 - s)`` is the Bernoulli variance scaled to 1).
    """
    s = np.asarray(scores, dtype=np.float64)
    if s.size and (not np.all(np.isfinite(s)) or s.min() < 0.0 or s.max() > 1.0):
        raise DetectorError(f"reading scores must lie in [0, 1]; got {s.min()!r} to {s.max()!r}.")
    return float(np.sum(4.0 * s * (1.0 - s)))


def greedy_order(uncertainty, vectors):
    """Order tiles by uncertainty times diversity (greedy, one tile at a time).

    Parameters
    ----------
    uncertainty : ndarray of shape (n,)
        Non-negative (a tile's uncertain objects, or any measure where more teaches more).
    vectors : ndarray of shape (n, d)
        Standardised tile descriptions; distances are Euclidean.

    Returns
    -------
    order : ndarray of int, shape (n,)
        Tile indices, first pick first.
    gain : ndarray of shape (n,)
        The value each tile had when it was picked.
    """
    u = np.asarray(uncertainty, dtype=np.float64)
    V = np.asarray(vectors, dtype=np.float64)
    n = len(u)
    if n == 0:
        return np.zeros(0, dtype=int), np.zeros(0)
    d2 = np.sum((V[:, None, :] - V[None, :, :]) ** 2, axis=2)
    off = np.sqrt(d2[~np.eye(n, dtype=bool)])
    scale = float(np.median(off)) if off.size and np.median(off) > 0 else 1.0
    nearest = np.full(n, np.inf)
    taken = np.zeros(n, dtype=bool)
    order, gain = [], []
    for _ in range(n):
        diversity = np.minimum(1.0, np.sqrt(nearest) / scale)
        value = np.where(taken, -np.inf, u * diversity)
        i = int(np.argmax(value))
        order.append(i)
        gain.append(float(value[i]))
        taken[i] = True
        nearest = np.minimum(nearest, d2[i])
    return np.asarray(order), np.asarray(gain)


def describe_tiles(model_dir, tileset_root, tile_ids=None):
    """What a model makes of each tile: its uncertain objects, patch uncertainty and standardised description.

    Parameters
    ----------
    model_dir : path-like
    tileset_root : path-like
        A tile set holding the tiles (consensus not needed).
    tile_ids : sequence of str, optional
        Default all tiles.

    Returns
    -------
    table : DataFrame
        ``tile_id``, ``uncertainty`` (:func:`uncertain_objects` of the readings scored at least
        :data:`READING_FLOOR`), ``patch_uncertainty`` (:func:`tile_uncertainty`), ``p_deposit``,
        ``n_detections`` (at the model's threshold).
    vectors : ndarray of shape (n, d)
        Each tile's mean feature vector, standardised by the model's unfamiliarity statistics.
    """
    from detector.inference.detect import detect_block
    from detector.inference.model import load_model
    from detector.objects.assemble import AssemblyParams
    from detector.tileset import load_tileset

    model = load_model(model_dir)
    tileset = load_tileset(tileset_root)
    ids = list(tileset.tiles["tile_id"]) if tile_ids is None else [str(t) for t in tile_ids]
    unknown = sorted(set(ids) - set(tileset.tiles["tile_id"]))
    if unknown:
        raise DetectorError(f"tile(s) {unknown[:3]!r} are not in {str(tileset_root)!r}.")
    stats = model.card.get("unfamiliarity") or {}
    from ..evaluation.evaluate import tile_blocks

    floor = min(READING_FLOOR, AssemblyParams.from_dict(model.assembly).min_score)
    row_of, vector_of = {}, {}
    for block in tile_blocks(tileset, ids):
        # one reading of each tile, with its context block as screening reads it: the objects at the
        # model's threshold (what screening keeps) and at the floor
        for tile_id, result in zip(block, detect_block(model, [tileset.read_tile(t) for t in block],
                                                       tile_ids=block, floor_score=floor)):
            row_of[tile_id] = {"tile_id": tile_id, "uncertainty": uncertain_objects(result.floor_detections["score"]),
                               "patch_uncertainty": tile_uncertainty(result.proba, result.grid.valid),
                               "p_deposit": result.p_deposit, "n_detections": int(len(result.detections))}
            vector_of[tile_id] = result.summary
    rows, vectors = [row_of[t] for t in ids], [vector_of[t] for t in ids]
    V = np.asarray(vectors, dtype=np.float64).reshape(len(ids), -1)
    if stats and len(V):
        V = (V - np.asarray(stats["mean"])) / np.asarray(stats["scale"])
    return pd.DataFrame(rows, columns=["tile_id", "uncertainty", "patch_uncertainty", "p_deposit", "n_detections"]), V


def rank_described(table, vectors):
    """Rank described tiles (:func:`describe_tiles`) by :func:`greedy_order`.

    Returns
    -------
    ranked : DataFrame
        ``rank`` (1 = label first), ``tile_id``, ``uncertainty`` (uncertain objects), ``gain`` (the
        uncertainty-times-diversity value at its pick), then the description's other columns.
    """
    order, gain = greedy_order(table["uncertainty"].to_numpy(), vectors)
    ranked = table.iloc[order].reset_index(drop=True)
    ranked.insert(0, "rank", np.arange(1, len(ranked) + 1))
    ranked.insert(3, "gain", gain)
    return ranked


def rank_tiles(model_dir, tileset_root, tile_ids=None, *, log=print):
    """Rank tiles of a tile set by how much their consensus would teach the model.

    Parameters
    ----------
    model_dir : path-like
    tileset_root : path-like
        A tile set holding the tiles (consensus not needed).
    tile_ids : sequence of str, optional
        Tiles to rank (e.g. the crowd tiles of an effort run); default all.

    Returns
    -------
    ranked : DataFrame
        See :func:`rank_described`.
    """
    n = "all" if tile_ids is None else len(tile_ids)
    log(f"ranking {n} tiles by uncertain objects and diversity")
    return rank_described(*describe_tiles(model_dir, tileset_root, tile_ids))


# --------------------------------------------------------------------------- the order study

#: Share of the repeats' spread each interval covers.
INTERVAL_LEVEL = 0.90


def tiles_to_reach(n, score, target):
    """Fewest labelled tiles at which a measured curve reaches ``target``, by linear interpolation.

    Parameters
    ----------
    n : ndarray of shape (k,)
        Labelled tiles, increasing.
    score : ndarray of shape (k,)
        The metric (higher is better) after each.
    target : float

    Returns
    -------
    tiles : float or None
        None when the curve never reaches the target.
    """
    n = np.asarray(n, dtype=np.float64)
    s = np.asarray(score, dtype=np.float64)
    for k in range(len(n)):
        if s[k] >= target:
            if k == 0:
                return float(n[0])
            # Between the last point below and this one.
            return float(n[k - 1] + (target - s[k - 1]) * (n[k] - n[k - 1]) / (s[k] - s[k - 1]))
    return None


def bootstrap_mean_interval(values, *, n_boot=2000, seed=0, level=INTERVAL_LEVEL):
    """Percentile bootstrap interval of the mean over repeats (the first axis).

    Parameters
    ----------
    values : ndarray of shape (r,) or (r, k)
        One row per repeat.
    n_boot : int, default=2000
        Resamples of the repeats (with replacement).
    seed : int, default=0
    level : float, default=0.9

    Returns
    -------
    interval : tuple of (ndarray or float, ndarray or float), or None
        The ``(1 - level) / 2`` and ``(1 + level) / 2`` quantiles of the
        resampled means, elementwise over ``k``; None for fewer than two repeats.
    """
    v = np.asarray(values, dtype=np.float64)
    if v.shape[0] < 2:
        return None
    idx = np.random.default_rng(seed).integers(0, v.shape[0], size=(n_boot, v.shape[0]))
    means = v[idx].mean(axis=1)
    lo, hi = np.percentile(means, [50.0 * (1.0 - level), 50.0 * (1.0 + level)], axis=0)
    return (float(lo), float(hi)) if v.ndim == 1 else (lo, hi)


def tiles_saved(sizes, ranked, random):
    """Tiles the ranked order saves to reach the score both orders end at or above, per repeat.

    The target of each repeat is the lower of the two orders' final scores,
    which both curves reach within the sizes tried (by :func:`tiles_to_reach`,
    at worst at the last size), so no repeat is left without an answer; when
    the ranked order ends higher, this is the random order's final score.

    Parameters
    ----------
    sizes : ndarray of shape (k,)
        Pool tiles labelled at each point, increasing.
    ranked, random : ndarray of shape (r, k)
        The metric after each size, one row per repeat.

    Returns
    -------
    saved : dict
        ``target``, ``ranked_tiles``, ``random_tiles`` and ``saved`` (random's
        tiles minus ranked's), each a list over repeats.
    """
    ranked = np.atleast_2d(np.asarray(ranked, dtype=np.float64))
    random = np.atleast_2d(np.asarray(random, dtype=np.float64))
    out = {"target": [], "ranked_tiles": [], "random_tiles": [], "saved": []}
    for a, b in zip(ranked, random):
        target = float(min(a[-1], b[-1]))
        random_need = tiles_to_reach(sizes, b, target)
        ranked_need = tiles_to_reach(sizes, a, target)
        for key, value in (("target", target), ("ranked_tiles", ranked_need), ("random_tiles", random_need),
                           ("saved", random_need - ranked_need)):
            out[key].append(value)
    return out


def compare_orders(sizes, ranked, random, *, n_boot=2000, seed=0):
    """Mean learning curves of two orders over repeats, their paired difference and the tiles saved.

    Parameters
    ----------
    sizes : ndarray of shape (k,)
        Pool tiles labelled at each point; the first is normally 0 (both orders start alike).
    ranked, random : ndarray of shape (r, k)
        A metric (higher is better) per repeat and size; repeat ``i`` of both
        orders shares its split and seed.
    n_boot, seed : int
        Of :func:`bootstrap_mean_interval`.

    Returns
    -------
    comparison : dict
        ``curves`` (per order ``mean`` and ``interval_90`` per size),
        ``difference`` (ranked minus random per size: ``per_repeat``,
        ``mean``, ``interval_90``), ``area`` (the mean difference over the
        sizes after the first, i.e. the area between the curves per labelled
        batch: ``per_repeat``, ``mean``, ``interval_90``) and ``saved``
        (:func:`tiles_saved` per repeat with ``mean``, ``interval_90``,
        ``n_saved`` / ``n_equal`` / ``n_more``: repeats where the ranked
        order needed fewer, as many and more tiles). Intervals are None for one repeat.
    """
    sizes = np.asarray(sizes, dtype=np.float64)
    ranked = np.atleast_2d(np.asarray(ranked, dtype=np.float64))
    random = np.atleast_2d(np.asarray(random, dtype=np.float64))
    if ranked.shape != random.shape or ranked.shape[1] != len(sizes):
        raise DetectorError(f"curves of shape {ranked.shape} and {random.shape} do not match {len(sizes)} sizes.")

    def stats(v):
        interval = bootstrap_mean_interval(v, n_boot=n_boot, seed=seed)
        mean = v.mean(axis=0)
        if v.ndim == 1:
            return {"mean": float(mean), "interval_90": None if interval is None else list(interval)}
        return {"mean": mean.tolist(),
                "interval_90": None if interval is None else [interval[0].tolist(), interval[1].tolist()]}

    diff = ranked - random
    area = diff[:, 1:].mean(axis=1) if len(sizes) > 1 else np.zeros(len(diff))
    saved = tiles_saved(sizes, ranked, random)
    s = np.asarray(saved["saved"])
    saved.update(stats(s))
    saved.update({"n_saved": int(np.sum(s > 0)), "n_equal": int(np.sum(s == 0)), "n_more": int(np.sum(s < 0))})
    return {"repeats": int(len(ranked)),
            "curves": {"ranked": stats(ranked), "random": stats(random)},
            "difference": {"per_repeat": diff.tolist(), **stats(diff)},
            "area": {"per_repeat": area.tolist(), **stats(area)},
            "saved": saved}


def saving_words(saved, *, label="fan F1"):
    """The verdict on the tiles saved, in plain words (``saved`` from :func:`compare_orders`)."""
    r = len(saved["saved"])
    splits = f"{r} split{'s' if r != 1 else ''}"
    count = (f"fewer tiles in {saved['n_saved']} of {r}, as many in {saved['n_equal']}, "
             f"more in {saved['n_more']}")
    mean = saved["mean"]
    if saved["interval_90"] is None:
        what = (f"saved {mean:.1f} tiles" if mean > 0 else "saved no tiles" if mean == 0
                else f"needed {-mean:.1f} tiles more")
        return f"{label}: on one split the ranked order {what} (one split gives no interval)"
    lo, hi = saved["interval_90"]
    interval = f"90 % interval {lo:.1f} to {hi:.1f}"
    if lo > 0:
        head = f"the ranked order saved {mean:.1f} tiles ({interval}) over {splits}"
    elif hi < 0:
        head = f"the ranked order needed {-mean:.1f} tiles more ({interval}) over {splits}"
    else:
        what = f"saved {mean:.1f} tiles" if mean >= 0 else f"needed {-mean:.1f} tiles more"
        head = f"no saving shown: the ranked order {what} on average ({interval}) over {splits}"
    return f"{label}: {head}; {count}"


def tiles_needed_interval(n, score, target, *, n_boot=500, seed=0):
    """Labelled tiles at which a fitted curve reaches ``target``, with a residual-bootstrap interval.

    Fits ``1 - score = a * n**-b + c`` (:func:`training.effort.curve.fit_power_law`),
    solves it for ``target`` (:func:`training.effort.curve.tiles_needed`), then refits
    ``n_boot`` times with the residuals resampled to give a 90 % interval.

    Parameters
    ----------
    n : ndarray of shape (k,)
        Labelled tiles (all of them, not only the added ones), > 0.
    score : ndarray of shape (k,)
        An F1 (higher is better) at each size.
    target : float
        F1 to reach.

    Returns
    -------
    result : dict
        ``fit``, ``tiles`` (point estimate; inf when the fit levels off below
        the target), ``interval_90`` (inf allowed), ``share_reaching`` (share of
        refits that reach the target at all), ``law`` (the fitted form in words).
    """
    from .curve import fit_power_law, power_law, tiles_needed

    n = np.asarray(n, dtype=np.float64)
    error = 1.0 - np.asarray(score, dtype=np.float64)
    fit = fit_power_law(n, error, c_max=1.0)
    if fit is None:
        return {"fit": None, "tiles": None, "interval_90": None, "share_reaching": None, "law": None}
    point = tiles_needed(fit, 1.0 - target)
    fitted = power_law(n, fit["a"], fit["b"], fit["c"])
    resid = error - fitted
    rng = np.random.default_rng(seed)
    draws = []
    for _ in range(n_boot):
        refit = fit_power_law(n, fitted + rng.choice(resid, size=len(resid), replace=True),
                              with_c=fit["with_c"], c_max=1.0)
        draws.append(math.inf if refit is None else tiles_needed(refit, 1.0 - target))
    draws = np.asarray(draws)
    # Without interpolation, so that refits that never reach the target (inf) stay ordered.
    interval = [float(v) for v in np.percentile(draws, [5.0, 95.0], method="inverted_cdf")]
    return {"fit": fit, "tiles": point, "interval_90": interval,
            "share_reaching": float(np.mean(np.isfinite(draws))),
            "law": f"1 - F1 = a * n^-b + c, n labelled tiles; a = {fit['a']:.3g}, b = {fit['b']:.3g}, "
                   f"c = {fit['c']:.3g} (F1 levels off at {1.0 - fit['c']:.3f})"}


def _needed_words(result, target, n_now):
    if result["fit"] is None:
        return f"fan F1 >= {target}: too few points to fit a curve"
    lo, hi = result["interval_90"]
    if not math.isfinite(result["tiles"]):
        return (f"fan F1 >= {target}: not reached on this curve, which levels off at F1 "
                f"{1.0 - result['fit']['c']:.3f}; {result['share_reaching']:.0%} of the refits reach it at all")
    more = max(0.0, result["tiles"] - n_now)
    hi_text = "no finite number" if not math.isfinite(hi) else f"{hi:,.0f}"
    return (f"fan F1 >= {target}: about {result['tiles']:,.0f} labelled tiles in all, {more:,.0f} more than the "
            f"{n_now} used here (90% interval {lo:,.0f} to {hi_text}), if the fitted curve holds")


def _split_images(image_ids, base_images, holdout_images, seed):
    """One seeded split of the images into start, held-out and pool images."""
    images = list(np.random.default_rng(seed).permutation(image_ids))
    return (images[:base_images], images[base_images:base_images + holdout_images],
            images[base_images + holdout_images:])


def _whole_number(name, value):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise DetectorError(f"{name} {value!r} must be a whole number >= 1.")


def labelling_order_study(model_dir, tileset_root, out, *, base_images=3, holdout_images=3, batch=4, n_batches=3,
                          seed=0, repeats=8, max_patches=20000, max_iter=60, workers=1, n_boot=2000,
                          n_refits=500, log=print):
    """Retrain on batches of a pool in ranked and in random order over seeded splits; compare the learning curves.

    Repeat ``i`` (of ``repeats``) uses the seed ``seed + i`` for everything:
    the tile set's images are split (``base_images`` start labelled,
    ``holdout_images`` score every run, the rest are the pool), the pool is
    ranked by :func:`greedy_order` with ``model_dir``'s description of its
    tiles, and the random order is a permutation of the pool with that seed.
    After 0, ``batch``, ..., ``n_batches * batch`` pool tiles a small model
    (one rotation, ``max_patches``, ``max_iter``) is trained and scored on the
    held-out images. :func:`compare_orders` then gives, per metric (fan F1 and
    the mean of fan and spot F1), the mean curve of each order with a 90 %
    bootstrap interval over repeats, the paired difference per size, the area
    between the curves and the tiles saved (``n_boot`` resamples of the
    splits); the tiles fan F1 >= 0.8 needs come from :func:`tiles_needed_interval`
    (``n_refits`` residual-bootstrap refits) on every ranked point.

    Returns
    -------
    study : dict
        ``curves`` (per order the mean over repeats of each point's n_labelled,
        fan_f1, spot_f1, fan direction median, with the F1 intervals),
        ``saved`` (per metric the mean tiles saved and its interval),
        ``comparison`` (:func:`compare_orders` per metric), ``verdict``,
        ``repeats`` (each split's images, curves and saving), ``tiles_needed``
        (fan F1 >= 0.8, fitted on every ranked point), ``ranking`` (the first
        split's), ``seconds``; written to ``out/labelling_order.json`` with
        ``out/labelling_order.png``.
    """
    from detector.contract import CONSENSUS_FILE, TILES_FILE
    from detector.tileset import load_tileset

    from threadpoolctl import threadpool_limits

    from ..fitting.train import TrainConfig, train_model

    for name, value in (("batch", batch), ("batches", n_batches), ("repeats", repeats)):
        _whole_number(name, value)
    started = time.perf_counter()
    root = Path(tileset_root)
    tileset = load_tileset(root)
    if len(tileset.image_ids) < base_images + holdout_images + 1:
        raise DetectorError(f"the study needs more than {base_images + holdout_images} images in "
                            f"{str(root)!r}; found {len(tileset.image_ids)}.")
    tiles = tileset.tiles
    splits = []
    for r in range(repeats):
        base, held, pool_images = _split_images(tileset.image_ids, base_images, holdout_images, seed + r)
        ids = {name: tiles.loc[tiles["image_id"].isin(group), "tile_id"].tolist()
               for name, group in (("base", base), ("holdout", held), ("pool", pool_images))}
        if len(ids["pool"]) < batch * n_batches:
            raise DetectorError(f"the pool of split {r + 1} (seed {seed + r}) holds {len(ids['pool'])} tiles; "
                                f"{n_batches} batches of {batch} need {batch * n_batches}.")
        splits.append(({"base": base, "holdout": held, "pool": pool_images}, ids))
    # The model describes every pool tile once; each split ranks its own pool from these descriptions.
    in_a_pool = set().union(*(ids["pool"] for _, ids in splits))
    pool_union = [t for t in tiles["tile_id"] if t in in_a_pool]
    log(f"describing {len(pool_union)} pool tiles with {str(model_dir)!r} (uncertain objects and diversity)")
    table, vectors = describe_tiles(model_dir, root, pool_union)
    row_of = {t: i for i, t in enumerate(table["tile_id"])}
    tiles_raw = pd.read_csv(root / TILES_FILE, dtype=str, keep_default_na=False)
    consensus_raw = pd.read_csv(root / CONSENSUS_FILE, dtype=str, keep_default_na=False)
    sizes = [k * batch for k in range(n_batches + 1)]
    runs = []
    # One thread per fit: these fits are small (tens of thousands of patches), where OpenMP threads gain
    # little, and on a machine shared with other work they wait on each other (a fit of the study took
    # 3x as long with two threads as with one, with the same result, next to another busy process).
    with tempfile.TemporaryDirectory(prefix="frostvane-order-") as tmp, threadpool_limits(limits=1):
        for r in range(repeats):
            split_seed = seed + r
            images, ids = splits[r]
            base_ids, held_ids, pool_ids = ids["base"], ids["holdout"], ids["pool"]
            held = images["holdout"]
            rows = [row_of[t] for t in pool_ids]
            ranking = rank_described(table.iloc[rows].reset_index(drop=True), vectors[rows])
            orders = {"ranked": ranking["tile_id"].tolist(),
                      "random": [pool_ids[i] for i in np.random.default_rng(split_seed).permutation(len(pool_ids))]}
            config = TrainConfig(seed=split_seed, holdout_images=tuple(sorted(held)), rotations=(0,),
                                 max_patches=max_patches, max_iter=max_iter, workers=workers)
            log(f"split {r + 1} of {repeats} (seed {split_seed}): {len(base_ids)} tiles labelled at the start, "
                f"{len(held_ids)} held out, a pool of {len(pool_ids)}")
            cache, curves = {}, {name: [] for name in orders}
            for name, order in orders.items():
                for k in sizes:
                    chosen = base_ids + order[:k]
                    key = frozenset(chosen)
                    if key not in cache:
                        folder = Path(tmp) / f"split{r}_{name}_{k}"
                        write_subset(root, tiles_raw, consensus_raw, chosen + held_ids, folder)
                        card = train_model(folder, Path(tmp) / f"model{r}_{name}_{k}", config, force=True,
                                           log=lambda *_: None)
                        cache[key] = card["heldout_metrics"]
                    m = cache[key]
                    point = {"n_labelled": k, "fan_f1": m.get("fan_f1"), "spot_f1": m.get("spot_f1"),
                             "fan_direction_median_deg": m.get("fan_direction_median_deg")}
                    curves[name].append(point)
                    log(f"  {name:>6} order, {len(base_ids)} + {k} labelled tiles: fan F1 {point['fan_f1']:.3f}, "
                        f"spot F1 {point['spot_f1']:.3f}  ({time.perf_counter() - started:.0f} s)")
            runs.append({"seed": split_seed, "images": images,
                         "base_tiles": len(base_ids), "holdout_tiles": len(held_ids), "pool_tiles": len(pool_ids),
                         "curves": curves, "order": {"ranked": orders["ranked"][:sizes[-1]],
                                                     "random": orders["random"][:sizes[-1]]},
                         "ranking": ranking})
    study = _study_record(model_dir, root, seed, sizes, batch, runs, max_patches, max_iter, n_boot, n_refits)
    study["seconds"] = round(time.perf_counter() - started, 1)
    study = jsonable(study)
    out = Path(out)
    write_json(out / "labelling_order.json", study, indent=1)
    plot_order_study(study, out / "labelling_order.png")
    log(study_summary(study))
    return study


_METRICS = {"fan_f1": "fan F1", "mean_f1": "mean of fan and spot F1"}


def _metric(points, metric):
    if metric == "mean_f1":
        return [(p["fan_f1"] + p["spot_f1"]) / 2 for p in points]
    return [p[metric] for p in points]


def _study_record(model_dir, root, seed, sizes, batch, runs, max_patches, max_iter, n_boot, n_refits):
    """The study's record from its splits: per-split curves, their comparison and the mean curves."""
    comparison, saved = {}, {}
    for metric in _METRICS:
        ranked = [_metric(run["curves"]["ranked"], metric) for run in runs]
        random = [_metric(run["curves"]["random"], metric) for run in runs]
        comparison[metric] = compare_orders(sizes, ranked, random, n_boot=n_boot, seed=seed)
        per = comparison[metric]["saved"]
        saved[metric] = {"target": float(np.mean(per["target"])), "ranked_tiles": float(np.mean(per["ranked_tiles"])),
                         "random_tiles": float(np.mean(per["random_tiles"])), "saved": per["mean"],
                         "interval_90": per["interval_90"], "n_saved": per["n_saved"], "repeats": len(runs)}
        for run, s, t, a, b in zip(runs, per["saved"], per["target"], per["ranked_tiles"], per["random_tiles"]):
            run.setdefault("saved", {})[metric] = {"target": t, "ranked_tiles": a, "random_tiles": b, "saved": s}
    curves = {}
    for name in ("ranked", "random"):
        points = []
        for j, k in enumerate(sizes):
            at = [run["curves"][name][j] for run in runs]
            point = {"n_labelled": k}
            for key in ("fan_f1", "spot_f1", "fan_direction_median_deg"):
                values = np.array([np.nan if p[key] is None else p[key] for p in at], dtype=np.float64)
                point[key] = float(np.nanmean(values)) if np.any(np.isfinite(values)) else None
            for key in ("fan_f1", "spot_f1"):
                interval = bootstrap_mean_interval([p[key] for p in at], n_boot=n_boot, seed=seed)
                point[f"{key}_interval_90"] = None if interval is None else list(interval)
            points.append(point)
        curves[name] = points
    n_all = [run["base_tiles"] + k for run in runs for k in sizes]
    f1_all = [p["fan_f1"] for run in runs for p in run["curves"]["ranked"]]
    needed = tiles_needed_interval(n_all, f1_all, FAN_F1_TARGET, n_boot=n_refits, seed=seed)
    n_max = int(np.mean([run["base_tiles"] for run in runs])) + sizes[-1]
    needed["words"] = _needed_words(needed, FAN_F1_TARGET, n_max)
    first = runs[0]
    first_ranking = first["ranking"].to_dict(orient="records")
    for run in runs:
        run.pop("ranking")
    return {
        "tileset": str(root), "model_dir": str(model_dir), "seed": seed, "seeds": [run["seed"] for run in runs],
        "images": first["images"], "base_tiles": first["base_tiles"], "holdout_tiles": first["holdout_tiles"],
        "pool_tiles": first["pool_tiles"], "batch": batch, "sizes": sizes,
        "train_config": {"rotations": [0], "max_patches": max_patches, "max_iter": max_iter},
        "interval": f"{INTERVAL_LEVEL:.0%} percentile bootstrap of the mean over the {len(runs)} splits "
                    f"({n_boot} resamples)",
        "curves": curves, "saved": saved, "comparison": comparison,
        "verdict": saving_words(comparison["fan_f1"]["saved"]),
        "repeats": runs, "tiles_needed": needed, "ranking": first_ranking,
    }


def _fmt_interval(interval, digits=3):
    return "" if interval is None else f" ({interval[0]:.{digits}f} to {interval[1]:.{digits}f})"


def study_summary(study):
    """Plain-words summary of :func:`labelling_order_study` (also of a record with one split and no repeats)."""
    runs = study.get("repeats") or [study]
    holdout = study.get("holdout_tiles")
    held = (f"{len(study['images']['holdout'])} held-out images" + (f" ({holdout} tiles)" if holdout else ""))
    splits = f" over {len(runs)} seeded splits (seeds {study['seeds'][0]} to {study['seeds'][-1]})" \
        if len(runs) > 1 else f" (seed {study['seed']})"
    lines = [f"labelling order on {study['tileset']}{splits}: {study['base_tiles']} tiles labelled at the start, "
             f"batches of {study['batch']} from a pool of {study['pool_tiles']}, scored on {held}"]
    mean = "mean " if len(runs) > 1 else ""
    if len(runs) > 1:
        lines.append(f"  intervals: {study['interval']}")
    for name, points in study["curves"].items():
        text = ", ".join(f"+{p['n_labelled']}: {p['fan_f1']:.3f}{_fmt_interval(p.get('fan_f1_interval_90'))}"
                         for p in points)
        lines.append(f"  {mean}fan F1, {name} order: {text}")
    comparison = study.get("comparison")
    if comparison:
        d = comparison["fan_f1"]["difference"]
        ci = d["interval_90"]
        text = ", ".join(f"+{k}: {m:+.3f}" + ("" if ci is None else f" ({lo:+.3f} to {hi:+.3f})")
                         for k, m, lo, hi in zip(study["sizes"], d["mean"], *(ci or [d["mean"], d["mean"]]))
                         if k > 0)
        lines.append(f"  fan F1, ranked minus random (paired by split): {text}")
        for metric, label in _METRICS.items():
            area = comparison[metric]["area"]
            lines.append(f"  {label}, ranked minus random averaged over the batches: {area['mean']:+.3f}"
                         f"{_fmt_interval(area['interval_90'])}")
        for metric, label in _METRICS.items():
            lines.append(f"  {saving_words(comparison[metric]['saved'], label=label)}")
        s = comparison["fan_f1"]["saved"]
        lines.append(f"    (per split the target is the lower of the two orders' final fan F1, {np.mean(s['target']):.3f} "
                     f"on average; the random order reaches it with {np.mean(s['random_tiles']):.1f} pool tiles on "
                     f"average, the ranked order with {np.mean(s['ranked_tiles']):.1f})")
    else:
        for metric, s in study["saved"].items():
            label = _METRICS.get(metric, metric)
            if s["saved"] is None:
                lines.append(f"  {label}: the ranked order does not reach the random order's final "
                             f"{s['target']:.3f} within the pool tiles tried")
            else:
                verdict = (f"{s['saved']:.1f} tiles saved" if s["saved"] >= 0
                           else f"the ranked order needs {-s['saved']:.1f} tiles more")
                lines.append(f"  {label}: the random order reaches {s['target']:.3f} with {s['random_tiles']:.1f} "
                             f"pool tiles, the ranked order with {s['ranked_tiles']:.1f}: {verdict}")
    needed = study.get("tiles_needed") or {}
    if needed.get("words"):
        lines.append(f"  {needed['words']}")
        if needed.get("law"):
            lines.append(f"    fitted on the ranked order: {needed['law']}")
    if study.get("seconds") is not None:
        lines.append(f"  {study['seconds']:.0f} s")
    return "\n".join(lines)


def plot_order_study(study, path):
    """Mean learning curve per labelling order with its interval band, and the paired difference."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    runs = study.get("repeats") or [study]
    fig, axes = plt.subplots(1, 3, figsize=(14, 4.2))
    colours = {"ranked": "tab:red", "random": "tab:gray"}
    mean = "mean " if len(runs) > 1 else ""
    for ax, metric, label in ((axes[0], "fan_f1", "held-out fan F1"), (axes[1], "spot_f1", "held-out spot F1")):
        for name, points in study["curves"].items():
            colour = colours.get(name, "black")
            n = [p["n_labelled"] for p in points]
            for run in runs if len(runs) > 1 else []:
                ax.plot(n, [p[metric] for p in run["curves"][name]], "-", color=colour, alpha=0.15, lw=0.8)
            ax.plot(n, [p[metric] for p in points], "o-", color=colour, label=f"{name} order" + (" (mean)" if mean else ""))
            bands = [p.get(f"{metric}_interval_90") for p in points]
            if all(b is not None for b in bands):
                ax.fill_between(n, [b[0] for b in bands], [b[1] for b in bands], color=colour, alpha=0.2,
                                label=f"90 % interval of the mean, {name}")
        ax.set_xlabel(f"pool tiles labelled (besides {study['base_tiles']} at the start)")
        ax.set_ylabel(label)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7)
    ax = axes[2]
    comparison = study.get("comparison")
    if comparison:
        sizes = study["sizes"]
        d = comparison["fan_f1"]["difference"]
        for row in d["per_repeat"]:
            ax.plot(sizes, row, "-", color="tab:blue", alpha=0.2, lw=0.8)
        ax.plot(sizes, d["mean"], "o-", color="tab:blue", label="mean over splits (thin: each split)")
        if d["interval_90"] is not None:
            ax.fill_between(sizes, d["interval_90"][0], d["interval_90"][1], color="tab:blue", alpha=0.2,
                            label="90 % interval of the mean")
        ax.axhline(0.0, color="black", lw=0.8)
        ax.set_xlabel("pool tiles labelled")
        ax.set_ylabel("fan F1, ranked minus random (same split)")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7)
        title = study.get("verdict") or saving_words(comparison["fan_f1"]["saved"])
    else:
        ax.axis("off")
        s = study["saved"]["fan_f1"]
        saved = "n/a" if s["saved"] is None else f"{s['saved']:.1f}"
        title = f"tiles saved to reach fan F1 {s['target']:.3f}: {saved} (seed {study['seed']})"
    fig.suptitle(f"Labelling order: {title}", fontsize=9, wrap=True)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
    return path
