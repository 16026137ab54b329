"""From patch probability maps and dense darkness to a catalog of fan and spot objects.

The patch classifier says *whether* a neighbourhood holds deposits and of which
kind; objects are found, placed and sized from dense per-pixel evidence (a
locally normalised darkness map), because many spots are far smaller than a
patch. Every dark component becomes a *candidate* described by a short vector
of object features (shape, darkness, the patch probabilities under it, the
orientation model's polarity vote); an object classifier trained on consensus
decides fan, spot or nothing. A fan's axis comes from its own pixels and only
its polarity (which end is the source) from the orientation model, stacked
with the component's own asymmetry. Fans that share a vent form one dark
component; they are split by the modes of the pixel directions seen from the
vent, never merged into one.
"""

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import ndimage

from .contract import DETECTION_COLUMNS
from .geometry import angular_difference, direction_deg

__all__ = [
    "AssemblyParams",
    "Candidate",
    "OBJECT_COLUMNS",
    "OBJECT_FEATURE_NAMES",
    "POLARITY_FEATURE_NAMES",
    "local_darkness",
    "upsample_patch_maps",
    "find_candidates",
    "candidate_rows",
    "objects_from_candidates",
]

#: Detections carry, for evaluation only, the axis (degrees mod 180) before polarity was chosen.
OBJECT_COLUMNS = DETECTION_COLUMNS + ("axis_deg",)

#: Features of a candidate component read by the object classifier, in order.
OBJECT_FEATURE_NAMES = (
    "obj_log_area",
    "obj_major_px",
    "obj_minor_px",
    "obj_elongation",
    "obj_fill",
    "obj_dark_mean",
    "obj_dark_max",
    "obj_dark_std",
    "obj_ring_dark",
    "obj_p_none",
    "obj_p_fan",
    "obj_p_spot",
    "obj_p_fan_max",
    "obj_p_spot_max",
    "obj_polarity_vote",
    "obj_skew",
    "obj_widening",
    "obj_dark_asymmetry",
    "obj_n_modes",
    "obj_mode_share",
    "obj_border",
)

#: Evidence along the component's axis stacked into the fan polarity (all odd under a flip).
POLARITY_FEATURE_NAMES = ("obj_polarity_vote", "obj_skew", "obj_widening", "obj_dark_asymmetry")


@dataclass(frozen=True)
class AssemblyParams:
    """Parameters of object assembly, stored in the model card.

    Attributes
    ----------
    background_px : int, default=51
        Side of the box (applied twice) giving the local background, px.
    open_px : int, default=5
        Side of the grey opening that removes dark lines thinner than this
        (channel networks, troughs) before components are formed, px.
    seed_k : float, default=3.0
        Darkness (robust z-score below the local background) a component must reach.
    grow_k : float, default=1.5
        Darkness down to which a component grows from its seeds (hysteresis).
    min_area_px : int, default=15
        Smallest component kept, px.
    min_score : float, default=0.5
        Smallest object score (1 - probability of nothing) kept.
    split_min_separation_deg : float, default=35.0
        Smallest angle between two direction modes of one vent for it to be split.
    split_min_share : float, default=0.2
        Smallest share of a vent's pixel weight a mode needs to become a fan of its own.
    polarity_coef : tuple of float, default=(4.0, 0.0, 0.0, 0.0)
        Logistic weights of :data:`POLARITY_FEATURE_NAMES` for "the fan runs along +axis".
    """

    background_px: int = 51
    open_px: int = 5
    seed_k: float = 3.0
    grow_k: float = 1.5
    min_area_px: int = 15
    min_score: float = 0.5
    split_min_separation_deg: float = 35.0
    split_min_share: float = 0.2
    polarity_coef: tuple = (4.0, 0.0, 0.0, 0.0)

    @classmethod
    def from_dict(cls, fields):
        known = {k: v for k, v in (fields or {}).items() if k in cls.__dataclass_fields__}
        if "polarity_coef" in known:
            known["polarity_coef"] = tuple(float(v) for v in known["polarity_coef"])
        return cls(**known)


