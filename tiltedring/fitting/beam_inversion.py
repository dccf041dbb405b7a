"""The beam-smearing correction as one regularised linear least-squares problem.

The forward model is the one of :mod:`.smearing` (an intensity-weighted mean-velocity map, i.e. a
moment-1 map; Begeman 1989, A&A 223, 47): v_model = v_sys + G * (I (v_sky - v_sys)) / (G * I). The
curve is the natural cubic spline through v = 0 at R = 0 and the ring speeds v_k, so the thin-disc
field is linear in them:

    v_sky - v_sys = u_0 + sum_k v_k sin(i) cos(theta) c_k(R) + sum_j dg_j d v_sky / d g_j

with c_k the spline's cardinal functions, u_0 the part that does not depend on v (radial motions),
and, to first order, dg_j a shift of the constant position angle or inclination. Smearing is linear
in v_sky - v_sys for a fixed I, and the fit is linear in the map to first order
(:meth:`.response.FitResponse.measure`), so the operator "draw, smear, fit" is affine in
x = (v, dg), T(x) = A x + b; its columns come from smearing each basis field once (one FFT each;
no iteration, so nothing can diverge and rounding cannot steer the result).

The correction x - x_obs = M u (a column per free ring speed; one per orientation angle, which also
moves the held rings' speeds as the fit would at the shifted angle) solves

    min_u  || S^-1 (T(x_obs + M u) - y_obs) ||^2 + lambda || D2 delta ||^2

with y_obs what the data gave (speeds and orientation), S their errors, delta the speeds' change and
D2 second differences across rings, either starting from delta = 0 at R = 0 (both curves vanish
there) or between rings only (whichever GCV prefers: a steep rise needs its largest change at the
innermost ring, which the anchored penalty resists): the
correction is a smooth function of radius (Tikhonov regularisation: Tikhonov 1963, Soviet Math.
Dokl. 4, 1035; Phillips 1962, J. ACM 9, 84), not each ring amplified on its own. At the first step the change
also holds one unpenalised column, the first-order correction -(T(x_obs) - x_obs) on the free rings with a
free amplitude, so the penalty acts on what the correction does beyond the beam's own radial shape: measured
from no correction, the strong smoothing that noisy inner rings make GCV choose forces a change linear in
radius across the free rings, which under-corrects a steep inner rise (on the beam benchmark at 0.5 km/s
noise: mean error 0.5-2 beams 4.45 -> 3.17 per cent, worst ring 30.6 -> 16.8). The orientation has
no prior of its own (its target rows already hold the observed angles with their errors sigma_j) and
is clipped to +/- (sigma_j + 2 |beam effect_j|) (:func:`shift_limit`). The step is linear about the
point where the basis fields were drawn; the caller may take further (Gauss-Newton) steps from the
solution with the basis redrawn there. Rings beyond the beam's
reach (from the centre out to where the fits of the smeared and the unsmeared model of the observed
curve first differ by less than the noise in two consecutive rings) are held: what the beam does
not change does not move. lambda is chosen by generalised cross-validation (Golub, Heath & Wahba
1979, Technometrics 21, 215): the minimum over a fixed grid of GCV(lambda) = n || S^-1 r ||^2 /
(n - tr H)^2, H the influence matrix. The noise of the corrected speeds follows exactly from the
linear map v_obs -> x.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.interpolate import CubicSpline

from .kinematics import model_field
from .smearing import disc_with_centre

__all__ = ["DiscBasis", "disc_basis", "BeamSolution", "affected_rings", "solve_smooth_correction", "SmearedBasis",
           "smear_basis", "correct_curve", "correction_design", "shift_limit"]


@dataclass(frozen=True)
class DiscBasis:
    """The disc's sky field as an affine function of x = (ring speeds, orientation shifts) (module docstring):
    ``fixed`` = v_sys + u_0 (NaN outside the disc); ``basis`` (n_speeds + n_shifts, ny, nx): sin i cos theta
    c_k(R) per ring, then the field's derivative per degree of each orientation angle at the observed curve."""

    fixed: np.ndarray
    basis: np.ndarray

    def field(self, x) -> np.ndarray:
        """The unsmeared sky field at ``x`` (speeds, then orientation shifts; missing shifts count as 0)."""
        x = np.asarray(x, float)
        return self.fixed + np.tensordot(x, self.basis[: len(x)], axes=1)


