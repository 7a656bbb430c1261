"""Bayesian errors: posterior samples of one spectrum's parameters and of activation parameters.

Optional: needs the emcee package (``pip install emcee``, or the ``bayes`` extra).  Both samplers use emcee's
affine-invariant ensemble (Goodman & Weare, Comm. Appl. Math. Comp. Sci. 5, 65 (2010); Foreman-Mackey
et al., PASP 125, 306 (2013)).

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

Activation parameters (:func:`sample_eyring_posterior`)
-------------------------------------------------------
The Eyring line ln k = ln(kappa kB T / h) + dS‡/R - dH‡/(R T), sampled in (dH‡, dS‡) with flat priors,
over the rates that entered the least-squares fit (bound rows are left out, as there).  Each ln k is
normal with the standard error rate_stderr / rate.  When the Eyring analysis took its errors from the
scatter (no rate errors, or ``scale_errors``), a common factor f on those errors is sampled as well with
the prior p(f) ~ 1/f (flat in ln f), which makes the marginal posterior of the line the Student t of
Gelman et al., Bayesian Data Analysis, 3rd ed., section 14.2.  Temperature errors are latent variables:
the true temperatures are T_obs + L z with z standard normal and L L^T the temperatures' covariance (so
correlated calibration errors are covered), and z is sampled with the line and marginalised.  dG‡ at
298.15 K and at the harmonic-mean temperature of the data (weighted as in the fit) follow from every
sample.

Chains
------
``burn`` steps are discarded (default a quarter of the steps), then every ``thin``-th step is kept.  The
integrated autocorrelation time tau of every quantity is estimated with emcee's estimator on the kept
steps; a chain shorter than 50 tau (emcee's documentation advises at least that) gets a note, and so does
a burn-in shorter than 2 tau or a mean acceptance fraction outside 0.2-0.5 (common practice).  Quantiles
are of the kept samples: median, 68 % (15.87-84.13 %) and 95 % (2.5-97.5 %) central intervals.
"""
from __future__ import annotations

import contextlib
import io
import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from dnmr.formatting import significant
from dnmr.errors import InputError
from dnmr.kinetics import BOLTZMANN, GAS_CONSTANT, PLANCK, STANDARD_TEMPERATURE_K
from dnmr.notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from dnmr.activation.eyring import EyringResult
    from dnmr.fitting.spectrumfit import SpectrumFit

INSTALL_HINT = 'posterior sampling needs the emcee package: pip install emcee (or pip install ".[bayes]" in dnmr\'s folder)'
MIN_AUTOCORRELATION_TIMES = 50  # emcee's documentation: trust tau (and the quantiles) from chains this long
MIN_BURN_AUTOCORRELATION_TIMES = 2
MIN_ACCEPTANCE = 0.2  # Foreman-Mackey et al. 2013 advise 0.2-0.5; above is usual in few dimensions
BOUND_KINDS = ("upper-bound", "lower-bound")
KINDS = ("interval", "upper-bound", "lower-bound", "undetermined")
PRIOR_EDGE = 0.1  # a 95 % interval ending this close (as a share of its width) to the prior's end reaches it
PAIRS_MAX = 6
EXTRA_LABELS = {"harmonic_mean_temperature_k": "harmonic-mean T / K", "correlation_enthalpy_entropy": "corr(ΔH‡, ΔS‡)"}


