"""Fit the patch classifier and the orientation model, calibrate, export, score held-out images."""

import contextlib
import hashlib
import json
import platform
import time
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np
from scipy.optimize import minimize

from detector.objects.assemble import OBJECT_FEATURE_NAMES, AssemblyParams
from detector.objects.context import CONTEXT_FEATURE_NAMES
from detector.circstats import circular_mean
from detector.contract import DEFAULT_MIN_VOTES
from detector.errors import DetectorError, TileSetError
from detector.geometry import angular_difference
from detector.io import atomic_dir
from detector.inference.model import (
    CLASS_NAMES,
    DETECTOR_ONNX,
    MODEL_CARD,
    MODEL_FORMAT_VERSION,
    OBJECTS_ONNX,
    CONTEXT_ONNX,
    ONNX_FILES,
    ORIENTATION_ONNX,
    TURN_ONNX,
    Calibration,
    sha256_file,
)
from detector.objects.refine import MAX_TURN_DEG, REFINE_FEATURE_NAMES, refine_design
from detector.tile.noise import NOISE_METHOD, NoiseRange
from detector.tile.scale import PixelScale
from detector.tile.spec import POLARITY_ODD_FEATURES, SIGNED_HIST_PREFIX, FeatureSpec
from detector.tileset import load_tileset
from detector.inference.unfamiliar import DEFAULT_PASS_SHARE, pass_threshold, unfamiliarity_distance

from .dataset import build_patch_set, rotation_jobs
from ..evaluation.evaluate import evaluate_tiles, summarise_for_card, tune_assembly
from .export import onnx_parity, onnx_regression_parity, regressor_to_onnx_bytes, to_onnx_bytes
from .objects import (REFINE_TURN_CLIP_DEG, TURN_MODEL_PARAMS, CandidateSet, candidate_set, context_rows,
                      fit_direction_confidence, fit_refine_checked)
from ..parallel import on_cluster

__all__ = ["TrainConfig", "split_images", "train_model", "fit_calibration", "calibration_scores",
           "orientation_feature_names", "orientation_training_set"]


@dataclass(frozen=True)
class TrainConfig:
    """Every choice of a training run; saved in the model card so a run can be repeated.

    Attributes
    ----------
    seed : int, default=0
    holdout_fraction : float, default=0.2
        Share of images held out for the final scores (at least one image).
    holdout_images : tuple of str, optional
        Explicit held-out image ids (overrides ``holdout_fraction``).
    calibration_fraction : float, default=0.2
        Share of the remaining images used for early stopping and calibration.
    max_patches : int, default=300000
        Cap on the training patches (memory budget).
    min_votes : int, default=3
    workers : int, default=1
        Local worker processes for the tile loops (features, candidate readings,
        tuning and held-out scoring). With ``scheduler``, the run records the
        cluster's worker count here.
    scheduler : str, optional
        Address of a running Dask distributed scheduler (e.g.
        ``"tcp://10.0.0.5:8786"``): the tile loops run on its cluster instead of
        local processes, with the same results. Its workers must see the tile
        set (and the output folder's parent) by the same absolute paths.
    tau : float, default=0.05
        Coverage a patch needs to count as fan or spot for training. Below the
        engine's 0.15 default so that small spots (radius 5-15 px, 2-15 % of a
        64 px patch) still teach the classifier.
    rotations : tuple of int, default=(0, 1, 2, 3)
        Quarter-turn rotation augmentation of the training tiles.
    rotations_per_tile : int, optional
        How many of ``rotations`` each fitting tile is extracted in (the unturned
        one first, the others drawn). Default: all of them for up to
        ``all_rotations_below`` fitting tiles, else 2, so that large catalogs keep
        the augmentation at about twice the cost of no augmentation.
    all_rotations_below : int, default=200
    max_candidate_tiles : int, default=600
        Most fitting tile extractions read for the object classifier's candidates
        (drawn evenly over the two folds); a few thousand readings suffice, and
        reading candidates costs a second feature extraction.
    neg_ratio : float, default=3.0
    degrade : bool, default=True
        Photometric augmentation: the turned copies of fitting tiles are also
        blurred, made noisier and flatter (:data:`training.fitting.dataset.DEGRADE_RANGES`),
        for the patch, orientation and object models alike.
    max_iter : int, default=300
    learning_rate : float, default=0.1
    max_leaf_nodes : int, default=31
    """

    seed: int = 0
    holdout_fraction: float = 0.2
    holdout_images: tuple = ()
    calibration_fraction: float = 0.2
    max_patches: int = 300_000
    min_votes: int = DEFAULT_MIN_VOTES
    workers: int = 1
    scheduler: str = None
    tau: float = 0.05
    rotations: tuple = (0, 1, 2, 3)
    rotations_per_tile: int = None
    all_rotations_below: int = 200
    max_candidate_tiles: int = 600
    neg_ratio: float = 3.0
    degrade: bool = True
    max_iter: int = 300
    learning_rate: float = 0.1
    max_leaf_nodes: int = 31

    def __post_init__(self):
        if not 0.0 < self.holdout_fraction < 1.0:
            raise DetectorError(f"holdout fraction must be in (0, 1); got {self.holdout_fraction!r}.")
        if self.max_patches < 100:
            raise DetectorError(f"max patches must be at least 100; got {self.max_patches!r}.")
        if self.workers < 1:
            raise DetectorError(f"workers must be at least 1; got {self.workers!r}.")
        if self.scheduler is not None and (not isinstance(self.scheduler, str) or not self.scheduler.strip()):
            raise DetectorError(f"scheduler must be a Dask scheduler address such as 'tcp://10.0.0.5:8786'; "
                                f"got {self.scheduler!r}.")


