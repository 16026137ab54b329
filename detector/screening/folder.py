"""The screening folder: its files and their columns (what ``frostvane screen`` writes).

See the package notes in :mod:`detector.screening.run` for what each file holds.
"""

from ..contract import DETECTION_COLUMNS
from ..inference.unfamiliar import SHARE_COLUMNS

__all__ = ["smoothed_flags", "TILE_COLUMNS", "GEO_COLUMNS", "DETECTION_OUTPUT_COLUMNS", "GEOJSON_COORDINATES", "MIN_VALID_SHARE", "DEPOSIT_THRESHOLD"]


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
    "noise_8bit",
    "smoothed",
    "scale_zoom",
    "read_zoom",
) + SHARE_COLUMNS


def smoothed_flags(tiles):
    """``tiles.csv``'s ``smoothed`` column as bools, read in memory or from the CSV ("True"/"False");
    all False for a table without it (a screening or journal of an earlier version)."""
    import numpy as np

    if "smoothed" not in tiles.columns:
        return np.zeros(len(tiles), dtype=bool)
    return tiles["smoothed"].astype(str).str.strip().str.lower().isin(("true", "1", "1.0")).to_numpy()


#: Columns added to ``detections.csv`` for georeferenced rasters.
GEO_COLUMNS = ("lon_deg", "lat_deg", "azimuth_deg", "wind_from_deg", "length_m")


#: Columns of ``detections.csv`` (the geographic ones only when some input is georeferenced).
DETECTION_OUTPUT_COLUMNS = DETECTION_COLUMNS + ("image", "col0", "row0", "area_m2")


#: How detections.geojson gives positions (see detector.gis.geojson).
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
