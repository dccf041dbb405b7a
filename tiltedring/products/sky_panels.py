"""Maps on the sky: one panel of a velocity, model or residual map with everything a reader needs.

A panel carries (our own arrangement): the colour bar along its top edge, exactly as wide as the
image, whose label says what is shown; right ascension and declination ticks from the WCS, spaced
so that three to five fall on each axis; a north-east arrow pair in the upper-right corner (drawn
from the WCS, so rotated and flipped grids are shown truthfully); a scale bar of a round angle in
the lower-right corner (and its length in kpc when the distance is known); the beam as a filled
ellipse in the lower-left corner; every second ring of the fit as a thin dotted ellipse and the
kinematic centre as a small white diamond. The colour range is robust (a percentile of the pixels)
and :func:`draw_sky_map` returns the share of pixels beyond it so a caption can state it.
"""

from __future__ import annotations

import numpy as np

from .plot_style import (COPPER, INK, LABEL_PT, NOTE_PT, TICK_PT, colour_bar, residual_colours, symmetric_range,
                         velocity_colours)

__all__ = ["draw_sky_map", "map_centre", "nice_angle", "sky_tick_spacing"]

_RA_STEPS_S = (0.1, 0.2, 0.5, 1, 2, 3, 5, 10, 15, 20, 30, 60, 120, 180, 300, 600, 900, 1200, 1800, 3600)
_DEC_STEPS_ARCSEC = (0.5, 1, 2, 3, 5, 10, 15, 20, 30, 60, 120, 180, 300, 600, 900, 1200, 1800, 3600, 7200)


def _value(column):
    return np.asarray(getattr(column, "value", column), float)


def map_centre(result, data) -> float:
    """Centre of a velocity colour range: the fit's systemic velocity, else the middle of the map's
    2nd-98th percentiles (for a rotating disc, close to its systemic velocity)."""
    if result is not None and "v_systemic" in result.rings.colnames:
        v = _value(result.rings["v_systemic"])
        if np.isfinite(v).any():
            return float(np.nanmedian(v))
    finite = np.asarray(data, float)[np.isfinite(data)]
    if finite.size == 0:
        return 0.0
    lo, hi = np.percentile(finite, [2, 98])
    return float(0.5 * (lo + hi))


def nice_angle(target_arcsec: float) -> float:
    """A round angle (arcsec) near ``target_arcsec`` for a scale bar."""
    for step in (1, 2, 5, 10, 15, 20, 30, 60, 120, 300, 600, 900, 1800, 3600, 7200, 18000, 36000):
        if step >= 0.7 * target_arcsec:
            return float(step)
    return float(round(target_arcsec / 36000.0) * 36000.0 or 36000.0)


def _angle_label(arcsec: float) -> str:
    if arcsec >= 3600 and arcsec % 3600 == 0:
        return f"{arcsec / 3600:.0f}\N{DEGREE SIGN}"
    if arcsec >= 60 and arcsec % 60 == 0:
        return f"{arcsec / 60:.0f}\N{PRIME}"
    return f"{arcsec:g}\N{DOUBLE PRIME}"


def sky_tick_spacing(wcs, shape) -> tuple:
    """(RA spacing, Dec spacing) in degrees giving three to five ticks across the map."""
    ny, nx = shape
    edge = np.linspace(0, 1, 25)
    xs = np.concatenate([edge * (nx - 1), np.full(25, nx - 1.0), edge * (nx - 1), np.zeros(25)])
    ys = np.concatenate([np.zeros(25), edge * (ny - 1), np.full(25, ny - 1.0), edge * (ny - 1)])
    ra, dec = wcs.celestial.pixel_to_world_values(xs, ys)
    ra = np.unwrap(np.radians(ra))
    ra_span = np.degrees(np.ptp(ra))
    dec_span = float(np.ptp(dec))

    def pick(span_deg, steps, unit_deg):
        for step in reversed(steps):
            if span_deg / (step * unit_deg) >= 3.0:
                return step * unit_deg
        return steps[0] * unit_deg

    return pick(ra_span, _RA_STEPS_S, 15.0 / 3600.0), pick(dec_span, _DEC_STEPS_ARCSEC, 1.0 / 3600.0)


