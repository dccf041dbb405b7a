"""The speed-ups give the answers of the plain computation they replace.

Each shortcut is checked against the straightforward way of computing the same thing: pixel
slices against a search over every pixel, the compiled ring fits sharing threads against one ring
at a time on all pixels, the normal-equation solver against numpy's SVD least squares, the
closed-form chi-square tail against scipy.stats (in test_diagnostics), and the first-order fit
response against refitting the perturbed map. Tolerances are ours and stated.
"""

import numpy as np
import pytest

import tiltedring as tr
from tiltedring.fitting.candidates import SortedPixels, ring_members
from tiltedring.fitting.engine import RingFitOptions, fit_ring
from tiltedring.fitting.geometry import disc_coordinates
from tiltedring.fitting.leastsq import weighted_least_squares
from tiltedring.fitting.parameters import COUNT, ORIENTATION, PARAMETERS, Parameter, mask, vector
from tiltedring.pipeline.options import FitOptions
from tiltedring.pipeline.ring_stage import fit_stage_rings
from tiltedring.pipeline.state import StageResult
from tiltedring.pipeline.steps import build_response
from tiltedring.synthetic import DiscTruth, make_field

P = Parameter

JAC = np.array([[-1.6, 0.5], [0.4, 1.7]])


def _warped_rings(n=12):
    """Rings whose centre, position angle and inclination all drift with radius (a warp and a shift)."""
    radii = np.linspace(3.0, 60.0, n)
    table = np.zeros((n, COUNT))
    table[:, P.x_center] = 50.0 + 0.05 * radii
    table[:, P.y_center] = 48.0 - 0.03 * radii
    table[:, P.position_angle] = 30.0 + 0.4 * radii  # 24 deg of twist
    table[:, P.inclination] = 55.0 + 0.2 * radii
    return radii - 2.5, radii + 2.5, table


def test_ring_members_match_a_search_over_every_pixel():
    """Slices of the radius-sorted pixels hold exactly the pixels a full search finds, for a twisted disc."""
    yy, xx = np.mgrid[0:100, 0:100].astype(float)
    x, y = xx.ravel(), yy.ravel()
    pixels = (x, y, np.zeros_like(x), np.ones_like(x))
    inner, outer, table = _warped_rings()
    ordered = SortedPixels(pixels, JAC, table, inner, outer)
    for k, (at, cos_t, _) in enumerate(ring_members(ordered, table)):
        ring = table[k]
        radius, cos_all, _ = disc_coordinates(x, y, ring[P.x_center], ring[P.y_center], JAC, ring[P.position_angle],
                                              ring[P.inclination])
        expected = np.flatnonzero((radius >= inner[k]) & (radius < outer[k]))
        np.testing.assert_array_equal(np.sort(ordered.order[at]), expected)
        np.testing.assert_allclose(np.sort(cos_t), np.sort(cos_all[expected]))


def test_stage_fits_from_slices_equal_one_ring_at_a_time_on_all_pixels(quiet):
    """A stage fitted from narrow candidate slices in threads (widened where a ring reaches a slice's end)
    equals fitting each ring alone with every pixel of the map as its candidates (to 1e-6)."""
    truth = DiscTruth(position_angle=300.0, inclination=58.0, x_center=60.2, y_center=66.1)
    field = make_field(truth, noise=3.0, seed=4)
    vm = tr.read_velocity_map(field.velocity_hdu)
    yy, xx = np.nonzero(vm.valid)
    pixels = (xx.astype(float), yy.astype(float), vm.velocity[vm.valid], np.ones(len(xx)))
    layout = tr.RingLayout.uniform(8.0, 100.0)
    starts = np.zeros((len(layout), COUNT))
    starts[:] = vector({"x_center": 61.0, "y_center": 65.0, "v_systemic": 1445.0, "position_angle": 295.0,
                        "inclination": 52.0, "v_rotation": 150.0})  # a few pixels and degrees off
    free = ~mask([P.v_radial])
    options = RingFitOptions()
    fast = fit_stage_rings(vm, pixels, layout, starts, free, options, wander=0.01)
    for k, sol in enumerate(fast):
        plain = fit_ring(*pixels, starts[k], free, vm.sky_jacobian, layout.inner[k], layout.outer[k], options,
                         vm.pixels_per_beam)
        assert sol.n_pixels == plain.n_pixels
        np.testing.assert_allclose(sol.params, plain.params, rtol=0, atol=1e-6)
        np.testing.assert_allclose(sol.errors, plain.errors, rtol=1e-6, equal_nan=True)


@pytest.mark.parametrize("basis", ["polynomial", "harmonic"])
def test_weighted_least_squares_matches_numpy_lstsq(basis):
    """Against numpy.linalg.lstsq (SVD) on the bases it serves: quadratics in radius (warp profiles, radii to
    500 arcsec) and the seven-term harmonic series (ring harmonics)."""
    rng = np.random.default_rng(len(basis))
    if basis == "polynomial":
        r = rng.uniform(0, 500, 400)
        a = np.column_stack([np.ones_like(r), r - 100.0, (r - 100.0) ** 2])
    else:
        theta = rng.uniform(0, 2 * np.pi, 400)
        a = np.column_stack([np.ones_like(theta)] + [f(m * theta) for m in (1, 2, 3) for f in (np.cos, np.sin)])
    v = a @ rng.normal(size=a.shape[1]) + rng.normal(0, 0.1, len(a))
    w = rng.uniform(0.5, 2.0, len(a))
    coef, cov, chi2 = weighted_least_squares(a, v, w)
    expected, *_ = np.linalg.lstsq(a * w[:, None], v * w, rcond=None)
    np.testing.assert_allclose(coef, expected, rtol=1e-7, atol=1e-12)
    np.testing.assert_allclose(cov, np.linalg.pinv((a * w[:, None]).T @ (a * w[:, None])), rtol=1e-6, atol=1e-15)
    assert chi2 == pytest.approx(np.sum(((v - a @ expected) * w) ** 2), rel=1e-8)


