"""What the eye checks: the report as one document, the comparison's refusal of maps that do not
overlap (its figure is checked in test_compare_and_report.py), the mass-model figure, and the
command line's manners.

Checks against things outside the figure code: the PDF's own page boxes (parsed from the file),
astropy's WCS and SkyCoord for the direction of north, astropy units for the tables, and the
pixels of the saved PNGs (matplotlib.image, no pyplot).
"""

import re
import warnings
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from astropy import units as u
from astropy.table import QTable, Table

from report_checks import assert_readable, pdf_pages, visible_texts

from tiltedring.cli import main
from tiltedring.synthetic import DiscTruth, make_field


@pytest.fixture(scope="module")
def warped_result():
    """A fit of the warped demo field (its OBJECT card names it Brenmoor Spiral; the grid is rotated)."""
    import tiltedring as tr

    demo = Path(__file__).parent.parent / "demo_fields"
    vmap = tr.read_velocity_map(demo / "brenmoor_velocity.fits", intensity=demo / "brenmoor_intensity.fits")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return tr.fit_velocity_map(vmap, resamples=0)


def _texts(figure) -> list:
    return visible_texts(figure)


def test_report_pages_share_one_size_and_page_one_names_object_and_decisions(warped_result, tmp_path):
    from tiltedring.products import report

    pages = report.report_pages(warped_result)
    assert [name for name, _ in pages] == ["summary", "maps", "profiles", "kinematics"]
    assert {tuple(np.round(f.get_size_inches(), 2)) for _, f in pages} == {report.PAGE_SIZE}
    page_one = " ".join(t.get_text() for t in _texts(pages[0][1]))
    assert "Brenmoor Spiral" in page_one  # the map's OBJECT card
    for words in ("warp beyond 76", "rings left out", "beam smearing", "non-circular motions", "Cautions",
                  "Flagged rings", "position angle", "inclination", "systemic velocity"):
        assert words in page_one, words
    # journal column width: every text of every page at 7.5 pt or more, every tick label at 8 pt or more
    for name, figure in pages:
        assert_readable(figure, name)
    # the PDF itself: as many pages as builders made, every MediaBox A4 (595.3 x 841.9 pt, ISO 216)
    path = tmp_path / "report.pdf"
    report.write_report(warped_result, path)
    assert pdf_pages(path) == (4, {(0, 0, 595, 842)})


def test_a_registered_page_is_appended_and_numbered(warped_result):
    from tiltedring.products import report

    def extra(result):
        page = report.new_page(result, "an extra page")
        page.panel(1.0, 1.5, 3.0, 3.0).plot([0, 1], [0, 1])
        return [page.figure]

    try:
        report.register_page("extra", extra, after="maps")
        pages = report.report_pages(warped_result)
        assert [name for name, _ in pages] == ["summary", "maps", "extra", "profiles", "kinematics"]
        footer = " ".join(t.get_text() for t in _texts(pages[2][1]))
        assert "page 3 of 5" in footer and "an extra page" in footer
    finally:
        report.PAGES[:] = [p for p in report.PAGES if p.name != "extra"]


def test_north_arrow_follows_the_wcs_on_a_rotated_grid(warped_result):
    """The compass direction equals the pixel direction astropy's WCS gives for a step to the north."""
    from astropy.coordinates import SkyCoord

    from tiltedring.products.sky_panels import _direction

    vmap = warped_result.vmap
    ny, nx = vmap.shape
    centre = vmap.wcs.pixel_to_world(nx / 2, ny / 2)
    for angle, (east, north) in ((0.0, (0.0, 1.0)), (90.0, (1.0, 0.0))):
        step = SkyCoord(centre).directional_offset_by(angle * u.deg, 10 * u.arcsec)
        x, y = vmap.wcs.world_to_pixel(step)
        expected = np.array([x - nx / 2, y - ny / 2])
        expected /= np.hypot(*expected)
        np.testing.assert_allclose(_direction(vmap, east, north), expected, atol=2e-3)


def test_decisions_name_new_sections_and_fallbacks():
    """A section no formatter knows, and a fallback of a known one, reach the sentences."""
    from tiltedring.products.decisions import decision_lines, plural

    result = SimpleNamespace(
        vmap=SimpleNamespace(beam=object(), object_name="Tolwick Disc", source="t.fits"), options=None,
        diagnostics={"warp": {"detected": False, "delta_bic": 3.0, "rings_excluded_as_non_circular": [4.0, 12.0],
                              "thresholds": {"min_delta_bic": 10.0}},
                     "beam_smearing": {"corrected": False, "fallback": "the corrected disc explained the rings worse"},
                     "centre": {"fallback": True, "disagrees_with_rings": ["x_center"]},
                     "a_later_step": {"detected": True, "note": "something to read"}})
    lines = dict(decision_lines(result))
    assert lines["geometry"].startswith("flat disc")
    assert "2 rings (4 and 12 arcsec)" in lines["rings left out"]
    assert "not applied: the corrected disc explained the rings worse" in lines["beam smearing"]
    assert "disagreed in x_center" in lines["centre and v_systemic"]
    assert lines["a later step"] == "detected: yes; something to read"
    assert plural(1, "galaxy") == "1 galaxy" and plural(2, "galaxy") == "2 galaxies" and plural(0, "ring") == "0 rings"


