"""Tests of detector.gis.geojson: RFC 7946 structure, polygon areas, georeferenced output."""

import json

import numpy as np
import pandas as pd
import pytest
import pyproj
from affine import Affine

from detector.errors import DetectorError
from detector.gis.geo import MARS_SOUTH_POLAR_STEREO, Georeferencer
from detector.gis.geojson import detections_to_geojson, ring_signed_area, split_lonlat_ring, write_geojson


def _detections():
    nan = np.nan
    return pd.DataFrame(
        {
            "tile_id": ["A_r00000_c00000", "A_r00000_c00000", "A_r00000_c00800"],
            "kind": ["fan", "spot", "fan"],
            "x_px": [100.0, 300.0, 950.0],
            "y_px": [200.0, 250.0, 120.0],
            "direction_deg": [30.0, 100.0, 270.0],
            "length_px": [40.0, nan, 25.0],
            "opening_deg": [35.0, nan, 90.0],
            "semi_major_px": [nan, 12.0, nan],
            "semi_minor_px": [nan, 7.0, nan],
            "votes": [5, 4, 3],
            "fan_vote_share": [0.8, 0.1, 1.0],
            "score": [0.91, 0.55, 0.7],
            "direction_confidence": [0.6, nan, 0.9],
        }
    )


def _shoelace_oracle(ring):
    # Naive oracle: the shoelace formula written out vertex by vertex.
    total = 0.0
    for (x0, y0), (x1, y1) in zip(ring[:-1], ring[1:]):
        total += x0 * y1 - x1 * y0
    return total / 2.0


def _check_structure(fc):
    # RFC 7946: FeatureCollection of Features; a Polygon is an array of linear rings, each a closed
    # list of >= 4 positions (section 3.1.6), exterior ring counter-clockwise (right-hand rule).
    assert fc["type"] == "FeatureCollection"
    for feature in fc["features"]:
        assert feature["type"] == "Feature"
        assert feature["geometry"]["type"] == "Polygon"
        (ring,) = feature["geometry"]["coordinates"]
        assert len(ring) >= 4
        assert ring[0] == ring[-1]
        assert all(len(p) == 2 for p in ring)
        assert _shoelace_oracle(ring) > 0
        assert isinstance(feature["properties"], dict)


def test_pixel_geojson_structure_and_properties():
    fc = detections_to_geojson(_detections())
    _check_structure(fc)
    # RFC 7946 section 4: no "crs" member; and no foreign top-level member either.
    assert set(fc) == {"type", "features"}
    fan, spot, _ = fc["features"]
    assert fan["properties"]["tile_id"] == "A_r00000_c00000"
    assert fan["properties"]["votes"] == 5 and isinstance(fan["properties"]["votes"], int)
    assert fan["properties"]["semi_major_px"] is None  # NaN -> null
    assert spot["properties"]["direction_confidence"] is None
    # The fan's apex is a vertex, in image pixels.
    assert [100.0, 200.0] in fan["geometry"]["coordinates"][0]
    # Spot vertices lie on the ellipse: rotate into its axes and check (u/a)^2 + (v/b)^2 = 1.
    ring = np.array(spot["geometry"]["coordinates"][0])
    d = np.radians(100.0)
    axis = np.array([np.sin(d), -np.cos(d)])  # degrees clockwise from up, y down
    rel = ring - [300.0, 250.0]
    u = rel @ axis
    v = rel @ np.array([-axis[1], axis[0]])
    np.testing.assert_allclose((u / 12.0) ** 2 + (v / 7.0) ** 2, 1.0, atol=1e-9)


def test_fan_polygon_area_matches_sector_area():
    # Area of a circular sector: r^2 theta / 2 (theta in radians); the inscribed polygon with
    # n arc vertices has exactly (n - 1) r^2 sin(theta / (n - 1)) / 2.
    r, spread, n = 50.0, 60.0, 257
    df = pd.DataFrame({"kind": ["fan"], "x_px": [0.0], "y_px": [0.0], "direction_deg": [123.0],
                       "length_px": [r], "opening_deg": [spread]})
    ring = np.array(detections_to_geojson(df, n_arc=n)["features"][0]["geometry"]["coordinates"][0])
    theta = np.radians(spread)
    area = ring_signed_area(ring)
    assert area == pytest.approx(_shoelace_oracle(ring.tolist()))
    assert area == pytest.approx((n - 1) * r**2 * np.sin(theta / (n - 1)) / 2.0, rel=1e-12)
    assert area == pytest.approx(r**2 * theta / 2.0, rel=1e-4)
    # Spot: polygon inscribed in the ellipse approaches pi a b.
    df = pd.DataFrame({"kind": ["spot"], "x_px": [5.0], "y_px": [5.0], "direction_deg": [20.0],
                       "semi_major_px": [9.0], "semi_minor_px": [4.0]})
    ring = np.array(detections_to_geojson(df, n_ellipse=720)["features"][0]["geometry"]["coordinates"][0])
    assert ring_signed_area(ring) == pytest.approx(np.pi * 9.0 * 4.0, rel=1e-4)


