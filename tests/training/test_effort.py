"""Tests of tile routing, its measured promises, the effort arithmetic and the effort command."""

import argparse
import datetime
import hashlib
import json
import shutil

import numpy as np
import pandas as pd
import pytest

from detector.errors import DetectorError
from training.effort.campaign import Campaign
from training.effort.effort import ScreenModelMismatch, check_screen_model, run_effort, write_effort_outputs
from training.effort.estimate import deposit_probability, estimate_effort
from training.effort.routing import machine_threshold, pooled_f1, route_tiles, skip_threshold, tile_detection_summary

# --------------------------------------------------------------------------- hand-made tables


def _heldout_row(tile_id, p, area, n_cons, n_det, tp, *, err=5.0, score=0.9, unf=0.5):
    f1 = 2 * tp / (n_det + n_cons) if n_det + n_cons else 1.0
    return {"tile_id": tile_id, "image_id": f"IMG_{tile_id}", "p_deposit": p, "consensus_px": area,
            "n_consensus": n_cons, "n_detections": n_det, "f1": f1, "fan_error_median_deg": err,
            "mean_score": score, "mean_direction_confidence": None, "unfamiliarity": unf}


def _card():
    """Held-out table of 10 one-tile images; 1000 px of deposits (worked through in the tests)."""
    rows = [
        _heldout_row("h0", 0.95, 300, 4, 4, 4, score=0.95, unf=0.3),
        _heldout_row("h1", 0.93, 200, 4, 4, 3, score=0.92, unf=0.4),
        _heldout_row("h2", 0.90, 150, 3, 3, 2, score=0.90, unf=0.5),
        _heldout_row("h3", 0.88, 100, 2, 2, 2, score=0.89, unf=0.3),
        _heldout_row("h4", 0.85, 80, 2, 2, 1, score=0.87, unf=0.4),
        _heldout_row("h5", 0.80, 60, 2, 2, 2, score=0.86, unf=0.5, err=12.0),
        _heldout_row("h6", 0.60, 50, 2, 4, 1, score=0.55, unf=0.6, err=60.0),
        _heldout_row("h7", 0.40, 40, 1, 1, 0, score=0.50, unf=0.7, err=None),
        _heldout_row("h8", 0.20, 20, 1, 1, 0, score=0.40, unf=0.8, err=None),
        _heldout_row("h9", 0.05, 0, 0, 0, 0, score=0.0, unf=0.9, err=None),
    ]
    return {"heldout_tiles": rows}


def _screen():
    """Screen table of 11 tiles with per-tile detection summaries."""
    return pd.DataFrame({
        "tile_id": [f"s{i}" for i in range(11)],
        "image": ["IMG_S"] * 11,
        "p_deposit": [0.99, 0.97, 0.90, 0.70, 0.30, 0.01, 0.02, 0.96, np.nan, 0.0, 0.50],
        "unfamiliarity": [0.3, 0.4, 0.5, 0.5, 0.6, 0.2, 1.7, 1.4, 0.5, np.nan, 0.3],
        "route": [""] * 9 + ["nodata", ""],
        "mean_score": [0.95, 0.90, 0.60, 0.86, 0.45, 0.0, 0.0, 0.99, 0.5, 0.0, 0.0],
        "n_detections": [4, 3, 2, 1, 1, 0, 0, 5, 1, 0, 0],
    })


# Thresholds of the hand table, worked once for every test below:
# - unfamiliar: 95 % of 10 tiles is 9.5, so the 10th smallest unfamiliarity, 0.9, is the cut;
# - skip: areas by p_deposit descending 300, 200, 150, 100, 80, 60, 50, 40, 20 (1000 px); 98 % = 980 px
#   needs everything down to h7 (p 0.40): tiles below 0.40 (h8, h9) are skipped, losing 20 px = 2 %;
# - machine: eligible h0..h7 (detections, familiar, not skipped); by mean score, pooled F1 over
#   h0..h4 (score >= 0.87) is 2 * 12 / 30 = 0.800, h0..h5 (>= 0.86) 2 * 14 / 34 = 0.824, with h6
#   (>= 0.55) 2 * 15 / 40 = 0.750, with h7 (>= 0.50) 2 * 15 / 42 = 0.714. The smallest qualifying
#   threshold for F1 >= 0.8 is 0.86 (6 tiles, 6 of the 9 deposit tiles; median direction error 5 deg).
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


def _naive_machine_threshold(conf, tp, det, cons, err, min_f1, max_err, min_tiles):
    """Oracle: try every confidence in increasing order; the first whose set keeps the promise."""
    for c in sorted(set(conf)):
        inside = [i for i in range(len(conf)) if conf[i] >= c]
        errs = [err[i] for i in inside if not np.isnan(err[i])]
        den = sum(det[i] + cons[i] for i in inside)
        f1 = 2 * sum(tp[i] for i in inside) / den if den else np.nan
        if len(inside) >= min_tiles and f1 >= min_f1 and errs and np.median(errs) <= max_err:
            return c
    return None


