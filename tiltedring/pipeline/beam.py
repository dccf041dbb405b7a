"""The beam treatment step: the beam-smearing correction of the final curve.

One step behind a narrow interface, so that another treatment can replace it:

- :func:`beam_wanted` says whether it runs (a beam is known, the correction is asked for, and
  v_rotation is fitted);
- :func:`beam_treatment` returns :class:`.state.Additions` with the field ``beam``, a
  :class:`BeamTreatment`, and the ``beam_smearing`` summary of ``fit.json`` (or, when the
  correction would not help, only the summary saying why and a caution: the uncorrected curve stays);
- :class:`BeamTreatment` says how the ring table changes (:meth:`BeamTreatment.columns`), which
  constant orientation it corrected (:attr:`BeamTreatment.geometry`: none, the orientation is held at
  the fitted values) and gives the smeared model map.

The forward model is that of an intensity-weighted mean-velocity (moment-1) map, unless the map states
another kind (:mod:`.map_kind`: a line-centre map is then corrected through a model cube); the correction is the
regularised linear least-squares problem of :mod:`..fitting.beam_inversion`, solved for each of
several intensity assumptions: an exponential profile fitted to the intensity map through the beam
(:mod:`..fitting.intensity_profile`; adopted: an estimate of the intrinsic intensity, not the smeared
moment-0 map), a uniform disc, and the map as given. Without an intensity map the uniform disc is
adopted (with a caution) and an exponential disc whose edge lies at four scale lengths is the
alternative. Half the range of the corrected speeds over the assumptions is the correction's own
uncertainty, ``v_rotation_err_beam``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy import units as u

from ..fitting.parameters import Parameter
from .state import Additions

__all__ = ["BeamTreatment", "beam_wanted", "beam_treatment", "intensity_assumptions",
           "model_misfit"]

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
    ``noise``, the spread over intensity assumptions ``spread``, the smeared model map of the corrected disc
    and the summary for ``fit.json``."""

    corrected: dict
    model: np.ndarray
    summary: dict
    noise: np.ndarray
    spread: np.ndarray

    @property
    def geometry(self) -> dict:
        """The constant orientation values the correction changed, by name (none: it is held)."""
        return {name: self.corrected[name] for name in self.summary["geometry_corrected"]}

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


def model_misfit(pixels, model) -> float:
    """chi^2 = sum ((v - m) / sigma)^2 of ``model`` over the fit's valid ``pixels`` (x, y, v, sigma); pixels the
    model leaves blank count with the data's own deviation from the median (so a model cannot win by blanking)."""
    x, y, v, sigma = pixels
    m = model[y.astype(int), x.astype(int)]
    m = np.where(np.isfinite(m), m, np.nanmedian(v))
    return float(np.sum(((v - m) / sigma) ** 2))


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


def _solve_all(state, ok, target, noise, widths, line_centre=None):
    """(solutions, smeared models and notes by assumption name; the unsmeared basis fields). ``line_centre``: the
    forward model of a line-centre map (:mod:`.map_kind`; None: a moment-1 map)."""
    from ..fitting.beam_inversion import correct_curve, disc_basis, smear_basis
    from ..fitting.smearing import BeamKernel

    vmap, starts, r_outer, response = state.vmap, state.final_rings.starts, state.layout.edges[-1], state.response
    n_speeds = int(ok.sum())
    rings = {p.name: starts[ok, p] for p in Parameter}
    rings["radius"], rings["v_rotation"] = state.layout.radii[ok], target[:n_speeds]
    kernel = BeamKernel(vmap.shape, vmap.beam, vmap.sky_jacobian)
    basis_fields = disc_basis(vmap.shape, vmap.sky_jacobian, rings, r_outer, shifts=response.names)
    geometry = {name: float(np.median(rings[name])) for name in ("x_center", "y_center", "position_angle",
                                                                  "inclination")}
    v_sys = float(np.median(rings["v_systemic"]))

    def measure(model_map):
        fitted = response.measure(model_map)
        return np.concatenate([fitted["v_rotation"][ok], [fitted[name] for name in response.names]])

    solutions, models, notes = {}, {}, {}
    for name, (image, note) in intensity_assumptions(vmap, kernel, geometry, r_outer).items():
        smeared = smear_basis(kernel, basis_fields, image, v_sys)
        if line_centre is not None:  # a line-centre map: its own forward model (:mod:`.map_kind`)
            solutions[name], models[name] = line_centre.correct(
                smeared, basis_fields, image, target, noise, measure, response.coupling[ok], widths,
                lambda m: model_misfit(state.inputs.pixels, m))
        else:
            solutions[name] = correct_curve(smeared, basis_fields, target, noise, measure, response.coupling[ok],
                                            widths)
            models[name] = smeared.field(solutions[name][0].x)
        notes[name] = note
    return solutions, models, notes, basis_fields


