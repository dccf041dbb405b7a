"""The errors step: the error budget of the final ring table.

Uncertainty of v_rotation, in quadrature: a noise term, the larger of ``v_rotation_err_formal``
(least squares, scaled by reduced chi-square and pixels per beam, stretched with the beam
correction) and ``v_rotation_err_resampled`` (:mod:`.resampling`, residual-like correlated noise
through the fit's first-order response), then ``v_rotation_err_sides`` (half the
approaching-receding difference; de Blok et al. 2008, common practice) and
``v_rotation_err_inclination`` (v cot(i) sigma_i, the inclination error carried into v_rotation).
Below the low-inclination limit the total is widened to at least half of v_rotation.

Centre and systemic velocity: the larger of the global fit's error and the ring-to-ring scatter
of stage ``free``. Orientation: the larger of the profile's error and the resampled scatter.
One step (:func:`error_budget`) with the same interface as the others, so it can be replaced whole.
"""

from __future__ import annotations

import numpy as np
from astropy import units as u

from ..fitting.parameters import CENTRE_AND_SYSTEMIC, Parameter
from ..fitting.resampling import resample
from ..diagnostics.diagnose import asymmetric_sides
from .beam import speed_stretch
from .state import Additions

__all__ = ["error_budget", "centre_errors", "resampled_errors", "speed_errors"]

_KMS = u.km / u.s


def centre_errors(state) -> dict:
    """Error columns of the centre and systemic velocity: the larger of the global fit's error and the
    ring-to-ring scatter of stage ``free`` (1.2533 sigma / sqrt(n), the error of a median), since
    beam-smearing residuals make the global fit's formal error optimistic; NaN where held."""
    use = state.centre.rings_used
    params = state.free_rings.params
    n = len(state.layout)
    columns = {}
    for p in CENTRE_AND_SYSTEMIC:
        spread = 1.2533 * np.std(params[use, p]) / np.sqrt(use.sum()) if use.sum() > 2 else np.nan
        error = np.nan
        if p.name not in state.inputs.fixed:
            error = float(np.nanmax([state.centre.errors.get(p.name, np.nan), spread]))
        columns[f"{p.name}_err"] = np.full(n, error) * u.Unit(p.unit)
    return columns


def resampled_errors(state) -> tuple:
    """(columns, summaries) of the resampling errors when asked for and v_rotation is fitted; the constant
    orientation's errors become the larger of theirs and the resampled scatter."""
    options, table = state.options, state.table
    if not (options.resamples > 0 and state.final_rings.free[Parameter.v_rotation]):
        return {}, {}
    response = state.response
    scatter = resample(state.model, state.residual, response.measure, options.resamples, seed=options.seed,
                       quiet=options.quiet)
    columns = {"v_rotation_err_resampled": scatter["v_rotation"] * speed_stretch(table) * _KMS}
    for name in response.names:
        columns[f"{name}_err"] = np.fmax(table[f"{name}_err"].to_value(u.deg), scatter[name]) * u.deg
    summary = {
        "realisations": options.resamples, "seed": options.seed,
        "method": "noise fields with the power spectrum and rms of the residual map, added to the model and "
                  "refitted to first order about the data's fit (stage centred geometry and stage final speeds)"}
    return columns, {"resampling": summary}


def _side_speeds(stage) -> np.ndarray:
    return np.array([s.params[Parameter.v_rotation] if s.converged else np.nan for s in stage.solutions])


def speed_errors(column, sides: dict, low_inclination: float) -> tuple:
    """(columns, asymmetric) of v_rotation's error components (module docstring) and the side curves.

    ``column(name)`` gives the ring table's current column ``name`` (None if absent); ``sides``: the
    approaching and receding stages (empty when only one half was fitted). ``asymmetric``: per ring, whether
    the halves differ beyond their errors (:func:`..diagnostics.diagnose.asymmetric_sides`).
    """
    v = column("v_rotation").to_value(_KMS)
    formal = column("v_rotation_err").to_value(_KMS)
    columns = {}
    halves = np.zeros(len(v))
    asymmetric = np.zeros(len(v), bool)
    if sides:
        v_app, v_rec = _side_speeds(sides["approaching"]), _side_speeds(sides["receding"])
        columns["v_rotation_approaching"] = v_app * _KMS
        columns["v_rotation_receding"] = v_rec * _KMS
        halves = np.where(np.isfinite(v_app) & np.isfinite(v_rec), 0.5 * np.abs(v_app - v_rec), np.nan)
        asymmetric = asymmetric_sides(sides["approaching"], sides["receding"])
    inc = column("inclination").to_value(u.rad)
    inc_err = np.nan_to_num(column("inclination_err").to_value(u.rad))
    from_inc = np.abs(v) * inc_err / np.tan(inc)
    columns["v_rotation_err_formal"] = formal * _KMS
    resampled = column("v_rotation_err_resampled")
    if resampled is not None:  # noise term: the larger of the two estimates
        formal = np.fmax(formal, resampled.to_value(_KMS))
    columns["v_rotation_err_sides"] = halves * _KMS
    columns["v_rotation_err_inclination"] = from_inc * _KMS
    total = np.sqrt(formal**2 + np.nan_to_num(halves) ** 2 + from_inc**2)
    low = np.degrees(inc) < low_inclination
    columns["v_rotation_err"] = np.where(low, np.maximum(total, 0.5 * np.abs(v)), total) * _KMS
    columns["v_rotation_sin_i"] = v * np.sin(inc) * _KMS
    columns["v_rotation_sin_i_err"] = np.hypot(formal, np.nan_to_num(halves)) * np.sin(inc) * _KMS
    return columns, asymmetric


def error_budget(state) -> Additions:
    """The errors step: centre, resampled and v_rotation error columns, and the ``asymmetric`` flag."""
    columns = centre_errors(state)
    resampled, summaries = resampled_errors(state)
    columns.update(resampled)

    def column(name):
        if name in columns:
            return columns[name]
        return state.table[name] if name in state.table.colnames else None

    speeds, asymmetric = speed_errors(column, state.sides, state.options.low_inclination)
    columns.update(speeds)
    return Additions(columns=columns, flags=[{"asymmetric"} if a else set() for a in asymmetric],
                     summaries=summaries)
