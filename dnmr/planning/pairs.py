"""Exchanging pairs: the two places between which an exchange process carries a nucleus.

An exchange process moves a nucleus from one place (state, spin) to another: a site exchange takes
every spin of state a to state b (renamed by the mapping), a mutual exchange permutes the spins of one
state.  Each place it leaves and the place it arrives at form an *exchanging pair* of signals
(:func:`exchanging_pairs`).  Where the shift stays but couplings of the nucleus change (a mutual
exchange that swaps two 19F partners coupled differently to an observed proton, or equal-shift spins
that trade couplings), the pair is a *coupling-averaging* pair: each multiplet component moves by
sum_z dJ_z m_z (dJ_z the change of the coupling to partner z, m_z that partner's magnetic quantum
number), so the component shift sum_z |dJ_z| max(m_z) plays the part of the shift difference in the
regimes (:mod:`dnmr.planning.regimes`) and at coalescence (:mod:`dnmr.planning.coalescence`):
|J(H,F1) - J(H,F2)| for a swap of two fluorines, |dJ| / 2 for one spin-1/2 partner whose coupling
changes.  Pairs whose signal changes in neither way are left out (there is nothing to see).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from dnmr.model import Model
from dnmr.modelparts import Exchange

#: Couplings closer than this (Hz) are taken as equal.
COUPLING_TOLERANCE_HZ = 1e-6
#: Report line for coupling-averaging pairs, whose |dnu| column is their component shift.
COUPLING_PAIR_NOTE = ("signals marked (J to ...) keep their shift while the exchange changes those couplings;"
                      " their |Δν| is the shift of their multiplet components, sum of |ΔJ| m (Hz)")


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
