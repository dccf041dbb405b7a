"""The beam-smearing treatment: demo truth through the command line, thread independence, recovery of a
steep inner rise on an independent disc, the intrinsic-intensity estimate, and the fallback.

Independent references: the demo field's truth table (demo_fields/calloway_truth.ecsv, injected truth);
discs drawn by tests/independent_fields.py (scipy Rotation test particles, an intensity-weighted mean
velocity smoothed by scipy.ndimage.gaussian_filter, not the project's model code).
"""

import numpy as np
import pytest
from astropy.table import Table
from independent_fields import draw_field

import tiltedring as tr
from tiltedring.fitting import smearing


def _truth(demo_fields, name):
    return Table.read(demo_fields / f"{name}_truth.ecsv")


def test_calloway_demo_fit_by_the_command_line_is_within_its_truth(tmp_path, demo_fields):
    """`tiltedring fit` on the Calloway demo field with its intensity map, report on. Truth table: position
    angle 125 deg, inclination 40 deg, the curve at the ring radii. Tolerances (the issue's "done when"): 2 deg,
    3 deg, and beyond two beams 5 km/s or 2 sigma (v_rotation_err). The beam step ran and says what kind of map
    it assumed."""
    import json

    from tiltedring.cli import main

    out = tmp_path / "fit"
    args = ["fit", str(demo_fields / "calloway_velocity.fits"), "--intensity-map",
            str(demo_fields / "calloway_intensity.fits"), "--resamples", "0", "--out", str(out), "-q"]
    assert main(args) == 0
    truth = _truth(demo_fields, "calloway")
    rings = Table.read(out / "rings.ecsv")
    record = json.loads((out / "fit.json").read_text())
    pa = float(np.median(rings["position_angle"]))
    assert abs((pa - truth.meta["position_angle"] + 180) % 360 - 180) < 2.0
    assert abs(float(np.median(rings["inclination"])) - truth.meta["inclination"]) < 3.0
    beam = record["beam_smearing"]["beam_arcsec"][0]
    far = np.asarray(rings["radius"]) > 2 * beam
    v_true = np.interp(np.asarray(rings["radius"])[far], truth["radius"], truth["v_rotation"])
    tolerance = np.fmax(5.0, 2 * np.asarray(rings["v_rotation_err"])[far])
    assert np.all(np.abs(np.asarray(rings["v_rotation"])[far] - v_true) < tolerance)
    assert "moment-1" in record["beam_smearing"]["velocity_map_kind"]
    assert (out / "report.pdf").stat().st_size > 0


def _fit_with_threads(monkeypatch, vmap, threads):
    """The fit with every thread pool of the compiled kernels and the beam's FFTs set to ``threads``."""
    import tiltedring.fitting.cube_model
    import tiltedring.fitting.kinematics
    import tiltedring.fitting.line_profiles
    import tiltedring.fitting.normal_equations
    import tiltedring.fitting.threads

    for module in (tiltedring.fitting.threads, tiltedring.fitting.kinematics, tiltedring.fitting.normal_equations,
                   tiltedring.fitting.cube_model, tiltedring.fitting.line_profiles):
        monkeypatch.setattr(module, "thread_count", lambda: threads)
    plain_call = smearing.BeamKernel.__call__
    monkeypatch.setattr(smearing.BeamKernel, "__call__", lambda self, image, workers=-1: plain_call(self, image,
                                                                                                       threads))
    return tr.fit_velocity_map(vmap, ring_width="0.5beam", resamples=0)


def test_same_numbers_with_one_and_two_threads(monkeypatch, quiet):
    """Project rule: results do not depend on the thread count (exact equality of the corrected curve, its
    beam error and the corrected orientation)."""
    hdul, truth = draw_field(50.0, 60.0, seed=4, shape=(120, 120), beam_pixels=8.0, r_turn=6.0, scale_length=15.0,
                             n_particles=800_000)
    vmap = tr.read_velocity_map(hdul, intensity=truth["intensity_hdu"])
    one = _fit_with_threads(monkeypatch, vmap, 1)
    two = _fit_with_threads(monkeypatch, vmap, 2)
    assert one.diagnostics["beam_smearing"]["corrected"]
    for name in ("v_rotation", "v_rotation_err_beam", "v_rotation_err", "inclination", "position_angle"):
        np.testing.assert_array_equal(one.rings[name].value, two.rings[name].value)


