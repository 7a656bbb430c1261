"""Liouville-space building blocks on the observable single-quantum coherences.

Spins-1/2 are described in the product basis: basis state ``b`` is an integer whose bit ``i`` is set
when spin ``i`` is beta (m = -1/2).  A coherence ``|r><s|`` is observable in quadrature detection when
``s`` has exactly one more alpha spin than ``r`` (total m of r is one less than that of s, the p = -1
coherence that F- creates).  The Hamiltonian commutator, relaxation and exchange all conserve total Fz,
so these coherences form an invariant subspace, and it splits further into independent blocks labelled
by ``q``, the number of beta spins in ``s`` (``r`` has ``q + 1``).  Block q holds C(N, q+1) C(N, q)
coherences per state.

Each function below builds one idea, in the spirit of small superoperator builders: the Zeeman part of
the commutator, the scalar-coupling part, the detection vector, and the action of a spin permutation.
Frequencies are in Hz; the engine multiplies by -i 2 pi.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from itertools import combinations

import numpy as np


@dataclass(frozen=True, eq=False)  # identity hash: blocks are made once per N and cached
class CoherenceBlock:
    """The single-quantum coherences |r><s| of one total-m block.

    Attributes
    ----------
    n_spins : int
        Number of spins N.
    q : int
        Number of beta spins in s (r has q + 1).
    r_states, s_states : ndarray of int
        Basis states of the bra/ket manifolds (sorted); coherence index is ``ir * len(s_states) + is_``.
    """

    n_spins: int
    q: int
    r_states: np.ndarray
    s_states: np.ndarray

    @property
    def size(self) -> int:
        """Number of coherences in the block (per state)."""
        return len(self.r_states) * len(self.s_states)

    def pairs(self) -> tuple[np.ndarray, np.ndarray]:
        """Basis states (r, s) of every coherence, in coherence order."""
        r = np.repeat(self.r_states, len(self.s_states))
        s = np.tile(self.s_states, len(self.r_states))
        return r, s


def _manifold(n_spins: int, n_beta: int) -> np.ndarray:
    return np.array(sorted(sum(1 << i for i in c) for c in combinations(range(n_spins), n_beta)), dtype=np.int64)


@lru_cache(maxsize=None)
def coherence_blocks(n_spins: int) -> tuple[CoherenceBlock, ...]:
    """The independent single-quantum blocks of `n_spins` spins-1/2 (q = 0 .. N-1)."""
    return tuple(
        CoherenceBlock(n_spins, q, _manifold(n_spins, q + 1), _manifold(n_spins, q)) for q in range(n_spins)
    )


def _bits(states: np.ndarray, n_spins: int) -> np.ndarray:
    """Array (n_spins, len(states)) of beta flags (1 for beta)."""
    return (states[None, :] >> np.arange(n_spins)[:, None]) & 1


def _index_in_block(block: CoherenceBlock, r: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Coherence indices of the pairs (r, s), which must belong to `block`."""
    return np.searchsorted(block.r_states, r) * len(block.s_states) + np.searchsorted(block.s_states, s)


@lru_cache(maxsize=None)
def zeeman_terms(block: CoherenceBlock) -> np.ndarray:
    """Frequency of each coherence per unit shift: array (N, size) of m_i(r) - m_i(s).

    The Zeeman commutator is diagonal: coherence |r><s| precesses at sum_i nu_i (m_i(r) - m_i(s)) Hz.
    """
    r, s = block.pairs()
    return (_bits(s, block.n_spins) - _bits(r, block.n_spins)).astype(float)


@lru_cache(maxsize=None)
def coupling_terms(block: CoherenceBlock) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The commutator with J (I_i . I_j) per unit J, for every pair i < j.

    Returns
    -------
    diagonal : ndarray (n_pairs, size)
        Diagonal part from Iz_i Iz_j: m_i m_j (r) - m_i m_j (s).
    pair, rows, cols, values : ndarrays
        Off-diagonal flip-flop part 1/2 (I+_i I-_j + I-_i I+_j): element (rows, cols) = values for
        coupling `pair` (index into ``combinations(range(N), 2)``).  No (row, col) repeats.
    """
    n = block.n_spins
    r, s = block.pairs()
    m_r = 0.5 - _bits(r, n)
    m_s = 0.5 - _bits(s, n)
    pairs = list(combinations(range(n), 2))
    diagonal = np.array([m_r[i] * m_r[j] - m_s[i] * m_s[j] for i, j in pairs]).reshape(len(pairs), block.size)
    cols_all = np.arange(block.size)
    out = ([], [], [], [])
    for p, (i, j) in enumerate(pairs):
        mask = (1 << i) | (1 << j)
        for states, sign, on_bra in ((r, 0.5, True), (s, -0.5, False)):
            bit_i, bit_j = (states >> i) & 1, (states >> j) & 1
            flip = bit_i != bit_j
            flipped = states[flip] ^ mask
            rows = (_index_in_block(block, flipped, s[flip]) if on_bra
                    else _index_in_block(block, r[flip], flipped))
            out[0].append(np.full(flip.sum(), p))
            out[1].append(rows)
            out[2].append(cols_all[flip])
            out[3].append(np.full(flip.sum(), sign))
    if not pairs:
        empty = np.zeros(0, dtype=np.int64)
        return diagonal, empty, empty, empty, np.zeros(0)
    return (diagonal, *(np.concatenate(parts) for parts in out))


@lru_cache(maxsize=None)
def detection_vector(block: CoherenceBlock) -> np.ndarray:
    """Elements <s|F+|r> of each coherence: 1 where r and s differ by one spin flip, else 0.

    The same vector, scaled, is F- (the coherence a hard 90-degree pulse creates from equilibrium).
    """
    r, s = block.pairs()
    diff = r ^ s
    single = (diff & (diff - 1)) == 0
    return (single & ((r & diff) != 0)).astype(float)


def _permute_states(states: np.ndarray, perm: tuple[int, ...]) -> np.ndarray:
    out = np.zeros_like(states)
    for i, j in enumerate(perm):
        out |= ((states >> i) & 1) << j
    return out


@lru_cache(maxsize=None)
def permutation_map(block: CoherenceBlock, perm: tuple[int, ...]) -> np.ndarray:
    """Where each coherence of `block` goes under the spin permutation P: rho -> P rho P^T.

    `perm[i]` is the new index of spin i.  Returns ``image`` with coherence j carried to ``image[j]``.
    """
    r, s = block.pairs()
    return _index_in_block(block, _permute_states(r, perm), _permute_states(s, perm))


def hamiltonian(shifts_hz: np.ndarray, couplings_hz: np.ndarray) -> np.ndarray:
    """Hilbert-space spin Hamiltonian (Hz) in the product basis, for energy levels and checks.

    H = sum_i nu_i Iz_i + sum_{i<j} J_ij (I_i . I_j), with `couplings_hz` over the pairs i < j in
    ``combinations`` order.  Dense 2^N x 2^N; the engine itself never forms it.
    """
    n = len(shifts_hz)
    states = np.arange(2**n)
    m = 0.5 - _bits(states, n)
    H = np.diag(np.asarray(shifts_hz, dtype=float) @ m).astype(float)
    for (i, j), J in zip(combinations(range(n), 2), couplings_hz):
        H[states, states] += J * m[i] * m[j]
        flip = ((states >> i) & 1) != ((states >> j) & 1)
        H[states[flip] ^ ((1 << i) | (1 << j)), states[flip]] += 0.5 * J
    return H
