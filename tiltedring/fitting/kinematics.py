"""Velocity models of a tilted ring and the builder of full model fields.

Line of sight (Rogstad, Lockhart & Wright 1974; Begeman 1989)::

    v_los = v_systemic + sin(i) [ v_rotation cos(theta) + v_radial sin(theta) ]

with theta the disc-plane azimuth from the receding major axis (see :mod:`.geometry`).
Sign of ``v_radial``: positive means the half of the minor axis at position angle
phi + 90 recedes. Whether that is outflow or inflow depends on which side is nearer to us,
which a velocity map alone does not tell (use dust lanes or spiral-arm winding).

The kernel :func:`ring_model` also returns the analytic Jacobian of v_los with respect to the
seven ring parameters, in the order of :class:`.parameters.Parameter` (angles per degree).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numba import njit

from .geometry import DEG, place_pixel, project, ring_planes
from .parameters import COUNT, PARAMETERS, UNITS, ParameterColumns
from .parameters import Parameter as P
from .threads import run_parts, thread_count

__all__ = ["PARAMETERS", "UNITS", "ring_model", "line_of_sight", "model_field"]


@njit(cache=True, inline="always")
def ring_constants(p, jac):
    """Per-ring constants of :func:`pixel_velocity`: sines and cosines, and d(x_m, y_m)/d(centre)."""
    sp, cp = np.sin(p[P.position_angle] * DEG), np.cos(p[P.position_angle] * DEG)
    si, ci = np.sin(p[P.inclination] * DEG), np.cos(p[P.inclination] * DEG)
    # the centre moves the pixel's sky offset by -J[:, col]
    return (sp, cp, si, ci, -(jac[0, 0] * sp + jac[1, 0] * cp), -(jac[0, 0] * cp - jac[1, 0] * sp),
            -(jac[0, 1] * sp + jac[1, 1] * cp), -(jac[0, 1] * cp - jac[1, 1] * sp))


@njit(cache=True, inline="always")
def pixel_velocity(x, y, p, jac, const, deriv):
    """v_los at one pixel for ring parameters ``p``; writes d v_los / d p (angles per degree) to ``deriv``."""
    sp, cp, si, ci, dxm_dxc, dym_dxc, dxm_dyc, dym_dyc = const
    vrot, vrad = p[P.v_rotation], p[P.v_radial]
    xd, yd = project(x, y, p[P.x_center], p[P.y_center], jac, sp, cp, ci)
    r = np.sqrt(xd * xd + yd * yd)
    if r <= 0.0:
        for j in range(COUNT):
            deriv[j] = 0.0
        deriv[P.v_systemic] = 1.0
        return p[P.v_systemic]
    c = xd / r
    s = yd / r
    circ = vrot * c + vrad * s
    # partials of (cos, sin) theta with respect to the disc-plane coordinates
    dc_dxd, dc_dyd = s * s / r, -c * s / r
    ds_dxd, ds_dyd = -c * s / r, c * c / r
    dv_dc, dv_ds = si * vrot, si * vrad
    dxd, dyd = dxm_dxc, dym_dxc / ci
    deriv[P.x_center] = dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd)
    dxd, dyd = dxm_dyc, dym_dyc / ci
    deriv[P.y_center] = dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd)
    deriv[P.v_systemic] = 1.0
    # position angle: d x_m/d phi = y_m, d y_m/d phi = -x_m
    dxd, dyd = yd * ci, -xd / ci
    deriv[P.position_angle] = DEG * (dv_dc * (dc_dxd * dxd + dc_dyd * dyd) + dv_ds * (ds_dxd * dxd + ds_dyd * dyd))
    # inclination: d y_d/d i = y_d tan i
    dyd = yd * si / ci
    deriv[P.inclination] = DEG * (ci * circ + dv_dc * dc_dyd * dyd + dv_ds * ds_dyd * dyd)
    deriv[P.v_rotation] = si * c
    deriv[P.v_radial] = si * s
    return p[P.v_systemic] + si * circ


@njit(cache=True)
def _ring_model(x, y, p, jac):
    """v_los and d v_los / d p for one ring's parameters ``p`` at pixels (x, y)."""
    n = x.shape[0]
    model = np.empty(n)
    deriv = np.zeros((n, COUNT))
    const = ring_constants(p, jac)
    for k in range(n):
        model[k] = pixel_velocity(x[k], y[k], p, jac, const, deriv[k])
    return model, deriv


