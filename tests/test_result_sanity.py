"""Nothing absurd: results checked against their physical ranges, sky centres in a named frame, and the
refusals of massmodel and compare (issue 13).

Independent references: astropy.coordinates (galactic -> ICRS), astropy.wcs, astropy.cosmology.
"""

import json
from pathlib import Path

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

import tiltedring as tr
from tiltedring import jobs
from tiltedring.cli import main
from tiltedring.errors import ResultNotPhysical
from tiltedring.products.sanity import check_physical
from tiltedring.synthetic import DiscTruth, make_field

FAST = ["--no-report", "--resamples", "0", "--no-beam-correction", "-q"]


@pytest.fixture(scope="module")
def field():
    return make_field(DiscTruth(x_center=23.5, y_center=23.5, r_turn=10.0, position_angle=125.0, inclination=50.0),
                      shape=(48, 48), pixel_scale=2.0, beam_fwhm=6.0, noise=2.0, seed=3)


@pytest.fixture(scope="module")
def fitted(field):
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return tr.fit_velocity_map(tr.read_velocity_map(field.velocity_hdu), resamples=0, beam_correction=False)


def _copy_result(result):
    import copy

    return copy.deepcopy(result)


def test_an_ill_conditioned_ring_is_flagged_and_blanked(fitted):
    """Issue: a ring written as 1236 +/- 74,000 km/s, another at inclination 175.7."""
    result = _copy_result(fitted)
    rings = result.rings
    v = rings["v_rotation"].value.copy()
    v[1], v[2] = 1236.0, 90.0
    err = rings["v_rotation_err"].value.copy()
    err[1] = 74000.0
    inc = rings["inclination"].value.copy()
    inc[2] = 175.7
    pa = rings["position_angle"].value.copy()
    pa[3] = -30.0
    rings["v_rotation"], rings["v_rotation_err"] = v * u.km / u.s, err * u.km / u.s
    rings["inclination"], rings["position_angle"] = inc * u.deg, pa * u.deg
    notes = check_physical(result)
    assert "2 ring(s)" in notes[0]
    assert "ill_conditioned" in rings["flags"][1] and "ill_conditioned" in rings["flags"][2]
    assert np.isnan(rings["v_rotation"][1]) and np.isnan(rings["v_rotation_err"][1])
    assert np.isnan(rings["inclination"][2]) and np.isnan(rings["v_rotation"][2])
    assert rings["position_angle"][3].value == pytest.approx(330.0)
    assert np.all((rings["position_angle"].value[np.isfinite(rings["position_angle"].value)] >= 0)
                  & (rings["position_angle"].value[np.isfinite(rings["position_angle"].value)] < 360))
    assert "ill_conditioned" not in rings["flags"][0]
    assert any("ill-conditioned" in c for c in result.cautions)
    curve = result.curve()
    assert np.isnan(curve.table["v_rotation"][1])  # the blank reaches the curve product


def test_an_unphysical_disc_exits_1_and_writes_nothing(field, fitted, tmp_path, monkeypatch, capsys):
    """Issue: inclination -459.6 deg on a bundled demo field, -3.8e290 on a map with 1e30 pixels, exit 0."""
    path = tmp_path / "g.fits"
    field.velocity_hdu.writeto(path)

    def broken(vmap, options):
        result = _copy_result(fitted)
        result.rings["inclination"] = np.full(len(result.rings), -459.6) * u.deg
        return result

    monkeypatch.setattr("tiltedring.pipeline.staged.fit_velocity_map", broken)
    assert main(["fit", str(path), "--out", str(tmp_path / "o"), *FAST]) == 1
    err = capsys.readouterr().err
    assert "did not give a physical disc" in err and "median inclination" in err and "Traceback" not in err
    assert not (tmp_path / "o").exists()
    with pytest.raises(ResultNotPhysical):
        jobs.run_job(jobs.Job(path), tmp_path / "o2")
    # the API writer checks too
    result = broken(None, None)
    with pytest.raises(ResultNotPhysical):
        result.write(tmp_path / "o3")
    assert not (tmp_path / "o3").exists()


