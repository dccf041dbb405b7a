"""Figures of the products after the fit: a mass-model decomposition and a map comparison.

Exported through :mod:`.plotting` (``plot_mass_model``, ``plot_comparison``).

Mass model (our layout): the observed curve with its errors, each baryonic component as its own
line (gas teal dotted, stellar disc slate dashed, bulge plum dash-dotted, all baryons grey), the
halo in copper, the total in ink; underneath, on the same radii, the residuals observed - model
with the errors, and the model's name, reduced chi-square and BIC above.

Comparison (our layout): one panel per map and per difference, each with its colour bar on top.
Velocity maps are centred each on its own systemic velocity (the middle of its 2nd-98th
percentiles, or the value given) with one common half-width, so equal rotation looks equal;
residual maps share one scale symmetric about zero; differences (map k minus the first) share one
symmetric scale of their own. Titles name the maps; captions give each panel's centre and the share
of pixels beyond its colours.
"""

from __future__ import annotations

import numpy as np

from .plot_style import COPPER, GREY, INK, NOTE_PT, SLATE, TEAL, TITLE_PT, mark_outside, robust_limits, style_axes

__all__ = ["plot_mass_model", "plot_comparison", "map_kind"]

_COMPONENTS = (("v_gas", "gas", dict(color=TEAL, ls=":", lw=1.3)),
               ("v_disc", "stellar disc", dict(color=SLATE, ls="--", lw=1.2)),
               ("v_bulge", "bulge", dict(color="#7f4b80", ls="-.", lw=1.2)),
               ("v_baryon", "all baryons", dict(color=GREY, ls="-", lw=1.0)),
               ("v_halo", "halo", dict(color=COPPER, ls=(0, (6, 2)), lw=1.3)),
               ("v_model", "total", dict(color=INK, ls="-", lw=1.6)))


def plot_mass_model(mass_result, axes=None):
    """Decomposition of one mass model (module docstring). ``axes``: (curve axes, residual axes) to draw
    into; by default a new column-width figure with both."""
    if axes is None:
        from .figure import new_figure

        fig = new_figure((3.4, 3.9), "constrained")
        axes = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1.1]})
    ax, low = axes
    c = mass_result.curves
    r = np.asarray(c["radius"], float)
    v, e = np.asarray(c["v_obs"], float), np.asarray(c["v_err"], float)
    ax.errorbar(r, v, yerr=e, ls="none", marker="o", ms=3.5, color=INK, mfc="white", elinewidth=0.8, capsize=1.2,
                label="observed", zorder=5)
    drawn = [v]
    for key, label, style in _COMPONENTS:
        y = np.asarray(c.get(key, np.zeros_like(r)), float)
        if np.any(y != 0):
            ax.plot(r, y, label=label, **style)
            drawn.append(y)
    limits = robust_limits(np.concatenate(drawn), e, include=[0.0], low=0, high=95, spread=0.1, min_span=20.0)
    ax.set_ylim(min(0.0, limits[0]), limits[1])
    ax.set_ylabel("circular speed (km/s)")
    title = (f"{mass_result.model}: reduced \N{GREEK SMALL LETTER CHI}\N{SUPERSCRIPT TWO} = "
             f"{mass_result.reduced_chi2:.2f}, BIC = {mass_result.bic:.1f}")
    ax.set_title(title, loc="left", fontsize=TITLE_PT)
    ax.legend(fontsize=NOTE_PT, frameon=False, ncol=2, loc="lower right", handlelength=2.2)
    style_axes(ax)
    residual = v - np.asarray(c["v_model"], float)
    low.axhline(0.0, color=GREY, lw=0.7)
    low.errorbar(r, residual, yerr=e, ls="none", marker="o", ms=3, color=INK, mfc="white", elinewidth=0.8)
    lim = robust_limits(residual, e, include=[0.0], low=5, high=95, spread=0.2, min_span=10.0)
    half = max(abs(lim[0]), abs(lim[1]))
    low.set_ylim(-half, half)
    mark_outside(low, r, residual, (-half, half))
    low.set_ylabel("obs \N{MINUS SIGN} model\n(km/s)")
    low.set_xlabel("radius (kpc)")
    low.set_xlim(0, r.max() * 1.04)
    style_axes(low)
    return ax.figure


