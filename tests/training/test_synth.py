"""Synthetic scenes and the committed demo tile set: determinism, contract, crowd statistics, rendering."""

import hashlib
import io
from pathlib import Path

import dataclasses

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage
from scipy.spatial import cKDTree
from scipy.optimize import curve_fit
from scipy.special import ndtr
from scipy.stats import circmean, circstd, norm

from detector.contract import (
    CONSENSUS_COLUMNS,
    CONSENSUS_FILE,
    KIND_FIELDS,
    TILES_FILE,
    TILES_OPTIONAL,
    TILES_REQUIRED,
    TRUTH_FILE,
)
from detector.errors import DetectorError
from detector.geometry import angular_difference, unit_vector
from detector.io import read_image, write_image
from training.synth import (
    SCENE_PROFILES,
    WIND_SCATTER_DEG,
    SceneSettings,
    _IMAGE_SCENARIOS,
    _SCENARIO_PARAMS,
    _camera,
    _deposits,
    _polygon_seeds,
    _polygon_troughs,
    _render_scene,
    _synthesize_image,
    render_scene,
    synthesize_tileset,
    to_uint8,
)

DEMO = Path(__file__).resolve().parents[2] / "demo_tiles"
DEMO_ARGS = dict(n_images=8, tiles_per_image=5, seed=2026)
TILE_SHAPE = (600, 800)
GEOMETRY = ("x_px", "y_px", "direction_deg", "length_px", "opening_deg", "semi_major_px", "semi_minor_px")


def _digest(folder):
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


@pytest.fixture(scope="module")
def demo():
    tiles = pd.read_csv(DEMO / TILES_FILE)
    consensus = pd.read_csv(DEMO / CONSENSUS_FILE)
    truth = pd.read_csv(DEMO / TRUTH_FILE)
    return tiles, consensus, truth


@pytest.fixture(scope="module")
def windy_scene():
    return render_scene((1600, 1600), np.random.default_rng(11), scenario="windy", wind_deg=137.0, nodata=False)


# ----------------------------------------------------------------------------- determinism


def test_same_arguments_give_identical_bytes(tmp_path):
    a = synthesize_tileset(tmp_path / "a", n_images=2, tiles_per_image=2, seed=5)
    b = synthesize_tileset(tmp_path / "b", n_images=2, tiles_per_image=2, seed=5)
    digest_a, digest_b = _digest(a), _digest(b)
    assert len(digest_a) == 3 + 4
    assert digest_a == digest_b
    c = synthesize_tileset(tmp_path / "c", n_images=2, tiles_per_image=2, seed=6)
    assert _digest(c)[CONSENSUS_FILE] != digest_a[CONSENSUS_FILE]


def test_first_committed_image_is_reproduced_exactly(tmp_path, demo):
    # Images draw from independent SeedSequence children, so one image can be rebuilt alone.
    child = np.random.SeedSequence(DEMO_ARGS["seed"]).spawn(DEMO_ARGS["n_images"])[0]
    tiles, tiles_table, truth, consensus = _synthesize_image(0, child, DEMO_ARGS["tiles_per_image"], TILE_SHAPE)
    for tile_id, pixels in tiles:
        write_image(tmp_path / f"{tile_id}.png", pixels)
        assert (tmp_path / f"{tile_id}.png").read_bytes() == (DEMO / "images" / f"{tile_id}.png").read_bytes()
    image_id = tiles_table["image_id"].iloc[0]
    for table, name in ((truth, TRUTH_FILE), (consensus, CONSENSUS_FILE)):
        lines = (DEMO / name).read_text().splitlines()
        committed = [line for line in lines[1:] if line.startswith(image_id + "_")]
        buffer = io.StringIO()
        table.to_csv(buffer, index=False, header=False, lineterminator="\n", float_format="%.3f")
        assert buffer.getvalue().splitlines() == committed
    tiles_all, _, _ = demo
    pd.testing.assert_frame_equal(
        tiles_all.loc[tiles_all["image_id"] == image_id].reset_index(drop=True),
        pd.read_csv(io.StringIO(tiles_table.to_csv(index=False))),
    )


