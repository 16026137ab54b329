"""Patch features against scikit-image, published worked examples and symmetry facts."""


import numpy as np
import pytest
from scipy import ndimage as ndi
from scipy.stats import circmean
from skimage.feature import graycomatrix, graycoprops, hog, local_binary_pattern, structure_tensor

from detector.tile import _dense
from detector.errors import ImageError
from detector.tile.features import extract_features, flip_polarity, patch_grid, patch_targets
from detector.geometry import axial_difference, unit_vector
from detector.tile.spec import POLARITY_ODD_FEATURES, SIGNED_HIST_PREFIX, FeatureSpec, patch_axis_deg

SPEC = FeatureSpec()


def _smooth_tile(shape=(256, 320), seed=0, sigma=2.0):
    rng = np.random.default_rng(seed)
    noise = ndi.gaussian_filter(rng.normal(size=shape), sigma)
    noise = (noise - noise.min()) / (noise.max() - noise.min())
    return (1000 + noise * 60000).astype(np.uint16)


def _cols(names, prefix):
    return [i for i, n in enumerate(names) if n.startswith(prefix)]


def _no_mask(tile):
    return np.zeros(tile.shape, dtype=bool)


# -- whole-tile parity of the dense maps with scikit-image ------------------------------
def test_hog_cell_histograms_match_skimage():
    tile = _smooth_tile()
    img = (tile / np.float32(65535)).astype(np.float32)
    g_row, g_col = _dense.central_gradients(img)
    unsigned, _ = _dense.orientation_bins(g_row, g_col, 9, 12)
    h = _dense.cell_histogram(unsigned, 32, 9, weights=np.hypot(g_row, g_col)) / 32**2
    # skimage returns cell histograms only normalised; one-cell L1 blocks expose them.
    ref = hog(img, orientations=9, pixels_per_cell=(32, 32), cells_per_block=(1, 1),
              block_norm="L1", feature_vector=False)[:, :, 0, 0, :]
    mine = h / (h.sum(axis=-1, keepdims=True) + 1e-5)
    np.testing.assert_allclose(mine, ref, atol=1e-6)