def curve_basis(shape, sky_jacobian, rings: dict, r_outer: float) -> tuple:
    """(fixed part, per-ring fields) of ``rings`` (radius and the parameters; v_rotation ignored) by three calls
    of the model builder: v = 0 (the fixed part), v = 1 on every ring (sin i cos theta) and v = ring index (sin
    i cos theta times the pixel's fractional ring position, hence its disc radius R). The curve between ring
    radii is the natural cubic spline through (0, 0) and the ring speeds: field k is sin i cos theta c_k(R),
    c_k the spline's cardinal function (linear in the speeds; de Boor 1978, A Practical Guide to Splines)."""
    disc = disc_with_centre(dict(rings, v_rotation=np.zeros(len(rings["radius"]))))
    offset = len(disc["radius"]) - len(rings["radius"])  # the ring added at R = 0 (speed 0, not a variable)
    count = len(disc["radius"])

    def draw(speeds, **changes):
        return model_field(shape, sky_jacobian, dict(disc, v_rotation=np.asarray(speeds, float), **changes), r_outer)

    fixed = draw(np.zeros(count))
    zero = {"v_systemic": np.zeros(count), "v_radial": np.zeros(count)}
    unit = np.nan_to_num(draw(np.ones(count), **zero))
    indexed = np.nan_to_num(draw(np.arange(count, dtype=float), **zero))
    on = np.abs(unit) > 1e-12
    radius = np.interp(indexed[on] / unit[on], np.arange(count), disc["radius"])  # disc radius of each pixel
    cardinal = CubicSpline(disc["radius"], np.eye(count), bc_type="natural")(radius)  # (pixels, rings)
    basis = np.zeros((count - offset,) + tuple(shape))
    for k in range(offset, count):
        basis[k - offset][on] = unit[on] * cardinal[:, k]
    return fixed, basis


def disc_basis(shape, sky_jacobian, rings: dict, r_outer: float, shifts=(), step: float = 0.25) -> DiscBasis:
    """:class:`DiscBasis` of ``rings`` (their v_rotation is the curve the orientation derivatives are taken at);
    ``shifts``: orientation names (position_angle, inclination) whose change is modelled to first order, by
    central differences of +/- ``step`` deg."""
    fixed, basis = curve_basis(shape, sky_jacobian, rings, r_outer)
    speeds = np.asarray(rings["v_rotation"], float)
    derivatives = []
    for name in shifts:
        sides = []
        for sign in (1.0, -1.0):
            moved = dict(rings, **{name: np.asarray(rings[name], float) + sign * step})
            f, b = curve_basis(shape, sky_jacobian, moved, r_outer)
            sides.append(f + np.tensordot(speeds, b, axes=1))
        # pixels entering or leaving the disc's edge as the angle moves carry no derivative
        derivatives.append(np.nan_to_num((sides[0] - sides[1]) / (2 * step)))
    return DiscBasis(fixed, np.concatenate([basis, np.array(derivatives).reshape((-1,) + tuple(shape))]))


def affected_rings(beam_effect, noise, floor: float = 0.5) -> np.ndarray:
    """Rings the correction may move: from the centre out to the last ring before two consecutive rings where
    |fit of smeared - fit of unsmeared model| of the observed curve stays below its noise error (at least
    ``floor`` km/s). Smearing weakens outward from the centre, so this is the beam's reach; rings beyond it
    are held, including outer rings that differ only through the disc's truncated edge (the model ends at the
    outermost ring while the sky does not)."""
    moved = np.abs(np.nan_to_num(beam_effect)) >= np.maximum(np.nan_to_num(noise, nan=np.inf), floor)
    free = np.zeros(len(moved), bool)
    if not moved.any():
        return free
    quiet = ~moved
    calm = np.flatnonzero(quiet[:-1] & quiet[1:] & (np.arange(len(moved) - 1) > np.flatnonzero(moved)[0]))
    reach = calm[0] if calm.size else len(moved)
    free[:reach] = True
    return free


@dataclass(frozen=True)
class BeamSolution:
    """The solution x (corrected speeds, then orientation shifts in deg), the chosen lambda, the propagated
    noise error of each corrected speed, the remaining misfit chi^2 = || S^-1 (T(x) - y) ||^2 and, where the
    beam's effect was a free column (:func:`correct_curve`), the speeds the penalty alone gives (``alternative``):
    two reasonable regularisations whose difference is part of the correction's own uncertainty."""

    x: np.ndarray
    smoothing: float
    noise: np.ndarray
    chi_square: float
    alternative: np.ndarray | None = None


def _second_differences(n: int) -> np.ndarray:
    return np.diff(np.eye(n), n=2, axis=0) if n >= 3 else np.zeros((0, n))


