"""Tests of ``frostvane screen``: tiling, outputs, georeferencing, resuming, workers and bad input."""

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import asdict
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import pyproj
from affine import Affine
from PIL import Image

from detector.contract import DETECTION_COLUMNS
from detector.gis.geo import MARS_SOUTH_POLAR_STEREO
from detector.io import write_image
from detector.gis.raster import write_geotiff
from detector.inference.detect import tile_direction_stats
from detector.screening.folder import GEO_COLUMNS, TILE_COLUMNS
from detector.screening.run import screen
from frostvane.cli import main as cli_main

REPO = Path(__file__).resolve().parents[2]
DEMO_MODEL = REPO / "models" / "demo"
# A run of images without a CRS writes no GeoJSON (see test_png_run_writes_a_pixel_geopackage_and_no_geojson).
OUTPUT_FILES = ("tiles.csv", "detections.csv", "detections.gpkg", "quicklook.png", "rose.png")
TILE = (200, 150)


# ----------------------------------------------------------------------------- fixtures


def _build_small_model(folder, seed=0):
    """A small but real exported model: boosted trees on the patch features of one synthetic scene.

    Patches holding a rendered fan apex are labelled fan, those holding a spot
    centre spot; it is good enough to make detections, which is all the
    screening plumbing needs.
    """
    from sklearn.ensemble import HistGradientBoostingClassifier
    from threadpoolctl import threadpool_limits

    from detector.objects.assemble import AssemblyParams
    from detector.tile.features import extract_features
    from detector.objects.assemble import OBJECT_FEATURE_NAMES
    from detector.inference.model import (CLASS_NAMES, CONTEXT_ONNX, DETECTOR_ONNX, MODEL_CARD, MODEL_FORMAT_VERSION,
                                          OBJECTS_ONNX, ORIENTATION_ONNX, sha256_file)
    from detector.objects.context import CONTEXT_FEATURE_NAMES
    from detector.tile.spec import POLARITY_ODD_FEATURES, FeatureSpec
    from training.fitting.export import to_onnx_bytes
    from training.synth import render_scene, to_uint8
    from training.fitting.train import orientation_feature_names

    rng = np.random.default_rng(seed)
    image, truth = render_scene((384, 512), rng, scenario="windy", nodata=False)
    spec = FeatureSpec()
    X, grid = extract_features(to_uint8(image), spec)
    half = grid.patch_px / 2
    y = np.zeros(len(X), dtype=np.int64)
    for code, kind in ((1, "fan"), (2, "spot")):
        pts = truth.loc[truth["kind"] == kind, ["x_px", "y_px"]].to_numpy(dtype=float)
        near = (np.abs(grid.x_px[:, None] - pts[None, :, 0]) < half) & (np.abs(grid.y_px[:, None] - pts[None, :, 1]) < half)
        y[near.any(axis=1)] = code
    names = orientation_feature_names(spec)
    index = [spec.feature_names.index(n) for n in names]
    with threadpool_limits(1):
        detector = HistGradientBoostingClassifier(max_iter=10, random_state=0).fit(X, y)
        orientation = HistGradientBoostingClassifier(max_iter=5, random_state=0).fit(
            X[:, index], np.arange(len(X)) % 2
        )
        # The object classifier only has to exist: it scores readings by their patch probability.
        F = rng.random((200, len(OBJECT_FEATURE_NAMES)))
        objects = HistGradientBoostingClassifier(max_iter=5, random_state=0).fit(
            F, (F[:, OBJECT_FEATURE_NAMES.index("read_p_fan")] > 0.5).astype(int))
        # So does the context model: it follows the first score's logit (the column after the object features).
        Z = rng.normal(size=(200, len(OBJECT_FEATURE_NAMES) + 1 + len(CONTEXT_FEATURE_NAMES)))
        context = HistGradientBoostingClassifier(max_iter=5, random_state=0).fit(
            Z, (Z[:, len(OBJECT_FEATURE_NAMES)] > 0).astype(int))
    folder.mkdir(parents=True, exist_ok=True)
    (folder / DETECTOR_ONNX).write_bytes(to_onnx_bytes(detector, X.shape[1]))
    (folder / ORIENTATION_ONNX).write_bytes(to_onnx_bytes(orientation, len(index)))
    (folder / OBJECTS_ONNX).write_bytes(to_onnx_bytes(objects, F.shape[1]))
    (folder / CONTEXT_ONNX).write_bytes(to_onnx_bytes(context, Z.shape[1]))
    card = {
        "format_version": MODEL_FORMAT_VERSION,
        "class_names": list(CLASS_NAMES),
        "feature_spec": json.loads(spec.to_json()),
        "feature_names": list(spec.feature_names),
        "orientation_features": list(names),
        "odd_features": [n for n in names if n in POLARITY_ODD_FEATURES],
        "calibration": {"temperature": 1.0, "bias": [0.0, 0.0, 0.0]},
        "assembly": asdict(AssemblyParams()),
        "files": {n: sha256_file(folder / n) for n in (DETECTOR_ONNX, ORIENTATION_ONNX, OBJECTS_ONNX, CONTEXT_ONNX)},
        "object_features": list(OBJECT_FEATURE_NAMES),
        "context_features": list(CONTEXT_FEATURE_NAMES),
        "unfamiliarity": None,
    }
    (folder / MODEL_CARD).write_text(json.dumps(card))
    return folder


@pytest.fixture(scope="session")
def model_dir(tmp_path_factory):
    if (DEMO_MODEL / "model.json").is_file():
        return DEMO_MODEL
    return _build_small_model(tmp_path_factory.mktemp("model") / "small")


def _scene(shape, seed, **kwargs):
    from training.synth import render_scene, to_uint8

    image, _ = render_scene(shape, np.random.default_rng(seed), **kwargs)
    return to_uint8(image)


