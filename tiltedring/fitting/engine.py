"""One ring's weighted nonlinear least-squares fit (Begeman 1989).

For the pixels whose disc radius falls inside the ring, minimise::

    chi^2 = sum_k  w_k [v_k - v_los(p; x_k, y_k)]^2,    w_k = W(theta_k) / sigma_k^2

over any subset of the seven ring parameters, with the angular weight W = 1, |cos theta| or
cos^2 theta (Begeman 1989) and pixels within a gap of the given half-opening about the minor axis dropped.
The minimiser is Levenberg-Marquardt with the analytic derivatives of :mod:`.kinematics`, run as
compiled code (:mod:`.ring_solver`); this module is its interface. Pixel membership depends on the
geometry, so it is re-selected after each geometry update (at most ``geometry_updates`` times, until
the geometry moves by less than 0.02 or a tenth of its error), never inside the minimiser's
iterations. With the position angle held, a negative v_rotation is kept as measured; with it free,
the position angle turns half a circle instead.

Errors: the formal covariance (J^T W J)^-1 is scaled by the reduced chi-square and by the
number of pixels per beam, because pixels inside one beam are correlated and the formal errors
are too small by about sqrt(pixels per beam) (common practice).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .parameters import COUNT

__all__ = ["RingFitOptions", "RingSolution", "fit_ring", "fit_rings", "fit_settings", "AZIMUTH_WEIGHTS", "HALVES"]

AZIMUTH_WEIGHTS = {"none": 0, "abs-cos": 1, "cos-squared": 2}  # name -> power p of |cos theta|^p
HALVES = ("whole", "approaching", "receding")


@dataclass(frozen=True)
class RingFitOptions:
    """How a ring is fitted.

    azimuth_weight: ``none`` (1), ``abs-cos`` (|cos theta|) or ``cos-squared`` (cos^2 theta).
    minor_axis_gap: half-opening in deg of the sector about the minor axis whose pixels are dropped.
    half: ``whole``, ``approaching`` (cos theta < 0) or ``receding`` (cos theta > 0) half of the disc.
    clip: drop pixels whose residual exceeds ``clip`` robust standard deviations and refit (None: off).
    """

    azimuth_weight: str = "abs-cos"
    minor_axis_gap: float = 15.0
    half: str = "whole"
    clip: float | None = None
    max_iterations: int = 40
    geometry_updates: int = 10

    def __post_init__(self):
        from ..errors import InputError

        if self.azimuth_weight not in AZIMUTH_WEIGHTS:
            raise InputError(f"azimuth weight {self.azimuth_weight!r} unknown; choose one of {', '.join(AZIMUTH_WEIGHTS)}")
        if self.half not in HALVES:
            raise InputError(f"half {self.half!r} unknown; choose one of {', '.join(HALVES)}")
        if not 0 <= self.minor_axis_gap < 90:
            raise InputError(f"minor-axis gap must be in [0, 90) deg, got {self.minor_axis_gap}")
        if self.clip is not None and self.clip <= 0:
            raise InputError(f"clip level must be positive, got {self.clip}")


@dataclass
class RingSolution:
    """Result of one ring's fit. ``errors`` is NaN for parameters held fixed."""

    params: np.ndarray
    errors: np.ndarray
    n_pixels: int
    coverage: float
    chi2_reduced: float
    rms: float
    converged: bool
    free: np.ndarray = field(default_factory=lambda: np.zeros(COUNT, bool))
    truncated: bool = False  # the ring reached the edge of its candidate pixels (see :func:`fit_rings`)


def fit_settings(options: RingFitOptions, free=None, min_pixels: int = 0, pixels_per_beam: float = 1.0):
    """The compiled fit's :class:`.ring_solver.FitSettings` for ``options`` and the ``free`` parameter mask."""
    from .ring_solver import FitSettings

    free = np.zeros(COUNT, bool) if free is None else np.array(free, bool)
    return FitSettings(free, AZIMUTH_WEIGHTS[options.azimuth_weight], float(np.sin(np.radians(options.minor_axis_gap))),
                       HALVES.index(options.half), float(options.clip or 0.0), int(options.max_iterations),
                       int(options.geometry_updates), int(min_pixels), float(pixels_per_beam))


def fit_rings(x, y, v, sigma, bounds, starts, free, sky_jacobian, inner, outer, options=RingFitOptions(),
              pixels_per_beam: float = 1.0, min_pixels: int = 0, threads: int | None = None, order_radius=None,
              margin: float = 0.0) -> list:
    """Fit many rings at once; ring k reads pixels ``bounds[k, 0]:bounds[k, 1]`` of ``x, y, v, sigma``.

    Sorting the pixels by disc radius (``order_radius``, ascending) lets each ring's candidates be
    one contiguous slice (see :mod:`.candidates`); a ring whose pixels come within ``margin`` of an
    end of its slice is marked ``truncated``. ``starts``: (n_rings, 7) starting parameters; ``inner``/``outer``:
    ring edges (arcsec). Rings are shared among ``threads`` threads (default: the machine's cores,
    at most 4); the compiled fit releases the interpreter lock. Returns a list of :class:`RingSolution`.
    """
    from .ring_solver import fit_one_ring
    from .threads import run_parts, thread_count

    # fresh writable C arrays throughout, so that every call has the one signature the kernel was compiled for
    table = np.array([np.ravel(a) for a in (x, y, v, sigma)], float)
    bounds = np.array(bounds, np.int64).reshape(-1, 2)
    m = len(bounds)
    order_radius = np.zeros(table.shape[1]) if order_radius is None else np.array(order_radius, float)
    jac = np.array(sky_jacobian, float)
    starts = np.array(np.broadcast_to(np.asarray(starts, float), (m, COUNT)))
    inner, outer = (np.array(np.broadcast_to(a, m), float) for a in (inner, outer))
    settings = fit_settings(options, free, min_pixels, pixels_per_beam)
    params, errors = np.empty((m, COUNT)), np.empty((m, COUNT))
    stats = [None] * m

    def fit_part(rings):
        for k in rings:
            stats[k] = fit_one_ring(table, order_radius, float(margin), jac, bounds[k, 0], bounds[k, 1], starts[k],
                                    inner[k], outer[k], settings, params[k], errors[k])

    # the largest rings first, dealt out in turn, so the threads finish together
    order = np.argsort(bounds[:, 0] - bounds[:, 1], kind="stable")
    threads = min(threads or thread_count(), max(m, 1))
    run_parts(fit_part, [order[t::threads] for t in range(threads)], threads)
    return [RingSolution(params[k], errors[k], int(n), float(coverage), float(chi2), float(rms), bool(converged),
                         settings.free.copy(), bool(truncated))
            for k, (n, coverage, chi2, rms, converged, truncated) in enumerate(stats)]


def fit_ring(x, y, v, sigma, start, free, sky_jacobian, inner, outer, options=RingFitOptions(),
             pixels_per_beam: float = 1.0, min_pixels: int = 0) -> RingSolution:
    """Fit one ring spanning disc radii ``[inner, outer)`` arcsec.

    ``x, y, v, sigma``: coordinates, velocities and errors (km/s) of all candidate pixels.
    ``start``: the seven parameters in :class:`.parameters.Parameter` order; ``free``: a boolean
    mask of those to fit. A ring with fewer than ``max(min_pixels, 2 * n_free)`` pixels is
    returned unfitted (``converged`` False, parameters at ``start``).
    """
    return fit_rings(x, y, v, sigma, [(0, len(x))], np.asarray(start, float)[None, :], free, sky_jacobian, [inner],
                     [outer], options, pixels_per_beam, min_pixels, threads=1)[0]
