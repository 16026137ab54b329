"""Feature specification: every parameter of the patch feature engine.

A :class:`FeatureSpec` travels with every trained model (``to_json``) so that
detection computes exactly the features the model was trained on; a model made
with another version of this code is refused by :meth:`FeatureSpec.check_compatible`.
"""

import dataclasses
import json
from dataclasses import dataclass

import numpy as np

from ..errors import SpecError

__all__ = [
    "FEATURE_VERSION",
    "FeatureSpec",
    "POLARITY_ODD_FEATURES",
    "POLARITY_AXIS_FEATURES",
    "SIGNED_HIST_PREFIX",
    "decode_axis_deg",
    "patch_axis_deg",
]

#: Bumped whenever a feature's definition or order changes.
FEATURE_VERSION = 2

#: Polarity features whose value changes sign when the patch axis is flipped by
#: 180 degrees (equivalently, when the patch content is rotated by 180 degrees).
POLARITY_ODD_FEATURES = (
    "pol_centroid_along",
    "pol_skew_along",
    "pol_widening",
    "pol_halves_contrast",
)

#: cos and sin of twice the patch axis (degrees clockwise from image up, mod 180)
#: along which the polarity features are measured; unchanged by a 180 degree flip.
POLARITY_AXIS_FEATURES = ("pol_axis_cos2", "pol_axis_sin2")

#: Prefix of the signed (0-360 degree, image frame) gradient histogram; a 180 degree
#: rotation of the patch rolls these bins by half their number.
SIGNED_HIST_PREFIX = "pol_signed_b"

_GLCM_PROPS = ("contrast", "dissimilarity", "homogeneity", "ASM", "energy", "correlation")
_INT_PERCENTILES = (10, 25, 50, 75, 90)


