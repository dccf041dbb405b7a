"""Reading velocity maps: units, blanks, axes, WCS geometry and every bad input's message."""

import numpy as np
import pytest
from astropy import units as u
from astropy.io import fits
from independent_fields import grid_wcs

from tiltedring.errors import FitCaution, InputError
from tiltedring.io.maps import Beam, parse_velocity_unit, read_velocity_map


def _hdu(data=None, unit="km/s", rotation=0.0, shape=(40, 50), scale=2.0):
    data = np.full(shape, 1000.0, dtype=np.float32) if data is None else data
    header = grid_wcs(150.0, 20.0, shape, scale, rotation).to_header()
    if unit is not None:
        header["BUNIT"] = unit
    return fits.PrimaryHDU(data, header=header)


@pytest.mark.parametrize("spelling,unit", [("km/s", u.km / u.s), ("KM/S", u.km / u.s), ("km s-1", u.km / u.s),
                                           ("m/s", u.m / u.s), ("M/S", u.m / u.s), ("m.s**-1", u.m / u.s),
                                           ("cm/s", u.cm / u.s)])
def test_velocity_unit_spellings_against_astropy(spelling, unit):
    # reference: astropy.units conversion of one unit to km/s
    assert parse_velocity_unit(spelling) == pytest.approx((1 * unit).to_value(u.km / u.s))


def test_m_per_s_map_is_converted_to_km_per_s():
    vm = read_velocity_map(_hdu(np.full((40, 50), 1.5e6, np.float32), unit="m/s"))
    assert np.allclose(vm.velocity, 1500.0)


def test_degenerate_axes_squeezed_and_wcs_kept_celestial():
    hdu = _hdu()
    data = hdu.data[None, None]
    header = hdu.header.copy()
    header["NAXIS"] = 4
    header["CTYPE3"], header["CRVAL3"], header["CDELT3"], header["CRPIX3"] = "VRAD", 0.0, 1.0, 1.0
    header["CTYPE4"], header["CRVAL4"], header["CDELT4"], header["CRPIX4"] = "STOKES", 1.0, 1.0, 1.0
    vm = read_velocity_map(fits.PrimaryHDU(data, header=header))
    assert vm.shape == (40, 50)
    assert vm.wcs.naxis == 2 and vm.wcs.has_celestial


def test_blank_keyword_in_integer_map_becomes_nan():
    data = np.full((40, 50), 1200, dtype=np.int32)
    data[:5] = -999
    hdu = _hdu(data)
    hdu.header["BLANK"] = -999
    vm = read_velocity_map(hdu)
    assert np.isnan(vm.velocity[:5]).all() and np.isfinite(vm.velocity[5:]).all()


def test_inputs_are_not_modified():
    data = np.full((40, 50), 1.5e6, np.float32)
    hdu = _hdu(data.copy(), unit="m/s")
    read_velocity_map(hdu)
    np.testing.assert_array_equal(hdu.data, data)


@pytest.mark.parametrize("rotation,aspect", [(0.0, 1.0), (33.0, 1.0), (-120.0, 1.0), (20.0, 1.6)])
def test_position_angle_on_sky_matches_astropy(rotation, aspect):
    """Directions from the map's local sky Jacobian agree with SkyCoord.position_angle (astropy)."""
    from tiltedring.synthetic import sky_wcs

    wcs = sky_wcs(150.0, 20.0, (60, 60), 1.5, rotation=rotation, aspect=aspect)
    hdu = fits.PrimaryHDU(np.ones((60, 60), np.float32), header=wcs.to_header())
    hdu.header["BUNIT"] = "km/s"
    vm = read_velocity_map(hdu)
    x0, y0 = 29.5, 29.5
    for dx, dy in [(5, 0), (0, 7), (-4, 3), (6, -9)]:
        east, north = vm.sky_offsets(x0 + dx, y0 + dy, x0, y0)
        ours = np.degrees(np.arctan2(east, north)) % 360
        c0, c1 = wcs.pixel_to_world([x0, x0 + dx], [y0, y0 + dy])
        theirs = c0.position_angle(c1).deg % 360
        assert abs(((ours - theirs + 180) % 360) - 180) < 0.01
        assert np.hypot(east, north) == pytest.approx(c0.separation(c1).arcsec, rel=1e-4)


