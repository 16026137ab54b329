"""Object assembly: upsampling of patch maps, local darkness, candidates and their readings."""

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage
from scipy.interpolate import RegularGridInterpolator

from detector.objects import _readings
from detector.objects.assemble import (
    _box_mean,
    _vents,
    PatchField,
    AssemblyParams,
    HYP_AXIS_FORWARD,
    HYP_AXIS_REVERSE,
    HYP_MODES,
    OBJECT_FEATURE_NAMES,
    candidate_rows,
    find_candidates,
    grey_opening_square,
    local_darkness,
    objects_from_candidates,
    reading_matrix,
    share_vent_sources,
    upsample_patch_maps,
)
from detector.tile.features import patch_grid
from detector.geometry import angular_difference, axial_difference
from detector.labels import rasterise_features
from detector.tile.spec import FeatureSpec

SHAPE = (220, 220)
APEX = (110.0, 110.0)


def _uniform_maps(shape):
    class_maps = np.empty((3,) + shape, np.float32)
    class_maps[:] = np.array([0.2, 0.5, 0.3], np.float32)[:, None, None]
    return class_maps, np.zeros((2,) + shape, np.float32)


def _frost(shape, seed):
    return 0.6 + 0.02 * np.random.default_rng(seed).standard_normal(shape)


def _fan_scene(directions, *, length=70.0, spread=40.0, seed=0, depth=0.35):
    """Frost with dark sectors from APEX, darkest at the vent and fading outwards (common practice)."""
    image = _frost(SHAPE, seed)
    yy, xx = np.mgrid[: SHAPE[0], : SHAPE[1]]
    r = np.hypot(xx - APEX[0], yy - APEX[1])
    tau = np.zeros(SHAPE)
    for d in directions:
        row = dict(kind="fan", x_px=APEX[0], y_px=APEX[1], direction_deg=float(d), length_px=length, opening_deg=spread)
        cover = rasterise_features(pd.DataFrame([row]), SHAPE).fan_cover
        tau = np.maximum(tau, depth * cover * np.exp(-1.6 * r / length))
    return image - tau


def _candidates(image, params=AssemblyParams()):
    valid = np.ones(image.shape, bool)
    dark = local_darkness(image, valid, background_px=params.background_px)
    class_maps, polarity_maps = _uniform_maps(image.shape)
    return find_candidates(dark, valid, class_maps, polarity_maps, params=params)


def _fan_readings(candidates):
    return [f for c in candidates for f in c.fans]


# --------------------------------------------------------------------------- upsampling


def _naive_bilinear(values, grid, shape):
    """Per-pixel oracle: bilinear interpolation between the four surrounding patch centres."""
    v = values.reshape(grid.n_rows, grid.n_cols, -1)
    ys = grid.y_px.reshape(grid.n_rows, grid.n_cols)[:, 0]
    xs = grid.x_px.reshape(grid.n_rows, grid.n_cols)[0]
    out = np.zeros((v.shape[2],) + tuple(shape))
    for r in range(shape[0]):
        y = min(max(r, ys[0]), ys[-1])
        i = min(int(np.searchsorted(ys, y, side="right")) - 1, len(ys) - 2)
        ty = (y - ys[i]) / (ys[i + 1] - ys[i])
        for c in range(shape[1]):
            x = min(max(c, xs[0]), xs[-1])
            j = min(int(np.searchsorted(xs, x, side="right")) - 1, len(xs) - 2)
            tx = (x - xs[j]) / (xs[j + 1] - xs[j])
            out[:, r, c] = ((1 - ty) * (1 - tx) * v[i, j] + (1 - ty) * tx * v[i, j + 1]
                            + ty * (1 - tx) * v[i + 1, j] + ty * tx * v[i + 1, j + 1])
    return out


@pytest.fixture(scope="module")
def grid_and_values():
    shape = (150, 170)
    grid = patch_grid(shape, FeatureSpec())
    values = np.random.default_rng(5).random((grid.n_patches, 2)).astype(np.float32)
    return shape, grid, values


def test_upsample_matches_naive_bilinear_oracle(grid_and_values):
    shape, grid, values = grid_and_values
    maps = upsample_patch_maps(values, grid, shape)
    assert maps.shape == (2,) + shape and maps.dtype == np.float32
    np.testing.assert_allclose(maps, _naive_bilinear(values, grid, shape), atol=1e-5)


def test_patch_field_reads_the_upsampled_maps_at_any_pixel(grid_and_values):
    # Oracle: the full-resolution maps of upsample_patch_maps, read at random pixels (edges included).
    shape, grid, values = grid_and_values
    maps = upsample_patch_maps(values, grid, shape)
    rng = np.random.default_rng(5)
    ys = np.concatenate([[0, shape[0] - 1], rng.integers(0, shape[0], 500)])
    xs = np.concatenate([[0, shape[1] - 1], rng.integers(0, shape[1], 500)])
    got = PatchField(values, grid).at(ys, xs)
    assert got.shape == (len(ys), values.shape[1]) and got.dtype == np.float32
    np.testing.assert_allclose(got.T, maps[:, ys, xs], atol=1e-5)


def test_upsample_matches_scipy_regular_grid_interpolator(grid_and_values):
    # Reference: scipy.interpolate.RegularGridInterpolator(method="linear"), inside the hull of patch centres.
    shape, grid, values = grid_and_values
    maps = upsample_patch_maps(values, grid, shape)
    ys = grid.y_px.reshape(grid.n_rows, grid.n_cols)[:, 0]
    xs = grid.x_px.reshape(grid.n_rows, grid.n_cols)[0]
    rows = np.arange(int(np.ceil(ys[0])), int(np.floor(ys[-1])) + 1)
    cols = np.arange(int(np.ceil(xs[0])), int(np.floor(xs[-1])) + 1)
    rr, cc = np.meshgrid(rows, cols, indexing="ij")
    for k in range(values.shape[1]):
        ref = RegularGridInterpolator((ys, xs), values[:, k].reshape(grid.n_rows, grid.n_cols))
        expected = ref(np.column_stack([rr.ravel(), cc.ravel()])).reshape(rr.shape)
        np.testing.assert_allclose(maps[k][np.ix_(rows, cols)], expected, atol=1e-5)


