"""A flow model and a halo defined here alone, registered through the public API, and found by every
part of the tool: fitting, the ring and parameters tables, the flag vocabulary and the command line.

The flow model is an m = 1 (lopsided) flow in the disc plane, which on the sky adds the second-order
harmonics (Schoenmakers, Franx & de Zeeuw 1997, MNRAS 292, 349: an m-fold perturbation appears in
orders m - 1 and m + 1). The halo is a Hernquist (1990, ApJ 356, 359) sphere, M(<r) = M r^2 / (r + a)^2,
checked against galpy's HernquistPotential. Both are unregistered when each test ends (fixtures).
"""

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.table import QTable, Table

import tiltedring as tr
from tiltedring.diagnostics import flags
from tiltedring.diagnostics.diagnose import flow_columns
from tiltedring.diagnostics.flow_models import (
    FlowModel,
    flow_model,
    flow_models,
    register_flow_model,
    unregister_flow_model,
)
from tiltedring.errors import InputError
from tiltedring.massmodel import (
    Baryons,
    CurveData,
    ExponentialDisc,
    Halo,
    HaloParameter,
    MassModelSettings,
    fit_mass_model,
    model_names,
    register_halo,
    unregister_halo,
    write_results,
)
from tiltedring.synthetic import DiscTruth, make_field

KM_S = u.km / u.s


class Lopsided(FlowModel):
    """v_los = v_0 + sin i [v_t cos(theta) + v_lopsided_cos cos(2 theta) + v_lopsided_sin sin(2 theta)]."""

    name = "lopsided"
    n_parameters = 4
    columns = {"v_lopsided_cos": KM_S, "v_lopsided_sin": KM_S}
    flag = "lopsided_flow"
    flag_meaning = "an m = 1 (lopsided) flow fits the ring much better (BIC) with a significant amplitude"
    amplitude_meaning = "sqrt(v_lopsided_cos^2 + v_lopsided_sin^2)"

    def own_columns(self, ring, state):
        c, s = ring.cos_t, ring.sin_t
        return [ring.sin_i * (c * c - s * s), ring.sin_i * 2.0 * s * c]

    def amplitude(self, values):
        return (np.hypot(values["v_lopsided_cos"], values["v_lopsided_sin"]),
                np.hypot(values["v_lopsided_cos_err"], values["v_lopsided_sin_err"]))


class HernquistHalo(Halo):
    name = "Hernquist halo"
    parameters = (HaloParameter("mass", u.Msun, 11.0, (8.0, 14.0), description="total mass"),
                  HaloParameter("scale", u.kpc, 1.0, (-1.0, 2.5), description="scale radius"))

    def _enclosed_mass(self, r):
        return self.mass * r**2 / (r + self.scale) ** 2


@pytest.fixture
def lopsided():
    register_flow_model(Lopsided)
    try:
        yield flow_model("lopsided")
    finally:
        unregister_flow_model("lopsided")


@pytest.fixture
def hernquist():
    register_halo("hernquist", HernquistHalo)
    try:
        yield HernquistHalo
    finally:
        unregister_halo("hernquist")


def _lopsided_field(amplitude_cos=15.0, amplitude_sin=-10.0, radius=50.0):
    """An invented disc with the lopsided flow added inside ``radius`` arcsec. The disc azimuth of each
    pixel comes from astropy (WCS, SkyCoord separation and position angle), not from the project."""
    truth = DiscTruth(name="Tarrow Disc", position_angle=40.0, inclination=60.0)
    field = make_field(truth, beam_fwhm=4.0, noise=2.0, seed=3)
    hdu = field.velocity_hdu.copy()
    ny, nx = hdu.data.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    sky = field.velocity_map.wcs.pixel_to_world(xx, yy)
    centre = field.velocity_map.wcs.pixel_to_world(truth.x_center, truth.y_center)
    sep = centre.separation(sky).arcsec
    offset = np.radians(centre.position_angle(sky).deg - truth.position_angle)
    along, across = sep * np.cos(offset), sep * np.sin(offset) / np.cos(np.radians(truth.inclination))
    theta, r_disc = np.arctan2(across, along), np.hypot(along, across)
    sin_i = np.sin(np.radians(truth.inclination))
    flow = sin_i * (amplitude_cos * np.cos(2 * theta) + amplitude_sin * np.sin(2 * theta))
    hdu.data = (hdu.data + np.where(r_disc < radius, flow, 0.0)).astype(np.float32)
    return hdu, truth


