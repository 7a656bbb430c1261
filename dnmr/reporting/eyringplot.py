"""Figures of the activation analysis: the Eyring plot (ln(k/T) against 1000/T with residuals) and the rates
against temperature, with the fitted lines and their 95 % confidence bands.

Rates of lineshape fits alone take one hue per process; where other methods (magnetisation transfer, or
names of the user's own) join them, each method has its marker and hue and each process its line style.
"""
from __future__ import annotations

import numpy as np

from dnmr.reporting.plotting import (GREY, INK, PALETTE, SERIES, data_and_residual_axes, figure_text, plt,
                                     series_colour)

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
        style per process.  Everything is drawn inside the figure's edges (``inside`` of
        :func:`dnmr.io.output.figure_bytes`).
    """
    results = _as_list(results)
    fig, ax, res = data_and_residual_axes(figure, (6.4, 6.4), hspace=0.08)
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
