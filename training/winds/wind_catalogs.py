"""Fan catalogs for the wind analysis: a tile set's consensus, evaluation detections, screening folders.

Every reader returns a :class:`FanCatalog`: one row per fan and one row per
tile, in the same columns whatever the source, so that the statistics of
:mod:`training.winds.winds` never look at where a catalog came from.

``fans`` columns (:data:`FAN_COLUMNS`)
    ``tile_key`` (unique tile key within the run), ``tile_id``, ``image_id``,
    ``region`` (text, ``"(no region)"`` when unknown), ``solar_longitude_deg``,
    ``direction_deg`` (degrees clockwise from image up), ``azimuth_deg``
    (degrees clockwise from north; NaN where not georeferenced),
    ``length_px``, ``length_m`` (NaN where the scale is unknown),
    ``confidence`` (crowd: ``fan_vote_share``; machine: ``score`` x
    ``direction_confidence``; 1 where the catalog has none), ``lon_deg``,
    ``lat_deg`` (Mars ocentric, east-positive; NaN where unknown).
``tiles`` columns (:data:`TILE_COLUMNS`)
    ``tile_key``, ``tile_id``, ``image_id``, ``region``,
    ``solar_longitude_deg``, ``area_px`` (area looked at), ``covered_px``
    (area under fans or spots, each pixel once), ``lon_deg``, ``lat_deg``.

Region and solar longitude of a machine catalog come from a tile set's
``tiles.csv`` (by ``tile_id``, else by image) or from an image table
(:data:`IMAGE_TABLE_COLUMNS`).
"""

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from detector.contract import CONSENSUS_FILE, TILES_FILE
from detector.errors import CatalogError, ImageError
from detector.io import image_size
from detector.labels import rasterise_features
from detector.tileset import load_tileset

__all__ = [
    "FAN_COLUMNS",
    "TILE_COLUMNS",
    "IMAGE_TABLE_COLUMNS",
    "NO_REGION",
    "FanCatalog",
    "read_consensus_catalog",
    "read_detections_catalog",
    "read_screening_catalog",
    "read_machine_catalog",
    "read_image_table",
    "metadata_from_tileset",
]

FAN_COLUMNS = ("tile_key", "tile_id", "image_id", "region", "solar_longitude_deg", "direction_deg", "azimuth_deg",
               "length_px", "length_m", "confidence", "lon_deg", "lat_deg")
TILE_COLUMNS = ("tile_key", "tile_id", "image_id", "region", "solar_longitude_deg", "area_px", "covered_px",
                "lon_deg", "lat_deg")

#: Columns of an image table (``--images``): required first, then optional.
IMAGE_TABLE_COLUMNS = ("image_id", "solar_longitude_deg", "region", "metres_per_px", "lon_deg", "lat_deg")

#: Region label of tiles whose tile set or image table gives none.
NO_REGION = "(no region)"

_DETECTION_REQUIRED = ("tile_id", "kind", "direction_deg", "length_px")
_SCREEN_TILE_REQUIRED = ("tile_id", "image", "width", "height", "fan_cover", "spot_cover", "route")


@dataclass(frozen=True)
class FanCatalog:
    """One fan catalog in the common columns.

    Attributes
    ----------
    name : str
        ``"crowd"`` or ``"machine"``.
    source : str
        What was read (paths), for the record.
    kind : str
        ``"consensus"``, ``"detections"`` or ``"screening"``.
    fans : DataFrame
        :data:`FAN_COLUMNS`, one row per fan.
    tiles : DataFrame
        :data:`TILE_COLUMNS`, one row per tile looked at (with or without fans).
    """

    name: str
    source: str
    kind: str
    fans: pd.DataFrame
    tiles: pd.DataFrame

    @property
    def georeferenced(self):
        """True when every fan has an azimuth from north."""
        return bool(len(self.fans)) and bool(np.isfinite(self.fans["azimuth_deg"].to_numpy(dtype=float)).all())


