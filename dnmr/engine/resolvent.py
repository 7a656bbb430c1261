"""From a block Liouvillian to its spectrum: S(nu) = <detect| (i 2 pi nu - L)^-1 |start>.

Three exact routes, chosen per block; each only moves rounding error:

- **eigen** (:mod:`dnmr.engine.eigenlines`): L = V diag(lambda) V^-1 makes S a sum of complex Lorentzians
  (cheap on any grid).  L is not normal and can be defective (two equally populated sites at k = pi dnu give
  a double eigenvalue), so the route is refused when V is ill-conditioned or the line amplitudes cancel.
- **Schur**: L = Q T Q^H; S by triangular solves at every frequency.  Backward stable; used where the
  eigen route is refused.
- **Krylov** (large blocks): detailed balance makes D^-1 L D complex symmetric for D = diag(sqrt p), and
  the detection and start vectors then coincide, so a complex-symmetric Lanczos recursion (partial
  re-orthogonalisation in the bilinear form, on the sparse Liouvillian) reduces the block to a
  tridiagonal matrix whose continued fraction is S.  A step costs a sparse product (about a dozen
  elements per row) plus, only when the estimated loss of orthogonality calls for it, a pass over the
  basis, instead of the O(n^3) of a dense eigendecomposition; it is refused on a (rare) serious
  breakdown or when its basis grows ill-conditioned, and the eigen route is used instead.  Where numba is
  installed (the optional extra ``fast``) the Lanczos recursion and the continued fraction run as the
  compiled loops of :mod:`dnmr.engine.kernels`, the same algorithms step for step.
"""
from __future__ import annotations

import importlib
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla
from scipy import sparse

from dnmr.engine.convergence import CONVERGED, CONVERGENCE_STEPS, ConvergenceWatch, rescale, rescaling_interval
from dnmr.engine.eigenlines import eigen_lines

TWO_PI = 2.0 * np.pi
#: Lines below this fraction of the tallest peak and of the largest area are dropped (bounds the error).
LINE_HEIGHT_CUTOFF = 1e-15
#: Blocks at least this large go the Krylov route (below it a dense eigendecomposition is as quick).
KRYLOV_MIN_SIZE = 80
#: Blocks at least this large apply the Liouvillian as a sparse matrix inside the Lanczos recursion.
SPARSE_MATVEC_SIZE = 128
#: Largest squared length a Lanczos vector may reach (its growth amplifies rounding error).
KRYLOV_GROWTH_LIMIT = 1e6
#: Squared length of a Lanczos vector past which the basis is re-orthogonalised whatever the estimate: a safety
#: net since the estimate's rounding term grows with the vectors' lengths (it first kept a seven-spin block of
#: 735 exact, where one vector reached 109).  At 50 it adds 9 % to the passes on seven spins, 2 % on eight.
NEAR_BREAKDOWN = 50.0
#: Blocks at least this large stop the Lanczos recursion once its continued fraction has converged on the
#: simulation's grid (:class:`~dnmr.engine.convergence.ConvergenceWatch`); below it watching costs more than
#: it saves (measured: a seven-spin block of 1225 converges only after 97 % of its steps, an eight-spin block
#: of 3920 after 35 %).
EARLY_STOP_MIN_SIZE = 1500
#: Use the compiled loops of :mod:`dnmr.engine.kernels` on the Krylov route where numba is installed (set to
#: False to force the numpy loops, which are the reference).
USE_COMPILED = True

_KERNELS: list = []  # the imported dnmr.engine.kernels, or None without numba, once looked for


def compiled_kernels():
    """:mod:`dnmr.engine.kernels` when numba is installed and :data:`USE_COMPILED` is set, else None.

    Imported on first use, that is only when a block goes the Krylov route, so that simulations of small
    systems (and every command's start) never load numba."""
    if not USE_COMPILED:
        return None
    if not _KERNELS:
        try:
            kernels = importlib.import_module(f"{__package__}.kernels")
        except ImportError:  # numba is an optional extra
            kernels = None
        except Exception as exc:  # a broken numba install: the numpy loops give the same numbers
            warnings.warn(f"the compiled loops are off (numba failed to load: {type(exc).__name__}: {exc}); "
                          "dnmr uses its numpy loops, which give the same spectra", RuntimeWarning, stacklevel=2)
            kernels = None
        _KERNELS.append(kernels)
    return _KERNELS[0]


