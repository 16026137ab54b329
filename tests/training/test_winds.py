"""Tests of the wind analysis (training/winds.py, wind_catalogs.py, wind_plots.py) and ``frostvane winds``."""

import itertools
import json

import numpy as np
import pandas as pd
import pytest

from detector import circstats
from detector.errors import CatalogError, DetectorError
from frostvane.cli import main
from training.winds.wind_catalogs import read_consensus_catalog, read_screening_catalog
from training.winds.winds import (
    BIN_KEYS,
    IMAGE_KEYS,
    WindSettings,
    analyse_winds,
    signed_difference,
    summarise_groups,
    write_winds,
)

from ._wind_truth import check_record, recovery_table, synthesize_with_winds

CONSENSUS_HEADER = "tile_id,kind,x_px,y_px,direction_deg,length_px,opening_deg,semi_major_px,semi_minor_px,votes\n"


def _fan(tile, direction, length, x=50.0, y=50.0):
    return f"{tile},fan,{x},{y},{direction},{length},20,,,5\n"


@pytest.fixture()
def hand_set(tmp_path):
    """A hand-made tile set: region North, Ls 181 and 185 (bin 180-190) and 195 (bin 190-200); region South, Ls 182.

    Tiles are 100 x 100 px (sizes in tiles.csv, no images needed), 0.5 m/px, with tile-centre lon/lat.
    """
    root = tmp_path / "hand"
    root.mkdir()
    (root / "tiles.csv").write_text(
        "tile_id,image_id,path,solar_longitude_deg,region,metres_per_px,width,height,lon_deg,lat_deg\n"
        "T1,IMG1,a.png,181,North,0.5,100,100,10,-80\n"
        "T2,IMG1,b.png,181,North,0.5,100,100,10,-80\n"
        "T3,IMG2,c.png,185,North,0.5,100,100,10,-80\n"
        "T4,IMG3,d.png,195,North,0.5,100,100,20,-81\n"
        "T5,IMG4,e.png,182,South,0.5,100,100,200,-75\n"
        "T6,IMG4,f.png,182,South,0.5,100,100,200,-75\n")
    (root / "consensus.csv").write_text(
        CONSENSUS_HEADER
        + _fan("T1", 80, 10) + _fan("T1", 100, 10)   # length-weighted mean 90 in T1
        + _fan("T2", 90, 20)                        # 90
        + _fan("T3", 85, 10) + _fan("T3", 95, 10)   # 90
        + _fan("T4", 200, 30) + _fan("T4", 220, 10)
        + _fan("T5", 350, 12) + _fan("T5", 10, 12) + _fan("T6", 0, 24)
        + "T6,spot,30,30,0,,,10,10,5\n")
    return root


def _settings(**kw):
    return WindSettings(**{"weighting": "length", "n_boot": 2000, "n_boot_modes": 50, **kw})


