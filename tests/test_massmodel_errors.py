"""The mass model uses the curve's error structure: a covariance (read or built) or the inclination as a
nuisance parameter, never the geometry term as independent per point (sources named beside each check)."""

import warnings

import numpy as np
import pytest
from astropy.table import QTable, Table
from astropy import units as u

from tiltedring.errors import FitCaution, InputError
from tiltedring.massmodel import (
    Baryons,
    CurveData,
    ExponentialDisc,
    MassModelSettings,
    NFW,
    fit_mass_model,
    read_curve,
    read_sparc_rotmod,
)
from tiltedring.massmodel.covariance import (
    covariance_beside,
    inclination_term,
    read_covariance,
    with_correlated_term,
)

KMS = u.km / u.s


@pytest.fixture(autouse=True)
def _no_caution_noise():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        yield


def _curve(rng, n=20, noise=3.0):
    radius = np.linspace(1.0, 25.0, n)
    disc = ExponentialDisc(1e10, 2.0)
    v = np.sqrt(0.6 * disc.v_squared(radius) + NFW(120.0, 9.0).v_squared(radius))
    return radius, v + noise * rng.standard_normal(n), np.full(n, noise), disc


def _matrix(n, rng):
    a = rng.standard_normal((n, n))
    return a @ a.T + n * np.eye(n)


def test_covariance_files_round_trip(tmp_path):
    """The documented formats: ECSV with columns ring_0..ring_N-1 (any unit convertible to km2/s2, here m2/s2)
    and a FITS image with BUNIT; both read back to the same matrix in km2/s2 (astropy unit conversion)."""
    rng = np.random.default_rng(2)
    cov = _matrix(6, rng)
    table = QTable({f"ring_{k}": cov[:, k] * 1e6 * u.m**2 / u.s**2 for k in range(6)})
    table["radius"] = np.arange(6) * u.arcsec  # other columns are ignored
    table.write(tmp_path / "curve_covariance.ecsv", format="ascii.ecsv")
    np.testing.assert_allclose(read_covariance(tmp_path / "curve_covariance.ecsv", 6), cov, rtol=1e-12)
    from astropy.io import fits

    hdu = fits.PrimaryHDU(cov)
    hdu.header["BUNIT"] = "km2 / s2"
    hdu.writeto(tmp_path / "c.fits")
    np.testing.assert_allclose(read_covariance(tmp_path / "c.fits", 6), cov, rtol=1e-12)
    (tmp_path / "curve.ecsv").write_text("x")
    assert covariance_beside(tmp_path / "curve.ecsv") == tmp_path / "curve_covariance.ecsv"


def test_bad_covariances_are_refused(tmp_path):
    rng = np.random.default_rng(3)
    cov = _matrix(5, rng)
    from astropy.io import fits

    for name, matrix, words in (("shape.fits", cov, "curve of 6 rows"), ("asym.fits", cov + np.triu(cov, 1), "symmetric"),
                                ("indef.fits", cov - 20 * np.eye(5) * cov.max(), "positive definite")):
        fits.PrimaryHDU(matrix).writeto(tmp_path / name)
        with pytest.raises(InputError, match=words):
            read_covariance(tmp_path / name, 6 if name == "shape.fits" else 5)
    Table({"a": [1.0, 2.0]}).write(tmp_path / "cols.ecsv", format="ascii.ecsv")
    with pytest.raises(InputError, match="ring_0"):
        read_covariance(tmp_path / "cols.ecsv", 2)


def test_chi2_uses_the_inverse_covariance():
    """chi2 of the fit equals r^T C^-1 r computed with numpy.linalg.solve (an independent route to the Cholesky
    whitening); with a diagonal covariance the fit is the one with independent errors."""
    rng = np.random.default_rng(4)
    radius, v, err, disc = _curve(rng)
    g = inclination_term(v, 60.0, 4.0)
    cov = with_correlated_term(err, g)
    settings = MassModelSettings(model="nfw", ml_mode="fixed", ml_disc=0.6)
    res = fit_mass_model(CurveData(radius, v, err, covariance=cov), Baryons(disc=disc), settings)
    r = res.curves["v_model"] - v
    assert res.chi2 == pytest.approx(float(r @ np.linalg.solve(cov, r)), rel=1e-9)
    diag = fit_mass_model(CurveData(radius, v, err, covariance=np.diag(err**2)), Baryons(disc=disc), settings)
    plain = fit_mass_model(CurveData(radius, v, err), Baryons(disc=disc), settings)
    for key in plain.parameters:
        assert diag.parameters[key] == pytest.approx(plain.parameters[key], abs=1e-6)
        assert diag.errors[key] == pytest.approx(plain.errors[key], rel=1e-4)


