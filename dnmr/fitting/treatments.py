"""Series-level treatment of the static spectral parameters: the slow-exchange run, the fits with values
held at its trends, and the reference line.

Static spectral parameters (shifts, couplings, populations of states joined by an exchange, the
intrinsic linewidth) are by default taken from the slow-exchange spectra ("slow-exchange-trend"):

1. the coldest spectra are fitted with them free, a batch (one spectrum per worker) at a time, until
   one is not in slow exchange; the slow-exchange run is the coldest contiguous spectra whose rate (or
   its upper bound) is under a quarter of the coalescence rate pi dnu / sqrt 2 of the closest
   exchanging pair (Gutowsky & Holm 1956) and whose free static parameters are determined (or those
   at or below ``slow_exchange_below_k``);
2. shifts and couplings are regressed linearly on T, populations as ln(p/p_first) on 1/T (van 't Hoff),
   the linewidth on T over the spectra of the run whose rates are only upper bounds (elsewhere the
   linewidth and the exchange broadening k/pi trade against each other) (:mod:`dnmr.fitting.trends`);
3. every other spectrum is fitted with them held at the trend's value at its temperature, and the
   trend's error there is carried into its rates (:mod:`dnmr.fitting.spectrumfit`, held parameters with a stderr).

A reference line (``[fit.reference_line]``, a signal in no exchange) gives the linewidth instead: it is
fitted in every spectrum and its width held as the intrinsic linewidth, with its error.
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

from dnmr.fitting.resultsfolder import STAGE_HELD, STAGE_MAIN, STAGE_SLOW
from dnmr.fitting.runner import FitRunner, SpectrumOutcome, fit_job, outcome_from_record
from dnmr.fitting.seriesfile import REFERENCE_LINE, TREATMENT_KIND, TREND, Series
from dnmr.fitting.parameters import RATE_PREFIX, ParameterLayout
from dnmr.fitting.rates import with_held_error
from dnmr.fitting.spectrumfit import FitOptions, SpectrumFit, fit_spectrum
from dnmr.fitting.trendbasis import common_noise_basis
from dnmr.fitting.trends import PARAMETER_PREFIX, StaticTrend, held_setting, static_trend, temperature_span
from dnmr.io.readers import read_spectrum
from dnmr.kinetics import coalescence_rate_per_s
from dnmr.model import Model

SLOW_EXCHANGE_FRACTION = 0.25
"""A spectrum counts as slow exchange when its rate is under this fraction of the coalescence rate."""


def fit_reference_lines(series: Series) -> tuple[dict[int, dict], list[str]]:
    """Fit the reference line in every spectrum (when the linewidth comes from it).

    Parameters
    ----------
    series : Series
        The series; nothing is fitted unless its linewidth is "reference-line".

    Returns
    -------
    references : dict of int to dict
        Per spectrum index the line's window (ppm), width and error (Hz) and, where they are determined,
        the ``setting`` that holds the linewidth at the width plus ``added_width_hz``; else an ``error``.
    notes : list of str
        On the spectra where the line gave no linewidth.
    """
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
        par = fit.lmfit_parameters["linewidth_hz_reference"]
        stderr = math.nan if par.stderr is None else float(par.stderr)
        record = {"window_ppm": list(window), "width_hz": float(par.value), "width_stderr": stderr,
                  "reduced_chi_square": fit.reduced_chi_square, "flags": list(fit.flags)}
        if math.isfinite(stderr) and not any(f.startswith("at-bound:linewidth") for f in fit.flags):
            record["setting"] = {name: held_setting(par.value + ref.added_width_hz, stderr)}
        else:
            record["error"] = "its width is not determined (" + ";".join(fit.flags or ["no error"]) + ")"
        out[i] = record
    failed = [series.spectra[i].where for i, r in out.items() if "setting" not in r]
    notes = [f"the reference line at {ref.ppm:g} ppm gave no linewidth in {', '.join(failed)} ("
             + "; ".join(out[i]["error"] for i in out if "setting" not in out[i])
             + "), so the linewidth is fitted there; check the line's ppm and window_ppm"] if failed else []
    return out, notes


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


def rates_are_slow(fit: SpectrumFit, limit: float) -> bool:
    """Whether `fit` counts as slow exchange: every rate (its upper bound, or the upper end of its 68 %
    interval) under SLOW_EXCHANGE_FRACTION of the coalescence rate `limit` (s^-1).  A best fit under it whose
    interval reaches past it is no evidence of slow exchange: near coalescence a free fit can fall into two
    broad unresolved lines at a small rate."""
    for r in fit.rates:
        k = r.rate_upper if r.status in ("upper-bound", "interval") else r.rate_per_s
        if r.status == "determined" and np.isfinite(r.rate_ci68[1]):
            k = max(k, r.rate_ci68[1])
        if r.status in ("undetermined", "lower-bound") or not k < SLOW_EXCHANGE_FRACTION * limit:
            return False
    return True


def _statics_determined(fit: SpectrumFit, kinds: Sequence[str]) -> bool:
    """Every free parameter of `kinds` has a finite error and is off the bounds of its range."""
    prefixes = tuple(PARAMETER_PREFIX[k] for k in kinds)
    for name, par in fit.lmfit_parameters.items():
        if name.startswith(prefixes) and par.vary and not par.expr:
            if par.stderr is None or not math.isfinite(par.stderr) or f"at-bound:{name}" in fit.flags:
                return False
    return True


def _is_quiet(fit: SpectrumFit) -> bool:
    """Every rate only an upper bound: the exchange broadening is below what the noise resolves."""
    return all(r.status in ("upper-bound", "fixed") for r in fit.rates)


def _spectrum_options(series: Series, index: int, references: Mapping[int, dict], held: Mapping[str, dict],
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


def _slow_stage(series: Series, runner: FitRunner, hashes, references) -> tuple[dict[int, SpectrumOutcome], list[int]]:
    """Fit the coldest spectra with the trended parameters free, a batch (one per worker) at a time, until
    one is not in slow exchange (each from the model's values, so that the fits do not depend on the number
    of workers); returns their outcomes and the slow-exchange run (coldest first)."""
    temp = lambda i: series.spectra[i].temperature_k  # noqa: E731
    order = sorted(range(len(series.spectra)), key=temp)
    limit, kinds = _coalescence_rate(series.model), series.trended()
    below = series.slow_exchange_below_k
    outcomes: dict[int, SpectrumOutcome] = {}

    def run(batch: list[int], seeded: bool) -> None:
        jobs = [fit_job(series, i, STAGE_SLOW, _spectrum_options(series, i, references, {}), hashes) for i in batch]
        for i, record in runner.run(jobs, "slow-exchange spectra", seeded).items():
            outcomes[i] = outcome_from_record(series, i, record, STAGE_SLOW)

    if below is not None:
        run([i for i in order if temp(i) <= below], seeded=True)
        return outcomes, [i for i in order if i in outcomes and outcomes[i].fitted]
    slow: list[int] = []
    for start in range(0, len(order), runner.workers):  # unseeded: the same fits whatever the batch size
        batch = order[start:start + runner.workers]
        run(batch, seeded=False)
        for i in batch:
            fit = outcomes[i].fit
            if fit is None:
                continue
            if not (rates_are_slow(fit, limit) and _statics_determined(fit, kinds)):
                return outcomes, slow
            slow.append(i)
    return outcomes, slow


def _linewidth_spectra(series: Series, outcomes, slow: list[int]) -> tuple[list[int], list[str]]:
    """The slow spectra the linewidth trend comes from: the whole slow run (see
    :func:`dnmr.fitting.trends.linewidth_trend`), with a note when the exchange broadening is resolved in
    every one of them."""
    if not slow or any(_is_quiet(outcomes[i].fit) for i in slow):
        return slow, []
    return slow, ["no slow-exchange spectrum is free of resolved exchange broadening, so the linewidth trend comes "
                  "from spectra where linewidth and rate trade against each other; it is fitted jointly with an "
                  "Eyring line of their rates, which separates the two (its error includes what remains); a "
                  'reference line (linewidth = "reference-line") avoids it']


def fit_with_trends(series: Series, runner: FitRunner, hashes: Mapping, references: Mapping[int, dict]
                    ) -> tuple[dict[int, SpectrumOutcome], StaticTrend | None, list[str]]:
    """Slow-exchange fits, the trends of the static parameters, then every other spectrum with them held.

    Parameters
    ----------
    series : Series
        The series (with a quantity of a slow-exchange trend).
    runner : FitRunner
        Runs the fits.
    hashes : mapping
        SHA-256 of every spectrum file (by index) and of the model file ("model").
    references : mapping of int to dict
        The reference-line fits (:func:`fit_reference_lines`).

    Returns
    -------
    outcomes : dict of int to SpectrumOutcome
        By spectrum index, with each one's treatment recorded.
    trend : StaticTrend or None
        The trends (None when no spectrum is in slow exchange).
    notes : list of str
        How the trends were made.
    """
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
        if not lw_from or lw_from == slow:  # one set of spectra: their values' errors on one basis
            trend = common_noise_basis(trend, [(temp(i), outcomes[i].fit) for i in slow])
        notes.append(f"slow-exchange run: {len(slow)} spectr{'um' if len(slow) == 1 else 'a'} ({temperature_span([temp(i) for i in slow])}); "
                     + ", ".join(f"{q} from it" for q, k in TREATMENT_KIND.items() if k in kinds and k != "linewidth")
                     + (f"; linewidth from {len(lw_from)} of them ({temperature_span([temp(i) for i in lw_from])})" if lw_from else ""))
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
        jobs.append(fit_job(series, i, STAGE_HELD, _spectrum_options(series, i, references, held, held_kinds), hashes))

    def final_held(i: int, record: dict) -> SpectrumOutcome:  # held errors with their correlations, as drawn
        outcome = outcome_from_record(series, i, record, STAGE_HELD)
        if trend is not None and outcome.fit is not None:
            _count_held_correlations(outcome, trend)
        return outcome

    final = lambda i, record: final_held(i, record).fit.to_dict()  # noqa: E731
    for i, record in runner.run(jobs, "fits with held values", final=final).items():
        outcomes[i] = final_held(i, record)
    for i, o in outcomes.items():
        _set_treatment(series, o, trend, references.get(i))
        if trend is not None and o.fit is not None:
            point = lw_from.index(i) if o.stage == STAGE_SLOW and i in lw_from else None
            if point is None and o.stage == STAGE_SLOW:
                _count_held_correlations(o, trend)
            o.shared_rate_errors = _shared_rate_errors(o, trend, point)
    return outcomes, trend, notes


def _shared_rate_errors(outcome: SpectrumOutcome, trend: StaticTrend, point: int | None) -> list[dict[str, float]]:
    """Per process, the parts of the rate's error shared through `trend` (:meth:`StaticTrend.shared_errors`);
    `point` is the spectrum's place among the linewidth trend's points when its own fit is one of them.
    Held values the user set are skipped: their errors are not the trend's."""
    fit, own = outcome.fit, outcome.spectrum.options.parameters
    names = [n for n in fit.parameters if n.startswith(RATE_PREFIX)]
    return [trend.shared_errors(outcome.spectrum.temperature_k, {n: v for n, v in r.held_shares.items() if n not in own},
                                None if point is None else (point, name))
            for name, r in zip(names, fit.rates)]


