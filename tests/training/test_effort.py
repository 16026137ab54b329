"""Tests of tile routing, the volunteer effort estimate and the learning-curve power law."""

import argparse
import json
import shutil
import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import curve_fit

from detector.errors import DetectorError
from training.effort import (
    _curve_verdicts,
    effort_command,
    estimate_effort,
    fit_power_law,
    learning_curve,
    machine_threshold,
    power_law,
    route_tiles,
    run_effort,
    skip_threshold,
    tile_confidence,
    tile_detection_summary,
    tiles_needed,
)

# --------------------------------------------------------------------------- hand-made tables


def _heldout_row(tile_id, p, area, *, f1=0.9, err=5.0, score=0.9, dconf=0.9, n_det=3, unf=0.5):
    return {"tile_id": tile_id, "image_id": "IMG_H", "p_deposit": p, "consensus_px": area,
            "n_consensus": int(area > 0), "n_detections": n_det, "f1": f1, "fan_error_median_deg": err,
            "mean_score": score, "mean_direction_confidence": dconf, "unfamiliarity": unf}


def _card():
    """Held-out table: 6 confident good tiles, 3 weak tiles, 1 empty tile; 1000 px of deposits."""
    rows = [
        _heldout_row("h0", 0.95, 300, score=0.95, dconf=0.90),
        _heldout_row("h1", 0.93, 200, score=0.92, dconf=0.88),
        _heldout_row("h2", 0.90, 150, score=0.90, dconf=0.86),
        _heldout_row("h3", 0.88, 100, score=0.89, dconf=0.85),
        _heldout_row("h4", 0.85, 80, score=0.87, dconf=0.84),
        _heldout_row("h5", 0.80, 60, score=0.86, dconf=0.83, err=12.0),
        _heldout_row("h6", 0.60, 50, f1=0.3, err=60.0, score=0.55, dconf=0.40),
        _heldout_row("h7", 0.40, 40, f1=0.2, err=None, score=0.50, dconf=None),
        _heldout_row("h8", 0.20, 20, f1=0.0, err=None, score=0.40, dconf=None, n_det=1),
        _heldout_row("h9", 0.05, 0, f1=1.0, err=None, score=0.0, dconf=None, n_det=0),
    ]
    return {"heldout_tiles": rows}


def _screen():
    """Screen table of 10 tiles with per-tile detection summaries."""
    return pd.DataFrame({
        "tile_id": [f"s{i}" for i in range(10)],
        "image": ["IMG_S"] * 10,
        "p_deposit": [0.99, 0.97, 0.90, 0.70, 0.30, 0.01, 0.02, 0.96, np.nan, 0.0],
        "unfamiliarity": [0.3, 0.4, 0.5, 0.5, 0.6, 0.2, 1.7, 1.4, 0.5, np.nan],
        "route": ["", "", "", "", "", "", "", "", "", "nodata"],
        "mean_score": [0.95, 0.90, 0.60, 0.50, 0.45, 0.0, 0.0, 0.99, 0.5, 0.0],
        "mean_direction_confidence": [0.92, 0.90, 0.50, np.nan, np.nan, np.nan, np.nan, 0.99, np.nan, np.nan],
        "n_detections": [4, 3, 2, 1, 1, 0, 0, 5, 1, 0],
    })


# --------------------------------------------------------------------------- skip threshold


def _naive_skip_threshold(p, area, recall):
    """Oracle: try every deposit tile's p_deposit, keep the largest meeting the recall."""
    total = sum(a for a in area if a > 0)
    if total == 0:
        return 0.0
    best = None
    for t in sorted({pi for pi, a in zip(p, area) if a > 0}):
        kept = sum(a for pi, a in zip(p, area) if pi >= t)
        if kept >= recall * total - 1e-9:
            best = t
    return best


def test_skip_threshold_meets_recall_exactly_at_boundary():
    # Worked by hand: areas by p_deposit descending are 500 (0.9), 300 (0.8), 100 (0.7),
    # 60 (0.6), 40 (0.5), 0 (0.1); total 1000 px. Recall 0.9 needs 900 px kept:
    # cumulative 500, 800, 900 -> threshold 0.7 keeps exactly 900 px = 90 %.
    # Any larger threshold (e.g. 0.8) keeps only 800 px < 900.
    p = np.array([0.7, 0.9, 0.1, 0.5, 0.8, 0.6])
    area = np.array([100, 500, 0, 40, 300, 60])
    t = skip_threshold(p, area, recall=0.9)
    assert t == 0.7
    assert area[p >= t].sum() == 900
    assert area[p >= 0.8].sum() < 0.9 * 1000
    # Just above the boundary, the next tile (0.6) is needed: 960 px.
    assert skip_threshold(p, area, recall=0.9000001) == 0.6
    # 980 px needs the 0.5 tile; recall 1 needs every deposit tile (the smallest deposit p).
    assert skip_threshold(p, area, recall=0.98) == 0.5
    assert skip_threshold(p, area, recall=1.0) == 0.5


