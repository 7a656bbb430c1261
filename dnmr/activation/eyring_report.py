"""The readable report of an Eyring analysis: parameters with errors, where the errors come from, the
Arrhenius line, the fitted rates by method, the rates set aside, the bounds and the warnings.

Headings are underlined in the setext style of Markdown ('=' for the title, '-' for sections), so the
report reads as plain text and renders as Markdown.
"""
from __future__ import annotations

import math

import numpy as np

import dnmr  # for annotations only: the result's class is named through the public API (no import circle)
from dnmr.activation.line_fit import BASIS_SCATTER, SHARE_HELD
from dnmr.activation.rates import DEFAULT_METHOD
from dnmr.formatting import format_with_error
from dnmr.kinetics import KCAL_PER_KJ


def _heading(text: str, rule: str = "-") -> list[str]:
    """A heading underlined with `rule` (the setext style of Markdown: '=' for the title, '-' for sections)."""
    return [text, rule * len(text)]


def eyring_report(r: "dnmr.EyringResult") -> str:
    """The readable report of an Eyring analysis (what :meth:`EyringResult.report` returns)."""
    d = r.to_dict()
    lines = _heading(f"Eyring analysis — process {r.process!r}" if r.process else "Eyring analysis", "=")
    lines += _summary_lines(r, d) + [""]
    lines += _heading("Activation parameters") + _parameter_lines(r, d) + [""]
    if len(r.eyring.covariance_parts) > 1:
        lines += _heading("Where the errors come from") + _share_lines(r) + [""]
    lines += _heading("Arrhenius")
    lines.append(f"  {'Ea':<16}{format_with_error(d['activation_energy_kj_mol'], d['activation_energy_stderr']):>18} kJ/mol")
    lines.append(f"  {'ln(A / s⁻¹)':<16}{format_with_error(d['ln_prefactor'], d['ln_prefactor_stderr']):>18}")
    lines += [""] + _heading("Rates fitted") + _point_lines(d)
    if len(d["method_offsets"]):
        lines += [""] + _heading("Agreement of the methods") + _offset_lines(d)
    if r.series.set_aside:
        lines += [""] + _heading("Rates set aside (flagged fits, not fitted)")
        lines.append(f"  {'T / K':>9} {'k / s⁻¹':>11} {'line k':>11} {'off by':>8}  why")
        for row, p in zip(r.series.set_aside, d["set_aside"]):
            off = f"{p['deviation_sigma']:+7.1f}σ" if np.isfinite(p["deviation_sigma"]) else f"{'':>8}"
            lines.append(f"  {row.temperature_k:9.2f} {row.rate_per_s:11.4g} {p['fitted_rate_per_s']:11.4g} {off}  "
                         f"{row.where}: {row.reason}")
    if r.bounds:
        lines += [""] + _heading("Bounds (not fitted)") + [f"  {'T / K':>9} {'lower':>11} {'upper':>11} {'line k':>11}"]
        for b in r.bounds:
            lo = f"{b.rate_lower:11.4g}" if np.isfinite(b.rate_lower) else f"{'–':>11}"
            hi = f"{b.rate_upper:11.4g}" if np.isfinite(b.rate_upper) else f"{'–':>11}"
            lines.append(f"  {b.temperature_k:9.2f} {lo} {hi} {b.fitted_rate_per_s:11.4g}  "
                         + ("VIOLATED" if b.violated else "respected"))
    if r.warnings:
        lines += [""] + _heading("Warnings and notes") + [f"  - {w}" for w in r.warnings]
    return "\n".join(lines)


def _summary_lines(r: "dnmr.EyringResult", d: dict) -> list[str]:
    t = r.temperature_k
    bounds = f" (+ {d['n_bounds']} bound{'s' if d['n_bounds'] > 1 else ''}, not fitted)" if r.bounds else ""
    aside = len(r.series.set_aside)
    lines = [f"  rates fitted         {d['n_rates']}{bounds}"]
    if r.method_names != (DEFAULT_METHOD,):
        lines.append("  methods              " + ", ".join(_method_span(r, m) for m in r.method_names))
    lines += [f"  temperatures         {t.min():.2f} – {t.max():.2f} K (span {np.ptp(t):.1f} K)",
             f"  errors from          {r.error_basis}"]
    if r.error_basis == BASIS_SCATTER:
        lines.append(f"  scatter of ln k      {r.eyring.scatter:.3g} (about {100 * r.eyring.scatter:.2g} % in k)")
    elif r.eyring.dof > 0:
        kinds = (["temperature"] if r.temperature_error_sources else []) + (
            ["held-trend rate"] if SHARE_HELD in r.eyring.covariance_parts else [])
        shared = f" (shared {' and '.join(kinds)} errors counted as correlated)" if kinds else ""
        lines.append(f"  reduced chi-square   {d['reduced_chi_square']:.3g} ({r.eyring.dof} degrees of freedom, "
                     f"p = {d['chi_square_p_value']:.2g}){shared}")
    if d["temperature_errors"] == "none":
        lines.append("  temperature errors   none given: temperatures taken as exact (no calibration error included)")
    else:
        lines.append(f"  temperature errors   {d['temperature_errors']}, by generalised least squares")
    if aside or r.flagged_rows == "widen":
        what = (f"{aside} set aside (see below)" if r.flagged_rows == "exclude"
                else "fitted with widened errors (see the notes)")
        lines.append(f"  flagged fits         {what}; policy '{r.flagged_rows}'")
    if r.transmission != 1.0:
        lines.append(f"  transmission κ       {r.transmission:g}")
    return lines


