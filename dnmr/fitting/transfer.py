"""Slow exchange by magnetisation transfer: the fits of selective inversion, saturation transfer and 2D exchange.

:func:`fit_transfer` fits the longitudinal exchange model (:mod:`dnmr.engine.longitudinal`) to the table of
an experiment file (:mod:`dnmr.fitting.transferfile`), for 2D exchange also by the matrix method
(:mod:`dnmr.fitting.matrixmethod`), and :func:`write_transfer` writes ``rates.csv`` (the columns of
``dnmr fit`` plus ``method``) and ``results.json``.

Errors follow :mod:`dnmr.fitting.spectrumfit`: chi-square with the stated errors (or, without them, with the scatter
of the residuals), the covariance scaled by the error scale, and a chi-square profile over log10 k of
each rate.  A rate far below R1 moves too little magnetisation within T1 to be seen: the profile then
stays flat towards slow exchange and the rate is an upper bound, not a number with an error bar.
"""
from __future__ import annotations

import csv
import dataclasses
import io
import json
import math
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import lmfit
import numpy as np

from dnmr.engine.longitudinal import LongitudinalSystem, model_sites, process_patterns, site_relaxation_rates
from dnmr.errors import InputError
from dnmr.fitting.matrixmethod import SiteRates, matrix_method
from dnmr.fitting.seriesoutput import RATE_COLUMNS
from dnmr.fitting.parameters import FitParameter, fitted_parameters, parameter_identifier, parameter_record, parameter_stderr
from dnmr.fitting.problem import NoiseEstimate, minimize, profile_with_restarts
from dnmr.fitting.rates import RateContext, RateEstimate, classify_rate, rate_of_process
from dnmr.fitting.resultsfolder import (earlier_manifest, holds_results, listed_files, lock_results_folder,
                                        refuse_inputs_among, release_results_folder, remove_earlier_results)
from dnmr.fitting.transferfile import Experiment, load_experiment
from dnmr.formatting import significant
from dnmr.io.output import atomic_write_text, figure_file, json_ready, save_figure

#: Columns of rates.csv after those of ``dnmr fit`` (RATE_COLUMNS).
TRANSFER_COLUMNS = ("method", "matrix_rate_per_s", "matrix_rate_stderr", "chi_square", "reduced_chi_square",
                    "data", "flags", "notes")
#: The files ``dnmr transfer`` writes into its folder: results.json (its manifest), rates.csv, the figure.
TRANSFER_FILES = ("results.json", "rates.csv", "fit.png")
#: The program results.json names: how a later ``--overwrite`` knows a folder as one of ``dnmr transfer``.
TRANSFER_PROGRAM = "dnmr transfer"
#: Steps of the coarse scan over log10 k (decades).
SCAN_STEP_DECADES = 1.0


# --------------------------------------------------------------------------------------------------
# the fitted function