def test_skip_threshold_ties_and_no_deposits():
    # Two tiles tied at 0.7 (100 + 60 px): both are kept at threshold 0.7, 960 px >= 900.
    p = np.array([0.9, 0.8, 0.7, 0.7, 0.5])
    area = np.array([500, 300, 100, 60, 40])
    assert skip_threshold(p, area, recall=0.9) == 0.7
    # No held-out deposits: no recall can be measured, so nothing is skipped.
    assert skip_threshold(np.array([0.2, 0.9]), np.array([0, 0]), recall=0.98) == 0.0


def test_skip_threshold_matches_naive_oracle():
    rng = np.random.default_rng(7)
    for _ in range(50):
        n = int(rng.integers(1, 30))
        p = np.round(rng.random(n), 2)  # rounding makes ties
        area = np.where(rng.random(n) < 0.3, 0, rng.integers(1, 5000, n))
        recall = float(rng.choice([0.5, 0.9, 0.95, 0.98, 1.0]))
        assert skip_threshold(p, area, recall=recall) == _naive_skip_threshold(p, area, recall)


# --------------------------------------------------------------------------- machine threshold


def _naive_machine_threshold(conf, f1, err, min_f1, max_err, min_tiles):
    for c in sorted(set(conf)):
        inside = [i for i in range(len(conf)) if conf[i] >= c]
        errs = [err[i] for i in inside if not math.isnan(err[i])]
        if (len(inside) >= min_tiles and np.median([f1[i] for i in inside]) >= min_f1 and errs
                and np.median(errs) <= max_err):
            return c
    return None


def test_machine_threshold_on_hand_table():
    # Confidence = min(mean score, mean direction confidence), or the mean score without fans:
    # h0..h5 0.90, 0.88, 0.86, 0.85, 0.84, 0.83; h6 0.40; h7 0.50; h8 0.40 (h9 has no detections).
    # At c = 0.40 all 9 tiles count: F1 sorted 0, 0.2, 0.3, 0.9 x 6 -> median 0.9 >= 0.8; fan
    # errors 5 x 5, 12, 60 (h7, h8 have none) -> median 5 deg <= 20. 0.40 is the smallest candidate.
    card = _card()
    held = pd.DataFrame(card["heldout_tiles"])
    held = held[held["n_detections"] > 0]
    conf = tile_confidence(held["mean_score"], pd.to_numeric(held["mean_direction_confidence"]))
    err = pd.to_numeric(held["fan_error_median_deg"]).to_numpy(float)
    got = machine_threshold(conf, held["f1"], err, min_f1=0.8, max_direction_error=20.0)
    assert got == pytest.approx(0.40)
    # No tile has F1 above 0.9, so a target of 0.95 is never met.
    assert machine_threshold(conf, held["f1"], err, min_f1=0.95) is None
    # A direction target of 4 deg is never met (best median is 5 deg): no machine route.
    assert machine_threshold(conf, held["f1"], err, max_direction_error=4.0) is None
    # Needing 7 tiles: only 0.50 (7 tiles) and 0.40 (9 tiles) have enough; 0.40 is smaller.
    assert machine_threshold(conf, held["f1"], err, min_tiles=7) == pytest.approx(0.40)
    # Needing 10 tiles: never enough.
    assert machine_threshold(conf, held["f1"], err, min_tiles=10) is None


def test_machine_threshold_matches_naive_oracle():
    rng = np.random.default_rng(11)
    for _ in range(40):
        n = int(rng.integers(1, 25))
        conf = np.round(rng.random(n), 2)
        f1 = np.clip(conf + rng.normal(0, 0.2, n), 0, 1)
        err = np.where(rng.random(n) < 0.3, np.nan, rng.gamma(2.0, 10.0 * (1.1 - conf)))
        got = machine_threshold(conf, f1, err, min_f1=0.7, max_direction_error=15.0, min_tiles=3)
        assert got == _naive_machine_threshold(list(conf), list(f1), list(err), 0.7, 15.0, 3)


# --------------------------------------------------------------------------- routing


