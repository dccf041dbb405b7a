"""From a spectral cube to the maps a tilted-ring fit reads: velocity, its error, moment 0, dispersion.

Kinds of velocity map (``kind``), each over the emission mask of :mod:`.cube_mask`:

- ``moment``: intensity-weighted mean velocity (moment 1), v1 = sum I v / sum I over the line mask of
  :mod:`.cube_mask` (a survey-style hysteresis mask inside the source mask; no other clipping: negative
  values inside it count), with error^2 = sum noise^2 (v - v1)^2 / (sum I)^2 and the moment-2
  dispersion over the same mask. Pixels need a moment 0 above 3 times its noise over both masks.
- ``peak``: the velocity of the brightest channel, refined by the parabola through it and its two
  neighbours (common practice); error propagated from the channel noise.
- ``gaussian``: the centre of a single Gaussian fitted to the spectrum.
- ``hermite`` (default): the peak of a Gauss-Hermite profile with h3 (van der Marel & Franx 1993,
  ApJ 407, 525): it follows the bulk of the gas in lines skewed by beam smearing or by several
  components on one sight line, where moment 1 and a plain Gaussian are pulled toward the wing
  (the choice of the THINGS HI velocity fields, de Blok et al. 2008, AJ 136, 2648; from memory).
  Spectra whose Gauss-Hermite fit fails or leaves |h3| > 0.5 take the Gaussian centre (counted).

Fits use the channels from the first to the last masked channel of each spectrum, widened by
``window_margin`` channels on each side (minus excluded, blank channels); fits whose centre leaves
that window are blanked. Only pixels whose moment 0 over the mask exceeds 3 times its noise
(noise_k summed in quadrature over the masked channels) get a velocity: the mask's dilated edges
hold spectra without a detectable line. The intensity map is moment 0 over the mask, sum I dv, in
the cube's unit times km/s. The dispersion map is the moment-2 width for ``moment`` and ``peak`` and the
fitted Gaussian sigma for the fits; neither is corrected for the channel width or the beam.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.io import fits

from ..errors import FitCaution, InputError
from .cube import LineCube, read_cube
from .cube_mask import make_signal_mask
from .maps import Beam, read_velocity_map

__all__ = ["VelocityMaps", "make_velocity_maps", "line_centres", "KINDS", "DEFAULT_KIND", "MAP_FILES"]

KINDS = ("moment", "peak", "gaussian", "hermite")
DEFAULT_KIND = "hermite"
MAP_FILES = {"velocity": "velocity.fits", "velocity_error": "velocity_err.fits", "intensity": "intensity.fits",
             "dispersion": "dispersion.fits", "mask": "mask.fits", "h3": "h3.fits", "record": "maps.json"}
EXCLUSION_MARGIN = 1.5  # lines centred within this many widths of a vetoed range are cut by it: blanked
MINIMUM_SNR = 3.0  # a pixel's masked moment 0 must exceed this many times its noise to get a velocity


@dataclass
class VelocityMaps:
    """Maps made from a cube (arrays ``[y, x]``, NaN blank) with the cube's 2-D celestial header."""

    velocity: np.ndarray
    velocity_error: np.ndarray
    intensity: np.ndarray
    dispersion: np.ndarray
    mask: np.ndarray
    kind: str
    header: fits.Header
    beam: Beam | None
    intensity_unit: str
    channel_velocity: np.ndarray
    convention: str
    h3: np.ndarray | None = None
    record: dict = field(default_factory=dict)

    def header_for(self, bunit: str) -> fits.Header:
        """The maps' 2-D header with BUNIT ``bunit``, the velocity convention card (:mod:`.conventions`) and the
        card of the kind of velocity map (:mod:`.map_kind`)."""
        from .conventions import CONVENTION_CARD
        from .map_kind import KIND_CARD

        header = self.header.copy()
        header["BUNIT"] = bunit
        header[CONVENTION_CARD] = (self.convention, "Doppler convention of the velocities")
        header[KIND_CARD] = (self.kind, "how velocities were taken from the spectra")
        return header

    def pairs(self) -> dict:
        """(array, header) pairs for :func:`tiltedring.read_velocity_map`: velocity, error, intensity, dispersion."""
        kms = self.header_for("km/s")
        return {"source": (self.velocity, kms), "error": (self.velocity_error, kms),
                "intensity": (self.intensity, self.header_for(self.intensity_unit)),
                "dispersion": (self.dispersion, kms)}

    def to_velocity_map(self, **options):
        """The :class:`~tiltedring.io.maps.VelocityMap` of these maps (beam and intensity included)."""
        pairs = self.pairs()
        if options.get("beam") is None:
            options["beam"] = self.beam
        vmap = read_velocity_map(pairs.pop("source"), **pairs, **options)
        vmap.source = self.record.get("source", "cube")
        return vmap

    def mask_header(self) -> fits.Header:
        """A 3-D header for the mask: the celestial axes and a linear velocity axis (km/s), no BUNIT."""
        from .cube_files import spectral_header

        return spectral_header(self.header, self.channel_velocity, self.convention)

    def write_into(self, folder) -> dict:
        """Write every map and ``maps.json`` into ``folder`` (each file atomically); returns the paths."""
        from .atomic import atomic_path, write_json

        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        planes = {"velocity": (self.velocity, "km/s"), "velocity_error": (self.velocity_error, "km/s"),
                  "intensity": (self.intensity, self.intensity_unit), "dispersion": (self.dispersion, "km/s")}
        if self.h3 is not None:
            planes["h3"] = (self.h3, "")
        paths = {}
        for key, (data, bunit) in planes.items():
            paths[key] = folder / MAP_FILES[key]
            with atomic_path(paths[key]) as tmp:
                fits.PrimaryHDU(np.asarray(data, np.float32), header=self.header_for(bunit)).writeto(tmp)
        paths["mask"] = folder / MAP_FILES["mask"]
        with atomic_path(paths["mask"]) as tmp:
            fits.PrimaryHDU(self.mask.astype(np.uint8), header=self.mask_header()).writeto(tmp)
        paths["record"] = folder / MAP_FILES["record"]
        write_json(paths["record"], self.record)
        return paths

    def write(self, folder, overwrite: bool = False) -> Path:
        """Write the maps into a new ``folder`` as one atomic step (refused if it exists, unless ``overwrite``)."""
        from .atomic import atomic_folder

        with atomic_folder(folder, overwrite=overwrite) as tmp:
            self.write_into(tmp)
        return Path(folder)


