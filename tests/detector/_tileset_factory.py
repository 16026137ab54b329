"""A small valid tile set written to a temporary folder, shared by the detector tests."""

import numpy as np
import pandas as pd

from detector.io import write_image

#: (tile_id, image_id, file, rows, cols, dtype)
TILES = [
    ("t_a1", "IMG_A", "a1.png", 64, 96, np.uint8),
    ("t_a2", "IMG_A", "a2.png", 64, 96, np.uint8),
    ("t_b1", "IMG_B", "b1.tif", 72, 80, np.uint16),
    ("t_b2", "IMG_B", "sub/b2.png", 64, 64, np.uint8),
]

CONSENSUS = [
    # tile_id, kind, x, y, direction, length, spread, a, b, votes, fan_vote_share
    ("t_a1", "fan", 20.0, 30.0, 90.0, 40.0, 40.0, None, None, 5, 0.9),
    ("t_a1", "spot", 60.0, 20.0, 30.0, None, None, 8.0, 5.0, 4, 0.1),
    ("t_a1", "fan", 10.0, 10.0, 180.0, 20.0, 30.0, None, None, 2, None),
    ("t_b1", "fan", 40.0, 36.0, 300.0, 30.0, 60.0, None, None, 10, 1.0),
    ("t_b1", "spot", 20.0, 50.0, 0.0, None, None, 6.0, 6.0, 3, None),
    ("t_b2", "spot", 30.0, 20.0, 100.0, None, None, 10.0, 4.0, 7, 0.0),
]
CONSENSUS_HEADER = [
    "tile_id", "kind", "x_px", "y_px", "direction_deg", "length_px", "opening_deg",
    "semi_major_px", "semi_minor_px", "votes", "fan_vote_share",
]


def write_tileset(root, *, seed=0):
    """Write the tile set to ``root`` (created) and return ``root``."""
    rng = np.random.default_rng(seed)
    root.mkdir(parents=True, exist_ok=True)
    rows = []
    for i, (tile_id, image_id, rel, h, w, dtype) in enumerate(TILES):
        top = np.iinfo(dtype).max
        image = rng.integers(0, top // 2, size=(h, w)).astype(dtype)
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        write_image(root / rel, image)
        rows.append(
            {
                "tile_id": tile_id,
                "image_id": image_id,
                "path": rel,
                "solar_longitude_deg": 190.0 + 5 * i,
                "region": "invented_basin",
                "classifications": 20 + i,
                "col0": 100 * i,
                "row0": 0,
                "metres_per_px": 0.5,
                "width": w,
                "height": h,
            }
        )
    pd.DataFrame(rows).to_csv(root / "tiles.csv", index=False)
    pd.DataFrame(CONSENSUS, columns=CONSENSUS_HEADER).to_csv(root / "consensus.csv", index=False)
    return root


def set_cell(root, file, row, column, value):
    """Overwrite one cell (1-based data row) of a tile-set CSV, keeping the rest as text."""
    frame = pd.read_csv(root / file, dtype=str, keep_default_na=False)
    frame.loc[row - 1, column] = value
    frame.to_csv(root / file, index=False)