def test_route_tiles_routes_and_unfamiliar_never_skip_or_machine():
    routed = route_tiles(_screen(), _card(), recall=0.98)
    th = routed.attrs["thresholds"]
    # Held-out areas descending: 300, 200, 150, 100, 80, 60, 50, 40, 20 (total 1000 px);
    # 980 px needs everything down to h7 (p 0.40): threshold 0.40.
    assert th["skip_p_deposit"] == pytest.approx(0.40)
    assert th["machine_confidence"] == pytest.approx(0.40)
    route = dict(zip(routed["tile_id"], routed["route"]))
    assert route["s0"] == "machine" and route["s1"] == "machine"  # confident, familiar
    assert route["s2"] == "machine"  # confidence min(0.60, 0.50) = 0.50 >= 0.40
    assert route["s3"] == "machine" and route["s4"] == "skip"  # s4: p 0.30 < 0.40
    assert route["s5"] == "skip"
    assert route["s6"] == "crowd" and route["s7"] == "crowd"  # unfamiliar (1.7, 1.4)
    assert route["s8"] == "crowd"  # unknown p_deposit cannot be skipped
    assert route["s9"] == "nodata"
    assert routed["unfamiliar"].tolist() == [False] * 6 + [True, True, False, False]
    unfamiliar = routed["unfamiliar"].to_numpy()
    assert set(routed.loc[unfamiliar, "route"]) == {"crowd"}


def test_route_tiles_no_machine_threshold_says_so():
    card = _card()
    for row in card["heldout_tiles"]:
        row["f1"] = 0.1
    routed = route_tiles(_screen(), card)
    assert routed.attrs["thresholds"]["machine_confidence"] is None
    assert "no tile is routed to machine" in routed.attrs["thresholds"]["machine_note"]
    assert "machine" not in set(routed["route"])


def test_route_tiles_from_detections_table():
    screen = _screen().drop(columns=["mean_score", "mean_direction_confidence", "n_detections"])
    detections = pd.DataFrame({
        "tile_id": ["s0", "s0", "s1", "s3"],
        "kind": ["fan", "spot", "fan", "spot"],
        "score": [0.9, 1.0, 0.3, 0.8],
        "direction_confidence": [0.8, np.nan, 0.9, np.nan],
    })
    summary = tile_detection_summary(detections)
    # Hand values: s0 mean score (0.9 + 1.0) / 2 = 0.95, direction confidence 0.8 (its fan only).
    assert summary.loc["s0", "mean_score"] == pytest.approx(0.95)
    assert summary.loc["s0", "mean_direction_confidence"] == pytest.approx(0.8)
    assert np.isnan(summary.loc["s3", "mean_direction_confidence"])
    routed = route_tiles(screen, _card(), detections=detections)
    route = dict(zip(routed["tile_id"], routed["route"]))
    assert route["s0"] == "machine"  # min(0.95, 0.8) = 0.8 >= 0.40
    assert route["s1"] == "crowd"  # min(0.3, 0.9) = 0.3 < 0.40
    assert route["s2"] == "crowd"  # no detections at all


# --------------------------------------------------------------------------- effort


def _crowd_frame(n_crowd, n_skip=2):
    n = n_crowd + n_skip
    return pd.DataFrame({
        "tile_id": [f"t{i}" for i in range(n)], "image": ["I"] * n,
        "p_deposit": [0.9] * n_crowd + [0.01] * n_skip,
        "unfamiliarity": [2.0] * n_crowd + [0.1] * n_skip,
        "route": [""] * n,
    })


def test_hours_on_hand_case():
    # 7 unfamiliar tiles go to crowd whatever the thresholds: 7 x 30 x 45 s / 3600 = 2.625 h.
    routed = route_tiles(_crowd_frame(7), _card())
    effort = estimate_effort(routed, _card(), classifications_per_tile=30, seconds_per_classification=45.0,
                             n_boot=50)
    assert effort["tiles"]["crowd"] == 7
    assert effort["classifications"] == 210
    assert effort["hours"] == pytest.approx(7 * 30 * 45 / 3600)
    assert effort["seconds_assumed"] is False
    # Default time per classification is an assumption and is said to be one.
    default = estimate_effort(routed, _card(), n_boot=50)
    assert default["hours"] == pytest.approx(7 * 30 * 60 / 3600)
    assert default["seconds_assumed"] is True
    assert any("assumed" in a for a in default["assumptions"])
    # Every bootstrap replicate routes the unfamiliar tiles to crowd, so the interval is exact.
    assert effort["interval_90"]["crowd_tiles"] == [7.0, 7.0]