def make_velocity_maps(cube, *, kind: str = DEFAULT_KIND, exclude_velocities=(), exclusion: str = "interpolate",
                       keep_regions: str = "largest", mask_threshold: float = 4.0, minimum_run: int = 3,
                       spatial_smoothing: float = 1.0, spectral_smoothing: float = 3.0, window_margin: int = 4,
                       detect_foreground: bool = True, threads: int | None = None,
                       **read_options) -> VelocityMaps:
    """Velocity, error, moment-0 and dispersion maps of a cube (see the module docstring for ``kind``).

    ``cube`` is a :class:`LineCube` or anything :func:`read_cube` reads (``read_options`` go to it).
    ``exclude_velocities``: (lo, hi) km/s ranges in the cube's convention holding foreground;
    ``exclusion`` ``"interpolate"`` (vetoed off the galaxy, interpolated foreground subtracted on it) or
    ``"veto"`` (left out of every spectrum); ``keep_regions`` ``"largest"`` (the galaxy only) or ``"all"``
    (see :mod:`.cube_mask`);
    ``mask_threshold`` (noise units of the smoothed cube) and ``minimum_run`` (channels) steer the mask;
    ``detect_foreground``: channels where emission at one velocity fills the field are excluded too, with a
    caution (:mod:`.foreground`).
    """
    if kind not in KINDS:
        raise InputError(f"velocity kind {kind!r}: give one of {', '.join(KINDS)}")
    if not isinstance(cube, LineCube):
        cube = read_cube(cube, **read_options)
    signal = make_signal_mask(cube, threshold=mask_threshold, minimum_run=minimum_run,
                              spatial_smoothing=spatial_smoothing, spectral_smoothing=spectral_smoothing,
                              exclude_velocities=exclude_velocities, exclusion=exclusion, keep_regions=keep_regions,
                              detect_foreground=detect_foreground)
    if not signal.mask.any():
        raise InputError(f"cube {cube.source}: no emission above {mask_threshold} times the noise of the smoothed "
                         "cube; lower the mask threshold or check the excluded velocity ranges")
    data = signal.data
    moments = _moments(data, signal.mask, cube)
    velocity, error, dispersion, h3, counts = moments["velocity"], moments["error"], moments["dispersion"], None, {}
    if kind == "moment":  # over the survey-style line mask (module docstring)
        line_mask = signal.line()
        signal.record["line_mask"] = signal.line_record(line_mask)
        line = _moments(data, line_mask, cube)
        moments["valid"] = moments["valid"] & line["valid"]
        velocity, error, dispersion = line["velocity"], line["error"], line["dispersion"]
    elif kind == "peak":
        velocity, error = _peak_velocity(data, signal.mask, cube)
    elif kind in ("gaussian", "hermite"):
        velocity, error, dispersion, h3, counts = _fitted_maps(data, signal.mask, cube, moments, kind, window_margin,
                                                               threads)
    vetoed = signal.record["excluded_velocities"] if signal.record["exclusion"] == "veto" else []
    cut = _near_excluded(velocity, dispersion, cube.channel_width, vetoed)
    counts["pixels_blanked_near_excluded_velocities"] = int((moments["valid"] & np.isfinite(velocity) & cut).sum())
    velocity = np.where(cut, np.nan, velocity)
    usable_error = np.isfinite(error) & (error > 0)
    counts["pixels_blanked_for_zero_error"] = int((moments["valid"] & np.isfinite(velocity) & ~usable_error).sum())
    velocity = np.where(moments["valid"] & usable_error, velocity, np.nan)
    error = np.where(np.isfinite(velocity), error, np.nan)
    intensity = np.where(moments["valid"], moments["intensity"], np.nan)
    unit = u.Unit(cube.unit) * u.km / u.s
    record = _record(cube, kind, signal, counts, velocity)
    record["cautions"] = _cautions(signal.record, counts, int(moments["valid"].sum()))
    for text in record["cautions"]:
        warnings.warn(text, FitCaution, stacklevel=2)
    return VelocityMaps(velocity=velocity, velocity_error=error, intensity=intensity,
                        dispersion=np.where(np.isfinite(velocity), dispersion, np.nan), mask=signal.mask, kind=kind,
                        header=cube.header.copy(), beam=cube.beam, intensity_unit=unit.to_string(format="fits"),
                        channel_velocity=cube.velocity.copy(), convention=cube.convention, h3=h3, record=record)


