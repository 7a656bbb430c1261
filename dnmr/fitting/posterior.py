"""Bayesian errors of one spectrum fit: posterior samples of its free parameters.

Optional: needs the emcee package (``pip install emcee``, or the ``bayes`` extra); the sampler, the chain
and its diagnostics are those of :mod:`dnmr.posterior`.

One spectrum (:func:`sample_spectrum_posterior`)
------------------------------------------------
lmfit's emcee route (``lmfit.Minimizer.emcee``) from the least-squares optimum.  The noise is taken as
known: the log-likelihood is

    ln L = -chi^2 / (2 s),    chi^2 = sum ((data - fit) / sigma)^2,

with sigma the fit's noise estimate and s its error scale (the correlation factor of the noise, times
the reduced chi-square when the fit is a misfit; see :mod:`dnmr.fitting.spectrumfit`).  The curvature of ln L at the
optimum is then exactly the inverse of the covariance the least-squares fit reports, so for a
well-determined rate the posterior and the least-squares error agree (Laplace approximation), and where
they differ the posterior is the better account.  Priors are flat within each parameter's bounds, which
for a rate means flat in log10 k between ``rate_limits_per_s``.  A rate the chi-square profile only bounds
is reported as the one-sided 95 % bound of its posterior (95th percentile for an upper bound, 5th for a
lower one), never with a median and error bar: the posterior there is the prior, and how much of it lies
below the bound depends on where the prior range ends.
"""
from __future__ import annotations

import contextlib
import io
import math
import re
from collections.abc import Callable, Sequence
from pathlib import Path

import lmfit
import numpy as np

import dnmr  # for annotations only: the fit's class is named through the public API (no import circle)
from dnmr.errors import InputError
from dnmr.fitting.parameters import ParameterLayout
from dnmr.fitting.problem import FitProblem
from dnmr.fitting.workers import single_threaded_blas
from dnmr.posterior import (
    BOUND_KINDS,
    Posterior,
    Quantity,
    posterior_from_chain,
    require_emcee,
    sampler_settings,
    starting_ball,
)

#: Quantities the pairwise posterior figure of a fit shows at most.
PAIRS_MAX = 6
#: Rate statuses of a fit whose posterior is summarised by a one-sided bound, or not at all.
NOT_INTERVALS = BOUND_KINDS + ("undetermined",)


def _label(name: str) -> tuple[str, str]:
    """Axis label and unit of a fit parameter (see the parameter names in :mod:`dnmr.fitting.spectrumfit`)."""
    patterns = (
        (r"log10_rate_(.+)", "{0}: log10(k / s⁻¹)", ""),
        (r"linewidth_hz_(.+)", "linewidth {0} / Hz", "Hz"),
        (r"shift_ppm_(.+)", "shift {0} / ppm", "ppm"),
        (r"population_(.+)", "population {0}", ""),
        (r"phase([01])_deg", "phase{0} / °", "deg"),
        (r"offset_hz", "offset / Hz", "Hz"),
    )
    for pattern, label, unit in patterns:
        match = re.fullmatch(pattern, name)
        if match:
            return label.format(*match.groups()), unit
    return name, ""


def _fit_covariance(fit: "dnmr.SpectrumFit", names: Sequence[str]) -> np.ndarray:
    """Covariance of the free parameters from their (scaled) errors and correlations; a small spread
    where an error is not known."""
    pars = [fit.lmfit_parameters[n] for n in names]

    def spread(p) -> float:
        span = p.max - p.min
        if p.stderr is None or not (np.isfinite(p.stderr) and p.stderr > 0):
            return 0.01 * span if np.isfinite(span) else 1e-3 * (abs(p.value) + 1.0)
        return min(p.stderr, 0.25 * span)

    err = np.array([spread(p) for p in pars])
    corr = np.eye(len(names))
    for i, p in enumerate(pars):
        for j, other in enumerate(names):
            if i != j and p.correl and other in p.correl and np.isfinite(p.correl[other]):
                corr[i, j] = p.correl[other]
    return corr * np.outer(err, err)


