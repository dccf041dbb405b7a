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

from ..fitting.geometry import centre_angle
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


def beam_treatment(state) -> Additions:
    """Beam-smearing correction of the final curve (and of a constant orientation) by forward modelling."""
    from ..fitting.smearing import BeamKernel, correct_beam_smearing

    vmap, response, starts = state.vmap, state.response, state.final_rings.starts
    observed = response.observed()
    constant = [n for n in observed if n != "v_rotation"]
    rings = {p.name: starts[:, p] for p in Parameter}
    rings["radius"] = state.layout.radii
    rings["v_rotation"] = observed["v_rotation"]
    kernel = BeamKernel(vmap.shape, vmap.beam, vmap.sky_jacobian)
    corrected, model, iterations, converged = correct_beam_smearing(vmap, rings, state.layout.edges[-1], observed,
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
    treatment = BeamTreatment(corrected, model, summary)
    return Additions(fields={"beam": treatment}, summaries={"beam_smearing": summary})