def test_a_batch_records_an_unphysical_fit_as_failed(field, fitted, tmp_path, monkeypatch):
    field.velocity_hdu.writeto(tmp_path / "g.fits")
    (tmp_path / "m.csv").write_text("name,velocity_map\ng,g.fits\n")

    def broken(vmap, options):
        result = _copy_result(fitted)
        result.rings["v_rotation"] = np.full(len(result.rings), np.nan) * u.km / u.s
        return result

    monkeypatch.setattr("tiltedring.pipeline.staged.fit_velocity_map", broken)
    assert main(["batch", str(tmp_path / "m.csv"), "--out", str(tmp_path / "b"), "--workers", "1", "-q"]) == 1
    catalogue = Table.read(tmp_path / "b" / "catalogue.ecsv")
    assert catalogue["status"][0] == "failed" and "physical disc" in catalogue["error"][0]


def test_no_demo_field_exits_0_with_a_value_outside_its_range(demo_fields, tmp_path):
    """The default fit of every bundled field: exit 0 only with every ring in range (else exit 1)."""
    for name in ("calloway", "ashgrove"):
        out = tmp_path / name
        code = main(["fit", str(demo_fields / f"{name}_velocity.fits"), "--resamples", "0", "--no-report", "-q",
                     "--out", str(out)])
        assert code in (0, 1)
        if code == 0:
            rings = Table.read(out / "rings.ecsv")
            inc, pa = np.asarray(rings["inclination"]), np.asarray(rings["position_angle"])
            assert np.all((inc[np.isfinite(inc)] >= 0) & (inc[np.isfinite(inc)] <= 90))
            assert np.all((pa[np.isfinite(pa)] >= 0) & (pa[np.isfinite(pa)] < 360))
            assert np.all(np.abs(np.asarray(rings["v_rotation"])[np.isfinite(rings["v_rotation"])]) < 2000)
        else:
            assert not out.exists()


# ---------------------------------------------------------------------------------------------- frames
def _galactic(field):
    hdu = field.velocity_hdu
    header = hdu.header.copy()
    header["CTYPE1"], header["CTYPE2"] = "GLON-TAN", "GLAT-TAN"
    header["CRVAL1"], header["CRVAL2"] = 120.0, 35.0
    header.remove("RADESYS", ignore_missing=True)
    return fits.PrimaryHDU(hdu.data, header=header)


def test_a_galactic_map_gets_icrs_centres_and_says_so(field, tmp_path):
    """Issue: galactic coordinates were written into ra_center/dec_center. Reference: astropy's galactic -> ICRS."""
    path = tmp_path / "gal.fits"
    _galactic(field).writeto(path)
    assert main(["fit", str(path), "--out", str(tmp_path / "o"), *FAST]) == 0
    rings = Table.read(tmp_path / "o" / "rings.ecsv")
    w = WCS(fits.getheader(path))
    lon, lat = w.celestial.pixel_to_world_values(np.asarray(rings["x_center"]), np.asarray(rings["y_center"]))
    expected = SkyCoord(lon * u.deg, lat * u.deg, frame="galactic").icrs
    np.testing.assert_allclose(rings["ra_center"], expected.ra.deg, atol=1e-9)
    np.testing.assert_allclose(rings["dec_center"], expected.dec.deg, atol=1e-9)
    assert abs(rings["ra_center"][0] - 120.0) > 1  # not the galactic longitude
    record = json.loads((tmp_path / "o" / "fit.json").read_text())
    assert "galactic" in record["conventions"]["sky_centre"] and "ICRS" in record["conventions"]["sky_centre"]
    assert any("galactic" in c for c in record["cautions"])


