"""The lineshape engine: exchange-coupled density matrices in Liouville space.

For every state c the density matrix obeys

    d rho_c/dt = -i 2 pi [H_c, rho_c] - pi w_c rho_c
                 + sum_jumps k (P rho_source P^T  into target)  -  (sum of rates out of c) rho_c,

restricted to the observable single-quantum coherences and split into independent total-m blocks
(:mod:`dnmr.engine.liouville`).  The spectrum is

    S(nu) = 2 < F+ | (i 2 pi nu - L)^-1 | rho0 >,   rho0 = sum_c p_c F-_c / 2^(N-1),

so that the absorption Re S integrates to sum_c p_c N over all frequencies, whatever the rates.  (For
spins-1/2 the 2^(N-1) counts the transitions of each spin; a system with magnetically equivalent groups or
heteronuclear partners is first cut into independent spin systems by :mod:`dnmr.engine.spinsystems`, each weighted
by its share of the full spin space, which keeps the same normalisation.)

This module assembles each block's Liouvillian; :mod:`dnmr.engine.resolvent` turns it into a spectrum by the
best exact route for the block (eigen-lines, Schur form, or a Krylov continued fraction for large blocks).
"""
from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable
from functools import lru_cache

import numpy as np
from scipy import sparse

from dnmr.engine.liouville import (
    CoherenceBlock,
    coupling_terms,
    detection_vector,
    largest_block_size,
    permutation_map,
    zeeman_terms,
)
from dnmr.errors import InputError
from dnmr.model import Model
from dnmr.engine import resolvent
from dnmr.engine.resolvent import TWO_PI, LineshapeTerms, block_terms, combine
from dnmr.engine.spinsystems import SpinParameters, largest_block_bound, remembered, spin_systems  # a model as independent spin systems


# --- assembling the Liouvillian -------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, eq=False)
class BlockPattern:
    """Index work for one block that depends only on the topology, done once and cached.

    The Liouvillian of the block over S states is the (S d) x (S d) matrix
    ``diag(-i 2 pi (shifts @ zeeman + couplings @ coupling_diagonal) - pi w - k_out + k_fixed)`` plus the
    flip-flop elements of the couplings and the exchange elements (one per jump and coherence that a jump
    carries to a different place).
    """

    block: CoherenceBlock
    n_states: int
    flip_rows: np.ndarray     # flip-flop elements over all states
    flip_cols: np.ndarray
    flip_state: np.ndarray
    flip_pair: np.ndarray
    flip_values: np.ndarray
    move_rows: np.ndarray     # exchange elements, duplicates merged
    move_cols: np.ndarray
    move_weights: np.ndarray  # (n_jumps, n_elements): how much of each jump's rate lands there
    stay: np.ndarray          # (n_jumps, S d): rate that returns to the same coherence (fixed points)
    leave: np.ndarray         # (n_jumps, S d): rate out of each coherence
    detect: np.ndarray        # F+ over all states

    @classmethod
    def build(cls, block: CoherenceBlock, topology: tuple) -> "BlockPattern":
        n_states, jumps = topology
        d = block.size
        _, pair, rows, cols, vals = coupling_terms(block)
        offsets = np.repeat(np.arange(n_states) * d, len(rows))
        rows_m, cols_m, jump_m = [], [], []
        stay = np.zeros((len(jumps), n_states * d))
        leave = np.zeros((len(jumps), n_states * d))
        source_index = np.arange(d)
        for n, (source, target, perm) in enumerate(jumps):
            image = permutation_map(block, perm)
            r, c = target * d + image, source * d + source_index
            same = r == c
            stay[n, r[same]] = 1.0
            leave[n, source * d:(source + 1) * d] = 1.0
            rows_m.append(r[~same]), cols_m.append(c[~same]), jump_m.append(np.full((~same).sum(), n))
        rows_m = np.concatenate(rows_m) if rows_m else np.zeros(0, np.int64)
        cols_m = np.concatenate(cols_m) if cols_m else np.zeros(0, np.int64)
        jump_m = np.concatenate(jump_m) if jump_m else np.zeros(0, np.int64)
        flat = rows_m * (n_states * d) + cols_m
        unique, inverse = np.unique(flat, return_inverse=True)
        weights = np.zeros((len(jumps), len(unique)))
        np.add.at(weights, (jump_m, inverse), 1.0)
        return cls(
            block, n_states,
            np.tile(rows, n_states) + offsets, np.tile(cols, n_states) + offsets,
            np.repeat(np.arange(n_states), len(rows)), np.tile(pair, n_states), np.tile(vals, n_states),
            unique // (n_states * d), unique % (n_states * d), weights, stay, leave,
            np.tile(detection_vector(block), n_states),
        )


