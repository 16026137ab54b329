"""Training: grouped split, calibration scores and fit, orientation targets, unfamiliarity, bad input, the card."""

import shutil
from dataclasses import asdict

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import brier_score_loss, log_loss

from detector.errors import DetectorError, TileSetError
from detector.objects.assemble import AssemblyParams
from detector.tile.spec import FeatureSpec, POLARITY_ODD_FEATURES
from training.fitting.train import (
    DETECTION_ASSEMBLY,
    TrainConfig,
    calibration_scores,
    fit_calibration,
    fit_unfamiliarity,
    format_card_summary,
    orientation_feature_names,
    orientation_training_set,
    split_images,
    train_model,
)

FAST = TrainConfig(seed=1, rotations=(0,), max_patches=5000, max_iter=20)


def test_split_images_is_grouped_and_complete():
    images = [f"IMG_{i}" for i in range(10)]
    fit, cal, hold = split_images(images, seed=4)
    assert not (set(fit) & set(cal)) and not (set(fit) & set(hold)) and not (set(cal) & set(hold))
    assert sorted(fit + cal + hold) == sorted(images)
    assert hold and cal and fit
    assert split_images(images, seed=4) == (fit, cal, hold)


def test_split_images_explicit_holdout():
    fit, cal, hold = split_images(["a", "b", "c", "d"], holdout_images=("c",))
    assert hold == ["c"] and "c" not in fit + cal


def test_split_images_needs_three_images():
    with pytest.raises(TileSetError, match="at least 3"):
        split_images(["a", "b", "a"])


def test_split_images_unknown_holdout():
    with pytest.raises(TileSetError, match="nope"):
        split_images(["a", "b", "c"], holdout_images=("nope",))


def test_brier_matches_sklearn_one_vs_rest():
    rng = np.random.default_rng(0)
    proba = rng.dirichlet(np.ones(3), size=200)
    y = rng.integers(0, 3, 200)
    # Multi-class Brier (Brier 1950) = sum over classes of the binary Brier score of each one-vs-rest column.
    expected = sum(brier_score_loss((y == k).astype(int), proba[:, k]) for k in range(3))
    assert calibration_scores(proba, y)["brier"] == pytest.approx(expected, rel=1e-12)


def test_ece_hand_case():
    # Top-label ECE (Guo et al. 2017): bins of confidence, |accuracy - confidence| weighted by bin share.
    proba = np.array([[0.9, 0.05, 0.05], [0.9, 0.05, 0.05], [0.1, 0.6, 0.3], [0.2, 0.2, 0.6]])
    y = np.array([0, 1, 1, 0])
    # Bin of 0.9: two patches, accuracy 0.5 -> |0.5 - 0.9| = 0.4, weight 1/2.
    # Bin of 0.6: two patches (0.6 and 0.6), accuracy 0.5 -> 0.1, weight 1/2.
    assert calibration_scores(proba, y, n_bins=10)["ece"] == pytest.approx(0.5 * 0.4 + 0.5 * 0.1)


def test_fit_calibration_lowers_log_loss():
    rng = np.random.default_rng(1)
    n = 2000
    y = rng.integers(0, 3, n)
    logits = rng.normal(size=(n, 3))
    logits[np.arange(n), y] += 1.0
    true_p = np.exp(logits) / np.exp(logits).sum(axis=1, keepdims=True)
    overconfident = true_p**3 / (true_p**3).sum(axis=1, keepdims=True)
    cal = fit_calibration(overconfident, y)
    before = log_loss(y, overconfident, labels=[0, 1, 2])
    after = log_loss(y, cal.apply(overconfident), labels=[0, 1, 2])
    assert after < before - 0.05
    assert cal.temperature > 1.5  # undoes the cube (temperature 3, value of the construction)


