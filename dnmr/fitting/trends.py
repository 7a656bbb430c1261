"""Slow-exchange trends: static spectral parameters regressed on temperature, and the values held from them.

Shifts and couplings are regressed linearly on T, populations as ln(p/p_first) on 1/T (van 't Hoff), the
linewidth on T jointly with an Eyring line of the rates (elsewhere the linewidth and the exchange
broadening k/pi trade against each other).  A held value carries the line's standard error at its
temperature, which the fit carries into the rates (:mod:`dnmr.fitting.spectrumfit`, held parameters
with a stderr).  Which spectra the trends come from is decided in :mod:`dnmr.fitting.treatments`.
"""
from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from dnmr.fitting.problem import MISFIT_SIGMAS
from dnmr.fitting.spectrumfit import SpectrumFit

PARAMETER_PREFIX = {"shift": "shift_ppm_", "coupling": "coupling_hz_", "population": "population_",
                    "linewidth": "linewidth_hz_"}
"""The name prefix of the fit parameters of each kind of static parameter."""
MIN_HELD_LINEWIDTH_HZ = 1e-3
"""A linewidth trend extrapolated below this (Hz) is held here (the fit's lower limit of a linewidth)."""
SLOW_EXCHANGE_SOURCE = "slow_exchange"
"""The name of the independent errors of the values measured in the slow-exchange run, which every line with
a common basis shares (rates.csv's ``log10_rate_shared_slow_exchange_<j>``)."""


@dataclass(frozen=True)
class ParameterTrend:
    """One static spectral parameter regressed on temperature over slow-exchange spectra.

    ``y = a + b (x - x0)`` by weighted least squares (weights 1/stderr^2), with x = T (K) for shifts,
    couplings and the linewidth, and for a population x = 1/T, y = ln(p_state / p_first) (van 't Hoff).
    The covariance of (a, b) is widened by the reduced chi-square of the line when the points scatter
    significantly beyond their errors (:func:`trend_widening`).  From one temperature (``constant`` is
    true) a shift, coupling or linewidth is held constant (b = 0), and a population ratio keeps its
    free-energy difference (b = a / x0: ln K proportional to 1/T, dS° = 0).

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
    noise_map : tuple of tuple of float
        (da, db) = noise_map e, e independent unit errors of the points, before any widening by the reduced
        chi-square: for a line fitted jointly with the rates (:func:`linewidth_trend`) each spectrum's
        measured pair whitened by its covariance; for a line of a common basis (`common_basis`) every value
        measured in each slow-exchange spectrum whitened by its covariance (:func:`common_noise_basis`);
        empty otherwise.
    rate_noise : tuple of dict
        With `noise_map`, per point: the error (log10 k) of each rate it gave, by rate parameter, in the
        same unit errors e; those rates and the line share them.
    common_basis : bool
        True when `noise_map` is on the unit errors every trend of the run shares, so that the errors of
        values held from different lines (a linewidth and a population measured in the same spectra) are
        correlated as the slow-exchange fits measured them.
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
    noise_map: tuple[tuple[float, ...], ...] = ()
    rate_noise: tuple[dict[str, tuple[float, ...]], ...] = ()
    common_basis: bool = False

    def x(self, temperature_k: float) -> float:
        """The line's abscissa at `temperature_k` (K): T (K), or 1/T (1/K) for a van 't Hoff line."""
        return 1.0 / temperature_k if self.kind == "van-t-hoff" else temperature_k

    def at(self, temperature_k: float) -> tuple[float, float]:
        """The line's value and its standard error at `temperature_k` (K)."""
        d = np.array([1.0, self.x(temperature_k) - self.x0])
        a, b = self.coefficients
        return float(a + b * d[1]), float(math.sqrt(max(d @ np.array(self.covariance) @ d, 0.0)))

    def error_direction(self, temperature_k: float) -> np.ndarray:
        """The held value's error at `temperature_k` (K) as a unit vector on independent unit errors: those of
        the points (`noise_map`), else those of the coefficients (L z, L L^T the covariance)."""
        d = np.array([1.0, self.x(temperature_k) - self.x0])
        if self.noise_map:
            direction = d @ np.array(self.noise_map)
        else:
            values, vectors = np.linalg.eigh(np.array(self.covariance))
            direction = d @ (vectors * np.sqrt(np.clip(values, 0.0, None)))
        size = float(np.linalg.norm(direction))
        return direction / size if size > 0 else direction * 0.0

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
    else:
        cov = cov * trend_widening(red, dof)
    return ParameterTrend(name, kind, tuple(temps.tolist()), tuple(y.tolist()), tuple(err.tolist()), x0,
                          (float(coef[0]), float(coef[1])), tuple(tuple(float(v) for v in row) for row in cov), red)


