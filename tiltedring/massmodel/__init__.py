"""From rotation curve to mass model: baryonic components, dark halos, MOND and empirical relations.

    from tiltedring.massmodel import read_curve, read_components, fit_mass_model, MassModelSettings
    curve = read_curve("fit/curve.ecsv")
    baryons = read_components("components.ecsv")   # v_gas, v_disc, v_bulge for M/L = 1
    result = fit_mass_model(curve, baryons, MassModelSettings(model="burkert"))
"""

from .components import (
           ExponentialDisc,
           HernquistBulge,
           PointMass,
           TabulatedSpeed,
           ThinDisc,
)
from .fitting import (
           MODELS,
           Baryons,
           CurveData,
           MassModelResult,
           MassModelSettings,
           fit_mass_model,
)
from .halos import NFW, Burkert, Einasto, PseudoIsothermal, concentration_prior
from .io import read_components, read_curve, read_sparc_rotmod, write_results
from .relations import fit_btfr, fit_rar, mond_speed, rar

__all__ = ["ExponentialDisc", "ThinDisc", "HernquistBulge", "PointMass", "TabulatedSpeed", "PseudoIsothermal", "NFW",
           "Burkert", "Einasto", "concentration_prior", "CurveData", "Baryons", "MassModelSettings",
           "MassModelResult", "fit_mass_model", "MODELS", "read_curve", "read_components", "read_sparc_rotmod",
           "write_results", "mond_speed", "rar", "fit_rar", "fit_btfr"]
