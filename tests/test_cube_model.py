"""The model cube and the inner curve fitted on the cube, against cubes from an independent generator.

Reference: ``analytic_cubes.draw_line_cube`` (scipy's Rotation, astropy WCS offsets, Gaussian lines
sampled and averaged into channels, scipy.ndimage beam), which shares no code with the model.
Test galaxy: a steep inner rise (v = 180 tanh(R / 5") km/s, reaching 60 % of the flat speed at half
a beam), a dispersion of 10 km/s, a 3.5-pixel (7") beam, 5 km/s channels, beam-smoothed noise.
"""

import numpy as np
import pytest
from analytic_cubes import draw_line_cube, moment_one
from report_checks import assert_readable, pdf_pages
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

from tiltedring.fitting.cube_fit import fit_curve_on_cube
from tiltedring.fitting.cube_model import CHANNEL_RESPONSES, CubeGrid, model_cube, sky_cube
from tiltedring.pipeline.options import CHANNEL_RESPONSE_NAMES


def true_rings(truth, radius):
    n = radius.size
    return {"radius": radius, "x_center": np.full(n, truth["x_center"]), "y_center": np.full(n, truth["y_center"]),
            "v_systemic": np.full(n, truth["v_systemic"]), "position_angle": np.full(n, truth["position_angle"]),
            "inclination": np.full(n, truth["inclination"]), "v_rotation": truth["v_rotation"](radius),
            "dispersion": np.full(n, truth["dispersion"]), "surface_brightness": truth["surface_brightness"](radius)}


@pytest.fixture(scope="module")
def clean():
    return draw_line_cube()


@pytest.fixture(scope="module")
def noisy():
    cube, truth = draw_line_cube()
    peak = cube.data.max()
    return draw_line_cube(noise=peak / 15.0, seed=5)  # peak signal-to-noise 15 per channel


def test_response_names_match_the_model():
    assert tuple(CHANNEL_RESPONSE_NAMES) == tuple(CHANNEL_RESPONSES)


def test_model_cube_matches_the_independent_generator(clean):
    """Rings every arcsec with the true values against the generator's cube (no noise). Tolerances
    (ours): 1 % of the peak anywhere, 0.05 % rms, flux within 0.5 % (the generator's disc edge is sharp,
    the model's last ring ends at the disc radius)."""
    cube, truth = clean
    rings = true_rings(truth, np.arange(0.5, truth["disc_radius"] + 1.0, 1.0))
    model = model_cube(CubeGrid.of(cube), rings, truth["disc_radius"], subpixels=3)
    peak = cube.data.max()
    assert np.abs(model - cube.data).max() < 0.01 * peak
    assert np.sqrt(np.mean((model - cube.data) ** 2)) < 5e-4 * peak
    assert abs(model.sum() / cube.data.sum() - 1) < 0.005


def test_flux_is_kept_by_channels_hanning_and_beam(clean):
    """sum_k S_k (channel width) = the rings' moment-0, whatever the channel response (Hanning weights
    sum to one) and through the beam (normalised Gaussian): checked against the sky cube's own sum."""
    cube, truth = clean
    rings = true_rings(truth, np.arange(0.5, 30.0, 1.0))
    sky, _ = sky_cube(CubeGrid.of(cube), rings, 30.0)
    for response in CHANNEL_RESPONSES:
        observed = model_cube(CubeGrid.of(cube, response), rings, 30.0)
        assert observed.sum() == pytest.approx(sky.sum(), rel=1e-6)


def test_derivatives_match_finite_differences(clean):
    cube, truth = clean
    rings = true_rings(truth, np.arange(3.5, 40.0, 7.0))
    grid = CubeGrid.of(cube)
    box = (30, 30, 66, 66)
    sky, deriv = sky_cube(grid, rings, 40.0, box=box, free=[0, 1, 3])
    for slot, ring in enumerate([0, 1, 3]):
        for q, name in enumerate(("v_rotation", "dispersion", "surface_brightness")):
            shifted = {k: np.array(v, float) for k, v in rings.items()}
            shifted[name][ring] += 1e-4
            numeric = (sky_cube(grid, shifted, 40.0, box=box)[0] - sky) / 1e-4
            assert np.abs(numeric - deriv[3 * slot + q]).max() < 1e-4 * np.abs(deriv[3 * slot + q]).max() + 1e-9


