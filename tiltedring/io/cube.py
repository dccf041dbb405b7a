"""`LineCube`: a spectral-line cube (HI, CO, an IFU line) read with spectral-cube, velocities in km/s.

The spectral axis may be frequency, wavelength or velocity in any convention. Channel centres are
turned into line-of-sight velocities with the Doppler conventions (rest frequency f0)::

    radio          v = c (1 - f / f0)
    optical        v = c (f0 / f - 1) = c z
    relativistic   v = c (f0^2 - f^2) / (f0^2 + f^2)

A velocity axis keeps its own convention (VRAD radio, VOPT optical, VELO relativistic, as the
FITS WCS standard names them; Greisen et al. 2006, A&A 446, 747); a frequency axis is read in the
radio convention and a wavelength axis in the optical one unless another is asked for. The
standard of rest (SPECSYS) is recorded, never changed: velocities stay in the cube's own frame.

Channels are ordered by increasing velocity (reversed from the file when its axis runs the other
way). Per-channel noise is estimated robustly from the negative half of each channel (emission is
positive, so line emission does not inflate it): sigma = median(-x | x < 0) / 0.6745, the median
absolute value of a zero-mean Gaussian being 0.6745 sigma.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from astropy import units as u
from astropy.io import fits
from astropy.wcs import WCS, FITSFixedWarning

from ..errors import FitCaution, InputError
from .conventions import CONVENTIONS
from .conventions import DEFAULT_CONVENTION as _DEFAULT_CONVENTION
from .conventions import OWN_CONVENTION as _OWN_CONVENTION
from .maps import Beam, centre_jacobian, open_image, pixel_scale_of

__all__ = ["LineCube", "read_cube", "channel_noise", "looks_like_cube", "CONVENTIONS"]

KM_S = u.km / u.s
_FRAMES = {"LSRK": "LSRK", "LSRD": "LSRD", "BARYCENT": "BARYCENTRIC", "HELIOCEN": "HELIOCENTRIC",
           "TOPOCENT": "TOPOCENTRIC", "GEOCENTR": "GEOCENTRIC", "SOURCE": "SOURCE", "GALACTOC": "GALACTOCENTRIC",
           "LOCALGRP": "LOCALGROUP", "CMBDIPOL": "CMBDIPOLE"}
HI_REST_FREQUENCY_HZ = 1420405751.768  # the HI hyperfine line (e.g. Hellwig et al. 1970)


@dataclass
class LineCube:
    """A spectral-line cube on a celestial grid.

    ``data[k, y, x]`` in ``unit`` (NaN blank), channel ``k`` centred at ``velocity[k]`` km/s in
    ``convention`` and standard of rest ``frame``; ``noise[k]`` the robust rms of channel ``k``.
    ``header`` is a 2-D celestial FITS header (with BUNIT, the beam, RESTFRQ and SPECSYS when
    known) for maps made from the cube.
    """

    data: np.ndarray
    velocity: np.ndarray
    channel_width: float
    convention: str
    frame: str
    unit: str
    wcs: WCS
    beam: Beam | None
    noise: np.ndarray
    source: str
    header: fits.Header

    @property
    def shape(self) -> tuple:
        return self.data.shape

    @property
    def sky_jacobian(self) -> np.ndarray:
        """(east, north) arcsec per pixel at the grid centre (see :mod:`tiltedring.io.maps`)."""
        return centre_jacobian(self.wcs, self.data.shape)

    @property
    def pixel_scale(self) -> float:
        """Geometric-mean pixel size in arcsec."""
        return pixel_scale_of(self.sky_jacobian)

    @property
    def rest_frequency(self) -> float | None:
        """Rest frequency in Hz, when the cube states one."""
        value = self.header.get("RESTFRQ")
        return float(value) if value else None


def looks_like_cube(path) -> bool:
    """True when ``path`` is a FITS file whose first image has three or more axes longer than 1."""
    from pathlib import Path

    try:
        if not Path(path).is_file():
            return False
        with fits.open(path, memmap=True) as hdul:
            for hdu in hdul:
                if getattr(hdu, "is_image", False) and hdu.header.get("NAXIS", 0) >= 2:
                    lengths = [hdu.header.get(f"NAXIS{i}", 1) for i in range(1, hdu.header["NAXIS"] + 1)]
                    return sum(n > 1 for n in lengths) >= 3
    except (OSError, TypeError, ValueError):
        return False
    return False


def channel_noise(data: np.ndarray, minimum_samples: int = 20) -> np.ndarray:
    """Robust rms per channel of ``data[k, y, x]`` from its negative values (see the module docstring).

    Channels with fewer than ``minimum_samples`` negative values take the median of the others."""
    n = data.shape[0]
    noise = np.full(n, np.nan)
    for k in range(n):
        plane = data[k]
        negative = plane[plane < 0]
        if negative.size >= minimum_samples:
            noise[k] = np.median(-negative) / 0.6745
    good = np.isfinite(noise) & (noise > 0)
    if not good.any():
        return noise
    return np.where(good, noise, np.median(noise[good]))


def read_cube(source, *, beam: "Beam | str | None" = None, brightness_unit: str | None = None,
              convention: str | None = None, rest_frequency=None, hdu=None) -> LineCube:
    """Read a FITS spectral cube into a :class:`LineCube`.

    Parameters
    ----------
    source
        A FITS path, an HDU/HDUList, or ``(array, header-or-WCS)``; axes (x, y, spectral) in any
        order in the file, length-1 extra axes (Stokes) dropped.
    beam
        :class:`Beam` or ``"MAJ[,MIN[,PA]]"`` arcsec; default from BMAJ/BMIN/BPA or the
        AIPS history line (radio-beam); the common beam of a cube with one beam per channel.
    brightness_unit
        Unit of the data when BUNIT is missing or wrong (``"Jy/beam"``, ``"K"``...).
    convention
        ``"radio"``, ``"optical"`` or ``"relativistic"``: the convention of the velocities. Default:
        the axis's own for a velocity axis, radio for frequency, optical for wavelength.
    rest_frequency
        Rest frequency (Hz, or an astropy quantity) when the header gives none and one is needed.

    The input is never modified.
    """
    data, header, name = open_image(source, "cube", hdu)
    data, wcs, spectral_type = _spectral_cube_axes(data, header, name)
    unit = _brightness_unit(header, brightness_unit, name)
    cube, own = _as_spectral_cube(data, wcs, unit)
    convention, rest = _convention_and_rest(wcs, header, own, convention, rest_frequency, name)
    velocity = _channel_velocities(cube, own, convention, rest, name)
    order = np.argsort(velocity, kind="stable")
    velocity = velocity[order]
    values = np.ascontiguousarray(data[order], dtype=float)
    values[~np.isfinite(values)] = np.nan
    if not np.isfinite(values).any():
        raise InputError(f"cube {name} is blank everywhere (all NaN/BLANK); check the file or its masking")
    widths = np.abs(np.diff(velocity))
    if widths.size == 0 or not np.all(widths > 0):
        raise InputError(f"cube {name}: the spectral axis does not give distinct channel velocities")
    cel = wcs.celestial
    cel.array_shape = values.shape[1:]
    frame = _FRAMES.get(str(wcs.wcs.specsys).strip().upper(), "unknown")
    beam = _beam(header, beam, _beams_table(source, hdu))
    out_header = _map_header(cel, unit, beam, rest, wcs, convention, spectral_type)
    if str(header.get("OBJECT", "")).strip():  # the galaxy's name reaches the maps, the fit and its report
        out_header["OBJECT"] = str(header["OBJECT"]).strip()
    noise = channel_noise(values)
    if not np.isfinite(noise).any():
        raise InputError(f"cube {name}: no channel has enough negative (noise) pixels to measure the noise; "
                         "is the continuum subtracted?")
    return LineCube(data=values, velocity=velocity, channel_width=float(np.median(widths)), convention=convention,
                    frame=frame, unit=unit.to_string(), wcs=cel, beam=beam, noise=noise, source=name,
                    header=out_header)


def _spectral_cube_axes(data, header, name):
    """The 3-D data in numpy order (spectral, y, x) and its 3-D WCS; length-1 extra axes dropped."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        try:
            wcs = WCS(header)
        except Exception as exc:
            raise InputError(f"cube {name}: its WCS cannot be read ({exc}); check CTYPE/CUNIT/CRVAL") from None
    real = [n for n in data.shape if n > 1]
    if data.ndim < 3 or len(real) < 3:
        raise InputError(f"{name} is a 2-D map (shape {data.shape}), not a spectral cube: fit a velocity map "
                         "with 'tiltedring fit MAP --out DIR' (tr.read_velocity_map in Python)")
    if wcs.naxis != data.ndim:
        raise InputError(f"cube {name}: its header describes {wcs.naxis} axes but the data have {data.ndim}")
    if not wcs.has_celestial:
        raise InputError(f"cube {name} has no celestial (RA/Dec) axes in its WCS; add RA---xxx/DEC--xxx CTYPEs")
    spec = wcs.wcs.spec
    if spec < 0:
        ctypes = ", ".join(repr(c) for c in wcs.wcs.ctype)
        raise InputError(f"cube {name} has no spectral axis (CTYPEs {ctypes}); give the third axis a spectral CTYPE "
                         "such as FREQ, VRAD, VOPT or VELO with its CUNIT")
    keep = [wcs.wcs.lng, wcs.wcs.lat, spec]
    others = [i for i in range(wcs.naxis) if i not in keep]
    for i in others:
        if data.shape[data.ndim - 1 - i] != 1:
            raise InputError(f"cube {name}: axis {i + 1} ({wcs.wcs.ctype[i]!r}) has {data.shape[data.ndim - 1 - i]} "
                             "planes; give a cube with one Stokes/extra plane")
    index = tuple(0 if (data.ndim - 1 - a) in others else slice(None) for a in range(data.ndim))
    cube = data[index]
    sub = wcs.sub(sorted(a + 1 for a in keep))
    # numpy order of the kept axes is the reverse of WCS order; bring it to (spectral, lat, lng)
    kept = sorted(keep)
    numpy_axes = [len(kept) - 1 - kept.index(a) for a in (spec, wcs.wcs.lat, wcs.wcs.lng)]
    cube = np.transpose(cube, numpy_axes)
    sub = sub.sub([kept.index(a) + 1 for a in (wcs.wcs.lng, wcs.wcs.lat, spec)])
    return cube, sub, str(header.get(f"CTYPE{spec + 1}", wcs.wcs.ctype[spec])).strip()


