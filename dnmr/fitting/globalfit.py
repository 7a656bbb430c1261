"""Global fit of a variable-temperature series: dH‡ and dS‡ fitted to all spectra at once.

Model
-----
Every spectrum i of the series (sample temperature T_i, K; its region, noise and nuisance terms as in
:mod:`dnmr.fitting.spectrumfit`) is predicted from one set of global parameters:

* rates: k_p(T_i) = (kB T_i / h) exp(dS‡_p / R) exp(-dH‡_p / (R T_i)) for every process p (Eyring,
  transmission coefficient 1); parameters ``enthalpy_kj_mol_<p>`` (kJ/mol), ``entropy_j_mol_k_<p>``
  (J/(mol K)).  T_i is the true sample temperature: the series' set-point passed through the
  calibration when one is given.
* shifts (ppm), couplings (Hz) and the intrinsic linewidth (Hz) are smooth functions of temperature,
  polynomials in (T - T_ref) with T_ref the mean temperature: ``<name>`` (value at T_ref),
  ``<name>_per_k`` (slope, per K) and ``<name>_per_k2`` (curvature, per K^2) for the trends
  ``constant``, ``linear`` (the default of all three) and ``quadratic``.  Names: ``shift_ppm_<state>_<spin>``,
  ``coupling_hz_<state>_<a>_<b>`` (every coupling the model gives), ``linewidth_hz_<state>`` (one for
  all states unless the series fits them per state).  The linewidth may instead be fitted in every
  spectrum (``per-spectrum``; then it trades against the exchange broadening in fast exchange).
  The slow-exchange spectra fix the trends; the spectra where exchange merged the lines follow them.
* populations of states whose model populations differ (or which the series fits): van 't Hoff,
  ln(p_j / p_1) = -dH_j / (R T) + dS_j / R relative to the first state, parameters
  ``state_enthalpy_kj_mol_<state>`` and ``state_entropy_j_mol_k_<state>``; otherwise the model's
  populations at T_i.
* per spectrum (prefix ``s<i>_``, i its place in the series file): amplitude, baseline, phase and
  frequency offset, fitted jointly with the rest, as its own fit options allow.  A common move of
  every line is the same as a frequency offset, so the offsets are anchored: they are held to zero mean
  and, for linear (quadratic) shift trends, to no linear (and quadratic) trend in T -- a gauge
  condition (two extra residuals) that changes nothing the spectra determine.

Any parameter the series file fixes in ``[fit.parameters]`` (``fixed = true``) is held at its ``start`` value.

Method
------
1. The ordinary two-step fit (:func:`dnmr.fitting.series.fit_series`) runs first into ``OUTDIR/two-step``: the
   result to compare with, and the data, noise estimate, region and fit options of every spectrum.  The
   start trusts neither the model file's first guesses nor what the two-step fits absorbed: every shift
   is scanned (+-15 Hz, two passes, amplitude, phase and baseline solved linearly at each point) in the
   coldest third of the spectra, taken to be in slow exchange, and the shift trends start from lines
   through what the scans found; the linewidth starts flat at the coldest spectrum's (scanned); dH‡ and
   dS‡ of the first process start from an Eyring line through the rates a scan over log k finds in each
   spectrum with a clear minimum (at least three; else the two-step Eyring line, else a line through its
   best-fit rates).  Every offset starts at 0; each spectrum's amplitude, phase and baseline (started at
   its two-step values) and offset are refitted alone, then all of them jointly with the rest: none is
   held at a two-step value.
2. All residuals (fit - data) / sigma_i are minimised together (scipy ``least_squares``, trust region).
   sigma_i is each spectrum's measured noise: the weights never depend on how well a spectrum fits.
   Every quantity of a spectrum's lineshape is an affine function of the global parameters, so its
   Jacobian block is (d prediction / d quantity) x (d quantity / d parameters): one lineshape evaluation
   per quantity (forward difference), amplitude, phase and baseline exactly; blocks are built in worker
   processes.  The fit stops once a step lowers chi-square by less than 0.01^2, i.e. moves the
   parameters by less than about 0.01 joint standard errors.
3. Covariance (J^T J)^-1 at the optimum, times the noise correlation factor, widened by the global
   reduced chi-square when that is significantly above 1 (the rule of :mod:`dnmr.fitting.spectrumfit`).  The reduced
   chi-square is reported against the measured noise; when it is too high, every spectrum that does not
   fit to its noise is named, with what would lower its chi-square most (its shifts, linewidth,
   couplings, rate or populations free in that spectrum alone, each by one Gauss-Newton step) and the
   option that loosens that trend.
4. With a calibration, its uncertainty is added.  The calibration gives the sample temperatures T with a
   covariance C_T (K^2): the curve's coefficient covariance, shared by all spectra, plus the scatter of
   its points about the curve on the diagonal (:meth:`dnmr.activation.thermometry.TemperatureCalibration.true_temperature`,
   as the two-step Eyring analysis uses it).  The optimum moves with T; differentiating the normal
   equations J^T r = 0 gives dx/dT = -(J^T J)^-1 J^T dr/dT (dr/dT by central differences, each T_i moving
   only spectrum i's residuals, T_ref held), and the covariance gains (dx/dT) C_T (dx/dT)^T (not widened
   by the chi-square).  dG‡(T) = dH‡ - T dS‡ with its error from the joint covariance, at 298.15 K and
   at the harmonic mean of the temperatures; the calibration's share of each error is reported.

Outputs (OUTDIR, atomic writes): ``global.json``, ``global.txt``, ``global_fits.png`` (spectra and fit),
``global_residuals.png`` (residuals over the noise), plus the two-step results in ``OUTDIR/two-step``;
``dnmr report OUTDIR`` (run by ``dnmr fit --global`` itself) turns them into ``report.html``.
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import lmfit
import numpy as np
from scipy import optimize

from dnmr.activation.eyring import EyringResult, eyring_fit_file
from dnmr.formatting import format_with_error
from dnmr.activation.parameters import ActivationEstimate
from dnmr.engine.blocks import lineshape_terms
from dnmr.fitting.workers import process_pool, worker_payload
from dnmr.errors import InputError
from dnmr.fitting.spectrumfit import NoiseEstimate, ParameterLayout, SpectrumFit, _error_scale, _identifier, _Problem
from dnmr.fitting.workers import single_threaded_blas
from dnmr.kinetics import (BOLTZMANN, GAS_CONSTANT, KCAL_PER_KJ, PLANCK, STANDARD_TEMPERATURE_K)
from dnmr.model import Model
from dnmr.modelparts import parse_coupling_key
from dnmr.io.output import atomic_write_text, json_ready, save_figure
from dnmr.io.progress import PLAIN_INTERVAL_S, ProgressReport
from dnmr.fitting.series import Series, SeriesFit, fit_series, load_series
from dnmr.notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from dnmr.activation.thermometry import TemperatureCalibration

TREND_DEGREES = {"constant": 0, "linear": 1, "quadratic": 2}
TREND_SUFFIXES = ("", "_per_k", "_per_k2")
SHIFT_TRENDS = ("constant", "linear", "quadratic")
LINEWIDTH_TRENDS = ("per-spectrum", "constant", "linear", "quadratic")
COUPLING_TRENDS = ("constant", "linear", "quadratic")
DEFAULT_TREND = "linear"
GLOBAL_FILES = ("global.json", "global.txt", "global_fits.png", "global_residuals.png")
TWO_STEP_FOLDER = "two-step"
NUISANCE = ("amplitude", "phase0_deg", "phase1_deg")  # with the baseline terms: exact Jacobian columns
ENTHALPY_BOUNDS_KJ_MOL = (0.0, 400.0)
ENTROPY_BOUNDS_J_MOL_K = (-400.0, 400.0)
STATE_ENTHALPY_BOUND_KJ_MOL = 200.0
STATE_ENTROPY_BOUND_J_MOL_K = 400.0
MIN_LINEWIDTH_HZ = 1e-3
STEP_TOLERANCE_SE = 0.01  # the joint fit stops once its last step was below this many standard errors
XTOL = GTOL = 1e-12  # backstops only: relative to |x| and to the gradient, they mean nothing in standard errors
SCAN_HALF_WIDTH_HZ = 15.0  # the start's scan of each shift in the coldest spectra reaches this far (Hz)
SCAN_MIN_WIDTH_HZ = 0.5  # narrowest line the shift scans use (their grid step is a quarter of it)
SCAN_RISE = 25.0  # a rate scan's minimum counts when chi-square rises by this much on both sides
GAUGE_HZ = 1e-3  # scale of the offsets' gauge residuals (any positive value gives the same fit and errors)
DIFFERENCE_STEP = {"rate": 1e-5, "shift": 1e-4, "linewidth": 1e-4, "coupling": 1e-4, "population": 1e-5,
                   "offset": 1e-4}  # forward-difference steps: log10 k, Hz, Hz, Hz, ln K, Hz (shifts converted to ppm)
FAMILY_WORDS = {"shift": "shifts", "linewidth": "linewidth", "coupling": "couplings", "rate": "rate",
                "population": "populations"}


@dataclass(frozen=True)
class Treatment:
    """How the global fit ties the spectra together.

    Parameters
    ----------
    shifts : {"constant", "linear", "quadratic"}
        Temperature trend of every chemical shift (ppm).
    linewidth : {"per-spectrum", "constant", "linear", "quadratic"}
        Intrinsic linewidth (Hz): a trend in T, or fitted in every spectrum.
    couplings : {"constant", "linear", "quadratic"}
        Temperature trend of every scalar coupling (Hz) the model gives.
    """

    shifts: str = DEFAULT_TREND
    linewidth: str = DEFAULT_TREND
    couplings: str = DEFAULT_TREND

    def __post_init__(self):
        for name, allowed in (("shifts", SHIFT_TRENDS), ("linewidth", LINEWIDTH_TRENDS), ("couplings", COUPLING_TRENDS)):
            value = getattr(self, name)
            if value not in allowed:
                raise InputError(f"{name} must be one of {', '.join(allowed)}, got {value!r}", where=f"--{name}")

    def loosened(self, family: str) -> str | None:
        """The option that lets `family` ("shift", "linewidth", "coupling") follow the data more closely,
        or None when none is left."""
        current = {"shift": self.shifts, "linewidth": self.linewidth, "coupling": self.couplings}[family]
        order = {"shift": SHIFT_TRENDS, "linewidth": ("constant", "linear", "quadratic", "per-spectrum"),
                 "coupling": COUPLING_TRENDS}[family]
        later = order[order.index(current) + 1:]
        return f"--{FAMILY_WORDS[family]} {later[0]}" if later else None


# --------------------------------------------------------------------------------------------------
# the joint problem


@dataclass
class _Member:
    """One spectrum in the global problem: its two-step fit supplies data, noise, region and fit options."""

    index: int
    temperature_k: float
    fit: SpectrumFit
    problem: _Problem  # frequencies, phase and baseline terms of its region
    base: Model  # the series' model at this temperature

    @property
    def prefix(self) -> str:
        return f"s{self.index}_"


def _member(index: int, temperature_k: float, fit: SpectrumFit, model: Model) -> _Member:
    base = model.at_temperature(temperature_k)
    problem = _Problem(ParameterLayout.for_model(base, fit.options), fit.ppm, fit.data, fit.noise)
    return _Member(index, temperature_k, fit, problem, base)


@dataclass(frozen=True)
class _Quantity:
    """One quantity of a spectrum's lineshape (a shift, a linewidth, log10 k, ...), affine in the global
    parameters: the sum over `terms` (parameter name, coefficient kind; see :func:`_coefficient`), plus
    log10(kB T/h) when `eyring`.  A per-spectrum quantity (offset, per-spectrum linewidth) has no terms: it
    is the spectrum's own parameter ``s<i>_<name>``."""

    name: str
    family: str  # shift, linewidth, coupling, rate, population, offset
    terms: tuple[tuple[str, tuple], ...]
    step: float  # forward-difference step in the quantity's unit
    eyring: bool = False


