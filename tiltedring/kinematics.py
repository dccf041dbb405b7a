"""Velocity models of a tilted ring and the builder of full model fields.

Line of sight (Rogstad, Lockhart & Wright 1974; Begeman 1989)::

    v_los = v_systemic + sin(i) [ v_rotation cos(theta) + v_radial sin(theta) ]

with theta the disc-plane azimuth from the receding major axis (see :mod:`.geometry`).
Sign of ``v_radial``: positive means the half of the minor axis at position angle
phi + 90 recedes. Whether that is outflow or inflow depends on which side is nearer to us,
which a velocity map alone does not tell (use dust lanes or spiral-arm winding).

The kernel :func:`ring_model` also returns the analytic Jacobian of v_los with respect to the
seven ring parameters, in the order of :data:`PARAMETERS` (angles per degree).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .geometry import DEG, assign_to_rings, project

__all__ = ["PARAMETERS", "ring_model", "line_of_sight", "model_field"]

PARAMETERS = ("x_center", "y_center", "v_systemic", "position_angle", "inclination", "v_rotation", "v_radial")
UNITS = {"x_center": "pix", "y_center": "pix", "v_systemic": "km/s", "position_angle": "deg",
         "inclination": "deg", "v_rotation": "km/s", "v_radial": "km/s"}


@njit(cache=True)
def _ring_model(x, y, p, jac):
    """v_los and d v_los / d p for one ring's parameters ``p`` at pixels (x, y)."""
    xc, yc, vsys, pa, inc, vrot, vrad = p[0], p[1], p[2], p[3], p[4], p[5], p[6]
    n = x.shape[0]
    model = np.empty(n)
    deriv = np.zeros((n, 7))
    sp, cp = np.sin(pa * DEG), np.cos(pa * DEG)
    si, ci = np.sin(inc * DEG), np.cos(inc * DEG)
    ti = si / ci
    # d(x_m, y_m)/d(x_c) and /d(y_c): the centre moves the pixel's sky offset by -J[:, col]
    dxm_dxc = -(jac[0, 0] * sp + jac[1, 0] * cp)
    dym_dxc = -(jac[0, 0] * cp - jac[1, 0] * sp)
    dxm_dyc = -(jac[0, 1] * sp + jac[1, 1] * cp)
    dym_dyc = -(jac[0, 1] * cp - jac[1, 1] * sp)
    for k in range(n):
        xd, yd = project(x[k], y[k], xc, yc, jac, sp, cp, ci)
        r = np.sqrt(xd * xd + yd * yd)
        if r <= 0.0:
            model[k] = vsys
            deriv[k, 2] = 1.0
            continue
        c = xd / r
        s = yd / r
        circ = vrot * c + vrad * s
        model[k] = vsys + si * circ
        # partials of (cos, sin) theta with respect to the disc-plane coordinates
        dc_dxd, dc_dyd = s * s / r, -c * s / r
        ds_dxd, ds_dyd = -c * s / r, c * c / r
        dv_dc, dv_ds = si * vrot, si * vrad
        # centre
        dxd, dyd = dxm_dxc, dym_dxc / ci
        deriv[k, 0] = dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd)
        dxd, dyd = dxm_dyc, dym_dyc / ci
        deriv[k, 1] = dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd)
        deriv[k, 2] = 1.0
        # position angle: d x_m/d phi = y_m, d y_m/d phi = -x_m
        dxd, dyd = yd * ci, -xd / ci
        deriv[k, 3] = DEG * (dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd))
        # inclination: d y_d/d i = y_d tan i
        dyd = yd * ti
        deriv[k, 4] = DEG * (ci * circ + dv_dc * dc_dyd * dyd + dv_ds * ds_dyd * dyd)
        deriv[k, 5] = si * c
        deriv[k, 6] = si * s
    return model, deriv


def ring_model(x, y, params, sky_jacobian):
    """Line-of-sight velocity (km/s) and its Jacobian (n, 7) for one ring's parameters."""
    return _ring_model(np.ascontiguousarray(x, float), np.ascontiguousarray(y, float),
                       np.ascontiguousarray(params, float), np.ascontiguousarray(sky_jacobian, float))


@njit(cache=True)
def _line_of_sight(x, y, jac, xc, yc, vsys, pa, inc, vrot, vrad):
    n = x.shape[0]
    out = np.empty(n)
    for k in range(n):
        sp, cp = np.sin(pa[k] * DEG), np.cos(pa[k] * DEG)
        si, ci = np.sin(inc[k] * DEG), np.cos(inc[k] * DEG)
        xd, yd = project(x[k], y[k], xc[k], yc[k], jac, sp, cp, ci)
        r = np.sqrt(xd * xd + yd * yd)
        if r > 0.0:
            out[k] = vsys[k] + si * (vrot[k] * xd / r + vrad[k] * yd / r)
        else:
            out[k] = vsys[k]
    return out


def line_of_sight(x, y, sky_jacobian, **params):
    """v_los at pixels for per-pixel (or scalar) parameters named as in :data:`PARAMETERS`."""
    x = np.ascontiguousarray(x, float).ravel()
    y = np.ascontiguousarray(y, float).ravel()
    arrays = [np.ascontiguousarray(np.broadcast_to(np.asarray(params.get(name, 0.0), float), x.shape))
              for name in PARAMETERS]
    return _line_of_sight(x, y, np.ascontiguousarray(sky_jacobian, float), *arrays)


def model_field(shape, sky_jacobian, rings: dict, r_outer: float, mask=None):
    """Full-size model velocity map from a ring table.

    ``rings`` maps ``radius`` and every name in :data:`PARAMETERS` to per-ring arrays. Each
    pixel is placed on the ring whose projected ellipse passes through it
    (:func:`.geometry.assign_to_rings`, so radially varying geometry works), the parameters are
    interpolated linearly between ring centres, and v_los is evaluated there. Pixels outside
    ``r_outer`` (or outside ``mask``) are NaN.
    """
    ny, nx = shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    sel = np.ones(shape, bool) if mask is None else np.asarray(mask, bool)
    x, y = xx[sel].astype(float), yy[sel].astype(float)
    order = np.argsort(rings["radius"])
    table = {k: np.asarray(v, float)[order] for k, v in rings.items() if k in PARAMETERS or k == "radius"}
    table.setdefault("v_radial", np.zeros_like(table["radius"]))
    table["position_angle"] = np.degrees(np.unwrap(np.radians(table["position_angle"])))  # no jump at 0/360
    pos, _ = assign_to_rings(x, y, sky_jacobian, table["radius"], table["x_center"], table["y_center"],
                             table["position_angle"], table["inclination"], r_outer)
    inside = pos >= 0
    index = np.arange(len(table["radius"]), dtype=float)
    per_pixel = {name: np.interp(pos[inside], index, table[name]) for name in PARAMETERS}
    values = np.full(x.shape, np.nan)
    values[inside] = line_of_sight(x[inside], y[inside], sky_jacobian, **per_pixel)
    out = np.full(shape, np.nan)
    out[sel] = values
    return out