def _count_held_correlations(outcome: SpectrumOutcome, trend: StaticTrend) -> None:
    """Give each rate of a fit with held values the held error with the correlations of the trends' common
    basis (:meth:`StaticTrend.held_error`) in place of the fit's sum of independent shares: values held from
    lines measured in the same slow-exchange spectra err together.  Held values the user set keep their
    own, independent errors."""
    fit, own = outcome.fit, outcome.spectrum.options.parameters
    for k, rate in enumerate(fit.rates):
        if rate.held_shares:
            trended = {n: v for n, v in rate.held_shares.items() if n not in own}
            other = sum(v * v for n, v in rate.held_shares.items() if n in own)
            held = math.sqrt(other + trend.held_error(outcome.spectrum.temperature_k, trended) ** 2)
            fit.rates[k] = with_held_error(rate, held)


def fit_without_trends(series: Series, runner: FitRunner, hashes: Mapping, references: Mapping[int, dict]
                       ) -> dict[int, SpectrumOutcome]:
    """Fit every spectrum on its own (no quantity of a slow-exchange trend), a reference-line linewidth held;
    the outcomes by spectrum index, with each one's treatment recorded (parameters as in
    :func:`fit_with_trends`)."""
    jobs = [fit_job(series, i, STAGE_MAIN, _spectrum_options(series, i, references, {}), hashes)
            for i in range(len(series.spectra))]
    outcomes = {i: outcome_from_record(series, i, r, STAGE_MAIN) for i, r in runner.run(jobs, "fitting spectra").items()}
    for i, o in outcomes.items():
        _set_treatment(series, o, None, references.get(i))
    return outcomes


