"""A fixed benchmark of invented south polar scenes that no model is tuned on, and its table.

``frostvane benchmark build BENCH`` renders, once and deterministically:

- ``train/``: nominal scenes to train a model on (the only set a model may see);
- ``heldout/``: nominal scenes from an independent seed stream (at least 40 images),
  never used for fitting, calibration or any choice of the detector;
- ``shifted/``: scenes whose generator settings (terrain mix, contrast, blur,
  noise) lie outside those of every training image, to measure robustness
  rather than memory;
- ``negatives/``: real deposit-free textures from scikit-image's sample images
  (brick, grass, gravel, the Moon's craters), each in its four quarter turns,
  with an empty consensus: every detection there is false.

``frostvane benchmark run MODEL BENCH --out REPORT`` scores a model on the three
held-out sets beside two references computed on the same tiles: a plain
threshold of the local darkness read into fans and spots by region properties
(the baseline any detector must beat), and the noise-free truth of the scenes
scored against their consensus (the ceiling a detector can reach against a
crowd). It prints one table and writes ``benchmark.md``, ``benchmark.json``,
per-set detections and the error breakdown.
"""

import json
import time
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import ndimage

from detector.contract import CONSENSUS_COLUMNS, CONSENSUS_FILE, TILES_FILE, TRUTH_FILE
from detector.errors import DetectorError
from detector.geometry import direction_deg
from detector.io import atomic_dir, write_image, write_json

__all__ = [
    "BENCHMARK_SETS",
    "NEGATIVE_TEXTURES",
    "BenchmarkLayout",
    "build_benchmark",
    "threshold_detections",
    "run_benchmark",
    "benchmark_table",
    "error_table",
    "report_figures",
]

#: The held-out sets of a benchmark, in table order.
BENCHMARK_SETS = ("heldout", "shifted", "negatives")

#: scikit-image sample images used as real deposit-free negatives (shipped with the package).
NEGATIVE_TEXTURES = ("brick", "grass", "gravel", "moon")

_MANIFEST = "benchmark.json"
_FORMAT = 1


class BenchmarkLayout:
    """Sizes and seeds of a benchmark; the defaults are the documented benchmark.

    Parameters
    ----------
    seed : int, default=7
        Root seed; the train, held-out and shifted sets draw from independent
        streams of it (``numpy.random.SeedSequence(seed).spawn``).
    train_images, heldout_images, shifted_images : int
        Images per set (each cut into ``tiles_per_image`` tiles of 600 x 800 px).
    tiles_per_image : int, default=4
    """

    def __init__(self, *, seed=7, train_images=240, heldout_images=40, shifted_images=20, tiles_per_image=4):
        for name, value, low in (("seed", seed, 0), ("train_images", train_images, 3),
                                 ("heldout_images", heldout_images, 1), ("shifted_images", shifted_images, 1),
                                 ("tiles_per_image", tiles_per_image, 1)):
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
                raise DetectorError(f"benchmark {name} must be an integer >= {low}; got {value!r}.")
        self.seed = int(seed)
        self.train_images = int(train_images)
        self.heldout_images = int(heldout_images)
        self.shifted_images = int(shifted_images)
        self.tiles_per_image = int(tiles_per_image)

    def as_dict(self):
        return dict(seed=self.seed, train_images=self.train_images, heldout_images=self.heldout_images,
                    shifted_images=self.shifted_images, tiles_per_image=self.tiles_per_image)


def _set_seeds(seed):
    """Independent integer seeds of the train, held-out and shifted sets."""
    streams = np.random.SeedSequence(seed).spawn(3)
    return {name: int(ss.generate_state(1)[0]) for name, ss in zip(("train", "heldout", "shifted"), streams)}


def _write_negatives(folder):
    """The scikit-image textures in their four quarter turns as a tile set with an empty consensus."""
    import skimage.data

    rows = []
    for name in NEGATIVE_TEXTURES:
        image = np.asarray(getattr(skimage.data, name)(), dtype=np.uint8)
        if image.ndim != 2:
            raise DetectorError(f"scikit-image sample {name!r} is not a single-band image.")
        # 0 is the tile sets' no-data value; the textures' few black pixels become 1.
        image = np.maximum(image, 1)
        for turn in range(4):
            tile_id = f"NEG_{name}_R{turn * 90:03d}"
            write_image(folder / "images" / f"{tile_id}.png", np.ascontiguousarray(np.rot90(image, turn)))
            rows.append({"tile_id": tile_id, "image_id": f"NEG_{name}", "path": f"images/{tile_id}.png"})
    pd.DataFrame(rows).to_csv(folder / TILES_FILE, index=False, lineterminator="\n")
    pd.DataFrame(columns=list(CONSENSUS_COLUMNS)).to_csv(folder / CONSENSUS_FILE, index=False, lineterminator="\n")