def line_centres(data, velocity, kind: str, threads: int | None = None) -> np.ndarray:
    """The velocity map of a noiseless cube ``data`` (channel, y, x; e.g. a model cube) by the estimator of
    ``kind`` (module docstring; ``optical-centroid``: the Gaussian centre), each spectrum over all its channels
    where it holds emission (above 1e-6 of the brightest value). The noise is taken as 1e-9 of the brightest
    value in every channel, so that only the fitting weights, all equal, follow from it. NaN where no emission."""
    from types import SimpleNamespace

    data = np.asarray(data, float)
    velocity = np.asarray(velocity, float)
    estimator = "gaussian" if kind == "optical-centroid" else kind
    if estimator not in KINDS:
        raise InputError(f"velocity kind {kind!r}: give one of {', '.join(KINDS)} or optical-centroid")
    top = float(np.nanmax(data)) if np.isfinite(data).any() else 0.0
    if top <= 0.0:
        return np.full(data.shape[1:], np.nan)
    grid = SimpleNamespace(velocity=velocity, channel_width=float(np.median(np.abs(np.diff(velocity)))),
                           noise=np.full(velocity.size, 1e-9 * top))
    mask = data > 1e-6 * top
    moments = _moments(data, mask, grid)
    if estimator == "moment":
        out = moments["velocity"]
    elif estimator == "peak":
        out = _peak_velocity(data, mask, grid)[0]
    else:
        out = _fitted_maps(data, mask, grid, moments, estimator, 0, threads)[0]
    return np.where(moments["valid"], out, np.nan)


def _foreground_cautions(mask_record) -> list:
    """What the foreground detection did, with the range and the options to state it or turn it off."""
    out = []
    for run in mask_record.get("field_filling", []):
        if not run["foreground"]:
            continue
        lo, hi = run["velocities"]
        where = (f"emission at one velocity fills {100 * run['peak_fill']:.0f} % of the field between {lo:g} and "
                 f"{hi:g} km/s (a foreground, or a continuum-subtraction problem: it does not move with the "
                 "galaxy's rotation)")
        if run.get("excluded"):
            out.append(f"{where}; those channels were left out of the source mask as an excluded range. State the "
                       f"range yourself with --exclude-velocities={lo:g}:{hi:g} (widen it if the foreground's wings "
                       "show in the maps), or keep the channels with --no-detect-foreground")
        else:
            out.append(f"{where}; they were kept because no other channel holds emission: if it is a foreground, "
                       "the maps show it and not the galaxy")
    return out


