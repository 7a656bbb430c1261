"""2D exchange by the matrix method: site-to-site rates from each volume matrix, with Monte Carlo errors.

L = -logm(A M0^-1) / tm at each mixing time (Perrin & Gipe, J. Am. Chem. Soc. 106, 4036 (1984); Perrin &
Dwyer, Chem. Rev. 90, 935 (1990)), its errors by Monte Carlo over the volume errors, the forward rate of
each process by least squares on the model's pattern of it, and checks of the site rates (negative,
unexpected, not detailed-balanced) in words.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from dnmr.engine.longitudinal import model_sites, process_patterns
from dnmr.fitting.transferfile import Experiment
from dnmr.formatting import significant

#: Monte Carlo draws whose volume matrix has no real logarithm, above which a mixing time is not used.
MAX_COMPLEX_FRACTION = 0.1
#: Signed deviations, in Monte Carlo standard errors, that count as significant in the checks.
CHECK_SIGMAS = 2.0


@dataclass(frozen=True)
class SiteRates:
    """Site-to-site rate constants from the matrix method, at one mixing time or combined.

    Attributes
    ----------
    mixing_s : float
        Mixing time (s); NaN for the combination of all mixing times.
    rates_per_s : ndarray
        k(j -> i) (s^-1) at [i, j] for i != j; the diagonal holds R1 of each site (s^-1).
    stderr : ndarray
        Monte Carlo standard errors of the same (NaN without draws).
    process_rates : ndarray
        Forward rate (s^-1) of each exchange process: the least-squares match of the site rates to the
        model's pattern of each process.
    process_stderr : ndarray
        Their Monte Carlo standard errors.
    checks : list of str
        Negative, non-detailed-balanced and unexpected elements, in words.
    """

    mixing_s: float
    rates_per_s: np.ndarray
    stderr: np.ndarray
    process_rates: np.ndarray
    process_stderr: np.ndarray
    checks: list[str]

    def to_dict(self) -> dict:
        """Plain data (arrays as lists)."""
        return {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in dataclasses.asdict(self).items()}


def site_rates_from_volumes(volumes: np.ndarray, m0: np.ndarray, mixing_s: float) -> np.ndarray | None:
    """L = -logm(A M0^-1) / tm (s^-1) from one volume matrix A (Perrin & Gipe 1984).

    Off the diagonal L[i, j] = -k(j -> i); the column sums are R1 of each site.  None when A M0^-1 has no
    real logarithm (a negative or complex eigenvalue: noise too large for this mixing time).
    """
    X = volumes / m0[None, :]
    values, vectors = np.linalg.eig(X)
    if np.any(np.abs(values.imag) > 1e-9 * np.abs(values).max()) or np.any(values.real <= 0):
        return None
    log_x = np.real(vectors @ np.diag(np.log(values.real)) @ np.linalg.inv(vectors))
    return -log_x / mixing_s


def _site_rate_matrix(L: np.ndarray) -> np.ndarray:
    """k(j -> i) off the diagonal, R1 (column sums of L) on it."""
    out = -L.copy()
    np.fill_diagonal(out, L.sum(axis=0))
    return out


def _process_rates(rates: np.ndarray, patterns: np.ndarray) -> np.ndarray:
    """Least-squares forward rates of the processes from site rates k(j -> i) (off-diagonal elements)."""
    off = ~np.eye(rates.shape[0], dtype=bool)
    design = np.stack([-p[off] for p in patterns], axis=1)
    coef, *_ = np.linalg.lstsq(design, rates[off], rcond=None)
    return coef


def matrix_method(experiment: Experiment, m_eq_scale: float, volume_stderr: float | None) -> list[SiteRates]:
    """The matrix method at each mixing time, with Monte Carlo errors over the volume errors, then the
    inverse-variance combination of the mixing times.

    Parameters
    ----------
    experiment : Experiment
        A 2D exchange experiment.
    m_eq_scale : float
        Volume units per unit of M_eq (from the direct fit); M0 = scale x M_eq.  A mixing time of 0
        gives M0 from its diagonal instead.  The site-to-site rates do not depend on this scale; R1 does.
    volume_stderr : float or None
        Standard error of one volume; the table's own errors when None.
    """
    data = experiment.data
    model = experiment.model
    patterns = process_patterns(model)
    populations = model.populations()
    sites = model_sites(model)
    m_eq = np.array([populations[model.state_index(s.state)] * s.nuclei for s in sites])
    zero = np.flatnonzero(data.times_s == 0)
    m0 = np.diag(data.values[zero[0]]).copy() if zero.size else m_eq_scale * m_eq
    sigma = data.stderr if volume_stderr is None else np.full_like(data.values, volume_stderr)
    rng = np.random.default_rng(experiment.options.seed)
    draws = experiment.options.monte_carlo_draws
    connected = np.any(np.abs(patterns) > 0, axis=0)
    results = []
    for k, t in enumerate(data.times_s):
        if t == 0:
            continue
        L = site_rates_from_volumes(data.values[k], m0, t)
        if L is None:
            results.append(SiteRates(float(t), np.full((len(sites),) * 2, np.nan), np.full((len(sites),) * 2, np.nan),
                                     np.full(len(patterns), np.nan), np.full(len(patterns), np.nan),
                                     ["the volume matrix has no real logarithm (a negative or complex eigenvalue of "
                                      "A M0^-1): the noise is too large for the matrix method at this mixing time"]))
            continue
        rates = _site_rate_matrix(L)
        samples, complex_draws = [], 0
        for _ in range(draws):
            noisy = data.values[k] + rng.normal(size=sigma[k].shape) * sigma[k]
            m0_draw = np.diag(data.values[zero[0]] + rng.normal(size=sigma[zero[0]].shape) * sigma[zero[0]]) \
                if zero.size else m0
            Ld = site_rates_from_volumes(noisy, m0_draw, t)
            if Ld is None:
                complex_draws += 1
                continue
            samples.append(_site_rate_matrix(Ld))
        checks = []
        if complex_draws > MAX_COMPLEX_FRACTION * draws:
            checks.append(f"{complex_draws} of {draws} Monte Carlo draws have no real logarithm: errors at this "
                          "mixing time are unreliable (too short a mixing time for the noise)")
        samples = np.array(samples) if samples else np.full((1,) + rates.shape, np.nan)
        stderr = samples.std(axis=0, ddof=1) if len(samples) > 1 else np.full(rates.shape, np.nan)
        proc = np.array([_process_rates(s, patterns) for s in samples])
        checks += _matrix_checks(rates, stderr, m_eq, connected, [s.label for s in sites])
        results.append(SiteRates(float(t), rates, stderr, _process_rates(rates, patterns),
                                 proc.std(axis=0, ddof=1) if len(proc) > 1 else np.full(len(patterns), np.nan), checks))
    usable = [r for r in results if np.all(np.isfinite(r.process_stderr)) and np.all(r.process_stderr > 0)]
    if usable:
        w = np.array([1.0 / r.process_stderr ** 2 for r in usable])
        k = np.array([r.process_rates for r in usable])
        site_w = np.array([1.0 / r.stderr ** 2 for r in usable])
        site_k = np.array([r.rates_per_s for r in usable])
        results.append(SiteRates(math.nan, (site_w * site_k).sum(0) / site_w.sum(0), 1.0 / np.sqrt(site_w.sum(0)),
                                 (w * k).sum(0) / w.sum(0), 1.0 / np.sqrt(w.sum(0)), []))
    return results


def _matrix_checks(rates: np.ndarray, stderr: np.ndarray, m_eq: np.ndarray, connected: np.ndarray,
                   labels: list[str]) -> list[str]:
    """Negative, non-detailed-balanced and unexpected site rates, with what they mean."""
    checks = []
    n = len(labels)
    for i in range(n):
        for j in range(n):
            if i == j:
                continue
            k, s = rates[i, j], stderr[i, j]
            name = f"k({labels[j]} -> {labels[i]}) = {significant(k)} ± {significant(s, 2)} s^-1"
            if k < 0:
                clearly_negative = np.isfinite(s) and k < -CHECK_SIGMAS * s
                checks.append(f"{name} is negative" + (
                    ", beyond its error: a cross peak of opposite sign to the diagonal, as cross-relaxation (NOE) "
                    "of a small molecule gives; exchange alone cannot make it" if clearly_negative else
                    " but within its error of 0: noise on a slow or absent exchange path"))
            elif not connected[i, j] and np.isfinite(s) and k > CHECK_SIGMAS * s:
                checks.append(f"{name} joins sites that no exchange process of the model joins: an exchange path the "
                              "model lacks, or cross-relaxation (NOE, of the same sign as exchange in large or slowly "
                              "tumbling molecules)")
            if j > i:
                flow_ij, flow_ji = k * m_eq[j], rates[j, i] * m_eq[i]
                err = math.hypot(s * m_eq[j], stderr[j, i] * m_eq[i])
                if np.isfinite(err) and abs(flow_ij - flow_ji) > CHECK_SIGMAS * err:
                    checks.append(f"detailed balance fails between {labels[i]} and {labels[j]}: k M_eq is "
                                  f"{significant(flow_ij)} one way and {significant(flow_ji)} the other (beyond {CHECK_SIGMAS:g} "
                                  "errors): wrong populations in the model, unequal excitation of the sites, or "
                                  "volumes distorted by overlap or baseline")
    return checks
