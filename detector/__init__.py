"""frostvane detector: reads tiles, extracts patch features and runs exported models.

The public API (everything else is private or lives in its module):

- tile sets: :func:`load_tileset`, :class:`TileSet`, :func:`summarize_tileset`, :func:`format_summary`
- labels: :func:`rasterise_features`, :class:`LabelMasks`
- features: :class:`FeatureSpec`, :data:`FEATURE_VERSION`, :func:`extract_features`,
  :func:`patch_grid`, :func:`patch_targets`, :class:`PatchGrid`
- models: :func:`load_model`, :class:`Model`, :func:`detect_tile`, :class:`TileResult`
- screening: :func:`detector.screening.screen` (package ``detector.screening``)
- conventions: :func:`direction_deg`, :func:`unit_vector`, :func:`angular_difference`
- circular statistics: :func:`circular_mean`, :func:`circular_std`, :func:`rayleigh_test`
- errors: :class:`DetectorError`, :class:`TileSetError`, :class:`SpecError`, :class:`ImageError`,
  :class:`ModelError`
"""

from .circstats import circular_mean, circular_std, rayleigh_test
from .inference.detect import TileResult, detect_tile
from .errors import DetectorError, ImageError, ModelError, SpecError, TileSetError
from .tile.features import PatchGrid, extract_features, patch_grid, patch_targets
from .geometry import angular_difference, direction_deg, unit_vector
from .labels import LabelMasks, rasterise_features
from .inference.model import Model, load_model
from .tile.spec import FEATURE_VERSION, FeatureSpec
from .tileset import TileSet, format_summary, load_tileset, summarize_tileset


__all__ = [
    "DetectorError",
    "FEATURE_VERSION",
    "FeatureSpec",
    "ImageError",
    "LabelMasks",
    "Model",
    "ModelError",
    "PatchGrid",
    "SpecError",
    "TileResult",
    "TileSet",
    "TileSetError",
    "angular_difference",
    "circular_mean",
    "circular_std",
    "detect_tile",
    "direction_deg",
    "extract_features",
    "format_summary",
    "load_model",
    "load_tileset",
    "patch_grid",
    "patch_targets",
    "rasterise_features",
    "rayleigh_test",
    "summarize_tileset",
    "unit_vector",
]
