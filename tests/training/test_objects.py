"""Labels of candidate readings: the evaluation's matching, within each interpretation of a component."""

import numpy as np
import pandas as pd
import pytest

from detector.objects.assemble import HYP_AXIS_FORWARD, HYP_AXIS_REVERSE, HYP_MODES, Candidate
from training.fitting.objects import LABEL_MAX_DIRECTION_DEG, label_readings
from training.evaluation.matching import match_objects


def _fan(hyp, x, y, direction, length=40.0):
    return {"kind": "fan", "x_px": x, "y_px": y, "direction_deg": direction, "length_px": length,
            "opening_deg": 30.0, "axis_deg": direction % 180.0, "direction_confidence": 0.5, "_hyp": hyp,
            "_pixels": np.ones(3, bool), "_features": np.zeros(3, np.float32)}


def _spot(x, y):
    return {"kind": "spot", "x_px": x, "y_px": y, "direction_deg": 0.0, "semi_major_px": 8.0,
            "semi_minor_px": 6.0, "axis_deg": 0.0, "_features": np.zeros(3, np.float32)}


def _candidate(fans, spot):
    return Candidate(ys=np.zeros(3, int), xs=np.zeros(3, int), features=np.zeros(2, np.float32), fans=fans,
                     spot=spot)


CONSENSUS = pd.DataFrame([
    {"tile_id": "t", "kind": "fan", "x_px": 100.0, "y_px": 100.0, "direction_deg": 90.0, "length_px": 40.0,
     "opening_deg": 30.0, "semi_major_px": np.nan, "semi_minor_px": np.nan, "votes": 10},
])


def test_two_halves_of_one_fan_in_one_interpretation_are_not_both_right():
    # The modes split one consensus fan in two (both apexes at its source, 20 deg either side);
    # the evaluation's one-to-one matching would match one of them, so only one is right.
    fans = [_fan(HYP_MODES, 101.0, 100.0, 70.0), _fan(HYP_MODES, 101.0, 100.0, 110.0),
            _fan(HYP_AXIS_FORWARD, 100.0, 101.0, 88.0), _fan(HYP_AXIS_REVERSE, 140.0, 101.0, 268.0)]
    label, error = label_readings([_candidate(fans, _spot(120.0, 100.0))], CONSENSUS, "t")
    assert label[:2].sum() == 1
    # Each interpretation that would be matched if chosen is right: the axis reading too.
    assert label[2] == 1 and error[2] == pytest.approx(2.0)
    # The reversed axis reading starts 40 px away at the far end and points the other way.
    assert label[3] == 0 and np.isnan(error[3])
    assert label[4] == 0  # no consensus spot


def test_a_reading_pointing_the_wrong_way_is_not_right():
    fans = [_fan(HYP_MODES, 100.0, 100.0, (90.0 + LABEL_MAX_DIRECTION_DEG + 5.0) % 360.0)]
    label, _ = label_readings([_candidate(fans, _spot(300.0, 300.0))], CONSENSUS, "t")
    assert label.tolist() == [0, 0]


def test_labels_agree_with_the_evaluation_matching_for_one_reading_per_interpretation():
    # Reference: training.evaluation.matching.match_objects on the same rows (one reading, so one-to-one is trivial).
    rng = np.random.default_rng(3)
    for _ in range(20):
        x, y = rng.uniform(80, 120, 2)
        d = rng.uniform(0, 360)
        fans = [_fan(HYP_MODES, x, y, d)]
        label, _ = label_readings([_candidate(fans, _spot(400.0, 400.0))], CONSENSUS, "t")
        det = pd.DataFrame([{k: v for k, v in fans[0].items() if not k.startswith("_")} | {"tile_id": "t"}])
        pairs = match_objects(det, CONSENSUS)
        expected = len(pairs) == 1 and pairs["direction_error_deg"].iloc[0] <= LABEL_MAX_DIRECTION_DEG
        assert bool(label[0]) == expected


