"""A reading's tile and block context: how the other components' fan readings point.

The expected values are worked by hand from the definitions in
:mod:`detector.objects.context`; angular differences wrap at 360 degrees as
scipy's circular statistics do (``scipy.stats.circmean`` is the reference for
the wrap in the last check). That fans of one place and season point mostly one
way is common practice (fans are read as wind indicators).
"""

import numpy as np
import pytest
from scipy import stats
from skimage import draw

from detector.objects.assemble import AssemblyParams, find_candidates, local_darkness, reading_matrix
from detector.objects.context import (
    BLOCK_TOP_READINGS,
    CONTEXT_BLOCK_TILES,
    CONTEXT_FEATURE_NAMES,
    CONTEXT_WIDTH_DEG,
    block_features,
    block_keys,
    context_blocks,
    context_features,
    context_matrix,
    reading_layout,
    score_logit,
)

COL = {name: i for i, name in enumerate(CONTEXT_FEATURE_NAMES)}


def _three_components():
    # component 0: one fan reading (10 deg, 0.8) and its spot reading (0.1)
    # component 1: a fan reading (20 deg, 0.6) and its spot reading (0.3)
    # component 2: a fan reading (190 deg, 0.4) and its spot reading (0.05)
    owner = np.array([0, 0, 1, 1, 2, 2])
    is_fan = np.array([True, False, True, False, True, False])
    direction = np.array([10.0, np.nan, 20.0, np.nan, 190.0, np.nan])
    score = np.array([0.8, 0.1, 0.6, 0.3, 0.4, 0.05])
    return owner, is_fan, direction, score


def test_worked_example_of_the_first_fan():
    ctx = context_features(*_three_components())
    row = ctx[0]
    # others' fan score: 0.6 (20 deg, agrees) + 0.4 (190 deg, exactly opposite); others' spot score 0.3 + 0.05
    assert row[COL["ctx_agree"]] == pytest.approx(0.6 / 1.5, abs=1e-6)
    assert row[COL["ctx_oppose"]] == pytest.approx(0.4 / 1.5, abs=1e-6)
    assert row[COL["ctx_log_agree"]] == pytest.approx(np.log1p(0.6), abs=1e-6)
    assert row[COL["ctx_log_fan_mass"]] == pytest.approx(np.log1p(1.0), abs=1e-6)
    assert row[COL["ctx_fan_share"]] == pytest.approx(1.0 / (1.0 + 0.35 + 0.5), abs=1e-6)
    assert row[COL["ctx_relative_score"]] == pytest.approx(1.0, abs=1e-6)


def test_worked_example_of_the_opposite_fan_and_a_spot():
    ctx = context_features(*_three_components())
    # the 190 deg fan: 0.8 (10 deg) and 0.6 (20 deg) both lie within 30 deg of 10 = 190 - 180
    assert ctx[4, COL["ctx_agree"]] == 0.0
    assert ctx[4, COL["ctx_oppose"]] == pytest.approx(1.4 / 1.9, abs=1e-6)
    assert ctx[4, COL["ctx_relative_score"]] == pytest.approx(0.5, abs=1e-6)
    # a spot reading has no direction to agree with; it still sees the fan mass around it
    spot = ctx[3]
    assert spot[COL["ctx_agree"]] == spot[COL["ctx_oppose"]] == spot[COL["ctx_log_agree"]] == 0.0
    assert spot[COL["ctx_log_fan_mass"]] == pytest.approx(np.log1p(1.2), abs=1e-6)
    assert spot[COL["ctx_fan_share"]] == pytest.approx(1.2 / (1.2 + 0.15 + 0.5), abs=1e-6)


def test_a_component_never_vouches_for_itself():
    # two fan readings of one component pointing the same way, alone in the tile
    ctx = context_features(np.array([0, 0, 0]), np.array([True, True, False]), np.array([45.0, 50.0, np.nan]),
                           np.array([0.9, 0.9, 0.2]))
    assert np.all(ctx[:, [COL["ctx_agree"], COL["ctx_oppose"], COL["ctx_log_fan_mass"], COL["ctx_fan_share"]]] == 0)


@pytest.mark.parametrize("a, b, agree", [(355.0, 5.0, True), (0.0, CONTEXT_WIDTH_DEG, True),
                                         (0.0, CONTEXT_WIDTH_DEG + 1.0, False), (350.0, 170.0, False)])
def test_directions_wrap_at_360_degrees(a, b, agree):
    ctx = context_features(np.array([0, 1]), np.array([True, True]), np.array([a, b]), np.array([0.5, 0.5]))
    assert (ctx[0, COL["ctx_agree"]] > 0) == agree
    # the wrapped difference, as scipy's circular mean of the two sees it: half the gap from either end
    gap = 2.0 * abs(((stats.circmean([a, b], high=360.0) - a + 180.0) % 360.0) - 180.0)
    assert (gap <= CONTEXT_WIDTH_DEG + 1e-9) == agree


