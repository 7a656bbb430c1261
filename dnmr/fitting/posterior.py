"""Bayesian errors of one spectrum fit: posterior samples of its free parameters.

The samplers, the samples and their diagnostics are those of :mod:`dnmr.posterior`; the ensemble needs the
emcee package (``pip install emcee``, or the ``bayes`` extra).

One spectrum (:func:`sample_spectrum_posterior`)
------------------------------------------------
The noise is taken as known: the log-likelihood is

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

Because the least-squares fit is already the Laplace approximation of this posterior, it makes a close
proposal for importance sampling (the default, :mod:`dnmr.importance`): a Student t about the optimum with
1.2^2 x the fit's covariance (the inverse of the curvature J^T J / s at the optimum; heavier tails than
the posterior's, so the weights stay bounded).  A rate the profile only bounds is drawn along its own
chi-square profile between its limits, in proportion to exp(-delta chi^2 / (2 s)) of the optimum at each
value (a fifth uniformly), and the others' centre follows that optimum (refined at 25 values of the rate and
between them where it moves: near its bound the rate trades against the linewidth).  Where the curvature
misjudges the posterior (a parameter at a bound), the proposal adapts to the weighted draws.  Each draw costs one lineshape
evaluation, 4000 draws by default, against walkers x steps for an ensemble; the weights' effective number
and Pareto shape tell how far to trust them, and where the shape passes 0.7 the posterior is sampled
again by emcee's ensemble from the least-squares optimum, with a note.  Given an executor, both samplers
evaluate their lineshapes there (the draws, and each half of the walkers at every step), while the random
numbers are drawn here, so that the samples do not depend on where they were evaluated.
"""
from __future__ import annotations

import concurrent.futures as futures
import math
import re
import threading
from collections.abc import Callable, Sequence
from pathlib import Path

import lmfit
import numpy as np