@pytest.fixture(scope="session")
def png_image(tmp_path_factory):
    path = tmp_path_factory.mktemp("png") / "scene_a.png"
    write_image(path, _scene((380, 500), 13, scenario="windy", nodata=False))
    return path


@pytest.fixture(scope="session")
def png_run(model_dir, png_image, tmp_path_factory):
    out = tmp_path_factory.mktemp("png_run") / "screen"
    summary = screen(model_dir, [png_image], out, tile=TILE, overlap=32, progress=False)
    return out, summary


@pytest.fixture(scope="session")
def big_png(tmp_path_factory):
    """36 tiles of 200 x 150 px: long enough to be interrupted."""
    path = tmp_path_factory.mktemp("big") / "scene_big.png"
    write_image(path, _scene((900, 1200), 12, scenario="two_winds", nodata=False))
    return path


@pytest.fixture(scope="session")
def big_reference(model_dir, big_png, tmp_path_factory):
    out = tmp_path_factory.mktemp("big_ref") / "screen"
    screen(model_dir, [big_png], out, tile=TILE, overlap=32, progress=False)
    return out


def _cli(*argv):
    return [sys.executable, "-m", "frostvane.cli", *map(str, argv)]


def _same_outputs(a, b):
    import pyogrio.raw

    for name in ("tiles.csv", "detections.csv", "detections.geojson"):
        if (a / name).exists() or (b / name).exists():
            assert (a / name).read_bytes() == (b / name).read_bytes(), name
    # A GeoPackage records when it was written, so its layers are compared, not its bytes.
    for layer in ("tiles", "detections"):
        meta_a, _, geom_a, data_a = pyogrio.raw.read(a / "detections.gpkg", layer=layer)
        meta_b, _, geom_b, data_b = pyogrio.raw.read(b / "detections.gpkg", layer=layer)
        assert list(meta_a["fields"]) == list(meta_b["fields"]) and list(geom_a) == list(geom_b), layer
        for x, y in zip(data_a, data_b, strict=True):
            np.testing.assert_array_equal(x, y)


# ----------------------------------------------------------------------------- tile sets


def test_tileset_input_keeps_tile_ids(model_dir, tmp_path):
    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "ts", n_images=2, tiles_per_image=2, seed=4, tile_shape=(192, 256))
    listed = pd.read_csv(root / "tiles.csv")
    out = tmp_path / "out"
    summary = screen(model_dir, [root], out, progress=False)
    tiles = pd.read_csv(out / "tiles.csv", keep_default_na=False)
    assert tiles["tile_id"].tolist() == sorted(listed["tile_id"])  # sorted by image, then row0
    by_id = listed.set_index("tile_id")
    assert (tiles["image"].to_numpy() == by_id.loc[tiles["tile_id"], "image_id"].to_numpy()).all()
    assert (tiles["row0"].to_numpy() == by_id.loc[tiles["tile_id"], "row0"].to_numpy()).all()
    assert (tiles[["width", "height"]].to_numpy() == [256, 192]).all()
    detections = pd.read_csv(out / "detections.csv")
    assert set(detections["tile_id"]) <= set(listed["tile_id"])
    assert summary.n_tiles == 4
    assert (tiles["n_fans"] + tiles["n_spots"]).sum() == len(detections)
    # Outputs are written one image at a time: every image's rows once, in plan order, one header.
    assert list(pd.unique(detections["image"])) == sorted(set(detections["image"]))
    assert (out / "detections.csv").read_text().count("tile_id,") == 1
    per_tile = detections.groupby("tile_id").size()
    assert (per_tile.reindex(tiles["tile_id"], fill_value=0).to_numpy()
            == (tiles["n_fans"] + tiles["n_spots"]).to_numpy()).all()
    import pyogrio

    assert pyogrio.read_info(out / "detections.gpkg", layer="detections")["features"] == len(detections)
    assert summary.n_fans + summary.n_spots == len(detections)
    assert summary.per_image["image"].tolist() == sorted(listed["image_id"].unique())


def test_noisy_tiles_are_reported_smoothed_and_counted(model_dir, tmp_path):
    # The second image's tiles get 6 grey levels of white noise, three times the model's limit.
    from training.synth import synthesize_tileset
    from detector.inference.model import load_model
    from detector.tile.noise import noise_sigma

    root = synthesize_tileset(tmp_path / "ts", n_images=2, tiles_per_image=2, seed=4, tile_shape=(192, 256))
    listed = pd.read_csv(root / "tiles.csv")
    noisy = listed.loc[listed["image_id"] == listed["image_id"].iloc[-1], "path"]
    rng = np.random.default_rng(12)
    for path in noisy:
        image = np.asarray(Image.open(root / path), dtype=np.float64)
        # clipped at 1: 0 is the no-data value of these tiles
        Image.fromarray(np.clip(np.rint(image + rng.normal(0.0, 6.0, image.shape)), 1, 255).astype(np.uint8)).save(
            root / path)
    out = tmp_path / "out"
    summary = screen(model_dir, [root], out, progress=False)
    tiles = pd.read_csv(out / "tiles.csv").set_index("tile_id")
    by_path = listed.set_index("tile_id")["path"]
    limit = 255 * load_model(model_dir).noise_range.limit
    for tile_id, row in tiles.iterrows():
        pixels = np.asarray(Image.open(root / by_path[tile_id]), dtype=np.float64)
        expected = 255 * noise_sigma(pixels / 255, pixels != 0)
        assert row["noise_8bit"] == pytest.approx(expected, rel=1e-4)
        assert bool(row["smoothed"]) == (expected > limit)
    assert tiles["smoothed"].sum() == summary.n_smoothed == len(noisy)
    assert f"noise: {len(noisy)} tile(s) noisier than every tile the model was fitted on" in summary.format()
    assert json.loads((out / "run.json").read_text())["counts"]["n_smoothed"] == len(noisy)