def _held_arrays(card):
    held = pd.DataFrame(card["heldout_tiles"])
    held = held[held["p_deposit"] >= 0.40]  # the skip threshold of the hand table
    held = held[held["n_detections"] > 0]
    tp = np.round(held["f1"] * (held["n_detections"] + held["n_consensus"]) / 2)
    err = pd.to_numeric(held["fan_error_median_deg"]).to_numpy(float)
    return held["mean_score"].to_numpy(float), tp, held["n_detections"], held["n_consensus"], err


def test_pooled_f1_by_hand():
    # 12 matched of 14 detections and 16 consensus features: 2 * 12 / 30 = 0.8.
    assert pooled_f1([4, 3, 5], [4, 5, 5], [5, 6, 5]) == pytest.approx(0.8)
    assert np.isnan(pooled_f1([0], [0], [0]))


def test_machine_threshold_on_hand_table():
    conf, tp, det, cons, err = _held_arrays(_card())
    assert machine_threshold(conf, tp, det, cons, err, min_f1=0.8) == pytest.approx(0.86)
    # F1 0.75 is met down to 0.55 (h6 in, 0.750) but not at 0.50 (0.714).
    assert machine_threshold(conf, tp, det, cons, err, min_f1=0.75) == pytest.approx(0.55)
    # A direction target of 4 deg is never met (the best median is 5 deg).
    assert machine_threshold(conf, tp, det, cons, err, max_direction_error=4.0) is None
    # Needing 7 tiles: the 7-tile set has F1 0.75 < 0.8, so nothing qualifies.
    assert machine_threshold(conf, tp, det, cons, err, min_tiles=7) is None


def test_machine_threshold_matches_naive_oracle():
    rng = np.random.default_rng(11)
    for _ in range(40):
        n = int(rng.integers(1, 25))
        conf = np.round(rng.random(n), 2)
        det = rng.integers(1, 10, n)
        cons = rng.integers(0, 10, n)
        tp = np.minimum(det, cons) * np.clip(conf + rng.normal(0, 0.2, n), 0, 1)
        tp = np.round(tp)
        err = np.where(rng.random(n) < 0.3, np.nan, rng.gamma(2.0, 10.0 * (1.1 - conf)))
        got = machine_threshold(conf, tp, det, cons, err, min_f1=0.7, max_direction_error=15.0, min_tiles=3)
        assert got == _naive_machine_threshold(list(conf), list(tp), list(det), list(cons), list(err), 0.7, 15.0, 3)


# --------------------------------------------------------------------------- routing


def test_route_tiles_routes_reasons_and_promises():
    routed = route_tiles(_screen(), _card())
    th = routed.attrs["thresholds"]
    assert th["skip_p_deposit"] == pytest.approx(0.40)
    assert th["machine_confidence"] == pytest.approx(0.86)
    assert th["unfamiliar_cut"] == pytest.approx(0.9)
    route = dict(zip(routed["tile_id"], routed["route"]))
    assert [route[f"s{i}"] for i in range(11)] == [
        "machine", "machine", "crowd", "machine",  # s3 is tied at 0.86: kept for the machine
        "skip", "skip",  # p_deposit 0.30 and 0.01 < 0.40
        "crowd", "crowd",  # unfamiliar (1.7, 1.4 > 0.9), whatever their scores
        "crowd", "nodata",  # unknown p_deposit cannot be skipped; no data
        "crowd",  # p 0.50 >= 0.40 but no detection
    ]
    reason = dict(zip(routed["tile_id"], routed["reason"]))
    assert reason["s6"].startswith("crowd, unfamiliar: unfamiliarity 1.70 above 0.90")
    assert reason["s3"].startswith("machine: 1 detection(s), mean score 0.860 >= 0.860")
    assert reason["s2"].startswith("crowd: 2 detection(s), mean score 0.600 below the machine's 0.860")
    assert reason["s10"] == "crowd: p_deposit 0.500 at or above 0.400 but no detection"
    # The promises with their values measured on the held-out tiles.
    m = th["measured_heldout"]
    assert m["missed_deposit_share"] == pytest.approx(0.02)
    assert m["machine_tiles"] == 6 and m["machine_f1"] == pytest.approx(28 / 34)
    assert m["machine_direction_median_deg"] == pytest.approx(5.0)
    assert m["machine_deposit_share"] == pytest.approx(6 / 9)
    assert "pooled object F1 >= 0.8" in th["machine_note"]
    grid = {row["min_f1"]: row for row in th["promise_grid"]}
    # F1 >= 0.7 reaches down to h7 (0.714, 8 tiles); no set of 5 or more reaches 0.9.
    assert grid[0.7]["machine_tiles"] == 8 and grid[0.9]["machine_tiles"] == 0