@dataclass(frozen=True)
class SchurBlock:
    """A block evaluated by triangular solves: S(nu) = left . (i 2 pi nu - T)^-1 . right."""

    left: np.ndarray
    triangle: np.ndarray
    right: np.ndarray

    def evaluate(self, omega: np.ndarray) -> np.ndarray:
        """S at angular frequencies `omega` (rad/s), by back substitution vectorised over omega."""
        return self.left @ shifted_triangular_solve(self.triangle, self.right, 1j * np.asarray(omega, dtype=float))

    @property
    def weight(self) -> complex:
        """Integral of S over angular frequency / pi: the block's <detect|start>."""
        return complex(self.left @ self.right)


@dataclass(frozen=True)
class ContinuedFraction:
    """A block reduced to a complex-symmetric tridiagonal matrix T (diagonal `alpha`, off-diagonal `beta`):
    S(nu) = norm * e1 . (i 2 pi nu - T)^-1 . e1."""

    alpha: np.ndarray
    beta: np.ndarray
    norm: float
    size: int = 0  # coherences of the block (0: not recorded); more than len(alpha) when the recursion stopped early

    def evaluate(self, omega: np.ndarray) -> np.ndarray:
        """S at angular frequencies `omega` (rad/s), by the determinant recurrence of the continued fraction.

        With q_j = det(z - T[j:, j:]) (q_(m+1) = 1, q_(m+2) = 0) the recurrence

            q_j = (z - alpha_j) q_(j+1) - beta_j^2 q_(j+2),      S = norm q_2 / q_1,

        is the continued fraction f_j = q_j / q_(j+1) = z - alpha_j - beta_j^2 / f_(j+1) without its
        divisions.  Every rounding error of a step (in z - alpha_j, in either product, in their difference)
        is a relative error of z - alpha_j or of beta_j^2, so the computed q are exact for a tridiagonal
        whose entries are perturbed by a few ulp each, and no pivot test is needed (the argument of Kahan's
        analysis of Sturm counts, Stanford report CS41, 1966; cited from memory).  Every few levels both q
        are rescaled by a power of two (exact) so that they never overflow; a point whose q_1 still ends up
        zero or not finite is solved with pivoting.
        """
        omega = np.ascontiguousarray(omega, dtype=float)
        z = 1j * omega
        if z.size == 0:
            return np.zeros(0, dtype=complex)
        ends = z[[0, -1]]
        b2 = self.beta ** 2
        growth = float(np.abs(ends[None, :] - self.alpha[:, None]).max() + np.abs(b2).max(initial=0.0))
        every = rescaling_interval(growth)
        kernels = compiled_kernels()
        if kernels is None:
            out = self._recurrence(z, b2, every)
        else:
            out = kernels.continued_fraction(omega, np.ascontiguousarray(self.alpha, dtype=complex),
                                             np.ascontiguousarray(b2, dtype=complex), self.norm, every)
        for i in np.flatnonzero(~np.isfinite(out)):
            out[i] = self.norm * self._pivoted(z[i])
        return out

    def _recurrence(self, z: np.ndarray, b2: np.ndarray, every: int) -> np.ndarray:
        """norm q_2 / q_1 at the points `z` = i omega (numpy: one array operation per level)."""
        after = np.ones_like(z)        # q_(j+2), then q_2
        head = z - self.alpha[-1]      # q_(j+1), then q_1
        spare = np.empty_like(z)
        for level, (a, b) in enumerate(zip(self.alpha[-2::-1].tolist(), b2[::-1].tolist()), start=1):
            np.subtract(z, a, out=spare)
            spare *= head
            after *= b
            np.subtract(spare, after, out=after)
            head, after, spare = after, head, spare
            if level % every == 0:
                rescale(head, after)
        with np.errstate(divide="ignore", invalid="ignore"):
            return self.norm * after / head

    def _pivoted(self, z: complex) -> complex:
        m = len(self.alpha)
        bands = np.zeros((3, m), dtype=complex)
        bands[0, 1:] = -self.beta
        bands[1] = z - self.alpha
        bands[2, :-1] = -self.beta
        rhs = np.zeros(m, dtype=complex)
        rhs[0] = 1.0
        return sla.solve_banded((1, 1), bands, rhs)[0]

    @property
    def weight(self) -> complex:
        """Integral of S over angular frequency / pi: the block's <detect|start>."""
        return complex(self.norm)


