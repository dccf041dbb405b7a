"""An estimate of the intrinsic (unsmeared) intensity of a disc for the beam-smearing forward model.

A moment-0 map has been blurred by the beam already; weighting a model by it and smearing again
would blur twice. Instead, an exponential surface-brightness profile in the disc plane,

    I(R) = I_0 exp(-R / h)

(the usual description of disc light and of much of the gas; Freeman 1970, ApJ 160, 811), is
smeared by the beam G and fitted to the map by least squares: for each scale length h the best
I_0 is linear, I_0 = sum(g d) / sum(g g) with g = G * exp(-R / h) and d the map, and h is found by a
bounded one-dimensional search on ln h (Brent's method, scipy.optimize.minimize_scalar). R is the
disc-plane radius of each pixel at the fitted centre, position angle and inclination
(:func:`.geometry.disc_coordinates`). The search is deterministic (fixed bounds and tolerance).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize_scalar

from .geometry import disc_coordinates

__all__ = ["ExponentialProfile", "disc_radius_map", "fit_exponential_profile", "typical_profile"]


@dataclass(frozen=True)
class ExponentialProfile:
    """I_0 exp(-R / h): ``peak`` I_0 (the map's unit), ``scale_length`` h (arcsec), and how it was obtained."""

    peak: float
    scale_length: float
    source: str

    def image(self, radius_map) -> np.ndarray:
        """The profile on a map of disc-plane radii (arcsec)."""
        return self.peak * np.exp(-np.asarray(radius_map, float) / self.scale_length)


def disc_radius_map(shape, sky_jacobian, geometry: dict) -> np.ndarray:
    """Disc-plane radius (arcsec) of every pixel for one ``geometry`` (x_center, y_center, position_angle,
    inclination)."""
    yy, xx = np.indices(shape)
    radius, _, _ = disc_coordinates(xx.ravel(), yy.ravel(), geometry["x_center"], geometry["y_center"],
                                    sky_jacobian, geometry["position_angle"], geometry["inclination"])
    return radius.reshape(shape)


def typical_profile(r_outer: float) -> ExponentialProfile:
    """Without an intensity map: a disc whose edge lies at four scale lengths (optical and gas discs are
    commonly traced to 3-5 scale lengths; common practice), used only as the alternative assumption."""
    return ExponentialProfile(1.0, r_outer / 4.0, "exponential with scale length r_outer / 4 (assumed)")


def fit_exponential_profile(intensity, radius_map, kernel, r_outer: float, beam_fwhm: float) -> ExponentialProfile:
    """The exponential profile whose beam-smeared image fits ``intensity`` best over its finite pixels inside
    ``r_outer`` (module docstring); h searched between a tenth of the beam and ten times ``r_outer``."""
    data = np.asarray(intensity, float)
    use = np.isfinite(data) & (radius_map <= r_outer)
    if use.sum() < 10 or not np.any(data[use] > 0):
        raise ValueError("the intensity map has too few positive pixels inside the disc to fit a profile")
    d = data[use]

    def misfit(log_h):
        g = kernel(np.exp(-radius_map / np.exp(log_h)))[use]
        peak = float(g @ d) / max(float(g @ g), 1e-300)
        return float(np.sum((d - peak * g) ** 2)), peak

    lo, hi = np.log(0.1 * beam_fwhm), np.log(10.0 * r_outer)
    best = minimize_scalar(lambda t: misfit(t)[0], bounds=(lo, hi), method="bounded", options={"xatol": 1e-3})
    h = float(np.exp(best.x))
    return ExponentialProfile(misfit(best.x)[1], h, f"exponential profile of scale length {h:.2f} arcsec fitted to "
                                                    "the intensity map through the beam")
