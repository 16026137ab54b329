"""Loading and validating tile sets: parsing, dtypes, summary, and every contract check."""

import os
import shutil

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from detector.errors import DetectorError, TileSetError
from detector.io import write_image
from detector.tileset import format_summary, load_tileset, summarize_tileset
from tests.detector._tileset_factory import CONSENSUS, TILES, set_cell, write_tileset


@pytest.fixture
def tileset_dir(tmp_path):
    return write_tileset(tmp_path / "ts")


# --------------------------------------------------------------------------- valid set


def test_parses_with_typed_columns(tileset_dir):
    ts = load_tileset(tileset_dir)
    assert list(ts.tiles["tile_id"]) == [t[0] for t in TILES]
    for column in ("tile_id", "image_id", "path", "region"):
        assert pd.api.types.is_string_dtype(ts.tiles[column]), column
    for column in ("solar_longitude_deg", "classifications", "col0", "row0", "metres_per_px"):
        assert ts.tiles[column].dtype == np.float64, column
    assert ts.tiles["width"].dtype == np.int64 and ts.tiles["height"].dtype == np.int64
    assert list(ts.tiles["width"]) == [t[4] for t in TILES]
    assert list(ts.tiles["height"]) == [t[3] for t in TILES]

    c = ts.consensus
    assert list(c.columns)[:10] == [
        "tile_id", "kind", "x_px", "y_px", "direction_deg", "length_px", "opening_deg",
        "semi_major_px", "semi_minor_px", "votes",
    ]
    assert pd.api.types.is_string_dtype(c["tile_id"]) and pd.api.types.is_string_dtype(c["kind"])
    assert c["votes"].dtype == np.int64
    for column in ("x_px", "direction_deg", "length_px", "semi_minor_px", "fan_vote_share"):
        assert c[column].dtype == np.float64
    # Unused geometry of each kind is NaN; used geometry is filled.
    fans, spots = c[c["kind"] == "fan"], c[c["kind"] == "spot"]
    assert fans["semi_major_px"].isna().all() and fans["length_px"].notna().all()
    assert spots["opening_deg"].isna().all() and spots["semi_minor_px"].notna().all()
    # The votes=2 fan is below the default threshold of 3.
    assert len(c) == len(CONSENSUS) - 1 and ts.n_dropped_weak == 1 and ts.min_votes == 3


def test_accessors_and_16_bit_tile(tileset_dir):
    ts = load_tileset(tileset_dir)
    assert ts.image_ids == ("IMG_A", "IMG_B")
    assert ts.tile_path("t_b2") == tileset_dir / "sub" / "b2.png"
    image = ts.read_tile("t_b1")
    assert image.dtype == np.uint16 and image.shape == (72, 80)
    assert len(ts.features_of("t_a1")) == 2 and len(ts.features_of("t_a2")) == 0
    with pytest.raises(TileSetError, match="ghost"):
        ts.features_of("ghost")


def test_subset_groups_by_image(tileset_dir):
    ts = load_tileset(tileset_dir)
    a, b = ts.subset(["IMG_A"]), ts.subset(["IMG_B"])
    assert set(a.tiles["tile_id"]) == {"t_a1", "t_a2"} and set(b.tiles["tile_id"]) == {"t_b1", "t_b2"}
    assert len(a.consensus) + len(b.consensus) == len(ts.consensus)
    assert set(a.consensus["tile_id"]) <= {"t_a1", "t_a2"}
    assert (a.n_dropped_weak, b.n_dropped_weak) == (1, 0)
    with pytest.raises(TileSetError, match="IMG_Z"):
        ts.subset(["IMG_Z"])


def test_summary_numbers(tileset_dir):
    ts = load_tileset(tileset_dir)
    s = summarize_tileset(ts)
    # Kept votes are 5, 4, 10, 3, 7; quartiles by linear interpolation (numpy's default):
    # sorted 3 4 5 7 10 -> q1 at position 1 = 4, median 5, q3 at position 3 = 7.
    expected = {
        "tiles": 4, "images": 2, "fans": 2, "spots": 3, "empty_tiles": 1,
        "votes_min": 3.0, "votes_q1": 4.0, "votes_median": 5.0, "votes_q3": 7.0, "votes_max": 10.0,
        "dropped_weak": 1, "min_votes": 3,
    }
    assert {k: s[k] for k in expected} == expected
    on_disk = sum(os.path.getsize(os.path.join(d, f)) for d, _, fs in os.walk(tileset_dir) for f in fs)
    assert s["size_mb"] == pytest.approx(on_disk / 1e6)
    text = format_summary(s)
    assert len(text.splitlines()) <= 24
    assert "median 5" in text and "dropped weak     1" in text


