"""Variable-temperature series: the series file, a fit of every spectrum, and the outputs.

Series file (TOML; the first four keys are fixed by the project's interface contract)::

    model = "model.toml"              # relative to this file
    [fit]                             # optional; every option of dnmr.fitting.FitOptions, plus
    region_ppm = [2.6, 3.8]
    shifts = "slow-exchange-trend"    # "fixed" (default), "free", or from the slow-exchange spectra
    slow_exchange_below_k = 250.0     # optional: which spectra count as slow exchange for that trend
    [fit.parameters]                  # optional: fix, bound or tie parameters by name
    linewidth_hz_anti = { value = 1.1, vary = false }
    [[spectrum]]
    file = "spectra/t240.csv"         # two-column text, JCAMP-DX, or a processed-data folder
    temperature_k = 240.0
    # optional per spectrum: frequency_mhz, axis, and the fit options region_ppm, noise_ppm, noise,
    # baseline_order, phase, frequency_offset, max_offset_hz, linewidth, parameters

Fitting a series
----------------
Spectra are fitted in parallel (one worker process per core), each seeded from spectra fitted before it
in a fixed order: the coldest and the hottest first, then the middle temperature, then the middles of
the halves, and so on; a spectrum takes its rates from an Eyring line through the rates of the spectra
of earlier rounds (ln(k/T) linear in 1/T), the other parameters from the nearest of them.  The seeds
never depend on which fit finishes first, so the same inputs give the same numbers, serial or parallel.
BLAS is held to one thread in every process (the matrices are small; threads only contend), and worker
processes end with the process that started them.

With ``shifts = "slow-exchange-trend"`` the shifts of the fast-exchange spectra, which the spectra
themselves do not determine, are taken from the slow-exchange ones: the spectra in slow exchange
(below ``slow_exchange_below_k``, else those whose rate is under a quarter of the coalescence rate
pi dnu / sqrt 2 of the closest exchanging pair, Gutowsky & Holm 1956) are refitted with free shifts,
each shift is regressed linearly on temperature (weighted by its standard error), and every other
spectrum is refitted with the shifts fixed at the line's value at its temperature.

Outputs (in OUTDIR, written atomically)
---------------------------------------
``rates.csv``
    One row per spectrum and process: the contract's columns temperature_k, process, rate_per_s,
    rate_stderr, rate_lower, rate_upper, then status, log10 rate and its error, the profile's 68 %
    interval, linewidths, shifts, populations, offset, phase, chi-square, noise, the spectrum file,
    flags and a note (why a bound, or why a fit failed).
``results.json``
    Everything: versions, input file hashes (SHA-256), options, every parameter with its error, the
    chi-square profiles, the shift trend, the failures.
``figures/NNN_<name>.png``, ``series_fits.png``
    Data, fit and residuals of each spectrum; the whole series stacked, measured against fitted.
``fits/NNN_<stage>.json``
    Each fit as it finishes (what ``--resume`` continues from: a fit is reused only when the spectrum
    file, its temperature, the options and the model are unchanged).

Input files are only read.  An existing OUTDIR is refused unless ``overwrite`` (its earlier results
are replaced) or ``resume``.  A spectrum that cannot be read or fitted is reported and the others are
still fitted.
"""
from __future__ import annotations

import concurrent.futures as futures
import csv
import dataclasses
import hashlib
import io
import json
import math
import os
import platform
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError
from .fitting import FitOptions, SpectrumFit, fit_parameters, fit_spectrum, single_threaded_blas
from .kinetics import eyring_barrier, eyring_rate
from .model import Model
from .modelfile import check_keys, load_model, read_toml
from .output import atomic_write_text, json_ready, save_figure
from .inputfiles import regular_file_size
from .nuclei import check_frequency_mhz
from .readers import read_spectrum
from .tables import check_kelvin

SHIFT_MODES = ("fixed", "free", "slow-exchange-trend")
FIT_OPTION_KEYS = {f.name for f in dataclasses.fields(FitOptions)}
SERIES_KEYS = {"model", "fit", "spectrum"}
SERIES_FIT_KEYS = FIT_OPTION_KEYS | {"slow_exchange_below_k"}
SPECTRUM_OPTION_KEYS = {"region_ppm", "noise_ppm", "noise", "baseline_order", "phase", "frequency_offset",
                        "max_offset_hz", "linewidth", "parameters"}
SPECTRUM_KEYS = {"file", "temperature_k", "frequency_mhz", "axis"} | SPECTRUM_OPTION_KEYS
SLOW_EXCHANGE_FRACTION = 0.25
"""A spectrum counts as slow exchange when its rate is under this fraction of the coalescence rate."""
OUTPUT_FILES = ("rates.csv", "results.json", "series_fits.png", "series.json")
RESULT_FOLDERS = ("fits", "figures")

STAGE_MAIN, STAGE_SLOW, STAGE_TREND = "main", "slow-shifts", "trend-shifts"


# --------------------------------------------------------------------------------------------------
# the series file


@dataclass(frozen=True)
class SeriesSpectrum:
    """One spectrum of a series.

    Attributes
    ----------
    file : Path
        The spectrum (resolved against the series file's folder).
    temperature_k : float
        Sample temperature (K).
    options : FitOptions
        Fit options (the series' with this spectrum's changes).
    frequency_mhz : float or None
        Spectrometer frequency to read a Hz axis with (default the model's).
    axis : str or None
        Axis unit of a text file without a header ("ppm" or "hz").
    where : str
        Its place in the series file (``spectrum[3]``).
    flags : tuple of str
        Remarks found when reading the series (``duplicate-temperature``).
    """

    file: Path
    temperature_k: float
    options: FitOptions
    frequency_mhz: float | None = None
    axis: str | None = None
    where: str = ""
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class Series:
    """A variable-temperature series: model, fit options and spectra.

    Attributes
    ----------
    source : Path
        The series file.
    model_file : Path
        The model file.
    model : Model
        The spin model.
    options : FitOptions
        Series-wide fit options.
    shifts : str
        "fixed", "free" or "slow-exchange-trend".
    slow_exchange_below_k : float or None
        Temperature (K) below which spectra count as slow exchange for the shift trend.
    spectra : tuple of SeriesSpectrum
        In file order.
    notes : tuple of str
        Remarks (duplicate temperatures...).
    """

    source: Path
    model_file: Path
    model: Model
    options: FitOptions
    shifts: str
    slow_exchange_below_k: float | None
    spectra: tuple[SeriesSpectrum, ...]
    notes: tuple[str, ...] = ()