def test_a_tile_with_detections_is_never_skipped_without_saying_why():
    # Screen and effort agree: every skipped tile that the screen found deposits on says so, for
    # random screens as well as the hand table.
    rng = np.random.default_rng(5)
    n = 200
    screen = pd.DataFrame({"tile_id": [f"r{i}" for i in range(n)], "image": "I", "p_deposit": rng.random(n),
                           "unfamiliarity": rng.random(n), "route": "",
                           "mean_score": rng.random(n), "n_detections": rng.integers(0, 4, n)})
    for table in (screen, _screen()):
        routed = route_tiles(table, _card())
        skipped = routed[routed["route"].eq("skip") & (routed["n_detections"] > 0)]
        assert len(skipped) > 0
        assert skipped["reason"].str.contains(r"its \d+ detection\(s\) \(best score", regex=True).all()
        assert routed["reason"].str.len().gt(0).all()
        # Tiles without detections are never routed to the machine.
        assert not (routed["route"].eq("machine") & routed["n_detections"].eq(0)).any()


def test_unfamiliar_reason_names_the_feature_groups():
    # s6: score 1.70 over the cut 0.9; its squared distance 64 % co-occurrence texture, 25 % gradient
    # histograms, 6 % intensity, 5 % structure. Without co-occurrence: 1.70 * sqrt(0.36) = 1.02, still
    # above 0.9; without gradients 1.70 * sqrt(0.75) = 1.47. s7: 1.40, 90 % intensity: without it
    # 1.40 * sqrt(0.1) = 0.44, within the cut.
    from detector.inference.unfamiliar import SHARE_COLUMNS

    screen = _screen()
    for column in SHARE_COLUMNS:
        screen[column] = 0.0
    screen.loc[6, ["unfamiliarity_share_cooccurrence", "unfamiliarity_share_gradients",
                   "unfamiliarity_share_intensity", "unfamiliarity_share_structure"]] = [0.64, 0.25, 0.06, 0.05]
    screen.loc[7, ["unfamiliarity_share_intensity", "unfamiliarity_share_polarity"]] = [0.9, 0.1]
    reason = dict(zip(*route_tiles(screen, _card())[["tile_id", "reason"]].to_numpy().T))
    assert reason["s6"] == ("crowd, unfamiliar: unfamiliarity 1.70 above 0.90, the value 95% of held-out tiles stay "
                            "within; share of its squared distance from the training tiles: co-occurrence texture "
                            "64% (1.02 without it), gradient histograms 25% (1.47 without it); no single group's "
                            "removal brings it within the cut")
    assert reason["s7"].endswith("intensity and darkness 90% (0.44 without it), polarity along the axis 10% "
                                 "(1.33 without it); without intensity and darkness alone it would pass")
    # A screening made before the groups were recorded says so.
    assert "feature groups were not recorded" in route_tiles(_screen(), _card())["reason"][6]


def test_a_smoothed_tile_is_unfamiliar_whatever_its_features_and_says_why():
    # s0 (machine) and s4 (skip) were noisier than every fitting tile (limit 2.0 grey levels in the card),
    # so they were smoothed before detection: neither is trusted to the machine nor skipped.
    screen = _screen()
    screen["noise_8bit"] = 1.5
    screen["smoothed"] = False
    screen.loc[[0, 4], ["noise_8bit", "smoothed"]] = [[3.2, True], [2.6, True]]
    card = _card()
    card["noise"] = {"limit": 2.0 / 255, "target": 1.0 / 255}
    routed = route_tiles(screen, card)
    route = dict(zip(routed["tile_id"], routed["route"]))
    assert route["s0"] == "crowd" and route["s4"] == "crowd"
    assert routed["unfamiliar"].tolist()[:5] == [True, False, False, False, True]
    assert routed.loc[0, "reason"] == ("crowd, unfamiliar: noise 3.2 grey levels, above the noisiest fitting tile's "
                                       "2.0; the model never met such a tile, so it was smoothed before detection "
                                       "and its detections are not trusted")
    assert routed.loc[0, "unfamiliarity"] == screen.loc[0, "unfamiliarity"]  # the column is left as measured
    # The other tiles keep the routes they had (a screen written as CSV gives "True"/"False" too).
    plain = dict(zip(*route_tiles(_screen(), _card())[["tile_id", "route"]].to_numpy().T))
    assert all(route[t] == plain[t] for t in route if t not in ("s0", "s4"))
    screen["smoothed"] = screen["smoothed"].map(str)
    assert route_tiles(screen, card)["route"].tolist() == routed["route"].tolist()


def test_unfamiliar_cut_follows_the_pass_share():
    # pass share 0.8: sorted held-out unfamiliarity 0.3, 0.3, 0.4, 0.4, 0.5, 0.5, 0.6, 0.7, 0.8, 0.9;
    # the 8th smallest (0.7) is the cut, so 8 of 10 pass and h8, h9 would not; s4 (0.6) passes.
    routed = route_tiles(_screen(), _card(), pass_share=0.8)
    assert routed.attrs["thresholds"]["unfamiliar_cut"] == pytest.approx(0.7)
    assert routed["unfamiliar"].tolist() == [False] * 6 + [True, True] + [False] * 3