def test_a_sky_starting_centre_is_read_as_icrs_on_a_galactic_map(field, quiet):
    vmap = tr.read_velocity_map(_galactic(field))
    sky = SkyCoord(l=120.0 * u.deg, b=35.0 * u.deg, frame="galactic").icrs  # the reference pixel's position
    x, y = vmap.sky_to_pixel(sky.ra.deg, sky.dec.deg)
    crpix = vmap.wcs.wcs.crpix - 1
    assert (x, y) == pytest.approx(tuple(crpix), abs=1e-6)
    ra, dec = vmap.pixel_to_icrs(x, y)
    assert float(ra) == pytest.approx(sky.ra.deg, abs=1e-9) and float(dec) == pytest.approx(sky.dec.deg, abs=1e-9)


def test_a_map_without_celestial_wcs_has_blank_sky_centres(field, tmp_path):
    hdu = fits.PrimaryHDU(field.velocity_hdu.data, header=fits.Header({"BUNIT": "km/s"}))
    hdu.writeto(tmp_path / "plain.fits")
    assert main(["fit", str(tmp_path / "plain.fits"), "--pixel-scale", "2", "--beam", "6", "--out",
                 str(tmp_path / "o"), *FAST]) == 0
    rings = Table.read(tmp_path / "o" / "rings.ecsv")
    assert np.all(np.isnan(rings["ra_center"]))
    record = json.loads((tmp_path / "o" / "fit.json").read_text())
    assert "no celestial WCS" in record["conventions"]["sky_centre"]


# ---------------------------------------------------------------------------------------------- the curve
def test_the_curve_takes_astropys_distance_and_refuses_absurd_ones(fitted):
    from astropy.cosmology import Planck18

    curve = fitted.curve(redshift=0.01)
    expected = Planck18.angular_diameter_distance(0.01).to_value(u.Mpc)  # astropy.cosmology, independent
    assert curve.meta["distance"]["value_mpc"] == pytest.approx(expected, rel=1e-12)
    for kwargs in ({"distance": float("inf")}, {"redshift": float("nan")}, {"redshift": -0.5},
                   {"redshift": 0.01, "cosmology": "units"}, {"distance": "0 Mpc"}):
        with pytest.raises(tr.InputError):
            fitted.curve(**kwargs)


def test_an_impossible_systemic_velocity_never_reaches_the_curve(fitted):
    """Issue: speeds divided by 1 + z = 5.8 or a negative 1 + z."""
    result = _copy_result(fitted)
    result.rings["v_systemic"] = np.full(len(result.rings), 1.4e6) * u.km / u.s
    with pytest.raises(ResultNotPhysical, match="velocity unit"):
        result.curve()


# ---------------------------------------------------------------------------------------------- massmodel and compare
def _curve_table(path: Path, v_scale=1.0, extra=""):
    r = np.linspace(0.5, 15, 16)
    rows = [f"radius_kpc,v,e{',' + extra if extra else ''}"]
    rows += [f"{a},{v_scale * 150 * np.tanh(a / 3)},5{',' + 'nan' if extra else ''}" for a in r]
    path.write_text("\n".join(rows) + "\n")
    return path


MASS = ["--radius-column", "radius_kpc", "--velocity-column", "v", "--error-column", "e", "--models", "nfw"]


