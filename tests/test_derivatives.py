"""Exact derivatives of the lineshape with respect to exchange rates and linewidths
(dnmr.engine.blocks.lineshape_derivatives), against finite differences.

The outside reference is McConnell's two-site closed form (J. Chem. Phys. 28, 430 (1958), in
tests/closed_forms.py), differentiated by fourth-order central differences.  For coupled spins, several processes and
magnetically equivalent groups the check is against central differences of dnmr.simulate, whose spectra
test_engine.py checks against QuTiP.
"""
from __future__ import annotations

import numpy as np
import pytest
from closed_forms import mcconnell_two_site
from threadpoolctl import threadpool_limits

import dnmr
from dnmr.engine import blocks

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
    exact = blocks.lineshape_derivatives(model, hz)

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
    exact = blocks.lineshape_derivatives(coupled_model(rates), hz)
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
    exact = blocks.lineshape_derivatives(model(20.0), hz)

    def absorption(k):
        return dnmr.simulate(model(k), window_ppm=(hz[0] / SF, hz[-1] / SF), points=len(hz)).intensity

    assert relative_error(exact.spectrum.real, absorption(20.0)) < 1e-10
    assert relative_error(exact.rates[0].real, central(absorption, 20.0, 0.02)) < 1e-8
