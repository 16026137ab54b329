"""Tests of detector.gis.raster: window plans, windowed reads, GeoTIFF writing and mosaics."""

import numpy as np
import pandas as pd
import pytest
import rasterio
from affine import Affine

from detector.errors import ImageError, SpecError, TileSetError
from detector.gis.geo import MARS_SOUTH_POLAR_STEREO
from detector.io import write_image
from detector.gis.raster import (
    TileWindow,
    mosaic_tiles,
    open_raster,
    plan_windows,
    write_by_windows,
    write_geotiff,
)

TRANSFORM = Affine(0.5, 0.0, -12_000.0, 0.0, -0.5, 34_000.0)


def _image(height, width, seed=0, dtype=np.uint16):
    rng = np.random.default_rng(seed)
    return rng.integers(1, 4000, size=(height, width)).astype(dtype)


@pytest.mark.parametrize(("width", "height", "tile", "overlap"), [(2000, 1300, (800, 600), 32), (800, 600, (800, 600), 0),
                                                                   (17, 5, (4, 3), 2), (1, 1, (800, 600), 32)])
def test_window_cores_cover_the_image_exactly_once(width, height, tile, overlap):
    windows = plan_windows(width, height, tile=tile, overlap=overlap, image="img")
    # Naive oracle: paint every core and every read window on a counter image.
    cores = np.zeros((height, width), dtype=int)
    for w in windows:
        cores[w.row0 : w.row0 + w.height, w.col0 : w.col0 + w.width] += 1
        # The read window is the core grown by the overlap, clipped to the image.
        assert w.read_col0 == max(0, w.col0 - overlap)
        assert w.read_row0 == max(0, w.row0 - overlap)
        assert w.read_col0 + w.read_width == min(width, w.col0 + w.width + overlap)
        assert w.read_row0 + w.read_height == min(height, w.row0 + w.height + overlap)
        assert 1 <= w.width <= tile[0] and 1 <= w.height <= tile[1]
    assert np.all(cores == 1)
    n_cols, n_rows = -(-width // tile[0]), -(-height // tile[1])
    assert len(windows) == n_cols * n_rows
    assert len({w.tile_id for w in windows}) == len(windows)


def test_tile_ids_and_edge_tiles():
    windows = plan_windows(2000, 1300, tile=(800, 600), overlap=32, image="SCN_0001")
    assert windows[0] == TileWindow("SCN_0001_r00000_c00000", "SCN_0001", 0, 0, 800, 600, 0, 0, 832, 632)
    last = windows[-1]
    assert last.tile_id == "SCN_0001_r01200_c01600"
    assert (last.width, last.height) == (400, 100)
    assert (last.read_col0, last.read_row0, last.read_width, last.read_height) == (1568, 1168, 432, 132)


@pytest.mark.parametrize("bad", [{"tile": (0, 600)}, {"tile": (800,)}, {"overlap": -1}, {"overlap": 1.5}])
def test_bad_plan_parameters(bad):
    with pytest.raises(SpecError):
        plan_windows(100, 100, **bad)


def test_windowed_reads_reproduce_the_written_geotiff(tmp_path):
    image = _image(1100, 1700, seed=1)
    path = tmp_path / "scene.tif"
    write_geotiff(path, image, crs=MARS_SOUTH_POLAR_STEREO, transform=TRANSFORM)
    with rasterio.open(path) as ds:
        assert ds.profile["tiled"] and ds.block_shapes[0] == (256, 256)
    rebuilt = np.zeros_like(image)
    with open_raster(path) as src:
        assert (src.width, src.height, src.dtype) == (1700, 1100, np.dtype(np.uint16))
        assert src.is_georeferenced
        assert src.transform.almost_equals(TRANSFORM)
        assert src.georeferencer().crs.ellipsoid.semi_major_metre == pytest.approx(3396190.0)
        for w in src.windows(tile=(800, 600), overlap=40):
            array, mask = src.read(w)
            assert array.shape == (w.read_height, w.read_width)
            # The read window is exactly that part of the image.
            np.testing.assert_array_equal(
                array, image[w.read_row0 : w.read_row0 + w.read_height, w.read_col0 : w.read_col0 + w.read_width]
            )
            assert not mask.any()
            rebuilt[w.row0 : w.row0 + w.height, w.col0 : w.col0 + w.width] = array[w.core_slices]
        np.testing.assert_array_equal(src.read((5, 7, 3, 2))[0], image[7:9, 5:8])
    np.testing.assert_array_equal(rebuilt, image)


def test_write_by_windows_matches_the_function(tmp_path):
    def fill(col0, row0, width, height):
        rows, cols = np.mgrid[row0 : row0 + height, col0 : col0 + width]
        return ((rows * 7 + cols * 3) % 255).astype(np.uint8)

    path = tmp_path / "big.tif"
    write_by_windows(path, 1300, 900, fill, crs=MARS_SOUTH_POLAR_STEREO, transform=TRANSFORM, window=512)
    with open_raster(path) as src:
        array, _ = src.read()
    np.testing.assert_array_equal(array, fill(0, 0, 1300, 900))


def test_missing_and_corrupt_files_raise_image_error(tmp_path):
    with pytest.raises(ImageError, match="does not exist"):
        open_raster(tmp_path / "absent.tif")
    corrupt = tmp_path / "corrupt.tif"
    corrupt.write_bytes(np.random.default_rng(5).integers(0, 256, 4096, dtype=np.uint8).tobytes())
    with pytest.raises(ImageError, match="corrupt.tif"):
        open_raster(corrupt)


def test_multiband_needs_a_band(tmp_path):
    path = tmp_path / "rgb.tif"
    data = np.stack([_image(40, 50, seed=s, dtype=np.uint8) for s in range(3)])
    with rasterio.open(path, "w", driver="GTiff", width=50, height=40, count=3, dtype="uint8",
                       transform=TRANSFORM) as dst:
        dst.write(data)
    with pytest.raises(ImageError, match="3 bands; choose one"):
        open_raster(path)
    with pytest.raises(ImageError, match="band 4 does not exist"):
        open_raster(path, band=4)
    with open_raster(path, band=2) as src:
        np.testing.assert_array_equal(src.read()[0], data[1])


def test_nodata_mask(tmp_path):
    image = _image(64, 80, seed=2)
    image[:10, :] = 0  # outside the footprint
    image[30:33, 40:45] = 7
    path = tmp_path / "nodata.tif"
    write_geotiff(path, image, crs=None, transform=None, nodata=0)
    with open_raster(path) as src:
        assert src.nodata == 0 and not src.is_georeferenced
        _, mask = src.read()
        np.testing.assert_array_equal(mask, image == 0)
    with open_raster(path, nodata=7) as src:
        _, mask = src.read((40, 30, 5, 3))
        assert mask.all()
    # A float image marks non-finite pixels too, whatever its nodata value.
    floats = image.astype(np.float32) / image.max()  # float images are read as [0, 1]
    floats[50, 50] = np.nan
    write_geotiff(tmp_path / "float.tif", floats, nodata=-9999.0)
    with open_raster(tmp_path / "float.tif") as src:
        _, mask = src.read()
        assert src.nodata == -9999.0
        np.testing.assert_array_equal(mask, ~np.isfinite(floats))


def test_plain_png_is_read_without_georeferencing(tmp_path):
    image = _image(30, 40, seed=3, dtype=np.uint8)
    write_image(tmp_path / "tile.png", image)
    with open_raster(tmp_path / "tile.png") as src:
        assert not src.is_georeferenced
        assert src.nodata == 0
        np.testing.assert_array_equal(src.read()[0], image)
        with pytest.raises(ImageError, match="not georeferenced"):
            src.georeferencer()


def test_mosaic_round_trip(tmp_path):
    image = _image(1000, 1500, seed=4)
    rows = []
    # Tiles of an invented source image, plus a tile of another image that must be left out.
    for w in plan_windows(1500, 1000, tile=(800, 600), overlap=0, image="SCN_042"):
        rel = f"tiles/{w.tile_id}.png"
        write_image(tmp_path / rel, image[w.row0 : w.row0 + w.height, w.col0 : w.col0 + w.width])
        rows.append({"tile_id": w.tile_id, "image_id": "SCN_042", "path": rel, "col0": w.col0, "row0": w.row0})
    write_image(tmp_path / "tiles/other.png", np.ones((600, 800), dtype=np.uint16))
    rows.append({"tile_id": "other", "image_id": "SCN_043", "path": "tiles/other.png", "col0": 0, "row0": 0})
    tiles = pd.DataFrame(rows).sample(frac=1.0, random_state=0)
    out = tmp_path / "mosaic.tif"
    shape = mosaic_tiles(tiles, tmp_path, "SCN_042", out, crs=MARS_SOUTH_POLAR_STEREO, transform=TRANSFORM)
    assert shape == image.shape
    with open_raster(out) as src:
        np.testing.assert_array_equal(src.read()[0], image)
        assert src.transform.almost_equals(TRANSFORM)
    with pytest.raises(TileSetError, match="no tile of image_id 'SCN_999'"):
        mosaic_tiles(tiles, tmp_path, "SCN_999", out)
    broken = tiles.assign(col0=np.where(tiles["tile_id"] == "SCN_042_r00000_c00800", np.nan, tiles["col0"]))
    with pytest.raises(TileSetError, match="SCN_042_r00000_c00800"):
        mosaic_tiles(broken, tmp_path, "SCN_042", out)
