"""The result of an Eyring analysis: activation parameters with their covariance, the fitted points, the
bounds checked against the line, and the agreement of the methods.

:func:`dnmr.activation.eyring.eyring_fit` and its siblings make an :class:`EyringResult`; its
:meth:`~EyringResult.to_dict` is the JSON of ``dnmr eyring`` and its :meth:`~EyringResult.report` the
text (:mod:`dnmr.activation.eyring_report`).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from scipy import stats

from dnmr.activation.eyring_report import eyring_report
from dnmr.activation.line_fit import (
    BASIS_GIVEN,
    BASIS_SCALED,
    BASIS_SCATTER,
    Estimate,
    LineFit,
    ResidualCovariance,
    generalised_least_squares,
)
from dnmr.activation.rates import DEFAULT_METHOD, RateSeries, SetAsideRow
from dnmr.kinetics import BOLTZMANN, GAS_CONSTANT, KCAL_PER_KJ, PLANCK, STANDARD_TEMPERATURE_K
from dnmr.notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from dnmr.posterior import Posterior


@dataclass(frozen=True)
class BoundCheck:
    """A rate the data only bound, compared with the fitted Eyring line.

    Attributes
    ----------
    temperature_k : float
        Temperature of the row, K.
    rate_lower, rate_upper : float
        The bounds, s^-1 (NaN for an open side).
    fitted_rate_per_s : float
        Rate of the fitted line at this temperature, s^-1.
    fitted_ln_stderr : float
        Standard error of ln(fitted rate).
    violated : bool
        True when the fitted rate lies outside the bounds.
    sigma : float
        How many standard errors of the line the fitted rate lies beyond the violated bound (0 when
        it respects the bounds).
    where : str
        The row ('line N').
    method : str
        How the row's rate was measured.
    """

    temperature_k: float
    rate_lower: float
    rate_upper: float
    fitted_rate_per_s: float
    fitted_ln_stderr: float
    violated: bool
    sigma: float
    where: str
    method: str = DEFAULT_METHOD

    def describe(self) -> str:
        """One line: the bound and whether the line respects it."""
        if not self.violated:
            return f"respected at {self.temperature_k:g} K"
        side = "above the upper" if self.fitted_rate_per_s > self.rate_upper else "below the lower"
        return (
            f"the fitted line ({self.fitted_rate_per_s:.3g} s^-1) lies {side} bound at {self.temperature_k:g} K "
            f"({self.where}) by {self.sigma:.1f} standard errors"
        )

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready): the bounds, the line's rate there, whether and how far it is violated."""
        return {"temperature_k": self.temperature_k, "rate_lower": self.rate_lower, "rate_upper": self.rate_upper,
                "fitted_rate_per_s": self.fitted_rate_per_s, "violated": self.violated, "sigma": self.sigma,
                "method": self.method}

    @classmethod
    def against_line(cls, line: LineFit, temperature_k: float, lower: float, upper: float, where: str,
                     method: str = DEFAULT_METHOD) -> "BoundCheck":
        """The bounds `lower`, `upper` (s^-1; NaN for an open side) of the row at `where`, at `temperature_k`
        (K), compared with the Eyring `line`."""
        t = temperature_k
        ln_fit, se = line.predict(t)
        ln_fit = float(ln_fit + np.log(t))  # Eyring ordinate -> ln k
        beyond = max(
            np.log(lower) - ln_fit if np.isfinite(lower) else -np.inf,
            ln_fit - np.log(upper) if np.isfinite(upper) else -np.inf,
        )
        violated = bool(beyond > 0)
        with np.errstate(divide="ignore"):
            sigma = float(beyond / se) if violated else 0.0  # NaN when the line's error is not determined
        return cls(t, lower, upper, math.exp(ln_fit), float(se), violated, sigma, where, method)