# ----------------------------------------------------------------------------- checks


def _fail_rows(path, rows, column, values, rule):
    """One CatalogError naming the file, the first bad row and value, and how many more there are."""
    more = f" (and {len(rows) - 1} more rows)" if len(rows) > 1 else ""
    raise CatalogError(f"{path} row {rows[0]}: {column} {values[0]!r} {rule}{more}.")


def _read_csv(path, required, what):
    path = Path(path)
    if not path.is_file():
        raise CatalogError(f"{what} {str(path)!r} does not exist.")
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8")
    except pd.errors.EmptyDataError:
        raise CatalogError(f"{path} is empty: it has no header line.") from None
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as err:
        raise CatalogError(f"{path} cannot be parsed as CSV: {err}") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise CatalogError(f"{path} lacks column {missing[0]!r} (found: {', '.join(frame.columns)}).")
    frame = frame.apply(lambda column: column.str.strip())
    frame.index = pd.RangeIndex(1, len(frame) + 1)  # 1-based data rows, as in every message
    return frame


def _numbers(frame, path, column, *, required=False):
    """A text column as float; non-numbers are an error; empty is NaN (an error when ``required``)."""
    if column not in frame.columns:
        return pd.Series(np.nan, index=frame.index, dtype=float)
    text = frame[column]
    values = pd.to_numeric(text, errors="coerce").astype(float)
    empty = text.str.lower().isin(("", "nan"))
    bad = (values.isna() & ~empty) | np.isinf(values)
    if bad.any():
        _fail_rows(path, bad.index[bad].tolist(), column, text[bad].tolist(), "is not a number")
    if required and empty.any():
        _fail_rows(path, empty.index[empty].tolist(), column, text[empty].tolist(), "is empty but a fan needs it")
    return values


def _check_range(path, values, column, bad, rule):
    bad = bad & values.notna()
    if bad.any():
        _fail_rows(path, bad.index[bad].tolist(), column, [float(v) for v in values[bad]], rule)


def _fan_rows(frame, path):
    """Typed fan rows of a detections or consensus CSV, checked: direction, length, azimuth, length_m."""
    fans = frame[frame["kind"] == "fan"]
    direction = _numbers(fans, path, "direction_deg", required=True)
    _check_range(path, direction, "direction_deg", (direction < 0) | (direction >= 360), "is outside [0, 360)")
    length = _numbers(fans, path, "length_px", required=True)
    _check_range(path, length, "length_px", length <= 0, "is not positive")
    azimuth = _numbers(fans, path, "azimuth_deg")
    _check_range(path, azimuth, "azimuth_deg", (azimuth < 0) | (azimuth >= 360), "is outside [0, 360)")
    length_m = _numbers(fans, path, "length_m")
    _check_range(path, length_m, "length_m", length_m <= 0, "is not positive")
    score = _numbers(fans, path, "score")
    _check_range(path, score, "score", (score < 0) | (score > 1), "is outside [0, 1]")
    agreement = _numbers(fans, path, "direction_confidence")
    _check_range(path, agreement, "direction_confidence", (agreement < 0) | (agreement > 1), "is outside [0, 1]")
    lon, lat = _numbers(fans, path, "lon_deg"), _numbers(fans, path, "lat_deg")
    _check_range(path, lat, "lat_deg", (lat < -90) | (lat > 90), "is outside [-90, 90]")
    confidence = score.fillna(1.0) * agreement.fillna(1.0)
    return pd.DataFrame({"tile_id": fans["tile_id"].astype(str), "direction_deg": direction,
                         "azimuth_deg": azimuth, "length_px": length, "length_m": length_m,
                         "confidence": confidence, "lon_deg": lon, "lat_deg": lat}, index=fans.index)


