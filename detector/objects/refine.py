"""Refining scored readings: consensus-scale sizes, and a turn of each fan's direction.

A reading's own geometry is measured on its dark component: the length reaches
the 97th percentile of its pixels' distances from the apex and the opening is
the sector of that radius holding its area (:func:`detector.objects._readings.fan_geometry`).
A fan fades away from its source, so its far, faint part falls under the
darkness threshold: measured lengths run short and openings wide, the more so
the longer and fainter the fan (on the development sets the median right fan
reading was 0.73 of its consensus length and 1.6 times its opening). Volunteers
mark the whole visible fan, and the coverage of a screening comes from these sizes.

A fan's direction is the darkness-weighted pull of its pixels from its vent;
a neighbour's pixels or a vent placed off the fan's axis turn it, and the
reading's view (:func:`detector.objects.assemble.reading_view`, the darkness on
a grid in the reading's own frame, so unchanged by turning the tile) shows on
which side the mass lies beyond it.

The refinement model maps a reading's features (its object features and the log
of its own two sizes) to the log of the consensus sizes and, for a fan, to the
signed angle from its direction to the consensus direction, with one ridge
regression per kind and output, fitted at training on the right readings
(those matched to consensus) and stored in the model card as plain numbers
(``refine_model``). It runs after the readings are scored, so the object and
context models see the readings as they were measured.

The turn of a fan's direction may instead come from a gradient-boosted regressor
over the same inputs (``turn.onnx``, described by the card's ``refine_turn``):
which side of a reading the misplaced mass lies on, and how far, is not a linear
function of its view. Training keeps whichever turn, none, the ridge's or the
boosted one, brings the right check readings closest to their consensus direction;
:func:`turn_directions` applies a boosted turn.
"""

import numpy as np

from .assemble import OBJECT_FEATURE_NAMES

__all__ = ["REFINE_FEATURE_NAMES", "REFINE_OUTPUTS", "SIZE_NAMES", "MAX_FACTOR", "MAX_TURN_DEG",
           "OPENING_BOUNDS_DEG", "reading_shapes", "refine_design", "predict_refined", "turn_directions",
           "apply_refined"]

#: The two sizes of each kind.
SIZE_NAMES = {"fan": ("length_px", "opening_deg"), "spot": ("semi_major_px", "semi_minor_px")}

#: The refinement model's outputs per kind: log sizes, and a fan's turn (degrees, clockwise positive).
REFINE_OUTPUTS = {"fan": ("log_length", "log_opening", "turn_deg"), "spot": ("log_semi_major", "log_semi_minor")}

#: Inputs of the refinement model: the object features, then the log of the reading's own two sizes.
REFINE_FEATURE_NAMES = OBJECT_FEATURE_NAMES + ("log_own_size_1", "log_own_size_2")

#: Farthest a refined size may move from the measured one (factor), the opening's bounds (degrees),
#: and the largest turn of a direction (degrees).
MAX_FACTOR = 4.0
OPENING_BOUNDS_DEG = (5.0, 180.0)
MAX_TURN_DEG = 30.0

# Sizes below this (px or degrees) are floored before their log is taken.
_FLOOR = 1e-3


def reading_shapes(candidates):
    """Each reading's own two sizes (see :data:`SIZE_NAMES`) and direction, in the order of
    :func:`detector.objects.assemble.reading_matrix`.

    Returns
    -------
    sizes : ndarray of shape (n_readings, 2), float64
    direction_deg : ndarray of shape (n_readings,), float64
        Fans' directions (a spot's axis for spot readings, unused).
    is_fan : ndarray of shape (n_readings,), bool
    """
    sizes, direction, is_fan = [], [], []
    for c in candidates:
        for reading in list(c.fans) + list(c.spots):
            kind = reading["kind"]
            sizes.append([float(reading[name]) for name in SIZE_NAMES[kind]])
            direction.append(float(reading["direction_deg"]))
            is_fan.append(kind == "fan")
    return (np.array(sizes, dtype=np.float64).reshape(-1, 2), np.array(direction, dtype=np.float64),
            np.array(is_fan, dtype=bool))


def refine_design(F, own_sizes):
    """The refinement model's input rows: object features and the log of the reading's own sizes.

    Parameters
    ----------
    F : ndarray of shape (n, len(OBJECT_FEATURE_NAMES))
    own_sizes : ndarray of shape (n, 2)

    Returns
    -------
    ndarray of shape (n, len(REFINE_FEATURE_NAMES)), float64
    """
    F = np.asarray(F, dtype=np.float64).reshape(-1, len(OBJECT_FEATURE_NAMES))
    own = np.asarray(own_sizes, dtype=np.float64).reshape(-1, 2)
    return np.column_stack([F, np.log(np.maximum(own, _FLOOR))])


