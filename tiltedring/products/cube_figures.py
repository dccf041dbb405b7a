"""Panels of a fit made from a cube: channel maps and position-velocity slices, data against the model cube.

The data are an image (paper white to slate ink, :func:`.plot_style.brightness_colours`, from -2 sigma
to the 99.5th percentile of the pixels shown; sigma the cube's median channel noise); the model cube
of the final rings (:mod:`..fitting.cube_model`) is drawn over them as copper contours at 3, 6, 12,
... sigma, so that where the contours enclose grey the data hold emission the model lacks, and the
reverse. Channels in excluded velocity ranges (foreground) are labelled so, and hatched in the slices.

A slice runs through the kinematic centre (median over rings) along the position angle (major axis,
receding half at positive offsets) or at position angle + 90 deg (minor axis), sampled one pixel
apart by bilinear interpolation (``scipy.ndimage.map_coordinates``); offsets are arcsec on the sky.
On the major axis the rings are marked at (+-radius, v_sys +- v_rotation sin i): filled where the
cube fit gave the speed, open where the map fit did.

The views are cut to where the model is above its lowest contour, one beam wider (all channels and
offsets when the model is too faint to contour). Matplotlib is imported only when a function is called.
"""

from __future__ import annotations

import numpy as np

from .plot_style import COPPER, GREY, INK, LABEL_PT, NOTE_PT, SLATE, TICK_PT, brightness_colours, style_axes

__all__ = ["contour_levels", "channel_choice", "sky_box", "draw_channel", "draw_position_velocity",
           "excluded_ranges", "plot_channel_maps", "plot_position_velocity"]

LEVEL_STEP = 2.0  # contour levels: 3 sigma times powers of two
FIRST_LEVEL = 3.0


def _value(column):
    return np.asarray(getattr(column, "value", column), float)


def _noise(cube) -> float:
    noise = np.asarray(cube.noise, float)
    noise = noise[np.isfinite(noise) & (noise > 0)]
    return float(np.median(noise)) if noise.size else 0.0


def contour_levels(cube, model):
    """3, 6, 12, ... times the median channel noise up to the model's peak (None when the model stays below)."""
    sigma = _noise(cube)
    top = float(np.nanmax(model)) if np.isfinite(model).any() else 0.0
    base = FIRST_LEVEL * sigma if sigma > 0 else 0.05 * top
    if not top > base > 0:
        return None
    return base * LEVEL_STEP ** np.arange(0, int(np.log(top / base) / np.log(LEVEL_STEP)) + 1)


def excluded_ranges(result) -> list:
    """The velocity ranges (km/s) left out of the fit on the cube (foreground), as recorded in ``fit.json``."""
    record = (getattr(result, "diagnostics", None) or {}).get("curve_from_cube", {})
    return [tuple(pair) for pair in record.get("excluded_velocities", [])]


def channel_choice(cube, model, count: int, levels) -> np.ndarray:
    """Up to ``count`` channels spread evenly over those where the model reaches its second contour (its
    first when it has one only; 2 % of its peak without contours): the ends of the range, where the
    model barely shows, are left out."""
    per_channel = np.nanmax(model, axis=(1, 2))
    floor = levels[min(1, len(levels) - 1)] if levels is not None else 0.02 * np.nanmax(per_channel)
    lit = np.flatnonzero(per_channel >= floor)
    if lit.size == 0:
        lit = np.arange(model.shape[0])
    if lit.size <= count:
        return lit
    return lit[np.unique(np.linspace(0, lit.size - 1, count).round().astype(int))]


def _pixel_scale(cube) -> float:
    return float(np.sqrt(abs(np.linalg.det(np.asarray(cube.sky_jacobian, float)))))


def _beam_pixels(cube) -> float:
    beam = getattr(cube, "beam", None)
    return beam.fwhm / _pixel_scale(cube) if beam is not None else 2.0


