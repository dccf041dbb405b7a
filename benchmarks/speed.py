"""Speed and memory of `tiltedring fit`, whole process against whole process, and where the time goes.

    python benchmarks/speed.py                      # sizes 128 256 512 1024 2048
    python benchmarks/speed.py --sizes 256 1024     # a subset
    python benchmarks/speed.py --skip-reference     # without the (slow) plain reference fits

Each map is a synthetic disc filling about 40 per cent of a square map (beam 4 pixels, noise 4 km/s
correlated over the beam, intensity map), so a 1024x1024 map has about 400,000 valid pixels.
Wall time and peak resident memory of each whole process come from /usr/bin/time. Tables:

1. against map size: the default fit (``tiltedring fit MAP --intensity-map I --out D --no-report``:
   all stages, diagnostics, beam-smearing correction, 20 resampling realisations, model and
   residual maps), the ring fit alone (``--no-beam-correction --resamples 0``), and the plain
   reference ``benchmarks/reference_fit.py`` (numpy + scipy least_squares with numerical
   Jacobians; the same ring fit, two stages) and its select-once variant; ratios of the default fit
   to each, measured in the same run;
2. against the number of rings (ring width) on the 1024x1024 map;
3. the cost of each step of the fit (in one process, after a first fit has loaded the compiled code);
4. resampling realisations (0, 20, 100) on the 1024x1024 map;
5. start-up: ``import tiltedring``, ``tiltedring --help``, and a small fit with an empty and with
   a filled compiled-code cache.
"""

import argparse
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent


def make(n, folder):
    """Write the n x n benchmark field and its intensity map; returns (velocity, intensity, valid pixels)."""
    from tiltedring.synthetic import DiscTruth, make_field

    r = 0.49 * n
    truth = DiscTruth(name="Bench Disc", x_center=n / 2 - 0.5 + 3.3, y_center=n / 2 - 0.5 - 2.1, position_angle=125.0,
                      inclination=60.0, disc_radius=r, r_turn=r / 12, scale_length=r / 2)
    field = make_field(truth, shape=(n, n), pixel_scale=1.0, beam_fwhm=4.0, noise=4.0, seed=1)
    vel, inten = folder / f"field{n}.fits", folder / f"intensity{n}.fits"
    field.velocity_hdu.writeto(vel, overwrite=True)
    field.intensity_hdu.writeto(inten, overwrite=True)
    return vel, inten, int(np.isfinite(field.velocity_hdu.data).sum())


def timed(cmd, env=None):
    """(wall seconds, peak MB) of a whole process."""
    out = subprocess.run(["/usr/bin/time", "-f", "%e %M"] + cmd, capture_output=True, text=True, env=env)
    if out.returncode != 0:
        raise RuntimeError(out.stderr[-2000:])
    seconds, kib = out.stderr.strip().splitlines()[-1].split()
    return float(seconds), int(kib) / 1024.0


def fit_cmd(vel, out, *extra):
    return ["tiltedring", "fit", str(vel), "--out", str(out), "--no-report", "-q", *extra]


def table(title, head, rows):
    print(f"\n{title}\n")
    print("| " + " | ".join(head) + " |")
    print("|" + "|".join(" --- " for _ in head) + "|")
    for row in rows:
        print("| " + " | ".join(str(c) for c in row) + " |")


def by_size(sizes, tmp, reference: bool):
    rows = []
    for n in sizes:
        vel, inten, valid = make(n, tmp)
        default = timed(fit_cmd(vel, tmp / f"default{n}", "--intensity-map", str(inten)))
        rings = timed(fit_cmd(vel, tmp / f"rings{n}", "--no-beam-correction", "--resamples", "0"))
        row = [f"{n}x{n}", valid, f"{default[0]:.1f}", f"{default[1]:.0f}", f"{rings[0]:.1f}", f"{rings[1]:.0f}"]
        if reference:
            script = str(ROOT / "benchmarks" / "reference_fit.py")
            same = timed([sys.executable, script, str(vel)])
            once = timed([sys.executable, script, str(vel), "--select-once"])
            row += [f"{same[0]:.1f}", f"{same[1]:.0f}", f"{once[0]:.1f}", f"{default[0] / same[0]:.2f}",
                    f"{default[0] / once[0]:.2f}"]
        rows.append(row)
        print(f"  {n}x{n} done", file=sys.stderr)
    head = ["map", "valid px", "default s", "MB", "rings only s", "MB"]
    if reference:
        head += ["reference s", "MB", "select-once ref s", "default/reference", "default/select-once"]
    table("1. Whole process against map size", head, rows)


def by_rings(tmp):
    vel, inten, _ = make(1024, tmp)
    rows = []
    for width in ("2pix", "4pix", "8pix", "16pix"):
        out = tmp / f"width{width}"
        seconds, mb = timed(fit_cmd(vel, out, "--intensity-map", str(inten), "--ring-width", width))
        n_rings = sum(1 for line in (out / "rings.ecsv").read_text().splitlines() if not line.startswith("#")) - 1
        rows.append([width, n_rings, f"{seconds:.1f}", f"{mb:.0f}"])
    table("2. Default fit of the 1024x1024 map against the number of rings", ["ring width", "rings", "s", "MB"], rows)


def by_step(tmp):
    import warnings

    import tiltedring as tr

    vel, inten, _ = make(1024, tmp)
    vmap = tr.read_velocity_map(vel, intensity=inten)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tr.fit_velocity_map(vmap)  # loads the compiled code
        laps = tr.fit_velocity_map(vmap).timings
    total = sum(laps.values())
    rows = [[name, f"{seconds:.2f}", f"{100 * seconds / total:.0f}"] for name, seconds in laps.items()]
    rows.append(["total", f"{total:.2f}", "100"])
    table("3. Steps of the default fit of the 1024x1024 map (one process, compiled code loaded)",
          ["step", "s", "per cent"], rows)


def by_resamples(tmp):
    vel, inten, _ = make(1024, tmp)
    rows = []
    for n in (0, 20, 100):
        seconds, mb = timed(fit_cmd(vel, tmp / f"res{n}", "--intensity-map", str(inten), "--resamples", str(n)))
        rows.append([n, f"{seconds:.1f}", f"{mb:.0f}"])
    table("4. Resampling realisations, default fit of the 1024x1024 map", ["realisations", "s", "MB"], rows)


def start_up(tmp):
    vel, _, _ = make(128, tmp)
    rows = [["import tiltedring", f"{timed([sys.executable, '-c', 'import tiltedring'])[0]:.2f}"],
            ["tiltedring --help", f"{timed(['tiltedring', '--help'])[0]:.2f}"]]
    cold = dict(os.environ, NUMBA_CACHE_DIR=str(tmp / "empty_cache"))
    rows.append(["fit 128x128, empty compiled-code cache", f"{timed(fit_cmd(vel, tmp / 'cold'), env=cold)[0]:.1f}"])
    rows.append(["fit 128x128, same cache again", f"{timed(fit_cmd(vel, tmp / 'warm'), env=cold)[0]:.1f}"])
    table("5. Start-up", ["what", "s"], rows)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[128, 256, 512, 1024, 2048])
    parser.add_argument("--skip-reference", action="store_true")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        vel, _, _ = make(64, tmp)
        subprocess.run(fit_cmd(vel, tmp / "warm_up"), check=True)  # fill the compiled-code cache
        start_up(tmp)
        by_size(args.sizes, tmp, not args.skip_reference)
        by_step(tmp)
        by_rings(tmp)
        by_resamples(tmp)


if __name__ == "__main__":
    main()
