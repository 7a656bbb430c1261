"""Global fit of a variable-temperature series: ΔH‡ and ΔS‡ fitted to all spectra at once.

Model
-----
Every spectrum i of the series (sample temperature T_i, K; its region, noise and nuisance terms as in
:mod:`dnmr.fitting.spectrumfit`) is predicted from one set of global parameters:

* rates: k_p(T_i) = (kB T_i / h) exp(ΔS‡_p / R) exp(-ΔH‡_p / (R T_i)) for every process p (Eyring,
  transmission coefficient 1); parameters ``enthalpy_kj_mol_<p>`` (kJ/mol), ``entropy_j_mol_k_<p>``
  (J/(mol K)).  T_i is the true sample temperature: the series' set-point passed through the
  calibration when one is given.
* shifts (ppm), couplings (Hz) and the intrinsic linewidth (Hz) are smooth functions of temperature,
  polynomials in (T - T_ref) with T_ref the mean temperature: ``<name>`` (value at T_ref),
  ``<name>_per_k`` (slope, per K) and ``<name>_per_k2`` (curvature, per K^2) for the trends
  ``constant``, ``linear`` (the default of all three) and ``quadratic``.  Names: ``shift_ppm_<state>_<spin>``,
  ``coupling_hz_<state>_<a>_<b>`` (every coupling the model gives), ``linewidth_hz_<state>`` (one for
  all states unless the series fits them per state).  The linewidth may instead be fitted in every
  spectrum (``per-spectrum``; then it trades against the exchange broadening in fast exchange).
  The slow-exchange spectra fix the trends; the spectra where exchange merged the lines follow them.
* populations of states whose model populations differ (or which the series fits): van 't Hoff,
  ln(p_j / p_1) = -dH_j / (R T) + dS_j / R relative to the first state, parameters
  ``state_enthalpy_kj_mol_<state>`` and ``state_entropy_j_mol_k_<state>``; otherwise the model's
  populations at T_i.
  With a reference line (``[fit.reference_line]``; ``reference-line``, the default then) the linewidth of
  every spectrum is held at that spectrum's reference width (plus ``added_width_hz``), as the two-step fit
  measured it (fitted alone where it was not determined), and the widths' errors are carried into the
  covariance as the calibration's are (step 4).
* per spectrum (prefix ``s<i>_``, i its place in the series file): amplitude, baseline, phase and
  frequency offset, fitted jointly with the rest, as its own fit options allow.  A common move of
  every line is the same as a frequency offset, so the offsets are anchored: they are held to zero mean
  and, for linear (quadratic) shift trends, to no linear (and quadratic) trend in T -- a gauge
  condition (two extra residuals) that changes nothing the spectra determine.

Any parameter the series file fixes in ``[fit.parameters]`` (``fixed = true``) is held at its ``start`` value.

Method
------
1. The ordinary two-step fit (:func:`dnmr.fitting.series.fit_series`) runs first into ``OUTDIR/two-step``: the
   result to compare with, and the data, noise estimate, region and fit options of every spectrum.  The
   start trusts neither the model file's first guesses nor what the two-step fits absorbed: every shift
   is scanned (+-15 Hz, two passes, amplitude, phase and baseline solved linearly at each point) in the
   coldest third of the spectra, taken to be in slow exchange, and the shift trends start from lines
   through what the scans found; the coupling trends from lines through the two-step couplings (fitted in
   the slow-exchange spectra, held at their trend elsewhere); the linewidth starts flat at the coldest
   spectrum's (scanned); ΔH‡ and ΔS‡ of the first process start from an Eyring line through the rates a scan over log k finds in each
   spectrum with a clear minimum (at least three; else the two-step Eyring line, else a line through its
   best-fit rates).  Every offset starts at 0; each spectrum's amplitude, phase and baseline (started at
   its two-step values) and offset are refitted alone, then all of them jointly with the rest: none is
   held at a two-step value.
2. All residuals (fit - data) / sigma_i are minimised together (scipy ``least_squares``, trust region).
   sigma_i is each spectrum's measured noise: the weights never depend on how well a spectrum fits.
   Every quantity of a spectrum's lineshape is an affine function of the global parameters, so its
   Jacobian block is (d prediction / d quantity) x (d quantity / d parameters): d prediction / d quantity
   from the lineshape's exact derivatives (:mod:`dnmr.engine.derivatives`, all quantities in one solve;
   the chain rule through k = 10^(log10 k) for the Eyring rate, the spectrometer frequency for shifts in
   ppm, p_j for ln K of van 't Hoff populations) where they cost less than finite differences
   (:func:`dnmr.engine.derivatives.derivatives_pay`: models of up to 100 coherences), else one lineshape
   evaluation per quantity (forward difference); amplitude, phase and baseline exactly; blocks are built in worker
   processes, or on an executor given (each spectrum's block alone: the same numbers wherever).  The fit stops once a step lowers chi-square by less than 0.01^2, i.e. moves the
   parameters by less than about 0.01 joint standard errors.
3. Covariance (J^T J)^-1 at the optimum, times the noise correlation factor, widened by the global
   reduced chi-square when that is significantly above 1 (the rule of :mod:`dnmr.fitting.spectrumfit`).  The reduced
   chi-square is reported against the measured noise; when it is too high, every spectrum that does not
   fit to its noise is named, with what would lower its chi-square most (its shifts, linewidth,
   couplings, rate or populations free in that spectrum alone, each by one Gauss-Newton step) and the
   option that loosens that trend.
4. With a calibration, its uncertainty is added.  The calibration gives the sample temperatures T with a
   covariance C_T (K^2): the curve's coefficient covariance, shared by all spectra, plus the scatter of
   its points about the curve on the diagonal (:meth:`dnmr.activation.temperature_calibration.TemperatureCalibration.true_temperature`,
   as the two-step Eyring analysis uses it).  The optimum moves with T; differentiating the normal
   equations J^T r = 0 gives dx/dT = -(J^T J)^-1 J^T dr/dT (dr/dT by central differences, each T_i moving
   only spectrum i's residuals, T_ref held), and the covariance gains (dx/dT) C_T (dx/dT)^T (not widened
   by the chi-square).  Reference widths w held in the fit add (dx/dw) C_w (dx/dw)^T the same way (C_w
   diagonal: each width's own error; dr/dw is the linewidth column of that spectrum).  ΔG‡(T) = ΔH‡ - T ΔS‡ with its error from the joint covariance, at 298.15 K and
   at the harmonic mean of the temperatures; the calibration's share of each error is reported.

Outputs (OUTDIR, atomic writes): ``global.json``, ``global.txt``, ``global_fits.png`` (spectra and fit),
``global_residuals.png`` (residuals over the noise), plus the two-step results in ``OUTDIR/two-step``;
``dnmr report OUTDIR`` (run by ``dnmr fit --global`` itself) turns them into ``report.html``.

Modules: :mod:`dnmr.fitting.globalproblem` (parameters, lineshape quantities, residuals, Jacobian blocks),
:mod:`dnmr.fitting.globalsolve` (the parallel evaluator, the start, the joint least squares),
:mod:`dnmr.fitting.globalquality` (each spectrum against its noise), :mod:`dnmr.fitting.globalresult`
(:class:`~dnmr.fitting.globalresult.GlobalFit` and its files); this module runs them.
"""
from __future__ import annotations

