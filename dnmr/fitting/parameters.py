"""Fit parameters in dnmr's words: which lmfit parameter stands for which quantity of a model
(:class:`ParameterLayout`), the settings a user gives them (start, fixed, lower, upper, a tie
same_as/times/plus, stderr), and the records a result keeps of them.

lmfit stays behind these functions: settings are checked here (:func:`checked_settings`) and applied
by :func:`apply_settings`; a tie becomes an lmfit constraint built from one checked name and two
numbers, so no input text is ever evaluated.  Parameter names are the model's names with anything but
letters, digits and _ turned into _ (:func:`parameter_identifier`); see :mod:`dnmr.fitting.spectrumfit`
for the list.
"""
from __future__ import annotations

import ast
import dataclasses
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import lmfit
import numpy as np

from dnmr.errors import InputError, did_you_mean
from dnmr.model import Model
from dnmr.modelparts import parse_coupling_key

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
RATE_PREFIX = "log10_rate_"
"""The names of the rate parameters: ``log10_rate_<process>``, log10 of the forward rate (s^-1)."""
RENAMED_PREFIXES = {"log10_k_": RATE_PREFIX}
"""Beginnings of parameter names of earlier releases and what replaced them (refused with a "renamed to" line)."""
COUPLING_REACH_HZ = 2.0
"""A free coupling may move this far (Hz) from the model's value, or a quarter of it when larger."""


def parameter_identifier(text: str) -> str:
    """`text` (a state, spin or process name) as part of a parameter name: letters, digits and _ only."""
    name = re.sub(r"\W", "_", str(text))
    return name if name and not name[0].isdigit() else f"_{name}"


def checked_settings(settings: Mapping) -> dict[str, dict[str, Any]]:
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


class LayoutOptions(Protocol):
    """What a layout reads of the fit options (:class:`dnmr.fitting.spectrumfit.FitOptions`)."""

    baseline_order: int
    phase: str
    frequency_offset: bool
    max_offset_hz: float | None
    linewidth: str
    populations: str
    shifts: str
    couplings: str
    rate_limits_per_s: tuple[float, float]
    parameters: Mapping[str, Mapping[str, Any]]


