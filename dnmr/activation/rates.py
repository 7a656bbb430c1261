"""A series of rates of one exchange process: its rows (values, errors, bounds), their temperatures and checks.

A row is a value (``rate_per_s``, with or without ``rate_stderr``) or a bound (empty ``rate_stderr``,
``rate_lower`` and/or ``rate_upper`` filled); each keeps how it was measured (its ``method``) and where it
came from (file and line). The temperatures carry their errors, independent and shared
(:class:`~dnmr.activation.temperature_errors.TemperatureErrors`). Tables are read into series by
:mod:`dnmr.activation.rate_table`; the Eyring analysis (:mod:`dnmr.activation.eyring`) fits them.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from dnmr.activation.temperature_errors import TemperatureErrors
from dnmr.errors import InputError
from dnmr.io.tables import check_kelvin

#: The method of a row without a ``method`` column or cell: a lineshape fit (``dnmr fit``).
DEFAULT_METHOD = "lineshape"
#: Largest plausible standard error of a temperature, as a share of the temperature.
MAX_RELATIVE_TEMPERATURE_ERROR = 0.2


@dataclass(frozen=True)
class SetAsideRow:
    """A rate of a fit table that was not fitted because its fit is flagged (see
    :mod:`dnmr.activation.rate_table`).

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
        slow-exchange trend's error); each is part of ``rate_stderr``, 0 where a row does not depend on it.
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

    @property
    def rate_shared_columns(self) -> np.ndarray:
        """The parts of the rate errors shared through held trends as an (n, m) array, ln k (m = 0 when none)."""
        return np.column_stack(list(self.rate_shared.values())) if self.rate_shared else np.zeros((len(self), 0))

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

    def subset(self, rows: np.ndarray) -> "RateSeries":
        """Copy with the selected rows only (a boolean mask or indices); the notes and set-aside rows stay."""
        return replace(
            self,
            temperature_k=self.temperature_k[rows],
            rate_per_s=self.rate_per_s[rows],
            rate_stderr=self.rate_stderr[rows],
            rate_lower=self.rate_lower[rows],
            rate_upper=self.rate_upper[rows],
            temperature_errors=self.temperature_errors.subset(rows),
            lines=None if self.lines is None else tuple(np.array(self.lines)[rows].tolist()),
            setpoint_k=None if self.setpoint_k is None else self.setpoint_k[rows],
            row_methods=None if self.row_methods is None else tuple(self.methods[rows].tolist()),
            row_files=None if self.row_files is None else tuple(np.array(self.row_files)[rows].tolist()),
            rate_shared={name: values[rows] for name, values in self.rate_shared.items()},
        )


def check_temperature_stderr(stderr: np.ndarray, source: str | None, where: Callable[[int], str]) -> None:
    """Refuse a negative or missing standard error of a temperature (K), naming the file and `where(row)`."""
    for i in np.flatnonzero(~(stderr >= 0)):
        raise InputError(f"temperature_stderr must be zero or positive (K), got {stderr[i]:g}", source, where(i))


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