def _options(table: Mapping, base: FitOptions | None, where: str) -> FitOptions:
    """FitOptions from a table of option keys (merged into `base`; parameter settings merge by name)."""
    changes = dict(table)
    if base is not None and "parameters" in changes:
        if not isinstance(changes["parameters"], dict):
            raise InputError("expected a table of parameter settings", where=f"{where}.parameters")
        changes["parameters"] = {**base.parameters, **changes["parameters"]}
    try:
        return base.replace(**changes) if base is not None else FitOptions(**changes)
    except InputError as err:
        raise InputError(err.message, where=f"{where}.{err.where}" if err.where else where) from None
    except TypeError as err:  # a value of the wrong kind reaching dataclass checks
        raise InputError(f"bad value ({err})", where=where) from None


def _spectrum(table: Mapping, index: int, folder: Path, base: FitOptions) -> SeriesSpectrum:
    where = f"spectrum[{index}]"
    check_keys(table, SPECTRUM_KEYS, where, required=("file", "temperature_k"))
    file, temperature = table["file"], table["temperature_k"]
    if not isinstance(file, str) or not file.strip():
        raise InputError(f"expected the path of a spectrum, got {file!r}", where=f"{where}.file")
    if isinstance(temperature, bool) or not isinstance(temperature, (int, float)):
        raise InputError(f"expected a temperature in kelvin, got {temperature!r}", where=f"{where}.temperature_k")
    check_kelvin(float(temperature), "temperature_k", where=f"{where}.temperature_k")
    frequency = table.get("frequency_mhz")
    if frequency is not None:
        check_frequency_mhz(frequency, where=f"{where}.frequency_mhz")
    axis = table.get("axis")
    if axis is not None and axis not in ("ppm", "hz"):
        raise InputError(f'axis must be "ppm" or "hz", got {axis!r}', where=f"{where}.axis")
    options = _options({k: v for k, v in table.items() if k in SPECTRUM_OPTION_KEYS}, base, where)
    if not (folder / file).exists():  # a slip in the path: say so before any result is written
        raise InputError(f'no spectrum "{file}" in {folder}; check the path (relative to the series file)',
                         where=f"{where}.file")
    if not (folder / file).is_dir():  # a named pipe or a device would block or never end
        try:
            regular_file_size(folder / file, "spectrum file")
        except InputError as err:
            raise InputError(f'"{file}" {err.message}', where=f"{where}.file") from None
    return SeriesSpectrum((folder / file).resolve(), float(temperature), options,
                          None if frequency is None else float(frequency), axis, where)


def _flag_duplicates(spectra: list[SeriesSpectrum]) -> tuple[list[SeriesSpectrum], list[str]]:
    """Flag replicate temperatures (different files at one temperature); refuse one file listed twice."""
    for i, s in enumerate(spectra):
        first = next((o for o in spectra[:i] if o.file == s.file), None)
        if first is not None:
            raise InputError(f"{s.file.name} is already {first.where} ({first.temperature_k:g} K); one file is one "
                             "spectrum: give each [[spectrum]] its own file", where=f"{s.where}.file")
    temperatures = [s.temperature_k for s in spectra]
    notes, out = [], []
    for s in spectra:
        twins = [o.where for o in spectra if o is not s and o.temperature_k == s.temperature_k]
        if twins:
            out.append(dataclasses.replace(s, flags=s.flags + ("duplicate-temperature",)))
        else:
            out.append(s)
    repeated = sorted({t for t in temperatures if temperatures.count(t) > 1})
    if repeated:
        notes.append("more than one spectrum at " + ", ".join(f"{t:g} K" for t in repeated)
                     + ": replicates, or a typing slip in temperature_k?")
    return out, notes


def load_series(path: str | Path) -> Series:
    """Read a series file (TOML) and the model it names.

    Parameters
    ----------
    path : str or Path
        The series file.

    Returns
    -------
    Series

    Raises
    ------
    InputError
        One line naming the file and key: unknown or missing keys, a temperature that looks like degrees
        Celsius, a fit parameter the model does not have, a bad model file...
    """
    path = Path(path)
    data = read_toml(path)
    try:
        check_keys(data, SERIES_KEYS, "", required=("model", "spectrum"))
        if not isinstance(data["model"], str) or not data["model"].strip():
            raise InputError(f"expected the path of the model file, got {data['model']!r}", where="model")
        fit = dict(check_keys(data.get("fit", {}), SERIES_FIT_KEYS, "fit"))
        shifts = fit.pop("shifts", "fixed")
        if shifts not in SHIFT_MODES:
            raise InputError(f"expected one of {', '.join(SHIFT_MODES)}, got {shifts!r}", where="fit.shifts")
        below = fit.pop("slow_exchange_below_k", None)
        if below is not None:
            if isinstance(below, bool) or not isinstance(below, (int, float)):
                raise InputError(f"expected a temperature in kelvin, got {below!r}", where="fit.slow_exchange_below_k")
            check_kelvin(float(below), "slow_exchange_below_k", where="fit.slow_exchange_below_k")
        options = _options({**fit, "shifts": "free" if shifts == "free" else "fixed"}, None, "fit")
        tables = data["spectrum"]
        if not isinstance(tables, list) or not tables or not all(isinstance(t, dict) for t in tables):
            raise InputError("expected one [[spectrum]] table per spectrum", where="spectrum")
        folder = path.resolve().parent
        spectra = [_spectrum(t, i, folder, options) for i, t in enumerate(tables)]
    except InputError as err:
        raise err.located(source=path) from None
    model_file = (folder / data["model"]).resolve()
    if not model_file.is_file():
        raise InputError(f'no model file "{data["model"]}" in {folder}; check the path (relative to the series file)',
                         source=path, where="model")
    try:
        model = load_model(model_file)
    except InputError as err:  # name the series file too: that is the file the user gave
        raise InputError(str(err), source=path, where="model") from None
    for s in spectra:  # parameter settings must name parameters the model has
        try:
            fit_parameters(model, s.options.region_ppm, s.options)
        except InputError as err:
            raise InputError(err.message, source=path, where=f"{s.where}.{err.where}" if err.where else s.where) from None
    try:
        spectra, notes = _flag_duplicates(spectra)
    except InputError as err:
        raise err.located(source=path) from None
    return Series(path.resolve(), model_file, model, options, shifts, None if below is None else float(below),
                  tuple(spectra), tuple(notes))


# --------------------------------------------------------------------------------------------------
# jobs, run in worker processes


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


@dataclass(frozen=True)
class _Job:
    """One fit to do: a spectrum of the series at one stage, with the options of that stage."""

    index: int
    stage: str
    spectrum: SeriesSpectrum
    options: FitOptions
    key: str


def _job(series: Series, index: int, stage: str, options: FitOptions, hashes: Mapping) -> _Job:
    """The job of spectrum `index` at `stage`; `hashes` holds the SHA-256 of every input (by index, and
    "model"), which with the options and the stage makes the key a stored fit is reused by."""
    s = series.spectra[index]
    from . import __version__

    identity = {"spectrum": hashes[index], "file": str(s.file), "temperature_k": s.temperature_k,
                "frequency_mhz": s.frequency_mhz, "axis": s.axis, "options": options.to_dict(),
                "model": hashes["model"], "stage": stage, "dnmr": __version__}
    return _Job(index, stage, s, options, _identity_key(identity))


