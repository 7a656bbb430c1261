"""Watching a continued fraction converge while the Lanczos recursion builds it, and the exact power-of-two
rescaling that keeps determinant recurrences finite (used by :mod:`dnmr.engine.resolvent`)."""
from __future__ import annotations

import numpy as np

#: Steps between two looks at the watched fraction; it has converged when no grid point moved by more than
#: CONVERGED of the largest value over that many steps (measured on eight spins: then within 3e-14 of the
#: full recursion; over 8 steps a plateau of 1.5e-12 was taken for convergence).
CONVERGENCE_STEPS = 32
CONVERGED = 1e-13


def rescaling_interval(growth: float) -> int:
    """Levels of a determinant recurrence that a factor of 2^900 covers when each level multiplies the
    values by at most `growth` (so that rescaling that often keeps them finite)."""
    return max(1, int(900 // np.log2(max(2.0 * growth, 2.0))))


class ConvergenceWatch:
    """The continued fraction of the Lanczos tridiagonal so far at the frequencies of a grid, carried along
    the recursion to stop it once the fraction has converged there (numpy; the compiled loop has its own).

    With P_k = det(z - T_k) and N_k the same without the first row and column, e1 (z - T_k)^-1 e1 = N_k / P_k,
    and both follow X_(k+1) = (z - alpha_k) X_k - beta_(k-1)^2 X_(k-1): the mirror image of the recurrence of
    :meth:`dnmr.engine.resolvent.ContinuedFraction.evaluate`, with the same exact power-of-two rescaling.  Every
    :data:`CONVERGENCE_STEPS` steps the fraction is compared with its value that many steps before; it has
    converged when no point moved by more than :data:`CONVERGED` of its largest value (a point where P_k
    vanishes, or anything not finite, never passes).

    Parameters
    ----------
    omega : ndarray
        Angular frequencies of the grid (rad/s).
    growth : float
        Bound on |z - alpha_k| + |beta_k^2| over all levels (the most a level can grow the minors by).
    """

    def __init__(self, omega: np.ndarray, growth: float):
        self.z = 1j * np.asarray(omega, dtype=float)
        self.every = rescaling_interval(growth)
        self.minors: list[np.ndarray] = []  # P_k, P_(k-1), N_k, N_(k-1)
        self.previous = np.full(self.z.size, np.nan, dtype=complex)
        self.steps = 0

    def settled(self, alpha: complex, beta2: complex) -> bool:
        """Take the next level (alpha_k, beta_(k-1)^2); True once the fraction has converged on the grid."""
        if not self.minors:
            one = np.ones_like(self.z)
            self.minors = [self.z - alpha, one, one, np.zeros_like(self.z)]
        else:
            P, P_before, N, N_before = self.minors
            shift = self.z - alpha
            self.minors = [shift * P - beta2 * P_before, P, shift * N - beta2 * N_before, N]
        self.steps += 1
        if self.steps % self.every == 0:
            rescale(*self.minors)
        if self.steps % CONVERGENCE_STEPS:
            return False
        with np.errstate(divide="ignore", invalid="ignore"):
            fraction = self.minors[2] / self.minors[0]
        change, self.previous = np.abs(fraction - self.previous).max(initial=0.0), fraction
        return bool(change <= CONVERGED * np.abs(fraction).max(initial=0.0))


def rescale(*values: np.ndarray) -> None:
    """Divide complex arrays, in place and pointwise, by the power of two that brings the largest of them
    below 1 (an exact operation: only exponents change)."""
    size = np.maximum.reduce([np.abs(v.real) + np.abs(v.imag) for v in values])
    _, exponent = np.frexp(size)
    for v in values:
        pairs = v.view(float).reshape(-1, 2)
        np.ldexp(pairs, -exponent[:, None], out=pairs)
