"""The command line on a bundled demo field: outputs, WCS, refusals and exit codes."""

import json

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

from tiltedring.cli import main


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    from pathlib import Path

    demo = Path(__file__).parent.parent / "demo_fields"
    out = tmp_path_factory.mktemp("runs") / "ashgrove"
    code = main(["fit", str(demo / "ashgrove_velocity.fits"), "--out", str(out), "-q"])
    return code, out, demo


def test_fit_writes_every_output(demo_run):
    code, out, demo = demo_run
    assert code == 0
    assert {p.name for p in out.iterdir()} == {".tiltedring-output.json", "rings.ecsv", "curve.ecsv",
                                              "curve_covariance.ecsv", "stage_free.ecsv", "stage_centred.ecsv",
                                              "model.fits", "residual.fits", "fit.json", "report.pdf"}
    rings = Table.read(out / "rings.ecsv")
    assert str(rings["v_rotation"].unit) == "km / s" and str(rings["radius"].unit) == "arcsec"
    truth = Table.read(demo / "ashgrove_truth.ecsv")
    far = rings["radius"] > 24
    v_true = np.interp(rings["radius"][far], truth["radius"], truth["v_rotation"])
    assert np.median(np.abs(rings["v_rotation"][far] - v_true)) < 4.0  # demo truth: v_flat 180 km/s


def test_maps_keep_the_input_wcs(demo_run):
    _, out, demo = demo_run
    src = WCS(fits.getheader(demo / "ashgrove_velocity.fits"))
    for name in ("model.fits", "residual.fits"):
        hdr = fits.getheader(out / name)
        assert hdr["BUNIT"] == "km/s"
        w = WCS(hdr)
        np.testing.assert_allclose(w.wcs.crval, src.wcs.crval)
        np.testing.assert_allclose(w.pixel_scale_matrix, src.pixel_scale_matrix)
    data = fits.getdata(demo / "ashgrove_velocity.fits")
    model, resid = fits.getdata(out / "model.fits"), fits.getdata(out / "residual.fits")
    ok = np.isfinite(resid)
    np.testing.assert_allclose(resid[ok], (data - model)[ok], atol=1e-3)


def test_run_record(demo_run):
    _, out, _ = demo_run
    record = json.loads((out / "fit.json").read_text())
    assert len(record["inputs"]["velocity_map"]["sha256"]) == 64
    for key in ("options", "versions", "first_guess", "stages", "statistics", "error_columns", "cautions"):
        assert key in record
    assert set(record["stages"]) == {"free", "centred", "final"}


def test_existing_output_folder_is_not_overwritten(demo_run, capsys):
    _, out, demo = demo_run
    before = (out / "rings.ecsv").read_bytes()
    assert main(["fit", str(demo / "ashgrove_velocity.fits"), "--out", str(out)]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert (out / "rings.ecsv").read_bytes() == before


def test_bad_input_exit_code_and_message(tmp_path, capsys):
    p = tmp_path / "x.fits"
    p.write_text("not fits")
    assert main(["fit", str(p), "--out", str(tmp_path / "o")]) == 2
    assert "not a FITS file" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_options_from_run_file_and_command_line(tmp_path, demo_fields):
    cfg = tmp_path / "run.toml"
    cfg.write_text('[fit]\nring_width = "6pix"\nazimuth_weight = "cos-squared"\n[fit.initial]\nv_systemic = 1450.0\n')
    out = tmp_path / "o"
    code = main(["fit", str(demo_fields / "ashgrove_velocity.fits"), "--config", str(cfg), "--azimuth-weight", "none",
                 "--fix", "v_systemic", "--out", str(out), "-q"])
    assert code == 0
    record = json.loads((out / "fit.json").read_text())
    assert record["options"]["ring_width"] == "6pix"
    assert record["options"]["azimuth_weight"] == "none"  # the command line wins
    rings = Table.read(out / "rings.ecsv")
    np.testing.assert_allclose(np.diff(rings["radius"]), 12.0)
    np.testing.assert_allclose(rings["v_systemic"], 1450.0)


def test_version_and_help(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0 and "tiltedring" in capsys.readouterr().out
    with pytest.raises(SystemExit):
        main(["fit", "--help"])
    assert "examples:" in capsys.readouterr().out