def _gcv_solve(x, residual0, roughness, prior, grid) -> tuple:
    """(GCV score, solver K with delta = -K residual0, lambda, chi^2): Tikhonov solution of min ||x d + r0||^2 + lambda s
    d^T R d + d^T P d, lambda the minimum of GCV over ``grid`` (s = tr(x^T x) / tr(R) makes the grid
    problem-independent)."""
    n = len(residual0)
    normal = x.T @ x
    scale = np.trace(normal) / max(np.trace(roughness), 1e-300)
    best = None
    for factor in grid:
        system = normal + factor * scale * roughness + prior + 1e-12 * np.trace(normal) * np.eye(len(normal))
        solver = np.linalg.solve(system, x.T)
        influence = x @ solver
        left = residual0 - influence @ residual0
        gcv = n * float(left @ left) / max(n - float(np.trace(influence)), 1e-9) ** 2
        if best is None or gcv < best[0]:
            best = (gcv, solver, float(factor), float(left @ left))
    return best


def solve_smooth_correction(matrix, offset, start, target, noise, design, n_speeds: int, prior=None,
                            grid=np.logspace(-6, 4, 41), shape=None) -> BeamSolution:
    """Solve the regularised problem of the module docstring for ``T(x) = matrix @ x + offset`` about ``start``.

    ``target`` and ``noise``: what the data gave and its errors (speeds, then orientation angles). The change
    is x - start = ``design`` @ u: a column per free ring speed and per orientation shift (whose column also
    moves the held rings' speeds as the fit would at the shifted orientation). ``prior``: per unknown u, the
    inverse square width of a Gaussian prior about 0 (0: none); the smoothness penalty acts on the speeds'
    change, either anchored (second differences from delta = 0 at R = 0) or free at the centre (second
    differences between rings only: a steep inner rise needs its largest change in the innermost ring); of
    the two, the one with the lower GCV score at its best lambda is used (GCV as an estimate of predictive
    error compares the two penalties as it compares lambdas; Golub, Heath & Wahba 1979). Returns the
    solution, its lambda, the noise propagated from the data's speeds and the misfit. ``shape``: a change of the
    speeds (e.g. minus the beam effect) added as one more column of the change with a free, unpenalised
    amplitude: the penalty then acts on what the change does beyond that shape.
    """
    start = np.asarray(start, float)
    weight = 1.0 / np.asarray(noise, float)
    residual0 = (matrix @ start + offset - target) * weight
    if design.shape[1] == 0:
        return BeamSolution(start.copy(), np.inf, np.asarray(noise, float)[:n_speeds], float(residual0 @ residual0))
    penalised = design
    prior = np.zeros(design.shape[1]) if prior is None else np.asarray(prior, float)
    if shape is not None:
        column = np.zeros((len(start), 1))
        column[:n_speeds, 0] = shape
        design = np.concatenate([design, column], axis=1)
        penalised = np.concatenate([penalised, np.zeros_like(column)], axis=1)
        prior = np.append(prior, 0.0)
    x = (matrix @ design) * weight[:, None]
    prior = np.diag(prior)
    best = None
    for rows in (_second_differences(n_speeds + 1)[:, 1:], _second_differences(n_speeds)):  # anchored, free
        penalty = rows @ penalised[:n_speeds]
        candidate = _gcv_solve(x, residual0, penalty.T @ penalty, prior, grid)
        if best is None or candidate[0] < best[0]:
            best = candidate
    _, solver, factor, chi_square = best
    solution = start - design @ (solver @ residual0)
    # d x / d v_obs = E - M K S^-1 (A_s - E), E the speed rows of the identity (v_obs enters start and target)
    unit = np.eye(len(start))[:, :n_speeds]
    gain = unit - design @ (solver @ ((matrix[:, :n_speeds] - unit) * weight[:, None]))
    propagated = np.sqrt(np.sum((gain[:n_speeds] * np.asarray(noise, float)[None, :n_speeds]) ** 2, axis=1))
    return BeamSolution(solution, factor, propagated, chi_square)


def correction_design(free, coupling, with_shifts: bool = True) -> np.ndarray:
    """Columns of x - start (:func:`solve_smooth_correction`): one per free ring speed, then (``with_shifts``)
    one per orientation angle: 1 deg of it, with the held rings' speeds moved by -coupling (the ring fit's
    d v / d angle at fixed data, :attr:`.response.FitResponse.coupling`)."""
    n_speeds, n_shifts = coupling.shape
    rings = np.flatnonzero(free)
    columns = [np.eye(n_speeds + n_shifts)[:, rings]]
    if with_shifts:
        shift = np.zeros((n_speeds + n_shifts, n_shifts))
        shift[n_speeds:] = np.eye(n_shifts)
        shift[:n_speeds][~np.asarray(free, bool)] = -coupling[~np.asarray(free, bool)]
        columns.append(shift)
    return np.concatenate(columns, axis=1)


@dataclass(frozen=True)
class SmearedBasis:
    """The smeared fixed part (NaN where the model is undefined) and the smeared basis fields of one intensity."""

    fixed: np.ndarray
    basis: np.ndarray

    def field(self, x) -> np.ndarray:
        x = np.asarray(x, float)
        return self.fixed + np.tensordot(x, self.basis[: len(x)], axes=1)


