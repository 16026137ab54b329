"""Rasterised label masks and feature outlines: areas, angle convention, overlap rules."""

import numpy as np
import pandas as pd
import pytest
from matplotlib.path import Path as MplPath
from scipy.spatial.distance import dice
from scipy.stats import circmean
from skimage.draw import ellipse as sk_ellipse
from skimage.measure import regionprops

from detector.errors import SpecError
from detector.geometry import axial_difference, angular_difference, direction_deg
from detector.labels import (
    LABEL_FAN,
    LABEL_NONE,
    LABEL_SPOT,
    coverage_fraction,
    ellipse_polygon,
    rasterise_features,
    sector_polygon,
)

SHAPE = (300, 320)
# Off-lattice centres so that no test depends on a lucky alignment with pixel centres.
CX, CY = 160.3, 149.6


def _fan(x, y, direction, length, spread, **extra):
    return dict(kind="fan", x_px=x, y_px=y, direction_deg=direction, length_px=length, opening_deg=spread, **extra)


def _spot(x, y, direction, a, b):
    return dict(kind="spot", x_px=x, y_px=y, direction_deg=direction, semi_major_px=a, semi_minor_px=b)


def _raster(*features, shape=SHAPE):
    return rasterise_features(pd.DataFrame(list(features)), shape)


def _shoelace(xy):
    # Surveyor's (shoelace) formula for the area of a simple polygon.
    x, y = xy[:, 0], xy[:, 1]
    return 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))


# --------------------------------------------------------------------------- areas


@pytest.mark.parametrize("length", [15, 40, 110])
@pytest.mark.parametrize("spread", [20, 60, 90, 180])
@pytest.mark.parametrize("direction", [0, 37, 90, 213])
def test_fan_area_matches_sector_formula(length, spread, direction):
    count = _raster(_fan(CX, CY, direction, length, spread)).fan_cover.sum()
    theta = np.radians(spread)
    area = length**2 * theta / 2  # area of a circular sector, r^2 theta / 2
    perimeter = 2 * length + length * theta
    # Pixel-centre sampling miscounts only pixels near the boundary; allow 0.2 px of
    # area per px of perimeter plus 2 px (largest measured error: 0.14 px per px).
    assert abs(count - area) <= 0.2 * perimeter + 2


@pytest.mark.parametrize(("a", "b"), [(8, 5), (20, 6), (50, 30), (90, 90)])
@pytest.mark.parametrize("direction", [0, 37, 90, 213])
def test_spot_area_matches_ellipse_formula(a, b, direction):
    count = _raster(_spot(CX, CY, direction, a, b)).spot_cover.sum()
    area = np.pi * a * b
    # Ramanujan's approximation of the ellipse perimeter; same boundary allowance as fans.
    perimeter = np.pi * (3 * (a + b) - np.sqrt((3 * a + b) * (a + 3 * b)))
    assert abs(count - area) <= 0.2 * perimeter + 2


@pytest.mark.parametrize("direction", [0, 30, 90, 120, 250])
def test_spot_matches_scikit_image_ellipse(direction):
    ours = _raster(_spot(160.0, 150.0, direction, 40, 15)).spot_cover
    # skimage.draw.ellipse takes rotation counter-clockwise on screen, ours is clockwise.
    rr, cc = sk_ellipse(150, 160, 40, 15, shape=SHAPE, rotation=-np.radians(direction))
    ref = np.zeros(SHAPE, dtype=bool)
    ref[rr, cc] = True
    assert 1 - dice(ours.ravel(), ref.ravel()) > 0.99
    # regionprops orientation: angle of the major axis from the row axis, counter-clockwise.
    orientation = np.degrees(regionprops(ours.astype(np.uint8))[0].orientation)
    assert axial_difference(-orientation, direction) < 1.0


@pytest.mark.parametrize(("direction", "spread"), [(0, 40), (75, 90), (200, 25), (333, 170)])
def test_fan_matches_point_in_polygon_oracle(direction, spread):
    ours = _raster(_fan(CX, CY, direction, 70, spread)).fan_cover
    # Oracle: matplotlib's point-in-polygon test against a finely sampled outline.
    outline = MplPath(sector_polygon(CX, CY, direction, 70, spread, n=4096))
    yy, xx = np.mgrid[: SHAPE[0], : SHAPE[1]]
    ref = outline.contains_points(np.column_stack([xx.ravel(), yy.ravel()])).reshape(SHAPE)
    assert 1 - dice(ours.ravel(), ref.ravel()) > 0.98
    # The sector is symmetric about its axis, so its centroid lies along direction_deg.
    rows, cols = np.nonzero(ours)
    assert angular_difference(direction_deg(cols.mean() - CX, rows.mean() - CY), direction) < 1.0


# --------------------------------------------------------------------------- angle convention


