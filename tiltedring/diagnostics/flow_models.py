"""Flow models of a ring's line-of-sight velocities at fixed geometry, one class each, and their registry.

With theta the disc-plane azimuth and i the inclination (geometry held at the final values), every
model is v_los = v_0 + sin i [v_t cos(theta) + (terms of its own)]:

- ``circular``:     no further terms
- ``radial``:       + v_r sin(theta)
  (v_r > 0: the minor-axis half at position angle + 90 recedes; outflow if that half is the far
  side, inflow if it is the near side — which the velocity map alone does not tell)
- ``bisymmetric``:  - v_2t cos(2 theta_b) cos(theta) - v_2r sin(2 theta_b) sin(theta),
  theta_b = theta - phi_b (Spekkens & Sellwood 2007, ApJ 664, 204: an m = 2 bar-like flow with its
  own angle phi_b in the disc plane, measured from the receding major axis, and tangential/radial
  amplitudes). It is linear in its speeds for a given phi_b, so phi_b is found by a grid search
  (3 deg steps, parabolic refinement; each angle a 4 x 4 solve from precomputed normal equations) —
  per ring, and over a radial range with one common phi_b.

A model is one subclass of :class:`FlowModel`: its name, the number of fitted parameters (for the
BIC), its table columns with units, the flag it raises and the flag's meaning, how its amplitude in
the disc plane is measured, and the design-matrix columns of its own terms. Registering it
(:func:`register_flow_model`) is all it takes for :func:`.flows.fit_flows` to fit and select it,
for :func:`.diagnose.diagnose` to put its columns in the ring table, and for :mod:`.flags` to list
its flag. Models later in the registry are richer and preferred when several pass the test.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from astropy import units as u

from ..fitting.leastsq import weighted_least_squares

__all__ = ["FlowModel", "RingVelocities", "Circular", "Radial", "Bisymmetric", "register_flow_model",
           "unregister_flow_model", "flow_models", "flow_model"]

KM_S = u.km / u.s


@dataclass
class RingVelocities:
    """One ring's pixels at the fixed geometry: cos and sin of the disc azimuth, velocity, weight (1/sigma),
    sin i; ``states`` holds what each model worked out for the ring before fitting (:meth:`FlowModel.prepare`)."""

    cos_t: np.ndarray
    sin_t: np.ndarray
    v: np.ndarray
    weight: np.ndarray
    sin_i: float
    states: dict = field(default_factory=dict)

    def rotation_columns(self) -> list:
        """The columns every model shares: 1 (v_0) and sin i cos(theta) (v_t)."""
        return [np.ones_like(self.cos_t), self.sin_i * self.cos_t]


class FlowModel:
    """A flow model (module docstring). Subclasses declare the class attributes and supply
    :meth:`own_columns` and, when they raise a flag, :meth:`amplitude`.

    - ``name``: the value of the ``flow_model`` column and the suffix of ``v_t_<name>``
    - ``n_parameters``: fitted parameters, v_0 and v_t included (the k of the BIC)
    - ``columns``: ring-table columns of the model's own speeds, name -> astropy unit, in the order
      of the design-matrix columns after v_0 and v_t, each value followed by its ``_err`` column
      (``errors`` False: values only)
    - ``flag`` and ``flag_meaning``: the ring flag raised where the model is chosen (none for the
      circular baseline), and its one-line meaning for the flag vocabulary
    - ``amplitude_meaning``: how :meth:`amplitude` is measured (for ``fit.json``)
    - ``extras``: names of per-ring outputs of :func:`.flows.fit_flows` kept out of the table
      (:meth:`ring_extras`)
    - ``disc_keys``: names of the disc-wide results :meth:`finish` returns
    - ``notes``: constant explanations copied into the ``non_circular`` summary (sign conventions)
    """

    name: str = ""
    n_parameters: int = 2
    columns: dict = {}
    errors: bool = True
    flag: str | None = None
    flag_meaning: str = ""
    amplitude_meaning: str = ""
    extras: tuple = ()
    disc_keys: tuple = ()
    notes: dict = {}

    def table_columns(self) -> dict:
        """Every per-ring column of this model beyond ``v_t_<name>``, name -> unit."""
        out = {}
        for name, unit in self.columns.items():
            out[name] = unit
            if self.errors:
                out[f"{name}_err"] = unit
        return out

    def prepare(self, ring: RingVelocities):
        """What the model works out for a ring before the linear fit (e.g. a best angle); None by default."""
        return None

    def own_columns(self, ring: RingVelocities, state) -> list:
        """Design-matrix columns of the model's own speeds (beyond v_0 and v_t), one per entry of ``columns``."""
        return []

    def design(self, ring: RingVelocities, state=None) -> np.ndarray:
        return np.column_stack(ring.rotation_columns() + self.own_columns(ring, state))

    def fit(self, ring: RingVelocities, state=None):
        """Weighted least squares of the ring: (coefficients, covariance for unit weights, chi^2)."""
        return weighted_least_squares(self.design(ring, state), ring.v, ring.weight)

    def ring_values(self, coef, err, state) -> dict:
        """The ring's column values from the fit (``err``: coefficient errors already scaled)."""
        out = {}
        for j, name in enumerate(self.columns, start=2):
            out[name] = coef[j]
            if self.errors:
                out[f"{name}_err"] = err[j]
        return out

    def ring_extras(self, state) -> dict:
        """Per-ring outputs named in ``extras``, from the ring's state."""
        return {}

    def amplitude(self, values: dict):
        """(non-circular amplitude in the disc plane, its error) from the model's column values."""
        raise NotImplementedError(f"flow model {self.name!r} has no amplitude")

    def finish(self, fit) -> dict:
        """Disc-wide step after every ring has chosen its model (:class:`.flows.FlowFit`); returns the
        entries named in ``disc_keys``."""
        return {}


