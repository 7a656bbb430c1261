"""Small numeric CSV tables (rates, temperature calibrations) read with line-numbered errors.

A table is comma-separated text with one header row of column names. Blank lines and lines starting
with ``#`` are skipped; cells are stripped of surrounding blanks; columns the reader does not know are
kept but ignored by the analyses. Every problem is an :class:`~dnmr.errors.InputError` that names the
file and the line.
"""
from __future__ import annotations

import csv
import difflib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from dnmr.errors import InputError, did_you_mean
from dnmr.io.inputfiles import read_input_bytes
from dnmr.kinetics import MAX_TEMPERATURE_K

MAX_TABLE_BYTES = 64 * 2**20
"""Largest CSV table read (bytes): far more than any table of rates or temperatures."""
SHARED_RATE_ERROR_PREFIX = "log10_rate_shared_"
"""Columns of a rates table (``dnmr fit`` writes them) holding parts of a rate's error, in log10 k, that the
rows share: one column per common source (a direction of a held slow-exchange trend), an empty cell where
a row does not depend on it.  The analyses count these parts as correlated across the rows."""


@dataclass(frozen=True)
class Table:
    """Raw cells of a CSV table, by column, with the file line number of every row.

    Attributes
    ----------
    source : str
        Path of the file read.
    cells : dict of str to tuple of str
        Cell texts of each column (empty string for an empty cell).
    lines : tuple of int
        Line number in the file (1-based) of each row.
    """

    source: str
    cells: dict[str, tuple[str, ...]]
    lines: tuple[int, ...]

    def __len__(self) -> int:
        return len(self.lines)

    def has(self, column: str) -> bool:
        """True when the header names `column`."""
        return column in self.cells

    def numbers(self, column: str, *, allow_empty: bool = False) -> np.ndarray:
        """Values of a numeric column as floats; empty cells become NaN when `allow_empty`.

        Raises
        ------
        InputError
            A cell that is not a finite number (or is empty when that is not allowed), naming its line.
        """
        values = np.full(len(self), np.nan)
        for i, text in enumerate(self.cells[column]):
            if text == "" and allow_empty:
                continue
            values[i] = self._number(text, column, i)
        return values

    def columns(self, prefix: str = "") -> tuple[str, ...]:
        """The header's column names that start with `prefix`, in file order."""
        return tuple(name for name in self.cells if name.startswith(prefix))

    def text(self, column: str) -> tuple[str, ...]:
        """Cell texts of a column."""
        return self.cells[column]

    def where(self, row: int) -> str:
        """'line N' of a row, for error messages."""
        return f"line {self.lines[row]}"

    def _number(self, text: str, column: str, row: int) -> float:
        if text == "":
            raise InputError(f"empty {column} cell; fill it in", self.source, self.where(row))
        try:
            value = float(text)
        except ValueError:
            raise InputError(f"{column} must be a number, got {text!r}", self.source, self.where(row)) from None
        if not np.isfinite(value):
            raise InputError(f"{column} must be a finite number, got {text!r}", self.source, self.where(row))
        return value


def read_table(path: str | Path, required: Sequence[str], optional: Sequence[str] = (),
               renamed: Mapping[str, str] | None = None) -> Table:
    """Read a CSV table that must have the `required` columns.

    Parameters
    ----------
    path : str or Path
        The CSV file (UTF-8, comma separated, header row first).
    required : sequence of str
        Column names that must be present.
    optional : sequence of str
        Column names the caller understands. A header cell that is not known but is close to a missing
        optional name (a likely misspelling, e.g. ``rate_stder``) is an error rather than silently ignored.
    renamed : mapping of str to str, optional
        Column names of earlier releases and their new names: a header naming one is refused with a
        "renamed to" line.

    Returns
    -------
    Table

    Raises
    ------
    InputError
        Unreadable or empty file, a missing or misspelt column, a duplicated column, or a row with the wrong
        number of cells.
    """
    source = str(path)
    rows = _data_rows(Path(path), source)
    if not rows:
        raise InputError("the file is empty; it needs a header row and at least one data row", source)
    header_line, header = rows[0]
    names = [name.strip() for name in header]
    for name in names:
        if name in (renamed or {}):
            raise InputError(f"column {name!r} was renamed to {renamed[name]!r}; rename it in the header",
                             source, f"line {header_line}")
    _check_header(names, required, optional, source, f"line {header_line}")
    body = rows[1:]
    if not body:
        raise InputError("the table has a header but no data rows", source)
    for line, row in body:
        if len(row) != len(names):
            raise InputError(
                f"{len(row)} cells but the header has {len(names)} columns ({', '.join(names)})",
                source,
                f"line {line}",
            )
    cells = {name: tuple(row[j].strip() for _, row in body) for j, name in enumerate(names)}
    return Table(source, cells, tuple(line for line, _ in body))


