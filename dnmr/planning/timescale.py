"""The NMR timescale of a model: where each exchanging pair is slow, intermediate or fast, and what becomes
equivalent when exchange is fast.

The view joins the planning wing's parts: the exchanging pairs (:mod:`dnmr.planning.pairs`), the regime
thresholds in rate and temperature at every field (:mod:`dnmr.planning.regimes`), the averaged spin
system of the fast processes (:mod:`dnmr.planning.fastexchange`) and the range of magnetisation
transfer below the lineshapes (:mod:`dnmr.planning.transferplan`).
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

from dnmr.activation.parameters import ActivationParameters
from dnmr.errors import InputError
from dnmr.formatting import number_or_dash
from dnmr.model import Model
from dnmr.notebook import NotebookView
from dnmr.planning.conditions import at_field, checked_fields, model_at, process_activations
from dnmr.planning.fastexchange import AveragedSystem, fast_exchange_limit
from dnmr.planning.pairs import COUPLING_PAIR_NOTE
from dnmr.planning.regimes import DEFAULT_DETECTABLE_FRACTION, PairTimescale, pair_timescales, process_regimes
from dnmr.planning.transferplan import TransferRange, transfer_lines, transfer_ranges


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
    transfer : list of TransferRange
        Where magnetisation transfer measures each process (below the lineshape range).
    """

    pairs: list[PairTimescale]
    fast_limit: AveragedSystem
    snapshots: list[ConditionSnapshot]
    activations: dict
    detectable_fraction: float
    transfer: list[TransferRange] = field(default_factory=list)

    def report(self) -> str:
        """Readable tables: thresholds per pair and field, regimes now, the averaged system."""
        f = self.detectable_fraction
        lines = [f"NMR timescale (criterion: exchange broadening of {f:g} x the intrinsic linewidth)"]
        for name, act in self.activations.items():
            lines.append(f"  {name}: {act.describe()}")
        lines.append(f"  {'1H MHz':>7}  {'signals':<34} {'|Δν|/Hz':>9} {'slow k<':>10} {'fast k>':>10}"
                     f" {'slow T<':>8} {'fast T>':>8}")
        for p in self.pairs:
            lines.append(f"  {p.proton_mhz:7.1f}  {p.pair.process_name + ': ' + p.pair.label:<34}"
                         f" {p.separation_hz:9.2f} {p.rate_range.slow_rate_per_s:10.3g} {p.rate_range.fast_rate_per_s:10.3g}"
                         f" {number_or_dash(p.slow_below_k, '8.1f')} {number_or_dash(p.fast_above_k, '8.1f')}"
                         + ("  (no intermediate range)" if p.rate_range.is_empty else ""))
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
        """Regime bands against temperature, one panel per field, with the magnetisation-transfer range
        (:func:`dnmr.reporting.planfigures.plot_regimes`)."""
        from dnmr.reporting.planfigures import plot_regimes

        return plot_regimes(self.pairs, figure=figure, transfer=self.transfer)


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
        R1 (s^-1) for the magnetisation-transfer range instead of the model's ``r1_per_s`` (or, without
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
        transfer_ranges(model, activations, r1_per_s),
    )
