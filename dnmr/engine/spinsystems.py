"""A model as a sum of independent spin systems: the exact factorisation behind the engine.

The engine (:mod:`dnmr.engine.blocks`) builds the Liouvillian of one spin system: particles of given spins over
a set of states joined by jumps.  A model is cut into such systems by three exact reductions.

Clusters
    Observed spins that no coupling (in any state) and no exchange mapping joins form separate
    clusters.  Each state's Hamiltonian is then a sum over clusters, every jump maps each cluster onto
    itself, and F- is a sum of one term per cluster; the term of cluster A is F-_A (x) 1 on the rest,
    which the rest's Hamiltonians and permutations leave alone, so the spectrum is the sum of the
    clusters' spectra (the trace over the other spins cancels against the normalisation of rho0).

Total-spin sectors of equivalent groups
    A group of n spins-1/2 that is magnetically equivalent in every state and moved as a whole has
    every Hamiltonian and every jump commute with its total spin S^2: the group is one particle of spin
    S in each sector S = n/2, n/2 - 1, ..., which occurs f(n, S) = C(n, n/2 - S) - C(n, n/2 - S - 1)
    times (the Clebsch-Gordan series; n = 3: S = 3/2 once, S = 1/2 twice).  Couplings inside the group
    are constant in a sector and drop out; a coupling J to a group is J (S . I) with S the group's total
    spin.  The copies of a sector are alike, so they are solved once with their count as a weight.

Heteronuclear configurations
    A heteronucleus h (another isotope, weak coupling: its Zeeman frequency differs from the observed
    one by far more than J) enters only through J Iz_i Iz_h, and its m_h is conserved: for each
    configuration of the m_h the observed spins see shifts moved by sum_h J_ih m_h, with the
    configuration's high-temperature weight 1/prod(2 S_h + 1) (for a group of heteronuclei, the number
    of its member configurations with that total m, over their count).

The sector S of a group and the m of a heteronucleus travel with the nuclei when an exchange relabels
them, so they are labels of an *effective state*: (state c, label configuration) with population p_c
times the share of the spin space that the labels stand for, joined to (c', relabelled configuration)
by each jump at its rate.  The connected sets of effective states are independent spin systems; each
is one :class:`SpinParameters`, whose particles are ordered by spin so that jumps only permute
particles of equal spin.  Detailed balance holds among effective states (a label's weight travels with
it), so the engine's symmetric (Krylov) route applies unchanged.
"""
from __future__ import annotations

from collections.abc import Callable, Hashable, Iterator, Sequence
from dataclasses import dataclass
from functools import lru_cache
from itertools import combinations, product
from math import comb
from typing import TypeVar

import numpy as np

from dnmr.kinetics import Jump
from dnmr.engine.liouville import CoherenceBlock, coherence_blocks, largest_block_size
from dnmr.model import Model
from dnmr.nuclei import nucleus

T = TypeVar("T")


@dataclass(frozen=True)
class SpinParameters:
    """Numbers that fill the Liouvillian of one spin system (per effective state).

    Attributes
    ----------
    shifts_hz : ndarray (n_states, n_particles)
        Larmor offsets (Hz from 0 ppm), heteronuclear couplings included.
    couplings_hz : ndarray (n_states, n_pairs)
        Scalar couplings (Hz) over the particle pairs i < j in ``combinations`` order.
    linewidths_hz : ndarray (n_states,)
        Intrinsic FWHM (Hz).
    populations : ndarray (n_states,)
        Weight of each state in the starting coherence: its equilibrium population times the share of
        the spin space it stands for (1 for a plain spins-1/2 model).
    jumps : tuple of Jump
        Exchange jumps between these states; permutations act on particles.
    levels : tuple of int, optional
        2 S + 1 of each particle; default all 2 (spins-1/2).
    """

    shifts_hz: np.ndarray
    couplings_hz: np.ndarray
    linewidths_hz: np.ndarray
    populations: np.ndarray
    jumps: tuple[Jump, ...]
    levels: tuple[int, ...] | None = None

    def __post_init__(self):
        if self.levels is None:
            object.__setattr__(self, "levels", (2,) * self.shifts_hz.shape[1])

    @classmethod
    def from_model(cls, model: Model) -> "SpinParameters":
        """The whole of a plain model (spins-1/2 only) as one system, unfactored.

        Jumps include reverse processes by detailed balance.  Models with groups or heteronuclei need
        :func:`spin_systems`.
        """
        if not model.is_plain:
            raise ValueError("a model with groups or heteronuclei is a sum of spin systems: use spin_systems")
        return cls(model.shifts_hz(), model.couplings_matrix_hz(), model.linewidths_hz(), model.populations(),
                   model.jumps())

    @property
    def topology(self) -> tuple:
        """What fixes the sparsity pattern: number of states and each jump's states and permutation."""
        return len(self.linewidths_hz), tuple((j.source, j.target, j.permutation) for j in self.jumps)

    @property
    def blocks(self) -> tuple[CoherenceBlock, ...]:
        """The independent single-quantum blocks of this system's particles."""
        return coherence_blocks(len(self.levels), self.levels)


