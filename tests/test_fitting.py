"""Single-spectrum fits (dnmr.fitting.spectrumfit) against spectra made by independent references.

Every synthetic spectrum here comes from a stated truth through a route that does not use dnmr's
engine: the McConnell closed form (J. Chem. Phys. 28, 430 (1958); tests/closed_forms.py) for
uncoupled two-site exchange, and the QuTiP Liouville-space reference (tests/reference_qutip.py) for
the coupled AB pair.  The scenarios (shifts, rates, noise) are invented.
"""
from __future__ import annotations

import math

import matplotlib.pyplot as plt
import numpy as np
import pytest
from scipy import stats

from closed_forms import fast_exchange_excess_width, mcconnell_two_site
from dnmr.fitting import problem
from dnmr.errors import InputError
from dnmr.fitting.parameters import FitParameter, checked_settings
from dnmr.fitting.problem import NoiseEstimate, error_scale, estimate_noise
from dnmr.fitting.spectrumfit import FitOptions, fit_parameters, fit_spectrum
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State
from dnmr.io.measured import MeasuredSpectrum
from reference_qutip import jumps_with_reverse, qutip_spectrum

SF = 400.0  # MHz
SITE_A, SITE_B = 2.90, 3.10  # ppm: 80 Hz apart at 400 MHz
PPM = np.linspace(2.5, 3.5, 1000)  # data; the fit uses 2.7-3.3 ppm, the rest is baseline for the noise
REGION = (2.7, 3.3)


def two_site_model(rate=1e5, population_a=0.5, linewidth=1.0) -> Model:
    """The model a user would write, deliberately started far from the truth (k = 1e5 s^-1)."""
    return Model(
        Spectrometer(SF),
        (State("a", {"H": SITE_A}, linewidth_hz=linewidth, population=population_a),
         State("b", {"H": SITE_B}, linewidth_hz=linewidth, population=1 - population_a)),
        (Exchange("a", "b", rate_per_s=rate, name="flip"),),
    )


def measured(y, ppm=PPM) -> MeasuredSpectrum:
    return MeasuredSpectrum(ppm, y, SF, "synthetic.csv", "text")


def mcconnell(k_ab, p_a=0.5, width=1.2, ppm=PPM, offset_hz=0.0) -> np.ndarray:
    """Complex two-site spectrum S = A - i D (McConnell 1958) at ppm * SF - offset."""
    return mcconnell_two_site(ppm * SF - offset_hz, SITE_A * SF, SITE_B * SF, k_ab, p_a, width, width)


def within(fit, name, truth, n_sigma=4.0) -> bool:
    par = fit.parameters[name]
    return abs(par.estimate - truth) <= n_sigma * par.stderr


# --- recovering rates -----------------------------------------------------------------------------

@pytest.mark.parametrize("k_true, linewidth", [(15.0, "shared"), (120.0, "shared"), (600.0, "fixed")])
def test_two_site_rate_recovered_from_a_far_start(k_true, linewidth):
    # McConnell (1958) lineshape, equal populations; slow, near-coalescence (k_c = pi 80 / sqrt 2 = 178
    # s^-1, Gutowsky & Holm 1956) and fast side.  The model starts at k = 1e5: the coarse scan must find it.
    # Above coalescence the excess width trades off against the intrinsic width (Shoup, Becker & McNeel,
    # J. Phys. Chem. 76, 71 (1972)), so there the intrinsic width is given, as a chemist would.
    rng = np.random.default_rng(11)
    y = 50.0 * mcconnell(k_true).real + rng.normal(0.0, 0.02, PPM.size)
    fit = fit_spectrum(measured(y), two_site_model(linewidth=1.2), region_ppm=REGION, linewidth=linewidth)
    r = fit.rate("flip")
    assert r.status == "determined"
    assert abs(r.log10_rate - math.log10(k_true)) <= 4 * r.log10_rate_stderr
    assert r.rate_stderr == pytest.approx(r.rate_per_s * math.log(10) * r.log10_rate_stderr)
    assert fit.best_model.rates()[0] == pytest.approx(r.rate_per_s)
    assert 0.8 < fit.reduced_chi_square < 1.2


