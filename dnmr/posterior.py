"""Posterior sampling, the general part: emcee's ensemble, importance sampling, the samples, their
diagnostics and summaries.

Two samplers make the :class:`Posterior` that every posterior of dnmr returns.  emcee's affine-invariant
ensemble (Goodman & Weare, Comm. Appl. Math. Comp. Sci. 5, 65 (2010); Foreman-Mackey et al., PASP 125,
306 (2013); optional: ``pip install emcee``, or the ``bayes`` extra) hands its chain to
:func:`posterior_from_chain`; it serves the activation parameters of an Eyring line
(:mod:`dnmr.activation.posterior`) and one spectrum's parameters where importance sampling is not
reliable.  Importance sampling from a proposal close to the posterior (one spectrum's, from its
least-squares fit: :mod:`dnmr.fitting.posterior`) resamples its weighted draws into the same kind of
:class:`Posterior` (:mod:`dnmr.importance`).

Chains
------
``burn`` steps are discarded (default a quarter of the steps), then every ``thin``-th step is kept.  The
integrated autocorrelation time tau of every quantity is estimated with emcee's estimator on the kept
steps; a chain shorter than 50 tau (emcee's documentation advises at least that) gets a note, and so does
a burn-in shorter than 2 tau or a mean acceptance fraction outside 0.2-0.5 (common practice).  Quantiles
are of the kept samples: median, 68 % (15.87-84.13 %) and 95 % (2.5-97.5 %) central intervals.

"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from types import ModuleType
from typing import TYPE_CHECKING

import numpy as np

from dnmr.errors import InputError
from dnmr.formatting import significant
from dnmr.notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

INSTALL_HINT = 'posterior sampling needs the emcee package: pip install emcee (or pip install ".[bayes]" in dnmr\'s folder)'
MIN_AUTOCORRELATION_TIMES = 50  # emcee's documentation: trust tau (and the quantiles) from chains this long
MIN_BURN_AUTOCORRELATION_TIMES = 2
MIN_ACCEPTANCE = 0.2  # Foreman-Mackey et al. 2013 advise 0.2-0.5; above is usual in few dimensions
BOUND_KINDS = ("upper-bound", "lower-bound")
#: The kinds of a quantity's summary (see :class:`PosteriorSummary`).
KINDS = ("interval", "upper-bound", "lower-bound", "undetermined")
#: Walkers of the ensemble unless a problem has more than 15 sampled parameters (then 2 per parameter + 2).
DEFAULT_WALKERS = 32
PRIOR_EDGE = 0.1  # a 95 % interval ending this close (as a share of its width) to the prior's end reaches it
PARETO_LIMIT = 0.7  # Vehtari et al. 2024: importance-sampling estimates with a larger Pareto shape are not reliable
EXTRA_LABELS = {"harmonic_mean_temperature_k": "harmonic-mean T / K", "correlation_enthalpy_entropy": "corr(ΔH‡, ΔS‡)"}


def require_emcee(where: str | None = None) -> ModuleType:
    """The emcee module, or an :class:`InputError` (at `where`, e.g. a command-line option) saying how to
    install it."""
    try:
        import emcee
    except ImportError:
        raise InputError(INSTALL_HINT, where=where) from None
    return emcee


# --------------------------------------------------------------------------------------------------
# results


@dataclass(frozen=True)
class PosteriorSummary:
    """What the posterior says about one quantity.

    Attributes
    ----------
    name, label, unit : str
        Machine name, axis label (with unit) and unit.
    kind : str
        "interval" (median and central intervals), "upper-bound" or "lower-bound" (only the one-sided
        95 % bound means anything) or "undetermined" (the posterior is the prior).
    median, mean, std : float
        Of the samples (NaN unless the kind is "interval").
    ci68, ci95 : (float, float)
        Central 68 % and 95 % intervals (NaN unless the kind is "interval").
    bound95 : float
        The one-sided 95 % bound of a bound (NaN otherwise).
    prior_range : (float, float)
        Where the prior ends (-inf/inf when it does not).
    autocorrelation_steps : float
        Integrated autocorrelation time (steps) of this quantity's chain (NaN for importance sampling).
    effective_samples : float
        walkers x kept steps x thin / tau; for importance sampling the effective number of the weighted draws.
    reason : str
        Why a bound, in words.
    """

    name: str
    label: str
    unit: str
    kind: str
    median: float
    mean: float
    std: float
    ci68: tuple[float, float]
    ci95: tuple[float, float]
    bound95: float
    prior_range: tuple[float, float]
    autocorrelation_steps: float
    effective_samples: float
    reason: str = ""

    def describe(self) -> str:
        """One line: ``median 121 (68 %: 118 to 124; 95 %: 115 to 127)`` or ``< 3.1 (95 % upper bound)``."""
        if self.kind == "upper-bound":
            return f"< {significant(self.bound95)} (95 % upper bound from the posterior; no lower limit)"
        if self.kind == "lower-bound":
            return f"> {significant(self.bound95)} (95 % lower bound from the posterior; no upper limit)"
        if self.kind == "undetermined":
            return "not determined: the posterior is the prior"
        return (f"{significant(self.median, 5)}   68 %: {significant(self.ci68[0], 5)} to {significant(self.ci68[1], 5)}   "
                f"95 %: {significant(self.ci95[0], 5)} to {significant(self.ci95[1], 5)}")

    def to_dict(self) -> dict:
        """Plain data (JSON-ready; NaN stays NaN, write it as null)."""
        return {"label": self.label, "unit": self.unit, "kind": self.kind, "median": self.median,
                "mean": self.mean, "std": self.std, "ci68": list(self.ci68), "ci95": list(self.ci95),
                "bound95": self.bound95, "prior_range": list(self.prior_range),
                "autocorrelation_steps": self.autocorrelation_steps, "effective_samples": self.effective_samples,
                "reason": self.reason}


@dataclass(frozen=True)
class Quantity:
    """A column of a posterior chain: name, axis label, unit, kind (see :class:`PosteriorSummary`),
    prior range, for a bound why, and whether the prior is flat in this quantity (else it is derived)."""

    name: str
    label: str
    unit: str
    kind: str = "interval"
    prior_range: tuple[float, float] = (-math.inf, math.inf)
    reason: str = ""
    flat_prior: bool = True


@dataclass
class Posterior(NotebookView):
    """Posterior samples of some quantities, with their summaries and the sampler's diagnostics.

    Attributes
    ----------
    title : str
        What was sampled.
    quantities : tuple of Quantity
        The columns of `chain` (sampled ones and ones derived from them).
    chain : ndarray
        Kept samples, shape (steps kept, walkers, quantities); for importance sampling the draws as
        resampled, shape (draws, 1, quantities).
    autocorrelation_steps : ndarray
        Integrated autocorrelation time of each quantity, in sampler steps (NaN for importance sampling).
    acceptance_fraction : float
        Mean acceptance fraction of the walkers (NaN for importance sampling).
    walkers, steps, burn, thin : int
        The sampler's settings (for importance sampling 1, the draws, 0 and 1).
    seed : int or None
        Seed of the random generators.
    likelihood : str
        The likelihood and priors, in words.
    shown : tuple of str
        The quantities the pairwise posterior figure shows by default.
    notes : list of str
        What to know about the chain and the numbers.
    extra : dict
        Further results (e.g. the ΔH‡-ΔS‡ correlation of an Eyring posterior).
    method : str
        "emcee" (the ensemble) or "importance" (importance sampling, :mod:`dnmr.importance`).
    importance : dict
        For importance sampling: its draws, effective samples and Pareto shape (``pareto_k``), and the proposal.
    """

    title: str
    quantities: tuple[Quantity, ...]
    chain: np.ndarray
    autocorrelation_steps: np.ndarray
    acceptance_fraction: float
    walkers: int
    steps: int
    burn: int
    thin: int
    seed: int | None
    likelihood: str
    shown: tuple[str, ...]
    notes: list[str] = field(default_factory=list)
    extra: dict = field(default_factory=dict)
    method: str = "emcee"
    importance: dict = field(default_factory=dict)

    @property
    def names(self) -> tuple[str, ...]:
        """Names of the quantities, in column order."""
        return tuple(q.name for q in self.quantities)

    @property
    def samples(self) -> np.ndarray:
        """The flat chain: shape (samples, quantities)."""
        return self.chain.reshape(-1, self.chain.shape[-1])

    def _index(self, name: str) -> int:
        if name not in self.names:
            raise InputError(f'no quantity "{name}" in the posterior; it has {", ".join(self.names)}', where="name")
        return self.names.index(name)

    def column(self, name: str) -> np.ndarray:
        """The samples of one quantity."""
        return self.samples[:, self._index(name)]

    def summary(self, name: str) -> PosteriorSummary:
        """Median, intervals or bound of one quantity."""
        i = self._index(name)
        q, x = self.quantities[i], self.samples[:, i]
        tau = float(self.autocorrelation_steps[i])
        if self.method == "importance":
            ess = float(self.importance["effective_samples"])
        else:
            ess = x.size * self.thin / tau if tau > 0 else math.nan
        nan2 = (math.nan, math.nan)
        if q.kind == "interval":
            p = np.percentile(x, [2.5, 15.87, 50.0, 84.13, 97.5])
            return PosteriorSummary(q.name, q.label, q.unit, q.kind, float(p[2]), float(x.mean()), float(x.std(ddof=1)),
                                    (float(p[1]), float(p[3])), (float(p[0]), float(p[4])), math.nan, q.prior_range,
                                    tau, ess, q.reason)
        bound = {"upper-bound": float(np.percentile(x, 95.0)), "lower-bound": float(np.percentile(x, 5.0))}
        return PosteriorSummary(q.name, q.label, q.unit, q.kind, math.nan, math.nan, math.nan, nan2, nan2,
                                bound.get(q.kind, math.nan), q.prior_range, tau, ess, q.reason)

    def summaries(self) -> list[PosteriorSummary]:
        """The summary of every quantity, in column order."""
        return [self.summary(n) for n in self.names]

    def correlation(self, first: str, second: str) -> float:
        """Correlation coefficient of two quantities over the samples."""
        return float(np.corrcoef(self.column(first), self.column(second))[0, 1])

    def report(self) -> str:
        """A readable account: sampler, likelihood, each quantity's median and intervals (or bound), notes."""
        kept = self.chain.shape[0]
        if self.method == "importance":
            info = self.importance
            sampler = [f"  sampler      importance sampling, {info['draws']} draws from {info['proposal']}, resampled "
                       f"(seed {self.seed})",
                       f"  weights      about {info['effective_samples']:.0f} effective samples; Pareto shape "
                       f"{info['pareto_k']:.2f} (reliable below {PARETO_LIMIT})"]
        else:
            sampler = [f"  sampler      emcee ensemble, {self.walkers} walkers x {self.steps} steps, burn-in {self.burn}, "
                       f"thin {self.thin}: {kept * self.walkers} samples (seed {self.seed})",
                       f"  acceptance   {self.acceptance_fraction:.2f} (mean over walkers)"]
        lines = [f"Posterior of {self.title}", *sampler, f"  likelihood   {self.likelihood}", ""]
        width = max(len(q.label) for q in self.quantities)
        for s in self.summaries():
            ess = (f"about {s.effective_samples:.0f} independent samples" if self.method == "importance" else
                   f"tau {s.autocorrelation_steps:.0f} steps, about {s.effective_samples:.0f} independent samples")
            lines.append(f"  {s.label:<{width}}  {s.describe()}   ({ess})")
            if s.reason:
                lines.append(f"  {'':<{width}}  {s.reason}")
        for key, value in self.extra.items():
            if key in EXTRA_LABELS:
                lines.append(f"  {EXTRA_LABELS[key]:<{width}}  {value:.4g}")
        if self.notes:
            lines += ["", "notes:"] + [f"  - {n}" for n in self.notes]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.report()

    def to_dict(self) -> dict:
        """Plain data (JSON-ready): settings, diagnostics, the summary of every quantity; no samples."""
        return {"title": self.title, "method": self.method, "likelihood": self.likelihood, "walkers": self.walkers,
                "steps": self.steps, "burn": self.burn, "thin": self.thin, "seed": self.seed,
                "samples": int(self.samples.shape[0]), "acceptance_fraction": self.acceptance_fraction,
                **({"importance": dict(self.importance)} if self.importance else {}),
                "quantities": {s.name: s.to_dict() for s in self.summaries()}, **self.extra,
                "notes": list(self.notes)}

    def plot(self, names: Sequence[str] | None = None, true_values: Sequence[float | None] | None = None,
             figure: "Figure | None" = None, **renamed) -> "Figure":
        """Pairwise posterior figure of `names` (default :attr:`shown`); see
        :func:`dnmr.reporting.posteriorplot.plot_posterior_pairs`.

        Parameters
        ----------
        names : sequence of str, optional
            Quantities to show (2 to 6 read best).
        true_values : sequence of float or None, optional
            Known values to mark, one per shown quantity (None for none), in the quantities' units.
        figure : matplotlib Figure, optional
            Figure to draw into.
        """
        from dnmr.reporting.posteriorplot import plot_posterior_pairs

        names = list(names or self.shown)
        index = [self._index(n) for n in names]
        kinds = [self.quantities[i].kind for i in index]
        return plot_posterior_pairs(self.samples[:, index], [self.quantities[i].label for i in index],
                                    true_values=true_values, one_sided=[k if k in BOUND_KINDS else None for k in kinds],
                                    figure=figure, **renamed)