@dataclass
class LineshapeTerms:
    """A spectrum in a form that is cheap to evaluate on any grid.

    Attributes
    ----------
    poles : ndarray (complex)
        Eigenvalues lambda_k (rad/s): Re is minus the decay rate, Im the angular frequency of line k.
    amplitudes : ndarray (complex)
        Complex weight of each line (normalisation included).
    direct : list
        Blocks evaluated directly (:class:`SchurBlock`, :class:`ContinuedFraction`).
    routes : tuple of str
        How each block was evaluated (for verbose output).
    """

    poles: np.ndarray
    amplitudes: np.ndarray
    direct: list = field(default_factory=list)
    routes: tuple[str, ...] = ()

    def evaluate(self, hz: np.ndarray) -> np.ndarray:
        """Complex spectrum S at frequencies `hz` (Hz from 0 ppm): absorption = Re S, dispersion = -Im S."""
        omega = TWO_PI * np.asarray(hz, dtype=float)
        out = _sum_of_lorentzians(omega, self.poles, self.amplitudes)
        for block in self.direct:
            out += block.evaluate(omega)
        return out

    def absorption(self, hz: np.ndarray, *, hz_per_unit: float = 1.0) -> np.ndarray:
        """Absorption Re S at frequencies `hz` (Hz), in real arithmetic (about twice as fast as `evaluate`).

        With `hz_per_unit`, `hz` is an axis in other units: ppm, with the spectrometer frequency (MHz) as the Hz
        per ppm, which spares multiplying the axis out.
        """
        axis = np.asarray(hz, dtype=float)
        scale = TWO_PI * hz_per_unit
        out = _sum_of_absorption_lines(axis, self.poles, self.amplitudes, scale)
        if self.direct:
            omega = scale * axis
            for block in self.direct:
                out += block.evaluate(omega).real
        return out

    def integral(self) -> float:
        """Integral of the absorption over all frequencies (Hz): each term c/(i w - lambda) gives Re(c)/2."""
        return float(self.amplitudes.real.sum() / 2 + sum(b.weight.real / 2 for b in self.direct))

    @property
    def line_frequencies_hz(self) -> np.ndarray:
        """Centre of each Lorentzian term (Hz)."""
        return self.poles.imag / TWO_PI


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


def _sum_of_absorption_lines(axis: np.ndarray, poles: np.ndarray, amplitudes: np.ndarray, scale: float) -> np.ndarray:
    """Re sum_k c_k / (i omega - lambda_k) at omega = scale x: with c / (i omega - lambda) = (c / scale) / (i x -
    lambda / scale), sum_k (Re c a + Im c d) / (a^2 + d^2) for the scaled c and lambda, a = -Re lambda,
    d = x - Im lambda (the first line written straight into the sum)."""
    out = np.empty(axis.shape) if poles.size else np.zeros(axis.shape)
    d = out
    den = np.empty_like(out)
    for c, lam in zip(amplitudes.tolist(), poles.tolist()):
        c, lam = c / scale, lam / scale
        a = -lam.real
        np.subtract(axis, lam.imag, out=d)
        np.square(d, out=den)
        den += a * a
        d *= c.imag
        d += c.real * a
        d /= den
        if d is out:
            d = np.empty_like(out)
        else:
            out += d
    return out


def shifted_triangular_solve(T: np.ndarray, rhs: np.ndarray, z: np.ndarray) -> np.ndarray:
    """(z - T)^-1 rhs for an upper triangular T at every point of `z` (one column each), by back
    substitution vectorised over the points."""
    n = T.shape[0]
    x = np.empty((n, z.size), dtype=complex)
    for i in range(n - 1, -1, -1):
        x[i] = (rhs[i] + T[i, i + 1:] @ x[i + 1:]) / (z - T[i, i])
    return x


def schur_block(L: np.ndarray, detect: np.ndarray, start: np.ndarray) -> SchurBlock:
    """The Schur-form evaluator of a block (always available, backward stable)."""
    T, Q = sla.schur(L, output="complex")
    return SchurBlock(left=detect @ Q, triangle=T, right=Q.conj().T @ start)


