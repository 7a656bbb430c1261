"""The bundled demo: an invented N-aryl lactam ("DX-7") whose rotamers interconvert.

`run_demo(outdir)` runs the main job on the bundled demo data and writes everything into `outdir`.
"""
from __future__ import annotations

from importlib import resources
from pathlib import Path

from .errors import InputError
from .modelfile import load_model
from .output import atomic_write_bytes, save_figure
from .plotting import plot_stack
from .spectrum import simulate_over

DEMO_TEMPERATURES_K = (270.0, 290.0, 305.0, 320.0, 330.0, 340.0, 355.0, 375.0)


def demo_data_dir() -> Path:
    """Folder of the bundled demo files (model, series, spectra)."""
    return Path(str(resources.files("dnmr") / "data" / "demo"))


def run_demo(outdir: str | Path, overwrite: bool = False, echo=print) -> dict:
    """Run the demo into `outdir`; returns the paths written.

    Parameters
    ----------
    outdir : str or Path
        New folder for the results (refused if it exists and is not empty, unless `overwrite`).
    echo : callable
        Where progress lines go.
    """
    outdir = Path(outdir)
    if outdir.exists() and any(outdir.iterdir()) and not overwrite:
        raise InputError(f"{outdir} already exists and is not empty; choose a new folder or pass --overwrite",
                         where="OUTDIR")
    outdir.mkdir(parents=True, exist_ok=True)
    model_file = demo_data_dir() / "truth_model.toml"
    model = load_model(model_file)
    written = {"model": atomic_write_bytes(outdir / "model.toml", model_file.read_bytes(), overwrite=overwrite)}
    echo(f"demo: {model.title}")
    spectra, labels = simulate_over(model, temperatures_k=list(DEMO_TEMPERATURES_K))
    for t, spectrum in zip(DEMO_TEMPERATURES_K, spectra):
        path = spectrum.to_csv(outdir / f"simulated_{t:.0f}K.csv", overwrite=overwrite)
        written[f"spectrum_{t:.0f}K"] = path
    ax = plot_stack(spectra, labels, title="DX-7, 400 MHz: predicted VT series")
    written["stack"] = save_figure(ax.figure, outdir / "vt_stack.png", overwrite=overwrite)
    for key, path in written.items():
        echo(f"  {key:>16}: {path}")
    return written
