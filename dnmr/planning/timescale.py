"""The NMR timescale: slow, intermediate and fast exchange, and what becomes equivalent when it is fast.

Signals and pairs
    An exchange process moves a nucleus from one place (state, spin) to another: a site exchange takes
    every spin of state a to state b (renamed by the mapping), a mutual exchange permutes the spins of one
    state.  Each place it leaves and the place it arrives at form an *exchanging pair* of signals
    (:func:`exchanging_pairs`).  Where the shift stays but couplings of the nucleus change (a mutual
    exchange that swaps two 19F partners coupled differently to an observed proton, or equal-shift spins
    that trade couplings), the pair is a *coupling-averaging* pair: each multiplet component moves by
    sum_z dJ_z m_z (dJ_z the change of the coupling to partner z, m_z that partner's magnetic quantum
    number), so the component shift sum_z |dJ_z| max(m_z) plays the part of the shift difference below:
    |J(H,F1) - J(H,F2)| for a swap of two fluorines, |dJ| / 2 for one spin-1/2 partner whose coupling
    changes.  Pairs whose signal changes in neither way are left out (there is nothing to see).

Regimes (quantitative criteria, for each pair on its own as two sites)
    dnu is the shift difference, or the component shift of a coupling-averaging pair.
    Slow exchange: the broadening of each signal, k_out / pi (FWHM, Hz; k_out the rate at which the
    nucleus leaves that place), stays below a fraction f of the intrinsic linewidth w.
    Fast exchange: the excess width of the averaged line, p1 p2 (2 pi dnu)^2 / (pi (k_out1 + k_out2)),
    stays below f times the averaged linewidth.  Both are the limits of the McConnell equations
    (J. Chem. Phys. 28, 430 (1958)).  In between lies intermediate exchange, which is also the window in
    which a lineshape fit measures the rate.  f defaults to 0.1: a choice, about the broadening a careful
    fit resolves at good signal-to-noise; for a shift pair couplings are left out of these thresholds.

Magnetisation transfer (below the lineshape window)
    When exchange is too slow to broaden the lines it still carries z-magnetisation from site to site
    within T1: selective inversion, saturation transfer and 2D exchange (``dnmr transfer``) measure k
    from about R1/5 (slower, relaxation erases the transfer before it shows) to a few tens s^-1 (faster,
    the sites equalise within the shortest practical delays and the lines begin to broaden, where the
    lineshapes take over); both are common practice.  R1 is the mean of the model file's ``r1_per_s``
    over its sites, a value given instead, or else a typical 1 s^-1 (T1 about 1 s, 1H of small molecules
    in mobile solvents; from memory) — stated in every report, since the window's lower end moves with
    it.  R1 is taken as the same at every temperature.

Fast-exchange limit
    When exchange is fast, every nucleus feels the average of the Hamiltonians of the places it visits.
    The molecule wanders over configurations (state, relabelling of the spins); at equilibrium it spends
    p_a / n_a of the time in each of the n_a configurations of state a that the exchange reaches, so the
    averaged shift of a spin and the averaged coupling of two spins are those weighted means, following
    each nucleus through the mappings.  Nuclei with the same averaged shift are chemically equivalent;
    if they also couple alike to every other spin they are magnetically equivalent, and the couplings
    among them no longer show: the coupling within such a group moves every level of an observable
    manifold alike (two equivalent coupled spins give one line).
"""
from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from itertools import combinations

import numpy as np

from dnmr.activation.parameters import ActivationParameters
from dnmr.errors import InputError
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State, coupling_key, parse_coupling_key
from dnmr.notebook import NotebookView

#: The broadening that makes exchange visible, as a fraction of the intrinsic linewidth (a choice).
DEFAULT_DETECTABLE_FRACTION = 0.1
#: Shifts (ppm) and couplings (Hz) closer than these are taken as equal.
SHIFT_TOLERANCE_PPM = 1e-6
COUPLING_TOLERANCE_HZ = 1e-6
#: Largest number of configurations (state, relabelling) followed for the fast-exchange average.
MAX_CONFIGURATIONS = 200_000
REGIMES = ("slow", "intermediate", "fast")
#: Report line for coupling-averaging pairs, whose |dnu| column is their component shift.
COUPLING_PAIR_NOTE = ("signals marked (J to ...) keep their shift while the exchange changes those couplings;"
                      " their |dnu| is the shift of their multiplet components, sum of |dJ| m (Hz)")


# --- activation parameters -------------------------------------------------------------------

def process_activations(model: Model, activation: ActivationParameters | None = None,
                        process: str | None = None) -> dict[int, ActivationParameters]:
    """Activation parameters of each process: `activation` for `process` (or for every process when
    `process` is None), otherwise what the model file gives; processes given only a rate are absent.

    Raises
    ------
    InputError
        When `process` names no process of the model.
    """
    names = model.process_names()
    if process is not None and process not in names:
        raise InputError(f'unknown exchange process "{process}"; processes are {", ".join(names)}', where="process")
    out: dict[int, ActivationParameters] = {}
    for i, (name, exchange) in enumerate(zip(names, model.exchanges)):
        given = activation if activation is not None and process in (None, name) else None
        found = given or ActivationParameters.of_exchange(exchange)
        if found is not None:
            out[i] = found
    return out


def model_at(model: Model, temperature_k: float, activations: dict[int, ActivationParameters]) -> Model:
    """`model` at `temperature_k` (K), the processes in `activations` at their Eyring rates."""
    moved = model.at_temperature(temperature_k)
    rates = moved.rates()
    for i, act in activations.items():
        rates[i] = act.rate_at(temperature_k)
    return moved.with_rates(rates)


def at_field(model: Model, proton_mhz: float) -> Model:
    """`model` on a magnet whose 1H frequency is `proton_mhz` (MHz), same nucleus, shifts in ppm kept."""
    return model.replace(spectrometer=Spectrometer.from_proton_mhz(proton_mhz, model.spectrometer.nucleus))


def checked_fields(model: Model, frequencies_mhz: Sequence[float] | None) -> list[float]:
    """Fields (1H MHz) to look at: those given, or the model's own."""
    if frequencies_mhz is None:
        return [model.spectrometer.proton_mhz]
    values = [float(f) for f in frequencies_mhz]
    if not values or not all(math.isfinite(f) and f > 0 for f in values):
        raise InputError(f"spectrometer frequencies must be positive MHz (1H), got {list(frequencies_mhz)!r}",
                         where="frequencies_mhz")
    return values


