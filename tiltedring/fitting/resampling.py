"""Resampling errors that respect beam-correlated noise.

Noise in a moment-1 map is correlated over a beam, and the residual of a fit also carries what the
model misses. Both are captured by drawing fake residual fields with the *same power spectrum* as
the measured residual (random phases; the spectrum of a masked field is normalised by the filled
fraction), adding each to the model, fitting it again, and taking the scatter of the fitted values
— a Monte Carlo in the spirit of a block bootstrap over beam-sized blocks, without the block edges.
The fit of each draw is whatever ``measure`` does; the pipeline passes the fit's first-order
response (:mod:`.response`), so a draw costs one inverse FFT and one pass of dot products.
Every draw comes from a seeded generator, so the same inputs give the same errors.
"""

from __future__ import annotations

import sys
import time

import numpy as np
from scipy import fft

__all__ = ["residual_like_noise", "resample_draws", "Progress"]


def residual_like_noise(residual, n: int, seed: int = 0):
    """Yield ``n`` fields with the power spectrum and rms of ``residual`` (NaN = blank)."""
    ok = np.isfinite(residual)
    if ok.sum() < 10:
        raise ValueError("too few finite residual pixels to estimate the noise spectrum")
    filled = np.where(ok, residual - np.nanmean(residual), 0.0)
    amplitude = (np.abs(fft.rfft2(filled)) / np.sqrt(ok.mean())).astype(np.float32)  # noise: single precision will do
    rms = float(np.sqrt(np.mean(filled[ok] ** 2)))
    rng = np.random.default_rng(seed)
    for _ in range(n):
        # the transform of white noise, drawn directly: independent complex normals (irfft2 keeps the
        # Hermitian part, and the rms is set below)
        phases = rng.standard_normal(amplitude.shape, np.float32) + 1j * rng.standard_normal(amplitude.shape, np.float32)
        field = fft.irfft2(phases * amplitude, s=residual.shape, workers=-1)
        field *= rms / max(float(np.std(field[ok])), 1e-30)
        yield field


class Progress:
    """A one-line progress counter on standard error for long loops (silent when ``quiet``)."""

    def __init__(self, label: str, total: int, quiet: bool = False, delay: float = 1.0):
        self.label, self.total, self.quiet, self.delay = label, total, quiet, delay
        self.start = time.perf_counter()
        self.shown = False

    def update(self, done: int):
        elapsed = time.perf_counter() - self.start
        if self.quiet or elapsed < self.delay:
            return
        rate = done / elapsed if elapsed > 0 else 0.0
        left = (self.total - done) / rate if rate > 0 else float("nan")
        sys.stderr.write(f"\r{self.label}: {done}/{self.total}  ({left:.0f} s left)   ")
        sys.stderr.flush()
        self.shown = True

    def close(self):
        if self.shown:
            sys.stderr.write("\n")
            sys.stderr.flush()


def resample_draws(model, residual, measure, n: int, seed: int = 0, quiet: bool = True) -> dict:
    """Every draw of ``measure(model + fake residual)`` over ``n`` draws: by name, an array whose first
    axis is the draw (so covariances between rings can be measured, not only each ring's scatter)."""
    draws = {}
    progress = Progress("resampling errors", n, quiet=quiet)
    for k, noise in enumerate(residual_like_noise(residual, n, seed), start=1):
        got = measure(model + noise)
        for name, value in got.items():
            draws.setdefault(name, []).append(np.asarray(value, float))
        progress.update(k)
    progress.close()
    return {name: np.array(values) for name, values in draws.items()}
