"""Exchange rates from one measured spectrum: lineshape fitting with honest uncertainties.

The fitted spectrum is the engine's complex lineshape S = A - i D (A absorption, D dispersion, both
per Hz) of the model, with nuisance terms a measured spectrum needs:

    y(nu) = amplitude * Re[exp(i phi(nu)) S(nu - offset)] + sum_j baseline_j x^j
          = amplitude * [cos(phi) A + sin(phi) D] + baseline,

    phi(nu) = phase0 + phase1 (nu - nu_centre) / span,   x = (nu - nu_centre) / (span / 2),

nu in Hz, nu_centre and span the centre and width of the fitted region (x runs from -1 at its
low-ppm end to +1 at its high-ppm end).  ``phase0_deg`` is therefore the phase *error* the data carry
(a positive value mixes in positive dispersion, which is positive on the high-frequency side of a
line); ``phase1_deg`` is the change of that error across the region; a positive ``offset_hz`` moves
every line to higher frequency.

Parameters (lmfit, one per quantity; each can be fixed, bounded or tied by an lmfit expression):
``log10_rate_<process>`` (rates are fitted on a log scale), ``amplitude``, ``baseline_0..3``,
``phase0_deg``, ``phase1_deg``, ``offset_hz``, ``linewidth_hz_<state>``, ``population_<state>``,
``shift_ppm_<state>_<spin>``, ``coupling_hz_<state>_<spin>_<spin>`` (one per coupling the model file
gives).  Names are the model's names with anything but letters, digits and _ turned into _.

Method
------
1. *Noise*: the standard deviation of the points in signal-free parts of the spectrum (given as
   ``noise_ppm``, else the spectrum outside the fitted region, else the outer eighths of the region),
   estimated robustly, with the correlation factor c of neighbouring points
   (:func:`dnmr.fitting.problem.estimate_noise`).
2. *Coarse scan*: log k is scanned over ``rate_scan_per_s`` (default 1e-2 to 1e7 s^-1, a grid of 37 points:
   every other point, then the neighbours of the two best local minima).  At every point the amplitude,
   zero-order phase and baseline enter linearly and are solved by linear least squares, and the frequency
   offset is found by cross-correlation, so the scan needs no start value for any of them.  The best scan
   point, the second-best local minimum and a start value from the caller (a neighbouring temperature) are
   each refined, and the best refinement is kept.
3. *Refinement*: lmfit ``least_squares`` (trust region, bounds) on residuals divided by the noise.
4. *Uncertainties*: chi-square = sum ((data - fit) / noise)^2.  The covariance is (J^T J)^-1 of those
   residuals multiplied by the error scale s = c x (reduced chi-square if the fit is significantly
   worse than the noise, else 1).  lmfit's ``scale_covar`` is not used: rescaling by the reduced
   chi-square always would shrink the errors of a fit that looks better than the noise and hide a
   model that does not describe the data.
5. *Identifiability*: for every fitted rate, chi-square is profiled over log k (every other free
   parameter re-optimised at each point) out to where it has risen by s (the 68 % interval); the
   rate is then given with an error bar, as an interval, an upper bound (slow-exchange limit), a lower
   bound (fast-exchange limit) or as undetermined, as :mod:`dnmr.fitting.rates` sets out.  A one-sided
   bound at this level is an 84 % confidence limit.  A profile that finds a better fit restarts the
   fit from there (up to ``PROFILE_RESTARTS`` times); the last profile keeps going, counts the rise
   from the lowest chi-square it found (which can only widen the interval), and the fit is flagged
   "unstable" with its rates given as intervals or bounds.
6. *Held parameters with an uncertainty*: a parameter held fixed with a ``stderr`` setting (a shift
   from the slow-exchange trend, a linewidth from a reference line) carries that error into every rate
   by implicit differentiation of the normal equations at the optimum
   (:func:`dnmr.fitting.rates.held_shares`); the same amount widens each side of the profile interval
   in quadrature.  Each rate keeps the split (``log10_rate_stderr_spectrum``, ``log10_rate_stderr_held`` and the
   share of every held parameter).
"""
from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import lmfit
import numpy as np

