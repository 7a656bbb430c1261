"""Before the experiment: where signals coalesce, which temperatures to run, and whether the solvent copes.

Coalescence from the engine
    For every exchanging pair (:func:`dnmr.planning.timescale.exchanging_pairs`) the pair is simulated on its own:
    the two states of its process (one for a mutual exchange) with the spins that the process permutes
    together with it (one spin for a plain site exchange, both spins of an AB pair that swaps, ...),
    their couplings among themselves, the model's populations and linewidths, and only that process
    running (the other processes off, so that each pair's coalescence belongs to its own process).
    A spin of the cluster that is an equivalent group (``Model.groups``, a CH3 say) stays a group, so
    the couplings among the cluster keep their multiplet structure.  Spins outside that cluster,
    heteronuclei included, are left out: their couplings split both signals alike into multiplet
    components, each of which coalesces with its partner at the same rate when the coupling is the same
    in both places; where it is not, the components have different shift differences and coalesce at
    different rates, and the result carries a note naming those couplings.  The coalescence rate is the
    forward rate constant of the process (as the model file defines it) at which the spectrum, on the
    closed interval between the two shifts, goes from two maxima to one.  For two sites this is where the minimum between the lines meets the smaller maximum
    (Gutowsky & Holm, J. Chem. Phys. 25, 1228 (1956); Shanan-Atidi & Bar-Eli, J. Phys. Chem. 74, 961
    (1970)); for an AB pair the interval holds the two inner lines of the quartet and the count drops
    when the centre turns from a minimum into a maximum (Kurland, Rubin & Wise, J. Chem. Phys. 40, 2426
    (1964)).  It is found by a scan over six decades of rate and bisection on log k, once with the
    model's linewidths and once in the narrow-line limit (widths 1e-6 of the separation), to show how a
    finite linewidth moves it.
    A coupling-averaging pair (equal shifts, changed couplings; see :mod:`dnmr.planning.timescale`) keeps the
    partners whose couplings change (heteronuclei too) in its own model, and the maxima are counted over
    the spin's whole multiplet: coalescence is where their number falls to its fast-exchange value, for
    two fluorines swapping places under a proton the Gutowsky-Holm rate of |J(H,F1) - J(H,F2)|.

Prediction
    Given activation parameters, the coalescence temperature solves k_Eyring(T) = k_c at each field
    (shifts in Hz scale with the field; couplings and linewidths do not); populations from free energies
    follow the temperature, which is then found by repeated substitution.

Plan
    Each spectrum carries Fisher information about ln k: F = sum_i (d y_i / d ln k)^2 / sigma^2 over the
    points of the spectrum (finite differences of the engine spectrum, at a dozen temperatures and
    interpolated between them), with the overall intensity scale
    fitted too (its information is projected out).  sigma, the rms noise per point, is the tallest point
    of the spectrum without exchange divided by the signal-to-noise ratio.  Through the Eyring equation
    d ln k / d dH‡ = -1/(RT) and d ln k / d dS‡ = 1/R, so a set of temperatures gives an information
    matrix for (dH‡, dS‡); the plan picks the set with the largest determinant (D-optimal design: a
    greedy start and exchange passes) among candidate temperatures inside the solvent's liquid range and
    the probe's range, at least a minimum step apart.  The resulting standard errors are lower bounds
    (noise only); the temperature dependence of shifts and linewidths and thermometer calibration add to
    them (Shoup, Becker & McNeel, J. Phys. Chem. 76, 71 (1972)).  dG‡ is quoted at the harmonic mean
    temperature, where it is uncorrelated with dH‡ (Grieger, Hunter & Krug, Nature 261, 566 (1976)).

Magnetisation transfer
    Below the lineshape window the same sample is measured by magnetisation transfer (``dnmr transfer``),
    which determines k from about R1/5 to a few tens s^-1 (:func:`dnmr.planning.timescale.transfer_windows`).  The
    plan puts a few temperatures evenly in 1/T over that window (inside the usable range) and gives, at
    each, the times to record: the mixing time of a 2D exchange spectrum (or the delay at which a selective
    inversion shows the most transfer), where the cross peak of two-site exchange with equal R1,
    exp(-R1 t) (1 - exp(-K t)) (Macura & Ernst, Mol. Phys. 41, 95 (1980); from memory), is largest:
    t = ln((R1 + K) / R1) / K, K = k_forward + k_reverse (near 1/(k + R1) while k is below R1, about
    ln(K/R1)/K when exchange is faster); the delays of a selective
    inversion recovery, log-spaced from a twentieth of that time to 5 T1 (full recovery, common practice);
    and the saturation time that reaches the steady state of a saturation transfer, 5 / (R1 + K).  The
    transfer window joined with the lineshape window (the union over the fields of the measurable windows)
    gives the whole range one study covers.
"""
from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from itertools import combinations

import numpy as np

from dnmr.engine.blocks import frequency_grid_ppm, lineshape_terms
from dnmr.errors import InputError
from dnmr.kinetics import GAS_CONSTANT, coalescence_rate_per_s
from dnmr.model import Model
from dnmr.modelparts import Exchange, State, coupling_key
from dnmr.notebook import NotebookView
from dnmr.planning.solvents import DEFAULT_MARGIN_K, Solvent, SolventWarning, check_temperature, solvents_covering
from dnmr.planning.timescale import (
    COUPLING_PAIR_NOTE,
    DEFAULT_DETECTABLE_FRACTION,
    REGIMES,
    ActivationParameters,
    ExchangingPair,
    PairAtField,
    PairTimescale,
    at_field,
    checked_fields,
    exchanging_pairs,
    model_at,
    pair_timescales,
    populations_follow_temperature,
    TransferWindow,
    process_activations,
    rate_window,
    solve_temperature,
    transfer_windows,
)

#: Points on the interval between the two shifts where maxima are counted.
REGION_POINTS = 4001
#: Linewidth (fraction of the shift difference) that stands for the narrow-line limit.
NARROW_LIMIT_FRACTION = 1e-6
#: Rates scanned, relative to sqrt(2) pi sqrt(dnu^2 + 6 J^2) / (sum of exit factors), before bisection.
SCAN_DECADES = 3
SCAN_PER_DECADE = 8
#: Relative precision of the coalescence rate.
RATE_PRECISION = 1e-9
#: Step in ln k of the (forward) finite differences for the Fisher information.
LN_RATE_STEP = 1e-4
#: A typical range of a variable-temperature probe, -100 to +150 deg C (check your probe's rating).
DEFAULT_PROBE_RANGE_K = (173.15, 423.15)
DEFAULT_SIGNAL_TO_NOISE = 100.0
DEFAULT_SPECTRA = 8
DEFAULT_MIN_STEP_K = 5.0
#: Candidates reach this far (K) beyond the measurable window on both sides.
CANDIDATE_MARGIN_K = 15.0
MAX_CANDIDATES = 150
#: The information is computed from the engine at this many temperatures (evenly spread in 1/T), then
#: at midpoints next to nodes where its logarithm bends by more than INFORMATION_BEND, in up to
#: INFORMATION_ROUNDS rounds; in between it is interpolated. The chosen temperatures are computed exactly.
INFORMATION_NODES = 9
INFORMATION_BEND = 0.2
INFORMATION_ROUNDS = 4
#: The information sums run over at most this many points; a finer model grid is resampled and the sum
#: scaled by the ratio of point counts (the noise stays per point of the model's grid).
MAX_INFORMATION_POINTS = 8192

CAUTIONS = (
    "Heating a sealed or capped NMR tube above the boiling point of its solvent builds pressure: the tube"
    " can burst. Work above the boiling point only with tubes made for it and under your facility's procedures.",
    "Freezing the sample can crack the tube; a broken tube in the probe is costly and can be dangerous.",
    "Stay inside the probe's rated temperature range, change the temperature in small steps and let it"
    " settle (ramp slowly); use the gas flow and settings your facility prescribes.",
    "Low temperatures use liquid nitrogen or other cryogens: they cause cold burns, and their boil-off can"
    " suffocate in closed or poorly ventilated rooms. Wear the protective equipment required.",
    "The magnet's field is always on: keep ferromagnetic tools and objects away, and people with pacemakers"
    " or other implants outside the marked field limits.",
    "These notes do not replace training: follow your facility's rules, its trained staff and local codes.",
)

PLAN_LINEWIDTH = "slow-exchange-trend"
"""The linewidth treatment of ``dnmr fit`` that the plan's precision assumes (and writes into its series file)."""
LINEWIDTH_ASSUMPTION = (
    "The predicted precision takes the intrinsic linewidth as known in every spectrum, as dnmr fit holds it by"
    ' default (series file: linewidth = "slow-exchange-trend", from the slow-exchange spectra of the plan) or from'
    ' a signal in no exchange (linewidth = "reference-line" with [fit.reference_line]); with the linewidth fitted in'
    ' every spectrum (linewidth = "shared") the rates past coalescence are only lower bounds and these errors do not'
    " hold."
)
SLOW_FRACTION = 0.25
"""A planned spectrum is in slow exchange when its rate is under this fraction of the coalescence rate
(what ``dnmr fit`` asks of the spectra its trends come from)."""

PLAN_CAVEAT = (
    "Standard errors are lower bounds from noise alone (Cramer-Rao), with linewidths, shifts and temperatures"
    " taken as known; their temperature dependence and the thermometer calibration add to them"
    " (Shoup, Becker & McNeel 1972)."
)


# --- coalescence ---------------------------------------------------------------------------

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
    """Coalescence of one exchanging pair at one field (see :class:`~dnmr.planning.timescale.PairAtField`).

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
    note : str
        Why a rate is missing, if one is, or what the rate leaves out (see :func:`unequal_outside_couplings`).
    """

    populations: tuple[float, float]
    rate_per_s: float | None
    narrow_limit_rate_per_s: float | None
    temperature_k: float | None = None
    narrow_limit_temperature_k: float | None = None
    note: str = ""

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
                "linewidth_effect": self.linewidth_effect, "note": self.note}


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
                       pair.shift_difference_hz(model), populations, k, k0, t, t0, "; ".join(filter(None, notes)))


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
    return _coalescences(model, process_activations(model, activation, process), frequencies_mhz)


def coalescence(model: Model, *, frequencies_mhz: Sequence[float] | None = None) -> list[Coalescence]:
    """Coalescence rates (s^-1) of every exchanging pair at the model's field (or at the given 1H MHz).

    The populations are the model's; no temperatures are solved for (see :func:`predict_coalescence`).
    """
    return _coalescences(model, {}, frequencies_mhz)


def _coalescences(model: Model, activations: dict[int, ActivationParameters],
                  frequencies_mhz: Sequence[float] | None) -> list[Coalescence]:
    out = []
    for mhz in checked_fields(model, frequencies_mhz):
        here = at_field(model, mhz)
        out += [_coalescence_of(here, pair, activations.get(pair.process)) for pair in exchanging_pairs(here)]
    return out


# --- information about ln k, and the choice of temperatures ---------------------------------

def _spectrum(model: Model, hz: np.ndarray) -> np.ndarray:
    return lineshape_terms(model).evaluate(hz).real


def information_grid(model: Model) -> tuple[np.ndarray, float]:
    """Frequencies (Hz) over which information is summed, and the weight of each of them.

    The model's grid, or at most MAX_INFORMATION_POINTS evenly spread over its window, each then
    standing for (model points / points used) points of the model's grid.
    """
    grid = frequency_grid_ppm(model) * model.spectrometer.frequency_mhz
    if grid.size <= MAX_INFORMATION_POINTS:
        return grid, 1.0
    return np.linspace(grid[0], grid[-1], MAX_INFORMATION_POINTS), grid.size / MAX_INFORMATION_POINTS


def noise_level(model: Model, hz: np.ndarray, signal_to_noise: float) -> float:
    """rms noise per point: the tallest point of the spectrum without exchange over `signal_to_noise`."""
    static = model.with_rates(np.zeros(len(model.exchanges)))
    return float(_spectrum(static, hz).max()) / signal_to_noise


def ln_rate_information(model: Model, processes: Sequence[int], hz: np.ndarray, noise: float) -> np.ndarray:
    """Fisher information matrix about the ln k of `processes` carried by one spectrum.

    Parameters
    ----------
    model : Model
        At the temperature (and rates) of the spectrum.
    processes : sequence of int
        Process indices whose ln k are estimated.
    hz : ndarray
        Frequencies of the spectrum's points (Hz).
    noise : float
        rms noise per point (same units as the absorption, Hz^-1).

    Returns
    -------
    ndarray (P, P)
        Information about (ln k_1, ..., ln k_P) with the intensity scale fitted alongside (projected out).
    """
    rates = model.rates()
    base = _spectrum(model, hz)
    columns = []
    for p in processes:
        moved = rates.copy()
        moved[p] = rates[p] * math.exp(LN_RATE_STEP)
        columns.append((_spectrum(model.with_rates(moved), hz) - base) / LN_RATE_STEP)
    columns.append(base)  # d y / d ln(scale)
    design = np.array(columns).T / noise
    full = design.T @ design
    rate_block, cross, scale = full[:-1, :-1], full[:-1, -1:], full[-1, -1]
    return rate_block - cross @ cross.T / scale


def eyring_jacobian(temperature_k: float, n_processes: int) -> np.ndarray:
    """d ln k_p / d (dH‡_q [kJ/mol], dS‡_q [J/(mol K)]): array (P, 2P), one (dH‡, dS‡) pair per process."""
    g = np.zeros((n_processes, 2 * n_processes))
    for p in range(n_processes):
        g[p, 2 * p] = -1e3 / (GAS_CONSTANT * temperature_k)
        g[p, 2 * p + 1] = 1.0 / GAS_CONSTANT
    return g


def eyring_information(temperature_k: float, rate_information: np.ndarray) -> np.ndarray:
    """Information about (dH‡, dS‡) of every process (kJ/mol, J/(mol K)) from information about their ln k."""
    g = eyring_jacobian(temperature_k, rate_information.shape[0])
    return g.T @ rate_information @ g


def information_profile(information_at, low_k: float, high_k: float) -> tuple[list[float], list[np.ndarray]]:
    """Temperatures (K) and information matrices that resolve how the information changes from `low_k`
    to `high_k` (K): a few nodes, refined at midpoints where the information bends (see INFORMATION_BEND).

    Parameters
    ----------
    information_at : callable
        Information matrix at a temperature (K).
    low_k, high_k : float
        The range (K).
    """
    start = [low_k] if high_k <= low_k else 1.0 / np.linspace(1.0 / high_k, 1.0 / low_k, INFORMATION_NODES)
    found = {float(t): information_at(float(t)) for t in start}
    for _ in range(INFORMATION_ROUNDS):
        temps = sorted(found)
        new = set()
        for i in _bends(temps, [float(np.trace(found[t])) for t in temps]):
            new.update(0.5 * (temps[j] + temps[j + 1]) for j in (i - 1, i) if temps[j + 1] - temps[j] > 1.0)
        if not new:
            break
        found.update({t: information_at(t) for t in new})
    temps = sorted(found)
    return temps, [found[t] for t in temps]


def _bends(temps: Sequence[float], sizes: Sequence[float]) -> list[int]:
    """Interior nodes whose log size lies off the straight line through its neighbours by > INFORMATION_BEND."""
    logs = np.log(np.maximum(sizes, 1e-300))
    out = []
    for i in range(1, len(temps) - 1):
        a, b, c = temps[i - 1:i + 2]
        line = logs[i - 1] + (logs[i + 1] - logs[i - 1]) * (b - a) / (c - a)
        if abs(logs[i] - line) > INFORMATION_BEND:
            out.append(i)
    return out


def interpolated_information(nodes_k: Sequence[float], information: Sequence[np.ndarray],
                             temperatures_k: Sequence[float]) -> list[np.ndarray]:
    """Information matrices at `temperatures_k` (K) from those at `nodes_k` (K), interpolated element by
    element with a monotone cubic (no overshoot), kept symmetric and positive semi-definite."""
    from scipy.interpolate import PchipInterpolator

    order = np.argsort(nodes_k)
    stack = np.asarray(information)[order]
    if len(order) < 2:
        return [stack[0]] * len(temperatures_k)
    values = PchipInterpolator(np.asarray(nodes_k)[order], stack, axis=0)(np.asarray(temperatures_k, dtype=float))
    out = []
    for m in values:
        w, v = np.linalg.eigh(0.5 * (m + m.T))
        out.append((v * np.clip(w, 0.0, None)) @ v.T)
    return out


def _log_det(matrices: Sequence[np.ndarray], chosen: Sequence[int]) -> float:
    sign, value = np.linalg.slogdet(sum(matrices[i] for i in chosen))
    return value if sign > 0 else -math.inf


def _improving_swap(information: Sequence[np.ndarray], chosen: list[int], fits) -> list[int] | None:
    """`chosen` with one temperature swapped for another that raises the determinant, or None."""
    best = _log_det(information, chosen)
    for pos in range(len(chosen)):
        rest = chosen[:pos] + chosen[pos + 1:]
        for j in range(len(information)):
            if fits(rest, j) and _log_det(information, rest + [j]) > best + 1e-9:
                return rest + [j]
    return None


def d_optimal_temperatures(candidates_k: Sequence[float], information: Sequence[np.ndarray], count: int,
                           min_step_k: float) -> list[int]:
    """Indices of at most `count` candidates, each `min_step_k` (K) apart, maximising det(sum of information).

    The best pair is found by trying all, then temperatures are added greedily and swapped one at a time
    while the determinant grows.
    """
    t = np.asarray(candidates_k, dtype=float)

    def fits(chosen, j):
        return j not in chosen and all(abs(t[j] - t[i]) >= min_step_k - 1e-9 for i in chosen)

    pairs = [(i, j) for i, j in combinations(range(len(t)), 2) if fits([i], j)]
    scored = [(_log_det(information, pair), pair) for pair in pairs]
    if not scored or max(scored)[0] == -math.inf:
        return []
    chosen = list(max(scored)[1])
    while len(chosen) < count:
        options = [j for j in range(len(t)) if fits(chosen, j)]
        if not options:
            break
        chosen.append(max(options, key=lambda j: _log_det(information, chosen + [j])))
    while (swapped := _improving_swap(information, chosen, fits)) is not None:
        chosen = swapped
    return sorted(chosen, key=lambda i: t[i])


@dataclass(frozen=True)
class PredictedErrors:
    """Standard errors (noise only) of one process' activation parameters from a planned series.

    Attributes
    ----------
    process : str
    enthalpy_stderr : float
        Of dH‡ (kJ/mol).
    entropy_stderr : float
        Of dS‡ (J/(mol K)).
    harmonic_mean_k : float
        Harmonic mean of the planned temperatures (K).
    gibbs_stderr : float
        Of dG‡ at the harmonic mean temperature (kJ/mol).
    correlation : float
        Correlation of dH‡ and dS‡.
    """

    process: str
    enthalpy_stderr: float
    entropy_stderr: float
    harmonic_mean_k: float
    gibbs_stderr: float
    correlation: float

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"process": self.process, "enthalpy_stderr": self.enthalpy_stderr,
                "entropy_stderr": self.entropy_stderr, "harmonic_mean_k": self.harmonic_mean_k,
                "gibbs_at_harmonic_mean_stderr": self.gibbs_stderr, "correlation": self.correlation}

    def describe(self) -> str:
        """One line."""
        return (f"{self.process}: dH‡ ± {self.enthalpy_stderr:.2g} kJ/mol, dS‡ ± {self.entropy_stderr:.2g} J/(mol K)"
                f" (correlation {self.correlation:.3f}), dG‡({self.harmonic_mean_k:.0f} K) ± {self.gibbs_stderr:.2g} kJ/mol")


def predicted_errors(covariance: np.ndarray, names: Sequence[str], temperatures_k: Sequence[float]) -> list[PredictedErrors]:
    """Standard errors per process from the covariance of (dH‡, dS‡) pairs (kJ/mol, J/(mol K))."""
    t_hm = len(temperatures_k) / sum(1.0 / t for t in temperatures_k)
    out = []
    for p, name in enumerate(names):
        c = covariance[2 * p:2 * p + 2, 2 * p:2 * p + 2]
        var_g = c[0, 0] + (t_hm / 1e3) ** 2 * c[1, 1] - 2 * (t_hm / 1e3) * c[0, 1]
        out.append(PredictedErrors(name, math.sqrt(c[0, 0]), math.sqrt(c[1, 1]), t_hm, math.sqrt(max(var_g, 0.0)),
                                   c[0, 1] / math.sqrt(c[0, 0] * c[1, 1])))
    return out


@dataclass(frozen=True)
class PlannedTemperature:
    """One temperature of the plan and why it is there.

    Attributes
    ----------
    temperature_k : float
    rates_per_s : dict of str to float
        Predicted forward rate of each planned process.
    regimes : dict of str to str
        Regime of each exchanging pair (``"process: signals"``).
    ln_rate_stderr : dict of str to float
        Standard error of ln k that this spectrum alone gives, per process.
    enthalpy_error_growth : float
        Relative growth of the largest dH‡ standard error if this spectrum were left out.
    solvent_warning : SolventWarning or None
    reason : str
    """

    temperature_k: float
    rates_per_s: dict
    regimes: dict
    ln_rate_stderr: dict
    enthalpy_error_growth: float
    solvent_warning: SolventWarning | None
    reason: str

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"temperature_k": self.temperature_k, "rates_per_s": self.rates_per_s, "regimes": self.regimes,
                "ln_rate_stderr": self.ln_rate_stderr, "enthalpy_error_growth": self.enthalpy_error_growth,
                "solvent_warning": None if self.solvent_warning is None else self.solvent_warning.message,
                "reason": self.reason}


@dataclass(frozen=True)
class FieldPlan:
    """The recommended temperatures at one field.

    Attributes
    ----------
    proton_mhz : float
        Field as its 1H frequency (MHz).
    frequency_mhz : float
        Frequency of the observed nucleus (MHz).
    temperatures : list of PlannedTemperature
    candidate_range_k : (float, float) or None
        The temperatures searched (K), None when nothing was usable.
    errors : list of PredictedErrors
    noise : float
        rms noise per point assumed (Hz^-1).
    notes : list of str
    """

    proton_mhz: float
    frequency_mhz: float
    temperatures: list[PlannedTemperature]
    candidate_range_k: tuple[float, float] | None
    errors: list[PredictedErrors]
    noise: float
    notes: list[str] = field(default_factory=list)

    @property
    def temperatures_k(self) -> list[float]:
        """The planned temperatures (K), ascending."""
        return [p.temperature_k for p in self.temperatures]

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"frequency_mhz": self.proton_mhz, "observed_frequency_mhz": self.frequency_mhz,
                "temperatures_k": self.temperatures_k, "temperatures": [p.to_dict() for p in self.temperatures],
                "candidate_range_k": None if self.candidate_range_k is None else list(self.candidate_range_k),
                "predicted_stderr": [e.to_dict() for e in self.errors], "noise_per_point": self.noise,
                "notes": self.notes}


def _nearest_coalescence(temperature_k: float, coalescences: Sequence[Coalescence]) -> str:
    known = [c for c in coalescences if c.temperature_k is not None]
    if not known:
        return ""
    c = min(known, key=lambda c: abs(c.temperature_k - temperature_k))
    gap = temperature_k - c.temperature_k
    which = f" of {c.pair.label}" if len(known) > 1 else ""
    if abs(gap) < 1.0:
        return f"at coalescence{which}"
    return f"{abs(gap):.0f} K {'above' if gap > 0 else 'below'} coalescence{which}"


def _precision_text(ln_rate_stderr: dict) -> str:
    """``fixes k to about ±3 %`` (one process) or ``fixes k(rot) to about ±3 %, k(flip) ...`` (several)."""
    def one(sd):
        return f"to about ±{100 * sd:.2g} %" if sd < 1 else "hardly at all (±100 % or worse)"

    if len(ln_rate_stderr) == 1:
        return "fixes k " + one(next(iter(ln_rate_stderr.values())))
    return "fixes " + ", ".join(f"k({name}) {one(sd)}" for name, sd in ln_rate_stderr.items())


def _reason(planned: PlannedTemperature, coalescences: Sequence[Coalescence], end: str) -> str:
    """Why a temperature is in the plan, in words."""
    kinds = sorted(set(planned.regimes.values()), key=REGIMES.index)
    parts = [f"{kinds[0]} exchange" if len(kinds) == 1 else "mixed " + "/".join(kinds) + " exchange"]
    near = _nearest_coalescence(planned.temperature_k, coalescences)
    if near:
        parts.append(near)
    parts.append("this spectrum alone " + _precision_text(planned.ln_rate_stderr))
    if end:
        parts.append(f"sets the {end} end of the 1/T span (leverage on dH‡)")
    parts.append(f"without it the dH‡ error grows by {100 * planned.enthalpy_error_growth:.0f} %")
    return "; ".join(parts)


def _enthalpy_errors(information: Sequence[np.ndarray]) -> np.ndarray:
    covariance = np.linalg.inv(sum(information))
    return np.sqrt(np.diag(covariance)[0::2])


def _candidate_range(windows: Sequence[PairTimescale], limits: tuple[float, float]) -> tuple[tuple[float, float] | None, str]:
    """Temperatures (K) worth searching: the measurable windows widened a little, inside `limits`."""
    ends = [t for w in windows for t in (w.slow_below_k, w.fast_above_k) if t is not None]
    if not ends:
        return None, "no temperature reaches the measurable window between 20 and 2000 K"
    low, high = min(ends) - CANDIDATE_MARGIN_K, max(ends) + CANDIDATE_MARGIN_K
    usable = (max(low, limits[0]), min(high, limits[1]))
    if usable[0] >= usable[1]:
        return None, (f"the measurable window ({min(ends):.0f}-{max(ends):.0f} K) lies outside the usable range"
                      f" {limits[0]:.0f}-{limits[1]:.0f} K (solvent and probe); choose another solvent or field")
    return usable, ""


def _plan_field(model: Model, activations: dict[int, ActivationParameters], windows: Sequence[PairTimescale],
                coalescences: Sequence[Coalescence], limits: tuple[float, float], settings: dict,
                solvent: Solvent | None) -> FieldPlan:
    """The D-optimal temperatures at the field of `model` (see the module notes)."""
    processes = sorted(activations)
    names = [model.process_names()[p] for p in processes]
    sf = model.spectrometer.frequency_mhz
    usable, why = _candidate_range(windows, limits)
    hz, per_point = information_grid(model)
    noise = noise_level(model, hz, settings["signal_to_noise"])
    if usable is None:
        return FieldPlan(model.spectrometer.proton_mhz, sf, [], None, [], noise, [why])
    step = max(1.0, math.ceil((usable[1] - usable[0]) / MAX_CANDIDATES))
    candidates = np.arange(math.ceil(usable[0]), math.floor(usable[1]) + 1e-9, step)

    def exact(t):
        return per_point * ln_rate_information(model_at(model, t, activations), processes, hz, noise)

    nodes, node_info = information_profile(exact, candidates[0], candidates[-1])
    rate_info = interpolated_information(nodes, node_info, candidates)
    chosen = d_optimal_temperatures(candidates, [eyring_information(t, f) for t, f in zip(candidates, rate_info)],
                                    settings["spectra"], settings["min_step_k"])
    notes = [] if len(chosen) >= settings["spectra"] else [
        f"only {len(chosen)} temperatures fit {settings['min_step_k']:g} K apart in {usable[0]:.0f}-{usable[1]:.0f} K"]
    if len(chosen) < 2:
        return FieldPlan(model.spectrometer.proton_mhz, sf, [], usable, [], noise,
                         notes + ["the spectra carry too little information to determine dH‡ and dS‡"])
    temperatures = [float(candidates[i]) for i in chosen]
    exact_info = [exact(t) for t in temperatures]
    picked = [eyring_information(t, f) for t, f in zip(temperatures, exact_info)]
    full = _enthalpy_errors(picked)
    planned = []
    for n, (t, f) in enumerate(zip(temperatures, exact_info)):
        others = picked[:n] + picked[n + 1:]
        growth = float(np.max(_enthalpy_errors(others) / full) - 1.0) if len(others) >= 2 else math.inf
        entry = _planned_temperature(model_at(model, t, activations), processes, f, growth, solvent, settings)
        end = "low-temperature" if n == 0 else "high-temperature" if n == len(chosen) - 1 else ""
        planned.append(dataclasses.replace(entry, reason=_reason(entry, coalescences, end)))
    errors = predicted_errors(np.linalg.inv(sum(picked)), names, temperatures)
    notes += _slow_note(planned, coalescences)
    return FieldPlan(model.spectrometer.proton_mhz, sf, planned, usable, errors, noise, notes)


def _planned_temperature(model: Model, processes: Sequence[int], rate_info: np.ndarray, growth: float,
                         solvent: Solvent | None, settings: dict) -> PlannedTemperature:
    """A planned temperature (the model's) without its reason: rates, regimes, precision, solvent check."""
    names = model.process_names()
    rates = model.rates()
    regimes = {f"{p.process_name}: {p.label}": rate_window(model, p, settings["detectable_fraction"]).regime(rates[p.process])
               for p in exchanging_pairs(model)}
    sd = np.sqrt(np.diag(np.linalg.pinv(rate_info)))
    t = model.temperature_k
    return PlannedTemperature(t, {names[p]: float(rates[p]) for p in processes}, regimes,
                              dict(zip((names[p] for p in processes), sd.tolist())), growth,
                              None if solvent is None else check_temperature(solvent, t, settings["margin_k"]), "")


@dataclass(frozen=True)
class ExperimentPlan(NotebookView):
    """Everything to know before booking the magnet.

    Attributes
    ----------
    model : Model
    activations : dict of str to ActivationParameters
        Per process name.
    coalescence : list of Coalescence
        Per field and exchanging pair.
    windows : list of PairTimescale
        Measurable window (intermediate exchange) per field and pair.
    fields : list of FieldPlan
        The recommended temperatures per field.
    solvent : Solvent or None
    solvent_warnings : list of SolventWarning
        For coalescence temperatures outside or near the edges of the liquid range.
    covering_solvents : list of str
        Solvents liquid around every coalescence temperature (T_c +/- 20 K, with the margin).
    usable_range_k : (float, float)
        Probe range cut to the solvent's liquid range (with the margin).
    settings : dict
        signal_to_noise, spectra, min_step_k, detectable_fraction, margin_k, probe_range_k.
    notes : list of str
    cautions : tuple of str
    transfer : list of TransferPlan
        Magnetisation transfer below the lineshape window, per process.
    """

    model: Model
    activations: dict
    coalescence: list[Coalescence]
    windows: list[PairTimescale]
    fields: list[FieldPlan]
    solvent: Solvent | None
    solvent_warnings: list[SolventWarning]
    covering_solvents: list[str]
    usable_range_k: tuple[float, float]
    settings: dict
    notes: list[str]
    cautions: tuple[str, ...] = CAUTIONS
    transfer: list["TransferPlan"] = field(default_factory=list)

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready) with the contract key ``coalescence``."""
        return {
            "title": self.model.title,
            "nucleus": self.model.spectrometer.nucleus,
            "activation": {n: a.to_dict() for n, a in self.activations.items()},
            "coalescence": [c.to_dict() for c in self.coalescence],
            "measurable_window": [w.to_dict() for w in self.windows],
            "plan": [f.to_dict() for f in self.fields],
            "solvent": None if self.solvent is None else {
                **self.solvent.to_dict(), "warnings": [w.to_dict() for w in self.solvent_warnings]},
            "covering_solvents": self.covering_solvents,
            "usable_range_k": list(self.usable_range_k),
            "settings": {k: list(v) if isinstance(v, tuple) else v for k, v in self.settings.items()},
            "linewidth_treatment": PLAN_LINEWIDTH, "linewidth_assumption": LINEWIDTH_ASSUMPTION,
            "notes": self.notes + [PLAN_CAVEAT],
            "cautions": list(self.cautions),
            "magnetisation_transfer": [t.to_dict() for t in self.transfer],
        }

    def report(self) -> str:
        """A readable report: coalescence, measurable window, plan per field, solvent check, cautions."""
        nucleus = self.model.spectrometer.nucleus
        lines = [f"Experiment plan{': ' + self.model.title if self.model.title else ''}",
                 f"Observed nucleus {nucleus}; fields are quoted as 1H frequencies."]
        lines += [f"  {name}: {act.describe()}" for name, act in self.activations.items()]
        lines += ["", "Coalescence (the pair merges into its averaged signal: two maxima become one for an uncoupled or AB pair; k is the forward rate constant of the process)",
                  f"  {'field':>7} {nucleus + ' MHz':>9}  {'signals':<34} {'|dnu|/Hz':>9} {'k_c/s^-1':>10} {'T_c/K':>7}"
                  f"   {'narrow-line k_c':>15} {'T_c/K':>7}",
                  "  (each pair on its own: only its process running, spins outside its exchanging cluster and its"
                  " named coupling partners left out; narrow-line: intrinsic linewidths -> 0)"]
        for c in self.coalescence:
            lines.append(f"  {c.proton_mhz:7.1f} {c.frequency_mhz:9.2f}  {c.pair.process_name + ': ' + c.pair.label:<34}"
                         f" {c.separation_hz:9.2f} {_number(c.rate_per_s, '10.4g')} {_number(c.temperature_k, '7.1f')}"
                         f"   {_number(c.narrow_limit_rate_per_s, '15.4g')} {_number(c.narrow_limit_temperature_k, '7.1f')}")
            if c.note:
                lines.append(f"      note: {c.note}")
        lines += [f"  ({COUPLING_PAIR_NOTE})"] * any(c.pair.coupling_changes for c in self.coalescence)
        f = self.settings["detectable_fraction"]
        lines += ["", f"Measurable window (exchange broadening from {f:g} x the linewidth on the slow side to an"
                  f" excess width of {f:g} x the linewidth on the fast side)"]
        for w in self.windows:
            lines.append(f"  {w.proton_mhz:7.1f} MHz  {w.pair.process_name}: {w.pair.label}:"
                         f" k {w.window.slow_rate_per_s:.3g}-{w.window.fast_rate_per_s:.3g} s^-1,"
                         f" T {_number(w.slow_below_k, '.1f')}-{_number(w.fast_above_k, '.1f')} K"
                         + ("  (empty: the signals are too close for their linewidth)" if w.window.is_empty else ""))
        for plan in self.fields:
            lines += ["", f"Plan at {plan.proton_mhz:g} MHz ({nucleus} at {plan.frequency_mhz:.2f} MHz;"
                      f" S/N {self.settings['signal_to_noise']:g}, D-optimal for dH‡ and dS‡)"]
            for p in plan.temperatures:
                lines.append(f"  {p.temperature_k:6.1f} K ({p.temperature_k - 273.15:6.1f} °C)  {_rates_text(p.rates_per_s)}")
                lines.append(f"           {p.reason}")
                if p.solvent_warning is not None:
                    lines.append(f"           warning: {p.solvent_warning.message}")
            lines += [f"  predicted (noise only): {e.describe()}" for e in plan.errors]
            lines += [f"  note: {n}" for n in plan.notes]
        lines += transfer_report_lines(self.transfer)
        lines += ["", self._solvent_report()]
        lines += [f"Note: {n}" for n in self.notes + [PLAN_CAVEAT, LINEWIDTH_ASSUMPTION]]
        lines += ["", "Cautions:"] + [f"  - {c}" for c in self.cautions]
        return "\n".join(lines)

    def _solvent_report(self) -> str:
        lo, hi = self.usable_range_k
        if self.solvent is None:
            text = [f"Solvent: none given; temperatures kept inside the probe range {lo:.0f}-{hi:.0f} K only."]
        else:
            s = self.solvent
            text = [f"Solvent: {s.name} (mp {s.melting_point_k:.1f} K, bp {s.boiling_point_k:.1f} K; {s.source});"
                    f" usable {lo:.0f}-{hi:.0f} K with {self.settings['margin_k']:g} K margins and the probe range."]
            text += [f"  warning: {w.message}" for w in self.solvent_warnings]
        if self.covering_solvents:
            text.append("  liquid around every coalescence temperature: " + ", ".join(self.covering_solvents))
        return "\n".join(text)

    def plot(self, figure=None):
        """Predicted VT stack at the planned temperatures, one panel per field."""
        return plot_planned_stack(self, figure=figure)

    def series_text(self, model_file: str, proton_mhz: float | None = None) -> str:
        """A series file (TOML) for ``dnmr fit`` listing the planned temperatures at one field.

        Parameters
        ----------
        model_file : str
            Path of the model file as the series file should name it (relative to the series file).
        proton_mhz : float, optional
            The field (1H MHz) whose plan is written; default the first.
        """
        plans = [f for f in self.fields if proton_mhz is None or f.proton_mhz == proton_mhz]
        if not plans or not plans[0].temperatures:
            raise InputError("the plan has no temperatures at that field to write a series file for",
                             where="--series")
        plan = plans[0]
        lines = [f"# planned by dnmr plan at {plan.proton_mhz:g} MHz: record each spectrum at its temperature and save",
                 "# it under the file named here (or change the names), then run dnmr fit on this file",
                 f"model = {_toml_string(model_file)}", "", "[fit]",
                 f"linewidth = {_toml_string(PLAN_LINEWIDTH)}   # what the plan's precision assumes; a reference line"
                 " ([fit.reference_line] ppm = ...) measures it instead", ""]
        for p in plan.temperatures:
            lines += ["[[spectrum]]", f'file = "spectra/t{p.temperature_k:.1f}K.csv"',
                      f"temperature_k = {p.temperature_k:.1f}", ""]
        return "\n".join(lines)


def _toml_string(text: str) -> str:
    return '"' + str(text).replace("\\", "\\\\").replace('"', '\\"') + '"'


def _slow_note(planned: Sequence[PlannedTemperature], coalescences: Sequence[Coalescence]) -> list[str]:
    """A note when fewer than two planned spectra are in slow exchange, where dnmr fit takes its trends."""
    rates = [c.rate_per_s for c in coalescences if c.rate_per_s is not None]
    if not rates:
        return []
    limit = SLOW_FRACTION * min(rates)
    slow = [p for p in planned if all(k < limit for k in p.rates_per_s.values())]
    if len(slow) >= 2:
        return []
    return [f"only {len(slow)} planned spectra are in slow exchange (k under {SLOW_FRACTION:g} x the coalescence rate), "
            "where dnmr fit takes the trend of shifts, couplings and linewidth: add two colder spectra, or name a "
            "reference line for the linewidth ([fit.reference_line]) and set the shifts you know"]


def _rates_text(rates_per_s: dict) -> str:
    """``k = 12.3 s^-1`` for one process, ``k: rotation 12.3 s^-1, inversion 4.5 s^-1`` for several."""
    if len(rates_per_s) == 1:
        return f"k = {next(iter(rates_per_s.values())):.3g} s^-1"
    return "k: " + ", ".join(f"{n} {k:.3g} s^-1" for n, k in rates_per_s.items())


def _number(value: float | None, spec: str) -> str:
    width = "".join(ch for ch in spec.split(".")[0] if ch.isdigit())
    return f"{'-':>{width or 1}}" if value is None else format(value, spec)


def _checked_settings(signal_to_noise: float, spectra: int, min_step_k: float, detectable_fraction: float,
                      margin_k: float, probe_range_k: Sequence[float]) -> dict:
    checks = (
        (signal_to_noise > 0, "signal_to_noise", "must be positive"),
        (int(spectra) == spectra and spectra >= 2, "spectra", "must be a whole number of at least 2"),
        (min_step_k >= 0, "min_step_k", "must not be negative (K)"),
        (0 < detectable_fraction < 1, "detectable_fraction", "must lie between 0 and 1"),
        (margin_k >= 0, "margin_k", "must not be negative (K)"),
        (len(probe_range_k) == 2 and 0 < probe_range_k[0] < probe_range_k[1], "probe_range_k",
         "needs two temperatures, low then high (K)"),
    )
    for ok, key, message in checks:
        if not ok:
            raise InputError(f"{key} {message}", where=key)
    return {"signal_to_noise": float(signal_to_noise), "spectra": int(spectra), "min_step_k": float(min_step_k),
            "detectable_fraction": float(detectable_fraction), "margin_k": float(margin_k),
            "probe_range_k": tuple(float(t) for t in probe_range_k)}


def plan_experiment(model: Model, activation: ActivationParameters | None = None, *,
                    frequencies_mhz: Sequence[float] | None = None, process: str | None = None,
                    solvent: Solvent | None = None, probe_range_k: Sequence[float] = DEFAULT_PROBE_RANGE_K,
                    signal_to_noise: float = DEFAULT_SIGNAL_TO_NOISE, spectra: int = DEFAULT_SPECTRA,
                    min_step_k: float = DEFAULT_MIN_STEP_K,
                    detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION,
                    margin_k: float = DEFAULT_MARGIN_K, r1_per_s: float | None = None,
                    transfer_runs: int | None = None) -> ExperimentPlan:
    """Coalescence temperatures per field, the measurable window, and the temperatures to run.

    Parameters
    ----------
    model : Model
        The model (shifts, couplings, linewidths, populations; its field is the default).
    activation : ActivationParameters, optional
        For `process` (default: every process); otherwise those in the model file.
    frequencies_mhz : sequence of float, optional
        Fields as 1H frequencies (MHz).
    process : str, optional
        The process `activation` belongs to.
    solvent : Solvent, optional
        Its liquid range (less `margin_k` at both ends) bounds the plan.
    probe_range_k : (float, float)
        The probe's rated range (K); default -100 to +150 deg C, a typical range: check yours.
    signal_to_noise : float
        Tallest point of the spectrum without exchange over the rms noise per point.
    spectra : int
        How many temperatures to plan.
    min_step_k : float
        Smallest step between planned temperatures (K).
    detectable_fraction : float
        Exchange broadening, as a fraction of the linewidth, that bounds the measurable window.
    margin_k : float
        Distance (K) kept from the solvent's melting and boiling points.
    r1_per_s : float, optional
        R1 (s^-1) for the magnetisation-transfer part instead of the model's ``r1_per_s`` (default: the
        model's, else a typical 1 s^-1, stated in the plan).
    transfer_runs : int, optional
        Temperatures to plan for magnetisation transfer per process (default 4; 0 for none).

    Returns
    -------
    ExperimentPlan
    """
    settings = _checked_settings(signal_to_noise, spectra, min_step_k, detectable_fraction, margin_k, probe_range_k)
    activations = process_activations(model, activation, process)
    if not activations:
        raise InputError("the plan needs activation parameters: give a barrier (dG‡) or dH‡ and dS‡,"
                         " or put them in the model file", where="activation")
    fields = checked_fields(model, frequencies_mhz)
    limits = settings["probe_range_k"]
    if solvent is not None:
        liquid = solvent.liquid_range_k(margin_k)
        limits = (max(limits[0], liquid[0]), min(limits[1], liquid[1]))
    found = _coalescences(model, activations, fields)
    windows = pair_timescales(model, activations, fields, detectable_fraction)
    plans = []
    for mhz in fields:
        here = [w for w in windows if w.proton_mhz == mhz and w.pair.process in activations]
        plans.append(_plan_field(at_field(model, mhz), activations, here,
                                 [c for c in found if c.proton_mhz == mhz], limits, settings, solvent))
    coalescence_k = [c.temperature_k for c in found if c.temperature_k is not None]
    notes = [] if solvent is not None else ["no solvent given: the temperatures are not checked against a liquid range"]
    warnings = [] if solvent is None else [w for w in (check_temperature(solvent, t, margin_k) for t in coalescence_k) if w]
    covering = [s.name for s in solvents_covering(min(coalescence_k) - 20.0, max(coalescence_k) + 20.0, margin_k,
                                                  [solvent] if solvent is not None else [])] if coalescence_k else []
    outside = [t for t in coalescence_k if not limits[0] <= t <= limits[1]]
    if outside:
        notes.append(f"coalescence at {', '.join(f'{t:.0f}' for t in outside)} K lies outside the usable range"
                     f" {limits[0]:.0f}-{limits[1]:.0f} K")
    names = model.process_names()
    transfer = plan_transfer(model, activations, windows, limits, r1_per_s,
                             DEFAULT_TRANSFER_RUNS if transfer_runs is None else transfer_runs, settings["min_step_k"])
    return ExperimentPlan(model, {names[i]: a for i, a in activations.items()}, found, windows, plans, solvent,
                          warnings, list(dict.fromkeys(covering)), limits, settings, notes, transfer=transfer)


# --------------------------------------------------------------------------------------------------
# Magnetisation transfer: temperatures and times below the lineshape window

#: Temperatures planned for magnetisation transfer per process (evenly in 1/T over its window).
DEFAULT_TRANSFER_RUNS = 4
#: Delays of a selective inversion recovery: log-spaced from this fraction of the best mixing time ...
FIRST_DELAY_FRACTION = 0.05
#: ... to this many T1 (full recovery; common practice), in this many steps.
RECOVERY_T1 = 5.0
INVERSION_DELAYS = 12
#: A study should span this much (K) for dS‡ (common practice: the wider, the better).
WIDE_SPAN_K = 60.0


def exchange_sum_rate(model: Model, index: int) -> float:
    """K = k_forward + k_reverse (s^-1) of process `index` taken as two-site exchange at the model's rates:
    the reverse rate by detailed balance (k p_from / p_to) for a site exchange, k itself for a mutual one."""
    ex, k = model.exchanges[index], float(model.rates()[index])
    if ex.from_state == ex.to_state:
        return 2.0 * k
    p = model.populations()
    return k * (1.0 + p[model.state_index(ex.from_state)] / p[model.state_index(ex.to_state)])


def best_mixing_time(r1_per_s: float, exchange_sum_per_s: float) -> float:
    """Mixing time (s) at which the cross peak of two-site exchange, exp(-R1 t) (1 - exp(-K t)), is largest:
    ln((R1 + K) / R1) / K (see the module notes)."""
    r1, k = float(r1_per_s), float(exchange_sum_per_s)
    return math.log1p(k / r1) / k if k > 0 else 1.0 / r1


def _round_times(times_s: np.ndarray) -> tuple[float, ...]:
    """Times (s) rounded to two significant figures, duplicates dropped."""
    return tuple(dict.fromkeys(float(f"{t:.2g}") for t in times_s))


@dataclass(frozen=True)
class TransferRun:
    """One temperature for magnetisation transfer and the times to record there.

    Attributes
    ----------
    temperature_k : float
    rate_per_s : float
        Predicted forward rate (s^-1).
    exchange_sum_per_s : float
        k_forward + k_reverse (s^-1).
    mixing_time_s : float
        Best mixing time of a 2D exchange spectrum (s), also where an inverted site's partner dips most.
    inversion_delays_s : tuple of float
        Delays of a selective inversion recovery (s).
    saturation_s : float
        Saturation time that reaches the steady state of a saturation transfer (s).
    """

    temperature_k: float
    rate_per_s: float
    exchange_sum_per_s: float
    mixing_time_s: float
    inversion_delays_s: tuple[float, ...]
    saturation_s: float

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"temperature_k": self.temperature_k, "rate_per_s": self.rate_per_s,
                "exchange_sum_per_s": self.exchange_sum_per_s, "mixing_time_s": self.mixing_time_s,
                "inversion_delays_s": list(self.inversion_delays_s), "saturation_s": self.saturation_s}

    def describe(self) -> str:
        """Two lines: the temperature and rate with the mixing and saturation times, then the delays."""
        delays = ", ".join(f"{d:g}" for d in self.inversion_delays_s)
        return (f"  {self.temperature_k:6.1f} K ({self.temperature_k - 273.15:6.1f} °C)  k = {self.rate_per_s:.3g} s^-1;"
                f" mixing time {self.mixing_time_s:.2g} s, steady-state saturation {self.saturation_s:.2g} s\n"
                f"           inversion delays (s): {delays}")


@dataclass(frozen=True)
class TransferPlan:
    """Magnetisation transfer for one process: its window, the temperatures and times, and how it joins
    the lineshape window.

    Attributes
    ----------
    window : TransferWindow
    runs : list of TransferRun
    lineshape_range_k : (float, float) or None
        Where lineshapes measure the process (the union over fields of its measurable windows, inside the
        usable range), K.
    notes : list of str
    """

    window: TransferWindow
    runs: list[TransferRun]
    lineshape_range_k: tuple[float, float] | None
    notes: list[str] = field(default_factory=list)

    @property
    def transfer_range_k(self) -> tuple[float, float] | None:
        """The planned transfer temperatures' range (K)."""
        return (self.runs[0].temperature_k, self.runs[-1].temperature_k) if self.runs else None

    @property
    def combined_range_k(self) -> tuple[float, float] | None:
        """From the lowest transfer temperature to the top of the lineshape window (K)."""
        ends = [r for r in (self.transfer_range_k, self.lineshape_range_k) if r is not None]
        return (min(r[0] for r in ends), max(r[1] for r in ends)) if ends else None

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        combined = self.combined_range_k
        return {**self.window.to_dict(), "runs": [r.to_dict() for r in self.runs],
                "transfer_range_k": None if self.transfer_range_k is None else list(self.transfer_range_k),
                "lineshape_range_k": None if self.lineshape_range_k is None else list(self.lineshape_range_k),
                "combined_range_k": None if combined is None else list(combined),
                "combined_span_k": None if combined is None else combined[1] - combined[0], "notes": self.notes}