def build_benchmark(out, layout=None, *, force=False, log=print):
    """Render the benchmark's train, held-out, shifted and negative tile sets into ``out``.

    Parameters
    ----------
    out : path-like
        New (or, with ``force``, replaced) folder.
    layout : BenchmarkLayout, optional
    force : bool, default=False

    Returns
    -------
    pathlib.Path
    """
    from ..synth import SCENE_PROFILES, synthesize_tileset

    layout = BenchmarkLayout() if layout is None else layout
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise DetectorError(f"benchmark output {str(out)!r} exists and is not a folder.")
    if out.is_dir() and any(out.iterdir()) and not force:
        raise DetectorError(f"benchmark folder {str(out)!r} is not empty; choose another or pass --force.")
    seeds = _set_seeds(layout.seed)
    plan = (("train", "nominal", layout.train_images, "TRN"), ("heldout", "nominal", layout.heldout_images, "HLD"),
            ("shifted", "shifted", layout.shifted_images, "SHF"))
    start = time.perf_counter()
    with atomic_dir(out, replace=True) as tmp:
        for name, profile, n_images, prefix in plan:
            synthesize_tileset(tmp / name, n_images=n_images, tiles_per_image=layout.tiles_per_image,
                               seed=seeds[name], settings=SCENE_PROFILES[profile], image_prefix=prefix)
            log(f"benchmark: {name} set, {n_images} images of profile {profile!r} "
                f"({time.perf_counter() - start:.0f} s)")
        (tmp / "negatives").mkdir()
        _write_negatives(tmp / "negatives")
        write_json(tmp / _MANIFEST, {"format": _FORMAT, "layout": layout.as_dict(), "seeds": seeds,
                                     "profiles": {name: profile for name, profile, _, _ in plan},
                                     "negatives": list(NEGATIVE_TEXTURES)})
    log(f"benchmark written to {out} in {time.perf_counter() - start:.0f} s")
    return out


# ----------------------------------------------------------------------------- threshold baseline


def threshold_detections(tile, *, tile_id="", smooth_px=0.0, sigma_px=30.0, k=5.5, min_area_px=40,
                         min_fan_length_px=12.0, max_fan_roundness=0.6):
    """The plain-threshold baseline: dark regions below a smooth background, read by region moments.

    The tile is smoothed by a Gaussian of sigma ``smooth_px`` (0: not at all);
    the background is a Gaussian mean of the valid pixels (sigma ``sigma_px``);
    pixels darker than it by more than ``k`` robust standard deviations
    (1.4826 x MAD of the residual) form regions (8-connected,
    ``skimage.measure.label``). A region whose minor/major axis ratio is below
    ``max_fan_roundness`` and whose major axis (4 sigma along it, as
    ``skimage.measure.regionprops``' ``axis_major_length``) is at least
    ``min_fan_length_px`` is a fan, with its apex at the darker end of the
    major axis; every other region is a spot. The defaults are the best of a small
    grid (smoothing, background sigma, k, smallest area) on twelve images of the
    benchmark's train set (fan F1 0.35, spot F1 0.57 there); never on held-out images.

    Parameters
    ----------
    tile : ndarray of shape (M, N), uint8 or uint16
        0 is no-data.

    Returns
    -------
    detections : DataFrame
        Contract columns with ``score`` 1.
    """
    from skimage.measure import label

    tile = np.asarray(tile)
    scale = 65535.0 if tile.dtype == np.uint16 else 255.0
    image = tile.astype(np.float64) / scale
    valid = tile > 0
    if smooth_px > 0:
        weight = ndimage.gaussian_filter(valid.astype(float), smooth_px)
        image = np.divide(ndimage.gaussian_filter(np.where(valid, image, 0.0), smooth_px), weight,
                          out=np.zeros_like(image), where=weight > 1e-6)
    num = ndimage.gaussian_filter(np.where(valid, image, 0.0), sigma_px)
    den = ndimage.gaussian_filter(valid.astype(float), sigma_px)
    resid = np.where(valid, np.divide(num, den, out=np.zeros_like(num), where=den > 1e-6) - image, 0.0)
    values = resid[valid]
    mad = 1.4826 * np.median(np.abs(values - np.median(values))) if values.size else 0.0
    rows = []
    if mad > 0:
        labels = label((resid > k * mad) & valid, connectivity=2)
        objects = ndimage.find_objects(labels)
        for lab, sl in enumerate(objects, start=1):
            if sl is None:
                continue
            ys, xs = np.nonzero(labels[sl] == lab)
            if ys.size < min_area_px:
                continue
            ys = ys + sl[0].start
            xs = xs + sl[1].start
            rows.append(_read_region(xs.astype(float), ys.astype(float), resid[ys, xs], min_fan_length_px,
                                     max_fan_roundness))
    frame = pd.DataFrame(rows, columns=list(CONSENSUS_COLUMNS) + ["score", "direction_confidence"])
    frame["tile_id"] = tile_id
    return frame