from dnmr.errors import InputError, did_you_mean
from dnmr.fitting.parameters import (
    RATE_PREFIX,
    FitParameter,
    ParameterLayout,
    apply_settings,
    as_fit_parameters,
    checked_settings,
    fitted_parameters,
    held_errors,
    parameter_record,
    parameters_from_records,
    tie_text,
    with_values,
)
from dnmr.fitting.problem import FitProblem, NoiseEstimate, Profile, estimate_noise, profile_with_restarts
from dnmr.fitting.ranges import check_rate_ceiling, number_pair, ppm_regions
from dnmr.fitting.rates import RateContext, RateEstimate, classify_rate, held_shares, rate_of_process
from dnmr.fitting.region import chosen_region, fit_region, shifts_outside, spectrum_for_model
from dnmr.fitting.scan import linear_solve, refine_best, scan_rates, search_shifts
from dnmr.fitting.workers import single_threaded_blas
from dnmr.io.measured import MeasuredSpectrum
from dnmr.kinetics import STANDARD_TEMPERATURE_K
from dnmr.model import Model
from dnmr.notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from dnmr.posterior import Posterior

PHASE_MODES = ("none", "zero-order", "first-order")
LINEWIDTH_MODES = ("fixed", "shared", "per-state")
POPULATION_MODES = ("fixed", "free")
SHIFT_MODES = ("fixed", "free")
COUPLING_MODES = ("fixed", "free")


# --------------------------------------------------------------------------------------------------
# options


def _choice(value: str, allowed: tuple[str, ...], where: str) -> str:
    """`value` when it is one of `allowed`, else an InputError naming `where`."""
    if value not in allowed:
        raise InputError(f'expected one of {", ".join(allowed)}, got {value!r}{did_you_mean(str(value), allowed)}',
                         where=where)
    return value


