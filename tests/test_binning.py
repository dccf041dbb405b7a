"""Maps too large for memory: the memory check names a binning factor, and binned maps fit the same disc.

The binned grid is checked against astropy's WCS of the original map (a binned pixel's centre is
the centre of its block), block values against direct numpy averages, and the fit of a binned map
against the truth of the synthetic disc (tolerances ours and stated).
"""

import subprocess
import sys

import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS

import tiltedring as tr
from tiltedring.errors import InputError
from tiltedring.io.binning import bin_map, check_memory, memory_estimate
from tiltedring.synthetic import DiscTruth, make_field


def _field(**kw):
    truth = DiscTruth(position_angle=70.0, inclination=55.0, x_center=63.2, y_center=64.1)
    return truth, make_field(truth, noise=2.0, seed=3, **kw)


def test_binned_grid_and_values_against_astropy_and_numpy():
    """Binned pixel (i, j) lies at the centre of original block (3i..3i+2, 3j..3j+2) by astropy's WCS of the
    original header; its velocity is the intensity-weighted mean of the block's pixels (numpy, by hand)."""
    _, field = _field(rotation=25.0)
    vm = tr.read_velocity_map(field.velocity_hdu, intensity=field.intensity_hdu)
    binned = bin_map(vm, 3)
    original = WCS(field.velocity_hdu.header).celestial
    for i, j in [(0, 0), (10, 17), (41, 5)]:
        expected = original.pixel_to_world_values(3 * i + 1.0, 3 * j + 1.0)
        got = binned.wcs.pixel_to_world_values(float(i), float(j))
        np.testing.assert_allclose(got, expected, atol=1e-9)
    # the Jacobian is taken at each grid's own centre, which moves slightly: sky curvature changes it by ~1e-5
    np.testing.assert_allclose(binned.sky_jacobian, 3 * vm.sky_jacobian, rtol=1e-4)
    j, i = 20, 22
    v = vm.velocity[3 * j:3 * j + 3, 3 * i:3 * i + 3]
    w = vm.intensity[3 * j:3 * j + 3, 3 * i:3 * i + 3]
    assert binned.velocity[j, i] == pytest.approx(np.sum(v * w) / np.sum(w), rel=1e-12)
    assert vm.shape == field.velocity_hdu.data.shape  # the input map is untouched
    assert any("binned 3x3" in note for note in binned.notes)


def test_binned_map_fits_the_same_disc(quiet):
    """A 2x2-binned map (beam 4 binned pixels across) recovers the disc as the full map does: PA within 1 deg,
    inclination within 2 deg, centre within 0.5 original pixels."""
    truth, field = _field()
    vm = tr.read_velocity_map(field.velocity_hdu)
    res = tr.fit_velocity_map(bin_map(vm, 2), resamples=0)
    g = res.geometry()
    assert abs(((g["position_angle"] - truth.position_angle + 180) % 360) - 180) < 1.0
    assert abs(g["inclination"] - truth.inclination) < 2.0
    x_orig, y_orig = 2 * g["x_center"] + 0.5, 2 * g["y_center"] + 0.5  # binned pixel k covers 2k, 2k+1
    assert np.hypot(x_orig - truth.x_center, y_orig - truth.y_center) < 0.5


def test_memory_check_names_the_binning_factor_that_fits():
    _, field = _field()
    vm = tr.read_velocity_map(field.velocity_hdu)
    need = memory_estimate(vm)
    check_memory(vm, available=10 * need)  # plenty: no complaint
    with pytest.raises(InputError, match=r"needs about .* GiB .* --bin 3 "):
        check_memory(vm, available=need / 6.0)
    with pytest.raises(InputError, match="whole number"):
        bin_map(vm, 0)


def test_cli_bin_writes_outputs_on_the_binned_grid(tmp_path):
    _, field = _field()
    path = tmp_path / "disc.fits"
    field.velocity_hdu.writeto(path)
    out = tmp_path / "fit"
    run = subprocess.run([sys.executable, "-m", "tiltedring.cli", "fit", str(path), "--out", str(out), "--bin", "2",
                          "--no-report", "--resamples", "0", "-q"], capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    model = fits.getdata(out / "model.fits")
    assert model.shape == (64, 64)


def test_batch_row_with_a_bin_column(tmp_path):
    """A manifest row may ask for binning (column ``bin``), as a map too large for memory would."""
    from tiltedring.batch import fit_one

    _, field = _field()
    path = tmp_path / "disc.fits"
    field.velocity_hdu.writeto(path)
    entry = fit_one({"name": "binned", "velocity_map": str(path), "bin": 2}, {"resamples": 0}, tmp_path / "out")
    assert entry["status"] == "ok", entry["error"]
    assert fits.getdata(tmp_path / "out" / "binned" / "model.fits").shape == (64, 64)
