"""Load and validate a tile set: ``tiles.csv``, ``consensus.csv`` and the tile images.

:func:`load_tileset` checks the whole contract and collects every problem
before raising a single :class:`~detector.errors.TileSetError`, so that a user
fixes a broken tile set in one pass instead of one error at a time.

Row numbers in messages are 1-based data rows: row 1 is the first line after
the header, i.e. the CSV line number minus one.
"""

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np
import pandas as pd

from .contract import (
    CONSENSUS_COLUMNS,
    CONSENSUS_FILE,
    CONSENSUS_OPTIONAL,
    CONSENSUS_REQUIRED,
    DEFAULT_MIN_VOTES,
    KIND_FIELDS,
    KINDS,
    TILES_FILE,
    TILES_REQUIRED,
)
from .errors import DetectorError, ImageError, TileSetError
from .io import read_image

__all__ = ["TileSet", "load_tileset", "summarize_tileset", "format_summary", "MIN_TILE_SIDE"]

#: Smallest accepted tile side, px: below it no patch descriptor fits.
#: Smallest tile side, px: one patch of the default feature spec (64 px); a narrower tile holds
#: no patch, so nothing in it could be found.
MIN_TILE_SIDE = 64

_IMAGE_SUFFIXES = (".png", ".tif", ".tiff")
_TILES_NUMERIC = ("solar_longitude_deg", "classifications", "col0", "row0", "metres_per_px")
_TILES_TEXT = ("region",)
_SIZE_COLUMNS = ("width", "height")
_GEOMETRY = ("x_px", "y_px", "direction_deg", "length_px", "opening_deg", "semi_major_px", "semi_minor_px")
_CONSENSUS_NUMERIC = _GEOMETRY + ("votes",) + CONSENSUS_OPTIONAL


@dataclass(frozen=True)
class TileSet:
    """A validated tile set.

    Attributes
    ----------
    root : Path
        The tile-set folder.
    tiles : DataFrame
        One row per tile: ``tile_id``, ``image_id``, ``path`` (str), the
        optional columns (float, NaN when absent; ``region`` str, empty when
        absent), any extra columns as text, and ``width``, ``height`` (int, px)
        read from the images.
    consensus : DataFrame
        One row per consensus feature with at least ``min_votes`` votes:
        ``tile_id``, ``kind`` (str), geometry columns (float, px or degrees
        clockwise from image up, NaN where unused), ``votes`` (int) and
        ``fan_vote_share`` (float, NaN when absent).
    n_dropped_weak : int
        Features dropped because ``votes < min_votes``.
    min_votes : int
        The vote threshold applied.
    """

    root: Path
    tiles: pd.DataFrame
    consensus: pd.DataFrame
    n_dropped_weak: int
    min_votes: int
    weak_tile_ids: tuple = field(default=(), repr=False, compare=False)
    """Tile of each dropped weak feature, so that :meth:`subset` can recount them."""

    @cached_property
    def _row_of(self):
        return pd.Series(np.arange(len(self.tiles)), index=self.tiles["tile_id"].to_numpy())

    def _tile_row(self, tile_id):
        try:
            return self.tiles.iloc[int(self._row_of[tile_id])]
        except KeyError:
            raise TileSetError(f"tile_id {tile_id!r} is not in {self.root / TILES_FILE}.") from None

    def tile_path(self, tile_id):
        """Absolute path of a tile's image."""
        return self.root / self._tile_row(tile_id)["path"]

    def read_tile(self, tile_id):
        """Read a tile's image as a 2-D array of shape (height, width), its own dtype."""
        return read_image(self.tile_path(tile_id))

    def metres_per_px(self, tile_id):
        """A tile's ground scale from ``tiles.csv`` (NaN when the column or the value is absent)."""
        row = self._tile_row(tile_id)
        return float(row["metres_per_px"]) if "metres_per_px" in row.index else float("nan")

    def features_of(self, tile_id):
        """Consensus features of one tile (possibly none), in file order."""
        self._tile_row(tile_id)
        return self.consensus[self.consensus["tile_id"] == tile_id]

    @property
    def image_ids(self):
        """Sorted distinct source image ids, as a tuple of str."""
        return tuple(sorted(self.tiles["image_id"].unique()))

    def subset(self, image_ids):
        """The tile set restricted to the tiles of the given source images.

        Parameters
        ----------
        image_ids : iterable of str
            Source image ids, each present in the tile set.

        Returns
        -------
        TileSet
            Same root and threshold; ``n_dropped_weak`` is recounted.
        """
        wanted = list(dict.fromkeys(image_ids))
        unknown = sorted(set(wanted) - set(self.tiles["image_id"]))
        if unknown:
            raise TileSetError(f"image_id(s) {unknown!r} are not in {self.root / TILES_FILE}.")
        tiles = self.tiles[self.tiles["image_id"].isin(wanted)].reset_index(drop=True)
        keep = set(tiles["tile_id"])
        consensus = self.consensus[self.consensus["tile_id"].isin(keep)].reset_index(drop=True)
        weak = tuple(t for t in self.weak_tile_ids if t in keep)
        return TileSet(self.root, tiles, consensus, len(weak), self.min_votes, weak)