@dataclass(frozen=True)
class FitOptions:
    """How a spectrum is fitted.

    Parameters
    ----------
    region_ppm : (float, float), optional
        Part of the spectrum fitted (ppm, either order); default the model's window.
    noise_ppm : sequence of (float, float)
        Signal-free regions (ppm) for the noise estimate; default the spectrum outside the region.
    noise : float, optional
        Known noise standard deviation (intensity units); replaces the estimate.
    baseline_order : int
        Order of the polynomial baseline, 0 to 3.
    phase : {"none", "zero-order", "first-order"}
        Which phase errors are fitted.
    frequency_offset : bool
        Fit a frequency offset of the whole spectrum (referencing drift at other temperatures).
    max_offset_hz : float, optional
        Bound on the offset (Hz); default a tenth of the region's width.
    linewidth : {"shared", "per-state", "fixed"}
        Intrinsic linewidth: one fitted width for all states, one per state, or the model's.
    populations : {"fixed", "free"}
        Keep the model's populations or fit them.
    shifts : {"fixed", "free"}
        Keep the model's shifts (needed in fast exchange, where the spectrum does not fix them) or fit
        them.  Free shifts fix the frequency offset (the two would be degenerate).
    couplings : {"fixed", "free"}
        Keep the model's scalar couplings or fit them (``coupling_hz_<state>_<a>_<b>``).
    rate_scan_per_s : (float, float)
        Range of the coarse scan over the rate (s^-1).
    rate_limits_per_s : (float, float)
        Bounds of every fitted rate (s^-1); the profile runs out to them.
    scan_points : int
        Points of the coarse scan's grid (every other one is scanned, then the neighbours of the best
        minima).
    profile : bool
        Profile chi-square over every rate to find bounds (on by default; off only for speed).
    parameters : mapping
        Settings by parameter name: ``{"linewidth_hz_a": {"start": 1.2, "fixed": True}}``; keys
        start, fixed, lower, upper, same_as (the name of another parameter this one equals, with
        optional times and plus: this = times * other + plus), and stderr: the standard error of a
        held value, carried into the rates.  See :class:`FitParameter`.
    """

    region_ppm: tuple[float, float] | None = None
    noise_ppm: tuple[tuple[float, float], ...] = ()
    noise: float | None = None
    baseline_order: int = 1
    phase: str = "zero-order"
    frequency_offset: bool = True
    max_offset_hz: float | None = None
    linewidth: str = "shared"
    populations: str = "fixed"
    shifts: str = "fixed"
    couplings: str = "fixed"
    rate_scan_per_s: tuple[float, float] = (1e-2, 1e7)
    rate_limits_per_s: tuple[float, float] = (1e-3, 1e9)
    scan_points: int = 37
    profile: bool = True
    parameters: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)

    def __post_init__(self):
        set_ = lambda name, value: object.__setattr__(self, name, value)  # noqa: E731
        set_("region_ppm", number_pair(self.region_ppm, "region_ppm"))
        set_("noise_ppm", ppm_regions(self.noise_ppm, "noise_ppm"))
        if self.noise is not None and not (isinstance(self.noise, (int, float)) and self.noise > 0
                                           and math.isfinite(self.noise)):
            raise InputError(f"noise must be a positive number, got {self.noise!r}", where="noise")
        if isinstance(self.baseline_order, bool) or self.baseline_order not in (0, 1, 2, 3):
            raise InputError(f"baseline_order must be 0, 1, 2 or 3, got {self.baseline_order!r}",
                             where="baseline_order")
        _choice(self.phase, PHASE_MODES, "phase")
        _choice(self.linewidth, LINEWIDTH_MODES, "linewidth")
        _choice(self.populations, POPULATION_MODES, "populations")
        _choice(self.shifts, SHIFT_MODES, "shifts")
        _choice(self.couplings, COUPLING_MODES, "couplings")
        if not isinstance(self.frequency_offset, bool):
            raise InputError(f"frequency_offset must be true or false, got {self.frequency_offset!r}",
                             where="frequency_offset")
        if self.max_offset_hz is not None and not (self.max_offset_hz > 0 and math.isfinite(self.max_offset_hz)):
            raise InputError(f"max_offset_hz must be a positive number of Hz, got {self.max_offset_hz!r}",
                             where="max_offset_hz")
        for name in ("rate_scan_per_s", "rate_limits_per_s"):
            lo, hi = number_pair(getattr(self, name), name)
            if lo <= 0:
                raise InputError(f"rates must be positive (s^-1), got {lo:g}", where=name)
            set_(name, (lo, hi))
        if isinstance(self.scan_points, bool) or not (isinstance(self.scan_points, int) and 5 <= self.scan_points <= 400):
            raise InputError(f"scan_points must be a whole number from 5 to 400, got {self.scan_points!r}",
                             where="scan_points")
        set_("parameters", checked_settings(self.parameters))

    def check_rate_ceiling(self, temperature_k: float, at: str = "") -> None:
        """Refuse a rate these options give (the upper end of ``rate_limits_per_s`` or ``rate_scan_per_s``, a
        start, lower or upper of a ``log10_rate_`` parameter) above kB T/h at `temperature_k` (K), which no
        molecule reaches; `at` says whose temperature it is in the message.  See
        :func:`dnmr.fitting.ranges.check_rate_ceiling`."""
        for name in ("rate_limits_per_s", "rate_scan_per_s"):
            hi = getattr(self, name)[1]
            check_rate_ceiling(math.log10(hi), temperature_k, name, f"{hi:g} s^-1", at)
        for name, setting in self.parameters.items():
            if name.startswith(RATE_PREFIX):
                for key in ("start", "lower", "upper"):
                    if key in setting:
                        check_rate_ceiling(setting[key], temperature_k, f"parameters.{name}.{key}",
                                           f"log10 k = {setting[key]:g}", at)

    def replace(self, **changes) -> "FitOptions":
        """A copy with some options changed."""
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        """The options as plain data (JSON-ready)."""
        out = dataclasses.asdict(self)
        out["parameters"] = {k: dict(v) for k, v in self.parameters.items()}
        return out

    @classmethod
    def from_dict(cls, data: Mapping) -> "FitOptions":
        """Options from :meth:`to_dict` (or a ``[fit]`` table); unknown keys are an InputError."""
        known = {f.name for f in dataclasses.fields(cls)}
        for key in data:
            if key not in known:
                raise InputError(f'unknown fit option "{key}"{did_you_mean(key, known)}', where=key)
        return cls(**dict(data))


# --------------------------------------------------------------------------------------------------
# the result


