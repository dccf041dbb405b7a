"""Figures leave the user's matplotlib session alone: no backend chosen, no rcParams changed, no pyplot.

Each check runs in a fresh interpreter (so nothing another test imported can hide a change): it
records matplotlib's backend and rcParams, imports tiltedring.products.plotting, makes every figure
of the tool and writes the report, then compares. Once with no backend chosen (the figures must not
choose one) and once with the user's choice of ``svg`` (it must stay).
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

SCRIPT = r"""
import json, sys, tempfile, warnings
import matplotlib

def backend():
    try:
        return matplotlib.get_backend(auto_select=False)  # matplotlib >= 3.10: None when not chosen yet
    except TypeError:
        return str(matplotlib.rcParams._get("backend"))

before_backend, before_params = backend(), matplotlib.rcParams.copy()
from matplotlib.figure import Figure

import tiltedring as tr
from tiltedring.massmodel import Baryons, CurveData, MassModelSettings, fit_mass_model
from tiltedring.products import plotting
from tiltedring.products.compare import compare_maps
from tiltedring.synthetic import DiscTruth, make_field

warnings.simplefilter("ignore")
field = make_field(DiscTruth(name="Fenwold Disc"), noise=2.0, seed=3)
result = tr.fit_velocity_map(field.velocity_map, resamples=0)
curve = result.curve(distance="10Mpc").table
mass = fit_mass_model(CurveData(curve["radius_kpc"].value, curve["v_rotation"].value,
                                curve["v_rotation_err"].value), Baryons(), MassModelSettings(model="nfw"))
comparison = compare_maps([(result.residual, field.velocity_map.wcs), (result.residual * 0.5, field.velocity_map.wcs)],
                          velocity_unit="km/s")
figures = [plotting.plot_map(result.residual, result, "residual"), plotting.plot_maps(result),
           plotting.plot_geometry(result), plotting.plot_rotation_curve(result), plotting.plot_major_axis_slice(result),
           plotting.plot_harmonics(result), plotting.plot_warp(result), plotting.plot_mass_model(mass),
           comparison.plot(), result.plot_curve()]
folder = tempfile.mkdtemp()
written = plotting.write_report(result, folder + "/report.pdf", png_folder=folder)
comparison.write(folder + "/comparison")
print(json.dumps({
    "backend_before": str(before_backend), "backend_after": str(backend()),
    "params_unchanged": matplotlib.rcParams.copy() == before_params,
    "pyplot_imported": "matplotlib.pyplot" in sys.modules,
    "all_figures": all(isinstance(f, Figure) for f in figures),
    "png": all(f._repr_png_().startswith(b"\x89PNG\r\n\x1a\n") for f in figures),
    "pdf": open(written[0], "rb").read(4) == b"%PDF", "files": len(written),
}))
"""


@pytest.mark.parametrize("user_backend", [None, "svg"])
def test_figures_leave_backend_and_rcparams_alone(user_backend, tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "MPLBACKEND"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT)] + [p for p in [os.environ.get("PYTHONPATH")] if p])
    env["MPLCONFIGDIR"] = str(tmp_path)  # no user matplotlibrc
    if user_backend:
        env["MPLBACKEND"] = user_backend
    run = subprocess.run([sys.executable, "-c", SCRIPT], capture_output=True, text=True, env=env, cwd=tmp_path,
                         timeout=600)
    assert run.returncode == 0, run.stderr[-3000:]
    out = json.loads(run.stdout.strip().splitlines()[-1])
    assert out["backend_after"] == out["backend_before"]
    if user_backend:
        assert out["backend_after"] == user_backend
    assert out["params_unchanged"]
    assert not out["pyplot_imported"]
    assert out["all_figures"] and out["png"]
    assert out["pdf"] and out["files"] == 5  # report.pdf and four report_*.png
