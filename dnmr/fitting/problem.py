"""The shared fit problem: data, noise and the model function of one fitted spectrum
(:class:`FitProblem`), the local least-squares refinement (:func:`minimize`), the error scale of the
covariance (:func:`error_scale`) and the chi-square profile of one parameter (:func:`profile_parameter`).

The single fit (:mod:`dnmr.fitting.spectrumfit`), the series, the global fit and the posteriors build on
:class:`FitProblem`; the magnetisation-transfer fits share the refinement, the error scale and the
profile (any object with a ``residual(params)`` method is a problem to them).  The method is set out
in :mod:`dnmr.fitting.spectrumfit` (steps 1, 3, 4 and 5).
"""
from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import lmfit
import numpy as np
from scipy import stats

from dnmr.engine.derivatives import coupling_direction, derivatives_pay
from dnmr.engine.resolvent import LineshapeTerms
from dnmr.errors import InputError
from dnmr.fitting.fitlineshape import FitLineshape
from dnmr.fitting.parameters import ParameterLayout, parameter_stderr, tie_coefficients
from dnmr.fitting.profile import conditional_slopes, level_crossing, predicted_start, refine_from
from dnmr.fitting.ranges import ppm_regions
from dnmr.io.measured import MeasuredSpectrum

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
"""Largest number of lineshape evaluations of one local refinement, per free parameter (with finite
differences: about MAX_EVALUATIONS steps); with the exact Jacobian, 2 x MAX_EVALUATIONS residuals, each
with at most one Jacobian (as many steps, and as many again rejected)."""
USE_EXACT_JACOBIAN = True
"""Refine with the exact Jacobian (:mod:`dnmr.engine.derivatives`) wherever it costs less than finite
differences (:func:`dnmr.engine.derivatives.derivatives_pay`); False forces finite differences, which reach
the same fits (tests/test_exact_jacobian.py) with more lineshape evaluations."""
TERMS_KEPT = 4
"""Lineshape decompositions a fit problem keeps, by the values of the parameters they depend on: a change
of amplitude, phase, baseline or frequency offset alone re-evaluates them on the grid, nothing more (0 keeps
none, as before: for comparisons)."""
PROFILE_RESTARTS = 3
"""Times the fit is restarted from a better minimum the profile found; the profile after the last
restart keeps what it finds and reports the rate as unstable."""
MAD_TO_SIGMA = 1.4826
"""Median absolute deviation to standard deviation, for normal noise."""
CLIP_SIGMAS = 3.5
"""Noise points further than this many (rough) standard deviations out are taken for signal."""
REFUSED_RESIDUAL = 1e3
"""The residual at every point for parameter values the model refuses (a constant the refinement steps away from)."""


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

    The points are detrended in short segments and the standard deviation is estimated robustly (from
    the median absolute residual, then the standard deviation of the points within 3.5 of those,
    corrected for the clipping).  Points of processed spectra are often correlated (zero filling,
    apodisation); the correlation factor c = 1 + 2 sum_k rho_k over the significant lags of the noise
    autocorrelation counts how many points carry one point's worth of information.

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
    regions = ppm_regions(noise_ppm, "noise_ppm")
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
# the fitted function