class Circular(FlowModel):
    """Pure rotation: the baseline every other model is compared with."""

    name = "circular"
    n_parameters = 2


class Radial(FlowModel):
    """Rotation plus a uniform radial speed in the ring."""

    name = "radial"
    n_parameters = 3
    columns = {"v_radial_flow": KM_S}
    flag = "radial_flow"
    flag_meaning = "a circular + radial flow model fits the ring much better (BIC) with a significant v_radial"
    amplitude_meaning = "|v_radial|"
    notes = {"radial_flow_sign": "v_radial_flow > 0: the minor-axis half at position_angle + 90 recedes; outflow if "
                                 "that half is the far side, inflow if it is the near side"}

    def own_columns(self, ring, state):
        return [ring.sin_i * ring.sin_t]

    def amplitude(self, values):
        return abs(values["v_radial_flow"]), values["v_radial_flow_err"]


_ANGLES = np.radians(np.arange(0.0, 180.0, 3.0))


class Bisymmetric(FlowModel):
    """Spekkens & Sellwood (2007) m = 2 flow with its own bar angle (module docstring)."""

    name = "bisymmetric"
    n_parameters = 5
    columns = {"v_2t": KM_S, "v_2r": KM_S}
    flag = "bisymmetric_flow"
    flag_meaning = "a bisymmetric (m=2, bar-like) flow fits the ring much better (BIC) with a significant amplitude"
    amplitude_meaning = "sqrt(v_2t^2 + v_2r^2)"
    extras = ("bar_angle_ring",)
    disc_keys = ("bar_angle", "bar_range")

    def prepare(self, ring):
        gram = _gram(ring)
        return gram, _best_angle(gram)

    def own_columns(self, ring, state):
        phi_b = state[1]
        theta_b2 = 2.0 * (np.arctan2(ring.sin_t, ring.cos_t) - phi_b)
        return [-ring.sin_i * np.cos(theta_b2) * ring.cos_t, -ring.sin_i * np.sin(theta_b2) * ring.sin_t]

    def ring_extras(self, state):
        return {"bar_angle_ring": np.degrees(state[1])}

    def amplitude(self, values):
        return np.hypot(values["v_2t"], values["v_2r"]), np.hypot(values["v_2t_err"], values["v_2r_err"])

    def finish(self, fit):
        """One bar angle over the bar's radial range (``bar_range``, or the rings that chose this model):
        the angle minimising the summed chi^2, and those rings refitted at it."""
        out = fit.out
        chosen = np.array([m == self.name for m in out["flow_model"]])
        bar_range = fit.options.get("bar_range")
        in_range = (fit.radii >= bar_range[0]) & (fit.radii <= bar_range[1]) if bar_range is not None else chosen
        ring_ids = [k for k in fit.rings if in_range[k]]
        if not ring_ids:
            return {"bar_angle": None, "bar_range": None}
        total = np.zeros(len(_ANGLES))
        for k in ring_ids:
            total += _chi2_at(fit.rings[k].states[self.name][0], _ANGLES)
        phi_common = _ANGLES[int(np.argmin(total))]
        for k in ring_ids:
            ring = fit.rings[k]
            coef, cov, _ = self.fit(ring, (None, phi_common))
            err = np.sqrt(np.clip(np.diag(cov) * out["noise_scale"][k] ** 2 * fit.pixels_per_beam, 0, None))
            out[f"v_t_{self.name}"][k] = coef[1]
            for name, value in self.ring_values(coef, err, None).items():
                out[name][k] = value
        return {"bar_angle": float(np.degrees(phi_common)),
                "bar_range": [float(fit.radii[ring_ids].min()), float(fit.radii[ring_ids].max())]}


