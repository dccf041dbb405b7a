"""The beam treatment step: the beam-smearing correction of the final curve.

One step behind a narrow interface, so that another treatment can replace it:

- :func:`beam_wanted` says whether it runs (a beam is known, the correction is asked for, and
  v_rotation is fitted);
- :func:`beam_treatment` returns :class:`.state.Additions` with the field ``beam``, a
  :class:`BeamTreatment`, and the ``beam_smearing`` summary of ``fit.json`` (or, when the
  correction would not help, only the summary saying why and a caution: the uncorrected curve stays);
- :class:`BeamTreatment` says how the ring table changes (:meth:`BeamTreatment.columns`), which
  constant orientation it corrected (:attr:`BeamTreatment.geometry`) with what error
  (:meth:`BeamTreatment.geometry_error`) and gives the smeared model map.

The beam biases the fitted inclination (by 2-3 deg above 60 deg inclination on a one-beam-scale inner
rise): the correction may move a constant position angle or inclination by its error plus twice what
the beam does to it (:func:`..fitting.beam_inversion.shift_limit`), with no prior of its own. A move
that large makes the first-order orientation derivatives inexact, so after the first linear solve up
to :data:`GAUSS_NEWTON_STEPS` Gauss-Newton steps re-linearise at the moved orientation; each is kept
only when the smeared model drawn exactly at its point fits the map better (bounded, deterministic).
A move beyond the angle's error is stated in ``fit.json`` (``geometry_change_beyond_error``) and in
a caution.

The forward model is that of an intensity-weighted mean-velocity (moment-1) map, unless the map states
another kind (:mod:`.map_kind`: a line-centre map is then corrected through a model cube, the
orientation held, :func:`_solve_line_centre`); the moment-1 correction is the
regularised linear least-squares problem of :mod:`..fitting.beam_inversion`, solved for each of
several intensity assumptions: an exponential profile fitted to the intensity map through the beam
(:mod:`..fitting.intensity_profile`; adopted: an estimate of the intrinsic intensity, not the smeared
moment-0 map), a uniform disc, and the map as given. Without an intensity map the uniform disc is
adopted (with a caution) and an exponential disc whose edge lies at four scale lengths is the
alternative. The correction's own uncertainty, ``v_rotation_err_beam``, is half the range of the corrected
speeds over the assumptions, half their change over the iteration and half the difference between the two
regularisations of the first step, in quadrature (:func:`_beam_uncertainty`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from astropy import units as u

from ..fitting.parameters import Parameter
from .state import Additions

__all__ = ["BeamTreatment", "beam_wanted", "beam_treatment", "intensity_assumptions",
           "model_misfit", "common_pixels"]

_KMS = u.km / u.s
VELOCITY_MAP_KIND = "intensity-weighted mean velocity (moment-1 map)"
# a model is "worse" when its chi^2, in units of one independent datum's, exceeds the other's by more than 2:
# below that the difference is "not worth more than a bare mention" (Kass & Raftery 1995, JASA 90, 773, on
# 2 ln B, of which the chi^2 difference of two models with the same number of parameters is the BIC estimate)
WORSE = 2.0


def _stretch(corrected, observed) -> np.ndarray:
    return np.maximum(1.0, np.nan_to_num(corrected / observed, nan=1.0))


@dataclass(frozen=True)
class BeamTreatment:
    """The corrected ``v_rotation`` per ring (NaN where not fitted), its propagated noise error
    ``noise``, the spread over intensity assumptions ``spread``, the smeared model map of the corrected disc,
    the summary for ``fit.json`` and, per corrected angle, half its range over the intensity assumptions
    ``geometry_spread`` (deg)."""

    corrected: dict
    model: np.ndarray
    summary: dict
    noise: np.ndarray
    spread: np.ndarray
    geometry_spread: dict

    @property
    def geometry(self) -> dict:
        """The constant orientation values the correction changed, by name (none: it is held)."""
        return {name: self.corrected[name] for name in self.summary["geometry_corrected"]}

    def geometry_error(self, name: str, errors) -> np.ndarray:
        """The corrected angle's error: the fit's ``errors`` and the correction's own uncertainty (half the range
        of the angle over the intensity assumptions, :attr:`geometry_spread`) in quadrature."""
        return np.hypot(np.asarray(errors, float), self.geometry_spread.get(name, 0.0))

    def columns(self, table) -> dict:
        """Ring-table columns the correction sets: the observed curve kept as ``v_rotation_smeared``, the
        corrected ``v_rotation``, its noise error (the larger of the error stretched with the speed and the
        error propagated through the correction) and ``v_rotation_err_beam``."""
        observed = table["v_rotation"].to_value(_KMS)
        corrected = self.corrected["v_rotation"]
        error = table["v_rotation_err"].to_value(_KMS)
        noise = np.fmax(error * _stretch(corrected, observed), self.noise)
        return {"v_rotation_smeared": observed * _KMS, "v_rotation": corrected * _KMS,
                "v_rotation_err": noise * _KMS, "v_rotation_err_beam": self.spread * _KMS}


def beam_wanted(state) -> bool:
    """Correct for the beam when a beam is known, the option asks for it and v_rotation is fitted."""
    return bool(state.options.beam_correction and state.vmap.beam is not None
                and state.final_rings.free[Parameter.v_rotation])


def model_misfit(pixels, model, where=None) -> float:
    """chi^2 = sum ((v - m) / sigma)^2 of ``model`` over the fit's valid ``pixels`` (x, y, v, sigma), or over those
    of them ``where`` says (a mask over the pixels); pixels the model leaves blank count with the data's own
    deviation from the median (so a model cannot win by blanking)."""
    x, y, v, sigma = pixels
    m = model[y.astype(int), x.astype(int)]
    m = np.where(np.isfinite(m), m, np.nanmedian(v))
    terms = ((v - m) / sigma) ** 2
    return float(np.sum(terms if where is None else terms[where]))


def common_pixels(pixels, *models) -> np.ndarray:
    """Mask of the fit's pixels where every one of ``models`` is defined: models whose disc edges differ (the
    orientation moved) are compared on the pixels they share, so neither wins or loses by its edge."""
    x, y = pixels[0].astype(int), pixels[1].astype(int)
    return np.logical_and.reduce([np.isfinite(m[y, x]) for m in models])


def intensity_assumptions(vmap, kernel, geometry: dict, r_outer: float) -> dict:
    """Intensity images by name, the adopted one first (module docstring), and a note per name."""
    from ..fitting.intensity_profile import disc_radius_map, fit_exponential_profile, typical_profile

    radius = disc_radius_map(vmap.shape, vmap.sky_jacobian, geometry)
    uniform = np.ones(vmap.shape)
    if vmap.intensity is None:
        typical = typical_profile(r_outer)
        return {"uniform": (uniform, "uniform over the modelled disc (no intensity map given)"),
                "exponential": (typical.image(radius), typical.source)}
    given = np.asarray(vmap.intensity, float)
    try:
        profile = fit_exponential_profile(given, radius, kernel, r_outer, vmap.beam.fwhm)
    except ValueError as err:
        return {"uniform": (uniform, f"uniform over the modelled disc ({err})")}
    return {"exponential": (profile.image(radius), profile.source),
            "uniform": (uniform, "uniform over the modelled disc"),
            "map as given": (np.clip(np.nan_to_num(given), 0.0, None), "the smeared intensity map as given")}


def _fallback(summary: dict, reason: str, bias=None) -> Additions:
    """The uncorrected curve kept: the summary says why, and a caution is raised. ``bias``: per ring, the change
    the correction would have made; the uncorrected curve keeps a smearing bias of about that size, so it
    becomes the ring table's ``v_rotation_err_beam`` (a systematic, fully correlated like the beam part)."""
    summary.update({"corrected": False, "fallback": reason})
    caution = (f"beam-smearing correction not applied ({reason}): v_rotation within about two beams of the centre "
               "is biased low" + ("; the size of the bias is in v_rotation_err_beam" if bias is not None else ""))
    fields = {} if bias is None else {"beam_bias": bias}
    if bias is not None:
        summary["uncertainty"] = ("v_rotation_err_beam: the change the correction would have made (the bias the "
                                  "uncorrected curve keeps)")
    return Additions(fields=fields, summaries={"beam_smearing": summary}, cautions=[caution])