def split_images(image_ids, *, holdout_fraction=0.2, holdout_images=(), calibration_fraction=0.2, seed=0):
    """Grouped split of image ids into fit, calibration and held-out images.

    Parameters
    ----------
    image_ids : sequence of str
        The distinct image ids of a tile set.

    Returns
    -------
    fit, calibration, holdout : list of str

    Raises
    ------
    TileSetError
        Fewer than three images (no grouped hold-out and calibration possible), or
        an unknown image in ``holdout_images``.
    """
    images = sorted(set(map(str, image_ids)))
    if len(images) < 3:
        raise TileSetError(
            f"the tile set has {len(images)} image(s) ({', '.join(images)}); training needs at least 3 so that "
            f"whole images can be held out for calibration and scoring."
        )
    rng = np.random.default_rng(seed)
    if holdout_images:
        unknown = sorted(set(holdout_images) - set(images))
        if unknown:
            raise TileSetError(f"held-out image(s) {unknown!r} are not in the tile set (found: {images!r}).")
        holdout = sorted(holdout_images)
        if len(holdout) > len(images) - 2:
            raise TileSetError(f"holding out {len(holdout)} of {len(images)} images leaves too few to fit and calibrate.")
    else:
        n_hold = min(max(1, int(round(holdout_fraction * len(images)))), len(images) - 2)
        holdout = sorted(rng.choice(images, size=n_hold, replace=False).tolist())
    rest = [i for i in images if i not in holdout]
    n_cal = min(max(1, int(round(calibration_fraction * len(rest)))), len(rest) - 1)
    calibration = sorted(rng.choice(rest, size=n_cal, replace=False).tolist())
    fit = [i for i in rest if i not in calibration]
    return fit, calibration, holdout


def calibration_scores(proba, y, *, n_bins=15):
    """Brier score (mean over patches of the summed squared error) and top-label ECE.

    Parameters
    ----------
    proba : ndarray of shape (n, k)
    y : ndarray of shape (n,), int
    n_bins : int, default=15

    Returns
    -------
    scores : dict with 'brier' and 'ece'
    """
    proba = np.asarray(proba, dtype=np.float64)
    onehot = np.eye(proba.shape[1])[np.asarray(y, dtype=int)]
    brier = float(np.mean(np.sum((proba - onehot) ** 2, axis=1)))
    conf = proba.max(axis=1)
    correct = proba.argmax(axis=1) == y
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    which = np.clip(np.digitize(conf, edges[1:-1]), 0, n_bins - 1)
    ece = 0.0
    for b in range(n_bins):
        sel = which == b
        if sel.any():
            ece += sel.mean() * abs(correct[sel].mean() - conf[sel].mean())
    return {"brier": brier, "ece": float(ece)}


def fit_calibration(proba, y, *, weights=None):
    """Fit temperature and class biases minimising the weighted log loss.

    Returns
    -------
    calibration : Calibration
    """
    proba = np.clip(np.asarray(proba, dtype=np.float64), 1e-12, 1.0)
    y = np.asarray(y, dtype=int)
    weights = np.ones(len(y)) if weights is None else np.asarray(weights, dtype=float)
    logp = np.log(proba)
    k = proba.shape[1]

    def loss(theta):
        logits = logp / np.exp(theta[0]) + np.concatenate([[0.0], theta[1:]])
        logits -= logits.max(axis=1, keepdims=True)
        lse = np.log(np.exp(logits).sum(axis=1))
        return float(np.sum(weights * (lse - logits[np.arange(len(y)), y])) / weights.sum())

    result = minimize(loss, np.zeros(k), method="Nelder-Mead", options={"maxiter": 2000, "xatol": 1e-4, "fatol": 1e-7})
    theta = result.x
    return Calibration(temperature=float(np.exp(theta[0])), bias=(0.0, *map(float, theta[1:])))


#: Features that change other than by sign when a patch is turned by 180 degrees (HOG
#: cells swap places, the signed histogram rolls); the orientation model does not read them.
FRAME_DEPENDENT_PREFIXES = ("hog_", SIGNED_HIST_PREFIX)


def orientation_feature_names(spec):
    """Features the orientation model reads: those that do not encode the image frame.

    Only features that are unchanged (or change sign, the odd ones) when a patch
    is turned by 180 degrees are kept, so that the axis-flip augmentation is
    exact and the model cannot learn which way fans usually point; it sees the
    dark mass relative to the axis and how strong and clear the local structure is.
    """
    return tuple(n for n in spec.feature_names if not n.startswith(FRAME_DEPENDENT_PREFIXES))


def orientation_training_set(X, axis_deg, fan_direction_deg, names, *, flip=True):
    """Polarity targets along the structure-tensor axis, with axis-flip augmentation.

    Parameters
    ----------
    X : ndarray of shape (n, n_features)
        Orientation inputs (columns ``names``) of fan patches.
    axis_deg, fan_direction_deg : ndarray of shape (n,)
    names : tuple of str
    flip : bool, default=True
        Add every patch again with the axis turned by 180 degrees: the odd
        features change sign and the target flips. This removes the prior of
        which way fans usually point.

    Returns
    -------
    X_out : ndarray, y : ndarray of int (1 = the fan runs along +axis)
    """
    y = (angular_difference(fan_direction_deg, axis_deg) < 90.0).astype(np.int64)
    if not flip:
        return X, y
    odd = np.array([n in POLARITY_ODD_FEATURES for n in names], dtype=bool)
    flipped = X.copy()
    flipped[:, odd] *= -1.0
    return np.concatenate([X, flipped]), np.concatenate([y, 1 - y])


