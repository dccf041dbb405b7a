"""The vocabulary of ring flags (the ``flags`` column of the ring table).

A flag never removes a ring: the ring stays in the table and the flag says why its numbers need
care. ``flags`` holds the flag names of a ring joined by ``,`` (empty when none).

The vocabulary is the fixed flags of the ring fit and the geometry below, the flag of each
registered flow model (:mod:`.flow_models`, in registration order), ``radial_or_bisymmetric``
(:mod:`.flows`) and ``strong_harmonics``.
"""

__all__ = ["RING_FLAGS", "HARMONIC_FLAGS", "vocabulary", "join", "split"]

RING_FLAGS = {
    "few_pixels": "fewer pixels than a few independent beams' worth: the ring's values rest on little data",
    "poor_coverage": "pixels cover less than half of the usable azimuth: geometry and speed are poorly tied down",
    "fit_failed": "the least-squares fit did not converge or had too few pixels; fitted values are blank",
    "low_inclination": "inclination below the low-inclination limit: v_rotation and inclination are degenerate, "
                       "only v_rotation sin i is well measured; v_rotation errors are widened",
    "inside_beam": "ring centre within one beam of the kinematic centre: beam smearing biases v_rotation low",
    "ill_conditioned": "the ring's fit is ill-conditioned (inclination outside 0-90 deg, or a v_rotation error larger "
                       "than the speed and 100 km/s): its values are not measurements and are not plotted",
    "asymmetric": "approaching and receding halves' rotation speeds differ by more than 3 times their combined "
                  "error and by more than 10 km/s (a lopsided disc, or streaming on one side)",
    "warp": "beyond the warp onset: position angle and inclination follow the warp profile",
}

HARMONIC_FLAGS = {
    "radial_or_bisymmetric": "a radial flow with the major axis turned explains the ring as well as a bisymmetric "
                             "(bar-like) flow: non-circular, of a kind the map at this geometry cannot tell; refit "
                             "with v_radial free (--fit-radial) to tell them apart",
    "strong_harmonics": "significant non-circular harmonics (orders 1-3) in the ring's velocities",
}


def vocabulary() -> dict:
    """Every flag name with its one-line meaning, in the order flags are written."""
    from .flow_models import flow_models

    out = dict(RING_FLAGS)
    out.update({m.flag: m.flag_meaning for m in flow_models() if m.flag is not None})
    out.update(HARMONIC_FLAGS)
    return out


def join(names) -> str:
    """Flags in vocabulary order, comma-joined."""
    chosen = set(names)
    known = vocabulary()
    unknown = chosen - known.keys()
    if unknown:
        raise ValueError(f"unknown flag(s) {sorted(unknown)}")
    return ",".join(name for name in known if name in chosen)


def split(text: str) -> list:
    return [t for t in str(text).split(",") if t]
