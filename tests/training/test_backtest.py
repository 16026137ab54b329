"""The effort backtest: campaign states, the comparison rows and a short end-to-end run."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from detector.errors import DetectorError
from training.effort.backtest import (
    CAMPAIGN_STATES,
    _row,
    backtest,
    backtest_table,
    campaign_state,
    jeffreys_interval,
    machine_measured,
    route_promises,
)

MODEL_DIR = Path(__file__).resolve().parents[2] / "models" / "demo"


def test_campaign_states():
    ids = [f"t{i}" for i in range(2000)]
    fresh = campaign_state(ids, "fresh", 30)
    assert (fresh == 0).all() and list(fresh.index) == ids
    half = campaign_state(ids, "half-classified", 30, seed=1)
    # Uniform on 0..30: mean 15 (standard error 8.9 / sqrt(2000) = 0.2).
    assert half.between(0, 30).all() and abs(half.mean() - 15) < 1.0
    nearly = campaign_state(ids, "nearly done", 30, seed=1)
    assert abs((nearly == 30).mean() - 0.9) < 0.03 and (nearly <= 30).all()
    assert campaign_state(ids, "nearly done", 30, seed=1).equals(nearly)
    with pytest.raises(DetectorError, match="unknown campaign state"):
        campaign_state(ids, "done", 30)
    assert CAMPAIGN_STATES == ("fresh", "half-classified", "nearly done")


def test_rows_say_error_and_coverage():
    assert _row("fresh", "q", 10.0, [8.0, 12.0], 11.0) == {
        "state": "fresh", "quantity": "q", "estimate": 10.0, "interval_90": [8.0, 12.0], "actual": 11.0,
        "error": -1.0, "covered": True}
    assert _row("fresh", "q", 10.0, [8.0, 12.0], 12.5)["covered"] is False
    assert _row("fresh", "q", 10.0, None, 12.5)["covered"] is None
    table = backtest_table({"tileset": "x", "tiles": 2, "deposit_tiles": 1, "routes": {"crowd": 2},
                            "campaign": {"classifications_needed": 30},
                            "rows": [_row("fresh", "deposit area lost by skipping", 0.01, [0.0, 0.02], 0.03)]})
    assert "| fresh | deposit area lost by skipping | 1.00% | 0.00% - 2.00% | 3.00% | -2.00% | no |" in table


def test_jeffreys_interval():
    from scipy.stats import beta

    # Brown, Cai and DasGupta (2001), section 4.1.2: the equal-tailed quantiles of Beta(k + 1/2, n - k + 1/2),
    # with the lower end 0 at k = 0 and the upper end 1 at k = n.
    assert jeffreys_interval(44, 48) == pytest.approx((beta.ppf(0.05, 44.5, 4.5), beta.ppf(0.95, 44.5, 4.5)))
    assert jeffreys_interval(0, 10)[0] == 0.0 and jeffreys_interval(10, 10)[1] == 1.0
    low, high = jeffreys_interval(3, 20)
    assert jeffreys_interval(17, 20) == pytest.approx((1 - high, 1 - low))  # symmetric in k <-> n - k
    assert jeffreys_interval(0, 0) is None


def _fan(tile, x, y, direction, **extra):
    return {"tile_id": tile, "kind": "fan", "x_px": x, "y_px": y, "direction_deg": direction, "length_px": 40.0,
            "semi_major_px": np.nan, **extra}


def test_machine_measured_by_hand():
    # Tile A: two consensus fans, each found (direction errors 10 and 20 deg: median 15). Tile B: one
    # consensus fan found 4 deg off, plus a spot detection matching nothing. Tile C is not a machine tile.
    # Pooled F1 = 2 * 3 matched / (4 detections + 3 consensus features) = 6 / 7; the median of the
    # per-tile medians (15, 4) is 9.5 deg.
    consensus = pd.DataFrame([_fan("A", 100, 100, 90), _fan("A", 300, 100, 180), _fan("B", 50, 50, 0),
                              _fan("C", 50, 50, 0)])
    detections = pd.DataFrame([_fan("A", 102, 100, 100, score=0.9), _fan("A", 300, 103, 200, score=0.9),
                               _fan("B", 51, 50, 4, score=0.9),
                               {**_fan("B", 400, 400, 30, score=0.9), "kind": "spot", "semi_major_px": 8.0},
                               _fan("C", 50, 50, 0, score=0.9)])
    m = machine_measured(detections, consensus, ["A", "B"])
    assert (m["tiles"], m["detections"], m["consensus"], m["matched"]) == (2, 4, 3, 3)
    assert m["f1"] == pytest.approx(6 / 7)
    assert m["direction_median_deg"] == pytest.approx(9.5) and m["tiles_with_matched_fans"] == 2


def _routed(routes, *, unfamiliar=None, confidence=None, n_detections=None):
    n = len(routes)
    routed = pd.DataFrame({"tile_id": [f"t{i}" for i in range(n)], "route": routes,
                           "unfamiliar": [False] * n if unfamiliar is None else unfamiliar,
                           "confidence": [0.5] * n if confidence is None else confidence,
                           "n_detections": [1] * n if n_detections is None else n_detections})
    routed.attrs["thresholds"] = {"pass_share": 0.95, "recall": 0.98, "min_f1": 0.8, "max_direction_error_deg": 20.0,
                                  "machine_confidence": 0.9, "unfamiliar_note": "cut 1.0",
                                  "machine_promise": "pooled object F1 >= 0.8 and median fan direction error <= 20 deg"}
    return routed


def _effort(machine_tiles=11, spread=None):
    spread = spread or {"kind": "interval", "images": 11, "f1": [0.64, 0.88], "direction_median_deg": [1.2, 20.1],
                        "label": "90% out-of-bag bootstrap interval over held-out images (11 images carry machine tiles)"}
    return {"interval_90": {"missed_deposit_share": [0.0001, 0.0993]}, "missed_deposit_share": 0.0164,
            "machine": {"machine_tiles": machine_tiles, "machine_f1": 0.82, "machine_direction_median_deg": 5.5,
                        "spread": spread}}


def test_route_promises_say_when_no_tile_reached_the_machine():
    # Six tiles: two skipped (one holding 10 of the 1000 px of deposit area: 1 % lost, within 2 %), one
    # unfamiliar, three crowd. 5 of 6 pass the unfamiliarity check; Jeffreys 90 % upper end >= 0.95.
    routed = _routed(["skip", "skip", "crowd", "crowd", "crowd", "crowd"],
                     unfamiliar=[False, False, True, False, False, False],
                     confidence=[0.2, 0.0, 0.95, 0.7, 0.8, 0.0], n_detections=[1, 0, 3, 2, 2, 0])
    promises = {p["route"]: p for p in route_promises(routed, _effort(), area=[10, 0, 200, 390, 400, 0],
                                                      n_consensus=[1, 0, 2, 3, 3, 0])}
    machine = promises["machine"]
    assert machine["tested"] is False and machine["kept"] is None and machine["tiles"] == 0
    # The unfamiliar tile's 0.95 does not count: it never competes for the machine; the best is 0.8.
    assert machine["backtest"].startswith("no tile reached the machine route")
    assert "met by 11 held-out tile(s) and by none of these tiles (highest 0.800)" in machine["backtest"]
    skip = promises["skip"]
    assert skip["measured"]["deposit_area_lost"] == pytest.approx(0.01) and skip["kept"] is True
    unf = promises["unfamiliar"]
    assert unf["measured"]["passed"] == 5 and unf["measured"]["tiles"] == 6 and unf["kept"] is True
    assert promises["crowd"]["measured"] == {"deposit_tiles": 3, "tiles_without_deposits": 1}


def test_route_promises_measure_the_machine_tiles():
    routed = _routed(["machine", "machine", "crowd"])
    measured = {"tiles": 2, "detections": 4, "consensus": 3, "matched": 3, "f1": 6 / 7, "direction_median_deg": 9.5,
                "tiles_with_matched_fans": 2}
    promises = {p["route"]: p for p in route_promises(routed, _effort(), area=[100, 100, 0], n_consensus=[2, 1, 0],
                                                      machine=measured)}
    machine = promises["machine"]
    assert machine["tested"] is True and machine["kept"] is True  # F1 0.857 >= 0.8, 9.5 deg <= 20
    assert machine["measured"]["within_heldout_spread"] == {"f1": True, "direction": True}
    assert machine["backtest"].startswith("2 tile(s): F1 0.86 (3 matched of 4 detections and 3 consensus features)")
    # Fewer than five held-out images: the held-out figures are a range, and the text names it so.
    few = _effort(spread={"kind": "range", "images": 3, "f1": [0.75, 0.875], "direction_median_deg": [5.0, 8.5],
                          "label": "range over the 3 held-out image(s) carrying machine tiles (fewer than 5: too few "
                                   "for an interval)"})
    machine = {p["route"]: p for p in route_promises(routed, few, area=[100, 100, 0], n_consensus=[2, 1, 0],
                                                     machine=measured)}["machine"]
    assert "range over the 3 held-out image(s)" in machine["heldout"] and "F1 0.75-0.88" in machine["heldout"]
    assert machine["measured"]["within_heldout_spread"] == {"f1": True, "direction": False}


def test_backtest_end_to_end(tmp_path):
    """Two invented tiles the shipped model never saw: the screening never sees their consensus."""
    import json

    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "tiles", n_images=1, tiles_per_image=2, seed=31, image_prefix="BKT")
    result = backtest(MODEL_DIR, root, tmp_path / "out", n_boot=50, log=lambda *_: None)
    assert not (tmp_path / "out" / "hidden" / "consensus.csv").exists()
    states = {r["state"] for r in result["rows"]}
    assert states == set(CAMPAIGN_STATES) | {"all states"}
    rows = pd.DataFrame(result["rows"])
    fresh = rows[(rows["state"] == "fresh") & (rows["quantity"] == "classifications truly needed")].iloc[0]
    # Fresh: every deposit tile not trusted to the machine needs all 30 classifications.
    routes = pd.read_csv(tmp_path / "out" / "screen" / "tiles.csv")
    assert fresh["actual"] % 30 == 0 and fresh["actual"] <= 30 * len(routes)
    md = (tmp_path / "out" / "backtest.md").read_text()
    assert md.count("| fresh |") == 3 and md.count("| all states |") >= 1
    assert np.isfinite(rows["estimate"].astype(float)).all()
    saved = json.loads((tmp_path / "out" / "backtest.json").read_text())
    assert [p["route"] for p in saved["promises"]] == ["unfamiliar", "skip", "machine", "crowd"]
    assert saved["checks"]["counted"] == 3 * 2 + 1 + 2 * (saved["routes"]["machine"] > 0)
    if saved["routes"]["machine"] == 0:
        assert saved["machine_tested"] is False
        assert saved["machine_statement"].startswith("no tile reached the machine route")
        assert "\nNo tile reached the machine route: " in md


def test_backtest_refuses_training_images(tmp_path):
    import json
    import shutil

    card = json.loads((MODEL_DIR / "model.json").read_text())
    image = card["training"]["images"]["fit"][0]
    demo = Path(__file__).resolve().parents[2] / "demo_tiles"
    root = tmp_path / "set"
    shutil.copytree(demo, root)
    tiles = pd.read_csv(root / "tiles.csv")
    tiles.loc[tiles["image_id"] == tiles["image_id"].iloc[0], "image_id"] = image
    tiles.to_csv(root / "tiles.csv", index=False)
    with pytest.raises(DetectorError, match="never saw"):
        backtest(MODEL_DIR, root, tmp_path / "out", log=lambda *_: None)


def test_refused_screening_leaves_no_hidden_copy(tmp_path):
    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "tiles", n_images=1, tiles_per_image=1, seed=31, image_prefix="BKT")
    with pytest.raises(DetectorError, match="workers 0"):
        backtest(MODEL_DIR, root, tmp_path / "out", workers=0, log=lambda *_: None)
    assert not (tmp_path / "out").exists()
