"""The independent references checked against each other and against published results.

``reference_qutip`` (QuTiP, full Liouville space) and ``closed_forms`` (published formulas) are
what the dnmr engine is tested against, so they are first tested here on their own.
"""
from __future__ import annotations

import numpy as np
import pytest
import qutip
import scipy.sparse.linalg
from scipy.optimize import brentq, minimize_scalar
from scipy.signal import argrelmax

from closed_forms import (a2_energy_levels, a2_line, ab_quartet, fast_exchange_excess_width,
                          gutowsky_holm_rate, kurland_rubin_wise_rate, lorentzian_lines,
                          mcconnell_two_site, shanan_atidi_bar_eli_rates,
                          slow_exchange_broadening)
from reference_qutip import (jumps_with_reverse, permutation_operator, qutip_spectrum,
                             observation_vectors, random_model, spin_operators,
                             state_hamiltonian, total_liouvillian)

# Grid offset by an irrational-looking amount so that no point falls exactly on a line.
FREQS = np.linspace(-300.0, 300.0, 601) + 0.137
NU_A, NU_B = -50.0, 80.0
DNU = NU_B - NU_A
RATES = [1e-3, 1e-1, 10.0, np.pi * DNU, 1e3, 1e5, 1e7]


def _state(shifts, linewidth, population=1.0, j_hz=0.0):
    """A state dict; j_hz couples every pair of spins equally (Hz)."""
    n_spins = len(shifts)
    couplings = j_hz * (np.ones((n_spins, n_spins)) - np.eye(n_spins))
    return {"shifts_hz": list(shifts), "couplings_hz": couplings, "linewidth_hz": linewidth,
            "population": population}


def _swap(rate):
    """Mutual exchange of two spins at `rate` (s^-1); the swap is its own inverse."""
    return [{"source": 0, "target": 0, "permutation": [1, 0], "rate": rate}]


def _ab_spectrum(freqs, dnu, j_hz, rate, linewidth):
    """AB pair centred at 0 Hz under mutual exchange at `rate` (s^-1)."""
    return qutip_spectrum(freqs, [_state([-dnu / 2, dnu / 2], linewidth, j_hz=j_hz)], _swap(rate))


def test_qutip_liouvillian_is_minus_i_commutator():
    # QuTiP documentation: liouvillian(H) generates d rho/dt = -i [H, rho] (column-stacked vec).
    rng = np.random.default_rng(0)
    hamiltonian = qutip.rand_herm(4, seed=1)
    rho = qutip.Qobj(rng.normal(size=(4, 4)) + 1j * rng.normal(size=(4, 4)))
    generated = qutip.vector_to_operator(qutip.liouvillian(hamiltonian) * qutip.operator_to_vector(rho))
    expected = -1j * (hamiltonian * rho - rho * hamiltonian)
    np.testing.assert_allclose(generated.full(), expected.full(), atol=1e-12)


def test_permutation_operator_carries_spin_i_to_perm_i():
    # CONTRACT convention: P|m> = |m'> with m'[perm[i]] = m[i]; then P Iz_i P^T = Iz_perm[i].
    perm = [1, 2, 0]
    p_op = permutation_operator(perm)
    ops = spin_operators(3)
    for i in range(3):
        np.testing.assert_array_equal((p_op * ops[i][2] * p_op.dag()).full(),
                                      ops[perm[i]][2].full())
    moved = p_op * qutip.basis([2, 2, 2], [1, 0, 0])
    assert moved == qutip.basis([2, 2, 2], [0, 1, 0])


