"""The ring-fitting steps of the staged fit, from the first guess to the model maps (after Begeman 1989).

Each step reads the :class:`.state.FitState` and returns :class:`.state.Additions`; the order and the
timings are the runner's (:mod:`.runner`). Each decision sits in a short function of its own:

- :func:`rings_for_centre`: which rings of stage ``free`` the centre rests on;
- :func:`centred_starts`: where each ring of stage ``centred`` starts;
- :func:`rings_for_geometry`: which rings of stage ``centred`` inform the geometry;
- :func:`adopted_geometry`: the orientation the final rings are fitted at (flat, warped or held);
- :func:`constant_geometry`: which of it is one number for the whole disc;
- :func:`response_wanted`: whether the fit's first-order response is needed.
"""

from __future__ import annotations

import numpy as np
from astropy import units as u

from ..errors import InputError
from ..fitting.candidates import SortedPixels
from ..fitting.first_guess import first_guess, guess_rotation
from ..fitting.geometry import centre_angle, wrap_angle
from ..fitting.kinematics import model_field
from ..fitting.parameters import CENTRE_AND_SYSTEMIC, GEOMETRY, ORIENTATION, PARAMETERS, SPEEDS, Parameter, mask
from .centre import check_against_rings, refine_centre
from .inputs import ring_layout
from .ring_stage import fit_stage, weighted_median
from .state import Additions, Centre, GeometryDecision, StartValues

__all__ = ["first_guess_step", "free_rings", "centre", "centred_rings", "geometry_decision", "final_rings",
           "fit_response", "ring_table", "model_maps", "response_wanted", "build_response"]

ORIENTATION_NAMES = tuple(p.name for p in ORIENTATION)


def first_guess_step(state) -> Additions:
    """The whole-disc parametric fit (:mod:`.first_guess`), the rings laid out, and the starting values
    (the user's where given)."""
    inputs = state.inputs
    vmap, options, initial = inputs.vmap, inputs.options, inputs.initial
    guess = first_guess(vmap, initial, options.fixed, seed=options.seed)
    layout = ring_layout(vmap, options, guess, inputs.pixels)
    geometry = {p.name: initial.get(p.name, guess[p.name]) for p in Parameter if p not in SPEEDS}
    geometry["v_radial"] = initial.get("v_radial", 0.0)
    v_rotation = guess_rotation(guess, layout.radii)
    if "v_rotation" in initial and "v_rotation" in inputs.fixed:
        v_rotation = np.full(len(layout), float(initial["v_rotation"]))
    return Additions(fields={"guess": guess, "layout": layout, "start": StartValues(geometry, v_rotation)})


def free_rings(state) -> Additions:
    """Stage ``free``: every ring fits centre, systemic velocity, orientation and v_rotation (and v_radial
    when asked), from the first guess."""
    return Additions(fields={"free_rings": fit_stage(state, state.start.rows(), state.inputs.free)})


def rings_for_centre(stage) -> np.ndarray:
    """Rings of stage ``free`` the centre rests on: the usable ones, or the converged ones if none is usable."""
    use = stage.usable
    return use if use.any() else stage.converged


def _near_first_guess(state, params) -> np.ndarray:
    """``params`` with the position angle re-expressed within 180 deg of the first guess's (so it can be averaged)."""
    params[:, Parameter.position_angle] = centre_angle(params[:, Parameter.position_angle],
                                                       state.start.geometry["position_angle"])
    return params


def centre(state) -> Additions:
    """Centre and systemic velocity: error-weighted medians over the rings of stage ``free``, refined by one
    fit to every pixel with the rings' rotation curve and median orientation held (:func:`.centre.refine_centre`)."""
    stage, fixed = state.free_rings, state.inputs.fixed
    use = rings_for_centre(stage)
    params, errors = _near_first_guess(state, stage.params), stage.errors
    values = dict(state.start.geometry)
    for p in CENTRE_AND_SYSTEMIC:
        if p.name not in fixed and use.any():
            values[p.name] = weighted_median(params[use, p], errors[use, p])
    held = {"radius": state.layout.radii[use], "v_rotation": params[use, Parameter.v_rotation]}
    if stage.free[Parameter.v_radial]:
        held["v_radial"] = params[use, Parameter.v_radial]
    for p in ORIENTATION:
        held[p.name] = weighted_median(params[use, p], errors[use, p])
    found, summaries, cautions = {}, {}, []
    if use.sum() >= 2:
        medians = dict(values)
        widths = np.diff(state.layout.edges)
        fit = refine_centre(state.vmap, state.pixels, held, state.layout.edges[-1], values, fixed,
                            ring_width=float(widths[-1]) if len(widths) else None)
        rings = {p.name: params[use, p] for p in CENTRE_AND_SYSTEMIC}
        values, found, summary = check_against_rings(fit, rings, medians)
        summaries["centre"] = summary
        cautions = list(fit.cautions) + ([summary["note"]] if summary.get("fallback") else [])
    return Additions(fields={"centre": Centre(values, found, use)}, summaries=summaries, cautions=cautions)


