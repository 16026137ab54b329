"""The benchmark: its plain-threshold baseline against scikit-image, its real negatives, its runner and table."""

import json

import numpy as np
import pandas as pd
import pytest
import skimage.data
from skimage.measure import label, regionprops

from detector.contract import CONSENSUS_COLUMNS
from detector.errors import DetectorError
from detector.geometry import angular_difference, unit_vector
from detector.io import read_image
from training.evaluation.benchmark import (
    NEGATIVE_TEXTURES,
    BenchmarkLayout,
    _write_negatives,
    benchmark_table,
    build_benchmark,
    run_benchmark,
    threshold_detections,
)


def _ellipse_tile(cx, cy, a, b, angle_deg, *, level=180, dark=90, shape=(200, 240)):
    rows, cols = np.mgrid[: shape[0], : shape[1]]
    uc, ur = unit_vector(angle_deg)
    along = (cols - cx) * uc + (rows - cy) * ur
    across = -(cols - cx) * ur + (rows - cy) * uc
    inside = (along / a) ** 2 + (across / b) ** 2 <= 1.0
    tile = np.full(shape, level, dtype=np.uint8)
    tile[inside] = dark
    return tile, inside


def test_threshold_spot_matches_regionprops():
    # Reference: scikit-image regionprops (centroid and axis lengths from second moments, 4 sigma).
    tile, inside = _ellipse_tile(120.3, 95.6, 9.0, 6.0, 30.0)
    det = threshold_detections(tile, min_fan_length_px=40.0)
    assert len(det) == 1 and det["kind"].iloc[0] == "spot"
    props = regionprops(label(inside))[0]
    cy, cx = props.centroid
    assert det["x_px"].iloc[0] == pytest.approx(cx, abs=0.6)
    assert det["y_px"].iloc[0] == pytest.approx(cy, abs=0.6)
    assert det["semi_major_px"].iloc[0] == pytest.approx(props.axis_major_length / 2.0, rel=0.1)
    assert det["semi_minor_px"].iloc[0] == pytest.approx(props.axis_minor_length / 2.0, rel=0.15)
    # The long axis lies along 30 degrees (mod 180) in the contract's convention.
    assert abs(((det["direction_deg"].iloc[0] - 30.0 + 90.0) % 180.0) - 90.0) < 5.0


def test_threshold_wedge_is_a_fan_from_its_dark_end():
    # A wedge darkest at its apex (the trade's picture of a fan: darkest at the source).
    shape = (220, 220)
    rows, cols = np.mgrid[: shape[0], : shape[1]].astype(float)
    apex = np.array([60.0, 150.0])  # x, y
    heading = 40.0
    uc, ur = unit_vector(heading)
    along = (cols - apex[0]) * uc + (rows - apex[1]) * ur
    across = -(cols - apex[0]) * ur + (rows - apex[1]) * uc
    inside = (along >= 0) & (along <= 70) & (np.abs(across) <= 2 + along * np.tan(np.radians(12)))
    tile = np.full(shape, 190.0)
    tile[inside] -= 110.0 * np.exp(-1.5 * along[inside] / 70.0)
    det = threshold_detections(np.round(tile).astype(np.uint8))
    fans = det[det["kind"] == "fan"]
    assert len(fans) == 1
    assert angular_difference(fans["direction_deg"].iloc[0], heading) < 10.0
    assert np.hypot(fans["x_px"].iloc[0] - apex[0], fans["y_px"].iloc[0] - apex[1]) < 8.0


def test_threshold_flat_and_nodata_tiles_are_quiet():
    assert len(threshold_detections(np.full((120, 160), 150, np.uint8))) == 0
    tile = np.full((120, 160), 150, np.uint8)
    tile[:, :40] = 0  # no-data strip: its edge must not read as a dark deposit
    rng = np.random.default_rng(0)
    tile[:, 40:] = np.clip(150 + rng.normal(0, 2, (120, 120)), 1, 255).astype(np.uint8)
    assert len(threshold_detections(tile)) == 0


def test_threshold_columns_are_the_contract():
    tile, _ = _ellipse_tile(100, 100, 8, 7, 0)
    det = threshold_detections(tile, tile_id="T1")
    assert list(det.columns) == list(CONSENSUS_COLUMNS) + ["score", "direction_confidence"]
    assert (det["tile_id"] == "T1").all()


def test_negatives_are_the_scikit_image_textures_in_four_turns(tmp_path):
    _write_negatives(tmp_path)
    tiles = pd.read_csv(tmp_path / "tiles.csv")
    consensus = pd.read_csv(tmp_path / "consensus.csv")
    assert len(tiles) == 4 * len(NEGATIVE_TEXTURES) and len(consensus) == 0
    assert list(consensus.columns) == list(CONSENSUS_COLUMNS)
    for name in NEGATIVE_TEXTURES:
        reference = np.maximum(getattr(skimage.data, name)(), 1)
        turned = read_image(tmp_path / f"images/NEG_{name}_R090.png")
        np.testing.assert_array_equal(turned, np.rot90(reference, 1))


def test_layout_checks_its_numbers():
    with pytest.raises(DetectorError, match="heldout_images"):
        BenchmarkLayout(heldout_images=0)
    with pytest.raises(DetectorError, match="train_images"):
        BenchmarkLayout(train_images=2)