def symmetrised(L, weights: np.ndarray):
    """D^-1 L D for D = diag(weights) (L dense or sparse, the result alike), or None unless it is complex
    symmetric to rounding error."""
    if sparse.issparse(L):
        S = sparse.csr_matrix(L, dtype=complex, copy=True)
        S.sum_duplicates()  # canonical: sorted, no repeats
        S.data *= weights[S.indices] / np.repeat(weights, np.diff(S.indptr))
        T = S.T.tocsr()
        T.sum_duplicates()
        if not (np.array_equal(S.indptr, T.indptr) and np.array_equal(S.indices, T.indices)):
            return None  # an element without its mirror image (detailed balance always gives both)
        scale = np.abs(S.data).max(initial=0.0)
        asymmetry = np.abs(S.data - T.data).max(initial=0.0)  # same pattern: compare element for element
        S.data += T.data
        S.data *= 0.5
        S.eliminate_zeros()  # elements of couplings that are zero (a third of all in a chain): work for nothing
    else:
        D = L * (weights[None, :] / weights[:, None])
        scale = np.abs(D).max()
        asymmetry = np.abs(D - D.T).max()
        S = 0.5 * (D + D.T)
    if asymmetry > 1e-12 * scale:
        return None
    return S


def lanczos(S, g: np.ndarray, omega: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray] | None:
    """Complex-symmetric Lanczos with partial re-orthogonalisation in the bilinear form x^T y.

    The loss of orthogonality q_k^T q_j is not measured but estimated by its own three-term recurrence
    (Simon, Math. Comp. 42, 115 (1984), carried from the Hermitian inner product to the bilinear form:
    the algebra is the same with transposes for conjugate transposes).  Simon's rounding term, one step's
    error eps ||S|| for vectors of unit length, is scaled by the Euclidean lengths of the vectors involved:
    in the bilinear form q^T q = 1 leaves ||q|| free (at least 1; up to 15 on seven spins), and a step's
    rounding error f_j, of size eps ||S|| ||q_j||, moves q_k^T q_(j+1) by up to ||f_j|| ||q_k|| / |beta_j|
    (with unit lengths assumed, one start in six or eight on seven spins, moved by rounding error only, was
    off by 4e-7 to 3e-5 of its block's peak).  The basis is re-orthogonalised
    against all earlier vectors only when the estimate passes sqrt(eps) or the next vector grows longer than
    :data:`NEAR_BREAKDOWN` allows, at that step and the next (the
    next step's share found in the same pass over the basis, :func:`project_pair`).  That keeps the basis
    semi-orthogonal, which is enough for T to be the projection of S to working accuracy; a step costs a
    sparse product and O(j) for the estimates, the O(n j) pass over the basis only now and then (about one
    step in ten for six to eight spins).  Given a grid, a block of at least :data:`EARLY_STOP_MIN_SIZE`
    coherences carries its continued fraction along on it (:class:`~dnmr.engine.convergence.ConvergenceWatch`)
    and stops when it has converged there, which for eight coupled spins comes after a third to two thirds
    of the steps (the passes over the basis grow as the cube of the steps).  The compiled loop (:func:`dnmr.engine.kernels.lanczos`)
    is taken where available.  Returns the tridiagonal (alpha, beta) with
    g^T (z - S)^-1 g = (g^T g) e1 (z - T)^-1 e1 (on the grid, to rounding error, if it stopped early), or None
    on a serious breakdown or excessive growth of the basis (the caller then takes another route).

    Parameters
    ----------
    S : ndarray or sparse matrix (complex symmetric)
        The symmetrised block Liouvillian (rad/s).
    g : ndarray
        Starting vector (g^T g must not vanish).
    omega : ndarray, optional
        Angular frequencies (rad/s) on which the spectrum will be evaluated (and nowhere else).
    """
    n = len(g)
    q0 = g / np.sqrt(g @ g)
    size = float(abs(S).sum(axis=1).max())
    exhausted = 1e-11 * size
    noise = _ROUNDING * size * np.exp(2j * np.pi * np.random.default_rng(0).random(n))
    watched = np.zeros(0) if omega is None or n < EARLY_STOP_MIN_SIZE else np.ascontiguousarray(omega, dtype=float)
    growth = np.abs(watched).max(initial=0.0) + size + size * size  # of the minors per level
    if compiled_kernels() is not None:
        return _compiled_lanczos(sparse.csr_matrix(S, dtype=complex), q0.astype(complex), noise, exhausted,
                                 watched, growth)
    operator = S.tocsr() if sparse.issparse(S) else sparse.csr_matrix(S) if n >= SPARSE_MATVEC_SIZE else S
    return _numpy_lanczos(operator, q0, noise, exhausted, ConvergenceWatch(watched, growth) if watched.size else None)


