import json

import numpy as np
import pandas as pd
from scipy.stats import circmean
import pytest
from scipy.spatial import distance
from sklearn import metrics

from detector.errors import DetectorError
from training.evaluation import bootstrap, directions, matching, scoring
from tests.training._boxes import box_rasteriser


def _fan(tile, x, y, d, length=40.0, **extra):
    return dict(tile_id=tile, kind="fan", x_px=x, y_px=y, direction_deg=d, length_px=length, opening_deg=20.0,
                semi_major_px=np.nan, semi_minor_px=np.nan, votes=5, **extra)


def _spot(tile, x, y, a=0.0, semi=6.0, **extra):
    return dict(tile_id=tile, kind="spot", x_px=x, y_px=y, direction_deg=a, length_px=np.nan, opening_deg=np.nan,
                semi_major_px=semi, semi_minor_px=semi * 0.7, votes=5, **extra)


def _pairs_as_set(pairs):
    return set(zip(pairs["det_index"], pairs["cons_index"]))


def test_two_fans_at_one_vent_pair_by_direction():
    cons = pd.DataFrame([_fan("t", 100, 100, 30.0), _fan("t", 100, 100, 200.0)])
    # Apex jitter puts the 190-degree detection nearer the 30-degree fan; direction must decide.
    det = pd.DataFrame([_fan("t", 101, 100, 35.0), _fan("t", 100.5, 100, 190.0)])
    pairs = matching.match_objects(det, cons)
    assert _pairs_as_set(pairs) == {(0, 0), (1, 1)}
    assert np.allclose(sorted(pairs["direction_error_deg"]), [5.0, 10.0])


def test_fan_distance_threshold_boundary():
    # Radius max(12, 0.3 * length): length 20 -> 12 px; length 100 -> 30 px.
    cons = pd.DataFrame([_fan("t", 0, 0, 90.0, length=20.0), _fan("u", 0, 0, 90.0, length=100.0)])
    on_edge = pd.DataFrame([_fan("t", 12.0, 0, 90.0), _fan("u", 0, 30.0, 90.0)])
    beyond = pd.DataFrame([_fan("t", 12.01, 0, 90.0), _fan("u", 0, 30.01, 90.0)])
    assert len(matching.match_objects(on_edge, cons)) == 2
    assert len(matching.match_objects(beyond, cons)) == 0


def test_spot_distance_threshold_boundary():
    # Radius max(10, semi_major): semi-major 6 -> 10 px; 15 -> 15 px.
    cons = pd.DataFrame([_spot("t", 50, 50, semi=6.0), _spot("u", 50, 50, semi=15.0)])
    assert len(matching.match_objects(pd.DataFrame([_spot("t", 60, 50), _spot("u", 50, 65)]), cons)) == 2
    assert len(matching.match_objects(pd.DataFrame([_spot("t", 60.01, 50), _spot("u", 50, 65.01)]), cons)) == 0


def test_matching_is_one_to_one_and_within_tile_and_kind():
    cons = pd.DataFrame([_fan("t", 10, 10, 0.0), _spot("t", 10, 10), _fan("u", 10, 10, 0.0)])
    det = pd.DataFrame([_fan("t", 10, 10, 0.0), _fan("t", 11, 10, 0.0), _fan("t", 10, 11, 5.0)])
    pairs = matching.match_objects(det, cons)
    assert len(pairs) == 1
    assert pairs["det_index"].is_unique and pairs["cons_index"].is_unique
    assert pairs.iloc[0]["cons_index"] == 0 and pairs.iloc[0]["det_index"] == 0


def _naive_greedy(det, cons, step=4.0):
    """Oracle: rank every admissible pair, then walk the list accepting pairs whose two ends are free."""
    cand = []
    for i, d in det.iterrows():
        for j, c in cons.iterrows():
            if d.tile_id != c.tile_id or d.kind != c.kind:
                continue
            dist = np.hypot(d.x_px - c.x_px, d.y_px - c.y_px)
            radius = max(12.0, 0.3 * c.length_px)
            if dist <= radius:
                err = abs((d.direction_deg - c.direction_deg + 180) % 360 - 180)
                cand.append((round(dist / step), err, dist, i, j))
    used_d, used_c, out = set(), set(), set()
    for *_, i, j in sorted(cand):
        if i not in used_d and j not in used_c:
            used_d.add(i)
            used_c.add(j)
            out.add((i, j))
    return out


