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
``log10_k_<process>`` (rates are fitted on a log scale), ``amplitude``, ``baseline_0..3``,
``phase0_deg``, ``phase1_deg``, ``offset_hz``, ``linewidth_hz_<state>``, ``population_<state>``,
``shift_ppm_<state>_<spin>``, ``coupling_hz_<state>_<spin>_<spin>`` (one per coupling the model file
gives).  Names are the model's names with anything but letters, digits and _ turned into _.

Method
------
1. *Noise*: the standard deviation of the points in signal-free parts of the spectrum (given as
   ``noise_ppm``, else the spectrum outside the fitted region, else the outer eighths of the region),
   detrended in short segments and estimated robustly (from the median absolute residual, then the
   standard deviation of the points within 3.5 of those, corrected for the clipping).  Points of
   processed spectra are often correlated (zero filling, apodisation); the correlation factor
   c = 1 + 2 sum_k rho_k over the significant lags of the noise autocorrelation counts how many points
   carry one point's worth of information.
2. *Coarse scan*: log k is scanned over ``rate_scan_per_s`` (default 1e-2 to 1e7 s^-1, 37 points).
   At every point the amplitude, zero-order phase and baseline enter linearly and are solved by linear
   least squares, and the frequency offset is found by cross-correlation, so the scan needs no start
   value for any of them.  The best scan point, the second-best local minimum and a start value from
   the caller (a neighbouring temperature) are each refined, and the best refinement is kept.
3. *Refinement*: lmfit ``least_squares`` (trust region, bounds) on residuals divided by the noise.
4. *Uncertainties*: chi-square = sum ((data - fit) / noise)^2.  The covariance is (J^T J)^-1 of those
   residuals multiplied by the error scale s = c x (reduced chi-square if the fit is significantly
   worse than the noise, else 1).  lmfit's ``scale_covar`` is not used: rescaling by the reduced
   chi-square always would shrink the errors of a fit that looks better than the noise and hide a
   model that does not describe the data.
5. *Identifiability*: for every fitted rate, chi-square is profiled over log k (every other free
   parameter re-optimised at each point) out to where it has risen by s (the 68 % interval).  If the
   profile never rises that far towards slow exchange (down to ``rate_limits_per_s[0]``) the data only
   give an upper bound (lines too narrow to show the exchange broadening); if it stays flat towards
   fast exchange the data give a lower bound (the averaged line's excess width is below what the noise
   resolves).  Either way the standard error is left empty.  A two-sided interval far from symmetric
   about the best fit, or from the quadratic error, is reported as an interval instead of an error bar.
   A one-sided bound at this level is an 84 % confidence limit.  An error bar that would reach past a
   limit of the allowed range is never quoted: the range, not the data, cut it.  A profile that finds
   a better fit restarts the fit from there (up to ``PROFILE_RESTARTS`` times); the last profile keeps
   going, counts the rise from the lowest chi-square it found (which can only widen the interval), and
   the fit is flagged "unstable" with its rates given as intervals or bounds.  Without a profile a rate
   within its error of a limit is "undetermined".  A free nuisance parameter that ends at a bound of
   its range (a linewidth at its lower limit) cuts the profile too: the rate is then given as an
   interval, never as an error bar.
6. *Held parameters with an uncertainty*: a parameter held fixed with a ``stderr`` setting (a shift
   from the slow-exchange trend, a linewidth from a reference line) carries that error into every rate.
   The optimum x of the free parameters moves with a held parameter theta as
   dx/dtheta = -(Jx^T Jx)^-1 Jx^T Jtheta (implicit differentiation of the normal equations at the
   optimum; Jacobians by central differences), and var(log10 k) gains sum_theta (dlog10k/dtheta
   stderr_theta)^2 (held parameters taken as independent).  The same amount widens each side of the
   profile interval in quadrature.  Each rate keeps the split (``log10_stderr_spectrum``,
   ``log10_stderr_held`` and the share of every held parameter).
"""
from __future__ import annotations

import dataclasses
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import lmfit
import numpy as np
from scipy import signal, stats

from dnmr.engine.blocks import default_window_ppm, lineshape_terms
from dnmr.fitting.workers import single_threaded_blas
from dnmr.formatting import significant
from dnmr.errors import InputError, did_you_mean
from dnmr.model import Model
from dnmr.modelparts import parse_coupling_key
from dnmr.io.measured import MIN_POINTS, MeasuredSpectrum
from dnmr.io.readers import read_spectrum
from dnmr.notebook import NotebookView

if TYPE_CHECKING:  # pragma: no cover
    from dnmr.fitting.posterior import Posterior

PHASE_MODES = ("none", "zero-order", "first-order")
LINEWIDTH_MODES = ("fixed", "shared", "per-state")
POPULATION_MODES = ("fixed", "free")
SHIFT_MODES = ("fixed", "free")
COUPLING_MODES = ("fixed", "free")
SETTING_KEYS = ("start", "fixed", "lower", "upper", "same_as", "times", "plus", "stderr")
RENAMED_SETTINGS = {
    "value": "start",
    "vary": "fixed (with the opposite sense: vary = false is now fixed = true)",
    "min": "lower",
    "max": "upper",
    "expr": 'same_as = "<parameter name>", optionally with times and plus (no formulas)',
}
"""Setting keys of earlier releases and what replaced them (refused with a "renamed to" line)."""
TIE_KEYS = ("times", "plus")
"""Keys that only make sense beside ``same_as``: the tie is  this = times * other + plus."""

NOISE_SEGMENT_POINTS = 64
"""Points per segment when detrending signal-free regions for the noise estimate."""
MIN_NOISE_POINTS = 32
"""Fewest signal-free points from which the noise is estimated."""
EDGE_FRACTION = 0.125
"""Share of the fitted region at each end used for the noise when nothing better is available."""
MAX_NOISE_LAG = 16
"""Longest lag (points) of the noise autocorrelation counted in the correlation factor."""
MISFIT_SIGMAS = 3.0
"""Reduced chi-square this many standard deviations above 1 counts as a misfit."""
MAX_EVALUATIONS = 60
"""Largest number of lineshape evaluations of one local refinement, per free parameter."""
SECOND_START_RATIO = 2.0
"""A second local minimum of the scan is refined too when its chi-square is within this factor of the best."""
ASYMMETRY_LIMIT = 1.5
"""Half-widths of the profile interval differing by more than this ratio make it an interval."""
PROFILE_RESTARTS = 3
"""Times the fit is restarted from a better minimum the profile found; the profile after the last
restart keeps what it finds and reports the rate as unstable."""
SHIFT_SEARCH_HZ = 12.0
"""With free shifts, each is first searched this far (Hz) either side of its start value."""
SHIFT_SEARCH_MIN_STEP_HZ = 0.2
"""Finest step (Hz) of that search (else a third of the narrowest linewidth)."""
COUPLING_REACH_HZ = 2.0
"""A free coupling may move this far (Hz) from the model's value, or a quarter of it when larger."""
MAD_TO_SIGMA = 1.4826
"""Median absolute deviation to standard deviation, for normal noise."""
CLIP_SIGMAS = 3.5
"""Noise points further than this many (rough) standard deviations out are taken for signal."""


# --------------------------------------------------------------------------------------------------
# options


def _pair(value, where: str) -> tuple[float, float] | None:
    if value is None:
        return None
    try:
        lo, hi = sorted(float(v) for v in value)
    except (TypeError, ValueError):
        raise InputError(f"expected two numbers, got {value!r}", where=where) from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo == hi or len(tuple(value)) != 2:
        raise InputError(f"expected two different finite numbers, got {value!r}", where=where)
    return lo, hi


def _regions(value, where: str) -> tuple[tuple[float, float], ...]:
    """One [lo, hi] pair or a list of them."""
    if value is None or (isinstance(value, (list, tuple)) and len(value) == 0):
        return ()
    items = list(value)
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in items):
        return (_pair(items, where),)
    return tuple(_pair(v, f"{where}[{i}]") for i, v in enumerate(items))


def _choice(value: str, allowed: tuple[str, ...], where: str) -> str:
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
        Points of the coarse scan.
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
        set_("region_ppm", _pair(self.region_ppm, "region_ppm"))
        set_("noise_ppm", _regions(self.noise_ppm, "noise_ppm"))
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
            lo, hi = _pair(getattr(self, name), name)
            if lo <= 0:
                raise InputError(f"rates must be positive (s^-1), got {lo:g}", where=name)
            set_(name, (lo, hi))
        if isinstance(self.scan_points, bool) or not (isinstance(self.scan_points, int) and 5 <= self.scan_points <= 400):
            raise InputError(f"scan_points must be a whole number from 5 to 400, got {self.scan_points!r}",
                             where="scan_points")
        set_("parameters", _checked_settings(self.parameters))

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