def _identity_key(identity: Mapping) -> str:
    """SHA-256 of everything a stored result depends on (what --resume compares)."""
    return hashlib.sha256(json.dumps(json_ready(identity), sort_keys=True).encode()).hexdigest()


def _run_job(model: Model, job: _Job, start: Mapping[str, float] | None) -> dict:
    """Fit one spectrum (in a worker process); never raises: a failure comes back as data."""
    s = job.spectrum
    try:
        spectrum = read_spectrum(s.file, frequency_mhz=s.frequency_mhz or model.spectrometer.frequency_mhz, axis=s.axis)
        fit = fit_spectrum(spectrum, model, temperature_k=s.temperature_k, options=job.options, start=start)
        return {"status": "fitted", "fit": fit.to_dict(), "curves": fit.curves()}
    except InputError as err:
        return {"status": "failed", "bad_input": True, "error": str(err.located(source=s.file))}
    except Exception as err:  # a failed fit is reported for this spectrum; the others go on
        return {"status": "failed", "bad_input": False, "error": f"{type(err).__name__}: {err}"}


def _fit_from(model: Model, fit_data: dict, curves: dict) -> SpectrumFit:
    """A stored fit (plain data) as a SpectrumFit of `model` at the fit's temperature."""
    return SpectrumFit.from_dict(fit_data, curves, model.at_temperature(fit_data["temperature_k"]))


def _save_and_close(fig, path: Path) -> str:
    return str(save_figure(fig, path, overwrite=True, close=True))


def _draw_job(model: Model, fit_data: dict, curves: dict, path: Path) -> str:
    """Draw and save the figure of one fit (in a worker process)."""
    return _save_and_close(_fit_from(model, fit_data, curves).plot(), path)


def _posterior_job(model: Model, fit_data: dict, curves: dict, settings: dict, path: Path,
                   record: tuple[Path, str]) -> dict:
    """Sample the posterior of one fit, save its corner figure and store the summary in record[0] under
    the key record[1] (what ``--resume`` reuses; in a worker process); never raises: a failure comes back
    as {"error": ...} and is not stored."""
    from .posterior import sample_spectrum_posterior

    try:
        posterior = sample_spectrum_posterior(_fit_from(model, fit_data, curves), **settings)
        _save_and_close(posterior.plot(), path)
        summary = {**posterior.to_dict(), "figure": str(path)}
        _write_json(record[0], {"key": record[1], "posterior": summary})
        return summary
    except InputError as err:
        return {"error": str(err)}
    except Exception as err:  # one spectrum's sampling failing must not lose the others
        return {"error": f"{type(err).__name__}: {err}"}


# --------------------------------------------------------------------------------------------------
# seeding from finished neighbours


def _eyring_start(points: list[tuple[float, float]], temperature_k: float) -> float | None:
    """log10 k at `temperature_k` from (T, k) pairs: a line ln(k/T) in 1/T, or one barrier."""
    temps = np.array([t for t, _ in points])
    rates = np.array([k for _, k in points])
    if len(points) == 0:
        return None
    if len(set(temps.tolist())) < 2:
        barrier = float(np.mean(eyring_barrier(rates, temps)))
        return math.log10(eyring_rate(barrier, temperature_k))
    slope, intercept = np.polyfit(1.0 / temps, np.log(rates / temps), 1)
    return float((intercept + slope / temperature_k + math.log(temperature_k)) / math.log(10))


def _start_values(target: SeriesSpectrum, finished: Sequence[tuple[SeriesSpectrum, dict]]) -> dict[str, float]:
    """Starting values for `target` from finished fits: Eyring rates, the rest from the nearest one."""
    if not finished:
        return {}
    nearest = min(finished, key=lambda f: abs(f[0].temperature_k - target.temperature_k))[1]
    start = {name: p["value"] for name, p in nearest["parameters"].items()
             if not name.startswith(("log10_k_", "amplitude", "baseline_"))}
    rate_names = [n for n in nearest["parameters"] if n.startswith("log10_k_")]  # in process order
    for i, name in enumerate(rate_names):
        points = [(s.temperature_k, f["rates"][i]["rate_per_s"]) for s, f in finished
                  if f["rates"][i]["status"] in ("determined", "interval")]
        value = _eyring_start(points, target.temperature_k)
        if value is not None:
            start[name] = value
    return start


def _seed_levels(series: Series, indices: Sequence[int]) -> dict[int, int]:
    """The level of each spectrum in a fixed seeding order: the coldest and hottest first (level 0), then
    the middle one in temperature, then the middles of the halves, and so on.  A spectrum is seeded only
    from the spectra of lower levels, so its starting values, and hence its fit, do not depend on which
    fits happen to finish first: serial and parallel runs give the same numbers."""
    order = sorted(indices, key=lambda i: (series.spectra[i].temperature_k, i))
    levels = {i: 0 for i in order[:1] + order[-1:]}
    spans, depth = [(0, len(order) - 1)], 1
    while spans:
        halves = []
        for lo, hi in spans:
            if hi - lo >= 2:
                mid = (lo + hi) // 2
                levels[order[mid]] = depth
                halves += [(lo, mid), (mid, hi)]
        spans, depth = halves, depth + 1
    return levels


# --------------------------------------------------------------------------------------------------
# outcomes and the result


@dataclass
class SpectrumOutcome:
    """What became of one spectrum of a series.

    Attributes
    ----------
    spectrum : SeriesSpectrum
        The spectrum.
    fit : SpectrumFit or None
        The final fit (None when it failed).
    error : str
        Why it failed ("" when fitted).
    bad_input : bool
        True when the failure was bad input (an unreadable file...).
    stage : str
        Which fit is final: "main", "slow-shifts" or "trend-shifts".
    reused : bool
        True when a completed fit was taken over from an earlier run (resume).
    notes : list of str
        Remarks of the series fit on this spectrum (shift trend used...).
    posterior : dict or None
        The posterior of the fit (:meth:`dnmr.posterior.Posterior.to_dict`, or ``{"error": ...}`` when
        sampling failed) when it was sampled.
    """

    spectrum: SeriesSpectrum
    fit: SpectrumFit | None
    error: str = ""
    bad_input: bool = False
    stage: str = STAGE_MAIN
    reused: bool = False
    notes: list[str] = field(default_factory=list)
    posterior: dict | None = None

    def posterior_rate(self, i: int) -> dict | None:
        """The posterior summary of the rate (s^-1) of process `i`, when sampled and that rate was free."""
        if not self.fitted or not self.posterior or "quantities" not in self.posterior:
            return None
        names = [n for n in self.fit.parameters if n.startswith("log10_k_")]  # in process order
        return self.posterior["quantities"].get("rate_per_s_" + names[i][len("log10_k_"):])

    @property
    def fitted(self) -> bool:
        """True when the spectrum was fitted."""
        return self.fit is not None


