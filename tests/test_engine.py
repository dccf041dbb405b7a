"""One ring's least-squares fit: analytic derivatives and exact recovery."""

import numpy as np
import pytest

from tiltedring.errors import InputError
from tiltedring.fitting.engine import RingFitOptions, fit_ring
from tiltedring.fitting.kinematics import ring_model
from tiltedring.fitting.parameters import COUNT, ORIENTATION, SPEEDS, Parameter, mask, vector

P = Parameter

JAC = np.array([[-1.6, 0.5], [0.4, 1.7]])


def _ring_pixels(params, r_in, r_out, noise=0.0, seed=0):
    yy, xx = np.mgrid[0:120, 0:120].astype(float)
    v, _ = ring_model(xx.ravel(), yy.ravel(), params, JAC)
    rng = np.random.default_rng(seed)
    return xx.ravel(), yy.ravel(), v + noise * rng.standard_normal(v.size)


def test_analytic_jacobian_matches_central_differences():
    """Numerical check (central differences, step 1e-5) of every column of the analytic Jacobian."""
    rng = np.random.default_rng(3)
    x, y = rng.uniform(0, 100, 300), rng.uniform(0, 100, 300)
    p = vector({"x_center": 48.0, "y_center": 52.0, "v_systemic": 900.0, "position_angle": 123.0,
                "inclination": 57.0, "v_rotation": 140.0, "v_radial": 15.0})
    _, d = ring_model(x, y, p, JAC)
    for k in Parameter:
        h = np.zeros(COUNT)
        h[k] = 1e-5
        fd = (ring_model(x, y, p + h, JAC)[0] - ring_model(x, y, p - h, JAC)[0]) / 2e-5
        np.testing.assert_allclose(d[:, k], fd, atol=1e-5 * max(1.0, np.abs(fd).max()))


@pytest.mark.parametrize("azimuth_weight", ["none", "abs-cos", "cos-squared"])
def test_exact_model_recovered_from_offset_start(azimuth_weight):
    truth = vector({"x_center": 60.3, "y_center": 58.8, "v_systemic": 1200.0, "position_angle": 215.0,
                    "inclination": 62.0, "v_rotation": 180.0})
    x, y, v = _ring_pixels(truth, 0, 0)
    start = truth + vector({"x_center": 1.5, "y_center": -1.2, "v_systemic": 8.0, "position_angle": -7.0,
                            "inclination": 6.0, "v_rotation": -30.0})
    free = ~mask([P.v_radial])
    options = RingFitOptions(azimuth_weight=azimuth_weight)
    sol = fit_ring(x, y, v, np.ones_like(v), start, free, JAC, 20.0, 30.0, options)
    assert sol.converged
    np.testing.assert_allclose(sol.params[free], truth[free], atol=1e-4)


def _disc(v_rotation=100.0):
    return vector({"x_center": 60.0, "y_center": 60.0, "position_angle": 30.0, "inclination": 50.0,
                   "v_rotation": v_rotation})


def test_halves_and_minor_axis_gap_select_pixels():
    truth = _disc()
    x, y, v = _ring_pixels(truth, 0, 0)
    free = mask([P.v_rotation])
    both = fit_ring(x, y, v, np.ones_like(v), truth, free, JAC, 20.0, 30.0, RingFitOptions(minor_axis_gap=0))
    rec = fit_ring(x, y, v, np.ones_like(v), truth, free, JAC, 20.0, 30.0, RingFitOptions(half="receding",
                                                                                        minor_axis_gap=0))
    wedge = fit_ring(x, y, v, np.ones_like(v), truth, free, JAC, 20.0, 30.0, RingFitOptions(minor_axis_gap=30))
    assert abs(rec.n_pixels - both.n_pixels / 2) < 0.1 * both.n_pixels
    assert wedge.n_pixels < both.n_pixels
    assert rec.params[P.v_rotation] == pytest.approx(100.0) and wedge.params[P.v_rotation] == pytest.approx(100.0)


def test_clipping_removes_outliers():
    truth = _disc()
    x, y, v = _ring_pixels(truth, 0, 0, noise=2.0)
    v = v.copy()
    rng = np.random.default_rng(1)
    bad = rng.choice(v.size, v.size // 20, replace=False)
    v[bad] += 150.0
    free = mask([P.v_systemic, P.v_rotation])
    plain = fit_ring(x, y, v, np.ones_like(v), truth, free, JAC, 20.0, 30.0, RingFitOptions())
    clipped = fit_ring(x, y, v, np.ones_like(v), truth, free, JAC, 20.0, 30.0, RingFitOptions(clip=3.0))
    assert abs(clipped.params[P.v_systemic]) < 1.0 < abs(plain.params[P.v_systemic])
    assert clipped.n_pixels < plain.n_pixels


def test_too_few_pixels_returns_unfitted_ring():
    truth = _disc()
    x, y, v = _ring_pixels(truth, 0, 0)
    sol = fit_ring(x[:5], y[:5], v[:5], np.ones(5), truth, np.ones(COUNT, bool), JAC, 20.0, 30.0)
    assert not sol.converged and np.isnan(sol.errors).all()


def test_bad_options_are_explained():
    with pytest.raises(InputError, match="azimuth weight"):
        RingFitOptions(azimuth_weight="sine")
    with pytest.raises(InputError, match="half"):
        RingFitOptions(half="left")


def test_sign_of_v_rotation_is_kept_when_the_position_angle_is_held():
    """A counter-rotating ring (v_rotation < 0 at the disc's position angle): with the position angle held the
    negative speed is the measurement; with it free the same field is described by PA + 180 and v > 0."""
    truth = _disc(v_rotation=-80.0)
    x, y, v = _ring_pixels(truth, 0, 0)
    start = truth.copy()
    start[P.v_rotation] = 50.0
    held = fit_ring(x, y, v, np.ones_like(v), start, mask([P.v_rotation]), JAC, 20.0, 30.0)
    assert held.params[P.v_rotation] == pytest.approx(-80.0) and held.params[P.position_angle] == pytest.approx(30.0)
    free = fit_ring(x, y, v, np.ones_like(v), start, mask([P.position_angle, P.v_rotation]), JAC, 20.0, 30.0)
    assert free.params[P.v_rotation] == pytest.approx(80.0, abs=1e-4)
    assert free.params[P.position_angle] == pytest.approx(210.0, abs=1e-4)


def test_parameter_groups_and_names():
    """The named groups are what their docstrings say, and names, units and positions agree (the unit
    strings parse with astropy.units)."""
    from astropy import units as u

    from tiltedring.fitting.parameters import CENTRE_AND_SYSTEMIC, GEOMETRY, LINEAR, PARAMETERS, UNITS

    assert PARAMETERS == tuple(p.name for p in sorted(Parameter))
    assert all(u.Unit(UNITS[p.name]) == u.Unit(p.unit) for p in Parameter)
    assert set(GEOMETRY) == {P.x_center, P.y_center, *ORIENTATION}
    assert set(CENTRE_AND_SYSTEMIC) | set(ORIENTATION) | set(SPEEDS) == set(Parameter)
    assert set(LINEAR) == {P.v_systemic, *SPEEDS}
    assert list(np.flatnonzero(mask(["inclination", P.v_rotation]))) == [P.inclination, P.v_rotation]
