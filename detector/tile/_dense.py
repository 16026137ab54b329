"""Dense per-pixel maps of a tile and their pooling into cells and patches.

Every map is computed once per tile; per-``cell_px`` cell sums or histograms
(one compiled pass over the pixels, :mod:`detector.tile._kernels`) are then pooled
into patch windows with a summed-area table over the cell grid, so no Python
loop runs over patches or pixels.
"""

import functools

import numpy as np
from scipy import ndimage as ndi

from . import _kernels
from .noise import noise_sigma, smooth_excess_noise
from ..errors import ImageError

_U16 = 65535.0


class Prepared:
    """A tile made ready for the dense maps (see :func:`prepare_tile`)."""

    __slots__ = ("image", "u16", "valid", "has_nodata", "background", "scale", "lo", "hi", "noise", "smoothed")


def prepare_tile(tile, spec, nodata_mask=None, noise_range=None):
    """Validate a single-band tile, scale it to [0, 1] and find its robust background.

    A tile noisier than ``noise_range.limit`` (a :class:`detector.tile.noise.NoiseRange`, from the
    model's card) is smoothed (:func:`detector.tile.noise.smooth_excess_noise`) and prepared again
    as a float tile; without a range, or within it, the tile is prepared as it is.

    uint8 tiles are widened to uint16 by ``* 257`` before scaling, so a uint8 tile
    and the same tile as uint16 ``* 257`` give identical features; float tiles are
    taken as already in [0, 1] (NaN is no-data).

    Returns
    -------
    Prepared
        ``image`` float32 (M, N) with no-data pixels set to the background,
        ``u16`` the same on the 16-bit grid, ``valid`` bool (M, N), ``background``
        (median) and ``scale`` (1.4826 MAD, floored at ``spec.min_scale``) in [0, 1]
        units, ``lo``/``hi`` the ``glcm_range_percentiles`` of valid pixels, ``noise``
        the tile's noise before any smoothing (:func:`detector.tile.noise.noise_sigma`, [0, 1]
        units) and ``smoothed`` whether it was smoothed.
    """
    tile = np.asarray(tile)
    if tile.ndim != 2 or tile.size == 0:
        raise ImageError(f"tile has shape {tile.shape}; expected a non-empty single-band (M, N) array.")
    if tile.dtype == np.uint8:
        u16 = tile.astype(np.uint16) * np.uint16(257)
        finite = None
    elif tile.dtype == np.uint16:
        u16 = tile
        finite = None
    elif np.issubdtype(tile.dtype, np.floating):
        finite = np.isfinite(tile)
        if np.any(tile[finite] < 0) or np.any(tile[finite] > 1):
            raise ImageError(
                f"float tile has values in [{np.nanmin(tile):g}, {np.nanmax(tile):g}]; expected [0, 1]."
            )
        u16 = np.rint(np.where(finite, tile, 0) * _U16).astype(np.uint16)
    else:
        raise ImageError(f"tile has dtype {tile.dtype}; expected uint8, uint16 or float.")
    if nodata_mask is not None:
        nodata_mask = np.asarray(nodata_mask, dtype=bool)
        if nodata_mask.shape != tile.shape:
            raise ImageError(f"nodata_mask has shape {nodata_mask.shape}; the tile has shape {tile.shape}.")
        valid = ~nodata_mask
    elif spec.nodata_value is not None:
        valid = tile != spec.nodata_value
    else:
        valid = np.ones(tile.shape, dtype=bool)
    if finite is not None:
        valid &= finite
    has_nodata = not valid.all()

    hist = _kernels.u16_histogram(np.ascontiguousarray(u16), np.ascontiguousarray(valid), has_nodata)
    n = int(hist.sum())
    out = Prepared()
    if n == 0:
        med, mad, lo, hi = 0, 0.0, 0, 1
    else:
        cum = np.cumsum(hist)
        med = int(np.searchsorted(cum, 0.5 * n))
        dev = np.bincount(np.abs(np.arange(65536) - med), weights=hist, minlength=65536)
        mad = float(np.searchsorted(np.cumsum(dev), 0.5 * n))
        p_lo, p_hi = spec.glcm_range_percentiles
        lo = int(np.searchsorted(cum, p_lo / 100.0 * n))
        hi = int(np.searchsorted(cum, p_hi / 100.0 * n))
    hi = max(hi, lo + 1)
    if tile.dtype.kind == "f" and not has_nodata:
        image = tile.astype(np.float32)
    else:
        image = (u16 / np.float32(_U16)).astype(np.float32)
    out.background = med / _U16
    out.scale = max(1.4826 * mad / _U16, spec.min_scale)
    out.lo, out.hi = lo / _U16, hi / _U16
    if has_nodata:
        image = np.where(valid, image, np.float32(out.background))
        u16 = np.where(valid, u16, np.uint16(med))
    out.image, out.u16, out.valid, out.has_nodata = image, np.ascontiguousarray(u16), valid, has_nodata
    out.noise = noise_sigma(image, valid if has_nodata else None)
    smooth, out.smoothed = smooth_excess_noise(image, out.noise, noise_range, valid if has_nodata else None)
    if out.smoothed:
        again = prepare_tile(np.where(valid, smooth, np.float32(np.nan)), spec, nodata_mask=~valid)
        again.noise, again.smoothed = out.noise, True
        return again
    return out