def _numpy_lanczos(operator, q0: np.ndarray, noise: np.ndarray, exhausted: float,
                   watch: ConvergenceWatch | None) -> tuple[np.ndarray, np.ndarray] | None:
    """The recursion of :func:`lanczos` in numpy (one call per vector operation): same arguments, with the
    symmetrised block as `operator` and the grid's watch (or None), and the same result."""
    n = len(q0)
    Q = np.zeros((n, n), dtype=complex)
    alpha = np.zeros(n, dtype=complex)
    beta = np.zeros(max(n - 1, 0), dtype=complex)
    Q[0] = q0
    omega = np.zeros(n + 1, dtype=complex)       # estimates of q_j^T q_k, k <= j (omega[j] = 1)
    omega_prev = np.zeros(n + 1, dtype=complex)  # the same for q_(j-1)
    omega[0] = 1.0
    lengths = np.ones(n)  # Euclidean lengths of the q_k (at least 1, since q_k^T q_k = 1)
    lengths[0] = np.sqrt(np.vdot(q0, q0).real)
    weighted = noise * lengths  # rounding terms times the lengths of the q_k, kept up to date
    carry = None  # the second step's share of the last re-orthogonalisation (see :func:`project_pair`)
    for j in range(n):
        w = operator @ Q[j]
        if j:
            w -= beta[j - 1] * Q[j - 1]
        alpha[j] = Q[j] @ w
        if watch is not None and watch.settled(alpha[j], beta[j - 1] ** 2 if j else 0.0):
            return alpha[: j + 1], beta[:j]  # converged on the grid
        w -= alpha[j] * Q[j]
        if j == n - 1:
            break
        if carry is not None:
            w += beta[j - 1] * carry
        length2 = np.vdot(w, w).real
        b = np.sqrt(w @ w)
        rounding = weighted[: j + 1] * max(lengths[j], lengths[max(j - 1, 0)])
        estimate = next_orthogonality(omega, omega_prev, alpha, beta, j, b, rounding)
        if carry is not None:
            estimate[: j + 1] = rounding / max(abs(b), 1e-300)
            carry = None
        elif np.abs(estimate[: j + 1]).max() > SEMI_ORTHOGONAL or length2 > NEAR_BREAKDOWN * abs(b) ** 2:
            basis = Q[: j + 1]
            before = length2
            projection, carry = project_pair(basis, w)
            w -= projection
            length2 = np.vdot(w, w).real
            if length2 < 0.5 * before:  # "twice is enough"
                w -= _projection(basis, w)
                length2 = np.vdot(w, w).real
            b = np.sqrt(w @ w)
            estimate[: j + 1] = rounding / max(abs(b), 1e-300)
        if length2 ** 0.5 <= exhausted:
            return alpha[: j + 1], beta[:j]  # the Krylov space is exhausted: exact with fewer steps
        if abs(b) ** 2 * KRYLOV_GROWTH_LIMIT < length2:
            return None  # serious breakdown: w is nearly isotropic in the bilinear form
        beta[j] = b
        Q[j + 1] = w / b
        lengths[j + 1] = np.sqrt(length2) / abs(b)
        weighted[j + 1] = noise[j + 1] * lengths[j + 1]
        omega_prev, omega = omega, estimate
    return alpha, beta


def _compiled_lanczos(csr, q0: np.ndarray, noise: np.ndarray, exhausted: float, watched: np.ndarray,
                      growth: float) -> tuple[np.ndarray, np.ndarray] | None:
    """:func:`lanczos` by the compiled loop (:func:`dnmr.engine.kernels.lanczos`), same arguments and result."""
    alpha, beta, steps, ok = compiled_kernels().lanczos(
        csr.indptr, csr.indices, csr.data, q0, noise, exhausted, KRYLOV_GROWTH_LIMIT, NEAR_BREAKDOWN, SEMI_ORTHOGONAL,
        _slice_rows(len(q0)), watched, rescaling_interval(growth), CONVERGENCE_STEPS, CONVERGED)
    return (alpha[:steps], beta[:steps - 1]) if ok else None


