"""A model prepared for many evaluations at other numbers: the parameter-independent work done once.

A fit evaluates one model at hundreds of sets of shifts, couplings, linewidths, populations and rates.
Every block Liouvillian is linear in those numbers (:meth:`dnmr.engine.spinsystems.SystemLayout.fill` is
linear, and :func:`dnmr.engine.blocks.block_liouvillian` in what it fills), so it is a fixed matrix times
the vector of the numbers: L = M x, with M built once from unit numbers (only at L's possible non-zero
elements).  An evaluation then skips building and checking a :class:`~dnmr.model.Model`, cutting it into
spin systems and filling the blocks: it is one product per block before the block's decomposition.

Only models whose blocks all go the dense routes are prepared (below the Krylov size, where that fixed
cost matters); :meth:`PreparedModel.accepts` says whether the numbers are ones the model itself would take
(else the caller builds the model, which says why not).
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from dnmr.engine.blocks import BlockPattern, block_liouvillian, block_pattern, block_start
from dnmr.engine.derivatives import LineshapeDerivatives, block_derivatives
from dnmr.engine.resolvent import LineshapeTerms, block_terms, combine, takes_krylov_route
from dnmr.engine.spinsystems import coupling_array, system_layouts
from dnmr.kinetics import rate_ceiling_per_s, STANDARD_TEMPERATURE_K
from dnmr.model import Model
from dnmr.modelparts import LIMITS


@dataclass(frozen=True)
class ModelNumbers:
    """The numbers of a model that a fit moves.

    Attributes
    ----------
    shifts_hz : ndarray (states, observed spins)
        Shifts (Hz from 0 ppm).
    couplings_hz : ndarray (states, all spins, all spins)
        Scalar couplings (Hz), symmetric.
    linewidths_hz : ndarray (states,)
        Intrinsic linewidths (FWHM, Hz).
    populations : ndarray (states,)
        Equilibrium populations (sum 1).
    rates_per_s : ndarray (processes,)
        Forward rate of each exchange process (s^-1).
    """

    shifts_hz: np.ndarray
    couplings_hz: np.ndarray
    linewidths_hz: np.ndarray
    populations: np.ndarray
    rates_per_s: np.ndarray


@dataclass(frozen=True, eq=False)
class _PreparedBlock:
    pattern: BlockPattern
    states: np.ndarray   # model state of each effective state
    shares: np.ndarray   # share of the spin space of each effective state
    index: np.ndarray    # flat positions of L's possible non-zero elements
    matrix: np.ndarray   # (positions, numbers): L there per unit of each number (rad/s)


class PreparedModel:
    """A model's block Liouvillians as fixed matrices times its numbers (see the module notes).

    Build with :meth:`build`, which returns None for a model that is not worth preparing (a block on the
    Krylov route) or that couples numbers the vector cannot hold apart (a listed reverse process).
    """

    def __init__(self, model: Model, blocks: list[_PreparedBlock], pairs: tuple[np.ndarray, np.ndarray],
                 nonzero: np.ndarray):
        self.model = model
        self.blocks = blocks
        self.pairs = pairs
        self.nonzero = nonzero
        self.jumps = model.jumps()
        self.ceiling = rate_ceiling_per_s(model.temperature_k or STANDARD_TEMPERATURE_K)
        self.limit_hz = LIMITS["ppm"] * model.spectrometer.frequency_mhz

    @classmethod
    def build(cls, model: Model) -> "PreparedModel | None":
        """`model` prepared, or None where it is not (see the class notes)."""
        jumps = model.jumps()
        if {j.process for j in jumps} != set(range(len(model.exchanges))):
            return None  # a reverse listed as a process of its own: its rate is checked, not used
        couplings = coupling_array(model)
        n_states, n_spins, n_all = len(model.states), len(model.spins), len(model.all_spins)
        first, second = np.triu_indices(n_all, 1)
        width = n_states * (n_spins + len(first) + 1) + len(jumps)
        prepared = []
        for layout in system_layouts(model, couplings, jumps):
            units = [layout.fill(*_split(unit, n_states, n_spins, n_all, (first, second)),
                                 [replace(j, rate_per_s=r) for j, r in zip(jumps, unit[width - len(jumps):])])
                     for unit in np.eye(width)]
            for block in units[0].blocks:
                pattern = block_pattern(block, units[0].topology)
                if takes_krylov_route(block.size * len(layout.states)):
                    return None
                matrix = np.array([block_liouvillian(pattern, u).ravel() for u in units]).T
                index = np.flatnonzero(np.any(matrix != 0, axis=1))
                prepared.append(_PreparedBlock(pattern, layout.states, layout.shares, index, matrix[index]))
        return cls(model, prepared, (first, second), couplings != 0)

    def jump_rates(self, numbers: ModelNumbers) -> np.ndarray:
        """The rate (s^-1) of every jump of the model (:meth:`~dnmr.model.Model.jumps`) at `numbers`: the forward
        rate, a reverse at k p_to / p_from (detailed balance), a mutual exchange's inverse at k."""
        p, k = numbers.populations, numbers.rates_per_s
        return np.array([k[j.process] * (1.0 if j.forward or j.source == j.target else p[j.target] / p[j.source])
                         for j in self.jumps])

    def accepts(self, numbers: ModelNumbers) -> bool:
        """Whether `numbers` are ones the model would take (within its limits, positive linewidths and
        populations, rates up to kB T/h) and keep the couplings that were zero zero; conservative: False
        sends the caller to the full model, which says what it refuses."""
        parts = (numbers.shifts_hz, numbers.couplings_hz, numbers.linewidths_hz, numbers.populations,
                 numbers.rates_per_s)
        return (all(np.all(np.isfinite(a)) for a in parts)
                and np.abs(numbers.shifts_hz).max(initial=0.0) <= self.limit_hz
                and np.abs(numbers.couplings_hz).max(initial=0.0) <= LIMITS["hz"]
                and 0.0 < numbers.linewidths_hz.min() and numbers.linewidths_hz.max() <= LIMITS["hz"]
                and numbers.populations.min() > 0.0
                and numbers.rates_per_s.max(initial=0.0) <= self.ceiling
                and np.array_equal(numbers.couplings_hz != 0, self.nonzero))

    def _vector(self, numbers: tuple) -> np.ndarray:
        """The numbers (shifts, couplings, widths, populations, jump rates) as the vector M multiplies."""
        shifts, couplings, widths, _, jump_rates = numbers
        return np.concatenate([np.ravel(shifts), couplings[:, self.pairs[0], self.pairs[1]].ravel(), widths, jump_rates])

    def _blocks(self, numbers: ModelNumbers):
        """Each block's Liouvillian, detection and start vector, and its effective populations."""
        x = self._vector(self._filled(numbers))
        for block in self.blocks:
            yield block, self._liouvillian(block, x), self._effective(block, numbers.populations)

    def _filled(self, numbers: ModelNumbers) -> tuple:
        return (numbers.shifts_hz, numbers.couplings_hz, numbers.linewidths_hz, numbers.populations,
                self.jump_rates(numbers))

    @staticmethod
    def _liouvillian(block: _PreparedBlock, x: np.ndarray) -> np.ndarray:
        n = len(block.pattern.detect)
        L = np.zeros(n * n, dtype=complex)
        L[block.index] = block.matrix @ x
        return L.reshape(n, n)

    @staticmethod
    def _effective(block: _PreparedBlock, populations: np.ndarray) -> np.ndarray:
        return populations[block.states] * block.shares

    def terms(self, numbers: ModelNumbers) -> LineshapeTerms:
        """The decomposition of the spectrum at `numbers` (as :func:`dnmr.engine.blocks.lineshape_terms` of the
        model with those numbers)."""
        results = []
        for block, L, effective in self._blocks(numbers):
            size = block.pattern.block.size
            results.append(block_terms(L, block.pattern.detect, block_start(block.pattern, effective),
                                       np.repeat(np.sqrt(effective), size)))
        return combine(results)

    def derivatives(self, numbers: ModelNumbers, hz: np.ndarray, changes: Sequence[tuple],
                    directions: Sequence) -> LineshapeDerivatives:
        """The spectrum at `numbers` and frequencies `hz` (Hz) with its derivatives along `changes`, each the
        change of the numbers per unit of one of `directions` (shifts, couplings, widths, populations, jump
        rates and the factor of the identity, as :func:`dnmr.engine.derivatives.combined_numbers` gives it)."""
        moves = np.array([self._vector(change[:5]) for change in changes]).T  # (numbers, changes)

        def blocks():
            for block, L, effective in self._blocks(numbers):
                pattern, n = block.pattern, len(block.pattern.detect)
                dL = np.zeros((len(changes), n * n), dtype=complex)
                if changes:
                    dL[:, block.index] = (block.matrix @ moves).T
                steps = [(step.reshape(n, n), change[5],
                          block_start(pattern, self._effective(block, change[3])) if np.any(change[3]) else None)
                         for step, change in zip(dL, changes)]
                yield L, pattern.detect, block_start(pattern, effective), steps

        return block_derivatives(blocks(), hz, directions)


def _split(unit: np.ndarray, n_states: int, n_spins: int, n_all: int, pairs: tuple) -> tuple:
    """A vector of :meth:`PreparedModel._vector`'s layout back as shifts, couplings, widths and populations
    (the jump rates are the rest)."""
    shifts = unit[: n_states * n_spins].reshape(n_states, n_spins)
    end = n_states * (n_spins + len(pairs[0]))
    couplings = np.zeros((n_states, n_all, n_all))
    couplings[:, pairs[0], pairs[1]] = unit[n_states * n_spins:end].reshape(n_states, -1)
    couplings[:, pairs[1], pairs[0]] = couplings[:, pairs[0], pairs[1]]
    return shifts, couplings, unit[end:end + n_states], np.ones(n_states)
