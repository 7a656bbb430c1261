"""Kinetics of exchange: Eyring rates, exchange processes, detailed balance and the rate matrix.

Rates are first-order rate constants in s^-1; energies in kJ/mol, entropies in J/(mol K).
Constants are CODATA values from :mod:`scipy.constants`.
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import constants

from dnmr.errors import InputError

BOLTZMANN = constants.k  # J/K
PLANCK = constants.h  # J s
GAS_CONSTANT = constants.R  # J/(mol K)
KCAL_PER_KJ = 1.0 / 4.184  # thermochemical calorie
STANDARD_TEMPERATURE_K = 298.15
MAX_TEMPERATURE_K = 2000.0
"""Hottest temperature accepted (K): far above any NMR probe; a larger number is a slip or damage."""


def rate_ceiling_per_s(temperature_k: float) -> float:
    """kB T / h (s^-1) at `temperature_k` (K): the Eyring rate of a zero free-energy barrier, above
    which no first-order rate constant lies (about 6.2e12 s^-1 at 298.15 K)."""
    return BOLTZMANN * float(temperature_k) / PLANCK


def coalescence_rate_per_s(separation_hz: float, coupling_hz: float = 0.0) -> float:
    """Rate constant (s^-1) at coalescence of an equally populated two-site pair separated by
    `separation_hz` (Hz), coupled by `coupling_hz` (Hz): k_c = pi sqrt(dnu^2 + 6 J^2) / sqrt 2.

    Gutowsky & Holm, J. Chem. Phys. 25, 1228 (1956) for the uncoupled pair (k_c = pi dnu / sqrt 2);
    Kurland, Rubin & Wise, J. Chem. Phys. 40, 2426 (1964) for the AB pair.
    """
    return math.pi * math.hypot(separation_hz, math.sqrt(6.0) * coupling_hz) / math.sqrt(2.0)


def eyring_rate(
    gibbs_kj_mol: float | np.ndarray,
    temperature_k: float | np.ndarray,
    transmission: float = 1.0,
) -> float | np.ndarray:
    """Eyring rate constant k = kappa (kB T / h) exp(-ΔG‡ / RT) in s^-1.

    Parameters
    ----------
    gibbs_kj_mol : float or array
        Free energy of activation ΔG‡ in kJ/mol.
    temperature_k : float or array
        Temperature in K.
    transmission : float
        Transmission coefficient kappa (default 1).
    """
    t = np.asarray(temperature_k, dtype=float)
    g = np.asarray(gibbs_kj_mol, dtype=float) * 1e3
    k = transmission * BOLTZMANN * t / PLANCK * np.exp(-g / (GAS_CONSTANT * t))
    return k if np.ndim(k) else float(k)


def eyring_rate_from_enthalpy(
    enthalpy_kj_mol: float | np.ndarray,
    entropy_j_mol_k: float | np.ndarray,
    temperature_k: float | np.ndarray,
    transmission: float = 1.0,
) -> float | np.ndarray:
    """Eyring rate constant (s^-1) from ΔH‡ (kJ/mol) and ΔS‡ (J/(mol K)) at `temperature_k` (K)."""
    gibbs = np.asarray(enthalpy_kj_mol) - np.asarray(temperature_k) * np.asarray(entropy_j_mol_k) / 1e3
    return eyring_rate(gibbs, temperature_k, transmission)


def eyring_barrier(
    rate_per_s: float | np.ndarray,
    temperature_k: float | np.ndarray,
    transmission: float = 1.0,
) -> float | np.ndarray:
    """Free energy of activation ΔG‡ (kJ/mol) that gives `rate_per_s` (s^-1) at `temperature_k` (K)."""
    t = np.asarray(temperature_k, dtype=float)
    k = np.asarray(rate_per_s, dtype=float)
    g = GAS_CONSTANT * t * np.log(transmission * BOLTZMANN * t / (PLANCK * k)) / 1e3
    return g if np.ndim(g) else float(g)


def boltzmann_populations(free_energies_kj_mol: np.ndarray, temperature_k: float) -> np.ndarray:
    """Equilibrium populations (sum 1) of states with relative free energies (kJ/mol) at `temperature_k` (K)."""
    g = np.asarray(free_energies_kj_mol, dtype=float) * 1e3
    w = np.exp(-(g - g.min()) / (GAS_CONSTANT * temperature_k))
    return w / w.sum()


# --- exchange processes as elementary jumps ---------------------------------------------------

@dataclass(frozen=True)
class Jump:
    """One elementary, directed exchange: state `source` -> state `target` at `rate_per_s` (s^-1).

    `permutation[i]` is the index of the spin that spin `i` of the source state becomes in the target
    state (spins indexed in the model's order, ``model.all_spins``: observed spins, then heteronuclei).  `process` is the index of the model's exchange process it belongs to and
    `forward` is False for the reverse (detailed balance) or inverse-permutation partner.
    """

    source: int
    target: int
    permutation: tuple[int, ...]
    rate_per_s: float
    process: int
    forward: bool = True


def spin_permutation(spin_order: Sequence[str], mapping: Mapping[str, str]) -> tuple[int, ...]:
    """The permutation of an exchange as indices: entry `i` is the index (in `spin_order`) of the spin that
    spin `i` becomes; `mapping` names the spins that move (spin -> spin), the others keep their names."""
    spins = list(spin_order)
    return tuple(spins.index(mapping.get(name, name)) for name in spins)


def _inverse(perm: tuple[int, ...]) -> tuple[int, ...]:
    inv = [0] * len(perm)
    for i, j in enumerate(perm):
        inv[j] = i
    return tuple(inv)


def _listed_partners(processes: Sequence[tuple[int, int, tuple[int, ...]]]) -> dict[int, int]:
    """Pairs of listed processes that are each other's reverse (b -> a by the inverse permutation)."""
    partner: dict[int, int] = {}
    for i, (a, b, perm) in enumerate(processes):
        for j in range(i + 1, len(processes)):
            if j not in partner and processes[j] == (b, a, _inverse(perm)) and i not in partner:
                partner[i], partner[j] = j, i
    return partner


def jumps_with_reverses(
    processes: Sequence[tuple[int, int, tuple[int, ...]]],
    rates_per_s: Sequence[float],
    populations: Sequence[float],
    state_names: Sequence[str],
) -> list[Jump]:
    """All elementary jumps of exchange processes, with reverse processes implied by detailed balance.

    For a process a -> b (a != b) at rate k the reverse b -> a runs at k p_a / p_b; a mutual exchange
    (a == b) implies its inverse permutation at the same rate.  A reverse that is listed itself must agree
    with this (relative tolerance 1e-6), and is then not added twice.

    Parameters
    ----------
    processes : sequence of (int, int, tuple of int)
        Source state, target state and spin permutation (:func:`spin_permutation`) of each process.
    rates_per_s : sequence of float
        Forward rate constant of each process (s^-1).
    populations : sequence of float
        Equilibrium population of each state (sum 1).
    state_names : sequence of str
        Name of each state, for messages.
    """
    partner = _listed_partners(processes)
    jumps: list[Jump] = []
    for i, (a, b, perm) in enumerate(processes):
        k = float(rates_per_s[i])
        if a != b and populations[b] == 0:
            raise InputError(
                f'state "{state_names[b]}" has population 0 but is reached by exchange;'
                " give it a positive population", where=f"exchange[{i}].to")
        k_back = k * populations[a] / populations[b] if a != b else k
        if i in partner:
            j = partner[i]
            if not math.isclose(float(rates_per_s[j]), k_back, rel_tol=1e-6, abs_tol=1e-300):
                rule = "detailed balance k_rev = k p_from / p_to" if a != b else "equal rates for a permutation and its inverse"
                raise InputError(
                    f"exchange {i} and its listed reverse {j} disagree: {rule} needs {k_back:.6g} s^-1,"
                    f" got {float(rates_per_s[j]):.6g}; drop the reverse (it is implied) or fix its rate",
                    where=f"exchange[{j}].rate_per_s")
            if j < i:
                continue
        jumps.append(Jump(a, b, perm, k, i, True))
        if a != b or perm != _inverse(perm):
            jumps.append(Jump(b, a, _inverse(perm), k_back, i, False))
    return jumps


def rate_matrix(n_states: int, jumps: list[Jump]) -> np.ndarray:
    """Rate matrix K (s^-1) of the state populations, dp/dt = K p (mutual exchanges do not enter)."""
    K = np.zeros((n_states, n_states))
    for jump in jumps:
        if jump.source != jump.target:
            K[jump.target, jump.source] += jump.rate_per_s
            K[jump.source, jump.source] -= jump.rate_per_s
    return K


def check_stationary(K: np.ndarray, populations: np.ndarray) -> None:
    """Raise InputError unless `populations` is a stationary vector of the rate matrix `K` (K p = 0)."""
    scale = max(1.0, float(np.abs(K).max()))
    residual = np.abs(K @ populations)
    if residual.max() > 1e-9 * scale:
        worst = int(residual.argmax())
        raise InputError(
            f"the exchange rates do not keep the populations at equilibrium (state {worst} drifts at"
            f" {residual.max():.3g} s^-1); check populations and the rates of processes listed in both directions",
            where="exchange")
