"""The compiled loops of the Krylov route (dnmr.engine.kernels, optional numba) against the numpy loops, which are
the reference, and against LAPACK.

The numpy path is what a user without numba runs; it is checked against QuTiP, McConnell and LAPACK in
test_engine.py.  Here the compiled path must give the same spectra to 1e-10, and numba must stay out of
every process that does not take the Krylov route.
"""
from __future__ import annotations

import functools
import importlib.util
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import sparse
from scipy.sparse.linalg import spsolve
from test_engine import banded_reference  # LAPACK's pivoted banded solver, point by point

import dnmr
from dnmr.engine import blocks, resolvent
from dnmr.engine.spinsystems import spin_systems

SF = 400.0  # MHz


def relative_error(a, b):
    return np.abs(a - b).max() / np.abs(b).max()


@pytest.fixture
def compiled():
    """Skip without numba (an optional extra); otherwise the compiled kernels."""
    pytest.importorskip("numba", reason="numba is an optional extra (pip install '.[fast]')")
    kernels = resolvent.compiled_kernels()
    assert kernels is not None
    return kernels


def chain_model(n_spins: int, seed: int, *, states: int = 1) -> dnmr.Model:
    """A coupled chain whose ends swap (one state), or which also moves to a second, less populated
    state (two states: unequal populations, so the symmetrising weights differ)."""
    rng = np.random.default_rng(seed)
    names = [f"H{i}" for i in range(n_spins)]
    couplings = {f"{a}-{b}": float(rng.uniform(-12, 12)) for i, a in enumerate(names) for b in names[i + 1:i + 3]}
    flip = dict(zip(names, reversed(names)))
    if states == 1:
        shifts = {n: float(v) for n, v in zip(names, rng.uniform(1.0, 2.4, n_spins))}
        state = dnmr.State("s", shifts, couplings, linewidth_hz=1.2, population=1)
        return dnmr.Model(dnmr.Spectrometer(SF), [state], [dnmr.Exchange("s", "s", flip, rate_per_s=35.0)])
    one = dnmr.State("a", {n: float(v) for n, v in zip(names, rng.uniform(1.0, 2.4, n_spins))}, couplings,
                     linewidth_hz=1.0, population=0.7)
    two = dnmr.State("b", {n: float(v) for n, v in zip(names, rng.uniform(1.0, 2.4, n_spins))}, couplings,
                     linewidth_hz=1.6, population=0.3)
    return dnmr.Model(dnmr.Spectrometer(SF), [one, two], [dnmr.Exchange("a", "b", rate_per_s=60.0)])


@pytest.mark.parametrize("n_spins, states", [(6, 1), (5, 2)])
def test_compiled_and_numpy_krylov_routes_give_the_same_spectrum(compiled, monkeypatch, n_spins, states):
    """Six spins (blocks of 300 and 90) and five spins in two states (blocks of 100 and 200, weights
    from unequal populations): the compiled route equals the numpy route to 1e-10, and both equal LAPACK's
    dense eigendecomposition of every block (zgeev) to 1e-10 (measured: about 5e-12)."""
    model = chain_model(n_spins, seed=3 + n_spins, states=states)
    hz = np.linspace(0.6 * SF, 2.8 * SF, 6000)
    fast = blocks.lineshape_terms(model)
    assert fast.direct and all(isinstance(b, resolvent.ContinuedFraction) for b in fast.direct)
    monkeypatch.setattr(resolvent, "USE_COMPILED", False)
    reference = blocks.lineshape_terms(model)
    assert relative_error(fast.evaluate(hz), reference.evaluate(hz)) < 1e-10
    monkeypatch.setattr(resolvent, "KRYLOV_MIN_SIZE", 10**9)
    dense = blocks.lineshape_terms(model)
    assert not dense.direct
    assert relative_error(fast.evaluate(hz), dense.evaluate(hz)) < 1e-10
    assert relative_error(reference.evaluate(hz), dense.evaluate(hz)) < 1e-10


