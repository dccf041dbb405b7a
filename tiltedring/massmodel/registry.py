"""The mass models by name: every registered dark halo (one :class:`.halos.Halo` class each), MOND, and
``none`` (the baryons alone).

Fitting (:func:`.fitting.fit_mass_model`), the parameters table and the command line's ``--models``
read the names here. This module needs only the standard library, so the command line can list the
models without importing numerics: the package's own halos are registered by the name of their
class in :mod:`.halos` and imported on first use; a halo defined anywhere else is registered with
its class::

    register_halo("cored_power", CoredPowerLaw)      # CoredPowerLaw: a subclass of halos.Halo
"""

from __future__ import annotations

import re
from importlib import import_module

__all__ = ["register_halo", "unregister_halo", "halo_names", "halo_class", "model_names", "OTHER_MODELS"]

_BUILT_IN = {"isothermal": "PseudoIsothermal", "nfw": "NFW", "burkert": "Burkert", "einasto": "Einasto"}
_HALOS: dict = dict(_BUILT_IN)
OTHER_MODELS = ("mond", "none")  # MOND (relations.mond_speed) and the baryons alone
_OTHER_FITTED = ("log10_a0", "ml_disc", "ml_bulge", "log10_ml_disc", "log10_ml_bulge", "distance_factor",
                 "inclination")


def register_halo(key: str, halo_class):
    """Offer ``halo_class`` (a :class:`.halos.Halo` subclass with declared parameters) as the mass model
    ``key`` (a lower-case word, new). Returns the class."""
    from .halos import Halo

    if not isinstance(key, str) or not re.fullmatch(r"[a-z][a-z0-9_]*", key):
        raise ValueError(f"halo name {key!r}: use a lower-case word (letters, digits, underscores)")
    if key in model_names():
        raise ValueError(f"a mass model named {key!r} already exists")
    if not (isinstance(halo_class, type) and issubclass(halo_class, Halo) and halo_class.parameters):
        raise ValueError(f"{halo_class!r} is not a Halo subclass with declared parameters")
    fitted = [p.fitted_name for p in halo_class.parameters]
    if len(set(fitted)) < len(fitted) or set(fitted) & set(_OTHER_FITTED):
        raise ValueError(f"the parameters of {halo_class.__name__} repeat a name or reuse one of {_OTHER_FITTED}")
    for p in halo_class.parameters:
        lower, upper = p.bounds
        if not lower < p.start < upper:
            raise ValueError(f"{halo_class.__name__}.{p.name}: start {p.start} is not inside its bounds {p.bounds}")
    _HALOS[key] = halo_class
    return halo_class


def unregister_halo(key: str) -> None:
    """Withdraw a halo registered with :func:`register_halo` (the package's own halos stay)."""
    if key in _BUILT_IN:
        raise ValueError(f"the built-in halo {key!r} cannot be removed")
    if key not in _HALOS:
        raise ValueError(f"no halo named {key!r} is registered")
    del _HALOS[key]


def halo_names() -> tuple:
    """Names of the registered halos, in registration order."""
    return tuple(_HALOS)


def model_names(include_none: bool = True) -> tuple:
    """Every mass model that can be fitted: the halos, ``mond`` and (unless ``include_none`` is False) ``none``."""
    return halo_names() + tuple(m for m in OTHER_MODELS if include_none or m != "none")


def halo_class(key: str):
    """The :class:`.halos.Halo` subclass of the halo ``key``; None for a model that is not a halo."""
    entry = _HALOS.get(key)
    if isinstance(entry, str):
        return getattr(import_module(".halos", __package__), entry)
    return entry
