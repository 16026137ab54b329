"""From patch probability maps and dense darkness to a catalog of fan and spot objects.

The patch classifier says *whether* a neighbourhood holds deposits and of which
kind; objects are found, placed and sized from dense per-pixel evidence (a
locally normalised darkness map), because many spots are far smaller than a
patch. Each dark component is read two ways:

- as fans: fans are darkest at their source, so the peaks of the component's
  smoothed darkness are its vents; each pixel belongs to its nearest vent and
  each vent's pixels are split into fans by the modes of their directions seen
  from the vent (several fans often share one vent and point different ways:
  they are split, never merged);
- as one spot (centre and axes from the pixel moments), or as one spot around
  each vent (its nearest pixels at least half as dark as the vent): spots that
  touch, and dark spots with fans growing out of them.

Every reading gets a feature vector (the component's shape and darkness, the
patch probabilities under it, the orientation model's polarity vote along the
reading's direction, and the reading's own geometry); an object classifier
trained on consensus gives each reading the probability that it is right. A
component keeps the fans of its best-scoring fan interpretation and the spots of
its best-scoring spot interpretation, each when its score clears the threshold:
fans growing out of a dark spot are both.
"""

import functools
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import ndimage
from scipy.cluster.hierarchy import fcluster, linkage

from ..tile import _kernels
from . import _readings
from ..contract import DETECTION_COLUMNS
from ..geometry import direction_deg, unit_vector

__all__ = [
    "AssemblyParams",
    "HYP_MODES",
    "HYP_VENTS",
    "HYP_AXIS_FORWARD",
    "HYP_AXIS_REVERSE",
    "Candidate",
    "OBJECT_COLUMNS",
    "OBJECT_FEATURE_NAMES",
    "local_darkness",
    "upsample_patch_maps",
    "reading_view",
    "VIEW_ALONG",
    "VIEW_ACROSS",
    "PatchField",
    "find_candidates",
    "reading_matrix",
    "candidate_rows",
    "objects_from_candidates",
    "share_vent_sources",
]

#: Detections carry, for evaluation only, the axis (degrees mod 180) before polarity was chosen.
OBJECT_COLUMNS = DETECTION_COLUMNS + ("axis_deg",)

_COMPONENT_FEATURES = (
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
    "obj_skew",
    "obj_widening",
    "obj_dark_asymmetry",
    "obj_n_vents",
    "obj_n_fans",
    "obj_border",
)
#: Where a reading's view samples the darkness: along its direction, in fractions of its length from
#: its apex (behind the apex, inside, beyond the tip), and across it, in fractions of its half-width.
VIEW_ALONG = np.array([-0.4, -0.15, 0.1, 0.3, 0.5, 0.7, 0.9, 1.15, 1.4])
VIEW_ACROSS = np.array([-0.9, -0.55, -0.25, 0.0, 0.25, 0.55, 0.9])
_READING_FEATURES = (
    "read_is_fan",
    "read_length_px",
    "read_opening_deg",
    "read_share",
    "read_vent_dark",
    "read_dark_mean",
    "read_polarity_vote",
    "read_p_fan",
    "read_concentration",
    # which interpretation of the component the reading belongs to (one-hot; all 0 for the spot)
    "read_from_modes",
    "read_from_vents",
    "read_from_axis",
    "read_n_siblings",
    # the dark mass along the reading's direction: a fan widens and fades away from its source
    "read_widening",
    "read_fading",
    "read_apex_dark",
    "read_axis_agreement",
    # the darkness around the reading in its own frame, sampled from the map whatever the component
    # holds (see reading_view)
) + tuple(f"read_view_t{i}_s{j}" for i in range(VIEW_ALONG.size) for j in range(VIEW_ACROSS.size)) + (
    "read_view_scale",)
