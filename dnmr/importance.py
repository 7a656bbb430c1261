"""Importance sampling: a Student t proposal, weights, their diagnostics, and the :class:`~dnmr.posterior.Posterior`
the resampled draws make.

Independent draws from a proposal q carry the weights w = p / q of the posterior p (known up to a constant,
which the normalised weights do not need).  Their effective number is (sum w)^2 / sum w^2 (Kish's effective
sample size).  Whether the weights are trustworthy at all is read off their largest values: a generalised
Pareto distribution fitted to the largest min(20 %, 3 sqrt(S)) of S weights has a shape k; below 0.7 the
estimates converge at a usable rate, above it they may not (Vehtari, Simpson, Gelman, Yao & Gabry, JMLR 25,
1 (2024), "Pareto smoothed importance sampling"; the fit is scipy's maximum-likelihood one).

The proposal adapts (population Monte Carlo, Cappé, Guillin, Marin & Robert, J. Comput. Graph. Stat. 13,
907 (2004)): a fifth of the draws come from the first proposal; where fewer than a third of the draws so
far are effective, the next fifth come from a Student t with the weighted mean and covariance of all draws
so far, twice at most, and the rest from the last proposal.  Every draw is weighted against the mixture of
the proposals in the proportions drawn (the balance heuristic: Veach & Guibas, SIGGRAPH 1995; Owen & Zhou,
J. Am. Stat. Assoc. 95, 135 (2000)), which keeps the first proposal's tails under the weights even where
a later one is too narrow.  The draws are then
resampled in proportion to their weights (systematic resampling, Kitagawa, J. Comput. Graph. Stat. 5, 1
(1996)), so that the samples, their quantiles and figures are read as those of a chain.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from dnmr.posterior import PARETO_LIMIT, Posterior, Quantity, prior_edge_notes

MIN_EFFECTIVE_SAMPLES = 400  # below this many effective samples the 95 % quantiles are rough (a note says so)
STAGE_SHARE = 0.2  # share of the draws taken from a proposal before its efficiency is judged
ADAPT_BELOW = 1.0 / 3.0  # the proposal adapts when fewer than this share of the draws so far are effective
ADAPTATIONS = 2  # adaptations at most: then the rest of the draws come from the last proposal
DEGREES = 5  # degrees of freedom of every Student t proposal (tails heavier than a normal's)
DEFENSIVE = 0.2  # share of a flat profile's draws spread uniformly over its whole range, whatever the heights


@dataclass(frozen=True)
class FlatProfile:
    """What is known of the posterior along one flat coordinate of a :class:`StudentProposal`: at each of a
    grid of its values (ascending, from its low to its high end), how far the peaked coordinates' optimum
    lies from the proposal's centre (`moves`, grid x peaked) and how high the posterior is there (`heights`,
    relative: exp(-delta chi^2 / 2) of the optimum).  Linear between grid points."""

    index: int
    grid: np.ndarray
    moves: np.ndarray
    heights: np.ndarray

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """`n` values: a share :data:`DEFENSIVE` uniform over the grid's range, the rest in proportion to the
        heights (each interval by the mean of its ends, uniform within)."""
        masses = self._masses()
        pick = rng.choice(masses.size, size=n, p=masses / masses.sum())
        inside = self.grid[pick] + rng.uniform(size=n) * np.diff(self.grid)[pick]
        anywhere = rng.uniform(self.grid[0], self.grid[-1], n)
        return np.where(rng.uniform(size=n) < DEFENSIVE, anywhere, inside)

    def log_density(self, values: np.ndarray) -> np.ndarray:
        """ln of the density of :meth:`draw` at `values`."""
        masses = self._masses()
        widths = np.diff(self.grid)
        where = np.clip(np.searchsorted(self.grid, values, side="right") - 1, 0, widths.size - 1)
        shaped = masses[where] / widths[where] / masses.sum()
        return np.log(DEFENSIVE / (self.grid[-1] - self.grid[0]) + (1.0 - DEFENSIVE) * shaped)

    def centres(self, values: np.ndarray) -> np.ndarray:
        """How far the peaked coordinates' centre moves at each of `values`: (values, peaked)."""
        return np.column_stack([np.interp(values, self.grid, column) for column in self.moves.T])

    def _masses(self) -> np.ndarray:
        return 0.5 * (self.heights[1:] + self.heights[:-1]) * np.diff(self.grid)