def _sparc_inclination(reference_data, galaxy):
    """(Inc, e_Inc) of ``galaxy`` from SPARC's galaxy table (Lelli et al. 2016, columns 6-7)."""
    for line in (reference_data / "sparc_lelli2016" / "SPARC_Lelli2016c.txt").read_text().splitlines():
        parts = line.split()
        if parts and parts[0] == galaxy:
            return float(parts[5]), float(parts[6])
    pytest.skip(f"{galaxy} not in the SPARC table")


def test_ngc3198_nfw_errors_with_the_inclination_covariance(reference_data):
    """SPARC NGC 3198 (Lelli et al. 2016: i = 73 +/- 3 deg; errV is the random error only, SOURCE.md), NFW halo,
    disc M/L fixed at 0.5 and with the log-normal prior.

    Expected: the inclination term v cot(i) sigma_i moves every ring's speed by the same factor (1.6 per cent
    here), which no number of rings averages down and which is degenerate with the halo's amplitude: V200's error
    must grow when the term is in the covariance (fully correlated), and c's must not shrink. The inclination as
    a nuisance parameter with the same Gaussian prior is the same model to first order (marginalising a linear
    Gaussian nuisance parameter adds exactly g g^T to C): errors agree within 15 per cent. Counting the term as
    independent per point instead inflates every error and drives chi2 far below its covariance value (measured
    32 against 55 for 43 points). REFERENCES.md lists no published NFW fit of NGC 3198, so no parameter values are
    compared; V200 stays within 2 per cent between the treatments (a check of the fit, not of a publication)."""
    inc, inc_err = _sparc_inclination(reference_data, "NGC3198")
    assert (inc, inc_err) == (73.0, 3.0)
    curve, baryons = read_sparc_rotmod(reference_data / "sparc_lelli2016" / "Rotmod_LTG" / "NGC3198_rotmod.dat")
    g = inclination_term(curve.v, inc, inc_err)
    cases = {"independent": curve,
             "covariance": CurveData(curve.radius, curve.v, curve.v_err, covariance=with_correlated_term(curve.v_err, g)),
             "nuisance": CurveData(curve.radius, curve.v, curve.v_err, inclination=inc, inclination_err=inc_err),
             "per_point": CurveData(curve.radius, curve.v, np.hypot(curve.v_err, g))}
    for ml_mode in ("fixed", "lognormal"):
        fits = {key: fit_mass_model(data, baryons, MassModelSettings(model="nfw", ml_mode=ml_mode,
                                                                      fit_inclination=key == "nuisance"))
                for key, data in cases.items()}
        for key, res in fits.items():
            print(f"NGC 3198 {ml_mode:9} {key:11} V200 = {10 ** res.parameters['log10_v200']:.1f} km/s "
                  f"(+/- {res.errors['log10_v200']:.4f} dex), c = {10 ** res.parameters['log10_concentration']:.2f} "
                  f"(+/- {res.errors['log10_concentration']:.4f} dex), chi2 = {res.chi2:.1f}")
        ind, cov, nui, per = (fits[k] for k in ("independent", "covariance", "nuisance", "per_point"))
        assert cov.errors["log10_v200"] > 1.2 * ind.errors["log10_v200"]
        assert cov.errors["log10_concentration"] >= ind.errors["log10_concentration"]
        for key in ("log10_v200", "log10_concentration"):
            assert nui.errors[key] == pytest.approx(cov.errors[key], rel=0.15)
        assert abs(cov.parameters["log10_v200"] - ind.parameters["log10_v200"]) < np.log10(1.02)
        assert per.chi2 < cov.chi2 - 15
        assert cov.notes[0].startswith("chi2 with the curve's covariance")


def _curve_table(tmp_path, rng, with_parts=True):
    radius, v, err, disc = _curve(rng)
    t = QTable()
    t["radius"] = radius * 10 * u.arcsec
    t["radius_kpc"] = radius * u.kpc
    t["v_rotation"] = v * KMS
    geometry = inclination_term(v, 60.0, 4.0)
    if with_parts:
        t["v_rotation_err_random"] = err * KMS
        t["v_rotation_err_geometry"] = geometry * KMS
        t["v_rotation_err_beam"] = np.zeros(v.size) * KMS
        t["v_rotation_err_asymmetry"] = np.zeros(v.size) * KMS
    t["v_rotation_err"] = np.hypot(err, geometry) * KMS
    t["inclination"] = np.full(v.size, 60.0) * u.deg
    t["inclination_err"] = np.full(v.size, 4.0) * u.deg
    t.meta["error_components"] = "v_rotation_err = noise, sides and inclination terms in quadrature"
    t.write(tmp_path / "curve.ecsv", format="ascii.ecsv")
    return err, geometry, disc