def _orientation_errors(state, names) -> np.ndarray:
    """Per constant orientation name, its error (deg): the median of the adopted geometry's finite errors (1 deg
    when there is none)."""
    out = []
    for name in names:
        errors = np.asarray(state.geometry.adopted[name][1], float)
        finite = errors[np.isfinite(errors) & (errors > 0)]
        out.append(float(np.median(finite)) if finite.size else 1.0)
    return np.array(out)


# Gauss-Newton steps after the first linear solve, each accepted only when the map chi^2 decreases
GAUSS_NEWTON_STEPS = 2


@dataclass
class _Point:
    """One accepted point of the iteration: the solution (speeds and total orientation shifts), the smeared model
    drawn exactly at it, its map chi^2, the unsmeared basis fields drawn there, and the solution of the first
    linear step (None when there was no iteration)."""

    solution: object
    model: np.ndarray
    chi_square: float
    basis_fields: object
    first: object = None


class _Problem:
    """The pieces every linear step shares: the used rings, the beam kernel, the intensity assumptions, the
    first-order fit of a map (:meth:`.response.FitResponse.measure`), the target and its errors."""

    def __init__(self, state, ok, target, noise):
        from ..fitting.smearing import BeamKernel

        vmap, response = state.vmap, state.response
        self.state, self.ok, self.target, self.noise = state, ok, target, noise
        self.n, self.names, self.r_outer = int(ok.sum()), response.names, state.layout.edges[-1]
        self.rings = {p.name: state.final_rings.starts[ok, p] for p in Parameter}
        self.rings["radius"] = state.layout.radii[ok]
        self.kernel = BeamKernel(vmap.shape, vmap.beam, vmap.sky_jacobian)
        geometry = {name: float(np.median(self.rings[name])) for name in ("x_center", "y_center",
                                                                          "position_angle", "inclination")}
        self.v_sys = float(np.median(self.rings["v_systemic"]))
        self.images = intensity_assumptions(vmap, self.kernel, geometry, self.r_outer)
        self.coupling = response.coupling[ok]

    def measure(self, model_map):
        fitted = self.state.response.measure(model_map)
        return np.concatenate([fitted["v_rotation"][self.ok], [fitted[name] for name in self.names]])

    def basis(self, x):
        """The unsmeared basis fields at x = (intrinsic speeds, orientation shifts from the observed values)."""
        from ..fitting.beam_inversion import disc_basis

        rings = dict(self.rings, v_rotation=np.asarray(x[: self.n], float))
        for k, name in enumerate(self.names):
            rings[name] = rings[name] + x[self.n + k]
        vmap = self.state.vmap
        return disc_basis(vmap.shape, vmap.sky_jacobian, rings, self.r_outer, shifts=self.names)

    def step(self, basis_fields, image, x, free=None, limits=None, from_effect=False):
        """One linear step from x (:func:`..fitting.beam_inversion.correct_curve`) with the shifts counted from
        the observed orientation: (solution with total shifts, smeared model, beam effect, free, limits)."""
        from ..fitting.beam_inversion import correct_curve, smear_basis

        shift = np.asarray(x[self.n:], float)
        smeared = smear_basis(self.kernel, basis_fields, image, self.v_sys)
        local = None if limits is None else (limits[0] - shift, limits[1] - shift)
        solution, effect, free, local = correct_curve(smeared, basis_fields, self.target, self.noise, self.measure,
                                                      self.coupling, x[: self.n], free, local, from_effect)
        total = np.concatenate([solution.x[: self.n], shift + solution.x[self.n:]])
        return replace(solution, x=total), smeared.field(solution.x), effect, free, (local[0] + shift,
                                                                                        local[1] + shift)


