"""Patch datasets from a tile set with consensus: features, targets, hard-negative sampling."""

from dataclasses import dataclass

import numpy as np
from joblib import delayed
from tqdm.auto import tqdm

from detector.inference.detect import tile_summary_vector
from detector.tile import _dense
from detector.tile.features import _features_of_prepared, patch_targets
from detector.tile.spec import patch_axis_deg
from detector.labels import rasterise_features
from detector._allocator import reuse_freed_memory

from ..parallel import tile_parallel

__all__ = ["PatchSet", "TileFeatures", "tile_features", "build_patch_set", "rotate_labels", "rotation_jobs",
           "degrade_tile", "augmented_tile", "DEGRADE_RANGES"]


@dataclass
class TileFeatures:
    """Features and targets of every patch of one tile (one rotation).

    Attributes
    ----------
    tile_id, image_id : str
    rotation : int
        Quarter turns clockwise applied to the tile before extraction.
    X : ndarray of shape (n_patches, n_features), float32
    grid : PatchGrid
    cls : ndarray of shape (n_patches,), int8
        0 none, 1 fan, 2 spot.
    fan_cover_share, spot_cover_share : ndarray of shape (n_patches,)
    fan_direction_deg : ndarray of shape (n_patches,)
        Coverage-weighted circular mean consensus fan direction (NaN off fans).
    axis_deg : ndarray of shape (n_patches,)
        Structure-tensor axis, degrees mod 180.
    patch_darkness : ndarray of shape (n_patches,)
        Mean positive darkness over the window (used to find hard negatives).
    summary : ndarray of shape (n_features,)
        Mean feature vector over the tile's valid patches (before any sampling).
    noise : float
        The tile's noise as extracted (:func:`detector.tile.noise.noise_sigma`; a degraded copy's own).
    """

    tile_id: str
    image_id: str
    rotation: int
    X: np.ndarray
    grid: object
    cls: np.ndarray
    fan_cover_share: np.ndarray
    spot_cover_share: np.ndarray
    fan_direction_deg: np.ndarray
    axis_deg: np.ndarray
    patch_darkness: np.ndarray
    summary: np.ndarray
    noise: float = float("nan")


def rotate_labels(masks, quarter_turns):
    """Rotate label masks by quarter turns clockwise; directions turn with them (+90 each).

    Returns ``(fan_cover, spot_cover, fan_direction)`` arrays.
    """
    k = -int(quarter_turns)
    fan = np.rot90(masks.fan_cover, k)
    spot = np.rot90(masks.spot_cover, k)
    direction = (np.rot90(masks.fan_direction, k) + 90.0 * quarter_turns) % 360.0
    return np.ascontiguousarray(fan), np.ascontiguousarray(spot), np.ascontiguousarray(direction)


#: Photometric augmentation of the turned copies of a training tile: extra Gaussian blur (px), added
#: Gaussian noise (8-bit grey levels) and contrast gain about the tile's median. Ranges of a camera and
#: season other than the catalog's, so the models do not learn one image quality; drawn per copy.
DEGRADE_RANGES = {"blur_px": (0.0, 1.5), "noise_dn": (0.0, 3.0), "gain": (0.6, 1.0)}


def degrade_tile(tile, rng, *, nodata_value=0, ranges=None):
    """A copy of a tile as another camera or a later season would show it: blurred, noisier, flatter.

    Parameters
    ----------
    tile : ndarray of shape (M, N), uint8 or uint16
    rng : numpy.random.Generator
    nodata_value : int or None, default=0
        Pixels of this value stay no-data and do not enter the blur.
    ranges : dict, optional
        ``blur_px``, ``noise_dn``, ``gain`` ranges; default :data:`DEGRADE_RANGES`.

    Returns
    -------
    ndarray of the tile's shape and dtype
        Valid pixels stay >= 1 (never no-data).
    """
    from scipy import ndimage

    ranges = DEGRADE_RANGES if ranges is None else ranges
    tile = np.asarray(tile)
    top = float(np.iinfo(tile.dtype).max)
    dn = top / 255.0  # one 8-bit grey level in the tile's units
    valid = tile != nodata_value if nodata_value is not None else np.ones(tile.shape, bool)
    image = tile.astype(np.float32)
    sigma = rng.uniform(*ranges["blur_px"])
    if sigma > 0.05:
        weight = ndimage.gaussian_filter(valid.astype(np.float32), sigma)
        blurred = ndimage.gaussian_filter(np.where(valid, image, 0.0).astype(np.float32), sigma)
        image = np.divide(blurred, weight, out=image.copy(), where=weight > 1e-3)
    gain = rng.uniform(*ranges["gain"])
    centre = float(np.median(image[valid])) if valid.any() else 0.0
    image = centre + gain * (image - centre)
    image += rng.normal(0.0, rng.uniform(*ranges["noise_dn"]) * dn, tile.shape).astype(np.float32)
    out = np.clip(np.round(image), 1.0, top).astype(tile.dtype)
    out[~valid] = tile[~valid]
    return out


