"""The lineshape engine against closed forms, textbook spectra and an independent QuTiP reference.

Sources are named beside each check.  Synthetic comparisons use `tests/closed_forms.py` (published
formulas) and `tests/reference_qutip.py` (QuTiP, full Liouville space, Lindblad jump operators), both
independent of dnmr's engine.
"""
from __future__ import annotations

import numpy as np
import pytest
from closed_forms import (
    a2_energy_levels,
    ab_quartet,
    fast_exchange_excess_width,
    gutowsky_holm_rate,
    kurland_rubin_wise_rate,
    mcconnell_two_site,
    shanan_atidi_bar_eli_rates,
)
from reference_qutip import jumps_with_reverse, qutip_spectrum, random_model

import dnmr
from dnmr.engine import blocks, resolvent
from dnmr.engine.liouville import coherence_blocks, hamiltonian

SF = 400.0  # MHz


def two_site(k, p_a=0.5, w_a=1.0, w_b=1.0, d_a=3.00, d_b=3.25, window=(2.5, 3.8), points=4096):
    states = [dnmr.State("a", {"H": d_a}, linewidth_hz=w_a, population=p_a),
              dnmr.State("b", {"H": d_b}, linewidth_hz=w_b, population=1 - p_a)]
    return dnmr.Model(dnmr.Spectrometer(SF), states, [dnmr.Exchange("a", "b", rate_per_s=k)],
                      window_ppm=window, points=points)


def ab_model(k, dnu_hz, J, width=1.0, points=8192):
    centre = 3.0
    shifts = {"Ha": centre - dnu_hz / 2 / SF, "Hb": centre + dnu_hz / 2 / SF}
    state = dnmr.State("s", shifts, {"Ha-Hb": J}, linewidth_hz=width, population=1)
    return dnmr.Model(dnmr.Spectrometer(SF), [state],
                      [dnmr.Exchange("s", "s", {"Ha": "Hb", "Hb": "Ha"}, rate_per_s=k)],
                      window_ppm=(centre - 0.6, centre + 0.6), points=points)


def relative_error(a, b):
    return np.abs(a - b).max() / np.abs(b).max()


# --- two-site exchange: McConnell, J. Chem. Phys. 28, 430 (1958) ------------------------------------

RATES = [1e-3, 1e-1, 1.0, 10.0, 100.0, np.pi * 100 / np.sqrt(2), np.pi * 100, 1e3, 1e4, 1e5, 1e6, 1e7]


@pytest.mark.parametrize("k", RATES)
@pytest.mark.parametrize("p_a, w_a, w_b", [(0.5, 1.0, 1.0), (0.5, 0.7, 2.0), (0.72, 1.0, 1.0), (0.9, 1.5, 0.8)])
def test_two_site_matches_mcconnell(k, p_a, w_a, w_b):
    model = two_site(k, p_a, w_a, w_b)
    spec = dnmr.simulate(model)
    ref = mcconnell_two_site(spec.hz, 3.00 * SF, 3.25 * SF, k, p_a, w_a, w_b)
    assert relative_error(spec.intensity, ref.real) < 1e-8
    assert relative_error(spec.dispersion, -ref.imag) < 1e-8


@pytest.mark.parametrize("relative", [0.0, 1e-12, 1e-9, 1e-6, 1e-4, -1e-9, -1e-6])
def test_defective_point_stays_exact(relative):
    """Equal populations and widths: the Liouvillian has a double eigenvalue at k = pi dnu (PHYSICS.md);
    McConnell's 2x2 solve per frequency is the reference."""
    k = np.pi * 100.0 * (1 + relative)  # dnu = 0.25 ppm x 400 MHz = 100 Hz
    spec = dnmr.simulate(two_site(k))
    ref = mcconnell_two_site(spec.hz, 3.00 * SF, 3.25 * SF, k, 0.5, 1.0, 1.0)
    assert relative_error(spec.intensity, ref.real) < 1e-9


