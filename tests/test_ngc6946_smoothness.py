"""NGC 6946 (WSRT HI cube, ../shared/reference_data): the beam-smearing correction of a Gaussian line-centre map at
one-beam and half-beam rings, against the criteria of issue 14 and the published values.

Published values (REFERENCES.md): inclination 38 +/- 2 deg and the rotation curve of SPARC (Lelli et al. 2016,
AJ 152, 157, from Boomsma et al. 2008, A&A 490, 555; `sparc_lelli2016/Rotmod_LTG/NGC6946_rotmod.dat`, distance
5.52 Mpc); v_systemic about 43-46 km/s and centre about 20h34m52.3s +60d09m14s (de Blok et al. 2008, AJ 136, 2648
and Boomsma et al. 2008; from memory). The cube is heliocentric, optical convention, like those values. The Milky
Way HI at -60..+5 km/s (the folder's SOURCE.md) is excluded as in tests/test_cube.py.

The maps are made once per module (the Gaussian fits of the cube take most of a minute) and each ring width is
fitted once; the criteria are separate tests on those fits.
"""

import warnings

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord

from conftest import REFERENCE_DATA

CUBE = REFERENCE_DATA / "wsrt_ngc6946_hi_cube" / "ngc6946.fits"
SPARC = REFERENCE_DATA / "sparc_lelli2016" / "Rotmod_LTG" / "NGC6946_rotmod.dat"
KPC_PER_ARCSEC = 5.52e3 * np.pi / (180 * 3600)  # SPARC's distance, 5.52 Mpc
PUBLISHED_CENTRE = SkyCoord("20h34m52.3s +60d09m14s")
BEAM = 65.6  # arcsec, BMAJ of the cube (SOURCE.md)


@pytest.fixture(scope="module")
def maps():
    if not CUBE.is_file():
        pytest.skip(f"open reference data not found at {CUBE.parent} (a fresh clone has no ../shared)")
    from tiltedring.io.velocity_fields import make_velocity_maps

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return make_velocity_maps(CUBE, kind="gaussian", exclude_velocities=[(-60.0, 5.0)], threads=1)


@pytest.fixture(scope="module", params=["1beam", "0.5beam"])
def fitted(request, maps):
    """(ring width, fit result) of the Gaussian map, its kind read from the map's own card."""
    from tiltedring.pipeline.staged import FitOptions, fit_velocity_map

    vmap = maps.to_velocity_map()
    assert vmap.velocity_map_kind == "gaussian" and "VELKIND" in vmap.kind_source
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = fit_velocity_map(vmap, FitOptions.from_mapping({"ring_width": request.param, "resamples": 0,
                                                                 "quiet": True}))
    _print_table(request.param, result)
    return request.param, result


def _curves(result):
    rings = result.rings
    radius = rings["radius"].to_value(u.arcsec)
    corrected = rings["v_rotation"].to_value(u.km / u.s)
    plain = rings["v_rotation_smeared"].to_value(u.km / u.s) if "v_rotation_smeared" in rings.colnames else corrected
    error = rings["v_rotation_err"].to_value(u.km / u.s)
    return radius, corrected, plain, error


def _print_table(width, result):
    radius, corrected, plain, error = _curves(result)
    print(f"\nNGC 6946, Gaussian map, rings {width}: beam correction {result.diagnostics['beam_smearing']}")
    for row in zip(radius / BEAM, radius * KPC_PER_ARCSEC, plain, corrected, error):
        print("R/beam %5.2f  R %5.2f kpc  uncorrected %6.1f  corrected %6.1f  error %5.1f" % row)


def test_corrected_equals_uncorrected_beyond_two_beams(fitted):
    """Issue 14: beyond two beams the corrected curve differs from the uncorrected by less than its error."""
    width, result = fitted
    radius, corrected, plain, error = _curves(result)
    far = (radius > 2 * BEAM) & np.isfinite(corrected)
    assert np.all(np.abs(corrected - plain)[far] < error[far]), (width, (corrected - plain)[far])


