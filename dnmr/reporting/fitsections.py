"""The report's fits: the rate of a rates.csv row in words, each spectrum's fit with its figure and, when
``dnmr fit --posterior`` sampled it, its posterior beside the least-squares result; and the fits of the
magnetisation-transfer folders beside them.
"""
from __future__ import annotations

import math
from pathlib import Path

from dnmr.formatting import format_with_error, table_number
from dnmr.reporting.reporthtml import bullets, esc, figure_from_file, section, table
from dnmr.reporting.reportinputs import ReportInputs, TransferFolder

def rate_text(row: dict) -> str:
    """'k ± err', '< upper', '> lower' or the interval, from a rates.csv row."""
    status, k = row.get("status", ""), table_number(row.get("rate_per_s"))
    if status == "determined":
        return f"{k} ± {table_number(row.get('rate_stderr'), '.2g')}"
    if status == "upper-bound":
        return f"< {table_number(row.get('rate_upper'))} (best {k})"
    if status == "lower-bound":
        return f"> {table_number(row.get('rate_lower'))} (best {k})"
    if status == "interval":
        return f"{table_number(row.get('rate_lower'))} to {table_number(row.get('rate_upper'))} (best {k})"
    return k if status != "failed" else "fit failed"


def posterior_rate_text(row: dict) -> str:
    """The posterior rate of a rates.csv row: median with its 95 % interval, or the one-sided 95 % bound."""
    if row.get("posterior_rate_bound95"):
        return f"{'<' if row.get('status') == 'upper-bound' else '>'} {table_number(row['posterior_rate_bound95'])}"
    if row.get("posterior_rate_median"):
        return (f"{table_number(row['posterior_rate_median'])} ({table_number(row.get('posterior_rate_ci95_lower'))} to "
                f"{table_number(row.get('posterior_rate_ci95_upper'))})")
    return ""


def fit_figure_path(outdir: Path, spectrum: dict) -> Path:
    """Where ``dnmr fit`` drew the spectrum's data, fit and residuals (figures/NNN_<name>.png)."""
    return outdir / "figures" / f"{int(spectrum['index']):03d}_{Path(str(spectrum['file'])).stem}.png"


def posterior_figure_path(outdir: Path, spectrum: dict) -> Path:
    """Where ``dnmr fit --posterior`` drew the spectrum's pairwise posterior figure (figures/NNN_<name>_posterior.png)."""
    fit_figure = fit_figure_path(outdir, spectrum)
    return fit_figure.with_name(f"{fit_figure.stem}_posterior.png")


def _least_squares_text(name: str, fit: dict) -> str:
    """The least-squares result of one posterior quantity: the rate as in the rate table for
    ``rate_per_s_<process>`` and ``log10_rate_<process>`` (no error bar for a bound), else value ± error."""
    rate_names = [n for n in fit.get("parameters", {}) if n.startswith("log10_rate_")]
    rates = dict(zip(rate_names, fit.get("rates", [])))
    rate = rates.get("log10_rate_" + name[len("rate_per_s_"):]) if name.startswith("rate_per_s_") else None
    if rate is not None:
        return rate_text(rate)
    par = fit.get("parameters", {}).get(name) or {}
    value, stderr = par.get("estimate"), par.get("stderr")
    if value is None:
        return ""
    if name in rates and rates[name].get("status") != "determined":
        return f"{value:.4g} ({rates[name].get('status')}: no error bar)"
    return format_with_error(value, math.nan if stderr is None else stderr)


def _posterior_cells(q: dict) -> list[str]:
    """Posterior median, 68 % and 95 % intervals, or the one-sided 95 % bound, of one quantity."""
    kind = q.get("kind")
    if kind in ("upper-bound", "lower-bound"):
        sign = "<" if kind == "upper-bound" else ">"
        return ["", "", "", f"{sign} {table_number(q.get('bound95'))}"]
    if kind == "undetermined":
        return ["not determined: the posterior is the prior", "", "", ""]
    span = lambda pair: f"{table_number(pair[0])} to {table_number(pair[1])}" if pair else ""  # noqa: E731
    return [table_number(q.get("median")), span(q.get("ci68")), span(q.get("ci95")), ""]


def posterior_block(outdir: Path, s: dict) -> str:
    """The posterior of one spectrum's fit beside its least-squares result, its notes and its pairwise
    figure ('' when no posterior was sampled)."""
    post = s.get("posterior")
    if not post:
        return ""
    name = Path(str(s.get("file", "?"))).name
    head = f"<h4>Posterior ({'importance sampling' if post.get('method') == 'importance' else 'emcee'})</h4>"
    if "error" in post:
        return head + f"<p class=\"warn\">not sampled: {esc(post['error'])}</p>"
    fit = s.get("fit") or {}
    rows = [[q.get("label", n), _least_squares_text(n, fit), *_posterior_cells(q), q.get("reason", "")]
            for n, q in (post.get("quantities") or {}).items()]
    body = f"<p>{_sampler_text(post)} Likelihood {esc(post.get('likelihood', ''))}.</p>"
    body += table(["quantity", "least squares", "posterior median", "68 % interval", "95 % interval",
                   "one-sided 95 % bound", "why a bound"], rows, numeric=[False, True, True, True, True, True])
    body += bullets(post.get("notes", []), "muted")
    return head + body + figure_from_file(posterior_figure_path(outdir, s),
                                          f"{name}: posterior samples (pairwise posterior figure)", f"posterior of {name}")


