"""Is the disc warped? Detection, the regularised geometry profile, and Briggs's tilt description.

Flat disc: position angle and inclination constant. Warped disc: both constant inside an onset
radius r_w and changing smoothly beyond it,

    g(r) = g_0 + a (r - r_w)_+ + b (r - r_w)_+^2         (b = 0 for the linear form),

fitted to the ring values of the ``centred`` stage with their beam-corrected errors. The two are
compared by BIC = chi^2 / s^2 + k ln(n) (Schwarz 1978) with s^2 the reduced chi-square of the
best warp model when it exceeds 1 (so optimistic ring errors cannot fake a warp); k counts g_0, a,
(b) for both angles plus the onset. A warp is reported when the BIC favours it by more than
``min_delta_bic`` *and* the model's twist or tilt at the outermost ring exceeds ``min_change``
degrees. Rings inside ``2 beams`` are left out of the test: beam smearing biases their geometry.

Tilt and line of nodes (Briggs 1990, ApJ 352, 15): each ring's plane is compared with the inner
(reference) disc; the tilt is the angle between their normals and the line of nodes the azimuth,
in the reference plane from its receding major axis, of the line where the two planes meet.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["WarpTest", "GeometryProfile", "geometry_profile", "tilt_and_line_of_nodes", "disc_normal"]


@dataclass(frozen=True)
class WarpTest:
    """Thresholds of the warp test (calibrated on flat discs; see the README)."""

    min_delta_bic: float = 10.0
    min_change: float = 2.0
    inner_beams: float = 2.0


@dataclass
class GeometryProfile:
    """Regularised position angle and inclination at every ring, with the warp verdict."""

    position_angle: np.ndarray
    position_angle_err: np.ndarray
    inclination: np.ndarray
    inclination_err: np.ndarray
    summary: dict = field(default_factory=dict)


def _design(r, onset, degree):
    d = np.clip(r - onset, 0.0, None)
    return np.column_stack([np.ones_like(r)] + [d**p for p in range(1, degree + 1)])


def _wls(a, v, e):
    """Weighted least squares: (coefficients, covariance, chi^2)."""
    w = 1.0 / e
    coef, *_ = np.linalg.lstsq(a * w[:, None], v * w, rcond=None)
    cov = np.linalg.pinv((a * w[:, None]).T @ (a * w[:, None]))
    return coef, cov, float(np.sum(((v - a @ coef) * w) ** 2))


def _centre_on(values, reference):
    return reference + np.mod(values - reference + 180.0, 360.0) - 180.0


def geometry_profile(radius, pa, pa_err, inc, inc_err, use, beam_fwhm=None, test: WarpTest = WarpTest()):
    """Decide flat or warped and return the :class:`GeometryProfile` (module docstring)."""
    r = np.asarray(radius, float)
    ok = use & np.isfinite(pa) & np.isfinite(inc) & (pa_err > 0) & (inc_err > 0)
    ok &= np.isfinite(pa_err) & np.isfinite(inc_err)
    if not ok.any():
        ok = np.isfinite(pa) & np.isfinite(inc)
    ref = float(np.median(pa[ok]))
    pa = _centre_on(np.asarray(pa, float), ref)
    tested = ok & (r >= test.inner_beams * beam_fwhm) if beam_fwhm else ok.copy()
    if tested.sum() < 4:
        tested = ok
    n = int(tested.sum())
    rt, pt, it = r[tested], pa[tested], inc[tested]
    pe, ie = pa_err[tested], inc_err[tested]

    flat = {name: _wls(np.ones((n, 1)), v, e) for name, v, e in (("pa", pt, pe), ("inc", it, ie))}
    chi2_flat = flat["pa"][2] + flat["inc"][2]
    best = None
    if n >= 6:
        for onset in np.concatenate([[rt.min() - 1e-6], rt[:-3]]):
            for degree in (1, 2):
                if n - 2 * (degree + 1) - 1 < 2:
                    continue
                a = _design(rt, onset, degree)
                fits = {name: _wls(a, v, e) for name, v, e in (("pa", pt, pe), ("inc", it, ie))}
                chi2 = fits["pa"][2] + fits["inc"][2]
                k = 2 * (degree + 1) + 1
                if best is None or chi2 + k * np.log(n) < best[0] + best[1] * np.log(n):
                    best = (chi2, k, onset, degree, fits)
    summary = {"detected": False, "onset_radius": None, "twist": 0.0, "tilt": 0.0, "delta_bic": None,
               "rings_tested": n, "test": "flat versus warp beyond an onset radius (BIC)",
               "thresholds": {"min_delta_bic": test.min_delta_bic, "min_change_deg": test.min_change,
                              "rings_inside_beams_excluded": test.inner_beams}}
    if best is not None:
        chi2_w, k_w, onset, degree, fits = best
        s2 = max(1.0, chi2_w / max(n - k_w, 1))
        delta_bic = (chi2_flat / s2 + 2 * np.log(n)) - (chi2_w / s2 + k_w * np.log(n))
        a_all = _design(r, onset, degree)
        prof = {name: a_all @ fits[name][0] for name in ("pa", "inc")}
        outer = rt.max()
        change = {name: float((_design(np.array([outer]), onset, degree) @ fits[name][0])[0] - fits[name][0][0])
                  for name in ("pa", "inc")}
        summary["delta_bic"] = float(delta_bic)
        if delta_bic > test.min_delta_bic and max(abs(change["pa"]), abs(change["inc"])) > test.min_change:
            errs = {name: np.sqrt(np.einsum("ij,jk,ik->i", a_all, fits[name][1] * s2, a_all)) for name in ("pa", "inc")}
            inner_pa, inner_inc = fits["pa"][0][0], fits["inc"][0][0]
            tilt, lon = tilt_and_line_of_nodes(prof["pa"], prof["inc"], inner_pa, inner_inc)
            summary.update({
                "detected": True, "onset_radius": float(max(onset, 0.0)), "twist": change["pa"],
                "tilt": change["inc"], "profile": "constant inside the onset, " + ("linear" if degree == 1 else
                                                                                  "quadratic") + " beyond",
                "outer_tilt_angle": float(tilt[np.argmax(r)]),
                "line_of_nodes": [None if not np.isfinite(v) else float(v) for v in lon],
            })
            return GeometryProfile(np.mod(prof["pa"], 360.0), errs["pa"], prof["inc"], errs["inc"], summary)
    s2_flat = max(1.0, chi2_flat / max(2 * n - 2, 1))
    values = {name: (flat[name][0][0], np.sqrt(flat[name][1][0, 0] * s2_flat)) for name in ("pa", "inc")}
    summary["profile"] = "constant"
    ones = np.ones_like(r)
    return GeometryProfile(np.mod(values["pa"][0], 360.0) * ones, values["pa"][1] * ones, values["inc"][0] * ones,
                           values["inc"][1] * ones, summary)


def disc_normal(position_angle, inclination):
    """Unit normal of a disc plane in (north, east, away-from-us) coordinates.

    The disc is tilted about its major axis by the inclination and turned by the position angle:
    n = Rz(PA) Rx(i) (0, 0, 1) = (sin PA sin i, -cos PA sin i, cos i).
    """
    pa, inc = np.radians(position_angle), np.radians(inclination)
    return np.stack(np.broadcast_arrays(np.sin(pa) * np.sin(inc), -np.cos(pa) * np.sin(inc), np.cos(inc)), axis=-1)


def tilt_and_line_of_nodes(position_angle, inclination, reference_pa, reference_inclination):
    """Tilt (deg) of each ring's plane against a reference plane and its line of nodes (deg in [0, 180)).

    Line of nodes: azimuth in the reference plane, from its receding major axis toward azimuth 90,
    of the intersection line (Briggs 1990). NaN where the planes coincide.
    """
    n = disc_normal(position_angle, inclination)
    n0 = disc_normal(reference_pa, reference_inclination)
    tilt = np.degrees(np.arccos(np.clip(n @ n0, -1.0, 1.0)))
    d = np.cross(n0, n)
    p0, i0 = np.radians(reference_pa), np.radians(reference_inclination)
    x0 = np.array([np.cos(p0), np.sin(p0), 0.0])
    y0 = np.array([-np.cos(i0) * np.sin(p0), np.cos(i0) * np.cos(p0), np.sin(i0)])
    lon = np.degrees(np.arctan2(d @ y0, d @ x0)) % 180.0
    lon = np.where(np.linalg.norm(d, axis=-1) > 1e-9, lon, np.nan)
    return tilt, lon
