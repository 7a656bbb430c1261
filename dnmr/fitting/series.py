"""Variable-temperature series: the series file, a fit of every spectrum, and the outputs.

Series file (TOML; the first four keys are fixed by the project's interface contract)::

    model = "model.toml"              # relative to this file
    [fit]                             # optional; every option of dnmr.fitting.spectrumfit.FitOptions, plus
    region_ppm = [2.6, 3.8]
    shifts = "slow-exchange-trend"    # the default; "fixed" or "free"; likewise couplings, populations,
    linewidth = "slow-exchange-trend" # and linewidth (also "reference-line", "shared", "per-state")
    slow_exchange_below_k = 250.0     # optional: which spectra count as slow exchange for the trends
    [fit.reference_line]              # optional: a signal in no exchange whose width is the linewidth
    ppm = 0.0
    [fit.parameters]                  # optional: fix, bound or tie parameters by name
    linewidth_hz_anti = { start = 1.1, fixed = true }
    [[spectrum]]
    file = "spectra/t240.csv"         # two-column text, JCAMP-DX, or a processed-data folder
    temperature_k = 240.0
    # optional per spectrum: frequency_mhz, axis, and the fit options region_ppm, noise_ppm, noise,
    # baseline_order, phase, frequency_offset, max_offset_hz, linewidth, parameters
    processing = { line_broadening_hz = 0.5 }   # raw FIDs only (dnmr.io.processing); also series-wide as [processing]

Fitting a series
----------------
Spectra are fitted in parallel (one worker process per core), each seeded from spectra fitted before it
in a fixed order: the coldest and the hottest first, then the middle temperature, then the middles of
the halves, and so on; a spectrum takes its rates from an Eyring line through the rates of the spectra
of earlier rounds (ln(k/T) linear in 1/T), the other parameters from the nearest of them.  The seeds
never depend on which fit finishes first, so the same inputs give the same numbers, serial or parallel.
BLAS is held to one thread in every process (the matrices are small; threads only contend), and worker
processes end with the process that started them.

Static spectral parameters (shifts, couplings, populations of states joined by an exchange, the
intrinsic linewidth) are by default taken from the slow-exchange spectra ("slow-exchange-trend"):

1. the coldest spectra are fitted with them free, a batch (one spectrum per worker) at a time, until
   one is not in slow exchange; the slow-exchange run is the coldest contiguous spectra whose rate (or
   its upper bound) is under a quarter of the coalescence rate pi dnu / sqrt 2 of the closest
   exchanging pair (Gutowsky & Holm 1956) and whose free static parameters are determined (or those
   at or below ``slow_exchange_below_k``);
2. shifts and couplings are regressed linearly on T, populations as ln(p/p_first) on 1/T (van 't Hoff),
   the linewidth on T over the spectra of the run whose rates are only upper bounds (elsewhere the
   linewidth and the exchange broadening k/pi trade against each other);
3. every other spectrum is fitted with them held at the trend's value at its temperature, and the
   trend's error there is carried into its rates (:mod:`dnmr.fitting.spectrumfit`, held parameters with a stderr).

A reference line (``[fit.reference_line]``, a signal in no exchange) gives the linewidth instead: it is
fitted in every spectrum and its width held as the intrinsic linewidth, with its error.

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
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from dnmr.fitting.workers import process_pool
from dnmr.errors import InputError, did_you_mean
from dnmr.fitting.spectrumfit import FitOptions, ParameterLayout, SpectrumFit, _pair, fit_parameters, fit_spectrum
from dnmr.fitting.workers import single_threaded_blas
from dnmr.kinetics import coalescence_rate_per_s, eyring_barrier, eyring_rate
from dnmr.model import Model
from dnmr.io.modelfile import check_keys, load_model, read_toml
from dnmr.io.output import atomic_write_text, json_ready, save_figure
from dnmr.io.inputfiles import regular_file_size
from dnmr.nuclei import check_frequency_mhz
from dnmr.io.readers import read_spectrum
from dnmr.io.progress import ProgressReport
from dnmr.io.tables import celsius_hints, check_kelvin
from dnmr.notebook import NotebookView

TREND = "slow-exchange-trend"
REFERENCE_LINE = "reference-line"
TREATMENTS = {
    "shifts": (TREND, "fixed", "free"),
    "couplings": (TREND, "fixed", "free"),
    "populations": (TREND, "fixed", "free"),
    "linewidth": (TREND, REFERENCE_LINE, "fixed", "shared", "per-state"),
}
"""Series-level treatment of each static spectral parameter (the first is the default)."""
SHIFT_MODES = TREATMENTS["shifts"]
PARAMETER_PREFIX = {"shift": "shift_ppm_", "coupling": "coupling_hz_", "population": "population_",
                    "linewidth": "linewidth_hz_"}
TREATMENT_KIND = {"shifts": "shift", "couplings": "coupling", "populations": "population", "linewidth": "linewidth"}
MIN_HELD_LINEWIDTH_HZ = 1e-3
"""A linewidth trend extrapolated below this (Hz) is held here (the fit's lower limit of a linewidth)."""
REFERENCE_KEYS = {"ppm", "multiplicity", "coupling_hz", "window_ppm", "added_width_hz"}
MULTIPLICITIES = {"s": (0, 0.5), "d": (1, 0.5), "t": (2, 0.5), "q": (3, 0.5), "p": (4, 0.5),
                  "1:1:1": (1, 1.0), "1:2:3:2:1": (2, 1.0), "1:3:6:7:6:3:1": (3, 1.0)}
"""Multiplet patterns of a reference line: (number of equivalent partners, their spin); first order."""
FIT_OPTION_KEYS = {f.name for f in dataclasses.fields(FitOptions)}
SERIES_KEYS = {"model", "fit", "spectrum", "processing"}
SERIES_FIT_KEYS = FIT_OPTION_KEYS | {"slow_exchange_below_k", "reference_line"}
SPECTRUM_OPTION_KEYS = {"region_ppm", "noise_ppm", "noise", "baseline_order", "phase", "frequency_offset",
                        "max_offset_hz", "linewidth", "parameters"}
SPECTRUM_KEYS = {"file", "temperature_k", "frequency_mhz", "axis", "processing"} | SPECTRUM_OPTION_KEYS
SLOW_EXCHANGE_FRACTION = 0.25
"""A spectrum counts as slow exchange when its rate is under this fraction of the coalescence rate."""
OUTPUT_FILES = ("rates.csv", "results.json", "series_fits.png", "series.json")
RESULT_FOLDERS = ("fits", "figures")

STAGE_MAIN, STAGE_SLOW, STAGE_HELD = "main", "slow-exchange", "held"


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
    processing : dict or None
        How to process a raw FID (:class:`dnmr.io.processing.ProcessingOptions` as plain data).
    """

    file: Path
    temperature_k: float
    options: FitOptions
    frequency_mhz: float | None = None
    axis: str | None = None
    where: str = ""
    flags: tuple[str, ...] = ()
    processing: dict | None = None


@dataclass(frozen=True)
class ReferenceLine:
    """A signal that takes part in no exchange (TMS, a solvent residual, an internal standard), whose
    width in every spectrum gives the intrinsic linewidth.

    Attributes
    ----------
    ppm : float
        Its shift (ppm); the frequency offset of each spectrum absorbs referencing drift.
    multiplicity : str
        "s", "d", "t", "q", "p" (first-order, coupled to 0-4 equivalent spins-1/2), or "1:1:1",
        "1:2:3:2:1", "1:3:6:7:6:3:1" (coupled to 1-3 equivalent deuterons, as a solvent residual).
    coupling_hz : float
        The splitting (Hz) of a multiplet.
    window_ppm : (float, float) or None
        The part of each spectrum fitted for it (default: the multiplet plus 25 linewidths each side).
    added_width_hz : float
        Added to the reference width to give the intrinsic linewidth of the exchanging signals (Hz; the
        difference of their natural widths when known, else 0).
    """

    ppm: float
    multiplicity: str = "s"
    coupling_hz: float = 0.0
    window_ppm: tuple[float, float] | None = None
    added_width_hz: float = 0.0

    def model(self, spectrometer, linewidth_hz: float) -> Model:
        """The reference line as a model without exchange (its partners as a group of a heteronucleus of
        their spin, which gives the same first-order multiplet)."""
        from dnmr.modelparts import State

        count, spin = MULTIPLICITIES[self.multiplicity]
        observed = spectrometer.isotope.symbol
        if count == 0:
            return Model(spectrometer, (State("reference", {"R": self.ppm}, linewidth_hz=linewidth_hz, population=1.0),))
        partner = ("1H" if observed != "1H" else "13C") if spin == 0.5 else ("2H" if observed != "2H" else "14N")
        state = State("reference", {"R": self.ppm}, {"R-X": self.coupling_hz}, linewidth_hz=linewidth_hz, population=1.0)
        return Model(spectrometer, (state,), heteronuclei={"X": partner}, groups={"X": count})

    def window(self, frequency_mhz: float, linewidth_hz: float) -> tuple[float, float]:
        """The fitted window (ppm)."""
        if self.window_ppm is not None:
            return self.window_ppm
        count, spin = MULTIPLICITIES[self.multiplicity]
        half = (abs(self.coupling_hz) * count * 2 * spin / 2 + 25.0 * max(linewidth_hz, 0.5)) / frequency_mhz
        return self.ppm - half, self.ppm + half


def _reference_line(table, where: str) -> ReferenceLine:
    if not isinstance(table, Mapping):
        raise InputError("expected a table such as { ppm = 0.0 }", where=where)
    check_keys(table, REFERENCE_KEYS, where, required=("ppm",))
    number = lambda key, value: value if (isinstance(value, (int, float)) and not isinstance(value, bool)  # noqa: E731
                                          and math.isfinite(value)) else _bad(f"expected a number, got {value!r}", f"{where}.{key}")
    multiplicity = table.get("multiplicity", "s")
    if multiplicity not in MULTIPLICITIES:
        _bad(f'expected one of {", ".join(MULTIPLICITIES)}, got {multiplicity!r}', f"{where}.multiplicity")
    coupling = float(number("coupling_hz", table.get("coupling_hz", 0.0)))
    if multiplicity != "s" and coupling == 0.0:
        _bad(f'a "{multiplicity}" reference line needs its coupling_hz', f"{where}.coupling_hz")
    added = float(number("added_width_hz", table.get("added_width_hz", 0.0)))
    window = table.get("window_ppm")
    if window is not None:
        window = _pair(window, f"{where}.window_ppm")
    return ReferenceLine(float(number("ppm", table["ppm"])), multiplicity, coupling, window, added)


def _bad(message: str, where: str):
    raise InputError(message, where=where)


def _reference_fits(series: Series) -> tuple[dict[int, dict], list[str]]:
    """Fit the reference line in every spectrum (when the linewidth comes from it): per spectrum index its
    width and error and, where they are determined, the setting that holds the linewidth at the width plus
    ``added_width_hz``; with notes on the spectra where it could not."""
    ref = series.reference_line
    if ref is None or series.treatments["linewidth"] != REFERENCE_LINE:
        return {}, []
    model, sf = series.model, series.model.spectrometer.frequency_mhz
    guess = float(np.max(model.linewidths_hz()))
    line = ref.model(model.spectrometer, guess)
    name = ParameterLayout.for_model(model, series.options).linewidth_names[0]
    out: dict[int, dict] = {}
    for i, s in enumerate(series.spectra):
        window = ref.window(sf, guess)
        try:
            spectrum = read_spectrum(s.file, frequency_mhz=s.frequency_mhz or sf, axis=s.axis)
            fit = fit_spectrum(spectrum, line, options=FitOptions(
                region_ppm=window, noise_ppm=s.options.noise_ppm, noise=s.options.noise, baseline_order=1,
                phase=s.options.phase, linewidth="shared", profile=False))
        except Exception as err:  # one spectrum's reference failing leaves its linewidth free, not the series lost
            out[i] = {"window_ppm": list(window), "error": str(err)}
            continue
        par = fit.parameters["linewidth_hz_reference"]
        stderr = math.nan if par.stderr is None else float(par.stderr)
        record = {"window_ppm": list(window), "width_hz": float(par.value), "stderr_hz": stderr,
                  "reduced_chi_square": fit.reduced_chi_square, "flags": list(fit.flags)}
        if math.isfinite(stderr) and not any(f.startswith("at-bound:linewidth") for f in fit.flags):
            record["setting"] = {name: _held_setting(par.value + ref.added_width_hz, stderr)}
        else:
            record["error"] = "its width is not determined (" + ";".join(fit.flags or ["no error"]) + ")"
        out[i] = record
    failed = [series.spectra[i].where for i, r in out.items() if "setting" not in r]
    notes = [f"the reference line at {ref.ppm:g} ppm gave no linewidth in {', '.join(failed)} ("
             + "; ".join(out[i]["error"] for i in out if "setting" not in out[i])
             + "), so the linewidth is fitted there; check the line's ppm and window_ppm"] if failed else []
    return out, notes


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
        Series-wide fit options (with every parameter of a slow-exchange trend free).
    shifts : str
        The treatment of the shifts (as ``treatments["shifts"]``).
    slow_exchange_below_k : float or None
        Temperature (K) below which spectra count as slow exchange for the trends.
    spectra : tuple of SeriesSpectrum
        In file order.
    notes : tuple of str
        Remarks (duplicate temperatures...).
    treatments : dict
        Treatment of "shifts", "couplings", "populations" and "linewidth": "slow-exchange-trend",
        "fixed", "free" (shifts, couplings, populations), "shared" or "per-state" (a linewidth free in
        every spectrum), "reference-line" (linewidth).  Populations are only treated where an exchange
        joins different states; otherwise they are "fixed".
    reference_line : ReferenceLine or None
        The signal whose width gives the intrinsic linewidth.
    warnings : tuple of str
        Hints on input that is accepted but implausible (temperatures that look like degrees Celsius);
        also among the `notes`, and printed on stderr by ``dnmr fit``.
    """

    source: Path
    model_file: Path
    model: Model
    options: FitOptions
    shifts: str
    slow_exchange_below_k: float | None
    spectra: tuple[SeriesSpectrum, ...]
    notes: tuple[str, ...] = ()
    treatments: Mapping[str, str] = field(default_factory=lambda: {"shifts": "fixed", "couplings": "fixed",
                                                                   "populations": "fixed", "linewidth": "shared"})
    reference_line: ReferenceLine | None = None
    warnings: tuple[str, ...] = ()

    def trended(self) -> list[str]:
        """The kinds of parameter ("shift", "coupling", "population", "linewidth") taken from the slow-exchange trend."""
        return [TREATMENT_KIND[q] for q, mode in self.treatments.items() if mode == TREND]


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


def _processing(table: Mapping, base: dict | None, where: str) -> dict | None:
    """Processing options of a raw FID (merged over the series' `base`), checked, as plain data."""
    from dnmr.io.processing import ProcessingOptions

    if "processing" not in table:
        return base
    changes = table["processing"]
    try:
        if not isinstance(changes, dict):
            raise InputError("expected a table of processing options")
        return ProcessingOptions.from_mapping({**(base or {}), **changes}).to_dict()
    except InputError as err:
        raise InputError(err.message, where=f"{where}processing" + (f".{err.where}" if err.where else "")) from None


def _spectrum(table: Mapping, index: int, folder: Path, base: FitOptions, processing: dict | None = None
              ) -> SeriesSpectrum:
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
                          None if frequency is None else float(frequency), axis, where,
                          processing=_processing(table, processing, f"{where}."))


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
        reference = fit.pop("reference_line", None)
        reference = None if reference is None else _reference_line(reference, "fit.reference_line")
        treatments = {}
        for quantity, modes in TREATMENTS.items():
            default = REFERENCE_LINE if quantity == "linewidth" and reference is not None else modes[0]
            mode = fit.pop(quantity, default)
            if mode not in modes:
                raise InputError(f"expected one of {', '.join(modes)}, got {mode!r}{did_you_mean(str(mode), modes)}",
                                 where=f"fit.{quantity}")
            treatments[quantity] = mode
        if treatments["linewidth"] == REFERENCE_LINE and reference is None:
            raise InputError('linewidth = "reference-line" needs a [fit.reference_line] table giving the ppm of a '
                             "signal that takes part in no exchange", where="fit.linewidth")
        below = fit.pop("slow_exchange_below_k", None)
        if below is not None:
            if isinstance(below, bool) or not isinstance(below, (int, float)):
                raise InputError(f"expected a temperature in kelvin, got {below!r}", where="fit.slow_exchange_below_k")
            check_kelvin(float(below), "slow_exchange_below_k", where="fit.slow_exchange_below_k")
        free = lambda q: "free" if treatments[q] in ("free", TREND) else "fixed"  # noqa: E731
        linewidth = {TREND: "shared", REFERENCE_LINE: "shared"}.get(treatments["linewidth"], treatments["linewidth"])
        options = _options({**fit, "shifts": free("shifts"), "couplings": free("couplings"),
                            "populations": free("populations"), "linewidth": linewidth}, None, "fit")
        tables = data["spectrum"]
        if not isinstance(tables, list) or not tables or not all(isinstance(t, dict) for t in tables):
            raise InputError("expected one [[spectrum]] table per spectrum", where="spectrum")
        folder = path.resolve().parent
        processing = _processing(data, None, "")
        spectra = [_spectrum(t, i, folder, options, processing) for i, t in enumerate(tables)]
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
    if not _populations_matter(model) and treatments["populations"] != "fixed":
        treatments["populations"] = "fixed"  # no exchange between different states: nothing to fit
        spectra = [dataclasses.replace(s, options=s.options.replace(populations="fixed")) for s in spectra]
        options = options.replace(populations="fixed")
    if not any(s.couplings_hz for s in model.states) and treatments["couplings"] != "fixed":
        treatments["couplings"] = "fixed"  # the model has no couplings
        spectra = [dataclasses.replace(s, options=s.options.replace(couplings="fixed")) for s in spectra]
        options = options.replace(couplings="fixed")
    # parameter settings must name parameters the model has: those of [fit.parameters] are checked (and
    # reported) there, before those a [[spectrum]] adds
    for where, opts in [("fit", options)] + [(s.where, s.options) for s in spectra]:
        try:
            fit_parameters(model, opts.region_ppm, opts)
        except InputError as err:
            raise InputError(err.message, source=path, where=f"{where}.{err.where}" if err.where else where) from None
    try:
        spectra, notes = _flag_duplicates(spectra)
    except InputError as err:
        raise err.located(source=path) from None
    hints = celsius_hints([s.temperature_k for s in spectra], model.temperature_k)
    return Series(path.resolve(), model_file, model, options, treatments["shifts"],
                  None if below is None else float(below), tuple(spectra), tuple(hints + notes), treatments, reference,
                  tuple(hints))


