"""From patch probability maps and dense darkness to a catalog of fan and spot objects.

The patch classifier decides *whether* a neighbourhood holds deposits and of
which kind; the objects themselves are placed and sized from dense per-pixel
evidence (the darkness map), because many spots are far smaller than a patch.
Each fan's axis comes from its own pixels and only its polarity (which end is
the source) from the orientation model. Fans that share a vent form one dark
component; they are split by the modes of the pixel directions seen from the
vent, never merged into one.
"""

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import ndimage

from .contract import DETECTION_COLUMNS
from .geometry import angular_difference, direction_deg, unit_vector

__all__ = ["AssemblyParams", "upsample_patch_maps", "darkness_map", "assemble_objects", "OBJECT_COLUMNS"]

#: Detections carry, for evaluation only, the axis (degrees mod 180) before polarity was chosen.
OBJECT_COLUMNS = DETECTION_COLUMNS + ("axis_deg",)


@dataclass(frozen=True)
class AssemblyParams:
    """Parameters of object assembly, stored in the model card.

    Attributes
    ----------
    smooth_px : float, default=1.0
        Gaussian sigma applied to the darkness map, px.
    seed_k : float, default=3.0
        Darkness (robust z-score below the background) a component must reach somewhere.
    grow_k : float, default=1.5
        Darkness down to which a component grows from its seeds (hysteresis).
    min_area_px : int, default=20
        Smallest component kept, px.
    min_score : float, default=0.5
        Smallest object score (mean calibrated deposit probability over its pixels) kept.
    split_min_separation_deg : float, default=35.0
        Smallest angle between two direction modes of one vent for it to be split into fans.
    split_min_share : float, default=0.2
        Smallest share of a vent's pixel weight a mode needs to become a fan of its own.
    """

    smooth_px: float = 1.0
    seed_k: float = 3.0
    grow_k: float = 1.5
    min_area_px: int = 20
    min_score: float = 0.5
    split_min_separation_deg: float = 35.0
    split_min_share: float = 0.2

    @classmethod
    def from_dict(cls, fields):
        known = {k: v for k, v in (fields or {}).items() if k in cls.__dataclass_fields__}
        return cls(**known)


def darkness_map(image, valid):
    """Robust darkness below the tile's background, in units of its robust spread.

    Parameters
    ----------
    image : ndarray of shape (M, N), float
        Tile scaled to [0, 1].
    valid : ndarray of shape (M, N), bool
        Pixels that are not no-data.

    Returns
    -------
    dark : ndarray of shape (M, N), float32
        ``(median - image) / (1.4826 * MAD)`` over valid pixels; 0 on no-data. A
        flat tile (MAD 0) gives all zeros.
    """
    values = image[valid]
    if values.size == 0:
        return np.zeros(image.shape, dtype=np.float32)
    median = np.median(values)
    mad = 1.4826 * np.median(np.abs(values - median))
    if mad <= 0:
        return np.zeros(image.shape, dtype=np.float32)
    dark = ((median - image) / mad).astype(np.float32)
    dark[~valid] = 0.0
    return dark


def upsample_patch_maps(values, grid, shape):
    """Bilinear interpolation of per-patch values to every pixel of the tile.

    Parameters
    ----------
    values : ndarray of shape (n_patches, k)
        Per-patch values in the grid's row-major order.
    grid : PatchGrid
        The patch grid they belong to (regular: centres at a constant stride).
    shape : tuple of int
        Tile shape (M, N).

    Returns
    -------
    maps : ndarray of shape (k, M, N), float32
    """
    values = np.asarray(values, dtype=np.float32).reshape(grid.n_rows, grid.n_cols, -1)
    rows, cols = shape
    y0 = float(grid.y_px[0])
    x0 = float(grid.x_px[0])
    step_y = float(grid.y_px[grid.n_cols] - y0) if grid.n_rows > 1 else 1.0
    step_x = float(grid.x_px[1] - x0) if grid.n_cols > 1 else 1.0
    gy = (np.arange(rows, dtype=np.float32) - y0) / step_y
    gx = (np.arange(cols, dtype=np.float32) - x0) / step_x
    # Separable linear interpolation: rows first, then columns; clamped at the edges.
    iy = np.clip(gy, 0, grid.n_rows - 1)
    ix = np.clip(gx, 0, grid.n_cols - 1)
    y_lo = np.minimum(np.floor(iy).astype(int), max(grid.n_rows - 2, 0))
    x_lo = np.minimum(np.floor(ix).astype(int), max(grid.n_cols - 2, 0))
    fy = (iy - y_lo)[:, None, None]
    fx = (ix - x_lo)[:, None]
    y_hi = np.minimum(y_lo + 1, grid.n_rows - 1)
    x_hi = np.minimum(x_lo + 1, grid.n_cols - 1)
    by_rows = values[y_lo] * (1 - fy) + values[y_hi] * fy  # (M, n_cols, k)
    out = by_rows[:, x_lo] * (1 - fx[None, :, :]) + by_rows[:, x_hi] * fx[None, :, :]
    return np.moveaxis(out, -1, 0).astype(np.float32)


