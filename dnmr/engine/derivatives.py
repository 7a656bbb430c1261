"""Exact derivatives of the lineshape with respect to the model's numbers, from the block decomposition
that gives the spectrum.

A block's spectrum is S = <detect| (z - L)^-1 |start> with z = i 2 pi nu.  The Liouvillian is linear in the
shifts, couplings, linewidths and jump rates, and the start vector in the populations, so the derivative
with respect to any of them is

    dS = <detect| (z - L)^-1 dL (z - L)^-1 |start> + <detect| (z - L)^-1 |d start>

(the derivative of the resolvent, d(z - L)^-1 = (z - L)^-1 dL (z - L)^-1), with dL the block built from
the changed numbers alone: :meth:`dnmr.engine.spinsystems.SystemLayout.fill` is linear in them, so a
model-level change (a unit shift of one spin in one state, d(rate)/dk of every jump of a process...) fills
a block exactly as the numbers themselves do, groups and heteronuclei included.  The frequency itself
is one more direction: dS/dnu is the same formula with dL = -i 2 pi (times the identity).

Two routes per block, as for the spectrum (:mod:`dnmr.engine.resolvent`):

- **eigen** (where the eigenbasis is well conditioned): with L = V diag(lambda) V^-1, u = detect V,
  w = V^-1 start and M = V^-1 dL V, the first term is sum_kl u_k M_kl w_l g_k g_l, g_k = 1 / (z - lambda_k).
  Pairs of distinct poles are split into partial fractions, g_k g_l = (g_k - g_l) / (lambda_k - lambda_l),
  which loses at most eps |Re lambda| / |lambda_k - lambda_l| relative to the pair's peak; pairs closer than
  :data:`SPLIT_SEPARATION` of their width (and k = l) are expanded instead, g_k g_l = g_k^2 (1 + delta g_k +
  delta^2 g_k^2 + ...) with delta = lambda_l - lambda_k, |delta g_k| <= 1e-4, to three terms (to one
  for poles equal to rounding error, :data:`DEGENERATE`).  Either way
  about 1e-12 relative, and every direction is a sum of poles of order one to four: O(n^2) to set up per
  direction, O(n) per point, all blocks evaluated on the grid at once.
- **Schur** (elsewhere): L = Q T Q^H, back substitution at every point, O(n^2) per point and direction.

Blocks that go the Krylov route for the spectrum are solved densely here as well (O(n^3)), which is
meant for blocks of up to a few hundred coherences.  A fit uses these derivatives as its Jacobian where they
cost less than finite differences (:func:`derivatives_pay`): small models, whose evaluations are mostly fixed
cost that one call with all the derivatives pays once.
"""
from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Mapping, Sequence

import numpy as np
import scipy.linalg as sla

from dnmr.engine.blocks import block_liouvillian, block_pattern, block_start, check_memory
from dnmr.engine.liouville import largest_block_size
from dnmr.engine.eigenlines import eigen_basis
from dnmr.engine.resolvent import TWO_PI, shifted_triangular_solve, takes_krylov_route
from dnmr.engine.spinsystems import filled_layouts
from dnmr.model import Model
from dnmr.modelparts import parse_coupling_key

#: Two poles closer than this share of the larger of their widths (|Re lambda|) are not split into
#: partial fractions (the split would amplify rounding error by the inverse of their separation).
SPLIT_SEPARATION = 1e-4
#: Most coherences (over all blocks) for which a fit's exact Jacobian is cheaper than finite differences:
#: measured on fits of 2 to 4 coupled spins in two states and of two methyl groups (benchmarks/fit_speed.py);
#: above about a hundred the two cost the same, and finite differences stay.
PAYING_COHERENCES = 100
#: Poles closer than this share of their width are equal to rounding error: their product is g_k^2 alone.
DEGENERATE = 1e-12
#: Poles x points evaluated at once (complex numbers: 4 MiB).
POINTS_AT_ONCE = 1 << 18


def all_directions(model: Model) -> list[tuple]:
    """Every direction :func:`lineshape_derivatives` knows for `model`, as tuples:

    ``("rate", i)`` the forward rate (s^-1) of process i, ``("linewidth", c)`` the linewidth (Hz) of state
    c, ``("shift", c, s)`` the shift (Hz) of observed spin s (``model.spins`` order) in state c,
    ``("coupling", c, a, b)`` the coupling (Hz) of spins a < b (``model.all_spins`` order) in state c,
    ``("population", c)`` the population of state c as a relative weight (the model normalises the
    populations to sum 1; a model given by free energies is differentiated at weights equal to its
    populations), and ``("frequency",)`` the frequency nu (Hz) at which S is evaluated.
    """
    n_states, n_spins, n_all = len(model.states), len(model.spins), len(model.all_spins)
    out: list[tuple] = [("rate", i) for i in range(len(model.exchanges))]
    out += [("linewidth", c) for c in range(n_states)]
    out += [("shift", c, s) for c in range(n_states) for s in range(n_spins)]
    out += [("coupling", c, a, b) for c in range(n_states) for a in range(n_all) for b in range(a + 1, n_all)]
    out += [("population", c) for c in range(n_states)] if n_states > 1 else []
    return out + [("frequency",)]