def _populations_matter(model: Model) -> bool:
    """True when an exchange joins two different states (their populations shape the spectrum)."""
    return len(model.states) > 1 and any(ex.from_state != ex.to_state for ex in model.exchanges)


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
    from dnmr import __version__

    identity = {"spectrum": hashes[index], "file": str(s.file), "temperature_k": s.temperature_k,
                "frequency_mhz": s.frequency_mhz, "axis": s.axis, "options": options.to_dict(),
                "model": hashes["model"], "stage": stage, "dnmr": __version__}
    if s.processing is not None:
        identity["processing"] = s.processing
    return _Job(index, stage, s, options, _identity_key(identity))


def _identity_key(identity: Mapping) -> str:
    """SHA-256 of everything a stored result depends on (what --resume compares)."""
    return hashlib.sha256(json.dumps(json_ready(identity), sort_keys=True).encode()).hexdigest()


def _run_job(model: Model, job: _Job, start: Mapping[str, float] | None) -> dict:
    """Fit one spectrum (in a worker process); never raises: a failure comes back as data."""
    s = job.spectrum
    try:
        spectrum = read_spectrum(s.file, frequency_mhz=s.frequency_mhz or model.spectrometer.frequency_mhz, axis=s.axis,
                                 processing=s.processing)
        fit = fit_spectrum(spectrum, model, temperature_k=s.temperature_k, options=job.options, start=start)
        processing = spectrum.metadata.get("processing")
        if processing:  # the apodization's exact addition to every linewidth, said beside the fit
            fit.notes.extend(n for n in processing["notes"] if n not in fit.notes)
        return {"status": "fitted", "fit": fit.to_dict(), "curves": fit.curves(), "processing": processing}
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
    """Sample the posterior of one fit, save its pairwise posterior figure and store the summary in record[0] under
    the key record[1] (what ``--resume`` reuses; in a worker process); never raises: a failure comes back
    as {"error": ...} and is not stored."""
    from dnmr.fitting.posterior import sample_spectrum_posterior

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
    start = {name: p["estimate"] for name, p in nearest["parameters"].items()
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
        Which fit is final: "main" (no trends), "slow-exchange" (static parameters free) or "held"
        (static parameters held at their trends).
    reused : bool
        True when a completed fit was taken over from an earlier run (resume).
    notes : list of str
        Remarks of the series fit on this spectrum (shift trend used...).
    treatment : dict of str to str
        How "shifts", "couplings", "populations" and "linewidth" were treated in the final fit:
        "fitted", "trend", "model", "reference-line" or "user".
    reference : dict or None
        The fit of the reference line (width, its error, flags) when the series names one.
    flags : list of str
        Remarks of the series fit on this spectrum: ``trend-<quantity>`` and ``reference-line-linewidth``
        (values held from elsewhere), ``trend-one-temperature`` (held at values from a single
        slow-exchange temperature, whose drift with temperature is unknown and not in the error).
    """

    spectrum: SeriesSpectrum
    fit: SpectrumFit | None
    error: str = ""
    bad_input: bool = False
    stage: str = STAGE_MAIN
    reused: bool = False
    notes: list[str] = field(default_factory=list)
    posterior: dict | None = None
    processing: dict | None = None
    treatment: dict[str, str] = field(default_factory=dict)
    reference: dict | None = None
    flags: list[str] = field(default_factory=list)

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
class ParameterTrend:
    """One static spectral parameter regressed on temperature over slow-exchange spectra.

    ``y = a + b (x - x0)`` by weighted least squares (weights 1/stderr^2), with x = T (K) for shifts,
    couplings and the linewidth, and for a population x = 1/T, y = ln(p_state / p_first) (van 't Hoff).
    The covariance of (a, b) is widened by the reduced chi-square of the line when that is above 1
    (scatter beyond the errors).  From one temperature (``constant`` is true) a shift, coupling or
    linewidth is held constant (b = 0), and a population ratio keeps its free-energy difference
    (b = a / x0: ln K proportional to 1/T, dS° = 0).

    Attributes
    ----------
    name : str
        The fit parameter (``shift_ppm_a_H``, ``coupling_hz_M_Ha_Hb``, ``linewidth_hz_a``, ``population_b``).
    kind : str
        "linear-in-T" or "van-t-hoff".
    temperatures_k, values, stderrs : tuple of float
        The points regressed (values in the parameter's unit, or ln(p/p_first)).
    x0 : float
        Centre of x (K, or 1/K).
    coefficients : (float, float)
        a and b.
    covariance : ((float, float), (float, float))
        Covariance of a and b.
    reduced_chi_square : float
        Of the line (NaN without degrees of freedom).
    constant : bool
        True when the points come from one temperature (no slope).
    """

    name: str
    kind: str
    temperatures_k: tuple[float, ...]
    values: tuple[float, ...]
    stderrs: tuple[float, ...]
    x0: float
    coefficients: tuple[float, float]
    covariance: tuple[tuple[float, float], tuple[float, float]]
    reduced_chi_square: float
    constant: bool = False

    def x(self, temperature_k: float) -> float:
        return 1.0 / temperature_k if self.kind == "van-t-hoff" else temperature_k

    def at(self, temperature_k: float) -> tuple[float, float]:
        """The line's value and its standard error at `temperature_k` (K)."""
        d = np.array([1.0, self.x(temperature_k) - self.x0])
        a, b = self.coefficients
        return float(a + b * d[1]), float(math.sqrt(max(d @ np.array(self.covariance) @ d, 0.0)))

    def to_dict(self) -> dict:
        """Plain data."""
        return dataclasses.asdict(self)


def regress_trend(name: str, kind: str, temperatures_k, values, stderrs) -> ParameterTrend:
    """Weighted straight line of `values` (with standard errors `stderrs`) on T or 1/T; see
    :class:`ParameterTrend`.  Points with an unknown error are weighted equally with the scatter as error."""
    temps = np.asarray(temperatures_k, float)
    y, err = np.asarray(values, float), np.asarray(stderrs, float)
    x = 1.0 / temps if kind == "van-t-hoff" else temps
    known = bool(np.all(np.isfinite(err) & (err > 0)))
    w = 1.0 / err**2 if known else np.ones_like(y)
    x0 = float(np.average(x, weights=w))
    if len(set(temps.tolist())) < 2:
        mean = float(np.average(y, weights=w))
        var = 1.0 / w.sum() if known else (float(np.var(y, ddof=1)) / y.size if y.size > 1 else math.nan)
        # A population ratio from one temperature keeps its free-energy difference (dS° = 0, so ln K is
        # proportional to 1/T; common practice), not its ratio: the line runs through x = 0.
        slope = mean / x0 if kind == "van-t-hoff" else 0.0
        d = np.array([1.0, slope / mean if mean else 0.0])
        cov = var * np.outer(d, d)
        return ParameterTrend(name, kind, tuple(temps.tolist()), tuple(y.tolist()), tuple(err.tolist()), x0,
                              (mean, slope), tuple(tuple(float(v) for v in row) for row in cov), math.nan,
                              constant=True)
    design = np.column_stack([np.ones_like(x), x - x0]) * np.sqrt(w)[:, None]
    coef, *_ = np.linalg.lstsq(design, y * np.sqrt(w), rcond=None)
    cov = np.linalg.inv(design.T @ design)
    dof = y.size - 2
    chi2 = float(np.sum(w * (y - coef[0] - coef[1] * (x - x0)) ** 2))
    red = chi2 / dof if dof > 0 else math.nan
    if not known:
        cov = cov * (red if dof > 0 else math.nan)
    elif dof > 0 and red > 1.0:
        cov = cov * red
    return ParameterTrend(name, kind, tuple(temps.tolist()), tuple(y.tolist()), tuple(err.tolist()), x0,
                          (float(coef[0]), float(coef[1])), tuple(tuple(float(v) for v in row) for row in cov), red)


@dataclass(frozen=True)
class StaticTrend:
    """The temperature trends of the static spectral parameters, taken from the slow-exchange spectra.

    Attributes
    ----------
    lines : dict of str to ParameterTrend
        One per trended fit parameter.
    first_population : str or None
        The population every van 't Hoff line is relative to.
    notes : tuple of str
        How the trends were made (which spectra, a single temperature...).
    differences : dict of str to ParameterTrend
        Every shift but the first as its difference from the first (``first_shift``), regressed the same
        way.  These give the errors of the held shifts: a shift common to all lines (referencing, which
        in the slow-exchange fits moves every shift alike) is taken up by the frequency offset of the
        held fits, so only the differences carry an error into the rates.
    first_shift : str or None
        The shift the differences are taken from.
    """

    lines: dict[str, ParameterTrend]
    first_population: str | None = None
    notes: tuple[str, ...] = ()
    differences: dict[str, ParameterTrend] = field(default_factory=dict)
    first_shift: str | None = None

    def held(self, temperature_k: float, kinds: Sequence[str] = ("shift", "coupling", "population", "linewidth")
             ) -> dict[str, dict]:
        """Parameter settings holding the trended parameters of `kinds` at `temperature_k` (K), each with
        its value as ``start``, ``fixed = True`` and the standard error of the line there (which the fit carries into
        the rates).  Populations come back normalised, the error on each but the first (the reference of
        the van 't Hoff lines) as the error of its relative weight."""
        out: dict[str, dict] = {}
        prefixes = tuple(PARAMETER_PREFIX[k] for k in kinds)
        ratios = {}
        for name, line in self.lines.items():
            if not name.startswith(prefixes):
                continue
            value, stderr = line.at(temperature_k)
            if line.kind == "van-t-hoff":
                ratios[name] = (value, stderr)
                continue
            if name.startswith(PARAMETER_PREFIX["linewidth"]):
                value = max(value, MIN_HELD_LINEWIDTH_HZ)
            if name.startswith(PARAMETER_PREFIX["shift"]):  # only differences of shifts matter (see above)
                stderr = self.differences[name].at(temperature_k)[1] if name in self.differences else 0.0
            out[name] = _held_setting(value, stderr)
        if ratios:
            weights = {name: math.exp(v) for name, (v, _) in ratios.items()}
            total = 1.0 + sum(weights.values())
            out[self.first_population] = {"start": 1.0 / total, "fixed": True}
            for name, (_, stderr) in ratios.items():
                p = weights[name] / total
                out[name] = _held_setting(p, p * stderr)  # d(weight) = weight d ln(weight ratio)
        return out

    def shift_lines(self) -> dict[str, dict[str, float]]:
        """The shift lines in the form results.json has always had (ppm at the mean T, ppm per K)."""
        out = {}
        for name, line in self.lines.items():
            if name.startswith(PARAMETER_PREFIX["shift"]):
                out[name] = {"ppm_at_mean": line.coefficients[0], "ppm_per_k": line.coefficients[1],
                             "mean_temperature_k": line.x0,
                             "ppm_at_mean_stderr": math.sqrt(line.covariance[0][0]),
                             "ppm_per_k_stderr": math.nan if line.constant else math.sqrt(line.covariance[1][1])}
        return out

    def to_dict(self) -> dict:
        """Plain data."""
        return {"lines": {n: line.to_dict() for n, line in self.lines.items()},
                "first_population": self.first_population, "notes": list(self.notes),
                "differences": {n: line.to_dict() for n, line in self.differences.items()},
                "first_shift": self.first_shift}


def _held_setting(value: float, stderr: float) -> dict:
    setting = {"start": float(value), "fixed": True}
    if math.isfinite(stderr) and stderr > 0:
        setting["stderr"] = float(stderr)
    return setting


def _parameter_points(fits: Sequence[tuple[float, SpectrumFit]], name: str, widen=None) -> tuple[list, list, list]:
    """(temperatures, values, stderrs) of parameter `name` over `fits`; `widen(fit)` adds an error in
    quadrature (the linewidth's trade with an unresolved exchange broadening)."""
    temps, values, errors = [], [], []
    for t, fit in fits:
        par = fit.parameters[name]
        err = math.nan if par.stderr is None else float(par.stderr)
        if widen is not None:
            err = math.hypot(err, widen(fit))
        temps.append(t)
        values.append(float(par.value))
        errors.append(err)
    return temps, values, errors


def _log_ratio_points(fits, name: str, first: str) -> tuple[list, list, list]:
    """(temperatures, ln(p/p_first), stderrs) of population `name` over `fits`."""
    temps, values, errors = [], [], []
    for t, fit in fits:
        p, p0 = fit.parameters[name], fit.parameters[first]
        s = math.nan if p.stderr is None else float(p.stderr)
        s0 = math.nan if p0.stderr is None else float(p0.stderr)
        two = len([n for n in fit.parameters if n.startswith("population_")]) == 2
        # two states: p_first = 1 - p, so d ln(p/p_first) = dp (1/p + 1/p_first); more: errors taken independent
        err = s * (1.0 / p.value + 1.0 / p0.value) if two else math.hypot(s / p.value, s0 / p0.value)
        temps.append(t)
        values.append(math.log(p.value / p0.value))
        errors.append(err)
    return temps, values, errors


def static_trend(slow: Sequence[tuple[float, SpectrumFit]], quiet: Sequence[tuple[float, SpectrumFit]],
                 kinds: Sequence[str]) -> StaticTrend:
    """Regress the static parameters of `kinds` on temperature.

    Parameters
    ----------
    slow : sequence of (temperature_k, SpectrumFit)
        The slow-exchange fits with those parameters free: shifts, couplings and populations come from them.
    quiet : sequence of (temperature_k, SpectrumFit)
        The fits with the linewidth free the linewidth's line comes from, jointly with their rates (see
        :func:`linewidth_trend`).
    kinds : sequence of str
        Which of "shift", "coupling", "population", "linewidth" to regress.
    """
    lines: dict[str, ParameterTrend] = {}
    differences: dict[str, ParameterTrend] = {}
    first = first_shift = None
    if slow:
        params = slow[0][1].parameters
        free = [n for n, p in params.items() if p.vary and not p.expr]
        for kind in ("shift", "coupling"):
            if kind in kinds:
                for name in (n for n in free if n.startswith(PARAMETER_PREFIX[kind])):
                    lines[name] = regress_trend(name, "linear-in-T", *_parameter_points(slow, name))
        shifts = [n for n in free if n.startswith(PARAMETER_PREFIX["shift"])] if "shift" in kinds else []
        if shifts:
            first_shift = shifts[0]
            base = _parameter_points(slow, first_shift)
            for name in shifts[1:]:
                temps, values, errors = _parameter_points(slow, name)
                differences[name] = regress_trend(name, "linear-in-T", temps, np.subtract(values, base[1]),
                                                  np.hypot(errors, base[2]))
        populations = [n for n in params if n.startswith(PARAMETER_PREFIX["population"])]
        if "population" in kinds and populations and any(params[n].vary for n in populations):
            first = populations[0]
            for name in populations[1:]:
                lines[name] = regress_trend(name, "van-t-hoff", *_log_ratio_points(slow, name, first))
    if "linewidth" in kinds and quiet:
        name = next(n for n in quiet[0][1].parameters if n.startswith(PARAMETER_PREFIX["linewidth"]))
        lines[name] = linewidth_trend(quiet, name)
    return StaticTrend(lines, first, differences=differences, first_shift=first_shift)


def linewidth_trend(fits: Sequence[tuple[float, SpectrumFit]], name: str) -> ParameterTrend:
    """The linewidth's line in T, fitted jointly with an Eyring line of every process's rate.

    In slow exchange the intrinsic linewidth w and the exchange broadening trade against each other, so
    each spectrum's w alone is poorly known and its line in T extrapolates badly.  The rates of a process
    follow Eyring's equation, log10(k/T) = c + d (1/T - 1/T0), so one generalised least-squares fit of
    w = a + b (T - T0) and of those lines to the pairs (w, log10 k) of every spectrum, weighted by each
    spectrum's covariance of the pair (its errors and correlation), separates the two.  A rate that is
    only a bound, or a process with fewer than two determined rates, gives no rate point; then the
    linewidth's error is widened by what the unresolved exchange could take (``_exchange_width``).  The
    covariance of (a, b) is widened by the reduced chi-square when that is above 1.  Without rate points
    this is :func:`regress_trend` of the linewidths.
    """
    temps, values, errors = _parameter_points(fits, name)
    pairs = [_rate_points(fit) for _, fit in fits]
    counts: dict[str, int] = {}
    for points in pairs:
        for rate in points:
            counts[rate] = counts.get(rate, 0) + 1
    processes = [rate for rate, n in counts.items() if n >= 2]
    if len(set(temps)) < 2 or not processes:
        return regress_trend(name, "linear-in-T", *_parameter_points(fits, name, widen=_exchange_width))
    rows, targets = [], []
    size = 2 + 2 * len(processes)
    t0 = float(np.mean(temps))
    u0 = 1.0 / t0
    for (t, fit), w, sw, points in zip(fits, values, errors, pairs):
        used = [r for r in processes if r in points]
        if not used:
            sw = math.hypot(sw, _exchange_width(fit))
        design = np.zeros((1 + len(used), size))
        design[0, :2] = 1.0, t - t0
        obs = [w]
        sd = [sw]
        for row, rate in enumerate(used, start=1):
            j = 2 + 2 * processes.index(rate)
            design[row, j:j + 2] = 1.0, 1.0 / t - u0
            obs.append(points[rate][0] - math.log10(t))
            sd.append(points[rate][1])
        corr = np.eye(len(obs))
        for a, first in enumerate([name] + used):
            for b, second in enumerate([name] + used):
                if a != b:
                    rho = fit.correlation(first, second)
                    corr[a, b] = rho if math.isfinite(rho) else 0.0
        cov = corr * np.outer(sd, sd)
        whiten = np.linalg.inv(np.linalg.cholesky(cov))
        rows.append(whiten @ design)
        targets.append(whiten @ np.array(obs))
    design, target = np.vstack(rows), np.concatenate(targets)
    coef, *_ = np.linalg.lstsq(design, target, rcond=None)
    cov = np.linalg.pinv(design.T @ design)
    dof = target.size - size
    chi2 = float(np.sum((target - design @ coef) ** 2))
    red = chi2 / dof if dof > 0 else math.nan
    if dof > 0 and red > 1.0:
        cov = cov * red
    return ParameterTrend(name, "linear-in-T", tuple(temps), tuple(values), tuple(errors), t0,
                          (float(coef[0]), float(coef[1])),
                          tuple(tuple(float(v) for v in row) for row in cov[:2, :2]), red)


def _rate_points(fit: SpectrumFit) -> dict[str, tuple[float, float]]:
    """(log10 k, its standard error) of every determined rate of `fit`, by fit parameter, for rates fitted
    with a finite error and a known correlation with the other free parameters."""
    out = {}
    names = [n for n in fit.parameters if n.startswith("log10_k_")]
    for name, rate in zip(names, fit.rates):
        par = fit.parameters[name]
        if (rate.status == "determined" and par.vary and not par.expr and par.stderr is not None
                and math.isfinite(par.stderr) and par.stderr > 0 and par.correl):
            out[name] = (float(par.value), float(par.stderr))
    return out


def _exchange_width(fit: SpectrumFit) -> float:
    """Width (Hz) the exchange could add unseen to a fit whose rates are upper bounds: (k_up - k)/pi for the
    fastest way out of a state (a reverse rate is larger by the population ratio)."""
    worst = 0.0
    model = fit.best_model
    populations = model.populations()
    for r, ex in zip(fit.rates, model.exchanges):
        top = r.rate_upper if r.status == "upper-bound" else r.rate_per_s
        a, b = model.state_index(ex.from_state), model.state_index(ex.to_state)
        ratio = max(1.0, populations[a] / populations[b])
        worst = max(worst, (top - r.rate_per_s) * ratio / math.pi if math.isfinite(top) else 0.0)
    return worst


RATE_COLUMNS = ("temperature_k", "process", "rate_per_s", "rate_stderr", "rate_lower", "rate_upper", "status",
                "log10_rate", "log10_rate_stderr", "ci68_low_per_s", "ci68_high_per_s")
TAIL_COLUMNS = ("offset_hz", "phase0_deg", "chi_square", "reduced_chi_square", "noise", "log10_rate_stderr_held",
                "treatment", "spectrum", "flags", "note")
POSTERIOR_COLUMNS = ("posterior_median_per_s", "posterior_ci95_low_per_s", "posterior_ci95_high_per_s",
                     "posterior_bound95_per_s")
"""Added at the end of rates.csv when the posteriors were sampled (``dnmr fit --posterior``)."""


@dataclass
class SeriesFit(NotebookView):
    """The fit of a whole series.

    Attributes
    ----------
    series : Series
        What was fitted.
    outdir : Path
        Where the outputs are.
    outcomes : list of SpectrumOutcome
        One per spectrum, in the series file's order.
    trend : StaticTrend or None
        The temperature trends of the static parameters, when taken from the slow-exchange spectra.
    notes : list of str
        Remarks on the whole series.
    """

    series: Series
    outdir: Path
    outcomes: list[SpectrumOutcome]
    trend: StaticTrend | None = None
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
        if self.trend is not None and self.trend.lines:
            lines += ["", "static parameters of the faster spectra from the slow-exchange trend:"]
            for name, line in self.trend.lines.items():
                lines.append(f"  {name}: {_trend_text(line)}")
        lines += self._posterior_lines(width)
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def _posterior_lines(self, width: int) -> list[str]:
        """The posterior rates of the report (when sampled)."""
        sampled = [o for o in self.by_temperature() if o.posterior is not None]
        if not sampled:
            return []
        lines = ["", "posterior of the rates (emcee; pairwise posterior figures figures/NNN_<name>_posterior.png):"]
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
        from dnmr.reporting.plotting import plot_fit_stack

        done = [o for o in self.by_temperature() if o.fitted]
        return plot_fit_stack([o.fit for o in done], [f"{o.spectrum.temperature_k:g} K" for o in done],
                              figure=figure, title=f"{self.series.model.title or self.series.source.name}\n"
                                                   "measured (black) and fitted (red)")


def _trend_text(line: ParameterTrend) -> str:
    """One trend line in words."""
    a, b = line.coefficients
    sa = math.sqrt(line.covariance[0][0])
    span = f"from {_span(line.temperatures_k)}"
    if line.constant:
        return f"{a:.6g} ± {sa:.2g} at every temperature ({span})" + (" as ln(p / p_first)" if line.kind == "van-t-hoff" else "")
    if line.kind == "van-t-hoff":
        return (f"ln(p / p_first) = {a:.3f} ± {sa:.3f} at {1 / line.x0:.1f} K, {b:+.4g} K x (1/T - 1/{1 / line.x0:.1f} K) "
                f"(van 't Hoff, {span})")
    return (f"{a:.6g} ± {sa:.2g} at {line.x0:.1f} K, {b:+.3g} ± {math.sqrt(line.covariance[1][1]):.2g} per K ({span}"
            + (f", reduced chi-square {line.reduced_chi_square:.2f}" if math.isfinite(line.reduced_chi_square) else "")
            + ")")


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
        if name.startswith(("linewidth_hz_", "shift_ppm_", "coupling_hz_", "population_")):
            row[name] = par.value
    p = fit.parameters
    row.update(offset_hz=p["offset_hz"].value, phase0_deg=p["phase0_deg"].value, chi_square=fit.chi_square,
               reduced_chi_square=fit.reduced_chi_square, noise=fit.noise.sigma,
               log10_rate_stderr_held=r.log10_stderr_held if r.log10_stderr_held > 0 else math.nan,
               treatment=";".join(f"{q}={how}" for q, how in outcome.treatment.items()), spectrum=str(s.file),
               flags=";".join(list(fit.flags) + outcome.flags + list(s.flags)),
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
        self.pool = process_pool(workers) if workers > 1 else None

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
                self.progress.advance(task, f"{job.spectrum.temperature_k:g} K, from the earlier run")
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
            self.progress.advance(task, f"{self.series.spectra[index].temperature_k:g} K")
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


def _future_result(future) -> dict:
    try:
        return future.result()
    except Exception as err:  # the worker process died (out of memory, killed...)
        return {"status": "failed", "bad_input": False, "error": f"worker failed: {type(err).__name__}: {err}"}


LOCK_FILE = ".dnmr-lock"
"""Held (an advisory lock) by the run writing into a results folder; a second run is refused meanwhile."""
STAGES = (STAGE_MAIN, STAGE_SLOW, STAGE_HELD, "posterior")


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
    return SpectrumOutcome(s, fit, stage=stage, reused=record.get("reused", False), processing=record.get("processing"))


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
    return coalescence_rate_per_s(min(gaps)) if gaps else math.inf


def _rates_are_slow(fit: SpectrumFit, limit: float) -> bool:
    """Every rate (or its upper bound) under SLOW_EXCHANGE_FRACTION of the coalescence rate `limit`."""
    for r in fit.rates:
        k = r.rate_upper if r.status in ("upper-bound", "interval") else r.rate_per_s
        if r.status in ("undetermined", "lower-bound") or not k < SLOW_EXCHANGE_FRACTION * limit:
            return False
    return True


def _statics_determined(fit: SpectrumFit, kinds: Sequence[str]) -> bool:
    """Every free parameter of `kinds` has a finite error and is off the bounds of its range."""
    prefixes = tuple(PARAMETER_PREFIX[k] for k in kinds)
    for name, par in fit.parameters.items():
        if name.startswith(prefixes) and par.vary and not par.expr:
            if par.stderr is None or not math.isfinite(par.stderr) or f"at-bound:{name}" in fit.flags:
                return False
    return True


def _is_quiet(fit: SpectrumFit) -> bool:
    """Every rate only an upper bound: the exchange broadening is below what the noise resolves."""
    return all(r.status in ("upper-bound", "fixed") for r in fit.rates)


def _fit_options(series: Series, index: int, references: Mapping[int, dict], held: Mapping[str, dict],
                 fixed: Sequence[str] = ()) -> FitOptions:
    """Options of spectrum `index`: its own, the quantities of `fixed` ("shift", ...) held, the settings
    `held` and a reference-line linewidth added (the user's parameter settings win over both)."""
    s = series.spectra[index]
    options = s.options.replace(**{q: "fixed" for q, kind in TREATMENT_KIND.items()
                                   if kind in fixed and q != "linewidth"})
    settings = dict(held)
    reference = references.get(index)
    if reference is not None and "setting" in reference:
        settings.update(reference["setting"])
    return options.replace(parameters={**settings, **s.options.parameters})


def _slow_stage(series: Series, runner: _Runner, hashes, references) -> tuple[dict[int, SpectrumOutcome], list[int]]:
    """Fit the coldest spectra with the trended parameters free, a batch (one per worker) at a time, until
    one is not in slow exchange; returns their outcomes and the slow-exchange run (coldest first)."""
    temp = lambda i: series.spectra[i].temperature_k  # noqa: E731
    order = sorted(range(len(series.spectra)), key=temp)
    limit, kinds = _coalescence_rate(series.model), series.trended()
    below = series.slow_exchange_below_k
    outcomes: dict[int, SpectrumOutcome] = {}

    def run(batch: list[int]) -> None:
        jobs = [_job(series, i, STAGE_SLOW, _fit_options(series, i, references, {}), hashes) for i in batch]
        for i, record in runner.run(jobs, "slow-exchange spectra").items():
            outcomes[i] = _outcome(series, i, record, STAGE_SLOW)

    if below is not None:
        run([i for i in order if temp(i) <= below])
        return outcomes, [i for i in order if i in outcomes and outcomes[i].fitted]
    slow: list[int] = []
    for start in range(0, len(order), runner.workers):
        batch = order[start:start + runner.workers]
        run(batch)
        for i in batch:
            fit = outcomes[i].fit
            if fit is None:
                continue
            if not (_rates_are_slow(fit, limit) and _statics_determined(fit, kinds)):
                return outcomes, slow
            slow.append(i)
    return outcomes, slow


def _linewidth_spectra(series: Series, outcomes, slow: list[int]) -> tuple[list[int], list[str]]:
    """The slow spectra the linewidth trend comes from: the whole slow run (see :func:`linewidth_trend`),
    with a note when the exchange broadening is resolved in every one of them."""
    if not slow or any(_is_quiet(outcomes[i].fit) for i in slow):
        return slow, []
    return slow, ["no slow-exchange spectrum is free of resolved exchange broadening, so the linewidth trend comes "
                  "from spectra where linewidth and rate trade against each other; it is fitted jointly with an "
                  "Eyring line of their rates, which separates the two (its error includes what remains); a "
                  'reference line (linewidth = "reference-line") avoids it']


def _span(temps: Sequence[float]) -> str:
    return f"{min(temps):g} K" if len(set(temps)) == 1 else f"{min(temps):g}-{max(temps):g} K"


def _trend_stages(series: Series, runner: _Runner, hashes, references) -> tuple[dict[int, SpectrumOutcome],
                                                                                   StaticTrend | None, list[str]]:
    """Slow-exchange fits, the trends of the static parameters, then every other spectrum with them held."""
    kinds = series.trended()
    outcomes, slow = _slow_stage(series, runner, hashes, references)
    temp = lambda i: series.spectra[i].temperature_k  # noqa: E731
    notes: list[str] = []
    lw_from, lw_notes = _linewidth_spectra(series, outcomes, slow) if "linewidth" in kinds else ([], [])
    notes += lw_notes
    trend = None
    if slow:
        trend = static_trend([(temp(i), outcomes[i].fit) for i in slow], [(temp(i), outcomes[i].fit) for i in lw_from],
                             kinds)
        notes.append(f"slow-exchange run: {len(slow)} spectr{'um' if len(slow) == 1 else 'a'} ({_span([temp(i) for i in slow])}); "
                     + ", ".join(f"{q} from it" for q, k in TREATMENT_KIND.items() if k in kinds and k != "linewidth")
                     + (f"; linewidth from {len(lw_from)} of them ({_span([temp(i) for i in lw_from])})" if lw_from else ""))
        if len({temp(i) for i in slow}) == 1:
            notes.append("only one slow-exchange temperature: its values are used at every temperature without a trend "
                         "(populations at its free-energy difference), so any drift with temperature is not followed; "
                         "more cold spectra would give the trend")
    else:
        notes.append("no spectrum is in slow exchange (every rate at or above a quarter of the coalescence rate, or a "
                     "static parameter undetermined), so the " + ", ".join(k + "s" for k in kinds)
                     + " stay at the model's values; add colder spectra or set slow_exchange_below_k")
    jobs = []
    for i in range(len(series.spectra)):
        if i in slow and (i in lw_from or "linewidth" not in kinds):
            continue  # its slow-exchange fit is final
        held_kinds = ["linewidth"] if i in slow else kinds
        held = trend.held(temp(i), held_kinds) if trend else {}
        jobs.append(_job(series, i, STAGE_HELD, _fit_options(series, i, references, held, held_kinds), hashes))
    for i, record in runner.run(jobs, "fits with held values").items():
        outcomes[i] = _outcome(series, i, record, STAGE_HELD)
    for i, o in outcomes.items():
        _set_treatment(series, o, trend, references.get(i))
    return outcomes, trend, notes


def _set_treatment(series: Series, outcome: SpectrumOutcome, trend: StaticTrend | None, reference: dict | None) -> None:
    """Record in `outcome` (treatment and a note) how each static quantity was treated in its final fit:
    "fitted", "trend", "model", "reference-line" or "user" (the series file's parameter settings)."""
    out = {}
    fit = outcome.fit
    for quantity, mode in series.treatments.items():
        prefix = PARAMETER_PREFIX[TREATMENT_KIND[quantity]]
        names = [n for n in (fit.parameters if fit else ()) if n.startswith(prefix)]
        if not names:
            continue
        if any(n in outcome.spectrum.options.parameters for n in names):
            out[quantity] = "user"
        elif mode == REFERENCE_LINE:
            out[quantity] = "reference-line" if reference and "setting" in reference else "fitted"
        elif any(fit.parameters[n].vary and not fit.parameters[n].expr for n in names):
            out[quantity] = "fitted"
        elif mode == TREND and trend is not None and any(n in trend.lines for n in names):
            out[quantity] = "trend"
        else:
            out[quantity] = "model"
    outcome.treatment = out
    outcome.flags += [f"{how}-{quantity}" for quantity, how in out.items() if how in ("trend", "reference-line")]
    if out:
        outcome.notes.append(_treatment_note(out))
    held = [n for n, p in (fit.parameters.items() if fit else ()) if trend and n in trend.lines and not p.vary]
    if any(trend.lines[n].constant for n in held):
        outcome.flags.append("trend-one-temperature")
        outcome.notes.append("the held values come from one slow-exchange temperature: their drift with temperature "
                             "is unknown and not in the error; colder spectra, slow_exchange_below_k or a reference "
                             "line would give it")


def _treatment_note(treatment: Mapping[str, str]) -> str:
    words = {"fitted": "fitted in this spectrum", "trend": "held at the slow-exchange trend (its error carried into "
             "the rate)", "model": "held at the model's values", "reference-line": "held at the reference line's "
             "width (its error carried into the rate)", "user": "as set in the series file's parameters"}
    groups: dict[str, list[str]] = {}
    for quantity, how in treatment.items():
        groups.setdefault(how, []).append(quantity)
    return "; ".join(f"{' and '.join(q)}: {words[how]}" for how, q in groups.items()) + "."


def _versions() -> dict:
    import lmfit
    import scipy

    from dnmr import __version__

    return {"dnmr": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "lmfit": lmfit.__version__}


def _write_outputs(result: SeriesFit, runner: _Runner, hashes: Mapping) -> None:
    outdir, series = result.outdir, result.series
    rows = result.rate_rows()
    present = {k for row in rows for k in row}
    extra = sorted(present - set(RATE_COLUMNS) - set(TAIL_COLUMNS) - set(POSTERIOR_COLUMNS),
                   key=lambda k: (not k.startswith("linewidth"), not k.startswith("shift"), not k.startswith("coupling"), k))
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
                 "error": o.error or None, "bad_input": o.bad_input, "treatment": o.treatment,
                 "series_flags": o.flags,
                 "reference_line": o.reference,
                 "fit": o.fit.to_dict() if o.fitted else None, "posterior": o.posterior}
        if o.processing is not None:
            entry["processing"] = o.processing
        spectra.append(entry)
    _write_json(outdir / "results.json", {
        "program": "dnmr fit", "versions": _versions(),
        "written_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "series": {"file": str(series.source), "sha256": file_sha256(series.source)},
        "model": {"file": str(series.model_file), "sha256": hashes["model"],
                  "processes": series.model.process_names(), "states": series.model.state_names},
        "options": series.options.to_dict(), "shifts": series.shifts, "treatments": dict(series.treatments),
        "reference_line": dataclasses.asdict(series.reference_line) if series.reference_line else None,
        "slow_exchange_below_k": series.slow_exchange_below_k,
        "shift_trend": _shift_trend_record(result.trend),
        "static_trend": result.trend.to_dict() if result.trend else None,
        "notes": result.notes, "exit_status": result.exit_status, "spectra": spectra,
    })


def _shift_trend_record(trend: StaticTrend | None) -> dict | None:
    """The shift part of the trend, in the form results.json has always given it."""
    lines = trend.shift_lines() if trend else {}
    if not lines:
        return None
    temps = next(line.temperatures_k for n, line in trend.lines.items() if n in lines)
    return {"temperatures_k": list(temps), "lines": lines}


def _sample_posteriors(result: SeriesFit, runner: _Runner, settings: dict, hashes: Mapping) -> None:
    """Sample the posterior of every fitted spectrum (in the pool) and draw its pairwise posterior figure; on resume,
    a posterior stored for the same spectrum, model, fit and settings (and its figure) is reused."""
    from dnmr import __version__

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
    """The posterior summary stored at `path` under `key`, when its pairwise posterior figure is still there."""
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
        False: no progress report.  Otherwise progress on stderr: a live bar on a terminal, plain lines
        (``fitting spectra: 3 of 17 done (260 K), 12 s elapsed``) when stderr is a file or a pipe.
    posterior : mapping, optional
        Also sample the posterior of every fitted spectrum (needs emcee; slow: about walkers x steps
        lineshape evaluations per spectrum) with these settings of
        :func:`dnmr.fitting.posterior.sample_spectrum_posterior` (steps, walkers, burn, thin, seed; ``{}`` for
        the defaults).  The summaries go into results.json and at the end of rates.csv, a pairwise posterior figure
        per spectrum into ``figures/NNN_<name>_posterior.png``.  On `resume`, a posterior stored for the
        same spectrum, model, fit and settings is reused.

    Returns
    -------
    SeriesFit
        With ``exit_status`` 0 (all fitted), 2 (a spectrum failed for bad input) or 1 (a fit failed).
    """
    if posterior is not None:
        from dnmr.fitting.posterior import require_emcee

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
    runner = _Runner(series, outdir, workers, ProgressReport(progress), resume)
    try:
        with runner.progress, single_threaded_blas():
            references, notes = _reference_fits(series)
            trend = None
            if series.trended():
                outcomes, trend, more = _trend_stages(series, runner, hashes, references)
                notes += more
            else:
                jobs = [_job(series, i, STAGE_MAIN, _fit_options(series, i, references, {}), hashes)
                        for i in range(len(series.spectra))]
                outcomes = {i: _outcome(series, i, r, STAGE_MAIN) for i, r in runner.run(jobs, "fitting spectra").items()}
                for i, o in outcomes.items():
                    _set_treatment(series, o, None, references.get(i))
            for i, o in outcomes.items():
                o.reference = references.get(i)
            result = SeriesFit(series, outdir, [outcomes[i] for i in range(len(series.spectra))], trend,
                               list(series.notes) + notes)
            if posterior is not None:
                _sample_posteriors(result, runner, dict(posterior), hashes)
            _write_outputs(result, runner, hashes)
    finally:
        runner.close()
    return result


