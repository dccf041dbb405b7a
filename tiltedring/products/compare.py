"""Comparing velocity or residual maps on one grid: two fits of one map, or two tracers of one galaxy.

Maps on other grids are put on the common grid (the first map's, or one the user names) with
``reproject``: interpolation for velocity-like maps (an intensive quantity; a flux-conserving
resampling would be wrong for velocities), ``reproject_exact`` (flux-conserving) when ``flux=True``
for intensity maps. Then each map after the first is differenced against the first, and statistics
are taken per elliptical ring (from a fit's ``rings.ecsv``, or circular annuli about the grid
centre) and per 30-degree azimuth sector: number of pixels, mean, rms and median absolute value,
each row naming the difference (``B - A``) and the two maps.

Maps that share no valid pixel on the common grid are refused (:class:`.errors.InputError`): their
difference would be empty. Each map is judged a velocity map or a residual map
(:func:`.plot_products.map_kind`) for the figure's colour scales.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.table import QTable

from ..errors import InputError
from ..fitting.geometry import disc_coordinates
from ..io.maps import _velocity_factor, load_image, read_grid, regrid

__all__ = ["MapComparison", "compare_maps"]


@dataclass
class MapComparison:
    names: list
    maps: list
    differences: list
    statistics: QTable
    reference: object
    notes: list
    systemic: float | None = None  # one centre for every velocity map's colours (from --rings), else None

    @property
    def kinds(self) -> list:
        """``velocity`` or ``residual`` for each map (:func:`.plot_products.map_kind`)."""
        from .plot_products import map_kind

        return [map_kind(m) for m in self.maps]

    def plot(self, axes=None):
        """The maps and their differences (:func:`.plotting.plot_comparison`): velocity maps each centred on
        its systemic velocity, residuals and differences on symmetric scales; panels named."""
        from .plotting import plot_comparison

        return plot_comparison(self.maps, self.names, reference=self.reference, differences=self.differences,
                               kinds=self.kinds, systemic=self.systemic, axes=axes)

    def write(self, folder, overwrite: bool = False) -> Path:
        """``difference_<k>.fits``, ``statistics.ecsv`` and ``comparison.png`` into ``folder``."""
        from ..io.atomic import atomic_folder
        from ..io.maps import write_map
        from .result import plain_table

        with atomic_folder(folder, overwrite=overwrite, kind="compare") as tmp:
            for k, (name, diff) in enumerate(zip(self.names[1:], self.differences), start=1):
                write_map(tmp / f"difference_{k}.fits", diff, self.reference,
                          extra={"ORIGIN": f"tiltedring: {name} minus {self.names[0]}"[:68]})
            table = plain_table(self.statistics)
            table.meta["maps"] = self.names
            table.meta["reference_map"] = self.names[0]
            table.meta["kinds"] = dict(zip(self.names, self.kinds))
            table.meta["notes"] = self.notes
            table.meta["comment"] = ["one row per ring or azimuth sector of each difference (map minus reference_map); "
                                     "where: ring radius (arcsec) or sector centre (deg from the receding major axis)"]
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
    names = _names(sources, names)
    notes: list = []
    # only the grid of the reference is used (WCS, sky Jacobian, beam), so its values do not matter here
    reference = read_grid(grid if grid is not None else sources[0])
    maps = []
    for source, name in zip(sources, names):
        data, header, _ = load_image(source, f"map {name}")
        if not flux:
            data = data * _velocity_factor(header, velocity_unit, name, "map")
        maps.append(regrid(data, header, reference, "map", name, notes, flux=flux, warn=False))
    _check_overlap(maps, names)
    differences = [m - maps[0] for m in maps[1:]]
    statistics = _statistics(reference, differences, names, rings, sector_width, None if flux else "km/s")
    systemic = None
    if rings is not None and not flux:
        table = _read_rings(rings)
        if "v_systemic" in table.colnames:
            systemic = float(np.nanmedian(np.asarray(getattr(table["v_systemic"], "value", table["v_systemic"]))))
    return MapComparison(names, maps, differences, statistics, reference, notes, systemic)


def _check_overlap(maps, names) -> None:
    """Refuse maps with no valid pixel in common with the first on the common grid."""
    first = np.isfinite(maps[0])
    for name, m in zip(names[1:], maps[1:]):
        if not (first & np.isfinite(m)).any():
            raise InputError(f"maps {names[0]} and {name} do not overlap on the common grid (no pixel valid in both): "
                             "check that they show the same part of the sky, or choose the grid with --grid")


def _names(sources, names) -> list:
    """The maps' names: given (one per map, plain and distinct), or their file names."""
    if names is None:
        names = [Path(str(s)).stem if isinstance(s, (str, Path)) else f"map {k}" for k, s in enumerate(sources)]
        return [n if names.count(n) == 1 else f"{n} ({k + 1})" for k, n in enumerate(names)]
    names = [str(n).strip() for n in names]
    if len(names) != len(sources):
        raise InputError(f"{len(names)} name(s) for {len(sources)} maps; give one name per map, comma-separated "
                         "(--names HI,CO)")
    if any(not n for n in names) or len(set(names)) != len(names):
        raise InputError(f"names {names}: give every map its own non-empty name")
    return names


