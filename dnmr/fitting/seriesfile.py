"""The series file: a model, fit options and the spectra of a variable-temperature series.

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

The treatments of the static spectral parameters (``shifts``, ``couplings``, ``populations``,
``linewidth``) are carried out by :mod:`dnmr.fitting.treatments`; the fit of the series is
:func:`dnmr.fitting.series.fit_series`.
"""
from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from dnmr.errors import InputError, did_you_mean
from dnmr.fitting.ranges import number_pair
from dnmr.fitting.spectrumfit import FitOptions, fit_parameters
from dnmr.io.inputfiles import regular_file_size
from dnmr.io.modelfile import check_keys, load_model, read_toml
from dnmr.io.tables import celsius_hints, check_kelvin
from dnmr.model import Model
from dnmr.nuclei import check_frequency_mhz

TREND = "slow-exchange-trend"
"""The treatment that takes a static quantity from the slow-exchange spectra (the default)."""
REFERENCE_LINE = "reference-line"
"""The treatment that takes the linewidth from a reference line in every spectrum."""
TREATMENTS = {
    "shifts": (TREND, "fixed", "free"),
    "couplings": (TREND, "fixed", "free"),
    "populations": (TREND, "fixed", "free"),
    "linewidth": (TREND, REFERENCE_LINE, "fixed", "shared", "per-state"),
}
"""Series-level treatment of each static spectral parameter (the first is the default)."""
SHIFT_MODES = TREATMENTS["shifts"]
"""The treatments of the shifts."""
TREATMENT_KIND = {"shifts": "shift", "couplings": "coupling", "populations": "population", "linewidth": "linewidth"}
"""The kind of fit parameter each treated quantity holds ("shift" parameters are ``shift_ppm_...``)."""
REFERENCE_KEYS = {"ppm", "multiplicity", "coupling_hz", "window_ppm", "added_width_hz"}
"""The keys of ``[fit.reference_line]``."""
MULTIPLICITIES = {"s": (0, 0.5), "d": (1, 0.5), "t": (2, 0.5), "q": (3, 0.5), "p": (4, 0.5),
                  "1:1:1": (1, 1.0), "1:2:3:2:1": (2, 1.0), "1:3:6:7:6:3:1": (3, 1.0)}
"""Multiplet patterns of a reference line: (number of equivalent partners, their spin); first order."""
FIT_OPTION_KEYS = {f.name for f in dataclasses.fields(FitOptions)}
"""The fit options (:class:`dnmr.fitting.spectrumfit.FitOptions`) a series file may set."""
SERIES_KEYS = {"model", "fit", "spectrum", "processing"}
"""The top-level keys of a series file."""
SERIES_FIT_KEYS = FIT_OPTION_KEYS | {"slow_exchange_below_k", "reference_line"}
"""The keys of ``[fit]``: every fit option (the treatments among them), ``slow_exchange_below_k`` and
``reference_line``."""
SPECTRUM_OPTION_KEYS = {"region_ppm", "noise_ppm", "noise", "baseline_order", "phase", "frequency_offset",
                        "max_offset_hz", "linewidth", "parameters"}
"""The fit options a ``[[spectrum]]`` may change for itself."""
SPECTRUM_KEYS = {"file", "temperature_k", "frequency_mhz", "axis", "processing"} | SPECTRUM_OPTION_KEYS
"""The keys of a ``[[spectrum]]``."""


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
        window = number_pair(window, f"{where}.window_ppm")
    return ReferenceLine(float(number("ppm", table["ppm"])), multiplicity, coupling, window, added)


def _bad(message: str, where: str):
    raise InputError(message, where=where)


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
    folder = path.resolve().parent
    try:
        check_keys(data, SERIES_KEYS, "", required=("model", "spectrum"))
        if not isinstance(data["model"], str) or not data["model"].strip():
            raise InputError(f"expected the path of the model file, got {data['model']!r}", where="model")
        fit = dict(check_keys(data.get("fit", {}), SERIES_FIT_KEYS, "fit"))
        reference = fit.pop("reference_line", None)
        reference = None if reference is None else _reference_line(reference, "fit.reference_line")
        treatments = _treatments(fit, reference)
        below = _slow_exchange_below(fit.pop("slow_exchange_below_k", None))
        options = _series_options(fit, treatments)
        spectra = _spectra(data, folder, options)
    except InputError as err:
        raise err.located(source=path) from None
    model_file, model = named_model(data["model"], path)
    treatments, options, spectra = _without_absent_quantities(model, treatments, options, spectra)
    _check_parameter_names(model, options, spectra, path)
    _check_rate_ceilings(options, spectra, path)
    try:
        spectra, notes = _flag_duplicates(spectra)
    except InputError as err:
        raise err.located(source=path) from None
    hints = celsius_hints([s.temperature_k for s in spectra], model.temperature_k)
    return Series(path.resolve(), model_file, model, options, treatments["shifts"], below, tuple(spectra),
                  tuple(hints + notes), treatments, reference, tuple(hints))