class _TransferProblem:
    """Data, errors and the longitudinal model function of one experiment (lmfit residuals)."""

    def __init__(self, experiment: Experiment):
        self.experiment = experiment
        model, data = experiment.model, experiment.data
        self.kind = experiment.experiment
        self.sites = model_sites(model)
        self.labels = [s.label for s in self.sites]
        self.observed = [self.labels.index(s) for s in data.sites]
        populations = model.populations()
        self.equilibrium = np.array([populations[model.state_index(s.state)] * s.nuclei for s in self.sites])
        self.patterns = process_patterns(model)
        self.rate_names = tuple(f"log10_rate_{parameter_identifier(p)}" for p in model.process_names())
        self.data = data.values
        self.sigma = np.ones_like(self.data) if data.stderr is None else data.stderr
        self.nfev = 0

    # --- parameters -------------------------------------------------------------------------------
    def r1_name(self, label: str) -> str:
        return f"r1_per_s_{parameter_identifier(label)}"

    def m_eq_name(self, label: str) -> str:
        return f"m_eq_{parameter_identifier(label)}"

    def parameters(self) -> lmfit.Parameters:
        """Parameters with start values from the model and the data."""
        model, options, data = self.experiment.model, self.experiment.options, self.experiment.data
        params = lmfit.Parameters()
        lo, hi = np.log10(options.rate_limits_per_s)
        for name, k in zip(self.rate_names, model.rates()):
            params.add(name, value=float(np.clip(np.log10(max(k, 1e-300)), lo, hi)), min=lo, max=hi)
        positive = data.times_s[data.times_s > 0]
        guess = 1.0 / float(np.median(positive)) if positive.size else 1.0
        try:
            given = site_relaxation_rates(model)
        except InputError:
            given = None
        fitted = [self.labels[i] for i in self.r1_sites()]
        if options.r1 == "shared":
            params.add("r1_per_s", value=float(np.mean(given)) if given is not None else guess, min=0.0)
        for i, label in enumerate(self.labels):
            name = self.r1_name(label)
            if options.r1 == "fixed":
                params.add(name, value=float(given[i]), vary=False)
            elif options.r1 == "shared":
                params.add(name, expr="r1_per_s")
            elif label in fitted:
                params.add(name, value=float(given[i]) if given is not None else guess, min=0.0)
            elif given is not None:
                params.add(name, value=float(given[i]), vary=False)
            else:  # an unobserved site without a model R1 relaxes like the first observed one
                params.add(name, expr=self.r1_name(fitted[0]))
        scale = float(np.nanmax(np.abs(self.data)))
        if self.kind == "exchange-2d" or options.equilibrium == "shared":
            params.add("m_eq_scale", value=scale / float(self.equilibrium[self.observed].max()), min=0.0)
        else:
            for j, i in enumerate(self.observed):
                params.add(self.m_eq_name(self.labels[i]), value=float(np.abs(self.data[:, j]).max()), min=0.0)
        if self.kind == "inversion":
            eff = options.inversion_efficiency
            params.add("inversion_efficiency", value=0.9 if eff is None else eff, min=0.0, max=1.0, vary=eff is None)
        return params

    def r1_sites(self) -> list[int]:
        """Sites whose R1 is a parameter of its own (per-site mode): observed, and in a 2D spectrum all."""
        if self.kind == "exchange-2d":
            return list(range(len(self.sites)))
        return list(self.observed)

    # --- model function ---------------------------------------------------------------------------
    def system(self, values: Mapping[str, float]) -> LongitudinalSystem:
        rates = np.array([10.0 ** values[n] for n in self.rate_names])
        exchange = np.tensordot(rates, self.patterns, axes=1)
        relaxation = np.array([values[self.r1_name(label)] for label in self.labels])
        return LongitudinalSystem(self.sites, self.equilibrium, exchange, relaxation)

    def scales(self, values: Mapping[str, float]) -> np.ndarray:
        """Integral units per unit of M_eq, for each observed site."""
        if "m_eq_scale" in values:
            return np.full(len(self.observed), values["m_eq_scale"])
        return np.array([values[self.m_eq_name(self.labels[i])] / self.equilibrium[i] for i in self.observed])

    def predict(self, values: Mapping[str, float], times_s: np.ndarray | None = None) -> np.ndarray:
        """The model's integrals (or volumes) at the data's times (or at `times_s`, s)."""
        self.nfev += 1
        system = self.system(values)
        times = self.experiment.data.times_s if times_s is None else np.asarray(times_s, dtype=float)
        if self.kind == "exchange-2d":
            return values["m_eq_scale"] * system.volumes(times)
        options = self.experiment.options
        if self.kind == "inversion":
            M = system.evolve(system.inverted(options.inverted, values["inversion_efficiency"]), times)
        else:
            M = system.evolve(system.equilibrium, times, saturated=options.saturated)
        return M[:, self.observed] * self.scales(values)

    def residual(self, params: lmfit.Parameters) -> np.ndarray:
        return ((self.predict(params.valuesdict()) - self.data) / self.sigma).ravel()


def _scan_starts(problem: _TransferProblem, params: lmfit.Parameters) -> list[lmfit.Parameters]:
    """Coarse scan of each rate in turn (the other parameters fitted at each point): the best point and
    the second-best local minimum, as starting points."""
    lo, hi = np.log10(problem.experiment.options.rate_limits_per_s)
    grid = np.linspace(lo, hi, max(3, int(round((hi - lo) / SCAN_STEP_DECADES)) + 1))
    current = params
    starts = [params]
    for name in problem.rate_names:
        fits = []
        for x in grid:
            trial = current.copy()
            trial[name].set(value=float(x), vary=False)
            fits.append(minimize(problem, trial, tolerance=1e-4))
        chi = np.array([f.chisqr for f in fits])
        order = np.argsort(chi)
        minima = [i for i in order if (i == 0 or chi[i] <= chi[i - 1]) and (i == len(chi) - 1 or chi[i] <= chi[i + 1])]
        starts = []
        for i in minima[:2]:
            start = fits[i].params.copy()
            start[name].set(vary=True)
            starts.append(start)
        current = starts[0]
    return starts