def test_no_machine_threshold_says_so():
    card = _card()
    for row in card["heldout_tiles"]:
        row["f1"] = 0.1
    routed = route_tiles(_screen(), card)
    assert routed.attrs["thresholds"]["machine_confidence"] is None
    assert "no tile is routed to machine" in routed.attrs["thresholds"]["machine_note"]
    assert "machine" not in set(routed["route"])
    assert "no confidence threshold keeps the machine's promise" in routed.loc[2, "reason"]


def test_route_tiles_from_detections_table():
    screen = _screen().drop(columns=["mean_score", "n_detections"])
    detections = pd.DataFrame({
        "tile_id": ["s0", "s0", "s1", "s3"],
        "kind": ["fan", "spot", "fan", "spot"],
        "score": [0.9, 1.0, 0.3, 0.8],
        "direction_confidence": [0.8, np.nan, 0.9, np.nan],
    })
    summary = tile_detection_summary(detections)
    # Hand values: s0 mean score (0.9 + 1.0) / 2 = 0.95, best 1.0, direction confidence 0.8 (its fan only).
    assert summary.loc["s0", "mean_score"] == pytest.approx(0.95)
    assert summary.loc["s0", "max_score"] == pytest.approx(1.0)
    assert summary.loc["s0", "mean_direction_confidence"] == pytest.approx(0.8)
    assert np.isnan(summary.loc["s3", "mean_direction_confidence"])
    routed = route_tiles(screen, _card(), detections=detections)
    route = dict(zip(routed["tile_id"], routed["route"]))
    assert route["s0"] == "machine"  # 0.95 >= 0.86
    assert route["s1"] == "crowd"  # 0.3 < 0.86
    assert route["s2"] == "crowd"  # no detections at all
    assert route["s3"] == "crowd"  # 0.8 < 0.86


# --------------------------------------------------------------------------- effort


def test_deposit_probability_is_the_presence_calibration():
    # Every held-out tile at one p_deposit: the fit is the intercept alone, Firth's (k + 1/2) / (n + 1)
    # (Firth 1993, Biometrika 80, section 3): 1 deposit tile of 4 -> 1.5 / 5 = 0.3, at any p.
    q = deposit_probability([0.5] * 4, [0, 1, 0, 0], [0.0, 0.5, 0.9, np.nan])
    assert q == pytest.approx([0.3, 0.3, 0.3, 1.0])
    # A rising relation is kept rising, and NaN held-out values are left out.
    q = deposit_probability([0.2, 0.4, 0.6, 0.8, np.nan], [0, 0, 1, 1, 0], [0.1, 0.5, 0.95])
    assert np.all(np.diff(q) > 0) and 0.0 < q[0] < 0.5 < q[2] < 1.0


def test_effort_arithmetic_by_hand():
    # Crowd tiles s2, s6, s7, s8, s10 with 12, 30, 40, 0, 25 classifications of 30 needed:
    # 18 + 0 + 0 + 30 + 5 = 53 left; at 45 s, 53 * 45 / 3600 = 0.6625 h; at 20 a day 2.65 days.
    # Skip tiles s4, s5 (none yet) would need 60, machine tiles s0, s1, s3 90: 203 without routing.
    routed = route_tiles(_screen(), _card())
    have = pd.Series({"s2": 12, "s6": 30, "s7": 40, "s10": 25, "elsewhere": 3})
    campaign = Campaign(classifications_needed=30, seconds_per_classification=45.0, classifications_per_day=20,
                        start_date=datetime.date(2026, 3, 1))
    effort = estimate_effort(routed, _card(), campaign=campaign, have=have, n_boot=50)
    assert effort["classifications"] == 53
    assert effort["hours"] == pytest.approx(53 * 45 / 3600)
    assert effort["by_route"]["skip"]["classifications"] == 60
    assert effort["by_route"]["machine"]["classifications"] == 90
    assert effort["classifications_without_routing"] == 203
    assert effort["tiles"]["finished"] == 2 and effort["tiles"]["skipped_with_detections"] == 1
    assert effort["days"] == pytest.approx(2.65)
    lo, hi = effort["interval_90"]["days"]
    assert effort["dates"] == [(datetime.date(2026, 3, 1) + datetime.timedelta(days=int(np.ceil(d)))).isoformat()
                               for d in (lo, hi)]
    # Truly needed (expected): each tile's classifications left times its presence probability
    # (tests/training/test_presence.py holds that calibration to its references): s2 (18 left),
    # s10 (5), the skipped s4 and s5 (30 each); s8 has no p_deposit and counts in full (30); the
    # unfamiliar s6, s7 count in full but have none left; machine tiles count for nothing.
    held = pd.DataFrame(_card()["heldout_tiles"])
    q = dict(zip(routed["tile_id"], deposit_probability(held["p_deposit"], held["consensus_px"] > 0,
                                                        routed["p_deposit"])))
    expected = 18 * q["s2"] + 5 * q["s10"] + 30 * q["s4"] + 30 * q["s5"] + 30
    assert effort["expected_needed"]["classifications"] == pytest.approx(expected)
    assert effort["expected_needed"]["on_skipped_tiles"]["classifications"] == pytest.approx(30 * (q["s4"] + q["s5"]))
    assert effort["expected_needed"]["on_unfamiliar_tiles"] == 0
    assert effort["machine"]["machine_f1"] == pytest.approx(28 / 34)
    assert effort["missed_deposit_share"] == pytest.approx(0.02)
    assert effort["campaign"]["seconds_assumed"] is False


