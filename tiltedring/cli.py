"""The ``tiltedring`` command: a thin layer over the same API a notebook calls.

Exit codes: 0 success, 2 unusable input or options (the message says what to fix),
1 an unexpected failure (and, for ``batch``, one or more galaxies failed: see the catalogue).
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT = 0, 1, 2

FIT_EXAMPLES = """examples:
  tiltedring fit demo_fields/ashgrove_velocity.fits --out ashgrove_fit
  tiltedring fit map.fits --intensity-map mom0.fits --error-map emap.fits --ring-width 0.5beam --out fit1
  tiltedring fit map.fits --ring-width 4pix --spacing logarithmic --max-radius 3arcmin --out fit2
  tiltedring fit map.fits --inclination 62 --fix inclination --half receding --out fit3
  tiltedring fit map.fits --config run.toml --out fit4
  tiltedring fit cube.fits --exclude-velocities=-60:5 --out fit5     # a spectral cube: maps made into fit5/maps

A TOML run file holds the same options (underscores or dashes) in a [fit] table, starting
values in [fit.initial], and input maps in [inputs]:

  [inputs]
  intensity_map = "mom0.fits"
  [fit]
  ring_width = "0.5beam"
  azimuth_weight = "cos-squared"
  fixed = ["v_systemic"]
  [fit.initial]
  v_systemic = 1450.0

Options given on the command line win over the run file.
"""

_INITIAL = ("x_center", "y_center", "ra_center", "dec_center", "v_systemic", "position_angle", "inclination",
            "v_rotation")
_INPUT_KEYS = ("error_map", "intensity_map", "dispersion_map", "beam", "pixel_scale", "velocity_unit", "bin")


def _common() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-q", "--quiet", action="store_true", help="print errors only")
    common.add_argument("-v", "--verbose", action="store_true", help="print the ring table too")
    return common


def _fit_parser(sub):
    p = sub.add_parser("fit", parents=[_common()], help="fit a tilted-ring model to a velocity map",
                       description="Fit a tilted-ring model to a 2-D velocity (moment-1) map and write the ring "
                                   "table, model and residual maps and a run record into --out.",
                       epilog=FIT_EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("map", help="velocity map (FITS, BUNIT in km/s or m/s), or a spectral cube (maps are made first)")
    p.add_argument("--out", required=True, help="output folder (refused if it exists and is not empty)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--config", help="TOML run file with [inputs], [fit] and [fit.initial] tables")
    p.add_argument("--no-report", action="store_true", help="skip report.pdf (faster, for scripted runs)")
    p.add_argument("--png", action="store_true", help="also write the report pages as PNG files")
    g = p.add_argument_group("inputs")
    g.add_argument("--error-map", help="map of velocity errors (same units rule as the map)")
    g.add_argument("--intensity-map", help="intensity (moment-0) map; reprojected if on another grid")
    g.add_argument("--dispersion-map", help="velocity-dispersion (moment-2) map: adds the asymmetric-drift-corrected "
                                            "circular speed to curve.ecsv (needs --intensity-map)")
    g.add_argument("--beam", help="beam MAJ[,MIN[,PA]] in arcsec and deg (default: BMAJ/BMIN/BPA)")
    g.add_argument("--pixel-scale", type=float, help="arcsec per pixel, for maps without celestial WCS")
    g.add_argument("--velocity-unit", help="unit of the map when BUNIT is missing or wrong (km/s, m/s)")
    g.add_argument("--bin", type=int, help="average N x N pixel blocks before fitting (for maps too large for "
                                           "memory, or far finer than the beam)")
    g = p.add_argument_group("rings")
    g.add_argument("--ring-width", help="ring width: 9arcsec, 4pix, 0.5beam or a bare number in arcsec "
                                        "(default one beam, or two pixels without a beam)")
    g.add_argument("--spacing", choices=("uniform", "logarithmic"), help="ring spacing (default uniform)")
    g.add_argument("--growth", type=float, help="width ratio of successive logarithmic rings (default 1.2)")
    g.add_argument("--ring-edges", help="explicit ring edges in arcsec, comma-separated")
    g.add_argument("--first-radius", help="inner edge of the first ring (default 0)")
    g.add_argument("--max-radius", help="outer edge of the last ring (default: edge of the valid data)")
    g = p.add_argument_group("fitting")
    g.add_argument("--azimuth-weight", choices=("none", "abs-cos", "cos-squared"),
                   help="weight of a pixel by its disc azimuth theta from the major axis: none, |cos theta| "
                        "(abs-cos, the default) or cos^2 theta")
    g.add_argument("--minor-axis-gap", type=float,
                   help="half-opening in deg of the sector about the minor axis left out of the fit (default 15)")
    g.add_argument("--half", choices=("whole", "approaching", "receding"),
                   help="fit the whole disc (default) or only its approaching or receding half")
    g.add_argument("--clip", type=float, help="clip pixels beyond this many robust sigma and refit")
    g.add_argument("--fix", action="append", default=None, metavar="NAME[,NAME]",
                   help="hold parameters fixed: x_center y_center v_systemic position_angle inclination "
                        "v_rotation v_radial")
    g.add_argument("--fit-radial", action="store_true", default=None, help="also fit v_radial per ring")
    g.add_argument("--low-inclination", type=float, help="flag and widen errors below this inclination (default 30)")
    g.add_argument("--seed", type=int, help="seed of every random step (default 0)")
    g.add_argument("--resamples", type=int, help="noise realisations for resampled errors (default 20; 0 skips)")
    g.add_argument("--no-beam-correction", dest="beam_correction", action="store_false", default=None,
                   help="skip the beam-smearing correction (on by default when a beam is known)")
    g = p.add_argument_group("the rotation-curve product (curve.ecsv)")
    g.add_argument("--distance", help="distance: a number in Mpc or a length such as 12Mpc (adds radius_kpc)")
    g.add_argument("--redshift", type=float, help="redshift, for the angular-diameter distance when no --distance")
    g.add_argument("--cosmology", default="Planck18", help="astropy cosmology for --redshift (default Planck18)")
    g = p.add_argument_group("starting values (used instead of the first guess)")
    g.add_argument("--x-center", type=float, help="pixels, 0-based")
    g.add_argument("--y-center", type=float, help="pixels, 0-based")
    g.add_argument("--ra-center", type=float, help="deg")
    g.add_argument("--dec-center", type=float, help="deg")
    g.add_argument("--v-systemic", type=float, help="km/s")
    g.add_argument("--position-angle", type=float, help="deg, receding side, north through east")
    g.add_argument("--inclination", type=float, help="deg, 0 face-on")
    g.add_argument("--v-rotation", type=float, help="km/s, flat rotation speed")
    _add_cube_options(p)
    p.set_defaults(run=run_fit)
    return p


MASS_EXAMPLES = """examples:
  tiltedring massmodel fit1/curve.ecsv --components baryons.ecsv --out mass1
  tiltedring massmodel galaxy_rotmod.dat --models nfw,burkert,mond --ml-mode free --out mass2
  tiltedring massmodel table.csv --radius-column R --velocity-column V --error-column eV --disc-mode maximum --out m3

