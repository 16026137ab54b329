"""Loading and running an exported frostvane model with onnxruntime alone.

A model folder holds ``detector.onnx`` (patch classifier over none / fan / spot),
``orientation.onnx`` (fan polarity along the structure-tensor axis),
``objects.onnx`` (scores each reading of a dark candidate as a fan or a spot),
``context.onnx`` (rescores each reading with the other deposits of its tile and image block, see
:mod:`detector.objects.context`) and ``model.json``, the model card. Nothing here unpickles anything: the card is
JSON and the models are ONNX graphs.
"""

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import ModelError, SpecError
from ..tile.noise import NoiseRange
from ..tile.scale import PixelScale
from ..tile.spec import FEATURE_VERSION, FeatureSpec

__all__ = [
    "CLASS_NAMES",
    "MODEL_FORMAT_VERSION",
    "MODEL_CARD",
    "DETECTOR_ONNX",
    "ORIENTATION_ONNX",
    "OBJECTS_ONNX",
    "CONTEXT_ONNX",
    "ONNX_FILES",
    "TURN_ONNX",
    "Calibration",
    "Model",
    "load_model",
    "cached_model",
    "sha256_file",
]

MODEL_FORMAT_VERSION = 1
MODEL_CARD = "model.json"
DETECTOR_ONNX = "detector.onnx"
ORIENTATION_ONNX = "orientation.onnx"
OBJECTS_ONNX = "objects.onnx"
CONTEXT_ONNX = "context.onnx"
ONNX_FILES = (DETECTOR_ONNX, ORIENTATION_ONNX, OBJECTS_ONNX, CONTEXT_ONNX)
#: The boosted turn of fan directions (:mod:`detector.objects.refine`); only in a folder whose card
#: has a ``refine_turn``.
TURN_ONNX = "turn.onnx"
CLASS_NAMES = ("none", "fan", "spot")


def sha256_file(path):
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


@dataclass(frozen=True)
class Calibration:
    """Vector scaling of class log-probabilities, fitted on held-out groups.

    ``p_cal = softmax(log(p) / temperature + bias)``: temperature scaling
    (Guo et al. 2017, "On calibration of modern neural networks") with one
    bias per class.
    """

    temperature: float = 1.0
    bias: tuple = (0.0, 0.0, 0.0)

    def __post_init__(self):
        if not np.isfinite(self.temperature) or self.temperature <= 0:
            raise SpecError(f"calibration temperature must be a positive number; got {self.temperature!r}.")

    def apply(self, proba):
        """Calibrated probabilities, shape (n, n_classes), float32."""
        logits = np.log(np.clip(np.asarray(proba, dtype=np.float64), 1e-12, 1.0)) / self.temperature
        logits = logits + np.asarray(self.bias, dtype=np.float64)
        logits -= logits.max(axis=1, keepdims=True)
        expd = np.exp(logits)
        return (expd / expd.sum(axis=1, keepdims=True)).astype(np.float32)


