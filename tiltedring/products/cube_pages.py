"""The report's pages for a fit made from a cube (registered after ``kinematics`` in :mod:`.report`).

Both pages exist only when the fit has a model cube (the input was a cube and the curve was fitted on
it, :mod:`..pipeline.cube_curve`); they are A4 report pages (:func:`.report.new_page`).

``cube channels``: twelve channel maps (fewer when fewer channels hold the model) in three columns,
spread evenly over the channels where the model reaches its second contour, cut to the galaxy,
with one brightness scale along the top (:mod:`.cube_figures` for what each panel shows).

``cube slices``: the major-axis slice across the page (data, model contours, the rings' projected
speeds), the minor-axis slice under it, and at the foot the inner curve as the map fit and the cube
fit gave it (the rings fitted on the cube shaded) and the gas dispersion of every ring.
"""

from __future__ import annotations

import numpy as np

from .cube_figures import (brightness_range, channel_choice, contour_levels, draw_channel, draw_position_velocity,
                           excluded_ranges, sky_box)
from .plot_style import COPPER, GREY, INK, LABEL_PT, NOTE_PT, TICK_PT, robust_limits, style_axes

__all__ = ["channel_maps_page", "slices_page", "has_model_cube", "CHANNEL_PANELS"]

CHANNEL_PANELS = (3, 4)  # columns, rows
_PANEL, _GAP, _LEFT, _TOP = 2.0, 0.12, 0.95, 1.65  # inches


def has_model_cube(result) -> bool:
    return getattr(result, "model_cube", None) is not None and getattr(result, "cube", None) is not None


def _value(column):
    return np.asarray(getattr(column, "value", column), float)


def _colour_bar(page, image, left, top, width, label):
    """A horizontal colour bar ``width`` inches wide at (``left``, ``top``), ticks under it, ``label`` on its left."""
    cax = page.panel(left, top, width, 0.12)
    bar = page.figure.colorbar(image, cax=cax, orientation="horizontal")
    bar.ax.tick_params(labelsize=TICK_PT, width=0.6, length=2.5)
    bar.outline.set_linewidth(0.6)
    page.text(left - 0.12, top - 0.01, label, size=LABEL_PT, ha="right", color=INK)


def _caption(page, top, text):
    from .report import _Cursor

    _Cursor(page, top).paragraph(text, size=NOTE_PT, colour="0.3")


def channel_maps_page(result) -> list:
    """Page ``cube channels`` (module docstring); [] without a model cube."""
    if not has_model_cube(result):
        return []
    from .report import new_page

    cube, model = result.cube, result.model_cube
    columns, rows = CHANNEL_PANELS
    levels = contour_levels(cube, model)
    channels = channel_choice(cube, model, columns * rows, levels)
    box = sky_box(cube, model, levels)
    y0, y1, x0, x1 = box
    colours = brightness_range(cube, cube.data[channels, y0:y1, x0:x1])
    page = new_page(result, "channel maps: data and model cube")
    for n, k in enumerate(channels):
        row, column = divmod(n, columns)
        ax = page.panel(_LEFT + column * (_PANEL + _GAP), _TOP + row * (_PANEL + _GAP), _PANEL, _PANEL)
        image = draw_channel(ax, result, int(k), box, levels, colours)
    width = columns * _PANEL + (columns - 1) * _GAP
    _colour_bar(page, image, _LEFT + width / 3, 1.15, width / 2, f"data ({cube.unit})")
    bottom = _TOP + rows * (_PANEL + _GAP) + 0.05
    sigma = float(np.median(cube.noise))
    level_text = ("copper contours: the model cube of the final rings at "
                  + ", ".join(f"{v / sigma:.0f}" for v in levels[:5]) + (", ..." if len(levels) > 5 else "")
                  + f" times the median channel noise ({sigma:.3g} {cube.unit})") if levels is not None else \
        "the model cube is too faint to contour"
    excluded = excluded_ranges(result)
    _caption(page, bottom, f"Grey scale: the data, channel velocity in each corner ({cube.convention} convention, "
                           f"{cube.channel_width:.3g} km/s channels); {level_text}. White diamond: kinematic centre; "
                           "dashed line: major axis; grey ellipse: the beam. "
                           + (f"Channels marked 'excluded' lie in the velocity ranges left out as foreground "
                              f"({', '.join(f'{lo:g} to {hi:g}' for lo, hi in excluded)} km/s)." if excluded else ""))
    return [page.figure]


