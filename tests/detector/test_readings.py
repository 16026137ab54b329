"""The compiled fan readings (detector/objects/_readings.py) against their numpy reference.

The reference is the numpy code the readings were computed with before they were compiled, kept
here verbatim: the apex, length, spread and concentration of a fan of pixels, the mass profile along
it, its feature row, and the vent and principal-axis interpretations of a component. numpy is the
oracle (np.partition, np.hypot, the @ product, np.cov, np.linalg.eigh); the compiled loops sum in
numpy's pairwise order, so most values agree to the last bit. A fan's concentration takes the sine and
cosine of each pixel's direction as its offset over its distance rather than through the angle
(numpy's arctan2, then sin and cos), which agrees to rounding: hence the relative tolerance of 1e-12.
"""

import numpy as np
import pandas as pd
import pytest

from detector.geometry import angular_difference, direction_deg, unit_vector
from detector.labels import rasterise_features
from detector.objects import _readings
from detector.objects.assemble import (
    _HYPOTHESES,
    _VENT_SPOT_LEVEL,
    _VENT_SPOT_MAX_SHARE,
    AssemblyParams,
    HYP_AXIS_FORWARD,
    HYP_AXIS_REVERSE,
    HYP_MODES,
    HYP_VENTS,
    _MODE_SMOOTHING,
    OBJECT_FEATURE_NAMES,
    _COMPONENT_FEATURES,
    _fan_readings,
    _vent_spots,
)

RTOL = 1e-12
#: Where a reading's own features start in a row of OBJECT_FEATURE_NAMES.
N_COMPONENT = len(_COMPONENT_FEATURES)


# --------------------------------------------------------------------------- numpy reference


def _quantile(values, q):
    """The ``q`` quantile of a 1-D array by the nearest lower rank (one partition)."""
    k = int(q * (values.size - 1))
    return float(np.partition(values, k)[k])


def _fan_geometry(xs, ys, w, start_x, start_y, direction):
    u_col, u_row = unit_vector(direction)
    t = (xs - start_x) * u_col + (ys - start_y) * u_row
    back = min(_quantile(t, 0.01), 0.0)
    fx, fy = start_x + back * u_col, start_y + back * u_row
    dx, dy = xs - fx, ys - fy
    r = np.hypot(dx, dy)
    length = max(_quantile(r, 0.97), 3.0)
    spread = float(np.clip(np.degrees(2.0 * xs.size / length**2), 5.0, 180.0))
    far = r > max(3.0, 0.25 * float(r.max()))
    if far.sum() >= 3:
        phi = np.radians(direction_deg(dx[far], dy[far]))
        wr = w[far] * r[far]
        concentration = float(np.hypot((wr * np.sin(phi)).sum(), (wr * np.cos(phi)).sum()) / max(wr.sum(), 1e-9))
    else:
        concentration = 1.0
    return fx, fy, length, spread, concentration


def _mass_profile(xs, ys, w, fx, fy, direction, length):
    u_col, u_row = unit_vector(direction)
    dx, dy = xs - fx, ys - fy
    t = dx * u_col + dy * u_row
    s = -dx * u_row + dy * u_col
    near, far = t <= length / 3.0, t >= 2.0 * length / 3.0

    def rms(v):
        return float(np.sqrt(np.mean(v * v))) if v.size else 0.0

    wn, wf = rms(s[near]), rms(s[far])
    dn = float(w[near].mean()) if near.any() else 0.0
    df = float(w[far].mean()) if far.any() else 0.0
    close = np.hypot(dx, dy) <= max(length / 6.0, 4.0)
    mean_dark = max(float(w.mean()), 1e-6)
    apex_dark = float(w[close].mean()) / mean_dark if close.any() else 0.0
    return (wf - wn) / max(wf + wn, 1e-6), (dn - df) / max(dn + df, 1e-6), apex_dark


