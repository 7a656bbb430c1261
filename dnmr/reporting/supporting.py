"""Supporting-information tables: the rates and activation parameters of a series as a paper prints them.

Two tables, each written as CSV (full precision, for machines), Markdown and LaTeX (rounded as journals
print them: the error to two significant figures, the value to the same decimal place):

* **rates** — one row per spectrum and exchange process: the set-point (when a temperature calibration
  turned set-points into sample temperatures), the sample temperature with its standard error, the rate
  constant with its standard error or the bound the spectrum allows, and the free energy of activation
  at that temperature from the Eyring equation (transmission coefficient 1),
  ΔG‡(T) = R T ln(k_B T / (h k)), with its standard error
  σ² = (R T σ_k / k)² + ((ΔG‡/T + R) σ_T)²; a rate bound gives the opposite bound on ΔG‡ (an upper bound
  on k is a lower bound on ΔG‡), taken at the sample temperature.
* **activation** — per process ΔH‡ ± , ΔS‡ ± , their correlation coefficient, ΔG‡(298.15 K) ± and ΔG‡ at
  the weighted harmonic mean of the temperatures, where it is least correlated with ΔH‡ (Grieger, Hunter
  & Krug, Nature 261, 566 (1976)) — the quantities a reader needs to use the correlated errors.

:func:`rate_rows_from_table` builds the rates from a rates.csv of ``dnmr fit`` (and a calibration),
:func:`rate_rows_from_global` from the global fit's global.json; :func:`activation_rows` takes the
results of :mod:`dnmr.activation.eyring` or the processes of global.json (the same keys).
:func:`write_supporting_tables` writes the files (atomically, never over existing ones unless asked).
"""
from __future__ import annotations

import csv
import io
import math
from collections.abc import Iterable, Sequence
from dataclasses import astuple, dataclass, fields
from pathlib import Path

import numpy as np

from dnmr.fitting.resultsfolder import SUPPORTING_FOLDER
from dnmr.formatting import format_with_error
from dnmr.errors import InputError
from dnmr.kinetics import BOLTZMANN, GAS_CONSTANT, KCAL_PER_KJ, PLANCK, STANDARD_TEMPERATURE_K
from dnmr.io.output import atomic_write_text

#: The file name of the HTML report (``dnmr report``), beside which its tables go (:func:`supporting_folder`).
REPORT_NAME = "report.html"
RATES_STEM, ACTIVATION_STEM, TABLES_STEM = "si_rates", "si_activation", "si_tables"
BOUND_STATUSES = ("upper-bound", "lower-bound", "interval")


@dataclass(frozen=True)
class SupportingRate:
    """One row of the rates table (NaN where a quantity does not apply or is not known).

    Attributes
    ----------
    process : str
        Exchange process.
    setpoint_k : float
        Temperature set on the VT unit, K (NaN without a calibration: then the temperature is as given).
    temperature_k, temperature_stderr : float
        Sample temperature and its standard error, K (the error NaN when none is known).
    status : str
        ``determined``, ``upper-bound``, ``lower-bound``, ``interval`` or ``undetermined``.
    rate_per_s, rate_stderr : float
        Rate constant and its standard error, s^-1 (the error only for a determined rate).
    rate_lower, rate_upper : float
        Bounds of a rate the spectrum only bounds, s^-1.
    gibbs_kj_mol, gibbs_stderr : float
        ΔG‡ at the sample temperature and its standard error, kJ/mol (a determined rate only).
    gibbs_lower_kj_mol, gibbs_upper_kj_mol : float
        Bounds of ΔG‡ that the rate's bounds give, kJ/mol.
    """

    process: str
    setpoint_k: float
    temperature_k: float
    temperature_stderr: float
    status: str
    rate_per_s: float
    rate_stderr: float
    rate_lower: float
    rate_upper: float
    gibbs_kj_mol: float
    gibbs_stderr: float
    gibbs_lower_kj_mol: float
    gibbs_upper_kj_mol: float


