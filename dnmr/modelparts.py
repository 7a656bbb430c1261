"""The parts of a model: the spectrometer, the states (each a spin Hamiltonian with a population) and the
exchange processes, each checked on its own; :class:`dnmr.model.Model` joins them and checks the whole.

Numbers are checked where they are given, so a model made in code and a model read from a file are held
to the same rules; problems raise :class:`~dnmr.errors.InputError` naming the offending key.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field

from dnmr.errors import InputError
from dnmr.kinetics import eyring_rate, eyring_rate_from_enthalpy
from dnmr.nuclei import Nucleus, check_frequency_mhz, nucleus


#: Largest magnitude accepted for each kind of number of a model (a larger one is a slip or damage,
#: and would overflow the arithmetic): shifts in ppm (heavy-nucleus shift ranges span about 2e4 ppm),
#: couplings and linewidths in Hz, relative populations, energies in kJ/mol, entropies in J/(mol K).
LIMITS = {"ppm": 1e5, "hz": 1e6, "weight": 1e15, "kj_mol": 1e3, "j_mol_k": 1e3}


def finite_number(value, where: str, *, positive: bool = False, nonnegative: bool = False,
                  limit: str | None = None) -> float:
    """`value` as a finite float, or an InputError at `where`: optionally positive or not negative, and at most
    :data:`LIMITS` [`limit`] in size (ppm, Hz, relative weight, kJ/mol or J/(mol K))."""
    try:
        x = float(value)
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"expected a number, got {value!r}", where=where) from None
    if isinstance(value, bool) or not math.isfinite(x):
        raise InputError(f"expected a finite number, got {value!r}", where=where)
    if positive and x <= 0:
        raise InputError(f"must be greater than 0, got {value!r}", where=where)
    if nonnegative and x < 0:
        raise InputError(f"must not be negative, got {value!r}", where=where)
    if limit is not None and abs(x) > LIMITS[limit]:
        raise InputError(f"{x:g} is out of range: at most {LIMITS[limit]:g} {limit.replace('_', '/')} in size;"
                         " check the value and its unit", where=where)
    return x


def coupling_key(a: str, b: str) -> str:
    """The canonical ``"A-B"`` name of the coupling between spins `a` and `b`."""
    return f"{a}-{b}"


def parse_coupling_key(key: str) -> tuple[str, str]:
    """Split ``"Ha-Hb"`` into ``("Ha", "Hb")``."""
    parts = [p.strip() for p in str(key).split("-")]
    if len(parts) != 2 or not all(parts):
        raise InputError(f'coupling "{key}" must name two spins as "A-B"')
    return parts[0], parts[1]


@dataclass(frozen=True)
class Spectrometer:
    """The observed nucleus and its Larmor frequency.

    Parameters
    ----------
    frequency_mhz : float
        Larmor frequency of the observed nucleus in MHz (e.g. 100.6 for 13C on a 400 MHz magnet).
    nucleus : str
        Observed nucleus in isotope notation (``"1H"``, ``"19F"``, ``"13C"``, ``"31P"`` ...).
    """

    frequency_mhz: float
    nucleus: str = "1H"

    def __post_init__(self):
        check_frequency_mhz(self.frequency_mhz, "spectrometer.frequency_mhz")
        iso = self.isotope
        if iso.spin != 0.5:
            raise InputError(
                f"observing {iso.symbol} (spin {iso.spin:g}) is not supported: the observed nucleus must be spin-1/2",
                where="spectrometer.nucleus",
            )
        object.__setattr__(self, "nucleus", iso.symbol)

    @property
    def isotope(self) -> Nucleus:
        """The :class:`~dnmr.nuclei.Nucleus` observed."""
        try:
            return nucleus(self.nucleus)
        except InputError as err:
            raise err.located(where="spectrometer.nucleus") from None

    @property
    def proton_mhz(self) -> float:
        """The field quoted as its 1H frequency (MHz), as the trade does."""
        return self.frequency_mhz * 100.0 / self.isotope.xi_percent

    @classmethod
    def from_proton_mhz(cls, proton_mhz: float, nucleus: str = "1H") -> "Spectrometer":
        """Spectrometer for `nucleus` on a magnet quoted by its 1H frequency `proton_mhz` (MHz)."""
        from dnmr.nuclei import nucleus as lookup

        return cls(frequency_mhz=lookup(nucleus).larmor_mhz(proton_mhz), nucleus=nucleus)


@dataclass(frozen=True)
class State:
    """One conformer, isomer or site: a spin Hamiltonian with a population.

    Parameters
    ----------
    name : str
        Label used by exchange processes.
    shifts_ppm : mapping of str to float
        Chemical shift (ppm) of each named spin.
    couplings_hz : mapping of str to float
        Scalar couplings (Hz) keyed ``"A-B"``; strong coupling is treated exactly.  A name may be an
        equivalent group (the coupling of each member) or a heteronucleus of the model; the model
        checks that every name is known.
    linewidth_hz : float
        Intrinsic full width at half height (Hz) without exchange.
    population : float, optional
        Relative weight (normalised over states); give this or `free_energy_kj_mol`.
    free_energy_kj_mol : float, optional
        Relative free energy (kJ/mol); populations then follow Boltzmann at the model temperature.
    r1_per_s : float or mapping of str to float, optional
        Longitudinal relaxation rate R1 = 1/T1 (s^-1) of the z-magnetisation of this state's spins, one
        number for all of them or one per spin (every spin named); used by magnetisation transfer
        (:mod:`dnmr.engine.longitudinal`), not by lineshapes.
    """

    name: str
    shifts_ppm: Mapping[str, float]
    couplings_hz: Mapping[str, float] = field(default_factory=dict)
    linewidth_hz: float = 1.0
    population: float | None = None
    free_energy_kj_mol: float | None = None
    r1_per_s: float | Mapping[str, float] | None = None

    def __post_init__(self):
        if not str(self.name):
            raise InputError("every state needs a non-empty name", where="name")
        if not self.shifts_ppm:
            raise InputError("a state needs at least one spin", where="shifts_ppm")
        shifts = {str(k): finite_number(v, f"shifts_ppm.{k}", limit="ppm") for k, v in self.shifts_ppm.items()}
        order = {name: (0, i, "") for i, name in enumerate(shifts)}  # then heteronuclei by name
        couplings: dict[str, float] = {}
        for key, value in self.couplings_hz.items():
            a, b = parse_coupling_key(key)
            if a == b:
                raise InputError(f'coupling "{key}" joins a spin to itself', where=f"couplings_hz.{key}")
            canon = coupling_key(*sorted((a, b), key=lambda name: order.get(name, (1, 0, name))))
            if canon in couplings:
                raise InputError(f'coupling between {a} and {b} given twice', where=f"couplings_hz.{key}")
            couplings[canon] = finite_number(value, f"couplings_hz.{key}", limit="hz")
        finite_number(self.linewidth_hz, "linewidth_hz", positive=True, limit="hz")
        if (self.population is None) == (self.free_energy_kj_mol is None):
            raise InputError("give either population or free_energy_kj_mol", where="population")
        if self.population is not None:
            finite_number(self.population, "population", nonnegative=True, limit="weight")
        else:
            finite_number(self.free_energy_kj_mol, "free_energy_kj_mol", limit="kj_mol")
        object.__setattr__(self, "shifts_ppm", shifts)
        object.__setattr__(self, "couplings_hz", couplings)
        object.__setattr__(self, "r1_per_s", self._checked_r1())

    def _checked_r1(self) -> float | dict[str, float] | None:
        """R1 (s^-1): None, one positive number, or a positive number for every spin of the state."""
        if self.r1_per_s is None or not isinstance(self.r1_per_s, Mapping):
            return None if self.r1_per_s is None else finite_number(self.r1_per_s, "r1_per_s", positive=True)
        rates = {str(k): finite_number(v, f"r1_per_s.{k}", positive=True) for k, v in self.r1_per_s.items()}
        unknown = sorted(set(rates) - set(self.shifts_ppm))
        missing = [spin for spin in self.shifts_ppm if spin not in rates]
        if unknown or missing:
            bad = f'unknown spin "{unknown[0]}"' if unknown else f'no rate for spin "{missing[0]}"'
            raise InputError(f"{bad}; give one number for the state or one per spin of {', '.join(self.shifts_ppm)}",
                             where="r1_per_s")
        return rates

    def r1_of(self, spin: str) -> float | None:
        """Longitudinal relaxation rate R1 (s^-1) of `spin` in this state, None when not given."""
        return self.r1_per_s.get(spin) if isinstance(self.r1_per_s, Mapping) else self.r1_per_s

    @property
    def spins(self) -> list[str]:
        """Spin names in the order given."""
        return list(self.shifts_ppm)

    def coupling(self, a: str, b: str) -> float:
        """Scalar coupling (Hz) between spins `a` and `b` (0 when not given)."""
        return self.couplings_hz.get(coupling_key(a, b), self.couplings_hz.get(coupling_key(b, a), 0.0))


@dataclass(frozen=True)
class Exchange:
    """A first-order exchange process from one state to another (or within one state).

    Parameters
    ----------
    from_state, to_state : str
        State names; equal names make a mutual exchange (a permutation of the spins of one state).
    spins : mapping of str to str
        Spin in `from_state` -> the spin it becomes in `to_state`; unlisted spins keep their names.
    rate_per_s : float, optional
        Forward first-order rate constant (s^-1).
    barrier_kj_mol : float, optional
        Free energy of activation ΔG‡ (kJ/mol), used at the model temperature.
    enthalpy_kj_mol, entropy_j_mol_k : float, optional
        ΔH‡ (kJ/mol) and ΔS‡ (J/(mol K)), used at the model temperature.
    name : str, optional
        Label in reports; processes without one are called by their index.
    """

    from_state: str
    to_state: str
    spins: Mapping[str, str] = field(default_factory=dict)
    rate_per_s: float | None = None
    barrier_kj_mol: float | None = None
    enthalpy_kj_mol: float | None = None
    entropy_j_mol_k: float | None = None
    name: str | None = None

    def __post_init__(self):
        given = [
            self.rate_per_s is not None,
            self.barrier_kj_mol is not None,
            self.enthalpy_kj_mol is not None or self.entropy_j_mol_k is not None,
        ]
        if sum(given) != 1:
            raise InputError(
                "give exactly one of rate_per_s, barrier_kj_mol, or enthalpy_kj_mol with entropy_j_mol_k",
                where="rate_per_s",
            )
        if self.rate_per_s is not None:
            finite_number(self.rate_per_s, "rate_per_s", nonnegative=True)
        if self.barrier_kj_mol is not None:
            finite_number(self.barrier_kj_mol, "barrier_kj_mol", limit="kj_mol")
        if given[2]:
            if self.enthalpy_kj_mol is None or self.entropy_j_mol_k is None:
                missing = "entropy_j_mol_k" if self.entropy_j_mol_k is None else "enthalpy_kj_mol"
                raise InputError("enthalpy_kj_mol and entropy_j_mol_k go together", where=missing)
            finite_number(self.enthalpy_kj_mol, "enthalpy_kj_mol", limit="kj_mol")
            finite_number(self.entropy_j_mol_k, "entropy_j_mol_k", limit="j_mol_k")
        object.__setattr__(self, "spins", {str(k): str(v) for k, v in self.spins.items()})

    @property
    def is_mutual(self) -> bool:
        """True for a permutation of the spins within one state."""
        return self.from_state == self.to_state

    @property
    def needs_temperature(self) -> bool:
        """True when the rate comes from activation parameters."""
        return self.rate_per_s is None

    def rate_at(self, temperature_k: float | None, transmission: float = 1.0) -> float:
        """Forward rate constant (s^-1) at `temperature_k` (K)."""
        if self.rate_per_s is not None:
            return float(self.rate_per_s)
        if temperature_k is None:
            raise InputError("activation parameters need conditions.temperature_k", where="conditions.temperature_k")
        if self.barrier_kj_mol is not None:
            return eyring_rate(self.barrier_kj_mol, temperature_k, transmission)
        return eyring_rate_from_enthalpy(self.enthalpy_kj_mol, self.entropy_j_mol_k, temperature_k, transmission)
