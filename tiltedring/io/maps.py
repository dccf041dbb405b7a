"""`VelocityMap`: a line-of-sight velocity map with its sky geometry, read from FITS.

Every entry point accepts "a path, an HDU, an HDUList, or an (array, header-or-WCS) pair":
:func:`load_image` turns any of these into an array and a header, so reading the velocity,
error, intensity and dispersion maps shares one code path.

Sky geometry. Position angles are measured on the sky from north through east, where north is
that of the WCS's celestial frame, never the pixel y axis. The local pixel-to-sky mapping is the
2x2 Jacobian ``J`` (arcsec per pixel) at the map centre::

    [east ]   [J00 J01] [x - x0]
    [north] = [J10 J11] [y - y0]

which handles rotated grids and non-square pixels. Across one galaxy the tangent-plane distortion
of a linear mapping is negligible (< 1e-4 relative over a degree).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.io import fits
from astropy.wcs import WCS, FITSFixedWarning

from ..errors import FitCaution, InputError

__all__ = ["Beam", "VelocityMap", "read_velocity_map", "load_image", "parse_velocity_unit"]

KM_S = u.km / u.s
_COMPRESSED = (b"\x1f\x8b", b"BZh")  # gzip and bzip2, both read by astropy.io.fits
_CELESTIAL = ("RA--", "DEC-", "GLON", "GLAT", "ELON", "ELAT", "SLON", "SLAT", "HPLN", "HPLT")


@dataclass(frozen=True)
class Beam:
    """Elliptical Gaussian beam: FWHM axes in arcsec, position angle in deg (N through E)."""

    major: float
    minor: float
    position_angle: float = 0.0

    def __post_init__(self):
        from .map_checks import checked_beam

        major, minor, angle = checked_beam(self.major, self.minor, self.position_angle, "beam")
        object.__setattr__(self, "major", major)
        object.__setattr__(self, "minor", minor)
        object.__setattr__(self, "position_angle", angle)

    @property
    def area(self) -> float:
        """Beam solid angle in arcsec^2: pi/(4 ln 2) * major * minor (Gaussian)."""
        return np.pi / (4.0 * np.log(2.0)) * self.major * self.minor

    @property
    def fwhm(self) -> float:
        """Geometric-mean FWHM in arcsec."""
        return float(np.sqrt(self.major * self.minor))

    @classmethod
    def parse(cls, text: str) -> "Beam":
        """From ``"12"`` (circular) or ``"12,8,30"`` (major, minor arcsec, position angle deg)."""
        try:
            parts = [float(p) for p in str(text).replace(" ", "").split(",")]
        except ValueError:
            raise InputError(f"cannot read beam {text!r}: give MAJOR[,MINOR[,PA]] in arcsec, e.g. 12,8,30") from None
        if len(parts) == 1:
            parts = [parts[0], parts[0], 0.0]
        elif len(parts) == 2:
            parts.append(0.0)
        if len(parts) != 3:
            raise InputError(f"cannot read beam {text!r}: give MAJOR[,MINOR[,PA]] in arcsec")
        return cls(*parts)

    @classmethod
    def from_header(cls, header, where: str = "map header") -> "Beam | None":
        """From BMAJ, BMIN (deg) and BPA (deg; 0 when missing); None without BMAJ and BMIN."""
        from .map_checks import checked_beam

        if "BMAJ" not in header and "BMIN" not in header:
            return None
        if "BMAJ" not in header or "BMIN" not in header:
            missing = "BMIN" if "BMAJ" in header else "BMAJ"
            raise InputError(f"{where}: BMAJ and BMIN describe the beam together but {missing} is missing; add it, "
                             "or give the beam as --beam MAJ[,MIN[,PA]] in arcsec")
        major, minor, angle = checked_beam(header["BMAJ"], header["BMIN"], header.get("BPA", 0.0), where)
        return cls(major * 3600.0, minor * 3600.0, angle)


@dataclass
class VelocityMap:
    """A moment-1 (or line-centroid) velocity map in km/s with its sky geometry.

    Arrays are numpy order ``[y, x]``, pixels 0-based (astropy ``origin=0``). Blank pixels are
    NaN. ``sky_jacobian`` maps pixel offsets to (east, north) offsets in arcsec.
    """

    velocity: np.ndarray
    sky_jacobian: np.ndarray
    wcs: WCS | None = None
    error: np.ndarray | None = None
    intensity: np.ndarray | None = None
    beam: Beam | None = None
    dispersion: np.ndarray | None = None
    intensity_unit: str | None = None
    source: str = "array"
    notes: list = field(default_factory=list)
    object_name: str | None = None  # the header's OBJECT card, when there is one
    velocity_convention: str | None = None  # radio, optical, relativistic; None: not stated (:mod:`.conventions`)
    convention_source: str = "not stated"  # where the convention was read or given
    velocity_map_kind: str = "moment"  # how each velocity was taken from its spectrum (:mod:`.map_kind`)
    kind_source: str = "assumed"  # where the kind was read or given

    @property
    def shape(self) -> tuple:
        return self.velocity.shape

    @property
    def valid(self) -> np.ndarray:
        """Pixels usable in a fit: finite velocity (and finite positive error if an error map is given)."""
        ok = np.isfinite(self.velocity)
        if self.error is not None:
            ok &= np.isfinite(self.error) & (self.error > 0)
        return ok

    @property
    def pixel_area(self) -> float:
        """Pixel solid angle in arcsec^2 (|det J|)."""
        return float(abs(np.linalg.det(self.sky_jacobian)))

    @property
    def pixel_scale(self) -> float:
        """Geometric-mean pixel size in arcsec."""
        return pixel_scale_of(self.sky_jacobian)

    @property
    def north_angle(self) -> float:
        """Direction of local north in the pixel frame, deg counter-clockwise from the +y axis."""
        inv = np.linalg.inv(self.sky_jacobian)
        dx, dy = inv @ np.array([0.0, 1.0])
        return float(np.degrees(np.arctan2(-dx, dy)) % 360.0)

    @property
    def pixels_per_beam(self) -> float:
        """Number of pixels in one beam area (1 when no beam is known: correlations ignored)."""
        if self.beam is None:
            return 1.0
        return max(1.0, self.beam.area / self.pixel_area)

    def sky_offsets(self, x, y, x0: float, y0: float):
        """(east, north) offsets in arcsec of pixel positions from (x0, y0)."""
        dx = np.asarray(x, float) - x0
        dy = np.asarray(y, float) - y0
        j = self.sky_jacobian
        return j[0, 0] * dx + j[0, 1] * dy, j[1, 0] * dx + j[1, 1] * dy


    @property
    def celestial_frame(self) -> str | None:
        """Name of the WCS's celestial frame (``icrs``, ``fk5``, ``galactic``...), None without one."""
        if self.wcs is None:
            return None
        try:
            return self.wcs.pixel_to_world(0, 0).frame.name
        except Exception:
            return None

    def pixel_to_icrs(self, x, y):
        """ICRS right ascension and declination (deg) of pixel positions, converted from the map's own
        celestial frame with astropy; NaN without a WCS or where astropy cannot convert."""
        x, y = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float))
        nan = np.full(x.shape, np.nan)
        if self.wcs is None:
            return nan, nan.copy()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                sky = self.wcs.pixel_to_world(x, y).icrs
            return np.asarray(sky.ra.deg, float), np.asarray(sky.dec.deg, float)
        except Exception:
            return nan, nan.copy()

    def sky_to_pixel(self, ra: float, dec: float):
        """Pixel (x, y) of an ICRS position in deg (needs a WCS; astropy converts to the map's frame)."""
        if self.wcs is None:
            raise InputError("a sky position was given but the map has no celestial WCS; give the centre in pixels")
        from astropy.coordinates import SkyCoord

        x, y = self.wcs.world_to_pixel(SkyCoord(ra * u.deg, dec * u.deg, frame="icrs"))
        if not (np.isfinite(x) and np.isfinite(y)):
            raise InputError(f"the sky position RA {ra}, Dec {dec} deg does not fall on the map's grid; give a "
                             "position on the map (ICRS, deg) or the centre in pixels")
        return float(x), float(y)

    def output_header(self, bunit: str = "km/s") -> fits.Header:
        """A header for maps derived from this one: the input's celestial WCS, BUNIT, beam."""
        hdr = self.wcs.to_header() if self.wcs is not None else fits.Header()
        hdr["BUNIT"] = bunit
        if self.beam is not None:
            hdr["BMAJ"] = self.beam.major / 3600.0
            hdr["BMIN"] = self.beam.minor / 3600.0
            hdr["BPA"] = self.beam.position_angle
        return hdr



