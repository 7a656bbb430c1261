"""Variable-temperature series: a fit of every spectrum, and the outputs.

The pieces, each in its own module:

- :mod:`dnmr.fitting.seriesfile`: the series file (``Series``, :func:`load_series`);
- :mod:`dnmr.fitting.treatments` and :mod:`dnmr.fitting.trends`: the static spectral parameters (shifts,
  couplings, populations, linewidth) taken from the slow-exchange spectra or a reference line;
- :mod:`dnmr.fitting.runner`: the fits in a process pool, seeded from finished neighbours, stored and resumed;
- :mod:`dnmr.fitting.resultsfolder` and :mod:`dnmr.fitting.seriesoutput`: the results folder and what is
  written into it.

BLAS is held to one thread in every process (the matrices are small; threads only contend), and worker
processes end with the process that started them.

Outputs (in OUTDIR, written atomically)
---------------------------------------
``rates.csv``, ``results.json``, ``figures/NNN_<name>.png``, ``series_fits.png``
    The rates, everything else, and the figures (:mod:`dnmr.fitting.seriesoutput`).
``fits/NNN_<stage>.json``
    Each fit as it finishes (what ``--resume`` continues from: a fit is reused only when the spectrum
    file, its temperature, the options and the model are unchanged).

Input files are only read.  An existing OUTDIR is refused unless ``overwrite`` (its earlier results
are replaced) or ``resume``.  A spectrum that cannot be read or fitted is reported and the others are
still fitted.
"""
from __future__ import annotations

import concurrent.futures as futures
import json
import math
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

from dnmr.errors import InputError
from dnmr.fitting.resultsfolder import prepare_results_folder, release_results_folder, write_json
from dnmr.fitting.runner import FitRunner, SpectrumOutcome, identity_key, restored_fit
from dnmr.fitting.seriesfile import Series, load_series
from dnmr.fitting.seriesoutput import (draw_fit_figures, file_sha256, rate_row, rendered_and_closed, save_and_close,
                                       write_rates_csv, write_results_json)
from dnmr.fitting.treatments import fit_reference_lines, fit_with_trends, fit_without_trends
from dnmr.fitting.trends import ParameterTrend, StaticTrend, temperature_span
from dnmr.fitting.workers import single_threaded_blas
from dnmr.io.output import atomic_write_bytes, figure_file
from dnmr.io.progress import ProgressReport
from dnmr.model import Model
from dnmr.notebook import NotebookView


