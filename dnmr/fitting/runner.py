"""Running the fits of a series: jobs, seeds from finished neighbours, stored fits and resume.

Spectra are fitted in parallel (one worker process per core), each seeded from spectra fitted before it
in a fixed order: the coldest and the hottest first, then the middle temperature, then the middles of
the halves, and so on; a spectrum takes its rates from an Eyring line through the rates of the spectra
of earlier rounds (ln(k/T) linear in 1/T), the other parameters from the nearest of them.  The seeds
never depend on which fit finishes first, so the same inputs give the same numbers, serial or parallel.
Worker processes (:func:`dnmr.fitting.workers.process_pool`) end with the process that started them.
Instead of them, any :class:`concurrent.futures.Executor` may run the fits (threads, a process pool, a Dask
cluster): the spectra are read here and sent with the fits, and the results come back as plain data, so
its workers need dnmr but not the files.

Each fit is stored as it finishes (``fits/NNN_<stage>.json``); ``resume`` reuses a stored fit only
when the spectrum file, its temperature, the options and the model are unchanged.  With worker processes (or
an executor), the figure of each fit is drawn there as soon as the fit is in, on a worker that no fit needs
(the fits go first), instead of all figures at the end (:meth:`FitRunner.early_figure`).
"""
from __future__ import annotations

import concurrent.futures as futures
import hashlib
import json
import math
import os
import threading
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from dnmr.errors import InputError
from dnmr.fitting.resultsfolder import STAGE_HELD, STAGE_MAIN, write_json
from dnmr.fitting.seriesfile import Series, SeriesSpectrum
from dnmr.fitting.spectrumfit import FitOptions, SpectrumFit, fit_spectrum
from dnmr.fitting.workers import in_worker, process_pool
from dnmr.io.output import figure_bytes, figure_file, json_ready
from dnmr.io.readers import read_spectrum
from dnmr.io.measured import MeasuredSpectrum
from dnmr.kinetics import eyring_barrier, eyring_rate
from dnmr.model import Model


@dataclass(frozen=True)
class FitJob:
    """One fit to do: a spectrum of the series at one stage, with the options of that stage.

    Attributes
    ----------
    index : int
        The spectrum's place in the series file.
    stage : str
        "main", "slow-exchange" or "held" (:data:`dnmr.fitting.resultsfolder.STAGES`).
    spectrum : SeriesSpectrum
        The spectrum.
    options : FitOptions
        The fit options of that stage.
    key : str
        SHA-256 of everything the fit depends on (what a stored fit is reused by).
    """

    index: int
    stage: str
    spectrum: SeriesSpectrum
    options: FitOptions
    key: str


def fit_job(series: Series, index: int, stage: str, options: FitOptions, hashes: Mapping) -> FitJob:
    """The job of spectrum `index` at `stage`; `hashes` holds the SHA-256 of every input (by index, and
    "model"), which with the options and the stage makes the key a stored fit is reused by."""
    s = series.spectra[index]
    from dnmr import __version__

    identity = {"spectrum": hashes[index], "file": str(s.file), "temperature_k": s.temperature_k,
                "frequency_mhz": s.frequency_mhz, "axis": s.axis, "options": options.to_dict(),
                "model": hashes["model"], "stage": stage, "dnmr": __version__}
    if s.processing is not None:
        identity["processing"] = s.processing
    return FitJob(index, stage, s, options, identity_key(identity))


def identity_key(identity: Mapping) -> str:
    """SHA-256 of everything a stored result depends on (what --resume compares)."""
    return hashlib.sha256(json.dumps(json_ready(identity), sort_keys=True).encode()).hexdigest()


def _read_job(model: Model, job: FitJob) -> MeasuredSpectrum | dict:
    """The spectrum of `job`, read here; a file that cannot be read comes back as the failed record."""
    s = job.spectrum
    try:
        return read_spectrum(s.file, frequency_mhz=s.frequency_mhz or model.spectrometer.frequency_mhz, axis=s.axis,
                             processing=s.processing)
    except InputError as err:
        return {"status": "failed", "bad_input": True, "error": str(err.located(source=s.file))}


