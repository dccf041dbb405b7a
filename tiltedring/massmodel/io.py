"""Reading curves and baryonic components for mass models; writing the results.

Inputs: the tool's own ``curve.ecsv`` (needs ``radius_kpc``, i.e. a fit run with a distance; uses
``v_circular`` when present, else ``v_rotation``), with its error structure (:func:`read_curve`), any table astropy reads with radius (kpc), speed
and error columns named by the user, or a SPARC mass-model file (Lelli, McGaugh & Schombert 2016:
``Rad Vobs errV Vgas Vdisk Vbul ...`` with a ``# Distance = D Mpc`` line) which also carries the
baryonic speed curves for M/L = 1.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.table import QTable, Table

from ..errors import InputError
from .components import TabulatedSpeed
from .fitting import Baryons, CurveData

__all__ = ["read_curve", "read_sparc_rotmod", "read_components", "read_gas", "write_results"]

MAX_ROTATION = 2000.0  # km/s: no disc rotates faster than about 500 km/s (common practice); a wide margin


def _column(table, name, unit=None, where: str = "table"):
    """Column ``name`` as floats in ``unit`` (when the column carries a unit); refusals name the fix."""
    if name not in table.colnames:
        raise InputError(f"{where}: column {name!r} not found; the table has {', '.join(table.colnames)}")
    col = table[name]
    try:
        if unit is not None and getattr(col, "unit", None) is not None:
            return np.asarray(u.Quantity(col).to_value(unit), float)
        return np.asarray(col, float)
    except u.UnitConversionError:
        raise InputError(f"{where}: column {name!r} is in {col.unit}, which cannot be turned into {unit}; name a "
                         f"column in {unit}") from None
    except (TypeError, ValueError):
        raise InputError(f"{where}: column {name!r} holds values that are not numbers; fix the table") from None


def _check_speeds(v, err, where: str) -> None:
    """Refuse speeds no rotation curve has: negative beyond their errors, or faster than any galaxy rotates."""
    ok = np.isfinite(v) & np.isfinite(err)
    negative = ok & (v < -np.abs(err))
    if negative.any():
        raise InputError(f"{where}: {int(negative.sum())} of {int(ok.sum())} speeds are negative beyond their errors "
                         f"(down to {np.min(v[negative]):.4g} km/s); a mass model needs rotation speeds >= 0: use the "
                         "absolute values (a curve measured on the approaching side has negative speeds) or fix the "
                         "column")
    fast = ok & (np.abs(v) > MAX_ROTATION)
    if fast.any():
        raise InputError(f"{where}: speeds up to {np.max(np.abs(v[ok])):.4g} km/s; no disc rotates faster than about "
                         f"{MAX_ROTATION:g} km/s: is the column in m/s? give speeds in km/s")


def _check_finite(values: dict, where: str) -> None:
    """Refuse a component table with blank or infinite values (its curve would be interpolated through them)."""
    for name, column in values.items():
        bad = ~np.isfinite(column)
        if bad.any():
            rows = ", ".join(str(k + 1) for k in np.flatnonzero(bad)[:8])
            raise InputError(f"{where}: column {name} has {int(bad.sum())} blank or infinite value(s) (row(s) {rows}); "
                             "fill them in or remove those rows")


_PARTS_INDEPENDENT = ("v_rotation_err_random", "v_rotation_err_beam", "v_rotation_err_asymmetry")
_PART_GEOMETRY = "v_rotation_err_geometry"


def _error_structure(table, v_name, err_name, explicit_error: bool, where: str) -> dict:
    """Independent error, fully correlated geometry term (or None) and a caution, from the curve's columns.

    With the error parts of ``curve.ecsv`` (and v_rotation as the speed): independent = the random, beam and
    asymmetry parts present, in quadrature; geometry = ``v_rotation_err_geometry``. Otherwise the error column
    named (or the total) is taken as independent; when the curve's header says that total holds an
    inclination term, that is a caution (it is correlated across rings)."""
    err = _column(table, err_name, u.km / u.s, where)
    parts = [p for p in _PARTS_INDEPENDENT if p in table.colnames]
    if not explicit_error and v_name == "v_rotation" and parts and _PART_GEOMETRY in table.colnames:
        independent = np.sqrt(sum(_column(table, p, u.km / u.s, where) ** 2 for p in parts))
        return {"independent": independent, "geometry": _column(table, _PART_GEOMETRY, u.km / u.s, where),
                "caution": ""}
    caution = ""
    if not explicit_error and "inclination" in str(table.meta.get("error_components", "")):
        caution = (f"{where}: {err_name} includes an inclination term, which is correlated from ring to ring, but the "
                   "curve does not give it separately, so it is treated as independent per point (errors of the halo "
                   "parameters too small); give the curve's covariance (--covariance) or rerun the fit")
    return {"independent": err, "geometry": None, "caution": caution}


def _curve_geometry(table, where: str) -> tuple:
    """(inclination, its error) in degrees: medians over the rings of ``inclination`` and ``inclination_err``."""
    if "inclination" not in table.colnames or "inclination_err" not in table.colnames:
        return None, None
    inc = _column(table, "inclination", u.deg, where)
    inc_err = _column(table, "inclination_err", u.deg, where)
    inc, inc_err = inc[np.isfinite(inc)], inc_err[np.isfinite(inc_err) & (inc_err > 0)]
    if not inc.size or not inc_err.size:
        return None, None
    return float(np.median(inc)), float(np.median(inc_err))


def read_curve(path, radius_column=None, velocity_column=None, error_column=None, covariance="auto") -> CurveData:
    """A curve from ``curve.ecsv`` or from any table with the named columns (radius in kpc).

    ``covariance``: a covariance file (:func:`.covariance.read_covariance`), ``"auto"`` (the file
    ``<stem>_covariance.ecsv`` or ``.fits`` beside the curve when there is one) or None (none read). Without a file,
    a curve with error parts gets the covariance of its independent parts plus its geometry term, fully
    correlated across rings (:func:`.covariance.with_correlated_term`). Inclination and its error (medians over
    the rings) are read for the inclination as a nuisance parameter."""
    from ..io.input_files import check_input_file, read_table
    from .covariance import covariance_beside, read_covariance

    path = check_input_file(path, "curve table")
    if path.suffix == ".dat" and radius_column is None:
        return read_sparc_rotmod(path)[0]
    table = read_table(path, "curve table")
    if radius_column is None and "radius_kpc" not in table.colnames and "radius" in table.colnames:
        raise InputError(f"{path} has radii in arcsec only: rerun the fit with --distance (or --redshift), or name a "
                         "radius column in kpc with --radius-column")
    where = f"curve table {path}"
    radius = _column(table, radius_column or "radius_kpc", u.kpc, where)
    v_name = velocity_column or ("v_circular" if "v_circular" in table.colnames else "v_rotation")
    v = _column(table, v_name, u.km / u.s, where)
    err_name = error_column or ("v_circular_err" if v_name == "v_circular" else "v_rotation_err")
    errors = _error_structure(table, v_name, err_name, error_column is not None, where)
    _check_speeds(v, errors["independent"], where)
    meta = table.meta
    distance = (meta.get("distance") or {}).get("value_mpc") if isinstance(meta.get("distance"), dict) else None
    inclination, inclination_err = _curve_geometry(table, where)
    file = covariance_beside(path) if covariance == "auto" else covariance
    extra = {}
    if file:
        extra = {"covariance": read_covariance(file, len(table)), "covariance_kind": "given",
                 "covariance_source": f"from {file}"}
    elif errors["geometry"] is not None:
        extra = {"v_err_geometry": errors["geometry"],
                 "covariance_source": "independent error parts plus v_rotation_err_geometry, fully correlated"}
    return CurveData(radius, v, errors["independent"], distance=distance, inclination=inclination,
                     inclination_err=inclination_err, name=path.stem, error_caution=errors["caution"], **extra)


def read_sparc_rotmod(path):
    """(CurveData, Baryons) from a SPARC ``*_rotmod.dat`` file."""
    from ..io.input_files import read_text

    text = read_text(path, "SPARC-format mass-model file")
    m = re.search(r"Distance\s*=\s*([0-9.eE+-]+)", text)
    rows = []
    for number, line in enumerate(text.splitlines(), start=1):
        line = line.split("#", 1)[0].strip()
        if not line:
            continue
        try:
            rows.append([float(v) for v in line.split()])
        except ValueError:
            raise InputError(f"{path}, line {number}: {line[:60]!r} is not a row of numbers; a SPARC-format file has "
                             "whitespace-separated numbers (Rad Vobs errV Vgas Vdisk Vbul ...) and # comments") from None
        if len(rows[-1]) < 6 or len(rows[-1]) != len(rows[0]):
            raise InputError(f"{path}, line {number}: {len(rows[-1])} columns where {max(len(rows[0]), 6)} or more are "
                             "needed (Rad Vobs errV Vgas Vdisk Vbul ...); fix that line")
    if len(rows) < 3:
        raise InputError(f"{path} is not a SPARC mass-model file with data: it has {len(rows)} row(s) of numbers")
    data = np.array(rows)
    _check_finite({"Rad": data[:, 0], "Vgas": data[:, 3], "Vdisk": data[:, 4], "Vbul": data[:, 5]}, str(path))
    _check_speeds(data[:, 1], data[:, 2], str(path))
    r = data[:, 0]
    curve = CurveData(r, data[:, 1], data[:, 2], distance=float(m.group(1)) if m else None,
                      name=Path(path).name.replace("_rotmod.dat", ""))
    baryons = Baryons(gas=TabulatedSpeed(r, data[:, 3], "gas"), disc=TabulatedSpeed(r, data[:, 4], "disc"),
                      bulge=TabulatedSpeed(r, data[:, 5], "bulge") if np.any(data[:, 5]) else None)
    return curve, baryons


def read_components(path, radius_column="radius_kpc", gas_column="v_gas", disc_column="v_disc",
                    bulge_column="v_bulge") -> Baryons:
    """Baryonic speed curves (M/L = 1; gas with helium) from a table; missing columns are left out."""
    from ..io.input_files import read_table

    table = read_table(path, "component table")
    where = f"component table {path}"
    r = _column(table, radius_column, u.kpc, where)
    columns = {key: _column(table, name, u.km / u.s, where) for key, name in
               (("gas", gas_column), ("disc", disc_column), ("bulge", bulge_column)) if name in table.colnames}
    if not columns:
        raise InputError(f"{where} has none of the component columns {gas_column}, {disc_column}, {bulge_column}")
    _check_finite({radius_column: r, **columns}, where)
    if np.any(r < 0):
        raise InputError(f"{where}: column {radius_column} has negative radii; give radii in kpc >= 0")
    return Baryons(**{key: TabulatedSpeed(r, v, key) for key, v in columns.items()})


def read_gas(path):
    """The gas disc (:class:`.components.ThinDisc`) from a ``gas.ecsv`` written by ``tiltedring fit``."""
    from ..io.input_files import read_table
    from .components import ThinDisc

    table = read_table(path, "gas table")
    where = f"gas table {path}"
    radius = _column(table, "radius_kpc", u.kpc, where)
    density = _column(table, "surface_density_gas", u.Msun / u.pc**2, where)
    ok = np.isfinite(radius) & np.isfinite(density)
    if ok.sum() < 2:
        raise InputError(f"{where} has fewer than two rings with a radius and a surface density; write it with "
                         "'tiltedring fit ... --intensity-map MOM0 --distance D'")
    if np.any(density[ok] < 0) or np.any(radius[ok] < 0):
        raise InputError(f"{where}: negative radii or surface densities; a gas disc needs values >= 0")
    return ThinDisc(radius[ok], density[ok], label="gas")


def write_results(folder, results: dict, curve: CurveData, overwrite: bool = False, figures: bool = True) -> Path:
    """Write ``models.ecsv`` (comparison), ``parameters.ecsv`` (one row per fitted or fixed quantity of each model,
    with its unit), ``components_<model>.ecsv`` (radius in kpc, speeds in km/s), ``massmodel.json`` and, with
    ``figures``, ``decomposition_<model>.png`` (:meth:`.fitting.MassModelResult.plot`)."""
    from ..io.atomic import atomic_folder, write_json

    with atomic_folder(folder, overwrite=overwrite, kind="massmodel") as tmp:
        comparison = QTable()
        comparison["model"] = list(results)
        comparison["chi2"] = [r.chi2 for r in results.values()]
        comparison["reduced_chi2"] = [r.reduced_chi2 for r in results.values()]
        comparison["n_free"] = [r.n_free for r in results.values()]
        comparison["bic"] = [r.bic for r in results.values()]
        comparison.meta["comment"] = ["chi2 and bic are dimensionless; n_free counts the fitted quantities"]
        comparison.write(tmp / "models.ecsv", format="ascii.ecsv")
        rows = []
        for name, r in results.items():
            for key, value in r.parameters.items():
                rows.append((name, key, value, r.errors.get(key, np.nan), "free", r.units.get(key, "")))
            for key, value in r.fixed.items():
                rows.append((name, key, value, np.nan, "fixed", r.units.get(key, "")))
        table = Table(rows=rows, names=("model", "parameter", "value", "error", "status", "unit"))
        table.meta["comment"] = ["unit: of the value, or of the quantity inside the logarithm for log10_<name>"]
        table.write(tmp / "parameters.ecsv", format="ascii.ecsv")
        for name, r in results.items():
            t = QTable({k: v * (u.kpc if k == "radius" else u.km / u.s) for k, v in r.curves.items()})
            t.write(tmp / f"components_{name}.ecsv", format="ascii.ecsv")
            if figures:
                r.plot().savefig(tmp / f"decomposition_{name}.png", dpi=150)
        write_json(tmp / "massmodel.json", {
            "galaxy": curve.name, "n_points": len(curve.radius),
            "errors_used": curve.covariance_source or "independent errors per point",
            "models": {name: {"parameters": r.parameters, "errors": r.errors, "fixed": r.fixed, "units": r.units,
                              "chi2": r.chi2, "reduced_chi2": r.reduced_chi2, "bic": r.bic, "derived": r.derived,
                              "sampled": r.samples is not None, "sampling": r.sampling, "notes": r.notes,
                              "cautions": r.cautions} for name, r in results.items()},
            "preferred_by_bic": min(results, key=lambda k: results[k].bic),
        })
    return Path(folder)
