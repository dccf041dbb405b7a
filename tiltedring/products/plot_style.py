"""The look of every figure: sizes, colours, and the helpers that keep panels readable.

Sizes are for a journal column (3.4 in wide): tick labels 8 pt, axis labels 9 pt, titles 9.5 pt;
every size is set on the artist itself (no rcParams), so a figure looks the same in any session.

Colours are our own: velocity maps run from deep slate blue (approaching) through a warm paper
white at the systemic velocity to burnt copper (receding); residual maps from moss green (model too
fast) through the same paper white to plum (data faster than the model); both are monotonic in
lightness on each side, so they read in grey and for the common colour-vision deficiencies; channel
maps and position-velocity slices of a cube run from the same paper white to slate ink. Lines:
the adopted profile in ink black, the data-side curves in slate and copper, the earlier stages in
grey and teal open markers, the smeared model in copper.

Robust limits: colour ranges come from percentiles of the pixels (residuals: also at most four
robust standard deviations; the share of pixels beyond the range is returned so a caption can
state it); profile axes come from the middle of the values with
room for their errors, and a value beyond the axis is drawn as a hollow triangle on the edge it
crosses instead of stretching the axis (one ill-conditioned ring cannot flatten a panel).
Only the functions import matplotlib.
"""

from __future__ import annotations

import numpy as np

__all__ = ["TICK_PT", "LABEL_PT", "TITLE_PT", "NOTE_PT", "COLUMN", "INK", "SLATE", "COPPER", "TEAL", "GREY",
           "velocity_colours", "residual_colours", "brightness_colours", "style_axes", "symmetric_range", "robust_limits",
           "mark_outside", "colour_bar", "panel_caption"]

TICK_PT, LABEL_PT, TITLE_PT, NOTE_PT = 8.0, 9.0, 9.5, 8.0
COLUMN = 3.4  # inches: one journal column
INK, SLATE, COPPER, TEAL, GREY, PAPER = "#1d1d1f", "#3b5b7a", "#b4541f", "#2a7f7a", "#8a8a8a", "#f6f1e7"

_VELOCITY = ["#1f3550", "#3b5b7a", "#7e9bb3", "#c5d2dc", PAPER, "#ecc9a4", "#d8935c", "#b4541f", "#6e2e0e"]
_BRIGHTNESS = [PAPER, "#d3d3cf", "#a3aab0", "#6d7e8e", "#3b5b7a", "#1f3550", "#0f1620"]
_RESIDUAL = ["#2f4a1e", "#5b7f3a", "#9fbb7e", "#d6e2c4", PAPER, "#e2cbe0", "#b58bb3", "#7f4b80", "#4a2150"]


def _colours(name, stops):
    from matplotlib.colors import LinearSegmentedColormap

    return LinearSegmentedColormap.from_list(name, stops, N=256).with_extremes(bad=(1.0, 1.0, 1.0, 0.0))


def velocity_colours():
    """The velocity colour map (approaching slate blue, systemic paper white, receding copper)."""
    return _colours("tiltedring_velocity", _VELOCITY)


def residual_colours():
    """The residual colour map (negative moss green, zero paper white, positive plum)."""
    return _colours("tiltedring_residual", _RESIDUAL)


def brightness_colours():
    """The brightness colour map of channel maps and position-velocity slices (paper white to slate ink,
    monotonic in lightness), on which the copper contours of a model stand out."""
    return _colours("tiltedring_brightness", _BRIGHTNESS)


def style_axes(ax, grid: bool = False) -> None:
    """Tick labels at 8 pt, axis labels at 9 pt, ticks inward on all four sides (our profile style)."""
    ax.tick_params(labelsize=TICK_PT, direction="in", top=True, right=True, length=3.5, width=0.7)
    ax.tick_params(which="minor", direction="in", top=True, right=True, length=2, width=0.5)
    ax.xaxis.label.set_size(LABEL_PT)
    ax.yaxis.label.set_size(LABEL_PT)
    ax.title.set_size(TITLE_PT)
    for spine in ax.spines.values():
        spine.set_linewidth(0.7)
    if grid:
        ax.grid(True, color="0.88", lw=0.5, zorder=0)
        ax.set_axisbelow(True)


