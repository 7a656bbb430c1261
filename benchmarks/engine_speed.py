"""Engine speed, measured as ratios in one run (not a test).

(a) two-site exchange at 8192 points: ``dnmr.simulate`` / a vectorised McConnell closed form on the
    same grid (goal <= 1.0);
(b) six coupled spins with mutual exchange at 8192 points: ``dnmr.simulate`` / dense eigendecomposition
    of the whole, unfactored single-quantum Liouvillian (goal <= 0.02), and the share of that time spent
    only evaluating the reduced blocks on the grid;
(c) time and peak memory (resident, in a fresh process) of a seven-spin simulation (goal <= 0.3 s), with
    its ratio to the six-spin time;
(d) an N,N-dimethyl-type model (two CH3 groups swapped by rotation, coupled to one more spin): the
    model with magnetically equivalent groups / the same model written as seven individual spins
    (goal <= 1/20), and the peak memory of each;
(e) time and peak memory of an eight-spin simulation (goals: <= 10 s, within 24 GB), and the Lanczos steps of
    its blocks that stopped once their continued fraction had converged on the grid.

(b), (c) and (e) are measured twice: with the compiled loops of the Krylov route (``dnmr.engine.kernels``, the
optional extra ``pip install ".[fast]"``) where numba is installed, and with the numpy loops that every
installation has.  All with one BLAS thread (THREADS), so that the ratios compare work.

Run:  python benchmarks/engine_speed.py
"""
from __future__ import annotations

import os
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

HERE = Path(__file__).resolve().parent

import numpy as np
from threadpoolctl import threadpool_limits

import dnmr
from dnmr.engine import resolvent
from dnmr.engine.blocks import block_liouvillian, block_pattern, block_start, lineshape_terms
from dnmr.engine.spinsystems import SpinParameters
from dnmr.engine.liouville import coherence_blocks
from dnmr.engine.resolvent import ContinuedFraction

POINTS = 8192
#: One BLAS thread for everything measured: ratios then compare work, not how many idle cores LAPACK found.
THREADS = 1


def verdict(measured: float, goal: float) -> str:
    """'met' or by what factor a goal of at most `goal` is missed."""
    return "met" if measured <= goal else f"missed by {measured / goal:.1f}x"


def load_text() -> str:
    """The machine's load averages over 1, 5 and 15 minutes (other work on a shared machine)."""
    return "load average " + ", ".join(f"{v:.2f}" for v in os.getloadavg())


def best_times(fns, rounds: int, inner: int) -> list[float]:
    """Best mean CPU time (s) per call of each function, rounds interleaved so both see the same machine
    (CPU time of this process: with one BLAS thread it equals wall time on an idle machine, and other
    work on a shared one does not inflate it)."""
    best = [np.inf] * len(fns)
    for _ in range(rounds):
        for i, fn in enumerate(fns):
            t0 = time.process_time()
            for _ in range(inner):
                fn()
            best[i] = min(best[i], (time.process_time() - t0) / inner)
    return best


def mcconnell(hz, nu_a, nu_b, k_ab, p_a, width_hz):
    """Two-site McConnell lineshape (J. Chem. Phys. 28, 430 (1958)): a 2x2 solve per point, vectorised."""
    p_b = 1.0 - p_a
    k_ba = k_ab * p_a / p_b
    z = 2j * np.pi * hz + np.pi * width_hz
    m_a = z - 2j * np.pi * nu_a + k_ab
    m_b = z - 2j * np.pi * nu_b + k_ba
    return 2.0 * ((m_b + k_ab) * p_a + (m_a + k_ba) * p_b) / (m_a * m_b - k_ab * k_ba)


def two_site_models(rates):
    states = [dnmr.State("major", {"H": 3.10}, linewidth_hz=1.5, population=0.62),
              dnmr.State("minor", {"H": 3.35}, linewidth_hz=1.5, population=0.38)]
    return [dnmr.Model(dnmr.Spectrometer(400.0), states, [dnmr.Exchange("major", "minor", rate_per_s=k)],
                       window_ppm=(2.6, 3.8), points=POINTS) for k in rates]


