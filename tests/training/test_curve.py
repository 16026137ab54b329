"""Tests of the learning curve: the power law, its inversion, the verdicts and their wording."""

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import curve_fit

from training.effort.curve import (
    _curve_verdicts,
    fit_power_law,
    learning_curve,
    learning_curve_summary,
    power_law,
    tiles_needed,
)


def test_f1_verdicts_speak_of_f1_not_of_its_error():
    # An F1 curve whose error 1 - F1 levels off at c = 0.426 levels off at F1 = 0.574; the text must
    # say F1 0.574 and state the fitted form, never print 0.426 as if it were the F1.
    points = [{"n_tiles": n, "errors": {"fan_f1": power_law(n, 0.5, 0.5, 0.426), "spot_f1": 0.1,
                                        "fan_direction_median_deg": 9.0}} for n in (25, 50, 100, 200)]
    fits = {"fan_f1": {"a": 0.5, "b": 0.5, "c": 0.426, "with_c": True}, "spot_f1": None,
            "fan_direction_median_deg": None}
    verdicts = _curve_verdicts(points, fits)
    fan = verdicts["fan_f1"]
    assert "fan F1 levels off at 0.574" in fan["verdict"]
    assert "0.426" not in fan["verdict"]
    assert fan["levels_off_at"] == pytest.approx(0.574)
    assert fan["law"].startswith("1 - fan F1 = a * n^-b + c")
    curve = {"tileset": "x", "holdout_images": ["H"], "points": [
        {"n_tiles": n, "n_images": 2, "fan_f1": 1 - power_law(n, 0.5, 0.5, 0.426), "spot_f1": 0.9,
         "fan_direction_median_deg": 9.0} for n in (25, 50, 100, 200)], "targets": verdicts}
    text = learning_curve_summary(curve)
    assert "fitted: 1 - fan F1 = a * n^-b + c" in text
    assert "asymptote" not in text


# --------------------------------------------------------------------------- power law


def test_power_law_fit_recovers_known_parameters():
    n = np.array([10, 20, 40, 80, 160, 320, 640], dtype=float)
    a, b, c = 2.0, 0.5, 0.1
    e = a * n**-b + c
    fit = fit_power_law(n, e)
    assert fit["with_c"] is True
    assert (fit["a"], fit["b"], fit["c"]) == pytest.approx((a, b, c), rel=1e-4, abs=1e-6)
    # Reference: an unbounded scipy.optimize.curve_fit from a nearby start.
    ref, _ = curve_fit(lambda x, a_, b_, c_: a_ * x**-b_ + c_, n, e, p0=[1.5, 0.4, 0.05])
    assert (fit["a"], fit["b"], fit["c"]) == pytest.approx(tuple(ref), rel=1e-4, abs=1e-6)


def test_power_law_without_c_matches_loglog_slope():
    # With c = 0, log e = log a - b log n: the np.polyfit slope is -b.
    n = np.array([8, 16, 32], dtype=float)
    e = 3.0 * n**-0.7
    fit = fit_power_law(n, e)  # three points: fitted without c
    assert fit["with_c"] is False and fit["c"] == 0.0
    slope, intercept = np.polyfit(np.log(n), np.log(e), 1)
    assert fit["b"] == pytest.approx(-slope, rel=1e-6)
    assert fit["a"] == pytest.approx(np.exp(intercept), rel=1e-6)
    assert fit_power_law([10.0], [0.5]) is None


def test_tiles_needed_inverts_the_law():
    # 2 n^-0.5 + 0.1 = 0.2  <=>  n^0.5 = 20  <=>  n = 400.
    fit = {"a": 2.0, "b": 0.5, "c": 0.1}
    assert tiles_needed(fit, 0.2) == pytest.approx(400.0)
    assert power_law(400.0, 2.0, 0.5, 0.1) == pytest.approx(0.2)
    assert tiles_needed({"a": 2.0, "b": 0.5, "c": 0.25}, 0.2) == math.inf
    # A nearly flat law needs more tiles than a float holds: infinite, not an overflow.
    assert tiles_needed({"a": 1.0, "b": 1e-5, "c": 0.0}, 0.2) == math.inf
    points = [{"n_tiles": n, "errors": {"fan_f1": power_law(n, 2.0, 0.5, 0.1), "spot_f1": 0.1,
                                        "fan_direction_median_deg": power_law(n, 50.0, 0.3, 12.0)}}
              for n in (25, 50, 100)]
    fits = {"fan_f1": fit, "spot_f1": None, "fan_direction_median_deg": {"a": 50.0, "b": 0.3, "c": 12.0}}
    verdicts = _curve_verdicts(points, fits)
    assert verdicts["fan_f1"]["more_tiles"] == 300
    assert verdicts["spot_f1"]["reached"] is True and verdicts["spot_f1"]["more_tiles"] == 0
    assert "levels off at 12" in verdicts["fan_direction_median_deg"]["verdict"]


