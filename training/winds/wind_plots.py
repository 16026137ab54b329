"""Plots of a wind analysis (matplotlib, Agg): roses, directions and cover against Ls, agreement, model.

Every plot says what its directions are measured from (azimuth from north, or
image up) and draws the way the fans run ("to"); the wind came from the
opposite way.
"""

import numpy as np

__all__ = ["plot_all", "plot_rose_grid", "plot_direction_vs_ls", "plot_cover_length_vs_ls",
           "plot_agreement", "plot_model_match"]

_ROSE_SECTOR_DEG = 15.0


def _figure(*args, **kwargs):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt.subplots(*args, **kwargs)


def _save(fig, path):
    import matplotlib.pyplot as plt

    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path.name


def _ls_label(start, end):
    return f"Ls {start:.0f}-{end:.0f}"


def plot_rose_grid(analysis, catalog, path):
    """Rose diagrams of one catalog: rows are regions, columns Ls bins; one radial scale per row.

    Petals count fans per 15 degree sector (unweighted, so the labelled counts
    add up); the arrow is the weighted mean direction, its length the mean
    resultant length times the row's scale.
    """
    c = next(c for c in analysis.catalogs if c.name == catalog)
    bins = analysis.bins[analysis.bins["catalog"] == catalog]
    column = "azimuth_deg" if analysis.frame == "azimuth" else "direction_deg"
    regions = sorted(bins["region"].unique())
    starts = sorted(bins["ls_bin_start"].unique())
    width = analysis.settings.ls_bin_deg
    fans = c.fans.assign(ls_bin_start=np.floor(c.fans["solar_longitude_deg"] / width + 1e-9) * width)
    edges = np.arange(0.0, 360.0 + _ROSE_SECTOR_DEG, _ROSE_SECTOR_DEG)
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=(2.3 * len(starts) + 0.6, 2.5 * len(regions) + 0.8))
    for i, region in enumerate(regions):
        counts = {}
        for start in starts:
            sel = (fans["region"] == region) & np.isclose(fans["ls_bin_start"], start)
            counts[start], _ = np.histogram(fans.loc[sel, column].to_numpy(dtype=float) % 360.0, bins=edges)
        top = max(1, max(v.max() for v in counts.values()))
        for j, start in enumerate(starts):
            if not ((bins["region"] == region) & np.isclose(bins["ls_bin_start"], start)).any():
                continue  # no tile of this region in this bin: the cell stays blank
            ax = fig.add_subplot(len(regions), len(starts), i * len(starts) + j + 1, projection="polar")
            ax.set_theta_zero_location("N")
            ax.set_theta_direction(-1)
            ax.bar(np.radians(edges[:-1] + _ROSE_SECTOR_DEG / 2), counts[start], width=np.radians(_ROSE_SECTOR_DEG),
                   color="tab:blue", alpha=0.75, edgecolor="white", linewidth=0.4)
            ax.set_ylim(0, top * 1.05)
            rec = bins[(bins["region"] == region) & np.isclose(bins["ls_bin_start"], start)]
            n = int(rec["n_fans"].iloc[0]) if len(rec) else 0
            if len(rec) and np.isfinite(rec["mean_to_deg"].iloc[0]):
                ax.annotate("", xy=(np.radians(rec["mean_to_deg"].iloc[0]), rec["resultant_length"].iloc[0] * top),
                            xytext=(0, 0), arrowprops=dict(arrowstyle="->", color="tab:red", lw=1.5))
            ax.set_title(f"{region}\n{_ls_label(start, start + width)}, n = {n}", fontsize=7)
            ax.tick_params(labelsize=5)
            ax.set_yticks([top])
            ax.set_yticklabels([f"{top}"], fontsize=5)
    fig.suptitle(f"{catalog}: fan directions ('to'), {analysis.frame_label}\n"
                 f"petals: fans per {_ROSE_SECTOR_DEG:.0f} deg (one radial scale per row); arrow: weighted mean",
                 fontsize=8)
    fig.tight_layout()
    return _save(fig, path)


