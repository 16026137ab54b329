"""Planning a screening: the tiles of every input (image windows or tile-set tiles), checked before any work."""

import dataclasses
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..contract import CONSENSUS_FILE, TILES_FILE, TILES_REQUIRED
from ..errors import DetectorError, ImageError, TileSetError
from ..gis.raster import TileWindow, check_complete, open_raster, plan_windows
from .folder import _MAX_PANELS, _MIN_SAMPLED_STEP, _QUICKLOOK_PX

__all__ = []  # private to detector.screening


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
    at_model_scale: bool = False  # read a tile outside the model's ground scale resampled to it

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
