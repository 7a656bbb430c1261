"""Kinetics of exchange: Eyring rates, exchange processes, detailed balance and the rate matrix.

Rates are first-order rate constants in s^-1; energies in kJ/mol, entropies in J/(mol K).
Constants are CODATA values from :mod:`scipy.constants`.
"""
from __future__ import annotations

import numpy as np
from scipy import constants

BOLTZMANN = constants.k  # J/K
PLANCK = constants.h  # J s
GAS_CONSTANT = constants.R  # J/(mol K)
KCAL_PER_KJ = 1.0 / 4.184  # thermochemical calorie
STANDARD_TEMPERATURE_K = 298.15


def eyring_rate(
    gibbs_kj_mol: float | np.ndarray,
    temperature_k: float | np.ndarray,
    transmission: float = 1.0,
) -> float | np.ndarray:
    """Eyring rate constant k = kappa (kB T / h) exp(-dG‡ / RT) in s^-1.

    Parameters
    ----------
    gibbs_kj_mol : float or array
        Free energy of activation dG‡ in kJ/mol.
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
    """Eyring rate constant (s^-1) from dH‡ (kJ/mol) and dS‡ (J/(mol K)) at `temperature_k` (K)."""
    gibbs = np.asarray(enthalpy_kj_mol) - np.asarray(temperature_k) * np.asarray(entropy_j_mol_k) / 1e3
    return eyring_rate(gibbs, temperature_k, transmission)


def eyring_barrier(
    rate_per_s: float | np.ndarray,
    temperature_k: float | np.ndarray,
    transmission: float = 1.0,
) -> float | np.ndarray:
    """Free energy of activation dG‡ (kJ/mol) that gives `rate_per_s` (s^-1) at `temperature_k` (K)."""
    t = np.asarray(temperature_k, dtype=float)
    k = np.asarray(rate_per_s, dtype=float)
    g = GAS_CONSTANT * t * np.log(transmission * BOLTZMANN * t / (PLANCK * k)) / 1e3
    return g if np.ndim(g) else float(g)


def boltzmann_populations(free_energies_kj_mol: np.ndarray, temperature_k: float) -> np.ndarray:
    """Equilibrium populations (sum 1) of states with relative free energies (kJ/mol) at `temperature_k` (K)."""
    g = np.asarray(free_energies_kj_mol, dtype=float) * 1e3
    w = np.exp(-(g - g.min()) / (GAS_CONSTANT * temperature_k))
    return w / w.sum()
