"""Reading a tile at its model's pixel scale: when a tile is resampled, how, and how its objects come back.

The resampling is :func:`skimage.transform.resize` (bilinear, Gaussian anti-aliasing when shrinking),
checked against that library call. Bilinear interpolation reproduces a linear ramp exactly, and a
position maps between pixel grids through its pixel's edges, ``(x + 0.5) * f - 0.5`` (the
pixel-centre convention of scikit-image and OpenCV; common practice). Full-resolution images of the
south polar cap are taken at about 0.25 m/px and binned 2 x 2 to 0.5 m/px (common practice; values
from memory).
"""

import json
import shutil

import numpy as np
import pandas as pd
import pytest
from skimage.transform import resize

from detector.errors import ImageError, ModelError
from detector.inference.detect import detect_tile
from detector.inference.model import load_model
from detector.tile.scale import PixelScale, frame_factors, resample_tile, to_read_frame, to_tile_frame
from detector.tileset import load_tileset


def test_of_tiles_keeps_median_and_range_and_skips_unknown_scales():
    scale = PixelScale.of_tiles([0.25, np.nan, 0.30, -1.0, 0.26, 0.0], tolerance=0.1)
    assert (scale.metres_per_px, scale.lo, scale.hi, scale.tolerance) == (0.26, 0.25, 0.30, 0.1)
    assert PixelScale.of_tiles([np.nan, 0.0]) is None
    assert PixelScale.from_card(scale.to_card()) == scale
    assert PixelScale.from_card(None) is None


@pytest.mark.parametrize("metres_per_px, zoom", [
    (0.25 / 1.15, 1.0),          # the finest tile read as it is (boundary included)
    (0.25, 1.0), (0.30, 1.0),
    (0.30 * 1.15, 1.0),          # the coarsest tile read as it is
    (0.5, 0.5 / 0.26),           # binned 2 x 2: each pixel read as 1.92
    (0.1, 0.1 / 0.26),           # finer than every fitting tile: shrunk
    (1.03, 1.03 / 0.26), (0.066, 0.066 / 0.26),  # nearly four times the median either way (a 4 x 4 binning): still resampled
    (1.05, 1.0), (10.0, 1.0), (0.06, 1.0),  # further off, another camera: read as it is
    (None, 1.0), (np.nan, 1.0), (0.0, 1.0), (-0.5, 1.0),  # unknown scale: as it is
])
def test_zoom_reads_tiles_outside_the_range_at_the_median_scale(metres_per_px, zoom):
    scale = PixelScale(0.26, 0.25, 0.30, 0.15)
    assert scale.zoom(metres_per_px) == pytest.approx(zoom, rel=1e-12)


def test_resample_tile_is_skimage_bilinear_and_keeps_a_ramp_linear():
    y, x = np.mgrid[0:60, 0:80]
    tile = (40 + x + 2 * y).astype(np.uint8)  # 40-237: no clipping
    out, nodata = resample_tile(tile, np.zeros(tile.shape, bool), 2.0)
    assert out.shape == (120, 160) and out.dtype == np.uint8 and not nodata.any()
    ref = resize(tile.astype(float), (120, 160), order=1, mode="reflect", anti_aliasing=False, preserve_range=True)
    np.testing.assert_array_equal(out, np.clip(np.round(ref), 1, 255).astype(np.uint8))
    # Away from the border the bilinear output is the ramp at the mapped position, (i + 0.5) / 2 - 0.5.
    ys, xs = np.mgrid[2:118, 2:158]
    expected = 40 + ((xs + 0.5) / 2 - 0.5) + 2 * ((ys + 0.5) / 2 - 0.5)
    assert np.abs(out[2:118, 2:158] - expected).max() <= 0.5 + 1e-9


def test_resample_tile_shrinks_with_antialiasing_as_skimage_does():
    rng = np.random.default_rng(0)
    tile = rng.integers(50, 200, size=(90, 120)).astype(np.uint16) * 257
    out, _ = resample_tile(tile, np.zeros(tile.shape, bool), 0.5)
    ref = resize(tile.astype(float), (45, 60), order=1, mode="reflect", anti_aliasing=True, preserve_range=True)
    np.testing.assert_array_equal(out, np.clip(np.round(ref), 1, 65535).astype(np.uint16))


def test_resample_tile_keeps_no_data_out_of_its_neighbours():
    tile = np.full((40, 40), 120, np.uint8)
    tile[:, :10] = 0                      # no-data strip
    out, nodata = resample_tile(tile, tile == 0, 2.0)
    assert nodata[:, :19].all() and not nodata[:, 21:].any()
    assert (out[~nodata] == 120).all()    # the zeros did not darken the valid pixels
    assert (out[nodata] == 0).all()
    f = np.where(tile == 0, np.nan, tile / 255.0)
    fout, fnodata = resample_tile(f, np.isnan(f), 0.5)
    assert fout.dtype == f.dtype and np.isnan(fout[fnodata]).all()
    np.testing.assert_allclose(fout[~fnodata], 120 / 255.0)


def test_resample_tile_refuses_bad_input():
    with pytest.raises(ImageError, match="zoom"):
        resample_tile(np.ones((8, 8), np.uint8), np.zeros((8, 8), bool), 0.0)
    with pytest.raises(ImageError, match="shape"):
        resample_tile(np.ones((8, 8), np.uint8), np.zeros((4, 8), bool), 2.0)


