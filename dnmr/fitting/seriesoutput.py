"""The outputs of a series fit, written atomically into its results folder.

``rates.csv``
    One row per spectrum and process: the contract's columns temperature_k, process, rate_per_s,
    rate_stderr, rate_lower, rate_upper, then status, log10 rate and its error, the profile's 68 %
    interval, linewidths, shifts, populations, offset, phase, chi-square, noise, the spectrum file,
    flags and notes (why a bound, or why a fit failed), then ``log10_rate_shared_<source>_<j>``:
    the parts of the error that rows share through a slow-exchange trend (which ``dnmr eyring`` counts
    as correlated; :meth:`dnmr.fitting.trends.StaticTrend.shared_errors`).
``results.json``
    Everything: versions, input file hashes (SHA-256), options, every parameter with its error, the
    chi-square profiles, the shift trend, the failures.
``figures/NNN_<name>.png``, ``series_fits.png``
    Data, fit and residuals of each spectrum; the whole series stacked, measured against fitted.
"""
from __future__ import annotations

import csv
import dataclasses
import hashlib
import io
import math
import platform
import time
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

import numpy as np

from dnmr.fitting.resultsfolder import write_json
from dnmr.fitting.runner import FitRunner, SpectrumOutcome, fit_figure_or_reason, fit_figure_path
from dnmr.fitting.seriesfile import Series
from dnmr.fitting.trends import StaticTrend
from dnmr.io.output import atomic_write_bytes, atomic_write_text, figure_bytes, save_figure
from dnmr.io.tables import SHARED_RATE_ERROR_PREFIX
from dnmr.model import Model

RATE_COLUMNS = ("temperature_k", "process", "rate_per_s", "rate_stderr", "rate_lower", "rate_upper", "status",
                "log10_rate", "log10_rate_stderr", "rate_ci68_lower", "rate_ci68_upper")
"""The first columns of rates.csv (the contract's six, then the rate's status, log10 and 68 % interval)."""
TAIL_COLUMNS = ("offset_hz", "phase0_deg", "chi_square", "reduced_chi_square", "noise", "log10_rate_stderr_held",
                "treatment", "spectrum", "flags", "notes")
"""The columns of rates.csv after the static parameters of each spectrum."""
POSTERIOR_COLUMNS = ("posterior_rate_median", "posterior_rate_ci95_lower", "posterior_rate_ci95_upper",
                     "posterior_rate_bound95")
"""Added at the end of rates.csv when the posteriors were sampled (``dnmr fit --posterior``)."""


