"""Activation parameters from exchange rates: Eyring and Arrhenius analysis, and the coalescence estimate.

Method
------
The Eyring equation k = kappa (kB T / h) exp(ΔS‡/R) exp(-ΔH‡/RT) is a straight line

    ln(k/T) = [ln(kappa kB / h) + ΔS‡/R] - (ΔH‡/R) (1/T),

fitted by generalised least squares: the residuals of ln(k/T) have the covariance

    V = diag(sigma_i^2) + G C_T G,   sigma_i = rate_stderr_i / rate_i (the standard error of ln k_i),

where C_T is the covariance of the temperatures (K^2) and G = diag(dr_i/dT_i), dr/dT = -1/T + slope/T^2
the change of a point's residual with its temperature (linearised; iterated with the slope, effective
variance). The estimate is (X^T V^-1 X)^-1 X^T V^-1 y with covariance (X^T V^-1 X)^-1, and the
goodness of fit is chi-square = r^T V^-1 r with n - 2 degrees of freedom. ΔH‡ = -R * slope,
ΔS‡ = R * (intercept - ln(kappa kB/h)); ΔG‡(T) = ΔH‡ - T ΔS‡ with its standard error from the full
covariance of slope and intercept. The Arrhenius line ln k = ln A - Ea/(RT) is fitted the same way.
Energies in kJ/mol (kcal/mol alongside), entropies in J/(mol K).

Temperature errors
------------------
C_T = diag(independent^2) + F F^T: an independent error per point (a ``temperature_stderr`` column or
value, the scatter of a calibration's points about its curve) plus a few *shared* columns F — the
uncertainty of a calibration curve (one column per coefficient) and an unknown probe offset
(``temperature_offset_stderr``: one column, the same in every row). A shared error moves every point
together; it is not scatter and does not inflate the chi-square. C_T is never formed as a dense n x n
matrix: V^-1 is applied by the Woodbury identity, so a table of thousands of rows costs a few vectors.
Because the estimate is linear in the data, its covariance splits exactly into the shares of the rates,
of the independent temperature errors and of each shared source (``error_shares``).

Rate errors shared through held trends
--------------------------------------
``dnmr fit`` holds the shifts, couplings, populations and linewidth of the faster spectra at trends
taken from the slow-exchange spectra, and the trends' errors go into every one of those rates at once
(the linewidth's, fitted jointly with the slow-exchange rates, also into those rates). Its
``rates.csv`` gives these parts (``log10_rate_shared_<source>`` columns: u_ij, log10 k, for each
independent source j of a trend's error; the rest of ``rate_stderr`` is the spectrum's own). The
line keeps the weights 1/sigma_i^2 of the rate errors as given, and its covariance adds A U U^T A^T
("held trends" in ``error_shares``, U the shared parts in ln k, A the linear map of the fit) while the
rate part keeps only what is not shared: counted as independent, the shared parts would average away
over the rows although they move the whole line.  The shared parts are kept out of the weights on
purpose: they are linearised sensitivities of rates that depend on the held values far from linearly
past coalescence, and a generalised least-squares fit trusting them pulls the line by their curvature
(measured on the realistic series of the tests: dH‡ biased by about 1.7 of its standard errors).

Standard errors
---------------
* Rate errors given (every rate has ``rate_stderr``): the errors are taken at face value (covariance not
  rescaled) and the reduced chi-square is reported with its p-value; a poor value raises a warning.
  ``scale_errors=True`` multiplies the covariance by the reduced chi-square instead.
* No rate errors: ordinary least squares, and the rate part of the errors comes from the residual scatter
  (needs at least 3 rates; with 2 the errors are reported as not determined). That scatter already holds
  the independent temperature errors, so only the shared ones are added (through the same linear map).

Rows of a fit table
-------------------
A ``rates.csv`` of ``dnmr fit`` says how each rate was obtained. Rows whose fit failed or left the rate
undetermined carry nothing and are left out. A rate with a 68 % profile interval instead of a symmetric
error (status ``interval``) is used as a value with the standard error of ln k taken as the *larger* of
the interval's two half-widths in ln k (never smaller than the stated error): conservative on the side
the line may fall. A row whose spectrum was a misfit (flag ``misfit``) or whose fit left a nuisance
parameter at a limit of its range (flag ``at-bound:<parameter>``; its interval is then shaped by the
limit) is *flagged*: by default it is set aside (``flagged_rows="exclude"``), listed in the report and
compared with the line, but not fitted, because a model that does not describe the spectrum biases the
rate by more than any widening of its error covers. ``flagged_rows="widen"`` fits it instead, with the
error ``dnmr fit`` wrote — already widened by sqrt(reduced chi-square) for a misfit — and the larger
half-width of its interval. Either way the report names the rows and what was done.

Several tables, several methods
-------------------------------
Rates of one process measured in different ways — lineshapes (``dnmr fit``) where exchange broadens the
lines, magnetisation transfer (``dnmr transfer``: selective inversion, saturation transfer, 2D exchange)
where it is too slow for that — lie on one Eyring line and are best fitted together: the wider the
temperature range, the better ΔS‡ and ΔH‡ are determined. :func:`read_rates` and
:func:`eyring_fit_file` take several tables and join the rows of each process (by the ``process``
column; a table without one joins the only process the others name). Each row keeps its ``method``
(the column of that name; ``lineshape`` where it is absent or empty), which the report, the JSON output
and the figure show; the fit itself treats every row alike, by its stated error. A shared temperature
error (``temperature_offset_stderr``, a calibration) is applied to the joined rows: one probe, one
offset.

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
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, NamedTuple

import numpy as np
from scipy import stats

from dnmr.errors import InputError, did_you_mean
from dnmr.formatting import format_with_error
from dnmr.kinetics import (
    BOLTZMANN,
    GAS_CONSTANT,
    KCAL_PER_KJ,
    PLANCK,
    STANDARD_TEMPERATURE_K,
    coalescence_rate_per_s,
    eyring_barrier,
)
from dnmr.io.tables import SHARED_RATE_ERROR_PREFIX, check_kelvin, read_table
from dnmr.notebook import NotebookView
from dnmr.activation.thermometry import TemperatureErrors

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from dnmr.fitting.posterior import Posterior
    from dnmr.activation.thermometry import TemperatureCalibration

RATE_COLUMNS_REQUIRED = ("temperature_k", "rate_per_s")
RATE_COLUMNS_OPTIONAL = ("rate_stderr", "temperature_stderr", "rate_lower", "rate_upper", "process", "status",
                         "ci68_low_per_s", "ci68_high_per_s", "flags", "reduced_chi_square", "method")
#: The method of a row without a ``method`` column or cell: a lineshape fit (``dnmr fit``).
DEFAULT_METHOD = "lineshape"
#: Fit statuses (``dnmr fit``) whose rows carry no rate information at all.
STATUS_WITHOUT_RATE = ("failed", "undetermined")
#: What to do with rows a fit flagged as a misfit or as shaped by a nuisance parameter at its limit.
FLAGGED_ROW_POLICIES = ("exclude", "widen")
MISFIT_FLAG = "misfit"
NUISANCE_AT_LIMIT_FLAG = "at-bound:"
NARROW_SPAN_K = 30.0  # common practice: a narrower span leaves ΔS‡ poorly determined
FEW_RATES = 4
OUTLIER_THRESHOLD = 3.0  # common practice for studentised residuals
METHOD_DISAGREEMENT_SIGMA = 3.0  # an offset between methods beyond this many standard errors is warned
MAX_RELATIVE_TEMPERATURE_ERROR = 0.2
LEVERAGE_TOLERANCE = 1e-9  # 1 - h below this: the point fixes the line, its residual cannot be judged
SLOPE_TOLERANCE = 1e-9  # relative change of the slope that ends the effective-variance iteration (rounding
# leaves about 1e-10 on tens of thousands of rows)
MAX_ITERATIONS = 50


class Estimate(NamedTuple):
    """A value with its standard error (same unit)."""

    value: float | np.ndarray
    stderr: float | np.ndarray


# --------------------------------------------------------------------------------------------------
# Input: a series of rates of one process
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SetAsideRow:
    """A rate of a fit table that was not fitted because its fit is flagged (see the module notes).

    Attributes
    ----------
    temperature_k : float
        Temperature of the row, K.
    rate_per_s : float
        Its rate, s^-1.
    ln_rate_stderr : float
        Standard error of ln k it would have been fitted with (NaN when none).
    where : str
        The row ('line N').
    reason : str
        Why it was set aside, in words.
    """

    temperature_k: float
    rate_per_s: float
    ln_rate_stderr: float
    where: str
    reason: str


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
    temperature_errors : TemperatureErrors
        Errors of the temperatures, independent and shared (none when the temperatures are taken as exact).
    source : str or None
        File the series was read from.
    lines : tuple of int or None
        File line of each row.
    notes : tuple of str
        What was done with rows of a fit table that are not plain values (left out, set aside, widened).
    set_aside : tuple of SetAsideRow
        Rows with a rate that were not fitted because their fit is flagged.
    setpoint_k : ndarray or None
        The temperatures the table gave, K, when a calibration turned them into the sample temperatures
        of `temperature_k` (None otherwise).
    row_methods : tuple of str or None
        How each row's rate was measured ("lineshape", "inversion", "saturation", "exchange-2d" or a name
        of the user's); None: every row is a lineshape rate.
    row_files : tuple of str or None
        The file of each row, when the series joins several tables (None for one table or arrays).
    rate_shared : dict of str to ndarray
        Parts of the rate errors (ln k) that the rows share, by common source (the
        ``log10_rate_shared_<source>`` columns of ``dnmr fit``: the independent sources of a held
        slow-exchange trend's error);
        each is part of ``rate_stderr``, 0 where a row does not depend on it.
    """

    process: str
    temperature_k: np.ndarray
    rate_per_s: np.ndarray
    rate_stderr: np.ndarray
    rate_lower: np.ndarray
    rate_upper: np.ndarray
    temperature_errors: TemperatureErrors
    source: str | None = None
    lines: tuple[int, ...] | None = None
    notes: tuple[str, ...] = ()
    set_aside: tuple[SetAsideRow, ...] = ()
    setpoint_k: np.ndarray | None = None
    row_methods: tuple[str, ...] | None = None
    row_files: tuple[str, ...] | None = None
    rate_shared: dict[str, np.ndarray] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.temperature_k)

    @property
    def methods(self) -> np.ndarray:
        """The method of each row (str array; "lineshape" where none was given)."""
        return np.array(self.row_methods if self.row_methods is not None else (DEFAULT_METHOD,) * len(self), dtype=str)

    @property
    def method_names(self) -> tuple[str, ...]:
        """The distinct methods, in order of first appearance."""
        return tuple(dict.fromkeys(self.methods.tolist()))

    def row_source(self, row: int) -> str | None:
        """The file a row comes from (the series' source for one table)."""
        return self.row_files[row] if self.row_files is not None else self.source

    @property
    def temperature_stderr(self) -> np.ndarray:
        """Standard error of each temperature (independent and shared parts), K."""
        return self.temperature_errors.stderr

    @property
    def temperature_covariance(self) -> np.ndarray:
        """Dense covariance of the temperatures, K^2 (n x n: for short series only)."""
        return self.temperature_errors.covariance

    @property
    def is_bound(self) -> np.ndarray:
        """True for rows that only bound the rate (no rate_stderr, a rate_lower or rate_upper given)."""
        return ~np.isfinite(self.rate_stderr) & (np.isfinite(self.rate_lower) | np.isfinite(self.rate_upper))

    def where(self, row: int) -> str:
        """Where a row is, for messages: 'line N' of the file ('FILE line N' when the series joins several
        tables), or 'row N' for arrays."""
        line = self.location(row)[1]
        return f"{self.row_files[row]} {line}" if self.row_files is not None else line

    def location(self, row: int) -> tuple[str | None, str]:
        """(file, 'line N') of a row for an :class:`InputError` ('row N' and no file for arrays)."""
        return self.row_source(row), f"line {self.lines[row]}" if self.lines else f"row {row + 1}"

    def with_temperatures(self, temperature_k: np.ndarray, errors: TemperatureErrors) -> "RateSeries":
        """Copy with new temperatures (K) whose errors add to the present ones.

        Used to replace set-point temperatures by calibrated sample temperatures.
        """
        return replace(self, temperature_k=np.asarray(temperature_k, dtype=float),
                       temperature_errors=self.temperature_errors.plus(errors),
                       setpoint_k=self.temperature_k if self.setpoint_k is None else self.setpoint_k)

    def with_offset(self, offset_stderr_k: float) -> "RateSeries":
        """Copy with an unknown probe offset (standard error in K) shared by every temperature."""
        if not 0.0 <= offset_stderr_k <= MAX_RELATIVE_TEMPERATURE_ERROR * float(self.temperature_k.min()):
            raise InputError(f"must be a plausible standard error in K (zero or positive), got {offset_stderr_k:g}",
                             self.source, "temperature_offset_stderr")
        return replace(self, temperature_errors=self.temperature_errors.with_offset(offset_stderr_k))


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