def centred_starts(state) -> np.ndarray:
    """Starts of stage ``centred``: the centre found; v_rotation of stage ``free`` where the ring counted; each
    ring's own orientation from stage ``free`` where it counted and lies within 30 deg of the typical
    (error-weighted median) value, the typical value elsewhere."""
    stage, use = state.free_rings, state.centre.rings_used
    params, errors = _near_first_guess(state, stage.params), stage.errors
    starts = state.start.rows(state.centre.values, np.where(use, params[:, Parameter.v_rotation],
                                                             state.start.v_rotation))
    for p in ORIENTATION:
        if p.name not in state.inputs.fixed and use.any():
            typical = weighted_median(params[use, p], errors[use, p])
            starts[:, p] = np.where(use & (np.abs(params[:, p] - typical) < 30), params[:, p], typical)
    return starts


def centred_rings(state) -> Additions:
    """Stage ``centred``: centre and systemic velocity held at the centre found; orientation and speeds refitted."""
    free = state.inputs.free & ~mask(CENTRE_AND_SYSTEMIC)
    return Additions(fields={"centred_rings": fit_stage(state, centred_starts(state), free)})


def rings_for_geometry(state):
    """Rings of stage ``centred`` that inform the geometry: the usable ones, less those whose velocities are
    not circular even at their own best geometry (bars and streaming would drag the disc's geometry and fake a
    warp), provided three remain. Returns (mask, radii of the rings left out as non-circular)."""
    stage = state.centred_rings
    use = stage.usable
    if not state.options.diagnostics:
        return use, []
    from ..diagnostics.diagnose import diagnose

    vmap, layout = state.vmap, state.layout
    params = _near_first_guess(state, stage.params)
    own = {p.name: params[:, p] for p in GEOMETRY}
    _, pre_flags, _ = diagnose(state.pixels, vmap.sky_jacobian, own, layout.inner, layout.outer,
                               vmap.pixels_per_beam)
    non_circular = np.array([bool(f) for f in pre_flags])
    if (use & ~non_circular).sum() < 3:
        return use, []
    return use & ~non_circular, [float(r) for r in layout.radii[use & non_circular]]


def adopted_geometry(state, profile) -> dict:
    """Orientation the final rings are fitted at, by name (values, errors per ring): the regularised profile of
    the warp test (constant for a flat disc; constant inside the onset and smooth beyond it for a warp), or the
    held value where the user fixed it."""
    adopted = {"position_angle": (profile.position_angle, profile.position_angle_err),
               "inclination": (profile.inclination, profile.inclination_err)}
    n = len(state.layout)
    for name in ORIENTATION_NAMES:
        if name in state.inputs.fixed:
            adopted[name] = (np.full(n, state.start.geometry[name]), np.full(n, np.nan))
    return adopted


def geometry_decision(state) -> Additions:
    """Flat or warped (:func:`.warp.geometry_profile`, BIC) from the orientation of the rings of stage
    ``centred`` that inform it; no test when the user held the orientation."""
    from ..diagnostics.warp import geometry_profile

    stage, vmap = state.centred_rings, state.vmap
    params, errors = _near_first_guess(state, stage.params), stage.errors
    used, excluded = rings_for_geometry(state)
    pa, inc = Parameter.position_angle, Parameter.inclination
    profile = geometry_profile(state.layout.radii, params[:, pa], errors[:, pa], params[:, inc], errors[:, inc], used,
                               vmap.beam.fwhm if vmap.beam is not None else None)
    profile.summary["rings_excluded_as_non_circular"] = excluded
    summary = profile.summary
    if set(ORIENTATION_NAMES) & state.inputs.fixed:
        summary = {"detected": False, "onset_radius": None, "note": "geometry fixed by the user: no warp test"}
    decision = GeometryDecision(adopted_geometry(state, profile), profile, summary)
    return Additions(fields={"geometry": decision}, summaries={"warp": summary})