import concurrent.futures as futures
import dataclasses
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from scipy import optimize

from dnmr.activation.eyring import eyring_fit_file
from dnmr.activation.eyring_result import EyringResult
from dnmr.activation.parameters import ActivationEstimate
from dnmr.errors import InputError
from dnmr.fitting.globalproblem import GlobalMember, GlobalProblem
from dnmr.fitting.globaltreatment import DEFAULT_TREND, Treatment
from dnmr.fitting.globalquality import SpectrumQuality, misfit_notes, spectrum_qualities
from dnmr.fitting.globalresult import TWO_STEP_FOLDER, GlobalFit, prepare_global_folder, write_global_fit
from dnmr.fitting.resultsfolder import release_results_folder
from dnmr.fitting.globalsolve import GlobalEvaluator, solve_global
from dnmr.fitting.series import SeriesFit, fit_series
from dnmr.fitting.seriesfile import REFERENCE_LINE, Series, load_series
from dnmr.fitting.problem import NoiseEstimate, error_scale
from dnmr.fitting.workers import single_threaded_blas
from dnmr.io.progress import PLAIN_INTERVAL_S, ProgressReport
from dnmr.kinetics import BOLTZMANN, GAS_CONSTANT, PLANCK

if TYPE_CHECKING:  # pragma: no cover
    from dnmr.activation.temperature_calibration import TemperatureCalibration