def _lineshape_range(windows: Sequence[PairTimescale], process: int,
                     limits: tuple[float, float]) -> tuple[float, float] | None:
    """The union over fields of the process's measurable windows, cut to `limits` (K)."""
    ends = [(w.slow_below_k, w.fast_above_k) for w in windows if w.pair.process == process
            and w.slow_below_k is not None and w.fast_above_k is not None and not w.window.is_empty]
    if not ends:
        return None
    low, high = max(min(e[0] for e in ends), limits[0]), min(max(e[1] for e in ends), limits[1])
    return (low, high) if low < high else None


def _transfer_temperatures(low_k: float, high_k: float, runs: int, min_step_k: float) -> list[float]:
    """`runs` temperatures (K, whole kelvin) evenly in 1/T from `low_k` to `high_k`, fewer when they would
    lie closer than `min_step_k`."""
    if runs <= 0:
        return []
    count = max(1, min(runs, int((high_k - low_k) // max(min_step_k, 1e-9)) + 1))
    return sorted({float(round(1.0 / x)) for x in np.linspace(1.0 / low_k, 1.0 / high_k, count)})


def plan_transfer(model: Model, activations: dict[int, ActivationParameters], windows: Sequence[PairTimescale],
                  limits: tuple[float, float], r1_per_s: float | None = None, runs: int = DEFAULT_TRANSFER_RUNS,
                  min_step_k: float = DEFAULT_MIN_STEP_K) -> list[TransferPlan]:
    """Magnetisation transfer below the lineshape window, for every process with activation parameters.

    Parameters
    ----------
    model : Model
    activations : dict of int to ActivationParameters
        Per process index.
    windows : sequence of PairTimescale
        The lineshape windows (per field and pair) to join with.
    limits : (float, float)
        Usable temperatures (K): probe and solvent.
    r1_per_s : float, optional
        R1 (s^-1) instead of the model's (see :func:`dnmr.planning.timescale.relaxation_rate`).
    runs : int
        Temperatures per process (0: windows and ranges only).
    min_step_k : float
        Smallest step between them (K).

    Returns
    -------
    list of TransferPlan
    """
    if int(runs) != runs or runs < 0:
        raise InputError("must be a whole number, 0 or more", where="transfer_runs")
    out = []
    for index, window in zip(sorted(activations), transfer_windows(model, activations, r1_per_s)):
        notes, temps = [], []
        if window.is_empty or window.low_k is None or window.high_k is None:
            notes.append("no temperature between 20 and 2000 K gives a rate in the transfer window")
        else:
            low, high = max(window.low_k, limits[0]), min(window.high_k, limits[1])
            if low >= high:
                notes.append(f"the transfer window {window.low_k:.0f}-{window.high_k:.0f} K lies outside the usable"
                             f" range {limits[0]:.0f}-{limits[1]:.0f} K")
            else:
                temps = _transfer_temperatures(low, high, int(runs), min_step_k)
        plan = TransferPlan(window, [_transfer_run(model, activations, index, t, window.r1_per_s) for t in temps],
                            _lineshape_range(windows, index, limits), notes)
        out.append(replace(plan, notes=notes + _joining_notes(plan, activations[index])))
    return out


def _transfer_run(model: Model, activations: dict[int, ActivationParameters], index: int, temperature_k: float,
                  r1: float) -> TransferRun:
    at_t = model_at(model, temperature_k, activations)
    total = exchange_sum_rate(at_t, index)
    mixing = best_mixing_time(r1, total)
    delays = np.geomspace(FIRST_DELAY_FRACTION * mixing, RECOVERY_T1 / r1, INVERSION_DELAYS)
    return TransferRun(float(temperature_k), float(at_t.rates()[index]), total, mixing, _round_times(delays),
                       RECOVERY_T1 / (r1 + total))


def _joining_notes(plan: TransferPlan, activation: ActivationParameters) -> list[str]:
    """Whether the transfer and lineshape windows meet, and how wide the two together are."""
    combined, transfer, lineshape = plan.combined_range_k, plan.transfer_range_k, plan.lineshape_range_k
    notes = []
    if transfer and lineshape and transfer[1] < lineshape[0]:
        notes.append(f"a gap between the methods, {transfer[1]:.0f}-{lineshape[0]:.0f} K (k {activation.rate_at(transfer[1]):.2g}"
                     f"-{activation.rate_at(lineshape[0]):.2g} s^-1): neither measures it well")
    if combined and combined[1] - combined[0] < WIDE_SPAN_K:
        notes.append(f"together the methods span {combined[1] - combined[0]:.0f} K, under {WIDE_SPAN_K:g} K: dS‡ stays"
                     " poorly determined; widen the usable range (solvent, probe) if you can")
    return notes


def transfer_report_lines(plans: Sequence[TransferPlan]) -> list[str]:
    """Report lines of the magnetisation-transfer plans ([] when there are none)."""
    if not plans:
        return []
    lines = ["", "Magnetisation transfer below the lineshape window (selective inversion, saturation transfer or"
             " 2D exchange, then dnmr transfer)"]
    for plan in plans:
        lines.append(f"  {plan.window.describe()}")
        lines += [run.describe() for run in plan.runs]
        if plan.lineshape_range_k:
            lo, hi = plan.lineshape_range_k
            lines.append(f"  lineshapes: {lo:.0f}-{hi:.0f} K (measurable window, all fields)")
        if plan.combined_range_k:
            lo, hi = plan.combined_range_k
            lines.append(f"  together: {lo:.0f}-{hi:.0f} K, a span of {hi - lo:.0f} K for one Eyring analysis"
                         " (dnmr eyring with the rates tables of both)")
        lines += [f"  note: {n}" for n in plan.notes]
    return lines


def plot_planned_stack(plan: ExperimentPlan, figure=None):
    """Simulated spectra at the planned temperatures, stacked (lowest at the bottom), one panel per field.

    Parameters
    ----------
    plan : ExperimentPlan
    figure : matplotlib Figure, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    from dnmr.reporting.plotting import plot_stack, plt
    from dnmr.engine.spectrum import simulate

    shown = [f for f in plan.fields if f.temperatures]
    if not shown:
        raise InputError("the plan has no temperatures to draw", where="plot")
    tallest = max(len(f.temperatures) for f in shown)
    fig = figure if figure is not None else plt.figure(figsize=(5.0 * len(shown), 1.2 + 0.8 * tallest))
    axes = fig.subplots(1, len(shown), squeeze=False)[0]
    index = {n: i for i, n in enumerate(plan.model.process_names())}
    activations = {index[n]: a for n, a in plan.activations.items()}
    for ax, field_plan in zip(axes, shown):
        model = at_field(plan.model, field_plan.proton_mhz)
        grid = frequency_grid_ppm(model)
        spectra = [simulate(model_at(model, p.temperature_k, activations), grid) for p in field_plan.temperatures]
        labels = [f"{p.temperature_k:.0f} K, {_rates_text(p.rates_per_s)}" for p in field_plan.temperatures]
        plot_stack(spectra, labels, ax=ax, title=f"predicted, {field_plan.proton_mhz:g} MHz (1H)")
    fig.tight_layout()
    return fig