def _cautions(mask_record, counts, n_valid) -> list:
    """Where the maps may mislead: foreground found or subtracted by interpolation, many pixels lost."""
    out = _foreground_cautions(mask_record)
    if mask_record["exclusion"] == "interpolate" and mask_record["foreground_interpolated_pixels"]:
        out.append(f"foreground in the excluded velocity ranges was interpolated from around the galaxy and "
                   f"subtracted on {mask_record['foreground_interpolated_pixels']} pixels: velocities there assume a "
                   "foreground smooth across the galaxy (exclusion='veto' leaves those channels out instead)")
    lost = {"pixels_blanked_near_excluded_velocities": "lie next to a vetoed velocity range",
            "pixels_blanked_by_failed_fits": "have a line profile the fit could not follow"}
    for key, why in lost.items():
        if n_valid and counts.get(key, 0) > 0.1 * n_valid:
            out.append(f"{counts[key]} of {n_valid} pixels with emission got no velocity because they {why}")
    return out


def _near_excluded(velocity, dispersion, channel_width, ranges):
    """Pixels whose line centre lies within EXCLUSION_MARGIN line widths of an excluded range."""
    width = EXCLUSION_MARGIN * np.fmax(np.nan_to_num(dispersion, nan=channel_width), channel_width)
    near = np.zeros(velocity.shape, bool)
    for lo, hi in ranges:
        with np.errstate(invalid="ignore"):
            near |= (velocity > lo - width) & (velocity < hi + width)
    return near


def _channel_widths(velocity):
    return np.abs(np.gradient(velocity)) if velocity.size > 1 else np.ones(1)


def _moments(data, mask, cube):
    """Moments 0, 1 and 2 over the mask, with the moment-1 error (see the module docstring)."""
    dv = _channel_widths(cube.velocity)[:, None, None]
    vel = cube.velocity[:, None, None]
    signal = np.where(mask & np.isfinite(data), data, 0.0)
    total = signal.sum(axis=0)
    total_noise = np.sqrt((mask * cube.noise[:, None, None] ** 2).sum(axis=0))
    valid = mask.any(axis=0) & (total > MINIMUM_SNR * total_noise)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(valid, (signal * vel).sum(axis=0) / total, np.nan)
        spread = (signal * (vel - mean) ** 2).sum(axis=0) / total
        width = np.sqrt(np.where(spread > 0, spread, np.nan))
        var = ((mask * cube.noise[:, None, None] ** 2) * (vel - mean) ** 2).sum(axis=0) / total ** 2
    return {"velocity": mean, "error": np.sqrt(var), "dispersion": width, "valid": valid,
            "intensity": (signal * dv).sum(axis=0), "peak": np.where(mask, np.nan_to_num(data, nan=-np.inf),
                                                                     -np.inf).max(axis=0)}


def _peak_velocity(data, mask, cube):
    """Brightest masked channel, refined by a parabola through it and its neighbours."""
    n = data.shape[0]
    masked = np.where(mask, np.nan_to_num(data, nan=-np.inf), -np.inf)
    k = np.argmax(masked, axis=0)
    k_lo, k_hi = np.clip(k - 1, 0, n - 1), np.clip(k + 1, 0, n - 1)
    take = lambda idx: np.take_along_axis(data, idx[None], axis=0)[0]  # noqa: E731
    y0, ym, yp = take(k), take(k_lo), take(k_hi)
    width = cube.channel_width * np.sign(cube.velocity[-1] - cube.velocity[0])
    curvature = ym - 2.0 * y0 + yp
    slope = ym - yp
    with np.errstate(invalid="ignore", divide="ignore"):
        shift = slope / (2.0 * curvature)
        refine = (k > 0) & (k < n - 1) & (curvature < 0) & (np.abs(shift) <= 1.0) & np.isfinite(shift)
        sigma = cube.noise[k]
        var = sigma ** 2 * ((curvature - slope) ** 2 + (curvature + slope) ** 2 + 4.0 * slope ** 2) / (
            4.0 * curvature ** 4)
    velocity = cube.velocity[k] + np.where(refine, shift, 0.0) * width
    error = np.where(refine, np.abs(width) * np.sqrt(var), abs(width) / np.sqrt(12.0))
    return velocity, error