def _true_temperatures(series: Series, calibration: "TemperatureCalibration | None",
                       used: list[int]) -> tuple[np.ndarray, np.ndarray | None]:
    """Sample temperatures (K) of the spectra `used` and their covariance (K^2; None without a calibration)."""
    setpoints = np.array([series.spectra[i].temperature_k for i in used])
    if calibration is None:
        return setpoints, None
    where = [f"{series.spectra[i].where}.temperature_k" for i in used]
    true = calibration.true_temperature(setpoints, source=str(series.source), where=where)
    return true.temperature_k, true.covariance


def _propagated_covariance(jac: np.ndarray, inverse: np.ndarray, derivative: np.ndarray,
                           covariance: np.ndarray) -> np.ndarray:
    """Covariance of the free parameters that quantities held in the fit bring in: the sample temperatures
    (K) or reference widths (Hz) with `covariance` and d residuals / d them `derivative`.

    The optimum x(y) moves with the held quantities y: differentiating J^T r = 0 gives
    dx/dy = -(J^T J)^-1 J^T dr/dy (first order, as the covariance itself), so they add
    (dx/dy) C_y (dx/dy)^T. Not widened by the chi-square: it is their own uncertainty."""
    sensitivity = -inverse @ (jac.T @ derivative)
    return sensitivity @ covariance @ sensitivity.T


def _stderr_table(problem: GlobalProblem, x: np.ndarray, covariance: np.ndarray | None) -> dict:
    """Every parameter at `x`: estimate, standard error (NaN where not given; a held reference width's own)
    and whether it is held."""
    g = problem.values(x)
    errors = {**problem.held_stderr, **({} if covariance is None else dict(zip(problem.free, np.sqrt(np.diag(covariance)))))}
    return {n: {"estimate": v, "stderr": float(errors.get(n, math.nan)), "fixed": n not in problem.free} for n, v in g.items()}


def _activation(problem: GlobalProblem, x: np.ndarray, covariance: np.ndarray | None,
                from_calibration: np.ndarray | None, names: list[str]) -> list[ActivationEstimate]:
    """ΔH‡ and ΔS‡ of each process (`names`) at `x` with their covariance and the calibration's share of it."""
    g = problem.values(x)
    out = []
    for ident, name in zip(problem.processes, names):
        keys = [f"enthalpy_kj_mol_{ident}", f"entropy_j_mol_k_{ident}"]
        if not all(k in problem.free for k in keys):
            raise InputError(f"ΔH‡ and ΔS‡ of process {name!r} must both be free in the global fit; remove their "
                             "settings from [fit.parameters]", where="--global")
        idx = np.ix_(*[[problem.free.index(k) for k in keys]] * 2)
        cov = np.full((2, 2), math.nan) if covariance is None else covariance[idx]
        calib = None if from_calibration is None else from_calibration[idx]
        out.append(ActivationEstimate(name, g[keys[0]], g[keys[1]], cov, calib))
    return out


