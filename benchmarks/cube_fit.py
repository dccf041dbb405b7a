"""Time and memory of the inner curve fitted on a cube, and its accuracy over synthetic cubes.

    python benchmarks/cube_fit.py [N_CUBES]

1. Speed: a 256 x 256 x 100 cube (analytic generator of tests/analytic_cubes.py: beam 3.5 pixels,
   5 km/s channels, dispersion 10 km/s, peak signal-to-noise 15), rings one beam wide, the map curve
   20 % low inside three beams as the start, true geometry held; ``fit_curve_on_cube`` with 1 and 2
   threads: wall time, peak memory of the fit (tracemalloc, which sees numpy's arrays) and whether
   the two give the same numbers.
2. Accuracy: N_CUBES cubes (96 x 96 x 84) with inclinations and turnover radii drawn at random
   (seeded): v_rotation / truth per ring between 0.5 and 2 beams and the dispersion error beyond 2 beams.
"""

import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))
from analytic_cubes import draw_line_cube  # noqa: E402

from tiltedring.fitting.cube_fit import fit_curve_on_cube  # noqa: E402


def start_rings(truth, width_beams=1.0):
    beam = truth["beam"]
    edges = np.arange(0.0, truth["disc_radius"] - 0.5 * beam, width_beams * beam)
    radius = 0.5 * (edges[1:] + edges[:-1])
    n = radius.size
    rings = {"radius": radius, "x_center": np.full(n, truth["x_center"]), "y_center": np.full(n, truth["y_center"]),
             "v_systemic": np.full(n, truth["v_systemic"]), "position_angle": np.full(n, truth["position_angle"]),
             "inclination": np.full(n, truth["inclination"]),
             "v_rotation": truth["v_rotation"](radius) * np.where(radius < 3 * beam, 0.8, 1.0)}
    return rings, edges, radius


def noisy_cube(**kwargs):
    clean, _ = draw_line_cube(**kwargs)
    return draw_line_cube(noise=clean.data.max() / 15.0, **kwargs)


def speed():
    print("## Speed: 256 x 256 x 100 cube")
    t0 = time.perf_counter()
    cube, truth = noisy_cube(shape=(256, 256), n_channels=100, supersample=3, fine=5, r_turn=6.0, scale_length=60.0,
                             seed=11)
    print(f"(cube drawn in {time.perf_counter() - t0:.1f} s; {cube.data.nbytes / 2**20:.0f} MiB of data)")
    rings, edges, radius = start_rings(truth)
    fit_curve_on_cube(cube, rings, edges, threads=1)  # compile (numba cache) before timing
    print("| threads | wall s | peak MiB (fit) | rings on cube | rings | steps taken |")
    print("| --- | --- | --- | --- | --- | --- |")
    results = {}
    for threads in (1, 2):
        tracemalloc.start()
        t0 = time.perf_counter()
        fitted = fit_curve_on_cube(cube, rings, edges, threads=threads)
        wall = time.perf_counter() - t0
        peak = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        results[threads] = fitted
        print(f"| {threads} | {wall:.1f} | {peak:.0f} | {(fitted.treatment == 'cube').sum()} | {radius.size} | "
              f"{fitted.record['steps_taken']} |")
    same = all(np.array_equal(results[1].rings[k], results[2].rings[k]) for k in ("v_rotation", "dispersion"))
    print(f"\n1 and 2 threads give identical rings: {same}\n")


def accuracy(n_cubes):
    print(f"## Accuracy over {n_cubes} cubes (96 x 96 x 84, peak S/N 15, true geometry held, start 20 % low)")
    print("| cube | inclination | r_turn / beam | v/v_true at 0.5, 1.5 beams | worst |v/v_true - 1| in 0.5-2 beams "
          "| worst |dispersion - 10| beyond 2 beams (km/s) |")
    print("| --- | --- | --- | --- | --- | --- |")
    rng = np.random.default_rng(2024)
    worst_v, worst_s = [], []
    for k in range(n_cubes):
        inclination = float(rng.uniform(40, 75))
        r_turn = float(rng.uniform(4.0, 9.0))
        cube, truth = noisy_cube(inclination=inclination, r_turn=r_turn, position_angle=float(rng.uniform(0, 360)),
                                 seed=100 + k)
        rings, edges, radius = start_rings(truth)
        fitted = fit_curve_on_cube(cube, rings, edges)
        beam = truth["beam"]
        ratio = fitted.rings["v_rotation"] / truth["v_rotation"](radius)
        inner = (radius >= 0.5 * beam) & (radius <= 2 * beam)
        outer = radius > 2 * beam
        wv = float(np.max(np.abs(ratio[inner] - 1)))
        ws = float(np.max(np.abs(fitted.rings["dispersion"][outer] - truth["dispersion"])))
        worst_v.append(wv)
        worst_s.append(ws)
        shown = ", ".join(f"{v:.3f}" for v in ratio[inner])
        print(f"| {k} | {inclination:.0f} | {r_turn / beam:.2f} | {shown} | {wv:.3f} | {ws:.2f} |")
    print(f"\nworst over all cubes: |v/v_true - 1| = {max(worst_v):.3f}, |dispersion error| = {max(worst_s):.2f} km/s")


if __name__ == "__main__":
    speed()
    accuracy(int(sys.argv[1]) if len(sys.argv) > 1 else 4)