def local_darkness(image, valid, *, background_px=51):
    """Darkness below the local background, in units of the tile's robust residual spread.

    The background is a normalised box mean (twice applied, close to a Gaussian)
    over valid pixels, so slow illumination gradients and no-data edges do not
    read as deposits.

    Parameters
    ----------
    image : ndarray of shape (M, N), float
        Tile scaled to [0, 1].
    valid : ndarray of shape (M, N), bool
    background_px : int, default=51

    Returns
    -------
    dark : ndarray of shape (M, N), float32
        ``(background - image) / (1.4826 * MAD)`` of the residual; 0 on no-data
        and everywhere on a flat tile.
    """
    v = valid.astype(np.float32)
    img = np.where(valid, image, 0.0).astype(np.float32)
    num, den = img, v
    for _ in range(2):
        num = ndimage.uniform_filter(num, background_px, mode="constant")
        den = ndimage.uniform_filter(den, background_px, mode="constant")
    background = num / np.maximum(den, 1e-6)
    resid = np.where(valid, background - img, 0.0)
    values = resid[valid]
    if values.size == 0:
        return np.zeros(image.shape, dtype=np.float32)
    mad = 1.4826 * np.median(np.abs(values - np.median(values)))
    if mad <= 0:
        return np.zeros(image.shape, dtype=np.float32)
    return (resid / mad).astype(np.float32)


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
        Clamped to the outermost patch centres at the tile edges.
    """
    values = np.asarray(values, dtype=np.float32).reshape(grid.n_rows, grid.n_cols, -1)
    rows, cols = shape
    y0, x0 = float(grid.y_px[0]), float(grid.x_px[0])
    step_y = float(grid.y_px[grid.n_cols] - y0) if grid.n_rows > 1 else 1.0
    step_x = float(grid.x_px[1] - x0) if grid.n_cols > 1 else 1.0
    iy = np.clip((np.arange(rows, dtype=np.float32) - y0) / step_y, 0, grid.n_rows - 1)
    ix = np.clip((np.arange(cols, dtype=np.float32) - x0) / step_x, 0, grid.n_cols - 1)
    y_lo = np.minimum(np.floor(iy).astype(int), max(grid.n_rows - 2, 0))
    x_lo = np.minimum(np.floor(ix).astype(int), max(grid.n_cols - 2, 0))
    y_hi = np.minimum(y_lo + 1, grid.n_rows - 1)
    x_hi = np.minimum(x_lo + 1, grid.n_cols - 1)
    fy = (iy - y_lo)[:, None, None]
    fx = (ix - x_lo)[None, :, None]
    by_rows = values[y_lo] * (1 - fy) + values[y_hi] * fy
    out = by_rows[:, x_lo] * (1 - fx) + by_rows[:, x_hi] * fx
    return np.moveaxis(out, -1, 0).astype(np.float32)


@dataclass
class Candidate:
    """One dark component: its pixels, object features and both readings of its shape.

    Attributes
    ----------
    ys, xs : ndarray of int
        Pixels of the component.
    features : ndarray of shape (len(OBJECT_FEATURE_NAMES),), float32
    fans : list of dict
        The component read as one or more fans (split at a shared vent), with
        their pixel subsets under ``"_pixels"``.
    spot : dict
        The component read as a spot.
    axis_dir_deg : float
        Direction of the +axis that the odd features refer to, degrees clockwise from up.
    fans_flipped : list of dict
        The fan reading with the opposite polarity (only when asked for, in training).
    """

    ys: np.ndarray
    xs: np.ndarray
    features: np.ndarray
    fans: list = field(default_factory=list)
    spot: dict = field(default_factory=dict)
    axis_dir_deg: float = 0.0
    fans_flipped: list = field(default_factory=list)


def _circ_mean_deg(angles, weights):
    rad = np.radians(angles)
    return float(np.degrees(np.arctan2(np.sum(weights * np.sin(rad)), np.sum(weights * np.cos(rad)))) % 360.0)


def _direction_modes(angles, weights, *, min_separation, min_share, n_bins=72):
    """Peaks of a circularly smoothed, weighted histogram of directions (degrees)."""
    hist, _ = np.histogram(angles, bins=n_bins, range=(0.0, 360.0), weights=weights)
    smooth = ndimage.gaussian_filter1d(hist.astype(float), sigma=1.5, mode="wrap")
    total = smooth.sum()
    if total <= 0:
        return []
    is_peak = (smooth >= np.roll(smooth, 1)) & (smooth > np.roll(smooth, -1))
    centres = (np.arange(n_bins) + 0.5) * (360.0 / n_bins)
    kept = []
    for i in sorted(np.flatnonzero(is_peak), key=lambda i: -smooth[i]):
        near = angular_difference(centres, centres[i]) <= min_separation / 2
        if smooth[near].sum() / total < min_share:
            continue
        if all(angular_difference(centres[i], k) >= min_separation for k in kept):
            kept.append(float(centres[i]))
    return kept


def _sigmoid(z):
    return 1.0 / (1.0 + np.exp(-z))


def _axis_moments(xs, ys, w):
    cx, cy = np.average(xs, weights=w), np.average(ys, weights=w)
    dx, dy = xs - cx, ys - cy
    cov = np.cov(np.vstack([dx, dy]), aweights=w) if len(xs) > 2 else np.eye(2)
    evals, evecs = np.linalg.eigh(cov)
    ux, uy = evecs[:, 1]
    s = dx * ux + dy * uy
    t = -dx * uy + dy * ux
    sd = np.sqrt(max(np.average(s**2, weights=w), 1e-6))
    skew = float(np.average(s**3, weights=w) / sd**3)
    pos, neg = s > 0, s < 0
    wide_pos = np.sqrt(np.average(t[pos] ** 2)) if pos.sum() > 2 else 0.0
    wide_neg = np.sqrt(np.average(t[neg] ** 2)) if neg.sum() > 2 else 0.0
    widening = float((wide_pos - wide_neg) / max(wide_pos + wide_neg, 1e-6))
    dark_pos = np.mean(w[pos]) if pos.any() else 0.0
    dark_neg = np.mean(w[neg]) if neg.any() else 0.0
    asym = float((dark_pos - dark_neg) / max(dark_pos + dark_neg, 1e-6))
    return (cx, cy), np.clip(evals, 0.25, None), (ux, uy), skew, widening, asym


def _fan_readings(xs, ys, w, u, params):
    """The component read as fans running along +u from its near end, split at the vent."""
    ux, uy = u
    cx, cy = np.average(xs, weights=w), np.average(ys, weights=w)
    s = (xs - cx) * ux + (ys - cy) * uy
    near_end = s <= np.quantile(s, 0.03) + 2.0
    ax, ay = float(np.mean(xs[near_end])), float(np.mean(ys[near_end]))
    dx, dy = xs - ax, ys - ay
    r = np.hypot(dx, dy)
    far = r > max(3.0, 0.25 * r.max())
    phi = direction_deg(dx, dy)
    modes = []
    if far.sum() >= 10:
        modes = _direction_modes(phi[far], (w * r)[far], min_separation=params.split_min_separation_deg,
                                 min_share=params.split_min_share)
    if len(modes) < 2:
        modes = [_circ_mean_deg(phi[far], (w * r)[far]) if far.any() else float(direction_deg(ux, uy))]
    modes = np.asarray(modes)
    owner = np.argmin(angular_difference(phi[:, None], modes[None, :]), axis=1)
    fans = []
    for k in range(len(modes)):
        mine = owner == k
        sel = mine & far
        if sel.sum() < 3:
            sel = mine
        if sel.sum() < 3:
            continue
        length = max(float(np.quantile(r[mine], 0.97)), 3.0)
        spread = float(np.clip(np.degrees(2.0 * mine.sum() / length**2), 5.0, 180.0))
        fans.append(dict(kind="fan", x_px=ax, y_px=ay, direction_deg=_circ_mean_deg(phi[sel], (w * r)[sel]),
                         length_px=length, spread_deg=spread, _pixels=mine))
    shares = [f["_pixels"].sum() / len(xs) for f in fans]
    return fans, len(fans), (min(shares) if shares else 0.0)


def _spot_reading(xs, ys):
    cx, cy = float(xs.mean()), float(ys.mean())
    cov = np.cov(np.vstack([xs - cx, ys - cy])) if len(xs) > 2 else np.eye(2)
    evals, evecs = np.linalg.eigh(cov)
    evals = np.clip(evals, 0.25, None)
    ux, uy = evecs[:, 1]
    axis = float(direction_deg(ux, uy) % 180.0)
    # A uniform ellipse of semi-axis a has variance a^2 / 4 along that axis.
    a, b = 2.0 * np.sqrt(evals[1]), 2.0 * np.sqrt(evals[0])
    return dict(kind="spot", x_px=cx, y_px=cy, direction_deg=axis, semi_major_px=float(a),
                semi_minor_px=float(min(b, a)), axis_deg=axis)


def find_candidates(dark, valid, class_maps, polarity_maps, *, params=AssemblyParams(), both_polarities=False):
    """Dark components of a tile with their object features and shape readings.

    Parameters
    ----------
    dark : ndarray of shape (M, N), float32
        From :func:`local_darkness`.
    valid : ndarray of shape (M, N), bool
    class_maps : ndarray of shape (3, M, N)
        Calibrated probabilities of none, fan and spot at every pixel.
    polarity_maps : ndarray of shape (2, M, N)
        Per-pixel polarity vector (d_col, d_row): the orientation model's fan
        direction there, scaled by its confidence (2p - 1) and by the fan probability.
    params : AssemblyParams
    both_polarities : bool, default=False
        Also read every candidate as fans of the opposite polarity (training uses
        both to label candidates independently of the polarity decision).

    Returns
    -------
    candidates : list of Candidate
    """
    rows, cols = dark.shape
    # Grey opening removes dark lines thinner than open_px (channels, troughs) but keeps
    # fans and spots; the smoothing then suppresses single-pixel noise.
    opened = ndimage.grey_opening(dark, size=(params.open_px, params.open_px)) if params.open_px > 1 else dark
    smooth = np.where(valid, ndimage.gaussian_filter(opened, 1.0), 0.0)
    labels, n = ndimage.label(smooth > params.grow_k)
    if n == 0:
        return []
    index = np.arange(1, n + 1)
    peak = ndimage.maximum(smooth, labels, index=index)
    area = ndimage.sum_labels(np.ones_like(smooth), labels, index=index)
    keep = np.flatnonzero((peak >= params.seed_k) & (area >= params.min_area_px)) + 1
    slices = ndimage.find_objects(labels)
    coef = np.asarray(params.polarity_coef, dtype=float)
    out = []
    for lab in keep:
        sl = slices[lab - 1]
        ly, lx = np.nonzero(labels[sl] == lab)
        ys, xs = ly + sl[0].start, lx + sl[1].start
        xf, yf = xs.astype(float), ys.astype(float)
        w = np.maximum(smooth[ys, xs], 1e-3)
        (cx, cy), evals, u, skew, widening, asym = _axis_moments(xf, yf, w)
        p_none, p_fan, p_spot = (class_maps[c][ys, xs] for c in range(3))
        fan_mass = max(float(np.average(p_fan, weights=w)), 1e-6)
        vote = float((np.average(polarity_maps[0][ys, xs], weights=w) * u[0]
                      + np.average(polarity_maps[1][ys, xs], weights=w) * u[1]) / fan_mass)
        vote = float(np.clip(vote, -1.0, 1.0))
        z = float(coef @ np.array([vote, skew, widening, asym]))
        p_along = _sigmoid(z)
        u_run = u if p_along >= 0.5 else (-u[0], -u[1])
        fans, n_modes, mode_share = _fan_readings(xf, yf, w, u_run, params)
        axis = float(direction_deg(*u) % 180.0)
        confidence = float(abs(2.0 * p_along - 1.0))
        for f in fans:
            f.update(axis_deg=axis, direction_confidence=confidence)
        flipped = []
        if both_polarities:
            flipped, _, _ = _fan_readings(xf, yf, w, (-u_run[0], -u_run[1]), params)
            for f in flipped:
                f.update(axis_deg=axis, direction_confidence=confidence)
        ring_sl = tuple(slice(max(s.start - 6, 0), s.stop + 6) for s in sl)
        local = labels[ring_sl] == lab
        ring = ndimage.binary_dilation(local, iterations=5) & ~local & valid[ring_sl]
        ring_dark = float(dark[ring_sl][ring].mean()) if ring.any() else 0.0
        major, minor = 2.0 * np.sqrt(evals[1]), 2.0 * np.sqrt(evals[0])
        border = float(min(xs.min(), ys.min(), cols - 1 - xs.max(), rows - 1 - ys.max()) <= 1)
        features = np.array([
            np.log(len(xs)), major, minor, major / max(minor, 1e-3), len(xs) / (np.pi * major * minor),
            float(w.mean()), float(w.max()), float(w.std()), ring_dark,
            float(np.average(p_none, weights=w)), float(np.average(p_fan, weights=w)),
            float(np.average(p_spot, weights=w)), float(p_fan.max()), float(p_spot.max()),
            vote, skew, widening, asym, float(n_modes), float(mode_share), border,
        ], dtype=np.float32)
        out.append(Candidate(ys=ys, xs=xs, features=features, fans=fans, spot=_spot_reading(xf, yf),
                             axis_dir_deg=float(direction_deg(*u)), fans_flipped=flipped))
    return out


def candidate_rows(candidates, tile_id=""):
    """Every reading of every candidate as contract rows, for labelling candidates in training.

    Returns
    -------
    fans, spots : DataFrame
        With a ``candidate`` column giving the candidate's index; fans also carry
        ``flipped`` (True for the reading of opposite polarity).
    """
    fans = [{**{k: v for k, v in f.items() if k != "_pixels"}, "candidate": i, "tile_id": tile_id,
             "flipped": flip}
            for i, c in enumerate(candidates)
            for flip, readings in ((False, c.fans), (True, c.fans_flipped)) for f in readings]
    spots = [{**c.spot, "candidate": i, "tile_id": tile_id} for i, c in enumerate(candidates)]
    return pd.DataFrame(fans), pd.DataFrame(spots)


def objects_from_candidates(candidates, kind_proba, *, params=AssemblyParams(), tile_id=""):
    """The catalog of one tile from its candidates and their object-class probabilities.

    Parameters
    ----------
    candidates : list of Candidate
    kind_proba : ndarray of shape (n_candidates, 3)
        Probabilities of nothing, fan and spot per candidate.
    params : AssemblyParams
    tile_id : str

    Returns
    -------
    objects : DataFrame
        Columns :data:`OBJECT_COLUMNS`; geometry in tile px, directions in
        degrees clockwise from image up; ``votes`` is empty.
    pixels : list of (ys, xs) int arrays
        The pixels of each object, in the same order.
    """
    rows, pixels = [], []
    for cand, p in zip(candidates, np.asarray(kind_proba, dtype=float)):
        score = float(1.0 - p[0])
        if score < params.min_score:
            continue
        fan_fraction = float(p[1] / max(p[1] + p[2], 1e-9))
        if p[1] >= p[2] and cand.fans:
            for f in cand.fans:
                mine = f["_pixels"]
                rows.append({**{k: v for k, v in f.items() if k != "_pixels"}, "score": score,
                             "fan_fraction": fan_fraction, "tile_id": tile_id})
                pixels.append((cand.ys[mine], cand.xs[mine]))
        else:
            rows.append({**cand.spot, "direction_confidence": np.nan, "score": score,
                         "fan_fraction": fan_fraction, "tile_id": tile_id})
            pixels.append((cand.ys, cand.xs))
    frame = pd.DataFrame(rows, columns=OBJECT_COLUMNS)
    frame["votes"] = np.nan
    return frame, pixels