def _eyring_start(two: SeriesFit, two_step: list[EyringResult], names: list[str], idents: list[str],
                  used: list[int], temps: np.ndarray) -> dict[str, tuple[float, float]]:
    """ΔH‡ and ΔS‡ to start from: the two-step Eyring line, or, where it has none (too few determined
    rates), a line through every spectrum's best-fit rate."""
    by_name = {e.process: e for e in two_step}
    start = {}
    for p, (name, ident) in enumerate(zip(names, idents)):
        e = by_name.get(name)
        if e is not None and math.isfinite(e.enthalpy_kj_mol) and math.isfinite(e.entropy_j_mol_k):
            start[ident] = (e.enthalpy_kj_mol, e.entropy_j_mol_k)
            continue
        ln_k_over_t = np.log([two.outcomes[i].fit.rates[p].rate_per_s / t for i, t in zip(used, temps)])
        slope, intercept = np.polyfit(1.0 / temps, ln_k_over_t, 1)
        start[ident] = (-slope * GAS_CONSTANT / 1e3, (intercept - math.log(BOLTZMANN / PLANCK)) * GAS_CONSTANT)
    return start


def _default_linewidth_trend(series: Series) -> str:
    """The linewidth treatment of a global fit of `series` when none is given: its reference line when the
    series takes the linewidth from one, else the default trend."""
    return REFERENCE_LINE if series.treatments.get("linewidth") == REFERENCE_LINE else DEFAULT_TREND


def _check_treatment(series: Series, treatment: Treatment) -> None:
    """Refuse a reference-line linewidth for a series whose two-step fit measures no reference line."""
    if treatment.linewidth_trend == REFERENCE_LINE and series.treatments.get("linewidth") != REFERENCE_LINE:
        raise InputError('--linewidth-trend reference-line needs a [fit.reference_line] table (ppm of a signal in no '
                         'exchange) in the series file, with linewidth = "reference-line" or no linewidth key',
                         source=str(series.source), where="--linewidth-trend")


def _reference_notes(problem: GlobalProblem, solved: "_JointSolution", covariance: np.ndarray | None,
                     names: list[str]) -> list[str]:
    """How the reference line gave the linewidth: where it was held, where fitted, and its share of the errors."""
    if problem.treatment.linewidth_trend != REFERENCE_LINE:
        return []
    held = [m for m in problem.members if any(problem.owner(n) == m.index for n in problem.held_stderr)]
    notes = [f"linewidth: held in {len(held)} of {len(problem.members)} spectra at the width of the reference line "
             "there (plus its added_width_hz), its error carried into ΔH‡ and ΔS‡"]
    free = [m.fit.source for m in problem.members if m not in held]
    if free:
        notes.append("the reference line gave no width in " + ", ".join(Path(f).name for f in free)
                     + ", so the linewidth is fitted in each of them alone")
    if solved.from_references is not None and covariance is not None:
        for ident, name in zip(problem.processes, names):
            idx = [problem.free.index(f"enthalpy_kj_mol_{ident}"), problem.free.index(f"entropy_j_mol_k_{ident}")]
            share = np.sqrt(np.diag(solved.from_references)[idx])
            notes.append(f"process {name}: the reference widths' errors alone give ΔH‡ ± {share[0]:.2g} kJ/mol, "
                         f"ΔS‡ ± {share[1]:.2g} J/(mol K) (included in the errors)")
    return notes


def _van_t_hoff(series: Series, temperatures_k: np.ndarray) -> bool:
    """Populations follow van 't Hoff when the series fits them or the model's states differ in population
    (at the mean temperature), unless the series fixes one of them."""
    model = series.model
    if len(model.states) < 2:
        return False
    settings = series.options.parameters
    if any(n.startswith("population_") and s.get("fixed") is True for n, s in settings.items()):
        return False
    populations = model.at_temperature(float(np.mean(temperatures_k))).populations()
    return series.options.populations == "free" or bool(np.ptp(populations) > 1e-9)