def test_matching_equals_naive_sequential_greedy():
    rng = np.random.default_rng(4)
    vents = rng.uniform(0, 100, (8, 2))
    cons = pd.DataFrame([_fan("t", *vents[k % 8], rng.uniform(0, 360), length=rng.uniform(20, 80)) for k in range(30)])
    det = pd.DataFrame([_fan("t", *(vents[k % 8] + rng.normal(0, 3, 2)), rng.uniform(0, 360)) for k in range(28)])
    assert _pairs_as_set(matching.match_objects(det, cons)) == _naive_greedy(det, cons)


def _tables():
    tiles = pd.DataFrame({"tile_id": ["a", "b", "c"], "image_id": ["I1", "I1", "I2"], "width": [1000, 1000, 500],
                          "height": [1000, 1000, 400]})
    cons = pd.DataFrame([_fan("a", 10, 10, 0), _fan("a", 200, 200, 90), _spot("a", 400, 400), _fan("b", 50, 50, 180)])
    det = pd.DataFrame([_fan("a", 11, 10, 5), _spot("a", 401, 400), _spot("a", 700, 700), _fan("c", 5, 5, 0),
                        _fan("c", 100, 100, 0)])
    return det, cons, tiles


def test_object_metrics_hand_counts():
    det, cons, tiles = _tables()
    pairs = matching.match_objects(det, cons)
    m = scoring.object_metrics(det, cons, pairs, tiles)
    assert m["fan"]["n_matched"] == 1 and m["fan"]["n_detected"] == 3 and m["fan"]["n_consensus"] == 3
    assert m["fan"]["precision"] == pytest.approx(1 / 3) and m["fan"]["recall"] == pytest.approx(1 / 3)
    assert m["spot"]["precision"] == pytest.approx(0.5) and m["spot"]["recall"] == pytest.approx(1.0)
    assert m["spot"]["f1"] == pytest.approx(2 * 0.5 * 1.0 / 1.5)
    # Tile c has no consensus: two false detections on 0.2 Mpx.
    assert m["false_per_mpx"]["value"] == pytest.approx(10.0)


@pytest.mark.parametrize("seed", [0, 1])
def test_patch_metrics_match_sklearn(seed):
    rng = np.random.default_rng(seed)
    classes = ["background", "fan", "spot"]
    y = rng.choice(classes, 300, p=[0.6, 0.25, 0.15])
    logits = rng.normal(size=(300, 3)) + 1.5 * (y[:, None] == np.array(classes)[None, :])
    proba = np.exp(logits) / np.exp(logits).sum(axis=1, keepdims=True)
    proba[:20] = np.round(proba[:20], 1)  # ties in the scores
    m = scoring.patch_metrics(y, proba, classes)
    pred = np.array(classes)[proba.argmax(axis=1)]
    # Reference: sklearn.metrics.precision_recall_fscore_support / average_precision_score / precision_recall_curve.
    p, r, f, s = metrics.precision_recall_fscore_support(y, pred, labels=classes, zero_division=0)
    for k, c in enumerate(classes):
        assert m[c]["precision"] == pytest.approx(p[k])
        assert m[c]["recall"] == pytest.approx(r[k])
        assert m[c]["f1"] == pytest.approx(f[k])
        assert m[c]["support"] == s[k]
        assert m[c]["average_precision"] == pytest.approx(metrics.average_precision_score(y == c, proba[:, k]))
        sp, sr, st = metrics.precision_recall_curve(y == c, proba[:, k])
        # sklearn appends the (recall 0, precision 1) end point and may drop thresholds past full recall.
        n = len(st)
        assert np.allclose(m["curves"][c]["thresholds"][-n:], st)
        assert np.allclose(m["curves"][c]["precision"][-n:], sp[:-1])
        assert np.allclose(m["curves"][c]["recall"][-n:], sr[:-1])
    assert m["accuracy"] == pytest.approx(metrics.accuracy_score(y, pred))


def test_patch_metrics_bad_shape():
    with pytest.raises(DetectorError, match="expected \\(2, 3\\)"):
        scoring.patch_metrics(["fan", "spot"], np.zeros((2, 2)), ["background", "fan", "spot"])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_dice_matches_scipy(seed):
    rng = np.random.default_rng(seed)
    a = rng.random((30, 40)) < 0.3
    b = rng.random((30, 40)) < 0.4
    # Reference: scipy.spatial.distance.dice is the dissimilarity 1 - Dice coefficient.
    assert scoring.dice(a, b) == pytest.approx(1.0 - distance.dice(a.ravel(), b.ravel()))


def test_dice_edge_cases():
    z = np.zeros((4, 4), bool)
    assert scoring.dice(z, z) == 1.0
    assert scoring.dice(z, ~z) == 0.0
    with pytest.raises(DetectorError, match="shapes"):
        scoring.dice(z, np.zeros((3, 4), bool))


# Each feature is a 5 x 5 box around (x, y).
_box_rasterise = box_rasteriser(2)