# --------------------------------------------------------------------------- reading


def load_image(source, role: str = "velocity map", hdu=None):
    """Turn a path, HDU, HDUList or ``(array, header-or-WCS)`` into ``(data, header, name)``.

    The first HDU with image data of two or more axes is used unless ``hdu`` names another.
    Length-1 extra axes (common in moment maps) are squeezed; a real cube is refused.
    """
    data, header, name = open_image(source, role, hdu)
    return _squeeze(data, header, role, name), header, name


def open_image(source, role: str = "velocity map", hdu=None):
    """Like :func:`load_image` but keeps every axis: ``(data as float with NaN blanks, header, name)``."""
    name = str(source) if isinstance(source, (str, Path)) else type(source).__name__
    if isinstance(source, tuple):
        data, meta = source
        header = meta.to_header() if isinstance(meta, WCS) else fits.Header(meta or {})
        return np.asarray(data, dtype=float), header, "array"
    if isinstance(source, (str, Path)):
        from .input_files import check_input_file

        path = check_input_file(source, role)
        try:
            with open(path, "rb") as fh:
                start = fh.read(30)
        except OSError as exc:
            raise InputError(f"cannot read {role} {path}: {exc}") from None
        if not start.startswith((b"SIMPLE  =", *_COMPRESSED)):
            raise InputError(f"{role} {path} is not a FITS file (it does not start with a FITS header, nor is it "
                             "gzip- or bzip2-compressed FITS); give a FITS image")
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FITSFixedWarning)
                with fits.open(path, memmap=False) as hdul:
                    data, header = _pick_hdu(hdul, role, name, hdu)
        except InputError:
            raise
        except Exception as exc:  # astropy raises many kinds for damaged files
            raise InputError(f"{role} {path} is a damaged or truncated FITS file ({exc}); re-export it") from None
        return data, header, name
    if isinstance(source, fits.HDUList):
        data, header = _pick_hdu(source, role, name, hdu)
        return data, header, name
    if isinstance(source, (fits.PrimaryHDU, fits.ImageHDU, fits.CompImageHDU)):
        if source.data is None:
            raise InputError(f"{role}: the HDU has no image data")
        return _blank_to_nan(source, role, name), source.header.copy(), name
    raise InputError(f"{role}: cannot read a {type(source).__name__}; give a FITS path, an HDU, or (array, header)")


