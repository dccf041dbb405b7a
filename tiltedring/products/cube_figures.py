"""Figures of a fit made from a cube: channel maps and position-velocity slices, data against the model cube.

Each function returns a matplotlib Figure made without pyplot (:mod:`.figure`); matplotlib is imported
only when one is called. The data are drawn as a grey image, the model cube of the final rings
(:mod:`..fitting.cube_model`) as contours at 2, 4, 8, ... times the cube's median channel noise.
A slice runs through the disc centre (median over rings) along the position angle (major axis) or
at position angle + 90 deg (minor axis), sampled one pixel apart by bilinear interpolation
(``scipy.ndimage.map_coordinates``); offsets are arcsec on the sky, positive toward the position angle.
"""

from __future__ import annotations

import numpy as np

__all__ = ["plot_channel_maps", "plot_position_velocity", "cube_pages"]


def _levels(cube, model):
    noise = float(np.nanmedian(cube.noise)) if np.isfinite(np.nanmedian(cube.noise)) else 0.0
    top = float(np.nanmax(model)) if np.isfinite(model).any() else 0.0
    base = 2 * noise if noise > 0 else 0.05 * top
    if not top > base > 0:
        return None
    return base * 2.0 ** np.arange(0, int(np.log2(top / base)) + 1)


def _emitting_channels(model, count):
    """``count`` channels spread evenly over those where the model holds at least 2 % of its peak."""
    per_channel = np.nanmax(model, axis=(1, 2))
    lit = np.flatnonzero(per_channel >= 0.02 * np.nanmax(per_channel))
    if lit.size == 0:
        lit = np.arange(model.shape[0])
    return lit[np.unique(np.linspace(0, lit.size - 1, count).round().astype(int))]


def plot_channel_maps(cube, model, count: int = 9, fig=None):
    """``count`` channel maps (data image, model contours), velocity in each panel's corner."""
    from .figure import new_figure

    channels = _emitting_channels(model, count)
    columns = int(np.ceil(np.sqrt(len(channels))))
    rows = int(np.ceil(len(channels) / columns))
    fig = fig or new_figure((3.0 * columns, 3.0 * rows))
    levels = _levels(cube, model)
    scale = np.nanpercentile(cube.data[channels], [1, 99.8])
    for n, k in enumerate(channels):
        ax = fig.add_subplot(rows, columns, n + 1)
        ax.imshow(cube.data[k], origin="lower", cmap="Greys", vmin=scale[0], vmax=scale[1])
        if levels is not None:
            ax.contour(model[k], levels=levels, colors="tab:orange", linewidths=0.8)
        ax.text(0.04, 0.93, f"{cube.velocity[k]:.1f} km/s", transform=ax.transAxes, fontsize=8,
                bbox={"facecolor": "white", "alpha": 0.7, "linewidth": 0})
        ax.set_xticks([])
        ax.set_yticks([])
    fig.suptitle("channel maps: data (grey) and model cube (contours)")
    return fig


def _slice(cube, stack, rings, angle):
    """Offsets (arcsec) and the (n_channels, n_offsets) slice of ``stack`` through the centre at ``angle`` deg."""
    from scipy.ndimage import map_coordinates

    xc = float(np.nanmedian(np.asarray(getattr(rings["x_center"], "value", rings["x_center"]))))
    yc = float(np.nanmedian(np.asarray(getattr(rings["y_center"], "value", rings["y_center"]))))
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


def plot_position_velocity(cube, model, rings, axis: str = "major", ax=None):
    """Position-velocity slice of data (image) and model (contours) along the major or minor axis;
    on the major axis the ring speeds projected, v_sys +- v_rotation sin i, are marked."""
    from .figure import new_figure

    if axis not in ("major", "minor"):
        raise ValueError("axis must be 'major' or 'minor'")
    pa = float(np.nanmedian(np.asarray(getattr(rings["position_angle"], "value", rings["position_angle"]))))
    angle = pa if axis == "major" else pa + 90.0
    offsets, data = _slice(cube, cube.data, rings, angle)
    _, fitted = _slice(cube, model, rings, angle)
    if ax is None:
        ax = new_figure((6.0, 4.0)).add_subplot()
    extent = [offsets[0], offsets[-1], cube.velocity[0], cube.velocity[-1]]
    ax.imshow(data, origin="lower", aspect="auto", extent=extent, cmap="Greys")
    levels = _levels(cube, model)
    if levels is not None:
        ax.contour(offsets, cube.velocity, fitted, levels=levels, colors="tab:orange", linewidths=0.8)
    if axis == "major":
        value = lambda name: np.asarray(getattr(rings[name], "value", rings[name]), float)  # noqa: E731
        radius, v, inc = value("radius"), value("v_rotation"), np.radians(value("inclination"))
        v_sys = float(np.nanmedian(value("v_systemic")))
        ax.plot(radius, v_sys + v * np.sin(inc), ".", color="tab:blue", ms=4, label="rings")
        ax.plot(-radius, v_sys - v * np.sin(inc), ".", color="tab:blue", ms=4)
        ax.legend(loc="upper left", fontsize=8)
    ax.set_xlabel(f"offset along position angle {angle % 360:.0f} deg (arcsec)")
    ax.set_ylabel("velocity (km/s)")
    ax.set_title(f"{axis}-axis slice: data (grey), model cube (contours)")
    return ax.figure


def cube_pages(result) -> list:
    """(name, Figure) pages for a fit refitted on its cube (``result.model_cube`` set), else []."""
    from .figure import new_figure

    if getattr(result, "model_cube", None) is None:
        return []
    cube, model, rings = result.cube, result.model_cube, result.rings
    slices = new_figure((11.0, 4.5))
    left, right = slices.subplots(1, 2)
    plot_position_velocity(cube, model, rings, "major", left)
    plot_position_velocity(cube, model, rings, "minor", right)
    return [("channel_maps", plot_channel_maps(cube, model)), ("position_velocity", slices)]