def _read_region(xs, ys, dark, min_fan_length_px, max_fan_roundness):
    """One thresholded region as a fan or a spot contract row."""
    cx, cy = xs.mean(), ys.mean()
    cov = np.cov(np.vstack([xs - cx, ys - cy])) if xs.size > 1 else np.zeros((2, 2))
    evals, evecs = np.linalg.eigh(cov)
    minor, major = 4.0 * np.sqrt(np.maximum(evals, 0.0))
    u = evecs[:, 1]
    along = (xs - cx) * u[0] + (ys - cy) * u[1]
    row = dict.fromkeys(CONSENSUS_COLUMNS, np.nan)
    row.update(votes=np.nan, fan_vote_share=np.nan, score=1.0, direction_confidence=np.nan)
    if major >= min_fan_length_px and minor < max_fan_roundness * major:
        # Fans are darkest at their source: the darker half of the major axis holds the apex.
        ahead, behind = dark[along > 0], dark[along < 0]
        sign = 1.0 if (ahead.mean() if ahead.size else 0.0) >= (behind.mean() if behind.size else 0.0) else -1.0
        extent = along.max() if sign > 0 else -along.min()
        apex_x, apex_y = cx + sign * extent * u[0], cy + sign * extent * u[1]
        length = along.max() - along.min()
        row.update(kind="fan", x_px=apex_x, y_px=apex_y, direction_deg=float(direction_deg(-sign * u[0], -sign * u[1])),
                   length_px=max(length, 1.0), opening_deg=float(np.degrees(2.0 * np.arctan2(minor / 2.0, max(length, 1.0)))))
    else:
        row.update(kind="spot", x_px=cx, y_px=cy, direction_deg=float(direction_deg(u[0], u[1]) % 180.0),
                   semi_major_px=max(major / 2.0, 1.0), semi_minor_px=max(minor / 2.0, 0.5))
    return row


# ----------------------------------------------------------------------------- running


def _load_manifest(bench):
    path = Path(bench) / _MANIFEST
    if not path.is_file():
        raise DetectorError(f"{str(bench)!r} is not a benchmark folder (no {_MANIFEST}); make one with "
                            f"'frostvane benchmark build'.")
    try:
        manifest = json.loads(path.read_text())
    except ValueError as err:
        raise DetectorError(f"{str(path)!r} is not valid JSON: {err}.") from err
    if manifest.get("format") != _FORMAT:
        raise DetectorError(f"{str(path)!r} has benchmark format {manifest.get('format')!r}; this frostvane reads "
                            f"format {_FORMAT}. Rebuild the benchmark.")
    return manifest


def _threshold_catalog(tileset):
    frames = [threshold_detections(tileset.read_tile(t), tile_id=t) for t in tileset.tiles["tile_id"]]
    frames = [f for f in frames if len(f)]
    if not frames:
        return pd.DataFrame(columns=list(CONSENSUS_COLUMNS) + ["score", "direction_confidence"])
    return pd.concat(frames, ignore_index=True)