def sample_spectrum_posterior(
    fit: "dnmr.SpectrumFit",
    *,
    steps: int = 4000,
    walkers: int | None = None,
    burn: int | None = None,
    thin: int = 1,
    seed: int | None = 0,
    progress: Callable[[int, int], None] | None = None,
) -> Posterior:
    """Posterior samples of the free parameters of one spectrum fit (lmfit's emcee route).

    The likelihood is exp(-chi^2 / (2 s)) with the fit's noise sigma and error scale s (module notes);
    priors are flat within the parameters' bounds; the walkers start about the least-squares optimum,
    spread by half its errors.  Slow: every step evaluates the lineshape once per walker.

    Parameters
    ----------
    fit : SpectrumFit
        The least-squares fit (:func:`dnmr.fitting.spectrumfit.fit_spectrum`), from which the data, noise, model and
        bounds are taken.
    steps : int
        Steps of every walker (burn-in included).
    walkers : int, optional
        Walkers of the ensemble (at least twice the free parameters; default 32, or two per free
        parameter and two more where that is more).
    burn : int, optional
        Steps discarded at the start (default steps // 4).
    thin : int
        Keep every thin-th step after the burn-in.
    seed : int or None
        Seed of the starting positions and of the sampler (None: fresh each call).
    progress : callable, optional
        Called as progress(step, steps) after every step.

    Returns
    -------
    Posterior
        Quantities: every free parameter (``log10_rate_<process>`` in log10 of s^-1, linewidths in Hz...)
        and ``rate_per_s_<process>`` (s^-1) for every free rate.  A rate the profile classified as a
        bound is summarised by its one-sided 95 % bound.
    """
    require_emcee()
    layout = ParameterLayout.for_model(fit.best_model, fit.options)
    problem = FitProblem(layout, fit.ppm, fit.data, fit.noise)
    params = fit.lmfit_parameters.copy()
    free = [n for n, p in params.items() if p.vary and not p.expr]
    if not free:
        raise InputError("the fit has no free parameters to sample", where="parameters")
    walkers, burn = sampler_settings(steps, walkers, burn, thin, len(free))
    rate_of = {name: r for name, r in zip(layout.rate_names, fit.rates)}
    start = _walker_starts(np.random.default_rng(seed), fit, params, free, rate_of, walkers)
    residual = _scaled_residual(problem, fit.error_scale, walkers, steps, progress)
    result = _run_emcee(residual, params, start, steps, walkers, seed)
    if progress is not None:
        progress(steps, steps)
    chain = np.asarray(result.chain)[:, :, [result.var_names.index(n) for n in free]]
    full, quantities = _with_rates(chain, params, free, rate_of)
    shown = _most_correlated(chain[burn:].reshape(-1, len(free)), free, [n for n in free if n in rate_of])
    where = f" at {fit.temperature_k:g} K" if fit.temperature_k else ""
    likelihood = (f"exp(-chi^2 / (2 s)), chi^2 with the fit's noise sigma = {fit.noise.sigma:.4g} "
                  f"({fit.noise.method}) and error scale s = {fit.error_scale:.3g}; flat priors within the "
                  "parameters' bounds (log10 k flat between the rate limits)")
    return posterior_from_chain(full, quantities, acceptance=float(np.mean(result.acceptance_fraction)),
                                walkers=walkers, steps=steps, burn=burn, thin=thin, seed=seed, likelihood=likelihood,
                                shown=shown, title=f"the fit of {Path(fit.source).name or 'the spectrum'}{where}")


