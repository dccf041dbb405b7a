"""Dark-halo profiles, each with an analytic enclosed mass (radius kpc, speed km/s, mass M_sun).

- :class:`PseudoIsothermal` (Begeman, Broeils & Sanders 1991): rho = rho_0 / (1 + (r/r_c)^2),
  M(<r) = 4 pi rho_0 r_c^3 [x - arctan x].
- :class:`NFW` (Navarro, Frenk & White 1996) by V200 and concentration c: r200 = V200 / (10 H0),
  M(<r) = M200 [ln(1 + c x) - c x / (1 + c x)] / [ln(1 + c) - c / (1 + c)], x = r / r200.
- :class:`Burkert` (Burkert 1995): rho = rho_0 r_0^3 / ((r + r_0)(r^2 + r_0^2)),
  M(<r) = pi rho_0 r_0^3 [ln((1 + x)^2 (1 + x^2)) - 2 arctan x].
- :class:`Einasto` (Einasto 1965; Navarro et al. 2004): rho = rho_-2 exp(-(2/alpha)[(r/r_-2)^alpha - 1]),
  M(<r) = 4 pi rho_-2 r_-2^3 e^(2/alpha) (alpha/2)^(3/alpha) / alpha * gamma(3/alpha, (2/alpha)(r/r_-2)^alpha).

Densities in M_sun/kpc^3. ``concentration_prior`` gives the Dutton & Maccio 2014 (MNRAS 441, 3359)
NFW concentration-mass relation at z = 0 (log10 c = 0.905 - 0.101 log10(M200 / 1e12 h^-1 M_sun),
scatter 0.11 dex; coefficients from memory).
"""

from __future__ import annotations

import numpy as np
from scipy import special

from .components import Component, G

__all__ = ["PseudoIsothermal", "NFW", "Burkert", "Einasto", "HALOS", "concentration_prior", "H0_KM_S_KPC"]

H0_KM_S_KPC = 0.07  # 70 km/s/Mpc, as commonly used for V200 definitions


class _Halo(Component):
    def v_circ(self, r):
        r = np.maximum(np.asarray(r, float), 1e-9)
        return np.sqrt(np.clip(G * self.enclosed_mass(r) / r, 0, None))


class PseudoIsothermal(_Halo):
    name = "pseudo-isothermal"
    parameters = ("rho0", "r_core")

    def __init__(self, rho0: float, r_core: float):
        self.rho0, self.r_core = float(rho0), float(r_core)

    def enclosed_mass(self, r):
        x = np.asarray(r, float) / self.r_core
        return 4 * np.pi * self.rho0 * self.r_core**3 * (x - np.arctan(x))


class NFW(_Halo):
    name = "NFW"
    parameters = ("v200", "concentration")

    def __init__(self, v200: float, concentration: float, h0: float = H0_KM_S_KPC):
        self.v200, self.concentration, self.h0 = float(v200), float(concentration), float(h0)

    @property
    def r200(self):
        return self.v200 / (10 * self.h0)

    @property
    def m200(self):
        return self.v200**2 * self.r200 / G

    @property
    def scale_radius(self):
        return self.r200 / self.concentration

    def enclosed_mass(self, r):
        c = self.concentration
        cx = c * np.asarray(r, float) / self.r200
        norm = np.log(1 + c) - c / (1 + c)
        return self.m200 * (np.log1p(cx) - cx / (1 + cx)) / norm


class Burkert(_Halo):
    name = "Burkert"
    parameters = ("rho0", "r0")

    def __init__(self, rho0: float, r0: float):
        self.rho0, self.r0 = float(rho0), float(r0)

    def enclosed_mass(self, r):
        x = np.asarray(r, float) / self.r0
        return np.pi * self.rho0 * self.r0**3 * (np.log((1 + x) ** 2 * (1 + x**2)) - 2 * np.arctan(x))


class Einasto(_Halo):
    name = "Einasto"
    parameters = ("rho_2", "r_2", "alpha")

    def __init__(self, rho_2: float, r_2: float, alpha: float = 0.17):
        self.rho_2, self.r_2, self.alpha = float(rho_2), float(r_2), float(alpha)

    def enclosed_mass(self, r):
        a = self.alpha
        t = (2 / a) * (np.asarray(r, float) / self.r_2) ** a
        lower_gamma = special.gammainc(3 / a, t) * special.gamma(3 / a)
        return 4 * np.pi * self.rho_2 * self.r_2**3 * np.exp(2 / a) * (a / 2) ** (3 / a) / a * lower_gamma


HALOS = {"isothermal": PseudoIsothermal, "nfw": NFW, "burkert": Burkert, "einasto": Einasto}


def concentration_prior(m200: float, h: float = 0.7):
    """(mean log10 c, scatter dex) of the Dutton & Maccio 2014 NFW relation at z = 0 (from memory)."""
    return 0.905 - 0.101 * np.log10(m200 * h / 1e12), 0.11
