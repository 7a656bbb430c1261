"""Fitting speed, measured in one run (not a test); every goal of issue 18 items 1 to 3 is printed beside its
measured figure, with the machine's load (1-minute load average) before and after each section.

(a) single-spectrum fits: lineshape evaluations, exact Jacobians and CPU time per fit (coarse scan, refinement
    and chi-square profile included) for a two-site spectrum near coalescence, a slow-limit spectrum that
    only bounds the rate (its profile runs out to the limit), and demo spectra (two rotamers of a coupled AB
    pair, 3276 points; a rate with an error bar, a 68 % interval and a lower bound).  "Before" is the code
    of BASELINE_COMMIT (the fits before the exact Jacobian and the prepared models), exported from git and run
    in a subprocess that takes turns with this one fit by fit, so that both see the same load; goal: this
    code's fit in <= 1/3 of the time before, with the same answer (the largest difference of log10 k, in
    standard errors, or of the bounds);
(d) the posterior of demo spectra (default settings: importance sampling from the fit, 4000 draws): CPU
    and wall time per spectrum (goal <= 10 s), effective samples and the Pareto shape of the weights, against
    emcee's ensemble at its default 32 walkers x 4000 steps (timed over 200 steps and scaled);
(b) the bundled demo series (every spectrum of it; shifts from the slow-exchange trend, populations free) as
    ``dnmr fit`` runs it (dnmr.jobs.run_fit: fits, figures, results files and report.html), with one worker and
    with one per core, against the sum of the single fits of its spectra through the API (fit_spectrum with the
    same region and populations, one after the other): goals series <= 1.3 x that sum and a parallel speed-up
    >= 1.8 on 2 cores (wall-clock time; the three are run in turn SERIES_ROUNDS times and the best of each compared);
(c) the global fit of that series (dH, dS and shifts linear in T, with the demo calibration) from (b)'s
    two-step result: residual and Jacobian evaluations, wall time with one worker and one per core, speed-up
    (the dense trust-region solve, an SVD of the 55 600 x 96 Jacobian per step, runs in this process).
BLAS runs on one thread during fits (dnmr.fitting.workers.single_threaded_blas, needs threadpoolctl); other load
on the machine lowers the parallel figure and raises every time (CPU times less so; the ratios are of one run).

With --timeline, (b) is followed by two more runs, with one worker and with one per core, timed part by part: the
wall-clock start and end of every task on each worker (fits, figures) and of this process's parts (before the first fit, each
stage of fits, the outputs after them: the series figure and the report's figures drawn while the workers draw
those of the fits, report.html), with the CPU time of each, the CPU time of each kind of task with one worker and
with one per core, and how long each worker stood idle.

Run:  python benchmarks/fit_speed.py            (everything)
      python benchmarks/fit_speed.py --single   ((a) and (d) only)
      python benchmarks/fit_speed.py --series   ((b) only)
      python benchmarks/fit_speed.py --series --timeline   ((b) and its timeline)
"""
from __future__ import annotations

import io
import json
import math
import os
import shutil
import subprocess
import sys
import tarfile
import tempfile
import time
from pathlib import Path

import numpy as np

import dnmr
from dnmr.fitting.spectrumfit import fit_spectrum
from dnmr.fitting.workers import single_threaded_blas
from dnmr.io.measured import MeasuredSpectrum
from dnmr.io.readers import read_spectrum

DEMO = Path(dnmr.__file__).parent / "data" / "demo"
BASELINE_COMMIT = "9edcebd"
"""The code before the exact Jacobian and the prepared models: the parent of the commit that brought the exact
lineshape derivatives (what issue 18 item 2 calls today's time)."""
REPEATS = 5
SLOW_EXCHANGE_BELOW_K = 276.0
"""The demo series' slow-exchange temperature (K): its spectra below it are fitted with free shifts."""
"""Fits of each case by each code (the best CPU time counts)."""


