"""Reading measured 1D spectra: two-column text, JCAMP-DX, and processed spectrometer folders.

Every reader returns one :class:`MeasuredSpectrum`: a strictly ascending chemical-shift axis in ppm,
the real intensities, the spectrometer frequency of the observed nucleus (MHz) when the file records
it, and where it came from.  Input files are only ever read.

Formats
-------
``text``
    Two columns (comma, tab, semicolon or whitespace separated), optional header row naming the
    columns (``ppm``, ``hz``, ``intensity``...; a last ``#`` comment line right above the data
    counts as a header when it names the columns, as ``numpy.savetxt(header=...)`` writes it).
    Lines starting with ``#`` are comments.  Axis in either direction.  The axis unit comes from
    the header, else from the ``axis`` argument, else ppm is assumed.  A Hz axis is converted with
    ``ppm = hz / frequency_mhz`` (0 ppm is 0 Hz) and so needs the frequency.  With a semicolon
    separator a decimal comma is accepted; decimal commas with other separators, and a file without
    header whose assumed ppm axis lies beyond ±1000 ppm (a Hz axis, by all odds), are refused with the
    fix.
``jcamp-dx``
    JCAMP-DX 1D NMR spectra (IUPAC open standard), parsed by nmrglue (``XYDATA=(X++(Y..Y))`` in
    AFFN or compressed ASDF form, ``NTUPLES`` with real and imaginary pages: real part used) or by
    the jcamp package (``XYPOINTS=(XY..XY)``).  The axis is taken in the file's ``##XUNITS``; a Hz
    axis is turned into ppm with ``##.OBSERVE FREQUENCY`` and referenced by
    ``##.SHIFT REFERENCE``, else ``##$OFFSET`` (ppm of the first point), else 0 Hz = 0 ppm.
``bruker-fid``, ``varian-fid``, ``nmrpipe``
    Raw 1D FIDs of the two major vendors, processed inside dnmr, and NMRPipe's processed 1D spectra:
    see :mod:`dnmr.io.processing`.
``bruker-pdata``
    A processed 1D folder (``pdata/N`` holding ``procs`` and ``1r``) or the experiment folder that
    contains ``pdata/1``, read by nmrglue with the intensity scale ``2**NC_proc`` applied.  The first
    point of ``1r`` lies at ``OFFSET`` ppm and points are ``SW_p / SI`` Hz apart (the frequency
    spacing of an SI-point discrete Fourier transform), running to lower ppm.

Memory stays bounded on hostile files: file sizes and declared point counts are checked before
anything is allocated (at most :data:`MAX_POINTS` points, text files at most :data:`MAX_FILE_BYTES`).
"""
from __future__ import annotations

import re
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from dnmr.errors import InputError
from dnmr.io.inputfiles import read_input_bytes, regular_file_size
from dnmr.notebook import NotebookView
from dnmr.nuclei import check_frequency_mhz

MAX_POINTS = 2**21
"""Largest number of points a spectrum may have (2,097,152)."""
MAX_FILE_BYTES = 32 * 2**20
"""Largest text or JCAMP-DX file read (32 MiB)."""
MIN_POINTS = 8
"""Fewest points that make a spectrum."""
FREQUENCY_TOLERANCE = 1e-3
"""Relative disagreement allowed between a recorded and a given spectrometer frequency (0.1 %)."""

JCAMP_SUFFIXES = {".jdx", ".dx", ".jcamp", ".jcm"}


