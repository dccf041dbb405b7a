"""The errors step: the error budget of the final ring table, in named parts.

v_rotation's uncertainty is split into parts that share no source (:mod:`.error_parts`), each its
own column, and their sum in quadrature, ``v_rotation_err``:

- ``v_rotation_err_random``: the noise at the adopted geometry — the resampled scatter
  (:mod:`..fitting.resampling`: noise fields with the residual's rms and modelled correlation through the fit's
  first-order response, the orientation held), enlarged as the beam treatment enlarged the formal
  error (:func:`noise_gain`; the treatment propagates the noise through its correction); without
  resampling, ``v_rotation_err_formal`` (least squares, scaled by sqrt(reduced chi-square) and
  sqrt(pixels per beam), as the beam treatment left it). The correlation of each ring with its
  next ``k`` neighbours out (those within a beam) is in ``random_correlation_<k>``;
- ``v_rotation_err_geometry``: the response to the orientation's 1 sigma, from the signed columns
  ``v_rotation_shift_inclination`` (-v cot(i) sigma_i) and ``v_rotation_shift_position_angle``
  (-v (1 - cos sigma_PA)), the same shift at every ring (fully correlated);
- ``v_rotation_err_beam``: the beam treatment's own uncertainty where that step gives one, else 0;
- ``v_rotation_err_asymmetry``: where the approaching and receding halves differ beyond their noise,
  sqrt(d^2 - s_d^2)/2 (:func:`.error_parts.asymmetry_term`), else 0.

Below the low-inclination limit the total is widened to at least half of v_rotation (a caution
says so), so there it is more than the parts' sum. The covariance of the curve follows from the
same columns (:mod:`..products.covariance`).

Centre and systemic velocity: the error of the value adopted (:func:`centre_errors`): the all-pixel
fit's, or, where the rings' medians were kept, the error of that median. Orientation: the larger of
the profile's error (enlarged for rings sharing a beam) and the resampled scatter; for a constant
orientation, each ring's error adds the rings' own scatter about it beyond their noise
(:func:`orientation_spread`).
One step (:func:`error_budget`) with the same interface as the others, so it can be replaced whole.
"""

from __future__ import annotations

import numpy as np
from astropy import units as u

from ..fitting.parameters import CENTRE_AND_SYSTEMIC, Parameter
from ..diagnostics.diagnose import ASYMMETRY_MIN_SPEED, ASYMMETRY_SIGMA
from ..fitting.resampling import resample_draws
from ..fitting.geometry import centre_angle
from .error_parts import SIGNIFICANCE, asymmetry_term, band_correlation, excess_scatter, geometry_response, total_error
from .state import Additions

__all__ = ["error_budget", "centre_errors", "resampled_errors", "speed_errors", "correlation_reach", "ERROR_MODEL"]

_KMS = u.km / u.s

#: the error model as written into fit.json (``error_model``)
ERROR_MODEL = {
    "total": "v_rotation_err = sqrt(random^2 + geometry^2 + beam^2 + asymmetry^2); below the low-inclination "
             "limit widened to at least v_rotation / 2",
    "random": "v_rotation_err_random: scatter of v_rotation over refits (first order) of model + noise fields "
              "with the residual map's rms and a model of its spatial correlation (a Gaussian core plus "
              "uncorrelated noise), orientation held at the adopted values, carried through the beam correction "
              "(as it enlarged the formal error, or through its linearisation when it states no noise of its "
              "own); the formal error (scaled by sqrt(reduced chi-square) and sqrt(pixels per beam)) when no "
              "resampling ran. Correlation with the k-th next ring out: random_correlation_<k> (rings within a "
              "beam; 0 beyond)",
    "geometry": "v_rotation_err_geometry = hypot(v_rotation_shift_inclination, v_rotation_shift_position_angle): "
                "signed change of v_rotation at the orientation's +1 sigma, -v cot(i) sigma_i and "
                "-v (1 - cos sigma_PA); fully correlated from ring to ring",
    "beam": "v_rotation_err_beam: the beam treatment's own uncertainty (0 when it gives none); fully correlated",
    "asymmetry": f"v_rotation_err_asymmetry = sqrt(d^2 - s_d^2) / 2 where the approaching-receding difference d "
                 f"exceeds {SIGNIFICANCE:g} s_d (its noise), else 0; independent from ring to ring",
    "covariance": "curve_covariance.ecsv: per pair of rings, each part's covariance and the total (km2 / s2)",
}

