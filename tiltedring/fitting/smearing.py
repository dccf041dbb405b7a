"""Beam smearing: forward modelling of the moment-1 map and the corrected rotation curve.

A moment-1 map is the intensity-weighted mean velocity after the beam has blurred the sky, so the
model compared with the data is (e.g. Begeman 1989, A&A 223, 47)::

    v_model = v_sys + G * (I (v_sky - v_sys)) / (G * I)

with G the elliptical Gaussian beam, I the intensity (moment-0) map and v_sky the thin-disc
line-of-sight field. Without an intensity map, I is taken as uniform over the modelled disc (this
is said in the output).

The correction is found by iterating on the curve itself, which needs no inversion of the
(ill-conditioned) smearing operator and so does not amplify noise. With v_obs the ring fit of the
data and T the operator "draw the disc with curve v, smear it, fit it with the same rings":

    v_(n+1) = v_n + g_n (v_obs - T(v_n)),     v_0 = v_obs

until the largest remaining difference is below 0.5 km/s; at convergence T(v) = v_obs, i.e. the
smeared model of the corrected curve reproduces what the data gave. With g_n = 1 this is the van
Cittert iteration, which converges slowly where smearing is strong (T changes little with v); the
gain g_n, per ring, is the secant estimate of 1 / (dT/dv) from the last two steps, clipped to
[1, 3] so that poorly resolved rings are not amplified more than three-fold per step. Stopping
at a small difference acts as regularisation: unresolved ring-to-ring wiggles are not amplified.
Each step costs one smeared model (two FFT convolutions with a reused beam transfer function) and
one evaluation of the fit's response (:mod:`.response`), so no convolution is repeated per
parameter.
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


def correct_beam_smearing(vmap, rings: dict, r_outer: float, observed: dict, measure, max_iterations: int = 20,
                          tolerance: float = 0.5, kernel: BeamKernel | None = None, max_gain: float = 3.0):
    """Iterate to the disc whose smeared model the fit turns into what the data gave (module docstring).

    ``rings``: per-ring ``radius`` and :data:`.parameters.PARAMETERS` columns (the starting model).
    ``observed``: what the fit gave on the data, by parameter name — ``v_rotation`` per ring and, when
    the geometry is constant, scalar ``inclination`` / ``position_angle``. ``measure(map)`` must return
    the same quantities fitted the same way to another map. Each is corrected by
    x_(n+1) = x_n + (observed - measure(smear(model(x_n)))).
    Returns (corrected dict, smeared model map, iterations, converged).
    """
    from .kinematics import model_field

    kernel = kernel or BeamKernel(vmap.shape, vmap.beam, vmap.sky_jacobian)
    intensity = np.ones(vmap.shape) if vmap.intensity is None else np.clip(np.nan_to_num(vmap.intensity), 0, None)
    v_sys = float(np.median(rings["v_systemic"]))
    ok = np.isfinite(np.asarray(observed["v_rotation"], float))
    table = {name: np.asarray(values, float)[ok] for name, values in rings.items() if name in PARAMETERS or
             name == "radius"}
    target = {name: (np.asarray(value, float)[ok] if np.ndim(value) else float(value))
              for name, value in observed.items()}
    trial = {name: np.array(value, float, copy=True) for name, value in target.items()}

    def draw(current):
        for name, value in current.items():
            table[name] = np.broadcast_to(value, table["radius"].shape).astype(float)
        return smear(kernel, model_field(vmap.shape, vmap.sky_jacobian, table, r_outer), intensity, v_sys)

    converged = False
    previous = {}
    for iteration in range(1, max_iterations + 1):
        measured = measure(draw(trial))
        largest = 0.0
        for name in trial:
            got = np.asarray(measured[name], float)[ok] if np.ndim(measured[name]) else float(measured[name])
            step = np.where(np.isfinite(got), target[name] - got, 0.0)
            gain = 1.0
            if name in previous:  # secant estimate of 1 / (d measured / d trial), element by element
                moved, answered = trial[name] - previous[name][0], got - previous[name][1]
                with np.errstate(divide="ignore", invalid="ignore"):
                    gain = np.where(np.abs(answered) > 1e-3, moved / answered, 1.0)
                gain = np.clip(np.nan_to_num(gain, nan=1.0), 1.0, max_gain)
            previous[name] = (trial[name], got)
            trial[name] = trial[name] + gain * step
            largest = max(largest, float(np.max(np.abs(step))))
        if largest < tolerance:
            converged = True
            break
    smeared = draw(trial)
    corrected = {}
    for name, value in trial.items():
        if np.ndim(value):
            full = np.full(ok.shape, np.nan)
            full[ok] = value
            corrected[name] = full
        else:
            corrected[name] = float(value)
    return corrected, smeared, iteration, converged
