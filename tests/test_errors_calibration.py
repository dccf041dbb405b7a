"""Do the stated errors cover the truth on mocks drawn by independent code? (fast version of
benchmarks/error_calibration.py, whose 20 x 20 table is in benchmarks/README.md).

The statistic is the error scale s = median(|z|) / 0.6745, z = (fit - truth) / stated error: for
Gaussian errors median(|z|) = 0.6745 (the half-normal's median; textbook), so s = 1 when the errors
are right, s = 1.5 when they are 1.5 times too small and s = 0.67 when they are 1.5 times too large.
The median is used rather than the rms because a few rings of a mock (a bar's end, a warp's onset)
have long tails that an rms would let decide.
"""

import warnings

import numpy as np
import pytest

import tiltedring as tr
from calibration_mocks import MockGeometry, noise_free_field, noisy_hdu, ring_truth

#: four discs (tests/calibration_mocks.py): orientations anywhere, correlated noise 3-7 km/s, a small warp,
#: a weak bisymmetric flow, a uniform radial flow; the beam (2.5 pixels) small against the rise of the curve
GEOMETRIES = (
    MockGeometry(0, 37.0, 48.0, 150.0, 8.0, 2.5, 5.0, 1.0, None, None, 0.0, (1.5, -2.0), 30.0, 96),
    MockGeometry(1, 201.0, 63.0, 210.0, 10.0, 2.5, 7.0, 0.8, (28.0, 5.0, 3.0), None, 0.0, (-2.5, 1.0), 0.0, 96),
    MockGeometry(2, 305.0, 56.0, 120.0, 7.0, 2.5, 3.0, 1.2, None, (12.0, 60.0, 4.0, 2.0), 0.0, (0.5, 3.0), -60.0,
                 96),
    MockGeometry(3, 118.0, 41.0, 180.0, 9.0, 2.5, 6.0, 1.0, None, None, 3.0, (3.0, 0.0), 0.0, 96),
)
HALF_NORMAL_MEDIAN = 0.6745  # median of |z| for z ~ N(0, 1)
CENTRE = ("x_center", "y_center", "v_systemic")


@pytest.fixture(scope="module")
def normalised_errors():
    """(fit - truth) / stated error over 4 geometries x 3 noise realisations, fitted without the
    beam-smearing correction (whose own error is the beam step's to state and is calibrated with it in
    benchmarks/error_calibration.py): of v_rotation per ring beyond two beams (the random, geometry and
    asymmetry parts), and of the centre and systemic velocity per fit."""
    speeds, centre = [], []
    for geometry in GEOMETRIES:
        hdu, truth = noise_free_field(geometry, n_particles=400_000)
        for s in range(3):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = tr.fit_velocity_map(tr.read_velocity_map(noisy_hdu(hdu, geometry, seed=900 + s)),
                                          resamples=10, seed=s, quiet=True, beam_correction=False)
            t = res.rings
            want = ring_truth(truth, t["radius_inner"].value, t["radius_outer"].value)
            v, e = t["v_rotation"].value, t["v_rotation_err"].value
            ok = np.isfinite(v) & np.isfinite(e) & (e > 0) & (t["radius"].value > 2 * truth["beam"])
            speeds.append((v[ok] - want["v_rotation"][ok]) / e[ok])
            centre.append([(t[name].value[0] - truth[name]) / t[f"{name}_err"].value[0] for name in CENTRE])
    return np.concatenate(speeds), np.array(centre)


def _scale(z) -> float:
    return float(np.median(np.abs(z)) / HALF_NORMAL_MEDIAN)


def test_v_rotation_errors_cover_the_truth(normalised_errors):
    """Error scale of v_rotation within 0.75-1.33 (errors 1.5 times too small or too large give 1.5 or 0.67;
    the median of about 100 rings, correlated within each of 4 galaxies, is good to about 15 per cent), at
    least 85 per cent of truths within 2 sigma (95.4 for Gaussian errors; textbook) and the mean normalised
    bias within +/- 0.4. The measured values are printed."""
    z = normalised_errors[0]
    scale, two, bias = _scale(z), np.mean(np.abs(z) <= 2), np.mean(z)
    print(f"v_rotation: error scale {scale:.2f}, 1 sigma {np.mean(np.abs(z) <= 1):.2f}, 2 sigma {two:.2f}, "
          f"bias {bias:+.2f} over {len(z)} rings")
    assert len(z) > 60
    assert 0.75 <= scale <= 1.33
    assert two >= 0.85
    assert abs(bias) <= 0.4


@pytest.mark.xfail(strict=True, reason="known: on these small-beam discs (2.5 pixels, noise smoothed on 0.8-1.2 beams) "
                   "the centre's sandwich errors are about 1.7 times too small (benchmarks/README.md)")
def test_centre_errors_cover_the_truth(normalised_errors):
    """Error scale of the centre (x and y) and systemic velocity pooled over 12 fits (36 values) within
    0.7-1.43 (errors 1.5 times too large give 0.67, 1.5 times too small 1.5; the median of 36 values is good
    to about 20 per cent). Measured 1.72 (x 1.03, y 2.66, v_systemic 1.85): the sandwich counts the noise as
    correlated over one beam area, where noise smoothed on a beam is correlated over two, and these discs
    have little misfit to make up for it (on the calibration benchmark's larger beams it does: there the
    centre's coverage is on target). Strict: the test fails once the errors are right, so the mark must go."""
    z = normalised_errors[1]
    print(f"centre: error scale {_scale(z):.2f} pooled; " +
          ", ".join(f"{n} {_scale(z[:, k]):.2f}" for k, n in enumerate(CENTRE)))
    assert np.all(np.isfinite(z))
    assert 0.7 <= _scale(z) <= 1.43