# -- cells -------------------------------------------------------------------
def cell_grid(shape, cell_px):
    """Rows and columns of full ``cell_px`` cells in a tile of ``shape``."""
    return shape[0] // cell_px, shape[1] // cell_px


def cell_histogram(bins, cell_px, n_bins, weights=None, mask=None):
    """Per-cell histograms (ncr, ncc, n_bins) of small integer ``bins`` (M, N) over full cells.

    Counts are int64; with ``weights`` (M, N) the sums are float64, added in
    row-major pixel order (as ``np.bincount`` adds them). Pixels where ``mask``
    is False are left out (counts only).
    """
    bins = np.ascontiguousarray(bins)
    if bins.dtype.kind not in "ui":
        raise TypeError(f"bins must be integers, not {bins.dtype}.")
    ncr, ncc = cell_grid(bins.shape, cell_px)
    if weights is not None:
        if mask is not None:
            raise ValueError("cell_histogram takes weights or a mask, not both.")
        return _kernels.cell_weighted(bins, np.ascontiguousarray(weights), cell_px, ncr, ncc, n_bins)
    use = mask is not None
    mask = np.ascontiguousarray(mask, dtype=bool) if use else np.ones((1, 1), dtype=bool)
    return _kernels.cell_counts(bins, cell_px, ncr, ncc, n_bins, mask, use)


def cell_sums(a, cell_px, ncr, ncc):
    """Sum of a map over each full cell, shape (ncr, ncc, ...) float64.

    2-D float32 maps (all of a tile's) by one compiled pass with numpy's order of additions.
    """
    if a.ndim == 2 and a.dtype == np.float32 and ncr > 0 and ncc > 0 and cell_px <= 128:
        return _kernels.cell_sums_f32(a, cell_px, ncr, ncc)
    a = a[: ncr * cell_px, : ncc * cell_px]
    return a.reshape(ncr, cell_px, ncc, cell_px, *a.shape[2:]).sum(axis=(1, 3), dtype=np.float64)


def summed_area(cells, dtype=np.float64):
    """Summed-area table of a (ncr, ncc, C) cell grid, shape (ncr + 1, ncc + 1, C).

    Integer counts use an integer table (exact, half the memory traffic).
    """
    ncr, ncc = cells.shape[:2]
    table = np.zeros((ncr + 1, ncc + 1) + cells.shape[2:], dtype=dtype)
    exact_kind = (cells.dtype == np.float64 and table.dtype == np.float64) or (
        cells.dtype.kind in "iu" and table.dtype.kind == "i")
    if ncr and ncc and cells.ndim == 3 and exact_kind:
        # the compiled loop adds in np.cumsum's order; integer sums are exact either way
        _kernels.summed_area(np.ascontiguousarray(cells), table)
        return table
    np.cumsum(cells, axis=0, out=table[1:, 1:])
    np.cumsum(table[1:, 1:], axis=1, out=table[1:, 1:])
    return table


