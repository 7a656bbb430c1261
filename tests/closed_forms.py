"""Published closed forms of dynamic-NMR lineshapes, used as outside references in the tests.

Normalisation matches the engine's: a complex spectrum ``S(nu)`` whose real part (absorption,
per Hz) integrates to the number of spins; ``-Im S`` is the dispersion. Frequencies in Hz,
rates in s^-1, linewidths as full width at half height (FWHM) in Hz.
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import brentq


def mcconnell_two_site(freqs_hz, nu_a: float, nu_b: float, k_ab: float, p_a: float,
                       w_a: float, w_b: float) -> np.ndarray:
    """Complex lineshape of one spin hopping between two uncoupled sites.

    Source: McConnell, J. Chem. Phys. 28, 430 (1958) (Bloch equations modified for exchange).
    With ``alpha = i 2pi (nu - nu_a) + pi w_a + k_ab``, ``beta = i 2pi (nu - nu_b) + pi w_b + k_ba``
    the 2x2 solve gives
    ``S = 2 (p_a (beta + k_ab) + p_b (alpha + k_ba)) / (alpha beta - k_ab k_ba)``.

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies (Hz).
    nu_a, nu_b : float
        Site frequencies (Hz).
    k_ab : float
        Rate constant a -> b (s^-1); ``k_ba = k_ab p_a / p_b`` (detailed balance).
    p_a : float
        Population of site a (0 < p_a < 1); ``p_b = 1 - p_a``.
    w_a, w_b : float
        Linewidths without exchange (FWHM, Hz).

    Returns
    -------
    np.ndarray of complex
        S(nu), per Hz; the integral of ``Re S`` is 1.
    """
    freqs = np.asarray(freqs_hz, dtype=float)
    p_b = 1.0 - p_a
    k_ba = k_ab * p_a / p_b
    alpha = 2j * np.pi * (freqs - nu_a) + np.pi * w_a + k_ab
    beta = 2j * np.pi * (freqs - nu_b) + np.pi * w_b + k_ba
    return 2.0 * (p_a * (beta + k_ab) + p_b * (alpha + k_ba)) / (alpha * beta - k_ab * k_ba)


def lorentzian_lines(freqs_hz, positions_hz, intensities, fwhm_hz: float) -> np.ndarray:
    """Complex spectrum of independent lines without exchange.

    Each line is the Bloch-equation response ``2 a / (pi w + i 2pi (nu - nu_0))`` whose real part
    (a Lorentzian of FWHM w) integrates to the intensity a (common practice).

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies (Hz).
    positions_hz, intensities : array_like
        Line positions (Hz) and integrated intensities.
    fwhm_hz : float
        Common FWHM (Hz).

    Returns
    -------
    np.ndarray of complex
        Sum of the complex lines at each frequency.
    """
    freqs = np.asarray(freqs_hz, dtype=float)[:, None]
    positions = np.asarray(positions_hz, dtype=float)[None, :]
    lines = 2.0 * np.asarray(intensities, dtype=float) / (
        np.pi * fwhm_hz + 2j * np.pi * (freqs - positions))
    return lines.sum(axis=1)


def gutowsky_holm_rate(dnu_hz: float) -> float:
    """Coalescence rate of two equally populated uncoupled sites, k_c = pi dnu / sqrt(2) (s^-1).

    Source: Gutowsky & Holm, J. Chem. Phys. 25, 1228 (1956). ``k_c`` is the rate of either
    direction (k_ab = k_ba) in the limit of no intrinsic linewidth.
    """
    return np.pi * dnu_hz / np.sqrt(2.0)


def _coalescence_population_difference(x: float) -> float:
    """|p_a - p_b| at which two sites coalesce, ``((X^2 - 2)/3)^(3/2) / X``, X = 2 pi dnu tau."""
    return ((x * x - 2.0) / 3.0) ** 1.5 / x


def shanan_atidi_bar_eli_rates(dp: float, dnu_hz: float) -> tuple[float, float]:
    """Coalescence rates of two unequally populated uncoupled sites.

    Source: Shanan-Atidi & Bar-Eli, J. Phys. Chem. 74, 961 (1970): with ``dp = p_a - p_b`` and
    ``X = 2 pi dnu tau``, ``tau = 1/(k_ab + k_ba)``, coalescence is at
    ``|dp| = ((X^2 - 2)/3)^(3/2) / X`` (root with X >= sqrt(2), unique: the right side grows
    monotonically from 0). The individual rates follow from ``p_a k_ab = p_b k_ba``.

    Parameters
    ----------
    dp : float
        Population difference p_a - p_b, |dp| < 1.
    dnu_hz : float
        Separation of the two sites (Hz).

    Returns
    -------
    (k_ab, k_ba) : tuple of float
        Rate constants a -> b and b -> a at coalescence (s^-1).
    """
    lower = upper = np.sqrt(2.0)
    while _coalescence_population_difference(upper) <= abs(dp):
        upper *= 2.0
    x = lower if dp == 0 else brentq(lambda v: _coalescence_population_difference(v) - abs(dp), lower, upper,
                                      xtol=1e-15, rtol=4 * np.finfo(float).eps)
    total = 2.0 * np.pi * dnu_hz / x
    p_a = (1.0 + dp) / 2.0
    return total * (1.0 - p_a), total * p_a


def kurland_rubin_wise_rate(dnu_hz: float, j_hz: float) -> float:
    """Coalescence rate of an AB pair under mutual exchange, k_c = (pi/sqrt 2) sqrt(dnu^2 + 6 J^2).

    Source: Kurland, Rubin & Wise, J. Chem. Phys. 40, 2426 (1964). Rates in s^-1, dnu and J in Hz.
    """
    return np.pi / np.sqrt(2.0) * np.hypot(dnu_hz, np.sqrt(6.0) * j_hz)


def slow_exchange_broadening(k_out: float) -> float:
    """Extra FWHM (Hz) of a line whose spin leaves its site at k_out (s^-1): k_out / pi.

    Source: slow-exchange limit of the McConnell equations (J. Chem. Phys. 28, 430 (1958)); the
    lifetime 1/k_out adds k_out to the decay rate pi w.
    """
    return k_out / np.pi


def fast_exchange_excess_width(dnu_hz: float, k_ab: float, p_a: float) -> float:
    """Extra FWHM (Hz) of the averaged line in fast two-site exchange.

    Source: fast-exchange limit of the McConnell equations (J. Chem. Phys. 28, 430 (1958)):
    ``p_a p_b (2 pi dnu)^2 / (pi (k_ab + k_ba))``, with ``k_ba = k_ab p_a / p_b``.
    """
    p_b = 1.0 - p_a
    k_sum = k_ab + k_ab * p_a / p_b
    return p_a * p_b * (2.0 * np.pi * dnu_hz) ** 2 / (np.pi * k_sum)


def ab_quartet(nu_a: float, nu_b: float, j_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """Line positions and intensities of the static AB spin system.

    Source: Pople, Schneider & Bernstein, High-resolution Nuclear Magnetic Resonance (1959):
    lines at ``centre + s_D D/2 + s_J J/2`` (s = +/-1), ``D = sqrt(dnu^2 + J^2)``; the inner pair
    is stronger by ``(1 + J/D)/(1 - J/D)``. Written for either sign of J: the line at
    ``centre + s_D D/2 + s_J J/2`` has intensity ``(1 - s_D s_J J/D)/2``, so the four add up to 2.

    Parameters
    ----------
    nu_a, nu_b : float
        Shifts of the two spins (Hz).
    j_hz : float
        Coupling (Hz).

    Returns
    -------
    (positions, intensities) : tuple of np.ndarray
        Four positions (Hz) and integrated intensities (sum 2, one per spin).
    """
    centre = 0.5 * (nu_a + nu_b)
    d = np.hypot(nu_a - nu_b, j_hz)
    signs = np.array([(1, 1), (1, -1), (-1, 1), (-1, -1)], dtype=float)
    positions = centre + signs[:, 0] * d / 2 + signs[:, 1] * j_hz / 2
    intensities = (1.0 - signs[:, 0] * signs[:, 1] * j_hz / d) / 2
    return positions, intensities


def a2_energy_levels(nu_hz: float, j_hz: float) -> np.ndarray:
    """Energy levels (Hz) of two equivalent coupled spins (A2), ascending.

    Source: Pople, Schneider & Bernstein (1959): triplet ``M nu + J/4`` (M = 1, 0, -1),
    singlet ``-3J/4``.
    """
    triplet = [m * nu_hz + j_hz / 4 for m in (1, 0, -1)]
    return np.sort(np.array(triplet + [-3.0 * j_hz / 4]))


def a2_line(nu_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """Spectrum of an A2 pair: one line at the shift carrying both spins (intensity 2), any J.

    Source: Pople, Schneider & Bernstein (1959): singlet <-> triplet transitions are forbidden
    and the triplet transitions are both at nu.
    """
    return np.array([nu_hz]), np.array([2.0])
