"""Resampling errors that respect beam-correlated noise.

Noise in a moment-1 map is correlated over a beam, and the residual of a fit also carries what the
model misses. Fake residual fields are drawn with the rms of the measured residual and a model of its
spatial correlation, a Gaussian core plus uncorrelated noise (:func:`residual_like_noise`); each is
added to the model and fitted again, and the scatter of the fitted values is the error — a Monte Carlo
in the spirit of a block bootstrap over beam-sized blocks, without the block edges. The fit of each
draw is whatever ``measure`` does; the pipeline passes the fit's first-order response
(:mod:`.response`), so a draw costs one inverse FFT and one pass of dot products. Every draw comes from
a seeded generator, so the same inputs give the same errors.
"""

from __future__ import annotations

import sys
import time

import numpy as np
from scipy import fft

__all__ = ["residual_like_noise", "correlation_core", "resample_draws", "Progress"]


def residual_like_noise(residual, n: int, seed: int = 0):
    """Yield ``n`` fields with the rms of ``residual`` (NaN = blank) and a model of its spatial correlation.

    The autocorrelation is estimated with each lag normalised by its own number of pixel pairs,
    C(s) = sum_x r(x) r(x + s) / N(s), N(s) the overlap of the blank mask with itself shifted by s
    (zero-padded FFTs, no wrap-around), over the lags where N(s) > N(0) / 4. Its model is a Gaussian core
    a exp(-s^T M s / 2) fitted to C away from the zero lag (:func:`correlation_core`) plus uncorrelated
    noise of variance C(0) - a (pixel noise, wild pixels); the fields' power spectrum is the model's
    transform (Wiener-Khinchin; Priestley 1981, Spectral Analysis and Time Series, ch. 6). The residual's
    own spectrum, used as it is, lacks what the fitted model took out of the noise: each ring's speed
    absorbs the noise's cos(theta) pattern on that ring, i.e. power at the large scales that set a ring's
    error, so errors drawn from it were about 20 per cent below the scatter of fits to fresh noise
    (tests/test_noise_model.py, benchmarks/error_calibration.py); taking the larger of the two spectra at
    each frequency overshot (the larger of a noisy estimate and a smooth one is biased up). Structure the
    model misses enters through the rms. A residual without spatial correlation gives white noise."""
    ok = np.isfinite(residual)
    if ok.sum() < 10:
        raise ValueError("too few finite residual pixels to estimate the noise spectrum")
    filled = np.where(ok, residual - np.nanmean(residual), 0.0)
    padded = tuple(fft.next_fast_len(2 * size, real=True) for size in residual.shape)
    pairs = fft.irfft2(np.abs(fft.rfft2(ok.astype(float), s=padded)) ** 2, s=padded)
    products = fft.irfft2(np.abs(fft.rfft2(filled, s=padded)) ** 2, s=padded)
    correlation = np.where(pairs > 0.25 * pairs[0, 0], products / np.maximum(pairs, 0.5), 0.0)
    model = np.zeros(padded)
    core = correlation_core(correlation)
    if core is not None:
        model += core * min(1.0, correlation[0, 0] / core[0, 0])
    model[0, 0] = max(correlation[0, 0], model[0, 0])  # the uncorrelated part: C(0) - a
    amplitude = np.sqrt(np.clip(fft.rfft2(model).real, 0.0, None)).astype(np.float32)  # single precision will do
    rms = float(np.sqrt(np.mean(filled[ok] ** 2)))
    rng = np.random.default_rng(seed)
    ny, nx = residual.shape
    for _ in range(n):
        # the transform of white noise, drawn directly: independent complex normals (irfft2 keeps the
        # Hermitian part, and the rms is set below); the padded field is cropped, so it does not wrap
        shape = amplitude.shape
        phases = rng.standard_normal(shape, np.float32) + 1j * rng.standard_normal(shape, np.float32)
        field = fft.irfft2(phases * amplitude, s=padded, workers=-1)[:ny, :nx]
        field *= rms / max(float(np.std(field[ok])), 1e-30)
        yield np.ascontiguousarray(field)


def correlation_core(correlation, level: float = 0.5, reach: int = 16):
    """The Gaussian a exp(-s^T M s / 2) fitted by linear least squares to ln C(s) over the lags of the core
    (0 < |s| out to the first radius, in whole pixels up to ``reach``, where the mean of C falls below
    ``level`` times its largest value one pixel from the zero lag) where C itself exceeds that, drawn on the
    lag grid of ``correlation`` (wrapped: negative lags at the end). The zero lag is left out:
    it also holds the pixels' uncorrelated noise and wild pixels, which the core is not to follow (a residual
    whose neighbours share only a fifth of its variance still has a core). The core is the narrowest
    component, the noise's correlation, rather than broad structure the model misses. None when fewer than
    six lags qualify or M is not positive definite (no spatial correlation to model)."""
    ny, nx = correlation.shape
    sy = np.fft.fftfreq(ny, 1.0 / ny)[:, None] * np.ones((1, nx))
    sx = np.ones((ny, 1)) * np.fft.fftfreq(nx, 1.0 / nx)[None, :]
    radius = np.hypot(sx, sy)
    ring = np.rint(radius).astype(int)
    near = (ring >= 1) & (ring <= reach)
    peak = float(np.max(correlation[near & (ring == 1)]))
    if peak <= 0:
        return None
    # the core: out to the first radius whose mean correlation falls below the level (far lags of a small map
    # can pass the level by chance and must not steer the fit)
    means = np.array([correlation[ring == k].mean() for k in range(1, reach + 1)])
    below = np.flatnonzero(means <= level * peak)
    edge = below[0] + 1 if below.size else reach + 1
    use = near & (ring <= edge) & (correlation > level * peak)
    if use.sum() < 6:
        return None
    x, y = sx[use], sy[use]
    design = np.column_stack([np.ones_like(x), -0.5 * x * x, -x * y, -0.5 * y * y])
    (log_a, a_xx, a_xy, a_yy), *_ = np.linalg.lstsq(design, np.log(correlation[use]), rcond=None)
    if a_xx <= 0 or a_yy <= 0 or a_xx * a_yy <= a_xy**2:
        return None
    return np.exp(log_a - 0.5 * (a_xx * sx * sx + 2 * a_xy * sx * sy + a_yy * sy * sy))


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
