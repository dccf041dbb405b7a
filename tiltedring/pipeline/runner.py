"""The step runner: the staged fit as a list of named steps, each timed.

A :class:`Step` is a name, a function of the :class:`.state.FitState` returning
:class:`.state.Additions`, and optionally a condition; :func:`run_steps` runs them in order, writes
what each adds into the state and records its wall time under its name (``FitResult.timings``).
:data:`STEPS` is the fit: change the strategy here, a step in its own module.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

from . import beam, cautions, diagnosis, errors_budget, outliers, steps
from .inputs import prepare_inputs
from .state import FitState

__all__ = ["Step", "STEPS", "run_steps", "fit_once"]


@dataclass(frozen=True)
class Step:
    """A named step; it runs only where ``when`` (if given) says so."""

    name: str
    run: Callable
    when: Callable | None = None


STEPS = (
    Step("first guess", steps.first_guess_step),
    Step("outliers", outliers.screen_outliers),
    Step("free rings", steps.free_rings),
    Step("centre", steps.centre),
    Step("centred rings", steps.centred_rings),
    Step("geometry decision", steps.geometry_decision),
    Step("final rings", steps.final_rings),
    Step("fit response", steps.fit_response, when=steps.response_wanted),
    Step("beam treatment", beam.beam_treatment, when=beam.beam_wanted),
    Step("ring table", steps.ring_table),
    Step("model maps", steps.model_maps),
    Step("errors", errors_budget.error_budget),
    Step("diagnostics", diagnosis.diagnostics),
    Step("cautions", cautions.finish),
)


def run_steps(state: FitState, plan=STEPS) -> dict:
    """Run the steps of ``plan`` on ``state`` in order; returns the wall seconds of each step that ran."""
    timings = {}
    for step in plan:
        start = time.perf_counter()
        if step.when is not None and not step.when(state):
            continue
        state.add(step.run(state))
        timings[step.name] = time.perf_counter() - start
    return timings


def fit_once(vmap, options):
    """One full staged fit with the given options; returns a :class:`.result.FitResult`."""
    from ..products.result import FitResult

    state = FitState(prepare_inputs(vmap, options))
    timings = run_steps(state)
    layout = state.layout
    stages = {"free": state.free_rings.table(vmap, layout), "centred": state.centred_rings.table(vmap, layout),
              "final": state.table}
    return FitResult(vmap=vmap, options=options, layout=layout, first_guess=state.guess, stages=stages,
                     rings=state.table, model=state.model, residual=state.residual,
                     cautions=list(state.inputs.notes) + state.cautions, diagnostics=state.summaries, timings=timings,
                     left_out=state.left_out_map() if state.outliers is not None else None)
