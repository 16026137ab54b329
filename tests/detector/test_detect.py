"""Running an exported model on one tile."""

import numpy as np
import pandas as pd
import pytest

from detector.objects.assemble import OBJECT_COLUMNS
from detector.contract import DETECTION_COLUMNS
from detector.inference.detect import detect_block, detect_tile
from detector.inference.model import load_model
from detector.tileset import load_tileset


@pytest.fixture(scope="module")
def model_and_tile(tiny_model, tiny_tileset):
    model = load_model(tiny_model[0])
    tileset = load_tileset(tiny_tileset)
    tile_id = tileset.tiles["tile_id"].iloc[0]
    return model, tileset.read_tile(tile_id), tile_id


def test_detect_tile_columns_and_ranges(model_and_tile):
    model, tile, tile_id = model_and_tile
    result = detect_tile(model, tile, tile_id=tile_id, min_score=0.0)
    det = result.detections
    assert tuple(det.columns) == OBJECT_COLUMNS
    assert set(DETECTION_COLUMNS) <= set(det.columns)
    assert len(det) > 0
    rows, cols = tile.shape
    assert det["x_px"].between(-0.5, cols - 0.5).all()
    assert det["y_px"].between(-0.5, rows - 0.5).all()
    assert ((det["direction_deg"] >= 0) & (det["direction_deg"] < 360)).all()
    assert (det["tile_id"] == tile_id).all()
    assert set(det["kind"]) <= {"fan", "spot"}
    assert det["score"].between(0, 1).all()
    assert result.proba.shape == (result.grid.n_patches, 3)
    assert 0.0 <= result.p_deposit <= 1.0
    assert result.fan_cover.shape == tile.shape


def test_cover_is_the_footprints_of_the_detections(model_and_tile):
    # A tile's cover is what the benchmark scores: its detections drawn as consensus features are (fan
    # sectors, spot ellipses), not the dark pixels they came from. The fans' cover is bounded by the
    # sum of their sector areas, L^2 * opening / 2 with the opening in radians (the area of a circular
    # sector; overlaps only make the union smaller), and comes close to it.
    from detector.labels import rasterise_features

    model, tile, tile_id = model_and_tile
    result = detect_tile(model, tile, tile_id=tile_id, min_score=0.0)
    drawn = rasterise_features(result.detections, tile.shape)
    np.testing.assert_array_equal(result.fan_cover, drawn.fan_cover)
    np.testing.assert_array_equal(result.spot_cover, drawn.spot_cover)
    fans = result.detections[result.detections["kind"] == "fan"]
    assert len(fans) > 0
    sectors = float((fans["length_px"] ** 2 * np.radians(fans["opening_deg"]) / 2).sum())
    assert 0.5 * sectors < result.fan_cover.sum() <= 1.05 * sectors + 10 * len(fans)


def test_detect_tile_is_deterministic(model_and_tile):
    model, tile, tile_id = model_and_tile
    a = detect_tile(model, tile, tile_id=tile_id)
    b = detect_tile(model, tile, tile_id=tile_id)
    pd.testing.assert_frame_equal(a.detections, b.detections)
    np.testing.assert_array_equal(a.proba, b.proba)


def test_min_score_filters(model_and_tile):
    model, tile, tile_id = model_and_tile
    low = detect_tile(model, tile, tile_id=tile_id, min_score=0.0).detections
    high = detect_tile(model, tile, tile_id=tile_id, min_score=0.9).detections
    assert len(high) <= len(low)
    assert (high["score"] >= 0.9).all()


def test_all_nodata_tile(model_and_tile):
    model, tile, _ = model_and_tile
    empty = np.zeros_like(tile)  # 0 is the spec's no-data value
    result = detect_tile(model, empty, tile_id="blank")
    assert len(result.detections) == 0
    assert result.p_deposit == 0.0
    assert result.valid_fraction == 0.0
    assert not result.fan_cover.any() and not result.spot_cover.any()


def test_a_tile_noisier_than_every_fitting_tile_is_smoothed_and_flagged(model_and_tile):
    # The card keeps the fitting tiles' noise range; a tile within it is read as it is, the same tile
    # with white noise well above it (sigma 4 grey levels added) is smoothed first.
    model, tile, tile_id = model_and_tile
    limit = model.noise_range.limit
    assert 0 < model.noise_range.target <= limit < 1
    plain = detect_tile(model, tile, tile_id=tile_id)
    assert not plain.smoothed and plain.noise <= limit
    rng = np.random.default_rng(11)
    noisy = np.clip(np.rint(tile.astype(float) + rng.normal(0.0, 4.0 * 257 if tile.dtype == np.uint16 else 4.0,
                                                            tile.shape)), 0, np.iinfo(tile.dtype).max)
    noisy = noisy.astype(tile.dtype)
    result = detect_tile(model, noisy, tile_id=tile_id)
    assert result.smoothed and result.noise > limit
    assert result.noise == pytest.approx(np.hypot(plain.noise, 4.0 / 255), rel=0.1)  # noises add in variance


def test_a_block_reads_its_tiles_together_in_any_order(model_and_tile, tiny_tileset):
    # One result per tile, in the order given; a tile with no dark component adds no reading, so a tile
    # read beside it is read as alone; two tiles with readings give the same results in either order.
    model, tile, tile_id = model_and_tile
    blank = np.full_like(tile, int(np.median(tile)))
    alone = detect_tile(model, tile, tile_id=tile_id, min_score=0.0)
    first, empty = detect_block(model, [tile, blank], tile_ids=[tile_id, "blank"], min_score=0.0)
    pd.testing.assert_frame_equal(first.detections, alone.detections)
    assert empty.tile_id == "blank" and len(empty.detections) == 0
    tileset = load_tileset(tiny_tileset)
    other_id = tileset.tiles["tile_id"].iloc[1]
    other = tileset.read_tile(other_id)
    a, b = detect_block(model, [tile, other], tile_ids=[tile_id, other_id], min_score=0.0)
    b2, a2 = detect_block(model, [other, tile], tile_ids=[other_id, tile_id], min_score=0.0)
    pd.testing.assert_frame_equal(a.detections, a2.detections)
    pd.testing.assert_frame_equal(b.detections, b2.detections)
    assert (a.detections["tile_id"] == tile_id).all() and (b.detections["tile_id"] == other_id).all()
