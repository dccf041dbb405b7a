"""What the steps of the staged fit read and add: the inputs, one stage's ring fits, and the state.

Each step (:mod:`.steps`, :mod:`.beam`, :mod:`.errors_budget`, :mod:`.diagnosis`, :mod:`.cautions`)
reads a :class:`FitState` and returns :class:`Additions`; only the runner (:mod:`.runner`) writes
them into the state, and a field, once set, is never replaced. So what a step may depend on is
exactly what earlier steps added.
"""

from __future__ import annotations

from dataclasses import dataclass, field
import numpy as np

from ..fitting.parameters import COUNT, Parameter, vector

__all__ = ["FitInputs", "StartValues", "StageResult", "Centre", "GeometryDecision", "Additions", "FitState",
           "TRUSTED_AGAINST"]

#: flags that make a ring's fit unfit to inform other rings (the centre, the geometry decision)
TRUSTED_AGAINST = frozenset({"fit_failed", "few_pixels", "poor_coverage"})


@dataclass(frozen=True)
class FitInputs:
    """What every step may read: the map, the options and what follows from them before any fitting.

    ``pixels``: the valid pixels (:class:`.candidates.Pixels`); ``initial``: the user's starting values
    (centre in pixels); ``free``: the parameters fitted in stage ``free``; ``min_pixels``: a ring with
    fewer is flagged ``few_pixels``; ``notes``: cautions known before fitting.
    """

    vmap: object
    options: object
    pixels: object
    initial: dict
    fixed: frozenset
    free: np.ndarray
    min_pixels: int
    notes: tuple


@dataclass(frozen=True)
class StartValues:
    """Starting values from the first guess: one value per parameter name, and v_rotation per ring."""

    geometry: dict
    v_rotation: np.ndarray

    def rows(self, values: dict | None = None, v_rotation=None) -> np.ndarray:
        """(n_rings, 7) starting parameters: ``values`` by name (default the first guess's), v_rotation per ring."""
        out = np.tile(vector(self.geometry if values is None else values), (len(self.v_rotation), 1))
        out[:, Parameter.v_rotation] = self.v_rotation if v_rotation is None else v_rotation
        return out


@dataclass
class StageResult:
    """One stage of ring fits: each ring's :class:`.engine.RingSolution`, its flags, the starting
    parameters and the mask of parameters fitted."""

    solutions: list
    flags: list
    starts: np.ndarray
    free: np.ndarray

    @property
    def params(self) -> np.ndarray:
        """(n_rings, 7) fitted parameters (a new array each time: changing it leaves the solutions alone)."""
        return np.array([s.params for s in self.solutions]).reshape(-1, COUNT)

    @property
    def errors(self) -> np.ndarray:
        """(n_rings, 7) errors of the fitted parameters (NaN where held)."""
        return np.array([s.errors for s in self.solutions]).reshape(-1, COUNT)

    @property
    def converged(self) -> np.ndarray:
        return np.array([s.converged for s in self.solutions], bool)

    @property
    def usable(self) -> np.ndarray:
        """Rings whose fit converged and carries none of :data:`TRUSTED_AGAINST`."""
        return np.array([s.converged and not (TRUSTED_AGAINST & f) for s, f in zip(self.solutions, self.flags)], bool)

    def table(self, vmap, layout):
        """The stage's ring table (:func:`.products.result.stage_table`)."""
        from ..products.result import stage_table

        return stage_table(vmap, layout, self.solutions, self.flags)


@dataclass(frozen=True)
class Centre:
    """The disc's centre and systemic velocity (values by name, with every other starting value), their
    errors from the global fit, and the rings of stage ``free`` they rest on."""

    values: dict
    errors: dict
    rings_used: np.ndarray


@dataclass(frozen=True)
class GeometryDecision:
    """The geometry the final rings are fitted at: per name, (values per ring, errors per ring), with the
    warp test (:class:`.warp.GeometryProfile`) and its summary."""

    adopted: dict
    profile: object
    summary: dict

    @property
    def warped(self) -> bool:
        return bool(self.summary.get("detected"))


@dataclass
class Additions:
    """What a step adds: new state ``fields``, ring-table ``columns`` (added, or replaced in place), extra
    ``flags`` per ring, entries of the fit's ``summaries`` and ``cautions``."""

    fields: dict = field(default_factory=dict)
    columns: dict = field(default_factory=dict)
    flags: list | None = None
    summaries: dict = field(default_factory=dict)
    cautions: list = field(default_factory=list)


@dataclass
class FitState:
    """Everything the steps have added so far (``None``: not yet, or a step that did not run)."""

    inputs: FitInputs
    guess: dict | None = None
    layout: object = None
    start: StartValues | None = None
    outliers: object = None  # the outlier screen (.outliers.OutlierScreen): pixels left out of every later step
    free_rings: StageResult | None = None
    centre: Centre | None = None
    centred_rings: StageResult | None = None
    geometry: GeometryDecision | None = None
    final_rings: StageResult | None = None
    sides: dict | None = None
    response: object = None
    beam: object = None
    beam_bias: object = None  # per ring, the smearing bias the uncorrected curve keeps when the correction fell back
    table: object = None
    flags: list | None = None
    model: np.ndarray | None = None
    residual: np.ndarray | None = None
    summaries: dict = field(default_factory=dict)
    cautions: list = field(default_factory=list)

    @property
    def vmap(self):
        return self.inputs.vmap

    @property
    def options(self):
        return self.inputs.options

    @property
    def pixels(self):
        """The pixels the ring fits use: the valid pixels less those the outlier screen left out."""
        screen = self.outliers
        if screen is None or not screen.left_out.any():
            return self.inputs.pixels
        keep = ~screen.left_out
        return type(self.inputs.pixels)(*(np.asarray(a)[keep] for a in self.inputs.pixels))

    @property
    def fitted_residual(self):
        """The residual map with the pixels the outlier screen left out blanked (NaN): the noise the fit saw."""
        screen = self.outliers
        if self.residual is None or screen is None or not screen.left_out.any():
            return self.residual
        return np.where(self.left_out_map(), np.nan, self.residual)

    def left_out_map(self) -> np.ndarray:
        """Boolean map of the pixels the outlier screen left out (all False when none)."""
        out = np.zeros(self.vmap.shape, bool)
        screen = self.outliers
        if screen is not None and screen.left_out.any():
            px = self.inputs.pixels
            at = screen.left_out
            out[px.y[at].astype(int), px.x[at].astype(int)] = True
        return out

    def add(self, additions: Additions) -> None:
        """Write a step's additions (the runner's job; a field already set is never replaced)."""
        for name, value in additions.fields.items():
            if name not in self.__dataclass_fields__ or name in ("inputs", "summaries", "cautions"):
                raise AttributeError(f"a step added {name!r}, which the fit state does not have")
            if getattr(self, name) is not None:
                raise AttributeError(f"a step replaced {name!r}, which an earlier step had set")
            setattr(self, name, value)
        for name, values in additions.columns.items():
            self.table[name] = values
        if additions.flags is not None:
            self.flags = [set(have) | set(extra) for have, extra in zip(self.flags, additions.flags)]
        self.summaries.update(additions.summaries)
        self.cautions.extend(additions.cautions)