def trend_widening(reduced_chi_square: float, dof: int) -> float:
    """The factor a trend line's covariance is widened by: its reduced chi-square when the points scatter
    significantly beyond their errors (the reduced chi-square above 1 by more than MISFIT_SIGMAS of its
    standard deviation sqrt(2 / dof), the test a spectrum's misfit gets), else 1.  With the two or three
    slow-exchange spectra a trend usually has, a reduced chi-square of one or two degrees of freedom
    exceeds 1 by chance a third of the time; widening then would make honest errors too wide."""
    if dof > 0 and reduced_chi_square > 1.0 + MISFIT_SIGMAS * math.sqrt(2.0 / dof):
        return reduced_chi_square
    return 1.0


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
            out[name] = held_setting(value, stderr)
        if ratios:
            weights = {name: math.exp(v) for name, (v, _) in ratios.items()}
            total = 1.0 + sum(weights.values())
            out[self.first_population] = {"start": 1.0 / total, "fixed": True}
            for name, (_, stderr) in ratios.items():
                p = weights[name] / total
                out[name] = held_setting(p, p * stderr)  # d(weight) = weight d ln(weight ratio)
        return out

    def shared_errors(self, temperature_k: float, shares: Mapping[str, float], point: tuple[int, str] | None = None
                      ) -> dict[str, float]:
        """The part of a rate's error (log10 k) that it shares with the other rates of the series through
        these trends.

        A held value's error at T is d(T) . (da, db), d = (1, x(T) - x0), and the errors (da, db) of a
        line's coefficients are one draw for the whole series: a linear map of independent unit errors,
        those of the values measured in the slow-exchange spectra (:attr:`ParameterTrend.noise_map`; on a
        common basis every line uses the same ones, so held values measured together err together), else
        (da, db) = L z, L L^T their covariance.  A rate that moves by ``share`` (log10 k) for one standard
        error of the held value therefore moves by share u . e, u the unit vector of
        :meth:`ParameterTrend.error_direction`; the rates of all the faster spectra move together, and
        with the rates of the slow-exchange spectra the linewidth's line was fitted with.  The analyses
        count these parts as correlated (:mod:`dnmr.activation.eyring`).

        Parameters
        ----------
        temperature_k : float
            The spectrum's temperature (K).
        shares : mapping of str to float
            log10 k per standard error of each held parameter (:attr:`dnmr.fitting.rates.RateEstimate.held_shares`);
            parameters held from anywhere but these trends are skipped.
        point : (int, str), optional
            For a spectrum the linewidth's line was fitted with: its place among the line's points and the
            rate's parameter (``log10_rate_<process>``); the rate's own error is then one of the line's
            unit errors.

        Returns
        -------
        dict of str to float
            ``slow_exchange_<j>``: the rate's change (log10 k) for the j-th unit error of the common basis
            (j from 1), or ``<parameter>_<j>`` for the j-th of a line of its own; on a common basis their
            squares add up to the held values' error with their correlations (:meth:`held_error`), else to
            the shares' squares (and the rate's own error).
        """
        out: dict[str, float] = {}
        for name, share in shares.items():
            line = self.line_of(name)
            if line is not None and share:
                source = SLOW_EXCHANGE_SOURCE if line.common_basis else name
                for j, u in enumerate(line.error_direction(temperature_k)):
                    out[f"{source}_{j + 1}"] = out.get(f"{source}_{j + 1}", 0.0) + float(share * u)
        for name, line in self.lines.items():
            own = line.rate_noise[point[0]].get(point[1]) if point and point[0] < len(line.rate_noise) else None
            source = SLOW_EXCHANGE_SOURCE if line.common_basis else name
            for j, u in enumerate(own or ()):
                out[f"{source}_{j + 1}"] = out.get(f"{source}_{j + 1}", 0.0) + float(u)
        return out

    def held_error(self, temperature_k: float, shares: Mapping[str, float]) -> float:
        """The error (log10 k) a rate gets from the held parameters of `shares` (log10 k per standard error
        of each, :attr:`dnmr.fitting.rates.RateEstimate.held_shares`) at `temperature_k` (K): those held
        from these trends counted with the correlations of a common basis (:meth:`shared_errors`), any
        other as independent."""
        own = sum(v * v for n, v in shares.items() if self.line_of(n) is None)
        return math.sqrt(own + sum(v * v for v in self.shared_errors(temperature_k, shares).values()))

    def line_of(self, name: str) -> ParameterTrend | None:
        """The line that gives held parameter `name` its error (a shift's: its difference from the first
        shift), or None."""
        return self.differences.get(name) if name.startswith(PARAMETER_PREFIX["shift"]) else self.lines.get(name)

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


