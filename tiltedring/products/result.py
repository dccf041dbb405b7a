"""`FitResult`: the tables, maps and run record of a fit, and how they are written.

Files written by :meth:`FitResult.write` (through :func:`tiltedring.jobs.write_fit_folder`, the one
writer of the command line, batch and the API) into one folder, atomically: a temporary folder
renamed into place once every file, the report included, is written:

- ``rings.ecsv``: the final ring table (astropy ECSV, units in the header)
- ``curve.ecsv``: the rotation-curve product (:mod:`.curve`)
- ``gas.ecsv``: gas surface density on the rings (intensity map and distance given; :mod:`..massmodel.gas`)
- ``stage_free.ecsv``, ``stage_centred.ecsv``: the earlier stages' tables
- ``model.fits``, ``residual.fits``: full-size maps on the input grid (input WCS, BUNIT km/s)
- ``model_cube.fits``, ``residual_cube.fits`` (cube inputs): the model cube of the final rings and
  data minus model, on the cube's grid and channels, in the cube's unit (:mod:`..fitting.cube_model`)
- ``report.pdf`` (on request): summary page and figures (:mod:`.plotting`)
- ``fit.json``: the run record (inputs with checksums, options, versions, first guess, stage
  summaries, global statistics, cautions, what each error column means)
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.table import QTable

from ..diagnostics import flags as ringflags
from ..fitting.parameters import SPEEDS, Parameter

__all__ = ["FitResult", "stage_table", "write_table", "plain_table", "ERROR_COLUMNS"]

ERROR_COLUMNS = {
    "v_rotation_err": "total uncertainty of v_rotation: random, geometry, beam and asymmetry parts in quadrature "
                      "(widened to half of v_rotation at low inclination); see error_model",
    "v_rotation_err_random": "noise at the adopted geometry: resampled scatter with the orientation held (formal "
                             "error without resampling); correlation with the k-th next ring: random_correlation_<k>",
    "v_rotation_err_geometry": "response to the orientation's 1 sigma, hypot of v_rotation_shift_inclination and "
                               "v_rotation_shift_position_angle (signed, fully correlated across rings)",
    "v_rotation_err_beam": "the beam treatment's own uncertainty, in quadrature: half the spread of the "
                           "beam-smearing-corrected v_rotation over the intensity assumptions of its forward model "
                           "(exponential profile, uniform, the intensity map as given), half its change over the "
                           "iteration and half the difference between the two regularisations; where the "
                           "correction fell back, the change it would have made; 0 without the treatment",
    "v_rotation_err_asymmetry": "sqrt(d^2 - s_d^2)/2 where approaching and receding halves differ (d) beyond their "
                                "noise (s_d), else 0",
    "v_rotation_err_formal": "least-squares error scaled by sqrt(reduced chi-square) and sqrt(pixels per beam)",
    "<parameter>_err of geometry": "formal errors scaled as above; in the final table, errors of the regularised "
                                   "profile or of the robust average over rings",
}


def stage_table(vmap, layout, solutions, ring_flags) -> QTable:
    """A ring table (one row per ring) from one stage's solutions."""
    t = QTable()
    t["radius"] = layout.radii * u.arcsec
    t["radius_inner"] = layout.inner * u.arcsec
    t["radius_outer"] = layout.outer * u.arcsec
    par = np.array([s.params for s in solutions])
    err = np.array([s.errors for s in solutions])
    failed = np.array(["fit_failed" in f for f in ring_flags])
    for p in Parameter:
        if p is Parameter.v_radial and not any(s.free[p] for s in solutions):
            continue
        values = par[:, p].copy()
        if p in SPEEDS:
            values[failed] = np.nan
        t[p.name] = values * u.Unit(p.unit)
        t[f"{p.name}_err"] = err[:, p] * u.Unit(p.unit)
    t["n_pixels"] = np.array([s.n_pixels for s in solutions])
    t["coverage"] = np.array([s.coverage for s in solutions])
    t["chi2_reduced"] = np.array([s.chi2_reduced for s in solutions])
    t["rms_residual"] = np.array([s.rms for s in solutions]) * u.km / u.s
    t["flags"] = [ringflags.join(f) for f in ring_flags]
    return t