def _fit_hgb(X, y, X_val, y_val, config, *, class_weight=None, log=None, what="model"):
    """Fit a HistGradientBoosting classifier with early stopping on (X_val, y_val).

    ``log`` (a print-like callable), when given, hears the fit's size before it starts and
    its iterations and seconds after: a long fit is otherwise silent. Logging changes no value.
    """
    import time

    from sklearn.ensemble import HistGradientBoostingClassifier

    if log is not None:
        log(f"fitting {what}: {X.shape[0]} rows x {X.shape[1]} features, {len(np.unique(y))} classes, "
            f"up to {config.max_iter} iterations...")
    start = time.perf_counter()

    model = HistGradientBoostingClassifier(
        max_iter=config.max_iter,
        learning_rate=config.learning_rate,
        max_leaf_nodes=config.max_leaf_nodes,
        early_stopping=True,
        n_iter_no_change=20,
        class_weight=class_weight,
        random_state=config.seed,
    )
    # Validation rows of a class the fitting rows lack cannot be scored by the model.
    seen = np.isin(y_val, np.unique(y))
    X_val, y_val = X_val[seen], y_val[seen]
    if len(np.unique(y_val)) < 2:
        model.set_params(validation_fraction=0.15)
        model.fit(X, y)
    else:
        model.fit(X, y, X_val=X_val, y_val=y_val)
    if log is not None:
        log(f"fitted {what}: {model.n_iter_} iterations in {time.perf_counter() - start:.1f} s")
    return model


def _data_hash(tileset):
    digest = hashlib.sha256()
    for name in ("tiles.csv", "consensus.csv"):
        digest.update((Path(tileset.root) / name).read_bytes())
    return digest.hexdigest()


def _versions():
    import onnx
    import onnxruntime
    import skimage
    import sklearn
    import skl2onnx

    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scikit-learn": sklearn.__version__,
        "scikit-image": skimage.__version__,
        "skl2onnx": skl2onnx.__version__,
        "onnx": onnx.__version__,
        "onnxruntime": onnxruntime.__version__,
    }


def fit_unfamiliarity(summaries, *, n_components=8, quantile=0.99, margin=1.25):
    """Fit the out-of-distribution statistics of per-tile mean feature vectors.

    Parameters
    ----------
    summaries : ndarray of shape (n_tiles, n_features)
        Mean patch features of the training tiles.
    n_components : int, default=8
    quantile : float, default=0.99
    margin : float, default=1.25
        The threshold is this factor times the ``quantile`` of the training distances.

    Returns
    -------
    stats : dict
        JSON-ready; read by :func:`detector.inference.unfamiliar.unfamiliarity_score`.
    """
    Z = np.asarray(summaries, dtype=np.float64)
    mean = Z.mean(axis=0)
    scale = Z.std(axis=0)
    scale[scale < 1e-9] = 1.0
    Zs = (Z - mean) / scale
    _, s, vt = np.linalg.svd(Zs, full_matrices=False)
    k = int(min(n_components, len(s)))
    comps = vt[:k]
    resid = Zs - (Zs @ comps.T) @ comps
    stats = {
        "mean": mean.tolist(),
        "scale": scale.tolist(),
        "components": comps.tolist(),
        "variances": ((s[:k] ** 2) / max(len(Z) - 1, 1) + 1e-6).tolist(),
        "resid_scale": max(float(np.median(np.sum(resid**2, axis=1))), 1e-6),
    }
    stats["threshold"] = float(margin * np.quantile(unfamiliarity_distance(stats, Z), quantile))
    return stats


def train_model(tileset_root, out, config=TrainConfig(), *, spec=None, force=False, log=print):
    """Train, calibrate, export and score a model; write the model folder atomically.

    Parameters
    ----------
    tileset_root : path-like
        A tile set with consensus.
    out : path-like
        Model folder to create (must not exist unless ``force``).
    config : TrainConfig
    spec : FeatureSpec, optional
        Default: ``FeatureSpec()``.
    force : bool, default=False
        Replace an existing model folder.
    log : callable
        Receives progress lines.

    Returns
    -------
    card : dict
        The model card written as ``model.json``.
    """
    started = time.perf_counter()
    out = Path(out)
    spec = spec or FeatureSpec()
    if out.exists() and any(out.iterdir()) and not force:
        raise DetectorError(f"output folder {str(out)!r} is not empty; choose another or pass --force.")
    # The cluster is reached before anything is written: a scheduler that is not there leaves no trace.
    with _tile_workers(config, log) as config:
        return _train(tileset_root, out, config, spec, log, started)


@contextlib.contextmanager
def _tile_workers(config, log):
    """The run's config with the workers its tile loops have: local processes, or (inside the
    connection) the cluster of ``config.scheduler``, whose worker count replaces ``workers``."""
    if config.scheduler is None:
        log(f"workers: {config.workers} local process{'es' if config.workers > 1 else ''}")
        yield config
        return
    with on_cluster(config.scheduler) as cluster:
        log(f"workers: {cluster['workers']} on the Dask cluster of {config.scheduler} "
            f"({cluster['threads']} thread{'s' if cluster['threads'] > 1 else ''})")
        yield replace(config, workers=cluster["workers"])


def _train(tileset_root, out, config, spec, log, started):
    """The body of :func:`train_model` once the tile loops' workers are known: its steps in order."""
    _check_output_parent(out)
    tileset, split = _load_and_split(tileset_root, config, log)
    patches = _patch_sets(tileset_root, tileset, split, spec, config, log)
    patch_model = _fit_patch_classifier(patches, config, log)
    orientation = _fit_orientation_model(patches, spec, config, log)
    objects = _fit_object_classifier(tileset, split, patches, patch_model, orientation, spec, config, log)
    onnx = _export(patches, patch_model, orientation, objects, config, log)
    card = _model_card(tileset_root, tileset, split, patches, patch_model, orientation, objects, onnx, spec, config)
    _write_model_folder(out, card, onnx, tileset, split, patches, objects, config, log, started)
    return card