@dataclasses.dataclass(frozen=True)
class LineshapeDerivatives:
    """A complex spectrum and its exact derivatives at the same frequencies.

    Attributes
    ----------
    spectrum : ndarray (points,), complex
        S per Hz: absorption Re S (as :func:`dnmr.simulate` gives it), dispersion -Im S.
    directions : tuple
        The directions asked for (:func:`all_directions`), each a direction or a mapping of directions to
        weights (a combination: the derivative along sum of weight x direction).
    slopes : ndarray (directions, points), complex
        dS per unit of each direction (per s^-1, per Hz, per unit weight).
    """

    spectrum: np.ndarray
    directions: tuple
    slopes: np.ndarray

    def slope(self, direction) -> np.ndarray:
        """dS along one of the directions asked for (points,)."""
        return self.slopes[self.directions.index(direction)]

    @property
    def rates(self) -> np.ndarray:
        """dS/dk (per s^-1) of every process's forward rate asked for, in process order: (processes, points)."""
        return self._stack("rate")

    @property
    def linewidths(self) -> np.ndarray:
        """dS/dw (per Hz) of every state's linewidth (FWHM) asked for, in state order: (states, points)."""
        return self._stack("linewidth")

    def _stack(self, kind: str) -> np.ndarray:
        rows = [v for d, v in zip(self.directions, self.slopes) if isinstance(d, tuple) and d[0] == kind]
        return np.array(rows).reshape(len(rows), self.spectrum.size)


def lineshape_derivatives(model: Model, hz: np.ndarray, directions: Sequence | None = None) -> LineshapeDerivatives:
    """The spectrum of `model` at frequencies `hz` (Hz from 0 ppm) and its exact derivatives.

    Parameters
    ----------
    model : Model
        The model (rates at its temperature).
    hz : ndarray
        Frequencies (Hz from 0 ppm) at which to evaluate.
    directions : sequence, optional
        Which derivatives: directions (:func:`all_directions`), or mappings of directions to weights for
        derivatives along combinations (a tied pair of parameters in one solve); default every rate and
        every linewidth.

    Returns
    -------
    LineshapeDerivatives
    """
    if directions is None:
        directions = [d for d in all_directions(model) if d[0] in ("rate", "linewidth")]
    directions = tuple(directions)
    combinations = [dict(d) if isinstance(d, Mapping) else {tuple(d): 1.0} for d in directions]
    known = set(all_directions(model))
    for d in (d for c in combinations for d in c):
        if d not in known:
            raise ValueError(f"unknown derivative direction {d!r}; see all_directions(model)")
    systems = filled_layouts(model)
    check_memory(max((largest_block_size(p.levels) * len(p.populations) for _, p in systems), default=0))
    jumps = model.jumps()
    state = ModelState(model.populations(), model.rates(), _weight_total(model))
    numbers = [combined_numbers(model, c, jumps, state) for c in combinations]

    def blocks():
        for layout, params in systems:
            units = [layout.fill(*n[:4], [dataclasses.replace(j, rate_per_s=r) for j, r in zip(jumps, n[4])])
                     for n in numbers]
            for block in params.blocks:
                pattern = block_pattern(block, params.topology)
                changes = [(block_liouvillian(pattern, u), n[5], block_start(pattern, u.populations) if np.any(n[3]) else None)
                           for n, u in zip(numbers, units)]
                yield block_liouvillian(pattern, params), pattern.detect, block_start(pattern, params.populations), changes

    return block_derivatives(blocks(), hz, directions)


def block_derivatives(blocks: Iterable[tuple], hz: np.ndarray, directions: Sequence) -> LineshapeDerivatives:
    """The spectrum and its derivatives at frequencies `hz` (Hz) from its blocks, each given as (L, detect, start,
    changes) with one change (dL, c, d start or None) per direction of `directions` (:meth:`_PoleSums.add_block`)."""
    sums = _PoleSums(len(directions), TWO_PI * np.asarray(hz, dtype=float))
    for block in blocks:
        sums.add_block(*block)
    spectrum, slopes = sums.evaluate()
    return LineshapeDerivatives(spectrum, tuple(directions), slopes)


