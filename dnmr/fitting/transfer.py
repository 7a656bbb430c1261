"""Slow exchange by magnetisation transfer: selective inversion, saturation transfer and 2D exchange.

An *experiment file* (TOML) names a model file, the sample temperature, the kind of experiment, a data
table (CSV) and options; :func:`fit_transfer` fits the longitudinal exchange model
(:mod:`dnmr.engine.longitudinal`) to the table and :func:`write_transfer` writes ``rates.csv`` (the columns of
``dnmr fit`` plus ``method``) and ``results.json``.

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
    L = -logm(A M0^-1) / tm at each mixing time (Perrin & Gipe, J. Am. Chem. Soc. 106, 4036 (1984);
    Perrin & Dwyer, Chem. Rev. 90, 935 (1990)) with Monte Carlo errors over the volume errors.

Errors follow :mod:`dnmr.fitting.spectrumfit`: chi-square with the stated errors (or, without them, with the scatter
of the residuals), the covariance scaled by the error scale, and a chi-square profile over log10 k of
each rate.  A rate far below R1 moves too little magnetisation within T1 to be seen: the profile then
stays flat towards slow exchange and the rate is an upper bound, not a number with an error bar.
"""
from __future__ import annotations

import csv
import dataclasses
import io
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import lmfit
import numpy as np

from dnmr.errors import InputError, did_you_mean
from dnmr.fitting.parameters import parameter_identifier, parameter_record, parameter_stderr
from dnmr.fitting.problem import (
    PROFILE_RESTARTS,
    BetterMinimum,
    NoiseEstimate,
    error_scale,
    minimize,
    profile_parameter,
)
from dnmr.fitting.rates import RateContext, RateEstimate, classify_rate
from dnmr.formatting import significant
from dnmr.engine.longitudinal import LongitudinalSystem, model_sites, process_patterns, site_relaxation_rates
from dnmr.model import Model
from dnmr.io.modelfile import check_keys, load_model, read_toml
from dnmr.io.output import atomic_write_text, json_ready, new_output_folder, save_figure
from dnmr.fitting.series import RATE_COLUMNS
from dnmr.io.tables import check_kelvin, read_table

EXPERIMENTS = ("inversion", "saturation", "exchange-2d")
TIME_COLUMNS = {"inversion": "delay_s", "saturation": "saturation_s", "exchange-2d": "mixing_s"}
EXPERIMENT_KEYS = {"title", "model", "temperature_k", "experiment", "data", "options"}
OPTION_KEYS = {"inverted", "saturated", "r1", "equilibrium", "inversion_efficiency", "volume_stderr",
               "monte_carlo_draws", "seed", "rate_limits_per_s"}
R1_MODES = ("per-site", "shared", "fixed")
EQUILIBRIUM_MODES = ("per-site", "shared")
DETECTED_COLUMN = "detected"
#: Columns of rates.csv after those of ``dnmr fit`` (RATE_COLUMNS).
TRANSFER_COLUMNS = ("method", "matrix_rate_per_s", "matrix_rate_stderr", "chi_square", "reduced_chi_square",
                    "data", "flags", "note")
#: Steps of the coarse scan over log10 k (decades).
SCAN_STEP_DECADES = 1.0
#: Monte Carlo draws whose volume matrix has no real logarithm, above which a mixing time is not used.
MAX_COMPLEX_FRACTION = 0.1
#: Signed deviations, in Monte Carlo standard errors, that count as significant in the checks.
CHECK_SIGMAS = 2.0