def _curve_panel(ax, result):
    t = result.rings
    r = _value(t["radius"])
    on_cube = np.asarray(t["curve_source"]) == "cube"
    if on_cube.any():
        ax.axvspan(0.0, _value(t["radius_outer"])[on_cube][-1], color="0.9", lw=0, zorder=0,
                   label="rings fitted on the cube")
    v_map, e_map = _value(t["v_rotation_map"]), np.nan_to_num(_value(t["v_rotation_err_map"]))
    v, e = _value(t["v_rotation"]), np.nan_to_num(_value(t["v_rotation_err"]))
    ax.errorbar(r, v_map, yerr=e_map, ls="none", marker="s", ms=3.2, mfc="white", mec=GREY, color=GREY, lw=0.8,
                capsize=1.5, label="map fit")
    ax.errorbar(r, v, yerr=e, ls="-", marker="o", ms=3.2, color=INK, lw=0.8, capsize=1.5, label="adopted (cube inside)")
    limits = robust_limits(np.concatenate([v, v_map]), e, include=[0.0], low=2, high=98, spread=0.1, min_span=20.0)
    ax.set_ylim(min(0.0, limits[0]), limits[1])
    ax.set_xlim(0.0, _value(t["radius_outer"])[-1])
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("rotation speed (km/s)")
    ax.set_title("inner curve: map and cube", loc="left", fontsize=LABEL_PT)
    ax.legend(loc="lower right", fontsize=NOTE_PT, frameon=True, framealpha=0.85, edgecolor="none",
              handlelength=1.5)
    style_axes(ax)


def _dispersion_panel(ax, result):
    t = result.rings
    r, s = _value(t["radius"]), _value(t["dispersion"])
    e = np.nan_to_num(_value(t["dispersion_err"]))
    on_cube = np.asarray(t["curve_source"]) == "cube"
    for sel, face, label in ((on_cube, COPPER, "fitted on the cube"), (~on_cube, "white", "matched line widths")):
        if sel.any():
            ax.errorbar(r[sel], s[sel], yerr=e[sel], ls="none", marker="o", ms=3.2, mfc=face, mec=COPPER,
                        color=COPPER, lw=0.8, capsize=1.5, label=label)
    limits = robust_limits(s, e, include=[0.0], low=2, high=98, spread=0.2, min_span=10.0)
    ax.set_ylim(0.0, limits[1])
    ax.set_xlim(0.0, _value(t["radius_outer"])[-1])
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("gas dispersion (km/s)")
    ax.set_title("line-of-sight dispersion", loc="left", fontsize=LABEL_PT)
    ax.legend(loc="best", fontsize=NOTE_PT, frameon=True, framealpha=0.85, edgecolor="none", handlelength=1.2)
    style_axes(ax)


def slices_page(result) -> list:
    """Page ``cube slices`` (module docstring); [] without a model cube."""
    if not has_model_cube(result):
        return []
    from .report import new_page

    cube = result.cube
    page = new_page(result, "position-velocity slices: data and model cube")
    major = page.panel(1.0, 1.75, 6.55, 3.0)
    image = draw_position_velocity(major, result, "major")
    _colour_bar(page, image, 1.0 + 6.55 / 3, 1.15, 6.55 / 2, f"data ({cube.unit})")
    minor = page.panel(1.0, 5.3, 6.55, 2.1)
    draw_position_velocity(minor, result, "minor", colours=image.get_clim())
    _curve_panel(page.panel(1.0, 8.0, 2.75, 2.05), result)
    _dispersion_panel(page.panel(4.8, 8.0, 2.75, 2.05), result)
    excluded = excluded_ranges(result)
    _caption(page, 10.55, "Slices through the kinematic centre, one pixel wide; grey scale the data, copper contours "
                          "the model cube (levels as on the channel maps), dotted lines the systemic velocity and "
                          "the centre. Circles: v_sys \N{PLUS-MINUS SIGN} v_rotation sin i at \N{PLUS-MINUS SIGN} "
                          "radius, filled where the cube fit gave the speed."
                          + (" Hatched: velocity ranges left out as foreground." if excluded else ""))
    return [page.figure]
