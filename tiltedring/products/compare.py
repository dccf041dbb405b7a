"""Comparing velocity or residual maps on one grid: two fits of one map, or two tracers of one galaxy.

Maps on other grids are put on the common grid (the first map's, or one the user names) with
``reproject``: interpolation for velocity-like maps (an intensive quantity; a flux-conserving
resampling would be wrong for velocities), ``reproject_exact`` (flux-conserving) when ``flux=True``
for intensity maps. Then each map after the first is differenced against the first, and statistics
are taken per elliptical ring (from a fit's ``rings.ecsv``, or circular annuli about the grid
centre) and per 30-degree azimuth sector: number of pixels, mean, rms and median absolute value.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.table import QTable, Table

from ..errors import InputError
from ..fitting.geometry import disc_coordinates
from ..io.maps import _velocity_factor, load_image, read_velocity_map, regrid

__all__ = ["MapComparison", "compare_maps"]


@dataclass
class MapComparison:
    names: list
    maps: list
    differences: list
    statistics: QTable
    reference: object
    notes: list

    def plot(self, axes=None):
        from .plotting import plot_comparison

        maps = self.maps + self.differences
        names = self.names + [f"{n} - {self.names[0]}" for n in self.names[1:]]
        return plot_comparison(maps, names, wcs=self.reference.wcs, axes=axes)

    def write(self, folder, overwrite: bool = False) -> Path:
        """``difference_<k>.fits``, ``statistics.ecsv`` and ``comparison.png`` into ``folder``."""
        from ..io.atomic import atomic_folder
        from ..io.maps import write_map
        from .result import plain_table

        with atomic_folder(folder, overwrite=overwrite) as tmp:
            for k, (name, diff) in enumerate(zip(self.names[1:], self.differences), start=1):
                write_map(tmp / f"difference_{k}.fits", diff, self.reference,
                          extra={"ORIGIN": f"tiltedring: {name} minus {self.names[0]}"[:68]})
            table = plain_table(self.statistics)
            table.meta["maps"] = self.names
            table.meta["notes"] = self.notes
            table.write(tmp / "statistics.ecsv", format="ascii.ecsv")
            self.plot().savefig(tmp / "comparison.png", dpi=130)
        return Path(folder)


def compare_maps(sources, names=None, grid=None, rings=None, flux: bool = False, velocity_unit=None,
                 sector_width: float = 30.0) -> MapComparison:
    """Put ``sources`` (paths, HDUs or (array, header)) on one grid and compare them (module docstring).

    ``grid``: the map whose grid is common (default the first); ``rings``: a ring table (path or
    table) from a fit to define elliptical rings; values in velocity units are converted to km/s.
    """
    if len(sources) < 2:
        raise InputError("give at least two maps to compare")
    names = list(names) if names is not None else [Path(str(s)).stem if isinstance(s, (str, Path)) else f"map {k}"
                                                   for k, s in enumerate(sources)]
    notes: list = []
    # only the grid of the reference is used (WCS, sky Jacobian, beam), so its unit does not matter here
    reference = read_velocity_map(grid if grid is not None else sources[0], velocity_unit="km/s")
    maps = []
    for source, name in zip(sources, names):
        data, header, _ = load_image(source, name)
        if not flux:
            data = data * _velocity_factor(header, velocity_unit, name)
        maps.append(regrid(data, header, reference, "map", name, notes, flux=flux, warn=False))
    differences = [m - maps[0] for m in maps[1:]]
    statistics = _statistics(reference, differences, names, rings, sector_width)
    return MapComparison(names, maps, differences, statistics, reference, notes)


def _ring_geometry(reference, rings):
    ny, nx = reference.shape
    if rings is None:
        step = 2 * (reference.beam.fwhm if reference.beam is not None else 2 * reference.pixel_scale)
        r_max = 0.5 * min(ny, nx) * reference.pixel_scale
        edges = np.arange(0.0, r_max + step, step)
        return {"x_center": (nx - 1) / 2.0, "y_center": (ny - 1) / 2.0, "position_angle": 0.0, "inclination": 0.0}, edges
    table = Table.read(rings) if isinstance(rings, (str, Path)) else rings
    get = lambda n: float(np.nanmedian(np.asarray(getattr(table[n], "value", table[n]), float)))  # noqa: E731
    geom = {n: get(n) for n in ("x_center", "y_center", "position_angle", "inclination")}
    if "ra_center" in table.colnames and reference.wcs is not None and np.isfinite(get("ra_center")):
        geom["x_center"], geom["y_center"] = reference.sky_to_pixel(get("ra_center"), get("dec_center"))
    inner = np.asarray(getattr(table["radius_inner"], "value", table["radius_inner"]), float)
    outer = np.asarray(getattr(table["radius_outer"], "value", table["radius_outer"]), float)
    return geom, np.concatenate([inner[:1], outer])


def _statistics(reference, differences, names, rings, sector_width):
    geom, edges = _ring_geometry(reference, rings)
    ny, nx = reference.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    radius, cos_t, sin_t = disc_coordinates(xx.ravel(), yy.ravel(), geom["x_center"], geom["y_center"],
                                            reference.sky_jacobian, geom["position_angle"], geom["inclination"])
    azimuth = np.degrees(np.arctan2(sin_t, cos_t)) % 360
    rows = []
    for k, diff in enumerate(differences, start=1):
        d = diff.ravel()
        for j in range(len(edges) - 1):
            sel = (radius >= edges[j]) & (radius < edges[j + 1]) & np.isfinite(d)
            rows.append(_row(names[k], "ring", 0.5 * (edges[j] + edges[j + 1]), d[sel]))
        for a in np.arange(0, 360, sector_width):
            sel = (azimuth >= a) & (azimuth < a + sector_width) & (radius < edges[-1]) & np.isfinite(d)
            rows.append(_row(names[k], "azimuth", a + sector_width / 2, d[sel]))
    t = QTable(rows=rows, names=("map", "kind", "where", "n_pixels", "mean", "rms", "median_abs"))
    return t


def _row(name, kind, where, values):
    if values.size == 0:
        return (name, kind, float(where), 0, np.nan, np.nan, np.nan)
    return (name, kind, float(where), int(values.size), float(values.mean()), float(np.sqrt(np.mean(values**2))),
            float(np.median(np.abs(values))))