@dataclass
class Model:
    """An exported model ready to run.

    Attributes
    ----------
    folder : Path
    card : dict
        The parsed ``model.json``.
    feature_spec : FeatureSpec
    calibration : Calibration
    orientation_index : ndarray of int
        Columns of the feature matrix the orientation model reads, in order.
    odd_mask : ndarray of bool
        Which of those columns change sign when the axis is flipped by 180 degrees.
    """

    folder: Path
    card: dict
    feature_spec: FeatureSpec
    calibration: Calibration
    orientation_index: np.ndarray
    odd_mask: np.ndarray
    _detector: object = field(repr=False, default=None)
    _orientation: object = field(repr=False, default=None)
    _objects: object = field(repr=False, default=None)
    _context: object = field(repr=False, default=None)
    _turn: object = field(repr=False, default=None)

    @property
    def assembly(self):
        """Object-assembly parameters stored in the card."""
        return self.card.get("assembly", {})

    @property
    def noise_range(self):
        """The fitting tiles' noise (:class:`detector.tile.noise.NoiseRange`); None for a card
        without it, whose tiles are never smoothed."""
        return NoiseRange.from_card(self.card.get("noise"))

    @property
    def pixel_scale(self):
        """The fitting tiles' ground scale (:class:`detector.tile.scale.PixelScale`); None for a card
        without it, whose tiles are always read as they are."""
        return PixelScale.from_card(self.card.get("pixel_scale"))

    def predict_raw(self, X):
        """Uncalibrated patch class probabilities from detector.onnx, shape (n, 3)."""
        return _run_proba(self._detector, X)

    def predict_patches(self, X):
        """Calibrated patch class probabilities (none, fan, spot), shape (n, 3), float32."""
        if len(X) == 0:
            return np.zeros((0, len(CLASS_NAMES)), dtype=np.float32)
        return self.calibration.apply(self.predict_raw(X))

    def orientation_inputs(self, X):
        """The orientation model's input columns of a feature matrix."""
        return np.ascontiguousarray(X[:, self.orientation_index], dtype=np.float32)

    def predict_polarity(self, X):
        """Probability that each patch's fan runs along +axis (not axis + 180), shape (n,)."""
        if len(X) == 0:
            return np.zeros(0, dtype=np.float32)
        return _run_proba(self._orientation, self.orientation_inputs(X))[:, 1]


    def predict_readings(self, F):
        """Probability that each candidate reading is a right fan or spot, shape (n,).

        Without an object model (while training builds the folder) the mean patch
        probability of the reading's kind under it stands in.
        """
        F = np.asarray(F, dtype=np.float32)
        if len(F) == 0:
            return np.zeros(0, dtype=np.float32)
        if self._objects is None:
            from ..objects.assemble import OBJECT_FEATURE_NAMES

            return F[:, OBJECT_FEATURE_NAMES.index("read_p_fan")].astype(np.float32)
        return _run_proba(self._objects, F)[:, 1]

    def score_readings(self, F, candidates):
        """Final score of each reading of one tile's candidates, the tile alone in its context
        block, shape (n,) (:meth:`score_block`)."""
        return self.score_block([F], [candidates])[0]

    def score_block(self, F, candidates, first=None):
        """Final scores of the readings of the tiles of one context block.

        A fan reading's first score (:meth:`predict_readings`) rescored by
        ``context.onnx`` from the reading's features, that score, its tile context and
        its block context (:mod:`detector.objects.context`); spot readings keep their
        first score (the context model did not make spots better on the development sets,
        and worse on images unlike the training ones). The first score alone while
        training builds the folder.

        Parameters
        ----------
        F : list of ndarray
            Each tile's reading features (:func:`detector.objects.assemble.reading_matrix`).
        candidates : list of list
            Each tile's candidates.
        first : list of ndarray, optional
            Each tile's first scores, when already computed.

        Returns
        -------
        list of ndarray
            Each tile's final scores, float32.
        """
        from ..objects.assemble import OBJECT_FEATURE_NAMES
        from ..objects.context import context_matrix, reading_layout

        first = [self.predict_readings(f) for f in F] if first is None else [np.asarray(f) for f in first]
        sizes = [len(f) for f in first]
        if self._context is None or sum(sizes) == 0:
            return [np.asarray(f, dtype=np.float32) for f in first]
        layout = [reading_layout(c) for c in candidates]
        owner, is_fan, direction = (np.concatenate([part[i] for part in layout]) for i in range(3))
        every_first = np.concatenate(first)
        tile = np.repeat(np.arange(len(first)), sizes)
        rows = context_matrix(np.concatenate([np.asarray(f, dtype=np.float32).reshape(-1, len(OBJECT_FEATURE_NAMES))
                                              for f in F]), every_first, owner, is_fan, direction, group=tile)
        revised = _run_proba(self._context, rows)[:, 1]
        final = np.where(is_fan, revised, every_first).astype(np.float32)
        return np.split(final, np.cumsum(sizes)[:-1])

    def refine_readings(self, F, candidates):
        """Refined sizes, shape (n, 2), and fan directions, shape (n,), of every reading
        (:mod:`detector.objects.refine`).

        From the card's ``refine_model`` (plain numbers); a card without one keeps the
        sizes and directions measured on the dark components. Fans are turned by
        ``turn.onnx`` when the card keeps a boosted turn (``refine_turn``).
        """
        from ..objects.refine import predict_refined, reading_shapes, refine_design, turn_directions

        own, direction, is_fan = reading_shapes(candidates)
        sizes, turned = predict_refined(self.card.get("refine_model"), F, own, direction, is_fan)
        if self._turn is not None and is_fan.any():
            turned = turn_directions(turned, is_fan, _run_regression(self._turn, refine_design(F, own)[is_fan]))
        return sizes, turned

    def direction_confidence(self, F):
        """Probability that each fan reading's direction is within the card's error bound, shape (n,).

        A logistic model over reading features, stored in the card as plain numbers
        (``direction_confidence``: feature names, mean, scale, coef, intercept,
        bound_deg). Without it, the orientation model's agreement ``(1 + vote) / 2``.
        """
        from ..objects.assemble import OBJECT_FEATURE_NAMES

        F = np.asarray(F, dtype=np.float64)
        fit = self.card.get("direction_confidence")
        if len(F) == 0:
            return np.zeros(0)
        if not fit:
            return 0.5 * (1.0 + F[:, OBJECT_FEATURE_NAMES.index("read_polarity_vote")])
        idx = [OBJECT_FEATURE_NAMES.index(n) for n in fit["features"]]
        z = (F[:, idx] - np.asarray(fit["mean"])) / np.asarray(fit["scale"])
        return 1.0 / (1.0 + np.exp(-(z @ np.asarray(fit["coef"]) + float(fit["intercept"]))))