# ----------------------------------------------------------------------------- contract


def test_demo_set_respects_the_contract(demo):
    tiles, consensus, truth = demo
    assert tuple(tiles.columns) == TILES_REQUIRED + TILES_OPTIONAL
    assert tiles["tile_id"].is_unique and len(tiles) == 40
    assert tiles["solar_longitude_deg"].between(180.0, 250.0).all()
    assert tiles["metres_per_px"].between(0.25, 0.5).all()
    assert tiles["classifications"].between(20, 30).all()
    assert (tiles["col0"] == 0).all() and set(tiles["row0"]) == {0, 600, 1200, 1800, 2400}
    assert not tiles["image_id"].str.contains(r"[a-z]").any()  # invented ids: SYN_0001_A...
    total = sum(p.stat().st_size for p in DEMO.rglob("*") if p.is_file())
    assert total <= 10 * 1024**2
    for path in tiles["path"]:
        image = read_image(DEMO / path)
        assert image.dtype == np.uint8 and image.shape == TILE_SHAPE
    for name, table in (("consensus", consensus), ("truth", truth)):
        assert tuple(table.columns) == CONSENSUS_COLUMNS, name
        assert set(table["tile_id"]) <= set(tiles["tile_id"]), name
        assert set(table["kind"]) == {"fan", "spot"}, name
        assert table["x_px"].between(0.0, TILE_SHAPE[1] - 1.0).all(), name
        assert table["y_px"].between(0.0, TILE_SHAPE[0] - 1.0).all(), name
        assert pd.api.types.is_integer_dtype(table["votes"]) and (table["votes"] >= 1).all(), name
        assert table["fan_vote_share"].between(0.0, 1.0).all(), name
        for kind, fields in KIND_FIELDS.items():
            rows = table[table["kind"] == kind]
            empty = [c for c in GEOMETRY if c not in fields]
            assert rows[list(fields)].notna().all().all(), (name, kind)
            assert rows[empty].isna().all().all(), (name, kind)
        fans, spots = table[table["kind"] == "fan"], table[table["kind"] == "spot"]
        assert ((fans["direction_deg"] >= 0) & (fans["direction_deg"] < 360)).all(), name
        assert ((spots["direction_deg"] >= 0) & (spots["direction_deg"] < 180)).all(), name
        assert ((fans["opening_deg"] > 0) & (fans["opening_deg"] <= 180)).all(), name
        assert (fans["length_px"] > 0).all(), name
        assert (spots["semi_minor_px"] <= spots["semi_major_px"]).all() and (spots["semi_minor_px"] > 0).all(), name
    # Consensus fans end inside their tile too: the far end lies within the tile.
    fans = consensus[consensus["kind"] == "fan"]
    d_col, d_row = unit_vector(fans["direction_deg"].to_numpy())
    far_x = fans["x_px"].to_numpy() + d_col * fans["length_px"].to_numpy()
    far_y = fans["y_px"].to_numpy() + d_row * fans["length_px"].to_numpy()
    # (a mark is at least 1 px long, so a far end may sit one pixel beyond a border pixel centre)
    assert (far_x >= -1.01).all() and (far_x <= TILE_SHAPE[1] + 0.01).all()
    assert (far_y >= -1.01).all() and (far_y <= TILE_SHAPE[0] + 0.01).all()
    # Truth: votes are the volunteers who saw the tile.
    merged = truth.merge(tiles[["tile_id", "classifications"]], on="tile_id")
    assert (merged["votes"] == merged["classifications"]).all()