def _fitted_maps(data, mask, cube, moments, kind, window_margin, threads):
    """Gaussian (and Gauss-Hermite) fits of every spectrum with emission; see the module docstring."""
    from ..fitting.line_profiles import FIT_OK, fit_line_profiles

    n = data.shape[0]
    ys, xs = np.nonzero(moments["valid"])
    spectra = data[:, ys, xs].T
    channels = np.arange(n)[None, :]
    in_mask = mask[:, ys, xs].T
    lo = np.clip(np.where(in_mask, channels, n).min(axis=1) - window_margin, 0, n - 1)
    hi = np.clip(np.where(in_mask, channels, -1).max(axis=1) + 1 + window_margin, 1, n)
    span = np.abs(cube.velocity[hi - 1] - cube.velocity[lo])
    start = np.column_stack([moments["peak"][ys, xs], moments["velocity"][ys, xs],
                             np.clip(np.nan_to_num(moments["dispersion"][ys, xs], nan=cube.channel_width),
                                     cube.channel_width, np.maximum(span / 2.0, cube.channel_width)),
                             np.zeros(len(ys))])
    gauss = fit_line_profiles(spectra, cube.velocity, cube.noise, lo, hi, start, threads=threads)
    result, counts = gauss, {"spectra_fitted": int(len(ys)), "gaussian_failed": int((gauss[:, 9] != FIT_OK).sum())}
    if kind == "hermite":
        start_h = np.where(np.isfinite(gauss[:, :4]), gauss[:, :4], start)
        start_h[:, 3] = 0.0
        herm = fit_line_profiles(spectra, cube.velocity, cube.noise, lo, hi, start_h, hermite=True, threads=threads)
        fallback = (herm[:, 9] != FIT_OK) & (gauss[:, 9] == FIT_OK)
        result = np.where(fallback[:, None], gauss, herm)
        result[fallback, 3] = np.nan
        counts.update(hermite_fallback_to_gaussian=int(fallback.sum()),
                      hermite_failed=int((result[:, 9] != FIT_OK).sum()))
    good = result[:, 9] == FIT_OK
    maps = [np.full(moments["valid"].shape, np.nan) for _ in range(4)]
    for plane, column in zip(maps, (4, 5, 2, 3)):
        plane[ys[good], xs[good]] = result[good, column]
    counts["pixels_blanked_by_failed_fits"] = int((~good).sum())
    return maps[0], maps[1], maps[2], (maps[3] if kind == "hermite" else None), counts


def _record(cube, kind, signal, counts, velocity) -> dict:
    """The run record written as ``maps.json``."""
    from .. import __version__

    noise = cube.noise
    return {
        "tool": f"tiltedring {__version__}", "source": cube.source, "velocity_kind": kind,
        "velocity_convention": cube.convention, "velocity_frame": cube.frame,
        "spectral_axis": cube.header.get("SPECAXIS"), "rest_frequency_hz": cube.rest_frequency,
        "channels": int(cube.velocity.size), "channel_width_kms": cube.channel_width,
        "velocity_range_kms": [float(cube.velocity[0]), float(cube.velocity[-1])],
        "brightness_unit": cube.unit, "beam_arcsec": None if cube.beam is None else
        [cube.beam.major, cube.beam.minor, cube.beam.position_angle], "pixel_scale_arcsec": cube.pixel_scale,
        "noise": {"median": float(np.median(noise)), "min": float(noise.min()), "max": float(noise.max()),
                  "per_channel": [float(v) for v in noise],
                  "method": "median of -x over negative pixels / 0.6745, per channel"},
        "mask": signal.record, "minimum_intensity_snr": MINIMUM_SNR, "fits": counts,
        "pixels_with_velocity": int(np.isfinite(velocity).sum()),
        "dispersion": "moment-2 width" if kind in ("moment", "peak") else
        "fitted Gaussian sigma (km/s); not corrected for channel width or beam",
        "files": {k: v for k, v in MAP_FILES.items() if k != "h3" or kind == "hermite"},
    }
