"""Where the next volunteer hour goes: patch uncertainty, the greedy order, and the ranked-vs-random study."""

import json

import numpy as np
import pandas as pd
import pytest
from scipy.stats import entropy

from detector.errors import DetectorError
from training.effort.active import (greedy_order, labelling_order_study, tile_uncertainty, tiles_to_reach,
                                     uncertain_objects)


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


def test_uncertain_objects_add_each_readings_scaled_bernoulli_variance():
    # Hand-worked: 4 s (1 - s) is 1 at s = 0.5, 0.64 at 0.2 and 0.8, 0.36 at 0.9, 0 at 0 and 1.
    assert uncertain_objects([0.5, 0.2, 0.8, 0.9, 0.0, 1.0]) == pytest.approx(1.0 + 0.64 + 0.64 + 0.36)
    assert uncertain_objects([]) == 0.0
    # A tile of many doubtful deposits teaches more than one of a few sure ones, whatever its size.
    assert uncertain_objects([0.45] * 10) > uncertain_objects([0.97] * 30)
    # Reference: 4 x the variance of a Bernoulli variable, scipy.stats.bernoulli(s).var() = s (1 - s).
    from scipy.stats import bernoulli
    s = np.random.default_rng(1).random(40)
    assert uncertain_objects(s) == pytest.approx(4.0 * sum(bernoulli(p).var() for p in s))
    with pytest.raises(DetectorError, match="in \\[0, 1\\]"):
        uncertain_objects([0.3, 1.2])


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


def _fake_study(monkeypatch, value):
    """Replace the model's description and the training by known responses.

    A tile's uncertainty is 0.9 if it is worth ``value`` F1, else 0.1, and all tiles are equally far apart
    (one-hot descriptions: every distance is sqrt 2, the median, so diversity is 1 for every tile not yet
    picked): the ranked order takes the valuable tiles first. A trained model scores 0.4 plus the value
    of its fitting tiles on fan and spot F1.
    """
    import training.effort.active as active
    import training.fitting.train as train_module

    def fake_describe(model_dir, tileset_root, tile_ids):
        ids = list(tile_ids)
        table = pd.DataFrame({"tile_id": ids, "uncertainty": [0.9 if value[t] else 0.1 for t in ids],
                              "p_deposit": 0.9, "n_detections": 1})
        return table, np.eye(len(ids))

    calls = []

    def fake_train(subset, out, config, *, force, log):
        used = pd.read_csv(subset / "tiles.csv")
        fit = used[~used["image_id"].isin(config.holdout_images)]["tile_id"]
        calls.append((set(fit), config))
        f1 = 0.4 + sum(value[t] for t in fit)
        return {"heldout_metrics": {"fan_f1": f1, "spot_f1": f1, "fan_direction_median_deg": 12.0}}

    monkeypatch.setattr(active, "describe_tiles", fake_describe)
    monkeypatch.setattr(train_module, "train_model", fake_train)
    return calls


def _odd_tiles_teach(tmp_path, n_images, prefix):
    """A small invented tile set, and what each tile is worth: 0.02 F1 if its id ends in an odd digit,
    else 0, so the ranked order (odd first) must win."""
    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "tiles", n_images=n_images, tiles_per_image=1, seed=4, tile_shape=(64, 96),
                              image_prefix=prefix)
    tiles = pd.read_csv(root / "tiles.csv")
    return root, {t: (0.02 if int(t.split("_")[1]) % 2 else 0.0) for t in tiles["tile_id"]}


def test_order_study_orchestration(tmp_path, monkeypatch):
    """Batches, both orders, shared start and the tiles saved, with training replaced by a known response."""
    root, value = _odd_tiles_teach(tmp_path, 8, "ORD")
    calls = _fake_study(monkeypatch, value)
    study = labelling_order_study("unused", root, tmp_path / "out", base_images=2, holdout_images=2, batch=1,
                                  n_batches=2, seed=0, repeats=1, n_refits=20, log=lambda *_: None)
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
    # One split: no interval, and the summary says so.
    assert saved["interval_90"] is None and "one split gives no interval" in study["verdict"]
    assert json.loads((tmp_path / "out" / "labelling_order.json").read_text())["sizes"] == [0, 1, 2]
    assert (tmp_path / "out" / "labelling_order.png").stat().st_size > 1000


