"""Sky <-> disc-plane projection and pixel-to-ring assignment (numba kernels).

Geometry of a thin tilted disc (Warner, Wright & Baldwin 1973; Rogstad, Lockhart & Wright 1974).
A pixel at (x, y) has sky offsets (east, north) = J (x - x_c, y - y_c) in arcsec from the centre.
With phi the position angle of the receding major axis (north through east) and i the
inclination (0 face-on)::

    x_m = east sin(phi) + north cos(phi)         along the receding major axis
    y_m = east cos(phi) - north sin(phi)         along the axis at position angle phi + 90
    x_d = x_m,   y_d = y_m / cos(i)              in the disc plane
    R = sqrt(x_d^2 + y_d^2),  cos(theta) = x_d / R,  sin(theta) = y_d / R

theta is the azimuth in the disc plane from the receding major axis, increasing toward the
half of the minor axis at position angle phi + 90. Angles are degrees at every interface and
radians only inside the kernels.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numba import njit

__all__ = ["centre_angle", "disc_coordinates", "sky_from_disc", "assign_to_rings", "wrap_angle", "RingPlanes",
           "ring_planes"]

DEG = np.pi / 180.0


def wrap_angle(angle):
    """Position angle wrapped into [0, 360) deg (a tiny negative angle gives 0, not 360)."""
    wrapped = np.mod(angle, 360.0)
    return np.where(wrapped >= 360.0, 0.0, wrapped) if np.ndim(wrapped) else (0.0 if wrapped >= 360.0 else wrapped)


def centre_angle(values, reference):
    """Angles (deg) re-expressed within 180 deg of ``reference`` so they can be averaged."""
    return reference + np.mod(np.asarray(values, float) - reference + 180.0, 360.0) - 180.0


@njit(cache=True, inline="always")
def project(x, y, xc, yc, jac, sp, cp, ci):
    """Disc-plane (x_d, y_d) of one pixel, given sin/cos of the position angle and cos(i)."""
    dx = x - xc
    dy = y - yc
    east = jac[0, 0] * dx + jac[0, 1] * dy
    north = jac[1, 0] * dx + jac[1, 1] * dy
    return east * sp + north * cp, (east * cp - north * sp) / ci


@njit(cache=True)
def _disc_coordinates(x, y, xc, yc, jac, pa, inc):
    n = x.shape[0]
    radius = np.empty(n)
    cos_t = np.empty(n)
    sin_t = np.empty(n)
    sp, cp = np.sin(pa * DEG), np.cos(pa * DEG)
    ci = np.cos(inc * DEG)
    for k in range(n):
        xd, yd = project(x[k], y[k], xc, yc, jac, sp, cp, ci)
        r = np.sqrt(xd * xd + yd * yd)
        radius[k] = r
        if r > 0.0:
            cos_t[k] = xd / r
            sin_t[k] = yd / r
        else:
            cos_t[k] = 1.0
            sin_t[k] = 0.0
    return radius, cos_t, sin_t


def disc_coordinates(x, y, x_center, y_center, sky_jacobian, position_angle, inclination):
    """Disc-plane radius (arcsec) and (cos theta, sin theta) of pixel positions ``x, y``."""
    x = np.ascontiguousarray(x, dtype=float).ravel()
    y = np.ascontiguousarray(y, dtype=float).ravel()
    return _disc_coordinates(x, y, float(x_center), float(y_center), np.ascontiguousarray(sky_jacobian, float),
                             float(position_angle), float(inclination))


def sky_from_disc(radius, azimuth, x_center, y_center, sky_jacobian, position_angle, inclination):
    """Pixel (x, y) of disc-plane points at ``radius`` (arcsec) and ``azimuth`` (deg from the receding axis)."""
    th = np.radians(azimuth)
    xm = radius * np.cos(th)
    ym = radius * np.sin(th) * np.cos(np.radians(inclination))
    sp, cp = np.sin(np.radians(position_angle)), np.cos(np.radians(position_angle))
    east = xm * sp + ym * cp
    north = xm * cp - ym * sp
    dx, dy = np.linalg.solve(np.asarray(sky_jacobian, float), np.vstack([np.ravel(east), np.ravel(north)]))
    shape = np.shape(east)
    return x_center + dx.reshape(shape), y_center + dy.reshape(shape)


class RingPlanes(NamedTuple):
    """Per-ring radius (arcsec), centre (pixels) and orientation as the pixel placement uses them."""

    radius: np.ndarray
    x_center: np.ndarray
    y_center: np.ndarray
    sin_pa: np.ndarray
    cos_pa: np.ndarray
    cos_inc: np.ndarray


@njit(cache=True)
def ring_trig(pa, inc):
    """Per-ring sin and cos of the position angle and cos of the inclination (degrees in)."""
    return np.sin(pa * DEG), np.cos(pa * DEG), np.cos(inc * DEG)


@njit(cache=True)
def ring_planes(radius, x_center, y_center, position_angle, inclination):
    """:class:`RingPlanes` of rings given by radius, centre and angles (deg)."""
    n = radius.shape[0]
    sp, cp, ci = np.empty(n), np.empty(n), np.empty(n)
    for j in range(n):  # a loop of the scalar kernel the ring fit compiles anyway (array sines compile slowly)
        sp[j], cp[j], ci[j] = ring_trig(position_angle[j], inclination[j])
    return RingPlanes(radius, x_center, y_center, sp, cp, ci)


@njit(cache=True, inline="always")
def _offset(x, y, jac, planes, j, radius):
    """Disc radius of a pixel under ring ``j``'s geometry, minus ``radius``."""
    xd, yd = project(x, y, planes.x_center[j], planes.y_center[j], jac, planes.sin_pa[j], planes.cos_pa[j],
                     planes.cos_inc[j])
    return np.sqrt(xd * xd + yd * yd) - radius