def _checked_settings(settings: Mapping) -> dict[str, dict[str, Any]]:
    """The settings by parameter name, each checked on its own (names are checked by :func:`apply_settings`)."""
    if not isinstance(settings, Mapping):
        raise InputError("expected a table of parameter settings", where="parameters")
    return {str(name): _checked_setting(setting, f"parameters.{name}") for name, setting in settings.items()}


def _checked_setting(setting: Any, where: str) -> dict[str, Any]:
    """One parameter's setting: known keys, values of the right kind, a tie only in its closed form."""
    if not isinstance(setting, Mapping):
        raise InputError("expected a table such as { start = 1.0, fixed = true }", where=where)
    for key, value in setting.items():
        if key in RENAMED_SETTINGS:
            raise InputError(f'"{key}" was renamed to {RENAMED_SETTINGS[key]}', where=f"{where}.{key}")
        if key not in SETTING_KEYS:
            raise InputError(f'unknown setting "{key}"{did_you_mean(str(key), SETTING_KEYS)}; '
                             f'allowed: {", ".join(SETTING_KEYS)}', where=f"{where}.{key}")
        if key == "same_as":
            if not (isinstance(value, str) and re.fullmatch(r"[A-Za-z_]\w*", value)):
                raise InputError(f"same_as takes the name of one parameter (letters, digits and _), not a formula; "
                                 f"got {str(value)[:40]!r}; use times and plus for a factor and an offset",
                                 where=f"{where}.{key}")
        elif key == "fixed":
            if not isinstance(value, bool):
                raise InputError(f"fixed must be true or false, got {str(value)[:40]!r}", where=f"{where}.{key}")
        elif not (isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)):
            raise InputError(f"{key} must be a finite number, got {str(value)[:40]!r}", where=f"{where}.{key}")
        elif key == "stderr" and value < 0:
            raise InputError(f"stderr must not be negative, got {value!r}", where=f"{where}.{key}")
    if any(k in setting for k in TIE_KEYS) and "same_as" not in setting:
        raise InputError("times and plus belong to a tie: give same_as too", where=where)
    if "same_as" in setting and ("fixed" in setting or "start" in setting):
        raise InputError("a tied parameter (same_as) follows the other one: leave out fixed and start", where=where)
    if "lower" in setting and "upper" in setting and not setting["lower"] < setting["upper"]:
        raise InputError(f"lower ({setting['lower']!r}) must be below upper ({setting['upper']!r})", where=where)
    if "times" in setting and setting["times"] == 0:
        raise InputError("times = 0 ties to nothing: hold the parameter with start and fixed = true instead",
                         where=f"{where}.times")
    return {key: (value if key in ("same_as", "fixed") else float(value)) for key, value in setting.items()}

# --------------------------------------------------------------------------------------------------
# noise


@dataclass(frozen=True)
class NoiseEstimate:
    """Noise of a spectrum.

    Attributes
    ----------
    sigma : float
        Standard deviation of one point (intensity units).
    correlation_factor : float
        1 + 2 sum of the significant autocorrelations of the noise (1 for independent points).
    points : int
        Signal-free points used (0 when the noise was given).
    method : str
        Where the estimate comes from.
    """

    sigma: float
    correlation_factor: float
    points: int
    method: str

    def to_dict(self) -> dict:
        """Plain data (JSON-ready)."""
        return dataclasses.asdict(self)


def _runs(mask: np.ndarray) -> list[np.ndarray]:
    """Index arrays of the contiguous runs of True in `mask`."""
    idx = np.flatnonzero(mask)
    if idx.size == 0:
        return []
    return np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1)