def _treatments(fit: dict, reference: ReferenceLine | None) -> dict[str, str]:
    """The treatment of each static quantity, taken out of the [fit] table `fit` (the default linewidth is the
    reference line's when the series names one)."""
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
    return treatments


def _slow_exchange_below(value) -> float | None:
    """The checked ``slow_exchange_below_k`` (K), or None when not given."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(f"expected a temperature in kelvin, got {value!r}", where="fit.slow_exchange_below_k")
    check_kelvin(float(value), "slow_exchange_below_k", where="fit.slow_exchange_below_k")
    return float(value)


def _series_options(fit: Mapping, treatments: Mapping[str, str]) -> FitOptions:
    """Series-wide fit options from the rest of the [fit] table: every quantity of a slow-exchange trend free,
    the linewidth shared where a trend or a reference line gives it."""
    free = lambda q: "free" if treatments[q] in ("free", TREND) else "fixed"  # noqa: E731
    linewidth = {TREND: "shared", REFERENCE_LINE: "shared"}.get(treatments["linewidth"], treatments["linewidth"])
    return _options({**fit, "shifts": free("shifts"), "couplings": free("couplings"),
                     "populations": free("populations"), "linewidth": linewidth}, None, "fit")


def _spectra(data: Mapping, folder: Path, options: FitOptions) -> list[SeriesSpectrum]:
    """The [[spectrum]] tables of the series file, read with the series' options and processing."""
    tables = data["spectrum"]
    if not isinstance(tables, list) or not tables or not all(isinstance(t, dict) for t in tables):
        raise InputError("expected one [[spectrum]] table per spectrum", where="spectrum")
    processing = _processing(data, None, "")
    return [_spectrum(t, i, folder, options, processing) for i, t in enumerate(tables)]


def named_model(name: str, path: Path) -> tuple[Path, Model]:
    """The model file `name` that the file `path` (a series or experiment file) names relative to its own
    folder, and its model; a problem names `path` and its key ``model`` too (that is the file the user gave)."""
    folder = path.resolve().parent
    model_file = (folder / name).resolve()
    if not model_file.is_file():
        raise InputError(f'no model file "{name}" in {folder}; check the path (relative to {path.name})',
                         source=path, where="model")
    try:
        return model_file, load_model(model_file)
    except InputError as err:
        raise InputError(str(err), source=path, where="model") from None


def _without_absent_quantities(model: Model, treatments: Mapping[str, str], options: FitOptions,
                               spectra: list[SeriesSpectrum]
                               ) -> tuple[dict[str, str], FitOptions, list[SeriesSpectrum]]:
    """Hold the populations fixed when no exchange joins different states, and the couplings when the model
    has none: there is nothing to fit.  Returns the treatments, series options and spectra."""
    absent = [q for q, missing in (("populations", not _populations_matter(model)),
                                   ("couplings", not any(s.couplings_hz for s in model.states))) if missing]
    treatments = dict(treatments)
    for quantity in absent:
        if treatments[quantity] != "fixed":
            treatments[quantity] = "fixed"
            spectra = [dataclasses.replace(s, options=s.options.replace(**{quantity: "fixed"})) for s in spectra]
            options = options.replace(**{quantity: "fixed"})
    return treatments, options, spectra


def _check_parameter_names(model: Model, options: FitOptions, spectra: Sequence[SeriesSpectrum], path: Path) -> None:
    """Parameter settings must name parameters the model has: those of [fit.parameters] are checked (and
    reported) there, before those a [[spectrum]] adds."""
    for where, opts in [("fit", options)] + [(s.where, s.options) for s in spectra]:
        try:
            fit_parameters(model, opts.region_ppm, opts)
        except InputError as err:
            raise InputError(err.message, source=path, where=f"{where}.{err.where}" if err.where else where) from None


def _check_rate_ceilings(options: FitOptions, spectra: Sequence[SeriesSpectrum], path: Path) -> None:
    """Refuse rates above kB T/h (:meth:`FitOptions.check_rate_ceiling`) before any fit: those of [fit] at the
    coldest spectrum's temperature (where the ceiling is lowest), those a [[spectrum]] adds at its own."""
    coldest = min(spectra, key=lambda s: s.temperature_k)
    checks = [("fit", options, coldest.temperature_k, f" ({coldest.where}, the coldest of the series)")]
    for where, opts, temperature, at in checks + [(s.where, s.options, s.temperature_k, "") for s in spectra]:
        try:
            opts.check_rate_ceiling(temperature, at)
        except InputError as err:
            raise InputError(err.message, source=path, where=f"{where}.{err.where}") from None


def _populations_matter(model: Model) -> bool:
    """True when an exchange joins two different states (their populations shape the spectrum)."""
    return len(model.states) > 1 and any(ex.from_state != ex.to_state for ex in model.exchanges)