def _union_cover(features, width, height):
    """Pixels of a tile under at least one fan or spot."""
    if len(features) == 0:
        return 0.0
    masks = rasterise_features(features, (int(height), int(width)))
    return float((masks.fan_cover | masks.spot_cover).sum())


def _covered_px(features, tiles):
    """Covered px per tile (rows of ``tiles``: tile_id, width, height) from the features' shapes."""
    by_tile = dict(tuple(features.groupby("tile_id", sort=False))) if len(features) else {}
    empty = features.iloc[0:0]
    return np.array([_union_cover(by_tile.get(t, empty), w, h)
                     for t, w, h in zip(tiles["tile_id"], tiles["width"], tiles["height"])], dtype=float)


# ----------------------------------------------------------------------------- metadata


def _tile_sizes(tileset):
    """Width and height of every tile (from tiles.csv when given, else from the image headers)."""
    tiles = tileset.tiles
    width = pd.to_numeric(tiles["width"], errors="coerce").to_numpy(dtype=float)
    height = pd.to_numeric(tiles["height"], errors="coerce").to_numpy(dtype=float)
    for i in np.flatnonzero(~(np.isfinite(width) & np.isfinite(height))):
        try:
            width[i], height[i] = image_size(tileset.root / tiles["path"].iloc[i])
        except ImageError as err:
            raise CatalogError(f"{tileset.root / TILES_FILE} row {i + 1}: {err}") from None
    return width, height


def metadata_from_tileset(root, *, min_votes=1):
    """Per-tile metadata of a tile set: what a machine catalog of its tiles or images needs.

    Parameters
    ----------
    root : path-like
        Tile-set folder (validated by :func:`detector.tileset.load_tileset`, images not decoded).
    min_votes : int, default=1

    Returns
    -------
    tileset : TileSet
    tiles : DataFrame
        ``tile_id``, ``image_id``, ``region``, ``solar_longitude_deg``,
        ``metres_per_px``, ``width``, ``height``, ``lon_deg``, ``lat_deg``
        (the last two from optional tiles.csv columns of that name, the tile
        centre; NaN when absent).
    """
    tileset = load_tileset(root, min_votes=min_votes, check_images=False)
    tiles = tileset.tiles
    width, height = _tile_sizes(tileset)
    path = Path(root) / TILES_FILE
    lon = _numbers(tiles, path, "lon_deg").to_numpy(dtype=float)
    lat = _numbers(tiles, path, "lat_deg").to_numpy(dtype=float)
    region = tiles["region"].astype(str).replace("", NO_REGION)
    meta = pd.DataFrame({
        "tile_id": tiles["tile_id"].astype(str), "image_id": tiles["image_id"].astype(str), "region": region,
        "solar_longitude_deg": tiles["solar_longitude_deg"].astype(float),
        "metres_per_px": tiles["metres_per_px"].astype(float), "width": width, "height": height,
        "lon_deg": lon, "lat_deg": lat,
    })
    return tileset, meta


def read_image_table(path):
    """Region, solar longitude and scale of source images, from a CSV (``--images``).

    Columns: ``image_id`` and ``solar_longitude_deg`` (0-360) are required;
    ``region``, ``metres_per_px``, ``lon_deg``, ``lat_deg`` are optional.

    Returns
    -------
    images : DataFrame
        One row per image, the columns of :data:`IMAGE_TABLE_COLUMNS`.
    """
    frame = _read_csv(path, IMAGE_TABLE_COLUMNS[:2], "image table")
    if len(frame) == 0:
        raise CatalogError(f"{path} has no data rows.")
    ls = _numbers(frame, path, "solar_longitude_deg")
    _check_range(path, ls, "solar_longitude_deg", (ls < 0) | (ls > 360), "is outside [0, 360]")
    mpp = _numbers(frame, path, "metres_per_px")
    _check_range(path, mpp, "metres_per_px", mpp <= 0, "is not positive")
    lat = _numbers(frame, path, "lat_deg")
    _check_range(path, lat, "lat_deg", (lat < -90) | (lat > 90), "is outside [-90, 90]")
    dup = frame["image_id"].duplicated()
    if dup.any():
        _fail_rows(path, dup.index[dup].tolist(), "image_id", frame["image_id"][dup].tolist(), "is listed twice")
    region = frame["region"].replace("", NO_REGION) if "region" in frame.columns else NO_REGION
    return pd.DataFrame({"image_id": frame["image_id"], "solar_longitude_deg": ls, "region": region,
                         "metres_per_px": mpp, "lon_deg": _numbers(frame, path, "lon_deg"), "lat_deg": lat})