# --------------------------------------------------------------------------------------------------
# results


@dataclass
class TransferFit:
    """The fit of one magnetisation-transfer experiment.

    Attributes
    ----------
    experiment : Experiment
        What was fitted.
    rates : list of RateEstimate
        One per exchange process, in model order (forward rates, s^-1).
    parameters : dict of str to FitParameter
        Every parameter (log10_rate_*, r1_per_s_*, m_eq_*, inversion_efficiency) with its estimate and scaled
        error (a property, from `lmfit_parameters`).
    lmfit_parameters : lmfit.Parameters
        The same as the fitting wing works with them.
    chi_square, reduced_chi_square : float
        Sum of squared weighted residuals and that over the degrees of freedom.
    degrees_of_freedom : int
        Data points minus free parameters.
    error_scale : float
        The factor on the covariance and the rise of the chi-square profile that bounds a 68 % interval.
    flags, notes : list of str
        Remarks, short and in words.
    fitted : ndarray
        The model at the best fit, shaped like the data.
    matrix_method : list of SiteRates
        exchange-2d: the matrix method at each mixing time, then their combination.
    """

    experiment: Experiment
    rates: list[RateEstimate]
    lmfit_parameters: lmfit.Parameters
    chi_square: float
    reduced_chi_square: float
    degrees_of_freedom: int
    error_scale: float
    flags: list[str]
    notes: list[str]
    fitted: np.ndarray
    matrix_method: list[SiteRates] = field(default_factory=list)

    @property
    def parameters(self) -> dict[str, FitParameter]:
        """Every fit parameter by name, in dnmr's words (estimate, stderr, range; see :class:`FitParameter`)."""
        return fitted_parameters(self.lmfit_parameters, {})

    @property
    def residuals(self) -> np.ndarray:
        """Data minus fit, shaped like the data."""
        return self.experiment.data.values - self.fitted

    def curve(self, times_s: Sequence[float]) -> np.ndarray:
        """The fitted model at any times (s), shaped like the data with those times."""
        return _TransferProblem(self.experiment).predict(self.lmfit_parameters.valuesdict(), np.asarray(times_s, dtype=float))

    def plot(self, figure=None):
        """Data, fitted curves and residuals (:func:`dnmr.reporting.plotting.plot_transfer_fit`)."""
        from dnmr.reporting.plotting import plot_transfer_fit

        return plot_transfer_fit(self, figure=figure)

    def relaxation(self) -> dict[str, tuple[float, float]]:
        """R1 (s^-1) and its standard error for each site (error NaN where fixed or tied)."""
        out = {}
        for site in model_sites(self.experiment.model):
            par = self.lmfit_parameters[f"r1_per_s_{parameter_identifier(site.label)}"]
            out[site.label] = (float(par.value), parameter_stderr(par) if par.vary else math.nan)
        return out

    def rate(self, process: str | int = 0) -> RateEstimate:
        """The estimate of one process, by name or index."""
        return rate_of_process(self.rates, process)

    def report(self) -> str:
        """The fit in a few lines: rates (or bounds), R1, and the remarks."""
        exp = self.experiment
        lines = [f"{exp.experiment} at {exp.temperature_k:.2f} K ({exp.data.source}): "
                 f"chi-square {self.chi_square:.4g} for {self.degrees_of_freedom} degrees of freedom"]
        width = max(len(r.process) for r in self.rates)
        for r in self.rates:
            lines.append(f"  {r.process:<{width}}  {r.describe()}")
            if r.reason and r.status != "determined":
                lines.append(f"  {'':<{width}}  ({r.reason})")
        for label, (value, err) in self.relaxation().items():
            lines.append(f"  R1 {label}: {significant(value, 4)} s^-1" + (f" ± {significant(err, 2)}" if np.isfinite(err) else " (fixed or tied)"))
        if "inversion_efficiency" in self.lmfit_parameters:
            par = self.lmfit_parameters["inversion_efficiency"]
            lines.append(f"  inversion efficiency {par.value:.3f}" + (f" ± {parameter_stderr(par):.3f}" if par.vary else " (fixed)"))
        combined = self.matrix_method[-1] if self.matrix_method else None
        if combined is not None:
            for r, k, s in zip(self.rates, combined.process_rates, combined.process_stderr):
                lines.append(f"  matrix method {r.process}: k = {significant(k)} ± {significant(s, 2)} s^-1")
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)

    def rate_rows(self) -> list[dict]:
        """Rows of rates.csv, one per process: the columns of ``dnmr fit`` plus method and the fit quality."""
        exp = self.experiment
        rows = []
        combined = self.matrix_method[-1] if self.matrix_method else None
        for i, r in enumerate(self.rates):
            row = {"temperature_k": exp.temperature_k, "process": r.process, "rate_per_s": r.rate_per_s,
                   "rate_stderr": r.rate_stderr, "rate_lower": r.rate_lower, "rate_upper": r.rate_upper,
                   "status": r.status, "log10_rate": r.log10_rate,
                   "log10_rate_stderr": r.log10_rate_stderr if r.status == "determined" else math.nan,
                   "rate_ci68_lower": r.rate_ci68[0], "rate_ci68_upper": r.rate_ci68[1],
                   "method": exp.experiment,
                   "matrix_rate_per_s": float(combined.process_rates[i]) if combined else math.nan,
                   "matrix_rate_stderr": float(combined.process_stderr[i]) if combined else math.nan,
                   "chi_square": self.chi_square, "reduced_chi_square": self.reduced_chi_square,
                   "data": exp.data.source, "flags": ";".join(self.flags),
                   "notes": " ".join(([r.reason] if r.reason and r.status != "determined" else []) + self.notes)}
            rows.append({k: "" if isinstance(v, float) and not math.isfinite(v) else v for k, v in row.items()})
        return rows

    def to_dict(self) -> dict:
        """Plain data (JSON-ready after :func:`dnmr.io.output.json_ready`)."""
        exp = self.experiment
        return {
            "experiment": exp.experiment, "experiment_file": exp.source, "data": exp.data.source,
            "temperature_k": exp.temperature_k, "title": exp.title,
            "options": dataclasses.asdict(exp.options),
            "sites": [s.label for s in model_sites(exp.model)], "observed_sites": list(exp.data.sites),
            "rates": [r.to_dict() for r in self.rates],
            "relaxation_per_s": {k: {"value": v, "stderr": e} for k, (v, e) in self.relaxation().items()},
            "parameters": {n: parameter_record(p) for n, p in self.lmfit_parameters.items()},
            "chi_square": self.chi_square, "reduced_chi_square": self.reduced_chi_square,
            "degrees_of_freedom": self.degrees_of_freedom, "error_scale": self.error_scale,
            "flags": self.flags, "notes": self.notes,
            "times_s": exp.data.times_s, "values": exp.data.values, "fitted": self.fitted,
            "matrix_method": [m.to_dict() for m in self.matrix_method],
        }


