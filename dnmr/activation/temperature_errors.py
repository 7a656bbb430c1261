"""Errors of sample temperatures: an independent error per point plus a few errors shared by all points.

A shared error (an unknown probe offset, the uncertainty of a calibration curve) moves every temperature
together; it is kept as a column of a factor of the covariance, so the covariance of thousands of
temperatures stays a vector and a few columns. :mod:`dnmr.activation.line_fit` propagates these errors
into the Eyring and Arrhenius lines.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


def covariance_factor(covariance: np.ndarray) -> np.ndarray:
    """F with F F^T = `covariance` (a small positive semi-definite matrix): eigenvectors times sqrt(eigenvalue),
    the columns of negligible eigenvalues dropped."""
    values, vectors = np.linalg.eigh(np.asarray(covariance, dtype=float))
    keep = values > 1e-12 * max(float(values.max(initial=0.0)), 1e-300)
    return vectors[:, keep] * np.sqrt(values[keep])


@dataclass(frozen=True)
class TemperatureErrors:
    """Uncertainty of a set of sample temperatures: independent errors plus a few shared ones.

    The covariance is ``diag(independent_k**2) + shared_k @ shared_k.T`` (K^2). Each column of `shared_k`
    is one error common to the points (a probe offset: the same value in every row; a calibration curve:
    one column per coefficient), so the covariance of thousands of temperatures stays a vector and a few
    columns instead of a dense matrix.

    Attributes
    ----------
    independent_k : ndarray
        Standard error of each temperature that no other point shares, K.
    shared_k : ndarray
        (n, m) factor of the shared part, K.
    sources : tuple of str
        What each column of `shared_k` is ("calibration", "probe offset", "given covariance").
    """

    independent_k: np.ndarray
    shared_k: np.ndarray
    sources: tuple[str, ...] = ()

    @classmethod
    def from_covariance(cls, covariance: np.ndarray, source: str = "given covariance") -> "TemperatureErrors":
        """A full (small) covariance matrix (K^2) as shared columns: its eigenvectors scaled by sqrt(eigenvalue)."""
        columns = covariance_factor(covariance)
        return cls(np.zeros(len(columns)), columns, (source,) * columns.shape[1])

    def __len__(self) -> int:
        return len(self.independent_k)

    @property
    def stderr(self) -> np.ndarray:
        """Standard error of each temperature (independent and shared parts together), K."""
        return np.sqrt(self.independent_k**2 + (self.shared_k**2).sum(axis=1))

    @property
    def covariance(self) -> np.ndarray:
        """The dense n x n covariance, K^2 (for a handful of points only: it grows as n^2)."""
        return np.diag(self.independent_k**2) + self.shared_k @ self.shared_k.T

    @property
    def any(self) -> bool:
        """True when some temperature has an error."""
        return bool(self.independent_k.any() or self.shared_k.any())

    def plus(self, other: "TemperatureErrors") -> "TemperatureErrors":
        """Both sets of errors on the same points (independent parts add in quadrature)."""
        return TemperatureErrors(np.hypot(self.independent_k, other.independent_k),
                                 np.hstack([self.shared_k, other.shared_k]), self.sources + other.sources)

    def with_offset(self, offset_stderr_k: float) -> "TemperatureErrors":
        """Add an unknown probe offset (K), one error shared by every point."""
        column = np.full((len(self), 1), float(offset_stderr_k))
        return self.plus(TemperatureErrors(np.zeros(len(self)), column, ("probe offset",)))

    def subset(self, rows: np.ndarray) -> "TemperatureErrors":
        """The errors of the selected points."""
        return TemperatureErrors(self.independent_k[rows], self.shared_k[rows], self.sources)