def test_inner_curve_fitted_on_the_cube(noisy):
    """The map curve 20 % low inside three beams (as beam smearing leaves it), true geometry held.
    Requirements of issue 16: between 0.5 and 2 beams within 5 % of the truth on average and no ring worse
    than 10 %; dispersion within 3 km/s beyond 2 beams; chi^2 never above the map curve's; the same numbers
    with 1 and 2 threads."""
    cube, truth = noisy
    beam = truth["beam"]
    edges = np.arange(0.0, truth["disc_radius"] - 2.0, beam)
    radius = 0.5 * (edges[1:] + edges[:-1])
    rings = true_rings(truth, radius)
    rings["v_rotation"] = rings["v_rotation"] * np.where(radius < 3 * beam, 0.8, 1.0)
    one = fit_curve_on_cube(cube, rings, edges, threads=1)
    two = fit_curve_on_cube(cube, rings, edges, threads=2)
    for name in ("v_rotation", "dispersion", "surface_brightness", "v_rotation_err", "dispersion_err"):
        np.testing.assert_array_equal(one.rings[name], two.rings[name])
    np.testing.assert_array_equal(one.model, two.model)
    ratio = one.rings["v_rotation"] / truth["v_rotation"](radius)
    inner = (radius >= 0.5 * beam) & (radius <= 2 * beam)
    assert inner.sum() >= 2
    assert np.all(np.abs(ratio[inner] - 1) < 0.10), ratio[inner]
    assert np.mean(np.abs(ratio[inner] - 1)) < 0.05, ratio[inner]
    outer = radius > 2 * beam
    assert np.all(np.abs(one.rings["dispersion"][outer] - truth["dispersion"]) < 3.0), one.rings["dispersion"]
    assert one.record["chi2_cube_curve"] <= one.record["chi2_map_curve"]
    assert set(one.treatment[radius <= 4 * beam]) == {"cube"} and set(one.treatment[radius > 4 * beam]) == {"map"}


@pytest.fixture(scope="module")
def chained(noisy):
    """A moment-1 map of the noisy cube fitted by the map pipeline, then its inner rings refitted on the cube."""
    import warnings

    import tiltedring as tr
    from tiltedring.errors import FitCaution
    from tiltedring.pipeline.cube_curve import refit_curve_on_cube

    cube, truth = noisy
    velocity, intensity = moment_one(cube)
    header = cube.wcs.to_header()
    header["BUNIT"] = "km/s"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        vmap = tr.read_velocity_map((velocity, header), intensity=(intensity, header), beam=cube.beam)
        result = tr.fit_velocity_map(vmap, resamples=0, diagnostics=False)
    cube.header = header
    cube.convention = "radio"
    refit_curve_on_cube(result, cube, threads=2)
    return result, cube, truth


def test_innermost_ring_after_a_map_fit(chained):
    """The ring at half a beam, after the map fit (inclination 1.2 deg high, centre and v_systemic slightly
    off), within 10 % of the truth (issue 16: no ring worse than 10 %). Measured 3.9 % here (1.0-6.5 % over
    five noise draws; 0.7 % on the noiseless cube with the true geometry, 2 % with the map's). It was 11 %
    while the model's curve took Catmull-Rom slopes, which for the uneven spacing at the first ring (the
    centre node half a ring away) made the curve 4-5 % low between the first two rings: the fit pushed the
    first ring up to make up for it (7 % on the noiseless cube with the true geometry)."""
    result, cube, truth = chained
    radius = result.rings["radius"].value
    ratio = result.rings["v_rotation"].value / truth["v_rotation"](radius)
    first = radius == radius.min()
    assert radius[first][0] == pytest.approx(0.5 * truth["beam"])
    assert abs(ratio[first][0] - 1) < 0.10