@dataclasses.dataclass(frozen=True)
class ModelState:
    """The value-dependent numbers that derivatives along rates and populations need.

    Attributes
    ----------
    populations : ndarray
        Equilibrium populations of the states (sum 1).
    rates_per_s : ndarray
        Forward rate of each process (s^-1).
    weight_total : float
        Sum of the states' relative weights (1 for populations from free energies).
    """

    populations: np.ndarray
    rates_per_s: np.ndarray
    weight_total: float = 1.0


def _weight_total(model: Model) -> float:
    """Sum of the populations as the model gives them (relative weights), 1 where free energies give them."""
    return float(sum(s.population for s in model.states)) if model.states[0].population is not None else 1.0


def combined_numbers(model: Model, combination: Mapping[tuple, float], jumps: Sequence, state: ModelState) -> tuple:
    """The change of the model's numbers along sum of weight x direction (:func:`all_directions`): :func:`_unit_numbers`
    summed, with the frequency's share as the factor of the identity in dL (rad/s per Hz) last; `model` gives the
    structure, `jumps` (the model's, in order) and `state` the numbers at which the derivative is taken."""
    n_states, n_all = len(model.states), len(model.all_spins)
    total = [np.zeros((n_states, len(model.spins))), np.zeros((n_states, n_all, n_all)), np.zeros(n_states),
             np.zeros(n_states), np.zeros(len(jumps))]
    identity = 0.0
    for direction, weight in combination.items():
        unit = _unit_numbers(model, direction, jumps, state)
        if unit is None:
            identity += -1j * TWO_PI * weight
            continue
        for part, change in zip(total, unit):
            part += weight * change
    return (*total, identity)


def _unit_numbers(model: Model, direction: tuple, jumps: Sequence, state: ModelState):
    """The change of the model's numbers per unit of `direction`: (shifts (states, spins) Hz, couplings
    (states, all spins, all spins) Hz, widths Hz, populations, the rate of every jump of `jumps`, the
    model's), as :meth:`~dnmr.engine.spinsystems.SystemLayout.fill` takes them; None for the frequency."""
    kind = direction[0]
    if kind == "frequency":
        return None
    n_states, n_all = len(model.states), len(model.all_spins)
    shifts, couplings = np.zeros((n_states, len(model.spins))), np.zeros((n_states, n_all, n_all))
    widths, populations = np.zeros(n_states), np.zeros(n_states)
    p = state.populations
    rates = np.zeros(len(jumps))
    if kind == "rate":
        for n, j in enumerate(jumps):
            if j.process == direction[1]:
                rates[n] = 1.0 if j.forward or j.source == j.target else p[j.target] / p[j.source]
    elif kind == "linewidth":
        widths[direction[1]] = 1.0
    elif kind == "shift":
        shifts[direction[1], direction[2]] = 1.0
    elif kind == "coupling":
        _, c, a, b = direction
        couplings[c, a, b] = couplings[c, b, a] = 1.0
    else:
        populations = (np.eye(n_states)[direction[1]] - p) / state.weight_total  # populations = weights / their sum
        forward = state.rates_per_s
        for n, j in enumerate(jumps):  # a reverse b -> a runs at k p_a / p_b
            if not j.forward and j.source != j.target:
                s, t = j.source, j.target
                rates[n] = forward[j.process] * (populations[t] / p[s] - p[t] * populations[s] / p[s] ** 2)
    return shifts, couplings, widths, populations, rates


