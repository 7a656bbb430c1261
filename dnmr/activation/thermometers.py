"""Chemical-shift thermometers: the sample temperature from the shift difference of a thermometer liquid.

The temperature a VT unit displays is that of its gas stream, not of the sample; the difference can
reach several kelvin and it is the largest systematic error in activation parameters. Two liquids whose
hydroxyl shift moves with temperature serve as thermometers (calibrations of Ammann, Meier & Merbach,
J. Magn. Reson. 46, 319 (1982)), with dd = delta(OH) - delta(alkyl) in ppm:

* methanol:        T = 409.0 - 36.54 dd - 21.85 dd^2 K,  valid 178-330 K;
* ethylene glycol: T = 466.5 - 102.00 dd K,              valid 273-416 K.

A reading is taken from dd given directly or from a thermometer spectrum (its OH and alkyl lines are
found); a set of readings against the VT unit's set-points makes a calibration
(:mod:`dnmr.activation.temperature_calibration`).

Read :data:`THERMOMETER_CAUTIONS` before using the thermometer samples.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.signal import find_peaks, peak_widths

from dnmr.errors import InputError, did_you_mean

THERMOMETER_CAUTIONS = (
    "Cautions: methanol is toxic (by swallowing, breathing its vapour and through the skin) and highly "
    "flammable; ethylene glycol is harmful if swallowed and its hot vapour is combustible. Use sealed "
    "standard thermometer tubes, do not heat a sealed tube past the boiling point of its contents, stay "
    "within the probe's rated temperature range, let the temperature settle before reading, and follow "
    "your local safety rules and the instrument's operating instructions."
)

AMMANN_1982 = "Ammann, Meier & Merbach, J. Magn. Reson. 46, 319 (1982)"


@dataclass(frozen=True)
class ShiftThermometer:
    """A liquid whose OH - alkyl shift difference gives its temperature.

    Attributes
    ----------
    name : str
        Name of the liquid.
    coefficients : tuple of float
        T = c0 + c1 dd + c2 dd^2 + ... in K, dd in ppm.
    valid_range_k : (float, float)
        Temperatures (K) over which the calibration holds.
    alkyl_group : str
        The reference line ('CH3' or 'CH2').
    proton_ratio : float
        Expected integral ratio OH / alkyl line.
    reference : str
        Published source of the calibration.
    """

    name: str
    coefficients: tuple[float, ...]
    valid_range_k: tuple[float, float]
    alkyl_group: str
    proton_ratio: float
    reference: str

    def temperature(
        self, shift_difference_ppm: float | np.ndarray, *, source: str | None = None, where: str | None = None
    ) -> float | np.ndarray:
        """Temperature (K) from the shift difference dd = delta(OH) - delta(alkyl) in ppm.

        Raises
        ------
        InputError
            When the temperature falls outside the calibrated range (the formula must not be extrapolated).
        """
        dd = np.asarray(shift_difference_ppm, dtype=float)
        t = np.polynomial.polynomial.polyval(dd, self.coefficients)
        lo, hi = self.valid_range_k
        bad = ~((t >= lo) & (t <= hi))
        if bad.any():
            i = int(np.flatnonzero(bad.ravel())[0])
            raise InputError(self._outside(float(dd.ravel()[i]), float(t.ravel()[i])), source, where)
        return t if t.ndim else float(t)

    def shift_difference(self, temperature_k: float) -> float:
        """Shift difference (ppm) that the calibration gives at `temperature_k` (K), within the valid range."""
        lo, hi = self.valid_range_k
        if not lo <= temperature_k <= hi:
            raise InputError(
                f"{temperature_k:g} K is outside the {self.name} thermometer's range {lo:g}-{hi:g} K", where="temperature_k"
            )
        c = np.array(self.coefficients, dtype=float)
        c[0] -= temperature_k
        roots = np.polynomial.polynomial.polyroots(c)
        real = roots[np.isreal(roots)].real
        return float(real[real > 0].min())

    @property
    def shift_difference_range_ppm(self) -> tuple[float, float]:
        """Shift differences (ppm) that map onto the valid temperature range (low, high)."""
        lo, hi = self.valid_range_k
        return self.shift_difference(hi), self.shift_difference(lo)

    def _outside(self, dd: float, t: float) -> str:
        lo, hi = self.valid_range_k
        d_lo, d_hi = self.shift_difference_range_ppm
        other = _other_thermometer(self, t)
        hint = f"; use the {other.name} thermometer there" if other else ""
        return (
            f"{self.name} thermometer: Δδ = {dd:g} ppm gives {t:.1f} K, outside its calibrated range "
            f"{lo:g}-{hi:g} K (Δδ {d_lo:.3f}-{d_hi:.3f} ppm){hint}"
        )


METHANOL = ShiftThermometer("methanol", (409.0, -36.54, -21.85), (178.0, 330.0), "CH3", 1 / 3, AMMANN_1982)
ETHYLENE_GLYCOL = ShiftThermometer("ethylene glycol", (466.5, -102.00), (273.0, 416.0), "CH2", 2 / 4, AMMANN_1982)
THERMOMETERS = {"methanol": METHANOL, "glycol": ETHYLENE_GLYCOL, "ethylene-glycol": ETHYLENE_GLYCOL}


def _other_thermometer(thermometer: ShiftThermometer, temperature_k: float) -> ShiftThermometer | None:
    for other in (METHANOL, ETHYLENE_GLYCOL):
        lo, hi = other.valid_range_k
        if other is not thermometer and lo <= temperature_k <= hi:
            return other
    return None


def get_thermometer(name: str | ShiftThermometer) -> ShiftThermometer:
    """The thermometer called `name` ('methanol', 'glycol' or 'ethylene-glycol')."""
    if isinstance(name, ShiftThermometer):
        return name
    key = name.strip().lower().replace(" ", "-")
    if key not in THERMOMETERS:
        raise InputError(
            f"unknown thermometer {name!r}{did_you_mean(key, THERMOMETERS)}; choose {', '.join(THERMOMETERS)}",
            where="thermometer",
        )
    return THERMOMETERS[key]


# --------------------------------------------------------------------------------------------------
# Readings
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ThermometerReading:
    """A sample temperature read from a shift thermometer.

    Attributes
    ----------
    thermometer : ShiftThermometer
        The calibration used.
    temperature_k : float
        Sample temperature, K.
    shift_difference_ppm : float
        dd = delta(OH) - delta(alkyl), ppm.
    hydroxyl_ppm, alkyl_ppm : float
        Positions of the two lines found in a spectrum, ppm (NaN when dd was given directly).
    integral_ratio : float
        Integral of the OH line over the alkyl line (NaN when dd was given directly).
    source : str or None
        The spectrum file.
    notes : tuple of str
        Doubts about the lines found.
    """

    thermometer: ShiftThermometer
    temperature_k: float
    shift_difference_ppm: float
    hydroxyl_ppm: float = math.nan
    alkyl_ppm: float = math.nan
    integral_ratio: float = math.nan
    source: str | None = None
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {
            "thermometer": self.thermometer.name,
            "temperature_k": self.temperature_k,
            "shift_difference_ppm": self.shift_difference_ppm,
            "hydroxyl_ppm": self.hydroxyl_ppm,
            "alkyl_ppm": self.alkyl_ppm,
            "integral_ratio": self.integral_ratio,
            "source": self.source,
            "notes": list(self.notes),
        }

    def report(self) -> str:
        """One line (plus notes) for the terminal."""
        where = f"{self.source}: " if self.source else ""
        lines = [f"{where}{self.thermometer.name}, Δδ = {self.shift_difference_ppm:.4f} ppm -> T = {self.temperature_k:.2f} K"]
        if np.isfinite(self.hydroxyl_ppm):
            lines.append(
                f"  OH at {self.hydroxyl_ppm:.4f} ppm, {self.thermometer.alkyl_group} at {self.alkyl_ppm:.4f} ppm, "
                f"integral ratio {self.integral_ratio:.2f} (expected {self.thermometer.proton_ratio:.2f})"
            )
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.report()


def thermometer_reading(shift_difference_ppm: float, thermometer: str | ShiftThermometer = "methanol") -> ThermometerReading:
    """Temperature (K) from a measured shift difference dd (ppm) of a thermometer liquid.

    Parameters
    ----------
    shift_difference_ppm : float
        dd = delta(OH) - delta(alkyl), ppm.
    thermometer : str or ShiftThermometer
        'methanol' or 'glycol'.

    Returns
    -------
    ThermometerReading
    """
    thermo = get_thermometer(thermometer)
    dd = float(shift_difference_ppm)
    return ThermometerReading(thermo, thermo.temperature(dd, where="shift difference"), dd)


@dataclass(frozen=True)
class _Line:
    ppm: float
    integral: float


def temperature_from_spectrum(
    ppm: np.ndarray,
    intensity: np.ndarray,
    thermometer: str | ShiftThermometer = "methanol",
    *,
    frequency_mhz: float | None = None,
    source: str | None = None,
) -> ThermometerReading:
    """Find the OH and alkyl lines of a thermometer spectrum and read the temperature.

    The alkyl line (CH3 of methanol, CH2 of glycol) is the line group with the largest integral; the OH
    line is the largest group downfield of it. Each line's position is the intensity-weighted centroid
    over the line, so resolved multiplets (OH-CH3 coupling in very dry methanol) are handled too.

    Parameters
    ----------
    ppm : array
        Chemical-shift axis, ppm (either direction).
    intensity : array
        Real spectrum (absorption), same length.
    thermometer : str or ShiftThermometer
        'methanol' or 'glycol'.
    frequency_mhz : float, optional
        Spectrometer frequency, MHz: lets multiplet components be grouped by a width in Hz (25 Hz);
        without it they are grouped within 0.06 ppm.
    source : str, optional
        Name of the file, for messages.

    Returns
    -------
    ThermometerReading

    Raises
    ------
    InputError
        Fewer than two lines, no line downfield of the alkyl line, or a temperature outside the
        calibrated range.
    """
    thermo = get_thermometer(thermometer)
    x, y = _checked_spectrum(ppm, intensity, source)
    merge_ppm = 25.0 / frequency_mhz if frequency_mhz else 0.06
    groups = _line_groups(x, y, merge_ppm, source)
    alkyl = max(groups, key=lambda g: g.integral)
    downfield = [g for g in groups if g.ppm > alkyl.ppm + 0.2]
    if not downfield:
        raise InputError(
            f"no line found downfield of the {thermo.alkyl_group} line at {alkyl.ppm:.3f} ppm; "
            f"is this a {thermo.name} spectrum? (the OH line lies about "
            f"{thermo.shift_difference_range_ppm[0]:.1f}-{thermo.shift_difference_range_ppm[1]:.1f} ppm downfield)",
            source,
        )
    hydroxyl = max(downfield, key=lambda g: g.integral)
    dd = hydroxyl.ppm - alkyl.ppm
    ratio = hydroxyl.integral / alkyl.integral
    notes = _doubts(groups, alkyl, hydroxyl, ratio, thermo)
    t = thermo.temperature(dd, source=source)
    return ThermometerReading(thermo, t, dd, hydroxyl.ppm, alkyl.ppm, ratio, source, tuple(notes))


def temperature_from_file(
    path: str | Path, thermometer: str | ShiftThermometer = "methanol", *, frequency_mhz: float | None = None
) -> ThermometerReading:
    """Read a thermometer spectrum file (text, JCAMP-DX or processed folder) and its temperature (K).

    See :func:`temperature_from_spectrum`; the file is read by :func:`dnmr.io.readers.read_spectrum`.
    """
    from dnmr.io.readers import read_spectrum

    spectrum = read_spectrum(path, frequency_mhz=frequency_mhz)
    return temperature_from_spectrum(
        spectrum.ppm, spectrum.intensity, thermometer, frequency_mhz=spectrum.frequency_mhz, source=str(path)
    )


def thermometer_readings(
    thermometer: str | ShiftThermometer = "methanol",
    shift_differences_ppm: Sequence[float] = (),
    files: Sequence[str | Path] = (),
    *,
    frequency_mhz: float | None = None,
) -> list[ThermometerReading]:
    """Sample temperatures (K) from shift differences (ppm) read by hand and from thermometer spectrum files,
    in that order (what ``dnmr thermometer`` reports).

    Parameters
    ----------
    thermometer : str or ShiftThermometer
        'methanol' or 'glycol' (see :data:`THERMOMETER_CAUTIONS` before using either).
    shift_differences_ppm : sequence of float
        delta(OH) - delta(CH3 or CH2), ppm.
    files : sequence of path
        Thermometer spectra (text, JCAMP-DX or processed folders).
    frequency_mhz : float, optional
        Spectrometer frequency (MHz) for spectra with a Hz axis.
    """
    if not shift_differences_ppm and not files:
        raise InputError("give --shift-difference-ppm PPM, --spectrum FILE or --calibrate LIST.csv", where="thermometer")
    readings = [thermometer_reading(dd, thermometer) for dd in shift_differences_ppm]
    return readings + [temperature_from_file(path, thermometer, frequency_mhz=frequency_mhz) for path in files]


def readings_to_dict(readings: Sequence[ThermometerReading]) -> dict:
    """One JSON-ready object for a list of readings of one thermometer, with its range and cautions."""
    thermo = readings[0].thermometer
    return {
        "thermometer": thermo.name,
        "calibration": thermo.reference,
        "valid_range_k": list(thermo.valid_range_k),
        "readings": [r.to_dict() for r in readings],
        "cautions": THERMOMETER_CAUTIONS,
    }


def _checked_spectrum(ppm, intensity, source: str | None) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(ppm, dtype=float)
    y = np.asarray(intensity, dtype=float)
    if x.ndim != 1 or x.shape != y.shape or len(x) < 16:
        raise InputError("the spectrum needs ppm and intensity arrays of equal length (at least 16 points)", source)
    if not (np.isfinite(x).all() and np.isfinite(y).all()):
        raise InputError("the spectrum contains NaN or infinite values", source)
    order = np.argsort(x)
    return x[order], y[order]


def _line_groups(x: np.ndarray, y: np.ndarray, merge_ppm: float, source: str | None) -> list[_Line]:
    y = y - np.median(y)
    noise = 1.4826 * np.median(np.abs(y - np.median(y)))
    peaks, _ = find_peaks(y, prominence=max(8 * noise, 0.02 * y.max()))
    if len(peaks) < 2:
        raise InputError("fewer than two lines found; a thermometer spectrum shows an OH and an alkyl line", source)
    _, _, left, right = peak_widths(y, peaks, rel_height=0.5)
    index = np.arange(len(x))
    left_ppm, right_ppm = np.interp(left, index, x), np.interp(right, index, x)
    groups, start = [], 0
    for i in range(1, len(peaks) + 1):
        if i == len(peaks) or x[peaks[i]] - x[peaks[i - 1]] > merge_ppm:
            groups.append(_measure(x, y, left_ppm[start], right_ppm[i - 1]))
            start = i
    return groups


def _measure(x: np.ndarray, y: np.ndarray, left: float, right: float) -> _Line:
    """Centroid and integral of a line (group) over its half-height span widened by three widths each side."""
    width = right - left
    inside = (x >= left - 3 * width) & (x <= right + 3 * width)
    xs, ys = x[inside], y[inside]
    area = np.trapezoid(ys, xs)
    return _Line(float(np.trapezoid(ys * xs, xs) / area), float(area))


def _doubts(groups: list[_Line], alkyl: _Line, hydroxyl: _Line, ratio: float, thermo: ShiftThermometer) -> list[str]:
    notes = []
    if not 0.5 * thermo.proton_ratio <= ratio <= 2 * thermo.proton_ratio:
        notes.append(
            f"the OH/{thermo.alkyl_group} integral ratio is {ratio:.2f}, expected about {thermo.proton_ratio:.2f}; "
            "check that the right lines were taken"
        )
    others = [g for g in groups if g not in (alkyl, hydroxyl) and g.integral > 0.1 * alkyl.integral]
    if others:
        listed = ", ".join(f"{g.ppm:.2f}" for g in others)
        notes.append(f"other lines at {listed} ppm (water? impurity?) were not used")
    return notes