@dataclass(frozen=True, eq=False)
class MeasuredSpectrum(NotebookView):
    """A measured 1D spectrum on a strictly ascending ppm axis.

    Attributes
    ----------
    ppm : ndarray
        Chemical shift of each point in ppm, strictly ascending (read-only).
    intensity : ndarray
        Real intensity of each point (arbitrary units, read-only).
    frequency_mhz : float or None
        Spectrometer frequency of the observed nucleus in MHz, when known.
    source : str
        Path the spectrum was read from.
    format : str
        ``"text"``, ``"jcamp-dx"`` or ``"bruker-pdata"``.
    metadata : dict
        What the file recorded besides the data (nucleus, temperature, offsets, column names...).
    """

    ppm: np.ndarray
    intensity: np.ndarray
    frequency_mhz: float | None
    source: str
    format: str
    metadata: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        ppm = np.array(self.ppm, dtype=float)
        intensity = np.array(self.intensity, dtype=float)
        if ppm.ndim != 1 or ppm.shape != intensity.shape:
            raise ValueError("ppm and intensity must be 1-D arrays of the same length")
        if np.any(np.diff(ppm) <= 0):
            raise ValueError("ppm must be strictly ascending")
        ppm.flags.writeable = False
        intensity.flags.writeable = False
        object.__setattr__(self, "ppm", ppm)
        object.__setattr__(self, "intensity", intensity)

    @property
    def hz(self) -> np.ndarray:
        """Frequency axis in Hz, ``ppm * frequency_mhz`` (0 ppm is 0 Hz)."""
        if self.frequency_mhz is None:
            raise InputError(
                "the spectrometer frequency is not known, so there is no Hz axis: "
                "give frequency_mhz when reading the spectrum",
                source=self.source,
            )
        return self.ppm * self.frequency_mhz

    def region(self, lo_ppm: float, hi_ppm: float) -> "MeasuredSpectrum":
        """A copy cropped to the points between `lo_ppm` and `hi_ppm` (ppm, either order, inclusive)."""
        lo, hi = sorted((float(lo_ppm), float(hi_ppm)))
        keep = (self.ppm >= lo) & (self.ppm <= hi)
        count = int(keep.sum())
        if count < MIN_POINTS:
            raise InputError(
                f"the region {lo:g} to {hi:g} ppm holds {count} points of the spectrum, which "
                f"covers {self.ppm[0]:g} to {self.ppm[-1]:g} ppm; choose a region with at least "
                f"{MIN_POINTS} points",
                source=self.source,
                where="region",
            )
        return replace(self, ppm=self.ppm[keep], intensity=self.intensity[keep])

    def report(self) -> str:
        """What the spectrum is, and for a processed raw FID each processing step and the notes."""
        lines = [str(self)]
        processing = self.metadata.get("processing")
        if processing:
            lines.append("processing:")
            for step in processing["steps"]:
                details = ", ".join(f"{k} {v}" for k, v in step.items() if k != "step")
                lines.append(f"  {step['step']}: {details}")
            lines += [f"  note: {n}" for n in processing["notes"]]
        return "\n".join(lines)

    def plot(self, ax=None, **line_kwargs):
        """Draw the intensity against ppm (high to low); returns the matplotlib Axes."""
        from dnmr.reporting.plotting import plot_spectrum

        ax = plot_spectrum(self, ax=ax, ylabel="intensity", **line_kwargs)
        ax.set_title(Path(self.source).name)
        return ax

    def __str__(self) -> str:
        freq = "frequency unknown" if self.frequency_mhz is None else f"{self.frequency_mhz:.6g} MHz"
        nucleus = self.metadata.get("nucleus")
        return (
            f"{self.format} spectrum {self.source}: {self.ppm.size} points, "
            f"{self.ppm[-1]:.4f} to {self.ppm[0]:.4f} ppm, {freq}"
            + (f", {nucleus}" if nucleus else "")
        )


def read_spectrum(
    path: str | Path, *, frequency_mhz: float | None = None, axis: str | None = None, processing=None
) -> MeasuredSpectrum:
    """Read a measured 1D spectrum from a text file, a JCAMP-DX file or a processed-data folder.

    Parameters
    ----------
    path : str or Path
        A two-column text file, a JCAMP-DX file (``.jdx``, ``.dx``, or content starting ``##``), or
        a processed 1D folder (``.../pdata/1``, the experiment folder above it, or its ``1r`` file).
    frequency_mhz : float, optional
        Spectrometer frequency of the observed nucleus in MHz.  Needed for a Hz axis when the file
        does not record it; when the file does record it, the two must agree within 0.1 %.
    axis : {"ppm", "hz"}, optional
        Unit of the axis column of a text file without a header naming it (default ppm).  Other
        formats record their own unit.
    processing : dnmr.io.processing.ProcessingOptions or mapping, optional
        How to process a raw FID (line broadening in Hz, zero filling, phases in degrees, DC correction,
        referencing in ppm); raw FIDs only.  See :mod:`dnmr.io.processing`.

    Returns
    -------
    MeasuredSpectrum

    Raises
    ------
    InputError
        A missing, empty, truncated, binary, non-numeric or inconsistent file, with the file, the
        line or record, and what to do.
    """
    path = Path(path)
    try:
        frequency_mhz = _checked_frequency(frequency_mhz)
        axis = _checked_axis(axis)
        if not path.exists():
            raise InputError("no such file or folder")
        if not path.is_dir():
            regular_file_size(path, "spectrum file")  # never open a pipe or a device
        fmt = detect_format(path)
        if processing is not None or fmt in RAW_FORMATS:
            return _read_raw(path, fmt, frequency_mhz, processing)
        return _READERS[fmt](path, frequency_mhz, axis)
    except InputError as err:
        raise err.located(source=path) from None


