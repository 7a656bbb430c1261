"""Bayesian errors of activation parameters: posterior samples of ΔH‡ and ΔS‡ from an Eyring analysis's rates.

Optional: needs the emcee package (``pip install emcee``, or the ``bayes`` extra); the sampler, the chain
and its diagnostics are those of :mod:`dnmr.posterior`.

The Eyring line ln k = ln(kappa kB T / h) + ΔS‡/R - ΔH‡/(R T), sampled in (ΔH‡, ΔS‡) with flat priors,
over the rates that entered the least-squares fit (bound rows are left out, as there).  Each ln k is
normal with the standard error rate_stderr / rate.  When the Eyring analysis took its errors from the
scatter (no rate errors, or ``scale_errors``), a common factor f on those errors is sampled as well with
the prior p(f) ~ 1/f (flat in ln f), which makes the marginal posterior of the line the Student t of
Gelman et al., Bayesian Data Analysis, 3rd ed., section 14.2.  Temperature errors are latent variables:
the true temperatures are T_obs + L z with z standard normal and L L^T the temperatures' covariance (so
correlated calibration errors are covered), and z is sampled with the line and marginalised, as the
least-squares line counts them (generalised least squares).  ΔG‡ at 298.15 K and at the harmonic-mean
temperature of the data (weighted as in the fit) follow from every sample.

Rate errors shared through held trends
--------------------------------------
The parts of the rate errors that ``dnmr fit`` shares between rows through held slow-exchange trends
(``log10_rate_shared_*``) are counted as the least-squares line counts them: the rates keep their errors
as given as the likelihood's weights (a likelihood with the shared parts correlated would be generalised
least squares, which their curvature biases; see :mod:`dnmr.activation.line_fit`), and the samples of
(ΔH‡, ΔS‡) are stretched about the least-squares estimate so that their covariance becomes the line's,
which counts those parts as correlated: the open-faced sandwich adjustment of Shaby, J. Comput. Graph.
Stat. 23, 853 (2014), theta* = theta_hat + Omega (theta - theta_hat) with Omega = L_line L_work^-1
(Cholesky factors of the line's covariance and of the same line's with the shared parts counted as
independent, which is what the unadjusted samples spread by).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from types import ModuleType

import numpy as np

import dnmr  # for annotations only: the result's class is named through the public API (no import circle)
from dnmr.activation.line_fit import SHARE_HELD, fit_line
from dnmr.activation.temperature_errors import covariance_factor
from dnmr.errors import InputError
from dnmr.kinetics import GAS_CONSTANT, STANDARD_TEMPERATURE_K
from dnmr.posterior import Posterior, Quantity, posterior_from_chain, require_emcee, sampler_settings, starting_ball

R_KJ = GAS_CONSTANT / 1e3  # kJ/(mol K)
TO_ENERGY = np.array([[0.0, -R_KJ], [GAS_CONSTANT, 0.0]])  # d(ΔH‡, ΔS‡)/d(intercept, slope) of the Eyring line


def sample_eyring_posterior(
    result: "dnmr.EyringResult",
    *,
    steps: int = 10000,
    walkers: int | None = None,
    burn: int | None = None,
    thin: int = 1,
    seed: int | None = 0,
) -> Posterior:
    """Posterior samples of ΔH‡ (kJ/mol) and ΔS‡ (J/(mol K)) from the rates of an Eyring analysis.

    Flat priors on ΔH‡ and ΔS‡; ln k normal with the rate errors, or with a common factor on them
    sampled under p(f) ~ 1/f when the analysis took its errors from the scatter; temperature errors as
    latent temperatures T_obs + L z, z standard normal, L L^T the temperatures' covariance, marginalised;
    rate errors shared through held trends counted as correlated as in the least-squares line, by the
    open-faced sandwich adjustment (see the module notes).  Bound rows are left out, as in the
    least-squares fit; the probability that the line respects each of them is reported in the notes.

    Parameters
    ----------
    result : EyringResult
        The least-squares Eyring analysis (:func:`dnmr.activation.eyring.eyring_fit` and friends).
    steps, walkers, burn, thin, seed
        As for :func:`dnmr.fitting.posterior.sample_spectrum_posterior` (default 10000 steps: a few
        seconds; latent temperatures count as sampled parameters for the default number of walkers).

    Returns
    -------
    Posterior
        Quantities ``enthalpy_kj_mol``, ``entropy_j_mol_k``, ``gibbs_298_kj_mol``, ``gibbs_hm_kj_mol``
        (and ``error_scale`` when sampled); extra results ``harmonic_mean_temperature_k`` (K) and
        ``correlation_enthalpy_entropy``.
    """
    emcee = require_emcee()
    line = _EyringLikelihood.of(result)
    walkers, burn = sampler_settings(steps, walkers, burn, thin, line.dimensions)
    raw, acceptance = _run_sampler(emcee, line, result, steps, walkers, seed)
    adjustment = held_trend_adjustment(result)
    if adjustment is not None:
        centre = np.array([result.enthalpy_kj_mol, result.entropy_j_mol_k])
        raw[:, :, :2] = centre + (raw[:, :, :2] - centre) @ adjustment.T
    t_hm = result.harmonic_mean_temperature_k
    full, quantities = _quantities(raw, t_hm, line.scaled)
    notes = _bound_notes(result, line, full[burn:].reshape(-1, full.shape[-1])) + _correlation_notes(result, line)
    if adjustment is not None:
        notes.append("the rate errors shared through held trends are counted as correlated, as in the "
                     "least-squares line: the samples of ΔH‡ and ΔS‡ are stretched about its estimate to its "
                     "covariance (open-faced sandwich adjustment, Shaby 2014)")
    title = f"the Eyring line of process {result.process!r}" if result.process else "the Eyring line"
    post = posterior_from_chain(full, quantities, acceptance=acceptance, walkers=walkers, steps=steps, burn=burn,
                                thin=thin, seed=seed, title=title, likelihood=line.describe(),
                                shown=tuple(q.name for q in quantities[:4]), notes=notes,
                                extra={"harmonic_mean_temperature_k": t_hm})
    post.extra["correlation_enthalpy_entropy"] = post.correlation("enthalpy_kj_mol", "entropy_j_mol_k")
    return post


def held_trend_adjustment(result: "dnmr.EyringResult") -> np.ndarray | None:
    """Omega of the open-faced sandwich adjustment (2 x 2, acting on (ΔH‡ / kJ mol^-1, ΔS‡ / J mol^-1 K^-1)):
    L_line L_work^-1, so that Omega C_work Omega^T = C_line (see the module notes); None when no rate
    errors are shared through held trends (the samples then spread as the line's errors already)."""
    if SHARE_HELD not in result.eyring.covariance_parts:
        return None
    fitted = result.series.subset(result.used)
    working = fit_line(replace(fitted, rate_shared={}), power=1, scaled=result.errors_scaled).covariance
    line, work = (TO_ENERGY @ c @ TO_ENERGY.T for c in (result.eyring.covariance, working))
    return np.linalg.cholesky(line) @ np.linalg.inv(np.linalg.cholesky(work))


@dataclass(frozen=True)
class _EyringLikelihood:
    """The likelihood of the Eyring line over the fitted rates (see the module notes).

    The sampled parameters are ΔH‡ (kJ/mol), ΔS‡ (J/(mol K)), ln f when `scaled`, then the latent
    temperatures z (standard normal; the true temperatures are `temperature_k` + `latent` @ z).
    """

    temperature_k: np.ndarray
    ln_rate: np.ndarray
    ln_rate_stderr: np.ndarray
    latent: np.ndarray
    temperature_covariance: np.ndarray
    ln_kappa_kb_over_h: float
    scaled: bool
    errors_given: bool

    @classmethod
    def of(cls, result: "dnmr.EyringResult") -> "_EyringLikelihood":
        """The likelihood of the rates that entered `result`'s fit; refused for an improper posterior."""
        k, n = result.rate_per_s, result.rate_per_s.size
        errors_given = result.errors_given
        sigma = result.series.rate_stderr[result.used] / k if errors_given else np.ones(n)
        if result.errors_scaled and n < 3:
            raise InputError(f"{n} rates with errors from their scatter: the posterior is improper (the scatter of two "
                             "points about their line is zero); give rate errors or measure more temperatures",
                             where="posterior")
        cov_t = result.series.temperature_covariance[np.ix_(result.used, result.used)]
        return cls(result.temperature_k, np.log(k), sigma, covariance_factor(cov_t), cov_t, result.ln_kappa_kb_over_h,
                   result.errors_scaled, errors_given)

    @property
    def dimensions(self) -> int:
        """Number of sampled parameters."""
        return 2 + int(self.scaled) + self.latent.shape[1]

    def line(self, enthalpy_kj_mol: np.ndarray, entropy_j_mol_k: np.ndarray,
             temperature_k: np.ndarray | float) -> np.ndarray:
        """ln(k / s^-1) of the Eyring line at `temperature_k` (K)."""
        return (self.ln_kappa_kb_over_h + np.log(temperature_k) + entropy_j_mol_k / GAS_CONSTANT
                - enthalpy_kj_mol / (R_KJ * temperature_k))

    def log_probability(self, theta: np.ndarray) -> np.ndarray:
        """ln posterior (up to a constant) of each row of `theta` (walkers x parameters); -inf where a
        latent temperature is not positive."""
        dh, ds = theta[:, 0], theta[:, 1]
        z = theta[:, 2 + int(self.scaled):]
        temps = self.temperature_k + z @ self.latent.T
        with np.errstate(invalid="ignore", divide="ignore"):
            model = self.line(dh[:, None], ds[:, None], temps)
        ss = (((self.ln_rate - model) / self.ln_rate_stderr) ** 2).sum(axis=1)
        lp = -0.5 * (z * z).sum(axis=1)
        if self.scaled:
            ln_f = theta[:, 2]
            lp += -0.5 * ss * np.exp(-2.0 * ln_f) - self.ln_rate.size * ln_f
        else:
            lp += -0.5 * ss
        return np.where((temps > 0).all(axis=1) & np.isfinite(lp), lp, -np.inf)

    def describe(self) -> str:
        """The likelihood and priors, in words."""
        errors = "rate errors as given" if not self.scaled else (
            "rate errors times a common factor f, p(f) ~ 1/f" if self.errors_given
            else "equal errors on ln k of unknown size f, p(f) ~ 1/f")
        latent = self.latent.shape[1]
        temperature = (f"temperatures latent, normal about the measured ones with their covariance ({latent} "
                       "independent components), marginalised") if latent else "temperatures exact"
        return f"ln k normal about the Eyring line, {errors}; {temperature}; flat priors on ΔH‡ and ΔS‡"


def _run_sampler(emcee: ModuleType, line: _EyringLikelihood, result: "dnmr.EyringResult", steps: int, walkers: int,
                 seed: int | None) -> tuple[np.ndarray, float]:
    """emcee's ensemble from a ball about the least-squares line: the whole chain (steps, walkers,
    parameters) and the mean acceptance fraction."""
    rng = np.random.default_rng(seed)
    ndim, scaled = line.dimensions, line.scaled
    centre = [result.enthalpy_kj_mol, result.entropy_j_mol_k]
    cov = np.zeros((ndim, ndim))
    cov[:2, :2] = TO_ENERGY @ result.eyring.covariance @ TO_ENERGY.T
    if scaled:
        centre.append(math.log(max(result.eyring.scatter, 1e-300)))
        cov[2, 2] = 1.0 / (2.0 * max(line.ln_rate.size - 2, 1))  # the spread of ln s for n - 2 degrees of freedom
    centre += [0.0] * line.latent.shape[1]
    cov[2 + int(scaled):, 2 + int(scaled):] = np.eye(line.latent.shape[1])
    inf = np.full(ndim, np.inf)
    start = starting_ball(rng, np.array(centre), 0.25 * cov, walkers, -inf, inf)
    sampler = emcee.EnsembleSampler(walkers, ndim, line.log_probability, vectorize=True)
    if seed is not None:
        sampler.random_state = np.random.RandomState(seed).get_state()
    sampler.run_mcmc(start, steps, progress=False)
    return sampler.get_chain(), float(np.mean(sampler.acceptance_fraction))


def _quantities(raw: np.ndarray, harmonic_mean_temperature_k: float, scaled: bool) -> tuple[np.ndarray, list[Quantity]]:
    """The chain of the reported quantities (ΔH‡, ΔS‡, ΔG‡ at 298.15 K and at the harmonic-mean temperature
    (K), the error scale f when sampled) from the raw chain, and what each column is."""
    t_hm = harmonic_mean_temperature_k
    dh, ds = raw[:, :, 0], raw[:, :, 1]
    columns = [dh, ds, dh - STANDARD_TEMPERATURE_K * ds / 1e3, dh - t_hm * ds / 1e3]
    quantities = [Quantity("enthalpy_kj_mol", "ΔH‡ / kJ mol⁻¹", "kJ/mol"),
                  Quantity("entropy_j_mol_k", "ΔS‡ / J mol⁻¹ K⁻¹", "J/(mol K)"),
                  Quantity("gibbs_298_kj_mol", "ΔG‡(298.15 K) / kJ mol⁻¹", "kJ/mol", flat_prior=False),
                  Quantity("gibbs_hm_kj_mol", f"ΔG‡({t_hm:.1f} K) / kJ mol⁻¹", "kJ/mol", flat_prior=False)]
    if scaled:
        columns.append(np.exp(raw[:, :, 2]))
        quantities.append(Quantity("error_scale", "error scale f", "", prior_range=(0.0, math.inf), flat_prior=False))
    return np.stack(columns, axis=2), quantities


def _bound_notes(result: "dnmr.EyringResult", line: _EyringLikelihood, kept: np.ndarray) -> list[str]:
    """The bound rows left out, and the posterior probability that the line respects each of them (`kept`:
    the samples after burn-in, ΔH‡ and ΔS‡ in the first two columns)."""
    notes = [f"{len(result.bounds)} bound row(s) left out, as in the least-squares fit"] if result.bounds else []
    for b in result.bounds:
        ln_line = line.line(kept[:, 0], kept[:, 1], b.temperature_k)
        inside = np.ones(ln_line.size, bool)
        if np.isfinite(b.rate_lower):
            inside &= ln_line >= math.log(b.rate_lower)
        if np.isfinite(b.rate_upper):
            inside &= ln_line <= math.log(b.rate_upper)
        notes.append(f"the bound at {b.temperature_k:g} K ({b.where}) is respected by the line with posterior "
                     f"probability {inside.mean():.2f}")
    return notes


def _correlation_notes(result: "dnmr.EyringResult", line: _EyringLikelihood) -> list[str]:
    """A note when the temperature errors are correlated: the rates pin part of their common error."""
    cov_t = line.temperature_covariance
    off_diagonal = cov_t - np.diag(np.diag(cov_t))
    if np.abs(off_diagonal).max(initial=0.0) <= 1e-9 * max(float(np.abs(cov_t).max(initial=0.0)), 1e-300):
        return []
    return [
        "the temperature errors are correlated (a calibration): through the straightness of the Eyring line the "
        "rates pin part of that common error, here as in the least-squares line (generalised least squares), so "
        "both rest on the line being straight (no heat capacity of activation, no tunnelling)"]
