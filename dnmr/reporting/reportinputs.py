"""What a report is made from: the folder of a series fit (results.json, rates.csv), the model file it names,
a temperature calibration, the folders of magnetisation-transfer fits, and the Eyring analysis of all their
rates.  The input folders are only read.
"""
from __future__ import annotations

import csv
import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from dnmr.activation.eyring import eyring_fit_file
from dnmr.activation.eyring_result import EyringResult
from dnmr.activation.temperature_calibration import TemperatureCalibration, read_temperature_calibration
from dnmr.errors import InputError
from dnmr.fitting.seriesoutput import file_sha256
from dnmr.io.modelfile import load_model
from dnmr.model import Model

@dataclass
class ReportInputs:
    """What the report is made from.

    Attributes
    ----------
    outdir : Path
        The folder of the series fit.
    results : dict
        The parsed ``results.json``.
    rates : list of dict
        The rows of ``rates.csv`` (text values, as written).
    model : Model or None
        The model file named in results.json, when it can still be read.
    calibration : TemperatureCalibration or None
        Set-point calibration applied to the rates' temperatures.
    calibration_file : Path or None
        Where the calibration came from (None when passed as an object).
    eyring : list of EyringResult
        One per process (empty when the analysis could not be run).
    warnings : list of str
        Problems met while gathering the inputs (model changed, Eyring analysis impossible ...).
    """

    outdir: Path
    results: dict
    rates: list[dict]
    model: Model | None = None
    calibration: TemperatureCalibration | None = None
    calibration_file: Path | None = None
    eyring: list[EyringResult] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    transfer: list["TransferFolder"] = field(default_factory=list)


def read_results(outdir: Path) -> dict:
    """Parse ``OUTDIR/results.json`` of ``dnmr fit``.

    Raises
    ------
    InputError
        When the file is missing, is not valid JSON, or is not the output of a series fit.
    """
    path = outdir / "results.json"
    if not path.is_file():
        raise InputError(f"no results.json here: run `dnmr fit SERIES.toml -o {outdir}` first, or name the "
                         "folder it wrote", str(outdir))
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise InputError("not a text file: expected the results.json written by `dnmr fit`", str(path)) from None
    except json.JSONDecodeError as err:
        raise InputError(f"not valid JSON ({err.msg}); the file is damaged: fit the series again",
                         str(path), f"line {err.lineno} column {err.colno}") from None
    if not isinstance(data, dict) or not isinstance(data.get("spectra"), list):
        raise InputError("not the results.json of `dnmr fit` (no list of spectra)", str(path), "spectra")
    return data


def read_rate_rows(outdir: Path) -> list[dict]:
    """Rows of ``OUTDIR/rates.csv`` as dicts of text (InputError when the file is missing)."""
    path = outdir / "rates.csv"
    if not path.is_file():
        raise InputError("no rates.csv next to results.json: the series fit did not finish; fit it again",
                         str(outdir))
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _model(results: dict) -> tuple[Model | None, list[str]]:
    """The model named in results.json, and warnings when it is gone or has changed since the fit."""
    entry = results.get("model") or {}
    path = Path(str(entry.get("file", "")))
    if not entry.get("file") or not path.is_file():
        return None, [f"the model file {path} is no longer there: the model section lists only its states and processes"]
    warnings = []
    if file_sha256(path) != entry.get("sha256"):
        warnings.append(f"the model file {path} has changed since the fit (SHA-256 differs): the model section "
                        "shows the file as it is now")
    try:
        return load_model(path), warnings
    except InputError as err:
        return None, warnings + [f"the model file cannot be read any more: {err}"]


def read_calibration(calibration: TemperatureCalibration | str | Path | None) -> tuple[TemperatureCalibration | None, Path | None]:
    """The calibration given as an object or a CSV file (read with degree 1), and the file it came from (None for an
    object or no calibration)."""
    if calibration is None or isinstance(calibration, TemperatureCalibration):
        return calibration, None
    return read_temperature_calibration(calibration), Path(calibration)


def gather_inputs(outdir: str | Path, calibration: TemperatureCalibration | str | Path | None = None,
                  transfer: Sequence[str | Path] = ()) -> ReportInputs:
    """Read OUTDIR, the model and the calibration, and run the Eyring analysis.

    Parameters
    ----------
    outdir : str or Path
        Folder written by ``dnmr fit``.
    calibration : TemperatureCalibration, str or Path, optional
        Set-point calibration (object or CSV with setpoint_k, temperature_k; degree 1).
    transfer : sequence of str or Path
        Folders written by ``dnmr transfer``: shown beside the lineshape fits, their rates fitted with
        OUTDIR's in the Eyring analysis.

    Returns
    -------
    ReportInputs
        An Eyring analysis that cannot be run (too few rates, for example) becomes a warning.
    """
    outdir = Path(outdir)
    results = read_results(outdir)
    inputs = ReportInputs(outdir, results, read_rate_rows(outdir))
    inputs.calibration, inputs.calibration_file = read_calibration(calibration)
    inputs.model, inputs.warnings = _model(results)
    inputs.transfer = [read_transfer_folder(Path(folder)) for folder in transfer]
    try:
        inputs.eyring = eyring_fit_file(rate_tables(inputs), calibration=inputs.calibration)
    except InputError as err:
        inputs.warnings.append(f"no Eyring analysis: {err}")
    return inputs


@dataclass(frozen=True)
class TransferFolder:
    """A folder written by ``dnmr transfer``.

    Attributes
    ----------
    folder : Path
        The folder.
    results : dict
        Its parsed ``results.json``.
    rates : list of dict
        The rows of its ``rates.csv`` (text values, as written).
    """

    folder: Path
    results: dict
    rates: list[dict]


def read_transfer_folder(folder: Path) -> TransferFolder:
    """Read a ``dnmr transfer`` folder (InputError when it is not one, or is damaged)."""
    path = folder / "results.json"
    if not path.is_file():
        raise InputError(f"no results.json here: run `dnmr transfer EXPERIMENT.toml -o {folder}` first, or name the "
                         "folder it wrote", str(folder), "--transfer")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise InputError("not the results.json of `dnmr transfer` (not valid JSON); fit the experiment again",
                         str(path), "--transfer") from None
    if not isinstance(data, dict) or data.get("experiment") not in ("inversion", "saturation", "exchange-2d"):
        raise InputError("not the results.json of `dnmr transfer` (no experiment named)", str(path), "--transfer")
    if not (folder / "rates.csv").is_file():
        raise InputError("no rates.csv next to results.json; fit the experiment again", str(folder), "--transfer")
    return TransferFolder(folder, data, read_rate_rows(folder))


def rate_tables(inputs: ReportInputs) -> list[Path]:
    """The rates tables of the Eyring analysis: OUTDIR's, then each transfer folder's."""
    return [inputs.outdir / "rates.csv"] + [t.folder / "rates.csv" for t in inputs.transfer]
