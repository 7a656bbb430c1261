"""One home for activation parameters: the Eyring ΔH‡ and ΔS‡ of one process, as given (a model file, a
planning guess) or as estimated with their covariance (the Eyring fit, the global fit)."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from dnmr.errors import InputError
from dnmr.kinetics import GAS_CONSTANT, KCAL_PER_KJ, eyring_rate_from_enthalpy
from dnmr.modelparts import LIMITS, Exchange

#: Temperatures (K) searched for the temperature at which a process reaches a given rate.
TEMPERATURE_SEARCH_K = (20.0, 2000.0)


@dataclass(frozen=True)
class ActivationParameters:
    """Eyring activation parameters of one exchange process (forward direction).

    Parameters
    ----------
    enthalpy_kj_mol : float
        ΔH‡ (kJ/mol); for a free energy of activation alone this is ΔG‡ with ΔS‡ = 0.
    entropy_j_mol_k : float
        ΔS‡ (J/(mol K)).
    transmission : float
        Transmission coefficient kappa.
    """

    enthalpy_kj_mol: float
    entropy_j_mol_k: float = 0.0
    transmission: float = 1.0

    def __post_init__(self):
        for key in ("enthalpy_kj_mol", "entropy_j_mol_k", "transmission"):
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                raise InputError(f"expected a finite number, got {value!r}", where=key)
        if not self.transmission > 0:
            raise InputError(f"the transmission coefficient must be positive, got {self.transmission!r}",
                             where="transmission")
        if not 0 < self.enthalpy_kj_mol <= LIMITS["kj_mol"]:  # else faster than kB T/h: no barrier at all
            raise InputError(f"the barrier (ΔG‡, or ΔH‡ with ΔS‡) must be above 0 and at most {LIMITS['kj_mol']:g}"
                             f" kJ/mol, got {self.enthalpy_kj_mol!r}", where="enthalpy_kj_mol")
        if abs(self.entropy_j_mol_k) > LIMITS["j_mol_k"]:
            raise InputError(f"ΔS‡ must be at most {LIMITS['j_mol_k']:g} J/(mol K) in size, got "
                             f"{self.entropy_j_mol_k!r}", where="entropy_j_mol_k")

    @classmethod
    def from_gibbs(cls, gibbs_kj_mol: float, transmission: float = 1.0) -> "ActivationParameters":
        """ΔG‡ (kJ/mol) taken as the same at every temperature (ΔS‡ = 0)."""
        return cls(float(gibbs_kj_mol), 0.0, transmission)

    @classmethod
    def of_exchange(cls, exchange: Exchange) -> "ActivationParameters | None":
        """The activation parameters a model file gives for `exchange` (None when it gives a rate)."""
        if exchange.barrier_kj_mol is not None:
            return cls.from_gibbs(exchange.barrier_kj_mol)
        if exchange.enthalpy_kj_mol is not None:
            return cls(exchange.enthalpy_kj_mol, exchange.entropy_j_mol_k)
        return None

    def gibbs_kj_mol(self, temperature_k: float) -> float:
        """ΔG‡ (kJ/mol) at `temperature_k` (K)."""
        return self.enthalpy_kj_mol - temperature_k * self.entropy_j_mol_k / 1e3

    def rate_at(self, temperature_k: float) -> float:
        """Forward rate constant (s^-1) at `temperature_k` (K)."""
        return float(eyring_rate_from_enthalpy(self.enthalpy_kj_mol, self.entropy_j_mol_k, temperature_k,
                                               self.transmission))

    def temperature_at(self, rate_per_s: float) -> float | None:
        """Temperature (K) at which the rate is `rate_per_s` (s^-1), or None outside 20-2000 K."""
        low, high = TEMPERATURE_SEARCH_K
        target = math.log(rate_per_s)
        gap = lambda t: math.log(self.rate_at(t)) - target  # noqa: E731
        try:
            if gap(low) * gap(high) > 0:
                return None
        except (OverflowError, ValueError):
            return None
        return float(brentq(gap, low, high, xtol=1e-6))

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"enthalpy_kj_mol": self.enthalpy_kj_mol, "enthalpy_kcal_mol": self.enthalpy_kj_mol * KCAL_PER_KJ,
                "entropy_j_mol_k": self.entropy_j_mol_k, "transmission": self.transmission}

    def describe(self) -> str:
        """One line: ΔG‡ alone, or ΔH‡ and ΔS‡."""
        if self.entropy_j_mol_k == 0:
            return f"ΔG‡ = {self.enthalpy_kj_mol:.2f} kJ/mol ({self.enthalpy_kj_mol * KCAL_PER_KJ:.2f} kcal/mol)"
        return (f"ΔH‡ = {self.enthalpy_kj_mol:.2f} kJ/mol ({self.enthalpy_kj_mol * KCAL_PER_KJ:.2f} kcal/mol),"
                f" ΔS‡ = {self.entropy_j_mol_k:.1f} J/(mol K)")


@dataclass(frozen=True)
class ActivationEstimate:
    """ΔH‡ and ΔS‡ of one process from the global fit, with their joint covariance.

    Attributes
    ----------
    process : str
        Exchange process name.
    enthalpy_kj_mol, entropy_j_mol_k : float
        ΔH‡ (kJ/mol) and ΔS‡ (J/(mol K)).
    covariance : ndarray
        2x2 covariance of (ΔH‡ in kJ/mol, ΔS‡ in J/(mol K)), the temperature calibration's part included.
    calibration_covariance : ndarray or None
        The part of `covariance` that the temperature calibration brings in (None: no calibration).
    """

    process: str
    enthalpy_kj_mol: float
    entropy_j_mol_k: float
    covariance: np.ndarray
    calibration_covariance: np.ndarray | None = None

    @property
    def enthalpy_stderr(self) -> float:
        """Standard error of ΔH‡, kJ/mol."""
        return float(math.sqrt(self.covariance[0, 0]))

    @property
    def entropy_stderr(self) -> float:
        """Standard error of ΔS‡, J/(mol K)."""
        return float(math.sqrt(self.covariance[1, 1]))

    @property
    def correlation(self) -> float:
        """Correlation coefficient of ΔH‡ and ΔS‡."""
        return float(self.covariance[0, 1] / math.sqrt(self.covariance[0, 0] * self.covariance[1, 1]))

    def gibbs(self, temperature_k: float) -> tuple[float, float]:
        """ΔG‡ = ΔH‡ - T ΔS‡ and its standard error (kJ/mol) at `temperature_k` (K)."""
        grad = np.array([1.0, -temperature_k / 1e3])
        return (self.enthalpy_kj_mol - temperature_k * self.entropy_j_mol_k / 1e3,
                float(math.sqrt(grad @ self.covariance @ grad)))

    def error_shares(self) -> dict[str, np.ndarray]:
        """The two parts of `covariance` (2x2, as it): ``"spectra"`` (the fit's own) and ``"calibration"``
        (what the temperature calibration adds); NaN without a calibration."""
        calibration = (np.full((2, 2), math.nan) if self.calibration_covariance is None
                       else self.calibration_covariance)
        return {"spectra": self.covariance - np.nan_to_num(calibration), "calibration": calibration}

    def ln_rate(self, temperature_k: float) -> tuple[float, float]:
        """ln(k / s^-1) and its standard error at `temperature_k` (K)."""
        grad = np.array([-1e3 / (GAS_CONSTANT * temperature_k), 1.0 / GAS_CONSTANT])
        value = math.log(eyring_rate_from_enthalpy(self.enthalpy_kj_mol, self.entropy_j_mol_k, temperature_k))
        return value, float(math.sqrt(grad @ self.covariance @ grad))
