"""The result of a global fit: activation parameters, the comparison with the two-step analysis, the rates,
each spectrum's fit quality; its report, figures and files (global.json, global.txt, global_fits.png,
global_residuals.png).
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from dnmr.activation.eyring_result import EyringResult
from dnmr.activation.parameters import ActivationEstimate
from dnmr.errors import InputError
from dnmr.fitting.globalquality import SpectrumQuality
from dnmr.fitting.resultsfolder import (OUTPUT_FILES, REPORT_FILE, RESULT_FOLDERS, SUPPORTING_FOLDER, earlier_manifest,
                                        holds_results, lock_results_folder, refuse_inputs_among, refuse_linked_folders,
                                        release_results_folder, remove_earlier_results, series_inputs)
from dnmr.fitting.seriesfile import Series
from dnmr.fitting.spectrumfit import SpectrumFit
from dnmr.formatting import format_with_error
from dnmr.io.output import atomic_write_text, figure_file, json_ready, save_figure
from dnmr.kinetics import KCAL_PER_KJ, STANDARD_TEMPERATURE_K
from dnmr.notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

#: The files a global fit writes into its folder.
GLOBAL_FILES = ("global.json", "global.txt", "global_fits.png", "global_residuals.png")
#: The subfolder of the two-step results (``dnmr fit``) the global fit starts from.
TWO_STEP_FOLDER = "two-step"
#: The program global.json names: how a later ``--overwrite`` knows a folder as a global fit of dnmr's.
GLOBAL_PROGRAM = "dnmr fit --global"


def _share(covariance: np.ndarray, harmonic_mean_temperature_k: float) -> dict[str, float]:
    """Standard errors from a 2x2 covariance of (ΔH‡ kJ/mol, ΔS‡ J/(mol K)): ΔH‡, ΔS‡, ΔG‡ at 298.15 K and
    at `harmonic_mean_temperature_k` (K)."""
    gibbs = [np.array([1.0, -t / 1e3]) for t in (STANDARD_TEMPERATURE_K, harmonic_mean_temperature_k)]
    return {"enthalpy_kj_mol": float(math.sqrt(covariance[0, 0])), "entropy_j_mol_k": float(math.sqrt(covariance[1, 1])),
            "gibbs_298_kj_mol": float(math.sqrt(gibbs[0] @ covariance @ gibbs[0])),
            "gibbs_hm_kj_mol": float(math.sqrt(gibbs[1] @ covariance @ gibbs[1]))}


@dataclass
class GlobalFit(NotebookView):
    """The global fit of a series.

    Attributes
    ----------
    series : Series
        What was fitted.
    outdir : Path
        Where the outputs are.
    activation : list of ActivationEstimate
        One per process.
    two_step : list of EyringResult
        Eyring analysis of the two-step rates, one per process.
    temperatures_k : ndarray
        True sample temperatures of the fitted spectra (K).
    setpoints_k : ndarray
        Their temperatures as the series gives them (K).
    fits : list of SpectrumFit
        Each fitted spectrum with the global fit's curve (``fitted``) in place of its own.
    parameters : dict
        Every global parameter: estimate, stderr, fixed.
    chi_square, reduced_chi_square : float
        Of the weighted residuals; degrees of freedom `degrees_of_freedom`.
    degrees_of_freedom : int
        Points minus free parameters.
    error_scale : float
        Factor applied to the covariance (1 unless the fit is a misfit).
    options : dict
        shifts, linewidth, couplings, populations, calibration used.
    spectra : list of SpectrumQuality
        How well each spectrum is described, against its measured noise and beside its two-step fit.
    notes : list of str
        Remarks.
    function_evaluations, jacobian_evaluations : int
        Residual and Jacobian evaluations of the joint least squares (all spectra each).
    temperature_stderr_k : ndarray or None
        Standard error of each sample temperature from the calibration, K (None without a calibration).
    """

    series: Series
    outdir: Path
    activation: list[ActivationEstimate]
    two_step: list[EyringResult]
    temperatures_k: np.ndarray
    setpoints_k: np.ndarray
    fits: list[SpectrumFit]
    parameters: dict
    chi_square: float
    reduced_chi_square: float
    degrees_of_freedom: int
    error_scale: float
    options: dict
    spectra: list[SpectrumQuality] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    function_evaluations: int = 0
    jacobian_evaluations: int = 0
    temperature_stderr_k: np.ndarray | None = None

    @property
    def harmonic_mean_temperature_k(self) -> float:
        """Harmonic mean of the fitted temperatures, K (where ΔG‡ is best determined)."""
        return float(len(self.temperatures_k) / np.sum(1.0 / self.temperatures_k))

    def _process_dict(self, a: ActivationEstimate) -> dict:
        t_hm = self.harmonic_mean_temperature_k
        g298, g_hm = a.gibbs(STANDARD_TEMPERATURE_K), a.gibbs(t_hm)
        out = {"process": a.process, "enthalpy_kj_mol": a.enthalpy_kj_mol, "enthalpy_stderr": a.enthalpy_stderr,
               "entropy_j_mol_k": a.entropy_j_mol_k, "entropy_stderr": a.entropy_stderr,
               "gibbs_298_kj_mol": g298[0], "gibbs_298_stderr": g298[1],
               "harmonic_mean_temperature_k": t_hm, "gibbs_hm_kj_mol": g_hm[0], "gibbs_hm_stderr": g_hm[1],
               "correlation_enthalpy_entropy": a.correlation,
               "enthalpy_kcal_mol": a.enthalpy_kj_mol * KCAL_PER_KJ, "enthalpy_kcal_stderr": a.enthalpy_stderr * KCAL_PER_KJ,
               "entropy_cal_mol_k": a.entropy_j_mol_k * KCAL_PER_KJ, "entropy_cal_stderr": a.entropy_stderr * KCAL_PER_KJ,
               "gibbs_298_kcal_mol": g298[0] * KCAL_PER_KJ, "gibbs_298_kcal_stderr": g298[1] * KCAL_PER_KJ,
               "calibration_error_included": a.calibration_covariance is not None}
        if a.calibration_covariance is not None:
            for part, cov in a.error_shares().items():
                out[f"{part}_share_stderr"] = _share(cov, t_hm)
        k = self.activation.index(a)
        out["rates"] = []
        t_errors = (np.full(len(self.temperatures_k), math.nan) if self.temperature_stderr_k is None
                    else self.temperature_stderr_k)
        for t, t_err, t_set, fit in zip(self.temperatures_k, t_errors, self.setpoints_k, self.fits):
            ln_k, se = a.ln_rate(float(t))
            own = fit.rates[k]
            out["rates"].append({"temperature_k": float(t), "temperature_stderr": float(t_err),
                                 "setpoint_k": float(t_set), "rate_per_s": math.exp(ln_k),
                                 "rate_stderr": math.exp(ln_k) * se, "two_step_rate_per_s": own.rate_per_s,
                                 "two_step_status": own.status})
        return out

    def comparison(self) -> list[dict]:
        """Global against two-step (per-temperature rates, then Eyring): one row per process and quantity."""
        rows = []
        t_hm = self.harmonic_mean_temperature_k
        for a, e in zip(self.activation, self.two_step):
            pairs = [("enthalpy_kj_mol", (a.enthalpy_kj_mol, a.enthalpy_stderr), (e.enthalpy_kj_mol, e.enthalpy_stderr)),
                     ("entropy_j_mol_k", (a.entropy_j_mol_k, a.entropy_stderr), (e.entropy_j_mol_k, e.entropy_stderr)),
                     ("gibbs_298_kj_mol", a.gibbs(STANDARD_TEMPERATURE_K), tuple(e.gibbs(STANDARD_TEMPERATURE_K))),
                     ("gibbs_hm_kj_mol", a.gibbs(t_hm), tuple(e.gibbs(t_hm))),
                     ("correlation_enthalpy_entropy", (a.correlation, math.nan), (e.correlation, math.nan))]
            for quantity, (gv, gs), (tv, ts) in pairs:
                rows.append({"process": a.process, "quantity": quantity, "global": gv, "global_stderr": gs,
                             "two_step": tv, "two_step_stderr": ts, "difference": gv - tv})
        return rows

    def to_dict(self) -> dict:
        """Plain data (JSON-ready): the first process's contract keys at the top level, every process
        under ``processes``, the comparison, the parameters and the fit statistics."""
        processes = [self._process_dict(a) for a in self.activation]
        out = {k: v for k, v in processes[0].items() if k != "rates"}
        out.update({
            "program": GLOBAL_PROGRAM, "series": str(self.series.source), "processes": processes,
            "comparison": self.comparison(), "two_step": [e.to_dict() for e in self.two_step],
            "two_step_folder": str(self.outdir / TWO_STEP_FOLDER), "options": self.options,
            "chi_square": self.chi_square, "reduced_chi_square": self.reduced_chi_square,
            "degrees_of_freedom": self.degrees_of_freedom, "error_scale": self.error_scale,
            "function_evaluations": self.function_evaluations, "jacobian_evaluations": self.jacobian_evaluations,
            "parameters": self.parameters, "notes": self.notes,
            "spectra": [q.to_dict() for q in self.spectra],
        })
        return out

    def report(self) -> str:
        """A readable account: activation parameters with errors, the comparison, per-temperature rates."""
        t_hm = self.harmonic_mean_temperature_k
        lines = [f"Global fit of {self.series.source.name}: {len(self.fits)} spectra, "
                 f"{self.temperatures_k.min():.2f}-{self.temperatures_k.max():.2f} K; results in {self.outdir}",
                 f"shifts {self.options['shift_trend']} in T, linewidth {linewidth_words(self.options)}, couplings "
                 f"{self.options['coupling_trend']} in T, populations {self.options['population_trend']}",
                 f"chi-square {self.chi_square:.1f} on {self.degrees_of_freedom} degrees of freedom (reduced "
                 f"{self.reduced_chi_square:.3f}, against each spectrum's measured noise), error scale "
                 f"{self.error_scale:.3g}", ""]
        for a in self.activation:
            g298, g_hm = a.gibbs(STANDARD_TEMPERATURE_K), a.gibbs(t_hm)
            lines += [f"process {a.process}:",
                      f"  ΔH‡ = {format_with_error(a.enthalpy_kj_mol, a.enthalpy_stderr)} kJ/mol "
                      f"({format_with_error(a.enthalpy_kj_mol * KCAL_PER_KJ, a.enthalpy_stderr * KCAL_PER_KJ)} kcal/mol)",
                      f"  ΔS‡ = {format_with_error(a.entropy_j_mol_k, a.entropy_stderr)} J/(mol K)",
                      f"  correlation of ΔH‡ and ΔS‡: {a.correlation:.4f}",
                      f"  ΔG‡(298.15 K) = {format_with_error(*g298)} kJ/mol",
                      f"  ΔG‡({t_hm:.1f} K, harmonic mean) = {format_with_error(*g_hm)} kJ/mol"]
            if a.calibration_covariance is not None:
                for part, cov in a.error_shares().items():
                    share = _share(cov, t_hm)
                    lines.append(f"  errors from the {'spectra' if part == 'spectra' else 'temperature calibration'} "
                                 f"alone: ΔH‡ ± {share['enthalpy_kj_mol']:.2g} kJ/mol, ΔS‡ ± "
                                 f"{share['entropy_j_mol_k']:.2g} J/(mol K), ΔG‡(298.15 K) ± "
                                 f"{share['gibbs_298_kj_mol']:.2g}, ΔG‡({t_hm:.1f} K) ± "
                                 f"{share['gibbs_hm_kj_mol']:.2g} kJ/mol")
            else:
                lines.append("  temperatures taken as exact: no calibration error included")
            lines.append("")
        lines += ["global against two-step (per-temperature rates, then Eyring):",
                  f"  {'process':<14} {'quantity':<30} {'global':>20} {'two-step':>20} {'difference':>11}"]
        for row in self.comparison():
            fmt = lambda v, s: format_with_error(v, s) if math.isfinite(s) else f"{v:.4f}"  # noqa: E731
            lines.append(f"  {row['process']:<14} {row['quantity']:<30} {fmt(row['global'], row['global_stderr']):>20} "
                         f"{fmt(row['two_step'], row['two_step_stderr']):>20} {row['difference']:>11.3g}")
        lines += ["", "rates from the global fit:", f"  {'T set / K':>9} {'T / K':>8}  {'process':<14} "
                                                         f"{'global k / s^-1':<24} two-step"]
        for p in [self._process_dict(a) for a in self.activation]:
            for r in p["rates"]:
                lines.append(f"  {r['setpoint_k']:>9.2f} {r['temperature_k']:>8.2f}  {p['process']:<14} "
                             f"{r['rate_per_s']:>10.4g} ± {r['rate_stderr']:<10.2g}  {r['two_step_rate_per_s']:.4g} "
                             f"({r['two_step_status']})")
        lines += ["", "each spectrum against its measured noise (chi-square per point):",
                  f"  {'T / K':>8} {'global':>8} {'two-step':>9}  spectrum"]
        for q in sorted(self.spectra, key=lambda q: q.temperature_k):
            lines.append(f"  {q.temperature_k:>8.2f} {q.per_point:>8.3f} {q.two_step_per_point:>9.3f}  {Path(q.file).name}"
                         + ("  misfit" if q.misfit else ""))
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def plot_residuals(self, figure: "Figure | None" = None) -> "Figure":
        """Residuals over each spectrum's noise, (data - fit) / sigma, stacked by temperature."""
        from dnmr.reporting.plotting import plot_residual_stack

        order = np.argsort(self.temperatures_k)
        return plot_residual_stack([self.fits[i] for i in order], [f"{self.temperatures_k[i]:.1f} K" for i in order],
                                   figure=figure, title="residuals of the global fit over the noise, (data - fit) / sigma: grey within 3, clipped at 5")

    def plot(self, figure: "Figure | None" = None) -> "Figure":
        """Every spectrum (black) with the global fit (red), stacked by temperature."""
        from dnmr.reporting.plotting import plot_fit_stack

        order = np.argsort(self.temperatures_k)
        return plot_fit_stack([self.fits[i] for i in order], [f"{self.temperatures_k[i]:.1f} K" for i in order],
                              figure=figure, title=f"{self.series.model.title or self.series.source.name}\n"
                                                   "measured (black) and global fit (red)")


