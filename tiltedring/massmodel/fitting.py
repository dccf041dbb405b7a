"""Fitting a rotation curve with baryons plus a dark halo, or with MOND.

    v_model^2(r) = f_D [Y_disc v_disc^2 + Y_bulge v_bulge^2 + v_gas |v_gas|](r) + v_halo^2(f_D r)

(or the MOND speed of the baryonic v^2). Baryonic curves are given for mass-to-light ratio 1 at the
nominal distance; a distance factor f_D = D / D_nominal stretches radii by f_D and baryonic v^2 by
f_D (masses from light and gas maps scale as D^2); an inclination i rescales the observed speeds and
errors by sin(i_0) / sin(i). Both are optional nuisance parameters with Gaussian priors.

Mass-to-light ratios are fixed, free, or free with a log-normal prior (default 0.5 for discs and
0.7 for bulges at 3.6 micron with 0.1 dex scatter: McGaugh & Schombert 2014; from memory).
``disc_mode`` ``maximum`` fixes Y_disc at the largest value the curve allows (the baryons alone
never exceed the observed speed); ``minimum`` sets the stellar mass to zero.

Weighted least squares (scipy, bounds, priors as extra residuals) gives the best fit and the
covariance; emcee (optional) samples the posterior. Model comparison: chi^2, reduced chi^2 and
BIC = chi^2 + k ln n (Schwarz 1978).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from ..errors import InputError
from .components import G
from .halos import HALOS, NFW, concentration_prior
from .relations import A0, mond_speed

__all__ = ["CurveData", "Baryons", "MassModelSettings", "MassModelResult", "fit_mass_model", "MODELS"]

MODELS = ("isothermal", "nfw", "burkert", "einasto", "mond", "none")


@dataclass
class CurveData:
    """Observed curve: radius (kpc), speed and error (km/s); optional distance and inclination with errors."""

    radius: np.ndarray
    v: np.ndarray
    v_err: np.ndarray
    distance: float | None = None
    distance_err: float | None = None
    inclination: float | None = None
    inclination_err: float | None = None
    name: str = "galaxy"

    def __post_init__(self):
        self.radius, self.v, self.v_err = (np.asarray(a, float) for a in (self.radius, self.v, self.v_err))
        ok = np.isfinite(self.radius) & np.isfinite(self.v) & np.isfinite(self.v_err) & (self.v_err > 0) & (self.radius > 0)
        if ok.sum() < 3:
            raise InputError("a mass model needs at least three points with radius, speed and a positive error")
        self.radius, self.v, self.v_err = self.radius[ok], self.v[ok], self.v_err[ok]


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
    """How to fit (module docstring). ``model``: one of :data:`MODELS`."""

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
    einasto_alpha: float | None = None

    def __post_init__(self):
        if self.model not in MODELS:
            raise InputError(f"unknown model {self.model!r}; choose from {', '.join(MODELS)}")
        if self.ml_mode not in ("fixed", "free", "lognormal"):
            raise InputError("ml_mode must be fixed, free or lognormal")
        if self.disc_mode not in ("fit", "maximum", "minimum"):
            raise InputError("disc_mode must be fit, maximum or minimum")


# name, start, lower, upper, unit: halo parameters in log10 where they are scales
_HALO_PARAMETERS = {
    "isothermal": [("log10_rho0", 7.5, 4.0, 11.0, "M_sun/kpc^3"), ("log10_r_core", 0.3, -2.0, 2.5, "kpc")],
    "nfw": [("log10_v200", 2.0, 0.7, 3.3, "km/s"), ("log10_concentration", 1.0, 0.0, 1.7, "")],
    "burkert": [("log10_rho0", 7.5, 4.0, 11.0, "M_sun/kpc^3"), ("log10_r0", 0.5, -2.0, 2.5, "kpc")],
    "einasto": [("log10_rho_2", 6.5, 3.0, 10.0, "M_sun/kpc^3"), ("log10_r_2", 1.0, -1.5, 2.5, "kpc"),
                ("alpha", 0.17, 0.05, 1.0, "")],
}


def _halo(model, values):
    if model == "nfw":
        return NFW(10 ** values["log10_v200"], 10 ** values["log10_concentration"])
    if model == "einasto":
        return HALOS["einasto"](10 ** values["log10_rho_2"], 10 ** values["log10_r_2"], values["alpha"])
    names = [p[0] for p in _HALO_PARAMETERS[model]]
    return HALOS[model](*(10 ** values[n] for n in names))


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

    @property
    def bic(self):
        return self.chi2 + self.n_free * np.log(self.n_points)

    @property
    def reduced_chi2(self):
        return self.chi2 / max(self.n_points - self.n_free, 1)


def _max_disc(data, baryons, ml_bulge):
    sq = baryons.squared(data.radius)
    ok = sq["disc"] > 0
    if not ok.any():
        return 0.0
    allowed = (data.v[ok] ** 2 - sq["gas"][ok] - ml_bulge * sq["bulge"][ok]) / sq["disc"][ok]
    return float(max(np.min(allowed), 0.0))


def fit_mass_model(data: CurveData, baryons: Baryons, settings: MassModelSettings = MassModelSettings(),
                   sample: bool = False, n_walkers: int = 32, n_steps: int = 1500, seed: int = 0,
                   quiet: bool = True) -> MassModelResult:
    """Fit one model (module docstring); with ``sample`` also run emcee (optional dependency)."""
    names, start, lower, upper = [], [], [], []
    for spec in _HALO_PARAMETERS.get(settings.model, []):
        if spec[0] == "alpha" and settings.einasto_alpha is not None:
            continue
        names.append(spec[0]), start.append(spec[1]), lower.append(spec[2]), upper.append(spec[3])
    fixed = {}
    if settings.model == "einasto" and settings.einasto_alpha is not None:
        fixed["alpha"] = settings.einasto_alpha
    if settings.model == "mond" and settings.a0_free:
        names.append("log10_a0"), start.append(np.log10(settings.a0)), lower.append(-11), upper.append(-9)
    else:
        fixed["log10_a0"] = np.log10(settings.a0)
    ml = {"ml_disc": settings.ml_disc, "ml_bulge": settings.ml_bulge}
    has = {"ml_disc": baryons.disc is not None, "ml_bulge": baryons.bulge is not None}
    if settings.disc_mode == "minimum":
        fixed.update(ml_disc=0.0, ml_bulge=0.0)
    elif settings.disc_mode == "maximum":
        fixed["ml_bulge"] = settings.ml_bulge
        fixed["ml_disc"] = _max_disc(data, baryons, settings.ml_bulge)
    for key in ("ml_disc", "ml_bulge"):
        if key in fixed:
            continue
        if settings.ml_mode == "fixed" or not has[key]:
            fixed[key] = ml[key]
        else:
            names.append(f"log10_{key}"), start.append(np.log10(ml[key])), lower.append(-2.0), upper.append(1.0)
    if settings.fit_distance:
        if not data.distance or not data.distance_err:
            raise InputError("fitting the distance needs the distance and its error")
        names.append("distance_factor"), start.append(1.0), lower.append(0.3), upper.append(3.0)
    if settings.fit_inclination:
        if not data.inclination or not data.inclination_err:
            raise InputError("fitting the inclination needs the inclination and its error")
        names.append("inclination"), start.append(data.inclination), lower.append(5.0), upper.append(89.0)
    baryon_sq = baryons.squared(data.radius)
    n_data = len(data.radius)

    def unpack(q):
        values = dict(fixed)
        values.update(zip(names, q))
        for key in ("ml_disc", "ml_bulge"):
            if f"log10_{key}" in values:
                values[key] = 10 ** values[f"log10_{key}"]
        return values

    def model_speed(values, radius_scale=1.0, sq=baryon_sq, radius=data.radius):
        f_d = values.get("distance_factor", 1.0) * radius_scale
        v_bar2 = f_d * (values["ml_disc"] * sq["disc"] + values["ml_bulge"] * sq["bulge"] + sq["gas"])
        r = radius * f_d
        if settings.model == "mond":
            return mond_speed(v_bar2, r, 10 ** values["log10_a0"], settings.interpolating), v_bar2, np.zeros_like(r)
        v_halo2 = _halo(settings.model, values).v_squared(r) if settings.model in HALOS else np.zeros_like(r)
        return np.sqrt(np.clip(v_bar2 + v_halo2, 0, None)), v_bar2, v_halo2

    def residuals(q):
        values = unpack(q)
        stretch = 1.0
        if "inclination" in values:
            stretch = np.sin(np.radians(data.inclination)) / np.sin(np.radians(values["inclination"]))
        v_model, _, _ = model_speed(values)
        out = [(v_model - data.v * stretch) / (data.v_err * stretch)]
        if settings.ml_mode == "lognormal":
            for key, centre in (("ml_disc", settings.ml_disc), ("ml_bulge", settings.ml_bulge)):
                if f"log10_{key}" in values:
                    out.append([(values[f"log10_{key}"] - np.log10(centre)) / settings.ml_scatter_dex])
        if "distance_factor" in values:
            out.append([(values["distance_factor"] - 1.0) / (data.distance_err / data.distance)])
        if "inclination" in values:
            out.append([(values["inclination"] - data.inclination) / data.inclination_err])
        if settings.model == "nfw" and settings.use_concentration_prior:
            halo = _halo("nfw", values)
            mean, scatter = concentration_prior(halo.m200)
            out.append([(values["log10_concentration"] - mean) / scatter])
        return np.concatenate([np.atleast_1d(np.asarray(o, float)) for o in out])

    best = None
    if names:
        starts = [np.array(start)]
        if settings.model in HALOS:  # a few starting points: halo fits have shallow valleys
            for shift in (-1.0, 1.0):
                s = np.array(start, float)
                s[0] += shift
                starts.append(np.clip(s, np.array(lower) + 1e-6, np.array(upper) - 1e-6))
        for s in starts:
            sol = least_squares(residuals, s, bounds=(lower, upper), x_scale="jac", max_nfev=2000)
            if best is None or sol.cost < best.cost:
                best = sol
        q = best.x
        try:
            cov = np.linalg.inv(best.jac.T @ best.jac)
            err = np.sqrt(np.clip(np.diag(cov), 0, None))
        except np.linalg.LinAlgError:
            err = np.full(len(q), np.nan)
    else:
        q, err = np.array([]), np.array([])
    values = unpack(q)
    chi2 = float(np.sum(residuals(q)[:n_data] ** 2))
    v_model, v_bar2, v_halo2 = model_speed(values)
    errors = dict(zip(names, err))
    samples = None
    if sample and names:
        samples = _sample(residuals, q, err, lower, upper, n_walkers, n_steps, seed, quiet)
        errors = dict(zip(names, np.std(samples, axis=0)))
    f_d = values.get("distance_factor", 1.0)
    curves = {"radius": data.radius * f_d, "v_obs": data.v, "v_err": data.v_err, "v_model": v_model,
              "v_baryon": np.sign(v_bar2) * np.sqrt(np.abs(v_bar2)),
              "v_halo": np.sqrt(np.clip(v_halo2, 0, None))}
    for name in ("gas", "disc", "bulge"):
        scale = 1.0 if name == "gas" else values[f"ml_{name}"]
        v2 = f_d * scale * baryon_sq[name]
        curves[f"v_{name}"] = np.sign(v2) * np.sqrt(np.abs(v2))
    derived = _derived(settings.model, values, data, baryons, curves)
    return MassModelResult(settings.model, {k: float(values[k]) for k in names}, {k: float(v) for k, v in errors.items()},
                           {k: float(v) for k, v in fixed.items()}, chi2, n_data, len(names), derived, curves, samples)


def _sample(residuals, q, err, lower, upper, n_walkers, n_steps, seed, quiet):
    try:
        import emcee
    except ImportError:
        raise InputError("posterior sampling needs emcee: pip install emcee") from None
    from ..fitting.resampling import Progress

    lower, upper = np.asarray(lower), np.asarray(upper)

    def log_prob(p):
        if np.any(p <= lower) or np.any(p >= upper):
            return -np.inf
        return -0.5 * float(np.sum(residuals(p) ** 2))

    rng = np.random.default_rng(seed)
    spread = np.where(np.isfinite(err) & (err > 0), err, 0.01) * 0.1
    p0 = np.clip(q + spread * rng.standard_normal((n_walkers, len(q))), lower + 1e-9, upper - 1e-9)
    sampler = emcee.EnsembleSampler(n_walkers, len(q), log_prob)
    sampler.random_state = np.random.mtrand.RandomState(seed).get_state()  # repeatable chains
    progress = Progress("sampling posterior", n_steps, quiet=quiet)
    for k, _ in enumerate(sampler.sample(p0, iterations=n_steps), start=1):
        progress.update(k)
    progress.close()
    return sampler.get_chain(discard=n_steps // 3, flat=True)


def _derived(model, values, data, baryons, curves) -> dict:
    """M200, dark-to-baryonic mass inside the last radius, baryonic share of v at 2.2 disc scale lengths."""
    r_last = curves["radius"][-1]
    m_bar = max(curves["v_baryon"][-1], 0.0) ** 2 * r_last / G
    out = {"last_radius_kpc": float(r_last), "baryonic_mass_inside_last_radius": float(m_bar)}
    if model in HALOS:
        halo = _halo(model, values)
        m_dm = float(halo.enclosed_mass(r_last))
        out["dark_mass_inside_last_radius"] = m_dm
        out["dark_to_baryonic_inside_last_radius"] = m_dm / m_bar if m_bar > 0 else None
        out["m200"] = float(_m200(halo))
    if baryons.disc_scale_length:
        r22 = 2.2 * baryons.disc_scale_length * values.get("distance_factor", 1.0)
        vb = np.interp(r22, curves["radius"], curves["v_baryon"])
        vm = np.interp(r22, curves["radius"], curves["v_model"])
        out["baryon_speed_fraction_at_2.2h"] = float(vb / vm) if vm > 0 else None
    return out


def _m200(halo):
    """Mass inside the radius where the mean density is 200 times critical (H0 = 70 km/s/Mpc)."""
    if isinstance(halo, NFW):
        return halo.m200
    from scipy.optimize import brentq

    from .halos import H0_KM_S_KPC

    rho_crit = 3 * H0_KM_S_KPC**2 / (8 * np.pi * G)

    def excess(r):
        return halo.enclosed_mass(r) / (4 / 3 * np.pi * r**3) - 200 * rho_crit

    try:
        return halo.enclosed_mass(brentq(excess, 1e-3, 1e4))
    except ValueError:
        return np.nan
