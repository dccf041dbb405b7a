"""Spectral cubes of thin discs drawn WITHOUT the project's own code.

Test particles on circular orbits are tilted and turned onto the sky with
``scipy.spatial.transform.Rotation`` (``independent_fields.particle_sky``), placed by a linear
mapping onto the pixel grid of an ``astropy.wcs`` WCS, and each particle's line (a Gaussian of the
gas dispersion about its line-of-sight velocity) is integrated exactly over every channel with
``scipy.special.ndtr``. Each
channel is then smoothed by a Gaussian beam (``scipy.ndimage``) and given white noise. A narrow,
spatially extended foreground line can be added. The spectral axis is written as a FITS velocity
(VRAD) or frequency (FREQ) axis; frequencies come from astropy's Doppler equivalencies.
"""

import numpy as np
from astropy import units as u
from astropy.io import fits
from scipy.ndimage import gaussian_filter
from scipy.special import ndtr

from independent_fields import grid_wcs, particle_sky

HI_REST = 1420.405751768 * u.MHz


def draw_cube(*, shape=(64, 64), n_channels=80, channel_width=5.0, v_start=None, pixel_scale=4.0, beam_pixels=3.5,
              position_angle=120.0, inclination=55.0, v_systemic=1200.0, v_flat=160.0, r_turn=8.0, dispersion=10.0,
              noise=0.02, foreground=None, disc_radius=None, n_particles=400_000, seed=1, ra=150.0, dec=30.0,
              skew_profile=None, exponential_surface=False):
    """Return (data (channel, y, x) in K, channel velocities km/s, celestial WCS, truth dict).

    Rotation curve v_flat tanh(R / r_turn) (a steep inner rise for small r_turn); surface density
    from radii drawn exponentially with scale length disc_radius / 3 (a surface density exp(-R/h) / R,
    centrally cusped), or with ``exponential_surface`` an exponential disc exp(-R/h) (radii from the gamma
    distribution of shape 2, p(R) ~ R exp(-R/h)). ``foreground``: (velocity, sigma, peak K) of a
    line covering the whole field (brighter toward one corner)."""
    rng = np.random.default_rng(seed)
    ny, nx = shape
    disc_radius = disc_radius or 0.42 * min(shape) * pixel_scale
    if exponential_surface:
        radius = rng.gamma(2.0, disc_radius / 3.0, 3 * n_particles)
    else:
        radius = rng.exponential(disc_radius / 3.0, 3 * n_particles)
    radius = radius[radius < disc_radius][:n_particles]
    azimuth = rng.uniform(0, 2 * np.pi, radius.size)
    v_c = v_flat * np.tanh(radius / r_turn)
    east, north, v_los = particle_sky(radius, azimuth, v_c, position_angle, inclination)
    wcs = grid_wcs(ra, dec, shape, pixel_scale)
    x0, y0 = nx / 2.0 - 0.5 + 0.3, ny / 2.0 - 0.5 - 0.4
    # small offsets: a linear sky mapping is exact enough over the field for these tests
    jac_inv = np.linalg.inv(np.array([[-pixel_scale, 0.0], [0.0, pixel_scale]]))
    px = x0 + jac_inv[0, 0] * east + jac_inv[0, 1] * north
    py = y0 + jac_inv[1, 0] * east + jac_inv[1, 1] * north
    ix, iy = np.round(px).astype(int), np.round(py).astype(int)
    inside = (ix >= 0) & (ix < nx) & (iy >= 0) & (iy < ny)
    pixel = (iy * nx + ix)[inside]
    v_part = v_systemic + v_los[inside]
    if v_start is None:
        v_start = v_systemic - 0.5 * (n_channels - 1) * channel_width
    velocity = v_start + channel_width * np.arange(n_channels)
    data = np.zeros((n_channels, ny, nx))
    weight = 1.0 / (radius.size / (nx * ny) * 0.05)
    for k, v in enumerate(velocity):
        frac = _channel_fraction(v, channel_width, v_part, dispersion, skew_profile)
        plane = np.bincount(pixel, weights=frac, minlength=nx * ny).reshape(ny, nx) * weight / channel_width
        data[k] = gaussian_filter(plane, beam_pixels / np.sqrt(8 * np.log(2)), mode="constant")
    if foreground is not None:
        v_fg, s_fg, peak = foreground
        yy, xx = np.mgrid[0:ny, 0:nx]
        amp = peak * (0.5 + 0.5 * (xx + yy) / (nx + ny))
        line = ndtr((velocity + channel_width / 2 - v_fg) / s_fg) - ndtr((velocity - channel_width / 2 - v_fg) / s_fg)
        data += amp[None] * (line / line.max())[:, None, None]
    data += noise * rng.standard_normal(data.shape)
    truth = {"x_center": x0, "y_center": y0, "position_angle": position_angle, "inclination": inclination,
             "v_systemic": v_systemic, "v_flat": v_flat, "r_turn": r_turn, "dispersion": dispersion,
             "beam": beam_pixels * pixel_scale, "pixel_scale": pixel_scale,
             "v_los_map": _v_los_map(shape, x0, y0, pixel_scale, position_angle, inclination, v_systemic, v_flat,
                                     r_turn)}
    return data, velocity, wcs, truth


