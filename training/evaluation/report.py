"""Evaluation report: report.json, report.md and PNG plots from :func:`training.evaluation.scoring.score_catalogs`."""

import math
from pathlib import Path

import numpy as np

from detector.errors import DetectorError
from detector.io import atomic_path, write_json

from .diagnose import CONSENSUS_OUTCOMES, DETECTION_OUTCOMES, DIRECTION_QUALITIES

__all__ = ["TARGETS", "write_report", "headline_table", "evaluate_targets", "reliability_bins"]

#: Acceptance targets: (key, label, path into the scores dict, comparison, threshold, unit).
TARGETS = (
    ("fan_f1", "Fan F1", ("objects", "fan", "f1"), ">=", 0.80, ""),
    ("spot_f1", "Spot F1", ("objects", "spot", "f1"), ">=", 0.80, ""),
    ("fan_dir_median", "Per-fan direction error, median", ("direction", "per_fan", "median"), "<=", 10.0, "deg"),
    ("fan_dir_p90", "Per-fan direction error, 90th pct", ("direction", "per_fan", "p90"), "<=", 30.0, "deg"),
    ("flip_rate", "Flip rate (error > 135 deg)", ("direction", "per_fan", "flip_rate"), "<=", 0.03, "%"),
    ("tile_mean_median", "Per-tile mean direction error, median", ("direction", "per_tile_mean", "median"), "<=", 8.0,
     "deg"),
    ("dice", "Coverage Dice (mean over tiles with deposits)", ("coverage", "dice_mean"), ">=", 0.65, ""),
    ("covered_error", "Covered-fraction error, mean", ("coverage", "covered_error_pp_mean"), "<=", 0.8, "pp"),
    ("false_per_mpx", "False detections per Mpx, deposit-free tiles", ("objects", "false_per_mpx", "value"), "<", 0.5,
     ""),
    ("beats_baselines", "Better than every baseline (median error)", ("baselines", "per_fan", "model_better_than_all"),
     "is", True, ""),
)

_INTERVAL_OF = {
    "fan_f1": "fan_f1",
    "spot_f1": "spot_f1",
    "fan_dir_median": "fan_direction_median",
    "fan_dir_p90": "fan_direction_p90",
    "flip_rate": "flip_rate",
    "tile_mean_median": "tile_mean_median",
    "dice": "dice_mean",
    "covered_error": "covered_error_pp_mean",
}


def _get(scores, path):
    node = scores
    for key in path:
        if not isinstance(node, dict) or key not in node:
            return None
        node = node[key]
    return node


def _passes(value, op, threshold):
    if value is None:
        return None
    if op == "is":
        return bool(value) is threshold
    return {">=": value >= threshold, "<=": value <= threshold, "<": value < threshold}[op]


def evaluate_targets(scores):
    """Each target with the model's value and whether it is met (None when not measured).

    Returns
    -------
    list of dict
        key, label, value, op, threshold, unit, met.
    """
    return [
        {"key": key, "label": label, "value": _get(scores, path), "op": op, "threshold": thr, "unit": unit,
         "met": _passes(_get(scores, path), op, thr)}
        for key, label, path, op, thr, unit in TARGETS
    ]


def _fmt(value, unit=""):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if unit == "%":
        return f"{100 * value:.1f} %"
    if unit in ("deg", "pp"):
        return f"{value:.1f} {unit}"
    return f"{value:.3f}"


def _fmt_target(op, thr, unit):
    if op == "is":
        return "yes"
    return f"{op} {_fmt(thr, unit)}"


