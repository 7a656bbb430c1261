"""Global fit of a variable-temperature series: dH‡ and dS‡ fitted to all spectra at once.

Model
-----
Every spectrum i of the series (sample temperature T_i, K) is the single-spectrum model of
:mod:`dnmr.fitting` (same lineshape, nuisance terms and noise) with these quantities tied across the
series:

* rates: k_p(T_i) = (kB T_i / h) exp(dS‡_p / R) exp(-dH‡_p / (R T_i)) for every process p (Eyring,
  transmission coefficient 1); parameters ``enthalpy_kj_mol_<p>`` (kJ/mol), ``entropy_j_mol_k_<p>``
  (J/(mol K)).  T_i is the true sample temperature: the series' set-point passed through the
  calibration when one is given.
* shifts (ppm): ``shifts="constant"``: one value per state and spin for the whole series;
  ``"linear"``: delta(T) = delta(T_ref) + slope (T - T_ref), parameters ``<shift>`` and
  ``<shift>_per_k`` (ppm/K), T_ref the mean temperature.  The shifts are always fitted: the
  slow-exchange spectra fix them, the fast-exchange ones follow.  Because a common shift of every line
  is the same as a frequency offset, the offsets are held at their two-step values.
* linewidths (Hz): ``linewidth="per-spectrum"``: each spectrum its own (as its single fit had them);
  ``"linear"``: w(T) = w(T_ref) + slope (T - T_ref), parameters ``<linewidth>`` and ``<linewidth>_per_k``.
* populations: when the series fits populations (``populations = "free"``), the free energies of the
  states relative to the first are global parameters ``free_energy_kj_mol_<state>`` (kJ/mol) and the
  populations follow Boltzmann at each T_i; otherwise the model's populations at T_i (fixed, or
  Boltzmann from its own free energies).
* per spectrum (prefix ``s<i>_``): amplitude, baseline, phase; as in its single fit (fixed there,
  fixed here).

Method
------
1. The ordinary two-step fit (:func:`dnmr.series.fit_series`) runs first into ``OUTDIR/two-step``;
   its per-spectrum results seed every parameter, the Eyring fit of its rates
   (:func:`dnmr.activation.eyring_fit_file`, with the calibration) seeds dH‡ and dS‡.
2. All residuals (data - fit) / (sigma_i sqrt(s_i)) are minimised together (scipy ``least_squares``,
   trust region, exact subproblem on the dense Jacobian).  sigma_i is each spectrum's own noise estimate
   and s_i its error scale from the single fit (noise correlation factor, times the reduced chi-square of
   a misfit), as in :mod:`dnmr.fitting`.  The Jacobian is built spectrum by spectrum (spectra share only
   the global parameters), in worker processes (``workers``): amplitude, phases and baseline exactly from
   the spectrum's complex lineshape, the other columns by forward differences of that spectrum alone,
   where parameters that move its own parameters in the same direction (dH‡ and dS‡ its rate, a shift and
   its slope that shift) share one lineshape evaluation.  The fit stops once a step lowers chi-square by
   less than 0.01^2, i.e. moves the parameters by less than about 0.01 joint standard errors.
3. Covariance (J^T J)^-1 at the optimum, widened by the global reduced chi-square when that is
   significantly above 1 (same rule as a single fit).
4. With a calibration, its uncertainty is added.  The calibration gives the sample temperatures T with a
   covariance C_T (K^2): the curve's coefficient covariance, shared by all spectra, plus the scatter of
   its points about the curve on the diagonal (:meth:`dnmr.thermometry.TemperatureCalibration.true_temperature`,
   as the two-step Eyring analysis uses it).  The optimum moves with T; differentiating the normal
   equations J^T r = 0 gives dx/dT = -(J^T J)^-1 J^T dr/dT (dr/dT by central differences, each T_i moving
   only spectrum i's residuals, T_ref held), and the covariance gains (dx/dT) C_T (dx/dT)^T (not widened
   by the chi-square).  The temperatures enter each spectrum through its rate, its shift and linewidth
   trends and its Boltzmann populations, so this share can exceed the two-step one, which moves only the
   Eyring plot's points.  dG‡(T) = dH‡ - T dS‡ with its error from the joint covariance, at 298.15 K and
   at the harmonic mean of the temperatures; the calibration's share of each error is reported.

Outputs (OUTDIR, atomic writes): ``global.json``, ``global.txt``, ``global_fits.png``, plus the
two-step results in ``OUTDIR/two-step``.
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
from collections.abc import Callable, Mapping, Sequence
from concurrent import futures
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import lmfit
import numpy as np
from scipy import optimize

from .activation import EyringResult, eyring_fit_file, format_with_error
from .errors import InputError
from .fitting import (
    NoiseEstimate,
    ParameterLayout,
    SpectrumFit,
    _error_scale,
    _minimize,
    _Problem,
    single_threaded_blas,
)
from .kinetics import (
    GAS_CONSTANT,
    KCAL_PER_KJ,
    STANDARD_TEMPERATURE_K,
    boltzmann_populations,
    eyring_rate_from_enthalpy,
)
from .model import Model
from .output import atomic_write_text, json_ready, save_figure
from .series import Series, SeriesFit, fit_series, load_series
from .notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from .thermometry import TemperatureCalibration

SHIFT_TRENDS = ("constant", "linear")
LINEWIDTH_TRENDS = ("per-spectrum", "linear")
GLOBAL_FILES = ("global.json", "global.txt", "global_fits.png")
TWO_STEP_FOLDER = "two-step"
NUISANCE = ("amplitude", "phase0_deg", "phase1_deg", "offset_hz")
ENTHALPY_BOUNDS_KJ_MOL = (0.0, 400.0)
ENTROPY_BOUNDS_J_MOL_K = (-400.0, 400.0)
FREE_ENERGY_BOUND_KJ_MOL = 50.0
STEP_TOLERANCE_SE = 0.01  # the joint fit stops once its last step was below this many standard errors
XTOL = GTOL = 1e-12  # backstops only: relative to |x| and to the gradient, they mean nothing in standard errors


# --------------------------------------------------------------------------------------------------
# the joint problem


@dataclass
class _Member:
    """One spectrum in the global problem."""

    index: int
    temperature_k: float
    fit: SpectrumFit
    layout: ParameterLayout
    problem: _Problem
    weight: float  # 1 / sqrt(s_i)


def _member(index: int, temperature_k: float, fit: SpectrumFit, model: Model) -> _Member:
    layout = ParameterLayout.for_model(model.at_temperature(temperature_k), fit.options)
    problem = _Problem(layout, fit.ppm, fit.data, fit.noise)
    return _Member(index, temperature_k, fit, layout, problem, 1.0 / math.sqrt(fit.error_scale))


def _reseeded(m: _Member, log10_rates: Sequence[float]) -> _Member:
    """`m` with its own parameters refitted at the rates held at `log10_rates` (the Eyring start): a fit
    whose linewidth took over the exchange broadening (fast exchange) would otherwise start the global
    fit far from its optimum."""
    params = m.fit.parameters.copy()
    for name, value in zip(m.layout.rate_names, log10_rates):
        params[name].set(value=value, vary=False)
    refit = _minimize(m.problem, params)
    for name in m.layout.rate_names:
        refit.params[name].set(vary=True)
    return dataclasses.replace(m, fit=dataclasses.replace(m.fit, parameters=refit.params))


def _free(par: lmfit.Parameter) -> bool:
    return bool(par.vary and not par.expr)


def _nuisance_column(name: str, values: Mapping[str, float], turned: np.ndarray, p: _Problem) -> np.ndarray | None:
    """d(prediction)/d(`name`) of one spectrum for its amplitude, phases and baseline (exact), or None for a
    parameter of the lineshape. `turned` is exp(i phi) S, the prediction is amplitude Re(turned) + baseline."""
    if name == "amplitude":
        return turned.real
    if name == "phase0_deg":
        return -values["amplitude"] * turned.imag * (math.pi / 180.0)
    if name == "phase1_deg":
        return -values["amplitude"] * turned.imag * np.radians((p.hz - p.centre) / p.span)
    if name in p.layout.baseline_names:
        return p.powers[:, p.layout.baseline_names.index(name)]
    return None


def _proportion(delta: dict[str, float], other: dict[str, float]) -> float | None:
    """c with `delta` = c `other` (changes of one spectrum's own parameters), or None when not parallel."""
    if delta.keys() != other.keys():
        return None
    a = np.array(list(delta.values()))
    b = np.array([other[n] for n in delta])
    c = float(a @ b / (b @ b))
    return c if np.allclose(a, c * b, rtol=1e-9, atol=0.0) else None


class _GlobalProblem:
    """Global parameters, the map from them to each spectrum's parameters, residuals and Jacobian blocks."""

    def __init__(self, members: list[_Member], model: Model, shifts: str, linewidth: str, fit_populations: bool,
                 start: dict[str, tuple[float, float]], mapper: Callable = map):
        self.members, self.model, self.shifts, self.linewidth = members, model, shifts, linewidth
        self.fit_populations = fit_populations
        first = members[0].layout
        self.processes = [n[len("log10_k_"):] for n in first.rate_names]
        self.params = lmfit.Parameters()
        self._add_activation(start)
        g = self.params.valuesdict()
        self.members = members = list(mapper(_reseeded, members, [self.log10_rates(g, m.temperature_k) for m in members]))
        temps = np.array([m.temperature_k for m in members])
        self.reference_k = float(temps.mean())
        self._add_shifts()
        self._add_linewidths()
        self._add_populations()
        self._add_nuisance()
        self.free = [n for n, p in self.params.items() if p.vary]
        self.upper = np.array([self.params[n].max for n in self.free])
        sizes = [m.problem.data.size for m in members]
        self.rows = np.cumsum([0] + sizes)
        self._fixed = self.params.valuesdict()
        self._own = {m.index: m.fit.parameters.valuesdict() for m in members}
        owners = [self._owner(n) for n in self.free]
        self.columns = [np.array([j for j, o in enumerate(owners) if o is None or o == m.index]) for m in members]

    # ---- parameters --------------------------------------------------------------------------------
    def _add_activation(self, start: dict[str, tuple[float, float]]) -> None:
        for proc in self.processes:
            h, s = start[proc]
            self.params.add(f"enthalpy_kj_mol_{proc}", value=float(np.clip(h, *ENTHALPY_BOUNDS_KJ_MOL)),
                            min=ENTHALPY_BOUNDS_KJ_MOL[0], max=ENTHALPY_BOUNDS_KJ_MOL[1])
            self.params.add(f"entropy_j_mol_k_{proc}", value=float(np.clip(s, *ENTROPY_BOUNDS_J_MOL_K)),
                            min=ENTROPY_BOUNDS_J_MOL_K[0], max=ENTROPY_BOUNDS_J_MOL_K[1])

    def _trend(self, names: Sequence[str], per_member, linear: bool, lower: float | None = None) -> None:
        """Add `name` (value at the reference temperature) and, when `linear`, `name_per_k`, started
        from a line through the two-step values `per_member(member, name)`."""
        temps = np.array([m.temperature_k for m in self.members]) - self.reference_k
        for name in names:
            values = np.array([per_member(m, name) for m in self.members])
            slope = float(np.polyfit(temps, values, 1)[0]) if linear and np.ptp(temps) > 0 else 0.0
            centre = float(values.mean())
            self.params.add(name, value=centre if lower is None else max(centre, 2 * lower), min=lower)
            if linear:
                self.params.add(f"{name}_per_k", value=slope)

    def _add_shifts(self) -> None:
        names = [n for names in self.members[0].layout.shift_names for n in names]
        self._trend(names, lambda m, n: m.fit.parameters[n].value, self.shifts == "linear")

    def _add_linewidths(self) -> None:
        names = [n for n in self.members[0].layout.linewidth_names
                 if any(_free(m.fit.parameters[n]) for m in self.members)]
        if self.linewidth == "linear":
            self._trend(names, lambda m, n: m.fit.parameters[n].value, True, lower=1e-3)
            return
        for m in self.members:
            for n in names:
                par = m.fit.parameters[n]
                self.params.add(f"s{m.index}_{n}", value=par.value, min=par.min, max=par.max, vary=_free(par))

    def _add_populations(self) -> None:
        if not self.fit_populations:
            return
        layout = self.members[0].layout
        for j, name in enumerate(layout.population_names[1:], start=1):
            energies = [-GAS_CONSTANT * m.temperature_k / 1e3 * math.log(
                m.fit.parameters[name].value / m.fit.parameters[layout.population_names[0]].value)
                for m in self.members]
            self.params.add(f"free_energy_kj_mol_{layout.model.states[j].name}", value=float(np.mean(energies)),
                            min=-FREE_ENERGY_BOUND_KJ_MOL, max=FREE_ENERGY_BOUND_KJ_MOL)

    def _add_nuisance(self) -> None:
        for m in self.members:
            for n in NUISANCE + m.layout.baseline_names:
                par = m.fit.parameters[n]
                vary = _free(par) and n != "offset_hz"  # offsets held: the shifts are fitted (see notes)
                self.params.add(f"s{m.index}_{n}", value=par.value, min=par.min, max=par.max, vary=vary)

    def _owner(self, name: str) -> int | None:
        """Index of the spectrum a ``s<i>_`` parameter belongs to; None for a global parameter."""
        head = name.split("_", 1)[0]
        return int(head[1:]) if head[0] == "s" and head[1:].isdigit() else None

    # ---- from global to one spectrum -------------------------------------------------------------------
    def _at(self, g: dict, name: str, t: float) -> float:
        """Value of a trend parameter `name` at temperature `t` (K)."""
        return g[name] + g.get(f"{name}_per_k", 0.0) * (t - self.reference_k)

    def log10_rates(self, g: dict, t: float) -> list[float]:
        """log10 k (s^-1) of every process at `t` (K)."""
        return [math.log10(eyring_rate_from_enthalpy(g[f"enthalpy_kj_mol_{p}"], g[f"entropy_j_mol_k_{p}"], t))
                for p in self.processes]

    def member_values(self, m: _Member, g: dict) -> dict[str, float]:
        """Every parameter of spectrum `m`'s own fit, from the global values `g`."""
        lay, t = m.layout, m.temperature_k
        values = dict(self._own[m.index])
        values.update(zip(lay.rate_names, self.log10_rates(g, t)))
        for n in [n for names in lay.shift_names for n in names]:
            values[n] = self._at(g, n, t)
        for n in lay.linewidth_names:
            key = f"s{m.index}_{n}"
            if key in g:
                values[n] = g[key]
            elif n in g:
                values[n] = max(self._at(g, n, t), 1e-3)
        for n in lay.linewidth_names:  # ties of the single fit ("shared": every state as the first)
            expr = m.fit.parameters[n].expr
            if expr in values:
                values[n] = values[expr]
        if self.fit_populations:
            energies = [0.0] + [g[f"free_energy_kj_mol_{s.name}"] for s in lay.model.states[1:]]
            values.update(zip(lay.population_names, boltzmann_populations(energies, t)))
        for n in NUISANCE + lay.baseline_names:
            values[n] = g[f"s{m.index}_{n}"]
        return values

    # ---- residuals and derivatives ---------------------------------------------------------------------
    def values(self, x: np.ndarray) -> dict[str, float]:
        """All global parameter values with the free ones from `x`."""
        g = dict(self._fixed)
        g.update(zip(self.free, (float(v) for v in x)))
        return g

    def member_residual(self, m: _Member, g: dict) -> np.ndarray:
        """(fit - data) / (sigma_i sqrt(s_i)) of spectrum `m` at the global values `g`."""
        try:
            pred = m.problem.predict(self.member_values(m, g))
        except InputError:  # parameters outside what a model allows
            return np.full(m.problem.data.size, 1e3)
        return (pred - m.problem.data) * (m.weight / m.problem.noise.sigma)

    def member_jacobian(self, k: int, x: np.ndarray) -> np.ndarray:
        """d residual / d x of spectrum `k` in its columns ``self.columns[k]`` (the global parameters and its own).

        Amplitude, phases and baseline are exact. The others are forward differences (step as scipy's,
        sqrt(eps) max(1, |x|), turned back at an upper bound); parameters that move the spectrum's own
        parameters in the same direction share one lineshape evaluation (dH‡ and dS‡ move only its
        rate, a shift and its slope only that shift)."""
        m, p = self.members[k], self.members[k].problem
        g = self.values(x)
        values = self.member_values(m, g)
        out = np.zeros((p.data.size, len(self.columns[k])))
        try:
            turned = np.exp(1j * p.phase(values)) * p.shape(values)
        except InputError:
            return out
        pred = values["amplitude"] * turned.real + p.baseline(values)
        prefix = f"s{m.index}_"
        evaluated: list[tuple[dict[str, float], np.ndarray]] = []  # (change of own parameters, of prediction)
        for c, j in enumerate(self.columns[k]):
            name = self.free[j]
            exact = _nuisance_column(name[len(prefix):], values, turned, p) if name.startswith(prefix) else None
            if exact is not None:
                out[:, c] = exact
                continue
            h = _EPS_ROOT * max(1.0, abs(x[j]))
            h = -h if x[j] + h > self.upper[j] else h
            moved = self.member_values(m, {**g, name: g[name] + h})
            delta = {n: moved[n] - values[n] for n in values if moved[n] != values[n]}
            if not delta:
                continue
            for other, change in evaluated:
                ratio = _proportion(delta, other)
                if ratio is not None:
                    out[:, c] = ratio * change / h
                    break
            else:
                try:
                    change = p.predict(moved) - pred
                except InputError:
                    continue
                evaluated.append((delta, change))
                out[:, c] = change / h
        return out * (m.weight / p.noise.sigma)

    def temperature_derivative(self, k: int, x: np.ndarray, step_k: float = 0.01) -> np.ndarray:
        """d residual / d T_k of spectrum `k` (central difference, `step_k` K; T_ref held)."""
        m, g = self.members[k], self.values(x)
        moved = [self.member_residual(_member(m.index, m.temperature_k + s, m.fit, self.model), g)
                 for s in (step_k, -step_k)]
        return (moved[0] - moved[1]) / (2.0 * step_k)


_EPS_ROOT = float(np.sqrt(np.finfo(float).eps))
_WORKER_PROBLEM: _GlobalProblem | None = None
_WORKER_BLAS = None


def _start_worker(problem: _GlobalProblem | None = None) -> None:
    """Initialise a worker process: BLAS on one thread, and the problem it evaluates (if any)."""
    global _WORKER_PROBLEM, _WORKER_BLAS
    _WORKER_BLAS = single_threaded_blas()
    _WORKER_PROBLEM = problem


def _blocks(problem: _GlobalProblem, kind: str, x: np.ndarray, ks: Sequence[int]) -> list[np.ndarray]:
    """Residuals, Jacobian blocks or temperature derivatives (`kind`) of spectra `ks` at `x`."""
    if kind == "residual":
        g = problem.values(x)
        return [problem.member_residual(problem.members[k], g) for k in ks]
    if kind == "jacobian":
        return [problem.member_jacobian(k, x) for k in ks]
    return [problem.temperature_derivative(k, x) for k in ks]


def _worker_blocks(kind: str, x: np.ndarray, ks: Sequence[int]) -> list[np.ndarray]:
    return _blocks(_WORKER_PROBLEM, kind, x, ks)


class _Evaluator:
    """Evaluates a :class:`_GlobalProblem` spectrum by spectrum, in this process or in `workers` processes."""

    def __init__(self, problem: _GlobalProblem, workers: int):
        self.problem = problem
        n = len(problem.members)
        self.workers = max(1, min(workers, n))
        self.chunks = [list(range(n))[i::self.workers] for i in range(self.workers)]
        self.pool = (futures.ProcessPoolExecutor(self.workers, initializer=_start_worker, initargs=(problem,))
                     if self.workers > 1 else None)

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)

    def _each(self, kind: str, x: np.ndarray) -> list[np.ndarray]:
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
        """Residuals of every spectrum, one after the other."""
        return np.concatenate(self._each("residual", x))

    def jacobian(self, x: np.ndarray) -> np.ndarray:
        """The full (dense) Jacobian, assembled from the spectra's blocks."""
        rows = self.problem.rows
        out = np.zeros((int(rows[-1]), len(self.problem.free)))
        for k, block in enumerate(self._each("jacobian", x)):
            out[rows[k]:rows[k + 1], self.problem.columns[k]] = block
        return out

    def temperature_jacobian(self, x: np.ndarray) -> np.ndarray:
        """d residuals / d T (one column per spectrum, K^-1)."""
        rows = self.problem.rows
        out = np.zeros((int(rows[-1]), len(self.problem.members)))
        for k, column in enumerate(self._each("temperature", x)):
            out[rows[k]:rows[k + 1], k] = column
        return out


