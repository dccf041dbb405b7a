"""The maximum disc: the largest stellar disc the rotation curve allows, judged at 2.2 disc scale lengths.

Definition used here (common practice since van Albada & Sancisi 1986; the 2.2 h reference radius
as in Sackett 1997, ApJ 483, 103): the disc's mass-to-light ratio is raised until the baryons alone
carry the observed speed at R_2.2 = 2.2 h, where an exponential disc's own speed peaks
(Freeman 1970: at 2.15 h):

    Y_max = f^2 [v_obs^2(R_2.2) - v_gas^2 - Y_bulge v_bulge^2](R_2.2) / v_disc^2(R_2.2)

with f = 1 (``fraction``; Sackett's criterion for a maximal disc is v_disc / v_total = 0.85 +/- 0.10
at 2.2 h, so f = 0.85 gives his "maximal" disc). v_obs at R_2.2 is interpolated linearly between the
curve's points. h is the disc scale length given; without one R_2.2 is the radius where the
disc's speed curve (M/L = 1) peaks. The former rule (the minimum over all radii) let one noisy inner
point decide; points where this disc then exceeds the observed speed by more than two errors are
reported as a caution instead.
"""

from __future__ import annotations

import numpy as np

__all__ = ["maximum_disc", "reference_radius", "DEFINITION"]

DEFINITION = ("maximum disc: baryons carry fraction x v_obs at R_2.2 = 2.2 disc scale lengths (v_disc peak "
              "radius when no scale length is given); van Albada & Sancisi 1986, Sackett 1997")


def reference_radius(data, baryons) -> tuple:
    """(R_2.2 in kpc, how it was found): 2.2 h from ``baryons.disc_scale_length``, else the peak of v_disc."""
    if baryons.disc_scale_length:
        return 2.2 * float(baryons.disc_scale_length), "2.2 x the given disc scale length"
    grid = np.linspace(float(np.min(data.radius)), float(np.max(data.radius)), 2000)
    v2 = baryons.disc.v_squared(grid)
    return float(grid[int(np.argmax(v2))]), "the radius where the disc's speed curve peaks (2.15 h for a Freeman disc)"


def maximum_disc(data, baryons, ml_bulge: float, fraction: float = 1.0) -> dict:
    """Y_max at R_2.2 (module docstring) with the reference radius, how it was found, and the points the
    resulting baryons exceed by more than two errors."""
    if baryons.disc is None:
        return {"ml_disc": 0.0, "radius_kpc": np.nan, "how": "no disc component", "points_exceeded": 0}
    r_ref, how = reference_radius(data, baryons)
    if not np.min(data.radius) <= r_ref <= np.max(data.radius):
        from ..errors import InputError

        raise InputError(f"the maximum disc is defined at R_2.2 = {r_ref:.3g} kpc, outside the curve "
                         f"({np.min(data.radius):.3g}-{np.max(data.radius):.3g} kpc); give --disc-scale-length or "
                         "a curve that reaches 2.2 disc scale lengths")
    order = np.argsort(data.radius)
    v_obs = float(np.interp(r_ref, data.radius[order], data.v[order]))
    sq = {name: float(np.ravel(value)[0]) for name, value in baryons.squared(np.array([r_ref])).items()}
    disc = max(sq["disc"], 1e-30)
    ml = max((fraction**2 * v_obs**2 - sq["gas"] - ml_bulge * sq["bulge"]) / disc, 0.0)
    full = baryons.squared(data.radius)
    v_bar2 = ml * full["disc"] + ml_bulge * full["bulge"] + full["gas"]
    over = np.sqrt(np.clip(v_bar2, 0, None)) > data.v + 2 * data.v_err
    return {"ml_disc": float(ml), "radius_kpc": r_ref, "how": how, "fraction": float(fraction),
            "points_exceeded": int(over.sum())}