def _describe_fan(hyp, xs, ys, w, samples, mine, fx, fy, direction, length, spread, concentration, vent_dark,
                  fan_mass, has_axis, n_total):
    pxs, pys, pw = xs[mine], ys[mine], w[mine]
    d_col, d_row = unit_vector(direction)
    ws = samples[:, mine]
    weights = np.maximum(pw, 1e-9)
    mean = ws @ weights / weights.sum()
    vote = float(np.clip((mean[3] * d_col + mean[4] * d_row) / fan_mass, -1.0, 1.0))
    doubled = np.radians(2.0 * direction)
    norm = max(float(np.hypot(mean[5], mean[6])), 1e-6)
    axis_agreement = float((mean[5] * np.cos(doubled) + mean[6] * np.sin(doubled)) / norm) if has_axis else 0.0
    axis = float((0.5 * np.degrees(np.arctan2(mean[6], mean[5]))) % 180.0) if has_axis else direction % 180.0
    widening, fading, apex_dark = _mass_profile(pxs, pys, pw, fx, fy, direction, length)
    share = mine.sum() / max(n_total, 1)
    reading = dict(kind="fan", x_px=float(fx), y_px=float(fy), direction_deg=float(direction % 360.0),
                   length_px=float(length), opening_deg=float(spread), _pixels=mine, _hyp=hyp,
                   direction_confidence=0.5 * (1.0 + vote), axis_deg=axis)
    reading["_base"] = [1.0, length, spread, share, vent_dark, float(pw.mean()), vote, float(mean[1]),
                        concentration]
    reading["_shape"] = [widening, fading, apex_dark, axis_agreement]
    return reading


def _alternative_fans(xs, ys, w, samples, vents_x, vents_y, vent_dark, smooth_at, fan_mass, has_axis,
                      min_vent_px, split):
    n = xs.size
    out = []
    if split:
        d2 = (xs[:, None] - vents_x[None, :]) ** 2 + (ys[:, None] - vents_y[None, :]) ** 2
        vent_of = np.argmin(d2, axis=1)
        for k in range(vents_x.size):
            mine = vent_of == k
            if mine.sum() < min_vent_px:
                continue
            dx, dy = xs[mine] - vents_x[k], ys[mine] - vents_y[k]
            r = np.hypot(dx, dy)
            far = r > max(3.0, 0.25 * float(r.max()))
            if far.sum() < 3:
                continue
            phi = np.radians(direction_deg(dx[far], dy[far]))
            wr = w[mine][far] * r[far]
            direction = float(np.degrees(np.arctan2((wr * np.sin(phi)).sum(), (wr * np.cos(phi)).sum())) % 360.0)
            geo = _fan_geometry(xs[mine], ys[mine], w[mine], vents_x[k], vents_y[k], direction)
            out.append(_describe_fan(HYP_VENTS, xs, ys, w, samples, mine, geo[0], geo[1], direction, *geo[2:],
                                     float(vent_dark[k]), fan_mass, has_axis, n))
    if n >= 3:
        cx, cy = np.average(xs, weights=w), np.average(ys, weights=w)
        cov = np.cov(np.vstack([xs - cx, ys - cy]), aweights=w)
        _, vecs = np.linalg.eigh(cov)
        forward = float(direction_deg(vecs[0, 1], vecs[1, 1]))
        everything = np.ones(n, dtype=bool)
        for hyp, direction in ((HYP_AXIS_FORWARD, forward), (HYP_AXIS_REVERSE, (forward + 180.0) % 360.0)):
            geo = _fan_geometry(xs, ys, w, cx, cy, direction)
            apex_dark = float(smooth_at(geo[0], geo[1]))
            out.append(_describe_fan(hyp, xs, ys, w, samples, everything, geo[0], geo[1], direction, *geo[2:],
                                     apex_dark, fan_mass, has_axis, n))
    return out


def _finish_readings(fans):
    count = {h: sum(1 for f in fans if f["_hyp"] == h) for h in _HYPOTHESES}
    for f in fans:
        hyp = f["_hyp"]
        onehot = [float(hyp == HYP_MODES), float(hyp == HYP_VENTS),
                  float(hyp in (HYP_AXIS_FORWARD, HYP_AXIS_REVERSE))]
        f["_features"] = np.array(f.pop("_base") + onehot + [float(count[hyp])] + f.pop("_shape"),
                                  dtype=np.float32)
    return fans