def sampler_settings(steps: int, walkers: int | None, burn: int | None, thin: int, dimensions: int) -> tuple[int, int]:
    """Check the settings of an ensemble sampler.

    Parameters
    ----------
    steps : int
        Steps of every walker, burn-in included (at least 10).
    walkers : int or None
        Walkers of the ensemble (at least twice `dimensions`); None: :data:`DEFAULT_WALKERS`, or two per
        sampled parameter and two more where that is more.
    burn : int or None
        Steps discarded at the start (0 to steps - 10); None: a quarter of the steps.
    thin : int
        Keep every thin-th step after the burn-in (at least 1).
    dimensions : int
        Number of sampled parameters.

    Returns
    -------
    (int, int)
        The walkers and the burn-in.

    Raises
    ------
    InputError
        A setting that is not a whole number in its range, naming it.
    """
    walkers = max(DEFAULT_WALKERS, 2 * dimensions + 2) if walkers is None else walkers
    for name, value, low in (("steps", steps, 10), ("walkers", walkers, 2 * dimensions), ("thin", thin, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            why = f" (twice the {dimensions} sampled parameters)" if name == "walkers" else ""
            raise InputError(f"{name} must be a whole number of at least {low}{why}, got {value!r}", where=name)
    burn = steps // 4 if burn is None else burn
    if isinstance(burn, bool) or not isinstance(burn, (int, np.integer)) or not 0 <= burn <= steps - 10:
        raise InputError(f"burn must be a whole number from 0 to steps - 10 = {steps - 10}, got {burn!r}", where="burn")
    return int(walkers), int(burn)


def posterior_from_chain(full: np.ndarray, quantities: Sequence[Quantity], *, acceptance: float, walkers: int,
                         steps: int, burn: int, thin: int, seed: int | None, title: str, likelihood: str,
                         shown: Sequence[str], notes: Sequence[str] = (), extra: dict | None = None) -> Posterior:
    """A :class:`Posterior` from a sampler's whole chain: the burn-in cut, every `thin`-th step kept, the
    autocorrelation time of each quantity, and notes on the chain's length, burn-in and acceptance and on
    95 % intervals that reach the end of a flat prior (see the module notes).

    Parameters
    ----------
    full : ndarray
        The chain of every quantity, burn-in included: shape (steps, walkers, quantities).
    quantities : sequence of Quantity
        What each column of `full` is.
    acceptance : float
        Mean acceptance fraction of the walkers.
    walkers, steps, burn, thin : int
        The sampler's settings (see :func:`sampler_settings`).
    seed : int or None
        Seed of the random generators.
    title, likelihood : str
        What was sampled, and the likelihood and priors in words.
    shown : sequence of str
        The quantities the pairwise figure shows by default.
    notes : sequence of str
        Notes of the caller, put before the chain's own.
    extra : dict, optional
        Further results (see :attr:`Posterior.extra`).
    """
    import emcee

    kept = full[burn:]
    tau = np.array([_autocorrelation(kept[:, :, j], emcee) for j in range(kept.shape[-1])])
    notes = list(notes)
    longest = float(np.nanmax(tau)) if np.isfinite(tau).any() else math.nan
    if np.isfinite(longest):
        worst = quantities[int(np.nanargmax(tau))].label
        if kept.shape[0] < MIN_AUTOCORRELATION_TIMES * longest:
            notes.append(f"the chain is {kept.shape[0]} steps after burn-in, {kept.shape[0] / longest:.0f} "
                         f"autocorrelation times of the slowest quantity ({worst}, tau {longest:.0f} steps); "
                         f"emcee advises at least {MIN_AUTOCORRELATION_TIMES}: the quantiles are rough, run about "
                         f"{int(math.ceil(MIN_AUTOCORRELATION_TIMES * longest / 0.75 / 100.0)) * 100} steps")
        if burn < MIN_BURN_AUTOCORRELATION_TIMES * longest:
            notes.append(f"the burn-in ({burn} steps) is shorter than {MIN_BURN_AUTOCORRELATION_TIMES} autocorrelation "
                         "times: the start may still show in the samples")
    if acceptance < MIN_ACCEPTANCE:
        notes.append(f"mean acceptance fraction {acceptance:.2f} is below {MIN_ACCEPTANCE}: the walkers seldom move "
                     "(a posterior with several narrow modes?); the samples may not cover it")
    post = Posterior(title, tuple(quantities), kept[::thin].copy(), tau, float(acceptance), walkers, steps, burn,
                     thin, seed, likelihood, tuple(shown), notes, dict(extra or {}))
    post.notes += prior_edge_notes(post)
    return post


def prior_edge_notes(post: Posterior) -> list[str]:
    """Notes on the 95 % intervals of `post` that reach the end of a flat prior (the data bound them on one side
    only): a line for each."""
    notes = []
    for q, s in zip(post.quantities, post.summaries()):
        low, high = s.prior_range
        near = PRIOR_EDGE * (s.ci95[1] - s.ci95[0])
        if q.flat_prior and s.kind == "interval" and (s.ci95[0] - low < near or high - s.ci95[1] < near):
            notes.append(f"the 95 % interval of {s.label} reaches the end of its prior range "
                         f"({low:g} to {high:g}): the data bound it on one side only, read it as a bound")
    return notes


def _autocorrelation(chain: np.ndarray, emcee) -> float:
    """Integrated autocorrelation time (steps) of one quantity's chain (steps, walkers); NaN for a constant."""
    if np.ptp(chain) == 0:
        return math.nan
    return float(emcee.autocorr.integrated_time(chain[:, :, None], tol=0, quiet=True)[0])


def starting_ball(rng: np.random.Generator, centre: np.ndarray, covariance: np.ndarray, walkers: int,
                  low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Starting positions of the walkers: normal about `centre` with `covariance`, mirrored back inside
    [low, high] (each in the units of its parameter; -inf/inf where a parameter is not bounded).

    Returns
    -------
    ndarray
        Shape (walkers, parameters).
    """
    vals, vecs = np.linalg.eigh(0.5 * (covariance + covariance.T))
    draws = centre + (rng.standard_normal((walkers, centre.size)) * np.sqrt(np.clip(vals, 0.0, None))) @ vecs.T
    span = high - low
    for _ in range(4):  # mirror at the bounds
        draws = np.where(draws < low, 2 * low - draws, draws)
        draws = np.where(draws > high, 2 * high - draws, draws)
    inside = np.where(np.isfinite(span), 1e-9 * span, 0.0)
    return np.clip(draws, low + inside, high - inside)