@dataclass
class SpectrumFit(NotebookView):
    """The fit of one spectrum.

    Attributes
    ----------
    rates : list of RateEstimate
        One per exchange process, in model order.
    parameters : dict of str to FitParameter
        Every parameter by name with its estimate, standard error (scaled as described in the module
        notes), range, tie and correlations (a property, from `lmfit_parameters`).
    lmfit_parameters : lmfit.Parameters
        The same as the fitting wing works with them (lmfit stays inside :mod:`dnmr.fitting`).
    chi_square, reduced_chi_square : float
        sum ((data - fit)/noise)^2 and that over the degrees of freedom.
    degrees_of_freedom : int
        Points minus free parameters.
    noise : NoiseEstimate
        The noise the residuals are weighed with.
    error_scale : float
        s: the factor on the covariance (correlation factor, times the reduced chi-square on a misfit).
    flags : list of str
        Short machine-readable remarks ("misfit", "at-bound:offset_hz", ...).
    notes : list of str
        The same and more in words.
    ppm, data, fitted, baseline : ndarray
        The fitted region (ppm ascending), the data, the fitted spectrum and its baseline part.
    best_model : Model
        The model with the fitted rates, linewidths, populations and shifts.
    source : str
        Spectrum file.
    temperature_k : float or None
        Sample temperature (K) when known.
    frequency_mhz : float
        Spectrometer frequency (MHz).
    function_evaluations : int
        Lineshape evaluations used (scan, refinement and profiles; one that only moves the amplitude,
        phase, baseline or offset re-uses the last ones).
    jacobian_evaluations : int
        Exact Jacobians used (each one lineshape with its derivatives; 0 where finite differences were used).
    options : FitOptions
        The options used.
    """

    rates: list[RateEstimate]
    lmfit_parameters: lmfit.Parameters
    chi_square: float
    reduced_chi_square: float
    degrees_of_freedom: int
    noise: NoiseEstimate
    error_scale: float
    flags: list[str]
    notes: list[str]
    ppm: np.ndarray
    data: np.ndarray
    fitted: np.ndarray
    baseline: np.ndarray
    best_model: Model
    source: str = ""
    temperature_k: float | None = None
    frequency_mhz: float = math.nan
    function_evaluations: int = 0
    options: FitOptions = field(default_factory=FitOptions)
    jacobian_evaluations: int = 0

    @property
    def parameters(self) -> dict[str, FitParameter]:
        """Every fit parameter by name, in dnmr's words (estimate, stderr, range, tie; see :class:`FitParameter`)."""
        return fitted_parameters(self.lmfit_parameters, self.options.parameters)

    @property
    def residuals(self) -> np.ndarray:
        """data - fit (intensity units)."""
        return self.data - self.fitted

    def rate(self, process: str | int = 0) -> RateEstimate:
        """The estimate for one process, by name or index."""
        return rate_of_process(self.rates, process)

    def correlation(self, first: str, second: str) -> float:
        """Correlation of the estimates of two free parameters (NaN when the covariance gave none)."""
        value = (self.lmfit_parameters[first].correl or {}).get(second)
        return math.nan if value is None else float(value)

    def report(self) -> str:
        """A readable account of the fit."""
        where = f" at {self.temperature_k:g} K" if self.temperature_k else ""
        lines = [f"Fit of {Path(self.source).name or 'spectrum'}{where}: {self.ppm.size} points, "
                 f"{self.ppm[0]:.3f} to {self.ppm[-1]:.3f} ppm, {self.frequency_mhz:.6g} MHz", ""]
        width = max(len(r.process) for r in self.rates) if self.rates else 0
        for r in self.rates:
            lines.append(f"  {r.process:<{width}}  {r.describe()}")
            if r.reason and r.status not in ("determined", "fixed"):
                lines.append(f"  {'':<{width}}  {r.reason}")
        lines += ["", f"chi-square {self.chi_square:.1f} on {self.degrees_of_freedom} degrees of freedom "
                      f"(reduced {self.reduced_chi_square:.3f})",
                  f"noise {self.noise.sigma:.4g} per point from the {self.noise.method} "
                  f"({self.noise.points} points, correlation factor {self.noise.correlation_factor:.2f}); "
                  f"error scale {self.error_scale:.3g}", "", "parameters:"]
        for par in self.lmfit_parameters.values():
            state = "fixed" if not par.vary and not par.expr else (f"= {tie_text(par)}" if par.expr else "")
            err = "" if par.stderr is None or not np.isfinite(par.stderr) or state else f"± {par.stderr:.4g}"
            bounds = "" if state else f"[{par.min:.4g}, {par.max:.4g}]"
            lines.append(f"  {par.name:<26} {par.value:>13.6g} {err:<13} {bounds:<22} {state}")
        if self.notes:
            lines += ["", "notes:"] + [f"  - {n}" for n in self.notes]
        return "\n".join(lines)

    def plot(self, figure=None):
        """Data, fit and residuals against ppm (high to low); returns the matplotlib Figure."""
        from dnmr.reporting.plotting import plot_spectrum_fit

        return plot_spectrum_fit(self, figure=figure)

    def sample_posterior(self, **settings) -> "Posterior":
        """Posterior samples of the free parameters (importance sampling from this fit; emcee's ensemble where
        that is not reliable); see :func:`dnmr.fitting.posterior.sample_spectrum_posterior` for the method and the
        settings (method, draws, steps, walkers, burn, thin, seed, progress)."""
        from dnmr.fitting.posterior import sample_spectrum_posterior

        return sample_spectrum_posterior(self, **settings)

    def curves(self) -> dict:
        """The arrays of the fit (ppm, data, fit, baseline) as lists."""
        return {"ppm": self.ppm.tolist(), "data": self.data.tolist(), "fit": self.fitted.tolist(),
                "baseline": self.baseline.tolist()}

    def to_dict(self) -> dict:
        """Everything but the arrays, as plain data (see :meth:`curves` for those)."""
        return {
            "source": self.source,
            "temperature_k": self.temperature_k,
            "frequency_mhz": self.frequency_mhz,
            "region_ppm": [float(self.ppm[0]), float(self.ppm[-1])],
            "points": int(self.ppm.size),
            "rates": [r.to_dict() for r in self.rates],
            "parameters": {p.name: parameter_record(p) for p in self.lmfit_parameters.values()},
            "chi_square": self.chi_square,
            "reduced_chi_square": self.reduced_chi_square,
            "degrees_of_freedom": self.degrees_of_freedom,
            "noise": self.noise.to_dict(),
            "error_scale": self.error_scale,
            "flags": list(self.flags),
            "notes": list(self.notes),
            "function_evaluations": self.function_evaluations,
            "jacobian_evaluations": self.jacobian_evaluations,
            "options": self.options.to_dict(),
        }

    @classmethod
    def from_dict(cls, data: Mapping, curves: Mapping, model: Model) -> "SpectrumFit":
        """Rebuild a fit from :meth:`to_dict` and :meth:`curves`; `model` is the model that was fitted."""
        options = FitOptions.from_dict(data["options"])
        layout = ParameterLayout.for_model(model, options)
        params = parameters_from_records(data["parameters"], layout)
        fitted = np.array(curves["fit"], float)
        return cls(
            rates=[RateEstimate.from_dict(r) for r in data["rates"]], lmfit_parameters=params,
            chi_square=data["chi_square"], reduced_chi_square=data["reduced_chi_square"],
            degrees_of_freedom=data["degrees_of_freedom"], noise=NoiseEstimate(**data["noise"]),
            error_scale=data["error_scale"], flags=list(data["flags"]), notes=list(data["notes"]),
            ppm=np.array(curves["ppm"], float), data=np.array(curves["data"], float), fitted=fitted,
            baseline=np.array(curves["baseline"], float), best_model=layout.model_from(params.valuesdict()),
            source=data["source"], temperature_k=data["temperature_k"], frequency_mhz=data["frequency_mhz"],
            function_evaluations=data["function_evaluations"], options=options,
            jacobian_evaluations=data.get("jacobian_evaluations", 0),
        )