def test_demo_set_has_the_advertised_variety(demo):
    tiles, consensus, truth = demo
    fans, spots = truth[truth["kind"] == "fan"], truth[truth["kind"] == "spot"]
    # Lognormal fan lengths, most between 20 and 120 px, plus a share of short fans (10-20 px)
    # and of long faint broad ones (80-220 px, 50-90 degrees); other spreads 10-70 degrees.
    nominal = SCENE_PROFILES["nominal"]
    assert fans["length_px"].between(20, 120).mean() > 0.65
    assert fans["length_px"].between(10, 220).all()
    assert (fans["length_px"] < 20).mean() >= nominal.short_fan_share
    assert fans["opening_deg"].between(10, 90).all()
    assert (fans["opening_deg"] > 70).any()
    # Spots: many small (5-15 px), some up to 40 px, mildly elliptical.
    assert spots["semi_major_px"].between(5, 15).mean() > 0.6
    assert spots["semi_major_px"].max() > 30 and spots["semi_major_px"].max() <= 40
    assert (spots["semi_minor_px"] / spots["semi_major_px"]).between(0.6, 1.0).all()
    # Vents with two or three fans are frequent: fans of one vent share their apex exactly.
    per_vent = fans.groupby(["tile_id", "x_px", "y_px"]).size()
    assert 0.25 <= (per_vent >= 2).mean() <= 0.5
    assert per_vent.max() == 3
    # Weak consensus rows for a min-votes filter to drop, strong ones up to 30 votes.
    assert 10 <= (consensus["votes"] < 3).sum() and consensus["votes"].max() <= 30
    assert consensus["votes"].between(3, 30).mean() > 0.8
    # Some wide fans reported as spots: spot rows with a sizeable minority calling them fans.
    assert ((consensus["kind"] == "spot") & (consensus["fan_vote_share"] >= 0.2)).sum() >= 5
    # Some tiles have no deposits at all; calm images are mostly spots.
    assert (~tiles["tile_id"].isin(truth["tile_id"])).sum() >= 1
    image_of = truth["tile_id"].str.rsplit("_", n=1).str[0]
    calm = [f"SYN_{i + 1:04d}" for i, s in enumerate(_IMAGE_SCENARIOS) if s == "calm"]
    in_calm = image_of.str[:8].isin(calm)
    assert (truth.loc[in_calm, "kind"] == "spot").mean() > 0.6
    assert (truth.loc[~in_calm, "kind"] == "fan").mean() > 0.6


# ----------------------------------------------------------------------------- crowd simulation


def _match(truth, consensus, kind):
    """Nearest consensus row of the same kind and tile for each truth row (oracle kept here)."""
    pairs = []
    for tile_id, t in truth[truth["kind"] == kind].groupby("tile_id"):
        c = consensus[(consensus["tile_id"] == tile_id) & (consensus["kind"] == kind)]
        if len(c) == 0:
            continue
        # For fans several share an apex: match on apex and far end together.
        def points(df):
            if kind == "spot":
                return df[["x_px", "y_px"]].to_numpy()
            d_col, d_row = unit_vector(df["direction_deg"].to_numpy())
            reach = np.minimum(df["length_px"].to_numpy(), 20.0)
            return np.column_stack([df["x_px"], df["y_px"], df["x_px"] + d_col * reach, df["y_px"] + d_row * reach])

        dist, idx = cKDTree(points(c)).query(points(t))
        pairs.append(pd.DataFrame({"t": t.index, "c": c.index[idx], "dist": dist}))
    return pd.concat(pairs, ignore_index=True)


def test_consensus_jitter_statistics(demo):
    _, consensus, truth = demo
    fans = _match(truth, consensus, "fan")
    fans = fans[fans["dist"] < 15]
    t, c = truth.loc[fans["t"]], consensus.loc[fans["c"]]
    offset = np.hypot(t["x_px"].to_numpy() - c["x_px"].to_numpy(), t["y_px"].to_numpy() - c["y_px"].to_numpy())
    # Per-axis jitter 0.8 + 4/sqrt(votes) px (about 1.7 px at 20 votes): Rayleigh median 1.18 sigma.
    assert 1.0 <= np.median(offset) <= 3.5
    long = t["length_px"].to_numpy() >= 30
    turn = angular_difference(t["direction_deg"].to_numpy(), c["direction_deg"].to_numpy())[long]
    assert 1.0 <= np.median(turn) <= 8.0
    assert np.percentile(turn, 95) < 30.0
    spots = _match(truth, consensus, "spot")
    spots = spots[spots["dist"] < 15]
    ratio = consensus.loc[spots["c"], "semi_major_px"].to_numpy() / truth.loc[spots["t"], "semi_major_px"].to_numpy()
    assert 0.85 <= np.median(ratio) <= 1.15
    assert 1.0 <= np.median(spots["dist"]) <= 3.5


