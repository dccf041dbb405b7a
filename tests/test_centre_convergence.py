"""The all-pixel centre fit converges: three starts give one centre, within its error of the truth.

Field drawn by the independent generator (tests/independent_fields.py: scipy Rotation particles and astropy
WCS, not the project's projection code); the model's analytic derivatives are checked against central finite
differences (numerical derivative: common practice)."""

import warnings

import numpy as np
import pytest

import tiltedring as tr
from independent_fields import draw_field
from tiltedring.errors import FitCaution
from tiltedring.pipeline.centre import CentreFit, centre_model, check_against_rings, refine_centre
from tiltedring.pipeline.inputs import valid_pixels

STARTS = [(1.5, -1.5, 5.0), (-1.5, 1.5, -5.0), (1.5, 1.5, 0.0)]


@pytest.fixture(scope="module")
def large_field():
    hdul, truth = draw_field(40.0, 60.0, shape=(320, 320), beam_pixels=5.0, noise=5.0, seed=4,
                             n_particles=3_000_000, r_turn=20.0)
    velocity = hdul[0].data.astype(float)
    error = np.where(np.isfinite(velocity), 5.0, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        vmap = tr.read_velocity_map(hdul[0], error=(error, hdul[0].header))
    radii = np.linspace(2.0, truth["disc_radius"], 30)
    rings = {"radius": radii, "v_rotation": truth["v_rotation"](radii), "position_angle": truth["position_angle"],
             "inclination": truth["inclination"]}
    return vmap, truth, rings


def _start(truth, dx, dy, dv):
    return {"x_center": truth["x_center"] + dx, "y_center": truth["y_center"] + dy,
            "v_systemic": truth["v_systemic"] + dv, "position_angle": truth["position_angle"],
            "inclination": truth["inclination"]}


def test_three_starts_converge_to_one_centre_near_the_truth(large_field):
    """Starts 1.5 px and 5 km/s off the truth, the true curve held (the old finite-difference fit ended 0.39 px
    apart on a 512 x 512 field, 4.5 times its error):
    every start converges, the centres agree to a tenth of the reported error, and each lies within 3 reported
    errors of the truth (x, y and v_systemic)."""
    vmap, truth, rings = large_field
    fits = [refine_centre(vmap, valid_pixels(vmap), rings, float(rings["radius"][-1]), _start(truth, *s))
            for s in STARTS]
    assert all(f.converged for f in fits)
    for name in ("x_center", "y_center", "v_systemic"):
        values = np.array([f.values[name] for f in fits])
        error = fits[0].errors[name]
        assert 0 < error < (0.5 if name != "v_systemic" else 2.0)
        assert np.ptp(values) < 0.1 * error, name
        assert abs(values[0] - truth[name]) < 3 * error, (name, values[0], truth[name], error)


@pytest.mark.parametrize("with_radial", [False, True])
def test_analytic_derivatives_match_finite_differences(large_field, with_radial):
    """d model / d (x0, y0, v_sys) of centre_model (with and without a radial-speed term) against central
    differences (step 1e-4 px, km/s), away from the ring nodes where dV/dR jumps: agreement to 1e-5 relative to
    the largest derivative."""
    vmap, truth, rings = large_field
    pixels = valid_pixels(vmap)
    x, y = pixels.x[::97], pixels.y[::97]
    radii = np.concatenate([[0.0], rings["radius"]])
    speeds = np.concatenate([[0.0], rings["v_rotation"]])
    radial = -15.0 * np.tanh(radii / 30.0) if with_radial else None
    geometry = (vmap.sky_jacobian, truth["position_angle"], truth["inclination"], radii, speeds, radial)
    centre = _start(truth, 0.3, -0.2, 0.0)
    _, jacobian, radius, _ = centre_model(x, y, centre, *geometry)
    step = 1e-4
    for col, name in enumerate(("x_center", "y_center", "v_systemic")):
        up, down = dict(centre), dict(centre)
        up[name] += step
        down[name] -= step
        numeric = (centre_model(x, y, up, *geometry)[0] - centre_model(x, y, down, *geometry)[0]) / (2 * step)
        gap = np.min(np.abs(radius[:, None] - radii[None, :]), axis=1)
        smooth = gap > 0.05
        scale = np.max(np.abs(numeric[smooth]))
        np.testing.assert_allclose(jacobian[smooth, col], numeric[smooth], atol=1e-5 * scale)


def test_error_floor_when_the_error_map_is_too_small(large_field):
    """An error map ten times too small (0.5 km/s against 5 km/s of noise): an intrinsic scatter near
    sqrt(5^2 - 0.5^2) ~ 5 km/s (beam-smoothed noise: its MAD-based rms is that of the map, within 30 per cent)
    is found and named in a caution, and the centre's errors, from the residuals, stay honest: within 30 per
    cent of those with the right error map, and the truth within 3 of them."""
    vmap, truth, rings = large_field
    small = vmap.__class__(**{**vmap.__dict__, "error": np.where(np.isfinite(vmap.velocity), 0.5, np.nan)})
    fit = refine_centre(small, valid_pixels(small), rings, float(rings["radius"][-1]), _start(truth, 1, 1, 3))
    assert fit.chi2_reduced > 50
    assert fit.intrinsic_scatter == pytest.approx(5.0, rel=0.3)
    assert any("intrinsic scatter" in c for c in fit.cautions)
    right = refine_centre(vmap, valid_pixels(vmap), rings, float(rings["radius"][-1]), _start(truth, 1, 1, 3))
    for name in ("x_center", "y_center", "v_systemic"):
        assert abs(fit.values[name] - truth[name]) < 3 * fit.errors[name]
        assert fit.errors[name] == pytest.approx(right.errors[name], rel=0.3)


def test_fallback_to_the_rings_when_the_global_fit_disagrees():
    """A global v_systemic 12 km/s below rings that agree within 2 km/s (the case of a real map in the issue:
    35 km/s against rings at 40-59): the rings' medians are kept and the reason recorded; a fit that agrees is
    kept."""
    rings = {"x_center": np.array([50.1, 49.9, 50.0, 50.2]), "y_center": np.array([60.0, 60.1, 59.9, 60.0]),
             "v_systemic": np.array([47.0, 49.0, 48.0, 50.0])}
    medians = {"x_center": 50.05, "y_center": 60.0, "v_systemic": 48.5}
    errors = {"x_center": 0.05, "y_center": 0.05, "v_systemic": 0.3}
    bad = CentreFit({"x_center": 50.0, "y_center": 60.05, "v_systemic": 36.0}, dict(errors), converged=True)
    values, found, summary = check_against_rings(bad, rings, medians)
    assert values["v_systemic"] == 48.5 and summary["fallback"] and summary["disagrees_with_rings"] == ["v_systemic"]
    assert "weighted medians" in summary["note"]
    good = CentreFit({"x_center": 50.0, "y_center": 60.05, "v_systemic": 48.2}, dict(errors), converged=True)
    values, found, summary = check_against_rings(good, rings, medians)
    assert values["v_systemic"] == 48.2 and not summary["fallback"] and found == errors
