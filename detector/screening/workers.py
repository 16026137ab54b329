"""Screening the planned tiles: one tile in a worker, and the serial, local-process and Dask runners."""

import base64
import os
import time
from collections import OrderedDict

import numpy as np
import pandas as pd

from ..inference.detect import fan_direction_weights, tile_direction_stats
from ..inference.model import cached_model
from ..contract import DETECTION_COLUMNS
from ..errors import DetectorError, SpecError
from ..inference.unfamiliar import SHARE_COLUMNS
from .folder import DETECTION_OUTPUT_COLUMNS, MIN_VALID_SHARE
from .plan import _open

__all__ = []  # private to detector.screening


# Per process: a few open rasters, so that a worker pays for opening once, not once
# per tile (models are cached by detector.inference.model.cached_model).
_SOURCES = OrderedDict()


_MAX_OPEN = 8


def _cached_source(path, band, nodata):
    st = os.stat(path)
    key = (path, band, nodata, st.st_mtime_ns, st.st_size)  # a replaced file is opened again
    if key in _SOURCES:
        _SOURCES.move_to_end(key)
        return _SOURCES[key]
    src = _open(path, band, nodata)
    georef = src.georeferencer() if src.is_georeferenced else None
    _SOURCES[key] = (src, georef)
    while len(_SOURCES) > _MAX_OPEN:
        _, (old, _) = _SOURCES.popitem(last=False)
        old.close()
    return _SOURCES[key]


def _empty_detections():
    return {c: [] for c in DETECTION_OUTPUT_COLUMNS}