def linewidth_words(options: dict) -> str:
    """How the global fit treated the intrinsic linewidth, in words, from its `options` (as global.json has them)."""
    trend, reference = options.get("linewidth_trend"), options.get("reference_line")
    if trend == "per-spectrum":
        return "fitted in every spectrum"
    if reference:
        return f"held in every spectrum at the width of the reference line at {reference['ppm']:g} ppm"
    return f"{trend} in T"


def write_global_fit(result: GlobalFit, overwrite: bool = False) -> None:
    """Write global.json, global.txt and the two figures (:data:`GLOBAL_FILES`) of `result` into its
    `outdir`, atomically; existing files are replaced only with `overwrite`."""
    json_name, text_name, fits_name, residuals_name = GLOBAL_FILES
    outdir = result.outdir
    atomic_write_text(outdir / json_name, json.dumps(json_ready(result.to_dict()), indent=1, allow_nan=False) + "\n",
                      overwrite=overwrite)
    atomic_write_text(outdir / text_name, result.report() + "\n", overwrite=overwrite)
    for name, fig in ((fits_name, result.plot()), (residuals_name, result.plot_residuals())):
        save_figure(fig, outdir / name, overwrite=overwrite, close=True)


def _own_files() -> list[str]:
    """The files a global fit writes at the top of its folder (figures in the chosen format), report.html
    of ``dnmr report`` among them: all that an ``--overwrite`` removes there."""
    return [GLOBAL_FILES[0], GLOBAL_FILES[1], *(figure_file(n).name for n in GLOBAL_FILES[2:]), REPORT_FILE]