@dataclass(frozen=True)
class EyringResult(NotebookView):
    """Eyring (and Arrhenius) analysis of one exchange process.

    Energies in kJ/mol, entropies in J/(mol K); the ``*_kcal_*`` keys of :meth:`to_dict` give kcal/mol
    and cal/(mol K). Use :meth:`gibbs` for ΔG‡ at any temperature, :meth:`report` (or ``print``) for a
    readable summary, :meth:`plot` for the figures.

    Attributes
    ----------
    series : RateSeries
        The input, all rows (bounds included).
    used : ndarray of bool
        Rows that entered the fit.
    eyring, arrhenius : LineFit
        The two straight-line fits.
    transmission : float
        Transmission coefficient kappa.
    error_basis : str
        Where the standard errors come from (a ``BASIS_*`` value of :mod:`dnmr.activation.line_fit`).
    flagged_rows : str
        What was done with rows whose fit is flagged ("exclude" or "widen"; see
        :mod:`dnmr.activation.rate_table`).
    studentised_residuals : ndarray
        Studentised residual of each fitted point (NaN where it cannot be formed).
    outliers : ndarray of bool
        Fitted points flagged as possible outliers (see `outlier_threshold` of
        :func:`~dnmr.activation.eyring.eyring_fit_series`).
    bounds : tuple of BoundCheck
        The bound rows, checked against the line.
    warnings : tuple of str
        What the user should know about the reliability of the numbers.
    """

    series: RateSeries
    used: np.ndarray
    eyring: LineFit
    arrhenius: LineFit
    transmission: float
    error_basis: str
    flagged_rows: str
    studentised_residuals: np.ndarray
    outliers: np.ndarray
    bounds: tuple[BoundCheck, ...]
    warnings: tuple[str, ...] = field(default=())

    # ---- the points -------------------------------------------------------------------------------
    @property
    def process(self) -> str:
        """Name of the exchange process."""
        return self.series.process

    @property
    def temperature_k(self) -> np.ndarray:
        """Temperatures of the fitted rates, K."""
        return self.series.temperature_k[self.used]

    @property
    def rate_per_s(self) -> np.ndarray:
        """Fitted rates, s^-1."""
        return self.series.rate_per_s[self.used]

    @property
    def methods(self) -> np.ndarray:
        """Method of each fitted rate ("lineshape", "inversion", ...)."""
        return self.series.methods[self.used]

    @property
    def method_names(self) -> tuple[str, ...]:
        """The distinct methods of the rows (fitted and bounds), in order of first appearance."""
        return self.series.method_names

    def method_offsets(self) -> dict[str, Estimate]:
        """How far each method's rates lie from the line through the others', in ln k (see :func:`method_offset`).

        Empty for a single method; for two, only the second (the first is its mirror image).
        """
        names = list(dict.fromkeys(self.methods.tolist()))
        if len(names) < 2:
            return {}
        return {name: method_offset(self, name) for name in (names[1:] if len(names) == 2 else names)}

    @property
    def ln_rate_stderr(self) -> np.ndarray:
        """Standard error of ln k of each fitted rate (the scatter about the line without rate errors)."""
        return 1.0 / np.sqrt(self.eyring.weights) * (1.0 if self.errors_given else self.eyring.scatter)

    @property
    def errors_given(self) -> bool:
        """True when every fitted rate has a stated standard error (``rate_stderr``)."""
        return bool(np.isfinite(self.series.rate_stderr[self.used]).all())

    @property
    def errors_scaled(self) -> bool:
        """True when the errors rest on the scatter about the line: no rate errors (:data:`BASIS_SCATTER`), or
        rate errors scaled by the reduced chi-square (:data:`BASIS_SCALED`); False when the rate errors are
        taken as given (:data:`BASIS_GIVEN`)."""
        return self.error_basis != BASIS_GIVEN

    @property
    def ln_kappa_kb_over_h(self) -> float:
        """ln(kappa kB / h), with kB / h in K^-1 s^-1: the intercept of the Eyring line ln(k/T) against 1/T when
        ΔS‡ = 0."""
        return math.log(self.transmission * BOLTZMANN / PLANCK)

    # ---- activation parameters --------------------------------------------------------------------
    @property
    def enthalpy_kj_mol(self) -> float:
        """ΔH‡, kJ/mol."""
        return self.eyring.energy.value

    @property
    def enthalpy_stderr(self) -> float:
        """Standard error of ΔH‡, kJ/mol."""
        return self.eyring.energy.stderr

    @property
    def entropy_j_mol_k(self) -> float:
        """ΔS‡, J/(mol K)."""
        return GAS_CONSTANT * (self.eyring.intercept - self.ln_kappa_kb_over_h)

    @property
    def entropy_stderr(self) -> float:
        """Standard error of ΔS‡, J/(mol K)."""
        return GAS_CONSTANT * math.sqrt(self.eyring.covariance[0, 0])

    @property
    def correlation(self) -> float:
        """Correlation coefficient of ΔH‡ and ΔS‡ (close to +1 for any single series)."""
        c = self.eyring.covariance
        return float(-c[0, 1] / math.sqrt(c[0, 0] * c[1, 1]))

    @property
    def harmonic_mean_temperature_k(self) -> float:
        """Harmonic mean of the fitted temperatures, weighted as in the fit, K.

        Here ΔG‡ is statistically uncorrelated with ΔH‡ (Grieger, Hunter & Krug, Nature 261, 566 (1976)).
        """
        w = self.eyring.weights
        return float(w.sum() / (w / self.temperature_k).sum())

    @property
    def uncorrelated_temperature_k(self) -> float:
        """Temperature (K) at which ΔG‡ is uncorrelated with ΔH‡ under the full covariance.

        Equals :attr:`harmonic_mean_temperature_k` when the temperatures are exact; temperature errors
        move it a little.
        """
        c = self.eyring.covariance
        return float(-c[1, 1] / c[0, 1])

    def gibbs(self, temperature_k: float | np.ndarray = STANDARD_TEMPERATURE_K) -> Estimate:
        """ΔG‡ = ΔH‡ - T ΔS‡ and its standard error (kJ/mol) at `temperature_k` (K)."""
        t = np.asarray(temperature_k, dtype=float)
        value = self.enthalpy_kj_mol - t * self.entropy_j_mol_k / 1e3
        c = self.eyring.covariance  # ΔG‡ = -R (slope + T (intercept - const)): gradient -R (T, 1)
        stderr = GAS_CONSTANT / 1e3 * np.sqrt(c[0, 0] * t * t + 2 * c[0, 1] * t + c[1, 1])
        return Estimate(float(value), float(stderr)) if t.ndim == 0 else Estimate(value, stderr)

    def gibbs_enthalpy_correlation(self, temperature_k: float) -> float:
        """Correlation coefficient of ΔG‡ at `temperature_k` (K) with ΔH‡."""
        c = self.eyring.covariance
        cov = c[1, 1] + temperature_k * c[0, 1]  # cov(b + T a, b), in units of R^2
        return float(cov / math.sqrt(c[1, 1] * (c[1, 1] + 2 * temperature_k * c[0, 1] + temperature_k**2 * c[0, 0])))

    @property
    def activation_energy_kj_mol(self) -> float:
        """Arrhenius activation energy Ea, kJ/mol."""
        return self.arrhenius.energy.value

    @property
    def activation_energy_stderr(self) -> float:
        """Standard error of Ea, kJ/mol."""
        return self.arrhenius.energy.stderr

    @property
    def ln_prefactor(self) -> float:
        """ln(A / s^-1) of the Arrhenius equation k = A exp(-Ea/RT)."""
        return self.arrhenius.intercept

    @property
    def ln_prefactor_stderr(self) -> float:
        """Standard error of ln(A / s^-1)."""
        return math.sqrt(self.arrhenius.covariance[0, 0])

    def ln_rate(self, temperature_k: float | np.ndarray) -> Estimate:
        """ln(k / s^-1) of the fitted Eyring line at `temperature_k` (K), with its standard error."""
        y, se = self.eyring.predict(temperature_k)
        return Estimate(y + np.log(temperature_k), se)

    @property
    def band_quantile(self) -> float:
        """Multiplier of the standard error for a 95 % confidence band of the line.

        Normal quantile when the errors rest on given rate errors, Student t with n - 2 degrees of freedom
        when they rest on the scatter.
        """
        if not self.errors_scaled:
            return float(stats.norm.ppf(0.975))
        return float(stats.t.ppf(0.975, self.eyring.dof)) if self.eyring.dof > 0 else math.nan

    # ---- output -----------------------------------------------------------------------------------
    def to_dict(self) -> dict:
        """Plain dict (JSON-ready) of the results; NaN where a quantity is not determined."""
        return {
            **self._parameters_dict(),
            **self._fit_dict(),
            "flagged_rows": self.flagged_rows,
            "set_aside": [self._set_aside_point(row) for row in self.series.set_aside],
            "points": [self._point(i) for i in range(int(self.used.sum()))],
            "bounds": [b.to_dict() for b in self.bounds],
            "warnings": list(self.warnings),
        }

    def _parameters_dict(self) -> dict:
        """The activation parameters of :meth:`to_dict`, in kJ/mol and J/(mol K) and in kcal/mol and cal/(mol K)."""
        t_hm = self.harmonic_mean_temperature_k
        g298, g_hm = self.gibbs(STANDARD_TEMPERATURE_K), self.gibbs(t_hm)
        return {
            "process": self.process,
            "enthalpy_kj_mol": self.enthalpy_kj_mol,
            "enthalpy_stderr": self.enthalpy_stderr,
            "entropy_j_mol_k": self.entropy_j_mol_k,
            "entropy_stderr": self.entropy_stderr,
            "gibbs_298_kj_mol": g298.value,
            "gibbs_298_stderr": g298.stderr,
            "harmonic_mean_temperature_k": t_hm,
            "gibbs_hm_kj_mol": g_hm.value,
            "gibbs_hm_stderr": g_hm.stderr,
            "correlation_enthalpy_entropy": self.correlation,
            "correlation_gibbs_hm_enthalpy": self.gibbs_enthalpy_correlation(t_hm),
            "uncorrelated_temperature_k": self.uncorrelated_temperature_k,
            "enthalpy_kcal_mol": self.enthalpy_kj_mol * KCAL_PER_KJ,
            "enthalpy_kcal_stderr": self.enthalpy_stderr * KCAL_PER_KJ,
            "entropy_cal_mol_k": self.entropy_j_mol_k * KCAL_PER_KJ,
            "entropy_cal_stderr": self.entropy_stderr * KCAL_PER_KJ,
            "gibbs_298_kcal_mol": g298.value * KCAL_PER_KJ,
            "gibbs_298_kcal_stderr": g298.stderr * KCAL_PER_KJ,
            "gibbs_hm_kcal_mol": g_hm.value * KCAL_PER_KJ,
            "gibbs_hm_kcal_stderr": g_hm.stderr * KCAL_PER_KJ,
        }

    def _fit_dict(self) -> dict:
        """The Arrhenius line, the rates and methods, and the statistics of the fit, for :meth:`to_dict`."""
        line = self.eyring
        return {
            "activation_energy_kj_mol": self.activation_energy_kj_mol,
            "activation_energy_stderr": self.activation_energy_stderr,
            "ln_prefactor": self.ln_prefactor,
            "ln_prefactor_stderr": self.ln_prefactor_stderr,
            "transmission": self.transmission,
            "n_rates": int(self.used.sum()),
            "n_bounds": len(self.bounds),
            "methods": {m: int((self.methods == m).sum()) for m in self.method_names},
            "method_offsets": {m: {"ln_rate_offset": e.value, "ln_rate_offset_stderr": e.stderr}
                               for m, e in self.method_offsets().items()},
            "temperature_min_k": float(self.temperature_k.min()),
            "temperature_max_k": float(self.temperature_k.max()),
            "error_basis": self.error_basis,
            "chi_square": line.chi_square,
            "degrees_of_freedom": line.dof,
            "reduced_chi_square": line.chi_square / line.dof if line.dof > 0 else math.nan,
            "chi_square_p_value": self.chi_square_p_value(),
            "ln_rate_scatter": line.scatter if not self.errors_given else math.nan,
            "temperature_errors": self._temperature_error_text(),
            "temperature_error_sources": list(self.temperature_error_sources),
            "error_shares": self.error_shares(),
        }

    def _point(self, i: int) -> dict:
        t = float(self.temperature_k[i])
        setpoint = math.nan if self.series.setpoint_k is None else float(self.series.setpoint_k[self.used][i])
        return {
            "setpoint_k": setpoint,
            "temperature_k": t,
            "temperature_stderr": float(self.series.temperature_stderr[self.used][i]),
            "rate_per_s": float(self.rate_per_s[i]),
            "rate_stderr": float(self.series.rate_stderr[self.used][i]),
            "fitted_rate_per_s": float(np.exp(self.ln_rate(t).value)),
            "studentised_residual": float(self.studentised_residuals[i]),
            "outlier": bool(self.outliers[i]),
            "method": str(self.methods[i]),
        }

    @property
    def temperature_error_sources(self) -> tuple[str, ...]:
        """The shared temperature errors carried into the fit ("calibration", "probe offset" ...)."""
        return tuple(dict.fromkeys(self.series.temperature_errors.sources))

    def _temperature_error_text(self) -> str:
        errors = self.series.temperature_errors.subset(self.used)
        if not errors.any:
            return "none"
        kinds = (["independent"] if errors.independent_k.any() else []) + [
            f"shared ({name})" for name in self.temperature_error_sources]
        return " and ".join(kinds)

    def error_shares(self) -> dict:
        """Share of each source in the variance of ΔH‡, ΔS‡ and ΔG‡(298.15 K): fractions adding up to 1.

        Sources: "rates" (or "scatter" when the errors come from the scatter about the line),
        "temperature scatter", "held trends" (rate errors shared through the trends ``dnmr fit`` held) and
        each shared temperature error ("calibration", "probe offset", ...).
        """
        t = STANDARD_TEMPERATURE_K
        contrasts = {"enthalpy": np.array([0.0, 1.0]), "entropy": np.array([1.0, 0.0]),
                     "gibbs_298": np.array([t, 1.0])}
        out = {}
        for quantity, c in contrasts.items():
            variances = {name: float(c @ part @ c) for name, part in self.eyring.covariance_parts.items()}
            total = sum(variances.values())
            out[quantity] = {name: v / total if total > 0 else math.nan for name, v in variances.items()}
        return out

    def set_aside_deviation(self, row: SetAsideRow) -> float:
        """How far a set-aside rate lies from the line, in standard errors of both (NaN without an error)."""
        ln_fit, se = self.ln_rate(row.temperature_k)
        return float((math.log(row.rate_per_s) - ln_fit) / math.hypot(row.ln_rate_stderr, se))

    def _set_aside_point(self, row: SetAsideRow) -> dict:
        return {"temperature_k": row.temperature_k, "rate_per_s": row.rate_per_s, "where": row.where,
                "reason": row.reason, "fitted_rate_per_s": float(np.exp(self.ln_rate(row.temperature_k).value)),
                "deviation_sigma": self.set_aside_deviation(row)}

    def chi_square_p_value(self) -> float:
        """Probability of a chi-square at least as large as the fit's, with its degrees of freedom (NaN without
        rate errors or without degrees of freedom)."""
        line = self.eyring
        if not np.isfinite(line.chi_square) or line.dof <= 0:
            return math.nan
        return float(stats.chi2.sf(line.chi_square, line.dof))

    def report(self) -> str:
        """Readable multi-line summary: parameters with errors, fit statistics, points, bounds, warnings."""
        return eyring_report(self)

    def __str__(self) -> str:
        return self.report()

    def plot(self, figure: "Figure | None" = None) -> "Figure":
        """Eyring plot with fit, 95 % confidence band and residuals (see :func:`dnmr.reporting.eyringplot.plot_eyring`)."""
        from dnmr.reporting.eyringplot import plot_eyring

        return plot_eyring([self], figure=figure)

    def sample_posterior(self, **settings) -> "Posterior":
        """Posterior samples of ΔH‡, ΔS‡ and ΔG‡ (needs emcee); see
        :func:`dnmr.activation.posterior.sample_eyring_posterior` for the method and the settings (steps,
        walkers, burn, thin, seed)."""
        from dnmr.activation.posterior import sample_eyring_posterior

        return sample_eyring_posterior(self, **settings)


