"""Modified gravity and empirical relations between baryons and dynamics (SI accelerations in m s^-2).

- MOND (Milgrom 1983, ApJ 270, 365): g = nu(g_N / a0) g_N with the "simple" interpolating function
  nu(y) = 1/2 + sqrt(1/4 + 1/y) (Famaey & Binney 2005) or the "standard" one
  nu(y) = sqrt(1/2 + sqrt(1/4 + 1/y^2)) (as used by Begeman, Broeils & Sanders 1991);
  a0 about 1.2e-10 m s^-2.
- Radial acceleration relation (McGaugh, Lelli & Schombert 2016, PRL 117, 201101):
  g_obs = g_bar / (1 - exp(-sqrt(g_bar / g_dagger))), g_dagger about 1.20e-10 m s^-2.
- Baryonic Tully-Fisher relation (McGaugh 2012, AJ 143, 40): M_b = A V_f^slope, slope about 4, fitted
  as a line in log-log with errors in both variables and an intrinsic (vertical) scatter s by maximum
  likelihood (e.g. Lelli et al. 2019, MNRAS 484, 3267; the usual form since D'Agostini 2005):
  -2 ln L = sum_k [(y_k - a x_k - b)^2 / S_k^2 + ln(2 pi S_k^2)], S_k^2 = sy_k^2 + a^2 sx_k^2 + s^2.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy import units as u

__all__ = ["A0", "acceleration", "mond_speed", "rar", "fit_rar", "fit_btfr", "BTFRFit", "INTERPOLATING"]

A0 = 1.2e-10
_KMS2_PER_KPC_TO_SI = float((1 * u.km**2 / u.s**2 / u.kpc).to_value(u.m / u.s**2))


def acceleration(v_km_s, r_kpc):
    """Centripetal acceleration v^2 / r in m s^-2 (signed v^2 allowed through |v| v)."""
    v = np.asarray(v_km_s, float)
    return v * np.abs(v) / np.asarray(r_kpc, float) * _KMS2_PER_KPC_TO_SI


INTERPOLATING = {
    "simple": lambda y: 0.5 + np.sqrt(0.25 + 1.0 / y),
    "standard": lambda y: np.sqrt(0.5 + np.sqrt(0.25 + 1.0 / y**2)),
}


def mond_speed(v_baryon_squared, r_kpc, a0: float = A0, interpolating: str = "simple"):
    """MOND circular speed (km/s) from the signed baryonic v^2 (km^2/s^2) at radius r (kpc)."""
    g_n = np.asarray(v_baryon_squared, float) / np.asarray(r_kpc, float) * _KMS2_PER_KPC_TO_SI
    y = np.maximum(np.abs(g_n), 1e-30) / a0
    g = INTERPOLATING[interpolating](y) * g_n
    return np.sqrt(np.clip(g * np.asarray(r_kpc, float) / _KMS2_PER_KPC_TO_SI, 0, None))


def rar(g_bar, g_dagger: float = 1.2e-10):
    g_bar = np.asarray(g_bar, float)
    return g_bar / (1.0 - np.exp(-np.sqrt(g_bar / g_dagger)))


def fit_rar(g_bar, g_obs, g_obs_err=None):
    """Fit g_dagger of :func:`rar` by least squares in log10 g_obs; returns (g_dagger, error)."""
    from scipy.optimize import least_squares

    gb, go = np.asarray(g_bar, float), np.asarray(g_obs, float)
    ok = (gb > 0) & (go > 0)
    sig = np.full(ok.sum(), 0.1) if g_obs_err is None else (np.asarray(g_obs_err, float)[ok] / go[ok] / np.log(10))
    sig = np.maximum(sig, 0.01)

    def resid(q):
        return (np.log10(rar(gb[ok], 10 ** q[0])) - np.log10(go[ok])) / sig

    sol = least_squares(resid, [-10.0])
    cov = np.linalg.inv(sol.jac.T @ sol.jac) * max(2 * sol.cost / max(ok.sum() - 1, 1), 1.0)
    g = 10 ** sol.x[0]
    return float(g), float(g * np.log(10) * np.sqrt(cov[0, 0]))


@dataclass(frozen=True)
class BTFRFit:
    """log10 M_b = slope log10 V + intercept (M_sun, km/s), intrinsic vertical scatter in dex; 1-sigma errors
    from the inverse Hessian of -ln L."""

    slope: float
    slope_err: float
    intercept: float
    intercept_err: float
    scatter: float
    scatter_err: float
    n_galaxies: int


def _hessian(f, x, steps) -> np.ndarray:
    """Central finite-difference Hessian of a scalar function ``f`` at ``x``."""
    n = len(x)
    h = np.zeros((n, n))
    for j in range(n):
        for k in range(j, n):
            ej, ek = np.eye(n)[j] * steps[j], np.eye(n)[k] * steps[k]
            h[j, k] = h[k, j] = (f(x + ej + ek) - f(x + ej - ek) - f(x - ej + ek) + f(x - ej - ek)) / (4 * steps[j] * steps[k])
    return h


def fit_btfr(v_flat, v_flat_err, m_baryon, m_baryon_err) -> BTFRFit:
    """Baryonic Tully-Fisher fit log10 M = slope log10 V + intercept with errors in both variables and an
    intrinsic scatter, by maximum likelihood (module docstring). Masses in M_sun, speeds in km/s."""
    from scipy.optimize import minimize

    v, ev, m, em = (np.asarray(a, float) for a in (v_flat, v_flat_err, m_baryon, m_baryon_err))
    ok = (v > 0) & (m > 0) & (ev > 0) & (em > 0)
    if ok.sum() < 4:
        raise ValueError("a BTFR fit needs at least four galaxies with positive speeds, masses and errors")
    x, y = np.log10(v[ok]), np.log10(m[ok])
    sx, sy = ev[ok] / v[ok] / np.log(10), em[ok] / m[ok] / np.log(10)
    x0 = float(np.median(x))  # fit about the median speed, so slope and intercept are nearly uncorrelated

    def minus_two_log_l(p):
        slope, at_x0, log_s = p
        var = sy**2 + slope**2 * sx**2 + np.exp(2 * log_s)
        return float(np.sum((y - at_x0 - slope * (x - x0)) ** 2 / var + np.log(2 * np.pi * var)))

    start = np.polyfit(x - x0, y, 1)
    best = minimize(minus_two_log_l, [start[0], start[1], np.log(0.1)], method="Nelder-Mead",
                    options={"xatol": 1e-8, "fatol": 1e-10, "maxiter": 20000})
    cov = np.linalg.inv(0.5 * _hessian(minus_two_log_l, best.x, np.array([1e-3, 1e-3, 1e-3])))
    slope, at_x0, log_s = best.x
    intercept = at_x0 - slope * x0
    intercept_err = np.sqrt(cov[1, 1] + x0**2 * cov[0, 0] - 2 * x0 * cov[0, 1])
    scatter = float(np.exp(log_s))
    return BTFRFit(float(slope), float(np.sqrt(cov[0, 0])), float(intercept), float(intercept_err), scatter,
                   float(scatter * np.sqrt(cov[2, 2])), int(ok.sum()))