_PATTERNS: dict = {}


def block_pattern(block: CoherenceBlock, topology: tuple) -> BlockPattern:
    """The cached :class:`BlockPattern` of `block` for a topology (kept for the 64 most recent)."""
    return remembered(_PATTERNS, (block, topology), lambda: BlockPattern.build(block, topology))


def _block_elements(pattern: BlockPattern, params: SpinParameters):
    """The block's diagonal and its off-diagonal (row, column, value) lists, rad/s; the flip-flop and
    exchange lists are each free of duplicates but may meet each other (their values then add)."""
    block = pattern.block
    freq = params.shifts_hz @ zeeman_terms(block) + params.couplings_hz @ coupling_terms(block)[0]
    rates = np.array([j.rate_per_s for j in params.jumps])
    diagonal = (-1j * TWO_PI) * freq.ravel() - np.repeat(np.pi * params.linewidths_hz, block.size)
    if len(rates):
        diagonal += rates @ (pattern.stay - pattern.leave)
    flips = (-1j * TWO_PI) * pattern.flip_values * params.couplings_hz[pattern.flip_state, pattern.flip_pair]
    moves = rates @ pattern.move_weights if len(rates) else np.zeros(0)
    return diagonal, ((pattern.flip_rows, pattern.flip_cols, flips), (pattern.move_rows, pattern.move_cols, moves))


def block_liouvillian(pattern: BlockPattern, params: SpinParameters, *, as_sparse: bool = False):
    """Liouvillian (rad/s) of one single-quantum block over all states: (S d) x (S d).

    A dense ndarray, or with ``as_sparse=True`` a CSR matrix (for the Krylov route on large blocks, whose
    Liouvillian has about a dozen elements per row).
    """
    diagonal, parts = _block_elements(pattern, params)
    n = diagonal.size
    if as_sparse:
        rows = np.concatenate([np.arange(n), *(p[0] for p in parts)])
        cols = np.concatenate([np.arange(n), *(p[1] for p in parts)])
        values = np.concatenate([diagonal, *(p[2] for p in parts)])
        return sparse.csr_matrix((values, (rows, cols)), shape=(n, n))  # repeated entries add
    L = np.diag(diagonal)
    for rows, cols, values in parts:
        if len(rows):
            L[rows, cols] += values
    return L


def block_start(pattern: BlockPattern, populations: np.ndarray) -> np.ndarray:
    """Starting coherence 2 rho0 of one block, rho0 = sum_c p_c F- / (D/2) with D the Hilbert-space
    dimension (2^N for N spins-1/2; the 2 makes one spin integrate to 1)."""
    u = pattern.detect[: pattern.block.size]
    return np.outer(populations, u).ravel() * (4.0 / pattern.block.dimension)


def lineshape_terms(model: Model, progress: Callable[[int, int], None] | None = None,
                    hz: np.ndarray | None = None) -> LineshapeTerms:
    """Decompose the spectrum of `model` into Lorentzian terms and directly evaluated blocks.

    Parameters
    ----------
    model : Model
        The model.
    progress : callable, optional
        Called as ``progress(done, total)`` (coherences) after each block, for long simulations.
    hz : ndarray, optional
        The only frequencies (Hz) the terms will be evaluated at: the Lanczos recursion of a large block
        then stops once its continued fraction has converged there (:func:`dnmr.engine.resolvent.lanczos`).
    """
    omega = None if hz is None else TWO_PI * np.asarray(hz, dtype=float)
    systems = spin_systems(model)
    check_memory(max((largest_block_size(p.levels) * len(p.populations) for p in systems), default=0))
    work = [(p, b) for p in systems for b in p.blocks]  # blocks of the independent systems (enumerated)
    total = sum(b.size * len(p.populations) for p, b in work)
    done = 0
    results = []
    for params, block in work:
        topology = params.topology
        roots = np.sqrt(params.populations)
        pattern = block_pattern(block, topology)
        L = block_liouvillian(pattern, params, as_sparse=resolvent.takes_krylov_route(block.size * len(params.populations)))
        start = block_start(pattern, params.populations)
        results.append(block_terms(L, pattern.detect, start, np.repeat(roots, block.size), omega))
        done += block.size * len(params.populations)
        if progress is not None:
            progress(done, total)
    return combine(results)


