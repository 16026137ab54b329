"""A reading's view: the darkness around it sampled in its own frame.

Shapes are drawn with scikit-image's ``skimage.draw.polygon`` and ``skimage.draw.ellipse`` (the
reference rasterisers) and turned or mirrored with numpy; the expected values follow from the
drawing and from the geometry of the grid alone.
"""

import numpy as np
import pytest
from scipy import ndimage
from skimage import draw

from detector.objects.assemble import (
    OBJECT_FEATURE_NAMES,
    VIEW_ACROSS,
    VIEW_ALONG,
    AssemblyParams,
    find_candidates,
    local_darkness,
    reading_matrix,
    reading_view,
)

DARK = 5.0
VIEW_NAMES = [n for n in OBJECT_FEATURE_NAMES if n.startswith("read_view_")]


def _wedge(shape, apex, direction, length, opening, value=DARK):
    """A filled sector (apex (x, y), degrees clockwise from up) drawn as a polygon by skimage."""
    x0, y0 = apex
    angles = np.radians(direction + np.linspace(-opening / 2, opening / 2, 25))
    xs = np.concatenate([[x0], x0 + length * np.sin(angles)])
    ys = np.concatenate([[y0], y0 - length * np.cos(angles)])
    image = np.zeros(shape, np.float32)
    rr, cc = draw.polygon(ys, xs, shape)
    image[rr, cc] = value
    return image


def _grid(view):
    """The 63 samples as (along, across) and the scale."""
    return view[:-1].reshape(VIEW_ALONG.size, VIEW_ACROSS.size), view[-1]


def _inside_wedge(length, opening):
    """Which grid points of a reading of exactly this wedge lie inside it (with a 1.5 px margin)."""
    half_width = length * np.tan(np.radians(opening / 2))
    t = VIEW_ALONG[:, None] * length
    s = VIEW_ACROSS[None, :] * half_width
    r, phi = np.hypot(t, s), np.degrees(np.arctan2(np.abs(s), t))
    inside = (t > 0) & (r < length - 1.5) & (phi < opening / 2 - 3.0)
    outside = (t < -1.5) | (r > length + 1.5) | (phi > opening / 2 + 8.0)
    return inside, outside, half_width


def test_the_view_is_the_last_64_reading_features():
    assert len(VIEW_NAMES) == 64
    assert OBJECT_FEATURE_NAMES[-64:] == tuple(VIEW_NAMES)


@pytest.mark.parametrize("direction", [0.0, 37.0, 135.0, 250.0])
def test_a_reading_along_a_drawn_wedge_sees_it_inside_and_nothing_around_it(direction):
    length, opening = 60.0, 50.0
    image = _wedge((240, 240), (120.0, 120.0), direction, length, opening)
    inside, outside, half_width = _inside_wedge(length, opening)
    grid, scale = _grid(reading_view(image, [120.0], [120.0], [direction], [length], [half_width])[0])
    values = grid * scale
    np.testing.assert_allclose(values[inside], DARK, atol=0.05)
    np.testing.assert_allclose(values[outside], 0.0, atol=0.05)
    # the scale is the mean magnitude of the samples
    assert scale == pytest.approx(np.abs(values).mean(), rel=1e-9)


def test_a_reading_pointing_back_from_the_apex_sees_the_wedge_behind_it():
    length, opening = 60.0, 50.0
    image = _wedge((240, 240), (120.0, 120.0), 60.0, length, opening)
    inside, _, half_width = _inside_wedge(length, opening)
    right, _ = _grid(reading_view(image, [120.0], [120.0], [60.0], [length], [half_width])[0])
    wrong, _ = _grid(reading_view(image, [120.0], [120.0], [240.0], [length], [half_width])[0])
    # behind the wrong reading's apex (VIEW_ALONG < 0) lies the start of the wedge, ahead of it nothing
    assert wrong[VIEW_ALONG < 0, 3].min() > 0
    assert np.abs(wrong[VIEW_ALONG > 0]).max() < 0.05
    assert right[inside].min() > 0


