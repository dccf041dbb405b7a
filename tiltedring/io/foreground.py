"""Channels where emission at one velocity fills the field: foreground, or a continuum-subtraction problem.

A galaxy's line moves with its rotation, so in any one channel its emission covers a strip of the disc;
a foreground (Galactic HI over the whole field) or a continuum offset lies at one velocity everywhere.
Left in, it can outgrow the galaxy in the source mask (:mod:`.cube_mask` keeps the largest region)
and the maps follow the foreground instead of the galaxy. A run of adjacent channels is taken for
such emission when both hold:

1. **It fills the field**: in each channel of the run at least ``FILL`` (half) of the channel's
   finite pixels are in the clipped, smoothed cube of the source mask (before the largest region is
   chosen).
2. **It sits at one velocity**: the intensity-weighted mean velocity over the run's channels, per
   pixel (from the cube smoothed by the mask's beam), is within ``max(one channel, 5 km/s)`` of its
   median in at least ``CONCENTRATED`` (half) of those pixels, and a plane fitted to it (two rounds of
   3-sigma clipping) changes by at most ``max(2 channels, 15 km/s)`` across the field. A rotating disc
   that fills the field, as a nearby galaxy fills a CO cube, fails this: its mean velocity follows
   v_sys + v_rotation sin i cos(theta), a change of 2 v_rotation sin i (more than 15 km/s unless
   v_rotation sin i < 8 km/s, a disc too face-on for a tilted-ring fit) across the field.

The velocity range left out (whole km/s, rounded outward from 0.45 channels beyond the first and last
channel centres) runs over the adjacent channels around the run's strongest channel where
the median over the field of the beam-smoothed channel is at least its noise (``MEDIAN_LEVEL``; a
foreground lifts the median of every pixel, a galaxy covering less than half the field does not;
the median of N pixels has noise ~1.25 sigma / sqrt(N / pixels per beam), a tenth of sigma for
typical fields; the run's own channels when even its strongest channel stays below).
Thresholds are common practice for source masks, set on the test cubes of tests/test_cube.py
(foreground runs: mean velocity within a channel in 66-90 % of the pixels, plane change 1-8 km/s;
discs filling the field at inclinations 5-30 deg: 6-29 %, 42-180 km/s).
"""

from __future__ import annotations

import numpy as np

__all__ = ["find_field_filling", "FILL", "CONCENTRATED", "MEDIAN_LEVEL"]

FILL = 0.5  # share of a channel's finite pixels in the clipped smoothed cube
CONCENTRATED = 0.5  # share of pixels whose mean velocity is within the tolerance of the median
MEDIAN_LEVEL = 1.0  # field median of a beam-smoothed channel, in its noise, that extends the range
VELOCITY_TOLERANCE = 5.0  # km/s, or one channel when wider
PLANE_CHANGE = 15.0  # km/s across the field, or two channels when wider


def _plane_change(values, ys, xs, shape) -> float:
    """Change of a plane fitted to ``values`` at pixels (ys, xs) across the field's diagonal (km/s), after two
    rounds of 3-sigma clipping (the galaxy's own strip inside a foreground run is an outlier)."""
    keep = np.ones(values.size, bool)
    gradient = np.zeros(2)
    for _ in range(3):
        if keep.sum() < 3:
            break
        design = np.column_stack([np.ones(keep.sum()), xs[keep], ys[keep]])
        coef = np.linalg.lstsq(design, values[keep], rcond=None)[0]
        gradient = coef[1:]
        residual = values - (coef[0] + coef[1] * xs + coef[2] * ys)
        scale = 1.4826 * np.median(np.abs(residual[keep])) + 1e-9
        keep = np.abs(residual) <= 3.0 * scale
    return float(np.hypot(*gradient) * np.hypot(*shape))


def _run_velocity(smoothed, clipped, velocity, first, last):
    """Per-pixel intensity-weighted mean velocity over channels first..last (clipped voxels, positive values)."""
    block = slice(first, last + 1)
    weight = np.where(clipped[block], np.clip(np.nan_to_num(smoothed[block]), 0.0, None), 0.0)
    total = weight.sum(axis=0)
    filled = total > 0
    mean = (weight * velocity[block, None, None]).sum(axis=0)[filled] / total[filled]
    ys, xs = np.nonzero(filled)
    return mean, ys, xs


def _extent(field_median, run):
    """Channels (lo, hi) about the run's strongest channel where the field median stays at MEDIAN_LEVEL or
    above (the run's own channels when even its strongest stays below)."""
    peak = run[np.argmax(field_median[run])]
    if field_median[peak] < MEDIAN_LEVEL:
        return run[0], run[-1]
    lo = hi = peak
    while lo > 0 and field_median[lo - 1] >= MEDIAN_LEVEL:
        lo -= 1
    while hi < field_median.size - 1 and field_median[hi + 1] >= MEDIAN_LEVEL:
        hi += 1
    return lo, hi


def find_field_filling(velocity, channel_width, clipped, usable, smooth) -> list:
    """Runs of channels where emission fills the field (module docstring).

    ``clipped``: the mask's clipped smoothed cube (before the largest region); ``usable``: finite, not
    excluded voxels; ``smooth()``: (the cube smoothed on the sky by the mask's beam, its robust noise per
    channel), called only when some channel fills the field. Returns one dict per run: ``velocities``
    [lo, hi] (km/s, the range to leave out), ``channels``, ``peak_fill``, ``concentrated``,
    ``plane_change_kms``, ``foreground`` (both tests passed).
    """
    from scipy.ndimage import label

    velocity = np.asarray(velocity, float)
    width = abs(float(channel_width))
    finite = usable.sum(axis=(1, 2))
    fill = np.where(finite > 0, clipped.sum(axis=(1, 2)) / np.maximum(finite, 1), 0.0)
    runs, count = label(fill >= FILL)
    if count == 0:
        return []
    smoothed, smoothed_noise = smooth()
    with np.errstate(invalid="ignore", divide="ignore"):
        field_median = np.nan_to_num(np.nanmedian(np.where(usable, smoothed, np.nan), axis=(1, 2)) / smoothed_noise)
    tolerance = max(width, VELOCITY_TOLERANCE)
    limit = max(2.0 * width, PLANE_CHANGE)
    found = []
    for number in range(1, count + 1):
        run = np.flatnonzero(runs == number)
        mean, ys, xs = _run_velocity(smoothed, clipped, velocity, max(run[0] - 1, 0), min(run[-1] + 1, velocity.size - 1))
        if mean.size < 3:
            continue
        concentrated = float(np.mean(np.abs(mean - np.median(mean)) <= tolerance))
        change = _plane_change(mean, ys.astype(float), xs.astype(float), clipped.shape[1:])
        lo, hi = _extent(field_median, run)
        found.append({"velocities": [float(np.floor(velocity[lo] - 0.45 * width)),
                                     float(np.ceil(velocity[hi] + 0.45 * width))],
                      "channels": [int(lo), int(hi)], "peak_fill": round(float(fill[run].max()), 3),
                      "concentrated": round(concentrated, 3), "plane_change_kms": round(change, 1),
                      "foreground": bool(concentrated >= CONCENTRATED and change <= limit)})
    return found