@dataclass(frozen=True)
class ShiftTrend:
    """Shifts regressed linearly on temperature over the slow-exchange spectra.

    Attributes
    ----------
    temperatures_k : tuple of float
        Temperatures (K) of the slow-exchange spectra used.
    lines : dict
        Per shift parameter: ``{"ppm_at_mean": a, "ppm_per_k": b, "mean_temperature_k": T0,
        "ppm_at_mean_stderr": .., "ppm_per_k_stderr": ..}`` (shift = a + b (T - T0)).
    """

    temperatures_k: tuple[float, ...]
    lines: dict[str, dict[str, float]]

    def at(self, temperature_k: float) -> dict[str, float]:
        """Shift (ppm) of every parameter at `temperature_k` (K)."""
        return {name: line["ppm_at_mean"] + line["ppm_per_k"] * (temperature_k - line["mean_temperature_k"])
                for name, line in self.lines.items()}

    def to_dict(self) -> dict:
        """Plain data."""
        return {"temperatures_k": list(self.temperatures_k), "lines": self.lines}


def shift_trend(fits: Sequence[tuple[float, SpectrumFit]]) -> ShiftTrend:
    """Regress every fitted shift on temperature (weighted by 1/stderr^2 where all errors are known).

    Parameters
    ----------
    fits : sequence of (temperature_k, SpectrumFit)
        Slow-exchange fits with free shifts.
    """
    temps = np.array([t for t, _ in fits], float)
    t0 = float(temps.mean())
    names = [n for n in fits[0][1].parameters if n.startswith("shift_ppm_")]
    lines = {}
    for name in names:
        values = np.array([f.parameters[name].value for _, f in fits])
        errors = np.array([np.nan if f.parameters[name].stderr is None else f.parameters[name].stderr for _, f in fits])
        weights = 1.0 / errors**2 if np.all(np.isfinite(errors) & (errors > 0)) else np.ones_like(values)
        if len(set(temps.tolist())) < 2:
            mean = float(np.average(values, weights=weights))
            spread = float(1 / math.sqrt(weights.sum())) if np.all(np.isfinite(errors)) else math.nan
            lines[name] = {"ppm_at_mean": mean, "ppm_per_k": 0.0, "mean_temperature_k": t0,
                           "ppm_at_mean_stderr": spread, "ppm_per_k_stderr": math.nan}
            continue
        x = temps - t0
        design = np.column_stack([np.ones_like(x), x]) * np.sqrt(weights)[:, None]
        coef, *_ = np.linalg.lstsq(design, values * np.sqrt(weights), rcond=None)
        cov = np.linalg.inv(design.T @ design)
        lines[name] = {"ppm_at_mean": float(coef[0]), "ppm_per_k": float(coef[1]), "mean_temperature_k": t0,
                       "ppm_at_mean_stderr": float(math.sqrt(cov[0, 0])), "ppm_per_k_stderr": float(math.sqrt(cov[1, 1]))}
    return ShiftTrend(tuple(float(t) for t in temps), lines)


RATE_COLUMNS = ("temperature_k", "process", "rate_per_s", "rate_stderr", "rate_lower", "rate_upper", "status",
                "log10_rate", "log10_rate_stderr", "ci68_low_per_s", "ci68_high_per_s")
TAIL_COLUMNS = ("offset_hz", "phase0_deg", "chi_square", "reduced_chi_square", "noise", "spectrum", "flags", "note")
POSTERIOR_COLUMNS = ("posterior_median_per_s", "posterior_ci95_low_per_s", "posterior_ci95_high_per_s",
                     "posterior_bound95_per_s")
"""Added at the end of rates.csv when the posteriors were sampled (``dnmr fit --posterior``)."""


@dataclass
class SeriesFit:
    """The fit of a whole series.

    Attributes
    ----------
    series : Series
        What was fitted.
    outdir : Path
        Where the outputs are.
    outcomes : list of SpectrumOutcome
        One per spectrum, in the series file's order.
    shift_trend : ShiftTrend or None
        The shifts' temperature trend, when taken from the slow-exchange spectra.
    notes : list of str
        Remarks on the whole series.
    """

    series: Series
    outdir: Path
    outcomes: list[SpectrumOutcome]
    shift_trend: ShiftTrend | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def failures(self) -> list[SpectrumOutcome]:
        """The spectra that could not be fitted."""
        return [o for o in self.outcomes if not o.fitted]

    @property
    def exit_status(self) -> int:
        """0 when every spectrum was fitted, 2 when one failed for bad input, else 1."""
        if not self.failures:
            return 0
        return 2 if any(o.bad_input for o in self.failures) else 1

    def by_temperature(self) -> list[SpectrumOutcome]:
        """Outcomes from the coldest spectrum to the hottest."""
        return sorted(self.outcomes, key=lambda o: o.spectrum.temperature_k)

    def rate_rows(self) -> list[dict]:
        """The rows of rates.csv (one per spectrum and process) as dicts."""
        rows = []
        processes = self.series.model.process_names()
        for outcome in self.by_temperature():
            for i, process in enumerate(processes):
                rows.append(_rate_row(outcome, i, process, self.series))
        return rows

    def report(self) -> str:
        """A table of the rates, bounds and failures."""
        fitted = sum(o.fitted for o in self.outcomes)
        width = max([12] + [len(p) for p in self.series.model.process_names()])
        lines = [f"{self.series.source.name}: {len(self.outcomes)} spectra, {fitted} fitted"
                 + (f", {len(self.failures)} failed" if self.failures else "") + f"; results in {self.outdir}", "",
                 f"  {'T / K':>7}  {'process':<{width}} {'rate':<48} {'red. chi2':>9}  flags"]
        for o in self.by_temperature():
            for i, process in enumerate(self.series.model.process_names()):
                text = o.fit.rates[i].describe().split("   ")[0] if o.fitted else "failed (see below)"
                chi = f"{o.fit.reduced_chi_square:9.3f}" if o.fitted else ""
                flags = ";".join((list(o.fit.flags) if o.fitted else ["failed"]) + list(o.spectrum.flags))
                lines.append(f"  {o.spectrum.temperature_k:>7.2f}  {process:<{width}} {text:<48} {chi:>9}  {flags}")
        for o in self.failures:
            lines.append(f"  failed: {o.spectrum.where} ({o.spectrum.file.name}): {o.error}")
        if self.shift_trend is not None:
            lines += ["", "shifts of the faster spectra from the slow-exchange trend ("
                      + ", ".join(f"{t:g}" for t in self.shift_trend.temperatures_k) + " K):"]
            for name, line in self.shift_trend.lines.items():
                lines.append(f"  {name}: {line['ppm_at_mean']:.4f} ppm at {line['mean_temperature_k']:.1f} K, "
                             f"{line['ppm_per_k'] * 1e3:+.3f} ppm per 1000 K")
        lines += self._posterior_lines(width)
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def _posterior_lines(self, width: int) -> list[str]:
        """The posterior rates of the report (when sampled)."""
        sampled = [o for o in self.by_temperature() if o.posterior is not None]
        if not sampled:
            return []
        lines = ["", "posterior of the rates (emcee; corner figures figures/NNN_<name>_posterior.png):"]
        for o in sampled:
            t = f"  {o.spectrum.temperature_k:>7.2f}"
            if "error" in o.posterior:
                lines.append(f"{t}  not sampled: {o.posterior['error']}")
                continue
            short = " [chain short for its autocorrelation time: run more steps]" if any(
                "emcee advises" in n for n in o.posterior["notes"]) else ""
            for i, process in enumerate(self.series.model.process_names()):
                q = o.posterior_rate(i)
                if q is not None:
                    lines.append(f"{t}  {process:<{width}} {_posterior_rate_text(q)}{short}")
        return lines

    def plot(self, figure=None):
        """Measured and fitted spectra of the series, stacked by temperature; returns the Figure."""
        from .plotting import plot_fit_stack

        done = [o for o in self.by_temperature() if o.fitted]
        return plot_fit_stack([o.fit for o in done], [f"{o.spectrum.temperature_k:g} K" for o in done],
                              figure=figure, title=f"{self.series.model.title or self.series.source.name}\n"
                                                   "measured (black) and fitted (red)")


