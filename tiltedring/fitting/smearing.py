"""Beam smearing: forward modelling of the moment-1 map and the corrected rotation curve.

A moment-1 map is the intensity-weighted mean velocity after the beam has blurred the sky, so the
model compared with the data is (e.g. Begeman 1989, A&A 223, 47)::

    v_model = v_sys + G * (I (v_sky - v_sys)) / (G * I)

with G the elliptical Gaussian beam, I the intensity (moment-0) map and v_sky the thin-disc
line-of-sight field. Without an intensity map, I is taken as uniform over the modelled disc (this
is said in the output).

The correction holds the orientation at the fitted values and iterates on the curve itself. With
v_obs the ring fit of the data and T the operator "draw the disc with curve v, smear it, fit it
with the same rings at the same geometry" (affine in v):

    v_(n+1) = v_n + (v_obs - T(v_n)),     v_0 = v_obs

(the van Cittert iteration) until the largest remaining difference is below 0.5 km/s or after a
fixed number of steps; at convergence T(v) = v_obs, i.e. the smeared model of the corrected curve
reproduces what the data gave. Stopping at a small difference acts as regularisation.
"""

from __future__ import annotations

import numpy as np
from scipy import fft

from .parameters import PARAMETERS

__all__ = ["BeamKernel", "smear", "correct_beam_smearing"]


class BeamKernel:
    """FFT convolution with an elliptical Gaussian beam on a fixed map shape (plan and kernel reused).

    The beam's sky covariance (FWHM axes along position angle ``beam.position_angle``) is carried to
    pixel space through the sky Jacobian J: C_pix = J^-1 C_sky J^-T, so rotated grids and non-square
    pixels are handled. Images are zero-padded to a fast FFT size (no wrap-around).
    """

    def __init__(self, shape, beam, sky_jacobian):
        ny, nx = shape
        s_maj = beam.major / np.sqrt(8 * np.log(2))
        s_min = beam.minor / np.sqrt(8 * np.log(2))
        pa = np.radians(beam.position_angle)
        u_major = np.array([np.sin(pa), np.cos(pa)])  # (east, north)
        u_minor = np.array([np.cos(pa), -np.sin(pa)])
        c_sky = s_maj**2 * np.outer(u_major, u_major) + s_min**2 * np.outer(u_minor, u_minor)
        inv = np.linalg.inv(np.asarray(sky_jacobian, float))
        c_pix = inv @ c_sky @ inv.T
        pad = int(np.ceil(4 * np.sqrt(np.max(np.linalg.eigvalsh(c_pix)))))
        self.shape = shape
        self.padded = (fft.next_fast_len(ny + pad, real=True), fft.next_fast_len(nx + pad, real=True))
        ky = fft.fftfreq(self.padded[0])[:, None]
        kx = fft.rfftfreq(self.padded[1])[None, :]
        quad = c_pix[0, 0] * kx**2 + 2 * c_pix[0, 1] * kx * ky + c_pix[1, 1] * ky**2
        self.transfer = np.exp(-2 * np.pi**2 * quad)
        self._last_norm = None

    def __call__(self, image, workers: int = -1):
        """``image`` (ny, nx) convolved with the beam; a stack (..., ny, nx), e.g. the channels of a cube, is
        convolved plane by plane. NaN counts as 0. ``workers``: FFT threads (each plane's transform is the same
        whatever their number)."""
        ny, nx = self.shape
        spectrum = fft.rfft2(np.nan_to_num(image), s=self.padded, axes=(-2, -1), workers=workers)
        spectrum *= self.transfer
        return fft.irfft2(spectrum, s=self.padded, axes=(-2, -1), workers=workers)[..., :ny, :nx].copy()

    def normalisation(self, intensity, inside):
        """G * (I on the modelled pixels), reused while I and the footprint ``inside`` stay the same (the
        disc's footprint rarely changes between steps of the beam-smearing correction)."""
        last = self._last_norm
        if last is None or last[0] is not intensity or not np.array_equal(last[1], inside):
            self._last_norm = (intensity, inside.copy(), self(np.where(inside, intensity, 0.0)))
        return self._last_norm[2]