def final_rings(state) -> Additions:
    """Stage ``final``: the speeds refitted with the centre and the adopted orientation held, on the whole disc
    and, when the whole disc is fitted, on each half alone."""
    stage, options = state.centred_rings, state.options
    use, params = stage.usable, stage.params
    free = mask([])
    free[Parameter.v_rotation] = "v_rotation" not in state.inputs.fixed
    free[Parameter.v_radial] = state.inputs.free[Parameter.v_radial]
    starts = state.start.rows(state.centre.values, np.where(use, params[:, Parameter.v_rotation],
                                                             state.start.v_rotation))
    for p in ORIENTATION:
        starts[:, p] = state.geometry.adopted[p.name][0]
    if options.fit_radial:
        starts[:, Parameter.v_radial] = np.where(use, params[:, Parameter.v_radial], 0.0)
    layout = state.layout
    shared = SortedPixels(state.pixels, state.vmap.sky_jacobian, starts, layout.inner, layout.outer)
    final = fit_stage(state, starts, free, pixels=shared)
    sides = {}
    if options.half == "whole" and free.any():
        for half in ("approaching", "receding"):
            sides[half] = fit_stage(state, starts, free, options.ring_options(half), pixels=shared)
    return Additions(fields={"final_rings": final, "sides": sides})


def constant_geometry(state) -> list:
    """Orientation names that are one number for the whole disc (and so corrected and resampled as one): both,
    unless a warp was found, less any the user held."""
    if state.geometry.warped:
        return []
    return [name for name in ORIENTATION_NAMES if name not in state.inputs.fixed]


def response_wanted(state) -> bool:
    """The fit's first-order response serves the beam treatment and the resampling errors, both of which need
    v_rotation fitted."""
    from .beam import beam_wanted

    return bool(state.final_rings.free[Parameter.v_rotation]) and (beam_wanted(state) or state.options.resamples > 0)


def build_response(vmap, pixels, layout, ring_options, centred, final, used, constant, reference_pa):
    """:class:`.response.FitResponse` of the ``final`` stage's speeds and, for each name in ``constant``, the
    error-weighted mean over the rings ``used`` of the ``centred`` stage (weights from the data's errors)."""
    from ..fitting.response import FitResponse

    weights = {}
    errors = centred.errors
    for name in constant:
        e = errors[:, Parameter[name]]
        w = np.where(used & np.isfinite(e) & (e > 0), 1.0 / np.maximum(e, 1e-12) ** 2, 0)
        if w.sum() > 0:
            weights[name] = w / w.sum()
    counted = np.any([w > 0 for w in weights.values()], axis=0) if weights else np.zeros(len(layout), bool)
    adopted = {name: final.starts[0, Parameter[name]] for name in constant}
    return FitResponse(vmap, pixels, layout, ring_options, centred.params, counted, centred.free, weights,
                       final.params, final.converged, final.free, adopted, reference_pa)


def fit_response(state) -> Additions:
    """What stages ``centred`` and ``final`` would give on another map, to first order (:mod:`.response`)."""
    response = build_response(state.vmap, state.pixels, state.layout, state.options.ring_options(),
                              state.centred_rings, state.final_rings, state.geometry.profile.used,
                              constant_geometry(state), state.start.geometry["position_angle"])
    return Additions(fields={"response": response})


def ring_table(state) -> Additions:
    """The final ring table: stage ``final``'s rings at the adopted orientation, with what the beam treatment
    changed and the sky centre beside the pixel centre. The rings' flags are carried apart until the end."""
    from ..products.result import add_sky_centre

    final, beam, vmap = state.final_rings, state.beam, state.vmap
    table = final.table(vmap, state.layout)
    table.remove_column("flags")
    corrected = beam.geometry if beam is not None else {}
    for name, (values, errors) in state.geometry.adopted.items():
        values = np.full(len(table), corrected[name]) if name in corrected else values
        errors = beam.geometry_error(name, errors) if name in corrected else errors
        table[name] = (wrap_angle(values) if name == "position_angle" else values) * u.deg
        table[f"{name}_err"] = errors * u.deg
    if beam is not None:
        for name, column in beam.columns(table).items():
            table[name] = column
    elif state.beam_bias is not None:  # the correction fell back: the bias it would have removed, as an error
        table["v_rotation_err_beam"] = np.nan_to_num(state.beam_bias) * (u.km / u.s)
    if not np.isfinite(table["v_rotation"].value).any():
        raise InputError("no ring could be fitted: the map has too few valid pixels along the rings; "
                         "check the masking, or give wider rings (--ring-width)")
    add_sky_centre(table, vmap)
    return Additions(fields={"table": table, "flags": [set(f) for f in final.flags]})


def model_maps(state) -> Additions:
    """The model velocity map of the final rings (the smeared model where the beam treatment made one) and the
    residual, data minus model."""
    table, vmap = state.table, state.vmap
    if state.beam is not None:
        model = state.beam.model
    else:
        finite = np.isfinite(table["v_rotation"].value)
        rings = {name: np.asarray(table[name].value)[finite] for name in PARAMETERS if name in table.colnames}
        rings["radius"] = table["radius"].to_value(u.arcsec)[finite]
        model = model_field(vmap.shape, vmap.sky_jacobian, rings, r_outer=state.layout.edges[-1])
    return Additions(fields={"model": model, "residual": vmap.velocity - model})
