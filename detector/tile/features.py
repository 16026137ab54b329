"""Patch features of a tile: HOG, GLCM, LBP, intensity, structure tensor, polarity.

A tile is seen as a grid of ``patch_px`` windows every ``stride_px``. Dense
per-pixel maps are computed once per tile (see :mod:`detector.tile._dense`), summed
per ``cell_px`` cell and pooled into windows with summed-area tables, so the
cost does not depend on the overlap of windows. The same code serves training
and detection.

Pooled features equal what a per-window computation gives except where a
window's edge cuts a gradient stencil, a pixel pair or an LBP neighbourhood:
here those use the pixels just outside the window (which the tile has), a
per-window computation sees a border instead.
"""

from dataclasses import dataclass

import numpy as np

from . import _dense, _kernels
from ..errors import ImageError
from .spec import FeatureSpec

__all__ = ["PatchGrid", "PatchTargets", "patch_grid", "extract_features", "patch_targets", "flip_polarity"]

_PERCENTILES = (10, 25, 50, 75, 90)


@dataclass(frozen=True)
class PatchGrid:
    """Windows of a tile, row-major (``n_rows * n_cols`` patches).

    Attributes
    ----------
    row0, col0 : ndarray of int64, shape (n_patches,)
        Top-left pixel of each window.
    x_px, y_px : ndarray of float64, shape (n_patches,)
        Window centre in tile pixel coordinates (origin at the centre of the
        top-left pixel, x right, y down).
    n_rows, n_cols : int
    patch_px : int
    nodata_fraction : ndarray of float64, shape (n_patches,)
    valid : ndarray of bool, shape (n_patches,)
        ``nodata_fraction <= spec.max_nodata_fraction``.
    """

    row0: np.ndarray
    col0: np.ndarray
    x_px: np.ndarray
    y_px: np.ndarray
    n_rows: int
    n_cols: int
    patch_px: int
    nodata_fraction: np.ndarray
    valid: np.ndarray

    @property
    def n_patches(self):
        return self.n_rows * self.n_cols


@dataclass(frozen=True)
class PatchTargets:
    """Per-patch training targets (see :func:`patch_targets`).

    Attributes
    ----------
    label : ndarray of int8, shape (n_patches,)
        0 none, 1 fan, 2 spot.
    fan_cover_share, spot_cover_share : ndarray of float64
        Share of the window's pixels covered by fans / spots.
    fan_direction_deg : ndarray of float64
        Circular mean fan direction (degrees clockwise from image up) over the
        window's fan pixels; NaN where the label is not fan.
    """

    label: np.ndarray
    fan_cover_share: np.ndarray
    spot_cover_share: np.ndarray
    fan_direction_deg: np.ndarray


def _grid_indices(shape, spec):
    h, w = shape
    W, S = spec.patch_px, spec.stride_px
    n_rows = (h - W) // S + 1 if h >= W else 0
    n_cols = (w - W) // S + 1 if w >= W else 0
    r = np.repeat(np.arange(n_rows, dtype=np.int64) * S, n_cols)
    c = np.tile(np.arange(n_cols, dtype=np.int64) * S, n_rows)
    return r, c, n_rows, n_cols


def _make_grid(shape, spec, nodata_fraction):
    r, c, n_rows, n_cols = _grid_indices(shape, spec)
    half = (spec.patch_px - 1) / 2.0
    nodata_fraction = np.asarray(nodata_fraction, dtype=np.float64)
    return PatchGrid(r, c, c + half, r + half, n_rows, n_cols, spec.patch_px, nodata_fraction,
                     nodata_fraction <= spec.max_nodata_fraction)