def test_exactly_defective_block_takes_the_schur_route():
    terms = blocks.lineshape_terms(two_site(np.pi * 100.0))
    assert len(terms.direct) == 1 and isinstance(terms.direct[0], resolvent.SchurBlock) and len(terms.poles) == 0


def test_schur_and_eigen_routes_agree_on_a_coupled_block():
    model = ab_model(55.0, 30.0, 8.0)
    params = blocks.SpinParameters.from_model(model)
    hz = np.linspace(1100, 1300, 500)
    for block in coherence_blocks(2):
        pattern = blocks.block_pattern(block, params.topology)
        L = blocks.block_liouvillian(pattern, params)
        start = blocks.block_start(pattern, params.populations)
        lam, amp = resolvent.eigen_lines(L, pattern.detect, start)
        eig_route = resolvent.LineshapeTerms(lam, amp).evaluate(hz)
        schur_route = resolvent.schur_block(L, pattern.detect, start).evaluate(2 * np.pi * hz)
        assert relative_error(eig_route, schur_route) < 1e-10


# --- coalescence closed forms (narrow intrinsic lines) ------------------------------------------------

def centre_curvature(model, centre_ppm, step_ppm=1e-4):
    y = dnmr.simulate(model, np.array([centre_ppm - step_ppm, centre_ppm, centre_ppm + step_ppm])).intensity
    return y[0] - 2 * y[1] + y[2]


def test_gutowsky_holm_coalescence():
    """k_c = pi dnu / sqrt(2): Gutowsky & Holm, J. Chem. Phys. 25, 1228 (1956)."""
    kc = gutowsky_holm_rate(100.0)
    below = two_site(kc * 0.995, w_a=1e-3, w_b=1e-3)
    above = two_site(kc * 1.005, w_a=1e-3, w_b=1e-3)
    assert centre_curvature(below, 3.125) > 0  # a dip between two maxima
    assert centre_curvature(above, 3.125) < 0  # one maximum


@pytest.mark.parametrize("p_a", [0.6, 0.75])
def test_shanan_atidi_bar_eli_coalescence(p_a):
    """Unequal populations: Shanan-Atidi & Bar-Eli, J. Phys. Chem. 74, 961 (1970)."""
    k_ab, _ = shanan_atidi_bar_eli_rates(2 * p_a - 1, 100.0)
    counts = []
    for f in (0.99, 1.01):
        spec = dnmr.simulate(two_site(k_ab * f, p_a, 1e-3, 1e-3, points=20001))
        counts.append(len(spec.maxima_ppm(prominence=1e-9)))
    assert counts == [2, 1]


def test_kurland_rubin_wise_coalescence_of_an_ab_pair():
    """AB mutual exchange: k_c = (pi/sqrt 2) sqrt(dnu^2 + 6 J^2), Kurland, Rubin & Wise,
    J. Chem. Phys. 40, 2426 (1964); the centre turns from a minimum to a maximum."""
    dnu, J = 40.0, 6.0
    kc = kurland_rubin_wise_rate(dnu, J)
    assert centre_curvature(ab_model(kc * 0.99, dnu, J, width=1e-3), 3.0) > 0
    assert centre_curvature(ab_model(kc * 1.01, dnu, J, width=1e-3), 3.0) < 0


# --- slow and fast limits: standard limits of the McConnell equations --------------------------------

def half_height_width_hz(spec, lo_ppm, hi_ppm):
    inside = (spec.ppm >= lo_ppm) & (spec.ppm <= hi_ppm)
    x, y = spec.hz[inside], spec.intensity[inside]
    top = y.argmax()
    half = y[top] / 2
    left = np.interp(half, y[: top + 1], x[: top + 1])
    right = np.interp(-half, -y[top:], x[top:])
    return right - left


