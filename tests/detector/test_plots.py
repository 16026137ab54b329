"""Overlay plots: features drawn where they are, coloured by direction, PNG written atomically."""

import numpy as np
import pandas as pd
import pytest
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from PIL import Image

from detector.errors import DetectorError, TileSetError
from detector.labels import ellipse_polygon, sector_polygon
from detector.plots import (DIRECTION_CMAP, HALO_COLOR, SPOT_COLOR, add_north_arrow, add_scale_bar, draw_features,
                            nice_length_m, plot_overlay)
from detector.tileset import load_tileset
from tests.detector._tileset_factory import write_tileset

FEATURES = pd.DataFrame(
    [
        dict(kind="fan", x_px=20.0, y_px=30.0, direction_deg=90.0, length_px=40.0, opening_deg=40.0),
        dict(kind="spot", x_px=70.0, y_px=15.0, direction_deg=30.0, semi_major_px=8.0, semi_minor_px=5.0),
        dict(kind="fan", x_px=60.0, y_px=55.0, direction_deg=300.0, length_px=25.0, opening_deg=60.0),
    ]
)


@pytest.fixture
def tileset(tmp_path):
    return load_tileset(write_tileset(tmp_path / "ts"))


def _axis(shape=(64, 96)):
    fig = Figure(figsize=(4, 3), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_axes([0, 0, 1, 1])
    ax.imshow(np.zeros(shape), cmap="gray", vmin=0, vmax=1)
    return fig, ax


def test_patches_follow_the_outlines():
    _, ax = _axis()
    patches = draw_features(ax, FEATURES)
    assert [p.get_gid() for p in patches] == ["fan", "spot", "fan"]
    expect = [
        sector_polygon(20, 30, 90, 40, 40),
        ellipse_polygon(70, 15, 30, 8, 5),
        sector_polygon(60, 55, 300, 25, 60),
    ]
    for patch, xy in zip(patches, expect):
        # matplotlib closes the ring by repeating the first vertex.
        assert np.allclose(patch.get_xy()[: len(xy)], xy)
    assert all(p in ax.patches for p in patches)


def test_fans_coloured_by_cyclic_direction():
    _, ax = _axis()
    patches = draw_features(ax, FEATURES)
    cyclic = colormaps[DIRECTION_CMAP]
    assert np.allclose(patches[0].get_edgecolor()[:3], cyclic(90 / 360)[:3])
    assert np.allclose(patches[2].get_edgecolor()[:3], cyclic(300 / 360)[:3])
    # A cyclic map gives (almost) the same colour at 0 and 360 degrees.
    assert np.allclose(cyclic(0.0), cyclic(1.0), atol=0.1)
    plain = draw_features(_axis()[1], FEATURES, color_by_direction=False)
    assert np.allclose(plain[0].get_edgecolor(), plain[2].get_edgecolor())
    assert np.allclose(plain[1].get_edgecolor(), to_rgba(SPOT_COLOR))


def test_collection_holds_the_same_outlines_and_colours_as_the_patches():
    patches = draw_features(_axis()[1], FEATURES, alpha=0.35)
    _, ax = _axis()
    coll = draw_features(ax, FEATURES, alpha=0.35, as_collection=True)
    assert coll in ax.collections and len(coll.get_paths()) == len(patches)
    for path, patch in zip(coll.get_paths(), patches):
        assert np.allclose(path.vertices[: len(patch.get_xy()) - 1], patch.get_xy()[:-1])
    np.testing.assert_allclose(coll.get_facecolor(), [p.get_facecolor() for p in patches])
    np.testing.assert_allclose(coll.get_edgecolor(), [p.get_edgecolor() for p in patches])


def test_features_land_on_their_pixels():
    fig, ax = _axis()
    draw_features(ax, FEATURES.iloc[[0]], alpha=1.0)
    ax.set_xlim(-0.5, 95.5)
    ax.set_ylim(63.5, -0.5)
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    height = rgba.shape[0]

    def pixel(x, y):
        dx, dy = ax.transData.transform((x, y))
        return rgba[int(round(height - dy)), int(round(dx)), :3] / 255.0

    # Inside the fan (to the right of its apex, direction 90): the fan colour.
    assert np.allclose(pixel(40, 30), colormaps[DIRECTION_CMAP](0.25)[:3], atol=0.03)
    # Left of the apex and far above it: the black tile.
    assert np.allclose(pixel(5, 30), 0, atol=0.03)
    assert np.allclose(pixel(40, 5), 0, atol=0.03)


def test_unknown_kind_cannot_be_drawn():
    bad = FEATURES.copy()
    bad.loc[1, "kind"] = "jet"
    with pytest.raises(DetectorError, match="'jet'"):
        draw_features(_axis()[1], bad)


def test_overlay_png_is_written_atomically(tileset, tmp_path):
    out = tmp_path / "plots" / "overlay.png"
    assert plot_overlay(tileset, ["t_a1", "t_a2", "t_b1", "t_b2"], out) == out
    with Image.open(out) as image:
        assert image.format == "PNG"
        big = image.size
    assert [p.name for p in out.parent.iterdir()] == ["overlay.png"]  # no temporary left over
    one = tmp_path / "one.png"
    plot_overlay(tileset, ["t_a1", "t_a2", "t_b1", "t_b2"], one, max_tiles=1)
    with Image.open(one) as image:
        small = image.size
    assert small[0] < big[0] and small[1] < big[1]


def test_overlay_shows_the_features(tileset, tmp_path):
    # Same tile with and without its consensus drawn: the pictures must differ in colour.
    plot_overlay(tileset, ["t_b1"], tmp_path / "with.png", color_by_direction=False)
    bare = type(tileset)(tileset.root, tileset.tiles, tileset.consensus.iloc[:0], 0, tileset.min_votes)
    plot_overlay(bare, ["t_b1"], tmp_path / "without.png", color_by_direction=False)
    with Image.open(tmp_path / "with.png") as a, Image.open(tmp_path / "without.png") as b:
        a, b = np.asarray(a.convert("RGB"), dtype=int), np.asarray(b.convert("RGB"), dtype=int)
    assert a.shape == b.shape
    saturation = lambda im: im.max(axis=2) - im.min(axis=2)  # noqa: E731 - grey tiles have none
    assert (saturation(a) > 60).sum() > 500
    assert (saturation(b) > 60).sum() < (saturation(a) > 60).sum() / 10


def test_overlay_rejects_bad_requests(tileset, tmp_path):
    with pytest.raises(TileSetError, match="ghost"):
        plot_overlay(tileset, ["ghost"], tmp_path / "x.png")
    with pytest.raises(DetectorError, match="at least one"):
        plot_overlay(tileset, [], tmp_path / "x.png")
    assert not (tmp_path / "x.png").exists()


def _wcag_luminance(rgb):
    # Relative luminance of sRGB (WCAG 2.1, section 1.4.3 definitions; sRGB transfer of IEC 61966-2-1).
    c = np.asarray(rgb, dtype=float)[:3]
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return float(lin @ [0.2126, 0.7152, 0.0722])


def _contrast(a, b):
    la, lb = sorted((_wcag_luminance(a), _wcag_luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def test_outlines_stay_visible_on_bright_ice_and_dark_ground():
    from matplotlib import patheffects

    patches = draw_features(_axis()[1], FEATURES)
    for patch in patches:
        strokes = [e for e in patch.get_path_effects() if isinstance(e, patheffects.Stroke)]
        assert strokes and strokes[0]._gc["foreground"] == HALO_COLOR
    # WCAG 2.1 asks 3:1 for graphical objects (success criterion 1.4.11): the halo against white ice,
    # and every direction colour against a black deposit (the halo carries it on white).
    assert _contrast(to_rgba(HALO_COLOR), (1, 1, 1)) >= 3.0
    colours = colormaps[DIRECTION_CMAP](np.linspace(0, 1, 73))
    assert min(_contrast(c, (0, 0, 0)) for c in list(colours) + [to_rgba(SPOT_COLOR)]) >= 3.0


@pytest.mark.parametrize(("max_m", "expected"), [(730.0, 500.0), (1999.0, 1000.0), (2000.0, 2000.0), (0.37, 0.2),
                                                 (99.0, 50.0)])
def test_scale_bar_lengths_are_1_2_5_steps(max_m, expected):
    assert nice_length_m(max_m) == pytest.approx(expected)


def test_north_arrow_and_scale_bar_are_drawn():
    _, ax = _axis((100, 200))
    ax.set_xlim(-0.5, 199.5)
    ax.set_ylim(99.5, -0.5)
    arrow = add_north_arrow(ax, 90.0)  # north to the image right
    (x0, y0), (x1, y1) = arrow.xyann, arrow.xy
    (letter,) = [t for t in ax.texts if t.get_gid() == "north_label"]
    assert letter.get_text() == "N" and letter.get_position()[0] > x1 and x1 > x0 and y1 == pytest.approx(y0)
    label = add_scale_bar(ax, 10.0, width_units=200)  # 10 m per px, 2000 m wide: the bar may take 500 m
    assert label == "500 m"
    (bar,) = [line for line in ax.lines if line.get_gid() == "scale_bar"]
    assert np.diff(bar.get_xdata())[0] == pytest.approx(50.0)  # 500 m at 10 m per px
