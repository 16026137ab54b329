"""Quick-look figures: consensus or detected features drawn over their tiles."""

import numpy as np

from .errors import DetectorError
from .io import atomic_path
from .labels import ellipse_polygon, sector_polygon

__all__ = ["draw_features", "plot_overlay", "DIRECTION_CMAP", "FAN_COLOR", "SPOT_COLOR"]

#: Cyclic colormap, so that 359 and 1 degrees look alike.
DIRECTION_CMAP = "twilight"
FAN_COLOR = "tab:orange"
SPOT_COLOR = "tab:cyan"


def _fan_colors(directions, color_by_direction):
    from matplotlib import colormaps
    from matplotlib.colors import to_rgba

    if not color_by_direction:
        return [to_rgba(FAN_COLOR)] * len(directions)
    cmap = colormaps[DIRECTION_CMAP]
    return [tuple(c) for c in cmap((np.asarray(directions, dtype=float) % 360.0) / 360.0)]


def draw_features(ax, features_df, *, color_by_direction=True, linewidth=1.2, alpha=0.35, as_collection=False):
    """Draw fans as sectors and spots as ellipses on an axis in pixel coordinates.

    The axis must show the tile with ``imshow`` defaults (origin upper, pixel
    centres at integer coordinates), so that x is the column and y the row.
    The axis limits are not changed by the outlines: set them to the image.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    features_df : DataFrame
        Consensus-contract rows (``kind``, ``x_px``, ``y_px``,
        ``direction_deg`` and the geometry of each kind).
    color_by_direction : bool, optional
        Colour fans by direction (degrees clockwise from up) with the cyclic
        ``twilight`` colormap; otherwise all fans share one colour.
    linewidth : float, optional
        Outline width, points.
    alpha : float, optional
        Fill opacity.
    as_collection : bool, optional
        Draw all outlines as one ``PolyCollection`` (the same shapes and colours):
        for thousands of features, where one artist per feature makes drawing and
        saving several times slower.

    Returns
    -------
    patches : list of matplotlib.patches.Polygon, or PolyCollection
        One patch per feature, in table order; fan patches carry ``gid`` "fan",
        spot patches "spot". With ``as_collection``, the one collection.
    """
    from matplotlib.colors import to_rgba
    from matplotlib.patches import Polygon

    kinds = features_df["kind"].astype(str).to_numpy()
    n = len(kinds)
    x = features_df["x_px"].to_numpy(dtype=float)
    y = features_df["y_px"].to_numpy(dtype=float)
    direction = features_df["direction_deg"].to_numpy(dtype=float)
    col = {
        c: features_df[c].to_numpy(dtype=float) if c in features_df.columns else np.full(n, np.nan)
        for c in ("length_px", "opening_deg", "semi_major_px", "semi_minor_px")
    }
    fan_colors = _fan_colors(direction, color_by_direction)
    patches, outlines, colors = [], [], []
    for i, kind in enumerate(kinds):
        if kind == "fan":
            xy = sector_polygon(x[i], y[i], direction[i], col["length_px"][i], col["opening_deg"][i])
            color = fan_colors[i]
        elif kind == "spot":
            xy = ellipse_polygon(x[i], y[i], direction[i], col["semi_major_px"][i], col["semi_minor_px"][i])
            color = SPOT_COLOR
        else:
            raise DetectorError(f"feature {features_df.index[i]!r}: kind {kind!r} cannot be drawn.")
        if as_collection:
            outlines.append(xy)
            colors.append(to_rgba(color))
            continue
        patch = Polygon(
            xy,
            closed=True,
            facecolor=color,
            edgecolor=color,
            linewidth=linewidth,
            gid=kind,
        )
        patch.set_facecolor((*patch.get_facecolor()[:3], alpha))
        # add_artist, not add_patch: the callers fix the limits to the image, and add_patch's
        # data-limit update costs about 1 ms per patch (most of a quick-look's drawing time).
        ax.add_artist(patch)
        patches.append(patch)
    if as_collection:
        from matplotlib.collections import PolyCollection

        edge = np.array(colors).reshape(-1, 4)
        face = edge.copy()
        face[:, 3] = alpha
        patches = PolyCollection(outlines, closed=True, facecolors=face, edgecolors=edge, linewidths=linewidth)
        ax.add_collection(patches, autolim=False)  # the callers fix the limits to the image
    if (kinds == "fan").any():
        ax.plot(x[kinds == "fan"], y[kinds == "fan"], "+", color="white", markersize=5, linewidth=0.8)
    return patches


def _display_range(image):
    """2nd-98th percentile stretch, robust to a few saturated pixels."""
    lo, hi = np.percentile(image, [2, 98])
    if hi <= lo:
        hi = lo + 1
    return float(lo), float(hi)


def plot_overlay(tileset, tile_ids, out_png, *, max_tiles=4, ncols=2, dpi=150, color_by_direction=True):
    """Write a PNG grid of tiles with their consensus features drawn over them.

    Parameters
    ----------
    tileset : TileSet
    tile_ids : sequence of str
        Tiles to show; only the first ``max_tiles`` are drawn.
    out_png : path-like
        Output PNG, written atomically.
    max_tiles : int, optional
        Largest number of panels.
    ncols : int, optional
        Panels per row.
    dpi : int, optional
        Output resolution.
    color_by_direction : bool, optional
        See :func:`draw_features`.

    Returns
    -------
    out_png : Path
    """
    from pathlib import Path

    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize
    from matplotlib.figure import Figure

    tile_ids = list(tile_ids)[: int(max_tiles)]
    if not tile_ids:
        raise DetectorError("plot_overlay needs at least one tile_id.")
    images = [tileset.read_tile(t) for t in tile_ids]  # unknown tiles fail here, before drawing
    n = len(tile_ids)
    ncols = max(1, min(int(ncols), n))
    nrows = -(-n // ncols)
    aspect = images[0].shape[0] / images[0].shape[1]
    fig = Figure(figsize=(4.2 * ncols + 0.8, 4.2 * aspect * nrows + 0.6), dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False)).ravel()
    for ax, tile_id, image in zip(axes, tile_ids, images):
        lo, hi = _display_range(image)
        ax.imshow(image, cmap="gray", vmin=lo, vmax=hi, interpolation="nearest")
        features = tileset.features_of(tile_id)
        draw_features(ax, features, color_by_direction=color_by_direction)
        ax.set_xlim(-0.5, image.shape[1] - 0.5)
        ax.set_ylim(image.shape[0] - 0.5, -0.5)
        n_fan = int((features["kind"] == "fan").sum())
        n_spot = int((features["kind"] == "spot").sum())
        ax.set_title(f"{tile_id}  (fans {n_fan}, spots {n_spot})", fontsize=9)
        ax.tick_params(labelsize=7)
    for ax in axes[n:]:
        ax.set_axis_off()
    if color_by_direction:
        mappable = ScalarMappable(norm=Normalize(0, 360), cmap=DIRECTION_CMAP)
        bar = fig.colorbar(mappable, ax=list(axes[:n]), shrink=0.8, ticks=[0, 90, 180, 270, 360])
        bar.set_label("fan direction, degrees clockwise from up", fontsize=8)
        bar.ax.tick_params(labelsize=7)
    out_png = Path(out_png)
    with atomic_path(out_png) as tmp:
        fig.savefig(tmp, format="png")
    return out_png