# --------------------------------------------------------------------------- reading


class _Problems:
    """Problems sorted by file, then row, then order of discovery."""

    _FILE_ORDER = {None: 0, TILES_FILE: 1, CONSENSUS_FILE: 2}

    def __init__(self):
        self._items = []

    def add(self, file, row, message):
        self._items.append((self._FILE_ORDER.get(file, 3), row, len(self._items), message))

    def rows(self, file, rows, column, values, what):
        for row, value in zip(rows, values):
            self.add(file, row, f"{file} row {row}: {column} {value!r} {what}.")

    def __bool__(self):
        return bool(self._items)

    def messages(self):
        return [item[3] for item in sorted(self._items)]


def _read_csv(path, problems):
    """Read a CSV as text columns, keeping 1-based data-row numbers in the index."""
    name = path.name
    if not path.is_file():
        problems.add(name, 0, f"{name} is missing from {path.parent}.")
        return None
    try:
        # Blank lines are kept while parsing so that the index stays the data-row
        # number; they are dropped afterwards.
        frame = pd.read_csv(
            path, dtype=str, keep_default_na=False, na_filter=False, skip_blank_lines=False, encoding="utf-8"
        )
    except pd.errors.EmptyDataError:
        problems.add(name, 0, f"{name} is empty: it has no header line.")
        return None
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as err:
        problems.add(name, 0, f"{name} cannot be parsed as CSV: {err}")
        return None
    frame.columns = [str(c).strip() for c in frame.columns]
    frame = frame.apply(lambda column: column.str.strip()) if len(frame.columns) else frame
    frame.index = pd.RangeIndex(1, len(frame) + 1)
    if len(frame):
        frame = frame[(frame != "").any(axis=1)]
    return frame


def _require_columns(frame, name, required, problems):
    missing = [c for c in required if c not in frame.columns]
    for column in missing:
        problems.add(name, 0, f"{name}: required column {column!r} is missing.")
    return not missing


def _numbers(frame, name, column, problems):
    """Parse a text column as float; report non-numbers and infinities; empty is NaN."""
    if column not in frame.columns:
        return pd.Series(np.nan, index=frame.index, dtype=float)
    text = frame[column]
    values = pd.to_numeric(text, errors="coerce").astype(float)
    is_nan_text = text.str.lower().isin(("", "nan"))
    bad = values.isna() & ~is_nan_text
    problems.rows(name, bad.index[bad], column, text[bad].tolist(), "is not a number")
    infinite = np.isinf(values)
    problems.rows(name, values.index[infinite], column, text[infinite].tolist(), "is not a finite number")
    values[bad | infinite] = np.nan
    return values


def _check(problems, name, values, bad, column, what):
    """Report rows where ``bad`` holds; NaN values are never reported here."""
    bad = bad & values.notna()
    problems.rows(name, values.index[bad], column, [float(v) for v in values[bad]], what)


def _whole(values):
    return values.isna() | (values == np.round(values))


def path_problem(root, rel):
    """Why a tile path may not be used (None when it may): it must stay inside the tile-set folder.

    Parameters
    ----------
    root : Path
        The tile-set folder.
    rel : str
        The ``path`` of a tiles.csv row.

    Returns
    -------
    problem : str or None
        E.g. ``"is absolute; paths are relative to the tile-set folder"``.
    """
    if rel == "":
        return None
    if Path(rel).is_absolute() or rel.startswith(("\\", "/")) or (len(rel) > 1 and rel[1] == ":"):
        return "is absolute; paths are relative to the tile-set folder"
    base = Path(root).resolve()
    target = (base / rel).resolve()
    if target != base and base not in target.parents:
        return "leaves the tile-set folder; tile images must lie inside it"
    return None