def test_default_campaign_is_stated_as_assumed():
    routed = route_tiles(_screen(), _card())
    effort = estimate_effort(routed, _card(), n_boot=20)
    # No classifications given: every crowd tile needs 30 at the assumed 60 s.
    assert effort["classifications"] == 5 * 30
    assert effort["hours"] == pytest.approx(5 * 30 * 60 / 3600)
    assert effort["campaign"]["seconds_assumed"] is True
    text = " ".join(effort["assumptions"])
    assert "assumed" in text and "common practice" in text and "no tile has any classification" in text


def test_bootstrap_by_image_is_deterministic_and_exact_when_routes_cannot_move():
    screen = _screen()
    a = estimate_effort(route_tiles(screen, _card()), _card(), seed=5, n_boot=200)
    b = estimate_effort(route_tiles(screen, _card()), _card(), seed=5, n_boot=200)
    assert a["interval_90"] == b["interval_90"]
    assert a["interval_90"]["n_boot"] == 200
    lo, hi = a["interval_90"]["machine_f1"]
    assert 0.0 <= lo <= hi <= 1.0
    # Only unfamiliar tiles (far above every resample's cut): every resample sends them to the crowd.
    frame = pd.DataFrame({"tile_id": [f"t{i}" for i in range(7)], "image": "I", "p_deposit": 0.9,
                          "unfamiliarity": 5.0, "route": ""})
    effort = estimate_effort(route_tiles(frame, _card()), _card(), n_boot=50)
    assert effort["classifications"] == 210
    assert effort["interval_90"]["classifications"] == [210.0, 210.0]


def _presence_card(p, has_deposit, image_ids):
    # Held-out tiles without detections: no machine route, so only the presence calibration is at work.
    rows = [{"tile_id": f"h{i}", "image_id": str(img), "p_deposit": float(pi), "consensus_px": 100 * int(y),
             "n_consensus": int(y), "n_detections": 0, "f1": 0.0, "fan_error_median_deg": None,
             "mean_score": 0.0, "unfamiliarity": 0.5} for i, (pi, y, img) in enumerate(zip(p, has_deposit, image_ids))]
    return {"heldout_tiles": rows}


def _screen_at(p):
    return pd.DataFrame({"tile_id": [f"s{i}" for i in range(len(p))], "image": "S", "p_deposit": p,
                         "unfamiliarity": 0.5, "route": ""})


def test_needed_interval_draws_each_tiles_presence():
    """With the calibration pinned, the interval is the binomial one of which tiles hold deposits.

    One held-out image of 40 tiles, all at p_deposit 0.9, 29 with deposits: every resample of images
    is that image, so the presence probability is Firth's (29 + 0.5) / 41 = 0.7195 in every
    resample. 100 screened tiles at p 0.9 with none classified: the tiles truly needing people are
    Binomial(100, 0.7195), so the 90 % interval is 30 x its 5 % and 95 % quantiles (scipy.stats.binom),
    up to the Monte Carlo error of 1000 draws (one tile either way).
    """
    from scipy.stats import binom

    card = _presence_card([0.9] * 40, [1] * 29 + [0] * 11, ["A"] * 40)
    effort = estimate_effort(route_tiles(_screen_at([0.9] * 100), card), card, n_boot=1000, seed=3)
    q = 29.5 / 41
    needed = effort["expected_needed"]
    assert needed["classifications"] == pytest.approx(30 * 100 * q)
    lo, hi = needed["interval_90"]
    assert abs(lo / 30 - binom.ppf(0.05, 100, q)) <= 1 and abs(hi / 30 - binom.ppf(0.95, 100, q)) <= 1
    # Resampling the (pinned) calibration alone gives no spread: the variance the draws add.
    assert needed["interval_90_calibration_only"] == pytest.approx([30 * 100 * q] * 2)