def test_faint_and_small_deposits_are_missed_more_often(demo):
    _, consensus, truth = demo
    strong = consensus[consensus["votes"] >= 3]
    found = np.zeros(len(truth), dtype=bool)
    # Share of the tile's volunteers behind the nearest mark within 8 px (0 when none).
    share = np.zeros(len(truth))
    for tile_id, t in truth.groupby("tile_id"):
        c = strong[strong["tile_id"] == tile_id]
        if len(c):
            dist, idx = cKDTree(c[["x_px", "y_px"]].to_numpy()).query(t[["x_px", "y_px"]].to_numpy())
            rows = truth.index.get_indexer(t.index)
            found[rows] = dist < 8
            share[rows] = np.where(dist < 8, c["votes"].to_numpy()[idx] / t["votes"].to_numpy(), 0.0)
    faint_ids = [f"SYN_{i + 1:04d}" for i, s in enumerate(_IMAGE_SCENARIOS) if s == "faint"]
    in_faint = truth["tile_id"].str[:8].isin(faint_ids).to_numpy()
    assert found[in_faint].mean() < found[~in_faint].mean() - 0.1
    # Spots alone at their vent: a spot under fans shares its apex with their marks.
    fan_apex = truth.loc[truth["kind"] == "fan", ["tile_id", "x_px", "y_px"]].drop_duplicates()
    under_fans = truth.merge(fan_apex, how="left", indicator=True)["_merge"].eq("both").to_numpy()
    spot = (truth["kind"] == "spot").to_numpy() & ~in_faint & ~under_fans
    small = spot & (truth["semi_major_px"] < 7).to_numpy()
    large = spot & (truth["semi_major_px"] >= 15).to_numpy()
    assert small.sum() >= 10 and large.sum() >= 10
    # Nearly every bright spot gets some strong mark; small ones get fewer volunteers behind it.
    assert found[small].mean() <= found[large].mean()
    assert share[small].mean() < share[large].mean() - 0.05


# ----------------------------------------------------------------------------- rendering


def test_prevailing_wind_is_recovered_by_circular_mean(windy_scene):
    _, truth = windy_scene
    fans = truth[truth["kind"] == "fan"]
    assert len(fans) > 50
    # scipy.stats.circmean / circstd as the reference for circular statistics.
    mean = circmean(fans["direction_deg"], high=360.0, low=0.0)
    assert angular_difference(mean, 137.0) < WIND_SCATTER_DEG
    # The first fan of each vent follows the wind with the stated scatter.
    first = fans.drop_duplicates("vent")
    scatter = circstd(first["direction_deg"], high=360.0, low=0.0)
    assert 0.6 * WIND_SCATTER_DEG < scatter < 1.5 * WIND_SCATTER_DEG


def test_fans_and_spots_are_darker_than_local_frost(windy_scene):
    image, truth = windy_scene

    def background(rows, cols):
        # Local frost level: median of the 81 x 81 window around each point (oracle kept here).
        return np.array([np.median(image[max(r - 40, 0) : r + 41, max(c - 40, 0) : c + 41]) for r, c in zip(rows, cols)])

    fans = truth[(truth["kind"] == "fan") & (truth["length_px"] >= 20)]
    d_col, d_row = unit_vector(fans["direction_deg"].to_numpy())
    cols = np.round(fans["x_px"].to_numpy() + 3 * d_col).astype(int).clip(1, image.shape[1] - 2)
    rows = np.round(fans["y_px"].to_numpy() + 3 * d_row).astype(int).clip(1, image.shape[0] - 2)
    near_apex = ndimage.uniform_filter(image, size=3)[rows, cols]
    darker = near_apex < background(rows, cols) - 0.02
    assert darker.mean() > 0.9
    # Darkest at the source: two thirds of the way out the fan is lighter than near the apex.
    far = 0.66 * fans["length_px"].to_numpy()
    cols_f = np.round(fans["x_px"].to_numpy() + far * d_col).astype(int).clip(0, image.shape[1] - 1)
    rows_f = np.round(fans["y_px"].to_numpy() + far * d_row).astype(int).clip(0, image.shape[0] - 1)
    assert np.median(ndimage.uniform_filter(image, size=3)[rows_f, cols_f] - near_apex) > 0.02
    spots = truth[truth["kind"] == "spot"]
    r, c = np.round(spots["y_px"]).astype(int), np.round(spots["x_px"]).astype(int)
    assert (image[r, c] < background(r, c) - 0.02).mean() > 0.9