def two_site(rate_per_s: float) -> dnmr.Model:
    states = (dnmr.State("a", {"H": 2.9}, linewidth_hz=1.2, population=1), dnmr.State("b", {"H": 3.1}, linewidth_hz=1.2,
                                                                                   population=1))
    return dnmr.Model(dnmr.Spectrometer(400.0), states, (dnmr.Exchange("a", "b", rate_per_s=rate_per_s),))


def synthetic(rate_per_s: float, seed: int) -> MeasuredSpectrum:
    ppm = np.linspace(2.5, 3.5, 2000)
    clean = 50.0 * dnmr.simulate(two_site(rate_per_s), ppm).intensity
    return MeasuredSpectrum(ppm, clean + np.random.default_rng(seed).normal(0, 0.05, ppm.size), 400.0, "synthetic", "text")


def cases() -> dict[str, tuple]:
    """The fits of (a) by label: (spectrum, model, options); only calls that the baseline's code has too."""
    out = {"two-site, k = 120 s^-1 (near coalescence)": (synthetic(120.0, 1), two_site(1e4), {"region_ppm": (2.7, 3.3)}),
           "two-site, k = 0.01 s^-1 (slow limit: a bound)": (synthetic(0.01, 2), two_site(1e4), {"region_ppm": (2.7, 3.3)})}
    model = dnmr.load_model(DEMO / "model.toml")
    for t in (310, 250, 340):
        out[f"demo DX-7 at {t} K (2 rotamers, AB, 3276 pts)"] = (
            read_spectrum(DEMO / "spectra" / f"dx7_{t}K.txt"), model,
            {"temperature_k": float(t), "region_ppm": (4.15, 4.95), "populations": "free"})
    return out


def timed_fit(case: tuple) -> tuple[float, object]:
    """CPU time (s) of one fit of `case`, and the fit."""
    spectrum, model, options = case
    t0 = time.process_time()
    fit = fit_spectrum(spectrum, model, **options)
    return time.process_time() - t0, fit


def rate_record(fit) -> tuple:
    """(log10 k, its standard error, lower and upper bound in s^-1, status) of the first rate, from either code."""
    r = fit.rates[0]
    pick = lambda *names: next((float(getattr(r, n)) for n in names if getattr(r, n, None) is not None), math.nan)  # noqa: E731
    return (pick("log10_rate", "log10_k"), pick("log10_rate_stderr", "log10_stderr"), pick("rate_lower"),
            pick("rate_upper"), r.status)


def baseline_worker() -> None:
    """The subprocess of (a): fits the case named on each line of stdin with the code on its path and answers
    with the CPU time, the evaluations and the rate."""
    known = cases()
    with single_threaded_blas():
        for line in sys.stdin:
            seconds, fit = timed_fit(known[line.strip()])
            print(json.dumps([seconds, fit.function_evaluations, rate_record(fit)]), flush=True)


def start_baseline(folder: Path) -> subprocess.Popen | str:
    """The baseline's code exported from git into `folder` and its worker started, or why it could not be."""
    root = Path(__file__).resolve().parent.parent
    try:
        archive = subprocess.run(["git", "-C", str(root), "archive", "--format=tar", BASELINE_COMMIT, "dnmr"],
                                 capture_output=True, check=True).stdout
    except (OSError, subprocess.CalledProcessError) as err:
        return f"git archive {BASELINE_COMMIT} failed ({err})"
    with tarfile.open(fileobj=io.BytesIO(archive)) as tar:
        tar.extractall(folder)
    env = {**os.environ, "PYTHONPATH": str(folder)}
    return subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--baseline-worker"], cwd=folder, env=env,
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)


