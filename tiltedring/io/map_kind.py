"""What kind of velocity map a 2-D map is: how each pixel's velocity was taken from its spectrum.

The kinds (the names of :data:`.velocity_fields.KINDS`, plus one for optical spectra):

- ``moment``: the intensity-weighted mean velocity, v1 = sum I v / sum I (a moment-1 map);
- ``peak``: the velocity of the brightest channel (refined by a parabola);
- ``gaussian``: the centre of a single Gaussian fitted to the line;
- ``hermite``: the peak of a Gauss-Hermite profile with h3 (van der Marel & Franx 1993, ApJ 407, 525);
- ``optical-centroid``: the centre of a Gaussian fitted to an optical emission line (an integral-field
  spectrograph's H-alpha or [N II] map): a line-centre estimate like ``gaussian``, on finely sampled
  spectra.

It matters for the beam-smearing correction: the beam mixes the spectra of neighbouring sight lines,
and a moment-1 map then holds the intensity-weighted mean of their velocities, while a line-centre
map (the other kinds) holds the centre of a skewed, blended profile (e.g. Teuben 2002, ASP Conf. Ser.
275, 217; de Blok et al. 2008, AJ 136, 2648; from memory).

``tiltedring maps`` writes the card :data:`KIND_CARD` on every map it makes; a map without it is
taken to be a moment-1 map unless the user states the kind (``velocity_map_kind``), and the fit record
says so.
"""

from __future__ import annotations

__all__ = ["MAP_KINDS", "LINE_CENTRE_KINDS", "KIND_CARD", "ASSUMED_KIND", "kind_from_header", "choose_map_kind",
           "describe_kind"]

MAP_KINDS = ("moment", "peak", "gaussian", "hermite", "optical-centroid")
LINE_CENTRE_KINDS = MAP_KINDS[1:]
#: the card our maps writer puts on each velocity map it makes
KIND_CARD = "VELKIND"
#: the kind a map that states none is taken to be
ASSUMED_KIND = "moment"
_DESCRIPTIONS = {
    "moment": "intensity-weighted mean velocity (moment-1 map)",
    "peak": "velocity of the brightest channel (peak map)",
    "gaussian": "centre of a Gaussian fitted to each spectrum",
    "hermite": "peak of a Gauss-Hermite profile fitted to each spectrum",
    "optical-centroid": "centre of a Gaussian fitted to an optical emission line",
}


def describe_kind(kind: str) -> str:
    """A plain description of ``kind`` (for ``fit.json`` and the report)."""
    return _DESCRIPTIONS[kind]


def kind_from_header(header) -> tuple:
    """(kind or None, where it was read): the :data:`KIND_CARD` card when it names a known kind."""
    if header is None:
        return None, "no header"
    stated = str(header.get(KIND_CARD, "")).strip().lower()
    if stated in MAP_KINDS:
        return stated, f"header card {KIND_CARD} = {stated!r}"
    if stated:
        return None, f"header card {KIND_CARD} = {stated!r} names no known kind ({', '.join(MAP_KINDS)})"
    return None, f"the header states no kind of velocity map (no {KIND_CARD} card)"


def choose_map_kind(given, header) -> tuple:
    """(kind, where it came from, a note or None): ``given`` (the user's statement) wins over the header, the
    header over :data:`ASSUMED_KIND`; the note says when the kind is assumed or the two disagree."""
    from ..errors import InputError

    read, source = kind_from_header(header)
    if given is not None:
        if given not in MAP_KINDS:
            raise InputError(f"velocity map kind {given!r}: give one of {', '.join(MAP_KINDS)}")
        note = None
        if read is not None and read != given:
            note = f"the velocity map is taken as a {given} map as given, although its {source} says {read}"
        return given, "given (velocity_map_kind)", note
    if read is not None:
        return read, source, None
    return ASSUMED_KIND, f"assumed ({source})", None
