"""The ``tiltedring`` command: a thin layer over the same API a notebook calls.

Exit codes: 0 success, 2 unusable input or options (the message says what to fix),
1 an unexpected failure (and, for ``batch``, one or more galaxies failed: see the catalogue).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT = 0, 1, 2

FIT_EXAMPLES = """examples:
  tiltedring fit demo_fields/ashgrove_velocity.fits --out ashgrove_fit
  tiltedring fit map.fits --intensity-map mom0.fits --error-map emap.fits --ring-width 0.5beam --out fit1
  tiltedring fit map.fits --ring-width 4pix --spacing logarithmic --max-radius 3arcmin --out fit2
  tiltedring fit map.fits --inclination 62 --fix inclination --half receding --out fit3
  tiltedring fit map.fits --config run.toml --out fit4
  tiltedring fit cube.fits --exclude-velocities=-60:5 --out fit5     # a spectral cube: maps made into fit5/maps

A TOML run file holds the same options (underscores or dashes): input options in [inputs],
fit options in a [fit] table with starting values in [fit.initial], and the curve's in [curve]:

  [inputs]
  intensity_map = "mom0.fits"
  [fit]
  ring_width = "0.5beam"
  azimuth_weight = "cos-squared"
  fixed = ["v_systemic"]
  [fit.initial]
  v_systemic = 1450.0
  [curve]
  distance = 9.5

Options given on the command line win over the run file.
"""

GROUP_TITLES = {  # help sections of the generated options, in this order
    "inputs": "inputs",
    "rings": "rings",
    "fitting": "fitting",
    "curve": "the rotation-curve product (curve.ecsv)",
    "initial": "starting values (used instead of the first guess)",
    "cube": "from a spectral cube (when the input is a cube: how its velocity maps are made)",
}
_ARGUMENT_TYPES = {float: float, int: int}


def _common(verbose: str | None = None) -> argparse.ArgumentParser:
    """-q for every command; -v only where it prints something more (``verbose``: what it prints)."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-q", "--quiet", action="store_true", help="print errors only")
    if verbose:
        common.add_argument("-v", "--verbose", action="store_true", help=verbose)
    return common


def add_job_options(parser: argparse.ArgumentParser, per_galaxy_maps: bool = True, specs: dict | None = None) -> None:
    """Add every declared job option (:func:`tiltedring.jobs.job_specs`) to ``parser``, grouped.

    Nothing is listed here: flags, types, choices, metavars and help come from the fields of the
    option dataclasses. Every default is None ("not given"), so a run file or a manifest row can
    supply the value and the dataclass default applies otherwise. ``per_galaxy_maps=False`` leaves
    out the map files (batch: they are manifest columns). ``specs``: another set of options (name -> spec).
    """
    from .jobs import job_specs

    specs = job_specs() if specs is None else specs
    groups = {key: parser.add_argument_group(title) for key, title in GROUP_TITLES.items()
              if any(spec.group == key for spec in specs.values())}
    for spec in specs.values():
        if not spec.command_line or (spec.path and not per_galaxy_maps):
            continue
        if spec.group not in groups:
            groups[spec.group] = parser.add_argument_group(spec.group or "other options")
        kwargs = {"dest": spec.name, "default": None, "help": spec.help_text()}
        if spec.form == "switch":
            kwargs["action"] = "store_false" if spec.default else "store_true"
        elif spec.form == "names":
            kwargs.update(action="append", metavar=spec.metavar)
        elif spec.form == "value":
            kwargs.update(type=_ARGUMENT_TYPES.get(spec.kind, str), metavar=spec.metavar, choices=spec.choices)
        else:  # comma-separated numbers: read by option_fields.coerce, whose message names the flag
            kwargs.update(metavar=spec.metavar)
        groups[spec.group].add_argument(spec.flag, **kwargs)


def job_values(args, specs: dict | None = None) -> dict:
    """The job options given on the command line, by their flat names, checked (errors name the flag)."""
    from .jobs import job_specs
    from .pipeline.option_fields import coerce

    specs = job_specs() if specs is None else specs
    return {name: coerce(spec, getattr(args, name), spec.flag) for name, spec in specs.items()
            if spec.command_line and getattr(args, name, None) is not None}


