"""Posterior samples (dnmr.fitting.posterior): the Eyring line, one spectrum (importance sampling from the fit
and emcee's ensemble), the pairwise figure, the CLI.

References: Gelman et al., Bayesian Data Analysis, 3rd ed. (2013), section 14.2 (linear regression with
the noninformative prior: the posterior of the coefficients is normal about the weighted least-squares
estimate with covariance (X^T W X)^-1 for known errors, Student t with n - k degrees of freedom and scale
s^2 (X^T W X)^-1 for errors of unknown scale), with statsmodels WLS as the reference library; the
McConnell closed form (J. Chem. Phys. 28, 430 (1958); tests/closed_forms.py) for the synthetic spectra,
never dnmr's engine.  Rate series follow the Eyring equation written out with scipy.constants for
invented activation parameters.  Chains are short (fixed seeds); every tolerance is a few Monte Carlo
standard errors, from the chain's own effective sample size.
"""
from __future__ import annotations

import concurrent.futures as futures
import csv
import json
import math
import sys
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np
import pytest
import statsmodels.api as sm
from click.testing import CliRunner
from scipy import constants

from closed_forms import mcconnell_two_site
from dnmr.activation.eyring import eyring_fit, eyring_fit_series
from dnmr.activation.rates import RateSeries
from dnmr.activation.temperature_errors import TemperatureErrors
from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.fitting.spectrumfit import fit_spectrum
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State
from dnmr.activation.posterior import sample_eyring_posterior
from dnmr.fitting.posterior import sample_spectrum_posterior
from dnmr.posterior import INSTALL_HINT
from dnmr.io.measured import MeasuredSpectrum

R, KB, H = constants.R, constants.k, constants.h
TRUE_DH, TRUE_DS = 55.0, -12.0  # kJ/mol, J/(mol K): invented
TEMPS = np.linspace(230.0, 300.0, 8)
SF, SITE_A, SITE_B = 400.0, 2.90, 3.10  # MHz, ppm (80 Hz apart)
PPM = np.linspace(2.5, 3.5, 1000)
REGION = (2.7, 3.3)


def eyring_k(t: np.ndarray) -> np.ndarray:
    """Eyring equation k = kB T/h exp(dS/R) exp(-dH/RT), written out with scipy.constants."""
    return KB * t / H * np.exp(TRUE_DS / R) * np.exp(-TRUE_DH * 1e3 / (R * t))


def noisy_rates(seed: int) -> np.ndarray:
    return eyring_k(TEMPS) * np.exp(np.random.default_rng(seed).normal(0.0, 0.05, TEMPS.size))


def line_samples(post) -> np.ndarray:
    """(intercept, slope) of ln(k/T) = a + b / T from the (ΔH‡, ΔS‡) samples."""
    dh, ds = post.column("enthalpy_kj_mol"), post.column("entropy_j_mol_k")
    return np.column_stack([ds / R + math.log(KB / H), -dh * 1e3 / R])


# --- the Eyring line: a linear Gaussian model with flat priors -------------------------------------