def test_minimal_columns_only(tmp_path):
    root = write_tileset(tmp_path / "ts")
    tiles = pd.read_csv(root / "tiles.csv", dtype=str)[["tile_id", "image_id", "path"]]
    tiles.to_csv(root / "tiles.csv", index=False)
    cons = pd.read_csv(root / "consensus.csv", dtype=str).drop(columns="fan_vote_share")
    cons.to_csv(root / "consensus.csv", index=False)
    ts = load_tileset(root)
    assert ts.tiles["solar_longitude_deg"].isna().all() and ts.tiles["metres_per_px"].isna().all()
    assert (ts.tiles["region"] == "").all()
    assert ts.consensus["fan_vote_share"].isna().all()
    assert ts.tiles["width"].dtype == np.int64


def test_header_only_consensus_means_all_tiles_empty(tileset_dir):
    (tileset_dir / "consensus.csv").write_text(
        "tile_id,kind,x_px,y_px,direction_deg,length_px,opening_deg,semi_major_px,semi_minor_px,votes\n"
    )
    ts = load_tileset(tileset_dir)
    s = summarize_tileset(ts)
    assert len(ts.consensus) == 0 and s["empty_tiles"] == 4 and np.isnan(s["votes_median"])
    assert "no features" in format_summary(s)


def test_points_on_the_tile_edge_are_inside(tileset_dir):
    # t_a1 is 96 x 64 px: pixel centres 0..95, edges at -0.5 and 95.5.
    set_cell(tileset_dir, "consensus.csv", 1, "x_px", "-0.5")
    set_cell(tileset_dir, "consensus.csv", 2, "x_px", "95.5")
    set_cell(tileset_dir, "consensus.csv", 2, "y_px", "63.5")
    set_cell(tileset_dir, "consensus.csv", 1, "opening_deg", "180")
    set_cell(tileset_dir, "tiles.csv", 1, "solar_longitude_deg", "360")
    ts = load_tileset(tileset_dir)
    assert ts.consensus.loc[0, "x_px"] == -0.5 and ts.consensus.loc[1, "y_px"] == 63.5


def test_check_images_false_opens_no_image(tileset_dir):
    (tileset_dir / "a2.png").write_bytes(b"not a png at all")
    with pytest.raises(TileSetError):
        load_tileset(tileset_dir)
    ts = load_tileset(tileset_dir, check_images=False)
    assert list(ts.tiles["width"]) == [t[4] for t in TILES]  # from the width column


# --------------------------------------------------------------------------- min votes


@pytest.mark.parametrize(("min_votes", "kept", "dropped"), [(1, 6, 0), (3, 5, 1), (5, 3, 3), (11, 0, 6)])
def test_min_votes_drops_weak_features(tileset_dir, min_votes, kept, dropped):
    ts = load_tileset(tileset_dir, min_votes=min_votes)
    assert len(ts.consensus) == kept and ts.n_dropped_weak == dropped
    assert (ts.consensus["votes"] >= min_votes).all()
    assert summarize_tileset(ts)["dropped_weak"] == dropped


@pytest.mark.parametrize("bad", [0, -2, 2.5, "3", True])
def test_min_votes_must_be_a_positive_integer(tileset_dir, bad):
    with pytest.raises(DetectorError, match="min_votes"):
        load_tileset(tileset_dir, min_votes=bad)


def test_votes_below_one_is_an_error_not_a_weak_feature(tileset_dir):
    set_cell(tileset_dir, "consensus.csv", 3, "votes", "0")
    with pytest.raises(TileSetError, match=r"consensus.csv row 3: votes 0.0 is below 1"):
        load_tileset(tileset_dir, min_votes=1)


# --------------------------------------------------------------------------- broken copies


def _cell(file, row, column, value):
    return lambda root: set_cell(root, file, row, column, value)


def _drop_column(file, column):
    def mutate(root):
        frame = pd.read_csv(root / file, dtype=str, keep_default_na=False)
        frame.drop(columns=column).to_csv(root / file, index=False)

    return mutate


def _remove(rel):
    return lambda root: os.remove(root / rel)


def _write_bytes(rel, data):
    return lambda root: (root / rel).write_bytes(data)


def _rgb_png(root):
    Image.fromarray(np.zeros((64, 96, 3), dtype=np.uint8)).save(root / "a2.png")


def _small_image(root):
    write_image(root / "a2.png", np.zeros((20, 96), dtype=np.uint8))
    set_cell(root, "tiles.csv", 2, "height", "20")


