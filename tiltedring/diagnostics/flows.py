"""Flow models beyond pure rotation, fitted per ring at the fixed final geometry, and their selection.

With theta the disc-plane azimuth and i the inclination (geometry held at the final values),

- ``circular``:     v_los = v_0 + sin i  v_t cos(theta)
- ``radial``:       v_los = v_0 + sin i [v_t cos(theta) + v_r sin(theta)]
  (v_r > 0: the minor-axis half at position angle + 90 recedes; outflow if that half is the far
  side, inflow if it is the near side — which the velocity map alone does not tell)
- ``bisymmetric``:  v_los = v_0 + sin i [v_t cos(theta) - v_2t cos(2 theta_b) cos(theta)
  - v_2r sin(2 theta_b) sin(theta)],  theta_b = theta - phi_b
  (Spekkens & Sellwood 2007, ApJ 664, 204: an m = 2 bar-like flow with its own angle phi_b in the
  disc plane, measured from the receding major axis, and tangential/radial amplitudes).

Each model is linear in its velocities for a given phi_b, so phi_b is found by a grid search
(3 deg steps, parabolic refinement; each angle a 4 x 4 solve from precomputed normal equations) —
per ring, and over a radial range with one common phi_b.

Selection by BIC with the pixel-correlation correction: with n pixels, p pixels per beam and
s^2 the reduced chi-square of the richest model (the noise scale when no error map is given),
BIC = chi^2 / (s^2 p) + k ln(n / p). A richer model is chosen only when it lowers the BIC by
more than ``min_delta_bic`` (10: "very strong" on the Kass & Raftery 1995 scale) and its
non-circular amplitude in the disc plane exceeds both ``min_amplitude`` km/s and three times its
error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..fitting.candidates import gather_rings
from ..fitting.leastsq import weighted_least_squares

__all__ = ["FlowTest", "fit_flows", "MODELS"]

MODELS = ("circular", "radial", "bisymmetric")
_K = {"circular": 2, "radial": 3, "bisymmetric": 5}
_ANGLES = np.radians(np.arange(0.0, 180.0, 3.0))


@dataclass(frozen=True)
class FlowTest:
    """Thresholds of the flow-model selection (calibrated on flat circular discs; see the README)."""

    min_delta_bic: float = 10.0
    min_amplitude: float = 5.0


def _columns(cos_t, sin_t, sin_i, phi_b=None, radial=False):
    cols = [np.ones_like(cos_t), sin_i * cos_t]
    if radial:
        cols.append(sin_i * sin_t)
    if phi_b is not None:
        theta_b2 = 2.0 * (np.arctan2(sin_t, cos_t) - phi_b)
        cols += [-sin_i * np.cos(theta_b2) * cos_t, -sin_i * np.sin(theta_b2) * sin_t]
    return np.column_stack(cols)


def _gram(cos_t, sin_t, sin_i, v, w):
    """Normal equations of the six-column basis that spans the bisymmetric model at every angle.

    With c = cos 2 phi_b, s = sin 2 phi_b: cos(2 theta_b) cos(theta) = c cos2t cost + s sin2t cost and
    sin(2 theta_b) sin(theta) = c sin2t sint - s cos2t sint, so for each angle the model's columns are
    fixed combinations (:func:`_combine`) of [1, cos t, cos2t cos t, sin2t cos t, sin2t sin t, cos2t sin t]
    (times sin i); chi^2 at any angle then costs a 4 x 4 solve.
    """
    c2 = cos_t**2 - sin_t**2
    s2 = 2 * sin_t * cos_t
    basis = np.column_stack([np.ones_like(cos_t), sin_i * cos_t, sin_i * c2 * cos_t, sin_i * s2 * cos_t,
                             sin_i * s2 * sin_t, sin_i * c2 * sin_t]) * w[:, None]
    vw = v * w
    return basis.T @ basis, basis.T @ vw, float(vw @ vw)


def _combine(phi):
    """(len(phi), 6, 4) maps from the six-column basis to the bisymmetric model's columns at each angle."""
    phi = np.atleast_1d(phi)
    c, s = np.cos(2 * phi), np.sin(2 * phi)
    t = np.zeros((len(phi), 6, 4))
    t[:, 0, 0] = t[:, 1, 1] = 1.0
    t[:, 2, 2], t[:, 3, 2] = -c, -s
    t[:, 4, 3], t[:, 5, 3] = -c, s
    return t


