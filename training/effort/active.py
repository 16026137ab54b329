"""Where the next volunteer hour goes: rank tiles by how much their consensus would teach the model.

A tile teaches the model most when the model is unsure about its patches
(**uncertainty**: the mean entropy of the calibrated none / fan / spot patch
probabilities over the tile's valid patches, divided by ``log 3`` so it lies in
[0, 1]) and when it is unlike the tiles already chosen (**diversity**: the
distance between tiles' mean feature vectors, standardised by the model's own
unfamiliarity statistics). :func:`rank_tiles` picks greedily: each next tile
maximises ``uncertainty * min(1, distance to the nearest tile already picked /
median distance between tiles)``, the first tile the most uncertain one (the
uncertainty-times-diversity rule of batch active learning).

:func:`labelling_order_study` checks that this order pays off: starting from a
few labelled images it adds the pool's tiles in batches, in ranked and in
random order (same seed), retrains a small model after every batch, and scores
each on fixed held-out images; the tiles saved are how many fewer tiles the
ranked order needs to reach the random order's final score.
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

__all__ = ["tile_uncertainty", "greedy_order", "rank_tiles", "labelling_order_study", "study_summary",
           "tiles_to_reach", "tiles_needed_interval"]

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


def greedy_order(uncertainty, vectors):
    """Order tiles by uncertainty times diversity (greedy, one tile at a time).

    Parameters
    ----------
    uncertainty : ndarray of shape (n,)
        In [0, 1].
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


