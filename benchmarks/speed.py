"""Speed and memory of the default fit against map size, and against the plain reference fit.

    python benchmarks/speed.py [SIZES...]        # default: 128 256 512 1024

For each size a synthetic disc filling about 40 per cent of the map (beam 4 pixels, noise 4 km/s,
intensity map) is fitted, whole process against whole process, by:

- ``tiltedring fit MAP --out DIR --no-report`` (all stages, diagnostics, beam-smearing correction,
  20 resampling realisations, model and residual maps), and the same with ``--resamples 0``;
- ``tiltedring fit ... --no-beam-correction --resamples 0`` (the ring fit and diagnostics alone);
- ``benchmarks/reference_fit.py MAP`` (numpy + scipy least_squares with numerical Jacobians, two
  stages).

Wall time and peak resident memory come from /usr/bin/time. Prints a table.
"""

import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent


def make(n, folder):
    from tiltedring.synthetic import DiscTruth, make_field

    r = 0.49 * n
    truth = DiscTruth(name="Bench Disc", x_center=n / 2 - 0.5 + 3.3, y_center=n / 2 - 0.5 - 2.1, position_angle=125.0,
                      inclination=60.0, disc_radius=r, r_turn=r / 12, scale_length=r / 2)
    field = make_field(truth, shape=(n, n), pixel_scale=1.0, beam_fwhm=4.0, noise=4.0, seed=1)
    vel, inten = folder / f"field{n}.fits", folder / f"intensity{n}.fits"
    field.velocity_hdu.writeto(vel, overwrite=True)
    field.intensity_hdu.writeto(inten, overwrite=True)
    return vel, inten, int(np.isfinite(field.velocity_hdu.data).sum())


def timed(cmd):
    out = subprocess.run(["/usr/bin/time", "-f", "%e %M"] + cmd, capture_output=True, text=True)
    if out.returncode != 0:
        raise RuntimeError(out.stderr[-2000:])
    seconds, kib = out.stderr.strip().splitlines()[-1].split()
    return float(seconds), int(kib) / 1024.0


def main(sizes):
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        vel, inten, _ = make(64, tmp)  # warm the numba cache
        subprocess.run(["tiltedring", "fit", str(vel), "--out", str(tmp / "warm"), "--no-report", "-q"], check=True)
        for n in sizes:
            vel, inten, valid = make(n, tmp)
            runs = {
                "default": ["tiltedring", "fit", str(vel), "--intensity-map", str(inten), "--no-report", "-q"],
                "no resampling": ["tiltedring", "fit", str(vel), "--intensity-map", str(inten), "--no-report",
                                  "--resamples", "0", "-q"],
                "rings only": ["tiltedring", "fit", str(vel), "--no-report", "--resamples", "0",
                               "--no-beam-correction", "-q"],
            }
            row = {"size": n, "valid": valid}
            for name, cmd in runs.items():
                row[name] = timed(cmd + ["--out", str(tmp / f"{name.replace(' ', '_')}{n}")])
            row["reference"] = timed([sys.executable, str(ROOT / "benchmarks" / "reference_fit.py"), str(vel)])
            rows.append(row)
    head = (f"{'map':>10} {'valid px':>9} | {'default s':>9} {'MB':>6} | {'no resamp s':>11} {'MB':>6} | "
            f"{'rings only s':>12} {'MB':>6} | {'reference s':>11} {'MB':>6} | {'default/ref':>11}")
    print(head)
    print("-" * len(head))
    for r in rows:
        print(f"{r['size']:>5}x{r['size']:<4} {r['valid']:>9} | {r['default'][0]:>9.1f} {r['default'][1]:>6.0f} | "
              f"{r['no resampling'][0]:>11.1f} {r['no resampling'][1]:>6.0f} | {r['rings only'][0]:>12.1f} "
              f"{r['rings only'][1]:>6.0f} | {r['reference'][0]:>11.1f} {r['reference'][1]:>6.0f} | "
              f"{r['default'][0] / r['reference'][0]:>11.2f}")


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [128, 256, 512, 1024])
