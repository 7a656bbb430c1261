"""Activation parameters from exchange rates: Eyring and Arrhenius analysis, and the coalescence estimate.

Method
------
The Eyring equation k = kappa (kB T / h) exp(dS‡/R) exp(-dH‡/RT) is a straight line

    ln(k/T) = [ln(kappa kB / h) + dS‡/R] - (dH‡/R) (1/T),

fitted by weighted least squares with weights 1/sigma^2, sigma = rate_stderr / rate (the standard error
of ln k). dH‡ = -R * slope, dS‡ = R * (intercept - ln(kappa kB/h)); dG‡(T) = dH‡ - T dS‡ with its
standard error from the full covariance of slope and intercept. The Arrhenius line ln k = ln A - Ea/(RT)
is fitted the same way. Energies in kJ/mol (kcal/mol alongside), entropies in J/(mol K).

Standard errors
---------------
* Rate errors given (every rate has ``rate_stderr``): the errors are taken at face value (covariance
  (X^T W X)^-1, not rescaled) and the reduced chi-square is reported with its p-value; a poor value
  raises a warning. ``scale_errors=True`` multiplies the covariance by the reduced chi-square instead.
* No rate errors: unit weights, and the errors come from the residual scatter about the line
  (ordinary least squares; needs at least 3 rates, with 2 the errors are reported as not determined).

Temperature errors
------------------
Temperature uncertainties (per point, one value for all, or a full covariance from a calibration in
which the errors of different points are correlated) are propagated by Monte Carlo: the temperatures
are redrawn ``monte_carlo_draws`` times from their normal distribution (``seed`` fixes the generator;
the default seed makes reports reproducible), each draw is refitted with the same weights, and the
covariance of the refitted intercept and slope is added to the covariance from the rates. Random and
systematic (calibration) temperature errors are both covered. Without rate errors the residual scatter
already contains the random part of the temperature errors, so that part is counted twice there
(conservative). The reduced chi-square counts each point's temperature error through its effect on the
residual (effective variance).

Bounds, outliers, warnings
--------------------------
Rows that are bounds (empty ``rate_stderr``, ``rate_lower`` and/or ``rate_upper`` filled) never enter the
fit; they are reported and checked against the fitted line (a bound the line violates is flagged).
Outliers are flagged by studentised residuals (beyond 3 standard deviations by default, common
practice; judged one at a time so that one gross outlier does not make its neighbours look bad), never
removed.
Warnings are raised for a temperature span under 30 K (dS‡ poorly determined, common practice) and for
fewer than 4 rates.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, NamedTuple

import numpy as np
from scipy import stats

from .errors import InputError, did_you_mean
from .kinetics import (
    BOLTZMANN,
    GAS_CONSTANT,
    KCAL_PER_KJ,
    PLANCK,
    STANDARD_TEMPERATURE_K,
    eyring_barrier,
)
from .tables import check_kelvin, read_table
from .notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from .posterior import Posterior
    from .thermometry import TemperatureCalibration

RATE_COLUMNS_REQUIRED = ("temperature_k", "rate_per_s")
RATE_COLUMNS_OPTIONAL = ("rate_stderr", "temperature_stderr", "rate_lower", "rate_upper", "process", "status",
                         "ci68_low_per_s", "ci68_high_per_s")
#: Fit statuses (``dnmr fit``) whose rows carry no rate information at all.
STATUS_WITHOUT_RATE = ("failed", "undetermined")
NARROW_SPAN_K = 30.0  # common practice: a narrower span leaves dS‡ poorly determined
FEW_RATES = 4
OUTLIER_THRESHOLD = 3.0  # common practice for studentised residuals
MAX_RELATIVE_TEMPERATURE_ERROR = 0.2
LEVERAGE_TOLERANCE = 1e-9  # 1 - h below this: the point fixes the line, its residual cannot be judged


class Estimate(NamedTuple):
    """A value with its standard error (same unit)."""

    value: float | np.ndarray
    stderr: float | np.ndarray


# --------------------------------------------------------------------------------------------------
# Input: a series of rates of one process
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RateSeries:
    """Rates of one exchange process at several temperatures.

    Attributes
    ----------
    process : str
        Name of the exchange process ('' when the table has no process column).
    temperature_k : ndarray
        Sample temperature of each row, K.
    rate_per_s : ndarray
        Rate constant, s^-1 (NaN where a bound row gives no value).
    rate_stderr : ndarray
        Standard error of the rate, s^-1 (NaN where not given).
    rate_lower, rate_upper : ndarray
        Bounds of the rate, s^-1, for rows the data only bound (NaN where not given).
    temperature_covariance : ndarray
        Covariance of the temperatures, K^2 (zeros when the temperatures are taken as exact).
    source : str or None
        File the series was read from.
    lines : tuple of int or None
        File line of each row.
    notes : tuple of str
        What was done with rows of a fit table that are not plain values (left out, or an interval used).
    """

    process: str
    temperature_k: np.ndarray
    rate_per_s: np.ndarray
    rate_stderr: np.ndarray
    rate_lower: np.ndarray
    rate_upper: np.ndarray
    temperature_covariance: np.ndarray
    source: str | None = None
    lines: tuple[int, ...] | None = None
    notes: tuple[str, ...] = ()

    def __len__(self) -> int:
        return len(self.temperature_k)

    @property
    def temperature_stderr(self) -> np.ndarray:
        """Standard error of each temperature, K."""
        return np.sqrt(np.diag(self.temperature_covariance))

    @property
    def is_bound(self) -> np.ndarray:
        """True for rows that only bound the rate (no rate_stderr, a rate_lower or rate_upper given)."""
        return ~np.isfinite(self.rate_stderr) & (np.isfinite(self.rate_lower) | np.isfinite(self.rate_upper))

    def where(self, row: int) -> str:
        """Where a row is, for messages: 'line N' of the file, or 'row N' for arrays."""
        return f"line {self.lines[row]}" if self.lines else f"row {row + 1}"

    def with_temperatures(self, temperature_k: np.ndarray, covariance: np.ndarray) -> "RateSeries":
        """Copy with new temperatures (K) whose covariance (K^2) adds to the present one.

        Used to replace set-point temperatures by calibrated sample temperatures.
        """
        return replace(
            self,
            temperature_k=np.asarray(temperature_k, dtype=float),
            temperature_covariance=self.temperature_covariance + np.asarray(covariance, dtype=float),
        )


def _vector(values, name: str, n: int | None = None, *, scalar: bool = False, fill: float = np.nan) -> np.ndarray:
    if values is None:
        return np.full(n, fill)
    array = np.asarray(values, dtype=float)
    if scalar and array.ndim == 0:
        return array
    if array.ndim != 1 or (n is not None and len(array) != n):
        raise InputError(f"must be a list of {n if n is not None else 'the'} numbers, one per rate", where=name)
    return array


def _check_temperature_stderr(stderr: np.ndarray, source: str | None, where) -> None:
    for i in np.flatnonzero(~(stderr >= 0)):
        raise InputError(f"temperature_stderr must be zero or positive (K), got {stderr[i]:g}", source, where(i))


def _checked_covariance(matrix, n: int) -> np.ndarray:
    c = np.asarray(matrix, dtype=float)
    if c.shape != (n, n) or not np.isfinite(c).all():
        raise InputError(f"must be a finite {n} x {n} matrix (K^2), got shape {c.shape}", where="temperature_covariance")
    if not np.allclose(c, c.T) or np.linalg.eigvalsh(c).min() < -1e-9 * max(np.abs(c).max(), 1e-300):
        raise InputError("must be symmetric and positive semi-definite", where="temperature_covariance")
    return c


def read_rates(path: str | Path, temperature_stderr: float | None = None) -> list[RateSeries]:
    """Read a rates table (CSV) into one :class:`RateSeries` per process, in order of appearance.

    Columns: ``temperature_k`` and ``rate_per_s`` (required); ``rate_stderr``, ``temperature_stderr``,
    ``rate_lower``, ``rate_upper``, ``process`` (optional); other columns are ignored. This is the
    ``rates.csv`` that ``dnmr fit`` writes, or a table of your own.

    Parameters
    ----------
    path : str or Path
        The CSV file.
    temperature_stderr : float, optional
        One standard error (K) for every temperature, when the table has no temperature_stderr column.

    Raises
    ------
    InputError
        Missing column, non-numeric cell, a temperature that looks like degrees Celsius, a negative rate,
        a rate with neither value nor bounds... naming the file and line.
    """
    table = read_table(path, RATE_COLUMNS_REQUIRED, RATE_COLUMNS_OPTIONAL)
    if temperature_stderr is not None and table.has("temperature_stderr"):
        raise InputError(
            "the table has a temperature_stderr column and one value was given as well; use one of them",
            table.source,
        )
    numbers = {name: table.numbers(name, allow_empty=name != "temperature_k") for name in RATE_COLUMNS_REQUIRED}
    for name in ("rate_stderr", "rate_lower", "rate_upper"):
        numbers[name] = table.numbers(name, allow_empty=True) if table.has(name) else np.full(len(table), np.nan)
    if table.has("temperature_stderr"):
        t_err = table.numbers("temperature_stderr")
        _check_temperature_stderr(t_err, table.source, table.where)
    else:
        t_err = np.full(len(table), 0.0 if temperature_stderr is None else float(temperature_stderr))
        _check_temperature_stderr(t_err, table.source, lambda i: "--temperature-stderr")
    processes = table.text("process") if table.has("process") else ("",) * len(table)
    status = table.text("status") if table.has("status") else ("",) * len(table)
    notes = _apply_fit_status(table, status, numbers)
    series = []
    for name in dict.fromkeys(processes):
        rows = np.array([p == name for p in processes]) & ~np.isin(status, STATUS_WITHOUT_RATE)
        one = RateSeries(
            process=name,
            temperature_k=numbers["temperature_k"][rows],
            rate_per_s=numbers["rate_per_s"][rows],
            rate_stderr=numbers["rate_stderr"][rows],
            rate_lower=numbers["rate_lower"][rows],
            rate_upper=numbers["rate_upper"][rows],
            temperature_covariance=np.diag(t_err[rows] ** 2),
            source=table.source,
            lines=tuple(np.array(table.lines)[rows].tolist()),
            notes=tuple(note for process, note in notes if process == name),
        )
        check_rate_series(one)
        series.append(one)
    return series


def _apply_fit_status(table, status, numbers) -> list[tuple[str, str]]:
    """Rows of a ``dnmr fit`` table that are not plain values: left out, or a 68 % interval used as a value.

    A profile interval (status ``interval``) is a measurement with an asymmetric error, not a bound: it is
    used with the standard error of ln k taken as half the interval's width in ln k.  Rows whose fit failed
    or left the rate undetermined carry nothing and are left out.  Returns (process, note) pairs.
    """
    processes = table.text("process") if table.has("process") else ("",) * len(table)
    notes = []
    for i, state in enumerate(status):
        where = f"{table.where(i)} ({numbers['temperature_k'][i]:.2f} K)"
        if state in STATUS_WITHOUT_RATE:
            notes.append((processes[i], f"{where}: left out, the fit is {state}"))
        elif state == "interval" and table.has("ci68_low_per_s") and table.has("ci68_high_per_s"):
            low = table.numbers("ci68_low_per_s", allow_empty=True)[i]
            high = table.numbers("ci68_high_per_s", allow_empty=True)[i]
            if 0 < low < high and np.isfinite(numbers["rate_per_s"][i]):
                numbers["rate_stderr"][i] = numbers["rate_per_s"][i] * 0.5 * np.log(high / low)
                numbers["rate_lower"][i] = numbers["rate_upper"][i] = np.nan
                notes.append((processes[i], f"{where}: 68 % interval {low:.3g}-{high:.3g} s^-1 used as a value,"
                                            " with the error of ln k from its width"))
    return notes


def check_rate_series(series: RateSeries) -> None:
    """Check a series row by row; raise :class:`InputError` naming the first bad row."""
    for i in range(len(series)):
        _check_row(series, i)
    values = ~series.is_bound
    with_error = np.isfinite(series.rate_stderr) & values
    if with_error.any() and not with_error[values].all():
        i = int(np.flatnonzero(values & ~with_error)[0])
        _fail(series, i, "rate_stderr is empty here but given for other rates; give an error for every rate, or none")
    if len(np.unique(series.temperature_k[values])) < 2:
        raise InputError(
            f"process {series.process or '(unnamed)'} has {int(values.sum())} rate(s) with values "
            "(bounds do not count) at fewer than 2 different temperatures; a line needs at least 2",
            series.source,
        )


def _check_row(series: RateSeries, i: int) -> None:
    t = series.temperature_k[i]
    check_kelvin(t, "temperature_k", series.source, series.where(i))
    t_err = series.temperature_stderr[i]
    if not (0.0 <= t_err <= MAX_RELATIVE_TEMPERATURE_ERROR * t):
        _fail(series, i, f"temperature_stderr = {t_err:g} K is not a plausible standard error (0 to {MAX_RELATIVE_TEMPERATURE_ERROR * t:.0f} K)")
    for name in ("rate_lower", "rate_upper"):
        bound = getattr(series, name)[i]
        if np.isfinite(bound) and bound <= 0:
            _fail(series, i, f"{name} must be positive (s^-1), got {bound:g}")
    if series.is_bound[i]:
        if series.rate_lower[i] >= series.rate_upper[i]:
            _fail(series, i, "rate_lower must be smaller than rate_upper")
        return
    k, k_err = series.rate_per_s[i], series.rate_stderr[i]
    if not np.isfinite(k):
        _fail(series, i, "no rate_per_s and no rate_lower/rate_upper; give the rate or its bounds")
    if k <= 0:
        _fail(series, i, f"rate_per_s must be positive (s^-1), got {k:g}; for a rate the data only bound give rate_lower/rate_upper")
    if np.isfinite(k_err) and k_err <= 0:
        _fail(series, i, f"rate_stderr must be positive (s^-1), got {k_err:g}")


def _fail(series: RateSeries, i: int, message: str) -> None:
    raise InputError(message, series.source, series.where(i))


# --------------------------------------------------------------------------------------------------
# Straight-line fits in 1/T
# --------------------------------------------------------------------------------------------------


def _line(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares intercept and slope of y = a + b x along the last axis."""
    sw = w.sum(-1)
    xm = (w * x).sum(-1) / sw
    ym = (w * y).sum(-1) / sw
    dx = x - xm[..., None]
    slope = (w * dx * (y - ym[..., None])).sum(-1) / (w * dx * dx).sum(-1)
    return ym - slope * xm, slope


