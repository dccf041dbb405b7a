"""Validation before work: every option and header value checked for type, finiteness and range, and
every refusal exit 2 with a message naming the value and the fix (issue 13's hard inputs).

Headers and files are made with astropy.io.fits; sources of the physical ranges are named where
they are used (tiltedring/io/map_checks.py, pipeline/options.py).
"""

import gzip
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

from tiltedring import jobs
from tiltedring.cli import main
from tiltedring.errors import FitCaution, InputError
from tiltedring.io.maps import Beam, read_velocity_map
from tiltedring.pipeline.options import CurveOptions, FitOptions, InputOptions
from tiltedring.synthetic import DiscTruth, make_field

ROOT = Path(__file__).parent.parent
FAST = ["--no-report", "--resamples", "0", "--no-beam-correction", "-q"]


@pytest.fixture(scope="module")
def field():
    return make_field(DiscTruth(x_center=23.5, y_center=23.5, r_turn=10.0), shape=(48, 48), pixel_scale=2.0,
                      beam_fwhm=6.0, noise=2.0, seed=3)


@pytest.fixture
def small_map(field, tmp_path):
    path = tmp_path / "galaxy.fits"
    field.velocity_hdu.writeto(path)
    return path


def _variant(field, tmp_path, name, data=None, **keys):
    header = field.velocity_hdu.header.copy()
    for key, value in keys.items():
        if value is None:
            header.remove(key, ignore_missing=True)
        else:
            header[key] = value
    path = tmp_path / f"{name}.fits"
    fits.PrimaryHDU(field.velocity_hdu.data.copy() if data is None else data, header=header).writeto(path)
    return path


def _refused(argv, capsys, *words):
    """The command exits 2 and its message has every one of ``words``; returns the message."""
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    for word in words:
        assert word in err, (word, err)
    return err


# ---------------------------------------------------------------------------------------------- options
@pytest.mark.parametrize("flag, value, words", [
    ("--ring-width", "1e-9", ["narrower than a tenth of a pixel", "--ring-width"]),
    ("--max-radius", "1e7", ["far beyond the map"]),
    ("--first-radius", "1e9", ["first radius", "far beyond"]),
    ("--growth", "nan", ["--growth = nan", "above 1"]),
    ("--bin", "0", ["--bin = 0", "at least 1"]),
    ("--clip", "nan", ["--clip = nan"]),
    ("--clip", "0.2", ["at least 1"]),
    ("--resamples", "-5", ["--resamples = -5", "at least 0"]),
    ("--seed", "-3", ["--seed = -3"]),
    ("--minor-axis-gap", "89.9", ["--minor-axis-gap = 89.9", "at most 75"]),
    ("--redshift", "-0.1", ["--redshift = -0.1"]),
    ("--redshift", "nan", ["--redshift = nan"]),
    ("--distance", "inf", ["--distance = inf"]),
    ("--distance", "-3kpc", ["out of range"]),
    ("--distance", "12 km/s", ["not a length"]),
    ("--inclination", "120", ["--inclination = 120", "between face-on"]),
    ("--inclination", "nan", ["--inclination = nan"]),
    ("--v-systemic", "1e9", ["slower than light"]),
    ("--ra-center", "400", ["right ascension"]),
    ("--dec-center", "-91", ["declination"]),
    ("--pixel-scale", "-1", ["--pixel-scale = -1"]),
    ("--min-coverage", "2", ["at most 1"]),
    ("--low-inclination", "95", ["below 90"]),
    ("--min-beams-per-ring", "inf", ["--min-beams-per-ring = inf"]),
    ("--ring-width", "nanpix", ["cannot read length"]),
    ("--ring-width", "1e400", ["--ring-width = inf"]),
    ("--ring-edges", "0,10,nan", ["out of range"]),
    ("--ring-edges", "20,10", ["increasing"]),
    ("--ring-edges", "-5,10", ["at least 0"]),
    ("--bar-range", "20,10", ["smaller first"]),
    ("--beam", "abc", ["cannot read beam"]),
    ("--beam", "-5", ["beam axes must be positive"]),
    ("--beam", "12,nan", ["not a finite number"]),
    ("--velocity-unit", "kg", ["not a velocity"]),
    ("--velocity-unit", "furlongs-per-fortnight", ["not a unit"]),
    ("--cosmology", "Nope", ["astropy provides"]),
    ("--cosmology", "units", ["astropy provides"]),
])
def test_option_values_out_of_range_are_refused(flag, value, words, small_map, tmp_path, capsys, monkeypatch):
    monkeypatch.setattr("tiltedring.pipeline.staged.fit_velocity_map", lambda *a, **k: pytest.fail("fit started"))
    _refused(["fit", str(small_map), "--out", str(tmp_path / "o"), *FAST, f"{flag}={value}"], capsys, *words)
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("argv, words", [
    (["--x-center", "20", "--ra-center", "152.39", "--dec-center", "-21.6"], ["both in pixels", "on the sky"]),
    (["--ring-edges", "0,10,20", "--ring-width", "4pix"], ["ring_width would be ignored"]),
    (["--ring-edges", "0,10,20", "--spacing", "logarithmic"], ["spacing would be ignored"]),
    (["--growth", "1.5"], ["logarithmic spacing only"]),
    (["--fit-radial", "--fix", "v_radial"], ["also fixed"]),
    (["--distance", "10", "--redshift", "0.01"], ["not both"]),
    (["--dispersion-map", "d.fits"], ["intensity_map"]),
    (["--first-radius", "40", "--max-radius", "20"], ["not beyond first_radius"]),
])
def test_contradictory_options_are_refused(argv, words, small_map, tmp_path, capsys):
    _refused(["fit", str(small_map), *argv, "--out", str(tmp_path / "o"), *FAST], capsys, *words)