def _set_treatment(series: Series, outcome: SpectrumOutcome, trend: StaticTrend | None, reference: dict | None) -> None:
    """Record in `outcome` (treatment and a note) how each static quantity was treated in its final fit:
    "fitted", "trend", "model", "reference-line" or "user" (the series file's parameter settings)."""
    out = {}
    fit = outcome.fit
    for quantity, mode in series.treatments.items():
        prefix = PARAMETER_PREFIX[TREATMENT_KIND[quantity]]
        names = [n for n in (fit.lmfit_parameters if fit else ()) if n.startswith(prefix)]
        if not names:
            continue
        if any(n in outcome.spectrum.options.parameters for n in names):
            out[quantity] = "user"
        elif mode == REFERENCE_LINE:
            out[quantity] = "reference-line" if reference and "setting" in reference else "fitted"
        elif any(fit.lmfit_parameters[n].vary and not fit.lmfit_parameters[n].expr for n in names):
            out[quantity] = "fitted"
        elif mode == TREND and trend is not None and any(n in trend.lines for n in names):
            out[quantity] = "trend"
        else:
            out[quantity] = "model"
    outcome.treatment = out
    outcome.flags += [f"{how}-{quantity}" for quantity, how in out.items() if how in ("trend", "reference-line")]
    if out:
        outcome.notes.append(_treatment_note(out))
    held = [n for n, p in (fit.lmfit_parameters.items() if fit else ()) if trend and n in trend.lines and not p.vary]
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