def test_first_image_without_detections_still_heads_the_outputs(model_dir, tmp_path):
    # Outputs are written image by image; an empty first image must still write the CSV headers.
    root = tmp_path / "ts"
    root.mkdir()
    write_image(root / "flat.png", np.full((192, 256), 140, dtype=np.uint8))
    write_image(root / "scene.png", _scene((300, 400), 21, scenario="windy", nodata=False))
    pd.DataFrame({"tile_id": ["A_T0", "B_T0"], "image_id": ["A_flat", "B_scene"],
                  "path": ["flat.png", "scene.png"]}).to_csv(root / "tiles.csv", index=False)
    out = tmp_path / "out"
    summary = screen(model_dir, [root], out, progress=False)
    detections = pd.read_csv(out / "detections.csv")
    assert len(detections) > 0 and set(detections["image"]) == {"B_scene"}
    assert list(detections.columns[:3]) == ["tile_id", "kind", "x_px"]
    tiles = pd.read_csv(out / "tiles.csv", keep_default_na=False)
    assert tiles["tile_id"].tolist() == ["A_T0", "B_T0"]
    import pyogrio

    assert pyogrio.read_info(out / "detections.gpkg", layer="detections")["features"] == len(detections)
    assert summary.per_image.set_index("image").loc["A_flat", "fans"] == 0


# ----------------------------------------------------------------------------- image tiling


def test_png_is_tiled_and_every_core_pixel_belongs_to_one_tile(png_run):
    out, summary = png_run
    tiles = pd.read_csv(out / "tiles.csv", keep_default_na=False)
    # Naive oracle: count, pixel by pixel, the cores that cover it.
    count = np.zeros((380, 500), dtype=int)
    for c, r, w, h in tiles[["col0", "row0", "width", "height"]].itertuples(index=False):
        count[r : r + h, c : c + w] += 1
    assert (count == 1).all()
    assert len(tiles) == 9  # ceil(500 / 200) * ceil(380 / 150)
    assert tiles["tile_id"].is_unique
    assert summary.n_tiles == 9 and summary.megapixels == pytest.approx(0.19)


def test_detections_lie_in_their_core_and_are_not_duplicated(png_run):
    out, _ = png_run
    tiles = pd.read_csv(out / "tiles.csv", keep_default_na=False).set_index("tile_id")
    det = pd.read_csv(out / "detections.csv")
    assert len(det) > 0
    w = tiles.loc[det["tile_id"], "width"].to_numpy()
    h = tiles.loc[det["tile_id"], "height"].to_numpy()
    assert ((det["x_px"] >= -0.5) & (det["x_px"] < w - 0.5) & (det["y_px"] >= -0.5) & (det["y_px"] < h - 0.5)).all()
    assert (det["col0"].to_numpy() == tiles.loc[det["tile_id"], "col0"].to_numpy()).all()
    # Fans of one vent share its apex but point different ways: a feature written twice by overlapping
    # tiles would repeat its position and its direction.
    image_xyd = np.column_stack([det["x_px"] + det["col0"], det["y_px"] + det["row0"], det["direction_deg"]])
    assert len(np.unique(np.round(image_xyd, 6), axis=0)) == len(det)


def test_outputs_have_the_documented_columns(png_run):
    out, _ = png_run
    tiles = pd.read_csv(out / "tiles.csv", keep_default_na=False)
    assert tuple(tiles.columns) == TILE_COLUMNS
    assert set(tiles["route"]) <= {"", "nodata"}
    assert (tiles["read_zoom"] == 1.0).all() and (tiles["scale_zoom"] == 1.0).all()  # a PNG has no ground scale
    det = pd.read_csv(out / "detections.csv")
    assert tuple(det.columns) == DETECTION_COLUMNS + ("image", "col0", "row0", "area_m2")
    assert set(det["kind"]) <= {"fan", "spot"}
    # Direction convention: degrees clockwise from up in [0, 360).
    assert ((det["direction_deg"] >= 0) & (det["direction_deg"] < 360)).all()
    for name in OUTPUT_FILES + ("run.json",):
        assert (out / name).stat().st_size > 0, name
    with Image.open(out / "quicklook.png") as im:
        assert max(im.size) <= 2200
    run = json.loads((out / "run.json").read_text())
    assert run["status"] == "complete"
    assert run["parameters"]["tile"] == list(TILE) and len(run["parameters"]["model_hash"]) == 64


def test_tile_direction_statistics_match_scipy(png_run):
    from scipy.stats import circmean, circstd

    out, _ = png_run
    det = pd.read_csv(out / "detections.csv")
    tiles = pd.read_csv(out / "tiles.csv").set_index("tile_id")
    fans = det[det["kind"] == "fan"]
    tile_id = fans["tile_id"].value_counts().index[0]
    own = fans[fans["tile_id"] == tile_id]
    weights = own["score"] * own["direction_confidence"] * own["length_px"]
    mean, spread = tile_direction_stats(own["direction_deg"].to_numpy(), weights.to_numpy())
    assert tiles.loc[tile_id, "mean_direction_deg"] == pytest.approx(mean)
    assert tiles.loc[tile_id, "direction_scatter_deg"] == pytest.approx(spread)
    # Equal weights: the spread is scipy's circular standard deviation.
    _, std = tile_direction_stats(own["direction_deg"].to_numpy(), np.ones(len(own)))
    assert std == pytest.approx(np.degrees(circstd(np.radians(own["direction_deg"]))), abs=1e-6)
    # Symmetric directions about 5 degrees (across north) plus one stray fan opposite: the robust
    # mean ignores the stray and equals scipy's circular mean of the others.
    clean = np.array([347.0, 355.0, 5.0, 15.0, 23.0])
    m, _ = tile_direction_stats(np.append(clean, 190.0), np.ones(6))
    assert m == pytest.approx(np.degrees(circmean(np.radians(clean))) % 360.0, abs=1e-6)


