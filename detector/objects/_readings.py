"""Compiled description of one dark component: its moments, vents, fan and spot readings.

The loops of :mod:`detector.objects.assemble` written out for numba (CPU, one thread):
each component used to cost some two hundred small numpy calls, and each of its fan
readings (:func:`fan_readings`: apex, length, spread, mass profile, the maps' means)
some sixty more. Sums use numpy's pairwise summation (:func:`psum`, the order of
``np.sum``), quantiles numpy's 'linear' rule or its partition at a rank, histograms
its equal-bin rule and the maps' weighted means its BLAS product, so results follow
numpy's to rounding (transcendental functions may differ from numpy's vectorised
ones in the last bit: the angles that set a reading's direction are left to numpy's
``arctan2``). Directions are degrees clockwise from image up, as in
:mod:`detector.geometry`.
"""

import numpy as np
from numba import njit

from ..tile._kernels import pairwise_block as _block

__all__ = ["psum", "quantile", "lower_quantile", "middle_pair", "direction_histogram", "circular_smooth",
           "direction_modes", "axis_moments", "spot_reading", "describe_component", "component_summary",
           "fan_geometry", "mass_profile", "nearest_vents", "reading_pulls", "fan_readings", "FAN_FIELDS", "SUMMARY_FIELDS",
           "READING_FIELDS", "vent_spots", "VENT_SPOT_FIELDS", "HYP_MODES", "HYP_VENTS", "HYP_AXIS_FORWARD", "HYP_AXIS_REVERSE"]

_DEG = 180.0 / np.pi
_RAD = np.pi / 180.0

#: Columns of the fan rows returned by :func:`describe_component`.
FAN_FIELDS = ("x_px", "y_px", "direction_deg", "length_px", "opening_deg", "concentration", "vent_dark")


@njit(cache=True, nogil=True)
def psum(a):
    """Sum of a 1-D float array in the order and dtype of ``np.sum``: blocks of at most 128
    values, larger runs split in two (the left part a multiple of 8) and the halves
    added. The split is walked with an explicit stack (numba's disk cache does not
    keep recursive functions)."""
    n = a.size
    if n <= 128:
        return _block(a, 0, n)
    los = np.empty(64, dtype=np.int64)
    ns = np.empty(64, dtype=np.int64)
    phase = np.zeros(64, dtype=np.int64)
    left = np.empty(64, dtype=a.dtype)
    top = 0
    los[0], ns[0] = 0, n
    ret = _block(a, 0, 0)
    while top >= 0:
        lo, m = los[top], ns[top]
        if m <= 128:
            ret = _block(a, lo, m)
            top -= 1
            continue
        n2 = m // 2
        n2 -= n2 % 8
        if phase[top] == 0:
            phase[top] = 1
            top += 1
            los[top], ns[top], phase[top] = lo, n2, 0
        elif phase[top] == 1:
            left[top] = ret
            phase[top] = 2
            top += 1
            los[top], ns[top], phase[top] = lo + n2, m - n2, 0
        else:
            ret = left[top] + ret
            top -= 1
    return ret


@njit(cache=True, nogil=True)
def _average(x, w):
    """``np.average(x, weights=w)``: float32 arrays give numpy's float32 result."""
    return psum(x * w) / psum(w)


@njit(cache=True, nogil=True)
def _mean(x):
    """``x.mean()``: for float32, numpy's float32 sum divided in float32."""
    count = np.zeros(1, dtype=x.dtype)
    count[0] = x.size
    return psum(x) / count[0]


@njit(cache=True, nogil=True)
def quantile(values, q):
    """``np.quantile(values, q)`` (method 'linear') of a non-empty 1-D float64 array without NaN."""
    n = values.size
    virtual = (n - 1) * q
    if virtual >= n - 1:
        return values.max()
    lo = int(np.floor(virtual))
    # the two order statistics around the virtual index, by selection (the same values as sorting)
    part = np.partition(values, lo)
    a, b = part[lo], part[lo + 1:].min()
    t = virtual - lo
    diff = b - a
    return b - diff * (1 - t) if t >= 0.5 else a + diff * t


#: Bins of one pass of :func:`middle_pair`'s selection (between the outer two, below and above them).
_SELECT_BINS = 2048