def test_the_api_checks_the_same_ranges():
    """FitOptions built in Python get the command line's checks (declared once, option_fields.Bounds)."""
    for kwargs in ({"growth": float("nan")}, {"seed": -1}, {"resamples": -5}, {"clip": float("nan")},
                   {"initial": {"inclination": 95.0}}, {"minor_axis_gap": 89.9}, {"ring_width": float("inf")}):
        with pytest.raises(InputError, match="out of range"):
            FitOptions(**kwargs)
    with pytest.raises(InputError, match="out of range"):
        CurveOptions(distance=float("inf"))
    with pytest.raises(InputError, match="at least 1"):
        InputOptions(bin=0)
    # a name given as text is one name, not its letters (issue: fixed = "inclination" was split into letters)
    assert FitOptions(fixed="inclination").fixed == ("inclination",)
    assert FitOptions(fixed="inclination, v_systemic").fixed == ("inclination", "v_systemic")
    assert FitOptions(initial={"position_angle": -30.0}).initial["position_angle"] == 330.0


@pytest.mark.parametrize("text, words", [
    ('[fit]\nresamples = "many"\n', ["[fit] resamples", "whole number"]),
    ('[fit]\nfixed = 3\n', ["[fit] fixed", "names as text"]),
    ('[fit]\nring_edges = [0, "a"]\n', ["comma-separated numbers"]),
    ("[fit]\ngrowth = nan\n", ["growth = nan"]),
    ('[curve]\ndistance = [1, 2]\n', ["expected a number"]),
    ("fit = 3\n", ["must be a table"]),
    ('[fit.initial]\ninclination = "steep"\n', ["expected a number"]),
    ("[fit\n", ["not valid TOML"]),
    ("[extra]\nx = 1\n", ["unknown table"]),
])
def test_run_files_with_wrong_types_are_refused(text, words, small_map, tmp_path, capsys):
    (tmp_path / "run.toml").write_text(text)
    _refused(["fit", str(small_map), "--config", str(tmp_path / "run.toml"), "--out", str(tmp_path / "o"), *FAST],
             capsys, *words)