def _brightness_unit(header, given, name) -> u.UnitBase:
    """BUNIT (or the unit given) as an astropy unit; spellings such as JY/BEAM, Kelvin or 'K (Tmb)' (a unit with
    the temperature scale named after it) are read too."""
    text = given if given is not None else str(header.get("BUNIT", "")).strip()
    if not text:
        raise InputError(f"cube {name} has no BUNIT keyword, so its brightness unit is unknown; state it "
                         "(--brightness-unit Jy/beam or K)")
    plain = text.replace("JY", "Jy").replace("/BEAM", "/beam").replace("/Beam", "/beam")
    first = plain.replace("(", " ").split()[0]
    candidates = [text, plain, first, {"KELVIN": "K"}.get(first.upper(), first)]
    for attempt in candidates:
        for fmt in ("fits", None):
            try:
                return u.Unit(attempt, format=fmt) if fmt else u.Unit(attempt)
            except ValueError:
                continue
    raise InputError(f"cube {name}: brightness unit {text!r} is not a unit astropy can read; "
                     "state it (--brightness-unit Jy/beam or K)")


def _as_spectral_cube(data, wcs, unit):
    """A spectral-cube ``SpectralCube`` on (data, wcs) and the axis's own CTYPE stem (FREQ, VRAD...)."""
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = SpectralCube(data=np.asarray(data, dtype=float), wcs=wcs, meta={"BUNIT": unit.to_string()})
    return cube, str(wcs.wcs.ctype[2]).split("-")[0].strip().upper()


