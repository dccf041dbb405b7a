"""Where the assumptions of a flat disc in circular rotation fail: the decisions made before the curve.

Runs at the final geometry and adds, per ring, the harmonic coefficients (:mod:`.harmonics`), the
registered flow models and their selection (:mod:`.flow_models`, :mod:`.flows`), the
approaching-minus-receding difference and the residual rms, and sets the flags of the chosen flow
models (``radial_flow``, ``bisymmetric_flow``, ...) and ``strong_harmonics``.
The warp decision is made earlier (:mod:`.warp`), because the final geometry depends on it.

Summaries for ``fit.json``: ``non_circular`` {detected, radii, kind, max_amplitude, ...} and
``asymmetry`` {lopsidedness, ...}. Lopsidedness is the median over well-measured rings of
|v_receding - v_approaching| / (v_receding + v_approaching).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy import units as u

from ..fitting.candidates import gather_rings
from .flow_models import flow_model, flow_models
from .flows import FlowTest, fit_flows
from .harmonics import HARMONIC_NAMES, NON_CIRCULAR, ring_harmonics

__all__ = ["NonCircularTest", "diagnose", "harmonic_columns", "flow_columns", "asymmetry_summary",
           "asymmetric_sides", "ASYMMETRY_SIGMA", "ASYMMETRY_MIN_SPEED"]

ASYMMETRY_SIGMA = 3.0  # the sides must differ by this many times their combined error
ASYMMETRY_MIN_SPEED = 10.0  # km/s, and by at least this much (common practice: a few beam-scale streaming speeds)

KM_S = u.km / u.s


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
    """Return (per-ring columns dict, per-ring flag sets, summary dict).

    The columns carry their units, ready for a ring table: an astropy Quantity for speeds, a plain
    float array for pure numbers (fractions, p-values, BIC differences), a list of str for
    ``flow_model``. Their names and units come from :func:`harmonic_columns` and the registered flow
    models (:mod:`.flow_models`).
    """
    n = len(inner)
    radii = 0.5 * (np.asarray(inner) + np.asarray(outer))
    members = gather_rings(pixels, sky_jacobian, rings, inner, outer)
    harm = ring_harmonics(pixels, sky_jacobian, rings, inner, outer, pixels_per_beam, members)
    flows = fit_flows(pixels, sky_jacobian, rings, inner, outer, pixels_per_beam, test.flows, bar_range, members)
    strong = _strong_harmonics(harm, rings, test) & flows["both_halves"]
    models = flow_models()
    ring_flags = [set() for _ in range(n)]
    amplitude = np.zeros(n)
    for k in range(n):
        model = flow_model(flows["flow_model"][k])
        if flows["radial_or_bisymmetric"][k]:
            ring_flags[k].add("radial_or_bisymmetric")
            amplitude[k] = model.amplitude({key: flows[key][k] for key in model.table_columns()})[0]
        elif model.flag is not None:
            ring_flags[k].add(model.flag)
            amplitude[k] = model.amplitude({key: flows[key][k] for key in model.table_columns()})[0]
        if strong[k]:
            ring_flags[k].add("strong_harmonics")
            amplitude[k] = max(amplitude[k], harm["noncircular_in_plane"][k])
    columns = {name: _with_unit(harm[key], unit) for name, (key, unit) in harmonic_columns().items()}
    columns.update(_flow_columns(flows))
    if residual_by_ring is not None:
        columns["residual_rms"] = np.asarray(residual_by_ring, float) * KM_S

    flagged = [k for k in range(n) if ring_flags[k]]
    preferred_first = [m for m in reversed(models) if m.flag is not None]
    kinds = [m.name for m in preferred_first if any(flows["flow_model"][k] == m.name for k in flagged)]
    if not kinds and flagged:
        kinds = ["harmonic"]
    meanings = ", ".join(m.amplitude_meaning for m in preferred_first)
    summary = {
        "non_circular": {
            "detected": bool(flagged),
            "radii": [float(radii[k]) for k in flagged],
            "kind": kinds[0] if kinds else None,
            "kinds": kinds,
            "max_amplitude": float(amplitude[flagged].max()) if flagged else 0.0,
            "amplitude_meaning": f"in the disc plane, km/s: {meanings} or the harmonic amplitude",
            **{key: flows["disc"].get(key) for m in models for key in m.disc_keys},
            "disc_model_bic": flows["disc"].get("bic"),
            "disc_preferred_model": flows["disc"].get("preferred"),
            **{key: text for m in models for key, text in m.notes.items()},
            **_guards(flows, radii),
            "thresholds": {"min_delta_bic": test.flows.min_delta_bic, "min_half_share": test.flows.min_half_share,
                           "min_flow_amplitude": test.flows.min_amplitude,
                           "min_harmonic_amplitude": test.min_amplitude, "max_p_value": test.max_p_value},
        }
    }
    return columns, ring_flags, summary


def _guards(flows, radii) -> dict:
    """The summary entries of the flow test's guards (:mod:`.flows`): rings not tested for want of data on both
    halves, and rings a radial flow and a bisymmetric flow explain about equally (with the option that tells)."""
    fitted = np.isfinite(np.asarray(flows["noise_scale"], float))
    one_sided = fitted & ~flows["both_halves"]
    ambiguous = flows["radial_or_bisymmetric"] & flows["both_halves"]
    out = {"one_sided_radii": [float(r) for r in radii[one_sided]],
           "radial_or_bisymmetric_radii": [float(r) for r in radii[ambiguous]]}
    if ambiguous.any():
        out["radial_or_bisymmetric_note"] = (
            f"in {int(ambiguous.sum())} ring(s) a radial flow with the major axis turned explains the velocities as "
            "well as a bisymmetric (bar-like) flow (flag radial_or_bisymmetric; not called a bar): refit with "
            "v_radial free (--fit-radial, fit_radial=True) to tell them apart")
    return out


def harmonic_columns() -> dict:
    """Ring-table columns of the harmonic decomposition: column name -> (key of :func:`.ring_harmonics`, unit)."""
    out = {f"harmonic_{name}": (name, KM_S) for name in HARMONIC_NAMES}
    out.update({f"harmonic_{name}_err": (f"{name}_err", KM_S) for name in HARMONIC_NAMES})
    out.update({"noncircular_amplitude": ("noncircular_amplitude", KM_S),
                "noncircular_in_plane": ("noncircular_in_plane", KM_S),
                "noncircular_fraction": ("noncircular_fraction", None),
                "harmonic_p_value": ("harmonic_p_value", None)})
    return out


def flow_columns() -> dict:
    """Ring-table columns of the registered flow models, in table order: name -> unit (None: a pure
    number; str: text)."""
    models = flow_models()
    out = {"flow_model": str}
    out.update({f"v_t_{m.name}": KM_S for m in models})
    for m in models:
        out.update(m.table_columns())
    out.update({f"delta_bic_{m.name}": None for m in models[1:]})
    return out


def _flow_columns(flows) -> dict:
    return {name: ([str(v) for v in flows[name]] if unit is str else _with_unit(flows[name], unit))
            for name, unit in flow_columns().items()}


def _with_unit(values, unit):
    values = np.asarray(values, float)
    return values if unit is None else values * unit


def _strong_harmonics(harm, rings, test) -> np.ndarray:
    """Rings whose harmonic amplitude in the disc plane is significant (:class:`NonCircularTest`)."""
    sin_i = np.sin(np.radians(np.asarray(rings["inclination"], float)))
    variances = np.array([harm[f"{c}_err"] ** 2 for c in NON_CIRCULAR])
    measured = np.isfinite(variances).sum(axis=0)
    amp_err = np.sqrt(np.where(measured > 0, np.nansum(variances, axis=0) / np.maximum(measured, 1), np.nan)) / sin_i
    return ((harm["noncircular_in_plane"] > np.maximum(test.min_amplitude, 3 * amp_err))
            & (harm["harmonic_p_value"] < test.max_p_value))


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


def asymmetric_sides(approaching, receding) -> np.ndarray:
    """Per ring, whether the approaching and receding halves (two :class:`..pipeline.state.StageResult`) give
    rotation speeds that differ by more than ``ASYMMETRY_SIGMA`` times their combined error
    sqrt(err_app^2 + err_rec^2) and by more than ``ASYMMETRY_MIN_SPEED`` km/s (the two halves are fitted from
    disjoint pixels, so their errors add in quadrature). Rings where either half did not converge: False."""
    from ..fitting.parameters import Parameter

    def speeds(stage):
        ok = np.array([s.converged for s in stage.solutions], bool)
        return (np.where(ok, stage.params[:, Parameter.v_rotation], np.nan),
                np.where(ok, stage.errors[:, Parameter.v_rotation], np.nan))

    (v_app, e_app), (v_rec, e_rec) = speeds(approaching), speeds(receding)
    difference = np.abs(v_app - v_rec)
    with np.errstate(invalid="ignore"):
        return np.isfinite(difference) & (difference > np.maximum(ASYMMETRY_SIGMA * np.hypot(e_app, e_rec),
                                                                  ASYMMETRY_MIN_SPEED))