@pytest.fixture(scope="module")
def small_bench(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench") / "bench"
    layout = BenchmarkLayout(seed=5, train_images=3, heldout_images=2, shifted_images=1, tiles_per_image=1)
    return build_benchmark(out, layout, log=lambda s: None)


def test_build_writes_disjoint_sets(small_bench):
    manifest = json.loads((small_bench / "benchmark.json").read_text())
    assert manifest["profiles"] == {"train": "nominal", "heldout": "nominal", "shifted": "shifted"}
    ids = {name: set(pd.read_csv(small_bench / name / "tiles.csv")["image_id"]) for name in ("train", "heldout", "shifted")}
    assert not ids["train"] & ids["heldout"] and not ids["train"] & ids["shifted"]
    assert len(ids["heldout"]) == 2


def test_build_refuses_an_occupied_folder(small_bench):
    with pytest.raises(DetectorError, match="not empty"):
        build_benchmark(small_bench, BenchmarkLayout(train_images=3, heldout_images=1, shifted_images=1,
                                                     tiles_per_image=1), log=lambda s: None)


def test_run_scores_model_threshold_and_truth(small_bench, tiny_model, tmp_path):
    results = run_benchmark(tiny_model[0], small_bench, tmp_path / "r", workers=1, log=lambda s: None)
    held = results["sets"]["heldout"]
    for method in ("model", "threshold", "truth"):
        assert 0.0 <= (held[method]["fan_f1"] or 0.0) <= 1.0
    # The noise-free truth scored against its own crowd is the ceiling: no method may beat it by much.
    assert held["truth"]["fan_f1"] >= held["threshold"]["fan_f1"]
    neg = results["sets"]["negatives"]
    assert neg["truth"]["detections_per_mpx"] == 0.0
    assert neg["area_mpx"] == pytest.approx(4 * len(NEGATIVE_TEXTURES) * 512 * 512 / 1e6)
    text = (tmp_path / "r" / "benchmark.md").read_text()
    assert "fan F1" in text and "real deposit-free textures" in text
    assert (tmp_path / "r" / "heldout_model_detections.csv").is_file()


def test_run_refuses_a_set_the_model_saw(tiny_model, tiny_tileset, tmp_path):
    bench = tmp_path / "b"
    for name in ("heldout", "shifted", "negatives"):
        (bench / name).mkdir(parents=True)
    import shutil

    for name in ("heldout", "shifted"):
        shutil.rmtree(bench / name)
        shutil.copytree(tiny_tileset, bench / name)
    _write_negatives(bench / "negatives")
    (bench / "benchmark.json").write_text(json.dumps({"format": 1, "layout": {}}))
    with pytest.raises(DetectorError, match="must be unseen"):
        run_benchmark(tiny_model[0], bench, tmp_path / "r", workers=1, log=lambda s: None)


def test_run_needs_a_benchmark_folder(tiny_model, tmp_path):
    with pytest.raises(DetectorError, match="not a benchmark folder"):
        run_benchmark(tiny_model[0], tmp_path, tmp_path / "r", log=lambda s: None)


def test_table_sets_compared_runs_beside_the_model():
    figures = {"fan_f1": 0.5, "fan_precision": 0.6, "fan_recall": 0.4, "spot_f1": 0.7,
               "fan_direction_median_deg": 9.0, "fan_direction_p90_deg": 40.0, "flip_rate": 0.02,
               "tile_mean_direction_median_deg": 7.0, "dice_mean": 0.6, "covered_error_pp_mean": 0.9}
    sets = {"heldout": {"model": figures, "threshold": figures, "truth": figures},
            "shifted": {"model": figures, "threshold": None, "truth": None},
            "negatives": {"model": {"detections_per_mpx": 1.5}, "threshold": {"detections_per_mpx": 20.0}}}
    before = {"sets": {"heldout": {"model": {**figures, "fan_f1": 0.3}}}}
    table = benchmark_table({"sets": sets}, compare=[("before", before)])
    header = table.splitlines()[0]
    assert "before (in-dist)" in header and "threshold (shifted)" in header
    assert "0.30 (0.60 / 0.40)" in table and "0.50 (0.60 / 0.40)" in table
    assert "2.0 %" in table


@pytest.mark.parametrize("name", NEGATIVE_TEXTURES)
def test_shipped_model_leaves_real_textures_to_people_or_quiet(name):
    # Real deposit-free textures (scikit-image's sample images, an outside dataset): the shipped model
    # either flags the tile unfamiliar (so screening leaves it to people) or detects nothing on it.
    from pathlib import Path

    from detector.inference.detect import detect_tile
    from detector.inference.model import load_model
    from detector.inference.unfamiliar import unfamiliarity_score

    model = load_model(Path(__file__).resolve().parents[2] / "models" / "demo")
    tile = np.maximum(getattr(skimage.data, name)(), 1).astype(np.uint8)
    result = detect_tile(model, tile)
    flagged = unfamiliarity_score(model.card.get("unfamiliarity"), result.summary[None, :])[0] > 1.0
    assert flagged or len(result.detections) == 0
