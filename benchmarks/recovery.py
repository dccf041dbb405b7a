"""Recovery of known geometry on held-out fields drawn by code that is not the project's.

    python benchmarks/recovery.py [N_FIELDS] [SEED]

Fields: 200x200 pixels, beam 4 pixels, beam-correlated noise 4 km/s, position angles anywhere in
0-360, inclinations 45-70 deg, BUNIT alternately km/s and m/s, north-up and rotated WCS, drawn with
tests/independent_fields.py (scipy Rotation test particles + astropy WCS). Each is fitted by the
command line exactly as a user would: `tiltedring fit MAP --out DIR` with no other option.
Prints one row per field and the medians.
"""

import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from astropy.table import Table

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))
from independent_fields import draw_field  # noqa: E402


def main(n_fields=12, seed=2026):
    rng = np.random.default_rng(seed)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for k in range(n_fields):
            pa, inc = rng.uniform(0, 360), rng.uniform(45, 70)
            rotation = 0.0 if k % 2 == 0 else rng.uniform(-90, 90)
            unit = "km/s" if (k // 2) % 2 == 0 else "m/s"
            hdul, truth = draw_field(pa, inc, rotation=rotation, unit=unit, seed=seed + k,
                                     centre_offset=tuple(rng.uniform(-6, 6, 2)))
            path = Path(tmp) / f"field{k}.fits"
            hdul.writeto(path)
            out = Path(tmp) / f"fit{k}"
            t0 = time.perf_counter()
            subprocess.run(["tiltedring", "fit", str(path), "--out", str(out), "-q"], check=True)
            seconds = time.perf_counter() - t0
            rings = Table.read(out / "rings.ecsv")
            geom = json.loads((out / "fit.json").read_text())["geometry"]
            far = rings["radius"] > 3 * truth["beam"]
            dv = np.abs(rings["v_rotation"][far] - truth["v_rotation"](rings["radius"][far]))
            rows.append({
                "pa": pa, "inc": inc, "rot": rotation, "unit": unit,
                "d_pa": abs(((geom["position_angle"] - truth["position_angle"] + 180) % 360) - 180),
                "d_inc": abs(geom["inclination"] - truth["inclination"]),
                "d_centre": np.hypot(geom["x_center"] - truth["x_center"], geom["y_center"] - truth["y_center"]),
                "d_vsys": abs(geom["v_systemic"] - truth["v_systemic"]),
                "d_vrot": float(np.nanmedian(dv)), "seconds": seconds,
            })
    head = f"{'PA':>6} {'inc':>5} {'grid rot':>8} {'unit':>5} | {'|dPA|':>6} {'|dinc|':>6} {'|dcen| px':>9} " \
           f"{'|dvsys|':>7} {'|dvrot|':>7} | {'s':>5}"
    print(head)
    print("-" * len(head))
    for r in rows:
        print(f"{r['pa']:6.1f} {r['inc']:5.1f} {r['rot']:8.1f} {r['unit']:>5} | {r['d_pa']:6.2f} {r['d_inc']:6.2f} "
              f"{r['d_centre']:9.2f} {r['d_vsys']:7.2f} {r['d_vrot']:7.2f} | {r['seconds']:5.1f}")
    med = {k: np.median([r[k] for r in rows]) for k in ("d_pa", "d_inc", "d_centre", "d_vsys", "d_vrot", "seconds")}
    worst = {k: np.max([r[k] for r in rows]) for k in med}
    print("-" * len(head))
    print(f"{'median':>29} | {med['d_pa']:6.2f} {med['d_inc']:6.2f} {med['d_centre']:9.2f} {med['d_vsys']:7.2f} "
          f"{med['d_vrot']:7.2f} | {med['seconds']:5.1f}")
    print(f"{'worst':>29} | {worst['d_pa']:6.2f} {worst['d_inc']:6.2f} {worst['d_centre']:9.2f} {worst['d_vsys']:7.2f} "
          f"{worst['d_vrot']:7.2f} | {worst['seconds']:5.1f}")
    print("targets: median |dPA| <= 1 deg, |dinc| <= 2 deg, centre <= 0.5 px, v_sys <= 1.5 km/s, v_rot <= 3 km/s")


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:3]))
