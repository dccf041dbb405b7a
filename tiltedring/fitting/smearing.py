"""Beam smearing: forward modelling of the moment-1 map and the corrected rotation curve.

A moment-1 map is the intensity-weighted mean velocity after the beam has blurred the sky, so the
model compared with the data is (e.g. Begeman 1989, A&A 223, 47)::

    v_model = v_sys + G * (I (v_sky - v_sys)) / (G * I)

with G the elliptical Gaussian beam, I the intrinsic intensity (an estimate: see :mod:`.intensity_profile`) and v_sky the thin-disc
line-of-sight field. Without an intensity map, I is taken as uniform over the modelled disc (this
is said in the output).

The correction itself is :mod:`.beam_inversion` (a regularised linear problem on the curve).
"""

from __future__ import annotations

import numpy as np
from scipy import fft


__all__ = ["BeamKernel", "smear", "disc_with_centre"]


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

    def __call__(self, image, workers: int | None = -1):
        """``image`` (ny, nx) convolved with the beam; a stack (..., ny, nx), e.g. the channels of a cube, is
        convolved plane by plane. NaN counts as 0. ``workers``: FFT threads (-1: one per core; None: scipy's
        current setting, ``scipy.fft.set_workers``); each plane's transform is the same whatever their number."""
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
