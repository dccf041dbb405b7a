"""Does the all-pixel centre fit converge? Several starts on one large field, drawn by independent code.

    python benchmarks/centre_convergence.py [SIZE] [SEED]

Draws a SIZE x SIZE field (default 512) with tests/independent_fields.py (scipy Rotation particles,
astropy WCS; an error map of the true noise), holds the true rotation curve and orientation, and runs
:func:`tiltedring.pipeline.centre.refine_centre` from three starts (the truth offset by +-1.5 pixels
and +-5 km/s). Prints, per start, the centre and systemic velocity found, the errors, the steps; then
the spread over the starts against the reported error, and the offset from the truth.
"""

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from independent_fields import draw_field  # noqa: E402

import tiltedring as tr  # noqa: E402
from tiltedring.pipeline.centre import refine_centre  # noqa: E402
from tiltedring.pipeline.inputs import valid_pixels  # noqa: E402

STARTS = [(1.5, -1.5, 5.0), (-1.5, 1.5, -5.0), (1.5, 1.5, 0.0)]


def field(size: int, seed: int):
    hdul, truth = draw_field(40.0, 60.0, shape=(size, size), pixel_scale=1.0, beam_pixels=5.0, noise=5.0,
                             seed=seed, n_particles=6_000_000, r_turn=0.06 * size)
    velocity = hdul[0].data.astype(float)
    error = np.where(np.isfinite(velocity), 5.0, np.nan)
    vmap = tr.read_velocity_map(hdul[0], error=(error, hdul[0].header))
    return vmap, truth


def run(vmap, truth, fit=refine_centre):
    radii = np.linspace(2.0, truth["disc_radius"], 40)
    rings = {"radius": radii, "v_rotation": truth["v_rotation"](radii), "position_angle": truth["position_angle"],
             "inclination": truth["inclination"]}
    rows = []
    for dx, dy, dv in STARTS:
        start = {"x_center": truth["x_center"] + dx, "y_center": truth["y_center"] + dy,
                 "v_systemic": truth["v_systemic"] + dv, "position_angle": truth["position_angle"],
                 "inclination": truth["inclination"]}
        t0 = time.perf_counter()
        out = fit(vmap, valid_pixels(vmap), rings, float(radii[-1]), start)
        values, errors = (out.values, out.errors) if hasattr(out, "values") else out
        rows.append((values, errors, getattr(out, "steps", None), time.perf_counter() - t0))
    return rows


def report(rows, truth) -> None:
    print("| start | x_center | y_center | v_systemic | errors (x, y, v) | steps | s |")
    print("| --- | --- | --- | --- | --- | --- | --- |")
    for k, (values, errors, steps, seconds) in enumerate(rows):
        print(f"| {k} | {values['x_center']:.4f} | {values['y_center']:.4f} | {values['v_systemic']:.3f} | "
              f"{errors['x_center']:.4f}, {errors['y_center']:.4f}, {errors['v_systemic']:.3f} | {steps} | "
              f"{seconds:.2f} |")
    xs = np.array([[r[0]["x_center"], r[0]["y_center"]] for r in rows])
    spread = float(np.max(np.hypot(*(xs - xs.mean(axis=0)).T)) * 2)
    error = float(np.median([np.hypot(r[1]["x_center"], r[1]["y_center"]) for r in rows]))
    offset = float(np.median(np.hypot(xs[:, 0] - truth["x_center"], xs[:, 1] - truth["y_center"])))
    v_spread = float(np.ptp([r[0]["v_systemic"] for r in rows]))
    print(f"\ncentre spread over starts {spread:.4f} px (reported error {error:.4f} px, ratio {spread / error:.1f}); "
          f"v_systemic spread {v_spread:.4f} km/s; median offset from the truth {offset:.3f} px")


if __name__ == "__main__":
    size = int(sys.argv[1]) if len(sys.argv) > 1 else 512
    seed = int(sys.argv[2]) if len(sys.argv) > 2 else 1
    vmap, truth = field(size, seed)
    report(run(vmap, truth), truth)