The curve is the fit's curve.ecsv (run the fit with --distance so radii are in kpc), any table with
radius (kpc), speed and error columns you name, or a SPARC *_rotmod.dat file (which carries its own
baryonic curves). --components names a table of baryonic speed curves for M/L = 1 (columns v_gas with
helium, v_disc, v_bulge; radius_kpc). Writes models.ecsv (chi2, BIC per model), parameters.ecsv,
components_<model>.ecsv and massmodel.json.
"""


def _mass_parser(sub):
    p = sub.add_parser("massmodel", parents=[_common()], help="fit baryons + halo or MOND to a rotation curve",
                       description="Fit mass models (pseudo-isothermal, NFW, Burkert, Einasto halos; MOND) to a "
                                   "rotation curve.", epilog=MASS_EXAMPLES,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("curve", help="curve.ecsv, a table, or a SPARC *_rotmod.dat file")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--models", default="isothermal,nfw,burkert,einasto,mond",
                   help="comma-separated: isothermal, nfw, burkert, einasto, mond, none (default: all but none)")
    p.add_argument("--components", help="table of baryonic speed curves for M/L = 1")
    p.add_argument("--gas", help="gas.ecsv written by 'tiltedring fit' (HI surface density with helium): "
                                 "its thin-disc speed becomes the gas component")
    p.add_argument("--radius-column"), p.add_argument("--velocity-column"), p.add_argument("--error-column")
    p.add_argument("--ml-mode", choices=("fixed", "free", "lognormal"), default="lognormal",
                   help="mass-to-light ratios: fixed, free, or free with a log-normal prior (default)")
    p.add_argument("--ml-disc", type=float, default=0.5, help="disc M/L (3.6 micron; default 0.5)")
    p.add_argument("--ml-bulge", type=float, default=0.7, help="bulge M/L (default 0.7)")
    p.add_argument("--disc-mode", choices=("fit", "maximum", "minimum"), default="fit")
    p.add_argument("--concentration-prior", action="store_true", help="NFW: Dutton & Maccio 2014 c(M) prior")
    p.add_argument("--a0-free", action="store_true", help="MOND: fit a0 too")
    p.add_argument("--interpolating", choices=("simple", "standard"), default="simple", help="MOND function")
    p.add_argument("--disc-scale-length", type=float, help="kpc, for the baryonic share of v at 2.2 scale lengths")
    p.add_argument("--sample", action="store_true", help="sample the posterior with emcee (optional dependency)")
    p.add_argument("--steps", type=int, default=1500, help="emcee steps per walker")
    p.add_argument("--seed", type=int, default=0)
    p.set_defaults(run=run_massmodel)


def run_massmodel(args) -> int:
    from .errors import InputError
    from .massmodel import (
        MassModelSettings,
        fit_mass_model,
        read_components,
        read_curve,
        read_sparc_rotmod,
        write_results,
    )

    if args.curve.endswith(".dat") and args.radius_column is None:
        curve, baryons = read_sparc_rotmod(args.curve)
    else:
        from .massmodel import Baryons

        curve, baryons = read_curve(args.curve, args.radius_column, args.velocity_column, args.error_column), Baryons()
    if args.components:
        baryons = read_components(args.components)
    if args.gas:
        from astropy.table import Table

        from .massmodel import ThinDisc

        gas = Table.read(args.gas, format="ascii.ecsv")
        baryons.gas = ThinDisc(gas["radius_kpc"], gas["surface_density_gas"], label="gas")
    baryons.disc_scale_length = args.disc_scale_length
    models = [m.strip() for m in args.models.split(",") if m.strip()]
    results = {}
    for model in models:
        settings = MassModelSettings(model=model, ml_mode=args.ml_mode, ml_disc=args.ml_disc, ml_bulge=args.ml_bulge,
                                     disc_mode=args.disc_mode, use_concentration_prior=args.concentration_prior,
                                     a0_free=args.a0_free, interpolating=args.interpolating)
        results[model] = fit_mass_model(curve, baryons, settings, sample=args.sample, n_steps=args.steps,
                                        seed=args.seed, quiet=args.quiet)
    if not results:
        raise InputError("no model named; use --models nfw,burkert,...")
    write_results(args.out, results, curve, overwrite=args.overwrite)
    if not args.quiet:
        print(f"{curve.name}: {len(curve.radius)} points")
        for name, r in results.items():
            params = ", ".join(f"{k} = {v:.3g} +/- {r.errors.get(k, float('nan')):.2g}" for k, v in r.parameters.items())
            print(f"  {name:<10} chi2 = {r.chi2:8.1f}  BIC = {r.bic:8.1f}  {params}")
        if all(r.parameters == {} for r in results.values()) and baryons.disc is None and baryons.gas is None:
            print("caution: no baryonic components given: the halo alone carries the curve")
        print(f"wrote {args.out}/models.ecsv, parameters.ecsv, components_<model>.ecsv, massmodel.json")
    return EXIT_OK


COMPARE_EXAMPLES = """examples:
  tiltedring compare fit1/residual.fits fit2/residual.fits --rings fit1/rings.ecsv --out cmp
  tiltedring compare hi_velocity.fits co_velocity.fits --names HI,CO --out tracers