def _channel_fraction(v, width, centre, sigma, skew_profile):
    """Fraction of each particle's Gaussian line falling in the channel [v - w/2, v + w/2]."""
    if skew_profile is not None:
        return skew_profile(v - width / 2 - centre, v + width / 2 - centre)
    return ndtr((v + width / 2 - centre) / sigma) - ndtr((v - width / 2 - centre) / sigma)


def _v_los_map(shape, x0, y0, pixel_scale, pa, inc, vsys, v_flat, r_turn):
    """The unsmeared line-of-sight velocity at each pixel centre, from rotated disc axes."""
    from scipy.spatial.transform import Rotation

    ny, nx = shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    east = -(xx - x0) * pixel_scale
    north = (yy - y0) * pixel_scale
    # sky (north, east, depth) -> disc: inverse of Rz(PA) Rx(i); the sky point is on the disc plane
    rot = Rotation.from_euler("xz", [inc, pa], degrees=True)
    normal = rot.apply([0.0, 0.0, 1.0])
    depth = -(normal[0] * north + normal[1] * east) / normal[2]
    disc = rot.inv().apply(np.column_stack([north.ravel(), east.ravel(), depth.ravel()]))
    r = np.hypot(disc[:, 0], disc[:, 1])
    theta = np.arctan2(disc[:, 1], disc[:, 0])
    v_c = v_flat * np.tanh(r / r_turn)
    vel = rot.apply(np.column_stack([-v_c * np.sin(theta), v_c * np.cos(theta), np.zeros_like(r)]))[:, 2]
    return {"velocity": (vsys + vel).reshape(shape), "radius": r.reshape(shape)}


def cube_hdu(data, velocity, wcs, *, axis="VRAD", unit="K", rest=HI_REST, convention="radio", bmaj_arcsec=None):
    """A FITS HDU of the cube with a linear VRAD/VOPT axis (km/s) or a FREQ axis (Hz) in ``convention``."""
    header = wcs.to_header()
    header["WCSAXES"] = 3
    if axis == "FREQ":
        equiv = {"radio": u.doppler_radio, "optical": u.doppler_optical,
                 "relativistic": u.doppler_relativistic}[convention](rest)
        freq = (velocity * u.km / u.s).to(u.Hz, equivalencies=equiv).value
        header.update(CTYPE3="FREQ", CUNIT3="Hz", CRPIX3=1.0, CRVAL3=freq[0], CDELT3=freq[1] - freq[0],
                      RESTFRQ=rest.to_value(u.Hz), SPECSYS="LSRK")
    else:
        header.update(CTYPE3=axis, CUNIT3="km/s", CRPIX3=1.0, CRVAL3=velocity[0],
                      CDELT3=velocity[1] - velocity[0], RESTFRQ=rest.to_value(u.Hz), SPECSYS="BARYCENT")
    if unit is not None:
        header["BUNIT"] = unit
    if bmaj_arcsec is not None:
        header["BMAJ"] = header["BMIN"] = bmaj_arcsec / 3600.0
        header["BPA"] = 0.0
    return fits.PrimaryHDU(np.asarray(data, np.float32), header=header)


