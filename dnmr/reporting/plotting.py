"""Figures. Every spectrum axis follows NMR convention: ppm running high to low, left to right.

matplotlib is used with the non-interactive Agg backend unless the caller already chose one.

Colours
-------
Every colour in dnmr's figures comes from :data:`PALETTE`, dnmr's own: five hues and four neutrals.
The hues were chosen so that every two of them stay apart for readers with a red-green or blue-yellow
colour-vision deficiency (simulated dichromacy) and so that they differ in lightness (CIE L* about 30,
42, 55, 68 and 81), which keeps them apart in a grey-scale print; tests/test_figures.py checks both.
Lines take the hues in :data:`SERIES` order (the light gold last: it is meant for fills rather than
thin lines).
"""
from __future__ import annotations

import re

import matplotlib

if matplotlib.get_backend().lower() not in ("agg", "module://matplotlib_inline.backend_inline"):
    matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from dnmr.errors import InputError  # noqa: E402

#: dnmr's palette: the only colours its figures use (sRGB hex).
PALETTE = {
    "indigo": "#074587",     # CIE L* 29.5
    "plum": "#9e4371",       # L* 42.0
    "vermilion": "#d95b3c",  # L* 54.6
    "teal": "#4bb5a5",       # L* 67.5
    "gold": "#f4c442",       # L* 81.3
    "ink": "#000000",        # text, axes, measured data
    "grey": "#a3a3a3",       # baselines, zero lines, references
    "pale": "#e6e6e6",       # background bands (noise)
    "paper": "#ffffff",      # background
}
#: The order in which series (processes, quantities) take the hues.
SERIES = ("indigo", "vermilion", "plum", "teal", "gold")
INK, GREY, PALE = PALETTE["ink"], PALETTE["grey"], PALETTE["pale"]
FIT_COLOUR = PALETTE["vermilion"]  # a fitted spectrum beside the measured one (ink)
#: Exchange regimes of ``dnmr timescale --plot``: dark to light from slow to fast.
REGIME_COLOURS = {"slow": PALETTE["indigo"], "intermediate": PALETTE["vermilion"], "fast": PALETTE["gold"]}
#: The window of magnetisation transfer in the same figure.
TRANSFER_COLOUR = PALETTE["teal"]


def series_colour(index: int) -> str:
    """Hue of the `index`-th series (0-based), cycling through :data:`SERIES`."""
    return PALETTE[SERIES[index % len(SERIES)]]


#: Marker and hue of the rates of each method in an Eyring figure that joins several methods.
METHOD_STYLES = {"lineshape": ("o", "indigo"), "inversion": ("^", "vermilion"), "saturation": ("s", "plum"),
                 "exchange-2d": ("D", "teal")}
#: Markers for methods of the user's own naming, in order of appearance (hues cycle through SERIES).
OTHER_METHOD_MARKERS = ("v", "P", "X", "h", "<", ">")
#: Line styles that tell the processes apart when the hues mark the methods.
PROCESS_LINE_STYLES = ("-", "--", ":", "-.")


def method_styles(methods) -> dict[str, tuple[str, str]]:
    """Marker and colour (from :data:`PALETTE`) of each method: fixed for dnmr's methods, the next free
    marker and hue for others."""
    out, others = {}, 0
    for method in methods:
        if method in METHOD_STYLES:
            marker, hue = METHOD_STYLES[method]
        else:
            marker = OTHER_METHOD_MARKERS[others % len(OTHER_METHOD_MARKERS)]
            hue = SERIES[(len(METHOD_STYLES) + others) % len(SERIES)]
            others += 1
        out[method] = (marker, PALETTE[hue])
    return out


_SUPERSCRIPT = str.maketrans("⁻⁰¹²³⁴⁵⁶⁷⁸⁹", "-0123456789")
_FIGURE_SYMBOLS = ((re.compile(r"\bd([HSG])‡"), r"Δ\1‡"), (re.compile(r"\bdnu\b"), "Δν"),
                   (re.compile(r"\blog10\("), r"log$_{10}$("), (re.compile(r"<->"), "↔"),
                   (re.compile(r"\b(1|2|13|15|17|19|29|31)(H|C|N|O|F|Si|P)\b"), r"$^{\1}$\2"),
                   (re.compile(r"\^(-?\d+)"), r"$^{\1}$"),
                   (re.compile(r"\b(\d(?:\.\d+)?)e\+?(-?)0*(\d+)\b"), r"\1×10$^{\2\3}$"),
                   (re.compile(r"[⁻⁰¹²³⁴⁵⁶⁷⁸⁹]+"), lambda m: f"$^{{{m.group().translate(_SUPERSCRIPT)}}}$"))


