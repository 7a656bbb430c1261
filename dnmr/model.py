"""The spin model: spectrometer, states (conformers, isomers or sites) and exchange processes.

A :class:`Model` is plain data that a chemist can build in a notebook or load from a TOML file
(:func:`dnmr.io.modelfile.load_model`).  Every state carries its own spin Hamiltonian — chemical shifts in
ppm and scalar couplings in Hz over the same set of named spins — plus an intrinsic linewidth and a
population (or a relative free energy).  Exchange processes carry a spin mapping and a forward rate
(or activation parameters, evaluated by the Eyring equation at the model's temperature).

All checks live here, so a model made in code and a model read from a file are held to the same rules;
problems raise :class:`~dnmr.errors.InputError` naming the offending key.
"""
from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from itertools import combinations

import numpy as np

from dnmr.errors import InputError
from dnmr.kinetics import (
    MAX_TEMPERATURE_K,
    STANDARD_TEMPERATURE_K,
    Jump,
    boltzmann_populations,
    check_stationary,
    exchange_jumps,
    eyring_rate,
    eyring_rate_from_enthalpy,
    rate_ceiling_per_s,
    rate_matrix,
)
from dnmr.nuclei import Nucleus, check_frequency_mhz, nucleus


#: Largest magnitude accepted for each kind of number of a model (a larger one is a slip or damage,
#: and would overflow the arithmetic): shifts in ppm (heavy-nucleus shift ranges span about 2e4 ppm),
#: couplings and linewidths in Hz, relative populations, energies in kJ/mol, entropies in J/(mol K).
LIMITS = {"ppm": 1e5, "hz": 1e6, "weight": 1e15, "kj_mol": 1e3, "j_mol_k": 1e3}


def _finite(value, where: str, *, positive: bool = False, nonnegative: bool = False,
            limit: str | None = None) -> float:
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
        shifts = {str(k): _finite(v, f"shifts_ppm.{k}", limit="ppm") for k, v in self.shifts_ppm.items()}
        order = {name: (0, i, "") for i, name in enumerate(shifts)}  # then heteronuclei by name
        couplings: dict[str, float] = {}
        for key, value in self.couplings_hz.items():
            a, b = parse_coupling_key(key)
            if a == b:
                raise InputError(f'coupling "{key}" joins a spin to itself', where=f"couplings_hz.{key}")
            canon = coupling_key(*sorted((a, b), key=lambda name: order.get(name, (1, 0, name))))
            if canon in couplings:
                raise InputError(f'coupling between {a} and {b} given twice', where=f"couplings_hz.{key}")
            couplings[canon] = _finite(value, f"couplings_hz.{key}", limit="hz")
        _finite(self.linewidth_hz, "linewidth_hz", positive=True, limit="hz")
        if (self.population is None) == (self.free_energy_kj_mol is None):
            raise InputError("give either population or free_energy_kj_mol", where="population")
        if self.population is not None:
            _finite(self.population, "population", nonnegative=True, limit="weight")
        else:
            _finite(self.free_energy_kj_mol, "free_energy_kj_mol", limit="kj_mol")
        object.__setattr__(self, "shifts_ppm", shifts)
        object.__setattr__(self, "couplings_hz", couplings)
        object.__setattr__(self, "r1_per_s", self._checked_r1())

    def _checked_r1(self) -> float | dict[str, float] | None:
        """R1 (s^-1): None, one positive number, or a positive number for every spin of the state."""
        if self.r1_per_s is None or not isinstance(self.r1_per_s, Mapping):
            return None if self.r1_per_s is None else _finite(self.r1_per_s, "r1_per_s", positive=True)
        rates = {str(k): _finite(v, f"r1_per_s.{k}", positive=True) for k, v in self.r1_per_s.items()}
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
        Free energy of activation dG‡ (kJ/mol), used at the model temperature.
    enthalpy_kj_mol, entropy_j_mol_k : float, optional
        dH‡ (kJ/mol) and dS‡ (J/(mol K)), used at the model temperature.
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
            _finite(self.rate_per_s, "rate_per_s", nonnegative=True)
        if self.barrier_kj_mol is not None:
            _finite(self.barrier_kj_mol, "barrier_kj_mol", limit="kj_mol")
        if given[2]:
            if self.enthalpy_kj_mol is None or self.entropy_j_mol_k is None:
                missing = "entropy_j_mol_k" if self.entropy_j_mol_k is None else "enthalpy_kj_mol"
                raise InputError("enthalpy_kj_mol and entropy_j_mol_k go together", where=missing)
            _finite(self.enthalpy_kj_mol, "enthalpy_kj_mol", limit="kj_mol")
            _finite(self.entropy_j_mol_k, "entropy_j_mol_k", limit="j_mol_k")
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