def populations_follow_temperature(model: Model) -> bool:
    """True when the populations come from free energies (and so change with temperature)."""
    return model.states[0].population is None


def solve_temperature(activation: ActivationParameters, rate_at: Callable[[float | None], float | None],
                      temperature_dependent: bool, tolerance_k: float = 1e-3, max_rounds: int = 50) -> float | None:
    """Temperature (K) at which the Eyring rate meets a target rate that may itself depend on temperature.

    Parameters
    ----------
    activation : ActivationParameters
    rate_at : callable
        Target forward rate (s^-1) at a temperature (K); called with None first (the model as given).
    temperature_dependent : bool
        Whether the target changes with temperature (populations from free energies); then the
        temperature is found by repeated substitution until it moves less than `tolerance_k` (K).
    """
    t = None
    for _ in range(max_rounds):
        rate = rate_at(t)
        if rate is None or not rate > 0:
            return None
        t_new = activation.temperature_at(rate)
        if t_new is None or not temperature_dependent or (t is not None and abs(t_new - t) < tolerance_k):
            return t_new
        t = t_new
    raise InputError("the temperature did not settle: the populations change too fast with temperature",
                     where="free_energy_kj_mol")


# --- exchanging pairs ------------------------------------------------------------------------

@dataclass(frozen=True)
class CouplingChange:
    """A coupling of an exchanging nucleus that one jump of the process changes.

    Attributes
    ----------
    partner, partner_after : str
        The coupling partner in the state left, and the spin that nucleus becomes in the state reached.
    before_hz, after_hz : float
        The coupling (Hz) to that partner nucleus before and after the jump.
    largest_m : float
        Largest total magnetic quantum number of the partner (its nuclear spin times its group size).
    """

    partner: str
    partner_after: str
    before_hz: float
    after_hz: float
    largest_m: float

    @property
    def difference_hz(self) -> float:
        """dJ = after - before (Hz)."""
        return self.after_hz - self.before_hz

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"partner": self.partner, "partner_after": self.partner_after, "before_hz": self.before_hz,
                "after_hz": self.after_hz, "difference_hz": self.difference_hz, "largest_m": self.largest_m}


