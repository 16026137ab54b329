"""Evaluation of a model on a labelled tile set: detections.csv, report files, score filter, truth ceiling."""

import json

import numpy as np

import pandas as pd
import pytest

from detector.contract import DETECTION_COLUMNS
from detector.errors import DetectorError
from training.evaluation.evaluate import evaluate_model


@pytest.fixture(scope="module")
def report(tiny_model, tiny_tileset, tmp_path_factory):
    out = tmp_path_factory.mktemp("eval") / "report"
    result = evaluate_model(tiny_model[0], tiny_tileset, out, min_score=0.3, log=lambda s: None)
    return out, result


def test_report_files(report):
    out, _ = report
    assert (out / "report.json").is_file() and (out / "report.md").is_file()
    assert list(out.glob("*.png"))
    json.loads((out / "report.json").read_text())


def test_detections_csv_contract_and_min_score(report):
    out, _ = report
    det = pd.read_csv(out / "detections.csv")
    assert tuple(det.columns) == DETECTION_COLUMNS
    assert "score" in det.columns and "direction_confidence" in det.columns
    assert (det["score"] >= 0.3 - 1e-3).all()
    assert set(det["kind"]) <= {"fan", "spot"}


def test_truth_ceiling_present(report, tiny_tileset):
    assert (tiny_tileset / "truth.csv").is_file()
    _, result = report
    assert result["ceiling"] is not None


def test_report_figures_agree_with_the_written_report(report):
    from training.evaluation.benchmark import report_figures

    out, result = report
    figures = report_figures(result)
    written = json.loads((out / "report.json").read_text())
    det = pd.read_csv(out / "detections.csv")
    assert figures["n_detections"] == len(det)
    assert figures["tiles"] == written["scores"]["meta"]["tiles"]
    assert 0 <= figures["tiles_smoothed"] <= figures["tiles_unfamiliar"] <= figures["tiles"]
    meta = written["scores"]["meta"]
    assert set(meta["tiles_smoothed"]) <= set(meta["tiles_unfamiliar"])
    n_fans = figures["n_consensus_fans"]
    if n_fans:  # matched fans over consensus fans is the fan recall (the same matching)
        assert figures["fans_matched"] == pytest.approx(figures["fan_recall"], abs=1e-9)
        assert 0.0 <= figures["fans_matched"] + figures["fans_missed"] <= 1.0 + 1e-9


def test_unfamiliar_flags_follow_the_card_and_the_smoothing():
    from types import SimpleNamespace

    from training.evaluation.evaluate import unfamiliar_flags

    # Four features, two principal components (variances 1 and 4), residual scale 2, threshold 1: the
    # unfamiliarity is a Mahalanobis distance over the components plus the residual's, over the threshold.
    stats = {"mean": [0.0] * 4, "scale": [1.0] * 4, "components": [[1.0, 0, 0, 0], [0, 1.0, 0, 0]],
             "variances": [1.0, 4.0], "resid_scale": 2.0, "threshold": 1.0}
    near, far = np.zeros(4), np.array([30.0, 0.0, 0.0, 0.0])
    per_tile = [{"summary": near, "smoothed": False}, {"summary": far, "smoothed": False},
                {"summary": near, "smoothed": True}]
    assert unfamiliar_flags(SimpleNamespace(card={"unfamiliarity": stats}), per_tile).tolist() == [False, True, True]
    # A card without statistics flags only the smoothed tiles.
    assert unfamiliar_flags(SimpleNamespace(card={}), per_tile).tolist() == [False, False, True]
    assert unfamiliar_flags(SimpleNamespace(card={}), []).shape == (0,)


def test_bad_min_score(tiny_model, tiny_tileset, tmp_path):
    with pytest.raises(DetectorError, match="min-score"):
        evaluate_model(tiny_model[0], tiny_tileset, tmp_path / "r", min_score=1.5, log=lambda s: None)


