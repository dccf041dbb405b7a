"""The staged fit from a first guess to the final ring table (after Begeman 1989).

1. ``first_guess``: a whole-disc parametric fit (:mod:`.first_guess`).
2. stage ``free``: every ring fits centre, systemic velocity, position angle, inclination and
   v_rotation (and v_radial when asked).
3. stage ``centred``: centre and systemic velocity fixed to a robust (error-weighted median)
   average of stage ``free``; position angle, inclination and v_rotation refitted.
4. stage ``final``: position angle and inclination regularised — constant for a flat disc, or
   constant inside an onset radius and smooth beyond it when a warp is detected (:mod:`.warp`) —
   then v_rotation (and v_radial) refitted with the geometry fixed, on both sides together and
   on each side alone.
5. diagnostics at the final geometry (:mod:`.diagnostics`): harmonic decomposition, radial and
   bisymmetric flow models with BIC selection, approaching/receding asymmetry; flags set.

Uncertainty of v_rotation in the final table, in quadrature: a noise term, the larger of
``v_rotation_err_formal`` (least squares, scaled by reduced chi-square and pixels per beam) and
``v_rotation_err_resampled`` (:mod:`.resampling`, residual-like correlated noise), then
``v_rotation_err_sides`` (half the approaching-receding difference; de Blok et al. 2008, common
practice) and ``v_rotation_err_inclination`` (v cot(i) sigma_i, the inclination error carried
into v_rotation).
"""

from __future__ import annotations

import time
import warnings
from dataclasses import replace

import numpy as np
from astropy import units as u

from ..diagnostics import flags as ringflags
from ..diagnostics.warp import geometry_profile
from ..errors import FitCaution, InputError
from ..fitting.candidates import SortedPixels
from ..fitting.engine import fit_rings
from ..fitting.first_guess import first_guess, guess_rotation
from ..fitting.geometry import centre_angle, disc_coordinates, wrap_angle
from ..fitting.kinematics import PARAMETERS, UNITS, model_field
from ..fitting.resampling import resample
from ..fitting.rings import RingLayout, parse_width
from ..io.maps import VelocityMap
from .options import FitOptions

__all__ = ["FitOptions", "fit_velocity_map"]


_INDEX = {name: k for k, name in enumerate(PARAMETERS)}


# --------------------------------------------------------------------------- helpers


def weighted_median(values, errors):
    """Median with weights 1/err^2 (NaNs ignored); plain median when errors are missing."""
    values = np.asarray(values, float)
    errors = np.asarray(errors, float)
    ok = np.isfinite(values)
    if not ok.any():
        return np.nan
    w = np.where(np.isfinite(errors) & (errors > 0), 1.0 / np.maximum(errors, 1e-12) ** 2, np.nan)
    if not np.isfinite(w[ok]).all():
        return float(np.median(values[ok]))
    order = np.argsort(values[ok])
    v, ww = values[ok][order], w[ok][order]
    cum = np.cumsum(ww)
    return float(v[np.searchsorted(cum, 0.5 * cum[-1])])


# --------------------------------------------------------------------------- set-up


def _resolve_initial(vmap: VelocityMap, options: FitOptions) -> dict:
    initial = dict(options.initial)
    if "ra_center" in initial or "dec_center" in initial:
        if not {"ra_center", "dec_center"} <= set(initial):
            raise InputError("give both ra_center and dec_center, or neither")
        initial["x_center"], initial["y_center"] = vmap.sky_to_pixel(initial.pop("ra_center"), initial.pop("dec_center"))
    ny, nx = vmap.shape
    for key, size in (("x_center", nx), ("y_center", ny)):
        if key in initial and not -0.5 <= initial[key] <= size - 0.5:
            raise InputError(
                f"the centre guess {key} = {initial[key]:.2f} pixels lies outside the map (0 to {size - 1}); "
                "give a centre inside the map (pixels are 0-based) or leave it out to let the tool find it"
            )
    inc = initial.get("inclination")
    if inc is not None and not 0 < inc < 90:
        raise InputError(f"inclination {inc} deg is outside (0, 90): give a value between face-on and edge-on")
    if "inclination" in options.fixed and inc is not None and (inc < 5 or inc > 85):
        raise InputError(
            f"inclination fixed at {inc} deg: near face-on the rotation cannot be measured, and near edge-on a "
            "thin-ring model of a velocity map does not apply; fix it between 5 and 85 deg or leave it free"
        )
    for key in options.fixed:
        if key == "v_radial":
            continue
        if key not in initial and key != "v_rotation":
            warnings.warn(f"{key} is fixed but no value was given: it is held at the first-guess value", FitCaution,
                          stacklevel=3)
    return initial