def figure_text(text: str) -> str:
    """Plain report text made fit for a figure: real superscripts (``s^-1``, ``s⁻¹`` -> s$^{-1}$), a
    subscript in log$_{10}$, 1.2×10$^{4}$ for 1.2e+04, ΔH‡/ΔS‡/ΔG‡ for dH‡/dS‡/dG‡, Δν for dnu, ↔ for
    <->, a nucleus as $^{13}$C; a literal $ stays one."""
    text = text.replace("$", r"\$")
    for pattern, replacement in _FIGURE_SYMBOLS:
        text = pattern.sub(replacement, text)
    return text


def nmr_axis(ax, label: str = "chemical shift / ppm") -> None:
    """Label an x axis in ppm and run it high to low (NMR convention)."""
    ax.set_xlabel(label)
    if not ax.xaxis_inverted():
        ax.invert_xaxis()


def plot_spectrum(spectrum, ax=None, ylabel: str = "intensity / Hz$^{-1}$", **line_kwargs):
    """Absorption of a spectrum against ppm (high to low), titled with its title if it has one; returns
    the Axes.

    Without a ``color``, each spectrum drawn into the same Axes takes the next hue of :data:`SERIES`.
    """
    if ax is None:
        _, ax = plt.subplots(figsize=(7, 3.5))
    line_kwargs.setdefault("color", series_colour(len(ax.lines)))
    ax.plot(spectrum.ppm, spectrum.intensity, lw=1.0, **line_kwargs)
    nmr_axis(ax)
    ax.set_ylabel(ylabel)
    if getattr(spectrum, "title", ""):
        ax.set_title(figure_text(spectrum.title))
    return ax


def scale_note(scale: float) -> str:
    """'  (×3.2)' beside a stacked trace drawn `scale` times taller than it is; '' for a trace drawn as it is
    (within 5 %)."""
    return "" if abs(scale - 1.0) < 0.05 else f"  (×{scale:.1f})"


def plot_stack(spectra, labels, ax=None, title: str = ""):
    """Spectra stacked bottom to top with a label beside each (the usual VT or rate series figure).

    Parameters
    ----------
    spectra : sequence of Spectrum
        One per trace, drawn from the bottom up.
    labels : sequence of str
        Text beside each trace (a temperature or a rate).
    """
    if ax is None:
        _, ax = plt.subplots(figsize=(6.5, 1.0 + 0.8 * len(spectra)))
    peak = max(float(s.intensity.max()) for s in spectra)
    step = 1.05 * peak
    for i, (s, label) in enumerate(zip(spectra, labels)):
        scale = peak / max(float(s.intensity.max()), 1e-300)
        scale = min(scale, 8.0)  # broad traces are enlarged, at most eightfold, to stay readable
        ax.plot(s.ppm, i * step + s.intensity * scale, color=INK, lw=0.9)
        note = figure_text(label) + scale_note(scale)
        ax.text(s.ppm.min(), i * step + 0.25 * step, " " + note, va="center", ha="left", fontsize=8)
    nmr_axis(ax)
    ax.set_yticks([])
    for side in ("left", "right", "top"):
        ax.spines[side].set_visible(False)
    if title:
        ax.set_title(figure_text(title))
    return ax


# --- activation analysis: Eyring plot and rates against temperature ---------------------------

def _kilo_reciprocal(x):
    """1000 / x, quiet at x = 0 (matplotlib probes the axis transform there)."""
    with np.errstate(divide="ignore"):
        return 1e3 / np.asarray(x, dtype=float)


def _eyring_ordinate(ln_rate, temperature_k):
    return ln_rate - np.log(temperature_k)


def _rate_ordinate(ln_rate, temperature_k):
    return np.exp(ln_rate)


