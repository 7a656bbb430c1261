"""The experiment plan: which temperatures to run at each field, why, and how precise the result will be.

The plan joins the planning wing's parts: the coalescence of every exchanging pair
(:mod:`dnmr.planning.coalescence`), the measurable range of each (:mod:`dnmr.planning.regimes`), the
D-optimal temperatures inside the usable range of solvent and probe with the standard errors they
promise (:mod:`dnmr.planning.design`), magnetisation transfer below the lineshape range
(:mod:`dnmr.planning.transferplan`), the solvent check (:mod:`dnmr.planning.solvents`) and the
safety cautions (:mod:`dnmr.planning.cautions`).  It writes the series file for ``dnmr fit`` that
records the planned temperatures and the linewidth treatment its precision assumes.
"""
from __future__ import annotations

import dataclasses
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from dnmr.activation.parameters import ActivationParameters
from dnmr.engine.blocks import frequency_grid_ppm
from dnmr.engine.spectrum import Spectrum, simulate
from dnmr.errors import InputError
from dnmr.formatting import number_or_dash, rates_text
from dnmr.io.output import atomic_write_text
from dnmr.model import Model
from dnmr.notebook import NotebookView
from dnmr.planning.cautions import CAUTIONS
from dnmr.planning.coalescence import Coalescence, pair_coalescences
from dnmr.planning.conditions import at_field, checked_fields, model_at, process_activations
from dnmr.planning.design import (DEFAULT_MIN_STEP_K, d_optimal_temperatures, eyring_information, information_grid,
                                  information_profile, interpolated_information, ln_rate_information, noise_level,
                                  predicted_errors, PredictedErrors)
from dnmr.planning.pairs import COUPLING_PAIR_NOTE, exchanging_pairs
from dnmr.planning.regimes import DEFAULT_DETECTABLE_FRACTION, REGIMES, PairTimescale, pair_timescales, rate_range
from dnmr.planning.solvents import DEFAULT_MARGIN_K, Solvent, SolventWarning, check_temperature, solvents_covering
from dnmr.planning.transferplan import DEFAULT_TRANSFER_RUNS, TransferPlan, plan_transfer, transfer_report_lines

#: A typical range of a variable-temperature probe, -100 to +150 deg C (check your probe's rating).
DEFAULT_PROBE_RANGE_K = (173.15, 423.15)
DEFAULT_SIGNAL_TO_NOISE = 100.0
DEFAULT_SPECTRA = 8
#: Candidates reach this far (K) beyond the measurable range on both sides.
CANDIDATE_MARGIN_K = 15.0
MAX_CANDIDATES = 150

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
        Relative growth of the largest ΔH‡ standard error if this spectrum were left out.
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
        parts.append(f"sets the {end} end of the 1/T span (leverage on ΔH‡)")
    parts.append(f"without it the ΔH‡ error grows by {100 * planned.enthalpy_error_growth:.0f} %")
    return "; ".join(parts)


def _enthalpy_errors(information: Sequence[np.ndarray]) -> np.ndarray:
    covariance = np.linalg.inv(sum(information))
    return np.sqrt(np.diag(covariance)[0::2])


def _candidate_range(timescales: Sequence[PairTimescale], limits: tuple[float, float]) -> tuple[tuple[float, float] | None, str]:
    """Temperatures (K) worth searching: the measurable ranges widened a little, inside `limits`."""
    ends = [t for w in timescales for t in (w.slow_below_k, w.fast_above_k) if t is not None]
    if not ends:
        return None, "no temperature reaches the measurable range between 20 and 2000 K"
    low, high = min(ends) - CANDIDATE_MARGIN_K, max(ends) + CANDIDATE_MARGIN_K
    usable = (max(low, limits[0]), min(high, limits[1]))
    if usable[0] >= usable[1]:
        return None, (f"the measurable range ({min(ends):.0f}-{max(ends):.0f} K) lies outside the usable range"
                      f" {limits[0]:.0f}-{limits[1]:.0f} K (solvent and probe); choose another solvent or field")
    return usable, ""


