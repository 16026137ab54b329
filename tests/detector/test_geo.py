"""Tests of detector.gis.geo against map-projection formulas and pyproj."""

import numpy as np
import pyproj
import pytest
from affine import Affine

from detector.errors import DetectorError
from detector.gis.geo import (
    MARS_EQUIRECTANGULAR,
    MARS_GEOGRAPHIC,
    MARS_RADIUS_M,
    MARS_SOUTH_POLAR_STEREO,
    Georeferencer,
    length_m,
    metres_per_px,
    wind_from_deg,
)


def _south_polar_georef(transform_linear=Affine.scale(0.5, -0.5)):
    # Image centred on the pole, 0.5 m/px, so any lon/lat near the pole is in it.
    return Georeferencer(MARS_SOUTH_POLAR_STEREO, Affine.translation(-50_000.0, 50_000.0) @ transform_linear)


def _wrap(angle):
    return (np.asarray(angle, dtype=float) + 180.0) % 360.0 - 180.0


def test_mars_crs_ellipsoid_is_the_iau_sphere():
    # IAU WGCCRE 2015 (Archinal et al. 2018): Mars reference radius 3396.19 km (value from memory).
    for crs in (MARS_SOUTH_POLAR_STEREO, MARS_EQUIRECTANGULAR, MARS_GEOGRAPHIC):
        assert crs.ellipsoid.semi_major_metre == pytest.approx(3396190.0)
        assert crs.ellipsoid.semi_minor_metre == pytest.approx(3396190.0)
        assert "Mars" in crs.ellipsoid.name
    assert MARS_RADIUS_M == 3396190.0
    assert MARS_SOUTH_POLAR_STEREO.is_projected
    # The WKT survives a round trip through pyproj's parser.
    again = pyproj.CRS.from_wkt(MARS_SOUTH_POLAR_STEREO.to_wkt())
    assert again.ellipsoid.semi_major_metre == pytest.approx(3396190.0)


def test_south_polar_matches_proj_string_and_iau_database():
    lon = np.array([0.0, 37.0, 90.0, -135.0])
    lat = np.array([-89.0, -81.0, -75.0, -60.0])
    ours = pyproj.Transformer.from_crs(MARS_SOUTH_POLAR_STEREO.geodetic_crs, MARS_SOUTH_POLAR_STEREO, always_xy=True)
    proj4 = pyproj.CRS.from_proj4("+proj=stere +lat_0=-90 +lat_ts=-90 +lon_0=0 +k=1 +x_0=0 +y_0=0 +R=3396190 +units=m")
    ref = pyproj.Transformer.from_crs(proj4.geodetic_crs, proj4, always_xy=True)
    np.testing.assert_allclose(ours.transform(lon, lat), ref.transform(lon, lat), atol=1e-6)
    try:
        iau = pyproj.CRS("IAU_2015:49935")  # IAU 2015 Mars sphere, south polar, in PROJ's database
    except pyproj.exceptions.CRSError:
        pytest.skip("PROJ database without IAU_2015 codes")
    ref = pyproj.Transformer.from_crs(iau.geodetic_crs, iau, always_xy=True)
    np.testing.assert_allclose(ours.transform(lon, lat), ref.transform(lon, lat), atol=1e-6)


def test_south_polar_azimuth_hand_case():
    # Snyder, Map Projections: A Working Manual (USGS PP 1395, 1987), polar stereographic,
    # south polar aspect (eqs. 21-30/21-31 from memory): x = rho sin(lon - lon0), y = rho cos(lon - lon0),
    # with rho increasing away from the pole. True north (lat increasing) is therefore the outward
    # radial direction (sin dlon, cos dlon), whose grid bearing (clockwise from grid up, +y) is dlon.
    # At lon = lon0 + 90 = 90 E: north points grid-right (bearing 90); east, d/dlon (rho cos, -rho sin)
    # = (0, -rho), points grid-down (bearing 180). A fan pointing grid-up (bearing 0) is 90 degrees
    # counter-clockwise of north, i.e. it points west: azimuth 270.
    georef = _south_polar_georef()
    col, row = georef.lonlat_to_pixel(90.0, -85.0)
    assert georef.grid_to_azimuth(0.0, col, row) == pytest.approx(270.0, abs=1e-6)
    assert _wrap(georef.grid_to_azimuth(90.0, col, row)) == pytest.approx(0.0, abs=1e-6)
    assert georef.grid_to_azimuth(180.0, col, row) == pytest.approx(90.0, abs=1e-6)
    # In general (conformal, north-up grid): azimuth = direction - dlon.
    rng = np.random.default_rng(3)
    lon = rng.uniform(-180.0, 180.0, 50)
    lat = rng.uniform(-89.5, -80.0, 50)
    direction = rng.uniform(0.0, 360.0, 50)
    col, row = georef.lonlat_to_pixel(lon, lat)
    expected = (direction - lon) % 360.0
    np.testing.assert_allclose(_wrap(georef.grid_to_azimuth(direction, col, row) - expected), 0.0, atol=1e-5)


