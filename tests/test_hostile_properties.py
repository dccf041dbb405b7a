"""Property tests (hypothesis) of hostile inputs: generated headers, option values and manifests.

Whatever is generated: no traceback, exit codes as documented (0 success, 1 failure, 2 unusable
input with a message), inputs byte-identical afterwards (SHA-256 before and after), and nothing
written outside ``--out``. Example counts are kept small: each end-to-end example runs a fit on a
48x48 map without report, resampling or beam correction.
"""

import hashlib
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tiltedring import jobs
from tiltedring.batch import read_manifest
from tiltedring.cli import main
from tiltedring.errors import InputError
from tiltedring.io.maps import read_velocity_map
from tiltedring.io.output_safety import check_name
from tiltedring.synthetic import DiscTruth, make_field

FAST = ["--no-report", "--resamples", "0", "--no-beam-correction", "-q"]
SETTINGS = dict(deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


@pytest.fixture(scope="module")
def base():
    return make_field(DiscTruth(x_center=23.5, y_center=23.5, r_turn=10.0), shape=(48, 48), pixel_scale=2.0,
                      beam_fwhm=6.0, noise=2.0, seed=3).velocity_hdu


def _digest(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _run(argv, work: Path, out: Path, capsys):
    """Run the command; check exit code, message, untouched inputs and nothing outside ``out``."""
    before = _digest(work)
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse's own refusal of a malformed value: exit 2 with its message
        code = exc.code
    err = capsys.readouterr().err
    assert code in (0, 1, 2), code
    assert "Traceback" not in err
    if code == 2:
        assert "tiltedring" in err and "error:" in err and len(err.strip()) > 30
    after = _digest(work)
    outside = {k: v for k, v in after.items() if not (work / k).is_relative_to(out)}
    assert outside == before  # inputs byte-identical, and no new file outside --out
    assert not [p for p in work.iterdir() if p.name.startswith(".") and p.name != out.name]  # no leftovers
    return code, err


header_values = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**6, 10**6),
                          st.text(alphabet="abcXYZ0123456789.-+ ", max_size=8), st.booleans())
header_keys = st.sampled_from(["CDELT1", "CDELT2", "CRVAL1", "CRVAL2", "CRPIX1", "CD1_1", "PC1_2", "BMAJ", "BMIN",
                               "BPA", "BUNIT", "CTYPE1", "BLANK", "CROTA2"])


@settings(max_examples=40, **SETTINGS)
@given(st.dictionaries(header_keys, header_values, min_size=1, max_size=3))
def test_generated_headers_are_read_or_refused(base, edits):
    """Reading never raises anything but InputError, and what it accepts is a usable grid."""
    header = base.header.copy()
    for key, value in edits.items():
        if isinstance(value, float) and not np.isfinite(value):
            value = str(value)  # FITS cannot store NaN or inf as numbers; such headers hold text
        try:
            header[key] = value
        except (ValueError, TypeError):
            return
    try:
        vmap = read_velocity_map(fits.PrimaryHDU(base.data.copy(), header=header))
    except InputError as exc:
        assert len(str(exc)) > 20
        return
    assert np.all(np.isfinite(vmap.sky_jacobian)) and vmap.pixel_area > 0
    assert np.nanmax(np.abs(vmap.velocity)) < 299792.458
    if vmap.beam is not None:
        assert 0 < vmap.beam.minor <= vmap.beam.major and 0 <= vmap.beam.position_angle < 180


option_names = st.sampled_from(sorted(n for n, s in jobs.job_specs().items() if not s.path and s.command_line))
option_values = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**12, 10**12),
                          st.text(max_size=10), st.booleans(), st.lists(st.integers(-5, 50), max_size=3),
                          st.sampled_from(["4pix", "0.5beam", "1e-9", "nan", "-1", "inclination", "1e400", "9arcsec"]))


