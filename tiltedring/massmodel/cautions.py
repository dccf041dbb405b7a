"""Cautions for a mass-model fit that may mislead (the user's rule: say so rather than print a confident number).

- negative observed speeds (kept when within their errors, but a rotation speed is >= 0);
- an NFW concentration more than 3 sigma off the Dutton & Maccio 2014 concentration-mass relation
  (scatter 0.11 dex; :func:`.halos.concentration_mass_relation`): often a sign that the baryons or
  the inner curve are off, or that the halo is not NFW;
- a maximum disc that exceeds the observed speed by more than two errors elsewhere in the curve;
- a parameter at its bound;
- a posterior chain shorter than 50 autocorrelation times (:mod:`.sampling`).
"""

from __future__ import annotations

import numpy as np

__all__ = ["fit_cautions", "CONCENTRATION_SIGMAS"]

CONCENTRATION_SIGMAS = 3.0


def _concentration(problem, values) -> list:
    halo = problem.halo_at(values) if problem.halo is not None else None
    if halo is None or not hasattr(halo, "relation_offset"):
        return []
    offset = halo.relation_offset()
    if offset is None:
        return []
    delta, scatter = offset
    if abs(delta) <= CONCENTRATION_SIGMAS * scatter:
        return []
    expected = halo.concentration / 10**delta
    return [f"NFW concentration {halo.concentration:.3g} is {abs(delta) / scatter:.1f} sigma off the Dutton & Maccio "
            f"2014 concentration-mass relation (expected {expected:.3g} for M = {halo.halo_mass:.3g} M_sun, scatter "
            f"{scatter} dex): check the baryons and the inner curve, or try a cored halo or the concentration prior "
            "(--concentration-prior)"]


def _bounds(unknowns, q_values) -> list:
    out = []
    for name, lower, upper in zip(unknowns.names, unknowns.lower, unknowns.upper):
        value = q_values[name]
        span = upper - lower
        if value - lower < 1e-4 * span or upper - value < 1e-4 * span:
            out.append(f"{name} = {value:.4g} sits at its bound ({lower:g}, {upper:g}); the data do not constrain it "
                       "and its error is not meaningful")
    return out


def fit_cautions(data, problem, values, unknowns, sampling=None) -> list:
    """The cautions of one fit (module docstring), as sentences."""
    out = [data.error_caution] if data.error_caution and problem.whiten is None else []
    negative = data.v < 0
    if negative.any():
        out.append(f"{int(negative.sum())} of {data.v.size} observed speeds are negative (down to "
                   f"{np.min(data.v):.3g} km/s, within their errors); a rotation speed is >= 0: check the curve's "
                   "inner points")
    out += _concentration(problem, values)
    md = unknowns.maximum_disc
    if md and md["points_exceeded"]:
        out.append(f"the maximum disc (set at R_2.2 = {md['radius_kpc']:.3g} kpc) exceeds the observed speed by more "
                   f"than two errors at {md['points_exceeded']} point(s)")
    out += _bounds(unknowns, values)
    if sampling and sampling.get("caution"):
        out.append(sampling["caution"])
    return out