def require_emcee(where: str | None = None):
    """The emcee module, or an :class:`InputError` saying how to install it."""
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
    bound_95 : float
        The one-sided 95 % bound of a bound (NaN otherwise).
    prior_range : (float, float)
        Where the prior ends (-inf/inf when it does not).
    autocorrelation_steps : float
        Integrated autocorrelation time (steps) of this quantity's chain.
    effective_samples : float
        walkers x kept steps x thin / tau.
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
    bound_95: float
    prior_range: tuple[float, float]
    autocorrelation_steps: float
    effective_samples: float
    reason: str = ""

    def describe(self) -> str:
        """One line: ``median 121 (68 %: 118 to 124; 95 %: 115 to 127)`` or ``< 3.1 (95 % upper bound)``."""
        if self.kind == "upper-bound":
            return f"< {significant(self.bound_95)} (95 % upper bound from the posterior; no lower limit)"
        if self.kind == "lower-bound":
            return f"> {significant(self.bound_95)} (95 % lower bound from the posterior; no upper limit)"
        if self.kind == "undetermined":
            return "not determined: the posterior is the prior"
        return (f"{significant(self.median, 5)}   68 %: {significant(self.ci68[0], 5)} to {significant(self.ci68[1], 5)}   "
                f"95 %: {significant(self.ci95[0], 5)} to {significant(self.ci95[1], 5)}")

    def to_dict(self) -> dict:
        """Plain data (JSON-ready; NaN stays NaN, write it as null)."""
        return {"label": self.label, "unit": self.unit, "kind": self.kind, "median": self.median,
                "mean": self.mean, "std": self.std, "ci68": list(self.ci68), "ci95": list(self.ci95),
                "bound_95": self.bound_95, "prior_range": list(self.prior_range),
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
        Kept samples, shape (steps kept, walkers, quantities).
    autocorrelation_steps : ndarray
        Integrated autocorrelation time of each quantity, in sampler steps.
    acceptance_fraction : float
        Mean acceptance fraction of the walkers.
    walkers, steps, burn, thin : int
        The sampler's settings.
    seed : int or None
        Seed of the random generators.
    likelihood : str
        The likelihood and priors, in words.
    shown : tuple of str
        The quantities the pairwise posterior figure shows by default.
    notes : list of str
        What to know about the chain and the numbers.
    extra : dict
        Further results (e.g. the dH‡-dS‡ correlation of an Eyring posterior).
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
        lines = [f"Posterior of {self.title}",
                 f"  sampler      emcee ensemble, {self.walkers} walkers x {self.steps} steps, burn-in {self.burn}, "
                 f"thin {self.thin}: {kept * self.walkers} samples (seed {self.seed})",
                 f"  acceptance   {self.acceptance_fraction:.2f} (mean over walkers)",
                 f"  likelihood   {self.likelihood}", ""]
        width = max(len(q.label) for q in self.quantities)
        for s in self.summaries():
            ess = f"tau {s.autocorrelation_steps:.0f} steps, about {s.effective_samples:.0f} independent samples"
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
        return {"title": self.title, "method": "emcee", "likelihood": self.likelihood, "walkers": self.walkers,
                "steps": self.steps, "burn": self.burn, "thin": self.thin, "seed": self.seed,
                "samples": int(self.samples.shape[0]), "acceptance_fraction": self.acceptance_fraction,
                "quantities": {s.name: s.to_dict() for s in self.summaries()}, **self.extra,
                "notes": list(self.notes)}

    def plot(self, names: Sequence[str] | None = None, true_values: Sequence[float | None] | None = None,
             figure: "Figure | None" = None, **renamed) -> "Figure":
        """Pairwise posterior figure of `names` (default :attr:`shown`); see
        :func:`dnmr.reporting.plotting.plot_posterior_pairs`.

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


def _settings(steps: int, walkers: int | None, burn: int | None, thin: int, dimensions: int) -> tuple[int, int]:
    """Check the sampler settings; returns the walkers (default 32, or two per sampled parameter and two more
    where that is more) and the burn-in (default a quarter of the steps)."""
    walkers = max(DEFAULT_WALKERS, 2 * dimensions + 2) if walkers is None else walkers
    for name, value, low in (("steps", steps, 10), ("walkers", walkers, 2 * dimensions), ("thin", thin, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            why = f" (twice the {dimensions} sampled parameters)" if name == "walkers" else ""
            raise InputError(f"{name} must be a whole number of at least {low}{why}, got {value!r}", where=name)
    burn = steps // 4 if burn is None else burn
    if isinstance(burn, bool) or not isinstance(burn, (int, np.integer)) or not 0 <= burn <= steps - 10:
        raise InputError(f"burn must be a whole number from 0 to steps - 10 = {steps - 10}, got {burn!r}", where="burn")
    return int(walkers), int(burn)


#: Walkers of the ensemble unless a problem has more than 15 sampled parameters (then 2 per parameter + 2).
DEFAULT_WALKERS = 32


def _from_chain(full: np.ndarray, quantities: Sequence[Quantity], *, acceptance: float, walkers: int, steps: int,
                burn: int, thin: int, seed: int | None, title: str, likelihood: str, shown: Sequence[str],
                notes: Sequence[str] = (), extra: dict | None = None) -> Posterior:
    """A Posterior from the whole chain (steps, walkers, quantities): burn-in cut, tau, diagnostics notes."""
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
    for q, s in zip(quantities, post.summaries()):
        low, high = s.prior_range
        near = PRIOR_EDGE * (s.ci95[1] - s.ci95[0])
        if q.flat_prior and s.kind == "interval" and (s.ci95[0] - low < near or high - s.ci95[1] < near):
            post.notes.append(f"the 95 % interval of {s.label} reaches the end of its prior range "
                              f"({low:g} to {high:g}): the data bound it on one side only, read it as a bound")
    return post


def _autocorrelation(chain: np.ndarray, emcee) -> float:
    """Integrated autocorrelation time (steps) of one quantity's chain (steps, walkers); NaN for a constant."""
    if np.ptp(chain) == 0:
        return math.nan
    return float(emcee.autocorr.integrated_time(chain[:, :, None], tol=0, quiet=True)[0])


def _ball(rng: np.random.Generator, centre: np.ndarray, covariance: np.ndarray, walkers: int,
          low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Walker starts: normal about `centre` with `covariance`, reflected back inside [low, high]."""
    vals, vecs = np.linalg.eigh(0.5 * (covariance + covariance.T))
    draws = centre + (rng.standard_normal((walkers, centre.size)) * np.sqrt(np.clip(vals, 0.0, None))) @ vecs.T
    span = high - low
    for _ in range(4):  # mirror at the bounds
        draws = np.where(draws < low, 2 * low - draws, draws)
        draws = np.where(draws > high, 2 * high - draws, draws)
    inside = np.where(np.isfinite(span), 1e-9 * span, 0.0)
    return np.clip(draws, low + inside, high - inside)


# --------------------------------------------------------------------------------------------------
# one spectrum


def _label(name: str) -> tuple[str, str]:
    """Axis label and unit of a fit parameter (see the parameter names in :mod:`dnmr.fitting.spectrumfit`)."""
    patterns = (
        (r"log10_k_(.+)", "{0}: log10(k / s⁻¹)", ""),
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


def _fit_covariance(fit: "SpectrumFit", names: Sequence[str]) -> np.ndarray:
    """Covariance of the free parameters from their (scaled) errors and correlations; a small spread
    where an error is not known."""
    pars = [fit.parameters[n] for n in names]

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
    fit: "SpectrumFit",
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
        Quantities: every free parameter (``log10_k_<process>`` in log10 of s^-1, linewidths in Hz...)
        and ``rate_per_s_<process>`` (s^-1) for every free rate.  A rate the profile classified as a
        bound is summarised by its one-sided 95 % bound.
    """
    import lmfit

    from dnmr.fitting.parameters import ParameterLayout
    from dnmr.fitting.problem import FitProblem
    from dnmr.fitting.workers import single_threaded_blas

    require_emcee()
    layout = ParameterLayout.for_model(fit.best_model, fit.options)
    problem = FitProblem(layout, fit.ppm, fit.data, fit.noise)
    params = fit.parameters.copy()
    free = [n for n, p in params.items() if p.vary and not p.expr]
    if not free:
        raise InputError("the fit has no free parameters to sample", where="parameters")
    walkers, burn = _settings(steps, walkers, burn, thin, len(free))
    root_scale = math.sqrt(fit.error_scale)
    calls = [0]

    def residual(p):
        calls[0] += 1
        if progress is not None and calls[0] % walkers == 1 and calls[0] > 1:
            progress(min(calls[0] // walkers, steps), steps)
        r = problem.residual(p)
        return r / root_scale if np.isfinite(r).all() else np.full(r.size, 1e3)  # as for a model out of range

    rng = np.random.default_rng(seed)
    low = np.array([params[n].min for n in free], float)
    high = np.array([params[n].max for n in free], float)
    centre = np.array([params[n].value for n in free])
    start = _ball(rng, centre, 0.25 * _fit_covariance(fit, free), walkers, low, high)
    rate_of = {name: r for name, r in zip(layout.rate_names, fit.rates)}
    for j, n in enumerate(free):  # a bound's walkers start spread over its flat stretch, not piled at its end
        r = rate_of.get(n)
        if r is not None and r.status in BOUND_KINDS + ("undetermined",):
            a = math.log10(r.rate_lower) if r.status == "lower-bound" else low[j]
            b = math.log10(r.rate_upper) if r.status == "upper-bound" else high[j]
            start[:, j] = rng.uniform(a, b, walkers)
    minimizer = lmfit.Minimizer(residual, params, nan_policy="propagate")
    with contextlib.redirect_stdout(io.StringIO()), single_threaded_blas():  # lmfit prints emcee's tau warning
        result = minimizer.emcee(params=params, steps=steps, nwalkers=walkers, burn=0, thin=1, is_weighted=True,
                                 pos=start, seed=None if seed is None else int(seed), progress=False)
    if progress is not None:
        progress(steps, steps)
    order = [result.var_names.index(n) for n in free]
    chain = np.asarray(result.chain)[:, :, order]
    quantities = [Quantity(n, *_label(n), prior_range=(float(params[n].min), float(params[n].max))) for n in free]
    derived = []
    for j, n in enumerate(free):
        if n not in rate_of:
            continue
        r = rate_of[n]
        kind = r.status if r.status in BOUND_KINDS + ("undetermined",) else "interval"
        q = quantities[j]
        reason = r.reason if kind != "interval" else ""
        quantities[j] = Quantity(q.name, q.label, q.unit, kind, q.prior_range, reason)
        quantities.append(Quantity(f"rate_per_s_{n[len('log10_k_'):]}", f"{r.process}: k / s⁻¹", "s^-1", kind,
                                   (10.0 ** q.prior_range[0], 10.0 ** q.prior_range[1]), reason, flat_prior=False))
        derived.append(10.0 ** chain[:, :, j])
    full = np.concatenate([chain] + [d[:, :, None] for d in derived], axis=2) if derived else chain
    rates = [n for n in free if n in rate_of]
    shown = _most_correlated(chain[burn:].reshape(-1, len(free)), free, rates)
    where = f" at {fit.temperature_k:g} K" if fit.temperature_k else ""
    likelihood = (f"exp(-chi^2 / (2 s)), chi^2 with the fit's noise sigma = {fit.noise.sigma:.4g} "
                  f"({fit.noise.method}) and error scale s = {fit.error_scale:.3g}; flat priors within the "
                  "parameters' bounds (log10 k flat between the rate limits)")
    from pathlib import Path

    return _from_chain(full, quantities, acceptance=float(np.mean(result.acceptance_fraction)), walkers=walkers,
                       steps=steps, burn=burn, thin=thin, seed=seed, likelihood=likelihood, shown=shown,
                       title=f"the fit of {Path(fit.source).name or 'the spectrum'}{where}")


def _most_correlated(samples: np.ndarray, names: Sequence[str], first: Sequence[str]) -> tuple[str, ...]:
    """The names `first`, then the others by their largest |correlation| with them, PAIRS_MAX in all."""
    if not first:
        return tuple(names[:PAIRS_MAX])
    corr = np.nan_to_num(np.corrcoef(samples.T)) if samples.shape[1] > 1 else np.ones((1, 1))
    corr = np.atleast_2d(corr)
    idx = [names.index(n) for n in first]
    others = sorted((j for j in range(len(names)) if j not in idx), key=lambda j: -np.abs(corr[idx, j]).max())
    return tuple(names[j] for j in (idx + others)[:PAIRS_MAX])


# --------------------------------------------------------------------------------------------------
# activation parameters


def sample_eyring_posterior(
    result: "EyringResult",
    *,
    steps: int = 10000,
    walkers: int | None = None,
    burn: int | None = None,
    thin: int = 1,
    seed: int | None = 0,
) -> Posterior:
    """Posterior samples of dH‡ (kJ/mol) and dS‡ (J/(mol K)) from the rates of an Eyring analysis.

    Flat priors on dH‡ and dS‡; ln k normal with the rate errors, or with a common factor on them
    sampled under p(f) ~ 1/f when the analysis took its errors from the scatter; temperature errors as
    latent temperatures T_obs + L z, z standard normal, L L^T the temperatures' covariance, marginalised
    (see the module notes).  Bound rows are left out, as in the least-squares fit; the probability that
    the line respects each of them is reported in the notes.

    Parameters
    ----------
    result : EyringResult
        The least-squares Eyring analysis (:func:`dnmr.activation.eyring.eyring_fit` and friends).
    steps, walkers, burn, thin, seed
        As for :func:`sample_spectrum_posterior` (default 10000 steps: a few seconds; latent temperatures
        count as sampled parameters for the default number of walkers).

    Returns
    -------
    Posterior
        Quantities ``enthalpy_kj_mol``, ``entropy_j_mol_k``, ``gibbs_298_kj_mol``, ``gibbs_hm_kj_mol``
        (and ``error_scale`` when sampled); extra results ``harmonic_mean_temperature_k`` (K) and
        ``correlation_enthalpy_entropy``.
    """
    from dnmr.activation.eyring import BASIS_GIVEN

    emcee = require_emcee()
    t_obs, k = result.temperature_k, result.rate_per_s
    n = t_obs.size
    errors_given = result._errors_given
    sigma = result.series.rate_stderr[result.used] / k if errors_given else np.ones(n)
    scaled = result.error_basis != BASIS_GIVEN
    if scaled and n < 3:
        raise InputError(f"{n} rates with errors from their scatter: the posterior is improper (the scatter of two "
                         "points about their line is zero); give rate errors or measure more temperatures",
                         where="posterior")
    cov_t = result.series.temperature_covariance[np.ix_(result.used, result.used)]
    vals, vecs = np.linalg.eigh(cov_t)
    keep = vals > 1e-12 * max(float(vals.max(initial=0.0)), 1e-300)
    latent = vecs[:, keep] * np.sqrt(vals[keep])  # T = t_obs + latent @ z
    ndim = 2 + int(scaled) + latent.shape[1]
    walkers, burn = _settings(steps, walkers, burn, thin, ndim)
    ln_k = np.log(k)
    kappa_term = math.log(result.transmission * BOLTZMANN / PLANCK)
    r_kj = GAS_CONSTANT / 1e3

    def log_probability(theta: np.ndarray) -> np.ndarray:
        dh, ds = theta[:, 0], theta[:, 1]
        z = theta[:, 2 + int(scaled):]
        temps = t_obs + z @ latent.T
        with np.errstate(invalid="ignore", divide="ignore"):
            model = kappa_term + np.log(temps) + ds[:, None] / GAS_CONSTANT - dh[:, None] / (r_kj * temps)
        ss = (((ln_k - model) / sigma) ** 2).sum(axis=1)
        lp = -0.5 * (z * z).sum(axis=1)
        if scaled:
            ln_f = theta[:, 2]
            lp += -0.5 * ss * np.exp(-2.0 * ln_f) - n * ln_f
        else:
            lp += -0.5 * ss
        return np.where((temps > 0).all(axis=1) & np.isfinite(lp), lp, -np.inf)

    rng = np.random.default_rng(seed)
    to_energy = np.array([[0.0, -r_kj], [GAS_CONSTANT, 0.0]])  # (intercept, slope) -> (dH‡, dS‡)
    centre = [result.enthalpy_kj_mol, result.entropy_j_mol_k]
    cov = np.zeros((ndim, ndim))
    cov[:2, :2] = to_energy @ result.eyring.covariance @ to_energy.T
    if scaled:
        centre.append(math.log(max(result.eyring.scatter, 1e-300)))
        cov[2, 2] = 1.0 / (2.0 * max(n - 2, 1))  # the spread of ln s for n - 2 degrees of freedom
    centre += [0.0] * latent.shape[1]
    cov[2 + int(scaled):, 2 + int(scaled):] = np.eye(latent.shape[1])
    inf = np.full(ndim, np.inf)
    start = _ball(rng, np.array(centre), 0.25 * cov, walkers, -inf, inf)
    sampler = emcee.EnsembleSampler(walkers, ndim, log_probability, vectorize=True)
    if seed is not None:
        sampler.random_state = np.random.RandomState(seed).get_state()
    sampler.run_mcmc(start, steps, progress=False)
    raw = sampler.get_chain()
    t_hm = result.harmonic_mean_temperature_k
    dh, ds = raw[:, :, 0], raw[:, :, 1]
    columns = [dh, ds, dh - STANDARD_TEMPERATURE_K * ds / 1e3, dh - t_hm * ds / 1e3]
    quantities = [Quantity("enthalpy_kj_mol", "ΔH‡ / kJ mol⁻¹", "kJ/mol"),
                  Quantity("entropy_j_mol_k", "ΔS‡ / J mol⁻¹ K⁻¹", "J/(mol K)"),
                  Quantity("gibbs_298_kj_mol", "ΔG‡(298.15 K) / kJ mol⁻¹", "kJ/mol", flat_prior=False),
                  Quantity("gibbs_hm_kj_mol", f"ΔG‡({t_hm:.1f} K) / kJ mol⁻¹", "kJ/mol", flat_prior=False)]
    if scaled:
        columns.append(np.exp(raw[:, :, 2]))
        quantities.append(Quantity("error_scale", "error scale f", "", prior_range=(0.0, math.inf), flat_prior=False))
    full = np.stack(columns, axis=2)
    notes = [f"{len(result.bounds)} bound row(s) left out, as in the least-squares fit"] if result.bounds else []
    kept = full[burn:].reshape(-1, full.shape[-1])
    for b in result.bounds:
        ln_line = kappa_term + math.log(b.temperature_k) + kept[:, 1] / GAS_CONSTANT - kept[:, 0] / (r_kj * b.temperature_k)
        inside = np.ones(ln_line.size, bool)
        if np.isfinite(b.rate_lower):
            inside &= ln_line >= math.log(b.rate_lower)
        if np.isfinite(b.rate_upper):
            inside &= ln_line <= math.log(b.rate_upper)
        notes.append(f"the bound at {b.temperature_k:g} K ({b.where}) is respected by the line with posterior "
                     f"probability {inside.mean():.2f}")
    off_diagonal = cov_t - np.diag(np.diag(cov_t))
    if np.abs(off_diagonal).max(initial=0.0) > 1e-9 * max(float(np.abs(cov_t).max(initial=0.0)), 1e-300):
        notes.append(
            "the temperature errors are correlated (a calibration): through the straightness of the Eyring line the "
            "rates pin part of that common error, so this posterior can be narrower than the least-squares errors "
            f"(dH‡ ± {result.enthalpy_stderr:.2g} kJ/mol, dS‡ ± {result.entropy_stderr:.2g} J/(mol K)), which do "
            "not use it; quote those unless the line is known to be straight (no heat capacity of activation, "
            "no tunnelling)")
    errors = "rate errors as given" if not scaled else (
        "rate errors times a common factor f, p(f) ~ 1/f" if errors_given else "equal errors on ln k of unknown size f, p(f) ~ 1/f")
    temperature = (f"temperatures latent, normal about the measured ones with their covariance ({latent.shape[1]} "
                   "independent components), marginalised") if latent.shape[1] else "temperatures exact"
    likelihood = f"ln k normal about the Eyring line, {errors}; {temperature}; flat priors on dH‡ and dS‡"
    title = f"the Eyring line of process {result.process!r}" if result.process else "the Eyring line"
    post = _from_chain(full, quantities, acceptance=float(np.mean(sampler.acceptance_fraction)), walkers=walkers,
                       steps=steps, burn=burn, thin=thin, seed=seed, title=title, likelihood=likelihood,
                       shown=tuple(q.name for q in quantities[:4]), notes=notes,
                       extra={"harmonic_mean_temperature_k": t_hm})
    post.extra["correlation_enthalpy_entropy"] = post.correlation("enthalpy_kj_mol", "entropy_j_mol_k")
    return post