def detect_format(path: str | Path) -> str:
    """Name the format of `path`: a raw FID or NMRPipe format of :func:`dnmr.io.processing.raw_format`,
    ``"bruker-pdata"``, ``"jcamp-dx"`` or ``"text"``."""
    from dnmr.io.processing import raw_format

    path = Path(path)
    fmt = raw_format(path)
    if fmt is not None:
        return fmt
    if path.is_dir() or path.name == "1r":
        return "bruker-pdata"
    if path.suffix.lower() in JCAMP_SUFFIXES:
        return "jcamp-dx"
    with open(path, "rb") as handle:
        head = handle.read(4096)
    return "jcamp-dx" if head.removeprefix(b"\xef\xbb\xbf").lstrip().startswith(b"##") else "text"


# ---------------------------------------------------------------------------------------------
# checks shared by every format


def _checked_frequency(frequency_mhz: float | None, where: str = "frequency_mhz") -> float | None:
    return None if frequency_mhz is None else check_frequency_mhz(frequency_mhz, where)


def _checked_axis(axis: str | None) -> str | None:
    if axis is None:
        return None
    unit = str(axis).strip().lower()
    if unit not in ("ppm", "hz"):
        raise InputError(f'axis must be "ppm" or "hz", not {axis!r}', where="axis")
    return unit


def _reconcile_frequency(recorded: float | None, given: float | None, record: str) -> float | None:
    """The recorded frequency (MHz) if any, after checking it against the one given."""
    if recorded is None:
        return given
    if given is not None and abs(recorded - given) > FREQUENCY_TOLERANCE * recorded:
        raise InputError(
            f"the file records {recorded:.8g} MHz but frequency_mhz={given:.8g} was given; they "
            f"must agree within {FREQUENCY_TOLERANCE:.1%} (check the nucleus and the spectrometer)",
            where=record,
        )
    return recorded


def _assemble(
    ppm: np.ndarray,
    intensity: np.ndarray,
    frequency_mhz: float | None,
    source: Path,
    fmt: str,
    metadata: dict,
    locate: Callable[[int], str],
) -> MeasuredSpectrum:
    """Check finiteness, size and uniqueness of the axis, sort ascending, build the spectrum.

    `locate` turns a point index (file order) into a place in the file (``"line 12"``).
    """
    if ppm.size < MIN_POINTS:
        raise InputError(
            f"only {ppm.size} data points; a spectrum needs at least {MIN_POINTS}",
        )
    bad = np.flatnonzero(~(np.isfinite(ppm) & np.isfinite(intensity)))
    if bad.size:
        raise InputError(
            "a value is not a finite number (NaN or infinity); remove or repair that point",
            where=locate(int(bad[0])),
        )
    order = np.argsort(ppm, kind="stable")
    ppm, intensity = ppm[order], intensity[order]
    repeats = np.flatnonzero(np.diff(ppm) <= 0)
    if repeats.size:
        first, second = sorted((int(order[repeats[0]]), int(order[repeats[0] + 1])))
        raise InputError(
            f"the axis value {ppm[repeats[0]]:.10g} ppm occurs twice (also at {locate(first)}), so "
            "the axis is not strictly monotonic; remove the duplicate point",
            where=locate(second),
        )
    steps = np.diff(ppm[np.argsort(order)])  # in file order again; no step is zero now
    turns = np.flatnonzero(np.sign(steps) != np.sign(steps[0]))
    if turns.size:  # an axis that runs back on itself: two spectra pasted together, or damaged
        i = int(turns[0])
        before, after = ppm[order == i][0], ppm[order == i + 1][0]
        raise InputError(
            f"the axis runs {'up' if steps[0] > 0 else 'down'} and then turns back ({before:.10g} ppm, then "
            f"{after:.10g} ppm), so it is not monotonic; keep one spectrum with its points in order",
            where=locate(i + 1),
        )
    return MeasuredSpectrum(ppm, intensity, frequency_mhz, str(source), fmt, metadata)


