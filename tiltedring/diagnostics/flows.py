"""Every registered flow model fitted per ring at the fixed final geometry, and the choice between them.

The models (circular, radial, bisymmetric, and any registered later) are described in
:mod:`.flow_models`; each is linear in its speeds once its own non-linear parameters (the
bisymmetric bar angle) are set.

Selection by BIC with the pixel-correlation correction: with n pixels, p pixels per beam and
s^2 the reduced chi-square of the richest model (most parameters; the noise scale when no error
map is given), BIC = chi^2 / (s^2 p) + k ln(n / p). A model is chosen only when it lowers the BIC
below that of every simpler model (registered before it) by more than ``min_delta_bic`` (10:
"very strong" on the Kass & Raftery 1995 scale) and its non-circular amplitude in the disc plane
exceeds both ``min_amplitude`` km/s and three times its error; when several pass, the one
registered last wins. Disc-wide, BIC = sum of the rings' chi^2 / (s^2 p) + k N ln(sum n / p)
over the N fitted rings.

Two guards keep the choice honest:

- **both halves**: a non-circular model is chosen only in a ring with data on both sides of its
  minor axis and both sides of its major axis (each at least ``min_half_share`` of the ring's
  pixels); elsewhere a one-sided ring's departures cannot be told from a wrong geometry, and the
  ring stays ``circular`` (``both_halves`` False).
- **radial or bisymmetric**: a uniform radial flow is nearly degenerate with a turned major axis
  (the ring fit absorbs most of it into the position angle), and what is left at the fitted
  geometry looks like a bisymmetric flow with its bar angle near 45 deg (where the bar's sky
  signature has sine terms only, exactly those of a radial flow and a turned axis). So a richer
  model than ``radial`` is kept only when it also beats "radial flow with the position angle shifted" (columns
  1, sin i cos theta, sin i sin theta and the derivative of the circular model with respect to the
  position angle, v_t sin i sin theta (cos i sin^2 theta + cos^2 theta / cos i) per radian; 4
  parameters) by ``min_delta_bic``, summed over the rings that chose it (a uniform flow is a disc-wide
  pattern, so the evidence is pooled). Otherwise those rings are called ``radial`` and marked
  ``radial_or_bisymmetric`` (the ring flag of that name, not ``radial_flow``, so they do not by
  themselves start the automatic refit with v_radial free, which on NGC 6946's peak-velocity map
  adopted a 36 km/s "flow" and turned the position angle by 12 deg): the two explain it about
  equally, and the fit with v_radial free (``fit_radial``, ``--fit-radial``) tells them apart.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..fitting.candidates import gather_rings
from .flow_models import RingVelocities, flow_models

__all__ = ["FlowTest", "FlowFit", "fit_flows"]


@dataclass(frozen=True)
class FlowTest:
    """Thresholds of the flow-model selection (calibrated on flat circular discs; see the README)."""

    min_delta_bic: float = 10.0
    min_amplitude: float = 5.0
    min_half_share: float = 0.2


@dataclass
class FlowFit:
    """What the models' disc-wide steps (:meth:`.flow_models.FlowModel.finish`) see: the fitted rings by
    index, the per-ring output arrays, ring radii (arcsec), pixels per beam and the caller's options."""

    rings: dict
    out: dict
    radii: np.ndarray
    pixels_per_beam: float
    options: dict = field(default_factory=dict)


def _empty_outputs(models, n_rings) -> dict:
    out = {"flow_model": np.array([models[0].name] * n_rings, dtype=object)}
    keys = [f"v_t_{m.name}" for m in models]
    for m in models:
        keys += [*m.table_columns(), *m.extras]
    keys += [f"delta_bic_{m.name}" for m in models[1:]] + ["noise_scale"]
    for key in keys:
        out[key] = np.full(n_rings, np.nan)
    out["both_halves"] = np.zeros(n_rings, bool)
    out["radial_or_bisymmetric"] = np.zeros(n_rings, bool)
    out["delta_bic_turned_radial"] = np.full(n_rings, np.nan)
    return out


def both_halves(cos_t, sin_t, min_share: float) -> bool:
    """Whether a ring has at least ``min_share`` of its pixels on each side of its minor axis (cos theta
    > 0 and < 0) and of its major axis (sin theta > 0 and < 0)."""
    n = len(cos_t)
    if n == 0:
        return False
    shares = [np.count_nonzero(cos_t > 0), np.count_nonzero(cos_t < 0), np.count_nonzero(sin_t > 0),
              np.count_nonzero(sin_t < 0)]
    return min(shares) >= min_share * n


def turned_radial_bic(ring: RingVelocities, v_t: float, s2: float, pixels_per_beam: float, n_eff: float) -> float:
    """BIC of "radial flow with the position angle shifted" (module docstring), 4 parameters."""
    from ..fitting.leastsq import weighted_least_squares

    cos_i = np.sqrt(max(1.0 - ring.sin_i**2, 1e-6))
    turn = v_t * ring.sin_i * ring.sin_t * (cos_i * ring.sin_t**2 + ring.cos_t**2 / cos_i)
    design = np.column_stack([*ring.rotation_columns(), ring.sin_i * ring.sin_t, turn])
    _, _, chi2 = weighted_least_squares(design, ring.v, ring.weight)
    return chi2 / (s2 * pixels_per_beam) + 4 * np.log(n_eff)


