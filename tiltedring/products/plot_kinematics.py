"""Figures of the motions beyond the curve: position-velocity slices, harmonic amplitudes, the warp.

Exported through :mod:`.plotting` (``plot_major_axis_slice``, ``plot_minor_axis_slice``,
``plot_harmonics``, ``plot_warp``); same conventions: optional ``ax``, the figure returned.
"""

from __future__ import annotations

import numpy as np

from .plot_style import (COLUMN, COPPER, GREY, INK, NOTE_PT, SLATE, TEAL, TITLE_PT, mark_outside, robust_limits,
                         style_axes)

__all__ = ["plot_major_axis_slice", "plot_minor_axis_slice", "plot_harmonics", "plot_warp", "plot_sides", "slice_samples"]


def _value(column):
    return np.asarray(getattr(column, "value", column), float)


def _axes(ax, figsize):
    if ax is not None:
        return ax.figure, ax
    from .figure import new_figure

    fig = new_figure(figsize, "constrained")
    return fig, fig.add_subplot(111)


def _radial_panel(ax, size, ylabel, needed: str, table, missing: str):
    """(figure, axes, whether ``needed`` is a column of ``table``): a styled panel against radius that
    says ``missing`` in words when the column is absent."""
    fig, ax = _axes(ax, size)
    style_axes(ax)
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel(ylabel)
    if needed not in table.colnames:
        ax.text(0.5, 0.5, missing, ha="center", va="center", transform=ax.transAxes, fontsize=NOTE_PT)
        return fig, ax, False
    return fig, ax, True


def _legend(ax, **kwargs):
    options = dict(fontsize=NOTE_PT, frameon=False, handlelength=1.8, borderaxespad=0.3)
    options.update(kwargs)
    return ax.legend(**options)


def slice_samples(result, angle: float, width_beams: float = 1.0) -> dict:
    """Pixels within ``width_beams`` beams (two pixels without a beam) of the line through the kinematic
    centre at position angle ``angle`` (deg): ``offset`` along it (arcsec, positive toward ``angle``),
    the data and the model map (the beam-smeared model when the correction ran) at those pixels."""
    vmap = result.vmap
    t = result.rings
    xc, yc = _value(t["x_center"])[0], _value(t["y_center"])[0]
    yy, xx = np.nonzero(np.isfinite(vmap.velocity))
    east, north = vmap.sky_offsets(xx, yy, xc, yc)
    a = np.radians(angle)
    along = east * np.sin(a) + north * np.cos(a)
    across = east * np.cos(a) - north * np.sin(a)
    half = width_beams * (vmap.beam.fwhm if vmap.beam is not None else 2 * vmap.pixel_scale) / 2
    near = np.abs(across) <= half
    order = np.argsort(along[near])
    pick = (yy[near][order], xx[near][order])
    return {"offset": along[near][order], "data": vmap.velocity[pick], "model": np.asarray(result.model)[pick],
            "half_width": half}


def _binned(offset, values, step):
    """Median of ``values`` in bins of ``step`` arcsec along the slice (NaN-free bins only)."""
    ok = np.isfinite(values)
    if not ok.any():
        return np.array([]), np.array([])
    edges = np.arange(offset[ok].min(), offset[ok].max() + step, step)
    index = np.digitize(offset[ok], edges)
    centres, medians = [], []
    for k in np.unique(index):
        sel = index == k
        if sel.sum() >= 1:
            centres.append(np.mean(offset[ok][sel]))
            medians.append(np.median(values[ok][sel]))
    return np.array(centres), np.array(medians)


def _slice(result, ax, angle, title, width_beams, intrinsic: bool):
    t = result.rings
    s = slice_samples(result, angle, width_beams)
    vsys = float(np.nanmedian(_value(t["v_systemic"])))
    ax.plot(s["offset"], s["data"], ls="none", marker=".", ms=2.2, color="0.55", alpha=0.6,
            label=f"data: pixels within {s['half_width']:.1f}\N{DOUBLE PRIME} of the slice")
    smeared = "v_rotation_smeared" in t.colnames
    step = max((result.vmap.beam.fwhm / 2) if result.vmap.beam is not None else 0.0, 2 * result.vmap.pixel_scale)
    x, m = _binned(s["offset"], s["model"], step)
    ax.plot(x, m, color=COPPER, lw=1.6, label="model map, beam-smeared" if smeared else "model map")
    if intrinsic:
        r = _value(t["radius"])
        vproj = _value(t["v_rotation"]) * np.sin(np.radians(_value(t["inclination"])))
        ok = np.isfinite(vproj)
        ax.plot(np.concatenate([-r[ok][::-1], r[ok]]), np.concatenate([vsys - vproj[ok][::-1], vsys + vproj[ok]]),
                color=INK, lw=0.9, ls="--", label="adopted curve, v_sys \N{PLUS-MINUS SIGN} v_rotation sin i")
    ax.axhline(vsys, color=GREY, lw=0.6, zorder=0)
    ax.axvline(0.0, color=GREY, lw=0.6, zorder=0)
    values = np.concatenate([s["data"], m])
    limits = robust_limits(values, low=1, high=99, spread=0.08, include=[vsys], min_span=20.0)
    ax.set_ylim(*limits)
    mark_outside(ax, s["offset"], s["data"], limits, colour=GREY)
    ax.set_xlabel("offset along the slice (arcsec)")
    ax.set_ylabel("line-of-sight velocity (km/s)")
    ax.set_title(title, loc="left", fontsize=TITLE_PT)
    _legend(ax, loc="upper left" if np.nanmean(_value(t["v_rotation"])) >= 0 else "lower left")
    style_axes(ax)


