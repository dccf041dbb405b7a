"""Cubes as telescope archives write them (CO 1-0 and 2-1, HI): the reader and the moment maps.

Independent references: cubes drawn by tests/independent_cubes.py (scipy Rotation, scipy.special line
integrals; no project code) and written by its ``survey_hdus`` in each flavour; channel velocities from
astropy's Doppler equivalencies (``u.doppler_radio``) and from the numbers written into the header;
moment-1 maps from spectral-cube over a survey-style mask made here with scipy.ndimage (the
hysteresis mask of CO surveys: cores of at least 4 sigma in two adjacent channels grown into the
connected voxels of at least 2 sigma in two adjacent channels, e.g. Leroy et al. 2021, ApJS 255, 19;
from memory), sigma the median absolute deviation of each channel (1.4826 MAD, common practice).
"""

import gzip
import shutil
import warnings

import numpy as np
import pytest
from astropy import units as u
from astropy.io import fits
from astropy.table import Table
from independent_cubes import CO_1_0, CO_2_1, HI_REST, draw_cube, survey_hdus
from scipy import ndimage

from tiltedring.cli import main
from tiltedring.errors import FitCaution
from tiltedring.io.cube import looks_like_cube, read_cube
from tiltedring.io.velocity_fields import make_velocity_maps

BEAM = (4.5, 3.9, 25.0)


@pytest.fixture(scope="module")
def small():
    """A small cube: 32 x 32 pixels, 30 channels of 10 km/s about 4500 km/s (radio)."""
    return draw_cube(shape=(32, 32), n_channels=30, channel_width=10.0, pixel_scale=1.0, beam_pixels=4.5,
                     v_systemic=4500.0, v_flat=120.0, noise=0.01, n_particles=50_000, seed=2)


FLAVOURS = {
    "CO 1-0, FREQ, RESTFRQ, K": dict(spectral="FREQ", rest=CO_1_0),
    "CO 2-1, FREQ, RESTFREQ, Jy/beam, Stokes last": dict(spectral="FREQ", rest=CO_2_1, rest_keyword="RESTFREQ",
                                                          unit="Jy/beam", stokes="last"),
    "CO 1-0, FREQ written in reverse, Stokes before": dict(spectral="FREQ", descending=True, stokes="before"),
    "VRAD m/s, beams table": dict(spectral="VRAD", velocity_unit="m/s", beam_table=True),
    "VRAD km/s, descending, JY/BEAM": dict(spectral="VRAD", velocity_unit="km/s", descending=True, unit="JY/BEAM"),
    "VELO-LSR m/s (AIPS style)": dict(spectral="VELO-LSR", velocity_unit="m/s"),
    "VOPT km/s, 'K (Tmb)'": dict(spectral="VOPT", velocity_unit="km/s", unit="K (Tmb)"),
    "HI, FREQ, NaN border": dict(spectral="FREQ", rest=HI_REST, nan_border=0.8),
}


@pytest.mark.parametrize("name", list(FLAVOURS))
def test_reader_flavours(small, name):
    """Channel velocities increase and equal the drawn radio velocities (FREQ axes: astropy's
    doppler_radio of the written frequencies; velocity axes: the written numbers, to 1e-6 km/s), every
    channel holds the drawn plane (any axis order, Stokes dropped), the beam and unit are read, NaN borders
    stay blank, and the input is untouched."""
    data, velocity, wcs, truth = small
    flavour = FLAVOURS[name]
    hdul = survey_hdus(data, velocity, wcs, beam=BEAM, **flavour)
    before = hdul[0].data.copy()
    cube = read_cube(hdul)
    h = hdul[0].header
    spectral = 3 if "FREQ" in str(h.get("CTYPE3")) or "V" in str(h.get("CTYPE3")) else 4
    if h[f"CTYPE{spectral}"] == "FREQ":
        rest = flavour.get("rest", CO_1_0)
        freq = (h[f"CRVAL{spectral}"] + h[f"CDELT{spectral}"] * (np.arange(velocity.size) + 1 - h[f"CRPIX{spectral}"]))
        expected = np.sort((freq * u.Hz).to_value(u.km / u.s, equivalencies=u.doppler_radio(rest)))
        assert cube.convention == "radio" and cube.rest_frequency == pytest.approx(rest.to_value(u.Hz))
        np.testing.assert_allclose(cube.velocity, expected, rtol=0, atol=1e-6)
    np.testing.assert_allclose(cube.velocity, velocity, rtol=0, atol=1e-4)
    plane = np.array(data[12], np.float32)
    if flavour.get("nan_border"):
        blank = np.isnan(hdul[0].data).reshape(-1, 32, 32)[0]
        assert blank.any() and np.isnan(cube.data[:, blank]).all()
        plane[blank] = np.nan
    np.testing.assert_array_equal(cube.data[12], plane)
    assert (cube.beam.major, cube.beam.minor, cube.beam.position_angle) == pytest.approx(BEAM)
    assert u.Unit(cube.unit) == (u.Jy / u.beam if "J" in flavour.get("unit", "K").upper() else u.K)
    np.testing.assert_array_equal(hdul[0].data, before)


