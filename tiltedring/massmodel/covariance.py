"""The covariance of a rotation curve's speeds: reading it, building it, and whitening residuals with it.

A mass model is fitted by minimising chi^2 = r^T C^-1 r, r = v_model - v_obs. Errors that are
independent from ring to ring (the noise) make C diagonal; an error of the geometry does not: an
inclination off by sigma_i moves every ring's speed together, by v_k cot(i) sigma_i (from
v = v_los / sin i), so its part of C is the rank-one matrix g g^T with g_k = v_k cot(i_k) sigma_i.
Treating that term as independent per point lets it average down over the rings, which it
cannot; it is either in C in full, or the inclination is a nuisance parameter of the fit (the two
agree to first order: marginalising a Gaussian nuisance parameter that enters linearly adds
exactly g g^T to C).

File of a covariance matrix (:func:`read_covariance`), N x N over the curve's N rows (rings, in the
order of ``curve.ecsv``, 0-based), in km^2/s^2:

- ECSV, square: N rows and N columns named ``ring_0`` ... ``ring_<N-1>`` (plain ``0`` ... ``<N-1>``
  also read); row k is ring k. Columns may carry a unit convertible to km2 / s2 (none: km2 / s2).
  Other columns (e.g. ``ring`` or ``radius``) are ignored.
- ECSV, by pairs: the fit's own ``curve_covariance.ecsv`` (:mod:`..products.covariance`), one row per
  ordered pair of rings with columns ``ring_i``, ``ring_j`` and ``total`` (km2 / s2); its parts
  are ignored here.
- FITS: the first HDU holding a 2-D N x N image; BUNIT, when present, convertible to km2 / s2.

Rows and columns of rings without a usable speed may be blank (NaN): they are dropped with those
rings. What remains must be finite, symmetric (to 1e-6 of its largest element) and positive definite.
:func:`covariance_beside` finds ``<curve stem>_covariance.ecsv`` (or ``.fits``) next to a curve,
e.g. ``curve_covariance.ecsv`` beside ``curve.ecsv``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy import units as u

from ..errors import InputError

__all__ = ["read_covariance", "covariance_beside", "inclination_term", "with_correlated_term", "check_covariance",
           "Whitener"]

_KMS2 = u.km**2 / u.s**2
SUFFIXES = (".ecsv", ".fits")


def covariance_beside(curve_path):
    """The covariance file next to ``curve_path`` (``<stem>_covariance.ecsv`` or ``.fits``), or None."""
    curve_path = Path(curve_path)
    for suffix in SUFFIXES:
        candidate = curve_path.with_name(f"{curve_path.stem}_covariance{suffix}")
        if candidate.is_file():
            return candidate
    return None


def _unit_factor(unit, where: str) -> float:
    if unit is None or str(unit).strip() == "":
        return 1.0
    try:
        return float((1 * u.Unit(unit)).to_value(_KMS2))
    except (ValueError, u.UnitConversionError):
        raise InputError(f"{where}: unit {unit} is not a speed squared; write the covariance in km2 / s2") from None


def _read_ecsv(path) -> np.ndarray:
    from astropy.table import Table

    table = Table.read(path, format="ascii.ecsv")
    if {"ring_i", "ring_j", "total"} <= set(table.colnames):  # the fit's own file, one row per pair of rings
        from ..products.covariance import read_covariance as read_pairs

        return read_pairs(table)[1]["total"] * _unit_factor(table["total"].unit, str(path))
    n = len(table)
    for names in ([f"ring_{k}" for k in range(n)], [str(k) for k in range(n)]):
        if all(name in table.colnames for name in names):
            return np.array([np.asarray(table[name], float) * _unit_factor(table[name].unit, str(path))
                             for name in names]).T
    raise InputError(f"covariance file {path}: {n} rows but not the {n} columns ring_0 ... ring_{n - 1} (one per "
                     f"ring of the curve); it has {', '.join(table.colnames[:8])}")


def _read_fits(path) -> np.ndarray:
    from astropy.io import fits

    with fits.open(path) as hdus:
        for hdu in hdus:
            if hdu.data is not None and getattr(hdu.data, "ndim", 0) == 2:
                return np.asarray(hdu.data, float) * _unit_factor(hdu.header.get("BUNIT"), str(path))
    raise InputError(f"covariance file {path} holds no 2-D image; write the N x N matrix as an image HDU")


def read_covariance(path, n: int | None = None) -> np.ndarray:
    """The N x N covariance (km^2/s^2) from an ECSV or FITS file (module docstring); ``n``: the curve's rows.
    Only the shape is checked here (blank rows belong to rings the curve cannot use); the rest when the
    curve's usable rings are known (:func:`check_covariance`)."""
    from ..io.input_files import check_input_file

    path = check_input_file(path, "covariance file")
    if path.suffix.lower() in (".fits", ".fit", ".fts") or path.name.lower().endswith(".fits.gz"):
        cov = _read_fits(path)
    else:
        cov = _read_ecsv(path)
    return check_covariance(cov, n, f"covariance file {path}", blank_rows=True)


