"""The diagnostics step: the warp's description per ring, and where a flat disc in circular rotation fails.

Always: the Briggs tilt and line of nodes of each ring against the inner disc (:mod:`.warp`) and
the ``warp`` flag beyond a detected onset. With ``diagnostics`` on: harmonics, flow models and the
approaching/receding asymmetry at the final geometry (:mod:`.diagnose`), with their flags.
"""

from __future__ import annotations

import numpy as np
from astropy import units as u

from ..fitting.parameters import GEOMETRY
from .state import Additions

__all__ = ["diagnostics", "warp_columns", "non_circular_columns"]

def warp_columns(state) -> tuple:
    """(columns, flags): tilt and line of nodes per ring, and ``warp`` beyond a detected onset."""
    profile, decision = state.geometry.profile, state.geometry
    columns = {"warp_tilt": profile.tilt * u.deg, "warp_line_of_nodes": profile.line_of_nodes * u.deg}
    flags = None
    if decision.warped:
        onset = decision.summary["onset_radius"]
        flags = [{"warp"} if r >= onset else set() for r in state.layout.radii]
    return columns, flags


def non_circular_columns(state) -> tuple:
    """(columns, flags, summaries) of harmonics, flow models and asymmetry at the final geometry."""
    from ..diagnostics.diagnose import asymmetry_summary, diagnose

    table, vmap, layout = state.table, state.vmap, state.layout
    rings = {p.name: np.asarray(table[p.name].value, float) for p in GEOMETRY}
    found, flags, summary = diagnose(state.pixels, vmap.sky_jacobian, rings, layout.inner, layout.outer,
                                     vmap.pixels_per_beam, bar_range=state.options.bar_range)
    columns = dict(found)  # each column carries its unit already
    if "v_rotation_approaching" in table.colnames:
        columns["v_rotation_difference"] = table["v_rotation_receding"] - table["v_rotation_approaching"]
        summary["asymmetry"] = asymmetry_summary(table["v_rotation_approaching"].value,
                                                 table["v_rotation_receding"].value, state.centred_rings.usable)
    return columns, flags, summary


def diagnostics(state) -> Additions:
    """The diagnostics step (module docstring)."""
    columns, flags = warp_columns(state)
    summaries = {}
    if state.options.diagnostics:
        more, found, summaries = non_circular_columns(state)
        columns.update(more)
        flags = found if flags is None else [a | b for a, b in zip(flags, found)]
    return Additions(columns=columns, flags=flags, summaries=summaries)