# ----------------------------------------------------------------------------- readers


def _finish(name, source, kind, fans, tiles):
    fans = fans.reindex(columns=list(FAN_COLUMNS)).reset_index(drop=True)
    tiles = tiles.reindex(columns=list(TILE_COLUMNS)).reset_index(drop=True)
    missing_ls = tiles["solar_longitude_deg"].isna()
    if missing_ls.any():
        first = tiles.loc[missing_ls].iloc[0]
        raise CatalogError(
            f"{source}: image {first['image_id']!r} (tile {first['tile_id']!r}) has no solar_longitude_deg "
            f"({int(missing_ls.sum())} tiles lack one); give it in tiles.csv or an image table (--images).")
    if len(fans) == 0:
        raise CatalogError(f"{source}: the catalog holds no fans; there is no wind to read.")
    return FanCatalog(name, source, kind, fans, tiles)


def read_consensus_catalog(root, *, min_votes=3, name="crowd"):
    """The consensus fans of a tile set, with every tile of the set (consensus-empty tiles count too).

    Covered px are the consensus fans and spots rasterised by
    :func:`detector.labels.rasterise_features` (each pixel once). Lengths in
    metres use ``metres_per_px`` of tiles.csv where given; a consensus has no
    azimuths (directions are from image up).
    """
    tileset, meta = metadata_from_tileset(root, min_votes=min_votes)
    consensus = tileset.consensus
    fans = consensus[consensus["kind"] == "fan"]
    info = meta.set_index("tile_id")
    tile_of = info.loc[fans["tile_id"].to_numpy()]
    share = fans["fan_vote_share"].to_numpy(dtype=float)
    fan_rows = pd.DataFrame({
        "tile_key": fans["tile_id"].to_numpy(), "tile_id": fans["tile_id"].to_numpy(),
        "image_id": tile_of["image_id"].to_numpy(), "region": tile_of["region"].to_numpy(),
        "solar_longitude_deg": tile_of["solar_longitude_deg"].to_numpy(),
        "direction_deg": fans["direction_deg"].to_numpy(), "azimuth_deg": np.nan,
        "length_px": fans["length_px"].to_numpy(),
        "length_m": fans["length_px"].to_numpy() * tile_of["metres_per_px"].to_numpy(),
        "confidence": np.where(np.isfinite(share), share, 1.0),
        "lon_deg": tile_of["lon_deg"].to_numpy(), "lat_deg": tile_of["lat_deg"].to_numpy(),
    })
    tiles = meta.assign(tile_key=meta["tile_id"], area_px=meta["width"] * meta["height"],
                        covered_px=_covered_px(consensus, meta))
    return _finish(name, str(Path(root) / CONSENSUS_FILE), "consensus", fan_rows, tiles)


