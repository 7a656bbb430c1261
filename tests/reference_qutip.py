"""Independent lineshape reference built on QuTiP (full Liouville space, Lindblad exchange).

Nothing here comes from the dnmr engine. The model is written in plain dicts:

``states``: list of ``{"shifts_hz": [N], "couplings_hz": N x N symmetric (zero diagonal),
"linewidth_hz": float, "population": float}``.

``jumps``: list of ``{"source": a, "target": b, "permutation": [N ints], "rate": s^-1}``, every
process written out (see :func:`jumps_with_reverse`). ``permutation[i]`` is the index, in the
target's spin order, of the spin that spin ``i`` of the source becomes.

The system lives in the Hilbert space ``label (x) spins``, with the label ``|c>`` saying which
state the molecule is in. Exchange a -> b at rate k is the Lindblad dissipator of the jump
operator ``sqrt(k) |b><a| (x) P`` (a == b: mutual exchange by the permutation P alone), which on
label-diagonal density matrices is exactly ``k P rho_a P^T`` fed into ``b`` and ``-k rho_a``
lost from ``a`` (PHYSICS.md, "Independent reference library").

The complex spectrum is ``S(nu) = 2 <F+| (i 2pi nu - L)^-1 |rho0>`` with ``<F+|X> = Tr(F+ X)``
and ``rho0 = sum_c p_c F-_c / 2^(N-1)``, populations normalised to sum 1; the integral of
``Re S`` over all frequencies is then N, the number of spins per state.
"""
from __future__ import annotations

import itertools

import numpy as np
import qutip

# Matrix entries stacked in one batched solve (bounds its memory to about 64 MB).
_BATCH_ENTRIES = 4_000_000


def spin_operators(n_spins: int) -> list[tuple[qutip.Qobj, qutip.Qobj, qutip.Qobj]]:
    """Cartesian spin-1/2 operators of each spin in the 2^N product space.

    Parameters
    ----------
    n_spins : int
        Number of spins N.

    Returns
    -------
    list of (Ix, Iy, Iz)
        One triple of QuTiP operators (dimensionless, eigenvalues +/- 1/2) per spin.
    """
    single = [qutip.jmat(0.5, axis) for axis in ("x", "y", "z")]
    identity = qutip.qeye(2)
    return [
        tuple(
            qutip.tensor([op if k == i else identity for k in range(n_spins)])
            for op in single
        )
        for i in range(n_spins)
    ]


def raising_operator(n_spins: int) -> qutip.Qobj:
    """Total raising operator F+ = sum_i (Ix_i + i Iy_i) of N spins."""
    return sum(ix + 1j * iy for ix, iy, _ in spin_operators(n_spins))


def state_hamiltonian(state: dict) -> qutip.Qobj:
    """Spin Hamiltonian of one state in Hz (rotating frame at 0 Hz).

    H = sum_i nu_i Iz_i + sum_{i<j} J_ij (I_i . I_j).

    Parameters
    ----------
    state : dict
        ``shifts_hz`` (N offsets, Hz) and ``couplings_hz`` (N x N symmetric, Hz).

    Returns
    -------
    qutip.Qobj
        Hamiltonian in frequency units (Hz).
    """
    shifts = np.asarray(state["shifts_hz"], dtype=float)
    couplings = np.asarray(state["couplings_hz"], dtype=float)
    ops = spin_operators(len(shifts))
    hamiltonian = sum(nu * iz for nu, (_, _, iz) in zip(shifts, ops))
    for i, j in itertools.combinations(range(len(shifts)), 2):
        scalar_product = sum(a * b for a, b in zip(ops[i], ops[j]))
        hamiltonian = hamiltonian + couplings[i, j] * scalar_product
    return hamiltonian


def inverse_permutation(perm: list[int]) -> list[int]:
    """Inverse of a permutation given as an index list (inv[perm[i]] = i)."""
    inverse = [0] * len(perm)
    for i, target in enumerate(perm):
        inverse[target] = i
    return inverse


def permutation_operator(perm: list[int]) -> qutip.Qobj:
    """Operator P with P|m_0 m_1 ...> = |m'>, m'[perm[i]] = m[i].

    Built from QuTiP's own reordering of tensor factors: ``Qobj.permute(order)`` puts old factor
    ``order[k]`` in slot ``k``, so slot ``perm[i]`` receives factor ``i`` when
    ``order = perm^-1``.

    Parameters
    ----------
    perm : list of int
        ``perm[i]`` is the new position of spin ``i``.

    Returns
    -------
    qutip.Qobj
        Real orthogonal permutation operator on the 2^N product space.
    """
    n_spins = len(perm)
    order = inverse_permutation(perm)
    dims = [2] * n_spins
    return sum(
        qutip.basis(dims, list(m)).permute(order) * qutip.basis(dims, list(m)).dag()
        for m in itertools.product((0, 1), repeat=n_spins)
    )


