"""Time and memory of making velocity maps from a cube, per kind of map.

    python benchmarks/cube_maps.py                  # a 256 x 256 x 100 cube
    python benchmarks/cube_maps.py --size 128 --channels 60

The cube is drawn by the independent generator of the tests (tests/independent_cubes.py: a disc
filling most of the field, steep inner rise, dispersion 10 km/s, 5 km/s channels, 3.5-pixel beam,
white noise, a narrow foreground line excluded with the default interpolation). Two tables:

1. whole processes, ``tiltedring maps CUBE --velocity-kind K --exclude-velocities=... --out D``:
   wall time and peak resident memory from /usr/bin/time (start-up and reading included);
2. in one process after a warm-up (compiled code loaded): seconds of ``make_velocity_maps`` on the
   cube already read, for 1 and 2 threads, and the spectra fitted.
"""

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))
from independent_cubes import cube_hdu, draw_cube  # noqa: E402
from speed import timed  # noqa: E402

KINDS = ("moment", "peak", "gaussian", "hermite")


def write_cube(size, channels, folder):
    data, velocity, wcs, truth = draw_cube(shape=(size, size), n_channels=channels, pixel_scale=4.0,
                                           foreground=(1120.0, 3.0, 0.3), n_particles=2_000_000,
                                           disc_radius=0.45 * size * 4.0, r_turn=0.04 * size * 4.0)
    path = folder / "cube.fits"
    cube_hdu(data, velocity, wcs, bmaj_arcsec=truth["beam"]).writeto(path)
    return path


def main():
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--size", type=int, default=256)
    parser.add_argument("--channels", type=int, default=100)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        path = write_cube(args.size, args.channels, folder)
        print(f"cube {args.size} x {args.size} x {args.channels} ({path.stat().st_size / 1e6:.0f} MB on disc)\n")
        print("| kind | whole process s | peak memory MB |")
        print("| --- | --- | --- |")
        for kind in KINDS:
            seconds, mb = timed(["tiltedring", "maps", str(path), "--velocity-kind", kind,
                                 "--exclude-velocities=1105:1135", "--out", str(folder / f"maps_{kind}"), "-q"])
            print(f"| {kind} | {seconds:.1f} | {mb:.0f} |")
        print()
        in_process(path)


def in_process(path):
    import warnings

    from tiltedring.errors import FitCaution
    from tiltedring.io.cube import read_cube
    from tiltedring.io.velocity_fields import make_velocity_maps

    warnings.simplefilter("ignore", FitCaution)  # the interpolated-foreground caution, expected here
    start = time.perf_counter()
    cube = read_cube(path)
    print(f"reading the cube: {time.perf_counter() - start:.2f} s\n")
    make_velocity_maps(cube, kind="hermite", exclude_velocities=[(1105, 1135)])  # warm-up
    print("| kind | 1 thread s | 2 threads s | pixels with a velocity | spectra fitted |")
    print("| --- | --- | --- | --- | --- |")
    for kind in KINDS:
        seconds = []
        for threads in (1, 2):
            start = time.perf_counter()
            maps = make_velocity_maps(cube, kind=kind, exclude_velocities=[(1105, 1135)], threads=threads)
            seconds.append(time.perf_counter() - start)
        fitted = maps.record["fits"].get("spectra_fitted", 0)
        print(f"| {kind} | {seconds[0]:.2f} | {seconds[1]:.2f} | {int(np.isfinite(maps.velocity).sum())} | {fitted} |")


if __name__ == "__main__":
    main()