@dataclass(frozen=True)
class ExchangingPair:
    """Two places (state, spin) between which one exchange process carries a nucleus.

    Attributes
    ----------
    process : int
        Index of the exchange process.
    process_name : str
        Its name (its index as text when unnamed).
    first, second : (str, str)
        (state, spin) the nucleus leaves and the one it arrives at.
    cluster : tuple of str
        The spins that the process permutes among themselves together with this one (a cycle of its
        mapping); a plain site exchange has a cluster of one.
    mapping : dict of str to str
        The process's mapping restricted to the pair's own spins: the cluster and, for a
        coupling-averaging pair, the cycles of the partners whose couplings change.
    mutual : bool
        True for a mutual exchange (a permutation within one state).
    coupling_changes : tuple of CouplingChange
        Empty for a pair whose shift changes; otherwise (equal shifts) the couplings the process changes.
    """

    process: int
    process_name: str
    first: tuple[str, str]
    second: tuple[str, str]
    cluster: tuple[str, ...]
    mapping: dict = field(hash=False, compare=False)
    mutual: bool = False
    coupling_changes: tuple[CouplingChange, ...] = ()

    @property
    def label(self) -> str:
        """``"Ha(anti) <-> Ha(gauche)"``; a coupling-averaging pair adds its partners, ``"H(s) (J to F1, F2)"``."""
        text = f"{self.first[1]}({self.first[0]})"
        if self.second != self.first:
            text += f" <-> {self.second[1]}({self.second[0]})"
        if self.coupling_changes:
            text += f" (J to {', '.join(c.partner for c in self.coupling_changes)})"
        return text

    @property
    def component_shift_hz(self) -> float:
        """How far (Hz) the outermost multiplet components move when only couplings change:
        sum over the changed couplings of |dJ| times the partner's largest m (0 for a shift pair)."""
        return sum(abs(c.difference_hz) * c.largest_m for c in self.coupling_changes)

    @property
    def component_moves_hz(self) -> tuple[float, ...]:
        """The distinct distances (Hz) by which multiplet components move when only couplings change:
        |sum over the changed couplings of dJ m| over the partners' m values, zero left out (first order).
        More than one means the components merge at different rates (empty for a shift pair)."""
        moves = {0.0}
        for c in self.coupling_changes:
            ms = np.arange(-c.largest_m, c.largest_m + 0.5)
            moves = {v + c.difference_hz * m for v in moves for m in ms}
        return tuple(sorted({round(abs(float(v)), 9) for v in moves if abs(v) > COUPLING_TOLERANCE_HZ}))

    def frequency_difference_hz(self, model: Model) -> float:
        """The frequency difference (Hz) the exchange averages: the shift difference, or the component
        shift of a coupling-averaging pair (field-independent)."""
        return self.component_shift_hz if self.coupling_changes else self.shift_difference_hz(model)

    def shift_difference_hz(self, model: Model) -> float:
        """Shift of `second` minus shift of `first` (Hz) at the model's field."""
        states = {s.name: s for s in model.states}
        delta = states[self.second[0]].shifts_ppm[self.second[1]] - states[self.first[0]].shifts_ppm[self.first[1]]
        return delta * model.spectrometer.frequency_mhz

    def populations(self, model: Model) -> tuple[float, float]:
        """Fractions of the nucleus' time spent at `first` and at `second` (sum 1), two-site view."""
        if self.mutual:
            return 0.5, 0.5
        p = model.populations()
        a, b = p[model.state_index(self.first[0])], p[model.state_index(self.second[0])]
        return a / (a + b), b / (a + b)

    def exit_factors(self, model: Model) -> tuple[float, float]:
        """Rates at which the nucleus leaves `first` and `second`, per unit forward rate of the process.

        A site exchange a -> b leaves a at k and b at k p_a / p_b (detailed balance); a mutual exchange
        leaves each place at k, or 2k when the permutation of the pair's spins is not its own inverse
        (both it and its inverse move them).
        """
        if self.mutual:
            r = 1.0 if all(self.mapping[self.mapping[s]] == s for s in self.mapping) else 2.0
            return r, r
        p = model.populations()
        return 1.0, p[model.state_index(self.first[0])] / p[model.state_index(self.second[0])]

    def linewidths_hz(self, model: Model) -> tuple[float, float]:
        """Intrinsic linewidths (FWHM, Hz) of the states of `first` and `second`."""
        states = {s.name: s for s in model.states}
        return states[self.first[0]].linewidth_hz, states[self.second[0]].linewidth_hz

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready); `kind` is ``"shift"`` or ``"coupling"`` (coupling-averaging)."""
        return {"process": self.process_name, "signals": self.label,
                "from": {"state": self.first[0], "spin": self.first[1]},
                "to": {"state": self.second[0], "spin": self.second[1]},
                "kind": "coupling" if self.coupling_changes else "shift",
                "coupling_changes": [c.to_dict() for c in self.coupling_changes],
                "component_moves_hz": list(self.component_moves_hz)}


def _cycle(mapping: dict, spin: str) -> tuple[str, ...]:
    cycle = [spin]
    while mapping.get(cycle[-1], cycle[-1]) != spin:
        cycle.append(mapping.get(cycle[-1], cycle[-1]))
    return tuple(cycle)


def _coupling_changes(model: Model, ex: Exchange, mapping: dict, spin: str) -> tuple[CouplingChange, ...]:
    """The couplings of `spin` (to any spin, heteronuclei included) that a jump of `ex` changes."""
    start, end = (model.states[model.state_index(name)] for name in (ex.from_state, ex.to_state))
    changes = (CouplingChange(z, mapping[z], start.coupling(spin, z), end.coupling(mapping[spin], mapping[z]),
                              model.largest_m(z)) for z in model.all_spins if z != spin)
    return tuple(c for c in changes if abs(c.difference_hz) > COUPLING_TOLERANCE_HZ)


def exchanging_pairs(model: Model) -> list[ExchangingPair]:
    """Every pair of signals that an exchange process of `model` interconverts: shift pairs, and at equal
    shifts coupling-averaging pairs (see the module notes)."""
    names = model.process_names()
    states = {s.name: s for s in model.states}
    pairs = []
    for i, ex in enumerate(model.exchanges):
        mapping = {spin: ex.spins.get(spin, spin) for spin in model.all_spins}
        seen = set()
        for spin in model.spins:
            image = mapping[spin]
            if ex.is_mutual and frozenset((spin, image)) in seen:
                continue
            seen.add(frozenset((spin, image)))
            cycle = _cycle(mapping, spin)
            changes: tuple[CouplingChange, ...] = ()
            if abs(states[ex.to_state].shifts_ppm[image] - states[ex.from_state].shifts_ppm[spin]) < 1e-9:
                changes = _coupling_changes(model, ex, mapping, spin)
                if not changes:
                    continue
            own = dict.fromkeys(cycle + tuple(s for c in changes for s in _cycle(mapping, c.partner)))
            pairs.append(ExchangingPair(i, names[i], (ex.from_state, spin), (ex.to_state, image), cycle,
                                        {s: mapping[s] for s in own}, ex.is_mutual, changes))
    return pairs


# --- regime thresholds -----------------------------------------------------------------------

@dataclass(frozen=True)
class RateWindow:
    """Forward rates (s^-1) that bound intermediate exchange for one pair at one field.

    Attributes
    ----------
    slow_rate_per_s : float
        Below this the broadening k_out / pi of both signals is under the detectable fraction of their
        linewidth: slow exchange.
    fast_rate_per_s : float
        Above this the averaged line's excess width is under that fraction: fast exchange.
    detectable_fraction : float
        The fraction f of the intrinsic linewidth used.
    """

    slow_rate_per_s: float
    fast_rate_per_s: float
    detectable_fraction: float

    @property
    def is_empty(self) -> bool:
        """True when the signals are too close for any rate to be measured (fast threshold below slow)."""
        return self.fast_rate_per_s <= self.slow_rate_per_s

    def regime(self, rate_per_s: float) -> str:
        """``"slow"``, ``"intermediate"`` or ``"fast"`` at forward rate `rate_per_s` (s^-1)."""
        if rate_per_s >= self.fast_rate_per_s:
            return "fast"
        return "slow" if rate_per_s <= self.slow_rate_per_s else "intermediate"


def rate_window(model: Model, pair: ExchangingPair,
                detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> RateWindow:
    """The slow and fast thresholds of `pair` at the model's field and linewidths (see module notes)."""
    if not 0 < detectable_fraction < 1:
        raise InputError(f"the detectable fraction must lie between 0 and 1, got {detectable_fraction!r}",
                         where="detectable_fraction")
    f = detectable_fraction
    (q1, q2), (r1, r2), (w1, w2) = pair.populations(model), pair.exit_factors(model), pair.linewidths_hz(model)
    slow = min(math.pi * f * w1 / r1, math.pi * f * w2 / r2)
    dnu = pair.frequency_difference_hz(model)
    fast = q1 * q2 * (2 * math.pi * dnu) ** 2 / (math.pi * f * (q1 * w1 + q2 * w2) * (r1 + r2))
    return RateWindow(slow, fast, f)