def _draw_bounds(ax, bounds, x_of, y_of, colour) -> None:
    """Bounds as open markers: arrows away from a one-sided bound, a bar between two."""
    for b in bounds:
        x = x_of(b.temperature_k)
        ends = [y_of(np.log(v), b.temperature_k) for v in (b.rate_lower, b.rate_upper) if np.isfinite(v)]
        ax.plot([x] * len(ends), ends, "o-", mfc="none", color=colour, lw=1)
        if len(ends) == 1:
            up = np.isfinite(b.rate_lower)
            ax.annotate("", xy=(x, ends[0]), xytext=(0, 22 if up else -22), textcoords="offset points",
                        arrowprops={"arrowstyle": "<-", "color": colour})


def _draw_activation_series(ax, result, colour, x_of, y_of, residual_ax=None, *, styles=None,
                            line_style: str = "-", line_label: str | None = None, labelled=()) -> None:
    """Points with 1-sigma bars, the fitted line with its 95 % band, outliers ringed, bounds.

    With `styles` (method -> marker, colour) the points of each method take its marker and colour, the
    line (drawn `line_style`, in the legend as `line_label`) and band take `colour`; methods already in
    `labelled` get no second legend entry.
    """
    t = result.temperature_k
    ln_k, sigma = np.log(result.rate_per_s), result.ln_rate_stderr
    y = y_of(ln_k, t)
    bars = np.array([y - y_of(ln_k - sigma, t), y_of(ln_k + sigma, t) - y])
    name = figure_text(result.process) if result.process else "rates"
    groups = ({m: (result.methods == m, *styles[m]) for m in result.method_names} if styles
              else {None: (np.ones(len(t), dtype=bool), "o", colour)})
    for method, (rows, marker, hue) in groups.items():
        label = name if method is None else (None if method in labelled else figure_text(method))
        if rows.any():
            ax.errorbar(x_of(t[rows]), y[rows], yerr=bars[:, rows], fmt=marker, color=hue, ms=5, capsize=2, label=label)
        if residual_ax is not None and rows.any():
            residual_ax.errorbar(x_of(t[rows]), result.eyring.residuals[rows], yerr=sigma[rows], fmt=marker, color=hue,
                                 ms=4, capsize=2)
    t_all = np.concatenate([t, [b.temperature_k for b in result.bounds]])
    grid = np.linspace(t_all.min(), t_all.max(), 200)
    fit, se = result.ln_rate(grid)
    q = result.band_quantile
    ax.plot(x_of(grid), y_of(fit, grid), line_style, color=colour, lw=1.2, label=line_label)
    if np.isfinite(q) and np.isfinite(se).all():
        ax.fill_between(x_of(grid), y_of(fit - q * se, grid), y_of(fit + q * se, grid), color=colour, alpha=0.18, lw=0,
                        label=f"{label}: 95 % confidence band")
    out = result.outliers
    if out.any():
        ax.plot(x_of(t[out]), y[out], "o", ms=12, mfc="none", mec=INK, mew=1.2)
    for bound in result.bounds:
        _draw_bounds(ax, [bound], x_of, y_of, styles[bound.method][1] if styles else colour)


def _as_list(results):
    return list(results) if isinstance(results, (list, tuple)) else [results]


def _draw_activation_results(ax, results, x_of, y_of, residual_ax=None) -> None:
    """Every result into `ax`: one hue per process; or, when rates of magnetisation transfer (or of any
    method but lineshapes) are among them, one marker and hue per method and one line style per process."""
    methods = list(dict.fromkeys(m for r in results for m in r.method_names))
    if methods == ["lineshape"]:
        for i, result in enumerate(results):
            _draw_activation_series(ax, result, series_colour(i), x_of, y_of, residual_ax)
        return
    styles, labelled = method_styles(methods), set()
    for i, result in enumerate(results):
        name = figure_text(result.process) if result.process else f"process {i + 1}"
        _draw_activation_series(ax, result, INK, x_of, y_of, residual_ax, styles=styles,
                                line_style=PROCESS_LINE_STYLES[i % len(PROCESS_LINE_STYLES)],
                                line_label=name if len(results) > 1 else None, labelled=labelled)
        labelled |= set(result.method_names)