def run_job(model: Model, job: FitJob, start: Mapping[str, float] | None, spectrum: MeasuredSpectrum) -> dict:
    """Fit one spectrum (in a worker); never raises: a failure comes back as data."""
    s = job.spectrum
    try:
        fit = fit_spectrum(spectrum, model, temperature_k=s.temperature_k, options=job.options, start=start)
        processing = spectrum.metadata.get("processing")
        if processing:  # the apodization's exact addition to every linewidth, said beside the fit
            fit.notes.extend(n for n in processing["notes"] if n not in fit.notes)
        return {"status": "fitted", "fit": fit.to_dict(), "curves": fit.curves(), "processing": processing}
    except InputError as err:
        return {"status": "failed", "bad_input": True, "error": str(err.located(source=s.file))}
    except Exception as err:  # a failed fit is reported for this spectrum; the others go on
        return {"status": "failed", "bad_input": False, "error": f"{type(err).__name__}: {err}"}


def restored_fit(model: Model, fit_data: dict, curves: dict) -> SpectrumFit:
    """A stored fit (plain data) as a SpectrumFit of `model` at the fit's temperature."""
    return SpectrumFit.from_dict(fit_data, curves, model.at_temperature(fit_data["temperature_k"]))


FINAL_STAGES = (STAGE_MAIN, STAGE_HELD)
"""Stages whose fits are always final (a slow-exchange fit may be fitted again with held values)."""


def fit_figure_path(outdir: Path, index: int, spectrum: SeriesSpectrum) -> Path:
    """Where the figure of the fit of spectrum `index` goes: ``figures/NNN_<name>.png`` (or the chosen format)."""
    return figure_file(outdir / "figures" / f"{index:03d}_{spectrum.file.stem}.png")


#: The fit figure each thread (of this process or a worker) drew last: the next fit is drawn into it in place.
_DRAWN = threading.local()


def fit_figure(model: Model, fit_data: dict, curves: dict, path: Path) -> bytes:
    """The image file (the format of `path`'s suffix) of the figure of a stored fit: data, fit and residuals.

    The figure is closed (pyplot forgets it) but kept by the thread, which draws its next fit into the same
    panels: a series makes them once per worker, not once per spectrum."""
    figure = restored_fit(model, fit_data, curves).plot(figure=getattr(_DRAWN, "figure", None))
    _DRAWN.figure = figure
    return figure_bytes(figure, path.suffix.lstrip("."), close=True, inside=True)


def fit_figure_or_reason(model: Model, fit_data: dict, curves: dict, path: Path) -> bytes | str:
    """:func:`fit_figure`, or why it could not be drawn (one line) when drawing fails."""
    try:
        return fit_figure(model, fit_data, curves, path)
    except Exception as exc:  # noqa: BLE001 (matplotlib and its font library raise many kinds)
        return f"{type(exc).__name__}: {exc}"


def _eyring_start(points: list[tuple[float, float]], temperature_k: float) -> float | None:
    """log10 k at `temperature_k` from (T, k) pairs: a line ln(k/T) in 1/T, or one barrier."""
    temps = np.array([t for t, _ in points])
    rates = np.array([k for _, k in points])
    if len(points) == 0:
        return None
    if len(set(temps.tolist())) < 2:
        barrier = float(np.mean(eyring_barrier(rates, temps)))
        return math.log10(eyring_rate(barrier, temperature_k))
    slope, intercept = np.polyfit(1.0 / temps, np.log(rates / temps), 1)
    return float((intercept + slope / temperature_k + math.log(temperature_k)) / math.log(10))


def _start_values(target: SeriesSpectrum, finished: Sequence[tuple[SeriesSpectrum, dict]]) -> dict[str, float]:
    """Starting values for `target` from finished fits: Eyring rates, the rest from the nearest one."""
    if not finished:
        return {}
    nearest = min(finished, key=lambda f: abs(f[0].temperature_k - target.temperature_k))[1]
    start = {name: p["estimate"] for name, p in nearest["parameters"].items()
             if not name.startswith(("log10_rate_", "amplitude", "baseline_"))}
    rate_names = [n for n in nearest["parameters"] if n.startswith("log10_rate_")]  # in process order
    for i, name in enumerate(rate_names):
        points = [(s.temperature_k, f["rates"][i]["rate_per_s"]) for s, f in finished
                  if f["rates"][i]["status"] in ("determined", "interval")]
        value = _eyring_start(points, target.temperature_k)
        if value is not None:
            start[name] = value
    return start


