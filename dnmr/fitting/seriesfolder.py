"""Many series at once: every series file in a folder fitted into its own results folder, with a summary.

``dnmr fit FOLDER -o OUTDIR`` (or :func:`fit_series_folder`) finds every series file in FOLDER and its
subfolders -- a TOML file with ``[[spectrum]]`` tables; model files and other TOML files are passed over --
and fits each one, one series after the other, into ``OUTDIR/<its path in FOLDER without .toml>/`` exactly
as a single series would be fitted there.  A series that cannot be read or fitted is reported and the
others go on.  ``OUTDIR/summary.csv`` (rewritten after every series) has one row per series:

``series``
    The series file's path in FOLDER.
``outdir``
    Its results folder.
``status``
    ``fitted`` (every spectrum), ``partly fitted`` or ``failed``.
``spectra``, ``fitted``
    Spectra in the series file, and how many were fitted (empty when the file could not be read).
``exit_status``
    What ``dnmr fit`` would have exited with for this series alone: 0, 1 or 2.
``error``
    Why it failed, in one line.
``elapsed_s``
    Wall-clock time of its fit (s).
"""
from __future__ import annotations

import concurrent.futures as futures
import csv
import io
import os
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from dnmr.errors import InputError
from dnmr.fitting.workers import process_pool
from dnmr.io.modelfile import read_toml
from dnmr.io.output import atomic_write_text

SUMMARY_FILE = "summary.csv"
SUMMARY_COLUMNS = ("series", "outdir", "status", "spectra", "fitted", "exit_status", "error", "elapsed_s")


@dataclass
class SeriesRun:
    """What became of one series of the folder (a row of summary.csv; see the module notes)."""

    series: str
    outdir: str
    status: str
    spectra: int | None
    fitted: int | None
    exit_status: int
    error: str = ""
    elapsed_s: float = 0.0


@dataclass
class SeriesFolderFit:
    """The fits of every series in a folder.

    Attributes
    ----------
    folder : Path
        The folder the series files were found in.
    outdir : Path
        The folder of the results (one subfolder per series, and summary.csv).
    runs : list of SeriesRun
        One per series file, in the order fitted (sorted by path).
    """

    folder: Path
    outdir: Path
    runs: list[SeriesRun] = field(default_factory=list)

    @property
    def exit_status(self) -> int:
        """0 when every series was fitted whole, 2 when one met bad input, else 1."""
        statuses = {r.exit_status for r in self.runs}
        return 2 if 2 in statuses else 1 if 1 in statuses else 0

    def report(self) -> str:
        """The summary as a table."""
        width = max([6] + [len(r.series) for r in self.runs])
        done = sum(r.status == "fitted" for r in self.runs)
        lines = [f"{self.folder}: {len(self.runs)} series, {done} fitted whole; results in {self.outdir}", "",
                 f"  {'series':<{width}}  {'status':<13} {'spectra':>7} {'fitted':>6}  error"]
        for r in self.runs:
            count = lambda n: "" if n is None else str(n)  # noqa: E731
            lines.append(f"  {r.series:<{width}}  {r.status:<13} {count(r.spectra):>7} {count(r.fitted):>6}  {r.error}")
        return "\n".join(lines + ["", f"summary: {self.outdir / SUMMARY_FILE}"])

    def write_summary(self) -> Path:
        """Write ``OUTDIR/summary.csv`` (atomically, replacing an earlier one); returns its path."""
        buffer = io.StringIO()
        writer = csv.DictWriter(buffer, fieldnames=SUMMARY_COLUMNS, lineterminator="\n")
        writer.writeheader()
        for r in self.runs:
            writer.writerow({k: "" if v is None else v for k, v in asdict(r).items()})
        return atomic_write_text(self.outdir / SUMMARY_FILE, buffer.getvalue(), overwrite=True)


def find_series_files(folder: str | Path, leave_out: Path | None = None) -> list[Path]:
    """Every series file in `folder` and its subfolders (hidden ones and `leave_out` passed over), sorted.

    A series file is a TOML file with ``[[spectrum]]`` tables; a TOML file that cannot be read is listed too
    (its fit then fails with the reason), other TOML files (model files...) are not.
    """
    folder = Path(folder)
    found = []
    for path in sorted(folder.rglob("*.toml")):
        parts = path.relative_to(folder).parts
        if any(p.startswith(".") for p in parts) or (leave_out is not None and path.resolve().is_relative_to(leave_out)):
            continue
        try:
            if "spectrum" not in read_toml(path):
                continue
        except InputError:
            pass
        found.append(path)
    return found


