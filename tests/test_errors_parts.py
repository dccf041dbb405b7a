"""The named parts of v_rotation's error: how they add, the asymmetry term, the geometry response, the
neighbour correlation, the rings' own orientation scatter, and the covariance file of the curve."""

import numpy as np
import pytest

import tiltedring as tr
from calibration_mocks import draw_geometries, noise_free_field, noisy_hdu
from tiltedring.pipeline.error_parts import (asymmetry_term, band_correlation, excess_scatter, geometry_response,
                                             total_error)
from tiltedring.products.covariance import read_covariance

PARTS = ("random", "geometry", "beam", "asymmetry")


@pytest.fixture(scope="module")
def symmetric_fit():
    """A symmetric, flat disc drawn by independent code (scipy-rotated particles), 4 km/s correlated noise."""
    geometry = draw_geometries(3, seed=7)[2]  # index 2: no warp, no non-circular flow
    assert geometry.warp is None and geometry.bar is None and geometry.v_radial == 0.0
    hdu, truth = noise_free_field(geometry, n_particles=400_000)
    with pytest.warns(tr.FitCaution):
        res = tr.fit_velocity_map(tr.read_velocity_map(noisy_hdu(hdu, geometry, seed=3)), resamples=20, seed=1)
    return res


def test_parts_add_in_quadrature_to_the_total(symmetric_fit):
    """v_rotation_err^2 = random^2 + geometry^2 + beam^2 + asymmetry^2 (no part left out or counted twice);
    tolerance: float rounding (rtol 1e-9). The disc is above the low-inclination limit, so no widening."""
    t = symmetric_fit.rings
    assert np.nanmin(t["inclination"].value) > symmetric_fit.options.low_inclination
    parts = np.sqrt(sum(np.nan_to_num(t[f"v_rotation_err_{p}"].value) ** 2 for p in PARTS))
    ok = np.isfinite(t["v_rotation"].value)
    np.testing.assert_allclose(t["v_rotation_err"].value[ok], parts[ok], rtol=1e-9)
    geometry = np.hypot(t["v_rotation_shift_inclination"].value, t["v_rotation_shift_position_angle"].value)
    np.testing.assert_allclose(t["v_rotation_err_geometry"].value[ok], geometry[ok], rtol=1e-9)


def test_side_term_is_about_zero_for_a_symmetric_disc(symmetric_fit):
    """The halves of a symmetric disc differ by noise only: the asymmetry part is 0 in most rings and small
    on average (the old side term, half the difference, was about 0.7 of the noise: issue 15)."""
    t = symmetric_fit.rings
    ok = np.isfinite(t["v_rotation"].value)
    asym, random = t["v_rotation_err_asymmetry"].value[ok], t["v_rotation_err_random"].value[ok]
    assert np.median(asym) == 0.0
    assert np.mean(asym) < 0.25 * np.mean(random)


def test_asymmetry_term_from_noise_alone_and_from_a_real_difference():
    """Monte Carlo (numpy draws): with d ~ N(0, s_d^2) the term is non-zero in about 4.6 per cent of rings
    (|d| > 2 s_d, normal two-sided tail, textbook); with a true difference D = 10 s_d it estimates D / 2 to
    within 3 per cent on average (sqrt(d^2 - s_d^2) / 2)."""
    rng = np.random.default_rng(11)
    s = np.full(20000, 2.0)
    noise_only = asymmetry_term(100 + rng.normal(0, 2, 20000), 100 + rng.normal(0, 2, 20000), s, s)
    assert 0.038 < np.mean(noise_only > 0) < 0.054
    d_true = 10 * np.hypot(2.0, 2.0)
    real = asymmetry_term(100 + d_true + rng.normal(0, 2, 20000), 100 + rng.normal(0, 2, 20000), s, s)
    assert abs(np.mean(real) / (d_true / 2) - 1) < 0.03
    assert np.isnan(asymmetry_term([np.nan], [100.0], [1.0], [1.0])[0])


def test_geometry_response_is_the_change_of_v_at_fixed_v_sin_i():
    """Only v sin i is measured: at inclination i + di the same data give v sin i / sin(i + di). The signed
    inclination shift must match that change to first order (di = 0.5 deg: second-order rest < 2 per cent)."""
    v, inc, di = np.array([50.0, 150.0, 220.0]), np.array([35.0, 55.0, 75.0]), 0.5
    exact = v * np.sin(np.radians(inc)) / np.sin(np.radians(inc + di)) - v
    shift = geometry_response(v, inc, np.full(3, di), np.zeros(3))
    np.testing.assert_allclose(shift["inclination"], exact, rtol=0.02)
    assert np.all(shift["position_angle"] == 0)
    held = geometry_response(v, inc, np.full(3, np.nan), np.full(3, np.nan))  # held angles: no response
    assert np.all(held["inclination"] == 0)


