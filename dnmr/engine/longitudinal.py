"""Longitudinal magnetisation under exchange: the Bloch–McConnell equations for M_z of every site.

Slow exchange (k from about 0.01 to a few tens s^-1) leaves the lines sharp, but it still carries
z-magnetisation from site to site within T1.  Selective inversion, saturation transfer and 2D exchange
spectra measure that transfer; this module computes it exactly.

A *site* is one observed spin (or equivalent group) of one state.  Its equilibrium magnetisation is
the state's population times the number of nuclei the spin stands for.  Every elementary jump of the
model (:meth:`dnmr.model.Model.jumps`: the processes with their detailed-balance reverses and inverse
permutations) carries the magnetisation of site (source, i) to site (target, P(i)) at the jump's rate.
With R1 the longitudinal relaxation rate of each site (the model file's ``r1_per_s``),

    dM/dt = -(R1 + K) (M - M_eq),   K_ii = sum of the rates out of site i,   K_ji = -k(i -> j),

and M(t) = M_eq + expm(-(R1 + K) t) (M(0) - M_eq) (McConnell, J. Chem. Phys. 28, 430 (1958)).

With D = diag(M_eq), detailed balance (k(i -> j) M_eq,i = k(j -> i) M_eq,j) makes K D symmetric, so
D^(-1/2) (R1 + K) D^(1/2) is a real symmetric matrix (R1 is diagonal and commutes with D, so any R1 per
site keeps the symmetry): the propagator at every time comes from one ``eigh``.  Where the symmetry does
not hold (a site of zero population, or a rate matrix that breaks detailed balance) it is ``expm`` at
each time.

A saturated site is held at M = 0 from t = 0 on; the other sites then relax towards the steady state
M_ss = M_eq,u + L_uu^-1 L_us M_eq,s (u the free sites, s the saturated ones, L = R1 + K), which for two
sites is the Forsén–Hoffman relation M_a,ss / M_a,eq = R1a / (R1a + k_ab).
"""
from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import linalg

from dnmr.errors import InputError
from dnmr.kinetics import Jump
from dnmr.model import Model

#: Relative asymmetry of K D below which detailed balance is taken to hold (the symmetric route).
SYMMETRY_TOLERANCE = 1e-10


@dataclass(frozen=True)
class Site:
    """One observed spin (or equivalent group) of one state.

    Attributes
    ----------
    state, spin : str
        The state's and the spin's names in the model.
    nuclei : int
        Number of nuclei the spin stands for (a group's size, else 1).
    label : str
        The site's name in data tables and results: the spin's name when the model has one state, the
        state's name when each state has one spin, else ``state:spin``.
    """

    state: str
    spin: str
    nuclei: int
    label: str


def model_sites(model: Model) -> tuple[Site, ...]:
    """The sites of `model`, state by state, spins in the model's order."""
    single_state, single_spin = len(model.states) == 1, len(model.spins) == 1
    sites = []
    for state in model.state_names:
        for spin in model.spins:
            label = spin if single_state else state if single_spin else f"{state}:{spin}"
            sites.append(Site(state, spin, model.group_size(spin), label))
    return tuple(sites)


def site_exchange_matrix(model: Model, jumps: Iterable[Jump] | None = None) -> np.ndarray:
    """Exchange matrix K (s^-1) over the sites of `model` (:func:`model_sites` order).

    K_ii is the sum of the rates out of site i and K_ji = -k(i -> j); a jump that leaves a spin on its
    own site (a fixed point of a mutual permutation) carries nothing.  `jumps` defaults to the model's.
    """
    n_spins = len(model.spins)
    K = np.zeros((len(model.states) * n_spins,) * 2)
    for jump in model.jumps() if jumps is None else jumps:
        for i in range(n_spins):  # observed spins come first in the permutation's order
            src, dst = jump.source * n_spins + i, jump.target * n_spins + jump.permutation[i]
            if src != dst:
                K[dst, src] -= jump.rate_per_s
                K[src, src] += jump.rate_per_s
    return K