def test_first_order_response_agrees_with_refitting(quiet):
    """The beam-smearing correction and the resampling errors use the fit's first-order response to a change
    of the map. For a smooth change of a few km/s (a ripple across the disc), the predicted stage-final speeds
    and constant geometry agree with actually refitting the changed map (stage centred, then stage final at the
    refitted constant geometry): speeds within 0.05 km/s + 10 per cent of the change; geometry within 0.05 deg +
    10 per cent of the change and within a fifth of its reported error (pixels entering or leaving a ring as the
    geometry moves are what the first-order answer leaves out)."""
    truth = DiscTruth(position_angle=150.0, inclination=62.0)
    field = make_field(truth, noise=2.0, seed=7)
    vm = tr.read_velocity_map(field.velocity_hdu)
    res = tr.fit_velocity_map(vm, beam_correction=False, resamples=0, diagnostics=False)
    layout = res.layout
    yy, xx = np.nonzero(vm.valid)
    pixels = (xx.astype(float), yy.astype(float), vm.velocity[vm.valid], np.ones(len(xx)))
    options = FitOptions(beam_correction=False, resamples=0).ring_options()
    centred = res.stages["centred"]
    starts_b = np.column_stack([np.asarray(centred[name].value, float) if name in centred.colnames
                                else np.zeros(len(centred)) for name in PARAMETERS])
    free_b = mask([*ORIENTATION, P.v_rotation])
    free_c = mask([P.v_rotation])
    sols_b = fit_stage_rings(vm, pixels, layout, starts_b, free_b, options)
    final = res.stages["final"]
    starts_c = np.column_stack([np.asarray(final[name].value, float) if name in final.colnames
                                else np.zeros(len(final)) for name in PARAMETERS])
    sols_c = fit_stage_rings(vm, pixels, layout, starts_c, free_c, options)
    no_flags = [set() for _ in layout.radii]
    centred_stage = StageResult(sols_b, no_flags, starts_b, free_b)
    final_stage = StageResult(sols_c, no_flags, starts_c, free_c)
    used = centred_stage.converged
    constant = [p.name for p in ORIENTATION]
    response = build_response(vm, pixels, layout, options, centred_stage, final_stage, used, constant,
                              float(starts_c[0, P.position_angle]))
    ny, nx = vm.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    ripple = 3.0 * np.sin(xx / 9.0) * np.cos(yy / 13.0) + 2.0 * (xx - nx / 2) / nx
    changed = vm.velocity + ripple
    predicted = response.measure(changed)

    moved = (pixels[0], pixels[1], changed[vm.valid], pixels[3])
    refit_b = fit_stage_rings(vm, moved, layout, starts_b, free_b, options)
    geometry = {}
    for name in constant:
        w = response.weights[name]
        geometry[name] = float(np.sum(w * np.array([s.params[P[name]] for s in refit_b])))
        assert abs(predicted[name] - geometry[name]) < 0.05 + 0.1 * abs(geometry[name] - response.base[name])
        assert abs(predicted[name] - geometry[name]) < 0.2 * res.rings[f"{name}_err"].value[0]
    starts = starts_c.copy()
    for p in ORIENTATION:
        starts[:, p] = geometry[p.name]
    refit_c = np.array([s.params[P.v_rotation] for s in fit_stage_rings(vm, moved, layout, starts, free_c, options)])
    change = np.abs(refit_c - response.observed()["v_rotation"])
    ok = np.isfinite(predicted["v_rotation"])
    assert ok.sum() >= len(layout) - 1
    assert np.all(np.abs(predicted["v_rotation"] - refit_c)[ok] <= 0.05 + 0.1 * change[ok])
    assert np.nanmax(change) > 1.0  # the ripple did move the speeds


@pytest.mark.parametrize("n", [1, 2, 7, 8, 301, 400])
def test_compiled_median_is_the_middle_of_numpy_sort(n):
    """ring_solver._median (a selection, written out to keep the compile short) against the middle of
    np.sort (NaN last), the definition np.median follows; exact, ties and NaN included."""
    from tiltedring.fitting.ring_solver import _median

    rng = np.random.default_rng(n)
    for values in (rng.normal(size=n), rng.integers(0, 4, n).astype(float),
                   np.where(rng.random(n) < 0.2, np.nan, rng.normal(size=n))):
        ordered = np.sort(values)
        middle = ordered[n // 2] if n % 2 else (ordered[n // 2 - 1] + ordered[n // 2]) / 2
        got = _median(values.copy())
        assert got == middle or (np.isnan(got) and np.isnan(middle))
        if not np.isnan(values).any():
            assert got == np.median(values)


def test_compiled_search_sorted_matches_numpy():
    """geometry._search_sorted against np.searchsorted (side 'left'), NaN keys and repeated radii included."""
    from tiltedring.fitting.geometry import _search_sorted

    radii = np.array([0.0, 1.5, 1.5, 2.0, 7.25, 30.0])
    keys = np.concatenate([radii, radii + 1e-9, radii - 1e-9, [-5.0, 100.0, np.nan, np.inf, -np.inf]])
    for key in keys:
        assert _search_sorted(radii, key) == np.searchsorted(radii, key)
    assert _search_sorted(radii[:0], 1.0) == 0
