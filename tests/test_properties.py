"""Property tests (hypothesis) of the projection kernels and ring layouts, and invariances of the fit."""

import numpy as np
import pytest
from astropy.io import fits
from hypothesis import given, settings
from hypothesis import strategies as st

import tiltedring as tr
from tiltedring.fitting.geometry import disc_coordinates, sky_from_disc, wrap_angle
from tiltedring.fitting.kinematics import line_of_sight
from tiltedring.fitting.rings import RingLayout
from tiltedring.synthetic import DiscTruth, make_field

angles = st.floats(-1e4, 1e4, allow_nan=False)
position_angles = st.floats(0, 360, allow_nan=False, exclude_max=True)
inclinations = st.floats(5, 85)


@given(angles)
def test_wrapped_angles_lie_in_range(a):
    w = wrap_angle(a)
    assert 0 <= w < 360
    assert np.isclose(np.cos(np.radians(w)), np.cos(np.radians(a)), atol=1e-9)


@settings(max_examples=60, deadline=None)
@given(position_angles, inclinations, st.floats(0.5, 200), st.floats(0, 360, exclude_max=True),
       st.floats(-3, 3), st.floats(0.3, 3))
def test_sky_disc_round_trip(pa, inc, radius, azimuth, rotation, scale):
    c, s = np.cos(rotation), np.sin(rotation)
    jac = scale * np.array([[-c, s], [s, c]])
    x, y = sky_from_disc(np.array([radius]), np.array([azimuth]), 10.0, 20.0, jac, pa, inc)
    r, cos_t, sin_t = disc_coordinates(x, y, 10.0, 20.0, jac, pa, inc)
    assert r[0] == pytest.approx(radius, rel=1e-9)
    assert abs((np.degrees(np.arctan2(sin_t[0], cos_t[0])) - azimuth + 180) % 360 - 180) < 1e-6


@settings(max_examples=40, deadline=None)
@given(position_angles, inclinations, st.floats(-3.1, 3.1))
def test_model_invariant_under_turning_the_pixel_grid(pa, inc, turn):
    """Turning the pixel grid (and its WCS Jacobian with it) leaves the sky, hence v_los, unchanged."""
    rng = np.random.default_rng(0)
    x, y = rng.uniform(-40, 40, 50), rng.uniform(-40, 40, 50)
    jac = np.array([[-1.5, 0.0], [0.0, 1.5]])
    rot = np.array([[np.cos(turn), -np.sin(turn)], [np.sin(turn), np.cos(turn)]])
    xr, yr = rot.T @ np.vstack([x, y])
    kw = dict(x_center=0.0, y_center=0.0, v_systemic=100.0, position_angle=pa, inclination=inc, v_rotation=150.0,
              v_radial=10.0)
    np.testing.assert_allclose(line_of_sight(x, y, jac, **kw), line_of_sight(xr, yr, jac @ rot, **kw), atol=1e-8)


@given(st.floats(0.5, 20), st.floats(20, 500), st.floats(0, 10))
def test_uniform_layouts_are_regular(width, r_max, first):
    if r_max <= first + width:
        return
    lay = RingLayout.uniform(width, r_max, first)
    assert np.all(np.diff(lay.edges) > 0)
    np.testing.assert_allclose(lay.widths, width, rtol=1e-6, atol=1e-5)
    assert lay.edges[0] == pytest.approx(first, abs=1e-6)
    assert abs(lay.edges[-1] - r_max) <= width / 2 + 1e-6


def _fit(hdu):
    return tr.fit_velocity_map(tr.read_velocity_map(hdu), resamples=0)


def test_flipping_the_sense_of_rotation_turns_the_position_angle(quiet):
    """v -> 2 v_sys - v is the same disc seen rotating the other way: PA + 180, same speeds."""
    field = make_field(DiscTruth(position_angle=70.0, inclination=55.0), seed=3)
    hdu = field.velocity_hdu
    flipped = fits.PrimaryHDU(2 * 1450.0 - hdu.data, header=hdu.header)
    a, b = _fit(hdu), _fit(flipped)
    assert abs(((b.geometry()["position_angle"] - a.geometry()["position_angle"] - 180) + 180) % 360 - 180) < 0.3
    np.testing.assert_allclose(b.rings["v_rotation"].value, a.rings["v_rotation"].value, atol=1.0, equal_nan=True)


def test_turning_the_map_by_90_degrees_keeps_the_fit(quiet):
    """The map and its WCS turned by 90 deg on the pixel grid: same position angle on the sky."""
    from astropy.wcs import WCS

    field = make_field(DiscTruth(position_angle=130.0, inclination=60.0), seed=5)
    hdu = field.velocity_hdu
    w = WCS(hdu.header)
    turned = np.rot90(hdu.data)  # new[i, j] = old[j, n - 1 - i]
    n = hdu.data.shape[1]
    w2 = w.deepcopy()
    # pixel mapping: x_old = n - 1 - y_new, y_old = x_new
    pc = w.wcs.get_pc() * w.wcs.cdelt[:, None]
    w2.wcs.cd = pc @ np.array([[0.0, -1.0], [1.0, 0.0]])
    w2.wcs.crpix = [w.wcs.crpix[1], n + 1 - w.wcs.crpix[0]]
    header = w2.to_header()
    header["BUNIT"] = "km/s"
    header["BMAJ"], header["BMIN"], header["BPA"] = hdu.header["BMAJ"], hdu.header["BMIN"], 0.0
    a, b = _fit(hdu), _fit(fits.PrimaryHDU(turned, header=header))
    assert abs((b.geometry()["position_angle"] - a.geometry()["position_angle"] + 180) % 360 - 180) < 0.3
    assert b.geometry()["inclination"] == pytest.approx(a.geometry()["inclination"], abs=0.3)


def test_nearly_blank_map_is_refused():
    field = make_field(seed=1)
    data = np.full(field.velocity_hdu.data.shape, np.nan, np.float32)
    data[60:63, 60:63] = 1450.0
    with pytest.raises(tr.InputError, match="only 9 valid pixels"):
        _fit(fits.PrimaryHDU(data, header=field.velocity_hdu.header))


def test_same_command_twice_gives_identical_outputs(tmp_path, demo_fields):
    from tiltedring.cli import main

    outs = []
    for k in range(2):
        out = tmp_path / f"run{k}"
        # without the beam correction, which diverges on this field until issue 14 lands (its unphysical
        # result now exits 1: tests/test_result_sanity.py)
        assert main(["fit", str(demo_fields / "calloway_velocity.fits"), "--resamples", "5", "--no-report",
                     "--no-beam-correction", "--out", str(out), "-q"]) == 0
        outs.append(out)
    for name in ("rings.ecsv", "curve.ecsv", "stage_free.ecsv"):
        assert (outs[0] / name).read_bytes() == (outs[1] / name).read_bytes(), name
    np.testing.assert_array_equal(fits.getdata(outs[0] / "model.fits"), fits.getdata(outs[1] / "model.fits"))