@dataclass
class SeriesFit(NotebookView):
    """The fit of a whole series.

    Attributes
    ----------
    series : Series
        What was fitted.
    outdir : Path
        Where the outputs are.
    outcomes : list of SpectrumOutcome
        One per spectrum, in the series file's order.
    trend : StaticTrend or None
        The temperature trends of the static parameters, when taken from the slow-exchange spectra.
    notes : list of str
        Remarks on the whole series.
    """

    series: Series
    outdir: Path
    outcomes: list[SpectrumOutcome]
    trend: StaticTrend | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def failures(self) -> list[SpectrumOutcome]:
        """The spectra that could not be fitted."""
        return [o for o in self.outcomes if not o.fitted]

    @property
    def exit_status(self) -> int:
        """0 when every spectrum was fitted, 2 when one failed for bad input, else 1."""
        if not self.failures:
            return 0
        return 2 if any(o.bad_input for o in self.failures) else 1

    def by_temperature(self) -> list[SpectrumOutcome]:
        """Outcomes from the coldest spectrum to the hottest."""
        return sorted(self.outcomes, key=lambda o: o.spectrum.temperature_k)

    def rate_rows(self) -> list[dict]:
        """The rows of rates.csv (one per spectrum and process) as dicts."""
        rows = []
        processes = self.series.model.process_names()
        for outcome in self.by_temperature():
            for i, process in enumerate(processes):
                rows.append(rate_row(outcome, i, process, self.series))
        return rows

    def report(self) -> str:
        """A table of the rates, bounds and failures."""
        fitted = sum(o.fitted for o in self.outcomes)
        width = max([12] + [len(p) for p in self.series.model.process_names()])
        lines = [f"{self.series.source.name}: {len(self.outcomes)} spectra, {fitted} fitted"
                 + (f", {len(self.failures)} failed" if self.failures else "") + f"; results in {self.outdir}", "",
                 f"  {'T / K':>7}  {'process':<{width}} {'rate':<48} {'red. chi2':>9}  flags"]
        for o in self.by_temperature():
            for i, process in enumerate(self.series.model.process_names()):
                text = o.fit.rates[i].describe().split("   ")[0] if o.fitted else "failed (see below)"
                chi = f"{o.fit.reduced_chi_square:9.3f}" if o.fitted else ""
                flags = ";".join((list(o.fit.flags) if o.fitted else ["failed"]) + list(o.spectrum.flags))
                lines.append(f"  {o.spectrum.temperature_k:>7.2f}  {process:<{width}} {text:<48} {chi:>9}  {flags}")
        for o in self.failures:
            lines.append(f"  failed: {o.spectrum.where} ({o.spectrum.file.name}): {o.error}")
        if self.trend is not None and self.trend.lines:
            lines += ["", "static parameters of the faster spectra from the slow-exchange trend:"]
            for name, line in self.trend.lines.items():
                lines.append(f"  {name}: {_trend_text(line)}")
        lines += self._posterior_lines(width)
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def _posterior_lines(self, width: int) -> list[str]:
        """The posterior rates of the report (when sampled)."""
        sampled = [o for o in self.by_temperature() if o.posterior is not None]
        if not sampled:
            return []
        lines = ["", "posterior of the rates (pairwise posterior figures figures/NNN_<name>_posterior.png):"]
        for o in sampled:
            t = f"  {o.spectrum.temperature_k:>7.2f}"
            if "error" in o.posterior:
                lines.append(f"{t}  not sampled: {o.posterior['error']}")
                continue
            short = (" [chain short for its autocorrelation time: run more steps]" if any(
                "emcee advises" in n for n in o.posterior["notes"]) else
                " [few effective samples: draw more]" if any("effective samples" in n for n in o.posterior["notes"]) else "")
            for i, process in enumerate(self.series.model.process_names()):
                q = o.posterior_rate(i)
                if q is not None:
                    lines.append(f"{t}  {process:<{width}} {_posterior_rate_text(q)}{short}")
        return lines

    def plot(self, figure=None):
        """Measured and fitted spectra of the series, stacked by temperature; returns the Figure."""
        from dnmr.reporting.plotting import plot_fit_stack

        done = [o for o in self.by_temperature() if o.fitted]
        return plot_fit_stack([o.fit for o in done], [f"{o.spectrum.temperature_k:g} K" for o in done],
                              figure=figure, title=f"{self.series.model.title or self.series.source.name}\n"
                                                   "measured (black) and fitted (red)")


def _trend_text(line: ParameterTrend) -> str:
    """One trend line in words."""
    a, b = line.coefficients
    sa = math.sqrt(line.covariance[0][0])
    span = f"from {temperature_span(line.temperatures_k)}"
    if line.constant:
        return f"{a:.6g} ± {sa:.2g} at every temperature ({span})" + (" as ln(p / p_first)" if line.kind == "van-t-hoff" else "")
    if line.kind == "van-t-hoff":
        return (f"ln(p / p_first) = {a:.3f} ± {sa:.3f} at {1 / line.x0:.1f} K, {b:+.4g} K x (1/T - 1/{1 / line.x0:.1f} K) "
                f"(van 't Hoff, {span})")
    return (f"{a:.6g} ± {sa:.2g} at {line.x0:.1f} K, {b:+.3g} ± {math.sqrt(line.covariance[1][1]):.2g} per K ({span}"
            + (f", reduced chi-square {line.reduced_chi_square:.2f}" if math.isfinite(line.reduced_chi_square) else "")
            + ")")


def _posterior_rate_text(q: Mapping) -> str:
    """One posterior rate (a PosteriorSummary as plain data) in words."""
    if q["kind"] == "upper-bound":
        return f"k < {q['bound95']:.3g} s^-1 (95 % upper bound)"
    if q["kind"] == "lower-bound":
        return f"k > {q['bound95']:.3g} s^-1 (95 % lower bound)"
    if q["kind"] == "undetermined":
        return "k not determined (the posterior is the prior)"
    return f"k = {q['median']:.3g} s^-1, 95 % interval {q['ci95'][0]:.3g} to {q['ci95'][1]:.3g}"


