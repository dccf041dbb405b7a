"""The disc's centre and systemic velocity from one fit to every pixel, the rotation curve held."""

from __future__ import annotations

import numpy as np

from ..fitting.geometry import disc_coordinates
from ..fitting.parameters import CENTRE_AND_SYSTEMIC

__all__ = ["refine_centre"]


def refine_centre(vmap, pixels, rings: dict, r_outer: float, start: dict, fixed=()):
    """Centre and systemic velocity from one fit to all pixels at once, the rotation curve held.

    ``rings``: per-ring ``radius`` and ``v_rotation`` and one ``position_angle`` and ``inclination``
    for the whole disc. Minimises sum |cos theta| (v - v_sys - sin i v_rot(R) cos theta)^2 / sigma^2
    over (x_center, y_center, v_systemic), v_rot(R) interpolated between the rings (held at the end
    values beyond them, nothing beyond ``r_outer``), so every ring constrains the centre coherently
    instead of each ring alone. Large maps are thinned to about 40,000 pixels (every k-th). Returns
    (values, errors) dicts; errors scaled by sqrt(reduced chi-square x pixels per beam x k).
    """
    from scipy.optimize import least_squares

    x, y, v, sigma = pixels
    stride = max(1, len(x) // 40_000)  # three parameters: 40,000 pixels are plenty (regular, so repeatable)
    x, y, v, sigma = x[::stride], y[::stride], v[::stride], sigma[::stride]
    names = [p.name for p in CENTRE_AND_SYSTEMIC if p.name not in fixed]
    if not names:
        return dict(start), {}
    order = np.argsort(rings["radius"])
    radii, v_rot = np.asarray(rings["radius"], float)[order], np.asarray(rings["v_rotation"], float)[order]
    pa, inc = float(rings["position_angle"]), float(rings["inclination"])

    def residual(q):
        cen = dict(start)
        cen.update(zip(names, q))
        radius, cos_t, _ = disc_coordinates(x, y, cen["x_center"], cen["y_center"], vmap.sky_jacobian, pa, inc)
        model = cen["v_systemic"] + np.sin(np.radians(inc)) * np.interp(radius, radii, v_rot) * cos_t
        return np.where(radius <= r_outer, np.sqrt(np.abs(cos_t)) * (v - model) / sigma, 0.0)

    q0 = np.array([start[n] for n in names])
    sol = least_squares(residual, q0, x_scale=np.array([0.5 if n != "v_systemic" else 2.0 for n in names]),
                        diff_step=1e-4, max_nfev=60)
    values = dict(start)
    values.update(zip(names, sol.x))
    dof = max(np.count_nonzero(sol.fun) - len(names), 1)
    try:
        cov = np.linalg.inv(sol.jac.T @ sol.jac) * (2 * sol.cost / dof) * vmap.pixels_per_beam * stride
        errors = dict(zip(names, np.sqrt(np.clip(np.diag(cov), 0, None))))
    except np.linalg.LinAlgError:
        errors = {n: np.nan for n in names}
    return values, errors