@pytest.mark.parametrize("case, words", [
    ("negative", "negative beyond their errors"),  # issue: chi2 15639 without a word
    ("m_per_s", "in m/s"),
    ("bom", None),
    ("sparc_line", "line 3"),
    ("gas_no_radius", "radius_kpc"),
    ("components_nan", "blank or infinite"),
    ("steps0", "--steps = 0"),
    ("ml_nan", "--ml-disc = nan"),
    ("unknown_model", "unknown model"),
    ("missing_column", "column 'R' not found"),
    ("units", "cannot be turned into"),
])
def test_massmodel_refusals(case, words, tmp_path, capsys):
    curve = _curve_table(tmp_path / "c.csv")
    argv = ["massmodel", str(curve), *MASS, "--out", str(tmp_path / "o"), "-q"]
    if case == "negative":
        argv[1] = str(_curve_table(tmp_path / "n.csv", -1.0))
    elif case == "m_per_s":
        argv[1] = str(_curve_table(tmp_path / "n.csv", 1000.0))
    elif case == "bom":
        (tmp_path / "b.csv").write_bytes(b"\xef\xbb\xbf" + curve.read_bytes())
        argv[1] = str(tmp_path / "b.csv")
    elif case == "sparc_line":
        (tmp_path / "x_rotmod.dat").write_text("# Distance = 10 Mpc\n1 50 5 10 40 0 1 0\n1.5 60 oops 4 5 6 7 8\n")
        argv = ["massmodel", str(tmp_path / "x_rotmod.dat"), "--out", str(tmp_path / "o"), "-q"]
    elif case == "gas_no_radius":
        (tmp_path / "gas.csv").write_text("radius,surface_density_gas\n1,2\n2,1\n")
        argv += ["--gas", str(tmp_path / "gas.csv")]
    elif case == "components_nan":
        (tmp_path / "comp.csv").write_text("radius_kpc,v_disc\n1,50\n2,nan\n3,60\n")
        argv += ["--components", str(tmp_path / "comp.csv")]
    elif case == "steps0":
        argv += ["--sample", "--steps", "0"]
    elif case == "ml_nan":
        argv += ["--ml-disc", "nan"]
    elif case == "unknown_model":
        argv += ["--models", "nfw,halo9"]
    elif case == "missing_column":
        argv[argv.index("radius_kpc")] = "R"
    elif case == "units":
        (tmp_path / "u.ecsv").write_text("# %ECSV 1.0\n# ---\n# datatype:\n# - {name: radius_kpc, unit: km/s, datatype: "
                                         "float64}\n# - {name: v, unit: km / s, datatype: float64}\n# - {name: e, unit: "
                                         "km / s, datatype: float64}\nradius_kpc v e\n1 50 5\n2 60 5\n3 70 5\n")
        argv[1] = str(tmp_path / "u.ecsv")
    code = main(argv)
    err = capsys.readouterr().err
    assert "Traceback" not in err
    if words is None:
        assert code == 0
    else:
        assert code == 2 and words in err, err


def test_compare_refusals(field, tmp_path, capsys):
    """Issue: maps that do not overlap gave 'rms difference 0.00 over 0 pixels' with exit 0; --names with the
    wrong count; a missing --rings table."""
    hdu = field.velocity_hdu
    hdu.writeto(tmp_path / "a.fits")
    far = hdu.header.copy()
    far["CRVAL1"] = (far["CRVAL1"] + 40.0) % 360
    fits.PrimaryHDU(hdu.data, header=far).writeto(tmp_path / "far.fits")
    a, b = str(tmp_path / "a.fits"), str(tmp_path / "far.fits")
    cases = [([a, b], "do not overlap"),
             ([a, a, "--names", "x"], "1 name(s) for 2 maps"),
             ([a, a, "--names", "x,x"], "its own non-empty name"),
             ([a, a, "--rings", str(tmp_path / "none.ecsv")], "does not exist"),
             ([a], "at least two maps")]
    (tmp_path / "r.ecsv").write_text("# %ECSV 1.0\n# ---\n# datatype:\n# - {name: radius, datatype: float64}\nradius\n1\n")
    cases.append(([a, a, "--rings", str(tmp_path / "r.ecsv")], "lacks column"))
    for argv, words in cases:
        assert main(["compare", *argv, "--out", str(tmp_path / "o")]) == 2
        err = capsys.readouterr().err
        assert words in err and "Traceback" not in err
    assert not (tmp_path / "o").exists()


def test_disc_wide_position_angles_are_medians_on_the_circle():
    """Rings either side of north (359 and 1 deg) are neighbours: the disc-wide value is near 0, not 180."""
    from tiltedring.products.sanity import angle_median

    assert angle_median([358.0, 359.0, 0.0, 1.0, 2.0]) == pytest.approx(0.0, abs=1e-9)
    assert angle_median([10.0, 20.0, 30.0]) == 20.0  # no wrap: the plain median, exactly
    assert angle_median([350.0, 10.0, 20.0]) == pytest.approx(10.0, abs=1e-9)
    assert 0.0 <= angle_median([359.0, 1.0]) < 360.0
    assert np.isnan(angle_median([np.nan]))