def test_nodata_strips_are_zero_and_valid_pixels_at_least_one():
    image, truth = render_scene((900, 700), np.random.default_rng(3), scenario="faint", nodata=True)
    pixels = to_uint8(image)
    nodata = image == 0
    assert nodata.any() and not nodata.all()
    np.testing.assert_array_equal(pixels == 0, nodata)
    assert pixels[~nodata].min() >= 1
    # Every no-data region is a strip reaching the image edge.
    labels, n = ndimage.label(nodata)
    edge = np.unique(np.concatenate([labels[0], labels[-1], labels[:, 0], labels[:, -1]]))
    assert set(range(1, n + 1)) <= set(edge)
    # No deposit has its source in no-data.
    r, c = np.round(truth["y_px"]).astype(int), np.round(truth["x_px"]).astype(int)
    assert not nodata[r, c].any()


def test_demo_tiles_zero_only_in_edge_strips(demo):
    tiles, _, _ = demo
    with_nodata = 0
    for path in tiles["path"]:
        image = read_image(DEMO / path)
        labels, n = ndimage.label(image == 0)
        if n:
            with_nodata += 1
            edge = np.unique(np.concatenate([labels[0], labels[-1], labels[:, 0], labels[:, -1]]))
            assert set(range(1, n + 1)) <= set(edge), path
            # Strips are wide, not stray dark pixels.
            assert (image == 0).sum() > 1000, path
    assert 1 <= with_nodata < len(tiles)


def test_render_scene_is_deterministic_and_validates():
    a, ta = render_scene((200, 300), np.random.default_rng(9), scenario="two_winds")
    b, tb = render_scene((200, 300), np.random.default_rng(9), scenario="two_winds")
    np.testing.assert_array_equal(a, b)
    pd.testing.assert_frame_equal(ta, tb)
    assert a.dtype == np.float32 and a.shape == (200, 300) and a.max() <= 1.0
    with pytest.raises(DetectorError, match="scenario 'stormy'"):
        render_scene((200, 300), np.random.default_rng(9), scenario="stormy")
    with pytest.raises(DetectorError, match="too small"):
        render_scene((10, 300), np.random.default_rng(9))


# ----------------------------------------------------------------------------- output folder


def test_refuses_to_overwrite_without_force(tmp_path):
    out = tmp_path / "set"
    out.mkdir()
    (out / "keep.txt").write_text("old")
    with pytest.raises(DetectorError, match="not empty"):
        synthesize_tileset(out, n_images=1, tiles_per_image=1, seed=1, tile_shape=(64, 96))
    assert (out / "keep.txt").read_text() == "old"
    synthesize_tileset(out, n_images=1, tiles_per_image=2, seed=1, tile_shape=(64, 96), force=True)
    assert not (out / "keep.txt").exists()
    assert len(pd.read_csv(out / TILES_FILE)) == 2
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary left behind


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (dict(n_images=0, tiles_per_image=1, seed=1), "n_images"),
        (dict(n_images=1, tiles_per_image=1.5, seed=1), "tiles_per_image"),
        (dict(n_images=1, tiles_per_image=1, seed=-2), "seed"),
        (dict(n_images=1, tiles_per_image=1, seed=1, tile_shape=(10, 800)), "tile_shape"),
    ],
)
def test_bad_arguments_raise_one_clear_error(tmp_path, kwargs, message):
    with pytest.raises(DetectorError, match=message):
        synthesize_tileset(tmp_path / "x", **kwargs)
    assert not (tmp_path / "x").exists()