def _truth_catalog(root, tile_ids):
    path = Path(root) / TRUTH_FILE
    if not path.is_file():
        return None
    truth = pd.read_csv(path)
    truth = truth[truth["tile_id"].isin(list(tile_ids))].reset_index(drop=True)
    truth["score"] = 1.0
    truth["axis_deg"] = truth["direction_deg"] % 180.0
    return truth


def _headline(scores, breakdown=None):
    """The benchmark's figures of one catalog scored on one set."""
    obj = scores["objects"]
    per_fan = scores["direction"]["per_fan"]
    cov = scores.get("coverage") or {}
    out = {
        "fan_f1": obj["fan"]["f1"], "fan_precision": obj["fan"]["precision"], "fan_recall": obj["fan"]["recall"],
        "spot_f1": obj["spot"]["f1"], "spot_precision": obj["spot"]["precision"],
        "spot_recall": obj["spot"]["recall"],
        "fan_direction_median_deg": per_fan.get("median"), "fan_direction_p90_deg": per_fan.get("p90"),
        "flip_rate": per_fan.get("flip_rate"),
        "tile_mean_direction_median_deg": scores["direction"]["per_tile_mean"].get("median"),
        "tile_prevailing_direction_median_deg": (scores["direction"].get("per_tile_prevailing") or {}).get("median"),
        "dice_mean": cov.get("dice_mean"), "covered_error_pp_mean": cov.get("covered_error_pp_mean"),
        "n_consensus_fans": obj["fan"]["n_consensus"], "n_consensus_spots": obj["spot"]["n_consensus"],
        "n_detections": scores["counts"]["n_detections"],
    }
    if breakdown is not None:
        out["lost"] = breakdown
    return out


def report_figures(report):
    """The benchmark's figures of one ``evaluate_model`` result, with where its consensus features went.

    Parameters
    ----------
    report : dict
        What :func:`training.evaluation.evaluate.evaluate_model` returns.

    Returns
    -------
    dict
        The headline figures (as in ``benchmark.json``), the shares of consensus fans and spots
        matched and missed (``fans_matched``, ``fans_missed``, ``spots_matched``, ``spots_missed``),
        and ``tiles``, ``tiles_smoothed`` (noisier than the model's range, smoothed first) and
        ``tiles_unfamiliar`` (left to people by screening, the smoothed ones among them).
    """
    lost = report["error_breakdown"]["headline"]["consensus"]
    meta = report["scores"]["meta"]
    return {**_headline(report["scores"]), "fans_matched": lost["fan"]["matched"], "fans_missed": lost["fan"]["missed"],
            "spots_matched": lost["spot"]["matched"], "spots_missed": lost["spot"]["missed"],
            "tiles": meta["tiles"], "tiles_smoothed": len(meta.get("tiles_smoothed", [])),
            "tiles_unfamiliar": len(meta.get("tiles_unfamiliar", []))}


def _error_shares(detections, consensus, tiles):
    """Where consensus features are lost and where false detections lie (shares), and fan recall by length."""
    from .diagnose import error_breakdown

    result = error_breakdown(detections.reset_index(drop=True), consensus.reset_index(drop=True), tiles)
    by_length = result.by_length
    matched = by_length[(by_length["kind"] == "fan") & (by_length["outcome"] == "matched")]
    recall = {str(g): (None if not np.isfinite(v) else float(v)) for g, v in zip(matched["length_bin"], matched["share"])}
    return {"consensus": result.headline["consensus"], "detections": result.headline["detections"],
            "matched_fans": result.headline["matched_fans"], "fan_recall_by_length": recall}


