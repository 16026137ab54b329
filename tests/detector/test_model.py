"""Loading an exported model: round trip, ONNX parity, integrity and compatibility checks, calibration."""

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from detector.errors import ModelError, SpecError
from detector.inference.model import DETECTOR_ONNX, MODEL_CARD, ORIENTATION_ONNX, Calibration, load_model
from training.fitting.export import onnx_parity, to_onnx_bytes


@pytest.fixture
def model_copy(tiny_model, tmp_path):
    folder, _ = tiny_model
    copy = tmp_path / "model"
    shutil.copytree(folder, copy)
    return copy


def _edit_card(folder, edit):
    path = folder / MODEL_CARD
    card = json.loads(path.read_text())
    edit(card)
    path.write_text(json.dumps(card))


def test_load_model_round_trip(tiny_model):
    folder, card = tiny_model
    model = load_model(folder)
    assert model.card["files"] == card["files"]
    assert model.feature_spec.feature_names == tuple(card["feature_names"])
    assert model.calibration.temperature == pytest.approx(card["calibration"]["temperature"])
    X = np.random.default_rng(0).normal(size=(7, len(card["feature_names"]))).astype(np.float32)
    p = model.predict_patches(X)
    assert p.shape == (7, 3) and np.allclose(p.sum(axis=1), 1.0, atol=1e-5)
    pol = model.predict_polarity(X)
    assert pol.shape == (7,) and ((pol >= 0) & (pol <= 1)).all()
    assert model.predict_patches(X[:0]).shape == (0, 3)


def test_onnxruntime_matches_scikit_learn_probabilities():
    # As scikit-learn / skl2onnx compare converted models: onnxruntime's probabilities
    # agree with predict_proba to float32 precision (tolerance 1e-5, value from memory).
    from sklearn.ensemble import HistGradientBoostingClassifier

    rng = np.random.default_rng(11)
    X = rng.normal(size=(600, 6)).astype(np.float32)
    y = (X[:, 0] + 0.5 * X[:, 1] > 0).astype(int) + (X[:, 2] > 1.0).astype(int)
    clf = HistGradientBoostingClassifier(max_iter=30, random_state=0).fit(X, y)
    model_bytes = to_onnx_bytes(clf, X.shape[1])

    import onnxruntime as ort

    session = ort.InferenceSession(model_bytes, providers=["CPUExecutionProvider"])
    probe = rng.normal(size=(200, 6)).astype(np.float32)
    onnx_proba = session.run(None, {session.get_inputs()[0].name: probe})[1]
    np.testing.assert_allclose(onnx_proba, clf.predict_proba(probe), atol=1e-5)
    assert onnx_parity(model_bytes, clf, probe) < 1e-5


def test_missing_card(model_copy):
    (model_copy / MODEL_CARD).unlink()
    with pytest.raises(ModelError, match="model.json"):
        load_model(model_copy)


def test_missing_onnx_file(model_copy):
    (model_copy / ORIENTATION_ONNX).unlink()
    with pytest.raises(ModelError, match="orientation.onnx"):
        load_model(model_copy)


def test_tampered_onnx_file_is_refused(model_copy):
    path = model_copy / DETECTOR_ONNX
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    with pytest.raises(ModelError, match=r"detector\.onnx.*sha256"):
        load_model(model_copy)


def test_wrong_format_version(model_copy):
    _edit_card(model_copy, lambda c: c.update(format_version=99))
    with pytest.raises(ModelError, match="format_version 99"):
        load_model(model_copy)


def test_other_feature_version_asks_for_re_export(model_copy):
    _edit_card(model_copy, lambda c: c["feature_spec"].update(version=0))
    with pytest.raises(SpecError, match="re-export"):
        load_model(model_copy)


def test_other_feature_parameters_ask_for_re_export(model_copy):
    # Fewer HOG bins: the spec now names other features than the model was fitted on.
    _edit_card(model_copy, lambda c: c["feature_spec"].update(hog_orientations=6))
    with pytest.raises(SpecError, match="re-export"):
        load_model(model_copy)


def test_model_without_tile_context_asks_for_re_export(model_copy):
    # A model made before the context model existed, or with other context features.
    _edit_card(model_copy, lambda c: c.pop("context_features"))
    with pytest.raises(SpecError, match="context features None.*re-export"):
        load_model(model_copy)
    _edit_card(model_copy, lambda c: c.update(context_features=["ctx_agree"]))
    with pytest.raises(SpecError, match=r"\['ctx_agree'\].*re-export"):
        load_model(model_copy)


def test_missing_context_model_is_named(model_copy):
    (model_copy / "context.onnx").unlink()
    with pytest.raises(ModelError, match="context.onnx"):
        load_model(model_copy)


def test_model_folder_holds_no_pickles_and_load_never_unpickles(tiny_model, monkeypatch):
    folder, _ = tiny_model
    assert not [p for p in folder.rglob("*") if p.suffix in {".pkl", ".pickle", ".joblib"}]
    import pickle

    import joblib

    def refuse(*args, **kwargs):
        raise AssertionError("load_model must not unpickle")

    monkeypatch.setattr(pickle, "load", refuse)
    monkeypatch.setattr(pickle, "loads", refuse)
    monkeypatch.setattr(joblib, "load", refuse)
    load_model(folder)


