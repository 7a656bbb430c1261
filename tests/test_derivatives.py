"""Exact derivatives of the lineshape with respect to exchange rates, linewidths, shifts, couplings,
populations and the frequency (dnmr.engine.derivatives.lineshape_derivatives), against finite differences.

The outside references are McConnell's two-site closed form (J. Chem. Phys. 28, 430 (1958)) and the static
AB quartet of Pople, Schneider & Bernstein (1959) with Lorentzian lines (both in tests/closed_forms.py),
differentiated by fourth-order central differences.  For coupled spins, several processes, magnetically
equivalent groups and heteronuclei the check is against central differences of dnmr.simulate, whose spectra
test_engine.py and test_heteronuclear.py check against QuTiP.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from closed_forms import ab_quartet, lorentzian_lines, mcconnell_two_site
from threadpoolctl import threadpool_limits

import dnmr
from dnmr.engine import derivatives

SF = 400.0  # MHz


@pytest.fixture(autouse=True)
def one_blas_thread():
    """Small dense blocks: BLAS threads only contend (as in every fit, which runs with one)."""
    with threadpool_limits(1):
        yield


def relative_error(a, b):
    return np.abs(a - b).max() / np.abs(b).max()


def central(f, x, step):
    """Fourth-order central difference (error O(step^4) plus rounding / step)."""
    return (8 * (f(x + step) - f(x - step)) - (f(x + 2 * step) - f(x - 2 * step))) / (12 * step)


@pytest.mark.parametrize("k", [2.0, 60.0, np.pi * 100.0, 4000.0])
def test_two_site_derivatives_match_mcconnell(k):
    """dS/dk and dS/dw of both sites against central differences of McConnell's closed form (relative
    steps 1e-3: truncation and rounding both about 1e-10), including k = pi dnu."""
    states = [dnmr.State("a", {"H": 3.00}, linewidth_hz=1.0, population=0.6),
              dnmr.State("b", {"H": 3.25}, linewidth_hz=1.5, population=0.4)]
    model = dnmr.Model(dnmr.Spectrometer(SF), states, [dnmr.Exchange("a", "b", rate_per_s=k)])
    hz = np.linspace(2.8 * SF, 3.45 * SF, 2000)
    exact = derivatives.lineshape_derivatives(model, hz)

    def closed(rate=k, w_a=1.0, w_b=1.5):
        return mcconnell_two_site(hz, 3.00 * SF, 3.25 * SF, rate, 0.6, w_a, w_b)

    assert relative_error(exact.spectrum, closed()) < 1e-10
    assert relative_error(exact.rates[0], central(lambda r: closed(rate=r), k, 1e-3 * k)) < 1e-8
    assert relative_error(exact.linewidths[0], central(lambda w: closed(w_a=w), 1.0, 1e-3)) < 1e-8
    assert relative_error(exact.linewidths[1], central(lambda w: closed(w_b=w), 1.5, 1e-3)) < 1e-8


def coupled_model(rates, widths=(0.9, 1.4)) -> dnmr.Model:
    """Three coupled spins in two conformers, joined by two processes: a conformer change that also swaps
    H1 and H2, and a mutual exchange of H1 and H3 within the major conformer."""
    major = dnmr.State("major", {"H1": 2.10, "H2": 2.32, "H3": 2.71}, {"H1-H2": -12.5, "H2-H3": 6.0, "H1-H3": 2.0},
                       linewidth_hz=widths[0], population=0.65)
    minor = dnmr.State("minor", {"H1": 2.18, "H2": 2.05, "H3": 2.60}, {"H1-H2": -12.0, "H2-H3": 4.5, "H1-H3": 8.0},
                       linewidth_hz=widths[1], population=0.35)
    return dnmr.Model(dnmr.Spectrometer(SF), [major, minor],
                      [dnmr.Exchange("major", "minor", {"H1": "H2", "H2": "H1"}, rate_per_s=rates[0]),
                       dnmr.Exchange("major", "major", {"H1": "H3", "H3": "H1"}, rate_per_s=rates[1])])


def test_coupled_two_process_derivatives_match_finite_differences():
    rates = (35.0, 12.0)
    hz = np.linspace(1.9 * SF, 2.9 * SF, 1500)
    exact = derivatives.lineshape_derivatives(coupled_model(rates), hz)
    ppm = hz / SF

    def absorption(model):
        return dnmr.simulate(model, window_ppm=(ppm[0], ppm[-1]), points=len(hz)).intensity

    assert relative_error(exact.spectrum.real, absorption(coupled_model(rates))) < 1e-10
    for i in range(2):
        def at(r, i=i):
            return absorption(coupled_model([r if j == i else rates[j] for j in range(2)]))
        assert relative_error(exact.rates[i].real, central(at, rates[i], 1e-3 * rates[i])) < 1e-8
    for i in range(2):
        def wide(w, i=i):
            return absorption(coupled_model(rates, [w if j == i else (0.9, 1.4)[j] for j in range(2)]))
        assert relative_error(exact.linewidths[i].real, central(wide, (0.9, 1.4)[i], 1e-3)) < 1e-8


def test_derivatives_with_equivalent_groups_match_finite_differences():
    """Two CH3 groups swapped by rotation (magnetically equivalent nuclei as [groups], so the spectrum is a
    sum of spin systems of several sizes)."""
    def model(k):
        state = dnmr.State("amide", {"MeE": 2.94, "MeZ": 3.05, "Hf": 8.02}, {"MeE-Hf": 0.6, "MeZ-Hf": 0.3},
                           linewidth_hz=0.8, population=1)
        return dnmr.Model(dnmr.Spectrometer(SF), [state],
                          [dnmr.Exchange("amide", "amide", {"MeE": "MeZ", "MeZ": "MeE"}, rate_per_s=k)],
                          groups={"MeE": 3, "MeZ": 3})
    hz = np.linspace(2.85 * SF, 3.15 * SF, 1200)
    exact = derivatives.lineshape_derivatives(model(20.0), hz)

    def absorption(k):
        return dnmr.simulate(model(k), window_ppm=(hz[0] / SF, hz[-1] / SF), points=len(hz)).intensity

    assert relative_error(exact.spectrum.real, absorption(20.0)) < 1e-10
    assert relative_error(exact.rates[0].real, central(absorption, 20.0, 0.02)) < 1e-8


@pytest.mark.parametrize("populations, k", [((0.6, 0.4), 60.0), ((1.2, 0.8), 4000.0), ((0.5, 0.5), np.pi * 100.0)])
def test_two_site_shift_population_and_frequency_derivatives_match_mcconnell(populations, k):
    """dS/d(shift) of both sites, dS/d(weight) of both states (the model normalises the weights, so
    dp_a/dw_a = p_b / (w_a + w_b) and dp_a/dw_b = -p_a / (w_a + w_b)) and dS/dnu, against central differences
    of McConnell's closed form.  Equal populations at k = pi dnu make the block defective: the Schur route."""
    w_a, w_b = populations
    total, p_a = w_a + w_b, w_a / (w_a + w_b)
    states = [dnmr.State("a", {"H": 3.00}, linewidth_hz=1.0, population=w_a),
              dnmr.State("b", {"H": 3.25}, linewidth_hz=1.0, population=w_b)]
    model = dnmr.Model(dnmr.Spectrometer(SF), states, [dnmr.Exchange("a", "b", rate_per_s=k)])
    hz = np.linspace(2.8 * SF, 3.45 * SF, 2000)
    directions = [("shift", 0, 0), ("shift", 1, 0), ("population", 0), ("population", 1), ("frequency",)]
    exact = derivatives.lineshape_derivatives(model, hz, directions)

    def closed(nu_a=3.00 * SF, nu_b=3.25 * SF, p=p_a, freqs=hz):
        return mcconnell_two_site(freqs, nu_a, nu_b, k, p, 1.0, 1.0)

    assert relative_error(exact.spectrum, closed()) < 1e-10
    by_pop = central(lambda p: closed(p=p), p_a, 1e-4)
    expected = {("shift", 0, 0): central(lambda v: closed(nu_a=v), 3.00 * SF, 1e-3),
                ("shift", 1, 0): central(lambda v: closed(nu_b=v), 3.25 * SF, 1e-3),
                ("population", 0): by_pop * (1.0 - p_a) / total, ("population", 1): -by_pop * p_a / total,
                ("frequency",): central(lambda d: closed(freqs=hz + d), 0.0, 1e-3)}
    for direction, reference in expected.items():
        assert relative_error(exact.slope(direction), reference) < 1e-8, direction