def test_png_run_writes_a_pixel_geopackage_and_no_geojson(png_run):
    import pyogrio

    out, _ = png_run
    # No CRS, so no longitude or latitude: a GeoJSON would be read as WGS 84 degrees (RFC 7946 section 4).
    assert not (out / "detections.geojson").exists()
    det = pd.read_csv(out / "detections.csv")
    tiles = pd.read_csv(out / "tiles.csv")
    info = pyogrio.read_info(out / "detections.gpkg", layer="detections")
    assert info["features"] == len(det)
    assert "image pixels" in info["crs"] and "y = -row" in info["crs"]
    # GDAL's own bounds of the tile cores: x = column, y = -row, pixel corners at whole numbers.
    _, bounds = pyogrio.read_bounds(out / "detections.gpkg", layer="tiles")
    assert bounds[0].min() == 0 and bounds[2].max() == 500 and bounds[1].min() == -380 and bounds[3].max() == 0
    _, dbounds = pyogrio.read_bounds(out / "detections.gpkg", layer="detections")
    x = (det["x_px"] + det["col0"]).to_numpy() + 0.5
    y = -((det["y_px"] + det["row0"]).to_numpy() + 0.5)
    assert ((dbounds[0] - 1e-6 <= x) & (x <= dbounds[2] + 1e-6)).all()
    assert ((dbounds[1] - 1e-6 <= y) & (y <= dbounds[3] + 1e-6)).all()
    assert len(tiles) == pyogrio.read_info(out / "detections.gpkg", layer="tiles")["features"]
    # No scale is known for a plain PNG: areas are NaN, not invented.
    assert det["area_m2"].isna().all() and tiles["area_m2"].isna().all()


# ----------------------------------------------------------------------------- georeferencing


def test_georeferenced_geotiff_gets_lonlat_and_azimuth(model_dir, tmp_path):
    # 10 m pixels, 300 km east of the south pole: grid up is far from true north there.
    x0, y0, res = 300_000.0, 2_000.0, 10.0
    transform = Affine(res, 0.0, x0, 0.0, -res, y0)
    tif = tmp_path / "polar.tif"
    write_geotiff(tif, _scene((380, 500), 21, scenario="windy", nodata=False), crs=MARS_SOUTH_POLAR_STEREO,
                  transform=transform)
    out = tmp_path / "out"
    screen(model_dir, [tif], out, tile=TILE, progress=False)
    det = pd.read_csv(out / "detections.csv")
    assert len(det) > 0
    assert set(GEO_COLUMNS) <= set(det.columns)

    col = det["x_px"] + det["col0"]
    row = det["y_px"] + det["row0"]
    # Reference: pyproj's own inverse projection of the pixel centres (GDAL corner convention + 0.5).
    mx = x0 + res * (col + 0.5)
    my = y0 - res * (row + 0.5)
    to_geo = pyproj.Transformer.from_crs(MARS_SOUTH_POLAR_STEREO, MARS_SOUTH_POLAR_STEREO.geodetic_crs,
                                         always_xy=True)
    lon, lat = to_geo.transform(mx.to_numpy(), my.to_numpy())
    np.testing.assert_allclose(det["lon_deg"], lon, atol=1e-9)
    np.testing.assert_allclose(det["lat_deg"], lat, atol=1e-9)

    # Polar stereographic (south): meridian convergence equals the longitude from the central meridian,
    # so azimuth = grid direction - longitude (Snyder 1987, "Map Projections - A Working Manual", ch. 21).
    fans = det["kind"] == "fan"
    expected = (det["direction_deg"] - det["lon_deg"]) % 360.0
    diff = ((det["azimuth_deg"] - expected + 180.0) % 360.0) - 180.0
    assert fans.any() and np.abs(diff[fans].to_numpy()).max() < 0.01
    spot_diff = ((det["azimuth_deg"] - expected % 180.0 + 90.0) % 180.0) - 90.0
    assert np.abs(spot_diff[~fans].to_numpy()).max(initial=0.0) < 0.01
    assert abs(det["lon_deg"].mean() - 90.0) < 1.0  # east of the pole on the +x axis
    np.testing.assert_allclose(det.loc[fans, "wind_from_deg"], (det.loc[fans, "azimuth_deg"] + 180.0) % 360.0)
    np.testing.assert_allclose(det.loc[fans, "length_m"], det.loc[fans, "length_px"] * res)
    collection = json.loads((out / "detections.geojson").read_text())
    ring = np.asarray(collection["features"][0]["geometry"]["coordinates"][0])
    assert (np.abs(ring[:, 0] - 90.0) < 1.0).all() and (ring[:, 1] < -84).all()  # lon/lat, not metres


def test_nodata_tiles_are_routed_and_not_scored(model_dir, tmp_path):
    tile = _scene((300, 400), 31, scenario="windy", nodata=False)
    tile[:, 200:] = 0  # right half is outside the footprint
    path = tmp_path / "half.png"
    write_image(path, tile)
    out = tmp_path / "out"
    screen(model_dir, [path], out, tile=TILE, progress=False)
    tiles = pd.read_csv(out / "tiles.csv", keep_default_na=False)
    right = tiles["col0"] >= 200
    assert (tiles.loc[right, "route"] == "nodata").all()
    assert (tiles.loc[~right, "route"] == "").all()
    assert (tiles.loc[right, "n_fans"] == 0).all() and (tiles.loc[right, "p_deposit"] == "").all()
    det = pd.read_csv(out / "detections.csv")
    assert not det["tile_id"].isin(tiles.loc[right, "tile_id"]).any()


