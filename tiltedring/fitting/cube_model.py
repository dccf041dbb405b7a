"""Model cubes of tilted rings: each ring's gas seen through the channels and the beam.

A thin disc of rings (geometry, rotation and radial speed as in :mod:`.kinematics`) carries gas with a
sky-plane surface brightness ``surface_brightness`` (cube unit x km/s, the moment-0 of the emission)
and a Gaussian line of one-dimensional velocity dispersion ``dispersion`` (km/s). Each pixel is placed
on its ring exactly as the model field does (:func:`.geometry.place_pixel`, parameters interpolated
linearly between ring centres), except that v_rotation follows a cubic Hermite curve through the
ring centres, which follows a steep inner rise between rings a beam apart where straight segments
cannot (the curve is still linear in the ring speeds). Its slope at each ring is that of the parabola
through the ring and its two neighbours (the three-point tangent for uneven spacing, de Boor 1978, A
Practical Guide to Splines, ch. IV; Catmull & Rom's chord where rings are evenly spaced); the centre
(r = 0, v = 0) is the node below the first ring, which lies only half a ring from it, and there the
chord slope left the curve 4-5 % low between the first two rings of a tanh-like rise (the three-point
slope: within 1.3 %). Inside the first ring centre v_rotation is the cubic from the centre (slope
v_0 / r_0, the curve continued as an odd function) to the first ring; the radial speed falls linearly
to zero at the centre, the other parameters stay those of the first ring. A
pixel is split into ``subpixels`` x ``subpixels`` points so that steep velocity gradients inside a
pixel broaden its line as they do on the sky.

Channel response: channel k collects the velocities between its edges e_k, e_(k+1) (midway
between channel centres), so a point of the disc at line-of-sight velocity v adds::

    S_k = Sigma [Phi((e_(k+1) - v) / sigma) - Phi((e_k - v) / sigma)] / (e_(k+1) - e_k)

(Phi the normal cumulative distribution): the mean of its Gaussian line over the channel (a boxcar
of one channel width), so that sum_k S_k (e_(k+1) - e_k) = Sigma. With ``response="hanning"`` the
channels are then smoothed by the Hanning weights (1/4, 1/2, 1/4) (e.g. Harris 1978, Proc. IEEE 66, 51).
The beam is last: every channel is convolved with the elliptical Gaussian beam by
:class:`.smearing.BeamKernel` (the same FFT kernel as the smeared velocity field).

The compiled kernel also returns the derivatives of the (unsmeared) cube with respect to
(v_rotation, dispersion, surface_brightness) of chosen rings (analytic: dS/dv from the normal density
at the channel edges); since the channel smoothing and the beam are linear, the derivatives of the
observed cube are the same operators applied to them. Rows of the cube are shared among threads, each
pixel summed by one thread in a fixed order, so the result does not depend on the number of threads.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from ..errors import InputError
from .geometry import DEG, place_pixel, project, ring_planes
from .kinematics import PARAMETERS
from .threads import run_parts, thread_count

__all__ = ["CubeGrid", "CHANNEL_RESPONSES", "RING_COLUMNS", "FREE_PER_RING", "sky_cube", "observe", "model_cube",
           "ring_arrays"]

CHANNEL_RESPONSES = ("boxcar", "hanning")
RING_COLUMNS = PARAMETERS + ("dispersion", "surface_brightness")
FREE_PER_RING = ("v_rotation", "dispersion", "surface_brightness")  # derivative order of each fitted ring
_WINDOW = 6.0  # a line is evaluated out to this many dispersions from its centre
_SQRT2 = math.sqrt(2.0)
_NORM = 1.0 / math.sqrt(2.0 * math.pi)


@dataclass(frozen=True)
class CubeGrid:
    """What a model cube is drawn on: the sky grid, the channels, the beam and the channel response.

    ``velocity``: channel centres in km/s, increasing; ``sky_jacobian`` (east, north) arcsec per pixel;
    ``beam`` a :class:`..io.maps.Beam` (None: no beam smearing).
    """

    shape: tuple  # (n_channels, ny, nx)
    velocity: np.ndarray
    channel_width: float
    sky_jacobian: np.ndarray
    beam: object = None
    response: str = "boxcar"

    def __post_init__(self):
        if self.response not in CHANNEL_RESPONSES:
            raise InputError(f"channel response {self.response!r} unknown; choose {' or '.join(CHANNEL_RESPONSES)}")
        v = np.asarray(self.velocity, float)
        if v.ndim != 1 or v.size != self.shape[0] or v.size < 2 or np.any(np.diff(v) <= 0):
            raise InputError("channel velocities must increase, one per channel of the cube")

    @classmethod
    def of(cls, cube, response: str = "boxcar", beam=None) -> "CubeGrid":
        """The grid of a :class:`..io.cube.LineCube` (or any object with its fields)."""
        return cls(tuple(cube.data.shape), np.asarray(cube.velocity, float), float(cube.channel_width),
                   np.asarray(cube.sky_jacobian, float), beam if beam is not None else cube.beam, response)

    @property
    def edges(self) -> np.ndarray:
        """Channel edges (n_channels + 1), midway between centres; the end channels as wide as their neighbours."""
        v = np.asarray(self.velocity, float)
        mid = 0.5 * (v[1:] + v[:-1])
        return np.concatenate([[v[0] - (mid[0] - v[0])], mid, [v[-1] + (v[-1] - mid[-1])]])


def ring_arrays(rings: dict) -> dict:
    """Ring columns as contiguous float arrays sorted by radius (v_radial 0 when absent; position angles
    unwrapped so that interpolation does not jump at 0/360)."""
    missing = [name for name in ("radius",) + RING_COLUMNS if name not in rings and name != "v_radial"]
    if missing:
        raise InputError(f"a model cube needs ring columns {', '.join(missing)}")
    order = np.argsort(np.asarray(rings["radius"], float))
    out = {name: np.ascontiguousarray(np.asarray(rings[name], float)[order]) for name in ("radius",) + RING_COLUMNS
           if name in rings}
    out.setdefault("v_radial", np.zeros_like(out["radius"]))
    out["position_angle"] = np.degrees(np.unwrap(np.radians(out["position_angle"])))
    bad = [name for name, values in out.items() if not np.all(np.isfinite(values))]
    if bad:
        raise InputError(f"ring columns {', '.join(bad)} have non-finite values; fill or drop those rings first")
    return out


@njit(cache=True, inline="always")
def _between(a, b, w):
    return a + w * (b - a)


@njit(cache=True, inline="always")
def _slope_weights(j, radii, last):
    """(ring, weight) x 3 of the slope at ring ``j``, the derivative of the parabola through rings j - 1, j and
    j + 1 (the three-point tangent for uneven spacing; de Boor 1978, ch. IV):
    m_j = (h_+ d_- + h_- d_+) / (h_- + h_+), with h_-, h_+ the spacings and d_-, d_+ the secants on each side;
    for even spacing it is Catmull-Rom's (v_(j+1) - v_(j-1)) / (r_(j+1) - r_(j-1)). Below the first ring
    the node is the centre (r = 0, v = 0); the last ring takes the one-sided secant. Ring -1: unused."""
    if j == last:
        if last == 0:
            return 0, 1.0 / radii[0], -1, 0.0, -1, 0.0
        span = radii[last] - radii[last - 1]
        return last - 1, -1.0 / span, last, 1.0 / span, -1, 0.0
    low = radii[j] - radii[j - 1] if j > 0 else radii[0]
    high = radii[j + 1] - radii[j]
    total = low + high
    return (j - 1, -high / (low * total), j, (high / low - low / high) / total, j + 1, low / (high * total))


@njit(cache=True, inline="always")
def _add_weight(ring, value, index, weight):
    """Add ``value`` to the weight of ``ring`` in the (index, weight) list (ring -1: nothing)."""
    if ring < 0:
        return
    for n in range(index.shape[0]):
        if index[n] == ring or index[n] == -1:
            index[n] = ring
            weight[n] += value
            return


@njit(cache=True, inline="always")
def _curve_weights(j, i, w, taper, radii, last, index, weight):
    """Weights of the ring speeds in v_rotation at fractional ring index j + w: a cubic Hermite curve
    through the ring centres with the three-point slopes of :func:`_slope_weights` (linear in the speeds);
    inside the first ring centre (``taper`` = r / r_0 < 1) the cubic from the centre, v = 0 with slope
    v_0 / r_0 (the curve continued as an odd function, v(-r) = -v(r)), to ring 0. Fills ``index``/``weight``
    (4 entries, -1 unused) and returns nothing."""
    for n in range(4):
        index[n] = -1
        weight[n] = 0.0
    if taper < 1.0:
        t = taper
        _add_weight(0, t * t * (3.0 - 2.0 * t) + t * (1.0 - t) * (1.0 - t), index, weight)  # h01 + h10 (v_0 / r_0)
        a, wa, b, wb, c, wc = _slope_weights(0, radii, last)
        h11 = (t**3 - t**2) * radii[0]
        _add_weight(a, h11 * wa, index, weight)
        _add_weight(b, h11 * wb, index, weight)
        _add_weight(c, h11 * wc, index, weight)
        return
    if i == j:
        _add_weight(j, 1.0, index, weight)
        return
    t = w
    h00, h10 = 2 * t**3 - 3 * t**2 + 1, t**3 - 2 * t**2 + t
    h01, h11 = -2 * t**3 + 3 * t**2, t**3 - t**2
    step = radii[i] - radii[j]
    _add_weight(j, h00, index, weight)
    _add_weight(i, h01, index, weight)
    a, wa, b, wb, c, wc = _slope_weights(j, radii, last)
    _add_weight(a, h10 * step * wa, index, weight)
    _add_weight(b, h10 * step * wb, index, weight)
    _add_weight(c, h10 * step * wc, index, weight)
    a, wa, b, wb, c, wc = _slope_weights(i, radii, last)
    _add_weight(a, h11 * step * wa, index, weight)
    _add_weight(b, h11 * step * wb, index, weight)
    _add_weight(c, h11 * step * wc, index, weight)


@njit(cache=True, nogil=True)
def _sky_rows(row_lo, row_hi, x0, y0, nxb, sub, jac, radii, xc, yc, vsys, pa, inc, vrot, vrad, disp, surf,
              r_outer, edges, slot, out, deriv):
    """Add the unsmeared, boxcar-channel cube of rows ``row_lo:row_hi`` of the box at (x0, y0) to ``out``
    (n_channels, ny_box, nx_box); with ``deriv`` of length > 0, add d out / d(v_rotation, dispersion,
    surface_brightness) of ring r at ``deriv[3 slot[r] + (0, 1, 2)]`` for rings with ``slot[r] >= 0``."""
    last = radii.shape[0] - 1
    n_edges = edges.shape[0]
    planes = ring_planes(radii, xc, yc, pa, inc)
    sp, cp, ci = planes.sin_pa, planes.cos_pa, planes.cos_inc
    si = np.sin(inc * DEG)
    share = 1.0 / (sub * sub)
    want = deriv.shape[0] > 0
    cdf = np.empty(n_edges)
    dens = np.empty(n_edges)
    arg = np.empty(n_edges)
    index = np.empty(4, np.int64)
    curve = np.empty(4)
    for row in range(row_lo, row_hi):
        for col in range(nxb):
            for a in range(sub):
                y = y0 + row + (a + 0.5) / sub - 0.5
                for b in range(sub):
                    x = x0 + col + (b + 0.5) / sub - 0.5
                    pos, _ = place_pixel(x, y, jac, planes, r_outer)
                    if pos < 0.0:
                        continue
                    j = min(int(pos), last)
                    i = min(j + 1, last)
                    w = pos - j
                    if pa[i] == pa[j] and inc[i] == inc[j]:
                        s_pa, c_pa, c_i, s_i = sp[j], cp[j], ci[j], si[j]
                    else:
                        angle, tilt = _between(pa[j], pa[i], w) * DEG, _between(inc[j], inc[i], w) * DEG
                        s_pa, c_pa, c_i, s_i = np.sin(angle), np.cos(angle), np.cos(tilt), np.sin(tilt)
                    xd, yd = project(x, y, _between(xc[j], xc[i], w), _between(yc[j], yc[i], w), jac, s_pa, c_pa,
                                     c_i)
                    r = np.sqrt(xd * xd + yd * yd)
                    taper = 1.0
                    if j == 0 and w == 0.0 and r < radii[0]:
                        taper = r / radii[0] if radii[0] > 0.0 else 1.0
                    cos_t, sin_t = (xd / r, yd / r) if r > 0.0 else (1.0, 0.0)
                    _curve_weights(j, i, w, taper, radii, last, index, curve)
                    speed = 0.0
                    for n in range(4):
                        if index[n] >= 0:
                            speed += curve[n] * vrot[index[n]]
                    v = _between(vsys[j], vsys[i], w) + s_i * (speed * cos_t + taper * _between(vrad[j], vrad[i], w)
                                                               * sin_t)
                    sigma = max(_between(disp[j], disp[i], w), 1e-3)
                    bright = _between(surf[j], surf[i], w)
                    lo = max(np.searchsorted(edges, v - _WINDOW * sigma) - 1, 0)
                    hi = min(np.searchsorted(edges, v + _WINDOW * sigma), n_edges - 1)
                    if hi <= lo:
                        continue
                    for e in range(lo, hi + 1):
                        t = (edges[e] - v) / sigma
                        arg[e] = t
                        cdf[e] = 0.5 * (1.0 + math.erf(t / _SQRT2))
                        dens[e] = _NORM * math.exp(-0.5 * t * t)
                    wj = 1.0 - w if i != j else 1.0
                    for k in range(lo, hi):
                        width = edges[k + 1] - edges[k]
                        p = (cdf[k + 1] - cdf[k]) / width
                        out[k, row, col] += share * bright * p
                        if not want:
                            continue
                        dp_dv = (dens[k] - dens[k + 1]) / (sigma * width)
                        dp_ds = (arg[k] * dens[k] - arg[k + 1] * dens[k + 1]) / (sigma * width)
                        d_v = share * bright * dp_dv * s_i * cos_t
                        d_s = share * bright * dp_ds
                        d_b = share * p
                        for n in range(4):
                            if index[n] >= 0 and slot[index[n]] >= 0:
                                deriv[3 * slot[index[n]], k, row, col] += d_v * curve[n]
                        if slot[j] >= 0:
                            q = 3 * slot[j]
                            deriv[q + 1, k, row, col] += d_s * wj
                            deriv[q + 2, k, row, col] += d_b * wj
                        if i != j and slot[i] >= 0 and w > 0.0:
                            q = 3 * slot[i]
                            deriv[q + 1, k, row, col] += d_s * w
                            deriv[q + 2, k, row, col] += d_b * w


def _box(grid: CubeGrid, box):
    ny, nx = grid.shape[1:]
    if box is None:
        return 0, 0, ny, nx
    y0, x0, y1, x1 = (int(v) for v in box)
    if not (0 <= y0 < y1 and 0 <= x0 < x1):
        raise InputError(f"model-cube box {box} is empty")
    return y0, x0, y1, x1


def sky_cube(grid: CubeGrid, rings: dict, r_outer: float, box=None, free=None, subpixels: int = 3,
             threads: int | None = None):
    """The cube of the rings before beam and channel smoothing (boxcar channels only).

    ``box``: (y0, x0, y1, x1) pixel rows/columns of a sub-region (default: the whole grid).
    ``free``: indices (into the radius-sorted rings) whose derivatives are wanted, in
    :data:`FREE_PER_RING` order per ring. Returns (cube (n_channels, ny_box, nx_box), derivatives
    (3 len(free), n_channels, ny_box, nx_box) or None).
    """
    table = ring_arrays(rings)
    y0, x0, y1, x1 = _box(grid, box)
    nyb, nxb = y1 - y0, x1 - x0
    n_channels = grid.shape[0]
    out = np.zeros((n_channels, nyb, nxb))
    slot = np.full(len(table["radius"]), -1, np.int64)
    if free is not None and len(free):
        slot[np.asarray(free, int)] = np.arange(len(free))
        deriv = np.zeros((3 * len(free), n_channels, nyb, nxb))
    else:
        deriv = np.zeros((0, 1, 1, 1))
    columns = [table[name] for name in ("radius", "x_center", "y_center", "v_systemic", "position_angle",
                                        "inclination", "v_rotation", "v_radial", "dispersion", "surface_brightness")]
    args = (float(x0), float(y0), nxb, int(subpixels), np.ascontiguousarray(grid.sky_jacobian, float), *columns,
            float(r_outer), grid.edges, slot, out, deriv)
    parts = max(1, min(nyb, 4 * (threads or thread_count())))
    rows = np.linspace(0, nyb, parts + 1).astype(int)
    run_parts(lambda part: _sky_rows(part[0], part[1], *args), zip(rows[:-1], rows[1:]), threads)
    return out, (deriv if deriv.shape[0] else None)


def _hanning(stack):
    """Hanning smoothing (1/4, 1/2, 1/4) along the channel axis (-3), zero beyond the ends."""
    out = 0.5 * stack
    out[..., 1:, :, :] += 0.25 * stack[..., :-1, :, :]
    out[..., :-1, :, :] += 0.25 * stack[..., 1:, :, :]
    return out


def observe(grid: CubeGrid, stack, kernel=None, threads: int | None = None):
    """Channel response then beam applied to a sky cube (or a stack of them): the observed cube.

    ``kernel``: a :class:`.smearing.BeamKernel` for the stack's (ny, nx) (made when None and the grid has
    a beam)."""
    from .smearing import BeamKernel

    if grid.response == "hanning":
        stack = _hanning(stack)
    if grid.beam is None:
        return stack
    kernel = kernel or BeamKernel(stack.shape[-2:], grid.beam, grid.sky_jacobian)
    return kernel(stack, workers=threads or thread_count())


def model_cube(grid: CubeGrid, rings: dict, r_outer: float, box=None, subpixels: int = 3,
               threads: int | None = None, kernel=None):
    """The observed model cube of the rings (module docstring) on ``grid`` (or its ``box``), in the cube's unit.

    ``rings`` maps ``radius`` and :data:`RING_COLUMNS` to per-ring arrays (``v_radial`` optional).
    Nothing beyond ``r_outer`` (arcsec, disc plane) emits."""
    sky, _ = sky_cube(grid, rings, r_outer, box=box, subpixels=subpixels, threads=threads)
    return observe(grid, sky, kernel=kernel, threads=threads)
