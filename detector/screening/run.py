"""Screen whole orbital images or tile sets with a model: the ``frostvane screen`` command.

An input is either an image file (any raster GDAL reads: PNG, TIFF / GeoTIFF,
JPEG 2000, ...) or a tile-set folder (one holding ``tiles.csv``). An image is
cut into tiles by :func:`detector.raster.plan_windows`; each tile is read with
an overlap margin, screened with :func:`detector.detect.detect_tile`, and only
the detections whose apex (fans) or centre (spots) lies in the tile's core are
kept, so no feature is reported twice. A tile-set tile is screened whole and
keeps its ``tile_id``.

The screening folder
--------------------
``tiles.csv``
    One row per tile (see :data:`TILE_COLUMNS`); ``route`` is empty for scored
    tiles (``frostvane effort`` fills it) and ``"nodata"`` for tiles whose
    core is less than half valid, which are not scored. ``area_m2`` is the
    ground area of the tile's core and ``covered_m2`` that of its fan and
    spot cover, m^2 (NaN when the scale is unknown). The
    ``unfamiliarity_share_<group>`` columns split the tile's squared
    unfamiliarity distance among the feature groups
    (:func:`detector.unfamiliar.unfamiliarity_parts`; they sum to 1).
``detections.csv``
    :data:`detector.contract.DETECTION_COLUMNS` in tile px, plus ``image``,
    ``col0`` and ``row0`` (image px of the tile's top-left pixel: image px =
    tile px + offset), ``area_m2`` (ground area of the outline, m^2; NaN when
    the scale is unknown) and, for georeferenced rasters, ``lon_deg``,
    ``lat_deg`` (planetocentric, east-positive, [-180, 180)), ``azimuth_deg``
    (degrees clockwise from north at the apex / centre; mod 180 for spots),
    ``wind_from_deg`` (fans) and ``length_m`` (fans).
``detections.gpkg``
    GeoPackage with a ``detections`` layer (fan sectors, spot ellipses, every
    column of detections.csv) and a ``tiles`` layer (tile-core footprints with
    every column of tiles.csv and ``covered_fraction``), in the raster's own
    CRS; images without a CRS in :data:`detector.gpkg.PIXEL_CRS_WKT`. See
    :class:`_GeoContext` for runs mixing CRSs.
``detections.geojson``
    Only when some input is georeferenced: its detections in planetocentric
    longitude / latitude (:data:`GEOJSON_COORDINATES`,
    :func:`detector.geojson.detections_to_geojson`).
``quicklook.png``, ``rose.png``
    A downsampled view of every image with its detections, and the fan
    direction distribution of every image (weighted by length).
``run.json``
    Model hash, inputs, parameters, timing and versions.
``.partial/``
    The journal: one small JSON file per finished tile, written atomically,
    so a run that is interrupted continues where it stopped when it is started
    again with the same arguments. Final outputs are written from it in a
    fixed order (image, row0, col0), one image at a time: the run keeps no
    tile results in memory, so memory follows the largest image's catalog,
    not the number of tiles or images.

Work runs serially, in local processes (``workers``, joblib's loky backend) or
on a running Dask distributed cluster (``scheduler``). Every worker loads the
model once and reads its own windows from the image files, so no pixel array
travels between processes.
"""

import base64
import contextlib
import dataclasses
import json
import math
import os
import platform
import time
from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..inference.detect import fan_direction_weights, tile_direction_stats
from ..inference.model import cached_model
from ..contract import CONSENSUS_FILE, DETECTION_COLUMNS, TILES_FILE, TILES_REQUIRED
from ..errors import DetectorError, ImageError, SpecError, TileSetError
from ..gis.geojson import write_geojson_chunks
from ..io import atomic_path, write_json
from ..gis.raster import TileWindow, check_complete, open_raster, plan_windows
from ..inference.unfamiliar import SHARE_COLUMNS

__all__ = [
    "TILE_COLUMNS",
    "GEO_COLUMNS",
    "DETECTION_OUTPUT_COLUMNS",
    "MIN_VALID_SHARE",
    "DEPOSIT_THRESHOLD",
    "ScreenSummary",
    "screen",
    "tile_direction_stats",
]

#: Columns of ``tiles.csv``.
TILE_COLUMNS = (
    "tile_id",
    "image",
    "col0",
    "row0",
    "width",
    "height",
    "p_deposit",
    "fan_cover",
    "spot_cover",
    "n_fans",
    "mean_direction_deg",
    "direction_scatter_deg",
    "unfamiliarity",
    "route",
    "n_spots",
    "valid_fraction",
    "area_m2",
    "covered_m2",
) + SHARE_COLUMNS

#: Columns added to ``detections.csv`` for georeferenced rasters.
GEO_COLUMNS = ("lon_deg", "lat_deg", "azimuth_deg", "wind_from_deg", "length_m")

#: Columns of ``detections.csv`` (the geographic ones only when some input is georeferenced).
DETECTION_OUTPUT_COLUMNS = DETECTION_COLUMNS + ("image", "col0", "row0", "area_m2")

#: How detections.geojson gives positions (see detector.geojson).
GEOJSON_COORDINATES = (
    "RFC 7946 [longitude, latitude] in degrees: planetocentric latitude (= latitude on the IAU 2015 Mars "
    "sphere, radius 3396190 m), longitude east-positive in [-180, 180]"
)

#: A tile whose core has a smaller share of valid pixels is routed "nodata" and not scored.
MIN_VALID_SHARE = 0.5

#: Tiles with ``p_deposit`` at or above this count as deposit tiles in the summary.
DEPOSIT_THRESHOLD = 0.5

_JOURNAL = ".partial"
_RUN_FILE = "run.json"
_OUTPUT_FILES = ("tiles.csv", "detections.csv", "detections.gpkg", "detections.geojson", "quicklook.png", "rose.png")
_GPKG = "detections.gpkg"
_GEOJSON = "detections.geojson"
_QUICKLOOK_PX = 1000  # a single panel's longer side in output pixels (9 in at 110 dpi): more is resampled away
_MAX_PANELS = 12
_MAX_DRAWN = 3000
_STRIP_BYTES = 16 * 2**20
_MIN_SAMPLED_STEP = 4  # quick-look steps from which the workers sample the canvas
_ROSE_BINS = 36


# ----------------------------------------------------------------------------- tasks


@dataclass(frozen=True)
class _TileTask:
    """Everything a worker needs to screen one tile; small and picklable (no pixels).

    ``window`` is the tile's core and read window in the pixels of its file;
    ``col0``, ``row0`` place the core in its image (NaN when a tile set does not say).
    """

    window: TileWindow
    path: str
    band: object
    nodata: object
    col0: float
    row0: float
    canvas_step: int = 0  # every how many px its file is sampled for the quick-look (0: no panel)
    metres_per_px: float = math.nan  # ground sampling distance of a tile without georeferencing (tiles.csv)

    tile_id = property(lambda self: self.window.tile_id)
    image = property(lambda self: self.window.image)
    width = property(lambda self: self.window.width)
    height = property(lambda self: self.window.height)
    file_col0 = property(lambda self: self.window.col0)
    file_row0 = property(lambda self: self.window.row0)

    @property
    def sort_key(self):
        c = self.col0 if np.isfinite(self.col0) else -1.0
        r = self.row0 if np.isfinite(self.row0) else -1.0
        return (self.image, r, c, self.tile_id)


@dataclass(frozen=True)
class _Piece:
    """Where one file sits in an image's quick-look canvas, px."""

    path: str
    col0: int
    row0: int
    width: int
    height: int
    file_offset: tuple = (0, 0)


def _open(path, band, nodata):
    return open_raster(path, band=band, nodata=nodata)