def test_ab_quartet_coupling_and_shift_derivatives_match_the_closed_form():
    """A static AB system (Pople, Schneider & Bernstein 1959) with 0.8 Hz Lorentzian lines: dS/dJ and
    dS/d(shift) of both spins against central differences of the closed form."""
    def closed(nu_a=1000.0, nu_b=1012.0, j=-7.5):
        return lorentzian_lines(hz, *ab_quartet(nu_a, nu_b, j), 0.8)

    hz = np.linspace(960.0, 1050.0, 3000)
    state = dnmr.State("s", {"A": 1000.0 / SF, "B": 1012.0 / SF}, {"A-B": -7.5}, linewidth_hz=0.8, population=1)
    model = dnmr.Model(dnmr.Spectrometer(SF), [state])
    directions = [("coupling", 0, 0, 1), ("shift", 0, 0), ("shift", 0, 1)]
    exact = derivatives.lineshape_derivatives(model, hz, directions)
    assert relative_error(exact.spectrum, closed()) < 1e-10
    assert relative_error(exact.slope(("coupling", 0, 0, 1)), central(lambda j: closed(j=j), -7.5, 1e-3)) < 1e-8
    assert relative_error(exact.slope(("shift", 0, 0)), central(lambda v: closed(nu_a=v), 1000.0, 1e-3)) < 1e-8
    assert relative_error(exact.slope(("shift", 0, 1)), central(lambda v: closed(nu_b=v), 1012.0, 1e-3)) < 1e-8
    assert derivatives.coupling_direction(model, 0, "B-A") == ("coupling", 0, 0, 1)