def test_georeferenced_geojson(tmp_path):
    transform = Affine(0.5, 0.0, 20_000.0, 0.0, -0.5, 40_000.0)
    georef = Georeferencer(MARS_SOUTH_POLAR_STEREO, transform)
    df = _detections()
    fc = detections_to_geojson(df, georef=georef)
    _check_structure(fc)
    assert set(fc) == {"type", "features"}
    fan = fc["features"][0]
    # The apex vertex is the pixel centre, transform * (col + 0.5, row + 0.5), as lon/lat: PROJ's own
    # inverse south polar stereographic into the IAU 2015 Mars sphere (IAU_2015:49900, lat, lon order).
    apex = (20_000.0 + 0.5 * 100.5, 40_000.0 - 0.5 * 200.5)
    lat_ref, lon_ref = pyproj.Transformer.from_crs(MARS_SOUTH_POLAR_STEREO, "IAU_2015:49900").transform(*apex)
    ring = np.array(fan["geometry"]["coordinates"][0])
    assert np.min(np.hypot(ring[:, 0] - lon_ref, ring[:, 1] - lat_ref)) < 1e-9
    assert (np.abs(ring[:, 0]) <= 180).all() and (ring[:, 1] < -80).all()
    props = fan["properties"]
    lon, lat = georef.pixel_to_lonlat(100.0, 200.0)
    assert props["lon_deg"] == pytest.approx(lon) and props["lat_deg"] == pytest.approx(lat)
    # North-up south polar grid: azimuth = direction - longitude (see test_geo).
    assert (props["azimuth_deg"] - (30.0 - lon)) % 360.0 == pytest.approx(0.0, abs=1e-5)
    assert props["wind_from_deg"] == pytest.approx((props["azimuth_deg"] + 180.0) % 360.0)
    spot = fc["features"][1]["properties"]
    assert spot["wind_from_deg"] is None and 0.0 <= spot["azimuth_deg"] < 180.0
    path = tmp_path / "detections.geojson"
    write_geojson(path, fc)
    assert json.loads(path.read_text(encoding="utf-8")) == fc


def test_json_round_trip_and_nan_refused(tmp_path):
    fc = detections_to_geojson(_detections())
    path = tmp_path / "out" / "det.geojson"
    write_geojson(path, fc)
    assert json.loads(path.read_text(encoding="utf-8")) == fc
    with pytest.raises(DetectorError, match="cannot be written"):
        write_geojson(tmp_path / "bad.geojson", {"type": "FeatureCollection", "x": float("nan")})
    assert not (tmp_path / "bad.geojson").exists()


def test_empty_and_bad_detections():
    empty = _detections().iloc[:0]
    assert detections_to_geojson(empty)["features"] == []
    bad = _detections()
    bad.loc[2, "kind"] = "crater"
    with pytest.raises(DetectorError, match="row 3: kind 'crater'"):
        detections_to_geojson(bad)
    bad = _detections()
    bad.loc[0, "length_px"] = np.nan
    with pytest.raises(DetectorError, match="row 1: fan length_px"):
        detections_to_geojson(bad)
    with pytest.raises(DetectorError, match="lack column"):
        detections_to_geojson(_detections().drop(columns="y_px"))


def test_chunked_writing_equals_one_collection(tmp_path):
    from detector.gis.geojson import write_geojson, write_geojson_chunks

    def collection(k0, k1):
        return {"type": "FeatureCollection",
                "features": [{"type": "Feature", "properties": {"i": i},
                              "geometry": {"type": "Point", "coordinates": [float(i), 0.5]}} for i in range(k0, k1)]}

    write_geojson(tmp_path / "whole.geojson", collection(0, 7))
    write_geojson_chunks(tmp_path / "chunks.geojson", iter([collection(0, 3), collection(3, 3), collection(3, 7)]))
    assert json.loads((tmp_path / "chunks.geojson").read_text()) == json.loads((tmp_path / "whole.geojson").read_text())


def test_ring_across_the_antimeridian_is_cut_into_two():
    # RFC 7946 section 3.1.9: a geometry crossing the antimeridian is cut there.
    pieces = split_lonlat_ring(np.array([170.0, -170.0, -170.0, 170.0]), np.array([0.0, 0.0, 10.0, 10.0]))
    assert len(pieces) == 2
    assert sorted(abs(ring_signed_area(p)) for p in pieces) == pytest.approx([100.0, 100.0])
    assert all((np.abs(p[:, 0]) <= 180.0).all() for p in pieces)
    # A ring that does not cross stays whole and untouched.
    (whole,) = split_lonlat_ring(np.array([10.0, 20.0, 20.0]), np.array([0.0, 0.0, 5.0]))
    np.testing.assert_allclose(whole, [[10, 0], [20, 0], [20, 5]])


def test_ring_around_the_south_pole_is_closed_through_it():
    # A circle of latitude -89 around the pole: in lon/lat the cap is the band [-180, 180] x [-90, -89].
    lon = np.arange(0.0, 360.0, 10.0)
    pieces = split_lonlat_ring(lon, np.full(lon.shape, -89.0))
    area = sum(abs(ring_signed_area(p)) for p in pieces)
    assert area == pytest.approx(360.0)
    assert min(p[:, 1].min() for p in pieces) == -90.0
