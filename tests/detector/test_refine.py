"""Refining scored readings at run time: sizes and fan directions from the card's plain numbers,
bounded, written back."""

import numpy as np
import pytest

from detector.objects.assemble import OBJECT_FEATURE_NAMES, Candidate, candidate_rows
from detector.objects.refine import (
    MAX_FACTOR,
    MAX_TURN_DEG,
    OPENING_BOUNDS_DEG,
    REFINE_FEATURE_NAMES,
    apply_refined,
    predict_refined,
    reading_shapes,
    refine_design,
)

N_FEATURES = len(REFINE_FEATURE_NAMES)


def _part(constants, own_slope=0.0):
    """One kind's fit whose outputs are constants plus the own sizes' logs times a slope."""
    coef = np.zeros((len(constants), N_FEATURES))
    coef[0, -2] = coef[1, -1] = own_slope  # standardised with mean 0, scale 1: the raw log sizes
    return {"mean": [0.0] * N_FEATURES, "scale": [1.0] * N_FEATURES, "coef": coef.tolist(),
            "intercept": list(constants)}


def _fit(fan, spot, fan_own_slope=0.0):
    return {"features": list(REFINE_FEATURE_NAMES), "fan": _part(fan, fan_own_slope), "spot": _part(spot)}


def _fan(length, opening, direction=90.0):
    return {"kind": "fan", "x_px": 10.0, "y_px": 10.0, "direction_deg": direction, "length_px": length,
            "opening_deg": opening, "axis_deg": 85.0, "direction_confidence": 0.5, "_pixels": np.ones(3, bool)}


def _spot(a, b):
    return {"kind": "spot", "x_px": 10.0, "y_px": 10.0, "direction_deg": 30.0, "semi_major_px": a,
            "semi_minor_px": b, "axis_deg": 30.0}


def _candidates():
    one = Candidate(ys=np.zeros(3, int), xs=np.zeros(3, int), features=np.zeros(2, np.float32),
                    fans=[_fan(20.0, 40.0), _fan(30.0, 25.0, 350.0)], spot=_spot(9.0, 6.0),
                    vent_spots=[_spot(4.0, 3.0)])
    two = Candidate(ys=np.zeros(3, int), xs=np.zeros(3, int), features=np.zeros(2, np.float32),
                    fans=[], spot=_spot(12.0, 5.0))
    return [one, two]


def test_reading_shapes_follow_the_reading_order():
    # Reference: candidate_rows, the contract rows in the order of reading_matrix.
    cands = _candidates()
    sizes, direction, is_fan = reading_shapes(cands)
    rows = candidate_rows(cands)
    assert is_fan.tolist() == (rows["kind"] == "fan").tolist()
    expected = np.where(is_fan[:, None], rows[["length_px", "opening_deg"]].to_numpy(float),
                        rows[["semi_major_px", "semi_minor_px"]].to_numpy(float))
    np.testing.assert_array_equal(sizes, expected)
    np.testing.assert_array_equal(direction, rows["direction_deg"].to_numpy(float))


def test_without_a_refinement_model_the_measured_readings_stay():
    own = np.array([[20.0, 40.0], [9.0, 6.0]])
    sizes, direction = predict_refined(None, np.zeros((2, len(OBJECT_FEATURE_NAMES))), own, [90.0, 10.0],
                                       np.array([True, False]))
    np.testing.assert_array_equal(sizes, own)
    np.testing.assert_array_equal(direction, [90.0, 10.0])


def test_refined_readings_are_the_linear_model_within_their_bounds():
    F = np.zeros((5, len(OBJECT_FEATURE_NAMES)))
    own = np.array([[20.0, 40.0], [30.0, 25.0], [9.0, 6.0], [4.0, 3.0], [2.0, 170.0]])
    direction = np.array([90.0, 350.0, 30.0, 30.0, 0.0])
    is_fan = np.array([True, True, False, False, True])
    # every fan 1.5 x longer and wider, turned 15 deg clockwise; spots asked 10 and 20 px
    fit = _fit((np.log(1.5), np.log(1.5), 15.0), (np.log(10.0), np.log(20.0)), fan_own_slope=1.0)
    sizes, turned = predict_refined(fit, F, own, direction, is_fan)
    np.testing.assert_allclose(sizes[0], [30.0, 60.0])
    np.testing.assert_allclose(sizes[1], [45.0, 37.5])
    np.testing.assert_allclose(turned, [105.0, 5.0, 30.0, 30.0, 15.0])  # wraps at 360; spots unturned
    # a spot's semi-minor axis never exceeds its semi-major one, and no size moves more than
    # MAX_FACTOR from the measured one (4 px -> at most 16 px)
    np.testing.assert_allclose(sizes[2], [10.0, 10.0])
    np.testing.assert_allclose(sizes[3], [10.0, 10.0])
    assert sizes[4, 1] == OPENING_BOUNDS_DEG[1]  # 170 x 1.5 stays within the opening's bounds
    big, far = predict_refined(_fit((np.log(1e4), 0.0, -200.0), (0.0, 0.0)), F[:1], own[:1], direction[:1],
                               is_fan[:1])
    assert big[0, 0] == pytest.approx(20.0 * MAX_FACTOR)
    assert far[0] == pytest.approx(90.0 - MAX_TURN_DEG)


def test_refine_design_appends_the_log_sizes():
    F = np.arange(2 * len(OBJECT_FEATURE_NAMES), dtype=float).reshape(2, -1)
    X = refine_design(F, [[np.e, 1.0], [1.0, np.e ** 2]])
    assert X.shape == (2, N_FEATURES)
    np.testing.assert_allclose(X[:, -2:], [[1.0, 0.0], [0.0, 2.0]])
    np.testing.assert_array_equal(X[:, :-2], F)


def test_apply_refined_writes_each_reading_and_refuses_a_wrong_count():
    cands = _candidates()
    sizes, direction, is_fan = reading_shapes(cands)
    apply_refined(cands, sizes * 2.0, np.where(is_fan, direction + 10.0, 0.0))
    assert cands[0].fans[1]["length_px"] == 60.0 and cands[0].fans[1]["opening_deg"] == 50.0
    assert cands[0].fans[1]["direction_deg"] == 360.0 and cands[0].fans[1]["axis_deg"] == 85.0
    assert cands[0].vent_spots[0]["semi_major_px"] == 8.0 and cands[1].spot["semi_minor_px"] == 10.0
    assert cands[1].spot["direction_deg"] == 30.0  # a spot keeps its axis
    with pytest.raises(ValueError, match="4 sizes and 5 directions for 5 readings"):
        apply_refined(cands, sizes[:4], direction)
    assert cands[0].fans[0]["length_px"] == 40.0  # nothing half-written