@njit(cache=True)
def _search_sorted(a, value):
    """First position in the ascending ``a`` whose element is not below ``value`` (NaN ranks last), by
    bisection: ``np.searchsorted(a, value)``, written out because numba's version is slow to compile."""
    lo, hi = 0, a.shape[0]
    while lo < hi:
        mid = lo + ((hi - lo) >> 1)
        if a[mid] < value or (value != value and a[mid] == a[mid]):
            lo = mid + 1
        else:
            hi = mid
    return lo


@njit(cache=True, inline="always")
def place_pixel(x, y, jac, planes, r_outer):
    """(fractional ring index, disc radius) of one pixel; (-1, NaN) beyond ``r_outer`` (see :func:`assign_to_rings`)."""
    radii = planes.radius
    m = radii.shape[0]
    # start from the ring the middle ring's geometry suggests, then walk to the sign change of f
    start = _offset(x, y, jac, planes, m // 2, 0.0)
    j = min(max(_search_sorted(radii, start), 0), m - 1)
    fj = _offset(x, y, jac, planes, j, radii[j])
    if fj >= 0.0:
        while j + 1 < m:
            f_next = _offset(x, y, jac, planes, j + 1, radii[j + 1])
            if f_next < 0.0:
                w = fj / (fj - f_next)
                return j + w, radii[j] + w * (radii[j + 1] - radii[j])
            j += 1
            fj = f_next
        if fj + radii[m - 1] <= r_outer:
            return m - 1.0, fj + radii[m - 1]
        return -1.0, np.nan
    while j > 0:
        f_prev = _offset(x, y, jac, planes, j - 1, radii[j - 1])
        if f_prev >= 0.0:
            w = f_prev / (f_prev - fj)
            return j - 1 + w, radii[j - 1] + w * (radii[j] - radii[j - 1])
        j -= 1
        fj = f_prev
    return 0.0, fj + radii[0]


@njit(cache=True)
def _assign(x, y, jac, planes, r_outer):
    n = x.shape[0]
    position = np.empty(n)
    radius_out = np.empty(n)
    for k in range(n):
        position[k], radius_out[k] = place_pixel(x[k], y[k], jac, planes, r_outer)
    return position, radius_out


def assign_to_rings(x, y, sky_jacobian, radii, x_center, y_center, position_angle, inclination, r_outer):
    """Place each pixel on the ring whose projected ellipse passes through it.

    For ring centres ``radii`` with their own geometry, f_j = R_j(pixel) - r_j is the
    disc radius of the pixel under ring j's geometry minus that ring's radius; the pixel lies
    between rings j and j+1 where f changes sign, at fractional ring index ``j + f_j / (f_j - f_{j+1})``.
    The search starts at the ring the middle ring's geometry suggests and walks to the nearest sign
    change, so it costs a few evaluations per pixel; where projected rings overlap, the crossing
    nearest that start is taken. Inside the
    first ring the first ring's geometry is used; beyond the last, the last ring's geometry out
    to ``r_outer``. Returns (fractional ring index, -1 where unassigned; disc radius in arcsec).
    """
    as_arr = lambda a: np.ascontiguousarray(a, dtype=float).ravel()  # noqa: E731
    planes = ring_planes(as_arr(radii), as_arr(x_center), as_arr(y_center), as_arr(position_angle),
                         as_arr(inclination))
    return _assign(as_arr(x), as_arr(y), np.ascontiguousarray(sky_jacobian, float), planes, float(r_outer))
