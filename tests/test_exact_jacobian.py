"""The fit's exact Jacobian (dnmr.fitting.problem.FitProblem.jacobian, from dnmr.engine.derivatives): against
central differences of the fit's own residual, and fits with it against fits with finite differences.

Synthetic spectra come from independent references, never from the engine: McConnell's two-site closed
form (J. Chem. Phys. 28, 430 (1958); tests/closed_forms.py) and the QuTiP Liouville-space reference
(tests/reference_qutip.py) for two rotamers of a coupled AB pair.  Compounds and numbers are invented.
"""
from __future__ import annotations

import lmfit
import numpy as np
import pytest

from closed_forms import mcconnell_two_site
from dnmr.fitting import problem
from dnmr.fitting.parameters import ParameterLayout, tie_coefficients
from dnmr.fitting.problem import FitProblem, NoiseEstimate
from dnmr.fitting.spectrumfit import FitOptions, fit_spectrum
from dnmr.io.measured import MeasuredSpectrum
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State
from reference_qutip import jumps_with_reverse, qutip_spectrum

SF = 400.0  # MHz
ROTAMERS = ({"A": 3.000, "B": 3.060, "J": -14.0, "p": 0.62}, {"A": 3.075, "B": 2.985, "J": -13.2, "p": 0.38})
PPM = np.linspace(2.85, 3.20, 1400)


@pytest.fixture(scope="module")
def rotamer_spectrum() -> MeasuredSpectrum:
    """Two rotamers of an AB pair (the rotation swaps A and B) at k = 25 s^-1 from QuTiP, 1.1 Hz lines, noise."""
    states = [{"shifts_hz": [r["A"] * SF, r["B"] * SF], "couplings_hz": np.array([[0.0, r["J"]], [r["J"], 0.0]]),
               "linewidth_hz": 1.1, "population": r["p"]} for r in ROTAMERS]
    jumps = jumps_with_reverse(states, [{"source": 0, "target": 1, "permutation": [1, 0], "rate": 25.0}])
    s = qutip_spectrum(PPM * SF, states, jumps)
    y = 40.0 * s.real + np.random.default_rng(7).normal(0.0, 0.02, PPM.size)
    return MeasuredSpectrum(PPM, y, SF, "rotamers.csv", "text")


def rotamer_model() -> Model:
    """The chemist's model: shifts, couplings and populations close to, not at, the truth."""
    states = [State(name, {"A": r["A"] + d, "B": r["B"] - d}, {"A-B": r["J"] + 0.3}, linewidth_hz=1.0, population=p)
              for name, r, d, p in (("syn", ROTAMERS[0], 0.001, 0.6), ("anti", ROTAMERS[1], -0.001, 0.4))]
    return Model(Spectrometer(SF), states, [Exchange("syn", "anti", {"A": "B", "B": "A"}, rate_per_s=10.0, name="turn")])


FREE_ALL = {"shifts": "free", "couplings": "free", "populations": "free", "linewidth": "per-state", "region_ppm": (2.9, 3.15)}


def test_jacobian_matches_central_differences_of_the_residual(rotamer_spectrum):
    """Every free parameter (log10 k, shifts in ppm, couplings, populations under the rule that the first is
    one minus the others, a linewidth tied to the other by times and plus, first-order phase, baseline of
    order 2) against fourth-order central differences of the residual (relative steps 1e-5)."""
    options = FitOptions(phase="first-order", baseline_order=2, **FREE_ALL,
                         parameters={"linewidth_hz_anti": {"same_as": "linewidth_hz_syn", "times": 1.5, "plus": 0.1}})
    model = rotamer_model()
    layout = ParameterLayout.for_model(model, options)
    part = rotamer_spectrum.region(2.9, 3.15)
    fit_problem = FitProblem(layout, part.ppm, part.intensity, NoiseEstimate(0.02, 1.0, 0, "given"))
    assert fit_problem.exact_jacobian
    params = layout.parameters(100.0)
    for name, value in {"log10_rate_turn": 1.3, "amplitude": 35.0, "phase0_deg": 2.0, "phase1_deg": -3.0,
                        "baseline_1": 0.01, "baseline_2": -0.02}.items():
        params[name].set(value=value)
    params.update_constraints()
    exact = fit_problem.jacobian(params)
    free = [n for n, p in params.items() if p.vary and not p.expr]
    assert exact.shape == (part.ppm.size, len(free)) and {"shift_ppm_anti_B", "coupling_hz_syn_A_B"} <= set(free)

    def residual(name, step):
        moved = params.copy()
        moved[name].set(value=params[name].value + step)
        moved.update_constraints()
        return fit_problem.residual(moved)

    for j, name in enumerate(free):
        h = 1e-5 * max(abs(params[name].value), 1e-2)
        reference = (8 * (residual(name, h) - residual(name, -h)) - (residual(name, 2 * h) - residual(name, -2 * h))) / (12 * h)
        assert np.abs(exact[:, j] - reference).max() < 1e-6 * np.abs(reference).max(), name


