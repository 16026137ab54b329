"""Plots of the effort estimate: tiles and classifications by route, hours left by route and by date."""

import datetime as _dt

import numpy as np

from detector.io import atomic_path

__all__ = ["plot_effort", "plot_hours"]

_COLOURS = {"skip": "tab:gray", "machine": "tab:green", "crowd": "tab:orange", "nodata": "lightgray"}


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path, plt):
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
    return path


def plot_effort(effort, path):
    """Effort summary: tiles per route, and classifications left with their 90 % intervals.

    Parameters
    ----------
    effort : dict
        Output of :func:`training.effort.estimate.estimate_effort`.
    path : path-like
        PNG to write (atomically).

    Returns
    -------
    path : path-like
    """
    plt = _pyplot()
    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 4.2))
    routes = ("skip", "machine", "crowd", "nodata")
    counts = [effort["tiles"][r] for r in routes]
    bars = left.bar(routes, counts, color=[_COLOURS[r] for r in routes])
    left.bar_label(bars, labels=[str(c) for c in counts])
    left.set_ylabel("screened tiles")
    left.set_title(f"routes ({effort['tiles']['unfamiliar']} of the crowd tiles unfamiliar)", fontsize=10)

    iv = effort["interval_90"]
    needed = effort["expected_needed"]
    labels = ["without routing", "crowd tiles\n(routed)", "tiles truly\nneeding people\n(expected)"]
    values = [effort["classifications_without_routing"], effort["classifications"], needed["classifications"]]
    ivs = [None, iv["classifications"], needed["interval_90"]]
    colours = ["lightsteelblue", _COLOURS["crowd"], "tab:red"]
    x = np.arange(len(values))
    right.bar(x, values, color=colours)
    for k, band in enumerate(ivs):
        if band:
            right.errorbar(k, values[k], yerr=[[values[k] - band[0]], [band[1] - values[k]]], color="black",
                           capsize=6, lw=1.2)
    right.set_xticks(x, labels, fontsize=8)
    right.set_ylabel("classifications left")
    c = effort["campaign"]
    right.set_title(f"{c['classifications_needed']} classifications per tile; bars: 90% interval", fontsize=10)
    fig.suptitle(f"Volunteer effort left: {effort['classifications']:,} classifications, {effort['hours']:,.1f} h",
                 fontsize=11)
    return _save(fig, path, plt)


def plot_hours(effort, path):
    """Hours left by route, and, with a throughput, the classifications left by date.

    The route panel shows the hours the crowd tiles still need and the hours
    the skip and machine routes save. The date panel draws the remaining
    classifications falling at the campaign's daily throughput from its start
    date, with the 90 % interval's ends.
    """
    plt = _pyplot()
    dated = effort.get("days") is not None
    fig, axes = plt.subplots(1, 2 if dated else 1, figsize=(11 if dated else 6, 4.2))
    ax = axes[0] if dated else axes
    routes = ("crowd", "machine", "skip")
    hours = [effort["by_route"][r]["hours"] for r in routes]
    labels = ["crowd: to spend", "machine: saved", "skip: saved"]
    bars = ax.barh(labels, hours, color=[_COLOURS[r] for r in routes])
    ax.bar_label(bars, labels=[f"{h:,.1f} h" if h >= 1 else f"{h:.2f} h" for h in hours], padding=3)
    band = effort["interval_90"]["hours"]
    if band:
        ax.errorbar(effort["hours"], 0, xerr=[[effort["hours"] - band[0]], [band[1] - effort["hours"]]],
                    color="black", capsize=6, lw=1.2)
    c = effort["campaign"]
    ax.set_xlabel(f"volunteer hours at {c['seconds_per_classification']:g} s per classification"
                  + (" (assumed)" if c["seconds_assumed"] else ""))
    ax.set_title("hours left by route", fontsize=10)
    ax.margins(x=0.25)
    if dated:
        ax = axes[1]
        per_day = c["classifications_per_day"]
        start = c["start_date"] or _dt.date.today().isoformat()
        total = effort["classifications"]
        lo, hi = effort["interval_90"]["classifications"] or (total, total)
        # Days from the start on a plain axis: a campaign may have hours or years left.
        for value, style, label in ((total, "-", "estimate"), (lo, ":", "90% interval"), (hi, ":", None)):
            ax.plot([0.0, value / per_day], [value * c["seconds_per_classification"] / 3600, 0.0], style,
                    color=_COLOURS["crowd"], label=label)
        ax.set_xlim(0.0, max(hi / per_day * 1.1, 1.0))
        ax.set_ylim(bottom=0.0)
        ax.set_xlabel(f"days from {start} at {per_day:g} classifications a day")
        ax.set_ylabel("volunteer hours left")
        ax.set_title(f"done between {effort['dates'][0]} and {effort['dates'][1]}", fontsize=10)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
    return _save(fig, path, plt)
