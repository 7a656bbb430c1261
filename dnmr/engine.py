"""The lineshape engine: exchange-coupled density matrices in Liouville space.

For every state c the density matrix obeys

    d rho_c/dt = -i 2 pi [H_c, rho_c] - pi w_c rho_c
                 + sum_jumps k (P rho_source P^T  into target)  -  (sum of rates out of c) rho_c,

restricted to the observable single-quantum coherences and split into independent total-m blocks
(:mod:`dnmr.liouville`).  The spectrum is

    S(nu) = 2 < F+ | (i 2 pi nu - L)^-1 | rho0 >,   rho0 = sum_c p_c F-_c / 2^(N-1),

so that the absorption Re S integrates to sum_c p_c N over all frequencies, whatever the rates.

Each block is diagonalised, L = V diag(lambda) V^-1, which turns S into a sum of complex Lorentzians
that is cheap on any frequency grid.  L is not normal and can be defective (two-site exchange with equal
populations at k = pi dnu has a double eigenvalue); where the eigenbasis is ill-conditioned the block
is evaluated instead through its Schur form, Q T Q^H, by triangular solves at each frequency, which is
backward stable.  Both routes are exact; the choice only moves rounding error.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla

from .kinetics import Jump, exchange_jumps
from .liouville import (
    CoherenceBlock,
    coherence_blocks,
    coupling_terms,
    detection_vector,
    permutation_map,
    zeeman_terms,
)
from .model import Model

TWO_PI = 2.0 * np.pi
#: Largest condition number of an eigenvector basis that is trusted (rounding error ~ 1e-16 x this).
EIGENBASIS_CONDITION_LIMIT = 1e6
#: Lines below this fraction of the tallest peak and of the largest area are dropped (bounds the error).
LINE_HEIGHT_CUTOFF = 1e-15


@dataclass(frozen=True)
class SchurBlock:
    """A block evaluated by triangular solves: S(nu) = left . (i 2 pi nu - T)^-1 . right."""

    left: np.ndarray
    triangle: np.ndarray
    right: np.ndarray


@dataclass
class LineshapeTerms:
    """The spectrum of a model in a form that is cheap to evaluate on any grid.

    Attributes
    ----------
    poles : ndarray (complex)
        Eigenvalues lambda_k (rad/s) of the Liouvillian: Re is minus the decay rate, Im the angular
        frequency of line k.
    amplitudes : ndarray (complex)
        Complex weight of each line, already including the factor 2 of the normalisation.
    schur_blocks : list of SchurBlock
        Blocks whose eigenbasis was too ill-conditioned to trust, evaluated directly.
    """

    poles: np.ndarray
    amplitudes: np.ndarray
    schur_blocks: list[SchurBlock] = field(default_factory=list)

    def evaluate(self, hz: np.ndarray) -> np.ndarray:
        """Complex spectrum S at frequencies `hz` (Hz from 0 ppm): absorption = Re S, dispersion = -Im S."""
        omega = TWO_PI * np.asarray(hz, dtype=float)
        out = _sum_of_lorentzians(omega, self.poles, self.amplitudes)
        for block in self.schur_blocks:
            out += _triangular_resolvent(omega, block)
        return out

    @property
    def line_frequencies_hz(self) -> np.ndarray:
        """Centre of each Lorentzian term (Hz)."""
        return self.poles.imag / TWO_PI

    @property
    def line_widths_hz(self) -> np.ndarray:
        """Full width at half height of each Lorentzian term (Hz)."""
        return -self.poles.real / np.pi


def _sum_of_lorentzians(omega: np.ndarray, poles: np.ndarray, amplitudes: np.ndarray) -> np.ndarray:
    """sum_k c_k / (i omega - lambda_k); one pass per line (faster than 2-D blocks in numpy)."""
    out = np.zeros(omega.shape, dtype=complex)
    term = np.empty_like(out)
    iw = 1j * omega
    for c, lam in zip(amplitudes.tolist(), poles.tolist()):
        np.subtract(iw, lam, out=term)
        np.divide(c, term, out=term)
        out += term
    return out


def _triangular_resolvent(omega: np.ndarray, block: SchurBlock) -> np.ndarray:
    """left . (i omega - T)^-1 . right for every omega, by back substitution vectorised over omega."""
    T = block.triangle
    n = T.shape[0]
    z = 1j * omega
    x = np.empty((n, omega.size), dtype=complex)
    for i in range(n - 1, -1, -1):
        acc = block.right[i] + T[i, i + 1:] @ x[i + 1:]
        x[i] = acc / (z - T[i, i])
    return block.left @ x


# --- assembling the Liouvillian -------------------------------------------------------------------

@dataclass(frozen=True)
class SpinParameters:
    """Numbers that fill the Liouvillian: per state shifts (Hz), couplings (Hz, per pair), widths (Hz)."""

    shifts_hz: np.ndarray
    couplings_hz: np.ndarray
    linewidths_hz: np.ndarray
    populations: np.ndarray
    jumps: tuple[Jump, ...]

    @classmethod
    def from_model(cls, model: Model) -> "SpinParameters":
        """Collect the numbers of `model` (jumps include reverse processes by detailed balance)."""
        return cls(model.shifts_hz(), model.couplings_matrix_hz(), model.linewidths_hz(), model.populations(),
                   tuple(exchange_jumps(model)))

    @property
    def topology(self) -> tuple:
        """What fixes the sparsity pattern: number of states and each jump's states and permutation."""
        return len(self.linewidths_hz), tuple((j.source, j.target, j.permutation) for j in self.jumps)