def test_aips_velocity_axes_keep_their_numbers(small):
    """VELO-xxx axes are read as WCSLIB translates the AIPS convention (optical, radio when VELREF > 256;
    Greisen et al. 2006): either way the channel velocities are the numbers written."""
    data, velocity, wcs, _ = small
    hdul = survey_hdus(data, velocity, wcs, spectral="VELO-LSR", velocity_unit="km/s", beam=BEAM)
    assert read_cube(hdul).convention == "optical"
    hdul[0].header["VELREF"] = 257
    cube = read_cube(hdul)
    assert cube.convention == "radio" and cube.frame == "LSRK"
    np.testing.assert_allclose(cube.velocity, velocity, rtol=0, atol=1e-6)


def _gzip(hdul, path):
    plain = path.with_suffix("")
    hdul.writeto(plain)
    with open(plain, "rb") as src, gzip.open(path, "wb") as dst:
        shutil.copyfileobj(src, dst)
    plain.unlink()
    return path


def test_gzip_files_with_a_beams_table(small, tmp_path):
    """A .fits.gz cube (astropy reads it as it is) is recognised as a cube and read with its BEAMS table."""
    data, velocity, wcs, _ = small
    path = _gzip(survey_hdus(data, velocity, wcs, spectral="VRAD", beam=BEAM, beam_table=True),
                 tmp_path / "cube.fits.gz")
    assert looks_like_cube(path)
    cube = read_cube(path)
    assert (cube.beam.major, cube.beam.minor) == pytest.approx(BEAM[:2])
    np.testing.assert_allclose(cube.velocity, velocity, atol=1e-4)


def co_galaxy(channel_width, peak_snr, seed):
    """A CO-like disc filling most of a 64" field (4.5" beam, 1" pixels), noise smoothed by the beam with
    peak S/N ``peak_snr`` per channel (the brightest 1 % of pixels; a few sigma over most of the disc)."""
    clean, velocity, wcs, truth = draw_cube(shape=(64, 64), n_channels=int(560 / channel_width),
                                            channel_width=channel_width, pixel_scale=1.0, beam_pixels=4.5,
                                            position_angle=200.0, inclination=50.0, v_systemic=4500.0,
                                            v_flat=220.0, r_turn=4.0, noise=0.0, disc_radius=40.0,
                                            n_particles=400_000, seed=seed)
    noise = np.percentile(clean.max(axis=0), 99) / peak_snr
    field = ndimage.gaussian_filter(np.random.default_rng(seed).standard_normal(clean.shape), (0, 1.9, 1.9))
    return clean + noise * field / field.std(), velocity, wcs, truth


def survey_mask(data):
    """Hysteresis mask of the module docstring on the cube as it is (no smoothing)."""
    sigma = np.array([1.4826 * np.nanmedian(np.abs(p - np.nanmedian(p))) for p in data])
    ratio = np.nan_to_num(data / sigma[:, None, None])

    def adjacent(above):
        both = above[1:] & above[:-1]
        out = np.zeros_like(above)
        out[1:] |= both
        out[:-1] |= both
        return out

    wings, _ = ndimage.label(adjacent(ratio >= 2.0), structure=np.ones((3, 3, 3), bool))
    seeds = np.unique(wings[adjacent(ratio >= 4.0)])
    return np.isin(wings, seeds[seeds > 0])


