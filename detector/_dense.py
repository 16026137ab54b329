"""Dense per-pixel maps of a tile and their pooling into cells and patches.

Every map is computed once per tile; per-``cell_px`` cell sums or histograms
(one ``np.bincount`` over all pixels, key ``cell * n_bins + bin``) are then
pooled into patch windows with a summed-area table over the cell grid, so no
Python loop runs over patches or pixels.
"""

import numpy as np
from scipy import ndimage as ndi

from .errors import ImageError

_U16 = 65535.0


class Prepared:
    """A tile made ready for the dense maps (see :func:`prepare_tile`)."""

    __slots__ = ("image", "u16", "valid", "has_nodata", "background", "scale", "lo", "hi")


def prepare_tile(tile, spec, nodata_mask=None):
    """Validate a single-band tile, scale it to [0, 1] and find its robust background.

    uint8 tiles are widened to uint16 by ``* 257`` before scaling, so a uint8 tile
    and the same tile as uint16 ``* 257`` give identical features; float tiles are
    taken as already in [0, 1] (NaN is no-data).

    Returns
    -------
    Prepared
        ``image`` float32 (M, N) with no-data pixels set to the background,
        ``u16`` the same on the 16-bit grid, ``valid`` bool (M, N), ``background``
        (median) and ``scale`` (1.4826 MAD, floored at ``spec.min_scale``) in [0, 1]
        units, ``lo``/``hi`` the ``glcm_range_percentiles`` of valid pixels.
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

    hist = np.bincount((u16[valid] if has_nodata else u16).ravel(), minlength=65536)
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
    return out


# -- cells -------------------------------------------------------------------
def cell_index(shape, cell_px):
    """Cell number of each pixel (row-major over full cells); pixels outside full cells get ``n_cells``."""
    h, w = shape
    ncr, ncc = h // cell_px, w // cell_px
    rows = np.arange(h) // cell_px
    cols = np.arange(w) // cell_px
    idx = rows[:, None] * ncc + cols[None, :]
    idx[(rows >= ncr)[:, None] | (cols >= ncc)[None, :]] = ncr * ncc
    return idx.astype(np.int64), ncr, ncc


def cell_histogram(cells, n_cells, bins, n_bins, weights=None):
    """Per-cell histograms (n_cells, n_bins) with one bincount; ``cells`` may hold the dump cell ``n_cells``."""
    key = cells * n_bins + bins
    counts = np.bincount(key.ravel(), weights=None if weights is None else weights.ravel(),
                         minlength=(n_cells + 1) * n_bins)
    return counts[: n_cells * n_bins].reshape(n_cells, n_bins)


def cell_sums(a, cell_px, ncr, ncc):
    """Sum of a map over each full cell, shape (ncr, ncc, ...) float64."""
    a = a[: ncr * cell_px, : ncc * cell_px]
    return a.reshape(ncr, cell_px, ncc, cell_px, *a.shape[2:]).sum(axis=(1, 3), dtype=np.float64)


def summed_area(cells):
    """Summed-area table of a (ncr, ncc, C) cell grid, shape (ncr + 1, ncc + 1, C)."""
    ncr, ncc = cells.shape[:2]
    table = np.zeros((ncr + 1, ncc + 1) + cells.shape[2:], dtype=np.float64)
    np.cumsum(cells, axis=0, out=table[1:, 1:])
    np.cumsum(table[1:, 1:], axis=1, out=table[1:, 1:])
    return table


def box(table, i0, j0, i1, j1):
    """Sums over cell boxes [i0, i1) x [j0, j1) from a summed-area table; indices are clipped."""
    ncr, ncc = table.shape[0] - 1, table.shape[1] - 1
    i0, i1 = np.clip(i0, 0, ncr), np.clip(i1, 0, ncr)
    j0, j1 = np.clip(j0, 0, ncc), np.clip(j1, 0, ncc)
    return table[i1, j1] - table[i0, j1] - table[i1, j0] + table[i0, j0]


# -- gradients and HOG ----------------------------------------------------------
def central_gradients(image):
    """Row and column central differences with zero border, as in ``skimage.feature.hog``."""
    g_row = np.zeros_like(image)
    g_col = np.zeros_like(image)
    np.subtract(image[2:, :], image[:-2, :], out=g_row[1:-1, :])
    np.subtract(image[:, 2:], image[:, :-2], out=g_col[:, 1:-1])
    return g_row, g_col


def orientation_bins(g_row, g_col, n_unsigned, n_signed):
    """Unsigned HOG bins (``atan2(g_row, g_col) mod 180``, hard-assigned like skimage)
    and signed bins of the gradient direction in degrees clockwise from image up."""
    deg = np.degrees(np.arctan2(g_row, g_col))
    unsigned = np.minimum((np.mod(deg, 180.0) * (n_unsigned / 180.0)).astype(np.int64), n_unsigned - 1)
    # direction_deg(g_col, g_row) = atan2(g_row, g_col) + 90 degrees
    signed = np.minimum((np.mod(deg + 90.0, 360.0) * (n_signed / 360.0)).astype(np.int64), n_signed - 1)
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
    """Grey levels 0 .. levels - 1 of a [0, 1] image, linear between ``lo`` and ``hi``."""
    q = np.floor((image - np.float32(lo)) * np.float32(levels / (hi - lo)))
    return np.clip(q, 0, levels - 1).astype(np.int64)


def glcm_cell_counts(q, cells, n_cells, offsets, levels, valid=None):
    """Co-occurrence counts per cell, shape (n_offsets, n_cells, levels, levels).

    A pair (first pixel, first + offset) is counted in the cell of its first pixel
    when both pixels lie in the tile (and are valid); pairs are not symmetrised.
    """
    h, w = q.shape
    base = cells * (levels * levels) + q * levels
    dump = n_cells * levels * levels
    out = {}
    for dr, dc in dict.fromkeys(offsets):
        r0, r1 = max(0, -dr), min(h, h - dr)
        c0, c1 = max(0, -dc), min(w, w - dc)
        key = base[r0:r1, c0:c1] + q[r0 + dr:r1 + dr, c0 + dc:c1 + dc]
        if valid is not None:
            ok = valid[r0:r1, c0:c1] & valid[r0 + dr:r1 + dr, c0 + dc:c1 + dc]
            key = np.where(ok, key, dump)
        counts = np.bincount(key.ravel(), minlength=dump + levels * levels)
        out[(dr, dc)] = counts[:dump].reshape(n_cells, levels, levels)
    return np.stack([out[o] for o in offsets])


def glcm_props(P):
    """Haralick properties of co-occurrence counts (..., L, L), symmetrised and
    normalised as ``skimage.feature.graycoprops`` does.

    Returns
    -------
    props : ndarray of shape (6, ...)
        contrast, dissimilarity, homogeneity, ASM, energy, correlation.
    """
    P = P + np.swapaxes(P, -1, -2)
    total = P.sum(axis=(-1, -2), keepdims=True)
    P = P / np.where(total == 0, 1.0, total)
    L = P.shape[-1]
    i = np.arange(L, dtype=np.float64)[:, None]
    j = np.arange(L, dtype=np.float64)[None, :]
    contrast = np.sum(P * (i - j) ** 2, axis=(-1, -2))
    dissim = np.sum(P * np.abs(i - j), axis=(-1, -2))
    homog = np.sum(P / (1.0 + (i - j) ** 2), axis=(-1, -2))
    asm = np.sum(P * P, axis=(-1, -2))
    mu_i = np.sum(P * i, axis=(-1, -2))
    mu_j = np.sum(P * j, axis=(-1, -2))
    di = i - mu_i[..., None, None]
    dj = j - mu_j[..., None, None]
    std_i = np.sqrt(np.sum(P * di**2, axis=(-1, -2)))
    std_j = np.sqrt(np.sum(P * dj**2, axis=(-1, -2)))
    cov = np.sum(P * di * dj, axis=(-1, -2))
    flat = (std_i < 1e-15) | (std_j < 1e-15)
    corr = np.where(flat, 1.0, cov / np.where(flat, 1.0, std_i * std_j))
    return np.stack([contrast, dissim, homog, asm, np.sqrt(asm), corr])


# -- local binary patterns --------------------------------------------------
def lbp_uniform(image, P, R, *, strip_rows=32):
    """Rotation-invariant uniform LBP codes 0 .. P + 1 (Ojala, Pietikainen and Maenpaa 2002).

    Whole-array re-implementation of ``skimage.feature.local_binary_pattern(image, P,
    R, 'uniform')``: same neighbour positions (rounded to 5 decimals), same bilinear
    interpolation with zeros outside the image, same float64 arithmetic in the same
    order, so codes are identical. Rows are processed in strips that stay in cache.
    """
    img = np.ascontiguousarray(image, dtype=np.float64)
    h, w = img.shape
    k = np.arange(P, dtype=np.float64)
    rp = np.round(-R * np.sin(2 * np.pi * k / P), 5)
    cp = np.round(R * np.cos(2 * np.pi * k / P), 5)
    pad = int(np.ceil(R)) + 1
    padded = np.zeros((h + 2 * pad, w + 2 * pad))
    padded[pad:-pad, pad:-pad] = img
    cols = np.arange(w, dtype=np.float64)
    neighbours = []
    for i in range(P):
        c = cols + cp[i]
        fc = c - np.floor(c)
        neighbours.append((int(np.floor(rp[i])), int(np.ceil(rp[i])), int(np.floor(cp[i])),
                           int(np.ceil(cp[i])), fc, 1 - fc))
    codes = np.empty((h, w), dtype=np.uint8)
    n = min(strip_rows, h)
    top, bottom, tmp = np.empty((n, w)), np.empty((n, w)), np.empty((n, w))
    bit, prev = np.empty((n, w), dtype=bool), np.empty((n, w), dtype=bool)
    ones, changes = np.empty((n, w), dtype=np.uint8), np.empty((n, w), dtype=np.uint8)
    for a in range(0, h, n):
        b = min(a + n, h)
        m = b - a
        rows = np.arange(a, b, dtype=np.float64)
        centre = img[a:b]
        t, bo, tm, bi, pr = top[:m], bottom[:m], tmp[:m], bit[:m], prev[:m]
        on, ch = ones[:m], changes[:m]
        on[:] = 0
        ch[:] = 0
        for i, (minr, maxr, minc, maxc, fc, gc) in enumerate(neighbours):
            def win(dr, dc):
                return padded[pad + a + dr:pad + b + dr, pad + dc:pad + dc + w]

            r = rows + rp[i]
            fr = (r - np.floor(r))[:, None]
            gr = 1 - fr
            np.multiply(gc, win(minr, minc), out=t)
            np.multiply(fc, win(minr, maxc), out=tm)
            t += tm
            if minr == maxr:
                bo[:] = t
            else:
                np.multiply(gc, win(maxr, minc), out=bo)
                np.multiply(fc, win(maxr, maxc), out=tm)
                bo += tm
            t *= gr
            bo *= fr
            t += bo
            t -= centre
            np.greater_equal(t, 0, out=bi)
            on += bi
            if i:
                np.not_equal(bi, pr, out=pr)
                ch += pr
            pr[:] = bi
        codes[a:b] = np.where(ch <= 2, on, np.uint8(P + 1))
    return codes


# -- structure tensor --------------------------------------------------------
def structure_tensor_maps(image, *, gradient_sigma, tensor_sigma):
    """Structure tensor (Bigun and Granlund 1987) as ``skimage.feature.structure_tensor``
    with ``mode='reflect'``: Sobel derivatives (after optional Gaussian pre-smoothing)
    and Gaussian-smoothed products.

    Returns
    -------
    A_rr, A_rc, A_cc : ndarray (M, N) float32
    """
    img = image.astype(np.float32, copy=False)
    if gradient_sigma > 0:
        img = ndi.gaussian_filter(img, gradient_sigma, mode="reflect", truncate=4.0)
    d_r = ndi.sobel(img, axis=0, mode="reflect")
    d_c = ndi.sobel(img, axis=1, mode="reflect")
    prods = (d_r * d_r, d_r * d_c, d_c * d_c)
    if tensor_sigma > 0:
        prods = tuple(ndi.gaussian_filter(p, tensor_sigma, mode="reflect", truncate=4.0) for p in prods)
    return prods