def headline_table(scores, ceiling=None):
    """Markdown table of the headline numbers: model, its 95 % interval, ceiling and target.

    Parameters
    ----------
    scores : dict
        Output of :func:`training.evaluation.scoring.score_catalogs` for the model.
    ceiling : dict, optional
        The same for the synthetic noise-free truth scored against its consensus.

    Returns
    -------
    str
    """
    intervals = scores.get("intervals", {})
    kind = intervals.get("kind", "95 % CI (bootstrap by image)")
    lines = [
        f"| Metric | Model | {kind} | Ceiling (truth vs consensus) | Target | Met |",
        "| --- | --- | --- | --- | --- | --- |",
    ]
    for row in evaluate_targets(scores):
        ci = intervals.get(_INTERVAL_OF.get(row["key"], ""), None)
        ci_text = f"{_fmt(ci[0], row['unit'])} - {_fmt(ci[1], row['unit'])}" if ci else ""
        ceil = _fmt(_get(ceiling, dict((t[0], t[2]) for t in TARGETS)[row["key"]]), row["unit"]) if ceiling else ""
        met = {True: "yes", False: "**no**", None: "n/a"}[row["met"]]
        lines.append(
            f"| {row['label']} | {_fmt(row['value'], row['unit'])} | {ci_text} | {ceil} | "
            f"{_fmt_target(row['op'], row['threshold'], row['unit'])} | {met} |"
        )
    return "\n".join(lines)


def _baseline_table(scores):
    per_fan = _get(scores, ("baselines", "per_fan")) or {}
    per_tile = _get(scores, ("baselines", "per_tile_mean_on_matched")) or {}
    model = _get(scores, ("direction", "per_fan")) or {}
    lines = [
        "| Method | Median err | 90th pct | Within 20 deg | Flip rate | Skill (1 - med/med) | Delta within 20 | "
        "Tile-mean median |",
        "| --- | --- | --- | --- | --- | --- | --- | --- |",
        f"| model | {_fmt(model.get('median'), 'deg')} | {_fmt(model.get('p90'), 'deg')} | "
        f"{_fmt(model.get('within_20'), '%')} | {_fmt(model.get('flip_rate'), '%')} | | | "
        f"{_fmt(_get(per_tile, ('model', 'median')), 'deg')} |",
    ]
    for name, m in per_fan.items():
        if not isinstance(m, dict):
            continue
        lines.append(
            f"| {name} | {_fmt(m['median'], 'deg')} | {_fmt(m['p90'], 'deg')} | {_fmt(m['within_20'], '%')} | "
            f"{_fmt(m['flip_rate'], '%')} | {_fmt(m['skill_median'])} | {_fmt(m['delta_within_20'], '%')} | "
            f"{_fmt(_get(per_tile, (name, 'median')), 'deg')} |"
        )
    return "\n".join(lines)


def _tile_direction_note(scores):
    """Why the headline's per-tile direction error and the baseline table's tile-mean median differ."""
    all_fans = _get(scores, ("direction", "per_tile_mean")) or {}
    prevailing = _get(scores, ("direction", "per_tile_prevailing")) or {}
    matched = _get(scores, ("baselines", "per_tile_mean_on_matched", "model")) or {}
    no_fans = all_fans.get("n_tiles_without_detected_fans")
    return (
        f"Per-tile direction figures, measuring different things: the headline's per-tile mean direction "
        f"error ({_fmt(all_fans.get('median'), 'deg')} median over {all_fans.get('n', 0)} tiles with at least 3 "
        f"consensus fans) compares the circular mean of every fan the model detected on a tile, weighted by "
        f"score x direction confidence x length, with the length-weighted circular mean of the tile's consensus "
        f"fans, so missed, false and duplicated fans move it"
        + (f" ({no_fans} further tiles of that kind had no detected fan and are left out)" if no_fans else "")
        + f"; the per-tile prevailing direction error ({_fmt(prevailing.get('median'), 'deg')} median) pools "
        f"both sides robustly instead (the direction a screening reports per tile, which stray fans or a "
        f"second wind's minority do not move). The tile-mean column above ({_fmt(matched.get('median'), 'deg')} median over {matched.get('n', 0)} "
        f"tiles) uses the matched fans only, both sides weighted by the consensus length, so that only the "
        f"directions differ: it measures how well directions are read, not how well fans are found, and is the "
        f"one the baselines can be set beside. The gap between the two is the cost of detection errors."
    )