def symmetric_range(values, centre: float = 0.0, percentile: float = 99.0, floor: float = 1.0,
                    max_sigma: float | None = None) -> tuple:
    """(half-width, share of finite pixels beyond centre +/- half-width) of a colour range centred on
    ``centre``: the ``percentile`` of |value - centre|, at least ``floor``; with ``max_sigma``, at most
    that many robust standard deviations (1.4826 x the median |value - centre|), so that heavy tails
    (edge pixels of a real map) do not wash out the structure of the core."""
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return floor, 0.0
    deviation = np.abs(v - centre)
    half = float(np.percentile(deviation, percentile))
    if max_sigma is not None:
        half = min(half, max_sigma * 1.4826 * float(np.median(deviation)))
    half = max(half, floor)
    return half, float(np.mean(deviation > half))


def robust_limits(values, errors=None, include=(), low: float = 10.0, high: float = 90.0, spread: float = 1.0,
                  min_span: float = 1.0) -> tuple:
    """Axis limits that follow the bulk of ``values``: the ``low``-``high`` percentile range widened by
    ``spread`` times itself on each side, by the median error, to contain the values of ``include``
    (e.g. the adopted profile, or 0 for a speed axis), and to at least ``min_span``."""
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    extra = np.asarray([x for x in np.ravel(np.asarray(include, float)) if np.isfinite(x)])
    if v.size == 0 and extra.size == 0:
        return 0.0, min_span
    if v.size:
        lo, hi = np.percentile(v, [low, high])
        pad = spread * (hi - lo)
        if errors is not None:
            e = np.asarray(errors, float)
            e = e[np.isfinite(e)]
            pad += float(np.median(e)) if e.size else 0.0
        lo, hi = lo - pad, hi + pad
        # keep every value that is not far out (within the widened range of the middle half)
        inside = v[(v >= lo - pad) & (v <= hi + pad)]
        if inside.size:
            lo, hi = min(lo, inside.min()), max(hi, inside.max())
    else:
        lo, hi = extra.min(), extra.max()
    if extra.size:
        lo, hi = min(lo, extra.min()), max(hi, extra.max())
    if hi - lo < min_span:
        mid = 0.5 * (hi + lo)
        lo, hi = mid - min_span / 2, mid + min_span / 2
    margin = 0.04 * (hi - lo)
    return float(lo - margin), float(hi + margin)


def mark_outside(ax, x, y, limits, colour=INK) -> int:
    """Draw values of ``y`` beyond ``limits`` as hollow triangles on the edge they cross; returns how many."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    lo, hi = limits
    n = 0
    for beyond, edge, marker in ((y > hi, hi, "^"), (y < lo, lo, "v")):
        if beyond.any():
            ax.plot(x[beyond], np.full(beyond.sum(), edge), ls="none", marker=marker, ms=6, mfc="white", mec=colour,
                    mew=1.0, clip_on=False, zorder=6)
            n += int(beyond.sum())
    return n


def colour_bar(ax, image, label: str, extend: str = "neither", side: str = "right"):
    """A colour bar exactly as tall (or wide) as the panel's drawn image, attached to the panel."""
    fig = ax.figure
    if side == "right":
        cax = ax.inset_axes([1.03, 0.0, 0.05, 1.0])
        bar = fig.colorbar(image, cax=cax, extend=extend)
    else:
        cax = ax.inset_axes([0.0, 1.03, 1.0, 0.05])
        bar = fig.colorbar(image, cax=cax, orientation="horizontal", extend=extend)
        cax.xaxis.set_ticks_position("top")
        cax.xaxis.set_label_position("top")
    bar.set_label(label, size=LABEL_PT)
    bar.ax.tick_params(labelsize=TICK_PT, width=0.6, length=2.5)
    bar.outline.set_linewidth(0.6)
    return bar


def panel_caption(ax, text: str, y: float = -0.16) -> None:
    """A one-line caption under a panel (8 pt, grey ink), e.g. the share of pixels beyond the colours."""
    ax.text(0.0, y, text, transform=ax.transAxes, ha="left", va="top", fontsize=NOTE_PT, color="0.3")
