"""The numerical steps of a chi-square profile (:func:`dnmr.fitting.problem.profile_parameter`): where the
refinement of a profile point starts (:func:`predicted_start`, :func:`conditional_slopes`), the refinement
itself from that good start (:func:`refine_from`), and the search for where the profile crosses a level
(:func:`level_crossing`).
"""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence

import numpy as np
from scipy import optimize

QUICK_STEPS = 3
"""Gauss-Newton steps a refinement of a profile point takes before it hands over to scipy's trust-region solver."""
MAX_SEARCH_STEPS = 16
"""Profile points one search for a crossing (:func:`level_crossing`) evaluates at most."""

Residual = Callable[[np.ndarray], np.ndarray]
ResidualAndJacobian = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]


def refine_from(residual: Residual, residual_and_jacobian: ResidualAndJacobian, x: np.ndarray,
                bounds: tuple[np.ndarray, np.ndarray], tolerance: float, max_nfev: int
                ) -> tuple[np.ndarray, np.ndarray]:
    """Least squares from `x` within `bounds`: Gauss-Newton steps (:func:`_gauss_newton`), then, unless they
    met the tolerance, scipy's trust-region solver from where they stopped (given the residuals and Jacobian
    known there, not computed again).  Returns the point reached and its residuals."""
    x, r, jac, converged = _gauss_newton(residual, residual_and_jacobian, _strictly_inside(x, bounds), bounds,
                                         tolerance)
    if converged:
        return x, r
    key = x.tobytes()
    found = optimize.least_squares(lambda y: r if y.tobytes() == key else residual(y), x,
                                   jac=lambda y: jac if jac is not None and y.tobytes() == key
                                   else residual_and_jacobian(y)[1],
                                   bounds=bounds, method="trf", x_scale="jac", ftol=tolerance, xtol=tolerance,
                                   gtol=tolerance, max_nfev=max_nfev)
    return found.x, found.fun


def _gauss_newton(residual: Residual, residual_and_jacobian: ResidualAndJacobian, x: np.ndarray,
                  bounds: tuple[np.ndarray, np.ndarray], tolerance: float
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, bool]:
    """Gauss-Newton steps from `x` while each lowers chi-square and stays within the bounds.

    Each step costs one Jacobian (which gives the residuals too) and one residual; the Jacobian at the last
    point, which scipy's solver would compute before it stops, is never needed.  Values at a bound that the
    step would take out are held there.  A step stops the refinement by scipy's `ftol` test: it lowered
    chi-square by less than `tolerance` times chi-square, and by more than a quarter of what the linear model
    promised.  Where the linear model promised four times more than the step gave, scipy's solver would shrink
    its trust region: it takes over there.

    Returns
    -------
    x, residual : ndarray
        The best point reached and its residuals.
    jacobian : ndarray or None
        The Jacobian at `x` when it is known.
    converged : bool
        Whether the test was met within QUICK_STEPS steps (otherwise refine on from `x`).
    """
    r, jac = residual_and_jacobian(x)
    for _ in range(QUICK_STEPS):
        chi_square = float(r @ r)
        step = _step(jac, r, np.ones(x.size, bool))
        leaving = (x + step < bounds[0]) | (x + step > bounds[1])
        if leaving.any():  # held at the bound they sit at, if they do
            step = _step(jac, r, ~leaving) if np.all(leaving <= _at_bound(x, bounds)) else step
        moved = x + step
        if np.any(moved < bounds[0]) or np.any(moved > bounds[1]):
            break
        promised = chi_square - float(np.sum((r + jac @ step) ** 2))
        r_moved = residual(moved)
        reduction = chi_square - float(r_moved @ r_moved)
        if not reduction >= 0.0:
            break
        x, r, jac = moved, r_moved, None
        if promised > 0.0 and reduction <= 0.25 * promised:  # a poor linear model: the trust region takes over
            break
        if reduction < tolerance * (chi_square - reduction):
            return x, r, None, True
        r, jac = residual_and_jacobian(x)
    return x, r, jac, False


