"""Training data for the object classifier and the polarity stacker: labelled candidates.

Candidates (dark components, see :mod:`detector.assemble`) are labelled by
matching their fan and spot readings to consensus with the evaluation's own
matching rules, so the object classifier learns exactly what is scored.
"""

from dataclasses import dataclass

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from tqdm.auto import tqdm

from detector.assemble import OBJECT_FEATURE_NAMES, POLARITY_FEATURE_NAMES, candidate_rows
from detector.detect import tile_candidates, tile_maps
from detector.features import extract_features
from detector.geometry import angular_difference

from .scoring import match_objects

__all__ = ["CandidateSet", "label_candidates", "candidate_set", "fit_polarity_coef"]


@dataclass
class CandidateSet:
    """Object features and labels of candidates from many tiles.

    Attributes
    ----------
    F : ndarray of shape (n, len(OBJECT_FEATURE_NAMES)), float32
    label : ndarray of shape (n,), int
        0 nothing, 1 fan, 2 spot.
    polarity_y : ndarray of shape (n,), float
        For fans: 1 if the matched consensus fan runs along the candidate's +axis,
        0 if against it; NaN otherwise.
    image_id : ndarray of shape (n,), object
    """

    F: np.ndarray
    label: np.ndarray
    polarity_y: np.ndarray
    image_id: np.ndarray

    def __len__(self):
        return len(self.label)


def label_candidates(candidates, consensus, tile_id):
    """Label one tile's candidates against its consensus features.

    A candidate is a fan when any of its fan readings (either polarity) matches a
    consensus fan, else a spot when its spot reading matches a consensus spot,
    else nothing.

    Returns
    -------
    label : ndarray of int, polarity_y : ndarray of float
    """
    n = len(candidates)
    label = np.zeros(n, dtype=np.int64)
    polarity_y = np.full(n, np.nan)
    if n == 0 or consensus.empty:
        return label, polarity_y
    fans, spots = candidate_rows(candidates, tile_id)
    cons = consensus.reset_index(drop=True)
    readings = pd.concat([fans, spots], ignore_index=True)
    pairs = match_objects(readings, cons)
    kinds = readings.loc[pairs["det_index"].to_numpy(), "kind"].to_numpy()
    cand = readings.loc[pairs["det_index"].to_numpy(), "candidate"].to_numpy().astype(int)
    for k, c, ci in zip(kinds, cand, pairs["cons_index"].to_numpy()):
        if k == "fan":
            label[c] = 1
            along = angular_difference(cons.at[ci, "direction_deg"], candidates[c].axis_dir_deg) < 90.0
            polarity_y[c] = float(along)
        elif label[c] == 0:
            label[c] = 2
    return label, polarity_y


def _tile_candidates(tileset, tile_id, spec, predict_patches, predict_polarity, params):
    tile = tileset.read_tile(tile_id)
    nodata = tile == spec.nodata_value
    X, grid = extract_features(tile, spec, nodata_mask=nodata)
    maps = tile_maps(X, grid, tile.shape, spec, predict_patches, predict_polarity)
    candidates = tile_candidates(tile, nodata, maps, spec, params, both_polarities=True)
    label, polarity_y = label_candidates(candidates, tileset.features_of(tile_id), tile_id)
    F = np.array([c.features for c in candidates], dtype=np.float32).reshape(-1, len(OBJECT_FEATURE_NAMES))
    return F, label, polarity_y


def candidate_set(tileset, tile_ids, spec, predict_patches, predict_polarity, params, *, workers=1,
                  desc="candidates"):
    """Labelled candidates of some tiles under given patch and polarity predictors.

    Returns
    -------
    candidates : CandidateSet
    """
    image = tileset.tiles.set_index("tile_id")["image_id"]
    tile_ids = list(tile_ids)
    results = Parallel(n_jobs=workers, backend="loky" if workers > 1 else "sequential")(
        delayed(_tile_candidates)(tileset, tid, spec, predict_patches, predict_polarity, params)
        for tid in tqdm(tile_ids, desc=desc, unit="tile", leave=False)
    )
    if not results:
        return CandidateSet(np.zeros((0, len(OBJECT_FEATURE_NAMES)), np.float32), np.zeros(0, int),
                            np.zeros(0), np.zeros(0, object))
    return CandidateSet(
        F=np.concatenate([r[0] for r in results]),
        label=np.concatenate([r[1] for r in results]),
        polarity_y=np.concatenate([r[2] for r in results]),
        image_id=np.concatenate([np.full(len(r[1]), str(image[t]), dtype=object) for t, r in zip(tile_ids, results)]),
    )


def fit_polarity_coef(candidates, *, C=1.0):
    """Logistic weights of the polarity evidence, fitted on fan candidates with axis-flip augmentation.

    Every feature in :data:`POLARITY_FEATURE_NAMES` changes sign with the axis,
    so each fan is used twice (as is and flipped, target flipped) and the model
    has no intercept: it cannot prefer a direction of its own.

    Returns
    -------
    coef : tuple of float
    accuracy : float
        Share of fan candidates whose polarity the fitted weights get right (in sample).
    """
    from sklearn.linear_model import LogisticRegression

    fans = np.isfinite(candidates.polarity_y)
    if fans.sum() < 10:
        return None, None
    idx = [OBJECT_FEATURE_NAMES.index(n) for n in POLARITY_FEATURE_NAMES]
    Z = candidates.F[fans][:, idx].astype(np.float64)
    y = candidates.polarity_y[fans].astype(int)
    Zaug = np.concatenate([Z, -Z])
    yaug = np.concatenate([y, 1 - y])
    model = LogisticRegression(C=C, fit_intercept=False, max_iter=1000).fit(Zaug, yaug)
    accuracy = float(np.mean((Z @ model.coef_[0] > 0) == (y == 1)))
    return tuple(float(v) for v in model.coef_[0]), accuracy
