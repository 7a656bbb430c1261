"""The global problem of a variable-temperature series: parameters, lineshape quantities, residuals and
Jacobian blocks.

Every spectrum of the series (a :class:`GlobalMember`) is predicted from one set of global parameters
(ΔH‡ and ΔS‡ of every process, temperature trends of the shifts, couplings and linewidth, van 't Hoff
populations) and its own amplitude, phase, baseline and frequency offset; see :mod:`dnmr.fitting.globalfit`
for the model.  Each quantity of a spectrum's lineshape (:class:`LineshapeQuantity`) is an affine function
of the parameters, so a spectrum's Jacobian block is (d prediction / d quantity) x (d quantity /
d parameters).
"""
from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass

import lmfit
import numpy as np

from dnmr.engine.blocks import lineshape_terms
from dnmr.engine.derivatives import coupling_direction, derivatives_pay, lineshape_derivatives
from dnmr.errors import InputError
from dnmr.fitting.parameters import ParameterLayout, parameter_identifier
from dnmr.fitting.problem import USE_EXACT_JACOBIAN, FitProblem, nuisance_column
from dnmr.fitting.globaltreatment import TREND_DEGREES, TREND_SUFFIXES, Treatment
from dnmr.fitting.seriesfile import REFERENCE_LINE
from dnmr.fitting.spectrumfit import SpectrumFit
from dnmr.kinetics import BOLTZMANN, GAS_CONSTANT, PLANCK
from dnmr.model import Model

NUISANCE = ("amplitude", "phase0_deg", "phase1_deg")  # with the baseline terms: exact Jacobian columns
ENTHALPY_BOUNDS_KJ_MOL = (0.0, 400.0)
ENTROPY_BOUNDS_J_MOL_K = (-400.0, 400.0)
STATE_ENTHALPY_BOUND_KJ_MOL = 200.0
STATE_ENTROPY_BOUND_J_MOL_K = 400.0
MIN_LINEWIDTH_HZ = 1e-3
GAUGE_HZ = 1e-3  # scale of the offsets' gauge residuals (any positive value gives the same fit and errors)
DIFFERENCE_STEP = {"rate": 1e-5, "shift": 1e-4, "linewidth": 1e-4, "coupling": 1e-4, "population": 1e-5,
                   "offset": 1e-4}  # forward-difference steps: log10 k, Hz, Hz, Hz, ln K, Hz (shifts converted to ppm)
FAMILY_WORDS = {"shift": "shifts", "linewidth": "linewidth", "coupling": "couplings", "rate": "rate",
                "population": "populations"}
@dataclass
class GlobalMember:
    """One spectrum in the global problem: its two-step fit supplies data, noise, region and fit options.

    Attributes
    ----------
    index : int
        Its place in the series file.
    temperature_k : float
        Its sample temperature (K).
    fit : SpectrumFit
        Its two-step fit.
    problem
        Its single-spectrum fit problem: frequencies (Hz), data, noise, phase and baseline terms of its region.
    base : Model
        The series' model at its temperature.
    reference : dict or None
        Its reference-line fit from the two-step stage (:func:`dnmr.fitting.treatments.fit_reference_lines`;
        a ``setting`` holding the linewidth, with its stderr, where the line gave one), None without a reference line.
    """

    index: int
    temperature_k: float
    fit: SpectrumFit
    problem: FitProblem  # frequencies, phase and baseline terms of its region
    base: Model  # the series' model at this temperature
    reference: dict | None = None

    @classmethod
    def from_two_step(cls, index: int, temperature_k: float, fit: SpectrumFit, model: Model,
                      reference: dict | None = None) -> "GlobalMember":
        """Spectrum `index` of the series at sample temperature `temperature_k` (K), from its two-step `fit`
        (and its reference-line fit `reference`) and the series' `model`."""
        base = model.at_temperature(temperature_k)
        problem = FitProblem(ParameterLayout.for_model(base, fit.options), fit.ppm, fit.data, fit.noise)
        return cls(index, temperature_k, fit, problem, base, reference)

    @property
    def prefix(self) -> str:
        """Prefix of this spectrum's own parameters, ``s<i>_``."""
        return f"s{self.index}_"