import dnmr  # for annotations only: the fit's class is named through the public API (no import circle)
from dnmr.errors import InputError
from dnmr.fitting.parameters import ParameterLayout
from dnmr.fitting.problem import FitProblem, refine
from dnmr.fitting.workers import SharedPayload, single_threaded_blas
from dnmr.importance import FlatProfile, StudentProposal, posterior_from_draws, sample_by_importance
from dnmr.posterior import (
    BOUND_KINDS,
    PARETO_LIMIT,
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
#: The samplers of :func:`sample_spectrum_posterior`.
METHODS = ("importance", "emcee")
#: Draws of importance sampling unless asked otherwise.
DEFAULT_DRAWS = 4000
#: The proposal's scale is the fit's covariance (then the weighted draws') times the square of this.
PROPOSAL_WIDTH = 1.2
#: Values of a bound rate at which the optimum of the other parameters is refined for the proposal first,
#: then halfway between two where it moves by more than PATH_STEP of the proposal's spread, PATH_MOST_POINTS
#: values in all at most.
PATH_POINTS = 25
PATH_STEP = 0.5
PATH_MOST_POINTS = 100
#: Only where chi-square is within this many error scales of the fit's does the path matter (5 sigma).
PATH_REACH = 25.0
#: Draws of importance sampling, and walkers of the ensemble, evaluated by one task on an executor (each a
#: lineshape evaluation; the ensemble evaluates half its walkers at a time and waits for them).
DRAWS_PER_TASK = 50
WALKERS_PER_TASK = 4


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
    method: str = "importance",
    draws: int = DEFAULT_DRAWS,
    steps: int = 4000,
    walkers: int | None = None,
    burn: int | None = None,
    thin: int = 1,
    seed: int | None = 0,
    progress: Callable[[int, int], None] | None = None,
    executor: futures.Executor | None = None,
) -> Posterior:
    """Posterior samples of the free parameters of one spectrum fit.

    The likelihood is exp(-chi^2 / (2 s)) with the fit's noise sigma and error scale s (module notes);
    priors are flat within the parameters' bounds.  By default importance sampling from the least-squares
    fit (module notes: one lineshape evaluation per draw), which falls back to emcee's ensemble where its
    weights say it is not reliable; ``method="emcee"`` asks for the ensemble, whose walkers start about the
    least-squares optimum (slow: every step evaluates the lineshape once per walker).

    Parameters
    ----------
    fit : SpectrumFit
        The least-squares fit (:func:`dnmr.fitting.spectrumfit.fit_spectrum`), from which the data, noise, model and
        bounds are taken.
    method : {"importance", "emcee"}
        Importance sampling from the fit (with the ensemble as its fallback), or the ensemble.
    draws : int
        Draws of importance sampling (at least 100).
    steps : int
        Steps of every walker of the ensemble (burn-in included).
    walkers : int, optional
        Walkers of the ensemble (at least twice the free parameters; default 32, or two per free
        parameter and two more where that is more).
    burn : int, optional
        Steps of the ensemble discarded at the start (default steps // 4).
    thin : int
        Keep every thin-th step of the ensemble after the burn-in.
    seed : int or None
        Seed of the draws, the resampling, the walkers' starts and the ensemble (None: fresh each call).
    progress : callable, optional
        Called as progress(done, total) after every draw (importance; with `executor` after every stage of
        draws) or step (ensemble).
    executor : concurrent.futures.Executor, optional
        Where the lineshapes are evaluated (a process pool, a Dask client's ``get_executor()``...; left
        running): the draws of importance sampling, :data:`DRAWS_PER_TASK` to a task, or each half of the
        ensemble's walkers at every step, :data:`WALKERS_PER_TASK` to a task.  The draws and the walkers' moves are made here from the seed, so
        the samples are the same as in this process.

    Returns
    -------
    Posterior
        Quantities: every free parameter (``log10_rate_<process>`` in log10 of s^-1, linewidths in Hz...)
        and ``rate_per_s_<process>`` (s^-1) for every free rate.  A rate the profile classified as a
        bound is summarised by its one-sided 95 % bound.
    """
    if method not in METHODS:
        raise InputError(f"method must be one of {', '.join(METHODS)}, got {method!r}", where="method")
    layout = ParameterLayout.for_model(fit.best_model, fit.options)
    setup = _Setup(fit, FitProblem(layout, fit.ppm, fit.data, fit.noise), fit.lmfit_parameters.copy(),
                   {name: r for name, r in zip(layout.rate_names, fit.rates)})
    if not setup.free:
        raise InputError("the fit has no free parameters to sample", where="parameters")
    notes = []
    if method == "importance":
        if isinstance(draws, bool) or not isinstance(draws, (int, np.integer)) or draws < 100:
            raise InputError(f"draws must be a whole number of at least 100, got {draws!r}", where="draws")
        post = _importance_posterior(setup, int(draws), seed, progress, executor)
        if not post.importance["pareto_k"] > PARETO_LIMIT:
            return post
        notes.append(f"importance sampling from the fit was not reliable here (Pareto shape of its weights "
                     f"{post.importance['pareto_k']:.2f} > {PARETO_LIMIT}): sampled with the emcee ensemble instead")
    require_emcee()
    return _ensemble_posterior(setup, steps, walkers, burn, thin, seed, progress, notes, executor)


class _Setup:
    """What both samplers take from a fit: its problem, parameters (a copy), free names, rates by parameter
    name, bounds, and the words for the likelihood and the title."""

    def __init__(self, fit: "dnmr.SpectrumFit", problem: FitProblem, params: lmfit.Parameters, rate_of: dict):
        self.fit, self.problem, self.params, self.rate_of = fit, problem, params, rate_of
        self.free = [n for n, p in params.items() if p.vary and not p.expr]
        self.low = np.array([params[n].min for n in self.free], float)
        self.high = np.array([params[n].max for n in self.free], float)
        self.centre = np.array([params[n].value for n in self.free])
        where = f" at {fit.temperature_k:g} K" if fit.temperature_k else ""
        self.title = f"the fit of {Path(fit.source).name or 'the spectrum'}{where}"
        self.likelihood = (f"exp(-chi^2 / (2 s)), chi^2 with the fit's noise sigma = {fit.noise.sigma:.4g} "
                           f"({fit.noise.method}) and error scale s = {fit.error_scale:.3g}; flat priors within the "
                           "parameters' bounds (log10 k flat between the rate limits)")

    def flat(self) -> np.ndarray:
        """Which free parameters are rates the profile only bounds (or could not determine)."""
        return np.array([n in self.rate_of and self.rate_of[n].status in NOT_INTERVALS for n in self.free])


