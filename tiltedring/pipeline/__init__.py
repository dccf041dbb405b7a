"""The staged fit: options and the named steps from the first guess to the final ring table."""

from .staged import FitOptions, fit_velocity_map

__all__ = ["FitOptions", "fit_velocity_map"]
