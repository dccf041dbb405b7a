"""Dark-halo profiles, one class each, with declared parameters and an analytic enclosed mass
(radius kpc, speed km/s, mass M_sun, density M_sun/kpc^3).

- :class:`PseudoIsothermal` (Begeman, Broeils & Sanders 1991): rho = rho_0 / (1 + (r/r_c)^2),
  M(<r) = 4 pi rho_0 r_c^3 [x - arctan x].
- :class:`NFW` (Navarro, Frenk & White 1996) by V200 and concentration c: r200 = V200 / (10 H0),
  M(<r) = M200 [ln(1 + c x) - c x / (1 + c x)] / [ln(1 + c) - c / (1 + c)], x = r / r200.
- :class:`Burkert` (Burkert 1995): rho = rho_0 r_0^3 / ((r + r_0)(r^2 + r_0^2)),
  M(<r) = pi rho_0 r_0^3 [ln((1 + x)^2 (1 + x^2)) - 2 arctan x].
- :class:`Einasto` (Einasto 1965; Navarro et al. 2004): rho = rho_-2 exp(-(2/alpha)[(r/r_-2)^alpha - 1]),
  M(<r) = 4 pi rho_-2 r_-2^3 e^(2/alpha) (alpha/2)^(3/alpha) / alpha * gamma(3/alpha, (2/alpha)(r/r_-2)^alpha).

A halo is a subclass of :class:`Halo` that declares its ``parameters`` (:class:`HaloParameter`:
name, unit, where the fit starts, bounds, whether it is fitted in log10) and supplies
``_enclosed_mass(r)``; the base class derives the rest (construction, circular speed, M200,
construction from fitted values). It becomes a mass model once registered
(:func:`.registry.register_halo`).

Sizes and masses follow a :class:`.definition.HaloDefinition` (astropy cosmology by name and an
overdensity: 200 times critical by default, ``vir`` after Bryan & Norman 1998, ...): ``halo_radius``
and ``halo_mass`` are r_Delta and M_Delta (a root search of the mean enclosed density, closed form for
NFW), ``m200`` is always the mass at 200 times critical. NFW's ``v200`` and ``concentration`` are
V_Delta and r_Delta / r_s of the chosen overdensity (the names keep the common default).
:func:`concentration_mass_relation` gives the Dutton & Maccio 2014 (MNRAS 441, 3359) NFW
concentration-mass relation at z = 0 for 200c (log10 c = 0.905 - 0.101 log10(M / 1e12 h^-1 M_sun))
and for the virial overdensity (1.025 - 0.097 log10(...)), scatter 0.11 dex (coefficients from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy import units as u
from scipy import special

from .components import Component, G
from .definition import DEFAULT_DEFINITION, HaloDefinition

__all__ = ["HaloParameter", "Halo", "PseudoIsothermal", "NFW", "Burkert", "Einasto", "concentration_mass_relation"]
DENSITY = u.Msun / u.kpc**3


@dataclass(frozen=True)
class HaloParameter:
    """One declared parameter of a halo.

    ``start`` and ``bounds`` (lower, upper) are in the fitted scale: log10 of the value in ``unit``
    when ``log10`` (scales and densities, which span decades), the value itself otherwise.
    ``default``: the value the constructor takes when none is given (None: required).
    """

    name: str
    unit: u.UnitBase
    start: float
    bounds: tuple
    log10: bool = True
    default: float | None = None
    description: str = ""

    @property
    def fitted_name(self) -> str:
        """Name of the fitted quantity (``log10_<name>`` for log10 parameters)."""
        return f"log10_{self.name}" if self.log10 else self.name

    def from_fitted(self, x):
        return 10**x if self.log10 else x

    def to_fitted(self, value):
        return np.log10(value) if self.log10 else value


class Halo(Component):
    """A spherical dark halo (module docstring). Subclasses declare ``name`` and ``parameters`` and
    supply ``_enclosed_mass(r)`` for an array of radii in kpc."""

    name = "halo"
    parameters: tuple = ()

    def __init__(self, *values, definition: HaloDefinition | None = None, **named):
        self.definition = definition or DEFAULT_DEFINITION
        declared = [p.name for p in self.parameters]
        if len(values) > len(declared):
            raise TypeError(f"{type(self).__name__} takes {len(declared)} parameters ({', '.join(declared)})")
        given = dict(zip(declared, values))
        twice = given.keys() & named.keys()
        unknown = named.keys() - set(declared)
        if twice or unknown:
            raise TypeError(f"{type(self).__name__}: parameter(s) {sorted(twice | unknown)} given twice or unknown")
        given.update(named)
        for p in self.parameters:
            value = given.get(p.name, p.default)
            if value is None:
                raise TypeError(f"{type(self).__name__} needs {p.name} ({p.description or p.unit})")
            setattr(self, p.name, float(value))

    @classmethod
    def from_fitted(cls, values: dict, definition: HaloDefinition | None = None):
        """The halo at fitted values (keyed by :attr:`HaloParameter.fitted_name`)."""
        return cls(**{p.name: p.from_fitted(values[p.fitted_name]) for p in cls.parameters}, definition=definition)

    def _enclosed_mass(self, r):
        raise NotImplementedError

    def enclosed_mass(self, r):
        return self._enclosed_mass(np.asarray(r, float))

    def v_circ(self, r):
        r = np.maximum(np.asarray(r, float), 1e-9)
        return np.sqrt(np.clip(G * self.enclosed_mass(r) / r, 0, None))

    def radius_at_density(self, mean_density: float) -> float:
        """Radius (kpc) inside which the mean density is ``mean_density`` (M_sun/kpc^3); NaN when not found in
        1 pc - 10 Mpc."""
        from scipy.optimize import brentq

        def excess(r):
            return self.enclosed_mass(r) / (4 / 3 * np.pi * r**3) - mean_density

        try:
            return float(brentq(excess, 1e-3, 1e4))
        except ValueError:
            return np.nan

    @property
    def halo_radius(self) -> float:
        """r_Delta (kpc) of the halo's definition."""
        return self.radius_at_density(self.definition.mean_density())

    @property
    def halo_mass(self) -> float:
        """M_Delta (M_sun) of the halo's definition."""
        r = self.halo_radius
        return float(self.enclosed_mass(r)) if np.isfinite(r) else np.nan

    @property
    def m200(self) -> float:
        """Mass inside the radius where the mean density is 200 times critical (the definition's cosmology)."""
        r = self.radius_at_density(200 * self.definition.rho_crit)
        return float(self.enclosed_mass(r)) if np.isfinite(r) else np.nan

    def relation_residuals(self, fitted: dict) -> list:
        """Residuals of a published relation between the halo's parameters, added to the fit as priors when
        asked (``MassModelSettings.use_concentration_prior``); none by default."""
        return []