def test_reverse_jumps_follow_detailed_balance_and_inverse_permutation():
    # CONTRACT.md section 1: k_rev = k p_from / p_to with the inverse mapping; a mutual exchange
    # implies its inverse permutation at the same rate (a swap is its own inverse).
    states = [_state([0.0, 1.0, 2.0], 1.0, 0.6), _state([0.0, 1.0, 2.0], 1.0, 0.2)]
    exchanges = [{"source": 0, "target": 1, "permutation": [1, 2, 0], "rate": 30.0},
                 {"source": 0, "target": 0, "permutation": [2, 0, 1], "rate": 5.0},
                 {"source": 1, "target": 1, "permutation": [1, 0, 2], "rate": 7.0}]
    jumps = jumps_with_reverse(states, exchanges)
    assert jumps[1] == {"source": 1, "target": 0, "permutation": [2, 0, 1], "rate": pytest.approx(90.0)}
    assert jumps[3] == {"source": 0, "target": 0, "permutation": [1, 2, 0], "rate": 5.0}
    assert len(jumps) == 5


def test_reduced_solve_equals_full_liouville_space_solve():
    # The invariant-subspace restriction must not change the answer: compare with a plain sparse
    # solve of (i 2pi nu - L) x = rho0 in the whole labelled Liouville space.
    states, exchanges = random_model(np.random.default_rng(3), 2, 2)
    jumps = jumps_with_reverse(states, exchanges)
    liouvillian = total_liouvillian(states, jumps).data.as_scipy().tocsc()
    row, rho0 = observation_vectors(states)
    identity = scipy.sparse.identity(liouvillian.shape[0], format="csc")
    freqs = np.array([-123.4, 0.0, 56.7, 250.0])
    full = [2.0 * row @ scipy.sparse.linalg.spsolve(2j * np.pi * nu * identity - liouvillian, rho0)
            for nu in freqs]
    np.testing.assert_allclose(qutip_spectrum(freqs, states, jumps), full, rtol=1e-10)


@pytest.mark.parametrize("rate", RATES)
def test_two_sites_one_spin_matches_mcconnell(rate):
    # McConnell, J. Chem. Phys. 28, 430 (1958): one spin, two sites, unequal populations and
    # linewidths; the reverse rate comes from detailed balance in both.
    states = [_state([NU_A], 1.5, 0.7), _state([NU_B], 3.0, 0.3)]
    jumps = jumps_with_reverse(states, [{"source": 0, "target": 1, "permutation": [0], "rate": rate}])
    expected = mcconnell_two_site(FREQS, NU_A, NU_B, rate, 0.7, 1.5, 3.0)
    np.testing.assert_allclose(qutip_spectrum(FREQS, states, jumps), expected, rtol=1e-8)


@pytest.mark.parametrize("rate", RATES)
def test_uncoupled_mutual_swap_is_two_equal_population_mcconnell_lines(rate):
    # With J = 0 the single-quantum coherences of spin 1 split by the (conserved) state of spin 2
    # into two independent copies of the equal-population two-site problem of McConnell,
    # J. Chem. Phys. 28, 430 (1958), each carrying one spin: S_swap = 2 S_McConnell(p = 1/2).
    # rate = pi * dnu is the defective (double-eigenvalue) point named in PHYSICS.md.
    expected = 2.0 * mcconnell_two_site(FREQS, NU_A, NU_B, rate, 0.5, 2.0, 2.0)
    spectrum = qutip_spectrum(FREQS, [_state([NU_A, NU_B], 2.0)], _swap(rate))
    np.testing.assert_allclose(spectrum, expected, rtol=1e-8)


@pytest.mark.parametrize("dnu, j_hz", [(40.0, 7.0), (40.0, -7.0), (10.0, 12.0)])
def test_static_ab_is_the_quartet(dnu, j_hz):
    # Pople, Schneider & Bernstein (1959): four Lorentzian lines at centre +/- J/2 +/- D/2 with
    # intensities (1 -/+ J/D)/2, whatever the sign of J; here centred at 25 Hz.
    centre = 25.0
    state = _state([centre - dnu / 2, centre + dnu / 2], 0.8, j_hz=j_hz)
    positions, intensities = ab_quartet(centre - dnu / 2, centre + dnu / 2, j_hz)
    expected = lorentzian_lines(FREQS, positions, intensities, 0.8)
    np.testing.assert_allclose(qutip_spectrum(FREQS, [state], []), expected, rtol=1e-9, atol=1e-12)