def _iterate(problem, image, limits=None):
    """The adopted assumption's correction: a linear step from the observed curve, then up to
    :data:`GAUSS_NEWTON_STEPS` steps re-linearised at the last accepted point (the orientation derivatives drawn
    at the moved angles), each kept only when the smeared model drawn exactly at its point fits the map better
    (lower chi^2) than the previous point's. Deterministic and bounded. Returns (accepted point, beam effect,
    free rings, shift limits, steps taken, the uncorrected model). ``limits``: (lower, upper) of the shifts
    (default: :func:`..fitting.beam_inversion.shift_limit`; zeros hold the orientation)."""
    pixels = problem.state.pixels
    start = np.concatenate([problem.target[: problem.n], np.zeros(len(problem.names))])
    basis_fields = problem.basis(start)
    plain = basis_fields.field(start[: problem.n])  # the uncorrected model (unsmeared, observed orientation)
    solution, _, effect, free, limits = problem.step(basis_fields, image, start, None, limits, from_effect=True)
    first = solution
    point, steps = None, 1
    for _ in range(GAUSS_NEWTON_STEPS + 1):
        basis_fields = problem.basis(solution.x)
        exact = _smeared_at(problem, basis_fields, image, solution.x)
        if point is not None:
            shared = common_pixels(pixels, exact, point.model)
            if not model_misfit(pixels, exact, shared) < model_misfit(pixels, point.model, shared):
                break
        chi = model_misfit(pixels, exact)
        steps += point is not None
        point = _Point(solution, exact, chi, basis_fields, first)
        if steps > GAUSS_NEWTON_STEPS:
            break
        solution = problem.step(basis_fields, image, solution.x, free, limits)[0]
    return point, effect, free, limits, steps, plain