def test_hog_block_descriptors_match_skimage_where_grids_align():
    tile = _smooth_tile()
    X, grid = extract_features(tile, SPEC, nodata_mask=_no_mask(tile))
    img = (tile / np.float32(65535)).astype(np.float32)
    ref = hog(img, orientations=9, pixels_per_cell=(32, 32), cells_per_block=(2, 2),
              block_norm="L2-Hys", feature_vector=False)
    cols = _cols(SPEC.feature_names, "hog_")
    aligned = np.flatnonzero((grid.row0 % 32 == 0) & (grid.col0 % 32 == 0))
    assert aligned.size == 7 * 9
    expect = ref[grid.row0[aligned] // 32, grid.col0[aligned] // 32].reshape(aligned.size, -1)
    np.testing.assert_allclose(X[aligned][:, cols], expect, atol=2e-6)


def test_cooccurrence_counts_match_skimage():
    rng = np.random.default_rng(1)
    q = rng.integers(0, 8, size=(96, 128))
    offsets = _dense.glcm_offsets(SPEC.glcm_distances, SPEC.glcm_angles_deg)
    counts = _dense.glcm_cell_counts(q, 16, offsets, 8).sum(axis=1)
    ref = graycomatrix(q.astype(np.uint8), SPEC.glcm_distances, np.radians(SPEC.glcm_angles_deg), levels=8)
    ref = np.moveaxis(ref.reshape(8, 8, -1), -1, 0)
    np.testing.assert_array_equal(counts, ref)
    props = _dense.glcm_props(counts.astype(float))
    for k, prop in enumerate(("contrast", "dissimilarity", "homogeneity", "ASM", "energy", "correlation")):
        sym = graycomatrix(q.astype(np.uint8), SPEC.glcm_distances, np.radians(SPEC.glcm_angles_deg),
                           levels=8, symmetric=True, normed=True)
        np.testing.assert_allclose(props[k], graycoprops(sym, prop).ravel(), rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("shape, cell_px", [((664, 864), 16), ((640, 800), 16), ((97, 131), 8), ((50, 61), 4),
                                            ((120, 90), 12), ((300, 257), 32)])
def test_cell_sums_equal_numpy_reduction_bit_for_bit(shape, cell_px):
    # numpy's own reduction (reshape and sum over the two in-cell axes, in float64) is
    # the reference: the compiled loop must add in its order, to the last bit.
    rng = np.random.default_rng(shape[0])
    a = (rng.normal(size=shape) * 10.0 ** rng.uniform(-4, 4, shape)).astype(np.float32)
    ncr, ncc = shape[0] // cell_px, shape[1] // cell_px
    expect = a[: ncr * cell_px, : ncc * cell_px].reshape(ncr, cell_px, ncc, cell_px).sum(axis=(1, 3), dtype=np.float64)
    got = _dense.cell_sums(a, cell_px, ncr, ncc)
    assert got.dtype == np.float64 and got.tobytes() == expect.tobytes()


@pytest.mark.parametrize("with_nodata", [False, True])
def test_intensity_maps_equal_the_numpy_formulas_bit_for_bit(with_nodata):
    # numpy's float32 arithmetic, np.clip and the cell reduction are the reference; the signs of
    # zeros count too (a negative z times an invalid pixel's 0 is -0.0 in numpy as well).
    from detector.tile import _kernels

    rng = np.random.default_rng(4)
    image = rng.random((130, 170)).astype(np.float32)
    valid = rng.random(image.shape) > (0.2 if with_nodata else -1.0)
    bg, inv, zr, bs, nb, dmax = np.float32(0.47), np.float32(9.3), np.float32(8.0), np.float32(2.0), 32, np.float32(10.0)
    z = image - bg
    z *= inv
    zb = z + zr
    zb *= bs
    np.clip(zb, 0, nb - 1, out=zb)
    dark = np.negative(z)
    np.clip(dark, 0, dmax, out=dark)
    if with_nodata:
        z *= valid
        dark *= valid
    cells = [(a[:128, :160].reshape(8, 16, 10, 16).sum(axis=(1, 3), dtype=np.float64)) for a in (z, z * z, dark)]
    got = _kernels.intensity_maps(image, bg, inv, zr, bs, nb, dmax, valid, with_nodata, 16, 8, 10)
    expect = [zb.astype(np.uint8), dark, *cells]
    for g, e in zip(got, expect, strict=True):
        assert g.dtype == e.dtype and g.tobytes() == e.tobytes()


def test_u16_histogram_equals_numpy_bincount():
    from detector.tile import _kernels

    rng = np.random.default_rng(6)
    u16 = rng.integers(0, 65536, size=(97, 131)).astype(np.uint16)
    u16[:5] = 65535
    valid = rng.random(u16.shape) > 0.3
    np.testing.assert_array_equal(_kernels.u16_histogram(u16, valid, True), np.bincount(u16[valid], minlength=65536))
    np.testing.assert_array_equal(_kernels.u16_histogram(u16, valid, False), np.bincount(u16.ravel(), minlength=65536))


def test_haralick_kernel_equals_the_numpy_formulas_bit_for_bit():
    # The compiled loop must give the very numbers of numpy's einsum formulation
    # (sums in pair order), not merely close ones, so features do not depend on it.
    rng = np.random.default_rng(7)
    L = 8
    S = rng.integers(0, 400, size=(3000, 36)) * rng.integers(0, 2, size=(3000, 36))
    S[:4] = 0  # empty patches: normalised by 1
    S[4:8, 1:] = 0  # one grey level only: correlation 1
    iu, ju = np.triu_indices(L)
    i, j = iu.astype(float), ju.astype(float)
    mult = np.where(iu == ju, 1.0, 2.0)
    d = i - j
    w = mult[:, None] * np.stack([np.ones_like(i), d**2, np.abs(d), 1 / (1 + d**2), (i + j) / 2,
                                  (i**2 + j**2) / 2, i * j], axis=1)
    flat = S.astype(float)
    sums = np.einsum("nk,kw->nw", flat, w)
    norm = np.where(sums[:, 0] == 0, 1.0, sums[:, 0])
    contrast, dissim, homog, mu, ex2, exy = (sums[:, k] / norm for k in range(1, 7))
    asm = np.einsum("nk,nk,k->n", flat, flat, mult) / norm**2
    var = np.maximum(ex2 - mu**2, 0.0)
    flat_std = np.sqrt(var) < 1e-15
    corr = np.where(flat_std, 1.0, (exy - mu**2) / np.where(flat_std, 1.0, var))
    expect = np.stack([contrast, dissim, homog, asm, np.sqrt(asm), corr])
    got = _dense.glcm_props_folded(S.astype(np.int32), L)
    assert got.tobytes() == expect.tobytes()
    assert np.all(got[5, 4:8] == 1.0) and np.all(got[0, :4] == 0.0)


def test_haralick_worked_example():
    # Haralick, Shanmugam and Dinstein (1973), Fig. 2: 4 x 4 image with grey levels 0-3 and
    # its symmetric distance-1 co-occurrence matrices (also in skimage's graycomatrix docstring).
    image = np.array([[0, 0, 1, 1], [0, 0, 1, 1], [0, 2, 2, 2], [2, 2, 3, 3]])
    published = {
        (0, 1): [[4, 2, 1, 0], [2, 4, 0, 0], [1, 0, 6, 1], [0, 0, 1, 2]],  # 0 degrees
        (1, 0): [[6, 0, 2, 0], [0, 4, 2, 0], [2, 2, 2, 2], [0, 0, 2, 0]],  # 90 degrees
        (1, 1): [[2, 1, 3, 0], [1, 2, 1, 0], [3, 1, 0, 2], [0, 0, 2, 0]],  # 135 degrees (Haralick)
        (1, -1): [[4, 1, 0, 0], [1, 2, 2, 0], [0, 2, 4, 1], [0, 0, 1, 0]],  # 45 degrees (Haralick)
    }
    counts = _dense.glcm_cell_counts(image, 4, list(published), 4)[:, 0]
    for k, matrix in enumerate(published.values()):
        np.testing.assert_array_equal(counts[k] + counts[k].T, matrix)


def test_masked_cooccurrence_counts_match_skimage_with_a_level_for_no_data():
    # skimage's graycomatrix has no mask: give no-data pixels an extra grey level L and
    # drop its row and column, which leaves exactly the pairs of two valid pixels.
    rng = np.random.default_rng(12)
    q = rng.integers(0, 8, size=(96, 112))
    valid = rng.random(q.shape) > 0.2
    valid[:20, :30] = False
    offsets = _dense.glcm_offsets(SPEC.glcm_distances, SPEC.glcm_angles_deg)
    counts = _dense.glcm_cell_counts(q, 16, offsets, 8, valid).sum(axis=1)
    marked = np.where(valid, q, 8).astype(np.uint8)
    ref = graycomatrix(marked, SPEC.glcm_distances, np.radians(SPEC.glcm_angles_deg), levels=9)[:8, :8]
    np.testing.assert_array_equal(counts, np.moveaxis(ref.reshape(8, 8, -1), -1, 0))


def test_masked_cooccurrence_counts_with_256_levels_leave_no_data_out():
    # with 256 grey levels the no-data level 256 no longer fits in uint8
    rng = np.random.default_rng(15)
    q = rng.integers(0, 256, size=(48, 64))
    valid = rng.random(q.shape) > 0.2
    counts = _dense.glcm_cell_counts(q, 16, [(0, 1), (1, 0)], 256, valid).sum(axis=1)
    marked = np.where(valid, q, 256).astype(np.uint16)
    ref = graycomatrix(marked, [1], [0.0, np.pi / 2], levels=257)[:256, :256, 0, :]
    np.testing.assert_array_equal(counts, np.moveaxis(ref, -1, 0))


def test_cell_counts_of_a_ragged_tile_follow_the_pair_rule():
    # A pair counts in the full cell of its first pixel; pixels past the last full
    # cell start no pair but may end one (checked by np.add.at over every pair).
    rng = np.random.default_rng(13)
    q = rng.integers(0, 4, size=(37, 45))
    valid = rng.random(q.shape) > 0.1
    offsets = [(0, 1), (1, -1), (2, 0), (-1, 3)]
    mine = _dense.glcm_cell_counts(q, 8, offsets, 4, valid)
    h, w = q.shape
    expect = np.zeros((len(offsets), (h // 8) * (w // 8), 4, 4), dtype=np.int64)
    r, c = np.mgrid[: (h // 8) * 8, : (w // 8) * 8]
    for k, (dr, dc) in enumerate(offsets):
        r2, c2 = r + dr, c + dc
        inside = (r2 >= 0) & (r2 < h) & (c2 >= 0) & (c2 < w)
        a, b, a2, b2 = r[inside], c[inside], r2[inside], c2[inside]
        ok = valid[a, b] & valid[a2, b2]
        cell = (a // 8) * (w // 8) + b // 8
        np.add.at(expect[k], (cell[ok], q[a, b][ok], q[a2, b2][ok]), 1)
    np.testing.assert_array_equal(mine, expect)


def test_cell_histograms_equal_numpy_bincount():
    rng = np.random.default_rng(14)
    bins = rng.integers(0, 10, size=(50, 70)).astype(np.uint8)
    weights = rng.random(bins.shape).astype(np.float32)
    mask = rng.random(bins.shape) > 0.3
    cell = (np.arange(48)[:, None] // 16) * 4 + np.arange(64)[None, :] // 16
    b, wt, m = bins[:48, :64], weights[:48, :64], mask[:48, :64]
    counts = _dense.cell_histogram(bins, 16, 10, mask=mask)
    np.testing.assert_array_equal(counts.reshape(12, 10),
                                  np.bincount((cell * 10 + b)[m], minlength=120).reshape(12, 10))
    sums = _dense.cell_histogram(bins, 16, 10, weights=weights)
    # same additions in the same (row-major) order as bincount: equal to the last bit
    np.testing.assert_array_equal(sums.reshape(12, 10),
                                  np.bincount((cell * 10 + b).ravel(), weights=wt.ravel(), minlength=120)
                                  .reshape(12, 10))


# the spec's scales, one with every neighbour on the pixel grid, and two with none or few
@pytest.mark.parametrize("P,R", [tuple(s) for s in SPEC.lbp] + [(4, 1), (8, 1.5), (12, 2.5)])
def test_lbp_codes_match_skimage(P, R):
    tile = _smooth_tile(seed=2)
    # coarse levels create exact ties between interpolated neighbours and the centre
    coarse = (tile // 8000 * 8000).astype(np.uint16)
    tiny = np.random.default_rng(3).integers(0, 4, size=(3, 5)).astype(np.uint16)  # smaller than the ring
    for image in (tile, coarse, tiny):
        np.testing.assert_array_equal(_dense.lbp_uniform(image, P, R), local_binary_pattern(image, P, R, "uniform"))


def test_structure_tensor_matches_skimage():
    img = (_smooth_tile(seed=3) / 65535.0).astype(np.float32)
    mine = _dense.structure_tensor_maps(img, gradient_sigma=0.0, tensor_sigma=1.0)
    ref = structure_tensor(img.astype(np.float64), sigma=1.0, mode="reflect", order="rc")
    for a, b in zip(mine, ref):
        np.testing.assert_allclose(a, b, rtol=1e-4, atol=1e-6 * np.abs(b).max())


# -- per patch against scikit-image on the cut-out window ----------------------------------
def test_pooled_features_match_cutout_windows_up_to_the_window_border():
    """Pooled features differ from scikit-image on the cut-out window only through the window border.

    The pooled HOG uses the true central difference on the window's outer rows and
    columns where skimage sees a zero; the pooled GLCM counts pairs whose second pixel
    lies up to d px outside the window; the pooled LBP uses real neighbours where skimage
    pads with zeros. On this smooth tile the changed pixels are 6 % (HOG border), at most
    d * 64 / 4096 of pairs (GLCM) and the 2R-wide frame (LBP) of the window; the
    tolerances below are those shares with a margin.
    """
    tile = _smooth_tile(seed=4)
    X, grid = extract_features(tile, SPEC, nodata_mask=_no_mask(tile))
    names = SPEC.feature_names
    img = (tile / np.float32(65535)).astype(np.float32)
    prep = _dense.prepare_tile(tile, SPEC, _no_mask(tile))
    q = _dense.quantise(prep.image, prep.lo, prep.hi, SPEC.glcm_levels).astype(np.uint8)
    for p in (0, 37, 60, grid.n_patches - 1):
        r, c = grid.row0[p], grid.col0[p]
        win = img[r:r + 64, c:c + 64]
        ref_hog = hog(win, orientations=9, pixels_per_cell=(32, 32), cells_per_block=(2, 2), block_norm="L2-Hys")
        assert np.abs(X[p, _cols(names, "hog_")] - ref_hog).max() < 0.05
        sym = graycomatrix(q[r:r + 64, c:c + 64], SPEC.glcm_distances, np.radians(SPEC.glcm_angles_deg),
                           levels=SPEC.glcm_levels, symmetric=True, normed=True)
        for prop in ("contrast", "homogeneity", "energy", "correlation"):
            ref = graycoprops(sym, prop).ravel()
            mine = X[p, _cols(names, f"glcm_{prop}_")]
            assert np.all(np.abs(mine - ref) <= 0.15 * np.abs(ref) + 0.02), prop
        for P, R in SPEC.lbp:
            codes = local_binary_pattern(tile[r:r + 64, c:c + 64], P, R, "uniform").astype(int)
            ref = np.bincount(codes.ravel(), minlength=P + 2) / codes.size
            mine = X[p, _cols(names, f"lbp{P}r{R}_")]
            frame = 1 - (64 - 4 * R) ** 2 / 64**2
            assert np.abs(mine - ref).sum() <= 2 * frame


# -- gratings and bars: structure-tensor axis ------------------------------------------
def _oriented(angle_deg, shape=(256, 256), period=12.0, bars=False):
    y, x = np.mgrid[: shape[0], : shape[1]].astype(float)
    # lines run along the axis; intensity varies along its normal
    ax, ay = unit_vector(angle_deg)
    u = (x * -ay + y * ax) / period
    if bars:
        wave = np.where(np.abs(u - np.floor(u) - 0.5) < 0.2, 0.2, 0.7)
        wave = ndi.gaussian_filter(wave, 0.7)
    else:
        wave = 0.5 + 0.3 * np.sin(2 * np.pi * u)
    return (wave * 65535).astype(np.uint16)


@pytest.mark.parametrize("angle", [0.0, 17.0, 30.0, 45.0, 72.5, 90.0, 112.5, 135.0, 163.0])
@pytest.mark.parametrize("bars", [False, True])
def test_grating_axis_is_recovered(angle, bars):
    tile = _oriented(angle, bars=bars)
    X, grid = extract_features(tile, SPEC, nodata_mask=_no_mask(tile))
    axis = patch_axis_deg(X, SPEC)
    assert np.max(axial_difference(axis, angle)) < 1.0
    coh = X[:, SPEC.feature_names.index("st_coherence_w64")]
    assert np.all(coh > 0.9)


# -- properties ---------------------------------------------------------------------
def test_rot90_rolls_signed_histogram():
    tile = _smooth_tile(shape=(320, 320), seed=5)
    X, grid = extract_features(tile, SPEC, nodata_mask=_no_mask(tile))
    Xr, gr = extract_features(np.rot90(tile, k=-1), SPEC, nodata_mask=_no_mask(tile))
    cols = _cols(SPEC.feature_names, SIGNED_HIST_PREFIX)
    grid_x = X[:, cols].reshape(grid.n_rows, grid.n_cols, -1)
    grid_r = Xr[:, cols].reshape(gr.n_rows, gr.n_cols, -1)
    # a 90 degree clockwise turn adds 90 degrees to every direction: bins / 4
    expect = np.roll(np.rot90(grid_x, k=-1, axes=(0, 1)), SPEC.signed_hist_bins // 4, axis=-1)
    np.testing.assert_allclose(grid_r, expect, atol=2e-3)


def test_uint8_and_uint16_times_257_are_identical():
    rng = np.random.default_rng(6)
    tile8 = rng.integers(0, 256, size=(200, 260)).astype(np.uint8)
    X8, g8 = extract_features(tile8, SPEC)
    X16, g16 = extract_features(tile8.astype(np.uint16) * 257, SPEC)
    np.testing.assert_array_equal(X8, X16)
    np.testing.assert_array_equal(g8.nodata_fraction, g16.nodata_fraction)


def test_flat_tile_is_finite():
    X, grid = extract_features(np.full((128, 160), 120, np.uint8), SPEC)
    assert X.shape == (grid.n_patches, SPEC.n_features) and np.isfinite(X).all()


def _synthetic_fan(shape=(320, 320), apex=(120.0, 130.0), direction=120.0, length=150.0, spread=30.0, seed=7):
    y, x = np.mgrid[: shape[0], : shape[1]].astype(float)
    dx, dy = unit_vector(direction)
    s = (x - apex[1]) * dx + (y - apex[0]) * dy
    t = (x - apex[1]) * -dy + (y - apex[0]) * dx
    inside = (s > 0) & (s < length) & (np.abs(t) < s * np.tan(np.radians(spread / 2)))
    darkness = np.where(inside, 0.5 * (1 - s / length) + 0.2, 0.0)
    rng = np.random.default_rng(seed)
    img = 0.6 - 0.4 * ndi.gaussian_filter(darkness, 1.5) + rng.normal(0, 0.01, shape)
    return (np.clip(img, 0, 1) * 65535).astype(np.uint16), inside


def test_180_degree_flip_negates_polarity_odd_features():
    tile, inside = _synthetic_fan()
    X, grid = extract_features(tile, SPEC)
    Xf, _ = extract_features(np.flip(tile), SPEC)
    Xf = Xf[::-1]  # the flipped grid lists the same windows in reverse order
    names = SPEC.feature_names
    odd = [names.index(n) for n in POLARITY_ODD_FEATURES]
    dark = X[:, names.index("int_dark")] > 0.5
    assert dark.sum() > 20
    np.testing.assert_allclose(Xf[dark][:, odd], -X[dark][:, odd], atol=2e-3)
    assert np.abs(X[dark][:, odd]).max() > 0.1
    pol = _cols(names, "pol_")
    np.testing.assert_allclose(Xf[:, pol], flip_polarity(X, SPEC)[:, pol], atol=2e-3)


GROUPS = list(SPEC.groups)


@pytest.mark.parametrize("group", GROUPS)
def test_feature_group_contract(group):
    tile, _ = _synthetic_fan(shape=(200, 232))
    X1, grid = extract_features(tile, SPEC)
    X2, _ = extract_features(tile.copy(), SPEC)
    names = SPEC.groups[group]
    start = SPEC.feature_names.index(names[0])
    block = X1[:, start:start + len(names)]
    assert X1.dtype == np.float32 and X1.shape == (grid.n_patches, SPEC.n_features)
    assert grid.n_patches == ((200 - 64) // 16 + 1) * ((232 - 64) // 16 + 1)
    assert block.shape[1] == len(names) and len(set(names)) == len(names)
    assert np.isfinite(block).all()
    np.testing.assert_array_equal(block, X2[:, start:start + len(names)])
    assert np.ptp(block, axis=0).max() > 0  # the group responds to the scene


def test_nodata_share_and_validity():
    tile = _smooth_tile(shape=(128, 128), seed=8)
    tile[:, :40] = 0
    X, grid = extract_features(tile, SPEC)
    expect = np.array([max(0, 40 - c) / 64 for c in grid.col0])
    np.testing.assert_allclose(grid.nodata_fraction, expect)
    np.testing.assert_array_equal(grid.valid, expect <= 0.5)
    np.testing.assert_allclose(X[:, SPEC.feature_names.index("int_nodata")], expect, atol=1e-6)
    assert np.isfinite(X).all()
    g2 = patch_grid(tile.shape, SPEC, nodata_mask=tile == 0)
    np.testing.assert_allclose(g2.nodata_fraction, expect)


def test_patch_grid_geometry():
    grid = patch_grid((100, 150), SPEC)
    assert (grid.n_rows, grid.n_cols) == (3, 6)
    assert grid.x_px[0] == 31.5 and grid.y_px[-1] == 32 + 31.5


def test_bad_tiles_raise_image_error():
    for bad in (np.zeros((0, 5), np.uint8), np.zeros((4, 4, 3), np.uint8), np.zeros((70, 70), np.int8),
                np.full((70, 70), 2.0)):
        with pytest.raises(ImageError):
            extract_features(bad, SPEC)


def test_patch_targets_classes_and_direction():
    grid = patch_grid((128, 128), SPEC)
    fan = np.zeros((128, 128), bool)
    spot = np.zeros((128, 128), bool)
    direction = np.full((128, 128), np.nan)
    fan[:64, :64] = True
    rng = np.random.default_rng(9)
    direction[:64, :64] = rng.choice([350.0, 20.0, 10.0], size=(64, 64))
    spot[64:, 64:] = True
    t = patch_targets(grid, fan, spot, direction)
    assert t.label[0] == 1 and t.label[-1] == 2 and t.label.dtype == np.int8
    # scipy.stats.circmean is the reference circular mean
    expect = np.degrees(circmean(np.radians(direction[:64, :64])))
    assert abs(t.fan_direction_deg[0] - expect) < 1e-9
    assert np.isnan(t.fan_direction_deg[t.label != 1]).all()
    # equal shares of fan and spot: fan wins
    tie = patch_targets(grid, fan, fan.copy(), direction)
    assert tie.label[0] == 1


def test_folded_cooccurrence_counts_equal_symmetrised_matrix():
    rng = np.random.default_rng(10)
    q = rng.integers(0, 8, size=(64, 80))
    offsets = _dense.glcm_offsets((1, 4), (0, 135))
    full = _dense.glcm_cell_counts(q, 16, offsets, 8)
    folded = _dense.glcm_cell_counts(q, 16, offsets, 8, folded=True)
    np.testing.assert_array_equal(_dense.unfold_diagonal(folded, 8), _dense.glcm_fold(full))
    # properties straight from the unordered counts: the same numbers as from the symmetric matrix
    direct = _dense.glcm_props_unordered(folded, 8)
    assert direct.tobytes() == _dense.glcm_props_folded(_dense.glcm_fold(full), 8).tobytes()


def test_structure_tensor_from_central_gradients_matches_skimage():
    img = (_smooth_tile(shape=(96, 112), seed=11) / 65535.0).astype(np.float32)
    central = _dense.central_gradients(img)
    mine = _dense.structure_tensor_maps(img, gradient_sigma=0.0, tensor_sigma=0.0, central=central)
    # sigma -> 0 leaves skimage's products unsmoothed (Gaussian of width ~0 is the identity)
    ref = structure_tensor(img.astype(np.float64), sigma=1e-6, mode="reflect", order="rc")
    for a, b in zip(mine, ref):
        np.testing.assert_allclose(a, b, rtol=1e-4, atol=1e-6 * np.abs(b).max())


@pytest.mark.parametrize("shape", [(96, 112), (2, 9), (7, 2)])
def test_structure_products_from_central_gradients_equal_scipy_sobel(shape):
    img = (_smooth_tile(shape=shape, seed=12) / 65535.0).astype(np.float32) if min(shape) > 8 else \
        np.random.default_rng(12).random(shape).astype(np.float32)
    mine = _dense.structure_tensor_maps(img, gradient_sigma=0.0, tensor_sigma=0.0,
                                        central=_dense.central_gradients(img))
    d_r, d_c = ndi.sobel(img, axis=0, mode="reflect"), ndi.sobel(img, axis=1, mode="reflect")
    for a, b in zip(mine, (d_r * d_r, d_r * d_c, d_c * d_c)):
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("size", [3, 5])
def test_square_erosion_equals_scipy_minimum_filter(size):
    mask = np.random.default_rng(size).random((61, 47)) > 0.05
    mask[:, :3] = True
    ref = ndi.minimum_filter(mask, size=size, mode="nearest")
    np.testing.assert_array_equal(_dense.erode_square(mask, size), ref)


def _feature(X, name):
    return X[:, SPEC.feature_names.index(name)]


@pytest.mark.parametrize("mark", ["dot", "line", "diagonal", "faint", "none"])
def test_degenerate_patches_have_no_axis_and_bounded_shape(mark):
    # A flat tile with at most one dark pixel, a one-pixel line, or one pixel darker by 1e-6 (rounding
    # residue). Where scikit-image's structure tensor (skimage.feature.structure_tensor) is zero the
    # patch has no axis, so every axis feature is exactly 0 there (no sign picked from residue); the
    # widening across the axis of a dark mass of no width is undefined, so it is 0, never a ratio of
    # residues; skewness and widening stay finite and bounded everywhere.
    tile = np.full((256, 448), 120, np.uint8)
    if mark == "dot":
        tile[100, 130] = 20
    elif mark == "line":
        tile[100, 60:200] = 20
    elif mark == "diagonal":
        tile[np.arange(60, 140), np.arange(100, 180)] = 20
    elif mark == "faint":
        tile = np.full((256, 448), 0.5)
        tile[100, 130] = 0.5 - 1e-6
    X, grid = extract_features(tile, SPEC)
    assert np.isfinite(X).all()
    for name in ("pol_skew_along", "pol_widening"):
        assert np.abs(_feature(X, name)).max() <= 20.0
    if mark in ("line", "diagonal"):
        np.testing.assert_array_equal(_feature(X, "pol_widening"), 0.0)
    A_rr, A_rc, A_cc = structure_tensor(np.asarray(tile, float), sigma=SPEC.st_tensor_sigma)
    no_gradient = (np.abs(A_rr) + np.abs(A_rc) + np.abs(A_cc)) == 0
    # patches whose 128 px context holds no gradient at all: far from the mark
    still = ndi.minimum_filter(no_gradient.astype(np.uint8), size=2 * 70 + 1, mode="nearest").astype(bool)
    far = still[grid.y_px.astype(int), grid.x_px.astype(int)]
    axis_names = ("st_axis_cos2_w64", "st_axis_sin2_w64", "st_axis_cos2_w128", "st_axis_sin2_w128",
                  "pol_axis_cos2", "pol_axis_sin2", "pol_dark_axis_cos2", "pol_dark_axis_sin2")
    if mark == "faint":
        # a residue of 1e-6 has no axis anywhere, and gives shape ratios of residue size only
        for name in axis_names:
            np.testing.assert_array_equal(_feature(X, name), 0.0, err_msg=name)
        assert np.abs(X[:, [SPEC.feature_names.index(n) for n in ("pol_skew_along", "pol_widening")]]).max() < 1e-3
        return
    if mark == "none":
        far = np.ones(grid.n_patches, bool)
    assert far.any()
    for name in axis_names + ("pol_skew_along", "pol_widening"):
        np.testing.assert_array_equal(_feature(X, name)[far], 0.0, err_msg=name)
