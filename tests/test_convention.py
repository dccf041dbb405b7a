"""The Doppler convention of a velocity map: read from its header, given by the user, and the rest-frame
correction of the rotation curve done right for each (check values: astropy.units' doppler_radio,
doppler_optical and doppler_relativistic equivalencies; definitions from the FITS WCS paper III,
Greisen et al. 2006, A&A 446, 747)."""

import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u
from astropy.io import fits

from tiltedring.errors import InputError
from tiltedring.io.conventions import choose_convention, convention_from_header
from tiltedring.products.curve import rest_frame_stretch

C_KMS = const.c.to_value(u.km / u.s)
F0 = 1420405751.768 * u.Hz  # HI rest frequency (standard value)
DOPPLER = {"radio": u.doppler_radio, "optical": u.doppler_optical, "relativistic": u.doppler_relativistic}


def _observed_frequency(z_galaxy, u_kms):
    """Frequency of the line from gas moving at ``u_kms`` along the line of sight in the frame of a galaxy at
    redshift ``z_galaxy``: Doppler factors multiply, 1 + z_obs = (1 + z)(1 + z_u), with the special-relativistic
    1 + z_u = sqrt((1 + b)/(1 - b)) (textbook kinematics)."""
    b = u_kms / C_KMS
    return F0 / ((1 + z_galaxy) * np.sqrt((1 + b) / (1 - b)))


@pytest.mark.parametrize("convention", ["radio", "optical", "relativistic"])
@pytest.mark.parametrize("z_galaxy", [0.01, 0.05, 0.2])
def test_rest_frame_speeds_match_astropy_equivalencies(convention, z_galaxy):
    """A rotation speed of 200 km/s in the galaxy's frame, turned into map velocities by astropy's Doppler
    equivalency of each convention, comes back as 200 km/s after the rest-frame correction (to 1e-6:
    the correction is first order in u/c, the second order is (u/c)^2 ~ 4e-7)."""
    equivalency = DOPPLER[convention](F0)
    speed = 200.0
    v_plus = _observed_frequency(z_galaxy, speed).to_value(u.km / u.s, equivalencies=equivalency)
    v_minus = _observed_frequency(z_galaxy, -speed).to_value(u.km / u.s, equivalencies=equivalency)
    v_sys = _observed_frequency(z_galaxy, 0.0).to_value(u.km / u.s, equivalencies=equivalency)
    z, stretch = rest_frame_stretch(v_sys, convention)
    assert z == pytest.approx(z_galaxy, rel=1e-9)
    assert 0.5 * (v_plus - v_minus) / stretch == pytest.approx(speed, rel=1e-6)


def test_optical_rule_on_a_radio_map_leaves_speeds_low_by_about_2z():
    """REFERENCES.md: applying the optical rule to a radio map leaves speeds low by about 2z."""
    z = 0.01
    v_radio = C_KMS * (1 - 1 / (1 + z))
    _, radio = rest_frame_stretch(v_radio, "radio")
    _, optical_rule = rest_frame_stretch(v_radio, "optical")
    assert radio / optical_rule - 1 == pytest.approx(-2 * z, rel=0.05)


@pytest.mark.parametrize("cards, expected", [
    ({"CTYPE3": "VRAD"}, "radio"), ({"CTYPE3": "VOPT-F2W"}, "optical"), ({"CTYPE3": "VELO-F2V"}, "relativistic"),
    ({"CTYPE3": "FREQ"}, "radio"), ({"CTYPE3": "WAVE"}, "optical"), ({"CTYPE3": "FELO-HEL"}, "optical"),
    ({"CTYPE3": "VELO-LSR", "VELREF": 257}, "radio"), ({"CTYPE3": "VELO-HEL", "VELREF": 2}, "optical"),
    ({"VELREF": 258}, "radio"), ({"VELCONV": "radio", "CTYPE3": "VOPT"}, "radio"), ({}, None),
])
def test_convention_read_from_header(cards, expected):
    """Axis types of FITS WCS paper III (table 1) and the AIPS VELREF rule (paper III section 10.1: +256 radio)."""
    header = fits.Header()
    for key, value in cards.items():
        header[key] = value
    assert convention_from_header(header)[0] == expected


def test_given_convention_wins_and_a_disagreement_is_noted():
    header = fits.Header({"CTYPE3": "VOPT"})
    convention, source, note = choose_convention("radio", header)
    assert convention == "radio" and "given" in source and "optical" in note
    with pytest.raises(InputError, match="give one of radio, optical, relativistic"):
        choose_convention("cz", header)


@pytest.fixture(scope="module")
def radio_fit():
    """A synthetic disc at 4500 km/s whose FITS header says CTYPE3 = VRAD, read and fitted."""
    import warnings

    import tiltedring as tr
    from tiltedring.errors import FitCaution
    from tiltedring.synthetic import DiscTruth, make_field

    field = make_field(DiscTruth(v_systemic=4500.0), seed=5)
    hdu = field.velocity_hdu.copy()
    hdu.header["CTYPE3"] = "VRAD"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        vmap = tr.read_velocity_map(hdu)
        return tr.fit_velocity_map(vmap, resamples=0)


def test_radio_map_corrected_by_one_plus_z_and_stated(radio_fit):
    """Radio convention: rest-frame speed = map speed x (1 + z), 1 + z = 1 / (1 - v_sys / c) (Greisen et al. 2006
    definitions; the factor checked against astropy above); the convention is in curve meta and fit.json."""
    assert radio_fit.vmap.velocity_convention == "radio"
    curve = radio_fit.curve()
    v_sys = float(np.nanmedian(radio_fit.rings["v_systemic"].to_value(u.km / u.s)))
    factor = 1 / (1 - v_sys / C_KMS)
    np.testing.assert_allclose(curve.table["v_rotation"].value, radio_fit.rings["v_rotation"].value * factor)
    assert curve.meta["velocity_convention"]["convention"] == "radio"
    assert "CTYPE3" in curve.meta["velocity_convention"]["source"]
    assert curve.meta["rest_frame_correction"]["convention"] == "radio"
    assert radio_fit.record()["conventions"]["velocity"].startswith("radio convention")
    assert not curve.cautions()


def test_unstated_convention_assumed_optical_with_a_caution(radio_fit):
    """No convention anywhere: optical assumed (speeds divided by 1 + z, z = v_sys / c) and a caution says so."""
    from tiltedring.products.curve import RotationCurve

    vmap = radio_fit.vmap
    saved = vmap.velocity_convention, vmap.convention_source
    try:
        vmap.velocity_convention, vmap.convention_source = None, "not stated"
        curve = RotationCurve.from_fit(radio_fit)
    finally:
        vmap.velocity_convention, vmap.convention_source = saved
    v_sys = float(np.nanmedian(radio_fit.rings["v_systemic"].to_value(u.km / u.s)))
    np.testing.assert_allclose(curve.table["v_rotation"].value,
                               radio_fit.rings["v_rotation"].value / (1 + v_sys / C_KMS))
    assert any("optical (v = cz) assumed" in c and "--velocity-convention" in c for c in curve.cautions())
    given = RotationCurve.from_fit(radio_fit, velocity_convention="relativistic")
    beta = v_sys / C_KMS  # relativistic: stretch 1 - beta^2 = 1 - 2.3e-4, below the 0.1 per cent threshold
    assert beta**2 < 1e-3 and given.meta["rest_frame_correction"] is None
    np.testing.assert_allclose(given.table["v_rotation"].value, radio_fit.rings["v_rotation"].value)
    assert given.meta["velocity_convention"] == {"convention": "relativistic", "source": "given (velocity_convention)"}
