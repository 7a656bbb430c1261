"""Figures. Every spectrum axis follows NMR convention: ppm running high to low, left to right.

matplotlib is used with the non-interactive Agg backend unless the caller already chose one.
"""
from __future__ import annotations

import matplotlib

if matplotlib.get_backend().lower() not in ("agg", "module://matplotlib_inline.backend_inline"):
    matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402


def nmr_axis(ax, label: str = "chemical shift / ppm") -> None:
    """Label an x axis in ppm and run it high to low (NMR convention)."""
    ax.set_xlabel(label)
    if not ax.xaxis_inverted():
        ax.invert_xaxis()


def plot_spectrum(spectrum, ax=None, **line_kwargs):
    """Absorption of a spectrum against ppm (high to low); returns the Axes."""
    if ax is None:
        _, ax = plt.subplots(figsize=(7, 3.5))
    ax.plot(spectrum.ppm, spectrum.intensity, lw=1.0, **line_kwargs)
    nmr_axis(ax)
    ax.set_ylabel("intensity / Hz$^{-1}$")
    if spectrum.title:
        ax.set_title(spectrum.title)
    return ax


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
        ax.plot(s.ppm, i * step + s.intensity * scale, color="k", lw=0.9)
        note = label if scale == 1.0 else f"{label}  (x{scale:.1f})"
        ax.text(s.ppm.min(), i * step + 0.25 * step, " " + note, va="center", ha="left", fontsize=8)
    nmr_axis(ax)
    ax.set_yticks([])
    for side in ("left", "right", "top"):
        ax.spines[side].set_visible(False)
    if title:
        ax.set_title(title)
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


def _draw_activation_series(ax, result, colour, x_of, y_of, residual_ax=None) -> None:
    """Points with 1-sigma bars, the fitted line with its 95 % band, outliers ringed, bounds."""
    t = result.temperature_k
    ln_k, sigma = np.log(result.rate_per_s), result.ln_rate_stderr
    y = y_of(ln_k, t)
    bars = [y - y_of(ln_k - sigma, t), y_of(ln_k + sigma, t) - y]
    label = result.process or "rates"
    ax.errorbar(x_of(t), y, yerr=bars, fmt="o", color=colour, ms=5, capsize=2, label=label)
    t_all = np.concatenate([t, [b.temperature_k for b in result.bounds]])
    grid = np.linspace(t_all.min(), t_all.max(), 200)
    fit, se = result.ln_rate(grid)
    q = result.band_quantile
    ax.plot(x_of(grid), y_of(fit, grid), "-", color=colour, lw=1.2)
    if np.isfinite(q) and np.isfinite(se).all():
        ax.fill_between(x_of(grid), y_of(fit - q * se, grid), y_of(fit + q * se, grid), color=colour, alpha=0.18, lw=0)
    out = result.outliers
    if out.any():
        ax.plot(x_of(t[out]), y[out], "o", ms=12, mfc="none", mec="crimson", mew=1.5)
    _draw_bounds(ax, result.bounds, x_of, y_of, colour)
    if residual_ax is not None:
        residual_ax.errorbar(x_of(t), result.eyring.residuals, yerr=sigma, fmt="o", color=colour, ms=4, capsize=2)


def _as_list(results):
    return list(results) if isinstance(results, (list, tuple)) else [results]


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
        one-sided bound); possible outliers are ringed.
    """
    results = _as_list(results)
    fig = figure if figure is not None else plt.figure(figsize=(6.4, 6.4))
    ax, res = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1], "hspace": 0.08})
    for i, result in enumerate(results):
        _draw_activation_series(ax, result, f"C{i}", _kilo_reciprocal, _eyring_ordinate, residual_ax=res)
    ax.set_ylabel(r"ln($k$ / $T$)   ($k$ in s$^{-1}$, $T$ in K)")
    top = ax.secondary_xaxis("top", functions=(_kilo_reciprocal, _kilo_reciprocal))
    top.set_xlabel(r"$T$ / K")
    res.axhline(0.0, color="0.5", lw=0.8)
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
    for i, result in enumerate(results):
        _draw_activation_series(ax, result, f"C{i}", lambda t: t, _rate_ordinate)
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
        The fit (see :func:`dnmr.fitting.fit_spectrum`).
    figure : matplotlib Figure, optional
        Figure to draw into (default: a new one).

    Returns
    -------
    matplotlib.figure.Figure
        Upper panel: data (black), fit (red), baseline (grey, dashed); lower panel: data - fit with the
        band of +/- 2 noise standard deviations.
    """
    fig = figure if figure is not None else plt.figure(figsize=(7.0, 4.8))
    ax, res = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1], "hspace": 0.06})
    ax.plot(fit.ppm, fit.data, color="k", lw=0.8, label="data")
    ax.plot(fit.ppm, fit.fitted, color="tab:red", lw=1.1, label="fit")
    ax.plot(fit.ppm, fit.baseline, color="0.55", lw=0.8, ls="--", label="baseline")
    ax.set_ylabel("intensity")
    ax.legend(frameon=False, fontsize=8, loc="upper right")
    text = "\n".join(f"{r.process}: {r.describe().split('   ')[0]}" for r in fit.rates)
    ax.text(0.01, 0.97, text, transform=ax.transAxes, va="top", ha="left", fontsize=8)
    band = 2.0 * fit.noise.sigma
    res.axhspan(-band, band, color="0.88", lw=0)
    res.plot(fit.ppm, fit.residuals, color="k", lw=0.6)
    res.set_ylabel("residual")
    nmr_axis(res)
    from pathlib import Path

    name = Path(fit.source).name if fit.source else "spectrum"
    ax.set_title(f"{name}" + (f", {fit.temperature_k:g} K" if fit.temperature_k else ""), fontsize=10)
    return fig


def plot_fit_stack(fits, labels, *, figure=None, title: str = ""):
    """Measured (black) and fitted (red) spectra of a series, stacked bottom to top.

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
    fig = figure if figure is not None else plt.figure(figsize=(6.5, 1.2 + 0.9 * len(fits)))
    ax = fig.subplots()
    for i, (fit, label) in enumerate(zip(fits, labels)):
        baseline = fit.baseline
        height = max(float(np.max(fit.fitted - baseline)), 1e-300)
        ax.plot(fit.ppm, i + (fit.data - baseline) / height * 0.85, color="k", lw=0.7)
        ax.plot(fit.ppm, i + (fit.fitted - baseline) / height * 0.85, color="tab:red", lw=0.9)
        ax.text(fit.ppm.max(), i + 0.3, " " + label, va="center", ha="left", fontsize=8)
    nmr_axis(ax)
    ax.set_yticks([])
    for side in ("left", "right", "top"):
        ax.spines[side].set_visible(False)
    ax.set_title(title or "measured (black) and fitted (red)", fontsize=10)
    return fig