def process_patterns(model: Model) -> np.ndarray:
    """The exchange matrix of each process at unit forward rate, array (n_processes, n_sites, n_sites).

    K is linear in the forward rates (a reverse runs at k p_from / p_to), so K = sum_p k_p patterns[p].

    Raises
    ------
    InputError
        The model lists the reverse of a process as a process of its own (its rate is then not free).
    """
    try:
        jumps = model.with_rates(np.ones(len(model.exchanges))).jumps()
    except InputError as err:
        raise InputError("a process and its listed reverse cannot be fitted apart; drop the reverse (detailed "
                         "balance implies it)", where=err.where) from None
    return np.array([site_exchange_matrix(model, [j for j in jumps if j.process == p])
                     for p in range(len(model.exchanges))])


def site_relaxation_rates(model: Model, r1_per_s: float | Mapping[str, float] | None = None) -> np.ndarray:
    """R1 (s^-1) of every site: from `r1_per_s` (one number, or by site label) or else the model's ``r1_per_s``.

    Raises
    ------
    InputError
        A site with no R1 anywhere, or a label that is not a site.
    """
    sites = model_sites(model)
    given: dict[str, float] = {}
    if isinstance(r1_per_s, Mapping):
        unknown = sorted(set(r1_per_s) - {s.label for s in sites})
        if unknown:
            raise InputError(f'unknown site "{unknown[0]}"; sites are {", ".join(s.label for s in sites)}',
                             where="r1_per_s")
        given = {str(k): float(v) for k, v in r1_per_s.items()}
    rates = []
    for site in sites:
        state = model.states[model.state_index(site.state)]
        value = given.get(site.label, r1_per_s if isinstance(r1_per_s, (int, float)) else state.r1_of(site.spin))
        if value is None:
            raise InputError(f'no longitudinal relaxation rate for site "{site.label}"; give r1_per_s in the state'
                             f' "{site.state}" of the model file', where=f"state[{model.state_index(site.state)}].r1_per_s")
        if not np.isfinite(value) or value < 0:
            raise InputError(f'R1 of site "{site.label}" must be a finite rate of 0 or more, got {value!r}',
                             where="r1_per_s")
        rates.append(float(value))
    return np.array(rates)


