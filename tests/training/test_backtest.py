"""The effort backtest: campaign states, the comparison rows and a short end-to-end run."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from detector.errors import DetectorError
from training.backtest import CAMPAIGN_STATES, _row, backtest, backtest_table, campaign_state

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


def test_backtest_end_to_end(tmp_path):
    """Two invented tiles the shipped model never saw: the screening never sees their consensus."""
    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "tiles", n_images=1, tiles_per_image=2, seed=31, image_prefix="BKT")
    result = backtest(MODEL_DIR, root, tmp_path / "out", n_boot=50, log=lambda *_: None)
    assert not (tmp_path / "out" / "hidden" / "consensus.csv").exists()
    states = {r["state"] for r in result["rows"]}
    assert states == set(CAMPAIGN_STATES)
    rows = pd.DataFrame(result["rows"])
    fresh = rows[(rows["state"] == "fresh") & (rows["quantity"] == "classifications truly needed")].iloc[0]
    # Fresh: every deposit tile not trusted to the machine needs all 30 classifications.
    routes = pd.read_csv(tmp_path / "out" / "screen" / "tiles.csv")
    assert fresh["actual"] % 30 == 0 and fresh["actual"] <= 30 * len(routes)
    assert (tmp_path / "out" / "backtest.md").read_text().count("| fresh |") >= 4
    assert np.isfinite(rows["estimate"].astype(float)).all()


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