def _smeared_at(problem, basis_fields, image, x):
    """The smeared model drawn exactly at x (the basis fields drawn there, shifts counted from them: none)."""
    from ..fitting.beam_inversion import smear_basis

    return smear_basis(problem.kernel, basis_fields, image, problem.v_sys).field(x[: problem.n])


def _solve_all(state, ok, target, noise, hold=False):
    """(the adopted point, the solutions and notes by assumption name, beam effect, free rings, limits, the
    uncorrected model, linear steps taken):
    the adopted intensity iterated (:func:`_iterate`), the alternatives one linear step from its point;
    ``hold``: the orientation held at the observed values."""
    problem = _Problem(state, ok, target, noise)
    names = list(problem.images)
    held = (np.zeros(len(problem.names)),) * 2 if hold else None
    point, effect, free, limits, steps, plain = _iterate(problem, problem.images[names[0]][0], held)
    solutions, notes = {names[0]: point.solution}, {name: note for name, (_, note) in problem.images.items()}
    for name in names[1:]:
        solutions[name] = problem.step(point.basis_fields, problem.images[name][0], point.solution.x, free,
                                       limits)[0]
    return point, solutions, notes, effect, free, limits, plain, steps


def _solve_line_centre(state, ok, target, noise, model):
    """:func:`_solve_all` for a line-centre map (:mod:`.map_kind`): each intensity assumption corrected through
    the model cube of :class:`..fitting.line_centre_smearing.LineCentreModel` (the adopted one iterated, the
    alternatives one solve from its offset), the orientation held (zero shifts, zero limits)."""
    from ..fitting.beam_inversion import smear_basis

    problem = _Problem(state, ok, target, noise)
    n, shifts = problem.n, len(problem.names)
    start = np.concatenate([target[:n], np.zeros(shifts)])
    basis_fields = problem.basis(start)
    plain = basis_fields.field(start[:n])
    solutions, notes, point, effect, free = {}, {}, None, np.zeros(n + shifts), np.zeros(n, bool)
    for name, (image, note) in problem.images.items():
        smeared = smear_basis(problem.kernel, basis_fields, image, problem.v_sys)
        (solution, ring_effect, ring_free), drawn = model.correct(
            smeared, basis_fields, image, target, noise, problem.measure, problem.coupling, np.zeros(shifts),
            lambda m: model_misfit(state.pixels, m))
        solutions[name], notes[name] = solution, note
        if point is None:  # the adopted assumption
            point = _Point(solution, drawn, model_misfit(state.pixels, drawn), basis_fields)
            effect[:n], free = ring_effect, ring_free
    limits = (np.zeros(shifts), np.zeros(shifts))
    return point, solutions, notes, effect, free, limits, plain, len(model.history)


