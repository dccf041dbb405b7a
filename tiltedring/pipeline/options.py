"""Everything that steers a job, as dataclasses whose fields declare their own options.

- :class:`FitOptions`: how the rings are laid out and fitted (the ``[fit]`` table of a run file);
- :class:`InputOptions`: what is read besides the velocity map (``[inputs]``);
- :class:`CurveOptions`: the rotation-curve product, ``curve.ecsv`` (``[curve]``);
- :class:`CubeOptions`: how velocity maps are made when the input is a spectral cube (``[cube]``).

Each field is declared with :func:`.option_fields.option` (help, choices, metavar, form); the
command line, TOML run files, batch manifest columns and ``fit.json`` are generated from these
declarations. To add an option, add a field here: nothing else lists option names.

No numerics are imported at module level, so ``tiltedring --help`` stays quick.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

from ..errors import InputError
from ..fitting.parameters import PARAMETERS
from .option_fields import Bounds, coerce, field_specs, option, recorded_values, validate

__all__ = ["FitOptions", "InputOptions", "CurveOptions", "CubeOptions", "RING_PARAMETER_NAMES",
           "AZIMUTH_WEIGHT_NAMES",
           "HALF_NAMES"]

# The parameter names come from their one definition (fitting/parameters.py imports no numerics). The
# choices below are spelled here so that the command line is built without importing the numerics;
# tests check them against fitting.engine.AZIMUTH_WEIGHTS and fitting.engine.HALVES.
RING_PARAMETER_NAMES = PARAMETERS
AZIMUTH_WEIGHT_NAMES = ("none", "abs-cos", "cos-squared")
HALF_NAMES = ("whole", "approaching", "receding")
VELOCITY_KIND_NAMES = ("moment", "peak", "gaussian", "hermite")  # io.velocity_fields.KINDS
MAP_KIND_NAMES = VELOCITY_KIND_NAMES + ("optical-centroid",)  # io.map_kind.MAP_KINDS
EXCLUSION_NAMES = ("interpolate", "veto")  # io.cube_mask.EXCLUSIONS
CHANNEL_RESPONSE_NAMES = ("boxcar", "hanning")  # fitting.cube_model.CHANNEL_RESPONSES
CONVENTION_NAMES = ("radio", "optical", "relativistic")  # io.conventions.CONVENTIONS

SPEED_OF_LIGHT = 299792.458  # km/s (CODATA, as astropy.constants.c)
STARTING_BOUNDS = {
    "ra_center": Bounds(minimum=0, below=360, why="right ascension in deg"),
    "dec_center": Bounds(minimum=-90, maximum=90, why="declination in deg"),
    "v_systemic": Bounds(above=-SPEED_OF_LIGHT, below=SPEED_OF_LIGHT, why="km/s, slower than light"),
    "position_angle": Bounds(minimum=-360, maximum=720, why="deg; wrapped into [0, 360)"),
    "inclination": Bounds(above=0, below=90, why="deg between face-on (0) and edge-on (90)"),
    "v_rotation": Bounds(above=-SPEED_OF_LIGHT, below=SPEED_OF_LIGHT, why="km/s, slower than light"),
}

STARTING_VALUES = {
    "x_center": "pixels, 0-based", "y_center": "pixels, 0-based", "ra_center": "deg", "dec_center": "deg",
    "v_systemic": "km/s", "position_angle": "deg, receding side, north through east",
    "inclination": "deg, 0 face-on", "v_rotation": "km/s, flat rotation speed",
}


@dataclass
class FitOptions:
    """Everything that steers a fit. Lengths accept numbers (arcsec) or strings like ``4pix``.

    ring_width: ring width (default one beam FWHM, or two pixels without a beam).
    spacing: ``uniform`` or ``logarithmic`` (first ring ``ring_width`` wide, growing by ``growth``).
    ring_edges: explicit ring edges in arcsec (overrides width and spacing).
    first_radius, max_radius: the radial range (default 0 to the edge of the valid data).
    azimuth_weight, minor_axis_gap, half, clip: see :class:`..fitting.engine.RingFitOptions`.
    fixed: parameter names held fixed in every stage (at ``initial`` or the first guess).
    initial: starting values by parameter name (``x_center``/``y_center`` in pixels, or
    ``ra_center``/``dec_center`` in deg; ``v_rotation`` sets the first-guess flat speed).
    fit_radial: also fit v_radial per ring.
    low_inclination: below this inclination (deg) results carry the low-inclination flag.
    Every field's help text is in its declaration below.
    """

    ring_width: object = option(None, group="rings", metavar="WIDTH", length=True, bounds=Bounds(above=0),
                                help="ring width: 9arcsec, 4pix, 0.5beam or a bare number in arcsec (default one "
                                     "beam, or two pixels without a beam)")
    spacing: str = option("uniform", group="rings", choices=("uniform", "logarithmic"), help="ring spacing")
    growth: float = option(1.2, group="rings", bounds=Bounds(above=1, maximum=10),
                           help="width ratio of successive logarithmic rings")
    ring_edges: tuple | None = option(None, group="rings", form="numbers", metavar="R0,R1,...", bounds=Bounds(minimum=0),
                                      help="explicit ring edges in arcsec, comma-separated (overrides width and "
                                           "spacing)")
    first_radius: object = option(0.0, group="rings", metavar="RADIUS", length=True, bounds=Bounds(minimum=0),
                                  help="inner edge of the first ring: arcsec, or a length such as 4pix")
    max_radius: object = option(None, group="rings", metavar="RADIUS", length=True, bounds=Bounds(above=0),
                                help="outer edge of the last ring (default: the edge of the valid data)")
    azimuth_weight: str = option("abs-cos", group="fitting", choices=AZIMUTH_WEIGHT_NAMES,
                                 help="weight of a pixel by its disc azimuth theta from the major axis: none, "
                                      "|cos theta| (abs-cos) or cos^2 theta (cos-squared)")
    minor_axis_gap: float = option(15.0, group="fitting", metavar="DEG",
                                   bounds=Bounds(minimum=0, maximum=75, why="a wider gap leaves less than a sixth of "
                                                                          "each ring"),
                                   help="half-opening in deg of the sector about the minor axis left out of the fit")
    half: str = option("whole", group="fitting", choices=HALF_NAMES,
                       help="fit the whole disc or only its approaching or receding half")
    clip: float | None = option(None, group="fitting", metavar="SIGMA",
                                bounds=Bounds(minimum=1, why="a lower level clips good pixels"),
                                help="clip pixels beyond this many robust sigma and refit (default: no clipping)")
    outlier_screen: bool = option(True, group="fitting",
                                  help="keep every valid pixel: no screen for wild pixels (by default, pixels beyond "
                                       "outlier_level robust sigma of a median ring model are left out of the fit "
                                       "and mapped in left_out.fits)")
    outlier_level: float = option(5.0, group="fitting", metavar="SIGMA",
                                  bounds=Bounds(minimum=3, why="a lower level leaves out good pixels of a Gaussian "
                                                                "residual"),
                                  help="the outlier screen leaves out pixels whose residual from a median ring model "
                                       "is beyond this many robust sigma of their ring (its MAD and the error map)")
    outlier_share: float = option(0.05, group="fitting", metavar="FRACTION",
                                  bounds=Bounds(above=0, maximum=0.5, why="a screen that may leave out most pixels "
                                                                          "would hide what the model misses"),
                                  help="the most the outlier screen may leave out, as a fraction of the pixels; "
                                       "beyond it none is left out and a caution says so")
    fixed: tuple = option((), group="fitting", form="names", flag="--fix", metavar="NAME[,NAME]",
                          choices=RING_PARAMETER_NAMES,
                          help="hold parameters fixed in every stage (at the starting value or the first guess): "
                               + " ".join(RING_PARAMETER_NAMES))
    initial: dict = option(default_factory=dict, group="initial", entries=STARTING_VALUES, entry_bounds=STARTING_BOUNDS,
                           help="starting values by parameter name, used instead of the first guess")
    fit_radial: bool = option(False, group="fitting", help="also fit v_radial per ring")
    seed: int = option(0, group="fitting", bounds=Bounds(minimum=0, maximum=2**32 - 1),
                       help="seed of every random step")
    low_inclination: float = option(30.0, group="fitting", metavar="DEG", bounds=Bounds(minimum=0, below=90),
                                    help="flag and widen errors below this inclination in deg")
    min_beams_per_ring: float = option(4.0, group="fitting", metavar="BEAMS", bounds=Bounds(minimum=0, maximum=1000),
                                       help="flag rings with fewer pixels than this many beams' worth (few_pixels)")
    min_coverage: float = option(0.5, group="fitting", metavar="FRACTION", bounds=Bounds(minimum=0, maximum=1),
                                 help="flag rings with less than this fraction of the usable azimuth covered "
                                      "(poor_coverage)")
    diagnostics: bool = option(True, group="fitting",
                               help="skip the diagnostics (harmonics, flow models, asymmetry; non-circular rings "
                                    "then stay in the geometry decision, and no radial-flow refit is tried)")
    bar_range: tuple | None = option(None, group="fitting", form="numbers", metavar="R_MIN,R_MAX",
                                     bounds=Bounds(minimum=0),
                                     help="radii in arcsec over which one common bar angle is fitted (default: the "
                                          "rings that choose a bisymmetric flow on their own)")
    beam_correction: bool = option(True, group="fitting",
                                   help="skip the beam-smearing correction (on by default when a beam is known)")
    resamples: int = option(20, group="fitting", metavar="N", bounds=Bounds(minimum=0, maximum=10000),
                            help="noise realisations for resampled errors (0 skips them)")
    quiet: bool = option(True, command_line=False, recorded=False,
                         help="no progress messages (on the command line: -q/--quiet)")

    def __post_init__(self):
        validate(self)
        for name in ("ring_edges", "bar_range"):
            if getattr(self, name) is not None:
                setattr(self, name, tuple(getattr(self, name)))
        if "position_angle" in self.initial:
            self.initial["position_angle"] %= 360.0
        self._check_agreement()
        unknown = set(self.fixed) - set(PARAMETERS)
        if unknown:
            raise InputError(f"cannot fix unknown parameter(s) {sorted(unknown)}; choose from {', '.join(PARAMETERS)}")
        known = set(PARAMETERS) | {"ra_center", "dec_center"}
        bad = set(self.initial) - known
        if bad:
            raise InputError(f"unknown initial value(s) {sorted(bad)}; choose from {', '.join(sorted(known))}")
        if self.spacing not in ("uniform", "logarithmic"):
            raise InputError(f"ring spacing {self.spacing!r} unknown; choose uniform or logarithmic")
        if self.bar_range is not None and (len(self.bar_range) != 2 or not self.bar_range[0] < self.bar_range[1]):
            raise InputError(f"bar range {self.bar_range}: give two radii in arcsec, smaller first")
        self.ring_options()  # validates azimuth_weight, minor_axis_gap, half, clip

    def _check_agreement(self) -> None:
        """Refuse options that contradict each other or would be silently ignored."""
        if self.ring_edges is not None:
            edges = self.ring_edges
            if len(edges) < 2 or any(b <= a for a, b in zip(edges, edges[1:])):
                raise InputError(f"ring_edges {list(edges)}: give at least two increasing radii in arcsec, e.g. "
                                 "0,10,20,30")
            given = [n for n, v in (("ring_width", self.ring_width), ("max_radius", self.max_radius)) if v is not None]
            given += ["first_radius"] if self.first_radius not in (0, 0.0, None) else []
            given += ["spacing"] if self.spacing != "uniform" else []
            if given:
                raise InputError(f"ring_edges sets every ring, so {', '.join(given)} would be ignored; give either "
                                 "ring_edges or the layout options, not both")
        if self.spacing != "logarithmic" and self.growth != 1.2:
            raise InputError(f"growth {self.growth} applies to logarithmic spacing only; add spacing = logarithmic "
                             "(--spacing logarithmic) or leave growth out")
        sky = {"ra_center", "dec_center"} & set(self.initial)
        pixel = {"x_center", "y_center"} & set(self.initial)
        if sky and pixel:
            raise InputError(f"the centre is given both in pixels ({', '.join(sorted(pixel))}) and on the sky "
                             f"({', '.join(sorted(sky))}); give one of the two")
        if self.fit_radial and "v_radial" in self.fixed:
            raise InputError("fit_radial asks to fit v_radial but v_radial is also fixed; choose one")
        if self.max_radius is not None and self.first_radius not in (0, 0.0, None) and all(
                isinstance(v, (int, float)) for v in (self.max_radius, self.first_radius)) and \
                self.max_radius <= self.first_radius:
            raise InputError(f"max_radius {self.max_radius} is not beyond first_radius {self.first_radius}; give a "
                             "larger maximum radius")

    def ring_options(self, half: str | None = None):
        """The :class:`..fitting.engine.RingFitOptions` of these options (``half`` overrides)."""
        from ..fitting.engine import RingFitOptions

        return RingFitOptions(azimuth_weight=self.azimuth_weight, minor_axis_gap=self.minor_axis_gap,
                              half=half or self.half, clip=self.clip)

    @classmethod
    def from_mapping(cls, values: dict, where: str = "fit option") -> "FitOptions":
        """From a dict such as a TOML run file's ``[fit]`` table (dashes or underscores), values checked
        against the declared types; errors name ``where``."""
        specs = {spec.name: spec for spec in field_specs(cls)}
        clean = {str(k).replace("-", "_"): v for k, v in values.items()}
        unknown = set(clean) - set(specs)
        if unknown:
            raise InputError(f"unknown {where}(s) {sorted(unknown)}; known: {', '.join(sorted(specs))}")
        return cls(**{k: coerce(specs[k], v, f"{where} {k}") for k, v in clean.items()})

    def to_dict(self) -> dict:
        """The options as recorded in ``fit.json`` (``quiet`` left out: it changes no result)."""
        return recorded_values(self)


@dataclass
class InputOptions:
    """What is read besides the velocity map; file names are read relative to the run file or manifest."""

    error_map: str | None = option(None, group="inputs", path=True, metavar="FITS",
                                   help="map of velocity errors (same units rule as the map)")
    intensity_map: str | None = option(None, group="inputs", path=True, metavar="FITS",
                                       help="intensity (moment-0) map; reprojected if on another grid")
    dispersion_map: str | None = option(None, group="inputs", path=True, metavar="FITS",
                                        help="velocity-dispersion (moment-2) map: adds the asymmetric-drift-corrected "
                                             "circular speed to curve.ecsv (needs the intensity map)")
    beam: str | None = option(None, group="inputs", metavar="MAJ[,MIN[,PA]]",
                              help="beam FWHM in arcsec (major, minor) and its position angle in deg (default: "
                                   "BMAJ/BMIN/BPA of the map)")
    pixel_scale: float | None = option(None, group="inputs", metavar="ARCSEC",
                                       bounds=Bounds(above=0, maximum=36000, why="arcsec per pixel"),
                                       help="arcsec per pixel, for maps without celestial WCS")
    velocity_unit: str | None = option(None, group="inputs", metavar="UNIT",
                                       help="unit of the map when BUNIT is missing or wrong (km/s, m/s)")
    velocity_convention: str | None = option(
        None, group="inputs", choices=CONVENTION_NAMES,
        help="Doppler convention of the velocities: for a velocity map, the one it is in (default: read from its "
             "header: CTYPE3 VRAD/VOPT/VELO/FREQ, VELREF, or the VELCONV card of 'tiltedring maps'; optical assumed "
             "with a caution when it says none); for a cube, the one its maps are made in (default: the cube's own; "
             "radio for a frequency axis, optical for a wavelength axis). Sets the rest-frame correction of "
             "curve.ecsv")
    velocity_map_kind: str | None = option(
        None, group="inputs", choices=MAP_KIND_NAMES,
        help="how the map's velocities were taken from the spectra: moment (intensity-weighted mean, moment 1), "
             "peak, gaussian or hermite (fitted line centre), optical-centroid (Gaussian centre of an optical "
             "line); the beam-smearing correction models that kind (default: the VELKIND card of 'tiltedring "
             "maps', else moment assumed). For a cube, velocity_kind sets it")
    bin: int | None = option(None, group="inputs", metavar="N", bounds=Bounds(minimum=1, maximum=1000),
                             help="average N x N pixel blocks before fitting (for maps too large for memory, or far "
                                  "finer than the beam)")

    def __post_init__(self):
        validate(self)
        if self.dispersion_map is not None and self.intensity_map is None:
            raise InputError("a dispersion map is used with the intensity map (asymmetric drift needs both); give "
                             "intensity_map (--intensity-map) too")
        if self.beam is not None:
            from ..io.maps import Beam

            Beam.parse(self.beam)
        if self.velocity_unit is not None:
            from ..io.maps import parse_velocity_unit

            parse_velocity_unit(self.velocity_unit)

    def read_arguments(self) -> dict:
        """Keyword arguments of :func:`..io.maps.read_velocity_map` (maps by their reader's names)."""
        return {"error": self.error_map, "intensity": self.intensity_map, "dispersion": self.dispersion_map,
                "beam": self.beam, "pixel_scale": self.pixel_scale, "velocity_unit": self.velocity_unit,
                "velocity_convention": self.velocity_convention, "velocity_map_kind": self.velocity_map_kind}


#: astropy's own realisation (astropy.cosmology.realizations), so the default needs no check
DEFAULT_COSMOLOGY = "Planck18"


@dataclass
class CurveOptions:
    """How the rotation-curve product (``curve.ecsv``) is put in physical units."""

    distance: object = option(None, group="curve", metavar="DISTANCE",
                              bounds=Bounds(above=0, maximum=1e5, why="Mpc"),
                              help="distance: a number in Mpc or a length such as 12Mpc (adds radius_kpc)")
    redshift: float | None = option(None, group="curve", bounds=Bounds(above=0, maximum=20),
                                    help="redshift, for the angular-diameter distance when no distance is given")
    cosmology: str = option(DEFAULT_COSMOLOGY, group="curve", help="astropy cosmology used with the redshift")

    def __post_init__(self):
        validate(self)
        if self.distance is not None and self.redshift is not None:
            raise InputError("give a distance or a redshift, not both (the redshift only serves to find a distance)")
        if self.distance is not None:
            from ..products.curve import parse_distance

            parse_distance(self.distance)
        if self.redshift is not None or self.cosmology != DEFAULT_COSMOLOGY:
            check_cosmology(self.cosmology)  # importing astropy.cosmology costs about a second: only when it matters

    def to_dict(self) -> dict:
        return asdict(self)


def check_cosmology(name: str) -> str:
    """``name`` when astropy provides a cosmology of that name (``astropy.cosmology.realizations``)."""
    from astropy.cosmology import realizations

    available = tuple(realizations.available)
    if name not in available:
        raise InputError(f"cosmology {name!r} is not one astropy provides; choose one of {', '.join(available)}")
    return name


@dataclass
class CubeOptions:
    """How velocity maps are made when the input is a spectral cube (``[cube]``; :mod:`..io.velocity_fields`)."""

    velocity_kind: str = option("hermite", group="cube", choices=VELOCITY_KIND_NAMES,
                                help="line centre per spectrum: moment (moment 1), peak, gaussian, or hermite "
                                     "(the peak of a Gauss-Hermite fit with h3)")
    exclude_velocities: str | None = option(None, group="cube", metavar="LO:HI[,LO:HI]",
                                            help="velocity ranges (km/s, the cube's convention) holding foreground, "
                                                 "e.g. Galactic HI; a range starting with a minus sign needs the "
                                                 "'=' form: --exclude-velocities=-60:5")
    exclusion: str = option("interpolate", group="cube", choices=EXCLUSION_NAMES,
                            help="how the excluded ranges are treated: interpolate (vetoed off the galaxy; on it the "
                                 "foreground interpolated from around the galaxy is subtracted) or veto (left out of "
                                 "every spectrum; lines near them are blanked)")
    detect_foreground: bool = option(True, group="cube",
                                     help="keep channels where emission at one velocity fills most of the field "
                                          "(by default they are found, left out like an excluded range, and named "
                                          "in a caution: a foreground or a continuum-subtraction problem)")
    all_regions: bool = option(False, group="cube",
                               help="keep every emission region of the mask (default: only the largest, the galaxy)")
    mask_threshold: float = option(4.0, group="cube", metavar="SIGMA", bounds=Bounds(above=0, maximum=1000),
                                   help="clip level of the smoothed cube, in units of its robust noise")
    minimum_run: int = option(3, group="cube", metavar="CHANNELS", bounds=Bounds(minimum=1, maximum=10000),
                              help="fewest adjacent channels a masked line must span")
    brightness_unit: str | None = option(None, group="cube", metavar="UNIT",
                                         help="unit of the cube when BUNIT is missing or wrong (Jy/beam, K)")
    rest_frequency: float | None = option(None, group="cube", metavar="HZ", bounds=Bounds(above=0),
                                          help="rest frequency in Hz when the cube states none")

    curve_from_cube: bool = option(True, group="cube",
                                   help="skip refitting the inner rings' rotation speed and dispersion on the cube "
                                        "itself (on by default for cubes; also makes model_cube.fits)")
    cube_fit_beams: float = option(4.0, group="cube", metavar="BEAMS", bounds=Bounds(above=0, maximum=1000),
                                   help="rings whose radius is within this many beams are fitted on the cube; the "
                                        "others keep the map's rotation speed")
    channel_response: str = option("boxcar", group="cube", choices=CHANNEL_RESPONSE_NAMES,
                                   help="spectral response of a channel in the model cube: boxcar (one channel "
                                        "wide) or hanning (boxcar then Hanning-smoothed, for Hanning-smoothed cubes)")

    def __post_init__(self):
        validate(self)

    def to_dict(self) -> dict:
        return asdict(self)

    def map_arguments(self, convention: str | None = None) -> dict:
        """Keyword arguments of :func:`..io.velocity_fields.make_velocity_maps`; ``convention`` is the
        input option ``velocity_convention`` (:class:`InputOptions`)."""
        return {"kind": self.velocity_kind, "exclude_velocities": self.exclude_velocities or (),
                "exclusion": self.exclusion, "keep_regions": "all" if self.all_regions else "largest",
                "mask_threshold": self.mask_threshold, "minimum_run": self.minimum_run,
                "detect_foreground": self.detect_foreground, "brightness_unit": self.brightness_unit, "rest_frequency": self.rest_frequency,
                "convention": convention}