def test_slow_exchange_broadening():
    """Each line broadens by k_out / pi (FWHM, Hz) in slow exchange (common practice, PHYSICS.md)."""
    k_ab, p_a, w = 2.0, 0.7, 1.0  # k << 2 pi dnu = 628 s^-1, where the first-order limit holds
    k_ba = k_ab * p_a / (1 - p_a)
    spec = dnmr.simulate(two_site(k_ab, p_a, w, w, window=(2.9, 3.35), points=2**17))
    assert half_height_width_hz(spec, 2.95, 3.05) == pytest.approx(w + k_ab / np.pi, rel=2e-3)
    assert half_height_width_hz(spec, 3.20, 3.30) == pytest.approx(w + k_ba / np.pi, rel=2e-3)


def test_fast_exchange_single_averaged_line():
    """One line at the population-weighted shift; excess FWHM p_a p_b (2 pi dnu)^2 / (pi (k_ab + k_ba))."""
    k_ab, p_a, w = 2e5, 0.7, 1.0
    k_ba = k_ab * p_a / (1 - p_a)
    spec = dnmr.simulate(two_site(k_ab, p_a, w, w, window=(3.0, 3.2), points=2**17))
    assert spec.maxima_ppm().tolist() == pytest.approx([0.7 * 3.00 + 0.3 * 3.25], abs=1e-5)
    excess = fast_exchange_excess_width(100.0, k_ab, p_a)
    assert half_height_width_hz(spec, 3.0, 3.2) - w == pytest.approx(excess, rel=2e-2)


# --- static spin systems -----------------------------------------------------------------------------

@pytest.mark.parametrize("dnu, J", [(30.0, 8.0), (12.0, -15.0), (80.0, 3.0)])
def test_static_ab_quartet(dnu, J):
    """AB quartet: lines at centre +/- J/2 +/- D/2, D = sqrt(dnu^2 + J^2), inner/outer intensity
    (1 + J/D)/(1 - J/D): Pople, Schneider & Bernstein, High-resolution NMR (1959)."""
    terms = blocks.lineshape_terms(ab_model(0.0, dnu, J))
    strong = np.abs(terms.amplitudes) > 1e-9
    got = sorted(zip(terms.line_frequencies_hz[strong], terms.amplitudes[strong].real / 2))
    positions, intensities = ab_quartet(3.0 * SF - dnu / 2, 3.0 * SF + dnu / 2, J)
    want = sorted(zip(positions, intensities))
    assert np.allclose([g[0] for g in got], [w[0] for w in want], atol=1e-9)
    assert np.allclose([g[1] for g in got], [w[1] for w in want], atol=1e-12)


@pytest.mark.parametrize("J", [0.0, 7.0, -12.0, 150.0])
def test_a2_gives_one_line_whatever_j(J):
    """Two equivalent coupled spins: one line at their shift; triplet levels +J/4, singlet -3J/4;
    singlet-triplet transitions forbidden (textbook result, PHYSICS.md)."""
    state = dnmr.State("s", {"H1": 2.0, "H2": 2.0}, {"H1-H2": J}, linewidth_hz=0.8, population=1)
    model = dnmr.Model(dnmr.Spectrometer(SF), [state])
    terms = blocks.lineshape_terms(model)
    visible = np.abs(terms.amplitudes) > 1e-12
    assert np.allclose(terms.line_frequencies_hz[visible], 2.0 * SF, atol=1e-9)
    assert terms.amplitudes[visible].real.sum() / 2 == pytest.approx(2.0, abs=1e-12)
    nu = 2.0 * SF
    levels = np.linalg.eigvalsh(hamiltonian([nu, nu], [J]))
    assert np.allclose(levels, a2_energy_levels(nu, J), atol=1e-9)
    assert np.allclose(np.linalg.eigvalsh(hamiltonian([0.0, 0.0], [J])), sorted([J / 4] * 3 + [-3 * J / 4]))


# --- independent reference: QuTiP Lindblad dissipators (PHYSICS.md) ----------------------------------

