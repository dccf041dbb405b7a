"""Step "curve from the cube": the inner rings of a map fit refitted on the cube (:mod:`..fitting.cube_fit`).

The ring table keeps the map's values in their own columns (``v_rotation_map``,
``v_rotation_err_map``) and gains ``dispersion``, ``dispersion_err``, ``surface_brightness`` and
``curve_source`` (``cube``: v_rotation, dispersion and surface brightness fitted to the cube;
``map``: v_rotation from the map fit, dispersion matched by line width). For the rings fitted to the
cube, ``v_rotation_err_random`` is the cube fit's noise error and ``v_rotation_err`` adds the map fit's
geometry and asymmetry parts in quadrature (the geometry part scaled to the new speed; the cube fit
treats the beam itself, so the map's beam part is set to 0 there). ``fit.json`` records the
treatment under ``curve_from_cube``, with the velocity ranges whose channels were left out
(``excluded_velocities``: those stated and those found as foreground when the maps were made).
"""

from __future__ import annotations

import numpy as np
from astropy import units as u

from ..fitting.kinematics import PARAMETERS

__all__ = ["refit_curve_on_cube", "excluded_channel_mask"]

KMS = u.km / u.s


def _ranges(exclude_velocities) -> list:
    from ..io.cube_mask import parse_velocity_ranges

    return parse_velocity_ranges(exclude_velocities) if exclude_velocities is not None else []


def excluded_channel_mask(cube, exclude_velocities) -> np.ndarray | None:
    """Channels to use: all but those in the ``LO:HI[,LO:HI]`` ranges (None when nothing is excluded)."""
    ranges = _ranges(exclude_velocities)
    if not ranges:
        return None
    from ..io.cube_mask import excluded_channels

    return ~excluded_channels(cube.velocity, cube.channel_width, ranges)


def refit_curve_on_cube(result, cube, within_beams: float = 4.0, response: str = "boxcar", channels=None,
                        exclude_velocities=None, threads: int | None = None):
    """Refit the inner curve of ``result`` (a :class:`..products.result.FitResult`) on ``cube`` in place.

    ``channels``: boolean mask of the channels to use; ``exclude_velocities``: (lo, hi) km/s ranges (or
    ``"LO:HI[,LO:HI]"``) whose channels are left out as well (foreground), recorded in ``fit.json``.

    Returns the observed model cube (n_channels, ny, nx) of the final rings; ``result.model_cube`` is set
    to it and ``result.cube`` to ``cube``."""
    from ..fitting.cube_fit import fit_curve_on_cube

    table = result.rings
    rings = {name: np.asarray(getattr(table[name], "value", table[name]), float)
             for name in ("radius",) + PARAMETERS + ("v_rotation_err",) if name in table.colnames}
    order = np.argsort(rings["radius"])
    if np.any(order != np.arange(len(order))):
        raise ValueError("the ring table must be sorted by radius")
    ranges = _ranges(exclude_velocities)
    keep = excluded_channel_mask(cube, ranges)
    if keep is not None:
        channels = keep if channels is None else keep & np.asarray(channels, bool)
    fitted = fit_curve_on_cube(cube, rings, result.layout.edges, within_beams=within_beams, response=response,
                               channels=channels, threads=threads)
    _update_table(table, fitted)
    record = dict(fitted.record)
    record["excluded_velocities"] = [[float(lo), float(hi)] for lo, hi in ranges]
    record["treatment_by_ring"] = {"cube": [float(r) for r in rings["radius"][fitted.treatment == "cube"]],
                                   "map": [float(r) for r in rings["radius"][fitted.treatment == "map"]]}
    record["columns"] = {"v_rotation": "cube fit where curve_source is 'cube', else the map fit",
                         "v_rotation_map": "the map fit's v_rotation (beam-smearing corrected on the map when a "
                                           "beam is known)",
                         "dispersion": "Gaussian line dispersion of the gas (km/s), intrinsic: channel width and "
                                       "beam are in the model",
                         "surface_brightness": f"ring's sky-plane moment-0 ({cube.unit} km/s)"}
    result.diagnostics["curve_from_cube"] = record
    result.cautions += fitted.cautions
    result.model_cube = fitted.model
    result.cube = cube
    return fitted.model


def _update_table(table, fitted) -> None:
    """Map values into ``*_map`` columns; the cube's values, errors and treatment into the table."""
    rings = fitted.rings
    cube_rows = fitted.treatment == "cube"
    v_map = table["v_rotation"].to_value(KMS).copy()
    err_map = table["v_rotation_err"].to_value(KMS).copy()
    index = table.colnames.index("v_rotation_err") + 1
    table.add_column(v_map * KMS, name="v_rotation_map", index=index)
    table.add_column(err_map * KMS, name="v_rotation_err_map", index=index + 1)
    v = np.where(cube_rows, rings["v_rotation"], v_map)
    def part(name):
        return np.nan_to_num(table[name].to_value(KMS)) if name in table.colnames else np.zeros(len(v))

    asymmetry = part("v_rotation_err_asymmetry")
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(v_map != 0, np.abs(v / v_map), 1.0)
    geometry = part("v_rotation_err_geometry") * scale
    for name in ("v_rotation_shift_inclination", "v_rotation_shift_position_angle"):
        if name in table.colnames:
            table[name] = np.where(cube_rows, part(name) * scale, part(name)) * KMS
    total = np.sqrt(np.nan_to_num(rings["v_rotation_err"]) ** 2 + asymmetry**2 + geometry**2)
    if "v_rotation_err_random" in table.colnames:
        table["v_rotation_err_random"] = np.where(cube_rows, rings["v_rotation_err"], part("v_rotation_err_random")) \
            * KMS
        table["v_rotation_err_geometry"] = np.where(cube_rows, geometry, part("v_rotation_err_geometry")) * KMS
        table["v_rotation_err_beam"] = np.where(cube_rows, 0.0, part("v_rotation_err_beam")) * KMS
    table["v_rotation"] = v * KMS
    table["v_rotation_err"] = np.where(cube_rows, total, err_map) * KMS
    table["v_rotation_err_cube"] = np.where(cube_rows, rings["v_rotation_err"], np.nan) * KMS
    table["dispersion"] = rings["dispersion"] * KMS
    table["dispersion_err"] = rings["dispersion_err"] * KMS
    table["surface_brightness"] = rings["surface_brightness"]
    table["curve_source"] = fitted.treatment.astype(str)
    if "v_rotation_sin_i" in table.colnames:
        table["v_rotation_sin_i"] = v * np.sin(table["inclination"].to_value(u.rad)) * KMS
    if "flags" in table.colnames:  # flags stay last
        flags = table["flags"]
        table.remove_column("flags")
        table["flags"] = flags
