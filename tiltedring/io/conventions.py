"""Which Doppler convention a velocity map's numbers are in, read from its header.

The FITS WCS standard (Greisen, Calabretta, Valdes & Allen 2006, A&A 446, 747, "paper III")
names the conventions by the spectral axis type; with f the observed and f0 the rest frequency::

    VRAD  radio          v = c (1 - f / f0)
    VOPT  optical        v = c (f0 / f - 1) = c z            (ZOPT: z itself)
    VELO  relativistic   v = c (f0^2 - f^2) / (f0^2 + f^2)   (BETA: v / c)

A moment map keeps the header of the cube it came from, so its CTYPE3 (with NAXIS = 2, or a
third axis one channel long) says what the velocities are. A frequency axis (FREQ) is read in the
radio convention and a wavelength axis (WAVE, AWAV) in the optical one, as the cube reader does.
The older convention of the AIPS package, still common in archives, is read too: VELREF > 256
means radio, a smaller VELREF optical, and an axis type FELO optical (paper III, section 10.1).
``tiltedring maps`` writes the card ``VELCONV`` on every map it makes. The first of these that a
header holds decides; a header holding none leaves the convention unknown (``None``).
"""

from __future__ import annotations

__all__ = ["CONVENTIONS", "OWN_CONVENTION", "DEFAULT_CONVENTION", "CONVENTION_CARD", "convention_from_header",
           "choose_convention"]

CONVENTIONS = ("radio", "optical", "relativistic")
#: spectral axis types whose values are velocities in one convention (paper III, table 1)
OWN_CONVENTION = {"VRAD": "radio", "VOPT": "optical", "ZOPT": "optical", "VELO": "relativistic",
                  "BETA": "relativistic", "FELO": "optical"}
#: axis types in other quantities and the convention their velocities are usually given in
DEFAULT_CONVENTION = {"FREQ": "radio", "ENER": "radio", "WAVN": "radio", "WAVE": "optical", "AWAV": "optical"}
#: the card our maps writer puts on each map it makes
CONVENTION_CARD = "VELCONV"
_AIPS_RADIO_OFFSET = 256


def convention_from_header(header) -> tuple:
    """(convention or None, where it was read) from a FITS header (module docstring)."""
    if header is None:
        return None, "no header"
    own = str(header.get(CONVENTION_CARD, "")).strip().lower()
    if own in CONVENTIONS:
        return own, f"header card {CONVENTION_CARD} = {own!r}"
    ctype = str(header.get("CTYPE3", "")).strip().upper()
    kind = ctype[:4]
    velref = header.get("VELREF")
    if isinstance(velref, (int, float)) and not isinstance(velref, bool) and velref > 0 and kind in ("", "VELO"):
        chosen = "radio" if velref > _AIPS_RADIO_OFFSET else "optical"
        return chosen, f"header card VELREF = {int(velref)} (AIPS: above {_AIPS_RADIO_OFFSET} radio, else optical)"
    if kind in OWN_CONVENTION:
        return OWN_CONVENTION[kind], f"header card CTYPE3 = {ctype!r} (FITS WCS paper III)"
    if kind in DEFAULT_CONVENTION:
        return DEFAULT_CONVENTION[kind], f"header card CTYPE3 = {ctype!r} (usual convention of a {kind} axis)"
    return None, "the header states no velocity convention (no CTYPE3, VELREF or VELCONV card)"


def choose_convention(given, header) -> tuple:
    """(convention or None, where it came from, a note or None): ``given`` (the user's statement) wins over
    the header; the note says when they disagree."""
    from ..errors import InputError

    read, source = convention_from_header(header)
    if given is None:
        return read, source, None
    if given not in CONVENTIONS:
        raise InputError(f"velocity convention {given!r}: give one of {', '.join(CONVENTIONS)}")
    note = None
    if read is not None and read != given:
        note = (f"the velocity convention is taken as {given} as given, although the map's {source.split(' (')[0]} "
                f"says {read}")
    return given, "given (velocity_convention)", note
