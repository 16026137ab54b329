"""Learning curves: how the held-out error falls with more consensus tiles, and how many more a target needs.

:func:`learning_curve` trains on nested subsets of a tile set's images (the
held-out images fixed) and fits ``error(n) = a * n**-b + c`` to each held-out
error, where ``n`` is the number of consensus tiles trained on and the error is
``1 - F1`` for the F1 targets and the median fan direction error (degrees) for
the direction target. Verdicts are stated in the metric itself (F1, degrees),
never as the error: an F1 curve whose error levels off at ``c`` levels off at
``F1 = 1 - c``.
"""

import math
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from detector.errors import DetectorError
from detector.io import atomic_path, write_json

from .._json import jsonable as _jsonable
from .._subsets import write_subset

__all__ = [
    "LEARNING_CURVE_TARGETS",
    "power_law",
    "fit_power_law",
    "tiles_needed",
    "learning_curve",
    "learning_curve_summary",
]

#: Targets of the learning curve: the metric, how its error is defined, and the largest acceptable error.
#: ``to_metric`` turns an error back into the metric (F1 = 1 - error; degrees are their own error).
LEARNING_CURVE_TARGETS = {
    "fan_f1": {"metric": "fan F1", "error": "1 - fan F1", "target_error": 0.2, "target": "fan F1 >= 0.8",
               "complement": True},
    "spot_f1": {"metric": "spot F1", "error": "1 - spot F1", "target_error": 0.2, "target": "spot F1 >= 0.8",
                "complement": True},
    "fan_direction_median_deg": {"metric": "median fan direction error (deg)",
                                 "error": "median fan direction error, degrees", "target_error": 10.0,
                                 "target": "median fan direction error <= 10 deg", "complement": False},
}

# A power law fitted on a handful of points says little beyond this factor of the data.
_MAX_EXTRAPOLATION = 100
# Bound of the exponent b. Learning-curve exponents of classifiers mostly lie below 1 (value
# from memory); 2 leaves room while keeping a fit through noisy points from becoming a cliff.
_B_MAX = 2.0
# Below this exponent a curve is flat: a 10x larger training set lowers the error by < 2.3 %.
_B_FLAT = 0.01

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


def _as_metric(target, error):
    """An error value said as the metric: F1 = 1 - error, degrees as they are."""
    return 1.0 - error if target["complement"] else error


def _law_text(target, fit):
    """The fitted form with its parameters, in words a reader can check."""
    return (f"{target['error']} = a * n^-b + c, n consensus tiles; a = {fit['a']:.3g}, b = {fit['b']:.3g}, "
            f"c = {fit['c']:.3g}" + ("" if fit.get("with_c", True) else " (c fixed at 0: too few points)"))


def _curve_verdicts(points, fits):
    """How many more consensus tiles each target needs, from the fitted curves."""
    n_max = max(p["n_tiles"] for p in points)
    out = {}
    for metric, target in LEARNING_CURVE_TARGETS.items():
        errors = [p["errors"][metric] for p in points if p["n_tiles"] == n_max]
        last = errors[-1] if errors else None
        fit = fits.get(metric)
        entry = {**target, "measured_error_at_largest": last, "n_tiles_largest": n_max, "fit": fit,
                 "measured_at_largest": None if last is None else _as_metric(target, last),
                 "law": None if fit is None else _law_text(target, fit),
                 "levels_off_at": None if fit is None else _as_metric(target, fit["c"])}
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
                                     f"({target['metric']} levels off at {_as_metric(target, fit['c']):.3g})")
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
    """A tile-set folder restricted to some images (images linked, see :mod:`training._subsets`)."""
    chosen = tiles_raw.loc[tiles_raw["image_id"].isin(image_ids), "tile_id"]
    return write_subset(tileset_root, tiles_raw, consensus_raw, set(chosen), folder)


def learning_curve(tileset_root, *, seed=0, fractions=None, out=None, max_patches=20000, max_iter=100,
                   log=print):
    """Train on nested image subsets, fit power laws to the held-out errors, estimate tiles needed.

    The held-out images are chosen once (:func:`training.fitting.train.split_images`) and
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

    from ..fitting.train import TrainConfig, split_images, train_model

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
        "law": "error(n) = a * n^-b + c (c = 0 with fewer than 4 points); error = 1 - F1 for F1, degrees for direction",
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
        lines.append(f"  {entry['verdict']}")
        if entry.get("law"):
            lines.append(f"    fitted: {entry['law']}")
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
