"""Every figure of the tool (with :mod:`.figure`, :mod:`.plot_style`, :mod:`.sky_panels` and
:mod:`.report`, the only code importing matplotlib, and only inside functions).

Each function takes the objects the API returns and an optional ``ax`` (or ``axes``) to draw into,
and returns the figure: a new ``matplotlib.figure.Figure`` (:mod:`.figure`: made without pyplot, so
the user's backend and rcParams stay as they were; it displays itself in Jupyter) or, when axes
are given, the figure they belong to. Figures are sized for a journal column (3.4 in) or page
(7 in) width with 8-pt tick labels; colours, robust limits and edge markers come from
:mod:`.plot_style`, sky maps from :mod:`.sky_panels`. The report (``report.pdf``) is assembled
from these functions by :mod:`.report`.

Our profile style: ticks inward on all four sides; the adopted profile as an ink line over a pale
band of its error; earlier stages as grey circles and teal squares, hollow; rings a flag warns
about drawn hollow; values beyond a robust axis range as hollow triangles on the edge they cross.
"""

from __future__ import annotations

import numpy as np

from .plot_style import (COLUMN, COPPER, GREY, INK, NOTE_PT, SLATE, TEAL, mark_outside, panel_caption,
                         robust_limits, style_axes)
from .plot_kinematics import plot_harmonics, plot_major_axis_slice, plot_minor_axis_slice, plot_warp
from .plot_products import plot_comparison, plot_mass_model

__all__ = ["plot_map", "plot_maps", "plot_geometry", "plot_rotation_curve", "plot_error_budget",
           "plot_major_axis_slice", "plot_minor_axis_slice", "plot_harmonics", "plot_warp", "plot_mass_model",
           "plot_comparison", "plot_centre", "plot_residual_histogram", "write_report"]

PAGE = 7.0
STAGE_STYLE = {"free": dict(marker="o", mfc="none", color=GREY, ms=3.5, ls="none", label="stage free"),
               "centred": dict(marker="s", mfc="none", color=TEAL, ms=3.5, ls="none", label="stage centred")}
ERROR_STYLE = {"formal": ("-", SLATE), "random": ("--", TEAL), "asymmetry": (":", COPPER),
               "geometry": ("-.", "#7f4b80"), "beam": ((0, (5, 1.5, 1, 1.5)), "#5b7f3a")}


def _figure(figsize, layout="constrained"):
    from .figure import new_figure

    return new_figure(figsize, layout)


def _axes(ax, figsize, projection=None):
    if ax is not None:
        return ax.figure, ax
    fig = _figure(figsize)
    return fig, fig.add_subplot(111, projection=projection)


def _value(column):
    return np.asarray(getattr(column, "value", column), float)


def _median(column) -> float:
    """Median of the finite values of ``column`` (NaN when there is none, e.g. the error of a held value)."""
    v = _value(column)
    return float(np.median(v[np.isfinite(v)])) if np.isfinite(v).any() else float("nan")


def _legend(ax, **kwargs):
    options = dict(fontsize=NOTE_PT, frameon=False, handlelength=1.8, borderaxespad=0.3)
    options.update(kwargs)
    return ax.legend(**options)


def _warned(table) -> np.ndarray:
    """Rings whose flags warn that the fitted numbers are unreliable (drawn hollow)."""
    serious = ("fit_failed", "few_pixels", "poor_coverage", "ill_conditioned", "inside_beam")
    return np.array([any(s in str(f) for s in serious) for f in table["flags"]])


def _distance_mpc(result):
    from astropy import units as u

    value = ((getattr(result, "inputs", None) or {}).get("curve") or {}).get("distance")
    if value is None:
        return None
    try:
        return float(value)
    except (TypeError, ValueError):
        try:
            return float(u.Quantity(value).to_value(u.Mpc))
        except Exception:
            return None


# ------------------------------------------------------------------------------------------------ maps
def plot_map(image, result=None, kind: str = "velocity", ax=None, rings: bool = True, title: str | None = None):
    """One map (velocity, model or residual) on the sky grid (:func:`.sky_panels.draw_sky_map`): colour bar
    on top, north-east arrows, scale bar, beam, rings and centre; the caption states the share of pixels
    beyond the colour range. ``image``: a 2-D array on the fit's grid, or a :class:`.maps.VelocityMap`."""
    from .sky_panels import draw_sky_map

    vmap = getattr(result, "vmap", None) if result is not None else None
    if hasattr(image, "velocity"):
        vmap, image = image, image.velocity
    if ax is None:
        fig = _figure((COLUMN, COLUMN * 1.12), layout=None)
        projection = vmap.wcs if (vmap is not None and vmap.wcs is not None) else None
        ax = fig.add_axes([0.25, 0.17, 0.68, 0.64], projection=projection)
    info = draw_sky_map(ax, image, vmap, kind, result=result, rings=rings, label=title,
                        distance_mpc=_distance_mpc(result))
    panel_caption(ax, _clip_caption(info), y=-0.2)
    return ax.figure