# ----------------------------------------------------------------------------- resuming and workers


def _journal_entries(journal):
    return [p for p in journal.glob("*.json") if p.stem.isdigit()] if journal.is_dir() else []


def test_killed_run_resumes_to_the_same_outputs(model_dir, big_png, big_reference, tmp_path):
    out = tmp_path / "killed"
    argv = _cli("screen", model_dir, big_png, "--out", out, "--tile", "200x150")
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    proc = subprocess.Popen(argv, cwd=REPO, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    journal = out / ".partial"
    # Generous: on a loaded machine the child's start-up alone can take tens of seconds.
    deadline = time.monotonic() + 300
    try:
        while time.monotonic() < deadline and proc.poll() is None:
            if len(_journal_entries(journal)) >= 3:
                break
            time.sleep(0.02)
        assert proc.poll() is None, "the run ended before it could be interrupted"
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    # A write cut by the kill leaves a temporary file; it is not an entry and is swept on resume.
    n_done = len(_journal_entries(journal))
    assert 3 <= n_done < 36
    assert not any((out / name).exists() for name in OUTPUT_FILES)
    json.loads((out / "run.json").read_text())  # the run record is whole

    rerun = subprocess.run(argv, cwd=REPO, env=env, capture_output=True, text=True, timeout=600)
    assert rerun.returncode == 0, rerun.stderr
    assert "from an earlier run" in rerun.stdout
    _same_outputs(out, big_reference)
    run = json.loads((out / "run.json").read_text())
    assert run["timing"]["tiles_resumed"] >= n_done
    assert run["timing"]["tiles_resumed"] + run["timing"]["tiles_computed"] == 36


def _child_pids(pid):
    """Processes whose parent is ``pid``, from Linux /proc."""
    kids = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == pid:
            kids.append(int(stat.parent.name))
    return kids


def _running(pid):
    """True while ``pid`` exists and is not a zombie (exited, not yet reaped)."""
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


def _screen_with_two_busy_workers(model_dir, image, out, *, stderr):
    """``frostvane screen`` with 2 workers on 100 x 75 px tiles, in a subprocess, once two tiles are journalled.

    Returns the process and its worker pids (the run is killed if it cannot get that far).
    """
    argv = _cli("screen", model_dir, image, "--out", out, "--tile", "100x75", "--workers", "2")
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    proc = subprocess.Popen(argv, cwd=REPO, env=env, stdout=subprocess.DEVNULL, stderr=stderr, text=True)
    deadline = time.monotonic() + 300
    try:
        while time.monotonic() < deadline and proc.poll() is None and len(_journal_entries(out / ".partial")) < 2:
            time.sleep(0.02)
        assert proc.poll() is None, "the run ended before the test could signal it"
        workers = _child_pids(proc.pid)
        assert len(workers) >= 2
    except BaseException:
        proc.kill()
        proc.wait(timeout=30)
        raise
    return proc, workers


def _still_running(pids, seconds):
    """The pids still running after waiting up to ``seconds`` for them to end."""
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline and any(_running(p) for p in pids):
        time.sleep(0.1)
    return [p for p in pids if _running(p)]


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads processes from Linux /proc")
def test_terminated_run_stops_its_workers_and_resumes(model_dir, big_png, tmp_path):
    # `kill PID` (SIGTERM) must end a run as Ctrl-C does: exit 128 + 15, its worker processes gone,
    # no final outputs, the journal kept for the rerun (common practice for command-line tools).
    # Small tiles (144 of them), so that two workers are still busy when the signal comes.
    small = (100, 75)
    reference = tmp_path / "reference"
    screen(model_dir, [big_png], reference, tile=small, overlap=32, progress=False)
    out = tmp_path / "terminated"
    proc, workers = _screen_with_two_busy_workers(model_dir, big_png, out, stderr=subprocess.PIPE)
    try:
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 143, err
    assert "terminated; finished work is kept" in err
    assert not _still_running(workers, 30)
    assert not any((out / name).exists() for name in OUTPUT_FILES)
    summary = screen(model_dir, [big_png], out, tile=small, overlap=32, progress=False)
    assert summary.n_tiles == 144 and 2 <= summary.n_resumed < 144
    _same_outputs(out, reference)


@pytest.mark.skipif(not Path("/proc/self/stat").exists() or os.name != "posix",
                    reason="reads processes from Linux /proc; a dead parent's children are re-parented on POSIX")
def test_workers_exit_soon_after_their_parent_is_killed(model_dir, big_png, tmp_path):
    # SIGKILL cannot be caught: the workers themselves must notice that their parent is gone
    # (POSIX gives an orphan a new parent, so os.getppid() changes).
    proc, workers = _screen_with_two_busy_workers(model_dir, big_png, tmp_path / "orphaned",
                                                  stderr=subprocess.DEVNULL)
    try:
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    left = _still_running(workers, 10)
    for pid in left:  # do not leave them behind for the rest of the suite
        os.kill(pid, signal.SIGKILL)
    assert not left, f"workers {left} outlived their killed parent by 10 s"


def test_dask_local_cluster_matches_serial(model_dir, big_png, big_reference, tmp_path, monkeypatch):
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None) as cluster:
        # The workers started in another folder: relative paths given here must still reach them.
        monkeypatch.chdir(big_png.parent)
        summary = screen(model_dir, [big_png.name], tmp_path / "dask", tile=TILE,
                         scheduler=cluster.scheduler_address, progress=False)
    assert summary.n_tiles == 36 and summary.workers == 2
    assert json.loads((tmp_path / "dask" / "run.json").read_text())["run"]["workers"] == 2
    _same_outputs(tmp_path / "dask", big_reference)


