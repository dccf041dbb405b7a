"""The outlier screen (tiltedring/pipeline/outliers.py): wild pixels found, left out, recorded.

Fields are drawn by tests/independent_fields.py (scipy Rotation test particles, not the project's
projection code), so truth is known from outside the project. Wild pixels are injected as
+/- 300 km/s on 1 % of the valid pixels (a foreground star or a failed line fit in a real map is
of that order; our choice). Tolerances are ours and stated at each check: recall at least 95 %,
false-positive rate at most 0.1 % of the clean pixels (at 5 robust sigma a Gaussian pixel passes
with probability 1 - 6e-7; the extra room is for the beam-smearing misfit of the inner rings), and
the geometry back within the recovery targets of benchmarks/recovery.py (position angle 1 deg,
inclination 2 deg). A smooth departure shared over a beam is kept unless it is faster than the disc's
rotation. The real map is the EDGE-CALIFA H-alpha map of NGC 4047 (Levy et al. 2018,
ApJ 860, 92: inclination 42.1 deg, photometric), skipped without ../shared.
"""

import json

import numpy as np
import pytest

import tiltedring as tr
from independent_fields import draw_field
from tiltedring.fitting.candidates import Pixels
from tiltedring.pipeline.outliers import screen, screen_cautions

TRUTH = {"position_angle": 123.0, "inclination": 60.0}


def _angle_gap(a, b):
    return abs(((a - b + 180.0) % 360.0) - 180.0)


