"""Magnetisation transfer below the lineshape range: where it measures k, and the temperatures and times
to record.

The range
    When exchange is too slow to broaden the lines it still carries z-magnetisation from site to site
    within T1: selective inversion, saturation transfer and 2D exchange (``dnmr transfer``) measure k
    from about R1/5 (slower, relaxation erases the transfer before it shows) to a few tens s^-1 (faster,
    the sites equalise within the shortest practical delays and the lines begin to broaden, where the
    lineshapes take over); both are common practice.  R1 is the mean of the model file's ``r1_per_s``
    over its sites, a value given instead, or else a typical 1 s^-1 (T1 about 1 s, 1H of small molecules
    in mobile solvents; from memory) — stated in every report, since the range's lower end moves with
    it.  R1 is taken as the same at every temperature.

The plan
    A few temperatures evenly in 1/T over that range (inside the usable range) and, at each, the times
    to record: the mixing time of a 2D exchange spectrum (or the delay at which a selective
    inversion shows the most transfer), where the cross peak of two-site exchange with equal R1,
    exp(-R1 t) (1 - exp(-K t)) (Macura & Ernst, Mol. Phys. 41, 95 (1980); from memory), is largest:
    t = ln((R1 + K) / R1) / K, K = k_forward + k_reverse (near 1/(k + R1) while k is below R1, about
    ln(K/R1)/K when exchange is faster); the delays of a selective
    inversion recovery, log-spaced from a twentieth of that time to 5 T1 (full recovery, common practice);
    and the saturation time that reaches the steady state of a saturation transfer, 5 / (R1 + K).  The
    transfer range joined with the lineshape range (the union over the fields of the measurable ranges)
    gives the whole range one study covers.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from dnmr.activation.parameters import ActivationParameters
from dnmr.errors import InputError
from dnmr.formatting import number_or_dash
from dnmr.model import Model
from dnmr.planning.conditions import model_at
from dnmr.planning.design import DEFAULT_MIN_STEP_K
from dnmr.planning.regimes import PairTimescale

#: R1 (s^-1) used when the model gives none: typical of 1H in small molecules in mobile solvents
#: (T1 about 1 s; from memory).  Give ``r1_per_s`` in the model file, or override it, for your sample.
TYPICAL_R1_PER_S = 1.0
#: Magnetisation transfer determines k from about this fraction of R1 (common practice) ...
TRANSFER_SLOW_FRACTION_OF_R1 = 0.2
#: ... up to a few tens s^-1 (common practice).
TRANSFER_FAST_RATE_PER_S = 30.0


def relaxation_rate(model: Model, r1_per_s: float | None = None) -> tuple[float, str]:
    """R1 (s^-1) for the transfer range and where it comes from: `r1_per_s` if given, else the mean of
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
class TransferRange:
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
        Forward rates (s^-1) bounding the range: R1/5 and a few tens s^-1.
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
                "low_k": self.low_k, "high_k": self.high_k, "range_empty": self.is_empty}

    def describe(self) -> str:
        """One line: the rates and temperatures of the range."""
        if self.is_empty:
            return f"{self.process}: no range (R1 = {self.r1_per_s:.3g} s^-1 is too fast)"
        return (f"{self.process}: k {self.slow_rate_per_s:.3g}-{self.fast_rate_per_s:.3g} s^-1,"
                f" T {number_or_dash(self.low_k, '.1f')}-{number_or_dash(self.high_k, '.1f')} K"
                f" (R1 = {self.r1_per_s:.3g} s^-1 from {self.r1_source})")


def transfer_ranges(model: Model, activations: dict[int, ActivationParameters],
                     r1_per_s: float | None = None) -> list[TransferRange]:
    """The magnetisation-transfer range of every process with activation parameters (see module notes).

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
    return [TransferRange(names[i], r1, source, slow, fast, act.temperature_at(slow), act.temperature_at(fast))
            for i, act in sorted(activations.items())]


def transfer_lines(ranges: Sequence[TransferRange]) -> list[str]:
    """Report lines of the magnetisation-transfer ranges ([] when there are none)."""
    if not ranges:
        return []
    return (["Magnetisation transfer (selective inversion, saturation transfer, 2D exchange; dnmr transfer) measures"
             f" k from R1/5 to about {TRANSFER_FAST_RATE_PER_S:g} s^-1, below the lineshape range:"]
            + [f"  {w.describe()}" for w in ranges] + [""])


# --- the temperatures and times to record ----------------------------------------------------

#: Temperatures planned for magnetisation transfer per process (evenly in 1/T over its range).
DEFAULT_TRANSFER_RUNS = 4
#: Delays of a selective inversion recovery: log-spaced from this fraction of the best mixing time ...
FIRST_DELAY_FRACTION = 0.05
#: ... to this many T1 (full recovery; common practice), in this many steps.
RECOVERY_T1 = 5.0
INVERSION_DELAYS = 12
#: A study should span this much (K) for ΔS‡ (common practice: the wider, the better).
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
    """Magnetisation transfer for one process: its range, the temperatures and times, and how it joins
    the lineshape range.

    Attributes
    ----------
    rate_range : TransferRange
    runs : list of TransferRun
    lineshape_range_k : (float, float) or None
        Where lineshapes measure the process (the union over fields of its measurable ranges, inside the
        usable range), K.
    notes : list of str
    """

    rate_range: TransferRange
    runs: list[TransferRun]
    lineshape_range_k: tuple[float, float] | None
    notes: list[str] = field(default_factory=list)

    @property
    def transfer_range_k(self) -> tuple[float, float] | None:
        """The planned transfer temperatures' range (K)."""
        return (self.runs[0].temperature_k, self.runs[-1].temperature_k) if self.runs else None

    @property
    def combined_range_k(self) -> tuple[float, float] | None:
        """From the lowest transfer temperature to the top of the lineshape range (K)."""
        ends = [r for r in (self.transfer_range_k, self.lineshape_range_k) if r is not None]
        return (min(r[0] for r in ends), max(r[1] for r in ends)) if ends else None

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        combined = self.combined_range_k
        return {**self.rate_range.to_dict(), "runs": [r.to_dict() for r in self.runs],
                "transfer_range_k": None if self.transfer_range_k is None else list(self.transfer_range_k),
                "lineshape_range_k": None if self.lineshape_range_k is None else list(self.lineshape_range_k),
                "combined_range_k": None if combined is None else list(combined),
                "combined_span_k": None if combined is None else combined[1] - combined[0], "notes": self.notes}


