"""The last step: the rings' flags written into the table, and the cautions a reader must see."""

from __future__ import annotations

import numpy as np
from astropy import units as u

from ..diagnostics import flags as ringflags
from .state import Additions

__all__ = ["finish", "fit_cautions"]


def finish(state) -> Additions:
    """The ``flags`` column (last in the table) and the cautions of the whole fit."""
    flags = [ringflags.join(f) for f in state.flags]
    cautions = fit_cautions(state.table, flags, state.options, state.vmap, state.summaries)
    return Additions(columns={"flags": flags}, cautions=cautions)


def fit_cautions(final, flags, options, vmap, summaries) -> list:
    """Plain-language cautions about results that may mislead: a warp, non-circular motions, a position angle
    held on the approaching side, a low inclination, flagged rings, and the beam treatment (or its absence).
    ``flags``: the rings' flag strings."""
    out = []
    warp = summaries.get("warp", {})
    if warp.get("detected"):
        out.append(f"warp detected beyond {warp['onset_radius']:.1f} arcsec (twist {warp['twist']:+.1f} deg, tilt "
                   f"{warp['tilt']:+.1f} deg): geometry varies with radius there")
    nc = summaries.get("non_circular", {})
    if nc.get("detected"):
        out.append(f"non-circular motions ({', '.join(nc['kinds'])}) in {len(nc['radii'])} ring{'' if len(nc['radii']) == 1 else 's'}, up to "
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
    flagged = [f for f in flags if f]
    if flagged:
        counts = {}
        for f in flagged:
            for name in ringflags.split(f):
                counts[name] = counts.get(name, 0) + 1
        out.append("flagged rings: " + ", ".join(f"{n} x {name}" for name, n in counts.items()))
    beam = summaries.get("beam_smearing")
    if vmap.beam is not None and beam is None:
        out.append("beam smearing is not corrected: v_rotation within about two beams of the centre is biased low")
    elif beam is not None and beam.get("corrected", True):  # a fallback raises its own caution
        if vmap.intensity is None:
            out.append("beam-smearing correction assumed a uniform intensity over the disc (no intensity map given)")
        if not beam["converged"]:
            out.append(f"beam-smearing correction did not settle in {beam['iterations']} iterations: the inner curve "
                       "is uncertain by more than its errors say")
    return out