def held_setting(value: float, stderr: float) -> dict:
    """The parameter setting that holds a parameter at `value`, with its standard error `stderr` (same unit)
    when that is known and positive."""
    setting = {"start": float(value), "fixed": True}
    if math.isfinite(stderr) and stderr > 0:
        setting["stderr"] = float(stderr)
    return setting


def _parameter_points(fits: Sequence[tuple[float, SpectrumFit]], name: str, widen=None) -> tuple[list, list, list]:
    """(temperatures, values, stderrs) of parameter `name` over `fits`; `widen(fit)` adds an error in
    quadrature (the linewidth's trade with an unresolved exchange broadening)."""
    temps, values, errors = [], [], []
    for t, fit in fits:
        par = fit.lmfit_parameters[name]
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
        p, p0 = fit.lmfit_parameters[name], fit.lmfit_parameters[first]
        s = math.nan if p.stderr is None else float(p.stderr)
        s0 = math.nan if p0.stderr is None else float(p0.stderr)
        two = len([n for n in fit.lmfit_parameters if n.startswith("population_")]) == 2
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
        params = slow[0][1].lmfit_parameters
        free = [n for n, p in params.items() if p.vary and not p.expr]
        for kind in ("shift", "coupling"):
            if kind in kinds:
                for name in (n for n in free if n.startswith(PARAMETER_PREFIX[kind])):
                    lines[name] = regress_trend(name, "linear-in-T", *_parameter_points(slow, name))
        shifts = [n for n in free if n.startswith(PARAMETER_PREFIX["shift"])] if "shift" in kinds else []
        if shifts:
            first_shift = shifts[0]
            for name in shifts[1:]:
                differences[name] = regress_trend(name, "linear-in-T", *_difference_points(slow, name, first_shift))
        populations = [n for n in params if n.startswith(PARAMETER_PREFIX["population"])]
        if "population" in kinds and populations and any(params[n].vary for n in populations):
            first = populations[0]
            for name in populations[1:]:
                lines[name] = regress_trend(name, "van-t-hoff", *_log_ratio_points(slow, name, first))
    if "linewidth" in kinds and quiet:
        name = next(n for n in quiet[0][1].lmfit_parameters if n.startswith(PARAMETER_PREFIX["linewidth"]))
        lines[name] = linewidth_trend(quiet, name)
    return StaticTrend(lines, first, differences=differences, first_shift=first_shift)


def _difference_points(fits, name: str, first: str) -> tuple[list, list, list]:
    """(temperatures, shift `name` minus shift `first` (ppm), stderrs) over `fits`, the errors with the two
    shifts' correlation."""
    temps, values, errors = [], [], []
    for t, fit in fits:
        variance = value_covariance(fit, [{name: 1.0, first: -1.0}])
        temps.append(t)
        values.append(float(fit.lmfit_parameters[name].value - fit.lmfit_parameters[first].value))
        errors.append(math.sqrt(variance[0, 0]) if np.isfinite(variance).all() else math.nan)
    return temps, values, errors


def value_covariance(fit: SpectrumFit, gradients: Sequence[Mapping[str, float]]) -> np.ndarray:
    """Covariance of values linear in the free parameters of `fit` (each a gradient by parameter name, in
    the value's unit per the parameter's), from the fit's standard errors and correlations (NaN where a
    standard error is missing)."""
    names = sorted({n for g in gradients for n in g})
    params = fit.lmfit_parameters
    sd = np.array([math.nan if params[n].stderr is None else float(params[n].stderr) for n in names])
    corr = np.eye(len(names))
    for a, first in enumerate(names):
        for b, second in enumerate(names):
            if a != b:
                rho = fit.correlation(first, second)
                corr[a, b] = rho if math.isfinite(rho) else 0.0
    g = np.array([[gradient.get(n, 0.0) for n in names] for gradient in gradients])
    return g @ (corr * np.outer(sd, sd)) @ g.T


