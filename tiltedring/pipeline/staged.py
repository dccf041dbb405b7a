"""The staged fit from a first guess to the final ring table (after Begeman 1989).

1. ``first guess``: a whole-disc parametric fit (:mod:`.first_guess`); the rings are laid out.
2. ``free rings``: every ring fits centre, systemic velocity, position angle, inclination and
   v_rotation (and v_radial when asked).
3. ``centre``: centre and systemic velocity from a robust (error-weighted median) average of the
   free rings, refined by one fit to every pixel (:func:`.centre.refine_centre`).
4. ``centred rings``: centre and systemic velocity held; position angle, inclination and
   v_rotation refitted.
5. ``geometry decision``: position angle and inclination regularised — constant for a flat disc,
   or constant inside an onset radius and smooth beyond it when a warp is detected (:mod:`.warp`).
6. ``final rings``: v_rotation (and v_radial) refitted with the geometry held, on both halves
   together and on each half alone.
7. ``beam treatment`` (:mod:`.beam`): the beam-smearing correction, when a beam is known; it and
   the resampling errors use the fit's first-order response (``fit response``).
8. ``ring table`` and ``model maps``; ``errors`` (:mod:`.errors_budget`); ``diagnostics`` at the
   final geometry (:mod:`.diagnosis`): harmonics, flow models, asymmetry; flags and ``cautions``.

The steps are functions of a small state (:mod:`.state`), listed and timed in :mod:`.runner`; the
decisions (which rings count, which geometry is adopted) sit in short functions of :mod:`.steps`.
This module adds the rerun with radial flows free (:func:`fit_velocity_map`, :func:`compare_radial`).
"""

from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np

from ..errors import FitCaution
from ..io.maps import VelocityMap
from .options import FitOptions
from .runner import fit_once

__all__ = ["FitOptions", "fit_velocity_map", "compare_radial"]


def fit_velocity_map(vmap: VelocityMap, options: FitOptions | None = None, **option_values):
    """Fit a tilted-ring model to ``vmap``; returns a :class:`.result.FitResult`.

    Options come as a :class:`FitOptions` or as keyword arguments of the same names.

    Radial flows and the position angle are nearly degenerate (a constant v_radial looks like a
    turned major axis, apart from a weak third-harmonic signature), so a radial flow is hard to
    judge at a geometry fitted without it. When the diagnostics flag radial flows in three or more
    rings (and ``fit_radial`` is off and v_radial not fixed), the fit is run again with v_radial
    free in every stage, and that run is adopted only when it lowers the disc-wide BIC by more than
    10, or by more than 30 when it turns the position angle or inclination by more than three times
    their errors (:func:`compare_radial`). Either way the comparison is reported in ``diagnostics``.

    A map whose fit would need more memory than is available is refused before fitting, with the
    binning factor (:func:`.binning.bin_map`) that would fit.
    """
    if options is None:
        options = FitOptions(**option_values)
    elif option_values:
        raise TypeError("give either a FitOptions or keyword options, not both")
    from ..io.binning import check_memory

    check_memory(vmap)
    result = fit_once(vmap, options)
    if radial_rerun_wanted(result, options):
        radial = fit_once(vmap, replace(options, fit_radial=True))
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


def radial_rerun_wanted(result, options) -> bool:
    """Refit with v_radial free when the diagnostics flag radial flows in three or more rings of a fit that
    did not fit v_radial and did not hold it."""
    radial_rings = sum("radial_flow" in f for f in result.rings["flags"])
    return options.diagnostics and not options.fit_radial and "v_radial" not in options.fixed and radial_rings >= 3


def _geometry_turn(circular, radial) -> float:
    """The largest change of the disc's median position angle or inclination between the two runs, in units of
    the circular run's median error of that angle (0 when an error is unknown)."""
    from ..fitting.geometry import centre_angle

    turns = [0.0]
    for name in ("position_angle", "inclination"):
        a, b = np.asarray(circular[name], float), np.asarray(radial[name], float)
        err = float(np.nanmedian(np.asarray(circular[f"{name}_err"], float)))
        if not np.isfinite(err) or err <= 0:
            continue
        ref = float(np.nanmedian(a))
        if name == "position_angle":
            a, b = centre_angle(a, ref), centre_angle(b, ref)
        turns.append(abs(float(np.nanmedian(b) - np.nanmedian(a))) / err)
    return float(np.nanmax(turns))


def compare_radial(circular, radial, pixels_per_beam: float, min_delta_bic: float = 10.0,
                   min_amplitude: float = 5.0, turning_delta_bic: float = 30.0) -> dict:
    """Disc-wide BIC of the final-stage fits with and without v_radial (pixel-correlation corrected).

    chi^2 of each run = sum over rings of chi2_reduced (n_pixels - k); s^2 = the radial run's
    chi^2 per degree of freedom; BIC = chi^2 / (s^2 p) + k_total ln(n / p), p pixels per beam.
    Adopted when delta BIC > ``min_delta_bic`` and the median |v_radial| exceeds both
    ``min_amplitude`` km/s and three times its median error. A radial run that turns the disc's
    position angle or inclination by more than three times its error needs delta BIC >
    ``turning_delta_bic``: a turned major axis and a radial flow are nearly degenerate, and residual
    structure the models lack (spiral streaming, a skewed velocity map) tips a BIC near 10 either way.
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
    turn = _geometry_turn(circular, radial)
    needed = turning_delta_bic if turn > 3.0 else min_delta_bic
    adopted = bool(delta > needed and amplitude > max(min_amplitude, 3 * error))
    return {"adopted": adopted, "delta_bic": float(delta), "median_abs_v_radial": amplitude,
            "median_v_radial_err": error, "geometry_turn_sigma": turn,
            "criterion": f"delta BIC > {min_delta_bic} ({turning_delta_bic} when the geometry turns by more than 3 "
                         f"sigma) and median |v_radial| > max({min_amplitude} km/s, 3 x its error)"}