# --- labels: conserved quantum numbers that travel with the nuclei ----------------------------------

@dataclass(frozen=True)
class Label:
    """A conserved quantum number of one spin of the model and its possible values.

    Attributes
    ----------
    spin : int
        Index of the spin in ``model.all_spins``.
    values : tuple of float
        Total spin S of a group's sector, or total m of a heteronucleus.
    weights : tuple of float
        Share of that spin's Hilbert space each value holds (they sum to 1).
    """

    spin: int
    values: tuple[float, ...]
    weights: tuple[float, ...]


def group_sectors(spin: int, count: int) -> Label:
    """Total-spin sectors of a group of `count` spins-1/2 (model spin index `spin`).

    S = n/2, n/2 - 1, ... down to 0 or 1/2, each with the share f(n, S) (2S + 1) / 2^n of the group's
    states, where f(n, S) = C(n, n/2 - S) - C(n, n/2 - S - 1) is the number of times spin S occurs
    (Clebsch-Gordan series of n spins-1/2).
    """
    values, weights = [], []
    for k in range(count // 2 + 1):  # k = n/2 - S
        multiplicity = comb(count, k) - (comb(count, k - 1) if k else 0)
        total = count / 2 - k
        values.append(total)
        weights.append(multiplicity * (2 * total + 1) / 2.0**count)
    return Label(spin, tuple(values), tuple(weights))


def total_m_distribution(spin: int, nuclear_spin: float, count: int) -> Label:
    """Total m of `count` heteronuclei of spin `nuclear_spin` (model spin index `spin`), each value with
    its share of the (2 I + 1)^n member configurations (the coefficients of (x^-I + ... + x^I)^n)."""
    counts = np.ones(1)
    for _ in range(count):
        counts = np.convolve(counts, np.ones(int(round(2 * nuclear_spin)) + 1))
    top = count * nuclear_spin
    return Label(spin, tuple(top - k for k in range(len(counts))), tuple(counts / counts.sum()))


# --- clusters ---------------------------------------------------------------------------------------

def coupling_array(model: Model) -> np.ndarray:
    """Scalar couplings (Hz) between all spins of every state: array (n_states, n_all, n_all)."""
    names = model.all_spins
    J = np.zeros((len(model.states), len(names), len(names)))
    for c, state in enumerate(model.states):
        for a, b in combinations(range(len(names)), 2):
            J[c, a, b] = J[c, b, a] = state.coupling(names[a], names[b])
    return J


def clusters(model: Model, couplings: np.ndarray, jumps: list[Jump]) -> list[list[int]]:
    """Observed spins split into sets that no coupling and no exchange mapping joins (indices, sorted)."""
    n = len(model.spins)
    root = list(range(n))

    def find(i: int) -> int:
        while root[i] != i:
            i = root[i]
        return i

    links = list(zip(*np.nonzero(np.any(couplings[:, :n, :n] != 0, axis=0))))
    links += [(i, jump.permutation[i]) for jump in jumps for i in range(n)]
    for a, b in links:
        root[find(int(a))] = find(int(b))
    sets: dict[int, list[int]] = {}
    for i in range(n):
        sets.setdefault(find(i), []).append(i)
    return list(sets.values())


def cluster_labels(model: Model, cluster: list[int], couplings: np.ndarray, jumps: list[Jump]) -> list[Label]:
    """The labels that matter to a cluster: the sector of each of its groups, and the m of every
    heteronucleus coupled to it, or carried by exchange into a place that is (the rest are summed out)."""
    n = len(model.spins)
    names = model.all_spins
    hetero = {h for h in range(n, len(names)) if np.any(couplings[:, cluster, h] != 0)}
    grown = True
    while grown:
        images = {jump.permutation[h] for jump in jumps for h in hetero}
        grown = not images <= hetero
        hetero |= images
    labels = [group_sectors(i, model.group_size(names[i])) for i in cluster if model.group_size(names[i]) > 1]
    labels += [total_m_distribution(h, nucleus(model.heteronuclei[names[h]]).spin, model.group_size(names[h]))
               for h in sorted(hetero)]
    return labels


# --- effective states -------------------------------------------------------------------------------

def _relabel(config: tuple[int, ...], labels: list[Label], jump: Jump) -> tuple[int, ...]:
    """The label configuration after `jump`: the value at spin a moves to spin perm[a]."""
    slot = {label.spin: k for k, label in enumerate(labels)}
    moved = list(config)
    for k, label in enumerate(labels):
        moved[slot[jump.permutation[label.spin]]] = config[k]
    return tuple(moved)


def connected_configurations(n_states: int, labels: list[Label], jumps: list[Jump]) -> Iterator[list[tuple]]:
    """Effective states (state, label configuration) in sets joined by jumps (each set sorted)."""
    configs = list(product(*(range(len(label.values)) for label in labels)))
    seen: set[tuple] = set()
    leaving = {c: [j for j in jumps if j.source == c] for c in range(n_states)}
    for node in product(range(n_states), configs):
        if node in seen:
            continue
        found, queue = {node}, [node]
        while queue:
            state, config = queue.pop()
            for jump in leaving[state]:
                nxt = (jump.target, _relabel(config, labels, jump))
                if nxt not in found:
                    found.add(nxt)
                    queue.append(nxt)
        seen |= found
        yield sorted(found)


def _particle_order(cluster: list[int], labels: list[Label], config: tuple[int, ...]) -> tuple[list[int], list[int]]:
    """Spins of the cluster ordered as particles (largest spin first, then model order) and their 2S + 1."""
    spin_of = {label.spin: label.values[v] for label, v in zip(labels, config)}
    levels = {i: int(round(2 * spin_of.get(i, 0.5))) + 1 for i in cluster}
    order = sorted(cluster, key=lambda i: (-levels[i], i))
    return order, [levels[i] for i in order]


@dataclass(frozen=True, eq=False)
class SystemLayout:
    """Where the numbers of one spin system come from in the model; depends only on its structure.

    Attributes
    ----------
    states : ndarray (n_nodes,)
        Model state of each effective state.
    spins : ndarray (n_nodes, n_particles)
        Model spin index (``model.all_spins``) of each particle in each effective state.
    hetero_m : ndarray (n_nodes, n_all)
        m of each heteronucleus in each effective state (0 for the other spins).
    shares : ndarray (n_nodes,)
        Share of the spin space each effective state stands for.
    jumps : tuple of (source, target, permutation, model jump index)
        Jumps between effective states, permutations acting on particles.
    levels : tuple of int
        2 S + 1 of each particle.
    """

    states: np.ndarray
    spins: np.ndarray
    hetero_m: np.ndarray
    shares: np.ndarray
    jumps: tuple[tuple[int, int, tuple[int, ...], int], ...]
    levels: tuple[int, ...]

    @classmethod
    def build(cls, n_all: int, cluster: list[int], labels: list[Label], nodes: list[tuple],
              jumps: list[Jump]) -> "SystemLayout":
        """The layout of the effective states `nodes` of a cluster."""
        orders = [_particle_order(cluster, labels, config)[0] for _, config in nodes]
        hetero_m = np.zeros((len(nodes), n_all))
        shares = np.ones(len(nodes))
        for u, (_, config) in enumerate(nodes):
            for label, v in zip(labels, config):
                shares[u] *= label.weights[v]
                if label.spin not in cluster:  # a heteronucleus: its m moves the shifts
                    hetero_m[u, label.spin] = label.values[v]
        index = {node: u for u, node in enumerate(nodes)}
        moves = []
        for u, (state, config) in enumerate(nodes):
            for k, jump in enumerate(jumps):
                if jump.source != state:
                    continue
                v = index[(jump.target, _relabel(config, labels, jump))]
                perm = tuple(orders[v].index(jump.permutation[i]) for i in orders[u])
                if u != v or perm != tuple(range(len(perm))):  # an identity jump changes nothing
                    moves.append((u, v, perm, k))
        return cls(np.array([state for state, _ in nodes]), np.array(orders, dtype=int).reshape(len(nodes), -1),
                   hetero_m, shares, tuple(moves), tuple(_particle_order(cluster, labels, nodes[0][1])[1]))

    def fill(self, shifts_hz: np.ndarray, couplings: np.ndarray, linewidths_hz: np.ndarray,
             populations: np.ndarray, jumps: list[Jump]) -> SpinParameters:
        """The system's numbers from the model's (shifts (n_states, n_observed) Hz, couplings
        (n_states, n_all, n_all) Hz, widths Hz, populations, jumps)."""
        states, spins = self.states[:, None], self.spins
        moved = shifts_hz[states, spins] + (couplings[states, spins, :] * self.hetero_m[:, None, :]).sum(axis=2)
        first, second = _pair_indices(spins.shape[1])
        pair_couplings = couplings[states, spins[:, first], spins[:, second]]
        system_jumps = tuple(Jump(u, v, perm, jumps[k].rate_per_s, jumps[k].process, jumps[k].forward)
                             for u, v, perm, k in self.jumps)
        return SpinParameters(moved, pair_couplings, linewidths_hz[self.states], populations[self.states] * self.shares,
                              system_jumps, self.levels)


@lru_cache(maxsize=None)
def _pair_indices(n: int) -> tuple[np.ndarray, np.ndarray]:
    """First and second index of the pairs i < j of n particles, in ``combinations`` order."""
    pairs = np.array(list(combinations(range(n), 2)), dtype=int).reshape(-1, 2)
    return pairs[:, 0], pairs[:, 1]


def structure_key(model: Model, couplings: np.ndarray, jumps: Sequence[Jump]) -> tuple:
    """Everything the layouts depend on, as a key of caches: spins, groups, heteronuclei, where couplings vanish
    (`couplings` as :func:`coupling_array` gives them), jumps (`model.jumps()`) without their rates."""
    return (len(model.states), tuple(model.all_spins), tuple(model.groups.items()),
            tuple(model.heteronuclei.items()), (couplings != 0).tobytes(),
            tuple((j.source, j.target, j.permutation) for j in jumps))


def remembered(store: dict, key: Hashable, make: Callable[[], T], keep: int = 64) -> T:
    """`store[key]`, made by `make()` the first time; `store` keeps the `keep` most recently made (the index work
    of a structure, done once for every model of that structure)."""
    try:
        return store[key]
    except KeyError:
        if len(store) >= keep:
            store.pop(next(iter(store)))
        made = store[key] = make()
        return made


_LAYOUTS: dict = {}


def system_layouts(model: Model, couplings: np.ndarray, jumps: list[Jump]) -> tuple[SystemLayout, ...]:
    """The layouts of the independent spin systems of `model` (cached for the 64 most recent structures)."""
    return remembered(_LAYOUTS, structure_key(model, couplings, jumps), lambda: tuple(
        SystemLayout.build(len(model.all_spins), cluster, labels, nodes, jumps)
        for cluster in clusters(model, couplings, jumps)
        for labels in [cluster_labels(model, cluster, couplings, jumps)]
        for nodes in connected_configurations(len(model.states), labels, jumps)))


def spin_systems(model: Model) -> list[SpinParameters]:
    """The independent spin systems whose spectra add up to the spectrum of `model` (exact).

    Systems that carry no population (states of population 0) are left out.
    """
    return [params for _, params in filled_layouts(model)]


def filled_layouts(model: Model) -> list[tuple[SystemLayout, SpinParameters]]:
    """The systems of :func:`spin_systems`, each with the layout it was filled from (which tells where its
    numbers come from in the model: :meth:`SystemLayout.fill` is linear in shifts, couplings and widths)."""
    jumps = model.jumps()
    couplings = coupling_array(model)
    populations = model.populations()
    numbers = (model.shifts_hz(), couplings, model.linewidths_hz(), populations, jumps)
    return [(layout, layout.fill(*numbers)) for layout in system_layouts(model, couplings, jumps)
            if populations[layout.states].sum() > 0]


def largest_block_bound(model: Model) -> int:
    """A lower bound on the coherences of the largest block of `model`, from the counts of spins and
    groups alone (no rate, no temperature, no basis state enumerated): the coupled clusters with every
    group in its largest total-spin sector."""
    moves = [Jump(0, 0, permutation, 0.0, i) for i, permutation in enumerate(model.exchange_permutations())]
    names = model.all_spins
    return max((largest_block_size(tuple(model.group_size(names[i]) + 1 for i in cluster))
                for cluster in clusters(model, coupling_array(model), moves)), default=0)
