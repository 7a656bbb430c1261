"""The eigen route of a block: its spectrum as a sum of complex Lorentzian lines.

With L = V diag(lambda) V^-1 the spectrum of a block, S(nu) = detect . (i 2 pi nu - L)^-1 . start, is
sum_k c_k / (i 2 pi nu - lambda_k) with c_k = (detect V)_k (V^-1 start)_k, cheap on any grid.  L is not normal
and can be defective (two equally populated sites at k = pi dnu give a double eigenvalue), so the route is
refused where the eigenvector matrix is ill-conditioned or the line amplitudes cancel
(:func:`trusted_eigenbasis`); :mod:`dnmr.engine.resolvent` then takes the Schur route.

Blocks of one or two coherences (a single spin exchanging between two sites, an AB pair in one state, an
uncoupled spin without exchange) can be decomposed in closed form, in complex scalars, which costs a few
microseconds instead of the tens that LAPACK calls and array checks cost on a 2 x 2 matrix (a simulation of a
small model does so: :func:`eigen_lines`).  For
L = [[a, b], [c, d]] with mean m = (a + d) / 2, half difference h = (a - d) / 2 and s = sqrt(h^2 + b c), the
eigenvalues are m + s and m - s (their difference free of the large common m), with eigenvectors (r, c)
and (b, -r), r = s + h: indeed (L - m - s) (r, c) = ((h - s) r + b c, c r - (h + s) c) = (h^2 - s^2 + b c, 0)
= 0, and (L - m + s) (b, -r) = ((h + s) b - b r, c b + (h - s) r) = 0.  The sign of s is chosen so that
|s + h| >= |s - h| (Re s conj(h) >= 0): r is then free of cancellation, and r = 0 only where h = s = 0, a
double eigenvalue, which with b or c non-zero is defective (refused) and with b = c = 0 is a diagonal L,
whose lines are its diagonal.  The condition number is that of the eigenvector matrix with columns of unit
length, as LAPACK's zgeev returns it.
"""
from __future__ import annotations

import cmath
import math

import numpy as np
from scipy.linalg.lapack import zgeev as _zgeev
from scipy.linalg.lapack import zgetrf as _zgetrf
from scipy.linalg.lapack import zgetri as _zgetri

#: Largest condition number of an eigenvector basis that is trusted (rounding error ~ 1e-16 x this).
EIGENBASIS_CONDITION_LIMIT = 1e6


def trusted_eigenbasis(condition: float, amplitude_sum: float, weight: float) -> bool:
    """Whether a block's eigen-lines are trusted: the 1-norm condition number of its eigenvector matrix (unit
    columns) below :data:`EIGENBASIS_CONDITION_LIMIT`, and the sum of the lines' |amplitudes| not that many
    times the block's weight |detect . start| (near-defective blocks: large amplitudes that cancel)."""
    return condition < EIGENBASIS_CONDITION_LIMIT and amplitude_sum <= EIGENBASIS_CONDITION_LIMIT * weight


def eigen_basis(L: np.ndarray, detect: np.ndarray, start: np.ndarray):
    """Eigenvalues lambda, eigenvectors V and V^-1 of a block and the halves of its line amplitudes,
    u = detect V and w = V^-1 start (amplitude u_k w_k), or None where the eigen route is refused
    (:func:`trusted_eigenbasis`: the 1-norm condition number of V, rounding error in the amplitudes growing
    like 1e-16 times it, and the size of the amplitudes against their sum)."""
    work = 66 * len(L)  # room for LAPACK's blocked algorithms (the wrappers' minimum is unblocked and slow)
    lam, _, V, info = _zgeev(L, compute_vl=0, compute_vr=1, lwork=work)
    if info != 0:
        return None
    lu, piv, info = _zgetrf(V)
    if info != 0:
        return None  # singular eigenvector matrix: defective
    V_inv, info = _zgetri(lu, piv, lwork=work)
    u, w = detect @ V, V_inv @ start
    condition = np.abs(V).sum(axis=0).max() * np.abs(V_inv).sum(axis=0).max()
    if not trusted_eigenbasis(condition, np.abs(u * w).sum(), abs(detect @ start)):
        return None
    return lam, V, V_inv, u, w


def eigen_lines(L: np.ndarray, detect: np.ndarray, start: np.ndarray, *,
                closed_form: bool = False) -> tuple[np.ndarray, np.ndarray] | None:
    """Poles (rad/s) and amplitudes of a block's lines (:func:`eigen_basis`), or None where the eigen route is
    refused; with `closed_form`, a block of one or two coherences by :func:`small_block_lines`.

    The two differ by rounding error only, but a fit compares spectra with those its exact derivatives give,
    which come from :func:`eigen_basis`, and near the fast-exchange limit that rounding error (about eps k of
    the narrow line's width) moves its path: fits keep to one decomposition, and only a simulation, which
    stands alone, asks for the closed form."""
    if closed_form and len(L) <= 2:
        return small_block_lines(L, detect, start)
    basis = eigen_basis(L, detect, start)
    if basis is None:
        return None
    lam, _, _, u, w = basis
    return lam, u * w


def small_block_lines(L: np.ndarray, detect: np.ndarray, start: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Poles (rad/s) and amplitudes of a block of one or two coherences in closed form (see the module notes), or
    None where the eigen route is refused.

    Parameters
    ----------
    L : ndarray (n, n), n = 1 or 2
        The block Liouvillian (rad/s).
    detect, start : ndarray (n,)
        Detection and start vectors; the block's spectrum is detect . (i omega - L)^-1 . start.
    """
    if len(L) == 1:
        return L[0].astype(complex), (detect * start).astype(complex)
    (a, b), (c, d) = L.tolist()
    (d1, d2), (s1, s2) = detect.tolist(), start.tolist()
    if b == 0 and c == 0:  # no exchange between the two: the diagonal are the lines
        return np.array([a, d], dtype=complex), np.array([d1 * s1, d2 * s2], dtype=complex)
    m, h = (a + d) / 2, (a - d) / 2
    s = cmath.sqrt(h * h + b * c)
    if (s * h.conjugate()).real < 0:
        s = -s
    r = s + h
    det = -(r * r + b * c)
    if det == 0:
        return None  # a double eigenvalue with b or c non-zero: defective
    u1, u2 = d1 * r + d2 * c, d1 * b - d2 * r
    w1, w2 = -(r * s1 + b * s2) / det, (r * s2 - c * s1) / det
    n1, n2 = math.hypot(abs(r), abs(c)), math.hypot(abs(b), abs(r))
    norm = max((abs(r) + abs(c)) / n1, (abs(b) + abs(r)) / n2)
    inverse_norm = max(abs(r) * n1 + abs(c) * n2, abs(b) * n1 + abs(r) * n2) / abs(det)
    if not trusted_eigenbasis(norm * inverse_norm, abs(u1 * w1) + abs(u2 * w2), abs(d1 * s1 + d2 * s2)):
        return None
    return np.array([m + s, m - s]), np.array([u1 * w1, u2 * w2])