@pytest.fixture(scope="module")
def fields():
    """A clean field, the same with 1 % of its valid pixels pushed by +/- 300 km/s, and where they are."""
    hdul, truth = draw_field(TRUTH["position_angle"], TRUTH["inclination"], seed=11, n_particles=1_500_000)
    clean = hdul[0].data.astype(float)
    rng = np.random.default_rng(5)
    valid = np.flatnonzero(np.isfinite(clean))
    hit = rng.choice(valid, size=len(valid) // 100, replace=False)
    wild = clean.copy()
    wild.flat[hit] += rng.choice([-300.0, 300.0], size=len(hit))
    injected = np.zeros(clean.shape, bool)
    injected.flat[hit] = True
    return {"clean": clean, "wild": wild, "injected": injected, "header": hdul[0].header, "truth": truth}


def _fit(fields, which, **options):
    vmap = tr.read_velocity_map((fields[which], fields["header"]))
    return tr.fit_velocity_map(vmap, **options)


@pytest.fixture(scope="module")
def fits_of(fields):
    import warnings

    from tiltedring.errors import FitCaution

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        return {"clean": _fit(fields, "clean"), "wild": _fit(fields, "wild"),
                "wild_off": _fit(fields, "wild", outlier_screen=False)}


def test_injected_outliers_are_found(fields, fits_of):
    """Recall >= 95 % of the injected pixels inside the rings; false positives <= 0.1 % of the clean ones."""
    res = fits_of["wild"]
    left = res.left_out
    modelled = np.isfinite(res.residual)
    injected = fields["injected"] & modelled
    recall = (left & injected).sum() / injected.sum()
    false_rate = (left & ~fields["injected"]).sum() / (modelled & ~fields["injected"]).sum()
    assert recall >= 0.95, recall
    assert false_rate <= 0.001, false_rate
    summary = res.diagnostics["outliers"]
    assert summary["applied"] and summary["n_left_out"] == int(left.sum())
    assert any("wild pixels" in c for c in res.cautions)  # 1 % is a notable share: the reader is told


def test_geometry_returns_to_truth(fields, fits_of):
    """With the screen the geometry is within the recovery targets (1 deg, 2 deg); without it, the wild pixels
    move it or at least inflate the residual rms well beyond the 4 km/s noise."""
    truth = fields["truth"]
    g = fits_of["wild"].geometry()
    assert _angle_gap(g["position_angle"], truth["position_angle"]) < 1.0
    assert abs(g["inclination"] - truth["inclination"]) < 2.0
    clean = fits_of["clean"].geometry()
    assert _angle_gap(g["position_angle"], clean["position_angle"]) < 0.3  # within noise of the clean fit
    assert abs(g["inclination"] - clean["inclination"]) < 0.5
    stats = fits_of["wild"].statistics()
    assert stats["residual_rms_fitted"] < 8.0 < fits_of["wild_off"].statistics()["residual_rms"]


def test_resampled_errors_use_the_kept_pixels(fits_of):
    """The resampled (random) error part is drawn from the residual of the pixels the fit used: with the wild
    pixels left out it is within 50 % of the clean field's, without the screen at least 1.5 times as large.
    The wild pixels are isolated, so they add uncorrelated variance (1 % at 300 km/s: 900 (km/s)^2 against
    the noise's 16 spread over a correlation area of about 15 pixels): a ring's error grows by about
    sqrt(1 + 900 / (16 x 15)) = 2.2, less what the fit's weights take off; measured 1.87. (A noise model that
    gave the wild pixels' variance the noise's correlation, as the residual's own spectrum did, made it
    larger still.)"""
    def random_part(res):
        return np.nanmedian(res.rings["v_rotation_err_random"].value)

    clean, wild, off = (random_part(fits_of[k]) for k in ("clean", "wild", "wild_off"))
    assert abs(wild - clean) < 0.5 * clean, (wild, clean)
    assert off > 1.5 * wild, (off, wild)


def test_clean_field_loses_nothing(fits_of):
    """A clean field: at most 0.05 % of its pixels left out (no caution), so the fit is the unscreened one."""
    res = fits_of["clean"]
    summary = res.diagnostics["outliers"]
    assert summary["share_left_out"] <= 0.0005
    assert not any("wild pixels" in c for c in res.cautions)


def test_cap_leaves_nothing_out_and_says_why(fields):
    """More than the share limit beyond the level: none left out, and a caution names the reason."""
    clean = fields["clean"]
    yy, xx = np.nonzero(np.isfinite(clean))
    v = clean[yy, xx].copy()
    truth = fields["truth"]
    rng = np.random.default_rng(3)
    hit = rng.random(len(v)) < 0.10
    v[hit] += rng.choice([-300.0, 300.0], size=hit.sum())
    pixels = Pixels(xx.astype(float), yy.astype(float), v, np.ones_like(v))
    vmap = tr.read_velocity_map((clean, fields["header"]))
    geometry = {k: truth[k] for k in ("x_center", "y_center", "v_systemic", "position_angle", "inclination")}
    edges = np.arange(0.0, 80.0, 4.0)
    capped = screen(pixels, vmap.sky_jacobian, geometry, edges, level=5.0, share=0.05, with_errors=False)
    assert not capped.applied and capped.count == 0 and capped.share > 0.05
    assert "none were left out" in screen_cautions(capped)[0]
    allowed = screen(pixels, vmap.sky_jacobian, geometry, edges, level=5.0, share=0.2, with_errors=False)
    assert allowed.applied and (allowed.left_out & hit).sum() >= 0.95 * hit[np.isfinite(allowed.score)].sum()


def test_a_few_mild_pixels_that_do_not_steer_the_fit_are_kept(fields):
    """Five isolated pixels at +30 km/s (about 7 robust sigma at 4 km/s noise) hold about 2 % of the cost, under the
    quarter that would make them steer the fit: none is left out, and the record says why."""
    clean = fields["clean"]
    yy, xx = np.nonzero(np.isfinite(clean))
    v = clean[yy, xx].copy()
    picked = np.flatnonzero((np.hypot(xx - 140.0, yy - 100.0) < 30) & (xx % 9 == 0) & (yy % 9 == 0))[:5]
    v[picked] += 30.0
    truth = fields["truth"]
    geometry = {k: truth[k] for k in ("x_center", "y_center", "v_systemic", "position_angle", "inclination")}
    vmap = tr.read_velocity_map((clean, fields["header"]))
    found = screen(Pixels(xx.astype(float), yy.astype(float), v, np.ones_like(v)), vmap.sky_jacobian, geometry,
                   np.arange(0.0, 92.0, 4.0), with_errors=False, beam_pixels=4.0)
    assert found.found >= 4 and found.count == 0 and found.cost_share < 0.25
    assert found.summary()["kept_because"] == "small_cost" and screen_cautions(found) == []


def _blob(clean, header, amplitude):
    """The clean field plus a round Gaussian patch of ``amplitude`` km/s, two beams wide (FWHM 8 pixels), at
    (140, 100) on the receding side; returns the pixels, the patch's core (above half its peak), and the map."""
    ny, nx = clean.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    patch = np.exp(-4 * np.log(2) * ((xx - 140.0) ** 2 + (yy - 100.0) ** 2) / 8.0**2)
    data = clean + amplitude * patch
    ok = np.isfinite(data)
    pixels = Pixels(xx[ok].astype(float), yy[ok].astype(float), data[ok], np.ones(ok.sum()))
    return pixels, patch[ok] > 0.5, tr.read_velocity_map((data, header))


def test_a_smooth_patch_is_kept_a_wild_one_is_not(fields):
    """A smooth departure over two beams (+40 km/s, ten times the noise: a streaming motion or a cloud) is kept;
    the same patch at +600 km/s, faster than the disc rotates (200 sin 60 = 173 km/s), is left out (a foreground
    object). Screen at the true geometry (tests/independent_fields.py), beam 4 pixels."""
    truth = fields["truth"]
    geometry = {k: truth[k] for k in ("x_center", "y_center", "v_systemic", "position_angle", "inclination")}
    edges = np.arange(0.0, 92.0, 4.0)
    for amplitude, left_out in ((40.0, False), (600.0, True)):
        pixels, core, vmap = _blob(fields["clean"], fields["header"], amplitude)
        found = screen(pixels, vmap.sky_jacobian, geometry, edges, with_errors=False, beam_pixels=4.0)
        assert found.applied
        if left_out:
            assert found.left_out[core].mean() > 0.95, found.left_out[core].mean()
        else:
            assert found.left_out[core].sum() == 0 and found.count <= 2, found.count


def test_mask_and_record_are_written(fits_of, tmp_path):
    """left_out.fits marks exactly the left-out pixels; fit.json carries the count and share."""
    from astropy.io import fits

    res = fits_of["wild"]
    out = res.write(tmp_path / "out")
    mask = fits.getdata(out / "left_out.fits")
    np.testing.assert_array_equal(mask.astype(bool), res.left_out)
    record = json.loads((out / "fit.json").read_text())
    assert record["outliers"]["n_left_out"] == int(res.left_out.sum())
    assert record["statistics"]["n_fitted_pixels"] == record["statistics"]["n_modelled_pixels"] - int(
        (res.left_out & np.isfinite(res.residual)).sum())
    assert record["options"]["outlier_screen"] is True


def test_turned_off_keeps_every_pixel(fits_of):
    res = fits_of["wild_off"]
    assert res.left_out is None and res.diagnostics["outliers"]["screened"] is False
    assert res.statistics()["n_fitted_pixels"] == res.statistics()["n_modelled_pixels"]


def test_ngc4047_residuals_and_inclination_improve(reference_data, quiet):
    """NGC 4047, native EDGE-CALIFA H-alpha map with its error map, beam 2.5 arcsec (seeing, from the survey's
    SOURCE.md), no S/N mask: about 1 % wild pixels at the map's edge. Left out, the rms over the fitted pixels
    drops by at least a third, the inclination error (resampled, the default 20 draws) halves, and the inclination does not move away from the
    photometric 42.1 deg (Levy et al. 2018)."""
    from astropy.io import fits

    folder = reference_data / "edge_califa_ngc4047" / "derived_fits"
    vel = fits.open(folder / "NGC4047_Ha_califa_vel.fits")[0]
    evel = fits.open(folder / "NGC4047_Ha_califa_evel.fits")[0]
    vmap = tr.read_velocity_map((vel.data.astype(float), vel.header), error=(evel.data.astype(float), evel.header),
                                beam="2.5")
    on, off = tr.fit_velocity_map(vmap), tr.fit_velocity_map(vmap, outlier_screen=False)
    share = on.diagnostics["outliers"]["share_left_out"]
    assert 0.003 < share < 0.03, share
    assert on.statistics()["residual_rms_fitted"] < 0.67 * off.statistics()["residual_rms"]

    def inclination_error(res):
        return float(np.nanmedian(res.rings["inclination_err"].value))

    assert inclination_error(on) < 0.5 * inclination_error(off)
    assert abs(on.geometry()["inclination"] - 42.1) <= abs(off.geometry()["inclination"] - 42.1) + 0.1
    assert _angle_gap(on.geometry()["position_angle"], 284.0) < 2.0  # published kinematic PA 284 (CO)