def model_from_reference(states, exchanges):
    """The reference's dict model written as a dnmr Model (shifts given in ppm at SF)."""
    n = len(states[0]["shifts_hz"])
    names = [f"S{i}" for i in range(n)]
    dnmr_states = []
    for c, st in enumerate(states):
        J = np.asarray(st["couplings_hz"])
        couplings = {f"{names[i]}-{names[j]}": float(J[i, j]) for i in range(n) for j in range(i + 1, n)}
        shifts = {names[i]: st["shifts_hz"][i] / SF for i in range(n)}
        dnmr_states.append(dnmr.State(f"c{c}", shifts, couplings, linewidth_hz=st["linewidth_hz"],
                                      population=st["population"]))
    dnmr_exchanges = [
        dnmr.Exchange(f"c{e['source']}", f"c{e['target']}",
                      {names[i]: names[j] for i, j in enumerate(e["permutation"])}, rate_per_s=e["rate"])
        for e in exchanges
    ]
    return dnmr.Model(dnmr.Spectrometer(SF), dnmr_states, dnmr_exchanges)


def probe_frequencies(states, count):
    """Frequencies around and between the lines (avoiding exactly 0 Hz)."""
    shifts = np.concatenate([s["shifts_hz"] for s in states])
    lo, hi = shifts.min() - 60.0, shifts.max() + 60.0
    return np.linspace(lo, hi, count) + 0.123


@pytest.mark.parametrize("seed, n_spins, n_states", [
    (1, 2, 1), (2, 2, 2), (3, 3, 1), (4, 3, 2), (5, 2, 3), (6, 4, 1), (7, 3, 3), (8, 4, 2),
])
def test_random_models_match_qutip(seed, n_spins, n_states):
    states, exchanges = random_model(np.random.default_rng(seed), n_spins, n_states)
    hz = probe_frequencies(states, 160)
    ref = qutip_spectrum(hz, states, jumps_with_reverse(states, exchanges))
    got = blocks.lineshape_terms(model_from_reference(states, exchanges)).evaluate(hz)
    assert relative_error(got, ref) < 1e-8


def test_three_cycle_implies_inverse_permutation():
    """A mutual 3-cycle at rate k also runs backwards at k (CONTRACT.md section 1), checked with QuTiP."""
    rng = np.random.default_rng(11)
    states, _ = random_model(rng, 3, 1)
    exchanges = [{"source": 0, "target": 0, "permutation": [1, 2, 0], "rate": 35.0}]
    jumps = jumps_with_reverse(states, exchanges)
    assert len(jumps) == 2
    hz = probe_frequencies(states, 120)
    ref = qutip_spectrum(hz, states, jumps)
    got = blocks.lineshape_terms(model_from_reference(states, exchanges)).evaluate(hz)
    assert relative_error(got, ref) < 1e-8


def test_listed_reverse_is_used_once():
    """Listing the reverse explicitly (with the detailed-balance rate) changes nothing."""
    base = two_site(80.0, 0.7)
    k_ba = 80.0 * 0.7 / 0.3
    both = base.replace(exchanges=base.exchanges + (dnmr.Exchange("b", "a", rate_per_s=k_ba),))
    assert relative_error(dnmr.simulate(both).intensity, dnmr.simulate(base).intensity) < 1e-12


def test_listed_reverse_that_breaks_detailed_balance_is_refused():
    base = two_site(80.0, 0.7)
    with pytest.raises(dnmr.InputError, match="detailed balance"):
        base.replace(exchanges=base.exchanges + (dnmr.Exchange("b", "a", rate_per_s=80.0),))


# --- the Krylov route for large blocks ---------------------------------------------------------------

@pytest.fixture
def krylov_everywhere(monkeypatch):
    """Send every block through the Krylov (Lanczos continued-fraction) route."""
    monkeypatch.setattr(resolvent, "KRYLOV_MIN_SIZE", 1)