def _relabelled(state, perm):
    """The same molecule with its spins listed in another order: spin i becomes spin perm[i]."""
    order = np.argsort(perm)
    couplings = np.asarray(state["couplings_hz"])[np.ix_(order, order)]
    return dict(state, shifts_hz=list(np.asarray(state["shifts_hz"])[order]), couplings_hz=couplings)


def _two_state_spectrum(state_a, state_b, permutation, rate):
    """Spectrum of states a and b joined by an exchange a -> b (rate s^-1) with the given mapping."""
    states = [state_a, state_b]
    exchanges = [{"source": 0, "target": 1, "permutation": permutation, "rate": rate}]
    return qutip_spectrum(FREQS, states, jumps_with_reverse(states, exchanges))


@pytest.mark.parametrize("rate", [10.0, np.pi * DNU, 1e4])
def test_site_exchange_between_relabelled_states_is_mutual_exchange(rate):
    # From the equation of motion (PHYSICS.md): state b is state a with its two spins listed in
    # the other order; with the identity mapping each spin moves to the other shift, and
    # rho_a + P^T rho_b P obeys the mutual-exchange equation of one AB state exactly (equal
    # populations, equal widths).
    state = _state([NU_A, NU_B], 2.0, 0.5, j_hz=12.0)
    expected = qutip_spectrum(FREQS, [state], _swap(rate))
    spectrum = _two_state_spectrum(state, _relabelled(state, [1, 0]), [0, 1], rate)
    np.testing.assert_allclose(spectrum, expected, rtol=1e-9)


@pytest.mark.parametrize("perm", [[1, 0], [1, 2, 0]])
def test_renaming_exchange_between_relabelled_states_is_static(perm):
    # From the equation of motion (PHYSICS.md): when the mapping carries each spin of a onto its
    # own image in the relabelled state b, the molecule does not change and rho_a + P^T rho_b P
    # evolves as one static state, whatever the rate and populations. A wrong direction of the
    # 3-cycle would move spins between shifts and broaden the lines.
    state = _state([NU_A, NU_B, 140.0][:len(perm)], 2.0, 0.3)
    state["couplings_hz"] = np.array([[0.0, 12.0, -4.0], [12.0, 0.0, 7.0], [-4.0, 7.0, 0.0]])[
        :len(perm), :len(perm)]
    relabelled = dict(_relabelled(state, perm), population=0.7)
    expected = qutip_spectrum(FREQS, [state], [])
    np.testing.assert_allclose(_two_state_spectrum(state, relabelled, perm, 300.0), expected,
                               rtol=1e-9)


def test_ab_inner_to_outer_peak_ratio():
    # Pople, Schneider & Bernstein (1959): inner/outer intensity ratio (1 + J/D)/(1 - J/D);
    # with lines far narrower than their spacing the peak heights carry that ratio.
    dnu, j_hz = 30.0, 15.0
    freqs = np.linspace(-40.0, 40.0, 80001)
    absorption = _ab_spectrum(freqs, dnu, j_hz, 0.0, 0.05).real
    peaks = argrelmax(absorption)[0]
    d = np.hypot(dnu, j_hz)
    np.testing.assert_allclose(freqs[peaks], np.sort(ab_quartet(-dnu / 2, dnu / 2, j_hz)[0]), atol=1e-3)
    heights = absorption[peaks]
    np.testing.assert_allclose(heights[1] / heights[0], (1 + j_hz / d) / (1 - j_hz / d), rtol=1e-3)


def test_a2_energy_levels():
    # Pople, Schneider & Bernstein (1959): triplet M nu + J/4, singlet -3J/4.
    hamiltonian = state_hamiltonian(_state([33.0, 33.0], 1.0, j_hz=-9.0))
    np.testing.assert_allclose(np.sort(hamiltonian.eigenenergies()), a2_energy_levels(33.0, -9.0),
                               atol=1e-12)