@dataclass(frozen=True)
class StudentProposal:
    """A multivariate Student t (:data:`DEGREES` degrees of freedom) over the `peaked` coordinates with scale
    matrix `scale`; the others ("flat") between `low` and `high` (all in the units of their parameters):
    uniform, or as a :class:`FlatProfile` of `profiles` says, which also moves the t's `centre` with them."""

    centre: np.ndarray
    scale: np.ndarray
    peaked: np.ndarray
    low: np.ndarray
    high: np.ndarray
    profiles: tuple[FlatProfile, ...] = ()

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """`n` draws, shape (n, coordinates)."""
        values, vectors = self._eigen()
        z = rng.standard_normal((n, values.size))
        stretch = np.sqrt(DEGREES / rng.chisquare(DEGREES, n))[:, None]
        x = np.empty((n, self.centre.size))
        flat = ~self.peaked
        x[:, flat] = rng.uniform(self.low[flat], self.high[flat], (n, int(flat.sum())))
        for profile in self.profiles:
            x[:, profile.index] = profile.draw(rng, n)
        x[:, self.peaked] = self._centres(x) + ((z * np.sqrt(values)) @ vectors.T) * stretch
        return x

    def log_density(self, x: np.ndarray) -> np.ndarray:
        """ln q of each row of `x` (normalised)."""
        values, vectors = self._eigen()
        d = values.size
        delta = (x[:, self.peaked] - self._centres(x)) @ vectors / np.sqrt(values)
        shaped = [p.index for p in self.profiles]
        uniform = ~self.peaked
        uniform[shaped] = False
        return (special.gammaln(0.5 * (DEGREES + d)) - special.gammaln(0.5 * DEGREES)
                - 0.5 * d * math.log(DEGREES * math.pi) - 0.5 * np.log(values).sum()
                - 0.5 * (DEGREES + d) * np.log1p((delta * delta).sum(axis=1) / DEGREES)
                - np.log(self.high[uniform] - self.low[uniform]).sum()
                + sum(p.log_density(x[:, p.index]) for p in self.profiles))

    def adapted(self, x: np.ndarray, weights: np.ndarray, width: float) -> "StudentProposal":
        """The proposal moved by the weighted mean, its scale `width`^2 x the weighted covariance, of the
        draws `x` about their centres (the flat coordinates as they were)."""
        part = x[:, self.peaked] - self._centres(x)
        mean = weights @ part
        spread = (part - mean).T @ ((part - mean) * weights[:, None]) * width ** 2
        centre = self.centre.copy()
        centre[self.peaked] += mean
        return StudentProposal(centre, spread, self.peaked, self.low, self.high, self.profiles)

    def _centres(self, x: np.ndarray) -> np.ndarray:
        """The t's centre for each row of `x` (which sets the flat coordinates): (rows, peaked)."""
        out = np.repeat(self.centre[self.peaked][None, :], x.shape[0], axis=0)
        for profile in self.profiles:
            out += profile.centres(x[:, profile.index])
        return out

    def _eigen(self) -> tuple[np.ndarray, np.ndarray]:
        """Eigenvalues (floored at 1e-30 of the largest) and eigenvectors of the scale matrix."""
        values, vectors = np.linalg.eigh(0.5 * (self.scale + self.scale.T))
        return np.maximum(values, 1e-30 * max(values.max(initial=0.0), 1e-300)), vectors


#: How a caller may have the draws of a stage evaluated (on an executor, say): evaluate(log_likelihood, rows)
#: gives the ln posterior of every row of an (m, d) array.
Evaluation = Callable[[Callable[[np.ndarray], float], np.ndarray], np.ndarray]