# ----------------------------------------------------------------------------- settings and new terrain

NOMINAL, SHIFTED = SCENE_PROFILES["nominal"], SCENE_PROFILES["shifted"]


@pytest.mark.parametrize(
    "field", ["fan_contrast", "faint_contrast", "broad_fan_contrast", "gain", "faint_gain", "blur_sigma_px", "noise_dn"]
)
def test_shifted_ranges_lie_outside_nominal(field):
    (lo_n, hi_n), (lo_s, hi_s) = getattr(NOMINAL, field), getattr(SHIFTED, field)
    assert hi_s < lo_n or lo_s > hi_n, field
    if field in ("fan_contrast", "faint_contrast", "broad_fan_contrast"):
        assert hi_s < lo_n  # shifted deposits are fainter
    # Terrain mix: the shifted profile has more polygonal ground.
    assert SHIFTED.polygon_probability > NOMINAL.polygon_probability
    assert SHIFTED.polygon_cover[0] > NOMINAL.polygon_cover[0]


def test_settings_validate_and_name_the_bad_value():
    with pytest.raises(DetectorError, match="blur_sigma_px"):
        SceneSettings(blur_sigma_px=(2.0, 1.0))
    with pytest.raises(DetectorError, match="short_fan_share"):
        SceneSettings(short_fan_share=1.5)
    with pytest.raises(DetectorError, match="'stormy'"):
        render_scene((64, 64), np.random.default_rng(0), settings="stormy")
    with pytest.raises(dataclasses.FrozenInstanceError):
        NOMINAL.noise_dn = (0.0, 1.0)


@pytest.mark.parametrize("spacing", [40.0, 110.0])
def test_polygon_cells_match_the_requested_spacing(spacing):
    shape = (600, 800)
    seeds = _polygon_seeds(shape, np.random.default_rng(1), spacing)
    # Geometry: n seeds tiling the image give Voronoi cells of mean area (image area) / n;
    # a jittered grid of spacing s has about one seed per s^2.
    area = shape[0] * shape[1]
    assert area / len(seeds) == pytest.approx(spacing**2, rel=0.12)
    trough = _polygon_troughs(shape, seeds, width_px=2.5)
    # Closed troughs: every cell is its own component of the non-trough pixels (scipy.ndimage.label).
    labels, n = ndimage.label(trough < 0.5)
    assert n == pytest.approx(len(seeds), rel=0.05)
    sizes = np.bincount(labels.ravel())[1:]
    # Cell areas: their mean plus the trough share matches area / n (trough area ~ width x edge length).
    assert (sizes.sum() + (trough >= 0.5).sum()) / n == pytest.approx(area / len(seeds), rel=0.06)
    # Cells vary in size (jittered seeds) but none is a sliver or a merged pair.
    interior = sizes[sizes > 0.2 * spacing**2]
    assert 0.1 < interior.std() / interior.mean() < 0.5
    assert sizes.max() < 2.5 * spacing**2


@pytest.mark.parametrize("width", [1.5, 2.5, 4.0])
def test_polygon_trough_width_matches_request(width):
    # Two seeds: the single edge is their perpendicular bisector (geometry).
    shape = (120, 200)
    straight = _polygon_troughs(shape, np.array([[40.0, 60.0], [160.0, 60.0]]), width_px=width)
    profile = straight[60]
    # Integrated darkness across the trough = its width; it is centred on x = 100.
    assert profile.sum() == pytest.approx(width, abs=0.02)
    assert np.average(np.arange(200), weights=profile) == pytest.approx(100.0, abs=0.05)
    # A slanted edge: a row crosses it over width / cos(angle between the row and the edge normal).
    seeds = np.array([[40.0, 30.0], [160.0, 90.0]])
    slanted = _polygon_troughs(shape, seeds, width_px=width)
    normal = (seeds[1] - seeds[0]) / np.hypot(*(seeds[1] - seeds[0]))
    across = slanted[40:80].sum(axis=1)
    assert np.median(across) == pytest.approx(width / normal[0], rel=0.05)