def _smearing_errors(hdul, truth, ring_width):
    """Fit an independent disc with its intensity map; (mean |v / v_true - 1| of the corrected and of the
    uncorrected curve between half a beam and two beams of 8 arcsec, |corrected - uncorrected| and the error
    beyond two beams, the ring table)."""
    res = tr.fit_velocity_map(tr.read_velocity_map(hdul, intensity=truth["intensity_hdu"]), ring_width=ring_width,
                              resamples=0)
    r = res.rings["radius"].value
    v_true = truth["v_rotation"](r)
    corrected, plain = res.rings["v_rotation"].value, res.rings["v_rotation_smeared"].value
    inner, outer = (r >= 4.0) & (r <= 16.0), r > 16.0
    return (np.mean(np.abs(corrected[inner] / v_true[inner] - 1)), np.mean(np.abs(plain[inner] / v_true[inner] - 1)),
            np.abs(corrected - plain)[outer], res.rings["v_rotation_err"].value[outer], res.rings)


@pytest.mark.parametrize("seed", [21, 22])
def test_exponential_disc_with_a_steep_rise_is_recovered_better_than_uncorrected(seed, quiet):
    """Independent particle disc: exponential surface density (scale length 20 arcsec), v = 180 tanh(R / 4),
    a turnover at half the 8-arcsec beam, inclination 50 deg, half-beam rings, its smeared intensity map given.
    Between half a beam and two beams the corrected curve is closer to the truth than the uncorrected one (the
    correction must not make the curve worse) and within 8 per cent on average (the bound set before measuring;
    measured: seed 21 6.9 against 13.0 per cent uncorrected; the issue's 3 per cent target is not met yet, see
    benchmarks/beam_smearing.py); beyond two beams it differs from the uncorrected curve by less than its error
    (the issue's criterion: there the correction may only carry the orientation's move within its error)."""
    hdul, truth = draw_field(130.0, 50.0, seed=seed, beam_pixels=8.0, r_turn=4.0, v_flat=180.0, scale_length=20.0,
                             n_particles=2_000_000)
    error_c, error_u, outer_move, outer_error, rings = _smearing_errors(hdul, truth, "0.5beam")
    assert error_c < error_u
    assert error_c < 0.08
    assert np.all(outer_move < outer_error)
    assert np.all(np.isfinite(rings["v_rotation_err_beam"].value[np.isfinite(rings["v_rotation"].value)]))


def test_steep_rise_at_high_inclination_is_corrected_at_its_centre(quiet):
    """Independent particle disc at low noise (0.5 km/s, so what remains is the method's own error): v = 203
    tanh(R / 4), a turnover at half the 8-arcsec beam, inclination 69 deg, one-beam rings (disc 12 of
    ``benchmarks/beam_smearing.py 16 7 0.5``). A second-difference penalty measured from no correction forced a
    correction linear in radius over the free rings: the rings at 0.5 and 1.5 beams stayed 21 per cent low on
    average (30.6 at the innermost). Measured with the beam's own shape as a free column: 7.0 per cent; the
    bound (12 per cent, set between the two) asks for most of the improvement. Beyond two beams the correction
    moves the curve by less than twice its error (measured: the ring at 2.5 beams, still corrected, moves from
    199.0 to 205.1 km/s, truth 203.0, error 5.7; the rest by at most 1.4 km/s)."""
    hdul, truth = draw_field(133.03, 69.06, seed=19, beam_pixels=8.0, r_turn=4.0, v_flat=203.0, scale_length=15.06,
                             n_particles=2_000_000, centre_offset=(2.2, -1.4), noise=0.5)
    error_c, error_u, outer_move, outer_error, _ = _smearing_errors(hdul, truth, "1beam")
    assert error_c < 0.12
    assert error_c < error_u
    assert np.all(outer_move < 2 * outer_error)