def _errorbar_direction(ax, x, y, low, high, **kwargs):
    """Directions with asymmetric circular intervals, drawn around the value (may pass 0 / 360)."""
    y = np.asarray(y, dtype=float)
    lo = np.abs(((y - np.asarray(low, dtype=float)) + 180.0) % 360.0 - 180.0)
    hi = np.abs(((np.asarray(high, dtype=float) - y) + 180.0) % 360.0 - 180.0)
    ax.errorbar(x, y, yerr=[np.nan_to_num(lo), np.nan_to_num(hi)], capsize=2, linestyle="none", **kwargs)


def plot_direction_vs_ls(analysis, path):
    """Mean direction against Ls per region and catalog; two-wind bins as two series (wind 1, wind 2)."""
    bins, modes = analysis.bins, analysis.bin_modes
    regions = sorted(bins["region"].unique())
    fig, axes = _figure(len(regions), 1, figsize=(7.5, 2.4 * len(regions) + 0.8), squeeze=False, sharex=True)
    markers = {"crowd": "o", "machine": "s"}
    width = analysis.settings.ls_bin_deg
    for ax, region in zip(axes[:, 0], regions):
        for k, catalog in enumerate(sorted(bins["catalog"].unique())):
            shift = (k - 0.5) * width * 0.12
            b = bins[(bins["catalog"] == catalog) & (bins["region"] == region)]
            single = b[b["n_winds"] != 2]
            _errorbar_direction(ax, single["ls_bin_start"] + width / 2 + shift, single["mean_to_deg"],
                                single["mean_ci_low_deg"], single["mean_ci_high_deg"],
                                marker=markers.get(catalog, "o"), color="tab:blue" if catalog == "crowd" else "tab:orange",
                                label=f"{catalog}: mean (one wind or calm)")
            if not modes.empty:
                m = modes[(modes["catalog"] == catalog) & (modes["region"] == region)]
                m = m.merge(b[["ls_bin_start", "n_winds"]], on="ls_bin_start")
                m = m[m["n_winds"] == 2]
                for wind, colour in ((1, "tab:green"), (2, "tab:purple")):
                    w = m[m["wind"] == wind]
                    if len(w):
                        _errorbar_direction(ax, w["ls_bin_start"] + width / 2 + shift, w["to_deg"], w["to_ci_low_deg"],
                                            w["to_ci_high_deg"], marker=markers.get(catalog, "o"), color=colour,
                                            mfc="none", label=f"{catalog}: two winds, wind {wind}")
        ax.set_ylim(-20, 380)
        ax.set_yticks([0, 90, 180, 270, 360])
        ax.grid(alpha=0.3)
        ax.set_ylabel("'to' direction, deg", fontsize=8)
        ax.set_title(region, fontsize=9)
        ax.legend(fontsize=6, loc="best")
    axes[-1, 0].set_xlabel("solar longitude Ls, deg (bin centre)")
    fig.suptitle(f"mean fan direction against season\n({analysis.frame_label}); bars: "
                 f"{int(analysis.settings.level * 100)} % bootstrap intervals", fontsize=8)
    fig.tight_layout()
    return _save(fig, path)


def plot_cover_length_vs_ls(analysis, path):
    """Covered fraction and mean fan length against Ls, one series per region and catalog."""
    bins = analysis.bins
    fig, axes = _figure(1, 2, figsize=(10, 3.8))
    width = analysis.settings.ls_bin_deg
    for (catalog, region), b in bins.groupby(["catalog", "region"], sort=True):
        x = b["ls_bin_start"] + width / 2
        style = "-o" if catalog == "crowd" else "--s"
        cover = 100 * b["covered_fraction"]
        axes[0].errorbar(x, cover, yerr=[np.nan_to_num(cover - 100 * b["covered_ci_low"]),
                                         np.nan_to_num(100 * b["covered_ci_high"] - cover)],
                         fmt=style, capsize=2, label=f"{catalog}, {region}")
        use_m = b["length_m_mean"].notna().any()
        col = "length_m" if use_m else "length_px"
        mean = b[f"{col}_mean"]
        axes[1].errorbar(x, mean, yerr=[np.nan_to_num(mean - b[f"{col}_ci_low"]), np.nan_to_num(b[f"{col}_ci_high"] - mean)],
                         fmt=style, capsize=2, label=f"{catalog}, {region} ({'m' if use_m else 'px'})")
    axes[0].set_ylabel("covered fraction, % of area looked at")
    axes[1].set_ylabel("mean fan length (m where the scale is known, else px)")
    for ax in axes:
        ax.set_xlabel("solar longitude Ls, deg (bin centre)")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=6)
    fig.suptitle("seasonal cover and fan length; bars: bootstrap intervals", fontsize=9)
    fig.tight_layout()
    return _save(fig, path)