def test_a_run_file_with_a_byte_order_mark_and_a_name_as_text(small_map, tmp_path):
    (tmp_path / "run.toml").write_bytes(b'\xef\xbb\xbf[fit]\nfixed = "inclination"\n[fit.initial]\ninclination = 60\n')
    values = jobs.read_run_file(tmp_path / "run.toml")
    assert jobs.Job.from_values(small_map, values).fit.fixed == ("inclination",)


# ---------------------------------------------------------------------------------------------- files
def _run_cli(args, timeout=60, cwd=None):
    return subprocess.run([sys.executable, "-m", "tiltedring.cli", *args], capture_output=True, text=True,
                          timeout=timeout, cwd=cwd, stdin=subprocess.DEVNULL,
                          env={**os.environ, "PYTHONPATH": str(ROOT), "NUMBA_NUM_THREADS": "1"})


def test_a_fifo_is_refused_without_blocking(tmp_path):
    """Issue: a FIFO given as the map blocked forever. Run in a subprocess with a timeout."""
    fifo = tmp_path / "map.fits"
    os.mkfifo(fifo)
    (tmp_path / "run.toml").unlink(missing_ok=True)
    os.mkfifo(tmp_path / "run.toml")
    (tmp_path / "m.csv").unlink(missing_ok=True)
    os.mkfifo(tmp_path / "m.csv")
    for args in (["fit", str(fifo), "--out", str(tmp_path / "o")],
                 ["fit", str(tmp_path / "x.fits"), "--config", str(tmp_path / "run.toml"), "--out", str(tmp_path / "o")],
                 ["batch", str(tmp_path / "m.csv"), "--out", str(tmp_path / "b")],
                 ["massmodel", str(fifo), "--out", str(tmp_path / "m")],
                 ["compare", str(fifo), str(fifo), "--out", str(tmp_path / "c")]):
        done = _run_cli(args, timeout=60)
        assert done.returncode == 2, done.stderr
        assert "named pipe (FIFO), not a regular file" in done.stderr and "Traceback" not in done.stderr


@pytest.mark.parametrize("what, words", [("device", "character device"), ("folder", "is a folder"),
                                         ("empty", "is empty"), ("missing", "does not exist"),
                                         ("text", "not a FITS file")])
def test_non_files_and_non_fits_are_refused(what, words, tmp_path, capsys):
    path = {"device": Path("/dev/null"), "folder": tmp_path, "empty": tmp_path / "e.fits",
            "missing": tmp_path / "none.fits", "text": tmp_path / "t.fits"}[what]
    if what == "empty":
        path.write_bytes(b"")
    if what == "text":
        path.write_text("SIMPLE? no")
    _refused(["fit", str(path), "--out", str(tmp_path / "o"), *FAST], capsys, words)


def test_gzip_compressed_fits_is_read(field, tmp_path, quiet):
    """Issue: a .fits.gz map was called 'not a FITS file' though astropy reads it."""
    plain = tmp_path / "g.fits"
    field.velocity_hdu.writeto(plain)
    packed = tmp_path / "g.fits.gz"
    packed.write_bytes(gzip.compress(plain.read_bytes()))
    a, b = read_velocity_map(plain), read_velocity_map(packed)
    np.testing.assert_array_equal(a.velocity, b.velocity)