def _header_only_tiles(root):
    (root / "tiles.csv").write_text("tile_id,image_id,path\n")


def _jpg_path(root):
    shutil.copy(root / "a2.png", root / "a2.jpg")
    set_cell(root, "tiles.csv", 2, "path", "a2.jpg")


# (id, mutation, file named, row named or None, value named or None)
BROKEN = [
    ("missing tiles.csv", _remove("tiles.csv"), "tiles.csv", None, "is missing"),
    ("missing consensus.csv", _remove("consensus.csv"), "consensus.csv", None, "is missing"),
    ("empty tiles.csv file", _write_bytes("tiles.csv", b""), "tiles.csv", None, "no header"),
    ("tiles column missing", _drop_column("tiles.csv", "image_id"), "tiles.csv", None, "'image_id'"),
    ("consensus column missing", _drop_column("consensus.csv", "votes"), "consensus.csv", None, "'votes'"),
    ("no tiles", _header_only_tiles, "tiles.csv", None, "empty"),
    ("duplicate tile_id", _cell("tiles.csv", 2, "tile_id", "t_a1"), "tiles.csv", 2, "'t_a1'"),
    ("empty image_id", _cell("tiles.csv", 3, "image_id", ""), "tiles.csv", 3, "image_id is empty"),
    ("unknown tile", _cell("consensus.csv", 2, "tile_id", "ghost"), "consensus.csv", 2, "'ghost'"),
    ("unknown kind", _cell("consensus.csv", 1, "kind", "jet"), "consensus.csv", 1, "'jet'"),
    ("fan without length", _cell("consensus.csv", 1, "length_px", ""), "consensus.csv", 1, "length_px is empty"),
    ("fan spread NaN", _cell("consensus.csv", 4, "opening_deg", "NaN"), "consensus.csv", 4, "opening_deg is empty"),
    ("spot without semi-minor", _cell("consensus.csv", 2, "semi_minor_px", ""), "consensus.csv", 2, "semi_minor_px"),
    ("spot without x", _cell("consensus.csv", 5, "x_px", ""), "consensus.csv", 5, "x_px is empty"),
    ("votes empty", _cell("consensus.csv", 6, "votes", ""), "consensus.csv", 6, "votes is empty"),
    ("fan with spot axis", _cell("consensus.csv", 1, "semi_major_px", "5"), "consensus.csv", 1, "'5'"),
    ("x right of tile", _cell("consensus.csv", 1, "x_px", "95.6"), "consensus.csv", 1, "95.6"),
    ("x left of tile", _cell("consensus.csv", 4, "x_px", "-0.6"), "consensus.csv", 4, "-0.6"),
    ("y below tile", _cell("consensus.csv", 6, "y_px", "63.75"), "consensus.csv", 6, "63.75"),
    ("y above tile", _cell("consensus.csv", 2, "y_px", "-3"), "consensus.csv", 2, "-3.0"),
    ("direction 360", _cell("consensus.csv", 1, "direction_deg", "360"), "consensus.csv", 1, "360.0"),
    ("direction 400", _cell("consensus.csv", 2, "direction_deg", "400"), "consensus.csv", 2, "400.0"),
    ("direction negative", _cell("consensus.csv", 4, "direction_deg", "-1"), "consensus.csv", 4, "-1.0"),
    ("solar longitude", _cell("tiles.csv", 3, "solar_longitude_deg", "360.5"), "tiles.csv", 3, "360.5"),
    ("spread zero", _cell("consensus.csv", 1, "opening_deg", "0"), "consensus.csv", 1, "0.0"),
    ("spread 181", _cell("consensus.csv", 4, "opening_deg", "181"), "consensus.csv", 4, "181.0"),
    ("length zero", _cell("consensus.csv", 1, "length_px", "0"), "consensus.csv", 1, "length_px 0.0"),
    ("length negative", _cell("consensus.csv", 4, "length_px", "-3"), "consensus.csv", 4, "length_px -3.0"),
    ("semi-major zero", _cell("consensus.csv", 2, "semi_major_px", "0"), "consensus.csv", 2, "semi_major_px 0.0"),
    ("semi-minor negative", _cell("consensus.csv", 6, "semi_minor_px", "-1"), "consensus.csv", 6, "-1.0"),
    ("minor exceeds major", _cell("consensus.csv", 2, "semi_minor_px", "9"), "consensus.csv", 2, "9.0"),
    ("votes zero", _cell("consensus.csv", 1, "votes", "0"), "consensus.csv", 1, "votes 0.0"),
    ("votes fractional", _cell("consensus.csv", 1, "votes", "4.5"), "consensus.csv", 1, "votes 4.5"),
    ("fan vote share high", _cell("consensus.csv", 1, "fan_vote_share", "1.2"), "consensus.csv", 1, "1.2"),
    ("fan vote share low", _cell("consensus.csv", 2, "fan_vote_share", "-0.1"), "consensus.csv", 2, "-0.1"),
    ("text direction", _cell("consensus.csv", 1, "direction_deg", "north"), "consensus.csv", 1, "'north'"),
    ("text votes", _cell("consensus.csv", 2, "votes", "many"), "consensus.csv", 2, "'many'"),
    ("text solar longitude", _cell("tiles.csv", 1, "solar_longitude_deg", "abc"), "tiles.csv", 1, "'abc'"),
    ("infinite x", _cell("consensus.csv", 1, "x_px", "inf"), "consensus.csv", 1, "'inf'"),
    ("negative classifications", _cell("tiles.csv", 1, "classifications", "-2"), "tiles.csv", 1, "-2.0"),
    ("missing image", _remove("sub/b2.png"), "tiles.csv", 4, "sub/b2.png"),
    ("corrupt image", _write_bytes("a2.png", b"\x89PNG\r\n\x1a\n broken"), "tiles.csv", 2, "a2.png"),
    ("multi-band image", _rgb_png, "tiles.csv", 2, "a2.png"),
    ("image too small", _small_image, "tiles.csv", 2, "96 x 20"),
    ("size differs from width column", _cell("tiles.csv", 3, "width", "81"), "tiles.csv", 3, "width 81"),
    ("not PNG or TIFF", _jpg_path, "tiles.csv", 2, "'a2.jpg'"),
]