def _fit_parser(sub):
    p = sub.add_parser("fit", parents=[_common("also print the ring table: radius, position angle, inclination, "
                                               "v_rotation with its error, flags")],
                       help="fit a tilted-ring model to a velocity map",
                       description="Fit a tilted-ring model to a 2-D velocity (moment-1) map and write the ring "
                                   "table, model and residual maps and a run record into --out.",
                       epilog=FIT_EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("map", help="velocity map (FITS, BUNIT in km/s or m/s), or a spectral cube (maps are made first, "
                               "into OUT/maps)")
    p.add_argument("--out", required=True, help="output folder (refused if it exists and is not empty)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace an existing output folder (its old files are removed once the new ones are written)")
    p.add_argument("--config", help="TOML run file with [inputs], [fit], [fit.initial] and [curve] tables")
    p.add_argument("--no-report", action="store_true", help="skip report.pdf (faster, for scripted runs)")
    p.add_argument("--png", action="store_true", help="also write the report pages as PNG files")
    add_job_options(p)
    p.set_defaults(run=run_fit)
    return p


MASS_EXAMPLES = """examples:
  tiltedring massmodel fit1/curve.ecsv --components baryons.ecsv --out mass1
  tiltedring massmodel galaxy_rotmod.dat --models nfw,burkert,mond --ml-mode free --out mass2
  tiltedring massmodel table.csv --radius-column R --velocity-column V --error-column eV --disc-mode maximum --out m3
  tiltedring massmodel galaxy_rotmod.dat --fit-inclination --inclination 73 --inclination-error 3 --out m4

The curve is the fit's curve.ecsv (run the fit with --distance so radii are in kpc), any table with
radius (kpc), speed and error columns you name, or a SPARC *_rotmod.dat file (which carries its own
baryonic curves). --components names a table of baryonic speed curves for M/L = 1 (columns v_gas with
helium, v_disc, v_bulge; radius_kpc). Errors: the curve's covariance (--covariance, or
<curve>_covariance.ecsv/.fits beside it), else its independent error parts with its geometry term
fully correlated across rings, or (--fit-inclination, --distance-error) inclination and distance as
nuisance parameters with the random errors independent. Writes models.ecsv (chi2, BIC per model),
parameters.ecsv (value, error and unit of each parameter that applies), components_<model>.ecsv
(kpc, km/s), massmodel.json (with cautions) and decomposition_<model>.png (the curve, each component,
halo and total, residuals underneath).
"""


def _mass_parser(sub):
    p = sub.add_parser("massmodel", parents=[_common()], help="fit baryons + halo or MOND to a rotation curve",
                       description="Fit mass models (pseudo-isothermal, NFW, Burkert, Einasto halos; MOND) to a "
                                   "rotation curve.", epilog=MASS_EXAMPLES,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("curve", help="curve.ecsv, a table, or a SPARC *_rotmod.dat file")
    p.add_argument("--out", required=True, help="output folder (refused if it exists and is not empty)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    from .massmodel import model_names

    p.add_argument("--models", help=f"comma-separated: {', '.join(model_names())} (default: all but none; mond "
                                    "only with baryonic components)")
    p.add_argument("--components", help="table of baryonic speed curves for M/L = 1")
    p.add_argument("--gas", help="gas.ecsv written by 'tiltedring fit' (HI surface density with helium): "
                                 "its thin-disc speed becomes the gas component")
    p.add_argument("--radius-column", metavar="NAME",
                   help="column of radii in kpc, for a table that is not a curve.ecsv (default radius_kpc)")
    p.add_argument("--velocity-column", metavar="NAME",
                   help="column of rotation speeds in km/s (default v_circular when present, else v_rotation)")
    p.add_argument("--error-column", metavar="NAME", help="column of speed errors in km/s (default the error column of the speed used)")
    p.add_argument("--ml-mode", choices=("fixed", "free", "lognormal"), default="lognormal",
                   help="mass-to-light ratios: fixed, free, or free with a log-normal prior (default)")
    p.add_argument("--ml-disc", type=float, default=0.5, help="disc M/L (3.6 micron; default 0.5)")
    p.add_argument("--ml-bulge", type=float, default=0.7, help="bulge M/L (default 0.7)")
    p.add_argument("--disc-mode", choices=("fit", "maximum", "minimum"), default="fit",
                   help="stellar disc: M/L as --ml-mode says (fit, the default), the largest M/L the baryons "
                        "allow without exceeding the observed speed (maximum) or no stellar mass (minimum)")
    p.add_argument("--concentration-prior", action="store_true", help="NFW: Dutton & Maccio 2014 c(M) prior")
    p.add_argument("--a0-free", action="store_true", help="MOND: fit a0 too")
    p.add_argument("--interpolating", choices=("simple", "standard"), default="simple", help="MOND function")
    p.add_argument("--disc-scale-length", type=float,
                   help="kpc: the maximum disc and the baryonic share of v are taken at 2.2 scale lengths (default for "
                        "the maximum disc: where the disc's speed curve peaks)")
    p.add_argument("--max-disc-fraction", type=float, default=1.0,
                   help="maximum disc: share of the observed speed the baryons carry at 2.2 scale lengths (default 1; "
                        "0.85 is Sackett 1997's maximal disc)")
    p.add_argument("--covariance", metavar="FILE",
                   help="covariance of the curve's speeds (ECSV columns ring_0..ring_N-1 or a FITS image, km2/s2); "
                        "default: <curve>_covariance.ecsv or .fits beside the curve when there is one")
    p.add_argument("--no-covariance", action="store_true", help="ignore a covariance file beside the curve")
    p.add_argument("--fit-inclination", action="store_true",
                   help="inclination as a nuisance parameter (Gaussian prior: the curve's inclination and its error, "
                        "or --inclination/--inclination-error); speeds scale by sin(i)/sin(i_fit)")
    p.add_argument("--inclination", type=float, metavar="DEG", help="inclination of the curve (overrides the curve's)")
    p.add_argument("--inclination-error", type=float, metavar="DEG", help="its error (overrides the curve's)")
    p.add_argument("--distance-error", type=float, metavar="MPC",
                   help="distance as a nuisance parameter with this Gaussian error (radii scale by D_fit/D)")
    p.add_argument("--cosmology", default="Planck18",
                   help="astropy cosmology by name for the halo's critical density and H0 (default Planck18)")
    p.add_argument("--overdensity", default="200c",
                   help="halo radius and mass at this overdensity: 200c (default), 500c, 200m, vir (Bryan & Norman 1998)")
    p.add_argument("--sample", action="store_true", help="sample the posterior with emcee (optional dependency)")
    p.add_argument("--steps", type=int, default=1500, help="emcee steps per walker")
    p.add_argument("--seed", type=int, default=0, help="seed of the posterior sampling (default 0)")
    p.set_defaults(run=run_massmodel)


def _unit_note(name: str, units: dict) -> str:
    """`` (km / s)`` after a parameter, `` (log10 of km / s)`` after a log10_ one; nothing when unitless."""
    unit = units.get(name, "")
    if not unit:
        return ""
    return f" (log10 of {unit})" if name.startswith("log10_") else f" ({unit})"


def _check_mass_arguments(args) -> list:
    """``massmodel``'s numbers checked against their ranges before any work; returns the model names."""
    from .errors import InputError
    from .massmodel import MassModelSettings, model_names
    from .pipeline.option_fields import Bounds, check_range

    check_range(args.ml_disc, Bounds(minimum=0, maximum=50, why="mass-to-light ratio"), "--ml-disc", 0.5)
    check_range(args.ml_bulge, Bounds(minimum=0, maximum=50, why="mass-to-light ratio"), "--ml-bulge", 0.7)
    if args.disc_scale_length is not None:
        check_range(args.disc_scale_length, Bounds(above=0, maximum=1000, why="kpc"), "--disc-scale-length")
    check_range(args.max_disc_fraction, Bounds(above=0, maximum=1, why="share of the observed speed"),
                "--max-disc-fraction", 1.0)
    if args.inclination is not None:
        check_range(args.inclination, Bounds(above=0, maximum=90, why="degrees"), "--inclination")
    if args.inclination_error is not None:
        check_range(args.inclination_error, Bounds(above=0, maximum=45, why="degrees"), "--inclination-error")
    if args.distance_error is not None:
        check_range(args.distance_error, Bounds(above=0, maximum=1e4, why="Mpc"), "--distance-error")
    if args.covariance and args.no_covariance:
        raise InputError("--covariance and --no-covariance contradict each other; give one")
    check_range(args.seed, Bounds(minimum=0, maximum=2**32 - 1), "--seed", 0)
    if args.sample:
        check_range(args.steps, Bounds(minimum=10, maximum=10**6, why="emcee steps per walker"), "--steps", 1500)
    models = list(dict.fromkeys(m.strip() for m in (args.models or "").split(",") if m.strip()))
    if args.models is None:
        models = list(model_names(include_none=False))
    if not models:
        raise InputError(f"--models {args.models!r} names no model; give e.g. --models nfw,burkert,mond")
    for model in models:
        try:
            MassModelSettings(model=model)
        except InputError as exc:
            raise InputError(f"--models: {exc}") from None
    try:
        MassModelSettings(cosmology=args.cosmology, overdensity=args.overdensity)
    except InputError as exc:
        raise InputError(f"--cosmology/--overdensity: {exc}") from None
    return models


def _mass_inputs(args):
    """(curve, baryons) of ``massmodel``: the curve with its error structure and geometry, the baryons."""
    from .massmodel import Baryons, read_components, read_curve, read_sparc_rotmod
    from .massmodel.covariance import read_covariance
    from .massmodel.io import read_gas

    covariance = None if args.no_covariance else (args.covariance or "auto")
    if args.curve.endswith(".dat") and args.radius_column is None:
        curve, baryons = read_sparc_rotmod(args.curve)
        if args.covariance:
            curve.covariance = read_covariance(args.covariance, len(curve.radius))
            curve.covariance_kind, curve.covariance_source = "given", f"from {args.covariance}"
    else:
        curve = read_curve(args.curve, args.radius_column, args.velocity_column, args.error_column, covariance)
        baryons = Baryons()
    if args.components:
        baryons = read_components(args.components)
    if args.gas:
        baryons.gas = read_gas(args.gas)
    baryons.disc_scale_length = args.disc_scale_length
    if args.inclination is not None:
        curve.inclination = args.inclination
    if args.inclination_error is not None:
        curve.inclination_err = args.inclination_error
    if args.distance_error is not None:
        curve.distance_err = args.distance_error
    return curve, baryons


def _print_mass_results(curve, results, skipped) -> None:
    print(f"{curve.name}: {len(curve.radius)} points; errors: {curve.covariance_source or 'independent per point'}")
    for name, r in results.items():
        params = ", ".join(f"{k} = {v:.3g} +/- {r.errors.get(k, float('nan')):.2g}{_unit_note(k, r.units)}"
                           for k, v in r.parameters.items())
        print(f"  {name:<10} chi2 = {r.chi2:8.1f}  BIC = {r.bic:8.1f}  {params}")
        if r.sampling:
            taus = ", ".join(f"{k} {t:.0f}" for k, t in r.sampling["autocorrelation_time"].items())
            print(f"             autocorrelation times (steps): {taus}; "
                  f"{r.sampling['steps_per_autocorrelation_time']:.0f} per kept chain")
    for text in skipped + sorted({c for r in results.values() for c in r.cautions}):
        print(f"caution: {text}")


def run_massmodel(args) -> int:
    import warnings

    from .errors import FitCaution, InputError
    from .massmodel import MassModelSettings, fit_mass_model, write_results

    models = _check_mass_arguments(args)
    curve, baryons = _mass_inputs(args)
    skipped = []
    if args.models is None and all(getattr(baryons, n) is None for n in ("gas", "disc", "bulge")):
        models = [m for m in models if m not in ("mond", "none")]
        skipped.append("no baryonic component given: MOND left out (it predicts the curve from the baryons); give "
                       "--components, --gas or a SPARC-format file")
    if args.distance_error is not None and not curve.distance:
        raise InputError("--distance-error needs the curve's distance (a curve.ecsv from a fit with --distance, or "
                         "a SPARC-format file)")
    results = {}
    for model in models:
        settings = MassModelSettings(model=model, ml_mode=args.ml_mode, ml_disc=args.ml_disc, ml_bulge=args.ml_bulge,
                                     disc_mode=args.disc_mode, use_concentration_prior=args.concentration_prior,
                                     a0_free=args.a0_free, interpolating=args.interpolating,
                                     fit_inclination=args.fit_inclination, fit_distance=args.distance_error is not None,
                                     cosmology=args.cosmology, overdensity=args.overdensity,
                                     max_disc_fraction=args.max_disc_fraction)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FitCaution)  # printed below, once each
            results[model] = fit_mass_model(curve, baryons, settings, sample=args.sample, n_steps=args.steps,
                                            seed=args.seed, quiet=args.quiet)
    if not results:
        raise InputError("no model named; use --models nfw,burkert,...")
    write_results(args.out, results, curve, overwrite=args.overwrite)
    if not args.quiet:
        _print_mass_results(curve, results, skipped)
        print(f"wrote {args.out}/models.ecsv, parameters.ecsv, components_<model>.ecsv, decomposition_<model>.png, "
              "massmodel.json")
    return EXIT_OK


COMPARE_EXAMPLES = """examples:
  tiltedring compare fit1/residual.fits fit2/residual.fits --rings fit1/rings.ecsv --out cmp
  tiltedring compare hi_velocity.fits co_velocity.fits --names HI,CO --out tracers

The first map's grid is the common one unless --grid names another; maps on other grids are
reprojected (bilinear for velocities; --flux for flux-conserving resampling of intensity maps).
Writes difference_<k>.fits (map k minus the first), statistics.ecsv (per ring and per 30-degree
azimuth sector, each row naming the difference and both maps) and comparison.png: velocity maps
each centred on its systemic velocity (one common centre with --rings), residual maps and the
differences on scales symmetric about zero. Maps with no pixel in common are refused (exit 2).
"""


def _compare_parser(sub):
    p = sub.add_parser("compare", parents=[_common()], help="compare residual or velocity maps on one grid",
                       description="Compare maps on a common grid: differences and their statistics.",
                       epilog=COMPARE_EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("maps", nargs="+", help="two or more FITS maps")
    p.add_argument("--out", required=True, help="output folder (refused if it exists and is not empty)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--grid", help="FITS map whose grid is the common one (default: the first map)")
    p.add_argument("--rings", help="rings.ecsv of a fit, to take statistics on its rings")
    p.add_argument("--names", help="comma-separated names for the maps")
    p.add_argument("--flux", action="store_true", help="flux-conserving reprojection (intensity maps)")
    p.add_argument("--velocity-unit", help="unit of maps whose BUNIT is missing")
    p.set_defaults(run=run_compare)


def run_compare(args) -> int:
    import numpy as np

    from .products.compare import compare_maps
    from .products.decisions import plural

    def _plain(column):
        return np.asarray(getattr(column, "value", column), float)

    names = args.names.split(",") if args.names else None
    result = compare_maps(args.maps, names=names, grid=args.grid, rings=args.rings, flux=args.flux,
                          velocity_unit=args.velocity_unit)
    result.write(args.out, overwrite=args.overwrite)
    if not args.quiet:
        for note in result.notes:
            print(f"note: {note}")
        rings = result.statistics[result.statistics["kind"] == "ring"]
        for name in result.names[1:]:
            sel = rings[rings["map"] == name]
            rms = np.sqrt(np.nansum(_plain(sel["rms"]) ** 2 * sel["n_pixels"]) / max(np.sum(sel["n_pixels"]), 1))
            print(f"{name} - {result.names[0]}: rms difference {rms:.2f} km/s over "
                  f"{plural(int(np.sum(sel['n_pixels'])), 'pixel')}")
        print(f"wrote {args.out}/difference_*.fits, statistics.ecsv, comparison.png")
    return EXIT_OK


BATCH_EXAMPLES = """examples:
  tiltedring batch survey.csv --out survey_fits
  tiltedring batch survey.ecsv --out survey_fits --workers 1            # in this process, for debugging
  tiltedring batch survey.csv --out survey_fits --scheduler tcp://10.0.0.5:8786 --config run.toml

The manifest has one galaxy per row: velocity_map (path relative to the manifest) and optionally
name, error_map, intensity_map, dispersion_map (paths), report, and any option of 'tiltedring fit'
by its run-file name as a column (distance, redshift, bin, ring_width, fixed, v_systemic...).
Shared options come from --config and the flags below; per-row values win.
Re-running the same command skips finished galaxies and retries failed ones. The catalogue is
OUT/catalogue.ecsv (status ok or failed, with the error message).
"""


def _batch_parser(sub):
    p = sub.add_parser("batch", parents=[_common()], help="fit many galaxies from a manifest (dask)",
                       description="Fit every galaxy of a manifest; one folder per galaxy and one catalogue.",
                       epilog=BATCH_EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("manifest", help="CSV or ECSV manifest")
    p.add_argument("--out", required=True, help="output folder (galaxy folders and catalogue.ecsv)")
    p.add_argument("--workers", type=int, help="worker processes (default: one per core; 1 runs in this process)")
    p.add_argument("--scheduler", help="address of an existing dask.distributed scheduler")
    p.add_argument("--config", help="TOML run file whose [inputs] (no map files), [fit] and [curve] tables hold "
                                    "options shared by every galaxy")
    p.add_argument("--report", action="store_true", help="write report.pdf for every galaxy (slower)")
    add_job_options(p, per_galaxy_maps=False)
    p.set_defaults(run=run_batch_command)


def run_batch_command(args) -> int:
    from .batch import run_batch
    from .jobs import read_run_file
    from .products.decisions import plural

    shared = read_run_file(args.config, per_galaxy_maps=False)
    shared.update(job_values(args))
    if args.report:
        shared["report"] = True
    summary = run_batch(args.manifest, args.out, shared, workers=args.workers, scheduler=args.scheduler,
                        quiet=args.quiet)
    if not args.quiet:
        rate = f", {summary['rate_per_minute']:.1f} galaxies/min" if summary["rate_per_minute"] else ""
        print(f"{plural(summary['total'], 'galaxy')}: {summary['fitted']} fitted, {summary['skipped']} already done, "
              f"{summary['failed']} failed{rate}; catalogue in {args.out}/catalogue.ecsv")
    return EXIT_OK if summary["failed"] == 0 else EXIT_FAILURE


MAPS_EXAMPLES = """examples:
  tiltedring maps demo_fields/dunmore_cube.fits --exclude-velocities=-5:20 --out dunmore_maps
  tiltedring maps cube.fits --velocity-kind gaussian --exclude-velocities=-60:5 --out maps1
  tiltedring maps cube.fits --velocity-kind moment --mask-threshold 3 --minimum-run 4 --out maps2

Writes velocity.fits (km/s, in the cube's velocity convention and frame), velocity_err.fits,
intensity.fits (moment 0), dispersion.fits, mask.fits (the emission mask, 1 = used), h3.fits
(--velocity-kind hermite) and maps.json (what was done: noise, mask, kind, convention, frame, rest
frequency, excluded ranges). A range starting with a minus sign needs the '=' form:
--exclude-velocities=-60:5. Fit the maps with
  tiltedring fit OUT/velocity.fits --error-map OUT/velocity_err.fits --intensity-map OUT/intensity.fits
"""


def _maps_parser(sub):
    """``tiltedring maps``: velocity maps from a spectral cube (self-contained: parser and runner)."""
    p = sub.add_parser("maps", parents=[_common()], help="make velocity maps from a spectral cube",
                       description="Make velocity, error, intensity (moment-0) and dispersion maps from a FITS "
                                   "spectral cube, over a smoothed-and-clipped emission mask.",
                       epilog=MAPS_EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("cube", help="FITS spectral cube (frequency or velocity axis)")
    p.add_argument("--out", required=True, help="output folder (refused if it exists and is not empty)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    add_job_options(p, specs=_cube_specs())
    p.set_defaults(run=run_maps)
    return p


def _cube_specs() -> dict:
    from .pipeline.option_fields import flat_specs
    from .pipeline.options import CubeOptions, InputOptions

    specs = flat_specs(CubeOptions)
    specs["velocity_convention"] = flat_specs(InputOptions)["velocity_convention"]
    return specs


def run_maps(args) -> int:
    import warnings

    from .errors import FitCaution
    from .io.velocity_fields import make_velocity_maps
    from .pipeline.options import CubeOptions

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)  # printed below from the record
        values = job_values(args, _cube_specs())
        convention = values.pop("velocity_convention", None)
        maps = make_velocity_maps(args.cube, **CubeOptions(**values).map_arguments(convention))
    maps.write(args.out, overwrite=args.overwrite)
    if not args.quiet:
        rec = maps.record
        excluded = ", ".join(f"{lo:g}:{hi:g}" for lo, hi in rec["mask"]["excluded_velocities"]) or "none"
        print(f"{rec['source']}: {rec['channels']} channels of {rec['channel_width_kms']:.3g} km/s "
              f"({rec['velocity_convention']} convention, frame {rec['velocity_frame']}), noise "
              f"{rec['noise']['median']:.3g} {rec['brightness_unit']} (median per channel)")
        print(f"{rec['velocity_kind']} velocities in {rec['pixels_with_velocity']} pixels; excluded velocities: "
              f"{excluded}" + (f" ({rec['mask']['exclusion']})" if rec["mask"]["exclusion"] else ""))
        for key, value in rec["fits"].items():
            if value and key != "spectra_fitted":
                print(f"note: {key.replace('_', ' ')}: {value}")
        for text in rec["cautions"]:
            print(f"caution: {text}")
        print(f"wrote {args.out}/" + ", ".join(v for v in rec["files"].values()))
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    parser = argparse.ArgumentParser(
        prog="tiltedring",
        description="Tilted-ring kinematic modelling of disc-galaxy velocity maps.",
        epilog="Run 'tiltedring fit --help' or 'tiltedring massmodel --help' for options and examples.",
    )
    parser.add_argument("--version", action="version", version=f"tiltedring {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    _fit_parser(sub)
    _mass_parser(sub)
    _compare_parser(sub)
    _batch_parser(sub)
    _maps_parser(sub)
    return parser


def run_fit(args) -> int:
    import shlex

    from .jobs import Job, read_run_file, run_job

    values = read_run_file(args.config)
    values.update(job_values(args))  # the command line wins over the run file
    values["quiet"] = True if args.quiet else values.get("quiet", False)
    values.update(report=not args.no_report, png=args.png)
    command = "tiltedring " + " ".join(shlex.quote(str(a)) for a in getattr(args, "argv", ["fit", args.map]))
    job = Job.from_values(args.map, values, record={"command": command})
    outcome = run_job(job, args.out, overwrite=args.overwrite)
    result = outcome.result
    if not args.quiet:
        print(result.summary())
        if args.verbose:
            print(result.ring_table_text())
        for text in outcome.cautions:
            if text not in result.cautions:
                print(f"caution: {text}")
        if outcome.gas_note and result.vmap.intensity is not None:
            print(f"note: {outcome.gas_note}")
        print(f"wrote {args.out}/{', '.join(outcome.files)}")
    return EXIT_OK


def _claimed(args):
    """Claim ``--out`` before any work (:mod:`.io.output_safety`); batch claims its own folder, which it
    adds to rather than replaces."""
    from contextlib import nullcontext

    from .io.output_safety import claim_output

    out = getattr(args, "out", None)
    if out is None or args.command == "batch":
        return nullcontext()
    inputs = [value for key, value in vars(args).items() if key not in ("out", "argv")]  # argv holds --out itself
    return claim_output(out, getattr(args, "overwrite", False), inputs, command=f"tiltedring {args.command}")


def main(argv=None) -> int:
    """Run the command; exit codes as the module docstring says, and never a traceback."""
    from .errors import InputError, OutputFolderExists, ResultNotPhysical

    parser = build_parser()
    args = parser.parse_args(argv)
    args.argv = list(sys.argv[1:] if argv is None else argv)  # recorded in fit.json and on the report
    if args.command is None:
        parser.print_help()
        return EXIT_BAD_INPUT
    try:
        with _claimed(args):
            return args.run(args)
    except OutputFolderExists as exc:
        print(f"tiltedring: error: output folder {exc.folder} already exists and is not empty; choose another --out "
              "folder or pass --overwrite to replace it", file=sys.stderr)
        return EXIT_BAD_INPUT
    except InputError as exc:
        print(f"tiltedring: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except ResultNotPhysical as exc:
        print(f"tiltedring: failed: {exc}", file=sys.stderr)
        return EXIT_FAILURE
    except KeyboardInterrupt:
        print("tiltedring: interrupted; no output was left half-written", file=sys.stderr)
        return EXIT_FAILURE
    except MemoryError:
        print("tiltedring: failed: out of memory; bin the map (--bin N) or use fewer rings", file=sys.stderr)
        return EXIT_FAILURE
    except OSError as exc:
        print(f"tiltedring: failed: {exc.strerror or exc} ({exc.filename or 'no file named'}); no output was left "
              "half-written", file=sys.stderr)
        return EXIT_FAILURE
    except Exception as exc:  # a defect: say so in one line rather than a traceback
        import traceback

        where = traceback.extract_tb(exc.__traceback__)[-1]
        print(f"tiltedring: failed: unexpected {type(exc).__name__}: {exc} (at {Path(where.filename).name}:"
              f"{where.lineno}; please report it); no output was left half-written", file=sys.stderr)
        return EXIT_FAILURE


if __name__ == "__main__":
    sys.exit(main())
