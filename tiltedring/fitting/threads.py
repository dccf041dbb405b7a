"""Sharing compiled work among threads (the numba kernels release the interpreter lock)."""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

__all__ = ["thread_count", "run_parts"]


def thread_count() -> int:
    """Threads to use: the machine's cores, at most 4."""
    return max(1, min(os.cpu_count() or 1, 4))


def run_parts(function, parts, threads: int | None = None):
    """Call ``function(part)`` for each part, sharing them among ``threads`` threads; returns the results."""
    parts = list(parts)
    threads = min(threads or thread_count(), len(parts))
    if threads <= 1:
        return [function(part) for part in parts]
    with ThreadPoolExecutor(threads) as pool:
        return list(pool.map(function, parts))
