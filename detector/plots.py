"""Quick-look figures: consensus or detected features drawn over their tiles."""

import numpy as np

from .errors import DetectorError
from .io import atomic_path
from .labels import ellipse_polygon, sector_polygon

__all__ = [
    "draw_features",
    "plot_overlay",
    "add_legend",
    "add_north_arrow",
    "add_scale_bar",
    "nice_length_m",
    "DIRECTION_CMAP",
    "FAN_COLOR",
    "SPOT_COLOR",
    "HALO_COLOR",
]

#: Cyclic colormap, so that 359 and 1 degrees look alike: the hue circle (matplotlib's "hsv")
#: mixed with 30 % white, so that even its blue keeps 3:1 contrast on a black deposit, with no
#: white or black end that would vanish on bright ice or dark ground. Registered under this name.
DIRECTION_CMAP = "frostvane_direction"


def _register_direction_cmap():
    from matplotlib import colormaps
    from matplotlib.colors import ListedColormap

    if DIRECTION_CMAP not in colormaps:
        hues = colormaps["hsv"](np.linspace(0.0, 1.0, 256))
        hues[:, :3] = 0.7 * hues[:, :3] + 0.3
        colormaps.register(ListedColormap(hues, name=DIRECTION_CMAP))


_register_direction_cmap()
FAN_COLOR = "tab:orange"
SPOT_COLOR = "tab:cyan"
#: Every outline is drawn over a dark halo: a light colour (yellow, cyan) stays visible on bright
#: seasonal ice, the colour itself on dark ground.
HALO_COLOR = "black"


def _halo(linewidth):
    from matplotlib import patheffects

    return [patheffects.Stroke(linewidth=linewidth + 1.6, foreground=HALO_COLOR), patheffects.Normal()]


def _fan_colors(directions, color_by_direction):
    from matplotlib import colormaps
    from matplotlib.colors import to_rgba

    if not color_by_direction:
        return [to_rgba(FAN_COLOR)] * len(directions)
    cmap = colormaps[DIRECTION_CMAP]
    return [tuple(c) for c in cmap((np.asarray(directions, dtype=float) % 360.0) / 360.0)]


def draw_features(ax, features_df, *, color_by_direction=True, linewidth=1.2, alpha=0.35, as_collection=False,
                  color_deg=None):
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
    color_deg : array-like of shape (n,), optional
        Angles that colour the fans instead of ``direction_deg``: e.g. azimuths,
        degrees clockwise from north, on a georeferenced image.

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
    fan_colors = _fan_colors(direction if color_deg is None else np.asarray(color_deg, dtype=float),
                             color_by_direction)
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
            path_effects=_halo(linewidth),
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
        patches = PolyCollection(outlines, closed=True, facecolors=face, edgecolors=edge, linewidths=linewidth,
                                 path_effects=_halo(linewidth))
        ax.add_collection(patches, autolim=False)  # the callers fix the limits to the image
    if (kinds == "fan").any():
        ax.plot(x[kinds == "fan"], y[kinds == "fan"], "+", color="white", markersize=5, linewidth=0.8,
                path_effects=_halo(0.8))
    return patches