def augmented_tile(tile, tile_id, rotation, *, degrade=True, nodata_value=0):
    """The tile as a training job sees it: turned by ``rotation`` quarter turns clockwise and, for
    turned copies when ``degrade``, passed through :func:`degrade_tile` with a seed of its own
    (the same tile and turn always give the same copy)."""
    import zlib

    if rotation % 4 == 0:
        return tile
    turned = np.ascontiguousarray(np.rot90(tile, -rotation))
    if not degrade:
        return turned
    rng = np.random.default_rng(zlib.crc32(f"{tile_id}/{rotation % 4}".encode()))
    return degrade_tile(turned, rng, nodata_value=nodata_value)


def tile_features(tileset, tile_id, spec, *, rotation=0, tau=0.15, degrade=False):
    """Features and patch targets of one tile of a tile set.

    Parameters
    ----------
    tileset : detector.tileset.TileSet
    tile_id : str
    spec : FeatureSpec
    rotation : int, default=0
        Quarter turns clockwise (rotation augmentation).
    tau : float, default=0.15
        Coverage a patch needs to count as fan or spot.
    degrade : bool, default=False
        Also degrade turned copies (:func:`augmented_tile`).

    Returns
    -------
    features : TileFeatures
    """
    tile = tileset.read_tile(tile_id)
    masks = rasterise_features(tileset.features_of(tile_id), tile.shape)
    tile = augmented_tile(tile, tile_id, rotation, degrade=degrade, nodata_value=spec.nodata_value)
    fan, spot, direction = rotate_labels(masks, rotation % 4)
    nodata = tile == spec.nodata_value
    prep = _dense.prepare_tile(tile, spec, nodata)
    X, grid = _features_of_prepared(prep, spec)
    targets = patch_targets(grid, fan, spot, direction, tau=tau)
    image_id = str(tileset.tiles.set_index("tile_id").at[tile_id, "image_id"])
    return TileFeatures(
        tile_id=tile_id,
        image_id=image_id,
        rotation=rotation % 4,
        X=X,
        grid=grid,
        cls=np.asarray(targets.label, dtype=np.int8),
        fan_cover_share=np.asarray(targets.fan_cover_share, dtype=np.float32),
        spot_cover_share=np.asarray(targets.spot_cover_share, dtype=np.float32),
        fan_direction_deg=np.asarray(targets.fan_direction_deg, dtype=np.float32),
        axis_deg=np.asarray(patch_axis_deg(X, spec), dtype=np.float32),
        patch_darkness=X[:, spec.feature_names.index("int_dark")].astype(np.float32),
        summary=tile_summary_vector(X, np.asarray(grid.valid, dtype=bool)),
        noise=float(prep.noise),
    )


@dataclass
class PatchSet:
    """A sampled set of patches ready to fit.

    Attributes
    ----------
    X : ndarray of shape (n, n_features), float32
    cls : ndarray of shape (n,), int8
    fan_direction_deg, axis_deg, fan_cover_share : ndarray of shape (n,)
    image_id, tile_id : ndarray of shape (n,), object
    weight : ndarray of shape (n,)
        Inverse sampling rate of each patch, so weighted statistics match the full tile set.
    """

    X: np.ndarray
    cls: np.ndarray
    fan_direction_deg: np.ndarray
    axis_deg: np.ndarray
    fan_cover_share: np.ndarray
    image_id: np.ndarray
    tile_id: np.ndarray
    weight: np.ndarray

    def __len__(self):
        return len(self.cls)