def _outputs(part, X):
    z = (X - np.asarray(part["mean"])) / np.asarray(part["scale"])
    return z @ np.asarray(part["coef"], dtype=np.float64).T + np.asarray(part["intercept"], dtype=np.float64)


def predict_refined(fit, F, own_sizes, direction_deg, is_fan):
    """Refined sizes and directions of readings from a fitted refinement model.

    Parameters
    ----------
    fit : dict or None
        The card's ``refine_model``: per kind ``mean``, ``scale`` (of the design's
        columns), ``coef`` (one row per output of :data:`REFINE_OUTPUTS`) and
        ``intercept``. None keeps the measured sizes and directions.
    F, own_sizes : see :func:`refine_design`
    direction_deg : ndarray of shape (n,)
    is_fan : ndarray of shape (n,), bool

    Returns
    -------
    sizes : ndarray of shape (n, 2)
        Each refined size stays within :data:`MAX_FACTOR` of the measured one; an
        opening stays within :data:`OPENING_BOUNDS_DEG` and a spot's semi-minor axis
        at most its semi-major axis.
    direction_deg : ndarray of shape (n,)
        Fans turned by at most :data:`MAX_TURN_DEG`, in [0, 360); spot rows unchanged.
    """
    own = np.asarray(own_sizes, dtype=np.float64).reshape(-1, 2)
    direction = np.asarray(direction_deg, dtype=np.float64).copy()
    is_fan = np.asarray(is_fan, dtype=bool)
    sizes = own.copy()
    if not fit or len(own) == 0:
        return sizes, direction
    X = refine_design(F, own)
    for kind, rows in (("fan", is_fan), ("spot", ~is_fan)):
        if not rows.any():
            continue
        out = _outputs(fit[kind], X[rows])
        base = np.maximum(own[rows], _FLOOR)
        sizes[rows] = np.clip(np.exp(out[:, :2]), base / MAX_FACTOR, base * MAX_FACTOR)
        if kind == "fan":
            direction[rows] = (direction[rows] + np.clip(out[:, 2], -MAX_TURN_DEG, MAX_TURN_DEG)) % 360.0
    sizes[is_fan, 1] = np.clip(sizes[is_fan, 1], *OPENING_BOUNDS_DEG)
    spots = ~is_fan
    sizes[spots, 1] = np.minimum(sizes[spots, 1], sizes[spots, 0])
    return sizes, direction


def turn_directions(direction_deg, is_fan, turn_deg):
    """Fans' directions turned by a predicted turn, clipped to :data:`MAX_TURN_DEG`.

    Parameters
    ----------
    direction_deg : ndarray of shape (n,)
        Every reading's direction (spots' axes are left as they are).
    is_fan : ndarray of shape (n,), bool
    turn_deg : ndarray of shape (n_fans,)
        The turn of each fan reading in order (degrees, clockwise positive).

    Returns
    -------
    ndarray of shape (n,)
        Fans' directions in [0, 360).
    """
    direction = np.asarray(direction_deg, dtype=np.float64).copy()
    is_fan = np.asarray(is_fan, dtype=bool)
    turn = np.asarray(turn_deg, dtype=np.float64).reshape(-1)
    if turn.size != is_fan.sum():
        raise ValueError(f"{turn.size} turns for {int(is_fan.sum())} fan readings.")
    direction[is_fan] = (direction[is_fan] + np.clip(turn, -MAX_TURN_DEG, MAX_TURN_DEG)) % 360.0
    return direction


def apply_refined(candidates, sizes, direction_deg):
    """Write sizes and fan directions (order of :func:`reading_shapes`) into the candidates' readings,
    in place; a count other than the readings' is refused before anything is written."""
    sizes = np.asarray(sizes, dtype=np.float64).reshape(-1, 2)
    direction = np.asarray(direction_deg, dtype=np.float64).reshape(-1)
    readings = [r for c in candidates for r in list(c.fans) + list(c.spots)]
    if not len(readings) == len(sizes) == len(direction):
        raise ValueError(f"{len(sizes)} sizes and {len(direction)} directions for {len(readings)} readings.")
    for reading, (first, second), turned in zip(readings, sizes.tolist(), direction.tolist()):
        a, b = SIZE_NAMES[reading["kind"]]
        reading[a], reading[b] = first, second
        if reading["kind"] == "fan":
            reading["direction_deg"] = turned