def test_unequal_populations_rate_and_population_recovered():
    # McConnell (1958) with p_a = 0.75: k_ab = 40 s^-1, k_ba = 120 s^-1 by detailed balance.
    rng = np.random.default_rng(5)
    y = 50.0 * mcconnell(40.0, p_a=0.75).real + rng.normal(0.0, 0.02, PPM.size)
    fixed = fit_spectrum(measured(y), two_site_model(population_a=0.75, linewidth=1.2), region_ppm=REGION)
    assert abs(fixed.rate(0).log10_rate - math.log10(40.0)) <= 4 * fixed.rate(0).log10_rate_stderr
    free = fit_spectrum(measured(y), two_site_model(population_a=0.5, linewidth=1.2), region_ppm=REGION,
                        populations="free")
    assert abs(free.rate(0).log10_rate - math.log10(40.0)) <= 4 * free.rate(0).log10_rate_stderr
    assert within(free, "population_b", 0.25)
    assert free.parameters["population_a"].estimate == pytest.approx(1 - free.parameters["population_b"].estimate)


@pytest.fixture(scope="module")
def ab_spectrum():
    """Coupled AB pair (3.00/3.08 ppm, J = 12 Hz) under mutual exchange at 40 s^-1, from QuTiP."""
    ppm = np.linspace(2.85, 3.25, 700)
    states = [{"shifts_hz": [3.00 * SF, 3.08 * SF], "couplings_hz": np.array([[0.0, 12.0], [12.0, 0.0]]),
               "linewidth_hz": 1.0, "population": 1.0}]
    jumps = jumps_with_reverse(states, [{"source": 0, "target": 0, "permutation": [1, 0], "rate": 40.0}])
    return ppm, qutip_spectrum(ppm * SF, states, jumps)


def test_coupled_ab_mutual_exchange_rate_recovered(ab_spectrum):
    # QuTiP Lindblad reference (PHYSICS.md: mutual exchange = jump operator sqrt(k) P); the engine is not
    # used to make the data.
    ppm, s = ab_spectrum
    rng = np.random.default_rng(3)
    y = 30.0 * s.real + rng.normal(0.0, 0.01, ppm.size)
    model = Model(Spectrometer(SF), (State("ab", {"A": 3.00, "B": 3.08}, {"A-B": 12.0}, linewidth_hz=1.0,
                                           population=1.0),),
                  (Exchange("ab", "ab", {"A": "B", "B": "A"}, rate_per_s=2000.0, name="swap"),))
    fit = fit_spectrum(measured(y, ppm), model, region_ppm=(2.95, 3.15))
    r = fit.rate("swap")
    assert r.status == "determined"
    assert abs(r.log10_rate - math.log10(40.0)) <= 4 * r.log10_rate_stderr


def test_standard_errors_cover_the_truth_68_percent_of_the_time():
    # 100 noise replicas of one McConnell (1958) spectrum (k = 30 s^-1, 500 points); a standard error
    # means about 68 % of fits land within one of it of the truth (normal distribution, common practice).
    # Binomial spread of the count: sqrt(100 * 0.68 * 0.32) = 4.7, so 57..79 is +/- 2.3 of it.
    ppm = np.linspace(2.6, 3.4, 500)
    clean = 100.0 * mcconnell(30.0, width=1.5, ppm=ppm).real
    rng = np.random.default_rng(2024)
    z = []
    for _ in range(100):
        fit = fit_spectrum(measured(clean + rng.normal(0.0, 0.1, ppm.size), ppm), two_site_model(),
                           region_ppm=(2.75, 3.25), profile=False)
        r = fit.rate(0)
        z.append((r.log10_rate - math.log10(30.0)) / r.log10_rate_stderr)
    z = np.array(z)
    assert 0.57 <= np.mean(np.abs(z) <= 1.0) <= 0.79
    assert abs(z.mean()) < 0.35  # no bias beyond 3.5 standard errors of the mean


# --- nuisance terms ----------------------------------------------------------------------------