def _pick_hdu(hdul, role, name, hdu):
    if hdu is not None:
        try:
            chosen = hdul[hdu]
        except (KeyError, IndexError):
            raise InputError(f"{role} {name} has no HDU {hdu!r}") from None
        if chosen.data is None or chosen.data.ndim < 2:
            raise InputError(f"{role} {name}: HDU {hdu!r} holds no image")
        return _blank_to_nan(chosen, role, name), chosen.header.copy()
    for h in hdul:
        if getattr(h, "is_image", False) and h.data is not None and h.data.ndim >= 2:
            return _blank_to_nan(h, role, name), h.header.copy()
    raise InputError(f"{role} {name} holds no image HDU with two or more axes; give a FITS image (moment-1 map)")


def _blank_to_nan(h, role: str = "map", name: str = "") -> np.ndarray:
    from .map_checks import integer_fill

    data = np.array(h.data)
    if data.dtype.kind in "iu":
        blank = h.header.get("BLANK")
        raw = data
        data = data.astype(float)
        if blank is not None:
            data[raw == blank] = np.nan
        data = integer_fill(data, raw, blank, role, name)
    if data.dtype.kind not in "fiu":
        raise InputError(f"{role} {name}: its pixels are of type {data.dtype}, not numbers; give a FITS image of numbers")
    return data.astype(float, copy=False)


