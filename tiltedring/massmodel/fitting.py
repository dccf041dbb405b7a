"""Fitting a rotation curve with baryons plus a dark halo, or with MOND.

    v_model^2(r) = f_D [Y_disc v_disc^2 + Y_bulge v_bulge^2 + v_gas |v_gas|](r) + v_halo^2(f_D r)

(or the MOND speed of the baryonic v^2). Baryonic curves are given for mass-to-light ratio 1 at the
nominal distance; a distance factor f_D = D_fit / D stretches radii by f_D and baryonic v^2 by f_D
(masses from light and gas maps scale as D^2); an inclination i_fit rescales the observed speeds
and their independent errors by sin(i) / sin(i_fit). Both are optional nuisance parameters with
Gaussian priors from the geometry's own errors.

Errors of the curve (:mod:`.covariance`): chi^2 = r^T C^-1 r with the curve's covariance C when it
has one (given, or built from its independent errors plus its geometry term taken as fully
correlated across rings), else with the independent errors alone. The geometry term is never
treated as independent per point: with the inclination as a nuisance parameter only the
independent errors enter, and a given covariance (which holds the geometry term) cannot be
combined with a fitted inclination.

Mass-to-light ratios are fixed, free, or free with a log-normal prior (default 0.5 for discs and
0.7 for bulges at 3.6 micron with 0.1 dex scatter: McGaugh & Schombert 2014; from memory).
``disc_mode`` ``maximum`` fixes Y_disc by the maximum-disc rule at 2.2 disc scale lengths
(:mod:`.maximum_disc`); ``minimum`` sets the stellar mass to zero. Halo sizes and masses follow
``definition`` (cosmology and overdensity, :mod:`.definition`).

Weighted least squares (scipy, bounds, priors as extra residuals) gives the best fit and the
covariance; emcee (optional) samples the posterior (:mod:`.sampling`, with its autocorrelation time).
Model comparison: chi^2, reduced chi^2 and BIC = chi^2 + k ln n (Schwarz 1978). Cautions
(:mod:`.cautions`): no baryons, negative speeds, a concentration far off the concentration-mass
relation, a maximum disc that exceeds the curve, a short posterior chain.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from ..errors import InputError
from .components import G
from .registry import halo_class, model_names
from .relations import A0, mond_speed

__all__ = ["CurveData", "Baryons", "MassModelSettings", "MassModelResult", "fit_mass_model"]

# units of the fitted and fixed quantities that are not halo parameters (log10_<name>: log10 of the value)
_UNITS = {"ml_disc": "solMass / solLum", "ml_bulge": "solMass / solLum", "distance_factor": "", "inclination": "deg",
          "a0": "m / s2"}


@dataclass
class CurveData:
    """Observed curve: radius (kpc), speed and its independent (random) error (km/s); optional distance and
    inclination with errors (Mpc, deg), and optional ``covariance`` of the speeds (N x N, km^2/s^2), which then
    replaces the independent errors in chi^2 (``covariance_kind`` ``given``: it holds every part of the error,
    geometry included). ``v_err_geometry``: a geometry term per point (km/s), taken as fully correlated across
    the points: without a covariance it becomes diag(v_err^2) + g g^T (``covariance_kind`` ``geometry``),
    which is dropped when the inclination is fitted as a nuisance parameter instead."""

    radius: np.ndarray
    v: np.ndarray
    v_err: np.ndarray
    distance: float | None = None
    distance_err: float | None = None
    inclination: float | None = None
    inclination_err: float | None = None
    name: str = "galaxy"
    covariance: np.ndarray | None = None
    covariance_kind: str | None = None
    covariance_source: str = ""
    error_caution: str = ""
    v_err_geometry: np.ndarray | None = None

    def __post_init__(self):
        from .covariance import check_covariance

        self.radius, self.v, self.v_err = (np.asarray(a, float) for a in (self.radius, self.v, self.v_err))
        if self.v_err_geometry is not None and np.shape(self.v_err_geometry) != self.v.shape:
            raise InputError("v_err_geometry must have one value per point")
        if not self.radius.shape == self.v.shape == self.v_err.shape:
            raise InputError("radius, speed and error of a curve must have one value per point each")
        if self.covariance is not None:
            self.covariance = check_covariance(self.covariance, self.radius.size, "curve covariance", blank_rows=True)
            self.covariance_kind = self.covariance_kind or "given"
            if self.covariance_kind not in ("given", "geometry"):
                raise InputError("covariance_kind must be 'given' or 'geometry'")
        ok = np.isfinite(self.radius) & np.isfinite(self.v) & np.isfinite(self.v_err) & (self.v_err > 0) & (self.radius > 0)
        if ok.sum() < 3:
            raise InputError("a mass model needs at least three points with radius, speed and a positive error")
        self.radius, self.v, self.v_err = self.radius[ok], self.v[ok], self.v_err[ok]
        if self.covariance is not None:
            self.covariance = check_covariance(self.covariance[np.ix_(ok, ok)], where="curve covariance")
        elif self.v_err_geometry is not None:
            from .covariance import with_correlated_term

            geometry = np.nan_to_num(np.asarray(self.v_err_geometry, float)[ok])
            self.covariance = check_covariance(with_correlated_term(self.v_err, geometry), where="curve covariance")
            self.covariance_kind = "geometry"
            self.covariance_source = self.covariance_source or "geometry term fully correlated across the points"

    def total_err(self):
        """Per-point error shown with the curve: sqrt of the covariance's diagonal when there is one."""
        return np.sqrt(np.diag(self.covariance)) if self.covariance is not None else self.v_err