# --------------------------------------------------------------------------------------------------
# the fit


def fit_transfer(experiment: Experiment | str | Path) -> TransferFit:
    """Fit a magnetisation-transfer experiment: forward rates with errors or bounds, R1, equilibrium
    integrals (and inversion efficiency), and for 2D exchange also the matrix method.

    Parameters
    ----------
    experiment : Experiment or path
        The experiment (an experiment file is read with :func:`load_experiment`).

    Returns
    -------
    TransferFit
    """
    if not isinstance(experiment, Experiment):
        experiment = load_experiment(experiment)
    with np.errstate(invalid="ignore"):  # lmfit takes square roots of a singular covariance's diagonal
        return _fit(experiment)


def _fit(experiment: Experiment) -> TransferFit:
    """The work of :func:`fit_transfer`."""
    problem = _TransferProblem(experiment)
    params = problem.parameters()
    best = min((minimize(problem, start) for start in _scan_starts(problem, params)), key=lambda r: r.chisqr)
    n_points = int(np.isfinite(problem.data).sum())
    dof = n_points - best.nvarys
    if dof < 1:
        raise InputError(f"{n_points} data points for {best.nvarys} free parameters: measure more delays or fix R1 "
                         "(r1 = \"fixed\") or the inversion efficiency", source=experiment.source)
    flags, notes = [], []
    given = experiment.options.volume_stderr if experiment.experiment == "exchange-2d" else None
    if given is not None or experiment.data.stderr is None:
        # without stated errors the scatter of the residuals about the best fit is the error of each point
        floor = 1e-12 * float(np.nanmax(np.abs(problem.data)))  # noiseless data: a tiny error, not a division by 0
        sigma = given if given is not None else max(math.sqrt(best.chisqr / dof), floor)
        if given is None:
            notes.append(f"no errors given: the scatter of the residuals ({significant(sigma)} per point) is taken as the "
                         "error of each point")
        problem.sigma = np.full_like(problem.data, sigma)
        best = minimize(problem, best.params)
    best, profiles, (scale, quality_flags, quality_notes) = profile_with_restarts(
        problem, best, [n for n in problem.rate_names if best.params[n].vary], dof,
        NoiseEstimate(1.0, 1.0, 0, "stated"))
    for par in best.params.values():
        if par.stderr is not None:
            par.stderr *= math.sqrt(scale)
    flags += quality_flags
    notes += quality_notes
    if best.covar is None:
        flags.append("singular")
        notes.append("the parameters are not all determined (singular covariance): fix R1 (r1 = \"fixed\" or "
                     "\"shared\") or the inversion efficiency")
    if "inversion_efficiency" in best.params and best.params["inversion_efficiency"].vary \
            and best.params["inversion_efficiency"].value > 1.0 - 1e-6:
        flags.append("at-bound:inversion_efficiency")
        notes.append("the inversion efficiency ended at 1, a perfect inversion (its upper limit)")
    rates = [_transfer_estimate(classify_rate(n, p, best.params, profiles.get(n), RateContext(), {}), problem, best.params)
             for n, p in zip(problem.rate_names, experiment.model.process_names())]
    flags += [f"{r.status}:{r.process}" for r in rates if r.status in ("upper-bound", "lower-bound", "interval",
                                                                       "undetermined")]
    values = best.params.valuesdict()
    fit = TransferFit(experiment, rates, best.params, float(best.chisqr), float(best.chisqr / dof), int(dof),
                      float(scale), flags, notes, problem.predict(values))
    if experiment.experiment == "exchange-2d":
        sigma = None if experiment.data.stderr is not None and given is None else float(problem.sigma.flat[0])
        fit.matrix_method = matrix_method(experiment, values["m_eq_scale"], sigma)
        remarks = [f"matrix method at {m.mixing_s:g} s: {c}" for m in fit.matrix_method for c in m.checks]
        if remarks:
            fit.flags.append("matrix-method-remarks")
            fit.notes.extend(remarks)
    return fit