def _attach(rows, meta, images, source, how):
    """Region, Ls, scale and location of every row (``tile_id``, ``image_id``) from the metadata.

    Priority: the image table, then the tile set by ``tile_id`` (when ``how`` is
    ``"tile"``), then the tile set by image.
    """
    out = rows.reset_index(drop=True).copy()
    cols = ["region", "solar_longitude_deg", "metres_per_px", "lon_deg", "lat_deg"]
    lookups = []
    if images is not None:
        lookups.append(images.set_index("image_id")[cols].reindex(out["image_id"]))
    if meta is not None:
        if how == "tile":
            lookups.append(meta.drop_duplicates("tile_id").set_index("tile_id")[cols].reindex(out["tile_id"]))
        per_image = meta.groupby("image_id")[cols[:3]].first().assign(lon_deg=np.nan, lat_deg=np.nan)
        lookups.append(per_image.reindex(out["image_id"]))
    values = pd.DataFrame({c: pd.Series([np.nan] * len(out), dtype=object) for c in cols})
    found = np.zeros(len(out), dtype=bool)
    for table in lookups:
        table = table.reset_index(drop=True)
        hit = ~found & table["solar_longitude_deg"].notna().to_numpy()
        values.loc[hit, cols] = table.loc[hit, cols].to_numpy(dtype=object)
        found |= hit
    if not found.all():
        first = out.loc[~found].iloc[0]
        raise CatalogError(
            f"{source}: image {first['image_id']!r} (tile {first['tile_id']!r}) has no region or solar longitude; "
            f"pass the tile set it came from (--tiles) or an image table (--images) that lists it.")
    for c in cols[1:]:
        out[c] = pd.to_numeric(values[c], errors="coerce").astype(float)
    out["region"] = values["region"].where(values["region"].notna(), NO_REGION).astype(str)
    return out


def read_detections_catalog(path, *, meta=None, images=None, name="machine"):
    """Detections of ``frostvane evaluate`` (``detections.csv``, tile px, keyed by ``tile_id``).

    Parameters
    ----------
    path : path-like
        The CSV, or the evaluation folder holding it.
    meta : DataFrame, optional
        :func:`metadata_from_tileset` tiles of the tile set that was evaluated:
        region, Ls, scale and tile sizes by ``tile_id``. Required (the
        detections file does not list tiles without detections).
    images : DataFrame, optional
        :func:`read_image_table` rows, overriding ``meta`` per image.
    """
    path = Path(path)
    if path.is_dir():
        path = path / "detections.csv"
    if meta is None:
        raise CatalogError(f"{path}: evaluation detections need the tile set they were run on (--tiles) "
                           f"for the tiles, regions and solar longitudes.")
    frame = _read_csv(path, _DETECTION_REQUIRED, "detections file")
    unknown = ~frame["tile_id"].isin(set(meta["tile_id"]))
    if unknown.any():
        _fail_rows(path, unknown.index[unknown].tolist(), "tile_id", frame["tile_id"][unknown].tolist(),
                   "is not a tile of the tile set given with --tiles")
    fans = _fan_rows(frame, path)
    tile_ids = set(frame["tile_id"])
    # Only tiles of the images that were run: an evaluation may cover some images of its tile set.
    images_run = set(meta.loc[meta["tile_id"].isin(tile_ids), "image_id"])
    tiles = meta[meta["image_id"].isin(images_run)].copy()
    tiles = _attach(tiles[["tile_id", "image_id", "width", "height"]], meta, images, str(path), "tile")
    info = tiles.set_index("tile_id")
    fans = fans.assign(image_id=info.loc[fans["tile_id"], "image_id"].to_numpy())
    fans = _attach(fans.drop(columns=["lon_deg", "lat_deg"]), meta, images, str(path), "tile")
    fans["length_m"] = fans["length_m"].fillna(fans["length_px"] * fans["metres_per_px"])
    fans["tile_key"] = fans["tile_id"]
    geometry = frame.copy()
    for c in ("x_px", "y_px", "direction_deg", "length_px", "opening_deg", "semi_major_px", "semi_minor_px"):
        geometry[c] = pd.to_numeric(geometry.get(c, np.nan), errors="coerce")
    tiles = tiles.assign(tile_key=tiles["tile_id"], area_px=tiles["width"] * tiles["height"],
                         covered_px=_covered_px(geometry, tiles))
    return _finish(name, str(path), "detections", fans, tiles)