#: Features of a reading's view (the samples and their scale), the last reading features.
_N_VIEW = VIEW_ALONG.size * VIEW_ACROSS.size + 1
#: Features of one reading of a candidate, read by the object classifier, in order.
OBJECT_FEATURE_NAMES = _COMPONENT_FEATURES + _READING_FEATURES


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
    broad_seed_k : float, default=4.0
        A component is also seeded where the map smoothed by ``grow_smooth_px``
        and renormalised by its own robust spread reaches this: faint, broad
        deposits in noisy or blurred images rarely reach ``seed_k`` at any single
        pixel, but their smoothed darkness stands well above its spread (0: off).
    deposit_seed : float, default=0.5
        A component that reaches no darkness seed is also kept when the patch
        classifier's deposit probability (1 - p_none) reaches this at one of its
        pixels: a faint fan on a textured or blurred image can stand out to the
        classifier before its darkness does (0: off).
    grow_k : float, default=1.5
        Darkness down to which a component grows from its seeds (hysteresis),
        measured on the map smoothed by ``grow_smooth_px`` and renormalised by
        its own robust spread, so faint fan ends far from the vent are kept.
    grow_smooth_px : float, default=2.5
        Gaussian sigma of the map that components grow on, px.
    min_area_px : int, default=15
        Smallest component kept, px.
    min_score : float, default=0.5
        Smallest object score (1 - probability of nothing) kept.
    split_min_separation_deg : float, default=25.0
        Smallest angle between two direction modes of one vent for it to be split.
    split_min_share : float, default=0.08
        Smallest share of a vent's pixel weight a mode needs to become a fan of its own.
    vent_smooth_px : float, default=3.0
        Gaussian sigma of the darkness whose peaks are vents, px.
    vent_min_separation_px : int, default=15
        Smallest distance between two vents of one component, px.
    max_vents : int, default=6
        Most vents read in one component (the darkest).
    shared_source_px : float, default=12.0
        Kept fans whose sources all lie within this distance of one another
        (complete linkage) are one vent's: they start at the score-weighted mean
        of their sources, px (0: off). Each fan's source is read on its own pixels,
        which start a few px apart around one vent.
    """

    background_px: int = 51
    open_px: int = 5
    seed_k: float = 3.0
    broad_seed_k: float = 4.0
    deposit_seed: float = 0.5
    grow_k: float = 1.5
    grow_smooth_px: float = 2.5
    min_area_px: int = 15
    min_score: float = 0.5
    split_min_separation_deg: float = 25.0
    split_min_share: float = 0.08
    vent_smooth_px: float = 3.0
    vent_min_separation_px: int = 15
    max_vents: int = 6
    shared_source_px: float = 12.0

    @classmethod
    def from_dict(cls, fields):
        return cls(**{k: v for k, v in (fields or {}).items() if k in cls.__dataclass_fields__})


def _box_mean(image, size):
    """``scipy.ndimage.uniform_filter(image, size, mode='constant')`` of a float32 image,
    by compiled running sums in scipy's order (the same values)."""
    image = np.ascontiguousarray(image, dtype=np.float32)
    down = _kernels.box_mean_rows(image, size, np.empty_like(image))
    return _kernels.box_mean_cols(down, size, np.empty_like(image))


def _box_weights(valid, background_px):
    """The twice-applied box mean of the valid mask: each pixel's share of valid background."""
    den = valid.astype(np.float32)
    for _ in range(2):
        den = _box_mean(den, background_px)
    return den


@functools.lru_cache(maxsize=4)
def _full_box_weights(shape, background_px):
    den = _box_weights(np.ones(shape, dtype=bool), background_px)
    den.setflags(write=False)
    return den


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
    valid = np.ascontiguousarray(valid, dtype=bool)
    if image.dtype == np.float32:
        img = _kernels.masked_f32(np.ascontiguousarray(image), valid)
    else:
        img = np.where(valid, image, 0.0).astype(np.float32)
    num = img
    for _ in range(2):
        num = _box_mean(num, background_px)
    # Most tiles are wholly valid and of one size: their weights are computed once.
    den = _full_box_weights(valid.shape, background_px) if valid.all() else _box_weights(valid, background_px)
    resid = _kernels.darkness_residual(num, den, img, valid)
    mad = _spread_of_sample(_kernels.valid_sample(resid, valid, _SPREAD_EVERY))
    if mad <= 0:
        return np.zeros(image.shape, dtype=np.float32)
    resid /= np.float32(mad)  # float32 division by the float32 spread, as resid / mad gives
    return resid


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


class PatchField:
    """Per-patch values that can be read at any pixel by bilinear interpolation.

    Equal to :func:`upsample_patch_maps` at the pixels asked for, without
    building the full-resolution maps (objects only need their own pixels).

    Parameters
    ----------
    values : ndarray of shape (n_patches, k)
    grid : PatchGrid
    """

    def __init__(self, values, grid):
        self.values = np.asarray(values, dtype=np.float32).reshape(grid.n_rows, grid.n_cols, -1)
        self.n_rows, self.n_cols = grid.n_rows, grid.n_cols
        self.y0, self.x0 = float(grid.y_px[0]), float(grid.x_px[0])
        self.step_y = float(grid.y_px[grid.n_cols] - self.y0) if grid.n_rows > 1 else 1.0
        self.step_x = float(grid.x_px[1] - self.x0) if grid.n_cols > 1 else 1.0

    @classmethod
    def joined(cls, fields):
        """One field holding the channels of several fields on the same grid (None if they are not)."""
        if not all(isinstance(f, cls) for f in fields):
            return None
        first = fields[0]
        key = (first.n_rows, first.n_cols, first.y0, first.x0, first.step_y, first.step_x)
        if any((f.n_rows, f.n_cols, f.y0, f.x0, f.step_y, f.step_x) != key for f in fields):
            return None
        out = cls.__new__(cls)
        out.__dict__.update(first.__dict__)
        out.values = np.concatenate([f.values for f in fields], axis=-1)
        return out

    def at(self, ys, xs):
        """Interpolated values at pixels (ys, xs), shape (n, k), float32 (compiled; the same
        values as :meth:`at_numpy`)."""
        ys, xs = np.atleast_1d(ys), np.atleast_1d(xs)
        if ys.ndim != 1 or ys.shape != xs.shape:
            return self.at_numpy(ys, xs)
        return _kernels.patch_field_at(np.ascontiguousarray(self.values), self.y0, self.x0, self.step_y,
                                       self.step_x, ys, xs)

    def at_numpy(self, ys, xs):
        """Interpolated values at pixels (ys, xs), shape (n, k), float32, in numpy."""
        iy = np.clip((np.asarray(ys, dtype=np.float32) - self.y0) / self.step_y, 0, self.n_rows - 1)
        ix = np.clip((np.asarray(xs, dtype=np.float32) - self.x0) / self.step_x, 0, self.n_cols - 1)
        y_lo = np.minimum(np.floor(iy).astype(int), max(self.n_rows - 2, 0))
        x_lo = np.minimum(np.floor(ix).astype(int), max(self.n_cols - 2, 0))
        y_hi = np.minimum(y_lo + 1, self.n_rows - 1)
        x_hi = np.minimum(x_lo + 1, self.n_cols - 1)
        fy = (iy - y_lo)[:, None]
        fx = (ix - x_lo)[:, None]
        v = self.values
        top = v[y_lo, x_lo] * (1 - fx) + v[y_lo, x_hi] * fx
        bottom = v[y_hi, x_lo] * (1 - fx) + v[y_hi, x_hi] * fx
        return (top * (1 - fy) + bottom * fy).astype(np.float32)