def _gram(ring: RingVelocities):
    """Normal equations of the six-column basis that spans the bisymmetric model at every angle.

    With c = cos 2 phi_b, s = sin 2 phi_b: cos(2 theta_b) cos(theta) = c cos2t cost + s sin2t cost and
    sin(2 theta_b) sin(theta) = c sin2t sint - s cos2t sint, so for each angle the model's columns are
    fixed combinations (:func:`_combine`) of [1, cos t, cos2t cos t, sin2t cos t, sin2t sin t, cos2t sin t]
    (times sin i); chi^2 at any angle then costs a 4 x 4 solve.
    """
    cos_t, sin_t, sin_i, w = ring.cos_t, ring.sin_t, ring.sin_i, ring.weight
    c2 = cos_t**2 - sin_t**2
    s2 = 2 * sin_t * cos_t
    basis = np.column_stack([np.ones_like(cos_t), sin_i * cos_t, sin_i * c2 * cos_t, sin_i * s2 * cos_t,
                             sin_i * s2 * sin_t, sin_i * c2 * sin_t]) * w[:, None]
    vw = ring.v * w
    return basis.T @ basis, basis.T @ vw, float(vw @ vw)


def _combine(phi):
    """(len(phi), 6, 4) maps from the six-column basis to the bisymmetric model's columns at each angle."""
    phi = np.atleast_1d(phi)
    c, s = np.cos(2 * phi), np.sin(2 * phi)
    t = np.zeros((len(phi), 6, 4))
    t[:, 0, 0] = t[:, 1, 1] = 1.0
    t[:, 2, 2], t[:, 3, 2] = -c, -s
    t[:, 4, 3], t[:, 5, 3] = -c, s
    return t


def _chi2_at(gram, phi):
    """chi^2 of the bisymmetric model at each bar angle in ``phi`` (array), from :func:`_gram`."""
    g, h, vv = gram
    t = _combine(phi)
    g4 = np.einsum("aij,jk,akl->ail", t.transpose(0, 2, 1), g, t)
    h4 = np.einsum("aji,j->ai", t, h)
    try:
        coef = np.linalg.solve(g4, h4[..., None])[..., 0]
    except np.linalg.LinAlgError:
        coef = np.array([np.linalg.lstsq(a, b, rcond=None)[0] for a, b in zip(g4, h4)])
    return vv - np.einsum("ai,ai->a", coef, h4)


def _best_angle(gram):
    """phi_b minimising chi^2 of the bisymmetric model (grid, then a parabola through the minimum)."""
    chi = _chi2_at(gram, _ANGLES)
    j = int(np.argmin(chi))
    lo, hi = chi[j - 1], chi[(j + 1) % len(chi)]
    denom = lo - 2 * chi[j] + hi
    shift = 0.5 * (lo - hi) / denom if denom > 0 else 0.0
    return (_ANGLES[j] + shift * (_ANGLES[1] - _ANGLES[0])) % np.pi


# ---------------------------------------------------------------------------------------------- registry

_BUILT_IN = ("circular", "radial", "bisymmetric")
_REGISTRY: dict = {}
_RESERVED_COLUMNS = ("flow_model",)


def register_flow_model(model):
    """Add a flow model (a :class:`FlowModel` subclass or instance) after those already registered.

    Its name, flag and column names must be new (``ValueError`` otherwise). Returns what it was given,
    so it also works as a class decorator.
    """
    from .flags import vocabulary

    instance = model() if isinstance(model, type) else model
    if not isinstance(instance, FlowModel) or not instance.name:
        raise ValueError("a flow model is a FlowModel subclass with a name")
    if instance.name in _REGISTRY:
        raise ValueError(f"a flow model named {instance.name!r} is already registered")
    if instance.flag is not None and (instance.flag in vocabulary() or not instance.flag_meaning):
        raise ValueError(f"flag {instance.flag!r} of flow model {instance.name!r} is taken or has no meaning")
    if instance.flag is not None and not instance.amplitude_meaning:
        raise ValueError(f"flow model {instance.name!r} raises a flag but does not say what its amplitude is")
    taken = set(_RESERVED_COLUMNS) | {c for m in _REGISTRY.values() for c in _model_columns(m)}
    clash = taken & set(_model_columns(instance))
    if clash:
        raise ValueError(f"flow model {instance.name!r} would reuse the column(s) {sorted(clash)}")
    _REGISTRY[instance.name] = instance
    return model


def unregister_flow_model(name: str) -> None:
    """Remove a flow model registered with :func:`register_flow_model` (the built-in ones stay)."""
    if name in _BUILT_IN:
        raise ValueError(f"the built-in flow model {name!r} cannot be removed")
    if name not in _REGISTRY:
        raise ValueError(f"no flow model named {name!r} is registered")
    del _REGISTRY[name]


def flow_models() -> tuple:
    """The registered flow models, simplest first (the circular baseline is the first)."""
    return tuple(_REGISTRY.values())


def flow_model(name: str) -> FlowModel:
    return _REGISTRY[name]


def _model_columns(model) -> list:
    return [f"v_t_{model.name}", f"delta_bic_{model.name}", *model.table_columns()]


for _model in (Circular, Radial, Bisymmetric):
    register_flow_model(_model)