@pytest.mark.slow
def test_learning_curve_smoke(tmp_path):
    from training.synth import synthesize_tileset

    # The same tiny set as the session fixtures: every class occurs in its fitting image.
    root = synthesize_tileset(tmp_path / "tiles", n_images=3, tiles_per_image=1, seed=3)
    curve = learning_curve(root, seed=0, out=tmp_path / "curve", max_patches=2000, max_iter=20, log=lambda *_: None)
    # Three images: one held out, one run on the other two (fit + calibration).
    assert [p["n_images"] for p in curve["points"]] == [2]
    assert not set(curve["holdout_images"]) & set(curve["points"][0]["images"])
    assert 0.0 <= curve["points"][0]["errors"]["fan_f1"] <= 1.0
    saved = json.loads((tmp_path / "curve" / "learning_curve.json").read_text())
    assert saved["targets"].keys() == {"fan_f1", "spot_f1", "fan_direction_median_deg"}
    assert (tmp_path / "curve" / "learning_curve.png").stat().st_size > 1000


def test_far_extrapolation_is_not_promised():
    # 1 n^-0.05 at n = 100 is 0.79; reaching 0.2 needs n = 5^20 ~ 1e14 tiles: beyond 100 x 100.
    fit = {"a": 1.0, "b": 0.05, "c": 0.0}
    points = [{"n_tiles": 100, "errors": {"fan_f1": 0.79, "spot_f1": 0.79, "fan_direction_median_deg": 30.0}}]
    verdicts = _curve_verdicts(points, {"fan_f1": fit, "spot_f1": None, "fan_direction_median_deg": None})
    assert tiles_needed(fit, 0.2) == pytest.approx(5.0**20)
    assert verdicts["fan_f1"]["more_tiles"] is None
    assert "not reachable by this curve within 100x" in verdicts["fan_f1"]["verdict"]
    assert "too few measured points" in verdicts["spot_f1"]["verdict"]
    flat = _curve_verdicts(points, {"fan_f1": {"a": 0.3, "b": 1e-8, "c": 0.49}, "spot_f1": None,
                                    "fan_direction_median_deg": None})
    assert "does not fall with more tiles" in flat["fan_f1"]["verdict"]


def _tiny_tileset(root, n_images=8):
    from detector.io import write_image

    root.mkdir(parents=True)
    rows = []
    for i in range(n_images):
        for k in range(1 + i % 3):  # 1 to 3 tiles per image, so subset sizes differ
            tile_id = f"IMG_{i:02d}_T{k}"
            write_image(root / f"{tile_id}.png", np.full((64, 64), 100, np.uint8))
            rows.append({"tile_id": tile_id, "image_id": f"IMG_{i:02d}", "path": f"{tile_id}.png"})
    pd.DataFrame(rows).to_csv(root / "tiles.csv", index=False)
    pd.DataFrame(columns=["tile_id", "kind", "x_px", "y_px", "direction_deg", "length_px", "opening_deg",
                          "semi_major_px", "semi_minor_px", "votes"]).to_csv(root / "consensus.csv", index=False)
    return root


def test_learning_curve_orchestration_recovers_law(tmp_path, monkeypatch):
    """Nested subsets, fixed held-out images and the fit, with training replaced by exact power laws."""
    import training.fitting.train as train_module
    from detector.tileset import load_tileset

    root = _tiny_tileset(tmp_path / "tiles")
    runs = []

    def fake_train(subset, out, config, *, force, log):
        tileset = load_tileset(subset)
        hold = set(config.holdout_images)
        n = int((~tileset.tiles["image_id"].isin(hold)).sum())
        runs.append((set(tileset.image_ids) - hold, hold, config))
        metrics = {"fan_f1": 1.0 - power_law(n, 2.0, 0.5, 0.05), "spot_f1": 1.0 - power_law(n, 1.5, 0.3, 0.0),
                   "fan_direction_median_deg": power_law(n, 80.0, 0.6, 3.0)}
        return {"heldout_metrics": metrics, "training": {"tiles": {"fit": n - 1, "calibration": 1}, "seconds": 0.0}}

    monkeypatch.setattr(train_module, "train_model", fake_train)
    curve = learning_curve(root, seed=1, out=tmp_path / "curve", log=lambda *_: None)
    trained = [r[0] for r in runs]
    # Held-out images chosen once and never trained on; subsets nested, 2 images up.
    assert all(r[1] == runs[0][1] for r in runs) and runs[0][1]
    assert all(not (t & runs[0][1]) for t in trained)
    assert all(a < b for a, b in zip(trained, trained[1:]))
    assert len(trained[0]) == 2
    assert all(r[2].rotations == (0,) for r in runs)
    fan = curve["fits"]["fan_f1"]
    assert len(curve["points"]) >= 4 and fan["with_c"]
    assert (fan["a"], fan["b"], fan["c"]) == pytest.approx((2.0, 0.5, 0.05), rel=1e-3, abs=1e-4)
    # Hand inversion: 2 n^-0.5 + 0.05 = 0.2 -> n = (2 / 0.15)^2 = 177.8 -> 178 tiles in all.
    n_max = max(p["n_tiles"] for p in curve["points"])
    assert curve["targets"]["fan_f1"]["n_tiles_needed"] == 178
    assert curve["targets"]["fan_f1"]["more_tiles"] == 178 - n_max
    # 80 n^-0.6 + 3 = 10 -> n = (80 / 7)^(1 / 0.6) = 58.0.
    assert curve["targets"]["fan_direction_median_deg"]["n_tiles_needed"] in (58, 59)
    assert (tmp_path / "curve" / "learning_curve.png").stat().st_size > 1000