def test_hand_catalog_bins_and_means(hand_set):
    catalog = read_consensus_catalog(hand_set)
    rows, _, _ = summarise_groups(catalog, BIN_KEYS, _settings(), direction_column="direction_deg")
    rows = rows.set_index(["region", "ls_bin_start"])
    # Bins by hand: North 180-190 holds T1-T3 (5 fans), North 190-200 holds T4, South 180-190 holds T5, T6.
    assert rows.loc[("North", 180.0), "n_fans"] == 5 and rows.loc[("North", 180.0), "n_tiles"] == 3
    assert rows.loc[("North", 190.0), "n_fans"] == 2
    assert rows.loc[("South", 180.0), "n_fans"] == 3 and rows.loc[("South", 180.0), "n_tiles"] == 2
    north = rows.loc[("North", 180.0)]
    # Length-weighted mean by hand: the +-10 and +-5 deg pairs cancel about 90.
    assert north["mean_to_deg"] == pytest.approx(90.0, abs=1e-9)
    assert north["mean_from_deg"] == pytest.approx(270.0, abs=1e-9)
    # R by hand: (10 cos 10 + 10 cos 10 + 20 + 10 cos 5 + 10 cos 5) / 60.
    c10, c5 = np.cos(np.radians(10)), np.cos(np.radians(5))
    assert north["resultant_length"] == pytest.approx((20 * c10 + 20 + 20 * c5) / 60, rel=1e-12)
    assert north["circular_std_deg"] == pytest.approx(np.degrees(np.sqrt(-2 * np.log((20 * c10 + 20 + 20 * c5) / 60))))
    # Rayleigh is unweighted: the same as the test on the five directions.
    assert north["rayleigh_p"] == pytest.approx(circstats.rayleigh_test([80, 100, 90, 85, 95])[1])
    # Length-weighted 200 and 220 (30 : 10): atan2 of the weighted sums, by hand.
    s = 30 * np.sin(np.radians(200)) + 10 * np.sin(np.radians(220))
    c = 30 * np.cos(np.radians(200)) + 10 * np.cos(np.radians(220))
    assert rows.loc[("North", 190.0), "mean_to_deg"] == pytest.approx(np.degrees(np.arctan2(s, c)) % 360)
    assert rows.loc[("South", 180.0), "mean_to_deg"] % 360 == pytest.approx(0.0, abs=1e-9) or \
        rows.loc[("South", 180.0), "mean_to_deg"] == pytest.approx(360.0)
    # Lengths: plain means, px and m (0.5 m/px).
    assert north["length_px_mean"] == pytest.approx(12.0)
    assert north["length_m_mean"] == pytest.approx(6.0)
    # Every tile of the bin averages exactly 90 deg, so every tile resample does: a zero-width interval.
    assert north["ci_unit"] == "fan"  # 3 tiles with fans: too few clusters, fans are resampled
    tile_rows, _, _ = summarise_groups(catalog, BIN_KEYS, _settings(resample="tile"), direction_column="direction_deg")
    # Bin centroid: the tiles' lon/lat.
    assert north["lon_deg"] == pytest.approx(10.0) and north["lat_deg"] == pytest.approx(-80.0)
    assert len(tile_rows) == 3


def test_hand_catalog_covered_fraction(hand_set):
    rows, _, _ = summarise_groups(read_consensus_catalog(hand_set), BIN_KEYS, _settings(), direction_column="direction_deg")
    south = rows.set_index(["region", "ls_bin_start"]).loc[("South", 180.0)]
    # By hand: three sectors of radius 12, 12 and 24 px, 20 deg opening (pi r^2 / 18 each; T5's two
    # overlap only near the apex) and a disc of radius 10 px, over two 100 x 100 px tiles.
    sector = lambda r: np.pi * r * r * 20 / 360  # noqa: E731
    expected = (sector(12) * 2 + sector(24) + np.pi * 100) / 20000
    assert south["covered_fraction"] == pytest.approx(expected, rel=0.06)


def test_bootstrap_interval_matches_exact_enumeration(tmp_path):
    # A tile bootstrap with 5 tiles has 5**5 equally likely resamples: enumerate them all (a naive
    # oracle kept here), take the percentile interval, and compare with 40,000 random replicates.
    root = tmp_path / "five"
    root.mkdir()
    rows = "tile_id,image_id,path,solar_longitude_deg,region,width,height\n"
    cons = CONSENSUS_HEADER
    directions = {"A": (10, 30), "B": (50,), "C": (40, 45, 60), "D": (20,), "E": (70, 80)}
    for t, ds in directions.items():
        rows += f"{t},I{t},{t}.png,200,R,100,100\n"
        cons += "".join(_fan(t, d, 10) for d in ds)
    (root / "tiles.csv").write_text(rows)
    (root / "consensus.csv").write_text(cons)
    catalog = read_consensus_catalog(root)
    settings = WindSettings(weighting="none", n_boot=40000, n_boot_modes=20)
    got = summarise_groups(catalog, BIN_KEYS, settings, direction_column="direction_deg")[0].iloc[0]
    assert got["ci_unit"] == "tile"
    sums = {t: (np.cos(np.radians(ds)).sum(), np.sin(np.radians(ds)).sum()) for t, ds in directions.items()}
    mean = got["mean_to_deg"]
    devs = []
    for pick in itertools.product(directions, repeat=5):
        c = sum(sums[t][0] for t in pick)
        s = sum(sums[t][1] for t in pick)
        devs.append(signed_difference(np.degrees(np.arctan2(s, c)), mean))
    devs = np.array(devs)
    # The exact distribution is lumpy (atoms), so check each bound as a quantile: the exact mass
    # below it and up to it must straddle 2.5 % (97.5 %), within Monte Carlo error (1 point).
    for bound, q in ((got["mean_ci_low_deg"], 0.025), (got["mean_ci_high_deg"], 0.975)):
        d = signed_difference(bound, mean)
        assert np.mean(devs < d - 1e-9) <= q + 0.01
        assert np.mean(devs <= d + 1e-9) >= q - 0.01