The first map's grid is the common one unless --grid names another; maps on other grids are
reprojected (bilinear for velocities; --flux for flux-conserving resampling of intensity maps).
Writes difference_<k>.fits (map k minus the first), statistics.ecsv (per ring and per 30-degree
azimuth sector) and comparison.png (all maps on one colour scale).
"""


def _compare_parser(sub):
    p = sub.add_parser("compare", parents=[_common()], help="compare residual or velocity maps on one grid",
                       description="Compare maps on a common grid: differences and their statistics.",
                       epilog=COMPARE_EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("maps", nargs="+", help="two or more FITS maps")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--overwrite", action="store_true")
    p.add_argument("--grid", help="FITS map whose grid is the common one (default: the first map)")
    p.add_argument("--rings", help="rings.ecsv of a fit, to take statistics on its rings")
    p.add_argument("--names", help="comma-separated names for the maps")
    p.add_argument("--flux", action="store_true", help="flux-conserving reprojection (intensity maps)")
    p.add_argument("--velocity-unit", help="unit of maps whose BUNIT is missing")
    p.set_defaults(run=run_compare)


def run_compare(args) -> int:
    import numpy as np

    from .products.compare import compare_maps

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
            rms = np.sqrt(np.nansum(sel["rms"] ** 2 * sel["n_pixels"]) / max(np.sum(sel["n_pixels"]), 1))
            print(f"{name} - {result.names[0]}: rms difference {rms:.2f} km/s over {int(np.sum(sel['n_pixels']))} pixels")
        print(f"wrote {args.out}/difference_*.fits, statistics.ecsv, comparison.png")
    return EXIT_OK


BATCH_EXAMPLES = """examples:
  tiltedring batch survey.csv --out survey_fits
  tiltedring batch survey.ecsv --out survey_fits --workers 1            # in this process, for debugging
  tiltedring batch survey.csv --out survey_fits --scheduler tcp://10.0.0.5:8786 --config run.toml

