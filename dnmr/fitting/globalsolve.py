"""Solving the global problem: the evaluator that builds every spectrum's residuals and Jacobian block (in
worker processes, or on any executor), the start from scans of the spectra, and the joint least squares.

See :mod:`dnmr.fitting.globalfit` for the method.
"""
from __future__ import annotations

import concurrent.futures as futures
import math
from collections.abc import Callable, Sequence

import numpy as np
from scipy import optimize

from dnmr.errors import InputError
from dnmr.fitting.globalproblem import GlobalMember, GlobalProblem
from dnmr.fitting.globaltreatment import TREND_DEGREES, TREND_SUFFIXES
from dnmr.fitting.workers import SharedPayload, process_pool
from dnmr.kinetics import BOLTZMANN, GAS_CONSTANT, PLANCK

STEP_TOLERANCE_SE = 0.01  # the joint fit stops once its last step was below this many standard errors
XTOL = GTOL = 1e-12  # backstops only: relative to |x| and to the gradient, they mean nothing in standard errors
SCAN_HALF_WIDTH_HZ = 15.0  # the start's scan of each shift in the coldest spectra reaches this far (Hz)
SCAN_MIN_WIDTH_HZ = 0.5  # narrowest line the shift scans use (their grid step is a quarter of it)
SCAN_RISE = 25.0  # a rate scan's minimum counts when chi-square rises by this much on both sides


def _blocks(problem: GlobalProblem, kind: str, x: np.ndarray, ks: Sequence[int]) -> list:
    """Residuals, Jacobian blocks, temperature derivatives, derivatives by the held parameters or nuisance
    refits (`kind`) of spectra `ks` at `x`."""
    work = {"residual": problem.member_residual, "jacobian": problem.member_jacobian,
            "temperature": problem.temperature_derivative, "held": problem.held_derivative,
            "nuisance": _refit_nuisance_of}[kind]
    return [work(k, x) if kind != "nuisance" else work(problem, k, x) for k in ks]


def _refit_nuisance_of(problem: GlobalProblem, k: int, x: np.ndarray) -> np.ndarray:
    """Spectrum `k`'s own free parameters (amplitude, phases, baseline, offset, per-spectrum linewidth)
    refitted with every global parameter held at `x`; returns their values (in ``problem.columns[k]``
    order, globals unchanged)."""
    cols = problem.columns[k]
    own = problem.own_columns(k)
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


class GlobalEvaluator:
    """Evaluates a :class:`~dnmr.fitting.globalproblem.GlobalProblem` spectrum by spectrum: in this process,
    in `workers` processes of its own, or on `executor` in `workers` tasks at a time (the problem travels
    once to each of its worker processes, :class:`~dnmr.fitting.workers.SharedPayload`); `step` is called at
    every evaluation of the residuals (for the progress report).  Every spectrum's block is computed alone,
    so the numbers do not depend on where or in how many tasks."""

    def __init__(self, problem: GlobalProblem, workers: int, step: Callable[[], None] | None = None,
                 executor: futures.Executor | None = None):
        self.problem, self.step = problem, step
        n = len(problem.members)
        self.workers = max(1, min(workers, n))
        self.chunks = [list(range(n))[i::self.workers] for i in range(self.workers)]
        self.own_pool = process_pool(self.workers) if executor is None and self.workers > 1 else None
        pool = executor if executor is not None else self.own_pool
        self.shared = SharedPayload(problem, pool) if pool is not None else None

    def close(self) -> None:
        """Shut the worker processes of its own down (an executor given stays as it was)."""
        if self.shared is not None:
            self.shared.close()
        if self.own_pool is not None:
            self.own_pool.shutdown(wait=True, cancel_futures=True)

    def each(self, kind: str, x: np.ndarray) -> list:
        """Blocks of every spectrum, in order."""
        if self.shared is None:
            parts = [_blocks(self.problem, kind, x, c) for c in self.chunks]
        else:
            parts = self.shared.map(_blocks, [(kind, x, c) for c in self.chunks])
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

    def held_jacobian(self, x: np.ndarray) -> np.ndarray:
        """d residuals / d held parameters (one column per name of ``problem.held_stderr``; zero on the gauge rows)."""
        blocks = self.each("held", x) + [np.zeros((self.problem.gauge.shape[0], len(self.problem.held_stderr)))]
        return np.vstack(blocks)

    def refit_nuisance(self, x: np.ndarray) -> np.ndarray:
        """`x` with every spectrum's own parameters refitted at its global parameters."""
        out = x.copy()
        for k, values in enumerate(self.each("nuisance", x)):
            own = self.problem.own_columns(k)
            out[self.problem.columns[k][own]] = values[own]
        return out