@pytest.mark.parametrize("errors_given", [True, False])
def test_eyring_posterior_is_the_weighted_least_squares_line(errors_given):
    # Gelman et al. (BDA3, section 14.2): with flat priors the posterior of (intercept, slope) is normal
    # about the WLS estimate with covariance (X^T W X)^-1 (known errors); with errors of unknown scale
    # (prior p(sigma) ~ 1/sigma) it is Student t with n - 2 degrees of freedom and scale matrix
    # s^2 (X^T W X)^-1, whose covariance is (n - 2)/(n - 4) times that.  Reference: statsmodels WLS.
    k = noisy_rates(5)
    k_err = k * np.linspace(0.03, 0.08, TEMPS.size)
    result = eyring_fit(TEMPS, k, k_err if errors_given else None)
    post = result.sample_posterior(steps=3000, walkers=16, seed=1)
    x, y = sm.add_constant(1.0 / TEMPS), np.log(k / TEMPS)
    weights = (k / k_err) ** 2 if errors_given else np.ones(TEMPS.size)
    wls = sm.WLS(y, x, weights=weights).fit(**({"cov_type": "fixed scale"} if errors_given else {}))
    dof = TEMPS.size - 2
    covariance = wls.cov_params() * (1.0 if errors_given else dof / (dof - 2))
    samples = line_samples(post)
    std = np.sqrt(np.diag(covariance))
    ess = min(post.summary("enthalpy_kj_mol").effective_samples, post.summary("entropy_j_mol_k").effective_samples)
    assert ess > 300
    # Monte Carlo error of a mean: std / sqrt(ESS); of a (co)variance: about sqrt(2 / ESS) relative (normal)
    assert np.all(np.abs(samples.mean(axis=0) - wls.params) < 4.0 * std / math.sqrt(ess))
    relative = np.cov(samples.T) / np.outer(std, std) - covariance / np.outer(std, std)
    tails = 1.0 if errors_given else 2.0  # the t's fourth moment makes its sample variance noisier
    assert np.abs(relative).max() < 4.0 * tails * math.sqrt(2.0 / ess)
    d = post.to_dict()
    assert d["correlation_enthalpy_entropy"] == pytest.approx(result.correlation, abs=0.01)
    assert set(d["quantities"]) >= {"enthalpy_kj_mol", "entropy_j_mol_k", "gibbs_298_kj_mol", "gibbs_hm_kj_mol"}
    # ΔG‡ at the harmonic-mean temperature: ΔH‡ - T ΔS‡ of each sample (the definition)
    g_hm = post.column("enthalpy_kj_mol") - result.harmonic_mean_temperature_k * post.column("entropy_j_mol_k") / 1e3
    assert post.summary("gibbs_hm_kj_mol").median == pytest.approx(float(np.median(g_hm)), rel=1e-12)


def test_eyring_posterior_with_temperature_errors_and_bounds():
    # Latent temperatures with the temperatures' covariance: for small temperature errors the posterior
    # width of ΔH‡ matches the least-squares error that propagates them (dnmr's Monte Carlo over the
    # temperatures, an outside check of the latent-variable route).  Tolerance: 4 Monte Carlo standard
    # errors of the chain (the half-width of a normal's central 68 % from n samples has a standard error
    # of about sigma / sqrt(n)), plus 5 % for the least-squares side (its 4000 temperature draws, and the
    # linearisation it makes).  Bound rows are left out, and the posterior says how probable it is that
    # the line respects each.
    t = np.append(TEMPS, 200.0)
    k = np.append(noisy_rates(7), np.nan)
    k_err = np.append(0.05 * k[:-1], np.nan)
    upper = np.append(np.full(TEMPS.size, np.nan), 2.0 * eyring_k(np.array([200.0]))[0])
    result = eyring_fit(t, k, k_err, temperature_stderr=0.5, rate_upper=upper)
    post = sample_eyring_posterior(result, steps=2500, walkers=32, seed=3)
    s = post.summary("enthalpy_kj_mol")
    half_width = 0.5 * (s.ci68[1] - s.ci68[0])
    assert half_width == pytest.approx(result.enthalpy_stderr, rel=4.0 / math.sqrt(s.effective_samples) + 0.05)
    assert "latent" in post.likelihood
    assert any("200 K" in n and "probability" in n for n in post.notes)


