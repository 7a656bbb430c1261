"""A rate and what the data say of it: an estimate with an error bar, a 68 % interval, a bound, or
nothing (:class:`RateEstimate`, :func:`classify_rate`), and the share of held parameters in its error
(:func:`held_shares`).

*Identifiability*: chi-square is profiled over log k (:func:`dnmr.fitting.problem.profile_parameter`)
out to where it has risen by the error scale s (the 68 % interval).  If the profile never rises that
far towards slow exchange the data only give an upper bound; if it stays flat towards fast exchange,
a lower bound.  Either way the standard error is left empty, and the bound is one-sided 95 %: where the
profile on the closed side rises by :data:`dnmr.fitting.problem.BOUND_LEVEL` (2.71) thresholds, not the
68 % end; a profile that never rises that far bounds nothing ("undetermined").  A two-sided interval far from symmetric
about the best fit, or from the quadratic error, is an interval instead of an error bar; so is any
rate whose profile is cut by a free nuisance parameter at a bound of its range.  An error bar that
would reach past a limit of the allowed range is never quoted: the range, not the data, cut it.
Without a profile a rate within its error of a limit is "undetermined".

*Held parameters with an uncertainty* widen the error and each side of the interval in quadrature by
their shares (:func:`held_shares`).
"""
from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import lmfit
import numpy as np

from dnmr.errors import InputError
from dnmr.formatting import significant
from dnmr.fitting.parameters import parameter_stderr, tie_text
from dnmr.fitting.problem import BOUND_LEVEL, FitProblem, Profile

