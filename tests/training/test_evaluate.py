"""Evaluation of a model on a labelled tile set: detections.csv, report files, score filter, truth ceiling."""

import json

import pandas as pd
import pytest

from detector.contract import DETECTION_COLUMNS
from detector.errors import DetectorError
from training.evaluate import evaluate_model


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


def test_bad_min_score(tiny_model, tiny_tileset, tmp_path):
    with pytest.raises(DetectorError, match="min-score"):
        evaluate_model(tiny_model[0], tiny_tileset, tmp_path / "r", min_score=1.5, log=lambda s: None)