def test_error_analysis_files(report, tiny_tileset):
    out, result = report
    cons = pd.read_csv(out / "errors_consensus.csv")
    det = pd.read_csv(out / "errors_detections.csv")
    # One row per scored feature, each with one outcome.
    assert len(det) == len(pd.read_csv(out / "detections.csv"))
    assert cons["outcome"].isin(["matched", "as_other_kind", "source_misplaced", "merged", "missed"]).all()
    assert det["outcome"].isin(["true", "duplicate", "on_other_kind", "misplaced", "background"]).all()
    assert (cons["outcome"] == "matched").sum() == (det["outcome"] == "true").sum()
    payload = json.loads((out / "report.json").read_text())
    errors = payload["error_breakdown"]
    assert errors["headline"]["consensus"]["fan"]["n"] == int((cons["kind"] == "fan").sum())
    n_matched = payload["scores"]["objects"]["fan"]["n_matched"] + payload["scores"]["objects"]["spot"]["n_matched"]
    assert (cons["outcome"] == "matched").sum() == n_matched
    assert "## Where features are lost" in (out / "report.md").read_text()
    # One figure per listed worst tile, at most six, named after the tile.
    figures = sorted(p.name for p in (out / "worst_tiles").glob("worst_*.png"))
    assert figures == sorted(f"worst_{w['tile_id']}.png" for w in errors["worst_tiles"])
    n_with_errors = len(set(cons.loc[cons["outcome"] != "matched", "tile_id"])
                        | set(det.loc[det["outcome"] != "true", "tile_id"]))
    assert len(figures) == min(6, n_with_errors)
    assert result["error_breakdown"]["worst_tiles"] == errors["worst_tiles"]


# The one-standard-error rule (Hastie, Tibshirani and Friedman, The Elements of Statistical Learning,
# 2nd ed., section 7.10): among candidates whose score is within reach of the best, the simplest (here
# the least strict threshold, listed first) is chosen. The standard error is that of the paired
# shortfall (both candidates scored on the same resamples). Worked by hand below.
def test_paired_standard_error_rule_worked_example():
    from training.evaluation.evaluate import paired_standard_error_choice

    scores = [0.60, 0.625, 0.65, 0.645]
    best = np.array([0.63, 0.65, 0.67])
    # candidate 1 moves with the best (resampled shortfalls 0.03, 0.03, 0.03: standard error 0) and falls
    # 0.025 short: out of reach although the best's own spread (0.02) would have taken it in
    resampled = [best - 0.05, best - 0.03, best, best - 0.005]
    chosen, chosen_best, ses = paired_standard_error_choice(scores, resampled, tolerance=0.0)
    assert (chosen, chosen_best) == (2, 2)
    assert ses == pytest.approx([0.0, 0.0, 0.0, 0.0])
    # resampled shortfalls of candidate 1 of 0.0, 0.03, 0.06: standard deviation (ddof=1) 0.03 >= 0.025 -> in reach
    resampled[1] = best - np.array([0.0, 0.03, 0.06])
    chosen, _, ses = paired_standard_error_choice(scores, resampled, tolerance=0.0)
    assert chosen == 1 and ses[1] == pytest.approx(0.03)
    # a tolerance of 0.05 takes candidate 0 (0.05 short) in whatever its spread
    assert paired_standard_error_choice(scores, resampled, tolerance=0.05)[0] == 0
    # no resamples to speak of (one image): the plain maximum
    assert paired_standard_error_choice(scores, [np.zeros(1)] * 4, tolerance=0.0) == (2, 2, [0.0] * 4)


def test_noisy_tiles_are_named_in_the_report(tiny_model, tiny_tileset, tmp_path):
    # One tile copied with 6 grey levels of white noise added (clipped at 1: 0 is no-data) is smoothed
    # before detection, and the report and the log say so; the clean tiles are not.
    import shutil

    from PIL import Image

    root = tmp_path / "ts"
    shutil.copytree(tiny_tileset, root)
    tiles = pd.read_csv(root / "tiles.csv")
    noisy_id, path = tiles.loc[0, ["tile_id", "path"]]
    image = np.asarray(Image.open(root / path), dtype=np.float64)
    rng = np.random.default_rng(13)
    Image.fromarray(np.clip(np.rint(image + rng.normal(0.0, 6.0, image.shape)), 1, 255).astype(np.uint8)).save(
        root / path)
    lines = []
    evaluate_model(tiny_model[0], root, tmp_path / "r", min_score=0.3, log=lines.append)
    meta = json.loads((tmp_path / "r" / "report.json").read_text())["scores"]["meta"]
    assert meta["tiles_smoothed"] == [noisy_id]
    assert any(line.startswith(f"note: 1 of the {len(tiles)} tiles are noisier") for line in lines)


