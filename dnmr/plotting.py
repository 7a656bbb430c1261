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


#: Colours of the sites (or peaks) in magnetisation-transfer figures.
TRANSFER_COLOURS = ("#1f3b73", "#b2412c", "#2e7d4f", "#7a3e8f", "#a8701a", "#4d5d6e", "#1a8a8a", "#c2185b",
                    "#6b8e23")


def plot_transfer_fit(fit, *, figure=None):
    """Integrals (or 2D volumes) against delay, saturation or mixing time, the fitted curves and residuals.

    Parameters
    ----------
    fit : TransferFit
        The fit (see :func:`dnmr.transfer.fit_transfer`).
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
        colour = TRANSFER_COLOURS[c % len(TRANSFER_COLOURS)]
        marker = "s" if two_d and c % (len(exp.data.sites) + 1) == 0 else "o"  # diagonal peaks as squares
        ax.plot(grid, dense[:, c], color=colour, lw=1.1)
        ax.plot(times, data[:, c], marker, color=colour, ms=4, label=label)
        res.plot(times, residuals[:, c], marker, color=colour, ms=3)
    res.axhline(0.0, color="0.5", lw=0.8)
    axis = {"inversion": "delay", "saturation": "saturation time", "exchange-2d": "mixing time"}[exp.experiment]
    res.set_xlabel(f"{axis} / s")
    res.set_ylabel("residual")
    ax.set_ylabel("peak volume" if exp.experiment == "exchange-2d" else "integral")
    if two_d:
        ax.legend(frameon=False, fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    else:
        ax.legend(frameon=False, fontsize=8, loc="lower right")
    text = "\n".join(f"{r.process}: {r.describe().split('   ')[0]}" for r in fit.rates)
    ax.set_title(f"{exp.experiment}, {exp.temperature_k:g} K\n{text}", fontsize=9)
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


# --- posterior samples: corner figure ----------------------------------------------------------

def _credible_levels(density: np.ndarray, masses=(0.95, 0.68)) -> list[float]:
    """Density levels enclosing `masses` of a 2-D histogram (highest-density regions), ascending."""
    flat = np.sort(density.ravel())[::-1]
    cumulative = np.cumsum(flat) / flat.sum()
    levels = [float(flat[min(np.searchsorted(cumulative, m), flat.size - 1)]) for m in masses]
    return sorted(set(levels))


def _marks_1d(ax, x: np.ndarray, one_sided: str | None) -> str:
    """Median and 68 % interval (dashed), or the one-sided 95 % bound (dotted); returns the panel title."""
    if one_sided in ("upper-bound", "lower-bound"):
        bound = float(np.percentile(x, 95.0 if one_sided == "upper-bound" else 5.0))
        ax.axvline(bound, color="k", ls=":", lw=1.2)
        return f"{'<' if one_sided == 'upper-bound' else '>'} {bound:.3g} (95 %)"
    low, median, high = np.percentile(x, [15.87, 50.0, 84.13])
    ax.axvline(median, color="k", lw=1.0)
    for v in (low, high):
        ax.axvline(v, color="k", ls="--", lw=0.8)
    return f"{median:.4g} (+{high - median:.2g} / −{median - low:.2g})"


def _two_lines(label: str) -> str:
    """A long axis label on two lines: after "name:", else before "/ unit"."""
    return label.replace(": ", ":\n", 1) if ": " in label else label.replace(" / ", "\n/ ", 1)


def plot_corner(samples, labels, *, truths=None, one_sided=None, bins: int | None = None, figure=None):
    """Corner figure of posterior samples: 1-D histograms on the diagonal, 2-D below it.

    Parameters
    ----------
    samples : (n, p) array
        Samples of p quantities (2 to 6 read best).
    labels : sequence of str
        Axis label (with unit) of each quantity.
    truths : sequence of float or None, optional
        Known values to mark (grey lines; None to mark none for that quantity).
    one_sided : sequence of str or None, optional
        Per quantity "upper-bound" or "lower-bound" to mark only the one-sided 95 % bound (dotted) instead
        of the median and 68 % interval.
    bins : int, optional
        Histogram bins (default from the number of samples, 20 to 50).
    figure : matplotlib Figure, optional
        Figure to draw into (default: a new one).

    Returns
    -------
    matplotlib.figure.Figure
        Diagonal: histogram, median (solid) and 68 % central interval (dashed), the median and interval
        above it.  Below: 2-D histogram with the 68 % and 95 % highest-density contours.
    """
    from scipy.ndimage import gaussian_filter

    x = np.atleast_2d(np.asarray(samples, dtype=float))
    n, p = x.shape
    if len(labels) != p:
        raise ValueError(f"{p} quantities but {len(labels)} labels")
    truths = [None] * p if truths is None else list(truths)
    one_sided = [None] * p if one_sided is None else list(one_sided)
    labels = [_two_lines(label) if len(label) > 16 else label for label in labels]
    bins = bins or int(np.clip(np.sqrt(n) / 2, 20, 50))
    size = 2.0 * p + 0.8
    fig = figure if figure is not None else plt.figure(figsize=(size, size))
    axes = np.atleast_2d(fig.subplots(p, p, squeeze=False))
    ranges = []
    for j in range(p):
        lo, hi = np.percentile(x[:, j], [0.2, 99.8])
        pad = 0.05 * (hi - lo) if hi > lo else max(abs(lo) * 1e-3, 1e-12)
        ranges.append((lo - pad, hi + pad))
    for i in range(p):
        for j in range(p):
            ax = axes[i, j]
            if j > i:
                ax.set_visible(False)
                continue
            if i == j:
                ax.hist(x[:, j], bins=bins, range=ranges[j], histtype="step", color="k", lw=1.0)
                ax.set_title(_marks_1d(ax, x[:, j], one_sided[j]), fontsize=8)
                ax.set_yticks([])
                if truths[j] is not None:
                    ax.axvline(truths[j], color="tab:blue", lw=1.2)
            else:
                hist, xe, ye = np.histogram2d(x[:, j], x[:, i], bins=bins, range=[ranges[j], ranges[i]])
                density = gaussian_filter(hist.T, 1.0)
                ax.pcolormesh(xe, ye, density, cmap="Greys", shading="flat", rasterized=True)
                levels = _credible_levels(density)
                if len(levels) == 2 and levels[0] < levels[1] < density.max():
                    centres = 0.5 * (xe[1:] + xe[:-1]), 0.5 * (ye[1:] + ye[:-1])
                    ax.contour(*centres, density, levels=levels, colors="k", linewidths=[0.8, 1.2])
                if truths[j] is not None:
                    ax.axvline(truths[j], color="tab:blue", lw=1.0)
                if truths[i] is not None:
                    ax.axhline(truths[i], color="tab:blue", lw=1.0)
                if truths[i] is not None and truths[j] is not None:
                    ax.plot(truths[j], truths[i], "s", color="tab:blue", ms=4)
                ax.set_ylim(ranges[i])
            ax.set_xlim(ranges[j])
            ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4, prune="both"))
            if i < p - 1:
                ax.set_xticklabels([])
            else:
                ax.set_xlabel(labels[j])
                ax.tick_params(axis="x", labelrotation=45, labelsize=8)
            if i != j:
                ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4, prune="both"))
                if j > 0:
                    ax.set_yticklabels([])
                else:
                    ax.set_ylabel(labels[i])
                    ax.tick_params(axis="y", labelsize=8)
    fig.subplots_adjust(hspace=0.06, wspace=0.06)
    fig.text(0.99, 0.99, "lines: median and 68 % interval (dotted: one-sided 95 % bound)\n"
                         "contours: 68 % and 95 % of the samples", ha="right", va="top", fontsize=8)
    return fig