def _detrended_segments(y: np.ndarray, runs: list[np.ndarray]) -> list[np.ndarray]:
    """Residuals of a straight line through each segment (about 64 points) of each run."""
    out = []
    for run in runs:
        n_seg = max(1, run.size // NOISE_SEGMENT_POINTS)
        for seg in np.array_split(run, n_seg):
            if seg.size < 8:
                continue
            t = np.arange(seg.size, dtype=float)
            coef = np.polyfit(t, y[seg], 1)
            out.append((y[seg] - np.polyval(coef, t)) * math.sqrt(seg.size / (seg.size - 2)))
    return out


def _correlation_factor(segments: list[np.ndarray], sigma: float) -> float:
    """1 + 2 sum_k rho_k over the leading lags whose autocorrelation is significant (> 2/sqrt(n))."""
    quiet = [s for s in segments if np.max(np.abs(s)) < 5.0 * sigma]  # segments holding a line are skipped
    n = sum(s.size for s in quiet)
    if n < MIN_NOISE_POINTS:
        return 1.0
    power = sum(float(s @ s) for s in quiet)
    total = 0.0
    for lag in range(1, MAX_NOISE_LAG + 1):
        rho = sum(float(s[lag:] @ s[:-lag]) for s in quiet if s.size > lag) / power
        if rho < 2.0 / math.sqrt(n):
            break
        total += rho
    return max(1.0, 1.0 + 2.0 * total)


def _clipped_sigma(residuals: np.ndarray) -> float:
    """Standard deviation of normal noise among outliers: the median absolute residual gives a first
    value, the points within CLIP_SIGMAS of it give the final one (corrected for the clipping)."""
    rough = MAD_TO_SIGMA * float(np.median(np.abs(residuals)))
    kept = residuals[np.abs(residuals) < CLIP_SIGMAS * rough]
    c = CLIP_SIGMAS
    retained = 1.0 - 2.0 * c * stats.norm.pdf(c) / (2.0 * stats.norm.cdf(c) - 1.0)  # variance of the clipped normal
    return math.sqrt(float(kept @ kept) / max(kept.size, 1) / retained) if kept.size else rough


def estimate_noise(
    spectrum: MeasuredSpectrum,
    region_ppm: tuple[float, float],
    noise_ppm=(),
    noise: float | None = None,
) -> NoiseEstimate:
    """Noise standard deviation of a spectrum from its signal-free points.

    Parameters
    ----------
    spectrum : MeasuredSpectrum
        The whole spectrum as read.
    region_ppm : (float, float)
        The fitted region (ppm).
    noise_ppm : sequence of (float, float)
        Signal-free regions (ppm); default the spectrum within two region widths outside the region,
        else the outer eighths of the region.
    noise : float, optional
        A known noise level (intensity units), returned as it is.

    Returns
    -------
    NoiseEstimate
    """
    if noise is not None:
        return NoiseEstimate(float(noise), 1.0, 0, "given")
    ppm, y = spectrum.ppm, spectrum.intensity
    lo, hi = sorted(region_ppm)
    regions = _regions(noise_ppm, "noise_ppm")
    if regions:
        mask = np.zeros(ppm.size, bool)
        for a, b in regions:
            mask |= (ppm >= a) & (ppm <= b)
        method = "noise region " + ", ".join(f"{a:g} to {b:g} ppm" for a, b in regions)
    else:
        width = hi - lo
        mask = ((ppm < lo) & (ppm >= lo - 2 * width)) | ((ppm > hi) & (ppm <= hi + 2 * width))
        method = "spectrum outside the fitted region"
        if mask.sum() < 2 * MIN_NOISE_POINTS:
            inside = np.flatnonzero((ppm >= lo) & (ppm <= hi))
            edge = max(8, int(EDGE_FRACTION * inside.size))
            mask = np.zeros(ppm.size, bool)
            mask[inside[:edge]] = mask[inside[-edge:]] = True
            method = "edges of the fitted region (give noise_ppm for a signal-free region)"
    segments = _detrended_segments(y, _runs(mask))
    n = sum(s.size for s in segments)
    if n < MIN_NOISE_POINTS:
        raise InputError(f"only {n} signal-free points to estimate the noise from ({method}); give noise_ppm "
                         "covering a flat part of the spectrum, or noise", source=spectrum.source, where="noise_ppm")
    sigma = _clipped_sigma(np.concatenate(segments))
    if not sigma > 0:
        raise InputError(f"the signal-free points ({method}) have no noise at all; give noise",
                         source=spectrum.source, where="noise_ppm")
    return NoiseEstimate(sigma, _correlation_factor(segments, sigma), n, method)


# --------------------------------------------------------------------------------------------------
# parameters


def _identifier(text: str) -> str:
    name = re.sub(r"\W", "_", str(text))
    return name if name and not name[0].isdigit() else f"_{name}"


@dataclass(frozen=True)
class ParameterLayout:
    """Which lmfit parameter stands for which quantity of a model.

    Build with :meth:`for_model`; :meth:`parameters` gives the default lmfit Parameters and
    :meth:`model_from` turns parameter values back into a :class:`~dnmr.model.Model`.
    """

    model: Model
    options: FitOptions
    rate_names: tuple[str, ...]
    linewidth_names: tuple[str, ...]
    population_names: tuple[str, ...]
    shift_names: tuple[tuple[str, ...], ...]
    baseline_names: tuple[str, ...]
    coupling_names: tuple[dict[str, str], ...] = ()
    """Per state, parameter name -> the model's coupling key ("A-B") of every coupling it gives."""

    @classmethod
    def for_model(cls, model: Model, options: FitOptions) -> "ParameterLayout":
        """The layout of `model` under `options`."""
        used: set[str] = set()

        def unique(name: str) -> str:
            base, n = name, 1
            while name in used:
                n += 1
                name = f"{base}_{n}"
            used.add(name)
            return name

        names = lambda prefix, items: tuple(unique(f"{prefix}{_identifier(x)}") for x in items)  # noqa: E731
        return cls(
            model, options,
            rate_names=names("log10_k_", model.process_names()),
            linewidth_names=names("linewidth_hz_", model.state_names),
            population_names=names("population_", model.state_names) if len(model.states) > 1 else (),
            shift_names=tuple(names(f"shift_ppm_{_identifier(s.name)}_", model.spins) for s in model.states),
            baseline_names=tuple(unique(f"baseline_{j}") for j in range(options.baseline_order + 1)),
            coupling_names=tuple(
                {unique(f"coupling_hz_{_identifier(s.name)}_" + "_".join(_identifier(x) for x in parse_coupling_key(key))): key
                 for key in s.couplings_hz} for s in model.states),
        )

    def parameters(self, span_hz: float) -> lmfit.Parameters:
        """Default lmfit Parameters (start values from the model) for a region `span_hz` wide (Hz)."""
        opt, model = self.options, self.model
        params = lmfit.Parameters()
        lo, hi = np.log10(opt.rate_limits_per_s)
        for name, k in zip(self.rate_names, model.rates()):
            params.add(name, value=float(np.clip(np.log10(max(k, 1e-300)), lo, hi)), min=lo, max=hi)
        params.add("amplitude", value=1.0, min=0.0)
        for name in self.baseline_names:
            params.add(name, value=0.0)
        params.add("phase0_deg", value=0.0, min=-180.0, max=180.0, vary=opt.phase != "none")
        params.add("phase1_deg", value=0.0, min=-360.0, max=360.0, vary=opt.phase == "first-order")
        max_offset = opt.max_offset_hz or 0.1 * span_hz
        params.add("offset_hz", value=0.0, min=-max_offset, max=max_offset,
                   vary=opt.frequency_offset and opt.shifts == "fixed")
        for i, (name, width) in enumerate(zip(self.linewidth_names, model.linewidths_hz())):
            tied = opt.linewidth == "shared" and i > 0
            params.add(name, value=float(width), min=1e-3, max=max(span_hz / 4, 2 * width),
                       vary=opt.linewidth != "fixed" and not tied,
                       expr=self.linewidth_names[0] if tied else None)
        populations = model.populations()
        free = opt.populations == "free"
        for name, p in zip(self.population_names, populations):
            params.add(name, value=float(p), min=1e-4, max=1 - 1e-4, vary=free)
        if free:  # fractions: the first state's is what the others leave
            params[self.population_names[0]].set(expr="1 - " + " - ".join(self.population_names[1:]))
        sf = model.spectrometer.frequency_mhz
        for state, names in zip(model.states, self.shift_names):
            for spin, name in zip(model.spins, names):
                value = state.shifts_ppm[spin]
                params.add(name, value=value, min=value - span_hz / sf, max=value + span_hz / sf,
                           vary=opt.shifts == "free")
        for state, names in zip(model.states, self.coupling_names):
            for name, key in names.items():
                value = float(state.couplings_hz[key])
                reach = max(COUPLING_REACH_HZ, 0.25 * abs(value))
                params.add(name, value=value, min=value - reach, max=value + reach, vary=opt.couplings == "free")
        apply_settings(params, opt.parameters)
        return params

    def model_from(self, values: Mapping[str, float]) -> Model:
        """The model with the parameter `values` (rates, linewidths, populations, shifts, couplings) put in."""
        states = []
        for i, state in enumerate(self.model.states):
            changes: dict[str, Any] = {
                "linewidth_hz": float(values[self.linewidth_names[i]]),
                "shifts_ppm": {spin: float(values[n]) for spin, n in zip(self.model.spins, self.shift_names[i])},
            }
            if self.coupling_names and self.coupling_names[i]:
                changes["couplings_hz"] = {**state.couplings_hz,
                                           **{key: float(values[n]) for n, key in self.coupling_names[i].items()}}
            if self.population_names:  # the model's populations unless fitted or held at other values
                changes.update(population=float(values[self.population_names[i]]), free_energy_kj_mol=None)
            states.append(dataclasses.replace(state, **changes))
        rates = [10.0 ** float(values[n]) for n in self.rate_names]
        return self.model.replace(states=tuple(states), exchanges=self.model.exchanges_at_rates(rates))


def apply_settings(params: lmfit.Parameters, settings: Mapping[str, Mapping[str, Any]]) -> None:
    """Apply per-parameter settings (:data:`SETTING_KEYS`, checked by :func:`_checked_settings`) to
    lmfit `params` in place.

    A held parameter (``fixed = true``) keeps any start value given: its bounds are widened to hold it.
    A tie (``same_as``, ``times``, ``plus``) is checked against the parameter names and for cycles, then
    written as a product and a sum of that one name and two numbers: nothing from the input is
    evaluated.  The setting ``stderr`` (the uncertainty of a held value) is read by the fit, not here.
    """
    for name in settings:
        if name not in params:
            raise InputError(f'no fit parameter "{name}"{did_you_mean(name, params)}; parameters are '
                             f'{", ".join(params)}', where=f"parameters.{name}")
    _check_ties(params, settings)
    for name, setting in settings.items():
        par, where = params[name], f"parameters.{name}"
        par.set(min=setting.get("lower"), max=setting.get("upper"))
        if "fixed" in setting:
            par.set(expr="")
            par.set(vary=not setting["fixed"])
        if "start" in setting:
            if par.expr:
                raise InputError(f"{name} follows {_tie_text(par)} in this fit: hold it with fixed = true beside "
                                 "start, or free it with fixed = false", where=where)
            value = setting["start"]
            if not par.vary:  # a held value stays what was given: widen the range to hold it
                par.set(min=min(par.min, value), max=max(par.max, value))
            par.set(value=value)
        if "same_as" in setting:
            par.set(expr=_tie_expression(setting["same_as"], setting.get("times", 1.0), setting.get("plus", 0.0)))
        if not par.min < par.max and not par.min == par.max == par.value:
            raise InputError(f"lower {par.min:g} is not below upper {par.max:g}", where=where)
    params.update_constraints()


def _tie_expression(name: str, times: float, plus: float) -> str:
    """The lmfit constraint of a tie: built from a checked name and two numbers, never from input text."""
    text = name if times == 1.0 else f"{float(times)!r} * {name}"
    return text if plus == 0.0 else f"{text} + {float(plus)!r}"


_TIE = re.compile(r"(?:(?P<times>[-+0-9.e]+) \* )?(?P<name>[A-Za-z_]\w*)(?: \+ (?P<plus>[-+0-9.e]+))?")


def _tie_targets(params: lmfit.Parameters, name: str, settings: Mapping[str, Mapping[str, Any]]) -> set[str]:
    """The parameters `name` follows once `settings` are applied (a user tie, else the layout's own)."""
    setting = settings.get(name, {})
    if "same_as" in setting:
        return {setting["same_as"]}
    if "fixed" in setting or not params[name].expr:
        return set()
    return set(re.findall(r"[A-Za-z_]\w*", params[name].expr)) & set(params)


def _check_ties(params: lmfit.Parameters, settings: Mapping[str, Mapping[str, Any]]) -> None:
    """Refuse a tie to an unknown parameter, to itself, or round a circle (one line naming the tie)."""
    for name, setting in settings.items():
        other = setting.get("same_as")
        if other is None:
            continue
        where = f"parameters.{name}.same_as"
        if other == name:
            raise InputError(f"{name} cannot be tied to itself; hold it with fixed = true instead", where=where)
        if other not in params:
            raise InputError(f'no fit parameter "{other}"{did_you_mean(other, params)} to tie to', where=where)
        circle = _tie_path(params, other, name, settings)
        if circle:
            raise InputError("the ties go round in a circle (" + " -> ".join([name] + circle)
                             + "): tie the parameters of the circle to one that is free or fixed", where=where)


def _tie_path(params: lmfit.Parameters, start: str, goal: str, settings: Mapping[str, Mapping[str, Any]]
              ) -> list[str]:
    """The chain of ties from `start` that reaches `goal` (empty when none does)."""
    stack, seen = [[start]], set()
    while stack:
        path = stack.pop()
        if path[-1] == goal:
            return path
        if path[-1] not in seen:
            seen.add(path[-1])
            stack += [path + [t] for t in sorted(_tie_targets(params, path[-1], settings))]
    return []


@dataclass
class FitParameter:
    """How one fit parameter is handled: where it starts, whether it is fixed, its range, or a tie.

    Attributes
    ----------
    start : float
        Starting value (or the held value when fixed), in `unit`.
    fixed : bool
        Held at `start` instead of fitted.
    lower, upper : float
        Range the fit keeps the parameter in (`unit`; infinite where unbounded).
    same_as : str or None
        Name of the parameter this one equals: this = times * same_as + plus.
    times, plus : float
        Factor and offset (`unit`) of the tie.
    stderr : float or None
        Standard error of a held value (`unit`), carried into the rates.
    rule : str
        A relation dnmr keeps itself (e.g. the first population is 1 minus the others); read only.
    unit : str
        Unit of the parameter (ppm, Hz, deg, log10(s^-1); empty for amplitudes and fractions).
    """

    start: float
    fixed: bool = False
    lower: float = -math.inf
    upper: float = math.inf
    same_as: str | None = None
    times: float = 1.0
    plus: float = 0.0
    stderr: float | None = None
    rule: str = ""
    unit: str = ""

    def setting(self) -> dict[str, Any]:
        """The setting (as in a series file's ``[fit.parameters]``) that gives this handling."""
        out: dict[str, Any] = {k: float(v) for k, v in (("lower", self.lower), ("upper", self.upper))
                               if math.isfinite(v)}
        if self.same_as:
            out.update(same_as=self.same_as, times=float(self.times), plus=float(self.plus))
        elif self.fixed or not self.rule:
            out.update(start=float(self.start), fixed=bool(self.fixed))
        if self.stderr is not None:
            out["stderr"] = float(self.stderr)
        return out


UNITS = (("log10_k_", "log10(s^-1)"), ("r1_per_s", "s^-1"), ("linewidth_hz_", "Hz"), ("coupling_hz_", "Hz"), ("offset_hz", "Hz"),
         ("shift_ppm_", "ppm"), ("phase", "deg"))


def parameter_unit(name: str) -> str:
    """The unit of fit parameter `name` from its prefix (empty for amplitudes, baselines and fractions)."""
    return next((unit for prefix, unit in UNITS if name.startswith(prefix)), "")


def _tie_text(par: lmfit.Parameter) -> str:
    """A parameter's constraint in words."""
    tie = _tie_of(par)
    if "rule" in tie:
        return par.expr
    return " ".join(filter(None, (f"{tie['times']:g} x" if tie["times"] != 1 else "", tie["same_as"],
                                                     f"+ {tie['plus']:g}" if tie["plus"] else "")))


def _tie_of(par: lmfit.Parameter) -> dict[str, Any]:
    """A constraint of `par` as a tie (same_as, times, plus), or as a read-only rule when it is no tie."""
    if not par.expr:
        return {}
    tie = _TIE.fullmatch(par.expr)
    if tie is None:
        return {"rule": f"{par.name} = {par.expr}"}
    return {"same_as": tie["name"], "times": float(tie["times"] or 1.0), "plus": float(tie["plus"] or 0.0)}


def parameter_record(par: lmfit.Parameter) -> dict[str, Any]:
    """One fitted parameter as plain data (JSON-ready): estimate, stderr, range, fixed, tie and unit."""
    return {"estimate": float(par.value), "stderr": _stderr(par), "lower": float(par.min), "upper": float(par.max),
            "fixed": not par.vary and not par.expr, **_tie_of(par), "unit": parameter_unit(par.name),
            "correlations": {k: float(v) for k, v in (par.correl or {}).items()}}


def _public(params: lmfit.Parameters, settings: Mapping[str, Mapping[str, Any]]) -> dict[str, FitParameter]:
    """dnmr's view of lmfit `params` (with the held errors of `settings`)."""
    return {name: FitParameter(start=float(par.value), fixed=not par.vary and not par.expr, lower=float(par.min),
                               upper=float(par.max), stderr=settings.get(name, {}).get("stderr"),
                               unit=parameter_unit(name), **_tie_of(par))
            for name, par in params.items()}


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
    return _public(_default_parameters(model, region_ppm, options), options.parameters)


def _default_parameters(model: Model, region_ppm: tuple[float, float] | None, options: FitOptions) -> lmfit.Parameters:
    """The lmfit Parameters of a fit of `model` over `region_ppm` (ppm) under `options`."""
    lo, hi = region_ppm or options.region_ppm or model.window_ppm or default_window_ppm(model)
    return ParameterLayout.for_model(model, options).parameters(abs(hi - lo) * model.spectrometer.frequency_mhz)

# --------------------------------------------------------------------------------------------------
# the fitted function


class _Problem:
    """Data, noise and the model function of one fit."""

    def __init__(self, layout: ParameterLayout, ppm: np.ndarray, data: np.ndarray, noise: NoiseEstimate):
        self.layout = layout
        self.hz = ppm * layout.model.spectrometer.frequency_mhz
        self.data = data
        self.noise = noise
        self.centre = 0.5 * (self.hz[0] + self.hz[-1])
        self.span = float(self.hz[-1] - self.hz[0])
        x = (self.hz - self.centre) / (0.5 * self.span)
        self.powers = x[:, None] ** np.arange(len(layout.baseline_names))
        self.nfev = 0
        step = np.diff(self.hz)
        # points written with a few decimals are uniform to within their rounding
        self.uniform_step = float(step.mean()) if np.allclose(step, step.mean(), rtol=0.02) else None

    def shape(self, values: Mapping[str, float], offset_hz: float | None = None) -> np.ndarray:
        """Complex spectrum S = A - i D of the model at the data's frequencies."""
        self.nfev += 1
        offset = values["offset_hz"] if offset_hz is None else offset_hz
        return lineshape_terms(self.layout.model_from(values)).evaluate(self.hz - offset)

    def phase(self, values: Mapping[str, float], zero_order: bool = True) -> np.ndarray:
        """phi(nu) in radians."""
        first = values["phase1_deg"] * (self.hz - self.centre) / self.span
        return np.radians(first + (values["phase0_deg"] if zero_order else 0.0))

    def baseline(self, values: Mapping[str, float]) -> np.ndarray:
        return self.powers @ np.array([values[n] for n in self.layout.baseline_names])

    def predict(self, values: Mapping[str, float]) -> np.ndarray:
        phased = (np.exp(1j * self.phase(values)) * self.shape(values)).real
        return values["amplitude"] * phased + self.baseline(values)

    def residual(self, params: lmfit.Parameters) -> np.ndarray:
        try:
            return (self.predict(params.valuesdict()) - self.data) / self.noise.sigma
        except InputError:  # parameters outside what a model allows (e.g. a negative population)
            return np.full(self.data.size, 1e3)

    # --- linear part, for the scan and starting values -----------------------------------
    def linear_solve(self, params: lmfit.Parameters, values: dict) -> tuple[float, dict]:
        """Chi-square with amplitude, zero-order phase and baseline solved by linear least squares.

        Only parameters that vary freely (no expression) are solved for; `values` holds the others.
        Returns chi-square and `values` updated with the solution.
        """
        free = lambda name: params[name].vary and not params[name].expr  # noqa: E731
        base = np.exp(1j * self.phase(values, zero_order=False)) * self.shape(values)
        turned = (np.exp(1j * math.radians(values["phase0_deg"])) * base).real
        columns, target = [], self.data.copy()
        if free("amplitude") and free("phase0_deg"):
            columns += [base.real, -base.imag]  # amplitude x (cos phi0, sin phi0)
        elif free("amplitude"):
            columns.append(turned)
        else:
            target -= values["amplitude"] * turned
        free_baseline = [j for j, n in enumerate(self.layout.baseline_names) if free(n)]
        for j, n in enumerate(self.layout.baseline_names):
            if j not in free_baseline:
                target -= values[n] * self.powers[:, j]
        columns += [self.powers[:, j] for j in free_baseline]
        values = dict(values)
        if columns:
            design = np.column_stack(columns)
            coef, *_ = np.linalg.lstsq(design, target, rcond=None)
            target = target - design @ coef
            if free("amplitude"):
                if free("phase0_deg"):
                    values["amplitude"] = float(max(math.hypot(coef[0], coef[1]), 1e-300))
                    values["phase0_deg"] = float(np.degrees(math.atan2(coef[1], coef[0])))
                else:
                    values["amplitude"] = float(max(coef[0], 1e-300))
            for j, c in zip(free_baseline, coef[len(coef) - len(free_baseline):]):
                values[self.layout.baseline_names[j]] = float(c)
        return float(target @ target) / self.noise.sigma ** 2, values

    def coarse_offset(self, params: lmfit.Parameters, values: dict) -> dict:
        """Values with the offset moved to the best cross-correlation of model and data (uniform grids)."""
        par = params["offset_hz"]
        if not par.vary or par.expr or self.uniform_step is None:
            return values
        shape = self.shape(values, offset_hz=0.0).real
        corr = signal.correlate(self.data - self.data.mean(), shape - shape.mean(), mode="full", method="fft")
        lags = signal.correlation_lags(self.data.size, shape.size, mode="full") * self.uniform_step
        allowed = (lags >= par.min) & (lags <= par.max)
        return {**values, "offset_hz": float(lags[allowed][np.argmax(corr[allowed])])}


# --------------------------------------------------------------------------------------------------
# scan, refinement, profile


def _scan(problem: _Problem, params: lmfit.Parameters, slow_start: bool = False) -> tuple[list[dict], dict]:
    """Coarse scan over log k of each varying rate in turn; returns starting points and the scan curves.

    With `slow_start` the slowest scan point is a start too: with free shifts or couplings that are a few
    Hz off, a faster rate can broaden misplaced lines into a better scan point than the right, slow one,
    and a refinement from there may end in a false minimum.
    """
    opt = problem.layout.options
    grid = np.linspace(*np.log10(opt.rate_scan_per_s), opt.scan_points)
    values = params.valuesdict()
    curves: dict[str, np.ndarray] = {}
    varying = [n for n in problem.layout.rate_names if params[n].vary and not params[n].expr]
    starts: list[dict] = []
    for name in varying:
        points = []
        for x in grid:
            trial = problem.coarse_offset(params, {**values, name: float(x)})
            points.append(problem.linear_solve(params, trial))
        chi = np.array([c for c, _ in points])
        curves[name] = chi
        order = np.argsort(chi)
        values = points[order[0]][1]
        minima = [i for i in order if (i == 0 or chi[i] <= chi[i - 1]) and (i == len(chi) - 1 or chi[i] <= chi[i + 1])]
        starts = [points[i][1] for i in minima[:2] if chi[i] <= SECOND_START_RATIO * chi[order[0]]]
        if slow_start and 0 not in minima[:2]:
            starts.append(points[0][1])
    if not varying:
        starts = [problem.linear_solve(params, problem.coarse_offset(params, values))[1]]
    return starts, curves


def _shift_search(problem: _Problem, params: lmfit.Parameters, values: dict) -> dict:
    """Values with every free shift moved to the best point of a coarse search within SHIFT_SEARCH_HZ of
    its start (amplitude, phase and baseline solved linearly at each point), spin by spin, twice over.

    A first-guess shift a few Hz off is further than a narrow line is wide: a local refinement from it
    can settle on a false minimum (a line fitted by the wrong partner), which this search avoids.
    """
    sf = problem.layout.model.spectrometer.frequency_mhz
    names = [n for names in problem.layout.shift_names for n in names if params[n].vary and not params[n].expr]
    widths = [values[n] for n in problem.layout.linewidth_names]
    step = max(SHIFT_SEARCH_MIN_STEP_HZ, min(widths) / 3.0) / sf
    grid = np.arange(-SHIFT_SEARCH_HZ / sf, SHIFT_SEARCH_HZ / sf + 0.5 * step, step)
    chi, values = problem.linear_solve(params, values)
    for _ in range(2):
        for name in names:
            par, centre = params[name], values[name]
            for x in centre + grid:
                if par.min <= x <= par.max:
                    trial_chi, trial = problem.linear_solve(params, {**values, name: float(x)})
                    if trial_chi < chi:
                        chi, values = trial_chi, trial
    return values


def _with_values(params: lmfit.Parameters, values: Mapping[str, float]) -> lmfit.Parameters:
    out = params.copy()
    for name, value in values.items():
        par = out[name]
        if par.vary and not par.expr:
            lo, hi = par.min, par.max
            par.value = float(np.clip(value, lo, hi))
    out.update_constraints()
    return out


def _minimize(problem: _Problem, params: lmfit.Parameters, tolerance: float = 1e-8) -> lmfit.minimizer.MinimizerResult:
    """Local least squares (trust region with bounds) from `params`; at most MAX_EVALUATIONS per free parameter."""
    minimizer = lmfit.Minimizer(problem.residual, params, scale_covar=False, nan_policy="raise")
    n_free = sum(p.vary and not p.expr for p in params.values())
    return minimizer.minimize(method="least_squares", x_scale="jac", ftol=tolerance, xtol=tolerance, gtol=tolerance,
                              max_nfev=MAX_EVALUATIONS * (n_free + 1))


def _refine(problem: _Problem, params: lmfit.Parameters, starts: list[dict]) -> lmfit.minimizer.MinimizerResult:
    best = None
    for start in starts:
        result = _minimize(problem, _with_values(params, start))
        if best is None or result.chisqr < best.chisqr:
            best = result
    return best


@dataclass(frozen=True)
class Profile:
    """Chi-square profiled over log10 k of one process (other free parameters re-optimised).

    Attributes
    ----------
    log10_rate : ndarray
        Points of the profile (log10 of s^-1), ascending.
    delta_chi_square : ndarray
        Rise of chi-square above the best fit at each point.
    lower, upper : float
        log10 k where the rise reaches the threshold (NaN when it never does on that side).
    threshold : float
        The rise that defines the interval (the error scale s).
    unstable : bool
        The profile found a fit better than the best one (by more than a twentieth of the threshold);
        then `delta_chi_square` is negative there and the rise to the threshold is counted from the
        lowest chi-square found, which widens the interval (the side is never narrower than it should be).
    """

    log10_rate: np.ndarray
    delta_chi_square: np.ndarray
    lower: float
    upper: float
    threshold: float
    unstable: bool = False

    @property
    def best_log10_rate(self) -> float:
        """log10 k (s^-1) of the lowest chi-square on the profile."""
        return float(self.log10_rate[np.argmin(self.delta_chi_square)])


class _BetterMinimum(Exception):
    """The profile found parameters better than the 'best' fit."""

    def __init__(self, result):
        super().__init__("better minimum")
        self.result = result


def _profile(problem: _Problem, best, name: str, threshold: float, stderr: float, restart: bool = True) -> Profile:
    """Profile chi-square over the parameter `name` (log10 k) on both sides of the best fit.

    A point better than the best fit raises :class:`_BetterMinimum` (refined from there) when `restart`;
    otherwise the profile goes on, counting the rise from the lowest chi-square found so far.
    """
    x0, chi0 = best.params[name].value, best.chisqr
    lo_lim, hi_lim = best.params[name].min, best.params[name].max
    points = {x0: 0.0}
    fits = {x0: best.params}

    def rise(x: float) -> float:
        nearest = min(fits, key=lambda v: abs(v - x))
        trial = fits[nearest].copy()
        trial[name].set(value=x, vary=False)
        result = _minimize(problem, trial, tolerance=1e-5)
        if restart and result.chisqr < chi0 - 0.05 * threshold:
            params = result.params.copy()
            params[name].set(vary=True)
            raise _BetterMinimum(_minimize(problem, params))
        points[x] = result.chisqr - chi0
        fits[x] = result.params
        return points[x] - min(points.values()) - threshold

    def crossing(a: float, b: float) -> float:
        """Where the rise reaches the threshold between a (below) and b (above): interpolation in
        sqrt(delta chi-square), exact for a parabola, with a bisection whenever one end stalls."""
        moved = []
        for _ in range(16):
            floor = min(points.values())
            ra, rb = math.sqrt(max(points[a] - floor, 0.0)), math.sqrt(points[b] - floor)
            x = a + (b - a) * (math.sqrt(threshold) - ra) / (rb - ra)
            if abs(b - a) < 1e-4:
                return x
            if moved[-2:] in (["a", "a"], ["b", "b"]):
                x = 0.5 * (a + b)
            excess = rise(x)
            if abs(excess) < 0.05 * threshold:
                return x
            if excess < 0:
                a = x
                moved.append("a")
            else:
                b = x
                moved.append("b")
        return x

    def side(direction: int) -> float:
        limit = hi_lim if direction > 0 else lo_lim
        step = float(np.clip(1.2 * stderr if np.isfinite(stderr) else 0.1, 1e-3, 0.5))
        x = x0
        while (limit - x) * direction > 1e-9:
            x_new = x + direction * step
            x_new = min(x_new, limit) if direction > 0 else max(x_new, limit)
            if rise(x_new) >= 0:
                return crossing(x, x_new)
            x, step = x_new, step * 2.0
        return math.nan

    lower, upper = side(-1), side(+1)
    xs = np.array(sorted(points))
    rises = np.array([points[x] for x in xs])
    return Profile(xs, rises, lower, upper, threshold, bool(rises.min() < -0.05 * threshold))


# --------------------------------------------------------------------------------------------------
# results


RATE_STATUSES = ("determined", "interval", "upper-bound", "lower-bound", "undetermined", "fixed")


@dataclass(frozen=True)
class RateEstimate:
    """What one spectrum says about the rate of one exchange process.

    Attributes
    ----------
    process : str
        The exchange name (or its index when unnamed).
    rate_per_s : float
        Best-fit forward rate constant (s^-1).
    rate_stderr : float
        Standard error (s^-1, from the covariance of log10 k); NaN unless the status is "determined".
    rate_lower, rate_upper : float
        Bounds (s^-1) when the data only bound the rate (NaN otherwise).
    interval_per_s : (float, float)
        Ends of the profile's 68 % interval (NaN where it is open).
    log10_rate, log10_stderr : float
        The same on the log10 scale the fit works in (the error includes the held parameters' share).
    status : str
        "determined", "interval" (two-sided bound), "upper-bound" (slow-exchange limit),
        "lower-bound" (fast-exchange limit), "undetermined" or "fixed".
    reason : str
        Why a bound and not an error bar, in words.
    profile : Profile or None
        The chi-square profile.
    log10_stderr_spectrum : float
        The part of the error from this spectrum's noise (log10 decades).
    log10_stderr_held : float
        The part from the errors of held parameters (a trend, a reference line); 0 when none.
    held_shares : dict
        Per held parameter, the change of log10 k for one standard error of it.
    """

    process: str
    rate_per_s: float
    rate_stderr: float
    rate_lower: float
    rate_upper: float
    interval_per_s: tuple[float, float]
    log10_rate: float
    log10_stderr: float
    status: str
    reason: str = ""
    profile: Profile | None = None
    log10_stderr_spectrum: float = math.nan
    log10_stderr_held: float = 0.0
    held_shares: Mapping[str, float] = field(default_factory=dict)

    def describe(self) -> str:
        """One line: ``k = 123 ± 5 s^-1`` or ``k < 3.1 s^-1 (upper bound)``."""
        k = self.rate_per_s
        if self.status == "determined":
            return f"k = {significant(k)} ± {significant(self.rate_stderr, 2)} s^-1   (log10 k = {self.log10_rate:.3f} ± {self.log10_stderr:.3f})"
        if self.status == "interval":
            return f"k = {significant(k)} s^-1, 68 % interval {significant(self.rate_lower)} to {significant(self.rate_upper)} s^-1"
        if self.status == "upper-bound":
            return f"k < {significant(self.rate_upper)} s^-1 (upper bound; best fit {significant(k)})"
        if self.status == "lower-bound":
            return f"k > {significant(self.rate_lower)} s^-1 (lower bound; best fit {significant(k)})"
        if self.status == "fixed":
            return f"k = {significant(k)} s^-1 (fixed)"
        return f"k not determined (best fit {significant(k)} s^-1)"

    def to_dict(self) -> dict:
        """Plain data (JSON-ready; NaN stays NaN, write it as null)."""
        out = {k: v for k, v in dataclasses.asdict(self).items() if k != "profile"}
        out["interval_per_s"] = list(self.interval_per_s)
        if self.profile is not None:
            out["profile"] = {"log10_rate": self.profile.log10_rate.tolist(),
                              "delta_chi_square": self.profile.delta_chi_square.tolist(),
                              "threshold": self.profile.threshold, "unstable": self.profile.unstable}
        return out

    @classmethod
    def from_dict(cls, data: Mapping) -> "RateEstimate":
        """Inverse of :meth:`to_dict`."""
        data = {k: (math.nan if v is None else v) if not isinstance(v, (dict, list, str)) else v
                for k, v in data.items()}
        prof = data.pop("profile", None)
        profile = None
        if prof:
            profile = Profile(np.array(prof["log10_rate"], float), np.array(prof["delta_chi_square"], float),
                              math.nan, math.nan, float(prof["threshold"]), bool(prof.get("unstable", False)))
        data["interval_per_s"] = tuple(math.nan if v is None else v for v in data["interval_per_s"])
        return cls(**data, profile=profile)


def _or(value, default):
    """`value`, or `default` where JSON had null."""
    return default if value is None else value


@dataclass(frozen=True)
class _RateContext:
    """What the whole fit tells the classification of each rate."""

    shifts_fixed: bool = False
    linewidth_free: bool = False
    at_bound: tuple[str, ...] = ()
    """Free nuisance parameters that ended at a bound of their range."""


def _widen(x: float, end: float, extra: float, limit: float) -> float:
    """An end of the profile interval moved out by `extra` in quadrature; NaN (open) when that reaches the
    range limit `limit`."""
    if not np.isfinite(end):
        return end
    moved = x + math.copysign(math.hypot(end - x, extra), end - x)
    return math.nan if (moved - limit) * (end - x) >= 0 else moved


def _classify(name: str, process: str, params: lmfit.Parameters, profile: Profile | None,
              context: _RateContext, shares: Mapping[str, float]) -> RateEstimate:
    """Turn the best fit and the profile of one rate into an estimate, an interval or a bound; `shares`
    (log10 k per standard error of each held parameter) widen the error and the interval."""
    par = params[name]
    x, own = par.value, _stderr(par)
    held = math.sqrt(sum(v * v for v in shares.values()))
    s = math.hypot(own, held) if np.isfinite(own) else own
    k = 10.0 ** x

    def estimate(status: str, stderr: float = math.nan, lower: float = math.nan, upper: float = math.nan,
                 reason: str = "", interval=(math.nan, math.nan)) -> RateEstimate:
        return RateEstimate(process, k, stderr, lower, upper, interval, x, s, status, reason, profile,
                            log10_stderr_spectrum=own, log10_stderr_held=held, held_shares=dict(shares))

    if not par.vary or par.expr:
        return estimate("fixed", reason=f"tied: {_tie_text(par)}" if par.expr else "held fixed")
    held_text = (f" The held parameters add {held:.3f} decades in quadrature (widening the interval too)."
                 if held > 0 else "")
    # an error bar reaching past a limit of the allowed range is no error bar: the range cut it
    inside = np.isfinite(s) and s > 0 and par.min + s < x < par.max - s
    if profile is None:
        if inside and not context.at_bound:
            return estimate("determined", stderr=k * math.log(10) * s,
                            reason="no profile computed: the error bar assumes a parabolic chi-square")
        side = ("fast-exchange (upper)" if par.max - x < x - par.min else "slow-exchange (lower)")
        why = (f"the best fit lies within its error of the {side} limit of the allowed range "
               f"({10 ** par.min:.3g} to {10 ** par.max:.3g} s^-1)" if np.isfinite(s) and s > 0
               else "the covariance gives no error")
        if inside:
            why = f"{', '.join(context.at_bound)} ended at a bound of its range"
        return estimate("undetermined", reason=f"{why}; without the chi-square profile (profile off) the spectrum "
                                               "gives no bound: fit with the profile on")
    lo, hi = _widen(x, profile.lower, held, par.min), _widen(x, profile.upper, held, par.max)
    interval = (10.0 ** lo if np.isfinite(lo) else math.nan, 10.0 ** hi if np.isfinite(hi) else math.nan)
    level = f"delta chi-square < {profile.threshold:.3g}"
    unstable = (f" The profile found a better fit at log10 k = {profile.best_log10_rate:.3f} (chi-square lower by "
                f"{-profile.delta_chi_square.min():.3g}), so the bound is counted from that fit."
                if profile.unstable else "")
    if np.isfinite(lo) and np.isfinite(hi):
        down, up = x - lo, hi - x
        parabolic = inside and all(1 / ASYMMETRY_LIMIT <= h / s <= ASYMMETRY_LIMIT for h in (down, up))
        if parabolic and not profile.unstable and not context.at_bound:
            return estimate("determined", stderr=k * math.log(10) * s, interval=interval,
                            reason=held_text.strip())
        if context.at_bound and not profile.unstable:
            cause = (f"{', '.join(context.at_bound)} ended at a bound of its range, which cuts the profile and biases "
                     "the best fit, so no error bar (see the notes).")
        elif profile.unstable:
            cause = "the profile is unstable, so no error bar."
        else:
            cause = "chi-square is far from a parabola or cut by a limit of the allowed range, so no error bar."
        return estimate("interval", lower=interval[0], upper=interval[1], interval=interval,
                        reason=f"the 68 % interval runs {down:.2f} decades below and {up:.2f} above the best fit "
                               f"(parabolic error {s:.2f}): {cause}{unstable}{held_text}")
    if np.isfinite(hi):
        return estimate("upper-bound", upper=interval[1], interval=interval,
                        reason=f"slow-exchange limit: the fit is as good ({level}) down to k = {10 ** par.min:.3g} "
                               "s^-1; the exchange broadening of the lines is below what the noise resolves for any k "
                               "under the bound." + unstable + held_text)
    if np.isfinite(lo):
        if context.linewidth_free:
            why = ("the intrinsic linewidth is free in this fit and trades against the exchange broadening past "
                   "coalescence, so a wider line and a slower rate fit as well as a faster rate; hold the linewidth "
                   '(series file: linewidth = "slow-exchange-trend" or "reference-line"; one spectrum: fix '
                   "linewidth_hz_<state> in parameters) to get a value")
        else:
            known = " with the shifts fixed at the values given (the bound depends on them)" if context.shifts_fixed else ""
            why = f"the excess width of the averaged line is below what the noise resolves for any k over the bound{known}"
        return estimate("lower-bound", lower=interval[0], interval=interval,
                        reason=f"fast-exchange limit: the fit is as good ({level}) up to k = {10 ** par.max:.3g} "
                               f"s^-1; {why}." + unstable + held_text)
    return estimate("undetermined", reason=f"the spectrum does not constrain this rate ({level} over the whole "
                                           f"range).{unstable}")


@dataclass
class SpectrumFit(NotebookView):
    """The fit of one spectrum.

    Attributes
    ----------
    rates : list of RateEstimate
        One per exchange process, in model order.
    parameters : lmfit.Parameters
        Every parameter with its value, standard error (scaled as described in the module notes),
        bounds and expression.
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
        Lineshape evaluations used (scan, refinement and profiles).
    options : FitOptions
        The options used.
    """

    rates: list[RateEstimate]
    parameters: lmfit.Parameters
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

    @property
    def residuals(self) -> np.ndarray:
        """data - fit (intensity units)."""
        return self.data - self.fitted

    def rate(self, process: str | int = 0) -> RateEstimate:
        """The estimate for one process, by name or index."""
        if isinstance(process, int):
            return self.rates[process]
        for r in self.rates:
            if r.process == process:
                return r
        raise InputError(f"no process {process!r}; processes are {[r.process for r in self.rates]}")

    def correlation(self, first: str, second: str) -> float:
        """Correlation of the estimates of two free parameters (NaN when the covariance gave none)."""
        value = (self.parameters[first].correl or {}).get(second)
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
        for par in self.parameters.values():
            state = "fixed" if not par.vary and not par.expr else (f"= {_tie_text(par)}" if par.expr else "")
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
        """Posterior samples of the free parameters (needs emcee); see
        :func:`dnmr.fitting.posterior.sample_spectrum_posterior` for the method and the settings (steps, walkers,
        burn, thin, seed, progress)."""
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
            "parameters": {p.name: parameter_record(p) for p in self.parameters.values()},
            "chi_square": self.chi_square,
            "reduced_chi_square": self.reduced_chi_square,
            "degrees_of_freedom": self.degrees_of_freedom,
            "noise": self.noise.to_dict(),
            "error_scale": self.error_scale,
            "flags": list(self.flags),
            "notes": list(self.notes),
            "function_evaluations": self.function_evaluations,
            "options": self.options.to_dict(),
        }

    @classmethod
    def from_dict(cls, data: Mapping, curves: Mapping, model: Model) -> "SpectrumFit":
        """Rebuild a fit from :meth:`to_dict` and :meth:`curves`; `model` is the model that was fitted."""
        options = FitOptions.from_dict(data["options"])
        layout = ParameterLayout.for_model(model, options)
        params = _parameters_from_records(data["parameters"], layout)
        fitted = np.array(curves["fit"], float)
        return cls(
            rates=[RateEstimate.from_dict(r) for r in data["rates"]], parameters=params,
            chi_square=data["chi_square"], reduced_chi_square=data["reduced_chi_square"],
            degrees_of_freedom=data["degrees_of_freedom"], noise=NoiseEstimate(**data["noise"]),
            error_scale=data["error_scale"], flags=list(data["flags"]), notes=list(data["notes"]),
            ppm=np.array(curves["ppm"], float), data=np.array(curves["data"], float), fitted=fitted,
            baseline=np.array(curves["baseline"], float), best_model=layout.model_from(params.valuesdict()),
            source=data["source"], temperature_k=data["temperature_k"], frequency_mhz=data["frequency_mhz"],
            function_evaluations=data["function_evaluations"], options=options,
        )