def _breakdown_tables(scores):
    parts = []
    for grouping, groups in (scores.get("breakdowns") or {}).items():
        lines = [
            f"### By {grouping}",
            "",
            "| Group | Fan P | Fan R | Fan F1 | Spot F1 | Consensus fans | Dir median | Dir p90 | Flip rate |",
            "| --- | --- | --- | --- | --- | --- | --- | --- | --- |",
        ]
        for label, e in groups.items():
            fan, spot, d = e.get("fan", {}), e.get("spot", {}), e.get("direction", {})
            lines.append(
                f"| {label} | {_fmt(fan.get('precision'))} | {_fmt(fan.get('recall'))} | {_fmt(fan.get('f1'))} | "
                f"{_fmt(spot.get('f1'))} | {fan.get('n_consensus', '')} | {_fmt(d.get('median'), 'deg')} | "
                f"{_fmt(d.get('p90'), 'deg')} | {_fmt(d.get('flip_rate'), '%')} |"
            )
        parts.append("\n".join(lines))
    return "\n\n".join(parts)


_OUTCOME_LABELS = {"consensus": CONSENSUS_OUTCOMES, "detections": DETECTION_OUTCOMES,
                   "matched_fans": DIRECTION_QUALITIES}
_SIDE_NAMES = {"consensus": "Consensus", "detections": "Detected", "matched_fans": "Matched"}


def _pct(value):
    return "n/a" if value is None else f"{100 * value:.1f} %"


def _error_shares_table(headline):
    """Markdown tables of the headline outcome shares, one per side."""
    parts = []
    for side in ("consensus", "detections"):
        outcomes = _OUTCOME_LABELS[side]
        lines = [f"| {_SIDE_NAMES[side]} | n | " + " | ".join(outcomes) + " |",
                 "| --- | --- | " + " | ".join("---" for _ in outcomes) + " |"]
        for kind, entry in (headline.get(side) or {}).items():
            shares = " | ".join(_pct(entry.get(o)) for o in outcomes)
            lines.append(f"| {kind}s | {entry.get('n', 0)} | {shares} |")
        parts.append("\n".join(lines))
    mf = headline.get("matched_fans") or {}
    settings = headline.get("settings") or {}
    outcomes = _OUTCOME_LABELS["matched_fans"]
    parts.append("\n".join([
        "| Matched fans | n | " + " | ".join(outcomes) + " |",
        "| --- | --- | " + " | ".join("---" for _ in outcomes) + " |",
        f"| direction | {mf.get('n', 0)} | " + " | ".join(_pct(mf.get(o)) for o in outcomes) + " |",
    ]))
    if settings:
        parts.append(f"Direction off: angular error above {settings.get('direction_off_deg')} deg; flipped: above "
                     f"{settings.get('flip_deg')} deg.")
    return "\n\n".join(parts)


def _error_group_table(records, group_key, title, *, side="consensus", kinds=("fan", "spot")):
    """Markdown table of outcome shares per group and kind from tidy tally records."""
    outcomes = _OUTCOME_LABELS[side]
    rows = {}
    for r in records:
        if r.get("side") != side or r.get("kind") not in kinds:
            continue
        entry = rows.setdefault((r[group_key], r["kind"]), {"n": 0})
        entry[r["outcome"]] = r["share"]
        entry["n"] += int(r["n"])
    if not rows:
        return ""
    lines = [f"### {title}", "", f"| {group_key} | kind | n | " + " | ".join(outcomes) + " |",
             "| --- | --- | --- | " + " | ".join("---" for _ in outcomes) + " |"]
    for (group, kind), entry in rows.items():
        shares = " | ".join(_pct(entry.get(o)) for o in outcomes)
        lines.append(f"| {group} | {kind} | {entry['n']} | {shares} |")
    return "\n".join(lines)