def test_phase_baseline_and_offset_recovered_with_their_signs():
    # Data = amplitude Re[exp(i phi(nu)) S(nu - offset)] + baseline, with S = A - i D from McConnell; a
    # positive phase0 mixes in positive dispersion and must come back positive.
    ppm = np.linspace(2.7, 3.3, 900)
    hz = ppm * SF
    centre, span = 0.5 * (hz[0] + hz[-1]), hz[-1] - hz[0]
    x = (hz - centre) / (span / 2)
    truth = {"phase0_deg": 20.0, "phase1_deg": -15.0, "offset_hz": 4.0,
             "baseline_0": 0.05, "baseline_1": -0.03, "baseline_2": 0.02}
    phi = np.radians(truth["phase0_deg"] + truth["phase1_deg"] * (hz - centre) / span)
    s = mcconnell(90.0, ppm=ppm, offset_hz=truth["offset_hz"])
    y = 50.0 * (np.exp(1j * phi) * s).real + truth["baseline_0"] + truth["baseline_1"] * x + truth["baseline_2"] * x**2
    y += np.random.default_rng(8).normal(0.0, 0.01, ppm.size)
    fit = fit_spectrum(measured(y, ppm), two_site_model(linewidth=1.2), region_ppm=(2.7, 3.3), phase="first-order",
                       baseline_order=2, noise=0.01, linewidth="fixed")
    for name, value in truth.items():
        assert within(fit, name, value), (name, fit.parameters[name].estimate, value)
    assert fit.parameters["phase0_deg"].estimate > 10.0
    assert abs(fit.rate(0).log10_rate - math.log10(90.0)) <= 4 * fit.rate(0).log10_rate_stderr


def test_noise_estimate_for_white_and_correlated_noise():
    rng = np.random.default_rng(1)
    lines = 50.0 * mcconnell(30.0).real
    white = measured(lines + rng.normal(0.0, 0.07, PPM.size))
    est = estimate_noise(white, REGION)
    assert est.sigma == pytest.approx(0.07, rel=0.12)
    assert est.correlation_factor < 1.3
    # MA(1) noise e_t = (u_t + u_(t-1)) / sqrt 2 has lag-1 autocorrelation 1/2 and none beyond, so
    # 1 + 2 sum rho_k = 2 (long-run variance of a moving average, Box & Jenkins, Time Series Analysis).
    u = rng.normal(0.0, 0.07, 4001)
    ma = (u[1:] + u[:-1]) / math.sqrt(2)
    ppm = np.linspace(2.0, 4.0, 4000)
    est = estimate_noise(measured(50.0 * mcconnell(30.0, ppm=ppm).real + ma, ppm), REGION)
    assert est.sigma == pytest.approx(0.07, rel=0.12)
    assert est.correlation_factor == pytest.approx(2.0, abs=0.35)
    given = estimate_noise(white, REGION, noise=0.5)
    assert (given.sigma, given.method) == (0.5, "given")


# --- bounds where the data cannot determine the rate ----------------------------------------------

def fast_limit_obvious_rate() -> float:
    """Rate (s^-1) whose fast-exchange excess width (McConnell 1958 fast limit) is twice the natural width."""
    k = 1.0
    while fast_exchange_excess_width(80.0, k, 0.5) > 2 * 1.2:
        k *= 1.1
    return k


def limit_fits(k_true, linewidth, seeds=range(10)):
    """Fits of ten noise draws (S/N about 130) of a McConnell (1958) spectrum at rate k_true."""
    return [fit_spectrum(measured(50.0 * mcconnell(k_true).real + np.random.default_rng(seed).normal(0, 0.1, PPM.size)),
                         two_site_model(linewidth=1.2), region_ppm=REGION, linewidth=linewidth) for seed in seeds]


def test_slow_limit_gives_an_upper_bound_not_an_error_bar():
    # k = 0.005 s^-1 broadens the lines by k/pi = 0.002 Hz (slow limit of McConnell 1958), far below what
    # this noise resolves.  A rate this close to its lower limit still gives a best fit inside the range
    # for some noise draws (about 1 in 5, then an interval is reported), so ten draws are looked at.
    rates = [fit.rate(0) for fit in limit_fits(0.005, "shared")]
    bounds = [r for r in rates if r.status == "upper-bound"]
    assert len(bounds) >= 6
    assert all(r.status in ("upper-bound", "interval") for r in rates)
    for r in bounds:
        assert math.isnan(r.rate_stderr) and math.isnan(r.rate_lower)
        assert "slow-exchange" in r.reason
        assert r.rate_upper < math.pi * 1.2  # broadening as large as the natural width would be seen
    assert sum(r.rate_upper < 0.005 for r in bounds) <= 2  # an 84 % one-sided limit


def test_fast_limit_gives_a_lower_bound_not_an_error_bar():
    # k = 1e8 s^-1: excess width p_a p_b (2 pi dnu)^2 / (pi (k_ab + k_ba)) = 3e-5 Hz (fast limit of
    # McConnell 1958).  With the intrinsic width known, every bound must still exclude rates whose excess
    # width would be twice the natural width.
    fits = limit_fits(1e8, "fixed")
    rates = [fit.rate(0) for fit in fits]
    bounds = [r for r in rates if r.status == "lower-bound"]
    assert len(bounds) >= 6
    obvious = fast_limit_obvious_rate()
    for r in bounds:
        assert math.isnan(r.rate_stderr) and math.isnan(r.rate_upper)
        assert "fast-exchange" in r.reason
        assert r.rate_lower > obvious
    assert sum(r.rate_lower > 1e8 for r in bounds) <= 2  # an 84 % one-sided limit
    assert "lower-bound:flip" in fits[[r.status for r in rates].index("lower-bound")].flags