def _parameters_from_records(records: Mapping[str, Mapping], layout: ParameterLayout) -> lmfit.Parameters:
    """lmfit Parameters from :func:`parameter_record` records; a rule is the layout's own, a tie is rebuilt
    from its checked name and numbers (nothing stored is evaluated)."""
    own = layout.parameters(1.0)
    params = lmfit.Parameters()
    for name, p in records.items():
        params.add(name, value=p["estimate"], min=_or(p["lower"], -np.inf), max=_or(p["upper"], np.inf),
                   vary=not p["fixed"])
        params[name].stderr = _or(p["stderr"], math.nan)
        params[name].correl = dict(p.get("correlations") or {}) or None
    for name, p in records.items():  # ties last: they may name parameters added later
        if p.get("same_as"):
            _check_ties(params, {name: {"same_as": p["same_as"]}})
            params[name].set(expr=_tie_expression(p["same_as"], p["times"], p["plus"]))
        elif p.get("rule") and name in own and own[name].expr:
            params[name].set(expr=own[name].expr)
    return params


# --------------------------------------------------------------------------------------------------
# the fit


def _prepared(spectrum, model: Model) -> MeasuredSpectrum:
    sf = model.spectrometer.frequency_mhz
    if isinstance(spectrum, (str, Path)):
        return read_spectrum(spectrum, frequency_mhz=sf)
    if spectrum.frequency_mhz is not None and abs(spectrum.frequency_mhz - sf) > 1e-3 * sf:
        raise InputError(f"the spectrum was recorded at {spectrum.frequency_mhz:.6g} MHz but the model is for "
                         f"{sf:.6g} MHz; check the nucleus and the spectrometer", source=spectrum.source)
    return spectrum


