"""One self-contained HTML report of a series fit or a global fit (``dnmr report OUTDIR``).

:func:`write_report` reads the ``results.json`` and ``rates.csv`` that ``dnmr fit`` wrote into OUTDIR,
runs the Eyring analysis on the rates and writes ONE HTML file (default ``OUTDIR/report.html``) with
every figure embedded as a base64 PNG data URI and the style inline: the file makes no request of any
kind (no scripts, fonts, style sheets or images from elsewhere) and prints on paper as it shows on screen.

Sections: summary (activation parameters in kJ/mol with kcal/mol alongside, their correlation), the
model, the rate table, identifiability notes (which rates are only bounds, and why), the fit at every
temperature with its residuals, the Eyring plot and analysis, warnings, safety cautions, and the exact
inputs (SHA-256 of every file) and software versions.  When ``dnmr fit --posterior`` sampled the
posteriors, the rate table adds the posterior rate and every fit shows its posterior (median with 68 %
and 95 % intervals, or the one-sided 95 % bound of a bound rate, beside the least-squares result; the
sampler's notes; the pairwise posterior figure).

Magnetisation transfer
----------------------
Rates too slow for lineshapes come from ``dnmr transfer`` (selective inversion, saturation transfer,
2D exchange), one folder per experiment.  Name those folders (``transfer=[...]``, or ``dnmr report OUTDIR
--transfer DIR`` once per folder): the report then shows each transfer fit (its rates, R1, remarks and the
figure of data, fit and residuals that ``dnmr transfer`` drew) in a section beside the lineshape fits,
and the Eyring analysis fits the rates of OUTDIR and of every transfer folder together (one line, each
rate marked by its method).  Without them the report is the lineshape fits' alone.

A folder of ``dnmr fit --global`` (it holds global.json) gets the global fit's report instead: its
treatment and ΔH‡, ΔS‡, the comparison with the two-step result (activation parameters and rates), each
spectrum's chi-square per point against the measured noise beside its two-step fit, the stacked fits
and residuals, the global parameters, the model, warnings, cautions and the inputs of the two-step folder.

Temperatures
------------
Neither the series file nor ``results.json`` records a temperature calibration: the rates carry the
temperatures the series file gives.  The Eyring analysis therefore uses a calibration only when one is
passed (``calibration=`` or ``--calibration CAL.csv``); the temperatures in rates.csv are then taken as
set-points and replaced by calibrated sample temperatures (see :mod:`dnmr.activation.temperature_calibration`).  The report
states which of the two was done.

Beside the report, ``supporting-information/`` receives the supporting-information tables of
:mod:`dnmr.reporting.supporting` (CSV, Markdown, LaTeX) and the Eyring figure in the chosen figure format; the
report shows the rates table too.  With a calibration every table shows the set-point beside the sample
temperature and its error, and the cautions add the thermometer liquids'.  The report names files relative
to its own folder: no absolute path of the user's machine is written into it.

Text taken from the input files is always HTML-escaped.  The input folder is only read; the report
is written atomically and an existing file is never replaced unless ``overwrite``.

The pieces: :mod:`dnmr.reporting.reportinputs` reads the folders, :mod:`dnmr.reporting.seriesreport` and
:mod:`dnmr.reporting.globalreport` make the two kinds of document (the fits at each temperature in
:mod:`dnmr.reporting.fitsections`, the supporting-information tables in
:mod:`dnmr.reporting.supportingsection`), from the HTML pieces of :mod:`dnmr.reporting.reporthtml`.
"""
from __future__ import annotations

import concurrent.futures as futures
import os
import re
from collections.abc import Callable, Sequence
from functools import partial
from pathlib import Path

from dnmr.activation.eyring import eyring_fit_file
from dnmr.activation.temperature_calibration import TemperatureCalibration
from dnmr.errors import InputError
from dnmr.fitting.resultsfolder import refuse_folder_being_written, lock_results_folder, refuse_linked_folders, release_results_folder
from dnmr.io.output import atomic_write_bytes, atomic_write_text, check_output_file, chosen_figure_format, figure_file, figures_as
from dnmr.reporting.globalreport import GLOBAL_NAME, global_document, read_global
from dnmr.reporting.reportinputs import gather_inputs, read_calibration
from dnmr.reporting.seriesreport import EyringFigures, eyring_figures, render_report
from dnmr.reporting.supporting import REPORT_NAME, supporting_folder, write_supporting_tables
from dnmr.reporting.supportingsection import SupportingRows, global_supporting_rows, supporting_rows