@pytest.mark.parametrize(("mutate", "file", "row", "value"), [b[1:] for b in BROKEN], ids=[b[0] for b in BROKEN])
def test_broken_tileset_is_reported(tileset_dir, mutate, file, row, value):
    mutate(tileset_dir)
    with pytest.raises(TileSetError) as info:
        load_tileset(tileset_dir)
    problems = info.value.problems
    prefix = file if row is None else f"{file} row {row}:"
    matching = [p for p in problems if p.startswith(prefix) and value in p]
    assert matching, problems
    assert all("Traceback" not in p for p in problems)


def test_missing_folder(tmp_path):
    with pytest.raises(TileSetError, match="nowhere"):
        load_tileset(tmp_path / "nowhere")


def test_every_problem_is_reported_at_once(tileset_dir):
    set_cell(tileset_dir, "consensus.csv", 1, "direction_deg", "400")
    set_cell(tileset_dir, "consensus.csv", 2, "semi_minor_px", "9")
    set_cell(tileset_dir, "consensus.csv", 3, "kind", "jet")
    set_cell(tileset_dir, "consensus.csv", 5, "votes", "many")
    set_cell(tileset_dir, "tiles.csv", 2, "tile_id", "t_a1")
    set_cell(tileset_dir, "tiles.csv", 4, "solar_longitude_deg", "-5")
    os.remove(tileset_dir / "b1.tif")
    with pytest.raises(TileSetError) as info:
        load_tileset(tileset_dir)
    problems = info.value.problems
    expected = [
        "tiles.csv row 2: tile_id 't_a1'",
        "tiles.csv row 3: path 'b1.tif'",
        "tiles.csv row 4: solar_longitude_deg -5.0",
        "consensus.csv row 1: direction_deg 400.0",
        "consensus.csv row 2: semi_minor_px 9.0",
        "consensus.csv row 3: kind 'jet'",
        "consensus.csv row 5: votes 'many'",
    ]
    for text in expected:
        assert any(p.startswith(text) for p in problems), (text, problems)
    # Sorted by file, then row, so that the report reads top to bottom.
    assert [p for p in problems if any(p.startswith(t) for t in expected)] == [
        next(p for p in problems if p.startswith(t)) for t in expected
    ]
    assert str(info.value).count("\n") == len(problems) - 1


@pytest.mark.parametrize("where", ["absolute", "parent"])
def test_tile_path_leaving_the_folder_is_refused(tileset_dir, tmp_path, where):
    outside = tmp_path / "outside.png"
    shutil.copy(tileset_dir / "a1.png", outside)
    rel = str(outside) if where == "absolute" else "../outside.png"
    set_cell(tileset_dir, "tiles.csv", 1, "path", rel)
    with pytest.raises(TileSetError) as info:
        load_tileset(tileset_dir)
    words = "is absolute" if where == "absolute" else "leaves the tile-set folder"
    assert any(rel in p and words in p and "row 1" in p for p in info.value.problems)