def _transfer_estimate(estimate: RateEstimate, problem: _TransferProblem, params: lmfit.Parameters) -> RateEstimate:
    """The estimate with the reason for a bound said in the words of magnetisation transfer."""
    r1 = [params[problem.r1_name(problem.labels[i])].value for i in problem.observed]
    times = problem.experiment.data.times_s
    longest, shortest = float(times.max()), float(times[times > 0].min()) if np.any(times > 0) else math.nan
    if estimate.status == "upper-bound":
        reason = (f"slow-exchange limit of magnetisation transfer: k up to {significant(estimate.rate_upper)} s^-1 moves "
                  f"too little magnetisation within T1 (R1 about {significant(min(r1))} to {significant(max(r1))} s^-1) and the "
                  f"longest time ({longest:g} s) for the noise to show it; any smaller k fits as well")
    elif estimate.status == "lower-bound":
        reason = (f"fast-exchange limit of magnetisation transfer: for any k above {significant(estimate.rate_lower)} s^-1 "
                  f"the sites have exchanged their magnetisation before the shortest time ({shortest:g} s); "
                  "shorter delays or mixing times would measure it")
    else:
        return estimate
    return dataclasses.replace(estimate, reason=reason)


# --------------------------------------------------------------------------------------------------
# output


def transfer_files() -> list[str]:
    """The files ``dnmr transfer`` writes into its folder (the figure in the chosen format): results.json,
    its manifest, first."""
    return list(TRANSFER_FILES[:2]) + [figure_file(TRANSFER_FILES[2]).name]