def _squeeze(data, header, role, name) -> np.ndarray:
    data = np.asarray(data, dtype=float)
    if data.ndim < 2:
        raise InputError(f"{role} {name} has {data.ndim} axis; a 2-D map is needed")
    extra = data.shape[:-2]
    if any(n != 1 for n in extra):
        raise InputError(
            f"{role} {name} looks like a spectral cube (shape {data.shape}); this tool fits 2-D "
            "velocity maps: make a moment-1 or line-centre map from it first with "
            "'tiltedring maps CUBE --out DIR' (tr.make_velocity_maps in Python)"
        )
    return data.reshape(data.shape[-2:])


def parse_velocity_unit(text) -> float:
    """Factor that turns values in unit ``text`` into km/s (any spelling astropy parses)."""
    if isinstance(text, u.UnitBase):
        unit = text
    else:
        unit = None
        for attempt in (str(text).strip(), str(text).strip().lower()):
            for fmt in ("fits", None):
                try:
                    unit = u.Unit(attempt, format=fmt) if fmt else u.Unit(attempt)
                    break
                except ValueError:
                    continue
            if unit is not None:
                break
        if unit is None:
            raise InputError(f"velocity unit {text!r} is not a unit astropy can read; give e.g. km/s or m/s")
    try:
        return float((1.0 * unit).to(KM_S).value)
    except u.UnitConversionError:
        raise InputError(f"unit {text!r} is not a velocity; the map must hold line-of-sight velocities (km/s or m/s)") from None


def _celestial_wcs(header, data_shape, role: str = "map", name: str = ""):
    from .map_checks import check_wcs_keywords

    celestial = any(str(header.get(f"CTYPE{k}", "")).strip()[:4].upper() in _CELESTIAL for k in (1, 2))
    if celestial:
        check_wcs_keywords(header, role, name)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        try:
            wcs = WCS(header)
        except Exception as exc:
            if celestial:
                raise InputError(f"{role} {name}: its celestial WCS cannot be read ({str(exc).splitlines()[0][:160]}); "
                                 "e.g. a singular pixel matrix (a CDELT or CD entry of 0) or a declination beyond +-90 "
                                 "deg: correct the header, "
                                 "or remove the WCS and give --pixel-scale") from None
            return None
    if not wcs.has_celestial or sorted((wcs.wcs.lng, wcs.wcs.lat)) != [0, 1]:
        return None
    cel = wcs.celestial
    cel.array_shape = data_shape
    return cel


def sky_jacobian_from_wcs(wcs: WCS, x0: float, y0: float) -> np.ndarray:
    """Local (east, north) arcsec per pixel at (x0, y0), from the full WCS transform."""
    pts = wcs.pixel_to_world([x0, x0 + 1.0, x0], [y0, y0, y0 + 1.0])
    c0 = pts[0]
    dlon, dlat = c0.spherical_offsets_to(pts[1:])
    return np.array([dlon.to_value(u.arcsec), dlat.to_value(u.arcsec)])


def centre_jacobian(wcs: WCS, shape) -> np.ndarray:
    """The sky Jacobian (arcsec per pixel) at the centre of an image of ``shape`` (ny, nx)."""
    ny, nx = shape[-2:]
    return sky_jacobian_from_wcs(wcs, (nx - 1) / 2.0, (ny - 1) / 2.0)


