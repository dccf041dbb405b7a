"""Checks of a map's header and values before any fitting: numbers that are numbers, a grid that maps
pixels to distinct sky positions, a beam in the right unit, and velocities a disc galaxy can have.

- **WCS keywords** (``CRVALi``, ``CRPIXi``, ``CDELTi``, ``CDi_j``, ``PCi_j``, ``CROTAi``) of the two
  image axes must be finite numbers: astropy silently takes an unreadable ``CRVAL`` as 0.
- **The grid**: the local sky Jacobian must be finite and non-singular, with pixels between
  1e-4 arcsec and 10 deg (anything else is a unit slip, e.g. CDELT written in arcsec).
- **The beam** (``BMAJ``, ``BMIN``, ``BPA`` in deg, or ``--beam`` in arcsec): finite, positive, the
  major axis not smaller than the minor (a swapped pair is put right: axes exchanged and the
  position angle turned by 90 deg, with a note); a beam wider than the whole map is refused with
  the unit hint; one smaller than a tenth of a pixel gets a caution.
- **Velocities**: no disc rotates faster than about 500 km/s (common practice), so the
  line-of-sight velocities of one galaxy span well under 3000 km/s. A map whose central 96 per cent
  (2nd to 98th percentile) spans more is refused with the unit hint (values in m/s labelled km/s);
  single pixels that are faster than light or lie more than 3000 km/s from the median are blanked
  with a caution (fill values such as 1e30). Values that span less than 2 km/s get a caution
  (km/s labelled or stated as m/s, or a map without rotation).
- **The data's footprint**: valid pixels that lie along a line (the smaller principal spread of
  their positions under 0.6 pixel, e.g. a map of one or two rows) cannot constrain a disc's geometry.
- **Integer maps** whose fill value has no ``BLANK`` keyword: the most negative integer of the
  type (e.g. -32768) is taken as blank, with a caution.
"""

from __future__ import annotations

import math
import re
import warnings

import numpy as np

from ..errors import FitCaution, InputError

__all__ = ["check_spread", "check_wcs_keywords", "check_grid", "checked_beam", "check_beam_size", "plausible_velocities",
           "integer_fill", "SPEED_OF_LIGHT", "MAX_SPREAD"]

SPEED_OF_LIGHT = 299792.458  # km/s (astropy.constants.c)
MAX_SPREAD = 3000.0  # km/s: twice the fastest disc rotation (~500 km/s) with a wide margin (common practice)
_WCS_KEYS = re.compile(r"^(CRVAL|CRPIX|CDELT|CROTA)[12]$|^(CD|PC)[12]_[12]$")


def _caution(message: str, notes: list | None) -> None:
    if notes is not None:
        notes.append(message)
    warnings.warn(message, FitCaution, stacklevel=3)


def _is_number(value) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool) and \
        math.isfinite(float(value))


def check_wcs_keywords(header, role: str, name: str) -> None:
    """Refuse WCS keywords of the image axes that are not finite numbers (module docstring)."""
    for key in list(header.keys()):
        if _WCS_KEYS.match(str(key)) and not _is_number(header[key]):
            raise InputError(f"{role} {name}: header keyword {key} = {header[key]!r} is not a finite number, so the "
                             "map cannot be put on the sky; correct the header (astropy.io.fits.setval), or remove "
                             "the celestial WCS and give the pixel scale (--pixel-scale ARCSEC)")


def check_grid(jacobian, role: str, name: str) -> None:
    """Refuse a sky Jacobian (arcsec per pixel) that is not finite, singular, or of an absurd scale."""
    j = np.asarray(jacobian, float)
    det = float(np.linalg.det(j)) if np.all(np.isfinite(j)) else float("nan")
    if not math.isfinite(det) or abs(det) == 0.0:
        raise InputError(f"{role} {name}: the WCS does not map pixels to distinct sky positions (its pixel matrix "
                         "CDi_j / PCi_j x CDELTi is singular or not finite); correct the header, or remove the "
                         "celestial WCS and give --pixel-scale")
    scale = math.sqrt(abs(det))
    if not 1e-4 <= scale <= 36000.0:
        raise InputError(f"{role} {name}: pixels of {scale:.3g} arcsec are outside any galaxy map's range (1e-4 "
                         "arcsec to 10 deg); CDELT and CD are in degrees in FITS: correct the header or give "
                         "--pixel-scale")


def checked_beam(major, minor, position_angle, where: str, notes: list | None = None):
    """(major, minor, position angle) as finite arcsec / deg with major >= minor (module docstring)."""
    values = {"major axis": major, "minor axis": minor, "position angle": position_angle}
    for label, value in values.items():
        if not _is_number(value):
            raise InputError(f"{where}: beam {label} {value!r} is not a finite number; give the beam as --beam "
                             "MAJ[,MIN[,PA]] in arcsec (and deg), or correct BMAJ/BMIN/BPA (deg) in the header")
    major, minor, position_angle = float(major), float(minor), float(position_angle)
    if not (major > 0 and minor > 0):
        raise InputError(f"{where}: beam axes must be positive, got {major:g} and {minor:g} arcsec; give --beam "
                         "MAJ[,MIN[,PA]] in arcsec or correct BMAJ/BMIN (deg) in the header")
    if minor > major:
        _caution(f"{where}: beam minor axis {minor:g} arcsec is larger than the major {major:g}; axes exchanged and "
                 "the beam position angle turned by 90 deg", notes)
        major, minor, position_angle = minor, major, position_angle + 90.0
    return major, minor, position_angle % 180.0


