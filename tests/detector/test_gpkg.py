"""Tests of detector.gis.gpkg and of a screening's GIS files, read back with GDAL (pyogrio) and checked with PROJ."""

import json

import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
from affine import Affine

from detector.errors import DetectorError
from detector.gis.geo import MARS_SOUTH_POLAR_STEREO, Georeferencer, is_mars_crs
from detector.gis.gpkg import PIXEL_CRS_WKT, polygon_wkb, read_layer, update_tile_routes, write_polygon_layer
from detector.gis.raster import write_geotiff
from detector.screening.run import screen

from .test_screen import TILE, _scene, model_dir  # noqa: F401  (session fixture)

# 10 m pixels, 300 km east of the south pole on the +x axis of Mars south polar stereographic.
X0, Y0, RES = 300_000.0, 2_000.0, 10.0
HEIGHT, WIDTH = 380, 500


@pytest.fixture(scope="module")
def polar_run(model_dir, tmp_path_factory):  # noqa: F811
    root = tmp_path_factory.mktemp("polar")
    tif = root / "polar.tif"
    write_geotiff(tif, _scene((HEIGHT, WIDTH), 21, scenario="windy", nodata=False), crs=MARS_SOUTH_POLAR_STEREO,
                  transform=Affine(RES, 0.0, X0, 0.0, -RES, Y0))
    out = root / "out"
    screen(model_dir, [tif], out, tile=TILE, progress=False)
    return out


def _polar_k(lat_deg):
    # Scale factor of the polar stereographic projection on a sphere, true scale at the pole:
    # k = 2 / (1 + sin|lat|) (Snyder 1987, "Map Projections - A Working Manual", eq. 21-4 with k0 = 1).
    return 2.0 / (1.0 + np.sin(np.radians(np.abs(lat_deg))))


def test_geopackage_layers_carry_the_raster_crs_and_land_in_its_footprint(polar_run):
    path = polar_run / "detections.gpkg"
    layers = dict(pyogrio.list_layers(path))
    assert layers == {"detections": "Polygon", "tiles": "Polygon"}
    for layer in layers:
        crs = pyproj.CRS.from_user_input(pyogrio.read_info(path, layer=layer)["crs"])
        # GDAL stores WKT1 (variant B with true scale at the pole), the same projection: PROJ maps
        # points between the two without moving them.
        assert crs.ellipsoid.semi_major_metre == 3396190.0 and crs.is_projected, layer
        x, y = pyproj.Transformer.from_crs(crs, MARS_SOUTH_POLAR_STEREO, always_xy=True).transform(
            [X0, -1.0e6], [Y0, 5.0e5])
        np.testing.assert_allclose([x, y], [[X0, -1.0e6], [Y0, 5.0e5]], atol=1e-6)
    # Tile cores tile the raster footprint exactly (GDAL's own bounds of the features).
    _, tb = pyogrio.read_bounds(path, layer="tiles")
    np.testing.assert_allclose([tb[0].min(), tb[1].min(), tb[2].max(), tb[3].max()],
                               [X0, Y0 - HEIGHT * RES, X0 + WIDTH * RES, Y0], atol=1e-6)
    # Every detection outline overlaps the footprint, and its apex / centre (from the CSV) is inside it.
    det = pd.read_csv(polar_run / "detections.csv")
    _, db = pyogrio.read_bounds(path, layer="detections")
    assert len(det) == db.shape[1] > 0
    reach = RES * np.nan_to_num(det[["length_px", "semi_major_px"]].max(axis=1).to_numpy())
    assert (db[0] >= X0 - reach - 1e-6).all() and (db[2] <= X0 + WIDTH * RES + reach + 1e-6).all()
    assert (db[1] >= Y0 - HEIGHT * RES - reach - 1e-6).all() and (db[3] <= Y0 + reach + 1e-6).all()
    ax = X0 + RES * (det["x_px"] + det["col0"] + 0.5)
    ay = Y0 - RES * (det["y_px"] + det["row0"] + 0.5)
    assert ((db[0] - 1e-6 <= ax) & (ax <= db[2] + 1e-6) & (db[1] - 1e-6 <= ay) & (ay <= db[3] + 1e-6)).all()
    # Attributes: the tile layer has p_deposit, route (empty until `frostvane effort`), cover and counts.
    _, _, fields = read_layer(path, "tiles")
    for name in ("tile_id", "p_deposit", "route", "covered_fraction", "n_fans", "n_spots", "area_m2", "covered_m2"):
        assert name in fields, name