def test_order_study_repeats_over_seeded_splits(tmp_path, monkeypatch):
    """Each repeat has its own split and seed; the record holds every split and the paired comparison."""
    from training.effort.active import study_summary

    root, value = _odd_tiles_teach(tmp_path, 9, "REP")
    calls = _fake_study(monkeypatch, value)
    study = labelling_order_study("unused", root, tmp_path / "out", base_images=2, holdout_images=2, batch=2,
                                  n_batches=2, seed=5, repeats=3, n_refits=20, log=lambda *_: None)
    assert study["seeds"] == [5, 6, 7]
    assert [run["seed"] for run in study["repeats"]] == [5, 6, 7]
    # Each split trains once per distinct set of fitting tiles (its start, then each order at 2 and 4 pool
    # tiles; where both orders picked the same tiles, once), with that split's seed and held-out images.
    expected = []
    for r in study["repeats"]:
        base = [f"{image}_T00" for image in r["images"]["base"]]
        sets = {frozenset(base + r["order"][name][:k]) for name in ("ranked", "random") for k in (0, 2, 4)}
        expected += [(r["seed"], tuple(sorted(r["images"]["holdout"])))] * len(sets)
    assert [(c[1].seed, c[1].holdout_images) for c in calls] == expected
    assert 9 <= len(calls) <= 15
    assert len({tuple(r["images"]["holdout"]) for r in study["repeats"]}) > 1
    # The ranked order never does worse here, so every split saves tiles or ties, and the mean curve
    # is the mean of the splits' curves.
    fan = np.array([[p["fan_f1"] for p in r["curves"]["ranked"]] for r in study["repeats"]])
    assert [p["fan_f1"] for p in study["curves"]["ranked"]] == pytest.approx(fan.mean(axis=0).tolist())
    saved = study["comparison"]["fan_f1"]["saved"]
    assert saved["n_more"] == 0 and saved["n_saved"] + saved["n_equal"] == 3
    assert len(saved["interval_90"]) == 2
    record = json.loads((tmp_path / "out" / "labelling_order.json").read_text())
    assert record["verdict"] == study["verdict"] and len(record["repeats"]) == 3
    text = study_summary(record)
    assert "over 3 seeded splits (seeds 5 to 7)" in text and "ranked minus random" in text


def test_bootstrap_mean_interval_hand_cases_and_scipy():
    from scipy.stats import bootstrap

    from training.effort.active import bootstrap_mean_interval

    # Two repeats, 1 and 3: a resample's mean is 1 (chance 1/4), 2 (1/2) or 3 (1/4), so the 5th and 95th
    # percentiles of the resampled means are 1 and 3.
    assert bootstrap_mean_interval([1.0, 3.0]) == pytest.approx((1.0, 3.0))
    # Equal repeats leave no spread; one repeat gives no interval.
    assert bootstrap_mean_interval([2.5, 2.5, 2.5]) == pytest.approx((2.5, 2.5))
    assert bootstrap_mean_interval([0.4]) is None
    # Elementwise over columns: the second column is the first plus 1.
    lo, hi = bootstrap_mean_interval(np.array([[1.0, 2.0], [3.0, 4.0]]))
    assert lo.tolist() == pytest.approx([1.0, 2.0]) and hi.tolist() == pytest.approx([3.0, 4.0])
    # Reference: scipy.stats.bootstrap, percentile method, 90 % (Efron and Tibshirani, An Introduction to
    # the Bootstrap, 1993, ch. 13); the two use different resamples, so they agree to Monte Carlo error.
    x = np.random.default_rng(3).normal(0.5, 0.1, size=12)
    ref = bootstrap((x,), np.mean, confidence_level=0.9, method="percentile", n_resamples=20000,
                    random_state=np.random.default_rng(1)).confidence_interval
    ours = bootstrap_mean_interval(x, n_boot=20000)
    assert ours == pytest.approx((ref.low, ref.high), abs=0.004)