def _moved(model: dnmr.Model, direction: tuple, step: float) -> dnmr.Model:
    """`model` with the number of one direction moved by `step` (Hz for shifts and couplings, weight units)."""
    kind, c = direction[0], direction[1]
    state = model.states[c]
    if kind == "shift":
        spin = model.spins[direction[2]]
        state = dataclasses.replace(state, shifts_ppm={**state.shifts_ppm, spin: state.shifts_ppm[spin] + step / SF})
    elif kind == "coupling":
        names = model.all_spins
        key = next(k for k in state.couplings_hz if set(k.split("-")) == {names[direction[2]], names[direction[3]]})
        state = dataclasses.replace(state, couplings_hz={**state.couplings_hz, key: state.couplings_hz[key] + step})
    else:
        state = dataclasses.replace(state, population=state.population + step)
    return model.replace(states=tuple(state if i == c else s for i, s in enumerate(model.states)))


@pytest.mark.parametrize("case", ["coupled", "heteronuclear"])
def test_shift_coupling_and_population_derivatives_match_finite_differences(case):
    """Coupled spins with two processes (tests above), and a CH2 fragment coupled to 19F and 2H in two rotamers
    (heteronuclear couplings move the proton lines: test_heteronuclear.py's QuTiP-checked model), against
    central differences of dnmr.simulate (steps 0.01 Hz and 0.001 in the weights: the simulation's own rounding,
    about 1e-10 of the spectrum, divided by a smaller step would swamp the comparison)."""
    if case == "coupled":
        model, lo, hi = coupled_model((35.0, 12.0)), 1.9, 2.9
    else:
        a = dnmr.State("A", {"Ha": 3.10, "Hb": 3.18}, {"Ha-Hb": -12.0, "Ha-F": 48.0, "Hb-F": 12.0, "Ha-D": 2.0},
                       linewidth_hz=1.1, population=0.65)
        b = dnmr.State("B", {"Ha": 3.05, "Hb": 3.25}, {"Ha-Hb": -11.0, "Ha-F": 20.0, "Hb-F": 30.0, "Hb-D": 1.5},
                       linewidth_hz=0.8, population=0.35)
        model = dnmr.Model(dnmr.Spectrometer(SF), [a, b], [dnmr.Exchange("A", "B", {"Ha": "Hb", "Hb": "Ha"}, rate_per_s=40.0)],
                           heteronuclei={"F": "19F", "D": "2H"})
        lo, hi = 2.9, 3.45
    hz = np.linspace(lo * SF, hi * SF, 1500)
    names = model.all_spins
    directions = [("shift", 0, 0), ("shift", 1, 1), ("population", 0), ("population", 1)]
    directions += [derivatives.coupling_direction(model, c, key) for c, s in enumerate(model.states)
                   for key in s.couplings_hz]
    exact = derivatives.lineshape_derivatives(model, hz, directions)

    def absorption(m):
        return dnmr.simulate(m, window_ppm=(lo, hi), points=len(hz)).intensity

    assert relative_error(exact.spectrum.real, absorption(model)) < 1e-10
    for direction in directions:
        step = 1e-3 if direction[0] == "population" else 1e-2
        reference = central(lambda x, d=direction: absorption(_moved(model, d, x)), 0.0, step)
        assert relative_error(exact.slope(direction).real, reference) < 1e-8, (direction, names)


def test_unknown_direction_is_refused():
    model = coupled_model((35.0, 12.0))
    with pytest.raises(ValueError, match="unknown derivative direction"):
        derivatives.lineshape_derivatives(model, np.linspace(800, 1100, 10), [("shift", 0, 7)])
