"""True sample temperatures: chemical-shift thermometers and set-point calibration tables.

The temperature a VT unit displays is that of its gas stream, not of the sample; the difference can
reach several kelvin and it is the largest systematic error in activation parameters. Two liquids whose
hydroxyl shift moves with temperature serve as thermometers (calibrations of Ammann, Meier & Merbach,
J. Magn. Reson. 46, 319 (1982)), with dd = delta(OH) - delta(alkyl) in ppm:

* methanol:        T = 409.0 - 36.54 dd - 21.85 dd^2 K,  valid 178-330 K;
* ethylene glycol: T = 466.5 - 102.00 dd K,              valid 273-416 K.

A calibration table (set-point against true temperature) is fitted by a low-order polynomial; applied to
a series of set-points it gives true temperatures with their covariance — the calibration's errors are
shared by all points — which :mod:`dnmr.activation.eyring` propagates into dH‡, dS‡ and dG‡.

Read :data:`THERMOMETER_CAUTIONS` before using the thermometer samples.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import NamedTuple

import numpy as np
from scipy.signal import find_peaks, peak_widths

from dnmr.errors import InputError, did_you_mean
from dnmr.io.tables import check_kelvin, read_table
from dnmr.notebook import NotebookView

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
            f"{self.name} thermometer: dd = {dd:g} ppm gives {t:.1f} K, outside its calibrated range "
            f"{lo:g}-{hi:g} K (dd {d_lo:.3f}-{d_hi:.3f} ppm){hint}"
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
        lines = [f"{where}{self.thermometer.name}, dd = {self.shift_difference_ppm:.4f} ppm -> T = {self.temperature_k:.2f} K"]
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


# --------------------------------------------------------------------------------------------------
# Set-point calibration
# --------------------------------------------------------------------------------------------------


def covariance_factor(covariance: np.ndarray) -> np.ndarray:
    """F with F F^T = `covariance` (a small positive semi-definite matrix): eigenvectors times sqrt(eigenvalue),
    the columns of negligible eigenvalues dropped."""
    values, vectors = np.linalg.eigh(np.asarray(covariance, dtype=float))
    keep = values > 1e-12 * max(float(values.max(initial=0.0)), 1e-300)
    return vectors[:, keep] * np.sqrt(values[keep])


@dataclass(frozen=True)
class TemperatureErrors:
    """Uncertainty of a set of sample temperatures: independent errors plus a few shared ones.

    The covariance is ``diag(independent_k**2) + shared_k @ shared_k.T`` (K^2). Each column of `shared_k`
    is one error common to the points (a probe offset: the same value in every row; a calibration curve:
    one column per coefficient), so the covariance of thousands of temperatures stays a vector and a few
    columns instead of a dense matrix.

    Attributes
    ----------
    independent_k : ndarray
        Standard error of each temperature that no other point shares, K.
    shared_k : ndarray
        (n, m) factor of the shared part, K.
    sources : tuple of str
        What each column of `shared_k` is ("calibration", "probe offset", "given covariance").
    """

    independent_k: np.ndarray
    shared_k: np.ndarray
    sources: tuple[str, ...] = ()

    @classmethod
    def from_covariance(cls, covariance: np.ndarray, source: str = "given covariance") -> "TemperatureErrors":
        """A full (small) covariance matrix (K^2) as shared columns: its eigenvectors scaled by sqrt(eigenvalue)."""
        columns = covariance_factor(covariance)
        return cls(np.zeros(len(columns)), columns, (source,) * columns.shape[1])

    def __len__(self) -> int:
        return len(self.independent_k)

    @property
    def stderr(self) -> np.ndarray:
        """Standard error of each temperature (independent and shared parts together), K."""
        return np.sqrt(self.independent_k**2 + (self.shared_k**2).sum(axis=1))

    @property
    def covariance(self) -> np.ndarray:
        """The dense n x n covariance, K^2 (for a handful of points only: it grows as n^2)."""
        return np.diag(self.independent_k**2) + self.shared_k @ self.shared_k.T

    @property
    def any(self) -> bool:
        """True when some temperature has an error."""
        return bool(self.independent_k.any() or self.shared_k.any())

    def plus(self, other: "TemperatureErrors") -> "TemperatureErrors":
        """Both sets of errors on the same points (independent parts add in quadrature)."""
        return TemperatureErrors(np.hypot(self.independent_k, other.independent_k),
                                 np.hstack([self.shared_k, other.shared_k]), self.sources + other.sources)

    def with_offset(self, offset_stderr_k: float) -> "TemperatureErrors":
        """Add an unknown probe offset (K), one error shared by every point."""
        column = np.full((len(self), 1), float(offset_stderr_k))
        return self.plus(TemperatureErrors(np.zeros(len(self)), column, ("probe offset",)))

    def subset(self, rows: np.ndarray) -> "TemperatureErrors":
        """The errors of the selected points."""
        return TemperatureErrors(self.independent_k[rows], self.shared_k[rows], self.sources)


class CalibratedTemperatures(NamedTuple):
    """True sample temperatures (K) and their errors."""

    temperature_k: np.ndarray
    errors: TemperatureErrors

    @property
    def stderr(self) -> np.ndarray:
        """Standard error of each temperature, K."""
        return self.errors.stderr

    @property
    def covariance(self) -> np.ndarray:
        """Their dense covariance, K^2 (see :attr:`TemperatureErrors.covariance`)."""
        return self.errors.covariance


@dataclass(frozen=True)
class TemperatureCalibration(NotebookView):
    """Polynomial from the VT unit's set-point to the true sample temperature.

    Attributes
    ----------
    setpoint_k, temperature_k : ndarray
        The calibration points, K.
    degree : int
        Degree of the polynomial.
    coefficients : ndarray
        Coefficients in powers of (set-point - centre_k), lowest first.
    coefficient_covariance : ndarray
        Their covariance (from the scatter of the points).
    centre_k : float
        Centre of the set-points, K.
    scatter_k : float
        Standard deviation of the points about the curve, K.
    source : str or None
        File the table was read from.
    """

    setpoint_k: np.ndarray
    temperature_k: np.ndarray
    degree: int
    coefficients: np.ndarray
    coefficient_covariance: np.ndarray
    centre_k: float
    scatter_k: float
    source: str | None = None

    def true_temperature(
        self, setpoint_k: Sequence[float] | np.ndarray, *, source: str | None = None, where: Sequence[str] | None = None
    ) -> CalibratedTemperatures:
        """True temperatures (K) at `setpoint_k` (K) with their errors.

        The errors are the curve's own uncertainty (shared, hence correlated, between set-points: one
        shared column per coefficient) plus the scatter of the calibration points about the curve as an
        independent error: a new run at a set-point is taken to stray from the curve as the calibration
        runs did.

        Parameters
        ----------
        setpoint_k : array
            Set-points, K.
        source : str, optional
            File the set-points come from, for messages.
        where : sequence of str, optional
            Place of each set-point in that file ('line N'), for messages.

        Raises
        ------
        InputError
            A set-point outside the calibrated range (no extrapolation).
        """
        s = np.asarray(setpoint_k, dtype=float)
        lo, hi = float(self.setpoint_k.min()), float(self.setpoint_k.max())
        for i, value in enumerate(s):
            if not lo - 1e-6 <= value <= hi + 1e-6:
                raise InputError(
                    f"set-point {value:g} K is outside the calibrated range {lo:g}-{hi:g} K; "
                    "extend the calibration instead of extrapolating it",
                    source,
                    where[i] if where is not None else None,
                )
        v = self._design(s)
        curve = v @ covariance_factor(self.coefficient_covariance)  # v C v^T = curve curve^T
        errors = TemperatureErrors(np.full(len(s), self.scatter_k), curve, ("calibration",) * curve.shape[1])
        return CalibratedTemperatures(v @ self.coefficients, errors)

    def _design(self, setpoint_k: np.ndarray) -> np.ndarray:
        return np.vander(setpoint_k - self.centre_k, self.degree + 1, increasing=True)

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {
            "degree": self.degree,
            "centre_k": self.centre_k,
            "coefficients": self.coefficients.tolist(),
            "coefficient_stderr": np.sqrt(np.diag(self.coefficient_covariance)).tolist(),
            "scatter_k": self.scatter_k,
            "setpoint_range_k": [float(self.setpoint_k.min()), float(self.setpoint_k.max())],
            "n_points": len(self.setpoint_k),
            "source": self.source,
        }

    def report(self) -> str:
        """Readable summary: the curve, the scatter and the points."""
        terms = " ".join(
            f"{c:+.5g}" + ("" if p == 0 else f" (s - {self.centre_k:.2f})" + (f"^{p}" if p > 1 else ""))
            for p, c in enumerate(self.coefficients)
        )
        fitted = self._design(self.setpoint_k) @ self.coefficients
        lines = [
            f"Temperature calibration (degree {self.degree}, {len(self.setpoint_k)} points)",
            f"  T_true / K = {terms},  s = set-point / K",
            f"  scatter about the curve {self.scatter_k:.2f} K; valid for set-points "
            f"{self.setpoint_k.min():g}-{self.setpoint_k.max():g} K",
            f"  {'set-point':>10} {'true T':>9} {'curve':>9}",
        ]
        lines += [f"  {s:10.2f} {t:9.2f} {f:9.2f}" for s, t, f in zip(self.setpoint_k, self.temperature_k, fitted)]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.report()


def fit_temperature_calibration(
    setpoint_k: Sequence[float] | np.ndarray,
    temperature_k: Sequence[float] | np.ndarray,
    degree: int = 1,
    *,
    source: str | None = None,
) -> TemperatureCalibration:
    """Fit true sample temperature (K) against set-point (K) by a polynomial of low degree.

    Parameters
    ----------
    setpoint_k : array
        Temperatures set on (or shown by) the VT unit, K.
    temperature_k : array
        True sample temperatures measured with a thermometer, K.
    degree : int
        1 (straight line, the usual choice), 2 or 3.
    source : str, optional
        File name for messages.

    Returns
    -------
    TemperatureCalibration

    Raises
    ------
    InputError
        Degree outside 1-3, or too few points to estimate the uncertainty (degree + 2 needed).
    """
    s = np.asarray(setpoint_k, dtype=float)
    t = np.asarray(temperature_k, dtype=float)
    if degree not in (1, 2, 3):
        raise InputError(f"degree must be 1, 2 or 3, got {degree}", source, "degree")
    if s.shape != t.shape or s.ndim != 1:
        raise InputError("set-points and temperatures must be lists of equal length", source)
    if len(np.unique(s)) < degree + 2:
        raise InputError(
            f"a degree-{degree} calibration needs at least {degree + 2} different set-points to estimate its uncertainty",
            source,
        )
    centre = float(s.mean())
    v = np.vander(s - centre, degree + 1, increasing=True)
    coefficients, *_ = np.linalg.lstsq(v, t, rcond=None)
    dof = len(s) - degree - 1
    scatter = math.sqrt(float(((t - v @ coefficients) ** 2).sum()) / dof)
    covariance = scatter**2 * np.linalg.inv(v.T @ v)
    return TemperatureCalibration(s, t, degree, coefficients, covariance, centre, scatter, source)


def read_temperature_calibration(
    path: str | Path, degree: int = 1, thermometer: str | ShiftThermometer | None = None
) -> TemperatureCalibration:
    """Read and fit a calibration table (CSV).

    Columns: ``setpoint_k`` and either ``temperature_k`` (true temperature) or ``shift_difference_ppm``
    (thermometer reading; give `thermometer`).

    Parameters
    ----------
    path : str or Path
        The CSV file.
    degree : int
        Polynomial degree (1-3).
    thermometer : str or ShiftThermometer, optional
        Thermometer that turns ``shift_difference_ppm`` into temperatures.

    Returns
    -------
    TemperatureCalibration
    """
    table = read_table(path, ("setpoint_k",), ("temperature_k", "shift_difference_ppm"))
    setpoints = table.numbers("setpoint_k")
    for i, value in enumerate(setpoints):
        check_kelvin(value, "setpoint_k", table.source, table.where(i))
    if table.has("temperature_k"):
        temperatures = table.numbers("temperature_k")
        for i, value in enumerate(temperatures):
            check_kelvin(value, "temperature_k", table.source, table.where(i))
    elif table.has("shift_difference_ppm"):
        if thermometer is None:
            raise InputError("the table gives shift_difference_ppm: say which thermometer (methanol or glycol)", table.source)
        thermo = get_thermometer(thermometer)
        dd = table.numbers("shift_difference_ppm")
        temperatures = np.array([thermo.temperature(d, source=table.source, where=table.where(i)) for i, d in enumerate(dd)])
    else:
        raise InputError("the table needs a temperature_k or a shift_difference_ppm column", table.source)
    return fit_temperature_calibration(setpoints, temperatures, degree, source=table.source)


# --------------------------------------------------------------------------------------------------
# A calibration from thermometer spectra
# --------------------------------------------------------------------------------------------------

CALIBRATION_LIST_COLUMNS = ("setpoint_k", "file")


@dataclass(frozen=True)
class CalibrationFromSpectra(NotebookView):
    """A set-point calibration built from thermometer spectra, one per set-point.

    Attributes
    ----------
    setpoint_k : ndarray
        Set-points of the spectra that were read, K.
    readings : tuple of ThermometerReading
        The thermometer reading of each of them.
    calibration : TemperatureCalibration
        The polynomial fitted through (set-point, sample temperature).
    skipped : tuple of str
        Spectra that could not be read or lie outside the thermometer's range, with the reason.
    source : str
        The list file.
    """

    setpoint_k: np.ndarray
    readings: tuple[ThermometerReading, ...]
    calibration: TemperatureCalibration
    skipped: tuple[str, ...]
    source: str

    def table_csv(self) -> str:
        """The calibration table (CSV) that :func:`read_temperature_calibration` reads: setpoint_k,
        temperature_k, shift_difference_ppm, thermometer and file; skipped spectra as comment lines."""
        lines = [f"# temperature calibration from {len(self.readings)} {self.readings[0].thermometer.name} thermometer "
                 f"spectra ({self.readings[0].thermometer.reference}); list {Path(self.source).name}"]
        lines += [f"# not used: {reason}" for reason in self.skipped]
        lines.append("setpoint_k,temperature_k,shift_difference_ppm,thermometer,file")
        lines += [f"{s!r},{r.temperature_k!r},{r.shift_difference_ppm!r},{r.thermometer.name},{_csv_cell(r.source)}"
                  for s, r in zip(self.setpoint_k.tolist(), self.readings)]
        return "\n".join(lines) + "\n"

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready): the readings with their set-points, the fitted calibration, the cautions."""
        out = readings_to_dict(list(self.readings))
        for entry, setpoint in zip(out["readings"], self.setpoint_k.tolist()):
            entry["setpoint_k"] = setpoint
        out.update(calibration_fit=self.calibration.to_dict(), skipped=list(self.skipped), source=self.source)
        return out

    def report(self) -> str:
        """The readings, the fitted calibration and what was skipped."""
        lines = [r.report() for r in self.readings] + ["", self.calibration.report()]
        lines += [f"not used: {reason}" for reason in self.skipped]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.report()


