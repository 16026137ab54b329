"""Running a model: the model card and its ONNX sessions, one tile through the pipeline, unfamiliarity.

``detect.detect_tile`` is the top of the per-tile pipeline: features (:mod:`detector.tile`), the patch
and orientation models, candidates and readings (:mod:`detector.objects`), the object model.
"""

from .card import check_card
from .detect import TileMaps, TileResult, detect_tile, fan_direction_weights, tile_direction_stats, tile_maps
from .model import CLASS_NAMES, MODEL_CARD, ONNX_FILES, Model, cached_model, load_model, sha256_file
from .unfamiliar import (
    DEFAULT_PASS_SHARE,
    FEATURE_GROUPS,
    SHARE_COLUMNS,
    pass_threshold,
    unfamiliarity_parts,
    unfamiliarity_score,
)

__all__ = [
    "CLASS_NAMES",
    "DEFAULT_PASS_SHARE",
    "FEATURE_GROUPS",
    "MODEL_CARD",
    "Model",
    "ONNX_FILES",
    "SHARE_COLUMNS",
    "TileMaps",
    "TileResult",
    "cached_model",
    "check_card",
    "detect_tile",
    "fan_direction_weights",
    "load_model",
    "pass_threshold",
    "sha256_file",
    "tile_direction_stats",
    "tile_maps",
    "unfamiliarity_parts",
    "unfamiliarity_score",
]
