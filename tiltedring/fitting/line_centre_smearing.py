"""Beam smearing of a line-centre velocity map (peak, Gaussian, Gauss-Hermite or optical centroid).

The correction of :mod:`.beam_inversion` models a moment-1 map: the beam mixes the spectra of
neighbouring sight lines, and the intensity-weighted mean of the mixture is
v_sys + G * (I (v - v_sys)) / (G * I), linear in the curve. A line-centre map holds instead the centre
of the mixed profile: where the velocity changes across the beam the profile is skewed, and its peak
(or a fitted centre) follows the brightest, least-blended part of the mixture rather than its mean,
so it is biased less than a moment-1 map, and not linearly in the curve (de Blok et al. 2008, AJ 136,
2648, compare the kinds of velocity field; from memory).

Model: the cube of the disc is drawn by :func:`.cube_model.sky_cube` (Gaussian lines of one
dispersion sigma, finely sampled channels of width sigma / 3), each pixel's spectrum scaled by the
adopted intrinsic intensity I, and smeared by the beam (:func:`.cube_model.observe`). On that cube the
line-centre estimator of the map's kind (:func:`..io.velocity_fields.line_centres`) gives c(x), and
the intensity-weighted mean over all channels gives m(x) = sum S v / sum S, the same quantity the
linear model describes. The line-centre map of a disc with curve and orientation x is then

    L(x) = F(x) + d(x),   d(x) = c(x) - m(x)

with F(x) the linear smeared moment-1 field of :class:`.beam_inversion.SmearedBasis` (same intensity),
d the line-centre offset, evaluated within :data:`REACH_BEAMS` beams of the centre (disc radius; zero
beyond, where smearing hardly skews a line) in a box that extends two beams further, so that no
emission that reaches the region through the beam is cut off.

Correction: y(x), the ring speeds fitted to L(x) at the adopted orientation (exact: the speeds are
linear in the map at a fixed orientation, :meth:`.response.FitResponse.speeds_at_adopted_geometry`), is
matched to the speeds the data gave. The rings the correction may move are those where the beam
effect y(x_obs) - (speeds of the unsmeared field) exceeds the noise, from the centre out
(:func:`.beam_inversion.affected_rings`), and at least one beam inside the modelled region; the
orientation is held. Gauss-Newton (e.g. Nocedal & Wright 2006, Numerical Optimization, sect. 10.3):
the Jacobian dy/dx of the moved rings by forward differences through the model cube (once, at the
observed curve; the moment-1 Jacobian is not used, because a line-centre map responds to a ring's speed
inside the beam more strongly than a moment-1 map does, and steps with it overshoot); each step solves the
regularised problem of :func:`.beam_inversion.solve_smooth_correction` (a second-difference smoothness
penalty, its weight by generalised cross-validation) linearised at the current point, and is kept only if
the line-centre model map L(x) fits the data better (chi^2 over the map; halved at most twice
otherwise), so the result never fits the map worse than the line-centre model of the observed curve. The cube model
sums each pixel in a fixed order and the line fits are per spectrum, so nothing depends on the thread
count.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .cube_model import CubeGrid, observe, sky_cube
from .smearing import BeamKernel

__all__ = ["LineCentreModel", "line_centre_offset", "STEPS", "CHANNELS_PER_SIGMA"]

STEPS = 3  # Gauss-Newton steps at most
STEP_KMS = 5.0  # finite-difference step of a ring speed (km/s)
REACH_BEAMS = 4.0  # the line-centre model covers disc radii up to this many beams (FWHM); rings a beam inside it move
CHANNELS_PER_SIGMA = 3.0  # model channels per line dispersion
SETTLED = 0.1  # a step changing no speed by more than this fraction of its error ends the iteration


def _moment_one(cube, velocity) -> np.ndarray:
    """sum_k S_k v_k / sum_k S_k over all channels (NaN where the cube holds no emission)."""
    total = cube.sum(axis=0)
    ok = total > 1e-6 * max(float(total.max()), 1e-300)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(ok, np.tensordot(velocity, cube, axes=1) / total, np.nan)


def line_centre_offset(grid: CubeGrid, rings: dict, r_outer: float, intensity, kind: str, box, kernel=None,
                       threads: int | None = None) -> np.ndarray:
    """d = c - m over ``box`` (y0, x0, y1, x1) of ``grid``: the line centre c of the beam-smeared model cube of
    ``rings`` (each pixel's spectrum scaled by ``intensity``, a map of the whole grid) by the estimator of
    ``kind``, minus its intensity-weighted mean m (module docstring). 0 where either is undefined."""
    from ..io.velocity_fields import line_centres

    y0, x0, y1, x1 = box
    sky, _ = sky_cube(grid, rings, r_outer, box=box, threads=threads)
    sky *= np.clip(np.nan_to_num(np.asarray(intensity, float)[y0:y1, x0:x1]), 0.0, None)[None]
    cube = observe(grid, sky, kernel=kernel, threads=threads)
    velocity = np.asarray(grid.velocity, float)
    mean = _moment_one(cube, velocity)
    centre = line_centres(cube, velocity, kind, threads=threads)
    return np.where(np.isfinite(mean) & np.isfinite(centre), centre - mean, 0.0)


@dataclass
class LineCentreModel:
    """The line-centre forward model of one map (module docstring).

    ``kind``: the map's kind; ``rings``: ring columns of the adopted disc (radius, x_center, y_center,
    v_systemic, position_angle, inclination, v_radial) for the rings whose speeds are corrected, in the
    order of the solution vector; ``names``: the orientation angles whose shifts follow the speeds in
    the solution; ``radius_map``: disc radius of every pixel (arcsec); ``dispersion``: the line
    dispersion (km/s); ``history``: one record per :meth:`correct` call."""

    kind: str
    shape: tuple
    sky_jacobian: np.ndarray
    beam: object
    rings: dict
    names: tuple
    r_outer: float
    radius_map: np.ndarray
    dispersion: float
    threads: int | None = None
    dispersion_source: str = "given"
    history: list = field(default_factory=list)
    speeds_of: object = None  # map -> speeds of the corrected rings at the adopted orientation
    _adopted: tuple | None = field(default=None, repr=False)

    def grid(self, rings: dict) -> CubeGrid:
        """Channels of width sigma / :data:`CHANNELS_PER_SIGMA` over v_sys +/- (1.5 v_max + 6 sigma) for ``rings``."""
        v_sys = float(np.median(rings["v_systemic"]))
        v_max = float(np.max(np.abs(rings["v_rotation"]))) + float(np.max(np.abs(rings["v_radial"])))
        step = self.dispersion / CHANNELS_PER_SIGMA
        half = int(np.ceil((1.5 * v_max + 6.0 * self.dispersion) / step))
        velocity = v_sys + step * np.arange(-half, half + 1)
        return CubeGrid((velocity.size,) + tuple(self.shape), velocity, step, np.asarray(self.sky_jacobian, float),
                        self.beam)

    def region(self, reach: float) -> tuple:
        """(box, used): the pixels within disc radius ``reach`` (arcsec) and the box around them grown by two
        beams on the sky (clipped to the map)."""
        used = self.radius_map <= reach
        ys, xs = np.nonzero(used)
        if ys.size == 0:
            return None, used
        pixel = float(np.sqrt(abs(np.linalg.det(self.sky_jacobian))))
        grow = int(np.ceil(2.0 * self.beam.major / pixel))
        ny, nx = self.shape
        box = (max(ys.min() - grow, 0), max(xs.min() - grow, 0), min(ys.max() + 1 + grow, ny),
               min(xs.max() + 1 + grow, nx))
        return box, used

    def rings_at(self, x) -> dict:
        """The model-cube ring table for solution ``x`` (speeds, then orientation shifts in deg)."""
        n = len(self.rings["radius"])
        out = {name: np.asarray(values, float).copy() for name, values in self.rings.items()}
        out["v_rotation"] = np.asarray(x[:n], float)
        for k, name in enumerate(self.names):
            out[name] = out[name] + float(x[n + k])
        out["dispersion"] = np.full(n, self.dispersion)
        out["surface_brightness"] = np.ones(n)
        return out

    def offset(self, x, intensity, box, used) -> np.ndarray:
        """The line-centre offset d(x) on the whole map: :func:`line_centre_offset` inside ``used``, 0 elsewhere."""
        rings = self.rings_at(x)
        y0, x0, y1, x1 = box
        kernel = BeamKernel((y1 - y0, x1 - x0), self.beam, self.sky_jacobian)
        inner = line_centre_offset(self.grid(rings), rings, self.r_outer, intensity, self.kind, box, kernel,
                                   self.threads)
        out = np.zeros(tuple(self.shape))
        out[y0:y1, x0:x1] = inner
        return np.where(used, out, 0.0)

    def map_at(self, smeared, x, intensity, box, used) -> np.ndarray:
        """L(x) = F(x) + d(x): the line-centre model map of solution ``x`` (module docstring)."""
        return smeared.field(x) + self.offset(x, intensity, box, used)

    def correct(self, smeared, basis_fields, intensity, target, noise, measure, coupling, widths, misfit) -> tuple:
        """((solution, beam effect, free rings) as :func:`.beam_inversion.correct_curve` gives them, the
        line-centre model map of the solution) for one intensity assumption (module docstring).

        ``target``/``noise``: what the data gave and its errors (speeds, then orientation angles; the
        orientation is held here); ``misfit(map)``: chi^2 of a model map against the data. ``measure``,
        ``coupling`` and ``widths`` are those of the moment-1 correction (unused: the speeds are measured at
        the adopted orientation). The first call (the adopted intensity) iterates; later calls (the
        alternatives, for the spread) reuse its line-centre offset. One record per call goes to :attr:`history`."""
        from .beam_inversion import BeamSolution, affected_rings

        n = len(self.rings["radius"])
        target, noise = np.asarray(target, float), np.asarray(noise, float)
        x0 = np.concatenate([target[:n], np.zeros(len(target) - n)])
        box, used = self.region(REACH_BEAMS * float(self.beam.major))
        if self._adopted is not None:  # an alternative intensity: the adopted one's offset, one solve
            return self._alternative(smeared, basis_fields, intensity, x0, target, noise)
        start = smeared.field(x0) if box is None else self.map_at(smeared, x0, intensity, box, used)
        effect = self.speeds_of(start) - self.speeds_of(basis_fields.field(target[:n]))
        free = affected_rings(effect, noise[:n]) & (np.asarray(self.rings["radius"], float)
                                                    <= (REACH_BEAMS - 1.0) * float(self.beam.major))
        if box is None or not free.any():
            self.history.append({"steps": 0, "note": "no ring within the beam's reach: the observed curve kept"})
            self._adopted = (start - smeared.field(x0), None, None)
            return (BeamSolution(x0, np.inf, noise[:n], 0.0), effect, free), start
        jacobian = self._jacobian(smeared, x0, intensity, box, used, free, self.speeds_of(start))
        best, record = self._iterate(smeared, x0, start, lambda x: self.map_at(smeared, x, intensity, box, used),
                                     jacobian, free, target, noise, misfit)
        record.update(rings_corrected=int(free.sum()), region_radius_arcsec=REACH_BEAMS * float(self.beam.major),
                      box=[int(v) for v in box])
        self.history.append(record)
        self._adopted = (best[1] - smeared.field(best[0].x), jacobian, free)
        return (best[0], effect, free), best[1]

    def _jacobian(self, smeared, x, intensity, box, used, free, base) -> np.ndarray:
        """d(speeds at the adopted orientation of L(x)) / d(speed of each ring): forward differences of
        :data:`STEP_KMS` through the model cube for the ``free`` rings, the unit vector for the others (held)."""
        n = len(base)
        out = np.eye(n)
        for k in np.flatnonzero(free):
            moved = np.array(x, float)
            moved[k] += STEP_KMS
            out[:, k] = (self.speeds_of(self.map_at(smeared, moved, intensity, box, used)) - base) / STEP_KMS
        return out

    def _iterate(self, smeared, x0, start, model_of, jacobian, free, target, noise, misfit) -> tuple:
        """Gauss-Newton steps with the line-centre Jacobian (module docstring) from the observed curve ``x0``: each
        solves the regularised problem of :func:`.beam_inversion.solve_smooth_correction` linearised at the
        current point, halved (at most twice) until the map misfit falls; ends when no step lowers it or the
        speeds settle. Returns ((solution, its model map), record)."""
        from .beam_inversion import BeamSolution, solve_smooth_correction

        n = len(free)
        design = np.eye(n)[:, free]
        x, model = np.array(x0, float), start
        best = (BeamSolution(x.copy(), np.inf, noise[:n], 0.0), model)
        chi, fractions = [misfit(model)], []
        for _ in range(STEPS):
            speeds = self.speeds_of(model)
            step = solve_smooth_correction(jacobian, speeds - jacobian @ x[:n], x[:n], target[:n], noise[:n],
                                           design, n)
            fraction, accepted = 1.0, False
            while fraction >= 0.25 and not accepted:
                trial = x.copy()
                trial[:n] = x[:n] + fraction * (step.x - x[:n])
                model_try = model_of(trial)
                chi_try = misfit(model_try)
                accepted = chi_try < chi[-1]
                fraction = fraction if accepted else fraction / 2
            if not accepted:
                break
            moved = np.abs(trial[:n] - x[:n])
            x, model = trial, model_try
            chi.append(chi_try)
            fractions.append(fraction)
            best = (BeamSolution(x.copy(), step.smoothing, step.noise, step.chi_square), model)
            if np.all(moved <= SETTLED * noise[:n]):
                break
        return best, {"steps": len(chi) - 1, "step_fractions": fractions, "chi_square_by_step": chi}

    def _alternative(self, smeared, basis_fields, intensity, x0, target, noise) -> tuple:
        """One Gauss-Newton solve for another intensity assumption, with the adopted assumption's line-centre
        offset and Jacobian (so that the spread over assumptions costs no model cube)."""
        from .beam_inversion import BeamSolution, solve_smooth_correction

        d, jacobian, free = self._adopted
        n = len(self.rings["radius"])
        self.history.append({"steps": 1 if jacobian is not None else 0,
                             "note": "the adopted intensity's line-centre offset and Jacobian reused"})
        if jacobian is None:
            return (BeamSolution(x0, np.inf, noise[:n], 0.0), np.zeros(n), np.zeros(n, bool)), smeared.field(x0) + d
        speeds = self.speeds_of(smeared.field(x0) + d)
        step = solve_smooth_correction(jacobian, speeds - jacobian @ x0[:n], x0[:n], target[:n], noise[:n],
                                       np.eye(n)[:, free], n)
        x = x0.copy()
        x[:n] = step.x
        return (BeamSolution(x, step.smoothing, step.noise, step.chi_square), speeds - x0[:n], free), \
            smeared.field(x) + d
