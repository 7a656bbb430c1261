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
treatment and dH‡, dS‡, the comparison with the two-step result (activation parameters and rates), each
spectrum's chi-square per point against the measured noise beside its two-step fit, the stacked fits
and residuals, the global parameters, the model, warnings, cautions and the inputs of the two-step folder.

Temperatures
------------
Neither the series file nor ``results.json`` records a temperature calibration: the rates carry the
temperatures the series file gives.  The Eyring analysis therefore uses a calibration only when one is
passed (``calibration=`` or ``--calibration CAL.csv``); the temperatures in rates.csv are then taken as
set-points and replaced by calibrated sample temperatures (see :mod:`dnmr.activation.thermometry`).  The report
states which of the two was done.

Beside the report, ``supporting-information/`` receives the supporting-information tables of
:mod:`dnmr.reporting.supporting` (CSV, Markdown, LaTeX) and the Eyring figure in the chosen figure format; the
report shows the rates table too.  With a calibration every table shows the set-point beside the sample
temperature and its error, and the cautions add the thermometer liquids'.  The report names files relative
to its own folder: no absolute path of the user's machine is written into it.

Text taken from the input files is always HTML-escaped.  The input folder is only read; the report
is written atomically and an existing file is never replaced unless ``overwrite``.
"""
from __future__ import annotations

import base64
import csv
import html
import io
import json
import math
import os
import platform
import re
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from dnmr.activation.eyring import EyringResult, eyring_fit_file
from dnmr.formatting import format_with_error
from dnmr.errors import InputError
from dnmr.kinetics import KCAL_PER_KJ, STANDARD_TEMPERATURE_K
from dnmr.model import Model
from dnmr.io.modelfile import load_model
from dnmr.io.output import atomic_write_text, chosen_figure_format, figure_file, figures_as
from dnmr.planning.cautions import CAUTIONS
from dnmr.fitting.seriesoutput import file_sha256
from dnmr.activation.thermometry import THERMOMETER_CAUTIONS, TemperatureCalibration, read_temperature_calibration

REPORT_NAME = "report.html"
INPUT_NAMES = ("results.json", "rates.csv", "global.json")
BOUND_STATUSES = ("upper-bound", "lower-bound", "interval", "undetermined")
FIGURE_DPI = 110

STYLE = """
body { font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: #111; background: #fff;
       max-width: 68rem; margin: 1.5rem auto; padding: 0 1rem; line-height: 1.4; }