def test_curve_from_cube_after_a_map_fit(chained, tmp_path):
    """The whole chain: beyond half a beam the curve within 5 % out to 2 beams and the dispersion within
    3 km/s beyond 2 beams (where the map curve is sane), elsewhere beyond 2 beams right or blank with a caution;
    rings.ecsv keeps the map values, fit.json says which rings were fitted how, and the model and
    residual cubes are written with a spectral WCS (read back by astropy.wcs)."""
    result, cube, truth = chained
    table = result.rings
    radius = table["radius"].value
    beam = truth["beam"]
    ratio = table["v_rotation"].value / truth["v_rotation"](radius)
    inner = (radius > 0.5 * beam) & (radius <= 2 * beam)
    assert np.all(np.abs(ratio[inner] - 1) < 0.05), ratio[inner]
    # beyond 2 beams the line widths are matched about the map's velocity field, whose speed is interpolated
    # between ring centres, so a ring's width needs the map curve sane (within 5 %) on the ring and on both
    # neighbours; the faint outer disc (peak S/N < 2) has a noisy map. (Measured: the ring at 8.5 beams,
    # its own map speed 1.3 % off but the next ring's 35 % low, matched to 1 km/s; with the map speed
    # beyond it replaced by its own, 9.6 km/s.) There the dispersion is within 3 km/s (ours); on every
    # other outer ring it is within 3 km/s or left blank with a caution naming the ring (rule 6): the code
    # blanks a ring where the map's own errors, on the ring or a neighbour, make the reference too uncertain.
    sane = np.abs(table["v_rotation_map"].value / truth["v_rotation"](radius) - 1) < 0.05
    outer = radius > 2 * beam
    measured = outer & sane & np.r_[True, sane[:-1]] & np.r_[sane[1:], True]
    assert measured.sum() >= 3
    sigma = table["dispersion"].value
    assert np.all(np.abs(sigma[measured] - truth["dispersion"]) < 3.0), sigma
    blank = outer & ~np.isfinite(sigma)
    assert np.all((np.abs(sigma[outer] - truth["dispersion"]) < 3.0) | blank[outer]), sigma
    assert np.all(~np.isfinite(table["dispersion_err"].value[blank]))
    if blank.any():
        caution = " ".join(c for c in result.cautions if c.startswith("dispersion not measurable"))
        assert all(f"{r:.1f} " in caution or f"{r:.1f}," in caution for r in radius[blank]), caution
    folder = result.write(tmp_path / "fit")
    rings = Table.read(folder / "rings.ecsv")
    for column in ("v_rotation_map", "v_rotation_err_map", "dispersion", "dispersion_err", "curve_source"):
        assert column in rings.colnames
    assert rings.colnames[-1] == "flags"
    import json

    record = json.loads((folder / "fit.json").read_text())["curve_from_cube"]
    assert record["treatment_by_ring"]["cube"] == [float(r) for r in radius[radius <= 4 * beam]]
    with fits.open(folder / "model_cube.fits") as model, fits.open(folder / "residual_cube.fits") as residual:
        wcs = WCS(model[0].header)
        assert wcs.has_spectral and model[0].data.shape == cube.data.shape
        spectral = wcs.spectral.pixel_to_world(np.arange(cube.data.shape[0]))
        np.testing.assert_allclose(spectral.to_value("km/s"), cube.velocity, atol=1e-6)
        np.testing.assert_allclose(model[0].data + residual[0].data, cube.data, atol=1e-5 * cube.data.max())


def test_a_cube_fit_report_has_the_cube_pages_all_one_size(chained, tmp_path):
    """The report of a fit made from a cube gains two A4 pages after "kinematics": twelve channel maps and
    the major/minor slices (each with the model cube contoured), the inner curve and the dispersion.
    Checked against the PDF's own page boxes (595 x 842 pt, ISO 216 A4) and matplotlib's artists; the
    same readability rules as the other pages (text 7.5 pt or more, tick labels 8 pt or more)."""
    import matplotlib
    from matplotlib.image import AxesImage

    from tiltedring.products import report
    from tiltedring.products.cube_figures import plot_channel_maps, plot_position_velocity

    backend = matplotlib.get_backend()
    result, cube, truth = chained
    pages = report.report_pages(result)
    names = [name for name, _ in pages]
    assert names == ["summary", "maps", "profiles", "kinematics", "cube_channels", "cube_slices"]
    assert {tuple(np.round(f.get_size_inches(), 2)) for _, f in pages} == {report.PAGE_SIZE}
    channels, slices = pages[4][1], pages[5][1]
    maps = [ax for ax in channels.axes if ax.images and isinstance(ax.images[0], AxesImage) and ax.collections]
    assert len(maps) == 12  # every channel map shows the model as contours over the data
    assert sum(bool(ax.images) and bool(ax.collections) for ax in slices.axes) == 2  # major and minor slices
    for name, figure in pages[4:]:
        assert_readable(figure, name)
    path = tmp_path / "report.pdf"
    report.write_report(result, path)
    assert pdf_pages(path) == (6, {(0, 0, 595, 842)})
    # the panels also stand alone, drawn without pyplot
    assert len(plot_channel_maps(result, count=4).axes) == 5  # four maps and the colour bar
    assert plot_position_velocity(result, "minor").axes[0].collections
    assert matplotlib.get_backend() == backend