def _clip_caption(info) -> str:
    share = 100 * info["clipped"]
    where = f"{info['centre']:.0f} \N{PLUS-MINUS SIGN} {info['half']:.0f} km/s" if info["centre"] else \
        f"\N{PLUS-MINUS SIGN}{info['half']:.1f} km/s"
    return f"colours {where}; {share:.1f}% of pixels beyond"


def plot_maps(result, axes=None):
    """Data, model and residual side by side; data and model share one colour range."""
    from .sky_panels import draw_sky_map

    if axes is None:
        fig = _figure((PAGE * 1.5, COLUMN * 1.12), layout=None)
        proj = result.vmap.wcs
        axes = [fig.add_axes([0.08 + 0.33 * k, 0.17, 0.21, 0.64], projection=proj) for k in range(3)]
    distance = _distance_mpc(result)
    data = draw_sky_map(axes[0], result.vmap.velocity, result.vmap, "velocity", result,
                        label="data: line-of-sight velocity (km/s)", distance_mpc=distance)
    panel_caption(axes[0], _clip_caption(data), y=-0.2)
    model = draw_sky_map(axes[1], result.model, result.vmap, "velocity", result, centre=data["centre"],
                         half=data["half"], label="model (km/s)", distance_mpc=distance)
    panel_caption(axes[1], _clip_caption(model), y=-0.2)
    resid = draw_sky_map(axes[2], result.residual, result.vmap, "residual", result, distance_mpc=distance)
    panel_caption(axes[2], _clip_caption(resid), y=-0.2)
    return axes[0].figure


# ------------------------------------------------------------------------------------------------ profiles
def _unwrap_to(values, reference):
    ref = np.nanmedian(reference)
    return ref + np.mod(values - ref + 180.0, 360.0) - 180.0


def _profile(ax, result, name: str, label: str, show_speed_zero: bool = False):
    """One parameter against radius: both stages (hollow), the adopted profile (ink line, error band),
    the warp onset, rings left out of the geometry; robust limits, far values on the edge."""
    t = result.rings
    r = _value(t["radius"])
    adopted = _value(t[name])
    shown = []
    for stage, style in STAGE_STYLE.items():
        s = result.stages.get(stage)
        if s is None or name not in s.colnames:
            continue
        y = _value(s[name])
        if name == "position_angle":
            y = _unwrap_to(y, adopted)
        ax.errorbar(_value(s["radius"]), y, yerr=np.abs(np.nan_to_num(_value(s[f"{name}_err"]))), elinewidth=0.5,
                    capsize=0, **style)
        shown.append((_value(s["radius"]), y))
    err = np.abs(np.nan_to_num(_value(t[f"{name}_err"]))) if f"{name}_err" in t.colnames else np.zeros_like(r)
    ax.fill_between(r, adopted - err, adopted + err, color="0.86", lw=0, zorder=1)
    ax.plot(r, adopted, color=INK, lw=1.3, label="adopted", zorder=4)
    values = np.concatenate([y for _, y in shown] + [adopted])
    limits = robust_limits(values, include=np.concatenate([adopted, [0.0] if show_speed_zero else []]),
                           min_span=6.0 if name in ("position_angle", "inclination") else 4.0)
    ax.set_ylim(*limits)
    for x, y in shown:
        mark_outside(ax, x, y, limits, colour=GREY)
    _mark_decisions(ax, result)
    ax.set_ylabel(label)
    style_axes(ax)
    return limits


def _mark_decisions(ax, result):
    warp = result.diagnostics.get("warp", {})
    if warp.get("detected") and warp.get("onset_radius") is not None:
        ax.axvline(warp["onset_radius"], color=COPPER, lw=0.8, ls=(0, (4, 2)), zorder=2)
    inner = warp.get("inner_change") or {}
    if inner.get("radius") is not None:
        ax.axvspan(0, inner["radius"], color="#f3e3d3", lw=0, zorder=0)
    for radius in warp.get("rings_excluded_as_non_circular") or []:
        ax.axvline(radius, color="0.6", lw=0.6, ls=":", zorder=0)


