"""The Eyring analysis as one call (what ``dnmr eyring`` does, and what a notebook can do the same way).

:func:`run_eyring` reads one or several rates tables, turns set-points into sample temperatures with a
calibration, fits every process, samples the posterior of its activation parameters if asked, and writes
the Eyring plot (with a pairwise posterior figure beside it) and the supporting-information tables if
asked. The :class:`EyringStudy` it returns holds all of it and gives the JSON and the text of the command.
"""
from __future__ import annotations

import csv
import re
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING

from dnmr.activation.eyring import eyring_fit_file, results_to_dict
from dnmr.activation.eyring_result import EyringResult
from dnmr.activation.posterior import sample_eyring_posterior
from dnmr.activation.temperature_calibration import TemperatureCalibration, read_temperature_calibration
from dnmr.errors import InputError
from dnmr.io import output
from dnmr.notebook import NotebookView
from dnmr.posterior import Posterior, require_emcee

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure


@dataclass(frozen=True)
class EyringStudy(NotebookView):
    """The Eyring analysis of one or several rates tables, with what was sampled and written.

    Attributes
    ----------
    results : tuple of EyringResult
        One per process, in the order the tables first name them.
    posteriors : tuple of Posterior
        The posterior of each process's activation parameters, in the same order (empty when not sampled).
    calibration : TemperatureCalibration or None
        The set-point calibration the temperatures went through.
    rates_files : tuple of Path
        The rates tables.
    figures : tuple of Path
        The figures written: the Eyring plot, then the pairwise posterior figure of each process.
    tables : tuple of Path
        The supporting-information tables written.
    """

    results: tuple[EyringResult, ...]
    posteriors: tuple[Posterior, ...] = ()
    calibration: TemperatureCalibration | None = None
    rates_files: tuple[Path, ...] = ()
    figures: tuple[Path, ...] = ()
    tables: tuple[Path, ...] = ()

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready): the first (or only) process's results at the top level, all of them under
        ``processes`` when there are several, each with its ``posterior`` when sampled, and the
        ``calibration`` when one was used."""
        out = results_to_dict(self.results)
        pairs = list(zip(out.get("processes", []), self.posteriors))
        for entry, post in ([(out, self.posteriors[0])] if self.posteriors else []) + pairs:
            entry["posterior"] = post.to_dict()
        if self.calibration is not None:
            out["calibration"] = self.calibration.to_dict()
        return out

    def report(self) -> str:
        """The calibration, each process's analysis and each posterior, as readable text."""
        parts = [self.calibration.report()] if self.calibration is not None else []
        parts += [r.report() for r in self.results] + [post.report() for post in self.posteriors]
        return "\n\n".join(parts)

    def __str__(self) -> str:
        return self.report()

    def plot(self, figure: "Figure | None" = None) -> "Figure":
        """Eyring plot of every process (see :func:`dnmr.reporting.eyringplot.plot_eyring`)."""
        from dnmr.reporting.eyringplot import plot_eyring

        return plot_eyring(list(self.results), figure=figure)

    def figure_paths(self, plot_file: str | Path) -> list[Path]:
        """The Eyring plot `plot_file`, then beside it the pairwise posterior figure of each sampled process:
        FILE_posterior.png, or FILE_posterior_<process>.png for several processes."""
        plot_file = Path(plot_file)
        several = len(self.results) > 1
        tags = ["_" + re.sub(r"\W", "_", r.process) if several else "" for r in self.results[:len(self.posteriors)]]
        return [plot_file] + [plot_file.with_name(f"{plot_file.stem}_posterior{tag}{plot_file.suffix}") for tag in tags]

    def write_figures(self, plot_file: str | Path, *, overwrite: bool = False) -> list[Path]:
        """Write the Eyring plot to `plot_file` and the posterior figures beside it (:meth:`figure_paths`);
        without `overwrite`, refuse before writing any of them when one exists. Returns the files."""
        figures = self.figure_paths(plot_file)
        for figure in figures if not overwrite else ():
            if figure.exists():
                raise InputError(f"{figure} already exists; choose another name or pass --overwrite", where="--plot")
        output.save_figure(self.plot(), figures[0], overwrite=overwrite, close=True)
        for post, figure in zip(self.posteriors, figures[1:]):
            output.save_figure(post.plot(), figure, overwrite=overwrite, close=True)
        return figures

    def write_tables(self, folder: str | Path, *, overwrite: bool = False) -> list[Path]:
        """Write the supporting-information tables of the rates tables and their analysis into `folder`
        (see :func:`dnmr.reporting.supporting.write_supporting_tables`). Returns the files.

        Raises
        ------
        InputError
            A transmission coefficient other than 1 (the tables give ΔG‡ with kappa = 1), or tables that
            exist without `overwrite`.
        """
        from dnmr.reporting.supporting import activation_rows, rate_rows_from_table, write_supporting_tables

        for result in self.results:
            _check_tables_transmission(result.transmission)
        rows = []
        for rates_file in self.rates_files:
            with open(rates_file, newline="", encoding="utf-8-sig") as fh:
                rows += list(csv.DictReader(line for line in fh if not line.lstrip().startswith("#")))
        return write_supporting_tables(folder, rate_rows_from_table(rows, self.calibration),
                                       activation_rows(self.results), overwrite=overwrite)


