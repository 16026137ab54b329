"""Circular statistics of directions and axes, in degrees.

Directions (fans) live on [0, 360); axes (spot long axes, structure-tensor
orientations) live on [0, 180) and are handled by angle doubling. Every
function ignores NaN angles (and the weights that go with them) and accepts
optional non-negative weights.
"""

import numpy as np

from .errors import DetectorError
from .geometry import angular_difference, axial_difference

__all__ = [
    "circular_mean",
    "resultant_length",
    "circular_std",
    "rayleigh_test",
    "angular_difference",
    "axial_difference",
    "axial_mean",
    "axial_resultant_length",
    "axial_std",
    "robust_circular_mean",
    "robust_axial_mean",
    "grouped_circular_mean",
]


def _prepare(angles, weights):
    """Flatten angles and weights, drop NaN entries, check the weights."""
    angles = np.asarray(angles, dtype=float).ravel()
    if weights is None:
        weights = np.ones_like(angles)
    else:
        weights = np.asarray(weights, dtype=float).ravel()
        if weights.shape != angles.shape:
            raise DetectorError(f"weights have {weights.size} values but angles have {angles.size}.")
        if np.any(weights < 0):
            raise DetectorError(f"weights must be non-negative; got minimum {np.nanmin(weights)!r}.")
    keep = np.isfinite(angles) & np.isfinite(weights)
    return angles[keep], weights[keep]


def _resultant(angles, weights):
    """Weighted mean resultant vector (C, S) of angles in degrees; NaN when empty."""
    total = weights.sum()
    if angles.size == 0 or total <= 0:
        return np.nan, np.nan
    rad = np.radians(angles)
    return np.dot(weights, np.cos(rad)) / total, np.dot(weights, np.sin(rad)) / total


def circular_mean(angles, weights=None):
    """Mean direction of angles.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; any range (taken mod 360). NaN entries are ignored.
    weights : array_like of shape (n,), optional
        Non-negative weights (e.g. fan length in px); integer weights act as repeats.

    Returns
    -------
    mean : float
        Degrees in [0, 360); NaN when there are no angles or the resultant is zero.
    """
    c, s = _resultant(*_prepare(angles, weights))
    if not np.isfinite(c) or np.hypot(c, s) < 1e-12:
        return np.nan
    return float(np.degrees(np.arctan2(s, c)) % 360.0)


def resultant_length(angles, weights=None):
    """Mean resultant length R in [0, 1] (1: all angles equal); NaN when empty."""
    c, s = _resultant(*_prepare(angles, weights))
    return float(np.hypot(c, s)) if np.isfinite(c) else np.nan


def circular_std(angles, weights=None):
    """Circular standard deviation sqrt(-2 ln R), in degrees (the definition of scipy.stats.circstd)."""
    r = resultant_length(angles, weights)
    if not np.isfinite(r):
        return np.nan
    # Rounding can put R a hair above 1 for identical angles: that spread is 0.
    return float(np.degrees(np.sqrt(-2.0 * np.log(min(max(r, 1e-300), 1.0)))))


def rayleigh_test(angles):
    """Rayleigh test of circular uniformity against a unimodal alternative.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; NaN entries are ignored.

    Returns
    -------
    z : float
        Rayleigh's z = R**2 / n with R = n * r the resultant length.
    p : float
        Approximate p-value ``exp(sqrt(1 + 4n + 4(n**2 - R**2)) - (1 + 2n))``
        (Zar, Biostatistical Analysis, Rayleigh test), clipped to [0, 1].
    """
    angles, weights = _prepare(angles, None)
    n = angles.size
    if n == 0:
        return np.nan, np.nan
    big_r = n * resultant_length(angles)
    z = big_r**2 / n
    p = np.exp(np.sqrt(1.0 + 4.0 * n + 4.0 * (n**2 - big_r**2)) - (1.0 + 2.0 * n))
    return float(z), float(np.clip(p, 0.0, 1.0))


def axial_mean(angles, weights=None):
    """Mean axis of axial data (angles mod 180), by angle doubling; degrees in [0, 180)."""
    mean = circular_mean(2.0 * np.asarray(angles, dtype=float), weights)
    return float((mean / 2.0) % 180.0) if np.isfinite(mean) else np.nan


def axial_resultant_length(angles, weights=None):
    """Mean resultant length of the doubled angles, in [0, 1]."""
    return resultant_length(2.0 * np.asarray(angles, dtype=float), weights)


def axial_std(angles, weights=None):
    """Circular standard deviation of axial data: that of the doubled angles, halved; degrees."""
    return circular_std(2.0 * np.asarray(angles, dtype=float), weights) / 2.0