def test_curve_error_parts_become_a_rank_one_geometry_covariance(tmp_path):
    """curve.ecsv with error parts: independent = random (+ beam, asymmetry), geometry fully correlated; the
    inclination and its error come from the ring columns; a file beside the curve takes precedence, and fitting
    the inclination on top of a given covariance is refused (it would count the term twice)."""
    err, geometry, disc = _curve_table(tmp_path, np.random.default_rng(5))
    data = read_curve(tmp_path / "curve.ecsv")
    assert data.covariance_kind == "geometry"
    np.testing.assert_allclose(data.covariance, np.diag(err**2) + np.outer(geometry, geometry), rtol=1e-9)
    assert (data.inclination, data.inclination_err) == (60.0, 4.0)
    nuisance = fit_mass_model(data, Baryons(disc=disc), MassModelSettings(model="nfw", fit_inclination=True))
    assert "independent errors only" in nuisance.notes[0]
    cov = np.diag(err**2) * 2
    Table({f"ring_{k}": cov[:, k] for k in range(err.size)}).write(tmp_path / "curve_covariance.ecsv",
                                                                    format="ascii.ecsv")
    given = read_curve(tmp_path / "curve.ecsv")
    assert given.covariance_kind == "given" and np.allclose(given.covariance, cov)
    with pytest.raises(InputError, match="twice"):
        fit_mass_model(given, Baryons(disc=disc), MassModelSettings(model="nfw", fit_inclination=True))
    assert read_curve(tmp_path / "curve.ecsv", covariance=None).covariance_kind == "geometry"


def test_total_error_with_an_inclination_term_gives_a_caution(tmp_path):
    """A curve whose total error holds the inclination term but not separately: fitted as independent, and said."""
    _, _, disc = _curve_table(tmp_path, np.random.default_rng(6), with_parts=False)
    data = read_curve(tmp_path / "curve.ecsv")
    assert data.covariance is None
    res = fit_mass_model(data, Baryons(disc=disc), MassModelSettings(model="nfw"))
    assert any("correlated from ring to ring" in c for c in res.cautions)


def test_command_line_reads_the_covariance_and_reports_it(tmp_path, reference_data):
    """massmodel --covariance FILE on a SPARC file; massmodel.json names the errors used."""
    import json

    from tiltedring.cli import main

    path = reference_data / "sparc_lelli2016" / "Rotmod_LTG" / "NGC3198_rotmod.dat"
    curve, _ = read_sparc_rotmod(path)
    cov = with_correlated_term(curve.v_err, inclination_term(curve.v, 73.0, 3.0))
    from astropy.io import fits

    fits.PrimaryHDU(cov).writeto(tmp_path / "cov.fits")
    out = tmp_path / "mass"
    assert main(["massmodel", str(path), "--models", "nfw", "--covariance", str(tmp_path / "cov.fits"),
                 "--out", str(out), "-q"]) == 0
    record = json.loads((out / "massmodel.json").read_text())
    assert record["errors_used"].startswith("from ") and "cov.fits" in record["errors_used"]
    assert main(["massmodel", str(path), "--models", "nfw", "--fit-inclination", "--inclination", "73",
                 "--inclination-error", "3", "--out", str(tmp_path / "m2"), "-q"]) == 0
    rows = {r["parameter"]: r for r in Table.read(tmp_path / "m2" / "parameters.ecsv")}
    assert rows["inclination"]["unit"] == "deg" and rows["inclination"]["status"] == "free"


def test_the_fits_own_pair_file_is_read_with_blank_rings(tmp_path):
    """The fit writes curve_covariance.ecsv one row per pair of rings (products.covariance); the mass model
    reads its total, and a ring without a usable speed (NaN row and column) is dropped with that ring.
    Reference: the matrix built here with numpy (random diagonal plus a rank-one geometry term)."""
    from tiltedring.massmodel.io import CurveData
    from tiltedring.products.covariance import write_covariance

    n = 5
    e = np.array([3.0, 2.0, 2.5, 4.0, 3.5])
    g = np.array([1.0, 2.0, 3.0, 3.0, 3.0])
    total = np.diag(e**2) + np.outer(g, g)
    total[0, :] = total[:, 0] = np.nan  # ring 0 has no usable speed
    zero = np.zeros((n, n))
    parts = {"total": total, "random": zero, "geometry": zero, "beam": zero, "asymmetry": zero, "widening": zero}
    path = tmp_path / "curve_covariance.ecsv"
    write_covariance(path, np.arange(1.0, n + 1) * u.arcsec, parts)
    cov = read_covariance(path, n)
    np.testing.assert_allclose(cov[1:, 1:], total[1:, 1:])
    curve = CurveData(np.arange(1.0, n + 1), np.array([np.nan, 50, 80, 90, 95.0]), e, covariance=cov)
    np.testing.assert_allclose(curve.covariance, total[1:, 1:])