# --------------------------------------------------------------------------------------------------
# the fit


def fit_parameters(model: Model, region_ppm: tuple[float, float] | None = None,
                   options: FitOptions | None = None) -> dict[str, FitParameter]:
    """The parameters of a fit and how each is handled, to inspect or edit and pass to :func:`fit_spectrum`.

    Parameters
    ----------
    model : Model
        The spin model.
    region_ppm : (float, float), optional
        Fitted region (ppm); default the options' region or the model's window.
    options : FitOptions, optional
        Fit options (default ones if not given; their ``parameters`` settings are applied).

    Returns
    -------
    dict of str to FitParameter
        By parameter name, in the fit's order; edit the entries (``p["phase0_deg"].fixed = True``).
    """
    options = options or FitOptions()
    lo, hi = chosen_region(region_ppm or options.region_ppm, model)[0]
    params = ParameterLayout.for_model(model, options).parameters(abs(hi - lo) * model.spectrometer.frequency_mhz)
    return as_fit_parameters(params, options.parameters)


def fit_spectrum(
    spectrum: MeasuredSpectrum | str | Path,
    model: Model,
    *,
    temperature_k: float | None = None,
    options: FitOptions | None = None,
    parameters: Mapping[str, FitParameter] | None = None,
    start: Mapping[str, float] | None = None,
    **option_changes,
) -> SpectrumFit:
    """Fit the exchange model to one measured spectrum.

    Parameters
    ----------
    spectrum : MeasuredSpectrum or path
        The spectrum (read with :func:`dnmr.io.readers.read_spectrum` when a path is given).
    model : Model
        The spin model; its rates, linewidths, populations and shifts are the starting values.
    temperature_k : float, optional
        Sample temperature (K): sets the model's temperature (Eyring rates and Boltzmann populations
        of a model given in energies) and is reported.
    options : FitOptions, optional
        How to fit; keyword arguments (``baseline_order=2``, ``linewidth="fixed"``...) change single
        options.
    parameters : mapping of str to FitParameter, optional
        Full control: parameters from :func:`fit_parameters`, edited (fixed, bounded, tied); applied
        after the options' own ``parameters`` settings.
    start : mapping, optional
        Starting values by parameter name (e.g. from a neighbouring temperature); the coarse scan is
        still done and guards against a bad start.

    Returns
    -------
    SpectrumFit
    """
    options = (options or FitOptions()).replace(**option_changes) if option_changes else (options or FitOptions())
    with single_threaded_blas():
        return _fit(spectrum, model, temperature_k, options, parameters, start)