def _check_tiles(root, tiles, problems, check_images):
    """Validate tiles.csv rows and images; return the typed table."""
    name = TILES_FILE
    out = pd.DataFrame(index=tiles.index)
    for column in TILES_REQUIRED:
        out[column] = tiles[column].astype(str)
        empty = out[column] == ""
        for row in empty.index[empty]:
            problems.add(name, row, f"{name} row {row}: {column} is empty.")

    dup = out["tile_id"].duplicated(keep="first") & (out["tile_id"] != "")
    first_row = out.reset_index().groupby("tile_id")["index"].min()
    for row, tile_id in zip(dup.index[dup], out["tile_id"][dup]):
        problems.add(name, row, f"{name} row {row}: tile_id {tile_id!r} duplicates row {first_row[tile_id]}.")

    for row, rel in zip(out.index, out["path"]):
        problem = path_problem(root, rel)
        if problem:
            problems.add(name, row, f"{name} row {row}: path {rel!r} {problem}.")

    num = {column: _numbers(tiles, name, column, problems) for column in _TILES_NUMERIC + _SIZE_COLUMNS}
    v = num["solar_longitude_deg"]
    _check(problems, name, v, (v < 0) | (v > 360), "solar_longitude_deg", "is outside [0, 360]")
    v = num["classifications"]
    _check(problems, name, v, (v < 0) | ~_whole(v), "classifications", "is not a whole number >= 0")
    v = num["metres_per_px"]
    _check(problems, name, v, v <= 0, "metres_per_px", "is not positive")
    for column in _SIZE_COLUMNS:
        v = num[column]
        _check(problems, name, v, (v < 1) | ~_whole(v), column, "is not a whole number >= 1")

    for column in _TILES_NUMERIC:
        out[column] = num[column]
    for column in _TILES_TEXT:
        out[column] = tiles[column].astype(str) if column in tiles.columns else ""
    extra = [c for c in tiles.columns if c not in out.columns and c not in _SIZE_COLUMNS]
    for column in extra:
        out[column] = tiles[column].astype(str)

    width = num["width"].copy()
    height = num["height"].copy()
    if check_images:
        width, height = _check_images(root, out, num["width"], num["height"], problems)
    out["width"] = width
    out["height"] = height
    return out


def _check_images(root, tiles, stated_width, stated_height, problems):
    """Read every tile image; return its (width, height) per row, NaN when unusable."""
    name = TILES_FILE
    width = pd.Series(np.nan, index=tiles.index, dtype=float)
    height = width.copy()
    # One image per tile row: reading is I/O-bound and each file must be decoded
    # anyway to prove it is not corrupt.
    for row, rel in zip(tiles.index, tiles["path"]):
        if rel == "" or path_problem(root, rel):
            continue
        path = root / rel
        if path.suffix.lower() not in _IMAGE_SUFFIXES:
            problems.add(name, row, f"{name} row {row}: path {rel!r} is not a PNG or TIFF file.")
            continue
        if not path.is_file():
            problems.add(name, row, f"{name} row {row}: path {rel!r}: image {str(path)!r} does not exist.")
            continue
        try:
            image = read_image(path)
        except ImageError as err:
            problems.add(name, row, f"{name} row {row}: path {rel!r}: {err}")
            continue
        rows, cols = image.shape
        if min(rows, cols) < MIN_TILE_SIDE:
            problems.add(
                name,
                row,
                f"{name} row {row}: path {rel!r} is {cols} x {rows} px (width x height); "
                f"each side must be at least {MIN_TILE_SIDE} px.",
            )
            continue
        mismatch = [
            f"{label} {int(stated[row])} but the image has {actual}"
            for label, stated, actual in (("width", stated_width, cols), ("height", stated_height, rows))
            if not np.isnan(stated[row]) and int(stated[row]) != actual
        ]
        if mismatch:
            problems.add(name, row, f"{name} row {row}: path {rel!r}: tiles.csv states {'; '.join(mismatch)} px.")
            continue
        width[row], height[row] = cols, rows
    return width, height


