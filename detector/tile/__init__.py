"""One tile's patch features: the feature spec, the patch grid and the dense maps pooled per patch.

``features`` prepares a tile and computes each dense map once (``_dense``), summing it per cell in
compiled loops (``_kernels``); ``spec`` names every feature and fixes their order.
"""

from .features import PatchGrid, PatchTargets, extract_features, flip_polarity, patch_grid, patch_targets
from .spec import FEATURE_VERSION, FeatureSpec, decode_axis_deg, patch_axis_deg

__all__ = [
    "FEATURE_VERSION",
    "FeatureSpec",
    "PatchGrid",
    "PatchTargets",
    "decode_axis_deg",
    "extract_features",
    "flip_polarity",
    "patch_axis_deg",
    "patch_grid",
    "patch_targets",
]