def _score_set(name, root, model, *, workers, min_score, log):
    """Model, threshold baseline and truth ceiling on one set."""
    from detector.tileset import load_tileset

    from .evaluate import run_on_tiles, unfamiliar_flags
    from .scoring import score_catalogs

    tileset = load_tileset(root, min_votes=int(model.card["training"]["config"]["min_votes"]))
    tiles = tileset.tiles
    tile_ids = tiles["tile_id"].tolist()
    start = time.perf_counter()
    run = run_on_tiles(model, tileset, tile_ids, desc=name, workers=workers, min_score=min_score)
    seconds = time.perf_counter() - start
    detections = run["detections"].reset_index(drop=True)
    # A tile noisier than every fitting tile is smoothed before detection and left to people, like
    # one whose features are unfamiliar (as frostvane effort routes it).
    smoothed = np.array([bool(t.get("smoothed", False)) for t in run["per_tile"]], dtype=bool)
    unfamiliar = unfamiliar_flags(model, run["per_tile"])
    flagged = dict(zip([t["tile_id"] for t in run["per_tile"]], unfamiliar))
    baseline = _threshold_catalog(tileset)
    area_mpx = float((tiles["width"] * tiles["height"]).sum()) / 1e6
    result = {"n_tiles": len(tiles), "n_images": int(tiles["image_id"].nunique()), "area_mpx": area_mpx,
              "seconds_model": seconds, "unfamiliar_share": float(np.mean(unfamiliar)) if len(unfamiliar) else None,
              "smoothed_share": float(np.mean(smoothed)) if len(smoothed) else None}
    if name == "negatives":
        quiet = ~detections["tile_id"].map(flagged).fillna(False).astype(bool)
        kept_area = float((tiles.loc[~tiles["tile_id"].map(flagged).astype(bool), "width"]
                           * tiles.loc[~tiles["tile_id"].map(flagged).astype(bool), "height"]).sum()) / 1e6
        result["model"] = {"detections_per_mpx": len(detections) / area_mpx,
                           "detections_per_mpx_unflagged": (int(quiet.sum()) / kept_area) if kept_area > 0 else 0.0,
                           "n_detections": int(len(detections))}
        result["threshold"] = {"detections_per_mpx": len(baseline) / area_mpx, "n_detections": int(len(baseline))}
        result["truth"] = {"detections_per_mpx": 0.0, "n_detections": 0}
        return result, {"model": detections, "threshold": baseline}
    consensus = tileset.consensus.reset_index(drop=True)
    prevailing = model.card.get("training", {}).get("prevailing_deg")
    catalogs = {"model": detections, "threshold": baseline, "truth": _truth_catalog(root, tile_ids)}
    for method, catalog in catalogs.items():
        if catalog is None:
            result[method] = None
            continue
        scores = score_catalogs(catalog, consensus, tiles, prevailing_deg=prevailing, n_boot=200)
        result[method] = _headline(scores, _error_shares(catalog, consensus, tiles) if method != "truth" else None)
        if method == "model":
            result["model"]["intervals"] = {k: scores["intervals"].get(k) for k in ("fan_f1", "spot_f1")}
    log(f"{name}: fan F1 {result['model']['fan_f1']:.3f} (threshold {result['threshold']['fan_f1']:.3f}), "
        f"spot F1 {result['model']['spot_f1']:.3f}, {seconds:.0f} s")
    return result, {k: v for k, v in catalogs.items() if v is not None and k != "truth"}


def run_benchmark(model_dir, bench, out, *, workers=2, min_score=None, compare=None, force=False, log=print):
    """Score a model on a benchmark's held-out, shifted and negative sets; write and print the table.

    Parameters
    ----------
    model_dir : path-like
    bench : path-like
        A folder made by :func:`build_benchmark`.
    out : path-like
        Report folder: ``benchmark.md``, ``benchmark.json``, ``<set>_detections.csv``.
    workers : int, default=2
    min_score : float, optional
        Object score threshold; default the model card's.
    compare : sequence of (label, path-like), optional
        Earlier ``benchmark.json`` files whose model columns are set beside this one
        (for example the code before a change).
    force : bool, default=False

    Returns
    -------
    results : dict
        What ``benchmark.json`` holds.
    """
    from detector.inference.model import load_model

    from .evaluate import write_detections_csv
    from .report import _clean

    bench = Path(bench)
    out = Path(out)
    manifest = _load_manifest(bench)
    if out.exists() and any(out.iterdir()) and not force:
        raise DetectorError(f"report folder {str(out)!r} is not empty; choose another or pass --force.")
    if min_score is not None and not 0.0 <= min_score <= 1.0:
        raise DetectorError(f"--min-score must be in [0, 1]; got {min_score!r}.")
    others = []
    for label, path in compare or ():
        try:
            others.append((label, json.loads(Path(path).read_text())))
        except (OSError, ValueError) as err:
            raise DetectorError(f"cannot read the benchmark results to compare {str(path)!r}: {err}.") from err
    model = load_model(model_dir)
    if min_score is None:
        min_score = float(model.assembly.get("min_score", 0.5))
    seen = set(model.card["training"]["images"]["fit"]) | set(model.card["training"]["images"]["calibration"])
    results = {"model": str(model_dir), "benchmark": str(bench), "layout": manifest["layout"],
               "min_score": min_score, "sets": {}}
    catalogs = {}
    for name in BENCHMARK_SETS:
        root = bench / name
        from detector.tileset import load_tileset

        image_ids = set(load_tileset(root, check_images=False).tiles["image_id"])
        if image_ids & seen:
            raise DetectorError(f"model {str(model_dir)!r} was trained on image(s) {sorted(image_ids & seen)[:3]!r} "
                                f"of the benchmark's {name} set; a benchmark set must be unseen.")
        results["sets"][name], catalogs[name] = _score_set(name, root, model, workers=workers,
                                                           min_score=min_score, log=log)
    table = benchmark_table(results, compare=others)
    lost = error_table(results, compare=others)
    with atomic_dir(out, replace=True) as tmp:
        for name, methods in catalogs.items():
            for method, frame in methods.items():
                write_detections_csv(frame, tmp / f"{name}_{method}_detections.csv")
        write_json(tmp / "benchmark.json", _clean(results))
        (tmp / "benchmark.md").write_text(f"# frostvane benchmark\n\nModel `{model_dir}`, benchmark `{bench}`.\n\n"
                                          f"{table}\n\n## Where features are lost\n\n{lost}\n")
    log(table)
    log(lost)
    return results