def _region(spectrum: MeasuredSpectrum, model: Model, options: FitOptions) -> tuple[float, float, str]:
    """The fitted region (ppm, cut to the spectrum) and where it came from: the options' region_ppm, else
    the model's [window], else a window about the model's shifts.  Refused, naming that source, when fewer
    than MIN_POINTS points of the spectrum lie in it."""
    if options.region_ppm:
        region, origin = options.region_ppm, "region_ppm"
    elif model.window_ppm:
        region, origin = model.window_ppm, "the model's [window] (no region_ppm given)"
    else:
        region, origin = default_window_ppm(model), "a window about the model's shifts (no region_ppm, no [window])"
    lo, hi = sorted(region)
    first, last = float(spectrum.ppm.min()), float(spectrum.ppm.max())
    inside = int(((spectrum.ppm >= lo) & (spectrum.ppm <= hi)).sum())
    if inside < MIN_POINTS:
        shifts = model.shifts_hz() / model.spectrometer.frequency_mhz
        raise InputError(f"the fit region {lo:g} to {hi:g} ppm comes from {origin} and holds {inside} points of the "
                         f"spectrum, which covers {first:g} to {last:g} ppm (the model's shifts: "
                         f"{shifts.min():g} to {shifts.max():g} ppm); give region_ppm within the spectrum, or check "
                         "the model's shifts and the spectrum's referencing", source=spectrum.source, where="region_ppm")
    return max(lo, first), min(hi, last), origin