def _solve(problem: _GlobalProblem, evaluator: _Evaluator) -> tuple[optimize.OptimizeResult, np.ndarray | None]:
    """Least squares from the two-step start; returns the result and (J^T J)^-1 (None if singular)."""
    lower = np.array([problem.params[n].min for n in problem.free])
    x0 = np.clip([problem.params[n].value for n in problem.free], lower, problem.upper)
    # A Gauss-Newton step that lowers the cost (chi-square / 2) by dF moved the parameters by about sqrt(2 dF)
    # joint standard errors, so stop when dF < STEP_TOLERANCE_SE^2 / 2: as a fraction of the cost, at most
    # that over the starting cost (steps then converge quickly: the next is smaller still).
    start = evaluator.residual(x0)
    ftol = max(0.5 * STEP_TOLERANCE_SE ** 2 / max(0.5 * float(start @ start), 1e-300), float(np.finfo(float).eps))
    result = optimize.least_squares(evaluator.residual, x0, jac=evaluator.jacobian, bounds=(lower, problem.upper),
                                    x_scale="jac", ftol=min(ftol, 1e-4), xtol=XTOL, gtol=GTOL, method="trf",
                                    max_nfev=200 * (len(problem.free) + 1))
    try:
        covariance = np.linalg.inv(result.jac.T @ result.jac)
    except np.linalg.LinAlgError:
        covariance = None
    return result, covariance