def _rest_from_header(wcs, header):
    if wcs.wcs.restfrq:
        return wcs.wcs.restfrq * u.Hz
    if wcs.wcs.restwav:
        return wcs.wcs.restwav * u.m
    for key in ("RESTFRQ", "RESTFREQ", "FREQ0"):
        if header.get(key):
            return float(header[key]) * u.Hz
    return None


def _convention_and_rest(wcs, header, own, convention, rest_frequency, name):
    if convention is not None and convention not in CONVENTIONS:
        raise InputError(f"velocity convention {convention!r}: give radio, optical or relativistic")
    if rest_frequency is not None:
        rest = rest_frequency if isinstance(rest_frequency, u.Quantity) else float(rest_frequency) * u.Hz
    else:
        rest = _rest_from_header(wcs, header)
    if own in _OWN_CONVENTION:
        chosen = convention or _OWN_CONVENTION[own]
        if chosen != _OWN_CONVENTION[own] and rest is None:
            raise InputError(f"cube {name}: converting its {own} velocities to the {chosen} convention needs the "
                             "rest frequency; give it (--rest-frequency HZ)")
        return chosen, rest
    if own not in _DEFAULT_CONVENTION:
        raise InputError(f"cube {name}: spectral axis type {wcs.wcs.ctype[2]!r} is not one this tool reads; "
                         "give FREQ, WAVE, VRAD, VOPT or VELO")
    if rest is None:
        raise InputError(f"cube {name} has a {own} axis but no rest frequency (RESTFRQ); give it "
                         f"(--rest-frequency HZ; HI 21 cm is {HI_REST_FREQUENCY_HZ:.0f} Hz)")
    return convention or _DEFAULT_CONVENTION[own], rest


