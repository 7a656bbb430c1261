"""How well the global fit describes each spectrum against its measured noise, and what would let it
follow a spectrum it misfits (its quantities freed in that spectrum alone, one Gauss-Newton step each).
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from dnmr.fitting.globalproblem import FAMILY_WORDS, NUISANCE, GlobalProblem
from dnmr.fitting.globaltreatment import Treatment
from dnmr.fitting.problem import error_scale, nuisance_column


@dataclass(frozen=True)
class SpectrumQuality:
    """How well the global fit describes one spectrum, against its measured noise.

    Attributes
    ----------
    file : str
        The spectrum.
    setpoint_k, temperature_k : float
        Its temperature as the series gives it, and the sample temperature used (K).
    points : int
        Points fitted.
    chi_square : float
        sum ((data - global fit) / sigma)^2 over its points, sigma its measured noise.
    two_step_chi_square : float
        The same for its own two-step fit (every parameter free in that spectrum alone).
    correlation_factor : float
        Its noise correlation factor.
    misfit : bool
        Its chi-square per point is significantly above 1 (the rule of a single fit).
    gains : dict
        When a misfit: by how much its chi-square would fall (one Gauss-Newton step) with each family of
        its lineshape quantities ("shifts", "linewidth", "couplings", "rate", "populations") free in this
        spectrum alone.
    """

    file: str
    setpoint_k: float
    temperature_k: float
    points: int
    chi_square: float
    two_step_chi_square: float
    correlation_factor: float
    misfit: bool
    gains: dict = field(default_factory=dict)

    @property
    def per_point(self) -> float:
        """Chi-square per point of the global fit."""
        return self.chi_square / self.points

    @property
    def two_step_per_point(self) -> float:
        """Chi-square per point of the two-step fit."""
        return self.two_step_chi_square / self.points

    def to_dict(self) -> dict:
        """Plain data."""
        return {**dataclasses.asdict(self), "chi_square_per_point": self.per_point,
                "two_step_chi_square_per_point": self.two_step_per_point}


def _family_gains(problem: GlobalProblem, k: int, x: np.ndarray) -> dict[str, float]:
    """Fall of spectrum `k`'s chi-square from one Gauss-Newton step with each family of its lineshape
    quantities free in it alone (its own amplitude, phase, baseline and offset refitted alongside)."""
    m = problem.members[k]
    families = {q.family for q in problem.quantities} - {"offset"}
    D, turned, values = problem.quantity_derivatives(k, x, range(len(problem.quantities)))
    free = [n for n in NUISANCE + m.problem.layout.baseline_names if m.prefix + n in problem.free]
    own = [nuisance_column(n, values, turned, m.problem) for n in free]
    if m.prefix + "offset_hz" in problem.free:
        own.append(D[:, problem.family_rows("offset")[0]])
    residual = problem.member_residual(k, x)
    sigma = m.problem.noise.sigma
    base = np.column_stack(own) / sigma

    def explained(columns: np.ndarray) -> float:
        coef, *_ = np.linalg.lstsq(columns, residual, rcond=None)
        fitted = columns @ coef
        return float(fitted @ fitted)

    floor = explained(base)
    out = {}
    for family in sorted(families):
        cols = problem.family_rows(family)
        out[FAMILY_WORDS[family]] = max(explained(np.column_stack([base, D[:, cols] / sigma])) - floor, 0.0)
    return out


def spectrum_qualities(problem: GlobalProblem, x: np.ndarray, residuals: list[np.ndarray],
                       setpoints: np.ndarray) -> list[SpectrumQuality]:
    """How well the global fit at `x` describes each spectrum.

    Parameters
    ----------
    problem : GlobalProblem
        The solved problem.
    x : ndarray
        The free parameters at the optimum.
    residuals : list of ndarray
        Each spectrum's residuals over its noise at `x`.
    setpoints : ndarray
        Each spectrum's temperature as the series gives it (K).
    """
    out = []
    for k, (m, r) in enumerate(zip(problem.members, residuals)):
        chi2 = float(r @ r)
        own = int(problem.own_columns(k).sum())
        _, flags, _ = error_scale(chi2, r.size - own, m.fit.noise)
        misfit = "misfit" in flags
        two_step = float(m.fit.chi_square)
        out.append(SpectrumQuality(m.fit.source, float(setpoints[k]), m.temperature_k, int(r.size), chi2, two_step,
                                   m.fit.noise.correlation_factor, misfit,
                                   _family_gains(problem, k, x) if misfit else {}))
    return out


def misfit_notes(qualities: list[SpectrumQuality], treatment: Treatment, reduced: float) -> list[str]:
    """Which spectra the global fit does not describe, and what would let it follow them."""
    bad = [q for q in qualities if q.misfit]
    if not bad:
        return [f"reduced chi-square {reduced:.2f} against the measured noise, but no single spectrum misfits "
                "significantly: small misfits spread over the series (check the noise regions)"]
    temps = sorted(q.temperature_k for q in qualities)
    ends = {temps[0], temps[-1]}
    names = ", ".join(f"{q.temperature_k:.1f} K ({Path(q.file).name}: chi-square per point {q.per_point:.2f}, "
                      f"two-step {q.two_step_per_point:.2f})" for q in sorted(bad, key=lambda q: q.temperature_k))
    notes = [f"reduced chi-square {reduced:.2f} against the measured noise: the global model does not describe "
             f"every spectrum. Spectra that misfit: {names}"]
    own_misfit = [q for q in bad if q.two_step_per_point > 1.0 + 3.0 * math.sqrt(2.0 * q.correlation_factor / q.points)]
    if own_misfit:
        notes.append("misfit in their own two-step fit as well (" + ", ".join(f"{q.temperature_k:.1f} K" for q in own_misfit)
                     + "): the model does not describe these spectra even alone (baseline order, phase, an impurity, "
                     "the spin system?); see the two-step notes")
    totals: dict[str, float] = {}
    for q in bad:
        for family, gain in q.gains.items():
            totals[family] = totals.get(family, 0.0) + gain
    excess = sum(q.chi_square - q.points for q in bad)
    if totals and excess > 0:
        family, gain = max(totals.items(), key=lambda item: item[1])
        where = ("at the ends of the temperature range" if all(q.temperature_k in ends for q in bad)
                 else "in these spectra")
        advice = {
            "shifts": ("shifts", treatment.loosened("shift")),
            "linewidth": ("linewidth", treatment.loosened("linewidth")),
            "couplings": ("couplings", treatment.loosened("coupling")),
        }
        text = (f"freeing the {family} of each misfitting spectrum alone would lower chi-square by {gain:.0f} of "
                f"the {excess:.0f} by which these spectra exceed their noise")
        if family in advice:
            _, option = advice[family]
            trend = {"shifts": treatment.shift_trend, "linewidth": treatment.linewidth_trend,
                     "couplings": treatment.coupling_trend}[family]
            text += (f": the {trend} {family} trend cannot follow the data {where}; "
                     + (f"try {option}" if option else "no looser trend is available: check those spectra's referencing "
                        "and region"))
        elif family == "rate":
            text += (": the rates do not follow one Eyring line through these temperatures (wrong temperatures? "
                     "give --calibration; a second process?)")
        else:
            text += ": the populations do not follow van 't Hoff (ln K linear in 1/T) over this range"
        notes.append(text)
    return notes