def test_exponential_profile_is_recovered_through_the_beam():
    """The intrinsic-intensity estimate: an exponential disc of particles (scale length 18 arcsec, drawn by
    the independent generator, binned and smoothed by scipy) gives back its scale length within 10 per cent."""
    from tiltedring.fitting.intensity_profile import disc_radius_map, fit_exponential_profile

    hdul, truth = draw_field(30.0, 45.0, seed=5, beam_pixels=8.0, scale_length=18.0, n_particles=2_000_000)
    vmap = tr.read_velocity_map(hdul, intensity=truth["intensity_hdu"])
    geometry = {"x_center": truth["x_center"], "y_center": truth["y_center"], "position_angle": 30.0,
                "inclination": 45.0}
    radius = disc_radius_map(vmap.shape, vmap.sky_jacobian, geometry)
    kernel = smearing.BeamKernel(vmap.shape, vmap.beam, vmap.sky_jacobian)
    profile = fit_exponential_profile(vmap.intensity, radius, kernel, 80.0, vmap.beam.fwhm)
    assert profile.scale_length == pytest.approx(18.0, rel=0.10)


def test_a_correction_that_fits_worse_falls_back_with_a_caution(monkeypatch, quiet):
    """When the corrected disc's smeared model does not fit the data at least as well as the uncorrected
    model (forced here by a threshold no model can meet), the uncorrected curve is kept, fit.json says why and
    the run's cautions say the inner curve is biased low. The bias the correction would have removed becomes
    v_rotation_err_beam (positive inside two beams, and part of the total in quadrature)."""
    from tiltedring.pipeline import beam

    monkeypatch.setattr(beam, "WORSE", -np.inf)
    hdul, truth = draw_field(50.0, 60.0, seed=4, shape=(120, 120), beam_pixels=8.0, r_turn=6.0,
                             n_particles=500_000)
    res = tr.fit_velocity_map(tr.read_velocity_map(hdul), resamples=0)
    section = res.diagnostics["beam_smearing"]
    assert section["corrected"] is False and "worse" in section["fallback"]
    assert "v_rotation_smeared" not in res.rings.colnames
    assert any("not applied" in c for c in res.cautions)
    r = res.rings["radius"].value
    bias = res.rings["v_rotation_err_beam"].value
    inner = (r < 2 * 8.0) & np.isfinite(res.rings["v_rotation"].value)
    assert np.all(bias[inner] > 0)
    total = res.rings["v_rotation_err"].value
    assert np.all(total[inner] >= bias[inner])


def test_inclination_biased_by_the_beam_is_moved_back_and_said_so(quiet):
    """Independent particle disc at 72.5 deg (v = 167 tanh(R / 4), exponential surface density, scale length 23
    arcsec, 8-arcsec beam, one-beam rings): the beam flattens the isovelocity contours and the ring fit reads a
    lower inclination (measured 69.8 deg, more than its error below the truth). The correction may move the
    inclination beyond its error: the corrected inclination is closer to the injected 72.5 deg than the
    uncorrected one and within 1.5 deg of it (bound set before measuring), the correction is applied (no
    fallback), fit.json lists the inclination under geometry_change_beyond_error and a caution says so, and the
    inclination error includes the correction's spread."""
    hdul, truth = draw_field(12.8, 72.5, seed=15, beam_pixels=8.0, r_turn=4.0, v_flat=166.6, scale_length=22.7,
                             n_particles=2_000_000, centre_offset=(2.2, -1.4))
    res = tr.fit_velocity_map(tr.read_velocity_map(hdul, intensity=truth["intensity_hdu"]), ring_width="1beam",
                              resamples=0)
    section = res.diagnostics["beam_smearing"]
    assert section["corrected"] is True
    corrected = float(np.median(res.rings["inclination"].value))
    uncorrected = corrected - section["geometry_change"]["inclination"]
    assert abs(corrected - 72.5) < abs(uncorrected - 72.5)
    assert abs(corrected - 72.5) < 1.5
    assert "inclination" in section["geometry_change_beyond_error"]
    assert any("moved the inclination" in c for c in res.cautions)
    assert np.all(res.rings["inclination_err"].value >= section["geometry_change_error"]["inclination"] - 1e-12)
