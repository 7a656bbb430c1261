"""Liouville-space building blocks on the observable single-quantum coherences.

The spin system is a set of particles, each of spin S (2S + 1 levels): spins-1/2, or the total spin of
a magnetically equivalent group in one of its total-spin sectors (a CH3 in its S = 3/2 or S = 1/2
sector).  The basis is the product of the particles' Iz bases, numbered in mixed radix: basis state
``b`` has digit ``k_i = (b // W_i) % (2 S_i + 1)`` for particle ``i``, with ``W_i`` the product of
the level counts of the particles before it, and that particle's magnetic quantum number is
``m_i = S_i - k_i``.  For spins-1/2 the digits are bits: bit ``i`` set means spin ``i`` is beta.

A coherence ``|r><s|`` is observable in quadrature detection when F+ joins them, <s|F+|r> != 0: ``s``
is ``r`` with one particle raised by one step (the p = -1 coherence that F- creates).  The
Hamiltonian commutator, relaxation and exchange all conserve total Fz, so these coherences form an
invariant subspace, which splits further into independent blocks labelled by ``q``, the digit sum of
``s`` (``r`` has ``q + 1``).

Each function below builds one idea, in the spirit of small superoperator builders: the Zeeman part of
the commutator, the scalar-coupling part, the detection vector, and the action of a permutation of
particles.  Frequencies are in Hz; the engine multiplies by -i 2 pi.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property, lru_cache
from itertools import combinations

import numpy as np


@dataclass(frozen=True, eq=False)  # identity hash: blocks are made once per particle set and cached
class CoherenceBlock:
    """The single-quantum coherences |r><s| of one total-m block.

    Attributes
    ----------
    n_spins : int
        Number of particles (spins-1/2, or equivalent groups in one total-spin sector).
    q : int
        Digit sum of s (r has q + 1): for spins-1/2, the number of beta spins in s.
    r_states, s_states : ndarray of int
        Basis states of the bra/ket manifolds (sorted); coherence index is ``ir * len(s_states) + is_``.
    levels : tuple of int, optional
        2 S + 1 for each particle; default all 2 (spins-1/2).
    """

    n_spins: int
    q: int
    r_states: np.ndarray
    s_states: np.ndarray
    levels: tuple[int, ...] | None = None

    def __post_init__(self):
        if self.levels is None:
            object.__setattr__(self, "levels", (2,) * self.n_spins)

    @cached_property
    def size(self) -> int:
        """Number of coherences in the block (per state)."""
        return len(self.r_states) * len(self.s_states)

    @cached_property
    def dimension(self) -> int:
        """Dimension of the particles' Hilbert space, prod(2 S_i + 1) (2^N for N spins-1/2)."""
        return int(np.prod(self.levels, dtype=np.int64))

    def pairs(self) -> tuple[np.ndarray, np.ndarray]:
        """Basis states (r, s) of every coherence, in coherence order."""
        r = np.repeat(self.r_states, len(self.s_states))
        s = np.tile(self.s_states, len(self.r_states))
        return r, s

    def digits(self, states: np.ndarray) -> np.ndarray:
        """Array (n_spins, len(states)) of the digits k_i (m_i = S_i - k_i) of basis states."""
        return _digits(states, self.levels)

    def quantum_numbers(self, states: np.ndarray) -> np.ndarray:
        """Array (n_spins, len(states)) of the magnetic quantum numbers m_i of basis states."""
        spins = (np.asarray(self.levels, dtype=float)[:, None] - 1.0) / 2.0
        return spins - self.digits(states)


def _place_values(levels: tuple[int, ...]) -> np.ndarray:
    """W_i = prod_{j < i} (2 S_j + 1): the weight of particle i's digit in a basis-state number."""
    return np.cumprod((1,) + tuple(levels[:-1]), dtype=np.int64)[: len(levels)]