def test_right_readings_carry_their_consensus_sizes_and_turn():
    fans = [_fan(HYP_MODES, 101.0, 100.0, 92.0, length=25.0), _fan(HYP_MODES, 300.0, 300.0, 10.0)]
    label, error, truth = label_readings([_candidate(fans, _spot(400.0, 400.0))], CONSENSUS, "t", with_truth=True)
    assert label.tolist() == [1, 0, 0]
    # the consensus fan's length and opening, and the turn from 92 deg to its 90 deg (anticlockwise)
    np.testing.assert_array_equal(truth[0], [40.0, 30.0, -2.0])
    assert np.isnan(truth[1:]).all()
    # across north: from 80 deg to 1 deg is a turn of 79 deg anticlockwise, not 281 clockwise
    fans = [_fan(HYP_MODES, 101.0, 100.0, 80.0)]
    _, _, truth = label_readings([_candidate(fans, _spot(400.0, 400.0))], CONSENSUS.assign(direction_deg=1.0),
                                 "t", with_truth=True)
    assert truth[0, 2] == pytest.approx(-79.0)


def _readings_with_sizes(n, rng):
    from types import SimpleNamespace

    from detector.objects.assemble import OBJECT_FEATURE_NAMES, VIEW_ACROSS

    F = rng.normal(size=(n, len(OBJECT_FEATURE_NAMES))).astype(np.float32)
    is_fan = np.arange(n) % 2 == 0
    # fans: length 3-55 px, opening 20-90 deg; spots: semi-minor axis half to all of the semi-major one
    own = np.exp(rng.uniform(1.0, 4.0, size=(n, 2)))
    own[is_fan, 1] = rng.uniform(20.0, 90.0, size=is_fan.sum())
    own[~is_fan, 1] = own[~is_fan, 0] * rng.uniform(0.5, 1.0, size=(~is_fan).sum())
    true = own * np.where(is_fan[:, None], [1.4, 0.6], [1.1, 0.9])
    move = np.exp(0.2 * F[:, 0])  # one feature moves a fan's length and a spot's two axes too
    true[is_fan, 0] *= move[is_fan]
    true[~is_fan] *= move[~is_fan, None]
    label = np.ones(n, int)
    label[::7] = 0
    true[label == 0] = np.nan
    # a fan's consensus direction lies 5 deg clockwise of the reading's, plus 5 deg per unit of one view sample
    view = OBJECT_FEATURE_NAMES.index(f"read_view_t4_s{VIEW_ACROSS.size - 1}")
    direction = np.where(is_fan, rng.uniform(0.0, 360.0, n), np.nan)
    turn = np.where(is_fan & (label == 1), 5.0 + 5.0 * F[:, view], np.nan)
    return SimpleNamespace(F=F, own_size=own, true_size=true, is_fan=is_fan, label=label, direction_deg=direction,
                           turn_deg=turn)


def test_refine_model_matches_least_squares_on_a_known_relation():
    # Reference: numpy's least squares on the same standardised design (scikit-learn's Ridge with a
    # penalty small against thousands of rows gives the same coefficients to ~1e-3).
    from detector.objects.refine import predict_refined, refine_design
    from training.fitting.objects import fit_refine_model, refine_model_check

    rng = np.random.default_rng(5)
    readings = _readings_with_sizes(4000, rng)
    fit = fit_refine_model(readings, alpha=1e-3)
    rows = (readings.label == 1) & readings.is_fan
    X = refine_design(readings.F[rows], readings.own_size[rows])
    mean, scale = X.mean(axis=0), X.std(axis=0)
    design = np.column_stack([np.ones(rows.sum()), (X - mean) / scale])
    targets = np.column_stack([np.log(readings.true_size[rows]), readings.turn_deg[rows]])
    expected, *_ = np.linalg.lstsq(design, targets, rcond=None)
    # the relation is exact: no residual, so the smearing retransformation adds nothing
    np.testing.assert_allclose(fit["fan"]["smearing_log"], 0.0, atol=1e-3)
    np.testing.assert_allclose(fit["fan"]["intercept"], expected[0], atol=1e-3)
    np.testing.assert_allclose(np.array(fit["fan"]["coef"]).T, expected[1:], atol=1e-3)
    # the relation is exact, so the refined readings are the consensus ones and the check says so
    sizes, turned = predict_refined(fit, readings.F, readings.own_size, np.nan_to_num(readings.direction_deg),
                                    readings.is_fan)
    right = readings.label == 1
    np.testing.assert_allclose(sizes[right], readings.true_size[right], rtol=1e-3)
    expected_direction = (readings.direction_deg[rows] + readings.turn_deg[rows]) % 360.0
    gap = np.abs((turned[rows] - expected_direction + 180.0) % 360.0 - 180.0)
    assert gap.max() < 1e-2
    check = refine_model_check(fit, readings)
    assert check["fan_length"]["model"] < 1e-3 < check["fan_length"]["measured"]
    assert check["fan_direction_deg"]["model"] < 1e-2 < check["fan_direction_deg"]["measured"]
    assert check["spot_semi_minor"]["n"] == int(((readings.label == 1) & ~readings.is_fan).sum())