def test_correlated_temperature_errors_give_the_generalised_least_squares_width():
    # Correlated temperature errors (a calibration's common offset): with latent temperatures
    # marginalised, the linearised model is regression with the full error covariance
    # Sigma = W^-1 + J C J^T (J = d ln(k/T)/dT along the line), whose flat-prior posterior has covariance
    # (X^T Sigma^-1 X)^-1: generalised least squares (Gelman et al., BDA3, section 14.7), as the
    # least-squares line counts them, and the posterior says that both rest on the line being straight.
    # Tolerance: 4 Monte Carlo standard errors plus 5 % for the linearisation.
    k = eyring_k(TEMPS) * np.exp(np.random.default_rng(11).normal(0.0, 0.005, TEMPS.size))
    k_err = 0.005 * k
    covariance_t = 1.0 ** 2 + np.diag(np.full(TEMPS.size, 0.2 ** 2))  # K^2: 1 K common, 0.2 K each
    result = eyring_fit(TEMPS, k, k_err, temperature_covariance=covariance_t)
    post = sample_eyring_posterior(result, steps=3000, seed=4)
    slope = -TRUE_DH * 1e3 / R
    jac = np.diag(slope / TEMPS ** 2)  # d/dT of a + b / T, with b the line's slope
    sigma = np.diag((k_err / k) ** 2) + jac @ covariance_t @ jac.T
    x = np.column_stack([np.ones(TEMPS.size), 1.0 / TEMPS])
    gls = np.linalg.inv(x.T @ np.linalg.solve(sigma, x))
    gls_dh = math.sqrt(gls[1, 1]) * R / 1e3
    s = post.summary("enthalpy_kj_mol")
    half_width = 0.5 * (s.ci68[1] - s.ci68[0])
    assert half_width == pytest.approx(gls_dh, rel=4.0 / math.sqrt(s.effective_samples) + 0.05)
    assert half_width == pytest.approx(result.enthalpy_stderr, rel=4.0 / math.sqrt(s.effective_samples) + 0.05)
    assert any("correlated" in n and "least-squares line" in n and "straight" in n for n in post.notes)


def test_eyring_posterior_counts_held_trend_errors_as_the_line_does():
    # Rate errors shared through held trends (log10_rate_shared_*: most of each rate's error, a common shift
    # and a tilt): the posterior must spread as the line's estimate does under the correlated errors.
    # Reference: Monte Carlo with correlated draws (numpy), the spread of statsmodels WLS (the line's weights)
    # over 20,000 draws from V = diag(sigma^2 - |u|^2) + U U^T; the samples are stretched to the line's
    # covariance by the open-faced sandwich adjustment (Shaby, J. Comput. Graph. Stat. 23, 853 (2014)).
    # Tolerance: 4 Monte Carlo standard errors of the chain plus 5 % (the 20,000 draws, about 1 %).
    sigma = np.linspace(0.02, 0.05, TEMPS.size)
    tilt = (TEMPS - TEMPS.mean()) / np.ptp(TEMPS)
    u = np.column_stack([0.7 * sigma, 1.2 * sigma * tilt])
    u[:2] = 0.0
    v = np.diag(sigma**2 - (u**2).sum(axis=1)) + u @ u.T
    k = eyring_k(TEMPS) * np.exp(np.random.default_rng(12).multivariate_normal(np.zeros(TEMPS.size), v))
    n = TEMPS.size
    series = RateSeries("", TEMPS, k, sigma * k, np.full(n, np.nan), np.full(n, np.nan),
                        TemperatureErrors(np.zeros(n), np.zeros((n, 0))),
                        rate_shared={"shift_ppm_A_1": u[:, 0], "shift_ppm_A_2": u[:, 1]})
    result = eyring_fit_series(series)
    post = sample_eyring_posterior(result, steps=3000, walkers=16, seed=5)
    x = sm.add_constant(1.0 / TEMPS)
    draws = np.random.default_rng(13).multivariate_normal(np.zeros(n), v, size=20_000)
    spread = sm.WLS(draws.T, x, weights=1.0 / sigma**2).fit().params.T @ np.array([[0.0, R], [-R / 1e3, 0.0]])
    for name, reference, column in (("enthalpy_kj_mol", result.enthalpy_stderr, 0), ("entropy_j_mol_k", result.entropy_stderr, 1)):
        s = post.summary(name)
        tolerance = 4.0 / math.sqrt(s.effective_samples) + 0.05
        assert np.std(post.column(name)) == pytest.approx(np.std(spread[:, column]), rel=tolerance)
        assert np.std(post.column(name)) == pytest.approx(reference, rel=tolerance)
        assert np.median(post.column(name)) == pytest.approx(getattr(result, name), abs=4 * reference / math.sqrt(s.effective_samples))
    # without the shared parts the errors are far narrower: the check above tells the two apart
    assert eyring_fit(TEMPS, k, sigma * k).enthalpy_stderr < 0.7 * np.std(spread[:, 0])
    assert any("held trends" in note and "Shaby" in note for note in post.notes)


