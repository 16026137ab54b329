"""Compiled per-pixel loops of the dense maps (numba, CPU, single thread).

Each kernel does in one pass over the pixels what the whole-array numpy code
did in many: no temporary maps, no int64 key arrays. They reproduce the
numpy / scikit-image arithmetic exactly (same float64 operations in the same
order, no fast-math, sums in row-major pixel order), so features do not depend
on which implementation made them; the tests hold them to scikit-image.

Compiled functions are cached on disk (``cache=True``): the first run on a
machine compiles them (up to 1-2 minutes in all; the commands say so, see
:mod:`detector._jit`), later processes load the cache.

Compiled loops do not check bounds: a bin or index outside its histogram or
table would write or read outside it. The public wrappers of the histogram and
box loops (:func:`u16_histogram`, :func:`cell_counts`, :func:`cell_weighted`,
:func:`glcm_folded_counts`, :func:`glcm_full_counts`, :func:`box_sums`)
check ranges and shapes first and raise :class:`~detector.errors.KernelRangeError`
naming the value; they change no result.
"""

import numpy as np
from numba import njit

from ..errors import KernelRangeError

__all__ = ["lbp_codes", "u16_histogram", "cell_counts", "cell_weighted", "glcm_folded_counts", "glcm_full_counts",
           "box_sums"]


def _check_integers(name, values):
    if values.dtype.kind not in "ui":
        raise KernelRangeError(f"{name} must hold integers; got dtype {values.dtype}.")


def _check_range(name, values, stop):
    """Every value of the integer array ``values`` in [0, stop), else a KernelRangeError naming it."""
    _check_integers(name, values)
    if values.size == 0:
        return
    lo, hi = values.min(), values.max()
    if lo < 0 or hi >= stop:
        bad = lo if lo < 0 else hi
        raise KernelRangeError(f"{name} holds {int(bad)!r}, outside 0 .. {stop - 1}; a compiled loop would "
                               f"write outside its histogram.")


def _check_covers(name, shape, rows, cols):
    """A 2-D ``shape`` holds at least ``rows`` x ``cols`` values (the full cells a loop reads)."""
    if len(shape) != 2 or shape[0] < rows or shape[1] < cols:
        raise KernelRangeError(f"{name} has shape {tuple(shape)!r}; the cell grid needs at least "
                               f"({rows}, {cols}).")


def _check_grid(cell_px, ncr, ncc):
    if cell_px < 1 or ncr < 0 or ncc < 0:
        raise KernelRangeError(f"cell grid of {ncr!r} x {ncc!r} cells of {cell_px!r} px is not valid; "
                               f"cells need at least 1 px and the counts must not be negative.")


@njit(cache=True, nogil=True)
def lbp_codes(padded, pad, h, w, minr, maxr, minc, maxc, fr, fc, P, on_grid):
    """Rotation-invariant uniform LBP codes of the (h, w) image inside ``padded``.

    ``padded`` is the float64 image with ``pad`` zero rows and columns on every
    side. Neighbour ``i`` lies between rows ``minr[i]``, ``maxr[i]`` and
    columns ``minc[i]``, ``maxc[i]`` (offsets); ``fr[i, r]`` and ``fc[i, c]`` are
    its fractional row and column positions at pixel (r, c), as
    scikit-image's bilinear interpolation computes them. A row at a time, one
    neighbour after the other, so the inner loop runs along contiguous columns.
    A neighbour ``on_grid`` (all its fractions 0) is read as the pixel itself: the
    interpolation ``(1 - 0) * a + 0 * b`` of finite values gives ``a`` exactly.
    """
    codes = np.empty((h, w), dtype=np.uint8)
    ones = np.empty(w, dtype=np.uint8)
    changes = np.empty(w, dtype=np.uint8)
    prev = np.empty(w, dtype=np.uint8)
    for r in range(h):
        centre = padded[r + pad, pad:pad + w]
        ones[:] = 0
        changes[:] = 0
        for i in range(P):
            top_row = padded[r + pad + minr[i]]
            a, b = pad + minc[i], pad + maxc[i]
            if on_grid[i]:
                _lbp_bits_on_grid(top_row[a:a + w], centre, ones, changes, prev, i > 0)
                continue
            bottom_row = padded[r + pad + maxr[i]]
            _lbp_bits(top_row[a:a + w], top_row[b:b + w], bottom_row[a:a + w], bottom_row[b:b + w],
                      fr[i, r], fc[i], centre, ones, changes, prev, i > 0)
        for c in range(w):
            codes[r, c] = ones[c] if changes[c] <= 2 else P + 1
    return codes


@njit(cache=True, nogil=True)
def _lbp_bits(tl, tr, bl, br, dr, dc, centre, ones, changes, prev, count_changes):
    """One neighbour's bits along a row: skimage's bilinear value against the centre."""
    for c in range(centre.size):
        top = (1.0 - dc[c]) * np.float64(tl[c]) + dc[c] * np.float64(tr[c])
        bottom = (1.0 - dc[c]) * np.float64(bl[c]) + dc[c] * np.float64(br[c])
        v = (1.0 - dr) * top + dr * bottom
        bit = np.uint8(v - np.float64(centre[c]) >= 0)
        ones[c] += bit
        if count_changes:
            changes[c] += bit ^ prev[c]
        prev[c] = bit


@njit(cache=True, nogil=True)
def _lbp_bits_on_grid(values, centre, ones, changes, prev, count_changes):
    """As :func:`_lbp_bits` for a neighbour on the pixel grid (its value is the pixel's)."""
    for c in range(centre.size):
        bit = np.uint8(values[c] - centre[c] >= 0)
        ones[c] += bit
        if count_changes:
            changes[c] += bit ^ prev[c]
        prev[c] = bit