def test_objects_map_between_frames_through_pixel_edges():
    objects = pd.DataFrame({"x_px": [0.0, 99.0], "y_px": [0.0, 49.5], "direction_deg": [30.0, 200.0],
                            "length_px": [10.0, np.nan], "opening_deg": [40.0, np.nan],
                            "semi_major_px": [np.nan, 6.0], "semi_minor_px": [np.nan, 3.0]})
    fx, fy = frame_factors((50, 100), (100, 200))
    assert (fx, fy) == (2.0, 2.0)
    read = to_read_frame(objects, fx, fy)
    # the centre of pixel 0 is the corner shared by read pixels 0 and 1
    assert read["x_px"].tolist() == [0.5, 198.5] and read["y_px"].tolist() == [0.5, 99.5]
    assert read["length_px"].iloc[0] == 20.0 and read["semi_major_px"].iloc[1] == 12.0
    assert read["direction_deg"].tolist() == [30.0, 200.0] and read["opening_deg"].iloc[0] == 40.0
    pd.testing.assert_frame_equal(to_tile_frame(read, fx, fy), objects)


@pytest.fixture(scope="module")
def scaled_model(tiny_model, tmp_path_factory):
    """The tiny model with a known fitting scale of 0.25 m/px."""
    folder = tmp_path_factory.mktemp("scaled") / "model"
    shutil.copytree(tiny_model[0], folder)
    card = json.loads((folder / "model.json").read_text())
    card["pixel_scale"] = PixelScale(0.25, 0.25, 0.25, 0.15).to_card()
    (folder / "model.json").write_text(json.dumps(card))
    return load_model(folder)


def test_tiny_model_card_records_its_fitting_tiles_scale(tiny_model, tiny_tileset):
    card = tiny_model[1]
    tiles = load_tileset(tiny_tileset).tiles.set_index("image_id")
    fit = tiles.loc[card["training"]["images"]["fit"], "metres_per_px"]
    assert card["pixel_scale"]["metres_per_px"] == pytest.approx(float(np.median(fit)))
    assert (card["pixel_scale"]["min"], card["pixel_scale"]["max"]) == (fit.min(), fit.max())


def test_a_binned_tile_is_read_at_the_model_scale_and_mapped_back(scaled_model, tiny_tileset):
    tileset = load_tileset(tiny_tileset)
    tile_id = tileset.tiles["tile_id"].iloc[0]
    full = tileset.read_tile(tile_id)
    # binned 2 x 2: 0.5 m/px against the model's 0.25
    binned = full[: full.shape[0] // 2 * 2, : full.shape[1] // 2 * 2].astype(np.float64)
    binned = binned.reshape(binned.shape[0] // 2, 2, binned.shape[1] // 2, 2).mean(axis=(1, 3))
    binned = np.clip(np.round(binned), 1, 255).astype(full.dtype)
    within = detect_tile(scaled_model, binned, tile_id="t", metres_per_px=0.27)
    plain = detect_tile(scaled_model, binned, tile_id="t")
    pd.testing.assert_frame_equal(within.detections, plain.detections)
    assert not within.resampled

    result = detect_tile(scaled_model, binned, tile_id="t", metres_per_px=0.5)
    assert result.resampled and result.read_shape == (2 * binned.shape[0], 2 * binned.shape[1])
    assert result.shape == binned.shape and result.fan_cover.shape == binned.shape
    # the same as reading skimage's bilinear resampling of the tile and halving every position and size
    read = np.clip(np.round(resize(binned.astype(float), result.read_shape, order=1, mode="reflect",
                                   anti_aliasing=False, preserve_range=True)), 1, 255).astype(binned.dtype)
    direct = detect_tile(scaled_model, read, tile_id="t").detections
    assert len(direct) == len(result.detections) > 0
    np.testing.assert_allclose(result.detections["x_px"], (direct["x_px"] + 0.5) / 2 - 0.5)
    np.testing.assert_allclose(result.detections["length_px"], direct["length_px"] / 2)
    np.testing.assert_array_equal(result.detections["direction_deg"], direct["direction_deg"])
    x, y = result.grid_xy()
    np.testing.assert_allclose(x, (np.asarray(result.grid.x_px) + 0.5) / 2 - 0.5)
    assert x.min() >= -0.5 and x.max() < binned.shape[1] - 0.5 and y.max() < binned.shape[0] - 0.5


def test_a_card_without_scale_never_resamples(tiny_model, tiny_tileset):
    folder = tiny_model[0]
    card = json.loads((folder / "model.json").read_text())
    model = load_model(folder)
    assert model.pixel_scale == PixelScale.from_card(card.get("pixel_scale"))
    model.card.pop("pixel_scale", None)
    tileset = load_tileset(tiny_tileset)
    tile_id = tileset.tiles["tile_id"].iloc[0]
    tile = tileset.read_tile(tile_id)
    assert model.pixel_scale is None
    assert not detect_tile(model, tile, metres_per_px=5.0).resampled


@pytest.mark.parametrize("entry, field", [
    ({"metres_per_px": 0.3, "min": 0.25, "max": 0.2, "tolerance": 0.1}, "pixel_scale.max"),
    ({"metres_per_px": 0.5, "min": 0.25, "max": 0.3, "tolerance": 0.1}, "pixel_scale.metres_per_px"),
    ({"metres_per_px": 0.25, "min": 0.0, "max": 0.3, "tolerance": 0.1}, "pixel_scale.min"),
    ({"metres_per_px": 0.25, "min": 0.25, "max": 0.3, "tolerance": -1}, "pixel_scale.tolerance"),
    ("0.25", "pixel_scale"),
])
def test_a_card_with_a_bad_scale_is_refused_naming_the_field(tiny_model, tmp_path, entry, field):
    folder = tmp_path / "model"
    shutil.copytree(tiny_model[0], folder)
    card = json.loads((folder / "model.json").read_text())
    card["pixel_scale"] = entry
    (folder / "model.json").write_text(json.dumps(card))
    with pytest.raises(ModelError, match=field.replace(".", r"\.")):
        load_model(folder)