def test_orientation_training_set_flips_odd_features_and_targets():
    spec = FeatureSpec()
    names = orientation_feature_names(spec)
    assert not any(n.startswith("hog_") for n in names)
    rng = np.random.default_rng(2)
    X = rng.normal(size=(5, len(names)))
    axis = np.array([10.0, 40.0, 100.0, 170.0, 0.0])
    direction = np.array([15.0, 220.0, 95.0, 345.0, 180.0])
    Xo, y = orientation_training_set(X, axis, direction, names)
    # |345 - 170| = 175 > 90: that fan runs along axis + 180.
    np.testing.assert_array_equal(y[:5], [1, 0, 1, 0, 0])
    np.testing.assert_array_equal(y[5:], 1 - y[:5])
    odd = np.array([n in POLARITY_ODD_FEATURES for n in names])
    assert odd.any()
    np.testing.assert_array_equal(Xo[5:, odd], -X[:, odd])
    np.testing.assert_array_equal(Xo[5:, ~odd], X[:, ~odd])


def test_fit_unfamiliarity_scores_training_low_and_far_high():
    from detector.inference.unfamiliar import unfamiliarity_score

    rng = np.random.default_rng(3)
    summaries = rng.normal(size=(40, 12))
    stats = fit_unfamiliarity(summaries)
    assert np.quantile(unfamiliarity_score(stats, summaries), 0.95) <= 1.0
    far = summaries.mean(axis=0) + 20.0
    assert unfamiliarity_score(stats, far[None, :])[0] > 1.0


# --------------------------------------------------------------------------- train_model bad input


def _leftovers(parent, name):
    return [p.name for p in parent.iterdir() if p.name.startswith(f".{name}.")]


def _copy_set(src, dst, consensus_filter=None, tiles_filter=None):
    shutil.copytree(src, dst)
    if consensus_filter is not None:
        cons = pd.read_csv(dst / "consensus.csv")
        consensus_filter(cons).to_csv(dst / "consensus.csv", index=False)
    if tiles_filter is not None:
        tiles = pd.read_csv(dst / "tiles.csv")
        tiles_filter(tiles).to_csv(dst / "tiles.csv", index=False)
    return dst


def test_train_rejects_empty_tile_set(tiny_tileset, tmp_path):
    root = _copy_set(tiny_tileset, tmp_path / "set", tiles_filter=lambda t: t.iloc[:0],
                     consensus_filter=lambda c: c.iloc[:0])
    with pytest.raises(TileSetError, match="tiles.csv"):
        train_model(root, tmp_path / "out" / "model", FAST, log=lambda s: None)
    assert not (tmp_path / "out" / "model").exists()


def test_train_rejects_one_image(tiny_tileset, tmp_path):
    first = pd.read_csv(tiny_tileset / "tiles.csv")["image_id"].iloc[0]
    root = _copy_set(tiny_tileset, tmp_path / "set", tiles_filter=lambda t: t[t["image_id"] == first],
                     consensus_filter=lambda c: c[c["tile_id"].str.startswith(first)])
    with pytest.raises(TileSetError, match="at least 3"):
        train_model(root, tmp_path / "model", FAST, log=lambda s: None)
    assert not (tmp_path / "model").exists() and not _leftovers(tmp_path, "model")


def test_train_rejects_fitting_images_without_fans(tiny_tileset, tmp_path):
    root = _copy_set(tiny_tileset, tmp_path / "set", consensus_filter=lambda c: c[c["kind"] != "fan"])
    with pytest.raises(TileSetError, match="no fans"):
        train_model(root, tmp_path / "model", FAST, log=lambda s: None)
    assert not (tmp_path / "model").exists() and not _leftovers(tmp_path, "model")


def test_train_rejects_fitting_images_without_spots(tiny_tileset, tmp_path):
    root = _copy_set(tiny_tileset, tmp_path / "set", consensus_filter=lambda c: c[c["kind"] != "spot"])
    with pytest.raises(TileSetError, match="no spot patches"):
        train_model(root, tmp_path / "model", FAST, log=lambda s: None)
    assert not (tmp_path / "model").exists() and not _leftovers(tmp_path, "model")


def test_train_refuses_non_empty_output(tiny_tileset, tmp_path):
    out = tmp_path / "model"
    out.mkdir()
    (out / "keep.txt").write_text("x")
    with pytest.raises(DetectorError, match="not empty"):
        train_model(tiny_tileset, out, FAST, log=lambda s: None)
    assert (out / "keep.txt").read_text() == "x"