def jumps_with_reverse(states: list[dict], exchanges: list[dict]) -> list[dict]:
    """Every exchange plus the reverse process implied by CONTRACT.md section 1.

    For a != b the reverse b -> a runs at ``k p_a / p_b`` (detailed balance) with the inverse
    permutation. For a == b (mutual exchange) the inverse permutation is added at the same rate,
    unless the permutation is its own inverse (then the process is its own reverse).

    Parameters
    ----------
    states : list of dict
        States with their ``population`` (relative weights).
    exchanges : list of dict
        Forward processes: ``source``, ``target``, ``permutation``, ``rate`` (s^-1).

    Returns
    -------
    list of dict
        Forward and reverse jumps, in the same dict form.
    """
    jumps = []
    for exchange in exchanges:
        jumps.append(dict(exchange))
        a, b, perm = exchange["source"], exchange["target"], list(exchange["permutation"])
        inverse = inverse_permutation(perm)
        if a != b:
            rate = exchange["rate"] * states[a]["population"] / states[b]["population"]
            jumps.append({"source": b, "target": a, "permutation": inverse, "rate": rate})
        elif inverse != perm:
            jumps.append({"source": a, "target": a, "permutation": inverse, "rate": exchange["rate"]})
    return jumps


def _label_operator(n_states: int, target: int, source: int, n_spins: int,
                    spin_part: qutip.Qobj | None = None) -> qutip.Qobj:
    """``|target><source| (x) spin_part`` in the label (x) spins space (default spin part: 1)."""
    label = np.zeros((n_states, n_states))
    label[target, source] = 1.0
    if spin_part is None:
        spin_part = qutip.qeye([2] * n_spins)
    return qutip.tensor(qutip.Qobj(label), spin_part)


def total_liouvillian(states: list[dict], jumps: list[dict]) -> qutip.Qobj:
    """Liouvillian L (rad s^-1) of the labelled system: d vec(rho)/dt = L vec(rho).

    Coherent part ``-i 2pi [H, .]`` with ``H = sum_c |c><c| (x) H_c`` (QuTiP's ``liouvillian``
    gives ``-i[H, .]``), one Lindblad dissipator per jump, and ``-pi w_c`` on the whole
    label-c block (only single-quantum coherences are observed, where every coherence decays at
    pi w_c).

    Parameters
    ----------
    states : list of dict
        States in the module's dict form.
    jumps : list of dict
        Every exchange process explicitly (rates in s^-1).

    Returns
    -------
    qutip.Qobj
        Superoperator on the (n_states 2^N)^2-dimensional Liouville space.
    """
    n_states, n_spins = len(states), len(states[0]["shifts_hz"])
    hamiltonian = sum(
        _label_operator(n_states, c, c, n_spins, state_hamiltonian(state))
        for c, state in enumerate(states)
    )
    c_ops = [
        np.sqrt(jump["rate"]) * _label_operator(
            n_states, jump["target"], jump["source"], n_spins,
            permutation_operator(jump["permutation"]))
        for jump in jumps
    ]
    liouvillian = qutip.liouvillian(2.0 * np.pi * hamiltonian, c_ops)
    for c, state in enumerate(states):
        projector = _label_operator(n_states, c, c, n_spins)
        liouvillian = liouvillian - np.pi * state["linewidth_hz"] * qutip.sprepost(projector, projector)
    return liouvillian


def observation_vectors(states: list[dict]) -> tuple[np.ndarray, np.ndarray]:
    """Vectorised (column-stacked) observation row f and initial density rho0.

    ``f @ vec(X) = Tr(F+ X)`` with F+ summed over every label, and
    ``rho0 = sum_c p_c |c><c| (x) F- / 2^(N-1)`` with populations normalised to sum 1.
    """
    n_states, n_spins = len(states), len(states[0]["shifts_hz"])
    f_plus = raising_operator(n_spins)
    weights = np.array([state["population"] for state in states], dtype=float)
    weights = weights / weights.sum()
    observe = qutip.tensor(qutip.qeye(n_states), f_plus)
    rho0 = sum(
        p * _label_operator(n_states, c, c, n_spins, f_plus.dag())
        for c, p in enumerate(weights)
    ) / 2 ** (n_spins - 1)
    row = qutip.operator_to_vector(observe.trans()).full().ravel()
    return row, qutip.operator_to_vector(rho0).full().ravel()