def test_two_rates_without_errors_have_no_posterior():
    # Gelman et al. (BDA3, 14.2): the noninformative-prior posterior is proper only for n > k (here 2)
    result = eyring_fit(TEMPS[:2], eyring_k(TEMPS[:2]))
    with pytest.raises(InputError, match="improper"):
        sample_eyring_posterior(result, steps=100)


def test_fixed_seed_repeats_the_chain_and_bad_settings_are_one_line_errors():
    result = eyring_fit(TEMPS, noisy_rates(1), 0.05 * noisy_rates(1))
    first, second = (sample_eyring_posterior(result, steps=200, walkers=8, seed=9) for _ in range(2))
    assert np.array_equal(first.samples, second.samples)
    for settings, where in (({"walkers": 3}, "walkers"), ({"steps": 50, "burn": 45}, "burn"), ({"thin": 0}, "thin")):
        with pytest.raises(InputError) as err:
            sample_eyring_posterior(result, **settings)
        assert err.value.where == where


# --- one spectrum ------------------------------------------------------------------------------------

def two_site_model(linewidth: float = 1.2) -> Model:
    return Model(Spectrometer(SF),
                 (State("a", {"H": SITE_A}, linewidth_hz=linewidth, population=0.5),
                  State("b", {"H": SITE_B}, linewidth_hz=linewidth, population=0.5)),
                 (Exchange("a", "b", rate_per_s=1e5, name="flip"),))


def mcconnell_spectrum(k_true: float, sigma: float, seed: int) -> MeasuredSpectrum:
    """50 x the McConnell (1958) absorption (1.2 Hz lines) plus normal noise of standard deviation `sigma`."""
    s = mcconnell_two_site(PPM * SF, SITE_A * SF, SITE_B * SF, k_true, 0.5, 1.2, 1.2)
    y = 50.0 * s.real + np.random.default_rng(seed).normal(0.0, sigma, PPM.size)
    return MeasuredSpectrum(PPM, y, SF, "synthetic.csv", "text")


# a small problem keeps the chains short: linear baseline of order 0, no phase, no offset
SMALL = {"region_ppm": REGION, "baseline_order": 0, "phase": "none", "frequency_offset": False}


@pytest.mark.parametrize("method", ["importance", "emcee"])
def test_well_determined_rate_posterior_matches_least_squares(method):
    # McConnell (1958) spectrum near coalescence (k = 120 s^-1, k_c = pi 80 / sqrt 2 = 178 s^-1,
    # Gutowsky & Holm 1956), noise sigma = 0.1 known.  For a well-determined rate the posterior is close
    # to normal (Laplace approximation), so its 95 % interval is about 2 x 1.96 least-squares errors.
    # Both samplers: importance sampling from the fit (the default) and emcee's ensemble.
    k_true = 120.0
    fit = fit_spectrum(mcconnell_spectrum(k_true, 0.1, 3), two_site_model(), linewidth="fixed", **SMALL)
    assert fit.rate(0).status == "determined"
    before = {name: p.estimate for name, p in fit.parameters.items()}
    calls = []
    if method == "emcee":
        post = sample_spectrum_posterior(fit, method="emcee", steps=500, walkers=12, seed=1,
                                         progress=lambda *a: calls.append(a))
        assert calls[-1] == (500, 500) and len(calls) >= 400  # one call a step
        assert any("autocorrelation times" in n and "emcee advises" in n for n in post.notes)  # 375 kept steps
    else:
        post = sample_spectrum_posterior(fit, draws=2000, seed=1, progress=lambda *a: calls.append(a))
        assert calls[-1] == (2000, 2000) and len(calls) == 2000  # one call a draw
        assert post.importance["pareto_k"] < 0.7 and post.importance["effective_samples"] > 1000
        assert post.samples.shape[0] == 2000 and "importance sampling" in post.report()
    assert {name: p.estimate for name, p in fit.parameters.items()} == before  # the least-squares fit is left as it was
    s = post.summary("log10_rate_flip")
    assert s.kind == "interval"
    assert s.ci95[0] < math.log10(k_true) < s.ci95[1]
    width, laplace = s.ci95[1] - s.ci95[0], 2 * 1.959964 * fit.rate(0).log10_rate_stderr
    assert width == pytest.approx(laplace, rel=0.3)
    rate = post.summary("rate_per_s_flip")  # the same quantiles in s^-1
    assert rate.ci95 == pytest.approx(tuple(10.0 ** v for v in s.ci95), rel=1e-6)  # up to interpolation
    assert rate.median == pytest.approx(10.0 ** s.median, rel=1e-6)
    d = json.loads(json.dumps(post.to_dict()))
    assert d["quantities"]["log10_rate_flip"]["kind"] == "interval" and d["method"] == method
    assert d["walkers"] == (12 if method == "emcee" else 1)
    assert "error scale" in post.report() and "flip" in post.report()