def read_rates(paths: str | Path | Sequence[str | Path], temperature_stderr: float | None = None, *,
               flagged_rows: str = "exclude") -> list[RateSeries]:
    """Read one rates table (CSV), or several joined, into one :class:`RateSeries` per process.

    Columns: ``temperature_k`` and ``rate_per_s`` (required); ``rate_stderr``, ``temperature_stderr``,
    ``rate_lower``, ``rate_upper``, ``process``, ``method`` (optional); the ``status``, ``ci68_low_per_s``,
    ``ci68_high_per_s``, ``flags`` and ``reduced_chi_square`` columns of ``dnmr fit`` are read as the
    module notes say; other columns are ignored. This is the ``rates.csv`` that ``dnmr fit`` or ``dnmr
    transfer`` writes, or a table of your own.

    Parameters
    ----------
    paths : str or Path, or a sequence of them
        The CSV file, or several: their rows are joined process by process (a table without a
        ``process`` column joins the only process the others name), each row keeping its ``method``
        ("lineshape" where the table gives none).
    temperature_stderr : float, optional
        One standard error (K) for every temperature, independent between rows, for tables without a
        temperature_stderr column.
    flagged_rows : {"exclude", "widen"}
        Rows flagged ``misfit`` or ``at-bound:<parameter>``: set aside (default), or fitted with widened
        errors.

    Returns
    -------
    list of RateSeries
        One per process, in order of first appearance.

    Raises
    ------
    InputError
        Missing column, non-numeric cell, a temperature that looks like degrees Celsius, a negative rate,
        a rate with neither value nor bounds... naming the file and line.
    """
    if flagged_rows not in FLAGGED_ROW_POLICIES:
        raise InputError(f"must be one of {', '.join(FLAGGED_ROW_POLICIES)}, got {flagged_rows!r}", where="flagged_rows")
    paths = _path_list(paths)
    tables = [_read_one_table(path, temperature_stderr, flagged_rows, len(paths) > 1) for path in paths]
    series = _join_processes(tables)
    for one in series:
        _check_enough_rates(one)
        check_rate_series(one)
    return series


