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
anything is allocated (at most :data:`dnmr.io.measured.MAX_POINTS` points, text files at most
:data:`dnmr.io.measured.MAX_FILE_BYTES`).  Each format has a module of its own (:mod:`dnmr.io.textspectra`,
:mod:`dnmr.io.jcampdx`, :mod:`dnmr.io.pdata`, :mod:`dnmr.io.processing`); this one names the format of a
path and hands it to its reader.
"""
from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

from dnmr.errors import InputError
from dnmr.io.inputfiles import regular_file_size
from dnmr.io.jcampdx import read_jcamp
from dnmr.io.measured import MeasuredSpectrum, checked_frequency
from dnmr.io.pdata import read_pdata
from dnmr.io.processing import RAW_FORMATS, raw_format, read_pipe, read_raw
from dnmr.io.textspectra import read_text

JCAMP_SUFFIXES = {".jdx", ".dx", ".jcamp", ".jcm"}


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
        frequency_mhz = checked_frequency(frequency_mhz)
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


def _checked_axis(axis: str | None) -> str | None:
    if axis is None:
        return None
    unit = str(axis).strip().lower()
    if unit not in ("ppm", "hz"):
        raise InputError(f'axis must be "ppm" or "hz", not {axis!r}', where="axis")
    return unit


def _read_raw(path: Path, fmt: str, frequency_mhz: float | None, processing) -> MeasuredSpectrum:
    """A raw FID read and processed by :mod:`dnmr.io.processing`; processing options are refused elsewhere."""
    if fmt not in RAW_FORMATS:
        raise InputError(f"processing options apply to raw FIDs, and this is a {fmt} file", where="processing")
    return read_raw(path, frequency_mhz, processing)


_READERS: dict[str, Callable[[Path, float | None, str | None], MeasuredSpectrum]] = {
    "text": read_text,
    "jcamp-dx": read_jcamp,
    "bruker-pdata": read_pdata,
    "nmrpipe": read_pipe,
}