def _lineshape_range(timescales: Sequence[PairTimescale], process: int,
                     limits: tuple[float, float]) -> tuple[float, float] | None:
    """The union over fields of the process's measurable ranges, cut to `limits` (K)."""
    ends = [(w.slow_below_k, w.fast_above_k) for w in timescales if w.pair.process == process
            and w.slow_below_k is not None and w.fast_above_k is not None and not w.rate_range.is_empty]
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


def plan_transfer(model: Model, activations: dict[int, ActivationParameters], timescales: Sequence[PairTimescale],
                  limits: tuple[float, float], r1_per_s: float | None = None, runs: int = DEFAULT_TRANSFER_RUNS,
                  min_step_k: float = DEFAULT_MIN_STEP_K) -> list[TransferPlan]:
    """Magnetisation transfer below the lineshape range, for every process with activation parameters.

    Parameters
    ----------
    model : Model
    activations : dict of int to ActivationParameters
        Per process index.
    timescales : sequence of PairTimescale
        The lineshape ranges (per field and pair) to join with.
    limits : (float, float)
        Usable temperatures (K): probe and solvent.
    r1_per_s : float, optional
        R1 (s^-1) instead of the model's (see :func:`relaxation_rate`).
    runs : int
        Temperatures per process (0: the ranges alone).
    min_step_k : float
        Smallest step between them (K).

    Returns
    -------
    list of TransferPlan
    """
    if int(runs) != runs or runs < 0:
        raise InputError("must be a whole number, 0 or more", where="transfer_runs")
    out = []
    for index, span in zip(sorted(activations), transfer_ranges(model, activations, r1_per_s)):
        notes, temps = [], []
        if span.is_empty or span.low_k is None or span.high_k is None:
            notes.append("no temperature between 20 and 2000 K gives a rate in the transfer range")
        else:
            low, high = max(span.low_k, limits[0]), min(span.high_k, limits[1])
            if low >= high:
                notes.append(f"the transfer range {span.low_k:.0f}-{span.high_k:.0f} K lies outside the usable"
                             f" range {limits[0]:.0f}-{limits[1]:.0f} K")
            else:
                temps = _transfer_temperatures(low, high, int(runs), min_step_k)
        plan = TransferPlan(span, [_transfer_run(model, activations, index, t, span.r1_per_s) for t in temps],
                            _lineshape_range(timescales, index, limits), notes)
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
    """Whether the transfer and lineshape ranges meet, and how wide the two together are."""
    combined, transfer, lineshape = plan.combined_range_k, plan.transfer_range_k, plan.lineshape_range_k
    notes = []
    if transfer and lineshape and transfer[1] < lineshape[0]:
        notes.append(f"a gap between the methods, {transfer[1]:.0f}-{lineshape[0]:.0f} K (k {activation.rate_at(transfer[1]):.2g}"
                     f"-{activation.rate_at(lineshape[0]):.2g} s^-1): neither measures it well")
    if combined and combined[1] - combined[0] < WIDE_SPAN_K:
        notes.append(f"together the methods span {combined[1] - combined[0]:.0f} K, under {WIDE_SPAN_K:g} K: ΔS‡ stays"
                     " poorly determined; widen the usable range (solvent, probe) if you can")
    return notes


def transfer_report_lines(plans: Sequence[TransferPlan]) -> list[str]:
    """Report lines of the magnetisation-transfer plans ([] when there are none)."""
    if not plans:
        return []
    lines = ["", "Magnetisation transfer below the lineshape range (selective inversion, saturation transfer or"
             " 2D exchange, then dnmr transfer)"]
    for plan in plans:
        lines.append(f"  {plan.rate_range.describe()}")
        lines += [run.describe() for run in plan.runs]
        if plan.lineshape_range_k:
            lo, hi = plan.lineshape_range_k
            lines.append(f"  lineshapes: {lo:.0f}-{hi:.0f} K (measurable range, all fields)")
        if plan.combined_range_k:
            lo, hi = plan.combined_range_k
            lines.append(f"  together: {lo:.0f}-{hi:.0f} K, a span of {hi - lo:.0f} K for one Eyring analysis"
                         " (dnmr eyring with the rates tables of both)")
        lines += [f"  note: {n}" for n in plan.notes]
    return lines
