"""Cubes written as FITS: the model cube and the residual cube on the input cube's grid and channels."""

from __future__ import annotations

import numpy as np
from astropy.io import fits

__all__ = ["cube_header", "write_cube"]

SPECTRAL_TYPES = {"radio": "VRAD", "optical": "VOPT", "relativistic": "VELO"}  # FITS WCS (Greisen et al. 2006)


def cube_header(cube, bunit: str | None = None) -> fits.Header:
    """A 3-D header: the cube's celestial axes (and beam, rest frequency, standard of rest) and a linear
    velocity axis in km/s in the cube's convention (channels in increasing velocity, as read)."""
    header = cube.header.copy() if getattr(cube, "header", None) is not None else cube.wcs.to_header()
    header["BUNIT"] = bunit if bunit is not None else cube.unit
    header["WCSAXES"] = 3
    velocity = np.asarray(cube.velocity, float)
    widths = np.diff(velocity)
    header["CTYPE3"] = SPECTRAL_TYPES.get(getattr(cube, "convention", "radio"), "VRAD")
    header["CUNIT3"] = "km/s"
    header["CRPIX3"] = 1.0
    header["CRVAL3"] = float(velocity[0])
    header["CDELT3"] = float(np.median(widths))
    if np.ptp(widths) > 1e-3 * abs(header["CDELT3"]):
        header["COMMENT"] = "channel velocities are not evenly spaced: CDELT3 is their median spacing"
    return header


def write_cube(path, data: np.ndarray, cube, origin: str) -> None:
    """``data`` (n_channels, ny, nx) on ``cube``'s grid as FITS at ``path``, atomically; ORIGIN says what it is."""
    from .atomic import atomic_path

    header = cube_header(cube)
    header["ORIGIN"] = origin
    with atomic_path(path) as tmp:
        fits.PrimaryHDU(np.asarray(data, np.float32), header=header).writeto(tmp)