@dataclass(frozen=True)
class LongitudinalSystem:
    """The z-magnetisation of all sites of a model under exchange and longitudinal relaxation.

    Build with :meth:`from_model`.

    Attributes
    ----------
    sites : tuple of Site
        The sites, in the order of every vector and matrix here.
    equilibrium : ndarray
        M_eq of each site: population x nuclei (sums to the number of observed nuclei per molecule).
    exchange : ndarray
        K (s^-1), see :func:`site_exchange_matrix`.
    relaxation : ndarray
        R1 (s^-1) of each site.
    """

    sites: tuple[Site, ...]
    equilibrium: np.ndarray
    exchange: np.ndarray
    relaxation: np.ndarray

    @classmethod
    def from_model(cls, model: Model, r1_per_s: float | Mapping[str, float] | None = None) -> "LongitudinalSystem":
        """The system of `model` at its rates and temperature; R1 as in :func:`site_relaxation_rates`."""
        sites = model_sites(model)
        populations = model.populations()
        equilibrium = np.array([populations[model.state_index(s.state)] * s.nuclei for s in sites])
        return cls(sites, equilibrium, site_exchange_matrix(model), site_relaxation_rates(model, r1_per_s))

    @property
    def labels(self) -> list[str]:
        """Site labels in order."""
        return [s.label for s in self.sites]

    @property
    def matrix(self) -> np.ndarray:
        """L = R1 + K (s^-1): dM/dt = -L (M - M_eq)."""
        return np.diag(self.relaxation) + self.exchange

    def index(self, labels: str | Sequence[str]) -> list[int]:
        """Indices of the sites named `labels` (a label or a list of them)."""
        names = [labels] if isinstance(labels, str) else list(labels)
        known = self.labels
        out = []
        for name in names:
            if name not in known:
                raise InputError(f'unknown site "{name}"; sites are {", ".join(known)}', where="sites")
            out.append(known.index(name))
        return out

    # --- starting states ----------------------------------------------------------------------------
    def inverted(self, labels: str | Sequence[str], efficiency: float = 1.0) -> np.ndarray:
        """M(0) after a selective inversion of the sites `labels`: M = (1 - 2 efficiency) M_eq there,
        M_eq elsewhere (efficiency 1 is a perfect inversion, 0.5 a saturation, 0 nothing)."""
        start = self.equilibrium.copy()
        idx = self.index(labels)
        start[idx] *= 1.0 - 2.0 * float(efficiency)
        return start

    # --- evolution --------------------------------------------------------------------------------
    def evolve(self, start: np.ndarray, times_s: Sequence[float], saturated: str | Sequence[str] = ()) -> np.ndarray:
        """M(t) of every site, array (n_times, n_sites), from M(0) = `start`.

        Sites named in `saturated` are held at 0 for t >= 0 (their start value is ignored); the others
        relax towards :meth:`steady_state`.
        """
        times = np.asarray(times_s, dtype=float)
        if np.any(times < 0) or not np.all(np.isfinite(times)):
            raise InputError("times must be finite and not negative", where="times")
        sat = self.index(saturated) if len(saturated) else []
        free = [i for i in range(len(self.sites)) if i not in sat]
        target = self.steady_state(saturated)
        out = np.zeros((times.size, len(self.sites)))
        L = self.matrix[np.ix_(free, free)]
        deviation = np.asarray(start, dtype=float)[free] - target[free]
        out[:, free] = target[free] + propagate(L, self.equilibrium[free], deviation, times)
        return out

    def steady_state(self, saturated: str | Sequence[str] = ()) -> np.ndarray:
        """M of every site at steady state with the sites `saturated` held at 0 (M_eq when none is)."""
        sat = self.index(saturated) if len(saturated) else []
        if not sat:
            return self.equilibrium.copy()
        free = [i for i in range(len(self.sites)) if i not in sat]
        L = self.matrix
        out = np.zeros(len(self.sites))
        shift = np.linalg.solve(L[np.ix_(free, free)], L[np.ix_(free, sat)] @ self.equilibrium[sat])
        out[free] = self.equilibrium[free] + shift
        return out

    def volumes(self, mixing_s: Sequence[float]) -> np.ndarray:
        """Peak volumes of a 2D exchange spectrum, array (n_mixing, n_sites, n_sites):
        A(tm) = expm(-L tm) diag(M_eq) (Jeener, Meier, Bachmann & Ernst, J. Chem. Phys. 71, 4546 (1979));
        A[t, i, j] is the peak of magnetisation that started on site j (F1) and is detected on site i (F2)."""
        times = np.asarray(mixing_s, dtype=float)
        n = len(self.sites)
        columns = [propagate(self.matrix, self.equilibrium, np.eye(n)[:, j] * self.equilibrium[j], times)
                   for j in range(n)]
        return np.stack(columns, axis=2)


def propagate(L: np.ndarray, weights: np.ndarray, deviation: np.ndarray, times_s: np.ndarray) -> np.ndarray:
    """expm(-L t) @ `deviation` at every t of `times_s`, array (n_times, n).

    When L diag(`weights`) is symmetric (detailed balance, all weights positive) the propagator comes from
    one ``eigh`` of diag(w)^(-1/2) L diag(w)^(1/2); otherwise ``scipy.linalg.expm`` at each time.
    """
    times = np.asarray(times_s, dtype=float)
    if symmetrisable(L, weights):
        root = np.sqrt(weights)
        S = L * root[None, :] / root[:, None]
        values, vectors = np.linalg.eigh(0.5 * (S + S.T))
        coefficients = vectors.T @ (deviation / root)
        return (np.exp(-np.outer(times, values)) * coefficients) @ vectors.T * root
    return np.array([linalg.expm(-L * t) @ deviation for t in times])


def symmetrisable(L: np.ndarray, weights: np.ndarray) -> bool:
    """True when all `weights` are positive and L diag(weights) is symmetric (detailed balance)."""
    if np.any(np.asarray(weights) <= 0):
        return False
    LD = L * weights[None, :]
    scale = max(float(np.abs(LD).max()), 1e-300)
    return float(np.abs(LD - LD.T).max()) <= SYMMETRY_TOLERANCE * scale