def _weighted_quantile(values, weights, q):
    order = np.argsort(values)
    cum = np.cumsum(weights[order])
    if cum[-1] <= 0:
        return float(np.quantile(values, q))
    return float(values[order][np.searchsorted(cum, q * cum[-1]).clip(0, len(values) - 1)])


def _circ_mean_deg(angles, weights):
    rad = np.radians(angles)
    s = np.sum(weights * np.sin(rad))
    c = np.sum(weights * np.cos(rad))
    return float(np.degrees(np.arctan2(s, c)) % 360.0)


def _direction_modes(angles, weights, *, min_separation, min_share, n_bins=72):
    """Peaks of a circularly smoothed, weighted histogram of directions (degrees)."""
    hist, _ = np.histogram(angles, bins=n_bins, range=(0.0, 360.0), weights=weights)
    smooth = ndimage.gaussian_filter1d(hist.astype(float), sigma=1.5, mode="wrap")
    total = smooth.sum()
    if total <= 0:
        return []
    is_peak = (smooth >= np.roll(smooth, 1)) & (smooth > np.roll(smooth, -1))
    centres = (np.arange(n_bins) + 0.5) * (360.0 / n_bins)
    peaks = [(smooth[i], centres[i]) for i in np.flatnonzero(is_peak)]
    peaks.sort(reverse=True)
    kept = []
    for height, centre in peaks:
        # Mass of a mode: the smoothed histogram within half the separation of the peak.
        near = angular_difference(centres, centre) <= min_separation / 2
        if smooth[near].sum() / total < min_share:
            continue
        if all(angular_difference(centre, k) >= min_separation for k in kept):
            kept.append(centre)
    return kept


def _fan_rows(xs, ys, w, polarity_vec, params):
    """One or more fans (split at a shared vent) from one component's pixels."""
    cx, cy = np.average(xs, weights=w), np.average(ys, weights=w)
    cov = np.cov(np.vstack([xs - cx, ys - cy]), aweights=w) if len(xs) > 2 else np.eye(2)
    evals, evecs = np.linalg.eigh(cov)
    ux, uy = evecs[:, 1]
    axis = float(direction_deg(ux, uy) % 180.0)
    # Polarity from the orientation model: which way along the axis the fan runs.
    along = polarity_vec[0] * ux + polarity_vec[1] * uy
    if along < 0:
        ux, uy = -ux, -uy
    confidence = float(min(1.0, abs(along)))
    s = (xs - cx) * ux + (ys - cy) * uy
    near_end = s <= np.quantile(s, 0.03) + 2.0
    ax, ay = float(np.mean(xs[near_end])), float(np.mean(ys[near_end]))
    dx, dy = xs - ax, ys - ay
    r = np.hypot(dx, dy)
    far = r > max(3.0, 0.25 * r.max())
    phi = direction_deg(dx, dy)
    modes = []
    if far.sum() >= 10:
        modes = _direction_modes(
            phi[far], (w * r)[far],
            min_separation=params.split_min_separation_deg, min_share=params.split_min_share,
        )
    if len(modes) < 2:
        modes = [_circ_mean_deg(phi[far], (w * r)[far]) if far.any() else float(direction_deg(ux, uy))]
    modes = np.asarray(modes)
    owner = np.argmin(angular_difference(phi[:, None], modes[None, :]), axis=1)
    rows = []
    for k in range(len(modes)):
        mine = owner == k
        sel = mine & far
        if sel.sum() < 3:
            sel = mine
        if sel.sum() < 3:
            continue
        direction = _circ_mean_deg(phi[sel], (w * r)[sel])
        length = max(_weighted_quantile(r[mine], np.ones(mine.sum()), 0.97), 3.0)
        area = float(mine.sum())
        spread = float(np.clip(np.degrees(2.0 * area / length**2), 5.0, 180.0))
        rows.append(
            dict(kind="fan", x_px=ax, y_px=ay, direction_deg=direction, length_px=length,
                 spread_deg=spread, axis_deg=axis, direction_confidence=confidence, _pixels=mine)
        )
    return rows