def _path_list(paths: str | Path | Sequence[str | Path]) -> list[Path]:
    """One path or several as a list (at least one; the same file twice is refused)."""
    out = [Path(paths)] if isinstance(paths, (str, Path)) else [Path(p) for p in paths]
    if not out:
        raise InputError("no rates table given; name at least one", where="rates")
    seen = set()
    for path in out:
        if path.resolve() in seen:
            raise InputError("named twice: each table joins the analysis once", str(path))
        seen.add(path.resolve())
    return out


def _read_one_table(path: Path, temperature_stderr: float | None, flagged_rows: str, several: bool) -> list[RateSeries]:
    """One table into a series per process, not yet checked (a table may hold a single temperature
    that joins others)."""
    table = read_table(path, RATE_COLUMNS_REQUIRED, RATE_COLUMNS_OPTIONAL)
    if temperature_stderr is not None and table.has("temperature_stderr"):
        raise InputError(
            "the table has a temperature_stderr column and one value was given as well; use one of them",
            table.source,
        )
    numbers = {name: table.numbers(name, allow_empty=name != "temperature_k") for name in RATE_COLUMNS_REQUIRED}
    for name in ("rate_stderr", "rate_lower", "rate_upper", "ci68_low_per_s", "ci68_high_per_s", "reduced_chi_square"):
        numbers[name] = table.numbers(name, allow_empty=True) if table.has(name) else np.full(len(table), np.nan)
    if table.has("temperature_stderr"):
        t_err = table.numbers("temperature_stderr")
        _check_temperature_stderr(t_err, table.source, table.where)
    else:
        t_err = np.full(len(table), 0.0 if temperature_stderr is None else float(temperature_stderr))
        _check_temperature_stderr(t_err, table.source, lambda i: "--temperature-stderr")
    n = len(table)
    processes = table.text("process") if table.has("process") else ("",) * n
    status = table.text("status") if table.has("status") else ("",) * n
    flags = table.text("flags") if table.has("flags") else ("",) * n
    methods = tuple(m.strip() or DEFAULT_METHOD for m in (table.text("method") if table.has("method") else ("",) * n))
    where = (lambda i: f"{table.source} {table.where(i)}") if several else table.where
    shared = {name.removeprefix(SHARED_RATE_ERROR_PREFIX):
              math.log(10) * np.nan_to_num(table.numbers(name, allow_empty=True))
              for name in table.columns(SHARED_RATE_ERROR_PREFIX)}
    rows = [_FitRow.read(where(i), i, numbers, status[i], flags[i], flagged_rows) for i in range(n)]
    series = []
    for name in dict.fromkeys(processes):
        mine = [i for i, p in enumerate(processes) if p == name]
        kept = np.array([i for i in mine if rows[i].kept], dtype=int)
        series.append(RateSeries(
            process=name,
            temperature_k=numbers["temperature_k"][kept],
            rate_per_s=numbers["rate_per_s"][kept],
            rate_stderr=numbers["rate_stderr"][kept],
            rate_lower=numbers["rate_lower"][kept],
            rate_upper=numbers["rate_upper"][kept],
            temperature_errors=TemperatureErrors(t_err[kept], np.zeros((len(kept), 0))),
            source=table.source,
            lines=tuple(np.array(table.lines)[kept].tolist()),
            notes=tuple(rows[i].note for i in mine if rows[i].note),
            set_aside=tuple(rows[i].set_aside for i in mine if rows[i].set_aside is not None),
            row_methods=tuple(methods[i] for i in kept) if table.has("method") else None,
            row_files=(table.source,) * len(kept) if several else None,
            rate_shared={name: values[kept] for name, values in shared.items()},
        ))
    return series


def _join_processes(tables: list[list[RateSeries]]) -> list[RateSeries]:
    """The series of several tables joined by process; a table without process names joins the only one
    the others name."""
    if len(tables) == 1:
        return tables[0]
    named = list(dict.fromkeys(s.process for table in tables for s in table if s.process))
    groups: dict[str, list[RateSeries]] = {}
    for table in tables:
        for s in table:
            if not s.process and len(named) > 1:
                raise InputError(f"the table has no process column but the other tables name processes "
                                 f"{', '.join(repr(n) for n in named)}; add a process column saying which process "
                                 "each rate belongs to", s.source)
            groups.setdefault(s.process or (named[0] if named else ""), []).append(s)
    return [_joined(name, parts) for name, parts in groups.items()]


def _joined(process: str, parts: list[RateSeries]) -> RateSeries:
    """The rows of several series of one process as one series (each row keeps its method and file)."""
    if len(parts) == 1:
        return replace(parts[0], process=process)
    columns = {name: np.concatenate([getattr(p, name) for p in parts])
               for name in ("temperature_k", "rate_per_s", "rate_stderr", "rate_lower", "rate_upper")}
    return RateSeries(
        process=process,
        **columns,
        temperature_errors=TemperatureErrors(np.concatenate([p.temperature_errors.independent_k for p in parts]),
                                             np.zeros((sum(len(p) for p in parts), 0))),
        source=", ".join(dict.fromkeys(str(p.source) for p in parts)),
        lines=tuple(line for p in parts for line in p.lines),
        notes=tuple(note for p in parts for note in p.notes),
        set_aside=tuple(row for p in parts for row in p.set_aside),
        row_methods=tuple(m for p in parts for m in p.methods.tolist()),
        row_files=tuple(f for p in parts for f in p.row_files),
        rate_shared={name: np.concatenate([p.rate_shared.get(name, np.zeros(len(p))) for p in parts])
                     for name in dict.fromkeys(n for p in parts for n in p.rate_shared)},
    )