def window_temperatures(model: Model, pair: ExchangingPair, activation: ActivationParameters,
                        detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> tuple[float | None, float | None]:
    """Temperatures (K) at which the process reaches the slow and the fast threshold of `pair`."""
    follows = populations_follow_temperature(model)

    def threshold(which: str) -> Callable[[float | None], float]:
        def rate(t):
            at_t = model if t is None else model.at_temperature(t)
            return getattr(rate_window(at_t, pair, detectable_fraction), which)
        return rate

    return (solve_temperature(activation, threshold("slow_rate_per_s"), follows),
            solve_temperature(activation, threshold("fast_rate_per_s"), follows))


# --- fast-exchange limit: averaged spin system and equivalence -------------------------------

@dataclass(frozen=True)
class EquivalenceGroup:
    """Spins of one averaged state that share their averaged shift.

    Attributes
    ----------
    state : str
        The averaged state.
    spins : tuple of str
        The chemically equivalent spins (same averaged shift).
    shift_ppm : float
        Their shift (ppm).
    magnetic_classes : tuple of tuple of str
        The group split into sets that also couple alike to every other spin (magnetic equivalence).
    by_exchange : bool
        True when exchange carries the spins into one another; False when the shifts merely coincide.
    nuclei : int
        Number of nuclei in the group, each member of an equivalent group (``Model.groups``) counted.
    """

    state: str
    spins: tuple[str, ...]
    shift_ppm: float
    magnetic_classes: tuple[tuple[str, ...], ...]
    by_exchange: bool
    nuclei: int

    @property
    def magnetically_equivalent(self) -> bool:
        """True when every spin of the group couples alike to every other spin."""
        return len(self.magnetic_classes) == 1

    def describe(self) -> str:
        """One line for the report."""
        how = "by exchange" if self.by_exchange else "coincident shifts"
        if self.magnetically_equivalent:
            kind = "magnetically equivalent"
        else:
            classes = "; ".join(", ".join(c) for c in self.magnetic_classes)
            kind = f"chemically equivalent only (magnetically equivalent sets: {classes})"
        return f"{', '.join(self.spins)} at {self.shift_ppm:.4f} ppm: {kind}, {how} ({self.nuclei} nuclei)"

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"state": self.state, "spins": list(self.spins), "nuclei": self.nuclei, "shift_ppm": self.shift_ppm,
                "magnetically_equivalent": self.magnetically_equivalent,
                "magnetic_classes": [list(c) for c in self.magnetic_classes], "by_exchange": self.by_exchange}


@dataclass(frozen=True)
class HiddenCoupling:
    """A coupling that the fast-exchange spectrum does not show.

    Attributes
    ----------
    state : str
        The averaged state.
    spins : (str, str)
        The two spins.
    coupling_hz : float
        Its averaged value (Hz).
    reason : str
        ``"equivalent nuclei"`` (it joins magnetically equivalent spins) or ``"averages to zero"``.
    """

    state: str
    spins: tuple[str, str]
    coupling_hz: float
    reason: str

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"state": self.state, "spins": list(self.spins), "coupling_hz": self.coupling_hz, "reason": self.reason}


@dataclass(frozen=True)
class AveragedSystem:
    """The spin system seen when some exchange processes are fast.

    Attributes
    ----------
    model : Model
        The averaged model (no exchange processes), ready for :func:`dnmr.simulate`.
    averaged_processes : tuple of str
        Processes taken as fast and averaged.
    left_out : tuple of str
        Processes not averaged; the averaged model leaves them out.
    merged_states : tuple of tuple of str
        For each averaged state, the original states it merges.
    groups : tuple of EquivalenceGroup
        Equivalent spins (two or more) in each averaged state.
    hidden_couplings : tuple of HiddenCoupling
        Couplings that no longer show.
    """

    model: Model
    averaged_processes: tuple[str, ...]
    left_out: tuple[str, ...]
    merged_states: tuple[tuple[str, ...], ...]
    groups: tuple[EquivalenceGroup, ...]
    hidden_couplings: tuple[HiddenCoupling, ...]

    def report(self) -> str:
        """Readable table of the averaged shifts, couplings, equivalences and hidden couplings."""
        head = ", ".join(self.averaged_processes) or "none"
        lines = [f"Averaged spin system (fast exchange of: {head})"]
        if self.left_out:
            lines.append(f"  not averaged, left out of this system: {', '.join(self.left_out)}")
        for state, merged in zip(self.model.states, self.merged_states):
            lines.append(f"  state {state.name} (population {state.population:.3f}; merges {', '.join(merged)};"
                         f" linewidth {state.linewidth_hz:.3g} Hz)")
            lines.append("    shifts / ppm: " + ", ".join(f"{k} {v:.4f}" for k, v in state.shifts_ppm.items()))
            if state.couplings_hz:
                lines.append("    couplings / Hz: " + ", ".join(f"{k} {v:.2f}" for k, v in state.couplings_hz.items()))
            for group in self.groups:
                if group.state == state.name:
                    lines.append(f"    equivalent: {group.describe()}")
            for hidden in self.hidden_couplings:
                if hidden.state == state.name:
                    lines.append(f"    coupling {hidden.spins[0]}-{hidden.spins[1]} ({hidden.coupling_hz:.2f} Hz)"
                                 f" does not show: {hidden.reason}")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready); the states use the model file's keys."""
        return {
            "averaged_processes": list(self.averaged_processes),
            "left_out": list(self.left_out),
            "states": [{"name": s.name, "merges": list(m), "population": s.population, "linewidth_hz": s.linewidth_hz,
                        "shifts_ppm": dict(s.shifts_ppm), "couplings_hz": dict(s.couplings_hz)}
                       for s, m in zip(self.model.states, self.merged_states)],
            "equivalent_groups": [g.to_dict() for g in self.groups],
            "hidden_couplings": [h.to_dict() for h in self.hidden_couplings],
        }


def _configurations(start: int, jumps: Sequence, n_spins: int) -> dict[tuple[int, tuple[int, ...]], None]:
    """Every (state, relabelling) the molecule reaches from (start, identity) by the given jumps.

    A relabelling sigma says where each spin of the start state now sits: sigma[x] is its index in the
    current state.
    """
    seen = {(start, tuple(range(n_spins))): None}
    queue = list(seen)
    while queue:
        state, sigma = queue.pop()
        for jump in jumps:
            if jump.source != state:
                continue
            nxt = (jump.target, tuple(jump.permutation[s] for s in sigma))
            if nxt not in seen:
                seen[nxt] = None
                queue.append(nxt)
                if len(seen) > MAX_CONFIGURATIONS:
                    raise InputError(f"the exchange processes reach more than {MAX_CONFIGURATIONS} spin"
                                     " relabellings; average fewer processes at once", where="exchange")
    return seen


def _weights(configs: Iterable[tuple[int, tuple]], populations: np.ndarray) -> dict:
    """Equilibrium weight of each configuration: p_a / (configurations of state a), normalised."""
    configs = list(configs)
    count: dict[int, int] = {}
    for state, _ in configs:
        count[state] = count.get(state, 0) + 1
    total = sum(populations[s] for s in count)
    return {c: populations[c[0]] / count[c[0]] / total for c in configs}