def test_train_refuses_unwritable_output(tiny_tileset, tmp_path):
    import os

    parent = tmp_path / "ro"
    parent.mkdir()
    parent.chmod(0o500)
    try:
        if os.access(parent, os.W_OK):
            pytest.skip("running as a user who may write anywhere (root): permissions cannot be tested")
        with pytest.raises(DetectorError, match="not writable"):
            train_model(tiny_tileset, parent / "model", FAST, log=lambda s: None)
    finally:
        parent.chmod(0o700)


def test_train_rejects_a_file_as_output_parent(tiny_tileset, tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(DetectorError, match="cannot be created"):
        train_model(tiny_tileset, blocker / "model", FAST, log=lambda s: None)


# --------------------------------------------------------------------------- the model card


def test_model_card_fields(tiny_model):
    folder, card = tiny_model
    # turn.onnx only when training kept the boosted turn of fan directions (see test_objects)
    boosted = card["refine_turn"] is not None
    assert set(card["files"]) == {"detector.onnx", "orientation.onnx", "objects.onnx", "context.onnx"} | (
        {"turn.onnx"} if boosted else set())
    assert (folder / "turn.onnx").is_file() == boosted
    assert all(len(h) == 64 for h in card["files"].values())
    assert card["feature_spec"]["version"] >= 1
    for key in ("before", "after"):
        assert {"brier", "ece"} <= set(card["calibration"][key])
    t = card["training"]
    assert len(t["data_sha256"]) == 64
    assert {"numpy", "scikit-learn", "onnxruntime", "skl2onnx"} <= set(t["versions"])
    assert t["seed"] == 1
    probabilities = {"detector_max_abs_diff", "orientation_max_abs_diff", "objects_max_abs_diff", "context_max_abs_diff"}
    assert max(t["onnx_parity"][k] for k in probabilities) < 1e-5
    assert set(t["onnx_parity"]) == probabilities | ({"turn_max_abs_diff_deg"} if boosted else set())
    if boosted:  # degrees of a turn of tens of degrees, in float32
        assert t["onnx_parity"]["turn_max_abs_diff_deg"] < 1e-3
    assert t["context_first_scores"] in ("out of fold", "in sample")
    # vents are found finer when the model detects than where its readings were learnt
    assert DETECTION_ASSEMBLY == {"vent_smooth_px": 2.0}
    for key, value in DETECTION_ASSEMBLY.items():
        assert card["assembly"][key] == value
        assert t["readings"]["assembly"][key] == getattr(AssemblyParams(), key) != value
    assert {k: v for k, v in card["assembly"].items() if k not in set(DETECTION_ASSEMBLY) | {"min_score"}} == {
        k: v for k, v in asdict(AssemblyParams()).items() if k not in set(DETECTION_ASSEMBLY) | {"min_score"}}
    # The threshold kept is the least strict within reach of the best (the one-standard-error rule of
    # Hastie, Tibshirani and Friedman, ESL 2nd ed., section 7.10, on the paired shortfall), read back
    # from the card's own table.
    rule = card["assembly_tuning_rule"]
    table = {row["min_score"]: row["mean_f1"] for row in card["assembly_tuning"]}
    reach = {row["min_score"]: max(row["se_shortfall"], rule["tolerance"]) for row in card["assembly_tuning"]}
    kept, best = card["assembly"]["min_score"], rule["best_min_score"]
    assert kept <= best and table[best] == max(table.values())
    assert table[kept] >= table[best] - reach[kept] - 1e-12
    assert rule["standard_error"] == next(r["se_shortfall"] for r in card["assembly_tuning"] if r["min_score"] == kept)
    assert all(table[m] < table[best] - reach[m] for m in table if m < kept)
    h = card["heldout_metrics"]
    for key in ("fan_f1", "spot_f1", "fan_direction_median_deg", "flip_rate"):
        assert key in h
    assert 0.0 <= h["fan_f1"] <= 1.0 and 0.0 <= h["spot_f1"] <= 1.0
    assert not [p for p in folder.parent.iterdir() if p.name.startswith(".model.")]
    assert not [p for p in folder.rglob("*") if p.suffix in {".pkl", ".joblib"}]


def test_same_seed_gives_the_same_detector(tiny_model, tiny_tileset, tmp_path):
    from threadpoolctl import threadpool_limits

    from tests.conftest import TINY_CONFIG

    folder, card = tiny_model
    with threadpool_limits(limits=1):
        again = train_model(tiny_tileset, tmp_path / "model", TINY_CONFIG, log=lambda s: None)
    assert again["files"]["detector.onnx"] == card["files"]["detector.onnx"]
    assert again["heldout_metrics"]["fan_f1"] == card["heldout_metrics"]["fan_f1"]


@pytest.mark.slow
def test_train_reads_a_fold_without_spots_in_sample(tmp_path):
    # 4 images x 2 tiles (seed 0): of the two fitting images one has no spot patch, so the
    # out-of-fold classifier of one fold would know two classes only; training must still finish.
    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "set", n_images=4, tiles_per_image=2, seed=0)
    config = TrainConfig(seed=0, rotations=(0,), max_patches=20000, max_iter=20)
    lines = []
    card = train_model(root, tmp_path / "model", config, log=lines.append)
    assert (tmp_path / "model" / "model.json").exists()
    assert card["training"]["readings"]["fit"] > 0
    # every fit is announced with its size and ends with its iterations and seconds
    for what in ("patch classifier", "orientation model", "object classifier", "fold 1/2 patch classifier"):
        assert any(line.startswith(f"fitting {what}: ") and " rows x " in line for line in lines), what
        assert any(line.startswith(f"fitted {what}: ") and line.endswith(" s") for line in lines), what