class PseudoIsothermal(Halo):
    name = "pseudo-isothermal"
    parameters = (HaloParameter("rho0", DENSITY, 7.5, (4.0, 11.0), description="central density"),
                  HaloParameter("r_core", u.kpc, 0.3, (-2.0, 2.5), description="core radius"))

    def _enclosed_mass(self, r):
        x = r / self.r_core
        return 4 * np.pi * self.rho0 * self.r_core**3 * (x - np.arctan(x))


class NFW(Halo):
    name = "NFW"
    parameters = (HaloParameter("v200", u.km / u.s, 2.0, (0.7, 3.3), description="circular speed at r200"),
                  HaloParameter("concentration", u.dimensionless_unscaled, 1.0, (0.0, 1.7),
                                description="r200 / scale radius"))

    @property
    def halo_radius(self):
        """r_Delta = V_Delta / (H0 sqrt(Delta / 2)) (module :mod:`.definition`)."""
        return float(self.definition.radius_from_speed(self.v200))

    @property
    def halo_mass(self):
        """M_Delta = V_Delta^2 r_Delta / G."""
        return self.v200**2 * self.halo_radius / G

    @property
    def r200(self):
        """r_Delta (named after the default overdensity, 200c)."""
        return self.halo_radius

    @property
    def scale_radius(self):
        return self.halo_radius / self.concentration

    def _enclosed_mass(self, r):
        c = self.concentration
        cx = c * r / self.halo_radius
        norm = np.log(1 + c) - c / (1 + c)
        return self.halo_mass * (np.log1p(cx) - cx / (1 + cx)) / norm

    def relation_offset(self):
        """(log10 c - mean, scatter) against the Dutton & Maccio (2014) relation for the halo's overdensity;
        None where the relation is not defined (overdensities other than 200c and vir)."""
        relation = concentration_mass_relation(self.halo_mass, self.definition)
        if relation is None:
            return None
        mean, scatter = relation
        return float(np.log10(self.concentration) - mean), scatter

    def relation_residuals(self, fitted):
        """The Dutton & Maccio (2014) concentration-mass relation (:func:`concentration_mass_relation`)."""
        offset = self.relation_offset()
        return [] if offset is None else [offset[0] / offset[1]]


class Burkert(Halo):
    name = "Burkert"
    parameters = (HaloParameter("rho0", DENSITY, 7.5, (4.0, 11.0), description="central density"),
                  HaloParameter("r0", u.kpc, 0.5, (-2.0, 2.5), description="core radius"))

    def _enclosed_mass(self, r):
        x = r / self.r0
        return np.pi * self.rho0 * self.r0**3 * (np.log((1 + x) ** 2 * (1 + x**2)) - 2 * np.arctan(x))


class Einasto(Halo):
    name = "Einasto"
    parameters = (HaloParameter("rho_2", DENSITY, 6.5, (3.0, 10.0), description="density where the slope is -2"),
                  HaloParameter("r_2", u.kpc, 1.0, (-1.5, 2.5), description="radius where the slope is -2"),
                  HaloParameter("alpha", u.dimensionless_unscaled, 0.17, (0.05, 1.0), log10=False, default=0.17,
                                description="shape index"))

    def _enclosed_mass(self, r):
        a = self.alpha
        t = (2 / a) * (r / self.r_2) ** a
        lower_gamma = special.gammainc(3 / a, t) * special.gamma(3 / a)
        return 4 * np.pi * self.rho_2 * self.r_2**3 * np.exp(2 / a) * (a / 2) ** (3 / a) / a * lower_gamma


# Dutton & Maccio 2014, z = 0 (intercept, slope of log10 c against log10(M / 1e12 h^-1 M_sun)); from memory
_DUTTON_MACCIO = {"200c": (0.905, -0.101), "vir": (1.025, -0.097)}
_DUTTON_MACCIO_SCATTER = 0.11  # dex


def concentration_mass_relation(mass: float, definition: HaloDefinition = DEFAULT_DEFINITION):
    """(mean log10 c, scatter dex) of the Dutton & Maccio 2014 NFW relation at z = 0 for M_Delta ``mass``
    (M_sun) of ``definition`` (200c or vir; None for other overdensities). h from the definition's cosmology."""
    coefficients = _DUTTON_MACCIO.get(definition.overdensity)
    if coefficients is None or not mass > 0:
        return None
    a, b = coefficients
    return a + b * np.log10(mass * definition.little_h / 1e12), _DUTTON_MACCIO_SCATTER

