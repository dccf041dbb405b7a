"""The named parts of v_rotation's uncertainty, and how they add (pure numerics, no state).

The error model splits what could move the curve into parts that share no source, so that the
total (their sum in quadrature) counts nothing twice:

- **random** (``v_rotation_err_random``): the noise of the map at the *adopted* geometry, from the
  resampled scatter (noise fields with the residual's rms and modelled correlation, geometry held) or, without
  resampling, the formal error (scaled by sqrt(reduced chi-square) and sqrt(pixels per beam)).
  Rings closer than a beam share pixels' noise: the correlation between neighbours is measured on
  the same draws (:func:`band_correlation`).
- **geometry** (``v_rotation_err_geometry``): the curve's response to the adopted orientation's
  +1 sigma, one signed vector per angle (:func:`geometry_response`), the same shift at every ring:
  fully correlated from ring to ring. Only v_rotation sin i is measured, so for inclination
  dv = -v cot(i) sigma_i; a position-angle error leaves a complete ring's speed unchanged to first
  order and lowers it to second order, dv = -v (1 - cos sigma_PA).
- **beam** (``v_rotation_err_beam``): the beam treatment's own uncertainty, as that step reports it
  (0 when it reports none).
- **asymmetry** (``v_rotation_err_asymmetry``): a systematic only where the approaching and
  receding halves differ beyond their noise (:func:`asymmetry_term`).

Total: sqrt(random^2 + geometry^2 + beam^2 + asymmetry^2). The old side term (half the
approaching-receding difference, de Blok et al. 2008) is, for a symmetric disc, the noise a second
time; the old resampled error carried the inclination's scatter, to which v cot(i) sigma_i was
added again. Neither is double counted here.
"""

from __future__ import annotations

import numpy as np

__all__ = ["asymmetry_term", "geometry_response", "band_correlation", "total_error", "excess_scatter",
           "SIGNIFICANCE"]

#: the approaching-receding difference counts as asymmetry only beyond this many of its own sigmas
SIGNIFICANCE = 2.0


def asymmetry_term(v_approaching, v_receding, sigma_approaching, sigma_receding, significance=SIGNIFICANCE):
    """Systematic error of the two-sided curve from a real difference between the halves.

    With d = v_app - v_rec = D + n, n ~ N(0, s_d^2), s_d^2 = s_app^2 + s_rec^2, E[d^2] = D^2 + s_d^2, so
    D^2 is estimated without the noise's share by d^2 - s_d^2. The two-sided curve lies midway, each
    half D/2 from it, so the term is sqrt(max(0, d^2 - s_d^2)) / 2 — counted only where the halves
    differ significantly (|d| > ``significance`` s_d), else 0: for a symmetric disc, noise alone makes
    |d| > 2 s_d in about 5 per cent of rings. NaN where a half is missing.
    """
    d = np.asarray(v_approaching, float) - np.asarray(v_receding, float)
    var_d = np.asarray(sigma_approaching, float) ** 2 + np.asarray(sigma_receding, float) ** 2
    with np.errstate(invalid="ignore"):
        significant = d**2 > significance**2 * var_d
        term = np.where(significant, 0.5 * np.sqrt(np.clip(d**2 - var_d, 0, None)), 0.0)
    return np.where(np.isfinite(d) & np.isfinite(var_d), term, np.nan)


def geometry_response(v_rotation, inclination, inclination_err, position_angle_err) -> dict:
    """Signed change of v_rotation per ring at the adopted orientation's +1 sigma (module docstring).

    Angles in degrees; NaN errors (a held angle) give 0. Returns {"inclination": dv_i,
    "position_angle": dv_pa} in the unit of ``v_rotation``.
    """
    v = np.asarray(v_rotation, float)
    inc = np.radians(np.asarray(inclination, float))
    d_inc = np.radians(np.nan_to_num(np.asarray(inclination_err, float)))
    d_pa = np.radians(np.nan_to_num(np.asarray(position_angle_err, float)))
    return {"inclination": -v * d_inc / np.tan(inc), "position_angle": -v * (1.0 - np.cos(d_pa))}


def band_correlation(draws, reach: int) -> np.ndarray:
    """Correlation matrix of the rings' speeds over resampled ``draws`` (n_draws, n_rings), kept within
    ``reach`` rings of the diagonal (neighbours sharing a beam) and 0 beyond, where a few dozen draws
    measure only their own scatter (about 1/sqrt(n_draws)).

    Each kept coefficient is clipped to [-1/(2 reach), 1/(2 reach)] so the banded matrix stays diagonally
    dominant, hence positive definite; rings with no finite draws get 1 on the diagonal and 0 elsewhere.
    """
    x = np.asarray(draws, float)
    n = x.shape[1]
    corr = np.eye(n)
    if x.shape[0] < 3 or reach < 1:
        return corr
    centred = x - np.nanmean(x, axis=0)
    scale = np.sqrt(np.nanmean(centred**2, axis=0))
    limit = 0.5 / reach
    for lag in range(1, min(reach, n - 1) + 1):
        with np.errstate(invalid="ignore", divide="ignore"):
            c = np.nanmean(centred[:, :-lag] * centred[:, lag:], axis=0) / (scale[:-lag] * scale[lag:])
        c = np.clip(np.nan_to_num(c), -limit, limit)
        idx = np.arange(n - lag)
        corr[idx, idx + lag] = corr[idx + lag, idx] = c
    return corr


def total_error(parts: dict) -> np.ndarray:
    """Quadrature sum of the named parts (NaN parts count as 0; NaN where every part is NaN)."""
    stacked = np.array([np.asarray(p, float) for p in parts.values()])
    total = np.sqrt(np.sum(np.nan_to_num(stacked) ** 2, axis=0))
    return np.where(np.isfinite(stacked).any(axis=0), total, np.nan)


def excess_scatter(values, errors) -> float:
    """Scatter of ``values`` about their weighted mean beyond what their ``errors`` explain (the
    between-study variance of DerSimonian & Laird 1986, Controlled Clinical Trials 7, 177)::

        Q = sum w (x - x_w)^2,  w = 1 / e^2,   tau^2 = max(0, (Q - (k - 1)) / (sum w - sum w^2 / sum w))

    Returns tau (0 with fewer than three finite values). Used for the rings' own orientation about an
    adopted constant one: an undetected small warp or non-circular motions turn rings by more than
    their noise.
    """
    x, e = np.asarray(values, float), np.asarray(errors, float)
    ok = np.isfinite(x) & np.isfinite(e) & (e > 0)
    if ok.sum() < 3:
        return 0.0
    w = 1.0 / e[ok] ** 2
    mean = np.sum(w * x[ok]) / w.sum()
    q = np.sum(w * (x[ok] - mean) ** 2)
    tau2 = (q - (ok.sum() - 1)) / (w.sum() - np.sum(w**2) / w.sum())
    return float(np.sqrt(max(tau2, 0.0)))
