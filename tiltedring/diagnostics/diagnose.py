"""Where the assumptions of a flat disc in circular rotation fail: the decisions made before the curve.

Runs at the final geometry and adds, per ring, the harmonic coefficients (:mod:`.harmonics`), the
flow models and their selection (:mod:`.flows`), the approaching-minus-receding difference and the
residual rms, and sets the flags ``radial_flow``, ``bisymmetric_flow`` and ``strong_harmonics``.
The warp decision is made earlier (:mod:`.warp`), because the final geometry depends on it.

Summaries for ``fit.json``: ``non_circular`` {detected, radii, kind, max_amplitude, ...} and
``asymmetry`` {lopsidedness, ...}. Lopsidedness is the median over well-measured rings of
|v_receding - v_approaching| / (v_receding + v_approaching).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..fitting.candidates import gather_rings
from .flows import FlowTest, fit_flows
from .harmonics import HARMONIC_NAMES, ring_harmonics

__all__ = ["NonCircularTest", "diagnose"]


@dataclass(frozen=True)
class NonCircularTest:
    """Thresholds for non-circular flags (calibrated on flat circular discs; see the README).

    A ring has ``strong_harmonics`` when the harmonic non-circular amplitude in the disc plane
    exceeds ``min_amplitude`` km/s and three times its error, with p < ``max_p_value``.
    """

    min_amplitude: float = 8.0
    max_p_value: float = 1e-3
    flows: FlowTest = FlowTest()


def diagnose(pixels, sky_jacobian, rings: dict, inner, outer, pixels_per_beam, residual_by_ring=None,
             test: NonCircularTest = NonCircularTest(), bar_range=None):
    """Return (per-ring columns dict, per-ring flag sets, summary dict)."""
    n = len(inner)
    radii = 0.5 * (np.asarray(inner) + np.asarray(outer))
    members = gather_rings(pixels, sky_jacobian, rings, inner, outer)
    harm = ring_harmonics(pixels, sky_jacobian, rings, inner, outer, pixels_per_beam, members)
    flows = fit_flows(pixels, sky_jacobian, rings, inner, outer, pixels_per_beam, test.flows, bar_range, members)
    sin_i = np.sin(np.radians(np.asarray(rings["inclination"], float)))
    variances = np.array([harm[f"{c}_err"] ** 2 for c in ("s1", "c2", "s2", "c3", "s3")])
    measured = np.isfinite(variances).sum(axis=0)
    amp_err = np.sqrt(np.where(measured > 0, np.nansum(variances, axis=0) / np.maximum(measured, 1), np.nan)) / sin_i
    strong = ((harm["noncircular_in_plane"] > np.maximum(test.min_amplitude, 3 * amp_err))
              & (harm["harmonic_p_value"] < test.max_p_value))
    ring_flags = [set() for _ in range(n)]
    amplitude = np.zeros(n)
    for k in range(n):
        model = flows["flow_model"][k]
        if model == "bisymmetric":
            ring_flags[k].add("bisymmetric_flow")
            amplitude[k] = np.hypot(flows["v_2t"][k], flows["v_2r"][k])
        elif model == "radial":
            ring_flags[k].add("radial_flow")
            amplitude[k] = abs(flows["v_radial_flow"][k])
        if strong[k]:
            ring_flags[k].add("strong_harmonics")
            amplitude[k] = max(amplitude[k], harm["noncircular_in_plane"][k])
    columns = {f"harmonic_{name}": harm[name] for name in HARMONIC_NAMES}
    columns.update({f"harmonic_{name}_err": harm[f"{name}_err"] for name in HARMONIC_NAMES})
    for key in ("noncircular_amplitude", "noncircular_in_plane", "noncircular_fraction", "harmonic_p_value"):
        columns[key] = harm[key]
    for key in ("flow_model", "v_t_circular", "v_t_radial", "v_t_bisymmetric", "v_radial_flow", "v_radial_flow_err",
                "v_2t", "v_2t_err", "v_2r", "v_2r_err", "delta_bic_radial", "delta_bic_bisymmetric"):
        columns[key] = flows[key]
    if residual_by_ring is not None:
        columns["residual_rms"] = residual_by_ring

    flagged = [k for k in range(n) if ring_flags[k]]
    kinds = [m for m in ("bisymmetric", "radial") if any(flows["flow_model"][k] == m for k in flagged)]
    if not kinds and flagged:
        kinds = ["harmonic"]
    summary = {
        "non_circular": {
            "detected": bool(flagged),
            "radii": [float(radii[k]) for k in flagged],
            "kind": kinds[0] if kinds else None,
            "kinds": kinds,
            "max_amplitude": float(amplitude[flagged].max()) if flagged else 0.0,
            "amplitude_meaning": "in the disc plane, km/s: sqrt(v_2t^2 + v_2r^2), |v_radial| or the harmonic amplitude",
            "bar_angle": flows["disc"].get("bar_angle"),
            "bar_range": flows["disc"].get("bar_range"),
            "disc_model_bic": flows["disc"].get("bic"),
            "disc_preferred_model": flows["disc"].get("preferred"),
            "radial_flow_sign": "v_radial_flow > 0: the minor-axis half at position_angle + 90 recedes; outflow if "
                                "that half is the far side, inflow if it is the near side",
            "thresholds": {"min_delta_bic": test.flows.min_delta_bic, "min_flow_amplitude": test.flows.min_amplitude,
                           "min_harmonic_amplitude": test.min_amplitude, "max_p_value": test.max_p_value},
        }
    }
    return columns, ring_flags, summary


def asymmetry_summary(v_approaching, v_receding, usable) -> dict:
    """Approaching/receding comparison over usable rings (module docstring)."""
    va, vr = np.asarray(v_approaching, float), np.asarray(v_receding, float)
    ok = usable & np.isfinite(va) & np.isfinite(vr) & ((va + vr) > 0)
    if not ok.any():
        return {"lopsidedness": None, "median_difference": None, "max_difference": None}
    diff = vr[ok] - va[ok]
    return {"lopsidedness": float(np.median(np.abs(diff) / (va[ok] + vr[ok]))),
            "median_difference": float(np.median(diff)), "max_difference": float(diff[np.argmax(np.abs(diff))]),
            "meaning": "difference = v_receding - v_approaching (km/s); lopsidedness = median |difference| / sum"}