def test_coverage_with_own_masks():
    cons = pd.DataFrame([_fan("a", 5, 5, 0)])
    det = pd.DataFrame([_fan("a", 7, 5, 0)])
    per_tile = scoring.coverage_metrics(det, cons, {"a": (10, 10), "b": (10, 10)}, rasterise=_box_rasterise)
    a = per_tile.set_index("tile_id").loc["a"]
    # Boxes overlap in 3 x 5 = 15 px of 25 each.
    assert a["dice"] == pytest.approx(2 * 15 / 50)
    assert a["covered_error_pp"] == pytest.approx(0.0)
    b = per_tile.set_index("tile_id").loc["b"]
    assert b["dice"] == 1.0 and not b["any_deposit"]


def test_direction_metrics_and_flip_rate():
    errors = np.array([0, 5, 10, 15, 30, 50, 100, 136, 170, 180.0])
    m = directions.direction_metrics(errors)
    assert m["flip_rate"] == pytest.approx(0.3)  # 136, 170, 180
    assert m["within_10"] == pytest.approx(0.3) and m["within_20"] == pytest.approx(0.4)
    assert m["median"] == pytest.approx(40.0) and m["p90"] == pytest.approx(np.quantile(errors, 0.9))
    # Flips built from predictions: 180-degree reversals of consensus directions.
    cons = np.array([10.0, 100.0, 250.0, 300.0])
    pred = np.array([190.0, 100.0, 70.0, 305.0])
    assert directions.direction_metrics(directions.direction_errors(pred, cons))["flip_rate"] == pytest.approx(0.5)


def _fan_catalog(seed=0):
    rng = np.random.default_rng(seed)
    rows_c, rows_d, tiles = [], [], []
    for i in range(5):
        wind = rng.uniform(0, 360)
        for t in range(3):
            tid = f"T{i}{t}"
            tiles.append(dict(tile_id=tid, image_id=f"I{i}", region=f"R{i % 2}",
                              solar_longitude_deg=190 + 10 * i, width=300, height=200))
            for k in range(4):
                x, y = 30 + 60 * k, 50 + 30 * (t % 2)
                d = (wind + rng.normal(0, 20)) % 360
                rows_c.append(_fan(tid, x, y, d, length=rng.uniform(20, 90)))
                rows_d.append(_fan(tid, x + 1, y, (d + rng.normal(0, 10)) % 360, score=0.9,
                                   axis_deg=(d + rng.normal(0, 10)) % 180))
    return pd.DataFrame(rows_d), pd.DataFrame(rows_c), pd.DataFrame(tiles)


def test_oracle_polarity_never_worse_than_random():
    det, cons, tiles = _fan_catalog()
    fans = directions.matched_fans(det, cons, matching.match_objects(det, cons), tiles)
    e = directions.baseline_errors(fans, cons, tiles, prevailing_deg=45.0, seed=3)
    assert np.all(e["axis_oracle_polarity"] <= e["axis_random_polarity"] + 1e-9)
    assert np.median(e["axis_oracle_polarity"]) <= np.median(e["axis_random_polarity"])
    # Prevailing baseline is the plain difference to one direction.
    assert np.allclose(e["prevailing"], directions.direction_errors(45.0, fans["consensus_deg"]))
    m = directions.baseline_metrics(e)
    assert m["prevailing"]["skill_median"] == pytest.approx(1 - np.median(e["model"]) / np.median(e["prevailing"]))


def test_tile_mean_pools_both_sides_the_same_way():
    tiles = pd.DataFrame({"tile_id": ["t"], "image_id": ["I"], "width": [100], "height": [100]})
    cons = pd.DataFrame([_fan("t", 10, 10, 0, length=10), _fan("t", 50, 10, 90, length=10),
                         _fan("t", 90, 10, 90, length=20)])
    # Three detected fans about 90 degrees and one wrong fan pointing the other way.
    det = pd.DataFrame([_fan("t", 10, 10, 80, length=20), _fan("t", 30, 10, 90, length=20),
                        _fan("t", 50, 10, 100, length=20), _fan("t", 70, 10, 200, length=15)])
    mean = directions.tile_mean_errors(det, cons, tiles)
    # "mean": circular means weighted by length on both sides, checked against scipy.stats.circmean
    # of the angles repeated by their weights.
    cons_mean = np.degrees(circmean(np.radians(np.repeat([0, 90, 90], [10, 10, 20])), high=2 * np.pi))
    det_mean = np.degrees(circmean(np.radians(np.repeat([80, 90, 100, 200], [20, 20, 20, 15])), high=2 * np.pi))
    assert cons_mean == pytest.approx(np.degrees(np.arctan2(30, 10)))  # sum of (sin, cos) * length by hand
    assert mean["consensus_mean_deg"].iloc[0] == pytest.approx(cons_mean)
    assert mean["predicted_mean_deg"].iloc[0] == pytest.approx(det_mean)
    assert mean["error_deg"].iloc[0] == pytest.approx(abs(det_mean - cons_mean))
    # "prevailing": the robust direction on both sides; the consensus's 0-degree fan and the wrong
    # detected fan, both more than 45 degrees from the mode, move neither.
    prev = directions.tile_mean_errors(det, cons, tiles, pooling="prevailing")
    assert prev["consensus_mean_deg"].iloc[0] == pytest.approx(90.0, abs=0.5)
    assert prev["predicted_mean_deg"].iloc[0] == pytest.approx(90.0, abs=0.5)
    assert prev["error_deg"].iloc[0] < 1.0
    with pytest.raises(ValueError, match="pooling"):
        directions.tile_mean_errors(det, cons, tiles, pooling="median")