def difference(a: tuple, b: tuple) -> str:
    """How far two fits' estimates of one rate lie apart: in standard errors, or the bounds' ratio."""
    if a[4] == "determined" or (np.isfinite(a[1]) and a[1] > 0 and a[4] == "interval"):
        return f"log10 k differs by {abs(a[0] - b[0]) / a[1]:.1e} sd"
    ends = [(x, y) for x, y in ((a[2], b[2]), (a[3], b[3])) if np.isfinite(x) and np.isfinite(y)]
    return ("bounds differ by " + (", ".join(f"{abs(x / y - 1):.1%}" for x, y in ends) or "(none)")
            + f" (now one-sided 95 %; the code of {BASELINE_COMMIT} bounded at the 68 % interval's end)")


def load() -> str:
    """The machine's 1-minute load average, as text."""
    return f"load {os.getloadavg()[0]:.1f}"


def single_fits() -> None:
    """(a): the single-spectrum fits, this code and the baseline's taking turns."""
    known = cases()
    folder = Path(tempfile.mkdtemp(prefix="dnmr-baseline-"))
    worker = start_baseline(folder)
    print(f"(a) single-spectrum fits (best of {REPEATS}, CPU time): evaluations+Jacobians and seconds per fit, "
          f"this code against the code of {BASELINE_COMMIT} (before); {load()}")
    try:
        for label, case in known.items():
            best, before, fit, old = math.inf, math.inf, None, None
            for _ in range(REPEATS):
                seconds, fit = timed_fit(case)
                best = min(best, seconds)
                if not isinstance(worker, str):
                    worker.stdin.write(label + "\n")
                    worker.stdin.flush()
                    old = json.loads(worker.stdout.readline())
                    before = min(before, old[0])
            text = f"{fit.function_evaluations:4d}+{fit.jacobian_evaluations:<3d} {best:6.3f} s"
            if old is None:
                print(f"  {label:<46} {fit.rates[0].status:<12} {text}  (before: {worker})")
                continue
            print(f"  {label:<46} {fit.rates[0].status:<12} {text}  before: {old[1]:4d} {before:6.3f} s  "
                  f"ratio {best / before:.2f} (goal <= 0.33); {difference(rate_record(fit), old[2])}")
    finally:
        if not isinstance(worker, str):
            worker.stdin.close()
            worker.wait()
        shutil.rmtree(folder)
    print(f"  ({load()})")


def posteriors() -> None:
    """(d): posteriors of demo spectra, importance sampling against the ensemble."""
    from dnmr.fitting.posterior import sample_spectrum_posterior

    print("(d) posteriors of demo spectra: default (importance sampling, 4000 draws) against emcee's ensemble"
          f" (32 walkers x 4000 steps, scaled from 200); {load()}")
    model = dnmr.load_model(DEMO / "model.toml")
    for t in (250, 290, 310, 340):
        fit = fit_spectrum(read_spectrum(DEMO / "spectra" / f"dx7_{t}K.txt"), model, temperature_k=float(t),
                           region_ppm=(4.15, 4.95), populations="free")
        wall, cpu = time.perf_counter(), time.process_time()
        post = sample_spectrum_posterior(fit)
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
        ensemble = time.process_time()
        sample_spectrum_posterior(fit, method="emcee", steps=200)
        ensemble = (time.process_time() - ensemble) * 4000 / 200
        info = post.importance or {"effective_samples": math.nan, "pareto_k": math.nan}
        print(f"  {t} K {fit.rate(0).status:<12} {post.method:<10} {cpu:5.1f} s CPU, {wall:5.1f} s wall (goal <= 10 s); "
              f"{info['effective_samples']:6.0f} effective samples, Pareto shape {info['pareto_k']:5.2f}; "
              f"ensemble about {ensemble:5.0f} s CPU")