def test_no_zigzag_between_one_and_six_beams(fitted):
    """Issue 14: between 1 and 6 beams no ring-to-ring zig-zag larger than twice the errors: a ring's departure
    from the mean of its two neighbours, v_k - (v_(k-1) + v_(k+1)) / 2, is within twice its error
    sqrt(e_k^2 + (e_(k-1)^2 + e_(k+1)^2) / 4) wherever the curve turns (the two steps have opposite signs)."""
    width, result = fitted
    radius, corrected, _, error = _curves(result)
    span = np.flatnonzero((radius >= BEAM) & (radius <= 6 * BEAM))
    for k in span:
        if k == 0 or k + 1 >= len(radius):
            continue
        left, right = corrected[k] - corrected[k - 1], corrected[k + 1] - corrected[k]
        if left * right >= 0:
            continue
        departure = corrected[k] - 0.5 * (corrected[k - 1] + corrected[k + 1])
        sigma = np.sqrt(error[k] ** 2 + 0.25 * (error[k - 1] ** 2 + error[k + 1] ** 2))
        assert abs(departure) < 2 * sigma, (width, radius[k], departure, sigma)


def test_centre_and_systemic_velocity_agree_with_the_rings(fitted):
    """Issue 14: the adopted centre and systemic velocity agree with the values the rings give on their own
    (stage ``free``, every parameter free per ring, rings between one and six beams): the adopted value lies
    within twice the larger of the rings' spread about their median (1.4826 MAD, common practice) and their
    median error of that median."""
    width, result = fitted
    free = result.stages["free"]
    radius = free["radius"].to_value(u.arcsec)
    inner = (radius >= BEAM) & (radius <= 6 * BEAM)
    for name in ("v_systemic", "x_center", "y_center"):
        values, errors = (np.asarray(getattr(free[key], "value", free[key]), float)[inner]
                          for key in (name, name + "_err"))
        good = np.isfinite(values) & np.isfinite(errors)
        values, errors = values[good], errors[good]
        adopted = float(np.median(np.asarray(getattr(result.rings[name], "value", result.rings[name]), float)))
        spread = max(1.4826 * np.median(np.abs(values - np.median(values))), np.median(errors))
        print(f"{width}: {name} adopted {adopted:.2f}, rings {np.median(values):.2f} +/- {spread:.2f}")
        assert abs(adopted - np.median(values)) < 2 * spread, (width, name, adopted, np.median(values), spread)


def test_published_systemic_velocity_centre_and_flat_curve(fitted):
    """The published values (module docstring): v_systemic within 6 km/s of 44.5 (1.5 channels of 4.2 km/s, as
    tests/test_cube.py), centre within 30 arcsec (half a beam), and the flat part of the curve (7 to 15 kpc)
    within 10 per cent of SPARC's on average (our inclination is fitted, SPARC's is 38 deg; a 2 deg difference
    alone moves the speeds by about 5 per cent). Measured: v_systemic 50.5 and 48.0 km/s, centre 10.9 and 18.0
    arcsec off, flat curve 0.914 and 1.041 of SPARC's at one-beam and half-beam rings."""
    width, result = fitted
    rings = result.rings
    vsys = float(np.median(rings["v_systemic"].to_value(u.km / u.s)))
    centre = SkyCoord(np.median(rings["ra_center"].to_value(u.deg)) * u.deg,
                      np.median(rings["dec_center"].to_value(u.deg)) * u.deg)
    assert abs(vsys - 44.5) < 6.0, (width, vsys)
    assert centre.separation(PUBLISHED_CENTRE).arcsec < 30.0, (width, centre.separation(PUBLISHED_CENTRE).arcsec)
    published = np.loadtxt(SPARC, comments="#")
    radius, corrected, _, _ = _curves(result)
    kpc = radius * KPC_PER_ARCSEC
    flat = (kpc >= 7.0) & (kpc <= 15.0) & np.isfinite(corrected)
    reference = np.interp(kpc[flat], published[:, 0], published[:, 1])
    ratio = float(np.mean(corrected[flat] / reference))
    print(f"{width}: v_systemic {vsys:.1f} km/s, centre {centre.separation(PUBLISHED_CENTRE).arcsec:.1f} arcsec "
          f"from the published one, flat curve / SPARC {ratio:.3f}")
    assert abs(ratio - 1.0) < 0.10, (width, ratio)
