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

This module holds the palette and the figures of spectra (one spectrum, stacks, fits and their residuals);
the Eyring figures are in :mod:`dnmr.reporting.eyringplot`, the pairwise posterior figure in
:mod:`dnmr.reporting.posteriorplot`.
"""
from __future__ import annotations

import re
import weakref
from dataclasses import dataclass

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
#: The range of magnetisation transfer in the same figure.
TRANSFER_COLOUR = PALETTE["teal"]


def series_colour(index: int) -> str:
    """Hue of the `index`-th series (0-based), cycling through :data:`SERIES`."""
    return PALETTE[SERIES[index % len(SERIES)]]


_SUPERSCRIPT = str.maketrans("⁻⁰¹²³⁴⁵⁶⁷⁸⁹", "-0123456789")
_FIGURE_SYMBOLS = ((re.compile(r"\bd([HSG])‡"), r"Δ\1‡"), (re.compile(r"\bdnu\b"), "Δν"),
                   (re.compile(r"\blog10\("), r"log$_{10}$("), (re.compile(r"<->"), "↔"),
                   (re.compile(r"\b(1|2|13|15|17|19|29|31)(H|C|N|O|F|Si|P)\b"), r"$^{\1}$\2"),
                   (re.compile(r"\^(-?\d+)"), r"$^{\1}$"),
                   (re.compile(r"\b(\d(?:\.\d+)?)e\+?(-?)0*(\d+)\b"), r"\1×10$^{\2\3}$"),
                   (re.compile(r"[⁻⁰¹²³⁴⁵⁶⁷⁸⁹]+"), lambda m: f"$^{{{m.group().translate(_SUPERSCRIPT)}}}$"))


def figure_text(text: str) -> str:
    """Plain report text made fit for a figure: real superscripts (``s^-1``, ``s⁻¹`` -> s$^{-1}$), a
    subscript in log$_{10}$, 1.2×10$^{4}$ for 1.2e+04, ΔH‡/ΔS‡/ΔG‡ for ΔH‡/ΔS‡/ΔG‡, Δν for dnu, ↔ for
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


def data_and_residual_axes(figure, size_inches: tuple[float, float], hspace: float = 0.06):
    """A figure (``figure``, or a new one of ``size_inches``) with the data panel above a third as tall
    residual panel that shares its x axis; returns (figure, data axes, residual axes)."""
    fig = figure if figure is not None else plt.figure(figsize=size_inches)
    ax, res = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1], "hspace": hspace})
    return fig, ax, res


def plot_spectrum_fit(fit, *, figure=None):
    """Data, fitted spectrum and residuals of one fit against ppm (high to low).

    Parameters
    ----------
    fit : SpectrumFit
        The fit (see :func:`dnmr.fitting.spectrumfit.fit_spectrum`).
    figure : matplotlib Figure, optional
        Figure to draw into (default: a new one).  A figure this function drew before is drawn again in
        place with `fit` (its panels, labels and keys are kept: cheaper than a new figure, as when a series
        draws the figure of every fit).

    Returns
    -------
    matplotlib.figure.Figure
        Upper panel: data (black), fit (orange-red), baseline (grey, dashed); lower panel: data - fit
        with the band of ±2 noise standard deviations.  The traces are reduced to their envelope per pixel
        column (:func:`envelope_points`), which draws the same.  Everything is drawn inside the figure's edges
        (``inside`` of :func:`dnmr.io.output.figure_bytes`).
    """
    panels = _FIT_PANELS.get(figure) if figure is not None else None
    if panels is None:
        panels = _fit_panels(figure)
        _FIT_PANELS[panels.figure] = panels
    _show_fit(panels, fit)
    return panels.figure


@dataclass(frozen=True)
class _FitPanels:
    """The artists of a fit figure that change from fit to fit."""

    figure: object
    data: object
    fitted: object
    baseline: object
    residuals: object
    band: object
    rates: object