def test_tile_mean_of_truth_against_itself_is_zero_for_two_winds():
    # A tile whose fans follow two winds: scored against itself, either pooling gives no error
    # (the estimators are the same on both sides).
    tiles = pd.DataFrame({"tile_id": ["t"], "image_id": ["I"], "width": [100], "height": [100]})
    cons = pd.DataFrame([_fan("t", 10 * i, 10, d, length=20) for i, d in enumerate([40, 45, 50, 200, 210])])
    for pooling in directions.TILE_POOLINGS:
        out = directions.tile_mean_errors(cons, cons, tiles, pooling=pooling)
        assert out["error_deg"].iloc[0] == pytest.approx(0.0, abs=1e-9)


def test_bootstrap_deterministic_and_brackets():
    rng = np.random.default_rng(0)
    values = rng.gamma(2.0, 5.0, 200)
    images = rng.integers(0, 20, 200)
    a = bootstrap.bootstrap_interval(values, images, "median", n_boot=300, seed=7)
    b = bootstrap.bootstrap_interval(values, images, "median", n_boot=300, seed=7)
    c = bootstrap.bootstrap_interval(values, images, "median", n_boot=300, seed=8)
    assert a == b and a != c
    assert a[0] < np.median(values) < a[1]
    # Naive oracle: loop over replicates with the same draws.
    draws = np.random.default_rng(7).multinomial(20, np.full(20, 1 / 20), size=300)
    means = [np.sum(d[images] * values) / np.sum(d[images]) for d in draws]
    assert np.allclose(bootstrap.bootstrap_interval(values, images, "mean", n_boot=300, seed=7),
                       np.quantile(means, [0.025, 0.975]))


def test_score_catalogs_json_ready_and_errors():
    det, cons, tiles = _fan_catalog(1)
    s = scoring.score_catalogs(det, cons, tiles, prevailing_deg=90.0, seed=0, n_boot=50, rasterise=_box_rasterise)
    text = json.dumps(s, allow_nan=False)
    assert json.loads(text) == s
    assert s["objects"]["fan"]["f1"] == pytest.approx(1.0)
    assert s["direction"]["per_fan"]["n"] == len(cons)
    assert set(s["breakdowns"]) >= {"image", "region", "ls", "fan_length", "votes"}
    assert s["reference"]["crowd_vs_expert_tile_mean_deg"] == 10.0
    lo, hi = s["intervals"]["fan_direction_median"]
    assert lo <= s["direction"]["per_fan"]["median"] <= hi
    bad = cons.copy()
    bad.loc[2, "tile_id"] = "nowhere"
    with pytest.raises(DetectorError, match="consensus row 2: tile_id 'nowhere'"):
        scoring.score_catalogs(det, bad, tiles)


def test_bootstrap_of_few_images_is_a_range_not_a_ci():
    from training.evaluation.bootstrap import MIN_IMAGES_FOR_CI, bootstrap_interval, interval_kind

    # Three images, one value each: a resample of one image drawn three times (probability 1/9 per
    # replicate) gives that image's value, so the range of 1000 resampled means is (1, 3) exactly.
    assert bootstrap_interval([1.0, 2.0, 3.0], ["a", "b", "c"], "mean", n_boot=1000) == (1.0, 3.0)
    assert "too few for a 95 % CI" in interval_kind(3) and interval_kind(MIN_IMAGES_FOR_CI).startswith("95 % CI")
    # From five images on, the percentile interval: strictly inside the extremes for these values.
    low, high = bootstrap_interval(np.arange(1.0, 11.0), list("abcdefghij"), "mean", n_boot=2000)
    assert 1.0 < low < 5.5 < high < 10.0