def _georeferencer(src, any_body):
    """The source's georeferencer (None without a CRS); a CRS not on Mars is refused unless ``any_body``."""
    if not src.is_georeferenced:
        return None
    from ..gis.geo import check_mars_crs

    check_mars_crs(src.crs, src.path, any_body=any_body)
    return src.georeferencer()


def _check_size(path, width, height, min_side, where=""):
    """Refuse an image with no room for one patch: it would be scored as empty."""
    if min(width, height) < min_side:
        raise ImageError(
            f"{where}image {str(path)!r} is {width} x {height} px (width x height); the model reads "
            f"{min_side} x {min_side} px patches, so nothing in it could be found: each side must be at least "
            f"{min_side} px."
        )


def _plan_raster(path, *, tile, overlap, nodata, band, any_body=False, min_side=64):
    check_complete(path)
    with _open(path, band, nodata) as src:
        _check_size(path, src.width, src.height, min_side)
        windows = plan_windows(src.width, src.height, tile=tile, overlap=overlap, image=src.name,
                               min_read=min_side)
        georef = _georeferencer(src, any_body)
        size = (src.width, src.height)
        used_nodata = src.nodata
    tasks = [
        _TileTask(w, str(path), band, nodata, float(w.col0), float(w.row0))
        for w in windows
    ]
    pieces = [_Piece(str(path), 0, 0, size[0], size[1])]
    return tasks, {str(windows[0].image): dict(pieces=pieces, georefs={str(path): georef}, nodata=used_nodata)}


def _read_tile_table(root):
    """Tile table of a tile-set folder; the consensus, when present, is validated too."""
    from ..tileset import load_tileset

    if (root / CONSENSUS_FILE).is_file():
        return load_tileset(root, check_images=False).tiles
    try:
        tiles = pd.read_csv(root / TILES_FILE, dtype=str, keep_default_na=False)
    except (OSError, ValueError, pd.errors.ParserError) as err:
        raise TileSetError(f"{str(root / TILES_FILE)!r} cannot be read: {err}.") from err
    missing = [c for c in TILES_REQUIRED if c not in tiles.columns]
    if missing:
        raise TileSetError(f"{str(root / TILES_FILE)!r} lacks column(s) {', '.join(missing)}.")
    if tiles.empty:
        raise TileSetError(f"{str(root / TILES_FILE)!r} has no data rows: the tile set is empty.")
    dup = tiles["tile_id"].duplicated()
    if dup.any():
        i = int(np.flatnonzero(dup.to_numpy())[0])
        raise TileSetError(f"{TILES_FILE} row {i + 1}: tile_id {tiles['tile_id'].iloc[i]!r} is repeated.")
    for column in ("col0", "row0"):
        if column in tiles.columns:
            tiles[column] = pd.to_numeric(tiles[column].replace("", np.nan), errors="coerce")
    return tiles


def _plan_tileset(root, *, nodata, band, any_body=False, min_side=64):
    tiles = _read_tile_table(root)
    scale = (pd.to_numeric(tiles["metres_per_px"], errors="coerce") if "metres_per_px" in tiles
             else pd.Series(np.nan, index=tiles.index)).to_numpy(dtype=float)
    col0 = (pd.to_numeric(tiles["col0"], errors="coerce") if "col0" in tiles else pd.Series(np.nan, index=tiles.index))
    row0 = (pd.to_numeric(tiles["row0"], errors="coerce") if "row0" in tiles else pd.Series(np.nan, index=tiles.index))
    tasks, images = [], {}
    for i, (tile_id, image, rel, c, r, mpp) in enumerate(
        zip(tiles["tile_id"].astype(str), tiles["image_id"].astype(str), tiles["path"].astype(str),
            col0.to_numpy(dtype=float), row0.to_numpy(dtype=float), scale, strict=True)
    ):
        from ..tileset import path_problem

        problem = path_problem(root, rel)
        if problem:
            raise TileSetError(f"{str(root / TILES_FILE)!r} row {i + 1}: path {rel!r} {problem}.")
        path = root / rel
        if not path.is_file():
            raise ImageError(f"{TILES_FILE} row {i + 1}: image {str(path)!r} does not exist.")
        check_complete(path)
        # The header alone: size, band count and georeferencing, without decoding pixels.
        with _open(path, band, nodata) as src:
            w, h = src.width, src.height
            _check_size(path, w, h, min_side, where=f"{TILES_FILE} row {i + 1}: ")
            georef = _georeferencer(src, any_body)
            used_nodata = src.nodata
        window = TileWindow(tile_id, image, 0, 0, w, h, 0, 0, w, h)  # the whole file is the tile
        tasks.append(_TileTask(window, str(path), band, nodata, float(c), float(r), metres_per_px=float(mpp)))
        entry = images.setdefault(image, dict(pieces=[], georefs={}, nodata=used_nodata))
        entry["georefs"][str(path)] = georef
        entry["pieces"].append((float(c), float(r), str(path), w, h))
    for entry in images.values():
        raw = entry["pieces"]
        placed = all(np.isfinite(c) and np.isfinite(r) for c, r, *_ in raw)
        pieces, x = [], 0
        for c, r, path, w, h in raw:
            # Without offsets the tiles of an image are laid side by side.
            pieces.append(_Piece(path, int(c), int(r), w, h) if placed else _Piece(path, x, 0, w, h))
            x += w
        entry["pieces"] = pieces
    return tasks, images


def _plan(inputs, *, tile, overlap, nodata, band, any_body=False, min_side=64):
    if isinstance(inputs, (str, os.PathLike)):
        inputs = [inputs]
    # Absolute: workers on other machines or in other folders (a Dask cluster) must find the same files.
    inputs = [Path(p).resolve() for p in inputs]
    if not inputs:
        raise DetectorError("screen needs at least one input image or tile-set folder.")
    tasks, images, owner = [], {}, {}
    for path in inputs:
        if path.is_dir():
            if not (path / TILES_FILE).is_file():
                raise DetectorError(f"input folder {str(path)!r} has no {TILES_FILE}; it is not a tile set.")
            new_tasks, new_images = _plan_tileset(path, nodata=nodata, band=band, any_body=any_body,
                                                  min_side=min_side)
        elif path.exists():
            new_tasks, new_images = _plan_raster(path, tile=tile, overlap=overlap, nodata=nodata, band=band,
                                                 any_body=any_body, min_side=min_side)
        else:
            raise ImageError(f"input {str(path)!r} does not exist.")
        for image, entry in new_images.items():
            if image in images:
                raise DetectorError(
                    f"inputs {str(owner[image])!r} and {str(path)!r} both hold an image named {image!r}; "
                    f"rename one of them."
                )
            images[image] = entry
            owner[image] = path
        tasks.extend(new_tasks)
    ids = pd.Series([t.tile_id for t in tasks])
    dup = ids.duplicated()
    if dup.any():
        raise DetectorError(f"tile_id {ids[dup].iloc[0]!r} occurs in more than one input; tile ids must be unique.")
    steps = _canvas_steps(images)
    tasks = sorted((dataclasses.replace(t, canvas_step=steps.get(t.image, 0)) for t in tasks), key=lambda t: t.sort_key)
    return tasks, images


# ----------------------------------------------------------------------------- per-tile work

# Per process: a few open rasters, so that a worker pays for opening once, not once
# per tile (models are cached by detector.model.cached_model).
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