#: Rows of the benchmark table: label, keys into a set's method figures, format, target.
_ROWS = (
    ("fan F1 (precision / recall)", ("fan_f1", "fan_precision", "fan_recall"), "f1pr", ">= 0.65"),
    ("spot F1", ("spot_f1",), "3f", ">= 0.75"),
    ("per-fan direction error median / p90, deg", ("fan_direction_median_deg", "fan_direction_p90_deg"), "pair1",
     "<= 10 / 30"),
    ("flip rate", ("flip_rate",), "pct", "<= 3 %"),
    ("per-tile mean direction error median, deg", ("tile_mean_direction_median_deg",), "1f", "<= 10"),
    ("per-tile prevailing direction error median, deg", ("tile_prevailing_direction_median_deg",), "1f", ""),
    ("coverage Dice / covered-fraction error, pp", ("dice_mean", "covered_error_pp_mean"), "pair2", ">= 0.65 / <= 0.8"),
)


def _fmt_cell(values, fmt):
    if values is None or any(v is None for v in values[:1]):
        return "n/a"

    def num(v, digits):
        return "n/a" if v is None else f"{v:.{digits}f}"

    if fmt == "f1pr":
        return f"{num(values[0], 2)} ({num(values[1], 2)} / {num(values[2], 2)})"
    if fmt == "3f":
        return num(values[0], 2)
    if fmt == "pair1":
        return f"{num(values[0], 1)} / {num(values[1], 1)}"
    if fmt == "pair2":
        return f"{num(values[0], 2)} / {num(values[1], 2)}"
    if fmt == "pct":
        return "n/a" if values[0] is None else f"{100 * values[0]:.1f} %"
    return num(values[0], 1)


def _cell(set_result, method, keys, fmt):
    figures = (set_result or {}).get(method)
    if not figures:
        return "n/a"
    return _fmt_cell([figures.get(k) for k in keys], fmt)


_LOST_ROWS = (
    ("consensus fans matched", ("consensus", "fan", "matched")),
    ("consensus fans with no detection touching them", ("consensus", "fan", "missed")),
    ("consensus fans reported as spots", ("consensus", "fan", "as_other_kind")),
    ("consensus fans with the source misplaced", ("consensus", "fan", "source_misplaced")),
    ("consensus fans merged with a neighbour", ("consensus", "fan", "merged")),
    ("matched fans off by > 45 deg", ("matched_fans", "direction_off")),
    ("matched fans flipped (> 135 deg)", ("matched_fans", "flipped")),
    ("consensus spots matched", ("consensus", "spot", "matched")),
    ("consensus spots with no detection touching them", ("consensus", "spot", "missed")),
    ("consensus spots reported as fans", ("consensus", "spot", "as_other_kind")),
    ("detected fans on background", ("detections", "fan", "background")),
    ("detected fans on a consensus spot", ("detections", "fan", "on_other_kind")),
    ("detected fans duplicated", ("detections", "fan", "duplicate")),
    ("detected spots on background", ("detections", "spot", "background")),
)