def _layout(vmap: VelocityMap, options: FitOptions, guess: dict, x, y) -> RingLayout:
    beam = vmap.beam.fwhm if vmap.beam is not None else None
    if options.ring_edges is not None:
        return RingLayout.explicit(options.ring_edges)
    width = parse_width(options.ring_width, vmap.pixel_scale, beam) if options.ring_width is not None else (
        beam if beam is not None else 2.0 * vmap.pixel_scale)
    first = parse_width(options.first_radius, vmap.pixel_scale, beam) if options.first_radius else 0.0
    if options.max_radius is not None:
        r_max = parse_width(options.max_radius, vmap.pixel_scale, beam)
    else:
        radius, cos_t, _ = disc_coordinates(x, y, guess["x_center"], guess["y_center"], vmap.sky_jacobian,
                                            guess["position_angle"], guess["inclination"])
        near_major = np.abs(cos_t) > np.cos(np.radians(45.0))
        pool = radius[near_major] if near_major.sum() > 10 else radius
        r_max = float(np.percentile(pool, 99.0))
    if beam is not None and r_max < 2 * beam:
        raise InputError(
            f"the galaxy's valid data reach only {r_max:.1f} arcsec, less than two beams ({2 * beam:.1f} arcsec): "
            "too small to fit rings; use a higher-resolution map"
        )
    if options.spacing == "logarithmic":
        return RingLayout.logarithmic(width, r_max, first, options.growth)
    return RingLayout.uniform(width, r_max, first)


def _run_stage(vmap, pixels, layout, starts, free, ring_options, wander: float = 0.03):
    """Fit every ring from its candidate slice (:mod:`.candidates`), starting at ``wander``.

    ``pixels``: the (x, y, v, sigma) arrays or a :class:`.candidates.SortedPixels` made for
    these ``starts``. A ring whose pixels reach the edge of its slice is refitted from a slice three
    times wider, until none does (or the slice spans the whole disc), so narrow slices cost
    nothing in accuracy.
    """
    if not isinstance(pixels, SortedPixels):
        pixels = SortedPixels(pixels, vmap.sky_jacobian, starts, layout.inner, layout.outer)
    x, y, v, sigma = pixels.pixels
    geometry_free = bool(free[[0, 1, _INDEX["position_angle"], _INDEX["inclination"]]].any())
    wander = wander if geometry_free else 0.02
    todo = np.arange(len(layout))
    solutions = [None] * len(layout)
    while len(todo):
        fitted = fit_rings(x, y, v, sigma, pixels.bounds(wander)[todo], starts[todo], free, vmap.sky_jacobian,
                           layout.inner[todo], layout.outer[todo], ring_options, vmap.pixels_per_beam,
                           order_radius=pixels.radius, margin=pixels.margin)
        for k, sol in zip(todo, fitted):
            solutions[k] = sol
        wander *= 3.0
        todo = np.array([k for k, sol in zip(todo, fitted) if sol.truncated and wander < 3.0], int)
    return solutions


def _ring_flags(sol, options, vmap, min_pixels, radius) -> set:
    out = set()
    if sol.n_pixels < min_pixels:
        out.add("few_pixels")
    if sol.coverage < options.min_coverage:
        out.add("poor_coverage")
    if not sol.converged or not np.all(np.isfinite(sol.params)):
        out.add("fit_failed")
    if sol.params[_INDEX["inclination"]] < options.low_inclination:
        out.add("low_inclination")
    if vmap.beam is not None and radius < vmap.beam.fwhm:
        out.add("inside_beam")
    return out