def _magnetic_classes(spins: Sequence[str], all_spins: Sequence[str], coupling) -> tuple[tuple[str, ...], ...]:
    """Split chemically equivalent `spins` into the largest sets whose members couple alike to every spin
    outside their set (magnetic equivalence); couplings inside a set do not matter.

    The sets start as one and are split by the couplings to the spins outside each set until no set
    splits any more.
    """
    classes: list[list[str]] = [list(spins)]
    while True:
        refined: list[list[str]] = []
        for cls in classes:
            outside = [z for z in all_spins if z not in cls]
            parts: list[list[str]] = []
            for spin in cls:
                home = next((p for p in parts if all(abs(coupling(p[0], z) - coupling(spin, z)) <= COUPLING_TOLERANCE_HZ
                                                     for z in outside)), None)
                (home.append(spin) if home is not None else parts.append([spin]))
            refined += parts
        if len(refined) == len(classes):
            return tuple(tuple(c) for c in refined)
        classes = refined


def _shift_groups(shifts: dict[str, float]) -> list[list[str]]:
    """Spins sharing a shift (within SHIFT_TOLERANCE_PPM), groups of two or more, in spin order."""
    groups: list[list[str]] = []
    for spin, value in shifts.items():
        home = next((g for g in groups if abs(shifts[g[0]] - value) <= SHIFT_TOLERANCE_PPM), None)
        (home.append(spin) if home is not None else groups.append([spin]))
    return [g for g in groups if len(g) > 1]


def _averaged_state(model: Model, configs: dict, weights: dict, name: str) -> tuple[State, dict]:
    """The averaged State of one group of configurations, and each spin's orbit (set of places).

    Relabellings run over ``model.all_spins`` (observed spins, then heteronuclei), so couplings to
    heteronuclei are followed through the mappings and averaged like any other coupling; only observed
    spins have shifts.
    """
    spins, observed = model.all_spins, len(model.spins)
    shifts, couplings, widths = model.shifts_hz(), model.states, model.linewidths_hz()
    sf = model.spectrometer.frequency_mhz
    avg_shift = {x: sum(w * shifts[a][sigma[i]] for (a, sigma), w in weights.items()) / sf
                 for i, x in enumerate(spins[:observed])}
    avg_coupling, largest = {}, {}
    for (i, x), (j, y) in combinations(enumerate(spins), 2):
        values = [(w, couplings[a].coupling(spins[sigma[i]], spins[sigma[j]])) for (a, sigma), w in weights.items()]
        avg_coupling[coupling_key(x, y)] = sum(w * v for w, v in values)
        largest[coupling_key(x, y)] = max(abs(v) for _, v in values)
    state_weight: dict[int, float] = {}
    for (a, _), w in weights.items():
        state_weight[a] = state_weight.get(a, 0.0) + w
    population = sum(model.populations()[a] for a in state_weight)
    state = State(name, avg_shift, {k: v for k, v in avg_coupling.items() if abs(v) > COUPLING_TOLERANCE_HZ},
                  linewidth_hz=sum(w * widths[a] for a, w in state_weight.items()), population=population)
    orbits = {x: frozenset((a, sigma[i]) for a, sigma in configs) for i, x in enumerate(spins)}
    return state, {"orbits": orbits, "largest": largest, "averaged": avg_coupling}


def _equivalences(model: Model, state: State, extra: dict) -> tuple[list[EquivalenceGroup], list[HiddenCoupling]]:
    """Equivalent spins of an averaged `state` of `model` and the couplings that no longer show.

    Magnetic equivalence compares the couplings to every other spin, heteronuclei included (two protons
    that couple differently to one fluorine are not magnetically equivalent).  A coupling that averages
    to zero is reported only where it joins an observed spin (couplings among heteronuclei never show).
    """
    groups, hidden = [], []
    for members in _shift_groups(dict(state.shifts_ppm)):
        classes = _magnetic_classes(members, model.all_spins, state.coupling)
        by_exchange = len({extra["orbits"][m] for m in members}) == 1
        groups.append(EquivalenceGroup(state.name, tuple(members), state.shifts_ppm[members[0]], classes, by_exchange,
                                       sum(model.group_size(m) for m in members)))
        for cls in classes:
            hidden += [HiddenCoupling(state.name, (x, y), state.coupling(x, y), "equivalent nuclei")
                       for x, y in combinations(cls, 2) if abs(state.coupling(x, y)) > COUPLING_TOLERANCE_HZ]
    for key, value in extra["averaged"].items():
        x, y = parse_coupling_key(key)
        if abs(value) <= COUPLING_TOLERANCE_HZ < extra["largest"][key] and (x in state.shifts_ppm or y in state.shifts_ppm):
            hidden.append(HiddenCoupling(state.name, (x, y), 0.0, "averages to zero"))
    return groups, hidden


def fast_exchange_limit(model: Model, processes: Iterable[int] | None = None) -> AveragedSystem:
    """The averaged spin system when the given exchange processes (indices; default all) are fast.

    States joined by fast processes merge into one averaged state (population the sum, linewidth the
    population-weighted mean); processes not averaged are left out of the averaged model.

    Parameters
    ----------
    model : Model
        The model.
    processes : iterable of int, optional
        Indices of the processes taken as fast.

    Returns
    -------
    AveragedSystem
    """
    names = model.process_names()
    fast = set(range(len(names)) if processes is None else processes)
    jumps = [j for j in model.jumps() if j.process in fast]
    populations = model.populations()
    done: set[int] = set()
    states, merged, groups, hidden = [], [], [], []
    for start in range(len(model.states)):
        if start in done:
            continue
        configs = _configurations(start, jumps, len(model.all_spins))
        members = sorted({a for a, _ in configs})
        done.update(members)
        label = "+".join(model.states[a].name for a in members)
        state, extra = _averaged_state(model, configs, _weights(configs, populations), label)
        found, gone = _equivalences(model, state, extra)
        states.append(state), merged.append(tuple(model.states[a].name for a in members))
        groups += found
        hidden += gone
    averaged = model.replace(states=tuple(states), exchanges=(), title=(model.title + " (fast-exchange limit)").strip())
    return AveragedSystem(averaged, tuple(names[i] for i in sorted(fast)),
                          tuple(n for i, n in enumerate(names) if i not in fast), tuple(merged), tuple(groups),
                          tuple(hidden))