def _screening_copy(tileset_root, folder, rotate_deg=0.0, drop=None):
    """A screening folder holding the consensus fans of a tile set (rotated), as `frostvane screen` lays it out."""
    folder.mkdir()
    tiles = pd.read_csv(tileset_root / "tiles.csv")
    cons = pd.read_csv(tileset_root / "consensus.csv")
    pd.DataFrame({"tile_id": tiles["tile_id"], "image": tiles["image_id"], "width": tiles["width"],
                  "height": tiles["height"], "fan_cover": 0.01, "spot_cover": 0.0, "route": ""}).to_csv(
        folder / "tiles.csv", index=False)
    det = cons.assign(direction_deg=np.where(cons["kind"] == "fan", (cons["direction_deg"] + rotate_deg) % 360,
                                             cons["direction_deg"]), score=0.9, direction_confidence=0.8)
    det["image"] = det["tile_id"].map(dict(zip(tiles["tile_id"], tiles["image_id"])))
    if drop:
        det = det.drop(columns=[drop])
    det.to_csv(folder / "detections.csv", index=False)
    return folder


@pytest.mark.parametrize("rotate, agree", [(0.0, True), (25.0, False)])
def test_machine_vs_crowd(hand_set, tmp_path, rotate, agree):
    screening = _screening_copy(hand_set, tmp_path / "screen", rotate)
    analysis = analyse_winds(crowd=hand_set, machine=[screening], settings=_settings(min_fans=2), log=lambda *_: None)
    table = analysis.bin_agreement.set_index(["region", "ls_bin_start"])
    assert len(table) == 3
    # Same fans, same length weights: the difference is the rotation (score x confidence is constant).
    diff = table["difference_deg"].to_numpy()
    assert np.allclose(diff, rotate, atol=1e-6)
    assert table["agree"].all() == agree
    assert analysis.agreement_share("bins") == (1.0 if agree else 0.0)
    lo, hi = table["difference_ci_low_deg"].to_numpy(), table["difference_ci_high_deg"].to_numpy()
    assert np.all(lo <= diff + 1e-9) and np.all(diff <= hi + 1e-9)


def test_model_winds_matching_and_from_to_convention(hand_set, tmp_path):
    # North 180-190 blows to 90 deg; a model wind *from* 270 blows to 90: difference 0. The same
    # wind written as wind_to_deg must give the same match.
    for column, value in (("wind_from_deg", 270), ("wind_to_deg", 90)):
        model = tmp_path / f"model_{column}.csv"
        model.write_text(f"region,solar_longitude_deg,{column},speed_m_s\nNorth,186,{value},5\nNorth,260,{value},5\n")
        analysis = analyse_winds(crowd=hand_set, model_winds=model, settings=_settings(north_up=True),
                                 log=lambda *_: None)
        m = analysis.model_match.set_index(["region", "ls_bin_start"])
        assert m.loc[("North", 180.0), "difference_deg"] == pytest.approx(0.0, abs=1e-9)
        assert m.loc[("North", 180.0), "model_wind_to_deg"] == pytest.approx(90.0)
        # Ls 195 bin centre: 186 is 9 deg away (beyond half a bin), 260 farther: no match.
        assert ("North", 190.0) not in m.index
        assert ("South", 180.0) not in m.index  # no model row for South


def test_model_winds_need_north(hand_set, tmp_path):
    model = tmp_path / "model.csv"
    model.write_text("region,solar_longitude_deg,wind_from_deg\nNorth,186,270\n")
    with pytest.raises(CatalogError, match="north-up"):
        analyse_winds(crowd=hand_set, model_winds=model, settings=_settings(), log=lambda *_: None)