def patch_grid(shape, spec, *, nodata_mask=None):
    """The patch windows of a tile of ``shape`` (M, N).

    Parameters
    ----------
    shape : (int, int)
        Tile rows and columns, px.
    spec : FeatureSpec
    nodata_mask : ndarray of bool (M, N), optional
        True where there is no data; gives each window's no-data share.

    Returns
    -------
    PatchGrid
    """
    shape = tuple(int(s) for s in shape)
    if len(shape) != 2 or min(shape) < 1:
        raise ImageError(f"tile shape {shape} must be two positive sizes.")
    r, c, _, _ = _grid_indices(shape, spec)
    if nodata_mask is None:
        frac = np.zeros(r.size)
    else:
        nodata_mask = np.asarray(nodata_mask, dtype=bool)
        if nodata_mask.shape != shape:
            raise ImageError(f"nodata_mask has shape {nodata_mask.shape}; the tile has shape {shape}.")
        frac = 1.0 - _pool_valid_share(~nodata_mask, r, c, spec)
    return _make_grid(shape, spec, frac)


def _pool_valid_share(valid, r, c, spec):
    cp = spec.cell_px
    ncr, ncc = valid.shape[0] // cp, valid.shape[1] // cp
    table = _dense.summed_area(_dense.cell_sums(valid.astype(np.float32), cp, ncr, ncc)[..., None])
    k = spec.patch_px // cp
    i0, j0 = r // cp, c // cp
    return _dense.box(table, i0, j0, i0 + k, j0 + k)[:, 0] / spec.patch_px**2


#: Guards of the shape features against degenerate patches. Gradient energy (mean squared
#: gradient over the tile's robust spread squared) below which a patch is flat:
_FLAT_ENERGY = 1e-8
#: Anisotropy (|eigenvalue difference| / trace) below which a tensor or a dark mass has no axis.
_MIN_COHERENCE = 1e-3
#: Variance along or across the axis (px^2) below which skewness and widening are undefined.
_MIN_SPREAD_PX2 = 0.25
#: Largest magnitude of skewness and widening.
_SHAPE_BOUND = 20.0
#: Summed darkness of a patch below which it holds no dark mass.
_MIN_DARK_MASS = 1e-6


def _safe_div(a, b):
    return np.divide(a, b, out=np.zeros(np.broadcast(a, b).shape), where=b > 0)


def extract_features(tile, spec=None, *, nodata_mask=None, noise_range=None):
    """Feature matrix of every patch of a tile.

    Parameters
    ----------
    tile : ndarray (M, N) of uint8, uint16 or float in [0, 1]
        Single-band tile. Pixels equal to ``spec.nodata_value`` (or NaN) are no-data.
    spec : FeatureSpec, optional
        Defaults to ``FeatureSpec()``.
    nodata_mask : ndarray of bool (M, N), optional
        True where there is no data; replaces the ``nodata_value`` test.
    noise_range : detector.tile.noise.NoiseRange, optional
        The model's training noise: a noisier tile is smoothed first (as detection does).

    Returns
    -------
    X : ndarray of float32, shape (n_patches, spec.n_features)
        Columns named by ``spec.feature_names``; all finite.
    grid : PatchGrid

    Raises
    ------
    ImageError
        The tile is not a non-empty 2-D array of a supported dtype.
    """
    spec = FeatureSpec() if spec is None else spec
    return _features_of_prepared(_dense.prepare_tile(tile, spec, nodata_mask, noise_range), spec)


def _features_of_prepared(prep, spec):
    """:func:`extract_features` of a tile already made ready by ``_dense.prepare_tile``.

    For callers that also need the prepared tile (detection finds its candidates
    on it), so that a tile is prepared once.
    """
    shape = prep.image.shape
    r, c, _, _ = _grid_indices(shape, spec)
    n = r.size
    if n == 0:
        return np.zeros((0, spec.n_features), np.float32), _make_grid(shape, spec, np.zeros(0))
    blocks = _Pooler(prep, spec, r, c).run()
    X = np.concatenate([np.asarray(b, dtype=np.float64).reshape(n, -1) for b in blocks], axis=1)
    X = np.nan_to_num(X, copy=False, nan=0.0, posinf=0.0, neginf=0.0).astype(np.float32)
    valid_share = blocks.valid_share
    return X, _make_grid(shape, spec, 1.0 - valid_share)


