"""Run an exported model on one tile: patch probabilities, polarity, objects, coverage."""

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from ..tile import _dense
from ..circstats import circular_std, robust_circular_mean
from ..objects.assemble import (
    AssemblyParams,
    PatchField,
    find_candidates,
    local_darkness,
    objects_from_candidates,
    reading_matrix,
)
from ..objects.refine import apply_refined
from ..labels import footprint_masks
from ..tile.scale import frame_factors, resample_tile, to_tile_frame
from ..tile.features import _features_of_prepared
from ..geometry import unit_vector
from ..tile.spec import patch_axis_deg

__all__ = ["TileResult", "TileMaps", "detect_tile", "detect_block", "tile_maps", "tile_candidates", "tile_summary_vector",
           "fan_direction_weights", "tile_direction_stats"]


@dataclass
class TileResult:
    """Everything the model says about one tile.

    Attributes
    ----------
    tile_id : str
    shape : tuple of int
        (rows, cols) of the tile, px.
    detections : DataFrame
        Fan and spot objects (columns of :data:`detector.objects.assemble.OBJECT_COLUMNS`), tile px.
    grid : PatchGrid
    proba : ndarray of shape (n_patches, 3)
        Calibrated probabilities of none, fan and spot per patch ((1, 0, 0) for
        patches that are mostly no-data: they are not scored).
    polarity : ndarray of shape (n_patches,)
        Probability that the patch's fan runs along +axis.
    axis_deg : ndarray of shape (n_patches,)
        Structure-tensor axis per patch, degrees clockwise from up, mod 180.
    fan_cover, spot_cover : ndarray of shape (M, N), bool
        Footprints of the detected fans (sectors) and spots (ellipses), drawn
        as consensus features are (:func:`detector.labels.footprint_masks`),
        so a tile's covered fraction is the one the benchmark scores.
    valid_fraction : float
        Share of pixels that are not no-data.
    summary : ndarray of shape (n_features,)
        Mean feature vector over valid patches (for the unfamiliarity score).
    noise : float
        The tile's noise before any smoothing (:func:`detector.tile.noise.noise_sigma`), as a
        fraction of the full grey scale.
    smoothed : bool
        Whether the tile was noisier than every fitting tile of the model and so smoothed
        before its features were computed (:func:`detector.tile.noise.smooth_excess_noise`).
    floor_detections : DataFrame or None
        With ``detect_tile(..., floor_score=f)``: the objects the same readings give when
        kept down to the score ``f``; otherwise None.
    read_shape : tuple of int
        (rows, cols) of the frame the tile was read in: its own ``shape`` unless its ground
        scale lay outside the model's (:mod:`detector.tile.scale`) and it was resampled. The
        detections and covers are in the tile's own pixels; ``grid``, ``proba``, ``polarity``
        and ``axis_deg`` are in the read frame (:meth:`grid_xy` gives the patch centres in
        the tile's own pixels).
    """

    tile_id: str
    shape: tuple
    detections: pd.DataFrame
    grid: object
    proba: np.ndarray
    polarity: np.ndarray
    axis_deg: np.ndarray
    fan_cover: np.ndarray
    spot_cover: np.ndarray
    valid_fraction: float
    summary: np.ndarray
    noise: float = float("nan")
    smoothed: bool = False
    floor_detections: pd.DataFrame = None
    read_shape: tuple = None

    def __post_init__(self):
        if self.read_shape is None:
            self.read_shape = tuple(self.shape)

    @property
    def resampled(self):
        """Whether the tile was read at another pixel scale than its own."""
        return tuple(self.read_shape) != tuple(self.shape)

    def grid_xy(self):
        """Patch centres (x, y) in the tile's own pixels (origin at the centre of the top-left pixel)."""
        x = np.asarray(self.grid.x_px, dtype=float)
        y = np.asarray(self.grid.y_px, dtype=float)
        if not self.resampled:
            return x, y
        fx, fy = frame_factors(self.shape, self.read_shape)
        return (x + 0.5) / fx - 0.5, (y + 0.5) / fy - 0.5

    @property
    def p_deposit(self):
        """Tile-level deposit probability: the largest patch probability of fan or spot."""
        valid = np.asarray(self.grid.valid, dtype=bool)
        if not valid.any():
            return 0.0
        return float(np.max(1.0 - self.proba[valid, 0]))

    @property
    def fan_cover_fraction(self):
        """Share of the tile's pixels covered by detected fans."""
        return float(self.fan_cover.mean())

    @property
    def spot_cover_fraction(self):
        """Share of the tile's pixels covered by detected spots (and no fan)."""
        return float((self.spot_cover & ~self.fan_cover).mean())