def sky_box(cube, model, levels) -> tuple:
    """(y0, y1, x0, x1): the pixels where the model reaches its lowest contour in any channel, grown by a
    beam and made square (the whole grid when nothing does)."""
    ny, nx = cube.data.shape[1:]
    if levels is None:
        return 0, ny, 0, nx
    ys, xs = np.nonzero(np.nanmax(model, axis=0) >= levels[0])
    if ys.size == 0:
        return 0, ny, 0, nx
    grow = int(np.ceil(_beam_pixels(cube)))
    half = max(ys.max() - ys.min(), xs.max() - xs.min()) / 2.0 + grow
    cy, cx = (ys.max() + ys.min()) / 2.0, (xs.max() + xs.min()) / 2.0
    y0, y1 = int(max(np.floor(cy - half), 0)), int(min(np.ceil(cy + half) + 1, ny))
    x0, x1 = int(max(np.floor(cx - half), 0)), int(min(np.ceil(cx + half) + 1, nx))
    return y0, y1, x0, x1


def brightness_range(cube, values) -> tuple:
    """(low, high) of the data colours: -2 sigma to the 99.5th percentile of ``values`` (at least 5 sigma)."""
    sigma = _noise(cube)
    finite = np.asarray(values, float)[np.isfinite(values)]
    top = float(np.percentile(finite, 99.5)) if finite.size else 1.0
    return -2.0 * sigma, max(top, 5.0 * sigma, 1e-30)


def _centre(result) -> tuple:
    t = result.rings
    return (float(np.nanmedian(_value(t["x_center"]))), float(np.nanmedian(_value(t["y_center"]))),
            float(np.nanmedian(_value(t["position_angle"]))), float(np.nanmedian(_value(t["v_systemic"]))))


def _sky_direction(cube, east: float, north: float) -> np.ndarray:
    """Unit pixel step toward (east, north) on the sky."""
    d = np.linalg.solve(np.asarray(cube.sky_jacobian, float), np.array([east, north], float))
    return d / np.hypot(*d)


def _in_excluded(velocity, width, ranges) -> bool:
    from ..io.cube_mask import excluded_channels

    return bool(excluded_channels([velocity], width, ranges)[0])


def draw_channel(ax, result, k: int, box, levels, colours, label_size: float = NOTE_PT):
    """Channel ``k`` of the data in ``box`` (image), the model's contours, the kinematic centre (white
    diamond), the receding major axis (dashed slate) and the beam (lower left). Returns the image."""
    from matplotlib.patches import Ellipse

    cube, model = result.cube, result.model_cube
    y0, y1, x0, x1 = box
    extent = (x0 - 0.5, x1 - 0.5, y0 - 0.5, y1 - 0.5)
    image = ax.imshow(cube.data[k, y0:y1, x0:x1], origin="lower", extent=extent, cmap=brightness_colours(),
                      vmin=colours[0], vmax=colours[1], interpolation="nearest")
    if levels is not None:
        yy, xx = np.mgrid[y0:y1, x0:x1]
        ax.contour(xx, yy, model[k, y0:y1, x0:x1], levels=levels, colors=COPPER, linewidths=0.7)
    xc, yc, pa, _ = _centre(result)
    reach = 0.5 * max(y1 - y0, x1 - x0)
    dx, dy = _sky_direction(cube, np.sin(np.radians(pa)), np.cos(np.radians(pa))) * reach
    ax.plot([xc - dx, xc + dx], [yc - dy, yc + dy], color=SLATE, lw=0.6, ls=(0, (4, 3)))
    ax.plot(xc, yc, marker="D", ms=3.5, mfc="white", mec=INK, mew=0.6, ls="none", zorder=6)
    if cube.beam is not None:
        scale = _pixel_scale(cube)
        width, height = cube.beam.minor / scale, cube.beam.major / scale
        pad = max(width, height) / 2 + 0.04 * (x1 - x0)
        north = _sky_direction(cube, 0.0, 1.0)
        angle = np.degrees(np.arctan2(-north[0], north[1])) + cube.beam.position_angle
        ax.add_patch(Ellipse((x0 - 0.5 + pad, y0 - 0.5 + pad), width, height, angle=angle, facecolor="0.35",
                             edgecolor="white", lw=0.5, zorder=5))
    velocity = cube.velocity[k]
    excluded = _in_excluded(velocity, cube.channel_width, excluded_ranges(result))
    ax.text(0.04, 0.96, f"{velocity:.1f} km/s" + (", excluded" if excluded else ""), transform=ax.transAxes,
            ha="left", va="top", fontsize=label_size, color=COPPER if excluded else INK,
            bbox={"facecolor": "white", "alpha": 0.75, "linewidth": 0, "pad": 1.5})
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_xticks([])
    ax.set_yticks([])
    return image