def test_refine_model_sizes_are_right_on_average_with_log_normal_scatter():
    # Consensus lengths scatter log-normally about the reading's (sigma 0.5): a fit of log sizes
    # alone gives exp(E[log L]), short of E[L] by exp(sigma**2 / 2) = 1.133 (the log-normal mean,
    # a textbook fact); the smearing retransformation (Duan 1983, JASA 78:605) restores the mean.
    from detector.objects.refine import predict_refined
    from training.fitting.objects import fit_refine_model

    rng = np.random.default_rng(11)
    readings = _readings_with_sizes(20000, rng)
    scatter = np.exp(rng.normal(0.0, 0.5, size=readings.true_size.shape))
    readings.true_size = readings.true_size * scatter
    fit = fit_refine_model(readings, alpha=1e-3)
    assert fit["fan"]["smearing_log"][0] == pytest.approx(0.125, abs=0.02)  # sigma**2 / 2
    sizes, _ = predict_refined(fit, readings.F, readings.own_size, np.nan_to_num(readings.direction_deg),
                               readings.is_fan)
    rows = (readings.label == 1) & readings.is_fan
    ratio = readings.true_size[rows, 0].sum() / sizes[rows, 0].sum()
    assert ratio == pytest.approx(1.0, abs=0.03)
    # without the retransformation the lengths would run short by about the log-normal factor
    assert ratio * np.exp(fit["fan"]["smearing_log"][0]) == pytest.approx(np.exp(0.125), abs=0.03)


def test_refine_model_needs_right_readings_of_both_kinds():
    from training.fitting.objects import fit_refine_model

    readings = _readings_with_sizes(100, np.random.default_rng(1))
    readings.label[~readings.is_fan] = 0
    assert fit_refine_model(readings) is None


def test_the_turn_is_kept_only_where_it_helps_on_other_readings():
    # A turn must bring right fans closer to their consensus direction on readings it was not fitted
    # on, and of none, the ridge's and the boosted turn the closest (median angle) is kept. Turns of
    # a linear law: the ridge's is exact and kept. Checked on readings whose turns follow no feature
    # (a uniform scatter of +-30 deg) neither can help and both are dropped, sizes untouched.
    from detector.objects.refine import predict_refined
    from training.fitting.objects import fit_refine_checked

    rng = np.random.default_rng(8)
    fit_readings, same = _readings_with_sizes(3000, rng), _readings_with_sizes(3000, rng)
    messages = []
    kept, check, boosted = fit_refine_checked(fit_readings, same, log=messages.append)
    assert kept["fan"].get("turn_kept", True) and boosted is None
    assert any("the turn kept: ridge" in m for m in messages)
    assert check["fan_direction_deg"]["model"] < check["fan_direction_deg"]["boosted"]
    assert check["fan_direction_deg"]["model"] < check["fan_direction_deg"]["measured"]

    other = _readings_with_sizes(3000, rng)
    right = np.isfinite(other.turn_deg)
    other.turn_deg[right] = rng.uniform(-30.0, 30.0, right.sum())
    messages = []
    dropped, check, boosted = fit_refine_checked(fit_readings, other, log=messages.append)
    assert dropped["fan"]["turn_kept"] is False and boosted is None
    assert any("the turn kept: none" in m for m in messages)
    assert check["fan_direction_deg"]["model"] == check["fan_direction_deg"]["measured"]
    direction = np.nan_to_num(other.direction_deg)
    sizes_kept, _ = predict_refined(kept, other.F, other.own_size, direction, other.is_fan)
    sizes_dropped, turned = predict_refined(dropped, other.F, other.own_size, direction, other.is_fan)
    np.testing.assert_array_equal(sizes_dropped, sizes_kept)
    np.testing.assert_allclose(turned[other.is_fan], direction[other.is_fan] % 360.0, atol=1e-9)