# --------------------------------------------------------------------------- local darkness


@pytest.mark.parametrize("shape", [(66, 87), (3, 3), (1, 9), (12, 1)])
@pytest.mark.parametrize("size", [2, 3, 4, 5, 7])
def test_grey_opening_equals_scipy(shape, size):
    # Reference: scipy.ndimage.grey_opening with a flat square and its default 'reflect' edges.
    rng = np.random.default_rng(size)
    image = rng.normal(size=shape).astype(np.float32)
    image[rng.random(shape) < 0.3] = 0.0  # ties, as on no-data
    np.testing.assert_array_equal(grey_opening_square(image, size), ndimage.grey_opening(image, size=(size, size)))


@pytest.mark.parametrize("n", [1, 2, 3, 7, 8, 9, 130, 1001])
@pytest.mark.parametrize("q", [0.0, 0.01, 0.25, 0.5, 0.97, 1.0])
def test_quantile_equals_numpy_to_the_last_bit(n, q):
    values = np.random.default_rng(n).normal(size=n) * 50.0
    values[::3] = np.round(values[::3])  # ties
    assert _readings.quantile(values, q) == float(np.quantile(values, q))


@pytest.mark.parametrize("n", [0, 1, 7, 8, 9, 127, 128, 129, 1000, 70001])
def test_sum_follows_numpy_pairwise_order(n):
    values = np.random.default_rng(n).normal(size=n) * 10.0 ** np.random.default_rng(n + 1).uniform(-6, 6, n)
    assert _readings.psum(values) == float(np.sum(values))
    single = values.astype(np.float32)  # float32 sums are accumulated in float32, as numpy's are
    assert _readings.psum(single) == np.sum(single)


@pytest.mark.parametrize("n", [1, 2, 9, 130, 4001])
def test_component_summary_equals_numpy_float32_statistics_bit_for_bit(n):
    # numpy's own float32 mean, max, std, boolean-index mean and weighted average
    # are the reference; the compiled summary must give the same float32 values.
    rng = np.random.default_rng(n)
    w = (rng.gamma(2.0, 1.5, n) + 1e-3).astype(np.float32)
    samples = rng.random((7, n)).astype(np.float32)
    dark_box = (rng.normal(size=(23, 31)) * 3).astype(np.float32)
    ring = rng.random((23, 31)) < 0.2
    got = _readings.component_summary(w, samples, dark_box, ring)
    expect = [w.mean(), w.max(), w.std(), dark_box[ring].mean(),
              np.average(samples[0], weights=w), np.average(samples[1], weights=w),
              np.average(samples[2], weights=w), samples[1].max(), samples[2].max()]
    assert [float(v) for v in got] == [float(v) for v in expect]
    assert all(np.float32(v) == v for v in got)  # float32 results, as numpy's
    empty = _readings.component_summary(w, samples, dark_box, np.zeros_like(ring))
    assert empty[3] == 0.0


def test_direction_histogram_equals_numpy_on_edges_and_bounds():
    rng = np.random.default_rng(5)
    edges = np.linspace(0.0, 360.0, 73)
    # values on every edge, next to them, at both ends, and out of range
    angles = np.concatenate([rng.uniform(0, 360, 500), edges, np.nextafter(edges, 0), np.nextafter(edges, 400),
                             [-1e-12, 360.0, 360.0 + 1e-9, -5.0]])
    weights = rng.random(angles.size)
    ref, _ = np.histogram(angles, bins=72, range=(0.0, 360.0), weights=weights)
    np.testing.assert_allclose(_readings.direction_histogram(angles, weights, 72), ref, rtol=1e-13, atol=0)
    counts, _ = np.histogram(angles, bins=72, range=(0.0, 360.0))
    np.testing.assert_array_equal(_readings.direction_histogram(angles, np.ones(angles.size), 72), counts)


def test_circular_smoothing_equals_scipy_gaussian_wrap():
    hist = np.random.default_rng(6).random(72)
    weights = np.exp(-0.5 / 1.5**2 * np.arange(-6, 7) ** 2)
    weights /= weights.sum()
    ref = ndimage.gaussian_filter1d(hist, 1.5, mode="wrap", truncate=4.0)
    np.testing.assert_allclose(_readings.circular_smooth(hist, weights), ref, rtol=1e-14, atol=1e-16)


def test_direction_modes_find_two_separated_peaks_and_drop_a_small_one():
    rng = np.random.default_rng(7)
    angles = np.concatenate([rng.normal(40, 4, 400), rng.normal(130, 4, 300), rng.normal(250, 2, 10)]) % 360
    weights = np.ones(angles.size)
    smoothing = np.exp(-0.5 / 1.5**2 * np.arange(-6, 7) ** 2)
    modes = _readings.direction_modes(angles, weights, 25.0, 0.08, smoothing / smoothing.sum(), 72)
    assert len(modes) == 2
    assert abs(modes[0] - 40) <= 5 and abs(modes[1] - 130) <= 5  # strongest first