def _error_section(errors):
    """The "Where features are lost" section of report.md."""
    md = ["## Where features are lost", "",
          "Each consensus feature and each detection has exactly one outcome (see errors_consensus.csv and "
          "errors_detections.csv). Consensus, first that applies: matched; as_other_kind (a free detection of the "
          "other kind touches it); source_misplaced (a free detection of its kind touches it, apex outside the match "
          "radius); merged (touched only by a detection matched to another feature); missed. Detections: true; "
          "duplicate (on a feature of its kind matched by another); on_other_kind; misplaced (on a free feature of "
          "its kind, too far to match); background. Touch: footprints share pixels or the detection lies within "
          "the match radius.", "",
          _error_shares_table(errors.get("headline") or {}), ""]
    for table in (
        _error_group_table(errors.get("by_length") or [], "length_bin", "Consensus fans by length (px)",
                           kinds=("fan",)),
        _error_group_table(errors.get("by_votes") or [], "votes_bin", "Consensus features by votes"),
        _error_group_table(errors.get("by_image") or [], "image_id", "Consensus features by image"),
        _error_group_table(errors.get("by_image") or [], "image_id", "Detections by image", side="detections"),
        _error_group_table(errors.get("by_image") or [], "image_id", "Direction of matched fans by image",
                           side="matched_fans", kinds=("fan",)),
    ):
        if table:
            md += [table, ""]
    worst = errors.get("worst_tiles") or []
    if worst:
        md += ["### Worst tiles (most consensus features lost plus false detections)", "",
               "| Tile | Lost | False | Figure |", "| --- | --- | --- | --- |"]
        md += [f"| {w['tile_id']} | {w['n_lost']} | {w['n_false']} | ![{w['tile_id']}]({w['figure']}) |"
               for w in worst]
        md.append("")
    return md


def reliability_bins(y_true, proba, *, n_bins=10):
    """Reliability diagram data with uniform bins on [0, 1].

    Parameters
    ----------
    y_true : array_like of shape (n,)
        0/1 outcomes.
    proba : array_like of shape (n,)
        Predicted probabilities of outcome 1.
    n_bins : int, optional

    Returns
    -------
    dict
        prob_pred (mean probability), prob_true (observed frequency), count
        (lists over non-empty bins) and ece (count-weighted mean
        |prob_true - prob_pred|).
    """
    y = np.asarray(y_true, dtype=float).ravel()
    p = np.asarray(proba, dtype=float).ravel()
    if y.shape != p.shape:
        raise DetectorError(f"reliability: y_true has {y.size} values but proba has {p.size}.")
    if p.size and (np.nanmin(p) < 0 or np.nanmax(p) > 1):
        raise DetectorError(f"reliability: probabilities must lie in [0, 1]; got range [{np.nanmin(p)}, {np.nanmax(p)}].")
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    idx = np.searchsorted(edges[1:-1], p, side="right")
    count = np.bincount(idx, minlength=n_bins).astype(float)
    sum_p = np.bincount(idx, weights=p, minlength=n_bins)
    sum_y = np.bincount(idx, weights=y, minlength=n_bins)
    nz = count > 0
    prob_pred = sum_p[nz] / count[nz]
    prob_true = sum_y[nz] / count[nz]
    ece = float(np.sum(count[nz] * np.abs(prob_true - prob_pred)) / count.sum()) if count.sum() else None
    return {"prob_pred": prob_pred.tolist(), "prob_true": prob_true.tolist(), "count": count[nz].astype(int).tolist(),
            "ece": ece}