@dataclass
class Baryons:
    """Baryonic components (objects with ``v_squared(r)``): gas includes helium; disc and bulge for M/L = 1."""

    gas: object | None = None
    disc: object | None = None
    bulge: object | None = None
    disc_scale_length: float | None = None

    def squared(self, r):
        z = np.zeros_like(np.asarray(r, float))
        return {name: (getattr(self, name).v_squared(r) if getattr(self, name) is not None else z)
                for name in ("gas", "disc", "bulge")}


@dataclass
class MassModelSettings:
    """How to fit (module docstring). ``model``: one of :func:`.registry.model_names` (a registered halo,
    ``mond`` or ``none``). ``hold``: halo parameters held at a value instead of fitted, by name, in the
    parameter's unit (e.g. ``{"alpha": 0.17}`` for Einasto)."""

    model: str = "nfw"
    ml_mode: str = "lognormal"
    ml_disc: float = 0.5
    ml_bulge: float = 0.7
    ml_scatter_dex: float = 0.1
    disc_mode: str = "fit"
    fit_distance: bool = False
    fit_inclination: bool = False
    use_concentration_prior: bool = False
    a0_free: bool = False
    a0: float = A0
    interpolating: str = "simple"
    hold: dict = field(default_factory=dict)
    cosmology: str = "Planck18"
    overdensity: str = "200c"
    max_disc_fraction: float = 1.0

    @property
    def definition(self):
        """The halo definition (:class:`.definition.HaloDefinition`) of ``cosmology`` and ``overdensity``."""
        from .definition import HaloDefinition

        return HaloDefinition(self.cosmology, self.overdensity)

    def __post_init__(self):
        if self.model not in model_names():
            raise InputError(f"unknown model {self.model!r}; choose from {', '.join(model_names())}")
        halo = halo_class(self.model)
        declared = [p.name for p in halo.parameters] if halo is not None else []
        unknown = set(self.hold) - set(declared)
        if unknown:
            raise InputError(f"model {self.model!r} has no parameter(s) {sorted(unknown)} to hold"
                             + (f"; its parameters: {', '.join(declared)}" if declared else ""))
        if self.ml_mode not in ("fixed", "free", "lognormal"):
            raise InputError("ml_mode must be fixed, free or lognormal")
        if self.disc_mode not in ("fit", "maximum", "minimum"):
            raise InputError("disc_mode must be fit, maximum or minimum")
        if not 0 < self.max_disc_fraction <= 1:
            raise InputError(f"max_disc_fraction {self.max_disc_fraction} must be in (0, 1] (1: the baryons carry the "
                             "whole observed speed at 2.2 scale lengths; 0.85: Sackett 1997's maximal disc)")
        self.definition  # checks the cosmology and overdensity names


@dataclass
class MassModelResult:
    model: str
    parameters: dict
    errors: dict
    fixed: dict
    chi2: float
    n_points: int
    n_free: int
    derived: dict
    curves: dict
    samples: np.ndarray | None = None
    notes: list = field(default_factory=list)
    units: dict = field(default_factory=dict)  # unit of each fitted or fixed quantity (of the value inside log10_)
    cautions: list = field(default_factory=list)
    sampling: dict | None = None

    @property
    def bic(self):
        return self.chi2 + self.n_free * np.log(self.n_points)

    @property
    def reduced_chi2(self):
        return self.chi2 / max(self.n_points - self.n_free, 1)

    def plot(self, axes=None):
        """The decomposition (:func:`tiltedring.products.plotting.plot_mass_model`): the observed curve with
        its errors, each baryonic component, the halo and the total, and the residuals underneath."""
        from ..products.plotting import plot_mass_model

        return plot_mass_model(self, axes)