def _canvas_block(array, mask, task):
    """The tile core's pixels on its file's quick-look grid (every ``canvas_step``-th row and
    column of the file), float32 with NaN on no-data, as a small JSON-ready dict: where the
    block starts on the grid and its values (base64 of little-endian float32). None when
    no grid pixel falls in the core. The output then needs no second read of the image."""
    step = task.canvas_step
    win = task.window
    rows, cols = win.core_slices
    i0, j0 = -(-win.row0 // step), -(-win.col0 // step)  # first grid row and column in the core
    r_first, c_first = i0 * step - win.row0, j0 * step - win.col0
    block = array[rows, cols][r_first::step, c_first::step].astype(np.float32)
    if block.size == 0:
        return None
    block[mask[rows, cols][r_first::step, c_first::step]] = np.nan
    data = base64.b64encode(np.ascontiguousarray(block, dtype="<f4").tobytes()).decode("ascii")
    return {"row": int(i0), "col": int(j0), "height": int(block.shape[0]), "width": int(block.shape[1]),
            "values": data}


def _screen_block(block, model_dir, min_score=None):
    """Screen the tiles of one context block (:mod:`detector.objects.context`) together.

    Parameters
    ----------
    block : list of (int, _TileTask)
    model_dir : str
    min_score : float or None

    Returns
    -------
    list of (int, dict)
        ``(index, entry)`` of every tile, its entry holding its tiles.csv row and detections
        (plain lists).
    """
    from .._allocator import reuse_freed_memory
    from ..inference.detect import detect_block

    reuse_freed_memory()
    model = cached_model(model_dir)
    started = [_start_tile(index, task) for index, task in block]
    live = [s for s in started if s["array"] is not None]
    results = detect_block(model, [s["array"] for s in live], tile_ids=[s["task"].tile_id for s in live],
                           nodata_masks=[s["mask"] for s in live], min_score=min_score,
                           metres_per_px=[s["scale"] if s["task"].at_model_scale else None for s in live])
    for state, result in zip(live, results):
        _finish_tile(state, result, model)
    return [(state["index"], state["entry"]) for state in started]


def _start_tile(index, task):
    """Read one tile's window and fill what its tiles.csv row knows before detection; ``array`` is
    None when the tile is not scored (its core is mostly no-data) and its entry is complete."""
    src, georef = _cached_source(task.path, task.band, task.nodata)
    array, mask = src.read(task.window)
    if task.canvas_step:
        entry_canvas = _canvas_block(array, mask, task)
    core = task.window.core_slices
    valid_share = float(1.0 - mask[core].mean())
    row = {
        "tile_id": task.tile_id, "image": task.image, "col0": task.col0, "row0": task.row0,
        "width": task.width, "height": task.height, "p_deposit": np.nan, "fan_cover": np.nan,
        "spot_cover": np.nan, "n_fans": 0, "mean_direction_deg": np.nan, "direction_scatter_deg": np.nan,
        "unfamiliarity": np.nan, "route": "", "n_spots": 0, "valid_fraction": valid_share,
        "area_m2": _core_area_m2(task, georef), "covered_m2": np.nan, "noise_8bit": np.nan, "smoothed": False,
        "scale_zoom": 1.0, "read_zoom": 1.0,
        **dict.fromkeys(SHARE_COLUMNS, np.nan),
    }
    entry = {"tile_id": task.tile_id, "georeferenced": georef is not None, "pixels": task.width * task.height}
    if task.canvas_step:
        entry["canvas"] = entry_canvas
    if valid_share < MIN_VALID_SHARE:
        row["route"] = "nodata"
        entry.update(tile=row, detections=_empty_detections())
        return {"index": index, "task": task, "entry": entry, "array": None}

    return {"index": index, "task": task, "entry": entry, "row": row, "array": array, "mask": mask,
            "georef": georef, "scale": _ground_scale(task, georef)}


def _finish_tile(state, result, model):
    """Fill a started tile's entry from its detection result."""
    from ..inference.unfamiliar import unfamiliarity_parts, unfamiliarity_score

    task, entry, row, georef, scale = state["task"], state["entry"], state["row"], state["georef"], state["scale"]
    core = task.window.core_slices
    dy, dx = core[0].start, core[1].start
    det = result.detections.reset_index(drop=True)
    x = pd.to_numeric(det["x_px"], errors="coerce").to_numpy(dtype=float) - dx
    y = pd.to_numeric(det["y_px"], errors="coerce").to_numpy(dtype=float) - dy
    # Pixel centres are integers, so the core spans [-0.5, size - 0.5) in both axes.
    keep = (x >= -0.5) & (x < task.width - 0.5) & (y >= -0.5) & (y < task.height - 0.5)
    det = det.loc[keep].reset_index(drop=True)
    det = det.reindex(columns=list(DETECTION_COLUMNS))
    numeric = [c for c in DETECTION_COLUMNS if c not in ("tile_id", "kind")]
    if all(det[c].dtype.kind in "fiub" for c in numeric):
        det[numeric] = det[numeric].astype(float)
    else:  # a column of another type (e.g. all missing): coerced
        det[numeric] = det[numeric].apply(pd.to_numeric, errors="coerce").astype(float)
    det["x_px"] = x[keep]
    det["y_px"] = y[keep]
    det["tile_id"] = task.tile_id
    det["kind"] = det["kind"].astype(str)
    det["image"] = task.image
    det["col0"] = task.col0
    det["row0"] = task.row0
    is_fan = (det["kind"] == "fan").to_numpy()
    if georef is not None:
        fx = det["x_px"].to_numpy() + task.file_col0
        fy = det["y_px"].to_numpy() + task.file_row0
        direction = det["direction_deg"].to_numpy(dtype=float)
        lon, lat = georef.pixel_to_planetocentric(fx, fy)
        azimuth = np.atleast_1d(np.asarray(georef.grid_to_azimuth(direction, fx, fy), dtype=float))
        azimuth = np.where(is_fan, azimuth, azimuth % 180.0)
        lengths = det["length_px"].to_numpy(dtype=float)
        try:
            metres = lengths * georef.metres_per_px
        except DetectorError:
            # A geographic CRS has no single pixel size: measure on the ground instead.
            metres = np.atleast_1d(georef.ground_length_m(lengths, direction, fx, fy))
        det["lon_deg"] = np.atleast_1d(lon)
        det["lat_deg"] = np.atleast_1d(lat)
        det["azimuth_deg"] = azimuth
        det["wind_from_deg"] = np.where(is_fan, (azimuth + 180.0) % 360.0, np.nan)
        det["length_m"] = np.where(is_fan, metres, np.nan)
    det["area_m2"] = _detection_areas_m2(det, task, georef)

    valid_patch = np.asarray(result.grid.valid, dtype=bool)
    gx, gy = result.grid_xy()
    px, py = gx - dx, gy - dy
    in_core = valid_patch & (px >= -0.5) & (px < task.width - 0.5) & (py >= -0.5) & (py < task.height - 0.5)
    if in_core.any():
        p_deposit = float(np.max(1.0 - result.proba[in_core, 0]))
    else:
        # The core is narrower than a patch: fall back to the whole window read.
        p_deposit = result.p_deposit
    fans = det.loc[is_fan]
    mean_dir, spread = tile_direction_stats(fans["direction_deg"].to_numpy(dtype=float), fan_direction_weights(fans))
    fan_core = result.fan_cover[core]
    row.update(
        p_deposit=p_deposit,
        fan_cover=float(fan_core.mean()),
        spot_cover=float((result.spot_cover[core] & ~fan_core).mean()),
        n_fans=int(is_fan.sum()),
        n_spots=int((~is_fan).sum()),
        mean_direction_deg=mean_dir,
        direction_scatter_deg=spread,
        unfamiliarity=float(unfamiliarity_score(model.card.get("unfamiliarity"), result.summary[None, :])[0]),
        noise_8bit=255.0 * result.noise,
        smoothed=result.smoothed,
        scale_zoom=model.pixel_scale.zoom(scale) if model.pixel_scale is not None else 1.0,
        read_zoom=result.read_shape[1] / result.shape[1],
    )
    shares = unfamiliarity_parts(model.card.get("unfamiliarity"), result.summary[None, :], model.card["feature_names"])
    row.update(zip(SHARE_COLUMNS, (float(v) for v in shares[0])))
    row["covered_m2"] = (row["fan_cover"] + row["spot_cover"]) * row["area_m2"]
    entry.update(tile=row, detections={c: det[c].tolist() for c in det.columns})


def _ground_scale(task, georef):
    """A tile's m/px: tiles.csv's ``metres_per_px``, else its file's projected pixel size, else NaN
    (a geographic CRS has no single one; the tile is then read at its own scale)."""
    if np.isfinite(task.metres_per_px) or georef is None:
        return task.metres_per_px
    try:
        return float(georef.metres_per_px)
    except DetectorError:
        return float("nan")


def _core_area_m2(task, georef):
    """Ground area of a tile's core, m^2: geodesic on the CRS's body, or from tiles.csv's
    metres_per_px; NaN when the scale is unknown."""
    win = task.window
    if georef is None:
        return float(win.width * win.height * task.metres_per_px**2)
    from ..gis.geo import polygon_ground_area_m2

    corners = _core_corners(win)
    # Pixel centres are at integer px, corners half a pixel out.
    lon, lat = georef.pixel_to_lonlat(corners[:, 0], corners[:, 1])
    return polygon_ground_area_m2(lon, lat, georef.crs)


def _core_corners(win, per_side=8):
    """Outline of a tile core in its file's px (centre convention), ``per_side`` points per side."""
    t = np.linspace(0.0, 1.0, per_side, endpoint=False)
    c0, r0 = win.col0 - 0.5, win.row0 - 0.5
    c1, r1 = c0 + win.width, r0 + win.height
    cols = np.concatenate([c0 + (c1 - c0) * t, np.full_like(t, c1), c1 - (c1 - c0) * t, np.full_like(t, c0)])
    rows = np.concatenate([np.full_like(t, r0), r0 + (r1 - r0) * t, np.full_like(t, r1), r1 - (r1 - r0) * t])
    return np.column_stack([cols, rows])


def _detection_areas_m2(det, task, georef):
    """Ground area of each detection's outline (the polygon written to the GIS files), m^2."""
    if det.empty:
        return np.zeros(0)
    from ..gis.geojson import detection_rings, ring_signed_area

    rings, _ = detection_rings(det)
    if georef is None:
        px = np.array([abs(ring_signed_area(r)) for r in rings])
        return px * task.metres_per_px**2
    from ..gis.geo import polygon_ground_area_m2

    sizes = [len(r) for r in rings]
    allv = np.vstack(rings) + (task.file_col0, task.file_row0)
    lon, lat = georef.pixel_to_lonlat(allv[:, 0], allv[:, 1])
    cuts = np.cumsum(sizes)[:-1]
    return np.array([polygon_ground_area_m2(lo, la, georef.crs)
                     for lo, la in zip(np.split(np.atleast_1d(lon), cuts), np.split(np.atleast_1d(lat), cuts),
                                       strict=True)])


def _check_workers(workers):
    if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 1:
        raise SpecError(f"workers {workers!r} must be a whole number >= 1.")
    return int(workers)


def _run_serial(blocks, model_dir, min_score):
    for block in blocks:
        yield from _screen_block(block, model_dir, min_score)


_PARENT_POLL_S = 0.5


_parent_watch = {}


def _exit_with_parent():
    """In a local worker process: exit as soon as the process that started it is gone.

    A parent killed outright (SIGKILL, the out-of-memory killer) cannot stop its workers, and
    they would screen on for minutes. POSIX re-parents an orphan (to init or a subreaper), so
    a daemon thread that sees ``os.getppid()`` change ends the worker; portable and needs no
    signal of the parent's. Installed once per process, only in local workers (a Dask
    worker's parent is the cluster's business).
    """
    if _parent_watch:
        return
    import threading

    parent = os.getppid()
    _parent_watch["parent"] = parent

    def watch():
        while True:
            time.sleep(_PARENT_POLL_S)
            if os.getppid() != parent:
                os._exit(1)  # nothing of ours to flush: journal entries are written by the parent

    threading.Thread(target=watch, name="frostvane-parent-watch", daemon=True).start()


def _screen_block_local(block, model_dir, min_score):
    """:func:`_screen_block` in a local worker that ends with its parent."""
    _exit_with_parent()
    return _screen_block(block, model_dir, min_score)


def _run_loky(blocks, model_dir, min_score, workers):
    from joblib import Parallel, delayed

    parallel = Parallel(n_jobs=workers, backend="loky", return_as="generator_unordered")
    for done in parallel(delayed(_screen_block_local)(block, model_dir, min_score) for block in blocks):
        yield from done


def _run_dask(blocks, model_dir, min_score, scheduler, info=None):
    from distributed import as_completed

    from ..cluster import connect, worker_count

    with connect(scheduler) as client:
        if info is not None:
            info["workers"] = worker_count(client)
        futures = client.map(_screen_block, blocks, model_dir=model_dir, min_score=min_score, pure=False)
        try:
            for future in as_completed(futures):
                yield from future.result()
        finally:
            client.cancel(futures)


def _progress(total, initial, enabled):
    from tqdm.auto import tqdm

    # disable=None: tqdm stays quiet when stderr is not a terminal (a log file, a pipe).
    return tqdm(total=total, initial=initial, unit="tile", desc="screen", disable=None if enabled else True,
                leave=False)