def bench_two_site() -> float:
    rates = np.geomspace(1.0, 1e4, 64)
    models = two_site_models(rates)
    hz = np.linspace(2.6, 3.8, POINTS) * 400.0
    it = iter(range(10**9))

    def engine():
        dnmr.simulate(models[next(it) % len(models)])

    def closed():
        k = rates[next(it) % len(rates)]
        mcconnell(hz, 3.10 * 400.0, 3.35 * 400.0, k, 0.62, 1.5).real

    t_engine, t_closed = best_times([engine, closed], 15, 100)
    print(f"(a) two-site, {POINTS} points: simulate {t_engine * 1e6:.0f} us, closed form {t_closed * 1e6:.0f} us,"
          f" ratio {t_engine / t_closed:.2f} (goal <= 1.0)")
    return t_engine / t_closed


def six_spin_model(n_spins: int = 6) -> dnmr.Model:
    """An invented ring-flip of a coupled six-spin chain: the flip reverses the chain."""
    names = [f"H{i + 1}" for i in range(n_spins)]
    shifts = {n: 1.2 + 0.37 * i + 0.05 * (i % 2) for i, n in enumerate(names)}
    couplings = {f"{a}-{b}": (7.5 if j == i + 1 else 1.2) for i, a in enumerate(names)
                 for j, b in enumerate(names) if j > i and j - i <= 2}
    state = dnmr.State("chain", shifts, couplings, linewidth_hz=1.0, population=1.0)
    flip = {a: b for a, b in zip(names, reversed(names))}
    return dnmr.Model(dnmr.Spectrometer(400.0), [state], [dnmr.Exchange("chain", "chain", flip, rate_per_s=40.0)],
                      points=POINTS)


def dense_unfactored(model: dnmr.Model, hz: np.ndarray) -> np.ndarray:
    """Baseline: one dense Liouvillian over all single-quantum coherences, one eigendecomposition."""
    params = SpinParameters.from_model(model)
    blocks = [block_pattern(b, params.topology) for b in coherence_blocks(len(model.spins))]
    mats = [block_liouvillian(p, params) for p in blocks]
    n = sum(len(m) for m in mats)
    L = np.zeros((n, n), complex)  # assemble unfactored (block structure not exploited below)
    detect = np.concatenate([p.detect for p in blocks])
    start = np.concatenate([block_start(p, params.populations) for p in blocks])
    at = 0
    for m in mats:
        L[at:at + len(m), at:at + len(m)] = m
        at += len(m)
    lam, V = np.linalg.eig(L)
    amp = (detect @ V) * np.linalg.solve(V, start)
    iw = 2j * np.pi * hz
    out = np.zeros(hz.size, complex)
    for c, p in zip(amp, lam):
        out += c / (iw - p)
    return out


def kernels_in_use() -> str:
    """Which loops the Krylov route runs in this process (the compiled ones are loaded here if present)."""
    kernels = resolvent.compiled_kernels()
    if kernels is None:
        return "numpy loops" + ("" if resolvent.USE_COMPILED else " (compiled loops switched off)")
    import numba
    return f"compiled loops (numba {numba.__version__})"