def test_missed_share_from_heldout():
    # Threshold 0.40 at recall 0.98 skips h8 (20 px) and h9 (0 px): 20 / 1000 missed.
    routed = route_tiles(_screen(), _card(), recall=0.98)
    effort = estimate_effort(routed, _card(), n_boot=100)
    assert effort["missed_deposit_share"] == pytest.approx(0.02)
    assert effort["missed_deposit_share"] <= 1 - 0.98 + 1e-12


def test_bootstrap_deterministic_and_contains_point():
    screen = _screen()
    rng = np.random.default_rng(3)
    big = pd.concat([screen.assign(tile_id=screen["tile_id"] + f"_{k}",
                                   p_deposit=np.clip(screen["p_deposit"] + rng.normal(0, 0.05, 10), 0, 1))
                     for k in range(20)], ignore_index=True)
    routed = route_tiles(big, _card())
    a = estimate_effort(routed, _card(), seed=5, n_boot=300)
    b = estimate_effort(routed, _card(), seed=5, n_boot=300)
    assert a["interval_90"] == b["interval_90"]
    lo, hi = a["interval_90"]["crowd_tiles"]
    assert lo <= a["tiles"]["crowd"] <= hi
    assert a["interval_90"]["hours"][0] <= a["hours"] <= a["interval_90"]["hours"][1]
    # The missed share is judged out of bag, so it may exceed the in-sample 2 %; it is a share.
    miv = a["interval_90"]["missed_deposit_share"]
    assert 0.0 <= miv[0] <= miv[1] <= 1.0
    c = estimate_effort(routed, _card(), seed=6, n_boot=300)
    assert c["tiles"] == a["tiles"]


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
    assert "not reachable by this curve" in verdicts["fan_direction_median_deg"]["verdict"]


# --------------------------------------------------------------------------- command


def _args(model_dir, screen_dir, **kw):
    base = dict(model_dir=model_dir, screen_dir=screen_dir, classifications_per_tile=30,
                seconds_per_classification=None, recall=0.98, max_direction_error=20.0, learning_curve=None,
                out=None, seed=0)
    base.update(kw)
    return argparse.Namespace(**base)


@pytest.fixture
def folders(tmp_path, tiny_model):
    # A real model folder (effort checks its ONNX files and card), with the held-out table above.
    model = tmp_path / "model"
    shutil.copytree(tiny_model[0], model)
    card = json.loads((model / "model.json").read_text())
    (model / "model.json").write_text(json.dumps({**card, **_card()}))
    screen = tmp_path / "screen"
    screen.mkdir()
    tiles = _screen()
    tiles[["tile_id", "image", "p_deposit", "unfamiliarity", "route"]].assign(
        col0=0, row0=0, width=800, height=600, fan_cover=0.1, spot_cover=0.0, n_fans=1,
        mean_direction_deg=90.0, direction_scatter_deg=10.0).to_csv(screen / "tiles.csv", index=False)
    pd.DataFrame({"tile_id": ["s0", "s1", "s3"], "kind": ["fan", "fan", "spot"], "score": [0.95, 0.9, 0.5],
                  "direction_confidence": [0.9, 0.9, np.nan]}).to_csv(screen / "detections.csv", index=False)
    return model, screen


def test_run_effort_writes_outputs(folders, capsys):
    model, screen = folders
    effort_command(_args(model, screen))
    effort = json.loads((screen / "effort.json").read_text())
    routes = pd.read_csv(screen / "routes.csv")
    tiles = pd.read_csv(screen / "tiles.csv")
    assert list(routes.columns) == ["tile_id", "image", "route", "unfamiliar", "p_deposit", "unfamiliarity"]
    assert tiles["route"].tolist() == routes["route"].tolist()
    assert sum(effort["tiles"][r] for r in ("skip", "machine", "crowd", "nodata")) == 10
    assert effort["classifications"] == effort["tiles"]["crowd"] * 30
    assert "assumed; use your campaign's figure" in capsys.readouterr().out
    assert not list(screen.glob(".*tmp*"))