ASYMMETRY_LIMIT = 1.5
"""Half-widths of the profile interval differing by more than this ratio make it an interval."""
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
        One-sided 95 % bounds (s^-1) when the data only bound the rate (NaN otherwise).
    rate_ci68 : (float, float)
        Ends of the profile's 68 % interval (NaN where it is open).
    log10_rate, log10_rate_stderr : float
        The same on the log10 scale the fit works in (the error includes the held parameters' share).
    status : str
        "determined", "interval" (two-sided bound), "upper-bound" (slow-exchange limit),
        "lower-bound" (fast-exchange limit), "undetermined" or "fixed".
    reason : str
        Why a bound and not an error bar, in words.
    profile : Profile or None
        The chi-square profile.
    log10_rate_stderr_spectrum : float
        The part of the error from this spectrum's noise (log10 decades).
    log10_rate_stderr_held : float
        The part from the errors of held parameters (a trend, a reference line); 0 when none.
    held_shares : dict
        Per held parameter, the change of log10 k for one standard error of it.
    """

    process: str
    rate_per_s: float
    rate_stderr: float
    rate_lower: float
    rate_upper: float
    rate_ci68: tuple[float, float]
    log10_rate: float
    log10_rate_stderr: float
    status: str
    reason: str = ""
    profile: Profile | None = None
    log10_rate_stderr_spectrum: float = math.nan
    log10_rate_stderr_held: float = 0.0
    held_shares: Mapping[str, float] = field(default_factory=dict)

    def describe(self) -> str:
        """One line: ``k = 123 ± 5 s^-1`` or ``k < 3.1 s^-1 (upper bound)``."""
        k = self.rate_per_s
        if self.status == "determined":
            return f"k = {significant(k)} ± {significant(self.rate_stderr, 2)} s^-1   (log10 k = {self.log10_rate:.3f} ± {self.log10_rate_stderr:.3f})"
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
        out["rate_ci68"] = list(self.rate_ci68)
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
        data["rate_ci68"] = tuple(math.nan if v is None else v for v in data["rate_ci68"])
        return cls(**data, profile=profile)


@dataclass(frozen=True)
class RateContext:
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


_OPEN = {"rate_stderr": math.nan, "rate_lower": math.nan, "rate_upper": math.nan,
         "rate_ci68": (math.nan, math.nan), "reason": ""}
"""What a rate estimate leaves open unless its verdict gives it."""


def classify_rate(name: str, process: str, params: lmfit.Parameters, profile: Profile | None,
                  context: RateContext, shares: Mapping[str, float]) -> RateEstimate:
    """Turn the best fit and the profile of one rate into an estimate, an interval or a bound.

    Parameters
    ----------
    name : str
        The rate's parameter (log10 k, s^-1).
    process : str
        The exchange process it belongs to.
    params : lmfit.Parameters
        The best fit, with scaled standard errors.
    profile : Profile or None
        The chi-square profile over the rate (None when the profile is off).
    context : RateContext
        What the whole fit tells about every rate.
    shares : mapping of str to float
        log10 k per standard error of each held parameter; they widen the error and the interval.

    Returns
    -------
    RateEstimate
    """
    par = params[name]
    own = parameter_stderr(par)
    held = math.sqrt(sum(v * v for v in shares.values()))
    s = math.hypot(own, held) if np.isfinite(own) else own
    if not par.vary or par.expr:
        verdict = {"status": "fixed", "reason": f"tied: {tie_text(par)}" if par.expr else "held fixed"}
    elif profile is None:
        verdict = _verdict_without_profile(par, s, context)
    else:
        verdict = _verdict_from_profile(par, s, held, profile, context)
    return RateEstimate(process=process, rate_per_s=10.0 ** par.value, log10_rate=par.value, log10_rate_stderr=s,
                        profile=profile, log10_rate_stderr_spectrum=own, log10_rate_stderr_held=held,
                        held_shares=dict(shares), **{**_OPEN, **verdict})


def with_held_error(estimate: RateEstimate, held: float) -> RateEstimate:
    """`estimate` with the held parameters' part of its error (log10 k) changed to `held` (the fit summed
    the held shares as independent; correlated held values, :meth:`dnmr.fitting.trends.StaticTrend.held_error`,
    give another total): the error and each end of the interval are widened by `held` in quadrature in
    place of the fit's part, the status kept."""
    x, before = estimate.log10_rate, math.sqrt(sum(v * v for v in estimate.held_shares.values()))
    own = estimate.log10_rate_stderr_spectrum
    s = math.hypot(own, held) if np.isfinite(own) else own

    def moved(end: float) -> float:
        if not np.isfinite(end):
            return end
        e = math.log10(end) - x
        bare = math.sqrt(max(e * e - before * before, 0.0))
        return 10.0 ** (x + math.copysign(math.hypot(bare, held), e))

    ci = tuple(moved(end) for end in estimate.rate_ci68)
    changes = {"log10_rate_stderr": s, "log10_rate_stderr_held": held, "rate_ci68": ci,
               "reason": estimate.reason.replace(_held_sentence(before), _held_sentence(held))}
    if estimate.status == "determined":
        changes["rate_stderr"] = 10.0 ** x * math.log(10) * s
    elif estimate.status == "interval":
        changes["rate_lower"], changes["rate_upper"] = ci
    elif estimate.status == "upper-bound":
        changes["rate_upper"] = moved(estimate.rate_upper)
    elif estimate.status == "lower-bound":
        changes["rate_lower"] = moved(estimate.rate_lower)
    return dataclasses.replace(estimate, **changes)


def _held_sentence(held: float) -> str:
    """The sentence of a rate's reason that gives the held parameters' share `held` (log10 k) of its error."""
    return f" The held parameters add {held:.3f} decades in quadrature (widening the interval too)."


def _inside(par: lmfit.Parameter, s: float) -> bool:
    """The error bar s (log10 k) lies within the allowed range: one reaching past a limit of the range is
    no error bar, the range cut it."""
    return bool(np.isfinite(s) and s > 0 and par.min + s < par.value < par.max - s)


def _rate_stderr(par: lmfit.Parameter, s: float) -> float:
    """Standard error (s^-1) of k from the error s of log10 k."""
    return 10.0 ** par.value * math.log(10) * s