INPUT_NAMES = ("results.json", "rates.csv", "global.json")
#: The program the report names in the lock of the folder it writes into.
REPORT_PROGRAM = "dnmr report"


def _refuse_inputs(path: Path, outdir: Path) -> None:
    for name in INPUT_NAMES:
        if path.resolve() == (outdir / name).resolve():
            raise InputError(f"the report would replace the input {name}; choose another file name", where="--output")


def write_report(
    outdir: str | Path,
    *,
    calibration: TemperatureCalibration | str | Path | None = None,
    output: str | Path | None = None,
    overwrite: bool = False,
    transfer: Sequence[str | Path] = (),
    figure_format: str | None = None,
    ahead: ReportFigures | None = None,
) -> Path:
    """Write one self-contained HTML report of the series fit in `outdir`.

    Parameters
    ----------
    outdir : str or Path
        Folder written by ``dnmr fit`` (results.json, rates.csv, figures/, series_fits.png), or by
        ``dnmr fit --global`` (global.json, its figures and two-step/): then the report is the global fit's,
        with its comparison to the two-step result.
    calibration : TemperatureCalibration, str or Path, optional
        Set-point calibration for the Eyring analysis (object, or CSV with setpoint_k and temperature_k,
        fitted with degree 1).  Without it the rates' temperatures are used as they are: neither the
        series file nor results.json records a calibration.  Not for a global fit, which used its
        calibration when it ran.
    output : str or Path, optional
        HTML file to write (default ``OUTDIR/report.html``).
    overwrite : bool
        Replace an existing file (the report and its supporting-information tables).
    transfer : sequence of str or Path
        Folders written by ``dnmr transfer``: their fits are shown beside the lineshape fits and their
        rates join the Eyring analysis and the supporting-information tables (not for a global fit).
    figure_format : {"png", "svg", "pdf"}, optional
        Format of the Eyring figure written beside the supporting-information tables (default: the one
        :func:`dnmr.io.output.figures_as` chose, else PNG).
    ahead : ReportFigures, optional
        The report's figures drawn before it (``dnmr fit`` draws them while its workers draw the figures of the
        fits), used when drawn from the same rates.csv, calibration and figure format (else drawn here).

    Returns
    -------
    Path
        The file written.  Beside it, in ``supporting-information/`` (see :func:`dnmr.reporting.supporting.supporting_folder`), the
        supporting-information tables
        (:mod:`dnmr.reporting.supporting`: si_rates.csv, si_activation.csv, si_tables.md, si_tables.tex) and, for a
        series fit, the Eyring figure.  The report names every file relative to its own folder.

    Raises
    ------
    InputError
        When OUTDIR has no valid results.json or rates.csv, the calibration cannot be read, the output
        exists (without `overwrite`) or would replace an input, its supporting-information folder is a
        link or a file (nothing is written through a link out of the folder), or another dnmr run is
        writing into the report's folder (the report takes the folder's lock while it writes, as
        ``dnmr fit`` does).
    """
    outdir = Path(outdir)
    path = Path(output) if output is not None else outdir / REPORT_NAME
    _refuse_inputs(path, outdir)
    check_output_file(path, overwrite, "--output")
    refuse_linked_folders(path.parent, (supporting_folder(path).name,))
    if path.parent.resolve() != outdir.resolve():  # the folder read is not the one locked below
        refuse_folder_being_written(outdir)
    lock = lock_results_folder(path.parent, REPORT_PROGRAM)
    try:
        return _write_locked(outdir, path, calibration, overwrite, transfer, figure_format, ahead)
    finally:
        release_results_folder(lock)


def _write_locked(outdir: Path, path: Path, calibration: TemperatureCalibration | str | Path | None, overwrite: bool,
                  transfer: Sequence[str | Path], figure_format: str | None, ahead: ReportFigures | None) -> Path:
    """The work of :func:`write_report` once the folder of the report (`path`) is locked."""
    with figures_as(figure_format or chosen_figure_format()):
        if (outdir / GLOBAL_NAME).is_file():
            if transfer:
                raise InputError("magnetisation-transfer folders go with the report of a spectrum-by-spectrum fit; "
                                 f"name {outdir / 'two-step'} instead", where="--transfer")
            document = global_document(outdir, calibration)
            write_supporting_files(supporting_folder(path), global_supporting_rows(read_global(outdir)), None, overwrite)
        else:
            inputs = gather_inputs(outdir, calibration, transfer)
            figures = ahead.eyring if ahead is not None and ahead.drawn_for(outdir, calibration, transfer) else None
            if figures is None and inputs.eyring:
                figures = eyring_figures(inputs.eyring, chosen_figure_format())
            document = render_report(inputs, figures)
            write_supporting_files(supporting_folder(path), supporting_rows(inputs), figures, overwrite)
    return atomic_write_text(path, relative_paths(document, path.parent), overwrite=overwrite)


