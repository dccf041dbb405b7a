"""Batch throughput and resumption on a local dask cluster.

    python benchmarks/batch_throughput.py [N_FIELDS] [KILL_AFTER_SECONDS]

Draws N small synthetic fields (64x64; 10 per cent deliberately broken: text files, cubes, blank
maps, missing files, no unit), runs ``tiltedring batch`` with one worker per core, kills it after
KILL_AFTER_SECONDS, runs the same command again, and checks that the catalogue is complete, every
broken field is recorded with its reason, and no finished galaxy was fitted twice. Prints a table.
"""

import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table


def make_survey(folder, n):
    from tiltedring.synthetic import DiscTruth, make_field

    rng = np.random.default_rng(11)
    rows = ["name,velocity_map,distance"]
    n_bad = max(n // 10, 1)
    kinds = ["text", "cube", "blank", "missing", "no_unit"]
    for k in range(n - n_bad):
        truth = DiscTruth(name=f"Survey {k}", position_angle=rng.uniform(0, 360), inclination=rng.uniform(35, 75),
                          disc_radius=60.0, x_center=31.5, y_center=31.5, r_turn=12.0)
        make_field(truth, shape=(64, 64), pixel_scale=2.0, beam_fwhm=6.0, noise=3.0, seed=k).velocity_hdu.writeto(
            folder / f"s{k}.fits", overwrite=True)
        rows.append(f"s{k},s{k}.fits,{5 + k % 20}")
    for j in range(n_bad):
        kind = kinds[j % len(kinds)]
        path = folder / f"bad{j}.fits"
        if kind == "text":
            path.write_text("not fits")
        elif kind == "cube":
            h = fits.PrimaryHDU(np.ones((4, 16, 16), np.float32))
            h.header["BUNIT"] = "km/s"
            h.writeto(path)
        elif kind in ("blank", "no_unit"):
            h = make_field(DiscTruth(disc_radius=60, x_center=31.5, y_center=31.5), shape=(64, 64), pixel_scale=2.0,
                           beam_fwhm=6.0).velocity_hdu
            if kind == "blank":
                h.data[:] = np.nan
            else:
                del h.header["BUNIT"]
            h.writeto(path)
        rows.append(f"bad{j}_{kind},{path.name if kind != 'missing' else 'gone.fits'},5")
    (folder / "survey.csv").write_text("\n".join(rows) + "\n")
    return folder / "survey.csv", n_bad


def main(n=200, kill_after=25.0):
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        manifest, n_bad = make_survey(tmp, n)
        out = tmp / "out"
        cmd = ["tiltedring", "batch", str(manifest), "--out", str(out), "--resamples", "0", "-q"]
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd)
        try:
            proc.wait(timeout=kill_after)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        first = time.perf_counter() - t0
        done_before = {p.name for p in out.glob("s*") if p.is_dir()}
        t1 = time.perf_counter()
        result = subprocess.run(cmd[:-1], capture_output=True, text=True)
        second = time.perf_counter() - t1
        catalogue = Table.read(out / "catalogue.ecsv")
        failed = catalogue[catalogue["status"] == "failed"]
        print(result.stdout.strip())
        print(f"{'fields':<38} {n} ({n_bad} broken)")
        print(f"{'first run (killed after)':<38} {first:.1f} s, {len(done_before)} galaxies finished")
        print(f"{'second run':<38} {second:.1f} s")
        print(f"{'catalogue rows / ok / failed':<38} {len(catalogue)} / {(catalogue['status'] == 'ok').sum()} / "
              f"{len(failed)}")
        print(f"{'broken fields recorded with a reason':<38} {sum(bool(e) for e in failed['error'])} of {n_bad}")
        fitted = n - n_bad
        print(f"{'throughput (fits/min, both runs)':<38} {fitted / (first + second) * 60:.0f} on "
              f"{__import__('os').cpu_count()} cores")
        for row in failed[:5]:
            print(f"  {row['name']}: {row['error'][:90]}")


if __name__ == "__main__":
    main(*(float(a) if i else int(a) for i, a in enumerate(sys.argv[1:3])))
