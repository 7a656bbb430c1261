"""Activation parameters from exchange rates: the Eyring and Arrhenius analysis of one or several tables.

The Eyring equation k = kappa (kB T / h) exp(ΔS‡/R) exp(-ΔH‡/RT) is a straight line in 1/T; fitted
through the rates of one process, with their errors and those of their temperatures, it gives ΔH‡, ΔS‡
and ΔG‡ with their covariance. The rooms of the analysis:

* :mod:`dnmr.activation.rates` — a series of rates of one process (:class:`RateSeries`), its checks;
* :mod:`dnmr.activation.rate_table` — rates tables (CSV) read into series, the rows of a fit table,
  several tables joined (:func:`read_rates`);
* :mod:`dnmr.activation.line_fit` — the straight lines by generalised least squares with independent
  and shared temperature errors, studentised residuals and outliers;
* :mod:`dnmr.activation.eyring_result` and :mod:`dnmr.activation.eyring_report` — the result
  (:class:`EyringResult`), its JSON and its text;
* this module — the analysis itself: :func:`eyring_fit` (arrays), :func:`eyring_fit_series` and
  :func:`eyring_fit_file` (tables), and the warnings.

Bounds, outliers, warnings
--------------------------
Rows that are bounds (empty ``rate_stderr``, ``rate_lower`` and/or ``rate_upper`` filled) never enter the
fit; they are reported and checked against the fitted line (a bound the line violates is flagged).
Outliers are flagged by studentised residuals (beyond 3 standard deviations by default, common
practice; judged one at a time so that one gross outlier does not make its neighbours look bad), never
removed.
Warnings are raised for a temperature span under 30 K (ΔS‡ poorly determined, common practice) and for
fewer than 4 rates.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from dnmr.activation.eyring_result import BoundCheck, EyringResult
from dnmr.activation.line_fit import (
    BASIS_GIVEN,
    BASIS_SCALED,
    BASIS_SCATTER,
    OUTLIER_THRESHOLD,
    SHARE_TEMPERATURES,
    fit_line,
    outlier_flags,
    studentised_residuals,
)
from dnmr.activation.rate_table import rate_table_paths, read_rates
from dnmr.activation.rates import RateSeries, check_rate_series, check_temperature_stderr
from dnmr.activation.temperature_errors import TemperatureErrors
from dnmr.errors import InputError, did_you_mean

if TYPE_CHECKING:  # pragma: no cover
    from dnmr.activation.temperature_calibration import TemperatureCalibration

NARROW_SPAN_K = 30.0  # common practice: a narrower span leaves ΔS‡ poorly determined
FEW_RATES = 4
METHOD_DISAGREEMENT_SIGMA = 3.0  # an offset between methods beyond this many standard errors is warned


def _vector(values, name: str, n: int | None = None, *, scalar: bool = False, fill: float = np.nan) -> np.ndarray:
    """One number per rate as an array (`fill` where none given; a single number kept as one when `scalar`)."""
    if values is None:
        return np.full(n, fill)
    array = np.asarray(values, dtype=float)
    if scalar and array.ndim == 0:
        return array
    if array.ndim != 1 or (n is not None and len(array) != n):
        raise InputError(f"must be a list of {n if n is not None else 'the'} numbers, one per rate", where=name)
    return array


def _checked_covariance(matrix, n: int) -> np.ndarray:
    """A full covariance of the temperatures (K^2), checked: finite, n x n, symmetric, positive semi-definite."""
    c = np.asarray(matrix, dtype=float)
    if c.shape != (n, n) or not np.isfinite(c).all():
        raise InputError(f"must be a finite {n} x {n} matrix (K^2), got shape {c.shape}", where="temperature_covariance")
    if not np.allclose(c, c.T) or np.linalg.eigvalsh(c).min() < -1e-9 * max(np.abs(c).max(), 1e-300):
        raise InputError("must be symmetric and positive semi-definite", where="temperature_covariance")
    return c


def eyring_fit(
    temperature_k: Sequence[float] | np.ndarray,
    rate_per_s: Sequence[float] | np.ndarray,
    rate_stderr: Sequence[float] | np.ndarray | None = None,
    *,
    temperature_stderr: float | Sequence[float] | np.ndarray | None = None,
    temperature_offset_stderr: float | None = None,
    temperature_covariance: np.ndarray | None = None,
    rate_lower: Sequence[float] | np.ndarray | None = None,
    rate_upper: Sequence[float] | np.ndarray | None = None,
    process: str = "",
    method: str | Sequence[str] | None = None,
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
        Standard error of the temperatures, K (one for all, or one per rate; independent between rates).
    temperature_offset_stderr : float, optional
        Standard error (K) of an unknown offset of the probe's temperature, the same for every rate (one
        shared error, not scatter).
    temperature_covariance : (n, n) array, optional
        Full covariance of the temperatures, K^2, for errors correlated in some other way; adds to the
        others.
    rate_lower, rate_upper : array, optional
        Bounds (s^-1) of rows the data only bound (NaN elsewhere); such rows are not fitted but checked.
    process : str
        Name of the exchange process, for reports.
    method : str or sequence of str, optional
        How the rates were measured (one for all, or one per rate: "lineshape", "inversion", "saturation",
        "exchange-2d" or a name of your own); default "lineshape".
    **options
        Passed to :func:`eyring_fit_series` (transmission, scale_errors, outlier_threshold).

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
    check_temperature_stderr(stderr, None, lambda i: f"temperature_stderr[{i}]")
    errors = TemperatureErrors(np.array(stderr, dtype=float), np.zeros((n, 0)))
    if temperature_covariance is not None:
        errors = errors.plus(TemperatureErrors.from_covariance(_checked_covariance(temperature_covariance, n)))
    methods = None if method is None else (method,) * n if isinstance(method, str) else tuple(str(m) for m in method)
    if methods is not None and len(methods) != n:
        raise InputError(f"must be one method, or {n}, one per rate", where="method")
    series = RateSeries(process, t, temperature_errors=errors, row_methods=methods, **columns)
    if temperature_offset_stderr is not None:
        series = series.with_offset(temperature_offset_stderr)
    check_rate_series(series)
    return eyring_fit_series(series, **options)


def eyring_fit_series(
    series: RateSeries,
    *,
    transmission: float = 1.0,
    scale_errors: bool | None = None,
    outlier_threshold: float = OUTLIER_THRESHOLD,
    flagged_rows: str = "exclude",
) -> EyringResult:
    """Eyring and Arrhenius analysis of one :class:`RateSeries`.

    Parameters
    ----------
    series : RateSeries
        Rates of one process (from :func:`read_rates`).
    transmission : float
        Transmission coefficient kappa (0 < kappa <= 1); changes ΔS‡ (by R ln kappa), not ΔH‡.
    scale_errors : bool, optional
        Scale the covariance by the reduced chi-square. Default: no when rate errors are given,
        yes (errors from the scatter) when they are not.
    outlier_threshold : float
        Flag a point whose studentised residual is as improbable as a normal deviate beyond this many
        standard deviations (for residuals judged on the scatter: the Student-t quantile of that tail
        probability). Points are judged one at a time, the worst set aside first. Nothing is removed.
    flagged_rows : {"exclude", "widen"}
        The policy the series was read with (:func:`read_rates`), for the report.

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
    used = ~series.is_bound
    fitted = series.subset(used)
    errors_given = bool(np.isfinite(fitted.rate_stderr).all())
    if scale_errors is False and not errors_given:
        raise InputError("without rate_stderr the errors can only come from the scatter; give rate errors", where="scale_errors")
    scaled = (not errors_given) or bool(scale_errors)
    basis = BASIS_SCATTER if not errors_given else (BASIS_SCALED if scaled else BASIS_GIVEN)
    eyring = fit_line(fitted, power=1, scaled=scaled)
    arrhenius = fit_line(fitted, power=0, scaled=scaled)
    methods = series.methods
    bounds = tuple(
        BoundCheck.against_line(eyring, series.temperature_k[i], series.rate_lower[i], series.rate_upper[i],
                                series.where(i), str(methods[i]))
        for i in np.flatnonzero(~used)
    )
    result = EyringResult(
        series=series,
        used=used,
        eyring=eyring,
        arrhenius=arrhenius,
        transmission=float(transmission),
        error_basis=basis,
        flagged_rows=flagged_rows,
        studentised_residuals=studentised_residuals(fitted, basis),
        outliers=outlier_flags(fitted, basis, outlier_threshold),
        bounds=bounds,
    )
    return replace(result, warnings=tuple(series.notes) + tuple(_warnings(result)))


