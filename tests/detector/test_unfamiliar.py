"""The unfamiliarity threshold: a stated share of in-distribution held-out tiles pass, real textures do not."""

import json
import math
from pathlib import Path

import numpy as np
import pytest
import skimage.data

from detector.unfamiliar import DEFAULT_PASS_SHARE, pass_threshold, unfamiliarity_score

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
    from training.train import fit_unfamiliarity

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
    from detector.detect import detect_tile
    from detector.model import load_model

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
    from detector.detect import detect_tile
    from detector.model import load_model
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