@dataclass(frozen=True)
class _Split:
    """The images of each group and their tiles; ``fit_fans`` are the consensus fans of the fitting tiles."""

    fit: list
    calibration: list
    holdout: list
    ids: dict
    fit_fans: object


@dataclass(frozen=True)
class _Patches:
    """Fitting and calibration patch sets, the fitting tiles' summaries and noise range, rotations drawn
    per fitting tile."""

    train: object
    val: object
    fit_summaries: object
    per_tile: int
    noise_range: object = None


@dataclass(frozen=True)
class _PatchModel:
    """The patch classifier, its calibration and the calibration scores before and after."""

    classifier: object
    calibration: object
    before: dict
    after: dict


@dataclass(frozen=True)
class _Orientation:
    """The orientation model, its feature names and their columns, and how many rows it learned from."""

    model: object
    names: tuple
    index: np.ndarray
    n_rows: int


@dataclass(frozen=True)
class _Objects:
    """The object classifier, the readings it learned from and was stopped on, assembly and direction confidence."""

    model: object
    fit: object
    val: object
    params: object
    confidence: dict
    cal_sample: list
    context: object
    context_fit_rows: np.ndarray
    context_crossed: bool
    refine: dict = None
    refine_check: dict = None
    turn: object = None


@dataclass(frozen=True)
class _Onnx:
    """The exported models and the parity of each with its scikit-learn original."""

    detector: bytes
    orientation: bytes
    objects: bytes
    context: bytes
    parity: dict
    turn: bytes = None


def _check_output_parent(out):
    """Create the model folder's parent; refuse one that cannot be created or written.

    Parameters
    ----------
    out : Path
        The model folder.
    """
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise DetectorError(f"output folder {str(out)!r} cannot be created: {err.strerror}.") from err
    if not _writable(out.parent):
        raise DetectorError(f"output folder {str(out.parent)!r} is not writable.")


def _load_and_split(tileset_root, config, log):
    """Load the tile set and split its images into fit, calibration and held-out groups.

    Parameters
    ----------
    tileset_root : path-like
    config : TrainConfig
    log : callable

    Returns
    -------
    tileset : TileSet
        Loaded from the absolute path, as workers in other folders (a Dask cluster's) must find
        the same images.
    split : _Split
    """
    tileset = load_tileset(Path(tileset_root).absolute(), min_votes=config.min_votes)
    if len(tileset.tiles) == 0:
        raise TileSetError(f"tile set {str(tileset_root)!r} has no tiles.")
    fit_img, cal_img, hold_img = split_images(
        tileset.tiles["image_id"], holdout_fraction=config.holdout_fraction,
        holdout_images=tuple(config.holdout_images), calibration_fraction=config.calibration_fraction,
        seed=config.seed,
    )
    tiles = tileset.tiles
    ids = {name: tiles.loc[tiles["image_id"].isin(group), "tile_id"].tolist()
           for name, group in (("fit", fit_img), ("calibration", cal_img), ("holdout", hold_img))}
    fit_fans = tileset.consensus[tileset.consensus["tile_id"].isin(ids["fit"]) & (tileset.consensus["kind"] == "fan")]
    if fit_fans.empty:
        raise TileSetError(
            f"tile set {str(tileset_root)!r} has no fans in its fitting images {fit_img!r}; "
            f"the orientation model needs consensus fans."
        )
    log(f"images: fit {len(fit_img)}, calibration {len(cal_img)}, held out {len(hold_img)} ({', '.join(hold_img)})")
    return tileset, _Split(fit_img, cal_img, hold_img, ids, fit_fans)


def _patch_sets(tileset_root, tileset, split, spec, config, log):
    """Patch features and targets of the fitting tiles (turned copies, sampled) and the calibration tiles.

    Parameters
    ----------
    tileset_root : path-like
        The tile set as given (for messages).
    tileset : TileSet
    split : _Split
    spec : FeatureSpec
    config : TrainConfig
    log : callable

    Returns
    -------
    patches : _Patches
    """
    per_tile = config.rotations_per_tile
    if per_tile is None:
        per_tile = len(config.rotations) if len(split.ids["fit"]) < config.all_rotations_below else 2
    fit_jobs = rotation_jobs(split.ids["fit"], config.rotations, per_tile=per_tile, seed=config.seed)
    train, _, fit_summaries, fit_noise = build_patch_set(tileset, split.ids["fit"], spec, tau=config.tau, jobs=fit_jobs,
                                              seed=config.seed, neg_ratio=config.neg_ratio,
                                              max_patches=config.max_patches, workers=config.workers,
                                              desc="fit features", degrade=config.degrade)
    missing = [name for c, name in enumerate(CLASS_NAMES) if not np.any(train.cls == c)]
    if missing:
        raise TileSetError(
            f"tile set {str(tileset_root)!r} has no {' or '.join(missing)} patches (coverage >= tau {config.tau}) "
            f"in its fitting images {split.fit!r}; the patch classifier needs every class: add images or hold out "
            f"others."
        )
    # Calibration wants the true class mix, so its patches are a uniform sample (capped for memory).
    val, _, _, _ = build_patch_set(tileset, split.ids["calibration"], spec, tau=config.tau, rotations=(0,),
                                seed=config.seed + 1, sample=False, keep_tiles=False,
                                max_patches=config.max_patches, workers=config.workers,
                                desc="calibration features")
    log(f"patches: fit {len(train)} ({np.bincount(train.cls, minlength=3).tolist()} none/fan/spot), "
        f"calibration {len(val)}")
    noise_range = NoiseRange.of_tiles(fit_noise)
    if noise_range is not None:
        log(f"noise: fitting tiles {255 * np.nanmedian(fit_noise):.2f} grey levels (median); a tile above "
            f"{255 * noise_range.limit:.2f} is smoothed to {255 * noise_range.target:.2f} before detection")
    return _Patches(train, val, fit_summaries, per_tile, noise_range)