def fit_series_global(
    series: Series | str | Path,
    outdir: str | Path,
    *,
    overwrite: bool = False,
    calibration: "TemperatureCalibration | None" = None,
    shift_trend: str = DEFAULT_TREND,
    linewidth_trend: str | None = None,
    coupling_trend: str = DEFAULT_TREND,
    workers: int | None = None,
    progress: bool | None = None,
    executor: futures.Executor | None = None,
) -> GlobalFit:
    """Fit all spectra of a series at once with ΔH‡ and ΔS‡ of every process as the parameters.

    Parameters
    ----------
    series : Series or path
        The series (or its TOML file).
    outdir : str or Path
        Folder for global.json, global.txt, the figures and the two-step results (``two-step/``);
        refused when it holds results, unless `overwrite`, and while another run writes into it.
    overwrite : bool
        Replace the results of an earlier global fit in `outdir`: only the files dnmr wrote are removed
        (:func:`dnmr.fitting.globalresult.prepare_global_folder`).
    calibration : TemperatureCalibration, optional
        The series' temperatures are set-points: the global fit uses the calibrated sample temperatures
        and carries the calibration's uncertainty into its errors (so does the two-step Eyring comparison).
    shift_trend : {"linear", "constant", "quadratic"}
        Temperature trend of the chemical shifts (ppm).
    linewidth_trend : {"linear", "constant", "quadratic", "per-spectrum", "reference-line"}, optional
        Intrinsic linewidth (Hz): a trend in T, fitted in every spectrum, or held in every spectrum at the
        width of the series' reference line there (its error carried into ΔH‡ and ΔS‡).  Default:
        "reference-line" when the series takes the linewidth from a reference line (``[fit.reference_line]``),
        else "linear".
    coupling_trend : {"linear", "constant", "quadratic"}
        Temperature trend of the scalar couplings (Hz) the model gives.
    workers : int, optional
        Worker processes for the two-step fit and the global fit (default: one per core; 1: in this process);
        with `executor`, how many tasks are handed to it at once (default: one per core of this machine).
    progress : bool, optional
        False: no progress report.  Otherwise progress of the two-step fit and of the global fit on stderr
        (a live bar on a terminal, plain lines when stderr is a file or a pipe).
    executor : concurrent.futures.Executor, optional
        Run the two-step fits and the global fit's spectrum blocks there instead of in worker processes of
        dnmr's own (a thread or process pool, a Dask client's ``get_executor()``...); it is left running.
        The results are the same as without it.

    Returns
    -------
    GlobalFit
    """
    series = series if isinstance(series, Series) else load_series(series)
    treatment = Treatment(shift_trend, linewidth_trend or _default_linewidth_trend(series), coupling_trend)
    _check_treatment(series, treatment)
    outdir = Path(outdir)
    lock = prepare_global_folder(outdir, series, overwrite)
    try:
        two = fit_series(series, outdir / TWO_STEP_FOLDER, overwrite=overwrite, workers=workers, progress=progress,
                         executor=executor)
        result = fit_global_from_two_step(series, two, outdir, calibration, treatment, workers, progress, executor)
        write_global_fit(result, overwrite)
    finally:
        release_results_folder(lock)
    return result