def _wcs_ticks(ax, vmap) -> None:
    from astropy import units as u

    ra_step, dec_step = sky_tick_spacing(vmap.wcs, vmap.shape)
    ra, dec = ax.coords[0], ax.coords[1]
    ra.set_ticks(spacing=ra_step * u.deg, size=3.5, width=0.7)
    dec.set_ticks(spacing=dec_step * u.deg, size=3.5, width=0.7)
    ra.set_major_formatter("hh:mm:ss" if ra_step * 240 >= 1 else "hh:mm:ss.s")
    dec.set_major_formatter("dd:mm:ss" if dec_step * 3600 >= 1 else "dd:mm:ss.s")
    ra.set_separator(":")  # 02:34:55 is narrower than 2h34m55s, so more ticks keep their labels
    dec.set_separator(":")
    ra.set_axislabel("right ascension (J2000)" if "FK5" in str(getattr(vmap.wcs.wcs, "radesys", "")) else
                     "right ascension", size=LABEL_PT, minpad=0.4)
    dec.set_axislabel("declination", size=LABEL_PT, minpad=-0.2)
    for coord in (ra, dec):
        coord.set_ticklabel(size=TICK_PT, exclude_overlapping=True)
        coord.display_minor_ticks(False)


def _direction(vmap, east: float, north: float):
    """Pixel offset (dx, dy) of one arcsec toward (east, north) on the sky."""
    inv = np.linalg.inv(vmap.sky_jacobian)
    d = inv @ np.array([east, north], float)
    return d / np.hypot(*d)


def _halo():
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=2.6, foreground="white")]


def _compass(ax, vmap) -> None:
    ny, nx = vmap.shape
    size = 0.13 * min(nx, ny)
    x0, y0 = 0.86 * (nx - 1), 0.80 * (ny - 1)
    for label, (e, n) in (("N", (0.0, 1.0)), ("E", (1.0, 0.0))):
        dx, dy = _direction(vmap, e, n) * size
        ax.annotate("", xy=(x0 + dx, y0 + dy), xytext=(x0, y0), xycoords="data",
                    arrowprops=dict(arrowstyle="-|>", color=INK, lw=0.9, shrinkA=0, shrinkB=0, mutation_scale=7,
                                    path_effects=_halo()))
        ax.text(x0 + 1.35 * dx, y0 + 1.35 * dy, label, ha="center", va="center", fontsize=NOTE_PT, color=INK,
                path_effects=_halo())


def _scale_bar(ax, vmap, distance_mpc=None) -> None:
    ny, nx = vmap.shape
    length = nice_angle(0.22 * nx * vmap.pixel_scale)
    pixels = length / vmap.pixel_scale
    x1 = 0.95 * (nx - 1)
    y = 0.07 * (ny - 1)
    ax.plot([x1 - pixels, x1], [y, y], color=INK, lw=1.6, solid_capstyle="butt", path_effects=_halo())
    label = _angle_label(length)
    if distance_mpc:
        label += f" = {length * distance_mpc * 1e3 / 206264.806:.2g} kpc"
    ax.text(x1 - pixels / 2, y + 0.025 * ny, label, ha="center", va="bottom", fontsize=NOTE_PT, color=INK,
            path_effects=_halo())


def _beam(ax, vmap) -> None:
    from matplotlib.patches import Ellipse

    if vmap.beam is None:
        return
    ny, nx = vmap.shape
    scale = vmap.pixel_scale
    width, height = vmap.beam.minor / scale, vmap.beam.major / scale
    pad = max(width, height) / 2 + 0.03 * min(nx, ny)
    angle = vmap.north_angle + vmap.beam.position_angle  # beam PA on the sky -> angle on the pixel grid
    ax.add_patch(Ellipse((pad, pad), width, height, angle=angle, facecolor="0.25", edgecolor="white", lw=0.5,
                         zorder=5))