def _reference_readings(component, params, has_axis, split):
    """Every fan reading of a component as the numpy code read them (modes, vents, axis)."""
    c = component
    fan_mass = max(float(np.average(c["samples"][1], weights=c["w32"])), 1e-6)
    rows, owner = c["modes"], c["owner"]
    fans = []
    for j, row in enumerate(rows):
        f = dict(zip(_readings.FAN_FIELDS, (float(v) for v in row)))
        fans.append(_describe_fan(HYP_MODES, c["xs"], c["ys"], c["w"], c["samples"], owner == j, f["x_px"],
                                  f["y_px"], f["direction_deg"], f["length_px"], f["opening_deg"],
                                  f["concentration"], f["vent_dark"], fan_mass, has_axis, c["xs"].size))
    r0, c0 = c["box"][0].start, c["box"][1].start
    local = c["smooth"][c["box"]]

    def smooth_at(x, y):
        r = min(max(int(round(y)) - r0, 0), local.shape[0] - 1)
        col = min(max(int(round(x)) - c0, 0), local.shape[1] - 1)
        return local[r, col]

    fans += _alternative_fans(c["xs"], c["ys"], c["w"], c["samples"], (c["vx"] + c0).astype(float),
                              (c["vy"] + r0).astype(float), c["vent_dark"], smooth_at, fan_mass, has_axis,
                              max(3, params.min_area_px // 2), split)
    return _finish_readings(fans)


def _vent_spots_numpy(xs, ys, w, p_spot, vents_x, vents_y, min_px):
    """The spot around each vent as the numpy code read it: (fields, pixels) per spot."""
    d2 = (xs[:, None] - vents_x[None, :]) ** 2 + (ys[:, None] - vents_y[None, :]) ** 2
    vent_of = np.argmin(d2, axis=1)
    total = float(w.sum())
    out = []
    for k in range(vents_x.size):
        mine = np.flatnonzero(vent_of == k)
        if mine.size < min_px:
            continue
        at_vent = float(w[mine[np.argmin(d2[mine, k])]])
        core = mine[w[mine] >= _VENT_SPOT_LEVEL * at_vent]
        share = float(w[core].sum()) / total
        if core.size < min_px or share >= _VENT_SPOT_MAX_SHARE:
            continue
        spot = _readings.spot_reading(xs[core], ys[core])
        pixels = np.zeros(xs.size, dtype=bool)
        pixels[core] = True
        out.append((list(spot) + [share, at_vent, float(w[core].mean()),
                                  float(np.average(p_spot[core], weights=w[core]))], pixels))
    return out


# --------------------------------------------------------------------------- components


def _sector_pixels(shape, apex, direction, length, opening):
    row = dict(kind="fan", x_px=apex[0], y_px=apex[1], direction_deg=direction, length_px=length,
               opening_deg=opening)
    return rasterise_features(pd.DataFrame([row]), shape).fan_cover > 0


def _component(seed, *, n_vents=3, has_axis=True):
    """A component of two or three fans from nearby vents, with darkness falling away from them, random
    maps under it, and the vent and mode readings that :func:`find_candidates` would pass on."""
    rng = np.random.default_rng(seed)
    shape = (180, 200)
    apexes = [(70.0 + rng.uniform(-3, 3), 90.0 + rng.uniform(-3, 3)), (95.0, 80.0), (82.0, 110.0)][:n_vents]
    cover = np.zeros(shape, bool)
    for ax, ay in apexes:
        cover |= _sector_pixels(shape, (ax, ay), rng.uniform(0, 360), rng.uniform(25, 60), rng.uniform(20, 70))
    ys, xs = np.nonzero(cover)
    box = (slice(int(ys.min()), int(ys.max()) + 1), slice(int(xs.min()), int(xs.max()) + 1))
    xf, yf = xs.astype(float), ys.astype(float)
    dist = np.min([np.hypot(xf - ax, yf - ay) for ax, ay in apexes], axis=0)
    w32 = (np.exp(-dist / 30.0) * 4.0 + 0.3 * rng.random(xs.size)).astype(np.float32)
    smooth = np.zeros(shape, np.float32)
    smooth[ys, xs] = w32
    samples = rng.random((7, xs.size)).astype(np.float32)
    samples[3:] = samples[3:] * 2 - 1  # polarity vector and doubled-angle axis are signed
    if not has_axis:
        samples[5:] = 0.0
    vx = np.array([int(round(ax)) - box[1].start for ax, _ in apexes], dtype=np.int64)
    vy = np.array([int(round(ay)) - box[0].start for _, ay in apexes], dtype=np.int64)
    vent_dark = smooth[vy + box[0].start, vx + box[1].start].astype(np.float64)
    params = AssemblyParams()
    w = w32.astype(np.float64)
    modes, owner, _ = _readings.describe_component(
        xf, yf, (xs - box[1].start).astype(np.int64), (ys - box[0].start).astype(np.int64), w, vx, vy,
        vent_dark, max(3, params.min_area_px // 2), params.split_min_separation_deg, params.split_min_share,
        _MODE_SMOOTHING)
    return dict(xs=xf, ys=yf, w=w, w32=w32, samples=samples, modes=modes, owner=owner, vx=vx, vy=vy,
                vent_dark=vent_dark, smooth=smooth, box=box)


# --------------------------------------------------------------------------- tests


@pytest.mark.parametrize("n", [1, 2, 3, 50, 101, 1000])
@pytest.mark.parametrize("q", [0.0, 0.01, 0.5, 0.97, 1.0])
def test_lower_quantile_is_numpys_partition_at_the_lower_rank(n, q):
    values = np.random.default_rng(n).normal(size=n) * 20.0
    values[::4] = np.round(values[::4])  # ties
    assert _readings.lower_quantile(values, q) == _quantile(values, q)


def _selection_cases():
    rng = np.random.default_rng(3)
    return {
        "normal": rng.standard_normal(40001).astype(np.float32),
        "heavy tails": rng.standard_cauchy(40000).astype(np.float32),
        "ties": np.round(rng.standard_normal(30000) * 3).astype(np.float32),
        "one far outlier": np.r_[np.zeros(20000), rng.random(9000) * 1e-3, [1e30]].astype(np.float32),
        "mostly one value": np.r_[np.full(5000, 2.5), rng.standard_normal(40)].astype(np.float32),
        "middle in the tail": np.r_[rng.random(600) * 1e6, rng.random(400)].astype(np.float64),
        "constant": np.ones(3000, np.float32),
        "strided view": rng.standard_normal(80003)[::4],
        "just above the sort size": rng.standard_normal(257),
        "sorted": np.sort(rng.standard_normal(5000)),
    }


@pytest.mark.parametrize("case", list(_selection_cases()))
def test_middle_pair_is_the_sorted_middle(case):
    # oracle: numpy's sort; the two middle ranks in the array's own dtype
    values = _selection_cases()[case]
    ordered = np.sort(values)
    lower, upper = _readings.middle_pair(values)
    assert (lower, upper) == (ordered[(values.size - 1) // 2], ordered[values.size // 2])
    assert np.asarray(lower, values.dtype) == lower  # exact in the array's dtype


@pytest.mark.parametrize("seed", range(6))
def test_fan_geometry_follows_numpy(seed):
    rng = np.random.default_rng(seed)
    direction = rng.uniform(0, 360)
    cover = _sector_pixels((120, 120), (60.0, 60.0), direction, rng.uniform(8, 50), rng.uniform(10, 90))
    ys, xs = np.nonzero(cover)
    xs, ys = xs.astype(float), ys.astype(float)
    w = rng.random(xs.size) + 0.05
    start = (60.0 + rng.uniform(-4, 4), 60.0 + rng.uniform(-4, 4))  # inside or behind the apex
    got = _readings.fan_geometry(xs, ys, w, *start, direction)
    np.testing.assert_allclose(got, _fan_geometry(xs, ys, w, *start, direction), rtol=RTOL, atol=0)


def test_fan_geometry_of_a_few_near_pixels_has_full_concentration():
    # fewer than three pixels beyond 3 px: concentration 1, length at least 3, spread capped at 180
    xs, ys, w = np.array([10.0, 11.0, 10.0]), np.array([10.0, 10.0, 11.0]), np.ones(3)
    got = _readings.fan_geometry(xs, ys, w, 10.0, 10.0, 45.0)
    assert got == _fan_geometry(xs, ys, w, 10.0, 10.0, 45.0)
    assert got[2:] == (3.0, np.degrees(2.0 * 3 / 9.0), 1.0)


@pytest.mark.parametrize("seed", range(6))
def test_mass_profile_equals_numpy_to_the_last_bit(seed):
    rng = np.random.default_rng(10 + seed)
    direction, length = rng.uniform(0, 360), rng.uniform(6, 60)
    cover = _sector_pixels((140, 140), (70.0, 70.0), direction, length, rng.uniform(15, 80))
    ys, xs = np.nonzero(cover)
    xs, ys = xs.astype(float), ys.astype(float)
    w = rng.gamma(2.0, 1.0, xs.size)
    fx, fy = 70.0 + rng.uniform(-2, 2), 70.0 + rng.uniform(-2, 2)
    assert _readings.mass_profile(xs, ys, w, fx, fy, direction, length) == _mass_profile(
        xs, ys, w, fx, fy, direction, length)


def test_mass_profile_without_near_far_or_close_pixels_is_zero():
    # every pixel in the middle third and beyond the apex radius: widening, fading and apex darkness 0
    xs, ys, w = np.array([0.0, 0.0]), np.array([-50.0, -52.0]), np.ones(2)
    assert _readings.mass_profile(xs, ys, w, 0.0, 0.0, 0.0, 100.0) == (0.0, 0.0, 0.0)


def test_nearest_vent_is_numpys_argmin_first_on_ties():
    rng = np.random.default_rng(4)
    xs, ys = rng.integers(0, 30, 500).astype(float), rng.integers(0, 30, 500).astype(float)
    vents_x, vents_y = np.array([10.0, 20.0, 10.0, 15.0]), np.array([10.0, 10.0, 20.0, 15.0])  # many ties
    vent_of, d_col, minus_d_row = _readings.nearest_vents(xs, ys, vents_x, vents_y)
    ref = np.argmin((xs[:, None] - vents_x[None, :]) ** 2 + (ys[:, None] - vents_y[None, :]) ** 2, axis=1)
    np.testing.assert_array_equal(vent_of, ref)
    np.testing.assert_array_equal(d_col, xs - vents_x[ref])
    np.testing.assert_array_equal(minus_d_row, -(ys - vents_y[ref]))


@pytest.mark.parametrize("seed", range(5))
def test_axis_pulls_are_numpys_weighted_covariance_and_eigenvector(seed):
    c = _component(seed)
    empty = np.empty(0, dtype=np.int64)
    pulls, (cx, cy, ux, uy) = _readings.reading_pulls(c["xs"], c["ys"], c["w"], empty, np.empty(0),
                                                      c["vx"].astype(float), c["vy"].astype(float), 7)
    assert np.isnan(pulls).all()  # vents not read
    ref_cx, ref_cy = np.average(c["xs"], weights=c["w"]), np.average(c["ys"], weights=c["w"])
    _, vecs = np.linalg.eigh(np.cov(np.vstack([c["xs"] - ref_cx, c["ys"] - ref_cy]), aweights=c["w"]))
    np.testing.assert_allclose([cx, cy, ux, uy], [ref_cx, ref_cy, vecs[0, 1], vecs[1, 1]], rtol=RTOL, atol=1e-15)


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("split", [True, False])
@pytest.mark.parametrize("has_axis", [True, False])
def test_fan_readings_follow_the_numpy_readings(seed, split, has_axis):
    c = _component(seed, n_vents=2 + seed % 2, has_axis=has_axis)
    params = AssemblyParams()
    ref = _reference_readings(c, params, has_axis, split)
    got = _fan_readings(c["xs"], c["ys"], c["w"], c["w32"], c["samples"], c["modes"], c["owner"], c["vx"],
                        c["vy"], c["vent_dark"], c["smooth"], c["box"], params, has_axis, split)
    assert [f["_hyp"] for f in got] == [f["_hyp"] for f in ref]
    assert sum(f["_hyp"] == HYP_VENTS for f in got) == (c["vx"].size if split else 0)
    for mine, theirs in zip(got, ref):
        assert mine.keys() == theirs.keys()
        np.testing.assert_array_equal(mine["_pixels"], theirs["_pixels"])
        for key in ("x_px", "y_px", "direction_deg", "length_px", "opening_deg", "direction_confidence", "axis_deg"):
            assert mine[key] == pytest.approx(theirs[key], rel=RTOL, abs=1e-12), key
        assert mine["_features"].dtype == np.float32
        np.testing.assert_allclose(mine["_features"], theirs["_features"], rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("seed", range(6))
def test_vent_spots_follow_the_numpy_spots(seed):
    c = _component(seed, n_vents=2 + seed % 2)
    box = c["box"]
    vents_x, vents_y = (c["vx"] + box[1].start).astype(float), (c["vy"] + box[0].start).astype(float)
    ref = _vent_spots_numpy(c["xs"], c["ys"], c["w"], c["samples"][2], vents_x, vents_y, 7)
    got = _vent_spots(c["xs"], c["ys"], c["w"], c["samples"][2], vents_x, vents_y, 7)
    assert len(got) == len(ref) > 0
    for spot, (fields, pixels) in zip(got, ref):
        np.testing.assert_array_equal(spot["_pixels"], pixels)
        mine = [spot[k] for k in ("x_px", "y_px", "axis_deg", "semi_major_px", "semi_minor_px")]
        features = dict(zip(("read_share", "read_vent_dark", "read_dark_mean", "read_p_fan"), fields[5:]))
        np.testing.assert_allclose(mine, fields[:5], rtol=RTOL, atol=0)
        for name, value in features.items():
            assert spot["_features"][OBJECT_FEATURE_NAMES.index(name) - N_COMPONENT] == np.float32(value), name
        assert spot["_features"][OBJECT_FEATURE_NAMES.index("read_n_siblings") - N_COMPONENT] == len(ref)


def test_no_vent_spot_without_vents():
    c = _component(0)
    assert _vent_spots(c["xs"], c["ys"], c["w"], c["samples"][2], np.empty(0), np.empty(0), 7) == []


def test_a_short_second_fan_of_a_vent_is_its_own_mode():
    # One vent, a 60 px fan pointing up and a 27 px one at 120 deg, both 30 deg wide, uniform darkness.
    shape = (160, 160)
    apex = (80.0, 80.0)
    cover = _sector_pixels(shape, apex, 0.0, 60.0, 30.0) | _sector_pixels(shape, apex, 120.0, 27.0, 30.0)
    ys, xs = np.nonzero(cover)
    xf, yf = xs.astype(float), ys.astype(float)
    w = np.ones(xs.size)
    # The modes are read on the pixels farther than a quarter of the farthest (15 px). Counted by their
    # darkness, the short fan holds 10-14 % of those (its area between 15 and 27 px against the long
    # one's between 15 and 60: 504 / 3879 of the sectors' areas), above the 8 % a mode needs; weighted
    # by distance too, as the modes were before, it held under 8 % and the vent read as one fan.
    r = np.hypot(xf - apex[0], yf - apex[1])
    far = r > 0.25 * r.max()
    short = far & (np.abs(((np.degrees(np.arctan2(xf - apex[0], apex[1] - yf)) - 120.0 + 180.0) % 360.0) - 180.0) < 40)
    assert 0.10 < short.sum() / far.sum() < 0.14
    assert (r[short]).sum() / r[far].sum() < 0.08
    params = AssemblyParams()
    modes, owner, _ = _readings.describe_component(
        xf, yf, xs.astype(np.int64), ys.astype(np.int64), w, np.array([80], np.int64), np.array([80], np.int64),
        np.array([1.0]), max(3, params.min_area_px // 2), params.split_min_separation_deg, params.split_min_share,
        _MODE_SMOOTHING)
    directions = np.sort(modes[:, 2] % 360.0)
    assert len(directions) == 2
    np.testing.assert_allclose(angular_difference(directions, [0.0, 120.0]), 0.0, atol=3.0)
