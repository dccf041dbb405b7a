"""Every figure of the tool (with :mod:`.figure`, the only code importing matplotlib).

Each function takes the objects the API returns, an optional ``ax`` (or ``axes``) to draw into,
and returns the figure: a new ``matplotlib.figure.Figure`` (:mod:`.figure`: made without pyplot,
so the user's backend and rcParams stay as they were; it displays itself in Jupyter) or, when
axes are given, the figure they belong to. Layout choices are our own: maps carry the beam as a filled ellipse in the
lower-left corner, every second ring as a thin dotted ellipse and the kinematic centre as a small
diamond; velocity maps use a diverging purple-orange scale centred on the systemic velocity,
residual maps a brown-teal scale centred on zero (both colour-blind safe); profile plots show
stage values as open markers and the adopted profile as a line with a shaded error band.
Figures are sized for a journal column (3.4 in) or page (7 in) width.
"""

from __future__ import annotations

import numpy as np

__all__ = ["plot_map", "plot_maps", "plot_geometry", "plot_rotation_curve", "plot_major_axis_slice",
           "plot_harmonics", "plot_warp", "plot_mass_model", "plot_comparison", "write_report"]

COLUMN, PAGE = 3.4, 7.0
VELOCITY_CMAP, RESIDUAL_CMAP = "PuOr_r", "BrBG"
STAGE_STYLE = {"free": dict(marker="o", mfc="none", color="0.55", ms=4, ls="none", label="stage free"),
               "centred": dict(marker="s", mfc="none", color="tab:blue", ms=4, ls="none", label="stage centred")}


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


def _ellipse_points(result, k, n=181):
    from ..fitting.geometry import sky_from_disc

    t = result.rings
    az = np.linspace(0, 360, n)
    return sky_from_disc(np.full(n, _value(t["radius"])[k]), az, _value(t["x_center"])[k], _value(t["y_center"])[k],
                         result.vmap.sky_jacobian, _value(t["position_angle"])[k], _value(t["inclination"])[k])


def _beam_ellipse(ax, vmap):
    from matplotlib.patches import Ellipse

    if vmap.beam is None:
        return
    ny, nx = vmap.shape
    scale = vmap.pixel_scale
    # beam position angle on the sky -> angle on the pixel grid through the local north direction
    angle = vmap.north_angle + vmap.beam.position_angle
    ax.add_patch(Ellipse((0.08 * nx, 0.08 * ny), vmap.beam.minor / scale, vmap.beam.major / scale, angle=angle,
                         facecolor="0.2", edgecolor="white", lw=0.5, zorder=5))


def plot_map(image, result=None, kind: str = "velocity", ax=None, rings: bool = True, title: str | None = None):
    """One map (velocity, model or residual) with WCS axes, beam, rings and the kinematic centre.

    ``image``: a 2-D array on the fit's grid, or a :class:`.maps.VelocityMap`. Colour scale symmetric
    about the systemic velocity (velocity, model) or zero (residual).
    """
    vmap = getattr(result, "vmap", None) if result is not None else None
    if hasattr(image, "velocity"):
        vmap, image = image, image.velocity
    data = np.asarray(image, float)
    projection = vmap.wcs if (ax is None and vmap is not None and vmap.wcs is not None) else None
    fig, ax = _axes(ax, (COLUMN, COLUMN * 0.95), projection)
    if kind == "residual":
        centre, cmap, label = 0.0, RESIDUAL_CMAP, "data - model (km/s)"
        half = np.nanpercentile(np.abs(data), 98) if np.isfinite(data).any() else 1.0
    else:
        centre = float(np.nanmedian(_value(result.rings["v_systemic"]))) if result is not None else float(
            np.nanmedian(data))
        cmap, label = VELOCITY_CMAP, "line-of-sight velocity (km/s)"
        half = np.nanpercentile(np.abs(data - centre), 99) if np.isfinite(data).any() else 1.0
    im = ax.imshow(data, origin="lower", cmap=cmap, vmin=centre - half, vmax=centre + half, interpolation="nearest")
    fig.colorbar(im, ax=ax, shrink=0.85, label=label)
    if result is not None and rings:
        for k in range(0, len(result.rings), 2):
            x, y = _ellipse_points(result, k)
            ax.plot(x, y, ls=":", lw=0.6, color="0.25")
        ax.plot(_value(result.rings["x_center"])[0], _value(result.rings["y_center"])[0], marker="D", ms=4,
                mfc="white", mec="black", ls="none")
    if vmap is not None:
        _beam_ellipse(ax, vmap)
    if hasattr(ax, "coords"):  # WCS axes
        ra, dec = ax.coords[0], ax.coords[1]
        ra.set_axislabel("right ascension", fontsize=7)
        dec.set_axislabel("declination", fontsize=7)
        for coord in (ra, dec):
            coord.set_ticks(number=3)
            coord.set_ticklabel(size=6)
    else:
        ax.set_xlabel("x (pixel)")
        ax.set_ylabel("y (pixel)")
    if title:
        ax.set_title(title, fontsize=9)
    return fig