h1 { font-size: 1.6rem; border-bottom: 2px solid #333; padding-bottom: .3rem; }
h2 { font-size: 1.25rem; border-bottom: 1px solid #999; margin-top: 2rem; }
h3 { font-size: 1.05rem; margin-bottom: .3rem; }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .9rem; }
th, td { border: 1px solid #bbb; padding: .2rem .5rem; text-align: left; vertical-align: top; }
th { background: #eee; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
pre { background: #f6f6f6; border: 1px solid #ddd; padding: .5rem; font-size: .8rem; overflow-x: auto;
      white-space: pre-wrap; }
figure { margin: .5rem 0 1.5rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { font-size: .85rem; color: #333; }
.warn { color: #8a3b00; }
.muted { color: #555; font-size: .85rem; }
@media print {
  body { max-width: none; margin: 0; font-size: 10pt; }
  h2 { page-break-after: avoid; }
  figure, table, pre { page-break-inside: avoid; }
  pre { white-space: pre-wrap; }
}
"""


# --------------------------------------------------------------------------------------------------
# reading OUTDIR


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


def _calibration(calibration: TemperatureCalibration | str | Path | None) -> tuple[TemperatureCalibration | None, Path | None]:
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
    inputs.calibration, inputs.calibration_file = _calibration(calibration)
    inputs.model, inputs.warnings = _model(results)
    inputs.transfer = [read_transfer_folder(Path(folder)) for folder in transfer]
    try:
        inputs.eyring = eyring_fit_file(rate_tables(inputs), calibration=inputs.calibration)
    except InputError as err:
        inputs.warnings.append(f"no Eyring analysis: {err}")
    return inputs


# --------------------------------------------------------------------------------------------------
# HTML pieces


def esc(value) -> str:
    """Text of `value`, HTML-escaped (quotes too)."""
    return html.escape(str(value), quote=True)


def _number(text, fmt: str = ".4g") -> str:
    """A number from rates.csv (text) formatted, or '' when empty."""
    if text in ("", None):
        return ""
    try:
        return format(float(text), fmt)
    except ValueError:
        return str(text)


def table(headers: Sequence[str], rows: Iterable[Sequence], numeric: Sequence[bool] = ()) -> str:
    """An HTML table; every header and cell is escaped. `numeric` right-aligns columns."""
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = []
    for row in rows:
        cells = [f'<td class="num">{esc(c)}</td>' if i < len(numeric) and numeric[i] else f"<td>{esc(c)}</td>"
                 for i, c in enumerate(row)]
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def bullets(items: Iterable[str], css: str = "") -> str:
    """An escaped bullet list ('' when empty)."""
    items = list(items)
    cls = f' class="{css}"' if css else ""
    return f"<ul{cls}>" + "".join(f"<li>{esc(i)}</li>" for i in items) + "</ul>" if items else ""


def png_data_uri(data: bytes) -> str:
    """``data:image/png;base64,...`` URI of PNG bytes."""
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def figure_html(data: bytes, caption: str, alt: str) -> str:
    """A <figure> with the PNG embedded and an escaped caption."""
    return (f'<figure><img src="{png_data_uri(data)}" alt="{esc(alt)}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def written_figure(path: Path) -> Path | None:
    """The figure asked for at `path` as written: with the suffix of any figure format (PNG first), or None."""
    from dnmr.io.output import FIGURE_FORMAT_CHOICES

    found = [path.with_suffix("." + f) for f in FIGURE_FORMAT_CHOICES if path.with_suffix("." + f).is_file()]
    return found[0] if found else None


def figure_from_file(path: Path, caption: str, alt: str) -> str:
    """Embed the figure asked for at `path` (``.png``) in whichever format it was written (PNG or SVG
    embedded; a PDF named by its place beside the report), or say that it is missing."""
    found = written_figure(path)
    if found is None:
        return f'<p class="warn">figure {esc(path.name)} not found in {esc(path.parent.name)}</p>'
    if found.suffix == ".pdf":
        return (f'<p class="muted">{esc(caption)}: written as PDF, {esc(found.parent.name)}/{esc(found.name)} '
                "(open it beside this report)</p>")
    if found.suffix == ".svg":
        uri = "data:image/svg+xml;base64," + base64.b64encode(found.read_bytes()).decode("ascii")
        return f'<figure><img src="{uri}" alt="{esc(alt)}"><figcaption>{esc(caption)}</figcaption></figure>'
    return figure_html(found.read_bytes(), caption, alt)


def figure_png(fig) -> bytes:
    """Render a matplotlib figure to PNG bytes (no software tag) and close it."""
    import matplotlib.pyplot as plt

    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=FIGURE_DPI, bbox_inches="tight", metadata={"Software": None})
    plt.close(fig)
    return buffer.getvalue()


def section(anchor: str, title: str, body: str) -> str:
    """A <section> with an <h2>."""
    return f'<section id="{esc(anchor)}"><h2>{esc(title)}</h2>{body}</section>'


def _pre(text: str) -> str:
    return f"<pre>{esc(text)}</pre>"


# --------------------------------------------------------------------------------------------------
# sections


PARAMETER_ROWS = (
    # label, key, unit, converted unit (kcal) or None
    ("dH‡", "enthalpy", "kJ/mol", "kcal/mol"),
    ("dS‡", "entropy", "J/(mol K)", "cal/(mol K)"),
    ("dG‡(298.15 K)", "gibbs_298", "kJ/mol", "kcal/mol"),
    ("dG‡(T_hm)", "gibbs_hm", "kJ/mol", "kcal/mol"),
    ("Ea (Arrhenius)", "activation_energy", "kJ/mol", None),
)


def _value_key(key: str) -> str:
    return {"enthalpy": "enthalpy_kj_mol", "entropy": "entropy_j_mol_k", "gibbs_298": "gibbs_298_kj_mol",
            "gibbs_hm": "gibbs_hm_kj_mol", "activation_energy": "activation_energy_kj_mol"}[key]


def _parameter_cell(key: str, value: float, stderr: float) -> str:
    """A table cell showing 'value ± error' and carrying the exact numbers in data attributes."""
    return (f'<td class="num" data-key="{esc(key)}" data-value="{value!r}" data-stderr="{stderr!r}">'
            f"{esc(format_with_error(value, stderr))}</td>")


def parameter_table(result: EyringResult) -> str:
    """Activation parameters of one process with errors, kJ/mol and kcal/mol side by side."""
    d = result.to_dict()
    rows = []
    for label, key, unit, unit2 in PARAMETER_ROWS:
        if key == "gibbs_hm":
            label = f"dG‡({d['harmonic_mean_temperature_k']:.1f} K, harmonic mean)"
        value, stderr = d[_value_key(key)], d[key + "_stderr"]
        converted = (f'<td class="num">{esc(format_with_error(value * KCAL_PER_KJ, stderr * KCAL_PER_KJ))} '
                     f"{esc(unit2)}</td>") if unit2 else "<td></td>"
        rows.append(f"<tr><th>{esc(label)}</th>{_parameter_cell(_value_key(key), value, stderr)}"
                    f"<td>{esc(unit)}</td>{converted}</tr>")
    rows.append(f'<tr><th>corr(dH‡, dS‡)</th><td class="num" data-key="correlation_enthalpy_entropy" '
                f'data-value="{result.correlation!r}">{result.correlation:.4f}</td><td></td><td></td></tr>')
    rows.append(f"<tr><th>corr(dG‡(T_hm), dH‡)</th><td class=\"num\">{d['correlation_gibbs_hm_enthalpy']:+.3f}</td>"
                "<td></td><td></td></tr>")
    head = "<tr><th>quantity</th><th>value ± standard error</th><th>unit</th><th>in kcal/mol or cal/(mol K)</th></tr>"
    return (f'<table class="parameters" data-process="{esc(result.process)}"><thead>{head}</thead>'
            f"<tbody>{''.join(rows)}</tbody></table>")


def _temperature_basis(inputs: ReportInputs) -> str:
    if inputs.calibration is None:
        return ("Temperatures: as given in the series file (taken as sample temperatures; no calibration was "
                "applied — pass --calibration CAL.csv to correct set-points).")
    origin = f" from {inputs.calibration_file}" if inputs.calibration_file else ""
    return (f"Temperatures: the series' set-points, corrected by the calibration{origin}; its uncertainty is "
            "carried into the errors.")


def summary_section(inputs: ReportInputs) -> str:
    """Title block: what was fitted and the activation parameters of each process."""
    r = inputs.results
    spectra = r["spectra"]
    fitted = sum(s.get("status") == "fitted" for s in spectra)
    parts = [f"<p>{esc(len(spectra))} spectra, {esc(fitted)} fitted; series file "
             f"{esc(Path(str((r.get('series') or {}).get('file', '?'))).name)}; fit written "
             f"{esc(r.get('written_utc', '?'))}.</p>", f"<p>{esc(_temperature_basis(inputs))}</p>"]
    for result in inputs.eyring:
        t = result.temperature_k
        parts.append(f"<h3>Process {esc(result.process or '(unnamed)')}</h3>"
                     f"<p>{esc(int(result.used.sum()))} rates from {t.min():.1f} to {t.max():.1f} K"
                     f"{esc(f' (+ {len(result.bounds)} bounds, not fitted)' if result.bounds else '')}; "
                     f"errors from {esc(result.error_basis)}.</p>" + parameter_table(result))
    if not inputs.eyring:
        parts.append('<p class="warn">No activation parameters: see the warnings.</p>')
    return section("summary", "Summary", "".join(parts))


def _state_rows(model: Model) -> list[list[str]]:
    try:
        populations = [f"{p:.4f}" for p in model.populations()]
    except InputError:
        populations = ["" for _ in model.states]
    rows = []
    for state, population in zip(model.states, populations):
        shifts = ", ".join(f"{spin} {ppm:.4f}" for spin, ppm in state.shifts_ppm.items())
        couplings = ", ".join(f"{pair} {hz:+.2f}" for pair, hz in state.couplings_hz.items())
        energy = "" if state.free_energy_kj_mol is None else f"{state.free_energy_kj_mol:g}"
        rows.append([state.name, population, energy, f"{state.linewidth_hz:g}", shifts, couplings])
    return rows


def _exchange_start(exchange) -> str:
    if exchange.rate_per_s is not None:
        return f"k = {exchange.rate_per_s:g} s^-1"
    if exchange.barrier_kj_mol is not None:
        return f"dG‡ = {exchange.barrier_kj_mol:g} kJ/mol"
    return f"dH‡ = {exchange.enthalpy_kj_mol:g} kJ/mol, dS‡ = {exchange.entropy_j_mol_k:g} J/(mol K)"


def model_section(inputs: ReportInputs) -> str:
    """States (shifts, couplings, populations) and exchange processes with their spin mappings."""
    entry = inputs.results.get("model") or {}
    model = inputs.model
    if model is None:
        body = (f"<p>States: {esc(', '.join(map(str, entry.get('states', []))))}; processes: "
                f"{esc(', '.join(map(str, entry.get('processes', []))))}.</p>")
        return section("model", "Model", body)
    temperature = f" at {model.temperature_k:g} K" if model.temperature_k is not None else ""
    body = [f"<p>{esc(model.title or Path(str(entry.get('file', ''))).name)} — nucleus "
            f"{esc(model.spectrometer.nucleus)}, {model.spectrometer.frequency_mhz:g} MHz.</p>",
            table(["state", f"population{temperature}", "free energy / (kJ/mol)", "linewidth / Hz",
                   "shifts / ppm", "couplings / Hz"], _state_rows(model), numeric=[False, True, True, True]),
            table(["process", "from → to", "spin mapping", "kind", "start value in the model file"],
                  [[name, f"{ex.from_state} → {ex.to_state}",
                    ", ".join(f"{a} → {b}" for a, b in ex.spins.items()) or "(spins keep their names)",
                    "mutual" if ex.is_mutual else "between states", _exchange_start(ex)]
                   for name, ex in zip(model.process_names(), model.exchanges)])]
    body.append('<p class="muted">The fit refines the rate at every temperature (and, depending on the options, '
                "shifts, linewidths and populations); the values above are the model file's.</p>")
    return section("model", "Model", "".join(body))


def _rate_text(row: dict) -> str:
    """'k ± err', '< upper', '> lower' or the interval, from a rates.csv row."""
    status, k = row.get("status", ""), _number(row.get("rate_per_s"))
    if status == "determined":
        return f"{k} ± {_number(row.get('rate_stderr'), '.2g')}"
    if status == "upper-bound":
        return f"< {_number(row.get('rate_upper'))} (best {k})"
    if status == "lower-bound":
        return f"> {_number(row.get('rate_lower'))} (best {k})"
    if status == "interval":
        return f"{_number(row.get('rate_lower'))} to {_number(row.get('rate_upper'))} (best {k})"
    return k if status != "failed" else "fit failed"


def _posterior_rate_text(row: dict) -> str:
    """The posterior rate of a rates.csv row: median with its 95 % interval, or the one-sided 95 % bound."""
    if row.get("posterior_bound95_per_s"):
        return f"{'<' if row.get('status') == 'upper-bound' else '>'} {_number(row['posterior_bound95_per_s'])}"
    if row.get("posterior_median_per_s"):
        return (f"{_number(row['posterior_median_per_s'])} ({_number(row.get('posterior_ci95_low_per_s'))} to "
                f"{_number(row.get('posterior_ci95_high_per_s'))})")
    return ""


def rate_section(inputs: ReportInputs) -> str:
    """The rate table of rates.csv (with the posterior rates when ``dnmr fit --posterior`` sampled them)."""
    sampled = any("posterior_median_per_s" in row for row in inputs.rates)
    temperatures = sample_temperature_cells(inputs)
    rows = [temperature + [row.get("process", ""), _rate_text(row), row.get("status", ""),
             _number(row.get("reduced_chi_square"), ".3f"), row.get("flags", "")]
            + ([_posterior_rate_text(row)] if sampled else []) for row, temperature in zip(inputs.rates, temperatures)]
    heads = ["T set / K", "sample T / K"] if inputs.calibration is not None else ["T / K"]
    body = table(heads + ["process", "rate k / s^-1", "status", "reduced chi-square", "flags"]
                 + (["posterior k / s^-1: median (95 %) or 95 % bound"] if sampled else []), rows,
                 numeric=[True] * len(heads) + [False, True, False, True, False, True])
    posterior = (" The posterior column gives the median and central 95 % interval of the posterior samples, or "
                 "the posterior's one-sided 95 % bound of a rate the spectrum only bounds.") if sampled else ""
    return section("rates", "Rates", body + '<p class="muted">Errors are one standard error; bounds are the '
                   f"limits the chi-square profile allows (68 %). {esc(_temperature_columns_text(inputs))}"
                   f"{posterior}</p>")


def bound_notes(results: dict) -> list[str]:
    """Each rate that is only a bound (or not determined), with the fit's reason."""
    notes = []
    for s in sorted(results["spectra"], key=lambda s: s.get("temperature_k") or 0.0):
        for rate in ((s.get("fit") or {}).get("rates") or []):
            if rate.get("status") in BOUND_STATUSES:
                reason = rate.get("reason") or "no reason recorded"
                notes.append(f"{s.get('temperature_k')} K, {rate.get('process')}: {rate.get('status')} — {reason}")
    return notes


def identifiability_section(inputs: ReportInputs) -> str:
    """Which rates are only bounds, and why; the bounds' check against the Eyring line."""
    notes = bound_notes(inputs.results)
    body = bullets(notes) if notes else "<p>Every fitted rate is determined with an error bar; none is only a bound.</p>"
    checks = [b.describe() for r in inputs.eyring for b in r.bounds]
    if checks:
        body += "<p>Bounds against the Eyring line of the determined rates:</p>" + bullets(checks)
    trend = inputs.results.get("shift_trend")
    if trend:
        body += ("<p>The shifts of the faster spectra, which those spectra do not determine, were taken from a linear "
                 "trend through the slow-exchange spectra at "
                 f"{esc(', '.join(f'{t:g}' for t in trend.get('temperatures_k', [])))} K:</p>")
        body += table(["shift", "ppm at mean T", "mean T / K", "slope / (ppm/K)"],
                      [[name, f"{line['ppm_at_mean']:.4f}", f"{line['mean_temperature_k']:.1f}",
                        f"{line['ppm_per_k']:+.3e}"] for name, line in trend.get("lines", {}).items()],
                      numeric=[False, True, True, True])
    return section("identifiability", "Identifiability", body)


def fit_figure_path(outdir: Path, spectrum: dict) -> Path:
    """Where ``dnmr fit`` drew the spectrum's data, fit and residuals (figures/NNN_<name>.png)."""
    return outdir / "figures" / f"{int(spectrum['index']):03d}_{Path(str(spectrum['file'])).stem}.png"


def posterior_figure_path(outdir: Path, spectrum: dict) -> Path:
    """Where ``dnmr fit --posterior`` drew the spectrum's pairwise posterior figure (figures/NNN_<name>_posterior.png)."""
    fit_figure = fit_figure_path(outdir, spectrum)
    return fit_figure.with_name(f"{fit_figure.stem}_posterior.png")


def _least_squares_text(name: str, fit: dict) -> str:
    """The least-squares result of one posterior quantity: the rate as in the rate table for
    ``rate_per_s_<process>`` and ``log10_k_<process>`` (no error bar for a bound), else value ± error."""
    rate_names = [n for n in fit.get("parameters", {}) if n.startswith("log10_k_")]
    rates = dict(zip(rate_names, fit.get("rates", [])))
    rate = rates.get("log10_k_" + name[len("rate_per_s_"):]) if name.startswith("rate_per_s_") else None
    if rate is not None:
        return _rate_text(rate)
    par = fit.get("parameters", {}).get(name) or {}
    value, stderr = par.get("estimate"), par.get("stderr")
    if value is None:
        return ""
    if name in rates and rates[name].get("status") != "determined":
        return f"{value:.4g} ({rates[name].get('status')}: no error bar)"
    return format_with_error(value, math.nan if stderr is None else stderr)


def _posterior_cells(q: dict) -> list[str]:
    """Posterior median, 68 % and 95 % intervals, or the one-sided 95 % bound, of one quantity."""
    kind = q.get("kind")
    if kind in ("upper-bound", "lower-bound"):
        sign = "<" if kind == "upper-bound" else ">"
        return ["", "", "", f"{sign} {_number(q.get('bound_95'))}"]
    if kind == "undetermined":
        return ["not determined: the posterior is the prior", "", "", ""]
    span = lambda pair: f"{_number(pair[0])} to {_number(pair[1])}" if pair else ""  # noqa: E731
    return [_number(q.get("median")), span(q.get("ci68")), span(q.get("ci95")), ""]


def posterior_block(outdir: Path, s: dict) -> str:
    """The posterior of one spectrum's fit beside its least-squares result, its notes and its pairwise
    figure ('' when no posterior was sampled)."""
    post = s.get("posterior")
    if not post:
        return ""
    name = Path(str(s.get("file", "?"))).name
    head = "<h4>Posterior (emcee)</h4>"
    if "error" in post:
        return head + f"<p class=\"warn\">not sampled: {esc(post['error'])}</p>"
    fit = s.get("fit") or {}
    rows = [[q.get("label", n), _least_squares_text(n, fit), *_posterior_cells(q), q.get("reason", "")]
            for n, q in (post.get("quantities") or {}).items()]
    body = (f"<p>{esc(post.get('walkers'))} walkers × {esc(post.get('steps'))} steps, burn-in {esc(post.get('burn'))}, "
            f"thin {esc(post.get('thin'))}, seed {esc(post.get('seed'))}: {esc(post.get('samples'))} samples; "
            f"acceptance {_number(post.get('acceptance_fraction'), '.2f')}. Likelihood "
            f"{esc(post.get('likelihood', ''))}.</p>")
    body += table(["quantity", "least squares", "posterior median", "68 % interval", "95 % interval",
                   "one-sided 95 % bound", "why a bound"], rows, numeric=[False, True, True, True, True, True])
    body += bullets(post.get("notes", []), "muted")
    return head + body + figure_from_file(posterior_figure_path(outdir, s),
                                          f"{name}: posterior samples (pairwise posterior figure)", f"posterior of {name}")


def _spectrum_block(outdir: Path, s: dict) -> str:
    name = Path(str(s.get("file", "?"))).name
    head = f"<h3>{esc(s.get('temperature_k'))} K — {esc(name)}</h3>"
    if s.get("status") != "fitted":
        return head + f"<p class=\"warn\">not fitted: {esc(s.get('error') or 'no reason recorded')}</p>"
    fit = s.get("fit") or {}
    rates = "; ".join(f"{r.get('process')}: {r.get('status')}" for r in fit.get("rates", []))
    facts = (f"<p>reduced chi-square {_number(fit.get('reduced_chi_square'), '.3f')}; {esc(rates)}; "
             f"flags: {esc(', '.join(fit.get('flags', []) + s.get('flags', [])) or 'none')}.</p>")
    notes = bullets(list(s.get("notes", [])) + list(fit.get("notes", [])), "muted")
    return (head + facts + notes + figure_from_file(fit_figure_path(outdir, s), f"{name}: data, fit and residuals",
                                                    f"fit of {name}") + posterior_block(outdir, s))


def fits_section(inputs: ReportInputs) -> str:
    """The series stack and, per temperature, the fit with its residuals."""
    spectra = sorted(inputs.results["spectra"], key=lambda s: s.get("temperature_k") or 0.0)
    body = figure_from_file(inputs.outdir / "series_fits.png", "The series by temperature: measured spectra with the fitted lineshapes",
                            "series of fits")
    return section("fits", "Fits at each temperature", body + "".join(_spectrum_block(inputs.outdir, s) for s in spectra))


def eyring_section(inputs: ReportInputs) -> str:
    """Eyring plot made here, the calibration and the full analysis of each process."""
    if not inputs.eyring:
        return section("eyring", "Eyring analysis", '<p class="warn">Not possible: see the warnings.</p>')
    from dnmr.reporting.plotting import plot_eyring

    body = figure_html(figure_png(plot_eyring(inputs.eyring)),
                       "Eyring plot: ln(k/T) against 1000/T with the fitted line, its 95 % band and the residuals",
                       "Eyring plot")
    body += f"<p>{esc(_temperature_basis(inputs))}</p>"
    if inputs.calibration is not None:
        body += _pre(inputs.calibration.report())
    body += "".join(_pre(r.report()) for r in inputs.eyring)
    body += (f'<p class="muted">dG‡ is least correlated with dH‡ at the weighted harmonic-mean temperature '
             f"(Grieger, Hunter &amp; Krug 1976); {STANDARD_TEMPERATURE_K} K is quoted for comparison.</p>")
    return section("eyring", "Eyring analysis", body)


def collect_warnings(inputs: ReportInputs) -> list[str]:
    """Warnings from the series fit (notes, failures, flagged fits), the Eyring analysis and the inputs."""
    out = list(inputs.warnings) + [str(n) for n in inputs.results.get("notes", [])]
    for s in sorted(inputs.results["spectra"], key=lambda s: s.get("temperature_k") or 0.0):
        where = f"{s.get('temperature_k')} K ({Path(str(s.get('file', '?'))).name})"
        if s.get("status") != "fitted":
            out.append(f"{where}: not fitted: {s.get('error')}")
            continue
        flags = list((s.get("fit") or {}).get("flags", [])) + list(s.get("flags", []))
        if flags:
            out.append(f"{where}: flagged {', '.join(flags)}")
    out += [f"Eyring{f' ({r.process})' if r.process else ''}: {w}" for r in inputs.eyring for w in r.warnings]
    return out


def warnings_section(inputs: ReportInputs) -> str:
    """Everything the reader should check before quoting the numbers."""
    items = collect_warnings(inputs)
    return section("warnings", "Warnings", bullets(items, "warn") if items else "<p>None.</p>")


def cautions_section(thermometer: bool = False) -> str:
    """Safety cautions for variable-temperature work (dnmr.planning.cautions.CAUTIONS), and those of the thermometer
    liquids when a temperature calibration was used."""
    return section("cautions", "Safety cautions", bullets(CAUTIONS + ((THERMOMETER_CAUTIONS,) if thermometer else ())))


def _input_rows(inputs: ReportInputs) -> list[list[str]]:
    r = inputs.results
    rows = [["series", str((r.get("series") or {}).get("file", "")), "", str((r.get("series") or {}).get("sha256", ""))],
            ["model", str((r.get("model") or {}).get("file", "")), "", str((r.get("model") or {}).get("sha256", ""))]]
    rows += [[f"spectrum {s.get('index')}", str(s.get("file", "")), f"{s.get('temperature_k')}", str(s.get("sha256", ""))]
             for s in r["spectra"]]
    if inputs.calibration_file is not None:
        rows.append(["calibration", str(inputs.calibration_file), "", str(file_sha256(inputs.calibration_file))])
    return rows


def _report_versions() -> dict:
    import matplotlib
    import numpy

    from dnmr import __version__

    return {"dnmr": __version__, "python": platform.python_version(), "numpy": numpy.__version__,
            "matplotlib": matplotlib.__version__}


def inputs_section(inputs: ReportInputs) -> str:
    """Exact inputs (files with SHA-256), fit options and the software of the fit and of this report."""
    r = inputs.results
    options = {"shifts": r.get("shifts"), "slow_exchange_below_k": r.get("slow_exchange_below_k"),
               "options": r.get("options")}
    body = table(["input", "file", "T / K", "SHA-256"], _input_rows(inputs))
    body += "<h3>Fit options</h3>" + _pre(json.dumps(options, indent=1, sort_keys=True))
    body += "<h3>Software</h3>" + table(
        ["used for", "package", "version"],
        [["series fit", k, v] for k, v in (r.get("versions") or {}).items()]
        + [["this report", k, v] for k, v in _report_versions().items()])
    body += (f"<p class=\"muted\">Fit program: {esc(r.get('program', '?'))}, written {esc(r.get('written_utc', '?'))}; "
             f"report written {esc(time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime()))} from the folder "
             f"{esc(inputs.outdir.resolve().name)}; file names relative to the report.</p>")
    return section("inputs", "Inputs and software", body)


def render_report(inputs: ReportInputs) -> str:
    """The whole HTML document (self-contained: inline style, embedded figures, no scripts or links)."""
    model_title = inputs.model.title if inputs.model is not None and inputs.model.title else ""
    title = f"dnmr report: {model_title or inputs.outdir.name}"
    sections = [summary_section(inputs), model_section(inputs), rate_section(inputs), identifiability_section(inputs),
                fits_section(inputs), transfer_section(inputs), eyring_section(inputs),
                supporting_section(supporting_rows(inputs)), warnings_section(inputs),
                cautions_section(inputs.calibration is not None), inputs_section(inputs)]
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(title)}</title><style>{STYLE}</style></head><body>"
            f"<h1>{esc(title)}</h1>{''.join(sections)}</body></html>\n")


# --------------------------------------------------------------------------------------------------
# magnetisation-transfer fits (dnmr transfer) beside the lineshape fits


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


def _transfer_block(t: TransferFolder) -> str:
    r = t.results
    data = Path(str(r.get("data", "?"))).name
    head = f"<h3>{esc(r.get('experiment'))} at {esc(r.get('temperature_k'))} K — {esc(data)}</h3>"
    rows = [[row.get("process", ""), _rate_text(row), row.get("status", ""), row.get("flags", "")] for row in t.rates]
    relaxation = "; ".join(f"{site} {_number((v or {}).get('value'), '.4g')} s^-1"
                           for site, v in (r.get("relaxation_per_s") or {}).items())
    facts = (f"<p>chi-square {_number(r.get('chi_square'))} for {esc(r.get('degrees_of_freedom'))} degrees of freedom "
             f"(reduced {_number(r.get('reduced_chi_square'), '.3f')}); R1: {esc(relaxation or 'not recorded')}.</p>")
    notes = bullets([str(n) for n in r.get("notes", [])], "muted")
    figure = figure_from_file(t.folder / "fit.png", f"{data}: data, fitted curves and residuals", f"transfer fit of {data}")
    return (head + table(["process", "rate k / s^-1", "status", "flags"], rows, numeric=[False, True, False, False])
            + facts + notes + figure)


def transfer_section(inputs: ReportInputs) -> str:
    """The magnetisation-transfer fits named with ``--transfer``, by temperature ('' when none)."""
    if not inputs.transfer:
        return ""
    folders = sorted(inputs.transfer, key=lambda t: float(t.results.get("temperature_k") or 0.0))
    intro = (f"<p>{len(folders)} experiment{'s' if len(folders) > 1 else ''} by magnetisation transfer (dnmr transfer); "
             "their rates join the lineshape rates in the Eyring analysis, marked by method.</p>")
    return section("transfer", "Magnetisation-transfer fits", intro + "".join(_transfer_block(t) for t in folders))


# --------------------------------------------------------------------------------------------------
# the global fit's report (dnmr fit --global)


GLOBAL_NAME = "global.json"
COMPARED = {"enthalpy_kj_mol": ("dH‡", "kJ/mol"), "entropy_j_mol_k": ("dS‡", "J/(mol K)"),
            "gibbs_298_kj_mol": ("dG‡(298.15 K)", "kJ/mol"), "gibbs_hm_kj_mol": ("dG‡(T_hm)", "kJ/mol")}


def read_global(outdir: Path) -> dict:
    """Parse ``OUTDIR/global.json`` of ``dnmr fit --global`` (InputError when damaged or not one)."""
    path = outdir / GLOBAL_NAME
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        raise InputError(f"not the global.json written by `dnmr fit --global` ({err}); fit the series again",
                         str(path)) from None
    if not isinstance(data, dict) or not isinstance(data.get("processes"), list):
        raise InputError("not the global.json of `dnmr fit --global` (no list of processes)", str(path), "processes")
    return data


def _global_parameter_table(process: dict) -> str:
    rows = []
    for key, (label, unit) in COMPARED.items():
        if key == "gibbs_hm_kj_mol":
            label = f"dG‡({process['harmonic_mean_temperature_k']:.1f} K, harmonic mean)"
        stderr_key = key.replace("_kj_mol", "_stderr").replace("_j_mol_k", "_stderr")
        value, stderr = process[key], process[stderr_key]
        rows.append(f"<tr><th>{esc(label)}</th>{_parameter_cell(key, value, stderr)}<td>{esc(unit)}</td>"
                    f'<td class="num">{esc(format_with_error(value * KCAL_PER_KJ, stderr * KCAL_PER_KJ))} '
                    f"{esc(unit.replace('kJ', 'kcal').replace('J/', 'cal/'))}</td></tr>")
    rows.append(f'<tr><th>corr(dH‡, dS‡)</th><td class="num" data-key="correlation_enthalpy_entropy" '
                f'data-value="{process["correlation_enthalpy_entropy"]!r}">{process["correlation_enthalpy_entropy"]:.4f}'
                "</td><td></td><td></td></tr>")
    head = "<tr><th>quantity</th><th>value ± standard error</th><th>unit</th><th>in kcal/mol or cal/(mol K)</th></tr>"
    return (f'<table class="parameters" data-process="{esc(process["process"])}"><thead>{head}</thead>'
            f"<tbody>{''.join(rows)}</tbody></table>")


def _treatment_text(g: dict) -> str:
    o = g.get("options") or {}
    width = "fitted in every spectrum" if o.get("linewidth") == "per-spectrum" else f"{o.get('linewidth')} in T"
    return (f"Shifts {o.get('shifts')} in T, couplings {o.get('couplings')} in T, intrinsic linewidth {width}, "
            f"populations {o.get('populations')}; amplitude, phase, baseline and frequency offset of every spectrum "
            f"fitted jointly (offsets anchored to no mean and no trend the shifts could take). Reference temperature "
            f"of the trends {_number(o.get('reference_temperature_k'), '.2f')} K.")


def global_summary_section(g: dict) -> str:
    """What the global fit assumed, how well it fits against the measured noise, and dH‡, dS‡ per process."""
    misfits = [s for s in g.get("spectra", []) if s.get("misfit")]
    quality = (f"Chi-square {g['chi_square']:.1f} on {g['degrees_of_freedom']} degrees of freedom: reduced "
               f"{g['reduced_chi_square']:.3f} against each spectrum's measured noise (weights never depend on how "
               f"well a spectrum fits); error scale {g['error_scale']:.3g}.")
    if misfits:
        quality += f" {len(misfits)} of {len(g.get('spectra', []))} spectra misfit: see Fit quality."
    calibration = ("Temperatures: calibrated sample temperatures; the calibration's uncertainty is included."
                   if g.get("calibration_error_included") else
                   "Temperatures: as the series file gives them, taken as exact (no calibration error included).")
    parts = [f"<p>{esc(len(g.get('spectra', [])))} spectra fitted at once; series file "
             f"{esc(Path(str(g.get('series', '?'))).name)}.</p>", f"<p>{esc(_treatment_text(g))}</p>",
             f"<p>{esc(quality)}</p>", f"<p>{esc(calibration)}</p>"]
    for process in g["processes"]:
        parts.append(f"<h3>Process {esc(process['process'])}</h3>" + _global_parameter_table(process))
    return section("summary", "Summary", "".join(parts))


def comparison_section(g: dict) -> str:
    """Global against two-step: activation parameters (difference in combined standard errors) and rates."""
    rows = []
    for row in g.get("comparison", []):
        if row["quantity"] not in COMPARED:
            continue
        combined = math.hypot(row["global_stderr"], row["two_step_stderr"])
        rows.append([row["process"], COMPARED[row["quantity"]][0], format_with_error(row["global"], row["global_stderr"]),
                     format_with_error(row["two_step"], row["two_step_stderr"]), f"{row['difference']:+.4g}",
                     f"{row['difference'] / combined:+.1f}" if combined > 0 else ""])
    body = (table(["process", "quantity", "global", "two-step (rates, then Eyring)", "difference",
                   "difference / combined error"], rows, numeric=[False, False, True, True, True, True])
            if rows else '<p class="warn">The two-step rates give no Eyring line to compare with.</p>')
    body += ('<p class="muted">The two-step result fits every spectrum on its own, then an Eyring line through the '
             f"rates it determines (in {esc(g.get('two_step_folder', 'two-step'))}: run dnmr report on that folder for "
             "its own report). The two can differ by more than their errors when the per-spectrum fits absorb a model "
             "error that the global trends do not allow, or the other way round: the fit quality below says which "
             "describes the spectra.</p>")
    rate_rows = [[f"{r['temperature_k']:.2f}", p["process"], format_with_error(r["rate_per_s"], r["rate_stderr"]),
                  f"{r['two_step_rate_per_s']:.4g}", r["two_step_status"]]
                 for p in g["processes"] for r in p["rates"]]
    body += "<h3>Rates</h3>" + table(["T / K", "process", "global k / s^-1", "two-step k / s^-1", "two-step status"],
                                     rate_rows, numeric=[True, False, True, True, False])
    return section("comparison", "Global against two-step", body)


def _gain_text(spectrum: dict) -> str:
    gains = spectrum.get("gains") or {}
    return ", ".join(f"{family} {gain:.0f}" for family, gain in sorted(gains.items(), key=lambda item: -item[1]))


def quality_section(outdir: Path, g: dict) -> str:
    """Each spectrum's chi-square per point, global and two-step, the figures and the notes on misfits."""
    spectra = sorted(g.get("spectra", []), key=lambda s: s["temperature_k"])
    body = table(["T / K", "spectrum", "points", "global chi-square per point", "two-step", "misfit",
                  "chi-square fall with one family free in this spectrum"],
                 [[f"{s['temperature_k']:.2f}", Path(str(s["file"])).name, s["points"],
                   f"{s['chi_square_per_point']:.3f}", f"{s['two_step_chi_square_per_point']:.3f}",
                   "yes" if s["misfit"] else "", _gain_text(s)] for s in spectra],
                 numeric=[True, False, True, True, True, False, False])
    body += ('<p class="muted">Chi-square per point against the measured noise: about 1 when the model describes the '
             "spectrum. The two-step column is the spectrum's own fit, every parameter free in it alone.</p>")
    body += figure_from_file(outdir / "global_fits.png", "Every spectrum (black) with the global fit (red), by temperature",
                             "global fit of the series")
    body += figure_from_file(outdir / "global_residuals.png", "Residuals over the noise, (data - fit) / sigma",
                             "residuals of the global fit")
    return section("quality", "Fit quality", body)


def global_parameters_section(g: dict) -> str:
    """The global parameters (trends, activation and van 't Hoff parameters) with their errors."""
    rows = [[name, f"{p['estimate']:.6g}", "" if p["fixed"] else f"{p['stderr']:.3g}", "held" if p["fixed"] else "fitted"]
            for name, p in g.get("parameters", {}).items() if not (name[0] == "s" and name.split("_", 1)[0][1:].isdigit())]
    body = table(["parameter", "value", "standard error", ""], rows, numeric=[False, True, True, False])
    body += ('<p class="muted">Trend parameters: the value at the reference temperature, then _per_k (per K) and '
             "_per_k2 (per K^2). Each spectrum's own parameters (prefix s&lt;i&gt;_) are in global.json.</p>")
    return section("parameters", "Global parameters", body)


def render_global_report(outdir: Path, g: dict, two_step: ReportInputs | None) -> str:
    """The whole HTML document of a global fit (self-contained, as :func:`render_report`)."""
    model_title = two_step.model.title if two_step is not None and two_step.model is not None else ""
    title = f"dnmr global fit: {model_title or outdir.name}"
    warnings = [str(n) for n in g.get("notes", [])] + (two_step.warnings if two_step is not None else [
        "the two-step folder cannot be read: no model or input section"])
    sections = [global_summary_section(g), comparison_section(g), quality_section(outdir, g),
                global_parameters_section(g), supporting_section(global_supporting_rows(g))]
    if two_step is not None:
        sections.append(model_section(two_step))
    sections += [section("warnings", "Warnings", bullets(warnings, "warn") if warnings else "<p>None.</p>"),
                 cautions_section(bool(g.get("calibration_error_included")))]
    if two_step is not None:
        sections.append(inputs_section(two_step))
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(title)}</title><style>{STYLE}</style></head><body>"
            f"<h1>{esc(title)}</h1>{''.join(sections)}</body></html>\n")


def _global_document(outdir: Path, calibration) -> str:
    """report.html of a global-fit folder; its calibration is the one the fit used (in global.json)."""
    if calibration is not None:
        raise InputError("the global fit's temperatures and calibration are fixed when it runs: fit again with "
                         "dnmr fit --global --calibration CAL.csv instead", where="--calibration")
    g = read_global(outdir)
    try:
        two_step = gather_inputs(Path(str(g.get("two_step_folder") or outdir / "two-step")))
    except InputError:
        two_step = None
    return render_global_report(outdir, g, two_step)


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

    Returns
    -------
    Path
        The file written.  Beside it, in ``supporting-information/`` (see :func:`supporting_folder`), the
        supporting-information tables
        (:mod:`dnmr.reporting.supporting`: si_rates.csv, si_activation.csv, si_tables.md, si_tables.tex) and, for a
        series fit, the Eyring figure.  The report names every file relative to its own folder.

    Raises
    ------
    InputError
        When OUTDIR has no valid results.json or rates.csv, the calibration cannot be read, or the output
        exists (without `overwrite`) or would replace an input.
    """
    outdir = Path(outdir)
    path = Path(output) if output is not None else outdir / REPORT_NAME
    _refuse_inputs(path, outdir)
    if path.exists() and not overwrite:
        raise InputError(f"{path} already exists; choose another name or pass --overwrite", where="output")
    with figures_as(figure_format or chosen_figure_format()):
        if (outdir / GLOBAL_NAME).is_file():
            if transfer:
                raise InputError("magnetisation-transfer folders go with the report of a spectrum-by-spectrum fit; "
                                 f"name {outdir / 'two-step'} instead", where="--transfer")
            document = _global_document(outdir, calibration)
            write_supporting_files(supporting_folder(path), global_supporting_rows(read_global(outdir)), [], overwrite)
        else:
            inputs = gather_inputs(outdir, calibration, transfer)
            document = render_report(inputs)
            write_supporting_files(supporting_folder(path), supporting_rows(inputs), inputs.eyring, overwrite)
    return atomic_write_text(path, relative_paths(document, path.parent), overwrite=overwrite)


# --------------------------------------------------------------------------------------------------
# sample temperatures, supporting-information tables, paths relative to the report


def _calibrated_temperatures(inputs: ReportInputs):
    """Sample temperatures (K) and their standard errors of every rates.csv row through the calibration
    (None without one, or when a set-point lies outside it: the warnings say so)."""
    if inputs.calibration is None:
        return None
    try:
        true = inputs.calibration.true_temperature([float(row.get("temperature_k")) for row in inputs.rates])
    except (InputError, TypeError, ValueError):
        return None
    return true.temperature_k, true.stderr


def sample_temperature_cells(inputs: ReportInputs) -> list[list[str]]:
    """The temperature cells of each rates.csv row: [T] as given, or with a calibration [set-point, sample
    T ± its standard error]."""
    if inputs.calibration is None:
        return [[_number(row.get("temperature_k"), ".2f")] for row in inputs.rates]
    true = _calibrated_temperatures(inputs)
    if true is None:
        return [[_number(row.get("temperature_k"), ".2f"), "outside the calibration"] for row in inputs.rates]
    return [[_number(row.get("temperature_k"), ".2f"), format_with_error(t, e)]
            for row, t, e in zip(inputs.rates, *true)]


def _temperature_columns_text(inputs: ReportInputs) -> str:
    if inputs.calibration is None:
        return "The temperatures are those of the series file (no calibration applied)."
    return ("T set is the series file's set-point; the sample temperature comes through the calibration, with its "
            "standard error (the curve's uncertainty, shared by all rows, and the scatter of the calibration points).")


@dataclass
class SupportingRows:
    """The rows of the supporting-information tables (see :mod:`dnmr.reporting.supporting`)."""

    rates: list
    activation: list
    title: str = ""


def supporting_rows(inputs: ReportInputs) -> SupportingRows:
    """The supporting-information tables of a series fit: its rates.csv and those of the transfer folders
    (sample temperatures through the calibration when one is given), and its Eyring analysis."""
    from dnmr.reporting.supporting import activation_rows, rate_rows_from_table

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
    from dnmr.reporting.supporting import activation_rows, rate_rows_from_global

    return SupportingRows(rate_rows_from_global(g), activation_rows(g["processes"]), "global fit")


def supporting_section(rows: SupportingRows) -> str:
    """The supporting-information tables as the report shows them, and the files that hold them."""
    from dnmr.reporting.supporting import ACTIVATION_STEM, RATES_STEM, SUPPORTING_FOLDER, TABLES_STEM, rate_table_cells, rates_note

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


def supporting_folder(report: Path) -> Path:
    """The folder of a report's supporting-information tables: ``supporting-information`` beside report.html,
    ``<name>-supporting-information`` beside a report of another name (each report keeps its own)."""
    from dnmr.reporting.supporting import SUPPORTING_FOLDER

    name = SUPPORTING_FOLDER if report.name == REPORT_NAME else f"{report.stem}-{SUPPORTING_FOLDER}"
    return report.parent / name


def write_supporting_files(target: Path, rows: SupportingRows, eyring: Sequence[EyringResult], overwrite: bool) -> list[Path]:
    """Write the supporting-information tables (and the Eyring figure, in the chosen figure format) into the
    folder `target`."""
    from dnmr.io.output import save_figure
    from dnmr.reporting.plotting import plot_eyring
    from dnmr.reporting.supporting import write_supporting_tables

    figure = target / "eyring.png"
    if eyring and figure_file(figure).exists() and not overwrite:
        raise InputError(f"{figure_file(figure)} already exists; pass --overwrite to replace it", where="output")
    written = write_supporting_tables(target, rows.rates, rows.activation, title=rows.title, overwrite=overwrite)
    if eyring:
        written.append(save_figure(plot_eyring(list(eyring)), figure, overwrite=overwrite, close=True))
    return written


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