def _walker_starts(rng: np.random.Generator, fit: "dnmr.SpectrumFit", params: lmfit.Parameters, free: list[str],
                   rate_of: dict, walkers: int) -> np.ndarray:
    """Starting positions about the least-squares optimum, spread by half its errors; a bound rate's walkers
    spread over its flat stretch instead, not piled at its end."""
    low = np.array([params[n].min for n in free], float)
    high = np.array([params[n].max for n in free], float)
    centre = np.array([params[n].value for n in free])
    start = starting_ball(rng, centre, 0.25 * _fit_covariance(fit, free), walkers, low, high)
    for j, n in enumerate(free):
        r = rate_of.get(n)
        if r is not None and r.status in NOT_INTERVALS:
            a = math.log10(r.rate_lower) if r.status == "lower-bound" else low[j]
            b = math.log10(r.rate_upper) if r.status == "upper-bound" else high[j]
            start[:, j] = rng.uniform(a, b, walkers)
    return start


def _scaled_residual(problem: FitProblem, error_scale: float, walkers: int, steps: int,
                     progress: Callable[[int, int], None] | None) -> Callable:
    """The fit's residual divided by the square root of its error scale (1e3 everywhere for a model out of
    range), reporting progress once per step of the ensemble."""
    root_scale = math.sqrt(error_scale)
    calls = [0]

    def residual(p):
        calls[0] += 1
        if progress is not None and calls[0] % walkers == 1 and calls[0] > 1:
            progress(min(calls[0] // walkers, steps), steps)
        r = problem.residual(p)
        return r / root_scale if np.isfinite(r).all() else np.full(r.size, 1e3)  # as for a model out of range

    return residual


def _run_emcee(residual: Callable, params: lmfit.Parameters, start: np.ndarray, steps: int, walkers: int,
               seed: int | None) -> lmfit.minimizer.MinimizerResult:
    """lmfit's emcee route from `start`, on one BLAS thread, its printed warnings swallowed."""
    minimizer = lmfit.Minimizer(residual, params, nan_policy="propagate")
    with contextlib.redirect_stdout(io.StringIO()), single_threaded_blas():  # lmfit prints emcee's tau warning
        return minimizer.emcee(params=params, steps=steps, nwalkers=walkers, burn=0, thin=1, is_weighted=True,
                               pos=start, seed=None if seed is None else int(seed), progress=False)


def _with_rates(chain: np.ndarray, params: lmfit.Parameters, free: list[str],
                rate_of: dict) -> tuple[np.ndarray, list[Quantity]]:
    """The chain with a column k (s^-1) for every free rate, and the quantities of all columns: a rate the
    profile classified as a bound (or undetermined) keeps that kind and its reason."""
    quantities = [Quantity(n, *_label(n), prior_range=(float(params[n].min), float(params[n].max))) for n in free]
    derived = []
    for j, n in enumerate(free):
        if n not in rate_of:
            continue
        r = rate_of[n]
        kind = r.status if r.status in NOT_INTERVALS else "interval"
        q = quantities[j]
        reason = r.reason if kind != "interval" else ""
        quantities[j] = Quantity(q.name, q.label, q.unit, kind, q.prior_range, reason)
        quantities.append(Quantity(f"rate_per_s_{n[len('log10_rate_'):]}", f"{r.process}: k / s⁻¹", "s^-1", kind,
                                   (10.0 ** q.prior_range[0], 10.0 ** q.prior_range[1]), reason, flat_prior=False))
        derived.append(10.0 ** chain[:, :, j])
    full = np.concatenate([chain] + [d[:, :, None] for d in derived], axis=2) if derived else chain
    return full, quantities


def _most_correlated(samples: np.ndarray, names: Sequence[str], first: Sequence[str]) -> tuple[str, ...]:
    """The names `first`, then the others by their largest |correlation| with them, PAIRS_MAX in all."""
    if not first:
        return tuple(names[:PAIRS_MAX])
    corr = np.nan_to_num(np.corrcoef(samples.T)) if samples.shape[1] > 1 else np.ones((1, 1))
    corr = np.atleast_2d(corr)
    idx = [names.index(n) for n in first]
    others = sorted((j for j in range(len(names)) if j not in idx), key=lambda j: -np.abs(corr[idx, j]).max())
    return tuple(names[j] for j in (idx + others)[:PAIRS_MAX])