def test_readings_of_other_tiles_are_not_seen():
    owner, is_fan, direction, score = _three_components()
    F = np.zeros((12, 3), np.float32)
    tiles = np.array(["b"] * 6 + ["a"] * 6, dtype=object)
    both = context_matrix(F, np.tile(score, 2), np.tile(owner, 2), np.tile(is_fan, 2), np.tile(direction, 2),
                          group=tiles, block=tiles)
    one = context_matrix(F[:6], score, owner, is_fan, direction)
    np.testing.assert_array_equal(both[:6], one)
    np.testing.assert_array_equal(both[6:], one)
    # columns: the object features, the first score's logit, the context features
    assert one.shape == (6, 3 + 1 + len(CONTEXT_FEATURE_NAMES))
    np.testing.assert_allclose(one[:, 3], np.round(score_logit(score), 4), atol=1e-6)
    np.testing.assert_allclose(score_logit([0.5, 0.0, 1.0]), [0.0, np.log(1e-4 / (1 - 1e-4)), np.log((1 - 1e-4) / 1e-4)],
                               rtol=1e-5)


def test_layout_follows_the_reading_matrix():
    shape = (200, 260)
    image = np.full(shape, 0.6, np.float32)
    for (x0, y0), direction in (((70.0, 100.0), 45.0), ((190.0, 110.0), 135.0)):
        angles = np.radians(direction + np.linspace(-17.5, 17.5, 25))
        xs = np.concatenate([[x0], x0 + 45.0 * np.sin(angles)])
        ys = np.concatenate([[y0], y0 - 45.0 * np.cos(angles)])
        rr, cc = draw.polygon(ys, xs, shape)
        image[rr, cc] = 0.3
    valid = np.ones(shape, bool)
    class_maps = np.empty((3, *shape), np.float32)
    class_maps[:] = np.array([0.2, 0.5, 0.3], np.float32)[:, None, None]
    cands = find_candidates(local_darkness(image, valid), valid, class_maps, np.zeros((2, *shape), np.float32),
                            params=AssemblyParams())
    assert len(cands) == 2
    F, owner, which = reading_matrix(cands)
    lay_owner, is_fan, direction = reading_layout(cands)
    np.testing.assert_array_equal(lay_owner, owner)
    np.testing.assert_array_equal(is_fan, which >= 0)
    assert np.isnan(direction[~is_fan]).all() and np.isfinite(direction[is_fan]).all()
    expected = [f["direction_deg"] for c in cands for f in c.fans]
    np.testing.assert_allclose(direction[is_fan], expected)


BLOCK = {name: i for i, name in enumerate(CONTEXT_FEATURE_NAMES[6:])}


def test_block_features_see_the_other_tiles():
    # the three components of one tile, and a second tile with one fan (15 deg, 0.5) and its spot (0.2)
    owner, is_fan, direction, score = _three_components()
    F = np.zeros((8, 2), np.float32)
    owner = np.concatenate([owner, [0, 0]])
    is_fan = np.concatenate([is_fan, [True, False]])
    direction = np.concatenate([direction, [15.0, np.nan]])
    score = np.concatenate([score, [0.5, 0.2]])
    tiles = np.array(["t1"] * 6 + ["t2"] * 2, dtype=object)
    Z = context_matrix(F, score, owner, is_fan, direction, group=tiles)
    blk = Z[:, 3 + 6:]
    # the first fan (10 deg, 0.8): the others' fan score over both tiles is 0.6 + 0.4 + 0.5, of which 0.6 and
    # 0.5 agree and 0.4 opposes; component 0 of the second tile is another component than component 0 of the first
    assert blk[0, BLOCK["blk_agree"]] == pytest.approx(round(1.1 / 2.0, 4), abs=1e-6)
    assert blk[0, BLOCK["blk_oppose"]] == pytest.approx(round(0.4 / 2.0, 4), abs=1e-6)
    assert blk[0, BLOCK["blk_log_fan_mass"]] == pytest.approx(round(np.log1p(1.5), 4), abs=1e-6)
    # the block's fan first scores are 0.8, 0.6, 0.5 and 0.4: fewer than BLOCK_TOP_READINGS, so all count
    assert BLOCK_TOP_READINGS >= 4
    assert blk[0, BLOCK["blk_top_score"]] == pytest.approx(0.575, abs=1e-6)
    assert blk[6, BLOCK["blk_relative_score"]] == pytest.approx(round(0.5 / 0.575, 4), abs=1e-6)
    # the tile features still see their own tile only
    np.testing.assert_array_equal(Z[:6, :3 + 6], context_matrix(F[:6], score[:6], owner[:6], is_fan[:6],
                                                                 direction[:6])[:, :3 + 6])


