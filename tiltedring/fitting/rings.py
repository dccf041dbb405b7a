"""`RingLayout`: where the rings lie, as edges in arcsec on the sky (disc-plane radius).

Layouts: uniform width (arcsec, pixels or beams), logarithmic spacing, or explicit edges, each
with a first radius and a maximum radius. On the command line a width is a number with a unit:
``9arcsec``, ``4pix``, ``0.5beam`` (a bare number means arcsec).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

__all__ = ["RingLayout", "parse_width"]

_WIDTH = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*([a-zA-Z\"]*)\s*$")
_UNITS = {"": "arcsec", "arcsec": "arcsec", "as": "arcsec", '"': "arcsec", "arcmin": "arcmin",
          "pix": "pix", "px": "pix", "pixel": "pix", "pixels": "pix", "beam": "beam", "beams": "beam"}


def parse_width(text, pixel_scale: float, beam_fwhm: float | None = None) -> float:
    """Turn ``"9arcsec"``, ``"4pix"``, ``"0.5beam"``, ``"1arcmin"`` or ``"9"`` into arcsec."""
    if isinstance(text, (int, float, np.floating)):
        value, unit = float(text), "arcsec"
    else:
        m = _WIDTH.match(str(text))
        if not m or m.group(2).lower() not in _UNITS:
            raise InputError(f"cannot read length {text!r}: give a number with arcsec, arcmin, pix or beam, e.g. 9arcsec, 4pix, 0.5beam")
        value, unit = float(m.group(1)), _UNITS[m.group(2).lower()]
    if unit == "beam":
        if beam_fwhm is None:
            raise InputError(f"length {text!r} is in beams but the map has no beam; give --beam or use arcsec/pix")
        value *= beam_fwhm
    elif unit == "pix":
        value *= pixel_scale
    elif unit == "arcmin":
        value *= 60.0
    if not value > 0:
        raise InputError(f"length {text!r} must be positive")
    return value


@dataclass(frozen=True)
class RingLayout:
    """Ring edges in arcsec (increasing). Ring k spans ``edges[k]`` to ``edges[k+1]``."""

    edges: tuple

    def __post_init__(self):
        e = np.asarray(self.edges, float)
        if e.ndim != 1 or len(e) < 2 or not np.all(np.isfinite(e)) or np.any(np.diff(e) <= 0) or e[0] < 0:
            raise InputError(f"ring edges must be at least two increasing non-negative radii, got {list(e)}")
        object.__setattr__(self, "edges", tuple(round(float(v), 6) for v in e))

    @classmethod
    def uniform(cls, width: float, max_radius: float, first_radius: float = 0.0) -> "RingLayout":
        """Rings of equal ``width`` (arcsec) from ``first_radius`` out to ``max_radius``."""
        if max_radius <= first_radius + 0.5 * width:
            raise InputError(
                f"the maximum radius {max_radius:.3g} arcsec leaves no room for a ring of width {width:.3g} "
                f"arcsec beyond {first_radius:.3g} arcsec; use narrower rings or a larger maximum radius"
            )
        n = max(1, int(np.floor((max_radius - first_radius) / width + 0.5)))
        return cls(tuple(first_radius + width * np.arange(n + 1)))

    @classmethod
    def logarithmic(cls, first_width: float, max_radius: float, first_radius: float = 0.0,
                    growth: float = 1.2) -> "RingLayout":
        """Widths growing by ``growth`` per ring, the first ``first_width`` wide."""
        if growth <= 1.0:
            raise InputError("logarithmic ring growth must exceed 1")
        edges = [first_radius]
        width = first_width
        while edges[-1] + 0.5 * width < max_radius:
            edges.append(edges[-1] + width)
            width *= growth
        if len(edges) < 2:
            edges.append(first_radius + first_width)
        return cls(tuple(edges))

    @classmethod
    def explicit(cls, edges) -> "RingLayout":
        return cls(tuple(edges))

    @property
    def radii(self) -> np.ndarray:
        """Ring centres (arcsec)."""
        e = np.asarray(self.edges)
        return 0.5 * (e[1:] + e[:-1])

    @property
    def widths(self) -> np.ndarray:
        return np.diff(np.asarray(self.edges))

    @property
    def inner(self) -> np.ndarray:
        return np.asarray(self.edges[:-1])

    @property
    def outer(self) -> np.ndarray:
        return np.asarray(self.edges[1:])

    def __len__(self) -> int:
        return len(self.edges) - 1
