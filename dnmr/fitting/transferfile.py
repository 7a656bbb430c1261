"""The magnetisation-transfer experiment file: model, temperature, kind of experiment, data table, options.

An *experiment file* (TOML; docs/transfer-file.md) names a model file, the sample temperature, the kind of
experiment, a data table (CSV) and options; :func:`load_experiment` reads it into an :class:`Experiment`,
which :func:`dnmr.fitting.transfer.fit_transfer` fits.

Experiments and their tables (site names as in :func:`dnmr.engine.longitudinal.model_sites`):

``inversion`` (selective inversion recovery)
    ``delay_s`` and one column of integrals per observed site (``<site>_stderr`` optional).  Fitted:
    the forward rate of each exchange process, R1 of each observed site, the equilibrium integral of each
    site and the inversion efficiency (M(0) = (1 - 2 efficiency) M_eq on the inverted sites).
``saturation`` (saturation transfer, steady state and build-up)
    ``saturation_s`` (how long the saturated sites were irradiated before the read pulse; 0 is the
    reference) and one column of integrals per observed, unsaturated site.  Fitted: rates, R1 and the
    equilibrium integrals.  Steady-state data alone (two saturation times) give only R1/(R1 + k)
    (Forsén & Hoffman 1963): R1 must then come from the model (``r1 = "fixed"``).
``exchange-2d`` (EXSY / NOESY-type mixing)
    ``mixing_s``, ``detected`` (the site on which a row's peaks are detected, F2) and one column per
    site (the site the magnetisation started on, F1): one full volume matrix per mixing time.  Fitted
    directly over all mixing times (rates, R1 per site, one volume scale), and by the matrix method
    (:mod:`dnmr.fitting.matrixmethod`).
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from dnmr.engine.longitudinal import model_sites, site_relaxation_rates
from dnmr.errors import InputError, did_you_mean
from dnmr.fitting.ranges import check_rate_ceiling
from dnmr.fitting.seriesfile import named_model
from dnmr.io.modelfile import check_keys, read_toml
from dnmr.io.tables import check_kelvin, read_table
from dnmr.model import Model

EXPERIMENTS = ("inversion", "saturation", "exchange-2d")
TIME_COLUMNS = {"inversion": "delay_s", "saturation": "saturation_s", "exchange-2d": "mixing_s"}
EXPERIMENT_KEYS = {"title", "model", "temperature_k", "experiment", "data", "options"}
OPTION_KEYS = {"inverted", "saturated", "r1", "equilibrium", "inversion_efficiency", "volume_stderr",
               "monte_carlo_draws", "seed", "rate_limits_per_s"}
R1_MODES = ("per-site", "shared", "fixed")
EQUILIBRIUM_MODES = ("per-site", "shared")
DETECTED_COLUMN = "detected"


@dataclass(frozen=True)
class TransferOptions:
    """How to fit a magnetisation-transfer experiment.

    Parameters
    ----------
    inverted : tuple of str
        inversion: the sites the selective pulse inverts.
    saturated : tuple of str
        saturation: the sites irradiated.
    r1 : str
        "per-site" (R1 of each observed site fitted), "shared" (one R1 for all sites) or "fixed" (the
        model's ``r1_per_s``).
    equilibrium : str
        inversion and saturation: "per-site" (an equilibrium integral per site) or "shared" (one scale on
        the model's populations x nuclei).
    inversion_efficiency : float or None
        inversion: held at this value (0 to 1) instead of fitted.
    volume_stderr : float or None
        exchange-2d: standard error of one peak volume (volume units); default: from the residuals of
        the direct fit.
    monte_carlo_draws : int
        exchange-2d: Monte Carlo draws of the matrix method.
    seed : int
        Seed of the Monte Carlo draws.
    rate_limits_per_s : (float, float)
        Range of each fitted forward rate (s^-1).
    """

    inverted: tuple[str, ...] = ()
    saturated: tuple[str, ...] = ()
    r1: str = "per-site"
    equilibrium: str = "per-site"
    inversion_efficiency: float | None = None
    volume_stderr: float | None = None
    monte_carlo_draws: int = 1000
    seed: int = 0
    rate_limits_per_s: tuple[float, float] = (1e-4, 1e4)

    def __post_init__(self):
        if self.r1 not in R1_MODES:
            raise InputError(f'r1 must be one of {", ".join(R1_MODES)}, got {self.r1!r}', where="options.r1")
        if self.equilibrium not in EQUILIBRIUM_MODES:
            raise InputError(f'equilibrium must be one of {", ".join(EQUILIBRIUM_MODES)}, got {self.equilibrium!r}',
                             where="options.equilibrium")
        eff = self.inversion_efficiency
        if eff is not None and not (isinstance(eff, (int, float)) and 0.0 <= eff <= 1.0):
            raise InputError(f"expected a number from 0 to 1, got {eff!r}", where="options.inversion_efficiency")
        if self.volume_stderr is not None and not (isinstance(self.volume_stderr, (int, float))
                                                   and self.volume_stderr > 0 and math.isfinite(self.volume_stderr)):
            raise InputError(f"expected a positive number, got {self.volume_stderr!r}", where="options.volume_stderr")
        if isinstance(self.monte_carlo_draws, bool) or not isinstance(self.monte_carlo_draws, int) \
                or not 20 <= self.monte_carlo_draws <= 10**6:
            raise InputError(f"expected a whole number from 20 to 1000000, got {self.monte_carlo_draws!r}",
                             where="options.monte_carlo_draws")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or self.seed < 0:
            raise InputError(f"expected a whole number of 0 or more, got {self.seed!r}", where="options.seed")
        lo, hi = self.rate_limits_per_s
        if not (0 < lo < hi and math.isfinite(hi)):
            raise InputError(f"expected two positive rates, low then high, got {self.rate_limits_per_s!r}",
                             where="options.rate_limits_per_s")
        object.__setattr__(self, "inverted", tuple(self.inverted))
        object.__setattr__(self, "saturated", tuple(self.saturated))


@dataclass(frozen=True)
class TransferData:
    """A magnetisation-transfer data table.

    Attributes
    ----------
    times_s : ndarray
        Delay, saturation time or mixing time (s) of each row (inversion, saturation) or matrix (exchange-2d).
    sites : tuple of str
        The observed sites (columns), by label.
    values : ndarray
        Integrals, array (n_times, n_sites); for exchange-2d volumes (n_times, n_sites, n_sites), [t, i, j]
        detected on site i, started on site j.
    stderr : ndarray or None
        Standard errors of `values` (same shape), when the table gives them.
    source : str
        The table's file.
    """

    times_s: np.ndarray
    sites: tuple[str, ...]
    values: np.ndarray
    stderr: np.ndarray | None
    source: str


@dataclass(frozen=True)
class Experiment:
    """One magnetisation-transfer experiment: model, temperature, kind, data and options.

    Attributes
    ----------
    model : Model
        The model at the experiment's temperature.
    temperature_k : float
        Sample temperature (K).
    experiment : str
        "inversion", "saturation" or "exchange-2d".
    data : TransferData
        The table.
    options : TransferOptions
        How to fit.
    source : str or None
        The experiment file.
    title : str
        Free text.
    model_file : str or None
        The model file the experiment file names.
    """

    model: Model
    temperature_k: float
    experiment: str
    data: TransferData
    options: TransferOptions = field(default_factory=TransferOptions)
    source: str | None = None
    title: str = ""
    model_file: str | None = None

    def inputs(self) -> list[str]:
        """The files the experiment was read from (experiment file, model file, data table), as far as known."""
        return [f for f in (self.source, self.model_file, self.data.source) if f]

    def __post_init__(self):
        if self.experiment not in EXPERIMENTS:
            raise InputError(f'experiment must be one of {", ".join(EXPERIMENTS)}, got {self.experiment!r}',
                             where="experiment")
        labels = [s.label for s in model_sites(self.model)]
        for key in ("inverted", "saturated"):
            for name in getattr(self.options, key):
                if name not in labels:
                    raise InputError(f'unknown site "{name}"{did_you_mean(name, labels)}; sites are {", ".join(labels)}',
                                     where=f"options.{key}")
        if not self.model.exchanges:
            raise InputError("the model has no exchange process to measure", where="model")
        hi = self.options.rate_limits_per_s[1]
        check_rate_ceiling(math.log10(hi), self.temperature_k, "options.rate_limits_per_s", f"{hi:g} s^-1")
        for key, kind in (("inverted", "inversion"), ("saturated", "saturation"), ("volume_stderr", "exchange-2d"),
                          ("inversion_efficiency", "inversion")):
            if getattr(self.options, key) not in (None, ()) and self.experiment != kind:
                raise InputError(f"applies only to {kind} experiments; remove it", where=f"options.{key}")
        if self.experiment == "inversion" and not self.options.inverted:
            raise InputError('name the inverted sites, e.g. inverted = ["Ha"]', where="options.inverted")
        if self.experiment == "saturation":
            if not self.options.saturated:
                raise InputError('name the saturated sites, e.g. saturated = ["Hb"]', where="options.saturated")
            both = sorted(set(self.options.saturated) & set(self.data.sites))
            if both:
                raise InputError(f'site "{both[0]}" is saturated: it has no signal to fit; leave its column out',
                                 source=self.data.source)
            if len(np.unique(self.data.times_s)) < 3 and self.options.r1 != "fixed":
                raise InputError("steady-state data (fewer than three saturation times) give only R1/(R1 + k) of each "
                                 "site: give r1_per_s in the model and r1 = \"fixed\", or add build-up times",
                                 where="options.r1")
        if self.options.r1 == "fixed":
            site_relaxation_rates(self.model)


def _site_columns(table, sites: Sequence[str], skip: set[str]) -> tuple[list[str], list[str]]:
    """The site columns and their ``_stderr`` columns of a table; any other column is an error."""
    values, errors = [], []
    for name in table.cells:
        if name in skip:
            continue
        base = name.removesuffix("_stderr")
        if base not in sites:
            raise InputError(f'column "{name}" is not a site{did_you_mean(base, sites)}; sites are {", ".join(sites)}',
                             table.source, "line 1")
        (errors if name.endswith("_stderr") else values).append(name)
    for name in errors:
        if name.removesuffix("_stderr") not in values:
            raise InputError(f'column "{name}" has no column of values beside it', table.source)
    if errors and len(errors) != len(values):
        raise InputError("give a _stderr column for every site or for none", table.source)
    if not values:
        raise InputError(f"no site columns; sites are {', '.join(sites)}", table.source)
    return values, errors


def read_transfer_table(path: str | Path, experiment: str, model: Model) -> TransferData:
    """Read the data table of `experiment` (see the module notes) for the sites of `model`.

    Raises
    ------
    InputError
        Missing or unknown columns, non-numeric cells, negative times, an incomplete volume matrix,
        naming the file and line.
    """
    sites = [s.label for s in model_sites(model)]
    time = TIME_COLUMNS[experiment]
    required = (time, DETECTED_COLUMN) if experiment == "exchange-2d" else (time,)
    table = read_table(path, required)
    times = table.numbers(time)
    bad = np.flatnonzero(times < 0)
    if bad.size:
        raise InputError(f"{time} must not be negative", table.source, table.where(int(bad[0])))
    names, error_names = _site_columns(table, sites, set(required))
    values = np.column_stack([table.numbers(n) for n in names])
    stderr = np.column_stack([table.numbers(n) for n in error_names]) if error_names else None
    if stderr is not None and np.any(stderr <= 0):
        row = int(np.argwhere(stderr <= 0)[0][0])
        raise InputError("a standard error must be positive", table.source, table.where(row))
    if experiment != "exchange-2d":
        return TransferData(times, tuple(names), values, stderr, table.source)
    if names != sites:
        raise InputError(f"a 2D exchange table needs one column per site, in the model's order: {', '.join(sites)}",
                         table.source, "line 1")
    detected = table.text(DETECTED_COLUMN)
    mixing = list(dict.fromkeys(times.tolist()))
    volumes = np.full((len(mixing), len(sites), len(sites)), np.nan)
    errors = None if stderr is None else np.full_like(volumes, np.nan)
    for row, (t, site) in enumerate(zip(times, detected)):
        if site not in sites:
            raise InputError(f'unknown site "{site}"{did_you_mean(site, sites)}; sites are {", ".join(sites)}',
                             table.source, table.where(row))
        k, i = mixing.index(t), sites.index(site)
        if np.isfinite(volumes[k, i, 0]):
            raise InputError(f'site "{site}" is given twice at mixing time {t:g} s', table.source, table.where(row))
        volumes[k, i] = values[row]
        if errors is not None:
            errors[k, i] = stderr[row]
    for k, t in enumerate(mixing):
        missing = [s for i, s in enumerate(sites) if not np.isfinite(volumes[k, i, 0])]
        if missing:
            raise InputError(f'no row for site "{missing[0]}" at mixing time {t:g} s: each mixing time needs a '
                             "full volume matrix", table.source)
    return TransferData(np.array(mixing), tuple(sites), volumes, errors, table.source)


def _string_list(value, where: str) -> tuple[str, ...]:
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
        raise InputError(f'expected a list of site names such as ["Ha"], got {value!r}', where=where)
    return tuple(value)


def options_from_dict(table: Mapping) -> TransferOptions:
    """The ``[options]`` table of an experiment file as :class:`TransferOptions`."""
    check_keys(dict(table), OPTION_KEYS, "options")
    values = dict(table)
    for key in ("inverted", "saturated"):
        if key in values:
            values[key] = _string_list(values[key], f"options.{key}")
    if "rate_limits_per_s" in values:
        limits = values["rate_limits_per_s"]
        if not (isinstance(limits, list) and len(limits) == 2
                and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in limits)):
            raise InputError(f"expected two rates such as [1e-3, 1e3], got {limits!r}", where="options.rate_limits_per_s")
        values["rate_limits_per_s"] = tuple(float(v) for v in limits)
    return TransferOptions(**values)


def load_experiment(path: str | Path) -> Experiment:
    """Read an experiment file (TOML; see docs/transfer-file.md) with its model and data table.

    Raises
    ------
    InputError
        Naming the file and key (or the model or table file and its place) for any problem.
    """
    path = Path(path)
    data = read_toml(path)
    try:
        check_keys(data, EXPERIMENT_KEYS, "", required=("model", "temperature_k", "experiment", "data"))
        for key in ("model", "data", "experiment"):
            if not isinstance(data[key], str) or not data[key].strip():
                raise InputError(f"expected text, got {data[key]!r}", where=key)
        temperature = data["temperature_k"]
        if isinstance(temperature, bool) or not isinstance(temperature, (int, float)):
            raise InputError(f"expected a temperature in K, got {temperature!r}", where="temperature_k")
        check_kelvin(float(temperature), "temperature_k", where="temperature_k")
        if data["experiment"] not in EXPERIMENTS:
            raise InputError(f'expected one of {", ".join(EXPERIMENTS)}{did_you_mean(data["experiment"], EXPERIMENTS)},'
                             f' got {data["experiment"]!r}', where="experiment")
        options = options_from_dict(data.get("options", {}))
        title = data.get("title", "")
        if not isinstance(title, str):
            raise InputError("expected text", where="title")
    except InputError as err:
        raise err.located(source=path) from None
    model_file, model = named_model(data["model"], path)
    model = model.at_temperature(float(temperature))
    table = read_transfer_table(path.parent / data["data"], data["experiment"], model)
    try:
        return Experiment(model, float(temperature), data["experiment"], table, options, str(path), title,
                          str(model_file))
    except InputError as err:
        raise err.located(source=path) from None