def bench_six_spins() -> float:
    """(b) in this process, with the loops that `resolvent.USE_COMPILED` selects; returns simulate's time (s)."""
    model = six_spin_model()
    spectrum = dnmr.simulate(model)  # also loads (or compiles) the compiled loops once, outside the timing
    ref = dense_unfactored(model, spectrum.hz)
    err = np.abs(spectrum.intensity - ref.real).max() / ref.real.max()
    terms = lineshape_terms(model)
    t_engine, t_dense, t_evaluate = best_times([lambda: dnmr.simulate(model), lambda: dense_unfactored(model, spectrum.hz),
                                                lambda: terms.absorption(spectrum.hz)], 3, 1)
    print(f"(b) six spins, mutual exchange, {POINTS} points, {kernels_in_use()}: simulate {t_engine * 1e3:.0f} ms,"
          f" dense unfactored {t_dense * 1e3:.0f} ms, ratio {t_engine / t_dense:.3f} (goal <= 0.02:"
          f" {verdict(t_engine / t_dense, 0.02)}); max difference {err:.1e}")
    levels = sum(len(b.alpha) for b in terms.direct if isinstance(b, ContinuedFraction))
    print(f"    of which evaluating the reduced blocks ({levels} continued-fraction levels x {POINTS} points, the work"
          f" of any exact evaluation without poles): {t_evaluate * 1e3:.0f} ms, {t_evaluate / t_dense:.3f} of the dense route")
    return t_engine


def resident_mib(field: str) -> float:
    """Resident memory (MiB) of this process from /proc/self/status: VmRSS now, VmHWM its peak.  (Unlike
    getrusage's maxrss, which Linux carries over from the parent through fork and exec, these belong to
    this process alone.)"""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return float(line.split()[1]) / 1024
    raise RuntimeError(f"no {field} in /proc/self/status (the memory figures need Linux)")


def run_alone(n_spins: int, compiled: bool) -> tuple[float, float, float, float, str]:
    """CPU times (s) of a first and a second simulation of the n-spin chain in a fresh process (the first
    includes the index work that is cached for later simulations of the same spin topology, as in every
    evaluation of a fit after the first, and loading the compiled loops from numba's on-disk cache), the
    peak resident memory (MiB), the resident memory before the simulations (MiB: Python and the imported
    libraries) and the Lanczos steps of the blocks whose recursion stopped once converged on the grid; in
    a fresh process so that the peak belongs to these simulations alone and no tracing slows them down."""
    code = (
        "import importlib.util, time\n"
        "spec = importlib.util.spec_from_file_location('engine_speed', %r)\n"
        "engine_speed = importlib.util.module_from_spec(spec); spec.loader.exec_module(engine_speed)\n"
        "from threadpoolctl import threadpool_limits\n"
        "import dnmr\n"
        "dnmr.engine.resolvent.USE_COMPILED = %r\n"
        "model = engine_speed.six_spin_model(%d)\n"
        "before = engine_speed.resident_mib('VmRSS')\n"
        "times = []\n"
        "with threadpool_limits(%r):\n"
        "    for rate in (40.0, 41.0):\n"
        "        t0 = time.process_time(); spectrum = dnmr.simulate(model.with_rates([rate]))\n"
        "        times.append(time.process_time() - t0)\n"
        "early = sorted({r.split(', ')[1].split(' (')[0] for r in spectrum.terms.routes if 'converged' in r})\n"
        "print(*times, engine_speed.resident_mib('VmHWM'), before, '|', ', '.join(early) or 'none')\n"
    ) % (str(HERE / "engine_speed.py"), compiled, n_spins, THREADS)
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    out, early = result.stdout.split("|")
    first, second, peak, before = (float(v) for v in out.split())
    return first, second, peak, before, early.strip()