def file_sha256(path: Path) -> str | None:
    """SHA-256 of a file, or of every file in a folder (relative paths and contents); None if missing."""
    path = Path(path)
    if not path.exists():
        return None
    digest = hashlib.sha256()
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    for p in files:
        if path.is_dir():
            digest.update(str(p.relative_to(path)).encode() + b"\0")
        with open(p, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                digest.update(chunk)
    return digest.hexdigest()


def _cell(value) -> str | float:
    """A value of rates.csv: None and non-finite numbers as an empty cell."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return ""
    return value


def rate_row(outcome: SpectrumOutcome, i: int, process: str, series: Series) -> dict:
    """The row of rates.csv of process `i` (named `process`) in one spectrum's outcome (rates in s^-1,
    unknown values as empty cells)."""
    s = outcome.spectrum
    row: dict = {"temperature_k": s.temperature_k, "process": process}
    fit = outcome.fit
    if fit is None:
        row.update({c: "" for c in RATE_COLUMNS[2:]})
        row.update(status="failed")
        row.update({c: "" for c in TAIL_COLUMNS})
        row.update(spectrum=str(s.file), flags=";".join(("failed",) + s.flags), notes=outcome.error)
        return row
    r = fit.rates[i]
    row.update(rate_per_s=r.rate_per_s, rate_stderr=r.rate_stderr, rate_lower=r.rate_lower, rate_upper=r.rate_upper,
               status=r.status, log10_rate=r.log10_rate,
               log10_rate_stderr=r.log10_rate_stderr if r.status == "determined" else math.nan,
               rate_ci68_lower=r.rate_ci68[0], rate_ci68_upper=r.rate_ci68[1])
    for name, par in fit.lmfit_parameters.items():
        if name.startswith(("linewidth_hz_", "shift_ppm_", "coupling_hz_", "population_")):
            row[name] = par.value
    p = fit.lmfit_parameters
    row.update(offset_hz=p["offset_hz"].value, phase0_deg=p["phase0_deg"].value, chi_square=fit.chi_square,
               reduced_chi_square=fit.reduced_chi_square, noise=fit.noise.sigma,
               log10_rate_stderr_held=r.log10_rate_stderr_held if r.log10_rate_stderr_held > 0 else math.nan,
               treatment=";".join(f"{q}={how}" for q, how in outcome.treatment.items()), spectrum=str(s.file),
               flags=";".join(list(fit.flags) + outcome.flags + list(s.flags)),
               notes=" ".join(([r.reason] if r.reason and r.status != "determined" else []) + outcome.notes))
    if i < len(outcome.shared_rate_errors):
        row.update({SHARED_RATE_ERROR_PREFIX + k: v for k, v in outcome.shared_rate_errors[i].items()})
    post = outcome.posterior_rate(i)
    if post is not None:
        row.update(zip(POSTERIOR_COLUMNS, (post["median"], *post["ci95"], post["bound95"])))
    return {k: _cell(v) for k, v in row.items()}


def save_and_close(fig, path: Path) -> str:
    """Save a figure of the results that keeps everything inside its edges (the series figure) to `path`, replacing
    an earlier one, and close it; returns the path."""
    return str(save_figure(fig, path, overwrite=True, close=True, inside=True))


def rendered_and_closed(fig, path: Path) -> bytes:
    """The image file of a figure of the results in the format `path` asks for (its suffix, ``.png``
    following :func:`dnmr.io.output.figures_as` as the caller resolved it); the figure is closed."""
    return figure_bytes(fig, path.suffix.lstrip("."), close=True)


def write_rates_csv(path: Path, rows: Sequence[dict]) -> None:
    """Write rates.csv: the rate columns, then the static parameters present (linewidths, shifts, couplings,
    the rest), the tail columns, the shared parts of the rate errors and the posterior columns when sampled."""
    present = {k for row in rows for k in row}
    shared = sorted(k for k in present if k.startswith(SHARED_RATE_ERROR_PREFIX))
    extra = sorted(present - set(RATE_COLUMNS) - set(TAIL_COLUMNS) - set(POSTERIOR_COLUMNS) - set(shared),
                   key=lambda k: (not k.startswith("linewidth"), not k.startswith("shift"), not k.startswith("coupling"), k))
    tail = list(TAIL_COLUMNS) + shared + [c for c in POSTERIOR_COLUMNS if c in present]
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=list(RATE_COLUMNS) + extra + tail, restval="", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: repr(v) if isinstance(v, float) else v for k, v in row.items()})
    atomic_write_text(path, buffer.getvalue(), overwrite=True)


def draw_fit_figures(outcomes: Sequence[SpectrumOutcome], model: Model, outdir: Path, runner: FitRunner,
                     meanwhile: Callable[[], None]) -> None:
    """Draw data, fit and residuals of every fitted spectrum into ``figures/NNN_<name>.png`` (in the pool; the figures
    the workers drew while the fits ran, :meth:`FitRunner.early_figure`, are written as they are); `meanwhile` is
    called in this process while the workers draw.  A figure that cannot be drawn becomes a note on its spectrum."""
    drawing = []
    for i, o in enumerate(outcomes):
        if o.fitted:
            path, fit_data = fit_figure_path(outdir, i, o.spectrum), o.fit.to_dict()
            early = runner.early_figure(i, o.stage, fit_data)  # drawn while other fits ran
            if early is None:
                drawing.append((o, path, fit_data, False, runner.submit(fit_figure_or_reason, model, fit_data,
                                                                        o.fit.curves(), path)))
            else:
                drawing.append((o, path, fit_data, True, early))
    meanwhile()
    for outcome, path, fit_data, early, future in drawing:
        try:
            image = future.result()
        except Exception as exc:  # the worker died, or drawing failed in one that drew it early: drawn again here
            image = (fit_figure_or_reason(model, fit_data, outcome.fit.curves(), path) if early
                     else f"worker failed: {type(exc).__name__}: {exc}")
        if isinstance(image, bytes):
            atomic_write_bytes(path, image, overwrite=True)
        else:  # a figure is a view of the fit: the fit, its rates and the other figures stand
            outcome.notes.append(f"figure {path.name} not drawn ({image})")


def write_results_json(path: Path, series: Series, outcomes: Sequence[SpectrumOutcome], trend: StaticTrend | None,
                       notes: Sequence[str], exit_status: int, hashes: Mapping) -> None:
    """Write results.json: versions, the inputs with their SHA-256 (`hashes`: by spectrum index, and
    "model"), options, treatments, the trends, the notes, the exit status and every spectrum's outcome."""
    write_json(path, {
        "program": "dnmr fit", "versions": _versions(),
        "written_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "series": {"file": str(series.source), "sha256": file_sha256(series.source)},
        "model": {"file": str(series.model_file), "sha256": hashes["model"],
                  "processes": series.model.process_names(), "states": series.model.state_names},
        "options": series.options.to_dict(), "shifts": series.shifts, "treatments": dict(series.treatments),
        "reference_line": dataclasses.asdict(series.reference_line) if series.reference_line else None,
        "slow_exchange_below_k": series.slow_exchange_below_k,
        "shift_trend": _shift_trend_record(trend),
        "static_trend": trend.to_dict() if trend else None,
        "notes": list(notes), "exit_status": exit_status,
        "spectra": [_spectrum_record(i, o, hashes[i]) for i, o in enumerate(outcomes)],
    })


def _spectrum_record(index: int, o: SpectrumOutcome, sha256: str | None) -> dict:
    """One spectrum's entry of results.json."""
    entry = {"index": index, "where": o.spectrum.where, "file": str(o.spectrum.file), "sha256": sha256,
             "temperature_k": o.spectrum.temperature_k, "status": "fitted" if o.fitted else "failed",
             "stage": o.stage, "reused": o.reused, "flags": list(o.spectrum.flags), "notes": o.notes,
             "error": o.error or None, "bad_input": o.bad_input, "treatment": o.treatment,
             "series_flags": o.flags,
             "reference_line": o.reference, "shared_rate_errors": o.shared_rate_errors,
             "fit": o.fit.to_dict() if o.fitted else None, "posterior": o.posterior}
    if o.processing is not None:
        entry["processing"] = o.processing
    return entry


def _versions() -> dict:
    import lmfit
    import scipy

    from dnmr import __version__

    return {"dnmr": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "lmfit": lmfit.__version__}


def _shift_trend_record(trend: StaticTrend | None) -> dict | None:
    """The shift part of the trend, in the form results.json has always given it."""
    lines = trend.shift_lines() if trend else {}
    if not lines:
        return None
    temps = next(line.temperatures_k for n, line in trend.lines.items() if n in lines)
    return {"temperatures_k": list(temps), "lines": lines}