@contextmanager
def transfer_folder(outdir: Path, experiment: Experiment, overwrite: bool) -> Iterator[list[str]]:
    """Hold `outdir` for the results of `experiment` while the block runs: refused when it would write over
    an input, when it holds anything (unless `overwrite`), when what it holds is not an earlier
    ``dnmr transfer`` run's (its results.json names the program and its files) and while another dnmr
    run writes into it; locked meanwhile (:func:`dnmr.fitting.resultsfolder.lock_results_folder`), and a
    folder created for the run that nothing could be written into is removed again.

    Yields
    ------
    list of str
        The files of the earlier run in `outdir` that the new results replace (none in a new folder).
    """
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"{outdir} is a file; give a folder for the results", where="--output")
    refuse_inputs_among(outdir, experiment.inputs(), transfer_files(), ())
    existed = holds_results(outdir)
    if existed and not overwrite:
        raise InputError(f"{outdir} already exists; pass --overwrite to replace its results", where="--output")
    lock = lock_results_folder(outdir, TRANSFER_PROGRAM)
    try:
        earlier = earlier_manifest(outdir / TRANSFER_FILES[0], TRANSFER_PROGRAM) if existed else None
        if existed and earlier is None:
            raise InputError(f"{outdir} holds no dnmr transfer results (no results.json of dnmr transfer's), so there "
                             "is nothing of dnmr's to replace; choose a new folder", where="--output")
        yield listed_files(earlier)
    finally:
        release_results_folder(lock)


def _write_into(fit: TransferFit, outdir: Path, earlier: Sequence[str], overwrite: bool) -> None:
    """Write the results of `fit` into the held folder `outdir` (:func:`transfer_folder`), once the files of an
    earlier run there (`earlier`) are removed: results.json (naming the program and its files) first."""
    names = transfer_files()
    remove_earlier_results(outdir, list(earlier) + names)
    manifest = {"program": TRANSFER_PROGRAM, "files": names, **fit.to_dict()}
    atomic_write_text(outdir / names[0], json.dumps(json_ready(manifest), indent=1, allow_nan=False) + "\n",
                      overwrite=overwrite)
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=list(RATE_COLUMNS) + list(TRANSFER_COLUMNS), lineterminator="\n")
    writer.writeheader()
    for row in fit.rate_rows():
        writer.writerow({k: repr(v) if isinstance(v, float) else v for k, v in row.items()})
    atomic_write_text(outdir / names[1], buffer.getvalue(), overwrite=overwrite)
    save_figure(fit.plot(), outdir / TRANSFER_FILES[2], overwrite=overwrite, close=True)


def write_transfer(fit: TransferFit, outdir: str | Path, overwrite: bool = False) -> Path:
    """Write ``results.json``, ``rates.csv`` and ``fit.png`` of `fit` into the folder `outdir` (atomically; a
    folder holding anything only with `overwrite`, and then only one an earlier ``dnmr transfer`` wrote,
    whose own files alone are replaced; see :func:`transfer_folder`).  Returns the folder."""
    outdir = Path(outdir)
    with transfer_folder(outdir, fit.experiment, overwrite) as earlier:
        _write_into(fit, outdir, earlier, overwrite)
    return outdir


def run_transfer(experiment_file: str | Path, outdir: str | Path, overwrite: bool = False) -> TransferFit:
    """Read an experiment file, fit it and write ``results.json``, ``rates.csv`` and ``fit.png`` into `outdir`.

    Parameters
    ----------
    experiment_file : str or Path
        The experiment file (TOML).
    outdir : str or Path
        A new (or empty) folder for the results; an existing one only with `overwrite`.  It is checked
        and locked before the fit (:func:`transfer_folder`): a second run into it meanwhile is refused.
    overwrite : bool
        Replace the results of an earlier ``dnmr transfer`` run (only the files it wrote; a folder it did
        not write is refused).
    """
    experiment = load_experiment(experiment_file)
    outdir = Path(outdir)
    with transfer_folder(outdir, experiment, overwrite) as earlier:  # refuse before the work, not after it
        fit = fit_transfer(experiment)
        _write_into(fit, outdir, earlier, overwrite)
    return fit