@pytest.mark.parametrize("pool", [futures.ProcessPoolExecutor, futures.ThreadPoolExecutor])
def test_importance_posterior_on_an_executor_equals_the_serial_one(pool):
    # The draws come from this process's seeded generator and each ln posterior is a function of its draw
    # alone, so the workers of an executor (processes, or threads sharing one payload) must give the same
    # weights and samples as the serial run, bit for bit.
    fit = fit_spectrum(mcconnell_spectrum(120.0, 0.1, 3), two_site_model(), linewidth="fixed", **SMALL)
    serial = sample_spectrum_posterior(fit, draws=600, seed=2)
    calls, tasks = [], []

    class Counted(pool):
        def submit(self, *args, **kwargs):
            tasks.append(args[0])
            return super().submit(*args, **kwargs)

    with Counted(max_workers=2) as executor:
        spread = sample_spectrum_posterior(fit, draws=600, seed=2, executor=executor,
                                           progress=lambda *a: calls.append(a))
    assert len(tasks) >= 600 // 50  # the draws went to the executor, 50 to a task
    assert np.array_equal(spread.samples, serial.samples)
    assert spread.importance == serial.importance and spread.notes == serial.notes
    assert calls[-1] == (600, 600)  # after every stage of draws


def test_emcee_on_an_executor_equals_the_serial_chain():
    # The walkers' moves are drawn here from the seed; each half of the walkers is evaluated on the executor
    # at every step: the same chain as in this process, bit for bit.
    fit = fit_spectrum(mcconnell_spectrum(120.0, 0.1, 3), two_site_model(), linewidth="fixed", **SMALL)
    settings = {"method": "emcee", "steps": 60, "walkers": 8, "seed": 1}
    serial = sample_spectrum_posterior(fit, **settings)
    tasks = []

    class Counted(futures.ProcessPoolExecutor):
        def submit(self, *args, **kwargs):
            tasks.append(args[0])
            return super().submit(*args, **kwargs)

    with Counted(max_workers=2) as executor:
        spread = sample_spectrum_posterior(fit, executor=executor, **settings)
    assert len(tasks) >= 2 * 60  # every step's two halves of the 8 walkers went to the executor, 4 to a task
    assert np.array_equal(spread.samples, serial.samples) and spread.notes == serial.notes