def test_local_workers_match_serial(model_dir, png_image, png_run, tmp_path):
    screen(model_dir, [png_image], tmp_path / "loky", tile=TILE, workers=2, progress=False)
    _same_outputs(tmp_path / "loky", png_run[0])


def test_rerun_of_a_finished_run_reuses_it(model_dir, png_image, png_run, tmp_path):
    out = tmp_path / "again"
    shutil.copytree(png_run[0], out)
    summary = screen(model_dir, [png_image], out, tile=TILE, progress=False)
    assert summary.n_resumed == 9 and summary.megapixels == 0
    _same_outputs(out, png_run[0])


def test_resume_ignores_a_cut_write_and_a_damaged_entry(model_dir, png_image, png_run, tmp_path):
    out = tmp_path / "cut"
    shutil.copytree(png_run[0], out)
    journal = out / ".partial"
    entries = sorted(p for p in journal.glob("*.json") if p.stem.isdigit())
    assert len(entries) == 9
    # What a kill leaves: a temporary file never renamed, and (on a crashed disk) a torn entry.
    stale = journal / f".{entries[0].name}.abc123.tmp.json"
    stale.write_text('{"tile_id": ')
    entries[1].write_text('{"tile_id": ')
    for name in OUTPUT_FILES:
        (out / name).unlink()
    summary = screen(model_dir, [png_image], out, tile=TILE, progress=False)
    assert summary.n_resumed == 8
    assert not stale.exists()
    _same_outputs(out, png_run[0])


# ----------------------------------------------------------------------------- bad input


def _assert_refused(capsys, argv, names, out):
    code = cli_main([str(a) for a in argv])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("frostvane: error:") == 1
    for name in names:
        assert str(name) in err
    assert not any((out / name).exists() for name in OUTPUT_FILES)
    return err


def test_corrupt_image_is_refused(model_dir, tmp_path, capsys):
    bad = tmp_path / "broken.png"
    bad.write_bytes(b"\x89PNG\r\n\x1a\n this is not an image")
    out = tmp_path / "out"
    _assert_refused(capsys, ["screen", model_dir, bad, "--out", out], [bad], out)
    assert not out.exists()