@pytest.mark.parametrize("rate", [0.0, 50.0, 1e4])
def test_a2_gives_one_line_at_its_shift(rate):
    # Pople, Schneider & Bernstein (1959): an A2 pair shows one line at its shift whatever J;
    # swapping the two equivalent spins changes nothing observable.
    state = _state([33.0, 33.0], 1.2, j_hz=14.0)
    positions, intensities = a2_line(33.0)
    expected = lorentzian_lines(FREQS, positions, intensities, 1.2)
    np.testing.assert_allclose(qutip_spectrum(FREQS, [state], _swap(rate)), expected, rtol=1e-9)


def _integral(states, jumps, centre, scale, n_points=20000):
    """Integral over all frequencies of Re S, by the midpoint rule in theta, nu = c + s tan(theta)."""
    theta = (np.arange(n_points) + 0.5) * np.pi / n_points - np.pi / 2
    freqs = centre + scale * np.tan(theta)
    weights = scale / np.cos(theta) ** 2 * np.pi / n_points
    return np.sum(qutip_spectrum(freqs, states, jumps).real * weights)


@pytest.mark.parametrize("n_spins, n_states, seed", [(1, 3, 4), (2, 1, 5), (3, 2, 6)])
def test_integral_is_number_of_spins(n_spins, n_states, seed):
    # CONTRACT.md section 2: the absorption integrates to the number of spins, whatever the rates.
    states, exchanges = random_model(np.random.default_rng(seed), n_spins, n_states)
    integral = _integral(states, jumps_with_reverse(states, exchanges), 0.0, 300.0)
    assert integral == pytest.approx(n_spins, rel=1e-6)


def _central_curvature(lineshape, dnu):
    """Relative second difference of an absorption function at 0 Hz (step dnu * 1e-4)."""
    h = dnu * 1e-4
    low, mid, high = lineshape(np.array([-h, 0.0, h])).real
    return (low - 2 * mid + high) / mid


def test_gutowsky_holm_coalescence_of_mcconnell_lineshape():
    # Gutowsky & Holm, J. Chem. Phys. 25, 1228 (1956): equal populations, no intrinsic width,
    # the centre turns from a minimum into a maximum at k = pi dnu / sqrt 2.
    dnu = 100.0
    root = brentq(lambda k: _central_curvature(
        lambda f: mcconnell_two_site(f, -dnu / 2, dnu / 2, k, 0.5, 0.0, 0.0), dnu), 150.0, 300.0,
        rtol=1e-12)
    assert root == pytest.approx(gutowsky_holm_rate(dnu), rel=1e-6)


def test_gutowsky_holm_textbook_factor():
    # Common practice (from memory): k_c = 2.22 dnu.
    assert gutowsky_holm_rate(1.0) == pytest.approx(2.22, abs=5e-3)


@pytest.mark.parametrize("dp", [0.0, 0.1, 0.3, 0.6])
def test_shanan_atidi_bar_eli_coalescence_of_mcconnell_lineshape(dp):
    # Shanan-Atidi & Bar-Eli, J. Phys. Chem. 74, 961 (1970): the minor peak merges with the major
    # one at the predicted rates (no intrinsic width): two maxima just below, one just above.
    dnu, p_a = 100.0, (1 + dp) / 2
    k_ab, k_ba = shanan_atidi_bar_eli_rates(dp, dnu)
    assert p_a * k_ab == pytest.approx((1 - p_a) * k_ba)
    freqs = np.linspace(-150.0, 150.0, 300001)
    maxima = [len(argrelmax(mcconnell_two_site(freqs, -dnu / 2, dnu / 2, factor * k_ab, p_a,
                                               0.0, 0.0).real)[0]) for factor in (0.99, 1.01)]
    assert maxima == [2, 1]


def test_shanan_atidi_bar_eli_reduces_to_gutowsky_holm():
    # Shanan-Atidi & Bar-Eli (1970) at dp = 0 is Gutowsky & Holm (1956): X = sqrt 2.
    assert shanan_atidi_bar_eli_rates(0.0, 80.0) == pytest.approx((gutowsky_holm_rate(80.0),) * 2)