def plot_major_axis_slice(result, ax=None, width_beams: float = 1.0):
    """Position-velocity slice along the major axis (position angle of the receding half, positive
    offsets there): the data pixels within half ``width_beams`` beams of the axis, the model map on the
    same pixels (beam-smeared when the correction ran, so it is what the data should show) as a median
    line, and the adopted curve projected, v_sys +/- v_rotation sin i."""
    fig, ax = _axes(ax, (COLUMN * 1.4, COLUMN * 0.9))
    pa = float(np.nanmedian(_value(result.rings["position_angle"]))) % 360.0
    _slice(result, ax, pa, f"major axis, position angle {pa:.1f}\N{DEGREE SIGN} (receding half at + offsets)",
           width_beams, intrinsic=True)
    return fig


def plot_minor_axis_slice(result, ax=None, width_beams: float = 1.0):
    """Position-velocity slice along the minor axis (position angle + 90 deg at positive offsets): flat
    at v_sys for circular motion; a tilt shows radial flows or a turned major axis."""
    fig, ax = _axes(ax, (COLUMN, COLUMN * 0.8))
    pa = (float(np.nanmedian(_value(result.rings["position_angle"]))) + 90.0) % 360.0
    _slice(result, ax, pa, f"minor axis, position angle {pa:.1f}\N{DEGREE SIGN}", width_beams, intrinsic=False)
    return fig


_HARMONICS = (("s1", "o", SLATE), ("c2", "s", TEAL), ("s2", "D", "#5b7f3a"), ("c3", "^", COPPER),
              ("s3", "v", "#7f4b80"))


def plot_harmonics(result, ax=None):
    """Harmonic amplitudes against radius, in the disc plane (divided by sin i), with the non-circular
    total; the axis follows the bulk of the values (at least 0-15 km/s), far values sit on the top edge."""
    t = result.rings
    fig, ax, ok = _radial_panel(ax, (COLUMN, COLUMN * 0.8), "amplitude in the disc plane (km/s)", "harmonic_s1", t,
                                "no diagnostics in this fit\n(run without --no-diagnostics)")
    if not ok:
        return fig
    r = _value(t["radius"])
    sin_i = np.sin(np.radians(_value(t["inclination"])))
    drawn = []
    for k, (name, marker, colour) in enumerate(_HARMONICS):
        y = np.abs(_value(t[f"harmonic_{name}"])) / sin_i
        e = np.abs(np.nan_to_num(_value(t[f"harmonic_{name}_err"]) / sin_i))
        x = r + (k - 2) * 0.012 * np.nanmax(r)  # a small sideways step keeps the symbols apart
        ax.errorbar(x, y, yerr=e, ls="none", marker=marker, ms=3.2, mfc="none", color=colour, elinewidth=0.5,
                    label=name)
        drawn.append((x, y))
    total = _value(t["noncircular_in_plane"])
    ax.plot(r, total, color=INK, lw=1.3, label="non-circular total")
    threshold = (result.diagnostics.get("non_circular", {}).get("thresholds") or {}).get("min_harmonic_amplitude")
    if threshold:
        ax.axhline(threshold, color=COPPER, lw=0.7, ls=":", label=f"flag level {threshold:g} km/s")
    limits = robust_limits(np.concatenate([y for _, y in drawn] + [total]), include=[0.0, 15.0], low=0, high=90,
                           spread=0.25)
    limits = (0.0, limits[1])
    ax.set_ylim(*limits)
    for x, y in drawn:
        mark_outside(ax, x, y, limits, colour=GREY)
    mark_outside(ax, r, total, limits)
    ax.set_xlim(0, _value(t["radius_outer"])[-1])
    _legend(ax, ncol=4, loc="lower left", bbox_to_anchor=(0.0, 1.01), columnspacing=0.9, borderaxespad=0.0)
    return fig