def test_south_polar_convergence_cross_checked_with_pyproj():
    # Numerical cross-check of the hand formula: project a point and a point slightly north of it
    # with pyproj; the grid bearing of that step is the bearing of true north, dlon.
    lon = np.array([-120.0, -30.0, 0.0, 45.0, 90.0, 170.0])
    lat = np.full_like(lon, -83.0)
    fwd = pyproj.Transformer.from_crs(MARS_SOUTH_POLAR_STEREO.geodetic_crs, MARS_SOUTH_POLAR_STEREO, always_xy=True)
    x0, y0 = fwd.transform(lon, lat)
    x1, y1 = fwd.transform(lon, lat + 1e-6)
    north_bearing = np.degrees(np.arctan2(x1 - x0, y1 - y0))
    np.testing.assert_allclose(_wrap(north_bearing - lon), 0.0, atol=1e-6)
    # PROJ's meridian convergence has the same magnitude; its sign is not relied on.
    gamma = pyproj.Proj(MARS_SOUTH_POLAR_STEREO).get_factors(lon, lat).meridian_convergence
    np.testing.assert_allclose(np.abs(_wrap(gamma)), np.abs(_wrap(lon)), atol=1e-6)
    georef = _south_polar_georef()
    col, row = georef.lonlat_to_pixel(lon, lat)
    # The fan that points at grid bearing dlon points north.
    az = georef.grid_to_azimuth(lon % 360.0, col, row)
    np.testing.assert_allclose(_wrap(az), 0.0, atol=1e-5)


@pytest.mark.parametrize(
    ("linear", "image_to_grid"),
    [
        # Mirror of rows (south-up image): image up is grid down.
        (Affine.scale(0.5, 0.5), lambda d: 180.0 - d),
        # Mirror of columns: a direction d in the image is grid bearing -d.
        (Affine.scale(-0.5, -0.5), lambda d: -d),
        # Grid rotated 30 degrees counter-clockwise: a bearing d becomes d - 30.
        (Affine.rotation(30.0) @ Affine.scale(0.5, -0.5), lambda d: d - 30.0),
    ],
)
def test_azimuth_for_flipped_and_rotated_transforms(linear, image_to_grid):
    georef = _south_polar_georef(linear)
    lon = np.array([-100.0, 10.0, 75.0])
    lat = np.array([-86.0, -84.0, -88.0])
    direction = np.array([0.0, 45.0, 300.0])
    col, row = georef.lonlat_to_pixel(lon, lat)
    expected = image_to_grid(direction) - lon
    np.testing.assert_allclose(_wrap(georef.grid_to_azimuth(direction, col, row) - expected), 0.0, atol=1e-5)


def test_equirectangular_grid_up_is_north():
    # Equidistant cylindrical, Snyder (1987) ch. 12: x = R dlon cos(phi1), y = R phi. Meridians are
    # grid-vertical, so grid up is north everywhere; with phi1 = 0 the east-west scale at latitude phi
    # is 1/cos(phi) times the north-south one, so a grid bearing d has azimuth
    # atan2(sin d cos phi, cos d) (exactly d on the equator and for 0, 90, 180, 270).
    georef = Georeferencer(MARS_EQUIRECTANGULAR, Affine(25.0, 0.0, 0.0, 0.0, -25.0, 0.0))
    direction = np.array([0.0, 30.0, 90.0, 135.0, 180.0, 270.0, 333.0])
    for lat in (0.0, 40.0, -70.0):
        col, row = georef.lonlat_to_pixel(np.full(direction.shape, 20.0), np.full(direction.shape, lat))
        az = georef.grid_to_azimuth(direction, col, row)
        rad = np.radians(direction)
        expected = np.degrees(np.arctan2(np.sin(rad) * np.cos(np.radians(lat)), np.cos(rad))) % 360.0
        np.testing.assert_allclose(_wrap(az - expected), 0.0, atol=1e-5)
    col, row = georef.lonlat_to_pixel(np.full(direction.shape, -5.0), np.zeros(direction.shape))
    np.testing.assert_allclose(_wrap(georef.grid_to_azimuth(direction, col, row) - direction), 0.0, atol=1e-6)


