"""Mass components with one interface: circular speed, enclosed mass, surface density where defined.

Units: radius in kpc, speed in km/s, mass in M_sun, surface density in M_sun/pc^2. G from
astropy.constants. Every component is one class (in the manner of galpy's potentials):

- :class:`ExponentialDisc`: razor-thin exponential disc, Freeman 1970 (ApJ 160, 811;
  Binney & Tremaine 2008 eq. 2.165): v^2 = 4 pi G Sigma_0 h y^2 [I0(y)K0(y) - I1(y)K1(y)], y = R/2h.
- :class:`ThinDisc`: any tabulated surface-density profile, razor-thin, by summing rings
  (Casertano 1983, MNRAS 203, 735, in the thin limit): a ring of mass m and radius a has
  Phi = -(2 G m / pi) K(mu) / (R + a), mu = 4 a R / (R + a)^2, whose radial derivative is summed
  over rings placed midway between the evaluation radii (the principal-value singularity cancels);
  sums with n and 2n rings are combined by Richardson extrapolation.
- :class:`HernquistBulge`: spherical bulge, M(<r) = M r^2 / (r + a)^2 (Hernquist 1990, ApJ 356, 359).
- :class:`PointMass`: v^2 = G M / r.
- :class:`TabulatedSpeed`: a component given as a speed curve (e.g. SPARC's V_disk for M/L = 1).
"""

from __future__ import annotations

import numpy as np
from astropy import constants as const
from astropy import units as u
from scipy import special

__all__ = ["G", "Component", "ExponentialDisc", "ThinDisc", "HernquistBulge", "PointMass", "TabulatedSpeed"]

G = float(const.G.to_value(u.kpc * u.km**2 / u.s**2 / u.Msun))  # kpc (km/s)^2 / M_sun
PC2_PER_KPC2 = 1e6


class Component:
    """Interface: ``v_circ(r)``, ``enclosed_mass(r)``, ``surface_density(r)`` (r in kpc)."""

    name = "component"

    def v_circ(self, r):
        raise NotImplementedError

    def v_squared(self, r):
        """Signed v^2 (a component can pull outward, e.g. a gas ring, giving v^2 < 0)."""
        return np.asarray(self.v_circ(r), float) ** 2

    def enclosed_mass(self, r):
        """Mass inside radius r (spherical radius for spheres, cylindrical for discs)."""
        raise NotImplementedError

    def surface_density(self, r):
        raise NotImplementedError(f"{self.name} has no surface density")


class ExponentialDisc(Component):
    name = "exponential disc"

    def __init__(self, mass: float, scale_length: float):
        self.mass, self.scale_length = float(mass), float(scale_length)

    @property
    def sigma0(self):
        """Central surface density in M_sun/kpc^2: M / (2 pi h^2)."""
        return self.mass / (2 * np.pi * self.scale_length**2)

    def v_circ(self, r):
        y = np.maximum(np.asarray(r, float), 1e-12) / (2 * self.scale_length)
        bessel = special.i0(y) * special.k0(y) - special.i1(y) * special.k1(y)
        return np.sqrt(np.clip(4 * np.pi * G * self.sigma0 * self.scale_length * y**2 * bessel, 0, None))

    def enclosed_mass(self, r):
        x = np.asarray(r, float) / self.scale_length
        return self.mass * (1 - (1 + x) * np.exp(-x))

    def surface_density(self, r):
        return self.sigma0 * np.exp(-np.asarray(r, float) / self.scale_length) / PC2_PER_KPC2