def _posterior_job(model: Model, fit_data: dict, curves: dict, settings: dict, path: Path) -> dict:
    """Sample the posterior of one fit (in a worker): its summary and the image file of its pairwise posterior
    figure (in the format of `path`'s suffix); never raises: a failure comes back as {"error": ...}."""
    from dnmr.fitting.posterior import sample_spectrum_posterior

    try:
        posterior = sample_spectrum_posterior(restored_fit(model, fit_data, curves), **settings)
        return {"summary": {**posterior.to_dict(), "figure": str(path)}, "image": rendered_and_closed(posterior.plot(), path)}
    except InputError as err:
        return {"error": str(err)}
    except Exception as err:  # one spectrum's sampling failing must not lose the others
        return {"error": f"{type(err).__name__}: {err}"}


def _sample_posteriors(result: SeriesFit, runner: FitRunner, settings: dict, hashes: Mapping) -> None:
    """Sample the posterior of every fitted spectrum (in the pool) and draw its pairwise posterior figure; on resume,
    a posterior stored for the same spectrum, model, fit and settings (and its figure) is reused."""
    from dnmr import __version__

    calls, where = [], []
    for i, o in enumerate(result.outcomes):
        if not o.fitted:
            continue
        figure = figure_file(result.outdir / "figures" / f"{i:03d}_{o.spectrum.file.stem}_posterior.png")
        stored = result.outdir / "fits" / f"{i:03d}_posterior.json"
        identity = {"spectrum": hashes[i], "model": hashes["model"], "stage": o.stage, "fit": o.fit.to_dict(),
                    "settings": settings, "dnmr": __version__}
        key = identity_key(identity)
        reused = _stored_posterior(stored, key, figure) if runner.resume else None
        if reused is not None:
            o.posterior = reused
            o.notes.append("posterior reused from the earlier run")
            continue
        calls.append((result.series.model, o.fit.to_dict(), o.fit.curves(), settings, figure))
        where.append((o, stored, key))
    for (o, stored, key), sampled in zip(where, runner.map(_posterior_job, calls, label="sampling posteriors")):
        if "error" in sampled:
            o.posterior = sampled
            o.notes.append(f"posterior not sampled: {sampled['error']}")
            continue
        atomic_write_bytes(Path(sampled["summary"]["figure"]), sampled["image"], overwrite=True)
        write_json(stored, {"key": key, "posterior": sampled["summary"]})  # what --resume reuses
        o.posterior = sampled["summary"]


def _stored_posterior(path: Path, key: str, figure: Path) -> dict | None:
    """The posterior summary stored at `path` under `key`, when its pairwise posterior figure is still there."""
    try:
        data = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return data.get("posterior") if data.get("key") == key and figure.exists() else None