def refine_centre(vmap, pixels, rings: dict, r_outer: float, start: dict, fixed=()):
    """Centre and systemic velocity from one fit to all pixels at once, the rotation curve held.

    ``rings``: per-ring ``radius`` and ``v_rotation`` and one ``position_angle`` and ``inclination``
    for the whole disc. Minimises sum |cos theta| (v - v_sys - sin i v_rot(R) cos theta)^2 / sigma^2
    over (x_center, y_center, v_systemic), v_rot(R) interpolated between the rings (held at the end
    values beyond them, nothing beyond ``r_outer``), so every ring constrains the centre coherently
    instead of each ring alone. Large maps are thinned to about 40,000 pixels (every k-th). Returns
    (values, errors) dicts; errors scaled by sqrt(reduced chi-square x pixels per beam x k).
    """
    from scipy.optimize import least_squares

    x, y, v, sigma = pixels
    stride = max(1, len(x) // 40_000)  # three parameters: 40,000 pixels are plenty (regular, so repeatable)
    x, y, v, sigma = x[::stride], y[::stride], v[::stride], sigma[::stride]
    names = [n for n in ("x_center", "y_center", "v_systemic") if n not in fixed]
    if not names:
        return dict(start), {}
    order = np.argsort(rings["radius"])
    radii, v_rot = np.asarray(rings["radius"], float)[order], np.asarray(rings["v_rotation"], float)[order]
    pa, inc = float(rings["position_angle"]), float(rings["inclination"])

    def residual(q):
        cen = dict(start)
        cen.update(zip(names, q))
        radius, cos_t, _ = disc_coordinates(x, y, cen["x_center"], cen["y_center"], vmap.sky_jacobian, pa, inc)
        model = cen["v_systemic"] + np.sin(np.radians(inc)) * np.interp(radius, radii, v_rot) * cos_t
        return np.where(radius <= r_outer, np.sqrt(np.abs(cos_t)) * (v - model) / sigma, 0.0)

    q0 = np.array([start[n] for n in names])
    sol = least_squares(residual, q0, x_scale=np.array([0.5 if n != "v_systemic" else 2.0 for n in names]),
                        diff_step=1e-4, max_nfev=60)
    values = dict(start)
    values.update(zip(names, sol.x))
    dof = max(np.count_nonzero(sol.fun) - len(names), 1)
    try:
        cov = np.linalg.inv(sol.jac.T @ sol.jac) * (2 * sol.cost / dof) * vmap.pixels_per_beam * stride
        errors = dict(zip(names, np.sqrt(np.clip(np.diag(cov), 0, None))))
    except np.linalg.LinAlgError:
        errors = {n: np.nan for n in names}
    return values, errors


class _Laps:
    """Wall time of consecutive steps: ``lap(name)`` adds the time since the previous lap to ``laps[name]``."""

    def __init__(self):
        self._last = time.perf_counter()
        self.laps = {}

    def lap(self, name: str):
        now = time.perf_counter()
        self.laps[name] = self.laps.get(name, 0.0) + now - self._last
        self._last = now


def _usable(solutions, ring_flags):
    return np.array([s.converged and not ({"fit_failed", "few_pixels", "poor_coverage"} & f)
                     for s, f in zip(solutions, ring_flags)])


# --------------------------------------------------------------------------- the fit


def fit_velocity_map(vmap: VelocityMap, options: FitOptions | None = None, **option_values):
    """Fit a tilted-ring model to ``vmap``; returns a :class:`.result.FitResult`.

    Options come as a :class:`FitOptions` or as keyword arguments of the same names.

    Radial flows and the position angle are nearly degenerate (a constant v_radial looks like a
    turned major axis, apart from a weak third-harmonic signature), so a radial flow is hard to
    judge at a geometry fitted without it. When the diagnostics flag radial flows in three or more
    rings (and ``fit_radial`` is off and v_radial not fixed), the fit is run again with v_radial
    free in every stage, and that run is adopted only when it lowers the disc-wide BIC by more than
    10 (:func:`compare_radial`). Either way the comparison is reported in ``diagnostics``.

    A map whose fit would need more memory than is available is refused before fitting, with the
    binning factor (:func:`.binning.bin_map`) that would fit.
    """
    if options is None:
        options = FitOptions(**option_values)
    elif option_values:
        raise TypeError("give either a FitOptions or keyword options, not both")
    from ..io.binning import check_memory

    check_memory(vmap)
    result = _fit_once(vmap, options)
    radial_rings = sum("radial_flow" in f for f in result.rings["flags"])
    if options.diagnostics and not options.fit_radial and "v_radial" not in options.fixed and radial_rings >= 3:
        radial = _fit_once(vmap, replace(options, fit_radial=True))
        verdict = compare_radial(result.rings, radial.rings, vmap.pixels_per_beam)
        if verdict["adopted"]:
            result = radial
            result.cautions.insert(0, f"radial flows: the circular + radial model fits much better (disc-wide "
                                      f"delta BIC {verdict['delta_bic']:.0f}); v_radial fitted in every ring")
        else:
            result.cautions.append("radial flows flagged at the circular geometry, but refitting with v_radial free "
                                   f"does not lower the disc-wide BIC enough ({verdict['delta_bic']:.0f}): a radial "
                                   "flow and a turned major axis are nearly degenerate; v_radial_flow there is a "
                                   "lower bound (refit with --fit-radial to see the other solution)")
        result.diagnostics["radial_test"] = verdict
    for c in result.cautions:
        if c not in vmap.notes:
            warnings.warn(c, FitCaution, stacklevel=2)
    return result


def compare_radial(circular, radial, pixels_per_beam: float, min_delta_bic: float = 10.0,
                   min_amplitude: float = 5.0) -> dict:
    """Disc-wide BIC of the final-stage fits with and without v_radial (pixel-correlation corrected).

    chi^2 of each run = sum over rings of chi2_reduced (n_pixels - k); s^2 = the radial run's
    chi^2 per degree of freedom; BIC = chi^2 / (s^2 p) + k_total ln(n / p), p pixels per beam.
    Adopted when delta BIC > ``min_delta_bic`` and the median |v_radial| exceeds both
    ``min_amplitude`` km/s and three times its median error.
    """
    ok = np.isfinite(np.asarray(circular["chi2_reduced"], float)) & np.isfinite(np.asarray(radial["chi2_reduced"], float))
    if ok.sum() < 2:
        return {"adopted": False, "delta_bic": None}
    n_c = np.asarray(circular["n_pixels"])[ok]
    n_r = np.asarray(radial["n_pixels"])[ok]
    chi_c = float(np.sum(np.asarray(circular["chi2_reduced"])[ok] * (n_c - 1)))
    chi_r = float(np.sum(np.asarray(radial["chi2_reduced"])[ok] * (n_r - 2)))
    s2 = chi_r / max(np.sum(n_r - 2), 1)
    n_eff = max(np.sum(n_r) / pixels_per_beam, 2.0)
    rings = int(ok.sum())
    delta = (chi_c - chi_r) / (s2 * pixels_per_beam) - rings * np.log(n_eff)
    vr = radial["v_radial"].value[ok]
    er = radial["v_radial_err"].value[ok]
    amplitude, error = float(np.nanmedian(np.abs(vr))), float(np.nanmedian(er))
    adopted = bool(delta > min_delta_bic and amplitude > max(min_amplitude, 3 * error))
    return {"adopted": adopted, "delta_bic": float(delta), "median_abs_v_radial": amplitude,
            "median_v_radial_err": error,
            "criterion": f"delta BIC > {min_delta_bic} and median |v_radial| > max({min_amplitude} km/s, 3 x its error)"}


def _fit_once(vmap: VelocityMap, options: FitOptions):
    """One full staged fit (module docstring) with the given options."""
    from ..products.result import FitResult, stage_table

    cautions = list(vmap.notes)
    initial = _resolve_initial(vmap, options)

    ok = vmap.valid
    needed = int(max(30, 4 * vmap.pixels_per_beam))
    if ok.sum() < needed:
        raise InputError(
            f"velocity map {vmap.source} has only {int(ok.sum())} valid pixels (fewer than {needed}, about four beams' "
            "worth): too few to fit a disc; check the masking or use a map with more coverage"
        )
    yy, xx = np.nonzero(ok)
    x, y = xx.astype(float), yy.astype(float)
    v = vmap.velocity[ok]
    sigma = vmap.error[ok] if vmap.error is not None else np.ones_like(v)
    pixels = (x, y, v, sigma)
    if vmap.error is None:
        cautions.append("no error map: every pixel weighted equally; errors come from the scatter of the residuals")
    if vmap.beam is None:
        cautions.append("no beam known: pixels treated as independent, so errors may be too small; give --beam")

    clock = _Laps()
    guess = first_guess(vmap, initial, options.fixed, seed=options.seed)
    clock.lap("first guess")
    layout = _layout(vmap, options, guess, x, y)
    min_pixels = int(np.ceil(options.min_beams_per_ring * vmap.pixels_per_beam))

    fixed = set(options.fixed)
    base_free = np.array([name not in fixed for name in PARAMETERS])
    if not options.fit_radial:
        base_free[_INDEX["v_radial"]] = False

    def starts_from(geometry: dict, vrot):
        s = np.empty((len(layout), 7))
        for name, k in _INDEX.items():
            s[:, k] = geometry.get(name, 0.0)
        s[:, _INDEX["v_rotation"]] = vrot
        return s

    guess_geom = {k: initial.get(k, guess[k]) for k in ("x_center", "y_center", "v_systemic", "position_angle",
                                                       "inclination")}
    guess_geom["v_radial"] = initial.get("v_radial", 0.0)
    vrot0 = guess_rotation(guess, layout.radii)
    if "v_rotation" in initial:
        vrot0 = np.full(len(layout), float(initial["v_rotation"])) if "v_rotation" in fixed else vrot0
    stages = {}

    # stage "free"
    opts = options.ring_options()
    sols = _run_stage(vmap, pixels, layout, starts_from(guess_geom, vrot0), base_free, opts)
    clock.lap("stage free")
    flags_a = [_ring_flags(s, options, vmap, min_pixels, r) for s, r in zip(sols, layout.radii)]
    stages["free"] = (sols, flags_a)
    use = _usable(sols, flags_a)
    if not use.any():
        use = np.array([s.converged for s in sols])
    par = np.array([s.params for s in sols])
    err = np.array([s.errors for s in sols])

    centre = dict(guess_geom)
    for name in ("x_center", "y_center", "v_systemic"):
        k = _INDEX[name]
        if name not in fixed and use.any():
            centre[name] = weighted_median(par[use, k], err[use, k])
    # position angle average must respect the 0/360 wrap
    ref = guess_geom["position_angle"]
    par[:, _INDEX["position_angle"]] = centre_angle(par[:, _INDEX["position_angle"]], ref)
    held = {"radius": layout.radii[use], "v_rotation": par[use, _INDEX["v_rotation"]]}
    for name in ("position_angle", "inclination"):
        held[name] = weighted_median(par[use, _INDEX[name]], err[use, _INDEX[name]])
    centre, centre_err = refine_centre(vmap, pixels, held, layout.edges[-1], centre, fixed) if use.sum() >= 2 else (
        centre, {})
    clock.lap("centre")

    # stage "centred"
    free_b = base_free.copy()
    free_b[[_INDEX["x_center"], _INDEX["y_center"], _INDEX["v_systemic"]]] = False
    starts_b = starts_from(centre, np.where(use, par[:, _INDEX["v_rotation"]], vrot0))
    for name in ("position_angle", "inclination"):
        k = _INDEX[name]
        if name not in fixed and use.any():
            typical = weighted_median(par[use, k], err[use, k])
            starts_b[:, k] = np.where(use & (np.abs(par[:, k] - typical) < 30), par[:, k], typical)
    sols_b = _run_stage(vmap, pixels, layout, starts_b, free_b, opts)
    clock.lap("stage centred")
    flags_b = [_ring_flags(s, options, vmap, min_pixels, r) for s, r in zip(sols_b, layout.radii)]
    stages["centred"] = (sols_b, flags_b)
    use_b = _usable(sols_b, flags_b)
    par_b = np.array([s.params for s in sols_b])
    err_b = np.array([s.errors for s in sols_b])
    par_b[:, _INDEX["position_angle"]] = centre_angle(par_b[:, _INDEX["position_angle"]], ref)

    # stage "final": regularised geometry, then v_rotation (and v_radial) alone
    kp, ki = _INDEX["position_angle"], _INDEX["inclination"]
    use_geometry = use_b.copy()
    excluded = []
    if options.diagnostics:
        # Rings whose velocities are not circular even at their own best geometry (bars, streaming) would
        # drag the disc's geometry and fake a warp: they take no part in the geometry decision.
        from ..diagnostics.diagnose import diagnose

        own = {"x_center": par_b[:, _INDEX["x_center"]], "y_center": par_b[:, _INDEX["y_center"]],
               "position_angle": par_b[:, kp], "inclination": par_b[:, ki]}
        _, pre_flags, _ = diagnose(pixels, vmap.sky_jacobian, own, layout.inner, layout.outer, vmap.pixels_per_beam)
        non_circular = np.array([bool(f) for f in pre_flags])
        if (use_b & ~non_circular).sum() >= 3:
            use_geometry &= ~non_circular
            excluded = [float(r) for r in layout.radii[use_b & non_circular]]
    profile = geometry_profile(layout.radii, par_b[:, kp], err_b[:, kp], par_b[:, ki], err_b[:, ki], use_geometry,
                               vmap.beam.fwhm if vmap.beam is not None else None)
    clock.lap("warp test")
    profile.summary["rings_excluded_as_non_circular"] = excluded
    geometry = {"position_angle": (profile.position_angle, profile.position_angle_err),
                "inclination": (profile.inclination, profile.inclination_err)}
    for name in ("position_angle", "inclination"):
        if name in fixed:
            geometry[name] = (np.full(len(layout), guess_geom[name]), np.full(len(layout), np.nan))
    warp_summary = profile.summary if not ({"position_angle", "inclination"} & fixed) else {
        "detected": False, "onset_radius": None, "note": "geometry fixed by the user: no warp test"}
    free_c = np.zeros(7, bool)
    free_c[_INDEX["v_rotation"]] = "v_rotation" not in fixed
    free_c[_INDEX["v_radial"]] = base_free[_INDEX["v_radial"]]
    starts_c = starts_from(centre, np.where(use_b, par_b[:, _INDEX["v_rotation"]], vrot0))
    starts_c[:, _INDEX["position_angle"]] = geometry["position_angle"][0]
    starts_c[:, _INDEX["inclination"]] = geometry["inclination"][0]
    if options.fit_radial:
        starts_c[:, _INDEX["v_radial"]] = np.where(use_b, par_b[:, _INDEX["v_radial"]], 0.0)
    sorted_c = SortedPixels(pixels, vmap.sky_jacobian, starts_c, layout.inner, layout.outer)
    sols_c = _run_stage(vmap, sorted_c, layout, starts_c, free_c, opts)
    side_sols = {}
    if options.half == "whole" and free_c.any():
        for half in ("approaching", "receding"):
            side_sols[half] = _run_stage(vmap, sorted_c, layout, starts_c, free_c, options.ring_options(half))
    flags_c = [_ring_flags(s, options, vmap, min_pixels, r) for s, r in zip(sols_c, layout.radii)]
    clock.lap("stage final")
    stages["final"] = (sols_c, flags_c)
    beam = response = None
    correct_beam = options.beam_correction and vmap.beam is not None and free_c[_INDEX["v_rotation"]]
    if correct_beam or (options.resamples > 0 and free_c[_INDEX["v_rotation"]]):
        constant = [] if warp_summary.get("detected") else [n for n in ("position_angle", "inclination")
                                                             if n not in fixed]
        response = _fit_response(vmap, pixels, layout, opts, sols_b, free_b, sols_c, free_c, err_b, profile.used,
                                 constant, ref, {name: starts_c[0, _INDEX[name]] for name in constant})
        clock.lap("fit response")
    if correct_beam:
        beam = _correct_for_beam(vmap, layout, response, starts_c)
        clock.lap("beam smearing")
        for name in beam["summary"]["geometry_corrected"]:
            geometry[name] = (np.full(len(layout), beam["corrected"][name]), geometry[name][1])

    # the larger of the global fit's error and the ring-to-ring scatter of stage "free" (1.25 sigma/sqrt(n):
    # error of a median), since beam-smearing residuals make the global fit's formal error optimistic
    for name in ("x_center", "y_center", "v_systemic"):
        k = _INDEX[name]
        spread = 1.2533 * np.std(par[use, k]) / np.sqrt(use.sum()) if use.sum() > 2 else np.nan
        centre_err[name] = float(np.nanmax([centre_err.get(name, np.nan), spread])) if name not in fixed else np.nan

    tables = {name: stage_table(vmap, layout, st_sols, st_flags) for name, (st_sols, st_flags) in stages.items()}
    final = tables["final"]
    for name in ("position_angle", "inclination"):
        values = wrap_angle(geometry[name][0]) if name == "position_angle" else geometry[name][0]
        final[name] = values * u.deg
        final[f"{name}_err"] = geometry[name][1] * u.deg
    for name in ("x_center", "y_center", "v_systemic"):
        final[f"{name}_err"] = np.full(len(final), centre_err[name]) * u.Unit(UNITS[name])
    kms = u.km / u.s
    ratio = np.ones(len(final))
    if beam is not None:
        observed = final["v_rotation"].to_value(kms)
        corrected = beam["corrected"]["v_rotation"]
        final["v_rotation_smeared"] = observed * kms
        final["v_rotation"] = corrected * kms
        # the correction stretches the curve, and with it the noise: scale the noise errors alike
        ratio = np.maximum(1.0, np.nan_to_num(corrected / observed, nan=1.0))
        final["v_rotation_err"] = final["v_rotation_err"] * ratio
    finite = np.isfinite(final["v_rotation"].to_value(kms))
    if finite.sum() == 0:
        raise InputError("no ring could be fitted: the map has too few valid pixels along the rings; "
                         "check the masking, or give wider rings (--ring-width)")
    rings = {name: np.asarray(final[name].value)[finite] for name in PARAMETERS if name in final.colnames}
    rings["radius"] = final["radius"].to_value(u.arcsec)[finite]
    model = beam["model"] if beam is not None else model_field(vmap.shape, vmap.sky_jacobian, rings,
                                                               r_outer=layout.edges[-1])
    clock.lap("model map")
    residual = vmap.velocity - model
    summaries = {"warp": warp_summary}
    if beam is not None:
        summaries["beam_smearing"] = beam["summary"]
    if options.resamples > 0 and free_c[_INDEX["v_rotation"]]:
        scatter = resample(model, residual, response.measure, options.resamples, seed=options.seed,
                           quiet=options.quiet)
        clock.lap("resampling")
        final["v_rotation_err_resampled"] = scatter["v_rotation"] * ratio * kms
        for name in response.names:
            final[f"{name}_err"] = np.fmax(final[f"{name}_err"].to_value(u.deg), scatter[name]) * u.deg
        summaries["resampling"] = {
            "realisations": options.resamples, "seed": options.seed,
            "method": "noise fields with the power spectrum and rms of the residual map, added to the model and "
                      "refitted to first order about the data's fit (stage centred geometry and stage final speeds)"}
    _finish_velocity_errors(final, side_sols, options)
    from ..products.result import add_sky_centre

    add_sky_centre(final, vmap)
    final["warp_tilt"] = profile.tilt * u.deg
    final["warp_line_of_nodes"] = profile.line_of_nodes * u.deg
    if warp_summary.get("detected"):
        onset = warp_summary["onset_radius"]
        final["flags"] = [ringflags.join(ringflags.split(f) + (["warp"] if r >= onset else []))
                          for f, r in zip(final["flags"], layout.radii)]
    if options.diagnostics:
        summaries.update(_diagnose(final, vmap, pixels, layout, options, use_b))
        clock.lap("diagnostics")
    final = final[[c for c in final.colnames if c != "flags"] + ["flags"]]
    cautions += _cautions(final, options, vmap, summaries)
    clock.lap("tables")
    return FitResult(vmap=vmap, options=options, layout=layout, first_guess=guess, stages=tables, rings=final,
                     model=model, residual=residual, cautions=cautions, diagnostics=summaries, timings=clock.laps)


def _diagnose(final, vmap, pixels, layout, options, usable) -> dict:
    """Harmonics, flow models and asymmetry at the final geometry; adds columns and flags to ``final``."""
    from ..diagnostics.diagnose import asymmetry_summary, diagnose

    rings = {name: np.asarray(final[name].value, float) for name in ("x_center", "y_center", "position_angle",
                                                                     "inclination")}
    columns, ring_flags, summary = diagnose(pixels, vmap.sky_jacobian, rings, layout.inner, layout.outer,
                                            vmap.pixels_per_beam, bar_range=options.bar_range)
    for name, values in columns.items():  # each column carries its unit already
        final[name] = values
    final["flags"] = [ringflags.join(ringflags.split(f) + sorted(extra)) for f, extra in zip(final["flags"], ring_flags)]
    if "v_rotation_approaching" in final.colnames:
        final["v_rotation_difference"] = final["v_rotation_receding"] - final["v_rotation_approaching"]
        summary["asymmetry"] = asymmetry_summary(final["v_rotation_approaching"].value,
                                                 final["v_rotation_receding"].value, usable)
    return summary


def _fit_response(vmap, pixels, layout, opts, sols_b, free_b, sols_c, free_c, err_b, used, constant, reference_pa,
                  adopted):
    """:class:`.response.FitResponse` of stage ``final`` speeds and, for each name in ``constant``, the
    error-weighted mean of stage ``centred`` over the rings ``used`` (weights from the data's errors)."""
    from ..fitting.response import FitResponse

    weights = {}
    for name in constant:
        k = _INDEX[name]
        w = np.where(used & np.isfinite(err_b[:, k]) & (err_b[:, k] > 0), 1.0 / np.maximum(err_b[:, k], 1e-12) ** 2, 0)
        if w.sum() > 0:
            weights[name] = w / w.sum()
    par_b = np.array([s.params for s in sols_b])
    ok_b = np.any([w > 0 for w in weights.values()], axis=0) if weights else np.zeros(len(layout), bool)
    par_c = np.array([s.params for s in sols_c])
    ok_c = np.array([s.converged for s in sols_c])
    return FitResponse(vmap, pixels, layout, opts, par_b, ok_b, free_b, weights, par_c, ok_c, free_c, adopted,
                       reference_pa)


def _correct_for_beam(vmap, layout, response, starts_c):
    """Beam-smearing correction of the final curve (and of a constant geometry) by forward modelling.

    What the data gave is reproduced by the fit (``response``) of the smeared model of a trial disc,
    and the trial is corrected until they agree (:func:`.smearing.correct_beam_smearing`).
    """
    from ..fitting.smearing import BeamKernel, correct_beam_smearing

    observed = response.observed()
    constant = [n for n in observed if n != "v_rotation"]
    rings = {name: starts_c[:, k] for name, k in _INDEX.items()}
    rings["radius"] = layout.radii
    rings["v_rotation"] = observed["v_rotation"]
    kernel = BeamKernel(vmap.shape, vmap.beam, vmap.sky_jacobian)
    corrected, model, iterations, converged = correct_beam_smearing(vmap, rings, layout.edges[-1], observed,
                                                                    response.measure, kernel=kernel)
    if "position_angle" in corrected:
        corrected["position_angle"] %= 360.0
    summary = {
        "corrected": True, "method": "forward model: v_sys + G*(I (v - v_sys)) / G*I, iterated until the fit of the "
                                     "smeared model (to first order about the data's fit) reproduces the data's fit",
        "beam_arcsec": [vmap.beam.major, vmap.beam.minor, vmap.beam.position_angle],
        "intensity": "uniform over the modelled disc (no intensity map given)" if vmap.intensity is None
        else "the intensity map",
        "iterations": iterations, "converged": converged,
        "geometry_corrected": constant,
        "geometry_change": {n: float(centre_angle(corrected[n], observed[n]) - observed[n]) for n in constant},
    }
    return {"corrected": corrected, "model": model, "summary": summary}


def _finish_velocity_errors(final, side_sols, options):
    """Add the side curves and the error components of v_rotation to the final table."""
    kms = u.km / u.s
    n = len(final)
    v = final["v_rotation"].to_value(kms)
    formal = final["v_rotation_err"].to_value(kms)
    sides = np.zeros(n)
    if side_sols:
        v_app = np.array([s.params[_INDEX["v_rotation"]] if s.converged else np.nan for s in side_sols["approaching"]])
        v_rec = np.array([s.params[_INDEX["v_rotation"]] if s.converged else np.nan for s in side_sols["receding"]])
        final["v_rotation_approaching"] = v_app * kms
        final["v_rotation_receding"] = v_rec * kms
        sides = np.where(np.isfinite(v_app) & np.isfinite(v_rec), 0.5 * np.abs(v_app - v_rec), np.nan)
        combined = np.hypot(formal, sides)
        asym = np.isfinite(sides) & (2 * sides > np.maximum(3 * combined, 10.0))
        final["flags"] = [ringflags.join(ringflags.split(f) + (["asymmetric"] if a else []))
                          for f, a in zip(final["flags"], asym)]
    inc = final["inclination"].to_value(u.rad)
    inc_err = np.nan_to_num(final["inclination_err"].to_value(u.rad))
    from_inc = np.abs(v) * inc_err / np.tan(inc)
    final["v_rotation_err_formal"] = formal * kms
    if "v_rotation_err_resampled" in final.colnames:  # noise term: the larger of the two estimates
        formal = np.fmax(formal, final["v_rotation_err_resampled"].to_value(kms))
    final["v_rotation_err_sides"] = sides * kms
    final["v_rotation_err_inclination"] = from_inc * kms
    total = np.sqrt(formal**2 + np.nan_to_num(sides) ** 2 + from_inc**2)
    low = np.degrees(inc) < options.low_inclination
    final["v_rotation_err"] = np.where(low, np.maximum(total, 0.5 * np.abs(v)), total) * kms
    final["v_rotation_sin_i"] = v * np.sin(inc) * kms
    final["v_rotation_sin_i_err"] = np.hypot(formal, np.nan_to_num(sides)) * np.sin(inc) * kms


def _cautions(final, options, vmap, summaries) -> list:
    out = []
    warp = summaries.get("warp", {})
    if warp.get("detected"):
        out.append(f"warp detected beyond {warp['onset_radius']:.1f} arcsec (twist {warp['twist']:+.1f} deg, tilt "
                   f"{warp['tilt']:+.1f} deg): geometry varies with radius there")
    nc = summaries.get("non_circular", {})
    if nc.get("detected"):
        out.append(f"non-circular motions ({', '.join(nc['kinds'])}) in {len(nc['radii'])} ring(s), up to "
                   f"{nc['max_amplitude']:.0f} km/s in the disc plane: v_rotation there is not the circular speed; "
                   "see flow_model and v_t_<model> columns")
    speeds = final["v_rotation"].to_value(u.km / u.s)
    if np.isfinite(speeds).any() and np.nanmedian(speeds) < 0:
        pa = float(np.nanmedian(final["position_angle"].to_value(u.deg)))
        out.append(f"v_rotation is negative in most rings: the position angle held at {pa:.1f} deg points to the "
                   f"approaching side; hold it at {(pa + 180.0) % 360.0:.1f} deg instead, or leave it free")
    inc = float(np.nanmedian(final["inclination"].to_value(u.deg)))
    if inc < options.low_inclination:
        out.append(f"low inclination ({inc:.0f} deg < {options.low_inclination:.0f}): v_rotation and inclination are "
                   "degenerate, only v_rotation sin i (column v_rotation_sin_i) is well measured; v_rotation errors "
                   "widened to at least half of v_rotation")
    flagged = [f for f in final["flags"] if f]
    if flagged:
        counts = {}
        for f in flagged:
            for name in ringflags.split(f):
                counts[name] = counts.get(name, 0) + 1
        out.append("flagged rings: " + ", ".join(f"{n} x {name}" for name, n in counts.items()))
    beam = summaries.get("beam_smearing")
    if vmap.beam is not None and beam is None:
        out.append("beam smearing is not corrected: v_rotation within about two beams of the centre is biased low")
    elif beam is not None:
        if vmap.intensity is None:
            out.append("beam-smearing correction assumed a uniform intensity over the disc (no intensity map given)")
        if not beam["converged"]:
            out.append(f"beam-smearing correction did not settle in {beam['iterations']} iterations: the inner curve "
                       "is uncertain by more than its errors say")
    return out