def test_outputs_and_gis_layers(hand_set, tmp_path):
    import pyogrio
    import pyproj

    out = tmp_path / "winds"
    analysis = analyse_winds(crowd=hand_set, settings=_settings(), log=lambda *_: None)
    files = write_winds(analysis, out)
    for name in ("bins.csv", "images.csv", "bin_modes.csv", "winds.json", "bins.geojson", "bins.gpkg",
                 "roses_crowd.png", "direction_vs_ls.png", "cover_length_vs_ls.png"):
        assert name in files and (out / name).stat().st_size > 0
    bins = pd.read_csv(out / "bins.csv")
    record = json.loads((out / "winds.json").read_text())
    assert len(record["bins"]) == len(bins) == 3
    assert record["bins"][0]["mean_to_deg"] == pytest.approx(bins["mean_to_deg"][0], rel=1e-5)
    geo = json.loads((out / "bins.geojson").read_text())
    assert [f["geometry"]["coordinates"] for f in geo["features"]][0] == pytest.approx([10.0, -80.0])
    # RFC 7946 section 4: no "crs" member, and no other foreign member at the top level.
    assert set(geo) == {"type", "features"} and "direction_frame" in geo["features"][0]["properties"]
    # GDAL (through pyogrio) reads the GeoPackage back: 3 points in the Mars 2015 ocentric CRS.
    info = pyogrio.read_info(out / "bins.gpkg")
    assert info["features"] == 3 and info["geometry_type"] == "Point"
    assert pyproj.CRS(info["crs"]).equals(pyproj.CRS("IAU_2015:49900"))
    _, _, geometry, fields = pyogrio.raw.read(out / "bins.gpkg")
    import struct

    lon, lat = struct.unpack("<dd", bytes(geometry[2])[-16:])
    # 200 deg east is written as -160 (the layer's longitudes run from -180 to 180).
    assert (lon, lat) == pytest.approx((-160.0, -75.0))


def test_generated_catalog_recovers_generator_winds(tmp_path):
    # Invented scenes of the synthetic generator (one wind, two winds, calm) whose winds are known.
    out = tmp_path / "syn"
    winds = synthesize_with_winds(out, n_images=3, tiles_per_image=4, seed=5)
    assert check_record(out, winds) < 6.0  # the record agrees with truth.csv
    catalog = read_consensus_catalog(out)
    images, modes, _ = summarise_groups(catalog, IMAGE_KEYS, WindSettings(n_boot_modes=50),
                                        direction_column="direction_deg")
    table = recovery_table(winds, images, modes).set_index("wind_mode")
    # One wind: one wind found within 10 deg; two winds: both within 15 deg; calm: no preferred direction.
    assert table.loc["one", "n_winds"] == 1 and table.loc["one", "error_deg"] < 10
    assert table.loc["two", "n_winds"] == 2 and table.loc["two", "error_deg"] < 15
    assert table.loc["calm", "n_winds"] == 0 and table.loc["calm", "rayleigh_p"] > 0.05


def test_two_wind_bins_have_mode_intervals(tmp_path):
    # Invented catalog sampled here: two winds (to 30 and 150 deg) over 20 tiles.
    rng = np.random.default_rng(3)
    root = tmp_path / "two"
    root.mkdir()
    rows, cons = "tile_id,image_id,path,solar_longitude_deg,region,width,height\n", CONSENSUS_HEADER
    for t in range(20):
        rows += f"T{t},I{t // 4},{t}.png,222,R,200,200\n"
        for d in np.where(rng.random(8) < 0.5, 30, 150) + rng.normal(0, 10, 8):
            cons += _fan(f"T{t}", round(d % 360, 3), 20)
    (root / "tiles.csv").write_text(rows)
    (root / "consensus.csv").write_text(cons)
    rows, modes, _ = summarise_groups(read_consensus_catalog(root), BIN_KEYS, _settings(),
                                      direction_column="direction_deg")
    assert rows["n_winds"].iloc[0] == 2
    for target in (30, 150):
        m = modes.iloc[int(np.argmin(circstats.angular_difference(modes["to_deg"], target)))]
        assert circstats.angular_difference(m["to_deg"], target) < 5
        assert circstats.angular_difference(m["to_ci_low_deg"], m["to_deg"]) < 10
        assert m["weight_ci_low"] < m["weight"] < m["weight_ci_high"]


# ----------------------------------------------------------------------------- command line and errors


