"""First guess of the disc's geometry from the whole map, with no help from the user.

A simple parametric disc is fitted to all valid pixels at once::

    v_los = v_systemic + sin(i) v_flat (2/pi) arctan(R / r_turn) cos(theta)

(the arctangent curve of Courteau 1997, AJ 114, 2402), with a soft-L1 loss so that blanks,
outliers and non-circular motions do not drag it. Starting values come from moments of the map:
the median velocity, the centroid of the valid (or intensity-weighted) pixels, the direction of
the velocity-weighted first moment (pointing to the receding side), and a small grid of
inclinations, keeping the best. Values the user gives replace the guesses; fixed ones stay fixed.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import least_squares

from ..io.maps import VelocityMap
from .geometry import disc_coordinates
from .parameters import GuessParameter as Q

__all__ = ["first_guess", "FIRST_GUESS_PARAMETERS"]

FIRST_GUESS_PARAMETERS = tuple(q.name for q in Q)
_MAX_PIXELS = 20000
_GRID_PIXELS = 5000


def _arctan_model(q, x, y, jac):
    inc = q[Q.inclination]
    radius, cos_t, _ = disc_coordinates(x, y, q[Q.x_center], q[Q.y_center], jac, q[Q.position_angle], inc)
    return q[Q.v_systemic] + np.sin(np.radians(inc)) * q[Q.v_flat] * (2 / np.pi) * np.arctan(
        radius / abs(q[Q.r_turn])) * cos_t


def _moments(vmap: VelocityMap, x, y, v):
    w = None
    if vmap.intensity is not None:
        w = np.nan_to_num(vmap.intensity[y.astype(int), x.astype(int)])
        w = np.clip(w, 0, None)
        if w.sum() <= 0:
            w = None
    vsys = float(np.median(v))
    xc = float(np.average(x, weights=w))
    yc = float(np.average(y, weights=w))
    east, north = vmap.sky_offsets(x, y, xc, yc)
    dv = v - vsys
    pa = float(np.degrees(np.arctan2(np.sum(dv * east), np.sum(dv * north))) % 360.0)
    half_range = 0.5 * float(np.percentile(v, 95) - np.percentile(v, 5))
    extent = float(np.percentile(np.hypot(east, north), 90))
    return {"x_center": xc, "y_center": yc, "v_systemic": vsys, "position_angle": pa,
            "half_range": half_range, "extent": extent}


def _fit_arctan(q0, free, x, y, v, sigma, jac, scale, pixel_scale):
    """Soft-L1 least squares of the arctangent disc from ``q0`` over ``free``; returns (q, cost)."""

    def residual(qf):
        q = q0.copy()
        q[free] = qf
        return (v - _arctan_model(q, x, y, jac)) / sigma

    # v_flat >= 0 picks the receding side; with the position angle held, the sign is left to the data
    lower, upper = np.full(len(Q), -np.inf), np.full(len(Q), np.inf)
    lower[Q.inclination], upper[Q.inclination] = 5.0, 85.0
    lower[Q.v_flat] = 0.0 if free[Q.position_angle] else -np.inf
    lower[Q.r_turn] = 0.1 * pixel_scale
    lower, upper = lower[free], upper[free]
    start = np.clip(q0[free], lower + 1e-9, upper - 1e-9)
    sol = least_squares(residual, start, bounds=(lower, upper), loss="soft_l1", f_scale=scale / np.median(sigma),
                        x_scale="jac", max_nfev=400)
    q = q0.copy()
    q[free] = sol.x
    return q, sol.cost


def first_guess(vmap: VelocityMap, initial: dict | None = None, fixed=(), seed: int = 0) -> dict:
    """Whole-disc parametric fit; returns the seven values of :data:`FIRST_GUESS_PARAMETERS`
    plus ``rms`` (km/s) and ``n_pixels`` used.

    ``initial`` holds user values (they are used instead of the guesses); names in ``fixed``
    are held at those values. The starting inclinations are compared on up to 5,000 valid pixels
    and the best is refined on up to 20,000, all drawn with ``seed``.
    """
    initial = dict(initial or {})
    ok = vmap.valid
    yy, xx = np.nonzero(ok)
    if len(xx) > _MAX_PIXELS:
        pick = np.sort(np.random.default_rng(seed).choice(len(xx), _MAX_PIXELS, replace=False))
        yy, xx = yy[pick], xx[pick]
    x, y = xx.astype(float), yy.astype(float)
    v = vmap.velocity[yy, xx]
    sigma = vmap.error[yy, xx] if vmap.error is not None else np.ones_like(v)
    mom = _moments(vmap, x, y, v)
    base = {k: initial.get(k, mom[k]) for k in ("x_center", "y_center", "v_systemic", "position_angle")}
    fixed = set(fixed)
    free = np.array([name not in fixed for name in FIRST_GUESS_PARAMETERS])
    if "v_rotation" in fixed:
        free[Q.v_flat] = False
    scale = float(np.maximum(np.median(np.abs(v - mom["v_systemic"])), 1.0))
    few = slice(None, None, max(1, len(v) // _GRID_PIXELS))  # the draw is random, so every k-th is too
    inclinations = [initial["inclination"]] if "inclination" in initial else [30.0, 50.0, 70.0]
    best = None
    for inc in inclinations:
        vflat = initial.get("v_rotation", mom["half_range"] / max(np.sin(np.radians(inc)), 0.2))
        r_turn = max(0.2 * mom["extent"], 2 * vmap.pixel_scale)
        start = dict(base, inclination=inc, v_flat=max(vflat, 5.0), r_turn=r_turn)
        q0 = np.array([start[name] for name in FIRST_GUESS_PARAMETERS])
        q, cost = _fit_arctan(q0, free, x[few], y[few], v[few], sigma[few], vmap.sky_jacobian, scale, vmap.pixel_scale)
        if best is None or cost < best[1]:
            best = (q, cost)
    q = best[0]
    if len(v[few]) < len(v):
        q, _ = _fit_arctan(q, free, x, y, v, sigma, vmap.sky_jacobian, scale, vmap.pixel_scale)
    if q[Q.v_flat] < 0 and free[Q.position_angle]:
        q[Q.position_angle] += 180.0
        q[Q.v_flat] = -q[Q.v_flat]
    q[Q.position_angle] %= 360.0
    out = {name: float(val) for name, val in zip(FIRST_GUESS_PARAMETERS, q)}
    resid = v - _arctan_model(q, x, y, vmap.sky_jacobian)
    out["rms"] = float(np.sqrt(np.mean(resid**2)))
    out["n_pixels"] = int(len(v))
    return out


def guess_rotation(guess: dict, radius):
    """Rotation speed of the first-guess arctangent curve at ``radius`` arcsec."""
    return guess["v_flat"] * (2 / np.pi) * np.arctan(np.asarray(radius, float) / abs(guess["r_turn"]))
