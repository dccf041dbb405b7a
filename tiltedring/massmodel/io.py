"""Reading curves and baryonic components for mass models; writing the results.

Inputs: the tool's own ``curve.ecsv`` (needs ``radius_kpc``, i.e. a fit run with a distance; uses
``v_circular`` when present, else ``v_rotation``), any table astropy reads with radius (kpc), speed
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

__all__ = ["read_curve", "read_sparc_rotmod", "read_components", "write_results"]


def _column(table, name, unit=None):
    if name not in table.colnames:
        raise InputError(f"column {name!r} not found; the table has {', '.join(table.colnames)}")
    col = table[name]
    if unit is not None and getattr(col, "unit", None) is not None:
        return u.Quantity(col).to_value(unit)
    return np.asarray(col, float)


def read_curve(path, radius_column=None, velocity_column=None, error_column=None) -> CurveData:
    """A curve from ``curve.ecsv`` or from any table with the named columns (radius in kpc)."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"curve table {path} does not exist")
    if path.suffix == ".dat" and radius_column is None:
        return read_sparc_rotmod(path)[0]
    try:
        table = Table.read(path, format="ascii.ecsv") if path.suffix == ".ecsv" else Table.read(path)
    except Exception as exc:
        raise InputError(f"cannot read table {path}: {exc}") from None
    if radius_column is None and "radius_kpc" not in table.colnames and "radius" in table.colnames:
        raise InputError(f"{path} has radii in arcsec only: rerun the fit with --distance (or --redshift), or name a "
                         "radius column in kpc with --radius-column")
    radius = _column(table, radius_column or "radius_kpc", u.kpc)
    default_v = "v_circular" if "v_circular" in table.colnames else "v_rotation"
    v = _column(table, velocity_column or default_v, u.km / u.s)
    err_name = error_column or ("v_circular_err" if default_v == "v_circular" else "v_rotation_err")
    err = _column(table, err_name, u.km / u.s)
    meta = table.meta
    distance = (meta.get("distance") or {}).get("value_mpc") if isinstance(meta.get("distance"), dict) else None
    return CurveData(radius, v, err, distance=distance, name=path.stem)


def read_sparc_rotmod(path):
    """(CurveData, Baryons) from a SPARC ``*_rotmod.dat`` file."""
    text = Path(path).read_text()
    m = re.search(r"Distance\s*=\s*([0-9.]+)", text)
    data = np.loadtxt(path, comments="#")
    if data.ndim != 2 or data.shape[1] < 6:
        raise InputError(f"{path} is not a SPARC mass-model file (8 columns)")
    r = data[:, 0]
    curve = CurveData(r, data[:, 1], data[:, 2], distance=float(m.group(1)) if m else None,
                      name=Path(path).name.replace("_rotmod.dat", ""))
    baryons = Baryons(gas=TabulatedSpeed(r, data[:, 3], "gas"), disc=TabulatedSpeed(r, data[:, 4], "disc"),
                      bulge=TabulatedSpeed(r, data[:, 5], "bulge") if np.any(data[:, 5]) else None)
    return curve, baryons


def read_components(path, radius_column="radius_kpc", gas_column="v_gas", disc_column="v_disc",
                    bulge_column="v_bulge") -> Baryons:
    """Baryonic speed curves (M/L = 1; gas with helium) from a table; missing columns are left out."""
    table = Table.read(path)
    r = _column(table, radius_column, u.kpc)
    parts = {}
    for key, name in (("gas", gas_column), ("disc", disc_column), ("bulge", bulge_column)):
        if name in table.colnames:
            parts[key] = TabulatedSpeed(r, _column(table, name, u.km / u.s), key)
    if not parts:
        raise InputError(f"{path} has none of the component columns {gas_column}, {disc_column}, {bulge_column}")
    return Baryons(**parts)


def write_results(folder, results: dict, curve: CurveData, overwrite: bool = False, figures: bool = True) -> Path:
    """Write ``models.ecsv`` (comparison), ``parameters.ecsv`` (one row per fitted or fixed quantity of each model,
    with its unit), ``components_<model>.ecsv`` (radius in kpc, speeds in km/s), ``massmodel.json`` and, with
    ``figures``, ``decomposition_<model>.png`` (:meth:`.fitting.MassModelResult.plot`)."""
    from ..io.atomic import atomic_folder, write_json

    with atomic_folder(folder, overwrite=overwrite) as tmp:
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
            "models": {name: {"parameters": r.parameters, "errors": r.errors, "fixed": r.fixed, "chi2": r.chi2,
                              "reduced_chi2": r.reduced_chi2, "bic": r.bic, "derived": r.derived,
                              "sampled": r.samples is not None} for name, r in results.items()},
            "preferred_by_bic": min(results, key=lambda k: results[k].bic),
        })
    return Path(folder)
