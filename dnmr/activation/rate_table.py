"""Rates tables (CSV) into series of rates: the rows of a fit table, and several tables joined.

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
:func:`~dnmr.activation.eyring.eyring_fit_file` take several tables and join the rows of each process (by
the ``process`` column; a table without one joins the only process the others name). Each row keeps its ``method``
(the column of that name; ``lineshape`` where it is absent or empty), which the report, the JSON output
and the figure show; the fit itself treats every row alike, by its stated error. A shared temperature
error (``temperature_offset_stderr``, a calibration) is applied to the joined rows: one probe, one
offset.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from dnmr.activation.rates import DEFAULT_METHOD, RateSeries, SetAsideRow, check_rate_series, check_temperature_stderr
from dnmr.activation.temperature_errors import TemperatureErrors
from dnmr.errors import InputError
from dnmr.io.tables import SHARED_RATE_ERROR_PREFIX, read_table

RATE_COLUMNS_REQUIRED = ("temperature_k", "rate_per_s")
RATE_COLUMNS_OPTIONAL = ("rate_stderr", "temperature_stderr", "rate_lower", "rate_upper", "process", "status",
                         "rate_ci68_lower", "rate_ci68_upper", "flags", "reduced_chi_square", "method")
#: Columns of rates.csv of earlier releases and their names now (refused with a "renamed to" line).
RENAMED_RATE_COLUMNS = {"ci68_low_per_s": "rate_ci68_lower", "ci68_high_per_s": "rate_ci68_upper"}
#: Fit statuses (``dnmr fit``) whose rows carry no rate information at all.
STATUS_WITHOUT_RATE = ("failed", "undetermined")
#: What to do with rows a fit flagged as a misfit or as shaped by a nuisance parameter at its limit.
FLAGGED_ROW_POLICIES = ("exclude", "widen")
MISFIT_FLAG = "misfit"
NUISANCE_AT_LIMIT_FLAG = "at-bound:"


def read_rates(paths: str | Path | Sequence[str | Path], temperature_stderr: float | None = None, *,
               flagged_rows: str = "exclude") -> list[RateSeries]:
    """Read one rates table (CSV), or several joined, into one :class:`RateSeries` per process.

    Columns: ``temperature_k`` and ``rate_per_s`` (required); ``rate_stderr``, ``temperature_stderr``,
    ``rate_lower``, ``rate_upper``, ``process``, ``method`` (optional); the ``status``, ``rate_ci68_lower``,
    ``rate_ci68_upper``, ``flags`` and ``reduced_chi_square`` columns of ``dnmr fit`` are read as the
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
    paths = rate_table_paths(paths)
    tables = [_read_one_table(path, temperature_stderr, flagged_rows, len(paths) > 1) for path in paths]
    series = _join_processes(tables)
    for one in series:
        _check_enough_rates(one)
        check_rate_series(one)
    return series


def rate_table_paths(paths: str | Path | Sequence[str | Path]) -> list[Path]:
    """One rates table or several as a list of paths (at least one; the same file twice is refused)."""
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
    table = read_table(path, RATE_COLUMNS_REQUIRED, RATE_COLUMNS_OPTIONAL, RENAMED_RATE_COLUMNS)
    if temperature_stderr is not None and table.has("temperature_stderr"):
        raise InputError(
            "the table has a temperature_stderr column and one value was given as well; use one of them",
            table.source,
        )
    numbers = {name: table.numbers(name, allow_empty=name != "temperature_k") for name in RATE_COLUMNS_REQUIRED}
    for name in ("rate_stderr", "rate_lower", "rate_upper", "rate_ci68_lower", "rate_ci68_upper", "reduced_chi_square"):
        numbers[name] = table.numbers(name, allow_empty=True) if table.has(name) else np.full(len(table), np.nan)
    if table.has("temperature_stderr"):
        t_err = table.numbers("temperature_stderr")
        check_temperature_stderr(t_err, table.source, table.where)
    else:
        t_err = np.full(len(table), 0.0 if temperature_stderr is None else float(temperature_stderr))
        check_temperature_stderr(t_err, table.source, lambda i: "--temperature-stderr")
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
        low, high = numbers["rate_ci68_lower"][i], numbers["rate_ci68_upper"][i]
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