def u16_histogram(u16, valid, use_valid):
    """Counts (65536,) int64 of a uint16 image's values, over ``valid`` pixels when
    ``use_valid`` (``np.bincount(u16[valid], minlength=65536)``, without the int64 copy).

    Raises
    ------
    KernelRangeError
        ``u16`` is not 2-D uint16 or ``valid`` (when used) has another shape.
    """
    if u16.dtype != np.uint16 or u16.ndim != 2:
        raise KernelRangeError(f"u16_histogram takes a 2-D uint16 image; got {u16.ndim}-D {u16.dtype}.")
    if use_valid and valid.shape != u16.shape:
        raise KernelRangeError(f"valid has shape {valid.shape!r}; the image has shape {u16.shape!r}.")
    return _u16_histogram(u16, valid, use_valid)


@njit(cache=True, nogil=True)
def _u16_histogram(u16, valid, use_valid):
    """The loop of :func:`u16_histogram`."""
    hist = np.zeros(65536, dtype=np.int64)
    h, w = u16.shape
    for r in range(h):
        for c in range(w):
            if not use_valid or valid[r, c]:
                hist[u16[r, c]] += 1
    return hist


def cell_counts(bins, cell_px, ncr, ncc, n_bins, mask, use_mask):
    """Per-cell histogram (ncr, ncc, n_bins) int64 of small integer ``bins`` over full cells.

    Pixels where ``use_mask`` and not ``mask`` are left out.

    Raises
    ------
    KernelRangeError
        A bin outside 0 .. n_bins - 1 in the cells counted, or arrays smaller than the grid.
    """
    _check_grid(cell_px, ncr, ncc)
    _check_covers("bins", bins.shape, ncr * cell_px, ncc * cell_px)
    if use_mask:
        _check_covers("mask", mask.shape, ncr * cell_px, ncc * cell_px)
    _check_range("bins", bins[:ncr * cell_px, :ncc * cell_px], n_bins)
    return _cell_counts(bins, cell_px, ncr, ncc, n_bins, mask, use_mask)


@njit(cache=True, nogil=True)
def _cell_counts(bins, cell_px, ncr, ncc, n_bins, mask, use_mask):
    """The loop of :func:`cell_counts`."""
    out = np.zeros((ncr, ncc, n_bins), dtype=np.int64)
    for r in range(ncr * cell_px):
        i = r // cell_px
        for j in range(ncc):
            hist = out[i, j]
            for c in range(j * cell_px, (j + 1) * cell_px):
                if use_mask and not mask[r, c]:
                    continue
                hist[bins[r, c]] += 1
    return out


def cell_weighted(bins, weights, cell_px, ncr, ncc, n_bins):
    """Per-cell weighted histogram (ncr, ncc, n_bins) float64; sums in row-major pixel order.

    Raises
    ------
    KernelRangeError
        As :func:`cell_counts`, or ``weights`` smaller than the grid.
    """
    _check_grid(cell_px, ncr, ncc)
    _check_covers("bins", bins.shape, ncr * cell_px, ncc * cell_px)
    _check_covers("weights", weights.shape, ncr * cell_px, ncc * cell_px)
    _check_range("bins", bins[:ncr * cell_px, :ncc * cell_px], n_bins)
    return _cell_weighted(bins, weights, cell_px, ncr, ncc, n_bins)


@njit(cache=True, nogil=True)
def _cell_weighted(bins, weights, cell_px, ncr, ncc, n_bins):
    """The loop of :func:`cell_weighted`."""
    out = np.zeros((ncr, ncc, n_bins), dtype=np.float64)
    for r in range(ncr * cell_px):
        i = r // cell_px
        for j in range(ncc):
            hist = out[i, j]
            for c in range(j * cell_px, (j + 1) * cell_px):
                hist[bins[r, c]] += np.float64(weights[r, c])
    return out


