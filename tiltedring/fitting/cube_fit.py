"""The inner rotation curve fitted to the cube itself (the 3-D treatment of beam smearing).

With the geometry of the map fit held (centre, systemic velocity, position angle, inclination and
v_radial per ring), the observed cube is modelled forward (:mod:`.cube_model`: rings -> line
profiles -> channels -> beam) and compared voxel by voxel with the data, weighted by the channel
noise::

    chi^2 = sum_(k, y, x) (data_kyx - model_kyx)^2 / noise_k^2

1. Starting values: the map's v_rotation; the surface brightness of each ring the mean moment-0 of
   the cube over the ring's pixels (channels within 60 km/s, or five channels, of the map's velocity
   field, so that noise far from the line is not summed); the dispersion matched ring by ring (:mod:`.line_widths`).
2. The rings within ``within_beams`` beams of the centre, where the beam mixes neighbouring rings,
   are fitted jointly by Levenberg-Marquardt (Levenberg 1944; Marquardt 1963) on a box of the cube
   that holds them (plus one beam for comparison and 2.5 beams of margin for the convolution; the
   outer rings, held, are drawn in it too). First with v_rotation held at the map curve (only
   dispersion and surface brightness free): its chi^2 is the map curve's. Then with v_rotation,
   dispersion and surface brightness of every inner ring free, starting there. A step is taken only
   when it lowers chi^2, so the result is never worse than the map curve. A fixed number of steps,
   each summed in a fixed order (:mod:`.normal_equations`), so the result does not depend on the
   number of threads.
3. The outer rings keep the map's v_rotation; their dispersion is matched again to the final model.
   The widths are measured about the map curve's velocity field, whose speed is interpolated between
   ring centres, so the map's v_rotation errors e (when given) scatter the reference along the line of
   sight by about::

       delta_j = sin(i_j) max(e_j, e_(j-1) / 2, e_(j+1) / 2) / sqrt(2)

   (rms of cos(theta) is 1/sqrt(2); a neighbour's speed weighs at most 1/2 inside the ring). Such a
   scatter broadens the data's lines, sigma^2 + delta^2, so ``dispersion_err`` gains
   sqrt(sigma^2 + delta^2) - sigma in quadrature. A ring's dispersion is not measurable, left blank
   (NaN, with its error) with a caution, when delta_j > sigma_j / 2 (ours: the reference's scatter then
   adds more than 12 % to the width), or when the matched value runs to the floor or above 50 km/s
   (faint or noisy lines). The model cube keeps the matched value there.

Errors of the fitted rings: the covariance (J^T J)^-1 scaled by chi^2 per degree of freedom and by
the number of pixels per beam (noise correlated by the beam; times 8/3 for Hanning-smoothed channels,
whose noise is correlated over neighbouring channels).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from .cube_model import FREE_PER_RING, CubeGrid, model_cube, observe, sky_cube
from .geometry import assign_to_rings
from .kinematics import PARAMETERS, model_field
from .line_widths import MIN_DISPERSION, line_spread
from .normal_equations import normal_equations, sum_of_squares

__all__ = ["CubeCurve", "fit_curve_on_cube", "ring_pixels"]

MOMENT_WINDOW = 60.0  # km/s about the map's velocity field: the channels summed into the starting moment-0
HANNING_NOISE_FACTOR = 8.0 / 3.0  # 1 + 2 (2/3 + 1/6): summed autocorrelation of Hanning-smoothed white noise


@dataclass
class CubeCurve:
    """What the cube gave per ring (sorted by radius) and the observed model cube of the final rings.

    ``treatment``: per ring, ``"cube"`` (v_rotation, dispersion and surface brightness fitted to the
    cube) or ``"map"`` (v_rotation from the map fit, dispersion matched by line width, surface
    brightness the ring's mean moment-0)."""

    rings: dict
    treatment: np.ndarray
    model: np.ndarray
    record: dict = field(default_factory=dict)
    cautions: list = field(default_factory=list)


def ring_pixels(grid: CubeGrid, table: dict, edges) -> np.ndarray:
    """Ring index of each pixel centre (its disc radius within ``edges[j]`` .. ``edges[j+1]``), -1 outside."""
    ny, nx = grid.shape[1:]
    y, x = np.mgrid[0:ny, 0:nx]
    _, radius = assign_to_rings(x, y, grid.sky_jacobian, table["radius"], table["x_center"], table["y_center"],
                                table["position_angle"], table["inclination"], edges[-1])
    index = np.searchsorted(np.asarray(edges, float), radius, side="right") - 1
    index[~np.isfinite(radius) | (index >= len(edges) - 1)] = -1
    return index.reshape(ny, nx)


def _start_table(rings: dict) -> dict:
    """Sorted ring columns with v_rotation gaps (failed rings) filled by interpolation over radius."""
    table = {name: np.asarray(rings[name], float) for name in ("radius",) + PARAMETERS if name in rings}
    order = np.argsort(table["radius"])
    table = {name: values[order].copy() for name, values in table.items()}
    v = table["v_rotation"]
    ok = np.isfinite(v)
    if not ok.any():
        raise InputError("no ring has a v_rotation to start the fit on the cube from")
    table["v_rotation"] = np.interp(table["radius"], table["radius"][ok], v[ok])
    table.setdefault("v_radial", np.zeros_like(v))
    table["v_radial"] = np.nan_to_num(table["v_radial"])
    return table


def fit_curve_on_cube(cube, rings: dict, edges, within_beams: float = 4.0, subpixels: int = 3,
                      response: str = "boxcar", steps: int = 8, passes: int = 3, channels=None,
                      threads: int | None = None) -> CubeCurve:
    """Fit the inner rings' v_rotation, dispersion and surface brightness to ``cube`` (module docstring).

    ``cube``: a :class:`..io.cube.LineCube` (``data``, ``velocity``, ``channel_width``, ``noise``,
    ``beam``, ``sky_jacobian``). ``rings``: the map fit's ring columns (``radius`` and
    :data:`.kinematics.PARAMETERS`); ``edges``: the ring edges in arcsec. ``channels``: boolean mask
    of the channels to use (e.g. without a foreground line). Returns a :class:`CubeCurve`.
    """
    grid = CubeGrid.of(cube, response)
    table = _start_table(rings)
    edges = np.asarray(edges, float)
    if len(edges) != len(table["radius"]) + 1:
        raise InputError(f"{len(edges)} ring edges for {len(table['radius'])} rings; give one edge more than rings")
    use = np.ones(grid.shape[0], bool) if channels is None else np.asarray(channels, bool)
    noise = np.where(np.isfinite(cube.noise) & (cube.noise > 0), cube.noise, np.nanmedian(cube.noise))
    data = np.where(use[:, None, None], cube.data, np.nan)
    widths = np.diff(grid.edges)
    ring = ring_pixels(grid, table, edges)
    v_ref = model_field(grid.shape[1:], grid.sky_jacobian, table, r_outer=edges[-1])
    near = np.abs(grid.velocity[:, None, None] - v_ref) <= max(MOMENT_WINDOW, 5 * grid.channel_width)
    moment_zero = np.nansum(np.where(near, data, 0.0) * widths[:, None, None], axis=0)
    counts = np.bincount(ring[ring >= 0], minlength=len(table["radius"]))
    sums = np.bincount(ring[ring >= 0], weights=moment_zero[ring >= 0], minlength=len(table["radius"]))
    table["surface_brightness"] = np.clip(np.where(counts > 0, sums / np.maximum(counts, 1), 0.0), 0.0, None)
    table["dispersion"] = np.full(len(table["radius"]), max(10.0, grid.channel_width))
    everything = np.arange(len(table["radius"]))
    spread = _LineWidths(grid, data, v_ref, float(np.median(table["v_systemic"])), ring, subpixels, threads)
    spread.match(table, edges[-1], everything, passes)
    record = {"method": "forward model of the cube (rings -> Gaussian lines -> channels -> beam)",
              "channel_response": response, "subpixels": subpixels, "within_beams": within_beams,
              "channels_used": int(use.sum())}
    cautions = []
    beam = grid.beam
    inner = everything[table["radius"] <= within_beams * beam.fwhm] if beam is not None else everything[:0]
    if beam is None:
        cautions.append("the cube has no beam: no ring was fitted to the cube; the curve is the map's")
    err = {"v_rotation": np.full(len(everything), np.nan), "dispersion": np.full(len(everything), np.nan)}
    if len(inner):
        problem = _InnerProblem(grid, data, noise, table, edges, inner, subpixels, threads)
        fitted = problem.solve(steps)
        record.update(fitted.pop("record"))
        cautions += fitted.pop("cautions")
        for name in FREE_PER_RING:
            table[name][inner] = fitted[name]
        for name in err:
            err[name][inner] = fitted[f"{name}_err"]
    outer = everything[~np.isin(everything, inner)]
    blank = np.zeros(len(everything), bool)
    if len(outer):
        err["dispersion"][outer] = spread.match(table, edges[-1], outer, passes)
        delta = _reference_scatter(table, rings)
        sigma = table["dispersion"]
        err["dispersion"][outer] = np.hypot(err["dispersion"], np.hypot(sigma, delta) - sigma)[outer]
        blank, caution = _unmeasurable(table, outer, delta)
        cautions += caution
    model = model_cube(grid, table, edges[-1], subpixels=subpixels, threads=threads)
    table["dispersion"] = np.where(blank, np.nan, table["dispersion"])
    err["dispersion"][blank] = np.nan
    table["v_rotation_err"] = err["v_rotation"]
    table["dispersion_err"] = err["dispersion"]
    treatment = np.where(np.isin(everything, inner), "cube", "map")
    record["rings_fitted_to_cube"] = [float(r) for r in table["radius"][inner]]
    return CubeCurve(rings=table, treatment=treatment, model=model, record=record, cautions=cautions)


def _reference_scatter(table, rings) -> np.ndarray:
    """delta_j (module docstring, step 3) from the map's ``v_rotation_err`` (0 without it; infinite on a ring
    without a map speed)."""
    if "v_rotation_err" not in rings:
        return np.zeros(len(table["radius"]))
    order = np.argsort(np.asarray(rings["radius"], float))
    e = np.abs(np.asarray(rings["v_rotation_err"], float)[order])
    e[~np.isfinite(e) | ~np.isfinite(np.asarray(rings["v_rotation"], float)[order])] = np.inf
    half = 0.5 * e
    reach = np.maximum(e, np.maximum(np.r_[0.0, half[:-1]], np.r_[half[1:], 0.0]))
    return np.sin(np.radians(table["inclination"])) * reach / np.sqrt(2.0)


def _unmeasurable(table, outer, delta):
    """Outer rings whose matched dispersion is no measurement (module docstring, step 3): a mask over all
    rings and the cautions saying why."""
    sigma, radius = table["dispersion"], table["radius"]
    scattered, odd = np.zeros(len(radius), bool), np.zeros(len(radius), bool)
    scattered[outer] = delta[outer] > 0.5 * sigma[outer]
    odd[outer] = ~scattered[outer] & ((sigma[outer] <= MIN_DISPERSION * 1.001) | (sigma[outer] > 50.0))
    def listed(mask):
        return ", ".join(f"{r:.1f}" for r in radius[mask])

    cautions = []
    if scattered.any():
        cautions.append(f"dispersion not measurable by line width at radius {listed(scattered)} arcsec: the map "
                        "curve's errors there (on the ring or a neighbour) scatter the reference velocity field by "
                        "more than half the line width; left blank")
    if odd.any():
        cautions.append(f"dispersion not measurable by line width at radius {listed(odd)} arcsec: matched to its "
                        f"floor of {MIN_DISPERSION} km/s or above 50 km/s (faint or noisy lines); left blank")
    return scattered | odd, cautions


class _LineWidths:
    """Dispersion matched ring by ring to the data's line widths (:mod:`.line_widths`)."""

    def __init__(self, grid, data, v_ref, v_systemic, ring, subpixels, threads):
        self.grid, self.data, self.v_ref, self.v_systemic, self.ring = grid, data, v_ref, v_systemic, ring
        self.subpixels, self.threads = subpixels, threads

    def match(self, table, r_outer, which, passes) -> np.ndarray:
        """Update ``table["dispersion"][which]`` over ``passes`` passes; returns their errors (half the
        difference of the two halves' values)."""
        n = len(table["radius"])
        wide = np.full(n, np.inf)
        error = np.full(len(which), np.nan)
        for _ in range(passes):
            model = model_cube(self.grid, table, r_outer, subpixels=self.subpixels, threads=self.threads)
            weight = np.clip(np.nansum(model, axis=0), 0.0, None)
            s_wide = line_spread(model, self.grid.velocity, self.v_ref, self.v_systemic, self.ring, wide, weight, n)
            width = np.sqrt(np.nan_to_num(s_wide[:, 0], nan=0.0))
            window = np.maximum(3.0 * width, 2.0 * self.grid.channel_width)
            s_model = line_spread(model, self.grid.velocity, self.v_ref, self.v_systemic, self.ring, window, weight, n,
                                  scale=width)
            s_data = line_spread(self.data, self.grid.velocity, self.v_ref, self.v_systemic, self.ring, window,
                                 weight, n, scale=width)
            variance = table["dispersion"][which, None] ** 2 + s_data[which] - s_model[which]
            new = np.sqrt(np.clip(variance, MIN_DISPERSION**2, None))
            ok = np.isfinite(new[:, 0])
            table["dispersion"][which[ok]] = new[ok, 0]
            error = 0.5 * np.abs(new[:, 1] - new[:, 2])
        return error


class _InnerProblem:
    """The inner rings' fit on a box of the cube (module docstring, step 2)."""

    def __init__(self, grid, data, noise, table, edges, inner, subpixels, threads):
        self.grid, self.table, self.inner, self.r_outer = grid, table, inner, float(edges[-1])
        self.subpixels, self.threads = subpixels, threads
        beam_pix = grid.beam.fwhm / float(np.sqrt(abs(np.linalg.det(grid.sky_jacobian))))
        reach = edges[inner[-1] + 1]
        ring = ring_pixels(grid, {**table, "radius": table["radius"]}, np.concatenate([[0.0], [reach]]))
        ys, xs = np.nonzero(ring == 0)
        if ys.size == 0:
            raise InputError("no pixel of the cube lies on the inner rings; check the geometry of the map fit")
        ny, nx = grid.shape[1:]
        compare = int(np.ceil(beam_pix))
        margin = compare + int(np.ceil(2.5 * beam_pix))
        self.box = (max(ys.min() - margin, 0), max(xs.min() - margin, 0), min(ys.max() + margin + 1, ny),
                    min(xs.max() + margin + 1, nx))
        y0, x0, y1, x1 = self.box
        self.inside = (slice(None), slice(max(ys.min() - compare, 0) - y0, min(ys.max() + compare + 1, ny) - y0),
                       slice(max(xs.min() - compare, 0) - x0, min(xs.max() + compare + 1, nx) - x0))
        box_data = data[:, y0:y1, x0:x1][self.inside]
        self.root_weight = np.where(np.isfinite(box_data), 1.0 / noise[:, None, None], 0.0).ravel()
        self.target = (np.nan_to_num(box_data) / noise[:, None, None]).ravel()
        self.n_valid = int(np.isfinite(box_data).sum())
        from .smearing import BeamKernel

        self.kernel = BeamKernel((y1 - y0, x1 - x0), grid.beam, grid.sky_jacobian)
        self.pixels_per_beam = max(1.0, grid.beam.area / abs(np.linalg.det(grid.sky_jacobian)))

    def _trial(self, p):
        table = dict(self.table)
        for q, name in enumerate(FREE_PER_RING):
            column = table[name].copy()
            column[self.inner] = p[q::3]
            table[name] = column
        return table

    def residual(self, p):
        sky, _ = sky_cube(self.grid, self._trial(p), self.r_outer, box=self.box, subpixels=self.subpixels,
                          threads=self.threads)
        model = observe(self.grid, sky, self.kernel, self.threads)[self.inside].ravel()
        return self.target - model * self.root_weight

    def jacobian(self, p):
        _, deriv = sky_cube(self.grid, self._trial(p), self.r_outer, box=self.box, free=self.inner,
                            subpixels=self.subpixels, threads=self.threads)
        rows = np.empty((deriv.shape[0], self.target.size))
        for q in range(deriv.shape[0]):
            rows[q] = observe(self.grid, deriv[q], self.kernel, self.threads)[self.inside].ravel() * self.root_weight
        return rows

    def solve(self, steps) -> dict:
        """Stage A (v_rotation held) then stage B (all free); returns the fitted columns, errors, record."""
        p = np.column_stack([self.table[name][self.inner] for name in FREE_PER_RING]).ravel()
        lower = np.tile([-np.inf, MIN_DISPERSION, 0.0], len(self.inner))
        held = np.tile([False, True, True], len(self.inner))
        start_chi2 = sum_of_squares(self.residual(p))
        p, chi2_map, _, taken_a = _levenberg_marquardt(self, p, held, lower, steps)
        p, chi2, normal, taken_b = _levenberg_marquardt(self, p, np.ones_like(held), lower, steps)
        dof = max(self.n_valid - p.size, 1)
        factor = chi2 / dof * self.pixels_per_beam * (HANNING_NOISE_FACTOR if self.grid.response == "hanning" else 1)
        with np.errstate(invalid="ignore"):
            errors = np.sqrt(np.clip(np.diag(np.linalg.pinv(normal)), 0, None) * factor)
        out = {name: p[q::3] for q, name in enumerate(FREE_PER_RING)}
        out.update({f"{name}_err": errors[q::3] for q, name in enumerate(FREE_PER_RING)})
        y0, x0, y1, x1 = self.box
        out["record"] = {"box_pixels": [int(y0), int(x0), int(y1), int(x1)], "voxels_compared": self.n_valid,
                         "chi2_start": float(start_chi2), "chi2_map_curve": float(chi2_map),
                         "chi2_cube_curve": float(chi2), "chi2_reduced": float(chi2 / dof),
                         "steps_taken": [taken_a, taken_b], "steps_allowed": steps}
        out["cautions"] = []
        if taken_b == 0:
            out["cautions"].append("the fit on the cube found no better inner curve than the map's; the map curve "
                                   "is kept for the inner rings")
        at_floor = self.table["radius"][self.inner][out["dispersion"] <= MIN_DISPERSION * 1.001]
        if at_floor.size:
            out["cautions"].append(f"dispersion at its floor of {MIN_DISPERSION} km/s at radius "
                                   + ", ".join(f"{r:.1f}" for r in at_floor) + " arcsec: not resolved by the channels")
        return out


def _levenberg_marquardt(problem, p, free, lower, steps, damping: float = 1e-3):
    """``steps`` Levenberg-Marquardt steps on ``p[free]`` (bounded below by ``lower``); a step is kept only when
    it lowers chi^2 (up to four damping increases per step). Returns (p, chi^2, normal matrix of all
    parameters at the final p, steps taken)."""
    res = problem.residual(p)
    chi2 = sum_of_squares(res)
    taken = 0
    for _ in range(steps):
        jac = problem.jacobian(p)
        normal, gradient = normal_equations(jac[free], res, problem.threads)
        scale = np.where(np.diag(normal) > 0, np.diag(normal), 1.0)
        for _attempt in range(4):
            delta = np.linalg.solve(normal + damping * np.diag(scale), gradient)
            trial = p.copy()
            trial[free] = np.maximum(p[free] + delta, lower[free])
            res_trial = problem.residual(trial)
            chi2_trial = sum_of_squares(res_trial)
            if chi2_trial < chi2:
                p, res, chi2, taken = trial, res_trial, chi2_trial, taken + 1
                damping = max(damping / 3.0, 1e-7)
                break
            damping *= 4.0
        else:
            break
    normal, _ = normal_equations(problem.jacobian(p), res, problem.threads)
    return p, chi2, normal, taken