def test_tiles_saved_hand_cases():
    from training.effort.active import tiles_saved

    sizes = [0, 6, 12]
    # Split 1: the ranked order ends higher, so the target is random's final 0.56 (reached at 12 tiles);
    # ranked reaches it halfway from 0.52 at 6 to 0.60 at 12, at 9 tiles: 3 saved. Split 2: ranked ends
    # lower, at 0.50, the target; random reaches 0.50 at 6 tiles, ranked at 12: 6 more. Split 3: random
    # 0.40, 0.58, 0.50 ends lower; it reaches 0.50 at 6 * 0.10 / 0.18 = 3.33 tiles, ranked 0.40, 0.45,
    # 0.55 at 6 + 6 * 0.05 / 0.10 = 9: 5.67 more.
    ranked = [[0.40, 0.52, 0.60], [0.40, 0.45, 0.50], [0.40, 0.45, 0.55]]
    random = [[0.40, 0.50, 0.56], [0.40, 0.50, 0.56], [0.40, 0.58, 0.50]]
    s = tiles_saved(sizes, ranked, random)
    assert s["target"] == pytest.approx([0.56, 0.50, 0.50])
    assert s["random_tiles"] == pytest.approx([12.0, 6.0, 10 / 3])
    assert s["ranked_tiles"] == pytest.approx([9.0, 12.0, 9.0])
    assert s["saved"] == pytest.approx([3.0, -6.0, 10 / 3 - 9.0])
    # Both orders end below where they started: both reach the target at once, nothing saved.
    assert tiles_saved(sizes, [[0.5, 0.4, 0.45]], [[0.5, 0.45, 0.4]])["saved"] == [0.0]


def test_compare_orders_hand_case():
    from training.effort.active import compare_orders

    sizes = [0, 6, 12]
    ranked = np.array([[0.40, 0.52, 0.60], [0.30, 0.50, 0.60], [0.50, 0.55, 0.62]])
    random = np.array([[0.40, 0.50, 0.56], [0.30, 0.46, 0.52], [0.50, 0.53, 0.58]])
    c = compare_orders(sizes, ranked, random)
    assert c["repeats"] == 3
    assert c["curves"]["ranked"]["mean"] == pytest.approx([0.40, 0.5233333, 0.6066667])
    assert c["curves"]["random"]["mean"] == pytest.approx([0.40, 0.4966667, 0.5533333])
    # Paired differences: 0 at the start, then 0.02 / 0.04 / 0.02 and 0.04 / 0.08 / 0.04.
    assert c["difference"]["mean"] == pytest.approx([0.0, 0.08 / 3, 0.16 / 3])
    # Area per split: the mean difference over the two batches: 0.03, 0.06, 0.03.
    assert c["area"]["per_repeat"] == pytest.approx([0.03, 0.06, 0.03])
    assert c["area"]["mean"] == pytest.approx(0.04)
    # A resample of three splits is all 0.03 with chance (2/3)^3 = 0.30 > 0.05: the lower end is 0.03; the
    # upper end lies between the mean and the largest split.
    lo, hi = c["area"]["interval_90"]
    assert lo == pytest.approx(0.03) and 0.04 <= hi <= 0.06
    # Tiles saved: split 1, ranked reaches 0.56 at 6 + 6 * 0.04 / 0.08 = 9 (random at 12): 3. Split 2, ranked
    # reaches 0.52 at 6 + 6 * 0.02 / 0.10 = 7.2: 4.8. Split 3, ranked reaches 0.58 at 6 + 6 * 0.03 / 0.07
    # = 8.571: 3.429.
    assert c["saved"]["saved"] == pytest.approx([3.0, 4.8, 12 - (6 + 18 / 7)])
    assert c["saved"]["mean"] == pytest.approx((3.0 + 4.8 + 12 - 6 - 18 / 7) / 3)
    assert c["saved"]["n_saved"] == 3 and c["saved"]["n_equal"] == 0 and c["saved"]["n_more"] == 0
    lo, hi = c["saved"]["interval_90"]
    assert 3.0 - 1e-9 <= lo < c["saved"]["mean"] < hi <= 4.8 + 1e-9


