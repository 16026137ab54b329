"""FeatureSpec validation, names, JSON round trip and compatibility errors."""

import json

import numpy as np
import pytest

from detector.errors import SpecError
from detector.tile.spec import (
    FEATURE_VERSION,
    POLARITY_AXIS_FEATURES,
    POLARITY_ODD_FEATURES,
    FeatureSpec,
    decode_axis_deg,
    patch_axis_deg,
)


def test_round_trip_restores_tuples():
    spec = FeatureSpec(glcm_distances=[1, 3], lbp=[[8, 1]], st_scales=[1, 2, 3])
    back = FeatureSpec.from_json(spec.to_json())
    assert back == spec
    assert isinstance(back.lbp[0], tuple) and back.glcm_distances == (1, 3)
    assert back.feature_names == spec.feature_names


def test_names_are_unique_and_descriptive():
    spec = FeatureSpec()
    names = spec.feature_names
    assert len(names) == len(set(names)) == spec.n_features
    for expected in ("hog_b0_c0_o3", "glcm_contrast_d1_a45", "lbp8r1_u3", "int_mean", "st_axis_cos2_w64",
                     "pol_centroid_along", *POLARITY_ODD_FEATURES, *POLARITY_AXIS_FEATURES):
        assert expected in names
    assert sum(n.startswith("hog_") for n in names) == 36  # one 2 x 2 block of 9 bins
    assert sum(n.startswith("glcm_") for n in names) == 6 * 3 * 4


@pytest.mark.parametrize(
    "kwargs, word",
    [
        ({"stride_px": 20}, "stride_px"),
        ({"patch_px": 48}, "patch_px"),
        ({"hog_cell_px": 24}, "hog_cell_px"),
        ({"glcm_levels": 1}, "glcm_levels"),
        ({"signed_hist_bins": 10}, "signed_hist_bins"),
        ({"max_nodata_fraction": 1.5}, "max_nodata_fraction"),
    ],
)
def test_invalid_spec_raises(kwargs, word):
    with pytest.raises(SpecError, match=word):
        FeatureSpec(**kwargs)


def test_from_json_checks_version_first():
    data = json.loads(FeatureSpec().to_json())
    data["version"] = FEATURE_VERSION + 1
    data["patch_px"] = 7  # would be invalid too; the version message must come first
    with pytest.raises(SpecError, match="re-export the model"):
        FeatureSpec.from_json(json.dumps(data))
    with pytest.raises(SpecError, match="not valid JSON"):
        FeatureSpec.from_json("{nope")


def test_from_json_rejects_changed_names():
    data = json.loads(FeatureSpec().to_json())
    data["feature_names"][0] = "hog_old"
    with pytest.raises(SpecError, match="feature names"):
        FeatureSpec.from_json(json.dumps(data))


def test_check_compatible_names_fields_and_names():
    FeatureSpec().check_compatible(FeatureSpec())
    with pytest.raises(SpecError) as err:
        FeatureSpec().check_compatible(FeatureSpec(glcm_distances=(1, 2)))
    text = str(err.value)
    assert "glcm_distances" in text and "glcm_contrast_d4_a0" in text and "re-export" in text


def test_patch_axis_decoding():
    spec = FeatureSpec()
    angles = np.array([0.0, 10.0, 89.0, 90.0, 135.0, 179.5])
    X = np.zeros((angles.size, spec.n_features), np.float32)
    names = spec.feature_names
    X[:, names.index(POLARITY_AXIS_FEATURES[0])] = np.cos(np.radians(2 * angles))
    X[:, names.index(POLARITY_AXIS_FEATURES[1])] = np.sin(np.radians(2 * angles))
    np.testing.assert_allclose(patch_axis_deg(X, spec), angles, atol=1e-4)
    assert decode_axis_deg(-1.0, 0.0) == 90.0
    with pytest.raises(SpecError):
        patch_axis_deg(X[:, :5], spec)