def slice_through_centre(cube, stack, rings, angle: float) -> tuple:
    """Offsets (arcsec) and the (n_channels, n_offsets) slice of ``stack`` through the kinematic centre at
    position angle ``angle`` deg (module docstring)."""
    from scipy.ndimage import map_coordinates

    xc = float(np.nanmedian(_value(rings["x_center"])))
    yc = float(np.nanmedian(_value(rings["y_center"])))
    jac = np.asarray(cube.sky_jacobian, float)
    step = float(np.sqrt(abs(np.linalg.det(jac))))
    reach = 0.5 * float(np.hypot(*stack.shape[1:])) * step
    offsets = np.arange(-reach, reach + step / 2, step)
    sky = np.vstack([np.sin(np.radians(angle)) * offsets, np.cos(np.radians(angle)) * offsets])
    dx, dy = np.linalg.solve(jac, sky)
    x, y = xc + dx, yc + dy
    inside = (x >= 0) & (x <= stack.shape[2] - 1) & (y >= 0) & (y <= stack.shape[1] - 1)
    values = np.array([map_coordinates(np.nan_to_num(plane), [y[inside], x[inside]], order=1) for plane in stack])
    return offsets[inside], values


def _window(cube, offsets, fitted, levels) -> tuple:
    """(offset limits, velocity limits) of a slice: where the model reaches its lowest contour, a beam and
    four channels (at least 20 km/s) wider."""
    if levels is None or not (fitted >= levels[0]).any():
        return (offsets[0], offsets[-1]), (cube.velocity[0], cube.velocity[-1])
    ks, js = np.nonzero(fitted >= levels[0])
    beam = cube.beam.fwhm if cube.beam is not None else 2 * _pixel_scale(cube)
    margin = max(4 * cube.channel_width, 20.0)
    lo_x, hi_x = max(offsets[js.min()] - beam, offsets[0]), min(offsets[js.max()] + beam, offsets[-1])
    lo_v = max(cube.velocity[ks.min()] - margin, cube.velocity[0])
    hi_v = min(cube.velocity[ks.max()] + margin, cube.velocity[-1])
    return (lo_x, hi_x), (lo_v, hi_v)


