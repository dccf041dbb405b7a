"""A plain, straightforward ring fit: the reference the speed benchmark compares against.

    python benchmarks/reference_fit.py MAP.fits [--select-once]

numpy + scipy.optimize.least_squares with numerical (2-point) Jacobians, two stages, as one would
write it without care for speed: a start from moments of the map (median velocity, centroid,
first-moment direction, axis ratio of the valid pixels), rings one beam wide; stage 1 fits centre,
systemic velocity, position angle, inclination and rotation per ring; stage 2 fixes centre and
systemic velocity to their medians and refits position angle, inclination and rotation.

The ring fit is the same as the tool's (:mod:`tiltedring.fitting.engine`): pixels of a ring are those
whose disc radius under the ring's geometry falls inside it, outside a 15 deg wedge about the minor
axis, weighted by |cos theta|; since membership depends on the geometry being fitted, the pixels
are selected again after each fit until no geometry parameter moves by more than 0.02 (deg or
pixel), at most 10 times. ``--select-once`` selects the pixels once per stage at the starting
geometry instead (a cheaper but different fit: geometry errors in the start then bias the ring).
Prints a summary and the wall time.
"""

import sys
import time

import numpy as np
from astropy.io import fits
from astropy.wcs import WCS
from scipy.optimize import least_squares


def disc(x, y, xc, yc, jac, pa, inc):
    dx, dy = x - xc, y - yc
    east = jac[0, 0] * dx + jac[0, 1] * dy
    north = jac[1, 0] * dx + jac[1, 1] * dy
    p, i = np.radians(pa), np.radians(inc)
    xd = east * np.sin(p) + north * np.cos(p)
    yd = (east * np.cos(p) - north * np.sin(p)) / np.cos(i)
    r = np.hypot(xd, yd)
    return r, xd / np.maximum(r, 1e-9)


def model(q, x, y, jac):
    xc, yc, vsys, pa, inc, vrot = q
    _, cos_t = disc(x, y, xc, yc, jac, pa, inc)
    return vsys + np.sin(np.radians(inc)) * vrot * cos_t


WEDGE = np.sin(np.radians(15.0))


def main(path, select_once=False):
    t0 = time.perf_counter()
    hdu = fits.open(path)[0]
    data = hdu.data.astype(float) * (1e-3 if "M/S" == hdu.header["BUNIT"].upper().replace(" ", "") else 1.0)
    w = WCS(hdu.header).celestial
    ny, nx = data.shape
    c0, cx, cy = w.pixel_to_world([nx / 2, nx / 2 + 1, nx / 2], [ny / 2, ny / 2, ny / 2 + 1])
    jac = np.array([c0.spherical_offsets_to(c) for c in (cx, cy)], dtype=object)
    jac = np.array([[jac[0][0].arcsec, jac[1][0].arcsec], [jac[0][1].arcsec, jac[1][1].arcsec]])
    beam = hdu.header.get("BMAJ", 0) * 3600 or 2 * abs(jac[0, 0])
    yy, xx = np.nonzero(np.isfinite(data))
    x, y, v = xx.astype(float), yy.astype(float), data[yy, xx]
    vsys, xc, yc = np.median(v), x.mean(), y.mean()
    east = jac[0, 0] * (x - xc) + jac[0, 1] * (y - yc)
    north = jac[1, 0] * (x - xc) + jac[1, 1] * (y - yc)
    pa = np.degrees(np.arctan2(np.sum((v - vsys) * east), np.sum((v - vsys) * north))) % 360
    cov = np.cov(np.vstack([east, north]))
    ev = np.linalg.eigvalsh(cov)
    inc = np.degrees(np.arccos(np.sqrt(ev[0] / ev[1])))
    vrot = 0.5 * (np.percentile(v, 95) - np.percentile(v, 5)) / np.sin(np.radians(inc))
    r_all, _ = disc(x, y, xc, yc, jac, pa, inc)
    edges = np.arange(0, np.percentile(r_all, 99), beam)
    start = np.array([xc, yc, vsys, pa, inc, vrot])

    def select(q, k):
        r, cos_t = disc(x, y, q[0], q[1], jac, q[3], q[4])
        sel = (r >= edges[k]) & (r < edges[k + 1]) & (np.abs(cos_t) >= WEDGE)
        return sel, np.sqrt(np.abs(cos_t[sel]))

    def fit_stage(starts, free):
        out = []
        for k in range(len(edges) - 1):
            q = starts[k].copy()
            for _update in range(1 if select_once else 10):
                sel, ws = select(q, k)
                if sel.sum() < 10:
                    q = np.full(6, np.nan)
                    break
                xs, ys, vs = x[sel], y[sel], v[sel]

                def resid(p, q0=q.copy()):
                    qq = q0.copy()
                    qq[free] = p
                    return (vs - model(qq, xs, ys, jac)) * ws

                sol = least_squares(resid, q[free], jac="2-point")
                moved = np.abs(sol.x - q[free])[np.isin(np.flatnonzero(free), [0, 1, 3, 4])]
                q[free] = sol.x
                if moved.size == 0 or moved.max() < 0.02:
                    break
            out.append(q)
        return np.array(out)

    n = len(edges) - 1
    stage1 = fit_stage(np.tile(start, (n, 1)), np.array([True] * 6))
    centre = np.nanmedian(stage1[:, :3], axis=0)
    starts = np.where(np.isfinite(stage1), stage1, start)
    starts[:, :3] = centre
    stage2 = fit_stage(starts, np.array([False, False, False, True, True, True]))
    seconds = time.perf_counter() - t0
    print(f"{n} rings; centre {centre[0]:.2f} {centre[1]:.2f}, v_sys {centre[2]:.1f}; median PA "
          f"{np.nanmedian(stage2[:, 3]) % 360:.2f}, inclination {np.nanmedian(stage2[:, 4]):.2f}")
    print(f"seconds {seconds:.2f}")


if __name__ == "__main__":
    main(sys.argv[1], select_once="--select-once" in sys.argv[2:])