def box(table, i0, j0, i1, j1):
    """Sums over cell boxes [i0, i1) x [j0, j1) from a summed-area table; indices are clipped."""
    ncr, ncc = table.shape[0] - 1, table.shape[1] - 1
    i0, i1 = np.clip(i0, 0, ncr), np.clip(i1, 0, ncr)
    j0, j1 = np.clip(j0, 0, ncc), np.clip(j1, 0, ncc)
    if table.ndim == 3 and np.ndim(i0) == 1 and table.dtype in (np.float64, np.int32, np.int64):
        # one compiled pass, the same expression in the same order
        index = [np.ascontiguousarray(np.broadcast_to(v, np.shape(i0)), dtype=np.int64) for v in (i0, j0, i1, j1)]
        return _kernels.box_sums(np.ascontiguousarray(table), *index)
    return table[i1, j1] - table[i0, j1] - table[i1, j0] + table[i0, j0]


def erode_square(mask, size):
    """``scipy.ndimage.minimum_filter(mask, size, mode='nearest')`` of a boolean mask (odd size):
    True where the whole ``size`` x ``size`` square around a pixel, within the tile, is True.

    Mirrored edges give the same minimum as repeated ones (a mirrored pixel lies in the
    window already), so the compiled running minimum serves.
    """
    return _kernels.square_extreme(np.asarray(mask, dtype=np.uint8), size, False).astype(bool)


# -- gradients and HOG ----------------------------------------------------------
def central_gradients(image):
    """Row and column central differences with zero border, as in ``skimage.feature.hog``."""
    g_row = np.zeros_like(image)
    g_col = np.zeros_like(image)
    np.subtract(image[2:, :], image[:-2, :], out=g_row[1:-1, :])
    np.subtract(image[:, 2:], image[:, :-2], out=g_col[:, 1:-1])
    return g_row, g_col


def orientation_bins(g_row, g_col, n_unsigned, n_signed):
    """Unsigned HOG bins (``atan2(g_row, g_col) mod 180`` degrees, hard-assigned like
    skimage) and signed bins of the gradient direction in degrees clockwise from image up.

    Both come from one ``arctan2``; the direction clockwise from up is
    ``atan2(g_row, g_col) + 90`` degrees (see ``geometry.direction_deg``).
    """
    turns = np.arctan2(g_row, g_col)
    turns *= np.float32(0.5 / np.pi)  # (-1/2, 1/2] turn from +x towards +y (down)
    # shift to positive values, floor to small integers, then wrap by subtraction
    u = turns * np.float32(2 * n_unsigned)
    u += np.float32(2 * n_unsigned)  # (n, 3n]
    unsigned = u.astype(np.uint8)
    unsigned -= np.uint8(n_unsigned)
    for _ in range(2):  # 180 degrees exactly wraps twice, to bin 0 as in skimage
        unsigned -= (unsigned >= n_unsigned).view(np.uint8) * np.uint8(n_unsigned)
    turns *= np.float32(n_signed)
    turns += np.float32(n_signed + n_signed / 4)  # (3n/4, 7n/4]
    signed = turns.astype(np.uint8)
    signed -= (signed >= n_signed).view(np.uint8) * np.uint8(n_signed)
    return unsigned, signed


def l2hys(blocks, eps=1e-5):
    """L2-Hys normalisation along the last axis (Dalal and Triggs 2005; as in skimage)."""
    out = blocks / np.sqrt(np.sum(blocks**2, axis=-1, keepdims=True) + eps**2)
    np.minimum(out, 0.2, out=out)
    return out / np.sqrt(np.sum(out**2, axis=-1, keepdims=True) + eps**2)


# -- grey-level co-occurrence -------------------------------------------------
def glcm_offsets(distances, angles_deg):
    """(d_row, d_col) of each (distance, angle), rounded as ``skimage.feature.graycomatrix`` does."""
    return [
        (int(np.round(np.sin(np.radians(a)) * d)), int(np.round(np.cos(np.radians(a)) * d)))
        for d in distances
        for a in angles_deg
    ]


def quantise(image, lo, hi, levels):
    """Grey levels 0 .. levels - 1 (uint8, levels <= 256) of a [0, 1] image, linear between ``lo`` and ``hi``."""
    q = np.floor((image - np.float32(lo)) * np.float32(levels / (hi - lo)))
    return np.clip(q, 0, levels - 1).astype(np.uint8)