def _screen_tile(index, task, model_dir, min_score=None):
    """Screen one tile; returns ``(index, entry)`` with its tiles.csv row and detections (plain lists)."""
    from .._allocator import reuse_freed_memory
    from ..inference.detect import detect_tile
    from ..inference.unfamiliar import unfamiliarity_parts, unfamiliarity_score

    reuse_freed_memory()
    model = cached_model(model_dir)
    src, georef = _cached_source(task.path, task.band, task.nodata)
    array, mask = src.read(task.window)
    if task.canvas_step:
        entry_canvas = _canvas_block(array, mask, task)
    core = task.window.core_slices
    dy, dx = core[0].start, core[1].start
    valid_share = float(1.0 - mask[core].mean())
    row = {
        "tile_id": task.tile_id, "image": task.image, "col0": task.col0, "row0": task.row0,
        "width": task.width, "height": task.height, "p_deposit": np.nan, "fan_cover": np.nan,
        "spot_cover": np.nan, "n_fans": 0, "mean_direction_deg": np.nan, "direction_scatter_deg": np.nan,
        "unfamiliarity": np.nan, "route": "", "n_spots": 0, "valid_fraction": valid_share,
        "area_m2": _core_area_m2(task, georef), "covered_m2": np.nan,
        **dict.fromkeys(SHARE_COLUMNS, np.nan),
    }
    entry = {"tile_id": task.tile_id, "georeferenced": georef is not None, "pixels": task.width * task.height}
    if task.canvas_step:
        entry["canvas"] = entry_canvas
    if valid_share < MIN_VALID_SHARE:
        row["route"] = "nodata"
        entry.update(tile=row, detections=_empty_detections())
        return index, entry

    result = detect_tile(model, array, tile_id=task.tile_id, nodata_mask=mask, min_score=min_score)
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
    px = np.asarray(result.grid.x_px, dtype=float) - dx
    py = np.asarray(result.grid.y_px, dtype=float) - dy
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
    )
    shares = unfamiliarity_parts(model.card.get("unfamiliarity"), result.summary[None, :], model.card["feature_names"])
    row.update(zip(SHARE_COLUMNS, (float(v) for v in shares[0])))
    row["covered_m2"] = (row["fan_cover"] + row["spot_cover"]) * row["area_m2"]
    entry.update(tile=row, detections={c: det[c].tolist() for c in det.columns})
    return index, entry


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


# ----------------------------------------------------------------------------- journal


