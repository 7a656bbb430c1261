"""Small models, as dnmr.simulate evaluates them: through their prepared structure (dnmr.engine.prepared,
small_model_terms) and, for blocks of one or two coherences, the closed-form eigen-lines
(dnmr.engine.eigenlines.small_block_lines) instead of LAPACK.

References, none of them the engine: McConnell's two-site closed form (tests/closed_forms.py; McConnell,
J. Chem. Phys. 28, 430 (1958)); the same modified Bloch equations for three sites, solved by
numpy.linalg.solve at every frequency (McConnell's equations for N sites are one N x N linear system per
frequency); numpy.linalg.solve of a block's resolvent at every frequency; QuTiP (tests/reference_qutip.py).
"""
from __future__ import annotations

import numpy as np
import pytest
from closed_forms import mcconnell_two_site
from reference_qutip import jumps_with_reverse, qutip_spectrum, random_model
from test_engine import model_from_reference, probe_frequencies

import dnmr
from dnmr.engine.eigenlines import eigen_basis, small_block_lines
from dnmr.engine.prepared import small_model_terms
from dnmr.engine.resolvent import LineshapeTerms

SF = 400.0  # MHz


def relative_error(got: np.ndarray, want: np.ndarray) -> float:
    return float(np.abs(got - want).max() / np.abs(want).max())


def two_site(k: float, p_a: float, w_a: float = 1.2, w_b: float = 0.8) -> dnmr.Model:
    states = [dnmr.State("a", {"H": 3.10}, linewidth_hz=w_a, population=p_a),
              dnmr.State("b", {"H": 3.35}, linewidth_hz=w_b, population=1.0 - p_a)]
    return dnmr.Model(dnmr.Spectrometer(SF), states, [dnmr.Exchange("a", "b", rate_per_s=k)],
                      window_ppm=(2.6, 3.8), points=8192)


@pytest.mark.parametrize("k", [0.0, 0.5, 30.0, 100.0 * np.pi / np.sqrt(2), 300.0, 2e3, 3e4, 1e5])
@pytest.mark.parametrize("p_a", [0.5, 0.62, 0.9])
def test_two_site_simulation_matches_mcconnell(k, p_a):
    """The small route (one block of two coherences, in closed form) against McConnell (1958): absorption and
    dispersion to 1e-10 of the peak, from slow exchange (and none) through coalescence to the fast limit.  (Far
    beyond, the narrow line's width carries a rounding error of about eps k on any route, LAPACK's too: at
    k = 1e6 s^-1 and p = 0.9 about 1e-10 of the peak, at 1e8 about 1e-9, against a reference in 40 digits.)"""
    model = two_site(k, p_a)
    assert small_model_terms(model) is not None  # the route under test
    spectrum = dnmr.simulate(model)
    want = mcconnell_two_site(spectrum.hz, 3.10 * SF, 3.35 * SF, k, p_a, 1.2, 0.8)
    assert relative_error(spectrum.intensity, want.real) < 1e-10
    assert relative_error(spectrum.dispersion, -want.imag) < 1e-10


def three_site_reference(hz: np.ndarray, shifts_hz, widths_hz, populations, rates) -> np.ndarray:
    """McConnell's modified Bloch equations for three uncoupled sites, solved at every frequency:
    S = 2 sum_j (M^-1 p)_j with M = i 2 pi (nu - nu_j) + pi w_j + k_out,j on the diagonal and -k(i -> j)
    off it (the two-site form of tests/closed_forms.py written for N sites)."""
    K = np.zeros((3, 3))
    for (i, j), k in rates.items():
        K[j, i] += k  # gain of site j from site i
        K[i, i] -= k
    z = 2j * np.pi * (hz[:, None] - np.asarray(shifts_hz)[None, :]) + np.pi * np.asarray(widths_hz)[None, :]
    M = np.zeros((hz.size, 3, 3), dtype=complex) - K[None, :, :]
    M[:, [0, 1, 2], [0, 1, 2]] += z
    rhs = np.broadcast_to(np.asarray(populations, dtype=complex)[:, None], (hz.size, 3, 1))
    return 2.0 * np.linalg.solve(M, rhs)[:, :, 0].sum(axis=1)


@pytest.mark.parametrize("scale", [0.01, 1.0, 40.0, 1e4])
def test_three_site_simulation_matches_the_three_site_bloch_equations(scale):
    """Three unequally populated sites in a cycle (one block of three coherences, through LAPACK), against the
    three-site equations solved point by point, to 1e-10 of the peak."""
    populations = np.array([0.5, 0.3, 0.2])
    k_ab, k_bc, k_ca = 40.0 * scale, 25.0 * scale, 10.0 * scale  # forward; reverses by detailed balance
    rates = {(0, 1): k_ab, (1, 0): k_ab * populations[0] / populations[1],
             (1, 2): k_bc, (2, 1): k_bc * populations[1] / populations[2],
             (2, 0): k_ca, (0, 2): k_ca * populations[2] / populations[0]}
    shifts, widths = [2.90, 3.05, 3.40], [1.0, 1.6, 0.7]
    states = [dnmr.State(name, {"H": d}, linewidth_hz=w, population=p)
              for name, d, w, p in zip("abc", shifts, widths, populations)]
    exchanges = [dnmr.Exchange("a", "b", rate_per_s=k_ab), dnmr.Exchange("b", "c", rate_per_s=k_bc),
                 dnmr.Exchange("c", "a", rate_per_s=k_ca)]
    model = dnmr.Model(dnmr.Spectrometer(SF), states, exchanges, window_ppm=(2.5, 3.8), points=6000)
    assert small_model_terms(model) is not None
    spectrum = dnmr.simulate(model)
    want = three_site_reference(spectrum.hz, np.array(shifts) * SF, widths, populations, rates)
    assert relative_error(spectrum.intensity, want.real) < 1e-10
    assert relative_error(spectrum.dispersion, -want.imag) < 1e-10


