"""Weighted normal equations summed in a fixed order (the same numbers for any number of threads).

For residuals r (n) and a Jacobian J (m x n, one row per parameter)::

    A = J J^T,   g = J r,   chi^2 = r . r

BLAS dot products may split their sums among their own threads and so change the last bits with
the thread count; here every element is summed by one thread from the first voxel to the last.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .threads import run_parts, thread_count

__all__ = ["normal_equations", "sum_of_squares"]


@njit(cache=True, nogil=True)
def _rows(jac, res, lo, hi, a_out, g_out):
    m, n = jac.shape
    for a in range(lo, hi):
        s = 0.0
        for v in range(n):
            s += jac[a, v] * res[v]
        g_out[a] = s
        for b in range(a, m):
            s = 0.0
            for v in range(n):
                s += jac[a, v] * jac[b, v]
            a_out[a, b] = s
            a_out[b, a] = s


@njit(cache=True, nogil=True)
def sum_of_squares(res):
    """r . r summed in order."""
    s = 0.0
    for v in range(res.shape[0]):
        s += res[v] * res[v]
    return s


def normal_equations(jac, res, threads: int | None = None):
    """(J J^T, J r) for ``jac`` (m, n) and ``res`` (n); rows of the result shared among threads."""
    jac = np.ascontiguousarray(jac, float)
    res = np.ascontiguousarray(res, float)
    m = jac.shape[0]
    a_out = np.empty((m, m))
    g_out = np.empty(m)
    parts = max(1, min(m, threads or thread_count()))
    # rows near the top cost more (longer b loops): deal them out in turn
    order = [np.arange(t, m, parts) for t in range(parts)]
    run_parts(lambda rows: [_rows(jac, res, a, a + 1, a_out, g_out) for a in rows], order, threads)
    return a_out, g_out