def _csv_cell(text: str | None) -> str:
    text = text or ""
    return '"' + text.replace('"', '""') + '"' if any(c in text for c in ',"\n') else text


def calibration_from_spectra(
    list_path: str | Path,
    thermometer: str | ShiftThermometer = "methanol",
    degree: int = 1,
    *,
    frequency_mhz: float | None = None,
) -> CalibrationFromSpectra:
    """Read the thermometer spectra a list names, one per set-point, and fit the set-point calibration.

    Parameters
    ----------
    list_path : str or Path
        CSV with the columns ``setpoint_k`` (K) and ``file`` (a thermometer spectrum: text, JCAMP-DX or a
        processed folder, relative to the list).
    thermometer : str or ShiftThermometer
        'methanol' or 'glycol' (see :data:`THERMOMETER_CAUTIONS` before using either).
    degree : int
        Degree of the calibration polynomial (1-3).
    frequency_mhz : float, optional
        Spectrometer frequency, MHz (for spectra with a Hz axis).

    Returns
    -------
    CalibrationFromSpectra
        A spectrum that cannot be read, or reads outside the thermometer's range, is skipped with the
        reason; the others are kept.

    Raises
    ------
    InputError
        A bad list (missing column, set-point in degrees Celsius), or too few spectra left for the degree.
    """
    table = read_table(list_path, CALIBRATION_LIST_COLUMNS)
    thermo = get_thermometer(thermometer)
    folder = Path(list_path).parent
    setpoints, readings, skipped = [], [], []
    for i, (value, name) in enumerate(zip(table.numbers("setpoint_k"), table.text("file"))):
        check_kelvin(value, "setpoint_k", table.source, table.where(i))
        if not name:
            raise InputError("empty file cell; name the thermometer spectrum", table.source, table.where(i))
        try:
            readings.append(temperature_from_file(folder / name, thermo, frequency_mhz=frequency_mhz))
            setpoints.append(value)
        except InputError as err:
            skipped.append(f"{table.where(i)} ({name}): {err}")
    if not readings:
        raise InputError(f"no thermometer spectrum could be read; first problem: {skipped[0]}", table.source)
    setpoint_k = np.array(setpoints)
    calibration = fit_temperature_calibration(setpoint_k, [r.temperature_k for r in readings], degree,
                                              source=table.source)
    return CalibrationFromSpectra(setpoint_k, tuple(readings), calibration, tuple(skipped), table.source)