def _spot_row(xs, ys):
    cx, cy = float(xs.mean()), float(ys.mean())
    cov = np.cov(np.vstack([xs - cx, ys - cy])) if len(xs) > 2 else np.eye(2)
    evals, evecs = np.linalg.eigh(cov)
    evals = np.clip(evals, 0.25, None)
    ux, uy = evecs[:, 1]
    axis = float(direction_deg(ux, uy) % 180.0)
    # A uniform ellipse of semi-axis a has variance a^2 / 4 along that axis.
    a, b = 2.0 * np.sqrt(evals[1]), 2.0 * np.sqrt(evals[0])
    return dict(kind="spot", x_px=cx, y_px=cy, direction_deg=axis, semi_major_px=float(a),
                semi_minor_px=float(min(b, a)), axis_deg=axis, direction_confidence=np.nan)


def assemble_objects(dark, valid, class_maps, polarity_maps, *, params=AssemblyParams(), tile_id=""):
    """Fan and spot objects of one tile.

    Parameters
    ----------
    dark : ndarray of shape (M, N), float32
        Darkness map from :func:`darkness_map`.
    valid : ndarray of shape (M, N), bool
        Pixels that are not no-data.
    class_maps : ndarray of shape (3, M, N)
        Calibrated probabilities of none, fan and spot at every pixel.
    polarity_maps : ndarray of shape (2, M, N)
        Per-pixel polarity vector (d_col, d_row): the orientation model's
        direction of the fan there, scaled by its confidence (|2p - 1|) and by
        the fan probability.
    params : AssemblyParams
    tile_id : str

    Returns
    -------
    objects : DataFrame
        Columns :data:`OBJECT_COLUMNS`; geometry in tile px, directions in
        degrees clockwise from image up; ``votes`` is empty.
    pixels : list of (ys, xs) int arrays
        The pixels of each object, in the same order (for coverage masks).
    """
    smooth = ndimage.gaussian_filter(dark, params.smooth_px) if params.smooth_px > 0 else dark
    smooth = np.where(valid, smooth, 0.0)
    region = smooth > params.grow_k
    labels, n = ndimage.label(region)
    if n == 0:
        return pd.DataFrame(columns=OBJECT_COLUMNS), []
    seed_max = ndimage.maximum(smooth, labels, index=np.arange(1, n + 1))
    areas = ndimage.sum_labels(np.ones_like(smooth), labels, index=np.arange(1, n + 1))
    keep = np.flatnonzero((seed_max >= params.seed_k) & (areas >= params.min_area_px)) + 1
    if keep.size == 0:
        return pd.DataFrame(columns=OBJECT_COLUMNS), []
    slices = ndimage.find_objects(labels)
    rows, pixels = [], []
    for lab in keep:
        sl = slices[lab - 1]
        local = labels[sl] == lab
        ly, lx = np.nonzero(local)
        ys, xs = ly + sl[0].start, lx + sl[1].start
        w = np.maximum(smooth[ys, xs], 1e-3)
        p_none, p_fan, p_spot = (class_maps[c][ys, xs] for c in range(3))
        score = float(np.average(1.0 - p_none, weights=w))
        if score < params.min_score:
            continue
        fan_share = float(np.average(p_fan, weights=w) / max(np.average(p_fan + p_spot, weights=w), 1e-6))
        if fan_share >= 0.5:
            vec = (
                float(np.average(polarity_maps[0][ys, xs], weights=w)),
                float(np.average(polarity_maps[1][ys, xs], weights=w)),
            )
            norm = np.average(p_fan, weights=w)
            vec = (vec[0] / max(norm, 1e-6), vec[1] / max(norm, 1e-6))
            for row in _fan_rows(xs.astype(float), ys.astype(float), w, vec, params):
                mine = row.pop("_pixels")
                rows.append({**row, "score": score, "fan_fraction": fan_share, "tile_id": tile_id})
                pixels.append((ys[mine], xs[mine]))
        else:
            rows.append({**_spot_row(xs.astype(float), ys.astype(float)), "score": score,
                         "fan_fraction": fan_share, "tile_id": tile_id})
            pixels.append((ys, xs))
    frame = pd.DataFrame(rows, columns=OBJECT_COLUMNS)
    frame["votes"] = np.nan
    return frame, pixels
