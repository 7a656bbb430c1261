"""Models prepared for many evaluations at other numbers: the work that depends only on the structure, done once.

A fit evaluates one model at hundreds of sets of shifts, couplings, linewidths, populations and rates, and a
simulation of a small model is mostly fixed cost.  Every block Liouvillian is linear in those numbers
(:meth:`dnmr.engine.spinsystems.SystemLayout.fill` is linear, and :func:`dnmr.engine.blocks.block_liouvillian` in
what it fills), so it is a fixed matrix times the vector of the numbers: L = M x, with M built once from unit
numbers (only at L's possible non-zero elements).  M depends only on the model's structure (spins, groups,
heteronuclei, which couplings vanish, the jumps: :func:`~dnmr.engine.spinsystems.structure_key`), so one
:class:`PreparedStructure` serves every model of that structure.  An evaluation then skips cutting the model
into spin systems and filling the blocks: it is one product per block before the block's decomposition.

Only structures whose blocks all go the dense routes are prepared (below the Krylov size, where that fixed cost
matters).  A fit holds a :class:`PreparedModel`, whose :meth:`~PreparedModel.accepts` says whether the numbers
are ones the model itself would take (else the caller builds the model, which says why not);
:func:`small_model_terms` is the route of :func:`dnmr.simulate` for models with small blocks only.
"""
from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, replace

import numpy as np

from dnmr.engine.blocks import BlockPattern, block_liouvillian, block_pattern, block_start
from dnmr.engine.derivatives import LineshapeDerivatives, block_derivatives
from dnmr.engine.liouville import largest_block_size
from dnmr.engine.resolvent import LineshapeTerms, combine, dense_block_terms, takes_krylov_route
from dnmr.engine.spinsystems import coupling_array, remembered, structure_key, system_layouts
from dnmr.kinetics import Jump, rate_ceiling_per_s, STANDARD_TEMPERATURE_K
from dnmr.model import Model
from dnmr.modelparts import LIMITS

#: Largest block (coherences over all the states of its spin system) of a model that :func:`dnmr.simulate`
#: evaluates through its prepared structure (two or three sites of an uncoupled spin, an AB pair in two states,
#: three coupled spins).  Preparing costs the first simulation of a structure 2 to 6 ms more (measured on an AB
#: pair in two states and on three spins), and saves about a third of every later one; larger blocks spend
#: their time in the decomposition, where preparing saves little.
SMALL_BLOCK_SIZE = 16


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
    index: np.ndarray    # flat positions of L's possible non-zero elements
    matrix: np.ndarray   # (positions, numbers): L there per unit of each number (rad/s)
    starts: np.ndarray   # (coherences, model states): the start vector per unit population of each state


class PreparedStructure:
    """The block Liouvillians of every model of one structure as fixed matrices times the vector of a model's
    numbers (see the module notes).  Build with :func:`prepared_structure`, which keeps it for later models."""

    def __init__(self, blocks: list[_PreparedBlock], pairs: tuple[np.ndarray, np.ndarray]):
        self.blocks = blocks
        self.pairs = pairs

    @classmethod
    def build(cls, model: Model, couplings: np.ndarray, jumps: Sequence[Jump]) -> "PreparedStructure | None":
        """The structure of `model` (its :func:`~dnmr.engine.spinsystems.coupling_array` and jumps given) prepared,
        or None where a block goes the Krylov route."""
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
                starts = np.array([block_start(pattern, (layout.states == c) * layout.shares) for c in range(n_states)]).T
                prepared.append(_PreparedBlock(pattern, index, matrix[index], starts))
        return cls(prepared, (first, second))

    def vector(self, shifts_hz: np.ndarray, couplings_hz: np.ndarray, linewidths_hz: np.ndarray,
               jump_rates: Sequence[float]) -> np.ndarray:
        """The numbers as the vector the matrices multiply: shifts (Hz; states, observed spins), couplings (Hz; states,
        all spins, all spins), linewidths (Hz) and the rate (s^-1) of every jump (:meth:`~dnmr.model.Model.jumps`)."""
        pairs = [couplings_hz[:, self.pairs[0], self.pairs[1]].ravel()] if len(self.pairs[0]) else []
        return np.concatenate([np.ravel(shifts_hz), *pairs, linewidths_hz, jump_rates])

    def liouvillians(self, x: np.ndarray, populations: np.ndarray) -> Iterator[tuple[_PreparedBlock, np.ndarray, np.ndarray]]:
        """Each block that carries population, its Liouvillian (rad/s) at the numbers `x` (:meth:`vector`), and its
        start vector (:func:`~dnmr.engine.blocks.block_start`) at the states' `populations`."""
        for block in self.blocks:
            start = block.starts @ populations
            if start.any():  # a system of states without population adds nothing (as in spin_systems)
                n = len(start)
                elements = block.matrix @ x
                if len(elements) < n * n:  # else every element may be non-zero (small blocks): no scatter
                    L = np.zeros(n * n, dtype=complex)
                    L[block.index] = elements
                    elements = L
                yield block, elements.reshape(n, n), start

    def terms(self, x: np.ndarray, populations: np.ndarray, progress: Callable[[int, int], None] | None = None,
              *, closed_form: bool = False) -> LineshapeTerms:
        """The decomposition of the spectrum at the numbers `x` (:meth:`vector`) and the states' `populations`, as
        :func:`dnmr.engine.blocks.lineshape_terms` gives it for the model with those numbers (`progress` as there;
        `closed_form` as in :func:`~dnmr.engine.eigenlines.eigen_lines`)."""
        carried = list(self.liouvillians(x, populations))
        results, done, total = [], 0, sum(len(start) for _, _, start in carried)
        for block, L, start in carried:
            results.append(dense_block_terms(L, block.pattern.detect, start, closed_form=closed_form))
            done += len(start)
            if progress is not None:
                progress(done, total)
        return combine(results)


