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

from .errors import InputError


class _Group(click.Group):
    """Click group that maps errors onto the exit statuses of the contract (0 ok, 2 bad input, 1 other)."""

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except InputError as err:
            if ctx.obj and ctx.obj.get("debug"):
                traceback.print_exc()
            click.echo(f"dnmr: error: {err}", err=True)
            ctx.exit(2)


@click.group(cls=_Group)
@click.option("--debug", is_flag=True, help="Show the full traceback of an error.")
@click.version_option(package_name="dnmr")
@click.pass_context
def cli(ctx: click.Context, debug: bool) -> None:
    """dnmr: dynamic NMR lineshapes, exchange rates from VT spectra, and activation parameters."""
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug


def print_json(obj) -> None:
    """Print one JSON object on stdout (NaN written as null)."""
    click.echo(json.dumps(_json_safe(obj), indent=2))


def _json_safe(obj):
    if isinstance(obj, dict):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):
        obj = obj.item()
    if isinstance(obj, float) and obj != obj:
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def _parse_list(text: str, option: str) -> list[float]:
    try:
        values = [float(v) for v in text.replace(";", ",").split(",") if v.strip()]
    except ValueError:
        raise InputError(f"expected numbers separated by commas, got {text!r}", where=option) from None
    if not values:
        raise InputError("expected at least one number", where=option)
    return values


