"""The bundled demo: the whole job on an invented N-aryl lactam ("DX-7") whose rotamers interconvert.

`run_demo(outdir)` fits the bundled VT series, calibrates the temperatures, runs the Eyring analysis,
plans a follow-up study and shows the NMR timescale, writes a report, and compares the recovered barrier
with the invented truth the demo spectra were made from (`dnmr/data/demo/truth.toml`, written by
`examples/make_demo_data.py`).
"""
from __future__ import annotations

import json
import os
from importlib import resources
from pathlib import Path

from dnmr.errors import InputError
from dnmr.activation.eyring import eyring_fit_file, results_to_dict
from dnmr.io.modelfile import load_model, read_toml
from dnmr.io.output import (atomic_write_text, json_ready, missing_folders, new_output_folder, remove_empty_folders,
                             save_figure)
from dnmr.planning.plan import plan_experiment
from dnmr.reporting.report import write_report
from dnmr.fitting.series import fit_series
from dnmr.planning.solvents import solvent
from dnmr.activation.temperature_calibration import read_temperature_calibration
from dnmr.activation.parameters import ActivationParameters
from dnmr.planning.timescale import timescale_view

DEMO_SOLVENT = "toluene-d8"
#: The demo's own record in its folder: what it wrote, so that --overwrite replaces only a demo's results.
DEMO_MANIFEST = "demo.json"
DEMO_FIELDS_MHZ = (400.0, 600.0)


def demo_data_dir() -> Path:
    """Folder of the bundled demo files (model, series, spectra, calibration, truth)."""
    return Path(str(resources.files("dnmr") / "data" / "demo"))


def _json(obj) -> str:
    return json.dumps(json_ready(obj), indent=2) + "\n"


def run_demo(outdir: str | Path, overwrite: bool = False, echo=print, progress: bool | None = None) -> dict:
    """Run the whole job on the demo data into `outdir`; returns what was written and the comparison.

    Parameters
    ----------
    outdir : str or Path
        New folder for the results (refused if it exists and is not empty, unless `overwrite`).
    echo : callable
        Where progress lines go.
    progress : bool, optional
        False: no progress report of the series fit; otherwise a live bar on a terminal, plain lines on
        stderr when it is a file or a pipe.
    """
    outdir = Path(outdir)
    _refuse_foreign_folder(outdir, overwrite)
    created = missing_folders(outdir)
    new_output_folder(outdir, overwrite)
    try:
        done = _run_demo(outdir, overwrite, echo, progress)
        manifest = {"program": "dnmr demo",
                    "files": sorted({os.path.relpath(path, outdir) for path in done["written"].values()})}
        atomic_write_text(outdir / DEMO_MANIFEST, _json(manifest), overwrite=True)
        return done
    finally:  # a folder made for the demo that nothing could be written into (a full disk) goes again
        remove_empty_folders(created)


def _refuse_foreign_folder(outdir: Path, overwrite: bool) -> None:
    """With `overwrite`, a folder that holds files must be an earlier demo's (its demo.json says so): the
    demo never replaces files of the same names that someone else put there."""
    if not (overwrite and outdir.is_dir() and any(outdir.iterdir())):
        return
    manifest = outdir / DEMO_MANIFEST
    try:
        ours = (not manifest.is_symlink() and manifest.is_file()
                and json.loads(manifest.read_text(encoding="utf-8")).get("program") == "dnmr demo")
    except (OSError, ValueError, AttributeError):
        ours = False
    if not ours:
        raise InputError(f"{outdir} holds files that dnmr demo did not write (no {DEMO_MANIFEST} of an earlier "
                         "demo); --overwrite replaces only a demo's results: choose a new folder", where="output")


def _run_demo(outdir: Path, overwrite: bool, echo, progress: bool | None) -> dict:
    """The work of :func:`run_demo` in its folder `outdir`, which exists."""
    data = demo_data_dir()
    model = load_model(data / "model.toml")
    truth = read_toml(data / "truth.toml")
    echo(f"demo: {model.title}")
    echo("  1/4 fitting the VT series (17 spectra) ...")
    fit_series(data / "series.toml", outdir / "fit", overwrite=overwrite, progress=progress)
    written = {"rates": outdir / "fit" / "rates.csv", "fit results": outdir / "fit" / "results.json"}

    echo("  2/4 Eyring analysis on calibrated sample temperatures ...")
    calibration = read_temperature_calibration(data / "calibration.csv")
    results = eyring_fit_file(outdir / "fit" / "rates.csv", calibration=calibration)
    eyring = results[0]
    written["eyring report"] = atomic_write_text(outdir / "eyring.txt", eyring.report() + "\n", overwrite)
    written["eyring json"] = atomic_write_text(outdir / "eyring.json", _json(results_to_dict(results)), overwrite)
    written["eyring plot"] = save_figure(eyring.plot(), outdir / "eyring.png", overwrite=overwrite, close=True)

    echo("  3/4 planning a follow-up study and the NMR timescale ...")
    activation = ActivationParameters(eyring.enthalpy_kj_mol, eyring.entropy_j_mol_k)
    plan = plan_experiment(model, activation, frequencies_mhz=DEMO_FIELDS_MHZ, solvent=solvent(DEMO_SOLVENT))
    written["plan"] = atomic_write_text(outdir / "plan.txt", plan.report() + "\n", overwrite)
    view = timescale_view(model, activation, frequencies_mhz=DEMO_FIELDS_MHZ)
    written["timescale"] = atomic_write_text(outdir / "timescale.txt", view.report() + "\n", overwrite)
    written["timescale plot"] = save_figure(view.plot(), outdir / "timescale.png", overwrite=overwrite, close=True)

    echo("  4/4 writing the report ...")
    written["report"] = write_report(outdir / "fit", calibration=data / "calibration.csv",
                                     output=outdir / "report.html", overwrite=overwrite)

    comparison = {
        "enthalpy_kj_mol": (eyring.enthalpy_kj_mol, eyring.enthalpy_stderr, truth["enthalpy_kj_mol"]),
        "entropy_j_mol_k": (eyring.entropy_j_mol_k, eyring.entropy_stderr, truth["entropy_j_mol_k"]),
        "gibbs_298_kj_mol": (*eyring.gibbs(298.15), truth["gibbs_298_kj_mol"]),
    }
    echo("")
    echo("recovered against the invented truth of the demo spectra:")
    for key, (value, err, true) in comparison.items():
        sigmas = abs(value - true) / err if err else float("nan")
        echo(f"  {key:<18} {value:9.3f} ± {err:.3f}   truth {true:9.3f}   ({sigmas:.1f} standard errors off)")
    echo("")
    for key, path in written.items():
        echo(f"  {key:>15}: {path}")
    return {"written": written, "comparison": comparison}
