"""How the fitted curve and constant geometry respond to a change of the map (first order).

The beam-smearing correction and the resampling errors both ask the same question many times:
"what would the fit give on this other map?" For maps close to the data, the ring fit answers it
to first order in the difference dm = m - d without refitting (Gauss-Newton at the data's
solution, pixel selections held). With J_r the Jacobian of v_los over ring r's selected pixels,
W_r their weights (|cos theta|^p / sigma^2) and H = J^T W J:

- stage ``centred`` (geometry free): dp_r = H_r^-1 J_r^T W_r dm_r; a constant position angle or
  inclination is the ring-weighted mean g = sum_r w_r p_r, so dg = sum_r w_r dp_r;
- stage ``final`` (speeds free at that geometry): the speeds are linear in the map for a given
  geometry, and move with the geometry as dv_r = H_vv^-1 (J_v^T W dm_r - H_vg dg) (implicit
  differentiation of the normal equations).

Each question then costs one pass of dot products over the ring pixels instead of two stages of
nonlinear fits. The stage-final speeds are exact for a fixed geometry; the geometry is exact to
first order (pixels entering or leaving a ring as the geometry moves are neglected).
"""

from __future__ import annotations

import numpy as np

from .candidates import SortedPixels, ring_members
from .geometry import centre_angle
from .kinematics import ring_model
from .parameters import SPEEDS, Parameter

__all__ = ["FitResponse"]


def _ring_designs(pixels, sky_jacobian, params, ok, inner, outer, options):
    """Yield, ring by ring, (ring, pixel indices, sqrt-weights, d v_los / d p) at ``params`` as the ring fit
    selects them (usable rings only; one ring's Jacobian in memory at a time)."""
    from .engine import fit_settings
    from .ring_solver import angular_weights

    ordered = SortedPixels(pixels, sky_jacobian, params, inner, outer)
    sigma = ordered.pixels[3]
    settings = fit_settings(options)
    rule = (settings.power, settings.sin_gap, settings.half)
    for k, (at, cos_t, _) in enumerate(ring_members(ordered, params)):
        if not ok[k]:
            continue
        w_sqrt = angular_weights(cos_t, sigma[at], *rule)
        keep = w_sqrt >= 0.0
        index = ordered.order[at[keep]]
        _, deriv = ring_model(pixels[0][index], pixels[1][index], params[k], sky_jacobian)
        yield k, index, w_sqrt[keep], deriv


def _influence(deriv, w_sqrt, columns):
    """H^-1 J^T W over ``columns``: rows give d(parameter) per unit change of each pixel's velocity."""
    a = deriv[:, columns] * w_sqrt[:, None]
    return np.linalg.pinv(a.T @ a) @ (a * w_sqrt[:, None]).T


class FitResponse:
    """First-order answer to "what would stages centred + final give on map m?" (module docstring).

    ``pixels``: (x, y, v, sigma) of the data; ``params_b``/``ok_b``: stage-centred solutions and
    which rings count; ``free_b``: its free parameters; ``weights``: per constant geometry name,
    ring weights (summing to 1) of the stage-centred values; ``params_c``/``ok_c``/``free_c``: the
    stage-final solutions, fitted at the ``adopted`` constant geometry (by name). ``reference_pa``:
    angles are averaged within 180 deg of it.
    """

    def __init__(self, vmap, pixels, layout, options, params_b, ok_b, free_b, weights, params_c, ok_c, free_c,
                 adopted, reference_pa):
        self.v = pixels[2]
        self.ix, self.iy = pixels[0].astype(int), pixels[1].astype(int)
        n_pix, n_rings = len(self.v), len(layout)
        jac = vmap.sky_jacobian
        self.names, self.weights = list(weights), weights
        self.base, self.geometry_influence = {}, {}
        if self.names:
            free_idx = list(np.flatnonzero(free_b))
            for name in self.names:
                values = params_b[:, Parameter[name]]
                if name == "position_angle":
                    values = centre_angle(values, reference_pa)
                self.base[name] = float(np.nansum(weights[name] * np.where(weights[name] > 0, values, 0.0)))
                self.geometry_influence[name] = np.zeros(n_pix)
            for r, index, w_sqrt, deriv in _ring_designs(pixels, jac, params_b, ok_b, layout.inner, layout.outer,
                                                         options):
                rows = _influence(deriv, w_sqrt, free_idx)
                for name in self.names:
                    self.geometry_influence[name][index] += weights[name][r] * rows[free_idx.index(Parameter[name])]
        # stage final: speeds at the adopted geometry, and their coupling to it
        self.adopted = {name: float(adopted[name]) for name in self.names}
        self.speed = np.where(ok_c, params_c[:, Parameter.v_rotation], np.nan)
        speeds = [k for k in np.flatnonzero(free_c) if k in SPEEDS]
        row = speeds.index(Parameter.v_rotation)
        geometry = [Parameter[name] for name in self.names]
        index_parts, coef_parts, ring_parts = [], [], []
        self.coupling = np.zeros((n_rings, len(geometry)))
        for r, index, w_sqrt, deriv in _ring_designs(pixels, jac, params_c, ok_c, layout.inner, layout.outer, options):
            rows = _influence(deriv, w_sqrt, speeds)  # H_vv^-1 J_v^T W
            index_parts.append(index)
            coef_parts.append(rows[row])
            ring_parts.append(np.full(len(index), r))
            if geometry:
                self.coupling[r] = (rows @ deriv[:, geometry])[row]  # H_vv^-1 H_vg
        self.index = np.concatenate(index_parts) if index_parts else np.zeros(0, int)
        self.coef = np.concatenate(coef_parts) if coef_parts else np.zeros(0)
        self.ring = np.concatenate(ring_parts) if ring_parts else np.zeros(0, int)
        self.n_rings = n_rings

    def observed(self) -> dict:
        """What the fit gave on the data (the adopted geometry and the stage-final speeds)."""
        out = {"v_rotation": self.speed.copy()}
        out.update(self.adopted)
        return out

    def speeds_at_adopted_geometry(self, model_map) -> np.ndarray:
        """Stage-final speeds on ``model_map`` with the orientation held at the adopted values: exact (the speeds
        are linear in the map at a fixed geometry), v_r = v_r(data) + H_vv^-1 J_v^T W (m - d) over ring r's
        pixels. Pixels where the map is blank count as unchanged."""
        change = np.nan_to_num(model_map[self.iy, self.ix] - self.v)
        return self.speed + np.bincount(self.ring, weights=self.coef * change[self.index], minlength=self.n_rings)

    def measure(self, model_map) -> dict:
        """First-order stage-centred constant geometry and stage-final speeds on ``model_map``.

        Pixels where the map is blank count as unchanged.
        """
        change = np.nan_to_num(model_map[self.iy, self.ix] - self.v)
        out, shift = {}, []
        for name in self.names:
            value = self.base[name] + float(self.geometry_influence[name] @ change)
            out[name] = centre_angle(value, self.adopted[name]) if name == "position_angle" else value
            shift.append(out[name] - self.adopted[name])
        speed_change = np.bincount(self.ring, weights=self.coef * change[self.index], minlength=self.n_rings)
        if shift:
            speed_change -= self.coupling @ np.array(shift)
        out["v_rotation"] = self.speed + speed_change
        return out
