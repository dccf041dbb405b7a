"""Everything that steers a fit, as one dataclass (:class:`FitOptions`)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

from ..errors import InputError
from ..fitting.engine import RingFitOptions
from ..fitting.kinematics import PARAMETERS

__all__ = ["FitOptions"]


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
    """

    ring_width: object = None
    spacing: str = "uniform"
    growth: float = 1.2
    ring_edges: tuple | None = None
    first_radius: object = 0.0
    max_radius: object = None
    azimuth_weight: str = "abs-cos"
    minor_axis_gap: float = 15.0
    half: str = "whole"
    clip: float | None = None
    fixed: tuple = ()
    initial: dict = field(default_factory=dict)
    fit_radial: bool = False
    seed: int = 0
    low_inclination: float = 30.0
    min_beams_per_ring: float = 4.0
    min_coverage: float = 0.5
    diagnostics: bool = True
    bar_range: tuple | None = None
    beam_correction: bool = True
    resamples: int = 20
    quiet: bool = True

    def __post_init__(self):
        self.fixed = tuple(self.fixed)
        unknown = set(self.fixed) - set(PARAMETERS)
        if unknown:
            raise InputError(f"cannot fix unknown parameter(s) {sorted(unknown)}; choose from {', '.join(PARAMETERS)}")
        known = set(PARAMETERS) | {"ra_center", "dec_center"}
        bad = set(self.initial) - known
        if bad:
            raise InputError(f"unknown initial value(s) {sorted(bad)}; choose from {', '.join(sorted(known))}")
        if self.spacing not in ("uniform", "logarithmic"):
            raise InputError(f"ring spacing {self.spacing!r} unknown; choose uniform or logarithmic")
        self.ring_options()  # validates azimuth_weight, minor_axis_gap, half, clip

    def ring_options(self, half: str | None = None) -> RingFitOptions:
        return RingFitOptions(azimuth_weight=self.azimuth_weight, minor_axis_gap=self.minor_axis_gap,
                              half=half or self.half, clip=self.clip)

    @classmethod
    def from_mapping(cls, values: dict) -> "FitOptions":
        """From a dict such as a TOML run file's ``[fit]`` table (dashes or underscores)."""
        clean = {str(k).replace("-", "_"): v for k, v in values.items()}
        names = {f for f in cls.__dataclass_fields__}
        unknown = set(clean) - names
        if unknown:
            raise InputError(f"unknown fit option(s) {sorted(unknown)}; known: {', '.join(sorted(names))}")
        if clean.get("ring_edges") is not None:
            clean["ring_edges"] = tuple(clean["ring_edges"])
        return cls(**clean)

    def to_dict(self) -> dict:
        return asdict(self)
