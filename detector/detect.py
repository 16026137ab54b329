"""Run an exported model on one tile: patch probabilities, polarity, objects, coverage."""

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .assemble import AssemblyParams, assemble_objects, darkness_map, upsample_patch_maps
from .features import extract_features
from .spec import patch_axis_deg
from .geometry import unit_vector

__all__ = ["TileResult", "detect_tile", "tile_summary_vector"]


@dataclass
class TileResult:
    """Everything the model says about one tile.

    Attributes
    ----------
    tile_id : str
    shape : tuple of int
        (rows, cols) of the tile, px.
    detections : DataFrame
        Fan and spot objects (columns of :data:`detector.assemble.OBJECT_COLUMNS`), tile px.
    grid : PatchGrid
    proba : ndarray of shape (n_patches, 3)
        Calibrated probabilities of none, fan and spot per patch (0, 1, 0 ... for
        invalid patches: they are not scored and count as none).
    polarity : ndarray of shape (n_patches,)
        Probability that the patch's fan runs along +axis.
    axis_deg : ndarray of shape (n_patches,)
        Structure-tensor axis per patch, degrees clockwise from up, mod 180.
    fan_cover, spot_cover : ndarray of shape (M, N), bool
        Pixels of the detected fans and spots.
    valid_fraction : float
        Share of pixels that are not no-data.
    summary : ndarray of shape (n_features,)
        Mean feature vector over valid patches (for the unfamiliarity score).
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

    @property
    def p_deposit(self):
        """Tile-level deposit probability: the largest patch probability of fan or spot."""
        valid = self.grid.valid
        if not valid.any():
            return 0.0
        return float(np.max(1.0 - self.proba[valid, 0]))

    @property
    def fan_cover_fraction(self):
        return float(self.fan_cover.mean())

    @property
    def spot_cover_fraction(self):
        return float((self.spot_cover & ~self.fan_cover).mean())


def tile_summary_vector(X, valid):
    """Mean feature vector over valid patches; zeros when no patch is valid."""
    if not valid.any():
        return np.zeros(X.shape[1], dtype=np.float32)
    return X[valid].mean(axis=0).astype(np.float32)


def _as_unit_float(tile):
    tile = np.asarray(tile)
    if tile.dtype == np.uint8:
        return tile.astype(np.float32) / 255.0
    if tile.dtype == np.uint16:
        return tile.astype(np.float32) / 65535.0
    return tile.astype(np.float32)


def detect_tile(model, tile, *, tile_id="", nodata_mask=None, min_score=None, features=None):
    """Screen one tile with a loaded model.

    Parameters
    ----------
    model : detector.model.Model
    tile : ndarray of shape (M, N)
        uint8, uint16 or float in [0, 1].
    tile_id : str, default=""
    nodata_mask : ndarray of shape (M, N), bool, optional
        True where there is no data; default: pixels equal to the spec's nodata value.
    min_score : float, optional
        Smallest object score kept; default: the model card's.
    features : tuple (X, grid), optional
        Precomputed features of this tile with the model's spec (training reuses them).

    Returns
    -------
    result : TileResult
    """
    spec = model.feature_spec
    if nodata_mask is None:
        nodata_mask = np.asarray(tile) == spec.nodata_value
    if features is None:
        X, grid = extract_features(tile, spec, nodata_mask=nodata_mask)
    else:
        X, grid = features
    valid_patch = np.asarray(grid.valid, dtype=bool)
    proba = np.zeros((len(X), 3), dtype=np.float32)
    proba[:, 0] = 1.0
    polarity = np.full(len(X), 0.5, dtype=np.float32)
    if valid_patch.any():
        proba[valid_patch] = model.predict_patches(X[valid_patch])
        polarity[valid_patch] = model.predict_polarity(X[valid_patch])
    axis = patch_axis_deg(X, spec)
    d_col, d_row = unit_vector(axis)
    signed = (2.0 * polarity - 1.0) * proba[:, 1]
    shape = np.asarray(tile).shape
    class_maps = upsample_patch_maps(proba, grid, shape)
    polarity_maps = upsample_patch_maps(np.column_stack([signed * d_col, signed * d_row]), grid, shape)
    valid = ~np.asarray(nodata_mask, dtype=bool)
    dark = darkness_map(_as_unit_float(tile), valid)
    params = AssemblyParams.from_dict(model.assembly)
    if min_score is not None:
        params = AssemblyParams.from_dict({**model.assembly, "min_score": float(min_score)})
    detections, pixels = assemble_objects(dark, valid, class_maps, polarity_maps, params=params, tile_id=tile_id)
    fan_cover = np.zeros(shape, dtype=bool)
    spot_cover = np.zeros(shape, dtype=bool)
    for kind, (ys, xs) in zip(detections["kind"], pixels):
        (fan_cover if kind == "fan" else spot_cover)[ys, xs] = True
    return TileResult(
        tile_id=tile_id,
        shape=shape,
        detections=detections,
        grid=grid,
        proba=proba,
        polarity=polarity,
        axis_deg=axis,
        fan_cover=fan_cover,
        spot_cover=spot_cover,
        valid_fraction=float(valid.mean()),
        summary=tile_summary_vector(X, valid_patch),
    )