def _read_bounded_text(path: Path) -> str:
    """The text of a file no larger than MAX_FILE_BYTES that is not binary."""
    size = regular_file_size(path, "spectrum file")
    if size == 0:
        raise InputError("the file is empty; give a spectrum with an axis and an intensity column")
    if size > MAX_FILE_BYTES:
        raise InputError(
            f"the file holds {size} bytes, more than the {MAX_FILE_BYTES // 2**20} MiB a 1D "
            "spectrum file may have; crop the spectrum or export fewer points"
        )
    raw = read_input_bytes(path, MAX_FILE_BYTES, "spectrum file")
    if b"\x00" in raw:
        raise InputError(
            "this is a binary file, not text: give a two-column text file, a JCAMP-DX file or a "
            "processed-data folder"
        )
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        return raw.decode("latin-1")


# ---------------------------------------------------------------------------------------------
# two-column text

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
            return InputError(f"{_excerpt(bad)} is not a number; fix or remove the line (comments start with #)",
                              where=f"line {lineno}")
    return None


def _excerpt(field: str) -> str:
    """A value of the file to quote in a message: short printable ones as they are, else only its length
    (a message must not carry the contents of a file that is no spectrum into logs and results)."""
    if len(field) <= 16 and field.isprintable() and field.isascii():
        return f'"{field}"'
    return f"a value of {len(field)} characters"


def _names(fields) -> str:
    """Column names to quote in a message (see :func:`_excerpt`)."""
    return ", ".join(_excerpt(f) for f in fields)


def _frequency_from_columns(ppm: np.ndarray, hz: np.ndarray) -> float | None:
    """The spectrometer frequency (MHz) when a ppm and a Hz column agree as hz = ppm * f."""
    denominator = float(np.dot(ppm, ppm))
    if denominator == 0 or not np.all(np.isfinite(hz)):
        return None
    frequency = float(np.dot(hz, ppm)) / denominator
    consistent = np.max(np.abs(hz - frequency * ppm)) <= 1e-6 * np.max(np.abs(hz))
    return frequency if consistent and frequency > 0 else None


def _read_text(path: Path, frequency_mhz: float | None, axis: str | None) -> MeasuredSpectrum:
    layout = _text_layout(_read_bounded_text(path))
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
        frequency_mhz = _reconcile_frequency(recorded, frequency_mhz, "header")
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
    return _assemble(x, intensity, frequency_mhz, path, "text", metadata,
                     lambda i: f"line {layout.data_line_numbers()[i]}")