def reported_limit_fit(k_true, **changes):
    """The reported case: McConnell (1958) at rate k_true, seed-0 noise (S/N about 130), intrinsic width
    given, baseline order 0, no phase and no frequency offset fitted."""
    y = 50.0 * mcconnell(k_true).real + np.random.default_rng(0).normal(0.0, 0.1, PPM.size)
    return fit_spectrum(measured(y), two_site_model(linewidth=1.2), region_ppm=REGION, linewidth="fixed",
                        baseline_order=0, phase="none", frequency_offset=False, **changes)


@pytest.mark.parametrize("k_true, status, regime", [(1e8, "lower-bound", "fast-exchange"),
                                                    (1e-3, "upper-bound", "slow-exchange")])
def test_rate_at_a_limit_of_its_range_is_a_bound_not_an_error_bar(k_true, status, regime):
    # Reported: at k = 1e8 the profile kept finding better minima, was dropped, and the rate came out
    # "determined" at log10 k = 8.999 +- 0.016, on the 1e9 s^-1 limit.  The slow twin, k = 1e-3 s^-1
    # (broadening k/pi = 3e-4 Hz, slow limit of McConnell 1958), sits on the 1e-3 s^-1 limit.
    fit = reported_limit_fit(k_true)
    r = fit.rate("flip")
    assert r.status == status, r.describe()
    assert math.isnan(r.rate_stderr) and regime in r.reason
    if status == "lower-bound":
        assert fast_limit_obvious_rate() < r.rate_lower < 1e9
    else:
        assert 1e-3 < r.rate_upper < math.pi * 1.2  # broadening as large as the natural width would be seen
    # without a profile there is no bound to give, and the covariance error must not stand in for one
    blind = reported_limit_fit(k_true, profile=False).rate("flip")
    assert blind.status == "undetermined" and math.isnan(blind.rate_stderr)
    assert "limit of the allowed range" in blind.reason


@pytest.mark.parametrize("k_true, side", [(1e8, 0), (1e-3, 1)])
def test_a_bound_is_one_sided_95_percent_not_the_end_of_the_68_percent_interval(k_true, side):
    # A bound is a promise that the rate lies beyond it.  The end of the 68 % profile interval (delta
    # chi-square 1) holds the truth only 84 % of the time on one side; the one-sided 95 % bound of a
    # profile likelihood is where the rise reaches the 90 % point of chi-square with one degree of freedom,
    # 2.706 (scipy.stats.chi2; common practice).  Spectra: McConnell (1958) at the two limits.
    r = reported_limit_fit(k_true).rate("flip")
    bound = (r.rate_lower, r.rate_upper)[side]
    assert r.status == ("lower-bound", "upper-bound")[side]
    assert problem.BOUND_LEVEL == pytest.approx(stats.chi2.ppf(0.90, 1))
    prof = r.profile
    rise_at_bound = np.interp(math.log10(bound), prof.log10_rate, prof.delta_chi_square)
    assert rise_at_bound == pytest.approx(stats.chi2.ppf(0.90, 1) * prof.threshold, rel=0.1)
    assert rise_at_bound > 2.0 * prof.threshold  # the 68 % end sits at 1 threshold
    end68 = r.rate_ci68[side]
    assert (bound - end68) * (1 if side else -1) > 0  # the bound lies beyond the 68 % end
    assert "one-sided 95 %" in r.reason


def test_unstable_profile_says_so_and_bounds_from_the_best_it_found(monkeypatch):
    # With no restart allowed, the reported case's first profile finds fits better than the refined one
    # (the fast-exchange chi-square keeps falling slowly towards the limit): it must say so and still
    # bound the rate, counting from the best chi-square it saw, rather than quote the covariance error.
    # This happens with the finite-difference Jacobian, whose refinement stops short of the limit (the exact
    # Jacobian's reaches it, and its profile then finds nothing better).
    monkeypatch.setattr(problem, "PROFILE_RESTARTS", 0)
    monkeypatch.setattr(problem, "USE_EXACT_JACOBIAN", False)
    fit = reported_limit_fit(1e8)
    r = fit.rate("flip")
    assert "unstable" in fit.flags and r.profile.unstable
    assert r.profile.delta_chi_square.min() < 0
    assert r.status == "lower-bound" and math.isnan(r.rate_stderr)
    assert "better fit" in r.reason and any("better fits" in n for n in fit.notes)
    assert fast_limit_obvious_rate() < r.rate_lower < 1e9


