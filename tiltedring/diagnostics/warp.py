"""Is the disc warped? Detection, the regularised geometry profile, and Briggs's tilt description.

Flat disc: position angle and inclination constant. Warped disc: both constant inside an onset
radius r_w and changing smoothly beyond it,

    g(r) = g_0 + a (r - r_w)_+ + b (r - r_w)_+^2         (b = 0 for the linear form),

fitted to the ring values of the ``centred`` stage with their beam-corrected errors. The two are
compared by BIC = chi^2 / s^2 + k ln(n) (Schwarz 1978) with s^2 the reduced chi-square of the
best warp model when it exceeds 1 (so optimistic ring errors cannot fake a warp); k counts g_0, a,
(b) for both angles plus the onset. A warp is reported when the BIC favours it by more than
``min_delta_bic`` *and* the model's twist or tilt at the outermost ring exceeds ``min_change``
degrees. Only candidates that are a possible geometry compete: the inclination within the ring fit's
bounds and the position angle turning by less than 90 deg at every ring the profile is applied to,
tested or not. A warp bends the outer disc away from a flat inner one, so at least ``min_inner_rings``
tested rings must lie inside the onset. Rings inside ``2 beams`` are left out of the test (beam
smearing biases their geometry), and so are rings the caller marks as non-circular.

Tilt and line of nodes (Briggs 1990, ApJ 352, 15): each ring's plane is compared with the inner
(reference) disc; the tilt is the angle between their normals and the line of nodes the azimuth,
in the reference plane from its receding major axis, of the line where the two planes meet.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..fitting.geometry import centre_angle, wrap_angle
from ..fitting.leastsq import weighted_least_squares
from ..fitting.ring_solver import INC_BOUNDS

__all__ = ["WarpTest", "GeometryProfile", "geometry_profile", "tilt_and_line_of_nodes", "disc_normal"]


@dataclass(frozen=True)
class WarpTest:
    """Thresholds of the warp test (calibrated on flat discs; see the README)."""

    min_delta_bic: float = 10.0
    min_change: float = 2.0
    inner_beams: float = 2.0
    min_inner_rings: int = 3


@dataclass
class GeometryProfile:
    """Regularised position angle and inclination at every ring, with the warp verdict."""

    position_angle: np.ndarray
    position_angle_err: np.ndarray
    inclination: np.ndarray
    inclination_err: np.ndarray
    summary: dict = field(default_factory=dict)
    tilt: np.ndarray | None = None
    line_of_nodes: np.ndarray | None = None
    used: np.ndarray | None = None


def _weighted(a, v, e):
    """Weighted least squares with errors ``e``: (coefficients, covariance, chi^2)."""
    return weighted_least_squares(a, v, 1.0 / e)


def _design(r, onset, degree, outward=True):
    d = np.clip(r - onset if outward else onset - r, 0.0, None)
    return np.column_stack([np.ones_like(r)] + [d**p for p in range(1, degree + 1)])


def _physical(span, onset, degree, outward, fits) -> bool:
    """A candidate profile is a possible disc geometry over ``span`` (the radii it would be applied to, tested
    or not): the inclination inside the ring fit's bounds :data:`INC_BOUNDS` and the position angle turning by
    less than 90 deg (a half-turn would describe the other side of the disc), checked on a fine grid."""
    grid = _design(np.linspace(span[0], span[1], 64), onset, degree, outward)
    if "inc" in fits:
        inc = grid @ fits["inc"][0]
        if inc.min() < INC_BOUNDS[0] or inc.max() > INC_BOUNDS[1]:
            return False
    if "pa" in fits:
        pa = grid @ fits["pa"][0]
        if np.ptp(pa) >= 90.0:
            return False
    return True


def _best_changes(rt, values: dict, errors: dict, min_flat_rings: int, r_max: float) -> dict:
    """Per direction (True: a warp beyond an onset; False: an inner change inside it), the lowest-BIC
    (chi2, parameter count, onset, degree, fits) over the onsets at the tested rings and degrees 1 and 2, among
    the candidates that are a possible geometry (:func:`_physical`) out to ``r_max``, the outermost ring."""
    n, m, best = len(rt), min_flat_rings, {}
    for outward, onsets in ((True, rt[m - 1:-3]), (False, rt[3:len(rt) - m + 1])):
        for onset in onsets:
            for degree in (1, 2):
                k = len(values) * (degree + 1) + 1
                if n - k < 2:
                    continue
                a = _design(rt, onset, degree, outward)
                fits = {name: _weighted(a, values[name], errors[name]) for name in values}
                if not _physical((rt.min(), max(r_max, rt.max())), onset, degree, outward, fits):
                    continue
                chi2 = sum(f[2] for f in fits.values())
                old = best.get(outward)
                if old is None or chi2 + k * np.log(n) < old[0] + old[1] * np.log(n):
                    best[outward] = (chi2, k, onset, degree, fits)
    return best


def geometry_profile(radius, pa, pa_err, inc, inc_err, use, beam_fwhm=None, test: WarpTest = WarpTest()):
    """Decide flat or warped and return the :class:`GeometryProfile` (module docstring).

    A parameter whose errors are all missing (held fixed by the user) stays at its value and takes
    no part in the test.
    """
    r = np.asarray(radius, float)
    values = {"pa": np.asarray(pa, float), "inc": np.asarray(inc, float)}
    errors = {"pa": np.asarray(pa_err, float), "inc": np.asarray(inc_err, float)}
    free = [name for name in ("pa", "inc") if (use & np.isfinite(errors[name]) & (errors[name] > 0)).any()]
    ok = use.copy()
    for name in free:
        ok &= np.isfinite(values[name]) & np.isfinite(errors[name]) & (errors[name] > 0)
    if not ok.any():
        ok = np.isfinite(values["pa"]) & np.isfinite(values["inc"])
    values["pa"] = centre_angle(values["pa"], float(np.median(values["pa"][ok])))
    tested = ok & (r >= test.inner_beams * beam_fwhm) if beam_fwhm else ok.copy()
    if tested.sum() < 4:
        tested = ok
    n = int(tested.sum())
    rt = r[tested]
    flat = {name: _weighted(np.ones((n, 1)), values[name][tested], errors[name][tested]) for name in free}
    chi2_flat = sum(f[2] for f in flat.values())
    constant = {name: float(np.median(values[name][ok])) for name in ("pa", "inc")}
    best = _best_changes(rt, {name: values[name][tested] for name in free},
                         {name: errors[name][tested] for name in free}, test.min_inner_rings,
                         float(np.nanmax(r))) if n >= 6 and free else {}
    summary = {"detected": False, "onset_radius": None, "twist": 0.0, "tilt": 0.0, "delta_bic": None,
               "rings_tested": n, "test": "flat versus warp beyond an onset radius versus inner change (BIC)",
               "thresholds": {"min_delta_bic": test.min_delta_bic, "min_change_deg": test.min_change,
                              "rings_inside_beams_excluded": test.inner_beams,
                              "min_flat_rings": test.min_inner_rings}}
    if best:
        s2 = max(1.0, min(b[0] / max(n - b[1], 1) for b in best.values()))
        bic = {key: b[0] / s2 + b[1] * np.log(n) for key, b in best.items()}
        bic_flat = chi2_flat / s2 + len(free) * np.log(n)
        winner = min(bic, key=bic.get)
        chi2_w, _, onset, degree, fits = best[winner]
        probe = _design(np.array([rt.max() if winner else rt.min()]), onset, degree, winner)
        change = {name: float((probe @ fits[name][0])[0] - fits[name][0][0]) for name in free}
        delta_bic = bic_flat - bic[winner]
        big = delta_bic > test.min_delta_bic and max(abs(c) for c in change.values()) > test.min_change
        summary["delta_bic"] = float(bic_flat - bic[True]) if True in bic else None
        if big and winner:
            a_all = _design(r, onset, degree)
            prof, errs = {}, {}
            for name in ("pa", "inc"):
                if name in fits:
                    prof[name] = a_all @ fits[name][0]
                    errs[name] = np.sqrt(np.einsum("ij,jk,ik->i", a_all, fits[name][1] * s2, a_all))
                else:
                    prof[name], errs[name] = np.full(r.shape, constant[name]), np.full(r.shape, np.nan)
            tilt, lon = tilt_and_line_of_nodes(prof["pa"], prof["inc"], prof["pa"][0], prof["inc"][0])
            summary.update({
                "detected": True, "onset_radius": float(max(onset, 0.0)), "twist": change.get("pa", 0.0),
                "tilt": change.get("inc", 0.0),
                "profile": "constant inside the onset, " + ("linear" if degree == 1 else "quadratic") + " beyond",
                "outer_tilt_angle": float(tilt[np.argmax(r)]),
            })
            return GeometryProfile(wrap_angle(prof["pa"]), errs["pa"], prof["inc"], errs["inc"], summary,
                                   tilt, lon, tested)
        if big:
            # the geometry changes inside a radius and is flat outside: non-circular motion (bar, oval) or an
            # inner disc seen differently; the outer flat value is the disc's geometry
            summary["inner_change"] = {"radius": float(onset), "position_angle_change": change.get("pa", 0.0),
                                       "inclination_change": change.get("inc", 0.0),
                                       "meaning": "ring geometry departs from the outer disc's inside this radius: "
                                                  "non-circular motions or an inner disc; the outer value is used"}
            flat = {name: (fits[name][0][:1], fits[name][1][:1, :1], 0.0) for name in fits}
            chi2_flat = chi2_w
    s2_flat = max(1.0, chi2_flat / max(len(free) * (n - 1), 1))
    ones = np.ones_like(r)
    mean = {name: (flat[name][0][0], np.sqrt(flat[name][1][0, 0] * s2_flat)) if name in flat else (constant[name], np.nan)
            for name in ("pa", "inc")}
    summary["profile"] = "constant"
    return GeometryProfile(wrap_angle(mean["pa"][0]) * ones, mean["pa"][1] * ones, mean["inc"][0] * ones,
                           mean["inc"][1] * ones, summary, np.zeros_like(r), np.full(r.shape, np.nan), tested)


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