The manifest has one galaxy per row: velocity_map (path relative to the manifest) and optionally
name, error_map, intensity_map, dispersion_map, distance, redshift, bin (average N x N pixel blocks
first) and any fit option by name.
Shared options come from --config ([fit] table) and the flags below; per-row values win.
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
    p.add_argument("--config", help="TOML run file whose [fit] table holds shared options")
    p.add_argument("--ring-width"), p.add_argument("--resamples", type=int)
    p.add_argument("--no-beam-correction", dest="beam_correction", action="store_false", default=None)
    p.add_argument("--report", action="store_true", help="write report.pdf for every galaxy (slower)")
    p.set_defaults(run=run_batch_command)


def run_batch_command(args) -> int:
    from .batch import run_batch

    shared = {k.replace("-", "_"): v for k, v in _read_config(args.config).get("fit", {}).items()}
    for key in ("ring_width", "resamples", "beam_correction"):
        if getattr(args, key) is not None:
            shared[key] = getattr(args, key)
    if args.report:
        shared["report"] = True
    summary = run_batch(args.manifest, args.out, shared, workers=args.workers, scheduler=args.scheduler,
                        quiet=args.quiet)
    if not args.quiet:
        rate = f", {summary['rate_per_minute']:.1f} galaxies/min" if summary["rate_per_minute"] else ""
        print(f"{summary['total']} galaxies: {summary['fitted']} fitted, {summary['skipped']} already done, "
              f"{summary['failed']} failed{rate}; catalogue in {args.out}/catalogue.ecsv")
    return EXIT_OK if summary["failed"] == 0 else EXIT_FAILURE


