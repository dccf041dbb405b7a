"""Spectral cubes of thin discs from analytic line profiles, drawn WITHOUT the project's own code.

Each pixel is split into ``supersample`` x ``supersample`` points. Their sky offsets (east, north) from
the centre come from ``astropy.wcs`` and ``SkyCoord.spherical_offsets_to``; the point of the disc
plane seen there is found with ``scipy.spatial.transform.Rotation`` (disc -> sky is
Rz(position angle) Rx(inclination), giving (north, east, depth away from us), as in
``independent_fields.py``), and its line-of-sight velocity is the depth component of the rotated
circular velocity. Every point emits a Gaussian line of the gas dispersion, sampled on a fine
velocity grid and averaged into channels (binning, not an analytic integral), with an exponential
surface brightness. The points are averaged into pixels, each channel is smoothed by a Gaussian
beam (``scipy.ndimage.gaussian_filter``) and, on request, given noise smoothed by the same beam.
"""

from dataclasses import dataclass

import numpy as np
from astropy import units as u
from astropy.wcs import WCS
from scipy.ndimage import gaussian_filter
from scipy.spatial.transform import Rotation

from independent_fields import grid_wcs

FWHM_TO_SIGMA = 1.0 / np.sqrt(8.0 * np.log(2.0))


@dataclass
class TestCube:
    """The fields of a line cube that the model and the fit read (a stand-in for io.cube.LineCube)."""

    data: np.ndarray
    velocity: np.ndarray
    channel_width: float
    noise: np.ndarray
    beam: object
    wcs: WCS
    sky_jacobian: np.ndarray
    unit: str = "K"
    source: str = "analytic test cube"


def sky_points(wcs, shape, centre_pixel, supersample):
    """(east, north) arcsec of the sub-pixel points of every pixel from ``centre_pixel``, shape (ny, nx, s*s)."""
    ny, nx = shape
    offsets = (np.arange(supersample) + 0.5) / supersample - 0.5
    oy, ox = np.meshgrid(offsets, offsets, indexing="ij")
    y, x = np.mgrid[0:ny, 0:nx]
    px = (x[..., None] + ox.ravel()).ravel()
    py = (y[..., None] + oy.ravel()).ravel()
    centre = wcs.pixel_to_world(*centre_pixel)
    east, north = centre.spherical_offsets_to(wcs.pixel_to_world(px, py))
    return east.to_value(u.arcsec), north.to_value(u.arcsec)


def disc_view(east, north, position_angle, inclination, speed):
    """Disc radius (arcsec) and line-of-sight velocity (km/s, receding positive) of sky points.

    ``speed(radius)`` is the circular speed. The sky point (north, east) is the disc point (x, y, 0)
    with M (x, y, 0) = (north, east, depth): two equations for x, y from the first two rows of M."""
    rot = Rotation.from_euler("xz", [inclination, position_angle], degrees=True)
    m = rot.as_matrix()
    xy = np.linalg.solve(m[:2, :2], np.vstack([north, east]))
    radius = np.hypot(xy[0], xy[1])
    azimuth = np.arctan2(xy[1], xy[0])
    v = speed(radius)
    velocity = np.stack([-v * np.sin(azimuth), v * np.cos(azimuth), np.zeros_like(v)], axis=1)
    return radius, rot.apply(velocity)[:, 2]


def draw_line_cube(*, shape=(96, 96), n_channels=84, channel_width=5.0, pixel_scale=2.0, beam_pixels=3.5,
                   position_angle=62.0, inclination=58.0, v_systemic=1500.0, v_flat=180.0, r_turn=5.0,
                   dispersion=10.0, scale_length=25.0, disc_radius=None, noise=0.0, peak=1.0, supersample=5,
                   fine=10, seed=3, ra=185.0, dec=12.0):
    """Return (TestCube, truth). Rotation curve v_flat tanh(R / r_turn); surface brightness
    peak exp(-R / scale_length) inside ``disc_radius``; ``noise``: rms per channel after beam smoothing."""
    from tiltedring.io.maps import Beam, sky_jacobian_from_wcs

    ny, nx = shape
    disc_radius = disc_radius or 0.44 * min(shape) * pixel_scale
    wcs = grid_wcs(ra, dec, shape, pixel_scale)
    centre_pixel = (nx / 2.0 - 0.5 + 0.35, ny / 2.0 - 0.5 - 0.25)
    east, north = sky_points(wcs, shape, centre_pixel, supersample)
    radius, v_los = disc_view(east, north, position_angle, inclination, lambda r: v_flat * np.tanh(r / r_turn))
    bright = np.where(radius <= disc_radius, peak * np.exp(-radius / scale_length), 0.0)
    v_los = v_los + v_systemic
    velocity = v_systemic - 0.5 * (n_channels - 1) * channel_width + channel_width * np.arange(n_channels)
    samples = (np.arange(fine) + 0.5) / fine - 0.5
    data = np.empty((n_channels, ny, nx))
    norm = 1.0 / (np.sqrt(2 * np.pi) * dispersion)
    beam_sigma = beam_pixels * FWHM_TO_SIGMA
    lit = bright > 0
    for k, centre in enumerate(velocity):
        line = np.zeros(bright.size)
        for f in samples:  # the channel's mean of the line, sampled at ``fine`` velocities
            line[lit] += norm * np.exp(-0.5 * ((centre + f * channel_width - v_los[lit]) / dispersion) ** 2)
        plane = (bright * line / fine).reshape(ny, nx, -1).mean(axis=2)
        data[k] = gaussian_filter(plane, beam_sigma, mode="constant", truncate=5.0)
    rng = np.random.default_rng(seed)
    if noise > 0:
        field = gaussian_filter(rng.standard_normal(data.shape), (0, beam_sigma, beam_sigma), mode="wrap")
        data = data + noise * field / field.std()
    jac = sky_jacobian_from_wcs(wcs, (nx - 1) / 2.0, (ny - 1) / 2.0)
    beam = Beam(beam_pixels * pixel_scale, beam_pixels * pixel_scale, 0.0)
    cube = TestCube(data=data, velocity=velocity, channel_width=channel_width,
                    noise=np.full(n_channels, noise if noise > 0 else 1.0), beam=beam, wcs=wcs, sky_jacobian=jac)
    truth = {"x_center": centre_pixel[0], "y_center": centre_pixel[1], "v_systemic": v_systemic,
             "position_angle": position_angle, "inclination": inclination, "dispersion": dispersion,
             "v_rotation": lambda r: v_flat * np.tanh(np.asarray(r) / r_turn),
             "surface_brightness": lambda r: np.where(np.asarray(r) <= disc_radius,
                                                      peak * np.exp(-np.asarray(r) / scale_length), 0.0),
             "disc_radius": disc_radius, "beam": beam_pixels * pixel_scale}
    return cube, truth


def moment_one(cube, clip=3.0):
    """Intensity-weighted mean velocity per pixel over channels above ``clip`` x noise (NaN where none)."""
    data = cube.data
    bright = data > clip * cube.noise[:, None, None]
    weight = np.where(bright, data, 0.0)
    total = weight.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = (weight * cube.velocity[:, None, None]).sum(axis=0) / total
    mean[bright.sum(axis=0) < 2] = np.nan
    return mean, total * cube.channel_width