def read_screening_catalog(folders, *, meta=None, images=None, name="machine"):
    """Detections of one or several ``frostvane screen`` folders.

    Tiles routed ``nodata`` are left out. Covered px are the screening's own
    ``fan_cover + spot_cover`` shares times the tile area. Azimuths, lengths
    in metres and lon/lat come from the screening where the raster was
    georeferenced; region and Ls from ``meta`` (by tile, else by image) or
    ``images``.
    """
    folders = [Path(f) for f in ([folders] if isinstance(folders, (str, Path)) else folders)]
    fan_parts, tile_parts = [], []
    for k, folder in enumerate(folders):
        tiles_path, det_path = folder / "tiles.csv", folder / "detections.csv"
        tiles = _read_csv(tiles_path, _SCREEN_TILE_REQUIRED, "screening tiles file")
        frame = _read_csv(det_path, _DETECTION_REQUIRED + ("image",), "screening detections file")
        tiles = tiles[tiles["route"] != "nodata"]
        width = _numbers(tiles, tiles_path, "width")
        height = _numbers(tiles, tiles_path, "height")
        cover = _numbers(tiles, tiles_path, "fan_cover").fillna(0) + _numbers(tiles, tiles_path, "spot_cover").fillna(0)
        _check_range(tiles_path, cover, "fan_cover + spot_cover", (cover < 0) | (cover > 1.000001),
                     "is outside [0, 1]")
        prefix = f"{k}:" if len(folders) > 1 else ""
        tile_rows = pd.DataFrame({"tile_id": tiles["tile_id"].astype(str), "image_id": tiles["image"].astype(str),
                                  "area_px": width * height, "covered_px": cover * width * height})
        tile_rows["tile_key"] = prefix + tile_rows["tile_id"]
        fans = _fan_rows(frame, det_path)
        fans["image_id"] = frame.loc[fans.index, "image"].astype(str)
        fans["tile_key"] = prefix + fans["tile_id"]
        unknown = ~fans["tile_key"].isin(set(tile_rows["tile_key"]))
        # Fans of no-data tiles are not kept (there are none unless the folder was edited).
        fans = fans[~unknown]
        fan_parts.append(fans)
        tile_parts.append(tile_rows)
    source = ", ".join(str(f) for f in folders)
    tiles = _attach(pd.concat(tile_parts, ignore_index=True), meta, images, source, "tile")
    fans = pd.concat(fan_parts, ignore_index=True)
    located = fans[["lon_deg", "lat_deg"]].copy()
    fans = _attach(fans.drop(columns=["lon_deg", "lat_deg"]), meta, images, source, "tile")
    fans[["lon_deg", "lat_deg"]] = located.to_numpy()
    fans["length_m"] = fans["length_m"].fillna(fans["length_px"] * fans["metres_per_px"])
    # A tile's location: the mean of its fans' positions where the screening gave them.
    return _finish(name, source, "screening", fans, tiles)


def read_machine_catalog(paths, *, meta=None, images=None, name="machine"):
    """Screening folders (a folder with ``tiles.csv`` and ``detections.csv``) or one evaluation's detections.

    Parameters
    ----------
    paths : list of path-like
        Several screening folders, or one ``detections.csv`` (or a folder
        holding one without ``tiles.csv``, as ``frostvane evaluate`` writes).
    """
    paths = [Path(p) for p in paths]
    screening = [p.is_dir() and (p / "tiles.csv").is_file() for p in paths]
    if all(screening):
        return read_screening_catalog(paths, meta=meta, images=images, name=name)
    if len(paths) == 1:
        return read_detections_catalog(paths[0], meta=meta, images=images, name=name)
    other = paths[screening.index(False)]
    raise CatalogError(f"{str(other)!r} is not a screening folder (tiles.csv and detections.csv); several machine "
                       f"catalogs must all be screening folders.")
