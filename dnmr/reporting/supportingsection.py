"""The supporting-information tables in a report: their rows for a series fit (with its transfer folders and
calibration) or a global fit, and the section that shows them (:mod:`dnmr.reporting.supporting` writes the
files).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from dnmr.errors import InputError
from dnmr.reporting.reporthtml import esc, section, table
from dnmr.reporting.reportinputs import ReportInputs
from dnmr.reporting.supporting import ACTIVATION_STEM, RATES_STEM, REPORT_NAME, TABLES_STEM, activation_rows, rate_rows_from_global, rate_rows_from_table, rate_table_cells, rates_note
from dnmr.fitting.resultsfolder import SUPPORTING_FOLDER

@dataclass
class SupportingRows:
    """The rows of the supporting-information tables (see :mod:`dnmr.reporting.supporting`)."""

    rates: list
    activation: list
    title: str = ""


def supporting_rows(inputs: ReportInputs) -> SupportingRows:
    """The supporting-information tables of a series fit: its rates.csv and those of the transfer folders
    (sample temperatures through the calibration when one is given), and its Eyring analysis."""
    rows = list(inputs.rates) + [row for t in inputs.transfer for row in t.rates]
    title = inputs.model.title if inputs.model is not None and inputs.model.title else inputs.outdir.resolve().name
    try:
        rates = rate_rows_from_table(rows, inputs.calibration)
    except InputError:  # a set-point outside the calibration: the warnings say so; the table says "no calibration"
        rates = rate_rows_from_table(rows)
    return SupportingRows(rates, activation_rows(inputs.eyring), title)


def global_supporting_rows(g: dict) -> SupportingRows:
    """The supporting-information tables of a global fit (global.json): the global line's rate at each
    sample temperature, and the global activation parameters."""
    return SupportingRows(rate_rows_from_global(g), activation_rows(g["processes"]), "global fit")


def supporting_section(rows: SupportingRows) -> str:
    """The supporting-information tables as the report shows them, and the files that hold them."""
    calibrated = any(math.isfinite(r.setpoint_k) for r in rows.rates)
    header, cells = rate_table_cells(rows.rates, calibrated)
    body = table(header, cells, numeric=[False] + [True] * (len(header) - 1))
    body += f'<p class="muted">{esc(rates_note(calibrated))}</p>'
    body += "".join(f"<p>{esc(a.sentence())}</p>" for a in rows.activation)
    names = ", ".join((f"{RATES_STEM}.csv", f"{ACTIVATION_STEM}.csv", f"{TABLES_STEM}.md", f"{TABLES_STEM}.tex"))
    body += (f'<p class="muted">Written beside this report as CSV, Markdown and LaTeX ({esc(names)}, and the Eyring '
             f"figure) in the folder {esc(SUPPORTING_FOLDER)}/ (for a report not called {esc(REPORT_NAME)}: "
             f"&lt;its name&gt;-{esc(SUPPORTING_FOLDER)}/).</p>")
    return section("supporting", "Supporting-information tables", body)