def _step(jac: np.ndarray, r: np.ndarray, moving: np.ndarray) -> np.ndarray:
    """The Gauss-Newton step of the parameters marked `moving` (the others held), columns scaled to unit norm."""
    norms = np.linalg.norm(jac[:, moving], axis=0)
    norms[norms == 0.0] = 1.0
    step = np.zeros(moving.size)
    step[moving] = np.linalg.lstsq(jac[:, moving] / norms, -r, rcond=None)[0] / norms
    return step


def _margins(bounds: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """How far inside its finite bounds scipy's trust-region solver keeps each value: 1e-10 of the bound,
    at least 1e-10 (0 for an infinite bound)."""
    return tuple(np.where(np.isfinite(b), 1e-10 * np.maximum(1.0, np.abs(b)), 0.0) for b in bounds)


def _strictly_inside(x: np.ndarray, bounds: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """`x` with the values closer to a bound than its margin (:func:`_margins`) moved in to it, as scipy's
    trust-region solver moves its start."""
    (lower, upper), (low, high) = bounds, _margins(bounds)
    out = np.where(np.isfinite(lower) & (x - lower <= low), lower + low, x)
    return np.where(np.isfinite(upper) & (upper - out <= high), upper - high, out)


def _at_bound(x: np.ndarray, bounds: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Which values of `x` sit at a bound (within twice its margin)."""
    (lower, upper), (low, high) = bounds, _margins(bounds)
    return (np.isfinite(lower) & (x - lower <= 2.0 * low)) | (np.isfinite(upper) & (upper - x <= 2.0 * high))


def level_crossing(points: dict[float, float], evaluate: Callable[[float], object], x0: float, direction: int,
                   limit: float, level: float, accuracy: float, first_step: float, stride: float) -> float:
    """Where the rise of the profile `points` (parameter value to rise above the best chi-square) reaches
    `level` on the side `direction` (+1 or -1) of the best value `x0`; NaN when it does not before `limit`.

    The search works on the square root of the rise (above the lowest point found), which grows linearly away
    from a parabolic minimum.  Outwards, the secant through the outermost two points below the level predicts
    where it is reached (the first step from `x0` is `first_step`, where a parabola reaches the level), at
    most twice the last step or `stride` on.  Once a point lies above the level, the secant of the last two
    points below closes in if it falls between the ends, else the secant between the ends, or their midpoint
    where one end stalls.  The search ends when the crossing estimated with the last point
    (:meth:`_Bracket.estimate`) lies within `accuracy` times that point's distance from `x0`, and returns
    that estimate.  `evaluate(x)` adds the point x to `points`; the points
    known already are used first (a bound's walk starts from the threshold's crossing).
    """
    found = _Bracket(points, x0, direction, math.sqrt(level))
    for _ in range(MAX_SEARCH_STEPS):
        if found.outer is None:
            if (limit - found.inner) * direction <= 1e-9:
                return math.nan
            x = found.outwards(first_step, stride)
            x = min(x, limit) if direction > 0 else max(x, limit)
        elif abs(found.outer - found.inner) < 1e-4:
            break
        else:
            x = found.closing()
        evaluate(x)
        found.add(x)
        if abs(found.estimate() - x) <= accuracy * abs(x - x0):
            break
    return found.estimate()


class _Bracket:
    """The points of one side of a profile around the crossing of a level: the last below it before the first
    above it (`inner`, at first the best value), the first above it (`outer`, None while there is none), the one
    below before `inner` (`before`, None while `inner` is the best value), and the last point added."""

    def __init__(self, points: Mapping[float, float], x0: float, direction: int, target: float):
        self.points, self.direction, self.target = points, direction, target
        self.inner, self.outer, self.before, self.moved = x0, None, None, ""
        for x in sorted((x for x in points if (x - x0) * direction > 0), key=lambda x: abs(x - x0)):
            if self.height(x) >= target:
                self.outer = x
                break
            self.inner, self.before = x, self.inner
        self.last = self.inner

    def height(self, x: float) -> float:
        """Square root of the rise at the known point x above the lowest point found."""
        return math.sqrt(max(self.points[x] - min(self.points.values()), 0.0))

    def add(self, x: float) -> None:
        """Take in the point x, just evaluated."""
        if self.height(x) >= self.target:
            self.outer, self.moved = x, self.moved + "o"
        else:
            self.before, self.inner, self.moved = self.inner, x, self.moved + "i"
        self.last = x

    def outwards(self, first_step: float, stride: float) -> float:
        """The next point beyond `inner` while none lies above the level."""
        if self.before is None:
            return self.inner + self.direction * first_step
        last = abs(self.inner - self.before)
        slope = (self.height(self.inner) - self.height(self.before)) / last
        longest = max(2.0 * last, stride)
        step = min((self.target - self.height(self.inner)) / slope, longest) if slope > 0.0 else longest
        return self.inner + self.direction * step

    def closing(self) -> float:
        """The next point between the ends: the midpoint where one end stalls (it moved twice in a row, or the
        end below moved to a point less than half as high as the level), else the secant of the last two points
        below if it falls between the ends, else the secant between the ends."""
        low = self.moved[-1:] == "i" and self.height(self.inner) < 0.5 * self.target
        if self.moved[-2:] in ("ii", "oo") or low:
            return 0.5 * (self.inner + self.outer)
        x = self._secant(self.inner, self.before)
        return x if (x - self.inner) * (self.outer - x) > 0.0 else self._secant(self.inner, self.outer)

    def estimate(self) -> float:
        """The crossing as the last point sees it: while no point lies above the level, the secant of the last
        two below; else the secant of the last two below if the last point is one of them and it falls between
        the ends; else the secant between the ends, or their midpoint where the end above lies more than twice
        as high as the level (a secant to a far steeper end says little)."""
        if self.outer is None:
            return self._secant(self.inner, self.before)
        if self.before is not None and self.last == self.inner:
            x = self._secant(self.inner, self.before)
            if (x - self.inner) * (self.outer - x) > 0.0:
                return x
        if self.height(self.outer) < 2.0 * self.target:
            return self._secant(self.inner, self.outer)
        return 0.5 * (self.inner + self.outer)

    def _secant(self, a: float, b: float | None) -> float:
        """Where the line through the points a and b (square-root rise against x) reaches the level (a when
        there is no b or the line is flat)."""
        if b is None or self.height(a) == self.height(b):
            return a
        return a + (b - a) * (self.target - self.height(a)) / (self.height(b) - self.height(a))


def conditional_slopes(covariance: np.ndarray | None, names: Sequence[str], name: str) -> dict[str, float]:
    """How each other parameter of `names` (the covariance's order) moves per unit of `name` along the floor of
    chi-square's valley at its minimum: C_nk / C_kk, which is -(H_nn^-1 H_nk) of the curvature H = C^-1
    (nothing without a covariance)."""
    if covariance is None or name not in names:
        return {}
    k = list(names).index(name)
    return {n: float(covariance[i, k] / covariance[k, k]) for i, n in enumerate(names) if i != k}


def predicted_start(fits: Mapping[float, Mapping[str, float]], x: float, x0: float, slopes: Mapping[str, float],
                    reach: float) -> dict[str, float]:
    """Start values of the parameters at profile point x from the refined values `fits` at the points known:
    interpolated between the neighbours on either side; else extrapolated from the nearest two on one side when
    x lies no further from the nearer than they lie apart; else the nearest point's values, moved along `slopes`
    (:func:`conditional_slopes`) when that point is the best one `x0` and x lies within `reach` of it (where
    chi-square is close to its parabola)."""
    below, above = sorted(v for v in fits if v < x), sorted(v for v in fits if v > x)
    if below and above:
        a, b = below[-1], above[0]
    else:
        known = below[::-1] or above  # nearest first
        a, b = known[1] if len(known) > 1 else math.nan, known[0]
        if not abs(x - b) <= abs(b - a):
            move = x - b if b == x0 and abs(x - b) <= reach else 0.0
            return {n: v + slopes.get(n, 0.0) * move for n, v in fits[b].items()}
    w = (x - a) / (b - a)
    return {n: fits[a][n] + w * (fits[b][n] - fits[a][n]) for n in fits[a]}