class _Journal:
    """One JSON file per finished tile in ``out/.partial``, named by the tile's place in the plan."""

    def __init__(self, out):
        self.folder = Path(out) / _JOURNAL

    def _path(self, index):
        return self.folder / f"{index:07d}.json"

    def sweep(self):
        """Remove temporary files an interrupted run left behind (a killed write never renamed)."""
        if self.folder.is_dir():
            for stale in self.folder.glob(".*.tmp*"):
                stale.unlink(missing_ok=True)

    def write(self, index, entry):
        self.folder.mkdir(parents=True, exist_ok=True)
        with atomic_path(self._path(index)) as tmp:
            with open(tmp, "w", encoding="utf-8") as handle:
                json.dump(entry, handle)
                handle.flush()
                os.fsync(handle.fileno())

    def _checked(self, index, task):
        """The entry of ``task`` at plan index ``index``; None when missing, unreadable or of another tile."""
        try:
            entry = json.loads(self._path(index).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        return entry if entry.get("tile_id") == task.tile_id else None

    def entry(self, index, task):
        """The entry of ``task`` at plan index ``index``; an error when it is missing or damaged."""
        entry = self._checked(index, task)
        if entry is None:
            raise DetectorError(
                f"journal entry {str(self._path(index))!r} of tile {task.tile_id!r} is missing or damaged; "
                f"run the same command again to recompute it."
            )
        return entry

    def finished(self, tasks):
        """Plan indices whose entry is already in the journal; others (missing, unreadable, of
        another tile) are computed again.

        Entries are checked, not kept: the outputs read them again one image at a
        time, so memory does not follow the number of tiles.
        """
        if not self.folder.is_dir():
            return set()
        return {index for index, task in enumerate(tasks) if self._checked(index, task) is not None}


# ----------------------------------------------------------------------------- running


def _check_workers(workers):
    if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 1:
        raise SpecError(f"workers {workers!r} must be a whole number >= 1.")
    return int(workers)


def _run_serial(todo, model_dir, min_score):
    for index, task in todo:
        yield _screen_tile(index, task, model_dir, min_score)


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


def _screen_tile_local(index, task, model_dir, min_score):
    """:func:`_screen_tile` in a local worker that ends with its parent."""
    _exit_with_parent()
    return _screen_tile(index, task, model_dir, min_score)


def _run_loky(todo, model_dir, min_score, workers):
    from joblib import Parallel, delayed

    parallel = Parallel(n_jobs=workers, backend="loky", return_as="generator_unordered")
    yield from parallel(delayed(_screen_tile_local)(index, task, model_dir, min_score) for index, task in todo)


def _run_dask(todo, model_dir, min_score, scheduler, info=None):
    from distributed import as_completed

    from ..cluster import connect, worker_count

    with connect(scheduler) as client:
        if info is not None:
            info["workers"] = worker_count(client)
        futures = client.map(
            _screen_tile, [i for i, _ in todo], [t for _, t in todo], model_dir=model_dir, min_score=min_score,
            pure=False,
        )
        try:
            for future in as_completed(futures):
                yield future.result()
        finally:
            client.cancel(futures)


def _progress(total, initial, enabled):
    from tqdm.auto import tqdm

    # disable=None: tqdm stays quiet when stderr is not a terminal (a log file, a pipe).
    return tqdm(total=total, initial=initial, unit="tile", desc="screen", disable=None if enabled else True,
                leave=False)


# ----------------------------------------------------------------------------- run record


def _version():
    try:
        from importlib.metadata import version

        return version("frostvane")
    except Exception:  # not installed as a distribution (e.g. run from a source tree)
        return "unknown"


def _parameters(model_dir, inputs, *, tile, overlap, nodata, band):
    from ..inference.model import MODEL_CARD, sha256_file

    return {
        "model_dir": str(Path(model_dir).resolve()),
        "model_hash": sha256_file(Path(model_dir) / MODEL_CARD),
        "inputs": [str(Path(p).resolve()) for p in inputs],
        "input_stamps": [_stamp(p) for p in inputs],
        "tile": [int(tile[0]), int(tile[1])],
        "overlap": int(overlap),
        "nodata": _nodata_record(nodata),
        "band": None if band is None else int(band),
    }


def _nodata_record(nodata):
    """The no-data choice as JSON can hold it: null (the raster's own, else 0), "none", or a number."""
    from ..gis.raster import nodata_value

    if nodata is None:
        return None
    value = nodata_value(nodata)
    return "none" if math.isnan(value) else value


def _stamp(path):
    """Size and modification time of an input (of its tiles.csv for a tile set): a replaced input is another run."""
    path = Path(path)
    target = path / TILES_FILE if path.is_dir() else path
    st = target.stat()
    return [int(st.st_size), int(st.st_mtime_ns)]


def _mark_failed(out, record, err):
    """Set run.json's status to "failed" with the reason (best effort: the disk may be full)."""
    with contextlib.suppress(OSError, ValueError, TypeError):
        write_json(Path(out) / _RUN_FILE, _finite({**record, "status": "failed", "error": str(err)[:500]}), end="\n")


def _sweep_stale_outputs(out):
    """Remove hidden output stages a killed run left in ``out`` (they are never moved in)."""
    import shutil

    for stale in Path(out).glob(".outputs.*"):
        if stale.is_dir():
            shutil.rmtree(stale, ignore_errors=True)


def _claim(out, params):
    """Make ``out`` this run's folder, or find that it already is; refuse a folder of another run."""
    out = Path(out)
    run_file = out / _RUN_FILE
    if out.exists() and not out.is_dir():
        raise DetectorError(f"output {str(out)!r} exists and is not a folder.")
    if run_file.is_file():
        try:
            previous = json.loads(run_file.read_text(encoding="utf-8"))
        except (OSError, ValueError) as err:
            raise DetectorError(f"{str(run_file)!r} is not a readable run record: {err}.") from err
        if not isinstance(previous, dict) or not isinstance(previous.get("parameters", {}), dict):
            raise DetectorError(
                f"{str(run_file)!r} is not a run record (a JSON object with 'parameters'); "
                f"choose another --out or delete the folder."
            )
        _sweep_stale_outputs(out)
        old = previous.get("parameters", {})
        differ = [k for k in params if k != "model_dir" and old.get(k) != params[k]]
        if differ and previous.get("status") == "failed":
            # A run that failed (bad input, full disk) is not resumed with other inputs: start afresh.
            import shutil

            shutil.rmtree(out / _JOURNAL, ignore_errors=True)
            record = {"status": "running", "parameters": params, "version": _version(),
                      "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
            write_json(run_file, record, end="\n")
            return record
        if differ:
            what = ", ".join(f"{k} {old.get(k)!r} -> {params[k]!r}" for k in differ)
            raise DetectorError(
                f"output folder {str(out)!r} holds another screening run ({what}); "
                f"choose another --out or delete it."
            )
        return previous
    if out.is_dir() and any(out.iterdir()):
        raise DetectorError(
            f"output folder {str(out)!r} is not empty and holds no {_RUN_FILE}; choose a new or empty folder."
        )
    record = {"status": "running", "parameters": params, "version": _version(),
              "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
    write_json(run_file, record, end="\n")
    return record


# ----------------------------------------------------------------------------- assembly


def _frames(entries, columns):
    """tiles.csv and detections.csv rows of some journal entries (one image's), typed."""
    tiles = pd.DataFrame([e["tile"] for e in entries], columns=list(TILE_COLUMNS))
    for c in ("col0", "row0"):
        tiles[c] = pd.array(np.where(np.isfinite(tiles[c].to_numpy(dtype=float)), tiles[c], np.nan)).astype("Int64")
    for c in ("width", "height", "n_fans", "n_spots"):
        tiles[c] = tiles[c].astype(np.int64)
    tiles["route"] = tiles["route"].astype(str)
    merged = {c: [] for c in columns}
    for entry in entries:
        det = entry["detections"]
        n = len(det["tile_id"])
        for c in columns:
            merged[c].extend(det.get(c, [np.nan] * n))
    detections = pd.DataFrame(merged, columns=columns)
    text = ("tile_id", "kind", "image")
    for c in columns:
        if c not in text:
            detections[c] = pd.to_numeric(detections[c], errors="coerce").astype(float)
    for c in ("col0", "row0"):
        detections[c] = detections[c].astype("Int64")
    detections["votes"] = detections["votes"].astype("Int64")
    return tiles, detections


def _image_offsets(detections, tasks):
    """(file path, file-px x offset, file-px y offset) of every detection's tile."""
    table = pd.DataFrame(
        {"path": [t.path for t in tasks], "ox": [t.file_col0 for t in tasks], "oy": [t.file_row0 for t in tasks]},
        index=[t.tile_id for t in tasks],
    )
    rows = table.loc[detections["tile_id"].to_numpy()]
    return rows["path"].to_numpy(dtype=object), rows["ox"].to_numpy(dtype=float), rows["oy"].to_numpy(dtype=float)


@dataclass(frozen=True)
class _GeoContext:
    """Run-wide georeferencing: every file's georeferencer and its GeoPackage layer pair.

    Files that share a CRS share a pair of layers (``detections`` and
    ``tiles``, numbered ``_2``, ``_3``, ... when the run holds several CRSs);
    files without a CRS share the pair in image pixels.
    """

    georefs: dict
    layers: dict  # file path -> (layer suffix, CRS WKT or None)

    @property
    def any_georeferenced(self):
        return any(g is not None for g in self.georefs.values())

    @classmethod
    def of(cls, images):
        georefs = {}
        for entry in images.values():
            georefs.update(entry["georefs"])
        keys = []
        for g in georefs.values():
            key = None if g is None else g.crs.to_wkt()
            if key not in keys:
                keys.append(key)
        suffix = {key: "" if len(keys) == 1 else f"_{k + 1}" for k, key in enumerate(keys)}
        layers = {path: (suffix[None if g is None else g.crs.to_wkt()], None if g is None else g.crs.to_wkt())
                  for path, g in georefs.items()}
        return cls(georefs, layers)

    def describe(self):
        """One line per GeoPackage layer pair: what its coordinates are."""
        out = {}
        for path, (suffix, _wkt) in self.layers.items():
            g = self.georefs[path]
            out.setdefault(suffix, "image pixels (x = column, y = -row), no CRS" if g is None
                           else f"map coordinates of {g.crs.name!r}")
        return {f"detections{k}, tiles{k}": v for k, v in out.items()}


def _geojson_chunks(detections, tasks, geo, *, chunk=2000):
    """FeatureCollections of consecutive chunks of the georeferenced detections (maybe empty)."""
    if detections.empty:
        return
    paths, _, _ = _image_offsets(detections, tasks)
    georeferenced = np.array([geo.georefs[p] is not None for p in paths], dtype=bool)
    detections = detections.loc[georeferenced]
    for start in range(0, len(detections), chunk):
        yield _geojson(detections.iloc[start:start + chunk], tasks, geo)


def _geojson(detections, tasks, geo):
    """Planetocentric lon/lat FeatureCollection of georeferenced detections (see detector.geojson)."""
    from ..gis.geojson import detections_to_geojson

    paths, ox, oy = _image_offsets(detections, tasks)
    df = detections.copy()
    df["x_px"] = df["x_px"] + ox
    df["y_px"] = df["y_px"] + oy
    features = []
    for path in pd.unique(paths):
        features.extend(detections_to_geojson(df.loc[paths == path], georef=geo.georefs[path])["features"])
    return {"type": "FeatureCollection", "features": features}


def _pixel_crs_xy(cols, rows):
    """Image px (centre convention) to the GeoPackage's pixel CRS: x = column, y = -row, corners at integers."""
    return np.column_stack([np.asarray(cols, dtype=float) + 0.5, -(np.asarray(rows, dtype=float) + 0.5)])


_TEXT_COLUMNS = ("tile_id", "image", "route", "kind")


def _layer_fields(frame):
    """GeoPackage attribute columns of a frame: text as str, everything else float (NaN = null)."""
    return {c: frame[c].astype(str).to_numpy(dtype=object) if c in _TEXT_COLUMNS
            else pd.to_numeric(frame[c], errors="coerce").to_numpy(dtype=float) for c in frame.columns}


def _write_gpkg_chunk(path, name, tiles, detections, tasks, images, geo, created):
    """Append one image's detections and tile footprints to the GeoPackage's layers.

    ``created`` is the set of layers already in the file (updated here).
    """
    from ..gis.geojson import detection_rings
    from ..gis.gpkg import PIXEL_CRS_WKT, write_polygon_layer

    pieces = {p.path: p for p in images[name]["pieces"]}
    by_tile = {t.tile_id: t for t in tasks}

    def layer_xy(file_path, cols, rows):
        # cols, rows: px of the file; to the layer's coordinates
        georef = geo.georefs[file_path]
        if georef is None:
            piece = pieces[file_path]
            return _pixel_crs_xy(np.asarray(cols) + piece.col0, np.asarray(rows) + piece.row0)
        return np.column_stack([np.atleast_1d(v) for v in georef.pixel_to_map(cols, rows)])

    def write(layer, wkt, rings, fields, what):
        write_polygon_layer(path, layer, rings, fields, crs_wkt=wkt or PIXEL_CRS_WKT,
                            description=f"frostvane {what}" + ("" if wkt else
                                                               "; image pixels, x = column, y = -row, no CRS"),
                            append=layer in created)
        created.add(layer)

    tile_paths = np.array([by_tile[t].path for t in tiles["tile_id"]], dtype=object)
    det_paths, ox, oy = _image_offsets(detections, tasks) if len(detections) else (np.array([], dtype=object),) * 3
    suffixes = {geo.layers[p] for p in pd.unique(tile_paths)}
    for suffix, wkt in sorted(suffixes, key=lambda k: k[0]):
        files = [p for p in pd.unique(tile_paths) if geo.layers[p] == (suffix, wkt)]
        # tile footprints
        sel = np.isin(tile_paths, files)
        part = tiles.loc[sel]
        rings = []
        for tile_id, file_path in zip(part["tile_id"], tile_paths[sel], strict=True):
            corners = _core_corners(by_tile[tile_id].window)
            rings.append(layer_xy(file_path, corners[:, 0], corners[:, 1]))
        fields = _layer_fields(part)
        fields["covered_fraction"] = (part["fan_cover"] + part["spot_cover"]).to_numpy(dtype=float)
        write(f"tiles{suffix}", wkt, rings, fields, "tile footprints (cores) with p_deposit, route and cover")
        # detections
        sel = np.isin(det_paths, files)
        part = detections.loc[sel]
        file_x = part["x_px"].to_numpy(dtype=float) + np.asarray(ox[sel], dtype=float)
        file_y = part["y_px"].to_numpy(dtype=float) + np.asarray(oy[sel], dtype=float)
        outlines, _ = detection_rings(part.assign(x_px=file_x, y_px=file_y))
        rings = [layer_xy(fp, r[:, 0], r[:, 1]) for fp, r in zip(det_paths[sel], outlines, strict=True)]
        fields = _layer_fields(part)
        write(f"detections{suffix}", wkt, rings, fields, "detections (fan sectors, spot ellipses)")


# ----------------------------------------------------------------------------- figures


def _decimated(piece, band, nodata, step):
    """Every ``step``-th pixel of a piece in both axes, and its no-data mask.

    The file is read in strips of full rows of a few tens of MB each, so
    memory does not follow the image size. (A single resampled read with
    ``out_shape`` was tens of times slower on tiled, compressed GeoTIFFs.)
    """
    with _open(piece.path, band, nodata) as src:
        rows_per_strip = step * max(1, (_STRIP_BYTES // max(1, piece.width * src.dtype.itemsize)) // step)
        strips, masks = [], []
        for r0 in range(0, piece.height, rows_per_strip):
            h = min(rows_per_strip, piece.height - r0)
            array, mask = src.read((0, r0, piece.width, h))
            strips.append(array[::step, ::step].astype(np.float32))
            # A copy: a strided view would keep every strip's full-size mask alive.
            masks.append(mask[::step, ::step].copy())
    return np.vstack(strips), np.vstack(masks)


def _image_size(entry):
    """(width, height) of an image's quick-look canvas at full resolution, px."""
    pieces = entry["pieces"]
    return max(p.col0 + p.width for p in pieces), max(p.row0 + p.height for p in pieces)


def _panel_cap(n_panels):
    """Longer side of each quick-look panel's canvas, px, for a run of ``n_panels`` panels."""
    return _QUICKLOOK_PX if n_panels == 1 else max(600, _QUICKLOOK_PX // min(3, n_panels))


def _canvas_step(entry, cap):
    width, height = _image_size(entry)
    return max(1, math.ceil(max(width, height) / cap))


def _canvas_steps(images):
    """Each image's quick-look sampling step for the workers: 0 for images beyond the
    panel limit and for small ones (step below 4, which the outputs read again cheaply),
    so that a tile's samples stay a sixteenth of its pixels or less."""
    names = sorted(images)
    cap = _panel_cap(len(names[:_MAX_PANELS]))
    steps = {name: _canvas_step(images[name], cap) for name in names[:_MAX_PANELS]}
    return {name: step if step >= _MIN_SAMPLED_STEP else 0 for name, step in steps.items()}


def _canvas(entry, band, nodata, cap, blocks=None):
    """An image's quick-look canvas (every ``step``-th pixel, NaN on no-data) and its scale.

    ``blocks`` lists ``(path, block)`` of every tile of the image as the workers
    sampled them (see :func:`_canvas_block`); without it (a journal written by an
    older version) the image files are read again.
    """
    pieces = entry["pieces"]
    width, height = _image_size(entry)
    step = _canvas_step(entry, cap)
    scale = 1.0 / step
    canvas = np.full((-(-height // step), -(-width // step)), np.nan, np.float32)
    if blocks is not None:
        where = {p.path: (-(-p.row0 // step), -(-p.col0 // step)) for p in pieces}
        for path, block in blocks:
            if block is None:
                continue
            values = np.frombuffer(base64.b64decode(block["values"]), dtype="<f4")
            values = values.reshape(block["height"], block["width"])
            r0, c0 = where[path]
            r0, c0 = r0 + block["row"], c0 + block["col"]
            h = min(values.shape[0], canvas.shape[0] - r0)
            w = min(values.shape[1], canvas.shape[1] - c0)
            canvas[r0 : r0 + h, c0 : c0 + w] = values[:h, :w]
        return canvas, scale
    for p in pieces:
        array, mask = _decimated(p, band, nodata, step)
        r0, c0 = -(-p.row0 // step), -(-p.col0 // step)
        h = min(array.shape[0], canvas.shape[0] - r0)
        w = min(array.shape[1], canvas.shape[1] - c0)
        canvas[r0 : r0 + h, c0 : c0 + w] = np.where(mask[:h, :w], np.nan, array[:h, :w])
    return canvas, scale


def _gray_rgb(canvas):
    """A 2-98 % stretched 8-bit RGB view of a canvas, no-data black (matplotlib then skips its float pipeline)."""
    finite = np.isfinite(canvas)
    lo, hi = np.percentile(canvas[finite], [2, 98]) if finite.any() else (0.0, 1.0)
    gray = np.clip((np.nan_to_num(canvas, nan=lo) - lo) / max(hi - lo, 1e-9), 0.0, 1.0) * 255.0
    gray = np.where(finite, gray, 0.0).astype(np.uint8)
    return np.repeat(gray[:, :, None], 3, axis=2)


def _canvas_positions(detections, tasks, images):
    """Detections' x, y in their image's quick-look canvas (unscaled px)."""
    pieces = pd.DataFrame(
        [(p.path, p.col0, p.row0) for entry in images.values() for p in entry["pieces"]], columns=["path", "c", "r"]
    ).set_index("path")
    paths, ox, oy = _image_offsets(detections, tasks)
    px = pieces.loc[paths, "c"].to_numpy(dtype=float)
    py = pieces.loc[paths, "r"].to_numpy(dtype=float)
    return detections["x_px"].to_numpy(dtype=float) + ox + px, detections["y_px"].to_numpy(dtype=float) + oy + py


def _figure(n, panel_in, polar=False, aspect=None, extra_width_in=0.8):
    """A figure of ``n`` panels whose longer side is ``panel_in`` inches.

    With ``aspect`` (panel height / width, e.g. of the images shown) the panels
    take that shape and the grid gets as many columns as keep the figure
    roughly square, so tall strips stand side by side instead of leaving most
    of a square figure empty. ``extra_width_in`` is room for a colour bar.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    if aspect is None:
        ncols = int(min(n, 3 if n > 4 else n if n <= 2 else 2))
        width_in = height_in = panel_in
    else:
        aspect = float(np.clip(aspect, 0.2, 5.0))
        ncols = int(min(n, max(1, math.ceil(math.sqrt(n * aspect)))))
        # 2.5 in at least, so that a tall panel's title still fits
        width_in = max(panel_in / max(aspect, 1.0), 2.5)
        height_in = panel_in * min(aspect, 1.0)
    nrows = -(-n // ncols)
    fig = Figure(figsize=(width_in * ncols + extra_width_in, height_in * nrows + 0.6), dpi=110,
                 layout="constrained")
    FigureCanvasAgg(fig)
    kw = {"projection": "polar"} if polar else {}
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False, subplot_kw=kw)).ravel()
    for ax in axes[n:]:
        ax.set_axis_off()
    return fig, axes[:n]


class _Figures:
    """The quick-look and the rose figures, filled one image's panel at a time.

    Parameters
    ----------
    names : list of str
        All images of the run, sorted; the first ``_MAX_PANELS`` get a panel.
    images : dict
        The plan's images (their pieces give each canvas's size).
    use_azimuth : bool
        Rose of azimuths (georeferenced run) rather than of image directions.
    """

    def __init__(self, names, images, *, use_azimuth):
        self.names = list(names)[:_MAX_PANELS]
        n = len(self.names)
        self.cap = _panel_cap(n)
        self.use_azimuth = use_azimuth
        sizes = [_image_size(images[name]) for name in self.names]
        aspect = float(np.median([h / w for w, h in sizes])) if sizes else 1.0
        self.quick, quick_axes = _figure(n, 9.0 if n == 1 else 4.5, aspect=aspect, extra_width_in=1.5)
        self.rose, rose_axes = _figure(n, 3.6, polar=True)
        self.quick_axes = dict(zip(self.names, quick_axes, strict=True))
        self.rose_axes = dict(zip(self.names, rose_axes, strict=True))
        georefs = [g for name in self.names for g in images[name]["georefs"].values()]
        # Fans are coloured by azimuth where the image is georeferenced, as the rose counts them.
        self.all_azimuth = bool(georefs) and all(g is not None for g in georefs)
        self.some_azimuth = any(g is not None for g in georefs)

    def add(self, name, detections, tasks, images, *, band, nodata, blocks=None):
        """Draw one image's panels (a no-op for images beyond the panel limit)."""
        if name in self.quick_axes:
            _quicklook_panel(self.quick_axes[name], name, detections, tasks, images, self.cap, band=band,
                             nodata=nodata, blocks=blocks)
            _rose_panel(self.rose_axes[name], name, detections, self.use_azimuth)

    def save(self, quicklook_path, rose_path):
        from matplotlib.cm import ScalarMappable
        from matplotlib.colors import Normalize

        from ..plots import DIRECTION_CMAP

        bar = self.quick.colorbar(ScalarMappable(norm=Normalize(0, 360), cmap=DIRECTION_CMAP),
                                  ax=list(self.quick_axes.values()), shrink=0.7, ticks=[0, 90, 180, 270, 360])
        bar.set_label("fan azimuth, degrees clockwise from north" if self.all_azimuth else
                      "fan azimuth (georeferenced images) or direction from image up (others), degrees clockwise"
                      if self.some_azimuth else "fan direction, degrees clockwise from image up", fontsize=7)
        self.rose.suptitle(
            ("fan azimuth, degrees clockwise from north" if self.use_azimuth
             else "fan direction, degrees clockwise from image up") + "; weighted by length", fontsize=8,
        )
        for fig, path in ((self.quick, quicklook_path), (self.rose, rose_path)):
            with atomic_path(path) as tmp:
                fig.savefig(tmp, format="png")


def _panel_georef(entry):
    """The georeferencer of an image's first piece and that piece (None, None when it has no CRS)."""
    piece = entry["pieces"][0]
    georef = entry["georefs"].get(piece.path)
    return (georef, piece) if georef is not None else (None, None)


def _north_deg(georef, col, row):
    """Direction of north in the image at (col, row), degrees clockwise from image up."""
    guess = (-float(georef.grid_to_azimuth(0.0, col, row))) % 360.0
    # One correction step for projections that are not conformal.
    error = (float(georef.grid_to_azimuth(guess, col, row)) + 180.0) % 360.0 - 180.0
    return (guess - error) % 360.0


def _panel_furniture(ax, entry, tasks, canvas, scale, has_detections):
    """Axis units in image px, and for georeferenced images a north arrow and a scale bar."""
    from matplotlib.ticker import FuncFormatter

    from ..plots import add_legend, add_north_arrow, add_scale_bar

    to_px = FuncFormatter(lambda v, _pos: f"{v / scale:.0f}")
    ax.xaxis.set_major_formatter(to_px)
    ax.yaxis.set_major_formatter(to_px)
    ax.set_xlabel("column, px", fontsize=6)
    ax.set_ylabel("row, px", fontsize=6)
    georef, piece = _panel_georef(entry)
    if georef is not None:
        col, row = piece.width / 2 - 0.5, piece.height / 2 - 0.5
        add_north_arrow(ax, _north_deg(georef, col, row))
        metres_per_px = float(georef.ground_length_m(1.0, 90.0, col, row))
        add_scale_bar(ax, metres_per_px / scale, width_units=canvas.shape[1])
    else:
        mpp = [t.metres_per_px for t in tasks if np.isfinite(t.metres_per_px)]
        if mpp:
            add_scale_bar(ax, float(np.median(mpp)) / scale, width_units=canvas.shape[1])
    if has_detections:
        add_legend(ax)


def _quicklook_panel(ax, name, detections, tasks, images, cap, *, band, nodata, blocks=None):
    from ..plots import draw_features

    canvas, scale = _canvas(images[name], band, nodata, cap, blocks)
    ax.imshow(_gray_rgb(canvas), interpolation="nearest")
    title = name
    if not detections.empty:
        cx, cy = _canvas_positions(detections, tasks, images)
        shown = detections.assign(x_px=cx, y_px=cy)
        n_all = len(shown)
        if n_all > _MAX_DRAWN:
            # Matplotlib slows down with many patches; the strongest detections tell the story.
            shown = shown.nlargest(_MAX_DRAWN, "score")
        shown = shown.assign(
            x_px=shown["x_px"] * scale, y_px=shown["y_px"] * scale, length_px=shown["length_px"] * scale,
            semi_major_px=shown["semi_major_px"] * scale, semi_minor_px=shown["semi_minor_px"] * scale,
        )
        color = shown["direction_deg"].to_numpy(dtype=float)
        if "azimuth_deg" in shown.columns:
            azimuth = shown["azimuth_deg"].to_numpy(dtype=float)
            color = np.where(np.isfinite(azimuth), azimuth, color)
        draw_features(ax, shown, linewidth=0.6, as_collection=True, color_deg=color)
        title += f"  ({n_all} detections" + (f", {len(shown)} strongest drawn)" if n_all > len(shown) else ")")
    ax.set_xlim(-0.5, canvas.shape[1] - 0.5)
    ax.set_ylim(canvas.shape[0] - 0.5, -0.5)
    ax.set_title(title + (f"  [1:{1 / scale:.0f}]" if scale < 1 else ""), fontsize=8)
    ax.tick_params(labelsize=6)
    _panel_furniture(ax, images[name], tasks, canvas, scale, not detections.empty)


def _rose_panel(ax, name, detections, use_azimuth):
    edges = np.linspace(0.0, 360.0, _ROSE_BINS + 1)
    fans = detections.loc[detections["kind"] == "fan"]
    angles = fans["azimuth_deg" if use_azimuth else "direction_deg"].to_numpy(dtype=float)
    if use_azimuth and not np.isfinite(angles).all():
        angles = np.where(np.isfinite(angles), angles, fans["direction_deg"].to_numpy(dtype=float))
    weights = np.nan_to_num(fans["length_px"].to_numpy(dtype=float))
    counts, _ = np.histogram(angles % 360.0, bins=edges, weights=weights)
    ax.set_theta_zero_location("N")
    ax.set_theta_direction(-1)
    ax.bar(np.radians(edges[:-1]), counts, width=np.radians(360.0 / _ROSE_BINS), align="edge",
           color="tab:orange", edgecolor="black", linewidth=0.3)
    # In a run mixing georeferenced and plain images, say which panels are not azimuths.
    plain = use_azimuth and len(fans) and not np.isfinite(fans["azimuth_deg"].to_numpy(dtype=float)).any()
    ax.set_title(f"{name} ({len(fans)} fans" + (", from image up)" if plain else ")"), fontsize=8)
    ax.tick_params(labelsize=6)
    ax.set_yticklabels([])


def _write_outputs(stage, tasks, journal, images, *, band, nodata):
    """Write the five outputs into ``stage`` from the journal, one image at a time.

    Only one image's entries and rows are in memory at once, so memory follows
    the largest image's catalog, not the run's.

    Returns
    -------
    totals : dict
        Counts and areas over the whole run for the summary.
    per_image : DataFrame
        See :class:`ScreenSummary`.
    """
    geo = _GeoContext.of(images)
    columns = list(DETECTION_OUTPUT_COLUMNS) + (list(GEO_COLUMNS) if geo.any_georeferenced else [])
    groups = {}
    for index, task in enumerate(tasks):
        groups.setdefault(task.image, []).append(index)
    names = sorted(images)
    figures = _Figures(names, images, use_azimuth="azimuth_deg" in columns)
    totals = dict(n_tiles=0, n_scored=0, n_nodata=0, n_fans=0, n_spots=0, n_deposit_tiles=0, area=0.0,
                  covered=0.0)
    records = []

    def image_chunks(tiles_out, detections_out):
        # Each image's rows go to both CSVs, its panels and counts, then its GeoJSON features.
        for k, name in enumerate(names):
            indices = groups.get(name, [])
            image_tasks = [tasks[i] for i in indices]
            entries = [journal.entry(i, tasks[i]) for i in indices]
            # the workers' quick-look samples, when every tile has them (older journals do not)
            blocks = ([(t.path, e["canvas"]) for t, e in zip(image_tasks, entries, strict=True)]
                      if all("canvas" in e for e in entries) else None)
            tiles, detections = _frames(entries, columns)
            del entries
            tiles.to_csv(tiles_out, index=False, header=k == 0)
            detections.to_csv(detections_out, index=False, header=k == 0)
            figures.add(name, detections, image_tasks, {name: images[name]}, band=band, nodata=nodata,
                        blocks=blocks)
            records.append(_per_image(tiles, detections))
            scored = tiles[tiles["route"] != "nodata"]
            totals["n_tiles"] += len(tiles)
            totals["n_scored"] += len(scored)
            totals["n_nodata"] += int((tiles["route"] == "nodata").sum())
            totals["n_fans"] += int((detections["kind"] == "fan").sum())
            totals["n_spots"] += int((detections["kind"] == "spot").sum())
            totals["n_deposit_tiles"] += int((scored["p_deposit"] >= DEPOSIT_THRESHOLD).sum())
            totals["area"] += float((scored["width"] * scored["height"]).sum())
            totals["covered"] += float(
                ((scored["fan_cover"] + scored["spot_cover"]) * scored["width"] * scored["height"]).sum())
            _write_gpkg_chunk(stage / _GPKG, name, tiles, detections, image_tasks, images, geo, layers)
            if geo.any_georeferenced:
                yield from _geojson_chunks(detections, image_tasks, geo)

    # The stage folder is moved in only when everything is written, so plain files suffice here.
    layers = set()
    with open(stage / "tiles.csv", "w", encoding="utf-8", newline="") as tiles_out, \
            open(stage / "detections.csv", "w", encoding="utf-8", newline="") as detections_out:
        if geo.any_georeferenced:
            write_geojson_chunks(stage / _GEOJSON, image_chunks(tiles_out, detections_out))
        else:
            # Without any CRS there is no longitude or latitude to write: no GeoJSON (see detector.geojson).
            for _ in image_chunks(tiles_out, detections_out):
                pass
    figures.save(stage / "quicklook.png", stage / "rose.png")
    written = [f for f in _OUTPUT_FILES if (stage / f).exists()]
    coordinates = {_GPKG: geo.describe()}
    if geo.any_georeferenced:
        coordinates[_GEOJSON] = GEOJSON_COORDINATES
    return totals, pd.concat(records, ignore_index=True), {"outputs": written, "coordinates": coordinates}


# ----------------------------------------------------------------------------- summary


@dataclass
class ScreenSummary:
    """Headline numbers of a screening run.

    Attributes
    ----------
    out : Path
        The screening folder.
    n_tiles, n_scored, n_nodata : int
        Tiles planned, scored, and routed "nodata".
    n_resumed : int
        Tiles taken from the journal of an earlier, interrupted run.
    n_fans, n_spots : int
    n_deposit_tiles : int
        Scored tiles with ``p_deposit >= DEPOSIT_THRESHOLD``.
    covered_percent : float
        Fan and spot cover over the scored tiles' area, %.
    megapixels : float
        Core pixels screened by this run (resumed tiles excluded), Mpx.
    seconds : float
        Wall time of the whole call, s.
    mpx_per_s : float
        ``megapixels / seconds``.
    workers : int
    per_image : DataFrame
        ``image``, ``tiles``, ``fans``, ``spots``, ``covered_percent``,
        ``dominant_direction_deg``, ``direction_scatter_deg`` and, when
        georeferenced, ``dominant_azimuth_deg``.
    """

    out: Path
    n_tiles: int
    n_scored: int
    n_nodata: int
    n_resumed: int
    n_fans: int
    n_spots: int
    n_deposit_tiles: int
    covered_percent: float
    megapixels: float
    seconds: float
    mpx_per_s: float
    workers: int
    per_image: pd.DataFrame = field(repr=False)

    def format(self, *, max_images=12):
        """The one-screen text summary."""
        lines = [
            f"screened {self.n_tiles} tiles ({self.n_scored} scored, {self.n_nodata} no-data"
            + (f", {self.n_resumed} from an earlier run" if self.n_resumed else "")
            + f") of {len(self.per_image)} image(s)",
            f"deposits: {self.n_deposit_tiles} tiles with p_deposit >= {DEPOSIT_THRESHOLD}; "
            f"{self.n_fans} fans, {self.n_spots} spots; covered {self.covered_percent:.2f} % of scored area",
            f"throughput: {self.megapixels:.1f} Mpx in {self.seconds:.1f} s = {self.mpx_per_s:.2f} Mpx/s "
            f"({self.workers} worker{'s' if self.workers != 1 else ''})",
        ]
        width = max([5] + [len(str(n)) for n in self.per_image["image"].head(max_images)])
        lines.append(f"{'image':<{width}}  tiles   fans  spots  cover%  dominant direction (spread)")
        for rec in self.per_image.head(max_images).itertuples(index=False):
            if np.isfinite(rec.dominant_direction_deg):
                d = f"{rec.dominant_direction_deg:6.1f} deg from up ({rec.direction_scatter_deg:.0f})"
                az = getattr(rec, "dominant_azimuth_deg", np.nan)
                if np.isfinite(az):
                    d += f", azimuth {az:.1f} deg"
            else:
                d = "-"
            lines.append(f"{rec.image:<{width}}  {rec.tiles:5d}  {rec.fans:5d}  {rec.spots:5d}  "
                         f"{rec.covered_percent:6.2f}  {d}")
        if len(self.per_image) > max_images:
            lines.append(f"... and {len(self.per_image) - max_images} more image(s): see tiles.csv")
        lines.append(f"outputs in {self.out}")
        return "\n".join(lines)


def _per_image(tiles, detections):
    georef = "azimuth_deg" in detections.columns
    out = []
    for name, group in tiles.groupby("image", sort=True):
        scored = group[group["route"] != "nodata"]
        area = float((scored["width"] * scored["height"]).sum())
        cover = float(((scored["fan_cover"] + scored["spot_cover"]) * scored["width"] * scored["height"]).sum())
        fans = detections[(detections["image"] == name) & (detections["kind"] == "fan")]
        w = fan_direction_weights(fans)
        mean, spread = tile_direction_stats(fans["direction_deg"].to_numpy(dtype=float), w)
        rec = {
            "image": str(name), "tiles": len(group), "fans": len(fans),
            "spots": int(((detections["image"] == name) & (detections["kind"] == "spot")).sum()),
            "covered_percent": 100.0 * cover / area if area else 0.0,
            "dominant_direction_deg": mean, "direction_scatter_deg": spread,
        }
        if georef:
            rec["dominant_azimuth_deg"], _ = tile_direction_stats(fans["azimuth_deg"].to_numpy(dtype=float), w)
        out.append(rec)
    return pd.DataFrame(out)


# ----------------------------------------------------------------------------- entry points


def screen(model_dir, inputs, out, *, tile=(800, 600), overlap=32, workers=1, scheduler=None, nodata=None,
           band=None, min_score=None, progress=True, any_body=False, force=False):
    """Screen images or tile sets with a model and write the screening folder.

    Parameters
    ----------
    model_dir : path-like
        Model folder (see :func:`detector.model.load_model`; its hashes are checked).
    inputs : path-like or list of path-like
        Image files and / or tile-set folders (with ``tiles.csv``).
    out : path-like
        Screening folder; created, or continued when it holds an interrupted
        run with the same parameters.
    tile : (int, int), optional
        Core tile size (width, height) for image inputs, px.
    overlap : int, optional
        Margin read around each tile, px.
    workers : int, optional
        Local worker processes (joblib loky backend) when above 1.
    scheduler : str, optional
        Address of a running Dask distributed scheduler (e.g.
        ``"tcp://10.0.0.5:8786"``); overrides ``workers``.
    nodata : float or str, optional
        Value of no-data pixels; ``"none"`` (or NaN) when no value is (NaN
        pixels of float images always are); default the raster's own, else 0
        (see :func:`detector.raster.nodata_value`).
    band : int, optional
        1-based band; required for multi-band images.
    min_score : float, optional
        Smallest detection score kept; default the model card's.
    progress : bool, optional
        Show a tqdm progress bar over tiles.
    any_body : bool, default=False
        Accept rasters whose CRS is not on Mars (otherwise refused, see
        :func:`detector.geo.check_mars_crs`).
    force : bool, default=False
        Delete whatever ``out`` holds (another run, an unfinished one, other
        files) once the inputs are checked, and screen from scratch.

    Returns
    -------
    summary : ScreenSummary

    Raises
    ------
    DetectorError
        Unreadable or corrupt image, multi-band image without ``band``,
        missing or tampered model file, or ``out`` holding another run. The
        final outputs are written only once every tile is done.
    """
    t_start = time.perf_counter()
    workers = _check_workers(workers)
    if nodata is not None:
        from ..gis.raster import nodata_value

        nodata = nodata_value(nodata)
        nodata = "none" if math.isnan(nodata) else nodata  # NaN is no key for the per-process raster cache
    model_dir = Path(model_dir)
    patch_px = cached_model(model_dir).feature_spec.patch_px  # a bad model fails here, before any write
    tasks, images = _plan(inputs, tile=tile, overlap=overlap, nodata=nodata, band=band, any_body=any_body,
                          min_side=patch_px)
    inputs = [inputs] if isinstance(inputs, (str, os.PathLike)) else list(inputs)
    params = _parameters(model_dir, inputs, tile=tile, overlap=overlap, nodata=nodata, band=band)
    out = Path(out)
    if force and out.is_dir():
        import shutil

        shutil.rmtree(out)
    record = _claim(out, params)
    try:
        journal = _Journal(out)
        journal.sweep()
        finished = journal.finished(tasks)
        n_resumed = len(finished)
        todo = [(i, t) for i, t in enumerate(tasks) if i not in finished]
        model_arg = str(model_dir.resolve())
        cluster = {}  # the Dask run says how many workers it had
        if scheduler:
            results = _run_dask(todo, model_arg, min_score, scheduler, info=cluster)
        elif workers > 1 and len(todo) > 1:
            results = _run_loky(todo, model_arg, min_score, workers)
        else:
            results = _run_serial(todo, model_arg, min_score)
        pixels = 0
        t_tiles = time.perf_counter()
        with _progress(len(tasks), n_resumed, progress) as bar, contextlib.closing(results):
            for index, entry in results:
                journal.write(index, entry)  # the entry is not kept: the outputs read the journal
                pixels += entry["pixels"]
                bar.update(1)
        t_tiles = time.perf_counter() - t_tiles

        with _staged(out) as stage:
            totals, per_image, written = _write_outputs(stage, tasks, journal, images, band=band, nodata=nodata)
    except (DetectorError, OSError) as err:
        # Recorded so that a corrected rerun into this folder is not taken for another live run.
        _mark_failed(out, record, err)
        raise

    seconds = time.perf_counter() - t_start
    area, covered = totals.pop("area"), totals.pop("covered")
    summary = ScreenSummary(
        out=out,
        n_resumed=n_resumed,
        covered_percent=100.0 * covered / area if area else 0.0,
        megapixels=pixels / 1e6,
        seconds=seconds,
        mpx_per_s=pixels / 1e6 / seconds if seconds > 0 else math.nan,
        workers=cluster.get("workers", workers),
        per_image=per_image,
        **totals,
    )
    record = {
        **{k: v for k, v in record.items() if k != "error"},
        "status": "complete",
        "parameters": params,
        "version": _version(),
        "run": {
            "workers": summary.workers, "scheduler": scheduler, "min_score": min_score,
            "python": platform.python_version(),
            "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        },
        "timing": {"seconds": seconds, "tile_seconds": t_tiles, "megapixels": pixels / 1e6,
                   "mpx_per_s": summary.mpx_per_s, "tiles_resumed": n_resumed, "tiles_computed": len(todo)},
        "counts": {k: getattr(summary, k)
                   for k in ("n_tiles", "n_scored", "n_nodata", "n_fans", "n_spots", "n_deposit_tiles")},
        **written,
    }
    write_json(out / _RUN_FILE, _finite(record), end="\n")
    return summary


@contextlib.contextmanager
def _staged(out):
    """A hidden folder in ``out`` for the final outputs; they are moved in only when all are written."""
    import shutil
    import tempfile

    stage = Path(tempfile.mkdtemp(prefix=".outputs.", dir=out))
    try:
        yield stage
        for name in sorted(os.listdir(stage)):
            os.replace(stage / name, out / name)
    finally:
        shutil.rmtree(stage, ignore_errors=True)


def _finite(obj):
    """NaN / inf to None, so the record is valid JSON."""
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj

