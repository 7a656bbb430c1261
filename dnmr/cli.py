"""The ``dnmr`` command line: a thin layer over the Python API.

Every command turns :class:`dnmr.errors.InputError` into one line on stderr and exit status 2
(``--debug`` shows the traceback instead); any other failure exits 1.
"""
from __future__ import annotations

import json
import sys
import traceback
from pathlib import Path

import click

from dnmr.errors import InputError
from dnmr.io.output import FIGURE_FORMAT_CHOICES, figures_as, json_ready, os_error_text


#: Options of earlier releases by command, and their names now: refused with one "renamed to" line (exit 2).
RENAMED_OPTIONS = {
    "fit": {"--shifts": "--shift-trend", "--linewidth": "--linewidth-trend", "--couplings": "--coupling-trend"},
    "stack": {"--rates": "--rates-per-s", "--temperatures": "--temperatures-k"},
    "thermometer": {"--shift-difference": "--shift-difference-ppm"},
}


class _Group(click.Group):
    """Click group that maps errors onto the exit statuses of the contract (0 ok, 2 bad input, 1 other)."""

    def parse_args(self, ctx: click.Context, args: list[str]) -> list[str]:
        """Refuse an option of an earlier release with its new name, before click's usage error."""
        renamed = RENAMED_OPTIONS.get(next((a for a in args if not a.startswith("-")), None), {})
        old = next((a.split("=", 1)[0] for a in args if a.split("=", 1)[0] in renamed), None)
        if old is not None:
            click.echo(f"dnmr: error: the option {old} was renamed to {renamed[old]}", err=True)
            ctx.exit(2)
        return super().parse_args(ctx, args)

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except InputError as err:
            if ctx.obj and ctx.obj.get("debug"):
                traceback.print_exc()
            click.echo(f"dnmr: error: {err}", err=True)
            ctx.exit(2)
        except OSError as err:  # a fault of the disk or the system (full, read-only, gone): not bad input
            if ctx.obj and ctx.obj.get("debug"):
                traceback.print_exc()
            click.echo(f"dnmr: error: {os_error_text(err)}", err=True)
            ctx.exit(1)
        except MemoryError:
            click.echo("dnmr: error: out of memory; close other programs or make the problem smaller "
                       "(fewer points, fewer coupled spins)", err=True)
            ctx.exit(1)


@click.group(cls=_Group)
@click.option("--debug", is_flag=True, help="Show the full traceback of an error.")
@click.version_option(package_name="dnmr")
@click.pass_context
def cli(ctx: click.Context, debug: bool) -> None:
    """dnmr: dynamic NMR lineshapes, exchange rates from VT spectra, and activation parameters."""
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug


def print_json(obj) -> None:
    """Print one JSON object on stdout (NaN and infinities written as null)."""
    click.echo(json.dumps(json_ready(obj), indent=2))


def _parse_list(text: str, option: str) -> list[float]:
    try:
        values = [float(v) for v in text.replace(";", ",").split(",") if v.strip()]
    except ValueError:
        raise InputError(f"expected numbers separated by commas, got {text!r}", where=option) from None
    if not values:
        raise InputError("expected at least one number", where=option)
    return values


#: The option of every command that writes figures under names of its own.
FIGURE_FORMAT_OPTION = click.option(
    "--figure-format", type=click.Choice(FIGURE_FORMAT_CHOICES), default="png", show_default=True,
    help="Format of the figures this command writes: PNG, or SVG or PDF (vector, for print).")