# --- interface -------------------------------------------------------------------------------------

def test_report_plot_and_round_trip():
    y = 50.0 * mcconnell(120.0).real + np.random.default_rng(4).normal(0.0, 0.02, PPM.size)
    model = two_site_model(linewidth=1.2)
    fit = fit_spectrum(measured(y), model, region_ppm=REGION, temperature_k=251.0)
    text = fit.report()
    assert "flip" in text and "±" in text and "251 K" in text and "reduced" in text
    fig = fit.plot()
    assert all(ax.xaxis_inverted() for ax in fig.axes)  # ppm high to low (common practice)
    plt.close(fig)
    again = type(fit).from_dict(fit.to_dict(), fit.curves(), model.at_temperature(251.0))
    assert again.rate(0).rate_per_s == fit.rate(0).rate_per_s
    assert np.array_equal(again.fitted, fit.fitted)
    assert again.best_model.rates()[0] == pytest.approx(fit.best_model.rates()[0])


def test_parameters_can_be_fixed_tied_and_bounded():
    y = 50.0 * mcconnell(120.0).real + np.random.default_rng(6).normal(0.0, 0.02, PPM.size)
    settings = {"linewidth_hz_b": {"same_as": "linewidth_hz_a", "times": 2.0, "plus": 0.5},
                "offset_hz": {"start": 0.0, "fixed": True}, "log10_rate_flip": {"lower": 1.0, "upper": 3.0}}
    options = FitOptions(region_ppm=REGION, linewidth="per-state", parameters=settings)
    fit = fit_spectrum(measured(y), two_site_model(), options=options)
    p = fit.to_dict()["parameters"]
    assert p["linewidth_hz_b"]["estimate"] == pytest.approx(2.0 * p["linewidth_hz_a"]["estimate"] + 0.5, rel=1e-12)
    assert (p["linewidth_hz_b"]["same_as"], p["linewidth_hz_b"]["times"], p["linewidth_hz_b"]["plus"]) == (
        "linewidth_hz_a", 2.0, 0.5)
    assert p["offset_hz"]["estimate"] == 0.0 and p["offset_hz"]["fixed"] and p["offset_hz"]["unit"] == "Hz"
    assert (p["log10_rate_flip"]["lower"], p["log10_rate_flip"]["upper"]) == (1.0, 3.0)
    assert not {"value", "vary", "min", "max", "expr"} & {k for record in p.values() for k in record}
    params = fit_parameters(two_site_model(), REGION, options)
    assert isinstance(params["phase0_deg"], FitParameter) and params["phase0_deg"].unit == "deg"
    params["phase0_deg"].fixed = True
    params["phase0_deg"].start = 3.0
    again = fit_spectrum(measured(y), two_site_model(), options=options, parameters=params)
    assert again.to_dict()["parameters"]["phase0_deg"]["estimate"] == 3.0
    assert again.to_dict()["parameters"]["linewidth_hz_b"]["same_as"] == "linewidth_hz_a"
    stored = type(again).from_dict(again.to_dict(), again.curves(), two_site_model())
    assert stored.to_dict()["parameters"] == again.to_dict()["parameters"]
    # the fit's own parameters are dnmr's records too (issue 16: lmfit stays inside the fitting wing),
    # the same numbers as results.json, and they start a refinement where the fit ended
    shown = again.parameters
    assert all(isinstance(q, FitParameter) for q in shown.values()) and set(shown) == set(p)
    rate = shown["log10_rate_flip"]
    record = again.to_dict()["parameters"]["log10_rate_flip"]
    assert (rate.estimate, rate.stderr, rate.start) == (record["estimate"], record["stderr"], record["estimate"])
    assert rate.correlations == record["correlations"] and shown["phase0_deg"].fixed
    assert again.correlation("log10_rate_flip", "linewidth_hz_a") == rate.correlations["linewidth_hz_a"]


