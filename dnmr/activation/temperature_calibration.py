"""Set-point calibration: the true sample temperature from the temperature set on the VT unit.

A calibration table (set-point against true temperature, measured with a thermometer of
:mod:`dnmr.activation.thermometers`) is fitted by a low-order polynomial; applied to a series of
set-points it gives true temperatures with their covariance — the calibration's errors are shared by all
points — which the Eyring analysis (:mod:`dnmr.activation.line_fit`) propagates into ΔH‡, ΔS‡ and ΔG‡.
The calibration can be built from thermometer spectra, one per set-point (:func:`calibration_from_spectra`).
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

import numpy as np

from dnmr.activation.temperature_errors import TemperatureErrors, covariance_factor
from dnmr.activation.thermometers import (
    ShiftThermometer,
    ThermometerReading,
    get_thermometer,
    readings_to_dict,
    temperature_from_file,
)
from dnmr.errors import InputError
from dnmr.io.tables import check_kelvin, read_table
from dnmr.notebook import NotebookView


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

    def write_table(self, path: str | Path, overwrite: bool = False) -> Path:
        """Write :meth:`table_csv` to `path` atomically (never over an existing file unless `overwrite`)."""
        from dnmr.io.output import atomic_write_text

        return atomic_write_text(path, self.table_csv(), overwrite=overwrite)

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