@dataclass(frozen=True)
class ParameterLayout:
    """Which lmfit parameter stands for which quantity of a model.

    Build with :meth:`for_model`; :meth:`parameters` gives the default lmfit Parameters and
    :meth:`model_from` turns parameter values back into a :class:`~dnmr.model.Model`.
    """

    model: Model
    options: LayoutOptions
    rate_names: tuple[str, ...]
    linewidth_names: tuple[str, ...]
    population_names: tuple[str, ...]
    shift_names: tuple[tuple[str, ...], ...]
    baseline_names: tuple[str, ...]
    coupling_names: tuple[dict[str, str], ...] = ()
    """Per state, parameter name -> the model's coupling key ("A-B") of every coupling it gives."""

    @classmethod
    def for_model(cls, model: Model, options: LayoutOptions) -> "ParameterLayout":
        """The layout of `model` under `options`."""
        used: set[str] = set()

        def unique(name: str) -> str:
            base, n = name, 1
            while name in used:
                n += 1
                name = f"{base}_{n}"
            used.add(name)
            return name

        names = lambda prefix, items: tuple(unique(f"{prefix}{parameter_identifier(x)}") for x in items)  # noqa: E731
        return cls(
            model, options,
            rate_names=names(RATE_PREFIX, model.process_names()),
            linewidth_names=names("linewidth_hz_", model.state_names),
            population_names=names("population_", model.state_names) if len(model.states) > 1 else (),
            shift_names=tuple(names(f"shift_ppm_{parameter_identifier(s.name)}_", model.spins) for s in model.states),
            baseline_names=tuple(unique(f"baseline_{j}") for j in range(options.baseline_order + 1)),
            coupling_names=tuple(
                {unique(f"coupling_hz_{parameter_identifier(s.name)}_"
                        + "_".join(parameter_identifier(x) for x in parse_coupling_key(key))): key
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

    @property
    def lineshape_names(self) -> tuple[str, ...]:
        """The parameters the lineshape depends on (rates, linewidths, populations, shifts, couplings)."""
        return (self.rate_names + self.linewidth_names + self.population_names
                + tuple(n for names in self.shift_names for n in names)
                + tuple(n for names in self.coupling_names for n in names))

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
    """Apply per-parameter settings (:data:`SETTING_KEYS`, checked by :func:`checked_settings`) to
    lmfit `params` in place.

    A held parameter (``fixed = true``) keeps any start value given: its bounds are widened to hold it.
    A tie (``same_as``, ``times``, ``plus``) is checked against the parameter names and for cycles, then
    written as a product and a sum of that one name and two numbers: nothing from the input is
    evaluated.  The setting ``stderr`` (the uncertainty of a held value) is read by the fit, not here.
    """
    for name in settings:
        if name not in params:
            raise InputError(unknown_parameter_text(name, params), where=f"parameters.{name}")
    _check_ties(params, settings)
    for name, setting in settings.items():
        par, where = params[name], f"parameters.{name}"
        par.set(min=setting.get("lower"), max=setting.get("upper"))
        if "fixed" in setting:
            par.set(expr="")
            par.set(vary=not setting["fixed"])
        if "start" in setting:
            if par.expr:
                raise InputError(f"{name} follows {tie_text(par)} in this fit: hold it with fixed = true beside "
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


def unknown_parameter_text(name: str, known: Mapping) -> str:
    """Why `name` is no fit parameter: a name of an earlier release with its new one, else the names there are."""
    for old, new in RENAMED_PREFIXES.items():
        if name.startswith(old) and new + name[len(old):] in known:
            return f'"{name}" was renamed to {new + name[len(old):]}'
    return f'no fit parameter "{name}"{did_you_mean(name, known)}; parameters are {", ".join(known)}'


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
            raise InputError(unknown_parameter_text(other, params), where=where)
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
    """How one fit parameter is handled (where it starts, whether it is fixed, its range, or a tie) and,
    after a fit, its estimate.

    Attributes
    ----------
    start : float
        Starting value (or the held value when fixed), in `unit`; in a fit's result the estimate, so that
        the records start a refinement.
    fixed : bool
        Held at `start` instead of fitted.
    lower, upper : float
        Range the fit keeps the parameter in (`unit`; infinite where unbounded).
    same_as : str or None
        Name of the parameter this one equals: this = times * same_as + plus.
    times, plus : float
        Factor and offset (`unit`) of the tie.
    stderr : float or None
        Standard error (`unit`): of a held value, carried into the rates; in a fit's result, of the estimate
        (of a held value, the one given).
    rule : str
        A relation dnmr keeps itself (e.g. the first population is 1 minus the others); read only.
    unit : str
        Unit of the parameter (ppm, Hz, deg, log10(s^-1); empty for amplitudes and fractions).
    estimate : float
        The fitted value (`unit`); NaN before a fit.
    correlations : dict of str to float
        Correlation of the estimate with each other free parameter's (empty before a fit).
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
    estimate: float = math.nan
    correlations: dict[str, float] = dataclasses.field(default_factory=dict)

    def setting(self) -> dict[str, Any]:
        """The setting (as in a series file's ``[fit.parameters]``) that gives this handling."""
        out: dict[str, Any] = {k: float(v) for k, v in (("lower", self.lower), ("upper", self.upper))
                               if math.isfinite(v)}
        if self.same_as:
            out.update(same_as=self.same_as, times=float(self.times), plus=float(self.plus))
        elif self.fixed or not self.rule:
            out.update(start=float(self.start), fixed=bool(self.fixed))
        if self.stderr is not None and math.isfinite(self.stderr):
            out["stderr"] = float(self.stderr)
        return out


UNITS = (("log10_rate_", "log10(s^-1)"), ("r1_per_s", "s^-1"), ("linewidth_hz_", "Hz"), ("coupling_hz_", "Hz"), ("offset_hz", "Hz"),
         ("shift_ppm_", "ppm"), ("phase", "deg"))


def parameter_unit(name: str) -> str:
    """The unit of fit parameter `name` from its prefix (empty for amplitudes, baselines and fractions)."""
    return next((unit for prefix, unit in UNITS if name.startswith(prefix)), "")


def tie_text(par: lmfit.Parameter) -> str:
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
    return {"estimate": float(par.value), "stderr": parameter_stderr(par), "lower": float(par.min),
            "upper": float(par.max), "fixed": not par.vary and not par.expr, **_tie_of(par), "unit": parameter_unit(par.name),
            "correlations": {k: float(v) for k, v in (par.correl or {}).items()}}


def as_fit_parameters(params: lmfit.Parameters, settings: Mapping[str, Mapping[str, Any]]
                      ) -> dict[str, FitParameter]:
    """dnmr's view of lmfit `params` (with the held errors of `settings`): a :class:`FitParameter` by name."""
    return {name: FitParameter(start=float(par.value), fixed=not par.vary and not par.expr, lower=float(par.min),
                               upper=float(par.max), stderr=settings.get(name, {}).get("stderr"),
                               unit=parameter_unit(name), **_tie_of(par))
            for name, par in params.items()}


def fitted_parameters(params: lmfit.Parameters, settings: Mapping[str, Mapping[str, Any]]
                      ) -> dict[str, FitParameter]:
    """dnmr's view of fitted lmfit `params`: each :class:`FitParameter` with its estimate, standard error
    (the given one of a held value with a ``stderr`` setting) and correlations; it starts at the estimate."""
    out = as_fit_parameters(params, settings)
    for name, par in params.items():
        own = parameter_stderr(par)
        out[name] = dataclasses.replace(out[name], estimate=float(par.value),
                                        stderr=own if math.isfinite(own) else out[name].stderr,
                                        correlations={k: float(v) for k, v in (par.correl or {}).items()})
    return out


def with_values(params: lmfit.Parameters, values: Mapping[str, float]) -> lmfit.Parameters:
    """A copy of `params` with the free ones (no tie) set to `values`, each clipped to its range."""
    out = params.copy()
    for name, value in values.items():
        par = out[name]
        if par.vary and not par.expr:
            lo, hi = par.min, par.max
            par.value = float(np.clip(value, lo, hi))
    out.update_constraints()
    return out


def tie_coefficients(params: lmfit.Parameters) -> dict[str, dict[str, float]]:
    """How every parameter moves with the free ones: d value / d free value, by parameter name and then by
    free parameter name (empty for a held one).  Ties and the layout's rules are affine (a tie is one
    name times a number plus a number, the first population one minus the others), so the numbers are
    exact; any other constraint is refused with ValueError."""
    out: dict[str, dict[str, float]] = {}

    def of(name: str) -> dict[str, float]:
        if name not in out:
            par = params[name]
            out[name] = ({name: 1.0} if par.vary else {}) if not par.expr else _affine(ast.parse(par.expr, mode="eval").body, of)
        return out[name]

    for name in params:
        of(name)
    return out


def _affine(node: ast.AST, of) -> dict[str, float]:
    """Coefficients (by free parameter) of an affine constraint's syntax tree; constants drop out."""
    if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)):
        return {}
    if isinstance(node, ast.Name):
        return of(node.id)
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        sign = -1.0 if isinstance(node.op, ast.USub) else 1.0
        return {k: sign * v for k, v in _affine(node.operand, of).items()}
    if isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Add, ast.Sub)):
        sign = -1.0 if isinstance(node.op, ast.Sub) else 1.0
        out = dict(_affine(node.left, of))
        for k, v in _affine(node.right, of).items():
            out[k] = out.get(k, 0.0) + sign * v
        return out
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Mult):
        for number, other in ((node.left, node.right), (node.right, node.left)):
            try:
                factor = float(ast.literal_eval(number))  # a number, perhaps with a sign
            except (ValueError, TypeError):
                continue
            return {k: factor * v for k, v in _affine(other, of).items()}
    raise ValueError(f"not an affine constraint: {ast.unparse(node)}")


def parameter_stderr(par: lmfit.Parameter) -> float:
    """The standard error of `par` (in its unit), NaN when the fit gave none."""
    return math.nan if par.stderr is None else float(par.stderr)


def held_errors(params: lmfit.Parameters, settings: Mapping[str, Mapping[str, Any]]) -> dict[str, float]:
    """Standard errors of the parameters held fixed with a ``stderr`` setting (positive ones only)."""
    return {name: float(s["stderr"]) for name, s in settings.items()
            if s.get("stderr", 0) > 0 and name in params and not params[name].vary and not params[name].expr}


def _or(value, default):
    """`value`, or `default` where JSON had null."""
    return default if value is None else value


def parameters_from_records(records: Mapping[str, Mapping], layout: ParameterLayout) -> lmfit.Parameters:
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
