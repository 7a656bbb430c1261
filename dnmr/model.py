"""The spin model: spectrometer, states (conformers, isomers or sites) and exchange processes.

A :class:`Model` joins the parts of :mod:`dnmr.modelparts` and is plain data that a chemist can build in a
notebook or load from a TOML file (:func:`dnmr.io.modelfile.load_model`).  Every state carries its own spin Hamiltonian — chemical shifts in
ppm and scalar couplings in Hz over the same set of named spins — plus an intrinsic linewidth and a
population (or a relative free energy).  Exchange processes carry a spin mapping and a forward rate
(or activation parameters, evaluated by the Eyring equation at the model's temperature).

The model owns its exchange jumps (:func:`exchange_jumps`: the processes with their detailed-balance
reverses, through the pure functions of :mod:`dnmr.kinetics`).  The checks of the whole live here and
those of each part in :mod:`dnmr.modelparts`, so a model made in code and a model read from a file are
held to the same rules; problems raise :class:`~dnmr.errors.InputError` naming the offending key.
"""
from __future__ import annotations

import dataclasses
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
    jumps_with_reverses,
    rate_ceiling_per_s,
    rate_matrix,
    spin_permutation,
)
from dnmr.modelparts import Exchange, Spectrometer, State, finite_number, parse_coupling_key
from dnmr.nuclei import nucleus


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
            finite_number(self.temperature_k, "conditions.temperature_k", positive=True)
            if self.temperature_k > MAX_TEMPERATURE_K:
                raise InputError(f"{self.temperature_k:g} K is above the {MAX_TEMPERATURE_K:g} K dnmr accepts",
                                 where="conditions.temperature_k")
        if self.window_ppm is not None:
            lo, hi = sorted(finite_number(v, "window.ppm", limit="ppm") for v in self.window_ppm)
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

    def exchange_permutations(self) -> list[tuple[int, ...]]:
        """The spin permutation of each exchange process (:func:`dnmr.kinetics.spin_permutation`), spins in
        the order of :attr:`all_spins`."""
        return [spin_permutation(self.all_spins, ex.spins) for ex in self.exchanges]

    def jumps(self) -> tuple[Jump, ...]:
        """All elementary jumps at the model's rates, reverses included (:func:`exchange_jumps`); worked out
        once per model."""
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
                          "or give the temperatures (dnmr stack --temperatures-k; Model.at_temperature in Python)",
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


def exchange_jumps(model: Model) -> list[Jump]:
    """All elementary jumps of `model` at its rates (s^-1), with the reverse processes implied by detailed
    balance (:func:`dnmr.kinetics.jumps_with_reverses`); :meth:`Model.jumps` keeps the result."""
    processes = [(model.state_index(ex.from_state), model.state_index(ex.to_state), permutation)
                 for ex, permutation in zip(model.exchanges, model.exchange_permutations())]
    return jumps_with_reverses(processes, model.rates(), model.populations(), model.state_names)