def _sample_tile(tf, rng, *, neg_ratio, hard_share):
    valid = np.asarray(tf.grid.valid, dtype=bool)
    pos = np.flatnonzero(valid & (tf.cls > 0))
    neg = np.flatnonzero(valid & (tf.cls == 0))
    n_keep = int(min(len(neg), max(neg_ratio * len(pos), 8)))
    if n_keep >= len(neg):
        return np.concatenate([pos, neg]), np.ones(len(pos) + len(neg))
    # Hard negatives first: background touching deposits, then the darkest background
    # (channel networks, dark terrain); the rest drawn at random.
    touching = (tf.fan_cover_share[neg] + tf.spot_cover_share[neg]) > 0
    order = np.lexsort((-tf.patch_darkness[neg], ~touching))
    n_hard = int(hard_share * n_keep)
    hard = neg[order[:n_hard]]
    rest = neg[order[n_hard:]]
    easy = rng.choice(rest, size=n_keep - n_hard, replace=False)
    weight_easy = len(rest) / max(len(easy), 1)
    idx = np.concatenate([pos, hard, easy])
    weight = np.concatenate([np.ones(len(pos) + len(hard)), np.full(len(easy), weight_easy)])
    return idx, weight


def rotation_jobs(tile_ids, rotations, *, per_tile=None, seed=0):
    """(tile_id, quarter turns) pairs: every rotation of every tile, or ``per_tile`` drawn ones.

    Drawing one rotation per tile keeps rotation augmentation in a large catalog
    (the set as a whole sees every orientation) at the cost of one extraction per
    tile. The unturned tile of each tile is always among its draws, so that
    per-tile summaries exist.
    """
    rotations = tuple(int(r) % 4 for r in rotations)
    if per_tile is None or per_tile >= len(rotations):
        return [(tid, r) for tid in tile_ids for r in rotations]
    rng = np.random.default_rng(seed)
    jobs = []
    for tid in tile_ids:
        extra = [r for r in rotations if r != 0]
        picked = [0] if per_tile >= 1 and 0 in rotations else []
        picked += list(rng.choice(extra, size=max(per_tile - len(picked), 0), replace=False)) if extra else []
        if not picked:
            picked = [int(rng.choice(rotations))]
        jobs.extend((tid, int(r)) for r in picked)
    return jobs


def build_patch_set(tileset, tile_ids, spec, *, tau=0.15, rotations=(0,), seed=0, neg_ratio=3.0,
                    hard_share=0.5, max_patches=None, workers=1, sample=True, desc="features", jobs=None,
                    keep_tiles=True, degrade=False):
    """Extract, label and sample the patches of some tiles.

    Parameters
    ----------
    tileset : TileSet
    tile_ids : sequence of str
    spec : FeatureSpec
    tau : float, default=0.15
    rotations : tuple of int, default=(0,)
        Quarter turns clockwise to extract for every tile (rotation augmentation).
    seed : int, default=0
    neg_ratio : float, default=3.0
        Background patches kept per deposit patch, per tile.
    hard_share : float, default=0.5
        Share of the kept background taken as hard negatives.
    max_patches : int, optional
        Cap on the total; drawn uniformly (deposit patches kept first) when exceeded.
    workers : int, default=1
        Local worker processes (joblib); inside :func:`training.parallel.on_cluster`
        the tiles go to the Dask cluster instead.
    sample : bool, default=True
        False keeps every valid patch (calibration wants the true class mix).
    keep_tiles : bool, default=True
        With ``sample=False``, also return every tile's full TileFeatures.
    jobs : list of (tile_id, quarter_turns), optional
        Explicit extraction jobs (see :func:`rotation_jobs`); overrides ``tile_ids`` x ``rotations``.
    degrade : bool, default=False
        Degrade the turned copies photometrically (:func:`degrade_tile`).

    Returns
    -------
    patches : PatchSet
    per_tile : list of TileFeatures
        Only when ``sample`` is False (kept for reuse by evaluation); else empty.
    summaries : ndarray of shape (n_tiles, n_features)
        Mean feature vector of each unrotated tile (for the unfamiliarity score).
    noise : ndarray of shape (n_tiles,)
        Noise of each unrotated tile (for the model's noise range).
    """
    jobs = list(jobs) if jobs is not None else [(tid, r) for tid in tile_ids for r in rotations]
    seeds = np.random.SeedSequence(seed).spawn(len(jobs))
    iterator = tqdm(list(zip(jobs, seeds)), desc=desc, unit="tile", leave=False)
    # Sampling happens inside the worker so that only kept patches travel back: memory
    # grows with the kept patches, not with the catalog.
    results = tile_parallel(workers)(
        delayed(_extract_one)(tileset, tid, spec, r, tau, s, sample, neg_ratio, hard_share, degrade)
        for (tid, r), s in iterator
    )
    patches = _concat(results)
    rng = np.random.default_rng(seed)
    if max_patches is not None and len(patches) > max_patches:
        keep = _cap(patches.cls, max_patches, rng)
        patches = _take(patches, keep)
    summaries = np.array([tf.summary for tf, _, _ in results if tf.rotation == 0])
    noise = np.array([tf.noise for tf, _, _ in results if tf.rotation == 0], dtype=np.float64)
    return patches, ([tf for tf, _, _ in results] if not sample and keep_tiles else []), summaries, noise


