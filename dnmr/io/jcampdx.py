"""JCAMP-DX 1D NMR spectra (IUPAC open standard), read through the reference libraries.

nmrglue parses ``XYDATA=(X++(Y..Y))`` in AFFN or compressed ASDF form and ``NTUPLES`` with real and
imaginary pages (the real part is used); the jcamp package parses ``XYPOINTS=(XY..XY)``.  The axis is taken
in the file's ``##XUNITS``; a Hz axis is turned into ppm with ``##.OBSERVE FREQUENCY`` and referenced by
``##.SHIFT REFERENCE``, else ``##$OFFSET`` (ppm of the first point), else 0 Hz = 0 ppm.  Truncated files,
and declared point counts or compressed runs beyond :data:`dnmr.io.measured.MAX_POINTS`, are refused before
anything is allocated.
"""
from __future__ import annotations

import re
import warnings
from pathlib import Path

import numpy as np

from dnmr.errors import InputError
from dnmr.io.measured import (MAX_POINTS, MeasuredSpectrum, assemble_spectrum, checked_frequency, excerpt,
                              read_bounded_text, reconcile_frequency)

_DUP_VALUES = {c: str(v) for v, c in enumerate("STUVWXYZs", start=1)}
_DUP_TOKEN = re.compile(r"([S-Zs])(\d*)")
_DATA_LABEL = re.compile(r"##\s*(XYDATA|XYPOINTS|DATA\s*TABLE)\s*=", re.I)
_END_LABEL = re.compile(r"^##\s*END\s*=", re.I | re.M)
_COUNT_LABEL = re.compile(r"^##\s*(N\s*POINTS|VAR[\s_]*DIM)\s*=(.*)$", re.I | re.M)


def _check_jcamp_budget(text: str) -> None:
    """Refuse truncated files, and declared point counts or DUP runs that would expand past MAX_POINTS."""
    if not _END_LABEL.search(text):
        raise InputError(
            "the file has no closing ##END= record: it is truncated or not JCAMP-DX; export it again"
        )
    for match in _COUNT_LABEL.finditer(text):
        for value in match.group(2).split(","):
            value = value.strip()
            if not (value.isascii() and value.isdigit() and len(value.lstrip("0")) <= 9 and 0 < int(value) <= MAX_POINTS):
                raise InputError(
                    f"{excerpt(value)} is not a point count between 1 and {MAX_POINTS}; the file is "
                    "damaged or not a 1D spectrum",
                    where=f"##{match.group(1).upper()}",
                )
    expanded, in_data = 0, False
    for line in text.splitlines():
        if line.startswith("##"):
            in_data = bool(_DATA_LABEL.match(line))
            continue
        if in_data:
            for char, digits in _DUP_TOKEN.findall(line.split("$$", 1)[0]):
                expanded += int(_DUP_VALUES[char] + digits)
    if expanded > MAX_POINTS:
        raise InputError(
            f"the compressed data repeat values {expanded} times, more than {MAX_POINTS} points "
            "allow; the file is damaged",
            where="##XYDATA",
        )


def _record(dic: dict, key: str) -> str | None:
    """First value of a JCAMP-DX record (nmrglue key form: upper case, no spaces)."""
    values = dic.get(key)
    return values[0].strip() if values else None


def _record_float(dic: dict, key: str, label: str) -> float | None:
    value = _record(dic, key)
    if value is None:
        return None
    try:
        return float(value if "." in value else value.replace(",", "."))  # tolerate a decimal comma
    except ValueError:
        raise InputError(f"{excerpt(value)} is not a number", where=f"##{label}") from None


def _ntuple_field(dic: dict, key: str, index: int) -> str | None:
    value = _record(dic, key)
    parts = [] if value is None else [p.strip() for p in value.split(",")]
    return parts[index] if index < len(parts) and parts[index] else None


def _jcamp_axis(dic: dict, npoints_read: int) -> tuple[np.ndarray, str]:
    """Evenly spaced abscissa (file units) and its unit, from FIRSTX/LASTX/NPOINTS or the NTUPLES X column."""
    if (_record(dic, "DATACLASS") or "").upper() == "NTUPLES":
        symbols = [s.strip().upper() for s in (_record(dic, "SYMBOL") or "").split(",")]
        if "X" not in symbols:
            raise InputError("NTUPLES without an X column", where="##SYMBOL")
        i = symbols.index("X")
        values = [_ntuple_field(dic, key, i) for key in ("FIRST", "LAST", "VARDIM", "UNITS")]
        labels = ("FIRST", "LAST", "VAR_DIM", "UNITS")
    else:
        values = [_record(dic, key) for key in ("FIRSTX", "LASTX", "NPOINTS", "XUNITS")]
        labels = ("FIRSTX", "LASTX", "NPOINTS", "XUNITS")
    for value, label in zip(values, labels):
        if value is None:
            raise InputError(f"the record ##{label} is missing; the file cannot place its points",
                             where=f"##{label}")
    first, last, count, unit = values
    try:
        first_x, last_x = float(first), float(last)
    except ValueError:
        raise InputError(f"{excerpt(first)} or {excerpt(last)} is not a number", where=f"##{labels[0]}") from None
    _check_count(int(count), npoints_read, labels[2])
    return np.linspace(first_x, last_x, npoints_read), unit.upper()


def _check_count(declared: int, read: int, label: str) -> None:
    if declared != read:
        raise InputError(
            f"{label}={declared} but the data table holds {read} values; the file is truncated "
            "or damaged",
            where=f"##{label}",
        )


