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

from .geometry import DEG, place_pixel, project, ring_trig
from .threads import run_parts, thread_count

__all__ = ["PARAMETERS", "ring_model", "line_of_sight", "model_field"]

PARAMETERS = ("x_center", "y_center", "v_systemic", "position_angle", "inclination", "v_rotation", "v_radial")
UNITS = {"x_center": "pix", "y_center": "pix", "v_systemic": "km/s", "position_angle": "deg",
         "inclination": "deg", "v_rotation": "km/s", "v_radial": "km/s"}


@njit(cache=True, inline="always")
def ring_constants(p, jac):
    """Per-ring constants of :func:`pixel_velocity`: sines and cosines, and d(x_m, y_m)/d(centre)."""
    sp, cp = np.sin(p[3] * DEG), np.cos(p[3] * DEG)
    si, ci = np.sin(p[4] * DEG), np.cos(p[4] * DEG)
    # the centre moves the pixel's sky offset by -J[:, col]
    return (sp, cp, si, ci, -(jac[0, 0] * sp + jac[1, 0] * cp), -(jac[0, 0] * cp - jac[1, 0] * sp),
            -(jac[0, 1] * sp + jac[1, 1] * cp), -(jac[0, 1] * cp - jac[1, 1] * sp))


@njit(cache=True, inline="always")
def pixel_velocity(x, y, p, jac, const, deriv):
    """v_los at one pixel for ring parameters ``p``; writes d v_los / d p (angles per degree) to ``deriv``."""
    sp, cp, si, ci, dxm_dxc, dym_dxc, dxm_dyc, dym_dyc = const
    vrot, vrad = p[5], p[6]
    xd, yd = project(x, y, p[0], p[1], jac, sp, cp, ci)
    r = np.sqrt(xd * xd + yd * yd)
    if r <= 0.0:
        for j in range(7):
            deriv[j] = 0.0
        deriv[2] = 1.0
        return p[2]
    c = xd / r
    s = yd / r
    circ = vrot * c + vrad * s
    # partials of (cos, sin) theta with respect to the disc-plane coordinates
    dc_dxd, dc_dyd = s * s / r, -c * s / r
    ds_dxd, ds_dyd = -c * s / r, c * c / r
    dv_dc, dv_ds = si * vrot, si * vrad
    dxd, dyd = dxm_dxc, dym_dxc / ci
    deriv[0] = dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd)
    dxd, dyd = dxm_dyc, dym_dyc / ci
    deriv[1] = dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd)
    deriv[2] = 1.0
    # position angle: d x_m/d phi = y_m, d y_m/d phi = -x_m
    dxd, dyd = yd * ci, -xd / ci
    deriv[3] = DEG * (dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd))
    # inclination: d y_d/d i = y_d tan i
    dyd = yd * si / ci
    deriv[4] = DEG * (ci * circ + dv_dc * dc_dyd * dyd + dv_ds * ds_dyd * dyd)
    deriv[5] = si * c
    deriv[6] = si * s
    return p[2] + si * circ


@njit(cache=True)
def _ring_model(x, y, p, jac):
    """v_los and d v_los / d p for one ring's parameters ``p`` at pixels (x, y)."""
    n = x.shape[0]
    model = np.empty(n)
    deriv = np.zeros((n, 7))
    const = ring_constants(p, jac)
    for k in range(n):
        model[k] = pixel_velocity(x[k], y[k], p, jac, const, deriv[k])
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


@njit(cache=True, nogil=True)
def _model_pixels(flat, nx, jac, radii, xc, yc, vsys, pa, inc, vrot, vrad, r_outer, out, lo, hi):
    """v_los of pixels ``flat[lo:hi]`` (flat indices into rows of ``nx``; every pixel when ``flat`` is
    empty) on their rings (:func:`.geometry.place_pixel`), parameters interpolated between rings; NaN
    beyond ``r_outer``."""
    last = radii.shape[0] - 1
    sp, cp, ci = ring_trig(pa, inc)
    si = np.sin(inc * DEG)
    for k in range(lo, hi):
        at = flat[k] if flat.shape[0] else k  # no index list: every pixel of the map in order
        x, y = float(at % nx), float(at // nx)
        pos, _ = place_pixel(x, y, jac, radii, xc, yc, sp, cp, ci, r_outer)
        if pos < 0.0:
            out[k] = np.nan
            continue
        j = min(int(pos), last)
        i = min(j + 1, last)
        w = pos - j
        if pa[i] == pa[j] and inc[i] == inc[j]:  # the usual flat stretch: no new sines
            s_pa, c_pa, c_i, s_i = sp[j], cp[j], ci[j], si[j]
        else:
            angle, tilt = (pa[j] + w * (pa[i] - pa[j])) * DEG, (inc[j] + w * (inc[i] - inc[j])) * DEG
            s_pa, c_pa, c_i, s_i = np.sin(angle), np.cos(angle), np.cos(tilt), np.sin(tilt)
        xd, yd = project(x, y, xc[j] + w * (xc[i] - xc[j]), yc[j] + w * (yc[i] - yc[j]), jac, s_pa, c_pa, c_i)
        r = np.sqrt(xd * xd + yd * yd)
        out[k] = vsys[j] + w * (vsys[i] - vsys[j])
        if r > 0.0:
            out[k] += s_i * ((vrot[j] + w * (vrot[i] - vrot[j])) * xd + (vrad[j] + w * (vrad[i] - vrad[j])) * yd) / r


def model_field(shape, sky_jacobian, rings: dict, r_outer: float, mask=None):
    """Full-size model velocity map from a ring table.

    ``rings`` maps ``radius`` and every name in :data:`PARAMETERS` to per-ring arrays. Each
    pixel is placed on the ring whose projected ellipse passes through it
    (:func:`.geometry.assign_to_rings`, so radially varying geometry works), the parameters are
    interpolated linearly between ring centres, and v_los is evaluated there. Pixels outside
    ``r_outer`` (or outside ``mask``) are NaN. The pixels are shared among threads.
    """
    ny, nx = shape
    flat = np.zeros(0, np.int64) if mask is None else np.flatnonzero(np.asarray(mask, bool))
    count = ny * nx if mask is None else len(flat)
    order = np.argsort(rings["radius"])
    table = {k: np.ascontiguousarray(np.asarray(v, float)[order]) for k, v in rings.items()
             if k in PARAMETERS or k == "radius"}
    table.setdefault("v_radial", np.zeros_like(table["radius"]))
    table["position_angle"] = np.degrees(np.unwrap(np.radians(table["position_angle"])))  # no jump at 0/360
    values = np.empty(count)
    args = (flat, nx, np.ascontiguousarray(sky_jacobian, float), table["radius"],
            *(table[name] for name in PARAMETERS), float(r_outer), values)
    edges = np.linspace(0, count, thread_count() + 1).astype(int)
    run_parts(lambda part: _model_pixels(*args, *part), zip(edges[:-1], edges[1:]))
    if mask is None:
        return values.reshape(shape)
    out = np.full(shape, np.nan)
    out.flat[flat] = values
    return out