#: Share of the machine's physical memory that the Lanczos basis of one block may take.
MEMORY_SHARE = 0.5


def physical_memory_bytes() -> int | None:
    """The memory this process may use (bytes): the machine's physical memory, or less when a resource
    limit on the address space or data is set; None where the system does not tell."""
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (AttributeError, OSError, ValueError):
        total = None
    limits = []
    try:
        import resource

        limits = [resource.getrlimit(r)[0] for r in (resource.RLIMIT_AS, resource.RLIMIT_DATA)]
        limits = [v for v in limits if v != resource.RLIM_INFINITY]
    except (ImportError, AttributeError, OSError, ValueError):  # not a POSIX system
        pass
    return min([v for v in [total, *limits] if v and v > 0], default=None)


def check_model_size(model: Model) -> None:
    """Refuse a model too large to simulate from its counts of spins and groups alone, before any rate,
    temperature or basis state is needed (:func:`check_memory` of
    :func:`~dnmr.engine.spinsystems.largest_block_bound`)."""
    check_memory(largest_block_bound(model))


def check_memory(largest_block: int) -> None:
    """Refuse, with one clear line, a model whose largest block (coherences) would need more than
    `MEMORY_SHARE` of the physical memory for its Lanczos basis (n^2 complex numbers)."""
    need = resolvent.krylov_basis_bytes(largest_block)
    if not need:  # a dense block: no basis (and no need to ask the system)
        return
    total = physical_memory_bytes()
    if total and need > MEMORY_SHARE * total:
        raise InputError(
            f"the largest coupled spin system gives a block of {largest_block} coherences, whose Lanczos basis"
            f" needs {_size_text(need)}, more than {MEMORY_SHARE:.0%} of the {_size_text(total)} this process may use"
            " (and long computing): declare magnetically equivalent nuclei as"
            " [groups] and nuclei of another isotope as [heteronuclei], or leave out spins whose couplings"
            " barely matter")


def _size_text(size: int) -> str:
    return f"{size / 2**30:.3g} GiB" if size >= 2**30 else f"{size / 2**20:.0f} MiB"


# --- frequency grid --------------------------------------------------------------------------

#: The most points :func:`default_points` gives.
MAX_DEFAULT_POINTS = 131072
_EPS = np.finfo(float).eps


def default_window_ppm(model: Model) -> tuple[float, float]:
    """A window (ppm, low to high) that holds every line of every state with a margin."""
    shifts = model.shifts_hz()
    span_j = model.coupling_span_hz().max()  # groups and heteronuclei spread multiplets further
    width = model.linewidths_hz().max()
    lo, hi = shifts.min(), shifts.max()
    margin = span_j + 25.0 * width + 0.1 * (hi - lo) + 10.0
    sf = model.spectrometer.frequency_mhz
    return (lo - margin) / sf, (hi + margin) / sf


def default_points(model: Model, window_ppm: tuple[float, float]) -> int:
    """Enough points for about 8 per intrinsic linewidth of the narrowest state (4096 to 131072)."""
    span_hz = abs(window_ppm[1] - window_ppm[0]) * model.spectrometer.frequency_mhz
    needed = span_hz / (model.linewidths_hz().min() / 8.0)
    return int(min(MAX_DEFAULT_POINTS, max(4096, 2 ** np.ceil(np.log2(needed)))))


def frequency_grid_ppm(model: Model, window_ppm=None, points: int | None = None) -> np.ndarray:
    """The ppm grid (ascending, no point repeated) of a simulation: the model's window and points unless given
    here."""
    window = window_ppm or model.window_ppm or default_window_ppm(model)
    lo, hi = sorted(float(v) for v in window)
    n = int(points or model.points or default_points(model, (lo, hi)))
    step = (hi - lo) / (n - 1)
    grid = (_counts(n) if n <= MAX_DEFAULT_POINTS else np.arange(n, dtype=float)) * step
    grid += lo
    grid[-1] = hi
    # every point lies within about eps max(|lo|, |hi|) of lo + step i (n << 1/eps), so neighbours differ where the
    # step is several times that; a window narrower than rounding resolves keeps its distinct points
    return grid if step > 4.0 * _EPS * max(abs(lo), abs(hi)) else np.unique(grid)


@lru_cache(maxsize=4)
def _counts(n: int) -> np.ndarray:
    """0, 1, ..., n - 1 as floats (read-only), shared by every grid of n points."""
    counts = np.arange(n, dtype=float)
    counts.flags.writeable = False
    return counts
