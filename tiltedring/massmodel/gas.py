"""The gas disc measured by the tool itself: HI surface density on the fitted rings.

Ring averages of the intensity (moment-0) map at the final geometry, deprojected by cos i, converted
to M_sun/pc^2 when the units allow:

- K km/s: N_HI = 1.823e18 * I  cm^-2 (optically thin HI; e.g. Walter et al. 2008, AJ 136, 2563);
- Jy/beam km/s: first T_B = 1.222e6 S / (nu^2 theta_maj theta_min) K (nu in GHz, beam FWHM in
  arcsec, S in Jy/beam; the Rayleigh-Jeans brightness of a Gaussian beam), nu = 1.420405751 GHz;
- N_HI / 1.2486e20 cm^-2 = Sigma_HI in M_sun/pc^2 (hydrogen atom mass from astropy);
- times the helium factor (default 1.33, as in SPARC; common practice 1.33-1.4) for the gas mass.
"""

from __future__ import annotations

import re

import numpy as np
from astropy import constants as const
from astropy import units as u

from ..errors import InputError
from ..products.curve import ring_statistic

__all__ = ["hi_surface_density", "column_density", "gas_table", "HI_FREQUENCY_GHZ"]

HI_FREQUENCY_GHZ = 1.420405751
_N_PER_MSUN_PC2 = float((1 * u.Msun / u.pc**2 / (const.m_p + const.m_e)).to_value(u.cm**-2))


def column_density(intensity, unit, beam=None):
    """N_HI (cm^-2) from moment-0 values in K km/s or Jy/beam km/s (any spelling astropy reads)."""
    text = re.sub(r"(?i)jy\s*/\s*beam", "Jy beam-1", str(unit)).replace(".", " ")  # FITS habit: Jy/beam.km/s
    lowered = re.sub(r"\bk\b", "K", re.sub(r"\bjy\b", "Jy", text.lower()))  # FITS upper case: JY/BEAM, K
    for attempt in (text, lowered):
        try:
            unit = u.Unit(attempt)
            break
        except ValueError:
            continue
    else:
        raise InputError(f"intensity unit {unit!r} is not a unit astropy can read") from None
    value = np.asarray(intensity, float)
    if unit.is_equivalent(u.K * u.km / u.s):
        return 1.823e18 * value * (1 * unit).to_value(u.K * u.km / u.s)
    if unit.is_equivalent(u.Jy / u.beam * u.km / u.s):
        if beam is None:
            raise InputError("a Jy/beam intensity map needs the beam to give HI column densities")
        t_b = 1.222e6 * value * (1 * unit).to_value(u.Jy / u.beam * u.km / u.s) / (
            HI_FREQUENCY_GHZ**2 * beam.major * beam.minor)
        return 1.823e18 * t_b
    raise InputError(f"intensity unit {unit} cannot be turned into an HI column density; give K km/s or "
                     "Jy/beam km/s")


def hi_surface_density(result, intensity_unit: str | None = None, helium: float = 1.33):
    """(radius arcsec, Sigma_gas M_sun/pc^2) on the fit's rings, deprojected and with helium.

    ``intensity_unit`` defaults to the intensity map's BUNIT."""
    vmap = result.vmap
    if vmap.intensity is None:
        raise InputError("the gas profile needs the intensity (moment-0) map given to the fit")
    intensity_unit = intensity_unit or vmap.intensity_unit
    if not intensity_unit:
        raise InputError("the intensity map has no BUNIT: give its unit (K km/s or Jy/beam km/s)")
    rings = result.rings
    geom = {n: rings[n].value for n in ("x_center", "y_center", "position_angle", "inclination")}
    mean = ring_statistic(vmap.intensity, vmap.sky_jacobian, geom, rings["radius_inner"].value,
                          rings["radius_outer"].value, np.nanmean)
    n_hi = column_density(mean, intensity_unit, vmap.beam) * np.cos(np.radians(geom["inclination"]))
    return rings["radius"].value, helium * n_hi / _N_PER_MSUN_PC2


def gas_table(result, distance_mpc: float, helium: float = 1.33):
    """``gas.ecsv`` content: radius (arcsec, kpc) and the gas surface density (M_sun/pc^2, with helium)."""
    from astropy.table import QTable

    radius, sigma = hi_surface_density(result, helium=helium)
    t = QTable()
    t["radius"] = radius * u.arcsec
    t["radius_kpc"] = (radius * u.arcsec).to_value(u.rad) * distance_mpc * 1000.0 * u.kpc
    t["surface_density_gas"] = sigma * u.Msun / u.pc**2
    t.meta["comment"] = [f"gas = {helium} x HI (helium); deprojected ring averages of the intensity map",
                         "N_HI = 1.823e18 int T_B dv; Jy/beam -> K with the beam at 1.4204 GHz"]
    return t