def test_block_level_averages_the_best_fan_scores_only():
    scores = np.array([0.9, 0.8, 0.7, 0.6, 0.5, 0.4, 0.1])
    n = len(scores)
    blk = block_features(np.arange(n), np.ones(n, bool), np.zeros(n), scores)
    level = np.sort(scores)[-BLOCK_TOP_READINGS:].mean()
    np.testing.assert_allclose(blk[:, BLOCK["blk_top_score"]], level, rtol=1e-6)
    np.testing.assert_allclose(blk[:, BLOCK["blk_relative_score"]], scores / level, rtol=1e-6)
    # spot readings count in neither the level nor the fan mass; a block without fans has level 0
    none = block_features(np.arange(3), np.zeros(3, bool), np.full(3, np.nan), np.array([0.9, 0.5, 0.2]))
    assert np.all(none[:, BLOCK["blk_top_score"]] == 0) and np.all(none[:, BLOCK["blk_log_fan_mass"]] == 0)
    assert np.isfinite(none).all()


def test_block_keys_gather_four_by_two_tiles():
    # a 2200 x 2800 px image (width x height) cut into 800 x 600 px tiles: 5 rows of 3 tiles, the last
    # row and column smaller; cells of 4 x 2 tiles are measured in the largest tile (2400 x 1600 px)
    assert CONTEXT_BLOCK_TILES == (4, 2)
    rows, cols = np.meshgrid([0.0, 600.0, 1200.0, 1800.0, 2400.0], [0.0, 800.0, 1600.0], indexing="ij")
    width = np.where(cols == 1600.0, 600.0, 800.0)
    height = np.where(rows == 2400.0, 400.0, 600.0)
    keys = block_keys(["img"] * 15, rows.ravel(), cols.ravel(), width.ravel(), height.ravel())
    grid = np.array(keys).reshape(5, 3)
    assert len(set(grid[:4, :2].ravel())) == 1
    assert len(set(keys)) == 4
    assert grid[4, 0] != grid[0, 0] and grid[0, 2] != grid[0, 0] and grid[4, 2] != grid[4, 0]
    # another image never shares a block; tiles of unknown place go 8 to a block, in their order
    assert block_keys(["other"], [0.0], [0.0], [800.0], [600.0])[0] != grid[0, 0]
    n = 17
    unplaced = block_keys(["img"] * n, [np.nan] * n, [np.nan] * n, [800.0] * n, [600.0] * n)
    assert sorted(unplaced.count(k) for k in set(unplaced)) == [1, 8, 8]
    assert unplaced[0] == unplaced[7] != unplaced[8]
    # the blocks as positions, in the tiles' order
    assert context_blocks(["a", "b", "a", "a"], [0.0, 0.0, 600.0, 2400.0], [0.0] * 4, [800.0] * 4,
                          [600.0] * 4) == [[0, 2], [1], [3]]


def _block_by_pairs(component, is_fan, direction, score, width=CONTEXT_WIDTH_DEG):
    """The block's agreement sums written out over every pair of readings (the definition)."""
    n = len(component)
    agree, oppose, mass = np.zeros(n), np.zeros(n), np.zeros(n)
    for i in range(n):
        for j in range(n):
            if component[i] == component[j] or not is_fan[j]:
                continue
            mass[i] += score[j]
            gap = abs((direction[i] - direction[j] + 180.0) % 360.0 - 180.0)
            agree[i] += score[j] * (gap <= width)
            oppose[i] += score[j] * (gap >= 180.0 - width)
    return agree, oppose, mass


def test_block_sums_equal_the_sums_over_every_pair():
    # The block features sum over sorted directions, not over pairs; they must give the pairwise sums.
    rng = np.random.default_rng(7)
    n = 300
    component = rng.integers(0, 40, n)
    is_fan = rng.random(n) < 0.8
    # directions bunched around a few winds, some across 0 / 360; spot readings have none
    winds = rng.choice([0.0, 30.0, 150.0, 210.0, 359.5], n)
    direction = np.where(is_fan, (winds + rng.normal(0.0, 20.0, n)) % 360.0, np.nan)
    score = np.round(rng.random(n), 3)
    agree, oppose, mass = _block_by_pairs(component, is_fan, direction, score)
    blk = block_features(component, is_fan, direction, score)
    prior = 0.5
    np.testing.assert_allclose(blk[:, BLOCK["blk_agree"]], np.where(is_fan, agree / (mass + prior), 0), atol=1e-6)
    np.testing.assert_allclose(blk[:, BLOCK["blk_oppose"]], np.where(is_fan, oppose / (mass + prior), 0), atol=1e-6)
    np.testing.assert_allclose(blk[:, BLOCK["blk_log_fan_mass"]], np.log1p(mass), atol=1e-6)