def test_fit_log_reports_size_iterations_and_seconds_and_changes_no_value():
    # scikit-learn's bundled iris data (Fisher 1936), three classes; the same seed must give
    # the same model with and without logging
    from sklearn.datasets import load_iris

    from training.fitting.train import _fit_hgb

    X, y = load_iris(return_X_y=True)
    config = TrainConfig(seed=3, max_iter=30)
    lines = []
    logged = _fit_hgb(X[::2], y[::2], X[1::2], y[1::2], config, log=lines.append, what="iris model")
    quiet = _fit_hgb(X[::2], y[::2], X[1::2], y[1::2], config)
    assert lines[0] == "fitting iris model: 75 rows x 4 features, 3 classes, up to 30 iterations..."
    assert lines[1].startswith(f"fitted iris model: {logged.n_iter_} iterations in ") and len(lines) == 2
    assert logged.n_iter_ == quiet.n_iter_
    assert logged.predict_proba(X).tobytes() == quiet.predict_proba(X).tobytes()


def test_unfamiliarity_threshold_moves_to_the_held_out_pass_share():
    # Held-out scores 0.1 ... 2.0 (20 tiles) under a training threshold of 3.0: 95 % of 20 is 19 tiles,
    # the 19th smallest score is 1.9, so the threshold becomes 3.0 * 1.9 = 5.7 and the scores divide by 1.9.
    from training.fitting.train import _unfamiliarity_from_heldout

    scores = np.round(np.arange(1, 21) / 10, 1)
    card = {"unfamiliarity": {"threshold": 3.0}, "heldout_tiles": [{"unfamiliarity": float(s)} for s in scores]}
    _unfamiliarity_from_heldout(card)
    assert card["unfamiliarity"]["threshold"] == pytest.approx(5.7)
    assert card["unfamiliarity"]["threshold_fit"] == 3.0 and card["unfamiliarity"]["pass_share"] == 0.95
    rescaled = np.array([t["unfamiliarity"] for t in card["heldout_tiles"]])
    assert rescaled == pytest.approx(scores / 1.9)
    assert int(np.sum(rescaled <= 1.0 + 1e-12)) == 19


# --------------------------------------------------------------------------- on a Dask cluster