@pytest.mark.parametrize("seed", range(4))
def test_axis_moments_follow_numpy_with_lapacks_eigenvector(seed):
    # the moments written with numpy's np.cov, np.linalg.eigh and np.average
    rng = np.random.default_rng(20 + seed)
    xs, ys = rng.gamma(2.0, 6.0, 400), rng.normal(30, 4, 400)
    w32 = (rng.random(400) + 0.05).astype(np.float32)
    w = w32.astype(np.float64)
    cx, cy = np.average(xs, weights=w), np.average(ys, weights=w)
    dx, dy = xs - cx, ys - cy
    evals, evecs = np.linalg.eigh(np.cov(np.vstack([dx, dy]), aweights=w))
    ux, uy = evecs[:, 1]
    s, t = dx * ux + dy * uy, -dx * uy + dy * ux
    sd = np.sqrt(max(np.average(s**2, weights=w), 1e-6))
    skew = np.average(s**3, weights=w) / sd**3
    wp, wn = np.sqrt(np.mean(t[s > 0] ** 2)), np.sqrt(np.mean(t[s < 0] ** 2))
    dp, dn = np.mean(w32[s > 0]), np.mean(w32[s < 0])
    expect = [max(evals[0], 0.25), max(evals[1], 0.25), skew, (wp - wn) / (wp + wn), (dp - dn) / (dp + dn)]
    np.testing.assert_allclose(_readings.axis_moments(xs, ys, w, w32), expect, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("seed", range(5))
def test_weighted_moments_match_numpy_cov_and_eigh(seed):
    rng = np.random.default_rng(seed)
    xs, ys = rng.normal(50, 8, 300), rng.normal(40, 3, 300)
    xs, ys = xs + 0.5 * ys, ys
    w = rng.random(300) + 0.1
    cov = np.cov(np.vstack([xs - xs.mean(), ys - ys.mean()]), aweights=w)
    np.testing.assert_allclose(_readings._cov2(xs - xs.mean(), ys - ys.mean(), w), cov, rtol=1e-12)
    evals, evecs = np.linalg.eigh(cov)
    small, big, ux, uy = _readings._eigh2(cov)
    np.testing.assert_allclose([small, big], evals, rtol=1e-12)
    assert abs(abs(ux * evecs[0, 1] + uy * evecs[1, 1]) - 1.0) < 1e-12  # the same axis, either sign
    # the spot reading of an unweighted cloud: centre and axes from numpy's mean and cov
    cx, cy, axis, a, b = _readings.spot_reading(xs, ys)
    ev = np.linalg.eigvalsh(np.cov(np.vstack([xs, ys])))
    np.testing.assert_allclose([cx, cy, a, b], [xs.mean(), ys.mean(), 2 * np.sqrt(ev[1]), 2 * np.sqrt(ev[0])],
                               rtol=1e-12)
    ref_axis = np.degrees(np.arctan2(evecs[0, 1], -evecs[1, 1])) % 180.0  # unweighted axis is close
    assert axial_difference(axis, ref_axis) < 5.0


def test_joined_patch_fields_read_as_each_field(grid_and_values):
    _, grid, values = grid_and_values
    fields = [PatchField(values[:, :1], grid), PatchField(values[:, 1:], grid)]
    joined = PatchField.joined(fields)
    ys, xs = np.array([0, 17, 40, 63]), np.array([5, 0, 33, 70])
    np.testing.assert_array_equal(joined.at(ys, xs), np.concatenate([f.at(ys, xs) for f in fields], axis=1))


@pytest.mark.parametrize("shape", [(664, 864), (30, 20), (5, 70)])
@pytest.mark.parametrize("size", [51, 21, 4, 3, 1])
def test_box_mean_equals_scipy_uniform_filter_to_the_last_bit(shape, size):
    image = np.random.default_rng(size).random(shape).astype(np.float32)
    image[image < 0.2] = 0.0
    ref = ndimage.uniform_filter(image, size, mode="constant")
    assert _box_mean(image, size).tobytes() == ref.tobytes()


@pytest.mark.parametrize("with_nodata", [False, True])
def test_local_darkness_follows_its_formula(with_nodata):
    # The documented formula, written out with scipy.ndimage's box filter: background = box(box(image
    # on valid)) / box(box(valid)); darkness = (background - image) / (1.4826 MAD) of the residual.
    rng = np.random.default_rng(3)
    image = rng.random((70, 90)).astype(np.float32)
    valid = np.ones(image.shape, dtype=bool)
    if with_nodata:
        valid[:, :12] = False
    num = np.where(valid, image, 0.0).astype(np.float32)
    den = valid.astype(np.float32)
    for _ in range(2):
        num = ndimage.uniform_filter(num, 21, mode="constant")
        den = ndimage.uniform_filter(den, 21, mode="constant")
    resid = np.where(valid, num / np.maximum(den, 1e-6) - image, 0.0)
    values = resid[valid][::4]
    mad = 1.4826 * np.median(np.abs(values - np.median(values)))
    expected = resid / mad
    assert expected.dtype == np.float32
    for _ in range(2):  # the second call uses the cached weights of a wholly valid tile
        # to the last bit: the compiled passes do numpy's and scipy's float32 arithmetic
        assert local_darkness(image, valid, background_px=21).tobytes() == expected.tobytes()


def test_local_darkness_is_zero_on_a_flat_tile():
    dark = local_darkness(np.full((120, 140), 0.4), np.ones((120, 140), bool))
    assert dark.dtype == np.float32
    np.testing.assert_array_equal(dark, 0.0)


def test_local_darkness_ignores_an_illumination_ramp():
    shape = (200, 240)
    ramp = np.linspace(0.3, 0.7, shape[1])[None, :] * np.ones(shape)
    image = ramp + _frost(shape, 1) - 0.6
    valid = np.ones(shape, bool)
    dark = local_darkness(image, valid)
    # Away from the borders (half a box) the ramp is removed; what is left is the noise.
    inner = dark[60:-60, 60:-60]
    assert np.abs(np.median(inner)) < 0.3
    assert np.quantile(np.abs(inner), 0.99) < 4.0


def test_local_darkness_is_large_on_a_dark_disk():
    shape = (200, 200)
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    disk = np.hypot(xx - 100, yy - 100) <= 8
    image = _frost(shape, 2) - 0.2 * disk
    dark = local_darkness(image, np.ones(shape, bool))
    assert np.median(dark[disk]) > 5.0
    assert np.median(dark[~disk]) < 1.0


def test_local_darkness_is_zero_on_nodata():
    image = _frost((100, 100), 3)
    valid = np.ones((100, 100), bool)
    valid[:, :30] = False
    dark = local_darkness(image, valid)
    np.testing.assert_array_equal(dark[:, :30], 0.0)


# --------------------------------------------------------------------------- candidates


@pytest.mark.parametrize("direction", [0.0, 90.0, 180.0, 270.0, 135.0, 320.0])
def test_one_wedge_gives_a_fan_reading_at_its_apex_and_direction(direction):
    candidates = _candidates(_fan_scene([direction], spread=30.0))
    fans = _fan_readings(candidates)
    assert len(candidates) == 1 and fans
    best = max(fans, key=lambda f: f["_pixels"].sum())
    # Direction convention (detector.geometry): 90 points to +x, 180 to +y.
    assert angular_difference(best["direction_deg"], direction) < 10.0
    # The grey opening removes the tip narrower than open_px: it reaches
    # open_px / (2 tan(spread / 2)) px from the apex (about 9 px at 30 degrees).
    tip = AssemblyParams().open_px / (2 * np.tan(np.radians(30.0 / 2)))
    assert np.hypot(best["x_px"] - APEX[0], best["y_px"] - APEX[1]) <= tip + 3.0
    assert 0.6 * 70.0 <= best["length_px"] <= 1.1 * 70.0


def test_direction_convention_with_a_wedge_to_the_right():
    fans = _fan_readings(_candidates(_fan_scene([90.0], spread=30.0)))
    best = max(fans, key=lambda f: f["_pixels"].sum())
    # A fan pointing to +x has its pixels to the right of its apex.
    assert best["direction_deg"] == pytest.approx(90.0, abs=10.0)


def test_two_wedges_sharing_a_vent_give_two_fans():
    fans = _fan_readings(_candidates(_fan_scene([60.0, 200.0], spread=30.0)))
    assert len(fans) >= 2
    for truth in (60.0, 200.0):
        err = min(angular_difference(f["direction_deg"], truth) for f in fans)
        assert err < 10.0, (truth, [f["direction_deg"] for f in fans])
        near = min(fans, key=lambda f: angular_difference(f["direction_deg"], truth))
        assert np.hypot(near["x_px"] - APEX[0], near["y_px"] - APEX[1]) <= 15.0


def test_a_small_dark_disk_gives_a_spot_reading():
    radius = 8.0
    yy, xx = np.mgrid[: SHAPE[0], : SHAPE[1]]
    image = _frost(SHAPE, 4) - 0.3 * (np.hypot(xx - 90, yy - 130) <= radius)
    candidates = _candidates(image)
    assert len(candidates) == 1
    spot = candidates[0].spot
    assert spot["kind"] == "spot"
    assert np.hypot(spot["x_px"] - 90, spot["y_px"] - 130) < 1.5
    assert spot["semi_major_px"] == pytest.approx(radius, rel=0.3)
    assert spot["semi_minor_px"] == pytest.approx(radius, rel=0.3)


def test_thin_dark_lines_give_no_candidates():
    # Channels 1-2 px wide are thinner than the grey opening and must not become objects.
    image = _frost(SHAPE, 5)
    image[30:190, 100] -= 0.3
    image[110, 20:200] -= 0.3
    image[40:42, 20:200] -= 0.3
    assert _candidates(image) == []


# --------------------------------------------------------------------------- readings and objects


@pytest.fixture(scope="module")
def two_candidates():
    """A two-fan wedge pair and a separate disk: two candidates."""
    image = _fan_scene([60.0, 200.0], spread=30.0)
    yy, xx = np.mgrid[: SHAPE[0], : SHAPE[1]]
    image[np.hypot(xx - 40, yy - 40) <= 7] -= 0.3
    candidates = _candidates(image)
    assert len(candidates) >= 2
    return candidates


def test_candidate_rows_follow_reading_matrix_order(two_candidates):
    F, owner, which = reading_matrix(two_candidates)
    rows = candidate_rows(two_candidates, tile_id="t1")
    assert len(rows) == len(F) == len(owner) == len(which)
    for i, (o, w) in enumerate(zip(owner, which)):
        c = two_candidates[o]
        reading = c.spots[-1 - w] if w < 0 else c.fans[w]
        assert rows.loc[i, "kind"] == reading["kind"]
        assert rows.loc[i, "x_px"] == pytest.approx(reading["x_px"])
        assert rows.loc[i, "direction_deg"] == pytest.approx(reading["direction_deg"])
        np.testing.assert_array_equal(F[i, -len(reading["_features"]):], np.round(reading["_features"], 4))
    assert (rows["tile_id"] == "t1").all()


def _scores(candidates, fan_score, spot_score):
    _, _, which = reading_matrix(candidates)
    return np.where(which >= 0, fan_score, spot_score)


def _modes_fans(c):
    return sum(1 for f in c.fans if f["_hyp"] == HYP_MODES)


def test_objects_pick_fans_when_fan_readings_score_higher(two_candidates):
    objects, pixels = objects_from_candidates(two_candidates, _scores(two_candidates, 0.9, 0.3))
    # Equal scores: the interpretation with the most fans above the threshold (the modes) is kept.
    n_fans = sum(_modes_fans(c) for c in two_candidates)
    assert (objects["kind"] == "fan").sum() == n_fans and len(pixels) == len(objects)
    assert np.allclose(objects["score"], 0.9)
    assert np.allclose(objects["fan_vote_share"], 0.9 / 1.2)


def test_objects_keep_one_interpretation_per_component(two_candidates):
    # A high score on the whole-axis reading outweighs weaker modes: one fan per component, never both.
    _, owner, which = reading_matrix(two_candidates)
    scores = np.full(len(which), 0.1)
    for i, (o, w) in enumerate(zip(owner, which)):
        if w >= 0:
            hyp = two_candidates[o].fans[w]["_hyp"]
            scores[i] = 0.99 if hyp == HYP_AXIS_FORWARD else (0.55 if hyp == HYP_MODES else 0.1)
    objects, _ = objects_from_candidates(two_candidates, scores)
    assert len(objects) == len(two_candidates)
    assert np.allclose(objects["score"], 0.99)


def test_objects_pick_the_spot_when_it_scores_higher(two_candidates):
    objects, _ = objects_from_candidates(two_candidates, _scores(two_candidates, 0.3, 0.8))
    assert (objects["kind"] == "spot").sum() == len(two_candidates)
    assert objects["direction_confidence"].isna().all()


def test_objects_keep_fans_and_spot_of_one_component_when_both_score(two_candidates):
    # Fans growing out of a dark spot at their vent are mapped as fans and as a spot (common practice in
    # consensus marking), so a component keeps both when both clear the threshold: the fans of its best
    # interpretation and its spot, over the whole component.
    objects, pixels = objects_from_candidates(two_candidates, _scores(two_candidates, 0.9, 0.8))
    assert (objects["kind"] == "fan").sum() == sum(_modes_fans(c) for c in two_candidates)
    assert (objects["kind"] == "spot").sum() == len(two_candidates)
    spots = [p for k, p in zip(objects["kind"], pixels) if k == "spot"]
    assert sorted(len(ys) for ys, _ in spots) == sorted(len(c.ys) for c in two_candidates)
    # A spot below the threshold stays out, whatever its fans score.
    objects, _ = objects_from_candidates(two_candidates, _scores(two_candidates, 0.9, 0.45))
    assert (objects["kind"] == "spot").sum() == 0


def test_objects_respect_min_score(two_candidates):
    scores = _scores(two_candidates, 0.45, 0.2)
    kept, _ = objects_from_candidates(two_candidates, scores, params=AssemblyParams(min_score=0.5))
    assert len(kept) == 0
    kept, _ = objects_from_candidates(two_candidates, scores, params=AssemblyParams(min_score=0.4))
    assert len(kept) == sum(_modes_fans(c) for c in two_candidates)
    assert (kept["score"] >= 0.4).all()


@pytest.mark.parametrize("seed", range(6))
def test_components_are_numbered_and_described_as_scipy_does(seed):
    # scipy.ndimage.label (default 4-connected cross), find_objects and numpy's bincount
    # and nonzero are the reference for the one compiled labelling pass.
    from detector.tile import _kernels

    rng = np.random.default_rng(seed)
    shape = tuple(int(v) for v in rng.integers(1, 140, 2)) if seed else (664, 864)
    if seed % 2:
        mask = rng.random(shape) < rng.uniform(0.3, 0.7)  # many merging runs, U and spiral shapes
    else:
        mask = ndimage.binary_dilation(rng.random(shape) < 0.01, iterations=3)
    level = rng.random(shape).astype(np.float32) * 4
    ref, n = ndimage.label(mask)
    labels, area, seeded, box, start, rows, cols = _kernels.label_components(mask, level, np.float32(3.0))
    np.testing.assert_array_equal(labels, ref)
    assert labels.dtype == ref.dtype and area.size == n
    np.testing.assert_array_equal(area, np.bincount(ref.ravel(), minlength=n + 1)[1:])
    hit = np.zeros(n + 1, dtype=bool)
    hit[ref[level >= 3.0]] = True
    np.testing.assert_array_equal(seeded, hit[1:])
    assert [tuple(b) for b in box] == [(s[0].start, s[0].stop, s[1].start, s[1].stop)
                                       for s in ndimage.find_objects(ref)]
    for k in rng.choice(n, size=min(n, 25), replace=False) if n else []:
        ys, xs = np.nonzero(ref == k + 1)
        np.testing.assert_array_equal(rows[start[k]:start[k + 1]], ys)
        np.testing.assert_array_equal(cols[start[k]:start[k + 1]], xs)


def test_spiral_component_merges_to_one_label():
    # a spiral meets itself from below many times: every provisional label merges into one
    from detector.tile import _kernels

    mask = np.zeros((41, 41), dtype=bool)
    r0, r1, c0, c1 = 0, 40, 0, 40
    while r0 <= r1 and c0 <= c1:
        mask[r0, c0:c1 + 1] = mask[r0:r1 + 1, c1] = mask[r1, c0:c1 + 1] = True
        mask[r0 + 2:r1 + 1, c0] = True
        if r0 + 2 <= r1:
            mask[r0 + 2, c0:c1 - 1] = True
        r0, r1, c0, c1 = r0 + 4, r1 - 4, c0 + 2, c1 - 4
    ref, n = ndimage.label(mask)
    labels, area, *_ = _kernels.label_components(mask, np.zeros(mask.shape, np.float32), np.float32(1.0))
    np.testing.assert_array_equal(labels, ref)
    assert area.size == n


@pytest.mark.parametrize("shape", [(664, 864), (30, 20), (5, 70), (3, 3)])
@pytest.mark.parametrize("sigma", [0.7, 1.0, 2.5, 3.0])  # radius 3 (odd), 4, 10, 12
def test_gaussian_equals_scipy_gaussian_filter_to_the_last_bit(shape, sigma):
    from detector.tile import _kernels

    image = (np.random.default_rng(9).random(shape) * 5).astype(np.float32)
    image[image < 1] = 0
    ref = ndimage.gaussian_filter(image, sigma)
    assert _kernels.gaussian(image, sigma).tobytes() == ref.tobytes()
    wide = image.astype(np.float64)
    assert _kernels.gaussian(wide, sigma).tobytes() == ndimage.gaussian_filter(wide, sigma).tobytes()


@pytest.mark.parametrize("seed", range(4))
def test_city_block_ring_equals_scipy_iterated_dilation(seed):
    from detector.tile import _kernels

    rng = np.random.default_rng(30 + seed)
    local = ndimage.binary_opening(rng.random((40, 55)) > 0.7)
    local[0, :4] = True  # touching the box edge
    valid = rng.random(local.shape) > 0.1
    ref = ndimage.binary_dilation(local, iterations=5) & ~local & valid
    np.testing.assert_array_equal(_kernels.city_block_ring(local, valid, 5), ref)


def test_patch_field_compiled_read_equals_numpy(grid_and_values):
    _, grid, values = grid_and_values
    field = PatchField(values, grid)
    rng = np.random.default_rng(31)
    ys, xs = rng.integers(-3, 155, 500), rng.integers(-3, 175, 500)
    assert field.at(ys, xs).tobytes() == field.at_numpy(ys, xs).tobytes()


@pytest.mark.parametrize("shape", [(40, 55), (5, 9), (3, 30)])
def test_separable_running_maximum_equals_scipy_maximum_filter(shape):
    from detector.tile import _kernels

    x = np.random.default_rng(shape[0]).random(shape).astype(np.float32)
    mine = _kernels.running_extreme(_kernels.running_extreme(x, 15, 0, True), 15, 1, True)
    assert mine.tobytes() == ndimage.maximum_filter(x, size=15).tobytes()


@pytest.mark.parametrize("n", [1, 2, 3, 8, 39, 1000, 1001])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_median_equals_numpy_to_the_last_bit(n, dtype):
    from detector.objects.assemble import _median

    v = (np.random.default_rng(n).standard_normal(n) * 3).astype(dtype)
    v[::5] = np.round(v[::5])  # ties
    mine, ref = _median(v), np.median(v)
    assert type(mine) is type(ref) and mine.tobytes() == np.asarray(ref).tobytes()


# --------------------------------------------------------------------------- interpretations


def _wedge(shape, apex, direction, length, spread, *, depth=0.45, apex_width=0.5, seed=0):
    """A thin wedge (half-width apex_width + t tan(spread / 2)) darkest at its apex, blurred like an image."""
    rows, cols = np.mgrid[: shape[0], : shape[1]].astype(float)
    uc, ur = np.sin(np.radians(direction)), -np.cos(np.radians(direction))
    t = (cols - apex[0]) * uc + (rows - apex[1]) * ur
    s = -(cols - apex[0]) * ur + (rows - apex[1]) * uc
    inside = (t >= 0) & (t <= length) & (np.abs(s) <= apex_width + t * np.tan(np.radians(spread / 2)))
    image = _frost(shape, seed)
    image[inside] *= 1.0 - depth * np.exp(-1.2 * t[inside] / length)
    return ndimage.gaussian_filter(image, 0.8)


@pytest.mark.parametrize("direction", [60.0, 200.0, 315.0])
def test_short_thin_wedge_has_an_axis_reading_from_its_apex(direction):
    # A 20 px wedge: its blurred darkness peaks mid-fan, so the vent readings start there; the
    # whole-component reading along the principal axis starts at the wedge's narrow end.
    image = _wedge((160, 160), (80.0, 80.0), direction, 20.0, 25.0)
    fans = _fan_readings(_candidates(image))
    axis = [f for f in fans if f["_hyp"] in (HYP_AXIS_FORWARD, HYP_AXIS_REVERSE)]
    assert len(axis) == 2
    right = min(axis, key=lambda f: angular_difference(f["direction_deg"], direction))
    wrong = max(axis, key=lambda f: angular_difference(f["direction_deg"], direction))
    assert angular_difference(right["direction_deg"], direction) < 12.0
    assert np.hypot(right["x_px"] - 80.0, right["y_px"] - 80.0) <= 4.0
    widening = OBJECT_FEATURE_NAMES.index("read_widening") - len(OBJECT_FEATURE_NAMES)
    # The dark mass widens away from the true apex and narrows away from the far end.
    assert right["_features"][widening] > 0 > wrong["_features"][widening]


def test_mass_profile_of_a_sector_darkest_at_its_apex():
    row = dict(kind="fan", x_px=60.0, y_px=60.0, direction_deg=135.0, length_px=50.0, opening_deg=40.0)
    cover = rasterise_features(pd.DataFrame([row]), (140, 140)).fan_cover
    ys, xs = np.nonzero(cover)
    w = np.exp(-np.hypot(xs - 60.0, ys - 60.0) / 25.0)
    widening, fading, apex_dark = _readings.mass_profile(xs.astype(float), ys.astype(float), w, 60.0, 60.0, 135.0, 50.0)
    # A wedge's half-width grows as t tan(h) with pixel density growing as t: the RMS lateral offset of a
    # third [a, b] of its length is tan(h) / sqrt(3) * sqrt((b^4 - a^4) / (2 (b^2 - a^2))), i.e.
    # 0.2357 L for the near third and 0.8498 L for the far one, so (far - near) / (far + near) = 0.566
    # (integration by hand; the sector's round end changes it a little).
    assert widening == pytest.approx((0.8498 - 0.2357) / (0.8498 + 0.2357), abs=0.05)
    assert fading > 0.3 and apex_dark > 1.0
    far_x, far_y = 60.0 + 50.0 * np.sin(np.radians(135.0)), 60.0 - 50.0 * np.cos(np.radians(135.0))
    back = _readings.mass_profile(xs.astype(float), ys.astype(float), w, far_x, far_y, 315.0, 50.0)
    assert back[0] < 0 and back[1] < 0


def _disc_scene(centres, radius, *, depth=0.3, seed=3):
    """Frost with uniformly dark discs, lightly blurred as an orbital camera would."""
    image = _frost(SHAPE, seed)
    yy, xx = np.mgrid[: SHAPE[0], : SHAPE[1]]
    for cx, cy in centres:
        image[np.hypot(xx - cx, yy - cy) <= radius] -= depth
    return ndimage.gaussian_filter(image, 1.0)


def test_touching_spots_are_read_one_around_each_vent():
    # Two dark discs of radius 10 px whose rims touch make one component. Read around its vents they are
    # two spots at the discs' centres, each of semi-axes near 10 px: a uniform disc of radius r has
    # variance r^2 / 4 along every axis (standard result), so its 2-sigma semi-axes equal r.
    centres = [(90.0, 110.0), (109.0, 110.0)]
    candidates = _candidates(_disc_scene(centres, 10.0))
    assert len(candidates) == 1
    spots = candidates[0].vent_spots
    assert len(spots) == 2
    found = sorted((s["x_px"], s["y_px"]) for s in spots)
    for (x, y), (cx, cy) in zip(found, centres):
        assert np.hypot(x - cx, y - cy) <= 2.5
    for s in spots:
        assert 6.0 <= s["semi_minor_px"] <= s["semi_major_px"] <= 12.0
        assert s["_pixels"].sum() < len(candidates[0].xs)
    # The whole component read as one spot sits between them and is longer than either disc.
    assert candidates[0].spot["x_px"] == pytest.approx(99.5, abs=2.0)
    assert candidates[0].spot["semi_major_px"] > 15.0


def test_a_lone_spot_is_not_read_twice():
    # One disc: its vent's spot would be the component's own spot, so no vent spot is read.
    candidates = _candidates(_disc_scene([(110.0, 110.0)], 10.0))
    assert len(candidates) == 1 and candidates[0].vent_spots == []


def test_a_fan_growing_out_of_a_spot_is_also_read_as_the_spot():
    # A dark disc of radius 8 px at a fan's apex: one spot is read around the vent, near the apex, and
    # the whole component's spot lies far down the fan.
    image = _fan_scene([60.0], spread=30.0)
    yy, xx = np.mgrid[: SHAPE[0], : SHAPE[1]]
    image[np.hypot(xx - APEX[0], yy - APEX[1]) <= 8] -= 0.3
    (candidate,) = _candidates(image)
    near = [np.hypot(s["x_px"] - APEX[0], s["y_px"] - APEX[1]) for s in candidate.vent_spots]
    assert len(near) == 1 and near[0] <= 10.0
    assert np.hypot(candidate.spot["x_px"] - APEX[0], candidate.spot["y_px"] - APEX[1]) > 20.0


def test_objects_keep_vent_spots_when_they_outscore_the_whole_component():
    candidates = _candidates(_disc_scene([(90.0, 110.0), (109.0, 110.0)], 10.0))
    F, owner, which = reading_matrix(candidates)
    # the vent spots at 0.8 each outweigh the whole component's spot at 0.9: both are kept, not the whole
    scores = np.where(which == -1, 0.9, np.where(which < -1, 0.8, 0.0))
    objects, pixels = objects_from_candidates(candidates, scores)
    assert list(objects["kind"]) == ["spot", "spot"] and np.allclose(objects["score"], 0.8)
    assert sum(len(ys) for ys, _ in pixels) < len(candidates[0].xs)
    # one vent spot at 0.8 against the whole at 0.9: the whole component is the spot
    scores = np.where(which == -1, 0.9, np.where(which == -2, 0.8, 0.0))
    objects, pixels = objects_from_candidates(candidates, scores)
    assert len(objects) == 1 and objects["score"].iloc[0] == pytest.approx(0.9)
    assert len(pixels[0][0]) == len(candidates[0].xs)


def test_reading_features_have_the_named_length():
    candidates = _candidates(_fan_scene([60.0, 200.0], spread=30.0))
    F, _, which = reading_matrix(candidates)
    assert F.shape[1] == len(OBJECT_FEATURE_NAMES)
    hyp_cols = [OBJECT_FEATURE_NAMES.index(n) for n in ("read_from_modes", "read_from_vents", "read_from_axis")]
    # every fan reading belongs to exactly one interpretation; the whole component's spot to none, the
    # spots around its vents to the vents
    np.testing.assert_array_equal(F[:, hyp_cols].sum(axis=1), (which != -1).astype(np.float32))
    np.testing.assert_array_equal(F[which < -1, OBJECT_FEATURE_NAMES.index("read_from_vents")], 1.0)


def _faint_fan(seed, shape=(300, 300)):
    """A 60 px fan of 50 deg darkening blurred frost by about three times its pixel noise: its
    cover, the tile's darkness map and validity."""
    row = dict(kind="fan", x_px=100.0, y_px=150.0, direction_deg=90.0, length_px=60.0, opening_deg=50.0)
    cover = rasterise_features(pd.DataFrame([row]), shape).fan_cover
    rng = np.random.default_rng(seed)
    image = ndimage.gaussian_filter(0.6 + 0.02 * rng.standard_normal(shape) - 0.016 * cover, 1.0)
    valid = np.ones(shape, bool)
    return cover, local_darkness(image.astype(np.float32), valid), valid


@pytest.mark.parametrize("seed", range(4))
def test_faint_broad_fan_is_seeded_on_the_smoothed_darkness(seed):
    # No single pixel of the faint fan reaches seed_k, but its smoothed darkness stands far above the
    # smoothed map's spread.
    cover, dark, valid = _faint_fan(seed)
    class_maps, polarity_maps = _uniform_maps(cover.shape)

    def covered(params):
        found = find_candidates(dark, valid, class_maps, polarity_maps, params=params)
        return max((cover[c.ys, c.xs].sum() for c in found), default=0)

    assert covered(AssemblyParams(broad_seed_k=0.0, deposit_seed=0.0)) == 0
    assert covered(AssemblyParams(deposit_seed=0.0)) > 0.6 * cover.sum()


@pytest.mark.parametrize("seed", range(2))
def test_faint_fan_is_seeded_where_the_classifier_calls_it_a_deposit(seed):
    # The faint fan above with both darkness seeds off: it is kept only where the patch classifier's
    # deposit probability (1 - p_none) over some of its pixels reaches deposit_seed.
    cover, dark, valid = _faint_fan(seed)
    shape = cover.shape
    _, polarity_maps = _uniform_maps(shape)
    quiet = np.empty((3,) + shape, np.float32)
    quiet[:] = np.array([0.9, 0.05, 0.05], np.float32)[:, None, None]
    called = quiet.copy()
    called[0][cover > 0] = 0.3
    called[1][cover > 0] = 0.6

    def covered(class_maps):
        found = find_candidates(dark, valid, class_maps, polarity_maps,
                                params=AssemblyParams(broad_seed_k=0.0, deposit_seed=0.5))
        return max((cover[c.ys, c.xs].sum() for c in found), default=0)

    assert covered(quiet) == 0
    assert covered(called) > 0.6 * cover.sum()


def _objects(rows):
    frame = pd.DataFrame(rows)
    for col in ("direction_deg", "length_px", "opening_deg", "semi_major_px", "semi_minor_px"):
        frame[col] = frame.get(col, 10.0)
    return frame


def test_fans_of_one_vent_start_at_their_score_weighted_source():
    objects = _objects([
        dict(kind="fan", x_px=100.0, y_px=100.0, score=0.9),
        dict(kind="fan", x_px=106.0, y_px=103.0, score=0.6),
        dict(kind="fan", x_px=103.0, y_px=94.0, score=0.3),  # all three pairwise within 12 px
        dict(kind="fan", x_px=150.0, y_px=100.0, score=0.8),  # a vent of its own
        dict(kind="spot", x_px=101.0, y_px=101.0, score=0.9),  # spots keep their centres
    ])
    out = share_vent_sources(objects, 12.0)
    # hand-worked: x = (0.9*100 + 0.6*106 + 0.3*103) / 1.8, y = (0.9*100 + 0.6*103 + 0.3*94) / 1.8
    assert out.loc[:2, "x_px"].tolist() == pytest.approx([(90.0 + 63.6 + 30.9) / 1.8] * 3)
    assert out.loc[:2, "y_px"].tolist() == pytest.approx([(90.0 + 61.8 + 28.2) / 1.8] * 3)
    assert out.loc[3:, ["x_px", "y_px"]].equals(objects.loc[3:, ["x_px", "y_px"]])
    assert out.drop(columns=["x_px", "y_px"]).equals(objects.drop(columns=["x_px", "y_px"]))
    # the input is left as it was
    assert objects.loc[1, "x_px"] == 106.0


def test_shared_sources_do_not_chain_along_a_row_of_vents():
    # Complete linkage (scipy.cluster.hierarchy): 0-1 and 1-2 lie 10 px apart but 0-2 lie 20 px apart,
    # so the three never share one source; sources exactly 12 px apart stay apart (boundary excluded).
    row = _objects([dict(kind="fan", x_px=10.0 * i, y_px=0.0, score=0.5) for i in range(3)])
    out = share_vent_sources(row, 12.0)
    assert len(set(zip(out["x_px"], out["y_px"]))) >= 2
    assert np.ptp(out["x_px"]) > 12.0
    apart = _objects([dict(kind="fan", x_px=0.0, y_px=0.0, score=0.5), dict(kind="fan", x_px=12.0, y_px=0.0,
                                                                             score=0.5)])
    assert share_vent_sources(apart, 12.0)[["x_px"]].equals(apart[["x_px"]])


def test_a_shared_source_lets_the_matching_pair_a_vents_fans_by_direction():
    # Worked example of the matching's rule (distances rounded to 4 px, then direction): two consensus
    # fans of one vent, pointing 0 and 90 deg, whose sources were marked 6 px apart; two detections
    # pointing 88 and 2 deg, whose sources were read on their own pixels, each on the other consensus
    # fan's source. Read apart, each detection is 0 px from the wrong fan and 6 px (the next step but
    # one) from the right one, so both pair the wrong way. At their shared source, 3 px from both
    # consensus sources, distances tie and each pairs by direction.
    from training.evaluation.matching import match_objects

    consensus = pd.DataFrame({"tile_id": "t", "kind": "fan", "x_px": [50.0, 56.0], "y_px": [50.0, 50.0],
                              "direction_deg": [0.0, 90.0], "length_px": [60.0, 60.0],
                              "semi_major_px": np.nan})
    detections = pd.DataFrame({"tile_id": "t", "kind": "fan", "x_px": [50.0, 56.0], "y_px": [50.0, 50.0],
                               "direction_deg": [88.0, 2.0], "score": [0.9, 0.9]})
    apart = match_objects(detections, consensus)
    assert sorted(apart["direction_error_deg"].round(6)) == [88.0, 88.0]
    shared = share_vent_sources(detections, 12.0)
    assert shared["x_px"].tolist() == [53.0, 53.0]
    together = match_objects(shared, consensus)
    assert sorted(together["direction_error_deg"].round(6)) == [2.0, 2.0]


@pytest.mark.parametrize("vent_smooth_px, n_vents", [(2.0, 2), (3.0, 1)])
def test_vents_resolve_two_close_sources_at_the_finer_smoothing(vent_smooth_px, n_vents):
    # Two equal Gaussian blobs (sigma 5 px) 11.2 px apart, smoothed by a Gaussian of sigma g, are a
    # mixture of two Gaussians of sigma sqrt(25 + g^2); such a mixture has two modes only when the
    # separation exceeds twice that sigma (Schilling, Watkins and Watkins 2002, "Is human height
    # bimodal?", The American Statistician 56(3), 223-229; cited from memory): 10.77 px at g = 2,
    # 11.66 px at g = 3. The modes sit at +-u, where u = a tanh(a u / s^2) with a the half separation
    # and s^2 = 25 + g^2 (the zero of the mixture density's derivative).
    sigma, separation = 5.0, 11.2
    yy, xx = np.mgrid[0:61, 0:81].astype(float)
    dark = sum(np.exp(-((xx - 40 - side * separation / 2) ** 2 + (yy - 30) ** 2) / (2 * sigma ** 2))
               for side in (-1, 1)).astype(np.float32)
    mask = dark > 0.05
    ly, lx = np.nonzero(mask)
    params = AssemblyParams(vent_smooth_px=vent_smooth_px, vent_min_separation_px=3)
    vx, vy, _ = _vents(dark, mask, ly, lx, params)
    assert (2 * np.hypot(sigma, vent_smooth_px) < separation) == (n_vents == 2)
    assert len(vx) == n_vents and np.all(vy == 30)
    if n_vents == 1:
        assert vx[0] == 40
    else:
        a, s2, u = separation / 2, sigma ** 2 + vent_smooth_px ** 2, separation / 2
        for _ in range(200):  # the fixed point of u = a tanh(a u / s^2)
            u = a * np.tanh(a * u / s2)
        np.testing.assert_allclose(np.sort(vx), [40 - u, 40 + u], atol=1.0)