def test_compiled_lanczos_keeps_the_tridiagonal_of_the_numpy_recursion(compiled, monkeypatch):
    """Step for step the same recursion: the moments g^T S^k g = (g^T g) (T^k)_11 of the two tridiagonals
    agree for k up to 12 (relative to ||S||^k), and each is the Krylov projection of the block."""
    model = chain_model(5, seed=11)
    captured = []
    recursion = resolvent.lanczos
    monkeypatch.setattr(resolvent, "lanczos",
                        lambda S, g, omega=None: captured.append((S, g)) or recursion(S, g, omega))
    blocks.lineshape_terms(model)
    S, g = max(captured, key=lambda c: len(c[1]))
    a_fast, b_fast = recursion(S, g)
    monkeypatch.setattr(resolvent, "USE_COMPILED", False)
    a_ref, b_ref = recursion(S, g)
    assert len(a_fast) == len(a_ref) == len(g)
    size = float(abs(S).sum(axis=1).max())
    x = g / np.sqrt(g @ g)
    for k in range(1, 13):
        moment = moment_of(S, x, k)
        for alpha, beta in ((a_fast, b_fast), (a_ref, b_ref)):
            T = np.diag(alpha) + np.diag(beta, 1) + np.diag(beta, -1)
            assert abs(np.linalg.matrix_power(T, k)[0, 0] - moment) < 1e-12 * size**k


def moment_of(S, x, k):
    y = x
    for _ in range(k):
        y = S @ y
    return x @ y


def test_compiled_continued_fraction_through_huge_growth_and_zero_pivots(compiled, monkeypatch):
    """The compiled recurrence against pivoted LAPACK solves (gbsv) and the numpy recurrence: entries of
    1e6 rad/s over 600 levels (determinants that overflow unless rescaled) and a trailing determinant that
    vanishes exactly on a grid point (handed back as not finite and solved with pivoting)."""
    rng = np.random.default_rng(43)
    big = resolvent.ContinuedFraction(-rng.uniform(1e3, 1e5, 600) + 1j * rng.uniform(-1e6, 1e6, 600),
                                      rng.uniform(1e5, 1e6, 599) * np.exp(0.2j * rng.standard_normal(599)), 1.0)
    wide = np.linspace(-1.2e6, 1.2e6, 301)
    fast = big.evaluate(wide)
    assert relative_error(fast, banded_reference(big, wide)) < 1e-11
    omega = np.linspace(-2000.0, 2000.0, 801)
    alpha = -rng.uniform(1.0, 30.0, 40) + 1j * rng.choice(omega, 40)
    alpha[-1] = 1j * omega[400]  # q_m = 0 there: q_1 / q_2 is fine, but a plain fraction divides by zero
    alpha[0] = 1j * omega[17]
    alpha[:2] = alpha[:2].imag * 1j
    beta = rng.uniform(50.0, 400.0, 39) * np.exp(0.3j * rng.standard_normal(39))
    hard = resolvent.ContinuedFraction(alpha, beta, 2.5)
    hard_fast = hard.evaluate(omega)
    assert relative_error(hard_fast, banded_reference(hard, omega)) < 1e-12
    monkeypatch.setattr(resolvent, "USE_COMPILED", False)
    assert relative_error(fast, big.evaluate(wide)) < 1e-12
    assert relative_error(hard_fast, hard.evaluate(omega)) < 1e-12


def test_without_numba_the_numpy_route_is_taken(monkeypatch):
    """A machine without the optional extra: the import fails quietly and the numpy loops run."""
    monkeypatch.setitem(sys.modules, "numba", None)  # makes `import numba` raise ImportError
    monkeypatch.setitem(sys.modules, "dnmr.engine.kernels", None)
    monkeypatch.setattr(resolvent, "_KERNELS", [])
    assert resolvent.compiled_kernels() is None
    spectrum = dnmr.simulate(chain_model(5, seed=2), points=2048)
    assert spectrum.intensity.max() > 0


def test_a_broken_numba_install_falls_back_to_the_numpy_route_with_a_warning(monkeypatch):
    """numba that imports but fails inside (seen when a script's folder shadows a package numba imports):
    the numpy loops run, and the user is told why the compiled ones are off."""
    import importlib

    real_import = importlib.import_module

    def failing(name, *args):
        if name.endswith(".kernels"):
            raise AttributeError("module 'coverage' has no attribute 'types'")
        return real_import(name, *args)

    monkeypatch.setattr(resolvent.importlib, "import_module", failing)
    monkeypatch.setattr(resolvent, "_KERNELS", [])
    with pytest.warns(RuntimeWarning, match="compiled loops are off"):
        assert resolvent.compiled_kernels() is None
    assert dnmr.simulate(chain_model(5, seed=2), points=2048).intensity.max() > 0


def imported_after(code: str) -> bool:
    """Whether numba is imported after running `code` in a fresh interpreter."""
    probe = code + "\nimport sys; print('numba' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    return out.stdout.split()[-1] == "True"


