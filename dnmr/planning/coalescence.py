"""Coalescence from the engine: the rate at which two exchanging signals merge, and its temperature.

Coalescence rate
    For every exchanging pair (:func:`dnmr.planning.pairs.exchanging_pairs`) the pair is simulated on its
    own: the two states of its process (one for a mutual exchange) with the spins that the process
    permutes together with it (one spin for a plain site exchange, both spins of an AB pair that swaps,
    ...), their couplings among themselves, the model's populations and linewidths, and only that process
    running (the other processes off, so that each pair's coalescence belongs to its own process).  A spin
    of the cluster that is an equivalent group (``Model.groups``, a CH3 say) stays a group, so the
    couplings among the cluster keep their multiplet structure.  Spins outside that cluster, heteronuclei
    included, are left out: their couplings split both signals alike into multiplet components, each of
    which coalesces with its partner at the same rate when the coupling is the same in both places; where
    it is not, the components have different shift differences and coalesce at different rates, and the
    result carries a note naming those couplings.  The coalescence rate is the forward rate constant of the
    process (as the model file defines it) at which the spectrum, on the closed interval between the two
    shifts, goes from two maxima to one.  For two sites this is where the minimum between the lines meets
    the smaller maximum (Gutowsky & Holm, J. Chem. Phys. 25, 1228 (1956); Shanan-Atidi & Bar-Eli, J. Phys.
    Chem. 74, 961 (1970)); for an AB pair the interval holds the two inner lines of the quartet and the
    count drops when the centre turns from a minimum into a maximum (Kurland, Rubin & Wise, J. Chem. Phys.
    40, 2426 (1964)).  It is found by a scan over six decades of rate and bisection on log k, once with the
    model's linewidths and once in the narrow-line limit (widths 1e-6 of the separation), to show how a
    finite linewidth moves it.
    A coupling-averaging pair (equal shifts, changed couplings; see :mod:`dnmr.planning.pairs`) keeps the
    partners whose couplings change (heteronuclei too) in its own model, and the maxima are counted over
    the spin's whole multiplet: coalescence is where their number falls to its fast-exchange value, for
    two fluorines swapping places under a proton the Gutowsky-Holm rate of |J(H,F1) - J(H,F2)|.

Prediction
    Given activation parameters, the coalescence temperature solves k_Eyring(T) = k_c at each field
    (shifts in Hz scale with the field; couplings and linewidths do not); populations from free energies
    follow the temperature, which is then found by repeated substitution.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np

from dnmr.activation.parameters import ActivationParameters
from dnmr.engine.blocks import lineshape_terms
from dnmr.kinetics import coalescence_rate_per_s
from dnmr.model import Model
from dnmr.modelparts import Exchange, State
from dnmr.modelparts import coupling_key
from dnmr.planning.conditions import (at_field, checked_fields, populations_follow_temperature, process_activations,
                                      solve_temperature)
from dnmr.planning.pairs import ExchangingPair, PairAtField, exchanging_pairs

#: Points on the interval between the two shifts where maxima are counted.
REGION_POINTS = 4001
#: Linewidth (fraction of the shift difference) that stands for the narrow-line limit.
NARROW_LIMIT_FRACTION = 1e-6
#: Rates scanned, relative to sqrt(2) pi sqrt(dnu^2 + 6 J^2) / (sum of exit factors), before bisection.
SCAN_DECADES = 3
SCAN_PER_DECADE = 8
#: Relative precision of the coalescence rate.
RATE_PRECISION = 1e-9


def pair_model(model: Model, pair: ExchangingPair, linewidth_hz: float | None = None) -> Model:
    """The pair on its own: its process alone (rate 0 here), the states it joins, the spins of its cluster.

    Parameters
    ----------
    model : Model
        The full model (its populations and field are used).
    pair : ExchangingPair
    linewidth_hz : float, optional
        Intrinsic linewidth (FWHM, Hz) for every state; default each state's own.
    """
    populations = model.populations()
    keep = tuple(pair.mapping)
    states = []
    for name in dict.fromkeys((pair.first[0], pair.second[0])):
        s = model.states[model.state_index(name)]
        couplings = {coupling_key(x, y): s.coupling(x, y) for x, y in combinations(keep, 2) if s.coupling(x, y)}
        states.append(State(name, {x: s.shifts_ppm[x] for x in keep if x in s.shifts_ppm}, couplings,
                            linewidth_hz if linewidth_hz is not None else s.linewidth_hz,
                            population=populations[model.state_index(name)]))
    moves = {x: y for x, y in pair.mapping.items() if x != y}
    exchange = Exchange(pair.first[0], pair.second[0], moves, rate_per_s=0.0, name=pair.process_name)
    groups = {x: model.group_size(x) for x in keep if model.group_size(x) > 1}
    heteronuclei = {x: model.heteronuclei[x] for x in keep if x in model.heteronuclei}
    return Model(model.spectrometer, tuple(states), (exchange,), title=pair.label, groups=groups,
                 heteronuclei=heteronuclei)


def unequal_outside_couplings(model: Model, pair: ExchangingPair, tolerance_hz: float = 1e-6) -> list[str]:
    """Couplings from the pair's cluster to spins left out of :func:`pair_model` that differ between the
    two places (Hz), as ``"Ha-F 40 -> 10 Hz"``; heteronuclei count as outside spins.

    Parameters
    ----------
    model : Model
    pair : ExchangingPair
    tolerance_hz : float
        Couplings closer than this (Hz) count as equal.
    """
    exchange = model.exchanges[pair.process]
    start, end = (model.states[model.state_index(name)] for name in (pair.first[0], pair.second[0]))
    out = []
    for x in pair.cluster:
        for z in model.all_spins:
            if z in pair.mapping:
                continue
            before, after = start.coupling(x, z), end.coupling(pair.mapping[x], exchange.spins.get(z, z))
            if abs(before - after) > tolerance_hz:
                out.append(f"{x}-{z} {before:g} -> {after:g} Hz")
    return out


def count_maxima(values: np.ndarray, tolerance: float = 1e-12) -> int:
    """Local maxima of samples on a closed interval; an end counts when the curve falls away from it.

    Steps smaller than `tolerance` times the largest value count as flat.
    """
    steps = np.diff(np.asarray(values, dtype=float))
    steps = steps[np.abs(steps) > tolerance * np.abs(values).max()]
    if steps.size == 0:
        return 1
    rising = steps > 0
    return int(np.sum(rising[:-1] & ~rising[1:]) + (not rising[0]) + rising[-1])


def _exchange_scale(model: Model, pair: ExchangingPair) -> float:
    """A rate (s^-1) near coalescence: the two-site coalescence rate (for the sum of exit factors of an
    equally populated pair, 2) scaled to this pair's sum of exit factors."""
    dnu = pair.frequency_difference_hz(model)
    couplings = [abs(s.coupling(x, y)) for s in model.states for x, y in combinations(pair.cluster, 2)]
    j = max(couplings, default=0.0)
    return 2.0 * coalescence_rate_per_s(dnu, j) / sum(pair.exit_factors(model))


def _counting_interval_hz(sub: Model, pair: ExchangingPair) -> tuple[float, float]:
    """Where maxima are counted (Hz) in the pair's own model `sub`: between the two shifts, or for a
    coupling-averaging pair the whole multiplet of its spin (its couplings times the partners' largest m
    in either state) widened by the component shift on both sides."""
    sf = sub.spectrometer.frequency_mhz
    x = pair.first[1]
    if not pair.coupling_changes:
        return tuple(sorted((sub.states[0].shifts_ppm[x] * sf, sub.states[-1].shifts_ppm[pair.second[1]] * sf)))
    reach = max(sum(abs(s.coupling(x, z)) * sub.largest_m(z) for z in sub.all_spins if z != x) for s in sub.states)
    centre, half = sub.states[0].shifts_ppm[x] * sf, reach + pair.component_shift_hz
    return centre - half, centre + half


def coalescence_rate(model: Model, pair: ExchangingPair, narrow_limit: bool = False) -> tuple[float | None, str]:
    """Forward rate constant (s^-1) of the pair's process at which its signals coalesce.

    Between the two exchanging shifts the spectrum shows two maxima in slow exchange and one in fast
    exchange for an uncoupled pair or an AB pair (Gutowsky-Holm, Kurland-Rubin-Wise); where couplings to
    other spins keep a multiplet in the averaged spectrum, the fast-exchange spectrum itself has more than
    one maximum there.  For a coupling-averaging pair the maxima are counted over the spin's whole
    multiplet (a doublet of doublets that becomes a 1:2:1 triplet: four maxima, then three).
    Coalescence is the rate at which the count first falls to its fast-exchange value:
    the two signals have merged into the averaged one.

    Parameters
    ----------
    model : Model
        The full model at the field and temperature of interest.
    pair : ExchangingPair
    narrow_limit : bool
        Use linewidths of 1e-6 of the frequency difference (shift difference or component shift) instead
        of the model's.

    Returns
    -------
    (rate, note) : (float or None, str)
        None with the reason when the pair shows no merging of two maxima into one.
    """
    dnu = pair.frequency_difference_hz(model)
    sub = pair_model(model, pair, abs(dnu) * NARROW_LIMIT_FRACTION if narrow_limit else None)
    grid = np.linspace(*_counting_interval_hz(sub, pair), REGION_POINTS)

    def maxima(rate: float) -> int:
        return count_maxima(lineshape_terms(sub.with_rates([rate])).evaluate(grid).real)

    scale = _exchange_scale(model, pair)
    rates = scale * np.logspace(-SCAN_DECADES, SCAN_DECADES, 2 * SCAN_DECADES * SCAN_PER_DECADE + 1)
    counts = [maxima(k) for k in rates]
    merged = counts[-1]  # maxima left in fast exchange
    if counts[0] <= merged:
        return None, (f"no more maxima in slow exchange (k = {rates[0]:.3g} s^-1) than in fast exchange: the"
                      " signals are too close for their linewidth, or one is too weak to show as a peak")
    last = max(i for i, c in enumerate(counts) if c > merged)
    low, high = rates[last], rates[last + 1]
    while high / low > 1 + RATE_PRECISION:
        mid = math.sqrt(low * high)
        low, high = (mid, high) if maxima(mid) > merged else (low, mid)
    return math.sqrt(low * high), ""


@dataclass(frozen=True)
class Coalescence(PairAtField):
    """Coalescence of one exchanging pair at one field (see :class:`~dnmr.planning.pairs.PairAtField`).

    Attributes
    ----------
    populations : (float, float)
        Fractions at the two places (two-site view) where the rate applies.
    rate_per_s : float or None
        Forward rate constant of the process at coalescence with the model's linewidths (s^-1).
    narrow_limit_rate_per_s : float or None
        The same as the linewidths go to zero (s^-1).
    temperature_k, narrow_limit_temperature_k : float or None
        Where the activation parameters reach those rates (K).
    notes : tuple of str
        Why a rate is missing, if one is, and what the rate leaves out (see :func:`unequal_outside_couplings`).
    """

    populations: tuple[float, float]
    rate_per_s: float | None
    narrow_limit_rate_per_s: float | None
    temperature_k: float | None = None
    narrow_limit_temperature_k: float | None = None
    notes: tuple[str, ...] = ()

    @property
    def linewidth_effect(self) -> float | None:
        """Relative change of the coalescence rate caused by the finite linewidth (k_c / k_c(narrow) - 1)."""
        if self.rate_per_s is None or self.narrow_limit_rate_per_s is None:
            return None
        return self.rate_per_s / self.narrow_limit_rate_per_s - 1.0

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready): `process`, `frequency_mhz` (1H), `rate_per_s`, `temperature_k` and more."""
        return {**super().to_dict(), "rate_per_s": self.rate_per_s, "temperature_k": self.temperature_k,
                "populations": [float(p) for p in self.populations],
                "narrow_limit_rate_per_s": self.narrow_limit_rate_per_s,
                "narrow_limit_temperature_k": self.narrow_limit_temperature_k,
                "linewidth_effect": self.linewidth_effect, "notes": list(self.notes)}


def _coalescence_of(model: Model, pair: ExchangingPair, activation: ActivationParameters | None) -> Coalescence:
    """Coalescence of `pair` with the model's linewidths and in the narrow limit (temperatures with `activation`)."""
    follows = activation is not None and populations_follow_temperature(model)
    found = []
    for narrow in (False, True):
        last: dict = {}

        def rate(t, narrow=narrow, last=last):
            here = model if t is None else model.at_temperature(t)
            last["rate"], last["note"] = coalescence_rate(here, pair, narrow)
            last["populations"] = pair.populations(here)
            return last["rate"]

        if activation is None:
            rate(None)
            temperature = None
        else:
            temperature = solve_temperature(activation, rate, follows)
        found.append((last["rate"], temperature, last["note"], last["populations"]))
    (k, t, note, populations), (k0, t0, note0, _) = found
    notes = [note or note0]
    if len(pair.component_moves_hz) > 1:
        notes.append(f"its multiplet components move by {', '.join(f'{v:g}' for v in pair.component_moves_hz)} Hz"
                     " and merge at different rates; the rate given is the one at which the last of them has merged")
    unequal = unequal_outside_couplings(model, pair)
    if unequal:
        notes.append(f"couplings to spins left out differ between the two places ({', '.join(unequal)}): their"
                     " multiplet components have different shift differences and coalesce at different rates;"
                     " the rate given is for the exchanging spins alone")
    return Coalescence(pair, model.spectrometer.proton_mhz, model.spectrometer.frequency_mhz,
                       pair.shift_difference_hz(model), populations, k, k0, t, t0, tuple(filter(None, notes)))