def _seed_levels(series: Series, indices: Sequence[int]) -> dict[int, int]:
    """The level of each spectrum in a fixed seeding order: the coldest and hottest first (level 0), then
    the middle one in temperature, then the middles of the halves, and so on.  A spectrum is seeded only
    from the spectra of lower levels, so its starting values, and hence its fit, do not depend on which
    fits happen to finish first: serial and parallel runs give the same numbers."""
    order = sorted(indices, key=lambda i: (series.spectra[i].temperature_k, i))
    levels = {i: 0 for i in order[:1] + order[-1:]}
    spans, depth = [(0, len(order) - 1)], 1
    while spans:
        halves = []
        for lo, hi in spans:
            if hi - lo >= 2:
                mid = (lo + hi) // 2
                levels[order[mid]] = depth
                halves += [(lo, mid), (mid, hi)]
        spans, depth = halves, depth + 1
    return levels


@dataclass
class SpectrumOutcome:
    """What became of one spectrum of a series.

    Attributes
    ----------
    spectrum : SeriesSpectrum
        The spectrum.
    fit : SpectrumFit or None
        The final fit (None when it failed).
    error : str
        Why it failed ("" when fitted).
    bad_input : bool
        True when the failure was bad input (an unreadable file...).
    stage : str
        Which fit is final: "main" (no trends), "slow-exchange" (static parameters free) or "held"
        (static parameters held at their trends).
    reused : bool
        True when a completed fit was taken over from an earlier run (resume).
    notes : list of str
        Remarks of the series fit on this spectrum (shift trend used...).
    treatment : dict of str to str
        How "shifts", "couplings", "populations" and "linewidth" were treated in the final fit:
        "fitted", "trend", "model", "reference-line" or "user".
    reference : dict or None
        The fit of the reference line (width, its error, flags) when the series names one.
    flags : list of str
        Remarks of the series fit on this spectrum: ``trend-<quantity>`` and ``reference-line-linewidth``
        (values held from elsewhere), ``trend-one-temperature`` (held at values from a single
        slow-exchange temperature, whose drift with temperature is unknown and not in the error).
    shared_rate_errors : list of dict
        Per process, the parts of the rate's error (log10 k) shared with other spectra through the
        slow-exchange trends, by source (:meth:`dnmr.fitting.trends.StaticTrend.shared_errors`); empty
        when the rate depends on no trend.
    """

    spectrum: SeriesSpectrum
    fit: SpectrumFit | None
    error: str = ""
    bad_input: bool = False
    stage: str = STAGE_MAIN
    reused: bool = False
    notes: list[str] = field(default_factory=list)
    posterior: dict | None = None
    processing: dict | None = None
    treatment: dict[str, str] = field(default_factory=dict)
    reference: dict | None = None
    flags: list[str] = field(default_factory=list)
    shared_rate_errors: list[dict[str, float]] = field(default_factory=list)

    def posterior_rate(self, i: int) -> dict | None:
        """The posterior summary of the rate (s^-1) of process `i`, when sampled and that rate was free."""
        if not self.fitted or not self.posterior or "quantities" not in self.posterior:
            return None
        names = [n for n in self.fit.lmfit_parameters if n.startswith("log10_rate_")]  # in process order
        return self.posterior["quantities"].get("rate_per_s_" + names[i][len("log10_rate_"):])

    @property
    def fitted(self) -> bool:
        """True when the spectrum was fitted."""
        return self.fit is not None