def plot_geometry(result, axes=None):
    """Position angle, inclination and rotation speed against radius: both stages and the adopted
    profile (warp onset as a dashed copper line, rings left out of the geometry as dotted grey lines)."""
    if axes is None:
        axes = _figure((COLUMN, COLUMN * 2.0)).subplots(3, 1, sharex=True)
    for ax, (name, label) in zip(axes, (("position_angle", "position angle (deg)"),
                                        ("inclination", "inclination (deg)"), ("v_rotation", "v_rotation (km/s)"))):
        _profile(ax, result, name, label, show_speed_zero=name == "v_rotation")
    _legend(axes[0], loc="best")
    axes[-1].set_xlabel("radius (arcsec)")
    axes[-1].set_xlim(0, _value(result.rings["radius_outer"])[-1])
    return axes[0].figure


def plot_rotation_curve(result, ax=None, components: bool = True):
    """The rotation curve with its total error, the curve before beam-smearing correction, both sides,
    and (new figure, ``components``) the error budget in a panel underneath. The speed axis starts at
    zero; rings a flag warns about are hollow; values beyond the robust range sit on the edge."""
    t = result.rings
    r = _value(t["radius"])
    if ax is None:
        fig = _figure((COLUMN, COLUMN * 1.35))
        if components:
            ax, ax2 = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [2.6, 1.2]})
        else:
            ax, ax2 = fig.add_subplot(111), None
    else:
        ax2 = None
    v, e = _value(t["v_rotation"]), np.abs(np.nan_to_num(_value(t["v_rotation_err"])))
    warned = _warned(t)
    for sel, face, label in ((~warned, INK, "v_rotation"), (warned, "white", "flagged ring")):
        if sel.any():
            ax.errorbar(r[sel], v[sel], yerr=e[sel], ls="none", color=INK, marker="o", ms=3.5, mfc=face, lw=0.9,
                        capsize=1.5, label=label, zorder=5)
    ax.plot(r, v, color=INK, lw=0.7, zorder=4)
    extra = []
    if "v_rotation_smeared" in t.colnames:
        ax.plot(r, _value(t["v_rotation_smeared"]), ls="--", color=GREY, lw=1.0, label="before beam corr.")
        extra.append(_value(t["v_rotation_smeared"]))
    for side, colour, marker in (("approaching", SLATE, "v"), ("receding", COPPER, "^")):
        if f"v_rotation_{side}" in t.colnames:
            y = _value(t[f"v_rotation_{side}"])
            ax.plot(r, y, ls="none", marker=marker, ms=3, color=colour, label=side)
            extra.append(y)
    limits = robust_limits(np.concatenate([v] + extra), e, include=[0.0], low=5, high=95, spread=0.15,
                           min_span=20.0)
    limits = (min(0.0, limits[0]), limits[1])
    ax.set_ylim(*limits)
    mark_outside(ax, r, v, limits)
    ax.set_xlim(0, _value(t["radius_outer"])[-1])
    ax.set_ylabel("rotation speed (km/s)")
    _legend(ax, loc="lower right", ncol=2, columnspacing=0.8, handlelength=1.5)
    style_axes(ax)
    if ax2 is not None:
        plot_error_budget(result, ax2)
    else:
        ax.set_xlabel("radius (arcsec)")
    return ax.figure


def plot_error_budget(result, ax=None):
    """Each component of v_rotation's error (every ``v_rotation_err_<part>`` column) and the total."""
    fig, ax = _axes(ax, (COLUMN, COLUMN * 0.5))
    t = result.rings
    r = _value(t["radius"])
    drawn = []
    for name in t.colnames:
        if name.startswith("v_rotation_err_"):
            part = name.removeprefix("v_rotation_err_")
            ls, colour = ERROR_STYLE.get(part, ("-", GREY))
            y = _value(t[name])
            ax.plot(r, y, ls=ls, color=colour, lw=1.0, label=part.replace("_", " "))
            drawn.append(y)
    total = _value(t["v_rotation_err"])
    ax.plot(r, total, color=INK, lw=1.4, label="total")
    limits = robust_limits(np.concatenate(drawn + [total]), include=[0.0], low=0, high=90, spread=0.3, min_span=2.0)
    limits = (0.0, limits[1] * (1.45 if ax.figure.get_figwidth() * ax.get_position().width > 5.0 else 1.8))
    ax.set_ylim(*limits)
    mark_outside(ax, r, total, limits)
    ax.set_ylabel("error (km/s)")
    ax.set_xlabel("radius (arcsec)")
    wide = ax.figure.get_figwidth() * ax.get_position().width > 5.0
    _legend(ax, ncol=len(drawn) + 1 if wide else 3, loc="upper center", columnspacing=1.0, handlelength=2.2)
    style_axes(ax)
    return fig


def write_report(result, path, png_folder=None) -> list:
    """Write ``report.pdf`` (:func:`.report.write_report`: every registered page); PNG pages on request."""
    from .report import write_report as write

    return write(result, path, png_folder=png_folder)