def _ensemble_posterior(setup: _Setup, steps: int, walkers: int | None, burn: int | None, thin: int, seed: int | None,
                        progress: Callable[[int, int], None] | None, notes: list[str],
                        executor: futures.Executor | None) -> Posterior:
    """The posterior by emcee's ensemble, the walkers about the least-squares optimum, evaluated on `executor`
    when one is given."""
    free, params, rate_of = setup.free, setup.params, setup.rate_of
    walkers, burn = sampler_settings(steps, walkers, burn, thin, len(free))
    start = _walker_starts(np.random.default_rng(seed), setup.fit, params, free, rate_of, walkers)
    with _Evaluation(_LogPosterior(setup), executor, WALKERS_PER_TASK) as evaluate:
        chain, acceptance = _run_emcee(evaluate, start, steps, seed, progress)
    full, quantities = _with_rates(chain, params, free, rate_of)
    shown = _most_correlated(chain[burn:].reshape(-1, len(free)), free, [n for n in free if n in rate_of])
    return posterior_from_chain(full, quantities, acceptance=acceptance,
                                walkers=walkers, steps=steps, burn=burn, thin=thin, seed=seed,
                                likelihood=setup.likelihood, shown=shown, title=setup.title, notes=notes)


def _importance_posterior(setup: _Setup, draws: int, seed: int | None, progress: Callable[[int, int], None] | None,
                          executor: futures.Executor | None) -> Posterior:
    """The posterior by importance sampling from the fit (module notes), its draws evaluated on `executor`
    when one is given."""
    log_posterior = _LogPosterior(setup)
    with _Evaluation(log_posterior, executor, DRAWS_PER_TASK) as evaluate, single_threaded_blas():
        x, log_weights, adapted = sample_by_importance(log_posterior, _fit_proposal(setup), draws,
                                                       np.random.default_rng(seed), PROPOSAL_WIDTH, progress,
                                                       None if executor is None else lambda _, rows: evaluate(rows))
    full, quantities = _with_rates(x[:, None, :], setup.params, setup.free, setup.rate_of)
    shown = _most_correlated(x, setup.free, [n for n in setup.free if n in setup.rate_of])
    words = (f"a Student t about the least-squares optimum with {PROPOSAL_WIDTH:g}^2 x its covariance"
             + (", rates that are only bounded drawn along their chi-square profile between their limits (a fifth uniformly)"
                if setup.flat().any() else "")
             + (f"; adapted {adapted} time{'s' if adapted > 1 else ''} to the weighted draws" if adapted else ""))
    return posterior_from_draws(full[:, 0, :], log_weights, quantities, proposal=words, seed=seed,
                                title=setup.title, likelihood=setup.likelihood, shown=shown)


def _fit_proposal(setup: _Setup) -> StudentProposal:
    """The first proposal (module notes): about the optimum with PROPOSAL_WIDTH^2 x the inverse of the
    curvature J^T J / s of the parameters other than the flat rates; the flat rates uniform between their
    limits, the others' centre following their optimum as each flat rate moves (its profile)."""
    flat = setup.flat()
    peaked = ~flat
    jacobian = _jacobian_at_optimum(setup)[:, peaked]
    norms = np.linalg.norm(jacobian, axis=0)
    norms = np.where(norms > 0, norms, 1.0)  # columns scaled to one: their sizes differ by many decades
    unit = jacobian / norms
    scale = PROPOSAL_WIDTH ** 2 * setup.fit.error_scale * np.linalg.pinv(unit.T @ unit, hermitian=True) / np.outer(norms, norms)
    profiles = tuple(_rate_profile(setup, j, peaked, np.sqrt(np.diag(scale))) for j in np.flatnonzero(flat))
    return StudentProposal(setup.centre, scale, peaked, setup.low, setup.high, profiles)