@dataclass
class _Unknowns:
    """The fitted quantities (names, start, lower and upper bounds, in order), the fixed ones that apply to the
    model (reported), and internal placeholders that do not (mass-to-light ratio of an absent component, a0 of a
    halo model; never reported)."""

    names: list = field(default_factory=list)
    start: list = field(default_factory=list)
    lower: list = field(default_factory=list)
    upper: list = field(default_factory=list)
    fixed: dict = field(default_factory=dict)
    unused: dict = field(default_factory=dict)
    maximum_disc: dict | None = None

    def add(self, name, start, lower, upper):
        self.names.append(name), self.start.append(start), self.lower.append(lower), self.upper.append(upper)


def _mass_to_light(out, data, baryons, settings) -> None:
    """Mass-to-light ratios of the components present: fixed, fitted, or set by the disc mode."""
    from .maximum_disc import maximum_disc

    present = {"ml_disc": baryons.disc is not None, "ml_bulge": baryons.bulge is not None}
    value = {"ml_disc": settings.ml_disc, "ml_bulge": settings.ml_bulge}
    if settings.disc_mode == "minimum":
        value.update(ml_disc=0.0, ml_bulge=0.0)
    elif settings.disc_mode == "maximum" and present["ml_disc"]:
        out.maximum_disc = maximum_disc(data, baryons, settings.ml_bulge, settings.max_disc_fraction)
        value["ml_disc"] = out.maximum_disc["ml_disc"]
    for key in ("ml_disc", "ml_bulge"):
        if not present[key]:
            out.unused[key] = 0.0
        elif settings.disc_mode in ("minimum", "maximum") or settings.ml_mode == "fixed":
            out.fixed[key] = value[key]
        else:
            out.add(f"log10_{key}", np.log10(value[key]), -2.0, 1.0)


def _unknowns(data, baryons, settings, halo) -> _Unknowns:
    """Halo parameters (as declared), then a0 (MOND), mass-to-light ratios, distance and inclination."""
    out = _Unknowns()
    for p in halo.parameters if halo is not None else ():
        if p.name in settings.hold:
            out.fixed[p.fitted_name] = p.to_fitted(settings.hold[p.name])
        else:
            out.add(p.fitted_name, p.start, *p.bounds)
    if settings.model == "mond" and settings.a0_free:
        out.add("log10_a0", np.log10(settings.a0), -11, -9)
    else:
        (out.fixed if settings.model == "mond" else out.unused)["log10_a0"] = np.log10(settings.a0)
    _mass_to_light(out, data, baryons, settings)
    if settings.fit_distance:
        if not data.distance or not data.distance_err:
            raise InputError("fitting the distance needs the distance and its error (--distance-error)")
        out.add("distance_factor", 1.0, 0.3, 3.0)
    if settings.fit_inclination:
        if not data.inclination or not data.inclination_err:
            raise InputError("fitting the inclination needs the inclination and its error (--inclination, "
                             "--inclination-error, or a curve.ecsv with inclination columns)")
        if data.covariance_kind == "given":
            raise InputError("the curve's covariance already holds the inclination's error: fitting the inclination "
                             "too would count it twice; drop the covariance (--no-covariance) or the inclination fit")
        out.add("inclination", data.inclination, 5.0, 89.0)
    return out


