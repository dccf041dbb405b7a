"""`RotationCurve`: the product handed to mass modelling, in physical units with its error budget.

From a fit's final ring table:

- radius in arcsec and, given a distance (or a redshift and a stated astropy cosmology, using the
  angular-diameter distance), in kpc: R = theta D (small angles);
- v_rotation with every named error part and the total (see ``fit.json`` ``error_model``), and the
  covariance of the curve between rings (:meth:`RotationCurve.covariance`, written beside
  ``curve.ecsv`` as ``curve_covariance.ecsv``; :mod:`.covariance`);
- the rest-frame correction (:func:`rest_frame_stretch`): a speed u in the galaxy's own frame
  appears as a line-of-sight velocity *difference* dv that depends on the Doppler convention of
  the map (Greisen et al. 2006, A&A 446, 747, for the definitions). The galaxy at redshift z and
  a gas element moving at u along the line of sight give 1 + z_obs = (1 + z)(1 + u/c) to first
  order in u/c, so with beta = v_systemic / c::

      optical       v = c z_obs                 dv/du = 1 + z           1 + z = 1 + beta
      radio         v = c (1 - 1/(1 + z_obs))   dv/du = 1 / (1 + z)     1 + z = 1 / (1 - beta)
      relativistic  v = c ((1+z_obs)^2 - 1) / ((1+z_obs)^2 + 1)
                                                dv/du = 1 - beta^2 (relativistic velocity addition)

  and speeds are multiplied by du/dv (divided by 1 + z for optical, multiplied by 1 + z for radio,
  divided by 1 - beta^2 for relativistic) when that changes them by more than 0.1 per cent
  (|v_systemic| > 300 km/s). The convention is the map's (read from its header or given); when
  neither says, optical is assumed with a caution;
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

__all__ = ["RotationCurve", "parse_distance", "asymmetric_drift", "ring_statistic", "rest_frame_stretch"]

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


def rest_frame_stretch(v_systemic: float, convention: str) -> tuple:
    """(z, d v_observed / d u) for a galaxy whose systemic velocity is ``v_systemic`` km/s in
    ``convention``: the factor by which a speed u in the galaxy's frame is stretched on the map
    (module docstring). Divide the map's speeds by it to get rest-frame speeds."""
    beta = float(v_systemic) / const.c.to_value(KMS)
    if convention == "optical":
        return beta, 1.0 + beta
    if convention == "radio":
        return beta / (1.0 - beta), 1.0 - beta
    if convention == "relativistic":
        return float(np.sqrt((1.0 + beta) / (1.0 - beta))) - 1.0, 1.0 - beta**2
    raise InputError(f"velocity convention {convention!r}: give radio, optical or relativistic")


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


def _rest_frame(result, v_sys: float, given) -> tuple:
    """(convention, its ``velocity_convention`` meta entry, stretch d v_observed / d u; 1 when below 0.1 per cent)."""
    vmap = result.vmap
    convention = given or getattr(vmap, "velocity_convention", None)
    source = "given (velocity_convention)" if given else getattr(vmap, "convention_source", "not stated")
    entry = {"convention": convention or "optical", "source": source}
    if convention is None:
        _, radio = rest_frame_stretch(v_sys, "radio")
        _, optical = rest_frame_stretch(v_sys, "optical")
        change = 100 * abs(optical / radio - 1)
        entry["assumed"] = (f"the map states no velocity convention: optical (v = cz) assumed for the rest-frame "
                            f"correction; if it is radio, the rest-frame speeds are {change:.1f} per cent "
                            f"{'higher' if optical > radio else 'lower'} than given: state the convention with "
                            "--velocity-convention")
        convention = "optical"
    _, stretch = rest_frame_stretch(v_sys, convention)
    return convention, entry, (stretch if abs(stretch - 1.0) > _Z_THRESHOLD else 1.0)


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
    def from_fit(cls, result, distance=None, redshift=None, cosmology: str = "Planck18", dispersion=None,
                 velocity_convention: str | None = None):
        """Build the product from a :class:`.result.FitResult` (module docstring).

        ``velocity_convention``: overrides the map's (``result.vmap.velocity_convention``).

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
        if not abs(v_sys / const.c.to_value(KMS)) < 0.5:
            from ..errors import ResultNotPhysical

            raise ResultNotPhysical(f"systemic velocity {v_sys:.6g} km/s is not a recession speed a resolved disc can "
                                    "have (beyond c/2); check the map's velocity unit (--velocity-unit)")
        convention, meta["velocity_convention"], stretch = _rest_frame(result, v_sys, velocity_convention)
        if stretch != 1.0:
            z, _ = rest_frame_stretch(v_sys, convention)
            meta["rest_frame_correction"] = {"z": float(z), "factor": float(1.0 / stretch),
                                             "convention": convention,
                                             "note": f"speeds multiplied by {1.0 / stretch:.6f}: the map's velocity "
                                                     f"differences in the {convention} convention turned into "
                                                     "rest-frame speeds"}
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

    def cautions(self) -> list:
        """Cautions the product adds (an assumed velocity convention that changed the speeds)."""
        convention = self.meta.get("velocity_convention") or {}
        if self.meta.get("rest_frame_correction") and convention.get("assumed"):
            return [convention["assumed"]]
        return []

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