@pytest.mark.parametrize("method", ["importance", "emcee"])
def test_slow_limit_posterior_gives_an_upper_bound_like_the_profile(method):
    # k = 0.005 s^-1 broadens the lines by k/pi = 0.002 Hz (slow limit of McConnell 1958), far below
    # what this noise resolves while the linewidth is fitted: the profile gives an upper bound (this
    # noise draw; tests/test_fitting.py shows it is the usual outcome).  The posterior, flat in log10 k,
    # follows the prior below the bound (no lower limit) and gives a one-sided 95 % bound.
    fit = fit_spectrum(mcconnell_spectrum(0.005, 0.1, 0), two_site_model(), linewidth="shared", **SMALL)
    rate = fit.rate(0)
    assert rate.status == "upper-bound"
    settings = {"method": "emcee", "steps": 700, "walkers": 12} if method == "emcee" else {"draws": 3000}
    post = sample_spectrum_posterior(fit, seed=2, **settings)
    assert post.method == method
    s = post.summary("log10_rate_flip")
    assert s.kind == "upper-bound" and math.isnan(s.median) and math.isnan(s.ci68[0])
    x = post.column("log10_rate_flip")
    profile_bound = math.log10(rate.rate_upper)
    # the profile's bound is where chi-square has risen by s (one standard error of a normal likelihood):
    # beyond it a likelihood rising like a half-normal from the plateau's end leaves 31.7 % of the mass
    # (normal tail P(Z > 1) / P(Z > 0)), and a plateau of prior below only lowers that share
    assert np.mean(x > profile_bound) < 0.317
    assert abs(s.bound95 - profile_bound) < 1.0  # same order of magnitude; the posterior's depends on the prior
    assert math.log10(0.005) < s.bound95 < math.log10(math.pi * 1.2)  # broadening as large as the line's is seen
    low = s.prior_range[0]
    below = x[x < s.bound95]
    # no lower limit: the lower half of the stretch from the prior's end to the bound keeps a fair share
    # of the mass (a posterior with a lower limit would leave it nearly empty)
    assert np.mean(below < 0.5 * (low + s.bound95)) > 0.3
    assert "upper bound" in post.summary("rate_per_s_flip").describe()
    # the rate's bound is the same order statistic of the rate samples: both scales interpolate linearly
    # between the two samples around the 95th percentile (numpy's default), so it lies between their rates
    ordered = np.sort(x)
    k = int(math.floor(0.95 * (ordered.size - 1)))
    rate_bound = post.summary("rate_per_s_flip").bound95
    assert 10.0 ** ordered[k] * (1 - 1e-12) <= rate_bound <= 10.0 ** ordered[k + 1] * (1 + 1e-12)


def test_bad_sampler_settings_are_one_line_errors():
    fit = fit_spectrum(mcconnell_spectrum(120.0, 0.1, 3), two_site_model(), linewidth="fixed", **SMALL)
    for settings, where in (({"method": "gibbs"}, "method"), ({"draws": 50}, "draws")):
        with pytest.raises(InputError) as err:
            sample_spectrum_posterior(fit, **settings)
        assert err.value.where == where


# --- the pairwise posterior figure -------------------------------------------------------------------

@pytest.mark.parametrize("p", [2, 4, 6])
def test_pairs_figure_panels_labels_and_numbers(p):
    # p densities on the diagonal, p (p - 1) / 2 pair panels below, the correlation coefficients above
    # (Pearson's r, checked against numpy.corrcoef), the median and 95 % interval of each quantity
    from dnmr.reporting.posteriorplot import plot_posterior_pairs

    rng = np.random.default_rng(0)
    samples = rng.normal(size=(4000, p)) @ np.triu(np.full((p, p), 0.5)) + np.arange(p)
    labels = [f"q{i} / Hz" for i in range(p)]
    fig = plot_posterior_pairs(samples, labels, true_values=[0.0] * p)
    grid = np.array(fig.axes).reshape(p, p)
    assert [ax.get_xlabel() for ax in grid[-1]] == labels
    assert [grid[i, 0].get_ylabel() for i in range(1, p)] == labels[1:]
    r = np.corrcoef(samples, rowvar=False)
    for i in range(p):
        for j in range(i + 1, p):
            digits = 3 if abs(r[i, j]) >= 0.99 else 2
            assert grid[i, j].texts[0].get_text() == f"r = {r[i, j]:+.{digits}f}".replace("-", "−")
    low, median, high = np.percentile(samples[:, 0], [2.5, 50, 97.5])
    numbers = grid[0, 0].texts[0].get_text().replace("−", "-")
    assert [float(v) for v in numbers.replace("95 %:", "").replace(" to ", " ").split()] == pytest.approx(
        [median, low, high], abs=0.05)  # rounded to two digits of the interval's half-width (about 1)
    assert all(len(grid[i, j].collections) >= 2 for i in range(1, p) for j in range(i))  # filled regions
    plt.close(fig)