def outcome_from_record(series: Series, index: int, record: dict, stage: str) -> SpectrumOutcome:
    """What became of spectrum `index` at `stage`, from the record :meth:`FitRunner.run` gave for it."""
    s = series.spectra[index]
    if record["status"] != "fitted":
        return SpectrumOutcome(s, None, record["error"], record.get("bad_input", False), stage)
    fit = SpectrumFit.from_dict(record["fit"], record["curves"], series.model.at_temperature(s.temperature_k))
    return SpectrumOutcome(s, fit, stage=stage, reused=record.get("reused", False), processing=record.get("processing"))


class FitRunner:
    """Runs fits in a process pool (or in this process, or on an executor given), seeding each from
    finished neighbours, storing every result as it finishes and reusing stored ones on resume.

    Parameters
    ----------
    series : Series
        The series whose spectra are fitted.
    outdir : Path
        The results folder (stored fits go to its ``fits/``).
    workers : int
        Worker processes; 1 runs every fit in this process.  With `executor`: fits handed to it at once.
    progress : ProgressReport
        Where progress is reported (:class:`dnmr.io.progress.ProgressReport`).
    resume : bool
        Reuse fits stored by an earlier run with the same inputs.
    executor : concurrent.futures.Executor, optional
        Runs the fits instead of worker processes of the runner's own (it is left running by `close`).
    """

    def __init__(self, series: Series, outdir: Path, workers: int, progress, resume: bool,
                 executor: futures.Executor | None = None):
        self.series, self.outdir, self.workers, self.progress, self.resume = series, outdir, workers, progress, resume
        if executor is None and workers > 1:  # the workers fork from here: they draw without importing matplotlib
            import matplotlib.pyplot  # noqa: F401  (this process draws the series figure with it anyway)
        self.own_pool = process_pool(workers) if executor is None and workers > 1 else None
        self.pool = executor if executor is not None else self.own_pool
        self.caller = os.getpid()
        self.figures: dict[tuple[int, str], futures.Future] = {}
        self.queued: dict[tuple[int, str], tuple] = {}  # figures waiting for a worker that no fit needs
        self.drawn_from: dict[tuple[int, str], str] = {}  # the fit each figure handed out shows (canonical JSON)

    def close(self) -> None:
        """End the worker processes of its own (waiting for those running; none is started after)."""
        if self.own_pool is not None:
            self.own_pool.shutdown(wait=True, cancel_futures=True)

    def early_figure(self, index: int, stage: str, fit_data: dict) -> futures.Future | None:
        """The figure of spectrum `index`'s final fit at `stage` (`fit_data`: :meth:`SpectrumFit.to_dict`) as a worker
        draws it, queued while the other fits ran (its future: the image file, or an exception when drawing failed),
        or None when none was (no workers, a fit reused from an earlier run) or when it shows another fit than
        `fit_data` (the series changed its rates after)."""
        if (index, stage) in self.queued:
            self.flush()
        future = self.figures.pop((index, stage), None)
        if future is None or self.drawn_from.pop((index, stage), None) != _canonical(fit_data):
            return None
        return future

    def _draw_early(self, job: FitJob, record: dict, final: Callable[[int, dict], dict] | None) -> None:
        """Queue the figure of a fit for a worker that no fit needs (off the critical path of the fits): of the
        fit `final` makes of the record (its final form), else of the record's.  A slow-exchange fit's figure is
        drawn too: it is used when that fit stays final, which is only known after the slow-exchange run, and
        forgotten when the spectrum is fitted again (:meth:`_forget`)."""
        if self.pool is None or record.get("status") != "fitted":
            return
        fit_data = record["fit"] if final is None else final(job.index, record)
        path = fit_figure_path(self.outdir, job.index, job.spectrum)
        self.drawn_from[job.index, job.stage] = _canonical(fit_data)
        self.queued[job.index, job.stage] = (fit_figure, self.series.model, fit_data, record["curves"], path)

    def _forget(self, indices: set[int]) -> None:
        """Forget the figures of earlier fits of the spectra `indices`, which are fitted again."""
        for key in [k for k in {*self.queued, *self.figures} if k[0] in indices]:
            self.queued.pop(key, None)
            self.drawn_from.pop(key, None)
            future = self.figures.pop(key, None)
            if future is not None:
                future.cancel()

    def _feed(self, busy: int) -> list[futures.Future]:
        """Hand queued figures (of final fits first) to the workers left idle by the `busy` fits running; returns
        the figures being drawn."""
        drawing = [f for f in self.figures.values() if not f.done()]
        while self.queued and busy + len(drawing) < self.workers:
            key = min(self.queued, key=lambda k: k[1] not in FINAL_STAGES)  # the first final one, else the first
            drawing.append(self._submit_figure(key))
        return drawing

    def flush(self) -> None:
        """Hand every figure still waiting for an idle worker to the pool (to draw while this process works on)."""
        while self.queued:
            self._submit_figure(next(iter(self.queued)))

    def _submit_figure(self, key: tuple[int, str]) -> futures.Future:
        self.figures[key] = self.pool.submit(in_worker, self.caller, *self.queued.pop(key))
        return self.figures[key]

    def _stored(self, index: int, stage: str) -> Path:
        return self.outdir / "fits" / f"{index:03d}_{stage}.json"

    def _reuse(self, job: FitJob) -> dict | None:
        path = self._stored(job.index, job.stage)
        if not self.resume or not path.exists():
            return None
        try:
            data = json.loads(path.read_text())
        except (OSError, ValueError):
            return None
        return data if data.get("key") == job.key and data.get("status") == "fitted" else None

    def _write(self, record: dict) -> None:
        """Store a fit's record (``fits/NNN_<stage>.json``), what --resume reuses."""
        write_json(self._stored(record["index"], record["stage"]), record)

    def run(self, jobs: list[FitJob], label: str, seeded: bool = True,
            final: Callable[[int, dict], dict] | None = None) -> dict[int, dict]:
        """Fit every job; returns the stored record of each by spectrum index.  Unless `seeded` is False,
        each fit starts from the fits of lower levels (:func:`_seed_levels`).  `final(index, record)`, when
        given, is the final fit (:meth:`SpectrumFit.to_dict`) the series makes of a record, which the figure
        drawn as the fit comes in shows."""
        return _Stage(self, jobs, label, seeded, final).run()

    def submit(self, function: Callable, *args, first: bool = False) -> futures.Future:
        """Start `function(*args)` in the pool, after the figures still waiting for an idle worker or, `first`, ahead
        of them (or run it here: a future already done); its future."""
        if self.pool is not None:
            if not first:
                self.flush()
            return self.pool.submit(in_worker, self.caller, function, *args)
        future = futures.Future()
        try:
            future.set_result(function(*args))
        except Exception as exc:  # raised where the result is asked for, as from a worker
            future.set_exception(exc)
        return future

    def map(self, function: Callable, calls: list[tuple], label: str | None = None) -> list:
        """Run `function(*args)` for every tuple of `calls` in the pool (or here); with a `label`, a
        progress bar counts the calls done."""
        task = self.progress.add_task(label, total=len(calls)) if label else None

        def advance() -> None:
            if task is not None:
                self.progress.advance(task)
                self.progress.refresh()

        if self.pool is None:
            out = []
            for args in calls:
                out.append(function(*args))
                advance()
            return out
        pending = [self.submit(function, *args) for args in calls]
        for _ in futures.as_completed(pending):
            advance()
        return [f.result() for f in pending]