def _run(session, X):
    """Every output of an ONNX model on the float32 rows ``X``."""
    return session.run(None, {session.get_inputs()[0].name: np.ascontiguousarray(X, dtype=np.float32)})


def _run_regression(session, X):
    """The single output of an ONNX regressor, shape (n,), float64."""
    return np.asarray(_run(session, X)[0], dtype=np.float64).reshape(-1)


def _run_proba(session, X):
    # skl2onnx with zipmap disabled: [labels, probabilities]
    return np.asarray(_run(session, X)[1], dtype=np.float32)


def _session(path):
    import onnxruntime as ort

    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    options.inter_op_num_threads = 1
    try:
        return ort.InferenceSession(str(path), sess_options=options, providers=["CPUExecutionProvider"])
    except Exception as err:
        raise ModelError(f"model file {str(path)!r} cannot be loaded by onnxruntime: {err}.") from err


def load_model(folder):
    """Load a model folder, checking its card, file hashes and feature spec.

    Parameters
    ----------
    folder : path-like
        Folder with ``model.json`` and the ONNX files of :data:`ONNX_FILES`.

    Returns
    -------
    model : Model

    Raises
    ------
    ModelError
        A file is missing, a hash differs from the one in the card, or the card breaks its
        schema (:func:`detector.inference.card.check_card`: types, lengths and ranges of every field read).
    SpecError
        The model was made with another feature version or parameters than this code computes.
    """
    folder = Path(folder)
    card_path = folder / MODEL_CARD
    if not card_path.is_file():
        raise ModelError(f"model folder {str(folder)!r} lacks {MODEL_CARD!r}.")
    try:
        card = json.loads(card_path.read_text())
    except (OSError, ValueError) as err:
        raise ModelError(f"{str(card_path)!r} is not valid JSON: {err}.") from err
    if not isinstance(card, dict):
        raise ModelError(f"{str(card_path)!r} holds a JSON {type(card).__name__}, not an object.")
    version = card.get("format_version")
    if version != MODEL_FORMAT_VERSION:
        raise ModelError(
            f"{str(card_path)!r} has format_version {version!r}; this frostvane reads "
            f"{MODEL_FORMAT_VERSION}: re-export the model with this version of the code."
        )
    import dataclasses

    from ..objects.assemble import OBJECT_FEATURE_NAMES, AssemblyParams
    from .card import check_card

    check_card(card, repr(str(card_path)), onnx_files=ONNX_FILES, class_names=CLASS_NAMES,
               object_feature_names=OBJECT_FEATURE_NAMES,
               assembly_fields={f.name: f.type for f in dataclasses.fields(AssemblyParams)})
    turn_kept = bool(card.get("refine_turn"))
    for name in ONNX_FILES + ((TURN_ONNX,) if turn_kept else ()):
        path = folder / name
        if not path.is_file():
            raise ModelError(f"model folder {str(folder)!r} lacks {name!r}.")
        recorded = card["files"].get(name)
        actual = sha256_file(path)
        if recorded != actual:
            raise ModelError(
                f"{str(path)!r} has sha256 {actual[:12]}...; {MODEL_CARD} records "
                f"{str(recorded)[:12]}...: the file was changed after export."
            )
    spec_fields = card["feature_spec"]
    if spec_fields.get("version") != FEATURE_VERSION:
        raise SpecError(
            f"model {str(folder)!r} was trained on feature version {spec_fields.get('version')!r}; "
            f"this code computes version {FEATURE_VERSION}: re-export the model with this version of the code."
        )
    spec = FeatureSpec.from_json(json.dumps(spec_fields))
    names = tuple(card.get("feature_names", ()))
    if names != spec.feature_names:
        missing = sorted(set(spec.feature_names) - set(names))[:5]
        extra = sorted(set(names) - set(spec.feature_names))[:5]
        raise SpecError(
            f"model {str(folder)!r} lists features that differ from this code's "
            f"(missing {missing!r}, unknown {extra!r}): re-export the model with this version of the code."
        )
    objects = card.get("object_features")
    if tuple(objects or ()) != OBJECT_FEATURE_NAMES:
        missing = sorted(set(OBJECT_FEATURE_NAMES) - set(objects or ()))[:5]
        extra = sorted(set(objects or ()) - set(OBJECT_FEATURE_NAMES))[:5]
        raise SpecError(
            f"model {str(folder)!r} scores candidate readings on features that differ from this code's "
            f"(missing {missing!r}, unknown {extra!r}): re-export the model with this version of the code."
        )
    from ..objects.context import CONTEXT_FEATURE_NAMES

    context = card.get("context_features")
    if tuple(context or ()) != CONTEXT_FEATURE_NAMES:
        raise SpecError(
            f"model {str(folder)!r} rescores readings on context features {context!r}; this code computes "
            f"{list(CONTEXT_FEATURE_NAMES)!r}: re-export the model with this version of the code."
        )
    index = {name: i for i, name in enumerate(spec.feature_names)}
    try:
        orientation_index = np.array([index[n] for n in card["orientation_features"]], dtype=np.intp)
    except KeyError as err:
        raise SpecError(f"model {str(folder)!r}: orientation feature {err.args[0]!r} is not computed by this code.") from None
    odd = set(card["odd_features"])
    odd_mask = np.array([n in odd for n in card["orientation_features"]], dtype=bool)
    cal = card["calibration"]
    calibration = Calibration(temperature=float(cal["temperature"]), bias=tuple(float(b) for b in cal["bias"]))
    return Model(
        folder=folder,
        card=card,
        feature_spec=spec,
        calibration=calibration,
        orientation_index=orientation_index,
        odd_mask=odd_mask,
        _detector=_session(folder / DETECTOR_ONNX),
        _orientation=_session(folder / ORIENTATION_ONNX),
        _objects=_session(folder / OBJECTS_ONNX),
        _context=_session(folder / CONTEXT_ONNX),
        _turn=_session(folder / TURN_ONNX) if turn_kept else None,
    )


_LOADED = {}


def cached_model(folder):
    """The model of a folder, loaded once per process (workers screen many tiles with one model).

    Parameters
    ----------
    folder : path-like

    Returns
    -------
    model : Model
        Shared within the process: treat it as read-only. A model card rewritten
        since it was loaded (same folder, new ``model.json``) is loaded again.
    """
    folder = Path(folder).resolve()
    try:
        stat = (folder / MODEL_CARD).stat()
        key = (str(folder), stat.st_mtime_ns, stat.st_size)
    except OSError:
        return load_model(folder)  # let load_model say what is missing
    if key not in _LOADED:
        _LOADED.clear()
        _LOADED[key] = load_model(folder)
    return _LOADED[key]