def _fit_patch_classifier(patches, config, log):
    """Fit the patch classifier (stopped early on the calibration patches) and calibrate it.

    Parameters
    ----------
    patches : _Patches
    config : TrainConfig
    log : callable

    Returns
    -------
    patch_model : _PatchModel
    """
    train, val = patches.train, patches.val
    classifier = _fit_hgb(train.X, train.cls, val.X, val.cls, config, log=log, what="patch classifier")
    raw_val = classifier.predict_proba(val.X)
    calibration = fit_calibration(raw_val, val.cls)
    cal_before = calibration_scores(raw_val, val.cls)
    cal_after = calibration_scores(calibration.apply(raw_val), val.cls)
    log(f"classifier: {classifier.n_iter_} iterations; calibration Brier {cal_before['brier']:.4f} -> "
        f"{cal_after['brier']:.4f}, ECE {cal_before['ece']:.4f} -> {cal_after['ece']:.4f}")
    return _PatchModel(classifier, calibration, cal_before, cal_after)


def _fit_orientation_model(patches, spec, config, log):
    """Fit the orientation model on the fan patches, each also with its axis flipped.

    Parameters
    ----------
    patches : _Patches
    spec : FeatureSpec
    config : TrainConfig
    log : callable

    Returns
    -------
    orientation : _Orientation
    """
    train, val = patches.train, patches.val
    names = orientation_feature_names(spec)
    index = np.array([spec.feature_names.index(n) for n in names])
    fan_fit = (train.cls == 1) & np.isfinite(train.fan_direction_deg)
    fan_val = (val.cls == 1) & np.isfinite(val.fan_direction_deg)
    Xo, yo = orientation_training_set(train.X[fan_fit][:, index], train.axis_deg[fan_fit],
                                      train.fan_direction_deg[fan_fit], names)
    Xov, yov = orientation_training_set(val.X[fan_val][:, index], val.axis_deg[fan_val],
                                        val.fan_direction_deg[fan_val], names)
    orientation = _fit_hgb(Xo, yo, Xov, yov, config, log=log, what="orientation model")
    return _Orientation(orientation, names, index, len(yo))


def _fit_object_classifier(tileset, split, patches, patch_model, orientation, spec, config, log):
    """Fit the object classifier on out-of-fold candidate readings; stop it on the calibration tiles' readings.

    The object classifier learns from candidates whose patch maps come from models that never saw
    their image (two folds over the fitting images), like new images will.

    Parameters
    ----------
    tileset : TileSet
    split : _Split
    patches : _Patches
    patch_model : _PatchModel
    orientation : _Orientation
    spec : FeatureSpec
    config : TrainConfig
    log : callable

    Returns
    -------
    objects : _Objects
    """
    params = AssemblyParams()
    cand_fit = _out_of_fold_candidates(tileset, split.ids, split.fit, patches.train, patches.val, orientation.names,
                                       orientation.index, spec, config, params, log, patches.per_tile,
                                       patch_model.classifier.n_iter_)
    full_patches = _CalibratedPredictor(patch_model.classifier, patch_model.calibration)
    full_polarity = _PolarityPredictor(orientation.model, orientation.index)
    cal_sample = _tile_sample(split.ids["calibration"], config.max_candidate_tiles, config.seed + 5)
    cand_val = candidate_set(tileset, cal_sample, spec, full_patches, full_polarity, params,
                             workers=config.workers, desc="calibration candidates", noise_range=patches.noise_range)
    object_model = _fit_hgb(cand_fit.F, cand_fit.label, cand_val.F, cand_val.label, config, log=log,
                            what="object classifier")
    confidence_fit = fit_direction_confidence(cand_fit)
    # The refinement learns from the out-of-fold fitting readings (read by patch models fitted without
    # their images, about ten times as many right readings as the calibration images give) and is
    # checked on the calibration readings, read by the final models as new images will be.
    refine, refine_check, turn_model = fit_refine_checked(cand_fit, cand_val, log, seed=config.seed)
    log(f"objects: {len(cand_fit)} candidate readings ({int(cand_fit.label.sum())} right), "
        f"{object_model.n_iter_} iterations")
    context_model, Z_fit, crossed = _fit_context_classifier(cand_fit, cand_val, object_model, config, log)
    return _Objects(object_model, cand_fit, cand_val, params, confidence_fit, cal_sample, context_model, Z_fit,
                    crossed, refine, refine_check, turn_model)


#: Assembly settings the card detects with where they differ from the ones its readings are learnt at
#: (the assembly's defaults, kept in the card's ``training.readings``): vents are the peaks of the
#: darkness smoothed at 2 px instead of 3. A second vent close to another, or a vent's short second
#: fan, then gets readings of its own, which the classifiers learnt on the coarser readings score
#: well; learning at 2 px as well gained nothing a retrain with another seed does not move, and a
#: vent's modes split from 6 % of its weight instead of 8 % at detection lost shifted fan F1 (README,
#: "Benchmark").
DETECTION_ASSEMBLY = {"vent_smooth_px": 2.0}

#: Folds (by image) of the object classifier whose out-of-fold scores the context model learns from.
CONTEXT_FOLDS = 3