class _Stage:
    """The fits of one :meth:`FitRunner.run`: those waiting for the fits they are seeded from, those running, and
    the records of those done.

    A spectrum is started as soon as every spectrum of a lower level (:func:`_seed_levels`) is done, the
    coldest first.  With workers, the records of the fits just done are written to disk and their figures queued
    one by one after the next fits are handed out, each fit finished meanwhile taken in and its successors started
    in between; the figures go to the workers that no fit needs (:meth:`FitRunner.early_figure`)."""

    def __init__(self, runner: FitRunner, jobs: list[FitJob], label: str, seeded: bool,
                 final: Callable[[int, dict], dict] | None):
        self.runner, self.spectra, self.final = runner, runner.series.spectra, final
        self.records: dict[int, dict] = {}
        self.task = runner.progress.add_task(label, total=len(jobs))
        todo = []
        for job in jobs:
            reused = runner._reuse(job)
            if reused is not None:
                self.records[job.index] = {**reused, "reused": True}
                runner.progress.advance(self.task, f"{job.spectrum.temperature_k:g} K, from the earlier run")
            else:
                todo.append(job)
        runner.progress.refresh()
        runner._forget({j.index for j in jobs})
        self.jobs = {j.index: j for j in todo}
        self.levels = _seed_levels(runner.series, [j.index for j in jobs]) if seeded else {j.index: 0 for j in jobs}
        self.waiting = sorted(self.jobs, key=lambda i: (self.levels[i], self.spectra[i].temperature_k, i))
        self.running: dict[int, futures.Future | dict] = {}
        self.unsettled: list[FitJob] = []

    def run(self) -> dict[int, dict]:
        """Fit every job waiting; the records by spectrum index."""
        runner = self.runner
        while self.waiting or self.running or self.unsettled:
            self.collect_finished()
            for index in [i for i in self.waiting if self.ready(i)][: max(0, runner.workers - len(self.running))]:
                self.submit(index)
            if self.unsettled:  # the fits done, one by one, looking for fits to start in between
                self.settle(self.unsettled.pop(0))
            elif self.running and runner.pool is not None:
                drawing = runner._feed(len(self.running))  # a figure on each worker that no fit needs
                futures.wait(list(self.running.values()) + drawing, return_when=futures.FIRST_COMPLETED)
        return self.records

    def collect_finished(self) -> None:
        """Take in every fit finished (without waiting for any)."""
        for index in [i for i, f in self.running.items() if isinstance(f, dict) or f.done()]:
            self.collect(index, _future_result(self.running.pop(index)))

    def ready(self, index: int) -> bool:
        """Whether every spectrum of a lower level than `index`'s has been fitted."""
        return all(j in self.records for j in self.levels if self.levels[j] < self.levels[index])

    def submit(self, index: int) -> None:
        """Start the fit of spectrum `index` (here without workers), seeded from the fits of lower levels."""
        runner, job = self.runner, self.jobs[index]
        self.waiting.remove(index)
        done = [(self.spectra[j], self.records[j]["fit"]) for j in sorted(self.levels)
                if self.levels[j] < self.levels[index] and self.records[j]["status"] == "fitted"]
        start = _start_values(self.spectra[index], done)
        spectrum = _read_job(runner.series.model, job)
        if isinstance(spectrum, dict):  # unreadable: failed here, nothing to send
            self.collect(index, spectrum)
        elif runner.pool is None:
            self.running[index] = run_job(runner.series.model, job, start, spectrum)
        else:
            self.running[index] = runner.pool.submit(in_worker, runner.caller, run_job, runner.series.model, job,
                                                     start, spectrum)

    def collect(self, index: int, result: dict) -> None:
        """Take in the result of spectrum `index`'s fit (to be stored, its figure queued and counted done:
        :meth:`settle`)."""
        job = self.jobs[index]
        record = {"key": job.key, "index": job.index, "stage": job.stage, "file": str(job.spectrum.file),
                  "temperature_k": job.spectrum.temperature_k, **result}
        self.records[index] = record
        self.unsettled.append(job)

    def settle(self, job: FitJob) -> None:
        """Queue the figure of a fit taken in (handed at once to a worker that no fit needs), store its record and
        count it done."""
        self.runner._draw_early(job, self.records[job.index], self.final)
        self.runner._feed(len(self.running))
        self.runner._write(self.records[job.index])
        self.runner.progress.advance(self.task, f"{job.spectrum.temperature_k:g} K")
        self.runner.progress.refresh()


def _canonical(fit_data: dict) -> str:
    """A fit as plain data (:meth:`SpectrumFit.to_dict`) in one canonical text: equal texts, equal figures."""
    return json.dumps(json_ready(fit_data), sort_keys=True)


def _future_result(future: futures.Future | dict) -> dict:
    """The record a fit's future gives (a fit done in this process is its record already)."""
    if isinstance(future, dict):
        return future
    try:
        return future.result()
    except Exception as err:  # the worker process died (out of memory, killed...)
        return {"status": "failed", "bad_input": False, "error": f"worker failed: {type(err).__name__}: {err}"}

