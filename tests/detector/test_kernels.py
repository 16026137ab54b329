"""Range checks of the compiled loops' public wrappers (detector/_kernels.py).

Their results on valid input are held to numpy, scipy and scikit-image in test_features.py;
here: the edge values a loop accepts give numpy's answer, the first value past them is
refused by name before the loop runs (compiled loops do not check bounds).
"""

import numpy as np
import pytest

from detector.tile import _kernels
from detector.errors import DetectorError, KernelRangeError


def _bins(n_bins, shape=(32, 48), seed=0):
    return np.random.default_rng(seed).integers(0, n_bins, size=shape).astype(np.uint8)


def test_range_error_is_a_detector_error_and_a_value_error():
    assert issubclass(KernelRangeError, DetectorError) and issubclass(KernelRangeError, ValueError)


def test_cell_counts_accept_the_last_bin_and_match_bincount():
    # np.bincount per cell is the oracle
    bins = _bins(9)
    bins[0, 0] = 8
    got = _kernels.cell_counts(bins, 16, 2, 3, 9, np.ones((1, 1), bool), False)
    cells = bins.reshape(2, 16, 3, 16).transpose(0, 2, 1, 3).reshape(2, 3, -1)
    expect = np.stack([[np.bincount(c, minlength=9) for c in row] for row in cells])
    np.testing.assert_array_equal(got, expect)


@pytest.mark.parametrize("bad", [9, 255])
def test_cell_counts_refuse_a_bin_past_the_histogram(bad):
    bins = _bins(9)
    bins[5, 7] = bad
    with pytest.raises(KernelRangeError, match=rf"bins holds {bad}, outside 0 \.\. 8"):
        _kernels.cell_counts(bins, 16, 2, 3, 9, np.ones((1, 1), bool), False)


def test_cell_counts_refuse_a_negative_bin_and_ignore_pixels_outside_full_cells():
    bins = _bins(4, shape=(40, 50)).astype(np.int16)
    bins[35, 10] = 99  # below the last full cell row: never read
    _kernels.cell_counts(bins, 16, 2, 3, 4, np.ones((1, 1), bool), False)
    bins[3, 3] = -1
    with pytest.raises(KernelRangeError, match="bins holds -1"):
        _kernels.cell_counts(bins, 16, 2, 3, 4, np.ones((1, 1), bool), False)


def test_cell_weighted_refuses_a_bin_and_short_weights():
    bins = _bins(6)
    weights = np.ones(bins.shape, np.float32)
    with pytest.raises(KernelRangeError, match="weights has shape"):
        _kernels.cell_weighted(bins, weights[:20], 16, 2, 3, 6)
    bins[31, 47] = 6
    with pytest.raises(KernelRangeError, match="bins holds 6"):
        _kernels.cell_weighted(bins, weights, 16, 2, 3, 6)


def test_cell_counts_refuse_a_grid_larger_than_the_bins():
    with pytest.raises(KernelRangeError, match=r"cell grid needs at least \(48, 48\)"):
        _kernels.cell_counts(_bins(4), 16, 3, 3, 4, np.ones((1, 1), bool), False)


@pytest.mark.parametrize("kernel", [_kernels.glcm_folded_counts, _kernels.glcm_full_counts])
def test_cooccurrence_counts_refuse_a_grey_level_past_the_levels(kernel):
    q = _bins(8)
    d = np.array([0], np.int64), np.array([1], np.int64)
    kernel(q, 16, 2, 3, *d, 8, np.ones((1, 1), bool), False)  # levels 0 .. 7: accepted
    q[10, 10] = 8
    with pytest.raises(KernelRangeError, match="grey levels q holds 8, outside 0 .. 7"):
        kernel(q, 16, 2, 3, *d, 8, np.ones((1, 1), bool), False)


def test_cooccurrence_counts_refuse_a_mask_of_another_shape():
    q = _bins(8)
    d = np.array([0], np.int64), np.array([1], np.int64)
    with pytest.raises(KernelRangeError, match=r"valid has shape \(32, 40\)"):
        _kernels.glcm_full_counts(q, 16, 2, 3, *d, 8, np.ones((32, 40), bool), True)


def test_box_sums_match_numpy_indexing_and_refuse_an_index_past_the_table():
    table = np.random.default_rng(3).random((5, 7, 2))
    i0, j0 = np.array([0, 1, 4]), np.array([0, 2, 6])
    i1, j1 = np.array([4, 3, 4]), np.array([6, 6, 6])
    expect = table[i1, j1] - table[i0, j1] - table[i1, j0] + table[i0, j0]
    assert _kernels.box_sums(table, i0, j0, i1, j1).tobytes() == expect.tobytes()
    with pytest.raises(KernelRangeError, match="box index j1 holds 7, outside 0 .. 6"):
        _kernels.box_sums(table, i0, j0, i1, np.array([6, 6, 7]))
    with pytest.raises(KernelRangeError, match="box index i1 has shape"):
        _kernels.box_sums(table, i0, j0, i1[:2], j1)


def test_u16_histogram_refuses_wider_integers():
    # an int32 value of 70000 would index past the 65536 counts
    with pytest.raises(KernelRangeError, match="2-D uint16 image; got 2-D int32"):
        _kernels.u16_histogram(np.full((4, 4), 70000, np.int32), np.ones((4, 4), bool), False)
    with pytest.raises(KernelRangeError, match=r"valid has shape \(3, 4\)"):
        _kernels.u16_histogram(np.zeros((4, 4), np.uint16), np.ones((3, 4), bool), True)