def pixel_scale_of(sky_jacobian) -> float:
    """Geometric-mean pixel size in arcsec: sqrt(|det J|)."""
    return float(np.sqrt(abs(np.linalg.det(sky_jacobian))))


def _grid(data, header, name, role, pixel_scale, notes=None):
    """Celestial WCS (or None) and the sky Jacobian for an image."""
    from .map_checks import check_grid

    wcs = _celestial_wcs(header, data.shape, role, name)
    if wcs is not None:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                jacobian = centre_jacobian(wcs, data.shape)
        except Exception as exc:  # astropy cannot evaluate this WCS at the map centre
            raise InputError(f"{role} {name}: its WCS cannot be evaluated at the map centre ({exc}); correct the "
                             "header, or remove the celestial WCS and give --pixel-scale") from None
        check_grid(jacobian, role, name)
        if pixel_scale is not None and notes is not None:
            notes.append(f"the pixel scale you gave ({pixel_scale} arcsec) is not used: {role} {name} has a celestial "
                         "WCS, which sets the scale")
        return wcs, jacobian
    if pixel_scale is None:
        raise InputError(
            f"{role} {name} has no celestial WCS, so position angles and radii cannot be put on the "
            "sky; add RA/Dec WCS keywords or give the pixel scale (--pixel-scale ARCSEC, north up, east left)"
        )
    ps = float(pixel_scale)
    if not (np.isfinite(ps) and ps > 0):
        raise InputError(f"pixel scale must be a positive number of arcsec, got {pixel_scale}")
    return None, np.array([[-ps, 0.0], [0.0, ps]])


def _velocity_factor(header, velocity_unit, name, role="velocity map") -> float:
    if velocity_unit is not None:
        return parse_velocity_unit(velocity_unit)
    bunit = str(header.get("BUNIT", "")).strip()
    if not bunit:
        raise InputError(
            f"{role} {name} has no BUNIT keyword, so its velocity unit is unknown; "
            "state it (--velocity-unit km/s or m/s)"
        )
    try:
        return parse_velocity_unit(bunit)
    except InputError as exc:
        raise InputError(f"{role} {name}: BUNIT {bunit!r} — {exc}; or state the unit with --velocity-unit") from None


def regrid(data, header, target: "VelocityMap", role, name, notes, flux: bool = False, warn: bool = True):
    """Put a map on ``target``'s grid; unchanged when the grids already agree.

    Grids that differ are reprojected with reproject (bilinear, or flux-conserving with ``flux``;
    pixels outside the source become NaN) and a note says so. Without celestial WCS on both sides
    the shapes must agree.
    """
    own = _celestial_wcs(header, data.shape)
    same_shape = data.shape == target.shape
    if own is None or target.wcs is None:
        if not same_shape:
            raise InputError(
                f"{role} {name} has shape {data.shape} but the target grid has {target.shape}, "
                "and without celestial WCS in both the two cannot be aligned; regrid it first"
            )
        return data
    if same_shape and np.allclose(own.wcs.crpix, target.wcs.wcs.crpix) and np.allclose(
        own.pixel_scale_matrix, target.wcs.pixel_scale_matrix
    ) and np.allclose(own.wcs.crval, target.wcs.wcs.crval):
        return data
    from reproject import reproject_exact, reproject_interp

    out, footprint = (reproject_exact if flux else reproject_interp)((data, own), target.wcs, shape_out=target.shape)
    out[footprint <= 0] = np.nan
    msg = f"{role} {name} is on another grid; reprojected ({'flux-conserving' if flux else 'bilinear'})"
    notes.append(msg)
    if warn:
        warnings.warn(msg, FitCaution, stacklevel=3)
    return out


