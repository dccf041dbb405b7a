"""Which pixels can belong to which ring: pixels sorted by disc radius, and each ring's slice of them.

Sorting the valid pixels once by their disc radius under a reference geometry (the median of the
rings') makes the candidates of every ring one contiguous slice: a ring whose own geometry differs
from the reference by d_phi in position angle, a ratio ``stretch`` of cos(i) and a centre shift s
(arcsec) covers reference radii within about

    [r_in / ((1 + g) stretch) - s - w,  r_out (1 + g) stretch + s + w],   g = 2 d_phi + stretch - 1 + wander

(w the ring width; ``wander`` the fraction of its radius by which a ring still being fitted may
move). This is only a speed-up: the exact selection is made from the slice, and a ring whose
selection reaches either end of its slice is looked at again through a wider one.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from .geometry import centre_angle, disc_coordinates
from .parameters import CENTRE, GEOMETRY
from .parameters import Parameter as P

__all__ = ["Pixels", "SortedPixels", "ring_members", "gather_rings"]

_ENOUGH = max(GEOMETRY) + 1  # a ring table needs the columns up to the last geometry parameter


class Pixels(NamedTuple):
    """Valid pixels of a map: positions (0-based pixels), velocities and their errors (km/s)."""

    x: np.ndarray
    y: np.ndarray
    v: np.ndarray
    sigma: np.ndarray


class SortedPixels:
    """Pixels ``(x, y, v, sigma)`` sorted by disc radius under the median geometry of ``rings``.

    ``rings``: (n_rings, >= 5) parameters in :class:`.parameters.Parameter` order (centre in
    pixels, angles in deg). ``pixels``: the sorted arrays; ``order``: the sorting permutation;
    ``radius``: the sorted radii; ``margin``: twice the largest step in that radius between
    neighbouring pixels (a ring's pixels closer than this to a slice's end may continue beyond it).
    """

    def __init__(self, pixels, sky_jacobian, rings, inner, outer):
        rings = np.asarray(rings, float)
        self.sky_jacobian = np.asarray(sky_jacobian, float)
        self.inner, self.outer = np.asarray(inner, float), np.asarray(outer, float)
        pa, inc = rings[:, P.position_angle], rings[:, P.inclination]
        ref = np.nanmedian(rings[:, :_ENOUGH], axis=0)
        ref[P.position_angle] = centre_angle(pa, pa[0]).mean()
        radius, _, _ = disc_coordinates(pixels[0], pixels[1], ref[P.x_center], ref[P.y_center], self.sky_jacobian,
                                        ref[P.position_angle], ref[P.inclination])
        self.order = np.argsort(radius)
        self.radius = radius[self.order]
        self.pixels = Pixels(*(np.ascontiguousarray(np.asarray(a)[self.order]) for a in pixels))
        d_pa = np.radians(np.abs(centre_angle(pa, ref[P.position_angle]) - ref[P.position_angle]))
        cos_ref, cos_k = np.cos(np.radians(ref[P.inclination])), np.cos(np.radians(inc))
        self._stretch = np.maximum(cos_ref, cos_k) / np.maximum(np.minimum(cos_ref, cos_k), 1e-3)
        centre = list(CENTRE)
        self._shift = np.hypot(*(self.sky_jacobian @ (rings[:, centre] - ref[centre]).T))
        self._grow = 2.0 * d_pa + (self._stretch - 1.0)
        pixel = np.max(np.hypot(self.sky_jacobian[0], self.sky_jacobian[1]))  # arcsec per pixel step, the worse axis
        self.margin = 2.0 * pixel / max(np.cos(np.radians(ref[P.inclination])), 1e-3)

    def bounds(self, wander: float) -> np.ndarray:
        """(n_rings, 2) slice bounds into the sorted pixels (module docstring)."""
        grow = self._grow + wander
        width = self.outer - self.inner
        lo = self.inner / (1 + grow) / self._stretch - self._shift - width
        hi = self.outer * (1 + grow) * self._stretch + self._shift + width
        return np.column_stack([np.searchsorted(self.radius, lo), np.searchsorted(self.radius, hi)])


def ring_members(sorted_pixels: SortedPixels, rings) -> list:
    """Per ring, the sorted-pixel positions inside it at its own geometry, with cos and sin theta.

    ``rings``: (n_rings, >= 5) parameters as for :class:`SortedPixels`. Returns a list of
    (positions, cos_theta, sin_theta) arrays, one entry per ring.
    """
    rings = np.asarray(rings, float)
    x, y = sorted_pixels.pixels[0], sorted_pixels.pixels[1]
    total = len(x)
    out = []
    for k, (lo, hi) in enumerate(sorted_pixels.bounds(0.02)):
        while True:
            ring = rings[k]
            radius, cos_t, sin_t = disc_coordinates(x[lo:hi], y[lo:hi], ring[P.x_center], ring[P.y_center],
                                                    sorted_pixels.sky_jacobian, ring[P.position_angle],
                                                    ring[P.inclination])
            inside = np.flatnonzero((radius >= sorted_pixels.inner[k]) & (radius < sorted_pixels.outer[k]))
            r_ref, margin = sorted_pixels.radius, sorted_pixels.margin
            at_edge = len(inside) and ((lo > 0 and r_ref[lo + inside[0]] - r_ref[lo] < margin)
                                       or (hi < total and r_ref[hi - 1] - r_ref[lo + inside[-1]] < margin))
            if not at_edge:
                break
            spread = hi - lo
            lo, hi = max(lo - spread, 0), min(hi + spread, total)
        out.append((lo + inside, cos_t[inside], sin_t[inside]))
    return out


def gather_rings(pixels, sky_jacobian, rings: dict, inner, outer) -> list:
    """Per ring, (cos theta, sin theta, v, sigma) of its pixels at its own geometry.

    ``pixels`` = (x, y, v, sigma); ``rings`` holds per-ring ``x_center``, ``y_center``,
    ``position_angle`` and ``inclination``.
    """
    table = np.zeros((len(inner), _ENOUGH))
    for member in GEOMETRY:
        table[:, member] = np.asarray(rings[member.name], float)
    ordered = SortedPixels(pixels, sky_jacobian, table, inner, outer)
    v, sigma = ordered.pixels[2], ordered.pixels[3]
    return [(cos_t, sin_t, v[at], sigma[at]) for at, cos_t, sin_t in ring_members(ordered, table)]