class _Problem:
    """The model curve and the residuals (data and priors) of one fit, as functions of the fitted vector."""

    def __init__(self, data, baryons, settings, halo, unknowns):
        from .covariance import Whitener

        self.data, self.settings, self.halo, self.unknowns = data, settings, halo, unknowns
        self.baryon_sq = baryons.squared(data.radius)
        self.definition = settings.definition
        use_cov = data.covariance is not None and "inclination" not in unknowns.names
        self.whiten = Whitener(data.covariance) if use_cov else None

    def unpack(self, q) -> dict:
        values = {**self.unknowns.unused, **self.unknowns.fixed}
        values.update(zip(self.unknowns.names, q))
        for key in ("ml_disc", "ml_bulge"):
            if f"log10_{key}" in values:
                values[key] = 10 ** values[f"log10_{key}"]
        return values

    def halo_at(self, values):
        return self.halo.from_fitted(values, self.definition)

    def model_speed(self, values):
        """(v_model, signed baryonic v^2, halo v^2) at the data's radii."""
        sq = self.baryon_sq
        f_d = values.get("distance_factor", 1.0)
        v_bar2 = f_d * (values["ml_disc"] * sq["disc"] + values["ml_bulge"] * sq["bulge"] + sq["gas"])
        r = self.data.radius * f_d
        if self.settings.model == "mond":
            speed = mond_speed(v_bar2, r, 10 ** values["log10_a0"], self.settings.interpolating)
            return speed, v_bar2, np.zeros_like(r)
        v_halo2 = self.halo_at(values).v_squared(r) if self.halo is not None else np.zeros_like(r)
        return np.sqrt(np.clip(v_bar2 + v_halo2, 0, None)), v_bar2, v_halo2

    def data_residuals(self, values):
        """Whitened data residuals: L^-1 (v_model - v_obs) with the covariance, else (v_model - v_obs s) / (e s),
        s = sin(i) / sin(i_fit) with a fitted inclination."""
        data = self.data
        v_model, _, _ = self.model_speed(values)
        if self.whiten is not None:
            return self.whiten(v_model - data.v)
        stretch = 1.0
        if "inclination" in values:
            stretch = np.sin(np.radians(data.inclination)) / np.sin(np.radians(values["inclination"]))
        return (v_model - data.v * stretch) / (data.v_err * stretch)

    def residuals(self, q):
        data, settings = self.data, self.settings
        values = self.unpack(q)
        out = [self.data_residuals(values)]
        if settings.ml_mode == "lognormal":
            for key, centre in (("ml_disc", settings.ml_disc), ("ml_bulge", settings.ml_bulge)):
                if f"log10_{key}" in values:
                    out.append([(values[f"log10_{key}"] - np.log10(centre)) / settings.ml_scatter_dex])
        if "distance_factor" in values:
            out.append([(values["distance_factor"] - 1.0) / (data.distance_err / data.distance)])
        if "inclination" in values:
            out.append([(values["inclination"] - data.inclination) / data.inclination_err])
        if self.halo is not None and settings.use_concentration_prior:
            relation = self.halo_at(values).relation_residuals(values)
            if relation:
                out.append(relation)
        return np.concatenate([np.atleast_1d(np.asarray(o, float)) for o in out])


def _least_squares(problem) -> tuple:
    """Best fitted vector and its errors (from the Jacobian); several starts for a halo's shallow valleys."""
    unknowns = problem.unknowns
    if not unknowns.names:
        return np.array([]), np.array([])
    starts = [np.array(unknowns.start)]
    if problem.halo is not None:
        for shift in (-1.0, 1.0):
            s = np.array(unknowns.start, float)
            s[0] += shift
            starts.append(np.clip(s, np.array(unknowns.lower) + 1e-6, np.array(unknowns.upper) - 1e-6))
    best = None
    for s in starts:
        sol = least_squares(problem.residuals, s, bounds=(unknowns.lower, unknowns.upper), x_scale="jac", max_nfev=2000)
        if best is None or sol.cost < best.cost:
            best = sol
    try:
        cov = np.linalg.inv(best.jac.T @ best.jac)
        err = np.sqrt(np.clip(np.diag(cov), 0, None))
    except np.linalg.LinAlgError:
        err = np.full(len(best.x), np.nan)
    return best.x, err


def _check_baryons(baryons, settings) -> list:
    """Refuse a model that means nothing without baryons; caution for a halo carrying the curve alone."""
    if any(getattr(baryons, name) is not None for name in ("gas", "disc", "bulge")):
        return []
    if settings.model in ("mond", "none"):
        what = "MOND predicts the curve from the baryons" if settings.model == "mond" else "the baryons alone are fitted"
        raise InputError(f"model {settings.model!r} needs baryonic components ({what}); give --components, --gas or "
                         "a SPARC-format file, or fit a halo")
    return ["no baryonic component given: the halo alone carries the curve, so its parameters absorb the stars and "
            "gas; give --components or --gas for a decomposition"]