def fit_series_folder(folder: str | Path, outdir: str | Path, fit: Callable[..., Any] | None = None, *,
                      overwrite: bool = False, resume: bool = False, workers: int | None = None,
                      executor: futures.Executor | None = None) -> SeriesFolderFit:
    """Fit every series file in `folder` into its own subfolder of `outdir`, and write summary.csv.

    Parameters
    ----------
    folder : str or Path
        Where the series files are (subfolders included; see :func:`find_series_files`).
    outdir : str or Path
        Folder of the results; refused when it holds files, unless `overwrite` or `resume`.
    fit : callable, optional
        Called as ``fit(series_file, results_folder, overwrite=..., resume=..., workers=..., executor=...)``
        for each series; returns a :class:`~dnmr.fitting.series.SeriesFit` (or anything with ``series`` and
        ``outcomes``, or ``series`` and ``fits`` for a global fit).  Default :func:`dnmr.fitting.series.fit_series`;
        bind other settings (progress, posterior...) with :func:`functools.partial`.
    overwrite, resume : bool
        Replace, or continue, the results of an earlier run (passed on to every series).
    workers : int, optional
        Worker processes, one pool shared by all the series (default one per core; 1: in this process);
        with `executor`, how many tasks are handed to it at once.
    executor : concurrent.futures.Executor, optional
        Where every series' work runs instead (see :func:`dnmr.fitting.series.fit_series`); left running.

    Returns
    -------
    SeriesFolderFit
        With ``exit_status`` 0 (every series fitted whole), 2 (one met bad input) or 1.

    Raises
    ------
    InputError
        `folder` holds no series file, or `outdir` holds files and neither `overwrite` nor `resume` is given.
    """
    from dnmr.fitting.series import fit_series

    folder, outdir = Path(folder), Path(outdir)
    if not folder.is_dir():
        raise InputError(f"{folder} is not a folder", where="series")
    files = find_series_files(folder, leave_out=outdir.resolve())
    if not files:
        raise InputError(f"{folder} holds no series file (a TOML file with [[spectrum]] tables)", where="series")
    if outdir.is_dir() and any(outdir.iterdir()) and not (overwrite or resume):
        raise InputError(f"{outdir} already exists; pass --overwrite to replace its results or --resume to continue "
                         "them", where="--output")
    result = SeriesFolderFit(folder, outdir)
    workers = workers or os.cpu_count() or 1
    pool = process_pool(workers) if executor is None and workers > 1 else None
    flags = {"overwrite": overwrite, "resume": resume, "workers": workers,
             "executor": pool if pool is not None else executor}
    try:
        for path in files:
            result.runs.append(_fit_one(fit or fit_series, path, folder, outdir, flags))
            result.write_summary()
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
    return result


def _fit_one(fit: Callable[..., Any], path: Path, folder: Path, outdir: Path, flags: dict) -> SeriesRun:
    """Fit one series of the folder; never raises (but for an interrupt): a failure is its row."""
    name = path.relative_to(folder).with_suffix("").as_posix()
    target = outdir / name
    started = time.perf_counter()
    try:
        done = fit(path, target, **flags)
    except InputError as err:
        return SeriesRun(name, str(target), "failed", None, None, 2, str(err), round(time.perf_counter() - started, 2))
    except Exception as err:  # a fault of one series (a full disk...) is its row; the others go on
        return SeriesRun(name, str(target), "failed", None, None, 1, f"{type(err).__name__}: {err}",
                         round(time.perf_counter() - started, 2))
    spectra = len(done.series.spectra)
    fitted = sum(o.fitted for o in done.outcomes) if hasattr(done, "outcomes") else len(done.fits)
    status = "fitted" if fitted == spectra else "partly fitted" if fitted else "failed"
    error = "; ".join(f"{o.spectrum.where}: {o.error}" for o in getattr(done, "failures", []))
    return SeriesRun(name, str(target), status, spectra, fitted, getattr(done, "exit_status", 0), error,
                     round(time.perf_counter() - started, 2))