@pytest.mark.parametrize("case", ["no_folder", "no_tiles", "columns", "no_heldout", "recall0", "recall_big"])
def test_bad_inputs_raise_detector_error(folders, tmp_path, case):
    model, screen = folders
    args = _args(model, screen)
    message = {"no_folder": "does not exist", "no_tiles": "no tiles.csv", "columns": "lacks the column",
               "no_heldout": "heldout_tiles", "recall0": "recall", "recall_big": "recall"}[case]
    if case == "no_folder":
        args.screen_dir = tmp_path / "missing"
    elif case == "no_tiles":
        (screen / "tiles.csv").unlink()
    elif case == "columns":
        pd.read_csv(screen / "tiles.csv").drop(columns=["p_deposit"]).to_csv(screen / "tiles.csv", index=False)
    elif case == "no_heldout":
        card = json.loads((model / "model.json").read_text())
        del card["heldout_tiles"]
        (model / "model.json").write_text(json.dumps(card))
    else:
        args.recall = 0.0 if case == "recall0" else 1.5
    with pytest.raises(DetectorError, match=message):
        effort_command(args)


def test_cli_exit_code_two(folders, tmp_path):
    from training.cli import main

    model, _ = folders
    assert main(["effort", str(model), str(tmp_path / "missing")]) == 2
    assert main(["effort", str(model)]) == 2  # neither SCREEN_DIR nor --learning-curve


def test_run_effort_out_folder(folders, tmp_path):
    model, screen = folders
    out = tmp_path / "elsewhere"
    effort = run_effort(model, screen, out=out, seconds_per_classification=30.0, n_boot=100, log=lambda *_: None)
    assert (out / "effort.json").is_file() and (out / "routes.csv").is_file()
    assert effort["hours"] == pytest.approx(effort["tiles"]["crowd"] * 30 * 30 / 3600)


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
    import training.train as train_module
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


def test_run_effort_updates_the_geopackage_tile_routes(folders):
    from detector.gpkg import PIXEL_CRS_WKT, read_layer, write_polygon_layer

    model, screen = folders
    tiles = pd.read_csv(screen / "tiles.csv", dtype={"route": str}, keep_default_na=False)
    rings = [np.array([[i, 0.0], [i + 1.0, 0.0], [i + 1.0, -1.0]]) for i in range(len(tiles))]
    write_polygon_layer(screen / "detections.gpkg", "tiles", rings,
                        {"tile_id": tiles["tile_id"].to_numpy(dtype=object), "route": tiles["route"].to_numpy(dtype=object),
                         "p_deposit": pd.to_numeric(tiles["p_deposit"]).to_numpy(dtype=float)},
                        crs_wkt=PIXEL_CRS_WKT)
    run_effort(model, screen, n_boot=100, log=lambda *_: None)
    routed = pd.read_csv(screen / "tiles.csv", keep_default_na=False)
    _, back, fields = read_layer(screen / "detections.gpkg", "tiles")
    assert list(fields["route"]) == routed["route"].tolist() and set(fields["route"]) - {""}
    np.testing.assert_allclose(back[2][:3], rings[2])


def _write_run(screen, n_tiles, status="complete"):
    (screen / "run.json").write_text(json.dumps({"status": status, "counts": {"n_tiles": n_tiles}}))


@pytest.mark.parametrize("case", ["duplicate", "deleted", "p_deposit_text", "unfinished", "onnx_changed"])
def test_effort_refuses_edited_screens_and_models_by_name(folders, case, capsys):
    from training.cli import main

    model, screen = folders
    tiles = pd.read_csv(screen / "tiles.csv", dtype=str, keep_default_na=False)
    _write_run(screen, len(tiles), status="running" if case == "unfinished" else "complete")
    if case == "duplicate":
        pd.concat([tiles, tiles.iloc[[3]]]).to_csv(screen / "tiles.csv", index=False)
        words = ["row 11", "tile_id 's3'", "repeats row 4"]
    elif case == "deleted":
        tiles.drop(index=[2, 5]).to_csv(screen / "tiles.csv", index=False)
        words = ["has 8 tile rows", "produced 10"]
    elif case == "p_deposit_text":
        tiles.loc[4, "p_deposit"] = "abc"
        tiles.to_csv(screen / "tiles.csv", index=False)
        words = ["row 5", "p_deposit 'abc' is not a number"]
    elif case == "unfinished":
        words = ["status 'running'"]
    else:
        (model / "objects.onnx").write_bytes((model / "objects.onnx").read_bytes() + b"\0")
        words = ["objects.onnx", "changed after export"]
    before = (screen / "tiles.csv").read_bytes()
    assert main(["effort", str(model), str(screen)]) == 2
    err = capsys.readouterr().err
    assert err.count("frostvane: error:") == 1 and all(w in err for w in words), err
    assert not (screen / "effort.json").exists() and not (screen / "routes.csv").exists()
    assert (screen / "tiles.csv").read_bytes() == before