def demo_series(folder: Path) -> Path:
    """The bundled demo series with the options it needs, pointing at the bundled files (read only)."""
    from dnmr.fitting.seriesfile import load_series

    lines = [f'model = "{DEMO / "model.toml"}"', "[fit]", "region_ppm = [4.15, 4.95]",
             'shifts = "slow-exchange-trend"', 'populations = "free"', f"slow_exchange_below_k = {SLOW_EXCHANGE_BELOW_K}"]
    for spectrum in load_series(DEMO / "series.toml").spectra:
        lines += ["[[spectrum]]", f'file = "{spectrum.file}"', f"temperature_k = {spectrum.temperature_k}"]
    path = folder / "series.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def cpu_seconds() -> float:
    """CPU time (s) of this process and of its finished worker processes."""
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def single_fits_of_series(series_file: Path) -> tuple[float, float]:
    """Wall and CPU time (s) of the single fits of every spectrum of the series through the API, one after the other:
    shifts free below the series' slow-exchange temperature (as the series fits them), the model's above."""
    from dnmr.fitting.seriesfile import load_series

    series = load_series(series_file)
    t0, c0 = time.perf_counter(), cpu_seconds()
    for s in series.spectra:
        shifts = "free" if s.temperature_k < SLOW_EXCHANGE_BELOW_K else "fixed"
        fit_spectrum(read_spectrum(s.file), series.model, temperature_k=s.temperature_k, region_ppm=(4.15, 4.95),
                     populations="free", shifts=shifts)
    return time.perf_counter() - t0, cpu_seconds() - c0


def compute_task(repeats: int = 40) -> float:
    """Wall time (s) of a fixed task of pure computation on one BLAS thread (eigendecompositions of a complex
    120 x 120 matrix): the machine's own yardstick for (b)'s speed-up."""
    rng = np.random.default_rng(0)
    matrix = rng.standard_normal((120, 120)) + 1j * rng.standard_normal((120, 120))
    with single_threaded_blas():
        t0 = time.perf_counter()
        for _ in range(repeats):
            np.linalg.eig(matrix)
        return time.perf_counter() - t0


def machine_speed_up(cores: int) -> tuple[float, float]:
    """Wall time (s) of `cores` compute tasks one after the other and all at once in `cores` processes: the
    speed-up this machine gives to work with no serial part at all, the ceiling of (b)'s."""
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(cores) as pool:
        list(pool.map(compute_task, [2] * cores))  # the processes started
        t0 = time.perf_counter()
        for _ in range(cores):
            compute_task()
        serial = time.perf_counter() - t0
        t0 = time.perf_counter()
        list(pool.map(compute_task, [40] * cores))
        return serial, time.perf_counter() - t0


SERIES_ROUNDS = 3
"""(b) runs the single fits, one worker and one per core in turn this many times and compares the best of each:
the shared machine's speed swings by up to 1.5x from one run to the next (CPU time too), the best is the run
least slowed by others."""


def series_fits(folder: Path, cores: int):
    """(b): the demo series as `dnmr fit` runs it, with one worker and with `cores`; returns its two-step result."""
    from dnmr.fitting.globalresult import TWO_STEP_FOLDER
    from dnmr.jobs import run_fit

    series = demo_series(folder)
    print(f"(b) demo series as dnmr fit runs it (fits, figures, results, report.html), 1 and {cores} workers, against "
          f"the sum of its single fits (wall time), best of {SERIES_ROUNDS} rounds taken in turn; {load()}")
    best: dict = {}
    for round_ in range(SERIES_ROUNDS):
        runs = {"singles": single_fits_of_series(series)}
        runs["machine serial"], runs["machine parallel"] = ((t,) for t in machine_speed_up(cores))
        for workers in (1, cores):
            t0, c0 = time.perf_counter(), cpu_seconds()
            job = run_fit(series, folder / f"out{workers}-{round_}" / TWO_STEP_FOLDER, workers=workers, progress=False)
            runs[workers] = (time.perf_counter() - t0, cpu_seconds() - c0)
        print(f"  round {round_ + 1}: single fits {runs['singles'][0]:.1f} s, 1 worker {runs[1][0]:.1f} s, "
              f"{cores} workers {runs[cores][0]:.1f} s (wall); the machine's speed-up of pure computation "
              f"{runs['machine serial'][0] / runs['machine parallel'][0]:.2f}")
        best = {key: min(best.get(key, value), value) for key, value in runs.items()}
    (singles, singles_cpu), result = best["singles"], job.fit
    fitted = sum(o.fitted for o in result.outcomes)
    for workers in (1, cores):
        wall, cpu = best[workers]
        print(f"  {workers} worker(s): {wall:6.1f} s wall, {wall / singles:.2f} x the single fits' {singles:.1f} s "
              f"({singles / len(result.outcomes):.2f} s per spectrum; goal <= 1.3 x); CPU {cpu:.1f} s, "
              f"{cpu / singles_cpu:.2f} x their {singles_cpu:.1f} s")
    print(f"  {fitted} of {len(result.outcomes)} fitted, report {'written' if job.report_file else job.report_problem}")
    machine = best["machine serial"][0] / best["machine parallel"][0]
    print(f"  speed-up {best[1][0] / best[cores][0]:.2f} (goal >= 1.8 on 2 cores; {cores} cores here; the machine's "
          f"own for pure computation, best times, {machine:.2f}); {load()}")
    return series, result


