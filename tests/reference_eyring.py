"""The Eyring equation, written out as an outside reference for the tests.

Source: Eyring, J. Chem. Phys. 3, 107 (1935), transition-state theory:
``k = kappa (kB T / h) exp(-ΔG‡ / (R T))`` with ``ΔG‡ = ΔH‡ - T ΔS‡``, so
``k = kappa (kB T / h) exp(ΔS‡ / R) exp(-ΔH‡ / (R T))``.  kB, h and R are the CODATA values of
scipy.constants (kB and h are exact in the 2019 SI).  Nothing here comes from dnmr.
"""
from __future__ import annotations

import numpy as np
from scipy import constants


def eyring_rate(temperature_k, enthalpy_kj_mol: float, entropy_j_mol_k: float = 0.0,
                transmission: float = 1.0):
    """First-order rate constant (s^-1) at `temperature_k` (K; a number or an array).

    Parameters
    ----------
    temperature_k : float or array_like
        Temperature (K).
    enthalpy_kj_mol : float
        ΔH‡ (kJ/mol); with ΔS‡ = 0 it is ΔG‡.
    entropy_j_mol_k : float
        ΔS‡ (J/(mol K)).
    transmission : float
        Transmission coefficient kappa.
    """
    t = np.asarray(temperature_k, dtype=float)
    k = (transmission * constants.k * t / constants.h
         * np.exp(entropy_j_mol_k / constants.R - enthalpy_kj_mol * 1e3 / (constants.R * t)))
    return float(k) if k.ndim == 0 else k