def centre_errors(state) -> dict:
    """Error columns of the centre and systemic velocity: the error of the value adopted, NaN where held.

    When the all-pixel fit is adopted (:func:`.centre.check_against_rings` found it consistent with the
    rings), its own sandwich error (:func:`.centre.refine_centre`: the residuals, model misfit included,
    with the beam's correlation). Only when the rings' weighted medians are kept instead, the error of such
    a median: 1.2533 sigma sqrt((1 + k) / n) for n rings of stage ``free`` with ring-to-ring scatter sigma,
    each correlated with its k neighbours within a beam (with neighbour correlations of at most 1/2 the
    variance of a mean grows by at most 1 + 2 k / 2). Taking the larger of the two for the all-pixel fit
    (as before) stated the error of another estimator: the free rings' centres scatter with each ring's
    own degeneracies (centre against speed and orientation), which the fit with the curve held does not
    share, and the centre's errors covered the truth in 85-91 per cent of mocks instead of 68
    (benchmarks/error_calibration.py)."""
    use = state.centre.rings_used
    params = state.free_rings.params
    n = len(state.layout)
    shared = 1 + correlation_reach(state.layout, state.vmap.beam)
    columns = {}
    for p in CENTRE_AND_SYSTEMIC:
        error = np.nan
        if p.name not in state.inputs.fixed:
            error = float(state.centre.errors.get(p.name, np.nan))
            if not np.isfinite(error) and use.sum() > 2:
                error = float(1.2533 * np.std(params[use, p]) * np.sqrt(shared / use.sum()))
        columns[f"{p.name}_err"] = np.full(n, error) * u.Unit(p.unit)
    return columns


def correlation_reach(layout, beam) -> int:
    """How many neighbours out a ring's noise is correlated with: ceil(beam FWHM / ring spacing), at least 1."""
    radii = np.asarray(layout.radii, float)
    if beam is None or len(radii) < 2:
        return 1
    spacing = float(np.median(np.diff(radii)))
    return max(1, int(np.ceil(beam.fwhm / spacing - 1e-6))) if spacing > 0 else 1


def noise_gain(state) -> np.ndarray:
    """Per ring, how much the steps after stage ``final`` (the beam treatment) enlarged the noise error: the
    ring table's ``v_rotation_err`` over the stage's own formal error, at least 1. The resampled scatter is
    measured on the stage's fit, so it is scaled alike (the beam correction stretches or propagates noise)."""
    before = state.final_rings.errors[:, Parameter.v_rotation]
    after = state.table["v_rotation_err"].to_value(_KMS)
    with np.errstate(invalid="ignore", divide="ignore"):
        gain = np.where(np.isfinite(before) & (before > 0), after / before, 1.0)
    return np.fmax(1.0, np.nan_to_num(gain, nan=1.0))


def _held_geometry(response):
    """A measure giving, beside the response's own answer, v_rotation with the orientation held at the adopted
    values (the stage-final speeds move with the constant geometry through ``coupling``; this takes it back)."""
    def measure(field):
        out = response.measure(field)
        shift = np.array([out[name] - response.adopted[name] for name in response.names])
        out["v_rotation_held"] = out["v_rotation"] + (response.coupling @ shift if len(shift) else 0.0)
        return out
    return measure


def profile_errors(state) -> dict:
    """The adopted orientation's errors from the geometry profile, enlarged by sqrt(1 + k): the profile treats
    the rings as independent, but each shares noise with its k neighbours within a beam (see
    :func:`centre_errors`). Held angles are left alone."""
    shared = 1 + correlation_reach(state.layout, state.vmap.beam)
    return {f"{name}_err": state.table[f"{name}_err"] * np.sqrt(shared)
            for name in ("position_angle", "inclination") if name not in state.inputs.fixed}


