"""Two-column text spectra: comma, tab, semicolon or whitespace separated, with or without a header.

A header row (or a last ``#`` comment line right above the data, as ``numpy.savetxt(header=...)`` writes
it) names the columns (``ppm``, ``hz``, ``intensity``...).  Lines starting with ``#`` are comments.  The
axis may run in either direction; its unit comes from the header, else from the ``axis`` argument, else
ppm is assumed.  A Hz axis is converted with ``ppm = hz / frequency_mhz`` (0 ppm is 0 Hz).  With a
semicolon separator a decimal comma is accepted; decimal commas with other separators, and a file without
header whose assumed ppm axis lies beyond ±1000 ppm (a Hz axis, by all odds), are refused with the fix.
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from dnmr.errors import InputError
from dnmr.io.measured import (MAX_POINTS, MeasuredSpectrum, assemble_spectrum, excerpt, read_bounded_text,
                              reconcile_frequency)

HZ_SUSPECT_PPM = 1000.0
"""A headerless axis read as ppm whose values all lie beyond this (or span more) is taken to be in Hz."""
_DECIMAL_COMMA_ROW = re.compile(r"^\s*[-+]?\d+,\d+(?:[eE][-+]?\d+)?(?:\s+[-+]?\d+,\d+(?:[eE][-+]?\d+)?)+\s*$")
_INTENSITY_WORDS = {"intensity", "int", "intens", "real", "re", "amplitude", "signal", "y", "absorption"}


@dataclass(frozen=True)
class _TextLayout:
    """Where the numbers of a text file start and how its columns are separated and named."""

    lines: list[str]
    start: int  # index of the first data line
    sep: str | None  # None: whitespace
    header: list[str] | None
    ncols: int

    def data_line_numbers(self) -> list[int]:
        """1-based line number of each data row."""
        return [n for n, line in enumerate(self.lines[self.start:], self.start + 1) if _is_data(line)]


def _is_data(line: str) -> bool:
    text = line.strip()
    return bool(text) and not text.startswith("#")


def _column_role(name: str) -> str | None:
    """``"ppm"``, ``"hz"``, ``"intensity"`` or None for a header name (case-insensitive)."""
    words = set(re.findall(r"[a-z]+", name.lower()))
    if "ppm" in words:
        return "ppm"
    if "hz" in words:
        return "hz"
    if words & _INTENSITY_WORDS:
        return "intensity"
    return None


def _delimiter(line: str) -> str | None:
    """The separator of a data line: tab, semicolon, comma, or None for whitespace."""
    for sep in ("\t", ";", ","):
        if sep in line:
            return sep
    return None


def _split(line: str, sep: str | None) -> list[str]:
    fields = [f.strip().strip("\"'") for f in line.split("#", 1)[0].split(sep)]
    while fields and not fields[-1]:  # a trailing separator
        fields.pop()
    return fields


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _text_layout(text: str) -> _TextLayout:
    """Find the header (a first non-numeric line, or a naming # comment right above the data)."""
    lines = text.splitlines()
    if len(lines) > MAX_POINTS + 10_000:
        raise InputError(f"the file has {len(lines)} lines, more than {MAX_POINTS} points allow")
    content = (i for i, line in enumerate(lines) if _is_data(line))
    first = next(content, None)
    if first is None:
        raise InputError("the file holds no data lines (only blank lines or # comments)")
    start, header, second = first, None, next(content, None)
    for i in (first, second):  # a decimal comma in the first data line, or in the one after a header
        if i is not None and _DECIMAL_COMMA_ROW.match(lines[i]):
            raise InputError("the numbers use a decimal comma: separate the columns with semicolons (a decimal "
                             "comma is read then) or export with decimal points", where=f"line {i + 1}")
    if not all(_is_number(f) for f in _split(lines[first], _delimiter(lines[first]))):
        start = second
        if start is None:
            raise InputError("the file has a header but no data lines", where=f"line {first + 1}")
    sep = _delimiter(lines[start])
    if sep == ";":  # semicolon-separated files may use a decimal comma
        lines = [line.replace(",", ".") for line in lines]
    if start != first:
        header = _split(lines[first], sep)
    elif first and lines[first - 1].lstrip().startswith("#"):
        names = _split(lines[first - 1].lstrip().lstrip("#"), sep)
        if len(names) == len(_split(lines[start], sep)) and any(map(_column_role, names)):
            header = names
    ncols = len(header) if header is not None else len(_split(lines[start], sep))
    return _TextLayout(lines, start, sep, header, ncols)


def _choose_columns(header: list[str] | None, ncols: int, axis: str | None) -> tuple[int, str, int, str]:
    """(axis column, its unit, intensity column, where the unit came from)."""
    if header is None:
        if ncols != 2:
            raise InputError(
                f"{ncols} columns and no header row: add a header naming the ppm (or hz) and "
                "intensity columns, or keep two columns",
            )
        return 0, axis or "ppm", 1, "argument" if axis else "default (ppm)"
    roles = [_column_role(name) for name in header]
    intensity_cols = [i for i, r in enumerate(roles) if r == "intensity"]
    if len(intensity_cols) > 1:
        raise InputError(f"several intensity columns ({_names(header[i] for i in intensity_cols)}); keep one", where="header")
    unit_cols = {}  # unit -> its first column
    for i, role in enumerate(roles):
        if role in ("ppm", "hz"):
            unit_cols.setdefault(role, i)
    if axis and unit_cols and axis not in unit_cols:
        raise InputError(
            f'the header names a {"/".join(unit_cols)} axis but axis="{axis}" was given; '
            "drop the axis argument or fix the header",
            where="header",
        )
    if unit_cols:
        unit = axis or ("ppm" if "ppm" in unit_cols else "hz")
        axis_col, source = unit_cols[unit], "header"
    elif ncols == 2:
        axis_col = 1 if intensity_cols == [0] else 0
        unit, source = axis or "ppm", "argument" if axis else "default (ppm)"
    else:
        raise InputError(
            f"none of the columns ({_names(header)}) is named ppm or hz; name the axis column",
            where="header",
        )
    others = [i for i in range(ncols) if i != axis_col and roles[i] not in ("ppm", "hz")]
    if intensity_cols:
        intensity_col = intensity_cols[0]
    elif len(others) == 1:
        intensity_col = others[0]
    else:
        raise InputError(
            f"cannot tell which of the columns ({_names(header)}) holds the intensity; "
            'name it "intensity"',
            where="header",
        )
    return axis_col, unit, intensity_col, source


def _numeric_table(layout: _TextLayout) -> np.ndarray:
    """An (n, ncols) float array of the data rows (numpy's parser); errors name the first bad line."""
    try:
        return np.loadtxt(
            layout.lines[layout.start:], delimiter=layout.sep, comments="#", quotechar='"',
            usecols=range(layout.ncols), ndmin=2,
        )
    except ValueError as exc:
        raise _first_bad_line(layout) or InputError(f"unreadable numbers ({exc})") from None


def _first_bad_line(layout: _TextLayout) -> InputError | None:
    """The error for the first data line that is short of values or holds a non-number."""
    for lineno in layout.data_line_numbers():
        fields = _split(layout.lines[lineno - 1], layout.sep)
        if len(fields) < layout.ncols:
            return InputError(
                f"{len(fields)} values where the file has {layout.ncols} columns; the line may be "
                "truncated or use another separator",
                where=f"line {lineno}",
            )
        bad = next((f for f in fields[: layout.ncols] if not _is_number(f)), None)
        if bad is not None:
            return InputError(f"{excerpt(bad)} is not a number; fix or remove the line (comments start with #)",
                              where=f"line {lineno}")
    return None


def _names(fields) -> str:
    """Column names to quote in a message (see :func:`excerpt`)."""
    return ", ".join(excerpt(f) for f in fields)


def _frequency_from_columns(ppm: np.ndarray, hz: np.ndarray) -> float | None:
    """The spectrometer frequency (MHz) when a ppm and a Hz column agree as hz = ppm * f."""
    denominator = float(np.dot(ppm, ppm))
    if denominator == 0 or not np.all(np.isfinite(hz)):
        return None
    frequency = float(np.dot(hz, ppm)) / denominator
    consistent = np.max(np.abs(hz - frequency * ppm)) <= 1e-6 * np.max(np.abs(hz))
    return frequency if consistent and frequency > 0 else None


def read_text(path: Path, frequency_mhz: float | None, axis: str | None) -> MeasuredSpectrum:
    """The spectrum of a two-column text file; `frequency_mhz` (MHz) for a Hz axis, `axis` ("ppm" or "hz") for
    a file without a header naming it."""
    layout = _text_layout(read_bounded_text(path))
    axis_col, unit, intensity_col, unit_source = _choose_columns(layout.header, layout.ncols, axis)
    table = _numeric_table(layout)
    x, intensity = table[:, axis_col], table[:, intensity_col]
    metadata = {
        "axis_unit": unit,
        "axis_unit_from": unit_source,
        "separator": {None: "whitespace", "\t": "tab"}.get(layout.sep, layout.sep),
        "columns": layout.header,
    }
    roles = [_column_role(name) for name in layout.header or []]
    if "ppm" in roles and "hz" in roles:
        recorded = _frequency_from_columns(table[:, roles.index("ppm")], table[:, roles.index("hz")])
        frequency_mhz = reconcile_frequency(recorded, frequency_mhz, "header")
        metadata["frequency_from"] = "ppm and hz columns" if recorded else None
    if unit_source.startswith("default") and (np.abs(x).min() >= HZ_SUSPECT_PPM or np.ptp(x) > HZ_SUSPECT_PPM):
        raise InputError(
            f"the file has no header, so its axis was read as ppm, but it runs from {x.min():.6g} to {x.max():.6g}: "
            'a Hz axis by all odds; add a header line "hz,intensity" (or "ppm,intensity" if it really is ppm), '
            'or give axis = "hz" (series file [[spectrum]] axis, read_spectrum(..., axis="hz"))')
    if unit == "hz":
        if frequency_mhz is None:
            raise InputError(
                "the axis is in Hz but the spectrometer frequency is not known: give "
                "frequency_mhz (MHz of the observed nucleus), or an axis in ppm",
                where="header" if unit_source == "header" else "axis",
            )
        x = x / frequency_mhz
    return assemble_spectrum(x, intensity, frequency_mhz, path, "text", metadata,
                     lambda i: f"line {layout.data_line_numbers()[i]}")
