"""Velocity fields of invented disc galaxies with known truth, for demos and tests.

A field is drawn on a TAN-projected sky grid (optionally rotated against north): an exponential
intensity disc, a rotation curve ``v_flat (1 - exp(-R / r_turn))``, optional warp (position
angle and inclination changing linearly beyond ``warp_radius``) and radial motion, smoothed by
a circular Gaussian beam as a moment-1 map is (intensity-weighted:
``v_obs = G*(I v) / G*I``), plus beam-correlated noise of a given rms.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from astropy.io import fits
from astropy.wcs import WCS

from .fitting.kinematics import model_field
from .io.maps import Beam, VelocityMap, sky_jacobian_from_wcs

__all__ = ["DiscTruth", "SyntheticField", "make_field", "sky_wcs"]


@dataclass(frozen=True)
class DiscTruth:
    """The true state of an invented disc. Radii in arcsec, angles in deg, velocities in km/s."""

    name: str = "Ashgrove Disc"
    ra: float = 152.3917
    dec: float = -21.6042
    x_center: float = 63.5
    y_center: float = 63.5
    v_systemic: float = 1450.0
    position_angle: float = 40.0
    inclination: float = 60.0
    v_flat: float = 180.0
    r_turn: float = 20.0
    v_radial: float = 0.0
    scale_length: float = 40.0
    warp_radius: float | None = None
    warp_twist: float = 0.0
    warp_tilt: float = 0.0
    disc_radius: float = 120.0

    def rotation(self, radius):
        """True circular speed at disc radius (arcsec)."""
        return self.v_flat * (1.0 - np.exp(-np.asarray(radius, float) / self.r_turn))

    def geometry(self, radius):
        """True (position angle, inclination) at disc radius: constant, then linear beyond the warp radius."""
        radius = np.asarray(radius, float)
        if self.warp_radius is None:
            return np.full(radius.shape, self.position_angle), np.full(radius.shape, self.inclination)
        frac = np.clip((radius - self.warp_radius) / max(self.disc_radius - self.warp_radius, 1e-9), 0, None)
        return self.position_angle + self.warp_twist * frac, self.inclination + self.warp_tilt * frac

    def table(self, radii):
        """Truth at ``radii`` as a dict of columns named like the fit's ring table."""
        pa, inc = self.geometry(radii)
        radii = np.asarray(radii, float)
        return {"radius": radii, "x_center": np.full(radii.shape, self.x_center),
                "y_center": np.full(radii.shape, self.y_center), "v_systemic": np.full(radii.shape, self.v_systemic),
                "position_angle": np.mod(pa, 360.0), "inclination": inc, "v_rotation": self.rotation(radii),
                "v_radial": np.full(radii.shape, self.v_radial)}


@dataclass
class SyntheticField:
    """A drawn field: the map object, FITS HDUs of velocity and intensity, and the truth."""

    velocity_map: VelocityMap
    velocity_hdu: fits.PrimaryHDU
    intensity_hdu: fits.PrimaryHDU
    truth: DiscTruth

    def write(self, folder, stem: str | None = None) -> dict:
        """Write ``STEM_velocity.fits``, ``STEM_intensity.fits`` and ``STEM_truth.ecsv``."""
        from pathlib import Path

        from astropy.table import Table

        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        stem = stem or self.truth.name.lower().replace(" ", "_")
        paths = {"velocity": folder / f"{stem}_velocity.fits", "intensity": folder / f"{stem}_intensity.fits",
                 "truth": folder / f"{stem}_truth.ecsv"}
        self.velocity_hdu.writeto(paths["velocity"], overwrite=True)
        self.intensity_hdu.writeto(paths["intensity"], overwrite=True)
        radii = np.arange(0.0, self.truth.disc_radius + 1e-9, 2.0)
        table = Table(self.truth.table(radii))
        table.meta.update({k: v for k, v in asdict(self.truth).items()})
        table.meta["comment"] = "synthetic galaxy made by tiltedring.synthetic; not a real object"
        table.write(paths["truth"], format="ascii.ecsv", overwrite=True)
        return paths