def _extract_one(tileset, tile_id, spec, rotation, tau, seed_seq, sample, neg_ratio, hard_share, degrade=False):
    reuse_freed_memory()
    tf = tile_features(tileset, tile_id, spec, rotation=rotation, tau=tau, degrade=degrade)
    if sample:
        idx, weight = _sample_tile(tf, np.random.default_rng(seed_seq), neg_ratio=neg_ratio, hard_share=hard_share)
        return _slim(tf, idx), np.arange(len(idx)), weight
    idx = np.flatnonzero(np.asarray(tf.grid.valid, dtype=bool))
    return tf, idx, np.ones(len(idx))


def _slim(tf, idx):
    """A TileFeatures holding only the sampled patches (grid dropped)."""
    return TileFeatures(tf.tile_id, tf.image_id, tf.rotation, tf.X[idx], None, tf.cls[idx], tf.fan_cover_share[idx],
                        tf.spot_cover_share[idx], tf.fan_direction_deg[idx], tf.axis_deg[idx], tf.patch_darkness[idx],
                        tf.summary, tf.noise)


def _concat(parts):
    n_features = parts[0][0].X.shape[1] if parts else 0
    if not parts:
        empty = np.zeros(0)
        return PatchSet(np.zeros((0, n_features), np.float32), empty.astype(np.int8), empty, empty, empty,
                        empty.astype(object), empty.astype(object), empty)
    return PatchSet(
        X=np.concatenate([tf.X[idx] for tf, idx, _ in parts]).astype(np.float32),
        cls=np.concatenate([tf.cls[idx] for tf, idx, _ in parts]),
        fan_direction_deg=np.concatenate([tf.fan_direction_deg[idx] for tf, idx, _ in parts]),
        axis_deg=np.concatenate([tf.axis_deg[idx] for tf, idx, _ in parts]),
        fan_cover_share=np.concatenate([tf.fan_cover_share[idx] for tf, idx, _ in parts]),
        image_id=np.concatenate([np.full(len(idx), tf.image_id, dtype=object) for tf, idx, _ in parts]),
        tile_id=np.concatenate([np.full(len(idx), tf.tile_id, dtype=object) for tf, idx, _ in parts]),
        weight=np.concatenate([w for _, _, w in parts]),
    )


def _cap(cls, max_patches, rng):
    """Indices of a class-stratified uniform sample of ``max_patches`` patches.

    Every class keeps the same share of its patches, so the class mix chosen by
    the per-tile sampling (background vs deposits) survives the cap.
    """
    keep = []
    share = max_patches / len(cls)
    for c in np.unique(cls):
        idx = np.flatnonzero(cls == c)
        n = int(round(share * len(idx)))
        keep.append(rng.choice(idx, size=min(n, len(idx)), replace=False))
    return np.sort(np.concatenate(keep))


def _take(p, idx):
    return PatchSet(p.X[idx], p.cls[idx], p.fan_direction_deg[idx], p.axis_deg[idx], p.fan_cover_share[idx],
                    p.image_id[idx], p.tile_id[idx], p.weight[idx])