def test_maps_that_do_not_overlap_are_refused(tmp_path, capsys):
    from dataclasses import replace

    truth = DiscTruth(name="Dunmere Disc", disc_radius=40.0, x_center=31.5, y_center=31.5)
    a = make_field(truth, shape=(64, 64), pixel_scale=2.0, noise=1.0, seed=1)
    far = make_field(replace(truth, dec=truth.dec + 0.5), shape=(64, 64), pixel_scale=2.0, noise=1.0, seed=2)
    a.velocity_hdu.writeto(tmp_path / "a.fits")
    far.velocity_hdu.writeto(tmp_path / "far.fits")
    code = main(["compare", str(tmp_path / "a.fits"), str(tmp_path / "far.fits"), "--out", str(tmp_path / "c"), "-q"])
    assert code == 2
    assert "do not overlap" in capsys.readouterr().err
    assert not (tmp_path / "c").exists()


def test_massmodel_writes_its_figure_and_tables_with_units(tmp_path):
    """An invented curve: an NFW halo (V200 110 km/s, c 9) plus an exponential disc, 3 km/s errors."""
    from tiltedring.massmodel.components import ExponentialDisc
    from tiltedring.massmodel.halos import NFW

    r = np.linspace(0.5, 20, 25)
    disc = ExponentialDisc(3e10, 2.5)
    v = np.sqrt(NFW(110.0, 9.0).v_squared(r) + disc.v_squared(r))
    curve = QTable({"radius_kpc": r * u.kpc, "v_rotation": v * u.km / u.s, "v_rotation_err": np.full(r.size, 3.0) * u.km / u.s})
    curve.write(tmp_path / "curve.ecsv")
    comps = QTable({"radius_kpc": r * u.kpc, "v_disc": np.sqrt(disc.v_squared(r) / 0.5) * u.km / u.s})
    comps.write(tmp_path / "baryons.ecsv")
    out = tmp_path / "mass"
    assert main(["massmodel", str(tmp_path / "curve.ecsv"), "--components", str(tmp_path / "baryons.ecsv"),
                 "--models", "nfw,burkert", "--ml-mode", "fixed", "--out", str(out), "-q"]) == 0
    import matplotlib.image

    for model in ("nfw", "burkert"):
        png = matplotlib.image.imread(out / f"decomposition_{model}.png")
        assert png.shape[0] > 300 and png[..., :3].std() > 0.1
        components = QTable.read(out / f"components_{model}.ecsv")
        assert components["radius"].unit == u.kpc and components["v_halo"].unit == u.km / u.s
    params = Table.read(out / "parameters.ecsv")
    rows = {(m, p): row for m, p, row in zip(params["model"], params["parameter"], params)}
    v200 = rows[("nfw", "log10_v200")]
    assert u.Unit(v200["unit"]) == u.km / u.s  # parsed by astropy, not compared as text
    assert abs(10 ** v200["value"] - 110.0) < 5.0  # the injected halo, M/L held at its true 0.5
    assert u.Unit(rows[("burkert", "log10_r0")]["unit"]) == u.kpc


def test_fit_verbose_prints_the_first_read_columns(tmp_path, capsys, demo_fields):
    assert main(["fit", str(demo_fields / "ashgrove_velocity.fits"), "--resamples", "0", "--no-report", "-v",
                 "--out", str(tmp_path / "fit")]) == 0
    out = capsys.readouterr().out
    header = next(line for line in out.splitlines() if line.strip().startswith("radius"))
    assert header.split() == ["radius", "PA", "incl.", "v_rotation", "flags"]
    assert re.search(r"^\s+\d+\.\d\s+\d+\.\d\s+\d+\.\d\s+\d+\.\d \+/- \d+\.\d", out, re.M)
    assert "geometry: flat disc" in out  # the decisions in the terminal summary


def test_verbose_only_where_it_prints_more(capsys):
    for command, has_verbose in (("fit", True), ("massmodel", False), ("compare", False), ("batch", False)):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        assert ("--verbose" in capsys.readouterr().out) == has_verbose, command


def test_short_repr(warped_result):
    text = repr(warped_result)
    assert text.startswith("<FitResult Brenmoor Spiral:") and len(text) < 200