def test_a_turn_that_is_a_step_of_one_feature_is_kept_boosted():
    # Turns of 20 deg to the side where one view sample is positive, 20 deg the other way where it is
    # negative (which side the mass lies on): a step no straight line fits (the ridge's best line
    # leaves a median error of several degrees), which trees split exactly. The boosted turn is kept,
    # the ridge's dropped, and the kept turn brings the check fans within 1 deg of their consensus.
    from detector.objects.assemble import OBJECT_FEATURE_NAMES, VIEW_ACROSS
    from detector.objects.refine import predict_refined, refine_design, turn_directions
    from training.fitting.objects import fit_refine_checked

    rng = np.random.default_rng(9)
    view = OBJECT_FEATURE_NAMES.index(f"read_view_t4_s{VIEW_ACROSS.size - 1}")
    fit_readings, check_readings = _readings_with_sizes(4000, rng), _readings_with_sizes(4000, rng)
    for r in (fit_readings, check_readings):
        right = np.isfinite(r.turn_deg)
        r.turn_deg[right] = 20.0 * np.sign(r.F[right, view])
    messages = []
    refine, check, boosted = fit_refine_checked(fit_readings, check_readings, log=messages.append, seed=3)
    assert boosted is not None and refine["fan"]["turn_kept"] is False
    assert any("the turn kept: boosted" in m for m in messages)
    assert check["fan_direction_deg"]["model"] == check["fan_direction_deg"]["boosted"] < 1.0
    assert check["fan_direction_deg"]["measured"] == pytest.approx(20.0)
    # the ridge's own turn is zero now: predict_refined leaves directions as measured
    r = check_readings
    direction = np.nan_to_num(r.direction_deg)
    _, unturned = predict_refined(refine, r.F, r.own_size, direction, r.is_fan)
    np.testing.assert_allclose(unturned[r.is_fan], direction[r.is_fan] % 360.0, atol=1e-9)
    turned = turn_directions(unturned, r.is_fan, boosted.predict(refine_design(r.F, r.own_size)[r.is_fan]))
    rows = r.is_fan & np.isfinite(r.turn_deg)
    gap = np.abs((turned[rows] - (direction[rows] + r.turn_deg[rows]) + 180.0) % 360.0 - 180.0)
    assert np.median(gap) < 1.0


def test_turn_directions_clips_the_turn_and_leaves_spots_alone():
    # Hand-worked: 350 + 25 = 375 -> 15 deg; a 50 deg turn is clipped to MAX_TURN_DEG (30): 10 -> 40;
    # -40 is clipped to -30: 20 -> 350; the spot's axis (100) is not a direction and stays.
    from detector.objects.refine import MAX_TURN_DEG, turn_directions

    assert MAX_TURN_DEG == 30.0
    out = turn_directions(np.array([350.0, 10.0, 100.0, 20.0]), np.array([True, True, False, True]),
                          np.array([25.0, 50.0, -40.0]))
    np.testing.assert_allclose(out, [15.0, 40.0, 100.0, 350.0])
    with pytest.raises(ValueError, match="2 turns for 3 fan readings"):
        turn_directions(np.array([350.0, 10.0, 100.0, 20.0]), np.array([True, True, False, True]),
                        np.array([1.0, 2.0]))
