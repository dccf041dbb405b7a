"""One ring's weighted nonlinear least-squares fit (Begeman 1989).

For the pixels whose disc radius falls inside the ring, minimise::

    chi^2 = sum_k  w_k [v_k - v_los(p; x_k, y_k)]^2,    w_k = W(theta_k) / sigma_k^2

over any subset of the seven ring parameters, with the angular weight W = 1, |cos theta| or
cos^2 theta (Begeman 1989) and pixels within an exclusion wedge about the minor axis dropped.
The minimiser is Levenberg-Marquardt with the analytic Jacobian of :func:`.kinematics.ring_model`.
Pixel membership depends on the geometry, so it is re-selected after each geometry update (at
most ``geometry_updates`` times), never inside the minimiser's iterations.

Errors: the formal covariance (J^T W J)^-1 is scaled by the reduced chi-square and by the
number of pixels per beam, because pixels inside one beam are correlated and the formal errors
are too small by about sqrt(pixels per beam) (common practice).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .geometry import disc_coordinates, wrap_angle
from .kinematics import ring_model

__all__ = ["RingFitOptions", "RingSolution", "fit_ring", "WEIGHTINGS", "SIDES"]

WEIGHTINGS = {"uniform": 0, "cos": 1, "cos2": 2}
SIDES = ("both", "approaching", "receding")
_INC_BOUNDS = (1.0, 89.0)
_AZIMUTH_BINS = 36


@dataclass(frozen=True)
class RingFitOptions:
    """How a ring is fitted.

    weighting: ``uniform``, ``cos`` (|cos theta|) or ``cos2`` (cos^2 theta).
    exclusion_wedge: half-opening in deg of the wedge about the minor axis whose pixels are dropped.
    side: ``both``, ``approaching`` (cos theta < 0) or ``receding`` (cos theta > 0).
    clip: drop pixels whose residual exceeds ``clip`` robust standard deviations and refit (None: off).
    """

    weighting: str = "cos"
    exclusion_wedge: float = 15.0
    side: str = "both"
    clip: float | None = None
    max_iterations: int = 40
    geometry_updates: int = 10

    def __post_init__(self):
        from .errors import InputError

        if self.weighting not in WEIGHTINGS:
            raise InputError(f"weighting {self.weighting!r} unknown; choose one of {', '.join(WEIGHTINGS)}")
        if self.side not in SIDES:
            raise InputError(f"side {self.side!r} unknown; choose one of {', '.join(SIDES)}")
        if not 0 <= self.exclusion_wedge < 90:
            raise InputError(f"exclusion wedge must be in [0, 90) deg, got {self.exclusion_wedge}")
        if self.clip is not None and self.clip <= 0:
            raise InputError(f"clip level must be positive, got {self.clip}")


@dataclass
class RingSolution:
    """Result of one ring's fit. ``errors`` is NaN for parameters held fixed."""

    params: np.ndarray
    errors: np.ndarray
    n_pixels: int
    coverage: float
    chi2_reduced: float
    rms: float
    converged: bool
    free: np.ndarray = field(default_factory=lambda: np.zeros(7, bool))



def _select(x, y, params, jac, inner, outer, options):
    radius, cos_t, sin_t = disc_coordinates(x, y, params[0], params[1], jac, params[3], params[4])
    keep = (radius >= inner) & (radius < outer)
    if options.exclusion_wedge > 0:
        keep &= np.abs(cos_t) >= np.sin(np.radians(options.exclusion_wedge))
    if options.side == "approaching":
        keep &= cos_t < 0
    elif options.side == "receding":
        keep &= cos_t > 0
    return keep, cos_t, sin_t


def _coverage(cos_t, sin_t, options) -> float:
    """Fraction of the usable azimuth (outside the wedge, on the chosen side) holding pixels."""
    centres = (np.arange(_AZIMUTH_BINS) + 0.5) * 2 * np.pi / _AZIMUTH_BINS
    usable = np.abs(np.cos(centres)) >= np.sin(np.radians(options.exclusion_wedge))
    if options.side == "approaching":
        usable &= np.cos(centres) < 0
    elif options.side == "receding":
        usable &= np.cos(centres) > 0
    theta = np.mod(np.arctan2(sin_t, cos_t), 2 * np.pi)
    hit = np.zeros(_AZIMUTH_BINS, bool)
    hit[np.minimum((theta / (2 * np.pi) * _AZIMUTH_BINS).astype(int), _AZIMUTH_BINS - 1)] = True
    return float((hit & usable).sum() / max(usable.sum(), 1))


def _clamp(p):
    p[4] = min(max(p[4], _INC_BOUNDS[0]), _INC_BOUNDS[1])
    return p


def _levenberg_marquardt(x, y, v, w_sqrt, p, free, jac, max_iterations):
    """Minimise sum (w_sqrt (v - model))^2 over p[free]; returns (p, residual, A, converged)."""
    lam = 1e-3
    model, deriv = ring_model(x, y, p, jac)
    r = (v - model) * w_sqrt
    cost = r @ r
    converged = False
    for _ in range(max_iterations):
        a = deriv[:, free] * w_sqrt[:, None]
        g = a.T @ r
        h = a.T @ a
        diag = np.diag(h).copy() + 1e-12
        improved = False
        while lam < 1e12:
            try:
                step = np.linalg.solve(h + lam * np.diag(diag), g)
            except np.linalg.LinAlgError:
                lam *= 10
                continue
            trial = p.copy()
            trial[free] += step
            _clamp(trial)
            m_new, d_new = ring_model(x, y, trial, jac)
            r_new = (v - m_new) * w_sqrt
            c_new = r_new @ r_new
            if np.isfinite(c_new) and c_new <= cost:
                improved = True
                small = cost - c_new <= 1e-10 * max(cost, 1e-30)
                p, model, deriv, r, cost = trial, m_new, d_new, r_new, c_new
                lam = max(lam / 10, 1e-12)
                break
            lam *= 10
        if not improved or small:
            converged = True
            break
    a = deriv[:, free] * w_sqrt[:, None]
    return p, r, a, converged