def test_truncated_image_is_refused_without_outputs(model_dir, png_image, tmp_path, capsys):
    data = png_image.read_bytes()
    bad = tmp_path / "cut.png"
    bad.write_bytes(data[: len(data) // 2])
    out = tmp_path / "out"
    _assert_refused(capsys, ["screen", model_dir, bad, "--out", out, "--tile", "200x150"], [bad], out)


def test_multiband_image_needs_a_band(model_dir, tmp_path, capsys):
    rgb = tmp_path / "colour.png"
    Image.fromarray(np.dstack([_scene((160, 200), 41)] * 3)).save(rgb)
    out = tmp_path / "out"
    err = _assert_refused(capsys, ["screen", model_dir, rgb, "--out", out], [rgb], out)
    assert "band" in err
    assert cli_main(["screen", str(model_dir), str(rgb), "--out", str(out), "--band", "2"]) == 0
    assert (out / "tiles.csv").is_file()


@pytest.mark.parametrize("damage", ["missing", "tampered"])
def test_damaged_model_is_refused(model_dir, png_image, tmp_path, capsys, damage):
    broken = tmp_path / "model"
    shutil.copytree(model_dir, broken)
    target = broken / "orientation.onnx"
    if damage == "missing":
        target.unlink()
    else:
        target.write_bytes(target.read_bytes() + b"\0")
    out = tmp_path / "out"
    err = _assert_refused(capsys, ["screen", broken, png_image, "--out", out], [broken], out)
    assert "orientation.onnx" in err
    assert not out.exists()


def test_output_folder_of_another_run_is_refused(model_dir, png_image, png_run, tmp_path, capsys):
    out = tmp_path / "other"
    shutil.copytree(png_run[0], out)
    before = {name: (out / name).read_bytes() for name in OUTPUT_FILES}
    code = cli_main(["screen", str(model_dir), str(png_image), "--out", str(out), "--tile", "250x150"])
    err = capsys.readouterr().err
    assert code == 2 and str(out) in err and "another" in err
    assert {name: (out / name).read_bytes() for name in OUTPUT_FILES} == before

    stranger = tmp_path / "stranger"
    stranger.mkdir()
    (stranger / "notes.txt").write_text("not a screening run")
    _assert_refused(capsys, ["screen", model_dir, png_image, "--out", stranger], [stranger], stranger)


# ----------------------------------------------------------------------------- quick-look canvas


@pytest.mark.parametrize("source", ["geotiff_with_nodata", "tile_set"])
def test_quicklook_canvas_from_worker_samples_equals_a_second_read(source, tmp_path):
    # The canvas the outputs draw is every step-th pixel of each file, no-data as NaN,
    # read again from the files (numpy striding of rasterio's reads is the reference).
    # The workers' samples of their tile cores must rebuild exactly that canvas.
    from detector.screening import outputs, plan, workers

    if source == "tile_set":
        inputs = [REPO / "demo_tiles"]
    else:
        path = tmp_path / "wide.tif"
        image = _scene((300, 4100), 41, scenario="windy", nodata=False)
        image[:, :333] = 0
        image[250:, 2000:2600] = 0
        write_geotiff(path, image, nodata=0)
        inputs = [path]
    tasks, images = plan._plan(inputs, tile=(800, 600), overlap=32, nodata=None, band=None)
    steps = plan._canvas_steps(images)
    assert steps and all(step >= 4 for step in steps.values())
    cap = plan._panel_cap(len(images))
    for name in list(images)[:3]:
        blocks = []
        for task in (t for t in tasks if t.image == name):
            assert task.canvas_step == steps[name]
            src, _ = workers._cached_source(task.path, task.band, task.nodata)
            array, mask = src.read(task.window)
            blocks.append((task.path, workers._canvas_block(array, mask, task)))
        sampled, scale = outputs._canvas(images[name], None, None, cap, blocks)
        reread, scale_reread = outputs._canvas(images[name], None, None, cap)
        assert scale == scale_reread
        assert sampled.tobytes() == reread.tobytes()  # NaN where no data, in the same places
        if source != "tile_set":  # the no-data strip on the left is NaN on the canvas, the rest is not
            step = steps[name]
            assert np.isnan(sampled[:, : 333 // step]).all()
            assert np.isfinite(sampled[:250 // step, -(-333 // step):]).all()


# ----------------------------------------------------------------------------- bad input, each refused by name


def _bad_inputs(tmp_path):
    """Files that must never be screened silently: (label, path, what the message must say)."""
    from PIL import Image as PILImage

    image = _scene((300, 400), 5, scenario="windy", nodata=False)
    made = {}
    good = tmp_path / "good.png"
    write_image(good, image)
    data = good.read_bytes()
    (tmp_path / "truncated.png").write_bytes(data[: len(data) // 2])
    made["truncated png"] = (tmp_path / "truncated.png", "truncated")
    PILImage.fromarray(image).convert("P").save(tmp_path / "palette.png")
    made["palette png"] = (tmp_path / "palette.png", "palette")
    PILImage.fromarray(image).convert("1").save(tmp_path / "onebit.png")
    made["1-bit png"] = (tmp_path / "onebit.png", "1-bit")
    write_image(tmp_path / "tiny.png", image[:10, :10])
    made["10 x 10 image"] = (tmp_path / "tiny.png", "10 x 10 px")
    write_image(tmp_path / "strip.png", image[:40])
    made["40 px strip"] = (tmp_path / "strip.png", "400 x 40 px")
    return made


@pytest.mark.parametrize("case", ["truncated png", "palette png", "1-bit png", "10 x 10 image", "40 px strip"])
def test_bad_image_is_refused_before_anything_is_written(model_dir, tmp_path, capsys, case):
    path, words = _bad_inputs(tmp_path)[case]
    out = tmp_path / "out"
    err = _assert_refused(capsys, ["screen", model_dir, path, "--out", out], [path.name, words], out)
    assert "Traceback" not in err
    assert not out.exists()


@pytest.mark.parametrize(("dtype", "scale", "accepted"), [
    (np.int32, 1, True),      # values 0-255: converted to uint16 exactly
    (np.int16, 1, True),
    (np.int32, 400, False),   # values up to 81600: no exact 16-bit reading
    (np.float32, 1, False),   # float 0-255: floats must be in [0, 1]
    (np.float32, 1 / 255, True),
])
def test_pixel_types_are_converted_exactly_or_refused(model_dir, tmp_path, capsys, dtype, scale, accepted):
    import tifffile

    image = _scene((300, 400), 5, scenario="windy", nodata=False)
    path = tmp_path / "typed.tif"
    tifffile.imwrite(path, (image.astype(np.float64) * scale).astype(dtype))
    out = tmp_path / "out"
    code = cli_main(["screen", str(model_dir), str(path), "--out", str(out)])
    err = capsys.readouterr().err
    if accepted:
        reference = tmp_path / "reference"
        # Integers keep their values (a 16-bit image); floats in [0, 1] map onto the 16-bit grid as
        # uint8 * 257 does.
        same = image.astype(np.uint16) if np.dtype(dtype).kind == "i" else image
        screen(model_dir, [_as_png(tmp_path, same)], reference, progress=False)
        assert code == 0
        # An exact conversion screens the same pixels: the same detections as the original.
        np.testing.assert_allclose(pd.read_csv(out / "detections.csv")[["x_px", "y_px", "score"]],
                                   pd.read_csv(reference / "detections.csv")[["x_px", "y_px", "score"]], atol=1e-6)
    else:
        assert code == 2 and err.count("\n") == 1 and "typed.tif" in err and "pixels in [" in err
        assert not any((out / name).exists() for name in OUTPUT_FILES)
        assert json.loads((out / "run.json").read_text())["status"] == "failed"


def _as_png(folder, image):
    path = folder / "typed.png"
    write_image(path, image)
    return path


def test_nodata_choices(model_dir, tmp_path, capsys):
    image = _scene((300, 400), 5, scenario="windy", nodata=False)
    image[:, :200] = 0  # a clipped dark half, or fill: the user says which
    path = tmp_path / "zeros.png"
    write_image(path, image)
    tiles = {}
    for choice in ("0", "none", "nan"):
        out = tmp_path / f"out_{choice}"
        assert cli_main(["screen", str(model_dir), str(path), "--out", str(out), "--tile", "200x150"]
                        + ([] if choice == "0" else ["--nodata", choice])) == 0
        tiles[choice] = pd.read_csv(out / "tiles.csv", keep_default_na=False)
        recorded = json.loads((out / "run.json").read_text())["parameters"]["nodata"]
        assert recorded == (None if choice == "0" else "none")
    # Default: 0 is the fill of map-projected products, so the left tiles are no-data.
    assert (tiles["0"].loc[tiles["0"]["col0"] < 200, "route"] == "nodata").all()
    # 'none' (or 'nan'): every pixel is data.
    for choice in ("none", "nan"):
        assert (tiles[choice]["valid_fraction"] == 1.0).all() and (tiles[choice]["route"] != "nodata").all()
    assert cli_main(["screen", str(model_dir), str(path), "--out", str(tmp_path / "bad"), "--nodata", "abc"]) == 2
    assert "nodata 'abc'" in capsys.readouterr().err and not (tmp_path / "bad").exists()


def test_run_record_that_is_not_an_object_is_refused(model_dir, png_image, tmp_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    (out / "run.json").write_text("[1, 2]")
    err = _assert_refused(capsys, ["screen", model_dir, png_image, "--out", out], ["run.json", "not a run record"], out)
    assert (out / "run.json").read_text() == "[1, 2]" and "Traceback" not in err


@pytest.mark.parametrize("error", [PermissionError(13, "Permission denied"), OSError(28, "No space left on device")])
def test_unwritable_output_gives_one_line_and_a_rerun_succeeds(model_dir, png_image, tmp_path, capsys, monkeypatch,
                                                               error):
    import detector.screening.run as screen_module

    def refuse(*args, **kwargs):
        error.filename = str(tmp_path / "out" / "tiles.csv")
        raise error

    monkeypatch.setattr(screen_module, "_write_outputs", refuse)
    out = tmp_path / "out"
    code = cli_main(["screen", str(model_dir), str(png_image), "--out", str(out), "--tile", "200x150"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and error.strerror in err and "tiles.csv" in err
    assert not any((out / name).exists() for name in OUTPUT_FILES)
    assert not list(out.glob(".outputs.*"))
    assert json.loads((out / "run.json").read_text())["status"] == "failed"
    monkeypatch.undo()
    assert cli_main(["screen", str(model_dir), str(png_image), "--out", str(out), "--tile", "200x150"]) == 0
    assert json.loads((out / "run.json").read_text())["status"] == "complete"


def test_failed_run_does_not_block_a_corrected_rerun(model_dir, tmp_path, capsys):
    import tifffile

    image = _scene((300, 400), 5, scenario="windy", nodata=False)
    path = tmp_path / "scene.tif"
    tifffile.imwrite(path, image.astype(np.float32))  # float 0-255: refused while reading
    out = tmp_path / "out"
    assert cli_main(["screen", str(model_dir), str(path), "--out", str(out)]) == 2
    assert json.loads((out / "run.json").read_text())["status"] == "failed"
    tifffile.imwrite(path, image)  # corrected: another file, so other parameters
    assert cli_main(["screen", str(model_dir), str(path), "--out", str(out)]) == 0
    record = json.loads((out / "run.json").read_text())
    assert record["status"] == "complete" and "error" not in record


def test_stale_output_stage_of_a_killed_run_is_removed(model_dir, png_image, png_run, tmp_path):
    out = tmp_path / "again"
    shutil.copytree(png_run[0], out)
    stale = out / ".outputs.k1ll3d"
    stale.mkdir()
    (stale / "tiles.csv").write_text("half")
    screen(model_dir, [png_image], out, tile=TILE, progress=False)
    assert not stale.exists()


def test_tiles_of_another_ground_scale_are_screened_at_the_model_scale_when_asked(model_dir, tmp_path):
    # The model's fitting tiles were 0.25 m/px; these tiles say 0.5 m/px (binned 2 x 2). Screened as they
    # are, they are counted as off the model's scale; with at_model_scale each is read resampled to twice
    # its size and its detections come back in its own pixels.
    from training.synth import synthesize_tileset
    from detector.inference.detect import detect_block
    from detector.inference.model import load_model
    from detector.tile.scale import PixelScale

    folder = tmp_path / "model"
    shutil.copytree(model_dir, folder)
    card = json.loads((folder / "model.json").read_text())
    card["pixel_scale"] = PixelScale(0.25, 0.25, 0.25, 0.15).to_card()
    (folder / "model.json").write_text(json.dumps(card))
    root = synthesize_tileset(tmp_path / "ts", n_images=1, tiles_per_image=2, seed=4, tile_shape=(192, 256))
    listed = pd.read_csv(root / "tiles.csv")
    listed["metres_per_px"] = 0.5
    listed.to_csv(root / "tiles.csv", index=False)
    plain = screen(folder, [root], tmp_path / "plain", progress=False)
    assert (plain.n_resampled, plain.n_off_scale) == (0, 2)
    assert "--at-model-scale reads them at the model's scale" in plain.format()
    plain_tiles = pd.read_csv(tmp_path / "plain" / "tiles.csv")
    assert (plain_tiles["scale_zoom"] == 2.0).all() and (plain_tiles["read_zoom"] == 1.0).all()
    out = tmp_path / "out"
    summary = screen(folder, [root], out, progress=False, at_model_scale=True)
    assert (summary.n_resampled, summary.n_off_scale) == (2, 0)
    assert "scale: 2 tile(s) finer or coarser on the ground" in summary.format()
    assert json.loads((out / "run.json").read_text())["counts"]["n_resampled"] == 2
    detections = pd.read_csv(out / "detections.csv")
    tiles = pd.read_csv(out / "tiles.csv").set_index("tile_id")
    model = load_model(folder)
    # the image's two tiles make one context block, read together as screening reads them
    block = detect_block(model, [np.asarray(Image.open(root / path)) for path in listed["path"]],
                         tile_ids=listed["tile_id"], metres_per_px=[0.5] * len(listed))
    for tile_id, result in zip(listed["tile_id"], block):
        assert result.resampled and result.read_shape == (384, 512)
        mine = detections[detections["tile_id"] == tile_id].reset_index(drop=True)
        assert len(mine) == len(result.detections)
        np.testing.assert_allclose(mine["x_px"], result.detections["x_px"].to_numpy(float), atol=1e-6)
        np.testing.assert_allclose(mine["length_px"], result.detections["length_px"].to_numpy(float), atol=1e-6)
        assert tiles.loc[tile_id, "fan_cover"] == pytest.approx(result.fan_cover_fraction)
        assert tiles.loc[tile_id, "p_deposit"] == pytest.approx(result.p_deposit)
        assert tiles.loc[tile_id, "read_zoom"] == 2.0
    assert len(detections) > 0