class FitProblem:
    """Data, noise and the model function of one fit: y(nu) of :mod:`dnmr.fitting.spectrumfit` at the
    data's frequencies (Hz), with residuals weighed by the noise."""

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
        self.njev = 0
        step = np.diff(self.hz)
        # points written with a few decimals are uniform to within their rounding
        self.uniform_step = float(step.mean()) if np.allclose(step, step.mean(), rtol=0.02) else None
        self.exact_jacobian = USE_EXACT_JACOBIAN and derivatives_pay(layout.model)
        self.lineshape = FitLineshape(layout)
        self._terms: dict[tuple, LineshapeTerms] = {}
        self.scan_cache: dict = {}
        """What the coarse scan (:mod:`dnmr.fitting.scan`) keeps between its cross-correlations."""
        self._ties: dict[tuple, dict] = {}

    def terms(self, values: Mapping[str, float]) -> LineshapeTerms:
        """The engine's decomposition of the model at parameter `values` (one lineshape evaluation, counted in
        ``nfev``, unless one of the last TERMS_KEPT had the same lineshape parameters)."""
        key = tuple(float(values[n]) for n in self.layout.lineshape_names)
        terms = self._terms.get(key)
        if terms is None:
            terms = self.lineshape.terms(values)
            self.nfev += 1
            if TERMS_KEPT:
                if len(self._terms) >= TERMS_KEPT:
                    self._terms.pop(next(iter(self._terms)))
                self._terms[key] = terms
        return terms

    def shape(self, values: Mapping[str, float], offset_hz: float | None = None) -> np.ndarray:
        """Complex spectrum S = A - i D of the model at the data's frequencies."""
        offset = values["offset_hz"] if offset_hz is None else offset_hz
        return self.terms(values).evaluate(self.hz - offset)

    def phase(self, values: Mapping[str, float], zero_order: bool = True) -> np.ndarray:
        """phi(nu) in radians."""
        first = values["phase1_deg"] * (self.hz - self.centre) / self.span
        return np.radians(first + (values["phase0_deg"] if zero_order else 0.0))

    def rotation(self, values: Mapping[str, float]) -> complex | np.ndarray:
        """exp(i phi(nu)): one number when the first-order phase is zero."""
        if values["phase1_deg"] == 0.0:
            return complex(np.exp(1j * math.radians(values["phase0_deg"])))
        return np.exp(1j * self.phase(values))

    def baseline(self, values: Mapping[str, float]) -> np.ndarray:
        """The polynomial baseline (intensity units) at the data's frequencies."""
        return self.powers @ np.array([values[n] for n in self.layout.baseline_names])

    def predict(self, values: Mapping[str, float]) -> np.ndarray:
        """The fitted spectrum y(nu) (intensity units) for parameter `values`."""
        phased = (self.rotation(values) * self.shape(values)).real
        return values["amplitude"] * phased + self.baseline(values)

    def residual(self, params: lmfit.Parameters) -> np.ndarray:
        """(fit - data) / noise at every point; REFUSED_RESIDUAL everywhere for values the model refuses."""
        return self.residual_at(params.valuesdict())

    def residual_at(self, values: Mapping[str, float]) -> np.ndarray:
        """:meth:`residual` at the values of every parameter."""
        try:
            return (self.predict(values) - self.data) / self.noise.sigma
        except InputError:  # parameters outside what a model allows (e.g. a negative population)
            return np.full(self.data.size, REFUSED_RESIDUAL)

    def ties(self, params: lmfit.Parameters) -> tuple[dict[str, dict[str, float]], list[str]]:
        """How every parameter moves with the free ones (:func:`dnmr.fitting.parameters.tie_coefficients`, kept by
        the parameters' structure) and the free ones (those that vary, without a constraint) in lmfit's order."""
        structure = tuple((n, p.vary, p.expr) for n, p in params.items())
        ties = self._ties.get(structure)
        if ties is None:
            ties = self._ties[structure] = tie_coefficients(params)
        return ties, [n for n, p in params.items() if p.vary and not p.expr]

    def jacobian(self, params: lmfit.Parameters) -> np.ndarray:
        """d residual / d free parameter (points x free parameters, in lmfit's order: those that vary, without
        a constraint), exact: the lineshape's derivatives from :func:`dnmr.engine.derivatives.lineshape_derivatives`
        (one combination of directions per free parameter, ties followed by the chain rule), the nuisance
        terms' own (:func:`nuisance_column`).  Zero for values the model refuses (the residual is constant there)."""
        return self.residual_and_jacobian_at(params.valuesdict(), *self.ties(params))[1]

    def residual_and_jacobian_at(self, values: Mapping[str, float], ties: Mapping[str, Mapping[str, float]],
                                 free: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`residual_at` and :meth:`jacobian` at the values of every parameter, with the ties and free
        parameters of :meth:`ties`, from the one call that gives the spectrum with its derivatives (no lineshape
        evaluation of its own)."""
        shape_of = self._lineshape_directions(values)
        shape_of["offset_hz"] = (("frequency",), -1.0)
        along: dict[str, dict[tuple, float]] = {}
        for name, moves in ties.items():
            if name in shape_of:
                direction, scale = shape_of[name]
                for other, factor in moves.items():
                    combination = along.setdefault(other, {})
                    combination[direction] = combination.get(direction, 0.0) + factor * scale
        out = np.zeros((len(free), self.data.size))  # one row per free parameter, transposed at the end
        try:
            found = self.lineshape.derivatives(values, self.hz - values["offset_hz"], list(along.values()))
        except InputError:
            return np.full(self.data.size, REFUSED_RESIDUAL), out.T
        self.njev += 1
        rotation = self.rotation(values)
        turned = rotation * found.spectrum
        if along:
            out[[free.index(name) for name in along]] = values["amplitude"] * (rotation * found.slopes).real
        for name, moves in ties.items():
            column = None if name in shape_of else nuisance_column(name, values, turned, self)
            for other, factor in moves.items() if column is not None else ():
                out[free.index(other)] += factor * column
        fitted = values["amplitude"] * turned.real + self.baseline(values)
        return (fitted - self.data) / self.noise.sigma, out.T / self.noise.sigma

    def _lineshape_directions(self, values: Mapping[str, float]) -> dict[str, tuple[tuple, float]]:
        """For each lineshape parameter, its derivative direction (:func:`dnmr.engine.derivatives.all_directions`)
        and d(model number)/d(parameter): k ln 10 for log10 k, the spectrometer frequency for a shift in ppm."""
        layout, model = self.layout, self.layout.model
        sf = model.spectrometer.frequency_mhz
        out = {n: (("rate", i), 10.0 ** values[n] * math.log(10.0)) for i, n in enumerate(layout.rate_names)}
        out.update({n: (("linewidth", c), 1.0) for c, n in enumerate(layout.linewidth_names)})
        out.update({n: (("population", c), 1.0) for c, n in enumerate(layout.population_names)})
        out.update({n: (("shift", c, s), sf) for c, names in enumerate(layout.shift_names) for s, n in enumerate(names)})
        out.update({n: (coupling_direction(model, c, key), 1.0)
                    for c, names in enumerate(layout.coupling_names) for n, key in names.items()})
        return out


# --------------------------------------------------------------------------------------------------
# refinement and profiles


def minimize(problem: FitProblem, params: lmfit.Parameters, tolerance: float = 1e-8
             ) -> lmfit.minimizer.MinimizerResult:
    """Local least squares (trust region with bounds) from `params`; at most MAX_EVALUATIONS per free parameter.

    `problem` is any object with ``residual(params)``; one whose ``exact_jacobian`` is true gives its
    residuals with its Jacobian too (:meth:`FitProblem.residual_and_jacobian_at`, with :meth:`FitProblem.ties`),
    else finite differences are used.
    """
    exact = getattr(problem, "exact_jacobian", False)
    kept: dict[tuple, tuple[np.ndarray, np.ndarray]] = {}

    def paired(params: lmfit.Parameters) -> tuple[np.ndarray, np.ndarray]:
        # the residuals and Jacobian from one call: the solver asks for the Jacobian at each point it accepts,
        # right after the residuals there, and the call that gives the derivatives gives the spectrum too
        values = params.valuesdict()
        key = tuple(values.values())
        if key not in kept:
            kept.clear()
            kept[key] = problem.residual_and_jacobian_at(values, *problem.ties(params))
        return kept[key]

    minimizer = lmfit.Minimizer((lambda p: paired(p)[0]) if exact else problem.residual, params, scale_covar=False,
                                nan_policy="raise")
    n_free = sum(p.vary and not p.expr for p in params.values())
    # where the data cannot determine a parameter, lmfit takes the square root of a negative variance: the
    # error is NaN, which the fit reports as undetermined (a bound), so numpy's warning is noise to the user
    with np.errstate(invalid="ignore"):
        return minimizer.minimize(method="least_squares", x_scale="jac", ftol=tolerance, xtol=tolerance,
                                  gtol=tolerance, jac=(lambda p: paired(p)[1]) if exact else "2-point",
                                  max_nfev=2 * MAX_EVALUATIONS if exact else MAX_EVALUATIONS * (n_free + 1))


def refine(problem: FitProblem, params: lmfit.Parameters, tolerance: float = 1e-8) -> tuple[float, lmfit.Parameters]:
    """Chi-square and parameters at the end of the refinement of :func:`minimize`, for the many refinements of
    a profile: a problem with an exact Jacobian is refined in `params` itself, as lmfit would refine it but
    without its copies and covariance; any other through :func:`minimize`."""
    if not getattr(problem, "exact_jacobian", False):
        result = minimize(problem, params, tolerance)
        return float(result.chisqr), result.params
    ties, free = problem.ties(params)
    start = params.valuesdict()
    # every constraint is affine (tie_coefficients): a value is its part at the start plus its moves
    rest = {n: start[n] - sum(c * start[f] for f, c in moves.items()) for n, moves in ties.items()}

    def at(x: np.ndarray) -> dict[str, float]:
        moved = dict(zip(free, x.tolist()))
        return {n: rest[n] + sum(c * moved[f] for f, c in moves.items()) for n, moves in ties.items()}

    bounds = (np.array([params[n].min for n in free]), np.array([params[n].max for n in free]))
    x, r = refine_from(lambda x: problem.residual_at(at(x)),
                       lambda x: problem.residual_and_jacobian_at(at(x), ties, free),
                       np.array([start[n] for n in free]), bounds, tolerance, 2 * MAX_EVALUATIONS)
    _set_values(params, dict(zip(free, x.tolist())))
    return float(r @ r), params


def _set_values(params: lmfit.Parameters, values: Mapping[str, float]) -> None:
    """Set the parameters of `values` that have no constraint (held ones too) and update the tied ones."""
    for name, value in values.items():
        if not params[name].expr:
            params[name].value = float(value)
    params.update_constraints()


BOUND_LEVEL = float(stats.chi2.ppf(0.90, 1))
"""Rise of the profile, in units of its threshold, at a one-sided 95 % bound: the 90 % point of chi-square with
one degree of freedom, 2.71 (profile likelihood, common practice).  A rate the data only bound is promised
below (above) it at 95 %, not at the 84 % of the 68 % end."""


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
    bound : float
        When only one side reaches the threshold (the data only bound the rate): log10 k where the rise on
        that side reaches BOUND_LEVEL times the threshold, the one-sided 95 % bound; NaN otherwise, or
        when the rise never gets there (then the profile bounds nothing).
    """

    log10_rate: np.ndarray
    delta_chi_square: np.ndarray
    lower: float
    upper: float
    threshold: float
    unstable: bool = False
    bound: float = math.nan

    @property
    def best_log10_rate(self) -> float:
        """log10 k (s^-1) of the lowest chi-square on the profile."""
        return float(self.log10_rate[np.argmin(self.delta_chi_square)])


CROSSING_ACCURACY = 0.025
"""The search for a crossing of the profile (:func:`dnmr.fitting.profile.level_crossing`) ends when the crossing
estimated with the last point lies within this share of that point's distance from the best value (2.5 % of
the interval's half-width at the threshold); the estimate, a secant through the last point, is closer still."""


class BetterMinimum(Exception):
    """The profile found parameters better than the 'best' fit; `result` is the fit refined from there."""

    def __init__(self, result: lmfit.minimizer.MinimizerResult):
        super().__init__("better minimum")
        self.result = result


def profile_parameter(problem: FitProblem, best: lmfit.minimizer.MinimizerResult, name: str, threshold: float,
                      stderr: float, restart: bool = True) -> Profile:
    """Profile chi-square over the parameter `name` (log10 k) on both sides of the best fit.

    Each point is refined from values predicted from the points before it
    (:func:`dnmr.fitting.profile.predicted_start`); the crossings of the threshold, and of the bound's level
    from the points the threshold's search left, are found by :func:`dnmr.fitting.profile.level_crossing`.
    A point better than the best fit raises :class:`BetterMinimum` (refined from there) when `restart`;
    otherwise the profile goes on, counting the rise from the lowest chi-square found so far.
    """
    x0, chi0 = best.params[name].value, best.chisqr
    lo_lim, hi_lim = best.params[name].min, best.params[name].max
    points = {x0: 0.0}
    fits = {x0: best.params.valuesdict()}  # the refined values at each point
    slopes = conditional_slopes(best.covar, best.var_names, name)
    trial = best.params.copy()  # one set of parameters, refined from predicted values each time
    trial[name].set(vary=False)

    def evaluate(x: float) -> None:
        start = predicted_start(fits, x, x0, slopes, 2.0 * stderr)
        _set_values(trial, {n: float(np.clip(v, trial[n].min, trial[n].max)) for n, v in start.items()} | {name: x})
        chi_square, found = refine(problem, trial, tolerance=1e-5)
        if restart and chi_square < chi0 - 0.05 * threshold:
            params = found.copy()
            params[name].set(vary=True)
            raise BetterMinimum(minimize(problem, params))
        points[x] = chi_square - chi0
        fits[x] = found.valuesdict()

    def side(direction: int, level: float = threshold, mirror: float = math.nan) -> float:
        """The crossing of `level` on one side.  Its first step goes where a parabola through the best point
        and the other side's crossing `mirror` reaches the level, else where the standard error's parabola
        does (the stride the walk may always take)."""
        along = math.sqrt(level / threshold)
        stride = float(np.clip((stderr if np.isfinite(stderr) else 0.1) * along, 1e-3, 0.5))
        first = float(np.clip(abs(mirror - x0) * along, 1e-3, 0.5)) if np.isfinite(mirror) else stride
        return level_crossing(points, evaluate, x0, direction, hi_lim if direction > 0 else lo_lim, level,
                              CROSSING_ACCURACY, first, stride)

    lower = side(-1)
    upper = side(+1, mirror=lower)
    bound = math.nan
    if np.isfinite(lower) != np.isfinite(upper):  # only a bound: taken where the rise is one-sided 95 %
        bound = side(1 if np.isfinite(upper) else -1, BOUND_LEVEL * threshold)
    xs = np.array(sorted(points))
    rises = np.array([points[x] for x in xs])
    return Profile(xs, rises, lower, upper, threshold, bool(rises.min() < -0.05 * threshold), bound)


def profile_with_restarts(problem: FitProblem, best: lmfit.minimizer.MinimizerResult, names: Sequence[str],
                          dof: int, noise: NoiseEstimate, held: Sequence[str] = ()
                          ) -> tuple[lmfit.minimizer.MinimizerResult, dict[str, Profile],
                                     tuple[float, list[str], list[str]]]:
    """Profile chi-square over each parameter of `names` (log10 k), restarting from a better minimum.

    A profile that finds a better fit restarts the fit from there, up to PROFILE_RESTARTS times; the
    profiles after the last restart keep what they find (and say so: ``Profile.unstable``).  `dof`,
    `noise` and `held` give the error scale (:func:`error_scale`), which sets each profile's threshold.

    Returns
    -------
    best : MinimizerResult
        The best fit found.
    profiles : dict of str to Profile
        By parameter name.
    quality : (float, list of str, list of str)
        The error scale of `best` with its flags and notes (:func:`error_scale`).
    """
    restarts = PROFILE_RESTARTS
    while True:
        quality = error_scale(best.chisqr, dof, noise, held=held)
        scale = quality[0]
        try:
            profiles = {n: profile_parameter(problem, best, n, scale,
                                             parameter_stderr(best.params[n]) * math.sqrt(scale), restart=restarts > 0)
                        for n in names}
            return best, profiles, quality
        except BetterMinimum as better:
            best, restarts = better.result, restarts - 1


def error_scale(chi2: float, dof: int, noise: NoiseEstimate, held: Sequence[str] = ()
                ) -> tuple[float, list[str], list[str]]:
    """Covariance factor s, with flags and notes on the fit quality; `held` names the parameters held at
    values from elsewhere (a trend, a reference line), the first suspects of a misfit.

    s = c x (reduced chi-square if the fit is significantly worse than the noise, else 1), c the noise's
    correlation factor: a fit that looks better than the noise keeps its errors (on the safe side).
    """
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


def nuisance_column(name: str, values: Mapping[str, float], turned: np.ndarray, p: FitProblem) -> np.ndarray | None:
    """d(prediction)/d(`name`) of one spectrum for its amplitude, phases and baseline (exact), or None for
    another parameter. `turned` is exp(i phi) S, the prediction is amplitude Re(turned) + baseline."""
    if name == "amplitude":
        return turned.real
    if name == "phase0_deg":
        return -values["amplitude"] * turned.imag * (math.pi / 180.0)
    if name == "phase1_deg":
        return -values["amplitude"] * turned.imag * np.radians((p.hz - p.centre) / p.span)
    if name in p.layout.baseline_names:
        return p.powers[:, p.layout.baseline_names.index(name)]
    return None