def test_band_correlation_recovers_neighbour_correlation():
    """Draws with a known moving-average correlation (x_k = e_k + 0.5 e_(k+1): neighbours 0.5 / 1.25 = 0.4,
    beyond 0): the band at reach 1 is 0.4 to within 0.06 (2000 draws, about 3/sqrt(n)); reach 0 gives the
    identity; the clip keeps the banded matrix positive definite."""
    rng = np.random.default_rng(5)
    e = rng.standard_normal((2000, 13))
    draws = e[:, :-1] + 0.5 * e[:, 1:]
    corr = band_correlation(draws, 1)
    np.testing.assert_allclose(np.diagonal(corr, 1), 0.4, atol=0.06)
    assert np.all(np.diagonal(corr, 2) == 0)
    np.testing.assert_array_equal(band_correlation(draws, 0), np.eye(12))
    assert np.linalg.eigvalsh(corr).min() > -1e-12


def test_excess_scatter_recovers_a_known_spread():
    """Values with their own errors 0.5 and an extra scatter tau = 1.0 (numpy draws, 400 values): tau back to
    within 0.15; without extra scatter tau is near 0 (below 0.15)."""
    rng = np.random.default_rng(3)
    err = np.full(400, 0.5)
    assert abs(excess_scatter(rng.normal(0, 1.0, 400) + rng.normal(0, 0.5, 400), err) - 1.0) < 0.15
    assert excess_scatter(rng.normal(0, 0.5, 400), err) < 0.15
    assert excess_scatter([1.0, 2.0], [0.1, 0.1]) == 0.0


def test_total_error_is_the_quadrature_sum():
    got = total_error({"a": [3.0, np.nan], "b": [4.0, np.nan]})
    assert got[0] == pytest.approx(5.0) and np.isnan(got[1])


def test_curve_covariance_matches_the_error_columns(symmetric_fit, tmp_path):
    """The covariance file: diagonal of the total = v_rotation_err^2 (rtol 1e-6, ECSV text round trip); the
    geometry part is the outer product of the signed shifts (fully correlated); the total is positive
    semi-definite; each row of the file is one ordered pair of rings of curve.ecsv."""
    curve = symmetric_fit.curve()
    path = tmp_path / "curve_covariance.ecsv"
    curve.write_covariance(path)
    radius, parts = read_covariance(path)
    t = curve.table
    ok = np.isfinite(t["v_rotation"].value)
    np.testing.assert_allclose(radius, t["radius"].value)
    np.testing.assert_allclose(np.diag(parts["total"])[ok], t["v_rotation_err"].value[ok] ** 2, rtol=1e-6)
    g = t["v_rotation_shift_inclination"].value[ok]
    p = t["v_rotation_shift_position_angle"].value[ok]
    np.testing.assert_allclose(parts["geometry"][np.ix_(ok, ok)], np.outer(g, g) + np.outer(p, p), rtol=1e-6,
                               atol=1e-12)
    assert np.linalg.eigvalsh(parts["total"][np.ix_(ok, ok)]).min() > -1e-6 * np.max(np.diag(parts["total"]))
    summed = sum(parts[name] for name in ("random", "geometry", "beam", "asymmetry", "widening"))
    np.testing.assert_allclose(summed[np.ix_(ok, ok)], parts["total"][np.ix_(ok, ok)], rtol=1e-6, atol=1e-9)


def test_the_fit_folder_holds_the_covariance_and_the_error_model(symmetric_fit, tmp_path):
    """write() puts curve_covariance.ecsv beside curve.ecsv and the error model into fit.json."""
    import json

    symmetric_fit.write(tmp_path / "out")
    files = {p.name for p in (tmp_path / "out").iterdir()}
    assert {"curve_covariance.ecsv", "curve.ecsv"} <= files
    record = json.loads((tmp_path / "out" / "fit.json").read_text())
    assert set(PARTS) <= set(record["error_model"])
    radius, parts = read_covariance(tmp_path / "out" / "curve_covariance.ecsv")
    assert parts["total"].shape == (len(radius), len(radius))