@dataclass
class TileMaps:
    """Patch outputs of a tile, readable at any pixel (:class:`detector.objects.assemble.PatchField`)."""

    proba: np.ndarray
    polarity: np.ndarray
    axis_deg: np.ndarray
    class_maps: object
    polarity_maps: object
    axis_maps: object


def fan_direction_weights(detections):
    """Weight of each detected fan in its tile's mean direction: score x direction confidence x length.

    Wrong fans, not matched ones, spoil a tile's mean, so fans the model is
    less sure of count less. A missing score or confidence counts as 1.
    """
    def column(name):
        if name not in detections:
            return np.ones(len(detections))
        return np.nan_to_num(detections[name].to_numpy(dtype=float), nan=1.0)

    return column("score") * column("direction_confidence") * detections["length_px"].to_numpy(dtype=float)


def tile_direction_stats(direction_deg, weights):
    """Robust mean direction and circular spread of a tile's fans.

    Parameters
    ----------
    direction_deg : ndarray of shape (n,)
        Fan directions, degrees clockwise from image up.
    weights : ndarray of shape (n,)
        Non-negative weights, e.g. :func:`fan_direction_weights`.

    Returns
    -------
    mean_deg, scatter_deg : float
        :func:`detector.circstats.robust_circular_mean` and
        :func:`detector.circstats.circular_std` (weighted), degrees; NaN
        without fans or weight.
    """
    direction_deg = np.asarray(direction_deg, dtype=float)
    weights = np.nan_to_num(np.clip(np.asarray(weights, dtype=float), 0.0, None), nan=0.0)
    if direction_deg.size == 0 or weights.sum() <= 0:
        return np.nan, np.nan
    return float(robust_circular_mean(direction_deg, weights)), float(circular_std(direction_deg, weights))


def tile_summary_vector(X, valid):
    """Mean feature vector over valid patches; zeros when no patch is valid."""
    if not valid.any():
        return np.zeros(X.shape[1], dtype=np.float32)
    return X[valid].mean(axis=0).astype(np.float32)


def tile_maps(X, grid, shape, spec, predict_patches, predict_polarity):
    """Patch probabilities and polarity of a tile, and their per-pixel maps.

    Parameters
    ----------
    X : ndarray of shape (n_patches, n_features)
    grid : PatchGrid
    shape : tuple of int
    spec : FeatureSpec
    predict_patches : callable
        X -> calibrated (n, 3) probabilities of none, fan, spot.
    predict_polarity : callable
        X -> (n,) probability that the fan runs along +axis.

    Returns
    -------
    maps : TileMaps
    """
    valid_patch = np.asarray(grid.valid, dtype=bool)
    proba = np.zeros((len(X), 3), dtype=np.float32)
    proba[:, 0] = 1.0
    polarity = np.full(len(X), 0.5, dtype=np.float32)
    if valid_patch.any():
        proba[valid_patch] = predict_patches(X[valid_patch])
        polarity[valid_patch] = predict_polarity(X[valid_patch])
    axis = patch_axis_deg(X, spec)
    d_col, d_row = unit_vector(axis)
    signed = (2.0 * polarity - 1.0) * proba[:, 1]
    if len(X) == 0:
        zeros = np.zeros((3,) + tuple(shape), np.float32)
        zeros[0] = 1.0
        return TileMaps(proba, polarity, axis, zeros, np.zeros((2,) + tuple(shape), np.float32),
                        np.zeros((2,) + tuple(shape), np.float32))
    doubled = np.radians(2.0 * axis)
    return TileMaps(
        proba=proba,
        polarity=polarity,
        axis_deg=axis,
        class_maps=PatchField(proba, grid),
        polarity_maps=PatchField(np.column_stack([signed * d_col, signed * d_row]), grid),
        # The structure-tensor axis as a doubled-angle vector, so that it can be interpolated.
        axis_maps=PatchField(np.column_stack([np.cos(doubled), np.sin(doubled)]), grid),
    )


