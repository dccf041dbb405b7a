"""Beam smearing: the FFT beam against scipy's Gaussian filter, and the corrected inner curve."""

import numpy as np
import pytest
from independent_fields import draw_field
from scipy.ndimage import gaussian_filter

import tiltedring as tr
from tiltedring.fitting.smearing import BeamKernel
from tiltedring.io.maps import Beam


def test_beam_kernel_matches_scipy_gaussian_filter():
    """Reference: scipy.ndimage.gaussian_filter (sigma = FWHM / sqrt(8 ln 2)) on a north-up grid."""
    rng = np.random.default_rng(0)
    img = np.zeros((80, 90))
    img[20:60, 25:70] = rng.uniform(0, 1, (40, 45))
    jac = np.array([[-2.0, 0.0], [0.0, 2.0]])
    kernel = BeamKernel(img.shape, Beam(12.0, 12.0, 0.0), jac)
    ours = kernel(img)
    ref = gaussian_filter(img, 6.0 / np.sqrt(8 * np.log(2)), mode="constant", truncate=6.0)
    np.testing.assert_allclose(ours, ref, atol=1e-6)


def test_elliptical_beam_follows_its_position_angle_on_a_rotated_grid():
    """A point smeared by an elongated beam is longest along the beam's position angle on the sky."""
    img = np.zeros((101, 101))
    img[50, 50] = 1.0
    theta = np.radians(30.0)  # grid rotated: the sky Jacobian carries it
    jac = 1.5 * np.array([[-np.cos(theta), np.sin(theta)], [np.sin(theta), np.cos(theta)]])
    out = BeamKernel(img.shape, Beam(20.0, 6.0, 70.0), jac)(img)
    yy, xx = np.mgrid[0:101, 0:101]
    east, north = np.einsum("ij,jkl->ikl", jac, np.array([xx - 50.0, yy - 50.0]))
    w = np.clip(out, 0, None) / np.clip(out, 0, None).sum()  # FFT round-off leaves tiny negatives
    cov = np.cov(np.vstack([east.ravel(), north.ravel()]), aweights=w.ravel())
    evals, evecs = np.linalg.eigh(cov)
    major = evecs[:, 1]
    pa = np.degrees(np.arctan2(major[0], major[1])) % 180
    assert pa == pytest.approx(70.0, abs=0.5)
    fwhm = np.sqrt(8 * np.log(2) * evals)
    assert fwhm[1] == pytest.approx(20.0, rel=0.02) and fwhm[0] == pytest.approx(6.0, rel=0.05)


@pytest.mark.parametrize("seed", [1, 3])
def test_corrected_inner_curve_recovers_truth_while_uncorrected_is_low(seed, quiet):
    """Independent particle field, steep inner rise (turnover 5 arcsec = half the 10-arcsec beam), intensity
    map given, rings half a beam wide. Between half a beam and 1.5 beams: the fit without correction is
    10-30 per cent low; the corrected curve is within 6 per cent of the truth on average (the target of the
    beam-smearing issue; measured 3.0 and 5.5 per cent for these two seeds); the inclination is not biased
    low by more than 2 deg."""
    hdul, truth = draw_field(65.0, 55.0, seed=seed, beam_pixels=10.0, r_turn=5.0, noise=4.0, n_particles=2_500_000)
    vm = tr.read_velocity_map(hdul, intensity=truth["intensity_hdu"])
    res = tr.fit_velocity_map(vm, ring_width="0.5beam", resamples=0)
    r = res.rings["radius"].value
    sel = (r >= 5.0) & (r <= 15.0)
    v_true = truth["v_rotation"](r[sel])
    smeared = np.mean(res.rings["v_rotation_smeared"].value[sel] / v_true)
    corrected = np.mean(res.rings["v_rotation"].value[sel] / v_true)
    assert 0.70 <= smeared <= 0.90
    assert abs(corrected - 1.0) < 0.06
    assert res.rings["inclination"].value[0] > 55.0 - 2.0
    assert res.diagnostics["beam_smearing"]["corrected"]


def test_without_intensity_map_the_assumption_is_stated(quiet):
    hdul, truth = draw_field(65.0, 55.0, seed=2, beam_pixels=6.0, n_particles=1_000_000)
    res = tr.fit_velocity_map(tr.read_velocity_map(hdul), resamples=0)
    assert "uniform" in res.diagnostics["beam_smearing"]["intensity"]
    assert any("uniform intensity" in c for c in res.cautions)