def fit_mass_model(data: CurveData, baryons: Baryons, settings: MassModelSettings = MassModelSettings(),
                   sample: bool = False, n_walkers: int = 32, n_steps: int = 1500, seed: int = 0,
                   quiet: bool = True) -> MassModelResult:
    """Fit one model (module docstring); with ``sample`` also run emcee (optional dependency)."""
    from .cautions import fit_cautions

    cautions = _check_baryons(baryons, settings)
    halo = halo_class(settings.model)
    unknowns = _unknowns(data, baryons, settings, halo)
    names = unknowns.names
    problem = _Problem(data, baryons, settings, halo, unknowns)
    n_data = len(data.radius)
    q, err = _least_squares(problem)
    values = problem.unpack(q)
    chi2 = float(np.sum(problem.residuals(q)[:n_data] ** 2))
    errors = dict(zip(names, err))
    samples = sampling = None
    if sample and names:
        from .sampling import sample_posterior

        samples, sampling = sample_posterior(problem.residuals, q, err, unknowns.lower, unknowns.upper, names,
                                             n_walkers, n_steps, seed, quiet)
        errors = dict(zip(names, np.std(samples, axis=0)))
    curves = _curves(problem, values)
    derived = _derived(problem, values, baryons, curves)
    cautions += fit_cautions(data, problem, values, unknowns, sampling)
    _warn(cautions)
    return MassModelResult(settings.model, {k: float(values[k]) for k in names}, {k: float(v) for k, v in errors.items()},
                           {k: float(v) for k, v in unknowns.fixed.items()}, chi2, n_data, len(names), derived, curves,
                           samples, notes=_notes(data, problem), units=_units(halo, [*names, *unknowns.fixed]),
                           cautions=cautions, sampling=sampling)


def _warn(cautions) -> None:
    import warnings

    from ..errors import FitCaution

    for text in cautions:
        warnings.warn(text, FitCaution, stacklevel=3)


def _notes(data, problem) -> list:
    """How the curve's errors entered the fit."""
    if problem.whiten is not None:
        return [f"chi2 with the curve's covariance ({data.covariance_source or data.covariance_kind})"]
    if data.covariance is not None:
        return ["inclination fitted as a nuisance parameter; the curve's fully correlated geometry term left out of "
                "chi2 (it is what the nuisance parameter carries), independent errors only"]
    return ["chi2 with independent errors per point"]


def _curves(problem, values) -> dict:
    """Radius, observed speed and error, model, baryons, halo and each component (km/s) at the fitted values."""
    data = problem.data
    v_model, v_bar2, v_halo2 = problem.model_speed(values)
    f_d = values.get("distance_factor", 1.0)
    curves = {"radius": data.radius * f_d, "v_obs": data.v, "v_err": data.total_err(), "v_model": v_model,
              "v_baryon": np.sign(v_bar2) * np.sqrt(np.abs(v_bar2)),
              "v_halo": np.sqrt(np.clip(v_halo2, 0, None))}
    for name in ("gas", "disc", "bulge"):
        scale = 1.0 if name == "gas" else values[f"ml_{name}"]
        v2 = f_d * scale * problem.baryon_sq[name]
        curves[f"v_{name}"] = np.sign(v2) * np.sqrt(np.abs(v2))
    return curves


def _units(halo, fitted_names) -> dict:
    """Unit of each fitted or fixed quantity (for ``log10_<name>``: the unit of the value inside the log)."""
    declared = {p.fitted_name: p.unit.to_string() for p in (halo.parameters if halo is not None else ())}
    return {name: declared.get(name, _UNITS.get(name.removeprefix("log10_"), "")) for name in fitted_names}


def _derived(problem, values, baryons, curves) -> dict:
    """Halo mass and radius at the chosen overdensity (and M200 at 200c), dark-to-baryonic mass inside the last
    radius, the baryonic share of v at 2.2 disc scale lengths, the maximum disc's reference radius."""
    r_last = curves["radius"][-1]
    m_bar = max(curves["v_baryon"][-1], 0.0) ** 2 * r_last / G
    out = {"last_radius_kpc": float(r_last), "baryonic_mass_inside_last_radius": float(m_bar)}
    if problem.halo is not None:
        halo = problem.halo_at(values)
        m_dm = float(halo.enclosed_mass(r_last))
        out["dark_mass_inside_last_radius"] = m_dm
        out["dark_to_baryonic_inside_last_radius"] = m_dm / m_bar if m_bar > 0 else None
        out.update(halo_definition=problem.definition.describe(), overdensity=problem.definition.overdensity,
                   halo_mass=float(halo.halo_mass), halo_radius_kpc=float(halo.halo_radius), m200=float(halo.m200))
    if baryons.disc_scale_length:
        r22 = 2.2 * baryons.disc_scale_length * values.get("distance_factor", 1.0)
        vb = np.interp(r22, curves["radius"], curves["v_baryon"])
        vm = np.interp(r22, curves["radius"], curves["v_model"])
        out["baryon_speed_fraction_at_2.2h"] = float(vb / vm) if vm > 0 else None
    if problem.unknowns.maximum_disc:
        from .maximum_disc import DEFINITION

        md = problem.unknowns.maximum_disc
        out["maximum_disc"] = {"definition": DEFINITION, "reference_radius_kpc": md["radius_kpc"],
                               "reference_radius_from": md["how"], "fraction": md["fraction"], "ml_disc": md["ml_disc"]}
    return out
