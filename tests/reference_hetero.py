"""Independent QuTiP reference for spins of any size, observed or heteronuclear (full product space).

Nothing here comes from the dnmr engine.  Every nucleus is an explicit spin: ``spins`` is a list of
``{"spin": I, "observed": bool}``; a magnetically equivalent group is written out member by member.
States are dicts ``{"shifts_hz": [...], "couplings_hz": n x n symmetric, "linewidth_hz": w,
"population": p}``; the shift of a heteronucleus is ignored (it has its own rotating frame).

Hamiltonian of a state, in Hz (secular, weak coupling across nuclei):

    H = sum_obs nu_i Iz_i + sum_{obs i<j} J_ij I_i . I_j + sum_{pairs with a heteronucleus} J_ij Iz_i Iz_j

The system lives in ``label (x) spins``; exchange a -> b by the permutation P at rate k is the Lindblad
dissipator of ``sqrt(k) |b><a| (x) P`` (PHYSICS.md, "Independent reference library").  Every
coherence of label c decays at pi w_c (only observed single-quantum coherences, times heteronuclear
populations, are ever reached from rho0).  The spectrum is

    S(nu) = 2 <F+| (i 2 pi nu - L)^-1 |rho0>,   rho0 = sum_c p_c |c><c| (x) F- / (D_obs / 2 * D_het),

F+- summed over the observed spins only, so that the integral of Re S is the number of observed
spins-1/2 (populations normalised to 1).
"""
from __future__ import annotations

import itertools

import numpy as np
import qutip
from reference_qutip import reachable_indices


def _dims(spins: list[dict]) -> list[int]:
    return [int(round(2 * s["spin"])) + 1 for s in spins]


def _embedded(spins: list[dict], index: int, operator: qutip.Qobj) -> qutip.Qobj:
    """`operator` on spin `index`, identity on the others."""
    return qutip.tensor([operator if k == index else qutip.qeye(d) for k, d in enumerate(_dims(spins))])


def _components(spins: list[dict], index: int) -> list[qutip.Qobj]:
    """Ix, Iy, Iz of one spin (QuTiP's jmat) in the product space."""
    return [_embedded(spins, index, qutip.jmat(spins[index]["spin"], axis)) for axis in ("x", "y", "z")]


def state_hamiltonian(spins: list[dict], state: dict) -> qutip.Qobj:
    """H of one state (Hz), secular across nuclei (see module docstring)."""
    ops = [_components(spins, i) for i in range(len(spins))]
    dims = _dims(spins)
    hamiltonian = qutip.qzero(dims)
    for i, spin in enumerate(spins):
        if spin["observed"]:
            hamiltonian += state["shifts_hz"][i] * ops[i][2]
    for i, j in itertools.combinations(range(len(spins)), 2):
        J = state["couplings_hz"][i][j]
        if spins[i]["observed"] and spins[j]["observed"]:
            hamiltonian += J * sum(a * b for a, b in zip(ops[i], ops[j]))
        else:
            hamiltonian += J * ops[i][2] * ops[j][2]
    return hamiltonian


def permutation_operator(spins: list[dict], perm: list[int]) -> qutip.Qobj:
    """P |m_0 m_1 ...> = |m'> with m'[perm[i]] = m[i] (spins swapped must have the same size)."""
    dims = _dims(spins)
    assert all(dims[i] == dims[j] for i, j in enumerate(perm))
    size = int(np.prod(dims))
    matrix = np.zeros((size, size))
    for levels in itertools.product(*(range(d) for d in dims)):
        image = [0] * len(dims)
        for i, j in enumerate(perm):
            image[j] = levels[i]
        matrix[np.ravel_multi_index(image, dims), np.ravel_multi_index(levels, dims)] = 1.0
    return qutip.Qobj(matrix, dims=[dims, dims])


def _labelled(n_states: int, target: int, source: int, spin_part: qutip.Qobj) -> qutip.Qobj:
    label = np.zeros((n_states, n_states))
    label[target, source] = 1.0
    return qutip.tensor(qutip.Qobj(label), spin_part)


def liouvillian(spins: list[dict], states: list[dict], jumps: list[dict]) -> qutip.Qobj:
    """Liouvillian (rad/s) of the labelled system; `jumps` lists every process (reverses included)."""
    n = len(states)
    dims = _dims(spins)
    hamiltonian = sum(_labelled(n, c, c, state_hamiltonian(spins, s)) for c, s in enumerate(states))
    c_ops = [np.sqrt(j["rate"]) * _labelled(n, j["target"], j["source"], permutation_operator(spins, j["permutation"]))
             for j in jumps]
    total = qutip.liouvillian(2.0 * np.pi * hamiltonian, c_ops)
    for c, state in enumerate(states):
        projector = _labelled(n, c, c, qutip.qeye(dims))
        total = total - np.pi * state["linewidth_hz"] * qutip.sprepost(projector, projector)
    return total


def spectrum(freqs_hz, spins: list[dict], states: list[dict], jumps: list[dict]) -> np.ndarray:
    """Complex S(nu) at `freqs_hz` (Hz), by dense solves on the subspace reachable from rho0."""
    n = len(states)
    dims = _dims(spins)
    observed = [i for i, s in enumerate(spins) if s["observed"]]
    f_plus = sum(_embedded(spins, i, qutip.jmat(spins[i]["spin"], "+")) for i in observed)
    d_obs = int(np.prod([dims[i] for i in observed]))
    d_het = int(np.prod(dims)) // d_obs
    weights = np.array([s["population"] for s in states], dtype=float)
    weights /= weights.sum()
    rho0 = sum(p * _labelled(n, c, c, f_plus.dag()) for c, p in enumerate(weights)) / (d_obs / 2 * d_het)
    row = qutip.operator_to_vector(qutip.tensor(qutip.qeye(n), f_plus).trans()).full().ravel()
    start = qutip.operator_to_vector(rho0).full().ravel()
    L = liouvillian(spins, states, jumps).to("CSR").data.as_scipy().tocsr()
    keep = reachable_indices(L, start)
    reduced = L[keep][:, keep].toarray()
    out = np.empty(len(freqs_hz), dtype=complex)
    for k, nu in enumerate(np.asarray(freqs_hz, dtype=float)):
        out[k] = 2.0 * row[keep] @ np.linalg.solve(2j * np.pi * nu * np.eye(len(keep)) - reduced, start[keep])
    return out
