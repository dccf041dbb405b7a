"""Mock galaxies for calibrating the error model, drawn WITHOUT the project's model code.

Each geometry is one disc of test particles rotated onto the sky by ``scipy.spatial.transform``
(``independent_fields.draw_field``), drawn once without noise; each realisation adds its own
correlated noise (white noise smoothed by a Gaussian of ``noise_smoothing`` beams' sigma and
scaled to the stated rms), so the noise realisations of one geometry differ only in the noise.
Geometries vary the orientation, the rotation curve, the beam, the noise, a small warp and
non-circular motions of a few km/s (a weak bisymmetric flow or a uniform radial flow).

Truth per ring: the orientation at the ring's radius (warped discs), and the rotation speed
averaged over the ring's annulus with area weighting, (int v(R) R dR) / (int R dR), which is what a
ring of finite width measures on a curve that still rises.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy.io import fits
from scipy.ndimage import gaussian_filter

from independent_fields import draw_field

__all__ = ["MockGeometry", "draw_geometries", "noise_free_field", "noisy_hdu", "ring_truth"]


@dataclass(frozen=True)
class MockGeometry:
    """One mock disc's parameters (angles in deg, speeds in km/s, lengths in pixels of 1 arcsec)."""

    index: int
    position_angle: float
    inclination: float
    v_flat: float
    r_turn: float
    beam_pixels: float
    noise: float
    noise_smoothing: float
    warp: tuple | None
    bar: tuple | None
    v_radial: float
    centre_offset: tuple
    rotation: float
    size: int


def draw_geometries(n: int, seed: int = 2026, size: int = 96) -> list:
    """``n`` mock geometries drawn from a seeded generator (module docstring)."""
    rng = np.random.default_rng(seed)
    out = []
    for k in range(n):
        disc = 0.45 * size
        warp = (rng.uniform(0.5, 0.7) * disc, rng.uniform(-6, 6), rng.uniform(-4, 4)) if k % 2 == 1 else None
        bar = (rng.uniform(0.25, 0.4) * disc, rng.uniform(0, 180), rng.uniform(2, 5), rng.uniform(1, 4)) \
            if k % 3 == 0 else None
        out.append(MockGeometry(
            index=k, position_angle=float(rng.uniform(0, 360)), inclination=float(rng.uniform(35, 75)),
            v_flat=float(rng.uniform(80, 250)), r_turn=float(rng.uniform(4, 14)),
            beam_pixels=float(rng.uniform(3, 5)), noise=float(rng.uniform(2, 8)),
            noise_smoothing=float(rng.uniform(0.7, 1.2)), warp=warp, bar=bar,
            v_radial=float(rng.uniform(-4, 4)) if k % 3 == 1 else 0.0,
            centre_offset=tuple(float(c) for c in rng.uniform(-4, 4, 2)),
            rotation=float(rng.uniform(-90, 90)) if k % 2 == 0 else 0.0, size=size))
    return out


def noise_free_field(g: MockGeometry, n_particles: int = 600_000):
    """(noise-free velocity HDU, truth dict) of geometry ``g`` (``independent_fields.draw_field``)."""
    hdul, truth = draw_field(g.position_angle, g.inclination, shape=(g.size, g.size), beam_pixels=g.beam_pixels,
                             noise=0.0, v_flat=g.v_flat, r_turn=g.r_turn, centre_offset=g.centre_offset,
                             rotation=g.rotation, seed=1000 + g.index, n_particles=n_particles, warp=g.warp,
                             bar=g.bar, v_radial=g.v_radial)
    truth["v_flat"], truth["r_turn"] = g.v_flat, g.r_turn
    return hdul[0], truth


def noisy_hdu(hdu, g: MockGeometry, seed: int):
    """A copy of ``hdu`` with correlated Gaussian noise of rms ``g.noise`` (smoothing sigma ``g.noise_smoothing``
    times the beam's)."""
    rng = np.random.default_rng(seed)
    sigma = g.noise_smoothing * g.beam_pixels / np.sqrt(8 * np.log(2))
    field = gaussian_filter(rng.standard_normal(hdu.data.shape), sigma, mode="wrap")
    data = hdu.data.astype(float) + g.noise * field / field.std()
    return fits.PrimaryHDU(data.astype(np.float32), header=hdu.header.copy())


def ring_truth(truth: dict, inner, outer) -> dict:
    """Truth per ring: area-weighted mean rotation speed over each annulus, and the orientation at its centre."""
    inner, outer = np.asarray(inner, float), np.asarray(outer, float)
    v = np.empty(len(inner))
    for k, (a, b) in enumerate(zip(inner, outer)):
        r = np.linspace(a, b, 101)
        w = r * truth["v_rotation"](r)
        v[k] = np.trapezoid(w, r) / np.trapezoid(r, r)
    mid = 0.5 * (inner + outer)
    pa = truth["position_angle_at"](mid) if "position_angle_at" in truth else np.full(len(mid), truth["position_angle"])
    inc = truth["inclination_at"](mid) if "inclination_at" in truth else np.full(len(mid), truth["inclination"])
    return {"v_rotation": v, "position_angle": pa, "inclination": inc}
