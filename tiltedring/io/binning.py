"""Maps too large to fit in memory: a memory estimate before the fit, and binning to coarser pixels.

The fit holds every valid pixel in memory (its position, velocity, error and per-stage copies)
plus a few full-size maps (model, residual, smeared model, padded FFT planes). Measured on the
speed benchmark (``benchmarks/speed.py``) the fit needs about ``BYTES_PER_VALID_PIXEL`` per valid
pixel and ``BYTES_PER_MAP_PIXEL`` per map pixel above the interpreter's own ~0.23 GB (a 1024x1024
map with 400,000 valid pixels peaks at 0.39 GB in all, a 2048x2048 map at 0.87 GB). A map whose
estimate exceeds the memory available is refused before anything is computed, with the binning
factor that would fit.

The ring layout is checked at the same time (:func:`ring_count`): rings narrower than a tenth of a
pixel, radii far beyond the map's farthest pixel (even deprojected at 85 deg inclination), or more
than ``MAX_RINGS`` rings are refused before any work, with the option to change.

Binning averages f x f blocks of pixels: a well-sampled map (several pixels across the beam) loses
nothing a tilted-ring fit can use as long as about two binned pixels still span the beam FWHM. The
velocity of a block is the intensity-weighted mean of its valid pixels (plain mean without an
intensity map); a block needs at least half its pixels valid. The error of a block is the rms of
its pixels' errors, not reduced by averaging, since pixels within a beam carry correlated noise
(the fit's pixels-per-beam scaling accounts for correlation on the new grid). Intensity is averaged
(surface brightness keeps its unit), dispersion is intensity-weighted like the velocity. The WCS
is sliced with the same step, so binned pixel k covers original pixels f k ... f k + f - 1.
"""

from __future__ import annotations

import os
from dataclasses import replace

import numpy as np

from ..errors import InputError
from .maps import VelocityMap, sky_jacobian_from_wcs

__all__ = ["bin_map", "memory_estimate", "available_memory", "check_memory"]

BYTES_PER_VALID_PIXEL = 350
BYTES_PER_MAP_PIXEL = 60
BYTES_PER_RING = 200_000  # a generous bound, not measured: a ring's rows in every table, solutions, diagnostics
MAX_RINGS = 2000
MIN_RING_WIDTH = 0.1  # pixels
MAX_INCLINATION = 85.0  # deg: the disc-plane reach of a map's farthest pixel is computed for this inclination


def memory_estimate(vmap: VelocityMap, n_rings: int = 0) -> float:
    """Bytes the fit of ``vmap`` with ``n_rings`` rings needs beyond the interpreter (module docstring)."""
    ny, nx = vmap.shape
    return (BYTES_PER_VALID_PIXEL * float(vmap.valid.sum()) + BYTES_PER_MAP_PIXEL * float(ny * nx)
            + BYTES_PER_RING * float(n_rings))


def ring_count(vmap: VelocityMap, options) -> int:
    """How many rings ``options`` (a :class:`..pipeline.options.FitOptions`) lay on ``vmap``, an upper estimate;
    a layout no fit can use is refused first (module docstring)."""
    from ..errors import InputError
    from ..fitting.rings import parse_width

    pixel = vmap.pixel_scale
    beam = vmap.beam.fwhm if vmap.beam is not None else None
    reach = 0.5 * float(np.hypot(*vmap.shape)) * pixel / np.cos(np.radians(MAX_INCLINATION))
    if options.ring_edges is not None:
        widths, first, r_max = np.diff(options.ring_edges), options.ring_edges[0], options.ring_edges[-1]
        width = float(np.min(widths))
    else:
        width = parse_width(options.ring_width, pixel, beam) if options.ring_width is not None else (
            beam if beam is not None else 2.0 * pixel)
        first = parse_width(options.first_radius, pixel, beam) if options.first_radius else 0.0
        given = options.max_radius is not None
        r_max = parse_width(options.max_radius, pixel, beam) if given else min(reach, 0.5 * float(np.hypot(*vmap.shape))
                                                                               * pixel)
    if first >= reach or r_max > reach:
        where = ("the ring edges reach" if options.ring_edges is not None else "the first radius lies" if first >= reach
                 else "the maximum radius lies")
        raise InputError(f"{where} ({first if first >= reach else r_max:.4g} arcsec) far beyond the map: even for "
                         f"a disc at {MAX_INCLINATION:g} deg inclination no pixel is more than {reach:.4g} arcsec from "
                         "the centre in the disc plane; give radii within the data")
    if width < MIN_RING_WIDTH * pixel:
        why = (f" (the default width is one beam: is the beam, {beam:.3g} arcsec, in the right unit? --beam takes "
               "arcsec)" if options.ring_width is None and options.ring_edges is None and beam is not None else "")
        raise InputError(f"rings {width:.3g} arcsec wide are narrower than a tenth of a pixel ({pixel:.3g} arcsec){why}: "
                         "they would hold almost no pixels; give a ring width of a pixel or more (e.g. --ring-width "
                         "2pix, or 0.5beam)")
    if options.ring_edges is not None:
        count = len(options.ring_edges) - 1
    elif options.spacing == "logarithmic":
        count = int(np.ceil(np.log1p(max(r_max - first, 0.0) * (options.growth - 1) / width) / np.log(options.growth)))
    else:
        count = int(np.ceil(max(r_max - first, 0.0) / width))
    if count > MAX_RINGS:
        raise InputError(f"this layout asks for about {count} rings ({width:.3g} arcsec wide out to {r_max:.4g} arcsec); "
                         f"the fit takes at most {MAX_RINGS}: give wider rings (--ring-width) or a smaller "
                         "--max-radius")
    return count