def _posterior_rate_text(q: Mapping) -> str:
    """One posterior rate (a PosteriorSummary as plain data) in words."""
    if q["kind"] == "upper-bound":
        return f"k < {q['bound_95']:.3g} s^-1 (95 % upper bound)"
    if q["kind"] == "lower-bound":
        return f"k > {q['bound_95']:.3g} s^-1 (95 % lower bound)"
    if q["kind"] == "undetermined":
        return "k not determined (the posterior is the prior)"
    return f"k = {q['median']:.3g} s^-1, 95 % interval {q['ci95'][0]:.3g} to {q['ci95'][1]:.3g}"


def _cell(value) -> str | float:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return ""
    return value


def _rate_row(outcome: SpectrumOutcome, i: int, process: str, series: Series) -> dict:
    s = outcome.spectrum
    row: dict = {"temperature_k": s.temperature_k, "process": process}
    fit = outcome.fit
    if fit is None:
        row.update({c: "" for c in RATE_COLUMNS[2:]})
        row.update(status="failed")
        row.update({c: "" for c in TAIL_COLUMNS})
        row.update(spectrum=str(s.file), flags=";".join(("failed",) + s.flags), note=outcome.error)
        return row
    r = fit.rates[i]
    row.update(rate_per_s=r.rate_per_s, rate_stderr=r.rate_stderr, rate_lower=r.rate_lower, rate_upper=r.rate_upper,
               status=r.status, log10_rate=r.log10_rate,
               log10_rate_stderr=r.log10_stderr if r.status == "determined" else math.nan,
               ci68_low_per_s=r.interval_per_s[0], ci68_high_per_s=r.interval_per_s[1])
    for name, par in fit.parameters.items():
        if name.startswith(("linewidth_hz_", "shift_ppm_", "population_")):
            row[name] = par.value
    p = fit.parameters
    row.update(offset_hz=p["offset_hz"].value, phase0_deg=p["phase0_deg"].value, chi_square=fit.chi_square,
               reduced_chi_square=fit.reduced_chi_square, noise=fit.noise.sigma, spectrum=str(s.file),
               flags=";".join(list(fit.flags) + list(s.flags)),
               note=" ".join(([r.reason] if r.reason and r.status != "determined" else []) + outcome.notes))
    post = outcome.posterior_rate(i)
    if post is not None:
        row.update(zip(POSTERIOR_COLUMNS, (post["median"], *post["ci95"], post["bound_95"])))
    return {k: _cell(v) for k, v in row.items()}


# --------------------------------------------------------------------------------------------------
# running a series


def _write_json(path: Path, data) -> None:
    atomic_write_text(path, json.dumps(json_ready(data), indent=1, allow_nan=False) + "\n", overwrite=True)


class _Runner:
    """Runs fits in a process pool (or in this process), seeding each from finished neighbours,
    storing every result as it finishes and reusing stored ones on resume."""

    def __init__(self, series: Series, outdir: Path, workers: int, progress, resume: bool):
        self.series, self.outdir, self.workers, self.progress, self.resume = series, outdir, workers, progress, resume
        self.pool = futures.ProcessPoolExecutor(max_workers=workers, initializer=_worker_start,
                                              initargs=(os.getpid(),)) if workers > 1 else None

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)

    def _stored(self, job: _Job) -> Path:
        return self.outdir / "fits" / f"{job.index:03d}_{job.stage}.json"

    def _reuse(self, job: _Job) -> dict | None:
        path = self._stored(job)
        if not self.resume or not path.exists():
            return None
        try:
            data = json.loads(path.read_text())
        except (OSError, ValueError):
            return None
        return data if data.get("key") == job.key and data.get("status") == "fitted" else None

    def _store(self, job: _Job, result: dict) -> dict:
        record = {"key": job.key, "index": job.index, "stage": job.stage, "file": str(job.spectrum.file),
                  "temperature_k": job.spectrum.temperature_k, **result}
        _write_json(self._stored(job), record)
        return record

    def run(self, jobs: list[_Job], label: str) -> dict[int, dict]:
        """Fit every job; returns the stored record of each by spectrum index."""
        records: dict[int, dict] = {}
        task = self.progress.add_task(label, total=len(jobs))
        todo = []
        for job in jobs:
            reused = self._reuse(job)
            if reused is not None:
                records[job.index] = {**reused, "reused": True}
                self.progress.advance(task)
            else:
                todo.append(job)
        self.progress.refresh()
        by_index = {j.index: j for j in todo}
        levels = _seed_levels(self.series, [j.index for j in jobs])
        waiting = sorted(by_index, key=lambda i: (levels[i], self.series.spectra[i].temperature_k, i))
        running: dict = {}

        def ready(index: int) -> bool:  # every spectrum of a lower level has finished
            return all(j in records for j in levels if levels[j] < levels[index])

        def submit(index: int) -> None:
            waiting.remove(index)
            done = [(self.series.spectra[j], records[j]["fit"]) for j in sorted(levels)
                    if levels[j] < levels[index] and records[j]["status"] == "fitted"]
            start = _start_values(self.series.spectra[index], done)
            if self.pool is None:
                running[index] = _run_job(self.series.model, by_index[index], start)
            else:
                running[index] = self.pool.submit(_run_job, self.series.model, by_index[index], start)

        def collect(index: int, result: dict) -> None:
            records[index] = self._store(by_index[index], result)
            self.progress.advance(task)
            self.progress.refresh()

        while waiting or running:
            for index in [i for i in waiting if ready(i)][: max(0, self.workers - len(running))]:
                submit(index)
            if self.pool is None:
                index, result = running.popitem()
                collect(index, result)
                continue
            done, _ = futures.wait(list(running.values()), return_when=futures.FIRST_COMPLETED)
            for index in [i for i, f in running.items() if f in done]:
                collect(index, _future_result(running.pop(index)))
        return records

    def map(self, function: Callable, calls: list[tuple], label: str | None = None) -> list:
        """Run `function(*args)` for every tuple of `calls` in the pool (or here); with a `label`, a
        progress bar counts the calls done."""
        task = self.progress.add_task(label, total=len(calls)) if label else None

        def advance() -> None:
            if task is not None:
                self.progress.advance(task)
                self.progress.refresh()

        if self.pool is None:
            out = []
            for args in calls:
                out.append(function(*args))
                advance()
            return out
        pending = [self.pool.submit(function, *args) for args in calls]
        for _ in futures.as_completed(pending):
            advance()
        return [f.result() for f in pending]