def _dig(node, keys):
    for key in keys:
        if not isinstance(node, dict) or key not in node:
            return None
        node = node[key]
    return node


def error_table(results, *, compare=()):
    """Markdown table of where features are lost (shares from :func:`training.evaluation.diagnose.error_breakdown`).

    Columns: the model and the compared runs on the held-out and shifted sets, and the threshold baseline.
    """
    columns = []
    for set_name, title in (("heldout", "in-dist"), ("shifted", "shifted")):
        columns.append((f"model ({title})", results, set_name, "model"))
        columns += [(f"{label} ({title})", other, set_name, "model") for label, other in compare]
        columns.append((f"threshold ({title})", results, set_name, "threshold"))
    lines = ["| share | " + " | ".join(c[0] for c in columns) + " |", "|" + " --- |" * (len(columns) + 1)]

    def pct(v):
        return "n/a" if v is None else f"{100 * v:.0f} %"

    for label, keys in _LOST_ROWS:
        cells = [pct(_dig(((src.get("sets") or {}).get(s) or {}).get(m) or {}, ("lost",) + keys))
                 for _, src, s, m in columns]
        lines.append(f"| {label} | " + " | ".join(cells) + " |")
    bins = None
    for _, src, s, m in columns:
        bins = bins or _dig(((src.get("sets") or {}).get(s) or {}).get(m) or {}, ("lost", "fan_recall_by_length"))
    for name in bins or {}:
        cells = [pct(_dig(((src.get("sets") or {}).get(s) or {}).get(m) or {}, ("lost", "fan_recall_by_length", name)))
                 for _, src, s, m in columns]
        lines.append(f"| fan recall, length {name} px | " + " | ".join(cells) + " |")
    return "\n".join(lines)


def benchmark_table(results, *, compare=()):
    """Markdown table: each metric for the model, the compared runs, the threshold baseline and the truth ceiling,
    on the held-out and the shifted sets, then the negatives.

    Parameters
    ----------
    results : dict
        From :func:`run_benchmark`.
    compare : sequence of (label, dict)
        Earlier results whose model columns are shown too.
    """
    sets = results["sets"]
    columns = [("model", "model", results)] + [(label, "model", other) for label, other in compare] + [
        ("threshold", "threshold", results), ("truth ceiling", "truth", results)]
    header = ["metric", "target"]
    for _set_name, title in (("heldout", "in-dist"), ("shifted", "shifted")):
        header += [f"{label} ({title})" for label, _, _ in columns]
    lines = ["| " + " | ".join(header) + " |", "|" + " --- |" * len(header)]
    for label, keys, fmt, target in _ROWS:
        cells = [label, target]
        for set_name in ("heldout", "shifted"):
            cells += [_cell(source["sets"].get(set_name), method, keys, fmt) for _, method, source in columns]
        lines.append("| " + " | ".join(cells) + " |")
    neg_cells = ["detections per Mpx on real deposit-free textures", "<= 0.5"]
    for set_name in ("heldout", "shifted"):
        for _, method, source in columns:
            neg = (source["sets"].get("negatives") or {}).get(method)
            if neg is None or set_name == "shifted":
                neg_cells.append("")
                continue
            text = f"{neg['detections_per_mpx']:.1f}"
            if "detections_per_mpx_unflagged" in neg:
                text += f" ({neg['detections_per_mpx_unflagged']:.1f} on tiles not flagged unfamiliar)"
            neg_cells.append(text)
    lines.append("| " + " | ".join(neg_cells) + " |")
    counts = []
    for set_name in BENCHMARK_SETS:
        s = sets.get(set_name) or {}
        m = s.get("model") or {}
        extra = (f", {m.get('n_consensus_fans')} consensus fans, {m.get('n_consensus_spots')} spots"
                 if set_name != "negatives" and m else "")
        flagged = s.get("unfamiliar_share")
        smoothed = s.get("smoothed_share")
        counts.append(f"{set_name}: {s.get('n_images')} images, {s.get('n_tiles')} tiles{extra}"
                      + (f", {100 * flagged:.0f} % of tiles flagged unfamiliar" if flagged is not None else "")
                      + (f" ({100 * smoothed:.0f} % smoothed as noisier than the fitting tiles)" if smoothed else ""))
    return "\n".join(lines) + "\n\n" + "; ".join(counts) + "."