def _plan_field(model: Model, activations: dict[int, ActivationParameters], timescales: Sequence[PairTimescale],
                coalescences: Sequence[Coalescence], limits: tuple[float, float], settings: dict,
                solvent: Solvent | None) -> FieldPlan:
    """The D-optimal temperatures at the field of `model` (see the module notes)."""
    processes = sorted(activations)
    names = [model.process_names()[p] for p in processes]
    sf = model.spectrometer.frequency_mhz
    usable, why = _candidate_range(timescales, limits)
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
                         notes + ["the spectra carry too little information to determine ΔH‡ and ΔS‡"])
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
    regimes = {f"{p.process_name}: {p.label}": rate_range(model, p, settings["detectable_fraction"]).regime(rates[p.process])
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
    timescales : list of PairTimescale
        Measurable range (intermediate exchange) per field and pair.
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
        Magnetisation transfer below the lineshape range, per process.
    """

    model: Model
    activations: dict
    coalescence: list[Coalescence]
    timescales: list[PairTimescale]
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
            "measurable_range": [w.to_dict() for w in self.timescales],
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
        """A readable report: coalescence, measurable range, plan per field, solvent check, cautions."""
        lines = [f"Experiment plan{': ' + self.model.title if self.model.title else ''}",
                 f"Observed nucleus {self.model.spectrometer.nucleus}; fields are quoted as 1H frequencies."]
        lines += [f"  {name}: {act.describe()}" for name, act in self.activations.items()]
        lines += self._coalescence_lines() + self._range_lines()
        for plan in self.fields:
            lines += self._field_lines(plan)
        lines += transfer_report_lines(self.transfer)
        lines += ["", self._solvent_report()]
        lines += [f"Note: {n}" for n in self.notes + [PLAN_CAVEAT, LINEWIDTH_ASSUMPTION]]
        lines += ["", "Cautions:"] + [f"  - {c}" for c in self.cautions]
        return "\n".join(lines)

    def _coalescence_lines(self) -> list[str]:
        """The report's table of coalescence rates and temperatures, with its notes."""
        nucleus = self.model.spectrometer.nucleus
        lines = ["", "Coalescence (the pair merges into its averaged signal: two maxima become one for an uncoupled"
                 " or AB pair; k is the forward rate constant of the process)",
                 f"  {'field':>7} {nucleus + ' MHz':>9}  {'signals':<34} {'|Δν|/Hz':>9} {'k_c/s^-1':>10} {'T_c/K':>7}"
                 f"   {'narrow-line k_c':>15} {'T_c/K':>7}",
                 "  (each pair on its own: only its process running, spins outside its exchanging cluster and its"
                 " named coupling partners left out; narrow-line: intrinsic linewidths -> 0)"]
        for c in self.coalescence:
            lines.append(f"  {c.proton_mhz:7.1f} {c.frequency_mhz:9.2f}  {c.pair.process_name + ': ' + c.pair.label:<34}"
                         f" {c.separation_hz:9.2f} {number_or_dash(c.rate_per_s, '10.4g')}"
                         f" {number_or_dash(c.temperature_k, '7.1f')}"
                         f"   {number_or_dash(c.narrow_limit_rate_per_s, '15.4g')}"
                         f" {number_or_dash(c.narrow_limit_temperature_k, '7.1f')}")
            lines += [f"      note: {note}" for note in c.notes]
        return lines + [f"  ({COUPLING_PAIR_NOTE})"] * any(c.pair.coupling_changes for c in self.coalescence)

    def _range_lines(self) -> list[str]:
        """The report's measurable range of every pair at every field."""
        f = self.settings["detectable_fraction"]
        lines = ["", f"Measurable range (exchange broadening from {f:g} x the linewidth on the slow side to an"
                 f" excess width of {f:g} x the linewidth on the fast side)"]
        for w in self.timescales:
            lines.append(f"  {w.proton_mhz:7.1f} MHz  {w.pair.process_name}: {w.pair.label}:"
                         f" k {w.rate_range.slow_rate_per_s:.3g}-{w.rate_range.fast_rate_per_s:.3g} s^-1,"
                         f" T {number_or_dash(w.slow_below_k, '.1f')}-{number_or_dash(w.fast_above_k, '.1f')} K"
                         + ("  (empty: the signals are too close for their linewidth)" if w.rate_range.is_empty else ""))
        return lines

    def _field_lines(self, plan: FieldPlan) -> list[str]:
        """The report's planned temperatures at one field, why each is there, and the errors they promise."""
        lines = ["", f"Plan at {plan.proton_mhz:g} MHz ({self.model.spectrometer.nucleus} at {plan.frequency_mhz:.2f} MHz;"
                 f" S/N {self.settings['signal_to_noise']:g}, D-optimal for ΔH‡ and ΔS‡)"]
        for p in plan.temperatures:
            lines.append(f"  {p.temperature_k:6.1f} K ({p.temperature_k - 273.15:6.1f} °C)  {rates_text(p.rates_per_s)}")
            lines.append(f"           {p.reason}")
            if p.solvent_warning is not None:
                lines.append(f"           warning: {p.solvent_warning.message}")
        lines += [f"  predicted (noise only): {e.describe()}" for e in plan.errors]
        return lines + [f"  note: {n}" for n in plan.notes]

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
        """Predicted VT stack at the planned temperatures, one panel per field
        (:func:`dnmr.reporting.planfigures.plot_planned_stack`)."""
        from dnmr.reporting.planfigures import plot_planned_stack

        return plot_planned_stack(self, figure=figure)

    def predicted_spectra(self, field_plan: FieldPlan) -> list[Spectrum]:
        """Spectra simulated at the planned temperatures of `field_plan` (one of :attr:`fields`), lowest first,
        on the model's frequency grid at that field (1H MHz)."""
        model = at_field(self.model, field_plan.proton_mhz)
        index = {n: i for i, n in enumerate(self.model.process_names())}
        activations = {index[n]: a for n, a in self.activations.items()}
        grid = frequency_grid_ppm(model)
        return [simulate(model_at(model, p.temperature_k, activations), grid) for p in field_plan.temperatures]

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


    def write_series_file(self, path: str | Path, model_file: str | Path, proton_mhz: float | None = None,
                          overwrite: bool = False) -> Path:
        """Write :meth:`series_text` to `path`, naming `model_file` relative to the series file's folder.

        Parameters
        ----------
        path : str or Path
            The series file (TOML) to write.
        model_file : str or Path
            The model file the plan was made from.
        proton_mhz : float, optional
            The field (1H MHz) whose plan is written; default the first.
        overwrite : bool
            Replace an existing file.

        Returns
        -------
        Path
            The file written.
        """
        relative = os.path.relpath(Path(model_file).resolve(), Path(path).resolve().parent)
        return atomic_write_text(path, self.series_text(Path(relative).as_posix(), proton_mhz), overwrite=overwrite)


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
    """Coalescence temperatures per field, the measurable range, and the temperatures to run.

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
        Exchange broadening, as a fraction of the linewidth, that bounds the measurable range.
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
        raise InputError("the plan needs activation parameters: give a barrier (ΔG‡) or ΔH‡ and ΔS‡,"
                         " or put them in the model file", where="activation")
    fields = checked_fields(model, frequencies_mhz)
    limits = settings["probe_range_k"]
    if solvent is not None:
        liquid = solvent.liquid_range_k(margin_k)
        limits = (max(limits[0], liquid[0]), min(limits[1], liquid[1]))
    found = pair_coalescences(model, activations, fields)
    timescales = pair_timescales(model, activations, fields, detectable_fraction)
    plans = []
    for mhz in fields:
        here = [w for w in timescales if w.proton_mhz == mhz and w.pair.process in activations]
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
    transfer = plan_transfer(model, activations, timescales, limits, r1_per_s,
                             DEFAULT_TRANSFER_RUNS if transfer_runs is None else transfer_runs, settings["min_step_k"])
    return ExperimentPlan(model, {names[i]: a for i, a in activations.items()}, found, timescales, plans, solvent,
                          warnings, list(dict.fromkeys(covering)), limits, settings, notes, transfer=transfer)