def run_eyring(
    rates_files: str | Path | Sequence[str | Path],
    *,
    process: str | None = None,
    temperature_stderr: float | None = None,
    temperature_offset_stderr: float | None = None,
    flagged_rows: str = "exclude",
    scale_errors: bool | None = None,
    transmission: float = 1.0,
    calibration: str | Path | TemperatureCalibration | None = None,
    calibration_degree: int = 1,
    posterior: bool = False,
    posterior_steps: int = 10000,
    posterior_seed: int | None = 0,
    plot_file: str | Path | None = None,
    tables_folder: str | Path | None = None,
    overwrite: bool = False,
) -> EyringStudy:
    """Eyring and Arrhenius analysis of rates tables, with posteriors, figures and tables as asked.

    Parameters
    ----------
    rates_files : str or Path, or a sequence of them
        Rates tables (``rates.csv`` of ``dnmr fit`` or ``dnmr transfer``, or tables of your own), fitted
        together process by process (see :func:`dnmr.activation.eyring.eyring_fit_file`).
    process : str, optional
        Analyse only this process.
    temperature_stderr : float, optional
        One standard error (K) for every temperature, independent between rows.
    temperature_offset_stderr : float, optional
        Standard error (K) of an unknown probe offset, shared by every row.
    flagged_rows : {"exclude", "widen"}
        Rows whose fit is flagged: set aside (default) or fitted with widened errors.
    scale_errors : bool, optional
        Scale the given rate errors by the reduced chi-square (default: only without rate errors).
    transmission : float
        Transmission coefficient kappa.
    calibration : str, Path or TemperatureCalibration, optional
        Set-point calibration (a table, fitted with `calibration_degree`, or a fitted calibration): the
        tables' temperatures are set-points.
    calibration_degree : int
        Polynomial degree (1-3) of a calibration given as a table.
    posterior : bool
        Also sample the posterior of each process's ΔH‡ and ΔS‡ (needs emcee).
    posterior_steps : int
        Steps of each walker (a quarter is burn-in).
    posterior_seed : int or None
        Seed of the sampler.
    plot_file : str or Path, optional
        Write the Eyring plot here (PNG, SVG or PDF) and each posterior's pairwise figure beside it.
    tables_folder : str or Path, optional
        Write the supporting-information tables (CSV, Markdown, LaTeX) into this folder.
    overwrite : bool
        Replace existing figures or tables.

    Returns
    -------
    EyringStudy

    Raises
    ------
    InputError
        Bad tables or options, emcee missing for `posterior`, or files that exist without `overwrite`.
    """
    if posterior:
        require_emcee(where="--posterior")
    if tables_folder is not None:  # refused before any work
        _check_tables_transmission(transmission)
    if calibration is not None and not isinstance(calibration, TemperatureCalibration):
        calibration = read_temperature_calibration(calibration, calibration_degree)
    files = tuple(Path(p) for p in ([rates_files] if isinstance(rates_files, (str, Path)) else rates_files))
    results = eyring_fit_file(list(files), process=process, temperature_stderr=temperature_stderr,
                              temperature_offset_stderr=temperature_offset_stderr, flagged_rows=flagged_rows,
                              scale_errors=scale_errors, transmission=transmission, calibration=calibration)
    posteriors = tuple(sample_eyring_posterior(r, steps=posterior_steps, seed=posterior_seed) for r in results) \
        if posterior else ()
    study = EyringStudy(tuple(results), posteriors, calibration, files)
    figures = tuple(study.write_figures(plot_file, overwrite=overwrite)) if plot_file is not None else ()
    tables = tuple(study.write_tables(tables_folder, overwrite=overwrite)) if tables_folder is not None else ()
    return replace(study, figures=figures, tables=tables)


def _check_tables_transmission(transmission: float) -> None:
    """The supporting-information tables give ΔG‡ with kappa = 1: refuse another transmission coefficient."""
    if transmission != 1.0:
        raise InputError("the tables give ΔG‡ at each temperature with transmission coefficient 1; drop "
                         "--transmission or --tables", where="--tables")