def test_direction_convention_on_hand_made_cases():
    # Apex at pixel (row 10, col 10) of a 21 x 21 tile; narrow fans of length 5.
    shape = (21, 21)
    right = _raster(_fan(10, 10, 90, 5, 10), shape=shape).fan_cover
    down = _raster(_fan(10, 10, 180, 5, 10), shape=shape).fan_cover
    up = _raster(_fan(10, 10, 0, 5, 10), shape=shape).fan_cover
    left = _raster(_fan(10, 10, 270, 5, 10), shape=shape).fan_cover
    # Image indexing is [row, col] = [y, x].
    assert right[10, 11:16].all() and not right[10, :10].any() and not right[:10, 10].any()
    assert down[11:16, 10].all() and not down[:10, 10].any() and not down[10, 11:].any()
    assert up[5:10, 10].all() and not up[11:, 10].any()
    assert left[10, 5:10].all() and not left[10, 11:].any()
    assert not right[10, 16] and right[10, 15]  # radius 5: pixel 5 px away is in, 6 px is out
    for mask in (right, down, up, left):
        assert mask[10, 10]  # the apex pixel belongs to its fan
        assert mask.sum() == right.sum()  # the four are rotations of one another


def test_spot_long_axis_follows_direction():
    shape = (41, 41)
    vertical = _raster(_spot(20, 20, 0, 10, 3), shape=shape).spot_cover
    horizontal = _raster(_spot(20, 20, 90, 10, 3), shape=shape).spot_cover
    assert vertical[10:31, 20].all() and not vertical[20, 10].any()
    assert horizontal[20, 10:31].all() and not horizontal[10, 20].any()
    # A spot's axis is taken mod 180: 180 and 270 draw the same ellipses.
    assert np.array_equal(vertical, _raster(_spot(20, 20, 180, 10, 3), shape=shape).spot_cover)
    assert np.array_equal(horizontal, _raster(_spot(20, 20, 270, 10, 3), shape=shape).spot_cover)


# --------------------------------------------------------------------------- overlap rules


def test_spot_wins_where_it_overlaps_a_fan():
    masks = _raster(_fan(50, 50, 90, 40, 60), _spot(70, 50, 0, 6, 4), shape=(100, 100))
    both = masks.fan_cover & masks.spot_cover
    assert both.sum() > 50
    assert (masks.label[both] == LABEL_SPOT).all()
    assert (masks.label[masks.fan_cover & ~masks.spot_cover] == LABEL_FAN).all()
    assert (masks.label[~masks.fan_cover & ~masks.spot_cover] == LABEL_NONE).all()
    # The fan is still recorded beneath the spot.
    assert np.allclose(masks.fan_direction[both], 90.0)
    assert masks.label.dtype == np.uint8 and masks.fan_direction.dtype == np.float32


def test_overlapping_fans_take_the_circular_mean_direction():
    fans = [_fan(50, 50, 350, 40, 80), _fan(50, 50, 40, 40, 80), _fan(50, 50, 20, 30, 60)]
    masks = _raster(*fans, shape=(100, 100))
    singles = [_raster(f, shape=(100, 100)).fan_cover for f in fans]
    assert np.array_equal(masks.fan_cover, np.logical_or.reduce(singles))
    all_three = singles[0] & singles[1] & singles[2]
    first_two = singles[0] & singles[1] & ~singles[2]
    only_first = singles[0] & ~singles[1] & ~singles[2]
    assert all_three.any() and first_two.any() and only_first.any()
    # Reference: scipy.stats.circmean of the covering fans' directions (equal weights).
    expect3 = np.degrees(circmean(np.radians([350, 40, 20])))
    expect2 = np.degrees(circmean(np.radians([350, 40])))
    assert np.allclose(angular_difference(masks.fan_direction[all_three], expect3), 0, atol=1e-3)
    assert np.allclose(angular_difference(masks.fan_direction[first_two], expect2), 0, atol=1e-3)
    assert np.allclose(masks.fan_direction[only_first], 350.0)
    assert np.isnan(masks.fan_direction[~masks.fan_cover]).all()


def test_opposite_fans_leave_direction_undefined():
    masks = _raster(_fan(50, 50, 90, 30, 20), _fan(50, 50, 270, 30, 20), shape=(100, 100))
    assert masks.fan_cover[50, 50] and np.isnan(masks.fan_direction[50, 50])
    assert masks.fan_direction[50, 70] == pytest.approx(90.0)


def test_features_past_the_edge_and_empty_tables():
    masks = _raster(_fan(-0.5, 20, 90, 30, 40), _spot(99.5, 99.5, 45, 10, 5), _fan(500, 500, 0, 10, 40), shape=(100, 100))
    assert masks.fan_cover[20, :25].all() and masks.spot_cover[99, 99]
    empty = rasterise_features(pd.DataFrame(columns=["kind", "x_px", "y_px", "direction_deg"]), (10, 12))
    assert empty.shape == (10, 12) and not empty.label.any() and np.isnan(empty.fan_direction).all()
    assert coverage_fraction(empty) == {"fan": 0.0, "spot": 0.0, "any": 0.0}