@pytest.mark.parametrize("seed, n_spins, n_states", [(21, 2, 2), (22, 3, 1), (23, 3, 2), (24, 4, 1), (25, 2, 3)])
def test_krylov_route_matches_qutip(krylov_everywhere, seed, n_spins, n_states):
    states, exchanges = random_model(np.random.default_rng(seed), n_spins, n_states)
    hz = probe_frequencies(states, 160)
    ref = qutip_spectrum(hz, states, jumps_with_reverse(states, exchanges))
    terms = blocks.lineshape_terms(model_from_reference(states, exchanges))
    assert terms.direct and all(isinstance(b, resolvent.ContinuedFraction) for b in terms.direct)
    assert relative_error(terms.evaluate(hz), ref) < 1e-8


@pytest.mark.parametrize("k", [np.pi * 100.0, 1e-3, 1e7])
def test_krylov_route_at_the_defective_point_and_the_limits(krylov_everywhere, k):
    """McConnell (1958) again, now through the continued fraction, including k = pi dnu."""
    spec = dnmr.simulate(two_site(k))
    ref = mcconnell_two_site(spec.hz, 3.00 * SF, 3.25 * SF, k, 0.5, 1.0, 1.0)
    assert relative_error(spec.intensity, ref.real) < 1e-8


def test_krylov_and_eigen_routes_agree_on_six_coupled_spins(monkeypatch):
    """Two exact routes through different arithmetic must give the same 6-spin spectrum."""
    names = [f"H{i}" for i in range(6)]
    rng = np.random.default_rng(5)
    shifts = {n: float(v) for n, v in zip(names, rng.uniform(1.0, 2.2, 6))}
    couplings = {f"{a}-{b}": float(rng.uniform(-15, 15)) for i, a in enumerate(names) for b in names[i + 1:]}
    state = dnmr.State("s", shifts, couplings, linewidth_hz=1.3, population=1)
    flip = dict(zip(names, reversed(names)))
    model = dnmr.Model(dnmr.Spectrometer(SF), [state], [dnmr.Exchange("s", "s", flip, rate_per_s=25.0)])
    hz = np.linspace(0.8 * SF, 2.4 * SF, 3000)
    krylov = blocks.lineshape_terms(model)
    assert any(isinstance(b, resolvent.ContinuedFraction) for b in krylov.direct)
    monkeypatch.setattr(resolvent, "KRYLOV_MIN_SIZE", 10**9)
    eigen = blocks.lineshape_terms(model)
    assert not eigen.direct
    assert relative_error(krylov.evaluate(hz), eigen.evaluate(hz)) < 1e-9


def banded_reference(fraction: resolvent.ContinuedFraction, omega: np.ndarray) -> np.ndarray:
    """norm e1 (i omega - T)^-1 e1 by LAPACK's banded solver with partial pivoting, point by point."""
    import scipy.linalg as sla
    m = len(fraction.alpha)
    bands = np.zeros((3, m), dtype=complex)
    bands[0, 1:] = bands[2, :-1] = -fraction.beta
    out = []
    for w in omega:
        bands[1] = 1j * w - fraction.alpha
        out.append(sla.solve_banded((1, 1), bands, np.eye(m, 1).ravel().astype(complex))[0])
    return fraction.norm * np.array(out)


