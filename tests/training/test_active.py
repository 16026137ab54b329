"""Where the next volunteer hour goes: patch uncertainty, the greedy order, and the ranked-vs-random study."""

import json

import numpy as np
import pandas as pd
import pytest
from scipy.stats import entropy

from training.effort.active import greedy_order, labelling_order_study, tile_uncertainty, tiles_to_reach


def test_tile_uncertainty_is_scipy_entropy_normalised():
    rng = np.random.default_rng(0)
    proba = rng.dirichlet([1.0, 1.0, 1.0], size=50)
    valid = rng.random(50) < 0.7
    # Reference: scipy.stats.entropy per patch (natural log), divided by log 3, averaged over valid patches.
    expected = np.mean([entropy(p) for p in proba[valid]]) / np.log(3)
    assert tile_uncertainty(proba, valid) == pytest.approx(expected)
    # Certain patches have no entropy; uniform ones the most (1 after normalising).
    assert tile_uncertainty(np.array([[1.0, 0.0, 0.0]]), [True]) == 0.0
    assert tile_uncertainty(np.full((4, 3), 1 / 3), [True] * 4) == pytest.approx(1.0)
    assert tile_uncertainty(proba, np.zeros(50, bool)) == 0.0


def test_greedy_order_trades_uncertainty_for_diversity():
    # Tiles 0 and 1 are twins (same place) and the most uncertain; tile 2 is far away and a little less
    # uncertain; tile 3 sits next to the twins. Uncertainty alone would label 0, 1, 2, 3; with diversity
    # the second pick is the far tile 2, since a twin of tile 0 teaches nothing new (diversity 0).
    u = np.array([0.9, 0.89, 0.6, 0.5])
    vectors = np.array([[0.0, 0.0], [0.0, 0.0], [10.0, 0.0], [0.5, 0.0]])
    order, gain = greedy_order(u, vectors)
    assert order.tolist()[:2] == [0, 2]
    assert gain[0] == pytest.approx(0.9)
    assert sorted(order.tolist()) == [0, 1, 2, 3]
    # Hand value of tile 3's pick: the pairwise distances 0, 0.5, 0.5, 9.5, 10, 10 have the median 5.0;
    # tile 3 lies 0.5 from tile 0: diversity 0.5 / 5.0, gain 0.5 * 0.1 = 0.05.
    pick3 = order.tolist().index(3)
    assert gain[pick3] == pytest.approx(0.05)


def test_tiles_to_reach_interpolates():
    # 0.40 at 0 tiles, 0.50 at 6, 0.56 at 12: 0.53 is reached halfway between 6 and 12, at 9 tiles.
    assert tiles_to_reach([0, 6, 12], [0.40, 0.50, 0.56], 0.53) == pytest.approx(9.0)
    assert tiles_to_reach([0, 6, 12], [0.40, 0.50, 0.56], 0.30) == 0.0
    assert tiles_to_reach([0, 6, 12], [0.40, 0.50, 0.56], 0.60) is None


def test_order_study_orchestration(tmp_path, monkeypatch):
    """Batches, both orders, shared start and the tiles saved, with training replaced by a known response."""
    import training.effort.active as active
    import training.fitting.train as train_module
    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "tiles", n_images=8, tiles_per_image=1, seed=4, tile_shape=(64, 96),
                              image_prefix="ORD")
    tiles = pd.read_csv(root / "tiles.csv")
    # A fake "ranking": the pool in reverse id order; a tile is worth 0.02 F1 if its id ends in an odd
    # digit, else 0. Training is replaced by that sum, so the ranked order (odd first) must win.
    value = {t: (0.02 if int(t.split("_")[1]) % 2 else 0.0) for t in tiles["tile_id"]}

    def fake_rank(model_dir, tileset_root, tile_ids, log=print):
        ordered = sorted(tile_ids, key=lambda t: -value[t])
        return pd.DataFrame({"rank": range(1, len(ordered) + 1), "tile_id": ordered, "uncertainty": 0.5,
                             "gain": 0.5, "p_deposit": 0.9, "n_detections": 1})

    calls = []

    def fake_train(subset, out, config, *, force, log):
        used = pd.read_csv(subset / "tiles.csv")
        fit = used[~used["image_id"].isin(config.holdout_images)]["tile_id"]
        calls.append((set(fit), config))
        f1 = 0.4 + sum(value[t] for t in fit)
        return {"heldout_metrics": {"fan_f1": f1, "spot_f1": f1, "fan_direction_median_deg": 12.0}}

    monkeypatch.setattr(active, "rank_tiles", fake_rank)
    monkeypatch.setattr(train_module, "train_model", fake_train)
    study = labelling_order_study("unused", root, tmp_path / "out", base_images=2, holdout_images=2, batch=1,
                                  n_batches=2, seed=0, log=lambda *_: None)
    # Start shared by both orders (trained once), then 1 and 2 pool tiles per order: 5 trainings.
    assert len(calls) == 5
    assert all(c[1].rotations == (0,) and c[1].max_patches == 20000 for c in calls)
    held = set(study["images"]["holdout"])
    assert all(not any(t.rsplit("_", 1)[0] in held for t in c[0]) for c in calls)
    ranked = [p["fan_f1"] for p in study["curves"]["ranked"]]
    assert ranked[0] == study["curves"]["random"][0]["fan_f1"]
    assert ranked == sorted(ranked)
    saved = study["saved"]["fan_f1"]
    assert saved["ranked_tiles"] <= saved["random_tiles"]
    assert json.loads((tmp_path / "out" / "labelling_order.json").read_text())["sizes"] == [0, 1, 2]
    assert (tmp_path / "out" / "labelling_order.png").stat().st_size > 1000


def test_tiles_needed_interval_recovers_an_exact_curve():
    from training.effort.active import tiles_needed_interval

    # F1 = 1 - (2 n^-0.5 + 0.05): F1 0.8 needs 2 n^-0.5 = 0.15, n = (2 / 0.15)^2 = 177.8 tiles.
    n = np.array([9, 15, 21, 27, 40])
    f1 = 1 - (2 * n**-0.5 + 0.05)
    result = tiles_needed_interval(n, f1, 0.8, n_boot=50)
    assert result["tiles"] == pytest.approx(177.8, rel=1e-2)
    # Exact points leave no residuals: every refit gives the same answer.
    assert result["interval_90"] == pytest.approx([result["tiles"]] * 2, rel=1e-2)
    assert "1 - F1 = a * n^-b + c" in result["law"]
    # A curve that levels off at F1 0.6 never reaches 0.8.
    flat = tiles_needed_interval(n, 1 - (2 * n**-0.5 + 0.4), 0.8, n_boot=20)
    assert flat["tiles"] == np.inf and flat["share_reaching"] == 0.0


@pytest.mark.parametrize(("batch", "n_batches", "named"), [(0, 3, "batch 0"), (2, 0, "batches 0"), (1.5, 3, "batch 1.5")])
def test_order_study_refuses_empty_batches_before_reading(tmp_path, batch, n_batches, named):
    from detector.errors import DetectorError

    # The tile set does not exist: the counts are checked first, so nothing is read or trained.
    with pytest.raises(DetectorError, match=rf"^{named} must be a whole number >= 1"):
        labelling_order_study(tmp_path / "model", tmp_path / "none", tmp_path / "out", batch=batch, n_batches=n_batches)
    assert not (tmp_path / "out").exists()