def fit_global_from_two_step(series: Series, two_step: SeriesFit, outdir: Path,
                             calibration: "TemperatureCalibration | None", treatment: Treatment,
                             workers: int | None, progress: bool | None = None,
                             executor: futures.Executor | None = None) -> GlobalFit:
    """The global fit of `series` seeded from its finished two-step fit: :func:`fit_series_global` without
    running the two-step fit and without writing the results.

    Parameters
    ----------
    series : Series
        The series.
    two_step : SeriesFit
        Its two-step fit, written into ``outdir/two-step`` (whose rates.csv gives the Eyring line to
        compare with).
    outdir : Path
        The global fit's folder (named in the result; nothing is written).
    calibration : TemperatureCalibration or None
        Turns the series' set-points into sample temperatures (K) and adds its uncertainty to the errors.
    treatment : Treatment
        Temperature trends of the shifts (ppm), linewidth (Hz) and couplings (Hz).
    workers : int or None
        Worker processes (None: one per core; 1: in this process); with `executor`, tasks handed to it at once.
    progress : bool, optional
        False: no progress report; otherwise as :func:`fit_series_global`.
    executor : concurrent.futures.Executor, optional
        Where the spectrum blocks are evaluated instead of dnmr's own worker processes (left running).

    Returns
    -------
    GlobalFit
        Written by :func:`dnmr.fitting.globalresult.write_global_fit`.

    Raises
    ------
    InputError
        Fewer than three spectra fitted in the two-step fit, or ΔH‡ and ΔS‡ of a process not both free.
    """
    _check_treatment(series, treatment)
    used = [i for i, o in enumerate(two_step.outcomes) if o.fitted]
    if len(used) < 3:
        raise InputError(f"only {len(used)} spectra could be fitted; a global fit needs at least 3", where="--global")
    temps, temperature_covariance = _true_temperatures(series, calibration, used)
    setpoints = np.array([series.spectra[i].temperature_k for i in used])
    eyring = _two_step_eyring(outdir, calibration)
    problem = _global_problem(series, two_step, used, temps, treatment, eyring)
    solved = _solve_joint(problem, workers, progress, temperature_covariance, setpoints, executor)
    scale, covariance, notes = _joint_errors(problem, solved)
    notes += _reference_notes(problem, solved, covariance, series.model.process_names())
    x = solved.result.x
    activation = _activation(problem, x, covariance, solved.from_calibration, series.model.process_names())
    if solved.from_calibration is not None:
        notes.append("temperatures are calibrated sample temperatures; the calibration's uncertainty (curve and "
                     "scatter of its points) is included in the errors, propagated through the fit's optimum "
                     "(its share is listed with each process)")
    elif calibration is None:
        notes.append("no temperature calibration given: temperatures taken as exact (no calibration error included)")
    if not eyring:
        notes.append("the two-step rates give no Eyring line to compare with (too few determined rates)")
    return GlobalFit(
        series=series, outdir=outdir, activation=activation, two_step=eyring, temperatures_k=temps,
        setpoints_k=setpoints, fits=problem.fitted(x),
        temperature_stderr_k=None if temperature_covariance is None else np.sqrt(np.diag(temperature_covariance)),
        parameters=_stderr_table(problem, x, covariance), chi_square=solved.chi_square,
        reduced_chi_square=solved.chi_square / max(solved.degrees_of_freedom, 1),
        degrees_of_freedom=solved.degrees_of_freedom, error_scale=float(scale),
        options=_options(problem, series, calibration, solved.from_calibration),
        spectra=solved.qualities,
        notes=list(two_step.notes) + notes + [f"{o.spectrum.where} left out: its two-step fit failed"
                                              for o in two_step.failures],
        function_evaluations=int(solved.result.nfev), jacobian_evaluations=int(solved.result.njev),
    )


def _two_step_eyring(outdir: Path, calibration: "TemperatureCalibration | None") -> list[EyringResult]:
    """Eyring analysis of the two-step rates (``outdir/two-step/rates.csv``); none when too few rates are
    determined."""
    try:
        return eyring_fit_file(outdir / TWO_STEP_FOLDER / "rates.csv", calibration=calibration)
    except InputError:  # too few determined rates: the comparison has no two-step line
        return []


def _global_problem(series: Series, two_step: SeriesFit, used: list[int], temps: np.ndarray, treatment: Treatment,
                    eyring: list[EyringResult]) -> GlobalProblem:
    """The global problem of the spectra `used` at their sample temperatures `temps` (K), started from the
    two-step fit and its Eyring line."""
    members = [GlobalMember.from_two_step(i, float(t), two_step.outcomes[i].fit, series.model,
                                          two_step.outcomes[i].reference) for i, t in zip(used, temps)]
    idents = [n[len("log10_rate_"):] for n in members[0].problem.layout.rate_names]
    start = _eyring_start(two_step, eyring, series.model.process_names(), idents, used, temps)
    return GlobalProblem(members, series.model, treatment, _van_t_hoff(series, temps), start)


@dataclass
class _JointSolution:
    """The joint least squares at its optimum."""

    result: optimize.OptimizeResult
    inverse: np.ndarray | None  # (J^T J)^-1 of the free parameters; None when singular
    from_calibration: np.ndarray | None  # the covariance the temperature calibration brings in
    from_references: np.ndarray | None  # the covariance the reference widths' errors bring in
    residuals: list[np.ndarray]  # each spectrum's, over its noise
    qualities: list[SpectrumQuality]
    chi_square: float
    degrees_of_freedom: int