def draw_position_velocity(ax, result, axis: str = "major", colours=None):
    """Slice of the data (image) and the model cube (contours) along the ``axis`` (``major`` or ``minor``);
    excluded velocity ranges hatched; on the major axis the rings marked (module docstring). Returns the image."""
    if axis not in ("major", "minor"):
        raise ValueError("axis must be 'major' or 'minor'")
    cube, model, rings = result.cube, result.model_cube, result.rings
    _, _, pa, v_sys = _centre(result)
    angle = (pa if axis == "major" else pa + 90.0) % 360.0
    offsets, data = slice_through_centre(cube, cube.data, rings, angle)
    _, fitted = slice_through_centre(cube, model, rings, angle)
    levels = contour_levels(cube, model)
    (x_lo, x_hi), (v_lo, v_hi) = _window(cube, offsets, fitted, levels)
    step = offsets[1] - offsets[0] if offsets.size > 1 else 1.0
    dv = cube.channel_width
    extent = [offsets[0] - step / 2, offsets[-1] + step / 2, cube.velocity[0] - dv / 2, cube.velocity[-1] + dv / 2]
    shown = data[(cube.velocity >= v_lo) & (cube.velocity <= v_hi)][:, (offsets >= x_lo) & (offsets <= x_hi)]
    colours = colours or brightness_range(cube, shown)
    image = ax.imshow(data, origin="lower", aspect="auto", extent=extent, cmap=brightness_colours(),
                      vmin=colours[0], vmax=colours[1], interpolation="nearest")
    if levels is not None:
        ax.contour(offsets, cube.velocity, fitted, levels=levels, colors=COPPER, linewidths=0.8)
    for lo, hi in excluded_ranges(result):
        ax.axhspan(lo, hi, facecolor="none", edgecolor=GREY, hatch="////", lw=0, zorder=3)
    ax.axhline(v_sys, color=GREY, lw=0.6, ls=":", zorder=4)
    ax.axvline(0.0, color=GREY, lw=0.6, ls=":", zorder=4)
    if axis == "major":
        radius, v = _value(rings["radius"]), _value(rings["v_rotation"])
        projected = v * np.sin(np.radians(_value(rings["inclination"])))
        on_cube = np.asarray(rings["curve_source"]) == "cube" if "curve_source" in rings.colnames else \
            np.zeros(radius.size, bool)
        for sel, face, label in ((on_cube, INK, "rings fitted on the cube"), (~on_cube, "white", "rings from the map")):
            if sel.any():
                ax.plot(np.concatenate([radius[sel], -radius[sel]]),
                        np.concatenate([v_sys + projected[sel], v_sys - projected[sel]]), ls="none", marker="o",
                        ms=3.2, mfc=face, mec=INK, mew=0.7, label=label, zorder=6)
        ax.legend(loc="upper left", fontsize=NOTE_PT, frameon=True, framealpha=0.8, edgecolor="none",
                  handletextpad=0.3, borderaxespad=0.4)
    title = (f"major axis, position angle {angle:.1f}\N{DEGREE SIGN} (receding half at + offsets)" if axis == "major"
             else f"minor axis, position angle {angle:.1f}\N{DEGREE SIGN}")
    ax.set_title(title, loc="left", fontsize=LABEL_PT)
    ax.set_xlim(x_lo, x_hi)
    ax.set_ylim(v_lo, v_hi)
    ax.set_xlabel("offset along the slice (arcsec)")
    ax.set_ylabel("velocity (km/s)")
    style_axes(ax)
    return image


def _needs_cube(result):
    if getattr(result, "model_cube", None) is None or getattr(result, "cube", None) is None:
        raise ValueError("the result has no model cube: fit a cube with the curve from the cube on "
                         "(tiltedring.pipeline.cube_curve.refit_curve_on_cube)")


def plot_channel_maps(result, count: int = 12, fig=None):
    """A figure of up to ``count`` channel maps (data image, model contours; see :func:`draw_channel`)."""
    from .figure import new_figure

    _needs_cube(result)
    cube, model = result.cube, result.model_cube
    levels = contour_levels(cube, model)
    channels = channel_choice(cube, model, count, levels)
    box = sky_box(cube, model, levels)
    y0, y1, x0, x1 = box
    colours = brightness_range(cube, cube.data[channels, y0:y1, x0:x1])
    columns = int(np.ceil(np.sqrt(len(channels))))
    rows = int(np.ceil(len(channels) / columns))
    fig = fig or new_figure((2.2 * columns, 2.2 * rows + 0.5))
    axes = [fig.add_subplot(rows, columns, n + 1) for n in range(len(channels))]
    for ax, k in zip(axes, channels):
        image = draw_channel(ax, result, int(k), box, levels, colours)
    bar = fig.colorbar(image, ax=axes, orientation="horizontal", location="top", shrink=0.6, aspect=40)
    bar.set_label(f"data ({cube.unit}); contours: model cube", size=LABEL_PT)
    bar.ax.tick_params(labelsize=TICK_PT)
    return fig


def plot_position_velocity(result, axis: str = "major", ax=None):
    """A position-velocity slice of data and model (:func:`draw_position_velocity`) on its own figure or ``ax``."""
    from .figure import new_figure

    _needs_cube(result)
    if ax is None:
        ax = new_figure((6.0, 4.0)).add_subplot()
    draw_position_velocity(ax, result, axis)
    return ax.figure