_WORKER_BLAS_LIMIT = None


def _worker_start(parent_pid: int) -> None:
    """Initialise a worker process: it dies with the process that started it (`parent_pid`), and BLAS
    runs on one thread for the life of the process."""
    global _WORKER_BLAS_LIMIT
    _die_with_parent(parent_pid)
    _WORKER_BLAS_LIMIT = single_threaded_blas()


def _die_with_parent(parent_pid: int) -> None:
    """End this worker when its parent ends, so that no orphan goes on computing and holding the parent's
    stdout and stderr open (a caller reading them would wait for ever).

    On Linux the kernel sends SIGKILL on the parent's death (prctl PR_SET_PDEATHSIG); everywhere a
    watchdog thread also checks once a second that the parent is still the one that started us.
    """
    import signal
    import threading

    if sys.platform.startswith("linux"):
        try:
            import ctypes

            ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL), 0, 0, 0)  # 1: PR_SET_PDEATHSIG
        except (OSError, AttributeError):  # no libc to call: the watchdog alone
            pass
    if os.getppid() != parent_pid:  # the parent ended before the request above took effect
        os._exit(1)

    def watch() -> None:
        while os.getppid() == parent_pid:
            time.sleep(1.0)
        os._exit(1)

    threading.Thread(target=watch, name="dnmr-parent-watchdog", daemon=True).start()


def _future_result(future) -> dict:
    try:
        return future.result()
    except Exception as err:  # the worker process died (out of memory, killed...)
        return {"status": "failed", "bad_input": False, "error": f"worker failed: {type(err).__name__}: {err}"}


def _progress(show: bool | None):
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

    console = Console(stderr=True)
    enabled = console.is_terminal if show is None else bool(show)
    return Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                    console=console, auto_refresh=False, disable=not enabled, transient=False)


LOCK_FILE = ".dnmr-lock"
"""Held (an advisory lock) by the run writing into a results folder; a second run is refused meanwhile."""
STAGES = (STAGE_MAIN, STAGE_SLOW, STAGE_TREND, "posterior")


def _result_names(series: Series) -> list[str]:
    """Every file (relative to OUTDIR) a fit of `series` may write: what a later --overwrite removes."""
    names = list(OUTPUT_FILES) + ["report.html"]
    for i, s in enumerate(series.spectra):
        names += [f"fits/{i:03d}_{stage}.json" for stage in STAGES]
        names += [f"figures/{i:03d}_{s.file.stem}.png", f"figures/{i:03d}_{s.file.stem}_posterior.png"]
    return names


def _lock(outdir: Path):
    """Take the lock of `outdir` (an open file holding an exclusive advisory lock, released when closed
    or when this process ends), or refuse when another run holds it."""
    import fcntl

    handle = open(outdir / LOCK_FILE, "a+")
    try:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        handle.seek(0)
        holder = handle.read().strip() or "another process"
        handle.close()
        raise InputError(f"{outdir} is being written by another dnmr run ({holder}); wait for it to finish or "
                         "choose another folder", where="--output") from None
    handle.seek(0)
    handle.truncate()
    handle.write(f"dnmr fit, process {os.getpid()}\n")
    handle.flush()
    return handle


def _unlock(handle) -> None:
    """Release the lock taken by :func:`_lock` and remove its file."""
    Path(handle.name).unlink(missing_ok=True)
    handle.close()


def _earlier_manifest(outdir: Path) -> dict | None:
    """The manifest (series.json) of an earlier dnmr fit in `outdir`, or None when there is none."""
    manifest = outdir / "series.json"
    if manifest.is_symlink() or not manifest.is_file():
        return None
    try:
        data = json.loads(manifest.read_text())
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and data.get("program") == "dnmr fit" else None


def _remove_earlier_results(outdir: Path, names: Sequence[str]) -> None:
    """Remove the files of an earlier fit named in `names`, and only those: regular files (a link is
    never followed out of `outdir`) inside `outdir` itself."""
    root = outdir.resolve()
    for name in names:
        path = outdir / name
        if not isinstance(name, str) or ".." in Path(name).parts or Path(name).is_absolute():
            continue
        if path.is_symlink() or not path.is_file() or not path.resolve().is_relative_to(root):
            continue
        path.unlink()


