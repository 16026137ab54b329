"""Angle conventions and geometry shared by every part of frostvane.

Pixel coordinates: x (columns) to the right, y (rows) down, origin at the
centre of the top-left pixel. Directions are degrees clockwise from image up
(-y), in [0, 360); on a north-up map-projected image this is the azimuth.
"""

import numpy as np

__all__ = ["direction_deg", "unit_vector", "angular_difference", "axial_difference"]


def direction_deg(d_col, d_row):
    """Direction of (d_col, d_row) in degrees clockwise from image up (-y), in [0, 360).

    Parameters
    ----------
    d_col, d_row : float or ndarray
        Displacement along columns (x, right) and rows (y, down), px.

    Returns
    -------
    angle : float or ndarray
        Degrees clockwise from up: up = 0, right = 90, down = 180, left = 270.
    """
    return np.degrees(np.arctan2(d_col, -np.asarray(d_row, dtype=float))) % 360.0


def unit_vector(angle_deg):
    """Unit displacement (d_col, d_row) of a direction in degrees clockwise from up.

    Parameters
    ----------
    angle_deg : float or ndarray
        Degrees clockwise from image up.

    Returns
    -------
    d_col, d_row : float or ndarray
        Components along x (right) and y (down); the inverse of :func:`direction_deg`.
    """
    rad = np.radians(angle_deg)
    return np.sin(rad), -np.cos(rad)


def angular_difference(a_deg, b_deg):
    """Smallest circular difference between two directions, degrees in [0, 180]."""
    d = np.abs((np.asarray(a_deg, dtype=float) - b_deg) % 360.0)
    return np.minimum(d, 360.0 - d)


def axial_difference(a_deg, b_deg):
    """Smallest difference between two axes (angles mod 180), degrees in [0, 90]."""
    d = np.abs((np.asarray(a_deg, dtype=float) - b_deg) % 180.0)
    return np.minimum(d, 180.0 - d)