def _check_consensus(consensus, tiles, problems):
    """Validate consensus.csv rows against the tiles; return the typed table."""
    name = CONSENSUS_FILE
    out = pd.DataFrame(index=consensus.index)
    out["tile_id"] = consensus["tile_id"].astype(str)
    out["kind"] = consensus["kind"].astype(str)
    for column in _CONSENSUS_NUMERIC:
        out[column] = _numbers(consensus, name, column, problems)

    empty_id = out["tile_id"] == ""
    for row in empty_id.index[empty_id]:
        problems.add(name, row, f"{name} row {row}: tile_id is empty.")
    if tiles is not None:
        unknown = ~out["tile_id"].isin(set(tiles["tile_id"])) & ~empty_id
        problems.rows(name, unknown.index[unknown], "tile_id", out["tile_id"][unknown].tolist(), f"is not in {TILES_FILE}")

    kind = out["kind"]
    bad_kind = ~kind.isin(KINDS)
    problems.rows(name, bad_kind.index[bad_kind], "kind", kind[bad_kind].tolist(), f"is not one of {list(KINDS)}")

    raw = {c: consensus[c] if c in consensus.columns else pd.Series("", index=consensus.index) for c in _GEOMETRY}
    for k, needed in KIND_FIELDS.items():
        of_kind = kind == k
        for column in _GEOMETRY:
            if column in needed:
                # Non-numeric text was already reported by _numbers; only empty or NaN cells here.
                missing = of_kind & raw[column].str.lower().isin(("", "nan"))
                for row in missing.index[missing]:
                    problems.add(name, row, f"{name} row {row}: {column} is empty or NaN but a {k} needs it.")
            else:
                filled = of_kind & ~raw[column].str.lower().isin(("", "nan"))
                problems.rows(
                    name, filled.index[filled], column, raw[column][filled].tolist(), f"must be empty for a {k}"
                )
    missing_votes = consensus["votes"].str.lower().isin(("", "nan"))
    for row in missing_votes.index[missing_votes]:
        problems.add(name, row, f"{name} row {row}: votes is empty or NaN.")

    v = out["direction_deg"]
    _check(problems, name, v, (v < 0) | (v >= 360), "direction_deg", "is outside [0, 360)")
    v = out["opening_deg"]
    _check(problems, name, v, (v <= 0) | (v > 180), "opening_deg", "is outside (0, 180]")
    for column in ("length_px", "semi_major_px", "semi_minor_px"):
        v = out[column]
        _check(problems, name, v, v <= 0, column, "is not positive")
    a, b = out["semi_major_px"], out["semi_minor_px"]
    over = (b > a) & (a > 0)
    for row in over.index[over]:
        problems.add(
            name, row, f"{name} row {row}: semi_minor_px {float(b[row])!r} exceeds semi_major_px {float(a[row])!r}."
        )
    v = out["votes"]
    _check(problems, name, v, v < 1, "votes", "is below 1")
    _check(problems, name, v, (v >= 1) & ~_whole(v), "votes", "is not a whole number")
    v = out["fan_vote_share"]
    _check(problems, name, v, (v < 0) | (v > 1), "fan_vote_share", "is outside [0, 1]")

    if tiles is not None:
        first = tiles.drop_duplicates("tile_id").set_index("tile_id")
        w = out["tile_id"].map(first["width"]).astype(float)
        h = out["tile_id"].map(first["height"]).astype(float)
        for column, limit, axis in (("x_px", w, "width"), ("y_px", h, "height")):
            v = out[column]
            outside = v.notna() & limit.notna() & ((v < -0.5) | (v > limit - 0.5))
            for row in outside.index[outside]:
                problems.add(
                    name,
                    row,
                    f"{name} row {row}: {column} {float(v[row])!r} is outside the tile "
                    f"[-0.5, {float(limit[row]) - 0.5!r}] ({axis} {int(limit[row])} px).",
                )
    return out