CO_1_0 = 115.2712018 * u.GHz  # rest frequencies of CO J=1-0 and 2-1 (CDMS/JPL line lists; from memory)
CO_2_1 = 230.5380000 * u.GHz


def survey_hdus(data, velocity, wcs, *, spectral="FREQ", rest=CO_1_0, rest_keyword="RESTFRQ", velocity_unit="m/s",
                unit="K", descending=False, stokes=None, beam=(4.5, 3.8, 20.0), beam_table=False, nan_border=None):
    """The cube as a telescope archive might write it: an HDUList (with a BEAMS table when ``beam_table``).

    ``velocity``: the channels' radio velocities (km/s, increasing, the truth). ``spectral``: ``FREQ``
    (frequencies from astropy's radio Doppler equivalency at ``rest``), or ``VRAD``, ``VOPT`` or the
    AIPS-style ``VELO-LSR``, whose CRVAL3/CDELT3 hold the same numbers in ``velocity_unit``.
    ``rest_keyword``: ``RESTFRQ`` or the older ``RESTFREQ``. ``descending``: channels written in the
    reverse order. ``stokes``: None, ``"last"`` (a 4th STOKES axis of length 1) or ``"before"`` (STOKES
    as axis 3, the spectral axis 4th, as some CASA exports have it). ``nan_border``: blank (NaN) every
    pixel farther than this fraction of the half-width from the centre (a primary-beam cut).
    ``beam``: (major, minor arcsec, PA deg) in BMAJ/BMIN/BPA, or per channel in a BEAMS table.
    """
    from astropy.table import Table

    data = np.array(data, dtype=np.float32)
    values = np.asarray(velocity, float)
    if descending:
        data, values = data[::-1], values[::-1]
    if nan_border is not None:
        ny, nx = data.shape[1:]
        yy, xx = np.mgrid[0:ny, 0:nx]
        outside = np.hypot(xx - (nx - 1) / 2, yy - (ny - 1) / 2) > nan_border * min(nx, ny) / 2
        data[:, outside] = np.nan
    header = wcs.to_header()
    if spectral == "FREQ":
        freq = (values * u.km / u.s).to_value(u.Hz, equivalencies=u.doppler_radio(rest))
        axis = dict(CTYPE3="FREQ", CUNIT3="Hz", CRVAL3=freq[0], CDELT3=freq[1] - freq[0], CRPIX3=1.0)
    else:
        scale = (1.0 * u.km / u.s).to_value(u.Unit(velocity_unit))
        axis = dict(CTYPE3=spectral, CUNIT3=velocity_unit, CRVAL3=values[0] * scale,
                    CDELT3=(values[1] - values[0]) * scale, CRPIX3=1.0)
    header["WCSAXES"] = 3
    header.update(axis)
    header[rest_keyword] = rest.to_value(u.Hz)
    if spectral in ("FREQ", "VRAD", "VOPT"):
        header["SPECSYS"] = "LSRK"
    header["BUNIT"] = unit
    if stokes is not None:
        header["WCSAXES"] = 4
        extra = dict(CTYPE="STOKES", CUNIT="", CRVAL=1.0, CDELT=1.0, CRPIX=1.0)
        if stokes == "last":
            header.update({f"{key}4": value for key, value in extra.items()})
            data = data[None]
        else:
            for key, value in extra.items():
                header[f"{key}4"] = header[f"{key}3"]
                header[f"{key}3"] = value
            data = data[:, None]
    if beam_table:
        header["CASAMBM"] = True
    else:
        header["BMAJ"], header["BMIN"], header["BPA"] = beam[0] / 3600.0, beam[1] / 3600.0, beam[2]
    hdus = [fits.PrimaryHDU(data, header=header)]
    if beam_table:
        n = values.size
        table = Table({"BMAJ": np.full(n, beam[0]) * u.arcsec, "BMIN": np.full(n, beam[1]) * u.arcsec,
                       "BPA": np.full(n, beam[2]) * u.deg, "CHAN": np.arange(n, dtype=np.int32),
                       "POL": np.zeros(n, np.int32)})
        hdus.append(fits.BinTableHDU(table, name="BEAMS"))
    return fits.HDUList(hdus)