def map_kind(values) -> str:
    """``"velocity"`` when a map's middle lies far from zero compared with its spread (a velocity field:
    systemic velocity plus rotation), else ``"residual"`` (differences, residuals: centred on zero)."""
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return "residual"
    lo, mid, hi = np.percentile(v, [2, 50, 98])
    return "velocity" if abs(mid) > 0.25 * (hi - lo) else "residual"


def _velocity_centre(values) -> float:
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    lo, hi = np.percentile(v, [2, 98])
    return float(0.5 * (lo + hi))


def comparison_scales(maps, differences, kinds, systemic=None) -> list:
    """(centre, half-width) for each map then each difference (module docstring)."""
    from .plot_style import symmetric_range

    scales = []
    velocity = [k for k, kind in enumerate(kinds) if kind == "velocity"]
    centres = {k: (systemic if systemic is not None else _velocity_centre(maps[k])) for k in velocity}
    half_velocity = max([symmetric_range(maps[k], centres[k], 99.0)[0] for k in velocity] or [1.0])
    others = [m for m, kind in zip(maps, kinds) if kind != "velocity"]
    half_residual = max([symmetric_range(m, 0.0, 98.0, max_sigma=4.0)[0] for m in others] or [1.0])
    for k, kind in enumerate(kinds):
        scales.append((centres[k], half_velocity) if kind == "velocity" else (0.0, half_residual))
    half_difference = max([symmetric_range(d, 0.0, 98.0, max_sigma=4.0)[0] for d in differences] or [1.0])
    return scales + [(0.0, half_difference)] * len(differences)


def plot_comparison(maps, names, reference=None, differences=(), kinds=None, systemic=None, axes=None):
    """Maps and their differences side by side (module docstring). ``reference``: the
    :class:`.maps.VelocityMap` of the common grid (WCS, beam, compass); ``kinds``: ``velocity`` or
    ``residual`` per map (default :func:`map_kind`); ``systemic``: one centre for every velocity map."""
    from .plotting import _clip_caption
    from .plot_style import panel_caption
    from .sky_panels import draw_sky_map

    maps, differences = list(maps), list(differences)
    kinds = list(kinds) if kinds is not None else [map_kind(m) for m in maps]
    panels = maps + differences
    titles = list(names) + [f"{n} \N{MINUS SIGN} {names[0]}" for n in names[1:len(differences) + 1]]
    scales = comparison_scales(maps, differences, kinds, systemic)
    if axes is None:
        from .figure import new_figure

        ncol = min(len(panels), 3)
        nrow = int(np.ceil(len(panels) / ncol))
        fig = new_figure((3.3 * ncol, 3.75 * nrow), None)
        wcs = reference.wcs if reference is not None else None
        axes = [fig.add_axes([(0.22 + k % ncol) / ncol * 0.99, 1 - (k // ncol + 0.83) / nrow, 0.66 / ncol,
                              0.6 / nrow], projection=wcs) for k in range(len(panels))]
    for k, (ax, data, title, (centre, half)) in enumerate(zip(axes, panels, titles, scales)):
        is_map = k < len(maps)
        kind = kinds[k] if is_map else "residual"
        what = "velocity" if kind == "velocity" else ("difference" if not is_map else "residual")
        info = draw_sky_map(ax, data, reference, "velocity" if kind == "velocity" else "residual", centre=centre,
                            half=half, label=f"{title}: {what} (km/s)")
        panel_caption(ax, _clip_caption(info), y=-0.24)
    return axes[0].figure