def test_shared_linewidth_and_free_populations_show_as_a_tie_and_a_rule():
    params = fit_parameters(two_site_model(), REGION, FitOptions(linewidth="shared", populations="free"))
    assert params["linewidth_hz_b"].same_as == "linewidth_hz_a"
    assert params["population_a"].rule == "population_a = 1 - population_b" and not params["population_a"].fixed
    # editing nothing and handing the parameters back keeps both relations
    settings = checked_settings({n: p.setting() for n, p in params.items()})
    assert "fixed" not in settings["population_a"] and "start" not in settings["linewidth_hz_b"]


@pytest.mark.parametrize("setting, message", [
    ({"offset_hz": {"expr": "__import__('os').getcwd()"}}, '"expr" was renamed to same_as'),
    ({"offset_hz": {"value": 1.0}}, '"value" was renamed to start'),
    ({"offset_hz": {"vary": False}}, '"vary" was renamed to fixed'),
    ({"offset_hz": {"min": -1.0}}, '"min" was renamed to lower'),
    ({"offset_hz": {"max": 1.0}}, '"max" was renamed to upper'),
    ({"offset_hz": {"same_as": "phase0_deg * 2"}}, "not a formula"),
    ({"offset_hz": {"same_as": "open('/etc/hostname').read()"}}, "not a formula"),
    ({"offset_hz": {"start": "1 + 1"}}, "start must be a finite number"),
    ({"offset_hz": {"same_as": "offset_hz"}}, "cannot be tied to itself"),
    ({"offset_hz": {"same_as": "ofset_hz_q"}}, 'no fit parameter "ofset_hz_q"'),
    # issue 16: the rate parameters' names of earlier releases
    ({"log10_k_flip": {"start": 1.0}}, '"log10_k_flip" was renamed to log10_rate_flip'),
    ({"offset_hz": {"same_as": "log10_k_flip"}}, '"log10_k_flip" was renamed to log10_rate_flip'),
    ({"offset_hz": {"same_as": "phase0_deg"}, "phase0_deg": {"same_as": "offset_hz"}}, "round in a circle"),
    # the layout's own tie (shared linewidth: b follows a) closes the circle
    ({"linewidth_hz_a": {"same_as": "linewidth_hz_b"}}, r"linewidth_hz_a -> linewidth_hz_b -> linewidth_hz_a"),
    ({"offset_hz": {"plus": 1.0}}, "give same_as too"),
    ({"offset_hz": {"same_as": "phase0_deg", "fixed": True}}, "leave out fixed and start"),
])
def test_hostile_or_stale_parameter_settings_are_refused_in_one_line(setting, message):
    # issue 13: a tie is parsed (one name, two numbers), never evaluated
    with pytest.raises(InputError, match=message) as err:
        fit_parameters(two_site_model(), REGION, FitOptions(linewidth="shared", parameters=setting))
    assert len(str(err.value).splitlines()) == 1 and "parameters." in str(err.value)


def test_bad_input_is_one_clear_error():
    y = 50.0 * mcconnell(120.0).real
    with pytest.raises(InputError, match=r'no fit parameter "linewidth_hz_q" \(did you mean'):
        fit_spectrum(measured(y), two_site_model(), options=FitOptions(
            region_ppm=REGION, parameters={"linewidth_hz_q": {"start": 1.0}}))
    with pytest.raises(InputError, match="500 MHz"):
        fit_spectrum(MeasuredSpectrum(PPM, y, 500.0, "x.csv", "text"), two_site_model())
    with pytest.raises(InputError, match="baseline_order"):
        FitOptions(baseline_order=5)
    with pytest.raises(InputError, match='did you mean "per-state"'):
        FitOptions(linewidth="per_state")


@pytest.mark.parametrize("points, reduced, misfit", [(400, 1.21, False), (400, 1.5, True), (0, 1.21, True)])
def test_misfit_threshold_counts_the_uncertainty_of_the_noise_estimate(points, reduced, misfit):
    # A reduced chi-square divides by an estimated sigma^2: a chi-square variable of N degrees of freedom
    # over N has relative variance 2/N, so with sigma from 400 signal-free points and 3000 residual degrees
    # of freedom the reduced chi-square scatters by sqrt(2/3000 + 2/400) = 0.075 (statistics, common
    # practice); 1.21 is then within 3 standard deviations, 1.5 is not.  A given sigma (points = 0) has
    # only the first term (0.026).
    dof = 3000
    noise = NoiseEstimate(1.0, 1.0, points, "test")
    _, flags, _ = error_scale(reduced * dof, dof, noise)
    assert ("misfit" in flags) is misfit