@njit(cache=True, nogil=True)
def _ordered_counts(q, cell_px, ncr, ncc, dr, dc, n_levels, row_codes, ordered):
    """Fill ``ordered`` (ncr * ncc, n_levels**2) with the counts of the ordered pair code
    ``q[p] * n_levels + q[p + (dr, dc)]`` in the cell of p (both pixels in the tile, p in a
    full cell). The code is made in ``row_codes``' dtype: uint8 when it fits, so a row's
    codes are made many pixels at a time."""
    h, w = q.shape
    nl = row_codes.dtype.type(n_levels)
    r0, r1 = max(0, -dr), min(ncr * cell_px, h - dr)
    c0, c1 = max(0, -dc), min(ncc * cell_px, w - dc)
    ordered[:] = 0
    for r in range(r0, r1):
        first = q[r, c0:c1]
        second = q[r + dr, c0 + dc:c1 + dc]
        for c in range(c1 - c0):
            row_codes[c] = first[c] * nl + second[c]
        row_cell = (r // cell_px) * ncc
        for j in range(ncc):
            hist = ordered[row_cell + j]
            for c in range(max(c0, j * cell_px), min(c1, (j + 1) * cell_px)):
                hist[row_codes[c - c0]] += 1


@njit(cache=True, nogil=True)
def _pair_counts(q, cell_px, ncr, ncc, d_rows, d_cols, code, n_codes, row_codes):
    """Counts (ncr * ncc, n_offsets, n_codes) int32 of ``code[q[p], q[p + offset]]`` in the cell of p
    (cell-major, so that a cell's counts of every offset are pooled as one row).

    A pair counts when both pixels lie in the tile and p lies in a full cell;
    a ``code`` of ``n_codes`` or more is not counted (no-data pairs). The
    ordered pairs are counted first (:func:`_ordered_counts`), then gathered into
    ``code``'s bins: integer counts, the same whatever the order.
    """
    n_levels = code.shape[0]
    n_cells = ncr * ncc
    # the ordered codes that are counted, and the bin each goes to
    src = np.empty(n_levels * n_levels, dtype=np.int64)
    dst = np.empty(n_levels * n_levels, dtype=np.int64)
    n_kept = 0
    for a in range(n_levels):
        for b in range(n_levels):
            if code[a, b] < n_codes:
                src[n_kept], dst[n_kept] = a * n_levels + b, code[a, b]
                n_kept += 1
    ordered = np.zeros((n_cells, n_levels * n_levels), dtype=np.int32)
    out = np.zeros((n_cells, d_rows.size, n_codes), dtype=np.int32)
    for k in range(d_rows.size):
        _ordered_counts(q, cell_px, ncr, ncc, d_rows[k], d_cols[k], n_levels, row_codes, ordered)
        for i in range(n_cells):
            hist = ordered[i]
            counts = out[i, k]
            for m in range(n_kept):
                counts[dst[m]] += hist[src[m]]
    return out


def _pair_codes(q, code, cell_px, ncr, ncc, d_rows, d_cols, n_codes):
    """:func:`_pair_counts` with a row-code buffer of the smallest dtype that holds the codes."""
    n_levels = code.shape[0]
    _check_grid(cell_px, ncr, ncc)
    _check_covers("q", q.shape, ncr * cell_px, ncc * cell_px)
    if d_rows.shape != d_cols.shape or d_rows.ndim != 1:
        raise KernelRangeError(f"offsets need as many rows as columns; got {d_rows.shape!r} and {d_cols.shape!r}.")
    dtype = np.uint8 if n_levels * n_levels <= 256 else np.int32
    row_codes = np.empty(q.shape[1], dtype=dtype)
    return _pair_counts(q, cell_px, ncr, ncc, d_rows, d_cols, np.ascontiguousarray(code), n_codes, row_codes)


def _marked(q, levels, valid, use_valid):
    """Grey levels with no-data pixels moved to the extra level ``levels`` (in a dtype that holds it)."""
    if not use_valid:
        return q
    dtype = np.promote_types(q.dtype, np.min_scalar_type(levels))
    return np.where(valid, q.astype(dtype, copy=False), dtype.type(levels))


def _check_glcm_input(q, levels, valid, use_valid):
    """Grey levels in 0 .. levels - 1 (the extra level marks no-data) and a mask of the image's shape."""
    _check_range("grey levels q", q, levels)
    if use_valid and valid.shape != q.shape:
        raise KernelRangeError(f"valid has shape {valid.shape!r}; the grey levels have shape {q.shape!r}.")


def glcm_folded_counts(q, cell_px, ncr, ncc, d_rows, d_cols, levels, valid, use_valid):
    """Unordered-pair co-occurrence counts (ncr * ncc, n_offsets, levels (levels + 1) / 2) int32.

    The pair {lo, hi} (lo <= hi) has the row-major index of the upper triangle;
    pairs with a no-data pixel (``use_valid`` and not ``valid``) are not counted.
    """
    iu, ju = np.triu_indices(levels)
    code = np.full((levels + 1, levels + 1), iu.size, dtype=np.int32)
    code[iu, ju] = np.arange(iu.size)
    code[ju, iu] = np.arange(iu.size)
    _check_glcm_input(q, levels, valid, use_valid)
    n = levels + 1 if use_valid else levels
    return _pair_codes(_marked(q, levels, valid, use_valid), code[:n, :n], cell_px, ncr, ncc, d_rows, d_cols,
                       iu.size)


def glcm_full_counts(q, cell_px, ncr, ncc, d_rows, d_cols, levels, valid, use_valid):
    """Ordered-pair co-occurrence counts (ncr * ncc, n_offsets, levels, levels) int32 (see above)."""
    code = np.full((levels + 1, levels + 1), levels * levels, dtype=np.int32)
    code[:levels, :levels] = np.arange(levels * levels).reshape(levels, levels)
    _check_glcm_input(q, levels, valid, use_valid)
    n = levels + 1 if use_valid else levels
    out = _pair_codes(_marked(q, levels, valid, use_valid), code[:n, :n], cell_px, ncr, ncc, d_rows, d_cols,
                      levels * levels)
    return out.reshape(ncr * ncc, d_rows.size, levels, levels)


@njit(cache=True, nogil=True)
def cell_sums_f32(a, cell_px, ncr, ncc):
    """Sum of a float32 map over each full ``cell_px`` cell, float64 (ncr, ncc), in the order
    of numpy's ``a.reshape(ncr, cell_px, ncc, cell_px).sum(axis=(1, 3), dtype=np.float64)``:
    each cell row's ``cell_px`` values by numpy's pairwise block (eight running sums added
    as a tree), and those added to the cell's sum one row after the other."""
    out = np.zeros((ncr, ncc))
    acc = np.empty((ncc, 8))
    seg = np.empty(cell_px)
    for i in range(ncr):
        for r in range(cell_px):
            _add_cell_row(a[i * cell_px + r], out[i], cell_px, acc, seg)
    return out


@njit(cache=True, nogil=True)
def _add_cell_row(row, sums, cell_px, acc, seg):
    """Add one image row's part of each cell to ``sums`` (ncc,), as numpy's reduction does:
    each cell's ``cell_px`` values of the row by the pairwise block, in float64.
    ``acc`` (ncc, 8) and ``seg`` (cell_px,) are scratch."""
    ncc = sums.size
    if cell_px >= 8 and cell_px % 8 == 0 and cell_px <= 128:
        for j in range(ncc):
            base = j * cell_px
            for k in range(8):
                acc[j, k] = np.float64(row[base + k])
        for blk in range(8, cell_px, 8):
            for j in range(ncc):
                base = j * cell_px + blk
                for k in range(8):
                    acc[j, k] += np.float64(row[base + k])
        for j in range(ncc):
            sums[j] += (((acc[j, 0] + acc[j, 1]) + (acc[j, 2] + acc[j, 3]))
                        + ((acc[j, 4] + acc[j, 5]) + (acc[j, 6] + acc[j, 7])))
    else:
        for j in range(ncc):
            for c in range(cell_px):
                seg[c] = np.float64(row[j * cell_px + c])
            sums[j] += pairwise_block(seg, 0, cell_px)


@njit(cache=True, nogil=True)
def _clip(x, lo, hi):
    """``np.clip`` of one float: ``min(max(x, lo), hi)`` with numpy's comparisons."""
    m = x if x > lo else lo
    return m if m < hi else hi


@njit(cache=True, nogil=True)
def intensity_maps(image, background, inv_scale, z_range, bin_scale, n_bins, dark_max, valid, use_valid,
                   cell_px, ncr, ncc):
    """The intensity group's per-pixel maps and cell sums in one pass over a float32 tile,
    with numpy's float32 arithmetic of :meth:`detector.tile.features._Pooler.intensity`:

    ``z = (image - background) * inv_scale``; the histogram bin
    ``uint8(clip((z + z_range) * bin_scale, 0, n_bins - 1))``; the darkness
    ``clip(-z, 0, dark_max)``; z and the darkness zeroed off valid pixels (``* valid``)
    when ``use_valid``. All scalars are float32.

    Returns
    -------
    bins : uint8 (M, N)
    dark : float32 (M, N)
    z_cells, zz_cells, dark_cells : float64 (ncr, ncc)
        Cell sums of z, z * z and the darkness, in numpy's order.
    """
    h, w = image.shape
    bins = np.empty((h, w), dtype=np.uint8)
    dark = np.empty((h, w), dtype=np.float32)
    z_cells = np.zeros((ncr, ncc))
    zz_cells = np.zeros((ncr, ncc))
    dark_cells = np.zeros((ncr, ncc))
    z = np.empty(w, dtype=np.float32)
    zz = np.empty(w, dtype=np.float32)
    acc = np.empty((ncc, 8))
    seg = np.empty(cell_px)
    zero = np.float32(0.0)
    top_bin = np.float32(n_bins - 1)
    for r in range(h):
        for c in range(w):
            v = (image[r, c] - background) * inv_scale
            bins[r, c] = np.uint8(_clip((v + z_range) * bin_scale, zero, top_bin))
            d = _clip(-v, zero, dark_max)
            if use_valid:
                m = np.float32(valid[r, c])
                v = v * m
                d = d * m
            z[c] = v
            zz[c] = v * v
            dark[r, c] = d
        if r < ncr * cell_px:
            i = r // cell_px
            _add_cell_row(z, z_cells[i], cell_px, acc, seg)
            _add_cell_row(zz, zz_cells[i], cell_px, acc, seg)
            _add_cell_row(dark[r], dark_cells[i], cell_px, acc, seg)
    return bins, dark, z_cells, zz_cells, dark_cells


@njit(cache=True, nogil=True)
def pairwise_block(a, lo, n):
    """numpy's sum of at most 128 values: 8 accumulators, combined as a tree, in the array's dtype."""
    if n < 8:
        acc = np.zeros(1, dtype=a.dtype)[0]
        for i in range(lo, lo + n):
            acc += a[i]
        return acc
    r0, r1, r2, r3 = a[lo], a[lo + 1], a[lo + 2], a[lo + 3]
    r4, r5, r6, r7 = a[lo + 4], a[lo + 5], a[lo + 6], a[lo + 7]
    i = 8
    stop = n - n % 8
    while i < stop:
        j = lo + i
        r0 += a[j]
        r1 += a[j + 1]
        r2 += a[j + 2]
        r3 += a[j + 3]
        r4 += a[j + 4]
        r5 += a[j + 5]
        r6 += a[j + 6]
        r7 += a[j + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < n:
        res += a[lo + i]
        i += 1
    return res


@njit(cache=True, nogil=True)
def haralick_rows(counts, factor, weights, mult):
    """Haralick properties (6, n) of folded symmetric counts ``counts * factor`` (n, n_pairs;
    ``factor`` per pair, 1 or 2: exact), as :func:`detector.tile._dense.glcm_props_folded`
    computes them with numpy: each weighted sum adds its terms in pair order from 0.0
    (the order ``np.einsum`` takes for these operands), then the same divisions, in float64."""
    n, n_pairs = counts.shape
    n_w = weights.shape[1]
    out = np.empty((6, n))
    sums = np.empty(n_w)
    v = np.empty(n_pairs)
    w_t = np.ascontiguousarray(weights.T)
    for p in range(n):
        for k in range(n_pairs):
            v[k] = np.float64(counts[p, k]) * factor[k]
        for m in range(n_w):
            acc = 0.0
            w_m = w_t[m]
            for k in range(n_pairs):
                acc += v[k] * w_m[k]
            sums[m] = acc
        sq = 0.0
        for k in range(n_pairs):
            sq += v[k] * v[k] * mult[k]
        norm = 1.0 if sums[0] == 0 else sums[0]
        mu = sums[4] / norm
        var = max(sums[5] / norm - mu * mu, 0.0)
        cov = sums[6] / norm - mu * mu
        asm = sq / (norm * norm)
        out[0, p] = sums[1] / norm
        out[1, p] = sums[2] / norm
        out[2, p] = sums[3] / norm
        out[3, p] = asm
        out[4, p] = np.sqrt(asm)
        out[5, p] = 1.0 if np.sqrt(var) < 1e-15 else cov / var
    return out


@njit(cache=True, nogil=True)
def summed_area(cells, table):
    """Fill ``table`` (ncr + 1, ncc + 1, C), zeros, with the summed-area table of ``cells`` (ncr, ncc, C).

    The additions of ``np.cumsum`` down the rows, then along the columns, in
    the same order (so float sums are the same to the last bit).
    """
    ncr, ncc, n_ch = cells.shape
    for j in range(ncc):
        for k in range(n_ch):
            table[1, j + 1, k] = cells[0, j, k]
    for i in range(1, ncr):
        for j in range(ncc):
            for k in range(n_ch):
                table[i + 1, j + 1, k] = table[i, j + 1, k] + cells[i, j, k]
    for i in range(1, ncr + 1):
        for j in range(2, ncc + 1):
            for k in range(n_ch):
                table[i, j, k] = table[i, j - 1, k] + table[i, j, k]
    return table


@njit(cache=True, nogil=True)
def box_mean_rows(image, size, out):
    """Running mean of ``size`` samples down each column (zeros beyond the edges, window
    centred with ``size // 2`` samples before), as ``scipy.ndimage.uniform_filter1d(image,
    size, axis=0, mode='constant')`` computes it: a running float64 sum (the first window
    summed in order, then ``+ (entering - leaving)`` per step) divided by ``size`` at each
    output, stored in ``out``'s dtype. All columns advance together (contiguous rows)."""
    h, w = image.shape
    before = size // 2
    acc = np.zeros(w)
    for k in range(size):
        r = k - before
        if 0 <= r < h:
            for c in range(w):
                acc[c] += image[r, c]
    for c in range(w):
        out[0, c] = acc[c] / size
    for r in range(1, h):
        enter = r + size - 1 - before
        leave = r - 1 - before
        if enter < h and leave >= 0:
            for c in range(w):
                acc[c] += np.float64(image[enter, c]) - np.float64(image[leave, c])
        elif enter < h:
            for c in range(w):
                acc[c] += np.float64(image[enter, c]) - 0.0
        elif leave >= 0:
            for c in range(w):
                acc[c] += 0.0 - np.float64(image[leave, c])
        for c in range(w):
            out[r, c] = acc[c] / size
    return out


@njit(cache=True, nogil=True)
def box_mean_cols(image, size, out):
    """As :func:`box_mean_rows`, along each row (``axis=1``)."""
    h, w = image.shape
    before = size // 2
    for r in range(h):
        acc = 0.0
        for k in range(size):
            c = k - before
            if 0 <= c < w:
                acc += image[r, c]
        out[r, 0] = acc / size
        for c in range(1, w):
            enter = c + size - 1 - before
            leave = c - 1 - before
            e = np.float64(image[r, enter]) if enter < w else 0.0
            s = np.float64(image[r, leave]) if leave >= 0 else 0.0
            acc += e - s
            out[r, c] = acc / size
    return out


@njit(cache=True, nogil=True)
def masked_f32(image, valid):
    """``np.where(valid, image, 0.0).astype(np.float32)`` of a float32 image."""
    h, w = image.shape
    out = np.empty((h, w), dtype=np.float32)
    for r in range(h):
        for c in range(w):
            out[r, c] = image[r, c] if valid[r, c] else np.float32(0.0)
    return out


@njit(cache=True, nogil=True)
def darkness_residual(num, den, img, valid):
    """``np.where(valid, num / np.maximum(den, 1e-6) - img, 0.0)`` in float32, as numpy
    computes it for float32 maps."""
    h, w = num.shape
    resid = np.empty((h, w), dtype=np.float32)
    floor = np.float32(1e-6)
    for r in range(h):
        for c in range(w):
            if valid[r, c]:
                d = den[r, c]
                resid[r, c] = num[r, c] / (d if d >= floor else floor) - img[r, c]
            else:
                resid[r, c] = np.float32(0.0)
    return resid


@njit(cache=True, nogil=True)
def _reflect(i, n):
    """Index ``i`` folded into 0 .. n - 1 by mirroring at the edges (d c b a | a b c d)."""
    while i < 0 or i >= n:
        i = -i - 1 if i < 0 else 2 * n - i - 1
    return i


@njit(cache=True, nogil=True)
def running_extreme(image, size, axis, maximum):
    """Running minimum (or maximum) of ``size`` samples along ``axis`` (0 or 1), window
    from ``-(size // 2)`` to ``size - 1 - size // 2``, edges mirrored; a new array."""
    h, w = image.shape
    out = np.empty_like(image)
    lo = -(size // 2)
    if axis == 0:
        for r in range(h):
            for c in range(w):
                out[r, c] = image[_reflect(r + lo, h), c]
            for k in range(lo + 1, lo + size):
                rr = _reflect(r + k, h)
                for c in range(w):
                    v = image[rr, c]
                    if (v > out[r, c]) if maximum else (v < out[r, c]):
                        out[r, c] = v
    else:
        line = np.empty(w + size - 1, dtype=image.dtype)
        for r in range(h):
            for k in range(w + size - 1):
                line[k] = image[r, _reflect(k + lo, w)]
            row = out[r]
            for c in range(w):
                row[c] = line[c]
            for k in range(1, size):
                shifted = line[k:k + w]
                for c in range(w):
                    v = shifted[c]
                    if (v > row[c]) if maximum else (v < row[c]):
                        row[c] = v
    return out


def square_extreme(image, size, maximum):
    """Minimum (or maximum) over the ``size`` x ``size`` square around each pixel, edges
    mirrored: :func:`running_extreme` down the columns, then along the rows."""
    image = np.ascontiguousarray(image)
    return running_extreme(running_extreme(image, size, 0, maximum), size, 1, maximum)


@njit(cache=True, nogil=True)
def valid_sample(values, valid, every):
    """``values[valid][::every]``: every ``every``-th valid value in row-major order."""
    h, w = values.shape
    n_valid = 0
    for r in range(h):
        for c in range(w):
            n_valid += valid[r, c]
    out = np.empty((n_valid + every - 1) // every, dtype=values.dtype)
    k = 0
    m = 0
    for r in range(h):
        for c in range(w):
            if valid[r, c]:
                if k % every == 0:
                    out[m] = values[r, c]
                    m += 1
                k += 1
    return out


@njit(cache=True, nogil=True)
def ratio_above(values, valid, scale, threshold):
    """``np.where(valid, values / scale, 0.0) > threshold`` with ``scale`` and ``threshold``
    given in the map's dtype (as numpy casts Python scalars against a float32 map)."""
    h, w = values.shape
    out = np.empty((h, w), dtype=np.bool_)
    off = values.dtype.type(0.0) > threshold
    for r in range(h):
        for c in range(w):
            out[r, c] = (values[r, c] / scale > threshold) if valid[r, c] else off
    return out


@njit(cache=True, nogil=True)
def _root(parent, i):
    while parent[i] != i:
        parent[i] = parent[parent[i]]
        i = parent[i]
    return i


@njit(cache=True, nogil=True)
def label_components(mask, seed_map, seed_level):
    """4-connected components of ``mask`` numbered as ``scipy.ndimage.label`` numbers them
    (1, 2, ... in the raster order of each component's first pixel), with what the
    detector needs of each in the same two passes.

    Returns
    -------
    labels : int32 (M, N)
        0 off the mask.
    area : int64 (n,)
        Pixels of labels 1 .. n.
    seeded : bool (n,)
        The component holds a pixel with ``seed_map >= seed_level``.
    box : int64 (n, 4)
        row0, row1, col0, col1 (exclusive ends), as ``ndimage.find_objects``.
    start, rows, cols : int64 (n + 1,), (n_pixels,), (n_pixels,)
        Pixels of label ``i + 1`` are ``rows[start[i]:start[i + 1]]``, ``cols[...]``,
        in row-major order (as ``np.nonzero(labels == i + 1)`` lists them).
    """
    h, w = mask.shape
    labels = np.zeros((h, w), dtype=np.int32)
    parent = np.empty(h * w // 2 + 2, dtype=np.int32)
    n_prov = 0
    for r in range(h):
        for c in range(w):
            if not mask[r, c]:
                continue
            up = labels[r - 1, c] if r > 0 else 0
            left = labels[r, c - 1] if c > 0 else 0
            if up == 0 and left == 0:
                n_prov += 1
                parent[n_prov] = n_prov
                labels[r, c] = n_prov
            elif up == 0 or left == 0 or up == left:
                labels[r, c] = up if left == 0 else left
            else:
                a, b = _root(parent, up), _root(parent, left)
                if a < b:
                    parent[b] = a
                elif b < a:
                    parent[a] = b
                labels[r, c] = min(a, b)
    # final numbers in the order of the smallest provisional label of each component
    final = np.zeros(n_prov + 1, dtype=np.int32)
    n = 0
    for i in range(1, n_prov + 1):
        root = _root(parent, i)
        if root == i:
            n += 1
            final[i] = n
        else:
            final[i] = final[root]
    area = np.zeros(n, dtype=np.int64)
    seeded = np.zeros(n, dtype=np.bool_)
    box = np.empty((n, 4), dtype=np.int64)
    box[:, 0], box[:, 2] = h, w
    box[:, 1], box[:, 3] = 0, 0
    for r in range(h):
        for c in range(w):
            v = labels[r, c]
            if v == 0:
                continue
            k = final[v]
            labels[r, c] = k
            k -= 1
            area[k] += 1
            if seed_map[r, c] >= seed_level:
                seeded[k] = True
            box[k, 0] = min(box[k, 0], r)
            box[k, 1] = max(box[k, 1], r + 1)
            box[k, 2] = min(box[k, 2], c)
            box[k, 3] = max(box[k, 3], c + 1)
    start = np.zeros(n + 1, dtype=np.int64)
    for k in range(n):
        start[k + 1] = start[k] + area[k]
    fill = start[:n].copy()
    rows = np.empty(start[n], dtype=np.int64)
    cols = np.empty(start[n], dtype=np.int64)
    for r in range(h):
        for c in range(w):
            v = labels[r, c]
            if v:
                rows[fill[v - 1]] = r
                cols[fill[v - 1]] = c
                fill[v - 1] += 1
    return labels, area, seeded, box, start, rows, cols


@njit(cache=True, nogil=True)
def _symmetric_pass(image, weights, axis, out):
    """One axis of ``scipy.ndimage.correlate1d(image, weights, axis, mode='reflect')`` for
    symmetric odd-length ``weights``, as scipy computes it: in float64, the centre term
    first, then the pairs from the outermost in, ``+= (left + right) * w``; stored in
    ``out``'s dtype. The loop over outputs is innermost (contiguous); two pairs are
    added per pass over them, one after the other (the same order, half the passes)."""
    h, w = image.shape
    radius = weights.size // 2
    acc = np.empty(w)
    if axis == 0:
        for r in range(h):
            centre = image[r]
            for c in range(w):
                acc[c] = np.float64(centre[c]) * weights[radius]
            d = radius
            while d >= 2:
                u1, d1 = image[_reflect(r - d, h)], image[_reflect(r + d, h)]
                u2, d2 = image[_reflect(r - d + 1, h)], image[_reflect(r + d - 1, h)]
                w1, w2 = weights[radius - d], weights[radius - d + 1]
                for c in range(w):
                    acc[c] = ((acc[c] + (np.float64(u1[c]) + np.float64(d1[c])) * w1)
                              + (np.float64(u2[c]) + np.float64(d2[c])) * w2)
                d -= 2
            if d == 1:
                u1, d1 = image[_reflect(r - 1, h)], image[_reflect(r + 1, h)]
                w1 = weights[radius - 1]
                for c in range(w):
                    acc[c] += (np.float64(u1[c]) + np.float64(d1[c])) * w1
            row = out[r]
            for c in range(w):
                row[c] = acc[c]
    else:
        line = np.empty(w + 2 * radius)
        for r in range(h):
            src = image[r]
            for k in range(radius):  # mirrored edges
                line[k] = src[_reflect(k - radius, w)]
                line[w + radius + k] = src[_reflect(w + k, w)]
            for c in range(w):
                line[radius + c] = src[c]
            for c in range(w):
                acc[c] = line[c + radius] * weights[radius]
            d = radius
            while d >= 2:
                l1, r1 = line[radius - d:radius - d + w], line[radius + d:radius + d + w]
                l2, r2 = line[radius - d + 1:radius - d + 1 + w], line[radius + d - 1:radius + d - 1 + w]
                w1, w2 = weights[radius - d], weights[radius - d + 1]
                for c in range(w):
                    acc[c] = (acc[c] + (l1[c] + r1[c]) * w1) + (l2[c] + r2[c]) * w2
                d -= 2
            if d == 1:
                l1, r1 = line[radius - 1:radius - 1 + w], line[radius + 1:radius + 1 + w]
                w1 = weights[radius - 1]
                for c in range(w):
                    acc[c] += (l1[c] + r1[c]) * w1
            row = out[r]
            for c in range(w):
                row[c] = acc[c]
    return out


def gaussian_weights(sigma, truncate=4.0):
    """The normalised Gaussian weights scipy.ndimage uses: radius ``int(truncate * sigma + 0.5)``."""
    radius = int(truncate * float(sigma) + 0.5)
    x = np.arange(-radius, radius + 1)
    weights = np.exp(-0.5 / (sigma * sigma) * x**2)
    return weights / weights.sum()


def gaussian(image, sigma, truncate=4.0):
    """``scipy.ndimage.gaussian_filter(image, sigma, mode='reflect', truncate=truncate)`` of a
    2-D float image (axis 0 then axis 1, each pass stored in the image's dtype), the same values."""
    weights = gaussian_weights(sigma, truncate)
    image = np.ascontiguousarray(image)
    first = _symmetric_pass(image, weights, 0, np.empty_like(image))
    return _symmetric_pass(first, weights, 1, np.empty_like(image))


def box_sums(table, i0, j0, i1, j1):
    """``table[i1, j1] - table[i0, j1] - table[i1, j0] + table[i0, j0]`` for every box
    (indices already clipped), evaluated left to right as numpy does; shape (n, C).

    Raises
    ------
    KernelRangeError
        An index outside the table, or index arrays of different lengths.
    """
    if table.ndim != 3:
        raise KernelRangeError(f"box_sums takes a (rows, cols, channels) table; got shape {table.shape!r}.")
    n = i0.shape
    for name, index, stop in (("i0", i0, table.shape[0]), ("j0", j0, table.shape[1]),
                              ("i1", i1, table.shape[0]), ("j1", j1, table.shape[1])):
        if index.shape != n or index.ndim != 1:
            raise KernelRangeError(f"box index {name} has shape {index.shape!r}; i0 has {n!r}.")
        _check_range(f"box index {name}", index, stop)
    return _box_sums(table, i0, j0, i1, j1)


@njit(cache=True, nogil=True)
def _box_sums(table, i0, j0, i1, j1):
    """The loop of :func:`box_sums`."""
    n = i0.size
    n_ch = table.shape[2]
    out = np.empty((n, n_ch), dtype=table.dtype)
    for p in range(n):
        a, b, c, d = i0[p], j0[p], i1[p], j1[p]
        for k in range(n_ch):
            out[p, k] = table[c, d, k] - table[a, d, k] - table[c, b, k] + table[a, b, k]
    return out


@njit(cache=True, nogil=True)
def sobel_products(image, g_row, g_col):
    """Structure-tensor products (A_rr, A_rc, A_cc) of a float32 image from its central
    differences ``g_row``, ``g_col`` (zero on the border rows / columns).

    The Sobel derivative along an axis is the central difference (one-sided on the
    outer rows or columns, as ``mode='reflect'`` gives) smoothed by [1, 2, 1] across
    with mirrored edges, computed as ``scipy.ndimage.correlate1d`` does (float64:
    ``2 x + (left + right)``, stored in float32); products in float32.
    """
    h, w = image.shape
    a_rr = np.empty((h, w), dtype=np.float32)
    a_rc = np.empty((h, w), dtype=np.float32)
    a_cc = np.empty((h, w), dtype=np.float32)
    gr = np.empty(w, dtype=np.float32)
    line = np.empty(w + 2, dtype=np.float32)
    d_r = np.empty(w, dtype=np.float32)
    # the column derivative of rows r - 1, r, r + 1 (mirrored), each made once as r advances
    ring = np.empty((3, w), dtype=np.float32)
    held = np.full(3, -1, dtype=np.int64)  # the image row in each slot of the ring
    for r in range(h):
        # the row derivative of row r, one-sided at the first and last rows
        if r == 0:
            for c in range(w):
                gr[c] = image[1, c] - image[0, c] if h > 1 else g_row[0, c]
        elif r == h - 1:
            for c in range(w):
                gr[c] = image[h - 1, c] - image[h - 2, c]
        else:
            for c in range(w):
                gr[c] = g_row[r, c]
        # smoothed across by [1, 2, 1] with mirrored ends
        line[0], line[w + 1] = gr[_reflect(-1, w)], gr[_reflect(w, w)]
        for c in range(w):
            line[c + 1] = gr[c]
        for c in range(w):
            d_r[c] = np.float64(line[c + 1]) * 2.0 + (np.float64(line[c]) + np.float64(line[c + 2])) * 1.0
        # the column derivatives of rows r - 1, r, r + 1 (mirrored), smoothed down by [1, 2, 1]
        for q in (_reflect(r - 1, h), r, _reflect(r + 1, h)):
            if held[q % 3] != q:
                _col_diff_row(image, g_col, q, ring[q % 3])
                held[q % 3] = q
        above, mid, below = ring[_reflect(r - 1, h) % 3], ring[r % 3], ring[_reflect(r + 1, h) % 3]
        rr, rc, cc = a_rr[r], a_rc[r], a_cc[r]
        for c in range(w):
            d_c = np.float32(np.float64(mid[c]) * 2.0 + (np.float64(above[c]) + np.float64(below[c])) * 1.0)
            rr[c] = d_r[c] * d_r[c]
            rc[c] = d_r[c] * d_c
            cc[c] = d_c * d_c
    return a_rr, a_rc, a_cc


@njit(cache=True, nogil=True)
def _col_diff_row(image, g_col, r, out):
    """The column derivative of row ``r`` (``g_col``, one-sided at the first and last
    columns), into ``out``."""
    w = image.shape[1]
    for c in range(w):
        out[c] = g_col[r, c]
    if w > 1:
        out[0] = image[r, 1] - image[r, 0]
        out[w - 1] = image[r, w - 1] - image[r, w - 2]


@njit(cache=True, nogil=True)
def patch_field_at(values, y0, x0, step_y, step_x, ys, xs):
    """Bilinear read of per-patch ``values`` (n_rows, n_cols, k) float32 at pixels (ys, xs),
    as :meth:`detector.objects.assemble.PatchField.at` computes it with numpy: positions in
    float32, weights and sums in float64, result float32."""
    n_rows, n_cols, k = values.shape
    n = ys.size
    out = np.empty((n, k), dtype=np.float32)
    y0f, x0f = np.float32(y0), np.float32(x0)
    sy, sx = np.float32(step_y), np.float32(step_x)
    top_row, top_col = np.float32(n_rows - 1), np.float32(n_cols - 1)
    for p in range(n):
        iy = (np.float32(ys[p]) - y0f) / sy
        ix = (np.float32(xs[p]) - x0f) / sx
        iy = min(max(iy, np.float32(0)), top_row)
        ix = min(max(ix, np.float32(0)), top_col)
        y_lo = min(int(np.floor(iy)), max(n_rows - 2, 0))
        x_lo = min(int(np.floor(ix)), max(n_cols - 2, 0))
        y_hi = min(y_lo + 1, n_rows - 1)
        x_hi = min(x_lo + 1, n_cols - 1)
        fy = np.float64(iy) - y_lo
        fx = np.float64(ix) - x_lo
        for c in range(k):
            top = np.float64(values[y_lo, x_lo, c]) * (1 - fx) + np.float64(values[y_lo, x_hi, c]) * fx
            bottom = np.float64(values[y_hi, x_lo, c]) * (1 - fx) + np.float64(values[y_hi, x_hi, c]) * fx
            out[p, c] = top * (1 - fy) + bottom * fy
    return out


@njit(cache=True, nogil=True)
def city_block_ring(local, valid, radius):
    """Valid pixels outside ``local`` within city-block distance ``radius`` of it:
    ``binary_dilation(local, iterations=radius) & ~local & valid`` with scipy's default
    cross, by the exact two-pass city-block distance (paths stay inside the box)."""
    h, w = local.shape
    far = h + w + radius + 1
    d = np.empty((h, w), dtype=np.int64)
    for r in range(h):
        for c in range(w):
            v = 0 if local[r, c] else far
            if r > 0 and d[r - 1, c] + 1 < v:
                v = d[r - 1, c] + 1
            if c > 0 and d[r, c - 1] + 1 < v:
                v = d[r, c - 1] + 1
            d[r, c] = v
    for r in range(h - 1, -1, -1):
        for c in range(w - 1, -1, -1):
            v = d[r, c]
            if r < h - 1 and d[r + 1, c] + 1 < v:
                v = d[r + 1, c] + 1
            if c < w - 1 and d[r, c + 1] + 1 < v:
                v = d[r, c + 1] + 1
            d[r, c] = v
    out = np.zeros((h, w), dtype=np.bool_)
    for r in range(h):
        for c in range(w):
            out[r, c] = d[r, c] <= radius and not local[r, c] and valid[r, c]
    return out