def _jacobian_at_optimum(setup: _Setup) -> np.ndarray:
    """d residual / d free parameter at the least-squares optimum: exact where the fit problem has it, else
    central differences (steps of a hundredth of a standard error, or 1e-6 of the value)."""
    params = setup.params.copy()
    if setup.problem.exact_jacobian:
        return setup.problem.jacobian(params)
    columns = []
    for name in setup.free:
        par = params[name]
        step = 0.01 * par.stderr if par.stderr and np.isfinite(par.stderr) and par.stderr > 0 else 1e-6 * max(abs(par.value), 1.0)
        ends = []
        for sign in (1.0, -1.0):
            moved = params.copy()
            moved[name].set(value=par.value + sign * step)
            moved.update_constraints()
            ends.append(setup.problem.residual(moved))
        columns.append((ends[0] - ends[1]) / (2.0 * step))
    return np.column_stack(columns)


def _rate_profile(setup: _Setup, j: int, peaked: np.ndarray, spread: np.ndarray) -> FlatProfile:
    """How the optimum of the peaked parameters moves with flat rate `j`, and how high the posterior is there:
    refined at PATH_POINTS values of it between its limits (each from its neighbour's optimum, outwards from
    the fit's), then halfway between neighbours whose optima differ by more than PATH_STEP of the proposal's
    `spread`, where the posterior has mass (chi-square within PATH_REACH x s of the fit's at either end), up
    to PATH_MOST_POINTS."""
    grid = list(np.linspace(setup.low[j], setup.high[j], PATH_POINTS))
    first = int(np.argmin(np.abs(np.array(grid) - setup.centre[j])))
    optima = {}
    for order in (range(first, len(grid)), range(first - 1, -1, -1)):
        start = setup.params
        for i in order:
            optima[grid[i]] = _optimum_at(setup, j, grid[i], start)
            start = optima[grid[i]][1]
    reach = setup.fit.chi_square + PATH_REACH * setup.fit.error_scale
    while len(optima) < PATH_MOST_POINTS:
        values = sorted(optima)
        moves = [_moves(setup, optima[v][1], peaked) for v in values]
        jumps = [float(np.max(np.abs(b - a) / spread)) if min(optima[u][0], optima[v][0]) < reach else 0.0
                 for a, b, u, v in zip(moves, moves[1:], values, values[1:])]
        worst = int(np.argmax(jumps))
        if jumps[worst] <= PATH_STEP:
            break
        middle = 0.5 * (values[worst] + values[worst + 1])
        optima[middle] = _optimum_at(setup, j, middle, optima[values[worst]][1])
    values = sorted(optima)
    chi_square = np.array([optima[v][0] for v in values])
    heights = np.exp(-0.5 * (chi_square - chi_square.min()) / setup.fit.error_scale)
    return FlatProfile(int(j), np.array(values), np.array([_moves(setup, optima[v][1], peaked) for v in values]), heights)


def _optimum_at(setup: _Setup, j: int, value: float, start: lmfit.Parameters) -> tuple[float, lmfit.Parameters]:
    """Chi-square and the least-squares optimum with free parameter `j` held at `value`, refined from `start`."""
    params = start.copy()
    params[setup.free[j]].set(value=float(value), vary=False)
    return refine(setup.problem, params, tolerance=1e-5)


def _moves(setup: _Setup, params: lmfit.Parameters, peaked: np.ndarray) -> np.ndarray:
    """How far the peaked parameters of `params` lie from the fit's optimum."""
    return np.array([params[n].value for n in setup.free])[peaked] - setup.centre[peaked]


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