def method_offset(result: EyringResult, method: str) -> Estimate:
    """Offset of one method's rates from the Eyring line through the other rates, in ln k, with its error.

    The line is refitted with one more coefficient, a constant added to ln k for the rows of `method`,
    weighted as the line was (generalised least squares with its rate and temperature errors); the
    coefficient's variance is that of this estimate under the line's full covariance (a V_full a^T, a the
    coefficient's row of the linear map), so rate errors shared through held trends, which move one
    method's rows together against the others', count as correlated, as in the line's errors. The
    coefficient and its standard error say whether the methods agree (a systematic difference between
    them shows as an offset several standard errors from zero). Without rate errors the error comes from
    the scatter about the three-coefficient fit alone (NaN with fewer than 4 rates). NaN when the rows cannot
    separate an offset from the line (all rows of the method at one temperature and all others at another).

    Parameters
    ----------
    result : EyringResult
        A joint analysis.
    method : str
        One of its methods.

    Returns
    -------
    Estimate
        Offset of ln(k / s^-1) and its standard error (0.1 is about 10 % in k).
    """
    line = result.eyring
    x = 1.0 / result.temperature_k
    y = np.log(result.rate_per_s) - np.log(result.temperature_k)
    design = np.column_stack([np.ones_like(x), x, (result.methods == method).astype(float)])
    if np.linalg.matrix_rank(design) < 3:
        return Estimate(math.nan, math.nan)
    dof = len(x) - 3
    if result.error_basis == BASIS_SCATTER:
        fit = generalised_least_squares(design, y, ResidualCovariance(np.ones_like(x), np.zeros((len(x), 0))))
        return Estimate(float(fit.beta[2]), math.sqrt(fit.normal[2, 2] * fit.chi_square / dof) if dof > 0 else math.nan)
    fit = generalised_least_squares(design, y, line.residual_covariance)
    variance = line.full_covariance.sandwich(fit.linear_map[2:])[0, 0]
    if result.error_basis == BASIS_SCALED and dof > 0:
        variance *= generalised_least_squares(design, y, line.full_covariance).chi_square / dof
    return Estimate(float(fit.beta[2]), math.sqrt(variance))
