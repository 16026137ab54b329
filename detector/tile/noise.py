"""A tile's noise level, and smoothing a tile noisier than any the model learnt from.

A model learns what fans and spots look like at the noise of its training images. A tile much
noisier than all of them (another camera mode, a binned or low-signal image, late-season light)
scatters its darkness and texture features beyond anything the classifiers met, and the deposits
score low there. Such a tile is smoothed before its features are computed, so the model sees it
closer to its training images; tiles within the training range are left exactly as they are.
"""

from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

__all__ = ["NOISE_METHOD", "NoiseRange", "noise_sigma", "smooth_excess_noise"]

#: How the noise is measured and removed, as recorded in a model card.
NOISE_METHOD = ("noise: Immerkaer's Laplacian-difference estimate; a tile above the limit is smoothed by "
                "the narrowest Gaussian that brings its estimate down to the target")

# The difference of two Laplacians: zero on any plane and on any quadratic surface of the image,
# so it responds to the pixel-to-pixel noise rather than to the terrain's slow shading.
_MASK = np.array([[1.0, -2.0, 1.0], [-2.0, 4.0, -2.0], [1.0, -2.0, 1.0]])
_SECOND = np.array([1.0, -2.0, 1.0], dtype=np.float32)


def noise_sigma(image, valid=None):
    """Standard deviation of a tile's white noise, in the units of ``image``.

    Immerkaer's estimate (J. Immerkaer, "Fast noise variance estimation", Computer Vision and
    Image Understanding 64(2), 1996): the mean absolute response to the 3 x 3 mask
    ``[[1, -2, 1], [-2, 4, -2], [1, -2, 1]]``, times ``sqrt(pi / 2) / 6``. For white Gaussian
    noise the mask's response has standard deviation ``6 sigma`` (the root of the sum of the
    squared weights, 36), and a zero-mean normal's mean absolute value is ``sqrt(2 / pi)`` of its
    standard deviation. Sharp edges add to it, so on strongly textured ground it is an upper bound.
    The mask is separable (``[1, -2, 1]`` along rows, then columns) and applied in float32.

    Parameters
    ----------
    image : ndarray of shape (M, N)
        float, any scale.
    valid : ndarray of shape (M, N), bool, optional
        Pixels holding data; a pixel counts only when its whole 3 x 3 neighbourhood is valid.

    Returns
    -------
    sigma : float
        NaN when no pixel has a whole valid neighbourhood.
    """
    image = np.asarray(image)
    if image.ndim != 2:
        raise ValueError(f"noise_sigma takes a 2-D image, not shape {image.shape}.")
    return _sigma(image, _inner(image.shape, valid))


def _inner(shape, valid):
    """Pixels whose whole 3 x 3 neighbourhood lies in the image and holds data; None for all
    but the border (the common case, read as a slice)."""
    if valid is None or np.all(valid):
        return None
    inner = np.zeros(shape, dtype=bool)
    inner[1:-1, 1:-1] = True
    inner &= ndi.binary_erosion(np.asarray(valid, dtype=bool), structure=np.ones((3, 3), bool), border_value=0)
    return inner


def _sigma(image, inner):
    if min(image.shape) < 3 or (inner is not None and not inner.any()):
        return float("nan")
    # The mask is the outer product of [1, -2, 1] with itself: two 1-D passes, in float32.
    response = ndi.correlate1d(np.asarray(image, dtype=np.float32), _SECOND, axis=0, mode="reflect")
    response = np.abs(ndi.correlate1d(response, _SECOND, axis=1, mode="reflect"))
    inside = response[1:-1, 1:-1] if inner is None else response[inner]
    return float(np.sqrt(np.pi / 2.0) * inside.mean(dtype=np.float64) / 6.0)


