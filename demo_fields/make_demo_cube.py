"""Regenerate the bundled demo cube: an invented galaxy, Dunmore Disc, observed in HI 21 cm.

    python demo_fields/make_demo_cube.py

Writes ``dunmore_cube.fits`` (64 x 64 pixels x 40 channels, int16 with BSCALE, a frequency axis
in the LSRK frame, K) and ``dunmore_cube_truth.ecsv``. The galaxy, its name and its sky position are
invented. It is drawn by an analytic generator that shares no code with tiltedring: each of 8 x 8
sub-pixels of every pixel is put on the tilted disc with scipy's Rotation, given the line-of-sight
speed of circular rotation and an exponential surface brightness, and its Gaussian line (dispersion
10 km/s) is integrated over every channel with scipy.special.ndtr. Channels are then smoothed by a
Gaussian beam and given white noise. A narrow foreground line at 8 km/s (like local Galactic HI), covering the
whole field, overlaps the approaching side: exclude it with --exclude-velocities=-5:20.
"""

from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from scipy.ndimage import gaussian_filter
from scipy.spatial.transform import Rotation
from scipy.special import ndtr

HERE = Path(__file__).parent
HI_REST = 1420.405751768 * u.MHz
TRUTH = dict(name="Dunmore Disc", ra=247.1125, dec=36.4521, x_center=31.6, y_center=32.3, v_systemic=118.0,
             position_angle=305.0, inclination=58.0, v_flat=150.0, r_turn=12.0, scale_length=40.0,
             disc_radius=110.0, dispersion=10.0, pixel_scale=4.0, beam_fwhm=14.0, channel_width_radio=8.0,
             noise=0.025, foreground_velocity=8.0, foreground_sigma=3.5, foreground_peak=0.6)
SHAPE, CHANNELS, SUB = (64, 64), 40, 8


def rotation_speed(radius):
    return TRUTH["v_flat"] * np.tanh(radius / TRUTH["r_turn"])


def disc_samples():
    """(pixel index, line-of-sight velocity, surface brightness) of every sub-pixel on the disc."""
    ny, nx = SHAPE
    fine_y = (np.arange(ny * SUB) + 0.5) / SUB - 0.5
    fine_x = (np.arange(nx * SUB) + 0.5) / SUB - 0.5
    ys, xs = np.meshgrid(fine_y, fine_x, indexing="ij")
    east = -(xs - TRUTH["x_center"]) * TRUTH["pixel_scale"]
    north = (ys - TRUTH["y_center"]) * TRUTH["pixel_scale"]
    # sky (north, east, depth away) = Rz(PA) Rx(i) disc: the disc's x axis is the receding major axis
    rot = Rotation.from_euler("xz", [TRUTH["inclination"], TRUTH["position_angle"]], degrees=True)
    normal = rot.apply([0.0, 0.0, 1.0])
    depth = -(normal[0] * north + normal[1] * east) / normal[2]
    disc = rot.inv().apply(np.column_stack([north.ravel(), east.ravel(), depth.ravel()]))
    radius, theta = np.hypot(disc[:, 0], disc[:, 1]), np.arctan2(disc[:, 1], disc[:, 0])
    v = rotation_speed(radius)
    v_los = rot.apply(np.column_stack([-v * np.sin(theta), v * np.cos(theta), np.zeros_like(v)]))[:, 2]
    brightness = np.where(radius < TRUTH["disc_radius"], np.exp(-radius / TRUTH["scale_length"]), 0.0)
    pixel = (np.floor(ys + 0.5).astype(int) * nx + np.floor(xs + 0.5).astype(int)).ravel()
    return pixel, TRUTH["v_systemic"] + v_los, brightness / SUB ** 2


def channel_velocities():
    """Radio velocities of the channel centres (km/s), evenly spaced as a frequency axis is."""
    return TRUTH["v_systemic"] + TRUTH["channel_width_radio"] * (np.arange(CHANNELS) - (CHANNELS - 1) / 2.0)