def _finite_check(data, role, name, notes) -> np.ndarray:
    inf = np.isinf(data)
    if inf.any():
        n = int(inf.sum())
        msg = (f"{role} {name} has {n} infinite pixel{'' if n == 1 else 's'}; "
               f"{'it is' if n == 1 else 'they are'} treated as blank")
        notes.append(msg)
        warnings.warn(msg, FitCaution, stacklevel=3)
        data = np.where(inf, np.nan, data)
    return data


def _velocity_like(source, role, vmap, own_unit, velocity_unit, notes):
    """Read a map in velocity units (error, dispersion) onto the velocity map's grid, in km/s.

    Its unit: ``own_unit`` if given, else its BUNIT, else the velocity map's stated unit."""
    data, header, name = load_image(source, role)
    unit = own_unit if own_unit is not None else (velocity_unit if not header.get("BUNIT") else None)
    from .map_checks import SPEED_OF_LIGHT

    data = data * _velocity_factor(header, unit, name, role)
    data = _finite_check(regrid(data, header, vmap, role, name, notes), role, name, notes)
    with np.errstate(invalid="ignore"):
        wild = np.abs(data) >= SPEED_OF_LIGHT
    if wild.any():
        msg = (f"{role} {name}: {int(wild.sum())} pixel(s) at or beyond the speed of light are treated as blank "
               "(fill values?)")
        notes.append(msg)
        warnings.warn(msg, FitCaution, stacklevel=3)
        data = np.where(wild, np.nan, data)
    return data, name



def _attach_maps(vmap, error, dispersion, intensity, error_unit, velocity_unit, notes) -> None:
    """The error, dispersion and intensity maps, checked and put on the velocity map's grid, into ``vmap``."""
    if error is not None:
        edata, ename = _velocity_like(error, "error map", vmap, error_unit, velocity_unit, notes)
        bad = np.isfinite(vmap.velocity) & np.isfinite(edata) & (edata <= 0)
        if bad.any():
            raise InputError(
                f"error map {ename} has {int(bad.sum())} zero or negative value{'' if bad.sum() == 1 else 's'} where "
                "the velocity map is "
                "valid; errors must be positive (blank those pixels with NaN or fix the error map)"
            )
        vmap.error = edata
    if dispersion is not None:
        vmap.dispersion, _ = _velocity_like(dispersion, "dispersion map", vmap, error_unit, velocity_unit, notes)
    if intensity is not None:
        idata, iheader, iname = load_image(intensity, "intensity map")
        vmap.intensity_unit = str(iheader.get("BUNIT", "")).strip() or None
        idata = _finite_check(regrid(idata, iheader, vmap, "intensity map", iname, notes), "intensity map", iname, notes)
        on_disc = np.isfinite(vmap.velocity) & np.isfinite(idata)
        if not (on_disc & (np.nan_to_num(idata) > 0)).any():
            raise InputError(f"intensity map {iname} has no positive value where the velocity map has data (it does not "
                             "overlap it on the sky, or is blank or negative there); give the moment-0 map of the same "
                             "galaxy")
        vmap.intensity = idata