def plot_agreement(analysis, path):
    """Machine against crowd mean directions (per bin and per image) and the differences against Ls."""
    fig, axes = _figure(1, 2, figsize=(10, 4.2))
    tol = analysis.settings.agree_deg
    for table, marker, label in ((analysis.bin_agreement, "o", "region x Ls bins"),
                                 (analysis.image_agreement, "^", "images")):
        if table.empty:
            continue
        axes[0].scatter(table["mean_to_deg_crowd"], table["mean_to_deg_machine"], marker=marker,
                        c=np.where(table["agree"], "tab:green", "tab:red"), label=label)
        _errorbar_direction(axes[1], table["solar_longitude_deg"], table["difference_deg"],
                            table["difference_ci_low_deg"], table["difference_ci_high_deg"], marker=marker,
                            color="k", label=label)
    line = np.array([0.0, 360.0])
    axes[0].plot(line, line, "k-", lw=0.8)
    axes[0].fill_between(line, line - tol, line + tol, color="tab:green", alpha=0.15,
                         label=f"within {tol:g} deg (rule of thumb)")
    axes[0].set_xlim(0, 360)
    axes[0].set_ylim(0, 360)
    axes[0].set_xlabel("crowd mean 'to' direction, deg")
    axes[0].set_ylabel("machine mean 'to' direction, deg")
    axes[1].axhspan(-tol, tol, color="tab:green", alpha=0.15)
    axes[1].axhline(0, color="k", lw=0.8)
    axes[1].set_xlabel("solar longitude Ls, deg")
    axes[1].set_ylabel("machine - crowd, deg")
    share = analysis.agreement_share("bins")
    title = "machine vs crowd"
    if np.isfinite(share):
        title += f": {100 * share:.0f} % of bins agree within {tol:g} deg"
    for ax in axes:
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7)
    fig.suptitle(f"{title} ({analysis.frame_label})", fontsize=8)
    fig.tight_layout()
    return _save(fig, path)


def plot_model_match(analysis, path):
    """Observed minus modelled wind direction against Ls, per region and catalog."""
    m = analysis.model_match
    fig, ax = _figure(figsize=(7.5, 3.8))
    if not m.empty:
        for (catalog, region), g in m.groupby(["catalog", "region"], sort=True):
            _errorbar_direction(ax, g["model_solar_longitude_deg"], g["difference_deg"], g["difference_ci_low_deg"],
                                g["difference_ci_high_deg"], marker="o" if catalog == "crowd" else "s",
                                label=f"{catalog}, {region}")
        ax.legend(fontsize=7)
    ax.axhline(0, color="k", lw=0.8)
    ax.set_xlabel("solar longitude Ls of the model row, deg")
    ax.set_ylabel("observed - model 'to' direction, deg")
    ax.grid(alpha=0.3)
    ax.set_title(f"fans against the model's winds ({len(m)} bins matched; {analysis.frame_label})", fontsize=8)
    fig.tight_layout()
    return _save(fig, path)


def plot_all(analysis, out):
    """Every plot that applies to the analysis; returns the file names."""
    names = []
    for c in analysis.catalogs:
        names.append(plot_rose_grid(analysis, c.name, out / f"roses_{c.name}.png"))
    names.append(plot_direction_vs_ls(analysis, out / "direction_vs_ls.png"))
    names.append(plot_cover_length_vs_ls(analysis, out / "cover_length_vs_ls.png"))
    if not analysis.bin_agreement.empty or not analysis.image_agreement.empty:
        names.append(plot_agreement(analysis, out / "machine_vs_crowd.png"))
    if analysis.model_source is not None:
        names.append(plot_model_match(analysis, out / "model_match.png"))
    return names
