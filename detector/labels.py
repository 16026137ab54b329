"""Rasterise consensus features into per-pixel label masks, and their outlines as polygons.

A fan is a circular sector with its apex at ``(x_px, y_px)``, radius
``length_px`` and full opening ``opening_deg`` centred on ``direction_deg``. A
spot is an ellipse centred on ``(x_px, y_px)`` with its semi-major axis
``semi_major_px`` along ``direction_deg``. Coordinates are px with the origin at
the centre of the top-left pixel, x to the right and y down; directions are
degrees clockwise from image up (-y), see :mod:`detector.geometry`.
"""

from dataclasses import dataclass

import numpy as np

from .contract import KIND_FIELDS, KINDS
from .errors import SpecError
from .geometry import angular_difference, direction_deg, unit_vector

__all__ = [
    "LabelMasks",
    "rasterise_features",
    "footprint_masks",
    "sector_polygon",
    "ellipse_polygon",
    "coverage_fraction",
    "LABEL_NONE",
    "LABEL_FAN",
    "LABEL_SPOT",
]

LABEL_NONE, LABEL_FAN, LABEL_SPOT = 0, 1, 2

# Slack in the boundary tests so that pixel centres lying exactly on an edge
# (common for integer apexes and axis-aligned fans) count as inside on every platform.
_EDGE_EPS = 1e-9


@dataclass(frozen=True)
class LabelMasks:
    """Per-pixel labels of one tile.

    Overlap rules: where a spot and a fan overlap, ``label`` is spot (2),
    because spots are much smaller than fans and would otherwise vanish under
    them; ``fan_cover`` and ``fan_direction`` still record the fan there.
    Where fans overlap, ``fan_direction`` is the circular mean of the covering
    fans' directions, each fan weighted by its (binary, pixel-centre)
    coverage of the pixel, i.e. equally; it is NaN where those directions
    cancel exactly (resultant length below 1e-9 per fan).

    Attributes
    ----------
    label : ndarray of shape (rows, cols), uint8
        0 none, 1 fan, 2 spot.
    fan_cover, spot_cover : ndarray of shape (rows, cols), bool
        Pixel centre lies inside at least one fan / spot.
    fan_direction : ndarray of shape (rows, cols), float32
        Degrees clockwise from image up in [0, 360); NaN where no fan.
    """

    label: np.ndarray
    fan_cover: np.ndarray
    spot_cover: np.ndarray
    fan_direction: np.ndarray

    @property
    def shape(self):
        """(rows, cols) of the masks."""
        return self.label.shape


def _check_shape(shape):
    try:
        rows, cols = (int(s) for s in shape)
    except (TypeError, ValueError):
        raise SpecError(f"shape {shape!r} must be (rows, cols).") from None
    if rows < 1 or cols < 1:
        raise SpecError(f"shape {shape!r} must have positive rows and cols.")
    return rows, cols


def _feature_arrays(features_df):
    """Kinds and float geometry columns of a feature table, checked per kind."""
    if "kind" not in features_df.columns:
        raise SpecError("features table has no 'kind' column.")
    kinds = features_df["kind"].astype(str).to_numpy()
    labels = features_df.index.to_numpy()
    unknown = ~np.isin(kinds, KINDS)
    if unknown.any():
        i = int(np.flatnonzero(unknown)[0])
        raise SpecError(f"feature {labels[i]!r}: kind {kinds[i]!r} is not one of {list(KINDS)}.")
    geometry = {}
    for kind, needed in KIND_FIELDS.items():
        of_kind = kinds == kind
        for column in needed:
            if column not in features_df.columns:
                if of_kind.any():
                    raise SpecError(f"features table has {kind}s but no {column!r} column.")
                continue
            values = features_df[column].to_numpy(dtype=float)
            bad = of_kind & ~np.isfinite(values)
            if bad.any():
                i = int(np.flatnonzero(bad)[0])
                raise SpecError(f"feature {labels[i]!r}: {kind} {column} {values[i]!r} is not a finite number.")
            geometry[column] = values
    return kinds, geometry


def _window(x, y, radius, rows, cols):
    """Pixel-centre grid of the bounding box of a disc, clipped to the tile; None if empty."""
    c0, c1 = max(int(np.ceil(x - radius)), 0), min(int(np.floor(x + radius)), cols - 1)
    r0, r1 = max(int(np.ceil(y - radius)), 0), min(int(np.floor(y + radius)), rows - 1)
    if c0 > c1 or r0 > r1:
        return None
    yy, xx = np.mgrid[r0 : r1 + 1, c0 : c1 + 1]
    return (slice(r0, r1 + 1), slice(c0, c1 + 1)), xx - x, yy - y


def _sector_mask(dx, dy, direction, length, spread):
    inside = dx * dx + dy * dy <= length * length * (1 + _EDGE_EPS)
    on_apex = (dx == 0) & (dy == 0)
    bearing = direction_deg(dx, dy)
    within = angular_difference(bearing, direction) <= spread / 2.0 + _EDGE_EPS
    return inside & (within | on_apex)


def _ellipse_mask(dx, dy, direction, a, b):
    u_col, u_row = unit_vector(direction)
    along = dx * u_col + dy * u_row
    across = -dx * u_row + dy * u_col
    return (along / a) ** 2 + (across / b) ** 2 <= 1.0 + _EDGE_EPS