def _fit_context_classifier(cand_fit, cand_val, object_model, config, log):
    """Fit the context model on the fitting readings' out-of-fold first scores; stop it on the calibration readings.

    The first score of a fitting reading comes from an object classifier fitted without its image
    (:data:`CONTEXT_FOLDS` folds by image, as many iterations as the full one), so the context model
    learns how far to trust first scores of images the object classifier never saw, as at run time.

    Returns
    -------
    model : HistGradientBoostingClassifier
    Z_fit : ndarray
        Its fitting rows (for the ONNX parity probe).
    crossed : bool
        False when the fitting readings held too few images or classes to cross-fit: their
        first scores are then in-sample (said in the card).
    """
    from sklearn.model_selection import GroupKFold

    first = np.zeros(len(cand_fit), dtype=np.float64)
    images = np.unique(cand_fit.image_id)
    crossed = len(images) >= 2 and len(np.unique(cand_fit.label)) == 2
    if crossed:
        folds = GroupKFold(n_splits=min(CONTEXT_FOLDS, len(images)))
        fold_config = replace(config, max_iter=max(1, int(object_model.n_iter_)))
        for k, (rest, held) in enumerate(folds.split(cand_fit.F, cand_fit.label, cand_fit.image_id)):
            if len(np.unique(cand_fit.label[rest])) < 2:
                crossed = False
                break
            fold = _fit_hgb(cand_fit.F[rest], cand_fit.label[rest], cand_val.F, cand_val.label, fold_config,
                            log=log, what=f"fold {k + 1}/{folds.n_splits} object classifier")
            first[held] = fold.predict_proba(cand_fit.F[held])[:, 1]
    if not crossed:
        first = object_model.predict_proba(cand_fit.F)[:, 1] if len(cand_fit) else first
    Z_fit = context_rows(cand_fit, first)
    val_first = object_model.predict_proba(cand_val.F)[:, 1] if len(cand_val) else np.zeros(0)
    Z_val = context_rows(cand_val, val_first)
    model = _fit_hgb(Z_fit, cand_fit.label, Z_val, cand_val.label, config, log=log, what="context model")
    return model, Z_fit, crossed


def _export(patches, patch_model, orientation, objects, config, log):
    """Export the three models to ONNX and measure each one's parity with scikit-learn.

    Parameters
    ----------
    patches : _Patches
    patch_model : _PatchModel
    orientation : _Orientation
    objects : _Objects
    config : TrainConfig
    log : callable

    Returns
    -------
    onnx : _Onnx
    """
    train, index, cand_fit = patches.train, orientation.index, objects.fit
    det_bytes = to_onnx_bytes(patch_model.classifier, train.X.shape[1])
    ori_bytes = to_onnx_bytes(orientation.model, len(index))
    obj_bytes = to_onnx_bytes(objects.model, cand_fit.F.shape[1])
    ctx_bytes = to_onnx_bytes(objects.context, objects.context_fit_rows.shape[1])
    rng = np.random.default_rng(config.seed)
    probe = train.X[rng.choice(len(train), size=min(2000, len(train)), replace=False)]
    parity = {
        "detector_max_abs_diff": onnx_parity(det_bytes, patch_model.classifier, probe),
        "orientation_max_abs_diff": onnx_parity(ori_bytes, orientation.model, probe[:, index]),
        "objects_max_abs_diff": onnx_parity(obj_bytes, objects.model, cand_fit.F[:2000]),
        "context_max_abs_diff": onnx_parity(ctx_bytes, objects.context, objects.context_fit_rows[:2000]),
    }
    turn_bytes = None
    if objects.turn is not None:
        turn_rows = refine_design(cand_fit.F[:2000], cand_fit.own_size[:2000])
        turn_bytes = regressor_to_onnx_bytes(objects.turn, turn_rows.shape[1])
        parity["turn_max_abs_diff_deg"] = onnx_regression_parity(turn_bytes, objects.turn, turn_rows)
    log(f"ONNX parity (max abs difference of probabilities): detector {parity['detector_max_abs_diff']:.2e}, "
        f"orientation {parity['orientation_max_abs_diff']:.2e}, objects {parity['objects_max_abs_diff']:.2e}, "
        f"context {parity['context_max_abs_diff']:.2e}"
        + (f"; turn {parity['turn_max_abs_diff_deg']:.2e} deg" if turn_bytes else ""))
    return _Onnx(det_bytes, ori_bytes, obj_bytes, ctx_bytes, parity, turn_bytes)


def _model_card(tileset_root, tileset, split, patches, patch_model, orientation, objects, onnx, spec, config):
    """The model card before the ONNX files are written and the held-out images are scored.

    Returns
    -------
    card : dict
        Everything but ``files``, ``unfamiliarity``, the tuned ``min_score``, ``assembly_tuning``,
        the held-out scores and ``training.seconds`` (added by :func:`_write_model_folder`).
    """
    train, val, names = patches.train, patches.val, orientation.names
    classifier, calibration = patch_model.classifier, patch_model.calibration
    cand_fit, cand_val = objects.fit, objects.val
    return {
        "format_version": MODEL_FORMAT_VERSION,
        "created_by": "frostvane train",
        "class_names": list(CLASS_NAMES),
        "feature_spec": json.loads(spec.to_json()),
        "feature_names": list(spec.feature_names),
        "orientation_features": list(names),
        "odd_features": [n for n in names if n in POLARITY_ODD_FEATURES],
        "calibration": {"temperature": calibration.temperature, "bias": list(calibration.bias),
                        "before": patch_model.before, "after": patch_model.after, "images": split.calibration},
        "assembly": asdict(replace(objects.params, **DETECTION_ASSEMBLY)),
        "object_features": list(OBJECT_FEATURE_NAMES),
        "context_features": list(CONTEXT_FEATURE_NAMES),
        "direction_confidence": objects.confidence,
        "refine_model": objects.refine,
        "refine_turn": _turn_entry(objects),
        "noise": _noise_entry(patches.noise_range),
        "pixel_scale": _scale_entry(tileset, split.ids["fit"]),
        "training": {
            "config": {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(config).items()},
            "tileset": str(tileset_root),
            "data_sha256": _data_hash(tileset),
            "images": {"fit": split.fit, "calibration": split.calibration, "holdout": split.holdout},
            "tiles": {k: len(v) for k, v in split.ids.items()},
            "patches": {"fit": int(len(train)), "fit_by_class": np.bincount(train.cls, minlength=3).tolist(),
                        "calibration": int(len(val)), "orientation": int(orientation.n_rows)},
            "classifier_iterations": int(classifier.n_iter_),
            "orientation_iterations": int(orientation.model.n_iter_),
            "object_iterations": int(objects.model.n_iter_),
            "context_iterations": int(objects.context.n_iter_),
            "context_first_scores": "out of fold" if objects.context_crossed else "in sample",
            "readings": {"fit": int(len(cand_fit)), "fit_right": int(cand_fit.label.sum()),
                         "calibration": int(len(cand_val)),
                         "assembly": {k: getattr(objects.params, k) for k in DETECTION_ASSEMBLY}},
            "refine_model_check": objects.refine_check,
            "onnx_parity": onnx.parity,
            "versions": _versions(),
            "seed": config.seed,
            # Prevailing direction of the fitting fans: the one-direction-for-all baseline.
            "prevailing_deg": float(circular_mean(split.fit_fans["direction_deg"].to_numpy(float))),
        },
    }