def _prepare_outdir(outdir: Path, series: Series, overwrite: bool, resume: bool):
    """Refuse to overwrite or to write over inputs; clear earlier results when asked; create folders.

    Returns the lock of `outdir` (see :func:`_lock`), to be released with :func:`_unlock` after the run.
    With `overwrite`, only the files an earlier dnmr fit wrote are removed (named in its series.json);
    a folder holding anything else is refused.
    """
    if overwrite and resume:
        raise InputError("--overwrite discards earlier fits and --resume keeps them: choose one", where="--overwrite")
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"{outdir} is a file; give a folder for the results", where="--output")
    ours = {(outdir / name).resolve() for name in OUTPUT_FILES}
    inputs = [series.source, series.model_file] + [s.file for s in series.spectra]
    for p in inputs:
        inside = any(Path(p).resolve().is_relative_to((outdir / f).resolve()) for f in RESULT_FOLDERS)
        if Path(p).resolve() in ours or inside:
            raise InputError(f"the input {p} would be overwritten by the results; choose another output folder",
                             where="--output")
    for folder in RESULT_FOLDERS:
        if (outdir / folder).is_symlink() or (outdir / folder).exists() and not (outdir / folder).is_dir():
            raise InputError(f"{outdir / folder} is a link or a file, not a folder of dnmr's; dnmr writes only "
                             "inside the results folder: remove it or choose another folder", where="--output")
    existed = outdir.exists() and any(p.name != LOCK_FILE for p in outdir.iterdir())
    if existed and not (resume or overwrite):
        raise InputError(f"{outdir} already exists; pass --overwrite to replace its results or --resume to "
                         "continue them", where="--output")
    earlier = _earlier_manifest(outdir) if existed else None
    if existed and earlier is None:
        raise InputError(f"{outdir} holds no dnmr fit results (no series.json of dnmr's), so there is nothing of "
                         f"dnmr's to {'resume' if resume else 'replace'}; choose a new folder",
                         where="--resume" if resume else "--output")
    if resume and earlier.get("series") != str(series.source):
        raise InputError(f"{outdir} holds the results of another series ({earlier.get('series')}); use another "
                         "folder or --overwrite", where="--resume")
    outdir.mkdir(parents=True, exist_ok=True)
    lock = _lock(outdir)
    try:
        if existed and overwrite:
            _remove_earlier_results(outdir, list(earlier.get("files") or []) + _result_names(series))
        for folder in RESULT_FOLDERS:
            (outdir / folder).mkdir(exist_ok=True)
        names = sorted(set(_result_names(series)) | set((earlier or {}).get("files") or [] if resume else ()))
        _write_json(outdir / "series.json", {"program": "dnmr fit", "series": str(series.source), "files": names})
    except BaseException:
        _unlock(lock)
        raise
    return lock


def _outcome(series: Series, index: int, record: dict, stage: str) -> SpectrumOutcome:
    s = series.spectra[index]
    if record["status"] != "fitted":
        return SpectrumOutcome(s, None, record["error"], record.get("bad_input", False), stage)
    fit = SpectrumFit.from_dict(record["fit"], record["curves"], series.model.at_temperature(s.temperature_k))
    return SpectrumOutcome(s, fit, stage=stage, reused=record.get("reused", False))


def _coalescence_rate(model: Model) -> float:
    """pi dnu / sqrt 2 (s^-1) of the closest pair of shifts an exchange process swaps (Gutowsky & Holm 1956)."""
    shifts = model.shifts_hz()
    gaps = []
    for ex in model.exchanges:
        a, b = model.state_index(ex.from_state), model.state_index(ex.to_state)
        for i, spin in enumerate(model.spins):
            j = model.spins.index(ex.spins.get(spin, spin))
            gap = abs(shifts[a, i] - shifts[b, j])
            if gap > 0:
                gaps.append(gap)
    return math.pi * min(gaps) / math.sqrt(2) if gaps else math.inf


def _rates_are_slow(fit: SpectrumFit, limit: float) -> bool:
    """Every rate (or its upper bound) under SLOW_EXCHANGE_FRACTION of the coalescence rate `limit`."""
    for r in fit.rates:
        k = r.rate_upper if r.status == "upper-bound" else r.rate_per_s
        if r.status in ("undetermined", "lower-bound") or not k < SLOW_EXCHANGE_FRACTION * limit:
            return False
    return True


def _slow_spectra(series: Series, outcomes: Mapping[int, SpectrumOutcome], limit: float) -> list[int]:
    """The slow-exchange spectra: those below `slow_exchange_below_k` when given, else the run of the
    coldest spectra whose rates are slow (a hotter spectrum is never taken for slow exchange because a
    fit with shifts that are off gave it a low rate)."""
    fitted = sorted((i for i, o in outcomes.items() if o.fitted), key=lambda i: series.spectra[i].temperature_k)
    if series.slow_exchange_below_k is not None:
        return [i for i in fitted if series.spectra[i].temperature_k <= series.slow_exchange_below_k]
    slow = []
    for i in fitted:
        if not _rates_are_slow(outcomes[i].fit, limit):
            break
        slow.append(i)
    return slow


def _trend_stage(series: Series, runner: _Runner, outcomes: dict[int, SpectrumOutcome], hashes) -> tuple[ShiftTrend | None, list[str]]:
    """Refit the slow spectra with free shifts, regress the shifts on T, refit the others with them."""
    limit = _coalescence_rate(series.model)
    slow = _slow_spectra(series, outcomes, limit)
    if not slow:
        return None, ["no spectrum is in slow exchange, so the shifts stay at the model's values"]
    jobs = [_job(series, i, STAGE_SLOW, series.spectra[i].options.replace(shifts="free"), hashes) for i in slow]
    refits = {i: _outcome(series, i, r, STAGE_SLOW) for i, r in runner.run(jobs, "slow-exchange shifts").items()}
    if series.slow_exchange_below_k is None:  # the refits' rates, with the shifts right, decide again
        slow = _slow_spectra(series, refits, limit)
    for i in slow:
        outcomes[i] = refits[i]
    usable = [(outcomes[i].spectrum.temperature_k, outcomes[i].fit) for i in slow if outcomes[i].fitted]
    if not usable:
        return None, ["the slow-exchange fits with free shifts failed, so the shifts stay at the model's values"]
    trend = shift_trend(usable)
    notes = [] if len(set(trend.temperatures_k)) > 1 else [
        "only one slow-exchange temperature: its shifts are used without a temperature trend"]
    others = [i for i in outcomes if i not in slow and outcomes[i].fitted]
    jobs = []
    for i in others:
        s = series.spectra[i]
        held = {name: {"value": v, "vary": False} for name, v in trend.at(s.temperature_k).items()}
        jobs.append(_job(series, i, STAGE_TREND, s.options.replace(parameters={**s.options.parameters, **held}), hashes))
    span = f"{min(trend.temperatures_k):g}-{max(trend.temperatures_k):g} K"
    for i, record in runner.run(jobs, "fits with trend shifts").items():
        outcomes[i] = _outcome(series, i, record, STAGE_TREND)
        outcomes[i].notes.append(f"shifts fixed at the slow-exchange trend ({span}) at {series.spectra[i].temperature_k:g} K")
    for i in slow:
        if outcomes[i].fitted:
            outcomes[i].notes.append("slow exchange: fitted with free shifts")
    return trend, notes


def _versions() -> dict:
    import lmfit
    import scipy

    from . import __version__

    return {"dnmr": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "lmfit": lmfit.__version__}