def _linear_chi_square(m: GlobalMember, turned: np.ndarray) -> float:
    """Chi-square of spectrum `m` against the lineshape exp(i phi1) S (`turned`) with amplitude, zero-order
    phase and baseline solved by linear least squares."""
    design = np.column_stack([turned.real, -turned.imag, m.problem.powers])
    coef, *_ = np.linalg.lstsq(design, m.problem.data, rcond=None)
    left = m.problem.data - design @ coef
    return float(left @ left) / m.problem.noise.sigma ** 2


class _Scanner:
    """Chi-square of one spectrum at chosen lineshape quantities, with amplitude, zero-order phase and
    baseline solved linearly and the offset at 0: what the start's scans minimise."""

    def __init__(self, problem: GlobalProblem, k: int, g: np.ndarray):
        self.problem, self.m = problem, problem.members[k]
        A, b = problem.maps[k]
        self.q = A @ g + b
        self.q[problem.family_rows("offset")] = 0.0
        self.phase1 = np.exp(1j * self.m.problem.phase(problem.nuisance(self.m, g), zero_order=False))

    def chi_square(self, q: np.ndarray) -> float:
        """Chi-square at the quantities `q` (inf where the model refuses them)."""
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


def _scanned_lines(problem: GlobalProblem, cold: Sequence[int], g: np.ndarray) -> tuple[np.ndarray, float]:
    """Shift quantities (ppm) in each spectrum of `cold` (coldest first) and the linewidth (Hz) in the
    coldest, in the slow-exchange limit: each shift scanned in turn (two passes) over +-SCAN_HALF_WIDTH_HZ
    (at least 5 linewidths) around where the previous spectrum had it, at the model's first-guess
    linewidth (at least SCAN_MIN_WIDTH_HZ), on a grid of a quarter of it; then the linewidth over 0.05-20 Hz."""
    shifts, widths, rates = problem.family_rows("shift"), problem.family_rows("linewidth"), problem.family_rows("rate")
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


def _scanned_rates(problem: GlobalProblem, g: np.ndarray) -> list[tuple[float, float]]:
    """(T, log10 k) of every spectrum whose chi-square over the rate scan has a clear minimum inside the
    range (risen by at least SCAN_RISE on both sides), the first process's rate scanned, the other
    quantities at `g`."""
    rows = problem.family_rows("rate")
    options = problem.members[0].fit.options
    grid = np.linspace(*np.log10(options.rate_scan_per_s), options.scan_points)
    out = []
    for k, m in enumerate(problem.members):
        chi = _Scanner(problem, k, g).scan(rows[0], grid)
        best = int(np.argmin(chi))
        if np.isfinite(chi).all() and chi[:best + 1].max() - chi[best] > SCAN_RISE and chi[best:].max() - chi[best] > SCAN_RISE:
            out.append((m.temperature_k, float(grid[best])))
    return out


def _robust_start(problem: GlobalProblem, x: np.ndarray) -> np.ndarray:
    """`x` restarted where first guesses and the two-step fit may mislead: shift trends from the lines a scan
    finds in the coldest spectra (a third of them, at least two; assumed in slow exchange), the linewidth
    flat at the coldest spectrum's, every offset at 0; then ΔH‡ and ΔS‡ of the first process from an
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
    degree = min(TREND_DEGREES[problem.treatment.shift_trend], len(cold) - 1)
    for r, values in zip(problem.family_rows("shift"), found.T):
        for j, c in enumerate(np.polynomial.polynomial.polyfit(temps, values, degree)):
            put(problem.quantities[r].name + TREND_SUFFIXES[j], c)
    for r in problem.family_rows("linewidth"):
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


def solve_global(problem: GlobalProblem, evaluator: GlobalEvaluator) -> tuple[optimize.OptimizeResult, np.ndarray | None]:
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