def _trough_scene(share, seed=5):
    settings = dataclasses.replace(
        NOMINAL, polygon_probability=1.0, polygon_cover=(0.95, 0.95), polygon_cell_px=(50.0, 60.0),
        vent_on_trough_share=share,
    )
    return _render_scene((900, 800), np.random.default_rng(seed), scenario="windy", wind_deg=None, density=1.0,
                         nodata=False, settings=settings)


def test_fans_placed_on_troughs_start_on_a_trough_pixel():
    distances = {}
    for share in (1.0, 0.0):
        _, truth, _, layers = _trough_scene(share)
        fans = truth[truth["kind"] == "fan"]
        assert len(fans) > 20
        # Distance from each apex to the nearest trough pixel (scipy.ndimage.distance_transform_edt).
        to_trough = ndimage.distance_transform_edt(~layers["troughs"])
        r, c = np.round(fans["y_px"]).astype(int), np.round(fans["x_px"]).astype(int)
        distances[share] = to_trough[r, c]
    assert (distances[1.0] <= 1.0).mean() > 0.95
    # Control: vents left where they fell mostly lie inside cells, away from the troughs.
    assert (distances[0.0] <= 1.0).mean() < 0.5


def _many_deposits(settings, n=3000, scenario="windy", seed=8):
    rng = np.random.default_rng(seed)
    vents = rng.uniform(0.0, 1000.0, (n, 2))
    return _deposits(vents, rng, _SCENARIO_PARAMS[scenario], 90.0, settings)


def test_spots_under_fans_share_the_apex():
    settings = dataclasses.replace(NOMINAL, spot_with_fans_share=0.4)
    truth = _many_deposits(settings)
    kinds = truth.groupby("vent")["kind"].agg(set)
    fan_vents = kinds[kinds.apply(lambda k: "fan" in k)]
    both = fan_vents[fan_vents.apply(lambda k: "spot" in k)].index
    # Binomial share: 0.4 +/- 4 standard errors.
    assert len(both) / len(fan_vents) == pytest.approx(0.4, abs=4 * np.sqrt(0.24 / len(fan_vents)))
    # The spot and the fans of such a vent have the same apex exactly.
    sub = truth[truth["vent"].isin(both)]
    assert (sub.groupby("vent")[["x_px", "y_px"]].nunique() == 1).all().all()
    # Without the setting, fan vents carry no spot.
    none = _many_deposits(dataclasses.replace(NOMINAL, spot_with_fans_share=0.0))
    assert (none.groupby("vent")["kind"].nunique() == 1).all()


def test_short_and_faint_broad_fans_occur_at_their_shares():
    settings = NOMINAL
    fans = _many_deposits(settings).query("kind == 'fan'")
    m = len(fans)
    # In a windy image the other fans are lognormal about 48 px (sigma 0.55), so a few are short too:
    # P(L < 20) from scipy.stats.norm.
    rest = 1.0 - settings.short_fan_share - settings.broad_fan_share
    expected_short = settings.short_fan_share + rest * norm.cdf((np.log(20.0) - np.log(48.0)) / 0.55)
    tolerance = 4 * np.sqrt(expected_short * (1 - expected_short) / m)
    assert (fans["length_px"] < 20).mean() == pytest.approx(expected_short, abs=tolerance)
    assert fans["length_px"].min() >= 10.0
    # Broad faint fans are the only ones below the ordinary contrast range.
    broad = fans[fans["contrast"] < settings.fan_contrast[0]]
    share = settings.broad_fan_share
    assert len(broad) / m == pytest.approx(share, abs=4 * np.sqrt(share * (1 - share) / m))
    assert broad["contrast"].between(*settings.broad_fan_contrast).all()
    assert broad["length_px"].between(*settings.broad_fan_length_px).all()
    assert broad["opening_deg"].between(*settings.broad_fan_opening_deg).all()
    assert broad["length_px"].mean() > 2 * fans["length_px"].median()


