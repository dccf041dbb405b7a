"""`RotationCurve`: the product handed to mass modelling, in physical units with its error budget.

From a fit's final ring table:

- radius in arcsec and, given a distance (or a redshift and a stated astropy cosmology, using the
  angular-diameter distance), in kpc: R = theta D (small angles);
- v_rotation with every named error part and the total (see ``fit.json`` ``error_model``), and the
  covariance of the curve between rings (:meth:`RotationCurve.covariance`, written beside
  ``curve.ecsv`` as ``curve_covariance.ecsv``; :mod:`.covariance`);
- the rest-frame correction: line-of-sight velocity *differences* measured at redshift z are
  stretched by (1 + z), so speeds are divided by (1 + z) with z = v_systemic / c (optical
  convention) when that changes them by more than 0.1 per cent (v_systemic > 300 km/s);
- with a velocity-dispersion (moment-2) map and the intensity map, the circular speed corrected for
  asymmetric drift (pressure support of an isotropic gas disc; Binney & Tremaine 2008 eq. 4.228 with
  sigma_R = sigma_phi; as applied to HI by e.g. Oh et al. 2015, AJ 149, 180)::

      v_circular^2 = v_rotation^2 - sigma^2 d ln(Sigma sigma^2) / d ln R

  with Sigma from ring averages of the intensity map and sigma from ring medians of the dispersion
  map, ln(Sigma sigma^2) smoothed by a quadratic in R before differentiating;
- below the low-inclination limit, ``measured_quantity`` says that v_rotation sin i is what the data
  measure, and v_rotation errors are already widened;
- the ring flags, carried over.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from astropy import constants as const
from astropy import units as u
from astropy.table import QTable

from ..errors import InputError
from ..fitting.geometry import disc_coordinates

__all__ = ["RotationCurve", "parse_distance", "asymmetric_drift", "ring_statistic"]

KMS = u.km / u.s
_Z_THRESHOLD = 1e-3
MAX_DISTANCE_MPC = 1e5  # beyond the observable universe (about 14,000 Mpc comoving)


def parse_distance(text) -> u.Quantity:
    """``12`` (Mpc), ``"12Mpc"``, ``"850 kpc"`` -> a distance Quantity."""
    if isinstance(text, u.Quantity):
        value = text
    else:
        try:
            value = float(text) * u.Mpc
        except (TypeError, ValueError):
            try:
                value = u.Quantity(str(text).replace(" ", ""))
            except (TypeError, ValueError):
                raise InputError(f"cannot read distance {text!r}: give a number in Mpc or a length like 12Mpc") from None
    try:
        value = value.to(u.Mpc)
    except u.UnitConversionError:
        raise InputError(f"distance {text!r} is not a length; give e.g. 12Mpc") from None
    if not (np.isfinite(value.value) and 0 < value.value <= MAX_DISTANCE_MPC):
        raise InputError(f"distance {text!r} is out of range; give a finite distance above 0 and at most "
                         f"{MAX_DISTANCE_MPC:g} Mpc, e.g. 12Mpc")
    return value


def ring_statistic(image, sky_jacobian, rings: dict, inner, outer, statistic=np.nanmean) -> np.ndarray:
    """``statistic`` of ``image`` over each ring's pixels at that ring's geometry (NaN pixels ignored)."""
    ny, nx = image.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    ok = np.isfinite(image)
    x, y, values = xx[ok].astype(float), yy[ok].astype(float), image[ok]
    out = np.full(len(inner), np.nan)
    for k in range(len(inner)):
        radius, _, _ = disc_coordinates(x, y, rings["x_center"][k], rings["y_center"][k], sky_jacobian,
                                        rings["position_angle"][k], rings["inclination"][k])
        sel = (radius >= inner[k]) & (radius < outer[k])
        if sel.sum() >= 3:
            out[k] = statistic(values[sel])
    return out


def asymmetric_drift(radius, v_rotation, sigma, surface_density):
    """Circular speed and the drift term sigma^2 d ln(Sigma sigma^2)/d ln R (module docstring).

    Returns (v_circular, v_drift^2) with v_drift^2 = -sigma^2 d ln(Sigma sigma^2)/d ln R (km^2/s^2).
    """
    r = np.asarray(radius, float)
    s = np.asarray(sigma, float)
    sig = np.asarray(surface_density, float)
    ok = np.isfinite(r) & np.isfinite(s) & np.isfinite(sig) & (sig > 0) & (s > 0) & (r > 0)
    if ok.sum() < 3:
        raise InputError("asymmetric drift needs at least three rings with positive intensity and dispersion")
    coef = np.polyfit(r[ok], np.log(sig[ok] * s[ok] ** 2), 2)
    dlog_dlnr = r * np.polyval(np.polyder(coef), r)
    drift2 = -s**2 * dlog_dlnr
    v2 = np.asarray(v_rotation, float) ** 2 + drift2
    return np.sqrt(np.clip(v2, 0, None)), drift2


def _carry_correlations(rings, curve) -> None:
    """Copy the random part's neighbour correlations (``random_correlation_<k>``, unitless) into the curve."""
    for name in rings.colnames:
        if name.startswith("random_correlation_"):
            curve[name] = rings[name]