def check_beam_size(beam, jacobian, shape, source: str, from_header: bool, notes: list | None = None) -> None:
    """Refuse a beam wider than the whole map (a unit slip); caution for one far below a pixel."""
    if beam is None:
        return
    pixel = math.sqrt(abs(float(np.linalg.det(np.asarray(jacobian, float)))))
    extent = pixel * math.hypot(*shape)
    if beam.major > extent:
        hint = (f"BMAJ/BMIN are in degrees in FITS (BMAJ = {beam.major / 3600:g} deg here): if they were written in "
                f"arcsec, give --beam {beam.major / 3600:g},{beam.minor / 3600:g}" if from_header else
                "--beam takes arcsec (not degrees or pixels)")
        raise InputError(f"{source}: the beam ({beam.major:.4g} arcsec) is wider than the whole map ({extent:.4g} "
                         f"arcsec across); {hint}")
    if beam.major < 0.1 * pixel:
        hint = "BMAJ/BMIN in the header are in degrees" if from_header else "--beam takes arcsec"
        _caution(f"{source}: the beam ({beam.major:.3g} arcsec) is smaller than a tenth of a pixel ({pixel:.3g} "
                 f"arcsec): is it in the right unit? ({hint})", notes)


def plausible_velocities(data, role: str, name: str, unit_stated: bool, bunit: str, notes: list):
    """``data`` (km/s) with impossible single pixels blanked; refuse a map whose spread no disc has."""
    finite = np.isfinite(data)
    if not finite.any():
        return data
    values = data[finite]
    centre = float(np.median(values))
    low, high = np.percentile(values, [2.0, 98.0])
    if not abs(centre) < SPEED_OF_LIGHT or high - low > MAX_SPREAD:
        said = "the unit you stated" if unit_stated else f"BUNIT {bunit!r}" if bunit else "the unit"
        raise InputError(
            f"{role} {name}: in {said} its velocities have a median of {centre:.6g} km/s and span {high - low:.4g} "
            f"km/s (2nd to 98th percentile); no disc galaxy has a median at or beyond the speed of light or a spread "
            f"beyond {MAX_SPREAD:g} km/s: the unit is probably wrong (values in m/s labelled km/s?); give the "
            "right one with --velocity-unit m/s (or km/s)")
    wild = finite & ((np.abs(data) >= SPEED_OF_LIGHT) | (np.abs(data - centre) > MAX_SPREAD))
    if wild.any():
        _caution(f"{role} {name}: {int(wild.sum())} pixel(s) faster than light or more than {MAX_SPREAD:g} km/s from "
                 f"the median ({centre:.1f} km/s) were blanked (fill values or artefacts)", notes)
        data = np.where(wild, np.nan, data)
    if high - low < 2.0 and values.size > 10 and (unit_stated or bunit):
        said = "the unit you stated" if unit_stated else f"BUNIT {bunit!r}"
        _caution(f"{role} {name}: in {said} its velocities span only {high - low:.3g} km/s; no rotation is measurable "
                 "at that spread: if the map is in km/s rather than m/s, give --velocity-unit km/s", notes)
    return data


def integer_fill(data, raw, blank, role: str, name: str):
    """Blank the most negative value of an integer map without a BLANK keyword (module docstring)."""
    if blank is not None or raw.dtype.kind != "i":
        return data
    fill = np.iinfo(raw.dtype).min
    hit = raw == fill
    if hit.any():
        warnings.warn(f"{role} {name}: {int(hit.sum())} pixel(s) hold {fill}, the fill value of {raw.dtype} images, "
                      "and the header has no BLANK keyword; they are treated as blank", FitCaution, stacklevel=3)
        data = np.where(hit, np.nan, data)
    return data


def check_spread(valid, name: str) -> None:
    """Refuse valid pixels that lie along a line: the smaller principal standard deviation of their
    positions below 0.6 pixel (a map of one or two rows, a thin diagonal strip)."""
    yy, xx = np.nonzero(valid)
    if xx.size < 3:
        raise InputError(f"velocity map {name} has only {xx.size} valid pixel(s): too few to fit a disc; check the "
                         "masking or use a map with more coverage")
    spread = float(np.sqrt(max(np.linalg.eigvalsh(np.cov(np.vstack([xx, yy]).astype(float)))[0], 0.0)))
    if spread < 0.6:
        raise InputError(f"velocity map {name}: its valid pixels lie along a line (spread {spread:.2f} pixel across "
                         "it), too few to fit a disc's geometry; give a map that covers the disc in two dimensions")