def read_velocity_map(
    source,
    *,
    error=None,
    intensity=None,
    dispersion=None,
    beam: "Beam | str | None" = None,
    pixel_scale: float | None = None,
    velocity_unit=None,
    error_unit=None,
    hdu=None,
    velocity_convention: str | None = None,
    velocity_map_kind: str | None = None,
) -> VelocityMap:
    """Read a velocity map (and optional error and intensity maps) into a :class:`VelocityMap`.

    Parameters
    ----------
    source, error, intensity, dispersion
        A FITS path, an HDU/HDUList, or ``(array, header-or-WCS)``. Error, intensity and dispersion
        (moment-2) maps on another grid are reprojected onto the velocity grid (and a note says so).
    beam
        :class:`Beam` or ``"MAJ[,MIN[,PA]]"`` in arcsec; default from BMAJ/BMIN/BPA.
    pixel_scale
        Arcsec per pixel, only used when the map has no celestial WCS (north up, east left).
    velocity_unit, error_unit
        Override or supply BUNIT (``"km/s"``, ``"m/s"``...). Values are stored in km/s.
    velocity_convention
        ``"radio"``, ``"optical"`` or ``"relativistic"``: the Doppler convention of the velocities
        (default: read from the header, :mod:`.conventions`; ``None`` when it states none).
    velocity_map_kind
        How each velocity was taken from its spectrum: ``"moment"``, ``"peak"``, ``"gaussian"``,
        ``"hermite"`` or ``"optical-centroid"`` (default: read from the header, :mod:`.map_kind`;
        ``"moment"`` assumed when it states none).

    Inputs are never modified: arrays are copied.
    """
    from .map_checks import check_beam_size, plausible_velocities

    notes: list = []
    data, header, name = load_image(source, "velocity map", hdu=hdu)
    data = _finite_check(data * _velocity_factor(header, velocity_unit, name), "velocity map", name, notes)
    if not np.isfinite(data).any():
        raise InputError(f"velocity map {name} is blank everywhere (all NaN/BLANK); check the file or its masking")
    data = plausible_velocities(data, "velocity map", name, velocity_unit is not None,
                                str(header.get("BUNIT", "")).strip(), notes)
    wcs, jac = _grid(data, header, name, "velocity map", pixel_scale, notes)
    given = beam is not None
    if isinstance(beam, str):
        beam = Beam.parse(beam)
    beam = beam if beam is not None else Beam.from_header(header, f"velocity map {name}")
    check_beam_size(beam, jac, data.shape, f"velocity map {name}", not given, notes)
    from .conventions import choose_convention

    convention, convention_source, convention_note = choose_convention(velocity_convention, header)
    from .map_kind import choose_map_kind

    kind, kind_source, kind_note = choose_map_kind(velocity_map_kind, header)
    notes.extend(note for note in (convention_note, kind_note) if note)
    vmap = VelocityMap(velocity=data.copy(), sky_jacobian=jac, wcs=wcs, beam=beam, source=name, notes=notes,
                       object_name=str(header.get("OBJECT", "")).strip() or None, velocity_convention=convention,
                       convention_source=convention_source, velocity_map_kind=kind, kind_source=kind_source)
    if wcs is not None and vmap.celestial_frame not in (None, "icrs"):
        notes.append(f"the map's celestial frame is {vmap.celestial_frame}: ra_center/dec_center in the tables are "
                     "ICRS, converted with astropy (and --ra-center/--dec-center are read as ICRS)")

    _attach_maps(vmap, error, dispersion, intensity, error_unit, velocity_unit, notes)
    if not vmap.valid.any():
        raise InputError(f"velocity map {name} has no pixel with both a finite velocity and a positive error")
    from .map_checks import check_spread

    check_spread(vmap.valid, name)
    return vmap


def read_grid(source, role: str = "grid map", pixel_scale: float | None = None) -> VelocityMap:
    """A map's grid only (WCS, sky Jacobian, beam) as a :class:`VelocityMap` whose values are left unchecked:
    the common grid other maps are put on (:mod:`..products.compare`)."""
    data, header, name = load_image(source, role)
    wcs, jac = _grid(data, header, name, role, pixel_scale)
    beam = Beam.from_header(header, f"{role} {name}")
    return VelocityMap(velocity=data, sky_jacobian=jac, wcs=wcs, beam=beam, source=name)


def write_map(path, data: np.ndarray, vmap: VelocityMap, bunit: str = "km/s", extra: dict | None = None) -> None:
    """Write a map on ``vmap``'s grid as FITS, atomically (temporary name, then rename)."""
    from .atomic import atomic_path

    hdr = vmap.output_header(bunit)
    for key, value in (extra or {}).items():
        hdr[key] = value
    with atomic_path(path) as tmp:
        fits.PrimaryHDU(np.asarray(data, dtype=np.float32), header=hdr).writeto(tmp)