def _jcamp_ppm(x: np.ndarray, unit: str, frequency_mhz: float | None, dic: dict) -> tuple[np.ndarray, str]:
    """Abscissa in ppm and how it was referenced."""
    if unit == "PPM":
        return x, "XUNITS=PPM"
    if unit not in ("HZ", "HERTZ"):
        raise InputError(f'XUNITS={excerpt(unit)} is not an NMR axis; export the spectrum in Hz or ppm',
                         where="##XUNITS")
    if frequency_mhz is None:
        raise InputError(
            "the axis is in Hz but the file has no ##.OBSERVE FREQUENCY; give frequency_mhz "
            "(MHz of the observed nucleus)",
            where="##XUNITS",
        )
    reference = _record(dic, ".SHIFTREFERENCE")
    if reference is not None:
        point, shift = _shift_reference(reference, x.size)
        return (x - x[point]) / frequency_mhz + shift, ".SHIFT REFERENCE"
    offset = _record_float(dic, "$OFFSET", "$OFFSET")
    if offset is not None:
        return (x - x[0]) / frequency_mhz + offset, "$OFFSET"
    return x / frequency_mhz, "0 Hz = 0 ppm"


def _shift_reference(text: str, npoints: int) -> tuple[int, float]:
    """(0-based point, ppm) from ``(INTERNAL, TMS, 1, 0.0)``."""
    parts = [p.strip() for p in text.strip("() ").split(",")]
    try:
        point, shift = int(parts[2]), float(parts[3])
    except (IndexError, ValueError):
        raise InputError(f"{excerpt(text)} is not (type, compound, point, ppm)",
                         where="##.SHIFT REFERENCE") from None
    if not 1 <= point <= npoints:
        raise InputError(f"reference point {point} lies outside the {npoints} points",
                         where="##.SHIFT REFERENCE")
    return point - 1, shift


def _jcamp_values(path: Path) -> tuple[dict, np.ndarray, np.ndarray | None]:
    """Records, intensities and (for XYPOINTS) abscissae, through the reference libraries."""
    import jcamp
    from nmrglue.fileio import jcampdx

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            dic, data = jcampdx.read(str(path))
            if data is None and _xypoints_block(dic) is not None:
                table = jcamp.readfile(str(path))
                x, y = (np.asarray(table[k], dtype=float) for k in ("x", "y"))
                return _xypoints_block(dic), y, x
        except Exception as exc:  # the libraries raise assorted errors on damaged files
            raise InputError(f"cannot parse the JCAMP-DX data ({exc}); the file is damaged") from None
    if data is None:
        why = str(caught[-1].message) if caught else "no block"
        raise InputError(
            f"no 1D spectrum found ({why}); a JCAMP-DX spectrum needs a ##TITLE= block with "
            "##XYDATA=(X++(Y..Y)), ##XYPOINTS=(XY..XY) or NTUPLES pages",
        )
    if isinstance(data, list):
        if data[0] is None:
            raise InputError("the NTUPLES pages hold no real part", where="##PAGE")
        data = data[0]
    elif (_record(dic, "DATACLASS") or "").upper() == "NTUPLES":
        raise InputError(
            "NTUPLES with a real page only are not read (their scaling is ambiguous); export "
            "XYDATA or real and imaginary pages",
            where="##DATA TABLE",
        )
    return dic, np.asarray(data, dtype=float), None


def _xypoints_block(dic: dict) -> dict | None:
    """The first block (nmrglue sorts blocks by data type) holding an ##XYPOINTS table."""
    blocks = [b for key, group in dic.items() if key.startswith("_datatype_") for b in group]
    return next((b for b in blocks if "XYPOINTS" in b), None)


def read_jcamp(path: Path, frequency_mhz: float | None, axis: str | None) -> MeasuredSpectrum:
    """The spectrum of a JCAMP-DX file; `frequency_mhz` (MHz) for a Hz axis the file gives no frequency for
    (`axis` is not used: the file records its unit)."""
    _check_jcamp_budget(read_bounded_text(path))
    dic, intensity, x = _jcamp_values(path)
    recorded = checked_frequency(_record_float(dic, ".OBSERVEFREQUENCY", ".OBSERVE FREQUENCY"),
                                  "##.OBSERVE FREQUENCY")
    frequency_mhz = reconcile_frequency(recorded, frequency_mhz, "##.OBSERVE FREQUENCY")
    if x is None:
        x, unit = _jcamp_axis(dic, intensity.size)
    else:
        unit = (_record(dic, "XUNITS") or "").upper()
        _check_count(x.size, intensity.size, "XYPOINTS abscissae")
        _check_count(int(_record(dic, "NPOINTS") or x.size), x.size, "NPOINTS")
    ppm, referenced = _jcamp_ppm(x, unit, frequency_mhz, dic)
    metadata = {
        "title": _record(dic, "TITLE"),
        "data_type": _record(dic, "DATATYPE"),
        "nucleus": (_record(dic, ".OBSERVENUCLEUS") or "").lstrip("^").strip() or None,
        "x_units": unit,
        "referenced_by": referenced,
        "offset_ppm": _record_float(dic, "$OFFSET", "$OFFSET"),
        "temperature_k": _record_float(dic, "$TE", "$TE"),
        "temperature_record": _record(dic, "TEMPERATURE"),
    }
    return assemble_spectrum(ppm, intensity, frequency_mhz, path, "jcamp-dx", metadata,
                     lambda i: f"data point {i + 1}")