@dataclass(frozen=True)
class SupportingActivation:
    """One process of the activation table (kJ/mol, J/(mol K), K)."""

    process: str
    enthalpy_kj_mol: float
    enthalpy_stderr: float
    entropy_j_mol_k: float
    entropy_stderr: float
    correlation_enthalpy_entropy: float
    gibbs_298_kj_mol: float
    gibbs_298_stderr: float
    harmonic_mean_temperature_k: float
    gibbs_hm_kj_mol: float
    gibbs_hm_stderr: float

    def sentence(self) -> str:
        """The parameters as a paper states them, in one sentence (plain text, Unicode)."""
        who = f"Process {self.process}: " if self.process else ""
        return (f"{who}ΔH‡ = {format_with_error(self.enthalpy_kj_mol, self.enthalpy_stderr)} kJ/mol "
                f"({format_with_error(self.enthalpy_kj_mol * KCAL_PER_KJ, self.enthalpy_stderr * KCAL_PER_KJ)} kcal/mol), "
                f"ΔS‡ = {format_with_error(self.entropy_j_mol_k, self.entropy_stderr)} J/(mol K), correlation "
                f"coefficient of ΔH‡ and ΔS‡ {self.correlation_enthalpy_entropy:.4f}; "
                f"ΔG‡(298.15 K) = {format_with_error(self.gibbs_298_kj_mol, self.gibbs_298_stderr)} kJ/mol; "
                f"ΔG‡({self.harmonic_mean_temperature_k:.1f} K, weighted harmonic mean of the temperatures) = "
                f"{format_with_error(self.gibbs_hm_kj_mol, self.gibbs_hm_stderr)} kJ/mol.")


# --------------------------------------------------------------------------------------------------
# ΔG‡ at one temperature


def gibbs_from_rate(rate_per_s: float, temperature_k: float, rate_stderr: float = math.nan,
                    temperature_stderr: float = math.nan) -> tuple[float, float]:
    """ΔG‡ (kJ/mol) at `temperature_k` (K) from a rate constant (s^-1) by the Eyring equation (κ = 1),
    with its standard error (kJ/mol) from those of the rate (s^-1) and the temperature (K); an error that
    is not known (NaN) counts as zero, and the result's error is NaN when neither is known."""
    value = GAS_CONSTANT * temperature_k * math.log(BOLTZMANN * temperature_k / (PLANCK * rate_per_s))
    from_rate = GAS_CONSTANT * temperature_k * rate_stderr / rate_per_s
    from_temperature = (value / temperature_k + GAS_CONSTANT) * temperature_stderr
    known = [e for e in (from_rate, from_temperature) if math.isfinite(e)]
    stderr = math.sqrt(sum(e * e for e in known)) if known else math.nan
    return value / 1e3, stderr / 1e3


def _gibbs_of_bound(rate_per_s: float, temperature_k: float) -> float:
    return gibbs_from_rate(rate_per_s, temperature_k)[0] if math.isfinite(rate_per_s) and rate_per_s > 0 else math.nan


def supporting_rate(process: str, setpoint_k: float, temperature_k: float, temperature_stderr: float, status: str,
                    rate_per_s: float, rate_stderr: float = math.nan, rate_lower: float = math.nan,
                    rate_upper: float = math.nan) -> SupportingRate:
    """A row of the rates table with ΔG‡ at its sample temperature (K) from its rate (s^-1) or its bounds."""
    if status == "determined" and math.isfinite(rate_per_s) and rate_per_s > 0:
        gibbs, gibbs_err = gibbs_from_rate(rate_per_s, temperature_k, rate_stderr, temperature_stderr)
    else:
        gibbs, gibbs_err = math.nan, math.nan
    upper_g = _gibbs_of_bound(rate_lower, temperature_k) if status in BOUND_STATUSES else math.nan
    lower_g = _gibbs_of_bound(rate_upper, temperature_k) if status in BOUND_STATUSES else math.nan
    return SupportingRate(process, setpoint_k, temperature_k, temperature_stderr, status, rate_per_s, rate_stderr,
                          rate_lower, rate_upper, gibbs, gibbs_err, lower_g, upper_g)