# --------------------------------------------------------------------------------------------------
# the experiment file


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
    """

    model: Model
    temperature_k: float
    experiment: str
    data: TransferData
    options: TransferOptions = field(default_factory=TransferOptions)
    source: str | None = None
    title: str = ""

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
    model = load_model(path.parent / data["model"]).at_temperature(float(temperature))
    table = read_transfer_table(path.parent / data["data"], data["experiment"], model)
    try:
        return Experiment(model, float(temperature), data["experiment"], table, options, str(path), title)
    except InputError as err:
        raise err.located(source=path) from None


# --------------------------------------------------------------------------------------------------
# the fitted function


class _TransferProblem:
    """Data, errors and the longitudinal model function of one experiment (lmfit residuals)."""

    def __init__(self, experiment: Experiment):
        self.experiment = experiment
        model, data, options = experiment.model, experiment.data, experiment.options
        self.kind = experiment.experiment
        self.sites = model_sites(model)
        self.labels = [s.label for s in self.sites]
        self.observed = [self.labels.index(s) for s in data.sites]
        populations = model.populations()
        self.equilibrium = np.array([populations[model.state_index(s.state)] * s.nuclei for s in self.sites])
        self.patterns = process_patterns(model)
        self.rate_names = tuple(f"log10_k_{parameter_identifier(p)}" for p in model.process_names())
        self.data = data.values
        self.sigma = np.ones_like(self.data) if data.stderr is None else data.stderr
        self.nfev = 0

    # --- parameters -------------------------------------------------------------------------------
    def r1_name(self, label: str) -> str:
        return f"r1_per_s_{parameter_identifier(label)}"

    def m_eq_name(self, label: str) -> str:
        return f"m_eq_{parameter_identifier(label)}"

    def parameters(self) -> lmfit.Parameters:
        """Parameters with start values from the model and the data."""
        model, options, data = self.experiment.model, self.experiment.options, self.experiment.data
        params = lmfit.Parameters()
        lo, hi = np.log10(options.rate_limits_per_s)
        for name, k in zip(self.rate_names, model.rates()):
            params.add(name, value=float(np.clip(np.log10(max(k, 1e-300)), lo, hi)), min=lo, max=hi)
        positive = data.times_s[data.times_s > 0]
        guess = 1.0 / float(np.median(positive)) if positive.size else 1.0
        try:
            given = site_relaxation_rates(model)
        except InputError:
            given = None
        fitted = [self.labels[i] for i in self.r1_sites()]
        if options.r1 == "shared":
            params.add("r1_per_s", value=float(np.mean(given)) if given is not None else guess, min=0.0)
        for i, label in enumerate(self.labels):
            name = self.r1_name(label)
            if options.r1 == "fixed":
                params.add(name, value=float(given[i]), vary=False)
            elif options.r1 == "shared":
                params.add(name, expr="r1_per_s")
            elif label in fitted:
                params.add(name, value=float(given[i]) if given is not None else guess, min=0.0)
            elif given is not None:
                params.add(name, value=float(given[i]), vary=False)
            else:  # an unobserved site without a model R1 relaxes like the first observed one
                params.add(name, expr=self.r1_name(fitted[0]))
        scale = float(np.nanmax(np.abs(self.data)))
        if self.kind == "exchange-2d" or options.equilibrium == "shared":
            params.add("m_eq_scale", value=scale / float(self.equilibrium[self.observed].max()), min=0.0)
        else:
            for j, i in enumerate(self.observed):
                params.add(self.m_eq_name(self.labels[i]), value=float(np.abs(self.data[:, j]).max()), min=0.0)
        if self.kind == "inversion":
            eff = options.inversion_efficiency
            params.add("inversion_efficiency", value=0.9 if eff is None else eff, min=0.0, max=1.0, vary=eff is None)
        return params

    def r1_sites(self) -> list[int]:
        """Sites whose R1 is a parameter of its own (per-site mode): observed, and in a 2D spectrum all."""
        if self.kind == "exchange-2d":
            return list(range(len(self.sites)))
        return list(self.observed)

    # --- model function ---------------------------------------------------------------------------
    def system(self, values: Mapping[str, float]) -> LongitudinalSystem:
        rates = np.array([10.0 ** values[n] for n in self.rate_names])
        exchange = np.tensordot(rates, self.patterns, axes=1)
        relaxation = np.array([values[self.r1_name(label)] for label in self.labels])
        return LongitudinalSystem(self.sites, self.equilibrium, exchange, relaxation)

    def scales(self, values: Mapping[str, float]) -> np.ndarray:
        """Integral units per unit of M_eq, for each observed site."""
        if "m_eq_scale" in values:
            return np.full(len(self.observed), values["m_eq_scale"])
        return np.array([values[self.m_eq_name(self.labels[i])] / self.equilibrium[i] for i in self.observed])

    def predict(self, values: Mapping[str, float], times_s: np.ndarray | None = None) -> np.ndarray:
        """The model's integrals (or volumes) at the data's times (or at `times_s`, s)."""
        self.nfev += 1
        system = self.system(values)
        times = self.experiment.data.times_s if times_s is None else np.asarray(times_s, dtype=float)
        if self.kind == "exchange-2d":
            return values["m_eq_scale"] * system.volumes(times)
        options = self.experiment.options
        if self.kind == "inversion":
            M = system.evolve(system.inverted(options.inverted, values["inversion_efficiency"]), times)
        else:
            M = system.evolve(system.equilibrium, times, saturated=options.saturated)
        return M[:, self.observed] * self.scales(values)

    def residual(self, params: lmfit.Parameters) -> np.ndarray:
        return ((self.predict(params.valuesdict()) - self.data) / self.sigma).ravel()


def _scan_starts(problem: _TransferProblem, params: lmfit.Parameters) -> list[lmfit.Parameters]:
    """Coarse scan of each rate in turn (the other parameters fitted at each point): the best point and
    the second-best local minimum, as starting points."""
    lo, hi = np.log10(problem.experiment.options.rate_limits_per_s)
    grid = np.linspace(lo, hi, max(3, int(round((hi - lo) / SCAN_STEP_DECADES)) + 1))
    current = params
    starts = [params]
    for name in problem.rate_names:
        fits = []
        for x in grid:
            trial = current.copy()
            trial[name].set(value=float(x), vary=False)
            fits.append(minimize(problem, trial, tolerance=1e-4))
        chi = np.array([f.chisqr for f in fits])
        order = np.argsort(chi)
        minima = [i for i in order if (i == 0 or chi[i] <= chi[i - 1]) and (i == len(chi) - 1 or chi[i] <= chi[i + 1])]
        starts = []
        for i in minima[:2]:
            start = fits[i].params.copy()
            start[name].set(vary=True)
            starts.append(start)
        current = starts[0]
    return starts


# --------------------------------------------------------------------------------------------------
# results


@dataclass(frozen=True)
class SiteRates:
    """Site-to-site rate constants from the matrix method, at one mixing time or combined.

    Attributes
    ----------
    mixing_s : float
        Mixing time (s); NaN for the combination of all mixing times.
    rates_per_s : ndarray
        k(j -> i) (s^-1) at [i, j] for i != j; the diagonal holds R1 of each site (s^-1).
    stderr : ndarray
        Monte Carlo standard errors of the same (NaN without draws).
    process_rates : ndarray
        Forward rate (s^-1) of each exchange process: the least-squares match of the site rates to the
        model's pattern of each process.
    process_stderr : ndarray
        Their Monte Carlo standard errors.
    checks : list of str
        Negative, non-detailed-balanced and unexpected elements, in words.
    """

    mixing_s: float
    rates_per_s: np.ndarray
    stderr: np.ndarray
    process_rates: np.ndarray
    process_stderr: np.ndarray
    checks: list[str]

    def to_dict(self) -> dict:
        return {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in dataclasses.asdict(self).items()}


@dataclass
class TransferFit:
    """The fit of one magnetisation-transfer experiment.

    Attributes
    ----------
    experiment : Experiment
        What was fitted.
    rates : list of RateEstimate
        One per exchange process, in model order (forward rates, s^-1).
    parameters : lmfit.Parameters
        Every parameter (log10_k_*, r1_per_s_*, m_eq_*, inversion_efficiency) with its scaled error.
    chi_square, reduced_chi_square : float
        Sum of squared weighted residuals and that over the degrees of freedom.
    degrees_of_freedom : int
        Data points minus free parameters.
    error_scale : float
        The factor on the covariance and the rise of the chi-square profile that bounds a 68 % interval.
    flags, notes : list of str
        Remarks, short and in words.
    fitted : ndarray
        The model at the best fit, shaped like the data.
    matrix_method : list of SiteRates
        exchange-2d: the matrix method at each mixing time, then their combination.
    """

    experiment: Experiment
    rates: list[RateEstimate]
    parameters: lmfit.Parameters
    chi_square: float
    reduced_chi_square: float
    degrees_of_freedom: int
    error_scale: float
    flags: list[str]
    notes: list[str]
    fitted: np.ndarray
    matrix_method: list[SiteRates] = field(default_factory=list)

    @property
    def residuals(self) -> np.ndarray:
        """Data minus fit, shaped like the data."""
        return self.experiment.data.values - self.fitted

    def curve(self, times_s: Sequence[float]) -> np.ndarray:
        """The fitted model at any times (s), shaped like the data with those times."""
        return _TransferProblem(self.experiment).predict(self.parameters.valuesdict(), np.asarray(times_s, dtype=float))

    def plot(self, figure=None):
        """Data, fitted curves and residuals (:func:`dnmr.reporting.plotting.plot_transfer_fit`)."""
        from dnmr.reporting.plotting import plot_transfer_fit

        return plot_transfer_fit(self, figure=figure)

    def relaxation(self) -> dict[str, tuple[float, float]]:
        """R1 (s^-1) and its standard error for each site (error NaN where fixed or tied)."""
        out = {}
        for site in model_sites(self.experiment.model):
            par = self.parameters[f"r1_per_s_{parameter_identifier(site.label)}"]
            out[site.label] = (float(par.value), parameter_stderr(par) if par.vary else math.nan)
        return out

    def rate(self, process: str | int = 0) -> RateEstimate:
        """The estimate of one process, by name or index."""
        if isinstance(process, int):
            return self.rates[process]
        for r in self.rates:
            if r.process == process:
                return r
        raise InputError(f"unknown process {process!r}; processes are {[r.process for r in self.rates]}")

    def report(self) -> str:
        """The fit in a few lines: rates (or bounds), R1, and the remarks."""
        exp = self.experiment
        lines = [f"{exp.experiment} at {exp.temperature_k:.2f} K ({exp.data.source}): "
                 f"chi-square {self.chi_square:.4g} for {self.degrees_of_freedom} degrees of freedom"]
        width = max(len(r.process) for r in self.rates)
        for r in self.rates:
            lines.append(f"  {r.process:<{width}}  {r.describe()}")
            if r.reason and r.status != "determined":
                lines.append(f"  {'':<{width}}  ({r.reason})")
        for label, (value, err) in self.relaxation().items():
            lines.append(f"  R1 {label}: {significant(value, 4)} s^-1" + (f" ± {significant(err, 2)}" if np.isfinite(err) else " (fixed or tied)"))
        if "inversion_efficiency" in self.parameters:
            par = self.parameters["inversion_efficiency"]
            lines.append(f"  inversion efficiency {par.value:.3f}" + (f" ± {parameter_stderr(par):.3f}" if par.vary else " (fixed)"))
        combined = self.matrix_method[-1] if self.matrix_method else None
        if combined is not None:
            for r, k, s in zip(self.rates, combined.process_rates, combined.process_stderr):
                lines.append(f"  matrix method {r.process}: k = {significant(k)} ± {significant(s, 2)} s^-1")
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)

    def rate_rows(self) -> list[dict]:
        """Rows of rates.csv, one per process: the columns of ``dnmr fit`` plus method and the fit quality."""
        exp = self.experiment
        rows = []
        combined = self.matrix_method[-1] if self.matrix_method else None
        for i, r in enumerate(self.rates):
            row = {"temperature_k": exp.temperature_k, "process": r.process, "rate_per_s": r.rate_per_s,
                   "rate_stderr": r.rate_stderr, "rate_lower": r.rate_lower, "rate_upper": r.rate_upper,
                   "status": r.status, "log10_rate": r.log10_rate,
                   "log10_rate_stderr": r.log10_stderr if r.status == "determined" else math.nan,
                   "ci68_low_per_s": r.interval_per_s[0], "ci68_high_per_s": r.interval_per_s[1],
                   "method": exp.experiment,
                   "matrix_rate_per_s": float(combined.process_rates[i]) if combined else math.nan,
                   "matrix_rate_stderr": float(combined.process_stderr[i]) if combined else math.nan,
                   "chi_square": self.chi_square, "reduced_chi_square": self.reduced_chi_square,
                   "data": exp.data.source, "flags": ";".join(self.flags),
                   "note": " ".join(([r.reason] if r.reason and r.status != "determined" else []) + self.notes)}
            rows.append({k: "" if isinstance(v, float) and not math.isfinite(v) else v for k, v in row.items()})
        return rows

    def to_dict(self) -> dict:
        """Plain data (JSON-ready after :func:`dnmr.io.output.json_ready`)."""
        exp = self.experiment
        return {
            "experiment": exp.experiment, "experiment_file": exp.source, "data": exp.data.source,
            "temperature_k": exp.temperature_k, "title": exp.title,
            "options": dataclasses.asdict(exp.options),
            "sites": [s.label for s in model_sites(exp.model)], "observed_sites": list(exp.data.sites),
            "rates": [r.to_dict() for r in self.rates],
            "relaxation_per_s": {k: {"value": v, "stderr": e} for k, (v, e) in self.relaxation().items()},
            "parameters": {n: parameter_record(p) for n, p in self.parameters.items()},
            "chi_square": self.chi_square, "reduced_chi_square": self.reduced_chi_square,
            "degrees_of_freedom": self.degrees_of_freedom, "error_scale": self.error_scale,
            "flags": self.flags, "notes": self.notes,
            "times_s": exp.data.times_s, "values": exp.data.values, "fitted": self.fitted,
            "matrix_method": [m.to_dict() for m in self.matrix_method],
        }


# --------------------------------------------------------------------------------------------------
# the fit


def fit_transfer(experiment: Experiment | str | Path) -> TransferFit:
    """Fit a magnetisation-transfer experiment: forward rates with errors or bounds, R1, equilibrium
    integrals (and inversion efficiency), and for 2D exchange also the matrix method.

    Parameters
    ----------
    experiment : Experiment or path
        The experiment (an experiment file is read with :func:`load_experiment`).

    Returns
    -------
    TransferFit
    """
    if not isinstance(experiment, Experiment):
        experiment = load_experiment(experiment)
    with np.errstate(invalid="ignore"):  # lmfit takes square roots of a singular covariance's diagonal
        return _fit(experiment)


def _fit(experiment: Experiment) -> TransferFit:
    """The work of :func:`fit_transfer`."""
    problem = _TransferProblem(experiment)
    params = problem.parameters()
    best = min((minimize(problem, start) for start in _scan_starts(problem, params)), key=lambda r: r.chisqr)
    n_points = int(np.isfinite(problem.data).sum())
    dof = n_points - best.nvarys
    if dof < 1:
        raise InputError(f"{n_points} data points for {best.nvarys} free parameters: measure more delays or fix R1 "
                         "(r1 = \"fixed\") or the inversion efficiency", source=experiment.source)
    flags, notes = [], []
    given = experiment.options.volume_stderr if experiment.experiment == "exchange-2d" else None
    if given is not None or experiment.data.stderr is None:
        # without stated errors the scatter of the residuals about the best fit is the error of each point
        floor = 1e-12 * float(np.nanmax(np.abs(problem.data)))  # noiseless data: a tiny error, not a division by 0
        sigma = given if given is not None else max(math.sqrt(best.chisqr / dof), floor)
        if given is None:
            notes.append(f"no errors given: the scatter of the residuals ({significant(sigma)} per point) is taken as the "
                         "error of each point")
        problem.sigma = np.full_like(problem.data, sigma)
        best = minimize(problem, best.params)
    for attempt in range(PROFILE_RESTARTS + 1):
        scale, quality_flags, quality_notes = error_scale(best.chisqr, dof, NoiseEstimate(1.0, 1.0, 0, "stated"))
        try:
            profiles = {n: profile_parameter(problem, best, n, scale, parameter_stderr(best.params[n]) * math.sqrt(scale),
                                    restart=attempt < PROFILE_RESTARTS)
                        for n in problem.rate_names if best.params[n].vary}
            break
        except BetterMinimum as better:
            best = better.result
    for par in best.params.values():
        if par.stderr is not None:
            par.stderr *= math.sqrt(scale)
    flags += quality_flags
    notes += quality_notes
    if best.covar is None:
        flags.append("singular")
        notes.append("the parameters are not all determined (singular covariance): fix R1 (r1 = \"fixed\" or "
                     "\"shared\") or the inversion efficiency")
    if "inversion_efficiency" in best.params and best.params["inversion_efficiency"].vary \
            and best.params["inversion_efficiency"].value > 1.0 - 1e-6:
        flags.append("at-bound:inversion_efficiency")
        notes.append("the inversion efficiency ended at 1, a perfect inversion (its upper limit)")
    rates = [_transfer_estimate(classify_rate(n, p, best.params, profiles.get(n), RateContext(), {}), problem, best.params)
             for n, p in zip(problem.rate_names, experiment.model.process_names())]
    flags += [f"{r.status}:{r.process}" for r in rates if r.status in ("upper-bound", "lower-bound", "interval",
                                                                       "undetermined")]
    values = best.params.valuesdict()
    fit = TransferFit(experiment, rates, best.params, float(best.chisqr), float(best.chisqr / dof), int(dof),
                      float(scale), flags, notes, problem.predict(values))
    if experiment.experiment == "exchange-2d":
        sigma = None if experiment.data.stderr is not None and given is None else float(problem.sigma.flat[0])
        fit.matrix_method = matrix_method(experiment, values["m_eq_scale"], sigma)
        remarks = [f"matrix method at {m.mixing_s:g} s: {c}" for m in fit.matrix_method for c in m.checks]
        if remarks:
            fit.flags.append("matrix-method-remarks")
            fit.notes.extend(remarks)
    return fit


def _transfer_estimate(estimate: RateEstimate, problem: _TransferProblem, params: lmfit.Parameters) -> RateEstimate:
    """The estimate with the reason for a bound said in the words of magnetisation transfer."""
    r1 = [params[problem.r1_name(problem.labels[i])].value for i in problem.observed]
    times = problem.experiment.data.times_s
    longest, shortest = float(times.max()), float(times[times > 0].min()) if np.any(times > 0) else math.nan
    if estimate.status == "upper-bound":
        reason = (f"slow-exchange limit of magnetisation transfer: k up to {significant(estimate.rate_upper)} s^-1 moves "
                  f"too little magnetisation within T1 (R1 about {significant(min(r1))} to {significant(max(r1))} s^-1) and the "
                  f"longest time ({longest:g} s) for the noise to show it; any smaller k fits as well")
    elif estimate.status == "lower-bound":
        reason = (f"fast-exchange limit of magnetisation transfer: for any k above {significant(estimate.rate_lower)} s^-1 "
                  f"the sites have exchanged their magnetisation before the shortest time ({shortest:g} s); "
                  "shorter delays or mixing times would measure it")
    else:
        return estimate
    return dataclasses.replace(estimate, reason=reason)


# --------------------------------------------------------------------------------------------------
# 2D exchange: the matrix method


def site_rates_from_volumes(volumes: np.ndarray, m0: np.ndarray, mixing_s: float) -> np.ndarray | None:
    """L = -logm(A M0^-1) / tm (s^-1) from one volume matrix A (Perrin & Gipe 1984).

    Off the diagonal L[i, j] = -k(j -> i); the column sums are R1 of each site.  None when A M0^-1 has no
    real logarithm (a negative or complex eigenvalue: noise too large for this mixing time).
    """
    X = volumes / m0[None, :]
    values, vectors = np.linalg.eig(X)
    if np.any(np.abs(values.imag) > 1e-9 * np.abs(values).max()) or np.any(values.real <= 0):
        return None
    log_x = np.real(vectors @ np.diag(np.log(values.real)) @ np.linalg.inv(vectors))
    return -log_x / mixing_s


def _site_rate_matrix(L: np.ndarray) -> np.ndarray:
    """k(j -> i) off the diagonal, R1 (column sums of L) on it."""
    out = -L.copy()
    np.fill_diagonal(out, L.sum(axis=0))
    return out


def _process_rates(rates: np.ndarray, patterns: np.ndarray) -> np.ndarray:
    """Least-squares forward rates of the processes from site rates k(j -> i) (off-diagonal elements)."""
    off = ~np.eye(rates.shape[0], dtype=bool)
    design = np.stack([-p[off] for p in patterns], axis=1)
    coef, *_ = np.linalg.lstsq(design, rates[off], rcond=None)
    return coef


def matrix_method(experiment: Experiment, m_eq_scale: float, volume_stderr: float | None) -> list[SiteRates]:
    """The matrix method at each mixing time, with Monte Carlo errors over the volume errors, then the
    inverse-variance combination of the mixing times.

    Parameters
    ----------
    experiment : Experiment
        A 2D exchange experiment.
    m_eq_scale : float
        Volume units per unit of M_eq (from the direct fit); M0 = scale x M_eq.  A mixing time of 0
        gives M0 from its diagonal instead.  The site-to-site rates do not depend on this scale; R1 does.
    volume_stderr : float or None
        Standard error of one volume; the table's own errors when None.
    """
    data = experiment.data
    model = experiment.model
    patterns = process_patterns(model)
    populations = model.populations()
    sites = model_sites(model)
    m_eq = np.array([populations[model.state_index(s.state)] * s.nuclei for s in sites])
    zero = np.flatnonzero(data.times_s == 0)
    m0 = np.diag(data.values[zero[0]]).copy() if zero.size else m_eq_scale * m_eq
    sigma = data.stderr if volume_stderr is None else np.full_like(data.values, volume_stderr)
    rng = np.random.default_rng(experiment.options.seed)
    draws = experiment.options.monte_carlo_draws
    connected = np.any(np.abs(patterns) > 0, axis=0)
    results = []
    for k, t in enumerate(data.times_s):
        if t == 0:
            continue
        L = site_rates_from_volumes(data.values[k], m0, t)
        if L is None:
            results.append(SiteRates(float(t), np.full((len(sites),) * 2, np.nan), np.full((len(sites),) * 2, np.nan),
                                     np.full(len(patterns), np.nan), np.full(len(patterns), np.nan),
                                     ["the volume matrix has no real logarithm (a negative or complex eigenvalue of "
                                      "A M0^-1): the noise is too large for the matrix method at this mixing time"]))
            continue
        rates = _site_rate_matrix(L)
        samples, complex_draws = [], 0
        for _ in range(draws):
            noisy = data.values[k] + rng.normal(size=sigma[k].shape) * sigma[k]
            m0_draw = np.diag(data.values[zero[0]] + rng.normal(size=sigma[zero[0]].shape) * sigma[zero[0]]) \
                if zero.size else m0
            Ld = site_rates_from_volumes(noisy, m0_draw, t)
            if Ld is None:
                complex_draws += 1
                continue
            samples.append(_site_rate_matrix(Ld))
        checks = []
        if complex_draws > MAX_COMPLEX_FRACTION * draws:
            checks.append(f"{complex_draws} of {draws} Monte Carlo draws have no real logarithm: errors at this "
                          "mixing time are unreliable (too short a mixing time for the noise)")
        samples = np.array(samples) if samples else np.full((1,) + rates.shape, np.nan)
        stderr = samples.std(axis=0, ddof=1) if len(samples) > 1 else np.full(rates.shape, np.nan)
        proc = np.array([_process_rates(s, patterns) for s in samples])
        checks += _matrix_checks(rates, stderr, m_eq, connected, [s.label for s in sites])
        results.append(SiteRates(float(t), rates, stderr, _process_rates(rates, patterns),
                                 proc.std(axis=0, ddof=1) if len(proc) > 1 else np.full(len(patterns), np.nan), checks))
    usable = [r for r in results if np.all(np.isfinite(r.process_stderr)) and np.all(r.process_stderr > 0)]
    if usable:
        w = np.array([1.0 / r.process_stderr ** 2 for r in usable])
        k = np.array([r.process_rates for r in usable])
        site_w = np.array([1.0 / r.stderr ** 2 for r in usable])
        site_k = np.array([r.rates_per_s for r in usable])
        results.append(SiteRates(math.nan, (site_w * site_k).sum(0) / site_w.sum(0), 1.0 / np.sqrt(site_w.sum(0)),
                                 (w * k).sum(0) / w.sum(0), 1.0 / np.sqrt(w.sum(0)), []))
    return results


def _matrix_checks(rates: np.ndarray, stderr: np.ndarray, m_eq: np.ndarray, connected: np.ndarray,
                   labels: list[str]) -> list[str]:
    """Negative, non-detailed-balanced and unexpected site rates, with what they mean."""
    checks = []
    n = len(labels)
    for i in range(n):
        for j in range(n):
            if i == j:
                continue
            k, s = rates[i, j], stderr[i, j]
            name = f"k({labels[j]} -> {labels[i]}) = {significant(k)} ± {significant(s, 2)} s^-1"
            if k < 0:
                clearly_negative = np.isfinite(s) and k < -CHECK_SIGMAS * s
                checks.append(f"{name} is negative" + (
                    ", beyond its error: a cross peak of opposite sign to the diagonal, as cross-relaxation (NOE) "
                    "of a small molecule gives; exchange alone cannot make it" if clearly_negative else
                    " but within its error of 0: noise on a slow or absent exchange path"))
            elif not connected[i, j] and np.isfinite(s) and k > CHECK_SIGMAS * s:
                checks.append(f"{name} joins sites that no exchange process of the model joins: an exchange path the "
                              "model lacks, or cross-relaxation (NOE, of the same sign as exchange in large or slowly "
                              "tumbling molecules)")
            if j > i:
                flow_ij, flow_ji = k * m_eq[j], rates[j, i] * m_eq[i]
                err = math.hypot(s * m_eq[j], stderr[j, i] * m_eq[i])
                if np.isfinite(err) and abs(flow_ij - flow_ji) > CHECK_SIGMAS * err:
                    checks.append(f"detailed balance fails between {labels[i]} and {labels[j]}: k M_eq is "
                                  f"{significant(flow_ij)} one way and {significant(flow_ji)} the other (beyond {CHECK_SIGMAS:g} "
                                  "errors): wrong populations in the model, unequal excitation of the sites, or "
                                  "volumes distorted by overlap or baseline")
    return checks


# --------------------------------------------------------------------------------------------------
# output


def write_transfer(fit: TransferFit, outdir: str | Path, overwrite: bool = False) -> Path:
    """Write ``rates.csv``, ``results.json`` and ``fit.png`` of `fit` into the new folder `outdir` (atomically; an
    existing non-empty folder only with `overwrite`).  Returns the folder."""
    outdir = new_output_folder(outdir, overwrite=overwrite)
    rows = fit.rate_rows()
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=list(RATE_COLUMNS) + list(TRANSFER_COLUMNS), lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: repr(v) if isinstance(v, float) else v for k, v in row.items()})
    atomic_write_text(outdir / "rates.csv", buffer.getvalue(), overwrite=overwrite)
    atomic_write_text(outdir / "results.json", json.dumps(json_ready(fit.to_dict()), indent=1, allow_nan=False) + "\n",
                      overwrite=overwrite)
    save_figure(fit.plot(), outdir / "fit.png", overwrite=overwrite, close=True)
    return outdir


def run_transfer(experiment_file: str | Path, outdir: str | Path, overwrite: bool = False) -> TransferFit:
    """Read an experiment file, fit it and write ``rates.csv`` and ``results.json`` into `outdir`.

    Parameters
    ----------
    experiment_file : str or Path
        The experiment file (TOML).
    outdir : str or Path
        A new (or empty) folder for the results; an existing one only with `overwrite`.
    overwrite : bool
        Replace the results of an earlier run.
    """
    experiment = load_experiment(experiment_file)
    new_output_folder(outdir, overwrite=overwrite)  # refuse before the work, not after it
    fit = fit_transfer(experiment)
    write_transfer(fit, outdir, overwrite=overwrite)
    return fit