def test_new_flow_model_is_fitted_flagged_and_tabled(lopsided, tmp_path, quiet):
    """Injected v_lopsided_cos = 15, v_lopsided_sin = -10 km/s inside 50 arcsec (geometry held at the truth,
    so the ring fit cannot absorb the pattern; 4-arcsec beam, 8-arcsec rings, so a ring holds some 30 beams).
    Targets: the model chosen and its flag raised on the rings from 16 to 45 arcsec, recovered within 3 km/s
    there; neither beyond 65 arcsec; its columns (with units), its flag and its meaning in the ring table
    and fit.json."""
    hdu, truth = _lopsided_field()
    held = ("x_center", "y_center", "v_systemic", "position_angle", "inclination")
    result = tr.fit_velocity_map(tr.read_velocity_map(hdu), ring_width=8.0, resamples=0, beam_correction=False,
                                 fixed=held, initial={name: getattr(truth, name) for name in held})
    rings = result.rings
    for name in ("v_t_lopsided", "v_lopsided_cos", "v_lopsided_cos_err", "v_lopsided_sin", "v_lopsided_sin_err"):
        assert rings[name].unit == KM_S, name
    assert "delta_bic_lopsided" in rings.colnames
    assert rings.colnames.index("v_t_lopsided") == rings.colnames.index("v_t_bisymmetric") + 1
    r = rings["radius"].value
    inside = (r > 16.0) & (r < 45.0)
    outside = r > 65.0
    chosen = np.array([m == "lopsided" for m in rings["flow_model"]])
    flagged = np.array(["lopsided_flow" in f for f in rings["flags"]])
    assert inside.sum() >= 3 and outside.sum() >= 5
    assert chosen[inside].all() and flagged[inside].all()
    assert not flagged[outside].any() and not chosen[outside].any()
    np.testing.assert_allclose(rings["v_lopsided_cos"].value[inside], 15.0, atol=3.0)
    np.testing.assert_allclose(rings["v_lopsided_sin"].value[inside], -10.0, atol=3.0)
    summary = result.diagnostics["non_circular"]
    assert summary["kinds"][0] == "lopsided"
    assert summary["amplitude_meaning"].startswith("in the disc plane, km/s: sqrt(v_lopsided_cos^2")
    assert "lopsided" in summary["disc_model_bic"]

    result.write(tmp_path / "fit")
    written = Table.read(tmp_path / "fit" / "rings.ecsv")
    assert written["v_lopsided_cos"].unit == KM_S
    record = json.loads((tmp_path / "fit" / "fit.json").read_text())
    assert record["flag_vocabulary"]["lopsided_flow"] == Lopsided.flag_meaning


def test_flag_vocabulary_and_columns_follow_the_registry(lopsided):
    vocabulary = list(flags.vocabulary())
    assert vocabulary.index("lopsided_flow") == vocabulary.index("bisymmetric_flow") + 1
    assert vocabulary[-1] == "strong_harmonics"
    assert flags.join(["strong_harmonics", "lopsided_flow", "warp"]) == "warp,lopsided_flow,strong_harmonics"
    assert flow_columns()["v_lopsided_sin_err"] == KM_S
    unregister_flow_model("lopsided")
    try:
        assert "lopsided_flow" not in flags.vocabulary()
        assert "v_lopsided_sin" not in flow_columns()
        with pytest.raises(ValueError, match="unknown flag"):
            flags.join(["lopsided_flow"])
    finally:
        register_flow_model(Lopsided)


def test_flow_registry_refuses_clashes():
    class TakenFlag(Lopsided):
        name = "other"
        flag = "radial_flow"

    class TakenColumn(Lopsided):
        name = "other"
        flag = "other_flow"
        columns = {"v_2t": KM_S}

    for model in (TakenFlag, TakenColumn):
        with pytest.raises(ValueError):
            register_flow_model(model)
    with pytest.raises(ValueError, match="built-in"):
        unregister_flow_model("radial")
    assert [m.name for m in flow_models()] == ["circular", "radial", "bisymmetric"]


def test_new_halo_against_galpy(hernquist):
    """Hernquist circular speed against galpy's HernquistPotential (amp = 2 M: galpy's normalisation puts
    amp / 2 in the total mass)."""
    galpy_potential = pytest.importorskip("galpy.potential", reason="galpy (test-only reference) is not installed")
    halo = HernquistHalo(3e11, 12.0)
    pot = galpy_potential.HernquistPotential(amp=2 * 3e11 * u.Msun, a=12.0 * u.kpc, ro=8.0, vo=220.0)
    radii = np.linspace(0.5, 40.0, 30)
    expected = np.array([pot.vcirc(r * u.kpc, quantity=True).to_value(KM_S) for r in radii])
    np.testing.assert_allclose(halo.v_circ(radii), expected, rtol=2e-3)


