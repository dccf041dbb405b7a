"""The staged fit: options and the named steps from the first guess to the final ring table.

``fit_velocity_map`` is imported on first use, so that reading the option declarations
(:mod:`.options`, used to build the command line) imports no numerics.
"""

from importlib import import_module

__all__ = ["FitOptions", "fit_velocity_map"]
_EXPORTS = {"FitOptions": "options", "fit_velocity_map": "staged"}


def __getattr__(name):
    if name in _EXPORTS:
        return getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
    raise AttributeError(f"module 'tiltedring.pipeline' has no attribute {name!r}")