@njit(cache=True, nogil=True)
def middle_pair(values):
    """The two middle order statistics of a non-empty 1-D array without NaN: the values
    of rank ``(n - 1) // 2`` and ``n // 2`` (0-based; equal for odd n), in its dtype.

    The same values as sorting (or ``np.partition`` at both ranks) gives, found by
    bucketing: the values are counted into equal bins between the 1st and 99th
    percentiles of a regular sample of them, with one bin below and one above (the
    bin of a value never decreases as the value grows); only the bins that hold the
    two ranks are kept, and so on until few values are left, which are sorted. A
    pass reads what is left twice, where a partition moves every value several times.
    """
    k_lo, k_hi = (values.size - 1) // 2, values.size // 2
    work = values
    counts = np.zeros(_SELECT_BINS + 2, dtype=np.int64)
    while True:
        m = work.size
        if m <= 256:
            ordered = np.sort(work)
            return ordered[k_lo], ordered[k_hi]
        sample = np.sort(work[::max(m // 512, 1)])
        lo = np.float64(sample[sample.size // 100])
        hi = np.float64(sample[sample.size - 1 - sample.size // 100])
        if not hi > lo:
            lo, hi = np.float64(work.min()), np.float64(work.max())
            if not hi > lo:
                return work[0], work[0]
        scale = _SELECT_BINS / (hi - lo)
        counts[:] = 0
        for i in range(m):
            x = np.float64(work[i])
            if x < lo:
                counts[0] += 1
            elif x > hi:
                counts[_SELECT_BINS + 1] += 1
            else:
                counts[1 + min(int((x - lo) * scale), _SELECT_BINS - 1)] += 1
        before = 0
        b = 0
        while before + counts[b] <= k_lo:
            before += counts[b]
            b += 1
        b_lo, upto = b, before
        while upto + counts[b] <= k_hi:
            upto += counts[b]
            b += 1
        b_hi = b
        kept = upto + counts[b_hi] - before
        if kept == m:  # the two ranks lie in the outer bins: sort what is left
            ordered = np.sort(work)
            return ordered[k_lo], ordered[k_hi]
        nxt = np.empty(kept, dtype=work.dtype)
        j = 0
        for i in range(m):
            x = np.float64(work[i])
            if x < lo:
                b = 0
            elif x > hi:
                b = _SELECT_BINS + 1
            else:
                b = 1 + min(int((x - lo) * scale), _SELECT_BINS - 1)
            if b >= b_lo and b <= b_hi:
                nxt[j] = work[i]
                j += 1
        work = nxt
        k_lo -= before
        k_hi -= before


@njit(cache=True, nogil=True)
def _direction(d_col, d_row):
    return (np.arctan2(d_col, -d_row) * _DEG) % 360.0


@njit(cache=True, nogil=True)
def _angular_difference(a, b):
    d = abs((a - b) % 360.0)
    return min(d, 360.0 - d)


@njit(cache=True, nogil=True)
def _circ_mean(angles, weights):
    rad = angles * _RAD
    return (np.arctan2(psum(weights * np.sin(rad)), psum(weights * np.cos(rad))) * _DEG) % 360.0


@njit(cache=True, nogil=True)
def direction_histogram(angles, weights, n_bins):
    """``np.histogram(angles, bins=n_bins, range=(0, 360), weights=weights)[0]``: numpy's
    equal-bin rule (scaled index corrected against the edges, 360 in the last bin,
    values outside [0, 360] left out), weights added in order."""
    hist = np.zeros(n_bins)
    width = 360.0 / n_bins
    for k in range(angles.size):
        a = angles[k]
        if not (a >= 0.0 and a <= 360.0):
            continue
        i = int(a / 360.0 * n_bins)
        if i == n_bins:
            i -= 1
        if a < i * width:
            i -= 1
        if a >= (i + 1) * width and i != n_bins - 1:
            i += 1
        hist[i] += weights[k]
    return hist


@njit(cache=True, nogil=True)
def circular_smooth(values, weights):
    """Correlation of a circular sequence with symmetric odd-length ``weights``
    (``scipy.ndimage.correlate1d(values, weights, mode='wrap')``)."""
    n = values.size
    radius = weights.size // 2
    out = np.empty(n)
    for i in range(n):
        acc = values[i] * weights[radius]
        for d in range(radius, 0, -1):
            acc += (values[(i - d) % n] + values[(i + d) % n]) * weights[radius - d]
        out[i] = acc
    return out


@njit(cache=True, nogil=True)
def direction_modes(angles, weights, min_separation, min_share, smoothing, n_bins):
    """Peaks of a circularly smoothed, weighted histogram of directions (degrees).

    ``smoothing`` holds the Gaussian weights (odd length, centre in the middle;
    ``scipy.ndimage.gaussian_filter1d`` with mode 'wrap'). A peak becomes a mode
    when the smoothed weight within ``min_separation / 2`` of it is at least
    ``min_share`` of the total and it is ``min_separation`` from every stronger mode.
    """
    smooth = circular_smooth(direction_histogram(angles, weights, n_bins), smoothing)
    width = 360.0 / n_bins
    total = psum(smooth)
    kept = np.empty(0)
    if total <= 0:
        return kept
    peaks = np.empty(n_bins, dtype=np.int64)
    n_peaks = 0
    for i in range(n_bins):
        if smooth[i] >= smooth[(i - 1) % n_bins] and smooth[i] > smooth[(i + 1) % n_bins]:
            peaks[n_peaks] = i
            n_peaks += 1
    peaks = peaks[:n_peaks]
    order = np.argsort(-smooth[peaks], kind="mergesort")
    centres = (np.arange(n_bins) + 0.5) * width
    out = np.empty(n_peaks)
    sel = np.empty(n_bins)
    n_kept = 0
    for p in order:
        c = centres[peaks[p]]
        m = 0
        for i in range(n_bins):
            if _angular_difference(centres[i], c) <= min_separation / 2:
                sel[m] = smooth[i]
                m += 1
        near = psum(sel[:m])
        if near / total < min_share:
            continue
        ok = True
        for k in range(n_kept):
            if _angular_difference(c, out[k]) < min_separation:
                ok = False
                break
        if ok:
            out[n_kept] = c
            n_kept += 1
    return out[:n_kept]


@njit(cache=True, nogil=True)
def _cov2(dx, dy, w):
    """``np.cov(np.vstack([dx, dy]), aweights=w)``: weighted 2 x 2 covariance, unbiased for reliability weights."""
    w_sum = psum(w)
    ax_ = psum(dx * w) / w_sum
    ay_ = psum(dy * w) / w_sum
    fact = w_sum - psum(w * w) / w_sum
    x = dx - ax_
    y = dy - ay_
    inv = 1.0 / fact
    c = np.empty((2, 2))
    c[0, 0] = psum(x * (x * w)) * inv
    c[0, 1] = psum(x * (y * w)) * inv
    c[1, 0] = c[0, 1]
    c[1, 1] = psum(y * (y * w)) * inv
    return c


@njit(cache=True, nogil=True)
def _eigh2(c):
    """Eigenvalues (ascending) and the unit eigenvector of the larger one of a symmetric 2 x 2 matrix.

    The eigenvector's sign is fixed: its larger component (by magnitude) is positive.
    """
    a, b, d = c[0, 0], c[0, 1], c[1, 1]
    half_tr = 0.5 * (a + d)
    root = np.hypot(0.5 * (a - d), b)
    big, small = half_tr + root, half_tr - root
    if root == 0.0:
        ux, uy = 1.0, 0.0
    elif a >= d:
        ux, uy = big - d, b
    else:
        ux, uy = b, big - a
    norm = np.hypot(ux, uy)
    ux, uy = ux / norm, uy / norm
    if abs(ux) >= abs(uy):
        if ux < 0:
            ux, uy = -ux, -uy
    elif uy < 0:
        ux, uy = -ux, -uy
    return small, big, ux, uy


@njit(cache=True, nogil=True)
def _eigh_lapack(c):
    """As :func:`_eigh2`, by LAPACK (``np.linalg.eigh``), whose eigenvector sign the
    skewness, widening and asymmetry of a component follow."""
    evals, evecs = np.linalg.eigh(c)
    return evals[0], evals[1], evecs[0, 1], evecs[1, 1]


@njit(cache=True, nogil=True)
def axis_moments(xs, ys, w, w32):
    """Moments of a component along its principal axis (``w``: darkness weights, float64;
    ``w32``: the same in float32, whose means give the darkness asymmetry, as before).

    Returns
    -------
    minor_var, major_var, skew, widening, asymmetry : float
        Weighted variances across and along the axis (at least 0.25 px^2), the
        weighted skewness along it, the relative widening of the + half over the
        - half, and the relative darkness of the + half over the - half.
    """
    n = xs.size
    cx, cy = _average(xs, w), _average(ys, w)
    dx, dy = xs - cx, ys - cy
    if n > 2:
        small, big, ux, uy = _eigh_lapack(_cov2(dx, dy, w))
    else:
        small, big, ux, uy = 1.0, 1.0, 0.0, 1.0
    s = dx * ux + dy * uy
    t = -dx * uy + dy * ux
    sd = np.sqrt(max(_average(s * s, w), 1e-6))
    skew = _average(s * s * s, w) / sd**3
    pos, neg = s > 0, s < 0
    n_pos, n_neg = pos.sum(), neg.sum()
    wide_pos = np.sqrt(_mean(t[pos] ** 2)) if n_pos > 2 else 0.0
    wide_neg = np.sqrt(_mean(t[neg] ** 2)) if n_neg > 2 else 0.0
    widening = (wide_pos - wide_neg) / max(wide_pos + wide_neg, 1e-6)
    # in float32 throughout, as numpy computes it from float32 means
    dark_pos = _mean(w32[pos]) if n_pos else np.float32(0.0)
    dark_neg = _mean(w32[neg]) if n_neg else np.float32(0.0)
    asym = np.float64((dark_pos - dark_neg) / max(dark_pos + dark_neg, np.float32(1e-6)))
    return max(small, 0.25), max(big, 0.25), skew, widening, asym


@njit(cache=True, nogil=True)
def _std(x):
    """``x.std()``: numpy's two-pass variance in the array's dtype (float32 stays float32)."""
    mean = _mean(x)
    d = x - mean
    return np.sqrt(_mean(d * d))


#: Entries of :func:`component_summary`.
SUMMARY_FIELDS = ("w_mean", "w_max", "w_std", "ring_dark", "p_none", "p_fan", "p_spot", "p_fan_max", "p_spot_max")


@njit(cache=True, nogil=True)
def component_summary(w32, samples, dark_box, ring):
    """Darkness and class statistics of one component, as numpy gives them from float32
    arrays: ``w.mean()``, ``w.max()``, ``w.std()``, ``dark_box[ring].mean()`` (0 for an
    empty ring), ``np.average(p, weights=w)`` of the none, fan and spot probabilities
    (``samples`` rows 0-2) and the largest fan and spot probabilities; float64 (9,)."""
    out = np.empty(len(SUMMARY_FIELDS))
    out[0] = _mean(w32)
    out[1] = w32.max()
    out[2] = _std(w32)
    n_ring = 0
    for v in ring.ravel():
        n_ring += v
    if n_ring:
        vals = np.empty(n_ring, dtype=dark_box.dtype)
        k = 0
        for r in range(ring.shape[0]):
            for c in range(ring.shape[1]):
                if ring[r, c]:
                    vals[k] = dark_box[r, c]
                    k += 1
        out[3] = _mean(vals)
    else:
        out[3] = 0.0
    for j in range(3):
        out[4 + j] = _average(samples[j], w32)
    out[7] = samples[1].max()
    out[8] = samples[2].max()
    return out


@njit(cache=True, nogil=True)
def spot_reading(xs, ys):
    """Centre, axis (degrees mod 180) and semi-axes (px) of a component read as a uniform ellipse."""
    n = xs.size
    cx, cy = _mean(xs), _mean(ys)
    if n > 2:
        small, big, ux, uy = _eigh2(_cov2(xs - cx, ys - cy, np.ones(n)))
    else:
        small, big, ux, uy = 1.0, 1.0, 0.0, 1.0
    small, big = max(small, 0.25), max(big, 0.25)
    axis = _direction(ux, uy) % 180.0
    # A uniform ellipse of semi-axis a has variance a^2 / 4 along that axis.
    a, b = 2.0 * np.sqrt(big), 2.0 * np.sqrt(small)
    return cx, cy, axis, a, min(b, a)


@njit(cache=True, nogil=True)
def _fans_from_vent(xs, ys, w, ax, ay, min_separation, min_share, smoothing, rows, owner):
    """Fans running out of the vent at (ax, ay): rows of (x, y, direction, length, spread,
    concentration) and each pixel's fan (``owner``, -1 for none); returns the number of fans."""
    n = xs.size
    dx, dy = xs - ax, ys - ay
    r = np.hypot(dx, dy)
    far = r > max(3.0, 0.25 * r.max())
    phi = np.empty(n)
    for i in range(n):
        phi[i] = _direction(dx[i], dy[i])
    wr = w * r
    modes = np.empty(0)
    if far.sum() >= 10:
        # The modes count each far pixel's darkness, not darkness times distance: a vent's short second
        # fan then holds its own share beside a long one (each fan's direction below still weighs distance).
        modes = direction_modes(phi[far], w[far], min_separation, min_share, smoothing, 72)
    if modes.size < 2:
        modes = np.empty(1)
        modes[0] = _circ_mean(phi[far], wr[far]) if far.any() else _circ_mean(phi, w)
    mode_of = np.empty(n, dtype=np.int64)
    for i in range(n):
        best, best_d = 0, _angular_difference(phi[i], modes[0])
        for k in range(1, modes.size):
            d = _angular_difference(phi[i], modes[k])
            if d < best_d:
                best, best_d = k, d
        mode_of[i] = best
    n_fans = 0
    for k in range(modes.size):
        mine = mode_of == k
        sel = mine & far
        if sel.sum() < 3:
            sel = mine
        if sel.sum() < 3:
            continue
        weights = wr[sel]
        direction = _circ_mean(phi[sel], weights)
        rad = phi[sel] * _RAD
        # Resultant length of the pixel directions: how tightly the fan points one way.
        concentration = np.hypot(psum(weights * np.sin(rad)), psum(weights * np.cos(rad))) / max(psum(weights), 1e-9)
        # The grey opening removes a fan's narrow tip and the smoothing moves the darkness
        # peak into the fan: the apex is where the fan's own pixels start along its direction.
        u_col, u_row = np.sin(direction * _RAD), -np.cos(direction * _RAD)
        back = min(quantile(dx[mine] * u_col + dy[mine] * u_row, 0.01), 0.0)
        fx, fy = ax + back * u_col, ay + back * u_row
        length = max(quantile(np.hypot(xs[mine] - fx, ys[mine] - fy), 0.97), 3.0)
        # A sector of radius L and opening theta has area L^2 theta / 2.
        spread = min(max(2.0 * mine.sum() / length**2 * _DEG, 5.0), 180.0)
        rows[n_fans, 0], rows[n_fans, 1], rows[n_fans, 2] = fx, fy, direction
        rows[n_fans, 3], rows[n_fans, 4], rows[n_fans, 5] = length, spread, concentration
        for i in range(n):
            if mine[i]:
                owner[i] = n_fans
        n_fans += 1
    return n_fans


@njit(cache=True, nogil=True)
def _nearest_vent(xs, ys, vents_x, vents_y):
    """Each pixel's nearest vent (the first on ties) and its squared distance to it (at least one vent)."""
    n, n_vents = xs.size, vents_x.size
    vent_of = np.empty(n, dtype=np.int64)
    d2 = np.empty(n)
    for i in range(n):
        best, best_d = 0, (xs[i] - vents_x[0]) ** 2 + (ys[i] - vents_y[0]) ** 2
        for v in range(1, n_vents):
            d = (xs[i] - vents_x[v]) ** 2 + (ys[i] - vents_y[v]) ** 2
            if d < best_d:
                best, best_d = v, d
        vent_of[i] = best
        d2[i] = best_d
    return vent_of, d2


@njit(cache=True, nogil=True)
def describe_component(xs, ys, lx, ly, w, vx, vy, vent_dark, min_vent_px, min_separation, min_share, smoothing):
    """The fan readings of one component from its vents, split by the direction modes of each
    vent's pixels (their features are read by :func:`fan_readings`).

    Parameters
    ----------
    xs, ys : float64 (n,)
        Pixels of the component, tile coordinates.
    lx, ly : int64 (n,)
        The same pixels in the component's box.
    w : float64 (n,)
        Darkness weights.
    vx, vy, vent_dark : (n_vents,)
        Vents in the box, strongest first, and their smoothed darkness.
    min_vent_px : int
        Fewest pixels a vent needs to be read.

    Returns
    -------
    fans : float64 (n_fans, len(FAN_FIELDS))
    owner : int64 (n,)
        Each pixel's fan, -1 for none.
    n_vents : int
    """
    n = xs.size
    n_vents = vx.size
    vent_of, _ = _nearest_vent(lx, ly, vx, vy)
    rows = np.empty((6 * n_vents + 1, len(FAN_FIELDS)))
    owner = np.full(n, -1, dtype=np.int64)
    n_fans = 0
    ox, oy = xs[0] - lx[0], ys[0] - ly[0]
    for k in range(n_vents):
        idx = np.flatnonzero(vent_of == k)
        if idx.size < min_vent_px:
            continue
        part_rows = np.empty((72, 6))
        part_owner = np.full(idx.size, -1, dtype=np.int64)
        m = _fans_from_vent(xs[idx], ys[idx], w[idx], vx[k] + ox, vy[k] + oy, min_separation, min_share,
                            smoothing, part_rows, part_owner)
        if n_fans + m > rows.shape[0]:
            grown = np.empty((2 * (n_fans + m), len(FAN_FIELDS)))
            grown[:n_fans] = rows[:n_fans]
            rows = grown
        for j in range(m):
            rows[n_fans + j, :6] = part_rows[j]
            rows[n_fans + j, 6] = vent_dark[k]
        for i in range(idx.size):
            if part_owner[i] >= 0:
                owner[idx[i]] = n_fans + part_owner[i]
        n_fans += m
    return rows[:n_fans], owner, n_vents


#: Interpretations of one component (see :mod:`detector.objects.assemble`): the direction modes of
#: its vents, each vent as one fan, and the whole component along its principal axis, either way.
HYP_MODES, HYP_VENTS, HYP_AXIS_FORWARD, HYP_AXIS_REVERSE = 0, 1, 2, 3

#: Columns of the fan readings returned by :func:`fan_readings`.
READING_FIELDS = ("hyp", "x_px", "y_px", "direction_deg", "length_px", "opening_deg", "concentration", "vent_dark",
                  "share", "dark_mean", "vote", "p_fan", "axis_cos", "axis_sin", "widening", "fading", "apex_dark",
                  "axis_agreement")


#: Columns of :data:`READING_FIELDS` that the features of a fan reading open with, after the constant 1:
#: length, opening, share, vent darkness, mean darkness, vote, fan probability, concentration.
_FEATURE_FIELD = np.array([READING_FIELDS.index(name) for name in (
    "length_px", "opening_deg", "share", "vent_dark", "dark_mean", "vote", "p_fan", "concentration")])


@njit(cache=True, nogil=True)
def lower_quantile(values, q):
    """The ``q`` quantile of a non-empty 1-D array by the nearest lower rank:
    ``np.partition(values, k)[k]`` with ``k = int(q * (n - 1))``."""
    k = int(q * (values.size - 1))
    return np.partition(values, k)[k]


@njit(cache=True, nogil=True)
def fan_geometry(xs, ys, w, start_x, start_y, direction):
    """Apex, length, spread and concentration of a fan of pixels (xs, ys) running ``direction`` from a start.

    The apex is pulled back from the start to where the pixels begin along the
    direction (the first percentile, nearest lower rank), so a start inside the
    fan still gives the source; the length (px) reaches the 97th percentile of
    the pixels' distances from it (at least 3), and the spread (degrees, 5 to
    180) is the opening of a sector of that radius and the pixels' area
    (L^2 theta / 2). The concentration is the resultant length of the
    directions of the pixels farther than max(3, a quarter of the farthest)
    from the apex, weighted by ``w`` times the distance (1 with fewer than 3).

    Returns
    -------
    fx, fy, length, spread, concentration : float
    """
    n = xs.size
    rad = direction * _RAD
    u_col, u_row = np.sin(rad), -np.cos(rad)
    t = (xs - start_x) * u_col + (ys - start_y) * u_row
    back = min(lower_quantile(t, 0.01), 0.0)
    fx, fy = start_x + back * u_col, start_y + back * u_row
    dx, dy = xs - fx, ys - fy
    r = np.hypot(dx, dy)
    length = max(lower_quantile(r, 0.97), 3.0)
    spread = min(max(2.0 * n / length**2 * _DEG, 5.0), 180.0)
    limit = max(3.0, 0.25 * r.max())
    n_far = 0
    for i in range(n):
        if r[i] > limit:
            n_far += 1
    if n_far < 3:
        return fx, fy, length, spread, 1.0
    wr = np.empty(n_far)
    east = np.empty(n_far)
    north = np.empty(n_far)
    k = 0
    for i in range(n):
        if r[i] > limit:
            # the sine and cosine of the pixel's direction from the apex, (d_col, -d_row) / r, without
            # the angle (the same to rounding: it was taken with arctan2 and turned back)
            wr[k] = w[i] * r[i]
            east[k] = wr[k] * (dx[i] / r[i])
            north[k] = wr[k] * (-dy[i] / r[i])
            k += 1
    concentration = np.hypot(psum(east), psum(north)) / max(psum(wr), 1e-9)
    return fx, fy, length, spread, concentration


@njit(cache=True, nogil=True)
def mass_profile(xs, ys, w, fx, fy, direction, length):
    """How the dark mass runs along a fan reading from its apex (fx, fy): widening, fading and
    darkness at the apex.

    Returns
    -------
    widening : float
        (far width - near width) / (sum), widths the RMS lateral offsets of the
        pixels in the far and near thirds of the length; > 0 when the mass
        widens away from the apex, as a fan does.
    fading : float
        (near darkness - far darkness) / (sum); > 0 when the mass is darkest near the apex.
    apex_dark : float
        Mean darkness within a sixth of the length (at least 4 px) of the apex over
        the reading's mean darkness (0 when no pixel is that close).
    """
    n = xs.size
    rad = direction * _RAD
    u_col, u_row = np.sin(rad), -np.cos(rad)
    near_end, far_start, close = length / 3.0, 2.0 * length / 3.0, max(length / 6.0, 4.0)
    s2_near, s2_far = np.empty(n), np.empty(n)
    w_near, w_far, w_close = np.empty(n), np.empty(n), np.empty(n)
    n_near = n_far = n_close = 0
    for i in range(n):
        dx, dy = xs[i] - fx, ys[i] - fy
        t = dx * u_col + dy * u_row
        s = -dx * u_row + dy * u_col
        if t <= near_end:
            s2_near[n_near] = s * s
            w_near[n_near] = w[i]
            n_near += 1
        if t >= far_start:
            s2_far[n_far] = s * s
            w_far[n_far] = w[i]
            n_far += 1
        if np.hypot(dx, dy) <= close:
            w_close[n_close] = w[i]
            n_close += 1
    wn = np.sqrt(psum(s2_near[:n_near]) / n_near) if n_near else 0.0
    wf = np.sqrt(psum(s2_far[:n_far]) / n_far) if n_far else 0.0
    dn = psum(w_near[:n_near]) / n_near if n_near else 0.0
    df = psum(w_far[:n_far]) / n_far if n_far else 0.0
    mean_dark = max(psum(w) / n, 1e-6)
    apex_dark = psum(w_close[:n_close]) / n_close / mean_dark if n_close else 0.0
    return (wf - wn) / max(wf + wn, 1e-6), (dn - df) / max(dn + df, 1e-6), apex_dark


@njit(cache=True, nogil=True)
def _fan_row(row, hyp, xs, ys, w, samples, mine, fx, fy, direction, length, spread, concentration, vent_dark,
             fan_mass, has_axis):
    """Fill ``row`` (:data:`READING_FIELDS`) with the fan reading of the pixels ``mine``."""
    n = xs.size
    m = 0
    for i in range(n):
        if mine[i]:
            m += 1
    pxs, pys, pw = np.empty(m), np.empty(m), np.empty(m)
    ws = np.empty((samples.shape[0], m))
    k = 0
    for i in range(n):
        if mine[i]:
            pxs[k], pys[k], pw[k] = xs[i], ys[i], w[i]
            for c in range(samples.shape[0]):
                ws[c, k] = samples[c, i]
            k += 1
    weights = np.maximum(pw, 1e-9)
    # the maps' means weighted by darkness, by BLAS as numpy's float32 @ float64 product takes them
    mean = np.dot(ws, weights) / psum(weights)
    rad = direction * _RAD
    d_col, d_row = np.sin(rad), -np.cos(rad)
    # The orientation model's vote along this fan's direction: +1 agrees, -1 opposes.
    vote = min(max((mean[3] * d_col + mean[4] * d_row) / fan_mass, -1.0), 1.0)
    agreement = 0.0
    if has_axis:
        doubled = (2.0 * direction) * _RAD
        norm = max(np.hypot(mean[5], mean[6]), 1e-6)
        agreement = (mean[5] * np.cos(doubled) + mean[6] * np.sin(doubled)) / norm
    widening, fading, apex_dark = mass_profile(pxs, pys, pw, fx, fy, direction, length)
    row[0], row[1], row[2], row[3] = hyp, fx, fy, direction % 360.0
    row[4], row[5], row[6], row[7] = length, spread, concentration, vent_dark
    row[8], row[9], row[10], row[11] = m / max(n, 1), psum(pw) / m, vote, mean[1]
    row[12], row[13], row[14], row[15], row[16], row[17] = mean[5], mean[6], widening, fading, apex_dark, agreement


@njit(cache=True, nogil=True)
def _cov2_blas(dx, dy, w):
    """``np.cov(np.vstack([dx, dy]), aweights=w)`` with numpy's own arithmetic: the
    centred products summed by BLAS (``np.dot``), as numpy's cov sums them."""
    n = dx.size
    w_sum = psum(w)
    fact = w_sum - psum(w * w) / w_sum
    x = np.empty((2, n))
    x[0] = dx - psum(dx * w) / w_sum
    x[1] = dy - psum(dy * w) / w_sum
    xw = np.empty((2, n))
    xw[0] = x[0] * w
    xw[1] = x[1] * w
    return np.dot(x, xw.T) * (1.0 / fact)


@njit(cache=True, nogil=True)
def nearest_vents(xs, ys, vents_x, vents_y):
    """Each pixel's nearest vent (the first on ties) and its offset from it.

    Returns
    -------
    vent_of : int64 (n,)
    d_col, minus_d_row : float64 (n,)
        The offset (x - vent x) and the negated (y - vent y), the arguments of
        ``arctan2`` for the direction clockwise from up.
    """
    vent_of, _ = _nearest_vent(xs, ys, vents_x, vents_y)
    d_col = xs - vents_x[vent_of]
    minus_d_row = -(ys - vents_y[vent_of])
    return vent_of, d_col, minus_d_row


@njit(cache=True, nogil=True)
def reading_pulls(xs, ys, w, vent_of, angle, vents_x, vents_y, min_vent_px):
    """What the directions of a component's vent and axis readings are taken from.

    A vent with at least ``min_vent_px`` pixels (``vent_of``), three of which lie
    farther than max(3, a quarter of the farthest) from it, is read along the
    mean direction of those far pixels seen from the vent, weighted by darkness
    times distance. The whole component is read along its principal axis (the
    darkness-weighted covariance's major eigenvector, by LAPACK) from its
    weighted centre. The angles (``angle`` and the ones made from what this
    returns) are numpy's ``arctan2``, whose vectorised form differs from the C
    library's in the last bit.

    Parameters
    ----------
    xs, ys, w : float64 (n,)
        Pixels of the component (tile coordinates) and their darkness weights.
    vent_of : int64 (n,) or (0,)
        Each pixel's vent (the nearest); empty when the vents are not read.
    angle : float64 (n,) or (0,)
        ``arctan2`` of each pixel's offset from its vent (:func:`nearest_vents`):
        its direction from the vent, radians clockwise from up, in (-pi, pi].
    vents_x, vents_y : float64 (n_vents,)
        Vents in tile coordinates.
    min_vent_px : int

    Returns
    -------
    pulls : float64 (n_vents, 2)
        Each vent's weighted sums of sin and cos of its far pixels' directions
        (its direction is ``arctan2(pulls[:, 0], pulls[:, 1])``); NaN for a vent
        that is not read.
    axis : float64 (4,)
        Weighted centre (x, y) and the major axis as (d_col, d_row); NaN for a
        component of fewer than 3 pixels.
    """
    n, n_vents = xs.size, vents_x.size
    pulls = np.full((n_vents, 2), np.nan)
    for v in range(n_vents if vent_of.size else 0):
        idx = np.flatnonzero(vent_of == v)
        if idx.size < min_vent_px:
            continue
        r = np.hypot(xs[idx] - vents_x[v], ys[idx] - vents_y[v])
        far = r > max(3.0, 0.25 * r.max())
        n_far = far.sum()
        if n_far < 3:
            continue
        east, north = np.empty(n_far), np.empty(n_far)
        q = 0
        for i in range(idx.size):
            if far[i]:
                # degrees in [0, 360) and back, as numpy's direction_deg and radians take them
                phi = ((angle[idx[i]] * _DEG) % 360.0) * _RAD
                wr = w[idx[i]] * r[i]
                east[q], north[q] = wr * np.sin(phi), wr * np.cos(phi)
                q += 1
        pulls[v, 0], pulls[v, 1] = psum(east), psum(north)
    axis = np.full(4, np.nan)
    if n >= 3:
        w_sum = psum(w)
        cx, cy = psum(xs * w) / w_sum, psum(ys * w) / w_sum
        _, _, ux, uy = _eigh_lapack(_cov2_blas(xs - cx, ys - cy, w))
        axis[0], axis[1], axis[2], axis[3] = cx, cy, ux, uy
    return pulls, axis


@njit(cache=True, nogil=True)
def fan_readings(xs, ys, w, w32, samples, modes, owner, vent_of, vents_x, vents_y, vent_directions, vent_dark,
                 centre_x, centre_y, forward, smooth_box, box_row, box_col, has_axis):
    """Every fan reading of one component, under each interpretation, with what its features need.

    Parameters
    ----------
    xs, ys : float64 (n,)
        Pixels of the component, tile coordinates.
    w, w32 : float64 (n,), float32 (n,)
        Darkness weights.
    samples : float32 (7, n)
        Class probabilities (none, fan, spot), polarity vector (d_col, d_row) and
        doubled-angle axis (cos, sin) at each pixel.
    modes : float64 (n_modes, >= 7)
        The readings of :func:`describe_component` (its first seven fields).
    owner : int64 (n,)
        Each pixel's mode reading, -1 for none.
    vent_of : int64 (n,) or (0,)
        Each pixel's vent; empty when the vents are not read.
    vents_x, vents_y, vent_directions, vent_dark : float64 (n_vents,)
        Vents in tile coordinates, strongest first, the direction each is read
        along (degrees clockwise from up; NaN: not read) and their smoothed darkness.
    centre_x, centre_y, forward : float
        Weighted centre of the component and the direction of its principal axis
        (NaN: no axis readings).
    smooth_box : float32 (rows, cols)
        The smoothed darkness over the component's box, whose top-left pixel is
        (``box_row``, ``box_col``); an axis reading's vent darkness is read there at
        its apex (nearest pixel, clamped to the box).
    has_axis : bool
        Whether samples rows 5-6 hold the structure-tensor axis (else a reading's
        axis agreement is 0).

    Returns
    -------
    readings : float64 (n_readings, len(READING_FIELDS))
        ``axis_cos`` and ``axis_sin`` are the darkness-weighted means of samples
        rows 5-6 (the reading's axis is half their angle). The mode readings in
        order, then one per vent read, then the axis readings (forward, reverse).
    pixels : bool (n_readings, n)
        The pixels of each reading.
    features : float32 (n_readings, 17)
        The first features of each reading (:func:`_reading_features`).
    """
    n = xs.size
    n_modes, n_vents = modes.shape[0], vents_x.size
    fan_mass = max(np.float64(_average(samples[1], w32)), 1e-6)
    readings = np.empty((n_modes + n_vents + 2, len(READING_FIELDS)))
    pixels = np.zeros((n_modes + n_vents + 2, n), dtype=np.bool_)
    k = 0
    for j in range(n_modes):
        for i in range(n):
            pixels[k, i] = owner[i] == j
        _fan_row(readings[k], HYP_MODES, xs, ys, w, samples, pixels[k], modes[j, 0], modes[j, 1], modes[j, 2],
                 modes[j, 3], modes[j, 4], modes[j, 5], modes[j, 6], fan_mass, has_axis)
        k += 1
    for v in range(n_vents if vent_of.size else 0):
        direction = vent_directions[v]
        if np.isnan(direction):
            continue
        idx = np.flatnonzero(vent_of == v)
        fx, fy, length, spread, concentration = fan_geometry(xs[idx], ys[idx], w[idx], vents_x[v], vents_y[v],
                                                             direction)
        for i in range(n):
            pixels[k, i] = vent_of[i] == v
        _fan_row(readings[k], HYP_VENTS, xs, ys, w, samples, pixels[k], fx, fy, direction, length, spread,
                 concentration, vent_dark[v], fan_mass, has_axis)
        k += 1
    if not np.isnan(forward):
        for hyp in (HYP_AXIS_FORWARD, HYP_AXIS_REVERSE):
            direction = forward if hyp == HYP_AXIS_FORWARD else (forward + 180.0) % 360.0
            fx, fy, length, spread, concentration = fan_geometry(xs, ys, w, centre_x, centre_y, direction)
            # the smoothed darkness at the apex's nearest pixel (halves to even, as Python's round)
            r = min(max(int(np.rint(fy)) - box_row, 0), smooth_box.shape[0] - 1)
            c = min(max(int(np.rint(fx)) - box_col, 0), smooth_box.shape[1] - 1)
            pixels[k, :] = True
            _fan_row(readings[k], hyp, xs, ys, w, samples, pixels[k], fx, fy, direction, length, spread,
                     concentration, np.float64(smooth_box[r, c]), fan_mass, has_axis)
            k += 1
    return readings[:k], pixels[:k], _reading_features(readings[:k])


@njit(cache=True, nogil=True)
def _reading_features(readings):
    """The first features of each fan reading (the ``read_*`` features before the view), float32:
    1, length, opening, share, vent darkness, mean darkness, vote, fan probability,
    concentration, the interpretation one-hot (modes, vents, axis), how many readings
    the interpretation has, widening, fading, apex darkness and axis agreement."""
    k = readings.shape[0]
    siblings = np.zeros(4, dtype=np.int64)
    for i in range(k):
        siblings[int(readings[i, 0])] += 1
    out = np.empty((k, 17), dtype=np.float32)
    for i in range(k):
        hyp = int(readings[i, 0])
        out[i, 0] = 1.0
        for j in range(8):  # length_px ... concentration, then vent_dark ... p_fan, as the features order them
            out[i, 1 + j] = readings[i, _FEATURE_FIELD[j]]
        out[i, 9] = hyp == HYP_MODES
        out[i, 10] = hyp == HYP_VENTS
        out[i, 11] = hyp == HYP_AXIS_FORWARD or hyp == HYP_AXIS_REVERSE
        out[i, 12] = siblings[hyp]
        for j in range(4):  # widening, fading, apex_dark, axis_agreement
            out[i, 13 + j] = readings[i, 14 + j]
    return out


#: Columns of the spot readings returned by :func:`vent_spots`.
VENT_SPOT_FIELDS = ("x_px", "y_px", "axis_deg", "semi_major_px", "semi_minor_px", "share", "vent_dark", "dark_mean",
                    "p_spot")


@njit(cache=True, nogil=True)
def vent_spots(xs, ys, w, p_spot, vents_x, vents_y, min_px, level, max_share):
    """The component read as one spot around each vent.

    A vent's spot holds the pixels nearest that vent (the first vent on ties)
    whose darkness is at least ``level`` times the darkness at the vent (at the
    vent's nearest pixel, the first on ties), described as a uniform ellipse
    (:func:`spot_reading`). A vent is skipped when it or its spot has fewer than
    ``min_px`` pixels, or when the spot holds at least ``max_share`` of the
    component's darkness.

    Parameters
    ----------
    xs, ys, w : float64 (n,)
        Pixels of the component (tile coordinates) and their darkness weights.
    p_spot : float32 (n,)
        Spot probability at each pixel.
    vents_x, vents_y : float64 (n_vents,)
        Vents in tile coordinates.

    Returns
    -------
    spots : float64 (n_spots, len(VENT_SPOT_FIELDS))
        Centre, axis (degrees mod 180), semi-axes (px), share of the component's
        darkness, darkness at the vent, mean darkness and darkness-weighted spot
        probability of each spot.
    pixels : bool (n_spots, n)
    """
    n, n_vents = xs.size, vents_x.size
    spots = np.empty((n_vents, len(VENT_SPOT_FIELDS)))
    pixels = np.zeros((n_vents, n), dtype=np.bool_)
    if n_vents == 0 or n == 0:
        return spots[:0], pixels[:0]
    vent_of, d2 = _nearest_vent(xs, ys, vents_x, vents_y)
    total = psum(w)
    k = 0
    for v in range(n_vents):
        mine = np.flatnonzero(vent_of == v)
        if mine.size < min_px:
            continue
        nearest = mine[0]
        for i in mine:
            if d2[i] < d2[nearest]:
                nearest = i
        at_vent = w[nearest]
        n_core = 0
        for i in mine:
            if w[i] >= level * at_vent:
                n_core += 1
        core = np.empty(n_core, dtype=np.int64)
        q = 0
        for i in mine:
            if w[i] >= level * at_vent:
                core[q] = i
                q += 1
        wc = w[core]
        share = psum(wc) / total
        if n_core < min_px or share >= max_share:
            continue
        cx, cy, axis, semi_major, semi_minor = spot_reading(xs[core], ys[core])
        weighted = np.empty(n_core)
        for q in range(n_core):
            weighted[q] = np.float64(p_spot[core[q]]) * wc[q]
        spots[k, 0], spots[k, 1], spots[k, 2], spots[k, 3], spots[k, 4] = cx, cy, axis, semi_major, semi_minor
        spots[k, 5], spots[k, 6], spots[k, 7] = share, at_vent, psum(wc) / n_core
        spots[k, 8] = psum(weighted) / psum(wc)
        for i in core:
            pixels[k, i] = True
        k += 1
    return spots[:k], pixels[:k]