@dataclass
class RotationCurve:
    """The rotation-curve table (astropy QTable) and what was done to it (``meta``)."""

    table: QTable
    meta: dict = field(default_factory=dict)

    @classmethod
    def from_fit(cls, result, distance=None, redshift=None, cosmology: str = "Planck18", dispersion=None):
        """Build the product from a :class:`.result.FitResult` (module docstring).

        ``distance``: number (Mpc) or length; ``redshift``: used with the named astropy cosmology when no
        distance is given; ``dispersion``: a moment-2 map on the fit's grid in km/s (default: the map's own).
        """
        from ..pipeline.options import CurveOptions

        CurveOptions(distance=distance, redshift=redshift, cosmology=cosmology)  # the same checks as every entry point
        rings = result.rings
        t = QTable()
        t["radius"] = rings["radius"]
        meta = {"rest_frame_correction": None, "distance": None, "asymmetric_drift": None}
        if distance is not None:
            d = parse_distance(distance)
            meta["distance"] = {"value_mpc": float(d.value), "source": "given"}
        elif redshift is not None:
            from astropy import cosmology as cosmo_module

            cosmo = getattr(cosmo_module, cosmology)
            d = cosmo.angular_diameter_distance(float(redshift)).to(u.Mpc)
            meta["distance"] = {"value_mpc": float(d.value), "source": f"angular-diameter distance at z = {redshift} "
                                                                       f"({cosmology}, astropy)"}
        else:
            d = None
        if d is not None:
            t["radius_kpc"] = (rings["radius"].to(u.rad).value * d).to(u.kpc)
        v_sys = rings["v_systemic"].to_value(KMS)
        v_sys = float(np.nanmedian(v_sys)) if np.isfinite(v_sys).any() else 0.0
        z = v_sys / const.c.to_value(KMS)
        if not abs(z) < 0.5:
            from ..errors import ResultNotPhysical

            raise ResultNotPhysical(f"systemic velocity {v_sys:.6g} km/s is not a recession speed a resolved disc can "
                                    "have (z = v/c beyond 0.5); check the map's velocity unit (--velocity-unit)")
        stretch = 1.0 + z if abs(z) > _Z_THRESHOLD else 1.0
        if stretch != 1.0:
            meta["rest_frame_correction"] = {"z": float(z), "factor": float(1.0 / stretch),
                                             "note": "speeds divided by (1 + z), z = v_systemic / c"}
        speed_columns = [c for c in rings.colnames if c.startswith("v_rotation") and c not in ("v_rotation_difference",)]
        for name in speed_columns:
            t[name] = rings[name] / stretch
        _carry_correlations(rings, t)
        t["inclination"] = rings["inclination"]
        t["inclination_err"] = rings["inclination_err"]
        disp = dispersion if dispersion is not None else getattr(result.vmap, "dispersion", None)
        if disp is not None:
            if result.vmap.intensity is None:
                raise InputError("the asymmetric-drift correction needs the intensity map too (--intensity-map)")
            geom = {n: rings[n].value for n in ("x_center", "y_center", "position_angle", "inclination")}
            inner, outer = rings["radius_inner"].value, rings["radius_outer"].value
            sigma = ring_statistic(np.asarray(disp, float), result.vmap.sky_jacobian, geom, inner, outer, np.nanmedian)
            surface = ring_statistic(np.asarray(result.vmap.intensity, float), result.vmap.sky_jacobian, geom, inner,
                                     outer, np.nanmean)
            v_rot = t["v_rotation"].to_value(KMS)
            v_circ, drift2 = asymmetric_drift(rings["radius"].value, v_rot, sigma / stretch, surface)
            t["dispersion"] = sigma / stretch * KMS
            t["asymmetric_drift"] = np.sign(drift2) * np.sqrt(np.abs(drift2)) * KMS
            t["v_circular"] = v_circ * KMS
            err = t["v_rotation_err"].to_value(KMS)
            t["v_circular_err"] = err * np.where(v_circ > 0, np.abs(v_rot) / np.maximum(v_circ, 1e-9), 1.0) * KMS
            meta["asymmetric_drift"] = {"applied": True, "method": "v_c^2 = v_rot^2 - sigma^2 dln(Sigma sigma^2)/dlnR; "
                                        "isotropic gas (Binney & Tremaine 2008 eq. 4.228; Oh et al. 2015)"}
        low = float(np.nanmedian(rings["inclination"].to_value(u.deg))) < result.options.low_inclination
        meta["measured_quantity"] = "v_rotation_sin_i (low inclination: v_rotation and inclination are degenerate)" \
            if low else "v_rotation"
        t["flags"] = rings["flags"]
        meta["error_components"] = "v_rotation_err = random, geometry, beam and asymmetry parts in quadrature " \
                                   "(fit.json error_model); covariance between rings: curve_covariance.ecsv"
        return cls(t, meta)

    def covariance(self) -> dict:
        """The curve's covariance between rings, each part and the total, in (km/s)^2 (:mod:`.covariance`)."""
        from .covariance import curve_covariance

        return curve_covariance(self.table)

    def write_covariance(self, path) -> None:
        """Write ``curve_covariance.ecsv`` atomically (format in :mod:`.covariance`)."""
        from .covariance import write_covariance

        write_covariance(path, self.table["radius"], self.covariance())

    def write(self, path) -> None:
        """Write ``curve.ecsv`` atomically, with ``meta`` in the header."""
        from ..io.atomic import atomic_path
        from .result import plain_table

        out = plain_table(self.table)
        out.meta.update({k: v for k, v in self.meta.items() if v is not None})
        with atomic_path(path) as tmp:
            out.write(tmp, format="ascii.ecsv")
