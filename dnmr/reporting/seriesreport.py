"""The report of a series fit (``dnmr fit``): summary, model, rates, identifiability, fits, Eyring analysis,
supporting-information tables, warnings, cautions and the exact inputs, as one HTML document.
"""
from __future__ import annotations

import json
import platform
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from dnmr.activation.eyring_result import EyringResult
from dnmr.activation.thermometers import THERMOMETER_CAUTIONS
from dnmr.errors import InputError
from dnmr.fitting.seriesoutput import file_sha256
from dnmr.formatting import format_with_error, table_number
from dnmr.io.output import figure_bytes
from dnmr.kinetics import KCAL_PER_KJ, STANDARD_TEMPERATURE_K
from dnmr.model import Model
from dnmr.planning.cautions import CAUTIONS
from dnmr.reporting.fitsections import fits_section, posterior_rate_text, rate_text, transfer_section
from dnmr.reporting.reporthtml import (FIGURE_DPI, bullets, esc, figure_html, html_document, parameter_cell, pre, section,
                                      table)
from dnmr.reporting.reportinputs import ReportInputs
from dnmr.reporting.supportingsection import supporting_rows, supporting_section

BOUND_STATUSES = ("upper-bound", "lower-bound", "interval", "undetermined")


PARAMETER_ROWS = (
    # label, key, unit, converted unit (kcal) or None
    ("ΔH‡", "enthalpy", "kJ/mol", "kcal/mol"),
    ("ΔS‡", "entropy", "J/(mol K)", "cal/(mol K)"),
    ("ΔG‡(298.15 K)", "gibbs_298", "kJ/mol", "kcal/mol"),
    ("ΔG‡(T_hm)", "gibbs_hm", "kJ/mol", "kcal/mol"),
    ("Ea (Arrhenius)", "activation_energy", "kJ/mol", None),
)


def _value_key(key: str) -> str:
    return {"enthalpy": "enthalpy_kj_mol", "entropy": "entropy_j_mol_k", "gibbs_298": "gibbs_298_kj_mol",
            "gibbs_hm": "gibbs_hm_kj_mol", "activation_energy": "activation_energy_kj_mol"}[key]