def plot_warp(result, ax=None):
    """The disc's warp against radius: tilt of each ring's plane from the inner disc's plane (left axis;
    the adopted profile as a line, each ring's own stage-centred plane as hollow squares) and the line
    of nodes (right axis, copper; Briggs 1990). A flat disc shows its flat profile and says so."""
    from ..diagnostics.warp import tilt_and_line_of_nodes

    fig, ax = _axes(ax, (COLUMN, COLUMN * 0.8))
    t = result.rings
    r = _value(t["radius"])
    pa0, inc0 = _value(t["position_angle"])[0], _value(t["inclination"])[0]
    warp = result.diagnostics.get("warp", {})
    adopted = _value(t["warp_tilt"]) if "warp_tilt" in t.colnames else np.zeros_like(r)
    ax.plot(r, adopted, color=INK, lw=1.3, label="adopted profile")
    own = result.stages.get("centred")
    shown = np.array([])
    if own is not None:
        tilt, _ = tilt_and_line_of_nodes(_value(own["position_angle"]), _value(own["inclination"]), pa0, inc0)
        ax.plot(_value(own["radius"]), tilt, ls="none", marker="s", ms=3.5, mfc="none", color=TEAL,
                label="each ring's own plane")
        shown = tilt
    limits = robust_limits(np.concatenate([shown, adopted]), include=[0.0, 5.0], low=0, high=90, spread=0.3)
    limits = (0.0, limits[1])
    ax.set_ylim(*limits)
    if own is not None:
        mark_outside(ax, _value(own["radius"]), shown, limits, colour=TEAL)
    ax.set_xlim(0, _value(t["radius_outer"])[-1])
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("tilt from the inner disc (deg)")
    style_axes(ax)
    if warp.get("detected"):
        ax.axvline(warp["onset_radius"], color=COPPER, lw=0.8, ls=(0, (4, 2)))
        lon = _value(t["warp_line_of_nodes"])
        right = ax.twinx()
        right.plot(r, lon, color=COPPER, lw=1.0, marker="o", ms=2.5, label="line of nodes")
        right.set_ylim(0, 180)
        right.set_yticks([0, 45, 90, 135, 180])
        right.set_ylabel("line of nodes (deg)", color=COPPER)
        right.tick_params(labelsize=8, direction="in", colors=COPPER, length=3)
        ax.tick_params(right=False)
        text = f"warp beyond {warp['onset_radius']:.0f}\N{DOUBLE PRIME}"
    else:
        text = "no warp: one plane fits every ring" if not warp.get("note") else str(warp["note"])
    ax.text(0.03, 0.95, text, transform=ax.transAxes, ha="left", va="top", fontsize=NOTE_PT, color=INK)
    _legend(ax, loc="center left")
    return fig


def plot_sides(result, ax=None):
    """Receding minus approaching v_rotation against radius with its error (formal and noise terms of
    both sides); rings flagged ``asymmetric`` drawn filled in copper."""
    t = result.rings
    fig, ax, ok = _radial_panel(ax, (COLUMN, COLUMN * 0.7), "receding \N{MINUS SIGN} approaching (km/s)",
                                "v_rotation_receding", t, "the sides were not fitted apart")
    if not ok:
        return fig
    r = _value(t["radius"])
    d = _value(t["v_rotation_receding"]) - _value(t["v_rotation_approaching"])
    e = np.abs(np.nan_to_num(_value(t["v_rotation_err_formal"]))) * 2.0
    flagged = np.array(["asymmetric" in str(f) for f in t["flags"]])
    ax.axhline(0.0, color=GREY, lw=0.7)
    ax.errorbar(r[~flagged], d[~flagged], yerr=e[~flagged], ls="none", marker="o", ms=3.5, mfc="white", color=INK,
                elinewidth=0.6, label="rings")
    if flagged.any():
        ax.errorbar(r[flagged], d[flagged], yerr=e[flagged], ls="none", marker="o", ms=4, color=COPPER,
                    elinewidth=0.6, label="flagged asymmetric")
    limits = robust_limits(d, e, include=[0.0, -10.0, 10.0], low=5, high=95, spread=0.3)
    ax.set_ylim(*limits)
    mark_outside(ax, r, d, limits)
    ax.set_xlim(0, _value(t["radius_outer"])[-1])
    _legend(ax, loc="best")
    return fig