def predict_coalescence(model: Model, activation: ActivationParameters | None = None, *,
                        frequencies_mhz: Sequence[float] | None = None,
                        process: str | None = None) -> list[Coalescence]:
    """Coalescence rate (s^-1) and, with activation parameters, temperature (K) of every pair at every field.

    Parameters
    ----------
    model : Model
        The model.
    activation : ActivationParameters, optional
        For `process` (default: every process); otherwise those in the model file; without any, only rates.
    frequencies_mhz : sequence of float, optional
        Fields as 1H frequencies (MHz); default the model's.
    process : str, optional
        The process `activation` belongs to.

    Returns
    -------
    list of Coalescence
        Field by field, pair by pair.
    """
    return pair_coalescences(model, process_activations(model, activation, process), frequencies_mhz)


def coalescence(model: Model, *, frequencies_mhz: Sequence[float] | None = None) -> list[Coalescence]:
    """Coalescence rates (s^-1) of every exchanging pair at the model's field (or at the given 1H MHz).

    The populations are the model's; no temperatures are solved for (see :func:`predict_coalescence`).
    """
    return pair_coalescences(model, {}, frequencies_mhz)


def pair_coalescences(model: Model, activations: dict[int, ActivationParameters],
                      frequencies_mhz: Sequence[float] | None) -> list[Coalescence]:
    """Coalescence of every exchanging pair at every field (1H MHz; default the model's), with temperatures
    (K) for the processes that have activation parameters in `activations` (per process index)."""
    out = []
    for mhz in checked_fields(model, frequencies_mhz):
        here = at_field(model, mhz)
        out += [_coalescence_of(here, pair, activations.get(pair.process)) for pair in exchanging_pairs(here)]
    return out