def linewidth_trend(fits: Sequence[tuple[float, SpectrumFit]], name: str) -> ParameterTrend:
    """The linewidth's line in T, fitted jointly with an Eyring line of every process's rate.

    In slow exchange the intrinsic linewidth w and the exchange broadening trade against each other, so
    each spectrum's w alone is poorly known and its line in T extrapolates badly.  The rates of a process
    follow Eyring's equation, log10(k/T) = c + d (1/T - 1/T0), so one generalised least-squares fit of
    w = a + b (T - T0) and of those lines to the pairs (w, log10 k) of every spectrum, weighted by each
    spectrum's covariance of the pair (its errors and correlation), separates the two.  A rate that is
    only a bound, or a process with fewer than two determined rates, gives no rate point; then the
    linewidth's error is widened by what the unresolved exchange could take (``exchange_width``).  The
    covariance of (a, b) is widened as in :func:`regress_trend` (:func:`trend_widening`).  The line keeps how
    its coefficients and the rates of its spectra depend on the same measured errors (``noise_map``,
    ``rate_noise``), since those rates and the rates held at the line then err together.  Without rate
    points this is :func:`regress_trend` of the linewidths.
    """
    temps, values, errors = _parameter_points(fits, name)
    pairs = [rate_points(fit) for _, fit in fits]
    counts: dict[str, int] = {}
    for points in pairs:
        for rate in points:
            counts[rate] = counts.get(rate, 0) + 1
    processes = [rate for rate, n in counts.items() if n >= 2]
    if len(set(temps)) < 2 or not processes:
        return regress_trend(name, "linear-in-T", *_parameter_points(fits, name, widen=exchange_width))
    t0 = float(np.mean(temps))
    points = [_joint_point(t, fit, name, w, rates, processes, t0) for (t, fit), w, rates in zip(fits, values, pairs)]
    design = np.vstack([p.design for p in points])
    target = np.concatenate([p.target for p in points])
    coef, *_ = np.linalg.lstsq(design, target, rcond=None)
    unscaled = np.linalg.pinv(design.T @ design)
    dof = target.size - design.shape[1]
    chi2 = float(np.sum((target - design @ coef) ** 2))
    red = chi2 / dof if dof > 0 else math.nan
    cov = unscaled * trend_widening(red, dof)
    noise_map = unscaled[:2] @ design.T  # (da, db) per unit error of the whitened points
    offsets = np.cumsum([0] + [p.root.shape[0] for p in points])
    rate_noise = []
    for p, start in zip(points, offsets):
        rows = {}
        for row, rate in enumerate(p.rates, start=1):
            full = np.zeros(target.size)
            full[start:start + p.root.shape[0]] = p.root[row]
            rows[rate] = tuple(float(v) for v in full)
        rate_noise.append(rows)
    return ParameterTrend(name, "linear-in-T", tuple(temps), tuple(values), tuple(errors), t0,
                          (float(coef[0]), float(coef[1])),
                          tuple(tuple(float(v) for v in row) for row in cov[:2, :2]), red,
                          noise_map=tuple(tuple(float(v) for v in row) for row in noise_map),
                          rate_noise=tuple(rate_noise))


@dataclass(frozen=True)
class _JointPoint:
    """One spectrum in the joint fit of the linewidth and the Eyring lines: its rows of the design and of
    the data, whitened by its covariance C = root root^T, and the rates (log10 k parameters) it gives."""

    design: np.ndarray
    target: np.ndarray
    root: np.ndarray
    rates: tuple[str, ...]


def _joint_point(t: float, fit: SpectrumFit, name: str, width: float, rates: Mapping[str, tuple[float, float]],
                 processes: Sequence[str], t0: float) -> _JointPoint:
    """The whitened rows of one spectrum at `t` (K): its linewidth `width` (Hz) and the log10(k/T) of each
    of `processes` among its determined `rates`, their covariance from the fit (the linewidth's widened by
    the unresolved exchange broadening when no rate is used)."""
    used = [r for r in processes if r in rates]
    design = np.zeros((1 + len(used), 2 + 2 * len(processes)))
    design[0, :2] = 1.0, t - t0
    obs = [width]
    for row, rate in enumerate(used, start=1):
        j = 2 + 2 * processes.index(rate)
        design[row, j:j + 2] = 1.0, 1.0 / t - 1.0 / t0
        obs.append(rates[rate][0] - math.log10(t))
    covariance = value_covariance(fit, [{name: 1.0}] + [{rate: 1.0} for rate in used])
    if not used:
        covariance[0, 0] += exchange_width(fit) ** 2
    root = np.linalg.cholesky(covariance)
    return _JointPoint(np.linalg.solve(root, design), np.linalg.solve(root, np.array(obs)), root, tuple(used))


def rate_points(fit: SpectrumFit) -> dict[str, tuple[float, float]]:
    """(log10 k, its standard error) of every determined rate of `fit`, by fit parameter, for rates fitted
    with a finite error and a known correlation with the other free parameters."""
    out = {}
    names = [n for n in fit.lmfit_parameters if n.startswith("log10_rate_")]
    for name, rate in zip(names, fit.rates):
        par = fit.lmfit_parameters[name]
        if (rate.status == "determined" and par.vary and not par.expr and par.stderr is not None
                and math.isfinite(par.stderr) and par.stderr > 0 and par.correl):
            out[name] = (float(par.value), float(par.stderr))
    return out


def exchange_width(fit: SpectrumFit) -> float:
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


def temperature_span(temps: Sequence[float]) -> str:
    """The temperatures (K) a trend spans, in words ("240 K" or "230-250 K")."""
    return f"{min(temps):g} K" if len(set(temps)) == 1 else f"{min(temps):g}-{max(temps):g} K"