def averaged_model(model: Model, processes: Iterable[int] | None = None) -> Model:
    """The fast-exchange averaged model (see :func:`fast_exchange_limit`), ready for :func:`dnmr.simulate`."""
    return fast_exchange_limit(model, processes).model


# --- magnetisation transfer: the window below the lineshapes ---------------------------------

#: R1 (s^-1) used when the model gives none: typical of 1H in small molecules in mobile solvents
#: (T1 about 1 s; from memory).  Give ``r1_per_s`` in the model file, or override it, for your sample.
TYPICAL_R1_PER_S = 1.0
#: Magnetisation transfer determines k from about this fraction of R1 (common practice) ...
TRANSFER_SLOW_FRACTION_OF_R1 = 0.2
#: ... up to a few tens s^-1 (common practice).
TRANSFER_FAST_RATE_PER_S = 30.0


def relaxation_rate(model: Model, r1_per_s: float | None = None) -> tuple[float, str]:
    """R1 (s^-1) for the transfer window and where it comes from: `r1_per_s` if given, else the mean of
    the model's ``r1_per_s`` over its sites, else :data:`TYPICAL_R1_PER_S`."""
    from dnmr.engine.longitudinal import site_relaxation_rates

    if r1_per_s is not None:
        if not (math.isfinite(r1_per_s) and r1_per_s > 0):
            raise InputError(f"R1 must be a positive rate (s^-1), got {r1_per_s!r}", where="r1_per_s")
        return float(r1_per_s), "given"
    try:
        rates = site_relaxation_rates(model)
    except InputError:
        return TYPICAL_R1_PER_S, ("a typical value (the model file gives no r1_per_s for every site; give it, or"
                                  " --r1-per-s, for your sample)")
    return float(np.mean(rates)), "the model file (mean r1_per_s of its sites)"


@dataclass(frozen=True)
class TransferWindow:
    """Where magnetisation transfer determines the forward rate of one process.

    Attributes
    ----------
    process : str
        Name of the exchange process.
    r1_per_s : float
        Longitudinal relaxation rate R1 used (s^-1).
    r1_source : str
        Where R1 comes from, in words.
    slow_rate_per_s, fast_rate_per_s : float
        Forward rates (s^-1) bounding the window: R1/5 and a few tens s^-1.
    low_k, high_k : float or None
        Temperatures (K) at which the process reaches those rates (None outside 20-2000 K).
    """

    process: str
    r1_per_s: float
    r1_source: str
    slow_rate_per_s: float
    fast_rate_per_s: float
    low_k: float | None
    high_k: float | None

    @property
    def is_empty(self) -> bool:
        """True when R1 is so fast that no rate is left between R1/5 and the upper limit."""
        return self.fast_rate_per_s <= self.slow_rate_per_s

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"process": self.process, "r1_per_s": self.r1_per_s, "r1_source": self.r1_source,
                "slow_rate_per_s": self.slow_rate_per_s, "fast_rate_per_s": self.fast_rate_per_s,
                "low_k": self.low_k, "high_k": self.high_k, "window_empty": self.is_empty}

    def describe(self) -> str:
        """One line: the rates and temperatures of the window."""
        if self.is_empty:
            return f"{self.process}: no window (R1 = {self.r1_per_s:.3g} s^-1 is too fast)"
        return (f"{self.process}: k {self.slow_rate_per_s:.3g}-{self.fast_rate_per_s:.3g} s^-1,"
                f" T {_kelvin(self.low_k)}-{_kelvin(self.high_k)} K (R1 = {self.r1_per_s:.3g} s^-1 from {self.r1_source})")


def transfer_windows(model: Model, activations: dict[int, ActivationParameters],
                     r1_per_s: float | None = None) -> list[TransferWindow]:
    """The magnetisation-transfer window of every process with activation parameters (see module notes).

    Parameters
    ----------
    model : Model
        The model (its ``r1_per_s``, if any).
    activations : dict of int to ActivationParameters
        Per process index.
    r1_per_s : float, optional
        R1 (s^-1) to use instead of the model's (or the typical value).
    """
    r1, source = relaxation_rate(model, r1_per_s)
    slow, fast = TRANSFER_SLOW_FRACTION_OF_R1 * r1, TRANSFER_FAST_RATE_PER_S
    names = model.process_names()
    return [TransferWindow(names[i], r1, source, slow, fast, act.temperature_at(slow), act.temperature_at(fast))
            for i, act in sorted(activations.items())]


# --- the timescale view ----------------------------------------------------------------------

@dataclass(frozen=True)
class PairAtField:
    """An exchanging pair on one magnet.

    Attributes
    ----------
    pair : ExchangingPair
    proton_mhz : float
        Field as its 1H frequency (MHz).
    frequency_mhz : float
        Frequency of the observed nucleus (MHz).
    shift_difference_hz : float
        Shift of the place the nucleus arrives at minus that of the place it leaves (Hz); the sign says
        which signal lies higher.  Reports quote its magnitude, :attr:`separation_hz`.
    """

    pair: ExchangingPair
    proton_mhz: float
    frequency_mhz: float
    shift_difference_hz: float

    @property
    def separation_hz(self) -> float:
        """The frequency difference the exchange averages (Hz): the separation |dnu| of the two signals,
        or for a coupling-averaging pair its component shift (:attr:`ExchangingPair.component_shift_hz`)."""
        return self.pair.component_shift_hz if self.pair.coupling_changes else abs(self.shift_difference_hz)

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready); `frequency_mhz` is the field as its 1H frequency, `shift_difference_hz`
        is signed (arriving minus leaving) and `separation_hz` its magnitude (for a coupling-averaging pair,
        whose shift difference is 0, the component shift)."""
        return {**self.pair.to_dict(), "frequency_mhz": self.proton_mhz, "observed_frequency_mhz": self.frequency_mhz,
                "shift_difference_hz": self.shift_difference_hz, "separation_hz": self.separation_hz}


@dataclass(frozen=True)
class PairTimescale(PairAtField):
    """Slow, intermediate and fast exchange of one pair at one field (see :class:`PairAtField`).

    Attributes
    ----------
    window : RateWindow
        Forward rates (s^-1) bounding intermediate exchange.
    slow_below_k, fast_above_k : float or None
        Temperatures (K) of the two thresholds (None without activation parameters or outside 20-2000 K).
    """

    window: RateWindow
    slow_below_k: float | None
    fast_above_k: float | None

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {**super().to_dict(),
                "slow_rate_per_s": self.window.slow_rate_per_s, "fast_rate_per_s": self.window.fast_rate_per_s,
                "slow_below_k": self.slow_below_k, "fast_above_k": self.fast_above_k,
                "window_empty": self.window.is_empty}


def pair_timescales(model: Model, activations: dict[int, ActivationParameters], fields: Sequence[float],
                    detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> list[PairTimescale]:
    """Regime thresholds of every exchanging pair at every field (1H MHz)."""
    out = []
    for mhz in fields:
        here = at_field(model, mhz)
        for pair in exchanging_pairs(here):
            act = activations.get(pair.process)
            temps = window_temperatures(here, pair, act, detectable_fraction) if act else (None, None)
            out.append(PairTimescale(pair, mhz, here.spectrometer.frequency_mhz, pair.shift_difference_hz(here),
                                     rate_window(here, pair, detectable_fraction), *temps))
    return out


def process_regimes(model: Model, detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> dict[str, str]:
    """Regime of each process at the model's own rates: fast or slow when all its pairs are, else intermediate."""
    rates = model.rates()
    found: dict[int, set[str]] = {}
    for pair in exchanging_pairs(model):
        found.setdefault(pair.process, set()).add(rate_window(model, pair, detectable_fraction).regime(rates[pair.process]))
    names = model.process_names()
    return {names[i]: (kinds.pop() if len(kinds) == 1 else "intermediate") for i, kinds in sorted(found.items())}


