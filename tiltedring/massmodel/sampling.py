"""Posterior sampling of a mass model with emcee (Foreman-Mackey et al. 2013, PASP 125, 306; optional).

The log posterior is -chi^2 / 2 (data and priors, the residuals of the least-squares problem) inside
the bounds. The walkers start in a small ball around the least-squares solution; the first third of
each chain is discarded. The integrated autocorrelation time tau of each parameter is measured on the
kept chain with emcee's ``get_autocorr_time(tol=0)`` (Goodman & Weare 2010; Sokal's windowing); a
chain shorter than 50 tau (emcee's documentation, common practice) gives posterior widths that are
not yet reliable, and says so.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

__all__ = ["sample_posterior", "MIN_STEPS_PER_TAU"]

MIN_STEPS_PER_TAU = 50


def sample_posterior(residuals, q, err, lower, upper, names, n_walkers=32, n_steps=1500, seed=0, quiet=True):
    """(flat samples of the kept chain, summary) where the summary holds tau per parameter, the steps kept, the
    steps per tau of the slowest parameter, and a caution when that is below :data:`MIN_STEPS_PER_TAU`."""
    try:
        import emcee
    except ImportError:
        raise InputError("posterior sampling needs emcee: pip install emcee") from None
    from ..fitting.resampling import Progress

    lower, upper = np.asarray(lower), np.asarray(upper)

    def log_prob(p):
        if np.any(p <= lower) or np.any(p >= upper):
            return -np.inf
        return -0.5 * float(np.sum(residuals(p) ** 2))

    rng = np.random.default_rng(seed)
    spread = np.where(np.isfinite(err) & (err > 0), err, 0.01) * 0.1
    p0 = np.clip(q + spread * rng.standard_normal((n_walkers, len(q))), lower + 1e-9, upper - 1e-9)
    sampler = emcee.EnsembleSampler(n_walkers, len(q), log_prob)
    sampler.random_state = np.random.mtrand.RandomState(seed).get_state()  # repeatable chains
    progress = Progress("sampling posterior", n_steps, quiet=quiet)
    for k, _ in enumerate(sampler.sample(p0, iterations=n_steps), start=1):
        progress.update(k)
    progress.close()
    discard = n_steps // 3
    tau = np.asarray(sampler.get_autocorr_time(discard=discard, tol=0), float)
    kept = n_steps - discard
    per_tau = float(kept / np.nanmax(tau)) if np.all(np.isfinite(tau)) and np.nanmax(tau) > 0 else np.nan
    summary = {"walkers": int(n_walkers), "steps": int(n_steps), "steps_kept": int(kept),
               "autocorrelation_time": {name: float(t) for name, t in zip(names, tau)},
               "steps_per_autocorrelation_time": per_tau,
               "acceptance_fraction": float(np.mean(sampler.acceptance_fraction))}
    if not per_tau >= MIN_STEPS_PER_TAU:
        slowest = names[int(np.nanargmax(tau))] if np.any(np.isfinite(tau)) else names[0]
        summary["caution"] = (f"the posterior chain is short: {kept} kept steps are {per_tau:.1f} autocorrelation "
                              f"times of {slowest} (tau = {np.nanmax(tau):.1f} steps), fewer than {MIN_STEPS_PER_TAU}; "
                              f"the sampled errors are not reliable: run about {int(np.ceil(MIN_STEPS_PER_TAU * np.nanmax(tau) * 1.5))} "
                              "steps (--steps)")
    return sampler.get_chain(discard=discard, flat=True), summary