def _shifts_outside(model: Model, lo: float, hi: float, origin: str) -> list[str]:
    """A note when none of the model's shifts lies in the fitted region `lo`-`hi` ppm (a slip in the region
    or in the shifts: the fit would then describe only the tails of the lines)."""
    shifts = model.shifts_hz() / model.spectrometer.frequency_mhz
    if ((shifts >= lo) & (shifts <= hi)).any():
        return []
    return [f"none of the model's shifts ({shifts.min():g} to {shifts.max():g} ppm) lies in the fitted region "
            f"{lo:g} to {hi:g} ppm (from {origin}); check the region or the model's shifts"]


def _error_scale(chi2: float, dof: int, noise: NoiseEstimate, held: Sequence[str] = ()) -> tuple[float, list[str], list[str]]:
    """Covariance factor s, with flags and notes on the fit quality; `held` names the parameters held at
    values from elsewhere (a trend, a reference line), the first suspects of a misfit."""
    c = noise.correlation_factor
    red = chi2 / max(dof, 1)
    # red = (chi^2_dof / dof) (sigma / sigma_est)^2: both factors scatter, by 2c/dof and, for a noise
    # estimated from `points` signal-free points, by 2c/points in relative variance
    estimated = 2.0 * c / noise.points if noise.points else 0.0
    spread = MISFIT_SIGMAS * math.sqrt(2.0 * c / max(dof, 1) + estimated)
    flags, notes = [], []
    scale = c
    if c > 1.0:
        flags.append("correlated-noise")
        notes.append(f"neighbouring points of the noise are correlated (factor {c:.2f}); errors are widened by "
                     f"sqrt({c:.2f})")
    if red > 1.0 + spread:
        scale *= red
        flags.append("misfit")
        cause = (f"the values held from elsewhere ({', '.join(held)}) may not match the lines of this spectrum, "
                 "or a baseline, impurity or wrong model" if held else "baseline, impurity, wrong model?")
        notes.append(f"reduced chi-square {red:.2f} is well above 1: the model does not describe the data to the "
                     f"noise level ({cause}); errors are widened by its square root")
    elif red < 1.0 - spread:
        flags.append("noise-overestimated")
        notes.append(f"reduced chi-square {red:.2f} is well below 1: the noise estimate is probably too high "
                     "(signal in the noise region?); errors are left as they are, on the safe side")
    return scale, flags, notes