@cli.command()
@click.argument("model_file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("-o", "--output", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="CSV file to write (columns ppm, hz, intensity, dispersion).")
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Also draw the spectrum to this image (PNG, SVG or PDF).")
@click.option("--points", type=click.IntRange(16, 2**22), help="Number of points (overrides the model file).")
@click.option("--overwrite", is_flag=True, help="Replace existing output files.")
def simulate(model_file: Path, output: Path, plot_file: Path | None, points: int | None, overwrite: bool) -> None:
    """Simulate the exchange-broadened spectrum of MODEL_FILE."""
    from . import load_model, simulate as run
    from .output import save_figure

    model = load_model(model_file)
    spectrum = run(model, points=points)
    spectrum.to_csv(output, overwrite=overwrite)
    click.echo(f"wrote {output} ({len(spectrum.ppm)} points, {spectrum.ppm.min():.3f}-{spectrum.ppm.max():.3f} ppm)")
    if plot_file:
        ax = spectrum.plot()
        save_figure(ax.figure, plot_file, overwrite=overwrite)
        click.echo(f"wrote {plot_file}")


@cli.command()
@click.argument("model_file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--rates", help="Forward rates (s^-1) of the first exchange process, comma separated.")
@click.option("--temperatures", help="Temperatures (K), comma separated (rates from the model's activation parameters).")
@click.option("-o", "--output", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="Image to write (PNG, SVG or PDF).")
@click.option("--overwrite", is_flag=True, help="Replace an existing image.")
def stack(model_file: Path, rates: str | None, temperatures: str | None, output: Path, overwrite: bool) -> None:
    """Draw MODEL_FILE's spectrum over a list of rates or temperatures, stacked (a coalescence figure)."""
    from . import load_model
    from .output import save_figure
    from .plotting import plot_stack
    from .spectrum import simulate_over

    if (rates is None) == (temperatures is None):
        raise InputError("give either --rates or --temperatures", where="stack")
    model = load_model(model_file)
    if rates:
        spectra, labels = simulate_over(model, rates_per_s=_parse_list(rates, "--rates"))
    else:
        spectra, labels = simulate_over(model, temperatures_k=_parse_list(temperatures, "--temperatures"))
    ax = plot_stack(spectra, labels, title=model.title)
    save_figure(ax.figure, output, overwrite=overwrite)
    click.echo(f"wrote {output}")


@cli.command()
@click.argument("rates_file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of the report.")
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Draw the Eyring plot with residuals to this image (PNG, SVG or PDF).")
@click.option("--process", help="Analyse only this exchange process (default: each process in the table).")
@click.option("--temperature-stderr", type=float,
              help="Standard error of every temperature, K (for tables without a temperature_stderr column).")
@click.option("--transmission", type=float, default=1.0, show_default=True, help="Transmission coefficient kappa.")
@click.option("--calibration", "calibration_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Set-point calibration table (CSV: setpoint_k, temperature_k); the rates' temperatures are set-points.")
@click.option("--calibration-degree", type=click.IntRange(1, 3), default=1, show_default=True,
              help="Polynomial degree of the calibration.")
@click.option("--overwrite", is_flag=True, help="Replace an existing image.")
def eyring(rates_file: Path, as_json: bool, plot_file: Path | None, process: str | None,
           temperature_stderr: float | None, transmission: float, calibration_file: Path | None,
           calibration_degree: int, overwrite: bool) -> None:
    """dH‡, dS‡, dG‡ (Eyring) and Ea (Arrhenius) from RATES_FILE (rates.csv of `dnmr fit`, or your own table).

    With --json the first (or only) process's results are at the top level and, for several processes,
    all of them are listed under "processes".
    """
    from .activation import eyring_fit_file, results_to_dict
    from .output import save_figure
    from .plotting import plot_eyring
    from .thermometry import read_temperature_calibration

    calibration = read_temperature_calibration(calibration_file, calibration_degree) if calibration_file else None
    results = eyring_fit_file(rates_file, process=process, temperature_stderr=temperature_stderr,
                              transmission=transmission, calibration=calibration)
    if plot_file:
        save_figure(plot_eyring(results), plot_file, overwrite=overwrite)
    if as_json:
        out = results_to_dict(results)
        if calibration is not None:
            out["calibration"] = calibration.to_dict()
        print_json(out)
    else:
        parts = ([calibration.report()] if calibration is not None else []) + [r.report() for r in results]
        click.echo("\n\n".join(parts))
    if plot_file:
        click.echo(f"wrote {plot_file}", err=as_json)


@cli.command()
@click.argument("liquid", type=click.Choice(["methanol", "glycol"]))
@click.option("--shift-difference", "shift_differences", type=float, multiple=True,
              help="dd = delta(OH) - delta(CH3 or CH2) in ppm; repeat for several readings.")
@click.option("--spectrum", "spectra", type=click.Path(path_type=Path), multiple=True,
              help="Thermometer spectrum (text, JCAMP-DX or processed folder); repeat for several.")
@click.option("--frequency-mhz", type=float, help="Spectrometer frequency, MHz (for spectra with a Hz axis).")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def thermometer(liquid: str, shift_differences: tuple[float, ...], spectra: tuple[Path, ...],
                frequency_mhz: float | None, as_json: bool) -> None:
    """Sample temperature from a methanol or ethylene-glycol shift thermometer (Ammann, Meier & Merbach 1982)."""
    from .thermometry import THERMOMETER_CAUTIONS, readings_to_dict, temperature_from_file, thermometer_reading

    if not shift_differences and not spectra:
        raise InputError("give --shift-difference PPM or --spectrum FILE", where="thermometer")
    readings = [thermometer_reading(dd, liquid) for dd in shift_differences]
    readings += [temperature_from_file(path, liquid, frequency_mhz=frequency_mhz) for path in spectra]
    if as_json:
        print_json(readings_to_dict(readings))
    else:
        click.echo("\n".join(r.report() for r in readings))
        click.echo(THERMOMETER_CAUTIONS)


@cli.command()
@click.argument("outdir", required=False, default="dnmr-demo", type=click.Path(file_okay=False, path_type=Path))
@click.option("--overwrite", is_flag=True, help="Write into an existing, non-empty folder.")
def demo(outdir: Path, overwrite: bool) -> None:
    """Run the whole job on the bundled demo data (an invented compound) into OUTDIR (default dnmr-demo)."""
    from .demo import run_demo

    run_demo(outdir, overwrite=overwrite, echo=click.echo)


def main(argv: list[str] | None = None) -> None:
    """Entry point of the ``dnmr`` console script."""
    try:
        cli.main(args=argv, prog_name="dnmr", standalone_mode=True)
    except SystemExit:
        raise
    except Exception:  # pragma: no cover - last resort, keeps exit status 1
        traceback.print_exc()
        sys.exit(1)