@dataclass(frozen=True)
class ConditionSnapshot:
    """Regimes and the averaged system at one field under given conditions.

    Attributes
    ----------
    proton_mhz : float
        Field (1H MHz).
    temperature_k : float or None
        Temperature (K), None for the model's own rates.
    rates_per_s : dict of str to float
        Forward rate of each process.
    regimes : dict of str to str
        Regime of each process.
    averaged : AveragedSystem
        The spin system with the fast processes averaged.
    """

    proton_mhz: float
    temperature_k: float | None
    rates_per_s: dict
    regimes: dict
    averaged: AveragedSystem

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"frequency_mhz": self.proton_mhz, "temperature_k": self.temperature_k,
                "rates_per_s": self.rates_per_s, "regimes": self.regimes, "averaged": self.averaged.to_dict()}


def snapshot(model: Model, proton_mhz: float, temperature_k: float | None = None,
             activations: dict[int, ActivationParameters] | None = None,
             detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> ConditionSnapshot:
    """Regimes at one field and temperature (K; None: the model's own rates) and the averaged system."""
    here = at_field(model, proton_mhz)
    if temperature_k is not None:
        here = model_at(here, temperature_k, activations or {})
    regimes = process_regimes(here, detectable_fraction)
    names = here.process_names()
    fast = [i for i, n in enumerate(names) if regimes.get(n) == "fast"]
    return ConditionSnapshot(proton_mhz, temperature_k, dict(zip(names, here.rates().tolist())), regimes,
                             fast_exchange_limit(here, fast))


@dataclass(frozen=True)
class TimescaleView(NotebookView):
    """Where each exchanging pair is slow, intermediate or fast, and the averaged spin system.

    Attributes
    ----------
    pairs : list of PairTimescale
        Thresholds per pair and field.
    fast_limit : AveragedSystem
        All processes fast.
    snapshots : list of ConditionSnapshot
        Regimes and averaged system at the requested temperature (or the model's rates), per field.
    activations : dict of str to ActivationParameters
        Activation parameters used, per process name.
    detectable_fraction : float
        The fraction of the linewidth that defines the thresholds.
    transfer : list of TransferWindow
        Where magnetisation transfer measures each process (below the lineshape window).
    """

    pairs: list[PairTimescale]
    fast_limit: AveragedSystem
    snapshots: list[ConditionSnapshot]
    activations: dict
    detectable_fraction: float
    transfer: list[TransferWindow] = field(default_factory=list)

    def report(self) -> str:
        """Readable tables: thresholds per pair and field, regimes now, the averaged system."""
        f = self.detectable_fraction
        lines = [f"NMR timescale (criterion: exchange broadening of {f:g} x the intrinsic linewidth)"]
        for name, act in self.activations.items():
            lines.append(f"  {name}: {act.describe()}")
        lines.append(f"  {'1H MHz':>7}  {'signals':<34} {'|dnu|/Hz':>9} {'slow k<':>10} {'fast k>':>10}"
                     f" {'slow T<':>8} {'fast T>':>8}")
        for p in self.pairs:
            lines.append(f"  {p.proton_mhz:7.1f}  {p.pair.process_name + ': ' + p.pair.label:<34}"
                         f" {p.separation_hz:9.2f} {p.window.slow_rate_per_s:10.3g} {p.window.fast_rate_per_s:10.3g}"
                         f" {_kelvin(p.slow_below_k):>8} {_kelvin(p.fast_above_k):>8}"
                         + ("  (no intermediate window)" if p.window.is_empty else ""))
        lines += ["  rates are forward rate constants in s^-1; temperatures in K"]
        lines += [f"  {COUPLING_PAIR_NOTE}"] * any(p.pair.coupling_changes for p in self.pairs) + [""]
        lines += transfer_lines(self.transfer)
        for snap in self.snapshots:
            when = f"{snap.temperature_k:.1f} K" if snap.temperature_k is not None else "the model's rates"
            regimes = ", ".join(f"{n} {r} (k = {snap.rates_per_s[n]:.3g} s^-1)" for n, r in snap.regimes.items())
            lines.append(f"At {snap.proton_mhz:g} MHz and {when}: {regimes or 'no exchanging signals'}")
            if snap.averaged.averaged_processes:
                lines.append(_indent(snap.averaged.report()))
        lines += ["", self.fast_limit.report()]
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"detectable_fraction": self.detectable_fraction,
                "activation": {n: a.to_dict() for n, a in self.activations.items()},
                "pairs": [p.to_dict() for p in self.pairs],
                "conditions": [s.to_dict() for s in self.snapshots],
                "fast_limit": self.fast_limit.to_dict(),
                "magnetisation_transfer": [w.to_dict() for w in self.transfer]}

    def plot(self, figure=None):
        """Regime bands against temperature, one panel per field, with the magnetisation-transfer window
        (see :func:`plot_regimes`)."""
        return plot_regimes(self.pairs, figure=figure, transfer=self.transfer)