def _describe_tiles(model, tileset, tile_ids):
    from detector.inference.detect import detect_tile

    stats = model.card.get("unfamiliarity") or {}
    rows, vectors = [], []
    for tile_id in tile_ids:
        tile = tileset.read_tile(tile_id)
        result = detect_tile(model, tile, tile_id=tile_id)
        rows.append({"tile_id": tile_id, "uncertainty": tile_uncertainty(result.proba, result.grid.valid),
                     "p_deposit": result.p_deposit, "n_detections": int(len(result.detections))})
        vectors.append(result.summary)
    V = np.asarray(vectors, dtype=np.float64)
    if stats and len(V):
        V = (V - np.asarray(stats["mean"])) / np.asarray(stats["scale"])
    return pd.DataFrame(rows), V


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
        ``rank`` (1 = label first), ``tile_id``, ``uncertainty``, ``gain`` (the
        uncertainty-times-diversity value at its pick), ``p_deposit``, ``n_detections``.
    """
    from detector.inference.model import load_model
    from detector.tileset import load_tileset

    model = load_model(model_dir)
    tileset = load_tileset(tileset_root)
    ids = list(tileset.tiles["tile_id"]) if tile_ids is None else [str(t) for t in tile_ids]
    unknown = sorted(set(ids) - set(tileset.tiles["tile_id"]))
    if unknown:
        raise DetectorError(f"tile(s) {unknown[:3]!r} are not in {str(tileset_root)!r}.")
    log(f"ranking {len(ids)} tiles by patch uncertainty and diversity")
    table, V = _describe_tiles(model, tileset, ids)
    order, gain = greedy_order(table["uncertainty"].to_numpy(), V)
    ranked = table.iloc[order].reset_index(drop=True)
    ranked.insert(0, "rank", np.arange(1, len(ranked) + 1))
    ranked.insert(3, "gain", gain)
    return ranked


# --------------------------------------------------------------------------- the order study


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


def labelling_order_study(model_dir, tileset_root, out, *, base_images=3, holdout_images=3, batch=4, n_batches=3,
                          seed=0, max_patches=20000, max_iter=60, workers=1, log=print):
    """Retrain on batches of a pool in ranked and in random order; compare the learning curves.

    The tile set's images are split once (seeded): ``base_images`` start
    labelled, ``holdout_images`` score every run, the rest are the pool. The
    ranked order comes from :func:`rank_tiles` with ``model_dir`` on the pool;
    the random order is a seeded permutation. After 0, ``batch``, ...,
    ``n_batches * batch`` pool tiles a small model (one rotation,
    ``max_patches``, ``max_iter``) is trained and scored on the held-out images.

    Returns
    -------
    study : dict
        ``curves`` (per order: n_labelled, fan_f1, spot_f1, direction median),
        ``saved`` (tiles saved by the ranked order to reach the random order's
        last fan F1 and mean F1), ``ranking``, ``seconds``; written to
        ``out/labelling_order.json`` with ``out/labelling_order.png``.
    """
    from detector.contract import CONSENSUS_FILE, TILES_FILE
    from detector.tileset import load_tileset

    from ..fitting.train import TrainConfig, train_model

    for name, value in (("batch", batch), ("batches", n_batches)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise DetectorError(f"{name} {value!r} must be a whole number >= 1.")
    started = time.perf_counter()
    root = Path(tileset_root)
    tileset = load_tileset(root)
    images = list(np.random.default_rng(seed).permutation(tileset.image_ids))
    if len(images) < base_images + holdout_images + 1:
        raise DetectorError(f"the study needs more than {base_images + holdout_images} images in "
                            f"{str(root)!r}; found {len(images)}.")
    base, held, pool_images = images[:base_images], images[base_images:base_images + holdout_images], \
        images[base_images + holdout_images:]
    tiles = tileset.tiles
    base_ids = tiles.loc[tiles["image_id"].isin(base), "tile_id"].tolist()
    held_ids = tiles.loc[tiles["image_id"].isin(held), "tile_id"].tolist()
    pool_ids = tiles.loc[tiles["image_id"].isin(pool_images), "tile_id"].tolist()
    if len(pool_ids) < batch * n_batches:
        raise DetectorError(f"the pool holds {len(pool_ids)} tiles; {n_batches} batches of {batch} need "
                            f"{batch * n_batches}.")
    ranking = rank_tiles(model_dir, root, pool_ids, log=log)
    orders = {"ranked": ranking["tile_id"].tolist(),
              "random": [pool_ids[i] for i in np.random.default_rng(seed).permutation(len(pool_ids))]}
    tiles_raw = pd.read_csv(root / TILES_FILE, dtype=str, keep_default_na=False)
    consensus_raw = pd.read_csv(root / CONSENSUS_FILE, dtype=str, keep_default_na=False)
    sizes = [k * batch for k in range(n_batches + 1)]
    config = TrainConfig(seed=seed, holdout_images=tuple(sorted(held)), rotations=(0,), max_patches=max_patches,
                         max_iter=max_iter, workers=workers)
    curves = {name: [] for name in orders}
    with tempfile.TemporaryDirectory(prefix="frostvane-order-") as tmp:
        cache = {}
        for name, order in orders.items():
            for k in sizes:
                chosen = base_ids + order[:k]
                key = frozenset(chosen)
                if key not in cache:
                    folder = Path(tmp) / f"{name}_{k}"
                    write_subset(root, tiles_raw, consensus_raw, chosen + held_ids, folder)
                    card = train_model(folder, Path(tmp) / f"model_{name}_{k}", config, force=True,
                                       log=lambda *_: None)
                    cache[key] = card["heldout_metrics"]
                m = cache[key]
                point = {"n_labelled": k, "fan_f1": m.get("fan_f1"), "spot_f1": m.get("spot_f1"),
                         "fan_direction_median_deg": m.get("fan_direction_median_deg")}
                curves[name].append(point)
                log(f"  {name:>6} order, {len(base_ids)} + {k} labelled tiles: fan F1 {point['fan_f1']:.3f}, "
                    f"spot F1 {point['spot_f1']:.3f}")
    saved = {}
    for metric in ("fan_f1", "mean_f1"):
        def score(points):
            if metric == "fan_f1":
                return np.array([p["fan_f1"] for p in points], dtype=np.float64)
            return np.array([(p["fan_f1"] + p["spot_f1"]) / 2 for p in points], dtype=np.float64)

        target = float(score(curves["random"])[-1])
        ranked_need = tiles_to_reach(sizes, score(curves["ranked"]), target)
        random_need = tiles_to_reach(sizes, score(curves["random"]), target)
        saved[metric] = {"target": target, "ranked_tiles": ranked_need, "random_tiles": random_need,
                         "saved": None if ranked_need is None or random_need is None else random_need - ranked_need}
    n_all = [len(base_ids) + k for k in sizes]
    needed = tiles_needed_interval(n_all, [p["fan_f1"] for p in curves["ranked"]], FAN_F1_TARGET, seed=seed)
    needed["words"] = _needed_words(needed, FAN_F1_TARGET, n_all[-1])
    study = jsonable({
        "tileset": str(root), "model_dir": str(model_dir), "seed": seed,
        "images": {"base": base, "holdout": held, "pool": pool_images},
        "base_tiles": len(base_ids), "pool_tiles": len(pool_ids), "batch": batch, "sizes": sizes,
        "train_config": {"rotations": [0], "max_patches": max_patches, "max_iter": max_iter},
        "curves": curves, "saved": saved, "tiles_needed": needed, "ranking": ranking.to_dict(orient="records"),
        "seconds": round(time.perf_counter() - started, 1),
    })
    out = Path(out)
    write_json(out / "labelling_order.json", study, indent=1)
    plot_order_study(study, out / "labelling_order.png")
    log(study_summary(study))
    return study


def study_summary(study):
    """Plain-words summary of :func:`labelling_order_study`."""
    lines = [f"labelling order on {study['tileset']}: {study['base_tiles']} tiles labelled at the start, "
             f"batches of {study['batch']} from a pool of {study['pool_tiles']}, scored on "
             f"{len(study['images']['holdout'])} held-out images"]
    for name, points in study["curves"].items():
        text = ", ".join(f"+{p['n_labelled']}: {p['fan_f1']:.3f}" for p in points)
        lines.append(f"  fan F1, {name} order: {text}")
    for metric, s in study["saved"].items():
        label = "fan F1" if metric == "fan_f1" else "mean of fan and spot F1"
        if s["saved"] is None:
            lines.append(f"  {label}: the ranked order does not reach the random order's final {s['target']:.3f} "
                         f"within the pool tiles tried")
        else:
            verdict = (f"{s['saved']:.1f} tiles saved" if s["saved"] >= 0
                       else f"the ranked order needs {-s['saved']:.1f} tiles more")
            lines.append(f"  {label}: the random order reaches {s['target']:.3f} with {s['random_tiles']:.1f} pool "
                         f"tiles, the ranked order with {s['ranked_tiles']:.1f}: {verdict}")
    needed = study.get("tiles_needed") or {}
    if needed.get("words"):
        lines.append(f"  {needed['words']}")
        if needed.get("law"):
            lines.append(f"    fitted on the ranked order: {needed['law']}")
    return "\n".join(lines)


def plot_order_study(study, path):
    """Learning curve per labelling order (fan F1 and spot F1 against pool tiles labelled)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    colours = {"ranked": "tab:red", "random": "tab:gray"}
    for ax, metric, label in ((axes[0], "fan_f1", "held-out fan F1"), (axes[1], "spot_f1", "held-out spot F1")):
        for name, points in study["curves"].items():
            n = [p["n_labelled"] for p in points]
            ax.plot(n, [p[metric] for p in points], "o-", color=colours.get(name, "black"), label=f"{name} order")
        ax.set_xlabel(f"pool tiles labelled (besides {study['base_tiles']} at the start)")
        ax.set_ylabel(label)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
    s = study["saved"]["fan_f1"]
    saved = "n/a" if s["saved"] is None else f"{s['saved']:.1f}"
    fig.suptitle(f"Labelling order: tiles saved to reach fan F1 {s['target']:.3f}: {saved} (seed {study['seed']})",
                 fontsize=10)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
    return path
