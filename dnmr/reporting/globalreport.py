"""The report of a global fit (``dnmr fit --global``, a folder holding global.json): its treatment and ΔH‡,
ΔS‡, the comparison with the two-step result, each spectrum's fit quality against the measured noise, the
global parameters, and the model, warnings, cautions and inputs of its two-step folder.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

from dnmr.errors import InputError
from dnmr.fitting.globalresult import linewidth_words
from dnmr.formatting import format_with_error, table_number
from dnmr.kinetics import KCAL_PER_KJ
from dnmr.reporting.reporthtml import bullets, esc, figure_from_file, html_document, parameter_cell, section, table
from dnmr.reporting.reportinputs import ReportInputs, gather_inputs
from dnmr.reporting.seriesreport import cautions_section, inputs_section, model_section
from dnmr.reporting.supportingsection import global_supporting_rows, supporting_section

GLOBAL_NAME = "global.json"


COMPARED = {"enthalpy_kj_mol": ("ΔH‡", "kJ/mol"), "entropy_j_mol_k": ("ΔS‡", "J/(mol K)"),
            "gibbs_298_kj_mol": ("ΔG‡(298.15 K)", "kJ/mol"), "gibbs_hm_kj_mol": ("ΔG‡(T_hm)", "kJ/mol")}


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
            label = f"ΔG‡({process['harmonic_mean_temperature_k']:.1f} K, harmonic mean)"
        stderr_key = key.replace("_kj_mol", "_stderr").replace("_j_mol_k", "_stderr")
        value, stderr = process[key], process[stderr_key]
        rows.append(f"<tr><th>{esc(label)}</th>{parameter_cell(key, value, stderr)}<td>{esc(unit)}</td>"
                    f'<td class="num">{esc(format_with_error(value * KCAL_PER_KJ, stderr * KCAL_PER_KJ))} '
                    f"{esc(unit.replace('kJ', 'kcal').replace('J/', 'cal/'))}</td></tr>")
    rows.append(f'<tr><th>corr(ΔH‡, ΔS‡)</th><td class="num" data-key="correlation_enthalpy_entropy" '
                f'data-value="{process["correlation_enthalpy_entropy"]!r}">{process["correlation_enthalpy_entropy"]:.4f}'
                "</td><td></td><td></td></tr>")
    head = "<tr><th>quantity</th><th>value ± standard error</th><th>unit</th><th>in kcal/mol or cal/(mol K)</th></tr>"
    return (f'<table class="parameters" data-process="{esc(process["process"])}"><thead>{head}</thead>'
            f"<tbody>{''.join(rows)}</tbody></table>")


def _treatment_text(g: dict) -> str:
    o = g.get("options") or {}
    width = linewidth_words(o)
    return (f"Shifts {o.get('shift_trend')} in T, couplings {o.get('coupling_trend')} in T, intrinsic linewidth {width}, "
            f"populations {o.get('population_trend')}; amplitude, phase, baseline and frequency offset of every spectrum "
            f"fitted jointly (offsets anchored to no mean and no trend the shifts could take). Reference temperature "
            f"of the trends {table_number(o.get('reference_temperature_k'), '.2f')} K.")


def global_summary_section(g: dict) -> str:
    """What the global fit assumed, how well it fits against the measured noise, and ΔH‡, ΔS‡ per process."""
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
    return html_document(title, sections)


def global_document(outdir: Path, calibration) -> str:
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
