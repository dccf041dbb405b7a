"""One stage of ring fits: every ring fitted from its candidate pixels, then flagged."""

from __future__ import annotations

import numpy as np

from ..fitting.candidates import SortedPixels
from ..fitting.engine import fit_rings
from ..fitting.parameters import GEOMETRY, Parameter
from .state import StageResult

__all__ = ["fit_stage", "fit_stage_rings", "ring_flags", "weighted_median"]


def weighted_median(values, errors):
    """Median with weights 1/err^2 (NaNs ignored); plain median when errors are missing."""
    values = np.asarray(values, float)
    errors = np.asarray(errors, float)
    ok = np.isfinite(values)
    if not ok.any():
        return np.nan
    w = np.where(np.isfinite(errors) & (errors > 0), 1.0 / np.maximum(errors, 1e-12) ** 2, np.nan)
    if not np.isfinite(w[ok]).all():
        return float(np.median(values[ok]))
    order = np.argsort(values[ok])
    v, ww = values[ok][order], w[ok][order]
    cum = np.cumsum(ww)
    return float(v[np.searchsorted(cum, 0.5 * cum[-1])])


def fit_stage_rings(vmap, pixels, layout, starts, free, ring_options, wander: float = 0.03) -> list:
    """Fit every ring from its candidate slice (:mod:`.candidates`), starting at ``wander``.

    ``pixels``: the (x, y, v, sigma) arrays or a :class:`.candidates.SortedPixels` made for
    these ``starts``. A ring whose pixels reach the edge of its slice is refitted from a slice three
    times wider, until none does (or the slice spans the whole disc), so narrow slices cost
    nothing in accuracy. Returns the :class:`.engine.RingSolution` of each ring.
    """
    if not isinstance(pixels, SortedPixels):
        pixels = SortedPixels(pixels, vmap.sky_jacobian, starts, layout.inner, layout.outer)
    x, y, v, sigma = pixels.pixels
    geometry_free = bool(np.asarray(free)[list(GEOMETRY)].any())
    wander = wander if geometry_free else 0.02
    todo = np.arange(len(layout))
    solutions = [None] * len(layout)
    while len(todo):
        fitted = fit_rings(x, y, v, sigma, pixels.bounds(wander)[todo], starts[todo], free, vmap.sky_jacobian,
                           layout.inner[todo], layout.outer[todo], ring_options, vmap.pixels_per_beam,
                           order_radius=pixels.radius, margin=pixels.margin)
        for k, sol in zip(todo, fitted):
            solutions[k] = sol
        wander *= 3.0
        todo = np.array([k for k, sol in zip(todo, fitted) if sol.truncated and wander < 3.0], int)
    return solutions


def ring_flags(solution, options, vmap, min_pixels: int, radius: float) -> set:
    """Flags one ring's fit earns on its own (too few pixels, poor coverage, failure, low inclination,
    inside the beam)."""
    out = set()
    if solution.n_pixels < min_pixels:
        out.add("few_pixels")
    if solution.coverage < options.min_coverage:
        out.add("poor_coverage")
    if not solution.converged or not np.all(np.isfinite(solution.params)):
        out.add("fit_failed")
    if solution.params[Parameter.inclination] < options.low_inclination:
        out.add("low_inclination")
    if vmap.beam is not None and radius < vmap.beam.fwhm:
        out.add("inside_beam")
    return out


def fit_stage(state, starts, free, ring_options=None, pixels=None) -> StageResult:
    """Fit the rings of ``state.layout`` from ``starts`` with the parameters ``free``; flag each ring.

    ``ring_options`` default to the fit's own; ``pixels`` to the valid pixels (or give a
    :class:`.candidates.SortedPixels` shared by stages that start from the same geometry).
    """
    inputs, layout = state.inputs, state.layout
    ring_options = ring_options or inputs.options.ring_options()
    solutions = fit_stage_rings(inputs.vmap, state.pixels if pixels is None else pixels, layout, starts, free,
                                ring_options)
    flags = [ring_flags(s, inputs.options, inputs.vmap, inputs.min_pixels, r) for s, r in zip(solutions, layout.radii)]
    return StageResult(solutions, flags, starts, np.asarray(free, bool))
