"""The unfamiliarity threshold: a stated share of in-distribution held-out tiles pass, real textures do not."""

import json
import math
from pathlib import Path

import numpy as np
import pytest
import skimage.data

from detector.inference.unfamiliar import (
    DEFAULT_PASS_SHARE,
    SHARE_COLUMNS,
    UNFAMILIARITY_GROUPS,
    feature_group_index,
    pass_threshold,
    unfamiliarity_contributions,
    unfamiliarity_distance,
    unfamiliarity_parts,
    unfamiliarity_score,
)

MODEL_DIR = Path(__file__).resolve().parents[2] / "models" / "demo"


def _naive_pass_threshold(values, share):
    """Oracle: the ceil(share * n)-th smallest value (the empirical quantile's inverse)."""
    ordered = sorted(v for v in values if not math.isnan(v))
    return ordered[math.ceil(share * len(ordered)) - 1]


@pytest.mark.parametrize("share,expected", [(0.95, 1.0), (0.9, 0.9), (0.8, 0.8), (0.5, 0.5), (0.05, 0.1)])
def test_pass_threshold_by_hand(share, expected):
    # Ten values 0.1 ... 1.0: 95 % of 10 is 9.5 tiles, so all 10 must pass (1.0); 90 % -> 9th (0.9).
    values = np.round(np.arange(1, 11) / 10, 1)
    assert pass_threshold(values, share) == pytest.approx(expected)
    assert np.mean(values <= pass_threshold(values, share)) >= share


def test_pass_threshold_matches_oracle_and_ignores_nan():
    rng = np.random.default_rng(2)
    for _ in range(30):
        values = rng.gamma(2.0, 1.0, int(rng.integers(1, 60)))
        values[rng.random(len(values)) < 0.1] = np.nan
        share = float(rng.choice([0.5, 0.9, 0.95, 0.99, 1.0]))
        if np.isfinite(values).any():
            assert pass_threshold(values, share) == _naive_pass_threshold(values.tolist(), share)
    assert math.isnan(pass_threshold([np.nan, np.nan]))
    with pytest.raises(ValueError, match="pass_share"):
        pass_threshold([1.0], 0.0)


def test_stated_pass_rate_holds_on_new_in_distribution_tiles():
    """Fit the statistics, set the threshold on held-out tiles, check the rate on fresh tiles of the same kind."""
    from training.fitting.train import fit_unfamiliarity

    rng = np.random.default_rng(7)
    cov = np.diag(np.linspace(3.0, 0.2, 12))
    train, held, fresh = (rng.multivariate_normal(np.zeros(12), cov, size=n) for n in (300, 400, 4000))
    stats = fit_unfamiliarity(train)
    cut = pass_threshold(unfamiliarity_score(stats, held), DEFAULT_PASS_SHARE)
    rate = float(np.mean(unfamiliarity_score(stats, fresh) <= cut))
    # A quantile of 400 tiles moves by about sqrt(0.95 * 0.05 / 400) = 1.1 points; 3 points is ~3 sigma.
    assert abs(rate - DEFAULT_PASS_SHARE) < 0.03
    # Tiles from a shifted distribution (scaled by 2) mostly fail.
    shifted = rng.multivariate_normal(np.zeros(12), 4.0 * cov, size=1000)
    assert np.mean(unfamiliarity_score(stats, shifted) > cut) > 0.5


def test_shipped_model_held_out_tiles_pass_at_the_stated_share():
    card = json.loads((MODEL_DIR / "model.json").read_text())
    scores = np.array([t["unfamiliarity"] for t in card["heldout_tiles"]], dtype=float)
    cut = pass_threshold(scores, DEFAULT_PASS_SHARE)
    passed = int(np.sum(scores <= cut))
    assert passed == math.ceil(DEFAULT_PASS_SHARE * len(scores))


@pytest.mark.parametrize("name", ["brick", "grass", "gravel", "moon"])
def test_real_deposit_free_textures_are_flagged(name):
    # scikit-image's sample textures (an outside dataset with no frost deposits) lie beyond the cut
    # that 95 % of the shipped model's held-out tiles pass.
    from detector.inference.detect import detect_tile
    from detector.inference.model import load_model

    model = load_model(MODEL_DIR)
    scores = [t["unfamiliarity"] for t in model.card["heldout_tiles"]]
    cut = pass_threshold(scores, DEFAULT_PASS_SHARE)
    tile = np.maximum(getattr(skimage.data, name)(), 1).astype(np.uint8)
    result = detect_tile(model, tile)
    assert unfamiliarity_score(model.card["unfamiliarity"], result.summary[None, :])[0] > cut