def test_pixel_centre_convention_and_round_trip():
    transform = Affine(0.25, 0.0, 1000.0, 0.0, -0.25, -2000.0)
    georef = Georeferencer(MARS_SOUTH_POLAR_STEREO, transform)
    # Centre of the top-left pixel is half a pixel in from the corner.
    assert georef.pixel_to_map(0, 0) == pytest.approx((1000.125, -2000.125))
    rng = np.random.default_rng(0)
    col = rng.uniform(0, 20000, 100)
    row = rng.uniform(0, 20000, 100)
    lon, lat = georef.pixel_to_lonlat(col, row)
    assert np.all(lat < -89.0)
    back_col, back_row = georef.lonlat_to_pixel(lon, lat)
    np.testing.assert_allclose(back_col, col, atol=1e-6)
    np.testing.assert_allclose(back_row, row, atol=1e-6)
    # Map coordinates agree with an independent pyproj transform.
    x, y = georef.pixel_to_map(col, row)
    inv = pyproj.Transformer.from_crs(MARS_SOUTH_POLAR_STEREO, MARS_SOUTH_POLAR_STEREO.geodetic_crs, always_xy=True)
    np.testing.assert_allclose(np.array(inv.transform(x, y)), np.array([lon, lat]), atol=1e-9)


def test_georeferencer_accepts_rasterio_crs():
    rasterio_crs = pytest.importorskip("rasterio.crs").CRS.from_wkt(MARS_SOUTH_POLAR_STEREO.to_wkt())
    georef = Georeferencer(rasterio_crs, Affine(1.0, 0.0, 0.0, 0.0, -1.0, 0.0))
    assert georef.crs.ellipsoid.semi_major_metre == pytest.approx(3396190.0)


def test_wind_from_is_opposite():
    # Meteorological convention: a wind is named by where it blows from (common practice).
    assert wind_from_deg(90.0) == 270.0
    np.testing.assert_allclose(wind_from_deg([0.0, 180.0, 270.0, 359.0]), [180.0, 0.0, 90.0, 179.0])


def test_lengths_in_metres():
    assert length_m(10.0, 0.25) == pytest.approx(2.5)
    np.testing.assert_allclose(length_m(np.array([4.0, 8.0]), Affine(0.5, 0.0, 0.0, 0.0, -0.5, 0.0)), [2.0, 4.0])
    # A rotated pixel keeps its size.
    assert metres_per_px(Affine.rotation(33.0) @ Affine.scale(2.0, -2.0)) == pytest.approx(2.0)
    with pytest.raises(DetectorError, match="metres_per_px"):
        length_m(3.0, -1.0)
    georef = _south_polar_georef()
    assert georef.metres_per_px == pytest.approx(0.5)
    # Polar stereographic with k0 = 1 at the pole: k = 2 / (1 + sin|phi|) (Snyder 1987, eq. 21-4 for
    # the sphere, from memory), so the ground length is the grid length divided by k.
    col, row = georef.lonlat_to_pixel(60.0, -85.0)
    k = 2.0 / (1.0 + np.sin(np.radians(85.0)))
    assert georef.ground_length_m(100.0, 45.0, col, row) == pytest.approx(50.0 / k, rel=1e-6)
    with pytest.raises(DetectorError, match="not in metres"):
        _ = Georeferencer(MARS_GEOGRAPHIC, Affine(0.01, 0, 0, 0, -0.01, 0)).metres_per_px


def test_bad_inputs_raise_clear_errors():
    with pytest.raises(DetectorError, match="needs a CRS"):
        Georeferencer(None, Affine.identity())
    with pytest.raises(DetectorError, match="singular"):
        Georeferencer(MARS_SOUTH_POLAR_STEREO, Affine(0.0, 0.0, 0.0, 0.0, 0.0, 0.0))
    with pytest.raises(DetectorError, match="not understood"):
        Georeferencer("no such crs", Affine.identity())