def tile_candidates(tile, nodata_mask, maps, spec, params, *, prep=None):
    """Dark components of a tile as object candidates (see :func:`detector.objects.assemble.find_candidates`).

    ``prep``, the tile from ``_dense.prepare_tile``, saves preparing it again.
    """
    prep = _dense.prepare_tile(tile, spec, nodata_mask) if prep is None else prep
    dark = local_darkness(prep.image, prep.valid, background_px=params.background_px)
    return find_candidates(dark, prep.valid, maps.class_maps, maps.polarity_maps, params=params,
                           axis_maps=maps.axis_maps)


def detect_tile(model, tile, *, tile_id="", nodata_mask=None, min_score=None, features=None, floor_score=None,
                metres_per_px=None):
    """Screen one tile with a loaded model, the tile alone in its context block.

    Parameters
    ----------
    model : detector.inference.model.Model
    tile : ndarray of shape (M, N)
        uint8, uint16 or float in [0, 1].
    tile_id : str, default=""
    nodata_mask : ndarray of shape (M, N), bool, optional
        True where there is no data; default: pixels equal to the spec's nodata value.
    min_score : float, optional
        Smallest object score kept; default: the model card's.
    features : tuple (X, grid), optional
        Precomputed features of this tile with the model's spec and noise range
        (``extract_features(tile, spec, nodata_mask=..., noise_range=model.noise_range)``).
    floor_score : float, optional
        Also keep the same readings down to this score (``floor_detections``), without
        reading the tile again.
    metres_per_px : float, optional
        The tile's ground scale. A tile outside the range of the model's fitting tiles
        (:class:`detector.tile.scale.PixelScale`) is resampled to their median scale before it is
        read; the detections and covers come back in the tile's own pixels. None (or a card
        without a scale) reads the tile as it is.

    Returns
    -------
    result : TileResult

    See Also
    --------
    detect_block : the tiles of one context block together, as screening and evaluation read them.
    """
    return detect_block(model, [tile], tile_ids=[tile_id], nodata_masks=[nodata_mask], min_score=min_score,
                        features=[features], floor_score=floor_score, metres_per_px=[metres_per_px])[0]


def detect_block(model, tiles, *, tile_ids=None, nodata_masks=None, min_score=None, features=None,
                 floor_score=None, metres_per_px=None):
    """Screen the tiles of one context block (:mod:`detector.objects.context`) with a loaded model.

    Every tile is read first (features, patch maps, dark components and the first score of each
    reading); then the fan readings of all of them are rescored with their tile and block
    context, and each tile's objects are assembled. Arguments are as in :func:`detect_tile`,
    given per tile as sequences (``None`` for the defaults).

    Returns
    -------
    list of TileResult
        One per tile, in order.
    """
    n = len(tiles)

    def each(values):
        return [None] * n if values is None else list(values)

    tile_ids = [""] * n if tile_ids is None else [str(t) for t in tile_ids]
    reads = [_read_tile(model, tile, tile_id=tid, nodata_mask=mask, min_score=min_score, features=feat,
                        metres_per_px=mpp)
             for tile, tid, mask, feat, mpp in zip(tiles, tile_ids, each(nodata_masks), each(features),
                                                    each(metres_per_px))]
    scores = model.score_block([r.F for r in reads], [r.candidates for r in reads], [r.first for r in reads])
    return [_finish_tile(model, r, s, floor_score) for r, s in zip(reads, scores)]