def _normal_covariance(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """(X^T W X)^-1 of the straight line, written with centred sums for accuracy."""
    sw = w.sum()
    xm = (w * x).sum() / sw
    sxx = (w * (x - xm) ** 2).sum()
    return np.array([[1 / sw + xm**2 / sxx, -xm / sxx], [-xm / sxx, 1 / sxx]])


@dataclass(frozen=True)
class LineFit:
    """Weighted least-squares line y = intercept + slope * (1/T), with y = ln k - power * ln T.

    Attributes
    ----------
    intercept, slope : float
        Fitted coefficients (slope in K).
    covariance : ndarray
        Total 2 x 2 covariance of (intercept, slope): from the rates plus from the temperatures.
    rate_covariance, temperature_covariance : ndarray
        The two parts of `covariance`.
    residuals : ndarray
        y - fitted y of each point (ln units).
    weights : ndarray
        Weights of the fit (1/sigma^2 of ln k; ones without rate errors).
    chi_square : float
        Sum of squared residuals over their effective variances (NaN without rate errors).
    dof : int
        Degrees of freedom, n - 2.
    scatter : float
        sqrt(weighted residual sum of squares / dof): without rate errors, the scatter of ln k about the
        line; with rate errors, the square root of the reduced chi-square of the rate errors alone.
    """

    intercept: float
    slope: float
    covariance: np.ndarray
    rate_covariance: np.ndarray
    temperature_covariance: np.ndarray
    residuals: np.ndarray
    weights: np.ndarray
    chi_square: float
    dof: int
    scatter: float

    @property
    def energy(self) -> Estimate:
        """-R * slope with its standard error, kJ/mol: dH‡ of the Eyring line, Ea of the Arrhenius line."""
        return Estimate(-GAS_CONSTANT * self.slope / 1e3, GAS_CONSTANT * math.sqrt(self.covariance[1, 1]) / 1e3)

    def predict(self, temperature_k: float | np.ndarray) -> Estimate:
        """Fitted ordinate at `temperature_k` (K) with its standard error."""
        x = 1.0 / np.asarray(temperature_k, dtype=float)
        c = self.covariance
        var = c[0, 0] + 2 * x * c[0, 1] + x * x * c[1, 1]
        return Estimate(self.intercept + self.slope * x, np.sqrt(var))


def _fit_line(
    series: RateSeries,
    temperature_draws: np.ndarray | None,
    power: int,
    scaled: bool,
) -> LineFit:
    """Fit y = ln k - power ln T against 1/T over the rows of `series` that are values."""
    t, k = series.temperature_k, series.rate_per_s
    sigma = series.rate_stderr / k
    have_errors = bool(np.isfinite(sigma).all())
    w = 1.0 / sigma**2 if have_errors else np.ones_like(t)
    x, y = 1.0 / t, np.log(k) - power * np.log(t)
    intercept, slope = _line(x, y, w)
    residuals = y - intercept - slope * x
    dof = len(t) - 2
    weighted_ss = float((w * residuals**2).sum())
    scatter = math.sqrt(weighted_ss / dof) if dof > 0 else math.nan
    normal = _normal_covariance(x, w)
    rate_cov = normal * (scatter**2 if scaled else 1.0)
    if temperature_draws is None:
        temp_cov = np.zeros((2, 2))
        chi_square = weighted_ss if have_errors else math.nan
    else:
        a, b = _line(1.0 / temperature_draws, np.log(k) - power * np.log(temperature_draws), w)
        temp_cov = np.cov(np.vstack([a, b]))
        slope_in_t = -power / t + slope / t**2  # d(residual)/dT
        effective = sigma**2 + (slope_in_t * series.temperature_stderr) ** 2
        chi_square = float((residuals**2 / effective).sum()) if have_errors else math.nan
    if scaled and have_errors and temperature_draws is not None and dof > 0:
        # scale the total covariance by the reduced chi-square that includes the temperature errors
        factor = chi_square / dof
        rate_cov, temp_cov = normal * factor, temp_cov * factor
    return LineFit(
        float(intercept),
        float(slope),
        rate_cov + temp_cov,
        rate_cov,
        temp_cov,
        residuals,
        w,
        chi_square,
        dof,
        scatter,
    )


# --------------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------------


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
    """

    temperature_k: float
    rate_lower: float
    rate_upper: float
    fitted_rate_per_s: float
    fitted_ln_stderr: float
    violated: bool
    sigma: float
    where: str

    def describe(self) -> str:
        """One line: the bound and whether the line respects it."""
        if not self.violated:
            return f"respected at {self.temperature_k:g} K"
        side = "above the upper" if self.fitted_rate_per_s > self.rate_upper else "below the lower"
        return (
            f"the fitted line ({self.fitted_rate_per_s:.3g} s^-1) lies {side} bound at {self.temperature_k:g} K "
            f"({self.where}) by {self.sigma:.1f} standard errors"
        )


def _check_bound(line: LineFit, t: float, lower: float, upper: float, where: str) -> BoundCheck:
    ln_fit, se = line.predict(t)
    ln_fit = float(ln_fit + np.log(t))  # Eyring ordinate -> ln k
    beyond = max(
        np.log(lower) - ln_fit if np.isfinite(lower) else -np.inf,
        ln_fit - np.log(upper) if np.isfinite(upper) else -np.inf,
    )
    violated = bool(beyond > 0)
    with np.errstate(divide="ignore"):
        sigma = float(beyond / se) if violated else 0.0  # NaN when the line's error is not determined
    return BoundCheck(t, lower, upper, math.exp(ln_fit), float(se), violated, sigma, where)


@dataclass(frozen=True)
class EyringResult(NotebookView):
    """Eyring (and Arrhenius) analysis of one exchange process.

    Energies in kJ/mol, entropies in J/(mol K); the ``*_kcal_*`` keys of :meth:`to_dict` give kcal/mol
    and cal/(mol K). Use :meth:`gibbs` for dG‡ at any temperature, :meth:`report` (or ``print``) for a
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
        Where the standard errors come from.
    monte_carlo_draws : int
        Temperature draws used (0 when the temperatures were taken as exact).
    seed : int or None
        Seed of the Monte Carlo draws.
    studentised_residuals : ndarray
        Studentised residual of each fitted point (NaN where it cannot be formed).
    outliers : ndarray of bool
        Fitted points flagged as possible outliers (see `outlier_threshold` of :func:`eyring_fit_series`).
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
    monte_carlo_draws: int
    seed: int | None
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
    def ln_rate_stderr(self) -> np.ndarray:
        """Standard error of ln k of each fitted rate (the scatter about the line without rate errors)."""
        return 1.0 / np.sqrt(self.eyring.weights) * (1.0 if self._errors_given else self.eyring.scatter)

    @property
    def _errors_given(self) -> bool:
        return bool(np.isfinite(self.series.rate_stderr[self.used]).all())

    @property
    def _kappa_term(self) -> float:
        return math.log(self.transmission * BOLTZMANN / PLANCK)

    # ---- activation parameters --------------------------------------------------------------------
    @property
    def enthalpy_kj_mol(self) -> float:
        """dH‡, kJ/mol."""
        return self.eyring.energy.value

    @property
    def enthalpy_stderr(self) -> float:
        """Standard error of dH‡, kJ/mol."""
        return self.eyring.energy.stderr

    @property
    def entropy_j_mol_k(self) -> float:
        """dS‡, J/(mol K)."""
        return GAS_CONSTANT * (self.eyring.intercept - self._kappa_term)

    @property
    def entropy_stderr(self) -> float:
        """Standard error of dS‡, J/(mol K)."""
        return GAS_CONSTANT * math.sqrt(self.eyring.covariance[0, 0])

    @property
    def correlation(self) -> float:
        """Correlation coefficient of dH‡ and dS‡ (close to +1 for any single series)."""
        c = self.eyring.covariance
        return float(-c[0, 1] / math.sqrt(c[0, 0] * c[1, 1]))

    @property
    def harmonic_mean_temperature_k(self) -> float:
        """Harmonic mean of the fitted temperatures, weighted as in the fit, K.

        Here dG‡ is statistically uncorrelated with dH‡ (Grieger, Hunter & Krug, Nature 261, 566 (1976)).
        """
        w = self.eyring.weights
        return float(w.sum() / (w / self.temperature_k).sum())

    @property
    def uncorrelated_temperature_k(self) -> float:
        """Temperature (K) at which dG‡ is uncorrelated with dH‡ under the full covariance.

        Equals :attr:`harmonic_mean_temperature_k` when the temperatures are exact; temperature errors
        move it a little.
        """
        c = self.eyring.covariance
        return float(-c[1, 1] / c[0, 1])

    def gibbs(self, temperature_k: float | np.ndarray = STANDARD_TEMPERATURE_K) -> Estimate:
        """dG‡ = dH‡ - T dS‡ and its standard error (kJ/mol) at `temperature_k` (K)."""
        t = np.asarray(temperature_k, dtype=float)
        value = self.enthalpy_kj_mol - t * self.entropy_j_mol_k / 1e3
        c = self.eyring.covariance  # dG‡ = -R (slope + T (intercept - const)): gradient -R (T, 1)
        stderr = GAS_CONSTANT / 1e3 * np.sqrt(c[0, 0] * t * t + 2 * c[0, 1] * t + c[1, 1])
        return Estimate(float(value), float(stderr)) if t.ndim == 0 else Estimate(value, stderr)

    def gibbs_enthalpy_correlation(self, temperature_k: float) -> float:
        """Correlation coefficient of dG‡ at `temperature_k` (K) with dH‡."""
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
        if self.error_basis == BASIS_GIVEN:
            return float(stats.norm.ppf(0.975))
        return float(stats.t.ppf(0.975, self.eyring.dof)) if self.eyring.dof > 0 else math.nan

    # ---- output -----------------------------------------------------------------------------------
    def to_dict(self) -> dict:
        """Plain dict (JSON-ready) of the results; NaN where a quantity is not determined."""
        t_hm = self.harmonic_mean_temperature_k
        g298, g_hm = self.gibbs(STANDARD_TEMPERATURE_K), self.gibbs(t_hm)
        line = self.eyring
        out = {
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
            "activation_energy_kj_mol": self.activation_energy_kj_mol,
            "activation_energy_stderr": self.activation_energy_stderr,
            "ln_prefactor": self.ln_prefactor,
            "ln_prefactor_stderr": self.ln_prefactor_stderr,
            "transmission": self.transmission,
            "n_rates": int(self.used.sum()),
            "n_bounds": len(self.bounds),
            "temperature_min_k": float(self.temperature_k.min()),
            "temperature_max_k": float(self.temperature_k.max()),
            "error_basis": self.error_basis,
            "chi_square": line.chi_square,
            "degrees_of_freedom": line.dof,
            "reduced_chi_square": line.chi_square / line.dof if line.dof > 0 else math.nan,
            "chi_square_p_value": self._chi_square_p_value(),
            "ln_rate_scatter": line.scatter if not self._errors_given else math.nan,
            "temperature_errors": "monte carlo" if self.monte_carlo_draws else "none",
            "monte_carlo_draws": self.monte_carlo_draws,
            "seed": self.seed,
            "points": [self._point(i) for i in range(int(self.used.sum()))],
            "bounds": [
                {
                    "temperature_k": b.temperature_k,
                    "rate_lower": b.rate_lower,
                    "rate_upper": b.rate_upper,
                    "fitted_rate_per_s": b.fitted_rate_per_s,
                    "violated": b.violated,
                    "sigma": b.sigma,
                }
                for b in self.bounds
            ],
            "warnings": list(self.warnings),
        }
        return out

    def _point(self, i: int) -> dict:
        t = float(self.temperature_k[i])
        return {
            "temperature_k": t,
            "temperature_stderr": float(self.series.temperature_stderr[self.used][i]),
            "rate_per_s": float(self.rate_per_s[i]),
            "rate_stderr": float(self.series.rate_stderr[self.used][i]),
            "fitted_rate_per_s": float(np.exp(self.ln_rate(t).value)),
            "studentised_residual": float(self.studentised_residuals[i]),
            "outlier": bool(self.outliers[i]),
        }

    def _chi_square_p_value(self) -> float:
        line = self.eyring
        if not np.isfinite(line.chi_square) or line.dof <= 0:
            return math.nan
        return float(stats.chi2.sf(line.chi_square, line.dof))

    def report(self) -> str:
        """Readable multi-line summary: parameters with errors, fit statistics, points, bounds, warnings."""
        return _report(self)

    def __str__(self) -> str:
        return self.report()

    def plot(self, figure: "Figure | None" = None) -> "Figure":
        """Eyring plot with fit, 95 % confidence band and residuals (see :func:`dnmr.plotting.plot_eyring`)."""
        from .plotting import plot_eyring

        return plot_eyring([self], figure=figure)

    def sample_posterior(self, **settings) -> "Posterior":
        """Posterior samples of dH‡, dS‡ and dG‡ (needs emcee); see :func:`dnmr.posterior.sample_eyring_posterior`
        for the method and the settings (steps, walkers, burn, thin, seed)."""
        from .posterior import sample_eyring_posterior

        return sample_eyring_posterior(self, **settings)


BASIS_GIVEN = "given rate errors"
BASIS_SCALED = "given rate errors, scaled by the reduced chi-square"
BASIS_SCATTER = "scatter of the rates about the line"


# --------------------------------------------------------------------------------------------------
# Fitting
# --------------------------------------------------------------------------------------------------


def eyring_fit(
    temperature_k: Sequence[float] | np.ndarray,
    rate_per_s: Sequence[float] | np.ndarray,
    rate_stderr: Sequence[float] | np.ndarray | None = None,
    *,
    temperature_stderr: float | Sequence[float] | np.ndarray | None = None,
    temperature_covariance: np.ndarray | None = None,
    rate_lower: Sequence[float] | np.ndarray | None = None,
    rate_upper: Sequence[float] | np.ndarray | None = None,
    process: str = "",
    **options,
) -> EyringResult:
    """Eyring analysis of rates given as arrays.

    Parameters
    ----------
    temperature_k : array
        Sample temperatures, K.
    rate_per_s : array
        Rate constants, s^-1 (NaN in rows that are only bounded).
    rate_stderr : array, optional
        Standard errors of the rates, s^-1 (NaN in bound rows); omit to let the scatter set the errors.
    temperature_stderr : float or array, optional
        Standard error of the temperatures, K (one for all, or one per rate; independent).
    temperature_covariance : (n, n) array, optional
        Full covariance of the temperatures, K^2, e.g. from a :mod:`dnmr.thermometry` calibration;
        adds to `temperature_stderr`.
    rate_lower, rate_upper : array, optional
        Bounds (s^-1) of rows the data only bound (NaN elsewhere); such rows are not fitted but checked.
    process : str
        Name of the exchange process, for reports.
    **options
        Passed to :func:`eyring_fit_series` (transmission, scale_errors, monte_carlo_draws, seed,
        outlier_threshold).

    Returns
    -------
    EyringResult

    Raises
    ------
    InputError
        Arrays of different lengths or values that make no sense (as for :func:`read_rates`).
    """
    t = _vector(temperature_k, "temperature_k")
    n = len(t)
    columns = {
        "rate_per_s": _vector(rate_per_s, "rate_per_s", n),
        "rate_stderr": _vector(rate_stderr, "rate_stderr", n),
        "rate_lower": _vector(rate_lower, "rate_lower", n),
        "rate_upper": _vector(rate_upper, "rate_upper", n),
    }
    stderr = np.broadcast_to(_vector(temperature_stderr, "temperature_stderr", n, scalar=True, fill=0.0), (n,))
    _check_temperature_stderr(stderr, None, lambda i: f"temperature_stderr[{i}]")
    covariance = np.diag(stderr**2)
    if temperature_covariance is not None:
        covariance = covariance + _checked_covariance(temperature_covariance, n)
    series = RateSeries(process, t, temperature_covariance=covariance, **columns)
    check_rate_series(series)
    return eyring_fit_series(series, **options)


def eyring_fit_series(
    series: RateSeries,
    *,
    transmission: float = 1.0,
    scale_errors: bool | None = None,
    monte_carlo_draws: int = 4000,
    seed: int | None = 0,
    outlier_threshold: float = OUTLIER_THRESHOLD,
) -> EyringResult:
    """Eyring and Arrhenius analysis of one :class:`RateSeries`.

    Parameters
    ----------
    series : RateSeries
        Rates of one process (from :func:`read_rates` or :func:`rate_series`).
    transmission : float
        Transmission coefficient kappa (0 < kappa <= 1); changes dS‡ (by R ln kappa), not dH‡.
    scale_errors : bool, optional
        Scale the covariance by the reduced chi-square. Default: no when rate errors are given,
        yes (errors from the scatter) when they are not.
    monte_carlo_draws : int
        Number of temperature draws for propagating temperature errors.
    seed : int or None
        Seed of the random generator of those draws (None: fresh each call).
    outlier_threshold : float
        Flag a point whose studentised residual is as improbable as a normal deviate beyond this many
        standard deviations (for residuals judged on the scatter: the Student-t quantile of that tail
        probability). Points are judged one at a time, the worst set aside first. Nothing is removed.

    Returns
    -------
    EyringResult

    Raises
    ------
    InputError
        Transmission outside (0, 1], or ``scale_errors=False`` without rate errors.
    """
    if not 0.0 < transmission <= 1.0:
        raise InputError(f"transmission coefficient must be in (0, 1], got {transmission:g}", where="transmission")
    if monte_carlo_draws < 100:
        raise InputError("use at least 100 Monte Carlo draws", where="monte_carlo_draws")
    used = ~series.is_bound
    fitted = _subset(series, used)
    errors_given = bool(np.isfinite(fitted.rate_stderr).all())
    if scale_errors is False and not errors_given:
        raise InputError("without rate_stderr the errors can only come from the scatter; give rate errors", where="scale_errors")
    scaled = (not errors_given) or bool(scale_errors)
    basis = BASIS_SCATTER if not errors_given else (BASIS_SCALED if scaled else BASIS_GIVEN)
    draws = _temperature_draws(fitted, monte_carlo_draws, seed)
    eyring = _fit_line(fitted, draws, power=1, scaled=scaled)
    arrhenius = _fit_line(fitted, draws, power=0, scaled=scaled)
    t = fitted.temperature_k
    x, y = 1.0 / t, np.log(fitted.rate_per_s / t)
    extra_var = ((-1.0 / t + eyring.slope / t**2) * fitted.temperature_stderr) ** 2
    known = basis == BASIS_GIVEN
    bounds = tuple(
        _check_bound(eyring, series.temperature_k[i], series.rate_lower[i], series.rate_upper[i], series.where(i))
        for i in np.flatnonzero(~used)
    )
    result = EyringResult(
        series=series,
        used=used,
        eyring=eyring,
        arrhenius=arrhenius,
        transmission=float(transmission),
        error_basis=basis,
        monte_carlo_draws=0 if draws is None else int(monte_carlo_draws),
        seed=seed,
        studentised_residuals=_studentised(x, y, eyring.weights, extra_var, known),
        outliers=_outlier_flags(x, y, eyring.weights, extra_var, known, outlier_threshold),
        bounds=bounds,
    )
    return replace(result, warnings=tuple(series.notes) + tuple(_warnings(result)))


def eyring_fit_file(
    path: str | Path,
    *,
    process: str | None = None,
    temperature_stderr: float | None = None,
    calibration: "TemperatureCalibration | None" = None,
    **options,
) -> list[EyringResult]:
    """Eyring analysis of every process (or one) in a rates table (CSV).

    Parameters
    ----------
    path : str or Path
        Rates table: ``rates.csv`` from ``dnmr fit`` or a table of your own (see :func:`read_rates`).
    process : str, optional
        Analyse only this process.
    temperature_stderr : float, optional
        One standard error (K) for all temperatures, for tables without a temperature_stderr column.
    calibration : TemperatureCalibration, optional
        The table's temperatures are set-points; replace them by calibrated sample temperatures and carry
        the calibration's (correlated) uncertainty into the fit (see :mod:`dnmr.thermometry`).
    **options
        Passed to :func:`eyring_fit_series`.

    Returns
    -------
    list of EyringResult
        One per process, in the order the table first names them.
    """
    series = read_rates(path, temperature_stderr)
    if process is not None:
        names = [s.process for s in series]
        if process not in names:
            raise InputError(
                f"no process {process!r} in the table{did_you_mean(process, names)}; it has "
                f"{', '.join(repr(n) for n in names)}",
                str(path),
                "--process",
            )
        series = [s for s in series if s.process == process]
    if calibration is not None:
        series = [
            s.with_temperatures(
                *calibration.true_temperature(s.temperature_k, source=s.source, where=[s.where(i) for i in range(len(s))])
            )
            for s in series
        ]
    return [eyring_fit_series(s, **options) for s in series]


def results_to_dict(results: Sequence[EyringResult]) -> dict:
    """One JSON-ready object: the first (or only) process's results at the top level and, when there
    are several processes, all of them in a list under ``processes``."""
    out = results[0].to_dict()
    if len(results) > 1:
        out["processes"] = [r.to_dict() for r in results]
    return out


def _subset(series: RateSeries, rows: np.ndarray) -> RateSeries:
    return replace(
        series,
        temperature_k=series.temperature_k[rows],
        rate_per_s=series.rate_per_s[rows],
        rate_stderr=series.rate_stderr[rows],
        rate_lower=series.rate_lower[rows],
        rate_upper=series.rate_upper[rows],
        temperature_covariance=series.temperature_covariance[np.ix_(rows, rows)],
        lines=None if series.lines is None else tuple(np.array(series.lines)[rows].tolist()),
    )


def _temperature_draws(series: RateSeries, draws: int, seed: int | None) -> np.ndarray | None:
    cov = series.temperature_covariance
    if not cov.any():
        return None
    rng = np.random.default_rng(seed)
    return rng.multivariate_normal(series.temperature_k, cov, size=draws, method="eigh")


def _studentised(x: np.ndarray, y: np.ndarray, w: np.ndarray, extra_var: np.ndarray, known: bool) -> np.ndarray:
    """Studentised residuals of the weighted line through (x, y).

    With known errors e / sqrt((1/w + extra_var)(1 - h)) (extra_var: a point's temperature error seen
    in y); otherwise externally studentised, e sqrt(w) / (s_(i) sqrt(1 - h)), s_(i) the scatter
    without point i. A point of leverage h = 1 (each of two points, or one whose weight dwarfs the
    others') fixes the line through itself: its residual is zero whatever the data, has no variance
    left (1 - h is zero, or a rounding error either side of it) and cannot be judged, so it gets NaN.
    """
    a, b = _line(x, y, w)
    e = y - a - b * x
    normal = _normal_covariance(x, w)
    keep = 1.0 - w * (normal[0, 0] + 2 * x * normal[0, 1] + x * x * normal[1, 1])
    judged = keep > LEVERAGE_TOLERANCE
    out = np.full_like(e, np.nan)
    if known:
        out[judged] = e[judged] / np.sqrt((1.0 / w + extra_var)[judged] * keep[judged])
        return out
    dof = len(x) - 3
    if dof <= 0:
        return out
    deleted_ss = (w * e**2).sum() - w[judged] * e[judged] ** 2 / keep[judged]
    with np.errstate(divide="ignore", invalid="ignore"):  # exact data: 0/0, no residual to judge
        out[judged] = e[judged] * np.sqrt(w[judged]) / np.sqrt(deleted_ss / dof * keep[judged])
    return out


def _outlier_flags(x: np.ndarray, y: np.ndarray, w: np.ndarray, extra_var: np.ndarray, known: bool, threshold: float) -> np.ndarray:
    """Flag outliers one at a time: the worst point beyond the limit is set aside and the rest judged again.

    The limit is `threshold` for normal (known-error) residuals, and the Student-t quantile of the same
    tail probability for externally studentised ones. Setting points aside only for the judging keeps
    one gross outlier from dragging the line and making its neighbours look bad.
    """
    flags = np.zeros(len(x), dtype=bool)
    tail = stats.norm.sf(threshold)
    while (~flags).sum() >= (3 if known else 4):
        keep = np.flatnonzero(~flags)
        r = np.abs(np.nan_to_num(_studentised(x[keep], y[keep], w[keep], extra_var[keep], known)))
        limit = threshold if known else stats.t.isf(tail, len(keep) - 3)
        worst = int(np.argmax(r))
        if r[worst] <= limit:
            break
        flags[keep[worst]] = True
    return flags


def _warnings(result: EyringResult) -> list[str]:
    out = []
    n = int(result.used.sum())
    span = float(np.ptp(result.temperature_k))
    if n < FEW_RATES:
        out.append(f"only {n} rates: the errors rest on very few points and outliers cannot be judged; aim for 4 or more")
    if span < NARROW_SPAN_K:
        out.append(
            f"the temperatures span only {span:.1f} K (< {NARROW_SPAN_K:g} K): dS‡ and dH‡ are poorly "
            "determined; quote dG‡ at the harmonic-mean temperature"
        )
    if result.error_basis != BASIS_GIVEN and result.eyring.dof == 0:
        out.append("2 rates without rate errors: the line passes through both and its errors cannot be estimated")
    p = result._chi_square_p_value()
    red = result.eyring.chi_square / max(result.eyring.dof, 1)
    if result.error_basis == BASIS_GIVEN and p < 0.01:
        out.append(
            f"the rates scatter more than their errors allow (reduced chi-square {red:.2f}, p = {p:.2g}); "
            "the quoted errors are probably too small: check the rate errors or use scale_errors"
        )
    if result.error_basis == BASIS_GIVEN and p > 0.99 and result.eyring.dof >= 3:
        out.append(f"the rates scatter much less than their errors (reduced chi-square {red:.2f}); the errors may be overstated")
    for t, r in zip(result.temperature_k[result.outliers], result.studentised_residuals[result.outliers]):
        out.append(f"possible outlier at {t:g} K (studentised residual {r:+.1f})")
    out.extend(b.describe() for b in result.bounds if b.violated)
    return out


# --------------------------------------------------------------------------------------------------
# Report
# --------------------------------------------------------------------------------------------------


def format_with_error(value: float, stderr: float, digits: int = 2) -> str:
    """'value ± stderr' rounded to `digits` significant figures of the error ('± n.d.' if undetermined)."""
    if not np.isfinite(stderr):
        return f"{value:.4g} ± n.d."
    if stderr == 0:
        return f"{value:.6g} ± 0"
    decimals = max(0, digits - 1 - int(math.floor(math.log10(abs(stderr)))))
    return f"{value:.{decimals}f} ± {stderr:.{decimals}f}"


def _report(r: EyringResult) -> str:
    d = r.to_dict()
    title = f"Eyring analysis — process {r.process!r}" if r.process else "Eyring analysis"
    t = r.temperature_k
    lines = [title, "=" * len(title)]
    lines.append(f"  rates fitted         {d['n_rates']}" + (f" (+ {d['n_bounds']} bound{'s' if d['n_bounds'] > 1 else ''}, not fitted)" if r.bounds else ""))
    lines.append(f"  temperatures         {t.min():.2f} – {t.max():.2f} K (span {np.ptp(t):.1f} K)")
    lines.append(f"  errors from          {r.error_basis}")
    if r.error_basis == BASIS_SCATTER:
        lines.append(f"  scatter of ln k      {r.eyring.scatter:.3g} (about {100 * r.eyring.scatter:.2g} % in k)")
    elif r.eyring.dof > 0:
        lines.append(
            f"  reduced chi-square   {d['reduced_chi_square']:.3g} ({r.eyring.dof} degrees of freedom, p = {d['chi_square_p_value']:.2g})"
        )
    if r.monte_carlo_draws:
        lines.append(f"  temperature errors   propagated by Monte Carlo ({r.monte_carlo_draws} draws, seed {r.seed})")
        if r.error_basis == BASIS_SCATTER:
            lines.append("                       (their random part is in the scatter too: counted twice, conservative)")
    else:
        lines.append("  temperature errors   none given: temperatures taken as exact (no calibration error included)")
    if r.transmission != 1.0:
        lines.append(f"  transmission coeff.  {r.transmission:g}")
    t_hm = d["harmonic_mean_temperature_k"]
    lines += ["", "[[Activation parameters]]"]
    rows = [
        ("dH‡", "kJ/mol", d["enthalpy_kj_mol"], d["enthalpy_stderr"], "kcal/mol"),
        ("dS‡", "J/(mol K)", d["entropy_j_mol_k"], d["entropy_stderr"], "cal/(mol K)"),
        ("dG‡(298.15 K)", "kJ/mol", d["gibbs_298_kj_mol"], d["gibbs_298_stderr"], "kcal/mol"),
        (f"dG‡({t_hm:.1f} K)", "kJ/mol", d["gibbs_hm_kj_mol"], d["gibbs_hm_stderr"], "kcal/mol"),
    ]
    for name, unit, value, err, unit2 in rows:
        lines.append(
            f"  {name:<16}{format_with_error(value, err):>18} {unit:<11}"
            f"({format_with_error(value * KCAL_PER_KJ, err * KCAL_PER_KJ)} {unit2})"
        )
    lines.append(f"  corr(dH‡, dS‡)  {r.correlation:>18.4f}")
    lines.append(
        f"  {t_hm:.1f} K = weighted harmonic mean of the temperatures, where dG‡ is least entangled with "
        f"dH‡: corr(dG‡, dH‡) = {d['correlation_gibbs_hm_enthalpy']:+.3f}"
    )
    if abs(d["correlation_gibbs_hm_enthalpy"]) > 0.1:
        lines.append(f"  with the temperature errors, the uncorrelated point moves to {d['uncorrelated_temperature_k']:.1f} K")
    lines += ["", "[[Arrhenius]]"]
    lines.append(f"  {'Ea':<16}{format_with_error(d['activation_energy_kj_mol'], d['activation_energy_stderr']):>18} kJ/mol")
    lines.append(f"  {'ln(A / s^-1)':<16}{format_with_error(d['ln_prefactor'], d['ln_prefactor_stderr']):>18}")
    lines += ["", "[[Points]]", f"  {'T / K':>9} {'± T':>6} {'k / s^-1':>11} {'± k':>10} {'fit k':>11} {'stud. res.':>10}"]
    for p in d["points"]:
        flag = "  outlier?" if p["outlier"] else ""
        err = f"{p['rate_stderr']:10.3g}" if np.isfinite(p["rate_stderr"]) else f"{'':>10}"
        lines.append(
            f"  {p['temperature_k']:9.2f} {p['temperature_stderr']:6.2f} {p['rate_per_s']:11.4g} {err} "
            f"{p['fitted_rate_per_s']:11.4g} {p['studentised_residual']:10.2f}{flag}"
        )
    if r.bounds:
        lines += ["", "[[Bounds (not fitted)]]", f"  {'T / K':>9} {'lower':>11} {'upper':>11} {'fit k':>11}"]
        for b in r.bounds:
            lo = f"{b.rate_lower:11.4g}" if np.isfinite(b.rate_lower) else f"{'-':>11}"
            hi = f"{b.rate_upper:11.4g}" if np.isfinite(b.rate_upper) else f"{'-':>11}"
            status = "  VIOLATED" if b.violated else "  ok"
            lines.append(f"  {b.temperature_k:9.2f} {lo} {hi} {b.fitted_rate_per_s:11.4g}{status}")
    if r.warnings:
        lines += ["", "[[Warnings]]"] + [f"  - {w}" for w in r.warnings]
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------------
# Coalescence estimate
# --------------------------------------------------------------------------------------------------

COALESCENCE_CAVEAT = (
    "An estimate only: it assumes two equally populated sites, no coupling between them and lines "
    "far narrower than their separation (Gutowsky-Holm k_c = pi dnu / sqrt 2), takes the shift "
    "difference of the slow-exchange limit at the coalescence temperature, and the coalescence "
    "temperature itself is seldom known better than a few kelvin. A lineshape fit over a series of "
    "temperatures gives the barrier with a real error bar."
)


@dataclass(frozen=True)
class CoalescenceEstimate:
    """dG‡ at the coalescence temperature of two equally populated, uncoupled sites.

    Attributes
    ----------
    coalescence_temperature_k : float
        Observed coalescence temperature T_c, K.
    shift_difference_hz : float
        Shift difference of the two sites in slow exchange, Hz.
    rate_per_s : float
        Rate constant at coalescence, k_c = pi dnu / sqrt(2), s^-1.
    gibbs_kj_mol : float
        dG‡ at T_c, kJ/mol.
    gibbs_stderr : float
        Its standard error from the given errors of T_c and dnu, kJ/mol (0 when none were given).
    transmission : float
        Transmission coefficient kappa.
    caveat : str
        Why this is only an estimate.
    """

    coalescence_temperature_k: float
    shift_difference_hz: float
    rate_per_s: float
    gibbs_kj_mol: float
    gibbs_stderr: float
    transmission: float
    caveat: str = COALESCENCE_CAVEAT

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {
            "coalescence_temperature_k": self.coalescence_temperature_k,
            "shift_difference_hz": self.shift_difference_hz,
            "rate_per_s": self.rate_per_s,
            "gibbs_kj_mol": self.gibbs_kj_mol,
            "gibbs_stderr": self.gibbs_stderr,
            "gibbs_kcal_mol": self.gibbs_kj_mol * KCAL_PER_KJ,
            "gibbs_kcal_stderr": self.gibbs_stderr * KCAL_PER_KJ,
            "transmission": self.transmission,
            "caveat": self.caveat,
        }

    def report(self) -> str:
        """Readable summary with the caveat."""
        if self.gibbs_stderr > 0:
            g = format_with_error(self.gibbs_kj_mol, self.gibbs_stderr)
            g_kcal = format_with_error(self.gibbs_kj_mol * KCAL_PER_KJ, self.gibbs_stderr * KCAL_PER_KJ)
        else:
            g, g_kcal = f"{self.gibbs_kj_mol:.2f}", f"{self.gibbs_kj_mol * KCAL_PER_KJ:.2f}"
        return "\n".join(
            [
                "Coalescence estimate (equal populations)",
                f"  T_c = {self.coalescence_temperature_k:g} K, dnu = {self.shift_difference_hz:g} Hz",
                f"  k_c = {self.rate_per_s:.4g} s^-1",
                f"  dG‡(T_c) = {g} kJ/mol ({g_kcal} kcal/mol)",
                f"  Caveat: {self.caveat}",
            ]
        )

    def __str__(self) -> str:
        return self.report()


def coalescence_barrier(
    coalescence_temperature_k: float,
    shift_difference_hz: float,
    *,
    temperature_stderr: float = 0.0,
    shift_difference_stderr: float = 0.0,
    transmission: float = 1.0,
) -> CoalescenceEstimate:
    """Quick dG‡ (kJ/mol) from a coalescence temperature (K) and a shift difference (Hz), equal populations.

    dG‡_c = R T_c ln( sqrt(2) kB T_c / (pi h dnu) ): the Gutowsky-Holm rate at coalescence
    k_c = pi dnu / sqrt(2) put into the Eyring equation. See :data:`COALESCENCE_CAVEAT`.

    Parameters
    ----------
    coalescence_temperature_k : float
        Coalescence temperature, K.
    shift_difference_hz : float
        Shift difference of the two sites without exchange, Hz.
    temperature_stderr : float
        Standard error of T_c, K.
    shift_difference_stderr : float
        Standard error of dnu, Hz.
    transmission : float
        Transmission coefficient kappa.

    Returns
    -------
    CoalescenceEstimate
    """
    t, dnu = float(coalescence_temperature_k), abs(float(shift_difference_hz))
    check_kelvin(t, "coalescence_temperature_k")
    if not dnu > 0:
        raise InputError("the shift difference must be non-zero (Hz)", where="shift_difference_hz")
    k_c = math.pi * dnu / math.sqrt(2.0)
    gibbs = eyring_barrier(k_c, t, transmission)
    d_dt = GAS_CONSTANT * (math.log(transmission * math.sqrt(2.0) * BOLTZMANN * t / (math.pi * PLANCK * dnu)) + 1) / 1e3
    d_dnu = -GAS_CONSTANT * t / dnu / 1e3
    stderr = math.hypot(d_dt * temperature_stderr, d_dnu * shift_difference_stderr)
    return CoalescenceEstimate(t, dnu, k_c, float(gibbs), stderr, float(transmission))