def resolvent_by_solves(L: np.ndarray, detect: np.ndarray, start: np.ndarray, hz: np.ndarray) -> np.ndarray:
    """detect . (i 2 pi nu - L)^-1 . start at every frequency, by numpy.linalg.solve."""
    z = 2j * np.pi * hz[:, None, None] * np.eye(len(L))[None] - L[None]
    rhs = np.broadcast_to(start.astype(complex)[:, None], (hz.size, len(L), 1))
    return np.linalg.solve(z, rhs)[:, :, 0] @ detect


def test_closed_form_blocks_match_solves_and_lapack_decisions():
    """Random 2 x 2 blocks over six decades of rates and frequencies: the closed form's lines give the
    resolvent (numpy.linalg.solve at every point) to 1e-10, and it refuses the eigen route exactly where
    LAPACK's eigenbasis is refused."""
    rng = np.random.default_rng(7)
    hz = np.linspace(-2000.0, 2000.0, 301)
    refused = 0
    for _ in range(400):
        k = 10.0 ** rng.uniform(-1, 5, 2)  # rates out of each coherence (s^-1)
        diagonal = -2j * np.pi * rng.uniform(-1500, 1500, 2) - np.pi * rng.uniform(0.2, 3.0, 2) - k
        L = np.diag(diagonal) + np.array([[0.0, k[1]], [k[0], 0.0]])
        detect, start = rng.random(2) + 0.1, rng.random(2) + 0.1
        lines = small_block_lines(L, detect, start)
        assert (lines is None) == (eigen_basis(L, detect, start) is None)
        if lines is None:
            refused += 1
            continue
        got = LineshapeTerms(*lines).evaluate(hz)
        assert relative_error(got, resolvent_by_solves(L, detect, start, hz)) < 1e-10
    assert refused < 40


def test_closed_form_refuses_the_defective_point_and_keeps_diagonal_blocks():
    """Equal sites at k = pi dnu: a double eigenvalue without a second eigenvector (refused: the Schur route
    takes it); a block without exchange: its diagonal are the lines, amplitudes detect x start."""
    dnu, k = 100.0, np.pi * 100.0
    L = np.array([[-k + 1j * np.pi * dnu, k], [k, -k - 1j * np.pi * dnu]])
    assert small_block_lines(L, np.ones(2), np.ones(2)) is None
    diagonal = np.diag([-3.0 + 200j, -3.0 + 200j])
    poles, amplitudes = small_block_lines(diagonal, np.array([1.0, 2.0]), np.array([0.5, 0.25]))
    assert np.array_equal(poles, [-3.0 + 200j, -3.0 + 200j]) and np.array_equal(amplitudes, [0.5, 0.5])


@pytest.mark.parametrize("seed, n_spins, n_states", [(11, 1, 3), (12, 2, 1), (13, 2, 2), (14, 1, 2)])
def test_small_random_models_through_simulate_match_qutip(seed, n_spins, n_states):
    """Small random models (coupled pairs, mutual and state-to-state exchange) through dnmr.simulate's small
    route against QuTiP's Lindblad reference (tests/reference_qutip.py), as the full route is in test_engine."""
    states, exchanges = random_model(np.random.default_rng(seed), n_spins, n_states)
    model = model_from_reference(states, exchanges)
    assert small_model_terms(model) is not None
    hz = probe_frequencies(states, 160)
    want = qutip_spectrum(hz, states, jumps_with_reverse(states, exchanges))
    got = dnmr.simulate(model, hz / SF)
    assert relative_error(got.intensity, want.real) < 1e-8
    assert relative_error(got.dispersion, -want.imag) < 1e-8


def test_a_state_without_population_adds_nothing():
    """A state of population 0 that no process reaches: the spectrum is the other state's line alone (a
    Lorentzian of the given width, common practice), and the route leaves its block out as the full route does."""
    states = [dnmr.State("on", {"H": 2.0}, linewidth_hz=1.5, population=1.0),
              dnmr.State("off", {"H": 2.4}, linewidth_hz=1.5, population=0.0)]
    model = dnmr.Model(dnmr.Spectrometer(SF), states, window_ppm=(1.5, 2.9), points=4000)
    spectrum = dnmr.simulate(model)
    nu = spectrum.hz
    lorentzian = (1.5 / 2 / np.pi) / ((nu - 2.0 * SF) ** 2 + (1.5 / 2) ** 2)
    assert relative_error(spectrum.intensity, lorentzian) < 1e-10
    assert len(spectrum.terms.poles) == 1