@cli.command()
@click.argument("model_file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("-o", "--output", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="CSV file to write (columns ppm, hz, intensity, dispersion).")
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Also draw the spectrum to this image (PNG, SVG or PDF).")
@click.option("--points", type=click.IntRange(16, 2**22), help="Number of points (overrides the model file).")
@click.option("--overwrite", is_flag=True, help="Replace existing output files.")
@click.option("--quiet", is_flag=True, help="Print nothing on success.")
@click.option("--verbose", is_flag=True, help="Also say how the engine evaluated each block, and how long it took.")
def simulate(model_file: Path, output: Path, plot_file: Path | None, points: int | None, overwrite: bool,
             quiet: bool, verbose: bool) -> None:
    """Simulate the exchange-broadened spectrum of MODEL_FILE."""
    from dnmr.reporting.spectrumfiles import write_simulation

    run = write_simulation(model_file, output, plot_file=plot_file, points=points, overwrite=overwrite,
                           progress=not quiet)
    spectrum = run.spectrum
    if verbose:
        for route in spectrum.terms.routes:
            click.echo(f"  block: {route}")
        click.echo(f"  simulated in {run.elapsed_s:.3f} s; integral over the window {spectrum.integral():.6g}"
                   " (population x observed nuclei, less the tails outside the window)")
    if not quiet:
        click.echo(f"wrote {output} ({len(spectrum.ppm)} points, {spectrum.ppm.min():.3f}-{spectrum.ppm.max():.3f} ppm)")
        if plot_file:
            click.echo(f"wrote {plot_file}")


@cli.command()
@click.argument("model_file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--rates-per-s", help="Forward rates (s⁻¹) of the first exchange process, comma separated.")
@click.option("--temperatures-k", help="Temperatures (K), comma separated (rates from the model's activation parameters).")
@click.option("-o", "--output", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="Image to write (PNG, SVG or PDF).")
@click.option("--overwrite", is_flag=True, help="Replace an existing image.")
def stack(model_file: Path, rates_per_s: str | None, temperatures_k: str | None, output: Path, overwrite: bool) -> None:
    """Draw MODEL_FILE's spectrum over a list of rates or temperatures, stacked (a coalescence figure)."""
    from dnmr.reporting.spectrumfiles import write_stack

    if (rates_per_s is None) == (temperatures_k is None):
        raise InputError("give either --rates-per-s or --temperatures-k", where="stack")
    write_stack(model_file, output, overwrite=overwrite,
                rates_per_s=None if rates_per_s is None else _parse_list(rates_per_s, "--rates-per-s"),
                temperatures_k=None if temperatures_k is None else _parse_list(temperatures_k, "--temperatures-k"))
    click.echo(f"wrote {output}")


@cli.command()
@click.argument("series_file", type=click.Path(path_type=Path))
@click.option("-o", "--output", "outdir", type=click.Path(file_okay=False, path_type=Path), required=True,
              help="Folder for rates.csv, results.json and the figures (for a folder of series: one subfolder each).")
@click.option("--overwrite", is_flag=True, help="Replace the results of an earlier run in the folder.")
@click.option("--resume", is_flag=True, help="Continue an earlier run in the folder, keeping its completed fits.")
@click.option("--serial", is_flag=True, help="Fit one spectrum at a time in this process.")
@click.option("--workers", type=click.IntRange(1, 256), help="Worker processes (default: one per core).")
@click.option("--quiet", is_flag=True, help="No progress report on stderr (a bar on a terminal, else plain lines).")
@click.option("--global", "global_fit", is_flag=True,
              help="Also fit all spectra at once with ΔH‡ and ΔS‡ as the parameters (two-step fit in OUTDIR/two-step).")
@click.option("--shift-trend", type=click.Choice(["linear", "constant", "quadratic"]), default="linear", show_default=True,
              help="With --global: temperature trend of the chemical shifts.")
@click.option("--linewidth-trend", type=click.Choice(["linear", "constant", "quadratic", "per-spectrum", "reference-line"]),
              help="With --global: temperature trend of the intrinsic linewidth, one per spectrum, or the width of the "
                   "series' reference line in every spectrum (default: reference-line when the series file has a "
                   "[fit.reference_line], else linear).")
@click.option("--coupling-trend", type=click.Choice(["linear", "constant", "quadratic"]), default="linear",
              show_default=True, help="With --global: temperature trend of the scalar couplings the model gives.")
@click.option("--calibration", "calibration_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Set-point calibration table (CSV: setpoint_k, temperature_k) for the report's Eyring analysis"
                   " and the global fit.")
@click.option("--no-report", is_flag=True, help="Do not write OUTDIR/report.html after the fit.")
@click.option("--posterior", is_flag=True,
              help="After the fits, sample each spectrum's posterior (needs emcee): by importance sampling from the fit, "
                   "one lineshape evaluation per draw (seconds per spectrum); where that is not reliable, by emcee's "
                   "ensemble, walkers x steps evaluations (a minute or more per spectrum).")
@click.option("--posterior-method", type=click.Choice(["importance", "emcee"]), default="importance", show_default=True,
              help="With --posterior: importance sampling from the fit (the ensemble where it is not reliable), or emcee's ensemble.")
@click.option("--posterior-draws", type=click.IntRange(100, 10**7), default=4000, show_default=True,
              help="With --posterior: draws of importance sampling.")
@click.option("--posterior-steps", type=click.IntRange(40, 10**7), default=4000, show_default=True,
              help="With --posterior: steps of each walker of the ensemble (32 walkers, or 2 per sampled parameter + 2 "
                   "when more; a quarter is burn-in).")
@click.option("--posterior-seed", type=int, default=0, show_default=True, help="With --posterior: seed of the sampler.")
@click.option("--scheduler", metavar="ADDRESS",
              help="Send the fits to the Dask scheduler at this address (tcp://host:8786), whose workers have this "
                   'dnmr; --workers then counts tasks at once (default: its threads). Needs pip install "dnmr-exchange[dask]".')
@FIGURE_FORMAT_OPTION
@click.pass_context
def fit(ctx: click.Context, series_file: Path, outdir: Path, overwrite: bool, resume: bool, serial: bool,
        workers: int | None, quiet: bool, global_fit: bool, shift_trend: str, linewidth_trend: str | None, coupling_trend: str,
        calibration_file: Path | None, no_report: bool, posterior: bool, posterior_method: str, posterior_draws: int,
        posterior_steps: int, posterior_seed: int, scheduler: str | None, figure_format: str) -> None:
    """Fit every spectrum of the VT series SERIES_FILE: rates (or bounds) with errors, into OUTDIR.

    SERIES_FILE may be a folder: every series file in it (and its subfolders) is fitted into its own
    subfolder of OUTDIR, one after the other, and OUTDIR/summary.csv lists what became of each.

    Exit status 0 when every spectrum was fitted; 2 for bad input (series or model file, or a spectrum
    file that cannot be read: the other spectra are still fitted and written); 1 when a fit failed.
    """
    from contextlib import nullcontext

    from dnmr.fitting.cluster import scheduler_executor
    from dnmr.jobs import check_fit_settings, run_fit, run_fit_folder

    if scheduler is not None and serial:
        raise InputError("--serial fits in this process and --scheduler on a cluster: choose one", where="--scheduler")
    check_fit_settings(resume=resume, global_fit=global_fit, posterior={} if posterior else None)
    if posterior:
        from dnmr.posterior import require_emcee

        require_emcee(where="--posterior")
    settings = {"global_fit": global_fit, "write_html": not no_report, "calibration_file": calibration_file,
                "treatment": {"shift_trend": shift_trend, "linewidth_trend": linewidth_trend,
                              "coupling_trend": coupling_trend},
                "posterior": {"method": posterior_method, "draws": posterior_draws, "steps": posterior_steps,
                              "seed": posterior_seed} if posterior else None,
                "progress": False if quiet else None,
                "on_warning": lambda text: click.echo(f"dnmr: warning: {series_file}: {text}", err=True)}
    with figures_as(figure_format), (scheduler_executor(scheduler) if scheduler else nullcontext((None, None))) as (
            executor, threads):
        where = {"overwrite": overwrite, "resume": resume, "workers": 1 if serial else workers or threads,
                 "executor": executor}
        if series_file.is_dir():
            batch = run_fit_folder(series_file, outdir, on_job=_echo_fit_job, **where, **settings)
            click.echo(batch.report())
            ctx.exit(batch.exit_status)
        job = run_fit(series_file, outdir, **where, **settings)
        _echo_fit_job(job)
    ctx.exit(job.exit_status)


def _echo_fit_job(job) -> None:
    """Print what `dnmr fit` did: the fit's report, the spectra that failed, report.html or why there is none."""
    click.echo(job.report())
    for problem in job.problems():
        click.echo(f"dnmr: error: {problem}", err=True)
    if job.report_file is not None:
        click.echo(f"report: {job.report_file}")
    elif job.report_problem is not None:
        click.echo(f"dnmr: warning: no report written: {job.report_problem}", err=True)


@cli.command()
@click.argument("experiment_file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("-o", "--output", "outdir", type=click.Path(file_okay=False, path_type=Path), required=True,
              help="Folder for rates.csv, results.json and fit.png.")
@click.option("--overwrite", is_flag=True, help="Replace the results of an earlier run in the folder.")
@FIGURE_FORMAT_OPTION
def transfer(experiment_file: Path, outdir: Path, overwrite: bool, figure_format: str) -> None:
    """Rates of slow exchange from a magnetisation-transfer experiment (selective inversion, saturation
    transfer or 2D exchange) described by EXPERIMENT_FILE, into OUTDIR."""
    from dnmr.fitting.transfer import run_transfer

    with figures_as(figure_format):
        click.echo(run_transfer(experiment_file, outdir, overwrite=overwrite).report())
    click.echo(f"wrote rates.csv, results.json and fit.{figure_format} into {outdir}")


@cli.command()
@click.argument("rates_files", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of the report.")
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Draw the Eyring plot with residuals to this image (PNG, SVG or PDF).")
@click.option("--process", help="Analyse only this exchange process (default: each process in the table).")
@click.option("--temperature-stderr", type=float,
              help="Standard error of every temperature, K, independent from row to row (for tables without a "
                   "temperature_stderr column).")
@click.option("--temperature-offset-stderr", type=float,
              help="Standard error of an unknown offset of the probe's temperature, K: one error shared by every "
                   "row, not scatter (e.g. 1.0 for a probe read to about ± 1 K).")
@click.option("--flagged-rows", type=click.Choice(["exclude", "widen"]), default="exclude", show_default=True,
              help="Rows whose fit is flagged misfit or at-bound:<parameter> (rates.csv of dnmr fit): set them aside, "
                   "or fit them with widened errors.")
@click.option("--scale-errors", is_flag=True,
              help="Scale the given rate errors by the reduced chi-square of the Eyring line.")
@click.option("--transmission", type=float, default=1.0, show_default=True, help="Transmission coefficient kappa.")
@click.option("--calibration", "calibration_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Set-point calibration table (CSV: setpoint_k, temperature_k); the rates' temperatures are set-points.")
@click.option("--calibration-degree", type=click.IntRange(1, 3), default=1, show_default=True,
              help="Polynomial degree of the calibration.")
@click.option("--overwrite", is_flag=True, help="Replace an existing image or tables.")
@click.option("--tables", "tables_folder", type=click.Path(file_okay=False, path_type=Path),
              help="Also write the supporting-information tables (CSV, Markdown, LaTeX) into this folder.")
@click.option("--posterior", is_flag=True,
              help="Also sample the posterior of ΔH‡ and ΔS‡ (needs emcee); with --plot, draw its pairwise posterior figure too.")
@click.option("--posterior-steps", type=click.IntRange(100, 10**7), default=10000, show_default=True,
              help="With --posterior: steps of each walker (32, or 2 per sampled parameter + 2 when more; a quarter is burn-in).")
@click.option("--posterior-seed", type=int, default=0, show_default=True, help="With --posterior: seed of the sampler.")
def eyring(rates_files: tuple[Path, ...], as_json: bool, plot_file: Path | None, process: str | None,
           temperature_stderr: float | None, temperature_offset_stderr: float | None, flagged_rows: str,
           scale_errors: bool, transmission: float, calibration_file: Path | None, calibration_degree: int,
           overwrite: bool, tables_folder: Path | None, posterior: bool, posterior_steps: int, posterior_seed: int) -> None:
    """ΔH‡, ΔS‡, ΔG‡ (Eyring) and Ea (Arrhenius) from RATES_FILES (rates.csv of `dnmr fit` or `dnmr transfer`,
    or tables of your own).

    Several tables are fitted together, process by process: lineshape rates and magnetisation-transfer
    rates on one Eyring line, each rate keeping its method (column `method`; lineshape where absent).
    With --json the first (or only) process's results are at the top level and, for several processes,
    all of them are listed under "processes"; --posterior adds a "posterior" object to each.
    """
    from dnmr.activation.study import run_eyring

    study = run_eyring(rates_files, process=process, temperature_stderr=temperature_stderr,
                       temperature_offset_stderr=temperature_offset_stderr, flagged_rows=flagged_rows,
                       scale_errors=scale_errors or None, transmission=transmission, calibration=calibration_file,
                       calibration_degree=calibration_degree, posterior=posterior, posterior_steps=posterior_steps,
                       posterior_seed=posterior_seed, plot_file=plot_file, tables_folder=tables_folder,
                       overwrite=overwrite)
    if as_json:
        print_json(study.to_dict())
    else:
        click.echo(study.report())
    for figure in study.figures:
        click.echo(f"wrote {figure}", err=as_json)
    if tables_folder is not None:
        click.echo(f"wrote {', '.join(str(p) for p in study.tables)}", err=as_json)


@cli.command()
@click.argument("liquid", type=click.Choice(["methanol", "glycol"]))
@click.option("--shift-difference-ppm", "shift_differences", type=float, multiple=True,
              help="Δδ = δ(OH) − δ(CH3 or CH2) in ppm; repeat for several readings.")
@click.option("--spectrum", "spectra", type=click.Path(path_type=Path), multiple=True,
              help="Thermometer spectrum (text, JCAMP-DX or processed folder); repeat for several.")
@click.option("--frequency-mhz", type=float, help="Spectrometer frequency, MHz (for spectra with a Hz axis).")
@click.option("--calibrate", "spectrum_list", type=click.Path(dir_okay=False, path_type=Path),
              help="Build a set-point calibration from the thermometer spectra this CSV lists (columns setpoint_k, file).")
@click.option("--degree", type=click.IntRange(1, 3), default=1, show_default=True,
              help="With --calibrate: degree of the calibration polynomial.")
@click.option("-o", "--output", type=click.Path(dir_okay=False, path_type=Path),
              help="With --calibrate: the calibration table to write (CSV for --calibration of fit, eyring and report).")
@click.option("--overwrite", is_flag=True, help="Replace an existing calibration table.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
@click.pass_context
def thermometer(ctx: click.Context, liquid: str, shift_differences: tuple[float, ...], spectra: tuple[Path, ...],
                frequency_mhz: float | None, spectrum_list: Path | None, degree: int, output: Path | None,
                overwrite: bool, as_json: bool) -> None:
    """Sample temperature from a methanol or ethylene-glycol shift thermometer (Ammann, Meier & Merbach 1982),
    or, with --calibrate, the set-point calibration from a set of thermometer spectra."""
    from dnmr.activation.thermometers import THERMOMETER_CAUTIONS, readings_to_dict, thermometer_readings

    if spectrum_list is not None:
        _calibrate(ctx, spectrum_list, liquid, degree, frequency_mhz, output, overwrite, as_json)
        return
    if output is not None:
        raise InputError("-o writes the calibration table of --calibrate LIST.csv; give that list", where="--output")
    readings = thermometer_readings(liquid, shift_differences, spectra, frequency_mhz=frequency_mhz)
    if as_json:
        print_json(readings_to_dict(readings))
    else:
        click.echo("\n".join(r.report() for r in readings))
        click.echo(THERMOMETER_CAUTIONS)


def _calibrate(ctx: click.Context, spectrum_list: Path, liquid: str, degree: int, frequency_mhz: float | None,
               output: Path | None, overwrite: bool, as_json: bool) -> None:
    """`dnmr thermometer --calibrate`: readings, fitted calibration, the table written, cautions; exit 2 when
    a spectrum of the list could not be used (the others are kept)."""
    from dnmr.activation.temperature_calibration import calibration_from_spectra
    from dnmr.activation.thermometers import THERMOMETER_CAUTIONS

    result = calibration_from_spectra(spectrum_list, liquid, degree, frequency_mhz=frequency_mhz)
    if output is not None:
        result.write_table(output, overwrite=overwrite)
    if as_json:
        print_json(result.to_dict())
    else:
        click.echo(result.report())
        click.echo(THERMOMETER_CAUTIONS)
    if output is not None:
        click.echo(f"wrote {output}", err=as_json)
    if result.skipped:
        click.echo(f"dnmr: error: {len(result.skipped)} thermometer spectra not used (see above); the calibration "
                   "rests on the others", err=True)
        ctx.exit(2)


@cli.command()
@click.argument("outdir", required=False, default="dnmr-demo", type=click.Path(file_okay=False, path_type=Path))
@click.option("--overwrite", is_flag=True, help="Write into an existing, non-empty folder.")
@click.option("--quiet", is_flag=True, help="No progress report of the series fit on stderr.")
@FIGURE_FORMAT_OPTION
def demo(outdir: Path, overwrite: bool, quiet: bool, figure_format: str) -> None:
    """Run the whole job on the bundled demo data (an invented compound) into OUTDIR (default dnmr-demo)."""
    from dnmr.demo import run_demo

    with figures_as(figure_format):
        run_demo(outdir, overwrite=overwrite, echo=click.echo, progress=False if quiet else None)


def _with_options(options):
    """Apply a tuple of click options (shared by several commands)."""
    def apply(command):
        for option in reversed(options):
            command = option(command)
        return command
    return apply


_TIMESCALE_OPTIONS = (
    click.option("--barrier-kj-mol", type=float, help="Free energy of activation ΔG‡ (kJ/mol), the same at every temperature."),
    click.option("--enthalpy-kj-mol", type=float, help="ΔH‡ (kJ/mol); give --entropy-j-mol-k with it."),
    click.option("--entropy-j-mol-k", type=float, help="ΔS‡ (J/(mol K)); give --enthalpy-kj-mol with it."),
    click.option("--process", help="Exchange process the activation parameters belong to (default: every process)."),
    click.option("--frequencies-mhz", help="Fields as 1H frequencies (MHz), comma separated (default: the model's)."),
    click.option("--detectable-fraction", type=float,
                 help="Exchange broadening, as a fraction of the linewidth, that ends slow and begins fast"
                      " exchange (default 0.1)."),
    click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of the report."),
    click.option("--overwrite", is_flag=True, help="Replace an existing image."),
    click.option("--r1-per-s", type=float,
                 help="R1 (s^-1) for the magnetisation-transfer range (default: the model's r1_per_s, else a typical"
                      " 1 s^-1)."),
)


def _activation_from_options(barrier: float | None, enthalpy: float | None, entropy: float | None):
    """ActivationParameters from the command-line options (None when none were given)."""
    from dnmr.activation.parameters import ActivationParameters

    if barrier is not None and (enthalpy is not None or entropy is not None):
        raise InputError("give --barrier-kj-mol or --enthalpy-kj-mol with --entropy-j-mol-k, not both",
                         where="--barrier-kj-mol")
    if (enthalpy is None) != (entropy is None):
        raise InputError("--enthalpy-kj-mol and --entropy-j-mol-k go together",
                         where="--entropy-j-mol-k" if entropy is None else "--enthalpy-kj-mol")
    try:
        if barrier is not None:
            return ActivationParameters.from_gibbs(barrier)
        return None if enthalpy is None else ActivationParameters(enthalpy, entropy)
    except InputError as err:  # name the option the value came from
        option = "--barrier-kj-mol" if barrier is not None else "--" + (err.where or "").replace("_", "-")
        raise InputError(err.message, where=option) from None


def _emit(result, as_json: bool, plot_file: Path | None, overwrite: bool) -> None:
    """Print a result's report or JSON, and draw its figure."""
    from dnmr.io.output import save_figure

    if plot_file:
        save_figure(result.plot(), plot_file, overwrite=overwrite, close=True)
    if as_json:
        print_json(result.to_dict())
    else:
        click.echo(result.report())
    if plot_file:
        click.echo(f"wrote {plot_file}", err=as_json)


@cli.command()
@click.argument("model_file", type=click.Path(dir_okay=False, path_type=Path))
@_with_options(_TIMESCALE_OPTIONS)
@click.option("--solvent", "solvent_name", help="Solvent by name or formula (CDCl3, toluene-d8 ...), or the name of yours.")
@click.option("--solvent-file", type=click.Path(dir_okay=False, path_type=Path),
              help="TOML file of your own solvents ([[solvent]] name, melting_point_k, boiling_point_k).")
@click.option("--melting-point-k", type=float, help="Melting point of your solvent (K).")
@click.option("--boiling-point-k", type=float, help="Boiling point of your solvent (K).")
@click.option("--probe-range-k", help="Rated temperature range of the probe (K) as low,high (default -100 to +150 °C).")
@click.option("--signal-to-noise", type=float,
              help="Tallest point of the spectrum without exchange over the rms noise (default 100).")
@click.option("--spectra", type=int, help="Number of temperatures to plan (default 8).")
@click.option("--min-step-k", type=float, help="Smallest step between temperatures (K; default 5).")
@click.option("--margin-k", type=float,
              help="Distance kept from the solvent's melting and boiling points (K; default 10).")
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Draw the predicted VT stack at the planned temperatures (PNG, SVG or PDF).")
@click.option("--series", "series_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Also write a series file for dnmr fit with the planned temperatures (first field) and the "
                   "linewidth treatment the precision assumes.")
@click.option("--transfer-runs", type=click.IntRange(0, 50),
              help="Temperatures to plan for magnetisation transfer per process (default 4; 0 for none).")
def plan(model_file: Path, barrier_kj_mol, enthalpy_kj_mol, entropy_j_mol_k, process, frequencies_mhz,
         detectable_fraction, as_json, overwrite, r1_per_s, solvent_name, solvent_file, melting_point_k,
         boiling_point_k, probe_range_k, signal_to_noise, spectra, min_step_k, margin_k, plot_file,
         series_file, transfer_runs) -> None:
    """Before booking the magnet: coalescence per field, temperatures to run for lineshapes and, below them,
    for magnetisation transfer (with delays and mixing times), solvent check and cautions."""
    from dnmr import load_model
    from dnmr.planning.plan import plan_experiment
    from dnmr.planning.solvents import solvent_from_options

    model = load_model(model_file)
    given = {"probe_range_k": _parse_list(probe_range_k, "--probe-range-k") if probe_range_k else None,
             "signal_to_noise": signal_to_noise, "spectra": spectra, "min_step_k": min_step_k,
             "detectable_fraction": detectable_fraction, "margin_k": margin_k, "r1_per_s": r1_per_s,
             "transfer_runs": transfer_runs}
    result = plan_experiment(
        model, _activation_from_options(barrier_kj_mol, enthalpy_kj_mol, entropy_j_mol_k),
        frequencies_mhz=_parse_list(frequencies_mhz, "--frequencies-mhz") if frequencies_mhz else None,
        process=process, solvent=solvent_from_options(solvent_name, solvent_file, melting_point_k, boiling_point_k),
        **{key: value for key, value in given.items() if value is not None})
    _emit(result, as_json, plot_file, overwrite)
    if series_file:
        result.write_series_file(series_file, model_file, overwrite=overwrite)
        click.echo(f"wrote {series_file}", err=as_json)


@cli.command()
@click.argument("model_file", type=click.Path(dir_okay=False, path_type=Path))
@_with_options(_TIMESCALE_OPTIONS)
@click.option("--temperature-k", type=float, help="Report regimes and the averaged spin system at this temperature (K).")
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Draw the slow/intermediate/fast bands against temperature per field (PNG, SVG or PDF).")
def timescale(model_file: Path, barrier_kj_mol, enthalpy_kj_mol, entropy_j_mol_k, process, frequencies_mhz,
              detectable_fraction, as_json, overwrite, r1_per_s, temperature_k, plot_file) -> None:
    """Slow, intermediate and fast exchange per pair and field, the magnetisation-transfer range below the
    lineshapes, and what becomes equivalent when fast."""
    from dnmr import load_model
    from dnmr.planning.timescale import timescale_view

    model = load_model(model_file)
    result = timescale_view(
        model, _activation_from_options(barrier_kj_mol, enthalpy_kj_mol, entropy_j_mol_k),
        frequencies_mhz=_parse_list(frequencies_mhz, "--frequencies-mhz") if frequencies_mhz else None,
        process=process, temperature_k=temperature_k, r1_per_s=r1_per_s,
        **({} if detectable_fraction is None else {"detectable_fraction": detectable_fraction}))
    _emit(result, as_json, plot_file, overwrite)


@cli.command()
@click.argument("outdir", type=click.Path(file_okay=False, path_type=Path))
@click.option("--calibration", "calibration_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Set-point calibration table (CSV: setpoint_k, temperature_k) for the Eyring analysis.")
@click.option("-o", "--output", type=click.Path(dir_okay=False, path_type=Path),
              help="HTML file to write (default OUTDIR/report.html).")
@click.option("--overwrite", is_flag=True, help="Replace an existing report and its supporting-information tables.")
@click.option("--transfer", "transfer_folders", multiple=True, type=click.Path(file_okay=False, path_type=Path),
              help="A folder written by `dnmr transfer` (repeat for several): its fit is shown beside the lineshape "
                   "fits and its rates join the Eyring analysis.")
@FIGURE_FORMAT_OPTION
def report(outdir: Path, calibration_file: Path | None, output: Path | None, overwrite: bool,
           transfer_folders: tuple[Path, ...], figure_format: str) -> None:
    """One self-contained HTML report of the series fit in OUTDIR (figures embedded, nothing fetched), and
    beside it supporting-information/: the rates and activation parameters as CSV, Markdown and LaTeX
    tables, and the Eyring figure in --figure-format."""
    from dnmr.reporting.report import write_report
    from dnmr.reporting.supporting import supporting_folder

    written = write_report(outdir, calibration=calibration_file, output=output, overwrite=overwrite,
                           transfer=transfer_folders, figure_format=figure_format)
    click.echo(f"wrote {written} and the tables in {supporting_folder(written)}")


def main(argv: list[str] | None = None) -> None:
    """Entry point of the ``dnmr`` console script: exit 0 on success, 2 on bad input or usage, 1 otherwise."""
    try:
        status = cli.main(args=argv, prog_name="dnmr", standalone_mode=False)
    except click.UsageError as err:  # wrong options: one line, like every other input error
        hint = f" (see: dnmr {err.ctx.command_path.partition(' ')[2]} --help)".replace("  ", " ") if err.ctx else ""
        click.echo(f"dnmr: error: {err.format_message()}{hint}", err=True)
        sys.exit(2)
    except click.exceptions.Exit as done:
        sys.exit(done.exit_code)
    except click.Abort:
        click.echo("dnmr: interrupted", err=True)
        sys.exit(1)
    except click.ClickException as err:
        click.echo(f"dnmr: error: {err.format_message()}", err=True)
        sys.exit(err.exit_code)
    except Exception:  # last resort: a bug, not bad input; keep exit status 1
        traceback.print_exc()
        sys.exit(1)
    if isinstance(status, int) and status:  # click returns the status of ctx.exit() here
        sys.exit(status)