@dataclass(frozen=True)
class Model:
    """A dynamic NMR problem: spectrometer, states and exchange processes.

    Parameters
    ----------
    spectrometer : Spectrometer
        Observed nucleus and its frequency.
    states : sequence of State
        Every state names the same set of spins.
    exchanges : sequence of Exchange
        Exchange processes (reverse processes are implied by detailed balance).
    temperature_k : float, optional
        Sample temperature (K); needed where energies replace rates or populations.
    window_ppm : (float, float), optional
        Spectral window (ppm, either order); default covers every line with margin.
    points : int, optional
        Number of points in the window; default resolves the narrowest line.
    title : str
        Free text.
    groups : mapping of str to int, optional
        Magnetically equivalent groups: spin name -> number of nuclei it stands for (``{"Me": 3}``).
        The group is equivalent in every state and moved as a whole; shifts and couplings name it like
        one spin (a coupling to a group is the coupling of each member).
    heteronuclei : mapping of str to str, optional
        Nuclei of other isotopes coupled to the observed spins (``{"F1": "19F"}``), in the weak-coupling
        limit; they have no shift in the observed spectrum, only couplings.  A heteronucleus may be a
        group too.
    source : str, optional
        The model file, for messages.

    A model whose rates or populations are given as energies may leave `temperature_k` out; it then
    needs one (:meth:`at_temperature`) before it can be simulated.
    """

    spectrometer: Spectrometer
    states: tuple[State, ...]
    exchanges: tuple[Exchange, ...] = ()
    temperature_k: float | None = None
    window_ppm: tuple[float, float] | None = None
    points: int | None = None
    title: str = ""
    groups: Mapping[str, int] = field(default_factory=dict)
    heteronuclei: Mapping[str, str] = field(default_factory=dict)
    source: str | None = field(default=None, compare=False)

    def __post_init__(self):
        object.__setattr__(self, "states", tuple(self.states))
        object.__setattr__(self, "exchanges", tuple(self.exchanges))
        if not self.states:
            raise InputError("a model needs at least one [[state]]", where="state")
        if self.temperature_k is not None:
            _finite(self.temperature_k, "conditions.temperature_k", positive=True)
            if self.temperature_k > MAX_TEMPERATURE_K:
                raise InputError(f"{self.temperature_k:g} K is above the {MAX_TEMPERATURE_K:g} K dnmr accepts",
                                 where="conditions.temperature_k")
        if self.window_ppm is not None:
            lo, hi = sorted(_finite(v, "window.ppm", limit="ppm") for v in self.window_ppm)
            if lo == hi:
                raise InputError("the window needs two different limits", where="window.ppm")
            object.__setattr__(self, "window_ppm", (lo, hi))
        if self.points is not None and (int(self.points) != self.points or not 16 <= self.points <= 2**22):
            raise InputError(f"points must be a whole number from 16 to {2**22}, got {self.points!r}", where="window.points")
        object.__setattr__(self, "heteronuclei", self._checked_heteronuclei())
        self._check_states()
        object.__setattr__(self, "groups", self._checked_groups())
        self._check_couplings()
        self._check_exchanges()
        if self.exchanges and not self.lacks_temperature:
            check_stationary(rate_matrix(len(self.states), self.jumps()), self.populations())

    # --- checks -------------------------------------------------------------------------------
    def _checked_heteronuclei(self) -> dict[str, str]:
        observed = self.spectrometer.isotope.symbol
        checked = {}
        for name, symbol in self.heteronuclei.items():
            where = f"heteronuclei.{name}"
            if not isinstance(symbol, str):
                raise InputError(f'expected an isotope such as "19F", got {symbol!r}', where=where)
            try:
                isotope = nucleus(symbol)
            except InputError as err:
                raise err.located(where=where) from None
            if isotope.symbol == observed:
                raise InputError(
                    f"{observed} is the observed nucleus; give {name} a shift in shifts_ppm so that its"
                    " couplings are treated exactly", where=where)
            for i, state in enumerate(self.states):
                if name in state.shifts_ppm:
                    raise InputError(
                        f'heteronucleus "{name}" has no shift in the {observed} spectrum; leave it out of'
                        " shifts_ppm and give only its couplings", where=f"state[{i}].shifts_ppm.{name}")
            checked[str(name)] = isotope.symbol
        return checked

    def _checked_groups(self) -> dict[str, int]:
        known = self.all_spins
        checked = {}
        for name, count in self.groups.items():
            where = f"groups.{name}"
            if name not in known:
                raise InputError(f'unknown spin "{name}"; spins are {", ".join(known)}', where=where)
            if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1:
                raise InputError(f"expected the number of nuclei in the group (1 or more), got {count!r}",
                                 where=where)
            checked[str(name)] = int(count)
        return checked

    def _check_couplings(self) -> None:
        known = self.all_spins
        for i, state in enumerate(self.states):
            for key in state.couplings_hz:
                for spin in parse_coupling_key(key):
                    if spin not in known:
                        raise InputError(
                            f'coupling "{key}" names spin "{spin}", which has no shift in this state and is'
                            f" not a heteronucleus; known spins: {', '.join(known)}",
                            where=f"state[{i}].couplings_hz.{key}")

    def _check_states(self) -> None:
        names = [s.name for s in self.states]
        spins = set(self.states[0].spins)
        for i, state in enumerate(self.states):
            if names.count(state.name) > 1:
                raise InputError(f'state name "{state.name}" is used twice', where=f"state[{i}].name")
            if set(state.spins) != spins:
                odd = sorted(set(state.spins) ^ spins)
                raise InputError(
                    f'state "{state.name}" must name the same spins as state "{self.states[0].name}"'
                    f" (differs in {', '.join(odd)})",
                    where=f"state[{i}].shifts_ppm",
                )
        kinds = {s.population is None for s in self.states}
        if len(kinds) > 1:
            raise InputError("give population for every state or free_energy_kj_mol for every state", where="state")

    def _check_exchanges(self) -> None:
        names = {s.name: s for s in self.states}
        for i, ex in enumerate(self.exchanges):
            where = f"exchange[{i}]"
            for key, state in (("from", ex.from_state), ("to", ex.to_state)):
                if state not in names:
                    raise InputError(
                        f'unknown state "{state}"; states are {", ".join(names)}', where=f"{where}.{key}"
                    )
            spins = names[ex.from_state].spins + list(self.heteronuclei)
            for src, dst in ex.spins.items():
                if src not in spins or dst not in spins:
                    bad = src if src not in spins else dst
                    raise InputError(f'unknown spin "{bad}"; spins are {", ".join(spins)}', where=f"{where}.spins")
                self._check_same_kind(src, dst, f"{where}.spins.{src}")
            images = [ex.spins.get(s, s) for s in spins]
            if len(set(images)) != len(images):
                clash = sorted({x for x in images if images.count(x) > 1})
                raise InputError(
                    f"the spin mapping is not one-to-one: {', '.join(clash)} would receive two spins;"
                    " list every spin that moves",
                    where=f"{where}.spins",
                )
            if ex.is_mutual and images == spins:
                raise InputError(
                    "a mutual exchange (from == to) must move at least one spin", where=f"{where}.spins"
                )
            self._check_rate(ex, where)

    def _check_rate(self, ex: "Exchange", where: str) -> None:
        """Refuse a rate above kB T/h, the Eyring rate of a zero barrier: no first-order process is faster
        (and the lineshape of far faster rates loses its promised integral to rounding)."""
        temperature = self.temperature_k or STANDARD_TEMPERATURE_K
        rate, ceiling = ex.rate_at(temperature), rate_ceiling_per_s(temperature)
        if rate <= ceiling:
            return
        key = "rate_per_s" if ex.rate_per_s is not None else "barrier_kj_mol" if ex.barrier_kj_mol is not None \
            else "enthalpy_kj_mol"
        at = f"{temperature:g} K" + ("" if self.temperature_k else " (no conditions.temperature_k given)")
        raise InputError(f"gives a rate of {rate:.3g} s^-1, above kB T/h = {ceiling:.3g} s^-1 at {at}, the fastest"
                         " any first-order process can be (the Eyring rate of a zero barrier); check the value"
                         " and its unit", where=f"{where}.{key}")

    def _kind(self, spin: str) -> str:
        """What a spin is, in words: observed or which heteronucleus, and how many nuclei."""
        isotope = self.heteronuclei.get(spin, self.spectrometer.isotope.symbol)
        count = self.group_size(spin)
        role = "observed" if spin not in self.heteronuclei else "heteronucleus"
        return f"{role} {isotope}" + (f", a group of {count}" if count > 1 else "")

    def _check_same_kind(self, src: str, dst: str, where: str) -> None:
        """A mapping keeps each spin's kind: observed or the same heteronucleus, and the group size."""
        if self._kind(src) != self._kind(dst):
            raise InputError(
                f'maps "{src}" ({self._kind(src)}) onto "{dst}" ({self._kind(dst)}); exchange moves a spin'
                " only onto one of the same kind (a group onto a group of the same size)", where=where)

    # --- derived quantities -----------------------------------------------------------------
    @property
    def spins(self) -> list[str]:
        """Observed spin names (a group counts as one) in the order of the first state."""
        return self.states[0].spins

    @property
    def all_spins(self) -> list[str]:
        """Observed spins, then heteronuclei: the order of the permutations of exchange jumps."""
        return self.spins + list(self.heteronuclei)

    def group_size(self, spin: str) -> int:
        """Number of nuclei that `spin` stands for (1 unless it is a group)."""
        return self.groups.get(spin, 1)

    @property
    def observed_nuclei(self) -> int:
        """Number of observed nuclei, counting each member of a group: the spectrum's integral per state."""
        return sum(self.group_size(spin) for spin in self.spins)

    @property
    def is_plain(self) -> bool:
        """True when every spin is a single observed spin-1/2 (no groups, no heteronuclei)."""
        return not self.heteronuclei and all(count == 1 for count in self.groups.values())

    @property
    def state_names(self) -> list[str]:
        """State names in order."""
        return [s.name for s in self.states]

    def state_index(self, name: str) -> int:
        """Index of the state called `name`."""
        return self.state_names.index(name)

    def process_names(self) -> list[str]:
        """Name of each exchange process (its index as text when unnamed)."""
        return [ex.name if ex.name else str(i) for i, ex in enumerate(self.exchanges)]

    def populations(self) -> np.ndarray:
        """Equilibrium populations of the states (sum 1); worked out once per model (a model is immutable)."""
        cached = self.__dict__.get("_populations")
        if cached is None:
            cached = self._equilibrium_populations()
            object.__setattr__(self, "_populations", cached)
        return cached.copy()

    def jumps(self) -> tuple[Jump, ...]:
        """All elementary jumps at the model's rates, reverses included (:func:`dnmr.kinetics.exchange_jumps`);
        worked out once per model."""
        cached = self.__dict__.get("_jumps")
        if cached is None:
            cached = tuple(exchange_jumps(self))
            object.__setattr__(self, "_jumps", cached)
        return cached

    @property
    def depends_on_temperature(self) -> bool:
        """True when some rate or the populations are given as energies, so that they change with T."""
        return any(ex.needs_temperature for ex in self.exchanges) or self.states[0].population is None

    @property
    def lacks_temperature(self) -> bool:
        """True when rates or populations are given as energies and no temperature is set."""
        return self.depends_on_temperature and self.temperature_k is None

    def _no_temperature(self, what: str, where: str) -> InputError:
        return InputError(f"{what} needs a temperature: add [conditions] temperature_k = <K> to the model file, "
                          "or give the temperatures (dnmr stack --temperatures; Model.at_temperature in Python)",
                          self.source, where)

    def _equilibrium_populations(self) -> np.ndarray:
        if self.states[0].population is None:
            if self.temperature_k is None:
                raise self._no_temperature("free_energy_kj_mol (populations from free energies)", "state[0].free_energy_kj_mol")
            return boltzmann_populations([s.free_energy_kj_mol for s in self.states], self.temperature_k)
        p = np.array([s.population for s in self.states], dtype=float)
        if p.sum() <= 0:
            raise InputError("populations are all zero; give positive relative weights", where="state.population")
        return p / p.sum()

    def rates(self) -> np.ndarray:
        """Forward rate constant (s^-1) of each exchange process at the model temperature."""
        if self.temperature_k is None:
            for i, ex in enumerate(self.exchanges):
                if ex.needs_temperature:
                    raise self._no_temperature("a rate given by activation parameters", f"exchange[{i}]")
        return np.array([ex.rate_at(self.temperature_k) for ex in self.exchanges], dtype=float)

    def shifts_hz(self) -> np.ndarray:
        """Shifts (Hz from 0 ppm), array (n_states, n_spins), spins in the order of ``self.spins``."""
        sf = self.spectrometer.frequency_mhz
        return np.array([[s.shifts_ppm[name] * sf for name in self.spins] for s in self.states])

    def couplings_matrix_hz(self) -> np.ndarray:
        """Scalar couplings (Hz), array (n_states, n_pairs) over the pairs i < j of ``self.spins``."""
        pairs = list(combinations(self.spins, 2))
        return np.array([[s.coupling(a, b) for a, b in pairs] for s in self.states]).reshape(len(self.states), len(pairs))

    def largest_m(self, spin: str) -> float:
        """The largest total magnetic quantum number of `spin`: its nuclear spin times the group size."""
        isotope = self.heteronuclei.get(spin, self.spectrometer.nucleus)
        return self.group_size(spin) * nucleus(isotope).spin

    def coupling_span_hz(self) -> np.ndarray:
        """Per state, a bound (Hz) on how far couplings spread an observed multiplet from its shift.

        The sum, over pairs with an observed spin, of |J| x 2 max(m_a, m_b) with m the largest total
        magnetic quantum number of each (:meth:`largest_m`); that is |J| per pair of spins-1/2.
        """
        observed = set(self.spins)
        spans = []
        for state in self.states:
            pairs = ((parse_coupling_key(key), j) for key, j in state.couplings_hz.items())
            spans.append(sum(abs(j) * 2.0 * max(self.largest_m(a), self.largest_m(b))
                             for (a, b), j in pairs if a in observed or b in observed))
        return np.array(spans, dtype=float)

    def linewidths_hz(self) -> np.ndarray:
        """Intrinsic linewidth (FWHM, Hz) of each state."""
        return np.array([s.linewidth_hz for s in self.states], dtype=float)

    # --- variations ---------------------------------------------------------------------------
    def replace(self, **changes) -> "Model":
        """A copy with some fields changed (``dataclasses.replace``)."""
        return dataclasses.replace(self, **changes)

    def at_temperature(self, temperature_k: float) -> "Model":
        """The same model at another temperature (K): Eyring rates and Boltzmann populations follow."""
        return self.replace(temperature_k=float(temperature_k))

    def with_rates(self, rates_per_s) -> "Model":
        """A copy whose exchange processes have the given forward rates (s^-1), in process order.

        `rates_per_s` is a sequence (one per process) or a mapping from process name to rate.
        """
        return self.replace(exchanges=self.exchanges_at_rates(rates_per_s))

    def exchanges_at_rates(self, rates_per_s) -> tuple[Exchange, ...]:
        """The exchange processes with the given forward rates (s^-1; a sequence in process order or a
        mapping from process name to rate), for :meth:`replace` together with other changes."""
        names = self.process_names()
        if isinstance(rates_per_s, Mapping):
            unknown = set(rates_per_s) - set(names)
            if unknown:
                raise InputError(f"unknown exchange process {sorted(unknown)}; processes are {names}")
            values = [rates_per_s.get(n) for n in names]
        else:
            values = list(rates_per_s)
            if len(values) != len(names):
                raise InputError(f"expected {len(names)} rates, one per exchange process, got {len(values)}")
        return tuple(
            ex if k is None else dataclasses.replace(
                ex, rate_per_s=float(k), barrier_kj_mol=None, enthalpy_kj_mol=None, entropy_j_mol_k=None
            )
            for ex, k in zip(self.exchanges, values)
        )

    def with_populations(self, populations) -> "Model":
        """A copy with the given relative populations, one per state in order."""
        values = list(populations)
        if len(values) != len(self.states):
            raise InputError(f"expected {len(self.states)} populations, one per state, got {len(values)}")
        states = tuple(
            dataclasses.replace(s, population=float(p), free_energy_kj_mol=None) for s, p in zip(self.states, values)
        )
        return self.replace(states=states)