def beam_treatment(state) -> Additions:
    """Beam-smearing correction of the final curve and of a constant orientation (module docstring), the
    orientation moving at most by its error plus twice the beam's effect on it
    (:func:`..fitting.beam_inversion.shift_limit`). The uncorrected curve is kept (with a caution) when the
    adopted intensity assumption's corrected smeared model fits the data worse than the uncorrected model:
    (chi^2_c - chi^2_u) / (chi^2_u / n_pixels x pixels per beam) > :data:`WORSE` (beam-correlated pixels
    counted once per beam area). A move of the orientation beyond its error is stated in a caution."""
    vmap, response, layout, pixels = state.vmap, state.response, state.layout, state.pixels
    observed = response.observed()
    speeds, names = observed["v_rotation"], response.names
    ok = np.isfinite(speeds)
    n = int(ok.sum())
    raw_noise = state.final_rings.errors[ok, Parameter.v_rotation]
    widths = _orientation_errors(state, names)
    noise = np.concatenate([np.where(np.isfinite(raw_noise) & (raw_noise > 0), raw_noise,
                                     np.nanmax(np.abs(speeds[ok]))), widths])
    target = np.concatenate([speeds[ok], [observed[name] for name in names]])
    from .map_kind import kind_cautions, kind_summary, line_centre_model

    line_centre = line_centre_model(state, ok)
    for hold in (False, True) if names and line_centre is None else (False,):
        if line_centre is None:
            point, solutions, notes, effect, free, limits, plain_model, steps = _solve_all(state, ok, target, noise,
                                                                                           hold)
        else:
            point, solutions, notes, effect, free, limits, plain_model, steps = _solve_line_centre(
                state, ok, target, noise, line_centre)
        shared = common_pixels(pixels, plain_model, point.model)
        chi_plain, chi_corrected = model_misfit(pixels, plain_model, shared), model_misfit(pixels, point.model, shared)
        # chi^2 of one independent datum, as main measured it: over all the fit's pixels, those outside the model's
        # disc counted with their deviation from the median (a loose scale; the threshold is unchanged from main)
        scale = model_misfit(pixels, plain_model) / max(len(pixels.v), 1) * vmap.pixels_per_beam
        if (chi_corrected - chi_plain) / scale <= WORSE:
            break
    solution = point.solution
    summary = _summary(vmap, layout, ok, solutions, notes, names, widths, (effect, free, limits, steps))
    if line_centre is not None:  # the orientation is held on this path: nothing of it was corrected
        summary.update(geometry_corrected=[], orientation_held=True, geometry_change_at_bound=[],
                       geometry_change_beyond_error=[],
                       method="forward model of a line-centre map through a beam-smeared model cube, the "
                              "orientation held (line_centre_model)")
    summary.update(kind_summary(state, line_centre))
    summary.update({"chi_square_uncorrected": chi_plain, "chi_square_corrected": chi_corrected,
                    "misfit_change_beams": float((chi_corrected - chi_plain) / scale),
                    "orientation_held": bool(hold and names) or line_centre is not None})
    if hold and names and line_centre is None:
        summary["orientation_held_reason"] = ("moving the orientation made the smeared model fit the map worse than "
                                              "the uncorrected model; the speeds were corrected with it held")
    if not np.all(np.isfinite(solution.x)):
        return _fallback(summary, "it gave undefined speeds")
    kind_notes = kind_cautions(state, np.abs(solution.x[:n] - target[:n]) / noise[:n])
    if summary["misfit_change_beams"] > WORSE:
        bias = np.full(len(layout), np.nan)
        bias[ok] = np.abs(solution.x[:n] - target[:n])
        fallback = _fallback(summary, "the smeared model of the corrected disc fits the data worse than the "
                                      "uncorrected model", bias)
        fallback.cautions.extend(kind_notes)
        return fallback
    corrected, noise_full, spread = (np.full(len(layout), np.nan) for _ in range(3))
    corrected[ok], noise_full[ok] = solution.x[:n], solution.noise
    spread[ok] = _beam_uncertainty(point, solutions, n)
    values = {"v_rotation": corrected}
    for k, name in enumerate(names):
        values[name] = float(observed[name] + solution.x[n + k]) % (360.0 if name == "position_angle" else np.inf)
    geometry_spread = {name: float(summary["geometry_change_uncertainty"][name]) for name in summary["geometry_corrected"]}
    treatment = BeamTreatment(values, point.model, summary, noise_full, spread, geometry_spread)
    return Additions(fields={"beam": treatment}, summaries={"beam_smearing": summary},
                     cautions=_geometry_cautions(summary, line_centre is None) + kind_notes)


def _beam_uncertainty(point, solutions, n) -> np.ndarray:
    """The correction's own uncertainty per corrected ring, in quadrature: half the range of the speeds over the
    intensity assumptions, half their change over the iteration (first linear step to the accepted point) and
    half the difference between the two regularisations of the first step (the beam's effect as a free column or
    not, :class:`..fitting.beam_inversion.BeamSolution`); separate sources: what the intrinsic intensity is, how
    far the first-order solution was from the re-linearised one, and what the smoothness prior assumes where the
    data hardly constrain the speeds (inside about a beam, where the truth was measured between the two)."""
    parts = [0.5 * np.ptp([s.x[:n] for s in solutions.values()], axis=0)]
    if point.first is not None:
        parts.append(0.5 * np.abs(point.solution.x[:n] - point.first.x[:n]))
        if point.first.alternative is not None:
            parts.append(0.5 * np.abs(point.first.alternative - point.first.x[:n]))
    return np.sqrt(np.sum(np.square(parts), axis=0))