def test_calibration_rows_sum_to_one():
    proba = np.random.default_rng(2).dirichlet(np.ones(3), size=50)
    out = Calibration(temperature=1.7, bias=(0.0, 0.4, -0.3)).apply(proba)
    assert out.dtype == np.float32
    np.testing.assert_allclose(out.sum(axis=1), 1.0, atol=1e-6)


def test_calibration_identity():
    proba = np.random.default_rng(3).dirichlet(np.ones(3), size=50)
    np.testing.assert_allclose(Calibration().apply(proba), proba, atol=1e-6)


def test_calibration_rejects_bad_temperature():
    with pytest.raises(SpecError, match="temperature"):
        Calibration(temperature=0.0)


def _drop_objects(card, folder):
    del card["files"]["objects.onnx"]
    (folder / "objects.onnx").unlink()


@pytest.mark.parametrize(
    "edit, field",
    [
        (lambda c, f: c["assembly"].update(min_score=float("nan")), "assembly.min_score"),
        (lambda c, f: c["assembly"].update(min_score=-5), "assembly.min_score"),
        (lambda c, f: c["assembly"].update(min_score="0.3"), "assembly.min_score"),
        (lambda c, f: c["assembly"].update(min_area_px=2.5), "assembly.min_area_px"),
        (lambda c, f: c["assembly"].update(deposit_seed=1.7), "assembly.deposit_seed"),
        (lambda c, f: c["assembly"].update(deposit_seed=-0.1), "assembly.deposit_seed"),
        (lambda c, f: c["calibration"].update(bias=[0.0, 0.1]), "calibration.bias"),
        (lambda c, f: c["calibration"].update(temperature=None), "calibration.temperature"),
        (lambda c, f: c.update(class_names=["none", "spot", "fan"]), "class_names"),
        (lambda c, f: c.update(orientation_features="hog_b0_c0_o0"), "orientation_features"),
        (lambda c, f: c.update(direction_confidence={**c["direction_confidence"], "coef": [1.0]}),
         "direction_confidence.coef"),
        (lambda c, f: c.update(refine_model={**c["refine_model"], "features": c["refine_model"]["features"][::-1]}),
         "refine_model.features"),
        (lambda c, f: c.update(refine_model={**c["refine_model"], "fan": {**c["refine_model"]["fan"], "coef": [[1.0]]}}),
         "refine_model.fan.coef"),
        (lambda c, f: c.update(refine_model={**c["refine_model"], "spot": {**c["refine_model"]["spot"], "scale": [0.0]}}),
         "refine_model.spot.scale"),
        (lambda c, f: c.update(unfamiliarity={**c["unfamiliarity"], "threshold": 0.0}), "unfamiliarity.threshold"),
        (lambda c, f: c.update(unfamiliarity={**c["unfamiliarity"], "variances": [1.0]}), "unfamiliarity.variances"),
        (lambda c, f: c.update(noise={"limit": 0.004, "target": 0.008}), "noise.target"),
        (lambda c, f: c.update(noise={"limit": -1.0, "target": 0.001}), "noise.limit"),
        (lambda c, f: c.update(noise={"target": 0.001}), "noise.limit"),
        (lambda c, f: c.update(noise=[0.004]), "noise"),
        (lambda c, f: c["files"].update({"detector.onnx": 12}), "files.detector.onnx"),
        (_drop_objects, "files.objects.onnx"),
    ],
)
def test_card_breaking_its_schema_is_refused_naming_the_field(model_copy, edit, field):
    card = json.loads((model_copy / MODEL_CARD).read_text())
    # A tiny model may lack these optional fits; the shipped model's are well-formed ones to break.
    shipped = json.loads((Path(__file__).resolve().parents[2] / "models" / "demo" / MODEL_CARD).read_text())
    for key in ("unfamiliarity", "direction_confidence", "refine_model"):
        card[key] = card.get(key) or shipped[key]
    edit(card, model_copy)
    (model_copy / MODEL_CARD).write_text(json.dumps(card))  # json writes NaN as the bare token NaN
    with pytest.raises(ModelError, match=field.replace(".", r"\.")):
        load_model(model_copy)