RING_COLUMNS = ("x_center", "y_center", "position_angle", "inclination", "radius_inner", "radius_outer")


def _read_rings(rings):
    """A ring table (path or table) with the columns the statistics need, checked."""
    if isinstance(rings, (str, Path)):
        from ..io.input_files import read_table

        where = f"rings table {rings}"
        table = read_table(rings, "rings table")
    else:
        where, table = "rings table", rings
    missing = [c for c in RING_COLUMNS if c not in table.colnames]
    if missing:
        raise InputError(f"{where} lacks column(s) {', '.join(missing)}; give the rings.ecsv written by "
                         "'tiltedring fit'")
    try:
        values = {c: np.asarray(getattr(table[c], "value", table[c]), float) for c in table.colnames
                  if c in RING_COLUMNS or c in ("ra_center", "dec_center")}
    except (TypeError, ValueError):
        raise InputError(f"{where}: its ring columns hold values that are not numbers; give the rings.ecsv written "
                         "by 'tiltedring fit'") from None
    ok = np.isfinite(values["radius_inner"]) & np.isfinite(values["radius_outer"]) & \
        (values["radius_outer"] > values["radius_inner"])
    if not ok.any() or not all(np.isfinite(values[c]).any() for c in RING_COLUMNS[:4]):
        raise InputError(f"{where} has no ring with a finite centre, geometry and edges; give the rings.ecsv of a "
                         "fit that succeeded")
    return table


def _ring_geometry(reference, rings):
    ny, nx = reference.shape
    if rings is None:
        step = 2 * (reference.beam.fwhm if reference.beam is not None else 2 * reference.pixel_scale)
        r_max = 0.5 * min(ny, nx) * reference.pixel_scale
        edges = np.arange(0.0, r_max + step, step)
        return {"x_center": (nx - 1) / 2.0, "y_center": (ny - 1) / 2.0, "position_angle": 0.0, "inclination": 0.0}, edges
    table = _read_rings(rings)
    get = lambda n: float(np.nanmedian(np.asarray(getattr(table[n], "value", table[n]), float)))  # noqa: E731
    geom = {n: get(n) for n in ("x_center", "y_center", "position_angle", "inclination")}
    if "ra_center" in table.colnames and reference.wcs is not None and np.isfinite(get("ra_center")):
        geom["x_center"], geom["y_center"] = reference.sky_to_pixel(get("ra_center"), get("dec_center"))
    inner = np.asarray(getattr(table["radius_inner"], "value", table["radius_inner"]), float)
    outer = np.asarray(getattr(table["radius_outer"], "value", table["radius_outer"]), float)
    edges = np.concatenate([inner[:1], outer])
    edges = edges[np.isfinite(edges)]
    if len(edges) < 2 or np.any(np.diff(edges) <= 0) or not 0 <= geom["inclination"] < 90:
        raise InputError("the rings table's edges do not increase, or its inclination is outside 0-90 deg; give the "
                         "rings.ecsv of a fit that succeeded")
    return geom, edges


def _statistics(reference, differences, names, rings, sector_width, unit="km/s"):
    geom, edges = _ring_geometry(reference, rings)
    ny, nx = reference.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    radius, cos_t, sin_t = disc_coordinates(xx.ravel(), yy.ravel(), geom["x_center"], geom["y_center"],
                                            reference.sky_jacobian, geom["position_angle"], geom["inclination"])
    azimuth = np.degrees(np.arctan2(sin_t, cos_t)) % 360
    rows = []
    for k, diff in enumerate(differences, start=1):
        d = diff.ravel()
        label = (f"{names[k]} - {names[0]}", names[k], names[0])
        for j in range(len(edges) - 1):
            sel = (radius >= edges[j]) & (radius < edges[j + 1]) & np.isfinite(d)
            rows.append(_row(label, "ring", 0.5 * (edges[j] + edges[j + 1]), d[sel]))
        for a in np.arange(0, 360, sector_width):
            sel = (azimuth >= a) & (azimuth < a + sector_width) & (radius < edges[-1]) & np.isfinite(d)
            rows.append(_row(label, "azimuth", a + sector_width / 2, d[sel]))
    t = QTable(rows=rows, names=("difference", "map", "reference", "kind", "where", "n_pixels", "mean", "rms",
                                 "median_abs"))
    for name in ("mean", "rms", "median_abs"):
        t[name].unit = unit
    return t


def _row(label, kind, where, values):
    if values.size == 0:
        return (*label, kind, float(where), 0, np.nan, np.nan, np.nan)
    return (*label, kind, float(where), int(values.size), float(values.mean()), float(np.sqrt(np.mean(values**2))),
            float(np.median(np.abs(values))))
