"""Where a fit starts without a start value: the coarse scan over the rates (amplitude, zero-order
phase and baseline solved linearly at every point, the frequency offset by cross-correlation), the
search over free shifts, and the refinement from the best starts; the linear solve (:func:`linear_solve`) and
the cross-correlation (:func:`coarse_offset`) they are made of.

Steps 2 and 3 of the method in :mod:`dnmr.fitting.spectrumfit`.
"""
from __future__ import annotations

import math
from collections.abc import Sequence

import lmfit
import numpy as np
from scipy import fft

from dnmr.fitting.parameters import with_values
from dnmr.fitting.problem import FitProblem, minimize

SECOND_START_RATIO = 2.0
"""A second local minimum of the scan is refined too when its chi-square is within this factor of the best."""
SHIFT_SEARCH_HZ = 12.0
"""With free shifts, each is first searched this far (Hz) either side of its start value."""
SHIFT_SEARCH_MIN_STEP_HZ = 0.2
"""Finest step (Hz) of that search (else a third of the narrowest linewidth)."""
SHIFT_SEARCH_COARSENING = 3
"""The search first steps this many finest steps at a time, then takes the finest steps around the best point."""


def scan_rates(problem: FitProblem, params: lmfit.Parameters, rate_scan_per_s: tuple[float, float],
               scan_points: int, slow_start: bool = False) -> tuple[list[dict], dict]:
    """Coarse scan over log k of each varying rate in turn, on `scan_points` points over `rate_scan_per_s`
    (s^-1): every other one, then the neighbours of the best local minima (:func:`_scan_points`); returns
    starting points (parameter values) and the scan curves (chi-square by rate name, NaN where not scanned).

    With `slow_start` the slowest scan point is a start too: with free shifts or couplings that are a few
    Hz off, a faster rate can broaden misplaced lines into a better scan point than the right, slow one,
    and a refinement from there may end in a false minimum.
    """
    grid = np.linspace(*np.log10(rate_scan_per_s), scan_points)
    values = params.valuesdict()
    curves: dict[str, np.ndarray] = {}
    varying = [n for n in problem.layout.rate_names if params[n].vary and not params[n].expr]
    starts: list[dict] = []
    for name in varying:
        points = _scan_points(problem, params, values, name, grid)
        chi = np.array([points[i][0] if i in points else np.nan for i in range(len(grid))])
        curves[name] = chi
        minima = _local_minima(points)
        values = points[minima[0]][1]
        starts = [points[i][1] for i in minima[:2] if points[i][0] <= SECOND_START_RATIO * points[minima[0]][0]]
        if slow_start and 0 not in minima[:2]:
            starts.append(points[0][1])
    if not varying:
        starts = [linear_solve(problem, params, coarse_offset(problem, params, values))[1]]
    return starts, curves


def _scan_points(problem: FitProblem, params: lmfit.Parameters, values: dict, name: str, grid: np.ndarray
                 ) -> dict[int, tuple[float, dict]]:
    """Chi-square and solved values at points of the scan of the rate `name` over `grid` (log10 s^-1), by grid
    index: every other point and the last, then the neighbours of the two best local minima until both are
    local minima of the whole grid (the points left out lie where the curve rises on both sides)."""
    points: dict[int, tuple[float, dict]] = {}
    todo = sorted(set(range(0, len(grid), 2)) | {len(grid) - 1})
    while todo:
        for i in todo:
            points[i] = linear_solve(problem, params, coarse_offset(problem, params, {**values, name: float(grid[i])}))
        todo = sorted({j for i in _local_minima(points)[:2] for j in (i - 1, i + 1) if 0 <= j < len(grid)} - set(points))
    return points


def _local_minima(points: dict[int, tuple[float, dict]]) -> list[int]:
    """Indices of the local minima of chi-square among the scanned `points` (neighbours: the next scanned
    ones), lowest first."""
    index = sorted(points)
    chi = [points[i][0] for i in index]
    order = np.argsort(chi, kind="stable")
    return [index[k] for k in order
            if (k == 0 or chi[k] <= chi[k - 1]) and (k == len(chi) - 1 or chi[k] <= chi[k + 1])]


def search_shifts(problem: FitProblem, params: lmfit.Parameters, values: dict) -> dict:
    """Values with every free shift moved to the best point of a coarse search within SHIFT_SEARCH_HZ of
    its start (amplitude, phase and baseline solved linearly at each point), spin by spin, twice over; each
    search steps SHIFT_SEARCH_COARSENING finest steps at a time, then finest steps around its best point.

    A first-guess shift a few Hz off is further than a narrow line is wide: a local refinement from it
    can settle on a false minimum (a line fitted by the wrong partner), which this search avoids.
    """
    sf = problem.layout.model.spectrometer.frequency_mhz
    names = [n for names in problem.layout.shift_names for n in names if params[n].vary and not params[n].expr]
    widths = [values[n] for n in problem.layout.linewidth_names]
    step = max(SHIFT_SEARCH_MIN_STEP_HZ, min(widths) / 3.0) / sf
    coarse = SHIFT_SEARCH_COARSENING * step
    grid = np.arange(-SHIFT_SEARCH_HZ / sf, SHIFT_SEARCH_HZ / sf + 0.5 * coarse, coarse)
    near = step * np.array([k for k in range(1 - SHIFT_SEARCH_COARSENING, SHIFT_SEARCH_COARSENING) if k])
    chi, values = linear_solve(problem, params, values)
    for _ in range(2):
        for name in names:
            for points in (values[name] + grid, None):  # the coarse grid, then the fine steps around its best
                points = values[name] + near if points is None else points
                for x in points[(points >= params[name].min) & (points <= params[name].max)]:
                    trial_chi, trial = linear_solve(problem, params, {**values, name: float(x)})
                    if trial_chi < chi:
                        chi, values = trial_chi, trial
    return values