@dataclass(frozen=True, eq=False)
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
    key = (block, topology)
    pattern = _PATTERNS.get(key)
    if pattern is None:
        if len(_PATTERNS) >= 64:
            _PATTERNS.pop(next(iter(_PATTERNS)))
        pattern = _PATTERNS[key] = BlockPattern.build(block, topology)
    return pattern


def block_liouvillian(pattern: BlockPattern, params: SpinParameters) -> np.ndarray:
    """Liouvillian (rad/s) of one single-quantum block over all states: (S d) x (S d)."""
    block = pattern.block
    freq = params.shifts_hz @ zeeman_terms(block) + params.couplings_hz @ coupling_terms(block)[0]
    rates = np.array([j.rate_per_s for j in params.jumps])
    diagonal = (-1j * TWO_PI) * freq.ravel() - np.repeat(np.pi * params.linewidths_hz, block.size)
    if len(rates):
        diagonal += rates @ (pattern.stay - pattern.leave)
    L = np.diag(diagonal)
    if len(pattern.flip_rows):
        L[pattern.flip_rows, pattern.flip_cols] = (-1j * TWO_PI) * pattern.flip_values * params.couplings_hz[
            pattern.flip_state, pattern.flip_pair]
    if len(pattern.move_rows):
        L[pattern.move_rows, pattern.move_cols] += rates @ pattern.move_weights  # unique; may meet couplings
    return L


def block_start(pattern: BlockPattern, populations: np.ndarray) -> np.ndarray:
    """Starting coherence 2 rho0 of one block (the 2 makes one spin integrate to 1)."""
    u = pattern.detect[: pattern.block.size]
    return np.outer(populations, u).ravel() * (2.0 / 2.0 ** (pattern.block.n_spins - 1))


# --- from a Liouvillian to lines --------------------------------------------------------------