MAPS_EXAMPLES = """examples:
  tiltedring maps demo_fields/dunmore_cube.fits --out dunmore_maps
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
    _add_cube_options(p)
    p.set_defaults(run=run_maps)
    return p


def _add_cube_options(p):
    """Options that turn a cube into maps (shared by ``maps`` and ``fit`` on a cube)."""
    g = p.add_argument_group("from a cube")
    g.add_argument("--velocity-kind", choices=("moment", "peak", "gaussian", "hermite"),  # velocity_fields.KINDS
                   help="line centre per spectrum: moment (moment 1), peak, gaussian, or hermite "
                        "(Gauss-Hermite with h3; the default)")
    g.add_argument("--exclude-velocities", metavar="LO:HI[,LO:HI]",
                   help="velocity ranges (km/s, the cube's convention) left out of every spectrum, e.g. "
                        "Milky Way foreground: --exclude-velocities=-60:5")
    g.add_argument("--exclusion", choices=("interpolate", "veto"),
                   help="how excluded ranges are treated: interpolate (the default: vetoed off the galaxy; on it "
                        "the foreground interpolated from around the galaxy is subtracted) or veto (left out of "
                        "every spectrum; lines near them are blanked)")
    g.add_argument("--all-regions", action="store_true",
                   help="keep every emission region of the mask (default: only the largest, the galaxy)")
    g.add_argument("--mask-threshold", type=float, help="clip level of the smoothed cube in noise units (default 4)")
    g.add_argument("--minimum-run", type=int, help="fewest adjacent channels a masked line spans (default 3)")
    g.add_argument("--brightness-unit", help="unit of the cube when BUNIT is missing or wrong (Jy/beam, K)")
    g.add_argument("--rest-frequency", type=float, help="rest frequency in Hz when the cube states none")
    g.add_argument("--velocity-convention", choices=("radio", "optical", "relativistic"),
                   help="velocities in this convention (default: the cube's own; radio for a frequency axis)")


def cube_map_options(args) -> dict:
    """Keyword arguments of ``make_velocity_maps`` from the cube options of a command."""
    options = {}
    for key, name in (("velocity_kind", "kind"), ("exclude_velocities", "exclude_velocities"), ("exclusion", "exclusion"),
                      ("mask_threshold", "mask_threshold"), ("minimum_run", "minimum_run"),
                      ("brightness_unit", "brightness_unit"), ("rest_frequency", "rest_frequency"),
                      ("velocity_convention", "convention")):
        value = getattr(args, key, None)
        if value is not None:
            options[name] = value
    if getattr(args, "all_regions", False):
        options["keep_regions"] = "all"
    return options


def run_maps(args) -> int:
    from .io.velocity_fields import make_velocity_maps

    maps = make_velocity_maps(args.cube, **cube_map_options(args))
    maps.write(args.out, overwrite=args.overwrite)
    if not args.quiet:
        rec = maps.record
        excluded = ", ".join(f"{lo:g}:{hi:g}" for lo, hi in rec["mask"]["excluded_velocities"]) or "none"
        print(f"{rec['source']}: {rec['channels']} channels of {rec['channel_width_kms']:.3g} km/s "
              f"({rec['velocity_convention']} convention, frame {rec['velocity_frame']}), noise "
              f"{rec['noise']['median']:.3g} {rec['brightness_unit']} (median per channel)")
        print(f"{rec['velocity_kind']} velocities in {rec['pixels_with_velocity']} pixels; excluded velocities: "
              f"{excluded}")
        for key, value in rec["fits"].items():
            if value and key not in ("spectra_fitted",):
                print(f"note: {key.replace('_', ' ')}: {value}")
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


def _read_config(path) -> dict:
    if path is None:
        return {}
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    from .errors import InputError

    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(f"run file {path} does not exist") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"run file {path} is not valid TOML: {exc}") from None


def _gather(args) -> tuple:
    """Merge the run file and the command line into (inputs, fit option values)."""
    from .errors import InputError

    config = _read_config(args.config)
    unknown = set(config) - {"inputs", "fit"}
    if unknown:
        raise InputError(f"run file {args.config}: unknown table(s) {sorted(unknown)}; use [inputs] and [fit]")
    base = Path(args.config).parent if args.config else Path(".")
    inputs = {k.replace("-", "_"): v for k, v in config.get("inputs", {}).items()}
    bad = set(inputs) - set(_INPUT_KEYS)
    if bad:
        raise InputError(f"run file: unknown input(s) {sorted(bad)}; known: {', '.join(_INPUT_KEYS)}")
    for key in ("error_map", "intensity_map", "dispersion_map"):
        if key in inputs:
            inputs[key] = str(base / inputs[key])
    for key in _INPUT_KEYS:
        if getattr(args, key) is not None:
            inputs[key] = getattr(args, key)
    fit = {k.replace("-", "_"): v for k, v in config.get("fit", {}).items()}
    fit["initial"] = dict(fit.get("initial", {}))
    for key in ("ring_width", "spacing", "growth", "first_radius", "max_radius", "azimuth_weight", "minor_axis_gap",
                "half", "clip", "fit_radial", "low_inclination", "seed", "resamples", "beam_correction"):
        if getattr(args, key) is not None:
            fit[key] = getattr(args, key)
    if args.ring_edges is not None:
        try:
            fit["ring_edges"] = [float(e) for e in args.ring_edges.split(",")]
        except ValueError:
            raise InputError(f"--ring-edges {args.ring_edges!r}: give comma-separated numbers in arcsec") from None
    if args.fix:
        fit["fixed"] = [n.strip() for item in args.fix for n in item.split(",") if n.strip()]
    for key in _INITIAL:
        if getattr(args, key) is not None:
            fit["initial"][key] = getattr(args, key)
    return inputs, fit


def _write_gas(result, curve, args):
    """``gas.ecsv`` beside the curve when an HI intensity map in usable units and a distance are known."""
    from .errors import InputError

    distance = (curve.meta.get("distance") or {}).get("value_mpc")
    if result.vmap.intensity is None or distance is None:
        return
    from .io.atomic import atomic_path
    from .massmodel.gas import gas_table
    from .products.result import plain_table

    try:
        table = gas_table(result, distance)
    except InputError as exc:
        if not args.quiet:
            print(f"note: no gas.ecsv ({exc})")
        return
    with atomic_path(Path(args.out) / "gas.ecsv") as tmp:
        plain_table(table).write(tmp, format="ascii.ecsv")


def _maps_of_cube(args, inputs):
    """Velocity maps made from ``args.map`` when it is a spectral cube (else None)."""
    from .errors import InputError
    from .io.cube import looks_like_cube

    if not looks_like_cube(args.map):
        return None
    given = [k for k in ("error_map", "intensity_map", "dispersion_map", "velocity_unit", "pixel_scale")
             if inputs.get(k) is not None]
    if given:
        raise InputError(f"{args.map} is a spectral cube: the maps are made from it, so {', '.join(given)} cannot "
                         "be given; make maps with 'tiltedring maps' and fit those to use your own")
    from .io.velocity_fields import make_velocity_maps

    return make_velocity_maps(args.map, **cube_map_options(args))


def run_fit(args) -> int:
    from .errors import FitCaution
    from .io.maps import read_velocity_map
    from .pipeline.staged import FitOptions, fit_velocity_map
    from .products.result import file_checksum

    inputs, fit_values = _gather(args)
    fit_values.setdefault("quiet", bool(args.quiet))
    options = FitOptions.from_mapping(fit_values)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", FitCaution)
        cube_maps = _maps_of_cube(args, inputs)
        if cube_maps is not None:
            vmap = cube_maps.to_velocity_map(beam=inputs.get("beam"))
        else:
            vmap = read_velocity_map(args.map, error=inputs.get("error_map"), intensity=inputs.get("intensity_map"),
                                     dispersion=inputs.get("dispersion_map"), beam=inputs.get("beam"),
                                     pixel_scale=inputs.get("pixel_scale"), velocity_unit=inputs.get("velocity_unit"))
        if inputs.get("bin"):
            from .io.binning import bin_map

            vmap = bin_map(vmap, inputs["bin"])
        result = fit_velocity_map(vmap, options)
        curve = result.curve(distance=args.distance, redshift=args.redshift, cosmology=args.cosmology)
    role = "velocity_map" if cube_maps is None else "cube"
    result.inputs = {role: {"path": str(Path(args.map).resolve()), "sha256": file_checksum(args.map)}}
    if cube_maps is not None:
        result.inputs["maps_from_cube"] = {"folder": "maps", "velocity_kind": cube_maps.kind,
                                           "velocity_convention": cube_maps.convention,
                                           "velocity_frame": cube_maps.record["velocity_frame"],
                                           "excluded_velocities": cube_maps.record["mask"]["excluded_velocities"]}
    for key in ("error_map", "intensity_map", "dispersion_map"):
        if inputs.get(key):
            result.inputs[key] = {"path": str(Path(inputs[key]).resolve()), "sha256": file_checksum(inputs[key])}
    for key in ("beam", "pixel_scale", "velocity_unit", "bin"):
        if inputs.get(key) is not None:
            result.inputs[key] = inputs[key]
    result.inputs["curve"] = {"distance": args.distance, "redshift": args.redshift, "cosmology": args.cosmology}
    result.write(args.out, overwrite=args.overwrite, curve=curve, report=not args.no_report, png=args.png,
                 extra=None if cube_maps is None else (lambda tmp: cube_maps.write_into(tmp / "maps")))
    _write_gas(result, curve, args)
    if not args.quiet:
        print(result.summary())
        if args.verbose:
            print(result.rings)
        other = [str(w.message) for w in caught
                 if issubclass(w.category, FitCaution) and str(w.message) not in result.cautions]
        for text in other:
            print(f"caution: {text}")
        extra = ("" if args.no_report else ", report.pdf") + ("" if cube_maps is None else ", maps/ (from the cube)")
        print(f"wrote {args.out}/rings.ecsv, curve.ecsv, model.fits, residual.fits, fit.json{extra}")
    return EXIT_OK


def main(argv=None) -> int:
    from .errors import InputError

    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_BAD_INPUT
    try:
        return args.run(args)
    except InputError as exc:
        print(f"tiltedring: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("tiltedring: interrupted; no output was left half-written", file=sys.stderr)
        return EXIT_FAILURE


if __name__ == "__main__":
    sys.exit(main())