def sky_wcs(ra, dec, shape, pixel_scale, rotation=0.0, aspect=1.0, x_ref=None, y_ref=None) -> WCS:
    """A TAN WCS centred on (ra, dec) deg; ``rotation`` turns the grid (deg), ``aspect`` = dy/dx pixel size."""
    ny, nx = shape
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [ra, dec]
    w.wcs.crpix = [(nx - 1) / 2.0 + 1 if x_ref is None else x_ref + 1, (ny - 1) / 2.0 + 1 if y_ref is None else y_ref + 1]
    w.wcs.cdelt = [-pixel_scale / 3600.0, aspect * pixel_scale / 3600.0]
    c, s = np.cos(np.radians(rotation)), np.sin(np.radians(rotation))
    w.wcs.pc = [[c, -s], [s, c]]
    w.wcs.cunit = ["deg", "deg"]
    w.array_shape = shape
    return w


def make_field(truth: DiscTruth = DiscTruth(), shape=(128, 128), pixel_scale: float = 2.0,
               beam_fwhm: float | None = 8.0, noise: float = 3.0, seed: int = 0, rotation: float = 0.0,
               velocity_unit: str = "km/s", aspect: float = 1.0, min_intensity: float = 0.0) -> SyntheticField:
    """Draw a synthetic moment-1 map of ``truth`` (see the module docstring).

    ``noise`` is the rms (km/s) of noise correlated on the beam scale; ``seed`` makes it repeatable.
    Pixels beyond ``truth.disc_radius`` or below ``min_intensity`` (relative to the peak) are blank.
    """
    rng = np.random.default_rng(seed)
    wcs = sky_wcs(truth.ra, truth.dec, shape, pixel_scale, rotation, aspect)
    ny, nx = shape
    jac = sky_jacobian_from_wcs(wcs, (nx - 1) / 2.0, (ny - 1) / 2.0)
    step = max(pixel_scale / 2, truth.disc_radius / 400)  # fine enough for the geometry, cheap for big maps
    radii = np.arange(0.0, truth.disc_radius * 1.6 + 2 * pixel_scale, step)
    rings = truth.table(radii)
    velocity = model_field(shape, jac, rings, r_outer=radii[-1])
    yy, xx = np.mgrid[0:ny, 0:nx]
    from .fitting.geometry import assign_to_rings

    _, radius = assign_to_rings(xx.ravel(), yy.ravel(), jac, radii, rings["x_center"], rings["y_center"],
                                rings["position_angle"], rings["inclination"], radii[-1])
    radius = radius.reshape(shape)
    intensity = np.exp(-radius / truth.scale_length)
    intensity[~np.isfinite(radius)] = 0.0
    if beam_fwhm:
        from scipy.ndimage import gaussian_filter

        sig = beam_fwhm / pixel_scale / np.sqrt(8 * np.log(2))
        weighted = gaussian_filter(np.nan_to_num(intensity * velocity), sig, mode="constant")
        smooth_i = gaussian_filter(intensity, sig, mode="constant")
        velocity = weighted / np.where(smooth_i > 0, smooth_i, np.nan)
        intensity = smooth_i
        noise_field = gaussian_filter(rng.standard_normal(shape), sig, mode="wrap")
    else:
        noise_field = rng.standard_normal(shape)
    noise_field *= noise / max(noise_field.std(), 1e-30)
    velocity = velocity + noise_field
    blank = ~np.isfinite(radius) | (radius > truth.disc_radius) | (intensity < min_intensity * np.nanmax(intensity))
    velocity[blank] = np.nan
    factor = {"km/s": 1.0, "m/s": 1000.0}[velocity_unit]
    header = wcs.to_header()
    header["BUNIT"] = velocity_unit
    header["OBJECT"] = truth.name
    header["COMMENT"] = "Synthetic velocity field made by tiltedring.synthetic; not a real galaxy."
    beam = None
    if beam_fwhm:
        beam = Beam(beam_fwhm, beam_fwhm, 0.0)
        header["BMAJ"] = header["BMIN"] = beam_fwhm / 3600.0
        header["BPA"] = 0.0
    vhdu = fits.PrimaryHDU((velocity * factor).astype(np.float32), header=header)
    iheader = header.copy()
    iheader["BUNIT"] = "Jy/beam.km/s" if beam_fwhm else "Jy.km/s"
    ihdu = fits.PrimaryHDU(intensity.astype(np.float32), header=iheader)
    vmap = VelocityMap(velocity=velocity.astype(np.float32).astype(float), sky_jacobian=jac, wcs=wcs,
                       intensity=intensity, beam=beam, source=truth.name,
                       object_name=truth.name)
    return SyntheticField(vmap, vhdu, ihdu, truth)
