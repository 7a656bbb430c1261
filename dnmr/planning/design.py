"""The design of a variable-temperature series: information about the rates, and D-optimal temperatures.

Each spectrum carries Fisher information about ln k: F = sum_i (d y_i / d ln k)^2 / sigma^2 over the
points of the spectrum (finite differences of the engine spectrum, at a dozen temperatures and
interpolated between them), with the overall intensity scale
fitted too (its information is projected out).  sigma, the rms noise per point, is the tallest point
of the spectrum without exchange divided by the signal-to-noise ratio.  Through the Eyring equation
d ln k / d ΔH‡ = -1/(RT) and d ln k / d ΔS‡ = 1/R, so a set of temperatures gives an information
matrix for (ΔH‡, ΔS‡); the plan picks the set with the largest determinant (D-optimal design: a
greedy start and exchange passes) among candidate temperatures inside the solvent's liquid range and
the probe's range, at least a minimum step apart.  The resulting standard errors are lower bounds
(noise only); the temperature dependence of shifts and linewidths and thermometer calibration add to
them (Shoup, Becker & McNeel, J. Phys. Chem. 76, 71 (1972)).  ΔG‡ is quoted at the harmonic mean
temperature, where it is uncorrelated with ΔH‡ (Grieger, Hunter & Krug, Nature 261, 566 (1976)).
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np

from dnmr.engine.blocks import frequency_grid_ppm, lineshape_terms
from dnmr.kinetics import GAS_CONSTANT
from dnmr.model import Model

#: Step in ln k of the (forward) finite differences for the Fisher information.
LN_RATE_STEP = 1e-4
#: Smallest step (K) between planned temperatures unless another is asked for.
DEFAULT_MIN_STEP_K = 5.0
#: The information is computed from the engine at this many temperatures (evenly spread in 1/T), then
#: at midpoints next to nodes where its logarithm bends by more than INFORMATION_BEND, in up to
#: INFORMATION_ROUNDS rounds; in between it is interpolated. The chosen temperatures are computed exactly.
INFORMATION_NODES = 9
INFORMATION_BEND = 0.2
INFORMATION_ROUNDS = 4
#: The information sums run over at most this many points; a finer model grid is resampled and the sum
#: scaled by the ratio of point counts (the noise stays per point of the model's grid).
MAX_INFORMATION_POINTS = 8192


def _spectrum(model: Model, hz: np.ndarray) -> np.ndarray:
    return lineshape_terms(model).evaluate(hz).real


def information_grid(model: Model) -> tuple[np.ndarray, float]:
    """Frequencies (Hz) over which information is summed, and the weight of each of them.

    The model's grid, or at most MAX_INFORMATION_POINTS evenly spread over its window, each then
    standing for (model points / points used) points of the model's grid.
    """
    grid = frequency_grid_ppm(model) * model.spectrometer.frequency_mhz
    if grid.size <= MAX_INFORMATION_POINTS:
        return grid, 1.0
    return np.linspace(grid[0], grid[-1], MAX_INFORMATION_POINTS), grid.size / MAX_INFORMATION_POINTS


def noise_level(model: Model, hz: np.ndarray, signal_to_noise: float) -> float:
    """rms noise per point: the tallest point of the spectrum without exchange over `signal_to_noise`."""
    static = model.with_rates(np.zeros(len(model.exchanges)))
    return float(_spectrum(static, hz).max()) / signal_to_noise


def ln_rate_information(model: Model, processes: Sequence[int], hz: np.ndarray, noise: float) -> np.ndarray:
    """Fisher information matrix about the ln k of `processes` carried by one spectrum.

    Parameters
    ----------
    model : Model
        At the temperature (and rates) of the spectrum.
    processes : sequence of int
        Process indices whose ln k are estimated.
    hz : ndarray
        Frequencies of the spectrum's points (Hz).
    noise : float
        rms noise per point (same units as the absorption, Hz^-1).

    Returns
    -------
    ndarray (P, P)
        Information about (ln k_1, ..., ln k_P) with the intensity scale fitted alongside (projected out).
    """
    rates = model.rates()
    base = _spectrum(model, hz)
    columns = []
    for p in processes:
        moved = rates.copy()
        moved[p] = rates[p] * math.exp(LN_RATE_STEP)
        columns.append((_spectrum(model.with_rates(moved), hz) - base) / LN_RATE_STEP)
    columns.append(base)  # d y / d ln(scale)
    design = np.array(columns).T / noise
    full = design.T @ design
    rate_block, cross, scale = full[:-1, :-1], full[:-1, -1:], full[-1, -1]
    return rate_block - cross @ cross.T / scale


def eyring_jacobian(temperature_k: float, n_processes: int) -> np.ndarray:
    """d ln k_p / d (ΔH‡_q [kJ/mol], ΔS‡_q [J/(mol K)]): array (P, 2P), one (ΔH‡, ΔS‡) pair per process."""
    g = np.zeros((n_processes, 2 * n_processes))
    for p in range(n_processes):
        g[p, 2 * p] = -1e3 / (GAS_CONSTANT * temperature_k)
        g[p, 2 * p + 1] = 1.0 / GAS_CONSTANT
    return g


def eyring_information(temperature_k: float, rate_information: np.ndarray) -> np.ndarray:
    """Information about (ΔH‡, ΔS‡) of every process (kJ/mol, J/(mol K)) from information about their ln k."""
    g = eyring_jacobian(temperature_k, rate_information.shape[0])
    return g.T @ rate_information @ g


def information_profile(information_at, low_k: float, high_k: float) -> tuple[list[float], list[np.ndarray]]:
    """Temperatures (K) and information matrices that resolve how the information changes from `low_k`
    to `high_k` (K): a few nodes, refined at midpoints where the information bends (see INFORMATION_BEND).

    Parameters
    ----------
    information_at : callable
        Information matrix at a temperature (K).
    low_k, high_k : float
        The range (K).
    """
    start = [low_k] if high_k <= low_k else 1.0 / np.linspace(1.0 / high_k, 1.0 / low_k, INFORMATION_NODES)
    found = {float(t): information_at(float(t)) for t in start}
    for _ in range(INFORMATION_ROUNDS):
        temps = sorted(found)
        new = set()
        for i in _bends(temps, [float(np.trace(found[t])) for t in temps]):
            new.update(0.5 * (temps[j] + temps[j + 1]) for j in (i - 1, i) if temps[j + 1] - temps[j] > 1.0)
        if not new:
            break
        found.update({t: information_at(t) for t in new})
    temps = sorted(found)
    return temps, [found[t] for t in temps]


def _bends(temps: Sequence[float], sizes: Sequence[float]) -> list[int]:
    """Interior nodes whose log size lies off the straight line through its neighbours by > INFORMATION_BEND."""
    logs = np.log(np.maximum(sizes, 1e-300))
    out = []
    for i in range(1, len(temps) - 1):
        a, b, c = temps[i - 1:i + 2]
        line = logs[i - 1] + (logs[i + 1] - logs[i - 1]) * (b - a) / (c - a)
        if abs(logs[i] - line) > INFORMATION_BEND:
            out.append(i)
    return out


def interpolated_information(nodes_k: Sequence[float], information: Sequence[np.ndarray],
                             temperatures_k: Sequence[float]) -> list[np.ndarray]:
    """Information matrices at `temperatures_k` (K) from those at `nodes_k` (K), interpolated element by
    element with a monotone cubic (no overshoot), kept symmetric and positive semi-definite."""
    from scipy.interpolate import PchipInterpolator

    order = np.argsort(nodes_k)
    stack = np.asarray(information)[order]
    if len(order) < 2:
        return [stack[0]] * len(temperatures_k)
    values = PchipInterpolator(np.asarray(nodes_k)[order], stack, axis=0)(np.asarray(temperatures_k, dtype=float))
    out = []
    for m in values:
        w, v = np.linalg.eigh(0.5 * (m + m.T))
        out.append((v * np.clip(w, 0.0, None)) @ v.T)
    return out


def _log_det(matrices: Sequence[np.ndarray], chosen: Sequence[int]) -> float:
    sign, value = np.linalg.slogdet(sum(matrices[i] for i in chosen))
    return value if sign > 0 else -math.inf


def _improving_swap(information: Sequence[np.ndarray], chosen: list[int], fits) -> list[int] | None:
    """`chosen` with one temperature swapped for another that raises the determinant, or None."""
    best = _log_det(information, chosen)
    for pos in range(len(chosen)):
        rest = chosen[:pos] + chosen[pos + 1:]
        for j in range(len(information)):
            if fits(rest, j) and _log_det(information, rest + [j]) > best + 1e-9:
                return rest + [j]
    return None


def d_optimal_temperatures(candidates_k: Sequence[float], information: Sequence[np.ndarray], count: int,
                           min_step_k: float) -> list[int]:
    """Indices of at most `count` candidates, each `min_step_k` (K) apart, maximising det(sum of information).

    The best pair is found by trying all, then temperatures are added greedily and swapped one at a time
    while the determinant grows.
    """
    t = np.asarray(candidates_k, dtype=float)

    def fits(chosen, j):
        return j not in chosen and all(abs(t[j] - t[i]) >= min_step_k - 1e-9 for i in chosen)

    pairs = [(i, j) for i, j in combinations(range(len(t)), 2) if fits([i], j)]
    scored = [(_log_det(information, pair), pair) for pair in pairs]
    if not scored or max(scored)[0] == -math.inf:
        return []
    chosen = list(max(scored)[1])
    while len(chosen) < count:
        options = [j for j in range(len(t)) if fits(chosen, j)]
        if not options:
            break
        chosen.append(max(options, key=lambda j: _log_det(information, chosen + [j])))
    while (swapped := _improving_swap(information, chosen, fits)) is not None:
        chosen = swapped
    return sorted(chosen, key=lambda i: t[i])


@dataclass(frozen=True)
class PredictedErrors:
    """Standard errors (noise only) of one process' activation parameters from a planned series.

    Attributes
    ----------
    process : str
    enthalpy_stderr : float
        Of ΔH‡ (kJ/mol).
    entropy_stderr : float
        Of ΔS‡ (J/(mol K)).
    harmonic_mean_temperature_k : float
        Harmonic mean of the planned temperatures (K).
    gibbs_hm_stderr : float
        Of ΔG‡ at the harmonic mean temperature (kJ/mol).
    correlation_enthalpy_entropy : float
        Correlation of ΔH‡ and ΔS‡.
    """

    process: str
    enthalpy_stderr: float
    entropy_stderr: float
    harmonic_mean_temperature_k: float
    gibbs_hm_stderr: float
    correlation_enthalpy_entropy: float

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"process": self.process, "enthalpy_stderr": self.enthalpy_stderr,
                "entropy_stderr": self.entropy_stderr, "harmonic_mean_temperature_k": self.harmonic_mean_temperature_k,
                "gibbs_hm_stderr": self.gibbs_hm_stderr, "correlation_enthalpy_entropy": self.correlation_enthalpy_entropy}

    def describe(self) -> str:
        """One line."""
        return (f"{self.process}: ΔH‡ ± {self.enthalpy_stderr:.2g} kJ/mol, ΔS‡ ± {self.entropy_stderr:.2g} J/(mol K)"
                f" (correlation {self.correlation_enthalpy_entropy:.3f}), ΔG‡({self.harmonic_mean_temperature_k:.0f} K)"
                f" ± {self.gibbs_hm_stderr:.2g} kJ/mol")


def predicted_errors(covariance: np.ndarray, names: Sequence[str], temperatures_k: Sequence[float]) -> list[PredictedErrors]:
    """Standard errors per process from the covariance of (ΔH‡, ΔS‡) pairs (kJ/mol, J/(mol K))."""
    t_hm = len(temperatures_k) / sum(1.0 / t for t in temperatures_k)
    out = []
    for p, name in enumerate(names):
        c = covariance[2 * p:2 * p + 2, 2 * p:2 * p + 2]
        var_g = c[0, 0] + (t_hm / 1e3) ** 2 * c[1, 1] - 2 * (t_hm / 1e3) * c[0, 1]
        out.append(PredictedErrors(name, math.sqrt(c[0, 0]), math.sqrt(c[1, 1]), t_hm, math.sqrt(max(var_g, 0.0)),
                                   c[0, 1] / math.sqrt(c[0, 0] * c[1, 1])))
    return out