def test_needed_interval_covers_at_its_stated_rate():
    """Coverage in a world whose truth is known: presence ~ Bernoulli(expit(-1 + 1.5 logit p)).

    40 repetitions, each with 30 held-out images of 4 tiles and 40 new tiles drawn alike. A 90 %
    interval that holds covers the new tiles' true classifications in Binomial(40, 0.9) of them, at
    least its 1 % quantile (scipy.stats.binom); the interval of the calibration's resampling alone
    covers far fewer (200 repetitions when this test was written: 0.925 against 0.595), since it
    leaves out which tiles truly hold deposits.
    """
    from scipy.special import expit, logit
    from scipy.stats import binom

    def world(rng, n):
        p = rng.beta(5.0, 1.0, size=n)
        return p, rng.random(n) < expit(-1.0 + 1.5 * logit(p))

    reps = 40
    covered = {"interval_90": 0, "interval_90_calibration_only": 0}
    for rep in range(reps):
        rng = np.random.default_rng(100 + rep)
        p, y = world(rng, 120)
        card = _presence_card(p, y, np.arange(120) // 4)
        p_new, y_new = world(rng, 40)
        needed = estimate_effort(route_tiles(_screen_at(p_new), card), card, n_boot=200, seed=rep)["expected_needed"]
        for key in covered:
            lo, hi = needed[key]
            covered[key] += lo <= 30 * y_new.sum() <= hi
    assert covered["interval_90"] >= binom.ppf(0.01, reps, 0.9)
    assert covered["interval_90_calibration_only"] < binom.ppf(0.01, reps, 0.9)
    assert covered["interval_90"] - covered["interval_90_calibration_only"] >= 6


def test_machine_spread_is_a_named_range_below_five_images():
    # Six machine tiles (h0..h5) from 3 images: too few for an interval, so the route's figures are the
    # range of its images'. Pooled F1 by hand (matched / detections / consensus of the hand table):
    # A = h0 + h1 (4 + 3 of 8 + 8) = 14 / 16 = 0.875; B = h2 + h3 (2 + 2 of 5 + 5) = 8 / 10 = 0.8;
    # C = h4 + h5 (1 + 2 of 4 + 4) = 6 / 8 = 0.75. Median direction errors 5, 5 and 8.5 (5 and 12) deg.
    card = _card()
    for row, image in zip(card["heldout_tiles"], "AABBCCDEFG"):
        row["image_id"] = image
    effort = estimate_effort(route_tiles(_screen(), card), card, n_boot=50)
    spread = effort["machine"]["spread"]
    assert spread["kind"] == "range" and spread["images"] == 3
    assert spread["f1"] == pytest.approx([0.75, 0.875])
    assert spread["direction_median_deg"] == pytest.approx([5.0, 8.5])
    assert "too few for an interval" in spread["label"]
    from training.effort.estimate import effort_summary

    assert "range over the 3 held-out image(s)" in effort_summary(effort)
    # The hand table's own one-tile images: six images carry machine tiles, so the out-of-bag interval stands.
    effort = estimate_effort(route_tiles(_screen(), _card()), _card(), n_boot=50)
    assert effort["machine"]["spread"]["kind"] == "interval"
    assert effort["machine"]["spread"]["f1"] == effort["interval_90"]["machine_f1"]


# --------------------------------------------------------------------------- command


def _args(model_dir, screen_dir, **kw):
    base = dict(model_dir=model_dir, screen_dir=screen_dir, campaign=None, classifications_needed=None,
                classifications=None, seconds_per_classification=None, classifications_per_day=None,
                start_date=None, recall=0.98, min_f1=0.8, max_direction_error=20.0, pass_share=0.95,
                next_tiles=None, learning_curve=None, out=None, seed=0)
    base.update(kw)
    return argparse.Namespace(**base)


def _effort(args):
    """``frostvane effort`` on parsed options (the command line's own mapping onto the library call)."""
    overrides = {key: getattr(args, key) for key in ("classifications_needed", "classifications",
                                                     "seconds_per_classification", "classifications_per_day",
                                                     "start_date")}
    write_effort_outputs(args.model_dir, args.screen_dir, campaign_file=args.campaign, campaign_overrides=overrides,
                         out=args.out, recall=args.recall, min_f1=args.min_f1,
                         max_direction_error=args.max_direction_error, pass_share=args.pass_share,
                         next_tiles=args.next_tiles, learning_curve_root=args.learning_curve, seed=args.seed)


def _write_run(screen, model, *, n_tiles=None, status="complete"):
    """The screening's run record: finished, its tile count and the hash of the model that made it."""
    digest = hashlib.sha256((model / "model.json").read_bytes()).hexdigest()
    n_tiles = len(pd.read_csv(screen / "tiles.csv")) if n_tiles is None else n_tiles
    (screen / "run.json").write_text(json.dumps({"status": status, "counts": {"n_tiles": n_tiles},
                                                 "parameters": {"model_hash": digest}}))


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
    pd.DataFrame({"tile_id": ["s0", "s1", "s3", "s4"], "kind": ["fan", "fan", "spot", "spot"],
                  "score": [0.95, 0.9, 0.9, 0.45], "direction_confidence": [0.9, 0.9, np.nan, np.nan]}
                 ).to_csv(screen / "detections.csv", index=False)
    _write_run(screen, model)
    return model, screen


def test_run_effort_writes_outputs(folders, tmp_path, capsys):
    model, screen = folders
    (tmp_path / "campaign.toml").write_text('classifications_needed = 20\nseconds_per_classification = 30\n'
                                            'classifications_per_day = 10\nstart_date = 2026-03-01\n'
                                            'classifications = "have.csv"\n')
    pd.DataFrame({"tile_id": ["s2", "s8"], "classifications": [5, 20]}).to_csv(tmp_path / "have.csv", index=False)
    _effort(_args(model, screen, campaign=tmp_path / "campaign.toml"))
    effort = json.loads((screen / "effort.json").read_text())
    routes = pd.read_csv(screen / "routes.csv")
    tiles = pd.read_csv(screen / "tiles.csv")
    assert list(routes.columns) == ["tile_id", "image", "route", "reason", "unfamiliar", "p_deposit",
                                    "unfamiliarity", "n_detections", "confidence", "classifications_have",
                                    "classifications_left"]
    assert tiles["route"].tolist() == routes["route"].tolist()
    # Crowd tiles s2 (15 left), s6, s7 (20 each), s8 (0), s10 (20): 75; at 30 s, 0.625 h; 7.5 days.
    assert routes["classifications_left"].sum() == effort["classifications"] == 75
    assert effort["hours"] == pytest.approx(75 * 30 / 3600)
    assert effort["dates"] is not None and effort["tiles"]["listed_in_classifications"] == 2
    out = capsys.readouterr().out
    assert "7.5 days" in out and "wrote" in out
    assert (screen / "effort.png").stat().st_size > 1000 and (screen / "hours.png").stat().st_size > 1000
    assert not list(screen.glob(".*tmp*"))


def test_effort_refuses_a_screening_of_another_model(folders):
    model, screen = folders
    check_screen_model(model, screen)  # the fixture's own model: accepted
    card = json.loads((model / "model.json").read_text())
    card["heldout_tiles"][0]["p_deposit"] = 0.951  # any change to the card is another model
    (model / "model.json").write_text(json.dumps(card))
    before = (screen / "tiles.csv").read_bytes()
    with pytest.raises(ScreenModelMismatch, match="made by another model"):
        run_effort(model, screen, log=lambda *_: None)
    assert (screen / "tiles.csv").read_bytes() == before and not (screen / "effort.json").exists()
    (screen / "run.json").unlink()
    with pytest.raises(ScreenModelMismatch, match="no model_hash"):
        check_screen_model(model, screen)


@pytest.mark.parametrize("case", ["no_folder", "no_tiles", "columns", "no_heldout", "recall0", "recall_big",
                                  "min_f1", "pass_share"])
def test_bad_inputs_raise_detector_error(folders, tmp_path, case):
    model, screen = folders
    args = _args(model, screen)
    message = {"no_folder": "does not exist", "no_tiles": "no tiles.csv", "columns": "lacks the column",
               "no_heldout": "heldout_tiles", "recall0": "recall", "recall_big": "recall", "min_f1": "min_f1",
               "pass_share": "pass share"}[case]
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
        _write_run(screen, model)
    elif case == "min_f1":
        args.min_f1 = 1.5
    elif case == "pass_share":
        args.pass_share = 0.0
    else:
        args.recall = 0.0 if case == "recall0" else 1.5
    with pytest.raises(DetectorError, match=message):
        _effort(args)


def test_cli_exit_code_two(folders, tmp_path):
    from frostvane.cli import main

    model, screen = folders
    assert main(["effort", str(model), str(tmp_path / "missing")]) == 2
    assert main(["effort", str(model)]) == 2  # neither SCREEN_DIR nor --learning-curve
    (tmp_path / "bad.json").write_text('{"classifications_needed": -1}')
    assert main(["effort", str(model), str(screen), "--campaign", str(tmp_path / "bad.json")]) == 2
    assert main(["effort", str(model), str(screen), "--classifications-needed", "25",
                 "--seconds-per-classification", "20", "--out", str(tmp_path / "o")]) == 0
    assert json.loads((tmp_path / "o" / "effort.json").read_text())["classifications"] == 5 * 25


def test_effort_on_a_real_screening_of_the_demo_tiles(tmp_path):
    """End to end: the shipped model screens two demo tiles; effort accepts it and explains every route."""
    from pathlib import Path

    from detector.screening.run import screen

    root = Path(__file__).resolve().parents[2]
    tiles = pd.read_csv(root / "demo_tiles" / "tiles.csv").head(2)
    (tmp_path / "set" / "images").mkdir(parents=True)
    for rel in tiles["path"]:
        shutil.copyfile(root / "demo_tiles" / rel, tmp_path / "set" / rel)
    tiles.to_csv(tmp_path / "set" / "tiles.csv", index=False)
    screen(root / "models" / "demo", [tmp_path / "set"], tmp_path / "screen", progress=False)
    effort = run_effort(root / "models" / "demo", tmp_path / "screen", n_boot=50, plots=False,
                        campaign=Campaign(classifications=root / "demo_tiles"), log=lambda *_: None)
    routes = pd.read_csv(tmp_path / "screen" / "routes.csv")
    detections = pd.read_csv(tmp_path / "screen" / "detections.csv")
    from detector.inference.unfamiliar import SHARE_COLUMNS

    shares = pd.read_csv(tmp_path / "screen" / "tiles.csv")[list(SHARE_COLUMNS)]
    np.testing.assert_allclose(shares.sum(axis=1), 1.0, rtol=1e-9)
    counted = detections.groupby("tile_id").size().reindex(routes["tile_id"]).fillna(0).to_numpy()
    assert routes["n_detections"].tolist() == counted.tolist()
    assert routes["reason"].str.match(r"^(skip|machine|crowd|nodata)").all()
    have = tiles.set_index("tile_id")["classifications"].reindex(routes["tile_id"]).to_numpy()
    assert routes["classifications_have"].tolist() == have.tolist()
    assert effort["classifications"] == int(np.where(routes["route"] == "crowd", np.maximum(30 - have, 0), 0).sum())


def test_run_effort_updates_the_geopackage_tile_routes(folders):
    from detector.gis.gpkg import PIXEL_CRS_WKT, read_layer, write_polygon_layer

    model, screen = folders
    tiles = pd.read_csv(screen / "tiles.csv", dtype={"route": str}, keep_default_na=False)
    rings = [np.array([[i, 0.0], [i + 1.0, 0.0], [i + 1.0, -1.0]]) for i in range(len(tiles))]
    write_polygon_layer(screen / "detections.gpkg", "tiles", rings,
                        {"tile_id": tiles["tile_id"].to_numpy(dtype=object), "route": tiles["route"].to_numpy(dtype=object),
                         "p_deposit": pd.to_numeric(tiles["p_deposit"]).to_numpy(dtype=float)},
                        crs_wkt=PIXEL_CRS_WKT)
    run_effort(model, screen, n_boot=100, plots=False, log=lambda *_: None)
    routed = pd.read_csv(screen / "tiles.csv", keep_default_na=False)
    _, back, fields = read_layer(screen / "detections.gpkg", "tiles")
    assert list(fields["route"]) == routed["route"].tolist() and set(fields["route"]) - {""}
    np.testing.assert_allclose(back[2][:3], rings[2])


@pytest.mark.parametrize("case", ["duplicate", "deleted", "p_deposit_text", "unfamiliarity_negative", "unfinished",
                                  "onnx_changed", "card_heldout_text"])
def test_effort_refuses_edited_screens_and_models_by_name(folders, case, capsys):
    from frostvane.cli import main

    model, screen = folders
    tiles = pd.read_csv(screen / "tiles.csv", dtype=str, keep_default_na=False)
    _write_run(screen, model, n_tiles=len(tiles), status="running" if case == "unfinished" else "complete")
    if case == "duplicate":
        pd.concat([tiles, tiles.iloc[[3]]]).to_csv(screen / "tiles.csv", index=False)
        words = ["row 12", "tile_id 's3'", "repeats row 4"]
    elif case == "deleted":
        tiles.drop(index=[2, 5]).to_csv(screen / "tiles.csv", index=False)
        words = ["has 9 tile rows", "produced 11"]
    elif case == "p_deposit_text":
        tiles.loc[4, "p_deposit"] = "abc"
        tiles.to_csv(screen / "tiles.csv", index=False)
        words = ["row 5", "p_deposit 'abc' is not a number"]
    elif case == "unfamiliarity_negative":
        # a distance is never negative (a Mahalanobis-type distance, common practice)
        tiles.loc[2, "unfamiliarity"] = "-1"
        tiles.to_csv(screen / "tiles.csv", index=False)
        words = ["row 3", "unfamiliarity -1"]
    elif case == "unfinished":
        words = ["status 'running'"]
    elif case == "card_heldout_text":
        card = json.loads((model / "model.json").read_text())
        card["heldout_tiles"][1]["p_deposit"] = "x"
        (model / "model.json").write_text(json.dumps(card))
        _write_run(screen, model, n_tiles=len(tiles), status="complete")  # the screening names the edited card
        words = ["heldout_tiles entry 2", "p_deposit 'x'"]
    else:
        (model / "objects.onnx").write_bytes((model / "objects.onnx").read_bytes() + b"\0")
        words = ["objects.onnx", "changed after export"]
    before = (screen / "tiles.csv").read_bytes()
    assert main(["effort", str(model), str(screen)]) == 2
    err = capsys.readouterr().err
    assert err.count("frostvane: error:") == 1 and all(w in err for w in words), err
    assert not (screen / "effort.json").exists() and not (screen / "routes.csv").exists()
    assert (screen / "tiles.csv").read_bytes() == before