def _rings(ax, result) -> None:
    from ..fitting.geometry import sky_from_disc

    t = result.rings
    az = np.linspace(0, 360, 181)
    for k in range(1, len(t), 2):
        x, y = sky_from_disc(np.full(az.size, _value(t["radius"])[k]), az, _value(t["x_center"])[k],
                             _value(t["y_center"])[k], result.vmap.sky_jacobian, _value(t["position_angle"])[k],
                             _value(t["inclination"])[k])
        ax.plot(x, y, ls=(0, (1, 1.5)), lw=0.6, color="0.3")
    ax.plot(_value(t["x_center"])[0], _value(t["y_center"])[0], marker="D", ms=4.5, mfc="white", mec=INK, mew=0.8,
            ls="none", zorder=6)
    # the receding major axis: a short copper tick from the centre toward the position angle
    pa = np.radians(np.nanmedian(_value(t["position_angle"])))
    dx, dy = _direction(result.vmap, np.sin(pa), np.cos(pa)) * 0.5 * _value(t["radius"])[-1] / result.vmap.pixel_scale
    x0, y0 = _value(t["x_center"])[0], _value(t["y_center"])[0]
    ax.plot([x0, x0 + dx], [y0, y0 + dy], color=COPPER, lw=1.0, ls="--", zorder=5)


def draw_sky_map(ax, data, vmap, kind: str = "velocity", result=None, centre: float | None = None,
                 half: float | None = None, rings: bool = True, label: str | None = None,
                 distance_mpc: float | None = None) -> dict:
    """Draw one map panel into ``ax`` (module docstring). ``kind``: ``velocity`` (colours centred on
    ``centre``, default the systemic velocity) or ``residual`` (centred on zero). ``half``: half-width
    of the colour range (default: 99th percentile of |v - centre| for velocities; for residuals the 98th,
at most four robust standard deviations).

    Returns ``{"centre", "half", "clipped"}`` (``clipped``: share of pixels beyond the colours).
    """
    data = np.asarray(data, float)
    if kind == "residual":
        centre = 0.0
        cmap, default_label, pct = residual_colours(), "data \N{MINUS SIGN} model (km/s)", 98.0
    else:
        centre = map_centre(result, data) if centre is None else centre
        cmap, default_label, pct = velocity_colours(), "line-of-sight velocity (km/s)", 99.0
    own_half, _ = symmetric_range(data, centre, pct, max_sigma=4.0 if kind == "residual" else None)
    half = own_half if half is None else half
    finite = data[np.isfinite(data)]
    clipped = float(np.mean(np.abs(finite - centre) > half)) if finite.size else 0.0
    image = ax.imshow(data, origin="lower", cmap=cmap, vmin=centre - half, vmax=centre + half,
                      interpolation="nearest")
    ax.set_facecolor("white")
    extend = "both" if clipped > 0 else "neither"
    colour_bar(ax, image, label or default_label, extend=extend, side="top")
    if result is not None and rings:
        _rings(ax, result)
    if vmap is not None:
        _beam(ax, vmap)
        _compass(ax, vmap)
        _scale_bar(ax, vmap, distance_mpc)
    ny, nx = data.shape
    ax.set_xlim(-0.5, nx - 0.5)
    ax.set_ylim(-0.5, ny - 0.5)
    if hasattr(ax, "coords") and vmap is not None and vmap.wcs is not None:
        _wcs_ticks(ax, vmap)
    else:
        ax.set_xlabel("x (pixel)", fontsize=LABEL_PT)
        ax.set_ylabel("y (pixel)", fontsize=LABEL_PT)
        ax.tick_params(labelsize=TICK_PT)
    return {"centre": centre, "half": half, "clipped": clipped}