def test_card_that_is_not_an_object_is_refused(model_copy, capsys):
    from frostvane.cli import main

    (model_copy / MODEL_CARD).write_text("[1, 2]")
    with pytest.raises(ModelError, match="not an object"):
        load_model(model_copy)
    assert main(["screen", str(model_copy), str(model_copy / "none.png"), "--out", str(model_copy / "o")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "model.json" in err and "Traceback" not in err


def _add_boosted_turn(folder, seed=0):
    """Give a model folder a boosted turn: a regressor fitted on random refinement rows, written to
    turn.onnx and recorded in the card (``refine_turn`` and ``files``). Returns the regressor."""
    from sklearn.ensemble import HistGradientBoostingRegressor

    from detector.inference.model import TURN_ONNX, sha256_file
    from detector.objects.refine import REFINE_FEATURE_NAMES
    from training.fitting.export import regressor_to_onnx_bytes

    rng = np.random.default_rng(seed)
    X = rng.normal(size=(800, len(REFINE_FEATURE_NAMES))).astype(np.float32)
    y = 40.0 * np.tanh(X[:, 0])  # turns of up to 40 deg, past the clip of 30
    reg = HistGradientBoostingRegressor(max_iter=40, random_state=0).fit(X, y)
    (folder / TURN_ONNX).write_bytes(regressor_to_onnx_bytes(reg, X.shape[1]))

    def edit(card):
        card["refine_turn"] = {"file": TURN_ONNX, "features": list(REFINE_FEATURE_NAMES)}
        card["files"][TURN_ONNX] = sha256_file(folder / TURN_ONNX)

    _edit_card(folder, edit)
    return reg


def test_onnxruntime_matches_scikit_learn_regression():
    # As for the classifiers: onnxruntime's predictions of a converted HistGradientBoostingRegressor
    # agree with scikit-learn's predict to float32 precision (1e-4 of outputs of tens; from memory).
    from sklearn.ensemble import HistGradientBoostingRegressor

    from training.fitting.export import onnx_regression_parity, regressor_to_onnx_bytes

    rng = np.random.default_rng(12)
    X = rng.normal(size=(600, 5)).astype(np.float32)
    y = 30.0 * np.sign(X[:, 0]) + 3.0 * X[:, 1]
    for loss in ("squared_error", "absolute_error"):
        reg = HistGradientBoostingRegressor(loss=loss, max_iter=40, random_state=0).fit(X, y)
        probe = rng.normal(size=(200, 5)).astype(np.float32)
        assert onnx_regression_parity(regressor_to_onnx_bytes(reg, 5), reg, probe) < 1e-4


def test_a_boosted_turn_turns_fans_by_its_clipped_prediction(model_copy):
    from types import SimpleNamespace

    from detector.objects.assemble import OBJECT_FEATURE_NAMES
    from detector.objects.refine import MAX_TURN_DEG, refine_design

    reg = _add_boosted_turn(model_copy)
    model = load_model(model_copy)
    assert model._turn is not None
    fans = [dict(kind="fan", direction_deg=d, length_px=30.0, opening_deg=40.0) for d in (0.0, 90.0, 355.0, 200.0)]
    spot = dict(kind="spot", direction_deg=45.0, semi_major_px=8.0, semi_minor_px=5.0)
    candidates = [SimpleNamespace(fans=fans[:2], spots=[spot]), SimpleNamespace(fans=fans[2:], spots=[])]
    F = np.random.default_rng(3).normal(size=(5, len(OBJECT_FEATURE_NAMES))).astype(np.float32)
    F[:, 0] = [3.0, -3.0, 0.0, 0.2, -0.1]  # the first two fans' turns reach the clip of 30 deg
    _, turned = model.refine_readings(F, candidates)
    own = np.array([[30.0, 40.0], [30.0, 40.0], [8.0, 5.0], [30.0, 40.0], [30.0, 40.0]])
    is_fan = np.array([True, True, False, True, True])
    measured = np.array([0.0, 90.0, 355.0, 200.0])
    # the card's ridge refinement turns too; undo it to isolate the boosted turn
    from detector.objects.refine import predict_refined

    _, ridge = predict_refined(model.card.get("refine_model"), F, own, np.array([0.0, 90.0, 45.0, 355.0, 200.0]),
                               is_fan)
    expected_turn = np.clip(reg.predict(refine_design(F, own)[is_fan].astype(np.float32)), -MAX_TURN_DEG,
                            MAX_TURN_DEG)
    assert abs(expected_turn[0]) == pytest.approx(MAX_TURN_DEG) and abs(expected_turn[1]) == pytest.approx(MAX_TURN_DEG)
    gap = (turned[is_fan] - (ridge[is_fan] + expected_turn) + 180.0) % 360.0 - 180.0
    np.testing.assert_allclose(gap, 0.0, atol=1e-3)
    assert turned[2] == ridge[2] == 45.0
    assert not np.allclose(turned[is_fan], measured)


def test_a_card_with_a_boosted_turn_needs_its_file(model_copy):
    from detector.inference.model import TURN_ONNX

    _add_boosted_turn(model_copy)
    data = bytearray((model_copy / TURN_ONNX).read_bytes())
    data[len(data) // 2] ^= 0xFF
    (model_copy / TURN_ONNX).write_bytes(bytes(data))
    with pytest.raises(ModelError, match=r"turn\.onnx.*sha256"):
        load_model(model_copy)
    (model_copy / TURN_ONNX).unlink()
    with pytest.raises(ModelError, match="lacks 'turn.onnx'"):
        load_model(model_copy)


def test_a_boosted_turn_over_other_features_is_refused_naming_the_field(model_copy):
    _add_boosted_turn(model_copy)
    _edit_card(model_copy, lambda c: c["refine_turn"].update(features=c["refine_turn"]["features"][:-1]))
    with pytest.raises(ModelError, match="refine_turn.features"):
        load_model(model_copy)