def ring_model(x, y, params, sky_jacobian):
    """Line-of-sight velocity (km/s) and its Jacobian (n, 7; columns in :class:`.parameters.Parameter` order)
    for one ring's parameters."""
    return _ring_model(np.ascontiguousarray(x, float), np.ascontiguousarray(y, float),
                       np.ascontiguousarray(params, float), np.ascontiguousarray(sky_jacobian, float))


@njit(cache=True)
def _line_of_sight(x, y, jac, pixel_params):
    """v_los at each pixel for its own parameters (a :class:`.parameters.ParameterColumns` of per-pixel arrays)."""
    q = pixel_params
    n = x.shape[0]
    out = np.empty(n)
    for k in range(n):
        sp, cp = np.sin(q.position_angle[k] * DEG), np.cos(q.position_angle[k] * DEG)
        si, ci = np.sin(q.inclination[k] * DEG), np.cos(q.inclination[k] * DEG)
        xd, yd = project(x[k], y[k], q.x_center[k], q.y_center[k], jac, sp, cp, ci)
        r = np.sqrt(xd * xd + yd * yd)
        if r > 0.0:
            out[k] = q.v_systemic[k] + si * (q.v_rotation[k] * xd / r + q.v_radial[k] * yd / r)
        else:
            out[k] = q.v_systemic[k]
    return out


def line_of_sight(x, y, sky_jacobian, **params):
    """v_los at pixels for per-pixel (or scalar) parameters named as in :data:`PARAMETERS`."""
    x = np.ascontiguousarray(x, float).ravel()
    y = np.ascontiguousarray(y, float).ravel()
    columns = ParameterColumns(*(np.ascontiguousarray(np.broadcast_to(np.asarray(params.get(name, 0.0), float),
                                                                      x.shape)) for name in PARAMETERS))
    return _line_of_sight(x, y, np.ascontiguousarray(sky_jacobian, float), columns)


class ModelGrid(NamedTuple):
    """Which pixels of a map :func:`_model_pixels` evaluates, and how the map sits on the sky.

    ``flat``: flat indices into rows of ``nx`` pixels (empty: every pixel in order); ``jac``: the sky
    Jacobian; ``r_outer``: the disc radius (arcsec) beyond which pixels stay blank.
    """

    flat: np.ndarray
    nx: int
    jac: np.ndarray
    r_outer: float


@njit(cache=True, nogil=True)
def _model_pixels(grid, planes, rings, out, lo, hi):
    """v_los of pixels ``lo:hi`` of ``grid`` on their rings (:func:`.geometry.place_pixel` with ``planes``),
    the ring parameters ``rings`` (:class:`.parameters.ParameterColumns`) interpolated between rings; NaN
    beyond ``grid.r_outer``."""
    flat, nx, jac = grid.flat, grid.nx, grid.jac
    xc, yc, vsys, pa, inc = rings.x_center, rings.y_center, rings.v_systemic, rings.position_angle, rings.inclination
    vrot, vrad = rings.v_rotation, rings.v_radial
    sp, cp, ci = planes.sin_pa, planes.cos_pa, planes.cos_inc
    last = planes.radius.shape[0] - 1
    si = np.empty(last + 1)
    for j in range(last + 1):  # element by element: array sines compile slowly
        si[j] = np.sin(inc[j] * DEG)
    for k in range(lo, hi):
        at = flat[k] if flat.shape[0] else k  # no index list: every pixel of the map in order
        x, y = float(at % nx), float(at // nx)
        pos, _ = place_pixel(x, y, jac, planes, grid.r_outer)
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
    columns = ParameterColumns(*(table[name] for name in PARAMETERS))
    planes = ring_planes(table["radius"], columns.x_center, columns.y_center, columns.position_angle,
                         columns.inclination)
    grid = ModelGrid(flat, nx, np.ascontiguousarray(sky_jacobian, float), float(r_outer))
    values = np.empty(count)
    edges = np.linspace(0, count, thread_count() + 1).astype(int)
    run_parts(lambda part: _model_pixels(grid, planes, columns, values, *part), zip(edges[:-1], edges[1:]))
    if mask is None:
        return values.reshape(shape)
    out = np.full(shape, np.nan)
    out.flat[flat] = values
    return out