# ---------------------------------------------------------------------------------------------
# JCAMP-DX

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
                    f"{_excerpt(value)} is not a point count between 1 and {MAX_POINTS}; the file is "
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
        raise InputError(f"{_excerpt(value)} is not a number", where=f"##{label}") from None


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
        raise InputError(f"{_excerpt(first)} or {_excerpt(last)} is not a number", where=f"##{labels[0]}") from None
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
        raise InputError(f'XUNITS={_excerpt(unit)} is not an NMR axis; export the spectrum in Hz or ppm',
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
        raise InputError(f"{_excerpt(text)} is not (type, compound, point, ppm)",
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


def _read_jcamp(path: Path, frequency_mhz: float | None, axis: str | None) -> MeasuredSpectrum:
    _check_jcamp_budget(_read_bounded_text(path))
    dic, intensity, x = _jcamp_values(path)
    recorded = _checked_frequency(_record_float(dic, ".OBSERVEFREQUENCY", ".OBSERVE FREQUENCY"),
                                  "##.OBSERVE FREQUENCY")
    frequency_mhz = _reconcile_frequency(recorded, frequency_mhz, "##.OBSERVE FREQUENCY")
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
    return _assemble(ppm, intensity, frequency_mhz, path, "jcamp-dx", metadata,
                     lambda i: f"data point {i + 1}")


# ---------------------------------------------------------------------------------------------
# processed spectrometer folders (pdata/N with procs and 1r)


def _pdata_folder(path: Path) -> Path:
    """The folder holding procs and 1r for a 1r file, a pdata/N folder or an experiment folder."""
    if path.is_file():
        return path.parent
    if (path / "1r").exists() or (path / "procs").exists():
        return path
    pdata = path / "pdata"
    if pdata.is_dir():
        procnos = sorted(p.name for p in pdata.iterdir() if p.is_dir())
        if "1" in procnos or len(procnos) == 1:
            return pdata / ("1" if "1" in procnos else procnos[0])
        raise InputError(
            f"the experiment holds several processed spectra (pdata/{', pdata/'.join(procnos) or '?'}); "
            "name the one to read"
        )
    raise InputError(
        "this folder holds neither a processed spectrum (procs and 1r) nor a pdata folder"
    )


def _procs(folder: Path) -> dict:
    """Processing parameters of `folder`, checked so that reading 1r stays bounded."""
    from nmrglue.fileio import bruker

    for name in ("procs", "1r"):
        if not (folder / name).is_file():
            raise InputError(
                f"{folder / name} is missing; process the spectrum (Fourier transform, phase) "
                "first or export it as JCAMP-DX",
            )
    if (folder / "proc2s").exists():
        raise InputError("this is a 2D processed spectrum; dnmr reads 1D spectra", where="proc2s")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            procs = bruker.read_jcamp(str(folder / "procs"), encoding="latin-1")
    except (ValueError, IndexError, OSError) as exc:
        raise InputError(f"cannot parse the processing parameters ({exc})", where="procs") from None
    for key in ("SI", "SF", "OFFSET", "SW_p"):
        if not isinstance(procs.get(key), (int, float)):
            raise InputError(f"the parameter {key} is missing or not a number", where=f"procs {key}")
    si = procs["SI"]
    if not isinstance(si, int) or not MIN_POINTS <= si <= MAX_POINTS or procs["SF"] <= 0 or procs["SW_p"] <= 0:
        raise InputError(
            f"SI={si}, SF={procs['SF']}, SW_p={procs['SW_p']} do not describe a 1D spectrum of "
            f"{MIN_POINTS} to {MAX_POINTS} points",
            where="procs",
        )
    expected = si * (8 if procs.get("DTYPP") == 2 else 4)
    actual = (folder / "1r").stat().st_size
    if actual != expected:
        raise InputError(
            f"1r holds {actual} bytes but SI={si} points need {expected}; the data are truncated "
            "or belong to other parameters",
            where="1r",
        )
    return procs


def _read_pdata(path: Path, frequency_mhz: float | None, axis: str | None) -> MeasuredSpectrum:
    from nmrglue.fileio import bruker

    folder = _pdata_folder(path)
    procs = _procs(folder)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dic, data = bruker.read_pdata(str(folder), scale_data=True)  # applies 2**NC_proc
    si, sf, offset, sw_p = procs["SI"], procs["SF"], procs["OFFSET"], procs["SW_p"]
    ppm = offset - np.arange(si) * (sw_p / (sf * si))
    frequency_mhz = _reconcile_frequency(_checked_frequency(sf, "procs SF"), frequency_mhz, "procs SF")
    acqus = dic.get("acqus", {})
    metadata = {
        "folder": str(folder),
        "nucleus": (acqus.get("NUC1") or procs.get("AXNUC") or None),
        "temperature_k": acqus.get("TE"),
        "offset_ppm": offset,
        "sw_hz": sw_p,
        "si": si,
        "nc_proc": procs.get("NC_proc"),
    }
    return _assemble(ppm, np.asarray(data, dtype=float).ravel(), frequency_mhz, path,
                     "bruker-pdata", metadata, lambda i: f"1r point {i + 1}")


def _read_raw(path: Path, fmt: str, frequency_mhz: float | None, processing) -> MeasuredSpectrum:
    """A raw FID read and processed by :mod:`dnmr.io.processing`; processing options are refused elsewhere."""
    from dnmr.io.processing import read_raw

    if fmt not in RAW_FORMATS:
        raise InputError(f"processing options apply to raw FIDs, and this is a {fmt} file", where="processing")
    return read_raw(path, frequency_mhz, processing)


def _read_pipe(path: Path, frequency_mhz: float | None, axis: str | None) -> MeasuredSpectrum:
    from dnmr.io.processing import read_pipe

    return read_pipe(path, frequency_mhz, axis)


RAW_FORMATS = ("bruker-fid", "varian-fid")
"""Raw FID formats, read and processed by :mod:`dnmr.io.processing`."""
_READERS: dict[str, Callable[[Path, float | None, str | None], MeasuredSpectrum]] = {
    "text": _read_text,
    "jcamp-dx": _read_jcamp,
    "bruker-pdata": _read_pdata,
    "nmrpipe": _read_pipe,
}