class _Blocks(list):
    valid_share = None


class _Pooler:
    """Dense maps of one tile and their pooling into the patches at (r, c)."""

    def __init__(self, prep, spec, r, c):
        self.prep, self.spec = prep, spec
        cp = spec.cell_px
        self.ncr, self.ncc = _dense.cell_grid(prep.image.shape, cp)
        self.i0, self.j0 = r // cp, c // cp
        self.k = spec.patch_px // cp
        h, w = prep.image.shape
        half = (spec.patch_px - 1) / 2.0
        # coordinates relative to the tile centre keep the raw moments small
        self.x0, self.y0 = (w - 1) / 2.0, (h - 1) / 2.0
        self.cx = c + half - self.x0
        self.cy = r + half - self.y0

    def pool(self, cells_last, k=None, grow=0):
        """Box sums of a (ncr, ncc, C) cell array over each patch window, grown by ``grow`` cells.

        Integer cell counts are pooled exactly in int32 (a tile has fewer than 2**31 pixels).
        """
        k = self.k if k is None else k
        dtype = np.int32 if np.issubdtype(cells_last.dtype, np.integer) else np.float64
        table = _dense.summed_area(cells_last, dtype)
        return _dense.box(table, self.i0 - grow, self.j0 - grow, self.i0 + k + grow, self.j0 + k + grow)

    def hist(self, bins, n_bins, weights=None, mask=None):
        return _dense.cell_histogram(bins, self.spec.cell_px, n_bins, weights=weights, mask=mask)

    def run(self):
        spec, prep = self.spec, self.prep
        out = _Blocks()
        valid = prep.valid
        if prep.has_nodata:
            counts = _dense.cell_sums(valid.astype(np.float32), spec.cell_px, self.ncr, self.ncc)
        else:
            counts = np.full((self.ncr, self.ncc), float(spec.cell_px**2))
        self.count_cells = counts
        self.n_valid = self.pool(counts[..., None])[:, 0]
        out.valid_share = self.n_valid / spec.patch_px**2

        g_row, g_col = _dense.central_gradients(prep.image)
        mag = np.hypot(g_row, g_col)
        if prep.has_nodata:
            ok = valid.copy()
            ok[1:, :] &= valid[:-1, :]
            ok[:-1, :] &= valid[1:, :]
            ok[:, 1:] &= valid[:, :-1]
            ok[:, :-1] &= valid[:, 1:]
            mag *= ok
        self.central = (g_row, g_col)
        unsigned, signed = _dense.orientation_bins(g_row, g_col, spec.hog_orientations, spec.signed_hist_bins)
        out.append(self.hog(unsigned, mag))
        out.append(self.glcm())
        out.append(self.lbp())
        out.append(self.intensity())
        structure, st_axis = self.structure()
        out.append(structure)
        out.append(self.polarity(signed, mag, st_axis))
        return out

    # -- groups ---------------------------------------------------------------
    def hog(self, bins, mag):
        spec = self.spec
        no = spec.hog_orientations
        cells = self.hist(bins, no, weights=mag)
        table = _dense.summed_area(cells)
        hc = spec.hog_cell_px // spec.cell_px
        nh = spec.patch_px // spec.hog_cell_px
        area = float(spec.hog_cell_px**2)
        hog_cells = np.stack(
            [
                np.stack([_dense.box(table, self.i0 + a * hc, self.j0 + b * hc,
                                     self.i0 + (a + 1) * hc, self.j0 + (b + 1) * hc) for b in range(nh)], axis=1)
                for a in range(nh)
            ],
            axis=1,
        ) / area  # (n, nh, nh, no)
        bc = spec.hog_block_cells
        nb = nh - bc + 1
        blocks = [hog_cells[:, a:a + bc, b:b + bc].reshape(-1, bc * bc * no) for a in range(nb) for b in range(nb)]
        return np.concatenate([_dense.l2hys(b) for b in blocks], axis=1)

    def glcm(self):
        spec, prep = self.spec, self.prep
        L = spec.glcm_levels
        q = _dense.quantise(prep.image, prep.lo, prep.hi, L)
        offsets = _dense.glcm_offsets(spec.glcm_distances, spec.glcm_angles_deg)
        unique = list(dict.fromkeys(offsets))
        folded = _dense.glcm_cell_counts(q, spec.cell_px, unique, L,
                                         prep.valid if prep.has_nodata else None, folded=True)
        nf = folded.shape[-1]
        # cell-major counts: each cell's row holds every offset's pairs (a view, no copy)
        cells = np.moveaxis(folded, 0, 1).reshape(self.ncr, self.ncc, -1)
        pooled = self.pool(cells).reshape(-1, len(unique), nf)
        props = _dense.glcm_props_unordered(pooled, L)  # (6, n, n_unique)
        order = [unique.index(o) for o in offsets]
        return np.moveaxis(props[:, :, order], 1, 0).reshape(pooled.shape[0], -1)

    def lbp(self):
        spec, prep = self.spec, self.prep
        parts = []
        for (P, R), codes in zip(spec.lbp, _dense.lbp_uniform_scales(prep.u16, spec.lbp)):
            mask = None
            if prep.has_nodata:
                # pixels whose whole LBP ring is valid
                mask = _dense.erode_square(prep.valid, 2 * int(np.ceil(R)) + 1)
            pooled = self.pool(self.hist(codes, P + 2, mask=mask)).astype(np.float64)
            parts.append(_safe_div(pooled, pooled.sum(axis=1, keepdims=True)))
        return np.concatenate(parts, axis=1)

    def intensity(self):
        spec, prep = self.spec, self.prep
        cp = spec.cell_px
        zr, nb = spec.int_z_range, spec.int_bins
        # z = (image - background) / scale, its histogram bins, the darkness clip(-z, 0, max) and the
        # cell sums of z, z^2 and darkness: one compiled pass with numpy's float32 arithmetic
        bins, dark, z_cells, zz_cells, self.dark_cells = _kernels.intensity_maps(
            np.ascontiguousarray(prep.image, dtype=np.float32), np.float32(prep.background),
            np.float32(1.0 / prep.scale), np.float32(zr), np.float32(nb / (2 * zr)), nb,
            np.float32(spec.dark_weight_max), np.ascontiguousarray(prep.valid), prep.has_nodata,
            cp, self.ncr, self.ncc)
        hist = self.pool(self.hist(bins, nb, mask=prep.valid if prep.has_nodata else None))
        hist = hist.astype(np.float64)
        self.dark = dark
        sums = self.pool(np.stack([z_cells, zz_cells, self.dark_cells, self.count_cells], axis=-1))
        nv = self.n_valid
        mean = _safe_div(sums[:, 0], nv)
        std = np.sqrt(np.maximum(_safe_div(sums[:, 1], nv) - mean**2, 0))
        dark_mean = _safe_div(sums[:, 2], nv)
        # percentiles from the pooled cumulative histogram, linear within a bin
        cum = np.cumsum(hist, axis=1)
        width = 2 * zr / nb
        rows = np.arange(cum.shape[0])
        pct = []
        for q in _PERCENTILES:
            target = q / 100.0 * cum[:, -1]
            idx = np.minimum((cum < target[:, None]).sum(axis=1), nb - 1)
            prev = np.where(idx > 0, cum[rows, np.maximum(idx - 1, 0)], 0.0)
            pct.append(-zr + width * (idx + _safe_div(target - prev, hist[rows, idx])))
        table = _dense.summed_area(np.stack([self.dark_cells, self.count_cells], axis=-1))
        ctx = []
        for s in spec.context_scales:
            g = (s - 1) * self.k // 2
            tot = _dense.box(table, self.i0 - g, self.j0 - g, self.i0 + self.k + g, self.j0 + self.k + g)
            ctx.append(_safe_div(tot[:, 0], tot[:, 1]))
        return np.stack([mean, std, *pct, dark_mean, *ctx, 1.0 - self.n_valid / spec.patch_px**2], axis=1)

    def structure(self):
        spec, prep = self.spec, self.prep
        a_rr, a_rc, a_cc = _dense.structure_tensor_maps(
            prep.image, gradient_sigma=spec.st_gradient_sigma, tensor_sigma=spec.st_tensor_sigma,
            central=self.central)
        cells = np.stack([_dense.cell_sums(a, spec.cell_px, self.ncr, self.ncc) for a in (a_cc, a_rr, a_rc)], axis=-1)
        table = _dense.summed_area(cells)
        cols = []
        axis = None
        for s in spec.st_scales:
            g = (s - 1) * self.k // 2
            i0, j0, i1, j1 = self.i0 - g, self.j0 - g, self.i0 + self.k + g, self.j0 + self.k + g
            J = _dense.box(table, i0, j0, i1, j1)
            npx = ((np.clip(i1, 0, self.ncr) - np.clip(i0, 0, self.ncr))
                   * (np.clip(j1, 0, self.ncc) - np.clip(j0, 0, self.ncc)) * spec.cell_px**2)
            jxx, jyy, jxy = J[:, 0], J[:, 1], J[:, 2]
            norm = np.hypot(jxx - jyy, 2 * jxy)
            trace = jxx + jyy
            energy = trace / npx / prep.scale**2
            # A flat (or nearly flat) patch, or one whose gradients point every way alike, has no
            # axis: rounding residue must not give it one that flips from patch to patch.
            oriented = (energy > _FLAT_ENERGY) & (norm > _MIN_COHERENCE * trace)
            norm = np.where(oriented, norm, 0.0)
            cos2, sin2 = _safe_div(jxx - jyy, norm), _safe_div(2 * jxy, norm)
            cols += [cos2, sin2, _safe_div(norm, trace), np.where(energy > _FLAT_ENERGY, energy, 0.0)]
            axis = (cos2, sin2)
        return np.stack(cols, axis=1), axis

    def polarity(self, signed, mag, st_axis):
        spec = self.spec
        cp, k = spec.cell_px, self.k
        nb = spec.signed_hist_bins
        sh = self.pool(self.hist(signed, nb, weights=mag))
        sh = _safe_div(sh, sh.sum(axis=1, keepdims=True))

        cos2, sin2 = st_axis
        theta = 0.5 * np.arctan2(sin2, cos2)
        # axis unit vector (x right, y down) of an angle clockwise from up
        ax, ay = np.sin(theta), -np.cos(theta)

        # cell sums of dark * x^p * y^q, p + q <= 3, in tile-centred coordinates
        hc, wc = self.ncr * cp, self.ncc * cp
        d = self.dark[:hc, :wc].astype(np.float64).reshape(hc, self.ncc, cp)
        x = (np.arange(wc, dtype=np.float64) - self.x0).reshape(self.ncc, cp)
        y = (np.arange(hc, dtype=np.float64) - self.y0).reshape(self.ncr, cp)
        bx = [np.einsum("rjk,jk->rj", d, x**p).reshape(self.ncr, cp, self.ncc) for p in range(4)]
        powers = [(p, q) for p in range(4) for q in range(4 - p)]
        m_cells = np.stack([(bx[p] * (y**q)[:, :, None]).sum(axis=1) for p, q in powers], axis=-1)
        M = self.pool(m_cells)
        m00 = M[:, powers.index((0, 0))]
        # darkness summed over the patch (robust z units): below this there is no dark mass to describe
        has_mass = m00 > _MIN_DARK_MASS
        m00 = np.where(has_mass, m00, 0.0)
        E = {pq: _safe_div(M[:, i], m00) for i, pq in enumerate(powers)}
        # moments about the patch centre: E[(x - cx)^p (y - cy)^q]
        from math import comb

        C = {}
        for p, q in powers:
            acc = 0.0
            for i in range(p + 1):
                for j in range(q + 1):
                    acc = acc + comb(p, i) * comb(q, j) * (-self.cx) ** (p - i) * (-self.cy) ** (q - j) * E[(i, j)]
            C[(p, q)] = np.where(m00 > 0, acc, 0.0)
        bx_, by_ = ax, ay  # s = ax x + ay y
        tx, ty = -ay, ax  # t across the axis
        s1 = bx_ * C[(1, 0)] + by_ * C[(0, 1)]
        t1 = tx * C[(1, 0)] + ty * C[(0, 1)]
        s2 = bx_**2 * C[(2, 0)] + 2 * bx_ * by_ * C[(1, 1)] + by_**2 * C[(0, 2)]
        t2 = tx**2 * C[(2, 0)] + 2 * tx * ty * C[(1, 1)] + ty**2 * C[(0, 2)]
        st = bx_ * tx * C[(2, 0)] + (bx_ * ty + by_ * tx) * C[(1, 1)] + by_ * ty * C[(0, 2)]
        s3 = (bx_**3 * C[(3, 0)] + 3 * bx_**2 * by_ * C[(2, 1)] + 3 * bx_ * by_**2 * C[(1, 2)]
              + by_**3 * C[(0, 3)])
        st2 = (bx_ * tx**2 * C[(3, 0)] + (2 * bx_ * tx * ty + by_ * tx**2) * C[(2, 1)]
               + (bx_ * ty**2 + 2 * by_ * tx * ty) * C[(1, 2)] + by_ * ty**2 * C[(0, 3)])
        var_s = np.maximum(s2 - s1**2, 0)
        var_t = np.maximum(t2 - t1**2, 0)
        mu3 = s3 - 3 * s1 * s2 + 2 * s1**3
        centroid = s1 / spec.patch_px
        # Skewness and widening are shape ratios: below a quarter pixel of spread (a dot, a line
        # one pixel wide, no dark mass) their denominators are rounding residue, so they are 0
        # there, and they are bounded where they are defined.
        spread_s = has_mass & (var_s > _MIN_SPREAD_PX2)
        spread_st = spread_s & (var_t > _MIN_SPREAD_PX2)
        skew = np.clip(_safe_div(mu3, np.where(spread_s, var_s, 0.0) ** 1.5), -_SHAPE_BOUND, _SHAPE_BOUND)
        widen = st2 - 2 * t1 * st - s1 * t2 + 2 * s1 * t1**2
        widen = np.clip(_safe_div(widen, np.where(spread_st, np.sqrt(var_s) * var_t, 0.0)),
                        -_SHAPE_BOUND, _SHAPE_BOUND)

        # near-far halves from the patch's cells, soft sign of each cell centre's s
        offs = (np.arange(k) + 0.5) * cp - spec.patch_px / 2.0
        ii, jj = np.meshgrid(np.arange(k), np.arange(k), indexing="ij")
        dc = self.dark_cells[self.i0[:, None] + ii.ravel(), self.j0[:, None] + jj.ravel()]
        s_cell = ax[:, None] * offs[jj.ravel()] + ay[:, None] * offs[ii.ravel()]
        halves = _safe_div((dc * np.clip(s_cell / (cp / 2.0), -1, 1)).sum(axis=1), dc.sum(axis=1))

        cxx = np.maximum(C[(2, 0)] - C[(1, 0)] ** 2, 0)
        cyy = np.maximum(C[(0, 2)] - C[(0, 1)] ** 2, 0)
        cxy = C[(1, 1)] - C[(1, 0)] * C[(0, 1)]
        n2 = np.hypot(cxx - cyy, 2 * cxy)
        n2 = np.where(n2 > _MIN_COHERENCE * (cxx + cyy), n2, 0.0)  # a round dark mass has no axis
        dark_cos2, dark_sin2 = -_safe_div(cxx - cyy, n2), -_safe_div(2 * cxy, n2)
        elong = _safe_div(n2, cxx + cyy)
        return np.concatenate(
            [sh, np.stack([cos2, sin2, centroid, skew, widen, halves, dark_cos2, dark_sin2, elong], axis=1)],
            axis=1)


