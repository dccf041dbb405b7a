"""Compiled ring fits: pixel selection, Levenberg-Marquardt and errors for many rings in one call.

The whole per-ring fit of :mod:`.engine` runs here without the interpreter (numba, ``nogil`` so
that threads can share the rings of a stage). Each ring reads a contiguous slice of pixel arrays
sorted by disc radius, so no pixel array is copied per ring. Normal equations are accumulated on
the fly (J^T W J and J^T W r over the free parameters) instead of storing the (n, 7) Jacobian, and
the damped system is solved by Cholesky decomposition.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .geometry import project, ring_trig
from .kinematics import pixel_velocity, ring_constants

AZIMUTH_BINS = 36
INC_BOUNDS = (1.0, 89.0)
GEOMETRY = (0, 1, 3, 4)  # x_center, y_center, position_angle, inclination


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
                    return np.full(n, np.nan), False
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
    p[4] = min(max(p[4], INC_BOUNDS[0]), INC_BOUNDS[1])


@njit(cache=True, nogil=True, inline="always")
def angular_weight(c, sigma, power, sin_wedge, side):
    """sqrt of a pixel's weight, |cos theta|^(power/2) / sigma, or -1 where the exclusion wedge about the
    minor axis or the chosen side (0 both, 1 approaching: cos < 0, 2 receding: cos > 0) leaves it out."""
    if abs(c) < sin_wedge or (side == 1 and not c < 0.0) or (side == 2 and not c > 0.0):
        return -1.0
    return abs(c) ** (0.5 * power) / sigma


@njit(cache=True)
def angular_weights(cos_t, sigma, power, sin_wedge, side):
    """:func:`angular_weight` of each pixel."""
    out = np.empty(cos_t.shape[0])
    for j in range(cos_t.shape[0]):
        out[j] = angular_weight(cos_t[j], sigma[j], power, sin_wedge, side)
    return out


@njit(cache=True, nogil=True)
def _select(x, y, sigma, lo, hi, p, jac, inner, outer, sin_wedge, side, power, sel, w_sqrt, cos_t, sin_t):
    """Pixels of slice [lo, hi) inside the ring at geometry ``p``; fills the buffers.

    Returns (count, first, last): ``first``/``last`` are the lowest and highest slice positions
    whose disc radius falls in the ring (wedge and side aside; -1 if none).
    """
    sp, cp, ci = ring_trig(p[3], p[4])
    n = 0
    first, last = -1, -1
    for k in range(lo, hi):
        xd, yd = project(x[k], y[k], p[0], p[1], jac, sp, cp, ci)
        r = np.sqrt(xd * xd + yd * yd)
        if r < inner or r >= outer:
            continue
        if first < 0:
            first = k
        last = k
        c, s = (xd / r, yd / r) if r > 0.0 else (1.0, 0.0)
        weight = angular_weight(c, sigma[k], power, sin_wedge, side)
        if weight < 0.0:
            continue
        sel[n] = k
        w_sqrt[n] = weight
        cos_t[n] = c
        sin_t[n] = s
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
def normal_equations(x, y, v, sel, n, w_sqrt, p, fidx, jac):
    """(chi^2, J^T W J, J^T W r) over the free parameters ``fidx`` for the ``n`` selected pixels."""
    nf = fidx.shape[0]
    h = np.zeros((nf, nf))
    g = np.zeros(nf)
    d = np.empty(7)
    const = ring_constants(p, jac)
    cost = 0.0
    for j in range(n):
        k = sel[j]
        w = w_sqrt[j]
        r = (v[k] - pixel_velocity(x[k], y[k], p, jac, const, d)) * w
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
def _levenberg_marquardt(x, y, v, sel, n, w_sqrt, p, fidx, jac, max_iterations):
    """Minimise chi^2 over p[fidx] from ``p``; returns (p, chi^2, J^T W J, converged)."""
    lam = 1e-3
    cost, h, g = normal_equations(x, y, v, sel, n, w_sqrt, p, fidx, jac)
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
            c_new, h_new, g_new = normal_equations(x, y, v, sel, n, w_sqrt, trial, fidx, jac)
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
def _fit_selected(x, y, v, sel, n, w_sqrt, cos_t, sin_t, p, fidx, jac, max_iterations, clip):
    """LM on the selection, with iterative clipping at ``clip`` robust sigmas (0: off).

    Clipped pixels are removed from the buffers in place. Returns (p, chi^2, J^T W J, converged, n).
    """
    rounds = 4 if clip > 0 else 1
    d = np.empty(7)
    for _ in range(rounds):
        p_new, cost, h, converged = _levenberg_marquardt(x, y, v, sel, n, w_sqrt, p.copy(), fidx, jac,
                                                         max_iterations)
        if clip <= 0:
            break
        raw = np.empty(n)
        const = ring_constants(p_new, jac)
        for j in range(n):
            k = sel[j]
            raw[j] = v[k] - pixel_velocity(x[k], y[k], p_new, jac, const, d)
        mad = 1.4826 * np.median(np.abs(raw - np.median(raw)))
        limit = clip * max(mad, 1e-9)
        kept = 0
        for j in range(n):
            kept += abs(raw[j]) <= limit
        if kept == n or kept < 2 * fidx.shape[0]:
            break
        m = 0
        for j in range(n):
            if abs(raw[j]) <= limit:
                sel[m], w_sqrt[m], cos_t[m], sin_t[m] = sel[j], w_sqrt[j], cos_t[j], sin_t[j]
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
            return np.full(nf, np.nan)
        out[a] = np.sqrt(max(column[a], 0.0) * factor)
    return out


@njit(cache=True, nogil=True)
def _coverage(cos_t, sin_t, n, sin_wedge, side):
    """Fraction of the usable azimuth (outside the wedge, on the chosen side) holding pixels."""
    hit = np.zeros(AZIMUTH_BINS, np.bool_)
    for j in range(n):
        theta = np.arctan2(sin_t[j], cos_t[j]) % (2 * np.pi)
        hit[min(int(theta / (2 * np.pi) * AZIMUTH_BINS), AZIMUTH_BINS - 1)] = True
    usable = 0
    covered = 0
    for b in range(AZIMUTH_BINS):
        if angular_weight(np.cos((b + 0.5) * 2 * np.pi / AZIMUTH_BINS), 1.0, 0, sin_wedge, side) >= 0.0:
            usable += 1
            covered += hit[b]
    return covered / max(usable, 1)


@njit(cache=True, nogil=True)
def fit_one_ring(x, y, v, sigma, order_radius, margin, lo, hi, start, free, jac, inner, outer, power, sin_wedge, side,
                 clip, max_iterations, geometry_updates, min_pixels, pixels_per_beam, params, errors, stats):
    """Fit one ring from the pixels in slice [lo, hi) (see :mod:`.engine`); writes the outputs in place.

    ``stats`` receives (n_pixels, coverage, chi2_reduced, rms, converged, truncated); ``truncated`` is
    1 when the ring's pixels came within ``margin`` of an end of its slice (in ``order_radius``, the
    radius the pixels are sorted by), i.e. the ring may extend beyond its candidates and should be
    refitted from a wider slice. Since a ring is a connected band on the sky, a ring that continued
    beyond the slice would have pixels all the way to its end, so a gap wider than the pixel spacing
    between the ring's pixels and the slice's end means nothing was cut off.
    """
    size = max(hi - lo, 1)
    sel = np.empty(size, np.int64)
    w_sqrt = np.empty(size)
    cos_t = np.empty(size)
    sin_t = np.empty(size)
    fidx = np.flatnonzero(free)
    nf = fidx.shape[0]
    geometry_free = free[0] or free[1] or free[3] or free[4]
    vel = np.flatnonzero(free & np.array([False, False, True, False, False, True, True]))
    need = max(min_pixels, 2 * nf, 3)
    p = start.copy()
    _clamp(p)
    errors[:] = np.nan
    stats[:] = np.array([0.0, 0.0, np.nan, np.nan, 0.0, 0.0])
    last_step = np.zeros(7)
    damping = 0.0
    n = 0
    cost, h, converged = 0.0, np.zeros((nf, nf)), False
    updates = geometry_updates if geometry_free else 1
    for update in range(updates + 1):
        n, first, last = _select(x, y, sigma, lo, hi, p, jac, inner, outer, sin_wedge, side, power, sel, w_sqrt,
                                 cos_t, sin_t)
        if _reaches_edge(order_radius, lo, hi, first, last, margin):
            stats[5] = 1.0
        if n < need:
            params[:] = p
            stats[0], stats[1] = n, _coverage(cos_t, sin_t, n, sin_wedge, side)
            return
        if update == updates:
            # not settled: hold the damped geometry and refit the velocities on its own pixel selection
            if vel.shape[0] > 0:
                p, cost, h, converged, n = _fit_selected(x, y, v, sel, n, w_sqrt, cos_t, sin_t, p, vel, jac,
                                                         max_iterations, clip)
            cost, h, _ = normal_equations(x, y, v, sel, n, w_sqrt, p, fidx, jac)  # all free parameters, for errors
            converged = True
            break
        p_new, cost, h, converged, n = _fit_selected(x, y, v, sel, n, w_sqrt, cos_t, sin_t, p, fidx, jac,
                                                     max_iterations, clip)
        # settled when no geometry parameter moved by more than 0.02 (deg or pixel) or a tenth of its error
        scaled = _scaled_errors(h, cost, n, pixels_per_beam)
        moved = False
        for a in range(nf):
            j = fidx[a]
            if (j == 0 or j == 1 or j == 3 or j == 4) and abs(p_new[j] - p[j]) > max(0.02, 0.1 * scaled[a]):
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
    scaled = _scaled_errors(h, cost, n, pixels_per_beam)
    if np.isfinite(scaled).all():
        for a in range(nf):
            errors[fidx[a]] = scaled[a]
    else:
        converged = False
    d = np.empty(7)
    const = ring_constants(p, jac)
    squares = 0.0
    for j in range(n):
        k = sel[j]
        squares += (v[k] - pixel_velocity(x[k], y[k], p, jac, const, d)) ** 2
    if p[5] < 0 and free[3]:  # a free position angle turns half a circle instead (same v_los field); with the
        p[3] += 180.0          # position angle held, the sign of v_rotation is the measurement
        p[5] = -p[5]
        p[6] = -p[6]
    p[3] = p[3] % 360.0
    if p[3] >= 360.0:
        p[3] = 0.0
    params[:] = p
    stats[0], stats[1], stats[2], stats[3] = n, _coverage(cos_t, sin_t, n, sin_wedge, side), chi2_red, np.sqrt(
        squares / max(n, 1))
    stats[4] = 1.0 if converged else 0.0


@njit(cache=True, nogil=True)
def fit_ring_list(rings, x, y, v, sigma, order_radius, margin, lo, hi, starts, free, jac, inner, outer, power,
                  sin_wedge, side, clip, max_iterations, geometry_updates, min_pixels, pixels_per_beam, params, errors,
                  stats):
    """:func:`fit_one_ring` for each ring index in ``rings`` (rows of the per-ring arrays)."""
    for k in rings:
        fit_one_ring(x, y, v, sigma, order_radius, margin, lo[k], hi[k], starts[k], free, jac, inner[k], outer[k],
                     power, sin_wedge, side, clip, max_iterations, geometry_updates, min_pixels, pixels_per_beam,
                     params[k], errors[k], stats[k])

