"""Checks shared by the report tests: readable text on a page, and the pages of a written PDF.

References outside the figure code: the PDF's own page objects and MediaBoxes (parsed from the file; A4
is 595.3 x 841.9 pt, ISO 216), and matplotlib's text artists after a layout pass.
"""

import io
import re


def visible_texts(figure) -> list:
    """Every visible, non-empty text of ``figure`` after a layout pass (so tick labels exist)."""
    from matplotlib.text import Text

    figure.savefig(io.BytesIO(), format="png", dpi=40)
    return [t for t in figure.findobj(Text) if t.get_visible() and t.get_text().strip()]


def assert_readable(figure, name: str = "") -> None:
    """Journal column width: every text at 7.5 pt or more, every tick label at 8 pt or more."""
    assert min(t.get_fontsize() for t in visible_texts(figure)) >= 7.5, name
    for ax in figure.axes:
        labels = ax.get_xticklabels() + ax.get_yticklabels()
        assert all(label.get_fontsize() >= 8 for label in labels if label.get_text()), name


def pdf_pages(path) -> tuple:
    """(number of pages, set of MediaBoxes rounded to whole points) of the PDF at ``path``."""
    pdf = open(path, "rb").read()
    count = len(re.findall(rb"/Type\s*/Page(?![s\w])", pdf))
    boxes = {tuple(round(float(v)) for v in box.split()) for box in re.findall(rb"/MediaBox\s*\[([^\]]+)\]", pdf)}
    return count, boxes