@pytest.mark.parametrize("channel_width, peak_snr, flavour", [
    (2.5, 8.0, dict(spectral="FREQ", rest=CO_2_1, stokes="last", nan_border=0.95)),
    (10.0, 5.0, dict(spectral="VRAD", velocity_unit="m/s", descending=True, beam_table=True, nan_border=0.95)),
    (20.0, 15.0, dict(spectral="VOPT", velocity_unit="km/s", unit="Jy/beam", nan_border=0.95)),
])
def test_moment_map_against_a_survey_moment_map(tmp_path, channel_width, peak_snr, flavour):
    """`--velocity-kind moment` against spectral-cube's moment 1 over a survey-style mask, on CO-like cubes
    that fill most of the field at low S/N per channel, written as .fits.gz in several flavours. Issue 16
    asks for 5 km/s (median) against a survey's own map; measured 2.9-3.7 km/s here. Our map covers at
    least 80 % of the survey map's pixels. No channel is taken for a foreground."""
    from spectral_cube import SpectralCube

    data, velocity, wcs, truth = co_galaxy(channel_width, peak_snr, seed=int(channel_width * 10))
    beam = (truth["beam"], truth["beam"], 0.0)
    path = _gzip(survey_hdus(data, velocity, wcs, beam=beam, **flavour), tmp_path / "co.fits.gz")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        maps = make_velocity_maps(path, kind="moment")
    assert maps.record["mask"]["detected_foreground"] == []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reference = SpectralCube.read(path)  # a velocity axis as written (native units), a FREQ axis in radio velocity
        if flavour["spectral"] == "FREQ":
            reference = reference.with_spectral_unit(u.km / u.s, velocity_convention="radio")
        if reference.spectral_axis[1] < reference.spectral_axis[0]:
            reference = reference[::-1]
        raw = reference.unmasked_data[:].value
        survey = reference.with_mask(survey_mask(raw)).moment1().to_value(u.km / u.s)
    both = np.isfinite(maps.velocity) & np.isfinite(survey)
    assert both.sum() >= 0.8 * np.isfinite(survey).sum() and both.sum() > 200
    difference = np.median(np.abs(maps.velocity - survey)[both])
    assert difference < 5.0, difference


def test_fit_a_co_cube_recovers_its_geometry(tmp_path):
    """`tiltedring fit CUBE.fits.gz` with no option on a CO 2-1 cube (FREQ axis, RESTFREQ, degenerate
    Stokes axis, NaN border, 5 km/s channels, peak S/N 8 per channel) gives back the drawn position
    angle (within 3 deg), centre (within a quarter of the 4.5" beam) and systemic velocity (within half
    a channel). Tolerances ours; measured 0.4 deg, 0.2", 0.2 km/s (another noise draw: 0.7 deg, 0.9",
    1.9 km/s)."""
    data, velocity, wcs, truth = co_galaxy(5.0, 8.0, seed=21)
    beam = (truth["beam"], truth["beam"], 0.0)
    path = _gzip(survey_hdus(data, velocity, wcs, spectral="FREQ", rest=CO_2_1, rest_keyword="RESTFREQ",
                             stokes="last", nan_border=0.95, beam=beam), tmp_path / "co21.fits.gz")
    out = tmp_path / "fit"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        assert main(["fit", str(path), "--resamples", "0", "--no-report", "--out", str(out), "-q"]) == 0
    rings = Table.read(out / "rings.ecsv", format="ascii.ecsv")
    pa = np.median(rings["position_angle"])
    assert abs((pa - truth["position_angle"] + 180) % 360 - 180) < 3.0, pa
    offset = np.hypot(np.median(rings["x_center"]) - truth["x_center"], np.median(rings["y_center"]) - truth["y_center"])
    assert offset * truth["pixel_scale"] < 0.25 * truth["beam"], offset
    assert abs(np.median(rings["v_systemic"]) - truth["v_systemic"]) < 2.5
    with fits.open(out / "maps" / "velocity.fits") as hdul:
        assert hdul[0].header["RESTFRQ"] == pytest.approx(CO_2_1.to_value(u.Hz))
