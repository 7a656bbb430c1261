"""A model file's simulated spectra written to files: the spectrum as a CSV table with its figure
(``dnmr simulate``), and the stacked figure over rates or temperatures (``dnmr stack``).

Every output file is checked before any work, so that nothing is written half-way; files are written
atomically and never over existing ones unless asked (:mod:`dnmr.io.output`).
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

from dnmr.engine.spectrum import Spectrum, simulate, simulate_over
from dnmr.errors import InputError
from dnmr.io.modelfile import load_model
from dnmr.io.output import check_output_file
from dnmr.io.progress import block_progress

MAX_STACKED_TRACES = 100
"""Most traces a stacked figure (``dnmr stack``) draws."""


@dataclass(frozen=True)
class SimulationFiles:
    """What :func:`write_simulation` simulated and wrote.

    Attributes
    ----------
    spectrum : Spectrum
        The simulated spectrum.
    table : Path
        The CSV file (columns ppm, hz, intensity, dispersion).
    figure : Path or None
        The figure of the spectrum, when one was asked for.
    elapsed_s : float
        Time the simulation took (s), reading and writing files left out.
    """

    spectrum: Spectrum
    table: Path
    figure: Path | None
    elapsed_s: float


def write_simulation(model_file: str | Path, output: str | Path, *, plot_file: str | Path | None = None,
                     points: int | None = None, overwrite: bool = False,
                     progress: bool | None = None) -> SimulationFiles:
    """Simulate the exchange-broadened spectrum of `model_file` into the CSV file `output` and, with
    `plot_file`, its figure (PNG, SVG or PDF).

    Parameters
    ----------
    model_file : str or Path
        The model file (TOML).
    output : str or Path
        CSV file to write (columns ppm, hz, intensity, dispersion).
    plot_file : str or Path, optional
        Image of the spectrum to write as well.
    points : int, optional
        Number of points (overrides the model file).
    overwrite : bool
        Replace existing files.
    progress : bool, optional
        False: no progress report; otherwise a bar (or plain lines) on stderr for large systems.
    """
    from dnmr.io.output import save_figure

    check_output_file(output, overwrite, "--output")  # before any work: nothing is written half-way
    check_output_file(plot_file, overwrite, "--plot", figure=True)
    if plot_file is not None and Path(plot_file).resolve() == Path(output).resolve():
        raise InputError("--plot names the same file as --output; give the figure its own name", where="--plot")
    model = load_model(model_file)
    started = time.perf_counter()
    with block_progress(enabled=progress is not False) as advance:
        spectrum = simulate(model, points=points, progress=advance)
    elapsed = time.perf_counter() - started
    table = spectrum.to_csv(output, overwrite=overwrite)
    figure = save_figure(spectrum.plot().figure, plot_file, overwrite=overwrite, close=True) if plot_file else None
    return SimulationFiles(spectrum, table, figure, elapsed)


def write_stack(model_file: str | Path, output: str | Path, *, rates_per_s: list[float] | None = None,
                temperatures_k: list[float] | None = None, overwrite: bool = False) -> Path:
    """Draw the spectrum of `model_file` over a list of rates (first process, s^-1) or of temperatures (K),
    stacked bottom to top (a coalescence figure), into the image `output` (PNG, SVG or PDF).

    Parameters
    ----------
    model_file : str or Path
        The model file (TOML).
    output : str or Path
        Image to write.
    rates_per_s, temperatures_k : list of float
        One of the two: the forward rates (s^-1) of the first exchange process, or the temperatures (K)
        at which the model's activation parameters give the rates; at most :data:`MAX_STACKED_TRACES`.
    overwrite : bool
        Replace an existing image.

    Returns
    -------
    Path
        The image written.
    """
    from dnmr.io.output import save_figure
    from dnmr.reporting.plotting import plot_stack

    option, values = ("--rates-per-s", rates_per_s) if rates_per_s is not None else ("--temperatures-k", temperatures_k)
    if values is not None and len(values) > MAX_STACKED_TRACES:
        raise InputError(f"{len(values)} values: a stacked figure shows at most {MAX_STACKED_TRACES} traces",
                         where=option)
    model = load_model(model_file)
    spectra, labels = simulate_over(model, rates_per_s=rates_per_s, temperatures_k=temperatures_k)
    ax = plot_stack(spectra, labels, title=model.title)
    return save_figure(ax.figure, output, overwrite=overwrite, close=True)
