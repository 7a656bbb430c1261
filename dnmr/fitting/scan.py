"""Where a fit starts without a start value: the coarse scan over the rates (amplitude, zero-order
phase and baseline solved linearly at every point, the frequency offset by cross-correlation), the
search over free shifts, and the refinement from the best starts.

Steps 2 and 3 of the method in :mod:`dnmr.fitting.spectrumfit`.
"""
from __future__ import annotations

from collections.abc import Sequence

import lmfit
import numpy as np

from dnmr.fitting.parameters import with_values
from dnmr.fitting.problem import FitProblem, minimize

SECOND_START_RATIO = 2.0
"""A second local minimum of the scan is refined too when its chi-square is within this factor of the best."""
SHIFT_SEARCH_HZ = 12.0
"""With free shifts, each is first searched this far (Hz) either side of its start value."""
SHIFT_SEARCH_MIN_STEP_HZ = 0.2
"""Finest step (Hz) of that search (else a third of the narrowest linewidth)."""


def scan_rates(problem: FitProblem, params: lmfit.Parameters, rate_scan_per_s: tuple[float, float],
               scan_points: int, slow_start: bool = False) -> tuple[list[dict], dict]:
    """Coarse scan over log k of each varying rate in turn, at `scan_points` points over `rate_scan_per_s`
    (s^-1); returns starting points (parameter values) and the scan curves (chi-square by rate name).

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
        points = []
        for x in grid:
            trial = problem.coarse_offset(params, {**values, name: float(x)})
            points.append(problem.linear_solve(params, trial))
        chi = np.array([c for c, _ in points])
        curves[name] = chi
        order = np.argsort(chi)
        values = points[order[0]][1]
        minima = [i for i in order if (i == 0 or chi[i] <= chi[i - 1]) and (i == len(chi) - 1 or chi[i] <= chi[i + 1])]
        starts = [points[i][1] for i in minima[:2] if chi[i] <= SECOND_START_RATIO * chi[order[0]]]
        if slow_start and 0 not in minima[:2]:
            starts.append(points[0][1])
    if not varying:
        starts = [problem.linear_solve(params, problem.coarse_offset(params, values))[1]]
    return starts, curves


def search_shifts(problem: FitProblem, params: lmfit.Parameters, values: dict) -> dict:
    """Values with every free shift moved to the best point of a coarse search within SHIFT_SEARCH_HZ of
    its start (amplitude, phase and baseline solved linearly at each point), spin by spin, twice over.

    A first-guess shift a few Hz off is further than a narrow line is wide: a local refinement from it
    can settle on a false minimum (a line fitted by the wrong partner), which this search avoids.
    """
    sf = problem.layout.model.spectrometer.frequency_mhz
    names = [n for names in problem.layout.shift_names for n in names if params[n].vary and not params[n].expr]
    widths = [values[n] for n in problem.layout.linewidth_names]
    step = max(SHIFT_SEARCH_MIN_STEP_HZ, min(widths) / 3.0) / sf
    grid = np.arange(-SHIFT_SEARCH_HZ / sf, SHIFT_SEARCH_HZ / sf + 0.5 * step, step)
    chi, values = problem.linear_solve(params, values)
    for _ in range(2):
        for name in names:
            par, centre = params[name], values[name]
            for x in centre + grid:
                if par.min <= x <= par.max:
                    trial_chi, trial = problem.linear_solve(params, {**values, name: float(x)})
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