def _turn_entry(objects):
    """The card's ``refine_turn``: what ``turn.onnx`` reads and how it was fitted, or None (no boosted turn)."""
    if objects.turn is None:
        return None
    return {"file": TURN_ONNX, "features": list(REFINE_FEATURE_NAMES), "params": dict(TURN_MODEL_PARAMS),
            "target_clip_deg": REFINE_TURN_CLIP_DEG, "max_turn_deg": MAX_TURN_DEG,
            "n": int(np.sum((objects.fit.label == 1) & objects.fit.is_fan & np.isfinite(objects.fit.turn_deg))),
            "iterations": int(objects.turn.n_iter_)}


def _scale_entry(tileset, fit_ids):
    """The card's ``pixel_scale``: the fitting tiles' ground scale, or None when tiles.csv gives none
    (every tile is then read at its own scale)."""
    found = PixelScale.of_tiles([tileset.metres_per_px(tile_id) for tile_id in fit_ids])
    return None if found is None else found.to_card()


def _noise_entry(noise_range):
    """The card's ``noise``: the fitting tiles' noise range, or None (nothing is ever smoothed)."""
    if noise_range is None:
        return None
    return {"limit": noise_range.limit, "target": noise_range.target,
            "units": "fraction of the full grey scale (x 255: 8-bit grey levels)", "method": NOISE_METHOD}


def _write_model_folder(out, card, onnx, tileset, split, patches, objects, config, log, started):
    """Write the model folder atomically: the ONNX files, then the card as tuning and held-out scoring complete it.

    Object assembly is tuned on the calibration images, then the held-out images are scored, both
    through the exported ONNX files exactly as users will run them. ``card`` is completed in place.
    """
    with atomic_dir(out, replace=True) as tmp:
        (tmp / DETECTOR_ONNX).write_bytes(onnx.detector)
        (tmp / ORIENTATION_ONNX).write_bytes(onnx.orientation)
        (tmp / OBJECTS_ONNX).write_bytes(onnx.objects)
        (tmp / CONTEXT_ONNX).write_bytes(onnx.context)
        names = ONNX_FILES
        if onnx.turn is not None:
            (tmp / TURN_ONNX).write_bytes(onnx.turn)
            names = ONNX_FILES + (TURN_ONNX,)
        card["files"] = {name: sha256_file(tmp / name) for name in names}
        fit_summaries = patches.fit_summaries
        card["unfamiliarity"] = fit_unfamiliarity(fit_summaries) if len(fit_summaries) >= 3 else None
        (tmp / MODEL_CARD).write_text(json.dumps(card, indent=1))
        tuning = tune_assembly(tmp, tileset, objects.cal_sample, log=log, workers=config.workers)
        card["assembly"]["min_score"] = tuning["min_score"]
        card["assembly_tuning"] = tuning["table"]
        card["assembly_tuning_rule"] = {"rule": "least strict whose shortfall from the best mean F1 is within one "
                                                "paired bootstrap standard error of that shortfall, or within the "
                                                "tolerance",
                                        "best_min_score": tuning["best_min_score"],
                                        "standard_error": tuning["standard_error"],
                                        "tolerance": tuning["tolerance"]}
        (tmp / MODEL_CARD).write_text(json.dumps(card, indent=1))
        heldout = evaluate_tiles(tmp, tileset, split.ids["holdout"], log=log, workers=config.workers)
        card["heldout_metrics"] = summarise_for_card(heldout)
        card["heldout_tiles"] = heldout["per_tile"]
        _unfamiliarity_from_heldout(card)
        card["training"]["seconds"] = round(time.perf_counter() - started, 1)
        (tmp / MODEL_CARD).write_text(json.dumps(card, indent=1))


def _unfamiliarity_from_heldout(card, pass_share=DEFAULT_PASS_SHARE):
    """Move the unfamiliarity threshold to where ``pass_share`` of the held-out tiles pass.

    The training-set threshold is set on the tiles the statistics were fitted on,
    which look more familiar than new tiles of the same kind; the held-out tiles
    stand for those. Their scores are rescaled in place to the new threshold.
    """
    stats = card.get("unfamiliarity")
    scores = np.array([np.nan if t.get("unfamiliarity") is None else t["unfamiliarity"]
                       for t in card["heldout_tiles"]], dtype=np.float64)
    factor = pass_threshold(scores, pass_share) if stats else float("nan")
    if not (np.isfinite(factor) and factor > 0):
        return
    stats["threshold_fit"] = stats["threshold"]
    stats["threshold"] = float(stats["threshold"] * factor)
    stats["pass_share"] = float(pass_share)
    stats["threshold_from"] = "held-out tiles"
    for tile, score in zip(card["heldout_tiles"], scores):
        if np.isfinite(score):
            tile["unfamiliarity"] = float(score / factor)