@dataclass(frozen=True)
class LineshapeQuantity:
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
    "eyring-h" / "eyring-s" for log10 k against ΔH‡ (kJ/mol) / ΔS‡ (J/(mol K)), "vant-hoff-h" /
    "vant-hoff-s" for ln K against dH / dS of a state."""
    if kind[0] == "power":
        return (t - t_ref) ** kind[1]
    per_kelvin = {"eyring-h": -1e3 / (GAS_CONSTANT * t * math.log(10.0)), "eyring-s": 1.0 / (GAS_CONSTANT * math.log(10.0)),
                  "vant-hoff-h": -1e3 / (GAS_CONSTANT * t), "vant-hoff-s": 1.0 / GAS_CONSTANT}
    return per_kelvin[kind[0]]


def _eyring_constant(t: float) -> float:
    """log10(kB T / h), s^-1: log10 k at ΔH‡ = ΔS‡ = 0."""
    return math.log10(BOLTZMANN * t / PLANCK)


def _settings(members: list[GlobalMember]) -> dict:
    """The series' per-parameter settings: those every fitted spectrum has alike (a spectrum's own also hold
    the values its two-step fit held: a trend's or its reference line's, which differ between spectra)."""
    first = members[0].fit.options.parameters
    return {n: v for n, v in first.items() if all(m.fit.options.parameters.get(n) == v for m in members[1:])}


class GlobalProblem:
    """Global parameters, the affine map from them to each spectrum's lineshape quantities, residuals and
    Jacobian blocks.

    Parameters
    ----------
    members : list of GlobalMember
        The spectra, each with its two-step fit.
    model : Model
        The series' model.
    treatment : Treatment
        Temperature trends of shifts, linewidth and couplings.
    van_t_hoff : bool
        Populations follow van 't Hoff (else the model's populations at each temperature).
    start : dict
        (ΔH‡ kJ/mol, ΔS‡ J/(mol K)) to start from, by process identifier.

    Attributes
    ----------
    params : lmfit.Parameters
        Every parameter with its start value, bounds and whether it is free; `names` all of them in order,
        `free` the free ones (the order of the solver's vector x), `lower` and `upper` their bounds.
    quantities : list of LineshapeQuantity
        The lineshape quantities of every spectrum.
    reference_k : float
        T_ref of the trends: the mean temperature (K).
    rows : ndarray
        Offsets of each spectrum's residuals in the stacked residual vector.
    columns : list of ndarray
        Per spectrum, the indices into `free` of the parameters its residuals depend on.
    gauge : ndarray
        Rows anchoring the frequency offsets (appended to the residuals).
    maps : list of (ndarray, ndarray)
        Per spectrum, (A, b) of :meth:`affine` at its temperature.
    exact : list of bool
        Per spectrum, whether its Jacobian block comes from the lineshape's exact derivatives (models where
        they cost less than finite differences, :func:`dnmr.engine.derivatives.derivatives_pay`).
    held_stderr : dict of str to float
        Standard errors of held parameters measured elsewhere (a reference line's width, Hz), by name:
        the fit carries them into its covariance (:meth:`held_derivative`).
    """

    def __init__(self, members: list[GlobalMember], model: Model, treatment: Treatment, van_t_hoff: bool,
                 start: dict[str, tuple[float, float]]):
        self.members, self.model, self.treatment, self.van_t_hoff = members, model, treatment, van_t_hoff
        self.reference_k = float(np.mean([m.temperature_k for m in members]))
        layout = members[0].problem.layout
        self.layout = layout
        self.processes = [n[len("log10_rate_"):] for n in layout.rate_names]
        self.settings = _settings(members)
        self.params = lmfit.Parameters()
        self.quantities: list[LineshapeQuantity] = []
        self.held_stderr: dict[str, float] = {}
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
        owners = [self.owner(n) for n in self.free]
        self.columns = [np.array([j for j, o in enumerate(owners) if o is None or o == m.index]) for m in members]
        self.gauge = self._gauge()
        self.maps = [self.affine(m, m.temperature_k) for m in members]
        self.exact = [USE_EXACT_JACOBIAN and derivatives_pay(m.base) for m in members]

    # ---- parameters --------------------------------------------------------------------------------
    def _add(self, name: str, value: float, lower: float = -np.inf, upper: float = np.inf, vary: bool = True) -> None:
        """Add a parameter; the series' ``[fit.lmfit_parameters]`` may fix it (fixed = true) at its start value."""
        setting = self.settings.get(name, {})
        if setting.get("fixed") is True:
            value, vary = float(setting.get("start", value)), False
        self.params.add(name, value=float(np.clip(value, lower, upper)), min=lower, max=upper, vary=vary)

    def _quantity(self, name: str, family: str, terms: list[tuple[str, tuple]], step: float,
                  constant: bool = False) -> None:
        """A lineshape quantity: sum of coefficient(kind, T) x parameter over `terms` (plus log10(kB T/h)
        when `constant`)."""
        self.quantities.append(LineshapeQuantity(name, family, tuple(terms), step, constant))

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
        return np.array([m.fit.lmfit_parameters[name].value if name in m.fit.lmfit_parameters else math.nan for m in self.members])

    def _add_shifts(self) -> None:
        """Started from the line positions of the two-step fits (shift plus that fit's frequency offset)."""
        sf = self.model.spectrometer.frequency_mhz
        offsets = self._two_step("offset_hz") / sf
        degree = TREND_DEGREES[self.treatment.shift_trend]
        for name in [n for names in self.layout.shift_names for n in names]:
            self._trend(name, "shift", degree, self._two_step(name) + offsets, DIFFERENCE_STEP["shift"] / sf)

    def _linewidth_keys(self) -> list[str]:
        """The linewidth quantity of each state (one for all states unless fitted per state)."""
        names = self.layout.linewidth_names
        return list(names) if self.members[0].fit.options.linewidth == "per-state" else [names[0]] * len(names)

    def _add_linewidths(self) -> None:
        """A trend started from the two-step widths of the coldest third of the spectra (where exchange does
        not trade against them), flat in T; or one per spectrum: free, started from its two-step width, or
        (reference line) held at its reference width where the line gave one (the width's error kept in
        `held_stderr`)."""
        held = self.members[0].fit.options.linewidth == "fixed"
        cold = np.argsort([m.temperature_k for m in self.members])[:max(1, len(self.members) // 3)]
        for name in dict.fromkeys(self._linewidth_keys()):
            state = self.model.states[self.layout.linewidth_names.index(name)]
            fixed = held or self.settings.get(name, {}).get("fixed") is True
            if self.treatment.linewidth_trend in ("per-spectrum", REFERENCE_LINE) and not fixed:
                for m in self.members:
                    setting = (m.reference or {}).get("setting", {}).get(name)
                    if self.treatment.linewidth_trend == REFERENCE_LINE and setting is not None:
                        self._add(f"{m.prefix}{name}", setting["start"], MIN_LINEWIDTH_HZ, vary=False)
                        self.held_stderr[f"{m.prefix}{name}"] = float(setting.get("stderr", 0.0))
                    else:
                        self._add(f"{m.prefix}{name}", m.fit.lmfit_parameters[name].value, MIN_LINEWIDTH_HZ)
                self._quantity(name, "linewidth", [], DIFFERENCE_STEP["linewidth"])
                continue
            level = float(np.nanmedian(self._two_step(name)[cold]))
            self._trend(name, "linewidth", TREND_DEGREES.get(self.treatment.linewidth_trend, 0),
                        np.full(len(self.members), level), DIFFERENCE_STEP["linewidth"], lower=MIN_LINEWIDTH_HZ,
                        fixed_value=state.linewidth_hz if held else None)

    def coupling_names(self) -> list[list[tuple[str, str]]]:
        """Per state, (coupling key of the model, parameter name) of every coupling it gives (the names of the
        single-spectrum fits)."""
        return [[(key, name) for name, key in names.items()] for names in self.layout.coupling_names]

    def _two_step_determined(self, name: str) -> np.ndarray:
        """The two-step value of `name` in each spectrum where it is known: held there (at a trend, the
        model's value or a setting) or fitted with a finite error off its bounds; NaN elsewhere."""
        out = []
        for m in self.members:
            par = m.fit.lmfit_parameters[name]
            known = (not par.vary or par.expr) or (par.stderr is not None and math.isfinite(par.stderr)
                                                   and f"at-bound:{name}" not in m.fit.flags)
            out.append(par.value if known else math.nan)
        return np.array(out)

    def _add_couplings(self) -> None:
        """Started from a line through the two-step couplings (those fitted in the slow-exchange spectra and
        held at their trend elsewhere), the model's where none is known."""
        degree = TREND_DEGREES[self.treatment.coupling_trend]
        for state, names in zip(self.model.states, self.coupling_names()):
            for key, name in names:
                values = self._two_step_determined(name)
                if not np.isfinite(values).any() or self.settings.get(name, {}).get("fixed") is True:
                    values = np.full(len(self.members), state.couplings_hz[key])
                self._trend(name, "coupling", degree, values, DIFFERENCE_STEP["coupling"])

    def _add_populations(self) -> None:
        """van 't Hoff for every state after the first: ln(p_j/p_1) = -dH_j/(R T) + dS_j/R, started from a
        line through the two-step (or model) populations against 1/T."""
        if not self.van_t_hoff:
            return
        names = self.layout.population_names
        inverse = np.array([1.0 / m.temperature_k for m in self.members])
        pops = np.array([[m.fit.lmfit_parameters[n].value for n in names] for m in self.members])
        for j, state in enumerate(self.model.states[1:], start=1):
            ln_k = np.log(pops[:, j] / pops[:, 0])
            slope, intercept = np.polyfit(inverse, ln_k, 1) if np.ptp(inverse) > 0 else (0.0, float(ln_k.mean()))
            h_name, s_name = f"state_enthalpy_kj_mol_{parameter_identifier(state.name)}", f"state_entropy_j_mol_k_{parameter_identifier(state.name)}"
            self._add(h_name, -slope * GAS_CONSTANT / 1e3, -STATE_ENTHALPY_BOUND_KJ_MOL, STATE_ENTHALPY_BOUND_KJ_MOL)
            self._add(s_name, intercept * GAS_CONSTANT, -STATE_ENTROPY_BOUND_J_MOL_K, STATE_ENTROPY_BOUND_J_MOL_K)
            self._quantity(f"ln_k_{parameter_identifier(state.name)}", "population",
                           [(h_name, ("vant-hoff-h",)), (s_name, ("vant-hoff-s",))],
                           DIFFERENCE_STEP["population"])

    def _add_nuisance(self) -> None:
        """Amplitude, phases and baseline from the two-step fit (refitted before the joint fit); offset 0
        (the shift trends start at the line positions)."""
        for m in self.members:
            for n in NUISANCE + m.problem.layout.baseline_names:
                par = m.fit.lmfit_parameters[n]
                self.params.add(f"{m.prefix}{n}", value=par.value, min=par.min, max=par.max,
                                vary=bool(par.vary and not par.expr))
            par = m.fit.lmfit_parameters["offset_hz"]
            self.params.add(f"{m.prefix}offset_hz", value=0.0, min=par.min, max=par.max,
                            vary=m.fit.options.frequency_offset and not self.settings.get("offset_hz", {}).get("fixed", False))
        self._quantity("offset_hz", "offset", [], DIFFERENCE_STEP["offset"])

    def owner(self, name: str) -> int | None:
        """Index of the spectrum a ``s<i>_`` parameter belongs to; None for a global parameter."""
        head = name.split("_", 1)[0]
        return int(head[1:]) if head[0] == "s" and head[1:].isdigit() else None

    def own_columns(self, k: int) -> np.ndarray:
        """Which of spectrum `k`'s columns (``self.columns[k]``) are its own parameters (boolean mask)."""
        return np.array([self.owner(self.free[j]) is not None for j in self.columns[k]], dtype=bool)

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
        for j in range(TREND_DEGREES[self.treatment.shift_trend] + 1):
            if not shifts or not all(n + TREND_SUFFIXES[j] in self.free for n in shifts):
                break
            row = np.zeros(len(self.free))
            row[[self.free.index(n) for n in offsets]] = temps ** j
            rows.append(row / np.linalg.norm(row))
        return np.array(rows).reshape(len(rows), len(self.free)) / GAUGE_HZ

    # ---- from global to one spectrum -------------------------------------------------------------------
    def affine(self, m: GlobalMember, t: float) -> tuple[np.ndarray, np.ndarray]:
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
        """All parameter values by name, with the free ones from `x`."""
        return dict(zip(self.names, (float(v) for v in self.vector(x))))

    def family_rows(self, family: str) -> list[int]:
        """Indices of the quantities of one family (shift, linewidth, coupling, rate, population, offset)."""
        return [r for r, quantity in enumerate(self.quantities) if quantity.family == family]

    def spectrum_model(self, m: GlobalMember, q: np.ndarray) -> tuple[Model, float]:
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
            ln_k = np.array([0.0] + [value[f"ln_k_{parameter_identifier(s.name)}"] for s in m.base.states[1:]])
            weights = np.exp(ln_k - ln_k.max())
            states = [dataclasses.replace(s, population=float(w / weights.sum()), free_energy_kj_mol=None)
                      for s, w in zip(states, weights)]
        rates = [10.0 ** value[n] for n in self.layout.rate_names]
        return m.base.replace(states=tuple(states), exchanges=m.base.exchanges_at_rates(rates)), value["offset_hz"]

    def shape(self, m: GlobalMember, q: np.ndarray) -> np.ndarray:
        """Complex lineshape S = A - i D of spectrum `m` at its frequencies."""
        model, offset = self.spectrum_model(m, q)
        return lineshape_terms(model).evaluate(m.problem.hz - offset)

    def nuisance(self, m: GlobalMember, g: np.ndarray) -> dict[str, float]:
        """Amplitude, phases and baseline of spectrum `m` under their single-fit names."""
        names = NUISANCE + m.problem.layout.baseline_names
        return {n: float(g[self.names.index(m.prefix + n)]) for n in names}

    def parts(self, m: GlobalMember, affine: tuple[np.ndarray, np.ndarray], g: np.ndarray) -> tuple[np.ndarray, np.ndarray, dict]:
        """Quantities q, exp(i phi) S and the nuisance values of spectrum `m` at all parameter values `g`."""
        A, b = affine
        q = A @ g + b
        values = self.nuisance(m, g)
        return q, np.exp(1j * m.problem.phase(values)) * self.shape(m, q), values

    def predict(self, m: GlobalMember, affine: tuple[np.ndarray, np.ndarray], g: np.ndarray) -> np.ndarray:
        """Predicted spectrum `m` (intensity units) and its baseline."""
        _, turned, values = self.parts(m, affine, g)
        baseline = m.problem.baseline(values)
        return values["amplitude"] * turned.real + baseline, baseline

    def fitted(self, x: np.ndarray) -> list[SpectrumFit]:
        """Each spectrum's two-step fit with the global fit's curve and baseline at `x` in place of its own."""
        g = self.vector(x)
        out = []
        for m, affine in zip(self.members, self.maps):
            fitted, baseline = self.predict(m, affine, g)
            out.append(dataclasses.replace(m.fit, fitted=fitted, baseline=baseline))
        return out

    # ---- residuals and derivatives ---------------------------------------------------------------------
    def _residual(self, m: GlobalMember, affine: tuple[np.ndarray, np.ndarray], x: np.ndarray) -> np.ndarray:
        """(fit - data) / sigma of spectrum `m`: weighted by its measured noise alone."""
        try:
            pred, _ = self.predict(m, affine, self.vector(x))
        except InputError:  # parameters outside what a model allows
            return np.full(m.problem.data.size, 1e3)
        return (pred - m.problem.data) / m.problem.noise.sigma

    def member_residual(self, k: int, x: np.ndarray) -> np.ndarray:
        """(fit - data) / sigma of spectrum `k`."""
        return self._residual(self.members[k], self.maps[k], x)

    def _direction(self, r: int, q: np.ndarray, model: Model) -> dict[tuple, float]:
        """Quantity `r` as a combination of the engine's derivative directions
        (:func:`dnmr.engine.derivatives.all_directions`): d(model number)/d(quantity) for each, at the
        quantities `q` of the spectrum whose model is `model` (k ln 10 for log10 k, the spectrometer frequency
        for a shift in ppm, the state's population for ln K, -1 for the frequency offset)."""
        quantity = self.quantities[r]
        name, layout = quantity.name, self.layout
        if quantity.family == "rate":
            return {("rate", layout.rate_names.index(name)): 10.0 ** q[r] * math.log(10.0)}
        if quantity.family == "shift":
            c, s = next((c, names.index(name)) for c, names in enumerate(layout.shift_names) if name in names)
            return {("shift", c, s): model.spectrometer.frequency_mhz}
        if quantity.family == "linewidth":
            return {("linewidth", c): 1.0 for c, key in enumerate(self._linewidth_keys()) if key == name}
        if quantity.family == "coupling":
            c, key = next((c, key) for c, names in enumerate(self.coupling_names()) for key, n in names if n == name)
            return {coupling_direction(model, c, key): 1.0}
        if quantity.family == "population":
            c = next(c for c, s in enumerate(model.states) if name == f"ln_k_{parameter_identifier(s.name)}")
            return {("population", c): float(model.populations()[c])}
        return {("frequency",): -1.0}

    def quantity_derivatives(self, k: int, x: np.ndarray, which: Sequence[int]) -> tuple[np.ndarray, np.ndarray, dict]:
        """d prediction / d quantity of spectrum `k` for the quantities `which` (zero columns for the others),
        with exp(i phi) S and the nuisance values at `x`: exact (:func:`dnmr.engine.derivatives.lineshape_derivatives`,
        one solve for all of them) where that costs less than finite differences (:attr:`exact`), else forward
        differences."""
        m = self.members[k]
        if self.exact[k]:
            return self._exact_derivatives(m, self.maps[k], self.vector(x), which)
        q, turned, values = self.parts(m, self.maps[k], self.vector(x))
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

    def _exact_derivatives(self, m: GlobalMember, affine: tuple[np.ndarray, np.ndarray], g: np.ndarray,
                           which: Sequence[int]) -> tuple[np.ndarray, np.ndarray, dict]:
        """:meth:`quantity_derivatives` from the lineshape's exact derivatives at all parameter values `g`."""
        A, b = affine
        q = A @ g + b
        values = self.nuisance(m, g)
        model, offset = self.spectrum_model(m, q)
        which = list(which)
        found = lineshape_derivatives(model, m.problem.hz - offset, [self._direction(r, q, model) for r in which])
        rotation = np.exp(1j * m.problem.phase(values))
        out = np.zeros((m.problem.data.size, len(self.quantities)))
        if which:
            out[:, which] = (values["amplitude"] * rotation * found.slopes).real.T
        return out, rotation * found.spectrum, values

    def _lineshape_columns(self, k: int, x: np.ndarray, names: Sequence[str]) -> tuple[np.ndarray, np.ndarray, dict]:
        """d prediction / d parameter of spectrum `k` through its lineshape quantities, for the parameters
        `names`, with exp(i phi) S and the nuisance values at `x`."""
        A = self.maps[k][0][:, [self.names.index(n) for n in names]]
        D, turned, values = self.quantity_derivatives(k, x, [r for r in range(len(self.quantities)) if np.any(A[r])])
        return D @ A, turned, values

    def member_jacobian(self, k: int, x: np.ndarray) -> np.ndarray:
        """d residual / d x of spectrum `k` in its columns ``self.columns[k]`` (the global parameters and its own)."""
        m, p = self.members[k], self.members[k].problem
        cols = self.columns[k]
        try:
            out, turned, values = self._lineshape_columns(k, x, [self.free[j] for j in cols])
        except InputError:
            return np.zeros((p.data.size, len(cols)))
        for c, j in enumerate(cols):
            name = self.free[j]
            exact = nuisance_column(name[len(m.prefix):], values, turned, p) if name.startswith(m.prefix) else None
            if exact is not None:
                out[:, c] = exact
        return out / p.noise.sigma

    def held_derivative(self, k: int, x: np.ndarray) -> np.ndarray:
        """d residual / d held parameter of spectrum `k`, one column per name of ``self.held_stderr`` (zero
        for the other spectra's)."""
        names = list(self.held_stderr)
        own = [c for c, n in enumerate(names) if self.owner(n) == self.members[k].index]
        out = np.zeros((self.members[k].problem.data.size, len(names)))
        if own:
            out[:, own] = self._lineshape_columns(k, x, [names[c] for c in own])[0] / self.members[k].problem.noise.sigma
        return out

    def temperature_derivative(self, k: int, x: np.ndarray, step_k: float = 0.01) -> np.ndarray:
        """d residual / d T_k of spectrum `k` (central difference, `step_k` K; T_ref held)."""
        m = self.members[k]
        moved = []
        for s in (step_k, -step_k):
            t = m.temperature_k + s
            shifted = dataclasses.replace(m, temperature_k=t, base=self.model.at_temperature(t))
            moved.append(self._residual(shifted, self.affine(shifted, t), x))
        return (moved[0] - moved[1]) / (2.0 * step_k)