# --------------------------------------------------------------------------------------------------
# building the tables


def _float(text) -> float:
    try:
        return float(text) if text not in ("", None) else math.nan
    except ValueError:
        return math.nan


def _status(row: dict) -> str:
    """The status of a rates-table row; a table of one's own without the column: from what it gives."""
    status = (row.get("status") or "").strip()
    if status:
        return status
    if math.isfinite(_float(row.get("rate_stderr"))):
        return "determined"
    lower, upper = _float(row.get("rate_lower")), _float(row.get("rate_upper"))
    if math.isfinite(lower) and math.isfinite(upper):
        return "interval"
    return "upper-bound" if math.isfinite(upper) else "lower-bound" if math.isfinite(lower) else "undetermined"


def rate_rows_from_table(rows: Sequence[dict], calibration=None) -> list[SupportingRate]:
    """The rates table from the rows (dicts of text) of a rates.csv, failed fits left out.

    Parameters
    ----------
    rows : sequence of dict
        Rows of ``rates.csv`` (``dnmr fit``) or of a table of one's own: temperature_k, process,
        rate_per_s, rate_stderr, rate_lower, rate_upper, status, temperature_stderr (all but the first optional).
    calibration : TemperatureCalibration, optional
        The temperatures are set-points: the sample temperatures and their errors (the calibration's
        curve and scatter) come from it.  Without it the temperatures are taken as sample temperatures,
        with the table's temperature_stderr where it gives one.

    Returns
    -------
    list of SupportingRate
        Ordered by process (as first named), then temperature.
    """
    kept = [row for row in rows if _status(row) != "failed"]
    given = np.array([_float(row.get("temperature_k")) for row in kept])
    if calibration is not None and len(kept):
        true = calibration.true_temperature(given)
        setpoints, temperatures, errors = given, true.temperature_k, true.stderr
    else:
        setpoints = np.full(len(kept), math.nan)
        temperatures = given
        errors = np.array([_float(row.get("temperature_stderr")) for row in kept])
    out = [supporting_rate(row.get("process", "") or "", float(s), float(t), float(e), _status(row),
                           _float(row.get("rate_per_s")), _float(row.get("rate_stderr")), _float(row.get("rate_lower")),
                           _float(row.get("rate_upper")))
           for row, s, t, e in zip(kept, setpoints, temperatures, errors)]
    order = list(dict.fromkeys(r.process for r in out))
    return sorted(out, key=lambda r: (order.index(r.process), r.temperature_k))


def rate_rows_from_global(g: dict) -> list[SupportingRate]:
    """The rates table of a global fit (global.json): the rate of the global Eyring line at each sample
    temperature, with the set-point when the fit used a calibration."""
    calibrated = bool((g.get("options") or {}).get("calibration")) or bool(g.get("calibration_error_included"))
    out = []
    for process in g.get("processes", []):
        for r in sorted(process.get("rates", []), key=lambda r: r["temperature_k"]):
            out.append(supporting_rate(process["process"], _float(r.get("setpoint_k")) if calibrated else math.nan,
                                       float(r["temperature_k"]), _float(r.get("temperature_stderr")), "determined",
                                       float(r["rate_per_s"]), _float(r.get("rate_stderr"))))
    return out


def activation_rows(results: Iterable) -> list[SupportingActivation]:
    """The activation table from :class:`dnmr.activation.eyring_result.EyringResult` objects or from dicts with their
    :meth:`~dnmr.activation.eyring_result.EyringResult.to_dict` keys (the processes of global.json have them too)."""
    out = []
    for result in results:
        d = result if isinstance(result, dict) else result.to_dict()
        out.append(SupportingActivation(*(d[f.name] if f.name != "process" else d.get("process") or ""
                                          for f in fields(SupportingActivation))))
    return out