def plot_eyring(results, *, figure=None):
    """Eyring plot: ln(k/T) against 1000/T with the fitted lines, 95 % confidence bands and residuals.

    Parameters
    ----------
    results : EyringResult or list of EyringResult
        One or several processes (drawn in one plot).
    figure : matplotlib Figure, optional
        Figure to draw into (default: a new one).

    Returns
    -------
    matplotlib.figure.Figure
        Error bars are one standard error of ln k; bounds are open markers (arrows point away from a
        one-sided bound); possible outliers are ringed.  Rates of lineshape fits alone take one hue per
        process; where other methods (inversion, saturation, exchange-2d, or names of your own) join them,
        each method has its marker and hue (:data:`METHOD_STYLES`) and the lines are black, one line
        style per process.
    """
    results = _as_list(results)
    fig = figure if figure is not None else plt.figure(figsize=(6.4, 6.4))
    ax, res = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1], "hspace": 0.08})
    _draw_activation_results(ax, results, _kilo_reciprocal, _eyring_ordinate, residual_ax=res)
    ax.set_ylabel(r"ln($k$ / $T$)   ($k$ in s$^{-1}$, $T$ in K)")
    top = ax.secondary_xaxis("top", functions=(_kilo_reciprocal, _kilo_reciprocal))
    top.set_xlabel(r"$T$ / K")
    res.axhline(0.0, color=GREY, lw=0.8)
    res.set_ylabel("residual")
    res.set_xlabel(r"1000 / $T$  (K$^{-1}$)")
    ax.legend(frameon=False)
    return fig