@dataclass
class _TileRead:
    """A tile read up to the first scores of its readings (the first stage of :func:`detect_block`)."""

    tile_id: str
    shape: tuple
    read_shape: tuple
    valid_fraction: float
    summary: np.ndarray
    grid: object
    maps: TileMaps
    params: AssemblyParams
    candidates: list
    F: np.ndarray
    first: np.ndarray
    noise: float
    smoothed: bool


def _read_tile(model, tile, *, tile_id, nodata_mask, min_score, features, metres_per_px):
    spec = model.feature_spec
    tile = np.asarray(tile)
    if nodata_mask is None:
        nodata_mask = tile == spec.nodata_value
    own_shape = tuple(tile.shape)
    valid_fraction = float((~np.asarray(nodata_mask, dtype=bool)).mean())
    scale = model.pixel_scale
    zoom = scale.zoom(metres_per_px) if scale is not None else 1.0
    if zoom != 1.0:
        if features is not None:
            raise ValueError("features were computed on the tile as it is, but its scale asks for resampling.")
        tile, nodata_mask = resample_tile(tile, nodata_mask, zoom)
    prep = _dense.prepare_tile(tile, spec, nodata_mask, model.noise_range)
    X, grid = _features_of_prepared(prep, spec) if features is None else features
    maps = tile_maps(X, grid, tile.shape, spec, model.predict_patches, model.predict_polarity)
    params = AssemblyParams.from_dict(model.assembly)
    if min_score is not None:
        params = replace(params, min_score=float(min_score))
    candidates = tile_candidates(tile, nodata_mask, maps, spec, params, prep=prep)
    F, _, _ = reading_matrix(candidates)
    summary = tile_summary_vector(X, np.asarray(grid.valid, dtype=bool))
    return _TileRead(tile_id, own_shape, tuple(tile.shape), valid_fraction, summary, grid, maps, params, candidates, F,
                     model.predict_readings(F), float(prep.noise), bool(prep.smoothed))


def _finish_tile(model, read, scores, floor_score):
    candidates, F, params = read.candidates, read.F, read.params
    apply_refined(candidates, *model.refine_readings(F, candidates))
    confidence = model.direction_confidence(F)
    detections, _ = objects_from_candidates(candidates, scores, params=params,
                                            tile_id=read.tile_id, direction_confidence=confidence)
    floor_detections = None
    if floor_score is not None:
        floor_detections, _ = objects_from_candidates(candidates, scores, params=replace(params, min_score=float(floor_score)),
                                                      tile_id=read.tile_id, direction_confidence=confidence)
    if read.read_shape != read.shape:
        fx, fy = frame_factors(read.shape, read.read_shape)
        detections = to_tile_frame(detections, fx, fy)
        if floor_detections is not None:
            floor_detections = to_tile_frame(floor_detections, fx, fy)
    # Cover is the detections' footprints, not their dark pixels: consensus features are footprints,
    # and the dark pixels alone fell 2.5 points of cover short of them (README, "Benchmark").
    fan_cover, spot_cover = footprint_masks(detections, read.shape)
    return TileResult(
        tile_id=read.tile_id,
        shape=read.shape,
        detections=detections,
        grid=read.grid,
        proba=read.maps.proba,
        polarity=read.maps.polarity,
        axis_deg=read.maps.axis_deg,
        fan_cover=fan_cover,
        spot_cover=spot_cover,
        valid_fraction=read.valid_fraction,
        summary=read.summary,
        noise=read.noise,
        smoothed=read.smoothed,
        floor_detections=floor_detections,
        read_shape=read.read_shape,
    )