class ThinDisc(Component):
    """Razor-thin disc of tabulated surface density (M_sun/pc^2 at radii kpc), zero beyond the table."""

    name = "thin disc"

    def __init__(self, radius, surface_density, n_rings: int = 1500, label: str | None = None):
        self.radius = np.asarray(radius, float)
        self.sigma = np.asarray(surface_density, float)
        order = np.argsort(self.radius)
        self.radius, self.sigma = self.radius[order], self.sigma[order]
        self.name = label or self.name
        # Richardson extrapolation of the ring sum (error ~ 1/n): v^2 = 2 v^2(2n) - v^2(n)
        coarse_grid, coarse = self._ring_sum(n_rings)
        self._grid, fine = self._ring_sum(2 * n_rings)
        self._v2 = 2 * fine - np.interp(self._grid, coarse_grid, coarse)

    def _ring_sum(self, n_rings):
        """v^2 on radii midway between n rings (and a few beyond the table); keeps the rings for the mass."""
        r_max = self.radius[-1]
        self._step = r_max / n_rings
        edges = np.arange(n_rings + 1) * self._step
        centres = 0.5 * (edges[1:] + edges[:-1])
        sig = np.interp(centres, self.radius, self.sigma, left=self.sigma[0], right=0.0) * PC2_PER_KPC2
        self._ring_radius = centres
        self._ring_mass = 2 * np.pi * centres * sig * self._step
        grid = np.concatenate([edges[1:], r_max * np.array([1.25, 1.5, 2, 3, 5, 10])])
        return grid, np.array([self._v2_at(r) for r in grid])

    def _v2_at(self, radius):
        a = self._ring_radius
        s = radius + a
        mu = np.clip(4 * a * radius / s**2, 0, 1 - 1e-15)
        k, e = special.ellipk(mu), special.ellipe(mu)
        dk = np.where(mu > 0, (e / (1 - mu) - k) / (2 * np.maximum(mu, 1e-300)), np.pi / 8)
        dphi = -(2 * G * self._ring_mass / np.pi) / s**2 * (dk * 4 * a * (a - radius) / s**2 - k)
        return radius * float(np.sum(dphi))

    def v_squared(self, r):
        r = np.asarray(r, float)
        v2 = np.interp(r, np.concatenate([[0.0], self._grid]), np.concatenate([[0.0], self._v2]))
        beyond = r > self._grid[-1]
        return np.where(beyond, G * self._ring_mass.sum() / np.maximum(r, 1e-12), v2)

    def v_circ(self, r):
        v2 = self.v_squared(r)
        return np.sign(v2) * np.sqrt(np.abs(v2))

    def enclosed_mass(self, r):
        cum = np.concatenate([[0.0], np.cumsum(self._ring_mass)])
        edges = np.arange(len(cum)) * self._step
        return np.interp(np.asarray(r, float), edges, cum)

    def surface_density(self, r):
        return np.interp(np.asarray(r, float), self.radius, self.sigma, right=0.0)


class HernquistBulge(Component):
    name = "Hernquist bulge"

    def __init__(self, mass: float, scale: float):
        self.mass, self.scale = float(mass), float(scale)

    def enclosed_mass(self, r):
        r = np.asarray(r, float)
        return self.mass * r**2 / (r + self.scale) ** 2

    def v_circ(self, r):
        r = np.maximum(np.asarray(r, float), 1e-12)
        return np.sqrt(G * self.enclosed_mass(r) / r)


class PointMass(Component):
    name = "point mass"

    def __init__(self, mass: float):
        self.mass = float(mass)

    def enclosed_mass(self, r):
        return np.full(np.shape(r), self.mass)

    def v_circ(self, r):
        return np.sqrt(G * self.mass / np.maximum(np.asarray(r, float), 1e-12))


class TabulatedSpeed(Component):
    """A component known only as a speed curve; v^2 is interpolated (sign kept) and scaled by ``scale``."""

    def __init__(self, radius, speed, label: str = "tabulated", scale: float = 1.0):
        self.radius = np.asarray(radius, float)
        self.v2 = np.sign(speed) * np.asarray(speed, float) ** 2
        self.name = label
        self.scale = float(scale)

    def v_squared(self, r):
        return self.scale * np.interp(np.asarray(r, float), self.radius, self.v2)

    def v_circ(self, r):
        v2 = self.v_squared(r)
        return np.sign(v2) * np.sqrt(np.abs(v2))

    def enclosed_mass(self, r):
        r = np.asarray(r, float)
        return self.v_squared(r) * r / G