def test_saving_words_state_the_verdict():
    from training.effort.active import saving_words

    def saved(values, interval):
        v = np.asarray(values, dtype=float)
        return {"saved": list(v), "mean": float(v.mean()), "interval_90": interval, "n_saved": int(np.sum(v > 0)),
                "n_equal": int(np.sum(v == 0)), "n_more": int(np.sum(v < 0))}

    text = saving_words(saved([3.0, 4.8, 3.4], [3.0, 4.5]))
    assert text.startswith("fan F1: the ranked order saved 3.7 tiles (90 % interval 3.0 to 4.5) over 3 splits")
    assert "fewer tiles in 3 of 3" in text
    text = saving_words(saved([2.0, -1.0, 0.0, 1.0], [-0.5, 1.5]))
    assert text.startswith("fan F1: no saving shown") and "interval -0.5 to 1.5" in text
    assert "fewer tiles in 2 of 4, as many in 1, more in 1" in text
    text = saving_words(saved([-2.0, 1.0, -1.0], [-2.0, 0.5]))
    assert text.startswith("fan F1: no saving shown: the ranked order needed 0.7 tiles more on average")
    assert "needed 2.0 tiles more" in saving_words(saved([-2.0, -2.0], [-2.0, -2.0]))
    assert "one split gives no interval" in saving_words(saved([1.5], None))


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


@pytest.mark.parametrize(("batch", "n_batches", "repeats", "named"),
                         [(0, 3, 1, "batch 0"), (2, 0, 1, "batches 0"), (1.5, 3, 1, "batch 1.5"),
                          (2, 3, 0, "repeats 0"), (2, 3, True, "repeats True")])
def test_order_study_refuses_empty_batches_before_reading(tmp_path, batch, n_batches, repeats, named):
    from detector.errors import DetectorError

    # The tile set does not exist: the counts are checked first, so nothing is read or trained.
    with pytest.raises(DetectorError, match=rf"^{named} must be a whole number >= 1"):
        labelling_order_study(tmp_path / "model", tmp_path / "none", tmp_path / "out", batch=batch,
                              n_batches=n_batches, repeats=repeats)
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("value", ["0", "-2", "three"])
def test_cli_refuses_bad_repeats(tmp_path, capsys, value):
    from frostvane.cli import main

    # argparse checks the option before anything is read: one error line naming the value, exit 2.
    with pytest.raises(SystemExit) as info:
        main(["labelling-order", str(tmp_path / "model"), str(tmp_path / "set"), "--out", str(tmp_path / "o"),
              "--repeats", value])
    err = capsys.readouterr().err
    assert info.value.code == 2
    assert f"error: argument --repeats: repeats {value!r} must be a whole number >= 1" in err
    assert not (tmp_path / "o").exists()


def test_order_study_refuses_a_split_with_too_small_a_pool(tmp_path, monkeypatch):
    from detector.errors import DetectorError
    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "tiles", n_images=6, tiles_per_image=1, seed=4, tile_shape=(64, 96),
                              image_prefix="POOL")
    calls = _fake_study(monkeypatch, {t: 0.0 for t in pd.read_csv(root / "tiles.csv")["tile_id"]})
    # 6 images, 2 + 2 outside the pool: 2 pool tiles, and 2 batches of 2 need 4; nothing is trained.
    with pytest.raises(DetectorError, match=r"the pool of split 1 \(seed 0\) holds 2 tiles; 2 batches of 2 need 4"):
        labelling_order_study("unused", root, tmp_path / "out", base_images=2, holdout_images=2, batch=2,
                              n_batches=2, repeats=2, log=lambda *_: None)
    assert calls == [] and not (tmp_path / "out").exists()


def test_describe_tiles_counts_the_uncertain_objects_of_nearly_every_reading(tiny_model, tiny_tileset):
    # The description reads each tile once at READING_FLOOR: its uncertainty is the uncertain objects of
    # those readings, its detections those at the model's own threshold (what screening reports).
    from detector.inference.detect import detect_tile
    from detector.inference.model import load_model
    from detector.tileset import load_tileset
    from training.effort.active import READING_FLOOR, describe_tiles

    model_dir, _ = tiny_model
    tileset = load_tileset(tiny_tileset)
    ids = list(tileset.tiles["tile_id"][:2])
    table, vectors = describe_tiles(model_dir, tiny_tileset, ids)
    model = load_model(model_dir)
    for row in table.itertuples():
        tile = tileset.read_tile(row.tile_id)
        every = detect_tile(model, tile, tile_id=row.tile_id, min_score=READING_FLOOR).detections
        kept = detect_tile(model, tile, tile_id=row.tile_id).detections
        assert row.uncertainty == pytest.approx(uncertain_objects(every["score"]))
        assert row.n_detections == len(kept)
        assert 0.0 <= row.patch_uncertainty <= 1.0
    assert vectors.shape[0] == len(ids)