class _PoleSums:
    """The spectrum and its derivatives gathered block by block: the eigen route's blocks as poles of order
    one to four, evaluated on the grid once for all of them; the Schur route's blocks as values at every point."""

    def __init__(self, n_directions: int, omega: np.ndarray):
        self.z = 1j * np.asarray(omega, dtype=float)
        self.poles, self.amplitudes, self.orders = [], [], []
        self.spectrum = np.zeros(self.z.size, dtype=complex)
        self.slopes = np.zeros((n_directions, self.z.size), dtype=complex)

    def add_block(self, L: np.ndarray, detect: np.ndarray, start: np.ndarray, changes: Sequence[tuple]) -> None:
        """One block: S = detect . (z - L)^-1 . start and, for each change (dL, c, d start) in `changes` (dL
        plus c times the identity; d start None for none), dS = detect . (z - L)^-1 (dL + c) (z - L)^-1 . start
        + detect . (z - L)^-1 . d start."""
        L = np.asarray(L, dtype=complex)
        basis = eigen_basis(L, detect, start)
        if basis is None:
            value, slopes = _schur_derivatives(L, detect, start, changes, self.z)
            self.spectrum += value
            self.slopes += slopes
            return
        lam, V, V_inv, u, w = basis
        gap = lam[None, :] - lam[:, None]  # lambda_l - lambda_k
        width = np.maximum(np.abs(lam.real)[:, None], np.abs(lam.real)[None, :])
        close = np.abs(gap) <= SPLIT_SEPARATION * width
        apart = close & (np.abs(gap) > DEGENERATE * width)  # close, and not equal to rounding error
        powers = np.stack([close.astype(float), np.where(apart, gap, 0.0), np.where(apart, gap * gap, 0.0)])
        orders = np.zeros((len(changes), 4, lam.size), dtype=complex)  # poles of order 1 to 4
        if changes:  # every change at once: B[i] = u (V^-1 dL_i V) w
            B = u[None, :, None] * (V_inv @ np.array([c[0] for c in changes], dtype=complex) @ V) * w[None, None, :]
            split = np.where(close, 0.0, B / np.where(close, 1.0, -gap))  # B / (lambda_k - lambda_l)
            orders[:, 0] = split.sum(axis=2) - split.sum(axis=1)
            # a close pair: g_k g_l = g_k^2 / (1 - delta g_k) = g_k^2 (1 + delta g_k + delta^2 g_k^2 + ...),
            # |delta g_k| <= SPLIT_SEPARATION, so three terms leave 1e-12 (one where |delta g_k| <= DEGENERATE)
            orders[:, 1:] = (powers[None] * B[:, None]).sum(axis=3)
            orders[:, 1] += np.array([c[1] for c in changes])[:, None] * (u * w)
        for i, (_, _, start_change) in enumerate(changes):
            if start_change is not None:
                orders[i, 0] += u * (V_inv @ start_change)
        self.poles.append(lam)
        self.amplitudes.append(u * w)
        self.orders.append(orders)

    def evaluate(self) -> tuple[np.ndarray, np.ndarray]:
        """S (points,) and the derivatives (directions, points), a slice of points at a time (the powers of
        every pole on it stay in cache; orders three and four only for the poles that have them)."""
        if not self.poles:
            return self.spectrum, self.slopes
        poles = np.concatenate(self.poles)[:, None]
        amplitudes = np.concatenate(self.amplitudes)
        first, second, third, fourth = (np.ascontiguousarray(a) for a in np.concatenate(self.orders, axis=2).transpose(1, 0, 2))
        higher = np.flatnonzero(third.any(axis=0) | fourth.any(axis=0))
        third, fourth = np.ascontiguousarray(third[:, higher]), np.ascontiguousarray(fourth[:, higher])
        step = max(256, POINTS_AT_ONCE // poles.size)
        for start in range(0, self.z.size, step):
            part = slice(start, start + step)
            g = 1.0 / (self.z[None, part] - poles)  # (poles, points of the slice); numpy's complex reciprocal is 5x slower
            self.spectrum[part] += amplitudes @ g
            self.slopes[:, part] += first @ g + second @ (g * g)
            if higher.size:
                near = g[higher]
                cube = near * near * near
                self.slopes[:, part] += third @ cube + fourth @ (cube * near)
        return self.spectrum, self.slopes


def _schur_derivatives(L: np.ndarray, detect: np.ndarray, start: np.ndarray, changes: Sequence[tuple],
                       z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:meth:`_PoleSums.add_block` by the Schur form L = Q T Q^H (backward stable whatever the conditioning
    of L's eigenvectors): x = (z - T)^-1 Q^H start by back substitution, y = (z - T)^-T Q^T detect by the
    same on the reversed transpose (upper triangular again), and dS = y . (Q^H dL Q + c) x + y . Q^H d start."""
    T, Q = sla.schur(L, output="complex")
    left = detect @ Q
    x = shifted_triangular_solve(T, Q.conj().T @ start, z)
    y = shifted_triangular_solve(T.T[::-1, ::-1], left[::-1], z)[::-1]
    slopes = np.zeros((len(changes), z.size), dtype=complex)
    for i, (change, identity, start_change) in enumerate(changes):
        moved = (Q.conj().T @ (change @ Q)) @ x + identity * x
        if start_change is not None:
            moved += (Q.conj().T @ start_change)[:, None]
        slopes[i] = np.einsum("ip,ip->p", y, moved)
    return left @ x, slopes


def derivatives_pay(model: Model) -> bool:
    """Whether a fit's exact Jacobian costs less than finite differences for `model`: at most
    :data:`PAYING_COHERENCES` coherences in all (the derivatives' work on the grid grows with them, while a
    small model's evaluation is mostly fixed cost), none in a block that goes the Krylov route (which these
    derivatives would solve densely)."""
    sizes = [block.size * len(params.populations) for _, params in filled_layouts(model) for block in params.blocks]
    return sum(sizes) <= PAYING_COHERENCES and not any(takes_krylov_route(n) for n in sizes)


def coupling_direction(model: Model, state: int, key: str) -> tuple:
    """The direction ``("coupling", c, a, b)`` of the coupling `key` (as the model file gives it, "A-B") of
    state `state` (index)."""
    a, b = sorted(model.all_spins.index(x) for x in parse_coupling_key(key))
    return ("coupling", state, a, b)