def test_pairs_figure_old_names_say_what_they_became():
    from dnmr.reporting.plotting import plot_corner
    from dnmr.reporting.posteriorplot import plot_posterior_pairs

    with pytest.raises(InputError, match="renamed to plot_posterior_pairs"):
        plot_corner(np.zeros((10, 2)), ["a", "b"])
    with pytest.raises(InputError, match="renamed to 'true_values'"):
        plot_posterior_pairs(np.zeros((10, 2)), ["a", "b"], truths=[0.0, 0.0])


def test_pairs_figure_states_a_one_sided_bound_not_a_median():
    # a rate the data only bound is shown by its one-sided 95 % bound (common practice: no error bar)
    from dnmr.reporting.posteriorplot import plot_posterior_pairs

    rng = np.random.default_rng(1)
    samples = np.c_[rng.uniform(-2.0, 1.0, 5000), rng.normal(2.0, 0.2, 5000)]
    fig = plot_posterior_pairs(samples, ["log10(k / s^-1)", "width / Hz"], one_sided=["upper-bound", None])
    grid = np.array(fig.axes).reshape(2, 2)
    assert grid[0, 0].texts[0].get_text() == f"< {np.percentile(samples[:, 0], 95):.3g}\n(95 % bound)"
    assert grid[1, 0].get_xlabel() == "log$_{10}$(k / s$^{-1}$)"  # a real superscript and subscript
    plt.close(fig)


def test_posterior_plot_marks_a_bound_one_sided():
    result = eyring_fit(TEMPS, noisy_rates(2), 0.05 * noisy_rates(2))
    post = sample_eyring_posterior(result, steps=300, walkers=8, seed=0)
    fig = post.plot()
    grid = np.array(fig.axes).reshape(4, 4)
    assert grid[-1, 0].get_xlabel().startswith("ΔH‡") and "kJ" in grid[-1, 0].get_xlabel()
    assert grid[1, 0].get_ylabel().startswith("ΔS‡")
    with pytest.raises(InputError, match="no quantity"):
        post.plot(names=["enthalpy"])
    with pytest.raises(InputError, match="renamed to 'true_values'"):
        post.plot(truths=[55.0, None, None, None])
    plt.close(fig)


# --- command line ----------------------------------------------------------------------------------------

def write_rates(tmp_path, seed: int = 4):
    k = noisy_rates(seed)
    path = tmp_path / "rates.csv"
    path.write_text("temperature_k,rate_per_s,rate_stderr\n"
                    + "".join(f"{float(t)!r},{float(r)!r},{0.05 * float(r)!r}\n" for t, r in zip(TEMPS, k)))
    return path


def test_cli_eyring_posterior_json_and_figure(tmp_path):
    rates = write_rates(tmp_path)
    plot = tmp_path / "eyring.png"
    args = ["eyring", str(rates), "--json", "--posterior", "--posterior-steps", "400", "--posterior-seed", "3",
            "--plot", str(plot)]
    result = CliRunner().invoke(cli, args)
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert {"enthalpy_kj_mol", "enthalpy_stderr", "gibbs_298_stderr"} <= set(out)  # the contract's keys stay
    post = out["posterior"]
    assert post["steps"] == 400 and post["seed"] == 3
    assert {"enthalpy_kj_mol", "entropy_j_mol_k", "gibbs_298_kj_mol", "gibbs_hm_kj_mol"} <= set(post["quantities"])
    assert -1 <= post["correlation_enthalpy_entropy"] <= 1
    pairs = tmp_path / "eyring_posterior.png"
    assert plot.exists() and pairs.exists()
    again = CliRunner().invoke(cli, args)  # never over an existing figure without --overwrite
    assert again.exit_code == 2 and "already exists" in again.stderr