def smear(kernel: BeamKernel, field, intensity, v_systemic):
    """v_sys + G*(I (v - v_sys)) / (G*I) on the modelled pixels (NaN elsewhere)."""
    inside = np.isfinite(field)
    norm = kernel.normalisation(intensity, inside)
    smeared = kernel(np.where(inside, intensity * (field - v_systemic), 0.0))
    ok = inside & (norm > 1e-6 * max(float(norm.max()), 1e-30))
    out = np.full(field.shape, np.nan)
    out[ok] = v_systemic + smeared[ok] / norm[ok]
    return out


def disc_with_centre(rings: dict) -> dict:
    """The ring table with a ring at radius 0 where v_rotation is 0 (other parameters as the innermost ring), so
    that the model rises linearly from the centre instead of holding the innermost ring's speed inside it."""
    order = np.argsort(np.asarray(rings["radius"], float))
    table = {name: np.asarray(values, float)[order] for name, values in rings.items()}
    if table["radius"][0] <= 0.0:
        return table
    out = {name: np.concatenate([values[:1], values]) for name, values in table.items()}
    out["radius"][0] = 0.0
    out["v_rotation"][0] = 0.0
    return out


def correct_beam_smearing(vmap, rings: dict, r_outer: float, observed, measure, noise=None, max_iterations: int = 20,
                          tolerance: float = 0.5, kernel: BeamKernel | None = None):
    """Iterate to the curve whose smeared model the fit turns into what the data gave, geometry held.

    ``rings``: per-ring ``radius`` and :data:`.parameters.PARAMETERS` columns (the orientation is held
    at these values); ``observed``: the fitted v_rotation per ring (NaN: ring not used); ``measure(map)``
    returns the speeds fitted the same way (at the same geometry) to another map. At a fixed geometry
    the operator T (draw, smear, fit) is affine in the curve, and the van Cittert step
    v_(n+1) = v_n + (observed - T(v_n)) converges for the eigenvalues of a smoothing operator
    (0 < lambda <= 1). It stops when every ring's remaining difference is below ``tolerance`` km/s or,
    with ``noise`` (the speeds' errors per ring), when the rms of difference / noise is below 0.5 (the
    discrepancy principle for Landweber-type iterations, Engl, Hanke & Neubauer 1996, "Regularization
    of Inverse Problems", ch. 6: iterating further only fits the noise), and after ``max_iterations``
    whatever happens (then ``converged`` is False).
    Returns (corrected speeds, smeared model map, iterations, converged).
    """
    from .kinematics import model_field

    kernel = kernel or BeamKernel(vmap.shape, vmap.beam, vmap.sky_jacobian)
    intensity = np.ones(vmap.shape) if vmap.intensity is None else np.clip(np.nan_to_num(vmap.intensity), 0, None)
    v_sys = float(np.median(rings["v_systemic"]))
    target = np.asarray(observed, float)
    ok = np.isfinite(target)
    if noise is not None:
        noise = np.where(np.isfinite(noise) & (np.asarray(noise, float) > 0), noise, np.inf)
    table = {name: np.asarray(values, float)[ok] for name, values in rings.items() if name in PARAMETERS or
             name == "radius"}

    def draw(speeds):
        table["v_rotation"] = speeds[ok]
        disc = disc_with_centre(table)
        return smear(kernel, model_field(vmap.shape, vmap.sky_jacobian, disc, r_outer), intensity, v_sys)

    trial = np.where(ok, target, np.nan)
    converged, iteration = False, 0
    for iteration in range(1, max_iterations + 1):
        got = np.asarray(measure(draw(trial)), float)
        step = np.where(ok & np.isfinite(got), target - got, 0.0)
        trial = np.where(ok, trial + step, np.nan)
        scaled = step[ok] / noise[ok] if noise is not None else np.full(1, np.inf)
        if float(np.max(np.abs(step))) < tolerance or np.sqrt(np.nanmean(scaled**2)) < 0.5:
            converged = True
            break
    return trial, draw(trial), iteration, converged