def plot_centre(result, axes=None):
    """Where each ring of stage ``free`` put the centre (east and north offsets from the adopted centre,
    arcsec) and the systemic velocity, against radius, with the adopted values and their errors."""
    if axes is None:
        axes = _figure((COLUMN, COLUMN * 1.2)).subplots(2, 1, sharex=True)
    ax_v, ax_c = axes
    t, free = result.rings, result.stages.get("free", result.rings)
    r = _value(free["radius"])
    v0, v_err = _median(t["v_systemic"]), _median(t["v_systemic_err"])
    v = _value(free["v_systemic"])
    if np.isfinite(v_err):
        ax_v.axhspan(v0 - v_err, v0 + v_err, color="0.86", lw=0)
    ax_v.axhline(v0, color=INK, lw=1.3, label="adopted")
    ax_v.errorbar(r, v, yerr=np.abs(np.nan_to_num(_value(free["v_systemic_err"]))), elinewidth=0.5,
                  **STAGE_STYLE["free"])
    limits = robust_limits(v, include=[v0], min_span=6.0)
    ax_v.set_ylim(*limits)
    mark_outside(ax_v, r, v, limits, colour=GREY)
    ax_v.set_ylabel("v_systemic (km/s)")
    _legend(ax_v, loc="best", ncol=2)
    style_axes(ax_v)
    x0, y0 = _median(t["x_center"]), _median(t["y_center"])
    east, north = result.vmap.sky_offsets(_value(free["x_center"]), _value(free["y_center"]), x0, y0)
    ax_c.axhline(0.0, color=INK, lw=1.3)
    ax_c.plot(r, east, ls="none", marker="o", mfc="none", ms=3.5, color=SLATE, label="east offset")
    ax_c.plot(r, north, ls="none", marker="s", mfc="none", ms=3.5, color=COPPER, label="north offset")
    limits = robust_limits(np.concatenate([east, north]), include=[0.0], min_span=2.0 * result.vmap.pixel_scale)
    ax_c.set_ylim(*limits)
    mark_outside(ax_c, r, east, limits, colour=SLATE)
    mark_outside(ax_c, r, north, limits, colour=COPPER)
    ax_c.set_ylabel("centre offset (arcsec)")
    ax_c.set_xlabel("radius (arcsec)")
    ax_c.set_xlim(0, _value(t["radius_outer"])[-1])
    _legend(ax_c, loc="best", ncol=2)
    style_axes(ax_c)
    return ax_v.figure


def plot_residual_histogram(result, ax=None, half: float | None = None):
    """Distribution of data - model over the modelled pixels, with a Gaussian of the same rms and, when
    ``half`` is given, the colour range of the residual map shaded (what lies outside is clipped there)."""
    fig, ax = _axes(ax, (COLUMN, COLUMN * 0.7))
    res = np.asarray(result.residual, float)
    res = res[np.isfinite(res)]
    if res.size == 0:
        ax.text(0.5, 0.5, "no modelled pixels", ha="center", transform=ax.transAxes)
        return fig
    rms = float(np.sqrt(np.mean(res**2)))
    lo, hi = np.percentile(res, [0.5, 99.5])
    span = max(abs(lo), abs(hi), 3 * rms)
    edges = np.linspace(-span, span, 61)
    counts, _ = np.histogram(res, edges)
    centres = 0.5 * (edges[1:] + edges[:-1])
    if half is not None:
        ax.axvspan(-half, half, color="#efe9dc", lw=0, zorder=0, label=f"map colours \N{PLUS-MINUS SIGN}{half:.1f}")
    ax.step(centres, counts, where="mid", color=INK, lw=1.0, label="pixels")
    gauss = res.size * (edges[1] - edges[0]) / (rms * np.sqrt(2 * np.pi)) * np.exp(-0.5 * (centres / rms) ** 2)
    ax.plot(centres, gauss, color=COPPER, lw=1.0, ls="--", label=f"Gaussian, rms {rms:.2f}")
    beyond = float(np.mean(np.abs(res) > span))
    ax.set_xlim(-span, span)
    ax.set_ylim(0, 1.5 * counts.max())  # head room for the legend
    ax.set_xlabel("data \N{MINUS SIGN} model (km/s)")
    ax.set_ylabel("pixels")
    _legend(ax, loc="upper left", ncol=1)
    panel_caption(ax, f"{res.size} pixels, median |residual| {np.median(np.abs(res)):.1f} km/s,\n"
                      f"{100 * beyond:.1f}% beyond the axis", y=-0.25)
    style_axes(ax)
    return fig