def compare_routes(monkeypatch, spectrum, model, **options):
    """The same fit with finite differences and with the exact Jacobian."""
    fits = {}
    for exact in (False, True):
        monkeypatch.setattr(problem, "USE_EXACT_JACOBIAN", exact)
        fits[exact] = fit_spectrum(spectrum, model, **options)
    return fits[False], fits[True]


def assert_same_fit(slow, fast, share=0.01):
    """Same statuses and profile intervals; every free parameter within `share` of its standard error; errors
    within 1 %."""
    for a, b in zip(slow.rates, fast.rates):
        assert a.status == b.status
        assert np.allclose([a.rate_lower, a.rate_upper], [b.rate_lower, b.rate_upper], rtol=1e-3, equal_nan=True)
    for name, par in slow.lmfit_parameters.items():
        if par.vary and not par.expr:
            other = fast.lmfit_parameters[name]
            assert abs(other.value - par.value) <= share * par.stderr, name
            assert other.stderr == pytest.approx(par.stderr, rel=0.01), name
    assert fast.chi_square == pytest.approx(slow.chi_square, rel=1e-6)


@pytest.mark.parametrize("k_true, linewidth", [(40.0, "shared"), (120.0, "shared"), (900.0, "fixed")])
def test_two_site_fits_agree_with_and_without_the_exact_jacobian(monkeypatch, k_true, linewidth):
    """McConnell (1958) spectra below, near and above coalescence (k_c = 178 s^-1, Gutowsky & Holm 1956), with
    the default fit (zero-order phase, frequency offset, linear baseline; above coalescence the intrinsic
    width is given, as it trades off against the exchange width): the same rates within a hundredth of
    their standard errors, from fewer lineshape evaluations."""
    ppm = np.linspace(2.5, 3.5, 2000)
    clean = 50.0 * mcconnell_two_site(ppm * SF - 0.4, 2.9 * SF, 3.1 * SF, k_true, 0.5, 1.2, 1.2).real
    spectrum = MeasuredSpectrum(ppm, clean + np.random.default_rng(1).normal(0.0, 0.05, ppm.size), SF, "s.csv", "text")
    width = 1.2 if linewidth == "fixed" else 1.0
    states = (State("a", {"H": 2.9}, linewidth_hz=width, population=1), State("b", {"H": 3.1}, linewidth_hz=width, population=1))
    model = Model(Spectrometer(SF), states, (Exchange("a", "b", rate_per_s=1e4, name="flip"),))
    slow, fast = compare_routes(monkeypatch, spectrum, model, region_ppm=(2.7, 3.3), linewidth=linewidth)
    assert slow.rate(0).status in ("determined", "interval")  # an error bar or a 68 % interval
    assert_same_fit(slow, fast)
    assert fast.function_evaluations < slow.function_evaluations and fast.jacobian_evaluations > 0
    assert slow.jacobian_evaluations == 0


def test_rotamer_fit_with_free_shifts_couplings_and_populations_agrees(monkeypatch, rotamer_spectrum):
    """QuTiP's two rotamers with every shift, both couplings, the populations and both linewidths free."""
    slow, fast = compare_routes(monkeypatch, rotamer_spectrum, rotamer_model(), **FREE_ALL)
    assert abs(fast.rate(0).log10_rate - np.log10(25.0)) < 4 * fast.rate(0).log10_rate_stderr
    assert_same_fit(slow, fast)


def test_tie_coefficients_follow_ties_and_the_population_rule():
    params = lmfit.Parameters()
    params.add("a", value=0.3)
    params.add("b", value=0.2)
    params.add("c", expr="1 - a - b")
    params.add("d", expr="-2.0 * c + -0.5")
    params.add("e", value=3.0, vary=False)
    params.add("f", expr="e")
    assert tie_coefficients(params) == {"a": {"a": 1.0}, "b": {"b": 1.0}, "c": {"a": -1.0, "b": -1.0},
                                        "d": {"a": 2.0, "b": 2.0}, "e": {}, "f": {}}
    params.add("g", expr="a * b")
    with pytest.raises(ValueError, match="not an affine constraint"):
        tie_coefficients(params)