def _refuse_foreign(outdir: Path, overwrite: bool) -> None:
    """Refuse the existing folder `outdir` unless `overwrite` and it holds an earlier global fit of dnmr's:
    its global.json, or (a run stopped before writing that) a two-step fit of dnmr's in two-step/; and
    refuse a global.json or two-step/ that is not dnmr's, which the run would replace."""
    if not overwrite:
        raise InputError(f"{outdir} already exists; pass --overwrite to replace its results", where="--output")
    manifest = outdir / GLOBAL_FILES[0]
    ours = earlier_manifest(manifest, GLOBAL_PROGRAM) is not None
    two_step = earlier_manifest(outdir / TWO_STEP_FOLDER / "series.json", "dnmr fit") is not None
    foreign = ((manifest.exists() or manifest.is_symlink()) and not ours
               or holds_results(outdir / TWO_STEP_FOLDER) and not two_step)
    if foreign or not (ours or two_step):
        raise InputError(f"{outdir} holds no dnmr global-fit results (no global.json or two-step/series.json of "
                         "dnmr's), so there is nothing of dnmr's to replace; choose a new folder", where="--output")


def prepare_global_folder(outdir: Path, series: Series, overwrite: bool):
    """Refuse what a global fit of `series` must not write over, lock `outdir`, and with `overwrite` remove
    an earlier global fit's own files.

    Parameters
    ----------
    outdir : Path
        The global fit's folder: global.json, global.txt, the two figures, report.html and two-step/.
    series : Series
        The series to be fitted (its inputs must lie outside what the fit writes).
    overwrite : bool
        Replace an earlier dnmr global fit in `outdir`.  Only its own files at the top are removed
        here (links and anything else are left alone); two-step/ is cleared by its own fit
        (:func:`dnmr.fitting.resultsfolder.prepare_results_folder`) by the same rules.

    Returns
    -------
    The lock of `outdir`, to be released with :func:`dnmr.fitting.resultsfolder.release_results_folder`;
    a second run into `outdir` meanwhile is refused.
    """
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"{outdir} is a file; give a folder for the results", where="--output")
    refuse_inputs_among(outdir, series_inputs(series), _own_files(), ())
    refuse_inputs_among(outdir / TWO_STEP_FOLDER, series_inputs(series), [*OUTPUT_FILES, REPORT_FILE], RESULT_FOLDERS)
    refuse_linked_folders(outdir, (TWO_STEP_FOLDER, SUPPORTING_FOLDER))
    existed = holds_results(outdir)
    lock = lock_results_folder(outdir, GLOBAL_PROGRAM)
    try:
        if existed:
            _refuse_foreign(outdir, overwrite)
            remove_earlier_results(outdir, _own_files())
    except BaseException:
        release_results_folder(lock)
        raise
    return lock