def flip_polarity(X, spec):
    """Features of each patch as if its content were rotated by 180 degrees,
    for the polarity group: odd features negated, signed histogram rolled by half.

    Other groups are returned unchanged (HOG, GLCM, LBP, intensity and structure
    are invariant to a 180 degree rotation up to the window border).
    """
    from .spec import POLARITY_ODD_FEATURES, SIGNED_HIST_PREFIX

    X = np.array(X, dtype=np.float32, copy=True)
    names = spec.feature_names
    odd = [names.index(n) for n in POLARITY_ODD_FEATURES]
    X[:, odd] = -X[:, odd]
    sh = [names.index(f"{SIGNED_HIST_PREFIX}{b}") for b in range(spec.signed_hist_bins)]
    X[:, sh] = np.roll(X[:, sh], spec.signed_hist_bins // 2, axis=1)
    return X


def patch_targets(grid, fan_cover, spot_cover, fan_direction, *, tau=0.15):
    """Per-patch class, coverage and mean fan direction from per-pixel label maps.

    Parameters
    ----------
    grid : PatchGrid
    fan_cover, spot_cover : ndarray of bool (M, N)
        Pixels covered by a fan / a spot.
    fan_direction : ndarray of float (M, N)
        Fan direction, degrees clockwise from image up; NaN where there is no fan.
    tau : float
        Least coverage share for a patch to be a fan or a spot.

    Returns
    -------
    PatchTargets
        ``label`` is 1 (fan) when ``fan_cover_share >= tau``, 2 (spot) when
        ``spot_cover_share >= tau``; when both hold the larger share wins and an
        exact tie goes to fan (the rarer class, and the one with a direction).
        ``fan_direction_deg`` is the circular mean of the direction over the
        window's fan pixels (each pixel weighs its coverage, 1).
    """
    fan_cover = np.asarray(fan_cover, dtype=bool)
    spot_cover = np.asarray(spot_cover, dtype=bool)
    fan_direction = np.asarray(fan_direction, dtype=np.float64)
    if fan_cover.ndim != 2 or spot_cover.shape != fan_cover.shape or fan_direction.shape != fan_cover.shape:
        raise ImageError(
            f"label maps have shapes {fan_cover.shape}, {spot_cover.shape}, {fan_direction.shape}; "
            f"expected three equal (M, N) shapes."
        )
    if not 0 < tau <= 1:
        raise ImageError(f"tau = {tau!r} is outside (0, 1].")
    W = grid.patch_px
    has_dir = fan_cover & np.isfinite(fan_direction)
    rad = np.radians(np.where(has_dir, fan_direction, 0.0))
    stack = np.stack([fan_cover, spot_cover, has_dir, np.sin(rad) * has_dir, np.cos(rad) * has_dir], axis=-1)
    table = np.zeros((stack.shape[0] + 1, stack.shape[1] + 1, stack.shape[2]))
    np.cumsum(stack, axis=0, out=table[1:, 1:])
    np.cumsum(table[1:, 1:], axis=1, out=table[1:, 1:])
    r0, c0 = grid.row0, grid.col0
    if r0.size and (r0.max() + W > fan_cover.shape[0] or c0.max() + W > fan_cover.shape[1]):
        raise ImageError(f"label maps of shape {fan_cover.shape} are smaller than the patch grid.")
    sums = table[r0 + W, c0 + W] - table[r0, c0 + W] - table[r0 + W, c0] + table[r0, c0]
    fan_f, spot_f = sums[:, 0] / W**2, sums[:, 1] / W**2
    is_fan = fan_f >= tau
    is_spot = spot_f >= tau
    label = np.zeros(r0.size, dtype=np.int8)
    label[is_spot] = 2
    label[is_fan & (~is_spot | (fan_f >= spot_f))] = 1
    direction = np.degrees(np.arctan2(sums[:, 3], sums[:, 4])) % 360.0
    direction = np.where((label == 1) & (sums[:, 2] > 0), direction, np.nan)
    return PatchTargets(label, fan_f, spot_f, direction)