def test_numba_is_loaded_only_when_a_block_takes_the_krylov_route(compiled):
    """The command line and small systems never load numba (nor compile anything); a large block does."""
    assert not imported_after("import dnmr.cli")
    small = ("import dnmr\nstate = dnmr.State('s', {'A': 2.0, 'B': 2.4}, {'A-B': 7.0}, linewidth_hz=1, population=1)\n"
             "dnmr.simulate(dnmr.Model(dnmr.Spectrometer(400.0), [state], [dnmr.Exchange('s', 's', {'A': 'B', 'B': 'A'},"
             " rate_per_s=5.0)]))")
    assert not imported_after(small)
    large = small.replace("{'A': 2.0, 'B': 2.4}, {'A-B': 7.0}",
                          "{n: 1 + 0.3 * i for i, n in enumerate('ABCDEF')}, {a + '-' + b: 7.0 for a, b in zip('ABCDE', 'BCDEF')}")
    assert imported_after(large)


def test_paired_projection_finds_both_shares_in_one_pass():
    """The re-orthogonalisation's pass (numpy, and compiled where numba is installed) against plain matrix
    products (numpy's matmul): the projection of w on all basis rows, and the next step's share
    sum_k q_k (q_k^T q_last) over the rows before the last; slices of a few rows, so that the last row
    falls inside a slice."""
    rng = np.random.default_rng(5)
    basis = rng.standard_normal((37, 2048)) + 1j * rng.standard_normal((37, 2048))  # slices of 16 rows
    w = rng.standard_normal(2048) + 1j * rng.standard_normal(2048)
    projection = (basis @ w) @ basis
    share = (basis[:-1] @ basis[-1]) @ basis[:-1]
    out, carry = resolvent.project_pair(basis, w)
    assert relative_error(out, projection) < 1e-13
    assert relative_error(carry, share) < 1e-13
    if resolvent.compiled_kernels() is not None:
        kept, carried = w.copy(), np.zeros_like(w)
        resolvent.compiled_kernels().project_pair(basis, len(basis), kept, carried, 16)
        assert relative_error(kept, w - projection) < 1e-13
        assert relative_error(carried, share) < 1e-13


def weakly_coupled_chain() -> dnmr.Model:
    """Six spins 1 ppm apart with 7 Hz couplings between neighbours (nearly first order, so many lines of
    each block coincide and the Lanczos recursion converges on the grid well before its last step)."""
    names = [f"H{i}" for i in range(6)]
    state = dnmr.State("s", {n: 1.0 + i for i, n in enumerate(names)},
                       {f"{a}-{b}": 7.0 for a, b in zip(names, names[1:])}, linewidth_hz=1.0, population=1)
    flip = dict(zip(names, reversed(names)))
    return dnmr.Model(dnmr.Spectrometer(SF), [state], [dnmr.Exchange("s", "s", flip, rate_per_s=30.0)], points=8192)


@pytest.mark.parametrize("loops", ["numpy", "compiled"])
def test_a_recursion_stopped_on_convergence_is_exact_on_the_grid(monkeypatch, loops):
    """Blocks of 300 coherences watched on the simulation's grid (the size at which watching starts lowered
    from 1500 to 80): their recursions stop early, and absorption and dispersion still equal LAPACK's dense
    eigendecomposition of every block (zgeev) to 1e-10 with both loops (measured: 5e-13 and 1.3e-12, as
    without the watch: stopping after 224 of 300 steps adds nothing measurable)."""
    if loops == "compiled":
        pytest.importorskip("numba", reason="numba is an optional extra (pip install '.[fast]')")
    monkeypatch.setattr(resolvent, "USE_COMPILED", loops == "compiled")
    monkeypatch.setattr(resolvent, "EARLY_STOP_MIN_SIZE", 80)
    model = weakly_coupled_chain()
    watched = dnmr.simulate(model)
    assert any("of 300 (converged on the grid)" in route for route in watched.terms.routes)
    monkeypatch.setattr(resolvent, "KRYLOV_MIN_SIZE", 10**9)
    dense = dnmr.simulate(model)
    assert not dense.terms.direct
    assert relative_error(watched.intensity, dense.intensity) < 1e-10
    assert relative_error(watched.dispersion, dense.dispersion) < 1e-10