@pytest.mark.slow
def test_shifted_scenes_are_mostly_flagged(tmp_path):
    # Scenes rendered outside the training settings (blur, noise, faint deposits) are flagged far more
    # often than the 5 % of in-distribution tiles: under a 5 % rate, 2 or more of 6 has probability
    # 1 - binom.cdf(1, 6, 0.05) = 0.033 (scipy.stats).
    from detector.inference.detect import detect_tile
    from detector.inference.model import load_model
    from detector.tileset import load_tileset
    from training.synth import synthesize_tileset

    model = load_model(MODEL_DIR)
    cut = pass_threshold([t["unfamiliarity"] for t in model.card["heldout_tiles"]], DEFAULT_PASS_SHARE)
    root = synthesize_tileset(tmp_path / "shifted", n_images=3, tiles_per_image=2, seed=5, settings="shifted",
                              image_prefix="SHF")
    tileset = load_tileset(root)
    flagged = [unfamiliarity_score(model.card["unfamiliarity"],
                                   detect_tile(model, tileset.read_tile(t)).summary[None, :])[0] > cut
               for t in tileset.tiles["tile_id"]]
    from scipy.stats import binom

    assert sum(flagged) >= 2
    assert 1.0 - binom.cdf(sum(flagged) - 1, len(flagged), 1.0 - DEFAULT_PASS_SHARE) < 0.05


# --------------------------------------------------------------------------- which feature groups


def _hand_stats():
    """Four features, two principal components along the first two axes (variances 1 and 4), residual scale 2."""
    return {"mean": [0.0] * 4, "scale": [1.0] * 4, "components": [[1.0, 0, 0, 0], [0, 1.0, 0, 0]],
            "variances": [1.0, 4.0], "resid_scale": 2.0, "threshold": 1.0}


HAND_NAMES = ["int_mean", "hog_b0_c0_o0", "glcm_contrast_d1_a0", "st_coherence_w64"]


def test_group_shares_by_hand():
    # z = (2, 2, 1, 0). Mahalanobis part over k = 2 components: (2^2 / 1 + 2^2 / 4) / 2 = 2.5, of which
    # int_mean 2.0 and hog 0.5; residual part (1^2 + 0^2) / 2 = 0.5, all glcm. Squared distance 3:
    # intensity 2/3, gradients 1/6, co-occurrence 1/6, the rest 0.
    z = np.array([[2.0, 2.0, 1.0, 0.0]])
    assert unfamiliarity_contributions(_hand_stats(), z)[0] == pytest.approx([2.0, 0.5, 0.5, 0.0])
    shares = dict(zip(UNFAMILIARITY_GROUPS, unfamiliarity_parts(_hand_stats(), z, HAND_NAMES)[0]))
    assert shares == pytest.approx({"intensity": 2 / 3, "gradients": 1 / 6, "cooccurrence": 1 / 6,
                                    "local_patterns": 0.0, "structure": 0.0, "polarity": 0.0, "other": 0.0})
    # The score is sqrt(3); without the intensity part it would be sqrt(3 * (1 - 2/3)) = 1.
    assert unfamiliarity_score(_hand_stats(), z)[0] == pytest.approx(np.sqrt(3.0))
    # A tile at the training mean has no distance to share; a model without statistics shares nothing.
    assert np.isnan(unfamiliarity_parts(_hand_stats(), np.zeros((1, 4)), HAND_NAMES)).all()
    assert np.isnan(unfamiliarity_parts(None, z, HAND_NAMES)).all()
    with pytest.raises(ValueError, match="feature names"):
        unfamiliarity_parts(_hand_stats(), z, HAND_NAMES[:3])


def test_contributions_sum_to_the_squared_distance():
    # Rotated components (fitted on correlated data): the per-feature terms mix features, yet add up
    # exactly to the squared distance computed the usual way (projection and residual).
    from training.fitting.train import fit_unfamiliarity

    rng = np.random.default_rng(3)
    mix = rng.normal(size=(10, 10))
    stats = fit_unfamiliarity(rng.normal(size=(200, 10)) @ mix, n_components=4)
    tiles = 1.5 * rng.normal(size=(50, 10)) @ mix
    terms = unfamiliarity_contributions(stats, tiles)
    assert (terms >= 0).all()
    np.testing.assert_allclose(terms.sum(axis=1), unfamiliarity_distance(stats, tiles) ** 2, rtol=1e-10)
    names = [f"{p}{i}" for i, p in enumerate(["int_", "hog_", "glcm_", "lbp", "st_", "pol_", "x_"] * 2)][:10]
    np.testing.assert_allclose(unfamiliarity_parts(stats, tiles, names).sum(axis=1), 1.0)


def test_feature_groups_by_prefix():
    names = ["int_mean", "int_dark_ctx4", "hog_b0_c3_o8", "glcm_ASM_d4_a135", "lbp16r2_u17", "lbp8r1_u0",
             "st_energy_w128", "pol_widening", "unknown_feature"]
    groups = [UNFAMILIARITY_GROUPS[g] for g in feature_group_index(names)]
    assert groups == ["intensity", "intensity", "gradients", "cooccurrence", "local_patterns", "local_patterns",
                      "structure", "polarity", "other"]
    assert SHARE_COLUMNS[0] == "unfamiliarity_share_intensity" and len(SHARE_COLUMNS) == len(UNFAMILIARITY_GROUPS)


def test_every_feature_of_the_shipped_model_has_a_named_group():
    # A feature family added later must get its own group here rather than fall into "other".
    names = json.loads((MODEL_DIR / "model.json").read_text())["feature_names"]
    other = UNFAMILIARITY_GROUPS.index("other")
    assert [n for n, g in zip(names, feature_group_index(names)) if g == other] == []