def _geometry_cautions(summary: dict, orientation_free: bool = True) -> list:
    """A caution per orientation angle the correction moved beyond its error: the uncorrected fit of that
    angle is biased by the beam, and the corrected value rests on the forward model; and one when moving the
    orientation was tried and refused (``orientation_free``: it could move at all)."""
    out = []
    if summary.get("orientation_held") and orientation_free:
        out.append("beam-smearing correction held the position angle and inclination at the fitted values: moving "
                   "them made the smeared model fit the map worse; the beam's bias on them (geometry_beam_effect in "
                   "fit.json) is not corrected")
    for name in summary["geometry_change_beyond_error"]:
        change, error = summary["geometry_change"][name], summary["geometry_change_error"][name]
        out.append(f"beam-smearing correction moved the {name.replace('_', ' ')} by {change:+.1f} deg, beyond its "
                   f"error ({error:.1f} deg): the beam biases the fitted {name.replace('_', ' ')}; the corrected value "
                   "rests on the smeared forward model (its error includes the spread over intensity assumptions)")
    return out


def _summary(vmap, layout, ok, solutions, notes, names, widths, iteration) -> dict:
    """The ``beam_smearing`` section of ``fit.json``; ``iteration``: (beam effect, free rings, shift limits,
    linear steps taken) of the adopted assumption."""
    effect, free, limits, steps = iteration
    best = next(iter(solutions))
    solution = solutions[best]
    radii, n = layout.radii[ok], int(ok.sum())
    shifts = {name: float(solution.x[n + k]) for k, name in enumerate(names)}
    spread = {name: float(0.5 * np.ptp([s.x[n + k] for s in solutions.values()])) for k, name in enumerate(names)}
    return {
        "corrected": True, "converged": True, "iterations": int(steps),
        "method": "forward model: the curve as a natural cubic spline through v = 0 at the centre and the ring "
                  "speeds, each ring's field smeared as v_sys + G*(I (v - v_sys)) / G*I and fitted the way the "
                  "data were (first order about the data's fit), the constant orientation moved to first order; "
                  "a least-squares problem with a second-difference smoothness penalty on the correction beyond a "
                  "free multiple of the beam's own effect (anchored at the centre or free there, and its weight, "
                  "chosen by generalised cross-validation), solved by "
                  "Gauss-Newton steps re-linearised at "
                  "the moved orientation, each kept only when the smeared model fits the map better; rings "
                  "beyond the beam's reach held",
        "velocity_map_kind": VELOCITY_MAP_KIND,
        "beam_arcsec": [vmap.beam.major, vmap.beam.minor, vmap.beam.position_angle],
        "intensity": notes[best],
        "intensity_alternatives": {name: note for name, note in notes.items() if name != best},
        "uncertainty": "v_rotation_err_beam: half the range of the corrected speeds over the intensity assumptions, "
                       "half their change over the iteration and half the difference between the two "
                       "regularisations (the beam's effect as a free column of the correction or not), in "
                       "quadrature",
        "smoothing_lambda": solution.smoothing,
        "rings_corrected_arcsec": [float(r) for r in radii[free]],
        "largest_beam_effect_kms": float(np.max(np.abs(effect[:n]))) if n else 0.0,
        "geometry_corrected": list(names),
        "geometry_beam_effect": {name: float(effect[n + k]) for k, name in enumerate(names)},
        "geometry_change": shifts,
        "geometry_change_error": {name: float(w) for name, w in zip(names, widths)},
        "geometry_change_uncertainty": spread,
        "geometry_change_bound": {name: float(limits[1][k]) for k, name in enumerate(names)},
        "geometry_change_at_bound": [name for k, name in enumerate(names)
                                     if abs(shifts[name]) >= limits[1][k] * (1 - 1e-9)],
        "geometry_change_beyond_error": [name for name, w in zip(names, widths) if abs(shifts[name]) > w],
    }
