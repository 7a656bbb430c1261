"""The measured spectrum every reader returns, and the checks every reader shares.

A :class:`MeasuredSpectrum` has a strictly ascending chemical-shift axis in ppm, the real intensities, the
spectrometer frequency of the observed nucleus (MHz) when the file records it, and where it came from.
:func:`assemble_spectrum` checks a reader's points (finite, enough, a monotonic axis) before building one;
:func:`read_bounded_text` reads a text file of bounded size; :func:`reconcile_frequency` checks a recorded
frequency against a given one.  Memory stays bounded on hostile files: at most :data:`MAX_POINTS` points,
text files at most :data:`MAX_FILE_BYTES`.
"""
from __future__ import annotations

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


def checked_frequency(frequency_mhz: float | None, where: str = "frequency_mhz") -> float | None:
    """`frequency_mhz` (MHz) checked as a spectrometer frequency (None stays None); errors name `where`."""
    return None if frequency_mhz is None else check_frequency_mhz(frequency_mhz, where)


def reconcile_frequency(recorded: float | None, given: float | None, record: str) -> float | None:
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


def assemble_spectrum(
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


def read_bounded_text(path: Path) -> str:
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


def excerpt(field: str) -> str:
    """A value of the file to quote in a message: short printable ones as they are, else only its length
    (a message must not carry the contents of a file that is no spectrum into logs and results)."""
    if len(field) <= 16 and field.isprintable() and field.isascii():
        return f'"{field}"'
    return f"a value of {len(field)} characters"
