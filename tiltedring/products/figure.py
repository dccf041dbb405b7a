"""The figure every plot of the tool is drawn on: a plain ``matplotlib.figure.Figure`` made without pyplot.

No backend is chosen and no rcParams are touched, so making a figure leaves the user's matplotlib
session as it was; the figure is not registered with pyplot either (nothing to close). In Jupyter a
figure returned as a cell's value shows itself as a PNG (``_repr_png_``), unless the notebook's own
matplotlib integration already displays figures. Imported only by the plotting functions.
"""

from __future__ import annotations

import io

from matplotlib.figure import Figure

__all__ = ["ShownFigure", "new_figure"]


class ShownFigure(Figure):
    """A Figure that renders itself as PNG for rich displays (IPython, Jupyter)."""

    def _repr_png_(self):
        if not self.axes and not self.texts:
            return None
        buffer = io.BytesIO()
        self.savefig(buffer, format="png", bbox_inches="tight")
        return buffer.getvalue()


def new_figure(figsize, layout: str | None = "constrained") -> ShownFigure:
    """A new figure of ``figsize`` inches (constrained layout unless ``layout`` says otherwise)."""
    return ShownFigure(figsize=figsize, layout=layout)