def test_the_view_does_not_change_with_contrast_but_its_scale_does():
    rng = np.random.default_rng(3)
    image = ndimage.gaussian_filter(rng.normal(size=(150, 150)), 2.0) * 10.0 + _wedge((150, 150), (75, 75), 30, 40, 40)
    args = ([75.0, 40.0], [75.0, 90.0], [30.0, 200.0], [40.0, 25.0], [18.0, 9.0])
    a = reading_view(image.astype(np.float32), *args)
    b = reading_view((3.0 * image).astype(np.float32), *args)
    assert (a[:, -1] > 0.5).all()
    np.testing.assert_allclose(a[:, :-1], b[:, :-1], atol=1e-5)
    np.testing.assert_allclose(b[:, -1], 3.0 * a[:, -1], rtol=1e-5)
    # below the floor of 0.5 a faint view is not blown up: its samples keep their size
    faint = reading_view((0.01 * image).astype(np.float32), *args)
    np.testing.assert_allclose(faint[:, -1], 0.5)
    np.testing.assert_allclose(faint[:, :-1] * 0.5, 0.01 * a[:, :-1] * a[:, -1:], atol=1e-6)


def test_the_view_turns_with_the_image():
    # A quarter turn clockwise maps the pixel grid onto itself: (x, y) -> (H - 1 - y, x), direction + 90.
    rng = np.random.default_rng(7)
    image = ndimage.gaussian_filter(rng.normal(size=(120, 120)), 2.0).astype(np.float32)
    x, y, d = np.array([50.0, 61.5]), np.array([40.0, 70.25]), np.array([20.0, 301.0])
    length, width = np.array([30.0, 17.0]), np.array([11.0, 20.0])
    turned = np.ascontiguousarray(np.rot90(image, k=-1))
    a = reading_view(image, x, y, d, length, width)
    b = reading_view(turned, 119.0 - y, x, (d + 90.0) % 360.0, length, width)
    np.testing.assert_allclose(a, b, atol=1e-4)


def test_a_mirrored_image_gives_the_mirrored_view():
    # Mirroring left-right maps x -> W - 1 - x and a direction d to -d; the reading's right becomes its left.
    rng = np.random.default_rng(11)
    image = ndimage.gaussian_filter(rng.normal(size=(100, 130)), 2.0).astype(np.float32)
    a = reading_view(image, [40.0], [50.0], [70.0], [30.0], [12.0])[0]
    b = reading_view(np.ascontiguousarray(image[:, ::-1]), [89.0], [50.0], [290.0], [30.0], [12.0])[0]
    ga, sa = _grid(a)
    gb, sb = _grid(b)
    np.testing.assert_allclose(ga, gb[:, ::-1], atol=1e-4)
    assert sa == pytest.approx(sb, rel=1e-4)


def test_no_readings_give_an_empty_view():
    assert reading_view(np.zeros((10, 10), np.float32), [], [], [], [], []).shape == (0, 64)


def test_every_reading_of_a_candidate_carries_its_view():
    image = np.full((200, 200), 0.6, np.float32) - _wedge((200, 200), (100.0, 100.0), 45.0, 45.0, 35.0, 0.3)
    valid = np.ones(image.shape, bool)
    dark = local_darkness(image, valid)
    class_maps = np.empty((3, 200, 200), np.float32)
    class_maps[:] = np.array([0.2, 0.5, 0.3], np.float32)[:, None, None]
    cands = find_candidates(dark, valid, class_maps, np.zeros((2, 200, 200), np.float32), params=AssemblyParams())
    assert cands
    F, owner, which = reading_matrix(cands)
    assert F.shape[1] == len(OBJECT_FEATURE_NAMES)
    centre = OBJECT_FEATURE_NAMES.index("read_view_t4_s3")  # half way along, on the axis
    scale = OBJECT_FEATURE_NAMES.index("read_view_scale")
    # every reading, fan or spot, has the dark deposit at the middle of its view
    assert (F[:, centre] > 0).all()
    assert (F[:, scale] > 1.0).all()