@pytest.mark.parametrize("dnu, j_hz", [(100.0, 0.0), (100.0, 10.0), (60.0, 25.0)])
def test_kurland_rubin_wise_coalescence_of_qutip_ab(dnu, j_hz):
    # Kurland, Rubin & Wise, J. Chem. Phys. 40, 2426 (1964): an AB pair under mutual exchange
    # coalesces (centre turns from minimum to maximum) at (pi/sqrt 2) sqrt(dnu^2 + 6 J^2).
    expected = kurland_rubin_wise_rate(dnu, j_hz)
    root = brentq(lambda k: _central_curvature(
        lambda f: _ab_spectrum(f, dnu, j_hz, k, 1e-6), dnu), 0.8 * expected, 1.2 * expected,
        rtol=1e-10)
    assert root == pytest.approx(expected, rel=1e-5)


def _peak_and_fwhm(absorption, low, high):
    """Position (Hz) and FWHM (Hz) of the single maximum of `absorption` inside [low, high]."""
    peak = minimize_scalar(lambda f: -absorption(f), bounds=(low, high), method="bounded",
                           options={"xatol": 1e-10}).x
    half = absorption(peak) / 2
    left = brentq(lambda f: absorption(f) - half, low, peak, xtol=1e-12)
    right = brentq(lambda f: absorption(f) - half, peak, high, xtol=1e-12)
    return peak, right - left


def _mcconnell_absorption(k_ab, p_a, w):
    """Scalar absorption function of the NU_A/NU_B two-site problem (equal widths w, Hz)."""
    return lambda f: mcconnell_two_site(np.atleast_1d(f), NU_A, NU_B, k_ab, p_a, w, w).real[0]


def test_slow_exchange_broadening_of_mcconnell_line():
    # Slow-exchange limit of McConnell (1958): each line broadens by k_out / pi (FWHM); the
    # neglected terms are of order k_out / (2 pi dnu) = 4e-3 here.
    k_ab, p_a, w = 5.0, 0.4, 1.0
    k_ba = k_ab * p_a / (1 - p_a)
    for nu, k_out in ((NU_A, k_ab), (NU_B, k_ba)):
        _, width = _peak_and_fwhm(_mcconnell_absorption(k_ab, p_a, w), nu - 20.0, nu + 20.0)
        assert width - w == pytest.approx(slow_exchange_broadening(k_out), rel=1e-2)


def test_fast_exchange_line_of_mcconnell():
    # Fast-exchange limit of McConnell (1958): one line at the population-weighted shift with
    # excess width p_a p_b (2 pi dnu)^2 / (pi (k_ab + k_ba)); corrections are of relative order
    # (2 pi dnu / (k_ab + k_ba))^2 ~ 1e-5 here.
    k_ab, p_a, w = 1e5, 0.7, 1.0
    mean = p_a * NU_A + (1 - p_a) * NU_B
    peak, width = _peak_and_fwhm(_mcconnell_absorption(k_ab, p_a, w), mean - 10.0, mean + 10.0)
    assert peak == pytest.approx(mean, abs=1e-3)
    assert width - w == pytest.approx(fast_exchange_excess_width(DNU, k_ab, p_a), rel=1e-3)


def test_random_model_is_well_formed():
    # The generator promised to the engine comparisons: symmetric couplings with zero diagonal,
    # ranges as documented, a bijective permutation per exchange, non-identity when mutual.
    states, exchanges = random_model(np.random.default_rng(7), 4, 1)
    couplings = states[0]["couplings_hz"]
    np.testing.assert_array_equal(couplings, couplings.T)
    assert np.all(np.diag(couplings) == 0) and np.all(np.abs(couplings) <= 20.0)
    assert sorted(exchanges[0]["permutation"]) == [0, 1, 2, 3]
    assert exchanges[0]["permutation"] != [0, 1, 2, 3]
    assert 0.1 <= exchanges[0]["rate"] <= 1e4