# --------------------------------------------------------------------------------------------------
# results


@dataclass(frozen=True)
class ActivationEstimate:
    """dH‡ and dS‡ of one process from the global fit, with their joint covariance.

    Attributes
    ----------
    process : str
        Exchange process name.
    enthalpy_kj_mol, entropy_j_mol_k : float
        dH‡ (kJ/mol) and dS‡ (J/(mol K)).
    covariance : ndarray
        2x2 covariance of (dH‡ in kJ/mol, dS‡ in J/(mol K)), the temperature calibration's part included.
    calibration_covariance : ndarray or None
        The part of `covariance` that the temperature calibration brings in (None: no calibration).
    """

    process: str
    enthalpy_kj_mol: float
    entropy_j_mol_k: float
    covariance: np.ndarray
    calibration_covariance: np.ndarray | None = None

    @property
    def enthalpy_stderr(self) -> float:
        """Standard error of dH‡, kJ/mol."""
        return float(math.sqrt(self.covariance[0, 0]))

    @property
    def entropy_stderr(self) -> float:
        """Standard error of dS‡, J/(mol K)."""
        return float(math.sqrt(self.covariance[1, 1]))

    @property
    def correlation(self) -> float:
        """Correlation coefficient of dH‡ and dS‡."""
        return float(self.covariance[0, 1] / math.sqrt(self.covariance[0, 0] * self.covariance[1, 1]))

    def gibbs(self, temperature_k: float) -> tuple[float, float]:
        """dG‡ = dH‡ - T dS‡ and its standard error (kJ/mol) at `temperature_k` (K)."""
        grad = np.array([1.0, -temperature_k / 1e3])
        return (self.enthalpy_kj_mol - temperature_k * self.entropy_j_mol_k / 1e3,
                float(math.sqrt(grad @ self.covariance @ grad)))

    def error_shares(self) -> dict[str, np.ndarray]:
        """The two parts of `covariance` (2x2, as it): ``"spectra"`` (the fit's own) and ``"calibration"``
        (what the temperature calibration adds); NaN without a calibration."""
        calibration = (np.full((2, 2), math.nan) if self.calibration_covariance is None
                       else self.calibration_covariance)
        return {"spectra": self.covariance - np.nan_to_num(calibration), "calibration": calibration}

    def ln_rate(self, temperature_k: float) -> tuple[float, float]:
        """ln(k / s^-1) and its standard error at `temperature_k` (K)."""
        grad = np.array([-1e3 / (GAS_CONSTANT * temperature_k), 1.0 / GAS_CONSTANT])
        value = math.log(eyring_rate_from_enthalpy(self.enthalpy_kj_mol, self.entropy_j_mol_k, temperature_k))
        return value, float(math.sqrt(grad @ self.covariance @ grad))


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
        Every global parameter: value, stderr, vary.
    chi_square, reduced_chi_square : float
        Of the weighted residuals; degrees of freedom `degrees_of_freedom`.
    degrees_of_freedom : int
        Points minus free parameters.
    error_scale : float
        Factor applied to the covariance (1 unless the fit is a misfit).
    options : dict
        shifts, linewidth, populations, calibration used.
    notes : list of str
        Remarks.
    function_evaluations, jacobian_evaluations : int
        Residual and Jacobian evaluations of the joint least squares (all spectra each).
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
    notes: list[str] = field(default_factory=list)
    function_evaluations: int = 0
    jacobian_evaluations: int = 0

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
        for t, t_set, fit in zip(self.temperatures_k, self.setpoints_k, self.fits):
            ln_k, se = a.ln_rate(float(t))
            own = fit.rates[k]
            out["rates"].append({"temperature_k": float(t), "setpoint_k": float(t_set), "rate_per_s": math.exp(ln_k),
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
            "spectra": [{"file": f.source, "setpoint_k": float(s), "temperature_k": float(t)}
                        for f, s, t in zip(self.fits, self.setpoints_k, self.temperatures_k)],
        })
        return out

    def report(self) -> str:
        """A readable account: activation parameters with errors, the comparison, per-temperature rates."""
        t_hm = self.harmonic_mean_temperature_k
        lines = [f"Global fit of {self.series.source.name}: {len(self.fits)} spectra, "
                 f"{self.temperatures_k.min():.2f}-{self.temperatures_k.max():.2f} K; results in {self.outdir}",
                 f"shifts {self.options['shifts']}, linewidth {self.options['linewidth']}, populations "
                 f"{self.options['populations']}; chi-square {self.chi_square:.1f} on {self.degrees_of_freedom} "
                 f"degrees of freedom (reduced {self.reduced_chi_square:.3f}), error scale {self.error_scale:.3g}", ""]
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
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def plot(self, figure: "Figure | None" = None) -> "Figure":
        """Every spectrum (black) with the global fit (red), stacked by temperature."""
        from .plotting import plot_fit_stack

        order = np.argsort(self.temperatures_k)
        return plot_fit_stack([self.fits[i] for i in order], [f"{self.temperatures_k[i]:.1f} K" for i in order],
                              figure=figure, title=f"{self.series.model.title or self.series.source.name}\n"
                                                   "measured (black) and global fit (red)")


