"""Property tests (hypothesis): invariants that hold for every model.

- The absorption integrates to sum over states of population x spins, whatever the rates: the
  trace of F+ rho is conserved by exchange and the resolvent integral picks out its initial value
  (PHYSICS.md; CONTRACT.md section 2).
- Detailed balance p_a k_ab = p_b k_ba for every implied reverse, and the populations are a stationary
  vector of the rate matrix (PHYSICS.md).
"""
from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import dnmr
from dnmr.engine.blocks import lineshape_terms
from dnmr.kinetics import rate_matrix
from dnmr.model import exchange_jumps

SF = 300.0


@st.composite
def models(draw, max_spins=3, max_states=3):
    n_spins = draw(st.integers(1, max_spins))
    n_states = draw(st.integers(1, max_states))
    names = [f"H{i}" for i in range(n_spins)]
    shift = st.floats(1.0, 4.0)
    states = []
    for c in range(n_states):
        couplings = {f"{a}-{b}": draw(st.floats(-18.0, 18.0))
                     for i, a in enumerate(names) for b in names[i + 1:]}
        states.append(dnmr.State(f"s{c}", {n: draw(shift) for n in names}, couplings,
                                 linewidth_hz=draw(st.floats(0.3, 6.0)), population=draw(st.floats(0.05, 1.0))))
    rate = st.floats(1e-3, 1e7)
    exchanges = []
    for c in range(n_states - 1):
        perm = draw(st.permutations(names))
        exchanges.append(dnmr.Exchange(f"s{c}", f"s{c + 1}", dict(zip(names, perm)), rate_per_s=draw(rate)))
    if n_spins >= 2 and draw(st.booleans()):
        perm = draw(st.permutations(names).filter(lambda p: list(p) != names))
        exchanges.append(dnmr.Exchange("s0", "s0", dict(zip(names, perm)), rate_per_s=draw(rate)))
    return dnmr.Model(dnmr.Spectrometer(SF), states, exchanges)


def integral_over_all_frequencies(model, points=200001):
    """Integral of the absorption over the whole real line, by the substitution nu = c + s tan(theta)."""
    terms = lineshape_terms(model)
    centre = model.shifts_hz().mean()
    scale = 50.0
    theta = np.linspace(-np.pi / 2, np.pi / 2, points)[1:-1]
    nu = centre + scale * np.tan(theta)
    y = terms.evaluate(nu).real * scale / np.cos(theta) ** 2
    return float(np.trapezoid(y, theta))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(models())
def test_integral_is_population_times_spins(model):
    expected = len(model.spins)  # populations are normalised to 1
    # Exact from the decomposition: each term c/(i w - lambda) integrates to Re(c)/2 over nu.
    assert abs(lineshape_terms(model).integral() - expected) < 1e-9 * expected
    # And numerically over the evaluated spectrum, whatever route each block took.
    assert abs(integral_over_all_frequencies(model) - expected) < 2e-3 * expected


@settings(max_examples=60, deadline=None)
@given(models(max_spins=2, max_states=4))
def test_detailed_balance_and_stationary_populations(model):
    p = model.populations()
    jumps = exchange_jumps(model)
    for forward in (j for j in jumps if j.forward and j.source != j.target):
        back = [j for j in jumps if not j.forward and j.process == forward.process]
        assert len(back) == 1
        assert np.isclose(p[forward.source] * forward.rate_per_s, p[back[0].source] * back[0].rate_per_s,
                          rtol=1e-12)
    K = rate_matrix(len(model.states), jumps)
    assert np.abs(K @ p).max() <= 1e-9 * max(1.0, np.abs(K).max())
    assert np.allclose(K.sum(axis=0), 0.0, atol=1e-9 * max(1.0, np.abs(K).max()))  # populations conserved
