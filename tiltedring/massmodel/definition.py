"""What a halo's size and mass mean: the cosmology and the overdensity (at z = 0).

A halo's radius r_Delta encloses a mean density Delta times the critical density of the universe,
rho_crit = 3 H0^2 / (8 pi G) (from the named astropy cosmology, e.g. ``Planck18``, ``WMAP9``);
its mass M_Delta = (4/3) pi r_Delta^3 Delta rho_crit and circular speed V_Delta^2 = G M_Delta / r_Delta,
so that r_Delta = V_Delta / (H0 sqrt(Delta / 2)) (for Delta = 200: r200 = V200 / (10 H0)).

Overdensities: ``200c`` (200 times critical, the default), any ``<number>c`` (e.g. ``500c``),
``<number>m`` (times the mean matter density, Delta_c = number * Omega_m), and ``vir``: the
virial overdensity of Bryan & Norman 1998 (ApJ 495, 80) for a flat universe,
Delta_c = 18 pi^2 + 82 x - 39 x^2 with x = Omega_m - 1 (about 102 for Omega_m = 0.31).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from astropy import units as u

from ..errors import InputError
from .components import G

__all__ = ["HaloDefinition", "DEFAULT_DEFINITION"]


@dataclass(frozen=True)
class HaloDefinition:
    """The cosmology (an astropy cosmology name) and the overdensity defining r_Delta, M_Delta and V_Delta."""

    cosmology: str = "Planck18"
    overdensity: str = "200c"

    def __post_init__(self):
        from astropy.cosmology import realizations

        if self.cosmology not in realizations.available:
            names = ", ".join(realizations.available)
            raise InputError(f"unknown cosmology {self.cosmology!r}; choose one astropy knows: {names}")
        if not (self.overdensity == "vir" or re.fullmatch(r"[0-9]+(\.[0-9]+)?[cm]", self.overdensity)):
            raise InputError(f"overdensity {self.overdensity!r} not understood; give e.g. 200c (times critical), "
                             "200m (times the mean matter density) or vir (Bryan & Norman 1998)")
        if self.overdensity != "vir" and float(self.overdensity[:-1]) <= 0:
            raise InputError(f"overdensity {self.overdensity!r} must be positive")

    @cached_property
    def model(self):
        """The astropy cosmology object."""
        from astropy import cosmology as cosmo_module

        return getattr(cosmo_module, self.cosmology)

    @property
    def h0(self) -> float:
        """H0 in km/s/kpc."""
        return float(self.model.H0.to_value(u.km / u.s / u.kpc))

    @property
    def little_h(self) -> float:
        return float(self.model.H0.to_value(u.km / u.s / u.Mpc)) / 100.0

    @property
    def rho_crit(self) -> float:
        """Critical density today, 3 H0^2 / (8 pi G), in M_sun/kpc^3."""
        return 3 * self.h0**2 / (8 * np.pi * G)

    @property
    def delta_crit(self) -> float:
        """The overdensity relative to the critical density."""
        omega_m = float(self.model.Om0)
        if self.overdensity == "vir":
            x = omega_m - 1.0
            return 18 * np.pi**2 + 82 * x - 39 * x**2
        number = float(self.overdensity[:-1])
        return number * (omega_m if self.overdensity.endswith("m") else 1.0)

    def radius_from_speed(self, v_delta):
        """r_Delta (kpc) of a halo whose circular speed at r_Delta is ``v_delta`` (km/s)."""
        return np.asarray(v_delta, float) / (self.h0 * np.sqrt(self.delta_crit / 2.0))

    def mean_density(self) -> float:
        """Delta rho_crit in M_sun/kpc^3: the mean density inside r_Delta."""
        return self.delta_crit * self.rho_crit

    def describe(self) -> str:
        return (f"overdensity {self.overdensity} (Delta = {self.delta_crit:.1f} x critical), {self.cosmology} "
                f"(H0 = {self.h0 * 1000:.2f} km/s/Mpc)")


DEFAULT_DEFINITION = HaloDefinition()
