"""Scale-out, measured in one run (not a test).

(a) the bundled demo series (as in benchmarks/fit_speed.py) fitted on dnmr's own worker processes (one per
    core), then on a thread pool and on a local Dask cluster (two worker processes, when the optional
    ``distributed`` package is installed) given as the executor: wall time of each and whether its rates.csv
    is the same bytes as the local run's (the goal);
(b) many series at once: a folder holding the demo series twice, fitted by ``dnmr.fitting.seriesfolder`` on
    one pool shared by both, against twice the single run of (a).
Figures include process start-up (the Dask workers import dnmr on their first task); other load on the
machine slows every figure.

Run:  python benchmarks/scaleout.py
"""
from __future__ import annotations

import concurrent.futures as futures
import functools
import os
import shutil
import tempfile
import time
from pathlib import Path

from fit_speed import demo_series

from dnmr.fitting.series import fit_series
from dnmr.fitting.seriesfolder import fit_series_folder

WORKERS = os.cpu_count() or 1


def timed_fit(series: Path, outdir: Path, executor: futures.Executor | None = None) -> float:
    """Wall time (s) of one fit of `series` into `outdir`."""
    started = time.perf_counter()
    fit_series(series, outdir, workers=WORKERS, progress=False, executor=executor)
    return time.perf_counter() - started


def report(label: str, seconds: float, local: float, outdir: Path, reference: bytes) -> None:
    same = (outdir / "rates.csv").read_bytes() == reference
    print(f"  {label:<42} {seconds:7.1f} s  {seconds / local:5.2f} x local   rates.csv identical: "
          f"{'yes' if same else 'NO'} (goal: yes)")


def on_dask(series: Path, folder: Path, local: float, reference: bytes) -> None:
    """(a) on a local Dask cluster of two worker processes, reached by its scheduler's address."""
    try:
        from distributed import LocalCluster
    except ImportError:
        print('  Dask cluster: not measured (pip install ".[dask]")')
        return
    from dnmr.fitting.cluster import scheduler_executor

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            scheduler_executor(cluster.scheduler_address) as (executor, _):
        for run in ("first", "second"):
            seconds = timed_fit(series, folder / f"dask-{run}", executor)
            report(f"local Dask cluster, 2 workers, {run} run", seconds, local, folder / f"dask-{run}", reference)


def many_series(series: Path, folder: Path, local: float) -> None:
    """(b) the demo series twice in one folder, on one shared pool."""
    screen = folder / "screen"
    screen.mkdir()
    for name in ("first", "second"):
        shutil.copy(series, screen / f"{name}.toml")
    started = time.perf_counter()
    batch = fit_series_folder(screen, folder / "screen-out", functools.partial(fit_series, progress=False),
                              workers=WORKERS)
    seconds = time.perf_counter() - started
    print(f"  two series in one folder (one shared pool)   {seconds:7.1f} s  {seconds / (2 * local):5.2f} x two "
          f"single runs   exit status {batch.exit_status}")


def main() -> None:
    folder = Path(tempfile.mkdtemp(prefix="dnmr-scaleout-"))
    try:
        series = demo_series(folder)
        print(f"(a) the demo series, {WORKERS} tasks at a time")
        local = timed_fit(series, folder / "local")
        reference = (folder / "local" / "rates.csv").read_bytes()
        print(f"  {'dnmr worker processes (local run)':<42} {local:7.1f} s")
        with futures.ThreadPoolExecutor(WORKERS) as executor:
            report("thread pool given as executor", timed_fit(series, folder / "threads", executor), local,
                   folder / "threads", reference)
        on_dask(series, folder, local, reference)
        print("(b) many series at once")
        many_series(series, folder, local)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