def _verdict_without_profile(par: lmfit.Parameter, s: float, context: RateContext) -> dict[str, Any]:
    """Status, error and reason of a rate fitted with the profile off: an error bar only where the
    parabolic error lies inside the range and no nuisance parameter ended at a bound."""
    x, inside = par.value, _inside(par, s)
    if inside and not context.at_bound:
        return {"status": "determined", "rate_stderr": _rate_stderr(par, s),
                "reason": "no profile computed: the error bar assumes a parabolic chi-square"}
    side = ("fast-exchange (upper)" if par.max - x < x - par.min else "slow-exchange (lower)")
    why = (f"the best fit lies within its error of the {side} limit of the allowed range "
           f"({10 ** par.min:.3g} to {10 ** par.max:.3g} s^-1)" if np.isfinite(s) and s > 0
           else "the covariance gives no error")
    if inside:
        why = f"{', '.join(context.at_bound)} ended at a bound of its range"
    return {"status": "undetermined", "reason": f"{why}; without the chi-square profile (profile off) the spectrum "
                                                "gives no bound: fit with the profile on"}


def _verdict_from_profile(par: lmfit.Parameter, s: float, held: float, profile: Profile,
                          context: RateContext) -> dict[str, Any]:
    """Status, error, interval and reason of a rate from its chi-square profile, whose ends are widened
    by `held` (log10 k, the held parameters' share) in quadrature."""
    x = par.value
    lo, hi = _widen(x, profile.lower, held, par.min), _widen(x, profile.upper, held, par.max)
    interval = (10.0 ** lo if np.isfinite(lo) else math.nan, 10.0 ** hi if np.isfinite(hi) else math.nan)
    level = f"delta chi-square < {profile.threshold:.3g}"
    held_text = _held_sentence(held) if held > 0 else ""
    unstable = (f" The profile found a better fit at log10 k = {profile.best_log10_rate:.3f} (chi-square lower by "
                f"{-profile.delta_chi_square.min():.3g}), so the bound is counted from that fit."
                if profile.unstable else "")
    if np.isfinite(lo) and np.isfinite(hi):
        return _two_sided_verdict(par, s, (lo, hi), interval, profile, context, unstable + held_text)
    bound = _widen(x, profile.bound, held, par.max if np.isfinite(hi) else par.min)
    promise = (f" The bound is one-sided 95 % (delta chi-square {BOUND_LEVEL * profile.threshold:.3g}); the 68 % "
               "interval is in rate_ci68.")
    if np.isfinite(hi) and np.isfinite(bound):
        return {"status": "upper-bound", "rate_upper": 10.0 ** bound, "rate_ci68": interval,
                "reason": f"slow-exchange limit: the fit is as good ({level}) down to k = {10 ** par.min:.3g} "
                          "s^-1; the exchange broadening of the lines is below what the noise resolves for any k "
                          "under the bound." + promise + unstable + held_text}
    if np.isfinite(lo) and np.isfinite(bound):
        return {"status": "lower-bound", "rate_lower": 10.0 ** bound, "rate_ci68": interval,
                "reason": f"fast-exchange limit: the fit is as good ({level}) up to k = {10 ** par.max:.3g} "
                          f"s^-1; {_fast_limit_cause(context)}." + promise + unstable + held_text}
    if np.isfinite(lo) or np.isfinite(hi):
        return {"status": "undetermined", "rate_ci68": interval,
                "reason": f"the spectrum bounds this rate on one side only at 68 % ({level}); chi-square never rises "
                          f"to the one-sided 95 % level (delta chi-square {BOUND_LEVEL * profile.threshold:.3g}) "
                          "within the allowed range, so no bound is promised." + unstable + held_text}
    return {"status": "undetermined", "reason": f"the spectrum does not constrain this rate ({level} over the whole "
                                                f"range).{unstable}"}