def check_covariance(cov, n: int | None = None, where: str = "covariance", blank_rows: bool = False) -> np.ndarray:
    """``cov`` as a float array, refused unless square (n x n when given), finite, symmetric, positive definite.
    ``blank_rows``: check only the shape and the rows and columns that are not wholly blank (NaN)."""
    cov = np.array(cov, dtype=float)
    if cov.ndim != 2 or cov.shape[0] != cov.shape[1]:
        raise InputError(f"{where}: shape {cov.shape} is not a square matrix")
    if n is not None and cov.shape[0] != n:
        raise InputError(f"{where}: {cov.shape[0]} x {cov.shape[0]} matrix for a curve of {n} rows; give one row "
                         "and column per ring of the curve, in its order")
    if blank_rows:
        keep = ~np.all(np.isnan(cov), axis=1)
        check_covariance(cov[np.ix_(keep, keep)], where=where)
        return cov
    if not np.all(np.isfinite(cov)):
        raise InputError(f"{where}: blank or infinite entries; every entry must be a number")
    scale = float(np.max(np.abs(cov))) if cov.size else 0.0
    if not np.allclose(cov, cov.T, rtol=0, atol=1e-6 * scale):
        raise InputError(f"{where}: the matrix is not symmetric; a covariance has C[j, k] = C[k, j]")
    try:
        np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        raise InputError(f"{where}: the matrix is not positive definite (some combination of speeds would have no "
                         "or negative variance); check that the random part is on its diagonal") from None
    return cov


def inclination_term(v, inclination_deg, inclination_err_deg) -> np.ndarray:
    """g_k = |v_k| cot(i_k) sigma_i (km/s): each ring's speed change for a one-sigma inclination change, the same
    sign on every ring (fully correlated). ``inclination_deg`` may be one value or one per ring."""
    i = np.radians(np.broadcast_to(np.asarray(inclination_deg, float), np.shape(v)))
    return np.abs(np.asarray(v, float)) / np.tan(i) * np.radians(float(inclination_err_deg))


def with_correlated_term(independent_err, correlated) -> np.ndarray:
    """C = diag(e^2) + g g^T: independent errors e plus one fully correlated term g (both km/s)."""
    e, g = np.asarray(independent_err, float), np.asarray(correlated, float)
    return np.diag(e**2) + np.outer(g, g)


class Whitener:
    """r -> L^-1 r with C = L L^T (Cholesky), so that |L^-1 r|^2 = r^T C^-1 r."""

    def __init__(self, cov):
        from scipy.linalg import cholesky

        self.lower = cholesky(np.asarray(cov, float), lower=True)

    def __call__(self, residual):
        from scipy.linalg import solve_triangular

        return solve_triangular(self.lower, np.asarray(residual, float), lower=True)