def _clean(obj):
    """Replace NaN/inf by None and NumPy scalars by Python ones, recursively, for strict JSON."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    return obj


def _save(fig, path):
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=100)
    return fig


def _figure(**kwargs):
    from matplotlib.figure import Figure

    # A bare Figure renders with the Agg canvas and touches no global pyplot state.
    return Figure(**kwargs)


def _plot_pr(pr_curves, path):
    fig = _figure(figsize=(5, 4.5))
    ax = fig.add_subplot()
    for name, c in pr_curves.items():
        r = np.asarray([np.nan if v is None else v for v in c["recall"]], dtype=float)
        p = np.asarray(c["precision"], dtype=float)
        ap = c.get("average_precision")
        ax.step(r, p, where="post", label=f"{name} (AP {ap:.3f})" if ap is not None else str(name))
    ax.set(xlabel="Recall", ylabel="Precision", xlim=(0, 1.01), ylim=(0, 1.02), title="Precision-recall (patches)")
    ax.grid(alpha=0.3)
    ax.legend(loc="lower left")
    return _save(fig, path)


def _plot_error_hist(errors, path):
    fig = _figure(figsize=(5.5, 4))
    ax = fig.add_subplot()
    ax.hist(errors, bins=np.arange(0, 185, 5), color="tab:blue", edgecolor="white")
    for x, style, label in ((10, "--", "10 deg"), (30, ":", "30 deg"), (135, "-.", "flip (> 135 deg)")):
        ax.axvline(x, color="k", linestyle=style, linewidth=0.8, label=label)
    ax.legend(loc="upper center", fontsize=8)
    ax.set(xlabel="Angular error of matched fans (degrees)", ylabel="Fans", xlim=(0, 180),
           title=f"Direction error (n = {len(errors)}, median {np.median(errors):.1f} deg)" if len(errors) else
           "Direction error")
    return _save(fig, path)


def _plot_scatter(consensus_deg, predicted_deg, path):
    fig = _figure(figsize=(5, 5))
    ax = fig.add_subplot()
    ax.scatter(consensus_deg, predicted_deg, s=8, alpha=0.6)
    x = np.array([0, 360])
    ax.plot(x, x, "k-", linewidth=0.8, label="agreement")
    ax.plot([0, 180], [180, 360], "r:", linewidth=0.8, label="reversed (flip)")
    ax.plot([180, 360], [0, 180], "r:", linewidth=0.8)
    ax.set(xlabel="Consensus direction (deg clockwise from up)", ylabel="Predicted direction (deg clockwise from up)",
           xlim=(0, 360), ylim=(0, 360), xticks=range(0, 361, 90), yticks=range(0, 361, 90),
           title="Predicted vs consensus fan direction")
    ax.set_aspect("equal")
    ax.legend(loc="upper left", fontsize=8)
    return _save(fig, path)


def _plot_roses(per_image, path, *, max_images=12, bin_deg=15.0):
    names = list(per_image)[:max_images]
    n = max(len(names), 1)
    ncols = min(n, 4)
    nrows = int(np.ceil(n / ncols))
    fig = _figure(figsize=(3.2 * ncols, 3.4 * nrows))
    edges = np.radians(np.arange(0.0, 360.0 + bin_deg, bin_deg))
    width = np.radians(bin_deg)
    for k, name in enumerate(names):
        cons, pred = (np.asarray(v, dtype=float) for v in per_image[name])
        ax = fig.add_subplot(nrows, ncols, k + 1, projection="polar")
        # Zero at the top and clockwise, as directions are measured from image up.
        ax.set_theta_zero_location("N")
        ax.set_theta_direction(-1)
        hc, _ = np.histogram(np.radians(cons[np.isfinite(cons)] % 360), edges)
        hp, _ = np.histogram(np.radians(pred[np.isfinite(pred)] % 360), edges)
        ax.bar(edges[:-1], hc, width=width, align="edge", color="tab:blue", alpha=0.45, label="consensus")
        ax.bar(edges[:-1], hp, width=width, align="edge", fill=False, edgecolor="tab:red", linewidth=1.2,
               label="predicted")
        ax.set_title(str(name), fontsize=9)
        ax.tick_params(labelsize=7)
        if k == 0:
            ax.legend(loc="lower left", bbox_to_anchor=(-0.25, -0.25), fontsize=7)
    fig.suptitle("Fan directions per image (0 = up, clockwise)")
    fig.tight_layout()
    return _save(fig, path)


def _plot_reliability(bins, path):
    fig = _figure(figsize=(5, 5))
    ax = fig.add_subplot()
    ax.plot([0, 1], [0, 1], "k--", linewidth=0.8, label="perfect calibration")
    for name, b in bins.items():
        ax.plot(b["prob_pred"], b["prob_true"], "o-", markersize=4,
                label=f"{name} (ECE {b['ece']:.3f})" if b["ece"] is not None else str(name))
    ax.set(xlabel="Mean predicted probability", ylabel="Observed frequency", xlim=(0, 1), ylim=(0, 1),
           title="Reliability of calibrated probabilities")
    ax.set_aspect("equal")
    ax.grid(alpha=0.3)
    ax.legend(loc="upper left", fontsize=8)
    return _save(fig, path)


def write_report(
    scores,
    out_dir,
    *,
    ceiling=None,
    pr_curves=None,
    reliability=None,
    per_image_directions=None,
    fan_directions=None,
    error_breakdown=None,
    title="frostvane evaluation",
    n_bins=10,
):
    """Write report.json, report.md and PNG plots into ``out_dir``.

    Parameters
    ----------
    scores : dict
        Output of :func:`training.evaluation.scoring.score_catalogs` for the model.
    out_dir : path-like
        Folder; created if needed. Files are written atomically.
    ceiling : dict, optional
        Scores of the noise-free truth against its consensus.
    pr_curves : mapping, optional
        class -> {precision, recall, average_precision (optional)}, e.g. the
        ``curves`` of :func:`training.evaluation.scoring.patch_metrics` with its APs.
    reliability : mapping, optional
        name -> (y_true, proba): 0/1 outcomes and calibrated probabilities.
    per_image_directions : mapping, optional
        image_id -> (consensus_deg, predicted_deg) arrays for the rose diagrams;
        derived from ``fan_directions`` when that has image_id.
    fan_directions : DataFrame, optional
        Matched fans with consensus_deg, predicted_deg and error_deg (see
        :func:`training.evaluation.directions.matched_fans`), for the error histogram and scatter.
    error_breakdown : dict, optional
        :meth:`training.evaluation.diagnose.ErrorBreakdown.to_dict`, optionally with
        ``worst_tiles`` (records of tile_id, n_lost, n_false and figure, a
        path relative to ``out_dir``): stored in report.json under
        ``error_breakdown`` and shown as the "Where features are lost" section.
    title : str, optional
    n_bins : int, optional
        Bins of the reliability diagram.

    Returns
    -------
    dict of str -> Path
        Every file written.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = {}
    plots = []
    if pr_curves:
        written["pr_curves"] = out_dir / "pr_curves.png"
        _plot_pr(pr_curves, written["pr_curves"])
        plots.append(("Precision-recall curves", "pr_curves.png"))
    if fan_directions is not None and len(fan_directions):
        written["direction_error_hist"] = out_dir / "direction_error_hist.png"
        _plot_error_hist(fan_directions["error_deg"].to_numpy(float), written["direction_error_hist"])
        written["direction_scatter"] = out_dir / "direction_scatter.png"
        _plot_scatter(fan_directions["consensus_deg"].to_numpy(float), fan_directions["predicted_deg"].to_numpy(float),
                      written["direction_scatter"])
        plots += [("Angular error histogram", "direction_error_hist.png"),
                  ("Predicted vs consensus direction", "direction_scatter.png")]
        if per_image_directions is None and "image_id" in fan_directions:
            per_image_directions = {
                img: (g["consensus_deg"].to_numpy(float), g["predicted_deg"].to_numpy(float))
                for img, g in fan_directions.groupby("image_id", sort=True)
            }
    if per_image_directions:
        written["direction_roses"] = out_dir / "direction_roses.png"
        _plot_roses(per_image_directions, written["direction_roses"])
        plots.append(("Rose diagrams per image", "direction_roses.png"))
    rel_bins = None
    if reliability:
        rel_bins = {name: reliability_bins(y, p, n_bins=n_bins) for name, (y, p) in reliability.items()}
        written["reliability"] = out_dir / "reliability.png"
        _plot_reliability(rel_bins, written["reliability"])
        plots.append(("Reliability diagram", "reliability.png"))

    payload = _clean({"title": title, "scores": scores, "ceiling": ceiling, "targets": evaluate_targets(scores),
                      "reliability": rel_bins, "error_breakdown": error_breakdown})
    written["json"] = out_dir / "report.json"
    write_json(written["json"], payload)

    ref = scores.get("reference", {})
    md = [
        f"# {title}",
        "",
        "## Headline",
        "",
        headline_table(scores, ceiling),
        "",
        f"Reference: {ref.get('note', '')} ({_fmt(ref.get('crowd_vs_expert_tile_mean_deg'), 'deg')}); compare the "
        f"per-tile mean direction error above with it.",
        "",
        "## Direction baselines (matched fans)",
        "",
        _baseline_table(scores),
        "",
        _tile_direction_note(scores),
        "",
        "## Breakdowns",
        "",
        _breakdown_tables(scores),
        "",
    ]
    if error_breakdown is not None:
        md += _error_section(error_breakdown)
    if plots:
        md += ["## Plots", ""] + [f"![{name}]({fname})" for name, fname in plots] + [""]
    written["md"] = out_dir / "report.md"
    with atomic_path(written["md"]) as tmp:
        tmp.write_text("\n".join(md), encoding="utf-8")
    return written
