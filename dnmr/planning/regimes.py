"""Slow, intermediate and fast exchange: the rates and temperatures that bound them, pair by pair.

Quantitative criteria, for each exchanging pair (:mod:`dnmr.planning.pairs`) on its own as two sites;
dnu is the shift difference, or the component shift of a coupling-averaging pair.
Slow exchange: the broadening of each signal, k_out / pi (FWHM, Hz; k_out the rate at which the
nucleus leaves that place), stays below a fraction f of the intrinsic linewidth w.
Fast exchange: the excess width of the averaged line, p1 p2 (2 pi dnu)^2 / (pi (k_out1 + k_out2)),
stays below f times the averaged linewidth.  Both are the limits of the McConnell equations
(J. Chem. Phys. 28, 430 (1958)).  In between lies intermediate exchange, which is also the range in
which a lineshape fit measures the rate.  f defaults to 0.1: a choice, about the broadening a careful
fit resolves at good signal-to-noise; for a shift pair couplings are left out of these thresholds.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from dnmr.activation.parameters import ActivationParameters
from dnmr.errors import InputError
from dnmr.model import Model
from dnmr.planning.conditions import at_field, populations_follow_temperature, solve_temperature
from dnmr.planning.pairs import ExchangingPair, PairAtField, exchanging_pairs

#: The broadening that makes exchange visible, as a fraction of the intrinsic linewidth (a choice).
DEFAULT_DETECTABLE_FRACTION = 0.1
REGIMES = ("slow", "intermediate", "fast")


@dataclass(frozen=True)
class RateRange:
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


def rate_range(model: Model, pair: ExchangingPair,
                detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> RateRange:
    """The slow and fast thresholds of `pair` at the model's field and linewidths (see module notes)."""
    if not 0 < detectable_fraction < 1:
        raise InputError(f"the detectable fraction must lie between 0 and 1, got {detectable_fraction!r}",
                         where="detectable_fraction")
    f = detectable_fraction
    (q1, q2), (r1, r2), (w1, w2) = pair.populations(model), pair.exit_factors(model), pair.linewidths_hz(model)
    slow = min(math.pi * f * w1 / r1, math.pi * f * w2 / r2)
    dnu = pair.frequency_difference_hz(model)
    fast = q1 * q2 * (2 * math.pi * dnu) ** 2 / (math.pi * f * (q1 * w1 + q2 * w2) * (r1 + r2))
    return RateRange(slow, fast, f)


def range_temperatures(model: Model, pair: ExchangingPair, activation: ActivationParameters,
                        detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> tuple[float | None, float | None]:
    """Temperatures (K) at which the process reaches the slow and the fast threshold of `pair`."""
    follows = populations_follow_temperature(model)

    def threshold(which: str) -> Callable[[float | None], float]:
        def rate(t):
            at_t = model if t is None else model.at_temperature(t)
            return getattr(rate_range(at_t, pair, detectable_fraction), which)
        return rate

    return (solve_temperature(activation, threshold("slow_rate_per_s"), follows),
            solve_temperature(activation, threshold("fast_rate_per_s"), follows))


@dataclass(frozen=True)
class PairTimescale(PairAtField):
    """Slow, intermediate and fast exchange of one pair at one field (see :class:`~dnmr.planning.pairs.PairAtField`).

    Attributes
    ----------
    rate_range : RateRange
        Forward rates (s^-1) bounding intermediate exchange.
    slow_below_k, fast_above_k : float or None
        Temperatures (K) of the two thresholds (None without activation parameters or outside 20-2000 K).
    """

    rate_range: RateRange
    slow_below_k: float | None
    fast_above_k: float | None

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {**super().to_dict(),
                "slow_rate_per_s": self.rate_range.slow_rate_per_s, "fast_rate_per_s": self.rate_range.fast_rate_per_s,
                "slow_below_k": self.slow_below_k, "fast_above_k": self.fast_above_k,
                "range_empty": self.rate_range.is_empty}


def pair_timescales(model: Model, activations: dict[int, ActivationParameters], fields: Sequence[float],
                    detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> list[PairTimescale]:
    """Regime thresholds of every exchanging pair at every field (1H MHz)."""
    out = []
    for mhz in fields:
        here = at_field(model, mhz)
        for pair in exchanging_pairs(here):
            act = activations.get(pair.process)
            temps = range_temperatures(here, pair, act, detectable_fraction) if act else (None, None)
            out.append(PairTimescale(pair, mhz, here.spectrometer.frequency_mhz, pair.shift_difference_hz(here),
                                     rate_range(here, pair, detectable_fraction), *temps))
    return out


def process_regimes(model: Model, detectable_fraction: float = DEFAULT_DETECTABLE_FRACTION) -> dict[str, str]:
    """Regime of each process at the model's own rates: fast or slow when all its pairs are, else intermediate."""
    rates = model.rates()
    found: dict[int, set[str]] = {}
    for pair in exchanging_pairs(model):
        found.setdefault(pair.process, set()).add(rate_range(model, pair, detectable_fraction).regime(rates[pair.process]))
    names = model.process_names()
    return {names[i]: (kinds.pop() if len(kinds) == 1 else "intermediate") for i, kinds in sorted(found.items())}