def plot_maps(result, axes=None):
    """Data, model and residual side by side; data and model share one colour scale."""
    if axes is None:
        fig = _figure((PAGE * 1.3, PAGE * 0.45))
        proj = result.vmap.wcs
        axes = [fig.add_subplot(1, 3, k + 1, projection=proj) for k in range(3)]
    fig = axes[0].figure
    for ax, data, kind, title in zip(axes, (result.vmap.velocity, result.model, result.residual),
                                     ("velocity", "velocity", "residual"), ("data", "model", "residual")):
        plot_map(data, result, kind, ax=ax, title=title)
    return fig


def plot_geometry(result, axes=None):
    """Position angle, inclination and rotation speed against radius: stages and the adopted profile."""
    if axes is None:
        axes = _figure((COLUMN, COLUMN * 1.9)).subplots(3, 1, sharex=True)
    fig = axes[0].figure
    r = _value(result.rings["radius"])
    for ax, name, unit in zip(axes, ("position_angle", "inclination", "v_rotation"), ("deg", "deg", "km/s")):
        for stage, style in STAGE_STYLE.items():
            t = result.stages.get(stage)
            if t is None:
                continue
            y = _value(t[name])
            if name == "position_angle":
                y = _unwrap_to(y, _value(result.rings[name]))
            ax.errorbar(_value(t["radius"]), y, yerr=_value(t[f"{name}_err"]), elinewidth=0.6, **style)
        y = _value(result.rings[name])
        e = np.nan_to_num(_value(result.rings[f"{name}_err"]))
        ax.plot(r, y, color="black", lw=1.2, label="adopted")
        ax.fill_between(r, y - e, y + e, color="0.8", lw=0)
        if name != "v_rotation":  # keep stray inner-ring values from squashing the profile
            centred = _value(result.stages["centred"][name]) if "centred" in result.stages else y
            if name == "position_angle":
                centred = _unwrap_to(centred, y)
            lo, hi = np.nanpercentile(np.concatenate([y, centred]), [10, 90])
            pad = max(5.0, 0.6 * (hi - lo))
            ax.set_ylim(lo - pad, hi + pad)
        ax.set_ylabel(f"{name.replace('_', ' ')} ({unit})")
    axes[0].legend(fontsize=6, frameon=False)
    axes[-1].set_xlabel("radius (arcsec)")
    return fig


def _unwrap_to(values, reference):
    ref = np.nanmedian(reference)
    return ref + np.mod(values - ref + 180.0, 360.0) - 180.0


def plot_rotation_curve(result, ax=None, components: bool = True):
    """The rotation curve with its total error, the uncorrected (smeared) curve, both sides, and the
    error budget in a lower panel."""
    t = result.rings
    r = _value(t["radius"])
    if ax is None:
        fig = _figure((COLUMN, COLUMN * 1.3))
        ax, ax2 = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1.3]})
    else:
        fig, ax2 = ax.figure, None
    ax.errorbar(r, _value(t["v_rotation"]), yerr=_value(t["v_rotation_err"]), color="black", marker="o", ms=3,
                lw=1, capsize=1.5, label="v_rotation")
    if "v_rotation_smeared" in t.colnames:
        ax.plot(r, _value(t["v_rotation_smeared"]), ls="--", color="0.5", lw=1, label="before beam correction")
    for side, color in (("approaching", "tab:blue"), ("receding", "tab:orange")):
        if f"v_rotation_{side}" in t.colnames:
            ax.plot(r, _value(t[f"v_rotation_{side}"]), ls="none", marker="^" if side == "receding" else "v",
                    ms=3, color=color, label=side)
    ax.set_ylabel("rotation speed (km/s)")
    ax.legend(fontsize=6, frameon=False, loc="lower right")
    if ax2 is not None and components:
        for name, style in (("v_rotation_err_formal", "-"), ("v_rotation_err_resampled", "--"),
                            ("v_rotation_err_sides", ":"), ("v_rotation_err_inclination", "-.")):
            if name in t.colnames:
                ax2.plot(r, _value(t[name]), ls=style, lw=1, label=name.replace("v_rotation_err_", ""))
        ax2.set_ylabel("error (km/s)")
        ax2.set_xlabel("radius (arcsec)")
        ax2.legend(fontsize=5, frameon=False, ncol=2)
    return fig


