"""The kind of velocity map (moment, peak, Gaussian, Gauss-Hermite, optical centroid) and the beam-smearing
correction of line-centre maps.

Independent references: line profiles written with numpy from their formulas, their centres found by
``scipy.optimize`` (peak) and by the closed-form mean of a sum of Gaussians (moment); spectral cubes of thin discs
drawn by tests/independent_cubes.py (scipy Rotation test particles, scipy.ndimage beam, scipy.special.ndtr
channels: no project code).
"""

import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS

sys.path.insert(0, str(Path(__file__).parent))

from independent_cubes import cube_hdu, draw_cube  # noqa: E402

from tiltedring.errors import InputError  # noqa: E402
from tiltedring.io.map_kind import KIND_CARD, choose_map_kind  # noqa: E402
from tiltedring.io.maps import read_velocity_map  # noqa: E402


def _map_hdu(card=None):
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.cdelt = [-1 / 3600, 1 / 3600]
    wcs.wcs.crval = [150.0, 30.0]
    wcs.wcs.crpix = [16, 16]
    header = wcs.to_header()
    header["BUNIT"] = "km/s"
    if card is not None:
        header[KIND_CARD] = card
    yy, xx = np.mgrid[0:32, 0:32]
    return fits.PrimaryHDU(1000.0 + 3.0 * (xx - 15.5), header=header)


def test_kind_read_from_the_card_given_or_assumed():
    """The card names the kind; a stated kind wins (with a note when they disagree); no card: moment, assumed."""
    assert read_velocity_map(_map_hdu("peak")).velocity_map_kind == "peak"
    plain = read_velocity_map(_map_hdu())
    assert plain.velocity_map_kind == "moment" and plain.kind_source.startswith("assumed")
    given = read_velocity_map(_map_hdu("peak"), velocity_map_kind="optical-centroid")
    assert given.velocity_map_kind == "optical-centroid" and any("peak" in note for note in given.notes)
    with pytest.raises(InputError, match="velocity map kind"):
        choose_map_kind("centroid", None)


def test_maps_made_from_a_cube_carry_their_kind(tmp_path):
    """'tiltedring maps' writes the kind on each velocity map, and the fit reads it back."""
    from tiltedring.io.velocity_fields import make_velocity_maps

    data, velocity, wcs, truth = draw_cube(shape=(24, 24), n_channels=30, n_particles=50_000)
    maps = make_velocity_maps(cube_hdu(data, velocity, wcs, bmaj_arcsec=truth["beam"]), kind="peak")
    paths = maps.write_into(tmp_path / "maps")
    assert fits.getheader(paths["velocity"])[KIND_CARD] == "peak"
    assert read_velocity_map(paths["velocity"]).velocity_map_kind == "peak"
    assert maps.to_velocity_map().velocity_map_kind == "peak"


def test_option_on_a_map_and_refused_for_a_cube(tmp_path):
    """velocity_map_kind is an input option of a map; for a cube the kind is that of the maps made from it."""
    from tiltedring.jobs import Job, read_maps

    job = Job.from_values(_map_hdu(), {"velocity_map_kind": "gaussian"})
    assert read_maps(job).velocity_map_kind == "gaussian"
    data, velocity, wcs, truth = draw_cube(shape=(24, 24), n_channels=30, n_particles=50_000)
    path = tmp_path / "cube.fits"
    cube_hdu(data, velocity, wcs, bmaj_arcsec=truth["beam"]).writeto(path)
    with pytest.raises(InputError, match="velocity_kind"):
        read_maps(Job.from_values(str(path), {"velocity_map_kind": "peak"}))


def _gauss(v, amplitude, centre, sigma):
    return amplitude * np.exp(-0.5 * ((v - centre) / sigma) ** 2)


def test_line_centres_of_a_blended_profile():
    """Two Gaussian components on one sight line (a beam-blended profile), channels 1 km/s: the moment is the
    closed-form mean (a1 s1 v1 + a2 s2 v2) / (a1 s1 + a2 s2) within 0.05 km/s; the peak map finds the
    maximum that scipy.optimize finds on the same formula within 0.3 km/s (a parabola through three channels);
    a single Gaussian's centre is recovered by the Gaussian and Gauss-Hermite fits within 0.01 km/s."""
    from scipy.optimize import minimize_scalar

    from tiltedring.io.velocity_fields import line_centres

    v = np.arange(-100.0, 100.5, 1.0)
    blended = _gauss(v, 1.0, 20.0, 8.0) + _gauss(v, 0.6, -10.0, 10.0)
    single = _gauss(v, 1.0, 12.3, 9.0)
    cube = np.stack([blended, single], axis=1)[:, :, None]  # (channel, y, x)
    mean = (1.0 * 8.0 * 20.0 + 0.6 * 10.0 * -10.0) / (1.0 * 8.0 + 0.6 * 10.0)
    assert line_centres(cube, v, "moment")[0, 0] == pytest.approx(mean, abs=0.05)
    peak = minimize_scalar(lambda x: -(_gauss(x, 1.0, 20.0, 8.0) + _gauss(x, 0.6, -10.0, 10.0)),
                           bounds=(0, 40), method="bounded").x
    assert line_centres(cube, v, "peak")[0, 0] == pytest.approx(peak, abs=0.3)
    for kind in ("gaussian", "hermite", "optical-centroid"):
        assert line_centres(cube, v, kind)[1, 0] == pytest.approx(12.3, abs=0.01)


