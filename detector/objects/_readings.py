"""Compiled description of one dark component: its moments, vents, fan and spot readings.

The loops of :mod:`detector.objects.assemble` written out for numba (CPU, one thread):
each component used to cost some two hundred small numpy calls. Sums use
numpy's pairwise summation (:func:`psum`, the order of ``np.sum``), quantiles
numpy's 'linear' rule and histograms its equal-bin rule, so results follow
numpy's to rounding (transcendental functions may differ from numpy's
vectorised ones in the last bit). Directions are degrees clockwise from image
up, as in :mod:`detector.geometry`.
"""

import numpy as np
from numba import njit

from ..tile._kernels import pairwise_block as _block

__all__ = ["psum", "quantile", "direction_histogram", "circular_smooth", "direction_modes", "axis_moments", "spot_reading", "describe_component",
           "component_summary", "FAN_FIELDS", "SUMMARY_FIELDS"]

_DEG = 180.0 / np.pi
_RAD = np.pi / 180.0

#: Columns of the fan rows returned by :func:`describe_component`.
FAN_FIELDS = ("x_px", "y_px", "direction_deg", "length_px", "opening_deg", "concentration", "vent_dark",
              "share", "dark_mean", "vote", "p_fan", "axis_deg")


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
        modes = direction_modes(phi[far], wr[far], min_separation, min_share, smoothing, 72)
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
def describe_component(xs, ys, lx, ly, w, w32, samples, vx, vy, vent_dark, min_vent_px, min_separation,
                       min_share, smoothing):
    """The fan readings of one component from its vents.

    Parameters
    ----------
    xs, ys : float64 (n,)
        Pixels of the component, tile coordinates.
    lx, ly : int64 (n,)
        The same pixels in the component's box.
    w, w32 : float64 (n,), float32 (n,)
        Darkness weights; ``w32`` weighs the float32 maps.
    samples : float32 (7, n)
        Class probabilities (none, fan, spot), polarity vector (d_col, d_row) and
        doubled-angle axis (cos, sin) at each pixel.
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
    vent_of = np.empty(n, dtype=np.int64)
    for i in range(n):
        best, best_d = 0, (lx[i] - vx[0]) ** 2 + (ly[i] - vy[0]) ** 2
        for k in range(1, n_vents):
            d = (lx[i] - vx[k]) ** 2 + (ly[i] - vy[k]) ** 2
            if d < best_d:
                best, best_d = k, d
        vent_of[i] = best
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
    rows = rows[:n_fans]
    # averages of float32 maps with float32 weights are taken in float32, as np.average does
    p_fan = samples[1]
    fan_mass = max(np.float64(_average(p_fan, w32)), 1e-6)
    for f in range(n_fans):
        mine = owner == f
        wm = w32[mine]
        d_col, d_row = np.sin(rows[f, 2] * _RAD), -np.cos(rows[f, 2] * _RAD)
        # The orientation model's vote along this fan's direction: +1 agrees, -1 opposes.
        vote = (np.float64(_average(samples[3][mine], wm)) * d_col
                + np.float64(_average(samples[4][mine], wm)) * d_row) / fan_mass
        vote = min(max(vote, -1.0), 1.0)
        c2 = np.float64(_average(samples[5][mine], wm))
        s2 = np.float64(_average(samples[6][mine], wm))
        rows[f, 7] = mine.sum() / n
        rows[f, 8] = _mean(wm)
        rows[f, 9] = vote
        rows[f, 10] = _average(p_fan[mine], wm)
        rows[f, 11] = (0.5 * np.arctan2(s2, c2) * _DEG) % 180.0
    return rows, owner, n_vents