def _data_rows(path: Path, source: str) -> list[tuple[int, list[str]]]:
    if not path.exists():
        raise InputError("file not found", source)
    if path.is_dir():
        raise InputError("is a folder, expected a CSV file", source)
    try:
        text = read_input_bytes(path, MAX_TABLE_BYTES, "CSV table").decode("utf-8-sig")
    except UnicodeDecodeError:
        raise InputError("not a UTF-8 text file; save the table as CSV text", source) from None
    except OSError as err:
        raise InputError(f"cannot read the file ({err.strerror})", source) from None
    rows = []
    for number, row in enumerate(csv.reader(text.splitlines()), start=1):
        if not row or all(cell.strip() == "" for cell in row) or row[0].lstrip().startswith("#"):
            continue
        rows.append((number, row))
    return rows


def _check_header(names: list[str], required: Sequence[str], optional: Sequence[str], source: str, where: str) -> None:
    seen = set()
    for name in names:
        if name in seen:
            raise InputError(f"column {name!r} appears twice in the header", source, where)
        seen.add(name)
    for name in required:
        if name not in seen:
            raise InputError(
                f"missing column {name!r}{did_you_mean(name, names)}; the header must name "
                f"{', '.join(required)}",
                source,
                where,
            )
    absent_optional = [name for name in optional if name not in seen]
    known = set(required) | set(optional)
    for name in names:
        if name in known:
            continue
        close = difflib.get_close_matches(name, absent_optional, n=1, cutoff=0.8)
        if close:
            raise InputError(f"unknown column {name!r} (did you mean {close[0]!r}?)", source, where)


CELSIUS_SUSPECT_BELOW_K = 100.0  # no solution-state VT work goes this cold; such numbers are degrees Celsius


def check_kelvin(value: float, name: str, source: str | None = None, where: str | None = None) -> None:
    """Refuse a temperature (K) that is not finite or looks like degrees Celsius (below 100 K).

    Raises
    ------
    InputError
        Naming `name`, the file and the place, and giving the kelvin value the number would be in Celsius.
    """
    if not np.isfinite(value) or value > MAX_TEMPERATURE_K:
        raise InputError(f"{name} must be a finite temperature in kelvin, at most {MAX_TEMPERATURE_K:g} K",
                         source, where)
    if value < CELSIUS_SUSPECT_BELOW_K:
        raise InputError(
            f"{name} = {value:g} looks like degrees Celsius; give the temperature in kelvin "
            f"({value:g} °C = {value + 273.15:.2f} K)",
            source,
            where,
        )


#: Every temperature of a series below this (K) is worth a second look: cold VT work exists (CD2Cl2,
#: freon mixtures), but such a list is as often degrees Celsius typed as kelvin (common practice).
CELSIUS_HINT_BELOW_K = 200.0


def celsius_hints(temperatures_k: Sequence[float], model_temperature_k: float | None = None) -> list[str]:
    """Warnings (not refusals) for temperatures (K) that may be degrees Celsius typed as kelvin.

    One warning when every temperature is below :data:`CELSIUS_HINT_BELOW_K` (values from 100 to 200,
    which :func:`check_kelvin` lets through), naming the model's [conditions] temperature_k (K) when that
    is at or above it; none otherwise.
    """
    t = np.asarray(temperatures_k, float)
    if t.size == 0 or t.max() >= CELSIUS_HINT_BELOW_K:
        return []
    model = (f" while the model's [conditions] temperature_k is {model_temperature_k:g} K"
             if model_temperature_k is not None and model_temperature_k >= CELSIUS_HINT_BELOW_K else "")
    return [f"every temperature_k is below {CELSIUS_HINT_BELOW_K:g} K ({t.min():g} to {t.max():g} K){model}: if they "
            f"are degrees Celsius, give kelvin ({t.min():g} °C = {t.min() + 273.15:.2f} K); fitted as kelvin"]