@settings(max_examples=150, **SETTINGS)
@given(st.dictionaries(option_names, option_values, max_size=4))
def test_generated_option_values_are_taken_or_refused(values):
    """Any value of any option (as a manifest cell or TOML entry would give it): a job or an InputError."""
    try:
        job = jobs.Job.from_values("map.fits", values)
    except InputError as exc:
        assert len(str(exc)) > 15
        return
    for name in ("growth", "clip", "minor_axis_gap", "low_inclination", "min_coverage", "resamples", "seed"):
        value = getattr(job.fit, name)
        assert value is None or np.isfinite(value)
    for value in job.fit.initial.values():
        assert np.isfinite(value)
    if job.curve.distance is not None and not isinstance(job.curve.distance, str):
        assert 0 < job.curve.distance < np.inf


@settings(max_examples=12, **SETTINGS)
@given(st.dictionaries(st.sampled_from(["--ring-width", "--max-radius", "--growth", "--clip", "--inclination",
                                        "--position-angle", "--bin", "--min-coverage", "--distance", "--beam",
                                        "--minor-axis-gap", "--first-radius"]),
                       st.sampled_from(["nan", "-1", "0", "1e-9", "1e7", "2", "45", "370", "4pix", "0.5beam",
                                        "1.5"]), max_size=3))
def test_generated_command_lines_end_cleanly(base, tmp_path_factory, capsys, options):
    work = tmp_path_factory.mktemp("cli")
    base.writeto(work / "map.fits")
    out = work / "out"
    argv = ["fit", str(work / "map.fits"), "--out", str(out), *FAST]
    for flag, value in options.items():
        argv.append(f"{flag}={value}")
    if "--growth" in options:
        argv += ["--spacing", "logarithmic"]
    code, _ = _run(argv, work, out, capsys)
    if code == 0:
        from astropy.table import Table

        rings = Table.read(out / "rings.ecsv")
        inc, pa = np.asarray(rings["inclination"]), np.asarray(rings["position_angle"])
        assert np.all((inc[np.isfinite(inc)] >= 0) & (inc[np.isfinite(inc)] <= 90))
        assert np.all((pa[np.isfinite(pa)] >= 0) & (pa[np.isfinite(pa)] < 360))
    else:
        assert not out.exists()


names = st.one_of(st.text(max_size=12), st.sampled_from(["..", ".", "/abs", "../x", "a/b", "x", "X", "x ", ".h",
                                                          "a\\b", "~", "catalogue.ecsv"]))


@settings(max_examples=80, **SETTINGS)
@given(st.lists(names, min_size=1, max_size=5))
def test_generated_manifest_names_stay_inside_out(tmp_path_factory, rows):
    """Every accepted name is one plain path component, unique ignoring case; refusals name a row."""
    work = tmp_path_factory.mktemp("names")
    import csv

    with open(work / "m.csv", "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["name", "velocity_map"])
        for name in rows:
            writer.writerow([name, "a.fits"])
    try:
        parsed = read_manifest(work / "m.csv")
    except InputError as exc:
        assert "row" in str(exc) or "manifest" in str(exc)
        return
    accepted = [r["name"] for r in parsed]
    assert len({n.casefold() for n in accepted}) == len(accepted)
    out = work / "out"
    for name in accepted:
        assert check_name(name) == name
        assert (out / name).resolve().parent == out.resolve()


@settings(max_examples=6, **SETTINGS)
@given(st.lists(st.sampled_from(["g1", "g2", "../up", "g1", "/abs", "ok"]), min_size=1, max_size=3),
       st.sampled_from(["", ",resamples\n", ",bin\n", ",ring_width\n"]),
       st.sampled_from(["0", "-5", "nan", "2", "abc", "4pix"]))
def test_generated_batches_end_cleanly(base, tmp_path_factory, capsys, row_names, column, cell):
    work = tmp_path_factory.mktemp("batch")
    base.writeto(work / "map.fits")
    header = "name,velocity_map" + (column.strip() if column else "")
    lines = [header] + [f"{n},map.fits" + (f",{cell}" if column else "") for n in row_names]
    (work / "m.csv").write_text("\n".join(lines) + "\n")
    out = work / "out"
    code, _ = _run(["batch", str(work / "m.csv"), "--out", str(out), "--workers", "1", *FAST[1:]], work, out, capsys)
    assert not (work.parent / "up").exists()
    if code != 2:
        from astropy.table import Table

        catalogue = Table.read(out / "catalogue.ecsv")
        assert sorted(catalogue["name"]) == sorted(row_names)
