"""Tile-set folders made of some tiles of another: the images are linked, the tables filtered."""

import os
import shutil
from pathlib import Path

__all__ = ["link_images", "write_subset"]


def link_images(tileset_root, rel_paths, folder):
    """Hard-link each tile image of ``tileset_root`` into ``folder`` at the same relative path.

    Tile paths must stay inside their tile-set folder, so a subset cannot point back to the
    original files; a hard link costs no space, and a copy is made where the file system has none.
    """
    for rel in rel_paths:
        target = Path(folder) / rel
        if target.exists():
            continue
        target.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.link(Path(tileset_root) / rel, target)
        except OSError:
            shutil.copyfile(Path(tileset_root) / rel, target)


def write_subset(tileset_root, tiles_raw, consensus_raw, tile_ids, folder):
    """Write a tile set holding only ``tile_ids`` (consensus omitted when ``consensus_raw`` is None).

    Parameters
    ----------
    tileset_root : path-like
    tiles_raw, consensus_raw : DataFrame
        The source's tiles.csv and consensus.csv as read (strings kept as they are).
    tile_ids : collection of str
    folder : path-like

    Returns
    -------
    n_tiles : int
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    keep = set(tile_ids)
    tiles = tiles_raw[tiles_raw["tile_id"].isin(keep)].copy()
    link_images(tileset_root, tiles["path"], folder)
    tiles.to_csv(folder / "tiles.csv", index=False)
    if consensus_raw is not None:
        consensus_raw[consensus_raw["tile_id"].isin(keep)].to_csv(folder / "consensus.csv", index=False)
    return len(tiles)