def test_geojson_is_lonlat_and_matches_the_geopackage(polar_run):
    collection = json.loads((polar_run / "detections.geojson").read_text())
    # RFC 7946 section 4: no "crs" member; nothing else at the top level either.
    assert set(collection) == {"type", "features"}
    # GDAL reads an RFC 7946 file as longitude / latitude.
    info = pyogrio.read_info(polar_run / "detections.geojson")
    assert pyproj.CRS.from_user_input(info["crs"]).is_geographic
    _, gb = pyogrio.read_bounds(polar_run / "detections.geojson")
    assert (gb[0] >= -180).all() and (gb[2] <= 180).all() and (gb[1] >= -90).all() and (gb[3] <= 90).all()
    # Each GeoJSON ring is the GeoPackage ring in lon/lat: PROJ's inverse projection into the IAU 2015
    # Mars sphere from PROJ's database (IAU_2015:49900, axis order lat, lon).
    _, rings, _ = read_layer(polar_run / "detections.gpkg", "detections")
    to_lonlat = pyproj.Transformer.from_crs(MARS_SOUTH_POLAR_STEREO, "IAU_2015:49900")
    assert len(rings) == len(collection["features"])
    for ring, feature in zip(rings, collection["features"], strict=True):
        lat, lon = to_lonlat.transform(ring[:, 0], ring[:, 1])
        written = np.asarray(feature["geometry"]["coordinates"][0])
        # Same vertices (orientation may be reversed to keep RFC 7946's right-hand rule).
        for lo, la in zip(lon, lat, strict=True):
            assert np.min(np.hypot(written[:, 0] - lo, written[:, 1] - la)) < 1e-9
        assert 89.0 < written[:, 0].mean() < 91.0 and -85.5 < written[:, 1].mean() < -84.5


def test_areas_are_ground_square_metres(polar_run):
    det = pd.read_csv(polar_run / "detections.csv")
    tiles = pd.read_csv(polar_run / "tiles.csv")
    k = _polar_k(det["lat_deg"].to_numpy())
    fans = (det["kind"] == "fan").to_numpy()
    # Outline of a fan: a circular sector of area (opening / 360) pi L^2 (the 32-segment arc loses < 0.1 %);
    # ground area = map area / k^2.
    sector_px = det["opening_deg"] / 360.0 * np.pi * det["length_px"] ** 2
    spot_px = np.pi * det["semi_major_px"] * det["semi_minor_px"]
    expected = np.where(fans, sector_px, spot_px) * RES**2 / k**2
    np.testing.assert_allclose(det["area_m2"], expected, rtol=3e-3)
    # A tile core: width x height x RES^2 / k^2 at its centre (k varies by < 0.01 % across one).
    georef = Georeferencer(MARS_SOUTH_POLAR_STEREO, Affine(RES, 0.0, X0, 0.0, -RES, Y0))
    _, lat = georef.pixel_to_lonlat(tiles["col0"] + tiles["width"] / 2 - 0.5, tiles["row0"] + tiles["height"] / 2 - 0.5)
    np.testing.assert_allclose(tiles["area_m2"], tiles["width"] * tiles["height"] * RES**2 / _polar_k(lat)**2,
                               rtol=2e-4)
    np.testing.assert_allclose(tiles["covered_m2"], (tiles["fan_cover"] + tiles["spot_cover"]) * tiles["area_m2"])


def test_earth_crs_is_refused_unless_allowed(model_dir, tmp_path):  # noqa: F811
    tif = tmp_path / "earth.tif"
    # WGS 84 / Antarctic Polar Stereographic: an Earth CRS.
    write_geotiff(tif, _scene((200, 250), 3, scenario="windy", nodata=False), crs="EPSG:3031",
                  transform=Affine(RES, 0.0, X0, 0.0, -RES, Y0))
    assert not is_mars_crs("EPSG:3031") and is_mars_crs(MARS_SOUTH_POLAR_STEREO) and is_mars_crs("IAU_2015:49901")
    out = tmp_path / "out"
    with pytest.raises(DetectorError, match=r"earth\.tif.*6378137 m.*not Mars.*--any-body"):
        screen(model_dir, [tif], out, tile=TILE, progress=False)
    assert not out.exists()
    screen(model_dir, [tif], out, tile=TILE, progress=False, any_body=True)
    assert (out / "detections.gpkg").is_file()


def test_planetocentric_lonlat_of_an_ographic_west_positive_crs():
    # IAU_2015:49901 is the Mars ellipsoid with ographic latitude and west-positive longitude.
    georef = Georeferencer("IAU_2015:49901", Affine(0.01, 0.0, 30.0, 0.0, -0.01, -40.0))
    lon, lat = georef.pixel_to_planetocentric(np.array([0.0, 10.0]), np.array([0.0, 20.0]))
    # Oracle: PROJ's conversion to the planetocentric, east-positive IAU_2015:49902 (native axis order).
    ographic_lat = np.array([-40.005, -40.205])
    west_lon = np.array([30.005, 30.105])
    ref_lat, ref_lon = pyproj.Transformer.from_crs("IAU_2015:49901", "IAU_2015:49902").transform(ographic_lat, west_lon)
    np.testing.assert_allclose(lon, ref_lon, atol=1e-9)
    np.testing.assert_allclose(lat, ref_lat, atol=1e-9)


