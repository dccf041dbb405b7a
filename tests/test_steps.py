"""The staged fit as named steps: what the runner guarantees (the numbers themselves are checked by the
recovery tests in test_pipeline.py against the known truth of the fields)."""

import numpy as np
import pytest

import tiltedring as tr
from tiltedring.pipeline.runner import STEPS, run_steps
from tiltedring.pipeline.state import Additions, FitState
from tiltedring.synthetic import DiscTruth, make_field


def test_a_step_cannot_replace_what_another_added():
    state = FitState(inputs=None)
    state.add(Additions(fields={"guess": {"v_flat": 100.0}}))
    with pytest.raises(AttributeError, match="replaced 'guess'"):
        state.add(Additions(fields={"guess": {"v_flat": 120.0}}))
    with pytest.raises(AttributeError, match="does not have"):
        state.add(Additions(fields={"speed_of_light": 3e5}))


def test_only_the_steps_whose_condition_holds_run(quiet):
    """No beam correction and no resampling asked for: neither the fit response nor the beam treatment runs,
    every other step does, in order, and each is timed once."""
    field = make_field(DiscTruth(position_angle=70.0, inclination=55.0), noise=3.0, seed=9)
    vmap = tr.read_velocity_map(field.velocity_hdu)
    res = tr.fit_velocity_map(vmap, beam_correction=False, resamples=0)
    expected = [s.name for s in STEPS if s.name not in ("fit response", "beam treatment")]
    assert list(res.timings) == expected
    assert all(seconds >= 0 for seconds in res.timings.values())
    assert "beam_smearing" not in res.diagnostics and "v_rotation_smeared" not in res.rings.colnames
    assert res.stages["final"] is res.rings and res.rings.colnames[-1] == "flags"


def test_a_step_can_be_replaced_in_the_plan(quiet):
    """The beam treatment is one step: a plan without it fits the same rings as the option that turns it off."""
    from tiltedring.pipeline.inputs import prepare_inputs
    from tiltedring.pipeline.options import FitOptions

    field = make_field(DiscTruth(position_angle=200.0, inclination=60.0), noise=3.0, seed=10)
    vmap = tr.read_velocity_map(field.velocity_hdu)
    options = FitOptions(resamples=0, diagnostics=False)
    state = FitState(prepare_inputs(vmap, options))
    timings = run_steps(state, [s for s in STEPS if s.name not in ("fit response", "beam treatment")])
    assert "beam treatment" not in timings
    plain = tr.fit_velocity_map(vmap, resamples=0, diagnostics=False, beam_correction=False)
    np.testing.assert_array_equal(state.table["v_rotation"].value, plain.rings["v_rotation"].value)