def glcm_cell_counts(q, cell_px, offsets, levels, valid=None, *, folded=False):
    """Co-occurrence counts per full ``cell_px`` cell (cells row-major).

    A pair (first pixel, first + offset) is counted in the cell of its first pixel
    when both pixels lie in the tile (and are valid).

    Returns
    -------
    counts : ndarray of int32
        ``folded=False``: (n_offsets, n_cells, levels, levels), not symmetrised.
        ``folded=True``: (n_offsets, n_cells, levels (levels + 1) / 2), the count of
        the unordered pair {i, j} (i <= j), i.e. :func:`glcm_fold` with the diagonal halved.
        A view of cell-major memory: ``np.moveaxis(counts, 0, 1)`` is contiguous.
    """
    q = np.asarray(q)
    if q.size and (q.min() < 0 or q.max() >= levels):
        raise ValueError(f"grey levels must lie in 0 .. {levels - 1}.")
    q = np.ascontiguousarray(q, dtype=np.uint8)
    ncr, ncc = cell_grid(q.shape, cell_px)
    d_rows = np.array([o[0] for o in offsets], dtype=np.int64)
    d_cols = np.array([o[1] for o in offsets], dtype=np.int64)
    use = valid is not None
    valid = np.ascontiguousarray(valid, dtype=bool) if use else np.ones((1, 1), dtype=bool)
    kernel = _kernels.glcm_folded_counts if folded else _kernels.glcm_full_counts
    return np.moveaxis(kernel(q, cell_px, ncr, ncc, d_rows, d_cols, levels, valid, use), 1, 0)


def unfold_diagonal(F, levels):
    """Folded symmetric counts :func:`glcm_fold` from unordered-pair counts (diagonal doubled)."""
    iu, ju = np.triu_indices(levels)
    return F * np.where(iu == ju, 2, 1).astype(F.dtype)


def glcm_fold(P):
    """Symmetrised counts ``P + P.T`` (..., L, L) kept on and above the diagonal: (..., L (L + 1) / 2)."""
    L = P.shape[-1]
    iu, ju = np.triu_indices(L)
    S = P + np.swapaxes(P, -1, -2)
    return S[..., iu, ju]


def glcm_props_folded(S, levels):
    """Haralick properties of folded symmetric counts (see :func:`glcm_fold`), normalised
    as ``skimage.feature.graycoprops`` does after ``symmetric=True, normed=True``.

    An off-diagonal folded entry stands for two equal entries of the symmetric matrix,
    so linear properties are one matrix product with doubled off-diagonal weights.

    Returns
    -------
    props : ndarray of shape (6, ...)
        contrast, dissimilarity, homogeneity, ASM, energy, correlation.
    """
    return _haralick(S, levels, diagonal_factor=1.0)


def glcm_props_unordered(F, levels):
    """:func:`glcm_props_folded` of :func:`unfold_diagonal` ``(F)``: the properties straight
    from unordered-pair counts (the diagonal doubled on the way, exactly)."""
    return _haralick(F, levels, diagonal_factor=2.0)


def _haralick(counts, levels, *, diagonal_factor):
    """Haralick properties (6, ...) of folded counts whose diagonal is scaled by ``diagonal_factor``
    (exact): one compiled pass per row, weighted sums in pair order, then the normalisations."""
    shape = counts.shape[:-1]
    flat = np.ascontiguousarray(counts.reshape(-1, counts.shape[-1]))
    if flat.dtype.kind not in "iuf":
        raise TypeError(f"co-occurrence counts must be numbers, not {flat.dtype}.")
    weights, mult = _haralick_weights(levels)
    factor = np.where(mult == 1.0, diagonal_factor, 1.0)  # mult is 1 on the diagonal
    return _kernels.haralick_rows(flat, factor, weights, mult).reshape((6,) + shape)


@functools.lru_cache(maxsize=8)
def _haralick_weights(levels):
    """Per folded pair (i <= j): the weights of the sums behind the properties, and 1 or 2
    (an off-diagonal entry stands for two equal entries of the symmetric matrix).

    Columns: total, (i - j)^2, |i - j|, 1 / (1 + (i - j)^2), (i + j) / 2, (i^2 + j^2) / 2, i j.
    """
    iu, ju = np.triu_indices(levels)
    i, j = iu.astype(np.float64), ju.astype(np.float64)
    mult = np.where(iu == ju, 1.0, 2.0)
    d = i - j
    weights = mult[:, None] * np.stack(
        [np.ones_like(i), d**2, np.abs(d), 1.0 / (1.0 + d**2), (i + j) / 2, (i**2 + j**2) / 2, i * j], axis=1)
    weights.setflags(write=False)
    mult.setflags(write=False)
    return weights, mult


