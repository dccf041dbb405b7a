"""From rotation curve to mass model: baryonic components, dark halos, MOND and empirical relations.

    from tiltedring.massmodel import read_curve, read_components, fit_mass_model, MassModelSettings
    curve = read_curve("fit/curve.ecsv")
    baryons = read_components("components.ecsv")   # v_gas, v_disc, v_bulge for M/L = 1
    result = fit_mass_model(curve, baryons, MassModelSettings(model="burkert"))

The models that can be fitted are named by :func:`model_names`; a new halo is a subclass of
:class:`Halo` offered with :func:`register_halo`. Names are imported on first use, so that the
command line can list the models without importing numerics.
"""

from importlib import import_module

_EXPORTS = {
    "ExponentialDisc": "components", "ThinDisc": "components", "HernquistBulge": "components",
    "PointMass": "components", "TabulatedSpeed": "components",
    "Halo": "halos", "HaloParameter": "halos", "PseudoIsothermal": "halos", "NFW": "halos", "Burkert": "halos",
    "Einasto": "halos", "concentration_mass_relation": "halos",
    "HaloDefinition": "definition",
    "register_halo": "registry", "unregister_halo": "registry", "model_names": "registry", "halo_names": "registry",
    "CurveData": "fitting", "Baryons": "fitting", "MassModelSettings": "fitting", "MassModelResult": "fitting",
    "fit_mass_model": "fitting",
    "read_curve": "io", "read_components": "io", "read_sparc_rotmod": "io", "write_results": "io",
    "mond_speed": "relations", "rar": "relations", "fit_rar": "relations", "fit_btfr": "relations", "BTFRFit": "relations",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name):
    if name in _EXPORTS:
        return getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
    raise AttributeError(f"module 'tiltedring.massmodel' has no attribute {name!r}")


def __dir__():
    return __all__