@dataclass(frozen=True)
class NoiseRange:
    """The noise of the tiles a model learnt from, as its card keeps it (fractions of the full scale).

    Attributes
    ----------
    limit : float
        The noisiest fitting tile's noise: a tile above it is smoothed.
    target : float
        What a smoothed tile's noise is brought down to: the 10th percentile of the fitting
        tiles' noise (a quiet training tile).
    """

    limit: float
    target: float

    @classmethod
    def from_card(cls, entry):
        """The range of a card's ``noise`` entry; None for a card without one (nothing is smoothed)."""
        if not entry:
            return None
        return cls(float(entry["limit"]), float(entry["target"]))

    @classmethod
    def of_tiles(cls, sigmas):
        """The range of the fitting tiles' noise values (NaN values, tiles without data, left out)."""
        sigmas = np.asarray(sigmas, dtype=np.float64)
        sigmas = sigmas[np.isfinite(sigmas)]
        if sigmas.size == 0:
            return None
        return cls(float(sigmas.max()), float(np.quantile(sigmas, 0.10)))


#: Gaussian widths (px) searched for the smoothing, and the number of halvings of that interval.
_WIDTHS = (0.25, 4.0)
_HALVINGS = 8
#: The width is searched on the tile's central window of this size (px) and a margin of the widest
#: Gaussian's reach (scipy truncates at 4 widths), then applied to the whole tile once.
_SEARCH_PX = 256
_MARGIN_PX = int(np.ceil(4 * _WIDTHS[1])) + 1


def smooth_excess_noise(image, sigma, noise_range, valid=None):
    """Smooth a tile noisier than its model's training tiles; others are returned as they are.

    The narrowest Gaussian (:func:`scipy.ndimage.gaussian_filter`, ``mode="reflect"``) that brings
    the tile's noise down to the range's target: its width is found by halving 0.25-4 px eight
    times on the tile's central 256 x 256 px window, as the width that lowers that window's
    :func:`noise_sigma` by the factor ``target / sigma``, and then applied to the whole tile (the
    search costs a few ms instead of a tenth of a second). A Gaussian was chosen over
    total-variation and non-local-means smoothing on a development set of noisy images (fan and
    spot F1 alike, directions better): it takes the grain away without turning shading into flat
    steps that the texture features read as edges.

    Parameters
    ----------
    image : ndarray of shape (M, N), float
        In [0, 1], no-data pixels already filled.
    sigma : float
        The tile's noise (:func:`noise_sigma`), in the units of ``image``.
    noise_range : NoiseRange or None
        None never smooths.
    valid : ndarray of shape (M, N), bool, optional
        Pixels holding data (for measuring the noise of the search window).

    Returns
    -------
    image : ndarray of shape (M, N), float32
    smoothed : bool
    """
    if noise_range is None or not np.isfinite(sigma) or sigma <= noise_range.limit:
        return image, False
    image = np.asarray(image, dtype=np.float32)
    window, inner = _search_window(image, valid)
    before = _sigma(window, inner)
    width = _WIDTHS[1]
    if np.isfinite(before) and before > 0:
        goal = before * noise_range.target / sigma
        lo, hi = _WIDTHS
        for _ in range(_HALVINGS):
            mid = 0.5 * (lo + hi)
            if _sigma(ndi.gaussian_filter(window, mid, mode="reflect"), inner) <= goal:
                hi = mid
            else:
                lo = mid
        width = hi
    out = ndi.gaussian_filter(image, width, mode="reflect")
    return np.clip(out, 0.0, 1.0).astype(np.float32), True


def _search_window(image, valid):
    """The central search window with its margin, and the pixels measured in it (see :func:`_inner`)."""
    slices, measured = [], []
    for n in image.shape:
        size = _SEARCH_PX + 2 * _MARGIN_PX
        if n <= size:
            slices.append(slice(0, n))
            measured.append(slice(1, n - 1))
        else:
            start = (n - size) // 2
            slices.append(slice(start, start + size))
            measured.append(slice(_MARGIN_PX, _MARGIN_PX + _SEARCH_PX))
    window = image[tuple(slices)]
    inner = np.zeros(window.shape, dtype=bool)
    inner[tuple(measured)] = True
    with_data = _inner(window.shape, None if valid is None else np.asarray(valid, dtype=bool)[tuple(slices)])
    return window, inner if with_data is None else inner & with_data