# --------------------------------------------------------------------------------------------------
# running it


def _check_choices(shifts: str, linewidth: str) -> None:
    if shifts not in SHIFT_TRENDS:
        raise InputError(f"shifts must be one of {', '.join(SHIFT_TRENDS)}, got {shifts!r}", where="--shifts")
    if linewidth not in LINEWIDTH_TRENDS:
        raise InputError(f"linewidth must be one of {', '.join(LINEWIDTH_TRENDS)}, got {linewidth!r}",
                         where="--linewidth")


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
    return {n: {"value": v, "stderr": float(errors.get(n, math.nan)), "vary": n in problem.free} for n, v in g.items()}


def _activation(problem: _GlobalProblem, x: np.ndarray, covariance: np.ndarray | None,
                from_calibration: np.ndarray | None, names: list[str]) -> list[ActivationEstimate]:
    g = problem.values(x)
    out = []
    for ident, name in zip(problem.processes, names):
        keys = [f"enthalpy_kj_mol_{ident}", f"entropy_j_mol_k_{ident}"]
        idx = np.ix_(*[[problem.free.index(k) for k in keys]] * 2)
        cov = np.full((2, 2), math.nan) if covariance is None else covariance[idx]
        calib = None if from_calibration is None else from_calibration[idx]
        out.append(ActivationEstimate(name, g[keys[0]], g[keys[1]], cov, calib))
    return out