def plot_rates(results, *, figure=None):
    """Rate constants against temperature (log scale) with the fitted Eyring curves and 95 % bands.

    Parameters
    ----------
    results : EyringResult or list of EyringResult
    figure : matplotlib Figure, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    results = _as_list(results)
    fig = figure if figure is not None else plt.figure(figsize=(6.4, 4.8))
    ax = fig.subplots()
    _draw_activation_results(ax, results, lambda t: t, _rate_ordinate)
    ax.set_yscale("log")
    ax.set_xlabel(r"$T$ / K")
    ax.set_ylabel(r"$k$ / s$^{-1}$")
    ax.legend(frameon=False)
    return fig


# --- spectrum fits: data against fit, one spectrum or a whole series --------------------------

def plot_spectrum_fit(fit, *, figure=None):
    """Data, fitted spectrum and residuals of one fit against ppm (high to low).

    Parameters
    ----------
    fit : SpectrumFit
        The fit (see :func:`dnmr.fitting.spectrumfit.fit_spectrum`).
    figure : matplotlib Figure, optional
        Figure to draw into (default: a new one).

    Returns
    -------
    matplotlib.figure.Figure
        Upper panel: data (black), fit (orange-red), baseline (grey, dashed); lower panel: data - fit
        with the band of ±2 noise standard deviations.
    """
    fig = figure if figure is not None else plt.figure(figsize=(7.0, 4.8))
    ax, res = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1], "hspace": 0.06})
    ax.plot(fit.ppm, fit.data, color=INK, lw=0.8, label="data")
    ax.plot(fit.ppm, fit.fitted, color=FIT_COLOUR, lw=1.1, label="fit")
    ax.plot(fit.ppm, fit.baseline, color=GREY, lw=0.8, ls="--", label="baseline")
    ax.set_ylabel("intensity")
    ax.legend(frameon=False, fontsize=8, loc="upper right")
    text = "\n".join(figure_text(f"{r.process}: {r.describe().split('   ')[0]}") for r in fit.rates)
    ax.text(0.01, 0.97, text, transform=ax.transAxes, va="top", ha="left", fontsize=8)
    band = 2.0 * fit.noise.sigma
    res.axhspan(-band, band, color=PALE, lw=0)
    label_band(res, "±2σ of the noise")
    res.plot(fit.ppm, fit.residuals, color=INK, lw=0.6)
    res.set_ylabel("residual")
    nmr_axis(res)
    from pathlib import Path

    name = Path(fit.source).name if fit.source else "spectrum"
    ax.set_title(figure_text(name) + (f", {fit.temperature_k:g} K" if fit.temperature_k else ""), fontsize=10)
    return fig


def plot_transfer_fit(fit, *, figure=None):
    """Integrals (or 2D volumes) against delay, saturation or mixing time, the fitted curves and residuals.

    Parameters
    ----------
    fit : TransferFit
        The fit (see :func:`dnmr.fitting.transfer.fit_transfer`).
    figure : matplotlib Figure, optional
        Figure to draw into (default: a new one).

    Returns
    -------
    matplotlib.figure.Figure
        Upper panel: the data of each site (or peak) as points, the fitted model as a line; lower panel:
        data - fit.
    """
    exp = fit.experiment
    times = exp.data.times_s
    fig = figure if figure is not None else plt.figure(figsize=(6.8, 5.0))
    ax, res = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1], "hspace": 0.06})
    grid = np.linspace(0.0, float(times.max()), 300)
    dense, data, residuals = fit.curve(grid), exp.data.values, fit.residuals
    if exp.experiment == "exchange-2d":
        n = len(exp.data.sites)
        pairs = [(i, j) for i in range(n) for j in range(n)]
        labels = [f"{exp.data.sites[j]} → {exp.data.sites[i]}" for i, j in pairs]
        dense, data, residuals = (a.reshape(a.shape[0], n * n) for a in (dense, data, residuals))
    else:
        labels = list(exp.data.sites)
    two_d = exp.experiment == "exchange-2d"
    for c, label in enumerate(labels):
        colour = series_colour(c)
        marker = "s" if two_d and c % (len(exp.data.sites) + 1) == 0 else "o"  # diagonal peaks as squares
        ax.plot(grid, dense[:, c], color=colour, lw=1.1)
        ax.plot(times, data[:, c], marker, color=colour, ms=4, label=label)
        res.plot(times, residuals[:, c], marker, color=colour, ms=3)
    res.axhline(0.0, color=GREY, lw=0.8)
    axis = {"inversion": "delay", "saturation": "saturation time", "exchange-2d": "mixing time"}[exp.experiment]
    res.set_xlabel(f"{axis} / s")
    res.set_ylabel("residual")
    ax.set_ylabel("peak volume" if exp.experiment == "exchange-2d" else "integral")
    if two_d:
        ax.legend(frameon=False, fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    else:
        ax.legend(frameon=False, fontsize=8, loc="lower right")
    text = "\n".join(f"{r.process}: {r.describe().split('   ')[0]}" for r in fit.rates)
    ax.set_title(figure_text(f"{exp.experiment}, {exp.temperature_k:g} K\n{text}"), fontsize=9)
    return fig


def plot_fit_stack(fits, labels, *, figure=None, title: str = ""):
    """Measured (black) and fitted (orange-red) spectra of a series, stacked bottom to top.

    Parameters
    ----------
    fits : sequence of SpectrumFit
        One per trace, drawn from the bottom up; each trace is scaled to its own tallest point.
    labels : sequence of str
        Text beside each trace (its temperature).

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, ax = _stack_axes(figure, len(fits), 0.9)
    heights = [max(float(np.max(fit.fitted - fit.baseline)), 1e-300) for fit in fits]
    for i, (fit, label, height) in enumerate(zip(fits, labels, heights)):
        baseline = fit.baseline
        ax.plot(fit.ppm, i + (fit.data - baseline) / height * 0.85, color=INK, lw=0.7)
        ax.plot(fit.ppm, i + (fit.fitted - baseline) / height * 0.85, color=FIT_COLOUR, lw=0.9)
        note = figure_text(label) + scale_note(max(heights) / height)
        ax.text(fit.ppm.max(), i + 0.3, " " + note, va="center", ha="left", fontsize=8)
    return _finish_stack(fig, ax, title or "measured (black) and fitted (orange-red); ×: enlarged against the tallest trace")


def label_band(ax, text: str) -> None:
    """A key entry naming the pale residual band of `ax` (what the band spans)."""
    from matplotlib.patches import Patch

    ax.legend(handles=[Patch(facecolor=PALE, edgecolor=GREY, lw=0.5, label=figure_text(text))], frameon=False,
              fontsize=7, loc="upper right", borderaxespad=0.1)


def _stack_axes(figure, traces: int, inches_per_trace: float):
    """The figure (a new one unless given) and its one axes for `traces` stacked traces."""
    fig = figure if figure is not None else plt.figure(figsize=(6.5, 1.2 + inches_per_trace * traces))
    return fig, fig.subplots()


def _finish_stack(fig, ax, title: str):
    """A ppm axis (high to low), no y axis or frame but the bottom, and the title; returns `fig`."""
    nmr_axis(ax)
    ax.set_yticks([])
    for side in ("left", "right", "top"):
        ax.spines[side].set_visible(False)
    ax.set_title(figure_text(title), fontsize=10)
    return fig