def test_wkb_round_trips_through_gdal_and_routes_update(tmp_path):
    path = tmp_path / "t.gpkg"
    rings = [np.array([[0.0, 0.0], [2.0, 0.0], [2.0, 1.0]]), np.array([[5.0, 5.0], [6.0, 5.0], [6.0, 7.0]])]
    write_polygon_layer(path, "tiles", rings, {"tile_id": np.array(["a", "b"], dtype=object),
                                               "route": np.array(["", ""], dtype=object),
                                               "p_deposit": np.array([0.2, np.nan])},
                        crs_wkt=PIXEL_CRS_WKT, description="test")
    # GDAL's bounds of our WKB (OGC 06-103r4 encoding) are the rings' own.
    _, bounds = pyogrio.read_bounds(path, layer="tiles")
    np.testing.assert_allclose(bounds.T, [[0, 0, 2, 1], [5, 5, 6, 7]])
    assert polygon_wkb([rings[0]])[:9] == bytes([1, 3, 0, 0, 0, 1, 0, 0, 0])
    update_tile_routes(path, {"b": "crowd"})
    _, back, fields = read_layer(path, "tiles")
    assert list(fields["route"]) == ["", "crowd"] and np.isnan(fields["p_deposit"][1])
    np.testing.assert_allclose(back[1][:3], rings[1])
    assert not list(tmp_path.glob(".*"))


def test_polar_quicklook_uses_azimuths_with_north_arrow_and_scale_bar(model_dir, tmp_path, monkeypatch):  # noqa: F811
    from matplotlib import colormaps

    import detector.screening.outputs as screen_outputs
    from detector.geometry import direction_deg
    from detector.plots import DIRECTION_CMAP

    captured = {}
    save = screen_outputs._Figures.save

    def keep(self, *paths):
        captured["figures"] = self
        save(self, *paths)

    monkeypatch.setattr(screen_outputs._Figures, "save", keep)
    tif = tmp_path / "polar.tif"
    write_geotiff(tif, _scene((HEIGHT, WIDTH), 21, scenario="windy", nodata=False), crs=MARS_SOUTH_POLAR_STEREO,
                  transform=Affine(RES, 0.0, X0, 0.0, -RES, Y0))
    screen(model_dir, [tif], tmp_path / "out", tile=TILE, progress=False)
    figures = captured["figures"]
    assert figures.all_azimuth
    (ax,) = figures.quick_axes.values()
    (arrow,) = [t for t in ax.texts if t.get_gid() == "north_arrow"]
    (x0, y0), (x1, y1) = arrow.xyann, arrow.xy
    drawn = float(direction_deg(x1 - x0, -(y1 - y0)))  # axes fractions have y up
    # Oracle: PROJ maps a point 0.01 degree further north at the image centre back to the grid.
    to_map = pyproj.Transformer.from_crs("IAU_2015:49900", MARS_SOUTH_POLAR_STEREO)
    to_geo = pyproj.Transformer.from_crs(MARS_SOUTH_POLAR_STEREO, "IAU_2015:49900")
    cx, cy = X0 + RES * WIDTH / 2, Y0 - RES * HEIGHT / 2
    lat, lon = to_geo.transform(cx, cy)
    nx, ny = to_map.transform(lat + 0.01, lon)
    expected = float(direction_deg(nx - cx, -(ny - cy)))  # map y up is image up
    assert abs((drawn - expected + 180.0) % 360.0 - 180.0) < 0.5
    assert any(t.get_gid() == "scale_bar" and t.get_text().endswith("m") for t in ax.texts)
    assert ax.get_legend() is not None and ax.get_xlabel() == "column, px"
    # Fans coloured by azimuth, as the rose counts them (not by direction from image up).
    det = pd.read_csv(tmp_path / "out" / "detections.csv")
    fans = det[det["kind"] == "fan"]
    (collection,) = [c for c in ax.collections if len(c.get_paths()) == len(det)]
    edge = collection.get_edgecolor()[(det["kind"] == "fan").to_numpy()]
    np.testing.assert_allclose(edge[:, :3], colormaps[DIRECTION_CMAP](fans["azimuth_deg"].to_numpy() / 360.0)[:, :3],
                               atol=1e-6)