@dataclass
class _FitRow:
    """What one row of a fit table becomes: kept (perhaps with a widened error), left out or set aside."""

    kept: bool = True
    note: str = ""
    set_aside: SetAsideRow | None = None

    @classmethod
    def read(cls, line: str, i: int, numbers: dict, status: str, flags: str, policy: str) -> "_FitRow":
        """Apply the status and flags of row `i`, at `line` of its table (editing `numbers` in place where
        the error is widened)."""
        t, k = numbers["temperature_k"][i], numbers["rate_per_s"][i]
        where = f"{line} ({t:.2f} K)"
        if status in STATUS_WITHOUT_RATE:
            return cls(False, f"{where}: left out, the fit is {status}")
        problems = _flag_problems(flags.split(";"), numbers["reduced_chi_square"][i])
        low, high = numbers["ci68_low_per_s"][i], numbers["ci68_high_per_s"][i]
        interval = 0 < low < high and np.isfinite(k) and k > 0
        done = []
        if interval and (status == "interval" or problems):
            sigma = _larger_half_width(k, low, high, numbers["rate_stderr"][i] / k)
            numbers["rate_stderr"][i] = k * sigma
            numbers["rate_lower"][i] = numbers["rate_upper"][i] = np.nan
            done.append(f"68 % interval {low:.3g}–{high:.3g} s⁻¹ used with σ(ln k) = {sigma:.3g}, the larger of its "
                        "half-widths in ln k")
        if not problems:
            return cls(True, f"{where}: " + "; ".join(done) if done else "")
        what = " and ".join(problems)
        if policy == "exclude":
            sigma = numbers["rate_stderr"][i] / k if np.isfinite(k) else math.nan
            row = SetAsideRow(float(t), float(k), float(sigma), line, what) if np.isfinite(k) else None
            return cls(False, f"{where}: set aside, {what} (pass --flagged-rows widen, or flagged_rows='widen', "
                              "to fit it with a widened error)", row)
        if MISFIT_FLAG in what:
            done.insert(0, "its error is the one dnmr fit widened by sqrt(reduced chi-square)")
        return cls(True, f"{where}: fitted although {what}: " + "; ".join(done or ["its error as given"]))


def _flag_problems(flags: Sequence[str], reduced_chi_square: float) -> list[str]:
    """The flags of a fit that make its rate doubtful, in words."""
    problems = []
    if MISFIT_FLAG in flags:
        chi = f" (reduced chi-square {reduced_chi_square:.3g})" if np.isfinite(reduced_chi_square) else ""
        problems.append(f"its spectrum is a misfit{chi}")
    limits = [f.removeprefix(NUISANCE_AT_LIMIT_FLAG) for f in flags if f.startswith(NUISANCE_AT_LIMIT_FLAG)]
    if limits:
        problems.append(f"{', '.join(limits)} ended at a limit of its range")
    return problems


def _larger_half_width(rate: float, low: float, high: float, stated: float) -> float:
    """Standard error of ln k from a 68 % interval: its larger half-width in ln k, at least `stated` (NaN ignored)."""
    half = max(math.log(high / rate), math.log(rate / low))
    return max(half, stated) if np.isfinite(stated) else half


def _check_enough_rates(series: RateSeries) -> None:
    """A series whose flagged rows were set aside may be left with too few values: say how to go on."""
    values = ~series.is_bound
    if series.set_aside and len(np.unique(series.temperature_k[values])) < 2:
        raise InputError(
            f"process {series.process or '(unnamed)'}: {len(series.set_aside)} of its rates come from flagged fits "
            f"({series.set_aside[0].reason}, ...) and were set aside, leaving fewer than 2 temperatures; refit the "
            "spectra (see the notes in the table) or pass --flagged-rows widen to fit them with widened errors",
            series.source,
        )


def check_rate_series(series: RateSeries) -> None:
    """Check a series row by row; raise :class:`InputError` naming the first bad row."""
    t_err, bound = series.temperature_stderr, series.is_bound  # once: each is a pass over every row
    for i in range(len(series)):
        _check_row(series, i, t_err[i], bound[i])
    values = ~bound
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


def _check_row(series: RateSeries, i: int, t_err: float, bound: bool) -> None:
    t = series.temperature_k[i]
    check_kelvin(t, "temperature_k", *series.location(i))
    if not (0.0 <= t_err <= MAX_RELATIVE_TEMPERATURE_ERROR * t):
        _fail(series, i, f"temperature_stderr = {t_err:g} K is not a plausible standard error (0 to {MAX_RELATIVE_TEMPERATURE_ERROR * t:.0f} K)")
    for name in ("rate_lower", "rate_upper"):
        limit = getattr(series, name)[i]
        if np.isfinite(limit) and limit <= 0:
            _fail(series, i, f"{name} must be positive (s^-1), got {limit:g}")
    if bound:
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
    raise InputError(message, *series.location(i))


# --------------------------------------------------------------------------------------------------
# Straight-line fits in 1/T: generalised least squares with a diagonal-plus-shared covariance
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ResidualCovariance:
    """Covariance of the residuals, diag(diagonal) + shared @ shared.T, applied without forming it.

    Attributes
    ----------
    diagonal : ndarray
        (n,) independent variances (positive).
    shared : ndarray
        (n, m) factor of the shared part, m small.
    """

    diagonal: np.ndarray
    shared: np.ndarray

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """V^-1 rhs by the Woodbury identity: O(n m^2), never an n x n matrix."""
        d_rhs = rhs / (self.diagonal[:, None] if rhs.ndim == 2 else self.diagonal)
        if not self.shared.shape[1]:
            return d_rhs
        d_u = self.shared / self.diagonal[:, None]
        core = np.eye(self.shared.shape[1]) + self.shared.T @ d_u
        return d_rhs - d_u @ np.linalg.solve(core, self.shared.T @ d_rhs)

    def variances(self) -> np.ndarray:
        """Diagonal of V."""
        return self.diagonal + (self.shared**2).sum(axis=1)


class _Gls(NamedTuple):
    """One generalised least-squares solution: coefficients, (X^T V^-1 X)^-1, the linear map A with
    coefficients = A y, residuals and chi-square r^T V^-1 r."""

    beta: np.ndarray
    normal: np.ndarray
    linear_map: np.ndarray
    residuals: np.ndarray
    chi_square: float


