"""Cubes written as FITS: the model and residual cubes on the input cube's grid, and the 3-D header they share with the emission mask."""

from __future__ import annotations

import numpy as np
from astropy.io import fits

__all__ = ["cube_header", "spectral_header", "write_cube"]

SPECTRAL_TYPES = {"radio": "VRAD", "optical": "VOPT", "relativistic": "VELO"}  # FITS WCS (Greisen et al. 2006)


def spectral_header(celestial: fits.Header, velocity, convention: str = "radio", bunit: str | None = None) -> fits.Header:
    """A 3-D header: the 2-D ``celestial`` header (with its beam, rest frequency, standard of rest) and a
    linear velocity axis in km/s in ``convention`` through the channel centres ``velocity`` (increasing).
    BUNIT is ``bunit``, or left out when None. Uneven channels get CDELT3 = their median spacing and a COMMENT."""
    header = celestial.copy()
    header.remove("BUNIT", ignore_missing=True)
    if bunit is not None:
        header["BUNIT"] = bunit
    header["WCSAXES"] = 3
    velocity = np.asarray(velocity, float)
    widths = np.diff(velocity)
    header["CTYPE3"] = SPECTRAL_TYPES.get(convention, "VRAD")
    header["CUNIT3"] = "km/s"
    header["CRPIX3"] = 1.0
    header["CRVAL3"] = float(velocity[0])
    header["CDELT3"] = float(np.median(widths)) if widths.size else 1.0
    if widths.size and np.ptp(widths) > 1e-3 * abs(header["CDELT3"]):
        header["COMMENT"] = "channel velocities are not evenly spaced: CDELT3 is their median spacing"
    return header


def cube_header(cube, bunit: str | None = None) -> fits.Header:
    """:func:`spectral_header` of a :class:`.cube.LineCube` (its celestial header, channels and convention),
    BUNIT the cube's unit unless ``bunit`` is given."""
    celestial = cube.header if getattr(cube, "header", None) is not None else cube.wcs.to_header()
    return spectral_header(celestial, cube.velocity, getattr(cube, "convention", "radio"),
                           bunit if bunit is not None else cube.unit)


def write_cube(path, data: np.ndarray, cube, origin: str) -> None:
    """``data`` (n_channels, ny, nx) on ``cube``'s grid as FITS at ``path``, atomically; ORIGIN says what it is."""
    from .atomic import atomic_path

    header = cube_header(cube)
    header["ORIGIN"] = origin
    with atomic_path(path) as tmp:
        fits.PrimaryHDU(np.asarray(data, np.float32), header=header).writeto(tmp)