@pytest.mark.slow
def test_training_on_a_cluster_gives_the_local_model(tmp_path, monkeypatch):
    # 3 images x 2 tiles, two turns: every tile loop (features, out-of-fold and calibration
    # candidates, tuning, held-out scoring) has several jobs for the cluster's two workers.
    from dataclasses import replace

    from distributed import LocalCluster
    from threadpoolctl import threadpool_limits

    from detector.inference.model import ONNX_FILES
    from training.synth import synthesize_tileset

    root = synthesize_tileset(tmp_path / "set", n_images=3, tiles_per_image=2, seed=3)
    config = TrainConfig(seed=1, rotations=(0, 1), max_patches=5000, max_iter=20)
    import sklearn.ensemble  # noqa: F401  (the OpenMP runtime loads with it; limit after)

    with threadpool_limits(limits=1):
        local = train_model(root, tmp_path / "local", config, log=lambda s: None)
        with LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None) as cluster:
            address = cluster.scheduler_address
            # The workers started in another folder: the relative paths given here must still reach them.
            monkeypatch.chdir(tmp_path)
            lines = []
            remote = train_model("set", "cluster", replace(config, scheduler=address), log=lines.append)
            ran = set(cluster.scheduler.task_prefixes)
    # The same model: the four ONNX files byte for byte (hence the same probabilities on every
    # tile), and what was computed through them on the cluster (tuning, held-out scores).
    for name in ONNX_FILES + (("turn.onnx",) if local["refine_turn"] else ()):
        assert (tmp_path / "cluster" / name).read_bytes() == (tmp_path / "local" / name).read_bytes(), name
    assert remote["files"] == local["files"]
    for key in ("calibration", "assembly", "assembly_tuning", "heldout_metrics", "heldout_tiles", "unfamiliarity"):
        assert remote[key] == local[key], key
    assert remote["training"]["readings"] == local["training"]["readings"]
    assert remote["training"]["patches"] == local["training"]["patches"]
    # Every loop ran there, and the run says on how many workers.
    for function in ("_extract_one", "_tile_readings", "_run_block"):
        assert any(function in prefix for prefix in ran), (function, ran)
    assert lines[0] == f"workers: 2 on the Dask cluster of {address} (2 threads)"
    assert remote["training"]["config"]["workers"] == 2 and remote["training"]["config"]["scheduler"] == address
    assert local["training"]["config"]["workers"] == 1 and local["training"]["config"]["scheduler"] is None
    assert remote["training"]["tileset"] == "set"
    assert format_card_summary(remote, "cluster").endswith(f" s, 2 workers on the Dask cluster of {address}")
    assert format_card_summary(local, "local").endswith(" s, 1 worker (local)")


@pytest.mark.parametrize("scheduler", ["", "  ", 8786])
def test_config_refuses_a_scheduler_that_is_no_address(scheduler):
    with pytest.raises(DetectorError, match=f"scheduler must be a Dask scheduler address.*got {scheduler!r}"):
        TrainConfig(scheduler=scheduler)


def test_a_kept_boosted_turn_is_exported_with_its_card_entry_and_loaded(tiny_tileset, tmp_path, monkeypatch):
    # The tiny tile set has too few right readings for a refinement of its own, so training is handed
    # a boosted turn as kept: the folder must then hold turn.onnx with its sha256 and the card's
    # refine_turn, the export's parity in degrees, and load with the turn in use.
    import sklearn.ensemble  # noqa: F401  (the OpenMP runtime loads with it; limit after)
    from sklearn.ensemble import HistGradientBoostingRegressor
    from threadpoolctl import threadpool_limits

    import training.fitting.train as train_module
    from detector.inference.model import TURN_ONNX, load_model, sha256_file
    from detector.objects.refine import REFINE_FEATURE_NAMES
    from tests.conftest import TINY_CONFIG

    rng = np.random.default_rng(0)
    X = rng.normal(size=(400, len(REFINE_FEATURE_NAMES))).astype(np.float32)
    turn = HistGradientBoostingRegressor(max_iter=20, random_state=0).fit(X, 20.0 * np.tanh(X[:, 0]))
    monkeypatch.setattr(train_module, "fit_refine_checked", lambda fit, check, log, seed=0: (None, {}, turn))
    with threadpool_limits(limits=1):
        card = train_model(tiny_tileset, tmp_path / "model", TINY_CONFIG, force=True, log=lambda s: None)
    folder = tmp_path / "model"
    assert card["refine_turn"]["file"] == TURN_ONNX
    assert card["refine_turn"]["features"] == list(REFINE_FEATURE_NAMES)
    assert card["files"][TURN_ONNX] == sha256_file(folder / TURN_ONNX)
    assert card["training"]["onnx_parity"]["turn_max_abs_diff_deg"] < 1e-3
    model = load_model(folder)
    assert model._turn is not None