# ---------------------------------------------------------------------------------------------- headers
@pytest.mark.parametrize("keys, words", [
    ({"CDELT1": "abc"}, ["CDELT1 = 'abc' is not a finite number", "--pixel-scale"]),
    ({"CDELT2": "NaN"}, ["CDELT2"]),
    ({"CRVAL1": "12h30m"}, ["CRVAL1", "not a finite number"]),  # issue: taken as 0
    ({"CDELT1": 0.0}, ["singular"]),
    ({"CD1_1": 1e-4, "CD1_2": 1e-4, "CD2_1": 1e-4, "CD2_2": 1e-4}, ["singular"]),
    ({"BMAJ": "big"}, ["beam major axis 'big'"]),
    ({"BMAJ": "NaN"}, ["beam major axis"]),
    ({"BPA": "north"}, ["beam position angle 'north'"]),
    ({"BMAJ": 0.0, "BMIN": 0.0}, ["beam axes must be positive"]),
    ({"BMAJ": -0.001}, ["beam axes must be positive"]),
    ({"BMIN": None}, ["BMIN is missing"]),
    ({"BMAJ": 15.0, "BMIN": 15.0}, ["wider than the whole map", "--beam 15,15"]),  # a beam in arcsec, not deg
    ({"BUNIT": None}, ["no BUNIT", "--velocity-unit"]),
    ({"BUNIT": "Jy/beam"}, ["not a velocity"]),
    ({"CDELT1": -1.0e-9, "CDELT2": 1.0e-9}, ["outside any galaxy map's range"]),
])
def test_bad_header_values_are_refused(keys, words, field, tmp_path, capsys):
    path = _variant(field, tmp_path, "bad", **keys)
    _refused(["fit", str(path), "--out", str(tmp_path / "o"), *FAST], capsys, *words)


def test_a_swapped_beam_is_put_right_not_made_circular():
    """Issue: BMAJ < BMIN was made circular at the larger axis (the swap overwrote before it copied)."""
    with pytest.warns(FitCaution, match="exchanged"):
        beam = Beam(8.0, 12.0, 30.0)
    assert (beam.major, beam.minor, beam.position_angle) == (12.0, 8.0, 120.0)
    header = fits.Header({"BMAJ": 8 / 3600, "BMIN": 12 / 3600, "BPA": 10.0})
    with pytest.warns(FitCaution):
        beam = Beam.from_header(header)
    assert beam.major == pytest.approx(12.0) and beam.minor == pytest.approx(8.0)
    assert beam.position_angle == pytest.approx(100.0)


def test_velocities_in_m_per_s_labelled_km_per_s_are_refused(field, tmp_path, capsys):
    path = _variant(field, tmp_path, "ms", data=field.velocity_hdu.data * 1000.0)
    _refused(["fit", str(path), "--out", str(tmp_path / "o"), *FAST], capsys, "--velocity-unit m/s",
             "speed of light")
    # stating the unit makes the same file usable
    assert main(["fit", str(path), "--velocity-unit", "m/s", "--out", str(tmp_path / "o"), *FAST]) == 0


def test_a_few_wild_pixels_are_blanked_with_a_caution(field, tmp_path):
    """Issue: a few pixels of 1e30 drove the inclination to -3.8e290 with exit 0."""
    data = field.velocity_hdu.data.copy()
    data[20:22, 20:22] = 1e30
    data[5, 5] = -4e5
    path = _variant(field, tmp_path, "wild", data=data)
    with pytest.warns(FitCaution, match="5 pixel"):
        vmap = read_velocity_map(path)
    assert np.isnan(vmap.velocity[20, 20]) and np.isnan(vmap.velocity[5, 5])


def test_an_integer_map_without_blank_keyword(field, tmp_path):
    """Issue: an integer map whose blank value has no BLANK keyword was read as velocities of -32768."""
    data = np.where(np.isfinite(field.velocity_hdu.data), field.velocity_hdu.data, -32768).astype(np.int16)
    path = _variant(field, tmp_path, "int", data=data, BLANK=None)
    with pytest.warns(FitCaution, match="-32768"):
        vmap = read_velocity_map(path)
    assert np.isfinite(vmap.velocity).sum() == np.isfinite(field.velocity_hdu.data).sum()