def benchmark_chain(n_spins: int) -> dnmr.Model:
    """The seven-spin chain of benchmarks/engine_speed.py (an invented ring flip)."""
    spec = importlib.util.spec_from_file_location("engine_speed", Path(__file__).parents[1] / "benchmarks" / "engine_speed.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module.six_spin_model(n_spins)


@pytest.mark.parametrize("loops", ["numpy", "compiled"])
def test_a_near_breakdown_of_the_lanczos_recursion_stays_exact(monkeypatch, loops):
    """A block of 735 of the seven-spin benchmark chain, where one Lanczos vector reaches a squared length of
    109 (a near-breakdown of the bilinear form): against numpy.linalg.eig (LAPACK zgeev) on the whole grid and
    scipy.sparse.linalg.spsolve at its worst points, to 1e-10 of the block's peak.  Before the basis was
    re-orthogonalised at such steps the compiled route was off by 4e-7 (numpy: 7e-12, by luck of rounding);
    measured after: 9e-12 compiled, 8e-12 numpy; with the estimate's rounding term scaled by the vectors' lengths,
    2.5e-12 and 3.2e-12."""
    if loops == "compiled":
        pytest.importorskip("numba", reason="numba is an optional extra (pip install '.[fast]')")
    monkeypatch.setattr(resolvent, "USE_COMPILED", loops == "compiled")
    model = benchmark_chain(7)
    (params,) = spin_systems(model)
    pattern = blocks.block_pattern(params.blocks[2], params.topology)
    assert pattern.detect.size == 735
    L = blocks.block_liouvillian(pattern, params, as_sparse=True)
    start = blocks.block_start(pattern, params.populations)
    omega = 2 * np.pi * SF * blocks.frequency_grid_ppm(model)
    fraction = resolvent.krylov_block(L, pattern.detect, start, np.ones(735), omega)
    assert fraction is not None
    krylov = fraction.evaluate(omega)
    lam, V = np.linalg.eig(L.toarray())
    amplitudes = (pattern.detect @ V) * np.linalg.solve(V, start)
    dense = (amplitudes[None, :] / (1j * omega[:, None] - lam[None, :])).sum(axis=1)
    assert relative_error(krylov, dense) < 1e-10
    worst = np.argsort(np.abs(krylov - dense))[-3:]
    identity = sparse.identity(735, format="csc")
    solved = np.array([pattern.detect @ spsolve(1j * omega[k] * identity - L.tocsc(), start) for k in worst])
    assert np.abs(krylov[worst] - solved).max() < 1e-10 * np.abs(dense).max()



@functools.lru_cache(maxsize=None)
def seven_spin_block(index: int):
    """Block `index` of the seven-spin benchmark chain: its grid (rad/s), Liouvillian, detection vector, the
    share with start = share x detect, and numpy.linalg.eig's eigenvalues, eigenvectors and their inverse."""
    model = benchmark_chain(7)
    (params,) = spin_systems(model)
    pattern = blocks.block_pattern(params.blocks[index], params.topology)
    L = blocks.block_liouvillian(pattern, params, as_sparse=True)
    start = blocks.block_start(pattern, params.populations)
    lam, V = np.linalg.eig(L.toarray())
    omega = 2 * np.pi * SF * blocks.frequency_grid_ppm(model)
    return omega, L, pattern.detect, (pattern.detect @ start) / (pattern.detect @ pattern.detect), lam, V, np.linalg.inv(V)


@pytest.mark.parametrize("loops", ["numpy", "compiled"])
def test_the_recursion_stays_exact_when_its_start_moves_by_rounding_error(monkeypatch, loops):
    """Both blocks of 735 of the seven-spin benchmark chain, each with its start vector moved four times by
    random relative amounts of 2e-16 (rounding error, which moves the spectrum by about as much): every
    spectrum equals numpy.linalg.eig's (LAPACK zgeev) to 1e-10 of the block's peak.  While the orthogonality
    estimate took every Lanczos vector as of unit length, one start in six or eight of each block was off by
    4e-7 to 3e-5 with either loop (the vectors reach squared lengths of 100 to 200 there); with the estimate's
    rounding term scaled by the lengths, measured: at most 2.1e-11 over 32 starts."""
    if loops == "compiled":
        pytest.importorskip("numba", reason="numba is an optional extra (pip install '.[fast]')")
    monkeypatch.setattr(resolvent, "USE_COMPILED", loops == "compiled")
    rng = np.random.default_rng(2)
    for index in (2, 4):
        omega, L, detect, share, lam, V, V_inv = seven_spin_block(index)
        assert detect.size == 735
        for _ in range(4):
            moved = detect * (1 + 2e-16 * rng.standard_normal(735))
            fraction = resolvent.krylov_block(L, moved, share * moved, np.ones(735), omega)
            amplitudes = (moved @ V) * (V_inv @ (share * moved))
            dense = (amplitudes[None, :] / (1j * omega[:, None] - lam[None, :])).sum(axis=1)
            assert relative_error(fraction.evaluate(omega), dense) < 1e-10
