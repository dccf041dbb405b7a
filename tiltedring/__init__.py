"""tiltedring: tilted-ring kinematic modelling of disc-galaxy velocity maps.

Read a moment-1 map, fit it ring by ring, get the ring table, model and residual maps::

    import tiltedring as tr
    vmap = tr.read_velocity_map("galaxy_velocity.fits", intensity="galaxy_intensity.fits")
    result = tr.fit_velocity_map(vmap, ring_width="0.5beam")
    result.rings            # astropy QTable, one row per ring
    result.write("galaxy_fit")

or run the whole job (read, bin, fit, curve, gas, report, write) as the command line does::

    outcome = tr.run_job(tr.Job.from_values("galaxy_velocity.fits", {"distance": 9.5}), "galaxy_fit")

Heavy parts are imported on first use so that ``import tiltedring`` stays quick.
"""

from importlib import import_module

__version__ = "0.1.0"

_EXPORTS = {
    "VelocityMap": "io.maps", "Beam": "io.maps", "read_velocity_map": "io.maps",
    "RingLayout": "fitting.rings", "FitOptions": "pipeline", "fit_velocity_map": "pipeline",
    "LineCube": "io.cube", "read_cube": "io.cube", "VelocityMaps": "io.velocity_fields",
    "make_velocity_maps": "io.velocity_fields",
    "FitResult": "products.result", "InputError": "errors", "FitCaution": "errors",
    "ResultNotPhysical": "errors", "Job": "jobs", "run_job": "jobs",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name):
    if name in _EXPORTS:
        return getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
    raise AttributeError(f"module 'tiltedring' has no attribute {name!r}")


def __dir__():
    return __all__