def refine_best(problem: FitProblem, params: lmfit.Parameters, starts: Sequence[dict]
                ) -> lmfit.minimizer.MinimizerResult:
    """The best of the local refinements (:func:`dnmr.fitting.problem.minimize`) from each of `starts`."""
    best = None
    for start in starts:
        result = minimize(problem, with_values(params, start))
        if best is None or result.chisqr < best.chisqr:
            best = result
    return best


def linear_solve(problem: FitProblem, params: lmfit.Parameters, values: dict) -> tuple[float, dict]:
    """Chi-square with amplitude, zero-order phase and baseline solved by linear least squares.

    Only parameters that vary freely (no expression) are solved for; `values` holds the others.
    Returns chi-square and `values` updated with the solution.
    """
    free = lambda name: params[name].vary and not params[name].expr  # noqa: E731
    base = problem.shape(values)
    if values["phase1_deg"] != 0.0:
        base = np.exp(1j * problem.phase(values, zero_order=False)) * base
    turned = (np.exp(1j * math.radians(values["phase0_deg"])) * base).real
    columns, target = [], problem.data.copy()
    if free("amplitude") and free("phase0_deg"):
        columns += [base.real, -base.imag]  # amplitude x (cos phi0, sin phi0)
    elif free("amplitude"):
        columns.append(turned)
    else:
        target -= values["amplitude"] * turned
    free_baseline = [j for j, n in enumerate(problem.layout.baseline_names) if free(n)]
    for j, n in enumerate(problem.layout.baseline_names):
        if j not in free_baseline:
            target -= values[n] * problem.powers[:, j]
    columns += [problem.powers[:, j] for j in free_baseline]
    values = dict(values)
    if columns:
        design = np.array(columns)  # one row per column of the design matrix
        coef = _linear_least_squares(design, target)
        target = target - coef @ design
        if free("amplitude"):
            if free("phase0_deg"):
                values["amplitude"] = float(max(math.hypot(coef[0], coef[1]), 1e-300))
                values["phase0_deg"] = float(np.degrees(math.atan2(coef[1], coef[0])))
            else:
                values["amplitude"] = float(max(coef[0], 1e-300))
        for j, c in zip(free_baseline, coef[len(coef) - len(free_baseline):]):
            values[problem.layout.baseline_names[j]] = float(c)
    return float(target @ target) / problem.noise.sigma ** 2, values


def coarse_offset(problem: FitProblem, params: lmfit.Parameters, values: dict) -> dict:
    """Values with the offset moved to the best cross-correlation of model and data (uniform grids), among
    the shifts by whole points the offset's bounds allow."""
    par = params["offset_hz"]
    if not par.vary or par.expr or problem.uniform_step is None:
        return values
    n = problem.data.size
    size = fft.next_fast_len(2 * n - 1, real=True)  # no circular wrap-around
    if problem.scan_cache.get("lags") != (par.min, par.max):
        # the data's half of every cross-correlation and the allowed lags, once
        lag = np.arange(-(n - 1), n)
        allowed = (lag * problem.uniform_step >= par.min) & (lag * problem.uniform_step <= par.max)
        problem.scan_cache.update(lags=(par.min, par.max), transform=fft.rfft(problem.data - problem.data.mean(), size),
                                  places=lag[allowed] % size, shifts=lag[allowed] * problem.uniform_step)
    cache = problem.scan_cache  # "places": where the allowed lags are in the circular result
    shape = problem.terms(values).absorption(problem.hz)
    circular = fft.irfft(cache["transform"] * np.conj(fft.rfft(shape - shape.mean(), size)), size)
    return {**values, "offset_hz": float(cache["shifts"][np.argmax(circular[cache["places"]])])}


def _linear_least_squares(rows: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Coefficients c minimising |target - c @ rows| over a few well-scaled rows (the normal equations, as
    accurate as starting values need and several times quicker than an SVD), by SVD where they are singular."""
    try:
        coef = np.linalg.solve(rows @ rows.T, rows @ target)
        if np.all(np.isfinite(coef)):
            return coef
    except np.linalg.LinAlgError:
        pass
    return np.linalg.lstsq(rows.T, target, rcond=None)[0]