class _ScaledResidual:
    """The fit's residual divided by the square root of its error scale (1e3 everywhere for a model out of
    range); picklable, for the workers of an executor.

    Parameters
    ----------
    problem : FitProblem
        The fit's problem.
    error_scale : float
        The fit's error scale s (dimensionless).
    """

    def __init__(self, problem: FitProblem, error_scale: float):
        self.problem, self.root_scale = problem, math.sqrt(error_scale)

    def __call__(self, params: lmfit.Parameters) -> np.ndarray:
        r = self.problem.residual(params)
        return r / self.root_scale if np.isfinite(r).all() else np.full(r.size, 1e3)  # as for a model out of range


class _LogPosterior:
    """ln posterior at a point of the free parameters (module notes): -chi^2 / (2 s) within the parameters'
    bounds (flat priors), -inf outside.  Picklable, for the workers of an executor; each thread moves a copy
    of the parameters of its own."""

    def __init__(self, setup: _Setup):
        self.residual = _ScaledResidual(setup.problem, setup.fit.error_scale)
        self.params, self.free, self.low, self.high = setup.params.copy(), tuple(setup.free), setup.low, setup.high
        self.local = threading.local()

    def __getstate__(self) -> dict:
        return {name: value for name, value in self.__dict__.items() if name != "local"}

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state, local=threading.local())

    def __call__(self, x: np.ndarray) -> float:
        if np.any(x < self.low) or np.any(x > self.high):
            return -math.inf
        params = getattr(self.local, "params", None)
        if params is None:
            params = self.local.params = self.params.copy()
        for name, value in zip(self.free, x):
            params[name].value = float(value)
        params.update_constraints()
        r = self.residual(params)
        return -0.5 * float(r @ r)


def _log_posteriors(log_posterior: _LogPosterior, rows: np.ndarray) -> np.ndarray:
    """ln posterior at every row of `rows` (points of the free parameters)."""
    return np.array([log_posterior(row) for row in rows], dtype=float)


class _Evaluation:
    """The ln posterior of many points at once: in this process, or on an executor in tasks of `per_task`
    points, `log_posterior` sent once to each worker process.  A context manager (the payload is dropped at
    its end)."""

    def __init__(self, log_posterior: _LogPosterior, executor: futures.Executor | None, per_task: int):
        self.log_posterior, self.per_task = log_posterior, per_task
        self.payload = None if executor is None else SharedPayload(log_posterior, executor)

    def __call__(self, rows: np.ndarray) -> np.ndarray:
        if self.payload is None:
            return _log_posteriors(self.log_posterior, rows)
        chunks = np.array_split(rows, max(1, math.ceil(len(rows) / self.per_task)))
        return np.concatenate(self.payload.map(_log_posteriors, [(chunk,) for chunk in chunks]))

    def __enter__(self) -> "_Evaluation":
        return self

    def __exit__(self, *exc) -> None:
        if self.payload is not None:
            self.payload.close()


def _run_emcee(evaluate: _Evaluation, start: np.ndarray, steps: int, seed: int | None,
               progress: Callable[[int, int], None] | None) -> tuple[np.ndarray, float]:
    """emcee's ensemble from `start` (walkers x parameters), each half of the walkers evaluated at once by
    `evaluate`, on one BLAS thread: the chain (steps, walkers, parameters) and the mean acceptance fraction.
    Progress is reported once per step."""
    emcee = require_emcee()
    walkers = start.shape[0]
    evaluated = [0]

    def log_probability(rows: np.ndarray) -> np.ndarray:
        values = evaluate(np.asarray(rows, dtype=float))
        before = evaluated[0] // walkers - 1  # steps done (the first call evaluates the start)
        evaluated[0] += len(values)
        done = evaluated[0] // walkers - 1
        if progress is not None and before < done <= steps:
            progress(done, steps)
        return values

    sampler = emcee.EnsembleSampler(walkers, start.shape[1], log_probability, vectorize=True)
    if seed is not None:
        sampler.random_state = np.random.RandomState(seed).get_state()
    with single_threaded_blas():
        sampler.run_mcmc(start, steps, progress=False)
    return sampler.get_chain(), float(np.mean(sampler.acceptance_fraction))


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
