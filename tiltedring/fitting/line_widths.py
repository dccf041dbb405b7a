"""Ring line widths measured alike on the data and on a model cube, and the dispersion that matches them.

Beyond the rings fitted to the cube the dispersion is found by matching one statistic of the
spectra. For ring j, over the ring's pixels p and the channels k within ``window_j`` of a reference
velocity field v_ref (the thin disc of the map curve), with d = v_k - v_ref,p, the concentration::

    S_j = sum_p w_p sum_k C_pk exp(-d^2 / (2 s_j^2)) / sum_p w_p sum_k C_pk

with w_p the model's moment-0 (noise-free; the same weights for data and model) and s_j the model
ring's own second-moment width. For a Gaussian line of variance tau^2 (and a wide window)
S = s / sqrt(s^2 + tau^2), so tau^2 = s^2 (1 / S^2 - 1) is the line's Gaussian-equivalent variance.
Its weights are bounded by 1, so noise far from the line centre counts far less than in a second
moment (whose weights grow as d^2). Measured on the data and on the model cube (which carries
channel width, beam and unresolved velocity gradients), the dispersion is updated in quadrature
(Gaussian broadenings add in variance)::

    sigma_j^2 <- sigma_j^2 + tau_j^2(data) - tau_j^2(model)

for a fixed number of passes. Noise is zero-mean in the sums, so it adds scatter but no bias to
first order. The same statistic on the receding and approaching halves gives the error (half their
difference).
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["spread_sums", "line_spread", "MIN_DISPERSION"]

MIN_DISPERSION = 1.0  # km/s; a dispersion is never set below this


@njit(cache=True)
def spread_sums(data, velocity, v_ref, v_systemic, ring, window, scale, weight, n_rings):
    """(numerator, denominator) per ring (rows) for all pixels, the receding and the approaching half
    (columns 0, 1, 2): of S_j (module docstring) where ``scale[j] > 0``, else of the second moment
    (numerator weights d^2). NaN data and pixels with ``ring < 0`` or NaN ``v_ref`` are left out."""
    num = np.zeros((n_rings, 3))
    den = np.zeros((n_rings, 3))
    n_channels, ny, nx = data.shape
    for y in range(ny):
        for x in range(nx):
            j = ring[y, x]
            v0 = v_ref[y, x]
            if j < 0 or not np.isfinite(v0) or weight[y, x] <= 0.0:
                continue
            half = 1 if v0 >= v_systemic else 2
            w = weight[y, x]
            for k in range(n_channels):
                d = velocity[k] - v0
                c = data[k, y, x]
                if abs(d) > window[j] or not np.isfinite(c):
                    continue
                g = np.exp(-0.5 * d * d / (scale[j] * scale[j])) if scale[j] > 0.0 else d * d
                num[j, 0] += w * c * g
                den[j, 0] += w * c
                num[j, half] += w * c * g
                den[j, half] += w * c
    return num, den


def line_spread(data, velocity, v_ref, v_systemic, ring, window, weight, n_rings, scale=None):
    """Per ring (n_rings, 3: all pixels, receding half, approaching half; NaN without signal): the second
    moment s_j^2 without ``scale``, else the Gaussian-equivalent variance tau_j^2 = s^2 (1/S^2 - 1)."""
    scale = np.zeros(n_rings) if scale is None else np.nan_to_num(np.asarray(scale, float))
    num, den = spread_sums(np.ascontiguousarray(data, float), np.ascontiguousarray(velocity, float),
                           np.ascontiguousarray(v_ref, float), float(v_systemic), np.ascontiguousarray(ring, np.int64),
                           np.ascontiguousarray(window, float), np.ascontiguousarray(scale), np.ascontiguousarray(
                               weight, float), int(n_rings))
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(den > 0, num / den, np.nan)
        if not scale.any():
            return ratio
        return np.where((ratio > 0) & (scale[:, None] > 0), scale[:, None] ** 2 * (1.0 / ratio**2 - 1.0), np.nan)