def _sample(maps, ys, xs):
    """Values of per-pixel maps (k, M, N) or of a :class:`PatchField` at pixels, shape (k, n)."""
    if hasattr(maps, "at"):
        return maps.at(ys, xs).T
    return np.asarray(maps)[:, ys, xs]


@dataclass
class Candidate:
    """One dark component: its pixels, component features and its readings.

    Attributes
    ----------
    ys, xs : ndarray of int
        Pixels of the component.
    features : ndarray of shape (len(_COMPONENT_FEATURES),), float32
    fans : list of dict
        The component read as fans (contract fields, plus ``_pixels``, a mask
        over the component's pixels, and ``_features``, the reading's features).
    spot : dict
        The component read as one spot (contract fields and ``_features``).
    vent_spots : list of dict
        The component read as one spot around each vent (a dark spot with fans growing out of it, or
        several spots that touch): contract fields, ``_pixels`` and ``_features``.
    """

    ys: np.ndarray
    xs: np.ndarray
    features: np.ndarray
    fans: list = field(default_factory=list)
    spot: dict = field(default_factory=dict)
    vent_spots: list = field(default_factory=list)

    @property
    def spots(self):
        """The spot readings: the whole component's, then one per vent."""
        return [self.spot] + list(self.vent_spots)


def grey_opening_square(image, size):
    """Grey opening by a flat ``size`` x ``size`` square, equal to
    ``scipy.ndimage.grey_opening(image, size=(size, size))``.

    Odd sizes are computed as separable running minima then maxima by compiled
    loops with mirrored edges (min and max are exact, so the result is identical);
    even sizes, whose dilation origin scipy shifts, go to scipy.
    """
    if size % 2 == 0:
        return ndimage.grey_opening(image, size=(size, size))
    return _kernels.square_extreme(_kernels.square_extreme(image, size, False), size, True)


def _median(v):
    """``np.median(v)`` of a 1-D array without NaN, to the last bit, from its two middle
    order statistics (:func:`_readings.middle_pair`, compiled selection).

    The middle pair of an even-sized array is averaged as ``np.mean`` does (summed
    from zero in the array's dtype, divided by 2).
    """
    lower, upper = _readings.middle_pair(v)
    if v.size % 2:
        return v.dtype.type(upper)
    return np.mean(np.array([lower, upper], dtype=v.dtype))


#: Every how many valid pixels one enters the robust spread (as good an estimate, several times faster).
_SPREAD_EVERY = 4


def _robust_spread(values, valid):
    """1.4826 MAD of a map's valid pixels (0 when there are none), from every 4th of them."""
    if values.dtype == np.float32:
        sample = _kernels.valid_sample(values, np.ascontiguousarray(valid, dtype=bool), _SPREAD_EVERY)
    else:
        sample = values[valid][::_SPREAD_EVERY]
    return _spread_of_sample(sample)


def _spread_of_sample(v):
    """1.4826 MAD of the values ``v`` (0 when there are none)."""
    if v.size == 0:
        return 0.0
    return 1.4826 * _median(np.abs(v - _median(v)))


def _above_spread(values, valid, threshold, mad):
    """``_renormalised(values, valid, mad) > threshold``, by one compiled pass for a float32 map."""
    if values.dtype != np.float32:
        return _renormalised(values, valid, mad) > threshold
    t = np.float32(threshold)
    if not mad > 0:
        return np.full(values.shape, np.float32(0.0) > t)
    return _kernels.ratio_above(values, np.ascontiguousarray(valid, dtype=bool), np.float32(mad), t)


def _renormalised(values, valid, mad):
    """A map divided by ``mad``, the robust spread of its valid pixels (:func:`_robust_spread`); 0 off them."""
    return np.where(valid, values / mad, 0.0) if mad > 0 else np.zeros_like(values)


#: Gaussian weights (sigma 1.5 bins, radius 6) that smooth a vent's direction histogram.
_MODE_SMOOTHING = _kernels.gaussian_weights(1.5)


