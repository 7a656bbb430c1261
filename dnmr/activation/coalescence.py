"""A quick barrier from a coalescence temperature: ΔG‡ at T_c of two equally populated, uncoupled sites.

The Gutowsky-Holm rate at coalescence (:func:`dnmr.kinetics.coalescence_rate_per_s`) put into the Eyring
equation; an estimate only (see :data:`COALESCENCE_CAVEAT`): a lineshape fit over a series of
temperatures gives the barrier with a real error bar.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from dnmr.errors import InputError
from dnmr.formatting import format_with_error
from dnmr.io.tables import check_kelvin
from dnmr.kinetics import BOLTZMANN, GAS_CONSTANT, KCAL_PER_KJ, PLANCK, coalescence_rate_per_s, eyring_barrier

COALESCENCE_CAVEAT = (
    "An estimate only: it assumes two equally populated sites, no coupling between them and lines "
    "far narrower than their separation (Gutowsky-Holm k_c = π Δν / √2), takes the shift "
    "difference of the slow-exchange limit at the coalescence temperature, and the coalescence "
    "temperature itself is seldom known better than a few kelvin. A lineshape fit over a series of "
    "temperatures gives the barrier with a real error bar."
)


@dataclass(frozen=True)
class CoalescenceEstimate:
    """ΔG‡ at the coalescence temperature of two equally populated, uncoupled sites.

    Attributes
    ----------
    coalescence_temperature_k : float
        Observed coalescence temperature T_c, K.
    shift_difference_hz : float
        Shift difference of the two sites in slow exchange, Hz.
    rate_per_s : float
        Rate constant at coalescence, k_c = pi dnu / sqrt(2), s^-1.
    gibbs_kj_mol : float
        ΔG‡ at T_c, kJ/mol.
    gibbs_stderr : float
        Its standard error from the given errors of T_c and dnu, kJ/mol (0 when none were given).
    transmission : float
        Transmission coefficient kappa.
    caveat : str
        Why this is only an estimate.
    """

    coalescence_temperature_k: float
    shift_difference_hz: float
    rate_per_s: float
    gibbs_kj_mol: float
    gibbs_stderr: float
    transmission: float
    caveat: str = COALESCENCE_CAVEAT

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {
            "coalescence_temperature_k": self.coalescence_temperature_k,
            "shift_difference_hz": self.shift_difference_hz,
            "rate_per_s": self.rate_per_s,
            "gibbs_kj_mol": self.gibbs_kj_mol,
            "gibbs_stderr": self.gibbs_stderr,
            "gibbs_kcal_mol": self.gibbs_kj_mol * KCAL_PER_KJ,
            "gibbs_kcal_stderr": self.gibbs_stderr * KCAL_PER_KJ,
            "transmission": self.transmission,
            "caveat": self.caveat,
        }

    def report(self) -> str:
        """Readable summary with the caveat."""
        if self.gibbs_stderr > 0:
            g = format_with_error(self.gibbs_kj_mol, self.gibbs_stderr)
            g_kcal = format_with_error(self.gibbs_kj_mol * KCAL_PER_KJ, self.gibbs_stderr * KCAL_PER_KJ)
        else:
            g, g_kcal = f"{self.gibbs_kj_mol:.2f}", f"{self.gibbs_kj_mol * KCAL_PER_KJ:.2f}"
        return "\n".join(
            [
                "Coalescence estimate (equal populations)",
                f"  T_c = {self.coalescence_temperature_k:g} K, Δν = {self.shift_difference_hz:g} Hz",
                f"  k_c = {self.rate_per_s:.4g} s⁻¹",
                f"  ΔG‡(T_c) = {g} kJ/mol ({g_kcal} kcal/mol)",
                f"  Caveat: {self.caveat}",
            ]
        )

    def __str__(self) -> str:
        return self.report()


def coalescence_barrier(
    coalescence_temperature_k: float,
    shift_difference_hz: float,
    *,
    temperature_stderr: float = 0.0,
    shift_difference_stderr: float = 0.0,
    transmission: float = 1.0,
) -> CoalescenceEstimate:
    """Quick ΔG‡ (kJ/mol) from a coalescence temperature (K) and a shift difference (Hz), equal populations.

    ΔG‡_c = R T_c ln( sqrt(2) kB T_c / (pi h dnu) ): the Gutowsky-Holm rate at coalescence
    k_c = pi dnu / sqrt(2) put into the Eyring equation. See :data:`COALESCENCE_CAVEAT`.

    Parameters
    ----------
    coalescence_temperature_k : float
        Coalescence temperature, K.
    shift_difference_hz : float
        Shift difference of the two sites without exchange, Hz.
    temperature_stderr : float
        Standard error of T_c, K.
    shift_difference_stderr : float
        Standard error of dnu, Hz.
    transmission : float
        Transmission coefficient kappa.

    Returns
    -------
    CoalescenceEstimate
    """
    t, dnu = float(coalescence_temperature_k), abs(float(shift_difference_hz))
    check_kelvin(t, "coalescence_temperature_k")
    if not dnu > 0:
        raise InputError("the shift difference must be non-zero (Hz)", where="shift_difference_hz")
    k_c = coalescence_rate_per_s(dnu)
    gibbs = eyring_barrier(k_c, t, transmission)
    d_dt = GAS_CONSTANT * (math.log(transmission * math.sqrt(2.0) * BOLTZMANN * t / (math.pi * PLANCK * dnu)) + 1) / 1e3
    d_dnu = -GAS_CONSTANT * t / dnu / 1e3
    stderr = math.hypot(d_dt * temperature_stderr, d_dnu * shift_difference_stderr)
    return CoalescenceEstimate(t, dnu, k_c, float(gibbs), stderr, float(transmission))