def _channel_velocities(cube, own, convention, rest, name) -> np.ndarray:
    same = own in _OWN_CONVENTION and _OWN_CONVENTION[own] == convention
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if same:
                axis = cube.spectral_axis.to(KM_S)
            else:
                axis = cube.with_spectral_unit(KM_S, velocity_convention=convention, rest_value=rest).spectral_axis
            values = np.asarray(axis.to_value(KM_S), dtype=float)
    except (u.UnitsError, ValueError) as exc:
        raise InputError(f"cube {name}: its spectral axis cannot be turned into velocities ({exc}); check CUNIT3 "
                         "and the rest frequency") from None
    if not np.all(np.isfinite(values)):
        raise InputError(f"cube {name}: the spectral axis gives non-finite velocities; check CRVAL3/CDELT3/CUNIT3")
    return values


def _beams_table(source, hdu):
    """The BEAMS table (one beam per channel) of a FITS path or HDUList, or None."""
    from pathlib import Path

    if isinstance(source, (str, Path)):
        with fits.open(source, memmap=False) as hdul:
            return _beams_table(hdul, hdu)
    if isinstance(source, fits.HDUList) and "BEAMS" in source:
        return source["BEAMS"].copy()
    return None


def _beam(header, beam, beams_table) -> Beam | None:
    """The stated beam, else the cube's (radio-beam; the common beam when it varies per channel)."""
    if isinstance(beam, str):
        return Beam.parse(beam)
    if beam is not None:
        return beam
    import radio_beam

    found = None
    if beams_table is not None:
        try:
            beams = radio_beam.Beams.from_fits_bintable(beams_table)
        except Exception as exc:  # radio-beam raises plain errors for a table it cannot read
            raise InputError(f"the cube's BEAMS table cannot be read ({exc}); state the beam (--beam MAJ,MIN,PA)") from None
        found = beams.common_beam()
        if np.ptp(beams.major.to_value(u.arcsec)) > 0.01 * found.major.to_value(u.arcsec):
            warnings.warn(f"the cube's beam changes from channel to channel ({beams.major.min().to(u.arcsec):.2f} to "
                          f"{beams.major.max().to(u.arcsec):.2f} major axis); their common beam is used",
                          FitCaution, stacklevel=3)
    if found is None:
        try:
            found = radio_beam.Beam.from_fits_header(header)
        except Exception:  # radio-beam raises plain errors when a header holds no beam
            found = None
    if found is None or not np.isfinite(found.major.value) or found.major.value <= 0:
        return None
    return Beam(float(found.major.to_value(u.arcsec)), float(found.minor.to_value(u.arcsec)),
                float(found.pa.to_value(u.deg)))


def _map_header(cel, unit, beam, rest, wcs, convention, spectral_type) -> fits.Header:
    """A 2-D celestial header for maps made from the cube (BUNIT to be set by the writer)."""
    header = cel.to_header()
    header["BUNIT"] = unit.to_string(format="fits")
    if beam is not None:
        header["BMAJ"] = beam.major / 3600.0
        header["BMIN"] = beam.minor / 3600.0
        header["BPA"] = beam.position_angle
    if rest is not None:
        header["RESTFRQ"] = (float(rest.to_value(u.Hz, equivalencies=u.spectral())), "rest frequency (Hz)")
    if str(wcs.wcs.specsys).strip():
        header["SPECSYS"] = (str(wcs.wcs.specsys).strip(), "standard of rest of the velocities")
    header["VELCONV"] = (convention, "velocity convention")
    header["SPECAXIS"] = (spectral_type, "spectral axis of the input cube")
    return header