def robust_circular_mean(angles, weights=None, *, cutoff_deg=45.0, max_iter=50, tol_deg=1e-6):
    """Mean direction that ignores outliers far from the main mode.

    Starts at the weighted mode (the peak of a von Mises kernel density, so a
    minority of flipped or stray fans cannot drag the start; evaluated on a
    0.5 degree grid by circular convolution of a weighted histogram, so time
    and memory grow linearly with the data) and iterates a Tukey-biweight reweighted circular mean:
    an angle ``d`` degrees from the current mean gets weight
    ``w * (1 - (d / cutoff_deg)**2)**2`` and none beyond ``cutoff_deg``.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; NaN entries are ignored.
    weights : array_like of shape (n,), optional
        Non-negative prior weights (e.g. fan length in px).
    cutoff_deg : float, optional
        Angles farther than this from the mean are ignored, degrees in (0, 180].
    max_iter : int, optional
        Iteration limit.
    tol_deg : float, optional
        Stop when the mean moves less than this, degrees.

    Returns
    -------
    mean : float
        Degrees in [0, 360); NaN when there are no angles.
    """
    if not 0.0 < cutoff_deg <= 180.0:
        raise DetectorError(f"cutoff_deg {cutoff_deg!r} is outside (0, 180].")
    angles, weights = _prepare(angles, weights)
    if angles.size == 0 or weights.sum() <= 0:
        return np.nan
    # Kernel concentration tied to the cutoff: a kernel half-width of about cutoff / 2.
    kappa = 1.0 / np.radians(cutoff_deg / 2.0) ** 2
    n_bins = 720
    hist, _ = np.histogram(angles % 360.0, bins=n_bins, range=(0.0, 360.0), weights=weights)
    offsets = np.radians(np.arange(n_bins) * (360.0 / n_bins))
    kernel = np.exp(kappa * (np.cos(offsets) - 1.0))
    density = np.real(np.fft.ifft(np.fft.fft(hist) * np.fft.fft(kernel)))
    mean = (np.argmax(density) + 0.5) * (360.0 / n_bins)
    for _ in range(max_iter):
        d = angular_difference(angles, mean)
        w = weights * np.clip(1.0 - (d / cutoff_deg) ** 2, 0.0, None) ** 2
        new = circular_mean(angles, w)
        if not np.isfinite(new):
            break
        moved = angular_difference(new, mean)
        mean = new
        if moved < tol_deg:
            break
    return float(mean)


def robust_axial_mean(angles, weights=None, *, cutoff_deg=22.5, **kwargs):
    """Robust mean axis (angles mod 180) by angle doubling; ``cutoff_deg`` is in axial degrees."""
    mean = robust_circular_mean(2.0 * np.asarray(angles, dtype=float), weights, cutoff_deg=2.0 * cutoff_deg, **kwargs)
    return float((mean / 2.0) % 180.0) if np.isfinite(mean) else np.nan


def grouped_circular_mean(angles, groups, weights=None):
    """Circular mean per group, all groups at once.

    Parameters
    ----------
    angles : array_like of shape (n,)
        Degrees; NaN entries are ignored.
    groups : array_like of shape (n,)
        Group label of each angle (e.g. tile_id).
    weights : array_like of shape (n,), optional
        Non-negative weights.

    Returns
    -------
    labels : ndarray of shape (k,)
        Sorted unique group labels.
    mean : ndarray of shape (k,)
        Mean direction per group, degrees in [0, 360) (NaN for a group without angles).
    resultant : ndarray of shape (k,)
        Mean resultant length per group.
    """
    angles = np.asarray(angles, dtype=float).ravel()
    groups = np.asarray(groups).ravel()
    weights = np.ones_like(angles) if weights is None else np.asarray(weights, dtype=float).ravel()
    if groups.shape != angles.shape or weights.shape != angles.shape:
        raise DetectorError(
            f"angles ({angles.size}), groups ({groups.size}) and weights ({weights.size}) differ in length."
        )
    if np.any(weights < 0):
        raise DetectorError(f"weights must be non-negative; got minimum {np.nanmin(weights)!r}.")
    labels, inverse = np.unique(groups, return_inverse=True)
    valid = np.isfinite(angles) & np.isfinite(weights)
    w = np.where(valid, weights, 0.0)
    rad = np.radians(np.where(valid, angles, 0.0))
    k = labels.size
    total = np.bincount(inverse, weights=w, minlength=k)
    c = np.bincount(inverse, weights=w * np.cos(rad), minlength=k)
    s = np.bincount(inverse, weights=w * np.sin(rad), minlength=k)
    with np.errstate(invalid="ignore", divide="ignore"):
        resultant = np.hypot(c, s) / total
    mean = np.degrees(np.arctan2(s, c)) % 360.0
    empty = ~(total > 0) | ~(resultant > 1e-12)
    mean[empty] = np.nan
    resultant[~(total > 0)] = np.nan
    return labels, mean, resultant
