"""The rotation-curve product: units, distances, the (1+z) correction, asymmetric drift, error coverage."""

import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u
from astropy.cosmology import Planck18
from astropy.io import fits

import tiltedring as tr
from tiltedring.products.curve import asymmetric_drift, parse_distance
from tiltedring.synthetic import DiscTruth, make_field


@pytest.fixture(scope="module")
def demo_fit():
    import warnings

    from tiltedring.errors import FitCaution

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        field = make_field(DiscTruth(v_systemic=4500.0), seed=5)
        return tr.fit_velocity_map(field.velocity_map, resamples=0)


def test_kpc_radii_against_astropy(demo_fit):
    """R = theta D: checked with astropy units (dimensionless_angles) for a given distance and for the
    angular-diameter distance of Planck18 at a redshift."""
    curve = demo_fit.curve(distance="12.5Mpc")
    expected = (demo_fit.rings["radius"] * 12.5 * u.Mpc).to(u.kpc, equivalencies=u.dimensionless_angles())
    np.testing.assert_allclose(curve.table["radius_kpc"].to_value(u.kpc), expected.value, rtol=1e-12)
    curve = demo_fit.curve(redshift=0.02)
    d_a = Planck18.angular_diameter_distance(0.02)
    expected = (demo_fit.rings["radius"] * d_a).to(u.kpc, equivalencies=u.dimensionless_angles())
    np.testing.assert_allclose(curve.table["radius_kpc"].to_value(u.kpc), expected.value, rtol=1e-12)
    assert parse_distance(12) == 12 * u.Mpc and parse_distance("850kpc") == 0.85 * u.Mpc
    with pytest.raises(tr.InputError, match="not a length"):
        parse_distance("12 km/s")


def test_rest_frame_correction(demo_fit):
    """Line-of-sight velocity differences are stretched by (1 + z), z = v_sys / c (astropy.constants.c)."""
    curve = demo_fit.curve()
    z = np.nanmedian(demo_fit.rings["v_systemic"].to_value(u.km / u.s)) / const.c.to_value(u.km / u.s)
    np.testing.assert_allclose(curve.table["v_rotation"].value, demo_fit.rings["v_rotation"].value / (1 + z))
    assert curve.meta["rest_frame_correction"]["z"] == pytest.approx(z)


def test_asymmetric_drift_formula_exponential_disc():
    """Isotropic gas in an exponential disc with constant dispersion: d ln(Sigma sigma^2)/d ln R = -R/h, so
    v_c^2 = v_rot^2 + sigma^2 R / h (Binney & Tremaine 2008 eq. 4.228 with sigma_R = sigma_phi)."""
    r = np.linspace(5, 100, 20)
    h, sigma = 30.0, 12.0
    v_c, drift2 = asymmetric_drift(r, np.full(r.size, 150.0), np.full(r.size, sigma), np.exp(-r / h))
    np.testing.assert_allclose(drift2, sigma**2 * r / h, rtol=1e-8)
    np.testing.assert_allclose(v_c, np.sqrt(150.0**2 + sigma**2 * r / h), rtol=1e-8)


def test_asymmetric_drift_from_a_dispersion_map(quiet):
    """A field with an exponential intensity disc (scale length 30 arcsec) and a uniform 25 km/s dispersion
    map: v_circular = sqrt(v_rotation^2 + sigma^2 R / h) within 3 per cent beyond three beams."""
    truth = DiscTruth(scale_length=30.0, v_flat=80.0, r_turn=15.0)
    field = make_field(truth, beam_fwhm=6.0, noise=2.0, seed=9)
    disp = fits.PrimaryHDU(np.full(field.velocity_hdu.data.shape, 25.0, np.float32), header=field.velocity_hdu.header)
    vm = tr.read_velocity_map(field.velocity_hdu, intensity=field.intensity_hdu, dispersion=disp)
    res = tr.fit_velocity_map(vm, resamples=0)
    curve = res.curve()
    r = curve.table["radius"].value
    far = (r > 18) & (r < 100)
    expected = np.sqrt(curve.table["v_rotation"].value ** 2 + 25.0**2 * r / 30.0)
    np.testing.assert_allclose(curve.table["v_circular"].value[far], expected[far], rtol=0.03)
    assert curve.meta["asymmetric_drift"]["applied"]


def test_curve_needs_intensity_for_asymmetric_drift(quiet):
    field = make_field(seed=4)
    disp = fits.PrimaryHDU(np.full(field.velocity_hdu.data.shape, 20.0, np.float32), header=field.velocity_hdu.header)
    res = tr.fit_velocity_map(tr.read_velocity_map(field.velocity_hdu, dispersion=disp), resamples=0)
    with pytest.raises(tr.InputError, match="intensity map"):
        res.curve()


def test_one_sigma_coverage_of_v_rotation_errors(quiet):
    """Over 8 noise realisations of one synthetic disc (beam-correlated noise 4 km/s), the truth lies inside
    the reported 1-sigma interval for about 68 per cent of rings beyond two beams. Accepted: 50-90 per cent
    (binomial scatter of about 100 correlated rings); the measured value is printed."""
    truth = DiscTruth(position_angle=140.0, inclination=58.0)
    inside = []
    for seed in range(8):
        field = make_field(truth, noise=4.0, seed=100 + seed)
        res = tr.fit_velocity_map(field.velocity_map, resamples=10, seed=seed)
        r = res.rings["radius"].value
        far = (r > 16.0) & np.isfinite(res.rings["v_rotation"].value)
        dv = np.abs(res.rings["v_rotation"].value[far] - truth.rotation(r[far]))
        inside.extend(dv <= res.rings["v_rotation_err"].value[far])
    coverage = float(np.mean(inside))
    print(f"measured 1-sigma coverage: {coverage:.2f} over {len(inside)} rings")
    assert 0.5 <= coverage <= 0.9