def fit_flows(pixels, sky_jacobian, rings: dict, inner, outer, pixels_per_beam: float = 1.0,
              test: FlowTest = FlowTest(), bar_range=None, ring_pixels: list | None = None) -> dict:
    """Fit every registered model to every ring and choose one per ring (module docstring).

    ``bar_range``: optional (r_min, r_max) arcsec over which one common bar angle is fitted; by
    default the range of the rings that chose ``bisymmetric`` on their own. Returns per-ring arrays
    (``flow_model``; ``v_t_<model>``, each model's own columns such as ``v_radial_flow``, ``v_2t``,
    ``v_2r`` and their errors, and extras such as ``bar_angle_ring``; ``delta_bic_<model>`` for each
    model after the circular one; ``noise_scale``) and ``disc`` (the number of rings fitted, the
    models' disc-wide results such as the common bar angle, the disc-wide BIC per model and the
    preferred model). ``ring_pixels``: the rings' pixels from :func:`.candidates.gather_rings`, when
    already at hand.
    """
    if ring_pixels is None:
        ring_pixels = gather_rings(pixels, sky_jacobian, rings, inner, outer)
    models = flow_models()
    richest = max(models, key=lambda m: m.n_parameters)
    n_rings = len(inner)
    sin_i = np.sin(np.radians(np.asarray(rings["inclination"], float)))
    out = _empty_outputs(models, n_rings)
    disc_chi = {m.name: 0.0 for m in models}
    disc_n = 0.0
    fitted = {}
    for k in range(n_rings):
        cos_t, sin_t, v, sigma = ring_pixels[k]
        n = len(v)
        if n < 4 * richest.n_parameters:
            continue
        ring = fitted[k] = RingVelocities(cos_t, sin_t, v, 1.0 / sigma, sin_i[k])
        for m in models:
            ring.states[m.name] = m.prepare(ring)
        fits = {m.name: m.fit(ring, ring.states[m.name]) for m in models}
        s2 = max(fits[richest.name][2] / (n - richest.n_parameters), 1e-12)
        n_eff = max(n / pixels_per_beam, richest.n_parameters + 1.0)
        out["noise_scale"][k] = np.sqrt(s2)
        bic = {}
        for m in models:
            coef, cov, chi2 = fits[m.name]
            bic[m.name] = chi2 / (s2 * pixels_per_beam) + m.n_parameters * np.log(n_eff)
            disc_chi[m.name] += chi2 / (s2 * pixels_per_beam)
            err = np.sqrt(np.clip(np.diag(cov) * s2 * pixels_per_beam, 0, None))
            out[f"v_t_{m.name}"][k] = coef[1]
            for key, value in {**m.ring_values(coef, err, ring.states[m.name]),
                               **m.ring_extras(ring.states[m.name])}.items():
                out[key][k] = value
        disc_n += n_eff
        out["both_halves"][k] = both_halves(cos_t, sin_t, test.min_half_share)
        chosen = _choose(models, bic, out, k, test)
        if chosen not in ("circular", "radial") and "radial" in bic:
            turned = turned_radial_bic(ring, out["v_t_circular"][k], s2, pixels_per_beam, n_eff)
            out["delta_bic_turned_radial"][k] = turned - bic[chosen]
        out["flow_model"][k] = chosen if out["both_halves"][k] else models[0].name
    _radial_or_richer(out, test)
    fit = FlowFit(fitted, out, 0.5 * (np.asarray(inner) + np.asarray(outer)), pixels_per_beam,
                  {"bar_range": bar_range})
    disc = {"n_rings_fitted": len(fitted)}
    for m in models:
        disc.update(m.finish(fit))
    if fitted:
        n_r = len(fitted)
        bic_disc = {m.name: disc_chi[m.name] + m.n_parameters * n_r * np.log(disc_n) for m in models}
        disc["bic"] = {m: float(b) for m, b in bic_disc.items()}
        disc["preferred"] = min(bic_disc, key=bic_disc.get)
    out["disc"] = disc
    return out


def _radial_or_richer(out, test) -> None:
    """Rings that chose a model richer than ``radial`` are called ``radial`` and marked ``radial_or_bisymmetric``
    when, summed over them, "radial flow with the position angle shifted" is not worse than their models by
    more than ``min_delta_bic`` (module docstring): a uniform flow is a disc-wide pattern, so the evidence is
    pooled over the rings."""
    richer = np.isfinite(out["delta_bic_turned_radial"]) & (out["flow_model"] != "circular") & \
        (out["flow_model"] != "radial")
    if richer.any() and np.sum(out["delta_bic_turned_radial"][richer]) <= test.min_delta_bic:
        out["flow_model"][richer] = "radial"
        out["radial_or_bisymmetric"][richer] = True


def _choose(models, bic, out, k, test) -> str:
    """The ring's model: the last one whose BIC beats every simpler model's by ``min_delta_bic`` and whose
    amplitude is significant (module docstring); records ``delta_bic_<model>``."""
    chosen = models[0].name
    for j, m in enumerate(models[1:], start=1):
        delta = min(bic[s.name] for s in models[:j]) - bic[m.name]
        out[f"delta_bic_{m.name}"][k] = delta
        amplitude, error = m.amplitude({key: out[key][k] for key in m.table_columns()})
        if delta > test.min_delta_bic and amplitude > max(test.min_amplitude, 3 * error):
            chosen = m.name
    return chosen