@dataclass(frozen=True)
class FeatureSpec:
    """All parameters of the patch features.

    Parameters
    ----------
    patch_px, stride_px : int
        Patch window side and step between windows, px; multiples of ``cell_px``
        (``patch_px`` of ``2 * cell_px`` so that context windows align to cells).
    cell_px : int
        Side of the pooling cell, px: dense maps are summed per cell once, then
        cells are pooled into patches.
    hog_orientations, hog_cell_px, hog_block_cells : int
        HOG (Dalal and Triggs 2005): unsigned orientation bins, HOG cell side (px,
        a multiple of ``cell_px`` dividing ``patch_px``) and block side (cells).
    glcm_levels : int
        Grey levels of the quantised tile for the co-occurrence matrices.
    glcm_range_percentiles : (float, float)
        Percentiles of the tile's valid pixels mapped to the lowest and highest
        grey level (robust to outliers and to the tile's dynamic range).
    glcm_distances : tuple of int
        Pixel-pair distances, px.
    glcm_angles_deg : tuple of float
        Pair angles as in ``skimage.feature.graycomatrix`` (degrees, 0 = to the
        right, 90 = down the rows).
    lbp : tuple of (int, int)
        (P, R) pairs of the rotation-invariant uniform local binary patterns.
    int_bins, int_z_range : int, float
        Bins of the per-patch histogram of intensity relative to the tile
        background, spanning ``[-int_z_range, int_z_range]`` robust sigmas.
    context_scales : tuple of int
        Context windows for the mean darkness, in multiples of ``patch_px``.
    st_gradient_sigma : float
        Gaussian pre-smoothing before the Sobel derivatives of the structure
        tensor, px (0 = none).
    st_tensor_sigma : float
        Gaussian smoothing of the derivative products (``sigma`` of
        ``skimage.feature.structure_tensor``), px; 0 leaves the integration to
        the ``st_scales`` windows alone (a box window).
    st_scales : tuple of int
        Integration windows of the structure tensor in multiples of ``patch_px``;
        the largest gives the polarity axis.
    signed_hist_bins : int
        Bins of the signed (0-360 degree) gradient orientation histogram.
    dark_weight_max : float
        Darkness weights ``(background - I) / scale`` are clipped to
        ``[0, dark_weight_max]``.
    min_scale : float
        Floor of the robust background scale (intensity in [0, 1]).
    nodata_value : int or None
        Pixel value meaning "no data" (None: every pixel is data).
    max_nodata_fraction : float
        A patch is valid while its no-data share is at most this.
    version : int
        :data:`FEATURE_VERSION` of the code that made the spec.
    """

    patch_px: int = 64
    stride_px: int = 16
    cell_px: int = 16
    hog_orientations: int = 9
    hog_cell_px: int = 32
    hog_block_cells: int = 2
    glcm_levels: int = 8
    glcm_range_percentiles: tuple = (1.0, 99.0)
    glcm_distances: tuple = (1, 2, 4)
    glcm_angles_deg: tuple = (0.0, 45.0, 90.0, 135.0)
    lbp: tuple = ((8, 1), (16, 2))
    int_bins: int = 32
    int_z_range: float = 8.0
    context_scales: tuple = (2, 4)
    st_gradient_sigma: float = 0.0
    st_tensor_sigma: float = 0.0
    st_scales: tuple = (1, 2)
    signed_hist_bins: int = 12
    dark_weight_max: float = 10.0
    min_scale: float = 1e-3
    nodata_value: object = 0
    max_nodata_fraction: float = 0.5
    version: int = FEATURE_VERSION

    def __post_init__(self):
        def _int(name, low=1):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
                raise SpecError(f"FeatureSpec.{name} = {value!r} must be an integer >= {low}.")

        for name in ("patch_px", "stride_px", "cell_px", "hog_orientations", "hog_cell_px",
                     "hog_block_cells", "int_bins", "signed_hist_bins", "version"):
            _int(name)
        _int("glcm_levels", 2)
        if self.glcm_levels > 256:
            raise SpecError(f"FeatureSpec.glcm_levels = {self.glcm_levels} must be at most 256.")
        for name in ("patch_px", "stride_px"):
            if getattr(self, name) % self.cell_px:
                raise SpecError(
                    f"FeatureSpec.{name} = {getattr(self, name)} must be a multiple of cell_px = {self.cell_px}."
                )
        if self.patch_px % (2 * self.cell_px):
            raise SpecError(
                f"FeatureSpec.patch_px = {self.patch_px} must be a multiple of 2 * cell_px = {2 * self.cell_px}."
            )
        if self.hog_cell_px % self.cell_px or self.patch_px % self.hog_cell_px:
            raise SpecError(
                f"FeatureSpec.hog_cell_px = {self.hog_cell_px} must be a multiple of cell_px = {self.cell_px} "
                f"and divide patch_px = {self.patch_px}."
            )
        if self.hog_block_cells > self.patch_px // self.hog_cell_px:
            raise SpecError(
                f"FeatureSpec.hog_block_cells = {self.hog_block_cells} exceeds the "
                f"{self.patch_px // self.hog_cell_px} HOG cells across a patch."
            )
        object.__setattr__(self, "glcm_distances", tuple(int(d) for d in self.glcm_distances))
        object.__setattr__(self, "glcm_range_percentiles", tuple(float(p) for p in self.glcm_range_percentiles))
        lo, hi = self.glcm_range_percentiles if len(self.glcm_range_percentiles) == 2 else (0, -1)
        if not 0 <= lo < hi <= 100:
            raise SpecError(f"FeatureSpec.glcm_range_percentiles = {self.glcm_range_percentiles} must be 0 <= lo < hi <= 100.")
        object.__setattr__(self, "glcm_angles_deg", tuple(float(a) for a in self.glcm_angles_deg))
        object.__setattr__(self, "lbp", tuple((int(p), int(r)) for p, r in self.lbp))
        object.__setattr__(self, "context_scales", tuple(int(s) for s in self.context_scales))
        object.__setattr__(self, "st_scales", tuple(int(s) for s in self.st_scales))
        if not self.glcm_distances or min(self.glcm_distances) < 1:
            raise SpecError(f"FeatureSpec.glcm_distances = {self.glcm_distances} must be integers >= 1.")
        if not self.glcm_angles_deg:
            raise SpecError("FeatureSpec.glcm_angles_deg must not be empty.")
        for p, r in self.lbp:
            if p < 4 or r < 1:
                raise SpecError(f"FeatureSpec.lbp pair ({p}, {r}) must have P >= 4 and R >= 1.")
        if not self.st_scales or min(self.st_scales) < 1:
            raise SpecError(f"FeatureSpec.st_scales = {self.st_scales} must be integers >= 1.")
        if min(self.context_scales, default=1) < 1:
            raise SpecError(f"FeatureSpec.context_scales = {self.context_scales} must be integers >= 1.")
        if self.signed_hist_bins % 4:
            raise SpecError(f"FeatureSpec.signed_hist_bins = {self.signed_hist_bins} must be a multiple of 4.")
        for name in ("st_gradient_sigma", "st_tensor_sigma"):
            if not np.isfinite(getattr(self, name)) or getattr(self, name) < 0:
                raise SpecError(f"FeatureSpec.{name} = {getattr(self, name)!r} must be finite and >= 0.")
        if not 0.0 <= self.max_nodata_fraction <= 1.0:
            raise SpecError(f"FeatureSpec.max_nodata_fraction = {self.max_nodata_fraction!r} is outside [0, 1].")
        if not (self.int_z_range > 0 and self.dark_weight_max > 0 and self.min_scale > 0):
            raise SpecError("FeatureSpec.int_z_range, dark_weight_max and min_scale must be > 0.")

    # -- names ----------------------------------------------------------------
    @property
    def hog_names(self):
        n = self.patch_px // self.hog_cell_px - self.hog_block_cells + 1
        return tuple(
            f"hog_b{b}_c{c}_o{o}"
            for b in range(n * n)
            for c in range(self.hog_block_cells**2)
            for o in range(self.hog_orientations)
        )

    @property
    def glcm_names(self):
        return tuple(
            f"glcm_{prop}_d{d}_a{a:g}"
            for prop in _GLCM_PROPS
            for d in self.glcm_distances
            for a in self.glcm_angles_deg
        )

    @property
    def lbp_names(self):
        return tuple(f"lbp{p}r{r}_u{k}" for p, r in self.lbp for k in range(p + 2))

    @property
    def intensity_names(self):
        return (
            ("int_mean", "int_std")
            + tuple(f"int_p{q}" for q in _INT_PERCENTILES)
            + ("int_dark",)
            + tuple(f"int_dark_ctx{s}" for s in self.context_scales)
            + ("int_nodata",)
        )

    @property
    def structure_names(self):
        return tuple(
            f"st_{kind}_w{s * self.patch_px}"
            for s in self.st_scales
            for kind in ("axis_cos2", "axis_sin2", "coherence", "energy")
        )

    @property
    def polarity_names(self):
        return (
            tuple(f"{SIGNED_HIST_PREFIX}{k}" for k in range(self.signed_hist_bins))
            + POLARITY_AXIS_FEATURES
            + POLARITY_ODD_FEATURES
            + ("pol_dark_axis_cos2", "pol_dark_axis_sin2", "pol_elongation")
        )

    @property
    def groups(self):
        """Feature groups in column order: ``{group: names}``."""
        return {
            "hog": self.hog_names,
            "glcm": self.glcm_names,
            "lbp": self.lbp_names,
            "intensity": self.intensity_names,
            "structure": self.structure_names,
            "polarity": self.polarity_names,
        }

    @property
    def feature_names(self):
        """Names of the columns of the feature matrix, in order."""
        return tuple(name for names in self.groups.values() for name in names)

    @property
    def n_features(self):
        return len(self.feature_names)

    # -- serialisation ------------------------------------------------------------
    def to_dict(self):
        out = {}
        for field in dataclasses.fields(self):
            value = getattr(self, field.name)
            out[field.name] = [list(v) if isinstance(v, tuple) else v for v in value] if isinstance(value, tuple) else value
        out["feature_names"] = list(self.feature_names)
        return out

    def to_json(self):
        """JSON text of the spec, with its feature names for inspection."""
        return json.dumps(self.to_dict(), indent=2, sort_keys=True)

    @classmethod
    def from_json(cls, text):
        """Spec from :meth:`to_json` text.

        Raises
        ------
        SpecError
            The text is not a spec, or was made by another feature version.
        """
        try:
            data = json.loads(text) if isinstance(text, (str, bytes)) else dict(text)
        except (TypeError, ValueError) as err:
            raise SpecError(f"feature spec is not valid JSON: {err}.") from err
        if not isinstance(data, dict):
            raise SpecError(f"feature spec must be a JSON object, got {type(data).__name__}.")
        version = data.get("version")
        if version != FEATURE_VERSION:
            raise SpecError(
                f"feature spec has version {version!r} but this code computes version {FEATURE_VERSION}; "
                f"re-export the model with this version of the code."
            )
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(data) - known - {"feature_names"})
        if unknown:
            raise SpecError(f"feature spec has unknown fields {unknown}.")
        kwargs = {}
        for name, value in data.items():
            if name == "feature_names":
                continue
            if isinstance(value, list):
                value = tuple(tuple(v) if isinstance(v, list) else v for v in value)
            kwargs[name] = value
        spec = cls(**kwargs)
        names = data.get("feature_names")
        if names is not None and tuple(names) != spec.feature_names:
            raise SpecError(
                "feature spec lists feature names that this code does not produce; "
                "re-export the model with this version of the code."
            )
        return spec

    def check_compatible(self, other):
        """Raise :class:`SpecError` unless ``other`` yields the same features.

        Parameters
        ----------
        other : FeatureSpec
            Typically the spec stored with a model.
        """
        if not isinstance(other, FeatureSpec):
            raise SpecError(f"expected a FeatureSpec, got {type(other).__name__}.")
        fields = [
            f"{f.name} ({getattr(self, f.name)!r} != {getattr(other, f.name)!r})"
            for f in dataclasses.fields(self)
            if getattr(self, f.name) != getattr(other, f.name)
        ]
        mine, theirs = self.feature_names, other.feature_names
        names = []
        if mine != theirs:
            only_mine = [n for n in mine if n not in set(theirs)]
            only_theirs = [n for n in theirs if n not in set(mine)]
            names = [f"names only here {only_mine[:5]}", f"names only in the other spec {only_theirs[:5]}"]
            if not only_mine and not only_theirs:
                names = ["the same names in another order"]
        if fields or names:
            raise SpecError(
                f"feature specs differ: {'; '.join(fields + names)}; "
                f"re-export the model with this version of the code."
            )


def decode_axis_deg(cos2, sin2):
    """Axis in degrees clockwise from image up, in [0, 180), from cos/sin of twice it."""
    return (np.degrees(np.arctan2(sin2, cos2)) / 2.0) % 180.0


def patch_axis_deg(X, spec):
    """Each patch's polarity axis (largest structure-tensor scale) from a feature matrix.

    Parameters
    ----------
    X : ndarray of shape (n_patches, spec.n_features)
    spec : FeatureSpec

    Returns
    -------
    axis_deg : ndarray of shape (n_patches,)
        Degrees clockwise from image up, in [0, 180).
    """
    X = np.asarray(X)
    if X.ndim != 2 or X.shape[1] != spec.n_features:
        raise SpecError(f"feature matrix has shape {X.shape}; expected (n_patches, {spec.n_features}).")
    names = spec.feature_names
    c = X[:, names.index(POLARITY_AXIS_FEATURES[0])].astype(np.float64)
    s = X[:, names.index(POLARITY_AXIS_FEATURES[1])].astype(np.float64)
    return decode_axis_deg(c, s)