def _digits(states: np.ndarray, levels: tuple[int, ...]) -> np.ndarray:
    radix = np.asarray(levels, dtype=np.int64)[:, None]
    return (states[None, :] // _place_values(levels)[:, None]) % radix


def _manifolds(levels: tuple[int, ...]) -> list[np.ndarray]:
    """Basis states grouped by digit sum q = 0 .. sum(2 S_i), each sorted."""
    states = np.arange(int(np.prod(levels, dtype=np.int64)), dtype=np.int64)
    sums = _digits(states, levels).sum(axis=0)
    return [states[sums == q] for q in range(sum(n - 1 for n in levels) + 1)]


@lru_cache(maxsize=None)
def coherence_blocks(n_spins: int, levels: tuple[int, ...] | None = None) -> tuple[CoherenceBlock, ...]:
    """The independent single-quantum blocks of `n_spins` particles.

    Parameters
    ----------
    n_spins : int
        Number of particles.
    levels : tuple of int, optional
        2 S + 1 for each particle; default all 2 (spins-1/2, blocks q = 0 .. N-1).
    """
    levels = (2,) * n_spins if levels is None else tuple(int(n) for n in levels)
    if len(levels) != n_spins:
        raise ValueError(f"{n_spins} particles need {n_spins} level counts, got {len(levels)}")
    manifolds = _manifolds(levels)
    return tuple(
        CoherenceBlock(n_spins, q, manifolds[q + 1], manifolds[q], levels) for q in range(len(manifolds) - 1)
    )


def largest_block_size(levels: tuple[int, ...]) -> int:
    """Coherences of the largest single-quantum block of particles with 2 S + 1 = `levels`, counted
    without enumerating a basis state: the manifold sizes are the coefficients of
    prod_i (1 + x + ... + x^(levels_i - 1)), and block q pairs manifolds q + 1 and q."""
    sizes = [1]
    for n in levels:
        grown = [0] * (len(sizes) + n - 1)
        for k, c in enumerate(sizes):
            for d in range(n):
                grown[k + d] += c
        sizes = grown
    return max((a * b for a, b in zip(sizes[1:], sizes)), default=0)


def _index_in_block(block: CoherenceBlock, r: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Coherence indices of the pairs (r, s), which must belong to `block`."""
    return np.searchsorted(block.r_states, r) * len(block.s_states) + np.searchsorted(block.s_states, s)


def _ladder(spin: np.ndarray, m: np.ndarray, step: int) -> np.ndarray:
    """<m + step| I_(+/-) |m> = sqrt(S(S + 1) - m(m + step)) for step = +1 (I+) or -1 (I-)."""
    return np.sqrt(np.maximum(spin * (spin + 1.0) - m * (m + step), 0.0))


@lru_cache(maxsize=None)
def zeeman_terms(block: CoherenceBlock) -> np.ndarray:
    """Frequency of each coherence per unit shift: array (N, size) of m_i(r) - m_i(s).

    The Zeeman commutator is diagonal: coherence |r><s| precesses at sum_i nu_i (m_i(r) - m_i(s)) Hz.
    """
    r, s = block.pairs()
    return (block.digits(s) - block.digits(r)).astype(float)


def _flip_flop_moves(block: CoherenceBlock, states: np.ndarray, i: int, j: int):
    """Where 1/2 (I+_i I-_j + I-_i I+_j) takes each basis state: (which, new states, matrix elements).

    ``which`` indexes `states`; each state has up to two images (i up and j down, or i down and j up).
    """
    k = block.digits(states)
    m = block.quantum_numbers(states)
    spin = (np.asarray(block.levels, dtype=float) - 1.0) / 2.0
    place = _place_values(block.levels)
    out = ([], [], [])
    for up, down in ((i, j), (j, i)):
        ok = (k[up] > 0) & (k[down] < block.levels[down] - 1)
        value = 0.5 * _ladder(spin[up], m[up], +1) * _ladder(spin[down], m[down], -1)
        out[0].append(np.flatnonzero(ok))
        out[1].append(states[ok] - place[up] + place[down])
        out[2].append(value[ok])
    return tuple(np.concatenate(parts) for parts in out)


@lru_cache(maxsize=None)
def coupling_terms(block: CoherenceBlock) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The commutator with J (I_i . I_j) per unit J, for every pair i < j.

    Returns
    -------
    diagonal : ndarray (n_pairs, size)
        Diagonal part from Iz_i Iz_j: m_i m_j (r) - m_i m_j (s).
    pair, rows, cols, values : ndarrays
        Off-diagonal flip-flop part 1/2 (I+_i I-_j + I-_i I+_j): element (rows, cols) = values for
        coupling `pair` (index into ``combinations(range(N), 2)``), with the ladder factors
        sqrt(S(S+1) - m(m +/- 1)) of each particle.  No (row, col) repeats.
    """
    r, s = block.pairs()
    m_r, m_s = block.quantum_numbers(r), block.quantum_numbers(s)
    pairs = list(combinations(range(block.n_spins), 2))
    diagonal = np.array([m_r[i] * m_r[j] - m_s[i] * m_s[j] for i, j in pairs]).reshape(len(pairs), block.size)
    out = ([], [], [], [])
    for p, (i, j) in enumerate(pairs):
        for on_bra, sign in ((True, 1.0), (False, -1.0)):
            which, moved, values = _flip_flop_moves(block, r if on_bra else s, i, j)
            rows = _index_in_block(block, moved, s[which]) if on_bra else _index_in_block(block, r[which], moved)
            out[0].append(np.full(len(which), p))
            out[1].append(rows)
            out[2].append(which)
            out[3].append(sign * values)
    if not pairs:
        empty = np.zeros(0, dtype=np.int64)
        return diagonal, empty, empty, empty, np.zeros(0)
    return (diagonal, *(np.concatenate(parts) for parts in out))


@lru_cache(maxsize=None)
def detection_vector(block: CoherenceBlock) -> np.ndarray:
    """Elements <s|F+|r> of each coherence: sqrt(S(S+1) - m(m+1)) where s is r with one particle
    raised one step (m -> m + 1; 1 for a spin-1/2), else 0.

    The same vector, scaled, is F- (the coherence a hard 90-degree pulse creates from equilibrium).
    """
    r, s = block.pairs()
    step = block.digits(r) - block.digits(s)
    single = (step != 0).sum(axis=0) == 1
    spin = (np.asarray(block.levels, dtype=float)[:, None] - 1.0) / 2.0
    raised = (step == 1) & single[None, :]
    return (raised * _ladder(spin, block.quantum_numbers(r), +1)).sum(axis=0)


def _permute_states(block: CoherenceBlock, states: np.ndarray, perm: tuple[int, ...]) -> np.ndarray:
    place = _place_values(block.levels)
    return (block.digits(states) * place[list(perm)][:, None]).sum(axis=0)


@lru_cache(maxsize=None)
def permutation_map(block: CoherenceBlock, perm: tuple[int, ...]) -> np.ndarray:
    """Where each coherence of `block` goes under the particle permutation P: rho -> P rho P^T.

    `perm[i]` is the new index of particle i, which must have the same spin.  Returns ``image`` with
    coherence j carried to ``image[j]``.
    """
    if any(block.levels[i] != block.levels[j] for i, j in enumerate(perm)):
        raise ValueError(f"permutation {perm} joins particles of different spin (levels {block.levels})")
    r, s = block.pairs()
    return _index_in_block(block, _permute_states(block, r, perm), _permute_states(block, s, perm))


def hamiltonian(shifts_hz: np.ndarray, couplings_hz: np.ndarray) -> np.ndarray:
    """Hilbert-space spin Hamiltonian (Hz) in the product basis of spins-1/2, for energy levels and checks.

    H = sum_i nu_i Iz_i + sum_{i<j} J_ij (I_i . I_j), with `couplings_hz` over the pairs i < j in
    ``combinations`` order.  Dense 2^N x 2^N; the engine itself never forms it.
    """
    n = len(shifts_hz)
    states = np.arange(2**n)
    m = 0.5 - _digits(states, (2,) * n)
    H = np.diag(np.asarray(shifts_hz, dtype=float) @ m).astype(float)
    for (i, j), J in zip(combinations(range(n), 2), couplings_hz):
        H[states, states] += J * m[i] * m[j]
        flip = ((states >> i) & 1) != ((states >> j) & 1)
        H[states[flip] ^ ((1 << i) | (1 << j)), states[flip]] += 0.5 * J
    return H