def resampled_errors(state, current=None) -> tuple:
    """(columns, summaries) of the resampling errors when asked for and v_rotation is fitted: the random part
    at the held orientation with its neighbour correlations; the constant orientation's errors become the
    larger of theirs and the resampled scatter."""
    options, table = state.options, state.table
    if not (options.resamples > 0 and state.final_rings.free[Parameter.v_rotation]):
        return {}, {}
    response = state.response
    draws = resample_draws(state.model, state.fitted_residual, _held_geometry(response), options.resamples,
                           seed=options.seed, quiet=options.quiet)
    held = draws["v_rotation_held"]
    spread = np.nanstd(held, axis=0, ddof=1) * noise_gain(state)
    columns = {"v_rotation_err_resampled": spread * _KMS}
    current = current or {}
    for name in response.names:
        scatter = float(np.nanstd(draws[name], ddof=1))
        columns[f"{name}_err"] = np.fmax(current.get(f"{name}_err", table[f"{name}_err"]).to_value(u.deg),
                                         scatter) * u.deg
    reach = correlation_reach(state.layout, state.vmap.beam)
    corr = band_correlation(held, reach)
    for k in range(1, reach + 1):
        band = np.append(np.diagonal(corr, k), np.zeros(k))
        columns[f"random_correlation_{k}"] = band
    summary = {
        "realisations": options.resamples, "seed": options.seed, "correlated_neighbours": reach,
        "method": "noise fields with the rms of the residual map and a model of its spatial correlation (a "
                  "Gaussian core fitted to its autocorrelation next to the zero lag, plus uncorrelated noise), "
                  "added to the model and refitted to first order about the data's fit; v_rotation's scatter with "
                  "the orientation held (the random part), the constant orientation's scatter for its error"}
    return columns, {"resampling": summary}


def orientation_spread(state) -> tuple:
    """(columns, summary): for each orientation adopted as one number for the whole disc, the rings' own
    scatter about it beyond their noise (:func:`.error_parts.excess_scatter`, rings of stage ``centred`` that
    informed the geometry) added in quadrature to its error: the error of one ring's orientation, not only of
    the mean. 0 for a flat disc seen through noise alone; a warp too small to be detected, or non-circular
    motions that turn the rings, make it larger. When the geometry decision found an inner change (the outer
    value adopted for every ring), only the rings outside it count: the inner rings' departure is reported
    as that decision, not as an error of the disc's orientation."""
    stage, profile = state.centred_rings, state.geometry.profile
    used = np.array(profile.used if profile.used is not None else stage.usable, bool)
    inner = state.geometry.summary.get("inner_change")
    if inner:
        used = used & (state.layout.radii >= inner["radius"])
    columns, summary = {}, {}
    if state.geometry.warped:
        return columns, summary
    for p in (Parameter.position_angle, Parameter.inclination):
        if p.name in state.inputs.fixed:
            continue
        adopted = float(np.nanmedian(state.geometry.adopted[p.name][0]))
        values = stage.params[:, p]
        if p is Parameter.position_angle:
            values = centre_angle(values, adopted)
        tau = excess_scatter(values[used], stage.errors[used, p])
        summary[p.name] = tau
        columns[p.name] = tau
    return columns, summary


def _side_speeds(stage, scale) -> tuple:
    """(speeds, noise errors) of one half's stage, NaN where a ring did not converge; the formal errors are
    scaled by ``scale`` (the whole disc's random / formal ratio) so both halves' noise is on one footing."""
    ok = np.array([s.converged for s in stage.solutions])
    v = np.array([s.params[Parameter.v_rotation] for s in stage.solutions])
    e = np.array([s.errors[Parameter.v_rotation] for s in stage.solutions]) * scale
    return np.where(ok, v, np.nan), np.where(ok, e, np.nan)


