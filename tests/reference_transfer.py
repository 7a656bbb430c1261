"""Published closed forms and an independent integrator for longitudinal magnetisation under exchange,
used as outside references in the tests of dnmr.engine.longitudinal and dnmr.fitting.transfer.

Nothing here uses dnmr: site rates are written out by hand, and the equations are the Bloch–McConnell
equations for z-magnetisation, dM/dt = -R1 (M - M_eq) + exchange in - exchange out.
"""
from __future__ import annotations

import math

import numpy as np
from scipy.integrate import solve_ivp


def two_site_recovery(times_s, m0, m_eq, r1, k_ab: float, k_ba: float) -> np.ndarray:
    """M_a(t), M_b(t) of two exchanging sites: the biexponential solution.

    Source: McConnell, J. Chem. Phys. 28, 430 (1958): with A = R1a + k_ab, B = R1b + k_ba the decay
    rates are lambda± = ½[(A + B) ± sqrt((A - B)² + 4 k_ab k_ba)] and each deviation from equilibrium is
    a sum of exp(-lambda+ t) and exp(-lambda- t); the amplitudes follow from M(0) and
    dM_a/dt(0) = -A Δa(0) + k_ba Δb(0).

    Returns array (n_times, 2).
    """
    t = np.asarray(times_s, dtype=float)
    A, B = r1[0] + k_ab, r1[1] + k_ba
    root = math.sqrt((A - B) ** 2 + 4.0 * k_ab * k_ba)
    lp, lm = 0.5 * (A + B + root), 0.5 * (A + B - root)
    out = []
    for d0, d_rate in ((m0[0] - m_eq[0], -A * (m0[0] - m_eq[0]) + k_ba * (m0[1] - m_eq[1])),
                       (m0[1] - m_eq[1], -B * (m0[1] - m_eq[1]) + k_ab * (m0[0] - m_eq[0]))):
        # d(t) = c+ e^(-l+ t) + c- e^(-l- t), c+ + c- = d0, -l+ c+ - l- c- = d'(0)
        c_plus = (-d_rate - lm * d0) / (lp - lm)
        out.append(c_plus * np.exp(-lp * t) + (d0 - c_plus) * np.exp(-lm * t))
    return np.column_stack(out) + np.asarray(m_eq, dtype=float)


def forsen_hoffman(times_s, m_eq_a: float, r1_a: float, k_ab: float) -> np.ndarray:
    """M_a(t) while site b is saturated from t = 0 on.

    Source: Forsén & Hoffman, J. Chem. Phys. 39, 2892 (1963): M_a approaches
    M_a,eq R1a / (R1a + k_ab) with the rate R1a + k_ab, from M_a,eq at t = 0.
    """
    t = np.asarray(times_s, dtype=float)
    rate = r1_a + k_ab
    steady = m_eq_a * r1_a / rate
    return steady + (m_eq_a - steady) * np.exp(-rate * t)


def integrate_sites(times_s, m0, m_eq, r1, site_rates: dict[tuple[int, int], float],
                    saturated: tuple[int, ...] = ()) -> np.ndarray:
    """M(t) of every site by numerical integration (scipy.integrate.solve_ivp, implicit Radau, tight
    tolerances) of dM_i/dt = -R1_i (M_i - M_eq,i) + sum_j [k(j -> i) M_j - k(i -> j) M_i].

    Exchange moves the deviations from equilibrium as well as the whole magnetisation, because detailed
    balance makes the equilibrium flows cancel; written with M itself here, so the test also checks that.
    `site_rates` maps (i, j) to k(i -> j) in s^-1.  Saturated sites are held at 0.  Returns (n_times, n).
    """
    n = len(m_eq)
    m_eq = np.asarray(m_eq, dtype=float)
    r1 = np.asarray(r1, dtype=float)
    keep = np.array([i not in saturated for i in range(n)])

    def rhs(_t, m):
        m = np.where(keep, m, 0.0)
        dm = -r1 * (m - m_eq)
        for (i, j), k in site_rates.items():
            dm[j] += k * m[i]
            dm[i] -= k * m[i]
        return np.where(keep, dm, 0.0)

    start = np.where(keep, np.asarray(m0, dtype=float), 0.0)
    t = np.asarray(times_s, dtype=float)
    sol = solve_ivp(rhs, (0.0, float(t.max())), start, t_eval=t, method="Radau", rtol=1e-11, atol=1e-13)
    return sol.y.T