def glcm_props(P):
    """Haralick properties of (unsymmetrised) co-occurrence counts (..., L, L), as
    ``graycoprops`` of the symmetric normalised matrix; shape (6, ...)."""
    return glcm_props_folded(glcm_fold(P), P.shape[-1])


# -- local binary patterns --------------------------------------------------
def lbp_uniform(image, P, R):
    """Rotation-invariant uniform LBP codes 0 .. P + 1 (Ojala, Pietikainen and Maenpaa 2002).

    Re-implementation of ``skimage.feature.local_binary_pattern(image, P, R,
    'uniform')``: same neighbour positions (rounded to 5 decimals), same bilinear
    interpolation with zeros outside the image, same float64 arithmetic in the same
    order, so codes are identical. The fractional positions are computed once
    per neighbour and row or column, the codes by :func:`_kernels.lbp_codes`.
    """
    return lbp_uniform_scales(image, [(P, R)])[0]


def lbp_uniform_scales(image, scales):
    """:func:`lbp_uniform` at each (P, R) of ``scales``, from one zero-padded copy of the image.

    """
    img = np.asarray(image)
    h, w = img.shape
    pad = max(int(np.ceil(R)) for _, R in scales) + 1
    padded = np.zeros((h + 2 * pad, w + 2 * pad))
    padded[pad:-pad, pad:-pad] = img  # widened to float64 as it is copied in
    finite = bool(np.isfinite(padded).all())
    out = []
    for P, R in scales:
        k = np.arange(P, dtype=np.float64)
        rp = np.round(-R * np.sin(2 * np.pi * k / P), 5)
        cp = np.round(R * np.cos(2 * np.pi * k / P), 5)
        # skimage interpolates at (r + rp, c + cp): floor, ceil and the fraction of each
        r = np.arange(h, dtype=np.float64)[None, :] + rp[:, None]
        c = np.arange(w, dtype=np.float64)[None, :] + cp[:, None]
        fr, fc = r - np.floor(r), c - np.floor(c)
        minr, maxr = np.floor(rp).astype(np.int64), np.ceil(rp).astype(np.int64)
        minc, maxc = np.floor(cp).astype(np.int64), np.ceil(cp).astype(np.int64)
        # neighbours on the pixel grid (offsets 0 or whole pixels) need no interpolation
        on_grid = (fr == 0).all(axis=1) & (fc == 0).all(axis=1) & finite
        out.append(_kernels.lbp_codes(padded, pad, h, w, minr, maxr, minc, maxc, fr, fc, P, on_grid))
    return out


# -- structure tensor --------------------------------------------------------
def structure_tensor_maps(image, *, gradient_sigma, tensor_sigma, central=None):
    """Structure tensor (Bigun and Granlund 1987) as ``skimage.feature.structure_tensor``
    with ``mode='reflect'``: Sobel derivatives (after optional Gaussian pre-smoothing)
    and Gaussian-smoothed products (``tensor_sigma`` 0: no smoothing).

    Parameters
    ----------
    central : (g_row, g_col), optional
        :func:`central_gradients` of ``image``; without pre-smoothing the Sobel
        derivative is their [1, 2, 1] smoothing across, with the reflected border.

    Returns
    -------
    A_rr, A_rc, A_cc : ndarray (M, N) float32
    """
    img = image.astype(np.float32, copy=False)
    if gradient_sigma > 0:
        img = ndi.gaussian_filter(img, gradient_sigma, mode="reflect", truncate=4.0)
        central = None
    if central is None or min(img.shape) < 2:
        d_r = ndi.sobel(img, axis=0, mode="reflect")
        d_c = ndi.sobel(img, axis=1, mode="reflect")
        prods = (d_r * d_r, d_r * d_c, d_c * d_c)
    else:
        # ndi.sobel = [-1, 0, 1] along the axis, then [1, 2, 1] across; with mode
        # 'reflect' the outer differences are one-sided (one compiled pass, the same values)
        g_row, g_col = (np.ascontiguousarray(g, dtype=np.float32) for g in central)
        prods = _kernels.sobel_products(np.ascontiguousarray(img), g_row, g_col)
    if tensor_sigma > 0:
        prods = tuple(ndi.gaussian_filter(p, tensor_sigma, mode="reflect", truncate=4.0) for p in prods)
    return prods