TIMELINE = Path(tempfile.gettempdir()) / f"dnmr-timeline-{os.getpid()}.jsonl"
"""Where the timeline's parts are noted, one JSON line each, by this process and by the workers it forks."""
REAL: dict = {}
"""The functions of dnmr the timeline wraps, as they were (the workers fork after they are wrapped and keep this)."""


def noted(what: str, function, *args, **kwargs):
    """`function(*args, **kwargs)`, noted in TIMELINE: its process, wall-clock start and end, CPU time (s)."""
    start, cpu = time.time(), time.process_time()
    try:
        return function(*args, **kwargs)
    finally:
        with open(TIMELINE, "a") as fh:
            fh.write(json.dumps([os.getpid(), what, start, time.time(), time.process_time() - cpu]) + "\n")


def noted_fit(model, job, *args):
    """dnmr.fitting.runner.run_job, noted (in a worker: pickled by reference to this module)."""
    return noted(f"fit {job.stage} {job.spectrum.temperature_k:g} K", REAL["run_job"], model, job, *args)


def noted_figure(model, fit_data: dict, curves: dict, path: Path):
    """dnmr.fitting.runner.fit_figure, noted."""
    return noted(f"figure {path.name}", REAL["fit_figure"], model, fit_data, curves, path)


def noted_eyring_figures(eyring, image_format: str):
    """dnmr.reporting.seriesreport.eyring_figures (the report's Eyring figure), noted."""
    return noted("figure eyring (report)", REAL["eyring_figures"], eyring, image_format)


def wrapped() -> list[tuple]:
    """(module, name, replacement) of every function the timeline notes."""
    from dnmr.fitting import runner, series
    from dnmr.reporting import report

    run = REAL.setdefault("run", runner.FitRunner.run)
    return [(runner, "run_job", noted_fit), (runner, "fit_figure", noted_figure),
            (runner.FitRunner, "run", lambda self, jobs, label, *a, **k: noted(label, run, self, jobs, label, *a, **k)),
            (series, "fit_series", lambda *a, **k: noted("fit_series", REAL["fit_series"], *a, **k)),
            (series, "save_and_close", lambda *a, **k: noted("series figure", REAL["save_and_close"], *a, **k)),
            (report.ReportFigures, "draw", lambda self, *a: noted("report figures", REAL["draw"], self, *a)),
            (report, "eyring_figures", noted_eyring_figures),
            (report, "write_report", lambda *a, **k: noted("report.html", REAL["write_report"], *a, **k))]