def test_coverage_fraction_counts_pixels():
    masks = _raster(_fan(50, 50, 90, 40, 60), _spot(70, 50, 0, 6, 4), _spot(20, 20, 0, 5, 5), shape=(100, 100))
    frac = coverage_fraction(masks)
    assert frac["fan"] == masks.fan_cover.sum() / 1e4
    assert frac["spot"] == masks.spot_cover.sum() / 1e4
    assert frac["any"] == (masks.label > 0).sum() / 1e4
    assert frac["any"] < frac["fan"] + frac["spot"]  # the overlap is counted once


@pytest.mark.parametrize(
    ("rows", "message"),
    [
        ([dict(kind="jet", x_px=1, y_px=1, direction_deg=0)], "'jet'"),
        ([_fan(1, 1, 0, np.nan, 30)], "length_px"),
        ([_spot(1, 1, 0, 5, 3) | {"x_px": np.inf}], "x_px"),
    ],
)
def test_bad_features_raise(rows, message):
    with pytest.raises(SpecError, match=message):
        rasterise_features(pd.DataFrame(rows), (20, 20))


@pytest.mark.parametrize("shape", [(0, 5), (5,), "big"])
def test_bad_shape_raises(shape):
    with pytest.raises(SpecError, match="shape"):
        rasterise_features(pd.DataFrame([_spot(1, 1, 0, 2, 1)]), shape)


# --------------------------------------------------------------------------- polygons


@pytest.mark.parametrize(("length", "spread", "direction"), [(10, 30, 0), (40, 90, 123), (75, 180, 300)])
@pytest.mark.parametrize("n", [8, 32, 256])
def test_sector_polygon_area(length, spread, direction, n):
    xy = sector_polygon(CX, CY, direction, length, spread, n=n)
    assert xy.shape == (n + 1, 2) and np.allclose(xy[0], [CX, CY])
    theta = np.radians(spread)
    # A fan of n - 1 isosceles triangles inscribed in the sector (exact for the polygon).
    inscribed = 0.5 * length**2 * (n - 1) * np.sin(theta / (n - 1))
    assert _shoelace(xy) == pytest.approx(inscribed, rel=1e-9)
    assert _shoelace(xy) == pytest.approx(length**2 * theta / 2, rel=2 * (theta / (n - 1)) ** 2 / 6)
    radii = np.hypot(xy[1:, 0] - CX, xy[1:, 1] - CY)
    assert np.allclose(radii, length)
    bearings = direction_deg(xy[1:, 0] - CX, xy[1:, 1] - CY)
    assert angular_difference(bearings[0], direction - spread / 2) < 1e-9
    assert angular_difference(bearings[-1], direction + spread / 2) < 1e-9


@pytest.mark.parametrize(("a", "b", "direction"), [(10, 4, 0), (30, 30, 45), (50, 12, 200)])
@pytest.mark.parametrize("n", [12, 48, 400])
def test_ellipse_polygon_area(a, b, direction, n):
    xy = ellipse_polygon(CX, CY, direction, a, b, n=n)
    assert xy.shape == (n, 2)
    # An n-gon at equal parameter steps inside an ellipse: affine image of a regular
    # n-gon inscribed in the unit circle, area n/2 sin(2 pi / n) a b.
    assert _shoelace(xy) == pytest.approx(n / 2 * np.sin(2 * np.pi / n) * a * b, rel=1e-9)
    assert _shoelace(xy) == pytest.approx(np.pi * a * b, rel=(2 * np.pi / n) ** 2 / 6 + 1e-12)
    # The first vertex lies at the end of the semi-major axis, along direction_deg.
    tip = xy[0] - [CX, CY]
    assert np.hypot(*tip) == pytest.approx(a)
    assert angular_difference(direction_deg(*tip), direction) < 1e-9


def test_polygons_reject_too_few_vertices():
    with pytest.raises(SpecError):
        sector_polygon(0, 0, 0, 10, 30, n=1)
    with pytest.raises(SpecError):
        ellipse_polygon(0, 0, 0, 10, 3, n=2)


def test_footprint_masks_are_the_label_masks_covers():
    # The screening's cover (footprint_masks) is the one the consensus is scored with (rasterise_features):
    # overlapping fans and spots, one fan across the tile edge and one spot wholly outside the tile.
    from detector.labels import footprint_masks

    features = [_fan(CX, CY, 35.0, 60, 40), _fan(CX + 10, CY, 300.0, 45, 70), _fan(5.0, 290.0, 200.0, 50, 30),
                _spot(CX + 15, CY - 20, 80.0, 18, 9), _spot(-200.0, -200.0, 10.0, 12, 6)]
    masks = _raster(*features)
    fan, spot = footprint_masks(pd.DataFrame(features), SHAPE)
    np.testing.assert_array_equal(fan, masks.fan_cover)
    np.testing.assert_array_equal(spot, masks.spot_cover)
    assert fan.any() and spot.any() and (fan & spot).any()