def _solve_joint(problem: GlobalProblem, workers: int | None, progress: bool | None,
                 temperature_covariance: np.ndarray | None, setpoints: np.ndarray,
                 executor: futures.Executor | None = None) -> _JointSolution:
    """Solve `problem` on `workers` processes (None: one per core; or in `workers` tasks at a time on
    `executor`) with a progress report; with the temperatures' covariance (K^2) also the covariance the
    calibration brings in."""
    workers = max(1, min(workers or os.cpu_count() or 1, len(problem.members)))
    with single_threaded_blas(), ProgressReport(progress) as report:
        task = report.add_task(f"global fit of {len(problem.members)} spectra", unit="evaluations of all spectra",
                               interval_s=PLAIN_INTERVAL_S)
        evaluator = GlobalEvaluator(problem, workers, step=lambda: report.advance(task), executor=executor)
        try:
            result, inverse = solve_global(problem, evaluator)
            report.finish(task)
            from_calibration = (None if temperature_covariance is None or inverse is None else
                                _propagated_covariance(result.jac, inverse, evaluator.temperature_jacobian(result.x),
                                                       temperature_covariance))
            from_references = (None if not problem.held_stderr or inverse is None else
                               _propagated_covariance(result.jac, inverse, evaluator.held_jacobian(result.x),
                                                      np.diag(np.square(list(problem.held_stderr.values())))))
            residuals = evaluator.each("residual", result.x)
        finally:
            evaluator.close()
        qualities = spectrum_qualities(problem, result.x, residuals, setpoints)
    chi2 = float(sum(r @ r for r in residuals))
    dof = int(problem.rows[-1]) - len(problem.free) + problem.gauge.shape[0]
    return _JointSolution(result, inverse, from_calibration, from_references, residuals, qualities, chi2, dof)


def _joint_errors(problem: GlobalProblem, solved: _JointSolution) -> tuple[float, np.ndarray | None, list[str]]:
    """Error scale and covariance of the free parameters (the calibration's share added), with notes on
    the fit's quality (the misfitting spectra named) and on the covariance."""
    members = problem.members
    points = sum(m.fit.noise.points for m in members)
    correlation = float(np.average([m.fit.noise.correlation_factor for m in members],
                                   weights=[m.problem.data.size for m in members]))
    chi2, dof = solved.chi_square, solved.degrees_of_freedom
    scale, flags, notes = error_scale(chi2, dof, NoiseEstimate(1.0, correlation, points, "measured per spectrum"))
    if "misfit" in flags:
        notes = [n for n in notes if "reduced chi-square" not in n] + misfit_notes(solved.qualities, problem.treatment,
                                                                                   chi2 / dof)
        notes.append("errors are widened by the square root of the reduced chi-square")
    covariance = None if solved.inverse is None else solved.inverse * scale
    if covariance is None:
        notes.append("the joint covariance is singular: some parameters are not determined; errors are not given")
    else:
        for part in (solved.from_calibration, solved.from_references):
            covariance = covariance if part is None else covariance + part
    if not solved.result.success:
        notes.append(f"the optimiser stopped without converging: {solved.result.message}")
    return scale, covariance, notes


def _options(problem: GlobalProblem, series: Series, calibration: "TemperatureCalibration | None",
             from_calibration: np.ndarray | None) -> dict:
    """The options of the fit as global.json records them."""
    treatment = problem.treatment
    reference = series.reference_line if treatment.linewidth_trend == REFERENCE_LINE else None
    return {"shift_trend": treatment.shift_trend, "linewidth_trend": treatment.linewidth_trend,
            "coupling_trend": treatment.coupling_trend, "population_trend": "van 't Hoff (ln K linear in 1/T)" if problem.van_t_hoff else "from the model",
            "calibration": None if calibration is None else calibration.to_dict(),
            "calibration_error_included": from_calibration is not None,
            "reference_temperature_k": problem.reference_k,
            "reference_line": None if reference is None else dataclasses.asdict(reference)}