def add_sky_centre(table: QTable, vmap) -> None:
    """Add ``ra_center``/``dec_center`` (ICRS deg, converted from the map's frame) beside each ring's pixel centre."""
    ra, dec = vmap.pixel_to_icrs(np.asarray(table["x_center"].value), np.asarray(table["y_center"].value))
    index = table.colnames.index("y_center_err") + 1
    table.add_column(ra * u.deg, name="ra_center", index=index)
    table.add_column(dec * u.deg, name="dec_center", index=index + 1)


def file_checksum(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def residual_line(stats: dict) -> str:
    """The summary's residual line: the rms over every modelled pixel, over the pixels fitted when the outlier
    screen left some out, and the robust rms (1.4826 MAD)."""
    text = f"residual rms = {stats['residual_rms']:.2f} km/s"
    if stats.get("n_fitted_pixels") is not None and stats["n_fitted_pixels"] < stats["n_modelled_pixels"]:
        text += f" ({stats['residual_rms_fitted']:.2f} km/s over the {stats['n_fitted_pixels']} pixels fitted)"
    if stats.get("residual_robust_rms") is not None:
        text += f"; robust rms (1.4826 MAD) = {stats['residual_robust_rms']:.2f} km/s"
    return text


@dataclass
class FitResult:
    """Everything a fit produced. ``rings`` is the final table; ``stages`` holds every stage's."""

    vmap: object
    options: object
    layout: object
    first_guess: dict
    stages: dict
    rings: QTable
    model: np.ndarray
    residual: np.ndarray
    cautions: list = field(default_factory=list)
    diagnostics: dict = field(default_factory=dict)
    inputs: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)  # wall seconds per step of the fit (not written to files)
    cube: object = None  # the io.cube.LineCube the maps came from, when the curve was refitted on it
    model_cube: np.ndarray | None = None  # the observed model cube of the final rings (fitting.cube_model)
    left_out: np.ndarray | None = None  # map of the pixels the outlier screen left out (None: no screen ran)

    # ------------------------------------------------------------------ summaries
    def statistics(self) -> dict:
        """Global statistics of the residual field: over every modelled pixel, and over those the fit used (the
        outlier screen's left-out pixels excluded); ``residual_robust_rms`` is 1.4826 x the median absolute
        residual about its median over every modelled pixel, a standard deviation that wild pixels do not drive
        (Rousseeuw & Croux 1993, JASA 88, 1273)."""
        finite = np.isfinite(self.residual)
        res = self.residual[finite]
        used = self.residual[finite & ~self.left_out] if self.left_out is not None else res
        robust = 1.4826 * float(np.median(np.abs(res - np.median(res)))) if res.size else None
        return {
            "n_valid_pixels": int(np.isfinite(self.vmap.velocity).sum()),
            "n_modelled_pixels": int(res.size),
            "residual_rms": float(np.sqrt(np.mean(res**2))) if res.size else None,
            "residual_median_abs": float(np.median(np.abs(res))) if res.size else None,
            "residual_robust_rms": robust,
            "n_fitted_pixels": int(used.size),
            "residual_rms_fitted": float(np.sqrt(np.mean(used**2))) if used.size else None,
            "pixels_per_beam": self.vmap.pixels_per_beam,
            "pixel_scale_arcsec": self.vmap.pixel_scale,
            "north_angle_deg": self.vmap.north_angle,
        }

    def geometry(self) -> dict:
        """Disc-wide geometry: centre and systemic velocity, median position angle and inclination."""
        t = self.rings
        out = {}
        from .sanity import angle_median

        for name in ("x_center", "y_center", "ra_center", "dec_center", "v_systemic", "position_angle", "inclination"):
            col = np.asarray(t[name].value if hasattr(t[name], "value") else t[name], float)
            median = angle_median if name in ("position_angle", "ra_center") else np.nanmedian
            out[name] = float(median(col)) if np.isfinite(col).any() else float("nan")
        out["profile"] = self.diagnostics.get("warp", {}).get("profile", "constant")
        return out

    def record(self) -> dict:
        """The run record written as ``fit.json``."""
        import astropy
        import numba
        import scipy

        from .. import __version__

        from .sanity import angle_median

        stage_summaries = {}
        for name, table in self.stages.items():
            ok = np.isfinite(np.asarray(table["v_rotation"].value))
            stage_summaries[name] = {
                "n_rings": len(table),
                "n_fitted": int(ok.sum()),
                "median_chi2_reduced": float(np.nanmedian(table["chi2_reduced"])) if ok.any() else None,
                "median_position_angle": float(angle_median(table["position_angle"].value)),
                "median_inclination": float(np.nanmedian(table["inclination"].value)),
            }
        return {
            "tool": "tiltedring",
            "version": __version__,
            "versions": {"numpy": np.__version__, "scipy": scipy.__version__, "astropy": astropy.__version__,
                         "numba": numba.__version__},
            "inputs": self.inputs,
            "options": self.options.to_dict(),
            "conventions": {
                "position_angle": "of the receding half of the major axis, deg from north through east",
                "inclination": "deg, 0 face-on, 90 edge-on",
                "pixels": "0-based (numpy order, astropy origin=0)",
                "sky_centre": f"ra_center, dec_center: ICRS deg, converted with astropy from the map's own celestial "
                              f"frame ({self.vmap.celestial_frame or 'none: no celestial WCS, so they are blank'})",
                "velocity": f"{getattr(self.vmap, 'velocity_convention', None) or 'not stated (optical assumed)'} "
                            f"convention; {getattr(self.vmap, 'convention_source', 'not stated')}",
                "v_radial": "positive when the minor-axis half at position_angle + 90 recedes; inflow or outflow "
                            "needs the near side",
            },
            "ring_edges_arcsec": list(self.layout.edges),
            "first_guess": self.first_guess,
            "geometry": self.geometry(),
            **self.diagnostics,
            "stages": stage_summaries,
            "statistics": self.statistics(),
            "error_columns": ERROR_COLUMNS,
            "flag_vocabulary": ringflags.vocabulary(),
            "cautions": self.cautions,
        }

    def __repr__(self) -> str:
        g = self.geometry()
        name = getattr(self.vmap, "object_name", None) or self.vmap.source
        return (f"<FitResult {name}: {len(self.rings)} rings, v_systemic {g['v_systemic']:.1f} km/s, position angle "
                f"{g['position_angle']:.1f} deg, inclination {g['inclination']:.1f} deg, "
                f"{len(self.cautions)} caution{'' if len(self.cautions) == 1 else 's'}>")

    def ring_table_text(self) -> str:
        """The ring table's first-read columns as aligned text: radius, position angle, inclination,
        v_rotation with its error, flags (every column is in ``rings`` and ``rings.ecsv``)."""
        t = self.rings
        rows = [("radius", "PA", "incl.", "v_rotation", "flags"), ("arcsec", "deg", "deg", "km/s", "")]
        for k in range(len(t)):
            v, e = float(t["v_rotation"][k].value), float(t["v_rotation_err"][k].value)
            flags = str(t["flags"][k])
            rows.append((f"{t['radius'][k].value:.1f}", f"{t['position_angle'][k].value:.1f}",
                         f"{t['inclination'][k].value:.1f}",
                         f"{v:.1f} +/- {e:.1f}" if np.isfinite(v) else "--",
                         "" if flags in ("", "--") else flags.replace(",", ", ")))
        widths = [max(len(r[c]) for r in rows) for c in range(5)]
        lines = ["  ".join(cell.rjust(w) if c < 4 else cell for c, (cell, w) in enumerate(zip(row, widths))).rstrip()
                 for row in rows]
        lines.insert(2, "  ".join("-" * w for w in widths))
        return "\n".join(lines)

    def summary(self) -> str:
        """A few lines of plain text: geometry, curve extent, the decisions and the cautions."""
        g = self.geometry()
        t = self.rings
        v = np.asarray(t["v_rotation"].value)
        e = np.asarray(t["v_rotation_err"].value)
        lines = [
            f"centre x, y = {g['x_center']:.2f}, {g['y_center']:.2f} pix (RA, Dec = {g['ra_center']:.5f}, "
            f"{g['dec_center']:.5f} deg)",
            f"v_systemic = {g['v_systemic']:.1f} km/s; position angle = {g['position_angle']:.1f} deg; "
            f"inclination = {g['inclination']:.1f} deg (median over rings; geometry {g['profile']})",
            f"{len(t)} rings from {t['radius'][0].value:.1f} to {t['radius'][-1].value:.1f} arcsec; "
            f"outermost v_rotation = {v[np.isfinite(v)][-1] if np.isfinite(v).any() else float('nan'):.1f} "
            f"+/- {e[np.isfinite(v)][-1] if np.isfinite(v).any() else float('nan'):.1f} km/s",
            residual_line(self.statistics()),
        ]
        from .decisions import decision_lines

        lines += [f"{topic}: {sentence}" for topic, sentence in decision_lines(self)]
        lines += [f"caution: {c}" for c in self.cautions]
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        import html

        rows = "".join(f"<li>{html.escape(line)}</li>" for line in self.summary().splitlines())
        name = getattr(self.vmap, "object_name", None) or self.vmap.source
        return f"<div><b>tiltedring fit</b> of {html.escape(str(name))}<ul>{rows}</ul></div>"

    # ------------------------------------------------------------------ writing
    def curve(self, distance=None, redshift=None, cosmology: str = "Planck18"):
        """The :class:`.curve.RotationCurve` product (physical units, corrections, error budget)."""
        from .curve import RotationCurve

        curve = RotationCurve.from_fit(self, distance=distance, redshift=redshift, cosmology=cosmology)
        self.cautions.extend(c for c in curve.cautions() if c not in self.cautions)
        return curve

    # ------------------------------------------------------------------ figures (matplotlib imported on use)
    def plot_maps(self, axes=None):
        from .plotting import plot_maps

        return plot_maps(self, axes)

    def plot_geometry(self, axes=None):
        from .plotting import plot_geometry

        return plot_geometry(self, axes)

    def plot_curve(self, ax=None):
        from .plotting import plot_rotation_curve

        return plot_rotation_curve(self, ax)

    def plot_slice(self, ax=None):
        from .plotting import plot_major_axis_slice

        return plot_major_axis_slice(self, ax)

    def plot_harmonics(self, ax=None):
        from .plotting import plot_harmonics

        return plot_harmonics(self, ax)

    def plot_warp(self, ax=None):
        from .plotting import plot_warp

        return plot_warp(self, ax)

    def write(self, folder, overwrite: bool = False, curve=None, report: bool = False, png: bool = False) -> Path:
        """Write the outputs (module docstring) into ``folder``; refuses a non-empty folder unless ``overwrite``.

        ``curve``: the :class:`.curve.RotationCurve` to write as ``curve.ecsv`` (default: one without a
        distance); with a distance and an intensity map ``gas.ecsv`` is written too.
        ``report``: also write ``report.pdf`` (and ``report_*.png`` with ``png``).
        The same writer as ``tiltedring fit`` and ``tiltedring batch`` (:func:`tiltedring.jobs.write_result`).
        """
        from ..jobs import write_result

        write_result(self, folder, overwrite=overwrite, curve=curve, report=report, png=png)
        return Path(folder)


def plain_table(table: QTable):
    """A Table of plain columns with units (a cleaner ECSV header than serialised quantities)."""
    from astropy.table import Column, Table

    return Table([Column(getattr(table[n], "value", table[n]), name=n, unit=getattr(table[n], "unit", None))
                  for n in table.colnames])


TABLE_COMMENT = ["written by tiltedring; conventions in fit.json",
                 "position_angle: receding major axis, deg north through east; inclination 0 = face-on"]


def write_table(table: QTable, path, comment: list | None = None) -> None:
    """``table`` as ECSV at ``path`` (atomically), with ``comment`` lines (default: the conventions)."""
    from ..io.atomic import atomic_path

    out = plain_table(table)
    out.meta["comment"] = list(comment) if comment else TABLE_COMMENT
    with atomic_path(path) as tmp:
        out.write(tmp, format="ascii.ecsv")