def _immerkaer_sigma(image):
    """Noise standard deviation by J. Immerkaer's fast estimator (1996; kernel and constant from memory)."""
    kernel = np.array([[1, -2, 1], [-2, 4, -2], [1, -2, 1]], dtype=float)
    response = ndimage.convolve(image.astype(float), kernel)[1:-1, 1:-1]
    return np.sqrt(np.pi / 2.0) * np.abs(response).mean() / 6.0


def test_shifted_images_have_noise_outside_the_nominal_range():
    # The estimator recovers white Gaussian noise of known sigma (numpy generator as reference).
    white = np.random.default_rng(0).normal(0.0, 3.0, (300, 400))
    assert _immerkaer_sigma(white) == pytest.approx(3.0, rel=0.03)
    for name, settings in SCENE_PROFILES.items():
        for seed in range(3):
            image, _, _, layers = _render_scene((300, 400), np.random.default_rng(seed), scenario="windy",
                                                wind_deg=None, density=1.0, nodata=False, settings=settings)
            noise = 255.0 * _immerkaer_sigma(image)
            assert noise == pytest.approx(layers["noise_dn"], rel=0.08), (name, seed)
            if name == "shifted":
                assert noise > NOMINAL.noise_dn[1] * 1.1, seed
            else:
                assert noise < SHIFTED.noise_dn[0] * 0.9, seed


def _edge_sigma(profile):
    """Gaussian blur of a step edge: least-squares fit of a blurred step, level + height * Phi((x - x0) / sigma).

    scipy.optimize.curve_fit with scipy.special.ndtr (the normal distribution function) as the edge model.
    """
    x = np.arange(profile.size, dtype=float)
    model = lambda x, level, height, x0, sigma: level + height * ndtr((x - x0) / sigma)  # noqa: E731
    start = (profile[:5].mean(), np.ptp(profile), profile.size / 2.0, 1.0)
    (_, _, _, sigma), _ = curve_fit(model, x, profile, p0=start)
    return abs(sigma)


def test_shifted_images_have_blur_outside_the_nominal_range():
    step = np.where(np.arange(120)[None, :] >= 60, 0.75, 0.45) * np.ones((400, 1))
    # The measure returns the sigma of a scipy.ndimage Gaussian filter (the method's reference).
    assert _edge_sigma(ndimage.gaussian_filter1d(step[0], 1.7)) == pytest.approx(1.7, abs=0.03)
    measured = {}
    for name, settings in SCENE_PROFILES.items():
        # A step edge sent through the image formation; rows averaged against the noise.
        measured[name] = [
            _edge_sigma(_camera(step.copy(), np.random.default_rng(seed), settings, faint=False)[0].mean(axis=0))
            for seed in range(6)
        ]
    assert max(measured["nominal"]) < NOMINAL.blur_sigma_px[1] + 0.05
    assert min(measured["nominal"]) > NOMINAL.blur_sigma_px[0] - 0.05
    assert min(measured["shifted"]) > NOMINAL.blur_sigma_px[1] + 0.15
    assert max(measured["shifted"]) < SHIFTED.blur_sigma_px[1] + 0.05


def test_shifted_tileset_is_deterministic_and_differs_from_nominal(tmp_path):
    args = dict(n_images=2, tiles_per_image=2, seed=5, tile_shape=(160, 200))
    a = _digest(synthesize_tileset(tmp_path / "a", settings="shifted", **args))
    b = _digest(synthesize_tileset(tmp_path / "b", settings=SHIFTED, **args))
    c = _digest(synthesize_tileset(tmp_path / "c", **args))
    assert a == b
    assert a[TILES_FILE] == c[TILES_FILE]  # same ids and metadata: the profile is not in the contract
    assert all(a[k] != c[k] for k in a if k.startswith("images"))


def test_cli_profile_option_writes_the_shifted_set(tmp_path):
    from frostvane.cli import main

    assert main(["synth", str(tmp_path / "cli"), "--images", "1", "--tiles-per-image", "1", "--seed", "3",
                 "--profile", "shifted"]) == 0
    direct = synthesize_tileset(tmp_path / "direct", n_images=1, tiles_per_image=1, seed=3, settings="shifted")
    assert _digest(tmp_path / "cli") == _digest(direct)
