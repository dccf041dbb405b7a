"""Many galaxies on a local dask cluster: complete catalogue, broken fields recorded, resumable."""

import os
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

from tiltedring.batch import read_manifest, run_batch
from tiltedring.synthetic import DiscTruth, make_field

distributed = pytest.importorskip("dask.distributed", reason="dask.distributed is needed for batch runs")


def _survey(folder, n_good=24):
    """Small synthetic fields plus deliberately broken ones, and a manifest naming them."""
    rng = np.random.default_rng(4)
    rows = ["name,velocity_map,distance"]
    for k in range(n_good):
        truth = DiscTruth(name=f"Vale {k}", position_angle=rng.uniform(0, 360), inclination=rng.uniform(40, 70),
                          disc_radius=44.0, x_center=23.5, y_center=23.5, r_turn=10.0)
        field = make_field(truth, shape=(48, 48), pixel_scale=2.0, beam_fwhm=6.0, noise=3.0, seed=k)
        field.velocity_hdu.writeto(folder / f"vale{k}.fits", overwrite=True)
        rows.append(f"vale{k},vale{k}.fits,{8 + k % 5}")
    (folder / "text.fits").write_text("this is not FITS")
    rows.append("not_fits,text.fits,5")
    cube = fits.PrimaryHDU(np.ones((5, 20, 20), np.float32))
    cube.header["BUNIT"] = "km/s"
    cube.writeto(folder / "cube.fits", overwrite=True)
    rows.append("cube,cube.fits,5")
    blank = make_field(DiscTruth(), shape=(48, 48)).velocity_hdu
    blank.data[:] = np.nan
    blank.writeto(folder / "blank.fits", overwrite=True)
    rows.append("all_blank,blank.fits,5")
    rows.append("missing,nowhere.fits,5")
    (folder / "survey.csv").write_text("\n".join(rows) + "\n")
    return folder / "survey.csv", n_good, 4


def test_batch_on_local_dask_cluster_then_resume(tmp_path):
    manifest, n_good, n_bad = _survey(tmp_path)
    out = tmp_path / "out"
    summary = run_batch(manifest, out, {"resamples": 0}, workers=2)
    catalogue = Table.read(out / "catalogue.ecsv")
    assert len(catalogue) == n_good + n_bad
    assert (catalogue["status"] == "ok").sum() == n_good
    failed = catalogue[catalogue["status"] == "failed"]
    reasons = dict(zip(failed["name"], failed["error"]))
    assert "not a FITS file" in reasons["not_fits"]
    assert "no celestial" in reasons["cube"]  # read as a spectral cube, which this WCS-less file cannot be
    assert "blank everywhere" in reasons["all_blank"]
    assert "does not exist" in reasons["missing"]
    assert summary["failed"] == n_bad
    again = run_batch(manifest, out, {"resamples": 0}, workers=2)
    assert again["skipped"] == n_good and again["fitted"] == n_bad
    assert len(Table.read(out / "catalogue.ecsv")) == n_good + n_bad


def test_killed_worker_loses_nothing(tmp_path):
    """A worker process killed mid-run: its task is retried elsewhere and the catalogue is complete."""
    manifest, n_good, _ = _survey(tmp_path, n_good=10)
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None)
    client = distributed.Client(cluster)
    try:
        pids = list(client.run(os.getpid).values())
        out = tmp_path / "out"
        result = {}
        thread = threading.Thread(target=lambda: result.update(run_batch(manifest, out, {"resamples": 0},
                                                                        scheduler=cluster.scheduler_address)))
        thread.start()
        deadline = time.time() + 120
        while time.time() < deadline and len([p for p in out.glob("vale*") if p.is_dir()]) < 2:
            time.sleep(0.2)
        os.kill(pids[0], signal.SIGKILL)
        thread.join(timeout=300)
    finally:
        client.close()
        cluster.close()
    catalogue = Table.read(out / "catalogue.ecsv")
    assert (catalogue["status"] == "ok").sum() == n_good


def test_interrupted_run_resumes_without_redoing_finished(tmp_path):
    """The whole batch process killed mid-way; the same command then fits only what was left."""
    manifest, n_good, n_bad = _survey(tmp_path, n_good=12)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "tiltedring.cli", "batch", str(manifest), "--out", str(out), "--workers", "1",
           "--resamples", "0", "-q"]
    proc = subprocess.Popen(cmd)
    deadline = time.time() + 120
    while time.time() < deadline and len([p for p in out.glob("vale*") if p.is_dir()]) < 3:
        time.sleep(0.1)
    proc.kill()
    proc.wait()
    finished = {p.name for p in out.glob("vale*") if p.is_dir()}
    assert 3 <= len(finished) < n_good
    assert not list(out.glob("vale*/*.partial"))
    summary = run_batch(manifest, out, {"resamples": 0}, workers=1)
    assert summary["skipped"] == len(finished)
    catalogue = Table.read(out / "catalogue.ecsv")
    assert (catalogue["status"] == "ok").sum() == n_good


def test_manifest_paths_are_relative_to_the_manifest(tmp_path):
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "m.csv").write_text("velocity_map\nmaps/a.fits\n")
    rows = read_manifest(tmp_path / "sub" / "m.csv")
    assert rows[0]["velocity_map"] == str((tmp_path / "sub" / "maps" / "a.fits").resolve())
    assert rows[0]["name"] == "a"
