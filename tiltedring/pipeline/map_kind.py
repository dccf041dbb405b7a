"""The kind of velocity map in the beam treatment: which forward model the correction uses, and what it says.

A moment-1 map keeps the linear correction of :mod:`..fitting.beam_inversion`; a line-centre map (peak,
Gaussian, Gauss-Hermite, optical centroid; :mod:`..io.map_kind`) is corrected through the model cube of
:mod:`..fitting.line_centre_smearing`. The kind comes from the map (``VelocityMap.velocity_map_kind``: given,
read from the header, or assumed ``moment``); ``fit.json`` says which and where it came from, and a caution
is raised only when it matters: an assumed kind and a correction that moved a ring by more than its error.

The line dispersion of the model cube is the median of the dispersion map beyond two beams (disc radius),
where smearing hardly widens the lines; without a dispersion map it is :data:`DEFAULT_DISPERSION`.
"""

from __future__ import annotations

import numpy as np

from ..fitting.parameters import Parameter

__all__ = ["map_kind", "line_centre_model", "kind_summary", "kind_cautions", "DEFAULT_DISPERSION"]

#: km/s, the line dispersion assumed without a dispersion map: about that of HI discs (e.g. Tamburro et al.
#: 2009, AJ 137, 4424; from memory) and of ionised gas without thermal broadening
DEFAULT_DISPERSION = 10.0


def map_kind(state) -> tuple:
    """(kind, where it came from) of the state's velocity map."""
    return (getattr(state.vmap, "velocity_map_kind", "moment") or "moment",
            getattr(state.vmap, "kind_source", "assumed"))


def _dispersion(vmap, radius_map) -> tuple:
    """(line dispersion km/s, where it came from): the median of the dispersion map beyond two beams."""
    if vmap.dispersion is not None:
        values = np.asarray(vmap.dispersion, float)
        far = np.isfinite(values) & (values > 0) & (radius_map > 2.0 * vmap.beam.major)
        if far.sum() >= 10:
            return float(np.median(values[far])), "median of the dispersion map beyond two beams"
    return DEFAULT_DISPERSION, f"{DEFAULT_DISPERSION:g} km/s assumed (no dispersion map)"


def line_centre_model(state, ok):
    """The :class:`..fitting.line_centre_smearing.LineCentreModel` of a line-centre map (None for a moment-1
    map); ``ok``: the rings whose speeds are corrected."""
    from ..fitting.intensity_profile import disc_radius_map
    from ..fitting.line_centre_smearing import LineCentreModel
    from ..io.map_kind import LINE_CENTRE_KINDS

    kind = map_kind(state)[0]
    if kind not in LINE_CENTRE_KINDS:
        return None
    vmap, starts, response = state.vmap, state.final_rings.starts, state.response
    rings = {p.name: starts[ok, p] for p in Parameter}
    rings["radius"] = state.layout.radii[ok]
    geometry = {name: float(np.median(rings[name])) for name in ("x_center", "y_center", "position_angle",
                                                                  "inclination")}
    radius_map = disc_radius_map(vmap.shape, vmap.sky_jacobian, geometry)
    dispersion, source = _dispersion(vmap, radius_map)
    return LineCentreModel(kind, vmap.shape, vmap.sky_jacobian, vmap.beam, rings, tuple(response.names),
                           float(state.layout.edges[-1]), radius_map, dispersion, dispersion_source=source,
                           speeds_of=lambda model: response.speeds_at_adopted_geometry(model)[ok])


def kind_summary(state, model) -> dict:
    """Entries of the ``beam_smearing`` section of ``fit.json`` on the kind of map and its forward model."""
    from ..io.map_kind import describe_kind

    kind, source = map_kind(state)
    out = {"velocity_map_kind": describe_kind(kind), "velocity_map_kind_source": source}
    if model is not None:
        out["line_centre_model"] = {
            "method": "line centres of a beam-smeared model cube (Gaussian lines, channels of a third of the "
                      "dispersion) minus its intensity-weighted means, added to the moment-1 model within four "
                      "beams of the centre; Gauss-Newton on the rings the beam moves (Jacobian through the model "
                      "cube, the same smoothness penalty), a step kept only if the map misfit falls; the "
                      "orientation held",
            "dispersion_kms": model.dispersion, "dispersion_source": model.dispersion_source,
            "by_intensity_assumption": model.history}
    return out


def kind_cautions(state, moved) -> list:
    """A caution when the kind was assumed and the correction moves some ring (or would have moved it, had it
    not fallen back) by more than its error (``moved``: per ring, |change| / error)."""
    kind, source = map_kind(state)
    if not source.startswith("assumed") or not np.any(np.nan_to_num(moved) > 1.0):
        return []
    return [f"the velocity map states no kind, so the beam-smearing correction took it as a {kind} map (an "
            "intensity-weighted mean velocity); a map of fitted line centres (peak, Gaussian, Gauss-Hermite or "
            "optical centroid) is smeared differently: state it with --velocity-map-kind"]
