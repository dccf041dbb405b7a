"""The warp decision's geometry profile stays a possible disc geometry (issue 14, item 3: inclination and position
angle in range by construction). Found on the NGC 6946 HI map with half-beam rings: a quadratic beyond the onset,
fitted to nine scattered outer rings, gave the outer rings inclinations down to -832 deg. The bounds are the ring
fit's own (1-89 deg); a position angle turning by half a circle would describe the other side of the disc."""

import numpy as np

from tiltedring.diagnostics.warp import geometry_profile
from tiltedring.fitting.ring_solver import INC_BOUNDS


def _rings(outer_inc, n=20):
    radius = np.arange(1.0, n + 1.0) * 10.0
    pa = np.full(n, 240.0)
    inc = np.full(n, 40.0)
    inc[n - len(outer_inc):] = outer_inc
    errors = np.full(n, 0.5)
    return radius, pa, errors, inc, errors.copy()


def test_steep_outer_fall_never_gives_an_impossible_inclination():
    """Outer ring inclinations (each within the ring fit's bounds) falling as a parabola from 40 to 8 deg, with the
    four outermost rings left out of the test: the adopted profile stays inside the bounds at every ring (a
    quadratic through the tested rings, extrapolated, would reach far below zero at the last ring)."""
    outer = np.clip(40.0 - 2.0 * np.arange(1.0, 10.0) ** 2, 8.0, 89.0)
    radius, pa, pa_err, inc, inc_err = _rings(outer)
    use = np.ones(len(radius), bool)
    use[-4:] = False
    profile = geometry_profile(radius, pa, pa_err, inc, inc_err, use)
    assert np.all(profile.inclination >= INC_BOUNDS[0]) and np.all(profile.inclination <= INC_BOUNDS[1])


def test_a_real_warp_is_still_adopted():
    """A linear tilt of 1.5 deg per ring beyond ring 11 (to 53.5 deg at ring 20) is found and followed; the last
    three rings, left out of the test with wild values, get the profile's value, not their own."""
    outer = 40.0 + 1.5 * np.arange(1.0, 10.0)
    radius, pa, pa_err, inc, inc_err = _rings(outer)
    use = np.ones(len(radius), bool)
    use[-3:] = False
    inc[-3:] = 10.0
    profile = geometry_profile(radius, pa, pa_err, inc, inc_err, use)
    assert profile.summary["detected"]
    np.testing.assert_allclose(profile.inclination[:11], 40.0, atol=0.5)
    np.testing.assert_allclose(profile.inclination[11:], outer, atol=1.0)
