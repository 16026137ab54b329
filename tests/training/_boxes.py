"""A stand-in rasteriser for scoring tests: every feature is a square box around (x, y)."""

import functools

import numpy as np


class BoxMasks:
    """The two coverage masks scoring reads from a rasteriser."""

    def __init__(self, fan, spot):
        self.fan_cover, self.spot_cover = fan, spot


def _box_rasterise(features, shape, *, half):
    fan = np.zeros(shape, bool)
    spot = np.zeros(shape, bool)
    for kind, x, y in zip(features["kind"], features["x_px"].astype(int), features["y_px"].astype(int)):
        (fan if kind == "fan" else spot)[max(y - half, 0):y + half + 1, max(x - half, 0):x + half + 1] = True
    return BoxMasks(fan, spot)


def box_rasteriser(half):
    """A rasterise(features, shape) callable drawing (2 half + 1)-px boxes."""
    return functools.partial(_box_rasterise, half=half)