def sample_by_importance(log_likelihood: Callable[[np.ndarray], float], proposal: StudentProposal, draws: int,
                         rng: np.random.Generator, width: float,
                         progress: Callable[[int, int], None] | None = None,
                         evaluate: Evaluation | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """Draws and their ln weights (up to a constant; -inf outside [low, high]) from `proposal`, adapted up to
    :data:`ADAPTATIONS` times while its draws are inefficient (module notes), and how often it adapted.
    The draws and the weights do not depend on how the ln posteriors are evaluated.

    Parameters
    ----------
    log_likelihood : callable
        ln of the posterior (up to a constant) at one point inside the prior's box.
    proposal : StudentProposal
        The first proposal; its `low` and `high` are the prior's box for every coordinate.
    draws : int
        Draws in all.
    rng : numpy Generator
        The random numbers.
    width : float
        An adapted proposal's scale is `width`^2 x the weighted covariance.
    progress : callable, optional
        Called as progress(done, draws) after every draw (with `evaluate`: after every stage).
    evaluate : callable, optional
        evaluate(log_likelihood, rows): the ln posterior of each row (an (m, d) array inside the box) all at
        once, for instance in the workers of an executor; default one after another in this process.
    """
    stage = max(1, int(STAGE_SHARE * draws))
    proposals, sizes = [proposal], [0]
    x, target = np.zeros((0, proposal.centre.size)), np.zeros(0)
    settled = False
    while x.shape[0] < draws:
        left = draws - x.shape[0]
        n = left if settled or len(proposals) > ADAPTATIONS else min(stage, left)
        more = proposals[-1].draw(rng, n)
        target = np.concatenate([target, _log_targets(log_likelihood, more, proposal, x.shape[0], draws, progress,
                                                      evaluate)])
        x = np.vstack([x, more])
        sizes[-1] += n
        log_weights = target - _mixture_log_density(x, proposals, sizes)
        if not settled and x.shape[0] < draws:
            weights = _normalised(log_weights)
            settled = effective_samples(weights) >= ADAPT_BELOW * x.shape[0]
            if not settled and len(proposals) <= ADAPTATIONS:
                proposals.append(proposals[-1].adapted(x, weights, width))
                sizes.append(0)
    return x, log_weights, len(proposals) - 1


def _mixture_log_density(x: np.ndarray, proposals: Sequence[StudentProposal], sizes: Sequence[int]) -> np.ndarray:
    """ln of the mixture of `proposals` in the proportions `sizes` at each draw (the balance heuristic)."""
    total = float(sum(sizes))
    return special.logsumexp([math.log(n / total) + q.log_density(x) for q, n in zip(proposals, sizes)], axis=0)


def _log_targets(log_likelihood: Callable[[np.ndarray], float], x: np.ndarray, box: StudentProposal, done: int,
                 total: int, progress: Callable[[int, int], None] | None, evaluate: Evaluation | None) -> np.ndarray:
    """ln posterior of each draw (-inf outside the box), reporting progress after each (after all of them
    with `evaluate`)."""
    inside = np.all((x >= box.low) & (x <= box.high), axis=1)
    out = np.full(x.shape[0], -np.inf)
    if evaluate is not None:
        out[inside] = evaluate(log_likelihood, x[inside])
        if progress is not None:
            progress(done + x.shape[0], total)
        return out
    for i in range(x.shape[0]):
        if inside[i]:
            out[i] = log_likelihood(x[i])
        if progress is not None:
            progress(done + i + 1, total)
    return out


def _normalised(log_weights: np.ndarray) -> np.ndarray:
    """Weights summing to 1 from their logarithms (all -inf: all zero)."""
    top = np.max(log_weights)
    if not np.isfinite(top):
        return np.zeros_like(log_weights)
    weights = np.exp(log_weights - top)
    return weights / weights.sum()


def effective_samples(weights: np.ndarray) -> float:
    """Kish's effective sample size (sum w)^2 / sum w^2 of importance weights (0 when all are zero)."""
    total = float(np.sum(weights))
    return total * total / float(np.sum(weights * weights)) if total > 0 else 0.0


def pareto_shape(weights: np.ndarray) -> float:
    """Shape k of a generalised Pareto distribution fitted (scipy, maximum likelihood) to the largest
    min(20 %, 3 sqrt(S)) of S importance weights above the next one (module notes; reliable below
    :data:`~dnmr.posterior.PARETO_LIMIT`).  inf when fewer than five weights are positive; -inf when the
    largest are all equal."""
    w = np.sort(np.asarray(weights, dtype=float))
    w = w[w > 0]
    tail = int(min(0.2 * w.size, 3.0 * math.sqrt(w.size)))
    if tail < 5:
        return math.inf
    exceed = w[-tail:] - w[-tail - 1]
    if not exceed.max() > 0:
        return -math.inf
    shape, _, _ = stats.genpareto.fit(exceed / exceed.max(), floc=0.0)
    return float(shape)


def systematic_resample(weights: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Indices of as many draws as there are weights, each chosen in proportion to its weight with one
    uniform offset (systematic resampling, module notes)."""
    cumulative = np.cumsum(weights / np.sum(weights))
    cumulative[-1] = 1.0
    positions = (rng.uniform() + np.arange(weights.size)) / weights.size
    return np.searchsorted(cumulative, positions)


def posterior_from_draws(draws: np.ndarray, log_weights: np.ndarray, quantities: Sequence[Quantity], *,
                         proposal: str, seed: int | None, title: str, likelihood: str, shown: Sequence[str],
                         notes: Sequence[str] = ()) -> Posterior:
    """A :class:`~dnmr.posterior.Posterior` from importance-sampling draws: their effective number and Pareto
    shape, the draws resampled in proportion to their weights, and notes where either calls for caution.

    Parameters
    ----------
    draws : ndarray
        Every quantity of every draw: shape (draws, quantities).
    log_weights : ndarray
        ln(posterior / proposal) of each draw, up to one constant; -inf for a draw outside the prior.
    quantities : sequence of Quantity
        What each column of `draws` is.
    proposal : str
        The proposal, in words.
    seed : int or None
        Seed of the resampling's random generator.
    title, likelihood : str
        What was sampled, and the likelihood and priors in words.
    shown : sequence of str
        The quantities the pairwise figure shows by default.
    notes : sequence of str
        Notes of the caller, put before the sampler's own.
    """
    weights = _normalised(log_weights)
    effective = effective_samples(weights)
    shape = pareto_shape(weights)
    notes = list(notes)
    if shape > PARETO_LIMIT:
        notes.append(f"the importance weights have a Pareto shape of {shape:.2f}, above {PARETO_LIMIT}: the proposal "
                     "misses part of the posterior and the numbers may be off")
    if effective < MIN_EFFECTIVE_SAMPLES:
        notes.append(f"only about {effective:.0f} effective samples: the 95 % quantiles are rough; draw more")
    chosen = systematic_resample(weights, np.random.default_rng(seed))
    n = draws.shape[0]
    post = Posterior(title, tuple(quantities), draws[chosen][:, None, :], np.full(draws.shape[1], math.nan), math.nan,
                     1, n, 0, 1, seed, likelihood, tuple(shown), notes, {}, "importance",
                     {"draws": n, "effective_samples": effective, "pareto_k": shape, "proposal": proposal})
    post.notes += prior_edge_notes(post)
    return post