def _bound_flags(params: lmfit.Parameters, rate_names) -> tuple[list[str], list[str]]:
    flags, notes = [], []
    for par in params.values():
        if not par.vary or par.expr or par.name in rate_names:
            continue
        span = par.max - par.min
        if np.isfinite(span) and (par.value - par.min < 1e-6 * span or par.max - par.value < 1e-6 * span):
            flags.append(f"at-bound:{par.name}")
            notes.append(f"{par.name} ended at its bound ({par.value:.4g}); widen the bound or fix it")
    return flags, notes


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
    spectrum = _prepared(spectrum, model)
    lo, hi, origin = _region(spectrum, model, options)
    part = spectrum.region(lo, hi)
    noise = estimate_noise(spectrum, (lo, hi), options.noise_ppm, options.noise)
    layout = ParameterLayout.for_model(model, options)
    problem = _Problem(layout, part.ppm, part.intensity, noise)
    params = layout.parameters(problem.span)
    settings = dict(options.parameters)
    if parameters is not None:
        edited = _checked_settings({name: p.setting() for name, p in parameters.items()})
        apply_settings(params, edited)
        settings.update(edited)
    notes = _shifts_outside(model, lo, hi, origin)
    flags = ["shifts-outside-region"] if notes else []
    held = held_errors(params, settings)
    if options.shifts == "free" and options.frequency_offset:
        notes.append("the frequency offset is held at its start value because the shifts are free")
    if start:
        params = _with_values(params, {k: v for k, v in start.items() if k in params})
    starts, _ = _scan(problem, params, slow_start=options.shifts == "free" or options.couplings == "free")
    if options.shifts == "free":
        starts = [_shift_search(problem, params, s) for s in starts]
    if start:
        starts.append(problem.linear_solve(params, params.valuesdict())[1])
    best = _refine(problem, params, starts)
    n_free = best.nvarys
    dof = part.ppm.size - n_free
    profiles: dict[str, Profile] = {}
    for attempt in range(PROFILE_RESTARTS + 1):  # a profile that finds a better minimum restarts from it
        scale, quality_flags, quality_notes = _error_scale(best.chisqr, dof, noise, held=list(held))
        try:
            profiles = {n: _profile(problem, best, n, scale, _stderr(best.params[n]) * math.sqrt(scale),
                                    restart=attempt < PROFILE_RESTARTS)
                        for n in layout.rate_names
                        if options.profile and best.params[n].vary and not best.params[n].expr}
            break
        except _BetterMinimum as better:
            best = better.result
    unstable = [(n, p) for n, p in profiles.items() if p.unstable]
    if unstable:
        flags.append("unstable")
        notes.append("the chi-square profile kept finding better fits ("
                     + ", ".join(f"{n} by {-p.delta_chi_square.min():.3g} at {p.best_log10_rate:.3f}" for n, p in unstable)
                     + "); the result may not be the best one, so its rates are given as intervals or bounds "
                     "from the profile (taken from the best chi-square it found), not as error bars")
    for par in best.params.values():  # errors as described in the module notes
        if par.stderr is not None:
            par.stderr *= math.sqrt(scale)
    flags += quality_flags
    notes += quality_notes
    more_flags, more_notes = _bound_flags(best.params, layout.rate_names)
    flags += more_flags
    notes += more_notes
    if best.covar is None and n_free:
        flags.append("singular")
        notes.append("the parameters are not all determined (singular covariance): fix or tie some of them")
    values = best.params.valuesdict()
    shares = _held_shares(problem, best.params, layout.rate_names, held) if held else {}
    context = _RateContext(shifts_fixed=options.shifts == "fixed",
                           linewidth_free=any(best.params[n].vary and not best.params[n].expr
                                              for n in layout.linewidth_names),
                           at_bound=tuple(f.split(":", 1)[1] for f in more_flags))
    rates = [_classify(n, proc, best.params, profiles.get(n), context, shares.get(n, {}))
             for n, proc in zip(layout.rate_names, model.process_names())]
    for r in rates:
        if r.status in ("upper-bound", "lower-bound", "interval", "undetermined"):
            flags.append(f"{r.status}:{r.process}")
    return SpectrumFit(
        rates=rates, parameters=best.params, chi_square=float(best.chisqr),
        reduced_chi_square=float(best.chisqr / max(dof, 1)), degrees_of_freedom=int(dof), noise=noise,
        error_scale=float(scale), flags=flags, notes=notes, ppm=part.ppm.copy(), data=part.intensity.copy(),
        fitted=problem.predict(values), baseline=problem.baseline(values), best_model=layout.model_from(values),
        source=str(spectrum.source), temperature_k=temperature_k, frequency_mhz=model.spectrometer.frequency_mhz,
        function_evaluations=problem.nfev, options=options,
    )