def _eigen_lines(L: np.ndarray, detect: np.ndarray, start: np.ndarray):
    """Poles and amplitudes from an eigendecomposition, or None when the eigenbasis is ill-conditioned.

    The test is the 1-norm condition number of the eigenvector matrix V (rounding error in the
    amplitudes grows like 1e-16 times it) and, for near-defective blocks, the size of the amplitudes
    against their sum (large terms that cancel).
    """
    lam, V = np.linalg.eig(L)
    try:
        V_inv = np.linalg.inv(V)
    except np.linalg.LinAlgError:
        return None
    condition = np.abs(V).sum(axis=0).max() * np.abs(V_inv).sum(axis=0).max()
    if not condition < EIGENBASIS_CONDITION_LIMIT:
        return None
    amp = (detect @ V) * (V_inv @ start)
    if np.abs(amp).sum() > EIGENBASIS_CONDITION_LIMIT * abs(detect @ start):
        return None  # near-defective: large amplitudes that cancel
    return lam, amp


def _schur_block(L: np.ndarray, detect: np.ndarray, start: np.ndarray) -> SchurBlock:
    T, Q = sla.schur(L, output="complex")
    return SchurBlock(left=detect @ Q, triangle=T, right=Q.conj().T @ start)


def _prune(poles: np.ndarray, amplitudes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Drop lines that matter nowhere: peak height |c|/|Re lambda| and area |c| both negligible
    against the largest ones (so neither any point nor the integral moves by more than the cutoff)."""
    if amplitudes.size == 0:
        return poles, amplitudes
    area = np.abs(amplitudes)
    height = area / np.maximum(-poles.real, 1e-300)
    keep = (height > LINE_HEIGHT_CUTOFF * height.max()) | (area > LINE_HEIGHT_CUTOFF * area.max())
    return poles[keep], amplitudes[keep]


def lineshape_terms(model: Model) -> LineshapeTerms:
    """Decompose the spectrum of `model` into Lorentzian terms (and directly evaluated blocks)."""
    params = SpinParameters.from_model(model)
    topology = params.topology
    poles, amps, schur = [], [], []
    for block in coherence_blocks(len(model.spins)):
        pattern = block_pattern(block, topology)
        L = block_liouvillian(pattern, params)
        start = block_start(pattern, params.populations)
        lines = _eigen_lines(L, pattern.detect, start)
        if lines is None:
            schur.append(_schur_block(L, pattern.detect, start))
        else:
            poles.append(lines[0])
            amps.append(lines[1])
    if poles:
        p, a = _prune(np.concatenate(poles), np.concatenate(amps))
    else:
        p, a = np.zeros(0, complex), np.zeros(0, complex)
    return LineshapeTerms(p, a, schur)


# --- frequency grid --------------------------------------------------------------------------

def default_window_ppm(model: Model) -> tuple[float, float]:
    """A window (ppm, low to high) that holds every line of every state with a margin."""
    shifts = model.shifts_hz()
    couplings = np.abs(model.couplings_matrix_hz())
    span_j = couplings.sum(axis=1).max() if couplings.size else 0.0
    width = model.linewidths_hz().max()
    lo, hi = shifts.min(), shifts.max()
    margin = span_j + 25.0 * width + 0.1 * (hi - lo) + 10.0
    sf = model.spectrometer.frequency_mhz
    return (lo - margin) / sf, (hi + margin) / sf


def default_points(model: Model, window_ppm: tuple[float, float]) -> int:
    """Enough points for about 8 per intrinsic linewidth of the narrowest state (4096 to 131072)."""
    span_hz = abs(window_ppm[1] - window_ppm[0]) * model.spectrometer.frequency_mhz
    needed = span_hz / (model.linewidths_hz().min() / 8.0)
    return int(min(131072, max(4096, 2 ** np.ceil(np.log2(needed)))))


def frequency_grid_ppm(model: Model, window_ppm=None, points: int | None = None) -> np.ndarray:
    """The ppm grid (ascending) of a simulation: the model's window and points unless given here."""
    window = window_ppm or model.window_ppm or default_window_ppm(model)
    lo, hi = sorted(float(v) for v in window)
    n = points or model.points or default_points(model, (lo, hi))
    return np.linspace(lo, hi, int(n))