def _projection(basis: np.ndarray, w: np.ndarray) -> np.ndarray:
    """sum_k q_k (q_k^T w) over the rows q_k of `basis` (classical Gram-Schmidt in the bilinear form),
    taken in slices of rows that stay in cache between their two products, so the basis is read from
    memory once instead of twice."""
    rows = _slice_rows(basis.shape[1])
    out = np.zeros_like(w)
    for start in range(0, len(basis), rows):
        part = basis[start:start + rows]
        out += (part @ w) @ part
    return out


def project_pair(basis: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The projection of :func:`_projection` of `w` on the rows of `basis`, and in the same pass over the
    basis sum_k q_k (q_k^T q_j) over all rows but the last, q_j.

    The second is what re-orthogonalising the next step's vector would remove: that vector is
    S q_(j+1) - alpha q_(j+1) - beta_j q_j, and once q_(j+1) is orthogonal to the basis, its products with
    the earlier q_k are -beta_j q_k^T q_j up to rounding error (S q_k = beta q_(k-1) + alpha q_k + beta q_(k+1)
    and S is symmetric).  The next step adds beta_j times it instead of reading the basis again (which
    halves the passes over it)."""
    rows = _slice_rows(basis.shape[1])
    last = len(basis) - 1
    out, carry = np.zeros_like(w), np.zeros_like(w)
    for start in range(0, len(basis), rows):
        part = basis[start:start + rows]
        overlaps = part @ basis[last]
        if start + len(part) > last:
            overlaps[last - start] = 0.0
        out += (part @ w) @ part
        carry += overlaps @ part
    return out, carry


def _slice_rows(n: int) -> int:
    """Basis vectors of length `n` (complex) handled at once by :func:`_projection`."""
    return max(16, _CACHE_BYTES // (16 * n))


#: Bytes of basis vectors handled at once by :func:`_projection` (a quarter of a 2 MiB L2 cache; 256 to
#: 512 KiB measured best on seven spins).
_CACHE_BYTES = 1 << 19
#: Rounding error of one Lanczos step relative to the size of the operator (unit roundoff).
_ROUNDING = np.finfo(float).eps
SEMI_ORTHOGONAL = np.sqrt(np.finfo(float).eps)
"""Estimated loss of orthogonality (sqrt of the unit roundoff) at which the Lanczos basis is
re-orthogonalised: the basis is kept semi-orthogonal (Simon, Math. Comp. 42, 115 (1984))."""


def next_orthogonality(omega: np.ndarray, omega_prev: np.ndarray, alpha: np.ndarray, beta: np.ndarray,
                        j: int, b: complex, noise: np.ndarray) -> np.ndarray:
    """Estimates of q_(j+1)^T q_k (k <= j+1) from those of q_j and q_(j-1), by Simon's recurrence

    b w_(j+1,k) = beta_k w_(j,k+1) + (alpha_k - alpha_j) w_(j,k) + beta_(k-1) w_(j,k-1) - beta_(j-1) w_(j-1,k),

    with a rounding term of the size of one step's error added to each; the Lanczos recursion of
    :func:`lanczos` re-orthogonalises when one passes :data:`SEMI_ORTHOGONAL`.

    Parameters
    ----------
    omega, omega_prev : ndarray
        Estimates for q_j and q_(j-1) (length n + 1).
    alpha, beta : ndarray
        Diagonal and off-diagonal of the tridiagonal matrix so far (rad/s).
    j : int
        The step just taken.
    b : complex
        beta_j, the norm (bilinear form) of the next vector before it is scaled (rad/s).
    noise : ndarray
        Rounding term of each estimate, k <= j (one step's rounding error, scaled by the lengths of q_j and q_k).
    """
    new = np.zeros_like(omega)
    if j:
        t = beta[:j] * omega[1:j + 1] + (alpha[:j] - alpha[j]) * omega[:j] - beta[j - 1] * omega_prev[:j]
        t[1:] += beta[:j - 1] * omega[:j - 1]
        new[:j] = t
    new[: j + 1] += noise[: j + 1]
    new[: j + 1] *= 1.0 / (b if b != 0 else 1e-300)
    new[j + 1] = 1.0
    return new


def krylov_block(L, detect: np.ndarray, start: np.ndarray, weights: np.ndarray, omega: np.ndarray | None = None):
    """The Krylov evaluator of a block, or None where it is not safe (see :func:`lanczos`).

    `L` is dense or sparse; `weights` are sqrt(population) of the state of each coherence; `start` must
    equal scale x weights^2 x detect (as the engine builds it); given angular frequencies `omega` (rad/s),
    the evaluator is exact on them only (a large block's recursion stops once converged there).
    """
    if np.any(weights <= 0):
        return None
    S = symmetrised(L, weights)
    if S is None:
        return None
    g = detect * weights
    scale = (detect @ start) / (g @ g)
    reduced = lanczos(S, g, omega)
    if reduced is None:
        return None
    return ContinuedFraction(reduced[0], reduced[1], float(scale * (g @ g)), len(g))


def prune(poles: np.ndarray, amplitudes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Drop lines that matter nowhere: peak height |c|/|Re lambda| and area |c| both negligible
    against the largest ones (so neither any point nor the integral moves by more than the cutoff)."""
    if amplitudes.size == 0:
        return poles, amplitudes
    area = np.abs(amplitudes)
    if np.minimum.reduce(area) > LINE_HEIGHT_CUTOFF * np.maximum.reduce(area):
        return poles, amplitudes  # every line's area alone keeps it
    height = area / np.maximum(-poles.real, 1e-300)
    keep = (height > LINE_HEIGHT_CUTOFF * height.max()) | (area > LINE_HEIGHT_CUTOFF * area.max())
    return poles[keep], amplitudes[keep]


def krylov_basis_bytes(size: int) -> int:
    """Memory (bytes) of the Lanczos basis of a block of `size` coherences (none below the Krylov size)."""
    return 16 * size * size if takes_krylov_route(size) else 0


def takes_krylov_route(size: int) -> bool:
    """Whether a block of `size` coherences goes the Krylov route first (its Liouvillian then built sparse)."""
    return size >= KRYLOV_MIN_SIZE


def block_terms(L, detect: np.ndarray, start: np.ndarray, weights: np.ndarray, omega: np.ndarray | None = None):
    """Evaluate one block by the best safe route: ('lines', (poles, amplitudes)) or ('direct', evaluator).

    `L` is dense, or sparse for a block that goes the Krylov route (made dense if that route is refused).
    """
    if takes_krylov_route(L.shape[0]):
        fraction = krylov_block(L, detect, start, weights, omega)
        if fraction is not None:
            return "direct", fraction
    return dense_block_terms(L.toarray() if sparse.issparse(L) else L, detect, start)


def dense_block_terms(L: np.ndarray, detect: np.ndarray, start: np.ndarray, *, closed_form: bool = False):
    """One block by the dense routes (:func:`block_terms` without the Krylov route): ('lines', (poles,
    amplitudes)) where the eigenbasis is safe, else ('direct', :class:`SchurBlock`); `closed_form` as in
    :func:`~dnmr.engine.eigenlines.eigen_lines`."""
    lines = eigen_lines(L, detect, start, closed_form=closed_form)
    if lines is None:
        return "direct", schur_block(L, detect, start)
    return "lines", lines


def combine(blocks) -> LineshapeTerms:
    """Gather the per-block results of :func:`block_terms` into one :class:`LineshapeTerms`."""
    poles, amps, direct, routes = [], [], [], []
    for kind, value in blocks:
        if kind == "lines":
            poles.append(value[0])
            amps.append(value[1])
            routes.append(f"{len(value[0])} coherences: eigen-lines")
        elif isinstance(value, SchurBlock):
            direct.append(value)
            routes.append(f"{len(value.triangle)} coherences: Schur form (eigenbasis ill-conditioned)")
        else:
            direct.append(value)
            steps = len(value.alpha)
            early = f" of {value.size} (converged on the grid)" if steps < value.size else ""
            routes.append(f"Krylov continued fraction, {steps}{early} Lanczos steps")
    if len(poles) == 1:
        p, a = prune(poles[0], amps[0])
    elif poles:
        p, a = prune(np.concatenate(poles), np.concatenate(amps))
    else:
        p, a = np.zeros(0, complex), np.zeros(0, complex)
    return LineshapeTerms(p, a, direct, tuple(routes))