def speed_errors(column, sides: dict, low_inclination: float) -> tuple:
    """(columns, asymmetric) of v_rotation's error parts (module docstring) and the side curves.

    ``column(name)`` gives the ring table's current column ``name`` (None if absent); ``sides``: the
    approaching and receding stages (empty when only one half was fitted). ``asymmetric``: per ring, whether
    the halves differ by more than max(ASYMMETRY_SIGMA s_d, ASYMMETRY_MIN_SPEED) (the test of
    :func:`..diagnostics.diagnose.asymmetric_sides`, with both halves' errors on the resampled footing).
    """
    v = column("v_rotation").to_value(_KMS)
    formal = column("v_rotation_err").to_value(_KMS)
    resampled = column("v_rotation_err_resampled")
    random = formal if resampled is None else resampled.to_value(_KMS)
    columns = {"v_rotation_err_formal": formal * _KMS, "v_rotation_err_random": random * _KMS}
    asymmetry = np.zeros(len(v))
    asymmetric = np.zeros(len(v), bool)
    if sides:
        with np.errstate(invalid="ignore", divide="ignore"):
            scale = np.where(formal > 0, np.fmax(1.0, random / formal), 1.0)
        v_app, e_app = _side_speeds(sides["approaching"], scale)
        v_rec, e_rec = _side_speeds(sides["receding"], scale)
        columns["v_rotation_approaching"] = v_app * _KMS
        columns["v_rotation_receding"] = v_rec * _KMS
        asymmetry = np.nan_to_num(asymmetry_term(v_app, v_rec, e_app, e_rec))
        d, s_d = np.abs(v_app - v_rec), np.hypot(e_app, e_rec)
        asymmetric = np.isfinite(d) & (d > np.maximum(ASYMMETRY_SIGMA * s_d, ASYMMETRY_MIN_SPEED))
    shifts = geometry_response(v, column("inclination").to_value(u.deg), column("inclination_err").to_value(u.deg),
                               column("position_angle_err").to_value(u.deg))
    columns["v_rotation_shift_inclination"] = shifts["inclination"] * _KMS
    columns["v_rotation_shift_position_angle"] = shifts["position_angle"] * _KMS
    beam = column("v_rotation_err_beam")
    parts = {"random": random, "geometry": np.hypot(shifts["inclination"], shifts["position_angle"]),
             "beam": np.zeros(len(v)) if beam is None else np.nan_to_num(beam.to_value(_KMS)),
             "asymmetry": asymmetry}
    for name, values in parts.items():
        columns[f"v_rotation_err_{name}"] = values * _KMS
    total = total_error(parts)
    inc = column("inclination").to_value(u.rad)
    low = np.degrees(inc) < low_inclination
    columns["v_rotation_err"] = np.where(low, np.fmax(total, 0.5 * np.abs(v)), total) * _KMS
    columns["v_rotation_sin_i"] = v * np.sin(inc) * _KMS
    columns["v_rotation_sin_i_err"] = total_error({k: parts[k] for k in ("random", "beam", "asymmetry")}) \
        * np.sin(inc) * _KMS
    return columns, asymmetric


def error_budget(state) -> Additions:
    """The errors step: centre, resampled and v_rotation error columns, and the ``asymmetric`` flag."""
    columns = centre_errors(state)
    columns.update(profile_errors(state))
    resampled, summaries = resampled_errors(state, columns)
    columns.update(resampled)

    def column(name):
        if name in columns:
            return columns[name]
        return state.table[name] if name in state.table.colnames else None

    speeds, asymmetric = speed_errors(column, state.sides, state.options.low_inclination)
    columns.update(speeds)
    columns.pop("v_rotation_err_resampled", None)  # the random part where resampling ran
    # after the speeds: v_rotation responds to the adopted orientation's error, a ring's own angle to both
    spread, spread_summary = orientation_spread(state)
    for name, tau in spread.items():
        base = columns.get(f"{name}_err", state.table[f"{name}_err"]).to_value(u.deg)
        columns[f"{name}_err"] = np.hypot(base, tau) * u.deg
    summaries["orientation_spread"] = {"degrees": spread_summary, "method": "rings' own scatter about the adopted "
                                       "constant orientation beyond their noise (DerSimonian & Laird 1986), added "
                                       "in quadrature to each ring's orientation error (not to the error the "
                                       "geometry part of v_rotation uses: a ring's speed is fitted at the adopted "
                                       "orientation, and its own misfit is in its random part)"}
    summaries["error_model"] = dict(ERROR_MODEL, random_source="resampled" if resampled else "formal")
    return Additions(columns=columns, flags=[{"asymmetric"} if a else set() for a in asymmetric],
                     summaries=summaries)
