"""The fast-exchange limit: the averaged spin system, and which nuclei become equivalent.

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

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np

from dnmr.errors import InputError
from dnmr.model import Model
from dnmr.modelparts import State, parse_coupling_key
from dnmr.modelparts import coupling_key
from dnmr.planning.pairs import COUPLING_TOLERANCE_HZ

#: Shifts closer than this (ppm) are taken as equal.
SHIFT_TOLERANCE_PPM = 1e-6
#: Largest number of configurations (state, relabelling) followed for the fast-exchange average.
MAX_CONFIGURATIONS = 200_000


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