def _two_sided_verdict(par: lmfit.Parameter, s: float, ends: tuple[float, float], interval: tuple[float, float],
                       profile: Profile, context: RateContext, remarks: str) -> dict[str, Any]:
    """An error bar when the profile interval `ends` (log10 k) is close to the parabola, else the interval
    (s^-1) with the reason; `remarks` (an unstable profile, the held parameters) close the reason."""
    down, up = par.value - ends[0], ends[1] - par.value
    parabolic = _inside(par, s) and all(1 / ASYMMETRY_LIMIT <= h / s <= ASYMMETRY_LIMIT for h in (down, up))
    if parabolic and not profile.unstable and not context.at_bound:
        return {"status": "determined", "rate_stderr": _rate_stderr(par, s), "rate_ci68": interval,
                "reason": remarks.strip()}  # a stable profile: only the held parameters' remark
    if context.at_bound and not profile.unstable:
        cause = (f"{', '.join(context.at_bound)} ended at a bound of its range, which cuts the profile and biases "
                 "the best fit, so no error bar (see the notes).")
    elif profile.unstable:
        cause = "the profile is unstable, so no error bar."
    else:
        cause = "chi-square is far from a parabola or cut by a limit of the allowed range, so no error bar."
    return {"status": "interval", "rate_lower": interval[0], "rate_upper": interval[1], "rate_ci68": interval,
            "reason": f"the 68 % interval runs {down:.2f} decades below and {up:.2f} above the best fit "
                      f"(parabolic error {s:.2f}): {cause}{remarks}"}


def _fast_limit_cause(context: RateContext) -> str:
    """Why the data give only a lower bound on a rate, in words."""
    if context.linewidth_free:
        return ("the intrinsic linewidth is free in this fit and trades against the exchange broadening past "
                "coalescence, so a wider line and a slower rate fit as well as a faster rate; hold the linewidth "
                '(series file: linewidth = "slow-exchange-trend" or "reference-line"; one spectrum: fix '
                "linewidth_hz_<state> in parameters) to get a value")
    known = " with the shifts fixed at the values given (the bound depends on them)" if context.shifts_fixed else ""
    return f"the excess width of the averaged line is below what the noise resolves for any k over the bound{known}"


def _residual_slope(problem: FitProblem, params: lmfit.Parameters, name: str, step: float) -> np.ndarray:
    """d residual / d parameter `name` by a central difference of `step`, kept within its bounds."""
    par = params[name]
    lo, hi = max(par.value - step, par.min), min(par.value + step, par.max)
    ends = []
    for x in (lo, hi):
        trial = params.copy()
        trial[name].value = x
        ends.append(problem.residual(trial))
    return (ends[1] - ends[0]) / (hi - lo)


def held_shares(problem: FitProblem, params: lmfit.Parameters, rate_names: Sequence[str], held: Mapping[str, float]
                ) -> dict[str, dict[str, float]]:
    """How far (log10 k) each free rate of `rate_names` moves for one standard error of each held parameter
    (`held`: standard errors by name, in each parameter's unit), at the best fit `params`.

    A parameter held fixed with a ``stderr`` setting (a shift from the slow-exchange trend, a linewidth
    from a reference line) carries that error into every rate: var(log10 k) gains
    sum_theta (dlog10k/dtheta stderr_theta)^2 (held parameters taken as independent), and
    dx/dtheta = -(Jx^T Jx)^-1 Jx^T Jtheta at the optimum (x the free parameters, theta the held ones),
    solved by least squares so that a degenerate direction does not blow up.
    """
    free = [n for n, p in params.items() if p.vary and not p.expr]
    rates = [n for n in rate_names if n in free]
    if not rates:
        return {}
    step = lambda name, size: size if size > 0 else 1e-4 * max(1.0, abs(params[name].value))  # noqa: E731
    jx = np.column_stack([_residual_slope(problem, params, n,
                                          step(n, 0.1 * _finite_or_zero(parameter_stderr(params[n]))))
                          for n in free])
    jt = np.column_stack([_residual_slope(problem, params, n, step(n, 0.1 * s)) for n, s in held.items()])
    dx, *_ = np.linalg.lstsq(jx, -jt, rcond=None)
    sigma = np.array(list(held.values()))
    return {r: {h: float(dx[free.index(r), j] * sigma[j]) for j, h in enumerate(held)} for r in rates}


def _finite_or_zero(x: float) -> float:
    """`x`, or 0 where it is NaN or infinite."""
    return x if np.isfinite(x) else 0.0


def rate_of_process(rates: Sequence[RateEstimate], process: str | int = 0) -> RateEstimate:
    """The estimate of one process among a fit's `rates`, by name or index."""
    if isinstance(process, int):
        return rates[process]
    for r in rates:
        if r.process == process:
            return r
    raise InputError(f"no process {process!r}; processes are {[r.process for r in rates]}")