def test_beam_from_header_and_text():
    hdu = _hdu()
    hdu.header["BMAJ"], hdu.header["BMIN"], hdu.header["BPA"] = 10 / 3600, 6 / 3600, 30.0
    vm = read_velocity_map(hdu)
    assert vm.beam == Beam(10.0, 6.0, 30.0)
    # Gaussian beam area pi/(4 ln2) FWHM_a FWHM_b (standard radio astronomy)
    assert vm.pixels_per_beam == pytest.approx(np.pi / (4 * np.log(2)) * 60 / 4.0)
    assert Beam.parse("12") == Beam(12, 12, 0) and Beam.parse("12,8,45") == Beam(12, 8, 45)


# ------------------------------------------------------------------ bad inputs and their messages


def test_not_fits(tmp_path):
    p = tmp_path / "notes.fits"
    p.write_text("this is a text file\n")
    with pytest.raises(InputError, match="not a FITS file"):
        read_velocity_map(p)


def test_truncated_fits(tmp_path):
    p = tmp_path / "cut.fits"
    _hdu().writeto(p)
    raw = p.read_bytes()
    p.write_bytes(raw[: 2880 + 1000])
    with pytest.raises(InputError, match="damaged or truncated"):
        read_velocity_map(p)


def test_no_image(tmp_path):
    p = tmp_path / "table.fits"
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns([fits.Column("a", "E", array=[1.0])])]).writeto(p)
    with pytest.raises(InputError, match="no image HDU"):
        read_velocity_map(p)


def test_image_in_first_extension_is_found(tmp_path):
    p = tmp_path / "ext.fits"
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(_hdu().data, header=_hdu().header)]).writeto(p)
    assert read_velocity_map(p).shape == (40, 50)


def test_real_cube_is_refused():
    hdu = fits.PrimaryHDU(np.ones((12, 40, 50), np.float32))
    hdu.header["BUNIT"] = "km/s"
    with pytest.raises(InputError, match="spectral cube.*moment-1"):
        read_velocity_map(hdu)


def test_no_celestial_wcs_unless_pixel_scale():
    hdu = fits.PrimaryHDU(np.ones((40, 50), np.float32))
    hdu.header["BUNIT"] = "km/s"
    with pytest.raises(InputError, match="no celestial WCS.*--pixel-scale"):
        read_velocity_map(hdu)
    vm = read_velocity_map(hdu, pixel_scale=2.0)
    assert vm.pixel_scale == pytest.approx(2.0) and vm.north_angle == pytest.approx(0.0)


def test_missing_and_unknown_units():
    with pytest.raises(InputError, match="no BUNIT.*--velocity-unit"):
        read_velocity_map(_hdu(unit=None))
    with pytest.raises(InputError, match="not a unit astropy"):
        read_velocity_map(_hdu(unit="furlongs per fortnight?"))
    with pytest.raises(InputError, match="not a velocity"):
        read_velocity_map(_hdu(unit="Jy/beam"))
    assert read_velocity_map(_hdu(unit=None), velocity_unit="km/s").velocity[0, 0] == 1000.0


def test_all_blank():
    with pytest.raises(InputError, match="blank everywhere"):
        read_velocity_map(_hdu(np.full((40, 50), np.nan, np.float32)))


def test_error_map_with_zeros_is_refused():
    err = _hdu(np.zeros((40, 50), np.float32))
    with pytest.raises(InputError, match="zero or negative"):
        read_velocity_map(_hdu(), error=err)


def test_mismatched_shapes_without_wcs():
    a = fits.PrimaryHDU(np.ones((40, 50), np.float32))
    a.header["BUNIT"] = "km/s"
    b = fits.PrimaryHDU(np.ones((30, 30), np.float32))
    with pytest.raises(InputError, match="cannot be aligned"):
        read_velocity_map(a, intensity=b, pixel_scale=1.0)


def test_intensity_on_another_grid_is_reprojected_with_a_note():
    coarse = fits.PrimaryHDU(np.ones((20, 25), np.float32), header=grid_wcs(150.0, 20.0, (20, 25), 4.0).to_header())
    with pytest.warns(FitCaution, match="reprojected"):
        vm = read_velocity_map(_hdu(), intensity=coarse)
    assert vm.intensity.shape == (40, 50)
    assert any("reprojected" in n for n in vm.notes)


def test_infinite_pixels_are_blanked_with_a_note():
    data = np.full((40, 50), 1000.0, np.float32)
    data[3, 3] = np.inf
    with pytest.warns(FitCaution, match="infinite"):
        vm = read_velocity_map(_hdu(data))
    assert np.isnan(vm.velocity[3, 3])
