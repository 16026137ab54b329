"""One tile's patch features: the feature spec, the patch grid and the dense maps pooled per patch.

``features`` prepares a tile and computes each dense map once (``_dense``), summing it per cell in
compiled loops (``_kernels``); ``spec`` names every feature and fixes their order; ``noise`` measures
a tile's noise and smooths a tile noisier than the model's fitting tiles.
"""

from .features import PatchGrid, PatchTargets, extract_features, flip_polarity, patch_grid, patch_targets
from .noise import NoiseRange, noise_sigma, smooth_excess_noise
from .spec import FEATURE_VERSION, FeatureSpec, decode_axis_deg, patch_axis_deg

__all__ = [
    "FEATURE_VERSION",
    "FeatureSpec",
    "NoiseRange",
    "PatchGrid",
    "PatchTargets",
    "decode_axis_deg",
    "extract_features",
    "flip_polarity",
    "noise_sigma",
    "patch_axis_deg",
    "patch_grid",
    "patch_targets",
    "smooth_excess_noise",
]