def timed_run(folder: Path, workers: int) -> dict:
    """The demo series as `dnmr fit` runs it with `workers`, every part noted: the parts (process, what, start, end,
    CPU), the run's start and end, this process's CPU and its workers' (s)."""
    from dnmr.jobs import run_fit

    patches = wrapped()
    for module, name, replacement in patches:
        REAL.setdefault(name, getattr(module, name))
        setattr(module, name, replacement)
    TIMELINE.unlink(missing_ok=True)
    try:
        before, start = os.times(), time.time()
        run_fit(demo_series(folder), folder / f"timeline{workers}", workers=workers, progress=False)
        end, after = time.time(), os.times()
    finally:
        for module, name, _ in patches:
            setattr(module, name, REAL[name])
    parts = sorted((json.loads(line) for line in TIMELINE.read_text().splitlines()), key=lambda p: p[2])
    TIMELINE.unlink()
    return {"parts": parts, "start": start, "end": end, "main_cpu": after.user + after.system - before.user - before.system,
            "workers_cpu": after.children_user + after.children_system - before.children_user - before.children_system}


def timeline(folder: Path, cores: int) -> None:
    """(b) once with one worker and once with `cores`, timed part by part (the module's docstring says which)."""
    print(f"  timeline with 1 and {cores} workers ({load()}); the run with {cores} (s from its start, CPU s):")
    runs = {workers: timed_run(folder, workers) for workers in (1, cores)}
    run = runs[cores]
    pids = sorted({p[0] for p in run["parts"] if p[0] != os.getpid()})
    name = lambda pid: f"worker {pids.index(pid) + 1}" if pid in pids else "this process"  # noqa: E731
    for pid, what, a, b, cpu in run["parts"]:
        print(f"    {a - run['start']:6.2f} {b - run['start']:6.2f} {cpu:5.2f}  {name(pid):<12} {what}")
    for workers, run in runs.items():
        print(f"    {workers} worker(s): {phases(run)}")
    print("    CPU time (s), 1 worker against " + f"{cores}: " + "; ".join(
        f"{kind} {cpu_of(runs[1], kind):.2f} against {cpu_of(runs[cores], kind):.2f}"
        for kind in ("fit", "figure", "this process", "workers outside tasks")))
    for pid in pids:
        busy = sum(p[3] - p[2] for p in run["parts"] if p[0] == pid)
        print(f"    {name(pid)}: idle {run['end'] - run['start'] - busy:.2f} s of the whole {run['end'] - run['start']:.2f} s")


MAIN_PARTS = ("fit_series", "series figure", "report figures", "report.html")
"""The parts of a run noted in this process that are not a stage of fits (:func:`wrapped`)."""


def phases(run: dict) -> str:
    """The run's phases in words: before the first fit, the stages of fits, the outputs, report.html (wall s)."""
    parts = {p[1]: p for p in run["parts"] if p[0] == os.getpid()}
    stages = [p for p in run["parts"] if p[0] == os.getpid() and p[1] not in MAIN_PARTS
              and p[1].split()[0] not in ("fit", "figure")]
    first, last, fitted, report = stages[0][2], stages[-1][3], parts["fit_series"], parts["report.html"]
    return (f"{first - run['start']:.2f} s before the first fit, {last - first:.2f} s of fits (the stages), "
            f"{fitted[3] - last:.2f} s of outputs, {report[3] - report[2]:.2f} s of report.html "
            f"({report[4]:.2f} s CPU here); {run['end'] - run['start']:.2f} s in all")


def cpu_of(run: dict, kind: str) -> float:
    """CPU time (s) of `run`: its tasks of a `kind` ("fit", "figure"), this process's outside them, or its workers'
    outside their tasks (start-up, receiving tasks, sending results)."""
    tasks = [p for p in run["parts"] if p[1].split()[0] in ("fit", "figure")]
    if kind in ("fit", "figure"):
        return sum(p[4] for p in tasks if p[1].split()[0] == kind)
    here = sum(p[4] for p in tasks if p[0] == os.getpid())
    if kind == "this process":
        return run["main_cpu"] - here
    return run["workers_cpu"] - sum(p[4] for p in tasks) + here