def _write_outputs(result: SeriesFit, runner: _Runner, hashes: Mapping) -> None:
    outdir, series = result.outdir, result.series
    rows = result.rate_rows()
    present = {k for row in rows for k in row}
    extra = sorted(present - set(RATE_COLUMNS) - set(TAIL_COLUMNS) - set(POSTERIOR_COLUMNS),
                   key=lambda k: (not k.startswith("linewidth"), not k.startswith("shift"), k))
    tail = list(TAIL_COLUMNS) + [c for c in POSTERIOR_COLUMNS if c in present]
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=list(RATE_COLUMNS) + extra + tail, restval="", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: repr(v) if isinstance(v, float) else v for k, v in row.items()})
    atomic_write_text(outdir / "rates.csv", buffer.getvalue(), overwrite=True)
    draws = []
    for i, o in enumerate(result.outcomes):
        if o.fitted:
            path = outdir / "figures" / f"{i:03d}_{o.spectrum.file.stem}.png"
            draws.append((series.model, o.fit.to_dict(), o.fit.curves(), path))
    runner.map(_draw_job, draws)
    if any(o.fitted for o in result.outcomes):
        _save_and_close(result.plot(), outdir / "series_fits.png")
    spectra = []
    for i, o in enumerate(result.outcomes):
        entry = {"index": i, "where": o.spectrum.where, "file": str(o.spectrum.file), "sha256": hashes[i],
                 "temperature_k": o.spectrum.temperature_k, "status": "fitted" if o.fitted else "failed",
                 "stage": o.stage, "reused": o.reused, "flags": list(o.spectrum.flags), "notes": o.notes,
                 "error": o.error or None, "bad_input": o.bad_input,
                 "fit": o.fit.to_dict() if o.fitted else None, "posterior": o.posterior}
        spectra.append(entry)
    _write_json(outdir / "results.json", {
        "program": "dnmr fit", "versions": _versions(),
        "written_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "series": {"file": str(series.source), "sha256": file_sha256(series.source)},
        "model": {"file": str(series.model_file), "sha256": hashes["model"],
                  "processes": series.model.process_names(), "states": series.model.state_names},
        "options": series.options.to_dict(), "shifts": series.shifts,
        "slow_exchange_below_k": series.slow_exchange_below_k,
        "shift_trend": result.shift_trend.to_dict() if result.shift_trend else None,
        "notes": result.notes, "exit_status": result.exit_status, "spectra": spectra,
    })


def _sample_posteriors(result: SeriesFit, runner: _Runner, settings: dict, hashes: Mapping) -> None:
    """Sample the posterior of every fitted spectrum (in the pool) and draw its corner figure; on resume,
    a posterior stored for the same spectrum, model, fit and settings (and its figure) is reused."""
    from . import __version__

    calls, where = [], []
    for i, o in enumerate(result.outcomes):
        if not o.fitted:
            continue
        figure = result.outdir / "figures" / f"{i:03d}_{o.spectrum.file.stem}_posterior.png"
        stored = result.outdir / "fits" / f"{i:03d}_posterior.json"
        identity = {"spectrum": hashes[i], "model": hashes["model"], "stage": o.stage, "fit": o.fit.to_dict(),
                    "settings": settings, "dnmr": __version__}
        key = _identity_key(identity)
        reused = _stored_posterior(stored, key, figure) if runner.resume else None
        if reused is not None:
            o.posterior = reused
            o.notes.append("posterior reused from the earlier run")
            continue
        calls.append((result.series.model, o.fit.to_dict(), o.fit.curves(), settings, figure, (stored, key)))
        where.append(o)
    for o, posterior in zip(where, runner.map(_posterior_job, calls, label="sampling posteriors")):
        o.posterior = posterior
        if "error" in posterior:
            o.notes.append(f"posterior not sampled: {posterior['error']}")


def _stored_posterior(path: Path, key: str, figure: Path) -> dict | None:
    """The posterior summary stored at `path` under `key`, when its corner figure is still there."""
    try:
        data = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return data.get("posterior") if data.get("key") == key and figure.exists() else None


def fit_series(
    series: Series | str | Path,
    outdir: str | Path,
    *,
    overwrite: bool = False,
    resume: bool = False,
    workers: int | None = None,
    progress: bool | None = None,
    posterior: Mapping | None = None,
) -> SeriesFit:
    """Fit every spectrum of a variable-temperature series and write the results to `outdir`.

    Parameters
    ----------
    series : Series or path
        The series (or its TOML file, read with :func:`load_series`).
    outdir : str or Path
        Folder for rates.csv, results.json and the figures; refused if it exists, unless `overwrite`
        or `resume`.
    overwrite : bool
        Replace the results of an earlier run in `outdir`.
    resume : bool
        Continue an earlier run of the same series in `outdir`: completed fits whose inputs are unchanged
        are reused, the rest are fitted.
    workers : int, optional
        Worker processes (default one per core; 1 fits in this process).
    progress : bool, optional
        Show a progress bar on stderr (default: when stderr is a terminal).
    posterior : mapping, optional
        Also sample the posterior of every fitted spectrum (needs emcee; slow: about walkers x steps
        lineshape evaluations per spectrum) with these settings of
        :func:`dnmr.posterior.sample_spectrum_posterior` (steps, walkers, burn, thin, seed; ``{}`` for
        the defaults).  The summaries go into results.json and at the end of rates.csv, a corner figure
        per spectrum into ``figures/NNN_<name>_posterior.png``.  On `resume`, a posterior stored for the
        same spectrum, model, fit and settings is reused.

    Returns
    -------
    SeriesFit
        With ``exit_status`` 0 (all fitted), 2 (a spectrum failed for bad input) or 1 (a fit failed).
    """
    if posterior is not None:
        from .posterior import require_emcee

        require_emcee(where="posterior")
    series = series if isinstance(series, Series) else load_series(series)
    outdir = Path(outdir)
    lock = _prepare_outdir(outdir, series, overwrite, resume)
    try:
        return _fit_into(series, outdir, resume, workers, progress, posterior)
    finally:
        _unlock(lock)


def _fit_into(series: Series, outdir: Path, resume: bool, workers: int | None, progress: bool | None,
              posterior: Mapping | None) -> SeriesFit:
    """Fit the series into the prepared, locked `outdir` (see :func:`fit_series`)."""
    workers = max(1, min(workers or os.cpu_count() or 1, len(series.spectra)))
    hashes = {i: file_sha256(s.file) for i, s in enumerate(series.spectra)}
    hashes["model"] = file_sha256(series.model_file)
    runner = _Runner(series, outdir, workers, _progress(progress), resume)
    try:
        with runner.progress, single_threaded_blas():
            jobs = [_job(series, i, STAGE_MAIN, s.options, hashes) for i, s in enumerate(series.spectra)]
            outcomes = {i: _outcome(series, i, r, STAGE_MAIN) for i, r in runner.run(jobs, "fitting spectra").items()}
            trend, notes = (None, [])
            if series.shifts == "slow-exchange-trend":
                trend, notes = _trend_stage(series, runner, outcomes, hashes)
            result = SeriesFit(series, outdir, [outcomes[i] for i in range(len(series.spectra))], trend,
                               list(series.notes) + notes)
            if posterior is not None:
                _sample_posteriors(result, runner, dict(posterior), hashes)
            _write_outputs(result, runner, hashes)
    finally:
        runner.close()
    return result