# --------------------------------------------------------------------------------------------------
# the three formats


def _csv(header: Sequence[str], rows: Iterable[tuple]) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow(["" if isinstance(v, float) and not math.isfinite(v) else repr(v) if isinstance(v, float) else v
                         for v in row])
    return buffer.getvalue()


def rates_csv(rows: Sequence[SupportingRate]) -> str:
    """The rates table as CSV: full-precision numbers, empty cells where a quantity does not apply."""
    return _csv([f.name for f in fields(SupportingRate)], (astuple(r) for r in rows))


def activation_csv(rows: Sequence[SupportingActivation]) -> str:
    """The activation table as CSV, full precision."""
    return _csv([f.name for f in fields(SupportingActivation)], (astuple(r) for r in rows))


def _with_error(value: float, stderr: float) -> str:
    """'value ± error' as journals print it; the value alone (4 significant figures) when its error is unknown."""
    if not math.isfinite(value):
        return "n.d."
    return format_with_error(value, stderr) if math.isfinite(stderr) else f"{value:.4g}"


@dataclass(frozen=True)
class _Cells:
    """The printed cells of one rates row, with the comparison signs kept apart (Unicode or LaTeX)."""

    setpoint: str
    temperature: str
    rate: str
    gibbs: str


def _rate_cells(r: SupportingRate, less: str, more: str, to: str) -> _Cells:
    setpoint = f"{r.setpoint_k:.1f}" if math.isfinite(r.setpoint_k) else ""
    temperature = (_with_error(r.temperature_k, r.temperature_stderr) if math.isfinite(r.temperature_stderr)
                   else f"{r.temperature_k:.1f}")
    if r.status == "determined":
        rate, gibbs = _with_error(r.rate_per_s, r.rate_stderr), _with_error(r.gibbs_kj_mol, r.gibbs_stderr)
    elif r.status == "upper-bound":
        rate, gibbs = f"{less} {r.rate_upper:.3g}", f"{more} {r.gibbs_lower_kj_mol:.1f}"
    elif r.status == "lower-bound":
        rate, gibbs = f"{more} {r.rate_lower:.3g}", f"{less} {r.gibbs_upper_kj_mol:.1f}"
    elif r.status == "interval":
        rate = f"{r.rate_lower:.3g}{to}{r.rate_upper:.3g}"
        gibbs = f"{r.gibbs_lower_kj_mol:.1f}{to}{r.gibbs_upper_kj_mol:.1f}"
    else:
        rate, gibbs = "not determined", ""
    return _Cells(setpoint, temperature, rate, gibbs)


def _rate_header(calibrated: bool, latex: bool) -> list[str]:
    if latex:
        head = ["process", r"$T$ / K", r"$k$ / s$^{-1}$", r"$\Delta G^{\ddagger}$ / kJ mol$^{-1}$"]
        return ([head[0], r"$T_\mathrm{set}$ / K"] if calibrated else [head[0]]) + head[1:]
    head = ["process", "T / K", "k / s⁻¹", "ΔG‡ / kJ mol⁻¹"]
    return ([head[0], "T set / K"] if calibrated else [head[0]]) + head[1:]


def _rate_table_rows(rows: Sequence[SupportingRate], calibrated: bool, latex: bool) -> list[list[str]]:
    less, more, to = (r"$<$", r"$>$", "--") if latex else ("<", ">", " to ")
    out = []
    for r in rows:
        c = _rate_cells(r, less, more, to)
        cells = [r.process] + ([c.setpoint] if calibrated else []) + [c.temperature, c.rate, c.gibbs]
        out.append([_latex_text(x) if latex and i == 0 else x.replace(" ± ", r" $\pm$ ") if latex else x
                    for i, x in enumerate(cells)])
    return out


