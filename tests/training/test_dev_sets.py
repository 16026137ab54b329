"""The development-set script: its sets are never the benchmark's, are reused only when rendered the
same way, and a bad reference file is one error line with exit status 2."""

import json
from pathlib import Path

import pandas as pd
import pytest

from tests.benchmarks import dev_sets as script
from training.evaluation.benchmark import BenchmarkLayout, _set_seeds

REPO = Path(__file__).resolve().parents[2]


def test_development_sets_are_drawn_apart_from_the_benchmark():
    bench = set(_set_seeds(BenchmarkLayout().seed).values())
    assert not {seed for _, _, seed in script.DEV_SETS} & bench
    assert {profile for _, profile, _ in script.DEV_SETS} == {"nominal", "shifted"}
    assert len({name for name, _, _ in script.DEV_SETS}) == len(script.DEV_SETS)


def test_a_set_is_rendered_once_and_rerendered_when_asked_otherwise(tmp_path):
    root = tmp_path / "nominal_A"
    assert script._render(root, "nominal", 5, 1) is True
    tiles = pd.read_csv(root / "tiles.csv")
    assert len(tiles) == 4 and tiles["image_id"].str.startswith("DV_NOM5").all()
    first = (root / "images" / f"{tiles['tile_id'][0]}.png").read_bytes()
    assert script._render(root, "nominal", 5, 1) is False  # the same settings: reused as it is
    assert (root / "images" / f"{tiles['tile_id'][0]}.png").read_bytes() == first
    assert script._render(root, "nominal", 6, 1) is True  # another seed: rendered again
    assert json.loads((root / script._STAMP).read_text())["seed"] == 6


def test_a_reference_that_is_not_an_earlier_run_is_refused(tmp_path, capsys):
    bad = tmp_path / "not_a_run.json"
    bad.write_text("[1, 2]")
    with pytest.raises(SystemExit) as stop:
        script.main([str(REPO / "models" / "demo"), "--out", str(tmp_path / "out"), "--against", str(bad)])
    assert stop.value.code == 2
    assert "not_a_run.json" in capsys.readouterr().err
    assert not (tmp_path / "out" / "sets").exists()  # refused before anything is rendered
