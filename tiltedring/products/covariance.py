"""The covariance of the rotation curve, part by part, and its file ``curve_covariance.ecsv``.

Built from the error columns of the ring table or the curve (:mod:`..pipeline.errors_budget`), in
(km/s)^2, one n x n matrix per part:

- ``random``: D R D, D = diag(v_rotation_err_random), R the measured correlation between
  neighbouring rings (``random_correlation_<k>``: ring j with ring j + k), 0 beyond a beam;
- ``geometry``: g_i g_i^T + g_pa g_pa^T with g the signed shifts of v_rotation at the orientation's
  +1 sigma (``v_rotation_shift_inclination``, ``v_rotation_shift_position_angle``): fully correlated;
- ``beam``: b b^T, b = v_rotation_err_beam (the beam treatment's error moves the inner rings together);
- ``asymmetry``: diag(v_rotation_err_asymmetry^2) (a ring's own systematic);
- ``widening``: diag(v_rotation_err^2 - the other parts' diagonal) where the total was widened
  (low inclination), else 0;
- ``total``: their sum, whose diagonal is v_rotation_err^2.

Rings without a finite v_rotation have NaN rows and columns.

File format (our own, plain ECSV, astropy units in the header): one row per ordered pair of rings
(n^2 rows), columns ``ring_i``, ``ring_j`` (0-based row numbers of ``curve.ecsv``), ``radius_i``,
``radius_j`` (arcsec), then ``total``, ``random``, ``geometry``, ``beam``, ``asymmetry``,
``widening`` in km2 / s2. :func:`read_covariance` gives the matrices back.
"""

from __future__ import annotations

import numpy as np
from astropy import units as u
from astropy.table import QTable, Table

__all__ = ["curve_covariance", "write_covariance", "read_covariance", "PARTS"]

PARTS = ("random", "geometry", "beam", "asymmetry", "widening")
_KMS = u.km / u.s


def _values(table, name, n, fill=0.0) -> np.ndarray:
    if name not in table.colnames:
        return np.full(n, fill)
    col = table[name]
    return np.asarray(col.to_value(_KMS) if hasattr(col, "unit") and col.unit is not None and col.unit != ""
                      else col, float)


def _random(table, n) -> np.ndarray:
    d = np.nan_to_num(_values(table, "v_rotation_err_random", n, np.nan))
    corr = np.eye(n)
    k = 1
    while f"random_correlation_{k}" in table.colnames:
        band = np.nan_to_num(np.asarray(table[f"random_correlation_{k}"], float))[: n - k]
        idx = np.arange(n - k)
        corr[idx, idx + k] = corr[idx + k, idx] = band
        k += 1
    return d[:, None] * corr * d[None, :]


def curve_covariance(table) -> dict:
    """Each part's covariance matrix and the total (module docstring), in (km/s)^2, by name."""
    n = len(table)
    parts = {"random": _random(table, n)}
    g_inc = np.nan_to_num(_values(table, "v_rotation_shift_inclination", n))
    g_pa = np.nan_to_num(_values(table, "v_rotation_shift_position_angle", n))
    parts["geometry"] = np.outer(g_inc, g_inc) + np.outer(g_pa, g_pa)
    beam = np.nan_to_num(_values(table, "v_rotation_err_beam", n))
    parts["beam"] = np.outer(beam, beam)
    parts["asymmetry"] = np.diag(np.nan_to_num(_values(table, "v_rotation_err_asymmetry", n)) ** 2)
    partial = sum(parts.values())
    total_err = np.nan_to_num(_values(table, "v_rotation_err", n, np.nan))
    parts["widening"] = np.diag(np.clip(total_err**2 - np.diag(partial), 0, None))
    parts["total"] = partial + parts["widening"]
    bad = ~np.isfinite(_values(table, "v_rotation", n, np.nan))
    for matrix in parts.values():
        matrix[bad, :] = np.nan
        matrix[:, bad] = np.nan
    return parts


def write_covariance(path, radius, parts: dict) -> None:
    """Write ``parts`` (n x n matrices in (km/s)^2) with the rings' ``radius`` (arcsec) to ``path``, atomically."""
    from ..io.atomic import atomic_path

    r = np.asarray(radius.to_value(u.arcsec) if hasattr(radius, "unit") else radius, float)
    n = len(r)
    i, j = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    t = QTable()
    t["ring_i"], t["ring_j"] = i.ravel(), j.ravel()
    t["radius_i"], t["radius_j"] = r[i.ravel()] * u.arcsec, r[j.ravel()] * u.arcsec
    for name in ("total",) + PARTS:
        t[name] = np.asarray(parts[name], float).ravel() * _KMS**2
    t.meta["comments"] = [
        "Covariance of v_rotation between rings i and j of curve.ecsv (rows in the same order), km2/s2.",
        "total = random + geometry + beam + asymmetry + widening; diagonal of total = v_rotation_err^2.",
        "random: noise with neighbour correlation; geometry: outer products of the signed shifts at the "
        "orientation's +1 sigma; beam: outer product of the beam part; asymmetry, widening: diagonal."]
    with atomic_path(path) as tmp:
        t.write(tmp, format="ascii.ecsv")


def read_covariance(source) -> tuple:
    """(radius in arcsec, {part: n x n matrix in (km/s)^2}) from a file written by :func:`write_covariance`
    (``source``: its path, or the table already read); parts the file lacks are left out."""
    t = source if isinstance(source, Table) else Table.read(source, format="ascii.ecsv")
    n = int(np.max(t["ring_i"])) + 1 if len(t) else 0
    i, j = np.asarray(t["ring_i"], int), np.asarray(t["ring_j"], int)
    radius = np.full(n, np.nan)
    if "radius_i" in t.colnames:
        radius[i] = np.asarray(t["radius_i"], float)
    out = {}
    for name in [part for part in ("total",) + PARTS if part in t.colnames]:
        m = np.full((n, n), np.nan)
        m[i, j] = np.asarray(t[name], float)
        out[name] = m
    return radius, out
