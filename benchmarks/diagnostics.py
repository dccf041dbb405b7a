"""Calibration of the warp and non-circular flags on held-out fields drawn by independent code.

    python benchmarks/diagnostics.py [N_FLAT] [N_EACH] [SEED]

Fields from tests/independent_fields.py (scipy Rotation test particles + astropy WCS; 200x200
pixels, beam 4 pixels, beam-correlated noise 4 km/s), fitted with default options:

- flat circular discs (random PA, inclination 40-75 deg, random grid rotation): false-flag rates;
- warped discs (twist 25 deg and tilt 9 deg reached at the edge, onset 35-55 arcsec): detection
  rate and the largest |dPA|, |dinc| of the final profile beyond the onset;
- bisymmetric (bar-like) flows of about 20 km/s inside a bar radius of 25-40 arcsec: fraction of
  rings inside 1.3 bar radii flagged, rings beyond 1.5 bar radii flagged, v_rotation error outside;
- radial inflow of 15 km/s: detection rate.
"""

import sys
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))
from independent_fields import draw_field  # noqa: E402

import tiltedring as tr  # noqa: E402

NON_CIRCULAR = ("radial_flow", "bisymmetric_flow", "strong_harmonics")


def _fit(hdul):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return tr.fit_velocity_map(tr.read_velocity_map(hdul))


def _nc(flags):
    return np.array([any(f in s for f in NON_CIRCULAR) for s in flags])


def main(n_flat=30, n_each=8, seed=7):
    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    flat = {"fields": 0, "warp": 0, "nc_discs": 0, "nc_rings": 0, "rings": 0}
    for k in range(n_flat):
        hdul, _ = draw_field(rng.uniform(0, 360), rng.uniform(40, 75), rotation=rng.uniform(-90, 90), seed=seed + k,
                             n_particles=1_500_000)
        res = _fit(hdul)
        nc = _nc(res.rings["flags"])
        flat["fields"] += 1
        flat["warp"] += res.diagnostics["warp"]["detected"]
        flat["nc_discs"] += bool(nc.any())
        flat["nc_rings"] += int(nc.sum())
        flat["rings"] += len(nc)
    warp = {"fields": 0, "detected": 0, "d_pa": [], "d_inc": []}
    for k in range(n_each):
        onset = rng.uniform(35, 55)
        hdul, truth = draw_field(rng.uniform(0, 360), rng.uniform(45, 65), rotation=rng.uniform(-90, 90),
                                 seed=seed + 100 + k, warp=(onset, 25.0, 9.0), n_particles=2_000_000)
        res = _fit(hdul)
        r = res.rings["radius"].value
        beyond = (r > onset) & np.isfinite(res.rings["v_rotation"].value)
        warp["fields"] += 1
        warp["detected"] += res.diagnostics["warp"]["detected"]
        dpa = ((res.rings["position_angle"].value - truth["position_angle_at"](r) + 180) % 360) - 180
        warp["d_pa"].append(np.max(np.abs(dpa[beyond])))
        warp["d_inc"].append(np.max(np.abs(res.rings["inclination"].value - truth["inclination_at"](r))[beyond]))
    bar = {"fields": 0, "inside_flagged": [], "outside_flagged": 0, "outside_rings": 0, "dv": []}
    for k in range(n_each):
        r_bar = rng.uniform(25, 40)
        amp_t = rng.uniform(15, 25)
        amp_r = rng.uniform(0.4, 1.0) * amp_t
        hdul, truth = draw_field(rng.uniform(0, 360), rng.uniform(45, 65), rotation=rng.uniform(-90, 90),
                                 seed=seed + 200 + k, bar=(r_bar, rng.uniform(0, 180), amp_t, amp_r),
                                 n_particles=2_000_000)
        res = _fit(hdul)
        r = res.rings["radius"].value
        nc = _nc(res.rings["flags"])
        inside, outside = r < 1.3 * r_bar, r > 1.5 * r_bar
        usable = inside & (r > 1.0 * truth["beam"])
        bar["fields"] += 1
        bar["inside_flagged"].append(nc[usable].mean() if usable.any() else np.nan)
        bar["outside_flagged"] += int(nc[outside].sum())
        bar["outside_rings"] += int(outside.sum())
        v = res.rings["v_rotation"].value
        bar["dv"].append(np.nanmedian(np.abs(v[outside] - truth["v_rotation"](r[outside]))))
    inflow = {"fields": 0, "detected": 0, "amplitude": []}
    for k in range(n_each):
        hdul, _ = draw_field(rng.uniform(0, 360), rng.uniform(45, 65), rotation=rng.uniform(-90, 90),
                             seed=seed + 300 + k, v_radial=-15.0, n_particles=2_000_000)
        res = _fit(hdul)
        nc = res.diagnostics["non_circular"]
        inflow["fields"] += 1
        inflow["detected"] += nc["detected"]
        inflow["amplitude"].append(nc["max_amplitude"])
    minutes = (time.perf_counter() - t0) / 60
    print(f"{'case':<34} {'result':>40}")
    print("-" * 75)
    print(f"{'flat discs: warp flagged':<34} {flat['warp']:>3} of {flat['fields']} fields")
    print(f"{'flat discs: any non-circular ring':<34} {flat['nc_discs']:>3} of {flat['fields']} fields")
    print(f"{'flat discs: non-circular rings':<34} {flat['nc_rings']:>3} of {flat['rings']} rings "
          f"({100 * flat['nc_rings'] / max(flat['rings'], 1):.1f}%)")
    print(f"{'warps: detected':<34} {warp['detected']:>3} of {warp['fields']} fields")
    print(f"{'warps: max |dPA| beyond onset':<34} median {np.median(warp['d_pa']):.2f}, worst {np.max(warp['d_pa']):.2f} deg")
    print(f"{'warps: max |dinc| beyond onset':<34} median {np.median(warp['d_inc']):.2f}, worst {np.max(warp['d_inc']):.2f} deg")
    print(f"{'bars: rings < 1.3 r_bar flagged':<34} median {np.nanmedian(bar['inside_flagged']) * 100:.0f}%, "
          f"lowest {np.nanmin(bar['inside_flagged']) * 100:.0f}% (rings beyond one beam)")
    print(f"{'bars: rings > 1.5 r_bar flagged':<34} {bar['outside_flagged']:>3} of {bar['outside_rings']} rings")
    print(f"{'bars: |dv_rot| beyond 1.5 r_bar':<34} median {np.median(bar['dv']):.2f}, worst {np.max(bar['dv']):.2f} km/s")
    print(f"{'inflow 15 km/s: detected':<34} {inflow['detected']:>3} of {inflow['fields']} fields; "
          f"median amplitude {np.median(inflow['amplitude']):.1f} km/s")
    print(f"({minutes:.1f} min)")


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:4]))