def parameter_table(result: EyringResult) -> str:
    """Activation parameters of one process with errors, kJ/mol and kcal/mol side by side."""
    d = result.to_dict()
    rows = []
    for label, key, unit, unit2 in PARAMETER_ROWS:
        if key == "gibbs_hm":
            label = f"ΔG‡({d['harmonic_mean_temperature_k']:.1f} K, harmonic mean)"
        value, stderr = d[_value_key(key)], d[key + "_stderr"]
        converted = (f'<td class="num">{esc(format_with_error(value * KCAL_PER_KJ, stderr * KCAL_PER_KJ))} '
                     f"{esc(unit2)}</td>") if unit2 else "<td></td>"
        rows.append(f"<tr><th>{esc(label)}</th>{parameter_cell(_value_key(key), value, stderr)}"
                    f"<td>{esc(unit)}</td>{converted}</tr>")
    rows.append(f'<tr><th>corr(ΔH‡, ΔS‡)</th><td class="num" data-key="correlation_enthalpy_entropy" '
                f'data-value="{result.correlation!r}">{result.correlation:.4f}</td><td></td><td></td></tr>')
    rows.append(f"<tr><th>corr(ΔG‡(T_hm), ΔH‡)</th><td class=\"num\">{d['correlation_gibbs_hm_enthalpy']:+.3f}</td>"
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
        return f"ΔG‡ = {exchange.barrier_kj_mol:g} kJ/mol"
    return f"ΔH‡ = {exchange.enthalpy_kj_mol:g} kJ/mol, ΔS‡ = {exchange.entropy_j_mol_k:g} J/(mol K)"


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


def rate_section(inputs: ReportInputs) -> str:
    """The rate table of rates.csv (with the posterior rates when ``dnmr fit --posterior`` sampled them)."""
    sampled = any("posterior_rate_median" in row for row in inputs.rates)
    temperatures = sample_temperature_cells(inputs)
    rows = [temperature + [row.get("process", ""), rate_text(row), row.get("status", ""),
             table_number(row.get("reduced_chi_square"), ".3f"), row.get("flags", "")]
            + ([posterior_rate_text(row)] if sampled else []) for row, temperature in zip(inputs.rates, temperatures)]
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


@dataclass(frozen=True)
class EyringFigures:
    """The Eyring figure of a report, drawn once as two image files.

    Attributes
    ----------
    embedded : bytes
        The PNG embedded in report.html (at :data:`~dnmr.reporting.reporthtml.FIGURE_DPI`).
    supporting : bytes
        The file beside the supporting-information tables (150 dpi where raster).
    image_format : str
        The format of `supporting` ("png", "svg" or "pdf").
    """

    embedded: bytes
    supporting: bytes
    image_format: str


def eyring_figures(eyring: Sequence[EyringResult], image_format: str) -> EyringFigures:
    """The Eyring figure of the analyses `eyring` (one per process), the file beside the supporting-information
    tables in `image_format`."""
    import matplotlib.pyplot as plt

    from dnmr.reporting.eyringplot import plot_eyring

    figure = plot_eyring(list(eyring))
    try:
        return EyringFigures(figure_bytes(figure, "png", FIGURE_DPI, software_tag=False, inside=True),
                             figure_bytes(figure, image_format, inside=True), image_format)
    finally:
        plt.close(figure)


def eyring_section(inputs: ReportInputs, figures: EyringFigures | None) -> str:
    """The Eyring plot (`figures`: those of `inputs.eyring`), the calibration and the full analysis of each process."""
    if not inputs.eyring:
        return section("eyring", "Eyring analysis", '<p class="warn">Not possible: see the warnings.</p>')
    body = figure_html(figures.embedded,
                       "Eyring plot: ln(k/T) against 1000/T with the fitted line, its 95 % band and the residuals",
                       "Eyring plot")
    body += f"<p>{esc(_temperature_basis(inputs))}</p>"
    if inputs.calibration is not None:
        body += pre(inputs.calibration.report())
    body += "".join(pre(r.report()) for r in inputs.eyring)
    body += (f'<p class="muted">ΔG‡ is least correlated with ΔH‡ at the weighted harmonic-mean temperature '
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
    """Safety cautions for variable-temperature work (dnmr.planning.plan.CAUTIONS), and those of the thermometer
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
    body += "<h3>Fit options</h3>" + pre(json.dumps(options, indent=1, sort_keys=True))
    body += "<h3>Software</h3>" + table(
        ["used for", "package", "version"],
        [["series fit", k, v] for k, v in (r.get("versions") or {}).items()]
        + [["this report", k, v] for k, v in _report_versions().items()])
    body += (f"<p class=\"muted\">Fit program: {esc(r.get('program', '?'))}, written {esc(r.get('written_utc', '?'))}; "
             f"report written {esc(time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime()))} from the folder "
             f"{esc(inputs.outdir.resolve().name)}; file names relative to the report.</p>")
    return section("inputs", "Inputs and software", body)


def render_report(inputs: ReportInputs, figures: EyringFigures | None) -> str:
    """The whole HTML document (self-contained: inline style, embedded figures, no scripts or links); `figures` are
    the Eyring figures of `inputs.eyring` (None when there is no analysis)."""
    model_title = inputs.model.title if inputs.model is not None and inputs.model.title else ""
    title = f"dnmr report: {model_title or inputs.outdir.name}"
    sections = [summary_section(inputs), model_section(inputs), rate_section(inputs), identifiability_section(inputs),
                fits_section(inputs), transfer_section(inputs), eyring_section(inputs, figures),
                supporting_section(supporting_rows(inputs)), warnings_section(inputs),
                cautions_section(inputs.calibration is not None), inputs_section(inputs)]
    return html_document(title, sections)


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
        return [[table_number(row.get("temperature_k"), ".2f")] for row in inputs.rates]
    true = _calibrated_temperatures(inputs)
    if true is None:
        return [[table_number(row.get("temperature_k"), ".2f"), "outside the calibration"] for row in inputs.rates]
    return [[table_number(row.get("temperature_k"), ".2f"), format_with_error(t, e)]
            for row, t, e in zip(inputs.rates, *true)]


def _temperature_columns_text(inputs: ReportInputs) -> str:
    if inputs.calibration is None:
        return "The temperatures are those of the series file (no calibration applied)."
    return ("T set is the series file's set-point; the sample temperature comes through the calibration, with its "
            "standard error (the curve's uncertainty, shared by all rows, and the scatter of the calibration points).")
