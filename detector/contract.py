"""Column lists of the tile-set contract: the one place that names them.

A tile set is a folder with ``tiles.csv`` (one row per tile image) and
``consensus.csv`` (one row per consensus feature). See README.md, "The tile-set
contract", for the meaning of each column.
"""

TILES_FILE = "tiles.csv"
CONSENSUS_FILE = "consensus.csv"
TRUTH_FILE = "truth.csv"

TILES_REQUIRED = ("tile_id", "image_id", "path")
TILES_OPTIONAL = (
    "solar_longitude_deg",
    "region",
    "classifications",
    "col0",
    "row0",
    "metres_per_px",
)

KINDS = ("fan", "spot")

CONSENSUS_REQUIRED = (
    "tile_id",
    "kind",
    "x_px",
    "y_px",
    "direction_deg",
    "length_px",
    "opening_deg",
    "semi_major_px",
    "semi_minor_px",
    "votes",
)
CONSENSUS_OPTIONAL = ("fan_vote_share",)
CONSENSUS_COLUMNS = CONSENSUS_REQUIRED + CONSENSUS_OPTIONAL

#: Geometry columns that must be filled, per kind; the others of a row stay empty.
KIND_FIELDS = {
    "fan": ("x_px", "y_px", "direction_deg", "length_px", "opening_deg"),
    "spot": ("x_px", "y_px", "direction_deg", "semi_major_px", "semi_minor_px"),
}

#: What a detector adds to the consensus columns.
DETECTION_EXTRA = ("score", "direction_confidence")
DETECTION_COLUMNS = CONSENSUS_COLUMNS + DETECTION_EXTRA

#: Common practice: a consensus feature needs at least three volunteers.
DEFAULT_MIN_VOTES = 3
