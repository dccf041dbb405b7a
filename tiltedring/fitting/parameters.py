"""The parameters of a ring, by name and unit, in one place.

A ring is described by seven numbers (Begeman 1989): the centre (``x_center``, ``y_center``, in
0-based pixels), ``v_systemic``, ``position_angle`` of the receding major axis and
``inclination`` (deg), and the speeds ``v_rotation`` and ``v_radial`` (km/s). Parameter vectors,
Jacobian columns, free masks and the (n_rings, 7) tables of the ring fit hold them in the order
of :class:`Parameter`; every module addresses them through its members and the groups below,
never by bare position.

Numba kernels read the members and the groups as compile-time constants. Their on-disk caches do
not notice a change of this module, so the order must never change (a new parameter goes last,
and the caches are then cleared). The module imports no numerics, so the command line can take
the parameter names from here cheaply.
"""

from __future__ import annotations

from enum import IntEnum
from typing import NamedTuple

__all__ = ["Parameter", "PARAMETERS", "UNITS", "COUNT", "CENTRE", "CENTRE_AND_SYSTEMIC", "ORIENTATION",
           "GEOMETRY", "SPEEDS", "LINEAR", "mask", "vector", "ParameterColumns", "GuessParameter"]


class Parameter(IntEnum):
    """Position of each ring parameter in a parameter vector (and the column name of the ring table)."""

    x_center = 0
    y_center = 1
    v_systemic = 2
    position_angle = 3
    inclination = 4
    v_rotation = 5
    v_radial = 6

    @property
    def unit(self) -> str:
        """The parameter's unit as an astropy unit string."""
        return UNITS[self.name]


PARAMETERS = tuple(p.name for p in Parameter)
COUNT = len(Parameter)
UNITS = {"x_center": "pix", "y_center": "pix", "v_systemic": "km/s", "position_angle": "deg",
         "inclination": "deg", "v_rotation": "km/s", "v_radial": "km/s"}

#: the kinematic centre on the sky
CENTRE = (Parameter.x_center, Parameter.y_center)
#: what the ``centre`` step settles and stage ``centred`` holds
CENTRE_AND_SYSTEMIC = (Parameter.x_center, Parameter.y_center, Parameter.v_systemic)
#: the orientation of the ring's plane (regularised across rings before stage ``final``)
ORIENTATION = (Parameter.position_angle, Parameter.inclination)
#: what decides which pixels belong to a ring
GEOMETRY = (Parameter.x_center, Parameter.y_center, Parameter.position_angle, Parameter.inclination)
#: the speeds in the disc plane
SPEEDS = (Parameter.v_rotation, Parameter.v_radial)
#: the parameters v_los is linear in (refitted alone when the geometry is held)
LINEAR = (Parameter.v_systemic, Parameter.v_rotation, Parameter.v_radial)


def mask(members):
    """Boolean vector over the parameters, True at ``members`` (members or names)."""
    import numpy as np

    out = np.zeros(COUNT, bool)
    for member in members:
        out[Parameter[member] if isinstance(member, str) else member] = True
    return out


def vector(values: dict, default: float = 0.0):
    """Parameter vector (a numpy array) from a dict by name (missing names take ``default``)."""
    import numpy as np

    return np.array([float(values.get(p.name, default)) for p in Parameter])


#: one array per parameter, by name (the compiled model builders take their ring tables in this form)
ParameterColumns = NamedTuple("ParameterColumns", [(p.name, "numpy.ndarray") for p in Parameter])


class GuessParameter(IntEnum):
    """The whole-disc arctangent model of :mod:`.first_guess`: the geometry of a ring, then the curve's
    flat speed ``v_flat`` (km/s) and turnover radius ``r_turn`` (arcsec)."""

    x_center = Parameter.x_center
    y_center = Parameter.y_center
    v_systemic = Parameter.v_systemic
    position_angle = Parameter.position_angle
    inclination = Parameter.inclination
    v_flat = 5
    r_turn = 6