def test_line_centre_offset_does_not_depend_on_threads():
    """Project rule: the model cube and its line centres give the same numbers with one and two threads."""
    from tiltedring.fitting.cube_model import CubeGrid
    from tiltedring.fitting.line_centre_smearing import line_centre_offset
    from tiltedring.io.maps import Beam

    radius = np.arange(2.0, 40.0, 4.0)
    rings = {"radius": radius, "x_center": np.full(10, 31.5), "y_center": np.full(10, 31.0),
             "v_systemic": np.zeros(10), "position_angle": np.full(10, 40.0), "inclination": np.full(10, 60.0),
             "v_rotation": 150 * np.tanh(radius / 5), "v_radial": np.zeros(10), "dispersion": np.full(10, 10.0),
             "surface_brightness": np.ones(10)}
    velocity = np.arange(-200.0, 200.1, 10.0 / 3)
    grid = CubeGrid((velocity.size, 64, 64), velocity, 10.0 / 3, np.diag([-1.0, 1.0]), Beam(8.0, 8.0, 0.0))
    intensity = np.ones((64, 64))
    one = line_centre_offset(grid, rings, 40.0, intensity, "gaussian", (10, 10, 54, 54), threads=1)
    two = line_centre_offset(grid, rings, 40.0, intensity, "gaussian", (10, 10, 54, 54), threads=2)
    np.testing.assert_array_equal(one, two)
    assert np.abs(one).max() > 1.0  # the beam does skew the lines near the centre


@pytest.fixture(scope="module")
def steep_disc():
    """An exponential disc (scale length 24 arcsec) with v = 180 tanh(R / 4 arcsec), a turnover at half the
    8-arcsec beam, inclination 50 deg, 1-arcsec pixels, channels 5 km/s, dispersion 10 km/s."""
    data, velocity, wcs, truth = draw_cube(shape=(160, 160), pixel_scale=1.0, position_angle=130.0, inclination=50.0,
                                           r_turn=4.0, v_flat=180.0, beam_pixels=8.0, disc_radius=72.0, noise=0.1,
                                           seed=3, n_particles=2_000_000, exponential_surface=True)
    return cube_hdu(data, velocity, wcs, bmaj_arcsec=truth["beam"]), truth


@pytest.mark.parametrize("kind", ["gaussian", "peak"])
def test_stated_kind_gives_a_closer_inner_curve_than_assuming_moment(steep_disc, kind):
    """A Gaussian or peak map of the independent cube, half-beam rings. Between a quarter beam and two beams the
    curve with the kind stated (read from the map's card) is closer to the truth than with a moment map assumed,
    and within 4 per cent of it on average (measured: Gaussian 2.4 per cent stated against 10.2 assuming moment,
    peak 1.5 against 19.4, since the moment-1 correction holds the beam's effect as a free column: 5.7 and 12.2
    before; the bound was set after measuring, with room for other machines' rounding). The truth
    is v sin(i_true) / sin(i_fit): the fit's inclination (48-49 deg) is compared elsewhere, the speeds here."""
    from tiltedring.io.velocity_fields import make_velocity_maps
    from tiltedring.pipeline.staged import FitOptions, fit_velocity_map

    hdu, truth = steep_disc
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        maps = make_velocity_maps(hdu, kind=kind, threads=1)
        errors = {}
        for stated in (None, "moment"):
            vmap = maps.to_velocity_map(velocity_map_kind=stated)
            result = fit_velocity_map(vmap, FitOptions.from_mapping({"ring_width": "0.5beam", "resamples": 0,
                                                                     "quiet": True}))
            r = result.rings["radius"].value
            v = result.rings["v_rotation"].value
            inclination = np.radians(np.median(result.rings["inclination"].value))
            true = truth["v_flat"] * np.tanh(r / truth["r_turn"]) * np.sin(np.radians(truth["inclination"])) \
                / np.sin(inclination)
            inner = (r > 0.25 * truth["beam"]) & (r < 2 * truth["beam"])
            errors[stated or kind] = float(np.mean(np.abs(v[inner] / true[inner] - 1)))
            section = result.diagnostics["beam_smearing"]
            assert section["velocity_map_kind_source"].startswith("header card" if stated is None else "given")
    print(kind, errors)
    assert errors[kind] < errors["moment"]
    assert errors[kind] < 0.04


def test_an_assumed_kind_is_recorded_and_cautioned_when_it_matters():
    """A map that states no kind (an independent particle disc's intensity-weighted velocity field,
    tests/independent_fields.py, whose beam correction moves the inner rings by more than their errors): fit.json
    says moment was assumed and a caution asks for the kind; stating moment removes that caution."""
    import tiltedring as tr
    from independent_fields import draw_field

    hdul, truth = draw_field(50.0, 60.0, seed=4, shape=(120, 120), beam_pixels=8.0, r_turn=6.0, n_particles=500_000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assumed = tr.fit_velocity_map(tr.read_velocity_map(hdul), resamples=0)
        stated = tr.fit_velocity_map(tr.read_velocity_map(hdul, velocity_map_kind="moment"), resamples=0)
    section = assumed.diagnostics["beam_smearing"]
    assert section["velocity_map_kind_source"].startswith("assumed")
    assert any("--velocity-map-kind" in text for text in assumed.cautions)
    assert stated.diagnostics["beam_smearing"]["velocity_map_kind_source"] == "given (velocity_map_kind)"
    assert not any("--velocity-map-kind" in text for text in stated.cautions)
