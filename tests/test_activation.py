"""Tests of dnmr.activation.eyring: Eyring/Arrhenius analysis, error propagation, bounds, rates tables, CLI.

Reference values come from the outside world: scipy.constants (CODATA), statsmodels (weighted least
squares), the Eyring equation, Gutowsky & Holm, J. Chem. Phys. 25, 1228 (1956), and Grieger, Hunter &
Krug, Nature 261, 566 (1976). Synthetic rate series are generated from stated ΔH‡/ΔS‡ with the Eyring
equation written out here with scipy.constants, not with dnmr's own functions.
"""
from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from click.testing import CliRunner
from scipy import constants, stats
from statsmodels.stats.outliers_influence import OLSInfluence

from dnmr.activation.coalescence import COALESCENCE_CAVEAT, coalescence_barrier
from dnmr.activation.eyring import eyring_fit, eyring_fit_file, eyring_fit_series
from dnmr.activation.line_fit import BASIS_GIVEN, BASIS_SCALED, BASIS_SCATTER
from dnmr.activation.rate_table import read_rates
from dnmr.activation.rates import RateSeries
from dnmr.activation.temperature_errors import TemperatureErrors
from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.kinetics import BOLTZMANN, GAS_CONSTANT, PLANCK, eyring_rate

R = constants.R
KB, H = constants.k, constants.h
TRUE_DH, TRUE_DS = 55.0, -12.0  # kJ/mol, J/(mol K): the stated truths of the synthetic series
TEMPS = np.linspace(230.0, 300.0, 8)


def eyring_k(dh_kj: float, ds_j: float, t: np.ndarray, kappa: float = 1.0) -> np.ndarray:
    """Eyring equation k = kappa kB T/h exp(dS/R) exp(-dH/RT), written out with scipy.constants."""
    return kappa * KB * t / H * np.exp(ds_j / R) * np.exp(-dh_kj * 1e3 / (R * t))


def noisy_series(rng, sigma_ln=0.05, temps=TEMPS):
    k = eyring_k(TRUE_DH, TRUE_DS, temps)
    return k * np.exp(rng.normal(0.0, sigma_ln, len(temps)))


# ---------------------------------------------------------------------------------------------
# Constants and the Eyring equation
# ---------------------------------------------------------------------------------------------


def test_constants_are_codata_from_scipy():
    # CODATA values through scipy.constants; kB and h are exact in the 2019 SI (from memory)
    assert BOLTZMANN == constants.k == 1.380649e-23
    assert PLANCK == constants.h == 6.62607015e-34
    assert GAS_CONSTANT == constants.R
    assert GAS_CONSTANT == pytest.approx(constants.N_A * constants.k, rel=1e-15)


def test_rate_is_kB_T_over_h_at_zero_barrier():
    # common practice: with ΔG‡ = 0 the Eyring rate is the "frequency factor" kB T / h (6.2e12 s^-1 at 298 K)
    assert eyring_rate(0.0, 298.15) == pytest.approx(KB * 298.15 / H, rel=1e-14)
    assert eyring_rate(0.0, 298.15) == pytest.approx(6.21e12, rel=1e-3)
    # and the analysis of such rates returns ΔH‡ = 0 and ΔS‡ = 0
    result = eyring_fit(TEMPS, KB * TEMPS / H)
    assert result.enthalpy_kj_mol == pytest.approx(0.0, abs=1e-9)
    assert result.entropy_j_mol_k == pytest.approx(0.0, abs=1e-7)


def test_exact_series_recovers_stated_parameters():
    # Eyring equation: noise-free rates from stated ΔH‡, ΔS‡ give them back, and ΔG‡ = ΔH‡ - T ΔS‡
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    result = eyring_fit(TEMPS, k, 0.05 * k)
    assert result.enthalpy_kj_mol == pytest.approx(TRUE_DH, rel=1e-10)
    assert result.entropy_j_mol_k == pytest.approx(TRUE_DS, rel=1e-8)
    assert result.gibbs(298.15).value == pytest.approx(TRUE_DH - 298.15 * TRUE_DS / 1e3, rel=1e-10)
    # Arrhenius of the same rates: Ea = ΔH‡ + R T over the range (textbook relation), within R * a few K
    assert result.activation_energy_kj_mol == pytest.approx(TRUE_DH + R * result.harmonic_mean_temperature_k / 1e3, abs=0.03)


def test_transmission_coefficient_moves_entropy_only():
    # Eyring equation with kappa: ln(k/T) = ln(kappa kB/h) + dS/R - dH/RT, so dS shifts by -R ln kappa
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS, kappa=0.5)
    result = eyring_fit(TEMPS, k, 0.05 * k, transmission=0.5)
    assert result.enthalpy_kj_mol == pytest.approx(TRUE_DH, rel=1e-10)
    assert result.entropy_j_mol_k == pytest.approx(TRUE_DS, rel=1e-8)
    plain = eyring_fit(TEMPS, k, 0.05 * k)
    assert plain.entropy_j_mol_k - result.entropy_j_mol_k == pytest.approx(R * math.log(0.5), rel=1e-8)


# ---------------------------------------------------------------------------------------------
# statsmodels as the reference for the regression
# ---------------------------------------------------------------------------------------------


def _design(temps, rates):
    return sm.add_constant(1.0 / temps), np.log(rates / temps)


def _with_uneven_errors(seed, low, high):
    """A noisy synthetic series with rate errors drawn between `low` and `high` (relative)."""
    rng = np.random.default_rng(seed)
    k = noisy_series(rng)
    return k, k * rng.uniform(low, high, len(k))