def load_tileset(root, *, min_votes=DEFAULT_MIN_VOTES, check_images=True):
    """Load a tile set and check it against the contract.

    Parameters
    ----------
    root : path-like
        Folder holding ``tiles.csv``, ``consensus.csv`` and the tile images.
    min_votes : int, optional
        Features with ``1 <= votes < min_votes`` are dropped and counted in
        ``n_dropped_weak``; ``votes < 1`` is an error.
    check_images : bool, optional
        Open and decode every image (existence, corruption, band count, size).
        When False no image is opened: ``width`` and ``height`` come from the
        optional tiles.csv columns of that name when present (else they are
        missing and points are not checked against the tile bounds).

    Returns
    -------
    TileSet

    Raises
    ------
    TileSetError
        With every problem found, each naming the file, the 1-based data row
        (CSV line minus the header line) and the offending value.
    """
    if isinstance(min_votes, bool) or not isinstance(min_votes, (int, np.integer)) or min_votes < 1:
        raise DetectorError(f"min_votes {min_votes!r} must be an integer >= 1.")
    min_votes = int(min_votes)
    root = Path(root)
    if not root.is_dir():
        raise TileSetError([f"tile-set folder {str(root)!r} does not exist or is not a folder."])

    problems = _Problems()
    tiles_raw = _read_csv(root / TILES_FILE, problems)
    consensus_raw = _read_csv(root / CONSENSUS_FILE, problems)

    tiles = None
    if tiles_raw is not None and _require_columns(tiles_raw, TILES_FILE, TILES_REQUIRED, problems):
        if len(tiles_raw) == 0:
            problems.add(TILES_FILE, 0, f"{TILES_FILE} has no data rows: the tile set is empty.")
        else:
            tiles = _check_tiles(root, tiles_raw, problems, check_images)

    consensus = None
    if consensus_raw is not None and _require_columns(consensus_raw, CONSENSUS_FILE, CONSENSUS_REQUIRED, problems):
        consensus = _check_consensus(consensus_raw, tiles, problems)

    if problems:
        raise TileSetError(problems.messages())

    tiles = tiles.reset_index(drop=True)
    if check_images or tiles[["width", "height"]].notna().all(axis=None):
        tiles["width"] = tiles["width"].astype(np.int64)
        tiles["height"] = tiles["height"].astype(np.int64)
    else:
        tiles["width"] = tiles["width"].astype("Int64")
        tiles["height"] = tiles["height"].astype("Int64")

    consensus = consensus[list(CONSENSUS_COLUMNS)]
    weak = consensus["votes"] < min_votes
    weak_tile_ids = tuple(consensus.loc[weak, "tile_id"])
    consensus = consensus[~weak].reset_index(drop=True)
    consensus["votes"] = consensus["votes"].astype(np.int64)
    return TileSet(root, tiles, consensus, int(weak.sum()), min_votes, weak_tile_ids)


# --------------------------------------------------------------------------- summary


def summarize_tileset(ts):
    """Headline numbers of a tile set.

    Returns
    -------
    summary : dict
        ``tiles``, ``images``, ``fans``, ``spots``, ``empty_tiles`` (tiles
        without any kept feature), ``votes_min``, ``votes_q1``,
        ``votes_median``, ``votes_q3``, ``votes_max`` (NaN without features),
        ``min_votes``, ``dropped_weak`` and ``size_mb`` (CSV files and images
        on disk, 10^6 bytes).
    """
    kinds = ts.consensus["kind"]
    votes = ts.consensus["votes"].to_numpy(dtype=float)
    if votes.size:
        q = np.percentile(votes, [0, 25, 50, 75, 100])
    else:
        q = np.full(5, np.nan)
    files = [ts.root / TILES_FILE, ts.root / CONSENSUS_FILE] + [ts.root / p for p in ts.tiles["path"].unique()]
    size = sum(p.stat().st_size for p in files if p.is_file())
    return {
        "tiles": int(len(ts.tiles)),
        "images": int(ts.tiles["image_id"].nunique()),
        "fans": int((kinds == "fan").sum()),
        "spots": int((kinds == "spot").sum()),
        "empty_tiles": int((~ts.tiles["tile_id"].isin(set(ts.consensus["tile_id"]))).sum()),
        "votes_min": float(q[0]),
        "votes_q1": float(q[1]),
        "votes_median": float(q[2]),
        "votes_q3": float(q[3]),
        "votes_max": float(q[4]),
        "min_votes": int(ts.min_votes),
        "dropped_weak": int(ts.n_dropped_weak),
        "size_mb": size / 1e6,
    }


def format_summary(summary):
    """Plain-text, one-screen rendering of :func:`summarize_tileset`'s result."""
    s = summary
    if np.isnan(s["votes_min"]):
        votes = "no features"
    else:
        votes = (
            f"min {s['votes_min']:g}, q1 {s['votes_q1']:g}, median {s['votes_median']:g}, "
            f"q3 {s['votes_q3']:g}, max {s['votes_max']:g}"
        )
    lines = [
        f"tiles            {s['tiles']}",
        f"source images    {s['images']}",
        f"fans             {s['fans']}",
        f"spots            {s['spots']}",
        f"empty tiles      {s['empty_tiles']}",
        f"votes            {votes}",
        f"dropped weak     {s['dropped_weak']} (votes < {s['min_votes']})",
        f"size on disk     {s['size_mb']:.2f} MB",
    ]
    return "\n".join(lines)