def _gls(design: np.ndarray, y: np.ndarray, covariance: ResidualCovariance) -> _Gls:
    weighted = covariance.solve(design)
    normal = np.linalg.inv(design.T @ weighted)
    linear_map = normal @ weighted.T
    beta = linear_map @ y
    residuals = y - design @ beta
    return _Gls(beta, normal, linear_map, residuals, float(residuals @ covariance.solve(residuals)))


def _line(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares intercept and slope of y = a + b x."""
    sw = w.sum(-1)
    xm = (w * x).sum(-1) / sw
    ym = (w * y).sum(-1) / sw
    dx = x - xm
    slope = (w * dx * (y - ym)).sum(-1) / (w * dx * dx).sum(-1)
    return ym - slope * xm, slope


def _normal_covariance(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """(X^T W X)^-1 of the straight line, written with centred sums for accuracy."""
    sw = w.sum()
    xm = (w * x).sum() / sw
    sxx = (w * (x - xm) ** 2).sum()
    return np.array([[1 / sw + xm**2 / sxx, -xm / sxx], [-xm / sxx, 1 / sxx]])


SHARE_RATES = "rates"
SHARE_SCATTER = "scatter"
SHARE_TEMPERATURES = "temperature scatter"
SHARE_HELD = "held trends"


@dataclass(frozen=True)
class LineFit:
    """Least-squares line y = intercept + slope * (1/T), with y = ln k - power * ln T.

    Attributes
    ----------
    intercept, slope : float
        Fitted coefficients (slope in K).
    covariance : ndarray
        Total 2 x 2 covariance of (intercept, slope).
    covariance_parts : dict of str to ndarray
        `covariance` split by source (they add up to it): "rates" (or "scatter" when the errors come from
        the scatter about the line), "temperature scatter" (independent temperature errors), "held trends"
        (rate errors shared through held trends) and one entry per shared temperature error
        ("calibration", "probe offset", "given covariance").
    residuals : ndarray
        y - fitted y of each point (ln units).
    weights : ndarray
        1/sigma^2 of ln k from the rate errors alone (ones without rate errors).
    residual_covariance : ResidualCovariance
        Covariance V of the residuals the line was fitted with (rates and temperatures).
    chi_square : float
        r^T V^-1 r, the shared temperature errors counted as correlated (NaN without rate errors).
    dof : int
        Degrees of freedom, n - 2.
    scatter : float
        sqrt(weighted residual sum of squares / dof): without rate errors, the scatter of ln k about the
        line; with rate errors, the square root of the reduced chi-square of the rate errors alone.
    """

    intercept: float
    slope: float
    covariance: np.ndarray
    covariance_parts: dict
    residuals: np.ndarray
    weights: np.ndarray
    residual_covariance: ResidualCovariance
    chi_square: float
    dof: int
    scatter: float

    @property
    def energy(self) -> Estimate:
        """-R * slope with its standard error, kJ/mol: ΔH‡ of the Eyring line, Ea of the Arrhenius line."""
        return Estimate(-GAS_CONSTANT * self.slope / 1e3, GAS_CONSTANT * math.sqrt(self.covariance[1, 1]) / 1e3)

    def predict(self, temperature_k: float | np.ndarray) -> Estimate:
        """Fitted ordinate at `temperature_k` (K) with its standard error."""
        x = 1.0 / np.asarray(temperature_k, dtype=float)
        c = self.covariance
        var = c[0, 0] + 2 * x * c[0, 1] + x * x * c[1, 1]
        return Estimate(self.intercept + self.slope * x, np.sqrt(var))


def _shared_parts(linear_map: np.ndarray, shared: np.ndarray, sources: Sequence[str]) -> dict:
    """Covariance of the coefficients from each shared temperature source (columns grouped by name)."""
    parts = {}
    for name in dict.fromkeys(sources):
        columns = linear_map @ shared[:, [j for j, s in enumerate(sources) if s == name]]
        parts[name] = columns @ columns.T
    return parts


def _fit_line(series: RateSeries, power: int, scaled: bool) -> LineFit:
    """Fit y = ln k - power ln T against 1/T over the rows of `series` (all values, no bounds)."""
    t, k = series.temperature_k, series.rate_per_s
    x, y = 1.0 / t, np.log(k) - power * np.log(t)
    design = np.column_stack([np.ones_like(x), x])
    errors = series.temperature_errors
    sigma2 = (series.rate_stderr / k) ** 2
    have_errors = bool(np.isfinite(sigma2).all())
    w = 1.0 / sigma2 if have_errors else np.ones_like(t)
    dof = len(t) - 2
    slope = float(_line(x, y, w)[1])
    for _ in range(MAX_ITERATIONS):
        gradient = -power / t + slope / t**2  # d(residual)/dT
        shared = gradient[:, None] * errors.shared_k
        independent = (gradient * errors.independent_k) ** 2
        # without rate errors the scatter holds the independent errors of rates and temperatures alike
        covariance = ResidualCovariance(sigma2 + independent if have_errors else np.ones_like(t), shared)
        fit = _gls(design, y, covariance if have_errors else ResidualCovariance(np.ones_like(t), shared[:, :0]))
        converged = abs(fit.beta[1] - slope) <= SLOPE_TOLERANCE * abs(slope)
        slope = float(fit.beta[1])
        if converged or not errors.any:
            break
    weighted_ss = float((w * fit.residuals**2).sum())
    scatter = math.sqrt(weighted_ss / dof) if dof > 0 else math.nan
    a = fit.linear_map
    if have_errors:
        # the parts of the rate errors shared through held trends move the rows together: the line keeps its
        # weights (the rate errors as given), and its covariance counts those parts as correlated
        held = a @ np.column_stack(list(series.rate_shared.values())) if series.rate_shared else np.zeros((2, 0))
        own = np.clip(sigma2 - sum(v**2 for v in series.rate_shared.values()), 0.0, None)
        parts = {SHARE_RATES: (a * own) @ a.T, SHARE_TEMPERATURES: (a * independent) @ a.T, SHARE_HELD: held @ held.T}
        chi_square = fit.chi_square
    else:
        parts = {SHARE_SCATTER: fit.normal * scatter**2}
        chi_square = math.nan
    parts.update(_shared_parts(a, shared, errors.sources))
    if scaled and have_errors and dof > 0:
        parts = {name: part * chi_square / dof for name, part in parts.items()}
    parts = {name: part for name, part in parts.items() if part.any() or name in (SHARE_RATES, SHARE_SCATTER)}
    return LineFit(float(fit.beta[0]), slope, sum(parts.values()), parts, fit.residuals, w, covariance,
                   chi_square, dof, scatter)


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
        Where the standard errors come from.
    flagged_rows : str
        What was done with rows whose fit is flagged ("exclude" or "widen"; see the module notes).
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
        """ΔH‡, kJ/mol."""
        return self.eyring.energy.value

    @property
    def enthalpy_stderr(self) -> float:
        """Standard error of ΔH‡, kJ/mol."""
        return self.eyring.energy.stderr

    @property
    def entropy_j_mol_k(self) -> float:
        """ΔS‡, J/(mol K)."""
        return GAS_CONSTANT * (self.eyring.intercept - self._kappa_term)

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
            "methods": {m: int((self.methods == m).sum()) for m in self.method_names},
            "method_offsets": {m: {"ln_rate_offset": e.value, "ln_rate_offset_stderr": e.stderr}
                               for m, e in self.method_offsets().items()},
            "temperature_min_k": float(self.temperature_k.min()),
            "temperature_max_k": float(self.temperature_k.max()),
            "error_basis": self.error_basis,
            "chi_square": line.chi_square,
            "degrees_of_freedom": line.dof,
            "reduced_chi_square": line.chi_square / line.dof if line.dof > 0 else math.nan,
            "chi_square_p_value": self._chi_square_p_value(),
            "ln_rate_scatter": line.scatter if not self._errors_given else math.nan,
            "temperature_errors": self._temperature_error_text(),
            "temperature_error_sources": list(self.temperature_error_sources),
            "error_shares": self.error_shares(),
            "flagged_rows": self.flagged_rows,
            "set_aside": [self._set_aside_point(row) for row in self.series.set_aside],
            "points": [self._point(i) for i in range(int(self.used.sum()))],
            "bounds": [
                {
                    "temperature_k": b.temperature_k,
                    "rate_lower": b.rate_lower,
                    "rate_upper": b.rate_upper,
                    "fitted_rate_per_s": b.fitted_rate_per_s,
                    "violated": b.violated,
                    "sigma": b.sigma,
                    "method": b.method,
                }
                for b in self.bounds
            ],
            "warnings": list(self.warnings),
        }
        return out

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
        """Eyring plot with fit, 95 % confidence band and residuals (see :func:`dnmr.reporting.plotting.plot_eyring`)."""
        from dnmr.reporting.plotting import plot_eyring

        return plot_eyring([self], figure=figure)

    def sample_posterior(self, **settings) -> "Posterior":
        """Posterior samples of ΔH‡, ΔS‡ and ΔG‡ (needs emcee); see :func:`dnmr.fitting.posterior.sample_eyring_posterior`
        for the method and the settings (steps, walkers, burn, thin, seed)."""
        from dnmr.fitting.posterior import sample_eyring_posterior

        return sample_eyring_posterior(self, **settings)


def method_offset(result: EyringResult, method: str) -> Estimate:
    """Offset of one method's rates from the Eyring line through the other rates, in ln k, with its error.

    The line is refitted with one more coefficient, a constant added to ln k for the rows of `method`
    (generalised least squares with the covariance of the fit: rate and temperature errors); the
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
    scatter = result.error_basis == BASIS_SCATTER
    fit = _gls(design, y, ResidualCovariance(np.ones_like(x), np.zeros((len(x), 0))) if scatter
               else line.residual_covariance)
    variance = fit.normal[2, 2]
    dof = len(x) - 3
    if scatter:
        variance = variance * fit.chi_square / dof if dof > 0 else math.nan
    elif result.error_basis == BASIS_SCALED and dof > 0:
        variance *= fit.chi_square / dof
    return Estimate(float(fit.beta[2]), math.sqrt(variance))


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
    _check_temperature_stderr(stderr, None, lambda i: f"temperature_stderr[{i}]")
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
    fitted = _subset(series, used)
    errors_given = bool(np.isfinite(fitted.rate_stderr).all())
    if scale_errors is False and not errors_given:
        raise InputError("without rate_stderr the errors can only come from the scatter; give rate errors", where="scale_errors")
    scaled = (not errors_given) or bool(scale_errors)
    basis = BASIS_SCATTER if not errors_given else (BASIS_SCALED if scaled else BASIS_GIVEN)
    eyring = _fit_line(fitted, power=1, scaled=scaled)
    arrhenius = _fit_line(fitted, power=0, scaled=scaled)
    methods = series.methods
    bounds = tuple(
        replace(_check_bound(eyring, series.temperature_k[i], series.rate_lower[i], series.rate_upper[i],
                             series.where(i)), method=str(methods[i]))
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
        studentised_residuals=_studentised(fitted, basis),
        outliers=_outlier_flags(fitted, basis, outlier_threshold),
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
        the calibration's (shared) uncertainty into the fit (see :mod:`dnmr.activation.thermometry`).
    flagged_rows : {"exclude", "widen"}
        Rows whose fit is flagged as a misfit or as shaped by a nuisance parameter at a limit: set aside
        (default) or fitted with widened errors (see the module notes).
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
                ", ".join(str(p) for p in _path_list(path)),
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


def _subset(series: RateSeries, rows: np.ndarray) -> RateSeries:
    return replace(
        series,
        temperature_k=series.temperature_k[rows],
        rate_per_s=series.rate_per_s[rows],
        rate_stderr=series.rate_stderr[rows],
        rate_lower=series.rate_lower[rows],
        rate_upper=series.rate_upper[rows],
        temperature_errors=series.temperature_errors.subset(rows),
        lines=None if series.lines is None else tuple(np.array(series.lines)[rows].tolist()),
        setpoint_k=None if series.setpoint_k is None else series.setpoint_k[rows],
        row_methods=None if series.row_methods is None else tuple(series.methods[rows].tolist()),
        row_files=None if series.row_files is None else tuple(np.array(series.row_files)[rows].tolist()),
        rate_shared={name: values[rows] for name, values in series.rate_shared.items()},
    )


def _studentised(series: RateSeries, basis: str) -> np.ndarray:
    """Studentised residuals of the Eyring line through the rows of `series` (all values).

    With known errors e_i / sqrt(Var e_i), Var e = V - X C X^T (V the residual covariance with the
    temperature errors, C the covariance of the line); otherwise externally studentised,
    e sqrt(w) / (s_(i) sqrt(1 - h)), s_(i) the scatter without point i. A point of leverage h = 1 (each
    of two points, or one whose weight dwarfs the others') fixes the line through itself: its residual
    is zero whatever the data, has no variance left (1 - h is zero, or a rounding error either side of
    it) and cannot be judged, so it gets NaN.
    """
    line = _fit_line(series, power=1, scaled=basis != BASIS_GIVEN)
    x, e, w = 1.0 / series.temperature_k, line.residuals, line.weights
    out = np.full_like(e, np.nan)
    if basis == BASIS_GIVEN:
        variance = line.residual_covariance.variances()
        # judged as the line was weighted: the held trends' shared errors as if independent
        c = line.covariance - line.covariance_parts.get(SHARE_HELD, 0.0)
        keep = 1.0 - (c[0, 0] + 2 * x * c[0, 1] + x * x * c[1, 1]) / variance
        judged = keep > LEVERAGE_TOLERANCE
        out[judged] = e[judged] / np.sqrt(variance[judged] * keep[judged])
        return out
    normal = _normal_covariance(x, w)
    keep = 1.0 - w * (normal[0, 0] + 2 * x * normal[0, 1] + x * x * normal[1, 1])
    judged = keep > LEVERAGE_TOLERANCE
    dof = len(x) - 3
    if dof <= 0:
        return out
    deleted_ss = (w * e**2).sum() - w[judged] * e[judged] ** 2 / keep[judged]
    with np.errstate(divide="ignore", invalid="ignore"):  # exact data: 0/0, no residual to judge
        out[judged] = e[judged] * np.sqrt(w[judged]) / np.sqrt(deleted_ss / dof * keep[judged])
    return out


def _outlier_flags(series: RateSeries, basis: str, threshold: float) -> np.ndarray:
    """Flag outliers one at a time: the worst point beyond the limit is set aside and the rest judged again.

    The limit is `threshold` for normal (known-error) residuals, and the Student-t quantile of the same
    tail probability for externally studentised ones. Setting points aside only for the judging keeps
    one gross outlier from dragging the line and making its neighbours look bad.
    """
    known = basis == BASIS_GIVEN
    flags = np.zeros(len(series), dtype=bool)
    tail = stats.norm.sf(threshold)
    while (~flags).sum() >= (3 if known else 4):
        keep = np.flatnonzero(~flags)
        r = np.abs(np.nan_to_num(_studentised(_subset(series, keep), basis)))
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
            f"the temperatures span only {span:.1f} K (< {NARROW_SPAN_K:g} K): ΔS‡ and ΔH‡ are poorly "
            "determined; quote ΔG‡ at the harmonic-mean temperature"
        )
    if result.error_basis != BASIS_GIVEN and result.eyring.dof == 0:
        out.append("2 rates without rate errors: the line passes through both and its errors cannot be estimated")
    p = result._chi_square_p_value()
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


# --------------------------------------------------------------------------------------------------
# Report
# --------------------------------------------------------------------------------------------------


def _heading(text: str, rule: str = "-") -> list[str]:
    """A heading underlined with `rule` (the setext style of Markdown: '=' for the title, '-' for sections)."""
    return [text, rule * len(text)]


def _report(r: EyringResult) -> str:
    d = r.to_dict()
    lines = _heading(f"Eyring analysis — process {r.process!r}" if r.process else "Eyring analysis", "=")
    lines += _summary_lines(r, d) + [""]
    lines += _heading("Activation parameters") + _parameter_lines(r, d) + [""]
    if len(r.eyring.covariance_parts) > 1:
        lines += _heading("Where the errors come from") + _share_lines(r) + [""]
    lines += _heading("Arrhenius")
    lines.append(f"  {'Ea':<16}{format_with_error(d['activation_energy_kj_mol'], d['activation_energy_stderr']):>18} kJ/mol")
    lines.append(f"  {'ln(A / s⁻¹)':<16}{format_with_error(d['ln_prefactor'], d['ln_prefactor_stderr']):>18}")
    lines += [""] + _heading("Rates fitted") + _point_lines(d)
    if len(d["method_offsets"]):
        lines += [""] + _heading("Agreement of the methods") + _offset_lines(d)
    if r.series.set_aside:
        lines += [""] + _heading("Rates set aside (flagged fits, not fitted)")
        lines.append(f"  {'T / K':>9} {'k / s⁻¹':>11} {'line k':>11} {'off by':>8}  why")
        for row, p in zip(r.series.set_aside, d["set_aside"]):
            off = f"{p['deviation_sigma']:+7.1f}σ" if np.isfinite(p["deviation_sigma"]) else f"{'':>8}"
            lines.append(f"  {row.temperature_k:9.2f} {row.rate_per_s:11.4g} {p['fitted_rate_per_s']:11.4g} {off}  "
                         f"{row.where}: {row.reason}")
    if r.bounds:
        lines += [""] + _heading("Bounds (not fitted)") + [f"  {'T / K':>9} {'lower':>11} {'upper':>11} {'line k':>11}"]
        for b in r.bounds:
            lo = f"{b.rate_lower:11.4g}" if np.isfinite(b.rate_lower) else f"{'–':>11}"
            hi = f"{b.rate_upper:11.4g}" if np.isfinite(b.rate_upper) else f"{'–':>11}"
            lines.append(f"  {b.temperature_k:9.2f} {lo} {hi} {b.fitted_rate_per_s:11.4g}  "
                         + ("VIOLATED" if b.violated else "respected"))
    if r.warnings:
        lines += [""] + _heading("Warnings and notes") + [f"  - {w}" for w in r.warnings]
    return "\n".join(lines)


def _summary_lines(r: EyringResult, d: dict) -> list[str]:
    t = r.temperature_k
    bounds = f" (+ {d['n_bounds']} bound{'s' if d['n_bounds'] > 1 else ''}, not fitted)" if r.bounds else ""
    aside = len(r.series.set_aside)
    lines = [f"  rates fitted         {d['n_rates']}{bounds}"]
    if r.method_names != (DEFAULT_METHOD,):
        lines.append("  methods              " + ", ".join(_method_span(r, m) for m in r.method_names))
    lines += [f"  temperatures         {t.min():.2f} – {t.max():.2f} K (span {np.ptp(t):.1f} K)",
             f"  errors from          {r.error_basis}"]
    if r.error_basis == BASIS_SCATTER:
        lines.append(f"  scatter of ln k      {r.eyring.scatter:.3g} (about {100 * r.eyring.scatter:.2g} % in k)")
    elif r.eyring.dof > 0:
        shared = " (shared temperature errors counted as correlated)" if r.temperature_error_sources else ""
        lines.append(f"  reduced chi-square   {d['reduced_chi_square']:.3g} ({r.eyring.dof} degrees of freedom, "
                     f"p = {d['chi_square_p_value']:.2g}){shared}")
    if d["temperature_errors"] == "none":
        lines.append("  temperature errors   none given: temperatures taken as exact (no calibration error included)")
    else:
        lines.append(f"  temperature errors   {d['temperature_errors']}, by generalised least squares")
    if aside or r.flagged_rows == "widen":
        what = (f"{aside} set aside (see below)" if r.flagged_rows == "exclude"
                else "fitted with widened errors (see the notes)")
        lines.append(f"  flagged fits         {what}; policy '{r.flagged_rows}'")
    if r.transmission != 1.0:
        lines.append(f"  transmission κ       {r.transmission:g}")
    return lines


def _method_span(r: EyringResult, method: str) -> str:
    """'inversion 4 (246–264 K)': a method's fitted rates and their temperatures (bounds counted apart)."""
    t = r.temperature_k[r.methods == method]
    bounds = sum(b.method == method for b in r.bounds)
    extra = f" + {bounds} bound{'s' if bounds > 1 else ''}" if bounds else ""
    return f"{method} {len(t)}{extra}" + (f" ({t.min():.0f}–{t.max():.0f} K)" if len(t) else "")


def _parameter_lines(r: EyringResult, d: dict) -> list[str]:
    t_hm = d["harmonic_mean_temperature_k"]
    rows = [
        ("ΔH‡", "kJ/mol", d["enthalpy_kj_mol"], d["enthalpy_stderr"], "kcal/mol"),
        ("ΔS‡", "J/(mol K)", d["entropy_j_mol_k"], d["entropy_stderr"], "cal/(mol K)"),
        ("ΔG‡(298.15 K)", "kJ/mol", d["gibbs_298_kj_mol"], d["gibbs_298_stderr"], "kcal/mol"),
        (f"ΔG‡({t_hm:.1f} K)", "kJ/mol", d["gibbs_hm_kj_mol"], d["gibbs_hm_stderr"], "kcal/mol"),
    ]
    lines = [f"  {name:<16}{format_with_error(value, err):>18} {unit:<11}"
             f"({format_with_error(value * KCAL_PER_KJ, err * KCAL_PER_KJ)} {unit2})"
             for name, unit, value, err, unit2 in rows]
    lines.append(f"  corr(ΔH‡, ΔS‡)  {r.correlation:>18.4f}")
    lines.append(f"  {t_hm:.1f} K = weighted harmonic mean of the temperatures, where ΔG‡ is least entangled with "
                 f"ΔH‡: corr(ΔG‡, ΔH‡) = {d['correlation_gibbs_hm_enthalpy']:+.3f}")
    if abs(d["correlation_gibbs_hm_enthalpy"]) > 0.1:
        lines.append(f"  with the temperature errors, the uncorrelated point moves to {d['uncorrelated_temperature_k']:.1f} K")
    return lines


def _share_lines(r: EyringResult) -> list[str]:
    """Percentages of each parameter's variance by source."""
    shares = r.error_shares()
    names = list(r.eyring.covariance_parts)
    width = max(len(n) for n in names) + 2
    lines = ["  share of the variance of " + "".join(f"{n:>{width}}" for n in names)]
    for quantity, label in (("enthalpy", "ΔH‡"), ("entropy", "ΔS‡"), ("gibbs_298", "ΔG‡(298.15 K)")):
        cells = "".join(f"{100 * shares[quantity][n]:>{width - 2}.0f} %" if np.isfinite(shares[quantity][n])
                        else f"{'n.d.':>{width}}" for n in names)
        lines.append(f"  {label:<24}{cells}")
    return lines


def _point_lines(d: dict) -> list[str]:
    """The fitted rates; by method (each under its name, by temperature) when there are several.  With a
    calibration each row starts with the table's set-point."""
    calibrated = any(np.isfinite(p["setpoint_k"]) for p in d["points"])
    head = f"  {'T set / K':>9}" if calibrated else ""
    lines = [f"{head}  {'T / K':>9} {'± T':>6} {'k / s⁻¹':>11} {'± k':>10} {'line k':>11} {'stud. res.':>10}"]
    methods = d["methods"]
    if len(methods) == 1:
        lines += [_point_line(p, calibrated) for p in d["points"]]
    else:
        for method, count in methods.items():
            if count:
                lines.append(f"  {method} ({count} rate{'s' if count > 1 else ''})")
                mine = sorted((p for p in d["points"] if p["method"] == method), key=lambda p: p["temperature_k"])
                lines += [_point_line(p, calibrated) for p in mine]
    if calibrated:
        lines.append("  T set: the table's set-point; T: the sample temperature through the calibration, ± T its "
                     "standard error")
    return lines


def _point_line(p: dict, calibrated: bool = False) -> str:
    err = f"{p['rate_stderr']:10.3g}" if np.isfinite(p["rate_stderr"]) else f"{'':>10}"
    setpoint = f"  {p['setpoint_k']:9.2f}" if calibrated else ""
    return (f"{setpoint}  {p['temperature_k']:9.2f} {p['temperature_stderr']:6.2f} {p['rate_per_s']:11.4g} {err} "
            f"{p['fitted_rate_per_s']:11.4g} {p['studentised_residual']:10.2f}" + ("  outlier?" if p["outlier"] else ""))


def _offset_lines(d: dict) -> list[str]:
    """Each method's offset from the line through the other rates (ln k, and in percent of k)."""
    lines = ["  offset of ln k from the line through the other rates (refitted with a constant for the method)"]
    for method, e in d["method_offsets"].items():
        value, err = e["ln_rate_offset"], e["ln_rate_offset_stderr"]
        if not np.isfinite(value):
            lines.append(f"  {method:<14} not determined: the rows cannot separate an offset from the line")
            continue
        sigma = f" ({value / err:+.1f}σ)" if np.isfinite(err) and err > 0 else ""
        lines.append(f"  {method:<14} {format_with_error(value, err):>18}{sigma}, about {100 * math.expm1(value):+.0f} % in k")
    return lines


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
    """ΔG‡ at the coalescence temperature of two equally populated, uncoupled sites.

    Attributes
    ----------
    coalescence_temperature_k : float
        Observed coalescence temperature T_c, K.
    shift_difference_hz : float
        Shift difference of the two sites in slow exchange, Hz.
    rate_per_s : float
        Rate constant at coalescence, k_c = pi dnu / sqrt(2), s^-1.
    gibbs_kj_mol : float
        ΔG‡ at T_c, kJ/mol.
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
                f"  T_c = {self.coalescence_temperature_k:g} K, Δν = {self.shift_difference_hz:g} Hz",
                f"  k_c = {self.rate_per_s:.4g} s⁻¹",
                f"  ΔG‡(T_c) = {g} kJ/mol ({g_kcal} kcal/mol)",
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
    """Quick ΔG‡ (kJ/mol) from a coalescence temperature (K) and a shift difference (Hz), equal populations.

    ΔG‡_c = R T_c ln( sqrt(2) kB T_c / (pi h dnu) ): the Gutowsky-Holm rate at coalescence
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
    k_c = coalescence_rate_per_s(dnu)
    gibbs = eyring_barrier(k_c, t, transmission)
    d_dt = GAS_CONSTANT * (math.log(transmission * math.sqrt(2.0) * BOLTZMANN * t / (math.pi * PLANCK * dnu)) + 1) / 1e3
    d_dnu = -GAS_CONSTANT * t / dnu / 1e3
    stderr = math.hypot(d_dt * temperature_stderr, d_dnu * shift_difference_stderr)
    return CoalescenceEstimate(t, dnu, k_c, float(gibbs), stderr, float(transmission))