def _vents(smooth_local, mask_local, ly, lx, params):
    """Vents of a component: the peaks of its smoothed darkness, strongest first.

    Returns
    -------
    vx, vy : ndarray of int64
        Vent pixels in the component's box.
    vent_dark : ndarray of float64
        Smoothed darkness at each vent.
    """
    peak_map = _kernels.gaussian(np.where(mask_local, smooth_local, 0.0), params.vent_smooth_px)
    size = int(params.vent_min_separation_px)
    if size % 2:  # scipy's maximum_filter (mirrored edges) as a separable compiled running maximum
        local_max = _kernels.square_extreme(peak_map, size, True)
    else:
        local_max = ndimage.maximum_filter(peak_map, size=size)
    is_max = (peak_map == local_max) & mask_local
    py, px = np.nonzero(is_max)
    if len(py):
        height = peak_map[py, px]
        keep = height >= 0.5 * height.max()
        py, px = py[keep], px[keep]
    if len(py) == 0:
        k = int(np.argmax(peak_map[ly, lx]))
        py, px = ly[k:k + 1], lx[k:k + 1]
    order = np.argsort(-peak_map[py, px])[: params.max_vents]
    vy, vx = py[order], px[order]
    return vx.astype(np.int64), vy.astype(np.int64), peak_map[vy, vx].astype(np.float64)


#: Interpretations of one component, each a set of fan readings (the spot reading is the last one):
#: the direction modes of its vents (several fans may share a vent), each vent as one fan, and the
#: whole component as one fan along its principal axis, running either way.
HYP_MODES, HYP_VENTS = _readings.HYP_MODES, _readings.HYP_VENTS
HYP_AXIS_FORWARD, HYP_AXIS_REVERSE = _readings.HYP_AXIS_FORWARD, _readings.HYP_AXIS_REVERSE
_HYPOTHESES = (HYP_MODES, HYP_VENTS, HYP_AXIS_FORWARD, HYP_AXIS_REVERSE)


#: Where each field of a fan reading sits in the rows of :func:`_readings.fan_readings`.
_FIELD = {name: i for i, name in enumerate(_readings.READING_FIELDS)}