def beam_treatment(state) -> Additions:
    """Beam-smearing correction of the final curve and of a constant orientation (module docstring), the
    orientation moving at most by its error. The uncorrected curve is kept (with a caution) when the adopted
    intensity assumption's corrected smeared model fits the data worse than the uncorrected model:
    (chi^2_c - chi^2_u) / (chi^2_u / n_pixels x pixels per beam) > :data:`WORSE` (beam-correlated pixels
    counted once per beam area)."""
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
    solutions, models, notes, basis_fields = _solve_all(state, ok, target, noise, widths, line_centre)
    misfits = {name: model_misfit(pixels, model) for name, model in models.items()}
    best = next(iter(misfits))  # the intrinsic estimate (uniform without an intensity map)
    solution = solutions[best][0]
    chi_plain = model_misfit(pixels, basis_fields.field(target[:n]))
    scale = chi_plain / max(len(pixels.v), 1) * vmap.pixels_per_beam  # chi^2 of one independent datum
    summary = _summary(vmap, layout, ok, solutions, best, notes, names, widths)
    summary.update(kind_summary(state, line_centre))
    summary.update({"chi_square_uncorrected": chi_plain, "chi_square_corrected": misfits,
                    "misfit_change_beams": float((misfits[best] - chi_plain) / scale)})
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
    spread[ok] = 0.5 * np.ptp([s[0].x[:n] for s in solutions.values()], axis=0)
    values = {"v_rotation": corrected}
    for k, name in enumerate(names):
        values[name] = float(observed[name] + solution.x[n + k]) % (360.0 if name == "position_angle" else np.inf)
    treatment = BeamTreatment(values, models[best], summary, noise_full, spread)
    return Additions(fields={"beam": treatment}, summaries={"beam_smearing": summary}, cautions=kind_notes)


def _summary(vmap, layout, ok, solutions, best, notes, names, widths) -> dict:
    """The ``beam_smearing`` section of ``fit.json``."""
    solution, effect, free = solutions[best]
    radii, n = layout.radii[ok], int(ok.sum())
    shifts = {name: float(solution.x[n + k]) for k, name in enumerate(names)}
    return {
        "corrected": True, "converged": True,
        "method": "linear forward model: the curve as a natural cubic spline through v = 0 at the centre and the "
                  "ring speeds, each ring's field smeared as v_sys + G*(I (v - v_sys)) / G*I and fitted the way the "
                  "data were (first order about the data's fit), the constant orientation moved to first order "
                  "within its error; one least-squares problem with a second-difference smoothness penalty on the "
                  "correction, its weight chosen by generalised cross-validation; rings beyond the beam's reach "
                  "held",
        "velocity_map_kind": VELOCITY_MAP_KIND,
        "beam_arcsec": [vmap.beam.major, vmap.beam.minor, vmap.beam.position_angle],
        "intensity": notes[best],
        "intensity_alternatives": {name: note for name, note in notes.items() if name != best},
        "uncertainty": "v_rotation_err_beam: half the range of the corrected speeds over the intensity assumptions",
        "smoothing_lambda": solution.smoothing,
        "rings_corrected_arcsec": [float(r) for r in radii[free]],
        "largest_beam_effect_kms": float(np.max(np.abs(effect))) if effect.size else 0.0,
        "geometry_corrected": list(names),
        "geometry_change": shifts,
        "geometry_change_bound": {name: float(w) for name, w in zip(names, widths)},
        "geometry_change_at_bound": [name for name, w in zip(names, widths) if abs(shifts[name]) >= w * (1 - 1e-9)],
    }