def test_tiles_of_another_ground_scale_are_scored_in_the_frame_they_were_read_in(tiny_model, tiny_tileset, tmp_path):
    # The tiny tile set binned 2 x 2 (its consensus halved), said to be 0.5 m/px, scored by the tiny model
    # told it was fitted at 0.25 m/px: each tile is read at twice its size. The patch targets then come from
    # the consensus drawn in that frame, so as many patches hold fans as in the full-resolution tiles.
    import shutil

    from PIL import Image

    from detector.inference.detect import detect_tile
    from detector.inference.model import load_model
    from detector.tile.scale import PixelScale, to_tile_frame
    from detector.tileset import load_tileset
    from training.evaluation.evaluate import run_on_tiles

    folder = tmp_path / "model"
    shutil.copytree(tiny_model[0], folder)
    card = json.loads((folder / "model.json").read_text())
    card["pixel_scale"] = PixelScale(0.25, 0.25, 0.25, 0.15).to_card()
    (folder / "model.json").write_text(json.dumps(card))
    full_root, root = tmp_path / "full", tmp_path / "binned"
    shutil.copytree(tiny_tileset, full_root)
    shutil.copytree(tiny_tileset, root)
    tiles = pd.read_csv(root / "tiles.csv")
    for path in tiles["path"]:
        a = np.asarray(Image.open(root / path), dtype=np.float64)
        a = a[: a.shape[0] // 2 * 2, : a.shape[1] // 2 * 2].reshape(a.shape[0] // 2, 2, a.shape[1] // 2, 2).mean(axis=(1, 3))
        Image.fromarray(np.clip(np.rint(a), 1, 255).astype(np.uint8)).save(root / path)
    for name, mpp in (("binned", 0.5), ("full", 0.25)):
        t = tiles.assign(metres_per_px=mpp)
        t.to_csv(tmp_path / name / "tiles.csv", index=False)
    consensus = pd.read_csv(root / "consensus.csv")
    to_tile_frame(consensus, 2.0, 2.0).to_csv(root / "consensus.csv", index=False)

    model = load_model(folder)
    ids = tiles["tile_id"].tolist()
    binned = run_on_tiles(model, load_tileset(root), ids, at_model_scale=True)
    full = run_on_tiles(model, load_tileset(full_root), ids, at_model_scale=True)
    as_is = run_on_tiles(model, load_tileset(root), ids)
    assert len(as_is["patch_true"]) < 0.3 * len(binned["patch_true"])  # read at its own, quarter size
    n_fan_binned, n_fan_full = int(np.sum(binned["patch_true"] == 1)), int(np.sum(full["patch_true"] == 1))
    assert n_fan_full > 0, (n_fan_binned, n_fan_full)
    assert abs(n_fan_binned - n_fan_full) <= 0.15 * n_fan_full
    assert len(binned["patch_true"]) == pytest.approx(len(full["patch_true"]), rel=0.05)
    ts = load_tileset(root)
    first = detect_tile(model, ts.read_tile(ids[0]), tile_id=ids[0], metres_per_px=0.5).detections
    mine = binned["detections"][binned["detections"]["tile_id"] == ids[0]]
    np.testing.assert_allclose(mine["x_px"].to_numpy(float), first["x_px"].to_numpy(float))
    shape = ts.read_tile(ids[0]).shape
    assert binned["detections"]["x_px"].between(-0.5, shape[1] - 0.5).all()
    lines = []
    evaluate_model(folder, root, tmp_path / "r", at_model_scale=True, log=lines.append)
    meta = json.loads((tmp_path / "r" / "report.json").read_text())["scores"]["meta"]
    assert meta["at_model_scale"] and meta["tiles_read_at_model_scale"] == sorted(ids)
    assert any(line.startswith(f"note: {len(ids)} of the {len(ids)} tiles lie outside") for line in lines)