def _fan_readings(xs, ys, w, w32, samples, modes, owner, vx, vy, vent_dark, smooth, box, params, has_axis, split):
    """A component's fan readings under every interpretation (modes, then vents when ``split``, then
    the principal axis either way), as dicts.

    Each holds the contract fields, ``_pixels`` (the reading's mask over the
    component's pixels), ``_hyp`` (its interpretation) and ``_features`` (its first
    reading features, float32, see :func:`_readings.fan_readings`). ``axis_deg``
    (degrees mod 180) is half the angle of the mean doubled-angle axis under the
    reading, or without axis maps the reading's direction mod 180. The compiled
    loops of :mod:`detector.objects._readings` read them; the angles that set the
    vent and axis readings' directions are numpy's (``arctan2``), taken between
    their two passes.
    """
    vents_x, vents_y = (vx + box[1].start).astype(float), (vy + box[0].start).astype(float)
    if split:
        # each pixel's nearest vent and its direction from there
        vent_of, d_col, minus_d_row = _readings.nearest_vents(xs, ys, vents_x, vents_y)
        angle = np.arctan2(d_col, minus_d_row)
    else:
        vent_of, angle = np.empty(0, dtype=np.int64), np.empty(0)
    pulls, (cx, cy, ux, uy) = _readings.reading_pulls(xs, ys, w, vent_of, angle, vents_x, vents_y,
                                                      max(3, params.min_area_px // 2))
    vent_directions = np.degrees(np.arctan2(pulls[:, 0], pulls[:, 1])) % 360.0
    forward = float(direction_deg(ux, uy))
    readings, pixels, features = _readings.fan_readings(
        xs, ys, w, w32, samples, modes, owner, vent_of, vents_x, vents_y, vent_directions, vent_dark, cx, cy,
        forward, smooth[box], box[0].start, box[1].start, has_axis)
    if len(readings) == 0:
        return []
    if has_axis:
        # numpy's arctan2, as the detections' axis has always been taken
        axis = (0.5 * np.degrees(np.arctan2(readings[:, _FIELD["axis_sin"]], readings[:, _FIELD["axis_cos"]]))) % 180.0
    else:
        axis = readings[:, _FIELD["direction_deg"]] % 180.0
    hyp = readings[:, _FIELD["hyp"]].astype(np.int64)
    fields = zip(hyp.tolist(), *(readings[:, _FIELD[name]].tolist() for name in (
        "x_px", "y_px", "direction_deg", "length_px", "opening_deg", "vote")), axis.tolist())
    return [dict(kind="fan", x_px=x, y_px=y, direction_deg=direction, length_px=length, opening_deg=opening,
                 _pixels=pixels[i], _hyp=h, direction_confidence=0.5 * (1.0 + vote), axis_deg=axis,
                 _features=features[i])
            for i, (h, x, y, direction, length, opening, vote, axis) in enumerate(fields)]


#: A vent's spot holds the pixels nearest that vent whose darkness is at least this share of the vent's.
_VENT_SPOT_LEVEL = 0.5
#: A vent's spot holding at least this share of its component's darkness repeats the component's spot: not read.
_VENT_SPOT_MAX_SHARE = 0.8
_READ_INDEX = {name: i for i, name in enumerate(_READING_FEATURES)}


def _spot_features(**values):
    """A spot reading's features before its view: the named reading features, 0 for the rest (a spot
    reads its semi-major axis as its length and its spot probability in the fan-probability slot)."""
    features = np.zeros(len(_READING_FEATURES) - _N_VIEW, dtype=np.float32)
    for name, value in values.items():
        features[_READ_INDEX[f"read_{name}"]] = value
    return features


def _vent_spots(xs, ys, w, p_spot, vents_x, vents_y, min_px):
    """The component read as one spot around each vent: the pixels nearest the vent (as in the
    vent-split fans) that are at least :data:`_VENT_SPOT_LEVEL` as dark as the vent, described by
    their moments (compiled: :func:`_readings.vent_spots`). Vents whose spot would be too small or
    nearly the whole component are skipped."""
    spots, pixels = _readings.vent_spots(xs, ys, w, np.ascontiguousarray(p_spot), vents_x, vents_y, min_px,
                                         _VENT_SPOT_LEVEL, _VENT_SPOT_MAX_SHARE)
    out = []
    for row, mine in zip(spots.tolist(), pixels):
        cx, cy, axis, semi_major, semi_minor, share, at_vent, dark_mean, p_spot_mean = row
        features = _spot_features(length_px=semi_major, share=share, vent_dark=at_vent, dark_mean=dark_mean,
                                  p_fan=p_spot_mean, from_vents=1.0, n_siblings=len(spots))
        out.append(dict(kind="spot", x_px=cx, y_px=cy, direction_deg=axis, semi_major_px=semi_major,
                        semi_minor_px=semi_minor, axis_deg=axis, _pixels=mine, _features=features))
    return out


#: Darkness (robust z-score) below which a view's mean magnitude no longer scales it.
_VIEW_FLOOR = 0.5


def reading_view(dark, x, y, direction, length, half_width):
    """The darkness around each reading, sampled on a grid in the reading's own frame.

    A fan is a dark wedge that starts at its apex, widens along its direction
    and fades at its tip, with brighter ground beside it and behind its apex. The
    view is that neighbourhood as the reading sees it: 9 x 7 bilinear samples
    of the darkness map at :data:`VIEW_ALONG` fractions of the length (from 0.4
    behind the apex to 0.4 beyond the tip) and :data:`VIEW_ACROSS` fractions of
    the half-width, read from the map itself rather than from the component's
    pixels, so it sees what segmentation cut off (a faint continuation, a
    neighbour, the trough a fan lies on). The samples are divided by their mean
    magnitude (at least 0.5), which is returned too: the pattern does not change
    with the image's contrast, its strength is a feature of its own.

    Parameters
    ----------
    dark : ndarray of shape (M, N), float32
        Darkness map (robust z-score below the local background), lightly smoothed.
    x, y, direction, length, half_width : ndarray of shape (n,)
        Start (px), direction (degrees clockwise from up), length and half-width
        (px) of each reading. Lengths below 4 px and half-widths below 3 px are
        raised to those.

    Returns
    -------
    view : ndarray of shape (n, 64), float64
        The 63 scaled samples (along-major: ``view[:, 7 * i + j]`` is along
        ``VIEW_ALONG[i]``, across ``VIEW_ACROSS[j]``; positive across is to the
        reading's right) and the scale.
    """
    n = len(x)
    if n == 0:
        return np.zeros((0, _N_VIEW))
    reach = np.maximum(np.asarray(length, float), 4.0)[:, None, None]
    width = np.maximum(np.asarray(half_width, float), 3.0)[:, None, None]
    u_col, u_row = unit_vector(np.asarray(direction, float))
    u_col, u_row = u_col[:, None, None], u_row[:, None, None]
    t = VIEW_ALONG[None, :, None] * reach
    s = VIEW_ACROSS[None, None, :] * width
    # the reading's right is its direction turned a quarter clockwise: (-u_row, u_col)
    xs = np.asarray(x, float)[:, None, None] + t * u_col - s * u_row
    ys = np.asarray(y, float)[:, None, None] + t * u_row + s * u_col
    samples = ndimage.map_coordinates(dark, [ys.ravel(), xs.ravel()], order=1, mode="nearest")
    samples = samples.reshape(n, -1).astype(np.float64)
    scale = np.maximum(np.abs(samples).mean(axis=1), _VIEW_FLOOR)
    return np.hstack([samples / scale[:, None], scale[:, None]])


def _add_views(candidates, dark):
    """Append every reading's view (:func:`reading_view`) to its features, one map read per tile."""
    if not candidates:
        return candidates
    smooth = _kernels.gaussian(np.ascontiguousarray(dark, dtype=np.float32), 1.0)
    readings = [r for c in candidates for r in c.fans + c.spots]
    is_fan = np.array([r["kind"] == "fan" for r in readings])
    geometry = np.empty((len(readings), 5))
    x, y, direction, length, opening = np.array(
        [(r["x_px"], r["y_px"], r["direction_deg"], r["length_px"], r["opening_deg"])
         for r, fan in zip(readings, is_fan) if fan], dtype=float).reshape(-1, 5).T
    half = np.tan(np.radians(np.clip(opening / 2.0, 8.0, 70.0)))
    geometry[is_fan] = np.column_stack([x, y, direction, length, length * half])
    # a spot is seen along its major axis, from one end of the ellipse to the other
    x, y, axis, a, b = np.array(
        [(r["x_px"], r["y_px"], r["axis_deg"], r["semi_major_px"], r["semi_minor_px"])
         for r, fan in zip(readings, is_fan) if not fan], dtype=float).reshape(-1, 5).T
    d_col, d_row = unit_vector(axis)
    geometry[~is_fan] = np.column_stack([x - a * d_col, y - a * d_row, axis, 2.0 * a, b])
    views = reading_view(smooth, *geometry.T).astype(np.float32)
    for r, v in zip(readings, views):
        r["_features"] = np.concatenate([r["_features"], v])
    return candidates


def find_candidates(dark, valid, class_maps, polarity_maps, *, params=AssemblyParams(), axis_maps=None):
    """Dark components of a tile with their features and readings.

    Parameters
    ----------
    dark : ndarray of shape (M, N), float32
        From :func:`local_darkness`.
    valid : ndarray of shape (M, N), bool
    class_maps : ndarray of shape (3, M, N) or PatchField
        Calibrated probabilities of none, fan and spot at every pixel.
    polarity_maps : ndarray of shape (2, M, N) or PatchField
        Per-pixel polarity vector (d_col, d_row): the orientation model's fan
        direction there, scaled by its confidence (2p - 1) and by the fan probability.
    params : AssemblyParams
    axis_maps : ndarray of shape (2, M, N) or PatchField, optional
        cos and sin of twice the structure-tensor axis at every pixel; gives each
        fan reading's ``axis_deg`` (the axis-only baseline of evaluation). Without
        it the reading's own direction mod 180 is used.

    Returns
    -------
    candidates : list of Candidate
    """
    rows_px, cols = dark.shape
    # Grey opening removes dark lines thinner than open_px (channels, troughs) but keeps
    # fans and spots; the smoothing then suppresses single-pixel noise.
    opened = grey_opening_square(dark, params.open_px) if params.open_px > 1 else dark
    # (Gaussian filters equal to scipy.ndimage.gaussian_filter, compiled)
    smooth = np.where(valid, _kernels.gaussian(opened, 1.0), 0.0)
    # components grow where the map smoothed by grow_smooth_px, over its robust spread, exceeds grow_k
    grown = _kernels.gaussian(opened, params.grow_smooth_px)
    grow_spread = _robust_spread(grown, valid)
    grow_mask = _above_spread(grown, valid, params.grow_k, grow_spread)
    level = smooth
    if params.broad_seed_k > 0:
        # seeds from the smoothed map too, rescaled so that broad_seed_k there counts as seed_k
        broad = _renormalised(grown, valid, grow_spread) * np.float32(params.seed_k / params.broad_seed_k)
        level = np.maximum(smooth, broad.astype(smooth.dtype))
    # numbered as scipy.ndimage.label numbers them; areas, seeds, boxes and pixels in the same passes
    labels, area, seeded, box, start, pixel_rows, pixel_cols = _kernels.label_components(
        grow_mask, level, level.dtype.type(params.seed_k))
    if area.size == 0:
        return []
    # A component is kept when it is large enough and holds a seed (its peak reaches seed_k) or,
    # with deposit_seed, when the patch classifier calls one of its pixels a deposit.
    big = area >= params.min_area_px
    if params.deposit_seed > 0:
        faint = np.flatnonzero(big & ~seeded)
        if faint.size:
            # every pixel of the faint components, component after component
            sizes = start[faint + 1] - start[faint]
            firsts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
            at = np.arange(sizes.sum()) + np.repeat(start[faint] - firsts, sizes)
            p_none = _sample(class_maps, pixel_rows[at], pixel_cols[at])[0]
            deposit = 1.0 - np.minimum.reduceat(p_none, firsts)
            seeded = seeded.copy()
            seeded[faint[deposit >= params.deposit_seed]] = True
    keep = np.flatnonzero(seeded & big) + 1
    maps = [class_maps, polarity_maps] + ([] if axis_maps is None else [axis_maps])
    joint = PatchField.joined(maps)
    parts = []
    for lab in keep:
        r0, r1, c0, c1 = (int(v) for v in box[lab - 1])
        sl = (slice(r0, r1), slice(c0, c1))
        mask_local = labels[sl] == lab
        ys, xs = pixel_rows[start[lab - 1]:start[lab]], pixel_cols[start[lab - 1]:start[lab]]
        parts.append((lab, sl, mask_local, ys - r0, xs - c0, ys, xs))
    if joint is not None and parts:
        # the maps at every component pixel in one read (the same values as one read per component)
        every = joint.at(np.concatenate([p[5] for p in parts]), np.concatenate([p[6] for p in parts]))
        bounds = np.cumsum([0] + [len(p[5]) for p in parts])
    out = []
    for i, (lab, sl, mask_local, ly, lx, ys, xs) in enumerate(parts):
        xf, yf = xs.astype(float), ys.astype(float)
        w = np.maximum(smooth[ys, xs], 1e-3)
        if joint is None:
            samples = np.concatenate([_sample(m, ys, xs) for m in maps]).astype(np.float32)
        else:
            samples = np.ascontiguousarray(every[bounds[i]:bounds[i + 1]].T)
        if axis_maps is None:
            samples = np.concatenate([samples, np.zeros((2, len(xs)), np.float32)])
        w64 = w.astype(np.float64)
        minor_var, major_var, skew, widening, asym = _readings.axis_moments(xf, yf, w64, w)
        vx, vy, vent_dark = _vents(smooth[sl], mask_local, ly, lx, params)
        rows, owner, n_vents = _readings.describe_component(
            xf, yf, lx.astype(np.int64), ly.astype(np.int64), w64, vx, vy, vent_dark,
            max(3, params.min_area_px // 2), params.split_min_separation_deg, params.split_min_share,
            _MODE_SMOOTHING)
        fans = _fan_readings(xf, yf, w64, w, samples, rows, owner, vx, vy, vent_dark, smooth, sl, params,
                             axis_maps is not None, split=len(rows) > n_vents)
        ring_sl = tuple(slice(max(q.start - 6, 0), q.stop + 6) for q in sl)
        local = labels[ring_sl] == lab
        ring = _kernels.city_block_ring(local, np.ascontiguousarray(valid[ring_sl]), 5)
        # w.mean(), w.max(), w.std(), the ring's mean darkness, np.average of the class
        # probabilities weighted by w and their maxima: one compiled call, numpy's values
        w_mean, w_max, w_std, ring_dark, avg_none, avg_fan, avg_spot, fan_max, spot_max = \
            _readings.component_summary(w, samples, np.ascontiguousarray(dark[ring_sl]), ring)
        major, minor = 2.0 * np.sqrt(major_var), 2.0 * np.sqrt(minor_var)
        border = float(min(xs.min(), ys.min(), cols - 1 - xs.max(), rows_px - 1 - ys.max()) <= 1)
        features = np.array([
            np.log(len(xs)), major, minor, major / max(minor, 1e-3), len(xs) / (np.pi * major * minor),
            w_mean, w_max, w_std, ring_dark, avg_none, avg_fan, avg_spot, fan_max, spot_max,
            skew, widening, asym, float(n_vents), float(len(fans)), border,
        ], dtype=np.float32)
        cx, cy, axis, semi_major, semi_minor = _readings.spot_reading(xf, yf)
        spot = dict(kind="spot", x_px=cx, y_px=cy, direction_deg=axis, semi_major_px=semi_major,
                    semi_minor_px=semi_minor, axis_deg=axis)
        spot["_features"] = _spot_features(length_px=semi_major, share=1.0, vent_dark=w_max, dark_mean=w_mean,
                                           p_fan=avg_spot)
        vent_spots = _vent_spots(xf, yf, w64, samples[2], (vx + sl[1].start).astype(float),
                                 (vy + sl[0].start).astype(float), max(3, params.min_area_px // 2))
        out.append(Candidate(ys=ys, xs=xs, features=features, fans=fans, spot=spot, vent_spots=vent_spots))
    return _add_views(out, dark)


_FEATURE_DECIMALS = 4


def reading_matrix(candidates):
    """Feature rows of every reading (each fan reading, then the spot readings, per candidate).

    Returns
    -------
    F : ndarray of shape (n_readings, len(OBJECT_FEATURE_NAMES)), float32
        Rounded to 4 decimals.
    owner : ndarray of shape (n_readings,), int
        Index of the candidate each reading belongs to.
    which : ndarray of shape (n_readings,), int
        Index of the fan within its candidate; for spot readings -1 - k, the k-th of
        :attr:`Candidate.spots` (-1 the whole component's spot).
    """
    rows, owner, which = [], [], []
    for i, c in enumerate(candidates):
        for j, f in enumerate(c.fans):
            rows.append(np.concatenate([c.features, f["_features"]]))
            owner.append(i)
            which.append(j)
        for k, spot in enumerate(c.spots):
            rows.append(np.concatenate([c.features, spot["_features"]]))
            owner.append(i)
            which.append(-1 - k)
    F = np.array(rows, dtype=np.float32).reshape(-1, len(OBJECT_FEATURE_NAMES))
    # On a grid of 1e-4, two different values are many float32 steps apart, so a boosted tree's split
    # between them (a float64 midpoint) still separates them once ONNX rounds it to float32.
    F = np.round(F, _FEATURE_DECIMALS)
    return F, np.array(owner, dtype=int), np.array(which, dtype=int)


def _public(reading):
    return {k: v for k, v in reading.items() if not k.startswith("_")}


def candidate_rows(candidates, tile_id=""):
    """Every reading as one contract row, in the order of :func:`reading_matrix`."""
    rows = []
    for c in candidates:
        rows.extend({**_public(f), "tile_id": tile_id} for f in c.fans)
        rows.extend({**_public(r), "tile_id": tile_id} for r in c.spots)
    return pd.DataFrame(rows, columns=OBJECT_COLUMNS[:-3] + ("axis_deg", "direction_confidence"))


def objects_from_candidates(candidates, reading_score, *, params=AssemblyParams(), tile_id="",
                            direction_confidence=None):
    """The catalog of one tile from its candidates and their readings' scores.

    Parameters
    ----------
    candidates : list of Candidate
    reading_score : ndarray of shape (n_readings,)
        Probability that each reading (order of :func:`reading_matrix`) is right.
    params : AssemblyParams
    direction_confidence : ndarray of shape (n_readings,), optional
        Each fan reading's direction confidence; default the orientation model's
        agreement with the reading's direction, ``(1 + vote) / 2``.
    tile_id : str

    Returns
    -------
    objects : DataFrame
        Columns :data:`OBJECT_COLUMNS`; geometry in tile px, directions in
        degrees clockwise from image up; ``votes`` is empty; ``fan_vote_share`` is
        the best fan reading's share of the fan and spot scores.
    pixels : list of (ys, xs) int arrays
        The pixels of each object, in the same order.
    """
    reading_score = np.asarray(reading_score, dtype=float)
    rows, pixels = [], []
    pos = 0
    for c in candidates:
        n_fans, spots = len(c.fans), c.spots
        fan_scores = reading_score[pos:pos + n_fans]
        spot_scores = reading_score[pos + n_fans:pos + n_fans + len(spots)]
        if direction_confidence is not None:
            for f, conf in zip(c.fans, direction_confidence[pos:pos + n_fans]):
                f["direction_confidence"] = float(conf)
        pos += n_fans + len(spots)
        best_fan = float(fan_scores.max()) if len(fan_scores) else 0.0
        fan_vote_share = best_fan / max(best_fan + float(spot_scores.max()), 1e-9)
        # One interpretation of the component's fans: the one whose kept readings add most score above the
        # threshold. The spots are decided on their own scores (fans often grow out of a dark spot at
        # their vent, so a component may hold both): the whole component as one spot, or a spot around
        # each vent, whichever adds more score above the threshold.
        hyps = np.array([f.get("_hyp", HYP_MODES) for f in c.fans], dtype=int)
        gain = np.maximum(fan_scores - params.min_score, 0.0)
        utility = {h: float(gain[hyps == h].sum()) for h in np.unique(hyps)}
        best_hyp = max(utility, key=lambda h: (utility[h], -h)) if utility else None
        if best_hyp is not None and utility[best_hyp] > 0:
            for f, score, hyp in zip(c.fans, fan_scores, hyps):
                if hyp == best_hyp and score >= params.min_score:
                    mine = f["_pixels"]
                    rows.append({**_public(f), "score": float(score), "fan_vote_share": fan_vote_share,
                                 "tile_id": tile_id})
                    pixels.append((c.ys[mine], c.xs[mine]))
        spot_gain = np.maximum(spot_scores - params.min_score, 0.0)
        chosen = [0] if spot_gain[0] >= spot_gain[1:].sum() else list(range(1, len(spots)))
        for k in chosen:
            if spot_scores[k] >= params.min_score:
                rows.append({**_public(spots[k]), "direction_confidence": np.nan, "score": float(spot_scores[k]),
                             "fan_vote_share": fan_vote_share, "tile_id": tile_id})
                mine = spots[k].get("_pixels")
                pixels.append((c.ys, c.xs) if mine is None else (c.ys[mine], c.xs[mine]))
    frame = pd.DataFrame(rows, columns=OBJECT_COLUMNS)
    frame["votes"] = np.nan
    if params.shared_source_px > 0:
        frame = share_vent_sources(frame, params.shared_source_px)
    return frame, pixels


def share_vent_sources(objects, radius_px):
    """Fans of one vent start at one source.

    Fans whose sources (``x_px``, ``y_px``) all lie within ``radius_px`` of one
    another (complete linkage, ``scipy.cluster.hierarchy``; boundary excluded) are
    moved to the mean of their sources weighted by ``score``. Spots and lone fans
    are left as they are.

    Parameters
    ----------
    objects : DataFrame
        One tile's objects (:data:`OBJECT_COLUMNS`).
    radius_px : float

    Returns
    -------
    objects : DataFrame
        A copy with the fans' sources shared.
    """
    out = objects.copy()
    fans = np.flatnonzero((out["kind"] == "fan").to_numpy())
    if fans.size < 2:
        return out
    xy = out[["x_px", "y_px"]].to_numpy(float)[fans]
    # fcluster cuts at distances <= t; just below the radius keeps the boundary out
    label = fcluster(linkage(xy, method="complete"), t=np.nextafter(float(radius_px), 0.0), criterion="distance") - 1
    weight = np.maximum(out["score"].to_numpy(float)[fans], 1e-9)
    total = np.bincount(label, weight)
    shared = np.bincount(label)[label] > 1
    for col, k in (("x_px", 0), ("y_px", 1)):
        mean = np.bincount(label, weight * xy[:, k]) / total
        out.loc[out.index[fans[shared]], col] = mean[label[shared]]
    return out