_STRUCTURES: dict = {}


def prepared_structure(model: Model, couplings: np.ndarray, jumps: Sequence[Jump]) -> PreparedStructure | None:
    """:meth:`PreparedStructure.build` of `model`'s structure, kept for the 8 most recent structures (a structure of
    blocks near the Krylov size holds megabytes)."""
    return remembered(_STRUCTURES, structure_key(model, couplings, jumps),
                      lambda: PreparedStructure.build(model, couplings, jumps), keep=8)


_SMALL: dict = {}


def small_model_terms(model: Model, progress: Callable[[int, int], None] | None = None) -> LineshapeTerms | None:
    """The decomposition of `model`'s spectrum by its prepared structure where every block has at most
    :data:`SMALL_BLOCK_SIZE` coherences, else None (:func:`dnmr.engine.blocks.lineshape_terms` is then the route).

    The same terms as :func:`~dnmr.engine.blocks.lineshape_terms` to rounding error, with `progress` as there; for
    a structure met before, the cost is the model's numbers gathered into one vector and the blocks' decompositions
    (blocks of one or two coherences in closed form: :func:`~dnmr.engine.eigenlines.small_block_lines`).
    """
    couplings, jumps = coupling_array(model), model.jumps()

    def small() -> PreparedStructure | None:
        layouts = system_layouts(model, couplings, jumps)
        if max((largest_block_size(layout.levels) * len(layout.states) for layout in layouts), default=0) > SMALL_BLOCK_SIZE:
            return None
        return prepared_structure(model, couplings, jumps)

    structure = remembered(_SMALL, structure_key(model, couplings, jumps), small)
    if structure is None:
        return None
    x = structure.vector(model.shifts_hz(), couplings, model.linewidths_hz(), [j.rate_per_s for j in jumps])
    return structure.terms(x, model.populations(), progress, closed_form=True)


class PreparedModel:
    """A model's block Liouvillians as fixed matrices times its numbers (its :class:`PreparedStructure`), with
    the model's own limits on those numbers.

    Build with :meth:`build`, which returns None for a model that is not worth preparing (a block on the
    Krylov route) or that couples numbers the vector cannot hold apart (a listed reverse process).
    """

    def __init__(self, model: Model, structure: PreparedStructure, nonzero: np.ndarray):
        self.model = model
        self.structure = structure
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
        structure = prepared_structure(model, couplings, jumps)
        return None if structure is None else cls(model, structure, couplings != 0)

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
        return self.structure.vector(shifts, couplings, widths, jump_rates)

    def _filled(self, numbers: ModelNumbers) -> tuple:
        return (numbers.shifts_hz, numbers.couplings_hz, numbers.linewidths_hz, numbers.populations,
                self.jump_rates(numbers))

    def terms(self, numbers: ModelNumbers) -> LineshapeTerms:
        """The decomposition of the spectrum at `numbers` (as :func:`dnmr.engine.blocks.lineshape_terms` of the
        model with those numbers)."""
        return self.structure.terms(self._vector(self._filled(numbers)), numbers.populations)

    def derivatives(self, numbers: ModelNumbers, hz: np.ndarray, changes: Sequence[tuple],
                    directions: Sequence) -> LineshapeDerivatives:
        """The spectrum at `numbers` and frequencies `hz` (Hz) with its derivatives along `changes`, each the
        change of the numbers per unit of one of `directions` (shifts, couplings, widths, populations, jump
        rates and the factor of the identity, as :func:`dnmr.engine.derivatives.combined_numbers` gives it)."""
        moves = np.array([self._vector(change[:5]) for change in changes]).T  # (numbers, changes)
        x = self._vector(self._filled(numbers))

        def blocks():
            for block, L, start in self.structure.liouvillians(x, numbers.populations):
                n = len(start)
                dL = np.zeros((len(changes), n * n), dtype=complex)
                if changes:
                    dL[:, block.index] = (block.matrix @ moves).T
                steps = [(step.reshape(n, n), change[5], block.starts @ change[3] if np.any(change[3]) else None)
                         for step, change in zip(dL, changes)]
                yield L, block.pattern.detect, start, steps

        return block_derivatives(blocks(), hz, directions)


def _split(unit: np.ndarray, n_states: int, n_spins: int, n_all: int, pairs: tuple) -> tuple:
    """A vector of :meth:`PreparedStructure.vector`'s layout back as shifts, couplings, widths and populations
    (the jump rates are the rest)."""
    shifts = unit[: n_states * n_spins].reshape(n_states, n_spins)
    end = n_states * (n_spins + len(pairs[0]))
    couplings = np.zeros((n_states, n_all, n_all))
    couplings[:, pairs[0], pairs[1]] = unit[n_states * n_spins:end].reshape(n_states, -1)
    couplings[:, pairs[1], pairs[0]] = couplings[:, pairs[0], pairs[1]]
    return shifts, couplings, unit[end:end + n_states], np.ones(n_states)