def smear_basis(kernel, basis_fields: DiscBasis, intensity, v_systemic: float) -> SmearedBasis:
    """G * (I f) / G * I of the fixed part (about v_sys) and of every basis field, with I the ``intensity`` on
    the disc's pixels (one FFT convolution per field, the normalisation shared)."""
    inside = np.isfinite(basis_fields.fixed)
    weight = np.where(inside, np.clip(np.nan_to_num(intensity), 0.0, None), 0.0)
    norm = kernel(weight)
    ok = inside & (norm > 1e-6 * max(float(norm.max()), 1e-30))
    scale = np.where(ok, 1.0 / np.where(ok, norm, 1.0), 0.0)
    fixed = np.full(basis_fields.fixed.shape, np.nan)
    fixed[ok] = v_systemic + (kernel(weight * np.nan_to_num(basis_fields.fixed - v_systemic)) * scale)[ok]
    basis = kernel(weight[None] * basis_fields.basis) * scale[None]
    return SmearedBasis(fixed, basis)


def shift_limit(beam_effect, error, reach: float = 2.0) -> np.ndarray:
    """How far the correction may move each constant orientation angle (deg): its error plus ``reach`` times
    what the beam does to it, |fit of the smeared - fit of the unsmeared model| of the observed curve. The
    beam's own bias is the physical scale of the change (Begeman 1989 notes that smearing flattens the
    isovelocity contours, which the ring fit reads as a lower inclination); the factor 2 leaves room for the
    model's smeared intensity differing from the sky's without letting the shift run away."""
    return np.asarray(error, float) + reach * np.abs(np.nan_to_num(np.asarray(beam_effect, float)))


def correct_curve(smeared: SmearedBasis, basis_fields: DiscBasis, target, noise, measure, coupling, speeds=None,
                  free=None, limits=None, from_effect: bool = False) -> tuple:
    """(:class:`BeamSolution`, beam effect, free rings, shift limits) for one intensity assumption, one linear
    (Gauss-Newton) step taken at the point where ``basis_fields`` were drawn.

    ``target``: what the data gave (speeds of the used rings, then the constant orientation angles);
    ``measure(map)`` the same quantities fitted the same way to another map; ``coupling``: (rings, angles)
    d v / d angle of the ring fit; ``speeds``: the intrinsic speeds of the point (default: the observed ones)
    and the orientation shifts are counted from it. T(x) = A x + b is built from the smeared basis fields; the
    beam effect (speeds, then angles) is T minus the fit of the unsmeared model at the point. ``free`` (default:
    :func:`affected_rings`) and ``limits`` ((lower, upper) of the shifts; default +/- :func:`shift_limit`) are
    fixed at the first step and passed on to later ones. The shifts have no prior of their own: the angles'
    target rows already hold the observed orientation with its error (a prior would count it twice); a shift
    beyond its limits is clipped to them and the speeds solved again with it held. ``from_effect`` (the first
    step): minus the beam effect on the free rings is one more, unpenalised column of the change (module
    docstring); the solution then also holds the speeds without that column (``alternative``)."""
    target = np.asarray(target, float)
    n_speeds, size = coupling.shape[0], smeared.basis.shape[0]
    speeds = target[:n_speeds] if speeds is None else np.asarray(speeds, float)
    start = np.concatenate([speeds, np.zeros(size - n_speeds)])
    offset = np.asarray(measure(smeared.fixed), float)
    matrix = np.empty((len(target), size))
    for k in range(size):
        matrix[:, k] = np.asarray(measure(smeared.fixed + smeared.basis[k]), float) - offset
    effect = matrix @ start + offset - np.asarray(measure(basis_fields.field(start)), float)
    free = affected_rings(effect[:n_speeds], noise[:n_speeds]) if free is None else free
    if limits is None:
        bound = shift_limit(effect[n_speeds:], noise[n_speeds:])
        limits = (-bound, bound)
    design = correction_design(free, coupling)

    def solve(shape):
        solution = solve_smooth_correction(matrix, offset, start, target, noise, design, n_speeds, shape=shape)
        shifts = solution.x[n_speeds:]
        if np.any((shifts < limits[0]) | (shifts > limits[1])):
            held = start + design[:, free.sum():] @ np.clip(shifts, limits[0], limits[1])
            solution = solve_smooth_correction(matrix, offset, held, target, noise,
                                               correction_design(free, coupling, with_shifts=False), n_speeds,
                                               shape=shape)
        return solution

    if not from_effect:
        return solve(None), effect, free, limits
    solution = solve(np.where(free, -effect[:n_speeds], 0.0))
    return replace(solution, alternative=solve(None).x[:n_speeds]), effect, free, limits