def test_cli_without_emcee_is_one_line_exit_2(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "emcee", None)  # import emcee now raises ImportError
    result = CliRunner().invoke(cli, ["eyring", str(write_rates(tmp_path)), "--posterior"])
    assert result.exit_code == 2
    assert result.stderr.strip().count("\n") == 0 and 'pip install emcee' in result.stderr
    assert INSTALL_HINT in result.stderr and "Traceback" not in result.output


def test_cli_fit_posterior_adds_results_and_figures(tmp_path):
    # two spectra of the series tests (McConnell 1958 spectra, tests/test_series.py); few draws and a very
    # short chain: this checks the outputs, not the numbers (those are checked above)
    from test_series import write_series

    fit_table = ('region_ppm = [2.7, 3.3]\nlinewidth = "fixed"\nbaseline_order = 0\nphase = "none"\n'
                 "frequency_offset = false")
    series = write_series(tmp_path / "inputs", [250.0, 290.0], fit_table=fit_table)
    out = tmp_path / "out"
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(out), "--serial", "--quiet", "--no-report",
                                      "--posterior", "--posterior-draws", "300", "--posterior-seed", "5"])
    assert result.exit_code == 0, result.output + result.stderr
    data = json.loads((out / "results.json").read_text())
    for entry in data["spectra"]:
        post = entry["posterior"]
        assert post["method"] == "importance" and post["importance"]["draws"] == 300 and post["seed"] == 5
        assert {"log10_rate_flip", "rate_per_s_flip"} <= set(post["quantities"])
        assert (out / "figures" / Path(post["figure"]).name).exists()
    with open(out / "rates.csv", newline="") as fh:
        header = next(csv.reader(fh))
    # the columns of rates.csv stay, in their order; the posterior's are added at the end
    assert header[-4:] == ["posterior_rate_median", "posterior_rate_ci95_lower", "posterior_rate_ci95_upper",
                           "posterior_rate_bound95"]
    assert header[:6] == ["temperature_k", "process", "rate_per_s", "rate_stderr", "rate_lower", "rate_upper"]
    assert "posterior of the rates" in result.output
    # --resume reuses each stored posterior while spectrum, model, fit and settings are unchanged, and
    # samples again when the settings change
    args = ["fit", str(series), "-o", str(out), "--serial", "--quiet", "--no-report", "--resume", "--posterior",
            "--posterior-draws", "300"]
    again = CliRunner().invoke(cli, args + ["--posterior-seed", "5"])
    assert again.exit_code == 0, again.output + again.stderr
    resumed = json.loads((out / "results.json").read_text())
    for before, after in zip(data["spectra"], resumed["spectra"]):
        assert after["posterior"] == before["posterior"]
        assert "posterior reused from the earlier run" in after["notes"]
    other = CliRunner().invoke(cli, [a for a in args if a != "--quiet"] + ["--posterior-seed", "6", "--posterior-method",
                                                                             "emcee", "--posterior-steps", "40"])
    assert other.exit_code == 0, other.output + other.stderr
    assert "sampling posteriors: 2 of 2 done" in other.stderr  # plain progress lines off a terminal
    assert "elapsed" not in again.stderr  # --quiet
    for entry in json.loads((out / "results.json").read_text())["spectra"]:
        assert entry["posterior"]["seed"] == 6 and "posterior reused from the earlier run" not in entry["notes"]
        assert entry["posterior"]["method"] == "emcee" and entry["posterior"]["steps"] == 40


def test_cli_fit_posterior_without_emcee_stops_before_fitting(tmp_path, monkeypatch):
    from test_series import write_series

    monkeypatch.setitem(sys.modules, "emcee", None)
    series = write_series(tmp_path / "inputs", [250.0, 290.0])
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--posterior"])
    assert result.exit_code == 2 and 'pip install emcee' in result.stderr
    assert result.stderr.strip().count("\n") == 0 and not (tmp_path / "out").exists()