def rasterise_features(features_df, shape):
    """Rasterise fans and spots into label masks by pixel-centre sampling.

    Parameters
    ----------
    features_df : DataFrame
        Consensus-contract rows: ``kind`` and the geometry columns each kind
        needs (see ``detector.contract.KIND_FIELDS``); px and degrees
        clockwise from image up. Features may extend past the tile edge.
    shape : tuple of int
        (rows, cols) of the tile, px.

    Returns
    -------
    LabelMasks
        See its docstring for the overlap rules.

    Raises
    ------
    SpecError
        Unknown kind, or a needed geometry value missing or not finite.
    """
    rows, cols = _check_shape(shape)
    kinds, g = _feature_arrays(features_df)
    fan_cover = np.zeros((rows, cols), dtype=bool)
    spot_cover = np.zeros((rows, cols), dtype=bool)
    sum_col = np.zeros((rows, cols))
    sum_row = np.zeros((rows, cols))
    n_fans = np.zeros((rows, cols), dtype=np.int32)
    for i, box, mask in _footprints(kinds, g, rows, cols):
        if kinds[i] == "fan":
            fan_cover[box] |= mask
            u_col, u_row = unit_vector(g["direction_deg"][i])
            sum_col[box] += mask * u_col
            sum_row[box] += mask * u_row
            n_fans[box] += mask
        else:
            spot_cover[box] |= mask

    fan_direction = np.full((rows, cols), np.nan, dtype=np.float32)
    resultant = np.hypot(sum_col, sum_row)
    defined = fan_cover & (resultant > 1e-9 * np.maximum(n_fans, 1))
    fan_direction[defined] = direction_deg(sum_col[defined], sum_row[defined]).astype(np.float32)
    # float32 rounding can carry 359.99999 up to 360.0; keep the [0, 360) range.
    fan_direction[fan_direction >= 360.0] = 0.0

    label = np.zeros((rows, cols), dtype=np.uint8)
    label[fan_cover] = LABEL_FAN
    label[spot_cover] = LABEL_SPOT
    return LabelMasks(label=label, fan_cover=fan_cover, spot_cover=spot_cover, fan_direction=fan_direction)


def _footprints(kinds, g, rows, cols):
    """Each feature's footprint inside the tile: ``(i, box, mask)``, a fan's sector or a spot's ellipse
    on the window ``box`` of the tile; features wholly outside it are left out."""
    for i, kind in enumerate(kinds):
        x, y, direction = g["x_px"][i], g["y_px"][i], g["direction_deg"][i]
        if kind == "fan":
            length = g["length_px"][i]
            win = _window(x, y, length, rows, cols)
            if win is not None:
                box, dx, dy = win
                yield i, box, _sector_mask(dx, dy, direction, length, g["opening_deg"][i])
        else:
            a, b = g["semi_major_px"][i], g["semi_minor_px"][i]
            win = _window(x, y, max(a, b), rows, cols)
            if win is not None:
                box, dx, dy = win
                yield i, box, _ellipse_mask(dx, dy, direction, a, b)


def footprint_masks(features_df, shape):
    """The fan and spot footprints of :func:`rasterise_features`, without its labels and directions.

    Returns
    -------
    fan_cover, spot_cover : ndarray of shape (rows, cols), bool
        Equal to ``rasterise_features(features_df, shape)``'s, at a fraction of the cost (no
        per-pixel direction sums).
    """
    rows, cols = _check_shape(shape)
    kinds, g = _feature_arrays(features_df)
    fan_cover = np.zeros((rows, cols), dtype=bool)
    spot_cover = np.zeros((rows, cols), dtype=bool)
    for i, box, mask in _footprints(kinds, g, rows, cols):
        (fan_cover if kinds[i] == "fan" else spot_cover)[box] |= mask
    return fan_cover, spot_cover


def sector_polygon(x, y, direction_deg, length_px, opening_deg, *, n=32):
    """Outline of a fan: apex followed by ``n`` points along its arc.

    Parameters
    ----------
    x, y : float
        Apex, px.
    direction_deg : float
        Axis of the sector, degrees clockwise from image up.
    length_px : float
        Radius, px.
    opening_deg : float
        Full opening angle, degrees.
    n : int, optional
        Vertices on the arc (>= 2).

    Returns
    -------
    vertices : ndarray of shape (n + 1, 2)
        (x, y) px, apex first, arc clockwise on screen; the ring is not closed
        (the first vertex is not repeated).
    """
    if n < 2:
        raise SpecError(f"n {n!r} must be at least 2 arc vertices.")
    angles = direction_deg + np.linspace(-opening_deg / 2.0, opening_deg / 2.0, int(n))
    d_col, d_row = unit_vector(angles)
    arc = np.column_stack([x + length_px * d_col, y + length_px * d_row])
    return np.vstack([[x, y], arc])


def ellipse_polygon(x, y, direction_deg, a, b, *, n=48):
    """Outline of a spot: ``n`` points on an ellipse with semi-major ``a`` along ``direction_deg``.

    Parameters
    ----------
    x, y : float
        Centre, px.
    direction_deg : float
        Long axis, degrees clockwise from image up (mod 180).
    a, b : float
        Semi-major and semi-minor axes, px.
    n : int, optional
        Vertices (>= 3).

    Returns
    -------
    vertices : ndarray of shape (n, 2)
        (x, y) px, not closed.
    """
    if n < 3:
        raise SpecError(f"n {n!r} must be at least 3 vertices.")
    t = np.linspace(0.0, 2.0 * np.pi, int(n), endpoint=False)
    along, across = a * np.cos(t), b * np.sin(t)
    u_col, u_row = unit_vector(direction_deg)
    return np.column_stack([x + along * u_col - across * u_row, y + along * u_row + across * u_col])


def coverage_fraction(masks):
    """Share of the tile's pixels covered by fans, spots and either.

    Returns
    -------
    fractions : dict
        ``fan``, ``spot``, ``any``: floats in [0, 1].
    """
    return {
        "fan": float(masks.fan_cover.mean()),
        "spot": float(masks.spot_cover.mean()),
        "any": float((masks.fan_cover | masks.spot_cover).mean()),
    }
