"""Compiled ring fits: pixel selection, Levenberg-Marquardt and errors of one ring.

The whole per-ring fit of :mod:`.engine` runs here without the interpreter (numba, ``nogil`` so
that threads can share the rings of a stage). Each ring reads a contiguous slice of pixel arrays
sorted by disc radius, so no pixel array is copied per ring. Normal equations are accumulated on
the fly (J^T W J and J^T W r over the free parameters) instead of storing the (n, 7) Jacobian, and
the damped system is solved by Cholesky decomposition.

The entry point :func:`fit_one_ring` fits one ring; :func:`.engine.fit_rings` calls it for each ring,
sharing the rings among threads. The pixels shared by every ring are one (4, n) table with rows
:data:`X`, :data:`Y`, :data:`V`, :data:`SIGMA`, and how rings are fitted is a :class:`FitSettings`.
The kernels take plain arrays: a NamedTuple of arrays handed from kernel to kernel makes numba's
compilation several times slower (every field is unpacked and reference-counted at each call).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numba import njit

from .geometry import project, ring_trig
from .kinematics import pixel_velocity, ring_constants
from .parameters import COUNT, GEOMETRY, LINEAR, mask
from .parameters import Parameter as P

AZIMUTH_BINS = 36
INC_BOUNDS = (1.0, 89.0)


#: rows of the pixel table: pixel coordinates, velocity and its error
X, Y, V, SIGMA = 0, 1, 2, 3
#: rows of a ring's selection buffer (sqrt-weight, cos theta, sin theta of each selected pixel)
WEIGHT, COS, SIN = 0, 1, 2


class FitSettings(NamedTuple):
    """How every ring is fitted (see :class:`.engine.RingFitOptions`).

    ``free``: mask over the parameters; ``power``: of |cos theta| in the weight; ``sin_gap``: sine of the
    minor-axis gap; ``half``: 0 whole, 1 approaching, 2 receding; ``clip``: robust sigmas (0: off).
    """

    free: np.ndarray
    power: int
    sin_gap: float
    half: int
    clip: float
    max_iterations: int
    geometry_updates: int
    min_pixels: int
    pixels_per_beam: float


#: masks over the parameters (read-only constants inside the kernels)
IS_GEOMETRY = mask(GEOMETRY)
IS_LINEAR = mask(LINEAR)


@njit(cache=True, nogil=True)
def _nan_vector(n):
    """A vector of ``n`` NaNs."""
    out = np.empty(n)
    for j in range(n):
        out[j] = np.nan
    return out


@njit(cache=True, nogil=True)
def cholesky_solve(a, b):
    """Solve a x = b for symmetric positive-definite ``a``; returns (x, ok)."""
    n = a.shape[0]
    low = np.zeros((n, n))
    for i in range(n):
        for j in range(i + 1):
            s = a[i, j]
            for k in range(j):
                s -= low[i, k] * low[j, k]
            if i == j:
                if not s > 0.0 or not np.isfinite(s):
                    return _nan_vector(n), False
                low[i, i] = np.sqrt(s)
            else:
                low[i, j] = s / low[j, j]
    z = np.empty(n)
    for i in range(n):
        s = b[i]
        for k in range(i):
            s -= low[i, k] * z[k]
        z[i] = s / low[i, i]
    out = np.empty(n)
    for i in range(n - 1, -1, -1):
        s = z[i]
        for k in range(i + 1, n):
            s -= low[k, i] * out[k]
        out[i] = s / low[i, i]
    return out, True


@njit(cache=True, nogil=True)
def _clamp(p):
    p[P.inclination] = min(max(p[P.inclination], INC_BOUNDS[0]), INC_BOUNDS[1])


@njit(cache=True, nogil=True, inline="always")
def angular_weight(c, sigma, power, sin_gap, half):
    """sqrt of a pixel's weight, |cos theta|^(power/2) / sigma, or -1 where the gap about the
    minor axis or the chosen half (0 whole, 1 approaching: cos < 0, 2 receding: cos > 0) leaves it out."""
    if abs(c) < sin_gap or (half == 1 and not c < 0.0) or (half == 2 and not c > 0.0):
        return -1.0
    return abs(c) ** (0.5 * power) / sigma


@njit(cache=True)
def angular_weights(cos_t, sigma, power, sin_gap, half):
    """:func:`angular_weight` of each pixel."""
    out = np.empty(cos_t.shape[0])
    for j in range(cos_t.shape[0]):
        out[j] = angular_weight(cos_t[j], sigma[j], power, sin_gap, half)
    return out


@njit(cache=True, nogil=True)
def _select(table, jac, lo, hi, p, inner, outer, power, sin_gap, half, at, sel):
    """Pixels of slice [lo, hi) inside the ring at geometry ``p``: their positions in the table go to ``at``,
    their sqrt-weights (:func:`angular_weight`) and cos/sin theta to rows :data:`WEIGHT`, :data:`COS`,
    :data:`SIN` of ``sel``.

    Returns (count, first, last): ``first``/``last`` are the lowest and highest slice positions
    whose disc radius falls in the ring (gap and half aside; -1 if none).
    """
    sp, cp, ci = ring_trig(p[P.position_angle], p[P.inclination])
    n = 0
    first, last = -1, -1
    for k in range(lo, hi):
        xd, yd = project(table[X, k], table[Y, k], p[P.x_center], p[P.y_center], jac, sp, cp, ci)
        r = np.sqrt(xd * xd + yd * yd)
        if r < inner or r >= outer:
            continue
        if first < 0:
            first = k
        last = k
        c, s = (xd / r, yd / r) if r > 0.0 else (1.0, 0.0)
        weight = angular_weight(c, table[SIGMA, k], power, sin_gap, half)
        if weight < 0.0:
            continue
        at[n] = k
        sel[WEIGHT, n] = weight
        sel[COS, n] = c
        sel[SIN, n] = s
        n += 1
    return n, first, last


@njit(cache=True, nogil=True)
def _reaches_edge(order_radius, lo, hi, first, last, margin):
    """Whether a ring's pixels come within ``margin`` (in the sorting radius) of either end of a slice
    that does not end at the first or last pixel: then the ring may continue beyond the slice."""
    if first < 0:
        return False
    low = lo > 0 and order_radius[first] - order_radius[lo] < margin
    high = hi < order_radius.shape[0] and order_radius[hi - 1] - order_radius[last] < margin
    return low or high


@njit(cache=True, nogil=True)
def normal_equations(table, jac, at, sel, n, p, fidx):
    """(chi^2, J^T W J, J^T W r) over the free parameters ``fidx`` for the ``n`` selected pixels."""
    nf = fidx.shape[0]
    h = np.zeros((nf, nf))
    g = np.zeros(nf)
    d = np.empty(COUNT)
    const = ring_constants(p, jac)
    cost = 0.0
    for j in range(n):
        k = at[j]
        w = sel[WEIGHT, j]
        r = (table[V, k] - pixel_velocity(table[X, k], table[Y, k], p, jac, const, d)) * w
        cost += r * r
        for a in range(nf):
            da = d[fidx[a]] * w
            g[a] += da * r
            for b in range(a + 1):
                h[a, b] += da * d[fidx[b]] * w
    for a in range(nf):
        for b in range(a):
            h[b, a] = h[a, b]
    return cost, h, g


@njit(cache=True, nogil=True)
def _levenberg_marquardt(table, jac, at, sel, n, p, fidx, max_iterations):
    """Minimise chi^2 over p[fidx] from ``p``; returns (p, chi^2, J^T W J, converged)."""
    lam = 1e-3
    cost, h, g = normal_equations(table, jac, at, sel, n, p, fidx)
    nf = fidx.shape[0]
    converged = max_iterations == 0
    for _ in range(max_iterations):
        improved = False
        small = False
        while lam < 1e12:
            damped = h.copy()
            for a in range(nf):
                damped[a, a] += lam * (h[a, a] + 1e-12)
            step, ok = cholesky_solve(damped, g)
            if not ok:
                lam *= 10.0
                continue
            trial = p.copy()
            for a in range(nf):
                trial[fidx[a]] += step[a]
            _clamp(trial)
            c_new, h_new, g_new = normal_equations(table, jac, at, sel, n, trial, fidx)
            if np.isfinite(c_new) and c_new <= cost:
                improved = True
                # converged once chi^2 falls by less than a thousandth of the reduced chi^2
                small = cost - c_new <= 1e-3 * max(cost, 1e-30) / max(n - nf, 1)
                p, cost, h, g = trial, c_new, h_new, g_new
                lam = max(lam / 10.0, 1e-12)
                break
            lam *= 10.0
        if not improved or small:
            converged = True
            break
    return p, cost, h, converged


@njit(cache=True, nogil=True)
def _residuals(table, jac, at, n, p):
    """v - v_los(p) at the ``n`` selected pixels (unweighted)."""
    d = np.empty(COUNT)
    const = ring_constants(p, jac)
    out = np.empty(n)
    for j in range(n):
        k = at[j]
        out[j] = table[V, k] - pixel_velocity(table[X, k], table[Y, k], p, jac, const, d)
    return out


@njit(cache=True, nogil=True)
def _kth_smallest(a, k):
    """The ``k``-th smallest (from 0) of ``a``, which is reordered in place (Wirth 1976, "Algorithms + Data
    Structures = Programs", sect. 2.3.4); NaN ranks above every number, as in numpy's sort."""
    lo, hi = 0, a.shape[0] - 1
    while lo < hi:
        pivot = a[k]
        i, j = lo, hi
        while i <= j:
            # a[i] < pivot, with NaN the largest value
            while a[i] < pivot or (pivot != pivot and a[i] == a[i]):
                i += 1
            while pivot < a[j] or (a[j] != a[j] and pivot == pivot):
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
        if j < k:
            lo = i
        if k < i:
            hi = j
    return a[k]


@njit(cache=True, nogil=True)
def _median(a):
    """Median of ``a`` (reordered in place): the middle value, or the mean of the two middle values."""
    n = a.shape[0]
    if n == 0:
        return np.nan
    half = n // 2
    if n % 2:
        return _kth_smallest(a, half)
    low = _kth_smallest(a, half - 1)
    return (low + _kth_smallest(a, half)) / 2


@njit(cache=True, nogil=True)
def _fit_selected(table, jac, at, sel, n, p, fidx, max_iterations, clip):
    """LM on the selection, with iterative clipping at ``clip`` robust sigmas (0: off).

    Clipped pixels are removed from the buffers in place. Returns (p, chi^2, J^T W J, converged, n).
    """
    rounds = 4 if clip > 0 else 1
    for _ in range(rounds):
        p_new, cost, h, converged = _levenberg_marquardt(table, jac, at, sel, n, p.copy(), fidx, max_iterations)
        if clip <= 0:
            break
        raw = _residuals(table, jac, at, n, p_new)
        centre = _median(raw.copy())
        spread = np.empty(n)
        for j in range(n):
            spread[j] = abs(raw[j] - centre)
        mad = 1.4826 * _median(spread)
        limit = clip * max(mad, 1e-9)
        kept = 0
        for j in range(n):
            kept += abs(raw[j]) <= limit
        if kept == n or kept < 2 * fidx.shape[0]:
            break
        m = 0
        for j in range(n):
            if abs(raw[j]) <= limit:
                for row in (WEIGHT, COS, SIN):
                    sel[row, m] = sel[row, j]
                at[m] = at[j]
                m += 1
        n = m
    return p_new, cost, h, converged, n


@njit(cache=True, nogil=True)
def _scaled_errors(h, cost, n, pixels_per_beam):
    """sqrt(diag((J^T W J)^-1) x reduced chi^2 x pixels per beam); NaN where J^T W J is singular."""
    nf = h.shape[0]
    factor = cost / max(n - nf, 1) * pixels_per_beam
    out = np.empty(nf)
    for a in range(nf):
        unit = np.zeros(nf)
        unit[a] = 1.0
        column, ok = cholesky_solve(h, unit)
        if not ok:
            return _nan_vector(nf)
        out[a] = np.sqrt(max(column[a], 0.0) * factor)
    return out


@njit(cache=True, nogil=True)
def _coverage(sel, n, sin_gap, half):
    """Fraction of the usable azimuth (outside the gap, on the chosen half) holding pixels."""
    hit = np.zeros(AZIMUTH_BINS, np.bool_)
    for j in range(n):
        theta = np.arctan2(sel[SIN, j], sel[COS, j]) % (2 * np.pi)
        hit[min(int(theta / (2 * np.pi) * AZIMUTH_BINS), AZIMUTH_BINS - 1)] = True
    usable = 0
    covered = 0
    for b in range(AZIMUTH_BINS):
        if angular_weight(np.cos((b + 0.5) * 2 * np.pi / AZIMUTH_BINS), 1.0, 0, sin_gap, half) >= 0.0:
            usable += 1
            covered += hit[b]
    return covered / max(usable, 1)


@njit(cache=True, nogil=True)
def _positions(mask):
    """Positions where ``mask`` is True, ascending."""
    count = 0
    for j in range(mask.shape[0]):
        count += mask[j]
    out = np.empty(count, np.int64)
    count = 0
    for j in range(mask.shape[0]):
        if mask[j]:
            out[count] = j
            count += 1
    return out


@njit(cache=True, nogil=True)
def fit_one_ring(table, order_radius, margin, jac, lo, hi, start, inner, outer, settings, params, errors):
    """Fit the ring of slice ``lo:hi`` of the pixel ``table`` (see :mod:`.engine`), from ``start``, between disc
    radii ``inner`` and ``outer``; writes the ring's parameters and errors to ``params`` and ``errors``.

    Returns (n_pixels, coverage, chi2_reduced, rms, converged, truncated) (see :class:`.engine.RingSolution`).
    ``truncated`` is set when the ring's pixels came within ``margin`` of an end of its slice (in ``order_radius``,
    the radius the pixels are sorted by), i.e. the ring may extend beyond its candidates and should be refitted
    from a wider slice. Since a ring is a connected band on the sky, a ring that continued beyond the slice would
    have pixels all the way to its end, so a gap wider than the pixel spacing between the ring's pixels and the
    slice's end means nothing was cut off.
    """
    free = settings.free
    power, sin_gap, half, clip = settings.power, settings.sin_gap, settings.half, settings.clip
    size = max(hi - lo, 1)
    at, sel = np.empty(size, np.int64), np.empty((3, size))
    fidx = _positions(free)
    nf = fidx.shape[0]
    geometry_free = False
    free_linear = np.empty(COUNT, np.bool_)
    for j in range(COUNT):
        geometry_free = geometry_free or (free[j] and IS_GEOMETRY[j])
        free_linear[j] = free[j] and IS_LINEAR[j]
    vel = _positions(free_linear)
    need = max(settings.min_pixels, 2 * nf, 3)
    p = start.copy()
    _clamp(p)
    for j in range(COUNT):
        errors[j] = np.nan
    truncated = False
    last_step = np.zeros(COUNT)
    damping = 0.0
    n = 0
    cost, h, converged = 0.0, np.zeros((nf, nf)), False
    updates = settings.geometry_updates if geometry_free else 1
    for update in range(updates + 1):
        n, first, last = _select(table, jac, lo, hi, p, inner, outer, power, sin_gap, half, at, sel)
        if _reaches_edge(order_radius, lo, hi, first, last, margin):
            truncated = True
        if n < need:
            for j in range(COUNT):
                params[j] = p[j]
            return n, _coverage(sel, n, sin_gap, half), np.nan, np.nan, False, truncated
        if update == updates:
            # not settled: hold the damped geometry and refit the velocities on its own pixel selection
            if vel.shape[0] > 0:
                p, cost, h, converged, n = _fit_selected(table, jac, at, sel, n, p, vel, settings.max_iterations, clip)
            cost, h, _ = normal_equations(table, jac, at, sel, n, p, fidx)  # all free parameters, for errors
            converged = True
            break
        p_new, cost, h, converged, n = _fit_selected(table, jac, at, sel, n, p, fidx, settings.max_iterations, clip)
        # settled when no geometry parameter moved by more than 0.02 (deg or pixel) or a tenth of its error
        scaled = _scaled_errors(h, cost, n, settings.pixels_per_beam)
        moved = False
        for a in range(nf):
            j = fidx[a]
            if IS_GEOMETRY[j] and abs(p_new[j] - p[j]) > max(0.02, 0.1 * scaled[a]):
                moved = True
        if not geometry_free or not moved:
            p = p_new
            break
        # Fixed-point update of the geometry: the pixel selection depends on the geometry, and a full update
        # can flip between two selections (seen in warped discs), so once a geometry step turns back on the
        # previous one, the geometry takes half steps; velocities always take the full step.
        for j in GEOMETRY:
            step = p_new[j] - p[j]
            if step * last_step[j] < 0.0:
                damping = 0.5
            last_step[j] = step
        for j in GEOMETRY:
            p_new[j] -= damping * last_step[j]
        p = p_new
    chi2_red = cost / max(n - nf, 1)
    scaled = _scaled_errors(h, cost, n, settings.pixels_per_beam)
    finite = True
    for a in range(nf):
        finite = finite and np.isfinite(scaled[a])
    if finite:
        for a in range(nf):
            errors[fidx[a]] = scaled[a]
    else:
        converged = False
    squares = 0.0
    for r in _residuals(table, jac, at, n, p):
        squares += r * r
    if p[P.v_rotation] < 0 and free[P.position_angle]:  # a free position angle turns half a circle instead (same
        p[P.position_angle] += 180.0                      # v_los field); with the position angle held, the sign
        p[P.v_rotation] = -p[P.v_rotation]                # of v_rotation is the measurement
        p[P.v_radial] = -p[P.v_radial]
    p[P.position_angle] = p[P.position_angle] % 360.0
    if p[P.position_angle] >= 360.0:
        p[P.position_angle] = 0.0
    for j in range(COUNT):
        params[j] = p[j]
    return n, _coverage(sel, n, sin_gap, half), chi2_red, np.sqrt(squares / max(n, 1)), converged, truncated