def _activation_table_rows(rows: Sequence[SupportingActivation], latex: bool) -> tuple[list[str], list[list[str]]]:
    if latex:
        header = ["process", r"$\Delta H^{\ddagger}$ / kJ mol$^{-1}$", r"$\Delta S^{\ddagger}$ / J mol$^{-1}$ K$^{-1}$",
                  r"$r(\Delta H^{\ddagger}, \Delta S^{\ddagger})$", r"$\Delta G^{\ddagger}_{298.15\,\mathrm{K}}$ / kJ mol$^{-1}$",
                  r"$T_\mathrm{hm}$ / K", r"$\Delta G^{\ddagger}_{T_\mathrm{hm}}$ / kJ mol$^{-1}$"]
    else:
        header = ["process", "ΔH‡ / kJ mol⁻¹", "ΔS‡ / J mol⁻¹ K⁻¹", "r(ΔH‡, ΔS‡)", "ΔG‡(298.15 K) / kJ mol⁻¹",
                  "T_hm / K", "ΔG‡(T_hm) / kJ mol⁻¹"]
    body = []
    for a in rows:
        cells = [_latex_text(a.process) if latex else a.process, _with_error(a.enthalpy_kj_mol, a.enthalpy_stderr),
                 _with_error(a.entropy_j_mol_k, a.entropy_stderr), f"{a.correlation_enthalpy_entropy:.4f}",
                 _with_error(a.gibbs_298_kj_mol, a.gibbs_298_stderr), f"{a.harmonic_mean_temperature_k:.1f}",
                 _with_error(a.gibbs_hm_kj_mol, a.gibbs_hm_stderr)]
        body.append([c.replace(" ± ", r" $\pm$ ").replace("-", "$-$") if latex and i > 0 else c
                     for i, c in enumerate(cells)])
    return header, body


def _markdown_table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    cell = lambda text: str(text).replace("|", r"\|")  # noqa: E731
    lines = ["| " + " | ".join(cell(h) for h in header) + " |", "|" + "|".join(" --- " for _ in header) + "|"]
    return lines + ["| " + " | ".join(cell(c) for c in row) + " |" for row in rows]


_LATEX_SPECIAL = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
                  "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}"}


def _latex_text(text: str) -> str:
    """Plain text (a process name) safe inside a LaTeX table."""
    return "".join(_LATEX_SPECIAL.get(ch, ch) for ch in str(text))


def _latex_table(header: Sequence[str], rows: Sequence[Sequence[str]], caption: str) -> list[str]:
    spec = "l" + "r" * (len(header) - 1)
    return ([r"\begin{table}", r"\centering", f"\\caption{{{caption}}}", f"\\begin{{tabular}}{{{spec}}}", r"\hline",
             " & ".join(header) + r" \\", r"\hline"] + [" & ".join(row) + r" \\" for row in rows]
            + [r"\hline", r"\end{tabular}", r"\end{table}"])


RATES_NOTE = ("Errors are one standard error. {temperature}. {dg} at T from the Eyring "
              "equation (transmission coefficient 1; CODATA constants), its error from those of k and T. A rate "
              "the spectrum only bounds gives the opposite bound on {dg}, at the sample temperature.")
ACTIVATION_NOTE = ("ΔH‡ and ΔS‡ from one series are strongly correlated (r above); ΔG‡ at the weighted harmonic mean "
                   "of the temperatures, T_hm, is nearly uncorrelated with ΔH‡ (Grieger, Hunter & Krug, Nature 261, "
                   f"566 (1976)). ΔG‡ at {STANDARD_TEMPERATURE_K} K is an extrapolation quoted for comparison.")


