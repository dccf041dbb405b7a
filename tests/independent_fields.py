"""Velocity maps of thin discs drawn WITHOUT the project's own projection code.

Test particles on circular orbits in a disc plane are tilted and turned onto the sky with
``scipy.spatial.transform.Rotation``, placed on a pixel grid through ``astropy.wcs`` and
``SkyCoord.spherical_offsets_by``, binned into intensity-weighted mean velocities, smoothed by a
Gaussian beam (``scipy.ndimage``) and given beam-correlated noise. Used as the independent
reference in tests and in ``benchmarks/recovery.py``.

Frames: disc (x along the receding major axis, y at azimuth 90 deg, z the disc normal). The disc
is tilted about its x axis by the inclination, then turned about the line of sight by the
position angle, giving (north, east, depth away from us): r_sky = Rz(PA) Rx(i) r_disc. Circular
motion v = v_c (-sin t, cos t, 0) makes the side at t = 0 recede, as the trade's convention has it.
"""

import numpy as np
from astropy import units as u
from astropy.io import fits
from astropy.wcs import WCS
from scipy.ndimage import gaussian_filter
from scipy.spatial.transform import Rotation


def particle_sky(radius, azimuth, v_circ, position_angle, inclination, v_rad=0.0):
    """(east, north) arcsec and line-of-sight velocity of disc particles (azimuth in rad).

    ``position_angle`` and ``inclination`` (deg) may be arrays, one per particle (a warped disc)."""
    pos = np.stack([radius * np.cos(azimuth), radius * np.sin(azimuth), np.zeros_like(radius)], axis=1)
    vel = np.stack([-v_circ * np.sin(azimuth) + v_rad * np.cos(azimuth),
                    v_circ * np.cos(azimuth) + v_rad * np.sin(azimuth), np.zeros_like(radius)], axis=1)
    angles = np.column_stack(np.broadcast_arrays(np.asarray(inclination, float), np.asarray(position_angle, float)))
    rot = Rotation.from_euler("xz", angles if angles.shape[0] > 1 else angles[0], degrees=True)
    sky_pos, sky_vel = rot.apply(pos), rot.apply(vel)
    north, east = sky_pos[:, 0], sky_pos[:, 1]
    return east, north, sky_vel[:, 2]


def grid_wcs(ra, dec, shape, pixel_scale, rotation=0.0):
    ny, nx = shape
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [ra, dec]
    w.wcs.crpix = [nx / 2.0 + 0.5, ny / 2.0 + 0.5]
    c, s = np.cos(np.radians(rotation)), np.sin(np.radians(rotation))
    w.wcs.cd = np.array([[-c, s], [s, c]]) * pixel_scale / 3600.0
    return w


