"""Small weighted linear least-squares problems (harmonics, flow models, warp profiles).

Solved through the normal equations with the columns scaled to unit norm (Jacobi scaling keeps
the Gram matrix well conditioned for polynomial and harmonic bases); a singular system falls back
to the pseudo-inverse.
"""

from __future__ import annotations

import numpy as np

__all__ = ["weighted_least_squares"]


def weighted_least_squares(a, v, w):
    """Minimise chi^2 = sum (w (v - a c))^2 over c.

    Returns (c, C, chi^2) with C = (A^T A)^-1, A = w a: the covariance of c for unit-variance
    weighted residuals (scale it by chi^2 per degree of freedom where the weights are relative).
    """
    aw = np.asarray(a, float) * np.asarray(w, float)[:, None]
    vw = np.asarray(v, float) * w
    norm = np.sqrt(np.einsum("ij,ij->j", aw, aw))
    norm = np.where(norm > 0, norm, 1.0)
    scaled = aw / norm
    gram = scaled.T @ scaled
    try:
        np.linalg.cholesky(gram)  # raises unless positive definite
        inverse = np.linalg.inv(gram)
    except np.linalg.LinAlgError:
        inverse = np.linalg.pinv(gram)
    inverse = inverse / np.outer(norm, norm)
    coef = inverse @ (aw.T @ vw)
    resid = vw - aw @ coef
    return coef, inverse, float(resid @ resid)