def _fit(spectrum, model: Model, temperature_k: float | None, options: FitOptions,
         parameters: Mapping[str, FitParameter] | None, start: Mapping[str, float] | None) -> SpectrumFit:
    """The work of :func:`fit_spectrum`."""
    if temperature_k is not None:
        model = model.at_temperature(temperature_k)
    temperature = model.temperature_k or STANDARD_TEMPERATURE_K
    options.check_rate_ceiling(temperature, "" if model.temperature_k else " (no temperature given)")
    spectrum = spectrum_for_model(spectrum, model)
    lo, hi, origin = fit_region(spectrum, model, options.region_ppm)
    part = spectrum.region(lo, hi)
    noise = estimate_noise(spectrum, (lo, hi), options.noise_ppm, options.noise)
    layout = ParameterLayout.for_model(model, options)
    problem = FitProblem(layout, part.ppm, part.intensity, noise)
    params, held = _parameters(layout, problem.span, options, parameters)
    notes = shifts_outside(model, lo, hi, origin)
    flags = ["shifts-outside-region"] if notes else []
    if options.shifts == "free" and options.frequency_offset:
        notes.append("the frequency offset is held at its start value because the shifts are free")
    best = _best_fit(problem, params, options, start)
    dof = part.ppm.size - best.nvarys
    profiled = [n for n in layout.rate_names if options.profile and best.params[n].vary and not best.params[n].expr]
    best, profiles, quality = profile_with_restarts(problem, best, profiled, dof, noise, held=list(held))
    scale = quality[0]
    for par in best.params.values():  # errors as described in the module notes
        if par.stderr is not None:
            par.stderr *= math.sqrt(scale)
    more_flags, more_notes, at_bound = _remarks(best, profiles, quality, layout.rate_names)
    flags += more_flags
    notes += more_notes
    shares = held_shares(problem, best.params, layout.rate_names, held) if held else {}
    context = RateContext(shifts_fixed=options.shifts == "fixed",
                          linewidth_free=any(best.params[n].vary and not best.params[n].expr
                                             for n in layout.linewidth_names),
                          at_bound=at_bound)
    rates = [classify_rate(n, proc, best.params, profiles.get(n), context, shares.get(n, {}))
             for n, proc in zip(layout.rate_names, model.process_names())]
    flags += [f"{r.status}:{r.process}" for r in rates
              if r.status in ("upper-bound", "lower-bound", "interval", "undetermined")]
    values = best.params.valuesdict()
    return SpectrumFit(
        rates=rates, lmfit_parameters=best.params, chi_square=float(best.chisqr),
        reduced_chi_square=float(best.chisqr / max(dof, 1)), degrees_of_freedom=int(dof), noise=noise,
        error_scale=float(scale), flags=flags, notes=notes, ppm=part.ppm.copy(), data=part.intensity.copy(),
        fitted=problem.predict(values), baseline=problem.baseline(values), best_model=layout.model_from(values),
        source=str(spectrum.source), temperature_k=temperature_k, frequency_mhz=model.spectrometer.frequency_mhz,
        function_evaluations=problem.nfev, options=options, jacobian_evaluations=problem.njev,
    )