def _eyring_start(two_step: list[EyringResult], names: list[str], idents: list[str]) -> dict[str, tuple[float, float]]:
    by_name = {e.process: e for e in two_step}
    start = {}
    for name, ident in zip(names, idents):
        e = by_name.get(name)
        if e is None or not (math.isfinite(e.enthalpy_kj_mol) and math.isfinite(e.entropy_j_mol_k)):
            raise InputError(f"the two-step fit gives no Eyring line for process {name!r} (too few determined "
                             "rates) to start the global fit from", where="--global")
        start[ident] = (e.enthalpy_kj_mol, e.entropy_j_mol_k)
    return start


def _write(result: GlobalFit, overwrite: bool) -> None:
    import matplotlib.pyplot as plt

    outdir = result.outdir
    atomic_write_text(outdir / "global.json", json.dumps(json_ready(result.to_dict()), indent=1, allow_nan=False) + "\n",
                      overwrite=overwrite)
    atomic_write_text(outdir / "global.txt", result.report() + "\n", overwrite=overwrite)
    fig = result.plot()
    save_figure(fig, outdir / "global_fits.png", overwrite=overwrite)
    plt.close(fig)


def fit_series_global(
    series: Series | str | Path,
    outdir: str | Path,
    *,
    overwrite: bool = False,
    calibration: "TemperatureCalibration | None" = None,
    shifts: str = "constant",
    linewidth: str = "per-spectrum",
    workers: int | None = None,
    progress: bool | None = None,
) -> GlobalFit:
    """Fit all spectra of a series at once with dH‡ and dS‡ of every process as the parameters.

    Parameters
    ----------
    series : Series or path
        The series (or its TOML file).
    outdir : str or Path
        Folder for global.json, global.txt, global_fits.png and the two-step results (``two-step/``);
        refused when it holds results, unless `overwrite`.
    overwrite : bool
        Replace earlier results in `outdir`.
    calibration : TemperatureCalibration, optional
        The series' temperatures are set-points: the global fit uses the calibrated sample temperatures
        and carries the calibration's uncertainty into its errors (so does the two-step Eyring comparison).
    shifts : {"constant", "linear"}
        Shifts the same at every temperature, or linear in T.
    linewidth : {"per-spectrum", "linear"}
        Intrinsic linewidths fitted per spectrum, or linear in T.
    workers : int, optional
        Worker processes for the two-step fit and the global fit (default: one per core; 1: in this process).
    progress : bool, optional
        Progress bar of the two-step fit.

    Returns
    -------
    GlobalFit
    """
    _check_choices(shifts, linewidth)
    series = series if isinstance(series, Series) else load_series(series)
    outdir = Path(outdir)
    _prepare(outdir, overwrite)
    two = fit_series(series, outdir / TWO_STEP_FOLDER, overwrite=overwrite, workers=workers, progress=progress)
    result = _global_fit(series, two, outdir, calibration, shifts, linewidth, workers)
    _write(result, overwrite)
    return result