def plot_residual_stack(fits, labels, *, figure=None, title: str = ""):
    """Residuals over the noise, (data - fit) / sigma, of a series' spectra, stacked bottom to top.

    Parameters
    ----------
    fits : sequence of SpectrumFit
        One per trace, drawn from the bottom up, each divided by its own noise (``fit.noise.sigma``),
        clipped at +-5 and drawn 10 units above the last; a pale band marks +-3.
    labels : sequence of str
        Text beside each trace (its temperature).

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, ax = _stack_axes(figure, len(fits), 0.7)
    label_band(ax, "±3σ of the noise")
    for i, (fit, label) in enumerate(zip(fits, labels)):
        ax.axhspan(10 * i - 3, 10 * i + 3, color=PALE, lw=0)
        ax.plot(fit.ppm, 10 * i + np.clip(fit.residuals / fit.noise.sigma, -5, 5), color=INK, lw=0.5)
        ax.text(fit.ppm.max(), 10 * i, " " + figure_text(label), va="center", ha="left", fontsize=8)
    return _finish_stack(fig, ax, title or "residuals over the noise (grey: within 3σ; clipped at 5)")


# --- posterior samples: the pairwise posterior figure -------------------------------------------

PAIRS_HUE = PALETTE["indigo"]  # credible regions and marginal densities
TRUE_VALUE_COLOUR = PALETTE["vermilion"]
REGION_ALPHA = {0.95: 0.28, 0.68: 0.7}  # lighter: the 95 % region; darker: the 68 % region inside it
MARGINAL_ALPHA = (0.22, 0.55)  # a marginal density; its 95 % interval (or the side of its one-sided bound)
#: The key printed under the figure.
PAIRS_KEY = ("pairs: 68 % (dark) and 95 % (light) credible regions;  ● medians\n"
             "diagonal: density, 95 % interval (or the side of a one-sided 95 % bound) darker;  | median or bound\n"
             "r: correlation coefficient;  ◆ ▲ true values")
KEY_HEIGHT_IN, LABELS_HEIGHT_IN = 0.45, 1.0  # room under the panels for the axis labels and the key


def _credible_levels(density: np.ndarray, masses=(0.95, 0.68)) -> list[float]:
    """Density levels enclosing `masses` of a 2-D histogram (highest-density regions), ascending."""
    flat = np.sort(density.ravel())[::-1]
    cumulative = np.cumsum(flat) / flat.sum()
    levels = [float(flat[min(np.searchsorted(cumulative, m), flat.size - 1)]) for m in masses]
    return sorted(set(levels))


def _fixed(value: float, decimals: int) -> str:
    return f"{value:.{decimals}f}".replace("-", "−")


def _marginal_numbers(x: np.ndarray, one_sided: str | None) -> tuple[tuple[float, float], float, str]:
    """The shaded range of a marginal, where its tick goes, and its text: the 95 % central interval with
    the median (rounded to two significant digits of the interval's half-width), or the one-sided 95 %
    bound (the range from the lowest or to the highest sample)."""
    if one_sided in ("upper-bound", "lower-bound"):
        upper = one_sided == "upper-bound"
        bound = float(np.percentile(x, 95.0 if upper else 5.0))
        shaded = (float(x.min()), bound) if upper else (bound, float(x.max()))
        return shaded, bound, f"{'<' if upper else '>'} {bound:.3g}".replace("-", "−") + "\n(95 % bound)"
    low, median, high = (float(v) for v in np.percentile(x, [2.5, 50.0, 97.5]))
    half = 0.5 * (high - low)
    decimals = int(max(0, 1 - np.floor(np.log10(half)))) if half > 0 else 3
    numbers = f"{_fixed(median, decimals)}\n95 %: {_fixed(low, decimals)} to {_fixed(high, decimals)}"
    return (low, high), median, numbers


def _draw_marginal(ax, x: np.ndarray, span: tuple[float, float], bins: int, one_sided: str | None) -> None:
    """Smoothed density filled lightly, its 95 % interval (or bound side) darker, the median (or bound)
    as a tick, the numbers in the upper left."""
    from scipy.ndimage import gaussian_filter1d

    counts, edges = np.histogram(x, bins=2 * bins, range=span, density=True)
    centres = 0.5 * (edges[1:] + edges[:-1])
    density = gaussian_filter1d(counts, 1.5)
    (low, high), tick, text = _marginal_numbers(x, one_sided)
    ax.fill_between(centres, density, color=PAIRS_HUE, alpha=MARGINAL_ALPHA[0], lw=0)
    inside = (centres >= low) & (centres <= high)
    ax.fill_between(centres, density, where=inside, color=PAIRS_HUE, alpha=MARGINAL_ALPHA[1], lw=0,
                    interpolate=True)
    ax.plot(centres, density, color=PAIRS_HUE, lw=0.9)
    ax.plot([tick, tick], [0.0, float(np.interp(tick, centres, density))], color=INK, lw=1.2)
    ax.set_ylim(0.0, 1.55 * float(density.max()))
    ax.text(0.03, 0.96, text, transform=ax.transAxes, ha="left", va="top", fontsize=7.5, color=INK)


def _draw_pair(ax, xs: np.ndarray, ys: np.ndarray, spans, bins: int) -> None:
    """68 % and 95 % highest-density regions of two quantities, filled, with their median as a dot."""
    from scipy.ndimage import gaussian_filter

    hist, xe, ye = np.histogram2d(xs, ys, bins=bins, range=spans)
    density = gaussian_filter(hist.T, 1.0)
    centres = 0.5 * (xe[1:] + xe[:-1]), 0.5 * (ye[1:] + ye[:-1])
    levels = _credible_levels(density)
    top = float(density.max())
    if len(levels) == 2 and levels[0] < levels[1] < top:
        for level, mass in zip(levels, (0.95, 0.68)):
            ax.contourf(*centres, density, levels=[level, top * 1.01], colors=[PAIRS_HUE],
                        alpha=REGION_ALPHA[mass])
        ax.contour(*centres, density, levels=levels[:1], colors=[PAIRS_HUE], linewidths=0.8)
    else:  # too few distinct samples for regions: show the samples themselves
        ax.plot(xs, ys, ".", color=PAIRS_HUE, ms=1.5, alpha=0.4)
    ax.plot(np.median(xs), np.median(ys), "o", color=INK, ms=3)


def _mark_true_values(ax, x_true: float | None, y_true: float | None) -> None:
    """A diamond where both true values are known; else a triangle on the axis of the one that is."""
    style = {"color": TRUE_VALUE_COLOUR, "mec": INK, "mew": 0.6, "clip_on": False, "zorder": 5}
    if x_true is not None and y_true is not None:
        ax.plot(x_true, y_true, "D", ms=6, **style)
    elif x_true is not None:
        ax.plot(x_true, 0.0, "^", ms=7, transform=ax.get_xaxis_transform(), **style)
    elif y_true is not None:
        ax.plot(0.0, y_true, ">", ms=7, transform=ax.get_yaxis_transform(), **style)


def _correlation_text(r: float) -> str:
    """``r = −0.97``; three decimals from |r| = 0.99 on, where two would round to ±1."""
    return f"r = {r:+.{3 if abs(r) >= 0.99 else 2}f}".replace("-", "−")


def _show_correlation(ax, r: float) -> None:
    """The correlation coefficient of a pair, in the cell mirroring its panel."""
    ax.set_axis_off()
    weight = "bold" if abs(r) >= 0.9 else "normal"
    ax.text(0.5, 0.5, _correlation_text(r), transform=ax.transAxes, ha="center", va="center",
            fontsize=10, color=INK, fontweight=weight)


def _two_lines(label: str) -> str:
    """A long axis label on two lines: after "name:", else before "/ unit"."""
    return label.replace(": ", ":\n", 1) if ": " in label else label.replace(" / ", "\n/ ", 1)


def _spans(x: np.ndarray) -> list[tuple[float, float]]:
    """Axis range of each column: the central 99.6 % of its samples, padded by 5 %."""
    spans = []
    for column in x.T:
        lo, hi = np.percentile(column, [0.2, 99.8])
        pad = 0.05 * (hi - lo) if hi > lo else max(abs(lo) * 1e-3, 1e-12)
        spans.append((float(lo - pad), float(hi + pad)))
    return spans


def _label_axes(grid, labels: list[str]) -> None:
    """Tick labels and axis labels on the outer panels of the lower triangle only."""
    p = len(labels)
    for i in range(p):
        for j in range(i + 1):
            ax = grid[i, j]
            ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4, prune="both"))
            ax.tick_params(labelsize=8, colors=INK)
            if i < p - 1:
                ax.set_xticklabels([])
            else:
                ax.set_xlabel(labels[j])
                ax.tick_params(axis="x", labelrotation=45)
            if i == j:
                ax.set_yticks([])
                for side in ("left", "right", "top"):
                    ax.spines[side].set_visible(False)
                continue
            ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4, prune="both"))
            if j > 0:
                ax.set_yticklabels([])
            else:
                ax.set_ylabel(labels[i])


def plot_posterior_pairs(samples, labels, *, true_values=None, one_sided=None, bins: int | None = None,
                         figure=None, **renamed):
    """Pairwise posterior figure: every quantity's density, every pair's credible regions, correlations.

    Parameters
    ----------
    samples : (n, p) array
        Samples of p quantities (2 to 6 read best), in their units.
    labels : sequence of str
        Axis label (with unit) of each quantity.
    true_values : sequence of float or None, optional
        Known values to mark (None for a quantity without one): a diamond on the pairs where both are
        known, a triangle on the axis otherwise.
    one_sided : sequence of str or None, optional
        Per quantity "upper-bound" or "lower-bound" to shade and state only its one-sided 95 % bound
        instead of the median and 95 % interval.
    bins : int, optional
        Bins per axis of the 2-D densities (default from the number of samples, 20 to 50).
    figure : matplotlib Figure, optional
        Figure to draw into (default: a new one).

    Returns
    -------
    matplotlib.figure.Figure
        A p x p grid: on the diagonal each quantity's smoothed density with its 95 % central interval
        shaded darker, a tick at the median and the numbers; below it, each pair's 68 % and 95 %
        highest-density regions, filled, with the medians as a dot; above it, each pair's correlation
        coefficient r.  A key under the figure says what is drawn.
    """
    _refuse_renamed(renamed, {"truths": "true_values"})
    x = np.atleast_2d(np.asarray(samples, dtype=float))
    n, p = x.shape
    if len(labels) != p:
        raise InputError(f"{p} quantities but {len(labels)} labels", where="labels")
    true_values = [None] * p if true_values is None else list(true_values)
    one_sided = [None] * p if one_sided is None else list(one_sided)
    labels = [_two_lines(figure_text(label)) if len(label) > 16 else figure_text(label) for label in labels]
    bins = bins or int(np.clip(np.sqrt(n) / 2, 20, 50))
    spans = _spans(x)
    size = 2.0 * p + 0.8
    fig = figure if figure is not None else plt.figure(figsize=(size, size + KEY_HEIGHT_IN))
    grid = np.atleast_2d(fig.subplots(p, p, squeeze=False))
    correlation = np.corrcoef(x, rowvar=False) if p > 1 else np.ones((1, 1))
    for i in range(p):
        for j in range(p):
            ax = grid[i, j]
            if j > i:
                _show_correlation(ax, float(correlation[i, j]))
                continue
            if i == j:
                _draw_marginal(ax, x[:, j], spans[j], bins, one_sided[j])
                _mark_true_values(ax, true_values[j], None)
            else:
                _draw_pair(ax, x[:, j], x[:, i], [spans[j], spans[i]], bins)
                _mark_true_values(ax, true_values[j], true_values[i])
                ax.set_ylim(spans[i])
            ax.set_xlim(spans[j])
    _label_axes(grid, labels)
    height = fig.get_figheight()
    fig.subplots_adjust(hspace=0.08, wspace=0.08, bottom=(KEY_HEIGHT_IN + LABELS_HEIGHT_IN) / height)
    fig.text(0.5, 0.1 / height, PAIRS_KEY, ha="center", va="bottom", fontsize=7, color=INK, linespacing=1.4)
    return fig


def _refuse_renamed(given: dict, renamed: dict[str, str]) -> None:
    """An :class:`InputError` naming the new name of a keyword that was renamed; a TypeError for others."""
    for old in given:
        if old in renamed:
            raise InputError(f"the keyword {old!r} was renamed to {renamed[old]!r}", where=old)
        raise TypeError(f"unexpected keyword argument {old!r}")


def plot_corner(*args, **kwargs):
    """Renamed to :func:`plot_posterior_pairs` (its keyword ``truths`` to ``true_values``)."""
    raise InputError("dnmr.reporting.plotting.plot_corner was renamed to plot_posterior_pairs (and its keyword "
                     "'truths' to 'true_values'); the figure's look changed too", where="plot_corner")
