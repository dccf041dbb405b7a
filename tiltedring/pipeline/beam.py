"""The beam treatment step: the beam-smearing correction of the final curve (and of a constant orientation).

One step behind a narrow interface, so that another treatment can replace it:

- :func:`beam_wanted` says whether it runs (a beam is known, the correction is asked for, and
  v_rotation is fitted);
- :func:`beam_treatment` returns :class:`.state.Additions` with the field ``beam``, a
  :class:`BeamTreatment`, and the ``beam_smearing`` summary of ``fit.json``;
- :class:`BeamTreatment` says how the ring table changes (:meth:`BeamTreatment.columns`), which
  constant orientation it corrected (:attr:`BeamTreatment.geometry`) and gives the smeared model map.

What the data gave is reproduced by the fit's first-order response (``state.response``) to the
smeared model of a trial disc, and the trial is corrected until they agree
(:func:`.smearing.correct_beam_smearing`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy import units as u

from ..fitting.parameters import Parameter
from .state import Additions

__all__ = ["BeamTreatment", "beam_wanted", "beam_treatment", "speed_stretch"]

_KMS = u.km / u.s


def _stretch(corrected, observed) -> np.ndarray:
    return np.maximum(1.0, np.nan_to_num(corrected / observed, nan=1.0))


def speed_stretch(table) -> np.ndarray:
    """Per ring, how much the correction stretched v_rotation (at least 1; 1 where nothing was corrected):
    the noise stretches alike, so noise errors are scaled by it."""
    if "v_rotation_smeared" not in table.colnames:
        return np.ones(len(table))
    return _stretch(table["v_rotation"].to_value(_KMS), table["v_rotation_smeared"].to_value(_KMS))


@dataclass(frozen=True)
class BeamTreatment:
    """The corrected values (``v_rotation`` per ring; a constant ``position_angle`` / ``inclination``), the
    smeared model map of the corrected disc, and the summary for ``fit.json``."""

    corrected: dict
    model: np.ndarray
    summary: dict

    @property
    def geometry(self) -> dict:
        """The constant orientation values the correction changed, by name."""
        return {name: self.corrected[name] for name in self.summary["geometry_corrected"]}

    def columns(self, table) -> dict:
        """Ring-table columns the correction sets: the observed curve kept as ``v_rotation_smeared``, the
        corrected ``v_rotation``, and its noise error stretched with it."""
        observed = table["v_rotation"].to_value(_KMS)
        corrected = self.corrected["v_rotation"]
        return {"v_rotation_smeared": observed * _KMS, "v_rotation": corrected * _KMS,
                "v_rotation_err": table["v_rotation_err"] * _stretch(corrected, observed)}


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


def _fallback(summary: dict, reason: str) -> Additions:
    """The uncorrected curve kept: the summary says why, and a caution is raised."""
    summary.update({"corrected": False, "fallback": reason})
    caution = (f"beam-smearing correction not applied ({reason}): v_rotation within about two beams of the centre "
               "is biased low")
    return Additions(summaries={"beam_smearing": summary}, cautions=[caution])


def beam_treatment(state) -> Additions:
    """Beam-smearing correction of the final curve by forward modelling, the orientation held at the fitted
    values; the uncorrected curve is kept (with a caution) when the correction does not settle or its smeared
    model fits the data worse than the uncorrected model: chi^2 higher by more than one independent datum's
    share, (chi^2_c - chi^2_u) / (chi^2_u / n_pixels x pixels per beam) > 1 (beam-correlated pixels counted
    once per beam area)."""
    from ..fitting.kinematics import model_field
    from ..fitting.smearing import BeamKernel, correct_beam_smearing

    vmap, response, starts = state.vmap, state.response, state.final_rings.starts
    observed = response.observed()
    rings = {p.name: starts[:, p] for p in Parameter}
    rings["radius"] = state.layout.radii
    rings["v_rotation"] = observed["v_rotation"]
    r_outer = state.layout.edges[-1]
    kernel = BeamKernel(vmap.shape, vmap.beam, vmap.sky_jacobian)
    speeds, model, iterations, converged = correct_beam_smearing(
        vmap, rings, r_outer, observed["v_rotation"], response.speeds_at_adopted_geometry,
        noise=state.final_rings.errors[:, Parameter.v_rotation], kernel=kernel)
    summary = {
        "corrected": True, "method": "forward model: v_sys + G*(I (v - v_sys)) / G*I of the disc, iterated at the "
                                     "fitted orientation until the ring fit of the smeared model reproduces the "
                                     "data's fit",
        "velocity_map_kind": "intensity-weighted mean velocity (moment-1)",
        "beam_arcsec": [vmap.beam.major, vmap.beam.minor, vmap.beam.position_angle],
        "intensity": "uniform over the modelled disc (no intensity map given)" if vmap.intensity is None
        else "the intensity map",
        "iterations": iterations, "converged": converged,
        "geometry_corrected": [], "geometry_held": list(c for c in observed if c != "v_rotation"),
        "geometry_change": {},
    }
    ok = np.isfinite(observed["v_rotation"])
    plain = model_field(vmap.shape, vmap.sky_jacobian, {k: np.asarray(v, float)[ok] for k, v in rings.items()},
                        r_outer)
    chi_plain, chi_smeared = model_misfit(state.inputs.pixels, plain), model_misfit(state.inputs.pixels, model)
    summary.update({"chi_square_uncorrected": chi_plain, "chi_square_corrected": chi_smeared})
    if not converged:
        return _fallback(summary, f"it did not settle in {iterations} iterations")
    if not np.all(np.isfinite(speeds[ok])):
        return _fallback(summary, "it gave undefined speeds")
    scale = chi_plain / max(len(state.inputs.pixels.v), 1) * vmap.pixels_per_beam  # chi^2 of one independent datum
    summary["misfit_change_beams"] = (chi_smeared - chi_plain) / scale
    if summary["misfit_change_beams"] > 1.0:
        return _fallback(summary, "the smeared model of the corrected disc fits the data worse than the "
                                  "uncorrected model")
    corrected = {"v_rotation": speeds}
    treatment = BeamTreatment(corrected, model, summary)
    return Additions(fields={"beam": treatment}, summaries={"beam_smearing": summary})