#: Fit figures drawn by :func:`plot_spectrum_fit`, with their artists (forgotten with the figure).
_FIT_PANELS: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def _fit_panels(figure) -> _FitPanels:
    """The panels of a fit figure (in `figure`, or a new one), with empty traces."""
    fig, ax, res = data_and_residual_axes(figure, (7.0, 4.8))
    data, = ax.plot([], [], color=INK, lw=0.8, label="data")
    fitted, = ax.plot([], [], color=FIT_COLOUR, lw=1.1, label="fit")
    baseline, = ax.plot([], [], color=GREY, lw=0.8, ls="--", label="baseline")
    ax.set_ylabel("intensity")
    ax.legend(frameon=False, fontsize=8, loc="upper right")
    rates = ax.text(0.01, 0.97, "", transform=ax.transAxes, va="top", ha="left", fontsize=8)
    band = res.axhspan(-1.0, 1.0, color=PALE, lw=0)
    label_band(res, "±2σ of the noise")
    residuals, = res.plot([], [], color=INK, lw=0.6)
    res.set_ylabel("residual")
    nmr_axis(res)
    return _FitPanels(fig, data, fitted, baseline, residuals, band, rates)


def _show_fit(panels: _FitPanels, fit) -> None:
    """Put `fit` into the panels: traces, noise band, rates, title and the axes' limits."""
    from pathlib import Path

    ax, res = panels.data.axes, panels.residuals.axes
    columns = _pixel_columns(ax)
    for line, values in ((panels.data, fit.data), (panels.fitted, fit.fitted), (panels.baseline, fit.baseline),
                         (panels.residuals, fit.residuals)):
        line.set_data(*envelope_points(fit.ppm, values, columns))
    band = 2.0 * fit.noise.sigma
    panels.band.set_y(-band)
    panels.band.set_height(2.0 * band)
    panels.rates.set_text("\n".join(figure_text(f"{r.process}: {r.describe().split('   ')[0]}") for r in fit.rates))
    name = Path(fit.source).name if fit.source else "spectrum"
    ax.set_title(figure_text(name) + (f", {fit.temperature_k:g} K" if fit.temperature_k else ""), fontsize=10)
    for axes in (ax, res):
        axes.relim()
        axes.autoscale_view()


#: Resolution (dots per inch) at which traces keep their envelope: twice the 150 dpi dnmr writes figures at.
ENVELOPE_DPI = 300


def _pixel_columns(ax) -> int:
    """Pixel columns of `ax` at :data:`ENVELOPE_DPI`."""
    return max(1, int(ax.get_position().width * ax.figure.get_figwidth() * ENVELOPE_DPI))


def envelope_points(x: np.ndarray, y: np.ndarray, columns: int) -> tuple[np.ndarray, np.ndarray]:
    """A trace reduced to what a line through it shows on `columns` pixel columns: in each column, the first
    and last point and the lowest and highest, in their order along x (the trace unchanged when it has no
    more than four points a column).

    Every column keeps the trace's own minimum and maximum, and the segments between columns join the same
    points as before, so the drawn line covers the same pixels (min/max decimation).

    Parameters
    ----------
    x : ndarray
        Abscissa (ppm, say), monotonic.
    y : ndarray
        Ordinate, same length.
    columns : int
        Pixel columns across the range of `x`.

    Returns
    -------
    (ndarray, ndarray)
        The kept points of `x` and `y`.
    """
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if x.size <= 4 * columns:
        return x, y
    span = x[-1] - x[0]
    column = np.minimum((columns * (x - x[0]) / span).astype(np.int64), columns - 1)
    starts = np.flatnonzero(np.r_[True, column[1:] != column[:-1]])
    ends = np.r_[starts[1:], x.size] - 1
    lowest = _first_in_column(y == np.repeat(np.minimum.reduceat(y, starts), ends - starts + 1), column)
    highest = _first_in_column(y == np.repeat(np.maximum.reduceat(y, starts), ends - starts + 1), column)
    keep = np.unique(np.concatenate([starts, ends, lowest, highest]))
    return x[keep], y[keep]


def _first_in_column(hits: np.ndarray, column: np.ndarray) -> np.ndarray:
    """Index of the first True of `hits` in each pixel column (every column has one)."""
    where = np.flatnonzero(hits)
    return where[np.r_[True, column[where][1:] != column[where][:-1]]]


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
    fig, ax, res = data_and_residual_axes(figure, (6.8, 5.0))
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


def plot_corner(*args, **kwargs):
    """Renamed to :func:`dnmr.reporting.posteriorplot.plot_posterior_pairs` (its keyword ``truths`` to
    ``true_values``)."""
    raise InputError("dnmr.reporting.plotting.plot_corner was renamed to plot_posterior_pairs (and its keyword "
                     "'truths' to 'true_values'); the figure's look changed too", where="plot_corner")
