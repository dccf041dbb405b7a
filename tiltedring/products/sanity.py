"""Results checked against their physical ranges before anything is written.

Every ring table of a fit (each stage and the final one) passes :func:`check_physical`:

- position angles are angles: wrapped into [0, 360) deg (the same direction on the sky);
- a ring is **ill-conditioned** when its inclination lies outside [0, 90] deg, a speed is not
  slower than light, or its v_rotation error exceeds both |v_rotation| and 100 km/s: it is
  flagged ``ill_conditioned`` and its speeds (every ``v_rotation*`` column) blanked, with its
  geometry too when that is what lies outside its range — never written as 1236 +/- 74,000 km/s;
- the disc-wide result must be physical: a finite position angle, a median inclination inside
  (0, 90] deg, a systemic velocity slower than light, and at least one ring with a measured
  speed. Otherwise :class:`..errors.ResultNotPhysical` is raised: the command line exits 1 with
  the message and writes nothing.

The solver keeps the inclination in range by its parametrisation; these checks stand at the
boundary so that no number outside its range reaches a file, whatever happens upstream.
"""

from __future__ import annotations

import numpy as np

from ..diagnostics import flags as ringflags
from ..errors import ResultNotPhysical

__all__ = ["check_physical", "ill_conditioned", "angle_median"]

SPEED_OF_LIGHT = 299792.458  # km/s (astropy.constants.c)
ERROR_LIMIT = 100.0  # km/s: a v_rotation error beyond both this and |v_rotation| measures nothing


def angle_median(degrees) -> float:
    """Median of angles (deg) in [0, 360), taken about their circular mean so that values either side of
    0/360 (359 and 1) count as neighbours; NaN when none is finite."""
    a = np.asarray(degrees, float)
    a = a[np.isfinite(a)]
    if a.size == 0:
        return float("nan")
    if np.ptp(a) <= 180.0:  # no neighbours across 0/360: the plain median
        return float(np.median(a))
    rad = np.radians(a)
    centre = np.degrees(np.arctan2(np.mean(np.sin(rad)), np.mean(np.cos(rad))))
    return float((centre + np.median((a - centre + 180.0) % 360.0 - 180.0)) % 360.0 % 360.0)


def _values(table, name):
    column = table[name]
    return np.array(getattr(column, "value", column), float)


def _set(table, name, values, rows):
    column = table[name]
    unit = getattr(column, "unit", None)
    data = _values(table, name)
    data[rows] = values
    table[name] = data * unit if unit is not None and hasattr(column, "value") else data


def ill_conditioned(table) -> tuple:
    """(rows whose fit is ill-conditioned, rows whose geometry is outside its range) as boolean arrays."""
    inc = _values(table, "inclination")
    v = _values(table, "v_rotation")
    err = _values(table, "v_rotation_err") if "v_rotation_err" in table.colnames else np.full(len(table), np.nan)
    v_sys = _values(table, "v_systemic")
    with np.errstate(invalid="ignore"):
        bad_geometry = np.isfinite(inc) & ((inc < 0) | (inc > 90))
        bad_geometry |= np.isfinite(v_sys) & (np.abs(v_sys) >= SPEED_OF_LIGHT)
        bad = bad_geometry | (np.isfinite(v) & (np.abs(v) >= SPEED_OF_LIGHT))
        bad |= np.isfinite(err) & (err > np.maximum(np.abs(np.nan_to_num(v)), ERROR_LIMIT))
    return bad, bad_geometry


def _clean_table(table) -> int:
    """Wrap position angles and flag and blank ill-conditioned rings in ``table`` (in place); returns their count."""
    pa = _values(table, "position_angle")
    finite = np.isfinite(pa)
    if finite.any():
        _set(table, "position_angle", np.mod(pa[finite], 360.0) % 360.0, finite)
    bad, bad_geometry = ill_conditioned(table)
    if not bad.any():
        return 0
    speeds = [c for c in table.colnames if c.startswith("v_rotation")]
    for name in speeds:
        _set(table, name, np.nan, bad)
    if bad_geometry.any():
        for name in ("inclination", "inclination_err", "position_angle", "position_angle_err", "v_systemic",
                     "v_systemic_err"):
            if name in table.colnames:
                _set(table, name, np.nan, bad_geometry)
    flags = [ringflags.split(f) for f in table["flags"]]
    table["flags"] = [ringflags.join(set(f) | ({"ill_conditioned"} if b else set())) for f, b in zip(flags, bad)]
    return int(bad.sum())


def check_physical(result) -> list:
    """Check and clean every ring table of ``result`` in place (module docstring); returns cautions added.

    Raises :class:`..errors.ResultNotPhysical` when the disc-wide result is not physical."""
    notes = []
    tables = [result.rings] + [t for t in result.stages.values() if t is not result.rings]
    for k, table in enumerate(tables):
        count = _clean_table(table)
        if count and k == 0:
            notes.append(f"{count} ring(s) with an ill-conditioned fit (inclination outside 0-90 deg, a speed not "
                         "slower than light, or a v_rotation error beyond both the speed and 100 km/s) are flagged "
                         "ill_conditioned and blanked")
    for note in notes:
        if note not in result.cautions:
            result.cautions.append(note)
    _check_disc(result)
    return notes


def _check_disc(result) -> None:
    rings = result.rings
    problems = []
    pa, inc, v_sys = (_values(rings, n) for n in ("position_angle", "inclination", "v_systemic"))
    if not np.isfinite(pa).any():
        problems.append("no ring has a position angle")
    median_inc = float(np.nanmedian(inc)) if np.isfinite(inc).any() else float("nan")
    if not 0.0 < median_inc <= 90.0:
        problems.append(f"the median inclination is {median_inc:.4g} deg, outside (0, 90]")
    if not (np.isfinite(v_sys).any() and abs(float(np.nanmedian(v_sys))) < SPEED_OF_LIGHT):
        problems.append("no systemic velocity slower than light")
    v = _values(rings, "v_rotation")
    if not np.isfinite(v).any():
        problems.append("no ring has a measured rotation speed")
    if problems:
        raise ResultNotPhysical(
            "the fit did not give a physical disc (" + "; ".join(problems) + "): nothing was written. Check the map "
            "(units, masking, blank values), or steer the fit with starting values (--inclination, --position-angle, "
            "--x-center/--y-center) or wider rings", result)