def available_memory() -> float | None:
    """Bytes of memory available to a new allocation (Linux MemAvailable; None where unknown)."""
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024.0
    except OSError:
        pass
    try:
        return float(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def check_memory(vmap: VelocityMap, available: float | None = None, options=None) -> None:
    """Refuse a map whose fit would not fit in memory, naming the binning factor that would.

    With the fit ``options`` the ring layout is checked and counted too (:func:`ring_count`)."""
    available = available_memory() if available is None else available
    need = memory_estimate(vmap, ring_count(vmap, options) if options is not None else 0)
    if available is None or need <= 0.8 * available:
        return
    factor = 2
    while need / factor**2 > 0.8 * available:
        factor += 1
    beam = ""
    if vmap.beam is not None:
        across = vmap.beam.fwhm / (vmap.pixel_scale * factor)
        beam = (f"; the beam would then span {across:.1f} binned pixels"
                + (" (fewer than two: the fit loses resolution)" if across < 2 else ""))
    raise InputError(
        f"velocity map {vmap.source} ({vmap.shape[1]}x{vmap.shape[0]}, {int(vmap.valid.sum())} valid pixels) needs "
        f"about {need / 2**30:.1f} GiB to fit but only {available / 2**30:.1f} GiB of memory is available; bin it "
        f"with --bin {factor} (a bin column of {factor} in a batch manifest, bin_map(vmap, {factor}) in Python){beam}"
    )


def _blocks(image, factor):
    ny, nx = image.shape[0] // factor, image.shape[1] // factor
    return image[: ny * factor, : nx * factor].reshape(ny, factor, nx, factor)


def _weighted_mean(values, weights, factor, enough):
    v, w = _blocks(values, factor), _blocks(weights, factor)
    total = w.sum(axis=(1, 3))
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(w > 0, v * w, 0.0).sum(axis=(1, 3)) / total
    return np.where(enough & (total > 0), mean, np.nan)


def bin_map(vmap: VelocityMap, factor: int) -> VelocityMap:
    """A new :class:`.maps.VelocityMap` of ``factor`` x ``factor`` block averages (module docstring).

    Rows and columns beyond a whole number of blocks are dropped; ``vmap`` is not modified.
    """
    factor = int(factor)
    if factor < 1:
        raise InputError(f"binning factor must be a whole number >= 1, got {factor}")
    if factor == 1:
        return vmap
    ny, nx = vmap.shape[0] // factor, vmap.shape[1] // factor
    if min(ny, nx) < 8:
        raise InputError(f"binning {vmap.shape[1]}x{vmap.shape[0]} by {factor} leaves only {nx}x{ny} pixels; "
                         "use a smaller factor")
    valid = vmap.valid
    enough = _blocks(valid, factor).sum(axis=(1, 3)) >= 0.5 * factor**2
    weight = valid.astype(float)
    if vmap.intensity is not None:
        weight = weight * np.clip(np.nan_to_num(vmap.intensity), 0.0, None)
        weight = np.where(valid & (weight <= 0), 1e-12, weight)  # valid pixels without emission still count a little
    velocity = _weighted_mean(np.nan_to_num(vmap.velocity), weight, factor, enough)
    out = {"velocity": velocity}
    if vmap.error is not None:
        out["error"] = np.sqrt(_weighted_mean(np.nan_to_num(vmap.error) ** 2, valid.astype(float), factor, enough))
    if vmap.intensity is not None:
        finite = np.isfinite(vmap.intensity)
        out["intensity"] = _weighted_mean(np.nan_to_num(vmap.intensity), finite.astype(float), factor,
                                          _blocks(finite, factor).any(axis=(1, 3)))
    if vmap.dispersion is not None:
        out["dispersion"] = _weighted_mean(np.nan_to_num(vmap.dispersion), weight * np.isfinite(vmap.dispersion),
                                           factor, enough)
    wcs, jacobian = None, vmap.sky_jacobian * factor
    if vmap.wcs is not None:
        wcs = vmap.wcs.slice((slice(0, ny * factor, factor), slice(0, nx * factor, factor)))
        jacobian = sky_jacobian_from_wcs(wcs, (nx - 1) / 2.0, (ny - 1) / 2.0)
    note = (f"map binned {factor}x{factor} before fitting ({vmap.shape[1]}x{vmap.shape[0]} -> {nx}x{ny} pixels; "
            "velocities intensity-weighted block means)")
    return replace(vmap, sky_jacobian=jacobian, wcs=wcs, notes=list(vmap.notes) + [note], **out)