def _chi2_at(gram, phi):
    """chi^2 of the bisymmetric model at each bar angle in ``phi`` (array), from :func:`_gram`."""
    g, h, vv = gram
    t = _combine(phi)
    g4 = np.einsum("aij,jk,akl->ail", t.transpose(0, 2, 1), g, t)
    h4 = np.einsum("aji,j->ai", t, h)
    try:
        coef = np.linalg.solve(g4, h4[..., None])[..., 0]
    except np.linalg.LinAlgError:
        coef = np.array([np.linalg.lstsq(a, b, rcond=None)[0] for a, b in zip(g4, h4)])
    return vv - np.einsum("ai,ai->a", coef, h4)


def _best_angle(gram):
    """phi_b minimising chi^2 of the bisymmetric model (grid, then a parabola through the minimum)."""
    chi = _chi2_at(gram, _ANGLES)
    j = int(np.argmin(chi))
    lo, hi = chi[j - 1], chi[(j + 1) % len(chi)]
    denom = lo - 2 * chi[j] + hi
    shift = 0.5 * (lo - hi) / denom if denom > 0 else 0.0
    return (_ANGLES[j] + shift * (_ANGLES[1] - _ANGLES[0])) % np.pi


def fit_flows(pixels, sky_jacobian, rings: dict, inner, outer, pixels_per_beam: float = 1.0,
              test: FlowTest = FlowTest(), bar_range=None, ring_pixels: list | None = None) -> dict:
    """Fit the three models to every ring and choose one per ring (module docstring).

    ``bar_range``: optional (r_min, r_max) arcsec over which one common bar angle is fitted; by
    default the range of the rings that chose ``bisymmetric`` on their own. Returns per-ring arrays
    (``flow_model``, ``v_t_<model>``, ``v_radial_flow`` and error, ``v_2t``, ``v_2r`` and errors,
    ``bar_angle_ring``, ``delta_bic_radial``, ``delta_bic_bisymmetric``) and ``disc`` (disc-wide
    BIC per model, the common bar angle and the chosen disc-wide model). ``ring_pixels``: the rings'
    pixels from :func:`.candidates.gather_rings`, when already at hand.
    """
    if ring_pixels is None:
        ring_pixels = gather_rings(pixels, sky_jacobian, rings, inner, outer)
    n_rings = len(inner)
    sin_i = np.sin(np.radians(np.asarray(rings["inclination"], float)))
    radii = 0.5 * (np.asarray(inner) + np.asarray(outer))
    out = {"flow_model": np.array(["circular"] * n_rings, dtype=object)}
    for key in ("v_t_circular", "v_t_radial", "v_t_bisymmetric", "v_radial_flow", "v_radial_flow_err", "v_2t",
                "v_2t_err", "v_2r", "v_2r_err", "bar_angle_ring", "delta_bic_radial", "delta_bic_bisymmetric",
                "noise_scale"):
        out[key] = np.full(n_rings, np.nan)
    disc_chi = {m: 0.0 for m in MODELS}
    disc_n = 0.0
    cache = {}
    for k in range(n_rings):
        cos_t, sin_t, v, sigma = ring_pixels[k]
        w = 1.0 / sigma
        n = len(v)
        if n < 4 * _K["bisymmetric"]:
            continue
        cache[k] = (cos_t, sin_t, v, w, _gram(cos_t, sin_t, sin_i[k], v, w))
        phi = _best_angle(cache[k][4])
        fits = {"circular": weighted_least_squares(_columns(cos_t, sin_t, sin_i[k]), v, w),
                "radial": weighted_least_squares(_columns(cos_t, sin_t, sin_i[k], radial=True), v, w),
                "bisymmetric": weighted_least_squares(_columns(cos_t, sin_t, sin_i[k], phi), v, w)}
        s2 = max(fits["bisymmetric"][2] / (n - _K["bisymmetric"]), 1e-12)
        n_eff = max(n / pixels_per_beam, _K["bisymmetric"] + 1.0)
        bic = {m: fits[m][2] / (s2 * pixels_per_beam) + _K[m] * np.log(n_eff) for m in MODELS}
        for m in MODELS:
            disc_chi[m] += fits[m][2] / (s2 * pixels_per_beam)
        disc_n += n_eff
        errs = {m: np.sqrt(np.clip(np.diag(fits[m][1]) * s2 * pixels_per_beam, 0, None))
                for m in ("radial", "bisymmetric")}
        out["noise_scale"][k] = np.sqrt(s2)
        out["v_t_circular"][k] = fits["circular"][0][1]
        out["v_t_radial"][k] = fits["radial"][0][1]
        out["v_t_bisymmetric"][k] = fits["bisymmetric"][0][1]
        out["v_radial_flow"][k], out["v_radial_flow_err"][k] = fits["radial"][0][2], errs["radial"][2]
        out["v_2t"][k], out["v_2t_err"][k] = fits["bisymmetric"][0][2], errs["bisymmetric"][2]
        out["v_2r"][k], out["v_2r_err"][k] = fits["bisymmetric"][0][3], errs["bisymmetric"][3]
        out["bar_angle_ring"][k] = np.degrees(phi)
        out["delta_bic_radial"][k] = bic["circular"] - bic["radial"]
        out["delta_bic_bisymmetric"][k] = min(bic["circular"], bic["radial"]) - bic["bisymmetric"]
        radial_ok = (out["delta_bic_radial"][k] > test.min_delta_bic
                     and abs(out["v_radial_flow"][k]) > max(test.min_amplitude, 3 * out["v_radial_flow_err"][k]))
        amp2 = np.hypot(out["v_2t"][k], out["v_2r"][k])
        amp2_err = np.hypot(out["v_2t_err"][k], out["v_2r_err"][k])
        bis_ok = out["delta_bic_bisymmetric"][k] > test.min_delta_bic and amp2 > max(test.min_amplitude, 3 * amp2_err)
        if bis_ok:
            out["flow_model"][k] = "bisymmetric"
        elif radial_ok:
            out["flow_model"][k] = "radial"

    # one bar angle over the bar's radial range
    chosen = np.array([m == "bisymmetric" for m in out["flow_model"]])
    in_range = (radii >= bar_range[0]) & (radii <= bar_range[1]) if bar_range is not None else chosen
    ring_ids = [k for k in cache if in_range[k]]
    disc = {"n_rings_fitted": len(cache), "bar_angle": None, "bar_range": None}
    if ring_ids:
        total = np.zeros(len(_ANGLES))
        for k in ring_ids:
            total += _chi2_at(cache[k][4], _ANGLES)
        phi_common = _ANGLES[int(np.argmin(total))]
        for k in ring_ids:
            cos_t, sin_t, v, w, _ = cache[k]
            coef, cov, _ = weighted_least_squares(_columns(cos_t, sin_t, sin_i[k], phi_common), v, w)
            err = np.sqrt(np.clip(np.diag(cov) * out["noise_scale"][k] ** 2 * pixels_per_beam, 0, None))
            out["v_t_bisymmetric"][k] = coef[1]
            out["v_2t"][k], out["v_2t_err"][k] = coef[2], err[2]
            out["v_2r"][k], out["v_2r_err"][k] = coef[3], err[3]
        disc["bar_angle"] = float(np.degrees(phi_common))
        disc["bar_range"] = [float(radii[ring_ids].min()), float(radii[ring_ids].max())]
    if cache:
        n_r = len(cache)
        bic_disc = {"circular": disc_chi["circular"] + 2 * n_r * np.log(disc_n),
                    "radial": disc_chi["radial"] + 3 * n_r * np.log(disc_n),
                    "bisymmetric": disc_chi["bisymmetric"] + 5 * n_r * np.log(disc_n)}
        disc["bic"] = {m: float(b) for m, b in bic_disc.items()}
        disc["preferred"] = min(bic_disc, key=bic_disc.get)
    out["disc"] = disc
    return out