def _tile_sample(tile_ids, cap, seed):
    """At most ``cap`` of the tiles, drawn at random (in their order); all when fewer."""
    tile_ids = list(tile_ids)
    if len(tile_ids) <= cap:
        return tile_ids
    keep = np.sort(np.random.default_rng(seed).choice(len(tile_ids), size=cap, replace=False))
    return [tile_ids[i] for i in keep]


class _CalibratedPredictor:
    """Calibrated patch probabilities from a scikit-learn classifier (picklable for workers)."""

    def __init__(self, estimator, calibration):
        self.estimator = estimator
        self.calibration = calibration

    def __call__(self, X):
        return self.calibration.apply(self.estimator.predict_proba(X))


class _PolarityPredictor:
    """Polarity probabilities from a scikit-learn orientation model on its feature columns."""

    def __init__(self, estimator, index):
        self.estimator = estimator
        self.index = index

    def __call__(self, X):
        return self.estimator.predict_proba(np.ascontiguousarray(X[:, self.index]))[:, 1].astype(np.float32)


def _orientation_rows(patches, mask, index, names):
    fan = mask & (patches.cls == 1) & np.isfinite(patches.fan_direction_deg)
    return orientation_training_set(patches.X[fan][:, index], patches.axis_deg[fan],
                                    patches.fan_direction_deg[fan], names)


def _out_of_fold_candidates(tileset, ids, fit_img, train, val, names, index, spec, config, params, log, per_tile,
                            n_iter):
    rng = np.random.default_rng(config.seed + 7)
    order = list(rng.permutation(fit_img))
    folds = [order[0::2], order[1::2]] if len(order) >= 2 else [order]
    Xov, yov = _orientation_rows(val, np.ones(len(val), bool), index, names)
    parts = []
    for k, held in enumerate(folds):
        rest = [i for i in fit_img if i not in held] or list(held)  # one image: in-sample, said in the card
        mask = np.isin(train.image_id, rest)
        if len(np.unique(train.cls[mask])) < len(CLASS_NAMES):
            # A fold of a small catalog can lack a class (no spot in half its images): its model
            # could not give the three probabilities, so this fold is read in-sample, like one image.
            mask = np.isin(train.image_id, fit_img)
        # Fold models only stand in for the full one on unseen images: no more boosting
        # iterations than it needed.
        clf = _fit_hgb(train.X[mask], train.cls[mask], val.X, val.cls, replace(config, max_iter=n_iter), log=log,
                       what=f"fold {k + 1}/{len(folds)} patch classifier")
        cal = fit_calibration(clf.predict_proba(val.X), val.cls)
        Xo, yo = _orientation_rows(train, mask, index, names)
        ori = (_fit_hgb(Xo, yo, Xov, yov, config, log=log, what=f"fold {k + 1}/{len(folds)} orientation model")
               if len(np.unique(yo)) > 1 else None)
        polarity = _PolarityPredictor(ori, index) if ori is not None else (lambda X: np.full(len(X), 0.5, np.float32))
        held_tiles = tileset.tiles.loc[tileset.tiles["image_id"].isin(held), "tile_id"].tolist()
        jobs = rotation_jobs(held_tiles, config.rotations, per_tile=per_tile, seed=config.seed + 3)
        cap = max(1, config.max_candidate_tiles // len(folds))
        if len(jobs) > cap:
            keep = np.sort(rng.choice(len(jobs), size=cap, replace=False))
            jobs = [jobs[i] for i in keep]
        parts.append(candidate_set(tileset, held_tiles, spec, _CalibratedPredictor(clf, cal), polarity, params,
                                 workers=config.workers, jobs=jobs, desc="out-of-fold candidates",
                                 degrade=config.degrade))
    return CandidateSet.concat(parts)


def _writable(folder):
    import os

    return os.access(folder, os.W_OK)


def format_card_summary(card, folder):
    """One screen about a trained model: data, split, calibration and held-out scores."""
    t = card["training"]
    h = card.get("heldout_metrics", {})

    def f(v, d=2):
        return "n/a" if v is None else f"{v:.{d}f}"

    lines = [
        f"model written to {folder}",
        f"  tiles: fit {t['tiles']['fit']}, calibration {t['tiles']['calibration']}, held out {t['tiles']['holdout']}"
        f" (images held out: {', '.join(t['images']['holdout'])})",
        f"  patches: {t['patches']['fit']} fit (none/fan/spot {t['patches']['fit_by_class']}), "
        f"{t['patches']['orientation']} orientation",
        f"  calibration: Brier {f(card['calibration']['before']['brier'], 4)} -> {f(card['calibration']['after']['brier'], 4)}, "
        f"ECE {f(card['calibration']['before']['ece'], 4)} -> {f(card['calibration']['after']['ece'], 4)}",
        f"  ONNX parity: {t['onnx_parity']['detector_max_abs_diff']:.1e} / {t['onnx_parity']['orientation_max_abs_diff']:.1e}",
        f"  held out: fan F1 {f(h.get('fan_f1'))}, spot F1 {f(h.get('spot_f1'))}, fan direction median "
        f"{f(h.get('fan_direction_median_deg'), 1)} deg (p90 {f(h.get('fan_direction_p90_deg'), 1)}), "
        f"flip rate {f(h.get('flip_rate'), 3)}",
        f"  {t.get('seconds', 'n/a')} s, {_workers_text(t['config'])}",
    ]
    return "\n".join(lines)


def _workers_text(config):
    """How a run's tile loops ran, from its card's config (cards before the scheduler option lack it)."""
    workers = config.get("workers", 1)
    where = f" on the Dask cluster of {config['scheduler']}" if config.get("scheduler") else " (local)"
    return f"{workers} worker{'s' if workers != 1 else ''}{where}"