def _parameters(layout: ParameterLayout, span_hz: float, options: FitOptions,
                parameters: Mapping[str, FitParameter] | None) -> tuple[lmfit.Parameters, dict[str, float]]:
    """The fit's lmfit Parameters for a region `span_hz` wide (Hz): the layout's, with the options'
    settings and then the edited `parameters` applied; and the standard errors of the held ones."""
    params = layout.parameters(span_hz)
    settings = dict(options.parameters)
    if parameters is not None:
        edited = checked_settings({name: p.setting() for name, p in parameters.items()})
        apply_settings(params, edited)
        settings.update(edited)
    return params, held_errors(params, settings)


def _best_fit(problem: FitProblem, params: lmfit.Parameters, options: FitOptions,
              start: Mapping[str, float] | None) -> lmfit.minimizer.MinimizerResult:
    """The best refinement from the coarse scan's starts (free shifts searched first) and from `start`."""
    if start:
        params = with_values(params, {k: v for k, v in start.items() if k in params})
    starts, _ = scan_rates(problem, params, options.rate_scan_per_s, options.scan_points,
                           slow_start=options.shifts == "free" or options.couplings == "free")
    if options.shifts == "free":
        starts = [search_shifts(problem, params, s) for s in starts]
    if start:
        starts.append(linear_solve(problem, params, params.valuesdict())[1])
    return refine_best(problem, params, starts)


def _remarks(best: lmfit.minimizer.MinimizerResult, profiles: Mapping[str, Profile],
             quality: tuple[float, list[str], list[str]], rate_names: tuple[str, ...]
             ) -> tuple[list[str], list[str], tuple[str, ...]]:
    """Flags and notes on the profiled fit (an unstable profile, the fit quality, parameters at a bound, a
    singular covariance), and the free nuisance parameters that ended at a bound."""
    flags, notes = [], []
    unstable = [(n, p) for n, p in profiles.items() if p.unstable]
    if unstable:
        flags.append("unstable")
        notes.append("the chi-square profile kept finding better fits ("
                     + ", ".join(f"{n} by {-p.delta_chi_square.min():.3g} at {p.best_log10_rate:.3f}" for n, p in unstable)
                     + "); the result may not be the best one, so its rates are given as intervals or bounds "
                     "from the profile (taken from the best chi-square it found), not as error bars")
    flags += quality[1]
    notes += quality[2]
    bound_flags, bound_notes = _bound_flags(best.params, rate_names)
    flags += bound_flags
    notes += bound_notes
    if best.covar is None and best.nvarys:
        flags.append("singular")
        notes.append("the parameters are not all determined (singular covariance): fix or tie some of them")
    return flags, notes, tuple(f.split(":", 1)[1] for f in bound_flags)


def _bound_flags(params: lmfit.Parameters, rate_names: tuple[str, ...]) -> tuple[list[str], list[str]]:
    """Flags and notes for the free parameters other than rates that ended at a bound of their range."""
    flags, notes = [], []
    for par in params.values():
        if not par.vary or par.expr or par.name in rate_names:
            continue
        span = par.max - par.min
        if np.isfinite(span) and (par.value - par.min < 1e-6 * span or par.max - par.value < 1e-6 * span):
            flags.append(f"at-bound:{par.name}")
            notes.append(f"{par.name} ended at its bound ({par.value:.4g}); widen the bound or fix it")
    return flags, notes