def test_a_beam_given_in_degrees_gets_a_caution_or_refusal(small_map, tmp_path, capsys):
    """Issue: a beam in the wrong unit ended in 'fewer than 939830199 valid pixels'."""
    err = _refused(["fit", str(small_map), "--beam", "0.00167", "--out", str(tmp_path / "o"), *FAST], capsys,
                   "--beam takes arcsec")
    assert "939830199" not in err
    _refused(["fit", str(small_map), "--beam", "21600", "--out", str(tmp_path / "o"), *FAST], capsys,
             "wider than the whole map")


def test_an_intensity_map_off_the_sky_or_negative_is_refused(field, small_map, tmp_path, capsys):
    header = field.intensity_hdu.header.copy()
    header["CRVAL1"] = (header["CRVAL1"] + 30.0) % 360
    fits.PrimaryHDU(field.intensity_hdu.data, header=header).writeto(tmp_path / "far.fits")
    _refused(["fit", str(small_map), "--intensity-map", str(tmp_path / "far.fits"), "--out", str(tmp_path / "o"),
              *FAST], capsys, "no positive value where the velocity map has data")
    fits.PrimaryHDU(-np.abs(field.intensity_hdu.data), header=field.intensity_hdu.header).writeto(tmp_path / "neg.fits")
    _refused(["fit", str(small_map), "--intensity-map", str(tmp_path / "neg.fits"), "--out", str(tmp_path / "o"),
              *FAST], capsys, "no positive value")


def test_a_pixel_scale_that_is_not_used_is_said(small_map, quiet):
    vmap = read_velocity_map(small_map, pixel_scale=3.0)
    assert any("pixel scale you gave" in n for n in vmap.notes)


# ---------------------------------------------------------------------------------------------- layout and memory
def test_the_memory_estimate_counts_the_rings(field, quiet):
    from tiltedring.io.binning import BYTES_PER_RING, memory_estimate, ring_count

    vmap = read_velocity_map(field.velocity_hdu)
    narrow, wide = FitOptions(ring_width="1pix"), FitOptions(ring_width="4pix")
    assert ring_count(vmap, narrow) > ring_count(vmap, wide) > 0
    assert memory_estimate(vmap, 100) - memory_estimate(vmap) == pytest.approx(100 * BYTES_PER_RING)
    with pytest.raises(InputError, match="at most 2000"):
        ring_count(vmap, FitOptions(ring_width="0.11pix", max_radius=700.0))


def test_ring_edges_beyond_the_data_exit_2(small_map, tmp_path, capsys):
    """Issue: ring edges beyond the data gave a traceback."""
    _refused(["fit", str(small_map), "--ring-edges", "0,10,20,50000", "--out", str(tmp_path / "o"), *FAST], capsys,
             "far beyond the map")
    assert main(["fit", str(small_map), "--ring-edges", "500,600,700", "--out", str(tmp_path / "o"),
                 *FAST]) == 2


def test_a_map_of_one_row_is_refused(field, tmp_path, capsys):
    """Issue: a 128x1 map was fitted to inclination 9.1e5 deg with exit 0."""
    path = _variant(field, tmp_path, "strip", data=field.velocity_hdu.data[20:21, :])
    _refused(["fit", str(path), "--out", str(tmp_path / "o"), *FAST], capsys, "too few")


def test_an_error_map_of_fill_values_is_refused(field, small_map, tmp_path, capsys):
    fits.PrimaryHDU(np.full((48, 48), 1e30, np.float32), header=field.velocity_hdu.header).writeto(tmp_path / "e.fits")
    _refused(["fit", str(small_map), "--error-map", str(tmp_path / "e.fits"), "--out", str(tmp_path / "o"), *FAST],
             capsys, "no pixel with both a finite velocity and a positive error")


def test_a_map_without_rotation_gets_a_caution(field, tmp_path):
    path = _variant(field, tmp_path, "flat", data=np.full((48, 48), 1450.0, np.float32), BUNIT="m/s")
    with pytest.warns(FitCaution, match="span only"):
        read_velocity_map(path)