def plot_major_axis_slice(result, ax=None, width_beams: float = 1.0):
    """Position-velocity slice of the map along the major axis: pixels within ``width_beams`` beams of the
    axis (dots) and the model curve v_sys +/- v sin i (line)."""
    fig, ax = _axes(ax, (COLUMN, COLUMN * 0.8))
    vmap = result.vmap
    t = result.rings
    xc, yc = _value(t["x_center"])[0], _value(t["y_center"])[0]
    pa = np.radians(np.nanmedian(_value(t["position_angle"])))
    yy, xx = np.nonzero(np.isfinite(vmap.velocity))
    east, north = vmap.sky_offsets(xx, yy, xc, yc)
    along = east * np.sin(pa) + north * np.cos(pa)
    across = east * np.cos(pa) - north * np.sin(pa)
    half = width_beams * (vmap.beam.fwhm if vmap.beam is not None else 2 * vmap.pixel_scale) / 2
    near = np.abs(across) <= half
    ax.plot(along[near], vmap.velocity[yy[near], xx[near]], ls="none", marker=".", ms=1.5, color="0.45")
    r = _value(t["radius"])
    vsys = np.nanmedian(_value(t["v_systemic"]))
    vproj = _value(t["v_rotation"]) * np.sin(np.radians(_value(t["inclination"])))
    ax.plot(np.concatenate([-r[::-1], r]), np.concatenate([vsys - vproj[::-1], vsys + vproj]), color="tab:purple",
            lw=1.3)
    ax.axhline(vsys, color="0.7", lw=0.6)
    ax.set_xlabel("major-axis offset (arcsec)")
    ax.set_ylabel("line-of-sight velocity (km/s)")
    return fig


def plot_harmonics(result, ax=None):
    """Harmonic amplitudes against radius (in the disc plane), with the non-circular total."""
    fig, ax = _axes(ax, (COLUMN, COLUMN * 0.75))
    t = result.rings
    if "harmonic_s1" not in t.colnames:
        ax.text(0.5, 0.5, "no diagnostics in this fit", ha="center", transform=ax.transAxes)
        return fig
    r = _value(t["radius"])
    sin_i = np.sin(np.radians(_value(t["inclination"])))
    for name, marker in (("s1", "o"), ("c2", "s"), ("s2", "D"), ("c3", "^"), ("s3", "v")):
        ax.errorbar(r, np.abs(_value(t[f"harmonic_{name}"])) / sin_i, yerr=_value(t[f"harmonic_{name}_err"]) / sin_i,
                    ls="none", marker=marker, ms=3, mfc="none", elinewidth=0.5, label=name)
    total = _value(t["noncircular_in_plane"])
    ax.plot(r, total, color="black", lw=1.2, label="non-circular total")
    ax.set_ylim(0, max(15.0, 1.5 * np.nanmax(total) if np.isfinite(total).any() else 15.0))
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("amplitude in the disc plane (km/s)")
    ax.legend(fontsize=6, frameon=False, ncol=3)
    return fig


def plot_warp(result, ax=None):
    """Tilt and line of nodes (Briggs 1990) as a polar diagram: angle = line of nodes, radius = tilt."""
    if ax is None:
        ax = _figure((COLUMN, COLUMN)).add_subplot(111, projection="polar")
    fig = ax.figure
    t = result.rings
    tilt, lon = _value(t["warp_tilt"]), _value(t["warp_line_of_nodes"])
    ok = np.isfinite(tilt) & np.isfinite(lon)
    if ok.any():
        sc = ax.scatter(np.radians(lon[ok]), tilt[ok], c=_value(t["radius"])[ok], cmap="viridis", s=12)
        fig.colorbar(sc, ax=ax, shrink=0.7, label="radius (arcsec)")
    else:
        ax.text(0, 0, "flat disc", ha="center")
    ax.set_title("tilt (deg) against line of nodes", fontsize=8)
    return fig


def plot_mass_model(mass_result, ax=None):
    """Observed curve and the components of one mass model (km/s against kpc)."""
    fig, ax = _axes(ax, (COLUMN, COLUMN * 0.8))
    c = mass_result.curves
    ax.errorbar(c["radius"], c["v_obs"], yerr=c["v_err"], ls="none", marker="o", ms=3, color="black",
                label="observed")
    for name, style in (("v_model", dict(color="black", lw=1.4)), ("v_halo", dict(color="tab:purple", ls="--")),
                        ("v_baryon", dict(color="tab:orange", ls="-.")), ("v_disc", dict(color="tab:red", ls=":")),
                        ("v_gas", dict(color="tab:blue", ls=":")), ("v_bulge", dict(color="tab:brown", ls=":"))):
        y = np.asarray(c[name])
        if np.any(y != 0):
            ax.plot(c["radius"], y, label=name.replace("v_", ""), **style)
    ax.set_xlabel("radius (kpc)")
    ax.set_ylabel("circular speed (km/s)")
    ax.set_title(f"{mass_result.model}: chi2 = {mass_result.chi2:.1f}, BIC = {mass_result.bic:.1f}", fontsize=8)
    ax.legend(fontsize=6, frameon=False)
    return fig


