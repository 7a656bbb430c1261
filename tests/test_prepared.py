"""Prepared models (dnmr.engine.prepared): the block Liouvillians as fixed matrices times the model's numbers,
which a fit evaluates instead of building a Model each time (dnmr.fitting.fitlineshape).

References: McConnell's two-site closed form (tests/closed_forms.py; McConnell, J. Chem. Phys. 28, 430
(1958)) for the spectrum; for groups and heteronuclei, where no closed form is at hand, the engine's full
route (itself checked against QuTiP in tests/test_engine.py and tests/test_heteronuclear.py) and its exact
derivatives (checked against finite differences in tests/test_derivatives.py).
"""
from __future__ import annotations

import numpy as np
import pytest

import dnmr
from closed_forms import mcconnell_two_site
from dnmr.engine.blocks import lineshape_terms
from dnmr.engine.derivatives import all_directions, lineshape_derivatives
from dnmr.engine.prepared import ModelNumbers, PreparedModel
from dnmr.engine.spinsystems import coupling_array
from dnmr.fitting.fitlineshape import FitLineshape
from dnmr.fitting.parameters import ParameterLayout
from dnmr.fitting.spectrumfit import FitOptions

SF = 400.0


def numbers_of(model: dnmr.Model) -> ModelNumbers:
    return ModelNumbers(model.shifts_hz(), coupling_array(model), model.linewidths_hz(), model.populations(),
                        model.rates())


def two_site(k: float, p_a: float) -> dnmr.Model:
    states = [dnmr.State("a", {"H": 3.00}, linewidth_hz=1.0, population=p_a),
              dnmr.State("b", {"H": 3.25}, linewidth_hz=1.4, population=1 - p_a)]
    return dnmr.Model(dnmr.Spectrometer(SF), states, [dnmr.Exchange("a", "b", rate_per_s=k)])


@pytest.mark.parametrize("k, p_a", [(3.0, 0.5), (120.0, 0.7), (4000.0, 0.35), (2e6, 0.5)])
def test_prepared_two_site_spectrum_matches_mcconnell(k, p_a):
    """One prepared model, evaluated at other rates and populations, gives McConnell's lineshape (1958)."""
    prepared = PreparedModel.build(two_site(10.0, 0.5))
    hz = np.linspace(2.8 * SF, 3.45 * SF, 1500)
    numbers = numbers_of(two_site(k, p_a))
    assert prepared.accepts(numbers)
    got = prepared.terms(numbers).evaluate(hz)
    want = mcconnell_two_site(hz, 3.00 * SF, 3.25 * SF, k, p_a, 1.0, 1.4)
    assert np.abs(got - want).max() < 1e-9 * np.abs(want).max()


def methyl_model(k: float) -> dnmr.Model:
    """An invented CH3-CH fragment in two conformers (a group of three and one proton, strongly coupled)."""
    a = dnmr.State("gauche", {"Me": 2.10, "Ha": 2.16}, {"Me-Ha": 7.1}, linewidth_hz=0.9, population=0.6)
    b = dnmr.State("anti", {"Me": 2.04, "Ha": 2.19}, {"Me-Ha": 5.3}, linewidth_hz=1.3, population=0.4)
    return dnmr.Model(dnmr.Spectrometer(SF), [a, b], [dnmr.Exchange("gauche", "anti", rate_per_s=k)],
                      groups={"Me": 3})


def fluorine_model(k: float) -> dnmr.Model:
    """An invented rotamer pair of a proton coupled to a fluorine and a deuteron (heteronuclei)."""
    a = dnmr.State("a", {"H": 4.10}, {"H-F": 48.0, "H-D": 2.1}, linewidth_hz=0.8, population=0.55)
    b = dnmr.State("b", {"H": 4.30}, {"H-F": 12.0, "H-D": 2.1}, linewidth_hz=0.8, population=0.45)
    return dnmr.Model(dnmr.Spectrometer(SF), [a, b], [dnmr.Exchange("a", "b", rate_per_s=k)],
                      heteronuclei={"F": "19F", "D": "2H"})


@pytest.mark.parametrize("make, window", [(methyl_model, (1.9, 2.4)), (fluorine_model, (3.9, 4.5))])
def test_prepared_groups_and_heteronuclei_match_the_full_route(make, window):
    """Groups (total-spin sectors) and heteronuclei (m configurations): the prepared model built at one rate
    gives the full route's spectrum and exact derivatives at others, to rounding error."""
    prepared = PreparedModel.build(make(50.0))
    hz = np.linspace(window[0] * SF, window[1] * SF, 900)
    for k in (0.5, 80.0, 3e4):
        model = make(k)
        want = lineshape_terms(model).evaluate(hz)
        got = prepared.terms(numbers_of(model)).evaluate(hz)
        assert np.abs(got - want).max() < 1e-9 * np.abs(want).max()
    model = make(80.0)
    directions = all_directions(model)
    want = lineshape_derivatives(model, hz, directions)
    layout = ParameterLayout.for_model(model, FitOptions(populations="free", linewidth="per-state"))
    values = layout.parameters(200.0).valuesdict()  # the model's own numbers
    got = FitLineshape(layout).derivatives(values, hz, [{d: 1.0} for d in directions])
    for a, b in zip(got.slopes, want.slopes):
        assert np.abs(a - b).max() <= 1e-8 * max(np.abs(b).max(), 1e-300)


def test_values_the_model_refuses_take_the_full_route():
    """Numbers a Model would refuse (a population of zero, a rate above kB T/h) are not taken by the prepared
    model; the fit's lineshape then builds the model, which raises its own one-line error."""
    model = two_site(10.0, 0.5)
    prepared = PreparedModel.build(model)
    numbers = numbers_of(model)
    assert not prepared.accepts(ModelNumbers(numbers.shifts_hz, numbers.couplings_hz, numbers.linewidths_hz,
                                             np.array([1.0, 0.0]), numbers.rates_per_s))
    assert not prepared.accepts(ModelNumbers(numbers.shifts_hz, numbers.couplings_hz, numbers.linewidths_hz,
                                             numbers.populations, np.array([1e15])))
    layout = ParameterLayout.for_model(model, FitOptions(populations="free"))
    values = {**layout.parameters(200.0).valuesdict(), "population_a": 1.2, "population_b": -0.2}
    with pytest.raises(dnmr.errors.InputError):
        FitLineshape(layout).terms(values)