def draw_field(position_angle, inclination, *, shape=(200, 200), pixel_scale=1.0, beam_pixels=4.0, noise=4.0,
               v_flat=200.0, r_turn=12.0, v_systemic=3000.0, centre_offset=(3.3, -2.7), rotation=0.0,
               unit="km/s", seed=0, n_particles=3_000_000, disc_radius=None, ra=210.5, dec=-33.25,
               warp=None, bar=None, v_radial=0.0, scale_length=None, lopsided=0.0):
    """Return (HDUList of the velocity map, truth dict). Rotation curve v_flat tanh(R / r_turn).

    warp: (onset radius arcsec, twist deg, tilt deg) reached linearly at the disc edge.
    bar: (bar radius arcsec, bar angle deg in the disc plane from the receding axis, v_2t, v_2r km/s):
    the bisymmetric flow of Spekkens & Sellwood 2007, tangential v_t - v_2t cos 2(t - angle) and radial
    -v_2r sin 2(t - angle), inside the bar radius (tapered over 5 per cent of it).
    v_radial: a uniform radial velocity (positive outward).
    scale_length: exponential surface density of that scale length (arcsec) instead of a uniform one.
    lopsided: an m = 1 lopsided rotation, v_t (1 + lopsided cos t): the receding half (t = 0) faster."""
    rng = np.random.default_rng(seed)
    ny, nx = shape
    disc_radius = disc_radius or 0.45 * min(shape) * pixel_scale
    if scale_length is None:  # uniform surface density
        radius = disc_radius * np.sqrt(rng.uniform(0, 1, n_particles))
    else:  # exponential surface density: radii from p(R) ~ R exp(-R / h) (CDF 1 - (1 + R/h) exp(-R/h)), cut at the edge
        grid = np.linspace(0.0, disc_radius, 4001)
        cdf = 1.0 - (1.0 + grid / scale_length) * np.exp(-grid / scale_length)
        radius = np.interp(rng.uniform(0, cdf[-1], n_particles), cdf, grid)
    azimuth = rng.uniform(0, 2 * np.pi, n_particles)
    v_c = v_flat * np.tanh(radius / r_turn) * (1.0 + lopsided * np.cos(azimuth))
    v_r = np.full(n_particles, float(v_radial))
    pa_r = np.full(n_particles, float(position_angle))
    inc_r = np.full(n_particles, float(inclination))
    if warp is not None:
        onset, twist, tilt = warp
        frac = np.clip((radius - onset) / (disc_radius - onset), 0, None)
        pa_r += twist * frac
        inc_r += tilt * frac
    if bar is not None:
        r_bar, angle, v2t, v2r = bar
        inside = 1.0 / (1.0 + np.exp((radius - r_bar) / (0.05 * r_bar)))
        tb = 2 * (azimuth - np.radians(angle))
        v_c = v_c - v2t * inside * np.cos(tb)
        v_r = v_r - v2r * inside * np.sin(tb)
    east, north, v_los = particle_sky(radius, azimuth, v_c, pa_r, inc_r, v_rad=v_r)
    wcs = grid_wcs(ra, dec, shape, pixel_scale, rotation)
    centre_pix = np.array([nx / 2.0 - 0.5 + centre_offset[0], ny / 2.0 - 0.5 + centre_offset[1]])
    centre = wcs.pixel_to_world(*centre_pix)
    pts = centre.spherical_offsets_by(east * u.arcsec, north * u.arcsec)
    px, py = wcs.world_to_pixel(pts)
    edges = (np.arange(ny + 1) - 0.5, np.arange(nx + 1) - 0.5)
    counts, _, _ = np.histogram2d(py, px, bins=edges)
    vsum, _, _ = np.histogram2d(py, px, bins=edges, weights=v_los)
    sig = beam_pixels / np.sqrt(8 * np.log(2))
    smooth_n = gaussian_filter(counts, sig, mode="constant")
    smooth_v = gaussian_filter(vsum, sig, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        vel = v_systemic + smooth_v / smooth_n
    noise_map = gaussian_filter(rng.standard_normal(shape), sig, mode="wrap")
    vel = vel + noise * noise_map / noise_map.std()
    vel[(counts == 0) | (smooth_n < 0.2 * np.median(smooth_n[counts > 0]))] = np.nan
    factor = {"km/s": 1.0, "m/s": 1000.0}[unit]
    header = wcs.to_header()
    header["BUNIT"] = unit
    header["BMAJ"] = header["BMIN"] = beam_pixels * pixel_scale / 3600.0
    header["BPA"] = 0.0
    hdul = fits.HDUList([fits.PrimaryHDU((vel * factor).astype(np.float32), header=header)])
    iheader = header.copy()
    iheader["BUNIT"] = "Jy/beam.km/s"
    intensity_hdu = fits.PrimaryHDU(smooth_n.astype(np.float32), header=iheader)
    truth = {"x_center": centre_pix[0], "y_center": centre_pix[1], "v_systemic": v_systemic,
             "position_angle": position_angle % 360.0, "inclination": inclination,
             "v_rotation": lambda r: v_flat * np.tanh(np.asarray(r) / r_turn), "beam": beam_pixels * pixel_scale,
             "ra": float(centre.ra.deg), "dec": float(centre.dec.deg), "disc_radius": disc_radius,
             "intensity_hdu": intensity_hdu}
    if warp is not None:
        onset, twist, tilt = warp
        frac = lambda r: np.clip((np.asarray(r) - onset) / (disc_radius - onset), 0, None)  # noqa: E731
        truth["position_angle_at"] = lambda r: (position_angle + twist * frac(r)) % 360.0
        truth["inclination_at"] = lambda r: inclination + tilt * frac(r)
    return hdul, truth