def test_continued_fraction_through_vanishing_pivots_and_huge_growth(monkeypatch):
    """The division-free recurrence against pivoted LAPACK solves (gbsv) on a tridiagonal built to be hard:
    trailing determinants that vanish exactly on grid points (where an unpivoted continued fraction
    divides by zero) and entries of 1e6 rad/s over 600 levels (whose determinants overflow unless rescaled)."""
    fallbacks = []
    monkeypatch.setattr(resolvent.ContinuedFraction, "_pivoted", lambda self, z: fallbacks.append(z) or np.nan)
    rng = np.random.default_rng(41)
    omega = np.linspace(-2000.0, 2000.0, 801)
    alpha = -rng.uniform(1.0, 30.0, 40) + 1j * rng.choice(omega, 40)
    alpha[-1] = 1j * omega[400]             # q_m = 0 at that point
    alpha[-3] = 1j * omega[123]
    alpha[-3::] = alpha[-3::].imag * 1j     # undamped, so the zero pivots fall on grid points
    beta = rng.uniform(50.0, 400.0, 39) * np.exp(0.3j * rng.standard_normal(39))
    hard = resolvent.ContinuedFraction(alpha, beta, 2.5)
    assert relative_error(hard.evaluate(omega), banded_reference(hard, omega)) < 1e-12
    assert not fallbacks  # no point needed the pivoted solve
    big = resolvent.ContinuedFraction(-rng.uniform(1e3, 1e5, 600) + 1j * rng.uniform(-1e6, 1e6, 600),
                                      rng.uniform(1e5, 1e6, 599) * np.exp(0.2j * rng.standard_normal(599)), 1.0)
    wide = np.linspace(-1.2e6, 1.2e6, 301)
    assert relative_error(big.evaluate(wide), banded_reference(big, wide)) < 1e-11
    assert not fallbacks


def test_sparse_and_dense_block_liouvillians_are_the_same():
    """The Krylov route builds its Liouvillian sparse; element for element it is the dense one."""
    states, exchanges = random_model(np.random.default_rng(31), 3, 2)
    params = blocks.SpinParameters.from_model(model_from_reference(states, exchanges))
    for block in coherence_blocks(3):
        pattern = blocks.block_pattern(block, params.topology)
        dense = blocks.block_liouvillian(pattern, params)
        assert np.array_equal(blocks.block_liouvillian(pattern, params, as_sparse=True).toarray(), dense)


def test_a_sparse_block_that_the_krylov_route_refuses_goes_the_dense_way(krylov_everywhere):
    """A block handed over sparse (as the engine does for the Krylov route) but refused by it (here: a
    state of zero weight, so D^-1 L D does not exist) is evaluated densely, with the same result."""
    states, exchanges = random_model(np.random.default_rng(32), 2, 2)
    params = blocks.SpinParameters.from_model(model_from_reference(states, exchanges))
    pattern = blocks.block_pattern(coherence_blocks(2)[0], params.topology)
    dense = blocks.block_liouvillian(pattern, params)
    start = blocks.block_start(pattern, params.populations)
    weights = np.zeros(len(dense))  # refused by krylov_block
    kind, lines = resolvent.block_terms(blocks.block_liouvillian(pattern, params, as_sparse=True), pattern.detect,
                                        start, weights)
    assert kind == "lines"
    expected = resolvent.eigen_lines(dense, pattern.detect, start)
    hz = np.linspace(-200, 1400, 400)
    assert relative_error(resolvent.LineshapeTerms(*lines).evaluate(hz),
                          resolvent.LineshapeTerms(*expected).evaluate(hz)) < 1e-12


def test_partial_reorthogonalisation_matches_dense_eigendecomposition_on_seven_spins(monkeypatch):
    """Seven coupled spins (blocks of 735 and 1225 coherences): the Lanczos recursion re-orthogonalises
    only now and then, yet agrees with LAPACK's dense eigendecomposition of every block to 1e-8."""
    names = [f"H{i}" for i in range(7)]
    shifts = {n: 1.1 + 0.29 * i + 0.04 * (i % 3) for i, n in enumerate(names)}
    couplings = {f"{a}-{b}": (6.8 if j == i + 1 else -1.6) for i, a in enumerate(names)
                 for j, b in enumerate(names) if 0 < j - i <= 2}
    state = dnmr.State("s", shifts, couplings, linewidth_hz=1.1, population=1)
    flip = dict(zip(names, reversed(names)))
    model = dnmr.Model(dnmr.Spectrometer(SF), [state], [dnmr.Exchange("s", "s", flip, rate_per_s=30.0)])
    hz = np.linspace(0.9 * SF, 3.3 * SF, 4000)
    passes = []
    estimate = resolvent.next_orthogonality
    monkeypatch.setattr(resolvent, "USE_COMPILED", False)  # count the steps of the numpy recursion

    def counted(*args):
        omega = estimate(*args)
        passes.append(np.abs(omega[: args[4] + 1]).max() > resolvent.SEMI_ORTHOGONAL)
        return omega

    monkeypatch.setattr(resolvent, "next_orthogonality", counted)
    krylov = blocks.lineshape_terms(model)
    assert sum(isinstance(b, resolvent.ContinuedFraction) for b in krylov.direct) >= 3
    assert 0 < sum(passes) < 0.5 * len(passes)  # partial: some steps, far from all
    monkeypatch.setattr(resolvent, "KRYLOV_MIN_SIZE", 10**9)
    eigen = blocks.lineshape_terms(model)
    assert not eigen.direct
    assert relative_error(krylov.evaluate(hz), eigen.evaluate(hz)) < 1e-8


