"""Harmonic decomposition of each ring's line-of-sight velocities at the fitted geometry.

Franx, van Gorkom & de Zeeuw 1994 (ApJ 436, 642); Schoenmakers, Franx & de Zeeuw 1997 (MNRAS 292,
349): along a ring, with azimuth theta in the disc plane,

    v_los(theta) = c0 + sum_{m=1..3} [ c_m cos(m theta) + s_m sin(m theta) ]

Pure circular rotation gives only c0 = v_systemic and c1 = v_rotation sin i. A radial flow adds
s1 = v_radial sin i; an m-fold perturbation in the disc plane shows up in orders m-1 and m+1 on
the sky (a bar, m = 2, in c1/s1 and c3/s3); a wrong centre leaks into c2/s2, wrong position angle
into s1/s3, wrong inclination into c3.

The non-circular amplitude is A = sqrt(s1^2 + c2^2 + s2^2 + c3^2 + s3^2), less its noise bias
(sum of the coefficient variances), on the sky; A / sin i is the in-plane amplitude and A / c1 the
fraction of the rotation signal. Its significance is the chi-square of those five coefficients
against zero with their covariance (dof 5).
"""

from __future__ import annotations

import math

import numpy as np

from ..fitting.candidates import gather_rings
from ..fitting.leastsq import weighted_least_squares

__all__ = ["HARMONIC_NAMES", "NON_CIRCULAR", "ring_harmonics"]

HARMONIC_NAMES = ("c0", "c1", "s1", "c2", "s2", "c3", "s3")
NON_CIRCULAR = ("s1", "c2", "s2", "c3", "s3")


def chi2_survival(x: float, dof: int) -> float:
    """P(chi^2_dof > x) for odd ``dof`` (Abramowitz & Stegun 1964, 26.4.4)::

        Q = erfc(sqrt(x/2)) + sqrt(2/pi) exp(-x/2) sum_{j=1}^{(dof-1)/2} x^(j-1/2) / (1 3 5 ... (2j-1))
    """
    if dof % 2 != 1:
        raise ValueError("chi2_survival needs an odd number of degrees of freedom")
    x = max(float(x), 0.0)
    total, term = 0.0, math.sqrt(x)
    for j in range(1, (dof - 1) // 2 + 1):
        total += term
        term *= x / (2 * j + 1)
    return min(1.0, math.erfc(math.sqrt(x / 2)) + math.sqrt(2 / math.pi) * math.exp(-x / 2) * total)


def _basis(cos_t, sin_t):
    """Columns 1, cos m theta, sin m theta (m = 1..3) from cos and sin theta (multiple-angle formulae)."""
    c2, s2 = cos_t * cos_t - sin_t * sin_t, 2.0 * sin_t * cos_t
    c3, s3 = c2 * cos_t - s2 * sin_t, s2 * cos_t + c2 * sin_t
    return np.column_stack([np.ones_like(cos_t), cos_t, sin_t, c2, s2, c3, s3])


def ring_harmonics(pixels, sky_jacobian, rings: dict, inner, outer, pixels_per_beam: float = 1.0,
                   ring_pixels: list | None = None) -> dict:
    """Decompose every ring; returns arrays (one value per ring) keyed by coefficient name.

    ``pixels`` = (x, y, v, sigma); ``rings`` holds per-ring ``x_center``, ``y_center``,
    ``position_angle``, ``inclination``. Errors are scaled by sqrt(reduced chi-square x pixels per
    beam). Keys: each name in :data:`HARMONIC_NAMES` and ``<name>_err``, ``noncircular_amplitude``
    (km/s on the sky, debiased), ``noncircular_in_plane``, ``noncircular_fraction``,
    ``harmonic_p_value``, ``harmonic_pixels``. ``ring_pixels``: the rings' pixels from
    :func:`.candidates.gather_rings`, when already at hand.
    """
    if ring_pixels is None:
        ring_pixels = gather_rings(pixels, sky_jacobian, rings, inner, outer)
    n_rings = len(inner)
    out = {name: np.full(n_rings, np.nan) for name in HARMONIC_NAMES}
    out.update({f"{name}_err": np.full(n_rings, np.nan) for name in HARMONIC_NAMES})
    for key in ("noncircular_amplitude", "noncircular_in_plane", "noncircular_fraction", "harmonic_p_value"):
        out[key] = np.full(n_rings, np.nan)
    out["harmonic_pixels"] = np.zeros(n_rings, int)
    nc = [HARMONIC_NAMES.index(n) for n in NON_CIRCULAR]
    for k in range(n_rings):
        cos_t, sin_t, v, sigma = ring_pixels[k]
        n = len(v)
        out["harmonic_pixels"][k] = n
        if n < 3 * len(HARMONIC_NAMES):
            continue
        coef, cov, chi2 = weighted_least_squares(_basis(cos_t, sin_t), v, 1.0 / sigma)
        cov = cov * chi2 / (n - len(coef)) * pixels_per_beam
        err = np.sqrt(np.clip(np.diag(cov), 0, None))
        for j, name in enumerate(HARMONIC_NAMES):
            out[name][k], out[f"{name}_err"][k] = coef[j], err[j]
        b = coef[nc]
        c = cov[np.ix_(nc, nc)]
        amp2 = float(b @ b - np.trace(c))
        amplitude = np.sqrt(max(amp2, 0.0))
        out["noncircular_amplitude"][k] = amplitude
        out["noncircular_in_plane"][k] = amplitude / max(np.sin(np.radians(rings["inclination"][k])), 1e-3)
        out["noncircular_fraction"][k] = amplitude / abs(coef[1]) if coef[1] != 0 else np.nan
        try:
            chi2_nc = float(b @ np.linalg.solve(c, b))
            out["harmonic_p_value"][k] = chi2_survival(chi2_nc, len(nc))
        except np.linalg.LinAlgError:
            pass
    return out