def _normalise(p):
    """Keep v_rotation >= 0 by turning the position angle half a circle (same v_los field)."""
    if p[5] < 0:
        p[3] += 180.0
        p[5] = -p[5]
        p[6] = -p[6]
    p[3] = wrap_angle(p[3])
    return p


def _fit_selected(x, y, v, idx, w_sqrt, p, free, jac, options, n_free):
    """LM on the selected pixels, with optional iterative clipping; returns (p, r, A, converged, idx)."""
    for _round in range(4 if options.clip else 1):
        p_new, r, a, converged = _levenberg_marquardt(x[idx], y[idx], v[idx], w_sqrt, p.copy(), free, jac,
                                                      options.max_iterations)
        if not options.clip:
            break
        raw = r / np.where(w_sqrt > 0, w_sqrt, 1.0)
        mad = 1.4826 * np.median(np.abs(raw - np.median(raw)))
        good = np.abs(raw) <= options.clip * max(mad, 1e-9)
        if good.all() or good.sum() < 2 * n_free:
            break
        idx, w_sqrt = idx[good], w_sqrt[good]
    return p_new, r, a, converged, idx


def fit_ring(x, y, v, sigma, start, free, sky_jacobian, inner, outer, options=RingFitOptions(),
             pixels_per_beam: float = 1.0, min_pixels: int = 0) -> RingSolution:
    """Fit one ring spanning disc radii ``[inner, outer)`` arcsec.

    ``x, y, v, sigma``: coordinates, velocities and errors (km/s) of all candidate pixels.
    ``start``: the seven parameters in :data:`.kinematics.PARAMETERS` order; ``free``: a boolean
    mask of those to fit. A ring with fewer than ``max(min_pixels, 2 * n_free)`` pixels is
    returned unfitted (``converged`` False, parameters at ``start``).
    """
    p = _clamp(np.asarray(start, float).copy())
    free = np.asarray(free, bool)
    n_free = int(free.sum())
    jac = np.ascontiguousarray(sky_jacobian, float)
    power = WEIGHTINGS[options.weighting]
    geometry = np.zeros(7, bool)
    geometry[[0, 1, 3, 4]] = True
    geometry_free = bool((free & geometry).any())
    result = None
    for _ in range(options.geometry_updates if geometry_free else 1):
        keep, cos_t, sin_t = _select(x, y, p, jac, inner, outer, options)
        n = int(keep.sum())
        if n < max(min_pixels, 2 * n_free, 3):
            return RingSolution(p, np.full(7, np.nan), n, _coverage(cos_t[keep], sin_t[keep], options),
                                np.nan, np.nan, False, free)
        idx = np.flatnonzero(keep)
        w_sqrt = np.abs(cos_t[idx]) ** (power / 2.0) / sigma[idx]
        p_new, r, a, converged, idx = _fit_selected(x, y, v, idx, w_sqrt, p, free, jac, options, n_free)
        result = (idx, r, a, converged, cos_t, sin_t)
        step = p_new - p
        if not geometry_free or np.max(np.abs(step[geometry])) < 0.02:
            p = p_new
            break
        # Damped fixed-point update of the geometry: the pixel selection depends on the geometry, and an
        # undamped update can flip between two selections (seen in warped discs); velocities take the full step.
        p = p_new - 0.5 * np.where(geometry, step, 0.0)
    else:
        # not settled: hold the damped geometry and refit the velocities on its own pixel selection
        keep, cos_t, sin_t = _select(x, y, p, jac, inner, outer, options)
        idx = np.flatnonzero(keep)
        if len(idx) < max(min_pixels, 2 * n_free, 3):
            return RingSolution(p, np.full(7, np.nan), len(idx), _coverage(cos_t[keep], sin_t[keep], options),
                                np.nan, np.nan, False, free)
        w_sqrt = np.abs(cos_t[idx]) ** (power / 2.0) / sigma[idx]
        velocities = free & ~geometry
        if velocities.any():
            p, _, _, _, idx_v = _fit_selected(x, y, v, idx, w_sqrt, p, velocities, jac, options, int(velocities.sum()))
            keep_v = np.isin(idx, idx_v)
            idx, w_sqrt = idx[keep_v], w_sqrt[keep_v]
        _, r, a, _ = _levenberg_marquardt(x[idx], y[idx], v[idx], w_sqrt, p, free, jac, 0)  # Jacobian for errors
        result = (idx, r, a, True, cos_t, sin_t)
    idx, r, a, converged, cos_t, sin_t = result
    n = len(idx)
    dof = max(n - n_free, 1)
    chi2_red = float(r @ r / dof)
    errors = np.full(7, np.nan)
    try:
        cov = np.linalg.inv(a.T @ a) * chi2_red * pixels_per_beam
        errors[free] = np.sqrt(np.clip(np.diag(cov), 0, None))
    except np.linalg.LinAlgError:
        converged = False
    model, _ = ring_model(x[idx], y[idx], p, jac)
    rms = float(np.sqrt(np.mean((v[idx] - model) ** 2)))
    p = _normalise(p)
    return RingSolution(p, errors, n, _coverage(cos_t[idx], sin_t[idx], options), chi2_red, rms, converged, free)