def _hernquist_curve(seed=5, mass=2e11, scale=8.0, noise=3.0):
    rng = np.random.default_rng(seed)
    radius = np.linspace(1.0, 30.0, 30)
    disc = ExponentialDisc(1e10, 2.5)
    v = np.sqrt(0.5 * disc.v_squared(radius) + HernquistHalo(mass, scale).v_squared(radius))
    return CurveData(radius, v + noise * rng.standard_normal(radius.size), np.full(radius.size, noise)), disc


def test_new_halo_is_fitted_and_tabled(hernquist, tmp_path):
    """Recovery: a disc (M/L 0.5, held) plus a Hernquist halo of 2e11 M_sun and 8 kpc with 3 km/s noise;
    the fit finds both within three of its errors, and parameters.ecsv lists them with their units."""
    assert "hernquist" in model_names() and model_names()[-2:] == ("mond", "none")
    data, disc = _hernquist_curve()
    result = fit_mass_model(data, Baryons(disc=disc), MassModelSettings(model="hernquist", ml_mode="fixed"))
    for name, truth in (("log10_mass", np.log10(2e11)), ("log10_scale", np.log10(8.0))):
        assert abs(result.parameters[name] - truth) < 3 * result.errors[name], name
    assert result.derived["m200"] > 0 and result.reduced_chi2 < 2.0
    write_results(tmp_path / "mass", {"hernquist": result}, data)
    table = Table.read(tmp_path / "mass" / "parameters.ecsv")
    rows = {row["parameter"]: row for row in table if row["model"] == "hernquist"}
    assert rows["log10_mass"]["unit"] == "solMass" and rows["log10_scale"]["unit"] == "kpc"
    assert rows["log10_mass"]["status"] == "free"


def test_new_halo_held_parameter(hernquist):
    data, disc = _hernquist_curve()
    result = fit_mass_model(data, Baryons(disc=disc),
                            MassModelSettings(model="hernquist", ml_mode="fixed", hold={"scale": 8.0}))
    assert "log10_scale" not in result.parameters
    assert result.fixed["log10_scale"] == pytest.approx(np.log10(8.0))
    with pytest.raises(InputError, match="no parameter"):
        MassModelSettings(model="hernquist", hold={"alpha": 0.2})


def test_new_halo_on_the_command_line(hernquist, tmp_path, capsys):
    from tiltedring.cli import main

    with pytest.raises(SystemExit):
        main(["massmodel", "--help"])
    assert "hernquist" in capsys.readouterr().out
    data, _ = _hernquist_curve()
    curve = QTable({"radius_kpc": data.radius * u.kpc, "v_rotation": data.v * KM_S, "v_rotation_err": data.v_err * KM_S})
    curve.write(tmp_path / "curve.ecsv", format="ascii.ecsv")
    assert main(["massmodel", str(tmp_path / "curve.ecsv"), "--models", "hernquist,nfw", "--out",
                 str(tmp_path / "mass"), "-q"]) == 0
    record = json.loads((tmp_path / "mass" / "massmodel.json").read_text())
    assert set(record["models"]) == {"hernquist", "nfw"}
    assert set(record["models"]["hernquist"]["parameters"]) == {"log10_mass", "log10_scale"}


def test_halo_registry_refuses_clashes_and_forgets():
    class OutOfBounds(HernquistHalo):
        parameters = (HaloParameter("mass", u.Msun, 20.0, (8.0, 14.0)),)

    class ReusesName(HernquistHalo):
        parameters = (HaloParameter("inclination", u.deg, 50.0, (5.0, 89.0), log10=False),)

    with pytest.raises(ValueError, match="already exists"):
        register_halo("nfw", HernquistHalo)
    for bad in (OutOfBounds, ReusesName):
        with pytest.raises(ValueError):
            register_halo("bad", bad)
    with pytest.raises(ValueError, match="lower-case"):
        register_halo("Bad Name", HernquistHalo)
    with pytest.raises(ValueError, match="built-in"):
        unregister_halo("burkert")
    register_halo("hernquist", HernquistHalo)
    unregister_halo("hernquist")
    assert "hernquist" not in model_names()
    with pytest.raises(InputError, match="unknown model"):
        MassModelSettings(model="hernquist")