def reachable_indices(matrix, seed: np.ndarray) -> np.ndarray:
    """Indices reachable from the nonzero entries of ``seed`` by repeated action of ``matrix``.

    The span of these unit vectors is invariant under ``matrix`` by construction, so solving
    within it is exact (no physical symmetry is assumed).

    Parameters
    ----------
    matrix : scipy.sparse matrix
        Square operator (here the Liouvillian).
    seed : np.ndarray
        Starting vector.

    Returns
    -------
    np.ndarray of int
        Sorted indices of the invariant subspace containing ``seed``.
    """
    pattern = (abs(matrix) > 0).astype(float)
    reached = seed != 0
    while True:
        grown = reached | (pattern @ reached.astype(float) > 0)
        if np.array_equal(grown, reached):
            return np.flatnonzero(reached)
        reached = grown


def qutip_spectrum(freqs_hz, states: list[dict], jumps: list[dict]) -> np.ndarray:
    """Complex exchange lineshape S(nu) = 2 <F+| (i 2pi nu - L)^-1 |rho0>.

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies (Hz) in the rotating frame at 0 Hz.
    states : list of dict
        States in the module's dict form.
    jumps : list of dict
        Every exchange process explicitly (see :func:`jumps_with_reverse`), rates in s^-1.

    Returns
    -------
    np.ndarray of complex
        S at each frequency (per Hz). ``Re S`` is absorption (integral N), ``-Im S``
        dispersion.
    """
    freqs = np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    liouvillian = total_liouvillian(states, jumps).data.as_scipy().tocsr()
    row, rho0 = observation_vectors(states)
    keep = reachable_indices(liouvillian, rho0)
    reduced = liouvillian[keep][:, keep].toarray()
    identity = np.eye(len(keep))
    spectrum = np.empty(len(freqs), dtype=complex)
    chunk = max(1, _BATCH_ENTRIES // len(keep) ** 2)
    for start in range(0, len(freqs), chunk):
        omega = 2.0 * np.pi * freqs[start:start + chunk]
        resolvent = 1j * omega[:, None, None] * identity - reduced
        rhs = np.broadcast_to(rho0[keep][:, None], (len(omega), len(keep), 1))
        solution = np.linalg.solve(resolvent, rhs)[..., 0]
        spectrum[start:start + chunk] = 2.0 * solution @ row[keep]
    return spectrum


def _random_state(rng: np.random.Generator, n_spins: int) -> dict:
    """One random coupled state: shifts +/-300 Hz, J in -20..20 Hz, FWHM 0.5-5 Hz."""
    couplings = np.triu(rng.uniform(-20.0, 20.0, (n_spins, n_spins)), 1)
    return {
        "shifts_hz": list(rng.uniform(-300.0, 300.0, n_spins)),
        "couplings_hz": couplings + couplings.T,
        "linewidth_hz": float(rng.uniform(0.5, 5.0)),
        "population": float(rng.uniform(0.2, 1.0)),
    }


def _random_exchange(rng: np.random.Generator, source: int, target: int, n_spins: int) -> dict:
    """One exchange with a random permutation (non-identity when mutual), rate 1e-1..1e4 s^-1."""
    perm = list(rng.permutation(n_spins))
    while source == target and perm == list(range(n_spins)):
        perm = list(rng.permutation(n_spins))
    return {"source": source, "target": target, "permutation": [int(p) for p in perm],
            "rate": float(10.0 ** rng.uniform(-1.0, 4.0))}


def random_model(rng: np.random.Generator, n_spins: int, n_states: int) -> tuple[list[dict], list[dict]]:
    """Random coupled exchange model in the reference's dict form.

    The states are joined in a chain 0 -> 1 -> ... (each link a random spin permutation); a
    single state (N >= 2) gets a mutual exchange by a random non-identity permutation instead.
    Reverse processes are *not* included: pass the exchanges through
    :func:`jumps_with_reverse` before :func:`qutip_spectrum`.

    Parameters
    ----------
    rng : np.random.Generator
        Random source.
    n_spins : int
        Spins per state.
    n_states : int
        Number of states.

    Returns
    -------
    (states, exchanges)
        Lists of dicts; populations are relative weights in 0.2..1 (not normalised).
    """
    states = [_random_state(rng, n_spins) for _ in range(n_states)]
    links = [(c, c + 1) for c in range(n_states - 1)]
    if n_states == 1 and n_spins >= 2:
        links = [(0, 0)]
    exchanges = [_random_exchange(rng, a, b, n_spins) for a, b in links]
    return states, exchanges