def add_legend(ax, *, fontsize=6):
    """Say what the marks are: fan sectors (coloured by direction), spot ellipses, fan apexes."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = [
        Patch(facecolor="none", edgecolor="tab:red", label="fan (sector; colour = direction)"),
        Patch(facecolor="none", edgecolor=SPOT_COLOR, label="spot (ellipse)"),
        Line2D([], [], marker="+", linestyle="none", color="white", markeredgecolor=HALO_COLOR, label="fan apex"),
    ]
    legend = ax.legend(handles=handles, loc="lower right", fontsize=fontsize, framealpha=0.75)
    return legend


def add_north_arrow(ax, north_deg, *, where=(0.08, 0.86), size=0.07):
    """Draw a north arrow in an image axis.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        An axis showing an image (row down).
    north_deg : float
        Direction of north in the image, degrees clockwise from image up
        (see :meth:`detector.gis.geo.Georeferencer.grid_to_azimuth`: the image
        direction whose azimuth is 0).
    where : (float, float), optional
        Arrow centre in axes fractions.
    size : float, optional
        Half the arrow's length in axes fractions.

    Returns
    -------
    arrow : matplotlib.text.Annotation
        The arrow (``gid`` "north_arrow"); an "N" (``gid`` "north_label") stands beyond its tip.
    """
    from .geometry import unit_vector

    d_col, d_row = unit_vector(float(north_deg))
    # Axes fractions have y up, the image has rows down.
    tip = (where[0] + size * d_col, where[1] - size * d_row)
    tail = (where[0] - size * d_col, where[1] + size * d_row)
    arrow = ax.annotate("", xy=tip, xytext=tail, xycoords="axes fraction", textcoords="axes fraction",
                        arrowprops=dict(arrowstyle="-|>", color="white", lw=1.5, path_effects=_halo(1.5)),
                        gid="north_arrow")
    # The letter just beyond the tip, where a reader looks for it.
    ax.text(tip[0] + 0.4 * size * d_col, tip[1] - 0.4 * size * d_row, "N", transform=ax.transAxes, ha="center",
            va="center", fontsize=8, color="white", fontweight="bold", path_effects=_halo(0.5), gid="north_label")
    return arrow


def nice_length_m(max_m):
    """Longest 1, 2 or 5 x 10^k metres not above ``max_m`` (a scale bar's length)."""
    if not np.isfinite(max_m) or max_m <= 0:
        raise DetectorError(f"a scale bar needs a positive length; got {max_m!r} m.")
    power = 10.0 ** np.floor(np.log10(max_m))
    for step in (5.0, 2.0, 1.0):
        if step * power <= max_m * (1 + 1e-12):
            return float(step * power)
    return float(power)


def add_scale_bar(ax, metres_per_unit, *, width_units, fraction=0.25):
    """Draw a scale bar in the lower left of an image axis.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    metres_per_unit : float
        Ground metres per data unit of the axis (per drawn pixel).
    width_units : float
        Width of the shown image in data units.
    fraction : float, optional
        Longest share of the width the bar may take.

    Returns
    -------
    label : str
        E.g. ``"500 m"`` or ``"2 km"``; the bar's artists carry ``gid`` "scale_bar".
    """
    from matplotlib.lines import Line2D

    length_m = nice_length_m(fraction * width_units * metres_per_unit)
    length = length_m / metres_per_unit
    label = f"{length_m / 1000:g} km" if length_m >= 1000 else f"{length_m:g} m"
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()  # image axes: y0 is the bottom edge (largest row)
    left = min(x0, x1) + 0.05 * abs(x1 - x0)
    base = max(y0, y1) - 0.06 * abs(y1 - y0)
    ax.add_line(Line2D([left, left + length], [base, base], color="white", linewidth=3, solid_capstyle="butt",
                       path_effects=_halo(3), gid="scale_bar"))
    ax.text(left + length / 2, base - 0.02 * abs(y1 - y0), label, ha="center", va="bottom", fontsize=7,
            color="white", path_effects=_halo(0.5), gid="scale_bar")
    return label


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
        ax.set_xlabel("column, px", fontsize=7)
        ax.set_ylabel("row, px", fontsize=7)
        ax.tick_params(labelsize=7)
        add_legend(ax)
    for ax in axes[n:]:
        ax.set_axis_off()
    if color_by_direction:
        mappable = ScalarMappable(norm=Normalize(0, 360), cmap=DIRECTION_CMAP)
        bar = fig.colorbar(mappable, ax=list(axes[:n]), shrink=0.8, ticks=[0, 90, 180, 270, 360])
        bar.set_label("fan direction, degrees clockwise from image up", fontsize=8)
        bar.ax.tick_params(labelsize=7)
    out_png = Path(out_png)
    with atomic_path(out_png) as tmp:
        fig.savefig(tmp, format="png")
    return out_png