def draw():
    rng = np.random.default_rng(2024)
    ny, nx = SHAPE
    pixel, v_los, weight = disc_samples()
    velocity, width = channel_velocities(), TRUTH["channel_width_radio"]
    sigma_beam = TRUTH["beam_fwhm"] / TRUTH["pixel_scale"] / np.sqrt(8 * np.log(2))
    cube = np.empty((CHANNELS, ny, nx))
    for k, v in enumerate(velocity):
        frac = ndtr((v + width / 2 - v_los) / TRUTH["dispersion"]) - ndtr((v - width / 2 - v_los) / TRUTH["dispersion"])
        plane = np.bincount(pixel, weights=weight * frac / width * 120.0, minlength=ny * nx).reshape(ny, nx)
        cube[k] = gaussian_filter(plane, sigma_beam, mode="constant")
    fg = ndtr((velocity + width / 2 - TRUTH["foreground_velocity"]) / TRUTH["foreground_sigma"]) - ndtr(
        (velocity - width / 2 - TRUTH["foreground_velocity"]) / TRUTH["foreground_sigma"])
    yy, xx = np.mgrid[0:ny, 0:nx]
    patchy = gaussian_filter(rng.standard_normal(SHAPE), 6.0)
    patchy = 0.6 + 0.4 * patchy / np.abs(patchy).max()
    cube += TRUTH["foreground_peak"] * patchy[None] * (fg / fg.max())[:, None, None]
    return cube + TRUTH["noise"] * rng.standard_normal(cube.shape)


def header():
    ny, nx = SHAPE
    wcs = WCS(naxis=3)
    wcs.wcs.ctype = ["RA---SIN", "DEC--SIN", "FREQ"]
    wcs.wcs.cunit = ["deg", "deg", "Hz"]
    freq = (channel_velocities() * u.km / u.s).to(u.Hz, equivalencies=u.doppler_radio(HI_REST)).value
    wcs.wcs.crval = [TRUTH["ra"], TRUTH["dec"], freq[0]]
    wcs.wcs.crpix = [(nx - 1) / 2.0 + 1, (ny - 1) / 2.0 + 1, 1.0]
    wcs.wcs.cdelt = [-TRUTH["pixel_scale"] / 3600.0, TRUTH["pixel_scale"] / 3600.0, freq[1] - freq[0]]
    wcs.wcs.restfrq = HI_REST.to_value(u.Hz)
    wcs.wcs.specsys = "LSRK"
    hdr = wcs.to_header()
    hdr["BUNIT"] = "K"
    hdr["BMAJ"] = hdr["BMIN"] = TRUTH["beam_fwhm"] / 3600.0
    hdr["BPA"] = 0.0
    hdr["OBJECT"] = TRUTH["name"]
    hdr["COMMENT"] = "synthetic HI cube of an invented galaxy (demo_fields/make_demo_cube.py); not a real object"
    return hdr


def main():
    cube = draw()
    hdu = fits.PrimaryHDU(cube.astype(np.float32), header=header())
    hdu.scale("int16", bscale=float(np.abs(cube).max() / 32000.0), bzero=0.0)
    hdu.writeto(HERE / "dunmore_cube.fits", overwrite=True)
    radii = np.arange(0.0, TRUTH["disc_radius"] + 1e-9, 4.0)
    table = Table({"radius": radii, "v_rotation": rotation_speed(radii)})
    table["radius"].unit, table["v_rotation"].unit = u.arcsec, u.km / u.s
    table.meta.update(TRUTH)
    table.meta["comment"] = ("invented galaxy drawn by demo_fields/make_demo_cube.py; velocities radio, LSRK; "
                             "x_center/y_center 0-based pixels; not a real object")
    table.write(HERE / "dunmore_cube_truth.ecsv", format="ascii.ecsv", overwrite=True)
    print("wrote", HERE / "dunmore_cube.fits", HERE / "dunmore_cube_truth.ecsv")


if __name__ == "__main__":
    main()