def test_weighted_fit_matches_statsmodels_wls_with_given_errors():
    # reference library: statsmodels WLS, weights 1/sigma^2, covariance not rescaled ("fixed scale")
    k, k_err = _with_uneven_errors(11, 0.02, 0.10)
    result = eyring_fit(TEMPS, k, k_err)
    x, y = _design(TEMPS, k)
    ref = sm.WLS(y, x, weights=(k / k_err) ** 2).fit(cov_type="fixed scale")
    assert result.error_basis == BASIS_GIVEN
    assert [result.eyring.intercept, result.eyring.slope] == pytest.approx(ref.params, rel=1e-9)
    assert np.sqrt(np.diag(result.eyring.covariance)) == pytest.approx(ref.bse, rel=1e-8)
    assert result.enthalpy_stderr == pytest.approx(R * ref.bse[1] / 1e3, rel=1e-8)
    assert result.entropy_stderr == pytest.approx(R * ref.bse[0], rel=1e-8)
    # ΔG‡(T) = -R (slope + T intercept) + const: its error is R times that of the contrast (T, 1)
    for t in (250.0, 298.15, 350.0):
        assert result.gibbs(t).stderr == pytest.approx(R / 1e3 * ref.t_test([t, 1.0]).sd.item(), rel=1e-8)
    assert result.eyring.chi_square == pytest.approx(float((ref.wresid**2).sum()), rel=1e-9)


def test_scaled_errors_match_statsmodels_wls_default():
    # reference library: statsmodels WLS default covariance is scaled by the reduced chi-square
    rng = np.random.default_rng(12)
    k = noisy_series(rng, 0.08)
    k_err = 0.04 * k
    result = eyring_fit(TEMPS, k, k_err, scale_errors=True)
    x, y = _design(TEMPS, k)
    ref = sm.WLS(y, x, weights=(k / k_err) ** 2).fit()
    assert result.error_basis == BASIS_SCALED
    assert np.sqrt(np.diag(result.eyring.covariance)) == pytest.approx(ref.bse, rel=1e-8)


def test_without_errors_matches_statsmodels_ols():
    # reference library: statsmodels OLS (errors from the residual scatter), and its externally
    # studentised residuals (OLSInfluence)
    rng = np.random.default_rng(13)
    k = noisy_series(rng)
    result = eyring_fit(TEMPS, k)
    x, y = _design(TEMPS, k)
    ref = sm.OLS(y, x).fit()
    assert result.error_basis == BASIS_SCATTER
    assert [result.eyring.intercept, result.eyring.slope] == pytest.approx(ref.params, rel=1e-9)
    assert np.sqrt(np.diag(result.eyring.covariance)) == pytest.approx(ref.bse, rel=1e-8)
    assert result.studentised_residuals == pytest.approx(OLSInfluence(ref).resid_studentized_external, rel=1e-8)
    assert result.band_quantile == pytest.approx(stats.t.ppf(0.975, len(TEMPS) - 2))


def test_studentised_residuals_with_given_errors_match_whitened_statsmodels():
    # reference library: WLS is OLS on whitened data; with known errors the studentised residual is
    # e_w / sqrt(1 - h) (internal, scale 1)
    k, k_err = _with_uneven_errors(14, 0.03, 0.08)
    result = eyring_fit(TEMPS, k, k_err)
    x, y = _design(TEMPS, k)
    w = np.sqrt((k / k_err) ** 2)
    ref = sm.OLS(y * w, x * w[:, None]).fit()
    hat = OLSInfluence(ref).hat_matrix_diag
    assert result.studentised_residuals == pytest.approx(ref.resid / np.sqrt(1 - hat), rel=1e-8)