def _stderr(par: lmfit.Parameter) -> float:
    return math.nan if par.stderr is None else float(par.stderr)


def held_errors(params: lmfit.Parameters, settings: Mapping[str, Mapping[str, Any]]) -> dict[str, float]:
    """Standard errors of the parameters held fixed with a ``stderr`` setting (positive ones only)."""
    return {name: float(s["stderr"]) for name, s in settings.items()
            if s.get("stderr", 0) > 0 and name in params and not params[name].vary and not params[name].expr}


def _residual_slope(problem: _Problem, params: lmfit.Parameters, name: str, step: float) -> np.ndarray:
    """d residual / d parameter `name` by a central difference of `step`, kept within its bounds."""
    par = params[name]
    lo, hi = max(par.value - step, par.min), min(par.value + step, par.max)
    ends = []
    for x in (lo, hi):
        trial = params.copy()
        trial[name].value = x
        ends.append(problem.residual(trial))
    return (ends[1] - ends[0]) / (hi - lo)


def _held_shares(problem: _Problem, params: lmfit.Parameters, rate_names, held: Mapping[str, float]
                 ) -> dict[str, dict[str, float]]:
    """How far (log10 k) each free rate moves for one standard error of each held parameter.

    dx/dtheta = -(Jx^T Jx)^-1 Jx^T Jtheta at the optimum (x the free parameters, theta the held ones),
    solved by least squares so that a degenerate direction does not blow up.
    """
    free = [n for n, p in params.items() if p.vary and not p.expr]
    rates = [n for n in rate_names if n in free]
    if not rates:
        return {}
    step = lambda name, size: size if size > 0 else 1e-4 * max(1.0, abs(params[name].value))  # noqa: E731
    jx = np.column_stack([_residual_slope(problem, params, n, step(n, 0.1 * _finite_or_zero(_stderr(params[n]))))
                          for n in free])
    jt = np.column_stack([_residual_slope(problem, params, n, step(n, 0.1 * s)) for n, s in held.items()])
    dx, *_ = np.linalg.lstsq(jx, -jt, rcond=None)
    sigma = np.array(list(held.values()))
    return {r: {h: float(dx[free.index(r), j] * sigma[j]) for j, h in enumerate(held)} for r in rates}


def _finite_or_zero(x: float) -> float:
    return x if np.isfinite(x) else 0.0
