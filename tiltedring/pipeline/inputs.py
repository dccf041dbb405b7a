"""Before any fitting: the user's starting values checked, the valid pixels, and the rings laid out."""

from __future__ import annotations

import warnings

import numpy as np

from ..errors import FitCaution, InputError
from ..fitting.candidates import Pixels
from ..fitting.geometry import disc_coordinates
from ..fitting.parameters import PARAMETERS, Parameter, mask
from ..fitting.rings import RingLayout, parse_width
from .state import FitInputs

__all__ = ["prepare_inputs", "resolve_initial", "ring_layout"]


def resolve_initial(vmap, options) -> dict:
    """The user's starting values with a sky centre turned into pixels; impossible ones refused."""
    initial = dict(options.initial)
    if "ra_center" in initial or "dec_center" in initial:
        if not {"ra_center", "dec_center"} <= set(initial):
            raise InputError("give both ra_center and dec_center, or neither")
        initial["x_center"], initial["y_center"] = vmap.sky_to_pixel(initial.pop("ra_center"), initial.pop("dec_center"))
    ny, nx = vmap.shape
    for key, size in (("x_center", nx), ("y_center", ny)):
        if key in initial and not -0.5 <= initial[key] <= size - 0.5:
            raise InputError(
                f"the centre guess {key} = {initial[key]:.2f} pixels lies outside the map (0 to {size - 1}); "
                "give a centre inside the map (pixels are 0-based) or leave it out to let the tool find it"
            )
    inc = initial.get("inclination")
    if inc is not None and not 0 < inc < 90:
        raise InputError(f"inclination {inc} deg is outside (0, 90): give a value between face-on and edge-on")
    if "inclination" in options.fixed and inc is not None and (inc < 5 or inc > 85):
        raise InputError(
            f"inclination fixed at {inc} deg: near face-on the rotation cannot be measured, and near edge-on a "
            "thin-ring model of a velocity map does not apply; fix it between 5 and 85 deg or leave it free"
        )
    for key in options.fixed:
        if key == "v_radial":
            continue
        if key not in initial and key != "v_rotation":
            warnings.warn(f"{key} is fixed but no value was given: it is held at the first-guess value", FitCaution,
                          stacklevel=5)
    return initial


def valid_pixels(vmap) -> Pixels:
    """The map's valid pixels; a map with fewer than about four beams' worth is refused."""
    ok = vmap.valid
    needed = int(max(30, 4 * vmap.pixels_per_beam))
    if ok.sum() < needed:
        raise InputError(
            f"velocity map {vmap.source} has only {int(ok.sum())} valid pixels (fewer than {needed}, about four beams' "
            "worth): too few to fit a disc; check the masking or use a map with more coverage"
        )
    yy, xx = np.nonzero(ok)
    v = vmap.velocity[ok]
    sigma = vmap.error[ok] if vmap.error is not None else np.ones_like(v)
    return Pixels(xx.astype(float), yy.astype(float), v, sigma)


def prepare_inputs(vmap, options) -> FitInputs:
    """:class:`.state.FitInputs` of a fit: checked starting values, valid pixels, the parameters of stage
    ``free`` (all but the fixed ones, and v_radial only when asked) and the cautions known already."""
    notes = list(vmap.notes)
    initial = resolve_initial(vmap, options)
    pixels = valid_pixels(vmap)
    if vmap.error is None:
        notes.append("no error map: every pixel weighted equally; errors come from the scatter of the residuals")
    if vmap.beam is None:
        notes.append("no beam known: pixels treated as independent, so errors may be too small; give --beam")
    fixed = frozenset(options.fixed)
    free = ~mask(fixed & set(PARAMETERS))
    if not options.fit_radial:
        free[Parameter.v_radial] = False
    min_pixels = int(np.ceil(options.min_beams_per_ring * vmap.pixels_per_beam))
    return FitInputs(vmap, options, pixels, initial, fixed, free, min_pixels, tuple(notes))


def ring_layout(vmap, options, guess: dict, pixels) -> RingLayout:
    """Rings from the options: explicit edges, or widths (default one beam) out to ``max_radius`` or to
    where 99 per cent of the valid pixels near the first guess's major axis lie."""
    beam = vmap.beam.fwhm if vmap.beam is not None else None
    if options.ring_edges is not None:
        return RingLayout.explicit(options.ring_edges)
    width = parse_width(options.ring_width, vmap.pixel_scale, beam) if options.ring_width is not None else (
        beam if beam is not None else 2.0 * vmap.pixel_scale)
    first = parse_width(options.first_radius, vmap.pixel_scale, beam) if options.first_radius else 0.0
    if options.max_radius is not None:
        r_max = parse_width(options.max_radius, vmap.pixel_scale, beam)
    else:
        radius, cos_t, _ = disc_coordinates(pixels.x, pixels.y, guess["x_center"], guess["y_center"],
                                            vmap.sky_jacobian, guess["position_angle"], guess["inclination"])
        near_major = np.abs(cos_t) > np.cos(np.radians(45.0))
        pool = radius[near_major] if near_major.sum() > 10 else radius
        r_max = float(np.percentile(pool, 99.0))
    if beam is not None and r_max < 2 * beam:
        raise InputError(
            f"the galaxy's valid data reach only {r_max:.1f} arcsec, less than two beams ({2 * beam:.1f} arcsec): "
            "too small to fit rings; use a higher-resolution map"
        )
    if options.spacing == "logarithmic":
        return RingLayout.logarithmic(width, r_max, first, options.growth)
    return RingLayout.uniform(width, r_max, first)
