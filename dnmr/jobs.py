"""The fit job of ``dnmr fit`` as one call a notebook can make too: read the series, fit it (spectrum by
spectrum, or globally), write report.html beside the results; or the same for every series of a folder.

The command line only parses options, calls :func:`run_fit` and prints what it returns.
"""
from __future__ import annotations

import concurrent.futures as futures
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from dnmr.errors import InputError
from dnmr.notebook import NotebookView


@dataclass
class FitJob(NotebookView):
    """What ``dnmr fit`` did for one series file.

    Attributes
    ----------
    fit : SeriesFit or GlobalFit
        The fit (``dnmr.fit_series`` or the global fit).
    warnings : tuple of str
        Remarks on the series file (duplicate temperatures...).
    report_file : Path or None
        report.html, when one was written.
    report_problem : str or None
        Why no report.html could be written (the results themselves are complete).
    """

    fit: Any
    warnings: tuple[str, ...] = ()
    report_file: Path | None = None
    report_problem: str | None = None
    global_fit: bool = field(default=False, repr=False)

    @property
    def exit_status(self) -> int:
        """0 when every spectrum was fitted, 2 when one could not be read, 1 when a fit failed."""
        return 0 if self.global_fit else self.fit.exit_status

    def report(self) -> str:
        """The fit's text report."""
        return self.fit.report()

    def problems(self) -> list[str]:
        """One line per spectrum that could not be fitted (the others are in the results)."""
        return [] if self.global_fit else [f"{f.spectrum.where}: {f.error}" for f in self.fit.failures]


def run_fit(
    series_file: str | Path,
    outdir: str | Path,
    *,
    overwrite: bool = False,
    resume: bool = False,
    workers: int | None = None,
    executor: futures.Executor | None = None,
    global_fit: bool = False,
    treatment: Mapping[str, str] | None = None,
    calibration_file: str | Path | None = None,
    write_html: bool = True,
    posterior: Mapping[str, Any] | None = None,
    progress: bool | None = None,
    on_warning: Callable[[str], None] | None = None,
) -> FitJob:
    """Fit the VT series `series_file` into `outdir` as ``dnmr fit`` does, and write report.html.

    Parameters
    ----------
    series_file : str or Path
        The series file (TOML).
    outdir : str or Path
        Folder of the results.
    overwrite, resume : bool
        Replace, or continue, the results of an earlier run (`resume`: spectrum by spectrum only).
    workers : int, optional
        Worker processes (default one per core; 1: in this process); with `executor`, tasks at once.
    executor : concurrent.futures.Executor, optional
        Where the work runs instead of dnmr's own processes (left running).
    global_fit : bool
        dH‡ and dS‡ fitted to all spectra at once (``--global``) instead of a rate per spectrum.
    treatment : mapping, optional
        The global fit's ``shift_trend``, ``linewidth_trend`` and ``coupling_trend`` (its defaults otherwise).
    calibration_file : str or Path, optional
        Temperature calibration table (set-point to sample temperature, K).
    write_html : bool
        Write report.html beside the results (a failure to write it is reported, not raised).
    posterior : mapping, optional
        Settings of :func:`dnmr.fitting.posterior.sample_spectrum_posterior` (``{"method": ..., "draws": n,
        "steps": n, "seed": s}``; ``{}`` for the defaults): sample each spectrum's posterior (spectrum by
        spectrum only).
    progress : bool, optional
        Show progress on stderr (default: on a terminal).
    on_warning : callable, optional
        Called with each remark on the series file as soon as it is read (they are also in the result).

    Returns
    -------
    FitJob
    """
    from dnmr.fitting.seriesfile import load_series

    from dnmr.activation.temperature_calibration import read_temperature_calibration

    check_fit_settings(resume=resume, global_fit=global_fit, posterior=posterior)
    calibration = read_temperature_calibration(calibration_file) if calibration_file else None  # bad: before work
    series = load_series(series_file)
    for warning in series.warnings:
        if on_warning is not None:
            on_warning(warning)
    ahead = None
    if global_fit:
        from dnmr.fitting.globalfit import fit_series_global

        fit = fit_series_global(series, outdir, overwrite=overwrite, calibration=calibration, workers=workers,
                                progress=progress, executor=executor, **(treatment or {}))
    else:
        from dnmr.fitting.series import fit_series
        from dnmr.reporting.report import ReportFigures

        ahead = ReportFigures(outdir, calibration_file) if write_html else None  # drawn beside the fits' figures
        fit = fit_series(series, outdir, overwrite=overwrite, resume=resume, workers=workers, progress=progress,
                         posterior=dict(posterior) if posterior is not None else None, executor=executor,
                         alongside=ahead.draw if ahead is not None else None)
    job = FitJob(fit, tuple(series.warnings), global_fit=global_fit)
    if write_html:  # the global fit has already used the calibration
        job.report_file, job.report_problem = _write_html(Path(outdir), None if global_fit else calibration_file, ahead)
    return job


def check_fit_settings(*, resume: bool = False, global_fit: bool = False,
                       posterior: Mapping[str, Any] | None = None) -> None:
    """Refuse, before any work, settings of :func:`run_fit` that do not go together."""
    if resume and global_fit:
        raise InputError("--resume is not available with --global", where="--resume")
    if posterior is not None and global_fit:
        raise InputError("--posterior samples the spectrum-by-spectrum fits; it is not available with --global",
                         where="--posterior")


def run_fit_folder(folder: str | Path, outdir: str | Path, *, overwrite: bool = False, resume: bool = False,
                   workers: int | None = None, executor: futures.Executor | None = None,
                   on_job: Callable[[FitJob], None] | None = None, **settings):
    """:func:`run_fit` for every series file in `folder` (and its subfolders), each into its own subfolder
    of `outdir`, one after the other; a failing series does not stop the others.  `settings` are those of
    :func:`run_fit`; `on_job` is called with each series' :class:`FitJob` as it finishes.  Returns the
    folder's summary (:class:`dnmr.fitting.seriesfolder.SeriesFolderFit`, also written as OUTDIR/summary.csv)."""
    from dnmr.fitting.seriesfolder import fit_series_folder

    check_fit_settings(resume=resume, global_fit=settings.get("global_fit", False),
                       posterior=settings.get("posterior"))

    def one(path: Path, out: Path, **flags):
        job = run_fit(path, out, **flags, **settings)
        if on_job is not None:
            on_job(job)
        return job.fit

    return fit_series_folder(folder, outdir, one, overwrite=overwrite, resume=resume, workers=workers,
                             executor=executor)


def _write_html(outdir: Path, calibration_file, ahead) -> tuple[Path | None, str | None]:
    """report.html of the fit just written into `outdir` (rewritten with each run; `ahead`: its figures drawn
    before, :class:`dnmr.reporting.report.ReportFigures`), or why it could not be."""
    from dnmr.reporting.report import write_report

    try:
        return write_report(outdir, calibration=calibration_file, overwrite=True, ahead=ahead), None
    except InputError as err:
        return None, str(err)