def test_points_that_fix_the_line_have_no_studentised_residual_and_no_warning():
    # reference library: statsmodels gives leverage h = 1 to both points of a two-point line (the hat
    # values sum to the 2 parameters), so 1 - h = 0 and the residual cannot be studentised; dnmr must say
    # NaN without a numpy warning, with and without rate errors
    t = np.array([250.0, 290.0])
    k = eyring_k(TRUE_DH, TRUE_DS, t) * np.array([1.03, 0.98])
    x, y = _design(t, k)
    assert OLSInfluence(sm.OLS(y, x).fit()).hat_matrix_diag == pytest.approx([1.0, 1.0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for errors in (0.05 * k, None):
            assert np.isnan(eyring_fit(t, k, errors).studentised_residuals).all()


# ---------------------------------------------------------------------------------------------
# Coverage of the stated errors (Monte Carlo over replicate synthetic series)
# ---------------------------------------------------------------------------------------------


def _coverage(fits, truths):
    inside = [[abs(value - truth) < err for (value, err), truth in zip(f, truths)] for f in fits]
    return np.mean(inside, axis=0)


def _parameters(result):
    g = result.gibbs(298.15)
    return [
        (result.enthalpy_kj_mol, result.enthalpy_stderr),
        (result.entropy_j_mol_k, result.entropy_stderr),
        (g.value, g.stderr),
    ]


TRUTHS = (TRUE_DH, TRUE_DS, TRUE_DH - 298.15 * TRUE_DS / 1e3)
REPLICAS = 400
# binomial standard error of a 68 % fraction over 400 replicas is 0.023; allow 3 of them
TOLERANCE = 3 * math.sqrt(0.683 * 0.317 / REPLICAS)


def test_stated_errors_cover_68_percent_with_given_rate_errors():
    # a 1-sigma interval of a normal estimate holds the truth 68.3 % of the time (normal distribution)
    rng = np.random.default_rng(21)
    fits = []
    for _ in range(REPLICAS):
        k = noisy_series(rng, 0.05)
        fits.append(_parameters(eyring_fit(TEMPS, k, 0.05 * k)))
    assert _coverage(fits, TRUTHS) == pytest.approx([0.683] * 3, abs=TOLERANCE)


def test_scatter_errors_cover_as_student_t():
    # without rate errors, (estimate - truth)/stderr follows Student's t with n - 2 degrees of freedom
    rng = np.random.default_rng(22)
    fits = [_parameters(eyring_fit(TEMPS, noisy_series(rng, 0.05))) for _ in range(REPLICAS)]
    expected = stats.t.cdf(1, len(TEMPS) - 2) - stats.t.cdf(-1, len(TEMPS) - 2)
    assert _coverage(fits, TRUTHS) == pytest.approx([expected] * 3, abs=TOLERANCE)


def test_temperature_errors_are_carried_into_the_coverage():
    # the nominal temperatures scatter by 1.5 K about the true ones; the stated errors must still cover
    # 68 %, and leaving the temperature errors out must cover visibly less
    rng = np.random.default_rng(23)
    with_t, without_t = [], []
    for _ in range(REPLICAS):
        k = noisy_series(rng, 0.03)
        nominal = TEMPS + rng.normal(0.0, 1.5, len(TEMPS))
        with_t.append(_parameters(eyring_fit(nominal, k, 0.03 * k, temperature_stderr=1.5)))
        without_t.append(_parameters(eyring_fit(nominal, k, 0.03 * k)))
    assert _coverage(with_t, TRUTHS) == pytest.approx([0.683] * 3, abs=TOLERANCE)
    assert (_coverage(without_t, TRUTHS) < 0.683 - TOLERANCE).all()


def test_correlated_temperature_offset_is_carried():
    # a calibration offset common to all points (1 K standard deviation), passed as a covariance of ones
    rng = np.random.default_rng(24)
    cov = np.ones((len(TEMPS), len(TEMPS)))
    fits = []
    for _ in range(REPLICAS):
        k = noisy_series(rng, 0.03)
        nominal = TEMPS + rng.normal(0.0, 1.0)
        fits.append(_parameters(eyring_fit(nominal, k, 0.03 * k, temperature_covariance=cov)))
    assert _coverage(fits, TRUTHS) == pytest.approx([0.683] * 3, abs=TOLERANCE)


def test_probe_offset_option_is_one_shared_error_and_covers():
    # an unknown probe offset (1 K standard deviation) given as temperature_offset_stderr: the same as a
    # covariance of ones, and the errors cover 68 % (normal distribution) over replicas with such offsets
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    by_option = eyring_fit(TEMPS, k, 0.03 * k, temperature_offset_stderr=1.0)
    by_matrix = eyring_fit(TEMPS, k, 0.03 * k, temperature_covariance=np.ones((8, 8)))
    assert np.asarray(by_option.eyring.covariance) == pytest.approx(by_matrix.eyring.covariance, rel=1e-9)
    assert by_option.temperature_error_sources == ("probe offset",)
    assert by_option.enthalpy_stderr > eyring_fit(TEMPS, k, 0.03 * k).enthalpy_stderr
    rng = np.random.default_rng(25)
    fits = []
    for _ in range(REPLICAS):
        fits.append(_parameters(eyring_fit(TEMPS + rng.normal(0.0, 1.0), noisy_series(rng, 0.03),
                                           0.03 * noisy_series(rng, 0.0), temperature_offset_stderr=1.0)))
    assert _coverage(fits, TRUTHS) == pytest.approx([0.683] * 3, abs=TOLERANCE)


def test_shared_temperature_error_is_not_counted_as_scatter():
    # A shared offset moves every point together: it must not make the chi-square small. E[chi^2/dof] = 1
    # for a correct error model (chi-square distribution, statistics); the mean of REPLICAS reduced
    # chi-squares of 6 degrees of freedom scatters by sqrt(2/6/REPLICAS) = 0.03, allow 4 of them.
    rng = np.random.default_rng(26)
    reduced, warned = [], 0
    for _ in range(REPLICAS):
        k = noisy_series(rng, 0.03)
        result = eyring_fit(TEMPS + rng.normal(0.0, 2.0), k, 0.03 * k, temperature_offset_stderr=2.0)
        reduced.append(result.to_dict()["reduced_chi_square"])
        warned += any("much less than their errors" in w for w in result.warnings)
    assert np.mean(reduced) == pytest.approx(1.0, abs=4 * math.sqrt(2 / 6 / REPLICAS))
    assert warned < 0.03 * REPLICAS  # the warning fires at p > 0.99: about 1 % of honest series


def test_full_temperature_covariance_matches_statsmodels_gls():
    # reference library: statsmodels GLS with the residual covariance
    # V = diag(sigma_ln k^2) + G C_T G, G = diag(-1/T + slope/T^2) (linearised effective variance),
    # C_T = diag(independent^2) + (probe offset)^2 * ones; covariance not rescaled ("fixed scale")
    rng = np.random.default_rng(27)
    k, k_err = _with_uneven_errors(28, 0.02, 0.06)
    independent = rng.uniform(0.2, 0.8, len(TEMPS))
    result = eyring_fit(TEMPS, k, k_err, temperature_stderr=independent, temperature_offset_stderr=1.0)
    g = -1.0 / TEMPS + result.eyring.slope / TEMPS**2
    c_t = np.diag(independent**2) + np.ones((8, 8))
    x, y = _design(TEMPS, k)
    ref = sm.GLS(y, x, sigma=np.diag((k_err / k) ** 2) + np.outer(g, g) * c_t).fit(cov_type="fixed scale")
    assert [result.eyring.intercept, result.eyring.slope] == pytest.approx(ref.params, rel=1e-9)
    assert np.sqrt(np.diag(result.eyring.covariance)) == pytest.approx(ref.bse, rel=1e-8)
    assert result.eyring.chi_square == pytest.approx(float((ref.wresid**2).sum()), rel=1e-8)
    # the variance splits exactly into the shares of the sources
    shares = result.error_shares()
    assert set(shares["enthalpy"]) == {"rates", "temperature scatter", "probe offset"}
    assert all(sum(q.values()) == pytest.approx(1.0, rel=1e-12) for q in shares.values())
    # scaled by the reduced chi-square: statsmodels GLS default
    scaled = eyring_fit(TEMPS, k, k_err, temperature_stderr=independent, temperature_offset_stderr=1.0, scale_errors=True)
    default = sm.GLS(y, x, sigma=np.diag((k_err / k) ** 2) + np.outer(g, g) * c_t).fit()
    assert np.sqrt(np.diag(scaled.eyring.covariance)) == pytest.approx(default.bse, rel=1e-8)


def test_rate_errors_shared_through_held_trends_are_counted_as_correlated(tmp_path):
    # Rates held at one trend move together: rates.csv gives those parts in log10_rate_shared_* columns.
    # The line keeps the weights of the rate errors as given (statsmodels WLS: same coefficients), and its
    # covariance must be that of the WLS estimator under the true covariance of ln k,
    # V = diag(sigma^2 - |u|^2) + U U^T (U = ln 10 x the shared columns): checked against the spread of
    # statsmodels WLS over 20,000 draws of correlated noise (numpy; variance to about 1 %, allow 5 %).
    k, k_err = _with_uneven_errors(31, 0.02, 0.05)
    sigma = k_err / k
    t_mid = TEMPS - TEMPS.mean()
    shared = np.column_stack([0.4 * sigma, 0.8 * sigma * t_mid / np.abs(t_mid).max()]) / math.log(10)
    shared[:2] = 0.0  # two rows fitted free: nothing held
    lines = ["temperature_k,rate_per_s,rate_stderr,log10_rate_shared_linewidth_hz_M_1,log10_rate_shared_linewidth_hz_M_2"]
    lines += [f"{t:.17g},{r:.17g},{e:.17g}," + ",".join("" if v == 0 else f"{v:.17g}" for v in row)
              for t, r, e, row in zip(TEMPS, k, k_err, shared)]
    (tmp_path / "rates.csv").write_text("\n".join(lines) + "\n")
    result = eyring_fit_file(tmp_path / "rates.csv")[0]
    x, y = _design(TEMPS, k)
    ref = sm.WLS(y, x, weights=1.0 / sigma**2).fit()
    assert [result.eyring.intercept, result.eyring.slope] == pytest.approx(ref.params, rel=1e-9)
    u = math.log(10) * shared
    v = np.diag(sigma**2 - (u**2).sum(axis=1)) + u @ u.T
    draws = np.random.default_rng(32).multivariate_normal(np.zeros(len(TEMPS)), v, size=20_000)
    spread = np.cov(sm.WLS(draws.T, x, weights=1.0 / sigma**2).fit().params)
    assert np.diag(result.eyring.covariance) == pytest.approx(np.diag(spread), rel=0.05)
    independent = eyring_fit(TEMPS, k, k_err)  # the same rates, their errors taken as independent
    assert result.enthalpy_stderr > 1.1 * independent.enthalpy_stderr
    shares = result.error_shares()["enthalpy"]
    assert set(shares) == {"rates", "held trends"} and sum(shares.values()) == pytest.approx(1.0, rel=1e-12)
    assert "(shared held-trend rate errors counted as correlated)" in result.report()


def held_trend_series(k, sigma, u):
    """Rates (s^-1) with relative errors `sigma` of which the columns `u` (ln k) are shared through held
    trends, as :func:`dnmr.activation.rate_table.read_rates` makes them from log10_rate_shared_* columns."""
    n = len(k)
    return RateSeries("", TEMPS, k, sigma * k, np.full(n, np.nan), np.full(n, np.nan),
                      TemperatureErrors(np.zeros(n), np.zeros((n, 0))),
                      rate_shared={f"shift_ppm_A_{j + 1}": u[:, j] for j in range(u.shape[1])})


def held_trend_errors():
    """Relative rate errors and large held-trend parts of them (ln k): a common shift and a tilt, most of
    each row's error, none in the two rows fitted free; V = diag(sigma^2 - |u|^2) + U U^T."""
    sigma = np.linspace(0.02, 0.05, TEMPS.size)
    tilt = (TEMPS - TEMPS.mean()) / np.ptp(TEMPS)
    u = np.column_stack([0.7 * sigma, 1.2 * sigma * tilt])
    u[:2] = 0.0
    return sigma, u, np.diag(sigma**2 - (u**2).sum(axis=1)) + u @ u.T


def test_chi_square_and_residuals_count_held_trend_errors_as_correlated():
    # A held trend's error moves its rows together and the line takes most of it up: counted as independent
    # it would make the rates look to scatter far less than their errors ("scatter much less" warning on
    # honest data). References: statsmodels GLS with the explicit covariance V (its whitened residual sum of
    # squares is the chi-square, n - 2 degrees of freedom); Monte Carlo with correlated draws (numpy): over
    # REPLICAS series E[chi^2/dof] = 1 (chi-square distribution; the mean of REPLICAS values of 6 degrees of
    # freedom scatters by sqrt(2/6/REPLICAS) = 0.03, allow 4 of them), the "much less" warning fires about
    # 1 % of the time (p > 0.99), and each studentised residual has variance 1 (its definition; the variance
    # of REPLICAS normal draws has a standard error of sqrt(2/REPLICAS) = 0.07, allow 4 of them).
    sigma, u, v = held_trend_errors()
    x = sm.add_constant(1.0 / TEMPS)
    truth = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    rng = np.random.default_rng(33)
    reduced, residuals, warned = [], [], 0
    for draw in rng.multivariate_normal(np.zeros(TEMPS.size), v, size=REPLICAS):
        result = eyring_fit_series(held_trend_series(truth * np.exp(draw), sigma, u))
        reduced.append(result.to_dict()["reduced_chi_square"])
        residuals.append(result.studentised_residuals)
        warned += any("much less than their errors" in w for w in result.warnings)
    ref = sm.GLS(np.log(truth / TEMPS) + draw, x, sigma=v).fit()
    assert result.eyring.chi_square == pytest.approx(float((ref.wresid**2).sum()), rel=1e-8)
    assert np.mean(reduced) == pytest.approx(1.0, abs=4 * math.sqrt(2 / 6 / REPLICAS))
    assert warned < 0.03 * REPLICAS
    assert np.var(residuals, axis=0) == pytest.approx(np.ones(TEMPS.size), abs=4 * math.sqrt(2 / REPLICAS))
    # the line is still drawn with the rate errors as its weights (statsmodels WLS)
    wls = sm.WLS(np.log(truth / TEMPS) + draw, x, weights=1.0 / sigma**2).fit()
    assert [result.eyring.intercept, result.eyring.slope] == pytest.approx(wls.params, rel=1e-9)


def test_externally_studentised_residuals_count_held_trend_errors_as_correlated():
    # Errors scaled by the scatter (scale_errors), rates whose stated errors are half the true ones and mostly
    # shared through held trends: each externally studentised residual follows Student's t with n - 3 = 5
    # degrees of freedom (the mean-shift outlier test; statistics, common practice), so |t| exceeds
    # t_5's 84.1 % point in 31.7 % of the series. Reference: Monte Carlo with correlated draws (numpy)
    # from 4 V, V = diag(sigma^2 - |u|^2) + U U^T; binomial standard error over REPLICAS series 0.023, allow 4.
    sigma, u, v = held_trend_errors()
    truth = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    rng = np.random.default_rng(35)
    residuals = [eyring_fit_series(held_trend_series(truth * np.exp(draw), sigma, u), scale_errors=True)
                 .studentised_residuals for draw in rng.multivariate_normal(np.zeros(TEMPS.size), 4 * v, size=REPLICAS)]
    beyond = (np.abs(residuals) > stats.t(5).isf(stats.norm.sf(1.0))).mean(axis=0)
    tail = 2 * stats.norm.sf(1.0)
    assert beyond == pytest.approx(np.full(TEMPS.size, tail), abs=4 * math.sqrt(tail * (1 - tail) / REPLICAS))


def test_long_table_with_shared_errors_needs_no_dense_covariance():
    # 20,000 rates with a probe offset: a dense 20,000 x 20,000 covariance would take 3.2 GB
    import tracemalloc

    temps = np.linspace(220.0, 320.0, 20_000)
    k = eyring_k(TRUE_DH, TRUE_DS, temps) * np.exp(np.random.default_rng(29).normal(0.0, 0.05, temps.size))
    tracemalloc.start()
    result = eyring_fit(temps, k, 0.05 * k, temperature_stderr=0.3, temperature_offset_stderr=1.0)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 100e6
    assert result.enthalpy_kj_mol == pytest.approx(TRUE_DH, abs=4 * result.enthalpy_stderr)


# ---------------------------------------------------------------------------------------------
# Error structure (Grieger, Hunter & Krug 1976)
# ---------------------------------------------------------------------------------------------


def test_enthalpy_entropy_correlation_close_to_one_for_narrow_range():
    # Grieger, Hunter & Krug, Nature 261, 566 (1976): ΔH‡ and ΔS‡ of one series are almost perfectly
    # correlated, the more so the narrower the temperature range
    narrow_t = np.linspace(260.0, 280.0, 6)
    wide_t = np.linspace(200.0, 340.0, 6)
    narrow = eyring_fit(narrow_t, eyring_k(TRUE_DH, TRUE_DS, narrow_t), 0.05 * eyring_k(TRUE_DH, TRUE_DS, narrow_t))
    wide = eyring_fit(wide_t, eyring_k(TRUE_DH, TRUE_DS, wide_t), 0.05 * eyring_k(TRUE_DH, TRUE_DS, wide_t))
    assert narrow.correlation > 0.999
    assert 0.9 < wide.correlation < narrow.correlation


def test_gibbs_at_harmonic_mean_temperature_uncorrelated_with_enthalpy():
    # Grieger, Hunter & Krug (1976): at the harmonic-mean temperature ΔG‡ is uncorrelated with ΔH‡
    # (checked on the covariance, and empirically over replicate series), whereas ΔG‡(298 K) is not
    temps = np.array([225.0, 235.0, 250.0, 262.0, 270.0, 285.0])
    t_hm = len(temps) / (1.0 / temps).sum()
    rng = np.random.default_rng(31)
    k = noisy_series(rng, 0.05, temps)
    result = eyring_fit(temps, k)
    assert result.harmonic_mean_temperature_k == pytest.approx(t_hm, rel=1e-12)
    assert result.uncorrelated_temperature_k == pytest.approx(t_hm, rel=1e-9)
    assert result.gibbs_enthalpy_correlation(t_hm) == pytest.approx(0.0, abs=1e-9)
    dh, g_hm, g_298 = [], [], []
    for _ in range(2000):
        r = eyring_fit(temps, noisy_series(rng, 0.05, temps), 0.05 * eyring_k(TRUE_DH, TRUE_DS, temps))
        dh.append(r.enthalpy_kj_mol)
        g_hm.append(r.gibbs(t_hm).value)
        g_298.append(r.gibbs(298.15).value)
    assert abs(np.corrcoef(dh, g_hm)[0, 1]) < 0.08  # 3.5 standard errors of a zero correlation over 2000
    assert abs(np.corrcoef(dh, g_298)[0, 1]) > 0.5  # 298 K lies above t_hm: anticorrelated
    # and ΔG‡ is best determined near there, far better than ΔH‡ itself
    assert result.gibbs(t_hm).stderr < 0.2 * result.enthalpy_stderr


# ---------------------------------------------------------------------------------------------
# Bounds, outliers, warnings
# ---------------------------------------------------------------------------------------------


def test_bounds_are_not_fitted_and_are_checked():
    rng = np.random.default_rng(41)
    k = noisy_series(rng)
    plain = eyring_fit(TEMPS, k, 0.05 * k)
    t = np.append(TEMPS, [320.0, 210.0])
    k_fit_320, k_fit_210 = eyring_k(TRUE_DH, TRUE_DS, np.array([320.0, 210.0]))
    lower = np.append(np.full(8, np.nan), [3 * k_fit_320, np.nan])  # line below this lower bound: violated
    upper = np.append(np.full(8, np.nan), [np.nan, 10 * k_fit_210])  # respected
    rates = np.append(k, [np.nan, np.nan])
    errors = np.append(0.05 * k, [np.nan, np.nan])
    result = eyring_fit(t, rates, errors, rate_lower=lower, rate_upper=upper)
    assert result.enthalpy_kj_mol == plain.enthalpy_kj_mol
    assert result.enthalpy_stderr == plain.enthalpy_stderr
    assert result.used.sum() == 8 and len(result.bounds) == 2
    violated, respected = result.bounds
    assert violated.violated and violated.sigma > 3
    assert not respected.violated
    assert any("lower bound at 320 K" in w for w in result.warnings)
    assert "VIOLATED" in result.report()


def test_outlier_flagged_by_studentised_residual():
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS) * np.exp(np.random.default_rng(42).normal(0, 0.03, 8))
    k[4] *= math.exp(0.5)  # 0.5 in ln k is about 17 sigma
    result = eyring_fit(TEMPS, k, 0.03 * k)
    assert result.outliers.tolist() == [i == 4 for i in range(8)]
    assert any("outlier at 270 K" in w for w in result.warnings)


def test_warnings_for_narrow_span_and_few_rates():
    # common practice: a span under about 30 K leaves ΔS‡ poorly determined; fewer than 4 rates are few
    t = np.array([260.0, 270.0, 280.0])
    k = eyring_k(TRUE_DH, TRUE_DS, t)
    result = eyring_fit(t, k, 0.05 * k)
    assert any("span only 20.0 K" in w for w in result.warnings)
    assert any("only 3 rates" in w for w in result.warnings)
    k = noisy_series(np.random.default_rng(44), 0.05)
    assert eyring_fit(TEMPS, k, 0.05 * k).warnings == ()


def test_two_rates_without_errors_give_no_fake_error_bar():
    t = np.array([250.0, 290.0])
    result = eyring_fit(t, eyring_k(TRUE_DH, TRUE_DS, t))
    assert math.isnan(result.enthalpy_stderr) and math.isnan(result.gibbs(298.15).stderr)
    assert "n.d." in result.report()
    assert any("cannot be estimated" in w for w in result.warnings)


def test_poor_chi_square_is_warned():
    rng = np.random.default_rng(43)
    k = noisy_series(rng, 0.2)
    result = eyring_fit(TEMPS, k, 0.02 * k)
    assert result.to_dict()["reduced_chi_square"] > 5
    assert any("scatter more than their errors" in w for w in result.warnings)


def test_bad_arrays_raise_input_error():
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    with pytest.raises(InputError, match="Celsius"):
        eyring_fit(TEMPS - 273.15, k)
    with pytest.raises(InputError, match="rate_per_s must be positive"):
        eyring_fit(TEMPS, -k)
    with pytest.raises(InputError, match="transmission"):
        eyring_fit(TEMPS, k, transmission=1.5)
    with pytest.raises(InputError, match="temperature_stderr must be zero or positive"):
        eyring_fit(TEMPS, k, temperature_stderr=-1.0)
    errors = 0.05 * k
    errors[2] = np.nan
    with pytest.raises(InputError, match="row 3.*given for other rates"):
        eyring_fit(TEMPS, k, errors)


# ---------------------------------------------------------------------------------------------
# Coalescence estimate
# ---------------------------------------------------------------------------------------------


def test_coalescence_estimate_is_eyring_plus_gutowsky_holm():
    # Gutowsky & Holm (1956): k_c = pi dnu / sqrt 2; Eyring: dG = R T ln(kB T / (h k))
    for t_c, dnu in [(250.0, 80.0), (320.0, 400.0), (190.0, 12.5)]:
        est = coalescence_barrier(t_c, dnu)
        k_c = math.pi * dnu / math.sqrt(2)
        assert est.rate_per_s == pytest.approx(k_c, rel=1e-14)
        assert est.gibbs_kj_mol == pytest.approx(R * t_c * math.log(KB * t_c / (H * k_c)) / 1e3, rel=1e-12)
        # the textbook working form (from memory): ΔG‡ = 19.14 T_c (9.97 + log10(T_c/dnu)) J/mol
        assert est.gibbs_kj_mol == pytest.approx(19.14e-3 * t_c * (9.97 + math.log10(t_c / dnu)), rel=1e-3)
    assert "equally populated" in COALESCENCE_CAVEAT and est.caveat in est.report()


def test_coalescence_error_from_temperature_error():
    # linear propagation checked against a central difference of the Gutowsky-Holm + Eyring formula
    est = coalescence_barrier(260.0, 120.0, temperature_stderr=2.0)
    d = (coalescence_barrier(260.001, 120.0).gibbs_kj_mol - coalescence_barrier(259.999, 120.0).gibbs_kj_mol) / 0.002
    assert est.gibbs_stderr == pytest.approx(2.0 * d, rel=1e-6)


# ---------------------------------------------------------------------------------------------
# Rates tables
# ---------------------------------------------------------------------------------------------


def _write(tmp_path, text, name="rates.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def _table(temps, rates, errors=None, process=None):
    lines = ["temperature_k,rate_per_s" + (",rate_stderr" if errors is not None else "") + (",process" if process else "")]
    for i, (t, k) in enumerate(zip(temps, rates)):
        row = [repr(float(t)), repr(float(k))] + ([repr(float(errors[i]))] if errors is not None else []) + ([process] if process else [])
        lines.append(",".join(row))
    return "\n".join(lines) + "\n"


def test_table_with_two_processes_fits_each(tmp_path):
    k1 = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    k2 = eyring_k(48.0, 5.0, TEMPS)
    text = _table(TEMPS, k1, 0.05 * k1, "rotation") + _table(TEMPS, k2, 0.05 * k2, "inversion").split("\n", 1)[1]
    path = _write(tmp_path, "# invented test compound\n" + text)
    before = path.read_bytes()
    results = eyring_fit_file(path)
    assert [r.process for r in results] == ["rotation", "inversion"]
    assert results[0].enthalpy_kj_mol == pytest.approx(TRUE_DH, rel=1e-9)
    assert results[1].enthalpy_kj_mol == pytest.approx(48.0, rel=1e-9)
    assert results[1].entropy_j_mol_k == pytest.approx(5.0, rel=1e-7)
    assert [r.process for r in eyring_fit_file(path, process="inversion")] == ["inversion"]
    with pytest.raises(InputError, match="no process 'rotaton'.*did you mean \"rotation\""):
        eyring_fit_file(path, process="rotaton")
    assert path.read_bytes() == before  # input never modified


def test_table_bounds_rows_follow_the_contract(tmp_path):
    # CONTRACT.md §3: a rate the data only bound has an empty rate_stderr and fills rate_lower / rate_upper
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    rows = [f"{t},{v},{0.05 * v},," for t, v in zip(TEMPS, k)] + ["320,5000,,4000,", "205,,,,0.1"]
    path = _write(tmp_path, "temperature_k,rate_per_s,rate_stderr,rate_lower,rate_upper\n" + "\n".join(rows) + "\n")
    (series,) = read_rates(path)
    assert series.is_bound.tolist() == [False] * 8 + [True, True]
    (result,) = eyring_fit_file(path)
    assert result.used.sum() == 8
    assert [b.where for b in result.bounds] == ["line 10", "line 11"]


@pytest.mark.parametrize(
    "text, message",
    [
        ("temperature_k,rate_per_sec\n250,3\n", r"missing column 'rate_per_s' \(did you mean \"rate_per_sec\"\?\)"),
        ("temperature_k,rate_per_s\n250,3\n260,abc\n", r"line 3: rate_per_s must be a number, got 'abc'"),
        ("temperature_k,rate_per_s\n25,3\n35,9\n", r"line 2: temperature_k = 25 looks like degrees Celsius.*298.15 K"),
        ("temperature_k,rate_per_s\n250,3\n260,-9\n", r"line 3: rate_per_s must be positive"),
        ("temperature_k,rate_per_s,rate_stderr\n250,3,0.1\n260,9,\n", r"line 3: rate_stderr is empty here"),
        ("temperature_k,rate_per_s,rate_stder\n250,3,0.1\n260,9,0.2\n", r"unknown column 'rate_stder' \(did you mean 'rate_stderr'\?\)"),
        ("temperature_k,rate_per_s\n250,3\n", r"1 rate\(s\) with values"),
        ("temperature_k,rate_per_s\n250,3\n250,4\n", r"fewer than 2 different temperatures"),
        ("temperature_k,rate_per_s\n250,3,4\n", r"line 2: 3 cells but the header has 2 columns"),
        ("", r"the file is empty"),
    ],
)
def test_bad_tables_name_file_and_line(tmp_path, text, message):
    path = _write(tmp_path, text)
    with pytest.raises(InputError, match=message) as info:
        read_rates(path)
    assert str(info.value).startswith(str(path))
    assert "\n" not in str(info.value)


def test_one_temperature_error_for_all_or_a_column(tmp_path):
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    path = _write(tmp_path, _table(TEMPS, k, 0.05 * k))
    (series,) = read_rates(path, temperature_stderr=0.8)
    assert series.temperature_stderr == pytest.approx([0.8] * 8)
    with_column = _write(tmp_path, "temperature_k,rate_per_s,temperature_stderr\n250,3,0.5\n260,9,0.5\n", "t.csv")
    with pytest.raises(InputError, match="temperature_stderr column and one value"):
        read_rates(with_column, temperature_stderr=1.0)


# ---------------------------------------------------------------------------------------------
# Command line
# ---------------------------------------------------------------------------------------------

CONTRACT_KEYS = {"enthalpy_kj_mol", "enthalpy_stderr", "entropy_j_mol_k", "entropy_stderr", "gibbs_298_kj_mol", "gibbs_298_stderr"}


def test_cli_eyring_json_has_contract_keys(tmp_path):
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    path = _write(tmp_path, _table(TEMPS, k, 0.05 * k))
    run = CliRunner().invoke(cli, ["eyring", str(path), "--json"])
    assert run.exit_code == 0, run.output
    out = json.loads(run.stdout)
    assert CONTRACT_KEYS <= set(out)
    assert out["enthalpy_kj_mol"] == pytest.approx(TRUE_DH, rel=1e-9)
    assert out["gibbs_298_kj_mol"] == pytest.approx(TRUE_DH - 298.15 * TRUE_DS / 1e3, rel=1e-9)
    assert "processes" not in out


def test_cli_eyring_several_processes_and_plot(tmp_path):
    k1, k2 = eyring_k(TRUE_DH, TRUE_DS, TEMPS), eyring_k(48.0, 5.0, TEMPS)
    text = _table(TEMPS, k1, 0.05 * k1, "a") + _table(TEMPS, k2, 0.05 * k2, "b").split("\n", 1)[1]
    path = _write(tmp_path, text)
    image = tmp_path / "eyring.png"
    run = CliRunner().invoke(cli, ["eyring", str(path), "--json", "--plot", str(image), "--temperature-stderr", "0.5"])
    assert run.exit_code == 0, run.output
    out = json.loads(run.stdout)
    assert out["process"] == "a" and [p["process"] for p in out["processes"]] == ["a", "b"]
    assert all(CONTRACT_KEYS <= set(p) for p in out["processes"])
    assert image.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    again = CliRunner().invoke(cli, ["eyring", str(path), "--plot", str(image)])
    assert again.exit_code == 2 and "already exists" in again.stderr
    text_run = CliRunner().invoke(cli, ["eyring", str(path), "--process", "b"])
    assert text_run.exit_code == 0 and "process 'b'" in text_run.stdout
    assert "Activation parameters\n---------------------\n  ΔH‡" in text_run.stdout and "[[" not in text_run.stdout


def test_cli_eyring_bad_file_exits_2_with_one_line(tmp_path):
    path = _write(tmp_path, "temperature_k,rate_per_s\n250,3\n260,fast\n")
    run = CliRunner().invoke(cli, ["eyring", str(path)])
    assert run.exit_code == 2
    assert run.stderr.strip().count("\n") == 0
    assert "line 3" in run.stderr and "Traceback" not in run.stderr
    missing = CliRunner().invoke(cli, ["eyring", str(tmp_path / "nothing.csv")])
    assert missing.exit_code == 2 and "file not found" in missing.stderr


def test_fit_table_rows_without_a_rate_are_left_out_and_intervals_used(tmp_path):
    """`dnmr fit` writes a status per row (CONTRACT.md section 3 plus our own columns): failed or
    undetermined rows carry no rate and are left out with a note; a 68 % profile interval is a measurement
    and is used with sigma(ln k) = the larger of its half-widths in ln k (conservative; common practice
    for asymmetric errors when the side the line falls on is not known in advance)."""
    path = tmp_path / "rates.csv"
    path.write_text("temperature_k,process,rate_per_s,rate_stderr,rate_lower,rate_upper,status,rate_ci68_lower,rate_ci68_upper\n"
                    "250,p,10,1,,,determined,9,11\n260,p,25,,,,interval,22,28\n270,p,,,,,failed,,\n"
                    "280,p,140,10,,,determined,130,150\n290,p,300,30,,,determined,270,330\n")
    (result,) = eyring_fit_file(path)
    assert len(result.series) == 4 and result.used.all()
    assert result.series.rate_stderr[1] == pytest.approx(25 * np.log(25 / 22))
    assert any("left out, the fit is failed" in w for w in result.warnings)
    assert any("line 3 (260.00 K): 68 % interval 22–28 s⁻¹ used with σ(ln k) = 0.128" in w for w in result.warnings)


FIT_HEADER = "temperature_k,process,rate_per_s,rate_stderr,rate_lower,rate_upper,status,rate_ci68_lower,rate_ci68_upper,reduced_chi_square,flags\n"


def _fit_table(tmp_path, flags: dict[int, str], chi: dict[int, float] | None = None):
    """A rates.csv as dnmr fit writes it, exact Eyring rates with 3 % errors, `flags` by row."""
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    rows = []
    for i, (t, v) in enumerate(zip(TEMPS, k)):
        value = float(v) * (2.0 if flags.get(i) == "misfit" else 1.0)  # a misfit spectrum: a rate twice too high
        red = (chi or {}).get(i, 1.0)
        rows.append(f"{t},p,{value!r},{0.03 * value!r},,,determined,{0.97 * value!r},{1.04 * value!r},{red},{flags.get(i, '')}")
    return _write(tmp_path, FIT_HEADER + "\n".join(rows) + "\n")


def test_misfit_and_nuisance_at_limit_rows_are_set_aside_by_default(tmp_path):
    path = _fit_table(tmp_path, {2: "misfit", 5: "at-bound:linewidth_hz_a;correlated-noise"}, {2: 9.0})
    (result,) = eyring_fit_file(path)
    assert result.used.sum() == 6 and result.flagged_rows == "exclude"
    assert result.enthalpy_kj_mol == pytest.approx(TRUE_DH, rel=1e-6)  # the biased rate did not enter
    assert [row.where for row in result.series.set_aside] == ["line 4", "line 7"]
    assert any("line 4 (250.00 K): set aside, its spectrum is a misfit (reduced chi-square 9)" in w for w in result.warnings)
    assert any("line 7 (280.00 K): set aside, linewidth_hz_a ended at a limit of its range" in w for w in result.warnings)
    text = result.report()
    assert "Rates set aside (flagged fits, not fitted)" in text and "line 4: its spectrum is a misfit" in text
    aside = result.to_dict()["set_aside"]
    assert aside[0]["deviation_sigma"] == pytest.approx(math.log(2.0) / math.hypot(math.log(1.04), result.ln_rate(TEMPS[2]).stderr), rel=1e-6)


def test_flagged_rows_can_be_fitted_with_widened_errors(tmp_path):
    path = _fit_table(tmp_path, {2: "misfit", 5: "at-bound:linewidth_hz_a"}, {2: 9.0})
    (result,) = eyring_fit_file(path, flagged_rows="widen")
    assert result.used.sum() == 8 and not result.series.set_aside
    # the larger half-width of the 68 % interval, 0.97 to 1.04 of the rate: ln 1.04 = 0.039 > 0.03
    assert result.series.rate_stderr[5] / result.series.rate_per_s[5] == pytest.approx(math.log(1.04), rel=1e-12)
    assert any("line 4 (250.00 K): fitted although its spectrum is a misfit" in w for w in result.warnings)
    assert "flagged fits         fitted with widened errors" in result.report()
    run = CliRunner().invoke(cli, ["eyring", str(path), "--flagged-rows", "widen", "--json"])
    assert run.exit_code == 0, run.output
    assert json.loads(run.stdout)["n_rates"] == 8


def test_all_rows_flagged_is_one_line_naming_the_option(tmp_path):
    path = _fit_table(tmp_path, {i: "misfit" for i in range(8)})
    run = CliRunner().invoke(cli, ["eyring", str(path)])
    assert run.exit_code == 2 and run.stderr.strip().count("\n") == 0
    assert "set aside" in run.stderr and "--flagged-rows widen" in run.stderr


def test_cli_probe_offset_and_error_shares(tmp_path):
    k = eyring_k(TRUE_DH, TRUE_DS, TEMPS)
    path = _write(tmp_path, _table(TEMPS, k, 0.03 * k))
    run = CliRunner().invoke(cli, ["eyring", str(path), "--temperature-offset-stderr", "1.0", "--json"])
    assert run.exit_code == 0, run.output
    out = json.loads(run.stdout)
    assert CONTRACT_KEYS <= set(out)
    assert out["temperature_error_sources"] == ["probe offset"]
    assert set(out["error_shares"]["enthalpy"]) == {"rates", "probe offset"}
    text = CliRunner().invoke(cli, ["eyring", str(path), "--temperature-offset-stderr", "1.0"]).stdout
    assert "Where the errors come from" in text and "probe offset" in text
    bad = CliRunner().invoke(cli, ["eyring", str(path), "--temperature-offset-stderr", "-1"])
    assert bad.exit_code == 2 and "temperature_offset_stderr" in bad.stderr