def transfer_lines(windows: Sequence[TransferWindow]) -> list[str]:
    """Report lines of the magnetisation-transfer windows ([] when there are none)."""
    if not windows:
        return []
    return (["Magnetisation transfer (selective inversion, saturation transfer, 2D exchange; dnmr transfer) measures"
             f" k from R1/5 to about {TRANSFER_FAST_RATE_PER_S:g} s^-1, below the lineshape window:"]
            + [f"  {w.describe()}" for w in windows] + [""])


def _kelvin(value: float | None) -> str:
    return "-" if value is None else f"{value:.1f}"


def _indent(text: str, by: str = "  ") -> str:
    return "\n".join(by + line for line in text.splitlines())


def timescale_view(model: Model, activation: ActivationParameters | None = None, *,
                   frequencies_mhz: Sequence[float] | None = None, process: str | None = None,
                   temperature_k: float | None = None,
                   detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION,
                   r1_per_s: float | None = None) -> TimescaleView:
    """Slow, intermediate and fast exchange of every exchanging pair, and the averaged spin system.

    Parameters
    ----------
    model : Model
        The model.
    activation : ActivationParameters, optional
        For `process` (default: every process); otherwise those of the model file, if any.
    frequencies_mhz : sequence of float, optional
        Fields as 1H frequencies (MHz); default the model's.
    process : str, optional
        The process `activation` belongs to.
    temperature_k : float, optional
        Temperature (K) at which to report regimes and the averaged system; default the model's rates.
    detectable_fraction : float
        Exchange broadening, as a fraction of the intrinsic linewidth, that marks the regime edges.
    r1_per_s : float, optional
        R1 (s^-1) for the magnetisation-transfer window instead of the model's ``r1_per_s`` (or, without
        it, the typical value).

    Returns
    -------
    TimescaleView
    """
    activations = process_activations(model, activation, process)
    if temperature_k is not None and not (math.isfinite(temperature_k) and temperature_k > 0):
        raise InputError(f"the temperature must be positive kelvin, got {temperature_k!r}", where="temperature_k")
    if temperature_k is not None and len(activations) < len(model.exchanges):
        raise InputError("a temperature needs activation parameters for every process (give a barrier)",
                         where="temperature_k")
    fields = checked_fields(model, frequencies_mhz)
    names = model.process_names()
    return TimescaleView(
        pair_timescales(model, activations, fields, detectable_fraction),
        fast_exchange_limit(model),
        [snapshot(model, mhz, temperature_k, activations, detectable_fraction) for mhz in fields],
        {names[i]: a for i, a in activations.items()},
        detectable_fraction,
        transfer_windows(model, activations, r1_per_s),
    )


def plot_regimes(pairs: Sequence[PairTimescale], figure=None, transfer: Sequence[TransferWindow] = ()):
    """Bands of slow, intermediate and fast exchange against temperature: one panel per field, one row per
    pair, and a row per process for the magnetisation-transfer window.

    Parameters
    ----------
    pairs : sequence of PairTimescale
        With temperatures (activation parameters known).
    figure : matplotlib Figure, optional
    transfer : sequence of TransferWindow
        Windows of magnetisation transfer (the same at every field), drawn under the pairs.

    Returns
    -------
    matplotlib.figure.Figure
        Intermediate exchange is the lineshape window; the transfer window is a bar of its own hue.
    """
    from dnmr.reporting.plotting import INK, REGIME_COLOURS, TRANSFER_COLOUR, figure_text, plt

    shown = [p for p in pairs if p.slow_below_k is not None and p.fast_above_k is not None]
    if not shown:
        raise InputError("the regime figure needs activation parameters (give a barrier)", where="plot")
    bars = [w for w in transfer if w.low_k is not None and w.high_k is not None and not w.is_empty]
    fields = sorted({p.proton_mhz for p in shown})
    low = min([p.slow_below_k for p in shown] + [w.low_k for w in bars]) - 30.0
    high = max(p.fast_above_k for p in shown) + 30.0
    rows = max(sum(p.proton_mhz == f for p in shown) for f in fields) + len(bars)
    fig = figure if figure is not None else plt.figure(figsize=(7.0, 1.2 + len(fields) * (0.5 + 0.45 * rows)))
    axes = np.atleast_1d(fig.subplots(len(fields), 1, sharex=True, squeeze=False)[:, 0])
    for ax, mhz in zip(axes, fields):
        here = [p for p in shown if p.proton_mhz == mhz]
        for row, p in enumerate(here):
            t_slow, t_fast = sorted((p.slow_below_k, p.fast_above_k))
            spans = {"slow": (low, t_slow - low), "intermediate": (t_slow, t_fast - t_slow),
                     "fast": (t_fast, high - t_fast)}
            for regime, span in spans.items():
                ax.broken_barh([span], (row - 0.35, 0.7), facecolor=REGIME_COLOURS[regime], edgecolor=INK,
                               linewidth=0.5, label=regime if row == 0 else None)
        for row, w in enumerate(bars, start=len(here)):
            ax.broken_barh([(w.low_k, w.high_k - w.low_k)], (row - 0.35, 0.7), facecolor=TRANSFER_COLOUR,
                           edgecolor=INK, linewidth=0.5, label="magnetisation transfer" if row == len(here) else None)
        labels = [f"{p.pair.process_name}: {p.pair.label}" for p in here] + [f"{w.process}: transfer" for w in bars]
        ax.set_yticks(range(len(labels)), [figure_text(text) for text in labels], fontsize=8)
        ax.set_ylim(-0.6, len(labels) - 0.4)
        ax.set_title(figure_text(f"{mhz:g} MHz (1H)"), fontsize=9, loc="left")
    axes[0].legend(ncol=2 if bars else 3, fontsize=8, frameon=False, loc="lower right", bbox_to_anchor=(1.0, 1.0))
    axes[-1].set_xlim(low, high)
    axes[-1].set_xlabel("temperature / K")
    fig.tight_layout()
    return fig