def fit_series(
    series: Series | str | Path,
    outdir: str | Path,
    *,
    overwrite: bool = False,
    resume: bool = False,
    workers: int | None = None,
    progress: bool | None = None,
    posterior: Mapping | None = None,
    executor: futures.Executor | None = None,
    alongside: Callable[[Callable], None] | None = None,
) -> SeriesFit:
    """Fit every spectrum of a variable-temperature series and write the results to `outdir`.

    Parameters
    ----------
    series : Series or path
        The series (or its TOML file, read with :func:`dnmr.fitting.seriesfile.load_series`).
    outdir : str or Path
        Folder for rates.csv, results.json and the figures; refused if it exists, unless `overwrite`
        or `resume`.
    overwrite : bool
        Replace the results of an earlier run in `outdir`.
    resume : bool
        Continue an earlier run of the same series in `outdir`: completed fits whose inputs are unchanged
        are reused, the rest are fitted.
    workers : int, optional
        Worker processes (default one per core; 1 fits in this process).  With `executor`: how many tasks
        (fits, figures, posteriors) are handed to it at once (default: one per core of this machine).
    progress : bool, optional
        False: no progress report.  Otherwise progress on stderr: a live bar on a terminal, plain lines
        (``fitting spectra: 3 of 17 done (260 K), 12 s elapsed``) when stderr is a file or a pipe.
    posterior : mapping, optional
        Also sample the posterior of every fitted spectrum with these settings of
        :func:`dnmr.fitting.posterior.sample_spectrum_posterior` (method, draws, steps, walkers, burn, thin, seed;
        ``{}`` for the defaults: importance sampling from the fit, about `draws` lineshape evaluations per
        spectrum; emcee's ensemble, walkers x steps evaluations, where that is not reliable or asked for).  The summaries go into results.json and at the end of rates.csv, a pairwise posterior figure
        per spectrum into ``figures/NNN_<name>_posterior.png``.  On `resume`, a posterior stored for the
        same spectrum, model, fit and settings is reused.
    executor : concurrent.futures.Executor, optional
        Run the fits, figures and posteriors there instead of in worker processes of dnmr's own: a thread or
        process pool, a Dask client's ``get_executor()``...  It is left running.  The spectra are read
        here and sent with the tasks, and results come back as data written here, so its workers need
        dnmr (the same version) but not the files.  The results are the same as without it.
    alongside : callable, optional
        Called in this process once rates.csv is written, before the figures of the fits are drawn, with a function
        ``submit(function, *args)`` that starts a task ahead of them on the workers (:meth:`FitRunner.submit`) and
        returns its future: ``dnmr fit`` draws its report's figure there (:func:`dnmr.jobs.run_fit`).

    Returns
    -------
    SeriesFit
        With ``exit_status`` 0 (all fitted), 2 (a spectrum failed for bad input) or 1 (a fit failed).
    """
    if posterior is not None:
        from dnmr.posterior import require_emcee

        require_emcee(where="posterior")
    series = series if isinstance(series, Series) else load_series(series)
    outdir = Path(outdir)
    lock = prepare_results_folder(outdir, series, overwrite, resume)
    try:
        return _fit_into(series, outdir, resume, workers, progress, posterior, executor, alongside)
    finally:
        release_results_folder(lock)


def _fit_into(series: Series, outdir: Path, resume: bool, workers: int | None, progress: bool | None,
              posterior: Mapping | None, executor: futures.Executor | None,
              alongside: Callable[[Callable], None] | None) -> SeriesFit:
    """Fit the series into the prepared, locked `outdir` (see :func:`fit_series`)."""
    workers = max(1, min(workers or os.cpu_count() or 1, len(series.spectra)))
    hashes = {i: file_sha256(s.file) for i, s in enumerate(series.spectra)}
    hashes["model"] = file_sha256(series.model_file)
    runner = FitRunner(series, outdir, workers, ProgressReport(progress), resume, executor)
    try:
        with runner.progress, single_threaded_blas():
            references, notes = fit_reference_lines(series)
            trend = None
            if series.trended():
                outcomes, trend, more = fit_with_trends(series, runner, hashes, references)
                notes += more
            else:
                outcomes = fit_without_trends(series, runner, hashes, references)
            for i, o in outcomes.items():
                o.reference = references.get(i)
            result = SeriesFit(series, outdir, [outcomes[i] for i in range(len(series.spectra))], trend,
                               list(series.notes) + notes)
            if posterior is not None:
                _sample_posteriors(result, runner, dict(posterior), hashes)
            _write_outputs(result, runner, hashes, alongside)
    finally:
        runner.close()
    return result


def _write_outputs(result: SeriesFit, runner: FitRunner, hashes: Mapping, alongside: Callable | None) -> None:
    """rates.csv, the figures and results.json of `result` (see :mod:`dnmr.fitting.seriesoutput`): the tasks of
    `alongside` first, then the figures of the fits on the workers while this process draws the series figure."""
    outdir = result.outdir
    write_rates_csv(outdir / "rates.csv", result.rate_rows())
    if alongside is not None:
        alongside(lambda function, *args: runner.submit(function, *args, first=True))

    def meanwhile() -> None:
        if any(o.fitted for o in result.outcomes):
            save_and_close(result.plot(), outdir / "series_fits.png")

    draw_fit_figures(result.outcomes, result.series.model, outdir, runner, meanwhile)
    write_results_json(outdir / "results.json", result.series, result.outcomes, result.trend, result.notes,
                       result.exit_status, hashes)
