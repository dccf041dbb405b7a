"""``report.pdf``: one document of A4 pages built by an ordered list of page builders.

Every page is an A4 portrait :class:`Page` (8.27 x 11.69 in) with the same header (object name,
page title, tool version and date) and footer (input file, page k of n); panels are placed in
inches from the top-left corner and are about one journal column (3 to 3.4 in) wide, so the 8-pt
tick labels of :mod:`.plot_style` stay readable when a page is printed or a panel is cut out.

The pages, in order (:data:`PAGES`):

1. ``summary``: the object, date, version and the command (or the options that differ from the
   defaults); the adopted geometry with errors; a small rotation curve; the decisions in words
   (:func:`.decisions.decision_lines`: warp or inner change, rings left out, centre, beam smearing,
   non-circular motions, any later step); the cautions; the flagged rings in a table.
2. ``maps``: data, model and residual on the sky grid, and the distribution of the residuals with the
   colour range of the residual map shaded.
3. ``profiles``: the rotation curve with the curve before beam correction and both sides; its error
   budget; position angle and inclination of both stages with the adopted profile; the systemic
   velocity and centre of every ring.
4. ``kinematics``: major- and minor-axis position-velocity slices with the model map on the same
   pixels, receding minus approaching speed, harmonic amplitudes, the warp.
5. ``cube channels`` and 6. ``cube slices``, only for a fit made from a cube with its model cube
   (:mod:`.cube_pages`): channel maps, and major- and minor-axis position-velocity slices, of the data
   with the model cube contoured; the inner curve from the map and from the cube; the gas dispersion.

Adding pages: a page builder is a function ``builder(result) -> list of Figure`` (an empty list when
it has nothing to show, e.g. no cube); draw on :func:`new_page` so the page has the report's size,
header and footer, and register it once::

    from tiltedring.products import report

    def channel_pages(result):
        if "cube" not in result.inputs:
            return []
        page = report.new_page(result, "channel maps")
        ax = page.panel(left=0.9, top=1.4, width=3.0, height=3.0)
        ...                                 # draw into ax
        return [page.figure]

    report.register_page("channel maps", channel_pages, after="maps")

:func:`write_report` draws every registered page in order, numbers them and writes the PDF (and
``report_<name>.png`` per page on request; a builder returning several pages gets
``report_<name>_<k>.png``).
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .decisions import decision_lines, object_name, plural
from .plot_style import COPPER, GREY, INK, LABEL_PT, NOTE_PT

__all__ = ["PAGE_SIZE", "Page", "new_page", "register_page", "page_names", "report_pages", "write_report", "PAGES"]

PAGE_SIZE = (8.27, 11.69)  # A4 portrait, inches
LEFT, RIGHT_EDGE = 0.7, 7.6


@dataclass
class PageBuilder:
    name: str
    build: Callable


PAGES: list = []


def register_page(name: str, build: Callable, after: str | None = None, before: str | None = None) -> None:
    """Add a page builder (module docstring) at the end, or after / before the page of that name.
    Registering a name again replaces that builder in place."""
    names = page_names()
    if name in names:
        PAGES[names.index(name)] = PageBuilder(name, build)
        return
    index = len(PAGES)
    if after is not None:
        index = names.index(after) + 1
    elif before is not None:
        index = names.index(before)
    PAGES.insert(index, PageBuilder(name, build))


def page_names() -> list:
    return [p.name for p in PAGES]


class Page:
    """One report page: an A4 figure with the report's header; panels and text placed in inches from
    the top-left corner."""

    def __init__(self, result, title: str):
        from .figure import new_figure

        self.figure = new_figure(PAGE_SIZE, layout=None)
        self.title = title
        self.result = result
        self.figure._report_page = self  # lets report_pages number the footer
        self._header()

    def _fraction(self, left, top):
        w, h = PAGE_SIZE
        return left / w, 1.0 - top / h

    def panel(self, left: float, top: float, width: float, height: float, **kwargs):
        """Axes whose drawing area spans ``width`` x ``height`` inches from (``left``, ``top``)."""
        x, y = self._fraction(left, top + height)
        w, h = PAGE_SIZE
        return self.figure.add_axes([x, y, width / w, height / h], **kwargs)

    def text(self, left: float, top: float, text: str, size: float = NOTE_PT, **kwargs):
        x, y = self._fraction(left, top)
        return self.figure.text(x, y, text, fontsize=size, va="top", ha=kwargs.pop("ha", "left"), **kwargs)

    def rule(self, top: float, colour=COPPER, width: float = 0.8, left=LEFT, right=RIGHT_EDGE):
        from matplotlib.lines import Line2D

        x0, y = self._fraction(left, top)
        x1, _ = self._fraction(right, top)
        self.figure.add_artist(Line2D([x0, x1], [y, y], color=colour, lw=width, transform=self.figure.transFigure))

    def _header(self):
        from .. import __version__

        self.text(LEFT, 0.45, object_name(self.result), size=15, weight="bold", color=INK)
        self.text(RIGHT_EDGE, 0.47, f"tiltedring {__version__}  \N{MIDDLE DOT}  {_today()}", size=NOTE_PT,
                  color=GREY, ha="right")
        self.text(RIGHT_EDGE, 0.66, self.title, size=LABEL_PT, color=COPPER, ha="right", style="italic")
        self.rule(0.95)

    def footer(self, number: int, total: int):
        source = str(getattr(self.result.vmap, "source", "") or "")
        self.rule(11.2, colour="0.75", width=0.5)
        self.text(LEFT, 11.27, f"map: {source}", size=7.5, color=GREY)
        self.text(RIGHT_EDGE, 11.27, f"page {number} of {total}", size=7.5, color=GREY, ha="right")


def _today() -> str:
    from datetime import datetime, timezone

    return datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def new_page(result, title: str) -> Page:
    """A new report page for ``result`` (module docstring)."""
    return Page(result, title)


def report_pages(result) -> list:
    """(name, Page or Figure) for every page of every registered builder, numbered in the footers."""
    pages = []
    for builder in PAGES:
        made = builder.build(result) or []
        made = made if isinstance(made, (list, tuple)) else [made]
        for k, page in enumerate(made):
            name = builder.name if len(made) == 1 else f"{builder.name}_{k + 1}"
            pages.append((name.replace(" ", "_"), page))
    for number, (_, page) in enumerate(pages, start=1):
        owner = getattr(page, "_report_page", None)
        if owner is not None:
            owner.footer(number, len(pages))
    return pages


def write_report(result, path, png_folder=None) -> list:
    """Write every page to ``path`` (PDF, atomically); with ``png_folder`` also ``report_<name>.png``.
    Returns the paths written."""
    from matplotlib.backends.backend_pdf import PdfPages

    from ..io.atomic import atomic_path

    pages = report_pages(result)
    with atomic_path(path) as tmp:
        with PdfPages(tmp, metadata={"Title": f"tiltedring report: {object_name(result)}",
                                     "Creator": "tiltedring"}) as pdf:
            for _, figure in pages:
                pdf.savefig(figure)
    written = [path]
    if png_folder is not None:
        for name, figure in pages:
            out = f"{png_folder}/report_{name}.png"
            figure.savefig(out, dpi=110)
            written.append(out)
    return written


def _finish(page: Page):
    return [page.figure]


# ------------------------------------------------------------------------------------------------ page 1
def _value(column):
    return np.asarray(getattr(column, "value", column), float)


def _median(table, name):
    v = _value(table[name])
    return float(np.nanmedian(v)) if np.isfinite(v).any() else float("nan")


def _pm(value, error, fmt=".1f", unit=""):
    text = format(value, fmt) if np.isfinite(value) else "?"
    if np.isfinite(error) and error > 0:
        text += f" \N{PLUS-MINUS SIGN} {format(error, fmt)}"
    return text + (f" {unit}" if unit else "")


def _sky_centre(result) -> str:
    t = result.rings
    ra, dec = _median(t, "ra_center"), _median(t, "dec_center")
    if not (np.isfinite(ra) and np.isfinite(dec)):
        return "no celestial WCS"
    from astropy import units as u
    from astropy.coordinates import SkyCoord

    err = np.hypot(_median(t, "x_center_err"), _median(t, "y_center_err")) * result.vmap.pixel_scale
    text = SkyCoord(ra * u.deg, dec * u.deg).to_string("hmsdms", sep=":", precision=1)
    return text + (f"  (\N{PLUS-MINUS SIGN} {err:.1f}\N{DOUBLE PRIME})" if np.isfinite(err) else "")


def _geometry_rows(result) -> list:
    t = result.rings
    vmap = result.vmap
    warp = result.diagnostics.get("warp", {})
    rows = [("centre (RA, Dec)", _sky_centre(result)),
            ("centre (x, y pixels)", f"{_pm(_median(t, 'x_center'), _median(t, 'x_center_err'), '.2f')}, "
                                             f"{_pm(_median(t, 'y_center'), _median(t, 'y_center_err'), '.2f')}"),
            ("systemic velocity", _pm(_median(t, "v_systemic"), _median(t, "v_systemic_err"), ".1f", "km/s"))]
    for name, label in (("position_angle", "position angle"), ("inclination", "inclination")):
        values, errors = _value(t[name]), _value(t[f"{name}_err"])
        text = _pm(values[0], float(np.nanmedian(errors)), ".1f", "deg")
        if warp.get("detected"):
            text += f" inside {warp['onset_radius']:.0f}\N{DOUBLE PRIME}, {values[-1]:.1f} at the last ring"
        rows.append((label, text))
    r = _value(t["radius"])
    v, e = _value(t["v_rotation"]), _value(t["v_rotation_err"])
    ok = np.isfinite(v)
    rows.append(("rings", f"{plural(len(t), 'ring')} from {r[0]:.1f} to {r[-1]:.1f}\N{DOUBLE PRIME}, "
                          f"{_value(t['radius_outer'])[0] - _value(t['radius_inner'])[0]:.1f}\N{DOUBLE PRIME} wide"))
    from .plotting import _warned

    trusted = ok & ~_warned(t)
    if trusted.any():
        last = np.flatnonzero(trusted)[-1]
        rows.append(("outermost v_rotation", f"{_pm(v[last], e[last], '.1f', 'km/s')} at {r[last]:.1f}\N{DOUBLE PRIME}"
                                             + (" (last unflagged ring)" if last < np.flatnonzero(ok)[-1] else "")))
    beam = vmap.beam
    rows.append(("beam", f"{beam.major:.2f}\N{DOUBLE PRIME} \N{MULTIPLICATION SIGN} {beam.minor:.2f}\N{DOUBLE PRIME}, "
                         f"PA {beam.position_angle:.0f} deg ({vmap.pixels_per_beam:.1f} pixels per beam)"
                 if beam is not None else "none known (pixels treated as independent)"))
    stats = result.statistics()
    rows.append(("map", f"{vmap.shape[1]} \N{MULTIPLICATION SIGN} {vmap.shape[0]} pixels of "
                        f"{vmap.pixel_scale:.2f}\N{DOUBLE PRIME}, {stats['n_valid_pixels']} valid"))
    if stats.get("residual_rms") is not None:
        rows.append(("residual rms", f"{stats['residual_rms']:.2f} km/s over {stats['n_modelled_pixels']} pixels"))
    return rows


def _command_text(result) -> str:
    command = (getattr(result, "inputs", None) or {}).get("command")
    if command:
        return command
    options = getattr(result, "options", None)
    if options is None or not hasattr(options, "to_dict"):
        return "fit options not recorded"
    defaults = type(options)().to_dict()
    changed = {k: v for k, v in options.to_dict().items() if defaults.get(k) != v}
    if not changed:
        return "fit with every option at its default"
    return "fit options that differ from the defaults: " + ", ".join(f"{k} = {v}" for k, v in changed.items())


class _Cursor:
    """A column of text flowing down the page; ``room(lines)`` says whether it still fits."""

    def __init__(self, page: Page, top: float, left=LEFT, width=RIGHT_EDGE - LEFT, bottom=11.05):
        self.page, self.y, self.left, self.width, self.bottom = page, top, left, width, bottom

    def heading(self, text: str):
        self.y += 0.1
        self.page.text(self.left, self.y, text, size=LABEL_PT + 1, weight="bold", color=INK)
        self.page.rule(self.y + 0.2, colour="0.8", width=0.5, left=self.left, right=self.left + self.width)
        self.y += 0.28

    def room(self, lines: int, size=NOTE_PT) -> bool:
        return self.y + lines * size * 1.32 / 72 <= self.bottom

    def paragraph(self, text: str, size=NOTE_PT + 0.5, indent: float = 0.0, label: str | None = None,
                  label_width: float = 0.0, family=None, colour=INK) -> bool:
        em = 0.61 if family == "monospace" else 0.52  # average character width in units of the font size
        chars = int((self.width - indent - label_width) * 72 / (em * size))
        lines = textwrap.wrap(text, chars, break_on_hyphens=False) or [""]
        if not self.room(len(lines), size):
            return False
        if label:
            self.page.text(self.left + indent, self.y, label, size=size, weight="bold", color=INK)
        self.page.text(self.left + indent + label_width, self.y, "\n".join(lines), size=size, family=family,
                       color=colour, linespacing=1.25)
        self.y += len(lines) * size * 1.32 / 72 + 0.03
        return True


def summary_page(result):
    """Page 1 (module docstring)."""
    page = new_page(result, "summary")
    cursor = _Cursor(page, 1.1)
    cursor.paragraph(_command_text(result), size=NOTE_PT, family="monospace", colour="0.2")
    top = cursor.y + 0.05
    geometry = _Cursor(page, top, width=4.05)
    geometry.heading("Adopted geometry")
    for label, value in _geometry_rows(result):
        geometry.paragraph(value, size=NOTE_PT + 1, label=label, label_width=1.6)
    ax = page.panel(5.25, top + 0.35, 2.3, 2.1)
    from .plotting import plot_rotation_curve

    plot_rotation_curve(result, ax=ax, components=False)
    if ax.get_legend() is not None:
        ax.get_legend().remove()
    ax.set_title("rotation curve", loc="left", fontsize=LABEL_PT)
    cursor.y = max(geometry.y, top + 3.0) + 0.05
    cursor.heading("Decisions")
    for topic, sentence in decision_lines(result):
        if not cursor.paragraph(sentence, size=NOTE_PT + 1, label=topic, label_width=1.6):
            break
    cursor.heading("Cautions")
    cautions = list(getattr(result, "cautions", []) or []) or ["none"]
    for text in cautions:
        if not cursor.paragraph(text, size=NOTE_PT + 1, label="\N{BULLET}", label_width=0.15):
            cursor.paragraph("... more in fit.json", colour=GREY)
            break
    _flagged_table(cursor, result)
    return _finish(page)


def _flagged_table(cursor: _Cursor, result):
    t = result.rings
    flagged = [k for k, f in enumerate(t["flags"]) if str(f).strip() and str(f) != "--"]
    cursor.heading(f"Flagged rings ({len(flagged)} of {len(t)})")
    if not flagged:
        cursor.paragraph("none: no ring carries a flag")
        return
    columns = (("radius (\N{DOUBLE PRIME})", 0.0, "radius", ".1f"), ("v_rotation (km/s)", 0.9, "v_rotation", ".1f"),
               ("PA (deg)", 2.35, "position_angle", ".1f"), ("incl. (deg)", 3.1, "inclination", ".1f"),
               ("flags", 3.95, "flags", ""))
    for label, x, _, _ in columns:
        cursor.page.text(cursor.left + x, cursor.y, label, size=NOTE_PT, weight="bold", color=INK)
    cursor.y += 0.17
    for n, k in enumerate(flagged):
        if not cursor.room(2):
            cursor.page.text(cursor.left, cursor.y, f"... and {len(flagged) - n} more flagged rings in rings.ecsv",
                             size=NOTE_PT, color=GREY)
            break
        for _, x, name, fmt in columns:
            if name == "flags":
                text = str(t["flags"][k]).replace(",", ", ")
            elif name == "v_rotation":
                text = _pm(_value(t["v_rotation"])[k], _value(t["v_rotation_err"])[k], ".1f")
            else:
                text = format(_value(t[name])[k], fmt)
            cursor.page.text(cursor.left + x, cursor.y, text, size=NOTE_PT, color=INK)
        cursor.y += NOTE_PT * 1.35 / 72


# ------------------------------------------------------------------------------------------------ pages 2-4
def maps_page(result):
    """Page 2: data, model, residual and the residual distribution."""
    from .plotting import _clip_caption, _distance_mpc, plot_residual_histogram
    from .plot_style import panel_caption
    from .sky_panels import draw_sky_map

    page = new_page(result, "sky maps")
    wcs = result.vmap.wcs
    distance = _distance_mpc(result)
    spots = [(1.0, 1.75), (4.7, 1.75), (1.0, 6.35), (4.7, 6.35)]
    axes = [page.panel(x, y, 2.9, 2.9, projection=wcs) for x, y in spots[:3]]
    data = draw_sky_map(axes[0], result.vmap.velocity, result.vmap, "velocity", result,
                        label="data: line-of-sight velocity (km/s)", distance_mpc=distance)
    model = draw_sky_map(axes[1], result.model, result.vmap, "velocity", result, centre=data["centre"],
                         half=data["half"], label="model (km/s)" + (", beam-smeared" if "v_rotation_smeared"
                                                                    in result.rings.colnames else ""),
                         distance_mpc=distance)
    resid = draw_sky_map(axes[2], result.residual, result.vmap, "residual", result, distance_mpc=distance)
    for ax, info in zip(axes, (data, model, resid)):
        panel_caption(ax, _clip_caption(info), y=-0.2)
    hist = page.panel(4.95, 6.95, 2.6, 2.3)
    plot_residual_histogram(result, hist, half=resid["half"])
    hist.set_title("residual distribution", loc="left", fontsize=LABEL_PT)
    page.text(LEFT, 10.25, "Dotted ellipses: every second fitted ring. Diamond: kinematic centre. Dashed copper "
                           "line: the receding half of the major axis. Grey ellipse, lower left: the beam. Colour "
                           "ranges are percentiles of the pixels (99th of |v - v_sys| for velocities; 98th of "
                           "|residual|, but at most four robust standard deviations, for residuals); arrows on a "
                           "colour bar mark clipped pixels.",
              size=NOTE_PT, color="0.3", wrap=True)
    return _finish(page)


def profiles_page(result):
    """Page 3: curve, error budget, position angle, inclination, systemic velocity and centre."""
    from .plotting import plot_centre, plot_error_budget, plot_rotation_curve, _profile

    page = new_page(result, "rotation curve and geometry")
    curve = page.panel(1.0, 1.35, 6.55, 2.8)
    plot_rotation_curve(result, ax=curve, components=False)
    curve.set_xlabel("")
    curve.tick_params(labelbottom=False)
    budget = page.panel(1.0, 4.2, 6.55, 1.3, sharex=curve)
    plot_error_budget(result, budget)
    pa = page.panel(1.0, 6.15, 2.75, 1.9)
    inc = page.panel(4.8, 6.15, 2.75, 1.9, sharex=pa)
    _profile(pa, result, "position_angle", "position angle (deg)")
    _profile(inc, result, "inclination", "inclination (deg)")
    for ax in (pa, inc):
        ax.set_xlabel("radius (arcsec)")
        ax.set_xlim(0, _value(result.rings["radius_outer"])[-1])
    pa.legend(fontsize=NOTE_PT, frameon=False, loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=3,
              borderaxespad=0.1)
    systemic = page.panel(1.0, 8.75, 2.75, 1.9)
    centre = page.panel(4.8, 8.75, 2.75, 1.9)
    plot_centre(result, axes=(systemic, centre))
    systemic.set_xlabel("radius (arcsec)")
    systemic.set_xlim(0, _value(result.rings["radius_outer"])[-1])
    return _finish(page)


def kinematics_page(result):
    """Page 4: position-velocity slices, sides, harmonics and warp."""
    from .plot_kinematics import plot_harmonics, plot_major_axis_slice, plot_minor_axis_slice, plot_sides, plot_warp

    page = new_page(result, "motions")
    plot_major_axis_slice(result, ax=page.panel(1.0, 1.45, 6.55, 2.9))
    plot_minor_axis_slice(result, ax=page.panel(1.0, 5.0, 2.75, 2.2))
    plot_sides(result, ax=page.panel(4.8, 5.0, 2.75, 2.2))
    plot_harmonics(result, ax=page.panel(1.0, 8.35, 2.75, 2.2))
    plot_warp(result, ax=page.panel(4.8, 8.35, 2.4, 2.2))
    return _finish(page)


register_page("summary", summary_page)
register_page("maps", maps_page)
register_page("profiles", profiles_page)
register_page("kinematics", kinematics_page)


def _cube_channels(result):
    from .cube_pages import channel_maps_page

    return channel_maps_page(result)


def _cube_slices(result):
    from .cube_pages import slices_page

    return slices_page(result)


register_page("cube channels", _cube_channels, after="kinematics")
register_page("cube slices", _cube_slices, after="cube channels")