def plot_comparison(maps, names, wcs=None, axes=None):
    """Maps side by side on one shared, zero-centred colour scale (residual or difference maps)."""
    n = len(maps)
    if axes is None:
        fig = _figure((PAGE, PAGE / max(n, 2) * 1.05))
        axes = [fig.add_subplot(1, n, k + 1, projection=wcs) for k in range(n)]
    fig = axes[0].figure
    half = max(np.nanpercentile(np.abs(m), 98) for m in maps if np.isfinite(m).any())
    for ax, m, name in zip(axes, maps, names):
        im = ax.imshow(m, origin="lower", cmap=RESIDUAL_CMAP, vmin=-half, vmax=half, interpolation="nearest")
        ax.set_title(name, fontsize=8)
    fig.colorbar(im, ax=list(axes), shrink=0.8, label="km/s")
    return fig


def _summary_page(result):
    fig = _figure((8.27, 11.69), layout=None)
    lines = ["tiltedring fit of " + str(result.vmap.source), ""] + result.summary().splitlines()
    d = result.diagnostics
    warp, nc = d.get("warp", {}), d.get("non_circular", {})
    lines += ["", "decisions before the curve:",
              f"  warp: {'yes' if warp.get('detected') else 'no'}"
              + (f", onset {warp['onset_radius']:.1f} arcsec, twist {warp['twist']:+.1f} deg, tilt {warp['tilt']:+.1f} deg"
                 if warp.get("detected") else ""),
              f"  non-circular motions: {'yes' if nc.get('detected') else 'no'}"
              + (f" ({', '.join(nc.get('kinds', []))}) at {', '.join(f'{r:.0f}' for r in nc.get('radii', []))} arcsec,"
                 f" up to {nc.get('max_amplitude', 0):.0f} km/s" if nc.get("detected") else "")]
    beam = d.get("beam_smearing")
    if beam:
        lines.append(f"  beam smearing: corrected ({beam['intensity']}), {beam['iterations']} iterations")
    flagged = [(float(r), f) for r, f in zip(_value(result.rings["radius"]), result.rings["flags"]) if f]
    if flagged:
        lines += ["", "flagged rings:"] + [f"  {r:6.1f} arcsec: {f}" for r, f in flagged[:40]]
    import textwrap

    wrapped = []
    for line in lines:
        wrapped += textwrap.wrap(line, 95, subsequent_indent="    ") or [""]
    fig.text(0.07, 0.95, "\n".join(wrapped), va="top", family="monospace", fontsize=7.5)
    return fig


def write_report(result, path, png_folder=None) -> list:
    """Write ``report.pdf`` (summary page, maps, geometry and curve, slice/harmonics/warp); PNGs on request."""
    from matplotlib.backends.backend_pdf import PdfPages

    from ..io.atomic import atomic_path

    pages = [("summary", _summary_page(result)), ("maps", plot_maps(result))]
    fig = _figure((PAGE, PAGE * 0.8))
    grid = fig.add_gridspec(3, 2)
    geo_axes = [fig.add_subplot(grid[k, 0]) for k in range(3)]
    for ax in geo_axes[1:]:
        ax.sharex(geo_axes[0])
    plot_geometry(result, axes=geo_axes)
    plot_rotation_curve(result, ax=fig.add_subplot(grid[:, 1]))
    pages.append(("profiles", fig))
    fig = _figure((PAGE * 1.3, PAGE * 0.45))
    plot_major_axis_slice(result, ax=fig.add_subplot(1, 3, 1))
    plot_harmonics(result, ax=fig.add_subplot(1, 3, 2))
    plot_warp(result, ax=fig.add_subplot(1, 3, 3, projection="polar"))
    pages.append(("kinematics", fig))
    with atomic_path(path) as tmp:
        with PdfPages(tmp) as pdf:
            for _, page in pages:
                pdf.savefig(page)
    written = [path]
    if png_folder is not None:
        for name, page in pages:
            out = f"{png_folder}/report_{name}.png"
            page.savefig(out, dpi=150)
            written.append(out)
    return written