def test_cli_writes_outputs(hand_set, tmp_path, capsys):
    screening = _screening_copy(hand_set, tmp_path / "screen", 5.0)
    out = tmp_path / "w"
    code = main(["winds", "--crowd", str(hand_set), "--machine", str(screening), "--out", str(out),
                 "--bootstrap", "200", "--bootstrap-modes", "20", "--min-fans", "2"])
    assert code == 0
    text = capsys.readouterr().out
    assert "machine vs crowd, bins: 3 of 3 agree within 10 deg" in text
    assert (out / "agreement_bins.csv").is_file() and (out / "machine_vs_crowd.png").is_file()


def _run_error(argv, capsys):
    code = main(argv)
    err = capsys.readouterr().err.strip().splitlines()
    return code, err


def test_cli_missing_column(hand_set, tmp_path, capsys):
    screening = _screening_copy(hand_set, tmp_path / "screen", drop="direction_deg")
    out = tmp_path / "w"
    code, err = _run_error(["winds", "--crowd", str(hand_set), "--machine", str(screening), "--out", str(out)], capsys)
    assert code == 2 and len(err) == 1
    assert "lacks column 'direction_deg'" in err[0] and "detections.csv" in err[0]
    assert not out.exists()


def test_cli_angle_out_of_range(hand_set, tmp_path, capsys):
    screening = _screening_copy(hand_set, tmp_path / "screen")
    det = pd.read_csv(screening / "detections.csv")
    det.loc[2, "direction_deg"] = 400.0
    det.to_csv(screening / "detections.csv", index=False)
    code, err = _run_error(["winds", "--machine", str(screening), "--tiles", str(hand_set), "--out",
                            str(tmp_path / "w")], capsys)
    assert code == 2 and len(err) == 1
    assert "detections.csv row 3: direction_deg 400.0 is outside [0, 360)" in err[0]


def test_cli_empty_catalog(tmp_path, capsys):
    root = tmp_path / "empty"
    root.mkdir()
    (root / "tiles.csv").write_text("tile_id,image_id,path,solar_longitude_deg,width,height\nT1,I1,a.png,200,64,64\n")
    (root / "consensus.csv").write_text(CONSENSUS_HEADER)
    code, err = _run_error(["winds", "--crowd", str(root), "--out", str(tmp_path / "w")], capsys)
    assert code == 2 and len(err) == 1 and "holds no fans" in err[0]


def test_cli_bad_model_table(hand_set, tmp_path, capsys):
    model = tmp_path / "m.csv"
    model.write_text("region,solar_longitude_deg,wind_to_deg,wind_from_deg\nNorth,186,90,270\n")
    code, err = _run_error(["winds", "--crowd", str(hand_set), "--model-winds", str(model), "--north-up",
                            "--out", str(tmp_path / "w")], capsys)
    assert code == 2 and len(err) == 1 and "exactly one of columns 'wind_to_deg' and 'wind_from_deg'" in err[0]


def test_cli_unknown_image_metadata(hand_set, tmp_path, capsys):
    screening = _screening_copy(hand_set, tmp_path / "screen")
    code, err = _run_error(["winds", "--machine", str(screening), "--out", str(tmp_path / "w")], capsys)
    assert code == 2 and len(err) == 1 and "has no region or solar longitude" in err[0]


def test_cli_bad_bootstrap_names_the_option(hand_set, tmp_path, capsys):
    code, err = _run_error(["winds", "--crowd", str(hand_set), "--north-up", "--bootstrap", "-1",
                            "--out", str(tmp_path / "w")], capsys)
    assert code == 2 and len(err) == 1 and "--bootstrap" in err[0] and "-1" in err[0], err
    assert not (tmp_path / "w").exists()


def test_settings_validation():
    with pytest.raises(DetectorError, match="weighting 'votes'"):
        WindSettings(weighting="votes")
    with pytest.raises(DetectorError, match="ls_bin_deg"):
        WindSettings(ls_bin_deg=0)


def test_screening_of_several_folders_keeps_tiles_apart(hand_set, tmp_path):
    a = _screening_copy(hand_set, tmp_path / "a")
    b = _screening_copy(hand_set, tmp_path / "b")
    from training.winds.wind_catalogs import metadata_from_tileset

    _, meta = metadata_from_tileset(hand_set)
    both = read_screening_catalog([a, b], meta=meta)
    one = read_screening_catalog([a], meta=meta)
    assert len(both.tiles) == 2 * len(one.tiles) and both.tiles["tile_key"].is_unique
    assert len(both.fans) == 2 * len(one.fans)