def global_fits(folder: Path, cores: int, series: Path, result) -> None:
    """(c): the global fit of the demo series from (b)'s two-step result."""
    from dnmr.activation.temperature_calibration import read_temperature_calibration
    from dnmr.fitting.globalfit import fit_global_from_two_step
    from dnmr.fitting.globaltreatment import Treatment
    from dnmr.fitting.seriesfile import load_series

    print(f"(c) global fit of the demo series from (b), shifts linear in T, demo calibration; {load()}")
    calibration = read_temperature_calibration(DEMO / "calibration.csv")
    loaded = load_series(series)
    times, fits = {}, {}
    for workers in (1, cores):
        t0 = time.perf_counter()
        fit = fits[workers] = fit_global_from_two_step(
            loaded, result, folder / f"out{cores}", calibration,
            Treatment(shift_trend="linear", linewidth_trend="per-spectrum"), workers)
        times[workers] = time.perf_counter() - t0
        a = fit.activation[0]
        print(f"  {workers} worker(s): {times[workers]:6.1f} s  {fit.function_evaluations} residual and "
              f"{fit.jacobian_evaluations} Jacobian evaluations, "
              f"{sum(not p['fixed'] for p in fit.parameters.values())} free parameters; "
              f"dH = {a.enthalpy_kj_mol:.3f} kJ/mol, dS = {a.entropy_j_mol_k:.3f} J/(mol K)")
    print(f"  speed-up {times[1] / times[cores]:.2f}")
    global_jacobians(loaded, result, folder / f"out{cores}", calibration, fits[1], times[1])


def global_jacobians(series, two_step, outdir: Path, calibration, exact_fit, exact_s: float) -> None:
    """(c) again with one worker and forward differences for the Jacobian blocks (the route before the exact
    lineshape derivatives): time against `exact_s` (s), and how far apart the two fits' ΔH‡ and ΔS‡ are."""
    from dnmr.fitting import globalproblem
    from dnmr.fitting.globalfit import fit_global_from_two_step
    from dnmr.fitting.globaltreatment import Treatment

    globalproblem.USE_EXACT_JACOBIAN = False
    try:
        t0 = time.perf_counter()
        fit = fit_global_from_two_step(series, two_step, outdir, calibration,
                                       Treatment(shift_trend="linear", linewidth_trend="per-spectrum"), 1)
        seconds = time.perf_counter() - t0
    finally:
        globalproblem.USE_EXACT_JACOBIAN = True
    a, b = exact_fit.activation[0], fit.activation[0]
    print(f"  forward differences, 1 worker: {seconds:6.1f} s  {fit.function_evaluations} residual and "
          f"{fit.jacobian_evaluations} Jacobian evaluations; exact derivatives {exact_s / seconds:.2f} of that time; "
          f"ΔH‡ apart by {abs(a.enthalpy_kj_mol - b.enthalpy_kj_mol) / a.enthalpy_stderr:.1e}, ΔS‡ by "
          f"{abs(a.entropy_j_mol_k - b.entropy_j_mol_k) / a.entropy_stderr:.1e} standard errors")


def main() -> None:
    arguments = sys.argv[1:]
    if "--baseline-worker" in arguments:
        baseline_worker()
        return
    if "--series" not in arguments:
        with single_threaded_blas():
            single_fits()
            posteriors()
    if "--single" in arguments:
        return
    cores = os.cpu_count() or 1
    folder = Path(tempfile.mkdtemp(prefix="dnmr-bench-"))
    try:
        series, result = series_fits(folder, cores)
        if "--timeline" in arguments:
            timeline(folder, cores)
        if "--series" not in arguments:
            global_fits(folder, cores, series, result)
    finally:
        shutil.rmtree(folder)


if __name__ == "__main__":
    main()