def bench_seven_and_eight(six_spin_time_s: float) -> None:
    """(c) and (e), each in a fresh process, with the loops that `resolvent.USE_COMPILED` selects."""
    compiled = resolvent.USE_COMPILED
    first, second, m6, base, _ = run_alone(6, compiled)
    print(f"    six spins alone: {first * 1e3:.0f} ms first, {second * 1e3:.0f} ms again, peak resident memory"
          f" {m6:.0f} MiB ({base:.0f} MiB of it Python and the libraries before the simulation)")
    first, second, m7, base, _ = run_alone(7, compiled)
    print(f"(c) seven spins, {POINTS} points: {first:.2f} s first, {second:.2f} s again with the index work cached"
          f" ({second / six_spin_time_s:.1f} x six spins; goal <= 0.3 s: {verdict(second, 0.3)}), peak memory"
          f" {m7:.0f} MiB ({base:.0f} MiB before the simulation)")
    first, second, m8, base, early = run_alone(8, compiled)
    print(f"(e) eight spins, {POINTS} points: {first:.1f} s first, {second:.1f} s again (goal <= 10 s:"
          f" {verdict(second, 10.0)}), peak memory {m8:.0f} MiB ({base:.0f} MiB before the simulation; goal <= 24 GB:"
          f" {verdict(m8 / 1024, 24.0)}); recursions stopped on convergence on the grid: {early}")
    print(f"    {load_text()}")


def dimethyl_models() -> tuple[dnmr.Model, dnmr.Model]:
    """An invented N,N-dimethyl amide: MeE and MeZ swap by C-N rotation; both couple weakly to Hf."""
    spec = dnmr.Spectrometer(400.0)
    exchange_groups = dnmr.Exchange("amide", "amide", {"MeE": "MeZ", "MeZ": "MeE"}, rate_per_s=25.0)
    grouped = dnmr.Model(spec, [dnmr.State("amide", {"MeE": 2.94, "MeZ": 3.05, "Hf": 8.02},
                                           {"MeE-Hf": 0.6, "MeZ-Hf": 0.3}, linewidth_hz=0.8, population=1)],
                         [exchange_groups], groups={"MeE": 3, "MeZ": 3}, window_ppm=(2.7, 8.3), points=POINTS)
    e = [f"E{i}" for i in range(3)]
    z = [f"Z{i}" for i in range(3)]
    shifts = {**{n: 2.94 for n in e}, **{n: 3.05 for n in z}, "Hf": 8.02}
    couplings = {**{f"{n}-Hf": 0.6 for n in e}, **{f"{n}-Hf": 0.3 for n in z}}
    swap = {**dict(zip(e, z)), **dict(zip(z, e))}
    spins = dnmr.Model(spec, [dnmr.State("amide", shifts, couplings, linewidth_hz=0.8, population=1)],
                       [dnmr.Exchange("amide", "amide", swap, rate_per_s=25.0)], window_ppm=(2.7, 8.3), points=POINTS)
    return grouped, spins


def peak_memory_mib(fn) -> float:
    tracemalloc.start()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2**20


def bench_groups() -> float:
    grouped, spins = dimethyl_models()
    a, b = dnmr.simulate(grouped), dnmr.simulate(spins)
    err = np.abs(a.intensity - b.intensity).max() / b.intensity.max()
    t_groups, t_spins = best_times([lambda: dnmr.simulate(grouped), lambda: dnmr.simulate(spins)], 2, 1)
    m_groups = peak_memory_mib(lambda: dnmr.simulate(grouped))
    m_spins = peak_memory_mib(lambda: dnmr.simulate(spins))
    print(f"(d) N,N-dimethyl type: groups {t_groups * 1e3:.1f} ms ({m_groups:.1f} MiB), seven spins"
          f" {t_spins * 1e3:.0f} ms ({m_spins:.0f} MiB), ratio {t_groups / t_spins:.4f} (goal <= 0.05);"
          f" max difference {err:.1e}")
    return t_groups / t_spins


if __name__ == "__main__":
    print(f"BLAS threads: {THREADS} (engine and baselines alike); {load_text()}")
    with threadpool_limits(THREADS):
        bench_two_site()
        bench_groups()
    for compiled in (True, False):
        resolvent.USE_COMPILED = compiled
        print(f"--- Krylov route: {kernels_in_use()}")
        with threadpool_limits(THREADS):
            six_spin_time = bench_six_spins()
        bench_seven_and_eight(six_spin_time)
        if resolvent.compiled_kernels() is None and compiled:
            print("    (numba is not installed: the compiled loops were not measured)")
            break