def _sampler_text(post: dict) -> str:
    """How a posterior was sampled, in one sentence (escaped)."""
    if post.get("method") == "importance":
        info = post.get("importance") or {}
        return (f"{esc(info.get('draws'))} draws from {esc(info.get('proposal', 'the fit'))}, seed {esc(post.get('seed'))}; "
                f"about {table_number(info.get('effective_samples'), '.0f')} effective samples, Pareto shape of the "
                f"weights {table_number(info.get('pareto_k'), '.2f')}.")
    return (f"{esc(post.get('walkers'))} walkers × {esc(post.get('steps'))} steps, burn-in {esc(post.get('burn'))}, "
            f"thin {esc(post.get('thin'))}, seed {esc(post.get('seed'))}: {esc(post.get('samples'))} samples; "
            f"acceptance {table_number(post.get('acceptance_fraction'), '.2f')}.")


def _spectrum_block(outdir: Path, s: dict) -> str:
    name = Path(str(s.get("file", "?"))).name
    head = f"<h3>{esc(s.get('temperature_k'))} K — {esc(name)}</h3>"
    if s.get("status") != "fitted":
        return head + f"<p class=\"warn\">not fitted: {esc(s.get('error') or 'no reason recorded')}</p>"
    fit = s.get("fit") or {}
    rates = "; ".join(f"{r.get('process')}: {r.get('status')}" for r in fit.get("rates", []))
    facts = (f"<p>reduced chi-square {table_number(fit.get('reduced_chi_square'), '.3f')}; {esc(rates)}; "
             f"flags: {esc(', '.join(fit.get('flags', []) + s.get('flags', [])) or 'none')}.</p>")
    notes = bullets(list(s.get("notes", [])) + list(fit.get("notes", [])), "muted")
    return (head + facts + notes + figure_from_file(fit_figure_path(outdir, s), f"{name}: data, fit and residuals",
                                                    f"fit of {name}") + posterior_block(outdir, s))


def fits_section(inputs: ReportInputs) -> str:
    """The series stack and, per temperature, the fit with its residuals."""
    spectra = sorted(inputs.results["spectra"], key=lambda s: s.get("temperature_k") or 0.0)
    body = figure_from_file(inputs.outdir / "series_fits.png", "The series by temperature: measured spectra with the fitted lineshapes",
                            "series of fits")
    return section("fits", "Fits at each temperature", body + "".join(_spectrum_block(inputs.outdir, s) for s in spectra))


def _transfer_block(t: TransferFolder) -> str:
    r = t.results
    data = Path(str(r.get("data", "?"))).name
    head = f"<h3>{esc(r.get('experiment'))} at {esc(r.get('temperature_k'))} K — {esc(data)}</h3>"
    rows = [[row.get("process", ""), rate_text(row), row.get("status", ""), row.get("flags", "")] for row in t.rates]
    relaxation = "; ".join(f"{site} {table_number((v or {}).get('value'), '.4g')} s^-1"
                           for site, v in (r.get("relaxation_per_s") or {}).items())
    facts = (f"<p>chi-square {table_number(r.get('chi_square'))} for {esc(r.get('degrees_of_freedom'))} degrees of freedom "
             f"(reduced {table_number(r.get('reduced_chi_square'), '.3f')}); R1: {esc(relaxation or 'not recorded')}.</p>")
    notes = bullets([str(n) for n in r.get("notes", [])], "muted")
    figure = figure_from_file(t.folder / "fit.png", f"{data}: data, fitted curves and residuals", f"transfer fit of {data}")
    return (head + table(["process", "rate k / s^-1", "status", "flags"], rows, numeric=[False, True, False, False])
            + facts + notes + figure)


def transfer_section(inputs: ReportInputs) -> str:
    """The magnetisation-transfer fits named with ``--transfer``, by temperature ('' when none)."""
    if not inputs.transfer:
        return ""
    folders = sorted(inputs.transfer, key=lambda t: float(t.results.get("temperature_k") or 0.0))
    intro = (f"<p>{len(folders)} experiment{'s' if len(folders) > 1 else ''} by magnetisation transfer (dnmr transfer); "
             "their rates join the lineshape rates in the Eyring analysis, marked by method.</p>")
    return section("transfer", "Magnetisation-transfer fits", intro + "".join(_transfer_block(t) for t in folders))