def eyring_fit_file(
    path: str | Path | Sequence[str | Path],
    *,
    process: str | None = None,
    temperature_stderr: float | None = None,
    temperature_offset_stderr: float | None = None,
    calibration: "TemperatureCalibration | None" = None,
    flagged_rows: str = "exclude",
    **options,
) -> list[EyringResult]:
    """Eyring analysis of every process (or one) in a rates table (CSV).

    Parameters
    ----------
    path : str or Path, or a sequence of them
        Rates table: ``rates.csv`` from ``dnmr fit`` or ``dnmr transfer``, or a table of your own (see
        :func:`read_rates`); several tables are joined process by process and fitted together, each rate
        keeping its method (lineshape, inversion, saturation, exchange-2d ...).
    process : str, optional
        Analyse only this process.
    temperature_stderr : float, optional
        One standard error (K) for all temperatures, independent between rows, for tables without a
        temperature_stderr column.
    temperature_offset_stderr : float, optional
        Standard error (K) of an unknown offset of the probe's temperature, shared by every row.
    calibration : TemperatureCalibration, optional
        The table's temperatures are set-points; replace them by calibrated sample temperatures and carry
        the calibration's (shared) uncertainty into the fit (see :mod:`dnmr.activation.temperature_calibration`).
    flagged_rows : {"exclude", "widen"}
        Rows whose fit is flagged as a misfit or as shaped by a nuisance parameter at a limit: set aside
        (default) or fitted with widened errors (see :mod:`dnmr.activation.rate_table`).
    **options
        Passed to :func:`eyring_fit_series`.

    Returns
    -------
    list of EyringResult
        One per process, in the order the tables first name them.
    """
    series = read_rates(path, temperature_stderr, flagged_rows=flagged_rows)
    if process is not None:
        names = [s.process for s in series]
        if process not in names:
            raise InputError(
                f"no process {process!r} in the table{did_you_mean(process, names)}; it has "
                f"{', '.join(repr(n) for n in names)}",
                ", ".join(str(p) for p in rate_table_paths(path)),
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
    if temperature_offset_stderr is not None:
        series = [s.with_offset(temperature_offset_stderr) for s in series]
    return [eyring_fit_series(s, flagged_rows=flagged_rows, **options) for s in series]


def results_to_dict(results: Sequence[EyringResult]) -> dict:
    """One JSON-ready object: the first (or only) process's results at the top level and, when there
    are several processes, all of them in a list under ``processes``."""
    out = results[0].to_dict()
    if len(results) > 1:
        out["processes"] = [r.to_dict() for r in results]
    return out



def _warnings(result: EyringResult) -> list[str]:
    """What the user should know about the reliability of an analysis's numbers, in words."""
    out = []
    n = int(result.used.sum())
    span = float(np.ptp(result.temperature_k))
    if n < FEW_RATES:
        out.append(f"only {n} rates: the errors rest on very few points and outliers cannot be judged; aim for 4 or more")
    if span < NARROW_SPAN_K:
        out.append(
            f"the temperatures span only {span:.1f} K (< {NARROW_SPAN_K:g} K): ΔS‡ and ΔH‡ are poorly "
            "determined; quote ΔG‡ at the harmonic-mean temperature"
        )
    if result.error_basis != BASIS_GIVEN and result.eyring.dof == 0:
        out.append("2 rates without rate errors: the line passes through both and its errors cannot be estimated")
    p = result.chi_square_p_value()
    red = result.eyring.chi_square / max(result.eyring.dof, 1)
    if result.error_basis == BASIS_GIVEN and p < 0.01:
        out.append(
            f"the rates scatter more than their errors allow (reduced chi-square {red:.2f}, p = {p:.2g}); "
            "the quoted errors are probably too small: check the rate errors, or pass --scale-errors "
            "(scale_errors=True) to widen them by the scatter"
        )
    if result.error_basis == BASIS_GIVEN and p > 0.99 and result.eyring.dof >= 3:
        scatter_share = result.error_shares()["enthalpy"].get(SHARE_TEMPERATURES, 0.0)
        why = (f": {100 * scatter_share:.0f} % of the variance of ΔH‡ comes from independent temperature errors "
               "(temperature_stderr, or a calibration's scatter about its curve, taken as run-to-run scatter) — "
               "overstated if the sample temperatures do not stray that much from run to run"
               if scatter_share > 0.25 else "")
        out.append(f"the rates scatter much less than their errors (reduced chi-square {red:.2f}); the errors may be "
                   f"overstated{why}")
    for method, e in result.method_offsets().items():
        if np.isfinite(e.stderr) and abs(e.value) > METHOD_DISAGREEMENT_SIGMA * e.stderr:
            out.append(f"the {method} rates lie {e.value / e.stderr:+.1f} standard errors off the line through the other "
                       f"rates (about {100 * math.expm1(e.value):+.0f} % in k): the methods disagree; check each "
                       "method's temperatures (calibration), and the model behind each fit")
    for t, r in zip(result.temperature_k[result.outliers], result.studentised_residuals[result.outliers]):
        out.append(f"possible outlier at {t:g} K (studentised residual {r:+.1f})")
    out.extend(b.describe() for b in result.bounds if b.violated)
    return out