def test_a_model_too_large_for_memory_is_refused_in_one_line(monkeypatch, tmp_path):
    """Ten coupled spins-1/2 have a block of C(10,5) C(10,4) = 52920 coherences: 16 n^2 bytes of Lanczos
    basis (42 GiB) is refused before any work on a machine with less than twice that, with one line and
    exit status 2 from the command line."""
    from click.testing import CliRunner

    from dnmr.cli import cli

    assert resolvent.krylov_basis_bytes(52920) == 16 * 52920**2
    monkeypatch.setattr(blocks, "physical_memory_bytes", lambda: 64 * 2**30)
    names = [f"H{i}" for i in range(10)]
    state = dnmr.State("s", {n: 1.0 + 0.3 * i for i, n in enumerate(names)},
                       {f"{a}-{b}": 7.0 for a, b in zip(names, names[1:])}, linewidth_hz=1.0, population=1)
    model = dnmr.Model(dnmr.Spectrometer(SF), [state], [dnmr.Exchange("s", "s", {"H0": "H9", "H9": "H0"}, rate_per_s=5.0)])
    with pytest.raises(dnmr.InputError, match=r"block of 52920 coherences.*41\.7 GiB.*\[groups\]"):
        dnmr.simulate(model)
    path = tmp_path / "ten.toml"
    shifts = ", ".join(f"{n} = {1.0 + 0.3 * i}" for i, n in enumerate(names))
    couplings = ", ".join(f'"{a}-{b}" = 7.0' for a, b in zip(names, names[1:]))
    path.write_text(f'[spectrometer]\nnucleus = "1H"\nfrequency_mhz = 400.0\n[[state]]\nname = "s"\npopulation = 1\n'
                    f'linewidth_hz = 1.0\nshifts_ppm = {{ {shifts} }}\ncouplings_hz = {{ {couplings} }}\n')
    monkeypatch.setattr(blocks, "physical_memory_bytes", lambda: 2**30)
    result = CliRunner().invoke(cli, ["simulate", str(path), "-o", str(tmp_path / "out.csv")])
    assert result.exit_code == 2 and result.stderr.strip().count("\n") == 0
    assert "Lanczos basis needs" in result.stderr and "Traceback" not in result.output


def test_progress_reports_every_coherence_once():
    """The progress callback (for long simulations) ends at the total number of coherences,
    C(2N, N-1) per state for N spins-1/2 (PHYSICS.md: 792 for six spins)."""
    calls = []
    names = [f"H{i}" for i in range(6)]
    chain = {f"{a}-{b}": 7.0 for a, b in zip(names, names[1:])}  # coupled: one system, not six
    state = dnmr.State("s", {n: 1.0 + 0.3 * i for i, n in enumerate(names)}, chain, linewidth_hz=1.0, population=1)
    blocks.lineshape_terms(dnmr.Model(dnmr.Spectrometer(SF), [state]), progress=lambda d, t: calls.append((d, t)))
    assert calls[-1] == (792, 792) and [d for d, _ in calls] == sorted(d for d, _ in calls)