def write_supporting_files(target: Path, rows: SupportingRows, figures: EyringFigures | None, overwrite: bool) -> list[Path]:
    """Write the supporting-information tables (and the Eyring figure, `figures`, in the chosen figure format) into the
    folder `target`."""
    figure = figure_file(target / "eyring.png")
    if figures is not None and figure.exists() and not overwrite:
        raise InputError(f"{figure} already exists; pass --overwrite to replace it", where="output")
    written = write_supporting_tables(target, rows.rates, rows.activation, title=rows.title, overwrite=overwrite)
    if figures is not None:
        written.append(atomic_write_bytes(check_output_file(figure, overwrite, "output", figure=True), figures.supporting,
                                          overwrite=overwrite))
    return written


class ReportFigures:
    """The figures of a series' report drawn before the report is written: ``dnmr fit`` has a worker draw them
    (:meth:`draw`) from rates.csv beside the figures of the fits, and :func:`write_report` uses them when rates.csv,
    the calibration and the figure format are still those they were drawn from.

    Parameters
    ----------
    outdir : Path
        The results folder of the series fit.
    calibration : TemperatureCalibration, str or Path, optional
        The calibration the report will be written with (the same object).
    """

    def __init__(self, outdir: str | Path, calibration: TemperatureCalibration | str | Path | None = None):
        self.outdir, self.calibration = Path(outdir), calibration
        self.rates: bytes | None = None
        self.drawing: EyringFigures | futures.Future | None = None

    def draw(self, submit: Callable[..., futures.Future] | None = None) -> None:
        """Draw the Eyring figure from rates.csv as it is now: here, or as a task that `submit(function, *args)`
        starts (on a worker: :func:`dnmr.fitting.series.fit_series`'s `alongside`); nothing when it cannot be drawn
        (the report then tries again and says why)."""
        try:
            self.rates = (self.outdir / "rates.csv").read_bytes()
            eyring = eyring_fit_file([self.outdir / "rates.csv"], calibration=read_calibration(self.calibration)[0])
            if eyring:
                self.drawing = (eyring_figures if submit is None else partial(submit, eyring_figures))(
                    eyring, chosen_figure_format())
        except Exception:  # noqa: BLE001 (whatever failed fails again in the report, which says so)
            self.drawing = None

    @property
    def eyring(self) -> EyringFigures | None:
        """The Eyring figures drawn (waiting for the worker drawing them), or None when none were."""
        if not isinstance(self.drawing, futures.Future):
            return self.drawing
        try:
            return self.drawing.result()
        except Exception:  # noqa: BLE001 (the worker died or drawing failed there: the report draws them itself)
            return None

    def drawn_for(self, outdir: Path, calibration: TemperatureCalibration | str | Path | None,
                  transfer: Sequence[str | Path]) -> bool:
        """Whether the report of `outdir` with `calibration` and `transfer` draws the same figures as were drawn."""
        return (self.eyring is not None and not transfer and calibration is self.calibration
                and outdir.resolve() == self.outdir.resolve() and self.eyring.image_format == chosen_figure_format()
                and (outdir / "rates.csv").read_bytes() == self.rates)


_DATA_URI = re.compile(r'(data:[^"\s]+)')


_ABSOLUTE_PATH = re.compile(r'(?<![\w.~/\\-])(/[^\s"<>&;,()\']+)')


def relative_paths(document: str, base: Path) -> str:
    """`document` with every absolute path of this machine written relative to `base` (the report's folder).

    Embedded figures (data URIs) are left alone; a path counts as one of this machine when its first part
    is a folder here (``/home``, ``/tmp`` ...), so that units such as ``/ K`` are never touched.
    """
    base = base.resolve()

    def swap(match: re.Match) -> str:
        text = match.group(1)
        top = text.split("/")[1]
        if not top or not Path("/" + top).is_dir():
            return text
        return os.path.relpath(text.rstrip("."), base) + ("." if text.endswith(".") else "")

    parts = _DATA_URI.split(document)
    return "".join(part if i % 2 else _ABSOLUTE_PATH.sub(swap, part) for i, part in enumerate(parts))