def _global_fit(series: Series, two: SeriesFit, outdir: Path, calibration: "TemperatureCalibration | None",
                shifts: str, linewidth: str, workers: int | None) -> GlobalFit:
    """The global fit seeded from a finished two-step fit `two` (its rates.csv in `outdir`/two-step)."""
    used = [i for i, o in enumerate(two.outcomes) if o.fitted]
    if len(used) < 3:
        raise InputError(f"only {len(used)} spectra could be fitted; a global fit needs at least 3", where="--global")
    temps, temperature_covariance = _true_temperatures(series, calibration, used)
    names = series.model.process_names()
    eyring = eyring_fit_file(outdir / TWO_STEP_FOLDER / "rates.csv", calibration=calibration)
    members = [_member(i, float(t), two.outcomes[i].fit, series.model) for i, t in zip(used, temps)]
    idents = [n[len("log10_k_"):] for n in members[0].layout.rate_names]
    fit_populations = series.options.populations == "free" and len(series.model.states) > 1
    start = _eyring_start(eyring, names, idents)
    workers = max(1, min(workers or os.cpu_count() or 1, len(members)))
    with single_threaded_blas():
        if workers > 1:
            with futures.ProcessPoolExecutor(workers, initializer=_start_worker) as pool:
                problem = _GlobalProblem(members, series.model, shifts, linewidth, fit_populations, start, pool.map)
        else:
            problem = _GlobalProblem(members, series.model, shifts, linewidth, fit_populations, start)
        evaluator = _Evaluator(problem, workers)
        try:
            solution, inverse = _solve(problem, evaluator)
            from_calibration = (None if temperature_covariance is None or inverse is None else
                                _calibration_covariance(evaluator, solution.x, solution.jac, inverse,
                                                        temperature_covariance))
        finally:
            evaluator.close()
    chi2 = float(2.0 * solution.cost)
    dof = int(problem.rows[-1]) - len(problem.free)
    scale, _, notes = _error_scale(chi2, dof, NoiseEstimate(1.0, 1.0, 0, "per-spectrum estimates"))
    covariance = None if inverse is None else inverse * scale
    if covariance is None:
        notes.append("the joint covariance is singular: some parameters are not determined; errors are not given")
    elif from_calibration is not None:
        covariance = covariance + from_calibration
    if not solution.success:
        notes.append(f"the optimiser stopped without converging: {solution.message}")
    if scale > 1.0 and shifts == "constant":
        notes.append("the spectra do not fit with the same shifts at every temperature; if the slow-exchange "
                     "spectra show the shifts moving, fit them linear in T (--shifts linear, shifts=\"linear\")")
    activation = _activation(problem, solution.x, covariance, from_calibration, names)
    if from_calibration is not None:
        notes.append("temperatures are calibrated sample temperatures; the calibration's uncertainty (curve and "
                     "scatter of its points) is included in the errors, propagated through the fit's optimum "
                     "(its share is listed with each process)")
    elif calibration is None:
        notes.append("no temperature calibration given: temperatures taken as exact (no calibration error included)")
    g = problem.values(solution.x)
    fits = [dataclasses.replace(m.fit, fitted=m.problem.predict(problem.member_values(m, g))) for m in members]
    return GlobalFit(
        series=series, outdir=outdir, activation=activation, two_step=eyring, temperatures_k=temps,
        setpoints_k=np.array([series.spectra[i].temperature_k for i in used]), fits=fits,
        parameters=_stderr_table(problem, solution.x, covariance), chi_square=chi2,
        reduced_chi_square=chi2 / max(dof, 1), degrees_of_freedom=dof, error_scale=float(scale),
        options={"shifts": shifts, "linewidth": linewidth,
                 "populations": "free energies fitted" if fit_populations else "from the model",
                 "calibration": None if calibration is None else calibration.to_dict(),
                 "calibration_error_included": from_calibration is not None,
                 "reference_temperature_k": problem.reference_k},
        notes=list(two.notes) + notes + [f"{o.spectrum.where} left out: its two-step fit failed"
                                         for o in two.failures],
        function_evaluations=int(solution.nfev), jacobian_evaluations=int(solution.njev),
    )