def _coefficient(kind: tuple, t: float, t_ref: float) -> float:
    """d quantity / d parameter at temperature `t` (K): ("power", j) for a trend term (T - T_ref)^j,
    "eyring-h" / "eyring-s" for log10 k against dH‡ (kJ/mol) / dS‡ (J/(mol K)), "vant-hoff-h" /
    "vant-hoff-s" for ln K against dH / dS of a state."""
    if kind[0] == "power":
        return (t - t_ref) ** kind[1]
    per_kelvin = {"eyring-h": -1e3 / (GAS_CONSTANT * t * math.log(10.0)), "eyring-s": 1.0 / (GAS_CONSTANT * math.log(10.0)),
                  "vant-hoff-h": -1e3 / (GAS_CONSTANT * t), "vant-hoff-s": 1.0 / GAS_CONSTANT}
    return per_kelvin[kind[0]]


def _eyring_constant(t: float) -> float:
    """log10(kB T / h), s^-1: log10 k at dH‡ = dS‡ = 0."""
    return math.log10(BOLTZMANN * t / PLANCK)


def _settings(members: list[_Member]) -> dict:
    """The series' per-parameter settings (those of the first fitted spectrum: series-wide ones)."""
    return dict(members[0].fit.options.parameters)


class _GlobalProblem:
    """Global parameters, the affine map from them to each spectrum's lineshape quantities, residuals and
    Jacobian blocks."""

    def __init__(self, members: list[_Member], model: Model, treatment: Treatment, van_t_hoff: bool,
                 start: dict[str, tuple[float, float]]):
        self.members, self.model, self.treatment, self.van_t_hoff = members, model, treatment, van_t_hoff
        self.reference_k = float(np.mean([m.temperature_k for m in members]))
        layout = members[0].problem.layout
        self.layout = layout
        self.processes = [n[len("log10_k_"):] for n in layout.rate_names]
        self.settings = _settings(members)
        self.params = lmfit.Parameters()
        self.quantities: list[_Quantity] = []
        self._add_rates(start)
        self._add_shifts()
        self._add_linewidths()
        self._add_couplings()
        self._add_populations()
        self._add_nuisance()
        self.names = list(self.params)
        self.free = [n for n, p in self.params.items() if p.vary]
        self.lower = np.array([self.params[n].min for n in self.free])
        self.upper = np.array([self.params[n].max for n in self.free])
        self.rows = np.cumsum([0] + [m.problem.data.size for m in members])
        owners = [self._owner(n) for n in self.free]
        self.columns = [np.array([j for j, o in enumerate(owners) if o is None or o == m.index]) for m in members]
        self.gauge = self._gauge()
        self._maps = [self.affine(m, m.temperature_k) for m in members]

    # ---- parameters --------------------------------------------------------------------------------
    def _add(self, name: str, value: float, lower: float = -np.inf, upper: float = np.inf, vary: bool = True) -> None:
        """Add a parameter; the series' ``[fit.parameters]`` may fix it (fixed = true) at its start value."""
        setting = self.settings.get(name, {})
        if setting.get("fixed") is True:
            value, vary = float(setting.get("start", value)), False
        self.params.add(name, value=float(np.clip(value, lower, upper)), min=lower, max=upper, vary=vary)

    def _quantity(self, name: str, family: str, terms: list[tuple[str, tuple]], step: float,
                  constant: bool = False) -> None:
        """A lineshape quantity: sum of coefficient(kind, T) x parameter over `terms` (plus log10(kB T/h)
        when `constant`)."""
        self.quantities.append(_Quantity(name, family, tuple(terms), step, constant))

    def _trend(self, name: str, family: str, degree: int, values: np.ndarray, step: float,
               lower: float = -np.inf, fixed_value: float | None = None) -> None:
        """Quantity `name` as a polynomial of `degree` in T - T_ref started from a line through `values`
        (one per spectrum, NaN where unknown), or held at `fixed_value` (or the series' setting)."""
        if fixed_value is not None or self.settings.get(name, {}).get("fixed") is True:
            self._add(name, values[0] if fixed_value is None else fixed_value, lower, vary=False)
            self._quantity(name, family, [(name, ("power", 0))], step)
            return
        temps = np.array([m.temperature_k for m in self.members]) - self.reference_k
        known = np.isfinite(values)
        fit_degree = min(degree, int(known.sum()) - 1)
        coef = np.zeros(degree + 1)
        if fit_degree >= 0:
            coef[:fit_degree + 1] = np.polynomial.polynomial.polyfit(temps[known], values[known], fit_degree)
        for j in range(degree + 1):
            self._add(name + TREND_SUFFIXES[j], coef[j], lower if j == 0 else -np.inf)
        self._quantity(name, family, [(name + TREND_SUFFIXES[j], ("power", j)) for j in range(degree + 1)], step)

    def _add_rates(self, start: dict[str, tuple[float, float]]) -> None:
        for proc, name in zip(self.processes, self.layout.rate_names):
            h, s = start[proc]
            self._add(f"enthalpy_kj_mol_{proc}", h, *ENTHALPY_BOUNDS_KJ_MOL)
            self._add(f"entropy_j_mol_k_{proc}", s, *ENTROPY_BOUNDS_J_MOL_K)
            self._quantity(name, "rate", [(f"enthalpy_kj_mol_{proc}", ("eyring-h",)), (f"entropy_j_mol_k_{proc}", ("eyring-s",))],
                           DIFFERENCE_STEP["rate"], constant=True)

    def _two_step(self, name: str) -> np.ndarray:
        return np.array([m.fit.parameters[name].value if name in m.fit.parameters else math.nan for m in self.members])

    def _add_shifts(self) -> None:
        """Started from the line positions of the two-step fits (shift plus that fit's frequency offset)."""
        sf = self.model.spectrometer.frequency_mhz
        offsets = self._two_step("offset_hz") / sf
        degree = TREND_DEGREES[self.treatment.shifts]
        for name in [n for names in self.layout.shift_names for n in names]:
            self._trend(name, "shift", degree, self._two_step(name) + offsets, DIFFERENCE_STEP["shift"] / sf)

    def _linewidth_keys(self) -> list[str]:
        """The linewidth quantity of each state (one for all states unless fitted per state)."""
        names = self.layout.linewidth_names
        return list(names) if self.members[0].fit.options.linewidth == "per-state" else [names[0]] * len(names)

    def _add_linewidths(self) -> None:
        """Started from the two-step widths of the coldest third of the spectra (where exchange does not
        trade against them), flat in T."""
        held = self.members[0].fit.options.linewidth == "fixed"
        cold = np.argsort([m.temperature_k for m in self.members])[:max(1, len(self.members) // 3)]
        for name in dict.fromkeys(self._linewidth_keys()):
            state = self.model.states[self.layout.linewidth_names.index(name)]
            fixed = held or self.settings.get(name, {}).get("fixed") is True
            if self.treatment.linewidth == "per-spectrum" and not fixed:
                for m in self.members:
                    self._add(f"{m.prefix}{name}", m.fit.parameters[name].value, MIN_LINEWIDTH_HZ)
                self._quantity(name, "linewidth", [], DIFFERENCE_STEP["linewidth"])
                continue
            level = float(np.nanmedian(self._two_step(name)[cold]))
            self._trend(name, "linewidth", TREND_DEGREES.get(self.treatment.linewidth, 0),
                        np.full(len(self.members), level), DIFFERENCE_STEP["linewidth"], lower=MIN_LINEWIDTH_HZ,
                        fixed_value=state.linewidth_hz if held else None)

    def coupling_names(self) -> list[list[tuple[str, str]]]:
        """Per state, (coupling key of the model, parameter name) of every coupling it gives."""
        return [[(key, "coupling_hz_" + "_".join(_identifier(x) for x in (state.name, *parse_coupling_key(key))))
                 for key in state.couplings_hz] for state in self.model.states]

    def _add_couplings(self) -> None:
        degree = TREND_DEGREES[self.treatment.couplings]
        for state, names in zip(self.model.states, self.coupling_names()):
            for key, name in names:
                self._trend(name, "coupling", degree, np.full(len(self.members), state.couplings_hz[key]),
                            DIFFERENCE_STEP["coupling"])

    def _add_populations(self) -> None:
        """van 't Hoff for every state after the first: ln(p_j/p_1) = -dH_j/(R T) + dS_j/R, started from a
        line through the two-step (or model) populations against 1/T."""
        if not self.van_t_hoff:
            return
        names = self.layout.population_names
        inverse = np.array([1.0 / m.temperature_k for m in self.members])
        pops = np.array([[m.fit.parameters[n].value for n in names] for m in self.members])
        for j, state in enumerate(self.model.states[1:], start=1):
            ln_k = np.log(pops[:, j] / pops[:, 0])
            slope, intercept = np.polyfit(inverse, ln_k, 1) if np.ptp(inverse) > 0 else (0.0, float(ln_k.mean()))
            h_name, s_name = f"state_enthalpy_kj_mol_{_identifier(state.name)}", f"state_entropy_j_mol_k_{_identifier(state.name)}"
            self._add(h_name, -slope * GAS_CONSTANT / 1e3, -STATE_ENTHALPY_BOUND_KJ_MOL, STATE_ENTHALPY_BOUND_KJ_MOL)
            self._add(s_name, intercept * GAS_CONSTANT, -STATE_ENTROPY_BOUND_J_MOL_K, STATE_ENTROPY_BOUND_J_MOL_K)
            self._quantity(f"ln_k_{_identifier(state.name)}", "population",
                           [(h_name, ("vant-hoff-h",)), (s_name, ("vant-hoff-s",))],
                           DIFFERENCE_STEP["population"])

    def _add_nuisance(self) -> None:
        """Amplitude, phases and baseline from the two-step fit (refitted before the joint fit); offset 0
        (the shift trends start at the line positions)."""
        for m in self.members:
            for n in NUISANCE + m.problem.layout.baseline_names:
                par = m.fit.parameters[n]
                self.params.add(f"{m.prefix}{n}", value=par.value, min=par.min, max=par.max,
                                vary=bool(par.vary and not par.expr))
            par = m.fit.parameters["offset_hz"]
            self.params.add(f"{m.prefix}offset_hz", value=0.0, min=par.min, max=par.max,
                            vary=m.fit.options.frequency_offset and not self.settings.get("offset_hz", {}).get("fixed", False))
        self._quantity("offset_hz", "offset", [], DIFFERENCE_STEP["offset"])

    def _owner(self, name: str) -> int | None:
        """Index of the spectrum a ``s<i>_`` parameter belongs to; None for a global parameter."""
        head = name.split("_", 1)[0]
        return int(head[1:]) if head[0] == "s" and head[1:].isdigit() else None

    def _gauge(self) -> np.ndarray:
        """Rows (over the free parameters) anchoring the offsets: a change of every offset by a polynomial
        in T of a degree that every shift trend has free, with every shift moved back by it, changes no
        spectrum; those changes are ruled out (none when an offset or a shift is held)."""
        shifts = [q.name for q in self.quantities if q.family == "shift"]
        offsets = [f"{m.prefix}offset_hz" for m in self.members]
        if not all(n in self.free for n in offsets):
            return np.zeros((0, len(self.free)))
        temps = np.array([m.temperature_k for m in self.members]) - self.reference_k
        rows = []
        for j in range(TREND_DEGREES[self.treatment.shifts] + 1):
            if not shifts or not all(n + TREND_SUFFIXES[j] in self.free for n in shifts):
                break
            row = np.zeros(len(self.free))
            row[[self.free.index(n) for n in offsets]] = temps ** j
            rows.append(row / np.linalg.norm(row))
        return np.array(rows).reshape(len(rows), len(self.free)) / GAUGE_HZ

    # ---- from global to one spectrum -------------------------------------------------------------------
    def affine(self, m: _Member, t: float) -> tuple[np.ndarray, np.ndarray]:
        """A (quantities x all parameters) and b with quantities = A g + b for spectrum `m` at `t` (K)."""
        A = np.zeros((len(self.quantities), len(self.names)))
        b = np.zeros(len(self.quantities))
        index = {n: j for j, n in enumerate(self.names)}
        for r, q in enumerate(self.quantities):
            if not q.terms:
                A[r, index[m.prefix + q.name]] = 1.0
            for name, kind in q.terms:
                A[r, index[name]] = _coefficient(kind, t, self.reference_k)
            if q.eyring:
                b[r] = _eyring_constant(t)
        return A, b

    def vector(self, x: np.ndarray) -> np.ndarray:
        """All parameter values (in ``self.names`` order) with the free ones from `x`."""
        g = np.array([self.params[n].value for n in self.names])
        g[[self.names.index(n) for n in self.free]] = x
        return g

    def values(self, x: np.ndarray) -> dict[str, float]:
        return dict(zip(self.names, (float(v) for v in self.vector(x))))

    def spectrum_model(self, m: _Member, q: np.ndarray) -> tuple[Model, float]:
        """The model of spectrum `m` with its quantities `q`, and its frequency offset (Hz)."""
        value = dict(zip((p.name for p in self.quantities), q))
        widths = self._linewidth_keys()
        states = []
        for state, shift_names, widths_key, couplings in zip(m.base.states, self.layout.shift_names, widths,
                                                             self.coupling_names()):
            changes = {"shifts_ppm": {spin: value[n] for spin, n in zip(self.model.spins, shift_names)},
                       "linewidth_hz": max(value[widths_key], MIN_LINEWIDTH_HZ)}
            if couplings:
                changes["couplings_hz"] = {**state.couplings_hz, **{key: value[n] for key, n in couplings}}
            states.append(dataclasses.replace(state, **changes))
        if self.van_t_hoff:
            ln_k = np.array([0.0] + [value[f"ln_k_{_identifier(s.name)}"] for s in m.base.states[1:]])
            weights = np.exp(ln_k - ln_k.max())
            states = [dataclasses.replace(s, population=float(w / weights.sum()), free_energy_kj_mol=None)
                      for s, w in zip(states, weights)]
        rates = [10.0 ** value[n] for n in self.layout.rate_names]
        return m.base.replace(states=tuple(states), exchanges=m.base.exchanges_at_rates(rates)), value["offset_hz"]

    def shape(self, m: _Member, q: np.ndarray) -> np.ndarray:
        """Complex lineshape S = A - i D of spectrum `m` at its frequencies."""
        model, offset = self.spectrum_model(m, q)
        return lineshape_terms(model).evaluate(m.problem.hz - offset)

    def nuisance(self, m: _Member, g: np.ndarray) -> dict[str, float]:
        """Amplitude, phases and baseline of spectrum `m` under their single-fit names."""
        names = NUISANCE + m.problem.layout.baseline_names
        return {n: float(g[self.names.index(m.prefix + n)]) for n in names}

    def parts(self, m: _Member, affine: tuple[np.ndarray, np.ndarray], g: np.ndarray) -> tuple[np.ndarray, np.ndarray, dict]:
        """Quantities q, exp(i phi) S and the nuisance values of spectrum `m` at all parameter values `g`."""
        A, b = affine
        q = A @ g + b
        values = self.nuisance(m, g)
        return q, np.exp(1j * m.problem.phase(values)) * self.shape(m, q), values

    def predict(self, m: _Member, affine: tuple[np.ndarray, np.ndarray], g: np.ndarray) -> np.ndarray:
        """Predicted spectrum `m` (intensity units) and its baseline."""
        _, turned, values = self.parts(m, affine, g)
        baseline = m.problem.baseline(values)
        return values["amplitude"] * turned.real + baseline, baseline

    # ---- residuals and derivatives ---------------------------------------------------------------------
    def _residual(self, m: _Member, affine: tuple[np.ndarray, np.ndarray], x: np.ndarray) -> np.ndarray:
        """(fit - data) / sigma of spectrum `m`: weighted by its measured noise alone."""
        try:
            pred, _ = self.predict(m, affine, self.vector(x))
        except InputError:  # parameters outside what a model allows
            return np.full(m.problem.data.size, 1e3)
        return (pred - m.problem.data) / m.problem.noise.sigma

    def member_residual(self, k: int, x: np.ndarray) -> np.ndarray:
        """(fit - data) / sigma of spectrum `k`."""
        return self._residual(self.members[k], self._maps[k], x)

    def quantity_derivatives(self, k: int, x: np.ndarray, which: Sequence[int]) -> tuple[np.ndarray, np.ndarray, dict]:
        """d prediction / d quantity of spectrum `k` for the quantities `which` (forward differences; zero
        columns for the others), with exp(i phi) S and the nuisance values at `x`."""
        m = self.members[k]
        q, turned, values = self.parts(m, self._maps[k], self.vector(x))
        rotation = values["amplitude"] * np.exp(1j * m.problem.phase(values))
        base = values["amplitude"] * turned.real
        out = np.zeros((m.problem.data.size, len(self.quantities)))
        for r in which:
            moved = q.copy()
            moved[r] += self.quantities[r].step
            try:
                out[:, r] = ((rotation * self.shape(m, moved)).real - base) / self.quantities[r].step
            except InputError:
                continue
        return out, turned, values

    def member_jacobian(self, k: int, x: np.ndarray) -> np.ndarray:
        """d residual / d x of spectrum `k` in its columns ``self.columns[k]`` (the global parameters and its own)."""
        m, p = self.members[k], self.members[k].problem
        cols = self.columns[k]
        A = self._maps[k][0][:, [self.names.index(self.free[j]) for j in cols]]
        try:
            D, turned, values = self.quantity_derivatives(k, x, [r for r in range(len(self.quantities)) if np.any(A[r])])
        except InputError:
            return np.zeros((p.data.size, len(cols)))
        out = D @ A
        for c, j in enumerate(cols):
            name = self.free[j]
            exact = _nuisance_column(name[len(m.prefix):], values, turned, p) if name.startswith(m.prefix) else None
            if exact is not None:
                out[:, c] = exact
        return out / p.noise.sigma

    def temperature_derivative(self, k: int, x: np.ndarray, step_k: float = 0.01) -> np.ndarray:
        """d residual / d T_k of spectrum `k` (central difference, `step_k` K; T_ref held)."""
        m = self.members[k]
        moved = []
        for s in (step_k, -step_k):
            t = m.temperature_k + s
            shifted = dataclasses.replace(m, temperature_k=t, base=self.model.at_temperature(t))
            moved.append(self._residual(shifted, self.affine(shifted, t), x))
        return (moved[0] - moved[1]) / (2.0 * step_k)


def _nuisance_column(name: str, values: dict[str, float], turned: np.ndarray, p: _Problem) -> np.ndarray | None:
    """d(prediction)/d(`name`) of one spectrum for its amplitude, phases and baseline (exact), or None for
    another parameter. `turned` is exp(i phi) S, the prediction is amplitude Re(turned) + baseline."""
    if name == "amplitude":
        return turned.real
    if name == "phase0_deg":
        return -values["amplitude"] * turned.imag * (math.pi / 180.0)
    if name == "phase1_deg":
        return -values["amplitude"] * turned.imag * np.radians((p.hz - p.centre) / p.span)
    if name in p.layout.baseline_names:
        return p.powers[:, p.layout.baseline_names.index(name)]
    return None


def _blocks(problem: _GlobalProblem, kind: str, x: np.ndarray, ks: Sequence[int]) -> list:
    """Residuals, Jacobian blocks, temperature derivatives or nuisance refits (`kind`) of spectra `ks` at `x`."""
    work = {"residual": problem.member_residual, "jacobian": problem.member_jacobian,
            "temperature": problem.temperature_derivative, "nuisance": _refit_nuisance_of}[kind]
    return [work(k, x) if kind != "nuisance" else work(problem, k, x) for k in ks]


def _worker_blocks(kind: str, x: np.ndarray, ks: Sequence[int]) -> list:
    return _blocks(worker_payload(), kind, x, ks)


def _refit_nuisance_of(problem: _GlobalProblem, k: int, x: np.ndarray) -> np.ndarray:
    """Spectrum `k`'s own free parameters (amplitude, phases, baseline, offset, per-spectrum linewidth)
    refitted with every global parameter held at `x`; returns their values (in ``problem.columns[k]``
    order, globals unchanged)."""
    cols = problem.columns[k]
    own = np.array([problem._owner(problem.free[j]) is not None for j in cols])
    index = cols[own]
    if index.size == 0:
        return x[cols]

    def residual(y):
        trial = x.copy()
        trial[index] = y
        return problem.member_residual(k, trial)

    def jacobian(y):
        trial = x.copy()
        trial[index] = y
        return problem.member_jacobian(k, trial)[:, own]

    y0 = np.clip(x[index], problem.lower[index], problem.upper[index])
    fitted = optimize.least_squares(residual, y0, jac=jacobian, bounds=(problem.lower[index], problem.upper[index]),
                                    x_scale="jac", ftol=1e-8, xtol=1e-10, method="trf", max_nfev=50 * (index.size + 1))
    out = x[cols].copy()
    out[own] = fitted.x
    return out


class _Evaluator:
    """Evaluates a :class:`_GlobalProblem` spectrum by spectrum, in this process or in `workers` processes;
    `step` is called at every evaluation of the residuals (for the progress report)."""

    def __init__(self, problem: _GlobalProblem, workers: int, step: Callable[[], None] | None = None):
        self.problem, self.step = problem, step
        n = len(problem.members)
        self.workers = max(1, min(workers, n))
        self.chunks = [list(range(n))[i::self.workers] for i in range(self.workers)]
        self.pool = (process_pool(self.workers, problem)
                     if self.workers > 1 else None)

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)

    def each(self, kind: str, x: np.ndarray) -> list:
        """Blocks of every spectrum, in order."""
        if self.pool is None:
            parts = [_blocks(self.problem, kind, x, c) for c in self.chunks]
        else:
            parts = list(self.pool.map(_worker_blocks, [kind] * len(self.chunks), [x] * len(self.chunks), self.chunks))
        out: list = [None] * len(self.problem.members)
        for chunk, blocks in zip(self.chunks, parts):
            for k, b in zip(chunk, blocks):
                out[k] = b
        return out

    def residual(self, x: np.ndarray) -> np.ndarray:
        """Residuals of every spectrum, one after the other, then the offsets' gauge rows."""
        if self.step is not None:
            self.step()
        return np.concatenate(self.each("residual", x) + [self.problem.gauge @ x])

    def jacobian(self, x: np.ndarray) -> np.ndarray:
        """The full (dense) Jacobian, assembled from the spectra's blocks, then the gauge rows."""
        rows = self.problem.rows
        out = np.zeros((int(rows[-1]), len(self.problem.free)))
        for k, block in enumerate(self.each("jacobian", x)):
            out[rows[k]:rows[k + 1], self.problem.columns[k]] = block
        return np.vstack([out, self.problem.gauge])

    def temperature_jacobian(self, x: np.ndarray) -> np.ndarray:
        """d residuals / d T (one column per spectrum, K^-1; zero on the gauge rows)."""
        rows = self.problem.rows
        out = np.zeros((int(rows[-1]) + self.problem.gauge.shape[0], len(self.problem.members)))
        for k, column in enumerate(self.each("temperature", x)):
            out[rows[k]:rows[k + 1], k] = column
        return out

    def refit_nuisance(self, x: np.ndarray) -> np.ndarray:
        """`x` with every spectrum's own parameters refitted at its global parameters."""
        out = x.copy()
        for k, values in enumerate(self.each("nuisance", x)):
            cols = self.problem.columns[k]
            own = [j for j in cols if self.problem._owner(self.problem.free[j]) is not None]
            out[own] = values[[list(cols).index(j) for j in own]]
        return out


def _linear_chi_square(m: _Member, turned: np.ndarray) -> float:
    """Chi-square of spectrum `m` against the lineshape exp(i phi1) S (`turned`) with amplitude, zero-order
    phase and baseline solved by linear least squares."""
    design = np.column_stack([turned.real, -turned.imag, m.problem.powers])
    coef, *_ = np.linalg.lstsq(design, m.problem.data, rcond=None)
    left = m.problem.data - design @ coef
    return float(left @ left) / m.problem.noise.sigma ** 2


def _rows(problem: _GlobalProblem, family: str) -> list[int]:
    """Indices of the quantities of one family."""
    return [r for r, quantity in enumerate(problem.quantities) if quantity.family == family]


class _Scanner:
    """Chi-square of one spectrum at chosen lineshape quantities, with amplitude, zero-order phase and
    baseline solved linearly and the offset at 0: what the start's scans minimise."""

    def __init__(self, problem: _GlobalProblem, k: int, g: np.ndarray):
        self.problem, self.m = problem, problem.members[k]
        A, b = problem._maps[k]
        self.q = A @ g + b
        self.q[_rows(problem, "offset")] = 0.0
        self.phase1 = np.exp(1j * self.m.problem.phase(problem.nuisance(self.m, g), zero_order=False))

    def chi_square(self, q: np.ndarray) -> float:
        try:
            return _linear_chi_square(self.m, self.phase1 * self.problem.shape(self.m, q))
        except InputError:
            return math.inf

    def scan(self, r: int, grid: np.ndarray) -> np.ndarray:
        """Chi-square with quantity `r` at each value of `grid` (the others at ``self.q``)."""
        out = []
        for value in grid:
            q = self.q.copy()
            q[r] = value
            out.append(self.chi_square(q))
        return np.array(out)

    def best(self, r: int, grid: np.ndarray) -> float:
        """Set quantity `r` to the best point of `grid` and return it."""
        self.q[r] = float(grid[int(np.argmin(self.scan(r, grid)))])
        return self.q[r]


def _scanned_lines(problem: _GlobalProblem, cold: Sequence[int], g: np.ndarray) -> tuple[np.ndarray, float]:
    """Shift quantities (ppm) in each spectrum of `cold` (coldest first) and the linewidth (Hz) in the
    coldest, in the slow-exchange limit: each shift scanned in turn (two passes) over +-SCAN_HALF_WIDTH_HZ
    (at least 5 linewidths) around where the previous spectrum had it, at the model's first-guess
    linewidth (at least SCAN_MIN_WIDTH_HZ), on a grid of a quarter of it; then the linewidth over 0.05-20 Hz."""
    shifts, widths, rates = _rows(problem, "shift"), _rows(problem, "linewidth"), _rows(problem, "rate")
    sf = problem.model.spectrometer.frequency_mhz
    guess = max(float(np.max(problem.model.linewidths_hz())), SCAN_MIN_WIDTH_HZ)
    grid = np.arange(-max(SCAN_HALF_WIDTH_HZ, 5 * guess), max(SCAN_HALF_WIDTH_HZ, 5 * guess) + 1e-9, guess / 4) / sf
    found, previous, width = [], None, guess
    for k in cold:
        scanner = _Scanner(problem, int(k), g)
        scanner.q[rates] = math.log10(problem.members[0].fit.options.rate_limits_per_s[0])
        scanner.q[widths] = guess
        if previous is not None:
            scanner.q[shifts] = previous
        for _ in range(2):
            for r in shifts:
                scanner.best(r, scanner.q[r] + grid)
        previous = scanner.q[shifts].copy()
        found.append(previous)
        if k == cold[0]:
            for r in widths:
                width = scanner.best(r, np.geomspace(0.05, 20.0, 41))
    return np.array(found), width


def _scanned_rates(problem: _GlobalProblem, g: np.ndarray) -> list[tuple[float, float]]:
    """(T, log10 k) of every spectrum whose chi-square over the rate scan has a clear minimum inside the
    range (risen by at least SCAN_RISE on both sides), the first process's rate scanned, the other
    quantities at `g`."""
    rows = _rows(problem, "rate")
    options = problem.members[0].fit.options
    grid = np.linspace(*np.log10(options.rate_scan_per_s), options.scan_points)
    out = []
    for k, m in enumerate(problem.members):
        chi = _Scanner(problem, k, g).scan(rows[0], grid)
        best = int(np.argmin(chi))
        if np.isfinite(chi).all() and chi[:best + 1].max() - chi[best] > SCAN_RISE and chi[best:].max() - chi[best] > SCAN_RISE:
            out.append((m.temperature_k, float(grid[best])))
    return out


def _robust_start(problem: _GlobalProblem, x: np.ndarray) -> np.ndarray:
    """`x` restarted where first guesses and the two-step fit may mislead: shift trends from the lines a scan
    finds in the coldest spectra (a third of them, at least two; assumed in slow exchange), the linewidth
    flat at the coldest spectrum's, every offset at 0; then dH‡ and dS‡ of the first process from an
    Eyring line through the rates a scan finds in each spectrum (where at least three have a clear
    minimum; else the two-step start is kept)."""
    order = np.argsort([m.temperature_k for m in problem.members])
    cold = order[:max(2, len(order) // 3)]
    out = x.copy()
    put = lambda name, value: out.__setitem__(problem.free.index(name), value) if name in problem.free else None  # noqa: E731
    for m in problem.members:
        put(m.prefix + "offset_hz", 0.0)
    found, width = _scanned_lines(problem, cold, problem.vector(out))
    temps = np.array([problem.members[k].temperature_k for k in cold]) - problem.reference_k
    degree = min(TREND_DEGREES[problem.treatment.shifts], len(cold) - 1)
    for r, values in zip(_rows(problem, "shift"), found.T):
        for j, c in enumerate(np.polynomial.polynomial.polyfit(temps, values, degree)):
            put(problem.quantities[r].name + TREND_SUFFIXES[j], c)
    for r in _rows(problem, "linewidth"):
        name = problem.quantities[r].name
        put(name, width)
        put(name + TREND_SUFFIXES[1], 0.0)
        put(name + TREND_SUFFIXES[2], 0.0)
        for m in problem.members:
            put(m.prefix + name, width)
    rates = _scanned_rates(problem, problem.vector(np.clip(out, problem.lower, problem.upper)))
    if len(rates) >= 3:
        t, log_k = np.array(rates).T
        slope, intercept = np.polyfit(1.0 / t, log_k * math.log(10.0) - np.log(t), 1)
        put(f"enthalpy_kj_mol_{problem.processes[0]}", -slope * GAS_CONSTANT / 1e3)
        put(f"entropy_j_mol_k_{problem.processes[0]}", (intercept - math.log(BOLTZMANN / PLANCK)) * GAS_CONSTANT)
    return np.clip(out, problem.lower, problem.upper)


def _solve(problem: _GlobalProblem, evaluator: _Evaluator) -> tuple[optimize.OptimizeResult, np.ndarray | None]:
    """Least squares from the start (shifts from a scan of the coldest spectra, the own parameters of every
    spectrum refitted); returns the result and (J^T J)^-1 (None if singular)."""
    x0 = np.clip([problem.params[n].value for n in problem.free], problem.lower, problem.upper)
    x0 = evaluator.refit_nuisance(_robust_start(problem, x0))
    # A Gauss-Newton step that lowers the cost (chi-square / 2) by dF moved the parameters by about sqrt(2 dF)
    # joint standard errors, so stop when dF < STEP_TOLERANCE_SE^2 / 2: as a fraction of the cost, at most
    # that over the starting cost (steps then converge quickly: the next is smaller still).
    start = evaluator.residual(x0)
    ftol = max(0.5 * STEP_TOLERANCE_SE ** 2 / max(0.5 * float(start @ start), 1e-300), float(np.finfo(float).eps))
    result = optimize.least_squares(evaluator.residual, x0, jac=evaluator.jacobian, bounds=(problem.lower, problem.upper),
                                    x_scale="jac", ftol=min(ftol, 1e-4), xtol=XTOL, gtol=GTOL, method="trf",
                                    max_nfev=200 * (len(problem.free) + 1))
    try:
        covariance = np.linalg.inv(result.jac.T @ result.jac)
    except np.linalg.LinAlgError:
        covariance = None
    return result, covariance


# --------------------------------------------------------------------------------------------------
# how well each spectrum fits, and why not


@dataclass(frozen=True)
class SpectrumQuality:
    """How well the global fit describes one spectrum, against its measured noise.

    Attributes
    ----------
    file : str
        The spectrum.
    setpoint_k, temperature_k : float
        Its temperature as the series gives it, and the sample temperature used (K).
    points : int
        Points fitted.
    chi_square : float
        sum ((data - global fit) / sigma)^2 over its points, sigma its measured noise.
    two_step_chi_square : float
        The same for its own two-step fit (every parameter free in that spectrum alone).
    correlation_factor : float
        Its noise correlation factor.
    misfit : bool
        Its chi-square per point is significantly above 1 (the rule of a single fit).
    gains : dict
        When a misfit: by how much its chi-square would fall (one Gauss-Newton step) with each family of
        its lineshape quantities ("shifts", "linewidth", "couplings", "rate", "populations") free in this
        spectrum alone.
    """

    file: str
    setpoint_k: float
    temperature_k: float
    points: int
    chi_square: float
    two_step_chi_square: float
    correlation_factor: float
    misfit: bool
    gains: dict = field(default_factory=dict)

    @property
    def per_point(self) -> float:
        """Chi-square per point of the global fit."""
        return self.chi_square / self.points

    @property
    def two_step_per_point(self) -> float:
        """Chi-square per point of the two-step fit."""
        return self.two_step_chi_square / self.points

    def to_dict(self) -> dict:
        """Plain data."""
        return {**dataclasses.asdict(self), "chi_square_per_point": self.per_point,
                "two_step_chi_square_per_point": self.two_step_per_point}


def _family_gains(problem: _GlobalProblem, k: int, x: np.ndarray) -> dict[str, float]:
    """Fall of spectrum `k`'s chi-square from one Gauss-Newton step with each family of its lineshape
    quantities free in it alone (its own amplitude, phase, baseline and offset refitted alongside)."""
    m = problem.members[k]
    families = {q.family for q in problem.quantities} - {"offset"}
    D, turned, values = problem.quantity_derivatives(k, x, range(len(problem.quantities)))
    free = [n for n in NUISANCE + m.problem.layout.baseline_names if m.prefix + n in problem.free]
    own = [_nuisance_column(n, values, turned, m.problem) for n in free]
    if m.prefix + "offset_hz" in problem.free:
        own.append(D[:, [q.family for q in problem.quantities].index("offset")])
    residual = problem.member_residual(k, x)
    sigma = m.problem.noise.sigma
    base = np.column_stack(own) / sigma

    def explained(columns: np.ndarray) -> float:
        coef, *_ = np.linalg.lstsq(columns, residual, rcond=None)
        fitted = columns @ coef
        return float(fitted @ fitted)

    floor = explained(base)
    out = {}
    for family in sorted(families):
        cols = [r for r, q in enumerate(problem.quantities) if q.family == family]
        out[FAMILY_WORDS[family]] = max(explained(np.column_stack([base, D[:, cols] / sigma])) - floor, 0.0)
    return out


def _qualities(problem: _GlobalProblem, x: np.ndarray, residuals: list[np.ndarray],
               setpoints: np.ndarray) -> list[SpectrumQuality]:
    out = []
    for k, (m, r) in enumerate(zip(problem.members, residuals)):
        chi2 = float(r @ r)
        own = len([j for j in problem.columns[k] if problem._owner(problem.free[j]) is not None])
        _, flags, _ = _error_scale(chi2, r.size - own, m.fit.noise)
        misfit = "misfit" in flags
        two_step = float(m.fit.chi_square)
        out.append(SpectrumQuality(m.fit.source, float(setpoints[k]), m.temperature_k, int(r.size), chi2, two_step,
                                   m.fit.noise.correlation_factor, misfit,
                                   _family_gains(problem, k, x) if misfit else {}))
    return out


def _misfit_notes(qualities: list[SpectrumQuality], treatment: Treatment, reduced: float) -> list[str]:
    """Which spectra the global fit does not describe, and what would let it follow them."""
    bad = [q for q in qualities if q.misfit]
    if not bad:
        return [f"reduced chi-square {reduced:.2f} against the measured noise, but no single spectrum misfits "
                "significantly: small misfits spread over the series (check the noise regions)"]
    temps = sorted(q.temperature_k for q in qualities)
    ends = {temps[0], temps[-1]}
    names = ", ".join(f"{q.temperature_k:.1f} K ({Path(q.file).name}: chi-square per point {q.per_point:.2f}, "
                      f"two-step {q.two_step_per_point:.2f})" for q in sorted(bad, key=lambda q: q.temperature_k))
    notes = [f"reduced chi-square {reduced:.2f} against the measured noise: the global model does not describe "
             f"every spectrum. Spectra that misfit: {names}"]
    own_misfit = [q for q in bad if q.two_step_per_point > 1.0 + 3.0 * math.sqrt(2.0 * q.correlation_factor / q.points)]
    if own_misfit:
        notes.append("misfit in their own two-step fit as well (" + ", ".join(f"{q.temperature_k:.1f} K" for q in own_misfit)
                     + "): the model does not describe these spectra even alone (baseline order, phase, an impurity, "
                     "the spin system?); see the two-step notes")
    totals: dict[str, float] = {}
    for q in bad:
        for family, gain in q.gains.items():
            totals[family] = totals.get(family, 0.0) + gain
    excess = sum(q.chi_square - q.points for q in bad)
    if totals and excess > 0:
        family, gain = max(totals.items(), key=lambda item: item[1])
        where = ("at the ends of the temperature range" if all(q.temperature_k in ends for q in bad)
                 else "in these spectra")
        advice = {
            "shifts": ("shifts", treatment.loosened("shift")),
            "linewidth": ("linewidth", treatment.loosened("linewidth")),
            "couplings": ("couplings", treatment.loosened("coupling")),
        }
        text = (f"freeing the {family} of each misfitting spectrum alone would lower chi-square by {gain:.0f} of "
                f"the {excess:.0f} by which these spectra exceed their noise")
        if family in advice:
            _, option = advice[family]
            trend = {"shifts": treatment.shifts, "linewidth": treatment.linewidth, "couplings": treatment.couplings}[family]
            text += (f": the {trend} {family} trend cannot follow the data {where}; "
                     + (f"try {option}" if option else "no looser trend is available: check those spectra's referencing "
                        "and region"))
        elif family == "rate":
            text += (": the rates do not follow one Eyring line through these temperatures (wrong temperatures? "
                     "give --calibration; a second process?)")
        else:
            text += ": the populations do not follow van 't Hoff (ln K linear in 1/T) over this range"
        notes.append(text)
    return notes


# --------------------------------------------------------------------------------------------------
# results


def _share(covariance: np.ndarray, harmonic_mean_k: float) -> dict[str, float]:
    """Standard errors from a 2x2 covariance of (dH‡ kJ/mol, dS‡ J/(mol K)): dH‡, dS‡, dG‡ at 298.15 K and
    at `harmonic_mean_k` (K)."""
    gibbs = [np.array([1.0, -t / 1e3]) for t in (STANDARD_TEMPERATURE_K, harmonic_mean_k)]
    return {"enthalpy_kj_mol": float(math.sqrt(covariance[0, 0])), "entropy_j_mol_k": float(math.sqrt(covariance[1, 1])),
            "gibbs_298_kj_mol": float(math.sqrt(gibbs[0] @ covariance @ gibbs[0])),
            "gibbs_hm_kj_mol": float(math.sqrt(gibbs[1] @ covariance @ gibbs[1]))}


@dataclass
class GlobalFit(NotebookView):
    """The global fit of a series.

    Attributes
    ----------
    series : Series
        What was fitted.
    outdir : Path
        Where the outputs are.
    activation : list of ActivationEstimate
        One per process.
    two_step : list of EyringResult
        Eyring analysis of the two-step rates, one per process.
    temperatures_k : ndarray
        True sample temperatures of the fitted spectra (K).
    setpoints_k : ndarray
        Their temperatures as the series gives them (K).
    fits : list of SpectrumFit
        Each fitted spectrum with the global fit's curve (``fitted``) in place of its own.
    parameters : dict
        Every global parameter: estimate, stderr, fixed.
    chi_square, reduced_chi_square : float
        Of the weighted residuals; degrees of freedom `degrees_of_freedom`.
    degrees_of_freedom : int
        Points minus free parameters.
    error_scale : float
        Factor applied to the covariance (1 unless the fit is a misfit).
    options : dict
        shifts, linewidth, couplings, populations, calibration used.
    spectra : list of SpectrumQuality
        How well each spectrum is described, against its measured noise and beside its two-step fit.
    notes : list of str
        Remarks.
    function_evaluations, jacobian_evaluations : int
        Residual and Jacobian evaluations of the joint least squares (all spectra each).
    temperature_stderr_k : ndarray or None
        Standard error of each sample temperature from the calibration, K (None without a calibration).
    """

    series: Series
    outdir: Path
    activation: list[ActivationEstimate]
    two_step: list[EyringResult]
    temperatures_k: np.ndarray
    setpoints_k: np.ndarray
    fits: list[SpectrumFit]
    parameters: dict
    chi_square: float
    reduced_chi_square: float
    degrees_of_freedom: int
    error_scale: float
    options: dict
    spectra: list[SpectrumQuality] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    function_evaluations: int = 0
    jacobian_evaluations: int = 0
    temperature_stderr_k: np.ndarray | None = None

    @property
    def harmonic_mean_temperature_k(self) -> float:
        """Harmonic mean of the fitted temperatures, K (where dG‡ is best determined)."""
        return float(len(self.temperatures_k) / np.sum(1.0 / self.temperatures_k))

    def _process_dict(self, a: ActivationEstimate) -> dict:
        t_hm = self.harmonic_mean_temperature_k
        g298, g_hm = a.gibbs(STANDARD_TEMPERATURE_K), a.gibbs(t_hm)
        out = {"process": a.process, "enthalpy_kj_mol": a.enthalpy_kj_mol, "enthalpy_stderr": a.enthalpy_stderr,
               "entropy_j_mol_k": a.entropy_j_mol_k, "entropy_stderr": a.entropy_stderr,
               "gibbs_298_kj_mol": g298[0], "gibbs_298_stderr": g298[1],
               "harmonic_mean_temperature_k": t_hm, "gibbs_hm_kj_mol": g_hm[0], "gibbs_hm_stderr": g_hm[1],
               "correlation_enthalpy_entropy": a.correlation,
               "enthalpy_kcal_mol": a.enthalpy_kj_mol * KCAL_PER_KJ, "enthalpy_kcal_stderr": a.enthalpy_stderr * KCAL_PER_KJ,
               "entropy_cal_mol_k": a.entropy_j_mol_k * KCAL_PER_KJ, "entropy_cal_stderr": a.entropy_stderr * KCAL_PER_KJ,
               "gibbs_298_kcal_mol": g298[0] * KCAL_PER_KJ, "gibbs_298_kcal_stderr": g298[1] * KCAL_PER_KJ,
               "calibration_error_included": a.calibration_covariance is not None}
        if a.calibration_covariance is not None:
            for part, cov in a.error_shares().items():
                out[f"{part}_share_stderr"] = _share(cov, t_hm)
        k = self.activation.index(a)
        out["rates"] = []
        t_errors = (np.full(len(self.temperatures_k), math.nan) if self.temperature_stderr_k is None
                    else self.temperature_stderr_k)
        for t, t_err, t_set, fit in zip(self.temperatures_k, t_errors, self.setpoints_k, self.fits):
            ln_k, se = a.ln_rate(float(t))
            own = fit.rates[k]
            out["rates"].append({"temperature_k": float(t), "temperature_stderr": float(t_err),
                                 "setpoint_k": float(t_set), "rate_per_s": math.exp(ln_k),
                                 "rate_stderr": math.exp(ln_k) * se, "two_step_rate_per_s": own.rate_per_s,
                                 "two_step_status": own.status})
        return out

    def comparison(self) -> list[dict]:
        """Global against two-step (per-temperature rates, then Eyring): one row per process and quantity."""
        rows = []
        t_hm = self.harmonic_mean_temperature_k
        for a, e in zip(self.activation, self.two_step):
            pairs = [("enthalpy_kj_mol", (a.enthalpy_kj_mol, a.enthalpy_stderr), (e.enthalpy_kj_mol, e.enthalpy_stderr)),
                     ("entropy_j_mol_k", (a.entropy_j_mol_k, a.entropy_stderr), (e.entropy_j_mol_k, e.entropy_stderr)),
                     ("gibbs_298_kj_mol", a.gibbs(STANDARD_TEMPERATURE_K), tuple(e.gibbs(STANDARD_TEMPERATURE_K))),
                     ("gibbs_hm_kj_mol", a.gibbs(t_hm), tuple(e.gibbs(t_hm))),
                     ("correlation_enthalpy_entropy", (a.correlation, math.nan), (e.correlation, math.nan))]
            for quantity, (gv, gs), (tv, ts) in pairs:
                rows.append({"process": a.process, "quantity": quantity, "global": gv, "global_stderr": gs,
                             "two_step": tv, "two_step_stderr": ts, "difference": gv - tv})
        return rows

    def to_dict(self) -> dict:
        """Plain data (JSON-ready): the first process's contract keys at the top level, every process
        under ``processes``, the comparison, the parameters and the fit statistics."""
        processes = [self._process_dict(a) for a in self.activation]
        out = {k: v for k, v in processes[0].items() if k != "rates"}
        out.update({
            "program": "dnmr fit --global", "series": str(self.series.source), "processes": processes,
            "comparison": self.comparison(), "two_step": [e.to_dict() for e in self.two_step],
            "two_step_folder": str(self.outdir / TWO_STEP_FOLDER), "options": self.options,
            "chi_square": self.chi_square, "reduced_chi_square": self.reduced_chi_square,
            "degrees_of_freedom": self.degrees_of_freedom, "error_scale": self.error_scale,
            "function_evaluations": self.function_evaluations, "jacobian_evaluations": self.jacobian_evaluations,
            "parameters": self.parameters, "notes": self.notes,
            "spectra": [q.to_dict() for q in self.spectra],
        })
        return out

    def report(self) -> str:
        """A readable account: activation parameters with errors, the comparison, per-temperature rates."""
        t_hm = self.harmonic_mean_temperature_k
        lines = [f"Global fit of {self.series.source.name}: {len(self.fits)} spectra, "
                 f"{self.temperatures_k.min():.2f}-{self.temperatures_k.max():.2f} K; results in {self.outdir}",
                 f"shifts {self.options['shifts']} in T, linewidth {self.options['linewidth']}"
                 f"{'' if self.options['linewidth'] == 'per-spectrum' else ' in T'}, couplings "
                 f"{self.options['couplings']} in T, populations {self.options['populations']}",
                 f"chi-square {self.chi_square:.1f} on {self.degrees_of_freedom} degrees of freedom (reduced "
                 f"{self.reduced_chi_square:.3f}, against each spectrum's measured noise), error scale "
                 f"{self.error_scale:.3g}", ""]
        for a in self.activation:
            g298, g_hm = a.gibbs(STANDARD_TEMPERATURE_K), a.gibbs(t_hm)
            lines += [f"process {a.process}:",
                      f"  dH‡ = {format_with_error(a.enthalpy_kj_mol, a.enthalpy_stderr)} kJ/mol "
                      f"({format_with_error(a.enthalpy_kj_mol * KCAL_PER_KJ, a.enthalpy_stderr * KCAL_PER_KJ)} kcal/mol)",
                      f"  dS‡ = {format_with_error(a.entropy_j_mol_k, a.entropy_stderr)} J/(mol K)",
                      f"  correlation of dH‡ and dS‡: {a.correlation:.4f}",
                      f"  dG‡(298.15 K) = {format_with_error(*g298)} kJ/mol",
                      f"  dG‡({t_hm:.1f} K, harmonic mean) = {format_with_error(*g_hm)} kJ/mol"]
            if a.calibration_covariance is not None:
                for part, cov in a.error_shares().items():
                    share = _share(cov, t_hm)
                    lines.append(f"  errors from the {'spectra' if part == 'spectra' else 'temperature calibration'} "
                                 f"alone: dH‡ ± {share['enthalpy_kj_mol']:.2g} kJ/mol, dS‡ ± "
                                 f"{share['entropy_j_mol_k']:.2g} J/(mol K), dG‡(298.15 K) ± "
                                 f"{share['gibbs_298_kj_mol']:.2g}, dG‡({t_hm:.1f} K) ± "
                                 f"{share['gibbs_hm_kj_mol']:.2g} kJ/mol")
            else:
                lines.append("  temperatures taken as exact: no calibration error included")
            lines.append("")
        lines += ["global against two-step (per-temperature rates, then Eyring):",
                  f"  {'process':<14} {'quantity':<30} {'global':>20} {'two-step':>20} {'difference':>11}"]
        for row in self.comparison():
            fmt = lambda v, s: format_with_error(v, s) if math.isfinite(s) else f"{v:.4f}"  # noqa: E731
            lines.append(f"  {row['process']:<14} {row['quantity']:<30} {fmt(row['global'], row['global_stderr']):>20} "
                         f"{fmt(row['two_step'], row['two_step_stderr']):>20} {row['difference']:>11.3g}")
        lines += ["", "rates from the global fit:", f"  {'T set / K':>9} {'T / K':>8}  {'process':<14} "
                                                         f"{'global k / s^-1':<24} two-step"]
        for p in [self._process_dict(a) for a in self.activation]:
            for r in p["rates"]:
                lines.append(f"  {r['setpoint_k']:>9.2f} {r['temperature_k']:>8.2f}  {p['process']:<14} "
                             f"{r['rate_per_s']:>10.4g} ± {r['rate_stderr']:<10.2g}  {r['two_step_rate_per_s']:.4g} "
                             f"({r['two_step_status']})")
        lines += ["", "each spectrum against its measured noise (chi-square per point):",
                  f"  {'T / K':>8} {'global':>8} {'two-step':>9}  spectrum"]
        for q in sorted(self.spectra, key=lambda q: q.temperature_k):
            lines.append(f"  {q.temperature_k:>8.2f} {q.per_point:>8.3f} {q.two_step_per_point:>9.3f}  {Path(q.file).name}"
                         + ("  misfit" if q.misfit else ""))
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def plot_residuals(self, figure: "Figure | None" = None) -> "Figure":
        """Residuals over each spectrum's noise, (data - fit) / sigma, stacked by temperature."""
        from dnmr.reporting.plotting import plot_residual_stack

        order = np.argsort(self.temperatures_k)
        return plot_residual_stack([self.fits[i] for i in order], [f"{self.temperatures_k[i]:.1f} K" for i in order],
                                   figure=figure, title="residuals of the global fit over the noise, (data - fit) / sigma: grey within 3, clipped at 5")

    def plot(self, figure: "Figure | None" = None) -> "Figure":
        """Every spectrum (black) with the global fit (red), stacked by temperature."""
        from dnmr.reporting.plotting import plot_fit_stack

        order = np.argsort(self.temperatures_k)
        return plot_fit_stack([self.fits[i] for i in order], [f"{self.temperatures_k[i]:.1f} K" for i in order],
                              figure=figure, title=f"{self.series.model.title or self.series.source.name}\n"
                                                   "measured (black) and global fit (red)")


# --------------------------------------------------------------------------------------------------
# running it


def _prepare(outdir: Path, overwrite: bool) -> None:
    """Refuse an existing folder with results unless `overwrite`."""
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"{outdir} is a file; give a folder for the results", where="--output")
    if outdir.exists() and any(outdir.iterdir()) and not overwrite:
        raise InputError(f"{outdir} already exists; pass --overwrite to replace its results", where="--output")


def _true_temperatures(series: Series, calibration: "TemperatureCalibration | None",
                       used: list[int]) -> tuple[np.ndarray, np.ndarray | None]:
    """Sample temperatures (K) of the spectra `used` and their covariance (K^2; None without a calibration)."""
    setpoints = np.array([series.spectra[i].temperature_k for i in used])
    if calibration is None:
        return setpoints, None
    where = [f"{series.spectra[i].where}.temperature_k" for i in used]
    true = calibration.true_temperature(setpoints, source=str(series.source), where=where)
    return true.temperature_k, true.covariance


def _calibration_covariance(evaluator: _Evaluator, x: np.ndarray, jac: np.ndarray, inverse: np.ndarray,
                            temperature_covariance: np.ndarray) -> np.ndarray:
    """Covariance of the free parameters that the temperatures' covariance (K^2) brings in.

    The optimum x(T) moves with the sample temperatures: differentiating J^T r = 0 gives
    dx/dT = -(J^T J)^-1 J^T dr/dT (first order, as the covariance itself), so the temperatures add
    (dx/dT) C_T (dx/dT)^T. Not widened by the chi-square: it is the calibration's own uncertainty."""
    sensitivity = -inverse @ (jac.T @ evaluator.temperature_jacobian(x))
    return sensitivity @ temperature_covariance @ sensitivity.T


def _stderr_table(problem: _GlobalProblem, x: np.ndarray, covariance: np.ndarray | None) -> dict:
    g = problem.values(x)
    errors = {} if covariance is None else dict(zip(problem.free, np.sqrt(np.diag(covariance))))
    return {n: {"estimate": v, "stderr": float(errors.get(n, math.nan)), "fixed": n not in problem.free} for n, v in g.items()}


def _activation(problem: _GlobalProblem, x: np.ndarray, covariance: np.ndarray | None,
                from_calibration: np.ndarray | None, names: list[str]) -> list[ActivationEstimate]:
    g = problem.values(x)
    out = []
    for ident, name in zip(problem.processes, names):
        keys = [f"enthalpy_kj_mol_{ident}", f"entropy_j_mol_k_{ident}"]
        if not all(k in problem.free for k in keys):
            raise InputError(f"dH‡ and dS‡ of process {name!r} must both be free in the global fit; remove their "
                             "settings from [fit.parameters]", where="--global")
        idx = np.ix_(*[[problem.free.index(k) for k in keys]] * 2)
        cov = np.full((2, 2), math.nan) if covariance is None else covariance[idx]
        calib = None if from_calibration is None else from_calibration[idx]
        out.append(ActivationEstimate(name, g[keys[0]], g[keys[1]], cov, calib))
    return out


def _eyring_start(two: SeriesFit, two_step: list[EyringResult], names: list[str], idents: list[str],
                  used: list[int], temps: np.ndarray) -> dict[str, tuple[float, float]]:
    """dH‡ and dS‡ to start from: the two-step Eyring line, or, where it has none (too few determined
    rates), a line through every spectrum's best-fit rate."""
    by_name = {e.process: e for e in two_step}
    start = {}
    for p, (name, ident) in enumerate(zip(names, idents)):
        e = by_name.get(name)
        if e is not None and math.isfinite(e.enthalpy_kj_mol) and math.isfinite(e.entropy_j_mol_k):
            start[ident] = (e.enthalpy_kj_mol, e.entropy_j_mol_k)
            continue
        ln_k_over_t = np.log([two.outcomes[i].fit.rates[p].rate_per_s / t for i, t in zip(used, temps)])
        slope, intercept = np.polyfit(1.0 / temps, ln_k_over_t, 1)
        start[ident] = (-slope * GAS_CONSTANT / 1e3, (intercept - math.log(BOLTZMANN / PLANCK)) * GAS_CONSTANT)
    return start


def _van_t_hoff(series: Series, temperatures_k: np.ndarray) -> bool:
    """Populations follow van 't Hoff when the series fits them or the model's states differ in population
    (at the mean temperature), unless the series fixes one of them."""
    model = series.model
    if len(model.states) < 2:
        return False
    settings = series.options.parameters
    if any(n.startswith("population_") and s.get("fixed") is True for n, s in settings.items()):
        return False
    populations = model.at_temperature(float(np.mean(temperatures_k))).populations()
    return series.options.populations == "free" or bool(np.ptp(populations) > 1e-9)


def _write(result: GlobalFit, overwrite: bool) -> None:
    import matplotlib.pyplot as plt

    outdir = result.outdir
    atomic_write_text(outdir / "global.json", json.dumps(json_ready(result.to_dict()), indent=1, allow_nan=False) + "\n",
                      overwrite=overwrite)
    atomic_write_text(outdir / "global.txt", result.report() + "\n", overwrite=overwrite)
    for name, fig in (("global_fits.png", result.plot()), ("global_residuals.png", result.plot_residuals())):
        save_figure(fig, outdir / name, overwrite=overwrite)
        plt.close(fig)


def fit_series_global(
    series: Series | str | Path,
    outdir: str | Path,
    *,
    overwrite: bool = False,
    calibration: "TemperatureCalibration | None" = None,
    shifts: str = DEFAULT_TREND,
    linewidth: str = DEFAULT_TREND,
    couplings: str = DEFAULT_TREND,
    workers: int | None = None,
    progress: bool | None = None,
) -> GlobalFit:
    """Fit all spectra of a series at once with dH‡ and dS‡ of every process as the parameters.

    Parameters
    ----------
    series : Series or path
        The series (or its TOML file).
    outdir : str or Path
        Folder for global.json, global.txt, the figures and the two-step results (``two-step/``);
        refused when it holds results, unless `overwrite`.
    overwrite : bool
        Replace earlier results in `outdir`.
    calibration : TemperatureCalibration, optional
        The series' temperatures are set-points: the global fit uses the calibrated sample temperatures
        and carries the calibration's uncertainty into its errors (so does the two-step Eyring comparison).
    shifts : {"linear", "constant", "quadratic"}
        Temperature trend of the chemical shifts (ppm).
    linewidth : {"linear", "constant", "quadratic", "per-spectrum"}
        Intrinsic linewidth (Hz): a trend in T, or fitted in every spectrum.
    couplings : {"linear", "constant", "quadratic"}
        Temperature trend of the scalar couplings (Hz) the model gives.
    workers : int, optional
        Worker processes for the two-step fit and the global fit (default: one per core; 1: in this process).
    progress : bool, optional
        False: no progress report.  Otherwise progress of the two-step fit and of the global fit on stderr
        (a live bar on a terminal, plain lines when stderr is a file or a pipe).

    Returns
    -------
    GlobalFit
    """
    treatment = Treatment(shifts, linewidth, couplings)
    series = series if isinstance(series, Series) else load_series(series)
    outdir = Path(outdir)
    _prepare(outdir, overwrite)
    two = fit_series(series, outdir / TWO_STEP_FOLDER, overwrite=overwrite, workers=workers, progress=progress)
    result = _global_fit(series, two, outdir, calibration, treatment, workers, progress)
    _write(result, overwrite)
    return result


def _global_fit(series: Series, two: SeriesFit, outdir: Path, calibration: "TemperatureCalibration | None",
                treatment: Treatment, workers: int | None, progress: bool | None = None) -> GlobalFit:
    """The global fit seeded from a finished two-step fit `two` (its rates.csv in `outdir`/two-step)."""
    used = [i for i, o in enumerate(two.outcomes) if o.fitted]
    if len(used) < 3:
        raise InputError(f"only {len(used)} spectra could be fitted; a global fit needs at least 3", where="--global")
    temps, temperature_covariance = _true_temperatures(series, calibration, used)
    names = series.model.process_names()
    try:
        eyring = eyring_fit_file(outdir / TWO_STEP_FOLDER / "rates.csv", calibration=calibration)
    except InputError:  # too few determined rates: the comparison has no two-step line
        eyring = []
    members = [_member(i, float(t), two.outcomes[i].fit, series.model) for i, t in zip(used, temps)]
    idents = [n[len("log10_k_"):] for n in members[0].problem.layout.rate_names]
    van_t_hoff = _van_t_hoff(series, temps)
    problem = _GlobalProblem(members, series.model, treatment, van_t_hoff,
                             _eyring_start(two, eyring, names, idents, used, temps))
    workers = max(1, min(workers or os.cpu_count() or 1, len(members)))
    with single_threaded_blas(), ProgressReport(progress) as report:
        task = report.add_task(f"global fit of {len(members)} spectra", unit="evaluations of all spectra",
                              interval_s=PLAIN_INTERVAL_S)
        evaluator = _Evaluator(problem, workers, step=lambda: report.advance(task))
        try:
            solution, inverse = _solve(problem, evaluator)
            report.finish(task)
            from_calibration = (None if temperature_covariance is None or inverse is None else
                                _calibration_covariance(evaluator, solution.x, solution.jac, inverse,
                                                        temperature_covariance))
            residuals = evaluator.each("residual", solution.x)
        finally:
            evaluator.close()
        qualities = _qualities(problem, solution.x, residuals, np.array([series.spectra[i].temperature_k for i in used]))
    chi2 = float(sum(r @ r for r in residuals))
    dof = int(problem.rows[-1]) - len(problem.free) + problem.gauge.shape[0]
    points = sum(m.fit.noise.points for m in members)
    correlation = float(np.average([m.fit.noise.correlation_factor for m in members],
                                   weights=[m.problem.data.size for m in members]))
    scale, flags, notes = _error_scale(chi2, dof, NoiseEstimate(1.0, correlation, points, "measured per spectrum"))
    if "misfit" in flags:
        notes = [n for n in notes if "reduced chi-square" not in n] + _misfit_notes(qualities, treatment, chi2 / dof)
        notes.append("errors are widened by the square root of the reduced chi-square")
    covariance = None if inverse is None else inverse * scale
    if covariance is None:
        notes.append("the joint covariance is singular: some parameters are not determined; errors are not given")
    elif from_calibration is not None:
        covariance = covariance + from_calibration
    if not solution.success:
        notes.append(f"the optimiser stopped without converging: {solution.message}")
    activation = _activation(problem, solution.x, covariance, from_calibration, names)
    if from_calibration is not None:
        notes.append("temperatures are calibrated sample temperatures; the calibration's uncertainty (curve and "
                     "scatter of its points) is included in the errors, propagated through the fit's optimum "
                     "(its share is listed with each process)")
    elif calibration is None:
        notes.append("no temperature calibration given: temperatures taken as exact (no calibration error included)")
    if not eyring:
        notes.append("the two-step rates give no Eyring line to compare with (too few determined rates)")
    g = problem.vector(solution.x)
    fits = []
    for m, affine in zip(members, problem._maps):
        fitted, baseline = problem.predict(m, affine, g)
        fits.append(dataclasses.replace(m.fit, fitted=fitted, baseline=baseline))
    return GlobalFit(
        series=series, outdir=outdir, activation=activation, two_step=eyring, temperatures_k=temps,
        setpoints_k=np.array([series.spectra[i].temperature_k for i in used]), fits=fits,
        temperature_stderr_k=None if temperature_covariance is None else np.sqrt(np.diag(temperature_covariance)),
        parameters=_stderr_table(problem, solution.x, covariance), chi_square=chi2,
        reduced_chi_square=chi2 / max(dof, 1), degrees_of_freedom=dof, error_scale=float(scale),
        options={"shifts": treatment.shifts, "linewidth": treatment.linewidth, "couplings": treatment.couplings,
                 "populations": "van 't Hoff (ln K linear in 1/T)" if van_t_hoff else "from the model",
                 "calibration": None if calibration is None else calibration.to_dict(),
                 "calibration_error_included": from_calibration is not None,
                 "reference_temperature_k": problem.reference_k},
        spectra=qualities,
        notes=list(two.notes) + notes + [f"{o.spectrum.where} left out: its two-step fit failed"
                                         for o in two.failures],
        function_evaluations=int(solution.nfev), jacobian_evaluations=int(solution.njev),
    )