def _method_span(r: "dnmr.EyringResult", method: str) -> str:
    """'inversion 4 (246–264 K)': a method's fitted rates and their temperatures (bounds counted apart)."""
    t = r.temperature_k[r.methods == method]
    bounds = sum(b.method == method for b in r.bounds)
    extra = f" + {bounds} bound{'s' if bounds > 1 else ''}" if bounds else ""
    return f"{method} {len(t)}{extra}" + (f" ({t.min():.0f}–{t.max():.0f} K)" if len(t) else "")


def _parameter_lines(r: "dnmr.EyringResult", d: dict) -> list[str]:
    t_hm = d["harmonic_mean_temperature_k"]
    rows = [
        ("ΔH‡", "kJ/mol", d["enthalpy_kj_mol"], d["enthalpy_stderr"], "kcal/mol"),
        ("ΔS‡", "J/(mol K)", d["entropy_j_mol_k"], d["entropy_stderr"], "cal/(mol K)"),
        ("ΔG‡(298.15 K)", "kJ/mol", d["gibbs_298_kj_mol"], d["gibbs_298_stderr"], "kcal/mol"),
        (f"ΔG‡({t_hm:.1f} K)", "kJ/mol", d["gibbs_hm_kj_mol"], d["gibbs_hm_stderr"], "kcal/mol"),
    ]
    lines = [f"  {name:<16}{format_with_error(value, err):>18} {unit:<11}"
             f"({format_with_error(value * KCAL_PER_KJ, err * KCAL_PER_KJ)} {unit2})"
             for name, unit, value, err, unit2 in rows]
    lines.append(f"  corr(ΔH‡, ΔS‡)  {r.correlation:>18.4f}")
    lines.append(f"  {t_hm:.1f} K = weighted harmonic mean of the temperatures, where ΔG‡ is least entangled with "
                 f"ΔH‡: corr(ΔG‡, ΔH‡) = {d['correlation_gibbs_hm_enthalpy']:+.3f}")
    if abs(d["correlation_gibbs_hm_enthalpy"]) > 0.1:
        lines.append(f"  with the temperature errors, the uncorrelated point moves to {d['uncorrelated_temperature_k']:.1f} K")
    return lines


def _share_lines(r: "dnmr.EyringResult") -> list[str]:
    """Percentages of each parameter's variance by source."""
    shares = r.error_shares()
    names = list(r.eyring.covariance_parts)
    width = max(len(n) for n in names) + 2
    lines = ["  share of the variance of " + "".join(f"{n:>{width}}" for n in names)]
    for quantity, label in (("enthalpy", "ΔH‡"), ("entropy", "ΔS‡"), ("gibbs_298", "ΔG‡(298.15 K)")):
        cells = "".join(f"{100 * shares[quantity][n]:>{width - 2}.0f} %" if np.isfinite(shares[quantity][n])
                        else f"{'n.d.':>{width}}" for n in names)
        lines.append(f"  {label:<24}{cells}")
    return lines


def _point_lines(d: dict) -> list[str]:
    """The fitted rates; by method (each under its name, by temperature) when there are several.  With a
    calibration each row starts with the table's set-point."""
    calibrated = any(np.isfinite(p["setpoint_k"]) for p in d["points"])
    head = f"  {'T set / K':>9}" if calibrated else ""
    lines = [f"{head}  {'T / K':>9} {'± T':>6} {'k / s⁻¹':>11} {'± k':>10} {'line k':>11} {'stud. res.':>10}"]
    methods = d["methods"]
    if len(methods) == 1:
        lines += [_point_line(p, calibrated) for p in d["points"]]
    else:
        for method, count in methods.items():
            if count:
                lines.append(f"  {method} ({count} rate{'s' if count > 1 else ''})")
                mine = sorted((p for p in d["points"] if p["method"] == method), key=lambda p: p["temperature_k"])
                lines += [_point_line(p, calibrated) for p in mine]
    if calibrated:
        lines.append("  T set: the table's set-point; T: the sample temperature through the calibration, ± T its "
                     "standard error")
    return lines


def _point_line(p: dict, calibrated: bool = False) -> str:
    err = f"{p['rate_stderr']:10.3g}" if np.isfinite(p["rate_stderr"]) else f"{'':>10}"
    setpoint = f"  {p['setpoint_k']:9.2f}" if calibrated else ""
    return (f"{setpoint}  {p['temperature_k']:9.2f} {p['temperature_stderr']:6.2f} {p['rate_per_s']:11.4g} {err} "
            f"{p['fitted_rate_per_s']:11.4g} {p['studentised_residual']:10.2f}" + ("  outlier?" if p["outlier"] else ""))


def _offset_lines(d: dict) -> list[str]:
    """Each method's offset from the line through the other rates (ln k, and in percent of k)."""
    lines = ["  offset of ln k from the line through the other rates (refitted with a constant for the method)"]
    for method, e in d["method_offsets"].items():
        value, err = e["ln_rate_offset"], e["ln_rate_offset_stderr"]
        if not np.isfinite(value):
            lines.append(f"  {method:<14} not determined: the rows cannot separate an offset from the line")
            continue
        sigma = f" ({value / err:+.1f}σ)" if np.isfinite(err) and err > 0 else ""
        lines.append(f"  {method:<14} {format_with_error(value, err):>18}{sigma}, about {100 * math.expm1(value):+.0f} % in k")
    return lines
