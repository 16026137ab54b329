import json
import math

import numpy as np
import pandas as pd
import pytest
from sklearn.calibration import calibration_curve

from detector.errors import DetectorError
from training.evaluation import report, scoring
from tests.training._boxes import box_rasteriser


# Each feature is a 7 x 7 box around (x, y).
_box_rasterise = box_rasteriser(3)


def _catalogs(seed=0):
    rng = np.random.default_rng(seed)
    tiles, cons, det = [], [], []
    for i in range(3):
        wind = rng.uniform(0, 360)
        for t in range(2):
            tid = f"T{i}{t}"
            tiles.append(dict(tile_id=tid, image_id=f"I{i}", region="R", solar_longitude_deg=200.0, width=200,
                              height=100))
            for k in range(4):
                d = (wind + rng.normal(0, 20)) % 360
                base = dict(tile_id=tid, kind="fan", x_px=20 + 40 * k, y_px=50, length_px=40.0, opening_deg=20.0,
                            semi_major_px=np.nan, semi_minor_px=np.nan, votes=6)
                cons.append({**base, "direction_deg": d})
                det.append({**base, "direction_deg": (d + rng.normal(0, 8)) % 360, "score": 0.9,
                            "axis_deg": d % 180})
    return pd.DataFrame(det), pd.DataFrame(cons), pd.DataFrame(tiles)


@pytest.fixture(scope="module")
def scored():
    det, cons, tiles = _catalogs()
    s = scoring.score_catalogs(det, cons, tiles, prevailing_deg=0.0, n_boot=50, rasterise=_box_rasterise)
    ceiling = scoring.score_catalogs(cons.assign(score=1.0), cons, tiles, prevailing_deg=0.0, n_boot=50,
                                     rasterise=_box_rasterise)
    fans = scoring.matched_fans(det, cons, scoring.match_objects(det, cons), tiles)
    return s, ceiling, fans


def test_write_report_files_and_json_round_trip(scored, tmp_path):
    s, ceiling, fans = scored
    rng = np.random.default_rng(1)
    y = rng.integers(0, 2, 200)
    p = np.clip(0.5 * y + rng.uniform(0, 0.5, 200), 0, 1)
    pm = scoring.patch_metrics(np.where(y, "fan", "background"), np.c_[1 - p, p], ["background", "fan"])
    curves = {k: {**v, "average_precision": pm[k]["average_precision"]} for k, v in pm["curves"].items()}
    written = report.write_report(s, tmp_path / "rep", ceiling=ceiling, pr_curves=curves,
                                  reliability={"fan": (y, p)}, fan_directions=fans)
    names = {"report.json", "report.md", "pr_curves.png", "direction_error_hist.png", "direction_scatter.png",
             "direction_roses.png", "reliability.png"}
    assert {f.name for f in (tmp_path / "rep").iterdir()} == names  # no temporary files left
    for path in written.values():
        assert path.stat().st_size > 0
    for png in (tmp_path / "rep").glob("*.png"):
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    loaded = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert loaded["scores"] == json.loads(json.dumps(s))
    assert loaded["ceiling"]["objects"]["fan"]["f1"] == 1.0
    md = (tmp_path / "rep" / "report.md").read_text()
    # Headline table comes first, then baselines, then breakdowns.
    assert md.index("| Fan F1 |") < md.index("## Direction baselines") < md.index("## Breakdowns")
    assert "common practice" in md


def test_report_explains_its_per_tile_direction_figures(scored, tmp_path):
    # The headline's figure (all detected fans, weighted circular means), the prevailing one (both
    # sides pooled robustly) and the baseline table's (matched fans, consensus-length weights on
    # both sides) are different quantities: the report states their values, on how many tiles, and
    # what each measures.
    s, _, _ = scored
    report.write_report(s, tmp_path / "rep")
    md = (tmp_path / "rep" / "report.md").read_text()
    all_fans = s["direction"]["per_tile_mean"]
    prevailing = s["direction"]["per_tile_prevailing"]
    matched = s["baselines"]["per_tile_mean_on_matched"]["model"]
    note = next(line for line in md.splitlines() if line.startswith("Per-tile direction figures"))
    assert f"{all_fans['median']:.1f} deg median over {all_fans['n']} tiles" in note
    assert f"prevailing direction error ({prevailing['median']:.1f} deg median)" in note
    assert f"{matched['median']:.1f} deg median over {matched['n']} tiles" in note
    assert "matched fans only" in note and "every fan the model detected" in note
    assert md.index("## Direction baselines") < md.index(note) < md.index("## Breakdowns")
    # and the baseline table's last column is the matched-fan figure
    model_row = next(line for line in md.splitlines() if line.startswith("| model |"))
    assert model_row.rstrip(" |").endswith(f"{matched['median']:.1f} deg")


def test_headline_table_values_and_targets(scored):
    s, ceiling, _ = scored
    table = report.headline_table(s, ceiling)
    assert table.splitlines()[0].startswith("| Metric | Model")
    assert len(table.splitlines()) == 2 + len(report.TARGETS)
    med = s["direction"]["per_fan"]["median"]
    assert f"{med:.1f} deg" in table
    rows = {r["key"]: r for r in report.evaluate_targets(s)}
    assert rows["fan_f1"]["met"] is True
    assert rows["fan_dir_median"]["met"] is (med <= 10.0)
    # Deposit-free tiles are absent here, so the false-detection rate is not measured.
    assert rows["false_per_mpx"]["value"] is None and rows["false_per_mpx"]["met"] is None


def test_targets_fail_when_missed():
    fake = {"objects": {"fan": {"f1": 0.79}, "spot": {"f1": 0.8}, "false_per_mpx": {"value": 0.5}},
            "direction": {"per_fan": {"median": 10.0, "p90": 30.1, "flip_rate": 0.031}}}
    rows = {r["key"]: r["met"] for r in report.evaluate_targets(fake)}
    assert rows["fan_f1"] is False and rows["spot_f1"] is True
    assert rows["fan_dir_median"] is True and rows["fan_dir_p90"] is False
    assert rows["flip_rate"] is False and rows["false_per_mpx"] is False
    assert rows["dice"] is None


@pytest.mark.parametrize("seed", [0, 1])
def test_reliability_bins_match_sklearn(seed):
    rng = np.random.default_rng(seed)
    p = rng.uniform(0, 1, 500)
    y = (rng.uniform(0, 1, 500) < p**1.5).astype(int)
    b = report.reliability_bins(y, p, n_bins=10)
    # Reference: sklearn.calibration.calibration_curve with uniform bins.
    prob_true, prob_pred = calibration_curve(y, p, n_bins=10, strategy="uniform")
    assert np.allclose(b["prob_true"], prob_true) and np.allclose(b["prob_pred"], prob_pred)
    assert sum(b["count"]) == 500
    assert 0 <= b["ece"] <= 1
    with pytest.raises(DetectorError, match="probabilities must lie in"):
        report.reliability_bins([0, 1], [0.2, 1.2])


def test_rose_follows_direction_convention(tmp_path):
    fig = report._plot_roses({"I": (np.array([90.0, 90.0]), np.array([100.0]))}, tmp_path / "rose.png")
    ax = fig.axes[0]
    # Zero at the top, clockwise: degrees clockwise from image up.
    assert ax.get_theta_offset() == pytest.approx(math.pi / 2)
    assert ax.get_theta_direction() == -1
    assert (tmp_path / "rose.png").is_file()