def rates_note(calibrated: bool, latex: bool = False) -> str:
    temperature = ("T is the sample temperature, from the set-point T set through the temperature calibration, "
                   "whose error is included" if calibrated else "T is the temperature as given (no calibration applied)")
    text = RATES_NOTE.format(temperature=temperature, dg="ΔG‡")
    return _latex_text(text).replace("ΔG‡", r"$\Delta G^{\ddagger}$") if latex else text


def rate_table_cells(rows: Sequence[SupportingRate], calibrated: bool) -> tuple[list[str], list[list[str]]]:
    """Header and printed cells (Unicode text) of the rates table, for a report."""
    return _rate_header(calibrated, False), _rate_table_rows(rows, calibrated, False)


def tables_markdown(rates: Sequence[SupportingRate], activation: Sequence[SupportingActivation], title: str = "") -> str:
    """Both tables, their notes and the activation parameters as sentences, in Markdown."""
    calibrated = any(math.isfinite(r.setpoint_k) for r in rates)
    lines = [f"# {title or 'Supporting information'}", "", "## Rate constants", ""]
    lines += _markdown_table(_rate_header(calibrated, False), _rate_table_rows(rates, calibrated, False))
    lines += ["", rates_note(calibrated), "", "## Activation parameters", ""]
    if activation:
        lines += _markdown_table(*_activation_table_rows(activation, False))
        lines += ["", ACTIVATION_NOTE, ""] + [a.sentence() for a in activation]
    else:
        lines.append("No activation parameters: too few determined rates for an Eyring line.")
    return "\n".join(lines) + "\n"


def tables_latex(rates: Sequence[SupportingRate], activation: Sequence[SupportingActivation]) -> str:
    """Both tables as LaTeX ``table`` environments (plain ``tabular``: no package needed)."""
    calibrated = any(math.isfinite(r.setpoint_k) for r in rates)
    lines = ["% dnmr supporting-information tables"] + _latex_table(
        _rate_header(calibrated, True), _rate_table_rows(rates, calibrated, True), rates_note(calibrated, latex=True))
    if activation:
        caption = (r"Activation parameters. $\Delta G^{\ddagger}$ at the weighted harmonic mean of the temperatures, "
                   r"$T_\mathrm{hm}$, is nearly uncorrelated with $\Delta H^{\ddagger}$ (Grieger, Hunter \& Krug, "
                   r"Nature 261, 566 (1976)); $r$ is the correlation coefficient of $\Delta H^{\ddagger}$ and "
                   r"$\Delta S^{\ddagger}$.")
        lines += [""] + _latex_table(*_activation_table_rows(activation, True), caption)
    return "\n".join(lines) + "\n"


def write_supporting_tables(folder: str | Path, rates: Sequence[SupportingRate],
                            activation: Sequence[SupportingActivation], *, title: str = "",
                            overwrite: bool = False) -> list[Path]:
    """Write si_rates.csv, si_activation.csv, si_tables.md and si_tables.tex into `folder` (atomically).

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    InputError
        A file exists and `overwrite` is not set.
    """
    folder = Path(folder)
    texts = {f"{RATES_STEM}.csv": rates_csv(rates), f"{ACTIVATION_STEM}.csv": activation_csv(activation),
             f"{TABLES_STEM}.md": tables_markdown(rates, activation, title), f"{TABLES_STEM}.tex": tables_latex(rates, activation)}
    if not overwrite:
        for name in texts:
            if (folder / name).exists():
                raise InputError(f"{folder / name} already exists; pass --overwrite to replace it", where="output")
    return [atomic_write_text(folder / name, text, overwrite=overwrite) for name, text in texts.items()]


def supporting_folder(report: Path) -> Path:
    """The folder of a report's supporting-information tables: ``supporting-information`` beside report.html,
    ``<name>-supporting-information`` beside a report of another name (each report keeps its own)."""
    name = SUPPORTING_FOLDER if report.name == REPORT_NAME else f"{report.stem}-{SUPPORTING_FOLDER}"
    return report.parent / name
