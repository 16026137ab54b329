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
